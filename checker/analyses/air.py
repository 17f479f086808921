"""Structures in the air beside the patient, and the air's own CT number and noise.

A nonlinear reconstruction can paint organ-like shapes into the air around the patient
that only show at an air window (common practice, no source). This analysis works in the
air of the shared regions (inside the field of view, outside the dilated body and
table), measures the air's mean CT number and noise, and finds every structure that
stands above the air's noise at scales from a few mm to several cm.

Method
------
1. Air statistics: a sample of air voxels, clipped iteratively at ``clip_sigma`` robust
   standard deviations (1.4826 x MAD) around the median; ``mean_hu`` and ``noise_hu`` are
   the mean and standard deviation of what remains. Air is -1000 HU by the definition of
   the Hounsfield scale.
2. Multi-scale matched filtering: for each Gaussian scale in ``scales_mm`` the contrast
   above the air (HU - mean_hu) is averaged over air voxels only (normalised convolution,
   Knutsson & Westin 1993), on a grid whose voxel is about the scale (block means: a
   pyramid), so the body never leaks into the air. The filtered noise near the edge of
   the air region grows as fewer voxels are averaged; each value is divided by that
   growth (computed for white noise, which over-corrects correlated noise: conservative).
3. Thresholds for a stated false-alarm rate: the noise of each filtered map is measured
   on the air itself (1.4826 x MAD), its smoothness from the variance of its finite
   differences, and the high threshold is the level at which the expected Euler
   characteristic of a Gaussian random field over the air equals
   ``false_alarms_per_series`` / number of scales (Worsley et al. 1992, 1996). Real
   reconstructions have spatially correlated noise; the smoothness estimate takes that
   into account where a per-voxel threshold would not.
4. Hysteresis: 3-D components above ``grow_sigma`` that reach the high threshold are
   kept; each core above the threshold is grown to where the filtered contrast exceeds
   half of its own contrast (the 90th percentile in the core), which places its boundary
   at the half-contrast edge. A structure well measured at a fine scale is not found
   again at a coarser one; one poorly measured there is outlined at the coarser scale.
   Structures smaller than ``min_volume_mm3`` or whose mean (full resolution) is less
   than ``min_contrast_hu`` above the air are dropped (blur tails of neighbours).
5. Classification (at full resolution): ``leaves_scan`` (reaches the first or last slice:
   arms, tubes, cables, a mattress), ``touching_body``, ``table``, ``fov_edge`` (touches
   the edge of the reconstruction circle or padding) and ``isolated`` (touches nothing
   and begins and ends inside the scanned range: the suspicious kind). Only the kinds in
   ``flag_kinds`` flag.

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
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage, optimize, special

from ..errors import ProfileError
from ..regions import Regions
from ..results import AnalysisResult, Finding, Overlays, Point, Severity
from ..volume import Volume

NAME = "air"

KINDS = ("isolated", "touching_body", "table", "leaves_scan", "fov_edge")

#: Every setting and tolerance with its default.
DEFAULTS: dict[str, Any] = {
    "scales_mm": [1.5, 3.0, 6.0, 12.0],
    "false_alarms_per_series": 0.05,
    "min_high_sigma": 4.0,
    "grow_sigma": 2.0,
    "min_volume_mm3": 8.0,
    "min_contrast_hu": 10.0,
    "flag_kinds": ["isolated"],
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
    "min_contrast_hu": "site choice: faint ghosts are tens of HU above air",
    "flag_kinds": "site choice: only structures that touch nothing are suspicious",
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
def _air_sample(hu: np.ndarray, air: np.ndarray, max_samples: int = 2_000_000) -> np.ndarray:
    """Air voxel values, on a regular sub-grid when there are more than ``max_samples``."""
    n = int(np.count_nonzero(air))
    step = max(1, int(math.ceil((n / max_samples) ** (1.0 / 3.0))))
    sl = (slice(None, None, step),) * 3
    return hu[sl][air[sl]].astype(np.float64)


def robust_mean_and_noise(
    values: np.ndarray, clip_sigma: float = 4.0, iterations: int = 3, max_median_samples: int = 250_000
) -> tuple[float, float]:
    """Mean and standard deviation of ``values`` after iterative robust clipping.

    Values farther than ``clip_sigma`` robust standard deviations (1.4826 x MAD) from the
    median are left out, so structures in the air do not bias the air's statistics. The
    median and MAD that set the clipping bounds come from a regular subsample of at most
    ``max_median_samples`` values (their relative standard error is then about 0.2 %,
    which moves a 4-SD bound by less than 0.01 SD); the mean and SD use every value kept.

    References
    ----------
    .. [1] Rousseeuw PJ, Croux C. Alternatives to the median absolute deviation.
           J Am Stat Assoc 88(424), 1993 (1.4826 x MAD estimates a Gaussian SD).
    """
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return float("nan"), float("nan")
    keep = v
    lo, hi = -np.inf, np.inf
    for _ in range(iterations):
        part = _subsample(keep, max_median_samples)
        med = float(np.median(part))
        mad = 1.4826 * float(np.median(np.abs(part - med)))
        if mad <= 0:
            break
        lo, hi = med - clip_sigma * mad, med + clip_sigma * mad
        keep = v[(v >= lo) & (v <= hi)]
    return float(keep.mean()), float(keep.std())


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


def body_noise_hu(volume: Volume, regions: Regions, max_slices: int = 8) -> float:
    """The body's noise level: mode of the local SD histogram in soft tissue.

    Local SD over about 6 mm squares, on up to ``max_slices`` evenly spaced slices, at
    soft-tissue pixels (-100..+200 HU) of the body eroded by 6 mm. NaN when there are
    too few such pixels. Each slice is worked on the body's bounding box grown by the
    filter and erosion sizes (the same values as on the whole slice).

    References
    ----------
    .. [1] Christianson O, et al. Automated technique to measure noise in clinical CT
           examinations. AJR 205(1), 2015.
    """
    hu = volume.hu
    dy, dx = volume.spacing_mm[1:]
    size = max(3, int(round(6.0 / min(dy, dx))) | 1)
    erode = max(1, int(round(6.0 / min(dy, dx))))
    zs = np.unique(np.linspace(0, hu.shape[0] - 1, min(max_slices, hu.shape[0])).round().astype(int))
    sds = []
    for z in zs:
        box = _padded_box(regions.body[z], size + erode + 2)
        if box is None:
            continue
        inner = ndimage.binary_erosion(regions.body[z][box], iterations=erode)
        img = hu[z][box].astype(np.float64)
        tissue = inner & (img > -100) & (img < 200)
        if tissue.sum() < 50:
            continue
        mean = ndimage.uniform_filter(img, size)
        sq = ndimage.uniform_filter(img * img, size)
        sd = np.sqrt(np.clip(sq - mean * mean, 0, None))
        ok = ndimage.binary_erosion(tissue, iterations=size // 2)
        sds.append(sd[ok if ok.sum() >= 20 else tissue])
    if not sds:
        return float("nan")
    sd = np.concatenate(sds)
    sd = sd[np.isfinite(sd)]  # non-finite CT numbers nearby spoil a local SD
    if sd.size == 0:
        return float("nan")
    hist, edges = np.histogram(sd, bins=max(10, min(200, sd.size // 20)))
    i = int(np.argmax(hist))
    return float(0.5 * (edges[i] + edges[i + 1]))


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


def _masked_block_sums(
    hu: np.ndarray, air: np.ndarray, offset: float, factors: tuple[int, int, int]
) -> tuple[np.ndarray, np.ndarray]:
    """Block sums of (hu - offset) over air voxels, and block counts of air voxels.

    Slice-blocked so no full-size temporary is made; one slab buffer serves every block.
    """
    fz = factors[0]
    chunk = fz * max(1, 16 // fz)
    sums, counts = [], []
    buf = np.empty((min(chunk, hu.shape[0]),) + hu.shape[1:], dtype=np.result_type(hu.dtype, np.float32))
    for z0 in range(0, hu.shape[0], chunk):
        a = air[z0 : z0 + chunk]
        v = np.subtract(hu[z0 : z0 + chunk], np.float32(offset), out=buf[: a.shape[0]])
        with np.errstate(invalid="ignore"):
            np.multiply(v, a, out=v)  # zero outside the air (bool as 0/1)
        part = block_sum(v, factors)
        if not np.isfinite(part).all():  # inf * 0 outside the air: zero by assignment instead
            v = np.subtract(hu[z0 : z0 + chunk], np.float32(offset), out=v)
            v[~a] = 0.0
            part = block_sum(v, factors)
        sums.append(part)
        counts.append(block_count(a, factors))
    return np.concatenate(sums), np.concatenate(counts)


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


def level_factors(
    spacing_mm: tuple[float, float, float], scales_mm: list[float], nz: int
) -> list[tuple[int, int, int]]:
    """Block factors (z, y, x) relative to full resolution, one per scale.

    The finest grid has a voxel of about the first scale; each next grid halves the
    resolution in-plane (and along z while the slices are finer than the in-plane voxel),
    matching scales that double.
    """
    dz, dy, dx = spacing_mm
    out = []
    for s in scales_mm:
        fy = max(1, int(s / dy + 0.25))
        fx = max(1, int(s / dx + 0.25))
        fz = max(1, int(s / dz + 0.25)) if nz > 1 else 1
        fz = min(fz, max(1, nz // 4)) if nz > 1 else 1
        out.append((fz, fy, fx))
    return out


@dataclass
class ScaleMap:
    """One scale of the matched filter on its grid."""

    sigma_mm: float
    factors: tuple[int, int, int]
    contrast_hu: np.ndarray  # filtered contrast above the air, float32
    z: np.ndarray  # noise-normalised significance, float32 (0 where not valid)
    valid: np.ndarray  # bool: enough air around to measure
    noise_hu: float  # robust SD of the filtered air
    threshold: float  # high threshold in units of that SD
    resels: float


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
    mode="reflect", truncate=truncate)`` up to float rounding.
    """
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
    n = a.shape[axis]
    m = gaussian_matrix(n, sigma)
    src = np.moveaxis(a, axis, -2)
    dst = np.moveaxis(out, axis, -2)
    for i0 in range(0, n, block):
        i1 = min(n, i0 + block)
        cols = np.flatnonzero(m[i0:i1].any(axis=0))
        c0, c1 = int(cols[0]), int(cols[-1]) + 1
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


def _smoothness_resels(z: np.ndarray, valid: np.ndarray) -> float:
    """Resel count of the air: voxels / prod(FWHM), FWHM per axis from finite differences.

    References
    ----------
    .. [1] Worsley KJ, et al. J Cereb Blood Flow Metab 12(6), 1992;
           FWHM = sqrt(4 ln 2 / var(dZ/dx)) for a unit-variance field (from memory).
    """
    n = float(np.count_nonzero(valid))
    fwhm = 1.0
    for axis in range(3):
        if z.shape[axis] < 2:
            continue
        lo = [slice(None)] * 3
        hi = [slice(None)] * 3
        lo[axis] = slice(0, -1)
        hi[axis] = slice(1, None)
        both = valid[tuple(lo)] & valid[tuple(hi)]
        at = _subsample_positions(both)
        if at is None:
            continue
        d = z[tuple(hi)][at] - z[tuple(lo)][at]
        var = _robust_sd(d)[1] ** 2
        fwhm *= max(1.0, math.sqrt(_FWHM_FACTOR / max(var, 1e-12)))
    return n / fwhm


def _subsample_positions(mask: np.ndarray, min_count: int = 20, max_samples: int = 500_000) -> tuple[np.ndarray, ...] | None:
    """Indices of the True voxels of ``mask`` that :func:`_robust_sd` would keep; None below ``min_count``.

    Taking ``a[at]`` equals ``_subsample(a[mask])``, without making ``a[mask]``.
    """
    flat = np.flatnonzero(mask)
    if flat.size < min_count:
        return None
    step = max(1, flat.size // max_samples)
    return np.unravel_index(flat[::step], mask.shape)


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


def _subsample(values: np.ndarray, max_samples: int = 500_000) -> np.ndarray:
    step = max(1, values.size // max_samples)
    return values[::step]


def _robust_sd(values: np.ndarray) -> tuple[float, float]:
    """Median and 1.4826 x MAD (on a regular subsample of at most 500 000 values)."""
    values = _subsample(values)
    med = float(np.median(values))
    return med, 1.4826 * float(np.median(np.abs(values - med)))


def matched_filter_scales(
    hu: np.ndarray,
    air: np.ndarray,
    air_mean_hu: float,
    spacing_mm: tuple[float, float, float],
    s: dict[str, Any],
    noise_floor_hu: float,
) -> list[ScaleMap]:
    """Filtered contrast and significance of the air at every scale (see the module).

    The block sums of every grid are made first, from the finest; the finest is then
    filtered in place, so at most four arrays of the finest grid exist at once.
    """
    nz = hu.shape[0]
    factors = level_factors(spacing_mm, s["scales_mm"], nz)
    base = factors[0]
    sums0, counts0 = _masked_block_sums(hu, air, air_mean_hu, base)
    grids = []
    for sigma_mm, f in zip(s["scales_mm"], factors):
        rel = tuple(max(1, a // b) for a, b in zip(f, base))
        if rel == (1, 1, 1):
            grids.append((sigma_mm, rel, sums0, counts0))
        else:
            grids.append((sigma_mm, rel, block_sum(sums0, rel), block_sum(counts0, rel)))
    del sums0, counts0
    dims = 3 if nz > 1 else 2
    alpha = float(s["false_alarms_per_series"]) / len(factors)
    maps = []
    while grids:
        sigma_mm, rel, sums, counts = grids.pop(0)
        grid = tuple(b * r * d for b, r, d in zip(base, rel, spacing_mm))
        sigma_vox = tuple(0.0 if (ax == 0 and nz == 1) else sigma_mm / g for ax, g in enumerate(grid))
        cell = float(np.prod([b * r for b, r in zip(base, rel)]))
        contrast, growth, valid = _filtered_scale(sums, counts, cell, sigma_vox)
        del sums, counts
        if valid.sum() < 20:
            continue
        z = np.divide(contrast, growth, out=growth)  # noise-normalised contrast, in place
        med, sd = _robust_sd(z[valid])
        sd = max(sd, noise_floor_hu / math.sqrt(cell))
        z -= np.float32(med)
        z /= np.float32(sd)
        z[~valid] = 0.0
        resels = _smoothness_resels(z, valid)
        t = max(float(s["min_high_sigma"]), threshold_for_false_alarms(alpha, resels, dims))
        maps.append(ScaleMap(sigma_mm, tuple(b * r for b, r in zip(base, rel)), contrast, z, valid, sd, t, resels))
    return maps


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
    lab: np.ndarray, objects: list[tuple[slice, ...] | None], high: np.ndarray
) -> list[tuple[int, np.ndarray]]:
    """Connected components of ``high`` (the cores), when ``high`` lies inside ``lab > 0``.

    Each core is returned as (the label of ``lab`` holding it, its mask in that label's
    box ``objects[label - 1]``), in the order ``ndimage.label(high)`` would number them
    (by the first voxel in scan order). Only the boxes of labels holding a core are
    searched, never the whole grid.
    """
    found = []
    for i in present_labels(lab[high]):
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
    """
    low = m.valid & (m.z > grow_sigma)
    lab, n = ndimage.label(low)
    out = np.zeros(m.z.shape, dtype=np.int32)
    snr: dict[int, float] = {}
    outer: dict[int, tuple[slice, ...]] = {}
    if n == 0:
        return out, snr, []
    high = m.z > m.threshold
    if not high.any():
        return out, snr, []
    objects = ndimage.find_objects(lab)
    if m.threshold > grow_sigma:  # every core lies in one component of ``low``
        cores = cores_by_component(lab, objects, high)
    else:
        cores = _cores_by_labelling(lab, objects, high)
    found = []
    for j, (i, core) in enumerate(cores, start=1):
        sl = objects[i - 1]
        found.append((float(np.percentile(m.contrast_hu[sl][core], 90)), j, i, core))
    for contrast, j, i, core in sorted(found, key=lambda f: f[:3], reverse=True):
        sl = objects[i - 1]
        region = (lab[sl] == i) & (m.contrast_hu[sl] > 0.5 * contrast)
        pieces, n_pieces = ndimage.label(region)
        touched = present_labels(pieces[core])
        keep = np.zeros(n_pieces + 1, dtype=bool)
        keep[touched[touched > 0]] = True
        region = keep[pieces]
        if not region.any():
            continue
        existing = present_labels(out[sl][region])
        existing = existing[existing > 0]
        target = int(existing[0]) if existing.size else len(snr) + 1
        view = out[sl]
        view[region & (view == 0)] = target
        snr[target] = max(snr.get(target, 0.0), contrast / max(m.noise_hu, 1e-6))
        outer[target] = _union_box(outer.get(target), sl)
    return out, snr, tight_boxes(out, len(snr), [outer[k] for k in range(1, len(snr) + 1)])


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
    maps: list[ScaleMap], grow_sigma: float, well_measured_snr: float = 10.0
) -> tuple[np.ndarray, tuple[int, int, int], list[tuple[slice, ...] | None]]:
    """Structures of all scales as one label map on the finest grid.

    Scales are visited from fine to coarse. A structure that overlaps none found so far
    is added. One that overlaps only structures measured poorly at a finer scale
    (contrast-to-noise below ``well_measured_snr`` there) replaces them: a faint, large
    structure is outlined at the scale that sees it whole. Also returns each label's
    bounding box (as ``ndimage.find_objects``; None for labels replaced later).
    """
    base = maps[0].factors
    shape0 = maps[0].z.shape
    combined = np.zeros(shape0, dtype=np.int32)
    quality: dict[int, float] = {}
    boxes: list[tuple[slice, ...] | None] = []
    next_id = 1
    for m in maps:
        level, snr, level_boxes = hysteresis_structures_boxes(m, grow_sigma)
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
            existing = present_labels(combined[sl][region])
            existing = existing[existing > 0]
            if existing.size and any(quality[int(e)] >= well_measured_snr for e in existing):
                continue
            if existing.size:
                gone = np.isin(combined, existing)
                combined[gone] = 0
                for e in existing:
                    quality.pop(int(e))
                    boxes[int(e) - 1] = None
            view = combined[sl]
            view[region] = next_id
            quality[next_id] = snr[lbl]
            boxes.append(sl)  # whole structures only are placed or removed: sl stays its box
            next_id += 1
    return combined, base, boxes


def full_resolution_labels(lab0: np.ndarray, factors: tuple[int, int, int], air: np.ndarray) -> tuple[np.ndarray, int]:
    """Carry the label map of the finest grid to the volume's voxels (inside the air).

    Filled slab by slab, so the only full-size array made is the result.
    """
    n = int(lab0.max()) if lab0.size else 0
    out = np.zeros(air.shape, dtype=np.int32)
    if n == 0:
        return out, 0
    fz = factors[0]
    _, ny, nx = air.shape
    for k in range(lab0.shape[0]):
        z0, z1 = k * fz, min(air.shape[0], (k + 1) * fz)
        if z0 >= z1:
            break
        if not lab0[k].any():
            continue
        plane = _upsample(lab0[k : k + 1], (1,) + tuple(factors[1:]), (1, ny, nx))
        np.multiply(plane, air[z0:z1], out=out[z0:z1])  # zero outside the air
    return out, n


# ---------------------------------------------------------------- classification
@dataclass
class Context:
    """What classification needs to know of the volume."""

    regions: Regions
    margin_px: int
    single_slice: bool
    nz: int


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
    r = ctx.margin_px + 1
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
    if at_image_edge or _touches(box, np.broadcast_to(outside, box.shape), 2):
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
        f"structure {st['id']} in the air ({st['kind']}): about {d:.0f} mm across "
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


def measure_structures(
    volume: Volume,
    labels: np.ndarray,
    n: int,
    air_mean: float,
    noise: float,
    ctx: Context,
    s: dict[str, Any],
    objects: list[tuple[slice, ...] | None] | None = None,
) -> list[dict[str, Any]]:
    """The per-structure record (id, position, size, CT numbers, kind, flagged).

    ``objects``: the bounding box of each label (as ``ndimage.find_objects``), found when
    not given.
    """
    out = []
    if objects is None:
        objects = ndimage.find_objects(labels, max_label=n)
    vox = volume.voxel_volume_mm3
    for i, sl in enumerate(objects, start=1):
        if sl is None:
            continue
        comp = labels[sl] == i
        count = int(comp.sum())
        if count * vox < float(s["min_volume_mm3"]):
            continue
        values = volume.hu[sl][comp]
        mean_hu = float(values.mean())
        if mean_hu - air_mean < float(s["min_contrast_hu"]):  # a blur tail, not a structure
            continue
        idx = np.argwhere(comp).mean(axis=0) + [x.start for x in sl]
        kind = classify(sl, comp, ctx)
        out.append(
            {
                "id": 0,
                "label": i,
                "centroid_zyx_vox": [round(float(v), 2) for v in idx],
                "centroid_mm": [round(float(v), 2) for v in volume.index_to_patient(idx)],
                "bbox_zyx_vox": [[x.start for x in sl], [x.stop - 1 for x in sl]],
                "volume_mm3": round(count * vox, 2),
                "mean_hu": round(mean_hu, 2),
                "max_hu": round(float(values.max()), 2),
                "contrast_to_noise": round((mean_hu - air_mean) / max(noise, 1e-6), 2),
                "slices": [sl[0].start, sl[0].stop - 1],
                "kind": kind,
                "flagged": kind in s["flag_kinds"],
            }
        )
    return out


def _limit(structures: list[dict[str, Any]], max_structures: int) -> list[dict[str, Any]]:
    """At most ``max_structures``: flagged ones first, then by contrast-to-noise; label order kept."""
    if len(structures) <= max_structures:
        return structures
    ranked = sorted(structures, key=lambda st: (not st["flagged"], -st["contrast_to_noise"]))
    keep = {st["label"] for st in ranked[:max_structures]}
    return [st for st in structures if st["label"] in keep]


def _renumber(labels: np.ndarray, structures: list[dict[str, Any]], n: int) -> np.ndarray:
    """Labels 1..k in the order of ``structures`` (label == id); the rest become 0."""
    lut = np.zeros(n + 1, dtype=np.int32)
    for new_id, st in enumerate(structures, start=1):
        lut[st.pop("label")] = new_id
        st["id"] = new_id
    if np.array_equal(lut, np.arange(n + 1, dtype=np.int32)):
        return labels
    return lut[labels]


# ------------------------------------------------------------------------ analyse
def _not_applicable_reason(volume: Volume, regions: Regions, min_air: int) -> str | None:
    if not regions.fov.any():
        return "the field of view is empty: every pixel is padding"
    if not regions.has_body:
        return "no body found in the field of view (air only); the air check needs a patient or phantom"
    n_air = int(np.count_nonzero(regions.air))
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
        ``flagged`` (and ``applicable``); ``overlays.labels``: int32, label == id;
        ``overlays.points``: the centroid of each flagged structure.

    References
    ----------
    .. [1] Worsley KJ, et al. Human Brain Mapping 4, 1996.
    .. [2] Knutsson H, Westin C-F. CVPR 1993.
    """
    s = resolve_settings(settings)
    reason = _not_applicable_reason(volume, regions, int(s["min_air_voxels"]))
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    hu, air = volume.hu, regions.air
    mean, noise = robust_mean_and_noise(_air_sample(hu, air), float(s["clip_sigma"]))
    if not math.isfinite(mean):
        return AnalysisResult.not_applicable(NAME, "the air holds no finite CT numbers")
    body_noise = body_noise_hu(volume, regions)
    findings = _air_findings(mean, noise, body_noise, s)

    maps = matched_filter_scales(hu, air, mean, volume.spacing_mm, s, float(s["min_air_noise_hu"]))
    mode = s["single_slice_mode"]
    ctx = Context(regions, _margin_px(volume, regions), (hu.shape[0] == 1) if mode == "auto" else bool(mode), hu.shape[0])
    structures: list[dict[str, Any]] = []
    labels = None
    if maps:
        mask0, base, boxes0 = combine_scales_boxes(maps, float(s["grow_sigma"]))
        del maps
        full, n = full_resolution_labels(mask0, base, air)
        if n:
            outer = [None if b is None else scaled_box(b, base, full.shape) for b in boxes0[:n]]
            del mask0
            objects = tight_boxes(full, n, outer)
            structures = measure_structures(volume, full, n, mean, noise, ctx, s, objects)
            structures = _limit(structures, int(s["max_structures"]))
            labels = _renumber(full, structures, n) if structures else None

    body_mm = volume.index_to_patient(regions.body_centroid_zyx_vox) if regions.has_body else None
    points = []
    for st in structures:
        if st["flagged"]:
            findings.append(Finding(NAME, Severity.REVIEW, describe(st, body_mm)))
            points.append(Point(tuple(st["centroid_zyx_vox"]), label=f"air structure {st['id']}", value=st["contrast_to_noise"]))
    flagged = any(st["flagged"] for st in structures) or any(f.severity == Severity.REVIEW for f in findings)
    if not findings:
        counts = {k: sum(1 for st in structures if st["kind"] == k) for k in KINDS}
        summary = ", ".join(f"{v} {k}" for k, v in counts.items() if v) or "none"
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
