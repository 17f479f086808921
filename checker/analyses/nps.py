"""Noise power spectrum (NPS), noise magnitude and noise texture.

ROIs come from one of four places, recorded as ``method``:

- ``"phantom"``: square ROIs in the centre and on a ring of the uniform section of a
  water cylinder (:mod:`._phantom`), clear of its edge, on the middle
  ``min(max_slices, phantom_slices)`` (16) slices of the longest run of contiguous
  uniform slices (all of a shorter run). 16 slices x 9 ROIs of 64 px give 144 ROI
  images; on invented scans the noise and f_av from them differ from those of 32
  slices by well under 1 % (bench phantom) to 2 % (small test phantom, tested), a
  tenth of the comparison tolerances. A method choice for speed (records
  may change; from 32 slices before): the DFTs and the finite check cost
  half as much;
- ``"patient"``: homogeneous soft-tissue patches found automatically in patient images,
  which also get the global noise level (mode of the local-SD histogram in soft tissue).
  Both are measured on ``min(max_slices, patient_slices)`` (8) evenly spaced slices: the
  mode of a histogram of some 10^5 local SDs is as stable as that of all slices; when
  those slices give fewer than ``patient_min_rois`` patches, more of the ``max_slices``
  evenly spaced slices are searched for patches;
- ``"user"``: the ``rois`` setting, a list of ``{"slices": [z0, z1], "yx0_vox": [y, x],
  "size_vox": n}`` (what the viewer passes after editing);
- ``"pair"``: two repeated reconstructions, ``(I1 - I2) / sqrt(2)`` (:func:`nps_from_pair`
  or the ``pair_with`` setting).

Each ROI is detrended (``detrend``: ``"mean"``, ``"poly1"`` or ``"poly2"``; default
``"poly2"``, a second-order 2-D polynomial fit removed by least squares), then
NPS(fx, fy) = (dx dy / (Nx Ny)) <|DFT(ROI - fit)|^2> over all ROIs and slices, radially
averaged in bins one frequency step wide and smoothed by a ``smooth_bins`` moving average.
``noise_hu`` is the square root of the integral of the 2-D NPS (Parseval: equal to the SD
of the detrended ROI pixels, reported beside it as ``roi_sd_hu``).

Speed (method choices, not approximations of the formulas above): the ROIs are detrended
once for the 2-D NPS, their SD and the 3-D NPS; DFTs are real-input DFTs completed by
Hermitian symmetry, taken 16 ROIs at a time. The ROIs are gathered once into one
single-precision array (one block copy per ROI), their means taken out in double
precision and the polynomial fit removed in place on the mean-free pixels by two small
matrix products with the orthonormal basis images; the SD before detrending is the
residual's plus the fit's energy (Pythagoras). Squared spectra are summed in single
precision over chunks of 16 ROIs and in double precision across chunks. The 3-D record
needs the 3-D NPS only integrated over fy and fx, which by Parseval in-plane is the
energy of the blocks' DFT along z, computed from the Gram matrices of each block's
slices (no 3-D spectra; the same numbers, tested against :func:`nps_3d`). The phantom search reads a strided working
grid (:mod:`._phantom`) and the patient search a few slices, so the records are
estimates that may differ slightly from a search over every pixel; record keys, types and meaning are unchanged.
Non-finite voxels: phantom, user and pair ROIs are measured only when every pixel of
the slices they lie on is finite (:func:`._phantom.nonfinite_reason`; a NaN on a slice
the NPS does not read no longer stops it, a method choice for speed; records may
change); patient images are checked whole, as before.

References
----------
ICRU Report 87, Radiation dose and image-quality assessment in computed tomography (2012).
Samei E. et al., Performance evaluation of computed tomography systems, AAPM Report 233
(TG-233), Med Phys 46(11), 2019.
IEC 62220-1-1 (NPS normalisation).
Dolly S. et al., JACMP 17(3), 2016 (detrending and ROI size).
Solomon J., Christianson O., Samei E., Med Phys 39(10), 2012 (f_peak, f_av).
Christianson O. et al., AJR 205(1), 2015 (global noise level).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Sequence

import numpy as np
import scipy.fft
from scipy import ndimage
from scipy.integrate import trapezoid

from ..errors import ProfileError
from ..regions import Regions, find_regions
from ..results import AnalysisResult, Finding, Overlays, Roi, Severity
from ..volume import Volume
from ._phantom import count_nonfinite, find_phantom, nonfinite_reason

NAME = "nps"

DEFAULTS: dict[str, Any] = {
    "rois": None,
    "detrend": "poly2",
    "roi_size_vox": 64,
    "min_roi_size_vox": 16,
    "edge_margin_mm": 5.0,
    "max_slices": 32,
    "phantom_slices": 16,
    "patient_slices": 8,
    "patient_min_rois": 24,
    "min_roi_count": 4,
    "smooth_bins": 3,
    "nps_3d": False,
    "roi_depth_vox": 8,
    "patient_roi_size_vox": 32,
    "patient_rois_per_slice": 6,
    "soft_tissue_hu": [0.0, 100.0],
    "gnl_kernel_mm": 6.0,
    "patch_sd_factor": 1.3,
    "baseline": None,
    "pair_with": None,
    "noise_hu_max": None,
    "f_av_ratio_tolerance": 0.10,
    "noise_ratio_tolerance": 0.15,
    "nps_correlation_min": 0.95,
}

SOURCES: dict[str, str] = {
    "detrend": "AAPM TG-233 (2019) and Dolly et al. JACMP 17(3) 2016 discuss polynomial "
    "detrending; second order as the default is our choice",
    "roi_size_vox": "common practice, no source (TG-233 uses ROIs of tens of mm)",
    "min_roi_count": "common practice, no source",
    "soft_tissue_hu": "from memory: Christianson et al. AJR 205(1) 2015 segment soft tissue "
    "by a CT-number range of about 0-100 HU",
    "gnl_kernel_mm": "from memory: Christianson et al. AJR 205(1) 2015 use a local-SD "
    "kernel of a few mm",
    "patient_slices": "our choice for speed: the histogram mode is stable with 8 slices",
    "phantom_slices": "our choice for speed: 16 slices x 9 ROIs of 64 px give 144 ROI images "
    "(0.59 million pixels); the f_av and noise of repeated invented scans vary by at most "
    "about 1 %, a tenth of the comparison tolerances (tested). From memory: IEC 62220-1-1 asks for at least "
    "4 million pixels for a radiographic NPS; TG-233 gives no fixed count",
    "patient_min_rois": "common practice, no source (a few dozen ROIs for a stable NPS)",
    "noise_hu_max": "site choice (depends on protocol and dose); off by default",
    "f_av_ratio_tolerance": "site choice",
    "noise_ratio_tolerance": "site choice",
    "nps_correlation_min": "site choice",
}

_DETRENDS = ("mean", "poly1", "poly2")
_CHUNK = 16  # ROIs transformed at a time (their spectra stay in the processor cache)
_POWER_CHUNK = 16  # spectra whose squares are summed in single precision before adding in double


# --------------------------------------------------------------------------- core maths
@lru_cache(maxsize=16)
def _poly_basis(m: int, order: int) -> np.ndarray:
    """Orthonormal discrete polynomials of degree 0..order on m equally spaced points,
    as columns (m, order + 1)."""
    v = (np.arange(m) - (m - 1) / 2.0) / max(m, 1)
    q, _ = np.linalg.qr(np.stack([v**k for k in range(order + 1)], axis=1))
    return q


def detrend_rois(stack: np.ndarray, method: str = "poly2") -> np.ndarray:
    """Subtract the mean or a least-squares 2-D polynomial from each ROI.

    Parameters
    ----------
    stack : ndarray (n, Ny, Nx)
    method : {"mean", "poly1", "poly2"}
        ``poly1``: a + b x + c y; ``poly2`` adds x^2, x y and y^2.

    Returns
    -------
    ndarray (n, Ny, Nx), float64
        ROI minus its fit.

    Notes
    -----
    The polynomials of total degree <= d on a rectangular grid are spanned by the
    products P_i(y) Q_j(x), i + j <= d, of orthonormal discrete polynomials along each
    axis, and those products are orthonormal: the least-squares fit is the sum of the
    projections on them, computed one axis at a time (a few products per pixel).

    References
    ----------
    Dolly S. et al., JACMP 17(3), 2016; AAPM TG-233, Med Phys 46(11), 2019.
    """
    if method not in _DETRENDS:
        raise ProfileError(f"nps detrend {method!r} unknown; expected one of {_DETRENDS}")
    stack = np.asarray(stack, dtype=np.float64)
    if method == "mean":
        return stack - stack.mean(axis=(-2, -1), keepdims=True)
    order = 1 if method == "poly1" else 2
    _, ny, nx = stack.shape
    py = _poly_basis(ny, order)
    qx_t = np.ascontiguousarray(_poly_basis(nx, order).T)
    keep = np.add.outer(np.arange(order + 1), np.arange(order + 1)) <= order
    # einsum over contiguous rows, not BLAS: thin products stall on a loaded machine's
    # BLAS threads
    along_x = np.einsum("nyx,jx->nyj", stack, qx_t)
    coef = np.einsum("nyj,yi->nij", along_x, py) * keep
    fit_rows = np.einsum("nij,yi->nyj", coef, py)
    return stack - np.einsum("nyj,jx->nyx", fit_rows, qx_t)


def _full_from_half(half: np.ndarray, m: int) -> np.ndarray:
    """Whole power spectrum from its half along the last axis (length ``m`` in all):
    P(k) = P(-k) for real data (Hermitian symmetry of the DFT; common practice, no
    source)."""
    shape = half.shape[:-1]
    full = np.empty((*shape, m))
    full[..., : m // 2 + 1] = half
    if m // 2 + 1 < m:
        neg = [(-np.arange(k)) % k for k in shape]
        full[..., m // 2 + 1 :] = half[np.ix_(*neg, m - np.arange(m // 2 + 1, m))]
    return full


def _power(spec: np.ndarray) -> np.ndarray:
    """Sum over the first axis of |spec|^2, accumulated in float64.

    Single-precision spectra: squares summed in float32 over chunks of
    ``_POWER_CHUNK`` items (on the interleaved real and imaginary parts), the chunks
    added in float64 (relative error about 1e-7).
    """
    flat = spec.reshape(spec.shape[0], -1)
    if flat.dtype == np.complex64:
        parts = flat.view(np.float32)
        acc = np.zeros(parts.shape[1])
        for start in range(0, parts.shape[0], _POWER_CHUNK):
            chunk = parts[start : start + _POWER_CHUNK]
            acc += np.einsum("nk,nk->k", chunk, chunk)
        return (acc[0::2] + acc[1::2]).reshape(spec.shape[1:])
    return (np.einsum("nk,nk->k", flat.real, flat.real) + np.einsum("nk,nk->k", flat.imag, flat.imag)).reshape(
        spec.shape[1:])


def mean_power_spectrum(res: np.ndarray) -> np.ndarray:
    """Mean over the first axis of |DFT|^2 over all the other axes (uncentred).

    Computed from the real-input DFT of chunks of ``_CHUNK`` items; the half of the
    last axis it leaves out follows from Hermitian symmetry (:func:`_full_from_half`).

    References
    ----------
    IEC 62220-1-1; ICRU Report 87 (2012) (the ensemble of squared DFT moduli).
    """
    n, *shape = res.shape
    return _full_from_half(_half_power_sum(res), shape[-1]) / n


def _half_power_sum(res: np.ndarray) -> np.ndarray:
    """Sum over the first axis of |DFT|^2 over the other axes, on the half of the last
    axis the real-input DFT keeps (length m // 2 + 1), ``_CHUNK`` items at a time."""
    n, *shape = res.shape
    axes = tuple(range(1, res.ndim))
    half = np.zeros((*shape[:-1], shape[-1] // 2 + 1))
    for start in range(0, n, _CHUNK):
        half += _power(scipy.fft.rfftn(res[start : start + _CHUNK], axes=axes))
    return half


def _nps_2d_of_residuals(
    res: np.ndarray, spacing_yx_mm: tuple[float, float], spec: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centred 2-D NPS of detrended ROIs ``res``; ``spec``, when given, is their real
    DFT (``scipy.fft.rfft2(res)``), used instead of transforming again."""
    dy, dx = spacing_yx_mm
    n, ny, nx = res.shape
    if spec is None:
        power = mean_power_spectrum(res)
    else:
        power = _full_from_half(_power(spec), nx) / n
    nps = (dx * dy / (nx * ny)) * power
    fy = np.fft.fftshift(np.fft.fftfreq(ny, dy))
    fx = np.fft.fftshift(np.fft.fftfreq(nx, dx))
    return np.fft.fftshift(nps), fy, fx


def nps_2d(
    stack: np.ndarray, spacing_yx_mm: tuple[float, float], detrend: str = "poly2"
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Ensemble 2-D NPS of square or rectangular ROIs.

    NPS(fx, fy) = (dx dy / (Nx Ny)) <|DFT(ROI - fit)|^2>, centred (zero frequency in the
    middle, ``np.fft.fftshift`` order).

    Parameters
    ----------
    stack : ndarray (n, Ny, Nx)
        ROIs in HU.
    spacing_yx_mm : (dy, dx)
    detrend : str
        See :func:`detrend_rois`.

    Returns
    -------
    nps : ndarray (Ny, Nx), HU^2 mm^2
    fy, fx : ndarray
        Frequencies in cycles/mm (centred).

    References
    ----------
    IEC 62220-1-1; ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    return _nps_2d_of_residuals(detrend_rois(stack, detrend), spacing_yx_mm)


def _nps_3d_of_spectra(
    spec: np.ndarray, nx: int, spacing_zyx_mm: tuple[float, float, float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """3-D NPS of blocks given the in-plane real DFTs of their detrended slices,
    ``spec`` (n, Nz, Ny, Nx // 2 + 1).

    The DFT along z completes each block's 3-D DFT (the DFT is separable); setting its
    zero-frequency term to 0 removes the block's mean, as subtracting it would.
    """
    _, nz, ny, _ = spec.shape
    spec3 = scipy.fft.fft(spec, axis=1)
    spec3[:, 0, 0, 0] = 0.0
    dz, dy, dx = spacing_zyx_mm
    nps = (dx * dy * dz / (nx * ny * nz)) * _full_from_half(_power(spec3), nx) / spec.shape[0]
    freqs = [np.fft.fftshift(np.fft.fftfreq(m, d)) for m, d in ((nz, dz), (ny, dy), (nx, dx))]
    return (np.fft.fftshift(nps), *freqs)


def nps_3d(
    stack: np.ndarray, spacing_zyx_mm: tuple[float, float, float], detrend: str = "poly2"
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Ensemble 3-D NPS of volumetric ROIs, (dx dy dz / (Nx Ny Nz)) <|DFT3(ROI - fit)|^2>.

    Each slice of each ROI is detrended in-plane (:func:`detrend_rois`), then the mean of
    the whole ROI is removed.

    Parameters
    ----------
    stack : ndarray (n, Nz, Ny, Nx)
    spacing_zyx_mm : (dz, dy, dx)

    Returns
    -------
    nps : ndarray (Nz, Ny, Nx), HU^2 mm^3, centred
    fz, fy, fx : ndarray, cycles/mm

    References
    ----------
    ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    n, nz, ny, nx = stack.shape
    res = detrend_rois(np.asarray(stack).reshape(n * nz, ny, nx), detrend)
    spec = scipy.fft.rfft2(res).reshape(n, nz, ny, nx // 2 + 1)
    return _nps_3d_of_spectra(spec, nx, spacing_zyx_mm)


def radial_average(
    nps: np.ndarray, fy: np.ndarray, fx: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Radial mean of a centred 2-D NPS in bins one frequency step wide, up to Nyquist.

    Bin k holds the samples with k - 1/2 <= |f| / df < k + 1/2, df being the coarser of
    the two frequency steps; the highest bin is the Nyquist frequency of the coarser axis.

    Returns
    -------
    f : ndarray, cycles/mm (bin centres k df)
    nps_1d : ndarray, same unit as ``nps``

    References
    ----------
    ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    df = max(abs(fy[1] - fy[0]) if fy.size > 1 else 0.0, abs(fx[1] - fx[0]) if fx.size > 1 else 0.0)
    f_nyq = min(np.abs(fy).max(), np.abs(fx).max())
    kmax = int(np.floor(f_nyq / df + 1e-9))
    fr = np.hypot(fy[:, None], fx[None, :])
    k = np.floor(fr / df + 0.5).astype(int).ravel()
    keep = k <= kmax
    sums = np.bincount(k[keep], weights=nps.ravel()[keep], minlength=kmax + 1)
    counts = np.bincount(k[keep], minlength=kmax + 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        curve = sums / counts
    return np.arange(kmax + 1) * df, curve


def _radial_nps_of_residuals(
    res: np.ndarray, spacing_yx_mm: tuple[float, float]
) -> tuple[float, np.ndarray, np.ndarray]:
    """The integral (variance, HU^2) and the :func:`radial_average` of the 2-D NPS of
    detrended ROIs ``res`` (n, Ny, Nx), as :func:`_nps_2d_of_residuals` followed by a
    sum and :func:`radial_average` would give them, from the half spectrum of the
    real-input DFT alone.

    The whole spectrum repeats the half's values at P(-k) = P(k) (Hermitian symmetry),
    and the two copies lie at the same |f| (the DFT frequencies are symmetric), hence in
    the same radial bin: a sum over the whole spectrum is the sum over the half of each
    value times the number of its copies (:func:`_half_spectrum_bins`). The same
    numbers up to the order of the additions (relative 1e-15).

    References
    ----------
    IEC 62220-1-1; ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    n, ny, nx = res.shape
    dy, dx = (float(v) for v in spacing_yx_mm)
    nps_half = (dx * dy / (nx * ny)) * _half_power_sum(res).ravel() / n
    bins, copies, counts, df_y, df_x, f = _half_spectrum_bins(ny, nx, dy, dx)
    weighted = nps_half * copies
    variance = float(weighted.sum() * df_y * df_x)
    inside = bins >= 0
    sums = np.bincount(bins[inside], weights=weighted[inside], minlength=f.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        curve = sums / counts
    return variance, f, curve


@lru_cache(maxsize=16)
def _half_spectrum_bins(
    ny: int, nx: int, dy: float, dx: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float, np.ndarray]:
    """For the half spectrum (ny, nx // 2 + 1) of a real-input 2-D DFT, flattened: the
    :func:`radial_average` bin of each value (-1 beyond Nyquist), the number of its
    copies in the whole spectrum (1 or 2), the number of whole-spectrum samples of each
    bin, the frequency steps |fy[1] - fy[0]| and |fx[1] - fx[0]| of the centred axes
    (as :func:`_nps_2d_of_residuals` gives them) and the bin frequencies. Built from
    the whole spectrum's own bins (read-only arrays)."""
    fy = np.fft.fftshift(np.fft.fftfreq(ny, dy))
    fx = np.fft.fftshift(np.fft.fftfreq(nx, dx))
    ramp = np.arange(ny * (nx // 2 + 1), dtype=float).reshape(ny, nx // 2 + 1)
    source = np.fft.ifftshift(np.fft.fftshift(_full_from_half(ramp, nx))).astype(np.int64)  # unshifted
    df = max(abs(fy[1] - fy[0]) if fy.size > 1 else 0.0, abs(fx[1] - fx[0]) if fx.size > 1 else 0.0)
    f_nyq = min(np.abs(fy).max(), np.abs(fx).max())
    kmax = int(np.floor(f_nyq / df + 1e-9))
    k_full = np.floor(np.fft.ifftshift(np.hypot(fy[:, None], fx[None, :])) / df + 0.5).astype(np.int64)
    k_full[k_full > kmax] = -1
    bins = np.full(ramp.size, -1, dtype=np.int64)
    bins[source.ravel()] = k_full.ravel()  # both copies of a value share a bin
    copies = np.bincount(source.ravel(), minlength=ramp.size).astype(float)
    counts = np.bincount(k_full[k_full >= 0], minlength=kmax + 1)
    df_y = abs(fy[1] - fy[0]) if fy.size > 1 else 0.0
    df_x = abs(fx[1] - fx[0]) if fx.size > 1 else 0.0
    out = (bins, copies, counts, df_y, df_x, np.arange(kmax + 1) * df)
    for a in (bins, copies, counts, out[5]):
        a.setflags(write=False)
    return out


def smooth_curve(curve: np.ndarray, width: int) -> np.ndarray:
    """Moving average of ``width`` bins over the non-zero frequencies.

    The zero-frequency bin is left out (detrending empties it) and kept as it is; the
    ends are padded by reflection.
    """
    width = int(width)
    out = np.array(curve, dtype=float)
    if width <= 1 or curve.size < 4:
        return out
    half = width // 2
    body = out[1:]
    padded = np.concatenate([body[:half][::-1], body, body[-half:][::-1]])
    kernel = np.ones(2 * half + 1) / (2 * half + 1)
    out[1:] = np.convolve(padded, kernel, mode="valid")
    return out


def peak_frequency(f: np.ndarray, curve: np.ndarray, level: float = 0.9) -> float:
    """Frequency of the NPS maximum: vertex of a least-squares parabola through the
    contiguous bins around the highest one that reach ``level`` of it.

    A fit over the whole top of the peak keeps f_peak stable where a broad maximum
    makes the single highest bin jump between neighbours. The vertex is clipped to the
    fitted bins; with fewer than three bins the highest bin's frequency is returned.

    References
    ----------
    Solomon J., Christianson O., Samei E., Med Phys 39(10), 2012 (f_peak).
    """
    i = int(np.nanargmax(curve))
    top = curve >= level * curve[i]
    lo, hi = i, i
    while lo > 0 and top[lo - 1]:
        lo -= 1
    while hi < curve.size - 1 and top[hi + 1]:
        hi += 1
    if hi - lo < 2:
        return float(f[i])
    a, b, _ = np.polyfit(f[lo : hi + 1], curve[lo : hi + 1], 2)
    if a >= 0:
        return float(f[i])
    return float(np.clip(-b / (2.0 * a), f[lo], f[hi]))


def average_frequency(f: np.ndarray, curve: np.ndarray) -> float:
    """f_av = integral f NPS(f) df / integral NPS(f) df over the radial NPS (trapezoid).

    References
    ----------
    Solomon J., Christianson O., Samei E., Med Phys 39(10), 2012.
    """
    den = trapezoid(curve, f)
    return float(trapezoid(f * curve, f) / den) if den > 0 else float("nan")


def compare_nps(record: dict[str, Any], baseline_record: dict[str, Any]) -> dict[str, float]:
    """Noise-texture comparison of an NPS record with a baseline NPS record.

    Returns ``f_av_ratio`` (f_av / baseline f_av), ``noise_ratio`` (noise_hu / baseline
    noise_hu) and ``nps_correlation``: the Pearson correlation of the two radial NPS
    curves, each divided by its area, interpolated on a common frequency axis (the
    baseline's, up to the lower of the two maximum frequencies).

    References
    ----------
    Solomon J., Christianson O., Samei E., Med Phys 39(10), 2012 (f_av, texture);
    AAPM TG-233, Med Phys 46(11), 2019.
    """
    f_a = np.asarray(record["frequency_per_mm"], float)
    n_a = np.asarray(record["nps_1d_hu2mm2"], float)
    f_b = np.asarray(baseline_record["frequency_per_mm"], float)
    n_b = np.asarray(baseline_record["nps_1d_hu2mm2"], float)
    f_top = min(f_a.max(), f_b.max())
    axis = f_b[f_b <= f_top + 1e-12]
    a = np.interp(axis, f_a, n_a)
    b = np.interp(axis, f_b, n_b)
    a_area, b_area = trapezoid(a, axis), trapezoid(b, axis)
    corr = float("nan")
    if a_area > 0 and b_area > 0 and axis.size >= 3:
        corr = float(np.corrcoef(a / a_area, b / b_area)[0, 1])
    return {
        "f_av_ratio": _ratio(record.get("f_av_per_mm"), baseline_record.get("f_av_per_mm")),
        "noise_ratio": _ratio(record.get("noise_hu"), baseline_record.get("noise_hu")),
        "nps_correlation": corr,
    }


def _ratio(a: Any, b: Any) -> float:
    if a is None or b is None or not b:
        return float("nan")
    return float(a) / float(b)


# --------------------------------------------------------------------- patient noise
def local_mean_sd(image: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Local mean and SD in a ``size`` x ``size`` box (per slice for 3-D input)."""
    image = np.asarray(image, dtype=np.float64)
    box = (1,) * (image.ndim - 2) + (size, size)
    mean = ndimage.uniform_filter(image, box, mode="nearest")
    sq = ndimage.uniform_filter(image * image, box, mode="nearest")
    return mean, np.sqrt(np.clip(sq - mean * mean, 0.0, None))


def soft_tissue_mask(
    volume: Volume, regions: Regions, kernel_px: int, hu_range: Sequence[float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels in the eroded body whose local mean lies in ``hu_range``.

    Returns the mask and the local mean and SD maps (``kernel_px`` box).
    """
    mean, sd = local_mean_sd(volume.hu, kernel_px)
    inside = ndimage.binary_erosion(
        regions.body, structure=np.ones((1, kernel_px, kernel_px), bool), border_value=0
    )
    lo, hi = float(hu_range[0]), float(hu_range[1])
    return inside & (mean >= lo) & (mean <= hi), mean, sd


def histogram_mode(values: np.ndarray, bins: int = 200) -> float:
    """Mode of a histogram over [0, 3 x median], smoothed by a 2-bin Gaussian.

    Bins of equal width counted by ``np.bincount`` (a value equal to the top falls in
    the last bin, as in ``np.histogram``).
    """
    values = np.asarray(values)
    top = 3.0 * float(np.median(values))
    if top <= 0:
        return 0.0
    scaled = values * np.float32(bins / top) if values.dtype == np.float32 else values * (bins / top)
    scaled = scaled[(scaled >= 0) & (scaled <= bins)]
    counts = np.bincount(np.minimum(scaled.astype(np.int64), bins - 1), minlength=bins)
    counts = ndimage.gaussian_filter1d(counts.astype(float), 2.0, mode="nearest")
    i = int(np.argmax(counts))
    return float((i + 0.5) * top / bins)


def _body_box(mask2d: np.ndarray) -> tuple[slice, slice] | None:
    """Bounding box of a 2-D mask (None when it is empty)."""
    rows, cols = np.flatnonzero(mask2d.any(axis=1)), np.flatnonzero(mask2d.any(axis=0))
    if rows.size == 0:
        return None
    return slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1)


@dataclass
class SliceMaps:
    """Local statistics of one patient slice, on the body's bounding box grown by half
    the local-mean kernel (``y0``, ``x0`` its corner in the slice).

    ``mean_k`` and ``sd_k`` are the local mean and SD in the ``kernel_px`` box (float32);
    ``inside`` the body eroded by that box (every kernel wholly in the body); ``tissue``
    the body pixels whose local mean lies in the soft-tissue range.
    """

    z: int
    y0: int
    x0: int
    image: np.ndarray
    mean_k: np.ndarray
    sd_k: np.ndarray
    inside: np.ndarray
    tissue: np.ndarray


def slice_maps(
    image: np.ndarray, body: np.ndarray, z: int, kernel_px: int, hu_range: Sequence[float]
) -> SliceMaps | None:
    """The :class:`SliceMaps` of one slice (None when the slice has no body).

    The crop changes none of the values used: a kernel about a pixel of the eroded body
    lies inside the body, and the local means of body pixels reach at most half a kernel
    beyond it. Box filters run in float32 (they accumulate in double); the erosion is a
    separable minimum filter, pixels outside the crop counting as outside the body.
    """
    box = _body_box(body)
    if box is None:
        return None
    ny, nx = image.shape
    g = kernel_px // 2 + 1
    y0, y1 = max(0, box[0].start - g), min(ny, box[0].stop + g)
    x0, x1 = max(0, box[1].start - g), min(nx, box[1].stop + g)
    img = np.ascontiguousarray(image[y0:y1, x0:x1], dtype=np.float32)
    mean_k = ndimage.uniform_filter(img, kernel_px, mode="nearest")
    sq_k = ndimage.uniform_filter(img * img, kernel_px, mode="nearest")
    sd_k = np.sqrt(np.maximum(sq_k - mean_k * mean_k, 0.0))
    body_c = body[y0:y1, x0:x1]
    inside = ndimage.minimum_filter(body_c.view(np.uint8), kernel_px, mode="constant", cval=0).view(bool)
    lo, hi = float(hu_range[0]), float(hu_range[1])
    in_range = (mean_k >= lo) & (mean_k <= hi)
    return SliceMaps(int(z), y0, x0, img, mean_k, sd_k, inside, body_c & in_range)


def _soft_tissue_sds(maps: SliceMaps) -> np.ndarray:
    return maps.sd_k[maps.inside & maps.tissue]


def _kernel_px(volume: Volume, kernel_mm: float) -> int:
    return max(3, int(round(kernel_mm / min(volume.spacing_mm[1:]))) | 1)


def patient_slice_maps(
    volume: Volume, regions: Regions, kernel_mm: float, soft_tissue_hu: Sequence[float], slices: int | None
) -> list[SliceMaps]:
    """:func:`slice_maps` of at most ``slices`` evenly spaced slices (all when None)."""
    nz = volume.shape[0]
    zs = range(nz) if slices is None else _patient_slices(nz, int(slices))
    k = _kernel_px(volume, kernel_mm)
    found = (slice_maps(volume.hu[z], regions.body[z], int(z), k, soft_tissue_hu) for z in zs)
    return [m for m in found if m is not None]


def noise_level_of(maps: Sequence[SliceMaps]) -> tuple[float, int]:
    """Global noise level (mode of the soft-tissue local-SD histogram) of slice maps;
    NaN when fewer than 50 soft-tissue pixels. Returns the level and the pixel count.

    References
    ----------
    Christianson O. et al., AJR 205(1), 2015.
    """
    parts = [_soft_tissue_sds(m) for m in maps]
    values = np.concatenate(parts) if parts else np.empty(0)
    if values.size < 50:
        return float("nan"), int(values.size)
    return histogram_mode(values), int(values.size)


def global_noise_level(
    volume: Volume,
    regions: Regions,
    *,
    kernel_mm: float = 6.0,
    soft_tissue_hu: Sequence[float] = (0.0, 100.0),
    max_slices: int | None = None,
) -> tuple[float, int]:
    """Global noise level: the mode of the local-SD histogram in soft tissue.

    Parameters
    ----------
    volume, regions
        ``regions.body`` bounds the search.
    kernel_mm : float
        Side of the square local-SD kernel (from memory).
    soft_tissue_hu : (low, high)
        Local-mean range taken as soft tissue (from memory).
    max_slices : int, optional
        Use at most this many evenly spaced slices; all slices when None. The analysis
        passes ``min(max_slices, patient_slices)`` (8 by default): the mode of the
        histogram of some 10^5 local SDs is as stable as that of 10^7.

    Returns
    -------
    gnl_hu : float
        NaN when there is no soft tissue.
    pixels : int
        Number of soft-tissue pixels used.

    Notes
    -----
    Computed slice by slice on the body's bounding box (:func:`slice_maps`), so the
    only arrays made are of one slice.

    References
    ----------
    Christianson O. et al., Automated technique to measure noise in clinical CT
    examinations, AJR 205(1), 2015.
    """
    return noise_level_of(patient_slice_maps(volume, regions, kernel_mm, soft_tissue_hu, max_slices))


# ------------------------------------------------------------------------ ROI layout
@dataclass
class RoiSet:
    rois: list[Roi]
    reason: str = ""


def _square_roi(z0: int, z1: int, cy: float, cx: float, n: int, label: str) -> Roi:
    y0, x0 = int(round(cy - n / 2.0)), int(round(cx - n / 2.0))
    return Roi(z0, z1, y0, x0, y0 + n, x0 + n, label)


def _inside_disc(roi: Roi, cy: float, cx: float, r: float) -> bool:
    """Every corner pixel centre of ``roi`` lies within ``r`` of (cy, cx) (the farther
    row and the farther column: the same squared distances in double precision)."""
    dy2 = max((float(roi.y0) - cy) ** 2, (float(roi.y1 - 1) - cy) ** 2)
    dx2 = max((float(roi.x0) - cx) ** 2, (float(roi.x1 - 1) - cx) ** 2)
    return bool(dy2 + dx2 <= r * r)


def _overlaps(a: Roi, b: Roi) -> bool:
    return a.y0 < b.y1 and b.y0 < a.y1 and a.x0 < b.x1 and b.x0 < a.x1


def ring_layout(
    cy: float, cx: float, r_usable: float, n: int, z0: int, z1: int, prefix: str
) -> list[Roi]:
    """A centre ROI plus up to eight ROIs on a ring, inside ``r_usable``, none overlapping.

    Ring ROIs sit as far out as the usable radius allows (along the axes first, then the
    diagonals if they fit without overlap).
    """
    h = n / 2.0
    placed = [_square_roi(z0, z1, cy, cx, n, f"{prefix} centre")]
    r_safe = r_usable - 1.0  # room for rounding the corners to whole pixels
    d_axis = np.sqrt(max(r_safe**2 - h**2, 0.0)) - h
    d_diag = r_safe - h * np.sqrt(2.0)
    spots = [(d_axis, a) for a in (90, 0, 270, 180)] + [(d_diag, a) for a in (45, 315, 225, 135)]
    for d, ang in spots:
        t = np.deg2rad(ang)
        roi = _square_roi(z0, z1, cy - d * np.sin(t), cx + d * np.cos(t), n, f"{prefix} ring {ang} deg")
        if _inside_disc(roi, cy, cx, r_usable) and not any(_overlaps(roi, p) for p in placed):
            placed.append(roi)
    return placed


def phantom_rois(volume: Volume, regions: Regions, s: dict[str, Any]) -> RoiSet:
    """Centre and ring ROIs on the middle ``min(max_slices, phantom_slices)`` slices of
    the longest run of uniform phantom slices (all of a shorter run)."""
    ph = find_phantom(volume, regions)
    if not ph.found:
        return RoiSet([], ph.reason)
    run = ph.longest_uniform_run()
    if run is None:
        return RoiSet([], "phantom found but every phantom slice has inserts: no uniform region")
    z0, z1 = run
    count = _phantom_slice_count(s)
    if z1 - z0 + 1 > count:
        mid = (z0 + z1) // 2
        z0 = mid - count // 2
        z1 = z0 + count - 1
    sl = slice(z0, z1 + 1)
    cy, cx = np.median(ph.centre_yx_vox[sl], axis=0)
    r_usable = float(np.min(ph.radius_vox[sl])) - s["edge_margin_mm"] / ph.pixel_mm
    n = min(int(s["roi_size_vox"]), int(np.floor(2.0 * (r_usable - 1.0) / np.sqrt(10.0))))
    if n < s["min_roi_size_vox"]:
        return RoiSet([], f"phantom too small: ROIs of {s['min_roi_size_vox']} px do not fit "
                          f"inside radius {r_usable:.1f} px clear of the edge")
    return RoiSet(ring_layout(cy, cx, r_usable, n, z0, z1, "nps"))


def _patient_slices(nz: int, max_slices: int) -> np.ndarray:
    return np.unique(np.linspace(0, nz - 1, min(nz, max_slices)).round().astype(int))


def _summed_area(a: np.ndarray) -> np.ndarray:
    """Summed-area table with a zero first row and column (float64)."""
    out = np.zeros((a.shape[0] + 1, a.shape[1] + 1))
    out[1:, 1:] = a
    return out.cumsum(axis=0).cumsum(axis=1)


def _patch_sums(a: np.ndarray, ys: np.ndarray, xs: np.ndarray, n: int, step: int) -> np.ndarray:
    """Sums of ``a`` over the n x n patches with corners (ys[i], xs[j]), shape (i, j).

    Corners lie on a grid of ``step`` starting at (ys[0], xs[0]). When ``step`` divides
    ``n``, the sums come from ``step`` x ``step`` block sums (one pass over ``a``);
    otherwise from a full summed-area table. Both are exact box sums.
    """
    if n % step == 0:
        y0, x0 = int(ys[0]), int(xs[0])
        by, bx = (int(ys[-1]) - y0 + n) // step, (int(xs[-1]) - x0 + n) // step
        blocks = a[y0 : y0 + by * step, x0 : x0 + bx * step].reshape(by, step, bx, step)
        table = _summed_area(blocks.sum(axis=(1, 3), dtype=np.float64))
        iy, ix, m = (ys - y0) // step, (xs - x0) // step, n // step
    else:
        table, iy, ix, m = _summed_area(a), ys, xs, n
    iy, ix = iy[:, None], ix[None, :]
    return table[iy + m, ix + m] - table[iy, ix + m] - table[iy + m, ix] + table[iy, ix]


def _patches_of_maps(maps: SliceMaps, shape: tuple[int, int], n: int, hu_range: tuple[float, float],
                     gnl: float, s: dict[str, Any]) -> list[Roi]:
    """The patient ROIs of one slice (see :func:`patient_rois`).

    Candidate patches on the grid of a quarter patch (slice coordinates); a patch that
    leaves the crop of ``maps`` holds at least n pixels outside the body and is not
    homogeneous soft tissue, so only patches within the crop are measured, by exact box
    sums (:func:`_patch_sums`).
    """
    ny, nx = shape
    h, w = maps.image.shape
    step = max(1, n // 4)
    ys = np.arange(0, ny - n + 1, step) - maps.y0
    xs = np.arange(0, nx - n + 1, step) - maps.x0
    ys, xs = ys[(ys >= 0) & (ys + n <= h)], xs[(xs >= 0) & (xs + n <= w)]
    if ys.size == 0 or xs.size == 0:
        return []
    area = float(n * n)
    ok = _patch_sums(maps.tissue.view(np.uint8), ys, xs, n, step) / area > 0.999
    img = maps.image.astype(np.float64)
    mean = _patch_sums(img, ys, xs, n, step) / area
    sd = np.sqrt(np.maximum(_patch_sums(img * img, ys, xs, n, step) / area - mean * mean, 0.0))
    lo, hi = hu_range
    ok &= (sd <= s["patch_sd_factor"] * gnl) & (mean >= lo) & (mean <= hi)
    iy, ix = np.nonzero(ok)
    py, px, sd = ys[iy], xs[ix], sd[iy, ix]
    chosen: list[Roi] = []
    for i in np.argsort(np.abs(sd - gnl), kind="stable"):
        ry0, rx0 = int(py[i]) + maps.y0, int(px[i]) + maps.x0
        roi = Roi(maps.z, maps.z, ry0, rx0, ry0 + n, rx0 + n, f"nps patch z{maps.z}")
        if not any(_overlaps(roi, c) for c in chosen):
            chosen.append(roi)
        if len(chosen) >= s["patient_rois_per_slice"]:
            break
    return chosen


def patient_rois(
    volume: Volume, regions: Regions, s: dict[str, Any], gnl: float, maps: Sequence[SliceMaps] | None = None
) -> RoiSet:
    """Homogeneous soft-tissue patches: whole patch in soft tissue, SD near the noise level.

    Candidates on a grid of a quarter patch are taken in order of how close their SD is
    to the global noise level, with SD at most ``patch_sd_factor`` x that level, and kept
    when they overlap no patch already chosen on the slice. They are searched on the
    slices of ``maps`` (default: :func:`patient_slice_maps` of ``min(max_slices,
    patient_slices)`` evenly spaced slices, the slices of the global noise level); while
    fewer than ``patient_min_rois`` patches are found, the other of the ``max_slices``
    evenly spaced slices are searched too, in order.
    """
    n = int(s["patient_roi_size_vox"])
    _, ny, nx = volume.shape
    if n > min(ny, nx):
        return RoiSet([], f"patient ROIs of {n} px do not fit in {ny} x {nx} slices")
    lo, hi = (float(v) for v in s["soft_tissue_hu"])
    if maps is None:
        maps = patient_slice_maps(volume, regions, s["gnl_kernel_mm"], (lo, hi), _patient_slice_count(s))
    rois: list[Roi] = []
    for m in maps:
        rois += _patches_of_maps(m, (ny, nx), n, (lo, hi), gnl, s)
    searched = {m.z for m in maps}
    kernel_px = _kernel_px(volume, s["gnl_kernel_mm"])
    for z in _patient_slices(volume.shape[0], int(s["max_slices"])):
        if len(rois) >= s["patient_min_rois"]:
            break
        if int(z) in searched:
            continue
        m = slice_maps(volume.hu[z], regions.body[z], int(z), kernel_px, (lo, hi))
        if m is not None:
            rois += _patches_of_maps(m, (ny, nx), n, (lo, hi), gnl, s)
    if not rois:
        return RoiSet([], "no homogeneous soft-tissue patch of "
                          f"{n} x {n} px found inside the body")
    return RoiSet(rois)


def _phantom_slice_count(s: dict[str, Any]) -> int:
    """Contiguous slices the phantom ROIs span at most: ``min(max_slices, phantom_slices)``."""
    return max(1, min(int(s["max_slices"]), int(s["phantom_slices"])))


def _patient_slice_count(s: dict[str, Any]) -> int:
    return max(1, min(int(s["max_slices"]), int(s["patient_slices"])))


def user_rois(volume: Volume, specs: Sequence[dict[str, Any]], s: dict[str, Any]) -> RoiSet:
    """ROIs from the ``rois`` setting, checked to fit the volume and to share one size."""
    nz, ny, nx = volume.shape
    rois: list[Roi] = []
    sizes = set()
    for i, spec in enumerate(specs):
        try:
            z0, z1 = (int(v) for v in spec["slices"])
            y0, x0 = (int(v) for v in spec["yx0_vox"])
            n = int(spec["size_vox"])
        except (KeyError, TypeError, ValueError) as exc:
            return RoiSet([], f"ROI {i} malformed ({exc!r}); expected "
                              "{'slices': [z0, z1], 'yx0_vox': [y, x], 'size_vox': n}")
        if not (0 <= z0 <= z1 < nz and 0 <= y0 and y0 + n <= ny and 0 <= x0 and x0 + n <= nx):
            return RoiSet([], f"ROI {i} (slices {z0}-{z1}, corner y={y0}, x={x0}, size {n}) "
                              f"does not fit in the volume of shape {nz} x {ny} x {nx}")
        if n < s["min_roi_size_vox"]:
            return RoiSet([], f"ROI {i} is {n} px; the minimum is {s['min_roi_size_vox']} px")
        sizes.add(n)
        rois.append(Roi(z0, z1, y0, x0, y0 + n, x0 + n, f"nps user {i}"))
    if len(sizes) > 1:
        return RoiSet([], f"user ROIs must share one size to be averaged; got sizes {sorted(sizes)}")
    return RoiSet(rois)


def roi_stack(hu: np.ndarray, rois: Sequence[Roi]) -> np.ndarray:
    """All 2-D ROI images (every slice of every ROI) as (n, Ny, Nx)."""
    return np.stack([hu[z, r.y0 : r.y1, r.x0 : r.x1] for r in rois for z in range(r.z0, r.z1 + 1)])


def volume_roi_stack(hu: np.ndarray, rois: Sequence[Roi], depth: int) -> np.ndarray | None:
    """Non-overlapping volumetric blocks ``depth`` slices deep cut from each ROI."""
    blocks = [
        hu[z : z + depth, r.y0 : r.y1, r.x0 : r.x1]
        for r in rois
        for z in range(r.z0, r.z1 + 2 - depth, depth)
    ]
    return np.stack(blocks) if blocks else None


# --------------------------------------------------------------------------- analysis
def _settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    s = dict(DEFAULTS)
    for key, value in (settings or {}).items():
        if key not in DEFAULTS:
            raise ProfileError(f"unknown nps setting {key!r}; known: {', '.join(DEFAULTS)}")
        s[key] = value
    if s["detrend"] not in _DETRENDS:
        raise ProfileError(f"nps detrend {s['detrend']!r} unknown; expected one of {_DETRENDS}")
    return s


def measure_nps(
    hu: np.ndarray, spacing_zyx_mm: tuple[float, float, float], rois: Sequence[Roi], s: dict[str, Any]
) -> dict[str, Any] | str:
    """The NPS record of ``rois`` in ``hu``, or the reason it cannot be measured.

    The ROIs are gathered once (one block copy per ROI, single precision), each ROI's
    mean is taken out in double precision, and the polynomial fit is removed by the
    projections of :func:`detrend_rois` (the same least-squares fit, single precision on
    the mean-free pixels); the 2-D NPS (real DFTs of 16 ROIs at a time), the detrended
    SD and the 3-D NPS (from the Gram matrices of each block's slices,
    :func:`_measure_3d`) all use those residuals; the SD before detrending follows from
    the residuals and the fit coefficients (Pythagoras).

    References
    ----------
    IEC 62220-1-1; ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    return measure_roi_images(roi_images(hu, rois), spacing_zyx_mm, rois, s)


def measure_roi_images(
    stack: np.ndarray, spacing_zyx_mm: tuple[float, float, float], rois: Sequence[Roi], s: dict[str, Any]
) -> dict[str, Any] | str:
    """:func:`measure_nps` of the ROI images ``stack`` (float32, :func:`roi_images`
    order), which it changes in place; or the reason they cannot be measured.

    References
    ----------
    IEC 62220-1-1; ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019.
    """
    if stack.shape[0] < s["min_roi_count"]:
        return f"{stack.shape[0]} ROI images; at least {s['min_roi_count']} are needed"
    means = stack.mean(axis=(1, 2), dtype=np.float64)
    if not np.isfinite(means.sum()):
        return "ROIs contain NaN or infinite values"
    stack -= means.astype(np.float32)[:, None, None]  # mean-free: no offset in the sums below
    res, fit_energy = _remove_fit_in_place(stack, s["detrend"])
    res_var = _mean_square(res)
    raw_var = res_var + fit_energy / (stack.shape[1] * stack.shape[2])  # |raw|^2 = |res|^2 + |fit|^2
    # single precision DFT (power summed in double): the integral stays within 1e-7 of
    # the pixel variance, far below any tolerance; transformed 16 ROIs at a time
    variance, f, curve = _radial_nps_of_residuals(res, spacing_zyx_mm[1:])
    if not variance > 1e-12:
        return "no noise: the detrended ROI pixels are constant"
    curve = smooth_curve(curve, s["smooth_bins"])
    record: dict[str, Any] = {
        "noise_hu": float(np.sqrt(variance)),
        "roi_sd_hu": float(np.sqrt(res_var.mean())),
        "roi_sd_raw_hu": float(np.sqrt(raw_var.mean())),
        "roi_mean_hu": float(means.mean()),
        "f_peak_per_mm": peak_frequency(f, curve),
        "f_av_per_mm": average_frequency(f, curve),
        "frequency_per_mm": [round(float(v), 6) for v in f],
        "nps_1d_hu2mm2": [float(v) for v in curve],
        "roi_count": int(stack.shape[0]),
        "roi_size_vox": [int(stack.shape[1]), int(stack.shape[2])],
        "detrend": s["detrend"],
    }
    if s["nps_3d"]:
        record["nps_3d"] = _measure_3d(res, spacing_zyx_mm, rois, s)
    return record


def roi_images(hu: np.ndarray, rois: Sequence[Roi]) -> np.ndarray:
    """All 2-D ROI images in :func:`roi_stack` order as one new float32 (n, Ny, Nx)
    array: one block copy per ROI (all ROIs must share one size)."""
    blocks = [hu[r.z0 : r.z1 + 1, r.y0 : r.y1, r.x0 : r.x1] for r in rois]
    return np.concatenate(blocks, dtype=np.float32)


def _mean_square(stack: np.ndarray) -> np.ndarray:
    """Mean of the squared pixels of each ROI of a mean-free float32 (n, Ny, Nx) stack
    (the population variance), squares summed in double; a few ROIs at a time through
    one small scratch buffer (no stack-sized temporary)."""
    n = stack.shape[0]
    flat = stack.reshape(n, -1)
    step = max(1, _SQUARE_PIXELS // flat.shape[1])
    scratch = np.empty((min(step, n), flat.shape[1]), dtype=np.float32)
    sums = np.empty(n)
    for start in range(0, n, step):
        part = flat[start : start + step]
        squares = scratch[: part.shape[0]]
        np.square(part, out=squares)
        sums[start : start + step] = squares.sum(axis=1, dtype=np.float64)
    return sums / flat.shape[1]


#: Pixels squared at a time by :func:`_mean_square` (256 KiB of float32).
_SQUARE_PIXELS = 1 << 16


def _remove_fit_in_place(stack: np.ndarray, method: str) -> tuple[np.ndarray, np.ndarray]:
    """Subtract from each mean-free float32 ROI its least-squares 2-D polynomial
    (``poly1``/``poly2``; nothing more for ``mean``), in place.

    The fit is the projection on the orthonormal products P_i(y) Q_j(x), i + j <= order,
    of :func:`detrend_rois` (the same least-squares fit): the coefficients of a few ROIs
    at a time are one matrix product with those basis images, and so is the fit
    (:func:`_fit_rois_per_call` ROIs a call keep each product small enough for one BLAS
    thread).

    Returns
    -------
    stack : ndarray
        The residuals (the input array).
    energy : ndarray (n,), float64
        Sum of the squared coefficients of each ROI: the squared norm of its fit, so the
        mean-free ROI's squared norm is that of its residual plus ``energy``
        (Pythagoras for an orthogonal projection).

    References
    ----------
    Dolly S. et al., JACMP 17(3), 2016; AAPM TG-233, Med Phys 46(11), 2019.
    """
    n, ny, nx = stack.shape
    energy = np.zeros(n)
    if method == "mean":
        return stack, energy
    basis = _fit_basis(ny, nx, 1 if method == "poly1" else 2)
    flat = stack.reshape(n, ny * nx)
    step = _fit_rois_per_call(basis.shape[0], ny * nx)
    for start in range(0, n, step):
        part = flat[start : start + step]
        coef = part @ basis.T
        part -= coef @ basis
        energy[start : start + step] = np.square(coef, dtype=np.float64).sum(axis=1)
    return stack, energy


#: Largest product M N K of one fit's matrix product (ROIs x pixels x basis images):
#: OpenBLAS keeps a GEMM on one thread below about twice 2^18 multiply-adds (from
#: memory of its threading rule; 1.5 x 2^18 leaves a margin). Thin products on several
#: threads stall on a loaded machine: 144 ROIs of 64 px took 0.9 ms at 16 a call, 1.5 ms
#: at 8 and 90 ms at 32 (measured here under load).
_FIT_PRODUCT = 3 << 17


def _fit_rois_per_call(terms: int, pixels: int) -> int:
    """ROIs whose fit is one matrix product: as many as keep M N K at most
    :data:`_FIT_PRODUCT`, at least one (16 ROIs of 64 x 64 pixels and 6 terms)."""
    return max(1, _FIT_PRODUCT // (terms * pixels))



@lru_cache(maxsize=16)
def _fit_basis(ny: int, nx: int, order: int) -> np.ndarray:
    """Orthonormal basis images P_i(y) Q_j(x), i + j <= order, of the polynomials of
    total degree <= order on an ny x nx grid, as float32 rows (terms, ny * nx)."""
    py, qx = _poly_basis(ny, order), _poly_basis(nx, order)
    terms = [np.outer(py[:, i], qx[:, j]).ravel() for i in range(order + 1) for j in range(order + 1)
             if i + j <= order]
    basis = np.ascontiguousarray(np.stack(terms).astype(np.float32))
    basis.setflags(write=False)
    return basis


def _block_starts(rois: Sequence[Roi], depth: int) -> list[int]:
    """Index in :func:`roi_stack` order of the first slice of every block of
    :func:`volume_roi_stack` (the same blocks, in the same order)."""
    starts, offset = [], 0
    for r in rois:
        starts += [offset + z - r.z0 for z in range(r.z0, r.z1 + 2 - depth, depth)]
        offset += r.z1 - r.z0 + 1
    return starts


def _measure_3d(
    res: np.ndarray, spacing: tuple[float, float, float], rois: Sequence[Roi], s: dict[str, Any]
) -> dict[str, Any]:
    """The 3-D NPS record from the detrended ROI slices ``res`` (:func:`roi_stack`
    order): its z profile (the 3-D NPS integrated over fy and fx) and noise.

    The record needs the 3-D NPS only summed over the in-plane frequencies, and by
    Parseval in-plane that sum at each fz is Nx Ny times the energy of the blocks' DFT
    along z, sum over blocks, rows and columns of |sum_z e^(-2 pi i k z / Nz) r(z)|^2 =
    d_k^H G d_k, with G = sum over blocks of the (Nz x Nz) Gram matrix of their slices
    (one small matrix product per block). The block's 3-D mean is removed as in
    :func:`nps_3d` (its DC term, the squared block sum, is taken out at fz = 0). The
    same numbers as :func:`nps_3d` integrated over fy and fx (tested), without the
    3-D spectra.

    References
    ----------
    ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019; Parseval's theorem for the
    DFT.
    """
    depth = int(s["roi_depth_vox"])
    starts = _block_starts(rois, depth)
    if not starts:
        return {"applicable": False, "reason": f"no ROI spans {depth} contiguous slices"}
    nz_total, ny, nx = res.shape
    flat = res.reshape(nz_total, ny * nx)
    starts_arr = np.asarray(starts)
    if len(starts) * depth == nz_total and np.array_equal(starts_arr, np.arange(len(starts)) * depth):
        blocks = flat.reshape(len(starts), depth, ny * nx)  # the blocks tile the stack: a view
    else:
        blocks = flat[starts_arr[:, None] + np.arange(depth)[None, :]]
    fz, nps_z = _nps_z_profile(blocks, ny * nx, spacing[0])
    dfz = abs(fz[1] - fz[0]) if fz.size > 1 else 1.0 / spacing[0]
    return {
        "applicable": True,
        "noise_hu": float(np.sqrt(nps_z.sum() * dfz)),
        "roi_count": int(blocks.shape[0]),
        "roi_depth_vox": depth,
        "frequency_z_per_mm": [round(float(v), 6) for v in fz],
        "nps_z_hu2mm": [float(v) for v in nps_z],
    }


def _nps_z_profile(blocks: np.ndarray, pixels: int, dz: float) -> tuple[np.ndarray, np.ndarray]:
    """Centred fz (cycles/mm) and the 3-D NPS integrated over fy, fx (HU^2 mm) of
    detrended blocks ``blocks`` (n, Nz, pixels) of ``pixels`` = Nx Ny pixels a slice
    (see :func:`_measure_3d`)."""
    n, depth, _ = blocks.shape
    gram = np.matmul(blocks, blocks.transpose(0, 2, 1)).sum(axis=0, dtype=np.float64)
    k = np.arange(depth)
    dft = np.exp(-2j * np.pi * np.outer(k, k) / depth)  # rows d_k
    energy = np.einsum("kz,zw,kw->k", dft, gram, dft.conj()).real
    block_sums = blocks.sum(axis=2, dtype=np.float64).sum(axis=1)
    energy[0] -= float(np.square(block_sums).sum()) / pixels  # the block means' DC term
    nps_z = dz / (depth * pixels * n) * energy
    return np.fft.fftshift(np.fft.fftfreq(depth, dz)), np.fft.fftshift(nps_z)


def _findings(record: dict[str, Any], s: dict[str, Any]) -> list[Finding]:
    sev = Severity.REVIEW if record["method"] == "patient" else Severity.FAIL
    out: list[Finding] = []
    if s["noise_hu_max"] is not None and record["noise_hu"] > float(s["noise_hu_max"]):
        out.append(Finding(NAME, sev, f"noise {record['noise_hu']:.2f} HU exceeds "
                                      f"the limit {float(s['noise_hu_max']):.2f} HU"))
    cmp = record.get("texture_vs_baseline")
    if cmp:
        if abs(cmp["f_av_ratio"] - 1.0) > s["f_av_ratio_tolerance"]:
            out.append(Finding(NAME, sev, f"noise texture changed: f_av is {cmp['f_av_ratio']:.3f} x "
                                          f"the baseline (tolerance +/- {s['f_av_ratio_tolerance']:.2f})"))
        if abs(cmp["noise_ratio"] - 1.0) > s["noise_ratio_tolerance"]:
            out.append(Finding(NAME, sev, f"noise magnitude is {cmp['noise_ratio']:.3f} x the baseline "
                                          f"(tolerance +/- {s['noise_ratio_tolerance']:.2f})"))
        if not cmp["nps_correlation"] >= s["nps_correlation_min"]:
            out.append(Finding(NAME, Severity.REVIEW, f"NPS shape differs from the baseline: correlation "
                                                      f"{cmp['nps_correlation']:.3f} < {s['nps_correlation_min']:.2f}"))
    return out


def _result(record: dict[str, Any], rois: Sequence[Roi], s: dict[str, Any]) -> AnalysisResult:
    if s["baseline"]:
        record["texture_vs_baseline"] = compare_nps(record, s["baseline"])
    findings = _findings(record, s)
    record["applicable"] = True
    record["flagged"] = any(f.severity != Severity.INFO for f in findings)
    return AnalysisResult(NAME, record, findings, Overlays(rois=list(rois)))


def _finite_or_reason(volume: Volume, regions: Regions | None = None) -> str:
    bad = count_nonfinite(volume, regions)
    return f"volume contains {bad} NaN or infinite voxels" if bad else ""


def _choose_rois(volume: Volume, regions: Regions, s: dict[str, Any]) -> tuple[str, RoiSet, float]:
    if s["rois"]:
        return "user", user_rois(volume, s["rois"], s), float("nan")
    found = phantom_rois(volume, regions, s)
    if found.rois or "inserts" in found.reason or "too small" in found.reason:
        return "phantom", found, float("nan")
    if not regions.has_body:
        return "patient", RoiSet([], f"no phantom and no body: {found.reason}"), float("nan")
    reason = _finite_or_reason(volume, regions)  # patient images: the whole volume, as before
    if reason:
        return "patient", RoiSet([], reason), float("nan")
    maps = patient_slice_maps(volume, regions, s["gnl_kernel_mm"], s["soft_tissue_hu"], _patient_slice_count(s))
    gnl, pixels = noise_level_of(maps)
    if not np.isfinite(gnl) or gnl <= 0:
        return "patient", RoiSet([], f"no phantom ({found.reason}) and no noisy soft tissue "
                                     f"for the global noise level ({pixels} soft-tissue pixels)"), gnl
    return "patient", patient_rois(volume, regions, s, gnl, maps), gnl


def analyse(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> AnalysisResult:
    """Measure the NPS, noise magnitude and texture of ``volume`` (see the module docstring).

    Parameters
    ----------
    volume : Volume
    regions : Regions
    settings : dict, optional
        Overrides of :data:`DEFAULTS`; unknown keys raise :class:`ProfileError`.

    Returns
    -------
    AnalysisResult
        ``record`` with noise_hu, f_peak_per_mm, f_av_per_mm, frequency_per_mm,
        nps_1d_hu2mm2, roi_count, method (and global_noise_hu for patients,
        texture_vs_baseline with a baseline); ``overlays.rois`` the ROIs used.

    References
    ----------
    ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019; IEC 62220-1-1;
    Solomon, Christianson, Samei, Med Phys 39(10), 2012; Christianson et al.,
    AJR 205(1), 2015.
    """
    s = _settings(settings)
    if s["pair_with"] is not None:
        rest = {k: v for k, v in (settings or {}).items() if k != "pair_with"}
        return nps_from_pair(volume, s["pair_with"], regions, settings=rest)
    method, found, gnl = _choose_rois(volume, regions, s)
    if not found.rois:
        return AnalysisResult.not_applicable(NAME, found.reason)
    reason = nonfinite_reason(volume, found.rois)  # every pixel of the measured slices
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    record = measure_nps(volume.hu, volume.spacing_mm, found.rois, s)
    if isinstance(record, str):
        return AnalysisResult.not_applicable(NAME, record)
    record["method"] = method
    record["global_noise_hu"] = gnl if method == "patient" else None
    return _result(record, found.rois, s)


def nps_from_pair(
    volume_a: Volume,
    volume_b: Volume,
    regions: Regions | None = None,
    *,
    rois: Sequence[dict[str, Any]] | None = None,
    settings: dict[str, Any] | None = None,
) -> AnalysisResult:
    """NPS by the subtraction method from two repeated reconstructions.

    The noise image is (I1 - I2) / sqrt(2), which removes the deterministic content and
    keeps the variance of one image; it is formed only inside the ROIs (single
    precision), never as a whole volume. ROIs are ``rois`` (the user form), else found on
    ``volume_a`` (phantom, then soft-tissue patches).

    Parameters
    ----------
    volume_a, volume_b : Volume
        Same shape and spacing.
    regions : Regions, optional
        Regions of ``volume_a``; computed when omitted.
    rois : list of dict, optional
        ``{"slices": [z0, z1], "yx0_vox": [y, x], "size_vox": n}``.
    settings : dict, optional
        Overrides of :data:`DEFAULTS`.

    Returns
    -------
    AnalysisResult
        As :func:`analyse`, with ``method`` = ``"pair"``.

    References
    ----------
    ICRU Report 87 (2012); AAPM TG-233, Med Phys 46(11), 2019 (subtraction of repeated
    scans).
    """
    s = _settings({**(settings or {}), **({"rois": list(rois)} if rois else {})})
    if volume_a.shape != volume_b.shape or not np.allclose(volume_a.spacing_mm, volume_b.spacing_mm):
        return AnalysisResult.not_applicable(
            NAME, f"the two reconstructions differ: shapes {volume_a.shape} and {volume_b.shape}, "
                  f"spacing {volume_a.spacing_mm} and {volume_b.spacing_mm} mm")
    regions = regions if regions is not None else find_regions(volume_a)
    _, found, _ = _choose_rois(volume_a, regions, s)
    if not found.rois:
        return AnalysisResult.not_applicable(NAME, found.reason)
    reason = nonfinite_reason(volume_a, found.rois) or nonfinite_reason(volume_b, found.rois)
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    # the noise image only inside the ROIs: no full-size difference volume
    diff = roi_images(volume_a.hu, found.rois)
    diff -= roi_images(volume_b.hu, found.rois)
    diff *= np.float32(1.0 / np.sqrt(2.0))
    record = measure_roi_images(diff, volume_a.spacing_mm, found.rois, s)
    if isinstance(record, str):
        return AnalysisResult.not_applicable(NAME, record)
    record["method"] = "pair"
    record["global_noise_hu"] = None
    return _result(record, found.rois, s)
