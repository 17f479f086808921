"""The shared picture of a CT volume: field of view, body, patient table, air.

Computed once per volume (:func:`find_regions`) and handed to every analysis, so that
all of them agree on where the air is. Boolean volumes are (z, y, x); the field of view
is one (y, x) mask shared by all slices, as a scanner reconstructs every slice on the
same circle.

Method (common practice, no source): the field of view is what the scanner did not mark
as padding (PixelPaddingValue, values below ``padding_below_hu``, or one constant value
connected to the image border on every slice, when it encloses a near-disc or air of
another value: noise-free synthetic air is air, not padding); the body is the largest
3-D component above ``body_threshold_hu`` (about -500 HU) with holes filled slice by
slice; the table
is any other component that lies posterior to the body, spans most slices and keeps its
cross-section along z; the air is the field of view outside the body and table dilated
by ``margin_mm``.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .volume import Volume

_INPLANE = np.zeros((3, 3, 3), dtype=bool)
_INPLANE[1] = ndimage.generate_binary_structure(2, 1)


@dataclass
class Regions:
    """Masks and simple facts shared by every analysis."""

    fov: np.ndarray  # bool (y, x)
    body: np.ndarray  # bool (z, y, x)
    table: np.ndarray  # bool (z, y, x)
    air: np.ndarray  # bool (z, y, x)
    fov_center_yx_vox: tuple[float, float]
    fov_radius_vox: float
    fov_is_circle: bool
    body_centroid_zyx_vox: tuple[float, float, float] | None
    notes: list[str] = field(default_factory=list)
    margin_mm: float = 4.0  # the air lies this far from the body and table (in-plane)

    @property
    def has_body(self) -> bool:
        return self.body_centroid_zyx_vox is not None

    def facts(self) -> dict:
        """JSON-ready summary (for results and the report)."""
        return {
            "fov_center_yx_vox": [round(v, 2) for v in self.fov_center_yx_vox],
            "fov_radius_vox": round(self.fov_radius_vox, 2),
            "fov_is_circle": self.fov_is_circle,
            "body_centroid_zyx_vox": None
            if self.body_centroid_zyx_vox is None
            else [round(v, 2) for v in self.body_centroid_zyx_vox],
            "body_voxels": int(self.body.sum()),
            "table_voxels": int(self.table.sum()),
            "air_voxels": int(self.air.sum()),
        }


def _constant_border_region(hu: np.ndarray) -> tuple[np.ndarray, float] | None:
    """Pixels holding one constant value on every slice and connected to the image border,
    and that value. None when the border has no dominant constant value.
    """
    border = np.concatenate([hu[0, 0, :], hu[0, -1, :], hu[0, :, 0], hu[0, :, -1]])
    values, counts = np.unique(border, return_counts=True)
    if counts.max() <= 0.25 * border.size:
        return None
    mode = values[np.argmax(counts)]
    constant = (hu == mode).all(axis=0)
    lab, _ = ndimage.label(constant)
    edge_labels = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
    return np.isin(lab, edge_labels[edge_labels > 0]), float(mode)


def _looks_like_padding(hu: np.ndarray, region: np.ndarray, value: float, air_below_hu: float = -900.0) -> bool:
    """A constant border region is padding, not noise-free air, when what it encloses is a
    near-disc (a reconstruction circle) or still holds air of its own (air-like pixels of
    another value)."""
    inside = ndimage.binary_fill_holes(~region)
    if not inside.any():
        return True
    ys, xs = np.nonzero(inside)
    r_max = np.hypot(ys - ys.mean(), xs - xs.mean()).max() + 0.5
    disc_fill = ys.size / (np.pi * r_max * r_max)
    own_air = np.count_nonzero(inside & (hu[0] < air_below_hu) & (hu[0] != value))
    return bool(disc_fill >= 0.9 or own_air >= 0.01 * ys.size)


def find_fov(volume: Volume, padding_below_hu: float = -1500.0) -> tuple[np.ndarray, bool]:
    """The (y, x) mask of pixels inside the reconstruction field of view.

    Outside are: the declared padding (``volume.padding_mask``), pixels below
    ``padding_below_hu`` on every slice, and a constant value on every slice connected to
    the image border when it encloses a near-disc or air of its own (noise-free
    synthetic air is not padding). Returns the mask and whether anything outside it was
    found (a circle was detected).
    """
    hu = volume.hu
    outside = np.zeros(hu.shape[1:], dtype=bool)
    if volume.padding_mask is not None:
        outside |= volume.padding_mask
    outside |= (hu < padding_below_hu).all(axis=0)
    found = _constant_border_region(hu)
    if found is not None and (found[0] & ~outside).any() and _looks_like_padding(hu, *found):
        outside |= found[0]
    if not outside.any():
        return np.ones(hu.shape[1:], dtype=bool), False
    fov = ndimage.binary_fill_holes(~outside)
    lab, n = ndimage.label(fov)
    if n > 1:
        sizes = ndimage.sum(fov, lab, index=np.arange(1, n + 1))
        fov = lab == (1 + int(np.argmax(sizes)))
    return fov, True


def _circle_of(mask2d: np.ndarray) -> tuple[tuple[float, float], float]:
    ys, xs = np.nonzero(mask2d)
    if ys.size == 0:
        return (mask2d.shape[0] / 2.0, mask2d.shape[1] / 2.0), 0.0
    return (float(ys.mean()), float(xs.mean())), float(np.sqrt(ys.size / np.pi))


def label_compact(mask: np.ndarray, structure: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """``ndimage.label`` into uint16 labels (half the memory traffic of int32), falling
    back to the default label type when there are more than 65535 components.

    The labels are the same as ``ndimage.label(mask, structure)`` gives.

    References
    ----------
    .. [1] Common practice, no source (connected-component labelling).
    """
    try:
        lab, n = ndimage.label(mask, structure=structure, output=np.uint16)
    except RuntimeError:  # more components than uint16 holds
        lab, n = ndimage.label(mask, structure=structure)
    return lab, int(n)


def bounding_box(mask: np.ndarray) -> tuple[slice, ...] | None:
    """The smallest box (one slice per axis) holding every True voxel; None when empty."""
    box = []
    for axis in range(mask.ndim):
        others = tuple(a for a in range(mask.ndim) if a != axis)
        hit = np.flatnonzero(mask.any(axis=others))
        if hit.size == 0:
            return None
        box.append(slice(int(hit[0]), int(hit[-1]) + 1))
    return tuple(box)


def _shifted(sl: tuple[slice, ...], offset: tuple[int, ...]) -> tuple[slice, ...]:
    return tuple(slice(s.start + o, s.stop + o) for s, o in zip(sl, offset))


@dataclass
class _Component:
    """One 3-D connected component: its size, box (volume coordinates) and where its
    labels are (``labels[local_box] == label`` is its mask inside ``box``)."""

    size: int
    box: tuple[slice, ...]
    labels: np.ndarray
    local_box: tuple[slice, ...]
    label: int

    def mask(self) -> np.ndarray:
        return self.labels[self.local_box] == self.label


def _components_of(mask: np.ndarray, offset: tuple[int, ...]) -> list[_Component]:
    """The components of ``mask`` in the order ``ndimage.label`` numbers them; ``offset``
    is the position of ``mask`` in the volume."""
    lab, n = label_compact(mask)
    objects = ndimage.find_objects(lab)
    if n > 64:
        sizes = np.bincount(lab.ravel(), minlength=n + 1)
    else:  # few components: count each inside its bounding box
        sizes = np.zeros(n + 1, dtype=np.int64)
        for i, sl in enumerate(objects, start=1):
            if sl is not None:
                sizes[i] = np.count_nonzero(lab[sl] == i)
    return [_Component(int(sizes[i]), _shifted(sl, offset), lab, sl, i)
            for i, sl in enumerate(objects, start=1) if sl is not None]


def _components(mask: np.ndarray) -> list[_Component]:
    """The 3-D components (6-connected) of ``mask``.

    Only the bounding box of ``mask`` is labelled, split by the 4-connected components of
    its footprint along z: two voxels adjacent in 3-D have the same or 4-adjacent
    footprint pixels, so every component lies over one footprint component and each can
    be labelled apart, in its own smaller box. The order of the list then follows the
    footprints; when two components share the largest size (the only case where the
    order matters, see :func:`find_regions`) the box is labelled as one, in the order
    ``ndimage.label`` gives.
    """
    box = bounding_box(mask)
    if box is None:
        return []
    part = mask[box]
    footprint, m = ndimage.label(part.any(axis=0))
    found: list[_Component] = []
    for g, yx in enumerate(ndimage.find_objects(footprint), start=1):
        sub = part[(slice(None),) + yx]
        if m > 1:
            sub = sub & (footprint[yx] == g)[None]
        found += _components_of(sub, (box[0].start, box[1].start + yx[0].start, box[2].start + yx[1].start))
    sizes = [c.size for c in found]
    if m > 1 and sizes.count(max(sizes)) > 1:
        found = _components_of(part, tuple(s.start for s in box))
    return found


def _or_window(a: np.ndarray, half: int, axis: int) -> np.ndarray:
    """OR of ``a`` over the window ``i - half .. i + half`` along ``axis`` (clipped at the
    ends), by doubling the window span: about log2(2 half + 1) passes."""
    length = 2 * half + 1
    n = a.shape[axis]
    pad = [(0, 0)] * a.ndim
    pad[axis] = (half, 0)
    b = np.pad(a, pad)  # False before the start: the same as clipping the window
    span = 1
    while span < length:
        step = min(span, length - span)
        lo = [slice(None)] * a.ndim
        hi = [slice(None)] * a.ndim
        lo[axis], hi[axis] = slice(0, -step), slice(step, None)
        b[tuple(lo)] |= b[tuple(hi)]  # b[i] = OR over a[i .. i + span + step - 1]
        span += step
    keep = [slice(None)] * a.ndim
    keep[axis] = slice(0, n)
    return b[tuple(keep)]


def dilate_in_plane(mask: np.ndarray, half: int, chunk: int = 32) -> np.ndarray:
    """``mask`` dilated by a (2 half + 1)-pixel square in every slice.

    The same as ``ndimage.maximum_filter(mask, size=(1, 2 half + 1, 2 half + 1))``
    (whose reflected border only repeats pixels already in the window), computed a few
    slices at a time with shifted ORs.
    """
    out = np.empty(mask.shape, dtype=bool)
    for z0 in range(0, mask.shape[0], chunk):
        part = _or_window(mask[z0 : z0 + chunk], half, axis=2)
        out[z0 : z0 + chunk] = _or_window(part, half, axis=1)
    return out


def fill_holes_in_plane(mask: np.ndarray) -> np.ndarray:
    """``mask`` with the holes of every slice filled (background not reaching the border).

    One in-plane labelling of the background for all slices, much faster than iterative
    filling of a 3-D volume.
    """
    lab, n = label_compact(~mask, structure=_INPLANE)
    if n == 0:
        return mask
    outside = np.zeros(n + 1, dtype=bool)
    for edge in (lab[:, 0, :], lab[:, -1, :], lab[:, :, 0], lab[:, :, -1]):
        outside[np.unique(edge)] = True
    outside[0] = True  # label 0 is the mask itself
    return mask | ~outside[lab]


def centroid_of(mask: np.ndarray, box: tuple[slice, ...] | None = None) -> tuple[float, float, float]:
    """Centre of mass (z, y, x) of a boolean volume from its axis projections.

    ``box``, when given, must hold every True voxel; only it is read. The sums are exact
    integers either way, so the result does not depend on ``box``.
    """
    if box is None:
        box = tuple(slice(0, n) for n in mask.shape)
    part = mask[box]
    total = float(np.count_nonzero(part))
    out = []
    for axis in range(3):
        others = tuple(a for a in range(3) if a != axis)
        profile = np.count_nonzero(part, axis=others).astype(np.int64)
        index = np.arange(box[axis].start, box[axis].start + part.shape[axis], dtype=np.int64)
        out.append(float((profile * index).sum() / total))
    return tuple(out)  # type: ignore[return-value]


def _union_box(a: tuple[slice, ...], b: tuple[slice, ...]) -> tuple[slice, ...]:
    return tuple(slice(min(p.start, q.start), max(p.stop, q.stop)) for p, q in zip(a, b))


def _widened_in_plane(box: tuple[slice, ...], half: int, shape: tuple[int, ...]) -> tuple[slice, ...]:
    """``box`` widened by ``half`` pixels in y and x, clipped to ``shape``."""
    zs, ys, xs = box
    return (zs, slice(max(0, ys.start - half), min(shape[1], ys.stop + half)),
            slice(max(0, xs.start - half), min(shape[2], xs.stop + half)))


def _is_table(comp_slices: tuple[slice, ...], comp: np.ndarray, body_bbox: tuple[slice, ...], nz: int) -> bool:
    """A flat, posterior structure whose cross-section barely changes along z."""
    zs, ys, xs = comp_slices
    if (zs.stop - zs.start) < max(1, int(0.8 * nz)):
        return False
    height = ys.stop - ys.start
    width = xs.stop - xs.start
    body_y = body_bbox[1]
    centre_y = 0.5 * (ys.start + ys.stop)
    posterior = centre_y > body_y.start + 0.75 * (body_y.stop - body_y.start)
    areas = comp.sum(axis=(1, 2))
    areas = areas[areas > 0]
    steady = areas.size > 0 and areas.std() <= 0.2 * areas.mean()
    return bool(posterior and width > height and steady)


def find_regions(
    volume: Volume,
    *,
    body_threshold_hu: float = -500.0,
    margin_mm: float = 4.0,
    padding_below_hu: float = -1500.0,
) -> Regions:
    """Field of view, body, table and air of ``volume``; see the module docstring."""
    hu = volume.hu
    nz = hu.shape[0]
    fov2d, is_circle = find_fov(volume, padding_below_hu)
    centre, radius = _circle_of(fov2d)
    notes: list[str] = []

    dense = np.greater(hu, body_threshold_hu)
    dense &= fov2d[None]
    comps = _components(dense)
    del dense
    body = np.zeros(hu.shape, dtype=bool)
    table = np.zeros(hu.shape, dtype=bool)
    centroid = None
    grown_box: tuple[slice, ...] | None = None
    if comps:
        largest = comps[int(np.argmax([c.size for c in comps]))]
        body_bbox = largest.box
        body[body_bbox] = fill_holes_in_plane(largest.mask())
        grown_box = body_bbox
        for c in comps:
            if c is largest or c.size < 20:
                continue
            comp = c.mask()
            if _is_table(c.box, comp, body_bbox, nz):
                table[c.box] |= comp
                grown_box = _union_box(grown_box, c.box)
        del comps
        centroid = centroid_of(body, body_bbox)
    else:
        notes.append("no body found: nothing above %.0f HU inside the field of view" % body_threshold_hu)

    margin_px = max(1, int(round(margin_mm / min(volume.spacing_mm[1:]))))
    open_2d = fov2d if volume.padding_mask is None else fov2d & ~volume.padding_mask
    air = np.empty(hu.shape, dtype=bool)
    air[:] = open_2d[None]  # the field of view less the padding, on every slice
    if grown_box is not None:  # outside the grown box nothing of the body or table is near
        near = _widened_in_plane(grown_box, margin_px, hu.shape)
        grown = dilate_in_plane(body[near] | table[near], margin_px)
        air[near] &= np.logical_not(grown, out=grown)
    return Regions(
        fov=fov2d,
        body=body,
        table=table,
        air=air,
        fov_center_yx_vox=centre,
        fov_radius_vox=radius,
        fov_is_circle=is_circle,
        body_centroid_zyx_vox=centroid,
        notes=notes,
        margin_mm=float(margin_mm),
    )
