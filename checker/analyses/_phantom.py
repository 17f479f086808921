"""Find a water cylinder phantom: its centre and radius per slice, and which slices are
uniform (water only) and which carry inserts.

Shared, read-only, by the noise, uniformity and edge analyses.

Method (common practice, no source): on every slice the body mask from
:func:`reconaudit.checker.regions.find_regions` is taken as the phantom candidate. A slice
shows the phantom when that mask is one near-circular disc (its area at least
``min_fill`` of the circle through its farthest boundary point) of at least
``min_radius_mm``, whose median CT number inside ``inner_fraction`` of the radius lies
within ``water_window_hu`` of 0 HU (water is 0 HU by the definition of the Hounsfield
scale), and the disc is not ringed by a dense shell (:func:`shell_level_hu` at most
``dense_shell_hu`` on the middle phantom slice: a round head's skull, whose brain lies
in the water window too).
A phantom slice is uniform when, after Gaussian smoothing of ``smooth_mm``,
no connected group of at least ``min_insert_mm2`` inside ``inner_fraction`` of the radius
departs from the slice median by more than ``insert_contrast_hu`` (or five times the
smoothed noise, whichever is larger); otherwise it has inserts.

Every slice is examined, on a strided working grid: every ``f``-th row and column, ``f``
the most whole pixels not coarser than ``work_pixel_mm`` (2 mm; 4 for 0.45 mm pixels).
The disc test runs first on slices about ``screen_step_mm`` (5 mm) apart, then on the
slices between two of them when either comes near passing (radius at least 0.8 of the
minimum, fill within 0.05 of it): a phantom section shorter than that step inside a
series whose other slices are far from a disc can be missed (phantom modules are
centimetres long). When both pass and show the same disc (centres and radii within half
a working pixel), the slices between are not measured but filled in: centre and radius
interpolated, the inner disc taken as the disc itself (the body mask is hole-filled,
so inside a passing disc the two agree). A method choice for speed (records may
change): the disc test of a phantom series costs a quarter; the
water test and the insert test below still look at every one of those slices, so a
slice between that holds no water or an insert is still found (tested), and slices
whose disc changes between two screened slices are measured one by one. The insert
test runs on every phantom slice, on the 2 x 2 block
means of the working grid (pixels of twice its size; a method choice for speed, records
may change: a quarter of the pixels to smooth, the noise
of the block means after the Gaussian about that of the smoothed grid, and a group of
``min_insert_mm2`` or more still at least one block); the noise scale (MAD) is
taken only on slices with an inner deviation above ``insert_contrast_hu``, the least
threshold any slice has (the same answer). The CT numbers are
read only inside the bounding box of the inner discs of the slices that pass, and the
inner discs' masks are made only at the grids the tests read (2 x 2 blocks, every
fourth pixel; whole masks only for a slice whose sum is not finite), the same masks.
The grid is read in pieces of some 2 MB of whole slices and each piece turned at once
into what the tests use (block means, every fourth pixel, each slice's sum) while it
is in the processor cache; the whole grid is never kept (the same values). Runs of
equal body masks get their disc numbers once, and the medians of slices with few
distinct pixel counts come from partitions instead of a sort (the same numbers). Centre
and radius are therefore estimates on that grid (within a fraction of a working pixel
for a phantom of tens of working pixels), and the slice median and the noise scale
(MAD) are those of the inner pixels on every fourth row and column of the grid (some
hundreds of pixels: the median of water to well under 1 HU at the noise of a CT image).
This is a method choice for speed: the records of the analyses built on it are
estimates, as before, and may differ slightly from a search at full resolution.

One search and one count of non-finite voxels per volume: the last answers are kept,
keyed by weak references to the arrays (the counts of the measured slices slice by
slice, so analyses measuring overlapping slices look at each slice once), and a lock
makes analyses that run on threads at the same time wait for the first one's answer
instead of repeating the work.
"""
from __future__ import annotations

import threading
import weakref
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
from scipy import ndimage

from ..regions import Regions
from ..results import Roi
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
    "work_pixel_mm": 2.0,
    "screen_step_mm": 5.0,
    "dense_shell_hu": 400.0,
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


def _grid_step(pixel_mm: float, work_pixel_mm: float) -> int:
    """Step of the strided working grid: the most whole pixels not coarser than
    ``work_pixel_mm``."""
    return max(1, int(work_pixel_mm / pixel_mm))


def disc_stats(masks: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`disc_of` of every slice of a (z, y, x) mask stack at once.

    Returns
    -------
    centre_y, centre_x : ndarray (z,)
        Centroid per slice (NaN for an empty slice).
    radius : ndarray (z,)
        Equal-area radius (0 for an empty slice).
    fill : ndarray (z,)
        Area over the area of the circle about the centroid through the farthest mask
        pixel (0 for an empty slice).

    A slice equal to the one before it shares that slice's numbers: they are computed
    once per run of equal slices (a cylinder's masks repeat slice after slice).

    References
    ----------
    Common practice, no source (equal-area radius and fill ratio of a disc).
    """
    masks = np.ascontiguousarray(masks, dtype=bool)
    first = _first_of_equal_runs(masks)
    if first.size < masks.shape[0]:
        run = np.cumsum(np.isin(np.arange(masks.shape[0]), first)) - 1  # each slice's run
        return tuple(v[run] for v in _disc_stats_of(masks[first]))  # type: ignore[return-value]
    return _disc_stats_of(masks)


def _first_of_equal_runs(masks: np.ndarray) -> np.ndarray:
    """Indices of the slices of a contiguous (z, y, x) boolean stack that differ from the
    slice before (slice 0 always): compared as whole 8-byte words when the slice is a
    whole number of them."""
    nz = masks.shape[0]
    if nz < 2:
        return np.arange(nz)
    flat = masks.reshape(nz, -1).view(np.uint8)
    if flat.shape[1] % 8 == 0:
        flat = flat.view(np.uint64)
    same = (flat[1:] == flat[:-1]).all(axis=1)
    return np.flatnonzero(np.r_[True, ~same])


def _disc_stats_of(masks: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`disc_stats` of every slice of a contiguous boolean stack, one by one."""
    nz, ny, nx = masks.shape
    as_int = masks.view(np.uint8)
    # counts of one row or column fit in 16 bits for grids up to 65535 pixels a side
    count_type = np.uint16 if max(ny, nx) <= np.iinfo(np.uint16).max else np.int64
    row_counts = as_int.sum(axis=2, dtype=count_type).astype(np.int64)
    n = row_counts.sum(axis=1)
    safe = np.maximum(n, 1)
    cy = (row_counts @ np.arange(ny)) / safe
    cx = (as_int.sum(axis=1, dtype=count_type).astype(np.int64) @ np.arange(nx)) / safe
    first = np.argmax(masks, axis=2)
    last = _last_true_index(masks)
    dx2 = np.maximum((first - cx[:, None]) ** 2, (last - cx[:, None]) ** 2)
    d2 = np.where(row_counts > 0, (np.arange(ny)[None, :] - cy[:, None]) ** 2 + dx2, 0.0)
    r_max = np.sqrt(d2.max(axis=1)) + 0.5
    empty = n == 0
    fill = np.where(empty, 0.0, n / (np.pi * r_max**2))
    return np.where(empty, np.nan, cy), np.where(empty, np.nan, cx), np.sqrt(n / np.pi), fill


def _last_true_index(masks: np.ndarray) -> np.ndarray:
    """Index of the last True of every row of a contiguous (z, y, x) boolean stack (0
    for a row with none), as ``nx - 1 - argmax(masks[:, :, ::-1], axis=2)``.

    When a row is a whole number of 8-byte words, the rows are reversed by reversing
    the order of their words and the bytes in each word (one contiguous copy), so the
    search runs forwards on contiguous memory (several times faster than on the
    reversed view). The same indices.
    """
    nx = masks.shape[2]
    if nx % 8 or not masks.flags.c_contiguous:
        return nx - 1 - np.argmax(masks[:, :, ::-1], axis=2)
    words = masks.view(np.uint8).view(np.uint64)
    reversed_rows = words[:, :, ::-1].byteswap().view(bool)  # byteswap: a new array
    return nx - 1 - np.argmax(reversed_rows, axis=2)


def _inner_discs(
    body: np.ndarray, cy: np.ndarray, cx: np.ndarray, radius: np.ndarray
) -> tuple[np.ndarray, tuple[slice, slice]]:
    """Per-slice masks of the discs ``radius`` about (cy, cx), within ``body``, cut to the
    bounding box of all of them (the box is returned as well)."""
    ny, nx = body.shape[1:]
    y0 = max(0, int(np.floor(np.min(cy - radius))))
    y1 = min(ny, int(np.ceil(np.max(cy + radius))) + 1)
    x0 = max(0, int(np.floor(np.min(cx - radius))))
    x1 = min(nx, int(np.ceil(np.max(cx + radius))) + 1)
    yy = (np.arange(y0, y1)[None, :] - cy[:, None]).astype(np.float32) ** 2
    xx = (np.arange(x0, x1)[None, :] - cx[:, None]).astype(np.float32) ** 2
    room = (radius**2).astype(np.float32)[:, None] - yy  # x^2 left on each row (z, y)
    inside = np.less_equal(xx[:, None, :], room[:, :, None])  # one comparison a pixel
    inside &= body[:, y0:y1, x0:x1]
    return inside, (slice(y0, y1), slice(x0, x1))


class _InnerDiscs:
    """The masks of :func:`_inner_discs`, made only where and at the grid they are needed.

    A pixel (row y, column x of the working grid) is inside when ``(x - cx)^2 <=
    radius^2 - (y - cy)^2`` (the same float32 numbers as :func:`_inner_discs`) and, on
    slices whose body mask was measured, in the body. The masks of every ``step``-th row
    and column, of the 2 x 2 blocks (:func:`blocks_within`: a block is inside when its
    four pixels are, i.e. when the larger x^2 of its columns fits the smaller room of its
    rows) and of chosen slices are computed from the per-row room and per-column x^2
    alone, without the whole stack of masks.
    """

    def __init__(self, body: np.ndarray, measured: np.ndarray, cy: np.ndarray, cx: np.ndarray,
                 radius: np.ndarray) -> None:
        ny, nx = body.shape[1:]
        y0 = max(0, int(np.floor(np.min(cy - radius))))
        y1 = min(ny, int(np.ceil(np.max(cy + radius))) + 1)
        x0 = max(0, int(np.floor(np.min(cx - radius))))
        x1 = min(nx, int(np.ceil(np.max(cx + radius))) + 1)
        self.box = (slice(y0, y1), slice(x0, x1))
        yy = (np.arange(y0, y1)[None, :] - cy[:, None]).astype(np.float32) ** 2
        self.xx = (np.arange(x0, x1)[None, :] - cx[:, None]).astype(np.float32) ** 2
        self.room = (radius**2).astype(np.float32)[:, None] - yy  # x^2 left on each row (z, y)
        self.body = body[:, y0:y1, x0:x1]  # rows of slices not measured are not read
        self.measured = np.asarray(measured, dtype=bool)

    def take(self, keep: np.ndarray) -> "_InnerDiscs":
        """The discs of the slices where ``keep``."""
        out = object.__new__(_InnerDiscs)
        out.box, out.xx, out.room = self.box, self.xx[keep], self.room[keep]
        out.body, out.measured = self.body[keep], self.measured[keep]
        return out

    def _with_body(self, inside: np.ndarray, body_of: "Callable[[np.ndarray], np.ndarray]") -> np.ndarray:
        idx = np.flatnonzero(self.measured)
        if idx.size == self.measured.size:
            inside &= body_of(self.body)
        elif idx.size:
            inside[idx] &= body_of(self.body[idx])
        return inside

    def full(self, idx: np.ndarray) -> np.ndarray:
        """Masks of slices ``idx`` at every pixel of the box."""
        sub = self.take(idx)
        inside = np.less_equal(sub.xx[:, None, :], sub.room[:, :, None])
        return sub._with_body(inside, lambda b: b)

    def every(self, step: int) -> np.ndarray:
        """Masks at every ``step``-th row and column of the box."""
        inside = np.less_equal(self.xx[:, None, ::step], self.room[:, ::step, None])
        return self._with_body(inside, lambda b: b[:, ::step, ::step])

    def blocks(self) -> np.ndarray:
        """Masks of the 2 x 2 blocks of the box (an odd last row or column left out)."""
        h, w = self.room.shape[1] // 2 * 2, self.xx.shape[1] // 2 * 2
        room = np.minimum(self.room[:, 0:h:2], self.room[:, 1:h:2])
        xx = np.maximum(self.xx[:, 0:w:2], self.xx[:, 1:w:2])
        inside = np.less_equal(xx[:, None, :], room[:, :, None])
        return self._with_body(inside, blocks_within)


def _finite_in_discs(values: np.ndarray, discs: _InnerDiscs) -> np.ndarray:
    """:func:`_finite_inside` of ``values`` in the inner discs: the masks are made only
    for slices whose float32 sum is not finite."""
    ok = np.ones(values.shape[0], dtype=bool)
    suspect = np.flatnonzero(~np.isfinite(values.sum(axis=(1, 2), dtype=np.float32)))
    if suspect.size:
        ok[suspect] = _finite_inside(values[suspect], discs.full(suspect))
    return ok


def _finite_inside(values: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Per slice, whether every masked value is finite. A slice's float32 sum is finite
    unless a value is not (or the sum overflows), so only slices whose sum is not are
    looked at pixel by pixel."""
    ok = np.ones(values.shape[0], dtype=bool)
    suspect = np.flatnonzero(~np.isfinite(values.sum(axis=(1, 2), dtype=np.float32)))
    if suspect.size:
        ok[suspect] = ~(masks[suspect] & ~np.isfinite(values[suspect])).any(axis=(1, 2))
    return ok


def _medians_of(values: np.ndarray, masks: np.ndarray, step: int = 4, masks_at_step: bool = False) -> np.ndarray:
    """Median of the masked values on every ``step``-th row and column, slice by slice
    (NaN where none): one sort of the whole stack, or, when the slices have at most
    :data:`_PARTITION_COUNTS` distinct counts of masked values and no value is NaN, one
    partition per count (:func:`_medians_by_partition`, the same medians).
    ``masks_at_step``: ``masks`` are already those of every ``step``-th row and column."""
    nz = values.shape[0]
    sub = (masks if masks_at_step else masks[:, ::step, ::step]).reshape(nz, -1)
    v = np.where(sub, values[:, ::step, ::step].reshape(nz, -1), np.float32(np.inf))
    count = np.count_nonzero(sub, axis=1)
    counts = np.unique(count)
    if counts.size <= _PARTITION_COUNTS and v.shape[1] and not np.isnan(v).any():
        return _medians_by_partition(v, count, counts)
    v.sort(axis=1)
    k = np.arange(nz)
    lo, hi = v[k, np.maximum(count - 1, 0) // 2], v[k, np.minimum(count // 2, v.shape[1] - 1)]
    return np.where(count > 0, 0.5 * (lo.astype(np.float64) + hi), np.nan)


def _medians_by_partition(v: np.ndarray, count: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """The medians of :func:`_medians_of` from rows ``v`` (z, n) whose first ``count``
    order statistics are the masked values (the rest +inf; no NaN): for each distinct
    count c, one partition at c // 2 of the rows with that count (the c // 2-th order
    statistic in place, the smaller values before it) instead of a sort; the lower
    middle value of an even count is the largest of those before. The same two order
    statistics, so the same medians."""
    out = np.full(v.shape[0], np.nan)
    for c in counts:
        if c == 0:
            continue
        rows = np.flatnonzero(count == c)
        part = np.partition(v[rows], int(c) // 2, axis=1)
        hi = part[:, int(c) // 2]
        lo = hi if c % 2 else part[:, : int(c) // 2].max(axis=1)
        out[rows] = 0.5 * (lo.astype(np.float64) + hi)
    return out


#: Most distinct counts of masked values for which :func:`_medians_of` partitions the
#: rows of each count instead of sorting them all.
_PARTITION_COUNTS = 4


def _strided(a: np.ndarray, f: int, rows: slice = slice(None), cols: slice = slice(None),
             zs: np.ndarray | None = None) -> np.ndarray:
    """Contiguous copy of ``a[zs, rows][:, ::f, ::f]`` within ``cols``.

    Sorted slices ``zs`` that form one run are taken as a slice (no fancy index). Masks
    (one byte a pixel) are copied by whole rows first, then the columns picked; wider
    values in one strided gather (each is faster for its type).
    """
    zsel = slice(None) if zs is None else _as_slice(zs)
    if zsel is None:
        cuts = np.flatnonzero(np.diff(zs) != 1) + 1
        if cuts.size < _MAX_RUNS:  # a few runs of slices: one slice copy per run
            return np.concatenate([_strided(a, f, rows, cols, run) for run in np.split(zs, cuts)])
        zsel = zs
    if a.dtype.itemsize == 1:
        part = a[zsel, rows.start : rows.stop : f, cols]
        if f in _WORDS and part.shape[2] % f == 0 and part.strides[2] == 1:
            # each f-byte word of a row holds one kept pixel in its first byte: the
            # word's value modulo 256 (little-endian) is that pixel, in one pass
            return part.view(_WORDS[f]).astype(np.uint8).view(a.dtype)
        part = np.ascontiguousarray(part)
        return np.ascontiguousarray(part[:, :, ::f])
    return np.ascontiguousarray(a[zsel, rows.start : rows.stop : f, cols.start : cols.stop : f])


#: Little-endian words of f bytes, by grid step f, for :func:`_strided`'s masks.
_WORDS = {2: np.dtype("<u2"), 4: np.dtype("<u4"), 8: np.dtype("<u8")}

#: Most runs of slices :func:`_strided` copies one by one (more: one fancy index).
_MAX_RUNS = 8


def _as_slice(zs: np.ndarray) -> slice | None:
    """The slice that picks the sorted, distinct indices ``zs`` when they are evenly
    spaced (None otherwise)."""
    zs = np.asarray(zs)
    if zs.size == 0:
        return slice(0, 0)
    if zs.size == 1:
        return slice(int(zs[0]), int(zs[0]) + 1)
    step = int(zs[1] - zs[0])
    if step > 0 and np.all(np.diff(zs) == step):
        return slice(int(zs[0]), int(zs[-1]) + 1, step)
    return None


def smooth_in_plane(stack: np.ndarray, sigma_px: float, truncate: float = 2.5) -> np.ndarray:
    """Gaussian smoothing of every slice of a float32 (z, y, x) stack, as
    ``ndimage.gaussian_filter(stack, (0, s, s), truncate=truncate)`` (same kernel,
    ``reflect`` edges).

    The stack is padded by reflection in-plane once; then along rows and along columns
    each output is a weighted sum of the input shifted by whole pixels (rows) or whole
    padded rows (columns) along the flattened padded stack, computed in pieces that stay
    in the processor cache (:data:`_PIECE` values) with one small scratch buffer. Faster
    than a filter along lines for the few-pixel kernels used here; values off the
    padded image's valid part are computed but never used.
    """
    padded, r = _smoothed_padded(stack, sigma_px, truncate)
    _, ny, nx = np.shape(stack)
    return padded[:, r : r + ny, r : r + nx]


def _smoothed_padded(stack: np.ndarray, sigma_px: float, truncate: float = 2.5) -> tuple[np.ndarray, int]:
    """:func:`smooth_in_plane` of ``stack`` inside a new contiguous float32 array padded
    by ``r`` pixels on each side in-plane (the padding holds values to ignore); returns
    the array and ``r``."""
    radius = int(truncate * float(sigma_px) + 0.5)
    stack = np.asarray(stack, dtype=np.float32)
    if radius < 1:
        return stack.copy(), 0
    k = np.arange(-radius, radius + 1)
    w = np.exp(-0.5 * (k / float(sigma_px)) ** 2)
    w /= w.sum()
    padded = _pad_reflect_in_plane(stack, radius)
    flat = padded.reshape(-1)
    rows = np.empty_like(flat)
    scratch = np.empty(min(_PIECE, flat.size), dtype=np.float32)
    _shifted_sums(flat, w, 1, rows, scratch)
    _shifted_sums(rows, w, padded.shape[2], flat, scratch)  # the padded input is no longer needed
    return padded, radius


#: Values of one piece of :func:`smooth_in_plane` (256 KiB of float32).
_PIECE = 1 << 16


def _pad_reflect_in_plane(stack: np.ndarray, r: int) -> np.ndarray:
    """``np.pad(stack, [(0, 0), (r, r), (r, r)], mode="symmetric")`` as float32 (scipy's
    ``reflect``), by slice copies when ``r`` is at most the slice size."""
    nz, ny, nx = stack.shape
    if r > ny or r > nx:
        return np.pad(stack, [(0, 0), (r, r), (r, r)], mode="symmetric").astype(np.float32, copy=False)
    out = np.empty((nz, ny + 2 * r, nx + 2 * r), dtype=np.float32)
    out[:, r : r + ny, r : r + nx] = stack
    out[:, r : r + ny, :r] = stack[:, :, :r][:, :, ::-1]
    out[:, r : r + ny, r + nx :] = stack[:, :, nx - r :][:, :, ::-1]
    out[:, :r] = out[:, r : 2 * r][:, ::-1]
    out[:, r + ny :] = out[:, ny : ny + r][:, ::-1]
    return out


def _shifted_sums(src: np.ndarray, w: np.ndarray, step: int, dst: np.ndarray, scratch: np.ndarray) -> None:
    """``dst[i] = sum_j w[j] src[i + (j - r) step]`` for a symmetric kernel ``w`` of
    2 r + 1 taps, where every index lies in ``src`` (0 elsewhere), piece by piece."""
    r = (len(w) - 1) // 2
    lo, hi = r * step, src.size - r * step
    dst[:lo] = 0.0
    dst[max(lo, hi) :] = 0.0
    taps = [np.float32(v) for v in w]
    for start in range(lo, hi, scratch.size):
        stop = min(start + scratch.size, hi)
        out, pair = dst[start:stop], scratch[: stop - start]
        np.multiply(src[start:stop], taps[r], out=out)
        for j in range(1, r + 1):  # the kernel is symmetric: one product per pair
            np.add(src[start - j * step : stop - j * step], src[start + j * step : stop + j * step], out=pair)
            pair *= taps[r + j]
            out += pair


def _largest_groups(mask: np.ndarray) -> np.ndarray:
    """Pixels in the largest in-plane connected group of each slice of ``mask``."""
    lab, n = ndimage.label(mask, structure=_IN_PLANE)
    if n == 0:
        return np.zeros(mask.shape[0], dtype=np.int64)
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    return sizes[lab].max(axis=(1, 2))


#: In-plane 4-connectivity for labelling a stack of slices one slice at a time.
_IN_PLANE = np.zeros((3, 3, 3), dtype=bool)
_IN_PLANE[1] = ndimage.generate_binary_structure(2, 1)


def block_means_2x2(stack: np.ndarray) -> np.ndarray:
    """Means of the 2 x 2 blocks of every slice of a (z, y, x) stack, as float32 (an odd
    last row or column is left out)."""
    ny, nx = stack.shape[1] // 2 * 2, stack.shape[2] // 2 * 2
    out = np.add(stack[:, 0:ny:2, 0:nx:2], stack[:, 1:ny:2, 0:nx:2], dtype=np.float32)
    out += stack[:, 0:ny:2, 1:nx:2]
    out += stack[:, 1:ny:2, 1:nx:2]
    out *= np.float32(0.25)
    return out


def blocks_within(mask: np.ndarray) -> np.ndarray:
    """The 2 x 2 blocks (as :func:`block_means_2x2`) whose four pixels all lie in ``mask``."""
    ny, nx = mask.shape[1] // 2 * 2, mask.shape[2] // 2 * 2
    out = mask[:, 0:ny:2, 0:nx:2] & mask[:, 1:ny:2, 0:nx:2]
    out &= mask[:, 0:ny:2, 1:nx:2]
    out &= mask[:, 1:ny:2, 1:nx:2]
    return out


def _insert_slices(
    hu: np.ndarray, inner: "np.ndarray | _InnerDiscs", median: np.ndarray, pixel_mm: float, s: dict[str, float],
    block_means: bool = False,
) -> np.ndarray:
    """Which slices of a stack hold a connected group inside ``inner`` (masks, or the
    :class:`_InnerDiscs` they come from) departing from the slice's ``median`` (see the
    module docstring); ``pixel_mm`` is the grid's pixel.

    The test runs on the 2 x 2 block means of the grid (pixels of ``2 pixel_mm``, inside
    ``inner`` when all four are; ``block_means``: ``hu`` holds them already, ``inner``
    being of the grid), smoothed by the Gaussian of ``smooth_mm``: a quarter
    of the pixels to smooth, with the noise reduced about as much as the smoothing of
    the grid itself did.
    """
    if block_means:  # ``hu`` holds the block means already (``inner`` is of the grid)
        pixel_mm = 2.0 * pixel_mm
        inner = inner.blocks() if isinstance(inner, _InnerDiscs) else blocks_within(inner)
    elif min(hu.shape[1:]) >= 2:
        hu, pixel_mm = block_means_2x2(hu), 2.0 * pixel_mm
        inner = inner.blocks() if isinstance(inner, _InnerDiscs) else blocks_within(inner)
    elif isinstance(inner, _InnerDiscs):
        inner = inner.full(np.arange(hu.shape[0]))
    padded, r = _smoothed_padded(hu, s["smooth_mm"] / pixel_mm)
    padded -= median.astype(np.float32)[:, None, None]  # in place on the contiguous array
    signed = padded[:, r : r + hu.shape[1], r : r + hu.shape[2]]
    dev = np.abs(signed)
    # every slice's threshold is at least insert_contrast_hu (float32 rounding keeps the
    # order), so a slice with no inner deviation above that has no insert and needs no
    # noise scale: the water level and the scale are taken only on the other slices
    out = np.greater(dev, np.float32(s["insert_contrast_hu"]))
    out &= inner
    has = np.zeros(hu.shape[0], dtype=bool)
    candidates = np.flatnonzero(out.any(axis=(1, 2)))
    if candidates.size:
        inner_c = inner[candidates]
        centre, scale = clipped_level_and_scale(signed[candidates], inner_c)
        dev_c = np.abs(signed[candidates] - centre.astype(np.float32)[:, None, None])
        threshold = np.maximum(s["insert_contrast_hu"], 5.0 * scale).astype(np.float32)
        above = np.greater(dev_c, threshold[:, None, None])
        above &= inner_c
        largest = _largest_groups(above)
        has[candidates] = largest * pixel_mm**2 >= s["min_insert_mm2"]
    return has


#: Rounds of clipping of the insert test's water level and noise scale
#: (:func:`clipped_level_and_scale`).
CLIP_ROUNDS = 2


def clipped_level_and_scale(values: np.ndarray, inner: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Water level (median) and noise scale (1.4826 x MAD) of each slice of ``values``
    inside ``inner`` (on every :func:`clip_sample_step`-th row and column: a few hundred
    pixels a slice), recomputed :data:`CLIP_ROUNDS` times without the pixels more than
    3 scales from the level.

    Inserts covering a good part of the inner disc pull a plain median towards them and
    widen a plain MAD, and with them the insert test's threshold (5 scales) climbs to
    the inserts' own contrast: four 20 mm rods of +80 HU at 20 HU noise were not seen.
    Clipping leaves them out; pure noise loses only its 3-SD tails (0.3 % of the
    pixels), so the level and scale of a uniform slice stay those of the plain median
    and MAD to about 1 %. A slice with no pixel left keeps its last values.

    References
    ----------
    .. [1] P. J. Rousseeuw and C. Croux, "Alternatives to the median absolute deviation",
       J. Am. Stat. Assoc. 88(424), 1993 (MAD); iterative clipping: common practice, no
       source.
    """
    step = clip_sample_step(inner)
    values, inner = values[:, ::step, ::step], inner[:, ::step, ::step]
    level = _medians_of(values, inner, step=1)
    scale = _medians_of(np.abs(values - _column(level)), inner, step=1) * 1.4826
    for _ in range(CLIP_ROUNDS):
        limit = _column(np.where(np.isfinite(scale), 3.0 * scale, np.inf))
        keep = inner & (np.abs(values - _column(level)) <= limit)
        new_level = _medians_of(values, keep, step=1)
        new_scale = _medians_of(np.abs(values - _column(new_level)), keep, step=1) * 1.4826
        ok = np.isfinite(new_level) & np.isfinite(new_scale)
        level, scale = np.where(ok, new_level, level), np.where(ok, new_scale, scale)
    return level, scale


#: Pixels a slice the clipped level and scale aim at (:func:`clip_sample_step`).
CLIP_SAMPLES = 256


def clip_sample_step(inner: np.ndarray) -> int:
    """The row and column step that leaves about :data:`CLIP_SAMPLES` (at least that
    many) of the inner pixels of the slice with most of them."""
    most = int(np.count_nonzero(inner.reshape(inner.shape[0], -1), axis=1).max()) if inner.size else 0
    return max(1, int(np.sqrt(most / CLIP_SAMPLES)))


def _column(per_slice: np.ndarray) -> np.ndarray:
    """Per-slice float32 values shaped to broadcast over (z, y, x); NaN reads 0."""
    return np.nan_to_num(np.asarray(per_slice, dtype=np.float32), nan=0.0)[:, None, None]


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
    with _SEARCH_LOCK:  # analyses run on threads: the second waits and reuses the answer
        hit = _LAST.get("entry")
        if hit is not None and hit[0]() is volume.hu and hit[1]() is regions.body and hit[2] == key:
            return hit[3]
        found = _find_phantom(volume, regions, s)
        _LAST["entry"] = (weakref.ref(volume.hu), weakref.ref(regions.body), key, found)
    return found


#: The last answer, keyed by weak references to the arrays it was computed from, so the
#: noise, uniformity and edge analyses of one volume share one search.
_LAST: dict[str, tuple] = {}
#: The last count of :func:`count_nonfinite`, keyed the same way.
_LAST_COUNT: dict[str, tuple] = {}
#: The per-slice counts of :func:`count_nonfinite_in_slices` for the last array:
#: (array, counts (z,), -1 where a slice was not looked at yet).
_LAST_SLICES_COUNT: dict[str, tuple] = {}
#: Held while a search or a count is made, so that analyses of one volume running on
#: threads at once make it once (a re-entrant lock: a search may count).
_SEARCH_LOCK = threading.RLock()
_COUNT_LOCK = threading.RLock()


def count_nonfinite(volume: Volume, regions: Regions | None = None) -> int:
    """Number of NaN or infinite voxels in ``volume.hu``.

    One float32 sum over the volume (bandwidth-bound): a sum of finite values is finite
    unless it overflows, so voxels are counted only when it is not. With ``regions`` the
    answer is kept, keyed like :func:`find_phantom`'s, so the analyses of one volume
    pay for one pass.

    References
    ----------
    IEEE 754 arithmetic: NaN and infinities propagate through a sum (common practice,
    no source).
    """
    with _COUNT_LOCK:  # analyses run on threads: the second waits and reuses the count
        hit = _LAST_COUNT.get("entry")
        if regions is not None and hit is not None and hit[0]() is volume.hu and hit[1]() is regions.body:
            return hit[2]
        hu = volume.hu
        bad = 0
        if not np.isfinite(hu.sum(dtype=np.float32)):
            bad = sum(int(np.count_nonzero(~np.isfinite(hu[z : z + 16]))) for z in range(0, hu.shape[0], 16))
        if regions is not None:
            _LAST_COUNT["entry"] = (weakref.ref(hu), weakref.ref(regions.body), bad)
    return bad


def count_nonfinite_in_slices(volume: Volume, z0: int, z1: int) -> int:
    """Number of NaN or infinite voxels in every pixel of slices ``z0`` to ``z1``
    (inclusive) of ``volume.hu``.

    The check of the noise and uniformity analyses: they read only the slices their
    ROIs lie on, so they check those slices whole (a method choice for speed: a
    non-finite voxel on a slice they do not measure does not stop them). One float32
    sum per slice, as in :func:`count_nonfinite`; the count of every slice looked at is
    kept, keyed by a weak reference to the array, so analyses measuring the same or
    overlapping slices of one volume look at each slice once.

    References
    ----------
    IEEE 754 arithmetic: NaN and infinities propagate through a sum (common practice,
    no source).
    """
    hu = volume.hu
    z0, z1 = max(0, int(z0)), min(hu.shape[0] - 1, int(z1))
    if z1 < z0:
        return 0
    with _COUNT_LOCK:
        hit = _LAST_SLICES_COUNT.get("entry")
        if hit is not None and hit[0]() is hu:
            known = hit[1]
        else:
            known = np.full(hu.shape[0], -1, dtype=np.int64)  # -1: not looked at yet
            _LAST_SLICES_COUNT["entry"] = (weakref.ref(hu), known)
        todo = np.flatnonzero(known[z0 : z1 + 1] < 0) + z0
        for a, b in _runs_of_indices(todo):
            known[a : b + 1] = _slice_counts(hu[a : b + 1])
        return int(known[z0 : z1 + 1].sum())


def _slice_counts(part: np.ndarray) -> np.ndarray:
    """Number of non-finite values of each slice of a (z, y, x) block: one float32 sum
    per slice, the pixels looked at only on slices whose sum is not finite."""
    sums = part.reshape(part.shape[0], -1).sum(axis=1, dtype=np.float32)
    counts = np.zeros(part.shape[0], dtype=np.int64)
    for z in np.flatnonzero(~np.isfinite(sums)):
        counts[z] = np.count_nonzero(~np.isfinite(part[z]))
    return counts


def _runs_of_indices(idx: np.ndarray) -> list[tuple[int, int]]:
    """Sorted distinct indices as inclusive runs (a, b) of consecutive values."""
    if idx.size == 0:
        return []
    cuts = np.flatnonzero(np.diff(idx) != 1)
    starts = np.r_[idx[0], idx[cuts + 1]]
    stops = np.r_[idx[cuts], idx[-1]]
    return [(int(a), int(b)) for a, b in zip(starts, stops)]


def nonfinite_reason(volume: Volume, rois: Sequence[Roi]) -> str:
    """Why ``rois`` cannot be measured on ``volume`` because of NaN or infinite voxels
    on their slices (every pixel of each slice they lie on), or ``""``."""
    bad = sum(count_nonfinite_in_slices(volume, z0, z1) for z0, z1 in _slice_runs(rois))
    return f"volume contains {bad} NaN or infinite voxels on the measured slices" if bad else ""


def _slice_runs(rois: Sequence[Roi]) -> list[tuple[int, int]]:
    """The slices ``rois`` lie on, as sorted, disjoint inclusive runs (z0, z1)."""
    runs: list[tuple[int, int]] = []
    for z0, z1 in sorted((int(r.z0), int(r.z1)) for r in rois):
        if runs and z0 <= runs[-1][1] + 1:
            runs[-1] = (runs[-1][0], max(runs[-1][1], z1))
        else:
            runs.append((z0, z1))
    return runs


def _slice_step(volume: Volume, s: dict[str, float]) -> int:
    """Step between the slices of the first disc screen: about ``screen_step_mm``."""
    return max(1, int(s["screen_step_mm"] / max(float(volume.spacing_mm[0]), 1e-6)))


def _screened_disc_stats(
    body: np.ndarray, f: int, k: int, pixel_mm: float, s: dict[str, float]
) -> tuple[np.ndarray, ...]:
    """Disc test numbers of every slice that may show the phantom, on the working grid.

    Every ``k``-th slice (and the last) is measured first. The slices between two of them
    are then

    - filled in, not measured, when both pass the disc test and agree (centres and
      radii within :data:`_AGREE_GRID_PX` working pixels): centre and radius linearly
      interpolated, fill the lower of the two, and no mask (its inner disc is then the
      disc itself; the body is hole-filled, so within a passing disc the two are the
      same);
    - measured, when either passes a relaxed test (radius at least 0.8 of the minimum,
      fill at most 0.05 short of it) and they do not both pass and agree;
    - left out otherwise (radius and fill 0).

    Returns the strided body masks (z, y', x'; valid where ``measured``), ``measured``
    (z,) and centre_y, centre_x, radius, fill (z,) on the working grid.
    """
    nz = body.shape[0]
    first = np.unique(np.r_[np.arange(0, nz, k), nz - 1])
    masks = np.empty((nz, *_strided(body[:1], f).shape[1:]), dtype=bool)  # written where measured
    measured = np.zeros(nz, dtype=bool)
    cy, cx = np.full(nz, np.nan), np.full(nz, np.nan)
    r, fill = np.zeros(nz), np.zeros(nz)

    def measure(zs: np.ndarray) -> None:
        part = _strided(body, f, zs=zs)
        masks[zs] = part
        measured[zs] = True
        cy[zs], cx[zs], r[zs], fill[zs] = disc_stats(part)

    measure(first)
    radius_mm = r[first] * f * pixel_mm
    near = (radius_mm >= 0.8 * s["min_radius_mm"]) & (fill[first] >= s["min_fill"] - 0.05)
    passes = (radius_mm >= s["min_radius_mm"]) & (fill[first] >= s["min_fill"])
    a, b = first[:-1], first[1:]
    agree = np.maximum(np.maximum(np.abs(cy[a] - cy[b]), np.abs(cx[a] - cx[b])), np.abs(r[a] - r[b])) <= _AGREE_GRID_PX
    look = near[:-1] | near[1:]
    fill_in = look & passes[:-1] & passes[1:] & agree
    rest = np.setdiff1d(np.arange(nz), first, assume_unique=True)  # the slices between
    pair = np.searchsorted(first, rest) - 1  # first[pair] < z < first[pair + 1]
    between = rest[look[pair] & ~fill_in[pair]]
    if between.size:
        measure(between)
    filled, pair = rest[fill_in[pair]], pair[fill_in[pair]]
    if filled.size:
        lo, hi = first[pair], first[pair + 1]
        t = (filled - lo) / (hi - lo).astype(float)
        for v in (cy, cx, r):
            v[filled] = (1.0 - t) * v[lo] + t * v[hi]
        fill[filled] = np.minimum(fill[lo], fill[hi])
    return masks, measured, cy, cx, r, fill


#: Largest difference (working-grid pixels) of the centres and radii of two screened
#: slices for the slices between them to be filled in instead of measured.
_AGREE_GRID_PX = 0.5


def _water_and_inserts(
    hu: np.ndarray, f: int, zs: np.ndarray, inner: _InnerDiscs, grid_mm: float, s: dict[str, float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The water test and the insert test of slices ``zs`` (see the module docstring) on
    the working grid of step ``f`` (pixels of ``grid_mm``) inside ``inner``'s box.

    One strided read of the grid inside the box, then the finite check, the water
    median and, on the slices that pass, the insert test.

    Returns
    -------
    water : ndarray of bool (len(zs),)
        Every inner pixel finite and the median within ``water_window_hu`` of 0 HU.
    median : ndarray (len(zs),)
        Median of the inner pixels (every fourth row and column of the grid).
    inserts : ndarray of bool (len(zs),)
        A water slice holding an insert.
    """
    rows = slice(inner.box[0].start * f, inner.box[0].stop * f)
    cols = slice(inner.box[1].start * f, inner.box[1].stop * f)
    as_blocks = min(inner.room.shape[1], inner.xx.shape[1]) >= 2
    if as_blocks:
        sums, every4, grid = _grid_reads(hu, f, rows, cols, zs)
    else:  # a grid too small for blocks: the insert test takes the grid itself
        grid = _strided(hu, f, rows, cols, zs)
        sums, every4 = grid.sum(axis=(1, 2), dtype=np.float32), grid[:, ::4, ::4]
    median = _medians_of(every4, inner.every(4), step=1)
    finite = np.isfinite(sums)  # a sum is finite when every value is
    suspect = np.flatnonzero(~finite)
    if suspect.size:  # only these slices are looked at pixel by pixel
        finite[suspect] = _finite_inside(_strided(hu, f, rows, cols, zs[suspect]), inner.full(suspect))
    water = finite & (np.abs(median) <= s["water_window_hu"])  # NaN fails
    inserts = np.zeros(zs.size, dtype=bool)
    if water.all():  # (no copies when every slice passes)
        inserts = _insert_slices(grid, inner, median, grid_mm, s, block_means=as_blocks)
    elif water.any():
        idx = np.flatnonzero(water)
        inserts[idx] = _insert_slices(grid[idx], inner.take(idx), median[idx], grid_mm, s, block_means=as_blocks)
    return water, median, inserts


def _grid_reads(hu: np.ndarray, f: int, rows: slice, cols: slice, zs: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What the water and insert tests need of the working grid ``hu[zs, rows, cols]``
    (every ``f``-th pixel): the float32 sum of each slice, every fourth row and column,
    and the 2 x 2 block means (:func:`block_means_2x2`), read :data:`_READ_BYTES` of
    grid at a time (whole slices) so that each piece of the grid is used while it is in
    the processor cache (the whole grid is never kept). The same values as from one
    copy of the grid."""
    n = zs.size
    h, w = len(range(rows.start, rows.stop, f)), len(range(cols.start, cols.stop, f))
    sums = np.empty(n, dtype=np.float32)
    every4 = np.empty((n, (h + 3) // 4, (w + 3) // 4), dtype=np.float32)
    blocks = np.empty((n, h // 2, w // 2), dtype=np.float32)
    per_piece = max(1, _READ_BYTES // max(1, 4 * h * w))
    for a in range(0, n, per_piece):
        b = min(n, a + per_piece)
        piece = _strided(hu, f, rows, cols, zs[a:b])
        sums[a:b] = piece.reshape(b - a, -1).sum(axis=1, dtype=np.float32)
        every4[a:b] = piece[:, ::4, ::4]
        blocks[a:b] = block_means_2x2(piece)
    return sums, every4, blocks


#: Bytes of float32 grid :func:`_grid_reads` reads at a time (whole slices, at least
#: one): a piece stays in the processor's cache (57 slices of the grid of a 512 x 512
#: series: few pieces, few calls).
_READ_BYTES = 2048 * 1024


#: Rays and radial samples of :func:`shell_level_hu`.
SHELL_RAYS = 48
SHELL_REACH = (0.75, 1.05)


def shell_level_hu(hu: np.ndarray, zs: np.ndarray, centre: np.ndarray, radius: np.ndarray) -> float:
    """What the edge of the disc is made of: on the middle slice of the phantom slices
    ``zs``, the highest CT number along each of ``SHELL_RAYS`` rays from the centre
    between ``SHELL_REACH`` (0.75 to 1.05) of the radius, sampled at the nearest pixel
    about every pixel (a shell of two pixels or more is never stepped over); the median
    over the rays.

    A water phantom's wall is thin plastic (acrylic about +120 HU, from memory), and an
    insert near the edge crosses only a few rays; a skull crosses every ray at several
    hundred HU and more (cortical bone about +1000 HU, from memory). So a high value
    tells a round head from a water cylinder, which the disc and water tests alone
    cannot when the brain's CT number (about +35 HU) lies in the water window.

    References
    ----------
    .. [1] Common practice, no source (the HU of acrylic and of bone: from memory).
    """
    z = int(zs[zs.size // 2])
    ny, nx = hu.shape[1:]
    r = float(radius[z])
    angles = np.linspace(0.0, 2.0 * np.pi, SHELL_RAYS, endpoint=False)
    steps = np.linspace(SHELL_REACH[0] * r, SHELL_REACH[1] * r, max(8, int((SHELL_REACH[1] - SHELL_REACH[0]) * r)))
    yy = np.clip(np.rint(centre[z, 0] + np.outer(np.sin(angles), steps)), 0, ny - 1).astype(np.intp)
    xx = np.clip(np.rint(centre[z, 1] + np.outer(np.cos(angles), steps)), 0, nx - 1).astype(np.intp)
    ray_max = hu[z][yy, xx].max(axis=1)  # a NaN on a ray counts as not dense
    return float(np.median(np.nan_to_num(ray_max, nan=-np.inf)))


def _find_phantom(volume: Volume, regions: Regions, s: dict[str, float]) -> Phantom:
    nz = volume.shape[0]
    pixel_mm = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    f = _grid_step(pixel_mm, s["work_pixel_mm"])
    centre = np.full((nz, 2), np.nan)
    radius = np.full(nz, np.nan)
    median = np.full(nz, np.nan)
    on = np.zeros(nz, dtype=bool)
    inserts = np.zeros(nz, dtype=bool)
    body, measured, cy, cx, r, fill = _screened_disc_stats(regions.body, f, _slice_step(volume, s), pixel_mm, s)
    zs = np.flatnonzero((r * f * pixel_mm >= s["min_radius_mm"]) & (fill >= s["min_fill"]))
    if zs.size:
        run = _as_slice(zs)  # evenly spaced slices (a phantom series: all of them) as a view
        inner = _InnerDiscs(body[zs if run is None else run], measured[zs], cy[zs], cx[zs],
                            s["inner_fraction"] * r[zs])
        keep, med, has = _water_and_inserts(volume.hu, f, zs, inner, pixel_mm * f, s)
        zs, med, has = zs[keep], med[keep], has[keep]
        centre[zs] = np.stack([cy[zs] * f, cx[zs] * f], axis=1)
        radius[zs], median[zs], on[zs], inserts[zs] = r[zs] * f, med, True, has
    reason = ""
    if not on.any():
        reason = (
            "no water cylinder found: no slice has a near-circular object of radius "
            f">= {s['min_radius_mm']:g} mm with a median within {s['water_window_hu']:g} HU of water"
        )
    else:
        shell_hu = shell_level_hu(volume.hu, np.flatnonzero(on), centre, radius)
        if shell_hu > s["dense_shell_hu"]:
            on[:], inserts[:] = False, False
            reason = (f"no water cylinder: the round object has a dense, bone-like shell (its edge reaches "
                      f"{shell_hu:.0f} HU on most rays; a phantom's wall stays below {s['dense_shell_hu']:g} HU): "
                      "a head or other body part")
    return Phantom(
        found=bool(on.any()),
        reason=reason,
        centre_yx_vox=centre,
        radius_vox=radius,
        median_hu=median,
        on_slice=on,
        uniform=on & ~inserts,
        inserts=inserts,
        pixel_mm=float(pixel_mm),
    )
