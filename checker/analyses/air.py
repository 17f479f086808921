"""Structures in the air beside the patient, and the air's own CT number and noise.

A nonlinear reconstruction can paint organ-like shapes into the air around the patient
that only show at an air window (common practice, no source). This analysis works in the
air of the shared regions (inside the field of view, outside the dilated body and
table), measures the air's mean CT number and noise, and finds every structure that
stands above the air's noise at scales from a few mm to several cm.

Method
------
0. Coarse grid (the one full-resolution pass): the HU are summed over the air pixels of
   blocks of about ``BLOCK_MM`` (3 mm, at most ``MAX_BLOCK_MM`` = 4 mm, at least one
   pixel) along each axis, together with the number of air pixels per block (block
   averaging, common practice, no source). On the benchmark series (0.7 mm pixels, 1.25
   mm slices) a block is 4 x 4 pixels by 2 slices. Everything up to step 4 works on this
   grid and on grids made from it by further block sums; full resolution is read again
   only for the air sample of step 1 and inside the boxes of the structures found.
1. Air statistics: a regular sub-grid sample of air voxels (about 2e5 of them: the
   relative standard error of their SD is then 0.16 %), clipped iteratively at
   ``clip_sigma`` robust standard deviations (1.4826 x MAD) around the median;
   ``mean_hu`` and ``noise_hu`` are the mean and standard deviation of what remains (per
   pixel, as before). Air is -1000 HU by the definition of the Hounsfield scale. The
   body's noise (``body_noise_hu``, for the flattened-air check) is the mode of the local
   SD in soft tissue on 4 evenly spaced slices (Christianson et al. 2015).
2. Multi-scale matched filtering on the coarse grid: the finest scale is the block mean
   itself; every other scale of SD ``s`` in ``scales_mm`` is the block mean over blocks
   of about ``2 s`` followed by a Gaussian of SD ``s`` (about half a cell), both over air
   pixels only (normalised convolution, Knutsson & Westin 1993), so the body never leaks
   into the air. Blocks less than half air are not measured. The filtered noise near the
   edge of the air grows as fewer pixels are averaged; each value is divided by that
   growth (computed for white noise).
3. Thresholds for a stated false-alarm rate: the noise of each filtered map is measured
   on that map over the air (1.4826 x MAD) -- never derived from the pixel noise, since
   correlated noise makes a block mean's noise differ from sigma / sqrt(pixels) -- its
   smoothness from the variance of its finite differences, and the high threshold is
   the level at which the expected Euler characteristic of a Gaussian random field over
   the air equals ``false_alarms_per_series`` / number of scales (Worsley et al. 1992,
   1996). The false-alarm basis is thus the coarse grid's own resels.
4. Hysteresis on the coarse grids: 3-D components above ``grow_sigma`` that reach the
   high threshold are kept (labelled only in boxes around groups of cores, grown until
   they hold their components whole and joined where they overlap, never over the
   empty air between them: the same components as one labelling of the whole grid); each core above the threshold is grown to where the
   filtered contrast exceeds half of its own contrast (the 90th percentile in the core),
   which places its boundary at the half-contrast edge. A structure well measured at a
   fine scale is not found again at a coarser one; one poorly measured there is outlined
   at the coarser scale. Each structure is then refined at full resolution inside its
   box only: its voxels are the air pixels of its blocks; volume, centroid, mean and max
   HU, contrast-to-noise and slices are measured there. Structures smaller than
   ``min_volume_mm3`` or whose mean is less than ``min_contrast_hu`` above the air are
   dropped (blur tails of neighbours). The label overlay (int32, z, y, x) is written
   only inside the structures; its memory is laid out with z fastest, so a structure
   running through the whole series touches a few runs of memory rather than rows in
   every slice (the untouched rest stays with the operating system: the array lives in
   an anonymous memory map of small pages, see :func:`zero_int32`).
5. Classification (at full resolution): ``leaves_scan`` (reaches the first or last slice:
   arms, tubes, cables, a mattress), ``touching_body``, ``table``, ``fov_edge`` (touches
   the edge of the reconstruction circle or padding) and ``isolated`` (touches nothing
   and begins and ends inside the scanned range: the suspicious kind). A structure may
   stop up to half a block short of the air's edge on the coarse grid, so the touching
   distances are widened by half a block. Only the kinds in ``flag_kinds`` flag, and only
   when their contrast-to-noise (mean above the air over the air's pixel noise) is at
   least ``min_flag_contrast_to_noise``.

Threads: the work splits into parts that share nothing but their inputs, run on
``AIR_THREADS`` threads (default: two, or one on a single core; the batch sets it to a
worker's thread budget; 1 runs everything in the calling thread, in the same order):
the coarse grid (step 0) over slabs of slices cut on whole layers of blocks; steps 2-4
in lanes (:func:`scale_structures`): the finest scale's map and hysteresis, the coarser
scales' grids, maps and hysteresis, and the body's noise slice by slice (taken by
whichever thread is free), the scales then combined in order; the structures'
full-resolution refinement one structure per task (:func:`map_threads`); the label
overlay over ranges of rows (each a run of its memory). Each part writes only what it
owns, so every value is the single-thread one. (The checker also runs analyses side by
side; a batch worker with a budget of one thread sets ``AIR_THREADS`` to 1.)

Pages: the large arrays written whole (the coarse grid, the finest map, the pyramid's
sums, the level masks) are put on 2 MiB pages (:func:`dense_empty`), even where the
process asks numpy for small pages (the command line does): one page fault per 2 MiB
instead of one per 4 KiB. The label volume stays on small pages in a private map
(:func:`zero_int32`). No values change.

What may change with the data path: the values in the record are estimates, and the
coarse grid and the subsampled robust statistics are documented method choices; the
record keys, types and meaning stay as documented, and the reference checks
(tests/reference/test_air_reference.py) hold unchanged.

Single slices: the viewer's current-slice mode runs analyses on a one-slice volume, where
every structure touches the first and last slice. With ``single_slice_mode`` "auto" (the
default) a one-slice volume ignores the slice range, so a structure that touches nothing
in-plane is ``isolated``; ``true`` forces this for any volume, ``false`` never.

References
----------
.. [1] Hounsfield scale: air -1000 HU, water 0 HU by definition.
.. [2] Knutsson H, Westin C-F. Normalized and differential convolution. Proc. IEEE CVPR,
       1993, pp. 515-523.
.. [3] Worsley KJ, Evans AC, Marrett S, Neelin P. A three-dimensional statistical
       analysis for CBF activation studies in human brain. J Cereb Blood Flow Metab
       12(6), 1992.
.. [4] Worsley KJ, Marrett S, Neelin P, Vandal AC, Friston KJ, Evans AC. A unified
       statistical approach for determining significant signals in images of cerebral
       activation. Human Brain Mapping 4, 1996 (Euler characteristic densities; the
       formulas used here are from memory).
.. [5] Christianson O, et al. Automated technique to measure noise in clinical CT
       examinations. AJR 205(1), 2015 (the body's noise level: the mode of the local
       standard deviation in soft tissue).
.. [6] Block averaging to a coarser grid and refinement inside bounding boxes: common
       practice, no source.
"""
from __future__ import annotations

import functools
import math
import mmap
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
from scipy import ndimage, optimize, special

from ..errors import ProfileError
from ..regions import Regions, over_z
from ..results import AnalysisResult, Finding, Overlays, Point, Severity
from ..volume import Volume

NAME = "air"

KINDS = ("isolated", "touching_body", "table", "leaves_scan", "fov_edge")
#: How the findings name each kind (the record keeps the keys above).
KIND_WORDS = {
    "isolated": "isolated",
    "touching_body": "touching the body",
    "table": "on the table",
    "leaves_scan": "leaving the scanned slices",
    "fov_edge": "at the edge of the field of view",
}

#: Every setting and tolerance with its default.
DEFAULTS: dict[str, Any] = {
    "scales_mm": [1.5, 3.0, 6.0, 12.0],
    "false_alarms_per_series": 0.05,
    "min_high_sigma": 4.0,
    "grow_sigma": 2.0,
    "min_volume_mm3": 8.0,
    "min_contrast_hu": 20.0,
    "flag_kinds": ["isolated"],
    "min_flag_contrast_to_noise": 5.0,
    "air_reference_hu": -1000.0,
    "air_mean_tolerance_hu": 30.0,
    "min_air_noise_hu": 1.0,
    "min_air_to_body_noise": 0.2,
    "min_air_voxels": 2000,
    "clip_sigma": 4.0,
    "single_slice_mode": "auto",
    "max_structures": 100,
}

#: Where each default comes from.
SOURCES: dict[str, str] = {
    "scales_mm": "site choice: structures from a few mm to several cm",
    "false_alarms_per_series": "site choice; thresholds from Worsley et al. 1996 (Euler characteristic, from memory)",
    "min_high_sigma": "site choice",
    "grow_sigma": "site choice",
    "min_volume_mm3": "site choice",
    "min_contrast_hu": "site choice: ghosts worth a look are tens of HU above air; fainter one-block blotches are the texture of denoised reconstructions (common practice, no source)",
    "flag_kinds": "site choice: only structures that touch nothing are suspicious",
    "min_flag_contrast_to_noise": "site choice: a structure less than five times the air's pixel noise above the air is listed, not flagged (in streaked air such blobs are pieces of streaks)",
    "air_reference_hu": "Hounsfield scale: air -1000 HU by definition",
    "air_mean_tolerance_hu": "from memory; site choice",
    "min_air_noise_hu": "site choice",
    "min_air_to_body_noise": "site choice; body noise per Christianson et al., AJR 205(1), 2015",
    "min_air_voxels": "site choice",
    "clip_sigma": "site choice",
    "single_slice_mode": "site choice",
    "max_structures": "site choice",
}

_FWHM_FACTOR = 4.0 * math.log(2.0)

#: Threads of the analysis (1: everything in the calling thread; the batch sets it to a
#: worker's thread budget). The work splits into parts whose results do not depend on
#: the number of threads: slabs of slices of the coarse grid.
AIR_THREADS: int = max(1, min(2, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                              else (os.cpu_count() or 1)))

#: Target edge of a coarse-grid block (mm) and its largest allowed edge.
BLOCK_MM = 3.0
MAX_BLOCK_MM = 4.0

#: Samples for a robust SD on a coarse map: the relative standard error of 1.4826 x MAD
#: for Gaussian values is then about 0.4 %, which moves a 5-SD threshold by 0.02 SD.
MAX_ROBUST_SAMPLES = 100_000
#: Samples for the smoothness (a 1.4 % error in a variance changes the resels by 2 % and
#: the threshold by less than 0.01 SD).
RESEL_SAMPLES = 50_000


# ------------------------------------------------------------------------- settings
def resolve_settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    """``DEFAULTS`` overridden key by key by ``settings``.

    Raises
    ------
    ProfileError
        A key is not one of ``DEFAULTS`` or a value has the wrong form.
    """
    merged = dict(DEFAULTS)
    for key, value in (settings or {}).items():
        if key not in DEFAULTS:
            raise ProfileError(f"unknown setting {key!r} for the air analysis; known: {', '.join(DEFAULTS)}")
        merged[key] = value
    scales = [float(s) for s in merged["scales_mm"]]
    if not scales or any(s <= 0 for s in scales):
        raise ProfileError(f"air.scales_mm must be positive numbers, got {merged['scales_mm']!r}")
    merged["scales_mm"] = sorted(scales)
    unknown = [k for k in merged["flag_kinds"] if k not in KINDS]
    if unknown:
        raise ProfileError(f"air.flag_kinds names unknown kinds {unknown}; known: {', '.join(KINDS)}")
    if merged["single_slice_mode"] not in ("auto", True, False):
        raise ProfileError(f"air.single_slice_mode must be 'auto', true or false, got {merged['single_slice_mode']!r}")
    if not float(merged["false_alarms_per_series"]) > 0:
        raise ProfileError("air.false_alarms_per_series must be > 0")
    return merged


# ------------------------------------------------------------------- air statistics
def _air_sample(hu: np.ndarray, air: np.ndarray, max_samples: int = 200_000, n: int | None = None) -> np.ndarray:
    """Air voxel values, on a regular sub-grid when there are more than ``max_samples``
    (``n``: the number of air voxels, counted when not given). The SD of 2e5 Gaussian
    samples has a relative standard error of 0.16 %."""
    if n is None:
        n = int(np.count_nonzero(air))
    step = max(1, int(math.ceil((n / max_samples) ** (1.0 / 3.0))))
    sl = (slice(None, None, step),) * 3
    return hu[sl][air[sl]]


def order_median(values: np.ndarray) -> float:
    """``np.median`` of finite values (the same number), by one partition: the lower middle
    value of an even count is the largest of those below the upper one. NaN when empty."""
    v = np.asarray(values).ravel()
    n = v.size
    if n == 0:
        return float("nan")
    k = n // 2
    p = np.partition(v, k)
    if n % 2:
        return float(p[k])
    return float(np.mean(np.array([p[:k].max(), p[k]])))


def order_percentile(values: np.ndarray, q: float) -> float:
    """``np.percentile(values, q)`` of finite values (linear interpolation, the same
    number), by one partition, as :func:`order_median`. NaN when empty."""
    v = np.asarray(values).ravel()
    n = v.size
    if n == 0:
        return float("nan")
    idx = q / 100.0 * (n - 1)
    lo = int(math.floor(idx))
    hi = min(lo + 1, n - 1)
    p = np.partition(v, hi)
    b = p[hi]
    a = p[:hi].max() if hi > lo else b
    t = idx - lo
    d = b - a
    return float(b - d * (1.0 - t)) if t >= 0.5 else float(a + d * t)  # numpy's two-sided interpolation


def robust_mean_and_noise(
    values: np.ndarray, clip_sigma: float = 4.0, iterations: int = 3, max_median_samples: int = 100_000
) -> tuple[float, float]:
    """Mean and standard deviation of ``values`` after iterative robust clipping
    (float32 values stay float32; the sums are accumulated in float64).

    Values farther than ``clip_sigma`` robust standard deviations (1.4826 x MAD) from the
    median are left out, so structures in the air do not bias the air's statistics. The
    median and MAD that set the clipping bounds come from a regular subsample of at most
    ``max_median_samples`` values (their relative standard error is then about 0.4 %,
    which moves a 4-SD bound by less than 0.02 SD); the mean and SD use every value kept.

    References
    ----------
    .. [1] Rousseeuw PJ, Croux C. Alternatives to the median absolute deviation.
           J Am Stat Assoc 88(424), 1993 (1.4826 x MAD estimates a Gaussian SD).
    """
    v = np.asarray(values)
    if v.dtype not in (np.float32, np.float64):
        v = v.astype(np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return float("nan"), float("nan")
    keep = v
    for _ in range(iterations):
        part = _subsample(keep, max_median_samples)
        med = order_median(part)
        mad = 1.4826 * order_median(np.abs(part - med))
        if mad <= 0:
            break
        keep = v[np.abs(v - v.dtype.type(med)) <= v.dtype.type(clip_sigma * mad)]
    mean = float(keep.mean(dtype=np.float64))
    return mean, float(np.sqrt(np.mean(np.square(keep - mean, dtype=np.float64))))


def _padded_box(mask2d: np.ndarray, pad: int) -> tuple[slice, slice] | None:
    """Bounding box of a (y, x) mask grown by ``pad`` pixels (clipped); None when empty.

    Erosions and local filters of the mask's pixels computed on this box equal those of
    the whole image: everything within ``pad`` of the mask lies inside it.
    """
    rows = np.flatnonzero(mask2d.any(axis=1))
    if rows.size == 0:
        return None
    cols = np.flatnonzero(mask2d.any(axis=0))
    ny, nx = mask2d.shape
    return (
        slice(max(0, int(rows[0]) - pad), min(ny, int(rows[-1]) + 1 + pad)),
        slice(max(0, int(cols[0]) - pad), min(nx, int(cols[-1]) + 1 + pad)),
    )


def body_noise_hu(volume: Volume, regions: Regions, max_slices: int = 4) -> float:
    """The body's noise level: mode of the local SD histogram in soft tissue.

    Local SD over about 6 mm squares, on up to ``max_slices`` evenly spaced slices, at
    soft-tissue pixels (-100..+200 HU) of the body eroded by a square of 6 mm half-width
    (float32 CT numbers). NaN when there are
    too few such pixels. Each slice is worked on the body's bounding box grown by the
    filter and erosion sizes (the same values as on the whole slice).

    References
    ----------
    .. [1] Christianson O, et al. Automated technique to measure noise in clinical CT
           examinations. AJR 205(1), 2015.
    """
    return body_noise_mode([body_slice_local_sd(volume, regions, int(z)) for z in body_noise_slices(volume, max_slices)])


def body_noise_slices(volume: Volume, max_slices: int = 4) -> np.ndarray:
    """The up to ``max_slices`` evenly spaced slices of :func:`body_noise_hu`."""
    nz = volume.hu.shape[0]
    return np.unique(np.linspace(0, nz - 1, min(max_slices, nz)).round().astype(int))


def body_slice_local_sd(volume: Volume, regions: Regions, z: int) -> np.ndarray | None:
    """The local SDs of :func:`body_noise_hu` on slice ``z`` (None when it has too little
    soft tissue); each slice on its own, so slices can be worked side by side."""
    dy, dx = volume.spacing_mm[1:]
    size = max(3, int(round(6.0 / min(dy, dx))) | 1)
    erode = max(1, int(round(6.0 / min(dy, dx))))
    box = _padded_box(regions.body[z], size + erode + 2)
    if box is None:
        return None
    inner = eroded_in_plane(regions.body[z][box], erode)
    img = volume.hu[z][box].astype(np.float32)
    tissue = inner & (img > -100) & (img < 200)
    if tissue.sum() < 50:
        return None
    mean = ndimage.uniform_filter(img, size)
    sq = ndimage.uniform_filter(img * img, size)
    sd = np.sqrt(np.clip(sq - mean * mean, 0, None))
    ok = eroded_in_plane(tissue, size // 2)
    return sd[ok if ok.sum() >= 20 else tissue]


def body_noise_mode(per_slice: list[np.ndarray | None]) -> float:
    """The mode of the histogram of the local SDs of the slices (in slice order; None
    for a slice left out); NaN when there are none.

    References
    ----------
    .. [1] Christianson O, et al. AJR 205(1), 2015.
    """
    sds = [sd for sd in per_slice if sd is not None]
    if not sds:
        return float("nan")
    sd = np.concatenate(sds)
    sd = sd[np.isfinite(sd)]  # non-finite CT numbers nearby spoil a local SD
    if sd.size == 0:
        return float("nan")
    sd = _subsample(sd, MAX_ROBUST_SAMPLES)  # the histogram's mode from a regular subsample
    hist, edges = np.histogram(sd, bins=max(10, min(200, sd.size // 20)))
    i = int(np.argmax(hist))
    return float(0.5 * (edges[i] + edges[i + 1]))


def eroded_in_plane(mask2d: np.ndarray, half: int) -> np.ndarray:
    """``mask2d`` eroded by a square of half-width ``half`` pixels (outside the image
    counts as background): a separable minimum filter."""
    out = ndimage.minimum_filter(mask2d.view(np.uint8), size=2 * half + 1, mode="constant", cval=0)
    return out.view(bool)


# ------------------------------------------------------------------------ pyramid
def _pad_to(a: np.ndarray, factors: tuple[int, int, int]) -> np.ndarray:
    pads = [(0, (-n) % f) for n, f in zip(a.shape, factors)]
    return np.pad(a, pads) if any(p[1] for p in pads) else a


def block_sum(a: np.ndarray, factors: tuple[int, int, int]) -> np.ndarray:
    """Sum of ``a`` over blocks of ``factors`` (z, y, x) as float32; the edges are zero-padded.

    Separable: the sums along one axis at a time (strided views added), so each step
    reads its input once and the later steps work on arrays already reduced. Exact for
    integer-valued arrays (counts); otherwise equal to any other summation order up to
    float32 rounding.
    """
    if factors == (1, 1, 1):
        return a.astype(np.float32, copy=True)
    t = _pad_to(a, factors)
    for axis, f in enumerate(factors):
        if f == 1:
            continue
        parts = [t[(slice(None),) * axis + (slice(o, None, f),)] for o in range(f)]
        acc = np.add(parts[0], parts[1], dtype=np.float32, casting="unsafe")
        for q in parts[2:]:
            np.add(acc, q, out=acc, casting="unsafe")
        t = acc
    return t if t.dtype == np.float32 else t.astype(np.float32)


def block_count(mask: np.ndarray, factors: tuple[int, int, int]) -> np.ndarray:
    """Number of True voxels of ``mask`` in blocks of ``factors`` (z, y, x), as float32.

    Integer sums of strided views, one axis at a time (exact; the edges are zero-padded).
    """
    cells = int(np.prod(factors))
    dtype = np.uint8 if cells < 256 else (np.uint16 if cells < 65536 else np.int64)
    t = _pad_to(mask, factors).view(np.uint8)
    for axis, f in enumerate(factors):
        if f == 1:
            continue
        parts = [t[(slice(None),) * axis + (slice(o, None, f),)] for o in range(f)]
        acc = parts[0].astype(dtype)
        for q in parts[1:]:
            np.add(acc, q, out=acc, casting="unsafe")
        t = acc
    return t.astype(np.float32)


# ------------------------------------------------------------------- coarse grid
def block_factors(spacing_mm: tuple[float, float, float], nz: int) -> tuple[int, int, int]:
    """Pixels per block (z, y, x) of the coarse grid: about ``BLOCK_MM`` and at most
    ``MAX_BLOCK_MM`` along each axis, at least one pixel; along z also at most a quarter
    of the slices (and one for a single slice).

    References
    ----------
    .. [1] Block averaging to a coarser grid: common practice, no source.
    """

    def along(d: float) -> int:
        k = max(1, int(round(BLOCK_MM / float(d))))
        while k > 1 and k * float(d) > MAX_BLOCK_MM:
            k -= 1
        return k

    dz, dy, dx = spacing_mm
    kz = min(along(dz), max(1, nz // 4)) if nz > 1 else 1
    return (kz, along(dy), along(dx))


def _sum_along(t: np.ndarray, axis: int, f: int, dtype: np.dtype) -> np.ndarray:
    """Sums of ``f`` consecutive entries along ``axis`` (strided views added; a short
    last block sums what there is)."""
    if f == 1:
        return t if t.dtype == dtype else t.astype(dtype)
    n = t.shape[axis]
    m = -(-n // f)
    lead = (slice(None),) * axis
    if n % f == 0:
        a, b = t[lead + (slice(0, None, f),)], t[lead + (slice(1, None, f),)]
        acc = np.add(a, b, out=dense_empty(a.shape, dtype), dtype=dtype, casting="unsafe")
        for o in range(2, f):
            np.add(acc, t[lead + (slice(o, None, f),)], out=acc, casting="unsafe")
        return acc
    shape = list(t.shape)
    shape[axis] = m
    acc = np.zeros(shape, dtype=dtype)
    for o in range(f):
        part = t[lead + (slice(o, None, f),)]
        view = acc[lead + (slice(0, part.shape[axis]),)]
        np.add(view, part, out=view, casting="unsafe")
    return acc


def _grid_sum(t: np.ndarray, factors: tuple[int, int, int], dtype: np.dtype) -> np.ndarray:
    for axis, f in enumerate(factors):
        t = _sum_along(t, axis, f, dtype)
    return t


def _count_dtype(cells: int) -> np.dtype:
    return np.dtype(np.uint8 if cells < 256 else (np.uint16 if cells < 65536 else np.int64))


def _changed_pixels(a: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Flat indices where the bool planes ``a`` and ``ref`` differ (compared eight
    pixels at a time where the plane's size allows)."""
    fa, fr = a.reshape(-1), ref.reshape(-1)
    if fa.size % 8 == 0 and fa.flags.c_contiguous and fr.flags.c_contiguous:
        words = np.flatnonzero(fa.view(np.uint64) != fr.view(np.uint64))
        if words.size == 0:
            return words
        idx = (words[:, None] * 8 + np.arange(8)).reshape(-1)
        return idx[fa[idx] != fr[idx]]
    return np.flatnonzero(fa != fr)


def _masked_plane_sum(h: np.ndarray, a: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Sum over the slices of ``h`` (k, y, x) of the pixels where ``a`` holds, into ``out`` (y, x).

    The slices are added first and masked once by the first slice's mask; the pixels
    whose mask differs from it in a later slice (few: the body changes slowly along z)
    are put right one by one.
    """
    with np.errstate(invalid="ignore"):  # inf x 0 outside the air: the caller checks the block sums
        return _masked_plane_sum_unchecked(h, a, out)


def _masked_plane_sum_unchecked(h: np.ndarray, a: np.ndarray, out: np.ndarray) -> np.ndarray:
    a0 = a[0]
    if h.shape[0] == 1:
        return np.multiply(h[0], a0.view(np.uint8), out=out, casting="unsafe")
    np.add(h[0], h[1], out=out, casting="unsafe")
    for k in range(2, h.shape[0]):
        np.add(out, h[k], out=out, casting="unsafe")
    np.multiply(out, a0.view(np.uint8), out=out, casting="unsafe")
    flat = out.reshape(-1)
    for k in range(1, h.shape[0]):
        idx = _changed_pixels(a[k], a0)
        if idx.size:
            sign = np.where(a[k].reshape(-1)[idx], np.float32(1), np.float32(-1))
            flat[idx] += sign * h[k].reshape(-1)[idx]
    return out


def _mask_plane_count(a: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Number of slices of the bool ``a`` (k, y, x) that hold at each pixel, into the
    integer plane ``out`` (exact while k is below its largest value)."""
    if a.shape[0] == 1:
        out[...] = a[0]
        return out
    np.add(a[0].view(np.uint8), a[1].view(np.uint8), out=out, casting="unsafe")
    for k in range(2, a.shape[0]):
        np.add(out, a[k].view(np.uint8), out=out, casting="unsafe")
    return out


_PACKED_WORDS = {2: np.dtype(np.uint16), 4: np.dtype(np.uint32), 8: np.dtype(np.uint64)}


def packed_mask_count_fits(a: np.ndarray, ky: int, kx: int) -> bool:
    """Whether :func:`packed_mask_block_count` applies: a C-contiguous bool layer, ``kx``
    of 2, 4 or 8 dividing the row, and fewer than 256 pixels per block (byte counts)."""
    word = _PACKED_WORDS.get(kx)
    k, ny, nx = a.shape
    return bool(word is not None and a.dtype == np.bool_ and a.flags.c_contiguous and nx % kx == 0 and ny % ky == 0 and k * ky * kx < 256)


def packed_mask_block_count(a: np.ndarray, ky: int, kx: int, words: np.ndarray, wrows: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Number of True pixels of the bool layer ``a`` (k, y, x) in each block of ``k`` x
    ``ky`` x ``kx`` pixels, into ``out`` (y / ky, x / kx), with the ``kx`` pixels of a
    block row packed into one unsigned word.

    Each byte of a word is one pixel (0 or 1); words are added slice by slice and row by
    row (every byte stays below 256, so no byte carries into the next), and the bytes of
    a word are then summed by one multiplication with 0x01...01, whose top byte is their
    sum (exact integers). ``words`` (y, x / kx) and ``wrows`` (y / ky, x / kx) are
    buffers of the word type; :func:`packed_mask_count_fits` must hold.

    References
    ----------
    .. [1] Byte sums within a word by multiplication ("SIMD within a register"): common
           practice, no source.
    """
    k, ny, nx = a.shape
    w = a.view(np.uint8).reshape(k, ny, nx).view(words.dtype)  # (k, y, x / kx)
    if k == 1:
        words[...] = w[0]
    else:
        np.add(w[0], w[1], out=words)
        for i in range(2, k):
            np.add(words, w[i], out=words)
    _plane_block_sum(words, ky, 1, wrows, wrows)
    ones = words.dtype.type(int.from_bytes(b"\x01" * kx, "little"))
    np.multiply(wrows, ones, out=wrows)
    np.right_shift(wrows, words.dtype.type(8 * (kx - 1)), out=wrows)
    out[...] = wrows
    return out


def _plane_block_sum(plane: np.ndarray, ky: int, kx: int, rows: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Sums of ``plane`` (y, x) over blocks of ``ky`` x ``kx`` pixels into ``out``, through
    the row buffer ``rows`` (y / ky, x); both dimensions whole multiples of the block."""
    ny, nx = plane.shape
    if ky == 1:
        rows[...] = plane
    else:
        v = plane.reshape(ny // ky, ky * nx)  # the ky rows of a block side by side
        np.add(v[:, 0:nx], v[:, nx : 2 * nx], out=rows, casting="unsafe")
        for o in range(2, ky):
            np.add(rows, v[:, o * nx : (o + 1) * nx], out=rows, casting="unsafe")
    if kx == 1:
        out[...] = rows
        return out
    np.add(rows[:, 0::kx], rows[:, 1::kx], out=out, casting="unsafe")
    for o in range(2, kx):
        np.add(out, rows[:, o::kx], out=out, casting="unsafe")
    return out


def coarse_air_grid(hu: np.ndarray, air: np.ndarray, factors: tuple[int, int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Sums of the CT number over the air pixels of each block, and the number of air
    pixels in it (float32 grids of ``ceil(shape / factors)`` cells).

    The one full-resolution pass of the analysis, one layer of blocks (``factors[0]``
    slices) at a time: the slices are added and masked once (:func:`_masked_plane_sum`),
    then summed over the block's rows and columns into buffers made once; the layer's
    mask, just read, is counted with the pixels of a block row packed into one word
    (:func:`packed_mask_block_count`; byte by byte where that does not apply), integer
    sums, exact. A block whose
    air holds a non-finite CT number is left out (count 0); a non-finite value outside
    the air is ignored.

    References
    ----------
    .. [1] Block averaging to a coarser grid: common practice, no source.
    """
    kz, ky, kx = factors
    nz, ny, nx = hu.shape
    if ny % ky or nx % kx:  # edges that are not whole blocks: the general block sums
        return _coarse_air_grid_ragged(hu, air, factors)
    out_shape = (-(-nz // kz), ny // ky, nx // kx)
    sums = dense_empty(out_shape, np.float32)  # written whole: on large pages
    counts = dense_empty(out_shape, np.float32)
    over_z(lambda z0, z1: _coarse_layers(hu, air, factors, sums, counts, z0, z1), nz, multiple=kz,
           threads=AIR_THREADS)
    for b in _non_finite_layers(sums):  # put right once, after the pass (the same values)
        z0 = b * kz
        h, a = hu[z0 : z0 + kz], air[z0 : z0 + kz]
        part = _exact_masked_sum(h, a, (1, ky, kx), factors)
        bad = ~np.isfinite(part)
        counts[b][bad] = 0.0
        sums[b] = np.where(bad, np.float32(0), part)
    return sums, counts


def _coarse_layers(
    hu: np.ndarray, air: np.ndarray, factors: tuple[int, int, int], sums: np.ndarray, counts: np.ndarray, z0: int, z1: int
) -> None:
    """The layers of blocks of slices ``z0 .. z1`` (``z0`` a multiple of ``factors[0]``)
    of :func:`coarse_air_grid`, into ``sums`` and ``counts``, with buffers of its own (so
    disjoint slabs run on separate threads)."""
    kz, ky, kx = factors
    _, ny, nx = hu.shape
    cdt = _count_dtype(int(np.prod(factors)))
    plane = np.empty((ny, nx), dtype=np.float32)
    rows = np.empty((ny // ky, nx), dtype=np.float32)
    cplane = np.empty((ny, nx), dtype=cdt)
    crows = np.empty((ny // ky, nx), dtype=cdt)
    word = _PACKED_WORDS.get(kx, np.dtype(np.uint8))
    words = np.empty((ny, nx // kx), dtype=word)
    wrows = np.empty((ny // ky, nx // kx), dtype=word)
    for z in range(z0, z1, kz):
        b = z // kz
        h, a = hu[z : min(z + kz, z1)], air[z : min(z + kz, z1)]
        _plane_block_sum(_masked_plane_sum(h, a, plane), ky, kx, rows, sums[b])
        if packed_mask_count_fits(a, ky, kx):  # the layer's mask is in the cache
            packed_mask_block_count(a, ky, kx, words, wrows, counts[b])
        else:
            _plane_block_sum(_mask_plane_count(a, cplane), ky, kx, crows, counts[b])


def _non_finite_layers(grid: np.ndarray) -> np.ndarray:
    """Indices of the layers (axis 0) of ``grid`` holding a non-finite value: one check of
    the whole grid (a finite sum of the whole grid means every cell is finite)."""
    with np.errstate(over="ignore", invalid="ignore"):
        if math.isfinite(float(grid.sum(dtype=np.float64))):
            return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(~np.isfinite(grid).reshape(grid.shape[0], -1).all(axis=1))


def _coarse_air_grid_ragged(hu: np.ndarray, air: np.ndarray, factors: tuple[int, int, int]) -> tuple[np.ndarray, np.ndarray]:
    """:func:`coarse_air_grid` for images that are not whole blocks (general block sums)."""
    kz = factors[0]
    in_plane = (1,) + tuple(factors[1:])
    cdt = _count_dtype(int(np.prod(factors)))
    out_shape = tuple(-(-n // f) for n, f in zip(hu.shape, factors))
    sums = np.empty(out_shape, dtype=np.float32)
    counts = np.empty(out_shape, dtype=np.float32)
    plane = np.empty((1,) + hu.shape[1:], dtype=np.float32)
    for b, z0 in enumerate(range(0, hu.shape[0], kz)):
        h, a = hu[z0 : z0 + kz], air[z0 : z0 + kz]
        v = _masked_plane_sum(h, a, plane[0])
        part = _grid_sum(v[None], in_plane, np.dtype(np.float32))[0]
        cnt = _grid_sum(a.view(np.uint8), factors, cdt)[0]
        if not np.isfinite(part).all():
            part = _exact_masked_sum(h, a, in_plane, factors)
            cnt = np.where(np.isfinite(part), cnt, 0)
            part = np.where(np.isfinite(part), part, np.float32(0))
        sums[b] = part
        counts[b] = cnt
    return sums, counts


def _exact_masked_sum(h: np.ndarray, a: np.ndarray, in_plane: tuple[int, ...], factors: tuple[int, int, int]) -> np.ndarray:
    """Block sums over the air pixels by assignment (values outside the air never enter);
    non-finite only where an air pixel is."""
    v = np.where(a, h, np.float32(0)).astype(np.float32, copy=False)
    return _grid_sum(v, factors, np.dtype(np.float32))[0]


def scale_levels(
    base: tuple[int, int, int], spacing_mm: tuple[float, float, float], scales_mm: list[float], nz: int
) -> list[tuple[tuple[int, int, int], tuple[float, float, float]]]:
    """For each scale: its grid (block factors relative to the coarse grid) and its
    Gaussian's SD in cells of that grid (0 where not filtered).

    A scale of SD ``s`` is measured on blocks of about ``2 s`` (the nearest power of two
    times the coarse block, so each grid is made from the previous one; its Gaussian
    spans about half a cell and needs five taps); a scale whose blocks would be the coarse
    grid's own and whose SD is at most 0.6 of a cell is the block mean itself (no
    Gaussian). Along z the total block is at most a quarter of the slices.
    """
    cell_mm = [b * d for b, d in zip(base, spacing_mm)]
    out = []
    for s in scales_mm:
        rel = []
        for axis, c in enumerate(cell_mm):
            r = 2 ** max(0, int(round(math.log2(max(2.0 * s / c, 1.0)))))
            if axis == 0:
                r = 1 if nz == 1 else min(r, max(1, (nz // 4) // base[0]))
            rel.append(r)
        sig = tuple(0.0 if (axis == 0 and nz == 1) else s / (r * c) for axis, (r, c) in enumerate(zip(rel, cell_mm)))
        if all(r == 1 for r in rel) and max(sig) <= 0.6:
            sig = (0.0, 0.0, 0.0)
        out.append((tuple(rel), sig))
    return out


def _box_scale(sums: np.ndarray, counts: np.ndarray, cell: float) -> tuple[np.ndarray, np.ndarray]:
    """Block means as the matched filter: the contrast divided by its white-noise growth
    (``sqrt(cell / count)``), that is ``sums / sqrt(max(count, 1) cell)``, and validity
    (at least half the block is air). The contrast itself (``sums / count``) is worked
    out only where it is needed (:meth:`ScaleMap.contrast_in`)."""
    valid = counts >= 0.5 * cell
    m = dense_empty(counts.shape, np.float32)
    step = _cache_planes(counts)
    for z0 in range(0, counts.shape[0], step):  # a few planes at a time: the four steps stay in the cache
        sl = slice(z0, z0 + step)
        mz = m[sl]
        np.maximum(counts[sl], np.float32(1.0), out=mz)
        np.multiply(mz, np.float32(cell), out=mz)
        np.sqrt(mz, out=mz)
        np.divide(sums[sl], mz, out=mz)
    return m, valid


def _cache_planes(a: np.ndarray, chunk_bytes: int = 1 << 18) -> int:
    """How many planes (axis 0) of ``a`` make about ``chunk_bytes`` (at least one)."""
    plane = max(1, a[0].nbytes) if a.shape[0] else 1
    return max(1, chunk_bytes // plane)


@dataclass
class ScaleMap:
    """One scale of the matched filter on its grid.

    ``z`` is the filtered contrast divided by its white-noise growth (HU, float32), left
    as computed where the cells are not valid; its air has median ``z_median`` and robust
    SD ``noise_hu``. Levels are stated in units of that SD above that median
    (:meth:`above`), so the map is never normalised as a whole.
    """

    sigma_mm: float
    factors: tuple[int, int, int]
    z: np.ndarray  # contrast / white-noise growth, float32 (meaningless where not valid)
    valid: np.ndarray  # bool: enough air around to measure
    z_median: float  # median of z over the air
    noise_hu: float  # robust SD of z over the air
    threshold: float  # high threshold in units of that SD
    resels: float
    contrast_hu: np.ndarray | None = None  # filtered contrast above the air; None: sums / counts
    sums: np.ndarray | None = None  # block-mean scale: contrast summed over each block's air
    counts: np.ndarray | None = None  # block-mean scale: air pixels per block

    def above(self, level_sd: float, box: tuple[slice, ...] | None = None) -> np.ndarray:
        """Valid cells (of ``box``) whose normalised significance exceeds ``level_sd``."""
        box = box if box is not None else (slice(None),) * self.z.ndim
        z = self.z[box]
        out = np.greater(z, np.float32(self.z_median + level_sd * self.noise_hu), out=dense_empty(z.shape, np.bool_))
        return np.logical_and(out, self.valid[box], out=out)

    def contrast_in(self, box: tuple[slice, ...]) -> np.ndarray:
        """The filtered contrast above the air (HU) in ``box``."""
        if self.contrast_hu is not None:
            return self.contrast_hu[box]
        return np.divide(self.sums[box], np.maximum(self.counts[box], np.float32(1.0)))


def _gaussian_weights(sigma: float, truncate: float = 3.0) -> np.ndarray:
    """Normalised 1-D Gaussian taps of radius ``int(truncate sigma + 0.5)`` (as scipy.ndimage)."""
    r = int(truncate * float(sigma) + 0.5)
    x = np.arange(-r, r + 1, dtype=np.float64)
    w = np.exp(-0.5 * (x / float(sigma)) ** 2)
    return w / w.sum()


def gaussian_matrix(n: int, sigma: float, truncate: float = 3.0) -> np.ndarray:
    """The (n, n) float32 matrix of a 1-D Gaussian filter with "reflect" edges.

    Row i holds the taps of output i, folded back at the ends as scipy.ndimage's "reflect"
    mode does (d c b a | a b c d), so ``M @ line`` equals ``gaussian_filter1d(line, sigma,
    mode="reflect", truncate=truncate)`` up to float rounding. A new array each call (see
    :func:`_banded_gaussian` for the shared, read-only one).
    """
    return _gaussian_matrix(int(n), float(sigma), float(truncate))


@functools.lru_cache(maxsize=32)
def _banded_gaussian(n: int, sigma: float, block: int) -> tuple[np.ndarray, tuple[tuple[int, int, int, int], ...]]:
    """:func:`gaussian_matrix` (read-only, made once per size and SD) with, for each run of
    ``block`` output rows, the columns its taps reach: (i0, i1, c0, c1)."""
    m = _gaussian_matrix(n, sigma, 3.0)
    m.setflags(write=False)
    bands = []
    for i0 in range(0, n, block):
        i1 = min(n, i0 + block)
        cols = np.flatnonzero(m[i0:i1].any(axis=0))
        bands.append((i0, i1, int(cols[0]), int(cols[-1]) + 1))
    return m, tuple(bands)


def _gaussian_matrix(n: int, sigma: float, truncate: float) -> np.ndarray:
    w = _gaussian_weights(sigma, truncate)
    r = w.size // 2
    j = np.mod(np.arange(n)[:, None] + np.arange(-r, r + 1)[None], 2 * n)
    j = np.where(j >= n, 2 * n - 1 - j, j)
    m = np.zeros((n, n), dtype=np.float64)
    np.add.at(m, (np.repeat(np.arange(n), w.size), j.ravel()), np.tile(w, n))
    return m.astype(np.float32)


def _gaussian_along(a: np.ndarray, sigma: float, axis: int, out: np.ndarray, block: int = 32) -> np.ndarray:
    """1-D Gaussian of ``a`` along ``axis`` (0 or 1 of a 3-D array) into ``out`` (not ``a``).

    A banded matrix product, ``block`` outputs at a time: for the slow, strided axes this
    is several times faster than a line-by-line convolution.
    """
    m, bands = _banded_gaussian(int(a.shape[axis]), float(sigma), int(block))
    src = np.moveaxis(a, axis, -2)
    dst = np.moveaxis(out, axis, -2)
    for i0, i1, c0, c1 in bands:
        np.matmul(m[i0:i1, c0:c1], src[..., c0:c1, :], out=dst[..., i0:i1, :])
    return out


def gaussian_3d(a: np.ndarray, sigma_vox: tuple[float, float, float], out: np.ndarray, work: np.ndarray) -> np.ndarray:
    """Separable Gaussian of a 3-D float32 array with "reflect" edges, truncated at 3 SD.

    The same filter as ``ndimage.gaussian_filter(a, sigma_vox, mode="reflect",
    truncate=3.0)`` up to float rounding: z and y by banded matrix products, x by
    ``gaussian_filter1d``; an axis whose sigma is 0 is left as is. ``out`` may be ``a``;
    ``work`` is a scratch array of the same shape.
    """
    cur = a
    for axis in (0, 1):
        if sigma_vox[axis] > 0:
            target = work if cur is out else out
            _gaussian_along(cur, sigma_vox[axis], axis, target)
            cur = target
    if sigma_vox[2] > 0:
        ndimage.gaussian_filter1d(cur, sigma_vox[2], axis=2, output=out, mode="reflect", truncate=3.0)
    elif cur is not out:
        out[...] = cur
    return out


def _filtered_scale(
    sums: np.ndarray, counts: np.ndarray, cell: float, sigma_vox: tuple[float, float, float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Normalised convolution: filtered contrast, its white-noise growth factor, validity.

    ``sums`` is filtered in place (it becomes the contrast); ``counts`` is left as is.

    References
    ----------
    .. [1] Knutsson H, Westin C-F. Normalized and differential convolution. CVPR 1993.
    """
    work = np.empty(counts.shape, dtype=np.float32)
    gc = gaussian_3d(counts, sigma_vox, np.empty(counts.shape, dtype=np.float32), work)
    g2c = gaussian_3d(counts, tuple(s / math.sqrt(2.0) for s in sigma_vox), np.empty(counts.shape, dtype=np.float32), work)
    valid = (counts >= 0.5 * cell) & (gc >= 0.5 * cell)
    contrast = gaussian_3d(sums, sigma_vox, sums, work)
    del work
    np.maximum(gc, 1e-6, out=gc)
    np.divide(contrast, gc, out=contrast)
    # var(weighted mean) relative to the interior: N * (G'*C) / (G*C)^2 (white noise)
    growth = g2c
    np.multiply(growth, cell, out=growth)
    np.divide(growth, gc, out=growth)
    np.divide(growth, gc, out=growth)
    del gc
    np.sqrt(growth, out=growth)
    np.maximum(growth, 1.0, out=growth)
    return contrast, growth, valid


def _plane_step(valid: np.ndarray, max_samples: int = MAX_ROBUST_SAMPLES, n: int | None = None) -> int:
    """Every how many planes (axis 0) to sample so that about ``max_samples`` valid cells
    remain (``n``: the number of valid cells, counted when not given)."""
    if n is None:
        n = int(np.count_nonzero(valid))
    return max(1, min(valid.shape[0], -(-n // max_samples)))


def _smoothness_resels(z: np.ndarray, valid: np.ndarray, sd: float = 1.0, n: int | None = None) -> float:
    """Resel count of the air: voxels / prod(FWHM), FWHM per axis from finite differences.

    ``z / sd`` is the unit-variance field (``n``: the number of valid cells, counted when
    not given). The differences are taken on every ``k``-th plane (about
    ``MAX_ROBUST_SAMPLES`` of them), between neighbours that are both valid.

    References
    ----------
    .. [1] Worsley KJ, et al. J Cereb Blood Flow Metab 12(6), 1992;
           FWHM = sqrt(4 ln 2 / var(dZ/dx)) for a unit-variance field (from memory).
    """
    n = float(np.count_nonzero(valid)) if n is None else float(n)
    step = _plane_step(valid, n=int(n))
    fwhm = 1.0
    for axis in range(3):
        if z.shape[axis] < 2:
            continue
        if axis == 0:
            z0, z1, v0, v1 = z[0:-1:step], z[1::step], valid[0:-1:step], valid[1::step]
        else:
            lo = (slice(None),) * axis + (slice(0, -1),)
            hi = (slice(None),) * axis + (slice(1, None),)
            zs, vs = z[::step], valid[::step]
            z0, z1, v0, v1 = zs[lo], zs[hi], vs[lo], vs[hi]
        both = v0 & v1
        if np.count_nonzero(both) < 20:
            continue
        d = z1[both] - z0[both]
        var = (_robust_sd(d, RESEL_SAMPLES)[1] / sd) ** 2
        fwhm *= max(1.0, math.sqrt(_FWHM_FACTOR / max(var, 1e-12)))
    return n / fwhm


def expected_euler_characteristic(t: float, resels: float, dims: int) -> float:
    """Expected Euler characteristic of a unit Gaussian field above ``t``.

    Only the volume term (``dims`` = 2 or 3) and the 0-dimensional term are kept.

    References
    ----------
    .. [1] Worsley KJ, et al. Human Brain Mapping 4, 1996 (densities from memory).
    """
    e = math.exp(-0.5 * t * t)
    rho0 = 0.5 * special.erfc(t / math.sqrt(2.0))
    if dims >= 3:
        rho = _FWHM_FACTOR**1.5 / (2.0 * math.pi) ** 2 * (t * t - 1.0) * e
    else:
        rho = _FWHM_FACTOR / (2.0 * math.pi) ** 1.5 * t * e
    return rho0 + resels * rho


def threshold_for_false_alarms(alpha: float, resels: float, dims: int) -> float:
    """The level ``t`` at which the expected Euler characteristic equals ``alpha``.

    References
    ----------
    .. [1] Worsley KJ, et al. Human Brain Mapping 4, 1996.
    """
    f = lambda t: expected_euler_characteristic(t, resels, dims) - alpha  # noqa: E731
    if f(1.5) <= 0:
        return 1.5
    if f(20.0) > 0:
        return 20.0
    return float(optimize.brentq(f, 1.5, 20.0))


def _subsample(values: np.ndarray, max_samples: int = MAX_ROBUST_SAMPLES) -> np.ndarray:
    step = max(1, values.size // max_samples)
    return values[::step]


def _robust_sd(values: np.ndarray, max_samples: int = MAX_ROBUST_SAMPLES) -> tuple[float, float]:
    """Median and 1.4826 x MAD (on a regular subsample of at most ``max_samples`` values)."""
    values = _subsample(values, max_samples)
    med = order_median(values)
    return med, 1.4826 * order_median(np.abs(values - med))


def scale_map(
    k: int,
    S: np.ndarray,
    C: np.ndarray,
    sums: np.ndarray,
    base: tuple[int, int, int],
    spacing_mm: tuple[float, float, float],
    s: dict[str, Any],
    noise_floor_hu: float,
    nz: int,
) -> ScaleMap | None:
    """Scale ``k`` of ``s["scales_mm"]`` (see :func:`scale_structures`) from its grid
    ``S``, ``C`` (block sums of the coarse grid's ``sums`` and ``counts``; ``S`` is
    filtered in place unless it is ``sums`` itself). None when fewer than 20 cells of the
    grid can be measured.

    Each scale needs only its own grid, so scales can be made side by side.

    References
    ----------
    .. [1] Knutsson H, Westin C-F. CVPR 1993; Worsley KJ, et al. Human Brain Mapping 4, 1996.
    """
    levels = scale_levels(base, spacing_mm, s["scales_mm"], nz)
    rel, sig = levels[k]
    sigma_mm = s["scales_mm"][k]
    dims = 3 if nz > 1 else 2
    alpha = float(s["false_alarms_per_series"]) / len(levels)
    cell = float(np.prod(base)) * float(np.prod(rel))
    extra: dict[str, Any] = {}
    if max(sig) == 0.0:
        z, valid = _box_scale(S, C, cell)
        extra = {"sums": S, "counts": C}
    else:
        contrast, growth, valid = _filtered_scale(S.copy() if S is sums else S, C, cell, sig)
        z = np.divide(contrast, growth, out=growth)  # contrast / white-noise growth, in place
        extra = {"contrast_hu": contrast}
    n_valid = int(np.count_nonzero(valid))
    if n_valid < 20:
        return None
    step = _plane_step(valid, n=n_valid)
    med, sd = _robust_sd(z[::step][valid[::step]])
    sd = max(sd, noise_floor_hu / math.sqrt(cell))
    resels = _smoothness_resels(z, valid, sd, n_valid)
    t = max(float(s["min_high_sigma"]), threshold_for_false_alarms(alpha, resels, dims))
    factors = tuple(b * r for b, r in zip(base, rel))
    return ScaleMap(sigma_mm, factors, z, valid, med, sd, t, resels, **extra)


def scale_structures(
    sums: np.ndarray,
    counts: np.ndarray,
    base: tuple[int, int, int],
    spacing_mm: tuple[float, float, float],
    s: dict[str, Any],
    noise_floor_hu: float,
    nz: int,
    side: list[Callable[[], Any]] = (),
) -> tuple[list[ScaleMap], list[tuple[np.ndarray, dict[int, float], list[tuple[slice, ...] | None]]], list[Any]]:
    """Filtered contrast and significance of the air at every scale, on the coarse grid
    (:func:`scale_map`), with the structures of each (:func:`hysteresis_structures_boxes`),
    and the results of the calls ``side``.

    ``sums``: the contrast above the air (HU - air mean) summed over the air pixels of
    each coarse block; ``counts``: the air pixels per block (:func:`coarse_air_grid`).
    Each scale's grid is made from these by block sums (:func:`scale_levels`); the noise
    of each filtered map is measured on that map (robust SD over the air), never derived
    from the pixel noise.

    Lanes of work that share nothing but their inputs, on ``AIR_THREADS`` threads (one
    after the other on one, :func:`run_lanes`): the finest scale (its grid is the coarse
    grid itself), the coarser scales' grids (:func:`_pyramid`), maps and structures,
    then each of ``side`` (small tasks taken by whichever thread is free). The maps and
    structures are those made one scale after another, value for value.
    """
    levels = scale_levels(base, spacing_mm, s["scales_mm"], nz)
    rels = [rel for rel, _ in levels]
    grow = float(s["grow_sigma"])

    def one(k: int, S: np.ndarray, C: np.ndarray):
        m = scale_map(k, S, C, sums, base, spacing_mm, s, noise_floor_hu, nz)
        return None if m is None else (m, hysteresis_structures_boxes(m, grow))

    def finest() -> list:
        (S, C), = _pyramid(sums, counts, rels[:1])
        return [one(0, S, C)]

    def coarser() -> list:
        grids = _pyramid(sums, counts, rels[1:]) if rels[0] == (1, 1, 1) else _pyramid(sums, counts, rels)[1:]
        out = []
        for k in range(len(grids)):
            (S, C), grids[k] = grids[k], None  # the map owns its grid (filtered in place)
            out.append(one(k + 1, S, C))
        return out

    first, rest, *side_results = run_lanes([finest, coarser, *side])
    done = [f for f in first + rest if f is not None]
    return [f[0] for f in done], [f[1] for f in done], side_results


def run_lanes(lanes: list[Callable[[], Any]], threads: int | None = None) -> list[Any]:
    """The results of the calls ``lanes``, in order, on at most ``threads`` threads
    (``AIR_THREADS`` unless given). The calling thread runs the first lane while the
    others take the rest from the front; then it takes, from the back, those not yet
    begun (so the small last ones go to whichever thread is free). Each lane must write
    only what it owns. An exception in a lane is raised here.

    References
    ----------
    .. [1] Common practice, no source (independent tasks on a thread pool).
    """
    n = AIR_THREADS if threads is None else threads
    if n <= 1 or len(lanes) <= 1:
        return [lane() for lane in lanes]
    with ThreadPoolExecutor(max_workers=min(n, len(lanes)) - 1) as pool:
        futures = [pool.submit(lane) for lane in lanes[1:]]
        results: list[Any] = [lanes[0]()] + [None] * len(futures)
        done_here = set()
        for k in range(len(futures) - 1, -1, -1):
            if futures[k].cancel():  # not begun: run it here
                results[k + 1] = lanes[k + 1]()
                done_here.add(k)
        for k, f in enumerate(futures):
            if k not in done_here:
                results[k + 1] = f.result()
        return results


def _pyramid(
    sums: np.ndarray, counts: np.ndarray, rels: list[tuple[int, int, int]]
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Block sums of ``sums`` and ``counts`` for each grid of ``rels`` (factors relative to
    the coarse grid), each made from the previous one where it is a multiple of it."""
    f32 = np.dtype(np.float32)
    out: list[tuple[np.ndarray, np.ndarray]] = []
    prev_rel, prev = (1, 1, 1), (sums, counts)
    for rel in rels:
        if all(r % p == 0 for r, p in zip(rel, prev_rel)):
            f = tuple(r // p for r, p in zip(rel, prev_rel))
            src, f_rel = prev, f
        else:
            src, f_rel = (sums, counts), rel
        grid = (_grid_sum(src[0], f_rel, f32), _grid_sum(src[1], f_rel, f32))
        out.append(grid)
        prev_rel, prev = rel, grid
    return out


# ---------------------------------------------------------------------- detection
def _upsample(mask: np.ndarray, rel: tuple[int, int, int], shape: tuple[int, int, int]) -> np.ndarray:
    """Nearest-neighbour enlargement of a coarse grid to ``shape`` (repeat, then crop)."""
    out = mask
    for axis, r in enumerate(rel):
        if r > 1:
            out = np.repeat(out, r, axis=axis)
    out = out[: shape[0], : shape[1], : shape[2]]
    if out.shape != tuple(shape):  # the coarse grid was cropped: pad with its last cells
        pads = [(0, n - m) for n, m in zip(shape, out.shape)]
        out = np.pad(out, pads, mode="edge")
    return np.ascontiguousarray(out)


def present_labels(values: np.ndarray) -> np.ndarray:
    """The distinct values of a non-negative integer array, ascending (``np.unique`` by counting)."""
    if values.size == 0:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(np.bincount(values.ravel()))


def cores_by_component(
    lab: np.ndarray, objects: list[tuple[slice, ...] | None], high: np.ndarray, holders: np.ndarray | None = None
) -> list[tuple[int, np.ndarray]]:
    """Connected components of ``high`` (the cores), when ``high`` lies inside ``lab > 0``.

    Each core is returned as (the label of ``lab`` holding it, its mask in that label's
    box ``objects[label - 1]``), in the order ``ndimage.label(high)`` would number them
    (by the first voxel in scan order). Only the boxes of labels holding a core are
    searched, never the whole grid. ``holders``: ``present_labels(lab[high])`` when
    already known.
    """
    found = []
    for i in present_labels(lab[high]) if holders is None else holders:
        if i == 0:
            continue
        sl = objects[int(i) - 1]
        local, k = ndimage.label(high[sl] & (lab[sl] == i))
        for q in range(1, k + 1):
            core = local == q
            first = np.unravel_index(int(np.argmax(core)), core.shape)
            found.append((tuple(int(a) + x.start for a, x in zip(first, sl)), int(i), core))
    found.sort(key=lambda f: f[0])
    return [(i, core) for _, i, core in found]


def _cores_by_labelling(
    lab: np.ndarray, objects: list[tuple[slice, ...] | None], high: np.ndarray
) -> list[tuple[int, np.ndarray]]:
    """As :func:`cores_by_component` for any ``high``, by labelling the whole grid."""
    cores, _ = ndimage.label(high)
    out = []
    for j, csl in enumerate(ndimage.find_objects(cores), start=1):
        i = int(lab[csl][cores[csl] == j][0])
        out.append((i, cores[objects[i - 1]] == j))
    return out


def hysteresis_structures(m: ScaleMap, grow_sigma: float) -> tuple[np.ndarray, dict[int, float]]:
    """Structures of one scale: a label map and each label's contrast-to-noise.

    See :func:`hysteresis_structures_boxes`, which also gives each label's box.
    """
    out, snr, _ = hysteresis_structures_boxes(m, grow_sigma)
    return out, snr


def _union_box(a: tuple[slice, ...] | None, b: tuple[slice, ...]) -> tuple[slice, ...]:
    if a is None:
        return b
    return tuple(slice(min(x.start, y.start), max(x.stop, y.stop)) for x, y in zip(a, b))


def hysteresis_structures_boxes(
    m: ScaleMap, grow_sigma: float
) -> tuple[np.ndarray, dict[int, float], list[tuple[slice, ...] | None]]:
    """Structures of one scale: a label map, each label's contrast-to-noise, and each
    label's bounding box (as ``ndimage.find_objects`` of the map).

    Components above ``grow_sigma`` that reach ``m.threshold`` are kept. Each core above
    the threshold is measured on its own (its contrast: the 90th percentile inside the
    core) and grown to where the filtered contrast exceeds half of it, so two structures
    joined by noise keep their own extents; cores whose regions overlap are one structure.

    The components are labelled only inside boxes around groups of cores
    (:func:`_core_parts`), never over the space between them; the result is that of one
    labelling of the whole map.
    """
    out = np.zeros(m.z.shape, dtype=np.int32)
    snr: dict[int, float] = {}
    outer: dict[int, tuple[slice, ...]] = {}  # the component boxes a label was written in
    tight: dict[int, tuple[slice, ...]] = {}  # the box of what was written
    high = m.above(m.threshold)
    box = _padded_box_3d(high, 2)
    if box is None:
        return out, snr, []
    parts = _core_parts(m, high, box, grow_sigma)
    if not parts:
        return out, snr, []
    maps: dict[tuple[int, int], np.ndarray] = {}  # the contrast in the box of each component holding a core

    def contrast_of(p: int, i: int) -> np.ndarray:
        if (p, i) not in maps:
            maps[(p, i)] = m.contrast_in(_shifted_box(parts[p][2][i - 1], parts[p][0]))
        return maps[(p, i)]

    found = []
    for j, (_, p, i, core) in enumerate(sorted((c for part in parts for c in part[3]), key=lambda c: c[0]), start=1):
        found.append((order_percentile(contrast_of(p, i)[core], 90.0), j, i, p, core))
    for contrast, j, i, p, core in sorted(found, key=lambda f: f[:3], reverse=True):
        pbox, lab, objects, _ = parts[p]
        sl = objects[i - 1]
        region = contrast_of(p, i) > np.float32(0.5 * contrast)
        np.logical_and(region, lab[sl] == i, out=region)
        pieces, n_pieces = ndimage.label(region)
        touched = present_labels(pieces[core])
        keep = np.zeros(n_pieces + 1, dtype=bool)
        keep[touched[touched > 0]] = True
        region = keep[pieces]
        if not region.any():
            continue
        gsl = _shifted_box(sl, pbox)  # in the coordinates of the whole map
        # labels written so far lie in their outer boxes: none can meet a region outside them all
        existing = present_labels(out[gsl][region]) if _overlaps_any(gsl, list(outer.values())) else np.zeros(0, np.int64)
        existing = existing[existing > 0]
        target = int(existing[0]) if existing.size else len(snr) + 1
        view = out[gsl]
        if existing.size:
            np.logical_and(region, view == 0, out=region)
        np.copyto(view, np.int32(target), where=region)
        snr[target] = max(snr.get(target, 0.0), contrast / max(m.noise_hu, 1e-6))
        outer[target] = _union_box(outer.get(target), gsl)
        written = _padded_box_3d(region, 0)  # cells are never overwritten: a label's box is the union of its writes
        if written is not None:
            tight[target] = _union_box(tight.get(target), _shifted_box(written, gsl))
    return out, snr, [tight.get(k) for k in range(1, len(snr) + 1)]


#: At most this many groups of cores are labelled box by box (more: one box around all),
#: and only when the box around all holds at least this many cells (speed only: the
#: structures are the same either way).
MAX_CORE_GROUPS = 48
MIN_GROUPED_CELLS = 100_000


def _core_parts(
    m: ScaleMap, high: np.ndarray, box: tuple[slice, ...], grow_sigma: float
) -> list[tuple[tuple[slice, ...], np.ndarray, list[tuple[slice, ...] | None], list[tuple[tuple[int, ...], int, int, np.ndarray]]]]:
    """The components of the map above ``grow_sigma`` that hold a core (a component of
    ``high``), labelled box by box: for each box, (the box, the labels in it, their
    boxes inside it, its cores as (first cell in map coordinates, box index, label,
    mask in the label's box)).

    Boxes start around groups of cores (the 8-connected components of the cores'
    in-plane footprint, each with the slices its cells span, padded by 2 cells), grow
    until no component holding a core reaches a face (:func:`components_box`), and are
    joined while any two overlap; the components are then those of one labelling of the
    whole map (each lies whole in one box, and boxes are apart). With more than
    ``MAX_CORE_GROUPS`` groups, when the groups' boxes fill half the box around every
    core, when that box has fewer than ``MIN_GROUPED_CELLS`` cells, or when the threshold is not above ``grow_sigma``, that one box.
    """
    low = lambda b: m.above(grow_sigma, b)  # noqa: E731
    if m.threshold <= grow_sigma:
        lab, _ = ndimage.label(low(box))
        objects = ndimage.find_objects(lab)
        cores = _cores_by_labelling(lab, objects, high[box])
        return [(box, lab, objects, [(_first_cell(c, objects[i - 1], box), 0, i, c) for i, c in cores])]
    boxes = _group_boxes(high, box, 2) if _cells(box) >= MIN_GROUPED_CELLS else None
    if boxes is None or len(boxes) > MAX_CORE_GROUPS or 2 * sum(_cells(b) for b in boxes) > _cells(box):
        boxes = [box]  # groups that fill half the box save too little
    while True:
        grown = []
        for b in boxes:
            g, lab, n, hold = _components_box_and_holders(low, high, b)
            if hold is None:  # the whole map was labelled: one box
                return _parts_of([(g, lab, hold)], high)
            grown.append((g, lab, hold))
        joined = _join_overlapping([g for g, _, _ in grown])
        if len(joined) == len(grown):
            return _parts_of(grown, high)
        boxes = joined


def _cells(box: tuple[slice, ...]) -> int:
    return math.prod(x.stop - x.start for x in box)


def _parts_of(labelled: list, high: np.ndarray) -> list:
    """The parts of :func:`_core_parts` from (box, labels, holders) of each box."""
    parts = []
    for g, lab, hold in labelled:
        hi = high[g]
        hold = present_labels(lab[hi]) if hold is None else hold
        if hold.size == 0 or hold[-1] == 0:
            continue
        objects = ndimage.find_objects(lab, max_label=int(hold[-1]))  # boxes up to the last label holding a core
        p = len(parts)
        cores = [(_first_cell(c, objects[i - 1], g), p, i, c) for i, c in cores_by_component(lab, objects, hi, hold)]
        parts.append((g, lab, objects, cores))
    return parts


def _first_cell(core: np.ndarray, sl: tuple[slice, ...], box: tuple[slice, ...]) -> tuple[int, ...]:
    """The first cell (in scan order) of ``core`` (a mask in ``sl``, a box inside ``box``),
    in the coordinates of the whole map."""
    first = np.unravel_index(int(np.argmax(core)), core.shape)
    return tuple(int(a) + x.start + b.start for a, x, b in zip(first, sl, box))


def _group_boxes(high: np.ndarray, box: tuple[slice, ...], pad: int) -> list[tuple[slice, ...]] | None:
    """Boxes around groups of the cells of ``high`` (inside ``box``): one per 8-connected
    component of their in-plane footprint, spanning the slices its columns hold cells
    in, padded by ``pad`` (clipped), joined while any two overlap; None when there are
    more than ``MAX_CORE_GROUPS`` components."""
    sub = high[box]
    foot = sub.any(axis=0)
    flab, n = ndimage.label(foot, structure=np.ones((3, 3), dtype=bool))
    if n > MAX_CORE_GROUPS:
        return None
    out = []
    for k, (ys, xs) in enumerate(ndimage.find_objects(flab), start=1):
        cols = sub[:, ys, xs] & (flab[ys, xs] == k)
        zs = np.flatnonzero(cols.reshape(cols.shape[0], -1).any(axis=1))
        lo = (box[0].start + int(zs[0]), box[1].start + ys.start, box[2].start + xs.start)
        hi = (box[0].start + int(zs[-1]) + 1, box[1].start + ys.stop, box[2].start + xs.stop)
        out.append(tuple(slice(max(0, a - pad), min(size, b + pad)) for a, b, size in zip(lo, hi, high.shape)))
    return _join_overlapping(out)


def _join_overlapping(boxes: list[tuple[slice, ...]]) -> list[tuple[slice, ...]]:
    """``boxes`` with every two that overlap replaced by the box around both, until none
    overlap (in their first order otherwise)."""
    out = list(boxes)
    merged = True
    while merged:
        merged = False
        for a in range(len(out)):
            for b in range(a + 1, len(out)):
                if boxes_overlap(out[a], out[b]):
                    out[a] = _union_box(out[a], out[b])
                    del out[b]
                    merged = True
                    break
            if merged:
                break
    return out


def _shifted_box(sl: tuple[slice, ...], box: tuple[slice, ...]) -> tuple[slice, ...]:
    """A box given inside ``box``, in the coordinates of the whole grid."""
    return tuple(slice(x.start + b.start, x.stop + b.start) for x, b in zip(sl, box))


def _padded_box_3d(mask: np.ndarray, pad: int) -> tuple[slice, ...] | None:
    """Bounding box of a 3-D mask grown by ``pad`` cells (clipped); None when empty."""
    if mask.ndim != 3:
        profiles = [mask.any(axis=tuple(a for a in range(mask.ndim) if a != axis)) for axis in range(mask.ndim)]
    else:  # two passes over the mask: its plane projection and its slices
        plane = mask.any(axis=0)
        profiles = [mask.reshape(mask.shape[0], -1).any(axis=1), plane.any(axis=1), plane.any(axis=0)]
    out = []
    for axis, profile in enumerate(profiles):
        hit = np.flatnonzero(profile)
        if hit.size == 0:
            return None
        out.append(slice(max(0, int(hit[0]) - pad), min(mask.shape[axis], int(hit[-1]) + 1 + pad)))
    return tuple(out)


def boxes_overlap(a: tuple[slice, ...], b: tuple[slice, ...]) -> bool:
    """Whether two boxes share a cell (masks inside boxes that do not overlap never meet)."""
    return all(x.start < y.stop and y.start < x.stop for x, y in zip(a, b))


def _overlaps_any(sl: tuple[slice, ...], boxes: list[tuple[slice, ...] | None]) -> bool:
    return any(b is not None and boxes_overlap(sl, b) for b in boxes)


def components_box(
    low: np.ndarray | Callable[[tuple[slice, ...]], np.ndarray],
    high: np.ndarray,
    box: tuple[slice, ...],
    max_rounds: int = 4,
) -> tuple[tuple[slice, ...], np.ndarray, int]:
    """A box that holds every component of ``low`` containing a ``high`` cell whole, with
    ``ndimage.label(low[box])``.

    ``low``: the mask, or a function giving the mask inside a box (so it is worked out
    only where it is labelled). Starts from ``box`` (around the high cells) and grows
    every face that such a component reaches (a component that reaches a face may go on
    beyond it) until none does; after ``max_rounds`` the whole grid.
    """
    box, lab, n, _ = _components_box_and_holders(low, high, box, max_rounds)
    return box, lab, n


def _components_box_and_holders(
    low: np.ndarray | Callable[[tuple[slice, ...]], np.ndarray],
    high: np.ndarray,
    box: tuple[slice, ...],
    max_rounds: int = 4,
) -> tuple[tuple[slice, ...], np.ndarray, int, np.ndarray | None]:
    """:func:`components_box`, also giving the labels holding a ``high`` cell
    (``present_labels(lab[high[box]])``; None when the whole grid was labelled last)."""
    low_in = low if callable(low) else (lambda b: low[b])
    for _ in range(max_rounds):
        lab, n = ndimage.label(low_in(box))
        hold = present_labels(lab[high[box]])
        keep = np.zeros(n + 1, dtype=bool)
        keep[hold[hold > 0]] = True
        grown = []
        for axis, (x, size) in enumerate(zip(box, high.shape)):
            lo_face = x.start > 0 and bool(keep[lab.take(0, axis=axis)].any())
            hi_face = x.stop < size and bool(keep[lab.take(-1, axis=axis)].any())
            step = max(4, (x.stop - x.start) // 2)
            grown.append(slice(max(0, x.start - step) if lo_face else x.start, min(size, x.stop + step) if hi_face else x.stop))
        grown = tuple(grown)
        if grown == box:
            return box, lab, n, hold
        box = grown
    full = tuple(slice(0, n) for n in high.shape)
    lab, n = ndimage.label(low_in(full))
    return full, lab, n, None


def scaled_box(sl: tuple[slice, ...], factors: tuple[int, ...], shape: tuple[int, ...]) -> tuple[slice, ...]:
    """The box ``sl`` of a coarse grid on a grid ``factors`` times finer, clipped to ``shape``.

    A nearest-neighbour enlargement (:func:`_upsample`) of what lies in ``sl`` lies exactly
    in the returned box, and a label's tight box enlarges to the label's tight box there.
    """
    return tuple(slice(x.start * f, min(x.stop * f, n)) for x, f, n in zip(sl, factors, shape))


def combine_scales(
    maps: list[ScaleMap], grow_sigma: float, well_measured_snr: float = 10.0
) -> tuple[np.ndarray, tuple[int, int, int]]:
    """Structures of all scales as one label map on the finest grid (see
    :func:`combine_scales_boxes`)."""
    combined, base, _ = combine_scales_boxes(maps, grow_sigma, well_measured_snr)
    return combined, base


def combine_scales_boxes(
    maps: list[ScaleMap],
    grow_sigma: float,
    well_measured_snr: float = 10.0,
    structures: list[tuple[np.ndarray, dict[int, float], list[tuple[slice, ...] | None]]] | None = None,
) -> tuple[np.ndarray, tuple[int, int, int], list[tuple[slice, ...] | None]]:
    """Structures of all scales as one label map on the finest grid.

    Scales are visited from fine to coarse. A structure that overlaps none found so far
    is added. One that overlaps only structures measured poorly at a finer scale
    (contrast-to-noise below ``well_measured_snr`` there) replaces them: a faint, large
    structure is outlined at the scale that sees it whole. Also returns each label's
    bounding box (as ``ndimage.find_objects``; None for labels replaced later).
    ``structures``: :func:`hysteresis_structures_boxes` of each map when already found
    (see :func:`scale_structures`); otherwise found here.
    """
    base = maps[0].factors
    shape0 = maps[0].z.shape
    combined = np.zeros(shape0, dtype=np.int32)
    quality: dict[int, float] = {}
    boxes: list[tuple[slice, ...] | None] = []
    next_id = 1
    if structures is None:
        structures = [hysteresis_structures_boxes(m, grow_sigma) for m in maps]
    for m, (level, snr, level_boxes) in zip(maps, structures):
        if not snr:
            continue
        rel = tuple(a // b for a, b in zip(m.factors, base))
        for lbl, csl in enumerate(level_boxes, start=1):
            if csl is None:
                continue
            sl = scaled_box(csl, rel, shape0)
            region = level[csl] == lbl
            if rel != (1, 1, 1):
                region = _upsample(region, rel, tuple(x.stop - x.start for x in sl))
            # structures placed so far lie in their boxes: none can meet one outside them all
            existing = present_labels(combined[sl][region]) if _overlaps_any(sl, boxes) else np.zeros(0, np.int64)
            existing = existing[existing > 0]
            if existing.size and any(quality[int(e)] >= well_measured_snr for e in existing):
                continue
            for e in existing:  # each lies inside its box: cleared there only
                e = int(e)
                part = combined[boxes[e - 1]]
                part[part == e] = 0
                quality.pop(e)
                boxes[e - 1] = None
            view = combined[sl]
            view[region] = next_id
            quality[next_id] = snr[lbl]
            boxes.append(sl)  # whole structures only are placed or removed: sl stays its box
            next_id += 1
    return combined, base, boxes


# ---------------------------------------------------------------- classification
@dataclass
class Context:
    """What classification needs to know of the volume."""

    regions: Regions
    margin_px: int
    single_slice: bool
    nz: int
    grid_px: int = 0  # how far short of the air's edge a structure may stop on the coarse grid


def _touches(comp: np.ndarray, other: np.ndarray, radius: int) -> bool:
    if not other.any():
        return False
    grown = ndimage.maximum_filter(comp.view(np.uint8), size=(1, 2 * radius + 1, 2 * radius + 1))
    return bool((grown.astype(bool) & other).any())


def classify(sl: tuple[slice, ...], comp: np.ndarray, ctx: Context) -> str:
    """Kind of one structure (its bounding box ``sl`` and mask ``comp`` inside it)."""
    zs = sl[0]
    if not ctx.single_slice and (zs.start == 0 or zs.stop == ctx.nz):
        return "leaves_scan"
    r = ctx.margin_px + 1 + ctx.grid_px
    pad = r + 1
    ny, nx = ctx.regions.fov.shape
    y0, y1 = max(0, sl[1].start - pad), min(ny, sl[1].stop + pad)
    x0, x1 = max(0, sl[2].start - pad), min(nx, sl[2].stop + pad)
    box = np.zeros((zs.stop - zs.start, y1 - y0, x1 - x0), dtype=bool)
    box[:, sl[1].start - y0 : sl[1].stop - y0, sl[2].start - x0 : sl[2].stop - x0] = comp
    sub = (zs, slice(y0, y1), slice(x0, x1))
    if _touches(box, ctx.regions.body[sub], r):
        return "touching_body"
    if _touches(box, ctx.regions.table[sub], r):
        return "table"
    outside = ~ctx.regions.fov[y0:y1, x0:x1]
    at_image_edge = sl[1].start == 0 or sl[2].start == 0 or sl[1].stop == ny or sl[2].stop == nx
    if at_image_edge or _touches(box, np.broadcast_to(outside, box.shape), 2 + ctx.grid_px):
        return "fov_edge"
    return "isolated"


# ------------------------------------------------------------------- description
def _side_words(offset_mm: np.ndarray) -> str:
    """Where a point lies relative to the body centre, in patient terms (LPS offsets)."""
    dx, dy = float(offset_mm[0]), float(offset_mm[1])
    parts = []
    if abs(dx) >= 10:
        parts.append("to the patient's left" if dx > 0 else "to the patient's right")
    if abs(dy) >= 10:
        parts.append("posterior" if dy > 0 else "anterior")
    if not parts:
        return "near the body centre in-plane"
    return " and ".join(parts) + " of the body centre"


def describe(st: dict[str, Any], body_centre_mm: np.ndarray | None) -> str:
    """One sentence a physicist reads: where, how big, how bright."""
    d = (6.0 * st["volume_mm3"] / math.pi) ** (1.0 / 3.0)
    x, y, zc = st["centroid_mm"]
    where = ""
    if body_centre_mm is not None:
        off = np.asarray(st["centroid_mm"]) - body_centre_mm
        where = f", {math.hypot(off[0], off[1]):.0f} mm {_side_words(off)}"
    return (
        f"structure {st['id']} in the air ({KIND_WORDS.get(st['kind'], st['kind'])}): about {d:.0f} mm across "
        f"({st['volume_mm3'] / 1000.0:.2f} cm3), mean {st['mean_hu']:.0f} HU "
        f"(contrast-to-noise {st['contrast_to_noise']:.1f}), slices {st['slices'][0]}-{st['slices'][1]}, "
        f"centred at x {x:.1f}, y {y:.1f}, z {zc:.1f} mm (LPS){where}. "
        "View it at an air window (e.g. W 400 / L -900) and judge whether it is real."
    )


def tight_boxes(labels: np.ndarray, n: int, outer: list[tuple[slice, ...] | None]) -> list[tuple[slice, ...] | None]:
    """Bounding box of each label 1..n of ``labels``, searched only inside its ``outer`` box.

    Equals ``ndimage.find_objects(labels, max_label=n)`` when every label lies inside its
    outer box (None for a label absent there), without a pass over the whole array.
    """
    out: list[tuple[slice, ...] | None] = []
    for i, box in enumerate(outer[:n], start=1):
        comp = labels[box] == i if box is not None else None
        if comp is None or not comp.any():
            out.append(None)
            continue
        tight = []
        for axis, x in enumerate(box):
            hit = np.flatnonzero(comp.any(axis=tuple(a for a in range(comp.ndim) if a != axis)))
            tight.append(slice(x.start + int(hit[0]), x.start + int(hit[-1]) + 1))
        out.append(tuple(tight))
    out.extend([None] * (n - len(out)))
    return out


def _tight_range(profile: np.ndarray) -> tuple[int, int]:
    hit = np.flatnonzero(profile)
    return int(hit[0]), int(hit[-1]) + 1


def refine_structure(
    volume: Volume, air: np.ndarray, cells: np.ndarray, box: tuple[slice, ...], base: tuple[int, int, int]
) -> tuple[tuple[slice, ...], np.ndarray, int, np.ndarray] | None:
    """One structure at full resolution, worked only inside its box.

    ``cells``: the structure's mask on the coarse grid inside the coarse box ``box``. Its
    voxels are the air pixels of those blocks. Returns the tight full-resolution box, the
    mask inside it, the voxel count and the centroid (z, y, x voxels); None when no air
    pixel is left.
    """
    fbox = scaled_box(box, base, volume.shape)
    comp = air_of_blocks(cells, air[fbox], base)
    yx = np.count_nonzero(comp, axis=0)
    count = int(yx.sum())
    if count == 0:
        return None
    profiles = (np.count_nonzero(comp, axis=(1, 2)), yx.sum(axis=1), yx.sum(axis=0))
    ranges = [_tight_range(p) for p in profiles]
    centroid = np.array(
        [x.start + float(np.dot(p, np.arange(p.size))) / count for x, p in zip(fbox, profiles)], dtype=np.float64
    )
    local = tuple(slice(a, b) for a, b in ranges)
    tight = tuple(slice(x.start + a, x.start + b) for x, (a, b) in zip(fbox, ranges))
    if all(b - a == n for (a, b), n in zip(ranges, comp.shape)):
        return tight, comp, count, centroid
    return tight, np.ascontiguousarray(comp[local]), count, centroid


def air_of_blocks(cells: np.ndarray, air_box: np.ndarray, base: tuple[int, int, int]) -> np.ndarray:
    """The air pixels of the blocks ``cells`` (a coarse mask) as a full-resolution mask
    the shape of ``air_box`` (the air in the blocks' box; its last blocks may be cut short
    by the edge of the volume).

    One pass: the coarse mask is broadcast over the pixels of each block.
    """
    shape = air_box.shape
    if all(n == c * k for n, c, k in zip(shape, cells.shape, base)):
        (bz, by, _), (kz, ky, kx) = cells.shape, base
        rows = np.repeat(cells, kx, axis=2) if kx > 1 else cells  # whole rows: long inner loops
        comp = np.empty(shape, dtype=bool)
        np.logical_and(
            air_box.reshape(bz, kz, by, ky, shape[2]),
            rows[:, None, :, None, :],
            out=comp.reshape(bz, kz, by, ky, shape[2]),
        )
        return comp
    comp = _upsample(cells, base, shape)
    return np.logical_and(comp, air_box, out=comp)


def _structure_mean_hu(
    hu_box: np.ndarray,
    comp: np.ndarray,
    cells: np.ndarray,
    box: tuple[slice, ...],
    air_mean: float,
    block_sums: tuple[np.ndarray, np.ndarray] | None,
) -> float:
    """Mean CT number of a structure: from its blocks' totals when given, else its voxels."""
    if block_sums is not None:
        n = float(block_sums[1][box][cells].sum(dtype=np.float64))
        if n > 0:
            return air_mean + float(block_sums[0][box][cells].sum(dtype=np.float64)) / n
    return float(hu_box[comp].mean(dtype=np.float64))


def measure_structures(
    volume: Volume,
    air: np.ndarray,
    lab0: np.ndarray,
    boxes0: list[tuple[slice, ...] | None],
    base: tuple[int, int, int],
    air_mean: float,
    noise: float,
    ctx: Context,
    s: dict[str, Any],
    block_sums: tuple[np.ndarray, np.ndarray] | None = None,
) -> list[tuple[dict[str, Any], tuple[slice, ...], np.ndarray]]:
    """The per-structure record (id, position, size, CT numbers, kind, flagged), with the
    structure's full-resolution box and mask, for each label of the coarse map ``lab0``.

    Only the boxes of the structures are read at full resolution. ``block_sums``: the
    contrast above ``air_mean`` summed over each block's air pixels and the air pixels
    per block, on the grid of ``lab0``; a structure's voxels are the air pixels of its
    blocks, so its mean CT number is the ratio of their totals (the same number as the
    mean over its voxels, up to float32 rounding of the block sums).
    """
    vox = volume.voxel_volume_mm3

    def one(i: int, box: tuple[slice, ...]) -> tuple[dict[str, Any], tuple[slice, ...], np.ndarray] | None:
        cells = lab0[box] == i
        found = refine_structure(volume, air, cells, box, base)
        if found is None:
            return None
        sl, comp, count, idx = found
        if count * vox < float(s["min_volume_mm3"]):
            return None
        mean_hu = _structure_mean_hu(volume.hu[sl], comp, cells, box, air_mean, block_sums)
        if mean_hu - air_mean < float(s["min_contrast_hu"]):  # a blur tail, not a structure
            return None
        kind = classify(sl, comp, ctx)
        cnr = (mean_hu - air_mean) / max(noise, 1e-6)
        record = {
            "id": 0,
            "label": i,
            "centroid_zyx_vox": [round(float(v), 2) for v in idx],
            "centroid_mm": [round(float(v), 2) for v in volume.index_to_patient(idx)],
            "bbox_zyx_vox": [[x.start for x in sl], [x.stop - 1 for x in sl]],
            "volume_mm3": round(count * vox, 2),
            "mean_hu": round(mean_hu, 2),
            "max_hu": round(float(np.max(volume.hu[sl], where=comp, initial=-np.inf)), 2),
            "contrast_to_noise": round(cnr, 2),
            "slices": [sl[0].start, sl[0].stop - 1],
            "kind": kind,
            "flagged": kind in s["flag_kinds"] and cnr >= float(s["min_flag_contrast_to_noise"]),
        }
        return record, sl, comp

    todo = [(i, box) for i, box in enumerate(boxes0, start=1) if box is not None]
    cost = [_cells(box) for _, box in todo]
    return [f for f in map_threads(lambda task: one(*task), todo, cost=cost) if f is not None]


def map_threads(
    fn: Callable[[Any], Any], items: list[Any], threads: int | None = None, cost: list[float] | None = None
) -> list[Any]:
    """``[fn(x) for x in items]`` on at most ``threads`` threads (``AIR_THREADS`` unless
    given), each taking the next item when it is free (the costliest first when ``cost``
    is given); the results in the order of ``items``. ``fn`` must write only what it owns.

    References
    ----------
    .. [1] Graham RL. Bounds on multiprocessing timing anomalies. SIAM J Appl Math 17(2),
           1969 (longest tasks first; reference from memory).
    """
    n = min(AIR_THREADS if threads is None else threads, len(items))
    if n <= 1:
        return [fn(x) for x in items]
    order = sorted(range(len(items)), key=lambda k: -cost[k]) if cost is not None else list(range(len(items)))
    with ThreadPoolExecutor(max_workers=n) as pool:
        futures = {k: pool.submit(fn, items[k]) for k in order}
        return [futures[k].result() for k in range(len(items))]


def zero_int32(shape: tuple[int, ...]) -> np.ndarray:
    """A writable int32 array of zeros in an anonymous memory map of its own.

    The operating system hands out its pages, zero-filled, only when they are first
    written, in small pages: a label volume written in a few places costs memory and
    time in proportion to those places only. (numpy asks for huge pages for large arrays;
    each first write to one zero-fills 2 MiB and may stall while the kernel assembles
    it.) The map is private to the process (a shared one is backed like a file, and
    each first write to its pages costs about half as much again) and advised for
    small pages even where huge pages are the system's default.
    """
    n = int(np.prod(shape))
    if n == 0:
        return np.zeros(shape, dtype=np.int32)
    return np.frombuffer(_private_map(4 * n, "MADV_NOHUGEPAGE"), dtype=np.int32).reshape(shape)


def _private_map(nbytes: int, advice_name: str) -> mmap.mmap:
    """A private anonymous memory map of ``nbytes`` (zero-filled on first write), given
    the advice ``mmap.<advice_name>`` where the system offers it."""
    flags = getattr(mmap, "MAP_PRIVATE", 0) | getattr(mmap, "MAP_ANONYMOUS", 0)
    buf = mmap.mmap(-1, nbytes, flags=flags) if flags else mmap.mmap(-1, nbytes)
    advice = getattr(mmap, advice_name, None)
    if advice is not None:
        try:
            buf.madvise(advice)
        except OSError:  # not offered here: the system's default pages
            pass
    return buf


#: Arrays written whole and at least this large are put on 2 MiB pages (:func:`dense_empty`).
DENSE_HUGE_BYTES = 2 << 20
_HUGE_PAGE = 2 << 20


def dense_empty(shape: tuple[int, ...], dtype: Any) -> np.ndarray:
    """An uninitialised array that the caller writes whole, in an anonymous memory map
    advised for 2 MiB pages when it holds at least ``DENSE_HUGE_BYTES`` (else
    ``np.empty``).

    A process may ask numpy for small pages (the command line does, for sparsely
    written masks); an array written whole then pays one page fault per 4 KiB, which
    costs more than the writing. Here it pays one per 2 MiB and no more memory (the
    last page aside). Works where huge pages are not offered (the advice is then
    ignored).

    References
    ----------
    .. [1] Transparent huge pages for large, densely written buffers: common practice,
           no source.
    """
    dtype = np.dtype(dtype)
    count = math.prod(shape)
    nbytes = count * dtype.itemsize
    if nbytes < DENSE_HUGE_BYTES:
        return np.empty(shape, dtype=dtype)
    buf = _private_map(-(-nbytes // _HUGE_PAGE) * _HUGE_PAGE, "MADV_HUGEPAGE")
    return np.frombuffer(buf, dtype=dtype, count=count).reshape(shape)


def subtract_scaled(a: np.ndarray, b: np.ndarray, k: float) -> np.ndarray:
    """``a -= float32(k) * b`` in place, a few planes at a time (no full-size temporary;
    the same float32 values)."""
    k32 = np.float32(k)
    step = _cache_planes(a)
    tmp = np.empty((min(step, a.shape[0]),) + a.shape[1:], dtype=np.result_type(k32, b))
    for z0 in range(0, a.shape[0], step):
        t = tmp[: min(step, a.shape[0] - z0)]
        np.multiply(k32, b[z0 : z0 + step], out=t)
        np.subtract(a[z0 : z0 + step], t, out=a[z0 : z0 + step])
    return a


def label_overlay(shape: tuple[int, ...], found: list[tuple[dict[str, Any], tuple[slice, ...], np.ndarray]]) -> np.ndarray:
    """The int32 label volume (z, y, x; label == id), written only inside the structures.

    Its memory is laid out with z fastest (a transposed view of a zero (y, x, z) array
    in small pages, :func:`zero_int32`): untouched pages stay with the operating system,
    and a structure that runs through many slices (an arm, a cable) fills a few runs of
    memory instead of rows in every slice, so only a small part of the volume's size is
    ever touched. Indexing, shape and
    dtype are those of any (z, y, x) array.
    """
    nz, ny, nx = shape
    labels = zero_int32((ny, nx, nz)).transpose(2, 0, 1)

    def rows(y0: int, y1: int) -> None:  # rows y0 .. y1 are one run of memory
        for record, sl, comp in found:
            a, b = max(y0, sl[1].start), min(y1, sl[1].stop)
            if a >= b:
                continue
            part = (sl[0], slice(a, b), sl[2])
            view = labels[part].transpose(1, 2, 0)  # memory order
            mask = comp[:, a - sl[1].start : b - sl[1].start].transpose(1, 2, 0)
            np.copyto(view, np.int32(record["id"]), where=mask)

    cuts = _row_ranges(ny, [sl for _, sl, comp in found], [comp.size for _, _, comp in found], AIR_THREADS)
    run_lanes([functools.partial(rows, a, b) for a, b in cuts])
    return labels


def _row_ranges(ny: int, boxes: list[tuple[slice, ...]], sizes: list[int], parts: int) -> list[tuple[int, int]]:
    """``0 .. ny`` cut into at most ``parts`` ranges of rows holding about equal shares of
    the boxes' cells (each box's cells spread evenly over its rows)."""
    if parts <= 1 or not boxes:
        return [(0, ny)]
    load = np.zeros(ny + 1, dtype=np.float64)
    for sl, n in zip(boxes, sizes):
        rows = max(1, sl[1].stop - sl[1].start)
        load[sl[1].start : sl[1].stop] += n / rows
    cum = np.cumsum(load[:ny])
    total = float(cum[-1]) if ny else 0.0
    if total <= 0:
        return [(0, ny)]
    cuts = [0] + [int(np.searchsorted(cum, total * k / parts)) + 1 for k in range(1, parts)] + [ny]
    cuts = sorted(set(min(ny, max(0, c)) for c in cuts))
    return [(a, b) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]


def _limit(structures: list[dict[str, Any]], max_structures: int) -> list[dict[str, Any]]:
    """At most ``max_structures``: flagged ones first, then by contrast-to-noise; label order kept."""
    if len(structures) <= max_structures:
        return structures
    ranked = sorted(structures, key=lambda st: (not st["flagged"], -st["contrast_to_noise"]))
    keep = {st["label"] for st in ranked[:max_structures]}
    return [st for st in structures if st["label"] in keep]


# ------------------------------------------------------------------------ analyse
def _regions_reason(regions: Regions) -> str | None:
    """Why the shared regions leave nothing to check (None when they do not)."""
    if not regions.fov.any():
        return "the field of view is empty: every pixel is padding"
    if not regions.has_body:
        return "no body found in the field of view (air only); the air check needs a patient or phantom"
    return None


def _too_little_air(n_air: int, min_air: int) -> str | None:
    if n_air < min_air:
        return f"too little air in the field of view ({n_air} voxels, at least {min_air} needed): the body fills it"
    return None


def _margin_px(volume: Volume, regions: Regions) -> int:
    margin_mm = float(getattr(regions, "margin_mm", 4.0))
    return max(1, int(round(margin_mm / min(volume.spacing_mm[1:]))))


def _air_findings(mean: float, noise: float, body_noise: float, s: dict[str, Any]) -> list[Finding]:
    out = []
    ref = float(s["air_reference_hu"])
    if abs(mean - ref) > float(s["air_mean_tolerance_hu"]):
        out.append(
            Finding(
                NAME,
                Severity.REVIEW,
                f"the air measures {mean:.1f} HU, {mean - ref:+.1f} HU from {ref:.0f} HU (tolerance "
                f"{float(s['air_mean_tolerance_hu']):.0f} HU): check the CT number calibration",
            )
        )
    low_abs = noise < float(s["min_air_noise_hu"])
    ratio = noise / body_noise if math.isfinite(body_noise) and body_noise > 0 else float("nan")
    low_rel = math.isfinite(ratio) and ratio < float(s["min_air_to_body_noise"])
    if low_abs or low_rel:
        extra = f" ({ratio:.2f} of the body's noise, {body_noise:.1f} HU)" if math.isfinite(ratio) else ""
        out.append(
            Finding(
                NAME,
                Severity.REVIEW,
                f"the air noise is implausibly low, {noise:.2f} HU{extra}: the air may have been flattened "
                "or replaced by the reconstruction",
            )
        )
    return out


def analyse(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> AnalysisResult:
    """Air CT number, air noise and structures in the air (see the module docstring).

    Parameters
    ----------
    volume : Volume
    regions : Regions
        From :func:`reconaudit.checker.regions.find_regions`.
    settings : dict, optional
        Overrides of :data:`DEFAULTS`.

    Returns
    -------
    AnalysisResult
        ``record``: ``mean_hu``, ``noise_hu``, ``body_noise_hu``, ``structures``,
        ``flagged`` (and ``applicable``); ``overlays.labels``: int32 (z, y, x), label
        == id (z fastest in memory, see :func:`label_overlay`);
        ``overlays.points``: the centroid of each flagged structure.

    References
    ----------
    .. [1] Worsley KJ, et al. Human Brain Mapping 4, 1996.
    .. [2] Knutsson H, Westin C-F. CVPR 1993.
    """
    s = resolve_settings(settings)
    reason = _regions_reason(regions)
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    hu, air = volume.hu, regions.air
    base = block_factors(volume.spacing_mm, hu.shape[0])
    sums, counts = coarse_air_grid(hu, air, base)
    n_air = int(counts.sum(dtype=np.float64))
    reason = _too_little_air(n_air, int(s["min_air_voxels"]))
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    mean, noise = robust_mean_and_noise(_air_sample(hu, air, n=n_air), float(s["clip_sigma"]))
    if not math.isfinite(mean):
        return AnalysisResult.not_applicable(NAME, "the air holds no finite CT numbers")
    subtract_scaled(sums, counts, mean)  # contrast above the air, summed over each block's air
    maps, per_scale, body_sds = scale_structures(
        sums, counts, base, volume.spacing_mm, s, float(s["min_air_noise_hu"]), hu.shape[0],
        side=[functools.partial(body_slice_local_sd, volume, regions, int(z)) for z in body_noise_slices(volume)],
    )
    body_noise = body_noise_mode(body_sds)
    findings = _air_findings(mean, noise, body_noise, s)
    mode = s["single_slice_mode"]
    ctx = Context(
        regions,
        _margin_px(volume, regions),
        (hu.shape[0] == 1) if mode == "auto" else bool(mode),
        hu.shape[0],
        grid_px=(max(base[1:]) + 1) // 2,
    )
    structures: list[dict[str, Any]] = []
    labels = None
    if maps:
        lab0, base0, boxes0 = combine_scales_boxes(maps, float(s["grow_sigma"]), structures=per_scale)
        del maps, per_scale
        block_sums = (sums, counts) if base0 == base else None
        found = measure_structures(volume, air, lab0, boxes0, base0, mean, noise, ctx, s, block_sums)
        kept = {id(st) for st in _limit([f[0] for f in found], int(s["max_structures"]))}
        found = [f for f in found if id(f[0]) in kept]
        for new_id, (st, _, _) in enumerate(found, start=1):
            st.pop("label")
            st["id"] = new_id
        structures = [f[0] for f in found]
        labels = label_overlay(hu.shape, found) if found else None

    body_mm = volume.index_to_patient(regions.body_centroid_zyx_vox) if regions.has_body else None
    points = []
    for st in structures:
        if st["flagged"]:
            findings.append(Finding(NAME, Severity.REVIEW, describe(st, body_mm)))
            points.append(Point(tuple(st["centroid_zyx_vox"]), label=f"air structure {st['id']}", value=st["contrast_to_noise"]))
    flagged = any(st["flagged"] for st in structures) or any(f.severity == Severity.REVIEW for f in findings)
    if not findings:
        counts = {k: sum(1 for st in structures if st["kind"] == k) for k in KINDS}
        summary = ", ".join(f"{v} {KIND_WORDS[k]}" for k, v in counts.items() if v) or "none"
        findings.append(Finding(NAME, Severity.INFO, f"air {mean:.1f} HU, noise {noise:.1f} HU; structures: {summary}; none flagged"))
    record = {
        "applicable": True,
        "mean_hu": round(mean, 2),
        "noise_hu": round(noise, 3),
        "body_noise_hu": None if not math.isfinite(body_noise) else round(body_noise, 3),
        "single_slice_mode": ctx.single_slice,
        "structures": structures,
        "flagged": flagged,
    }
    return AnalysisResult(NAME, record, findings, Overlays(labels=labels, points=points))
