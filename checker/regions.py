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
slice; the table is any other component that lies posterior to the body, spans most
slices and keeps its cross-section along z; the air is the field of view outside the
body and table dilated by ``margin_mm``.

How it is computed (a method choice for speed; the record keys and their meaning are
unchanged, and values may be documented estimates, but body, table and air below
are exact):

- Field of view: "on every slice" is decided on the slices :func:`fov_slices` picks:
  the first, middle and last, and every slice whose padding pattern differs from the
  first slice's on a coarse screen (every 4th pixel of every 16th row and of the image
  border). One reconstruction circle is shared by the series, so three slices suffice
  unless a slice breaks the pattern, and such a slice is seen on the screen.
- Body and table, for slices of at least ``COARSE_FROM_PX`` pixels a side (multiples of
  ``BLOCK``): the thresholded volume is read once into one 16-bit pattern per 4 x 4-pixel
  block (:func:`block_patterns`: the full-resolution threshold, exactly, in 1/16 of the
  bytes). The components are found on the block grid (:func:`pattern_components`) and are
  the full-resolution method's components, not an approximation: blocks whose pixels form
  one piece and touch every non-empty neighbour through a pair of facing pixels are
  labelled as blocks; the rare others (where two structures come within a block of each
  other, noise specks) are split into their pieces by a look-up table and joined to their
  neighbours pixel pair by pixel pair. The body's holes are filled the same way on the
  patterns of its background (:func:`fill_holes_in_patterns`), and body and table are
  painted from their patterns. Body, table and air therefore equal the full-resolution
  method's voxel for voxel (tests compare them on the demo series, the benchmark torso
  and random phantoms); only when two components share the largest size does the volume
  take the full-resolution path, which numbers equal sizes as ``ndimage.label`` does.
  Smaller slices, cheap at full resolution, are labelled pixel by pixel.
  The components are worked only in the box of the non-empty blocks (a crop keeps the
  scan order, so sizes and numbering are the whole grid's); body and table are painted
  by looking up each 4-pixel block row as one 32-bit word of 0/1 bytes, and the body's
  voxel count and centre of mass come from population counts of block rows and columns
  (exact integer profiles).
- Air: the dilation of body and table runs on bit-packed rows (exactly the square
  dilation, see :func:`air_outside`); the mask is written once, slab by slab, with no
  full-size intermediate.

- Threads: the slice-local passes (the padding screen of the field of view, the
  threshold into block patterns, the search for suspect blocks, the per-label pixel
  counts and the component boxes on the labelled grid, the in-plane hole filling, painting body and table from their
  patterns, the body's per-slice profiles for count and centroid, the air written a slab
  at a time) run over disjoint slabs of
  slices on ``REGIONS_THREADS`` threads (:func:`over_z`; 1 runs everything in the calling
  thread). Each slab writes only its own slices, so the masks do not depend on the number
  of threads; the components stay one labelling of the whole block grid. Block rows are
  painted by one multiply per word instead of a table look-up (the same words).

These are method choices for speed (values in the records may change where a
documented method choice changes them; keys and meaning may not): here no value
changes, the masks equal the previous version's voxel for voxel.
"""
from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .volume import Volume

#: Threads for the slice-local passes of :func:`find_regions` (1: all in the calling thread).
REGIONS_THREADS: int = max(1, min(2, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                                  else (os.cpu_count() or 1)))


def z_ranges(nz: int, parts: int, multiple: int = 1) -> list[tuple[int, int]]:
    """``0 .. nz`` cut into at most ``parts`` contiguous ranges of nearly equal length,
    every cut on a multiple of ``multiple`` slices."""
    step = -(-max(1, -(-nz // max(1, parts))) // multiple) * multiple
    return [(a, min(nz, a + step)) for a in range(0, nz, step)]


def over_z(work: Callable[[int, int], None], nz: int, multiple: int = 1, min_slices: int = 16,
           threads: int | None = None) -> None:
    """Run ``work(z0, z1)`` over ``0 .. nz`` cut into contiguous slice ranges, one per
    thread (``REGIONS_THREADS`` unless ``threads``), the calling thread taking the first.

    ``work`` must write only its own slices: the ranges are disjoint, so the result is
    the single-thread one whatever the order. numpy releases the GIL in the large array
    operations these passes are made of, so the threads run on separate cores. Fewer
    than ``min_slices`` slices per range run in one call, and so does a call made from
    inside a slab (no nested threads).

    References
    ----------
    .. [1] Common practice, no source (data-parallel work over disjoint slabs).
    """
    n = REGIONS_THREADS if threads is None else threads
    n = max(1, min(n, nz // max(1, min_slices)))
    ranges = z_ranges(nz, n, multiple)
    if len(ranges) <= 1 or getattr(_IN_SLAB, "active", False):  # a slab's own passes stay on its thread
        if nz:
            work(0, nz)
        return
    with ThreadPoolExecutor(max_workers=len(ranges) - 1) as pool:
        futures = [pool.submit(_as_slab, work, a, b) for a, b in ranges[1:]]
        _as_slab(work, *ranges[0])
        for f in futures:
            f.result()


_IN_SLAB = threading.local()


def _as_slab(work: Callable[[int, int], None], a: int, b: int) -> None:
    """``work(a, b)``, marking the thread as inside a slab while it runs."""
    _IN_SLAB.active = True
    try:
        work(a, b)
    finally:
        _IN_SLAB.active = False

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
    #: voxel counts of body, table and air when find_regions knew them (facts() uses them)
    voxel_counts: dict[str, int] | None = field(default=None, repr=False, compare=False)

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
            "body_voxels": self._count("body"),
            "table_voxels": self._count("table"),
            "air_voxels": self._count("air"),
        }

    def _count(self, name: str) -> int:
        known = self.voxel_counts or {}
        return int(known[name]) if name in known else int(np.count_nonzero(getattr(self, name)))


#: Row and column steps of the coarse screen on which every slice's padding pattern is compared.
FOV_SCREEN_ROWS, FOV_SCREEN_COLS = 16, 4


def _padding_code(hu: np.ndarray, padding_below_hu: float, mode: float | None) -> np.ndarray:
    """Per slice, the padding pattern at the screened pixels: 1 where below
    ``padding_below_hu``, +2 where equal to ``mode`` (when given). (z, n) uint8.

    Screened are every ``FOV_SCREEN_COLS``-th pixel of every ``FOV_SCREEN_ROWS``-th row,
    of the last row and of the first and last columns (strided reads: a few percent of
    the volume's memory).
    """
    r, c = FOV_SCREEN_ROWS, FOV_SCREEN_COLS
    nz, ny, nx = hu.shape
    width = -(-ny // r) * -(-nx // c) + -(-nx // c) + 2 * -(-ny // c)  # the four sample sets below
    code = np.empty((nz, width), dtype=np.uint8)

    def slab(a: int, b: int) -> None:
        part = hu[a:b]
        samples = np.concatenate([part[:, ::r, ::c].reshape(b - a, -1), part[:, -1, ::c], part[:, ::c, 0],
                                  part[:, ::c, -1]], axis=1)
        found = (samples < padding_below_hu).view(np.uint8)
        if mode is not None:
            found = found + 2 * (samples == hu.dtype.type(mode)).view(np.uint8)
        code[a:b] = found

    over_z(slab, nz)  # slabs of slices on REGIONS_THREADS threads
    return code


def fov_slices(hu: np.ndarray, padding_below_hu: float = -1500.0, mode: float | None = None) -> np.ndarray:
    """The slices whose full-resolution pixels decide the field of view.

    The first, middle and last slices, and every slice whose padding pattern (pixels below
    ``padding_below_hu``, and pixels equal to the border's constant ``mode``) on the
    coarse grid or on the image edges differs from the first slice's. A scanner
    reconstructs every slice of a series on the same circle, so the padding is one
    pattern repeated; a slice that breaks the pattern anywhere on the screen is read in
    full. A difference that misses every screened pixel (every 4th pixel of every 16th
    row, and every 4th pixel of the image border) is not seen: the field of view is then
    decided by the slices read.

    References
    ----------
    .. [1] Common practice, no source (a CT series shares one reconstruction circle).
    """
    nz = hu.shape[0]
    code = _padding_code(hu, padding_below_hu, mode)
    differ = np.flatnonzero((code != code[0]).any(axis=1))
    return np.unique(np.concatenate([[0, nz // 2, nz - 1], differ])).astype(int)


def _all_slices(hu: np.ndarray, slices: np.ndarray, test) -> np.ndarray:
    """``test(hu[k])`` AND-ed over the slices ``slices`` ((y, x) bool)."""
    out = test(hu[int(slices[0])])
    for k in slices[1:]:
        out &= test(hu[int(k)])
    return out


def _border_mode(hu: np.ndarray) -> float | None:
    """The value holding more than a quarter of the first slice's border, or None."""
    border = np.concatenate([hu[0, 0, :], hu[0, -1, :], hu[0, :, 0], hu[0, :, -1]])
    values, counts = np.unique(border, return_counts=True)
    if counts.max() <= 0.25 * border.size:
        return None
    return float(values[np.argmax(counts)])


def _constant_border_region(hu: np.ndarray, mode: float | None, slices: np.ndarray) -> tuple[np.ndarray, float] | None:
    """Pixels holding one constant value on every slice read and connected to the image
    border, and that value. None when the border has no dominant constant value.
    """
    if mode is None:
        return None
    value = hu.dtype.type(mode)
    constant = _all_slices(hu, slices, lambda s: s == value)
    lab, _ = ndimage.label(constant)
    edge_labels = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
    return np.isin(lab, edge_labels[edge_labels > 0]), mode


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
    synthetic air is not padding). "Every slice" is decided on the slices
    :func:`fov_slices` picks (first, middle, last, and each slice whose padding pattern
    on a coarse screen differs), not by reading every pixel of every slice. Returns the
    mask and whether anything outside it was found (a circle was detected).

    References
    ----------
    .. [1] DICOM PS3.3, C.7.5.1.1.2 (PixelPaddingValue); otherwise common practice, no
       source.
    """
    hu = volume.hu
    mode = _border_mode(hu)
    slices = fov_slices(hu, padding_below_hu, mode)
    outside = np.zeros(hu.shape[1:], dtype=bool)
    if volume.padding_mask is not None:
        outside |= volume.padding_mask
    outside |= _all_slices(hu, slices, lambda s: s < padding_below_hu)
    found = _constant_border_region(hu, mode, slices)
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
    return _is_table_from(comp_slices, comp.sum(axis=(1, 2)), body_bbox, nz)


#: In-plane edge of the coarse grid's blocks (pixels).
BLOCK = 4
#: Slices at least this many pixels high and wide (and multiples of BLOCK) use the coarse
#: grid for the body and table; smaller ones, cheap at full resolution, use it directly.
COARSE_FROM_PX = 256


def uses_coarse_grid(shape: tuple[int, ...]) -> bool:
    """Whether :func:`find_regions` finds body and table on the coarse block grid."""
    ny, nx = shape[-2:]
    return min(ny, nx) >= COARSE_FROM_PX and ny % BLOCK == 0 and nx % BLOCK == 0


def find_regions(
    volume: Volume,
    *,
    body_threshold_hu: float = -500.0,
    margin_mm: float = 4.0,
    padding_below_hu: float = -1500.0,
    coarse: bool | None = None,
) -> Regions:
    """Field of view, body, table and air of ``volume``; see the module docstring.

    ``coarse`` chooses the method for body and table: True the coarse block grid, False
    full resolution, None (default) as :func:`uses_coarse_grid` says.
    """
    hu = volume.hu
    fov2d, is_circle = find_fov(volume, padding_below_hu)
    centre, radius = _circle_of(fov2d)
    notes: list[str] = []
    if coarse is None:
        coarse = uses_coarse_grid(hu.shape)
    elif coarse and (hu.shape[1] % BLOCK or hu.shape[2] % BLOCK):
        raise ValueError(f"the coarse grid needs slices whose sides are multiples of {BLOCK}, got {hu.shape[1:]}")
    found = (_coarse_body_and_table if coarse else _full_body_and_table)(hu, fov2d, body_threshold_hu)
    if found.centroid is None:
        notes.append("no body found: nothing above %.0f HU inside the field of view" % body_threshold_hu)

    margin_px = max(1, int(round(margin_mm / min(volume.spacing_mm[1:]))))
    open_2d = fov2d if volume.padding_mask is None else fov2d & ~volume.padding_mask
    air = air_outside(found, open_2d, margin_px, hu.shape)
    return Regions(
        fov=fov2d,
        body=found.body,
        table=found.table,
        air=air,
        fov_center_yx_vox=centre,
        fov_radius_vox=radius,
        fov_is_circle=is_circle,
        body_centroid_zyx_vox=found.centroid,
        notes=notes,
        margin_mm=float(margin_mm),
        voxel_counts={"body": found.body_voxels, "table": found.table_voxels},
    )


@dataclass
class _BodyTable:
    """Body and table masks with what :func:`find_regions` needs besides them."""

    body: np.ndarray
    table: np.ndarray
    centroid: tuple[float, float, float] | None
    grown_box: tuple[slice, ...] | None  # holds every body and table voxel
    body_voxels: int
    table_voxels: int
    table_found: bool


def _full_body_and_table(hu: np.ndarray, fov2d: np.ndarray, body_threshold_hu: float) -> _BodyTable:
    """Body and table at full resolution: 3-D components of the thresholded volume."""
    nz = hu.shape[0]
    dense = np.greater(hu, body_threshold_hu)
    dense &= fov2d[None]
    comps = _components(dense)
    del dense
    body = np.zeros(hu.shape, dtype=bool)
    table = np.zeros(hu.shape, dtype=bool)
    if not comps:
        return _BodyTable(body, table, None, None, 0, 0, False)
    largest = comps[int(np.argmax([c.size for c in comps]))]
    body_bbox = largest.box
    body[body_bbox] = fill_holes_in_plane(largest.mask())
    grown_box = body_bbox
    table_found = False
    for c in comps:
        if c is largest or c.size < 20:
            continue
        comp = c.mask()
        if _is_table(c.box, comp, body_bbox, nz):
            table[c.box] |= comp
            grown_box = _union_box(grown_box, c.box)
            table_found = True
    del comps
    table_voxels = int(np.count_nonzero(table[grown_box])) if table_found else 0
    return _BodyTable(body, table, centroid_of(body, body_bbox), grown_box,
                      int(np.count_nonzero(body[body_bbox])), table_voxels, table_found)


# --------------------------------------------------------------------------- coarse grid
#: Pattern of a block whose 16 pixels are all set.
FULL = 0xFFFF
_BITS = np.uint16(1) << np.arange(16, dtype=np.uint16)  # bit 4 r + c: pixel (r, c) of a block


@dataclass(frozen=True)
class _PatternTables:
    """Look-up tables over the 65536 patterns of a 4 x 4 block (bit 4 r + c = pixel (r, c))."""

    pixels: np.ndarray  # (65536, 16) bool: the pixels of a pattern
    pop: np.ndarray  # (65536,) uint8: how many pixels are set
    sub: np.ndarray  # (65536, 16) uint8: 4-connected piece (1..) of each set pixel, 0 where unset
    nsub: np.ndarray  # (65536,) uint8: how many pieces
    submask: np.ndarray  # (65536, 8) uint16: the pattern of each piece (at most 8 in a 4 x 4 block)


_TABLES: list[_PatternTables] = []


def pattern_tables() -> _PatternTables:
    """The block look-up tables, built once per process.

    The 4-connected pieces of all 65536 patterns are grown at once in 16-bit words: a
    piece starts at the lowest set pixel not yet in a piece and grows by one pixel step
    (left, right, up, down inside the block, kept within the pattern) until it stops
    changing; so the pieces are numbered in raster order of their first pixel, as
    ``ndimage.label`` numbers them (the tests compare both for every pattern).

    References
    ----------
    .. [1] Common practice, no source (look-up tables over the bit patterns of small blocks
       in connected-component labelling; flood fill by bit shifts).
    """
    if _TABLES:
        return _TABLES[0]
    n = 1 << (BLOCK * BLOCK)
    codes = np.arange(n, dtype=np.uint32).astype(np.uint16)
    pixels = np.unpackbits(codes.astype("<u2").view(np.uint8).reshape(n, 2), axis=1, bitorder="little").view(bool)
    submask = _pieces_of_patterns(codes)
    in_piece = np.unpackbits(submask.astype("<u2").view(np.uint8), axis=1, bitorder="little").reshape(n, 8, 16)
    sub = np.einsum("nkp,k->np", in_piece, np.arange(1, 9, dtype=np.uint8))  # 1 + piece of each set pixel, 0 where unset
    nsub = np.count_nonzero(submask, axis=1).astype(np.uint8)
    tables = _PatternTables(pixels, pixels.sum(axis=1, dtype=np.uint8), sub, nsub, submask)
    _TABLES.append(tables)
    return tables


#: Pixels of a 4 x 4 block that have a left (column - 1) / right (column + 1) neighbour.
_HAS_LEFT = np.uint16(0xEEEE)
_HAS_RIGHT = np.uint16(0x7777)


def _pieces_of_patterns(codes: np.ndarray) -> np.ndarray:
    """(n, 8) uint16: the 4-connected pieces of each 4 x 4 pattern (bit 4 r + c), ordered
    by their lowest pixel; 0 past the last piece (a 4 x 4 block holds at most 8)."""
    submask = np.zeros((codes.size, 8), dtype=np.uint16)
    remaining = codes.copy()
    for k in range(8):
        rows = np.flatnonzero(remaining)
        if rows.size == 0:
            break
        left, pattern = remaining[rows], codes[rows]
        piece = left & (~left + np.uint16(1))  # the lowest set pixel
        while True:
            grown = piece | ((piece << 1) & _HAS_LEFT) | ((piece >> 1) & _HAS_RIGHT) | (piece << 4) | (piece >> 4)
            grown &= pattern
            if np.array_equal(grown, piece):
                break
            piece = grown
        submask[rows, k] = piece
        remaining[rows] = left & ~piece
    return submask


def block_patterns(hu: np.ndarray, fov2d: np.ndarray, threshold_hu: float, chunk: int = 8) -> np.ndarray:
    """The thresholded volume as one 16-bit pattern per ``BLOCK`` x ``BLOCK`` in-plane block
    ((z, y / BLOCK, x / BLOCK) uint16; bit 4 r + c is pixel (r, c) of the block, set where
    inside ``fov2d`` and above ``threshold_hu``).

    One pass over the volume, a few slices at a time (slabs of slices on
    ``REGIONS_THREADS`` threads): the threshold of four neighbouring pixels is read as one
    32-bit word of 0/1 bytes, and one multiply gathers the four bytes
    into a 4-bit row (the shifted bytes land in distinct bits, so nothing carries). The
    patterns hold the full-resolution threshold exactly, in 1/16 of the bytes of a mask.

    References
    ----------
    .. [1] Common practice, no source (bit packing by multiplication).
    """
    nz, ny, nx = hu.shape
    by, bx = ny // BLOCK, nx // BLOCK
    out = np.empty((nz, by, bx), dtype=np.uint16)
    inside = _row_patterns(np.ascontiguousarray(fov2d, dtype=bool)[None], by, bx)[0]  # the field of view, per block

    def slab(a: int, b: int) -> None:
        buf = np.empty((min(chunk, b - a), ny, nx), dtype=bool)
        for z0 in range(a, b, chunk):
            part = buf[: min(chunk, b - z0)]
            np.greater(hu[z0 : z0 + part.shape[0]], threshold_hu, out=part)
            acc = _row_patterns(part, by, bx)
            acc &= inside  # pixel by pixel: threshold AND field of view
            out[z0 : z0 + part.shape[0]] = acc

    over_z(slab, nz, multiple=chunk)
    return out


def _row_patterns(part: np.ndarray, by: int, bx: int) -> np.ndarray:
    """Block patterns (uint32 holding 16 bits) of the C-contiguous bool slices ``part``."""
    gather = np.uint32(0x01020408)  # byte k (bit 8 k) -> bit 24 + k
    words = part.view(np.uint32).reshape(part.shape[0], by, BLOCK, bx)  # four pixels along x per word
    acc = np.zeros((part.shape[0], by, bx), dtype=np.uint32)
    for r in range(BLOCK):
        row = words[:, :, r] * gather
        row >>= np.uint32(24 - 4 * r)
        row &= np.uint32(0xF << (4 * r))
        acc |= row
    return acc


def block_counts(hu: np.ndarray, fov2d: np.ndarray, threshold_hu: float, chunk: int = 8) -> np.ndarray:
    """Per ``BLOCK`` x ``BLOCK`` in-plane block of every slice, how many of its pixels lie
    inside ``fov2d`` and above ``threshold_hu`` ((z, y / BLOCK, x / BLOCK) uint8, 0..16):
    the pixel counts of :func:`block_patterns`."""
    return pattern_tables().pop[block_patterns(hu, fov2d, threshold_hu, chunk)]


def _full_box(box: tuple[slice, ...]) -> tuple[slice, ...]:
    """A coarse-grid box as a full-resolution box."""
    zs, ys, xs = box
    return zs, slice(ys.start * BLOCK, ys.stop * BLOCK), slice(xs.start * BLOCK, xs.stop * BLOCK)


def _upsample_into(target: np.ndarray, coarse: np.ndarray) -> None:
    """``target`` (z, BLOCK y, BLOCK x) = ``coarse`` (z, y, x) repeated BLOCK times in y and x."""
    nz, cy, cx = coarse.shape
    if BLOCK == 4 and target.strides[-1] == 1 and target.ctypes.data % 4 == 0 and target.strides[-2] % 4 == 0:
        words = coarse.view(np.uint8) * np.uint32(0x01010101)  # one pixel per byte, four per word
        target.view(np.uint32).reshape(nz, cy, BLOCK, cx)[...] = words[:, :, None, :]
        return
    wide = np.repeat(coarse, BLOCK, axis=2)
    target.reshape(nz, cy, BLOCK, cx * BLOCK)[...] = wide[:, :, None, :]


def _block_pixels(idx: tuple[np.ndarray, ...], shape: tuple[int, ...]) -> np.ndarray:
    """Flat indices into the volume of the pixels of the blocks at coarse indices ``idx``
    ((n, 16), pixel 4 r + c of a block in column 4 r + c)."""
    _, ny, nx = shape
    zi, yi, xi = (a.astype(np.int64) for a in idx)
    within = (np.arange(BLOCK)[:, None] * nx + np.arange(BLOCK)[None, :]).ravel()
    return (zi * (ny * nx) + yi * (BLOCK * nx) + xi * BLOCK)[:, None] + within[None, :]


#: Per 4-bit block row (bit c: pixel c), its four pixels as the bytes of one little-endian word.
_ROW_WORDS = np.array([sum(((n >> c) & 1) << (8 * c) for c in range(4)) for n in range(16)], dtype="<u4")


def _word_rows(view: np.ndarray) -> bool:
    """Whether the bool box ``view`` can be seen as 32-bit words of four pixels along x."""
    return (BLOCK == 4 and view.strides[-1] == 1 and view.ctypes.data % 4 == 0
            and all(st % 4 == 0 for st in view.strides[:-1]) and np.little_endian)


def _paint(target: np.ndarray, pat: np.ndarray, cbox: tuple[slice, ...], empty: bool = False) -> None:
    """Set in ``target`` the pixels of the block patterns ``pat`` (coarse box ``cbox``).
    ``empty``: the box holds no set pixel yet, so its pixels are written rather than
    OR-ed in.

    Each 4-pixel row of a block is looked up as one 32-bit word of 0/1 bytes (every
    block, whole or partial, in one pass per block row, slabs of slices on
    ``REGIONS_THREADS`` threads); where the box cannot be seen as
    such words, whole blocks are upsampled and the others set pixel by pixel.
    """
    full = _full_box(cbox)
    view = target[full]
    if _word_rows(view):
        nz, cy, cx = pat.shape
        words = view.view(np.uint32).reshape(nz, cy, BLOCK, cx)
        over_z(lambda a, b: _paint_words(words, pat, a, b, empty), nz)
        return
    if empty:
        _upsample_into(view, pat == FULL)
    else:
        whole = np.empty(view.shape, dtype=bool)
        _upsample_into(whole, pat == FULL)
        view |= whole
    zi, yi, xi = np.nonzero((pat != 0) & (pat != FULL))
    idx = (zi + cbox[0].start, yi + cbox[1].start, xi + cbox[2].start)
    pixels = pattern_tables().pixels[pat[zi, yi, xi]]
    flat = _block_pixels(idx, target.shape)
    np.put(target.reshape(-1), flat[pixels], True)


def _paint_words(words: np.ndarray, pat: np.ndarray, a: int, b: int, empty: bool, chunk: int = 16) -> None:
    """Slices ``a .. b`` of :func:`_paint`'s word path: ``words`` (z, y, BLOCK, x) uint32,
    one per 4-pixel block row, set from the block patterns ``pat``, ``chunk`` slices at a
    time.

    A 4-bit block row ``n`` becomes its word of 0/1 bytes by one multiply: ``n * 0x00204081``
    puts copies of ``n`` at bits 0, 7, 14 and 21 (the copies do not overlap, so nothing
    carries) and the mask ``0x01010101`` keeps bit c of the copy at 7 c, which lands on bit
    8 c: byte c is pixel c (the words of ``_ROW_WORDS``, without a table look-up).
    """
    rows = np.empty((min(chunk, b - a),) + pat.shape[1:], dtype=np.uint32)
    for z0 in range(a, b, chunk):
        z1 = min(b, z0 + chunk)
        part = rows[: z1 - z0]
        for r in range(BLOCK):
            np.right_shift(pat[z0:z1], np.uint16(4 * r), out=part, casting="unsafe")
            part &= np.uint32(0xF)
            part *= np.uint32(0x00204081)
            part &= np.uint32(0x01010101)
            if empty:
                words[z0:z1, :, r] = part
            else:
                words[z0:z1, :, r] |= part


# Faces between a block and its neighbour: (axis, step, bits of the block's face moved to
# the neighbour's facing bits, bits of the neighbour's face); pixel pairs follow below.
_FACE_PAIRS = {
    (2, 1): [(4 * r + 3, 4 * r) for r in range(BLOCK)],
    (2, -1): [(4 * r, 4 * r + 3) for r in range(BLOCK)],
    (1, 1): [(12 + c, c) for c in range(BLOCK)],
    (1, -1): [(c, 12 + c) for c in range(BLOCK)],
    (0, 1): [(k, k) for k in range(16)],
    (0, -1): [(k, k) for k in range(16)],
}


def _face_mask(pairs: list[tuple[int, int]], which: int) -> int:
    return sum(1 << p[which] for p in pairs)


def _neighbours(idx: np.ndarray, coords: tuple[np.ndarray, ...], shape: tuple[int, ...], axis: int,
                step: int) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices of the neighbours of the flat block indices ``idx`` (grid coordinates
    ``coords``) one step along ``axis``, and which of ``idx`` have one (inside the grid)."""
    strides = (shape[1] * shape[2], shape[2], 1)
    coord = coords[axis]
    ok = coord >= 1 if step < 0 else coord < shape[axis] - 1
    return idx[ok] + step * strides[axis], ok


#: Per face (axis, step): a block's facing pixels moved onto its neighbour's facing pixels
#: (right shift) and the mask of the neighbour's facing pixels.
_FACE_SHIFT = {(2, 1): (3, 0x1111), (2, -1): (-3, 0x1111), (1, 1): (12, 0x000F), (1, -1): (-12, 0x000F),
               (0, 1): (0, 0xFFFF), (0, -1): (0, 0xFFFF)}


def _touch(pi: np.ndarray, pj: np.ndarray, face: tuple[int, int]) -> np.ndarray:
    """Whether some facing pixel pair (see ``_FACE_PAIRS``) is set in both patterns."""
    shift, mask = face
    if shift >= 0:
        return ((pi >> np.uint16(shift)) & pj & np.uint16(mask)) != 0
    return (pi & (pj >> np.uint16(-shift)) & np.uint16(mask)) != 0


def _label_in_box(mask: np.ndarray, structure: np.ndarray | None) -> tuple[np.ndarray, int]:
    """``label_compact(mask, structure)``, labelling only the bounding box of ``mask``
    (the same labels: the scan order inside the box is the volume's)."""
    box = bounding_box(mask)
    if box is None:
        return np.zeros(mask.shape, dtype=np.uint16), 0
    part, n = label_compact(mask[box], structure=structure)
    lab = np.zeros(mask.shape, dtype=part.dtype)
    lab[box] = part
    return lab, n


@dataclass
class _PatternComponents:
    """The connected components of the set pixels of a block-pattern grid, exactly as a
    full-resolution labelling gives them, held as: ``lab``, labels of the "plain" blocks
    (one piece, every set neighbour touching it), 1..``n_lab``; ``suspects``, sorted flat
    indices of the other non-empty blocks, whose pieces (``pieces`` per block, first node
    ``first_node``) are nodes ``n_lab + 1 ..``; ``final``, the component of every node
    (label 0 unused)."""

    lab: np.ndarray
    n_lab: int
    suspects: np.ndarray
    first_node: np.ndarray
    pieces: np.ndarray
    final: np.ndarray
    n_final: int

    def piece_nodes(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per piece of a suspect block: its node, the block's flat index and its piece number (1..)."""
        blocks = np.repeat(self.suspects, self.pieces)
        k = np.arange(blocks.size) - np.repeat(self.first_node - self.n_lab - 1, self.pieces) + 1
        return self.n_lab + 1 + np.arange(blocks.size), blocks, k


def pattern_components(pat: np.ndarray, in_plane: bool = False) -> _PatternComponents:
    """Connected components of the set pixels of the block patterns ``pat`` (see
    :func:`block_patterns`): 6-connected in 3-D, or 4-connected in each slice when
    ``in_plane``; the same components as ``ndimage.label`` of the unpacked mask.

    Exact on the coarse grid: a block is "plain" when its set pixels form one 4-connected
    piece and it touches each non-empty face neighbour through a pair of set facing
    pixels; plain blocks are labelled on the block grid, where a shared face then always
    means touching pixels. The other ("suspect") blocks, partly set and rare (at outlines
    where structures nearly meet, noise specks), are split into their pieces by a look-up
    table, and every facing pixel pair of a suspect block and a neighbour joins the two
    nodes in a small graph whose connected components merge the labels. The suspects are
    found on slabs of slices on ``REGIONS_THREADS`` threads (reading across the slab's
    faces); the labelling is one, of the whole grid.

    References
    ----------
    .. [1] Common practice, no source (connected-component labelling of a block grid with
       look-up tables for the blocks; union of components through a graph).
    """
    t = pattern_tables()
    shape = pat.shape
    flat = pat.reshape(-1)
    nonempty = flat != 0
    axes = [(2, 1), (2, -1), (1, 1), (1, -1)] + ([] if in_plane else [(0, 1), (0, -1)])
    marked: dict[int, list[np.ndarray]] = {}

    def slab(a: int, b: int) -> None:
        marked[a] = _suspects_of_slab(pat, a, b, axes)

    over_z(slab, shape[0])
    suspects = np.unique(np.concatenate([m for a in sorted(marked) for m in marked[a]]))
    plain = nonempty.reshape(shape).copy()
    plain.reshape(-1)[suspects] = False
    lab, n_lab = _label_in_box(plain, _INPLANE if in_plane else None)
    pieces = t.nsub[flat[suspects]].astype(np.int64)
    first_node = n_lab + 1 + np.cumsum(pieces) - pieces
    n_nodes = n_lab + 1 + int(pieces.sum())
    comps = _PatternComponents(lab, int(n_lab), suspects, first_node, pieces, np.zeros(0, dtype=np.int64), 0)
    us, vs = [], []
    for axis, step in axes:
        j, ok = _neighbours(suspects, np.unravel_index(suspects, shape), shape, axis, step)
        s = suspects[ok]
        for a, b in _FACE_PAIRS[(axis, step)]:
            both = ((flat[s] >> np.uint16(a)) & (flat[j] >> np.uint16(b)) & np.uint16(1)).astype(bool)
            us.append(_nodes_of(comps, flat, s[both], a))
            vs.append(_nodes_of(comps, flat, j[both], b))
    u = np.concatenate(us) if us else np.zeros(0, dtype=np.int64)
    v = np.concatenate(vs) if vs else np.zeros(0, dtype=np.int64)
    comps.n_final, comps.final = graph_components(n_nodes, u, v)
    return comps


def _suspects_of_slab(pat: np.ndarray, a: int, b: int, axes: list[tuple[int, int]]) -> list[np.ndarray]:
    """Flat indices of the suspect blocks (see :func:`pattern_components`) found from the
    partial blocks of slices ``a .. b`` of ``pat``: those of more than one piece, and
    each partial block and face neighbour (in any slice) with no facing pixel pair set
    in both though the neighbour is non-empty. Repeats are possible."""
    t = pattern_tables()
    shape = pat.shape
    flat = pat.reshape(-1)
    plane = shape[1] * shape[2]
    part = flat[a * plane : b * plane]
    partial = np.flatnonzero((part != 0) & (part != FULL)) + a * plane
    pp = flat[partial]
    marked = [partial[t.nsub[pp] > 1]]
    coords = np.unravel_index(partial, shape)
    for axis, step in axes:
        j, ok = _neighbours(partial, coords, shape, axis, step)
        pj = flat[j]
        apart = (pj != 0) & ~_touch(pp[ok], pj, _FACE_SHIFT[(axis, step)])
        marked += [partial[ok][apart], j[apart]]
    return marked


def graph_components(n_nodes: int, u: np.ndarray, v: np.ndarray) -> tuple[int, np.ndarray]:
    """Connected components of the undirected graph on ``n_nodes`` nodes with edges
    ``u[i] -- v[i]``: their number and each node's component, numbered in the order of
    each component's smallest node (the numbering of
    ``scipy.sparse.csgraph.connected_components``, without importing it: that import alone
    costs a few tenths of a second, more than the graphs here take).

    Every node points to a smaller (or the same) node of its component; each round hooks
    both ends of every edge to the smaller of their targets and then follows the pointers
    to their ends, until nothing changes. At that point both ends of every edge point to
    one root, which is therefore the component's smallest node.

    References
    ----------
    .. [1] Shiloach, Y. and Vishkin, U. (1982). An O(log n) parallel connectivity
       algorithm. Journal of Algorithms 3(1), 57-67 (hooking and pointer jumping; the
       citation from memory).
    """
    lab = np.arange(n_nodes, dtype=np.int64)
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    while u.size:
        low = np.minimum(lab[u], lab[v])
        new = lab.copy()
        np.minimum.at(new, u, low)
        np.minimum.at(new, v, low)
        while True:  # pointer jumping to the roots
            jumped = new[new]
            if np.array_equal(jumped, new):
                break
            new = jumped
        if np.array_equal(new, lab):
            break
        lab = new
    roots, final = np.unique(lab, return_inverse=True)
    return int(roots.size), final.astype(np.int64)


def _nodes_of(comps: _PatternComponents, flat: np.ndarray, blocks: np.ndarray, pix: np.ndarray | int) -> np.ndarray:
    """The node of pixel ``pix`` (set) of each block ``blocks`` (flat indices)."""
    sus = comps.suspects
    if sus.size == 0:
        return comps.lab.reshape(-1)[blocks].astype(np.int64)
    where = np.minimum(np.searchsorted(sus, blocks), sus.size - 1)
    piece = pattern_tables().sub[flat[blocks], pix].astype(np.int64)
    return np.where(sus[where] == blocks, comps.first_node[where] + piece - 1,
                    comps.lab.reshape(-1)[blocks].astype(np.int64))


def _component_sizes(comps: _PatternComponents, pat: np.ndarray) -> np.ndarray:
    """Pixel count of every final component of ``comps`` (index = final id)."""
    t = pattern_tables()
    flat = pat.reshape(-1)
    per_label = _label_pixel_counts(comps.lab, pat, comps.n_lab)
    sizes = np.bincount(comps.final[: comps.n_lab + 1], weights=per_label, minlength=comps.n_final)
    nodes, blocks, k = comps.piece_nodes()
    if nodes.size:
        pops = t.pop[t.submask[flat[blocks], k - 1]].astype(np.int64)
        sizes += np.bincount(comps.final[nodes], weights=pops, minlength=comps.n_final)
    return np.rint(sizes).astype(np.int64)


def _label_pixel_counts(lab: np.ndarray, pat: np.ndarray, n_lab: int) -> np.ndarray:
    """Set pixels of the block patterns ``pat`` under each block label ``lab`` 1..``n_lab``
    (index 0 holds 0): 16 per block less the unset pixels of partial blocks, counted on
    slabs of slices on ``REGIONS_THREADS`` threads and summed (exact integers)."""
    pop = pattern_tables().pop
    parts: dict[int, np.ndarray] = {}

    def slab(a: int, b: int) -> None:
        la, fa = lab[a:b].reshape(-1), pat[a:b].reshape(-1)
        counts = np.bincount(la, minlength=n_lab + 1).astype(np.int64) * 16
        partial = np.flatnonzero((fa != FULL) & (la != 0))
        counts -= np.bincount(la[partial], weights=16 - pop[fa[partial]].astype(np.int64),
                              minlength=n_lab + 1).astype(np.int64)
        parts[a] = counts

    over_z(slab, lab.shape[0])
    per_label = np.sum([parts[a] for a in sorted(parts)], axis=0, dtype=np.int64)
    per_label[0] = 0
    return per_label


def _patterns_of(comps: _PatternComponents, pat: np.ndarray, finals: np.ndarray) -> list[tuple[np.ndarray, tuple[slice, ...]]]:
    """For each final component in ``finals``: its block patterns inside its coarse box,
    and that box."""
    small = np.uint8 if finals.size < 256 else (np.uint16 if finals.size < 65536 else np.int32)
    code = np.zeros(comps.n_final, dtype=small)  # the smallest labels that hold them: less to write and scan
    code[finals] = np.arange(1, finals.size + 1)
    label_code = code[comps.final[: comps.n_lab + 1]]
    label_code[0] = 0
    g = np.empty(comps.lab.shape, dtype=small)
    over_z(lambda a, b: np.take(label_code, comps.lab[a:b], out=g[a:b]), g.shape[0])
    nodes, blocks, k = comps.piece_nodes()
    piece_code = code[comps.final[nodes]] if nodes.size else np.zeros(0, dtype=small)
    keep = piece_code > 0
    blocks, k, piece_code = blocks[keep], k[keep], piece_code[keep]
    g.reshape(-1)[blocks] = piece_code  # marks the pieces' blocks for the boxes; their bits come below
    objects = find_objects_over_z(g, finals.size)
    flat = pat.reshape(-1)
    sub = pattern_tables().submask
    out = []
    for c, box in enumerate(objects, start=1):
        cp = np.where(g[box] == c, pat[box], np.uint16(0))
        mine = piece_code == c
        if mine.any():
            zi, yi, xi = np.unravel_index(blocks[mine], pat.shape)
            local = (zi - box[0].start, yi - box[1].start, xi - box[2].start)
            cp[local] = 0
            np.bitwise_or.at(cp, local, sub[flat[blocks[mine]], k[mine] - 1])
        out.append((cp, box))
    return out


def find_objects_over_z(lab: np.ndarray, max_label: int) -> list[tuple[slice, ...] | None]:
    """``ndimage.find_objects(lab, max_label)`` of the (z, y, x) labels ``lab``, found on
    slabs of slices on ``REGIONS_THREADS`` threads and joined: the box of a label is the
    union of its boxes in the slabs (the same boxes)."""
    parts: dict[int, list] = {}

    def slab(a: int, b: int) -> None:
        parts[a] = ndimage.find_objects(lab[a:b], max_label=max_label)

    over_z(slab, lab.shape[0])
    out: list[tuple[slice, ...] | None] = [None] * max_label
    for a in sorted(parts):
        for i, box in enumerate(parts[a]):
            if box is None:
                continue
            box = (slice(box[0].start + a, box[0].stop + a),) + tuple(box[1:])
            out[i] = box if out[i] is None else _union_box(out[i], box)
    return out


def _exact_box(cp: np.ndarray, cbox: tuple[slice, ...]) -> tuple[slice, ...]:
    """Full-resolution bounding box of the set pixels of the block patterns ``cp``
    (coarse box ``cbox``)."""
    zs = np.flatnonzero(cp.any(axis=(1, 2)))
    by = np.bitwise_or.reduce(cp, axis=(0, 2))
    bx = np.bitwise_or.reduce(cp, axis=(0, 1))
    rows = ((by[:, None] >> np.uint16(4) * np.arange(BLOCK, dtype=np.uint16)) & np.uint16(0xF)).ravel() != 0
    cols = ((bx[:, None] >> np.arange(BLOCK, dtype=np.uint16)) & np.uint16(0x1111)).ravel() != 0
    ys, xs = np.flatnonzero(rows), np.flatnonzero(cols)
    y0, x0 = cbox[1].start * BLOCK, cbox[2].start * BLOCK
    return (slice(cbox[0].start + int(zs[0]), cbox[0].start + int(zs[-1]) + 1),
            slice(y0 + int(ys[0]), y0 + int(ys[-1]) + 1), slice(x0 + int(xs[0]), x0 + int(xs[-1]) + 1))


def fill_holes_in_patterns(cp: np.ndarray) -> np.ndarray:
    """Block patterns ``cp`` (z, y, x) with the holes of every slice filled: the unset
    pixels not 4-connected in-plane to the edge of the grid through unset pixels, exactly
    as ``ndimage.binary_fill_holes`` of each unpacked slice.

    The unset pixels are labelled in-plane by :func:`pattern_components` on a grid widened
    by one unset block on each side; the components holding that ring are outside. Each
    slice is filled alone, so slabs of slices run on ``REGIONS_THREADS`` threads.

    References
    ----------
    .. [1] Common practice, no source (hole filling as the complement of the background
       component touching the border).
    """
    out = np.empty_like(cp)
    over_z(lambda a, b: _fill_holes_slab(cp[a:b], out[a:b]), cp.shape[0])
    return out


def _fill_holes_slab(cp: np.ndarray, out: np.ndarray) -> None:
    """:func:`fill_holes_in_patterns` of the slices ``cp`` into ``out`` (each slice
    alone: the filling is in-plane)."""
    nz = cp.shape[0]
    bg = np.pad(~cp, ((0, 0), (1, 1), (1, 1)), constant_values=FULL)
    comps = pattern_components(bg, in_plane=True)
    flat = bg.reshape(-1)
    ring = np.arange(nz, dtype=np.int64) * (bg.shape[1] * bg.shape[2])  # block (z, 0, 0) of every slice
    outside = np.zeros(comps.n_final, dtype=bool)
    outside[comps.final[_nodes_of(comps, flat, ring, np.zeros(nz, dtype=np.int64))]] = True
    label_out = outside[comps.final[: comps.n_lab + 1]]
    label_out[0] = False
    filled = np.where(label_out[comps.lab], ~bg, np.uint16(FULL))
    nodes, blocks, k = comps.piece_nodes()
    out_piece = outside[comps.final[nodes]] if nodes.size else np.zeros(0, dtype=bool)
    ff = filled.reshape(-1)
    ff[blocks] = FULL
    sub = pattern_tables().submask[flat[blocks[out_piece]], k[out_piece] - 1]
    np.bitwise_and.at(ff, blocks[out_piece], ~sub)
    out[...] = filled[:, 1:-1, 1:-1]


def _coarse_body_and_table(hu: np.ndarray, fov2d: np.ndarray, body_threshold_hu: float) -> _BodyTable:
    """Body and table from the block patterns of the threshold, with the components and
    holes of the full-resolution method (see the module docstring)."""
    nz = hu.shape[0]
    pat = block_patterns(hu, fov2d, body_threshold_hu)
    crop = _nonempty_box(pat)
    if crop is None:
        return _BodyTable(np.zeros(hu.shape, dtype=bool), np.zeros(hu.shape, dtype=bool), None, None, 0, 0, False)
    pat = np.ascontiguousarray(pat[crop])  # every set pixel; components, sizes and order are those of the whole grid
    comps = pattern_components(pat)
    sizes = _component_sizes(comps, pat)
    if sizes.size == 0 or sizes.max() == 0:
        return _BodyTable(np.zeros(hu.shape, dtype=bool), np.zeros(hu.shape, dtype=bool), None, None, 0, 0, False)
    if np.count_nonzero(sizes == sizes.max()) > 1:  # the order of equal sizes: as ndimage numbers them
        return _full_body_and_table(hu, fov2d, body_threshold_hu)
    fb = int(np.argmax(sizes))
    others = np.flatnonzero(sizes >= 20)
    others = others[others != fb]
    offset = tuple(c.start for c in crop)
    found = [(cp, _shifted(b, offset)) for cp, b in _patterns_of(comps, pat, np.concatenate([[fb], others]))]
    del comps
    body = np.zeros(hu.shape, dtype=bool)
    table = np.zeros(hu.shape, dtype=bool)
    body_cp, body_cbox = found[0]
    body_bbox = _exact_box(body_cp, body_cbox)
    filled = fill_holes_in_patterns(body_cp)
    _paint(body, filled, body_cbox, empty=True)
    body_voxels, centroid = _count_and_centroid(filled, body_cbox)
    grown_box = _full_box(body_cbox)
    table_voxels = 0
    pop = pattern_tables().pop
    for cp, cbox in found[1:]:
        areas = pop[cp].sum(axis=(1, 2), dtype=np.int64)
        if _is_table_from(_exact_box(cp, cbox), areas, body_bbox, nz):
            _paint(table, cp, cbox)
            table_voxels += int(areas.sum())
            grown_box = _union_box(grown_box, _full_box(cbox))
    return _BodyTable(body, table, centroid, grown_box, body_voxels, table_voxels, table_voxels > 0)


def _nonempty_box(pat: np.ndarray) -> tuple[slice, ...] | None:
    """The smallest box of the block grid ``pat`` holding every non-empty block (None when
    all are empty), from one OR over the slices and one over each slice."""
    nz = pat.shape[0]
    zs = np.flatnonzero(np.bitwise_or.reduce(pat.reshape(nz, -1), axis=1))
    if zs.size == 0:
        return None
    footprint = np.bitwise_or.reduce(pat, axis=0) != 0
    ys, xs = np.flatnonzero(footprint.any(axis=1)), np.flatnonzero(footprint.any(axis=0))
    return (slice(int(zs[0]), int(zs[-1]) + 1), slice(int(ys[0]), int(ys[-1]) + 1), slice(int(xs[0]), int(xs[-1]) + 1))


def _count_and_centroid(pat: np.ndarray, cbox: tuple[slice, ...]) -> tuple[int, tuple[float, float, float]]:
    """Voxel count and centre of mass (z, y, x) of the set pixels of the block patterns
    ``pat`` (coarse box ``cbox``), from exact integer axis profiles as :func:`centroid_of`
    takes them: the pixels of each block row (bits 4 r .. 4 r + 3) and of each block
    column (bits c, c + 4, c + 8, c + 12) counted by population count, per slice
    (slabs of slices on ``REGIONS_THREADS`` threads) and then over the slices (integer
    sums: the same profiles)."""
    b = BLOCK
    z0, y0, x0 = cbox[0].start, cbox[1].start * b, cbox[2].start * b
    nz = pat.shape[0]
    pz = np.empty(nz, dtype=np.int64)
    py = np.empty((nz, pat.shape[1] * b), dtype=np.int32)  # per slice (at most 4 b per pixel row), summed below
    px = np.empty((nz, pat.shape[2] * b), dtype=np.int32)
    over_z(lambda a, e: _slice_profiles(pat[a:e], pz[a:e], py[a:e], px[a:e]), nz)
    py, px = py.sum(axis=0, dtype=np.int64), px.sum(axis=0, dtype=np.int64)
    total = int(pz.sum())
    if total == 0:
        return 0, None  # type: ignore[return-value]
    centre = tuple(float((p * (np.arange(p.size) + o)).sum() / total) for p, o in ((pz, z0), (py, y0), (px, x0)))
    return total, centre  # type: ignore[return-value]


def _slice_profiles(pat: np.ndarray, pz: np.ndarray, py: np.ndarray, px: np.ndarray) -> None:
    """Pixel counts of the block patterns ``pat`` of each slice into ``pz``, per pixel row
    into ``py`` and per pixel column into ``px`` ((z, pixels) each; population counts of
    block rows and columns)."""
    b = BLOCK
    cnt = np.empty(pat.shape, dtype=np.uint8)
    part = np.empty(pat.shape, dtype=np.uint16)
    _popcount16(pat, cnt)
    pz[:] = cnt.reshape(cnt.shape[0], -1).sum(axis=1, dtype=np.int64)
    row_bits = (1 << b) - 1
    col_bits = sum(1 << (b * r) for r in range(b))
    for r in range(b):
        np.bitwise_and(pat, np.uint16(row_bits << (b * r)), out=part)
        np.sum(_popcount16(part, cnt), axis=2, dtype=np.int32, out=py[:, r::b])
        np.bitwise_and(pat, np.uint16(col_bits << r), out=part)
        np.sum(_popcount16(part, cnt), axis=1, dtype=np.int32, out=px[:, r::b])


def _popcount16(a: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Set bits of each uint16 of ``a`` into the uint8 array ``out`` (numpy's population
    count where it has one, else the look-up table)."""
    if hasattr(np, "bitwise_count"):
        return np.bitwise_count(a, out=out)
    return np.take(pattern_tables().pop, a, out=out)


def _is_table_from(comp_slices: tuple[slice, ...], areas: np.ndarray, body_bbox: tuple[slice, ...], nz: int) -> bool:
    """A flat, posterior structure whose cross-section barely changes along z (``areas``:
    its voxel count on each slice of its box)."""
    zs, ys, xs = comp_slices
    if (zs.stop - zs.start) < max(1, int(0.8 * nz)):
        return False
    height = ys.stop - ys.start
    width = xs.stop - xs.start
    body_y = body_bbox[1]
    centre_y = 0.5 * (ys.start + ys.stop)
    posterior = centre_y > body_y.start + 0.75 * (body_y.stop - body_y.start)
    areas = np.asarray(areas)
    areas = areas[areas > 0]
    steady = areas.size > 0 and areas.std() <= 0.2 * areas.mean()
    return bool(posterior and width > height and steady)


# --------------------------------------------------------------------------- air
def _shift_words(w: np.ndarray, bits: int) -> np.ndarray:
    """Bit rows moved ``bits`` pixels, words along the FIRST axis (little-endian: pixel p
    is bit p % 64 of word p // 64): pixel p of the result is pixel p + bits of ``w``
    (p - |bits| when negative); zeros enter. Word-major, so every operation is on whole
    contiguous planes."""
    q, r = divmod(abs(bits), 64)
    out = np.zeros_like(w)
    n = w.shape[0]
    if q >= n:
        return out
    if bits > 0:
        if r:
            np.right_shift(w[q:], np.uint64(r), out=out[: n - q])
            if n - q > 1:
                out[: n - q - 1] |= w[q + 1 :] << np.uint64(64 - r)
        else:
            out[: n - q] = w[q:]
    else:
        if r:
            np.left_shift(w[: n - q], np.uint64(r), out=out[q:])
            if n - q > 1:
                out[q + 1 :] |= w[: n - q - 1] >> np.uint64(64 - r)
        else:
            out[q:] = w[: n - q]
    return out


def _or_bits(w: np.ndarray, half: int) -> np.ndarray:
    """OR over pixels p - half .. p + half along the packed last axis (doubling spans).

    Running ORs look back (pixel p gathers p - span + 1 .. p) into room of ``half``
    extra pixels past the row's end, then the result moves back by ``half``. The words
    are worked on word-major (first axis) and handed back in the layout of ``w``.
    """
    length = 2 * half + 1
    room = -(-half // 64)
    acc = np.zeros((w.shape[-1] + room,) + w.shape[:-1], dtype=w.dtype)
    acc[: w.shape[-1]] = np.moveaxis(w, -1, 0)
    span = 1
    while span < length:
        step = min(span, length - span)
        acc |= _shift_words(acc, -step)  # acc[p] = OR w[p - span - step + 1 .. p]
        span += step
    return np.ascontiguousarray(np.moveaxis(_shift_words(acc, half)[: w.shape[-1]], 0, -1))


def _packed(mask: np.ndarray) -> np.ndarray:
    """``mask`` (.., x) packed along x into little-endian uint64 words (pixel p = bit p)."""
    nx = mask.shape[-1]
    nbytes = -(-nx // 64) * 8
    packed = np.zeros(mask.shape[:-1] + (nbytes,), dtype=np.uint8)
    packed[..., : -(-nx // 8)] = np.packbits(mask, axis=-1, bitorder="little")
    return packed.view("<u8")


def _unpacked(words: np.ndarray, nx: int) -> np.ndarray:
    """Inverse of :func:`_packed`: a bool array with ``nx`` pixels along the last axis."""
    return np.unpackbits(words.view(np.uint8), axis=-1, count=nx, bitorder="little").view(bool)


def _fill_slices(target: np.ndarray, a: int, b: int, plane: np.ndarray) -> None:
    """Slices ``a .. b`` of ``target`` set to ``plane``."""
    target[a:b] = plane


def air_outside(found: _BodyTable, open_2d: np.ndarray, margin_px: int, shape: tuple[int, ...],
                chunk: int = 16) -> np.ndarray:
    """The field of view (less padding) on every slice, outside body and table dilated by
    a (2 ``margin_px`` + 1)-pixel square in-plane.

    The same mask as ``open_2d & ~maximum_filter(body | table, size=(1, 2m+1, 2m+1))``;
    the dilation runs on bit-packed rows (64 pixels per word): shifted ORs along x, row
    ORs along y, inside the box of the body and table widened by the margin. The mask is
    written once, ``chunk`` slices at a time (slabs of slices on ``REGIONS_THREADS``
    threads; every step is slice-local): ``open_2d`` copied outside that box, and inside
    it ``open_2d`` AND NOT the dilation of those slices (no full-size packed or unpacked
    intermediate).

    References
    ----------
    .. [1] Common practice, no source (binary dilation by a square as separable running
       ORs; bit-parallel binary morphology).
    """
    nz, ny, nx = shape
    air = np.empty(shape, dtype=bool)
    if found.grown_box is None:
        over_z(lambda a, b: _fill_slices(air, a, b, open_2d), nz)
        return air
    zs, ys, _ = _widened_in_plane(found.grown_box, margin_px, shape)
    inside = open_2d[ys]

    def slab(a: int, b: int) -> None:
        for z0 in range(a, b, chunk):
            z1 = min(b, z0 + chunk)
            lo, hi = max(z0, zs.start), min(z1, zs.stop)
            if lo >= hi:  # no body or table on these slices
                air[z0:z1] = open_2d
                continue
            air[z0:lo] = open_2d
            air[hi:z1] = open_2d
            air[lo:hi, : ys.start] = open_2d[: ys.start]
            air[lo:hi, ys.stop :] = open_2d[ys.stop :]
            occupied = found.body[lo:hi, ys]
            if found.table_found:
                occupied = occupied | found.table[lo:hi, ys]  # one packing of body OR table
            occupied = _packed(occupied)
            grown = _or_window(_or_bits(occupied, margin_px), margin_px, axis=1)
            np.greater(inside, _unpacked(grown, nx), out=air[lo:hi, ys])  # open AND NOT grown

    over_z(slab, nz, multiple=chunk)
    return air
    zs, ys, _ = _widened_in_plane(found.grown_box, margin_px, shape)
    air[: zs.start] = open_2d
    air[zs.stop :] = open_2d
    air[zs, : ys.start] = open_2d[: ys.start]
    air[zs, ys.stop :] = open_2d[ys.stop :]
    occupied = _packed(found.body[zs, ys])
    if found.table_found:
        occupied |= _packed(found.table[zs, ys])
    grown = _or_window(_or_bits(occupied, margin_px), margin_px, axis=1)
    del occupied
    inside = open_2d[ys]
    for k0 in range(0, grown.shape[0], chunk):
        part = grown[k0 : k0 + chunk]
        z0 = zs.start + k0
        np.greater(inside, _unpacked(part, nx), out=air[z0 : z0 + part.shape[0], ys])  # open AND NOT grown
    return air
