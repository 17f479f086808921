"""Find a water cylinder phantom: its centre and radius per slice, and which slices are
uniform (water only) and which carry inserts.

Shared, read-only, by the noise, uniformity and edge analyses.

Method (common practice, no source): on every slice the body mask from
:func:`reconaudit.checker.regions.find_regions` is taken as the phantom candidate. A slice
shows the phantom when that mask is one near-circular disc (its area at least
``min_fill`` of the circle through its farthest boundary point) of at least
``min_radius_mm``, whose median CT number inside ``inner_fraction`` of the radius lies
within ``water_window_hu`` of 0 HU (water is 0 HU by the definition of the Hounsfield
scale). A phantom slice is uniform when, after Gaussian smoothing of ``smooth_mm``,
no connected group of at least ``min_insert_mm2`` inside ``inner_fraction`` of the radius
departs from the slice median by more than ``insert_contrast_hu`` (or five times the
smoothed noise, whichever is larger); otherwise it has inserts. The search runs on block
means of about ``work_pixel_mm`` (whole blocks of pixels), for speed.
"""
from __future__ import annotations

import weakref
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ..regions import Regions
from ..volume import Volume

#: Settings of :func:`find_phantom` and their defaults (common practice, no source).
PHANTOM_DEFAULTS: dict[str, float] = {
    "min_radius_mm": 20.0,
    "min_fill": 0.85,
    "water_window_hu": 100.0,
    "inner_fraction": 0.85,
    "smooth_mm": 1.5,
    "insert_contrast_hu": 30.0,
    "min_insert_mm2": 4.0,
    "work_pixel_mm": 1.0,
}


@dataclass
class Phantom:
    """What :func:`find_phantom` saw, slice by slice.

    Attributes
    ----------
    found : bool
        At least one slice shows a water cylinder.
    reason : str
        Why nothing was found (empty when ``found``).
    centre_yx_vox : ndarray (z, 2)
        Centre (row, column) per slice; NaN where the slice shows no phantom.
    radius_vox : ndarray (z,)
        Radius in pixels per slice (equal-area circle); NaN where none.
    median_hu : ndarray (z,)
        Median CT number inside ``inner_fraction`` of the radius; NaN where none.
    on_slice : ndarray of bool (z,)
        The slice shows the phantom.
    uniform : ndarray of bool (z,)
        The slice shows the phantom and no insert.
    inserts : ndarray of bool (z,)
        The slice shows the phantom and at least one insert.
    pixel_mm : float
        In-plane pixel size (mean of row and column spacing).
    """

    found: bool
    reason: str
    centre_yx_vox: np.ndarray
    radius_vox: np.ndarray
    median_hu: np.ndarray
    on_slice: np.ndarray
    uniform: np.ndarray
    inserts: np.ndarray
    pixel_mm: float
    notes: list[str] = field(default_factory=list)

    @property
    def radius_mm(self) -> float:
        """Median radius over the phantom slices, in mm (NaN if none)."""
        r = self.radius_vox[self.on_slice]
        return float(np.median(r) * self.pixel_mm) if r.size else float("nan")

    def uniform_runs(self) -> list[tuple[int, int]]:
        """Contiguous runs ``(z0, z1)`` (inclusive) of uniform slices, longest first."""
        return _runs(self.uniform)

    def longest_uniform_run(self) -> tuple[int, int] | None:
        runs = self.uniform_runs()
        return runs[0] if runs else None

    def to_json(self) -> dict:
        run = self.longest_uniform_run()
        return {
            "found": self.found,
            "radius_mm": None if not self.found else round(self.radius_mm, 3),
            "phantom_slices": int(self.on_slice.sum()),
            "uniform_slices": int(self.uniform.sum()),
            "insert_slices": int(self.inserts.sum()),
            "longest_uniform_run_slices": None if run is None else [int(run[0]), int(run[1])],
        }


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    lab, n = ndimage.label(np.asarray(flags, dtype=bool))
    runs = []
    for i in range(1, n + 1):
        idx = np.nonzero(lab == i)[0]
        runs.append((int(idx[0]), int(idx[-1])))
    runs.sort(key=lambda r: (-(r[1] - r[0]), r[0]))
    return runs


def _block_mean(image: np.ndarray, f: int) -> np.ndarray:
    """Mean over f x f blocks (the ragged edge is dropped)."""
    if f == 1:
        return np.asarray(image, dtype=np.float32)
    ny, nx = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    out = np.zeros((ny // f, nx // f), dtype=np.float32)
    for dy in range(f):
        for dx in range(f):
            out += image[dy:ny:f, dx:nx:f]
    return out / np.float32(f * f)


def disc_of(mask2d: np.ndarray) -> tuple[tuple[float, float], float, float]:
    """Centre, equal-area radius and fill ratio of a 2-D mask.

    The fill ratio is the area divided by the area of the circle about the centroid
    through the farthest mask pixel: 1 for a disc, about b/a for an ellipse. The
    farthest pixel of a row from any point is the row's first or last pixel, so only
    those are measured (row and column counts give the area and the centroid).
    """
    mask2d = np.asarray(mask2d, dtype=bool)
    row_counts = np.count_nonzero(mask2d, axis=1)
    n = int(row_counts.sum())
    if n == 0:
        return (float("nan"), float("nan")), 0.0, 0.0
    col_counts = np.count_nonzero(mask2d, axis=0)
    cy = float((row_counts * np.arange(mask2d.shape[0])).sum()) / n
    cx = float((col_counts * np.arange(mask2d.shape[1])).sum()) / n
    rows = np.flatnonzero(row_counts)
    sub = mask2d[rows]
    first = np.argmax(sub, axis=1)
    last = mask2d.shape[1] - 1 - np.argmax(sub[:, ::-1], axis=1)
    dx2 = np.maximum((first - cx) ** 2, (last - cx) ** 2)
    r_eq = float(np.sqrt(n / np.pi))
    r_max = float(np.sqrt(((rows - cy) ** 2 + dx2).max())) + 0.5
    return (cy, cx), r_eq, float(n / (np.pi * r_max**2))


def disc_mask(shape: tuple[int, int], centre: tuple[float, float], radius: float) -> np.ndarray:
    """Boolean (y, x) mask of pixels whose centres lie within ``radius`` of ``centre``."""
    yy, xx = np.ogrid[: shape[0], : shape[1]]
    return (yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 <= radius**2


def _has_insert(
    slice_hu: np.ndarray, inner: np.ndarray, median: float, pixel_mm: float, s: dict[str, float]
) -> bool:
    """True when a connected group inside ``inner`` departs from ``median``.

    Works on the bounding box of ``inner``; the noise scale (MAD) uses every third pixel.
    """
    ys, xs = np.nonzero(inner.any(axis=1))[0], np.nonzero(inner.any(axis=0))[0]
    box = (slice(ys[0], ys[-1] + 1), slice(xs[0], xs[-1] + 1))
    inner = inner[box]
    smooth = ndimage.gaussian_filter(slice_hu[box].astype(np.float32), s["smooth_mm"] / pixel_mm, truncate=2.5)
    dev = smooth - np.float32(median)
    mad = float(np.median(np.abs(dev[inner][::3]))) * 1.4826
    threshold = max(s["insert_contrast_hu"], 5.0 * mad)
    out = (np.abs(dev) > threshold) & inner
    if not out.any():
        return False
    lab, n = ndimage.label(out)
    sizes = np.bincount(lab.ravel())[1:]
    return bool(sizes.max() * pixel_mm**2 >= s["min_insert_mm2"])


def find_phantom(volume: Volume, regions: Regions, settings: dict | None = None) -> Phantom:
    """Locate a water cylinder phantom slice by slice (see the module docstring).

    Parameters
    ----------
    volume : Volume
    regions : Regions
        From :func:`reconaudit.checker.regions.find_regions`; its ``body`` is used.
    settings : dict, optional
        Overrides of :data:`PHANTOM_DEFAULTS`.

    Returns
    -------
    Phantom

    References
    ----------
    Water is 0 HU by the definition of the Hounsfield scale; the shape and insert tests
    are common practice, no source.
    """
    s = {**PHANTOM_DEFAULTS, **(settings or {})}
    key = tuple(sorted(s.items()))
    hit = _LAST.get("entry")
    if hit is not None and hit[0]() is volume.hu and hit[1]() is regions.body and hit[2] == key:
        return hit[3]
    found = _find_phantom(volume, regions, s)
    _LAST["entry"] = (weakref.ref(volume.hu), weakref.ref(regions.body), key, found)
    return found


#: The last answer, keyed by weak references to the arrays it was computed from, so the
#: noise, uniformity and edge analyses of one volume share one search.
_LAST: dict[str, tuple] = {}


def _find_phantom(volume: Volume, regions: Regions, s: dict[str, float]) -> Phantom:
    nz = volume.shape[0]
    pixel_mm = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    centre = np.full((nz, 2), np.nan)
    radius = np.full(nz, np.nan)
    median = np.full(nz, np.nan)
    on = np.zeros(nz, dtype=bool)
    uniform = np.zeros(nz, dtype=bool)
    inserts = np.zeros(nz, dtype=bool)
    f = max(1, int(s["work_pixel_mm"] / pixel_mm))  # block size of the working grid
    for z in range(nz):
        body = regions.body[z] if f == 1 else _block_mean(regions.body[z].astype(np.float32), f) > 0.5
        c, r, fill = disc_of(body)
        if r * f * pixel_mm < s["min_radius_mm"] or fill < s["min_fill"]:
            continue
        img = _block_mean(volume.hu[z], f)
        inner = disc_mask(img.shape, c, s["inner_fraction"] * r) & body
        values = img[inner]
        if values.size == 0 or not np.all(np.isfinite(values)):
            continue
        med = float(np.median(values[::3]))
        if abs(med) > s["water_window_hu"]:
            continue
        centre[z] = ((c[0] + 0.5) * f - 0.5, (c[1] + 0.5) * f - 0.5)
        radius[z], median[z], on[z] = r * f, med, True
        if _has_insert(img, inner, med, pixel_mm * f, s):
            inserts[z] = True
        else:
            uniform[z] = True
    reason = ""
    if not on.any():
        reason = (
            "no water cylinder found: no slice has a near-circular object of radius "
            f">= {s['min_radius_mm']:g} mm with a median within {s['water_window_hu']:g} HU of water"
        )
    return Phantom(
        found=bool(on.any()),
        reason=reason,
        centre_yx_vox=centre,
        radius_vox=radius,
        median_hu=median,
        on_slice=on,
        uniform=uniform,
        inserts=inserts,
        pixel_mm=float(pixel_mm),
    )
