"""Edge spread -> task transfer function: the numerical core of the ``ttf`` analysis.

Every edge kind (circular rod insert, straight slanted edge, skin-air outline) ends the
same way: pixels with a signed distance to the edge, binned into an oversampled ESF,
differentiated to the LSF, windowed, Fourier transformed, normalised at f = 0 and
corrected for the finite difference and the bin width. This module holds that common
path and the geometry of each edge kind; :mod:`reconaudit.checker.analyses.ttf` runs it
on volumes.

Distances are in mm. The ESF runs from the dark side to the bright side only after
:func:`ttf_from_esf` has normalised the sign, so an edge of either polarity (an air rod
in water, a bone rod in water) gives the same, positive LSF.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from scipy import ndimage
from scipy.optimize import isotonic_regression

#: ESF conditioning methods understood by :func:`condition_esf`.
CONDITIONING = ("auto", "none", "monotone")

#: Default zero-padded length (mm) of the LSF before its FFT (:func:`ttf_from_esf`): sets
#: the frequency step, 1 / 80 mm.
PAD_TO_MM = 80.0


@dataclass
class BinnedEsf:
    """An oversampled edge spread function.

    Attributes
    ----------
    position_mm : ndarray
        Bin centres (signed distance to the edge, mm).
    esf_hu : ndarray
        Mean CT number in each bin (empty bins interpolated from their neighbours).
    counts : ndarray of int
        Pixels in each bin.
    bin_mm : float
        Bin width.
    """

    position_mm: np.ndarray
    esf_hu: np.ndarray
    counts: np.ndarray
    bin_mm: float
    #: Running means of ``esf_hu`` and their shapes already computed (by smoothing
    #: bins), so that :func:`esf_shape` and :func:`esf_overshoot` of one ESF smooth and
    #: describe it once; an ESF's arrays are not changed after it is made.
    _smoothed: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    @property
    def empty_fraction(self) -> float:
        return float(np.count_nonzero(self.counts == 0)) / self.counts.size if self.counts.size else 1.0

    def smoothed(self, size: int) -> np.ndarray:
        """Running mean of ``size`` bins of ``esf_hu`` (``mode="nearest"``), computed once."""
        y = self._smoothed.get(size)
        if y is None:
            y = self._smoothed[size] = ndimage.uniform_filter1d(self.esf_hu, size=size, mode="nearest")
        return y

    def shape_of_smoothed(self, size: int) -> "EsfShape":
        """:func:`_shape_of_smoothed` of :meth:`smoothed` (``size``), computed once."""
        key = ("shape", size)
        shape = self._smoothed.get(key)
        if shape is None:
            shape = self._smoothed[key] = _shape_of_smoothed(self.smoothed(size), self.position_mm)
        return shape


@dataclass
class TtfCurve:
    """A TTF (MTF of an edge) on a fine frequency grid, with its headline numbers."""

    frequency_per_mm: np.ndarray
    ttf: np.ndarray
    f50_per_mm: float
    f10_per_mm: float
    lsf_window_mm: float
    notes: list[str] = field(default_factory=list)


# --------------------------------------------------------------------------- binning
class EsfAccumulator:
    """Sums and counts of an oversampled ESF, built up from batches of pixels.

    Every batch is binned with one ``np.bincount`` over all its pixels (those outside
    the range, not finite or masked out go to a discarded extra bin), so no batch is
    copied by boolean indexing; :meth:`binned` gives the same :class:`BinnedEsf` as
    :func:`bin_esf` of all the batches' pixels at once.

    References
    ----------
    Richard et al., Med Phys 39(7):4115-4122, 2012 (radial ESF from every pixel,
    oversampled and binned).
    """

    def __init__(self, *, bin_mm: float, lo_mm: float, hi_mm: float) -> None:
        self.bin_mm, self.lo_mm, self.hi_mm = float(bin_mm), float(lo_mm), float(hi_mm)
        self.n_bins = max(int(np.floor((hi_mm - lo_mm) / bin_mm)), 1)
        self.counts = np.zeros(self.n_bins, dtype=np.int64)
        self.sums = np.zeros(self.n_bins)

    def add(self, distance_mm: np.ndarray, values: np.ndarray, mask: np.ndarray | None = None, *,
            multiplicity: np.ndarray | None = None) -> None:
        """Bin one batch: ``distance_mm`` and ``values`` of the same shape; ``mask``
        (same shape, optional) selects the pixels that count.

        With ``multiplicity`` (same shape, or one integer for all, positive), each entry of ``values``
        is the sum of that many pixel values at the same distance (pixels pooled over
        slices before binning): it adds its value to the bin sum and its multiplicity
        to the bin count, which is what binning the pooled pixels one by one gives.
        """
        d = np.asarray(distance_mm, dtype=float).ravel()
        v = np.asarray(values, dtype=float).ravel()
        keep = (d >= self.lo_mm) & (d < self.hi_mm) & np.isfinite(v)
        if mask is not None:
            keep &= np.asarray(mask, dtype=bool).ravel()
        n = self.n_bins
        with np.errstate(invalid="ignore"):
            idx = np.minimum(((d - self.lo_mm) / self.bin_mm).astype(np.int64), n - 1)
        idx = np.where(keep, idx, n)
        if multiplicity is None:
            self.counts += np.bincount(idx, minlength=n + 1)[:n]
        elif np.ndim(multiplicity) == 0:  # one multiplicity for all: the counts times it
            self.counts += int(multiplicity) * np.bincount(idx, minlength=n + 1)[:n]
        else:
            m = np.asarray(multiplicity, dtype=float).ravel()
            self.counts += np.rint(np.bincount(idx, weights=m, minlength=n + 1)[:n]).astype(np.int64)
        self.sums += np.bincount(idx, weights=np.where(keep, v, 0.0), minlength=n + 1)[:n]

    def binned(self) -> BinnedEsf:
        """The ESF so far; empty bins filled by linear interpolation between the nearest
        filled ones."""
        return self.binned_range(0, self.n_bins)

    def binned_range(self, start: int, n: int, *, offset_mm: float = 0.0) -> BinnedEsf:
        """The ESF of bins ``start`` .. ``start + n`` - 1 alone (as :meth:`binned` of an
        accumulator of those bins only); positions relative to ``offset_mm`` (the bins'
        distances minus ``offset_mm``). Empty bins are filled by linear interpolation
        between the nearest filled ones of the range."""
        if start < 0 or n < 1 or start + n > self.n_bins:
            raise ValueError(f"bins {start}..{start + n - 1} outside the accumulator's 0..{self.n_bins - 1}")
        position = self.lo_mm - offset_mm + (np.arange(start, start + n) + 0.5) * self.bin_mm
        counts, sums = self.counts[start : start + n].copy(), self.sums[start : start + n]
        esf = np.full(n, np.nan)
        filled = counts > 0
        esf[filled] = sums[filled] / counts[filled]
        if filled.sum() >= 2:
            esf = np.interp(position, position[filled], esf[filled])
        return BinnedEsf(position_mm=position, esf_hu=esf, counts=counts, bin_mm=self.bin_mm)


def bin_esf(
    distance_mm: np.ndarray,
    values: np.ndarray,
    *,
    bin_mm: float,
    lo_mm: float,
    hi_mm: float,
) -> BinnedEsf:
    """Bin pixel values by their signed distance to an edge (``np.bincount``).

    Parameters
    ----------
    distance_mm, values : ndarray
        Same shape; distance of each pixel centre to the edge and its CT number.
    bin_mm : float
        Bin width (at most a tenth of a pixel for the oversampled ESF).
    lo_mm, hi_mm : float
        Distance range kept.

    Returns
    -------
    BinnedEsf
        Empty bins are filled by linear interpolation between the nearest filled ones.

    References
    ----------
    Richard S, Husarik DB, Yadava G, Murphy SN, Samei E. Towards task-based assessment of
    CT performance: system and object MTF across different reconstruction algorithms.
    Med Phys 39(7):4115-4122, 2012 (radial ESF from every pixel, oversampled and binned).
    """
    acc = EsfAccumulator(bin_mm=bin_mm, lo_mm=lo_mm, hi_mm=hi_mm)
    acc.add(distance_mm, values)
    return acc.binned()


# ------------------------------------------------------------------ conditioning
def condition_esf(esf: BinnedEsf, method: str = "auto") -> tuple[BinnedEsf, str]:
    """Condition a binned ESF before differentiation; returns the ESF and the method used.

    ``"none"`` keeps the bin means (noise is then limited by the LSF window only);
    ``"monotone"`` replaces them by the count-weighted least-squares monotone fit
    (isotonic regression, direction from the edge polarity), which removes the noise
    ripples of the plateaus; it would also remove a real overshoot of an edge-enhancing
    kernel, so ``"auto"`` (the default) uses it only when :func:`esf_overshoot` finds
    none beyond the noise, and keeps the raw bins otherwise.

    References
    ----------
    Barlow RE, Bartholomew DJ, Bremner JM, Brunk HD. Statistical Inference under Order
    Restrictions. Wiley, 1972 (isotonic regression, pool-adjacent-violators).
    """
    if method not in CONDITIONING:
        raise ValueError(f"ESF conditioning {method!r} unknown; expected one of {CONDITIONING}")
    if method == "auto":
        method = "none" if esf_overshoot(esf) > 0 else "monotone"
    if method == "none" or esf.esf_hu.size < 3:
        return esf, "none"
    rising = esf.esf_hu[-1] >= esf.esf_hu[0]
    weights = np.maximum(esf.counts.astype(float), 0.5)
    fit = isotonic_regression(esf.esf_hu, weights=weights, increasing=bool(rising)).x
    return BinnedEsf(esf.position_mm, np.asarray(fit, dtype=float), esf.counts, esf.bin_mm), "monotone"


def esf_overshoot(esf: BinnedEsf, smooth_mm: float = 0.4, floor: float = 0.03) -> float:
    """Largest over- or undershoot of the smoothed ESF beyond its plateaus, as a fraction
    of the edge contrast; 0 when it stays within ``floor`` or four standard errors of
    the smoothed bins.

    References
    ----------
    Common practice, no source (ringing of edge-enhancing kernels shows as overshoot).
    """
    size = _smoothing_bins(esf, smooth_mm)
    y = esf.smoothed(size)
    shape = esf.shape_of_smoothed(size)  # esf_shape(esf, smooth_mm), computed once
    contrast = shape.high_hu - shape.low_hu
    if not np.isfinite(contrast) or contrast == 0:
        return 0.0
    t = (y - shape.low_hu) / contrast
    over = max(float(t.max()) - 1.0, -float(t.min()), 0.0)
    resid = esf.esf_hu - y
    mean_count = float(esf.counts.sum()) / esf.counts.size  # counts.mean(), without its overhead
    n_per_window = max(mean_count * size, 1.0)
    se = float(_std(resid) * np.sqrt(max(mean_count, 1.0)) / np.sqrt(n_per_window))
    limit = max(floor, 4.0 * se / abs(contrast))
    return over if over > limit else 0.0


# ------------------------------------------------------------------ ESF -> TTF
@dataclass
class EsfShape:
    """Plateaus, midpoint crossing and 10-90 % width of a smoothed ESF.

    Used to place and size the LSF window (and to estimate contrast), never as a result.
    """

    low_hu: float
    high_hu: float
    centre_mm: float
    width_10_90_mm: float


def esf_shape(esf: BinnedEsf, smooth_mm: float = 0.4) -> EsfShape:
    """Describe a binned ESF after a running mean of ``smooth_mm``.

    The plateaus are the medians of the first and last tenth of the range; the centre
    is the midpoint crossing nearest the middle of the range.
    """
    return esf.shape_of_smoothed(_smoothing_bins(esf, smooth_mm))


def _smoothing_bins(esf: "BinnedEsf | BinnedEsfs", smooth_mm: float) -> int:
    """Odd number of bins (at least 3) of the running mean of ``smooth_mm``."""
    return max(3, int(round(smooth_mm / esf.bin_mm)) | 1)


def _median(values: np.ndarray) -> float:
    """``np.median`` of a small 1-D array, from one sort (the same value, bit for bit:
    the middle element, or the mean of the two middle ones; NaN if any is NaN)."""
    v = np.sort(values)
    n = v.size
    if n == 0 or v[-1] != v[-1]:  # empty, or NaN (sorted last)
        return float("nan")
    return float(v[n // 2]) if n % 2 else float((v[n // 2 - 1] + v[n // 2]) / 2.0)


def _std(values: np.ndarray) -> float:
    """``np.std`` of a 1-D float array, computed the same way (mean, squared deviations,
    their mean, square root) without its argument handling."""
    dev = values - values.sum() / values.size
    return float(np.sqrt((dev * dev).sum() / values.size))


def _shape_of_smoothed(y: np.ndarray, pos: np.ndarray) -> EsfShape:
    """:class:`EsfShape` of the smoothed ESF values ``y`` at the bin centres ``pos``."""
    k = max(y.size // 10, 1)
    first, last = _median(y[:k]), _median(y[-k:])
    nan = float("nan")
    if first == last or not np.isfinite(first + last):
        return EsfShape(first, last, nan, nan)
    t = (y - first) / (last - first)
    cross = np.flatnonzero((t[:-1] < 0.5) & (t[1:] >= 0.5))
    if cross.size == 0:
        return EsfShape(first, last, nan, nan)
    middle = 0.5 * (pos[0] + pos[-1])
    i = int(cross[np.argmin(np.abs(pos[cross] - middle))])
    centre = float(pos[i] + (0.5 - t[i]) * (pos[i + 1] - pos[i]) / (t[i + 1] - t[i]))
    left = np.flatnonzero(t[: i + 1] <= 0.1)
    right = np.flatnonzero(t[i:] >= 0.9)
    width = float(pos[i + right[0]] - pos[left[-1]]) if left.size and right.size else nan
    return EsfShape(first, last, centre, width)


def lsf_window(position_mm: np.ndarray, centre_mm: float, half_width_mm: float, taper: float = 0.3) -> np.ndarray:
    """Flat-topped cosine-tapered (Tukey) window about ``centre_mm``.

    The window is 1 over the inner ``1 - taper`` of its half-width and falls to 0 by a
    raised cosine beyond, so the LSF core is not weighted at all (no bias), while the
    noise in the far tails is cut.

    ``centre_mm`` and ``half_width_mm`` may be arrays that broadcast against
    ``position_mm`` (e.g. one centre and half-width per row of several ESFs' positions).

    References
    ----------
    Harris FJ. On the use of windows for harmonic analysis with the discrete Fourier
    transform. Proc IEEE 66(1):51-83, 1978 (Tukey window).
    """
    u = np.abs(np.asarray(position_mm, dtype=float) - centre_mm) / np.maximum(half_width_mm, 1e-12)
    w = np.ones_like(u)
    flat = 1.0 - taper
    edge = (u > flat) & (u < 1.0)
    w[edge] = 0.5 * (1.0 + np.cos(np.pi * (u[edge] - flat) / taper))
    w[u >= 1.0] = 0.0
    return w


def _central_difference(y: np.ndarray, dx: float) -> np.ndarray:
    """``np.gradient(y, dx)`` of a 1-D array (central differences inside, one-sided at
    the two ends), computed the same way without its argument handling."""
    out = np.empty(y.shape, dtype=float)
    if y.size < 2:
        raise ValueError("at least two ESF bins are needed for the LSF")
    out[1:-1] = (y[2:] - y[:-2]) / (2.0 * dx)
    out[0] = (y[1] - y[0]) / dx
    out[-1] = (y[-1] - y[-2]) / dx
    return out


def first_crossing(frequency: np.ndarray, ttf: np.ndarray, level: float) -> float:
    """Lowest frequency where ``ttf`` falls to ``level`` (linear interpolation); NaN if never."""
    below = np.nonzero(ttf <= level)[0]
    if below.size == 0 or below[0] == 0:
        return float("nan")
    i = int(below[0])
    f0, f1, t0, t1 = frequency[i - 1], frequency[i], ttf[i - 1], ttf[i]
    return float(f0 + (t0 - level) * (f1 - f0) / (t0 - t1)) if t0 != t1 else float(f1)


def ttf_from_esf(
    esf: BinnedEsf,
    *,
    window_widths: float = 3.0,
    max_frequency_per_mm: float | None = None,
    pad_to_mm: float = PAD_TO_MM,
) -> TtfCurve:
    """TTF from an oversampled ESF.

    Steps: central-difference LSF; sign made positive; a flat-topped window of half-width
    ``window_widths`` x the ESF 10-90 % width about the LSF centroid (never wider than the
    ESF range); zero-padded FFT; modulus normalised at f = 0; division by the transfer
    of the central difference, ``sinc(2 f dr)``, and of the bin average, ``sinc(f dr)``.

    Parameters
    ----------
    esf : BinnedEsf
    window_widths : float
        Half-width of the LSF window in ESF 10-90 % widths.
    max_frequency_per_mm : float, optional
        Highest frequency kept in the returned curve (default: all).
    pad_to_mm : float
        Zero-padded length of the LSF; sets the frequency step (1 / pad_to_mm).

    References
    ----------
    Cunningham IA, Fenster A. A method for modulation transfer function determination
    from edge profiles with correction for finite-element differentiation. Med Phys
    14(4):533-537, 1987. Richard et al., Med Phys 39(7), 2012.
    """
    dr = esf.bin_mm
    lsf = _central_difference(esf.esf_hu, dr)
    if lsf.sum() < 0:
        lsf = -lsf
    shape = esf_shape(esf)
    width = shape.width_10_90_mm
    pos = esf.position_mm
    span = 0.5 * (pos[-1] - pos[0])
    notes: list[str] = []
    centre = shape.centre_mm if np.isfinite(shape.centre_mm) else 0.5 * (pos[0] + pos[-1])
    reach = min(centre - pos[0], pos[-1] - centre)
    half = window_widths * width if np.isfinite(width) else span
    if not np.isfinite(width):
        notes.append("ESF 10-90 % width not measurable; the LSF window spans the whole ESF")
    if half > reach:
        half = reach
        notes.append(f"LSF window limited to +/-{reach:.2f} mm by the ESF range")
    lsf_w = lsf * lsf_window(pos, centre, half)
    n = _fft_length(pad_to_mm, dr, lsf_w.size)
    spectrum = np.abs(np.fft.rfft(lsf_w, n=n))
    freq, safe_correction, usable = _frequency_grid(n, float(dr))
    if spectrum[0] <= 0:
        nan = np.full_like(freq, np.nan)
        return TtfCurve(freq.copy(), nan, float("nan"), float("nan"), 2 * half, notes + ["LSF integrates to zero"])
    ttf = spectrum / spectrum[0]
    ttf = np.where(usable, ttf / safe_correction, np.nan)
    f50 = first_crossing(freq[usable], ttf[usable], 0.5)
    f10 = first_crossing(freq[usable], ttf[usable], 0.1)
    if max_frequency_per_mm is not None:
        keep = freq <= max_frequency_per_mm + 1e-12
        freq, ttf = freq[keep], ttf[keep]
    else:
        freq = freq.copy()
    return TtfCurve(freq, ttf, f50, f10, 2 * half, notes)


@functools.lru_cache(maxsize=16)
def _frequency_grid(n: int, dr: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Frequencies of an ``n``-point rfft at spacing ``dr`` (mm), the transfer of the
    central difference and the bin average there, ``sinc(2 f dr) sinc(f dr)``, with 1
    where it is too small to divide by (below 0.2), and where it is not (computed once
    per grid; read-only)."""
    freq = np.fft.rfftfreq(n, d=dr)
    correction = np.sinc(2.0 * freq * dr) * np.sinc(freq * dr)
    usable = correction > 0.2
    out = (freq, np.where(usable, correction, 1.0), usable)
    for a in out:
        a.flags.writeable = False
    return out


# ------------------------------------------------------------------ several ESFs at once
# The rods of a phantom are measured together: their ESFs are binned with one bincount
# (EsfAccumulators), and described, conditioned, differentiated, windowed and Fourier
# transformed as the rows of 2-D arrays (BinnedEsfs). Rows may differ in length (each
# rod's range is its own): each row is padded on the right with its last value, every
# step reads only a row's own bins, and each row's result is that of the one-ESF
# function (esf_shape, esf_overshoot, condition_esf, ttf_from_esf) for that ESF alone up
# to the order of the additions of a few sums over a row (tests/checker/test_ttf.py).
@dataclass
class EsfShapes:
    """:class:`EsfShape` of each row of :class:`BinnedEsfs` (arrays of one value a row)."""

    low_hu: np.ndarray
    high_hu: np.ndarray
    centre_mm: np.ndarray
    width_10_90_mm: np.ndarray


@dataclass
class BinnedEsfs:
    """Several oversampled ESFs of one bin width, one a row (left-aligned).

    Attributes
    ----------
    position_mm, esf_hu : ndarray (k, n)
        As :class:`BinnedEsf`, row by row; row j's bins are its first ``lengths[j]``,
        beyond them the positions go on by the bin width and ``esf_hu`` repeats its last
        bin (so a running mean with ``mode="nearest"`` of the row is the one of its bins).
    counts : ndarray of int (k, n)
        Pixels in each bin (0 beyond a row's length).
    bin_mm : float
    lengths : ndarray of int (k,)
        Bins of each row.
    """

    position_mm: np.ndarray
    esf_hu: np.ndarray
    counts: np.ndarray
    bin_mm: float
    lengths: np.ndarray
    _smoothed: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    @classmethod
    def stack(cls, esfs: "Sequence[BinnedEsf]") -> "BinnedEsfs":
        """The ESFs (of one bin width) as the rows of one :class:`BinnedEsfs`."""
        lengths = np.array([e.esf_hu.size for e in esfs], dtype=np.int64)
        n = int(lengths.max())
        pos, esf, counts = np.empty((len(esfs), n)), np.empty((len(esfs), n)), np.zeros((len(esfs), n), dtype=np.int64)
        for j, e in enumerate(esfs):
            m = e.esf_hu.size
            pos[j, :m], pos[j, m:] = e.position_mm, e.position_mm[-1] + np.arange(1, n - m + 1) * e.bin_mm
            esf[j, :m], esf[j, m:] = e.esf_hu, e.esf_hu[-1]
            counts[j, :m] = e.counts
        return cls(pos, esf, counts, esfs[0].bin_mm, lengths)

    def __len__(self) -> int:
        return self.esf_hu.shape[0]

    def row(self, j: int) -> BinnedEsf:
        """Row ``j`` as a :class:`BinnedEsf` (views of this one's arrays)."""
        n = int(self.lengths[j])
        return BinnedEsf(self.position_mm[j, :n], self.esf_hu[j, :n], self.counts[j, :n], self.bin_mm)

    def in_row(self) -> np.ndarray:
        """(k, n) bool: which entries are bins of their row."""
        return np.arange(self.esf_hu.shape[1])[None, :] < self.lengths[:, None]

    def last(self, values: np.ndarray) -> np.ndarray:
        """The entry of each row of ``values`` (k, n) at the row's last bin."""
        return values[np.arange(values.shape[0]), self.lengths - 1]

    def smoothed(self, size: int) -> np.ndarray:
        """:meth:`BinnedEsf.smoothed` of every row (one running mean along the rows)."""
        y = self._smoothed.get(size)
        if y is None:
            y = self._smoothed[size] = ndimage.uniform_filter1d(self.esf_hu, size=size, axis=-1, mode="nearest")
        return y

    def shapes_of_smoothed(self, size: int) -> EsfShapes:
        """:meth:`BinnedEsf.shape_of_smoothed` of every row, computed once."""
        key = ("shape", size)
        shape = self._smoothed.get(key)
        if shape is None:
            shape = self._smoothed[key] = _shapes_of_smoothed(self.smoothed(size), self.position_mm, self.lengths)
        return shape


class EsfAccumulators:
    """Several :class:`EsfAccumulator` of one bin width whose bins lie end to end in one
    array, so that pixels of all of them are binned with one ``np.bincount``.

    Accumulator ``j`` covers ``lo_mm[j]`` .. ``hi_mm[j]`` with as many bins as an
    :class:`EsfAccumulator` of that range; each pixel says which accumulator it belongs
    to, and its bin index is offset by the bins of the accumulators before it. Each
    accumulator's counts and sums are those it would have alone (the same pixels in the
    same order, so the same additions).

    References
    ----------
    Richard et al., Med Phys 39(7):4115-4122, 2012 (radial ESF from every pixel,
    oversampled and binned).
    """

    def __init__(self, *, bin_mm: float, lo_mm: Sequence[float], hi_mm: Sequence[float]) -> None:
        self.bin_mm = float(bin_mm)
        self.lo_mm = np.asarray(lo_mm, dtype=float)
        self.hi_mm = np.asarray(hi_mm, dtype=float)
        self.n_bins = np.array([max(int(np.floor((h - lo) / self.bin_mm)), 1)
                                for lo, h in zip(self.lo_mm.tolist(), self.hi_mm.tolist())], dtype=np.int64)
        self.first_bin = np.concatenate([[0], np.cumsum(self.n_bins)[:-1]]).astype(np.int64)
        total = int(self.n_bins.sum())
        self.counts = np.zeros(total, dtype=np.int64)
        self.sums = np.zeros(total)

    def add(self, which: np.ndarray, distance_mm: np.ndarray, values: np.ndarray, mask: np.ndarray | None = None,
            *, multiplicity: np.ndarray | None = None) -> None:
        """:meth:`EsfAccumulator.add` of one batch of pixels of several accumulators:
        ``which`` (same shape, int) says whose each pixel is; ``multiplicity`` (same
        shape, optional) as there."""
        j = np.asarray(which, dtype=np.intp).ravel()
        d = np.asarray(distance_mm, dtype=float).ravel()
        v = np.asarray(values, dtype=float).ravel()
        lo = self.lo_mm[j]
        keep = (d >= lo) & (d < self.hi_mm[j]) & np.isfinite(v)
        if mask is not None:
            keep &= np.asarray(mask, dtype=bool).ravel()
        total = self.counts.size
        with np.errstate(invalid="ignore"):
            idx = np.minimum(((d - lo) / self.bin_mm).astype(np.int64), self.n_bins[j] - 1) + self.first_bin[j]
        idx = np.where(keep, idx, total)
        if multiplicity is None:
            self.counts += np.bincount(idx, minlength=total + 1)[:total]
        else:
            m = np.asarray(multiplicity, dtype=float).ravel()
            self.counts += np.rint(np.bincount(idx, weights=m, minlength=total + 1)[:total]).astype(np.int64)
        self.sums += np.bincount(idx, weights=np.where(keep, v, 0.0), minlength=total + 1)[:total]

    def binned_ranges(self, starts: Sequence[int], lengths: Sequence[int],
                      offsets_mm: Sequence[float] | None = None) -> BinnedEsfs:
        """:meth:`EsfAccumulator.binned_range` (``starts[j]``, ``lengths[j]``,
        ``offsets_mm[j]``) of every accumulator j, as the rows of one :class:`BinnedEsfs`."""
        st = np.asarray(starts, dtype=np.int64)
        ns = np.asarray(lengths, dtype=np.int64)
        off = np.zeros(st.size) if offsets_mm is None else np.asarray(offsets_mm, dtype=float)
        if not all(n >= 1 and a >= 0 and a + n <= b for a, n, b in zip(st.tolist(), ns.tolist(), self.n_bins.tolist())):
            raise ValueError(f"bins {st.tolist()} + {ns.tolist()} outside the accumulators' {self.n_bins.tolist()}")
        cols = np.arange(int(ns.max()))
        bins = st[:, None] + cols
        position = (self.lo_mm - off)[:, None] + (bins + 0.5) * self.bin_mm
        inside = cols[None, :] < ns[:, None]
        at = np.minimum(bins, (st + ns - 1)[:, None]) + self.first_bin[:, None]  # beyond a row: its last bin
        counts, sums = np.where(inside, self.counts[at], 0), self.sums[at]
        filled = counts > 0
        with np.errstate(invalid="ignore", divide="ignore"):
            esf = np.where(filled | ~inside, sums / self.counts[at], np.nan)
        n_filled = filled.sum(axis=1)
        for i in np.flatnonzero((n_filled >= 2) & (n_filled < ns)):  # empty bins: interpolated
            n, f = int(ns[i]), filled[i]
            esf[i, :n] = np.interp(position[i, :n], position[i][f], esf[i][f])
            esf[i, n:] = esf[i, n - 1]
        return BinnedEsfs(position, esf, counts, self.bin_mm, ns)


def esf_shapes(esfs: BinnedEsfs, smooth_mm: float = 0.4) -> EsfShapes:
    """:func:`esf_shape` of every row of ``esfs``."""
    return esfs.shapes_of_smoothed(_smoothing_bins(esfs, smooth_mm))


def _row_medians(values: np.ndarray, counts: list[int]) -> np.ndarray:
    """:func:`_median` of the first ``counts[j]`` entries of every row j of ``values``
    (NaN for a row holding a NaN there)."""
    k, m = values.shape
    if min(counts) == m:  # every row's entries: one sort, the middle column(s)
        v = np.sort(values, axis=1)
        med = v[:, m // 2] if m % 2 else (v[:, m // 2 - 1] + v[:, m // 2]) / 2.0
    else:
        c = np.asarray(counts)
        v = np.sort(np.where(np.arange(m)[None, :] < c[:, None], values, np.inf), axis=1)
        r = np.arange(k)
        a, b = v[r, (c - 1) // 2], v[r, c // 2]
        med = np.where(c % 2 == 1, a, (a + b) / 2.0)
    return np.where(v[:, -1] != v[:, -1], np.nan, med)  # NaN sorts last


def _shapes_of_smoothed(y: np.ndarray, pos: np.ndarray, lengths: np.ndarray) -> EsfShapes:
    """:func:`_shape_of_smoothed` of every row of ``y`` (k, n) at the positions ``pos``
    (k, n), row j of ``lengths[j]`` bins."""
    k, n = y.shape
    if n < 2:  # no crossing in one bin
        nan = np.full(k, np.nan)
        return EsfShapes(y[:, 0].copy(), y[:, 0].copy(), nan, nan.copy())
    ns = lengths.tolist()
    m = [max(length // 10, 1) for length in ns]
    mm = max(m)
    r = np.arange(k)
    first = _row_medians(y[:, :mm], m)
    if min(ns) == n:  # rows of one length: the last bins are the last columns
        last = _row_medians(y[:, n - mm :], m) if min(m) == mm else _row_medians(
            y[r[:, None], np.minimum((lengths - np.asarray(m))[:, None] + np.arange(mm), n - 1)], m)
    else:
        last = _row_medians(y[r[:, None], np.minimum((lengths - np.asarray(m))[:, None] + np.arange(mm), n - 1)], m)
    ok = (first != last) & np.isfinite(first + last)
    scale = np.where(ok, last - first, 1.0)
    cols = np.arange(n)
    beyond = cols[None, :] >= lengths[:, None]
    # t of the bins of each row; NaN beyond a row's bins and on rows without two plateaus,
    # so that no comparison holds there
    t = np.where(beyond | ~ok[:, None], np.nan, (y - first[:, None]) / scale[:, None])
    cross = (t[:, :-1] < 0.5) & (t[:, 1:] >= 0.5)
    pos_last = pos[r, lengths - 1]
    middle = 0.5 * (pos[:, 0] + pos_last)
    # the crossing nearest the middle (the first of equally near ones, as argmin over the crossings)
    near = np.where(cross, np.abs(pos[:, :-1] - middle[:, None]), np.inf)
    i = np.argmin(near, axis=1)
    has = near[r, i] < np.inf
    ti, ti1, pi, pi1 = t[r, i], t[r, i + 1], pos[r, i], pos[r, i + 1]
    step = np.where(has, ti1 - ti, 1.0)
    centre = np.where(has, pi + (0.5 - ti) * (pi1 - pi) / step, np.nan)
    left = (t <= 0.1) & (cols[None, :] <= i[:, None])  # the last of them is the 10 % point
    right = (t >= 0.9) & (cols[None, :] >= i[:, None])  # the first of them is the 90 % point
    lo = n - 1 - np.argmax(left[:, ::-1], axis=1)
    hi = np.argmax(right, axis=1)
    width = np.where(has & left[r, lo] & right[r, hi], pos[r, hi] - pos[r, lo], np.nan)
    return EsfShapes(first, last, centre, width)


def esf_overshoots(esfs: BinnedEsfs, smooth_mm: float = 0.4, floor: float = 0.03) -> np.ndarray:
    """:func:`esf_overshoot` of every row of ``esfs``."""
    size = _smoothing_bins(esfs, smooth_mm)
    y = esfs.smoothed(size)
    shape = esfs.shapes_of_smoothed(size)
    inside = esfs.in_row()
    n = esfs.lengths
    with np.errstate(invalid="ignore", divide="ignore"):
        contrast = shape.high_hu - shape.low_hu
        valid = np.isfinite(contrast) & (contrast != 0)
        t = (y - shape.low_hu[:, None]) / contrast[:, None]
        over = np.maximum(np.maximum(np.where(inside, t, -np.inf).max(axis=1) - 1.0,
                                     -np.where(inside, t, np.inf).min(axis=1)), 0.0)
        mean_count = esfs.counts.sum(axis=1) / n
        n_per_window = np.maximum(mean_count * size, 1.0)
        resid = np.where(inside, esfs.esf_hu - y, 0.0)
        dev = np.where(inside, resid - (resid.sum(axis=1) / n)[:, None], 0.0)
        se = np.sqrt((dev * dev).sum(axis=1) / n) * np.sqrt(np.maximum(mean_count, 1.0)) / np.sqrt(n_per_window)
        limit = np.maximum(floor, 4.0 * se / np.abs(contrast))
    return np.where(valid & (over > limit), over, 0.0)


def condition_esfs(esfs: BinnedEsfs, method: str = "auto") -> tuple[BinnedEsfs, list[str]]:
    """:func:`condition_esf` of every row of ``esfs``: the conditioned ESFs and the
    method used for each row (the monotone fit is one isotonic regression a row)."""
    if method not in CONDITIONING:
        raise ValueError(f"ESF conditioning {method!r} unknown; expected one of {CONDITIONING}")
    k = len(esfs)
    if method == "auto":
        used = ["none" if o > 0 else "monotone" for o in esf_overshoots(esfs).tolist()]
    else:
        used = [method] * k
    used = [u if n >= 3 else "none" for u, n in zip(used, esfs.lengths.tolist())]
    if "monotone" not in used:
        return esfs, used
    fit = esfs.esf_hu.copy()
    rising = esfs.last(esfs.esf_hu) >= esfs.esf_hu[:, 0]
    weights = np.maximum(esfs.counts.astype(float), 0.5)
    for j in (j for j, u in enumerate(used) if u == "monotone"):
        n = int(esfs.lengths[j])
        fit[j, :n] = isotonic_regression(esfs.esf_hu[j, :n], weights=weights[j, :n], increasing=bool(rising[j])).x
        fit[j, n:] = fit[j, n - 1]
    return BinnedEsfs(esfs.position_mm, fit, esfs.counts, esfs.bin_mm, esfs.lengths), used


def first_crossings(frequency: np.ndarray, ttf: np.ndarray, level: float) -> np.ndarray:
    """:func:`first_crossing` of every row of ``ttf`` (k, f) at the frequencies ``frequency`` (f,)."""
    if ttf.shape[1] == 0:
        return np.full(ttf.shape[0], np.nan)
    below = ttf <= level
    i = np.argmax(below, axis=1)
    r = np.arange(ttf.shape[0])
    ok = below[r, i] & (i > 0)
    j = np.maximum(i - 1, 0)
    f0, f1, t0, t1 = frequency[j], frequency[i], ttf[r, j], ttf[r, i]
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(t0 != t1, f0 + (t0 - level) * (f1 - f0) / (t0 - t1), f1)
    return np.where(ok, out, np.nan)


def _fft_length(pad_to_mm: float, dr: float, n: int) -> int:
    """Zero-padded length of the LSF FFT of :func:`ttf_from_esf`."""
    return max(int(2 ** np.ceil(np.log2(max(pad_to_mm / dr, n)))), 8)


def ttf_from_esfs(
    esfs: BinnedEsfs,
    *,
    window_widths: float = 3.0,
    max_frequency_per_mm: float | None = None,
    pad_to_mm: float = PAD_TO_MM,
) -> list[TtfCurve]:
    """:func:`ttf_from_esf` of every row of ``esfs``: the central differences, windows,
    zero-padded FFTs (one ``rfft`` along the rows), normalisation, finite-difference and
    bin corrections and f50 / f10 crossings of all rows at once. Every row must have the
    same FFT length (``ValueError`` otherwise; it does when ``pad_to_mm`` spans the
    longest row, as at the defaults).

    References
    ----------
    Cunningham IA, Fenster A. Med Phys 14(4):533-537, 1987. Richard et al., Med Phys
    39(7), 2012.
    """
    dr = esfs.bin_mm
    y = esfs.esf_hu
    k, n = y.shape
    lengths = esfs.lengths
    if (lengths < 2).any():
        raise ValueError("at least two ESF bins are needed for the LSF")
    nfft = _fft_length(pad_to_mm, dr, int(lengths.max()))
    if _fft_length(pad_to_mm, dr, int(lengths.min())) != nfft:
        raise ValueError("the ESFs' FFT lengths differ: transform them one by one")
    r = np.arange(k)
    inside = esfs.in_row()
    lsf = np.empty(y.shape, dtype=float)
    lsf[:, 1:-1] = (y[:, 2:] - y[:, :-2]) / (2.0 * dr)
    lsf[:, 0] = (y[:, 1] - y[:, 0]) / dr
    lsf[r, lengths - 1] = (y[r, lengths - 1] - y[r, lengths - 2]) / dr
    lsf = np.where(inside, lsf, 0.0)
    lsf = np.where((lsf.sum(axis=1) < 0)[:, None], -lsf, lsf)
    shape = esf_shapes(esfs)
    width = shape.width_10_90_mm
    pos = esfs.position_mm
    pos_last = pos[r, lengths - 1]
    span = 0.5 * (pos_last - pos[:, 0])
    has_width = np.isfinite(width)
    centre = np.where(np.isfinite(shape.centre_mm), shape.centre_mm, 0.5 * (pos[:, 0] + pos_last))
    reach = np.minimum(centre - pos[:, 0], pos_last - centre)
    half = np.where(has_width, window_widths * width, span)
    limited = half > reach
    half = np.where(limited, reach, half)
    spectrum = np.abs(np.fft.rfft(lsf * lsf_window(pos, centre[:, None], half[:, None]), n=nfft, axis=-1))
    freq, safe_correction, usable = _frequency_grid(nfft, float(dr))
    zero = spectrum[:, 0] <= 0
    with np.errstate(invalid="ignore", divide="ignore"):
        ttf = np.where(usable, (spectrum / spectrum[:, :1]) / safe_correction, np.nan)
    freq_u, ttf_u = freq[usable], ttf[:, usable]
    f50, f10 = first_crossings(freq_u, ttf_u, 0.5), first_crossings(freq_u, ttf_u, 0.1)
    if max_frequency_per_mm is not None:
        keep = freq <= max_frequency_per_mm + 1e-12
        kept_freq, kept = freq[keep], ttf[:, keep]
    else:
        kept_freq, kept = freq.copy(), ttf
    curves = []
    for j in range(k):
        notes: list[str] = []
        if not has_width[j]:
            notes.append("ESF 10-90 % width not measurable; the LSF window spans the whole ESF")
        if limited[j]:
            notes.append(f"LSF window limited to +/-{reach[j]:.2f} mm by the ESF range")
        if zero[j]:
            nan = np.full_like(freq, np.nan)
            curves.append(TtfCurve(freq.copy(), nan, float("nan"), float("nan"), float(2 * half[j]),
                                   notes + ["LSF integrates to zero"]))
        else:
            curves.append(TtfCurve(kept_freq, kept[j], float(f50[j]), float(f10[j]), float(2 * half[j]), notes))
    return curves


# ------------------------------------------------------------------ straight edges
def fit_straight_edge(image: np.ndarray) -> tuple[float, float, bool]:
    """Fit the line of a near-vertical or near-horizontal straight edge in a 2-D ROI.

    Each row (or column, for a near-horizontal edge) of the lightly smoothed image gives
    the centroid of its derivative (sign fixed by the edge polarity, negative lobes
    clipped) inside a Hamming window about the current line; a least-squares line
    through the centroids is the edge. The window narrows over the iterations so that
    noise far from the edge does not pull the centroids. Returns
    ``(slope, intercept, transposed)`` with the edge at ``x = intercept + slope * y``
    in the (possibly transposed) image.

    References
    ----------
    ISO 12233:2017, Photography - Electronic still picture imaging - Resolution and
    spatial frequency responses (slanted-edge method: per-row derivative centroids and
    a line fit).
    """
    img = ndimage.gaussian_filter(np.asarray(image, dtype=float), 1.0)
    gy = np.abs(img[-1, :].mean() - img[0, :].mean())
    gx = np.abs(img[:, -1].mean() - img[:, 0].mean())
    transposed = bool(gy > gx)
    if transposed:
        img = img.T
    d = np.diff(img, axis=1)
    d = d * (1.0 if d.sum() >= 0 else -1.0)
    d = np.clip(d, 0.0, None)
    slope, intercept = 0.0, float(np.argmax(d.sum(axis=0))) + 0.5
    rows = np.arange(img.shape[0], dtype=float)
    for half in (0.5 * d.shape[1], 0.25 * d.shape[1], 8.0, 8.0):
        centroids = _row_centroids(d, slope, intercept, max(half, 4.0))
        ok = np.isfinite(centroids)
        if ok.sum() < 2:
            break
        slope, intercept = np.polyfit(rows[ok], centroids[ok], 1)
    return float(slope), float(intercept), transposed


def _row_centroids(d: np.ndarray, slope: float, intercept: float, half: float) -> np.ndarray:
    """Centroid of every row of the derivative ``d``, Hamming-windowed about the line."""
    x = np.arange(d.shape[1]) + 0.5
    rows = np.arange(d.shape[0], dtype=float)
    centre = intercept + slope * rows
    u = (x[None, :] - centre[:, None]) / half
    w = np.where(np.abs(u) < 1, 0.54 + 0.46 * np.cos(np.pi * u), 0.0)
    dw = d * w
    total = dw.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, (dw * x[None, :]).sum(axis=1) / total, np.nan)


def straight_edge_distances(image_shape: tuple[int, int], slope: float, intercept: float, transposed: bool, pixel_mm: float) -> np.ndarray:
    """Signed perpendicular distance (mm) of every pixel centre to the fitted edge line.

    Positive on the side of increasing column (row, when ``transposed``).
    """
    yy, xx = np.indices(image_shape, dtype=float)
    if transposed:
        yy, xx = xx, yy
    return (xx - (intercept + slope * yy)) / np.sqrt(1.0 + slope**2) * pixel_mm


def edge_angle_deg(slope: float, transposed: bool) -> float:
    """Orientation of the fitted edge line in the project's angle convention.

    0 = along a row, 90 = along a column, counter-clockwise on screen, in [0, 180).
    """
    # direction of the line in (dy, dx): along the rows of the fit coordinate
    if transposed:
        dy, dx = slope, 1.0
    else:
        dy, dx = 1.0, slope
    return float(np.degrees(np.arctan2(-dy, dx)) % 180.0)


# ------------------------------------------------------------------ circular edges
def refine_circle_centre(
    image: np.ndarray,
    centre_yx: tuple[float, float],
    radius_px: float,
    inside_hu: float,
    outside_hu: float,
    *,
    reach_px: float,
    iterations: int = 8,
) -> tuple[float, float]:
    """Sub-pixel centre of a disc: iterated centroid of its soft (partial-volume) mask.

    Each pixel within ``radius_px + reach_px`` of the current centre weighs
    ``clip((I - outside) / (inside - outside), 0, 1)``; the weighted centroid is the new
    centre. The window is symmetric about the current estimate, so background noise pulls
    only towards it and the fixed point is the disc centre.

    References
    ----------
    Common practice, no source (centroid of a partial-volume weighted mask).
    """
    cy, cx = float(centre_yx[0]), float(centre_yx[1])
    if inside_hu == outside_hu:
        return cy, cx
    window = radius_px + reach_px
    pool = None  # the pixels within window + 2 px of the centre the pool was taken about
    for _ in range(iterations):
        if pool is None or np.hypot(cy - pool[0], cx - pool[1]) > 2.0:
            pool = (cy, cx) + _pixels_near(image, (cy, cx), window + 2.0)
        yy, xx, values = pool[2:]
        inside = (yy - cy) ** 2 + (xx - cx) ** 2 <= window**2
        w = np.clip((values[inside] - outside_hu) / (inside_hu - outside_hu), 0.0, 1.0)
        total = w.sum()
        if total <= 0:
            break
        ny, nx = float((w * yy[inside]).sum() / total), float((w * xx[inside]).sum() / total)
        moved = np.hypot(ny - cy, nx - cx)
        cy, cx = ny, nx
        if moved < 1e-4:
            break
    return cy, cx


def refine_circle_centres_of_stacks(
    stacks: list[np.ndarray],
    centres_yx: list[tuple[float, float]],
    radii_px: list[float],
    inside_hu: list[float],
    outside_hu: list[float],
    reach_px: list[float],
    *,
    iterations: int = 8,
) -> list[np.ndarray]:
    """:func:`refine_circle_centre` of every image of several stacks (e.g. the rods of a
    phantom), each with its own start, radius, CT numbers and reach, iterated together;
    returns one (n, 2) array per stack.

    Each stack's pixels near its start (within the window and 2 px about it) are
    split: those within the window less 2 px of the start are inside the window of
    every centre looked at (a centre that wanders more than 2 px from its start leaves
    the iteration), so their weighted sums are taken once; the others are padded to one
    length with pixels that are never inside a window (weight 0), so one vectorised pass
    per iteration over them serves every image of every stack. Each image keeps its own
    stopping rule, and an image whose centre wanders more than 2 px from its start is
    refined on its own, as there. The fixed point of each image is the one it has
    alone: the same sums, taken in another order (they differ only in rounding).

    References
    ----------
    Common practice, no source (centroid of a partial-volume weighted mask).
    """
    k = len(stacks)
    out = [np.full((st.shape[0], 2), (float(c[0]), float(c[1]))) for st, c in zip(stacks, centres_yx)]
    live = [j for j in range(k) if stacks[j].shape[0] and inside_hu[j] != outside_hu[j]]
    if not live:
        return out
    parts = []
    for j in live:
        window = radii_px[j] + reach_px[j]
        yy, xx, values = _stack_pixels_near(stacks[j], centres_yx[j], window + 2.0)
        weights = np.clip((values - outside_hu[j]) / (inside_hu[j] - outside_hu[j]), 0.0, 1.0)
        # pixels within window - 2 of the start are inside the window of every centre the
        # iteration looks at (at most 2 px from the start): their sums are taken once
        core = (yy - centres_yx[j][0]) ** 2 + (xx - centres_yx[j][1]) ** 2 <= max(window - 2.0, 0.0) ** 2
        # columns taken by index (C-ordered copies; boolean column indexing gives
        # F-ordered ones, whose row sums are several times slower)
        inner, outer = np.flatnonzero(core), np.flatnonzero(~core)
        wc = weights.take(inner, axis=1)
        fixed = np.stack([wc.sum(axis=1), np.einsum("ij,j->i", wc, yy[inner]), np.einsum("ij,j->i", wc, xx[inner])],
                         axis=1)  # no BLAS threads
        parts.append((yy[outer], xx[outer], weights.take(outer, axis=1), window, fixed))
    m = max(max(p[0].size for p in parts), 1)
    n = sum(stacks[j].shape[0] for j in live)
    far = 1e9  # never within a window of a centre
    yy_all, xx_all, w_all = np.full((n, m), far), np.full((n, m), far), np.zeros((n, m))
    win2, start, fixed_all = np.empty(n), np.empty((n, 2)), np.empty((n, 3))
    row = 0
    for j, (yy, xx, weights, window, fixed) in zip(live, parts):
        rows = slice(row, row + weights.shape[0])
        yy_all[rows, : yy.size], xx_all[rows, : xx.size], w_all[rows, : yy.size] = yy, xx, weights
        win2[rows], start[rows], fixed_all[rows] = window**2, centres_yx[j], fixed
        row += weights.shape[0]
    cy, cx = start[:, 0].copy(), start[:, 1].copy()
    active = np.ones(n, dtype=bool)
    alone = np.zeros(n, dtype=bool)
    for _ in range(iterations):
        rows = np.flatnonzero(active)
        if rows.size == 0:
            break
        every = rows.size == n  # all still moving: no row selection (no copies)
        yy, xx, wts = (yy_all, xx_all, w_all) if every else (yy_all[rows], xx_all[rows], w_all[rows])
        inside = (yy - cy[rows, None]) ** 2 + (xx - cx[rows, None]) ** 2 <= win2[rows, None]
        w = np.where(inside, wts, 0.0)
        fx = fixed_all[rows]
        total = fx[:, 0] + w.sum(axis=1)
        stop = total <= 0
        active[rows[stop]] = False
        if stop.any():
            keep = ~stop
            rows, w, total, yy, xx, fx = rows[keep], w[keep], total[keep], yy[keep], xx[keep], fx[keep]
        ny = (fx[:, 1] + np.einsum("ij,ij->i", w, yy)) / total
        nx = (fx[:, 2] + np.einsum("ij,ij->i", w, xx)) / total
        moved = np.hypot(ny - cy[rows], nx - cx[rows])
        cy[rows], cx[rows] = ny, nx
        active[rows[moved < 1e-4]] = False
        wandered = np.hypot(cy - start[:, 0], cx - start[:, 1]) > 2.0
        alone |= wandered & active
        active &= ~wandered
    row = 0
    centres = np.stack([cy, cx], axis=1)
    for j in live:
        count = stacks[j].shape[0]
        rows = slice(row, row + count)
        out[j] = centres[rows]
        for i in np.flatnonzero(alone[rows]):
            out[j][i] = refine_circle_centre(stacks[j][i], centres_yx[j], radii_px[j], inside_hu[j], outside_hu[j],
                                             reach_px=reach_px[j], iterations=iterations)
        row += count
    return out


def _stack_pixels_near(images: np.ndarray, centre: tuple[float, float], reach: float
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row and column indices (float) of the pixels :func:`_pixels_near` takes, and their
    values (n, m) in every image of a stack."""
    y0, x0 = max(int(math.floor(centre[0] - reach)), 0), max(int(math.floor(centre[1] - reach)), 0)
    y1 = min(int(math.ceil(centre[0] + reach)) + 1, images.shape[1])
    x1 = min(int(math.ceil(centre[1] + reach)) + 1, images.shape[2])
    ys, xs = np.arange(y0, y1, dtype=float)[:, None], np.arange(x0, x1, dtype=float)[None, :]
    near = (ys - centre[0]) ** 2 + (xs - centre[1]) ** 2 <= reach**2
    iy, ix = np.nonzero(near)  # row-major, as boolean indexing
    iy += y0
    ix += x0
    if images.flags.c_contiguous:  # one gather from the flattened images
        values = images.reshape(images.shape[0], -1).take(iy * images.shape[2] + ix, axis=1)
    else:
        values = images[:, iy, ix]
    return iy.astype(float), ix.astype(float), values.astype(float, copy=False)


def _pixels_near(image: np.ndarray, centre: tuple[float, float], reach: float
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row and column indices (float) and values of the pixels within ``reach`` of
    ``centre``, in row-major order (so that sums over them run as over the whole image)."""
    y0, x0 = max(int(math.floor(centre[0] - reach)), 0), max(int(math.floor(centre[1] - reach)), 0)
    y1 = min(int(math.ceil(centre[0] + reach)) + 1, image.shape[0])
    x1 = min(int(math.ceil(centre[1] + reach)) + 1, image.shape[1])
    yy, xx = np.mgrid[y0:y1, x0:x1].astype(float)
    near = (yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 <= reach**2
    return yy[near], xx[near], image[y0:y1, x0:x1][near]
