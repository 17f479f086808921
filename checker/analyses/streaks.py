"""Streak-direction analysis: directional line energy, missing angular wedges, streak maps.

Streaks are long, straight, thin structures that cross air, uniform tissue and the body
outline; anatomy edges and isotropic noise do not make them. The analysis works in two
steps.

Screen (every axial slice). The slice is binned to at most ``screen_max_px`` pixels a
side. A high-pass residual ``r = s - G(s)`` (Gaussian ``highpass_sigma_px``) is taken;
pixels near strong edges of the smoothed image (a step of ``edge_step_hu`` or more: body
outline, lungs, bone, metal), the table, the body outline, the border of the field of
view and invalid (NaN) pixels get zero weight; so does the band of rows a flat table
spans, across the whole slice (its long straight edges, and their continuation past the
table's ends, are real edges, not streaks). The residual is clipped at
``clip_sigma`` robust standard deviations so that the remaining contrast does not
dominate, then brought to one noise level everywhere (divided by its local RMS over
``noise_equalise_sigma_px``), so that the noisiest region (a wide body, the rays through
both arms) does not dominate the spectrum with its direction-dependent quantum noise. Its 2-D power spectrum ``P(k)`` is whitened ring by ring, ``P(k) / m(|k|)``,
where ``m`` is the mean power of the ring: that is exactly the power an isotropic noise
of the measured level and spectrum shape would put at that frequency. The whitened
power averaged over the frequencies of orientation bin ``phi`` inside the band
``band_cycles_per_px`` is the *angular profile* ``A(phi)``; its mean over the bins is 1.
Under the Fourier slice theorem a line structure along orientation ``theta`` puts its
energy on the frequency line perpendicular to it, so each frequency is binned by the
orientation of the image lines it carries (in the GUIDE convention).

Streak index of a slice (dimensionless, 1 for isotropic texture)::

    index = max( max_phi A(phi),  1 / max(min_phi A3(phi), 1 / n_bins) )

``A3`` is ``A`` smoothed over three bins. The first term measures line energy
concentrated at some orientations (view aliasing, metal, boundary streaks); the second
measures orientations with no energy at all (a missing angular wedge removes both the
object's and the noise's spectrum there). A slice's reported index is the smaller of its
own and that of its profile mixed with its neighbours' (weight ``neighbour_weight``
each): acquisition streaks persist from slice to slice, the largest noise bin does not.
The volume index is the largest slice index.
A slice, and the series, is flagged when its index exceeds ``tolerance_index``.

Thin slices are screened in slabs. A slab is ``round(screen_slab_mm / slice spacing)``
adjacent slices (at least 1; 2.5 mm and thicker slices are screened one by one, as
before slabs existed); the screen takes the mean of the slab's usable binned slices
(and the intersection of their masks, so every slice's table and body outline stay
out). Acquisition streaks (missing wedge, view aliasing, metal) persist over a few mm
along z -- the neighbour mixing above already rests on that -- while the noise of
adjacent slices is largely independent, so the slab mean keeps the streak energy and
lowers the noise; the ring whitening against the measured spectrum keeps the index at 1
for isotropic texture. A slab's index and profile are those of each of its slices (the
neighbour mixing works between slabs). A slab above the tolerance is refined: each of
its slices is screened alone and keeps the smaller of the slab's index and its own
(per-slice rule, neighbours being slices), so a flag lands on the slices that carry it.
This is a method choice of the speed rule (screen coarse, refine where something was
found): the indices of thin-slice series are estimates from slabs; record keys, types
and meaning are unchanged. Localisation of flagged slices stays per slice at full
resolution.

First screen of thin slices (coarse then refine in z). Where slices are screened in
slabs (two or more slices), a first screen runs on slabs of a whole number of screen
slabs, about ``first_screen_slab_mm`` thick (5 mm: four 1.25 mm slices). A streak carried
by the slices of one screen slab keeps ``slab / first`` of its whitened excess in the
first-screen slab (its power falls as the square of the share of slices carrying it,
the independent noise's power only in proportion), so the first screen refines at the
lowered threshold ``1 + (tolerance_index - 1) * slab / first`` (1.5 by default): its
slabs above it (and those not complete: the volume's end, a slice without usable
pixels) are screened in screen slabs, together with the screen slab on either side so
that the neighbour mixing sees the same neighbours as a screen of every slab; their
indices, flags and the per-slice refinement are then exactly those of that screen.
The other slices keep the first screen's index (below the threshold, hence below the
tolerance). Streaks that persist over the first-screen slab gain from it. A method
choice of the speed rule: the indices of unrefined thin-slice slabs are first-screen
estimates; keys, types and meaning unchanged; flags checked against the screen of
every slab in tests/reference/test_streaks_first_screen.py (streaks on one or two
slices of simulated series). Full-coverage data stay well below the threshold (the
512 x 512 x 400 benchmark of 1.25 mm slices: first-screen indices at most 1.26), so
the first screen halves the screen's work there. Slices of 2.5 mm and more have no
first screen. The first screen's slab masks are read from the bytewise OR and AND of
the slab's full-resolution body and table masks (two binned masks per slab instead of
one per slice, :meth:`AllowedMasks.slab_mask`): the table's exclusion is exact, the
union of the body outlines is replaced by a superset (the same where the body does not
change along the slab: on the benchmark, the same masks).

Missing wedge: a contiguous run of at least ``wedge_min_deg`` of orientation bins of the
mean profile below ``wedge_level``; each end is the boundary streak peak just outside
the half-level crossing (or that crossing when there is no such peak).
Reported as ``{"from_deg", "to_deg", "width_deg"}``: the missing line orientations run
counter-clockwise from ``from_deg`` to ``to_deg`` (``from_deg > to_deg`` when the range
wraps past 180), or ``null``.

Dominant directions: the two boundaries of a missing wedge (streaks of a missing wedge
run along its boundary rays), then the local maxima of the profile above
``peak_level``, strongest first, at most ``max_directions``. With a missing wedge the
peaks are judged on the profile divided by its mean outside the wedge
(:func:`level_outside_wedge`): the empty wedge lowers the mean of the whole profile, so
every measured orientation sits above 1 (about 180 / (180 - width)) and noise bins would
pass ``peak_level`` without any line energy of their own.

Dense-object pairs (flagged slices only). Rays through two dense objects (metal) are
starved and hardened most, which leaves a band along the line joining them (dark for
photon starvation and beam hardening) that can be as wide as the objects, i.e. mostly
below the screen's frequency band, and whose steps exceed ``edge_step_hu`` so that it
is masked as an edge. It is therefore measured directly: components of at least
``dense_hu`` (at most ``max_dense_objects``, largest first) are paired; the median HU
on the segment between each pair (outside the objects) is compared with the medians on
the two parallel segments offset by the larger object's diameter plus 3 px on either
side. A pair whose band differs by at least ``dense_band_hu`` is a *dense-pair line*;
its orientation is reported before the profile peaks.

Localisation (flagged slices only). For each dominant direction the residual's spectrum
is kept in a Gaussian angular window around it and transformed back: a directional
component. Its local RMS, divided by the RMS isotropic noise of the measured level would
give in the same window, is the per-pixel streak strength (1 ~ noise; the map is the
maximum over the directions, 0 on unflagged slices). Line sums of the directional
component across offsets (a discrete Radon transform at that angle) give the streak
lines: offsets whose robust z-score exceeds ``segment_z``; each line's extent is the
longest run along it where the local mean keeps the line's sign and reaches
``segment_keep`` of the line's mean amplitude.

Cost of the screen. The screen runs on every slice, so its smooth fields are estimated
on coarser grids: the soft weight near masked pixels on 2 x 2 blocks of the screen
grid, the local noise level on 8 x 8 blocks (each with a Gaussian whose variance, with
the block mean and the bilinear interpolation back, is that of the full-grid filter),
and the fill value and the robust noise scale from regular sub-grids of about
``FILL_SAMPLES`` and ``ROBUST_SAMPLES`` pixels. The high-pass residual, the strong
edges and the spectrum stay on the screen grid (the band is in cycles per pixel of
that grid). Slabs go through in stacks of at most ``SCREEN_STACK`` (up to
``SCREEN_STACK`` times the slab size slices per task, so thin slices give each thread
larger tasks; a range's slabs are shared out evenly, :func:`screen_tasks`): each slice
is binned once (the one full-resolution pass over the volume), the first screen's masks,
the texture's steps and the FFTs run on the whole stack at once (one array operation
per step for all its slabs; the Gaussian blurs as banded matrix products,
:func:`banded_blur`, which read the image once per axis instead of once per tap, taken
image by image), the cell sums slab by slab; each slab's outcome depends on that slab
only, bit for bit (whatever its stack or the thread count).
Slabs of two slices (1.25 mm) halve the screen's work after the binning. The coarse
grids and sub-grids give estimates of the same quantities, so the indices differ
slightly from a full-grid computation (a documented method choice); the record's keys,
types and meaning are unchanged. Each screening task takes its large temporaries from a
:class:`Workspace` of a pool that outlives the threads (:func:`pooled_workspace`) and
reuses them from stack to stack and from volume to volume (fresh arrays cost a page
fault per 4 kB on first touch: about a quarter of the screen's CPU time before); a slab's
full-resolution sum is formed in row blocks and binned once, and the masks are binned
from contiguous 16-bit column pairs and their outlines eroded on 64-bit words. These
implementation steps compute the same numbers (tested against fresh arrays and scipy's
filters, up to float32 rounding where the order of the sums changes); they are not
method changes.
Dense-pair lines and the localisation of flagged slices use the full-grid texture
(:func:`slice_texture`).

References
----------
.. [1] A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging*,
   IEEE Press, 1988 (Fourier slice theorem; view aliasing; limited-angle data).
.. [2] J. Hsieh, *Computed Tomography: Principles, Design, Artifacts, and Recent
   Advances*, SPIE Press (streak artefacts from metal and photon starvation).
"""
from __future__ import annotations

import contextlib
import functools
import math
import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from ..errors import ProfileError
from ..regions import Regions
from ..results import AnalysisResult, Finding, Overlays, Segment, Severity
from ..volume import Volume

NAME = "streaks"

DEFAULTS: dict[str, Any] = {
    "tolerance_index": 2.0,
    "severity": "review",
    "screen_max_px": 256,
    "screen_slab_mm": 2.5,
    "first_screen_slab_mm": 5.0,
    "min_slice_px": 32,
    "band_cycles_per_px": [0.1, 0.45],
    "angle_bin_deg": 2.0,
    "highpass_sigma_px": 1.5,
    "edge_step_hu": 300.0,
    "clip_sigma": 4.0,
    "noise_equalise_sigma_px": 10.0,
    "table_band_px": 4,
    "neighbour_weight": 1.0 / 3.0,
    "border_margin_px": 3,
    "min_weight_fraction": 0.05,
    "wedge_level": 0.25,
    "wedge_min_deg": 10.0,
    "peak_level": 1.6,
    "max_directions": 4,
    "direction_window_deg": 3.0,
    "segment_z": 6.0,
    "segment_keep": 0.3,
    "segment_min_px": 16,
    "max_segments_per_slice": 6,
    "max_localised_slices": 64,
    "dense_hu": 3000.0,
    "dense_band_hu": 100.0,
    "max_dense_objects": 6,
}

SOURCES: dict[str, str] = {
    "tolerance_index": (
        "site choice; default set above the largest index measured on full-coverage, "
        "smoothed and noise-only simulations (tests/reference/test_streaks_reference.py)"
    ),
    "severity": "site choice",
    "wedge_level": "site choice (fraction of the isotropic level, 1)",
    "wedge_min_deg": "site choice",
    "peak_level": "site choice",
    "edge_step_hu": "common practice, no source (soft tissue/bone/air steps exceed it)",
    "noise_equalise_sigma_px": "site choice (about 10 binned pixels: larger than a streak's width)",
    "table_band_px": "site choice",
    "neighbour_weight": "site choice",
    "screen_slab_mm": (
        "site choice (acquisition streaks persist over a few mm along z; 2.5 mm and thicker "
        "slices are screened one by one)"
    ),
    "first_screen_slab_mm": (
        "site choice (a gate only: slabs of about this thickness are screened first with the refine "
        "threshold lowered in proportion, 1 + (tolerance_index - 1) x slab / first-screen slab; "
        "0 screens every slab; used only where slices are screened in slabs already)"
    ),
    "dense_hu": "site choice, above cortical bone (about 2000 HU or less, from memory); metal reads far higher",
    "dense_band_hu": "site choice (several times the noise SD of a routine body series)",
}

_SEVERITIES = {"info": Severity.INFO, "review": Severity.REVIEW, "fail": Severity.FAIL}


# --------------------------------------------------------------------------- settings
def resolve_settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    """``DEFAULTS`` overridden key by key; unknown keys raise :class:`ProfileError`."""
    merged = dict(DEFAULTS)
    for key, value in (settings or {}).items():
        if key not in DEFAULTS:
            raise ProfileError(f"unknown setting {key!r}; known: {', '.join(DEFAULTS)}", source=NAME)
        merged[key] = value
    if str(merged["severity"]).lower() not in _SEVERITIES:
        raise ProfileError(f"severity {merged['severity']!r}; expected one of {', '.join(_SEVERITIES)}", source=NAME)
    lo, hi = (float(v) for v in merged["band_cycles_per_px"])
    if not 0.0 < lo < hi <= 0.5:
        raise ProfileError(f"band_cycles_per_px {[lo, hi]}; expected 0 < low < high <= 0.5", source=NAME)
    slab_mm = float(merged["screen_slab_mm"])
    if not (math.isfinite(slab_mm) and slab_mm >= 0.0):
        raise ProfileError(f"screen_slab_mm {merged['screen_slab_mm']!r}; expected a finite value >= 0", source=NAME)
    first_mm = float(merged["first_screen_slab_mm"])
    if not (math.isfinite(first_mm) and first_mm >= 0.0):
        raise ProfileError(f"first_screen_slab_mm {merged['first_screen_slab_mm']!r}; expected a finite value >= 0",
                           source=NAME)
    if not 180.0 / float(merged["angle_bin_deg"]) >= 12:
        raise ProfileError(f"angle_bin_deg {merged['angle_bin_deg']}; expected at most 15", source=NAME)
    return merged


# --------------------------------------------------------------------------- spectra
@dataclass(frozen=True)
class SpectralBins:
    """Which rfft2 samples of a (ny, nx) slice fall in which (ring, orientation) cell."""

    shape: tuple[int, int]
    n_bins: int
    n_rings: int
    sample: np.ndarray  # flat indices into the rfft2 array
    cell: np.ndarray  # ring * n_bins + orientation bin, per sample
    ring: np.ndarray  # ring index per sample
    ring_count: np.ndarray  # samples per ring
    angle_bin: np.ndarray  # orientation bin per sample
    cell_matrix: Any  # sparse (cells x rfft2 samples), 1 where a sample is in a cell
    bin_count: np.ndarray  # samples per orientation bin
    line_angle_deg: np.ndarray  # orientation of the carried image lines, per rfft2 sample (full array)
    radius: np.ndarray  # |k| cycles/px, per rfft2 sample (full array)


def line_angle_of_frequency(ky: np.ndarray, kx: np.ndarray) -> np.ndarray:
    """Orientation (deg, [0, 180), GUIDE convention) of the image lines a frequency carries.

    A line along the array direction (dy, dx) has its spectrum on k with
    ``ky*dy + kx*dx = 0``, i.e. (dy, dx) ~ (kx, -ky); its display angle
    ``atan2(-dy, dx)`` is therefore ``atan2(kx, ky)`` (mod 180).

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 3 (Fourier slice theorem).
    """
    return np.mod(np.degrees(np.arctan2(kx, ky)), 180.0)


@functools.lru_cache(maxsize=16)
def spectral_bins(shape: tuple[int, int], band: tuple[float, float], bin_deg: float) -> SpectralBins:
    """Precomputed orientation/ring bins of the rfft2 grid of ``shape`` (cached per shape)."""
    ny, nx = shape
    ky = sfft.fftfreq(ny).astype(np.float32)[:, None]
    kx = sfft.rfftfreq(nx).astype(np.float32)[None, :]
    radius = np.sqrt(ky * ky + kx * kx)
    angle = line_angle_of_frequency(ky, kx).astype(np.float32)
    n_bins = int(round(180.0 / bin_deg))
    ang_bin = np.floor((angle + 0.5 * bin_deg) / bin_deg).astype(np.int64) % n_bins
    ring_width = 2.0 / min(ny, nx)
    lo, hi = band
    in_band = (radius >= lo) & (radius <= hi)
    sample = np.flatnonzero(in_band.ravel())
    ring = np.floor((radius.ravel()[sample] - lo) / ring_width).astype(np.int64)
    n_rings = int(ring.max()) + 1 if ring.size else 1
    cell = ring * n_bins + ang_bin.ravel()[sample]
    return SpectralBins(
        shape=(ny, nx),
        n_bins=n_bins,
        n_rings=n_rings,
        sample=sample,
        cell=cell,
        ring=ring,
        ring_count=np.bincount(ring, minlength=n_rings).astype(np.float64),
        angle_bin=ang_bin.ravel()[sample],
        cell_matrix=_cell_matrix(cell, sample, n_rings * n_bins, radius.size),
        bin_count=np.bincount(ang_bin.ravel()[sample], minlength=n_bins).astype(np.float64),
        line_angle_deg=angle,
        radius=radius,
    )


def _cell_matrix(cell: np.ndarray, sample: np.ndarray, n_cells: int, n_samples: int) -> Any:
    """Sparse (cells x rfft2 samples) matrix with a 1 where a sample belongs to a cell."""
    from scipy import sparse

    ones = np.ones(sample.size, dtype=np.float64)
    return sparse.csr_matrix((ones, (cell, sample)), shape=(n_cells, n_samples))


def angular_profile(spectrum_power: np.ndarray, bins: SpectralBins) -> np.ndarray | None:
    """Ring-whitened mean power per orientation bin (mean 1 over bins), or None if empty.

    Each sample's power is divided by the mean power of its frequency ring (what an
    isotropic texture of the same level and spectrum shape gives), then averaged per bin.
    """
    flat = spectrum_power.ravel()[bins.sample].astype(np.float64)
    ring_mean = np.bincount(bins.ring, weights=flat, minlength=bins.n_rings) / np.maximum(bins.ring_count, 1)
    if not np.all(np.isfinite(ring_mean)) or ring_mean.max() <= 0:
        return None
    inv = np.where(ring_mean > 0, 1.0 / np.where(ring_mean > 0, ring_mean, 1.0), 0.0)
    whitened = flat * inv[bins.ring]
    per_bin = np.bincount(bins.cell % bins.n_bins, weights=whitened, minlength=bins.n_bins)
    profile = per_bin / np.maximum(bins.bin_count, 1)
    mean = profile.mean()
    return profile / mean if mean > 0 else None


def circular_smooth(values: np.ndarray, width: int = 3) -> np.ndarray:
    """Moving average over ``width`` neighbouring bins, wrapping at 180 deg."""
    return ndimage.uniform_filter1d(values, size=width, mode="wrap")


def streak_index_of_profile(profile: np.ndarray) -> float:
    """``max(max A, 1 / max(min A3, 1/n))``: 1 for isotropic texture (see module docstring)."""
    peak = float(profile.max())
    trough = max(float(circular_smooth(profile).min()), 1.0 / profile.size)
    return max(peak, 1.0 / trough)


# --------------------------------------------------------------------------- residual
@dataclass
class SliceTexture:
    """The weighted, clipped high-pass residual of one (binned) slice and its spectrum."""

    residual: np.ndarray  # float32, weighted and clipped
    weight: np.ndarray  # bool
    scale_hu: float  # robust SD of the residual inside the weight
    spectrum: np.ndarray  # complex64 rfft2 of residual


class Workspace:
    """Reusable scratch arrays of one screening thread (contents undefined between uses).

    The system maps the pages of a freshly allocated array of a few hundred kB one by
    one on first touch, and the allocator hands such arrays back to the system when
    they are freed; a screen that allocated its temporaries anew for every stack spent
    about a quarter of its CPU time in those page faults. A workspace keeps one flat
    byte buffer per name, grown when a larger array is asked for, and lends a view of
    it in the shape and dtype asked for; steps whose temporaries are never alive at the
    same time share a name (that keeps the workspace small). Callers never return a
    lent buffer (only values computed from it).
    """

    #: buffers of the screen's steps that are never alive at the same time, one name each:
    #: binning, the masks, the high-pass blur and edge test of a stack, the soft weight,
    #: the squares, the noise gain, the weight's upsampling, the cell sums (see
    #: :func:`screen_textures`; a test checks lent results against fresh arrays)
    SHARED = {
        **dict.fromkeys(("slab_total", "edge_gy", "tex_squared", "cell_sq", "gain_weighted", "inner_shift"), "A"),
        **dict.fromkeys(("slab_or", "bin_rows", "tex_rows", "wtyout", "cell_power", "gain_upyout"), "B"),
        **dict.fromkeys(("slab_and", "edge_gx", "sqr1", "wtxout"), "C"),
        **dict.fromkeys(("tex_blur_cols", "fracr1", "wtydiff"), "D"),
        **dict.fromkeys(("tex_blur_out", "wtyscaled"), "E"),
    }

    def __init__(self) -> None:
        self._buffers: dict[str, np.ndarray] = {}
        self._views: dict[tuple[str, tuple[int, ...], Any], np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, ...], dtype: Any = np.float32) -> np.ndarray:
        """A C-contiguous view of buffer ``name`` in this shape and dtype (contents undefined)."""
        key = (name, shape, dtype)
        view = self._views.get(key)
        if view is not None:
            return view
        name = self.SHARED.get(name, name)
        shape = tuple(int(s) for s in shape)
        dt = np.dtype(dtype)
        nbytes = math.prod(shape) * dt.itemsize
        buf = self._buffers.get(name)
        if buf is None or buf.size < nbytes:
            buf = self._buffers[name] = np.empty(max(nbytes, 64), dtype=np.uint8)
            self._views = {k: v for k, v in self._views.items() if self.SHARED.get(k[0], k[0]) != name}  # old buffer
        if len(self._views) > 512:  # many shapes seen: keep the lookup small
            self._views.clear()
        view = self._views[key] = buf[:nbytes].view(dt).reshape(shape)
        return view

    @property
    def nbytes(self) -> int:
        """Bytes held by the workspace's buffers."""
        return sum(b.nbytes for b in self._buffers.values())


_THREAD_WORKSPACES = threading.local()


def thread_workspace() -> Workspace:
    """The calling thread's :class:`Workspace` (made on first use).

    A thread that screens again (the viewer's one-slice screens) keeps its few MB of
    buffers from one screen to the next instead of faulting them in again; the tasks of
    the screen's worker threads use :func:`pooled_workspace` instead.
    """
    ws = getattr(_THREAD_WORKSPACES, "ws", None)
    if ws is None:
        ws = _THREAD_WORKSPACES.ws = Workspace()
    return ws


#: workspaces of finished screening tasks, lent again to the next tasks (see :func:`pooled_workspace`)
_WORKSPACE_POOL: list[Workspace] = []
_WORKSPACE_LOCK = threading.Lock()


@contextlib.contextmanager
def pooled_workspace():
    """A :class:`Workspace` lent to one screening task and given back to the module's pool after it.

    The screen's worker threads end with their volume; a workspace of their own would end
    with them, and the next volume's threads would fault their buffers in again (several
    thousand page faults, some 10 ms of CPU time per 400-slice volume on two threads).
    Pooled workspaces outlive the threads: at most as many exist as tasks ever ran at
    once (one per screening thread), each used by one task at a time. A forked process
    starts with an empty pool.
    """
    with _WORKSPACE_LOCK:
        ws = _WORKSPACE_POOL.pop() if _WORKSPACE_POOL else None
    if ws is None:
        ws = Workspace()
    try:
        yield ws
    finally:
        with _WORKSPACE_LOCK:
            _WORKSPACE_POOL.append(ws)


def _empty_pool_after_fork() -> None:
    global _WORKSPACE_LOCK
    _WORKSPACE_LOCK = threading.Lock()
    _WORKSPACE_POOL.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_empty_pool_after_fork)


def scratch(ws: Workspace | None, name: str, shape: tuple[int, ...], dtype: Any = np.float32) -> np.ndarray:
    """An uninitialised array: ``ws``'s buffer ``name`` if a workspace is given, else a new one."""
    return np.empty(shape, dtype=dtype) if ws is None else ws.get(name, shape, dtype)


def bin_slice(image: np.ndarray, factor: int, out: np.ndarray | None = None, ws: "Workspace | None" = None) -> np.ndarray:
    """Mean over ``factor`` x ``factor`` blocks of the last two axes (cropping the remainder).

    Rows are summed first (whole contiguous rows), then columns of the much smaller
    row sums; the full-resolution slice is read once. ``out`` receives the means (a new
    array otherwise); ``ws`` lends the row sums (:class:`Workspace`).
    """
    if factor == 1:
        return image
    ny, nx = (n // factor * factor for n in image.shape[-2:])
    rows = scratch(ws, "bin_rows", image.shape[:-2] + (ny // factor, nx))
    np.add(image[..., 0:ny:factor, :nx], image[..., 1:ny:factor, :nx], out=rows)
    for dy in range(2, factor):
        rows += image[..., dy:ny:factor, :nx]
    out = np.add(rows[..., 0::factor], rows[..., 1::factor], out=out)
    for dx in range(2, factor):
        out += rows[..., dx::factor]
    out *= np.float32(1.0 / (factor * factor))
    return out


def bin_mask(mask: np.ndarray, factor: int, ws: "Workspace | None" = None, tag: str = "bin_mask") -> np.ndarray:
    """Any-of over ``factor`` x ``factor`` blocks of the last two axes (cropping the remainder).

    For ``factor`` 2 each pair of columns is read as one 16-bit word (non-zero if either
    byte is), slice by slice as one contiguous stream, and the row pairs of that half
    as wide result are OR-ed. With a :class:`Workspace` ``ws`` the result is its buffer
    ``tag``.
    """
    if factor == 1:
        return mask
    ny, nx = (n // factor * factor for n in mask.shape[-2:])
    if factor == 2 and ny and nx:
        if nx == mask.shape[-1] and mask.strides[-1] == 1:
            # each slice read once as a contiguous stream of 16-bit column pairs, then the
            # much smaller column-pair any-of OR-ed by row pairs (the same any-of)
            lead = mask.shape[:-2]
            out = scratch(ws, tag, lead + (ny // 2, nx // 2), bool)
            cols = scratch(ws, tag + "_cols", (ny, nx // 2), bool)
            for idx in np.ndindex(*lead):
                np.not_equal(mask[idx + (slice(0, ny),)].view(np.uint16), 0, out=cols)
                np.logical_or(cols[0::2], cols[1::2], out=out[idx])
            return out
        rows = np.logical_or(mask[..., 0:ny:2, :nx], mask[..., 1:ny:2, :nx])
        return rows.view(np.uint16) != 0
    out = np.zeros(mask.shape[:-2] + (ny // factor, nx // factor), dtype=bool)
    for dy in range(factor):
        for dx in range(factor):
            out |= mask[..., dy:ny:factor, dx:nx:factor]
    return out


def inner_boundary(mask: np.ndarray, ws: "Workspace | None" = None, tag: str = "inner_kept") -> np.ndarray:
    """Pixels of ``mask`` with a 4-neighbour outside it (or on the array border); last two axes.

    Equal to ``mask ^ binary_erosion(mask)`` with the cross-shaped structuring element
    and a False border, computed with shifted views instead of a filter (``ws`` lends
    the eroded mask and the result, buffer ``tag``). A C-contiguous mask whose rows are
    whole 64-bit words is eroded eight pixels per operation (:func:`_erode_words`).
    """
    kept = scratch(ws, tag, mask.shape, bool)
    np.copyto(kept, mask)
    kept[..., 0, :] = kept[..., -1, :] = False
    kept[..., 0] = kept[..., -1] = False
    if mask.ndim >= 2 and mask.shape[-1] % 8 == 0 and mask.flags.c_contiguous and np.little_endian and mask.size:
        _erode_words(kept.view(np.uint64), mask.view(np.uint64), ws)
        return kept
    kept[..., 1:, :] &= mask[..., :-1, :]
    kept[..., :-1, :] &= mask[..., 1:, :]
    kept[..., 1:] &= mask[..., :-1]
    kept[..., :-1] &= mask[..., 1:]
    np.logical_not(kept, out=kept)
    kept &= mask
    return kept


def _erode_words(kept: np.ndarray, mask: np.ndarray, ws: "Workspace | None") -> None:
    """:func:`inner_boundary`'s erosion and difference on 64-bit words of boolean bytes (in place).

    ``kept`` (the mask with its border cleared) and ``mask`` are the word views of
    C-contiguous boolean arrays. Neighbours along y are whole rows of words; along x
    a neighbour is the next byte, i.e. the flat words shifted by 8 bits with the carry
    from the adjacent word (little-endian byte order). A carry across a row's end lands
    on a border pixel, which is False already. Finally ``mask & ~kept`` bytewise.
    """
    kept[..., 1:, :] &= mask[..., :-1, :]
    kept[..., :-1, :] &= mask[..., 1:, :]
    k, m = kept.reshape(-1), mask.reshape(-1)
    shifted = scratch(ws, "inner_shift", m.shape, np.uint64)
    np.left_shift(m, np.uint64(8), out=shifted)  # byte b takes byte b - 1
    shifted[1:] |= m[:-1] >> np.uint64(56)
    k &= shifted
    np.right_shift(m, np.uint64(8), out=shifted)  # byte b takes byte b + 1
    shifted[:-1] |= m[1:] << np.uint64(56)
    k &= shifted
    np.invert(k, out=k)
    k &= m


def strong_edges(smoothed: np.ndarray, step_hu: float, sigma_px: float) -> np.ndarray:
    """Pixels whose smoothed gradient is that of a step of at least ``step_hu``.

    A step of height h blurred by a Gaussian of SD sigma has a peak gradient of
    h / (sigma sqrt(2 pi)) per pixel (analytic).
    """
    gy = np.zeros_like(smoothed)
    gx = np.zeros_like(smoothed)
    np.subtract(smoothed[2:], smoothed[:-2], out=gy[1:-1])
    np.subtract(smoothed[:, 2:], smoothed[:, :-2], out=gx[:, 1:-1])
    gy *= 0.5
    gx *= 0.5
    gy *= gy
    gx *= gx
    gy += gx  # squared gradient magnitude
    threshold = step_hu / (max(sigma_px, 0.5) * math.sqrt(2.0 * math.pi))
    return gy > threshold * threshold


def grow(mask: np.ndarray, radius_px: int) -> np.ndarray:
    """Square dilation of a boolean mask by ``radius_px`` (for masks that are only binned).

    Separable: the OR of shifted copies along y, then along x (pixels outside count as
    False).
    """
    if radius_px <= 0 or not mask.any():
        return mask
    out = mask.copy()
    for d in range(1, radius_px + 1):
        out[d:] |= mask[:-d]
        out[:-d] |= mask[d:]
    rows = out.copy()
    for d in range(1, radius_px + 1):
        out[:, d:] |= rows[:, :-d]
        out[:, :-d] |= rows[:, d:]
    return out


@functools.lru_cache(maxsize=8)
def gaussian_taps(sigma_px: float, truncate: float) -> tuple[float, ...]:
    """Normalised taps of a sampled Gaussian, radius ``int(truncate * sigma + 0.5)``."""
    radius = int(truncate * float(sigma_px) + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    taps = np.exp(-0.5 * x * x / (float(sigma_px) ** 2))
    return tuple(float(v) for v in taps / taps.sum())


def gaussian_blur(image: np.ndarray, sigma_px: float, truncate: float) -> np.ndarray:
    """Separable Gaussian blur of a 2-D float32 image, mirror-extended at the borders.

    The same sampled kernel and border rule (``d c b a | a b c d``) as
    ``scipy.ndimage.gaussian_filter(image, sigma_px, truncate=truncate)``; along y it is
    accumulated in float32 from the symmetric pairs of taps (whole rows at a time),
    along x by ``scipy.ndimage.correlate1d`` (equal to it up to float32 rounding).
    """
    taps = gaussian_taps(float(sigma_px), float(truncate))
    out = _blur_axis(np.asarray(image, dtype=np.float32), taps, 0)
    # along x (the contiguous axis) scipy's 1-D correlation is the faster one
    return ndimage.correlate1d(out, np.asarray(taps), axis=1, mode="reflect")


def _blur_axis(image: np.ndarray, taps: tuple[float, ...], axis: int) -> np.ndarray:
    radius = len(taps) // 2
    n = image.shape[axis]
    if radius == 0:
        return image.copy()
    if radius > n:  # the mirror would need more than one reflection
        return ndimage.correlate1d(image, np.asarray(taps), axis=axis, mode="reflect")
    pad = [(0, 0), (0, 0)]
    pad[axis] = (radius, radius)
    ext = np.pad(image, pad, mode="symmetric")

    def shifted(k: int) -> np.ndarray:
        return ext[k : k + n] if axis == 0 else ext[:, k : k + n]

    out = shifted(radius) * np.float32(taps[radius])
    pair = np.empty_like(out)
    for k in range(radius):
        np.add(shifted(k), shifted(2 * radius - k), out=pair)
        pair *= np.float32(taps[k])
        out += pair
    return out


def soft_weight(bad: np.ndarray, reach_px: float) -> np.ndarray:
    """A weight that is 0 on and near ``bad`` pixels and rises smoothly to 1 away from them.

    The mask is blurred by a Gaussian of SD ``reach_px / 2`` (an isotropic dilation: a
    square one would add straight mask edges at 0 and 90 deg, i.e. false streak energy)
    and mapped through ``clip(1 - blur / 0.05, 0, 1) ** 2``: zero closer than about
    0.8 ``reach_px`` to a straight bad edge, a smooth taper beyond.
    """
    if not bad.any():
        return np.ones(bad.shape, dtype=np.float32)
    w = gaussian_blur(bad.astype(np.float32), 0.5 * reach_px, 2.5)
    w *= np.float32(-20.0)
    w += np.float32(1.0)  # 1 - 20 blur
    np.clip(w, 0.0, 1.0, out=w)
    w *= w
    return w


def smooth_box2(values: np.ndarray, sigma_px: float) -> np.ndarray:
    """Two passes of a box filter with the variance of a Gaussian of SD ``sigma_px``.

    Two boxes of width w have variance 2 (w^2 - 1) / 12 per axis (analytic); the cost
    does not grow with the width, unlike a sampled Gaussian.
    """
    width = max(1, int(round(math.sqrt(6.0 * sigma_px * sigma_px + 1.0))))
    if width == 1:
        return values.copy()
    # Both passes along x, then both along y on a transposed copy (filters along the
    # contiguous axis are the fast ones); the same sums as two 2-D box passes.
    out = _box_rows_twice(values, width)
    out = _box_rows_twice(np.ascontiguousarray(out.T), width)
    return np.ascontiguousarray(out.T)


def _box_rows_twice(values: np.ndarray, width: int) -> np.ndarray:
    out = ndimage.uniform_filter1d(values, width, axis=-1, mode="constant")
    return ndimage.uniform_filter1d(out, width, axis=-1, mode="constant", output=out)


def local_noise_gain(residual: np.ndarray, weight: np.ndarray, scale_hu: float, sigma_px: float) -> np.ndarray:
    """Factor that brings the local RMS of ``residual`` to the slice's robust level ``scale_hu``.

    The local RMS is the weighted mean of ``residual**2`` under a smooth window of SD
    ``sigma_px`` (:func:`smooth_box2`);
    it is floored at a quarter of ``scale_hu`` so that nearly empty areas are not
    amplified. Quantum noise differs between regions (inside a wide body, behind bone,
    in the air beside it) and, in an elongated object, between directions; without this
    step the noisiest region dominates the spectrum and its direction-dependent noise
    reads as line energy. A streak narrower than ``sigma_px`` raises the local RMS only
    in part, so it stays above its surroundings.

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 5 (noise of filtered back-projection depends on the
       attenuation along each ray).
    """
    w = weight.astype(np.float32) if weight.dtype != np.float32 else weight
    num = smooth_box2(residual * residual, sigma_px)
    den = smooth_box2(w, sigma_px)
    np.maximum(num, np.float32(0.0), out=num)
    np.maximum(den, np.float32(1e-3), out=den)
    np.divide(num, den, out=num)
    np.sqrt(num, out=num)  # the local RMS
    np.maximum(num, np.float32(0.25 * scale_hu), out=num)
    return np.divide(np.float32(scale_hu), num, out=num)


def slice_texture(image: np.ndarray, allowed: np.ndarray, cfg: dict[str, Any]) -> SliceTexture | None:
    """Edge-suppressed, clipped high-pass residual of one slice; None if nothing is left.

    ``allowed`` marks pixels that may count (FOV minus border, table and body outline).
    """
    finite = np.isfinite(image)
    valid = allowed & finite
    if np.count_nonzero(valid) < cfg["min_weight_fraction"] * image.size:
        return None
    img = image
    if not finite.all() or not allowed.all():
        fill = float(np.median(image[valid], overwrite_input=True))
        img = np.where(valid, image, np.float32(fill)).astype(np.float32, copy=False)
    sigma = float(cfg["highpass_sigma_px"])
    smoothed = gaussian_blur(img, sigma, 3.0)
    residual = img - smoothed
    reach = 2.0 * sigma + 2.0
    weight = soft_weight(~valid | strong_edges(smoothed, float(cfg["edge_step_hu"]), sigma), reach)
    inside = weight > 0.5
    if np.count_nonzero(inside) < cfg["min_weight_fraction"] * image.size:
        return None
    values = residual[inside]
    sample = np.abs(values[:: max(1, values.size // 20000)])
    scale = 1.4826 * float(np.median(sample, overwrite_input=True))
    if not scale > 0 or not math.isfinite(scale):
        return None
    limit = np.float32(cfg["clip_sigma"] * scale)
    clipped = np.minimum(residual, limit, out=residual)  # residual is not used again
    np.maximum(clipped, -limit, out=clipped)
    clipped *= weight
    reach_eq = float(cfg["noise_equalise_sigma_px"])
    if reach_eq > 0:
        clipped *= local_noise_gain(clipped, weight, scale, reach_eq)
    spectrum = sfft.rfft2(clipped.astype(np.float32, copy=False))
    return SliceTexture(residual=clipped, weight=inside, scale_hu=scale, spectrum=spectrum)


def power(spectrum: np.ndarray) -> np.ndarray:
    """|F|^2 of a complex spectrum, float32."""
    return spectrum.real * spectrum.real + spectrum.imag * spectrum.imag


# --------------------------------------------------------------------------- screen (fast)
# The screen runs on every slice, so it is built from few, cheap passes: the smooth
# fields (the soft weight near masked pixels, the local noise level) are computed on
# grids 2 and 8 times coarser than the screen grid and interpolated back linearly; the
# robust statistics come from sub-grids; slices go through in stacks of
# ``SCREEN_STACK`` (one array operation for all of them). The localisation of flagged
# slices keeps the full-grid texture (:func:`slice_texture`). Every helper below works
# on the last two axes of a 2-D slice or a 3-D stack of slices.

#: at most about this many samples for a slice's robust noise scale (a robust SD from
#: 2000 samples is within a few per cent; the scale sets the clip level and the gain)
ROBUST_SAMPLES = 2048
#: about this many samples for a slice's fill value (only where pixels are masked)
FILL_SAMPLES = 1024
#: coarse grid of the local noise level: blocks of this many screen pixels a side
NOISE_BLOCK_PX = 8
#: coarse grid of the soft weight near masked pixels
WEIGHT_BLOCK_PX = 2
#: slabs screened together as one stack (at most, one task of a screening thread; the
#: same values for any size). With the texture's steps taken for the whole stack, 6 is as
#: fast as 8 (torso, 2 threads) with a quarter less workspace per thread; 4 is slower
SCREEN_STACK = 6


def _along(axis: int, index: slice, ndim: int) -> tuple[slice, ...]:
    """An index that applies ``index`` along ``axis`` (negative, from the end) of an ``ndim`` array."""
    out = [slice(None)] * ndim
    out[axis] = index
    return tuple(out)


#: output columns per block of :func:`banded_blur`'s products along x (16 was the fastest
#: of 4, 8, 16, 32 and 64 on rows of 256 pixels; larger blocks waste more products on zeros)
BLUR_BLOCK_COLS = 16
#: largest m * n * k of one matrix product and m * n of one matrix-vector product handed to
#: the BLAS library by :func:`segment_products` and :func:`correlate_rows`: OpenBLAS computes
#: products up to about 65536 * 4 and 2304 * 4 on the calling thread (its threading
#: thresholds, from memory) and may hand larger ones to threads of its own, which would
#: compete with the screen's threads; these limits stay well below
BLAS_SERIAL_MNK = 1 << 17
BLAS_SERIAL_MN = 1 << 13


def banded_blur(image: np.ndarray, sigma_px: float, truncate: float, mode: str = "reflect",
                ws: "Workspace | None" = None, tag: str = "band") -> np.ndarray:
    """Separable sampled-Gaussian blur over the last two axes by banded matrix products.

    The same kernel (:func:`gaussian_taps`) and border rules ("reflect" as
    ``scipy.ndimage.gaussian_filter``'s default, ``d c b a | a b c d``, or "constant",
    zeros outside) as scipy's; equal to scipy's filter of each slice up to
    float32 rounding (the products sum the taps in another order). Along y each output
    row is the taps times the ``2r + 1`` rows around it: one vector-matrix product per row
    on a strided view of the row-extended image (no copies of shifted rows); along x
    every block of :data:`BLUR_BLOCK_COLS` outputs is a row segment of ``block + 2r``
    samples times a fixed ``(block + 2r, block)`` band matrix. The image is read once
    per axis instead of once per tap. With a :class:`Workspace` ``ws`` the result is one
    of its buffers (names from ``tag``) until the next call with that tag.

    References
    ----------
    .. [1] scipy.ndimage.gaussian_filter (the same sampled kernel and border rules).
    """
    img = np.asarray(image, dtype=np.float32)
    taps = gaussian_taps(float(sigma_px), float(truncate))
    r = len(taps) // 2
    ny = img.shape[-2]
    rows = scratch(ws, tag + "_rows", img.shape[:-2] + (ny + 2 * r, img.shape[-1]))
    rows[..., r : r + ny, :] = img
    return blur_extended(rows, taps, mode, ws, tag)


def blur_extended(rows: np.ndarray, taps: tuple[float, ...], mode: str = "reflect",
                  ws: "Workspace | None" = None, tag: str = "band") -> np.ndarray:
    """:func:`banded_blur` of the image ``rows[..., r:-r, :]`` held with ``r = len(taps) // 2``
    spare rows on either side (filled here by ``mode``), so that a caller can write the
    image straight into its place. A kernel longer than a side falls back to
    ``scipy.ndimage.correlate1d`` (the mirror would need more than one reflection).
    The result is C-contiguous when the width is a multiple of :data:`BLUR_BLOCK_COLS`.
    """
    r = len(taps) // 2
    ny, nx = rows.shape[-2] - 2 * r, rows.shape[-1]
    img = rows[..., r : r + ny, :]
    if r == 0:
        return img.copy()
    if r > ny or r > nx:
        out = ndimage.correlate1d(img, np.asarray(taps), axis=-2, mode=mode)
        return ndimage.correlate1d(out, np.asarray(taps), axis=-1, mode=mode, output=out)
    _fill_border(rows, r, ny, -2, mode)
    block = BLUR_BLOCK_COLS
    width = -(-nx // block) * block
    lead = rows.shape[:-2]
    cols = scratch(ws, tag + "_cols", lead + (ny, width + 2 * r))
    correlate_rows(rows, taps, cols[..., r : r + nx])
    _fill_border(cols[..., : nx + 2 * r], r, nx, -1, mode)
    cols[..., nx + 2 * r :] = 0.0  # past the border: their outputs are dropped
    out = scratch(ws, tag + "_out", lead + (ny, width))
    correlate_cols(cols, taps, out, block)
    return out if width == nx else out[..., :nx]


def _fill_border(ext: np.ndarray, radius: int, n: int, axis: int, mode: str) -> None:
    """The ``radius`` samples on either side of ``ext``'s middle ``n`` along ``axis`` (in place):
    mirrored (``d c b a | a b c d``) for "reflect", zeros for "constant"."""
    nd = ext.ndim
    lo, hi = _along(axis, slice(0, radius), nd), _along(axis, slice(radius + n, 2 * radius + n), nd)
    if mode == "constant":
        ext[lo] = 0.0
        ext[hi] = 0.0
        return
    stop = radius - 1
    ext[lo] = ext[_along(axis, slice(2 * radius - 1, stop if stop >= 0 else None, -1), nd)]
    ext[hi] = ext[_along(axis, slice(radius + n - 1, n - 1 if n >= 1 else None, -1), nd)]


def correlate_rows(ext: np.ndarray, taps: tuple[float, ...], out: np.ndarray) -> np.ndarray:
    """``out[..., i, :] = sum_d taps[d] * ext[..., i + d, :]`` for the rows of ``out``.

    One vector-matrix product per output row, on a view of ``ext`` whose row ``i`` holds
    rows ``i .. i + 2r`` (overlapping strides, nothing copied); ``ext``'s rows must be
    contiguous. Columns go in chunks of at most ``BLAS_SERIAL_MN // len(taps)``.
    """
    t = np.asarray(taps, dtype=np.float32)
    n, width = out.shape[-2:]
    s = ext.strides
    chunk = max(1, BLAS_SERIAL_MN // t.size)
    for c0 in range(0, width, chunk):
        c1 = min(c0 + chunk, width)
        part = ext[..., c0:c1]
        view = np.lib.stride_tricks.as_strided(part, part.shape[:-2] + (n, t.size, c1 - c0),
                                               s[:-2] + (s[-2], s[-2], s[-1]), writeable=False)
        np.matmul(t, view, out=out[..., c0:c1])
    return out


@functools.lru_cache(maxsize=16)
def band_matrix(taps: tuple[float, ...], block: int) -> np.ndarray:
    """``(block + 2r, block)`` float32 matrix ``M`` with ``M[j + d, j] = taps[d]`` (read-only):
    a row segment of ``block + 2r`` samples times ``M`` is its correlation with the taps at
    the ``block`` positions that have all their samples."""
    t = np.asarray(taps, dtype=np.float32)
    m = np.zeros((block + t.size - 1, block), dtype=np.float32)
    for j in range(block):
        m[j : j + t.size, j] = t
    m.flags.writeable = False
    return m


def correlate_cols(ext: np.ndarray, taps: tuple[float, ...], out: np.ndarray, block: int = BLUR_BLOCK_COLS) -> np.ndarray:
    """``out[..., j] = sum_d taps[d] * ext[..., j + d]`` for the columns of ``out`` (a multiple of ``block``).

    Block ``b`` of the outputs is the segments ``ext[..., b * block : (b + 1) * block + 2r]``
    of every row times :func:`band_matrix` (:func:`segment_products`).
    """
    return segment_products(ext, band_matrix(tuple(taps), block), block, out)


def segment_products(ext: np.ndarray, matrix: np.ndarray, step: int, out: np.ndarray) -> np.ndarray:
    """``out[..., b * q : (b + 1) * q] = ext[..., b * step : b * step + p] @ matrix`` for every block ``b``.

    ``matrix`` is ``(p, q)``; ``out``'s last axis is a whole number of blocks of ``q`` and
    ``ext``'s holds every segment. One matrix product per block, per leading index and
    per chunk of at most ``BLAS_SERIAL_MNK / (p q)`` rows, on strided views of ``ext``
    and ``out`` (nothing copied; rows must be contiguous). The chunks are taken within
    each 2-D image, never across images: every image of a stack then goes through
    products of the same shapes, so its result does not depend on the stack it is in
    (the BLAS library may round rows differently by their place in a product).
    """
    p, q = matrix.shape
    nb = out.shape[-1] // q
    n_rows = out.shape[-2]
    chunk = max(1, BLAS_SERIAL_MNK // (p * q))
    se, so = ext.strides, out.strides
    for r0 in range(0, n_rows, chunk):
        r1 = min(r0 + chunk, n_rows)
        src, dst = ext[..., r0:r1, :], out[..., r0:r1, :]
        segments = np.lib.stride_tricks.as_strided(src, src.shape[:-2] + (nb, r1 - r0, p),
                                                   se[:-2] + (step * se[-1], se[-2], se[-1]), writeable=False)
        blocks = np.lib.stride_tricks.as_strided(dst, dst.shape[:-2] + (nb, r1 - r0, q),
                                                 so[:-2] + (q * so[-1], so[-2], so[-1]))
        np.matmul(segments, matrix, out=blocks)
    return out


def block_mean_even(values: np.ndarray, factor: int, pad: str, ws: "Workspace | None" = None,
                    tag: str = "bme") -> np.ndarray:
    """Means over ``factor`` x ``factor`` blocks of the last two axes, sides padded to multiples.

    ``pad`` "edge" repeats the last row/column, "zero" adds zeros. ``factor`` is a power
    of two; the means are taken by halving the grid repeatedly (pairs of rows, then of
    columns, in float32 whatever the input's type), which reads the input once. ``ws``
    lends the intermediate and final grids (names from ``tag``); the result is then a
    lent buffer.
    """
    ny, nx = values.shape[-2:]
    py, px = -ny % factor, -nx % factor
    v = values
    if py or px:
        widths = [(0, 0)] * (v.ndim - 2) + [(0, py), (0, px)]
        v = np.pad(np.asarray(v, dtype=np.float32), widths, mode="edge" if pad == "edge" else "constant")
    f = 1
    while f < factor:
        lead, (my, mx) = v.shape[:-2], v.shape[-2:]
        rows = scratch(ws, f"{tag}r{f}", lead + (my // 2, mx))
        np.add(v[..., 0::2, :], v[..., 1::2, :], out=rows, dtype=np.float32)
        v = scratch(ws, f"{tag}c{f}", lead + (my // 2, mx // 2))
        np.add(rows[..., 0::2], rows[..., 1::2], out=v)
        f *= 2
    if f == 1:
        v = np.array(v, dtype=np.float32)
    v *= np.float32(1.0 / (factor * factor))
    return v


def upsample_linear(coarse: np.ndarray, factor: int, shape: tuple[int, int], ws: "Workspace | None" = None,
                    tag: str = "up", out: np.ndarray | None = None) -> np.ndarray:
    """Bilinear interpolation of block-centre values back to the pixels of ``shape`` (last two axes).

    ``coarse[..., j, i]`` sits at the centre of block (j, i) of ``factor`` pixels a
    side, i.e. at pixel ``factor * j + (factor - 1) / 2``; beyond the first and last
    centres the edge value is kept. ``ws`` lends the result and the intermediates
    (names from ``tag``); ``out``, if given, receives the full ``factor`` times larger
    grid (of which the ``shape`` part is returned).
    """
    rows = _upsample_axis(coarse, factor, -1, ws, tag + "x")  # along x on the small grid first,
    rows = _upsample_axis(rows, factor, -2, ws, tag + "y", out)  # then whole rows along y
    return rows[..., : shape[0], : shape[1]]


@functools.lru_cache(maxsize=16)
def _upsample_weights(factor: int) -> tuple[tuple[int, float], ...]:
    """Per pixel offset k in a block: (-1, w) toward the previous centre, (+1, w) toward the next."""
    out = []
    for k in range(factor):
        u = (k - (factor - 1) / 2.0) / factor  # offset from the block centre, in blocks
        out.append((-1 if u < 0 else 1, abs(u)))
    return tuple(out)


def _upsample_axis(coarse: np.ndarray, factor: int, axis: int, ws: "Workspace | None" = None, tag: str = "",
                   out: np.ndarray | None = None) -> np.ndarray:
    """Linear interpolation along ``axis`` from block centres to the ``factor`` pixels of each block.

    Pixel ``k`` of block ``j`` is ``c[j] + w (c[j -/+ 1] - c[j])`` (``c[j]`` itself past
    the first and last centres). The differences of neighbouring centres are formed
    once; toward the previous centre ``c[j] - w (c[j] - c[j-1])`` is the same number
    (negation and the product's rounding are symmetric), so each offset costs one
    product and one strided write.
    """
    c = np.asarray(coarse, dtype=np.float32)
    nd = c.ndim
    shape = list(c.shape)
    shape[axis] *= factor
    if out is None:
        out = scratch(ws, tag + "out", tuple(shape))
    head, tail = _along(axis, slice(None, -1), nd), _along(axis, slice(1, None), nd)
    first, last = _along(axis, slice(0, 1), nd), _along(axis, slice(-1, None), nd)
    step_shape = list(c.shape)
    step_shape[axis] -= 1
    diff = np.subtract(c[tail], c[head], out=scratch(ws, tag + "diff", tuple(step_shape)))  # c[j+1] - c[j]
    scaled = scratch(ws, tag + "scaled", tuple(step_shape))
    done = None
    for k, (side, w) in enumerate(_upsample_weights(factor)):
        view = out[_along(axis, slice(k, None, factor), nd)]
        if done != w:
            np.multiply(diff, np.float32(w), out=scaled)
            done = w
        if side < 0:
            np.subtract(c[tail], scaled, out=view[tail])
            view[first] = c[first]
        else:
            np.add(c[head], scaled, out=view[head])
            view[last] = c[last]
    return out


def coarse_soft_weight(bad_fraction: np.ndarray, reach_px: float, ws: "Workspace | None" = None) -> np.ndarray:
    """:func:`soft_weight` on the grid of 2 x 2 blocks, from the fraction of bad pixels per block.

    The fraction is blurred by a Gaussian whose variance, together with the block mean
    (1/4 px^2) and the bilinear interpolation back to the pixels (2/3 px^2), is that of
    the full-grid blur (SD ``reach_px / 2``); the weight is then
    ``clip(1 - 20 blur, 0, 1) ** 2`` as in :func:`soft_weight`.
    """
    f = WEIGHT_BLOCK_PX
    var = (0.5 * reach_px) ** 2 - (f * f - 1) / 12.0 - f * f / 6.0
    blur = banded_blur(bad_fraction, math.sqrt(max(var, 0.01)) / f, 2.5, ws=ws, tag="wblur")
    blur *= np.float32(-20.0)
    blur += np.float32(1.0)
    np.clip(blur, 0.0, 1.0, out=blur)
    blur *= blur
    return blur


@functools.lru_cache(maxsize=16)
def gaussian_matrix(n: int, sigma: float, truncate: float) -> np.ndarray:
    """``(n, n)`` matrix of the sampled Gaussian blur with zeros outside (small grids only).

    ``G @ x`` equals ``scipy.ndimage.correlate1d(x, gaussian_taps(sigma, truncate),
    mode="constant")`` along the first axis.
    """
    taps = np.asarray(gaussian_taps(float(sigma), float(truncate)), dtype=np.float32)
    radius = taps.size // 2
    out = np.zeros((n, n), dtype=np.float32)
    for k, t in enumerate(taps):
        d = k - radius
        idx = np.arange(max(0, -d), min(n, n - d))
        out[idx, idx + d] = t
    out.flags.writeable = False
    return out


def coarse_noise_gain(square_mean: np.ndarray, weight: np.ndarray, scale_hu: np.ndarray | float, sigma_px: float,
                      ws: "Workspace | None" = None) -> np.ndarray:
    """:func:`local_noise_gain` on the grid of 2 x 2 blocks, the local RMS taken over 8 x 8 blocks.

    ``square_mean`` is the mean of the clipped residual squared per 2 x 2 block and
    ``weight`` the soft weight there (last two axes; ``scale_hu`` per slice of a
    stack); the weighted squares and the weights are averaged over 8 x 8 pixel blocks
    and smoothed by a Gaussian (zeros outside) whose variance, with the block mean
    (63/12 px^2) and the bilinear interpolation back (64/6 px^2), is ``sigma_px**2``;
    the gain ``scale / max(RMS, scale / 4)`` is formed at the 8 x 8 block centres and
    interpolated back to the 2 x 2 grid.

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 5 (noise of filtered back-projection depends on the
       attenuation along each ray).
    """
    k = NOISE_BLOCK_PX // WEIGHT_BLOCK_PX
    weighted = scratch(ws, "gain_weighted", weight.shape)
    np.multiply(weight, weight, out=weighted)
    weighted *= square_mean
    num = block_mean_even(weighted, k, "zero", ws, "gain_num")
    den = block_mean_even(weight, k, "zero", ws, "gain_den")
    f = NOISE_BLOCK_PX
    var = sigma_px * sigma_px - (f * f - 1) / 12.0 - f * f / 6.0
    s = math.sqrt(max(var, 0.01)) / f
    rows, cols = gaussian_matrix(num.shape[-2], s, 3.0), gaussian_matrix(num.shape[-1], s, 3.0)
    num = rows @ num @ cols.T  # the blur with zeros outside
    den = rows @ den @ cols.T
    np.maximum(den, np.float32(1e-3), out=den)
    np.divide(num, den, out=num)
    np.sqrt(num, out=num)
    scale = np.asarray(scale_hu, dtype=np.float32)
    scale = scale.reshape(scale.shape + (1, 1)) if scale.ndim else scale
    np.maximum(num, np.float32(0.25) * scale, out=num)
    gain = np.divide(scale, num, out=num)
    return upsample_linear(gain, k, weight.shape[-2:], ws, "gain_up")


def sample_median(values: np.ndarray) -> float:
    """The median of a 1-D sample (which is reordered in place), as ``np.median`` gives it.

    The two middle order statistics from one partition; their mean for an even count.
    """
    n = values.size
    lo, hi = (n - 1) // 2, n // 2
    values.partition([lo, hi] if hi != lo else hi)
    if hi == lo:
        return float(values[hi])
    return float((values[lo] + values[hi]) / 2)


def grid_subsample(values: np.ndarray, mask: np.ndarray, max_samples: int, count: int | None = None) -> np.ndarray:
    """Values under ``mask`` on a regular sub-grid of at most about ``max_samples`` points.

    The grid step is ``sqrt(count / max_samples)`` rounded up to whole pixels, ``count``
    being the number of pixels under the mask; without it the array size is used (fewer
    samples when the mask covers part of the array, no pass to count them).
    """
    n = mask.size if count is None else count
    step = max(1, math.ceil(math.sqrt(n / max(1, max_samples))))
    return values[::step, ::step][mask[::step, ::step]]


def strong_edges_stack(smoothed: np.ndarray, step_hu: float, sigma_px: float, ws: "Workspace | None" = None) -> np.ndarray:
    """:func:`strong_edges` of every slice of a stack (the same differences and threshold)."""
    gy = scratch(ws, "edge_gy", smoothed.shape)
    gx = scratch(ws, "edge_gx", smoothed.shape)
    gy[..., 0, :] = gy[..., -1, :] = 0.0
    np.subtract(smoothed[..., 2:, :], smoothed[..., :-2, :], out=gy[..., 1:-1, :])
    if smoothed.flags.c_contiguous and smoothed.size > 2:
        # along x as one flat line (contiguous operands); the differences that straddle two
        # rows land on the first and last columns, which are zeroed below
        flat = smoothed.reshape(-1)
        np.subtract(flat[2:], flat[:-2], out=gx.reshape(-1)[1:-1])
    else:
        np.subtract(smoothed[..., 2:], smoothed[..., :-2], out=gx[..., 1:-1])
    gx[..., 0] = gx[..., -1] = 0.0
    gy *= gy
    gx *= gx
    gy += gx  # 4 x the squared gradient magnitude
    threshold = step_hu / (max(sigma_px, 0.5) * math.sqrt(2.0 * math.pi))
    return np.greater(gy, np.float32(4.0 * threshold * threshold), out=scratch(ws, "edge_out", gy.shape, bool))


def screen_textures(images: np.ndarray, allowed: np.ndarray, cfg: dict[str, Any],
                    all_finite: np.ndarray | None = None, ws: Workspace | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The screen's edge-suppressed, clipped, noise-equalised residual of each binned slice of a stack.

    ``images`` is ``(k, ny, nx)``, ``allowed`` the same shape (bool); ``all_finite``
    (per slice, if known) says which slices have no NaN or infinite pixel. The same steps as
    :func:`slice_texture` (see the module docstring): the high-pass residual and the
    strong edges on the screen grid; the soft weight and the local noise gain, which are
    smooth, on the grid of 2 x 2 blocks (:func:`coarse_soft_weight`,
    :func:`coarse_noise_gain`), their product interpolated back bilinearly; the fill
    value and the noise scale of each slice from a sub-grid of at most
    :data:`ROBUST_SAMPLES` pixels. Returns the ``(k, ny, nx)`` textures and, per
    slice, whether it has enough pixels left (its texture is meaningless otherwise).
    With a :class:`Workspace` ``ws`` the textures are one of its buffers (valid until
    its next stack).
    """
    k, ny, nx = images.shape
    min_count = cfg["min_weight_fraction"] * ny * nx
    if all_finite is None:
        all_finite = np.isfinite(images.reshape(k, -1).max(axis=1)) & np.isfinite(images.reshape(k, -1).min(axis=1))
    finite = bool(np.all(all_finite))
    valid = allowed if finite else allowed & np.isfinite(images)
    n_valid = count_per_slice(valid)
    usable = n_valid >= min_count
    sigma = float(cfg["highpass_sigma_px"])
    taps = gaussian_taps(sigma, 3.0)
    r = len(taps) // 2
    # the filled image is written straight between the spare rows of the high-pass blur
    rows = scratch(ws, "tex_rows", (k, ny + 2 * r, nx))
    img = rows[:, r : r + ny]
    fill_masked(images, valid, n_valid, usable, finite, img)
    smoothed = blur_extended(rows, taps, "reflect", ws, "tex_blur")
    residual = np.subtract(img, smoothed, out=scratch(ws, "tex_residual", images.shape))
    edges = strong_edges_stack(smoothed, float(cfg["edge_step_hu"]), sigma, ws)
    bad = np.less_equal(valid, edges, out=edges)  # an edge or not valid (booleans)
    f = WEIGHT_BLOCK_PX
    weight = coarse_soft_weight(block_mean_even(bad.view(np.uint8), f, "edge", ws, "frac"), 2.0 * sigma + 2.0, ws)
    inside = weight > 0.5
    n_inside = count_per_slice(inside)
    scale = np.ones(k, dtype=np.float64)
    for i in range(k):
        usable[i] &= n_inside[i] * f * f >= min_count
        if usable[i]:
            sample = np.abs(grid_subsample(residual[i, ::f, ::f], inside[i], ROBUST_SAMPLES, int(n_inside[i])))
            value = 1.4826 * sample_median(sample) if sample.size else 0.0
            usable[i] &= value > 0 and math.isfinite(value)
            scale[i] = value if usable[i] else 1.0
    limit = (float(cfg["clip_sigma"]) * scale).astype(np.float32).reshape(k, 1, 1)
    np.clip(residual, -limit, limit, out=residual)
    reach_eq = float(cfg["noise_equalise_sigma_px"])
    if reach_eq > 0:
        squared = np.multiply(residual, residual, out=scratch(ws, "tex_squared", residual.shape))
        weight *= coarse_noise_gain(block_mean_even(squared, f, "edge", ws, "sq"), weight, scale, reach_eq, ws)
    residual *= upsample_linear(weight, f, (ny, nx), ws, "wt")
    return residual, usable


def count_per_slice(mask: np.ndarray) -> np.ndarray:
    """True pixels of each slice of a boolean stack (``count_nonzero`` slice by slice: its
    whole-array count is much faster than the reduction along an axis)."""
    return np.array([np.count_nonzero(m) for m in mask], dtype=np.int64)


def fill_masked(images: np.ndarray, valid: np.ndarray, n_valid: np.ndarray, usable: np.ndarray, finite: bool,
                out: np.ndarray) -> np.ndarray:
    """``images`` with the pixels outside ``valid`` replaced by their slice's fill value, into ``out``.

    The fill of a slice is the median of its valid pixels on a sub-grid of about
    :data:`FILL_SAMPLES` points (all its valid pixels if the sub-grid holds none); slices
    with every pixel valid are copied, unusable ones get 0 outside ``valid``. ``finite``
    says that ``images`` hold no NaN or infinity.
    """
    k = images.shape[0]
    if int(n_valid.min()) == valid[0].size:
        np.copyto(out, images)
        return out
    fill = np.zeros((k, 1, 1), dtype=np.float32)
    for i in range(k):
        if usable[i] and n_valid[i] < valid[i].size:
            sample = grid_subsample(images[i], valid[i], FILL_SAMPLES)
            fill[i] = sample_median(sample) if sample.size else np.median(images[i][valid[i]])
    if finite:  # the fill everywhere, then the valid pixels
        out[...] = fill
        np.copyto(out, images, where=valid)
    else:
        np.copyto(out, np.where(valid, images, fill))
    return out


def screen_texture(image: np.ndarray, allowed: np.ndarray, cfg: dict[str, Any]) -> np.ndarray | None:
    """:func:`screen_textures` of one binned slice (None if too few pixels are left)."""
    textures, usable = screen_textures(image[None], allowed[None], cfg)
    return textures[0] if usable[0] else None


def cell_powers(spectra: np.ndarray, bins: SpectralBins, ws: Workspace | None = None) -> np.ndarray:
    """Summed |F|^2 of the in-band samples per (ring, orientation) cell: ``(k, n_rings, n_bins)``.

    ``spectra`` are rfft2 spectra ``(k, ny, nx // 2 + 1)`` (or a sequence of ``k`` such
    2-D spectra); the powers of all of them are formed at once, then one sparse product
    per spectrum with the cell-membership matrix of ``bins`` (float64 sums of the float32
    powers, which are written as float64 so that the product needs no converted copy).
    ``ws`` lends the squares and the powers.
    """
    spectra = spectra if isinstance(spectra, np.ndarray) else np.stack(spectra)
    out = np.empty((len(spectra), bins.n_rings, bins.n_bins), dtype=np.float64)
    v = spectra.view(np.float32)
    sq = np.multiply(v, v, out=scratch(ws, "cell_sq", v.shape))
    power = scratch(ws, "cell_power", spectra.shape, np.float64)
    np.add(sq[..., 0::2], sq[..., 1::2], out=power, dtype=np.float32)
    for i in range(len(spectra)):
        out[i] = (bins.cell_matrix @ power[i].ravel()).reshape(bins.n_rings, bins.n_bins)
    return out


def profile_of_cells(cells: np.ndarray, bins: SpectralBins) -> np.ndarray | None:
    """:func:`angular_profile` from the summed power per (ring, orientation) cell.

    The ring means and the whitened sums per orientation follow from that small table
    (the same sums as :func:`angular_profile`, in another order).
    """
    return profiles_of_cells(cells[None], bins)[0]


def profiles_of_cells(cells: np.ndarray, bins: SpectralBins) -> list[np.ndarray | None]:
    """:func:`profile_of_cells` of each ``(n_rings, n_bins)`` table of a ``(k, n_rings, n_bins)``
    stack, computed for the stack at once (None where the ring means are not finite and
    positive somewhere, or the profile's mean is not positive)."""
    ring_mean = cells.sum(axis=2) / np.maximum(bins.ring_count, 1)
    ok = np.isfinite(ring_mean).all(axis=1) & (ring_mean.max(axis=1) > 0)
    positive = ring_mean > 0
    inv = np.where(positive, 1.0 / np.where(positive, ring_mean, 1.0), 0.0)
    with np.errstate(invalid="ignore", over="ignore"):
        profiles = np.matmul(inv[:, None, :], cells)[:, 0, :] / np.maximum(bins.bin_count, 1)
        means = profiles.mean(axis=1)
    return [profiles[i] / means[i] if ok[i] and means[i] > 0 else None for i in range(len(cells))]


# --------------------------------------------------------------------------- directions
def missing_wedge(profile: np.ndarray, bin_deg: float, level: float, min_deg: float) -> dict[str, float] | None:
    """The widest contiguous orientation range with (smoothed) profile below ``level``.

    Ends are refined to where the smoothed profile crosses half the isotropic level
    (0.5), interpolated linearly between bin centres. Returns ``{"from_deg", "to_deg",
    "width_deg"}`` (counter-clockwise from ``from_deg`` to ``to_deg``) or None.
    """
    smooth = circular_smooth(profile)
    low = smooth < level
    n = low.size
    if not low.any() or low.all():
        return None
    start = int(np.flatnonzero(~low)[0])  # rotate so index 0 is not low
    rolled = np.roll(low, -start)
    best = (0, 0)
    i = 0
    while i < n:
        if rolled[i]:
            j = i
            while j < n and rolled[j]:
                j += 1
            if j - i > best[1] - best[0]:
                best = (i, j)
            i = j
        else:
            i += 1
    first, last = (best[0] + start) % n, (best[1] - 1 + start) % n
    if (best[1] - best[0]) * bin_deg < min_deg:
        return None
    lo_edge = _boundary_peak(profile, _half_crossing(smooth, first, -1, bin_deg), -1, bin_deg)
    hi_edge = _boundary_peak(profile, _half_crossing(smooth, last, +1, bin_deg), +1, bin_deg)
    width = (hi_edge - lo_edge) % 180.0
    return {"from_deg": round(lo_edge % 180.0, 2), "to_deg": round(hi_edge % 180.0, 2), "width_deg": round(width, 2)}


#: how far (deg) outside a wedge's half-level crossing its boundary streak is looked for
BOUNDARY_SEARCH_DEG = 10.0
#: the least height (isotropic level = 1) of a boundary streak peak
BOUNDARY_PEAK_MIN = 1.2


def _boundary_peak(profile: np.ndarray, crossing_deg: float, outward: int, bin_deg: float) -> float:
    """The boundary streak next to a wedge edge, else the half-level crossing itself.

    The last measured orientation carries the boundary streaks (Fourier slice theorem),
    so the strongest local maximum of the profile from 2 deg inside the crossing to
    ``BOUNDARY_SEARCH_DEG`` outside it, if at least ``BOUNDARY_PEAK_MIN``, marks the edge.
    """
    n = profile.size
    steps = np.arange(-2.0, BOUNDARY_SEARCH_DEG + 1e-9, bin_deg)
    idx = [int(round((crossing_deg + outward * d) / bin_deg)) % n for d in steps]
    best = max(idx, key=lambda i: profile[i])
    a, b, c = float(profile[(best - 1) % n]), float(profile[best]), float(profile[(best + 1) % n])
    if b < BOUNDARY_PEAK_MIN or b < a or b < c:
        return crossing_deg
    denom = a - 2 * b + c
    shift = 0.5 * (a - c) / denom if denom < 0 else 0.0
    return (best + shift) * bin_deg


def _half_crossing(smooth: np.ndarray, index: int, step: int, bin_deg: float) -> float:
    """Walk from a low bin outward until the profile reaches 0.5; interpolate the angle."""
    n = smooth.size
    here = index
    for _ in range(n):
        nxt = (here + step) % n
        if smooth[nxt] >= 0.5:
            a, b = float(smooth[here]), float(smooth[nxt])
            frac = (0.5 - a) / (b - a) if b != a else 0.5
            return (here + step * frac) * bin_deg
        here = nxt
    return index * bin_deg


def profile_peaks(profile: np.ndarray, bin_deg: float, level: float) -> list[tuple[float, float]]:
    """Circular local maxima above ``level`` as (angle_deg, height), strongest first.

    The angle is refined by a parabola through the peak bin and its neighbours.
    """
    left, right = np.roll(profile, 1), np.roll(profile, -1)
    is_peak = (profile >= left) & (profile > right) & (profile > level)
    peaks = []
    for i in np.flatnonzero(is_peak):
        a, b, c = float(left[i]), float(profile[i]), float(right[i])
        denom = a - 2 * b + c
        shift = 0.5 * (a - c) / denom if denom < 0 else 0.0
        peaks.append((float((i + shift) * bin_deg % 180.0), b))
    peaks.sort(key=lambda p: -p[1])
    return peaks


def display_angle(angle_deg: float) -> str:
    """Whole degrees in [0, 180) for messages and labels (179.7 reads 0, not 180)."""
    return f"{round(float(angle_deg)) % 180:d}"


def angle_distance(a: float, b: float) -> float:
    """Distance between two line orientations in degrees (period 180)."""
    d = abs(a - b) % 180.0
    return min(d, 180.0 - d)


def dominant_angles(profile: np.ndarray, wedge: dict[str, float] | None, cfg: dict[str, Any], pair_angles: list[float] | None = None) -> list[float]:
    """Wedge boundaries first (if any), then dense-pair lines, then profile peaks."""
    bin_deg = float(cfg["angle_bin_deg"])
    chosen: list[float] = []
    if wedge is not None:
        edges = [wedge["from_deg"], wedge["to_deg"]]
        strength = [_outside_strength(profile, e, bin_deg, wedge) for e in edges]
        chosen = [e for _, e in sorted(zip(strength, edges), key=lambda p: -p[0])]
    for angle in pair_angles or []:
        if all(angle_distance(angle, c) > 2.5 * bin_deg for c in chosen):
            chosen.append(angle)
    level = level_outside_wedge(profile, wedge, bin_deg)
    for angle, _ in profile_peaks(profile / level, bin_deg, float(cfg["peak_level"])):
        if all(angle_distance(angle, c) > 2.5 * bin_deg for c in chosen):
            chosen.append(angle)
    return [round(a, 1) % 180.0 for a in chosen[: int(cfg["max_directions"])]]


def level_outside_wedge(profile: np.ndarray, wedge: dict[str, float] | None, bin_deg: float) -> float:
    """Mean of the profile over the orientations outside a missing wedge (1 without one).

    The profile's mean over all orientations is 1 by construction; a wedge of width
    ``w`` holding (almost) no energy raises the mean of the other bins to about
    ``180 / (180 - w)``, which is the isotropic level the peaks must be judged against.
    """
    if wedge is None:
        return 1.0
    into = (np.arange(profile.size) * bin_deg - wedge["from_deg"]) % 180.0
    outside = into > wedge["width_deg"]
    level = float(profile[outside].mean()) if outside.any() else 1.0
    return level if level > 0 else 1.0


def _outside_strength(profile: np.ndarray, edge_deg: float, bin_deg: float, wedge: dict[str, float]) -> float:
    """Largest profile value within 10 deg outside a wedge boundary."""
    n = profile.size
    centre = (wedge["from_deg"] + 0.5 * wedge["width_deg"]) % 180.0
    outward = 1 if angle_distance(edge_deg + 1.0, centre) > angle_distance(edge_deg, centre) else -1
    idx = [int(round((edge_deg + outward * d) / bin_deg)) % n for d in np.arange(0.0, 10.0 + 1e-9, bin_deg)]
    return float(profile[idx].max())


# --------------------------------------------------------------------------- dense pairs
@dataclass(frozen=True)
class DenseObject:
    """A connected component of dense pixels on a (binned) slice."""

    centre_yx: tuple[float, float]
    radius_px: float  # radius of the disc of the same area


def dense_objects(image: np.ndarray, dense_hu: float, max_objects: int) -> list[DenseObject]:
    """Components of ``image >= dense_hu`` (at least 2 px), largest first, at most ``max_objects``."""
    mask = np.isfinite(image) & (image >= np.float32(dense_hu))
    if not mask.any():
        return []
    labels, n = ndimage.label(mask)
    areas = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    order = [i for i in np.argsort(-areas) if areas[i] >= 2][: max(0, int(max_objects))]
    if not order:
        return []
    centres = ndimage.center_of_mass(mask, labels, [int(i) + 1 for i in order])
    return [DenseObject((float(c[0]), float(c[1])), math.sqrt(float(areas[i]) / math.pi)) for c, i in zip(centres, order)]


def segment_median(image: np.ndarray, start: np.ndarray, end: np.ndarray, exclude: np.ndarray) -> float:
    """Median of ``image`` sampled every pixel on a segment (bilinear), skipping ``exclude``d or non-finite samples; NaN if none."""
    length = float(np.hypot(*(end - start)))
    n = max(2, int(math.ceil(length)) + 1)
    f = np.linspace(0.0, 1.0, n)
    pts = start[:, None] + (end - start)[:, None] * f[None, :]
    ny, nx = image.shape
    inside = (pts[0] >= 0) & (pts[0] <= ny - 1) & (pts[1] >= 0) & (pts[1] <= nx - 1)
    pts = pts[:, inside]
    if pts.shape[1] == 0:
        return float("nan")
    values = ndimage.map_coordinates(image, pts, order=1, mode="nearest")
    bad = ndimage.map_coordinates(exclude.astype(np.float32), pts, order=1, mode="nearest") > 0.0
    keep = np.isfinite(values) & ~bad
    return float(np.median(values[keep])) if keep.sum() >= 2 else float("nan")


def dense_pair_lines(image: np.ndarray, cfg: dict[str, Any]) -> list[tuple[float, float]]:
    """(orientation_deg, band contrast HU) of every dense-object pair with a band between them.

    The contrast is the band's median minus the mean of the two flanking medians
    (negative for a dark band); see the module docstring. Orientation in the GUIDE
    convention, ``atan2(-dy, dx)`` mod 180.

    References
    ----------
    .. [1] J. Hsieh, *Computed Tomography*, SPIE Press (dark streaks between metal objects
       from beam hardening and photon starvation).
    .. [2] Kak & Slaney (1988), ch. 4 (polychromaticity artefacts).
    """
    objects = dense_objects(image, float(cfg["dense_hu"]), int(cfg["max_dense_objects"]))
    exclude = ndimage.binary_dilation(np.isfinite(image) & (image >= np.float32(cfg["dense_hu"])), iterations=2)
    out = []
    for i, a in enumerate(objects):
        for b in objects[i + 1 :]:
            found = pair_band_contrast(image, exclude, a, b)
            if found is not None and abs(found[1]) >= float(cfg["dense_band_hu"]):
                out.append(found)
    out.sort(key=lambda p: -abs(p[1]))
    return out


def pair_band_contrast(image: np.ndarray, exclude: np.ndarray, a: DenseObject, b: DenseObject) -> tuple[float, float] | None:
    """Orientation and band contrast between two dense objects, or None if too close or unmeasurable."""
    ca, cb = np.array(a.centre_yx), np.array(b.centre_yx)
    d = cb - ca
    dist = float(np.hypot(*d))
    gap = dist - a.radius_px - b.radius_px - 4.0
    if gap < 4.0:
        return None
    u = d / dist
    normal = np.array([u[1], -u[0]])
    start, end = ca + u * (a.radius_px + 2.0), cb - u * (b.radius_px + 2.0)
    offset = 2.0 * max(a.radius_px, b.radius_px) + 3.0
    band = segment_median(image, start, end, exclude)
    sides = [segment_median(image, start + s * offset * normal, end + s * offset * normal, exclude) for s in (-1.0, 1.0)]
    if not all(math.isfinite(v) for v in [band, *sides]):
        return None
    angle = math.degrees(math.atan2(-d[0], d[1])) % 180.0
    return round(angle, 1) % 180.0, round(band - 0.5 * (sides[0] + sides[1]), 1)


def pool_pair_lines(per_slice: dict[int, list[tuple[float, float]]], tol_deg: float = 3.0) -> list[dict[str, Any]]:
    """Group dense-pair lines of several slices by orientation (within ``tol_deg``).

    Each group reports its median orientation and contrast and its slices; groups are
    ordered by the number of slices, then by the contrast's magnitude.
    """
    groups: list[list[tuple[int, float, float]]] = []
    for z in sorted(per_slice):
        for angle, contrast in per_slice[z]:
            for g in groups:
                if angle_distance(g[0][1], angle) <= tol_deg:
                    g.append((z, angle, contrast))
                    break
            else:
                groups.append([(z, angle, contrast)])
    out = []
    for g in groups:
        ref = g[0][1]
        unwrapped = [ref + ((a - ref + 90.0) % 180.0 - 90.0) for _, a, _ in g]
        out.append({
            "angle_deg": round(float(np.median(unwrapped)) % 180.0, 1),
            "contrast_hu": round(float(np.median([c for _, _, c in g])), 1),
            "slices": sorted({z for z, _, _ in g}),
        })
    out.sort(key=lambda r: (-len(r["slices"]), -abs(r["contrast_hu"])))
    return out


# --------------------------------------------------------------------------- localisation
# A flagged slice is localised along 2-4 directions. What does not depend on the
# direction is computed once per slice (the ring means of the spectrum, the weighted
# pixels' coordinates), the angular windows once per volume and angle
# (:class:`AngularWindows`), and the directions go through together: one inverse FFT and
# one blur (:func:`banded_blur`) over the stack of components.
class AngularWindows:
    """Gaussian angular windows on the rfft2 grid of ``bins``, made once per angle.

    The window at ``angle_deg`` is ``exp(-d^2 / (2 w^2))`` inside the band of ``bins``
    (0 outside), with ``d`` the distance (deg, period 180) between the orientation of
    the lines a frequency carries and ``angle_deg``. The slices of a volume share the
    angles of its missing wedge and, rounded to 0.1 deg, most peaks, and series of one
    scanner share them too: :func:`angular_windows` keeps one instance per grid, which
    holds the last :data:`KEPT_WINDOWS` angles' windows (threads may share it: a window
    computed twice is the same).
    """

    def __init__(self, bins: SpectralBins, window_deg: float) -> None:
        self.bins = bins
        self.window_deg = float(window_deg)
        band_radius = bins.radius.ravel()[bins.sample]
        self._band = (bins.radius >= band_radius.min()) & (bins.radius <= band_radius.max())
        self._made: dict[float, np.ndarray] = {}

    def window(self, angle_deg: float) -> np.ndarray:
        """The window at ``angle_deg`` (float32, rfft2 grid, read-only)."""
        found = self._made.get(angle_deg)
        if found is None:
            if len(self._made) >= KEPT_WINDOWS:
                self._made.clear()
            found = self._made[angle_deg] = self._compute(angle_deg)
        return found

    def _compute(self, angle_deg: float) -> np.ndarray:
        d = np.abs(self.bins.line_angle_deg - np.float32(angle_deg)) % 180.0
        d = np.minimum(d, 180.0 - d)
        window = (np.exp(-0.5 * (d / self.window_deg) ** 2) * self._band).astype(np.float32)
        window.flags.writeable = False
        return window


#: angular windows kept per grid (about 130 kB each on a 256 x 256 grid)
KEPT_WINDOWS = 24


@functools.lru_cache(maxsize=4)
def angular_windows(shape: tuple[int, int], band: tuple[float, float], bin_deg: float,
                    window_deg: float) -> AngularWindows:
    """The :class:`AngularWindows` of the grid of :func:`spectral_bins` ``(shape, band, bin_deg)``
    (cached: one per grid and window width)."""
    return AngularWindows(spectral_bins(shape, band, bin_deg), window_deg)


def ring_mean_power(spectrum: np.ndarray, bins: SpectralBins) -> np.ndarray:
    """Mean power ``|F|^2`` of each frequency ring of the band (float64): the level an
    isotropic texture of the measured spectrum puts at each frequency."""
    p = power(spectrum.ravel()[bins.sample]).astype(np.float64)
    return np.bincount(bins.ring, weights=p, minlength=bins.n_rings) / np.maximum(bins.ring_count, 1)


def directional_components(texture: SliceTexture, bins: SpectralBins, angles: list[float],
                           windows: AngularWindows) -> tuple[np.ndarray, np.ndarray]:
    """Back-transforms of the residual's spectrum in the angular windows at ``angles``.

    Returns the components, a float32 ``(len(angles), ny, nx)`` stack (one inverse FFT
    over the windowed spectra), and their expected variances under isotropic texture of
    the measured ring levels (Parseval), used to make strengths dimensionless.

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 3 (Fourier slice theorem: lines of one orientation
       keep their energy on the frequency line perpendicular to it).
    """
    ny, nx = texture.residual.shape
    ring_level = ring_mean_power(texture.spectrum, bins)[bins.ring]
    windowed = np.empty((len(angles),) + texture.spectrum.shape, dtype=texture.spectrum.dtype)
    expected = np.empty(len(angles), dtype=np.float64)
    for k, angle in enumerate(angles):
        window = windows.window(angle)
        np.multiply(texture.spectrum, window, out=windowed[k])
        w2 = window.ravel()[bins.sample].astype(np.float64) ** 2
        # rfft2 holds half the plane: every sample except kx = 0 (and Nyquist) counts twice.
        expected[k] = max(2.0 * float(np.sum(ring_level * w2)) / (ny * nx) ** 2, 1e-12)
    components = sfft.irfft2(windowed, s=(ny, nx), axes=(-2, -1), overwrite_x=True)
    return components.astype(np.float32, copy=False), expected


def streak_strengths(components: np.ndarray, expected: np.ndarray, smooth_px: float) -> np.ndarray:
    """Local RMS of each component over a Gaussian of SD ``smooth_px``, in units of its
    expected RMS under isotropic noise (float32 stack; the blur is :func:`banded_blur`)."""
    local = banded_blur(components * components, smooth_px, 3.0)
    local /= expected.astype(np.float32)[:, None, None]
    return np.sqrt(local, out=local)


@dataclass
class SliceStreaks:
    """Localised streaks on one binned slice."""

    strength: np.ndarray  # float32, binned grid
    lines: list[tuple[float, tuple[float, float], tuple[float, float], float]] = field(default_factory=list)
    # (angle_deg, start_yx, end_yx, z-score) in binned pixel coordinates


@dataclass(frozen=True)
class WeightedPixels:
    """The pixels of a slice that carry weight, in raster order: their flat indices and
    their row and column offsets (float32) from the slice centre."""

    flat: np.ndarray
    yy: np.ndarray
    xx: np.ndarray
    centre: tuple[float, float]

    @classmethod
    def of(cls, weight: np.ndarray) -> "WeightedPixels":
        """The pixels where the boolean ``weight`` is True (gathered once for all directions)."""
        yy, xx = centred_grid(tuple(weight.shape))
        flat = np.flatnonzero(weight)
        centre = ((weight.shape[0] - 1) / 2.0, (weight.shape[1] - 1) / 2.0)
        return cls(flat=flat, yy=yy.ravel()[flat], xx=xx.ravel()[flat], centre=centre)


def localise_slice(texture: SliceTexture, bins: SpectralBins, angles: list[float], cfg: dict[str, Any],
                   windows: AngularWindows | None = None) -> SliceStreaks:
    """Streak-strength map and line segments of one slice for the given directions.

    The strength map is the largest strength over the directions, on the weighted
    pixels (0 elsewhere); the segments are the strongest ``max_segments_per_slice``
    lines of all directions. ``windows`` (made here if not given) may be shared by
    the slices of a volume.
    """
    strength = np.zeros(texture.residual.shape, dtype=np.float32)
    if not angles:
        return SliceStreaks(strength=strength)
    if windows is None:
        windows = AngularWindows(bins, float(cfg["direction_window_deg"]))
    components, expected = directional_components(texture, bins, angles, windows)
    smooth_px = max(2.0, 2.0 * float(cfg["highpass_sigma_px"]))
    # the strengths are >= 0, so the largest over the directions times the 0/1 weight is
    # the largest of the weighted strengths
    np.multiply(streak_strengths(components, expected, smooth_px).max(axis=0), texture.weight, out=strength)
    pixels = WeightedPixels.of(texture.weight)
    lines = []
    for comp, angle in zip(components, angles):
        lines += lines_at_angle(comp.ravel()[pixels.flat].astype(np.float64), pixels, angle, cfg)
    lines.sort(key=lambda ln: -ln[3])
    return SliceStreaks(strength=strength, lines=lines[: int(cfg["max_segments_per_slice"])])


def line_frame(pixels: WeightedPixels, angle_deg: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Offset ``t`` across and position ``s`` along lines of ``angle_deg`` for the weighted pixels.

    The line direction in array terms is u = (-sin a, cos a) (so ``atan2(-uy, ux) = a``);
    the normal is n = (cos a, sin a); both are measured from the slice centre
    (``pixels.centre``). Returns t, s (float64), u and n.
    """
    a = math.radians(angle_deg)
    u = np.array([-math.sin(a), math.cos(a)])
    n = np.array([math.cos(a), math.sin(a)])
    return pixels.yy * n[0] + pixels.xx * n[1], pixels.yy * u[0] + pixels.xx * u[1], u, n


@functools.lru_cache(maxsize=4)
def centred_grid(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Row and column offsets (float32) of every pixel from the centre of ``shape`` (read-only, cached)."""
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]].astype(np.float32)
    yy -= np.float32((shape[0] - 1) / 2.0)
    xx -= np.float32((shape[1] - 1) / 2.0)
    yy.flags.writeable = False
    xx.flags.writeable = False
    return yy, xx


def lines_at_angle(values: np.ndarray, pixels: WeightedPixels, angle_deg: float, cfg: dict[str, Any]) -> list:
    """Streak lines of one direction: outlying line means of the directional component.

    ``values`` holds the component (float64) at the weighted ``pixels``. Line sums
    across offsets are a discrete Radon transform at ``angle_deg``; offsets whose
    robust z-score exceeds ``segment_z`` (local maxima across offsets) are lines, each
    cut to its :func:`line_extent`.

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 3 (line integrals at one angle: a projection).
    """
    t, s, u, n = line_frame(pixels, angle_deg)
    cy, cx = pixels.centre
    off = np.rint(t).astype(np.int64)
    base = off.min()
    idx = off - base
    count = np.bincount(idx)
    means = np.bincount(idx, weights=values) / np.maximum(count, 1)
    enough = count >= int(cfg["segment_min_px"])
    if enough.sum() < 8:
        return []
    centre = float(np.median(means[enough]))
    spread = 1.4826 * float(np.median(np.abs(means[enough] - centre)))
    if not spread > 0:
        return []
    z = np.where(enough, (means - centre) / spread, 0.0)
    out = []
    for i in np.argsort(-np.abs(z)):
        if abs(z[i]) < float(cfg["segment_z"]) or len(out) >= int(cfg["max_segments_per_slice"]):
            break
        if abs(z[i]) < np.abs(z[max(0, i - 2) : i + 3]).max():
            continue  # not the local maximum across offsets
        extent = line_extent(values, t, s, float(i + base), float(means[i] - centre), cfg)
        if extent is None:
            continue
        s0, s1 = extent
        offset = float(i + base)
        start = (cy + offset * n[0] + s0 * u[0], cx + offset * n[1] + s0 * u[1])
        end = (cy + offset * n[0] + s1 * u[0], cx + offset * n[1] + s1 * u[1])
        out.append((angle_deg, start, end, float(abs(z[i]))))
    return out


def line_extent(values: np.ndarray, t: np.ndarray, s: np.ndarray, offset: float, amplitude: float,
                cfg: dict[str, Any]) -> tuple[float, float] | None:
    """Longest run along a line where the running mean keeps the line's sign and level.

    ``values``, ``t`` and ``s`` are the component, the offset across and the position
    along the lines at the weighted pixels; the line holds those within half a pixel of
    ``offset``. The run's ends are positions along the line (pixels); the first of
    equally long runs is taken.
    """
    on_line = np.abs(t - offset) <= 0.5
    pos = np.rint(s[on_line]).astype(np.int64)
    if pos.size < int(cfg["segment_min_px"]):
        return None
    base = pos.min()
    sums = np.bincount(pos - base, weights=values[on_line])
    counts = np.bincount(pos - base)
    run = max(5, int(cfg["segment_min_px"]) // 2)
    local_count = ndimage.uniform_filter1d(counts.astype(float), run, mode="constant")
    mean = ndimage.uniform_filter1d(sums, run, mode="constant") / np.maximum(local_count, 1e-9)
    keep = (np.sign(amplitude) * mean >= float(cfg["segment_keep"]) * abs(amplitude)) & (local_count > 0.2)
    first, last = longest_run(keep)
    if last - first + 1 < int(cfg["segment_min_px"]):
        return None
    return float(first + base), float(last + base)


def longest_run(keep: np.ndarray) -> tuple[int, int]:
    """First and last index of the first longest run of True in ``keep`` ((0, -1) if none)."""
    edges = np.diff(np.concatenate(([0], keep.view(np.int8), [0])))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    if starts.size == 0:
        return 0, -1
    k = int(np.argmax(stops - starts))
    return int(starts[k]), int(stops[k]) - 1


# --------------------------------------------------------------------------- volume
def screen_factor(shape: tuple[int, int], max_px: int) -> int:
    """Binning factor so that the larger side is at most ``max_px``."""
    return max(1, int(math.ceil(max(shape) / float(max_px))))


def base_allowed_mask(regions: Regions | None, factor: int, shape_b: tuple[int, int], cfg: dict[str, Any]) -> np.ndarray:
    """Pixels that may count on every binned slice: inside the FOV, away from the border."""
    allowed = np.ones(shape_b, dtype=bool)
    m = int(cfg["border_margin_px"])
    if m > 0:
        allowed[:m] = allowed[-m:] = False
        allowed[:, :m] = allowed[:, -m:] = False
    if regions is not None:
        allowed &= ~bin_mask(~regions.fov, factor)
    return allowed


def allowed_mask(regions: Regions | None, z: int, factor: int, shape_b: tuple[int, int], cfg: dict[str, Any],
                 base: np.ndarray | None = None) -> np.ndarray:
    """Pixels that may count on binned slice ``z``: FOV minus border, table, body outline.

    ``base`` is :func:`base_allowed_mask` when the caller has it already (once per volume).
    """
    allowed = (base_allowed_mask(regions, factor, shape_b, cfg) if base is None else base).copy()
    if regions is None:
        return allowed
    if regions.table[z].any():
        allowed &= ~table_exclusion(bin_mask(regions.table[z], factor), int(cfg["table_band_px"]))
    body = bin_mask(regions.body[z], factor)
    if body.any():
        allowed &= ~inner_boundary(body)
    return allowed


def table_exclusion(table: np.ndarray, band_px: int) -> np.ndarray:
    """Binned pixels left out for the table: the table grown by 2 px and its :func:`table_band`."""
    return grow(table, 2) | table_band(table, band_px)


class AllowedMasks:
    """:func:`allowed_mask` of every slice, the table's part computed once per distinct table.

    The couch is usually the same on every slice, so its exclusion (a dilation and a
    band) is kept per distinct binned table mask; the body outline is taken per slice.
    """

    def __init__(self, regions: Regions | None, factor: int, shape_b: tuple[int, int], cfg: dict[str, Any]) -> None:
        self.regions, self.factor, self.cfg = regions, factor, cfg
        self.base = base_allowed_mask(regions, factor, shape_b, cfg)
        self._tables: dict[bytes, np.ndarray] = {}
        self._kept: dict[bytes, np.ndarray] = {}  # base mask minus the table's exclusion, per table

    def __call__(self, z: int) -> np.ndarray:
        regions = self.regions
        if _fov_only(regions, z):
            return self.base
        allowed = self.base.copy()
        if regions.table[z].any():
            table = bin_mask(regions.table[z], self.factor)
            key = np.packbits(table).tobytes()
            excluded = self._tables.get(key)
            if excluded is None:
                excluded = self._tables.setdefault(key, table_exclusion(table, int(self.cfg["table_band_px"])))
            allowed &= ~excluded
        body = bin_mask(regions.body[z], self.factor)
        if body.any():
            allowed &= ~inner_boundary(body)
        return allowed

    def stack(self, z0: int, z1: int, ws: "Workspace | None" = None) -> np.ndarray:
        """The masks of slices ``z0`` to ``z1 - 1`` as one ``(k, ny_b, nx_b)`` array (the same masks).

        With a :class:`Workspace` ``ws`` the masks are one of its buffers (valid until
        its next stack).
        """
        k = z1 - z0
        allowed = scratch(ws, "masks_allowed", (k,) + self.base.shape, bool)
        regions = self.regions
        if regions is None:
            allowed[...] = self.base
            return allowed
        # the binned masks and the eroded body lend the buffers of the slab means and the
        # residual: those are not in use while a stack's masks are formed
        binned = bin_mask(regions.table[z0:z1], self.factor, ws, "tex_residual")  # one pass for the stack
        kept = [self._kept_beside_table(binned[i]) for i in range(k)]
        outline = inner_boundary(bin_mask(regions.body[z0:z1], self.factor, ws, "tex_residual"), ws, "slab_means")
        for i in range(k):
            np.greater(kept[i], outline[i], out=allowed[i])  # kept and not on the outline
        return allowed

    def slab_stack(self, z0: int, z1: int, slab: int, ws: "Workspace | None" = None) -> np.ndarray:
        """One mask per slab of ``slab`` slices from ``z0`` to ``z1 - 1`` (the first screen's masks).

        Each is :meth:`slab_mask` of its slices: ``(n_slabs, ny_b, nx_b)``, one of ``ws``'s
        buffers when it is given. The whole slabs of masks readable as 64-bit words are
        combined together (:meth:`_word_slab_masks`: one array operation per step for all
        of them, few and large operations, which two threads share well), a last partial
        slab alone.
        """
        n = -(-(z1 - z0) // slab)
        out = scratch(ws, "masks_slab", (n,) + self.base.shape, bool)
        whole = (z1 - z0) // slab if slab > 1 and self._words_readable(z0, z1) else 0
        if whole:
            self._word_slab_masks(z0, whole, slab, out[:whole], ws)
        for j in range(whole, n):
            out[j] = self.slab_mask(z0 + j * slab, min(z0 + (j + 1) * slab, z1), ws)
        return out

    def slab_mask(self, z0: int, z1: int, ws: "Workspace | None" = None) -> np.ndarray:
        """Pixels that may count on every slice ``z0`` to ``z1 - 1``, from the slab's OR and AND masks.

        The table's exclusion is that of each slice exactly (one table when all slices
        carry the same, else slice by slice). The union of the slices' body outlines is
        replaced by a superset read from two masks instead of one per slice: the outline
        of the binned AND of the slices' bodies together with the binned OR outside that
        AND (a slice's outline pixel is on the AND's outline or outside the AND); the
        two are the same where the body does not change along the slab. Slices whose
        masks cannot be read as 64-bit words are combined one by one (exact). ``ws`` lends
        the temporaries (the result is a new array or a kept one: never modify it).
        """
        if self.regions is None:
            return self.base
        if z1 - z0 == 1 or not self._words_readable(z0, z1):
            out = self(z0).copy()
            for z in range(z0 + 1, z1):
                out &= self(z)
            return out
        out = np.empty((1,) + self.base.shape, dtype=bool)
        return self._word_slab_masks(z0, 1, z1 - z0, out, ws)[0]

    def _words_readable(self, z0: int, z1: int) -> bool:
        """Whether the body and table masks of slices ``z0`` to ``z1 - 1`` can be read as 64-bit words."""
        regions = self.regions
        if regions is None:
            return False
        body, table = regions.body[z0:z1], regions.table[z0:z1]
        ny, nx = body.shape[-2:]
        return (ny * nx) % 8 == 0 and body.flags.c_contiguous and table.flags.c_contiguous

    def _word_slab_masks(self, z0: int, n: int, slab: int, out: np.ndarray, ws: "Workspace | None" = None) -> np.ndarray:
        """:meth:`slab_mask` of the ``n`` slabs of ``slab`` slices from ``z0`` into ``out`` (``(n, ny_b, nx_b)``).

        The bytewise OR and AND of each slab's table and body masks, their binned masks and
        the outlines are formed for all ``n`` slabs at once; the table's exclusion is then
        looked up per slab (per slice where the slab's slices carry different tables).
        """
        regions, f = self.regions, self.factor
        z1 = z0 + n * slab
        table = regions.table[z0:z1]
        ny, nx = table.shape[-2:]
        t_or, t_and = _or_and_slabs(table, n, ws, "slab_")
        t_mixed = np.not_equal(t_or, t_and).any(axis=1)
        tables = bin_mask(t_or.view(bool).reshape(n, ny, nx), f, ws, "slab_bin_table")
        b_or, b_and = _or_and_slabs(regions.body[z0:z1], n, ws, "slab_")  # the table's words are done with
        b_mixed = np.not_equal(b_or, b_and).any(axis=1)
        every = bin_mask(b_and.view(bool).reshape(n, ny, nx), f, ws, "slab_bin")
        outline = inner_boundary(every, ws, "slab_outline")
        for j in range(n):
            if t_mixed[j]:
                first = z0 + j * slab
                kept = self._kept_beside_table(bin_mask(regions.table[first], f)).copy()
                for z in range(first + 1, first + slab):
                    kept &= self._kept_beside_table(bin_mask(regions.table[z], f, ws, "slab_bin_one"))
            else:
                kept = self._kept_beside_table(tables[j])
            if b_mixed[j]:
                some = bin_mask(b_or[j].view(bool).reshape(ny, nx), f, ws, "slab_bin_or")
                outline[j] |= some > every[j]
            np.greater(kept, outline[j], out=out[j])
        return out

    def _kept_beside_table(self, table: np.ndarray) -> np.ndarray:
        """The base mask without the exclusion of the binned ``table`` (kept per distinct table;
        an empty table excludes nothing)."""
        key = np.packbits(table).tobytes()
        kept = self._kept.get(key)
        if kept is None:
            if table.any():
                kept = self.base & ~table_exclusion(table, int(self.cfg["table_band_px"]))
            else:
                kept = self.base
            kept = self._kept.setdefault(key, kept)
        return kept


def _or_and_slabs(masks: np.ndarray, n: int, ws: "Workspace | None" = None, tag: str = "") -> tuple[np.ndarray, np.ndarray]:
    """Bytewise OR and AND over each of ``n`` equal groups of consecutive slices of a
    C-contiguous boolean stack, as ``(n, words)`` arrays of 64-bit words (``ws`` lends the
    two results, names from ``tag``)."""
    words = masks.reshape(n, masks.shape[0] // n, -1).view(np.uint64)
    shape = (n, words.shape[2])
    second = 1 % words.shape[1]  # a group of one slice is its own OR and AND
    some = np.bitwise_or(words[:, 0], words[:, second], out=scratch(ws, tag + "or", shape, np.uint64))
    every = np.bitwise_and(words[:, 0], words[:, second], out=scratch(ws, tag + "and", shape, np.uint64))
    for i in range(2, words.shape[1]):
        some |= words[:, i]
        every &= words[:, i]
    return some, every


def table_band(table: np.ndarray, margin_px: int) -> np.ndarray:
    """The rows of a flat table, widened by ``margin_px``, across the whole slice.

    The long straight edges of a table are real edges, and filtered back-projection
    continues them past the table's ends as faint lines along the edge (the views
    tangent to a straight edge carry its whole contrast). Both would read as streak
    energy along the table, so the band of rows the table spans is left out when the
    table is at least three times wider than it is tall; otherwise nothing is added.

    References
    ----------
    .. [1] Kak & Slaney (1988), ch. 3 and 5 (projections tangent to an edge; aliasing).
    """
    rows = np.flatnonzero(table.any(axis=1))
    cols = np.flatnonzero(table.any(axis=0))
    band = np.zeros(table.shape, dtype=bool)
    if rows.size == 0 or cols.size < 3 * rows.size:
        return band
    band[max(int(rows[0]) - margin_px, 0) : int(rows[-1]) + margin_px + 1] = True
    return band


def _fov_only(regions: Regions | None, z: int) -> bool:
    return regions is None or (not regions.table[z].any() and not regions.body[z].any())


def severity_of(cfg: dict[str, Any]) -> Severity:
    return _SEVERITIES[str(cfg["severity"]).lower()]


def describe_slices(indices: list[int]) -> str:
    """Compact list of slice numbers: '3-7, 12'."""
    parts, i = [], 0
    while i < len(indices):
        j = i
        while j + 1 < len(indices) and indices[j + 1] == indices[j] + 1:
            j += 1
        parts.append(str(indices[i]) if i == j else f"{indices[i]}-{indices[j]}")
        i = j + 1
    return ", ".join(parts)


def check_volume(volume: Volume, cfg: dict[str, Any]) -> str | None:
    """A reason why the analysis cannot run on ``volume``, or None."""
    nz, ny, nx = volume.shape
    if nz == 0 or min(ny, nx) < int(cfg["min_slice_px"]):
        return f"slices of {ny} x {nx} pixels are too small; at least {cfg['min_slice_px']} x {cfg['min_slice_px']} needed"
    return None


def analyse(volume: Volume, regions: Regions | None, settings: dict[str, Any] | None = None) -> AnalysisResult:
    """Streak index, directions, missing wedge and streak locations of ``volume``.

    Parameters
    ----------
    volume : Volume
        CT volume in HU, [z, y, x]; one slice is enough (viewer's current-slice mode).
    regions : Regions or None
        Shared regions; the FOV, table and body outline are excluded from the measure.
    settings : dict, optional
        Overrides of :data:`DEFAULTS` (unknown keys raise ``ProfileError``).

    Returns
    -------
    AnalysisResult
        ``record``: index, flagged, tolerance, dominant_angles_deg, slice_index,
        flagged_slices, missing_wedge_deg, dense_pair_lines, angular_profile; overlays: segments and
        ``maps["streak_strength"]``. See the module docstring for the definitions.

    References
    ----------
    .. [1] Kak & Slaney, Principles of Computerized Tomographic Imaging, 1988.
    """
    cfg = resolve_settings(settings)
    reason = check_volume(volume, cfg)
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    screened = screen_volume(volume, regions, cfg)
    if not screened.valid_slices:
        return AnalysisResult.not_applicable(NAME, screened.empty_reason())
    return summarise(volume, regions, screened, cfg)


@dataclass
class Screen:
    """Per-slice outcome of the screen."""

    factor: int
    shape_b: tuple[int, int]
    profiles: dict[int, np.ndarray]
    indices: list[float | None]
    skipped: dict[str, int]

    @property
    def valid_slices(self) -> list[int]:
        return sorted(self.profiles)

    def empty_reason(self) -> str:
        what = ", ".join(f"{n} {k}" for k, n in self.skipped.items() if n)
        return f"no slice has texture to analyse ({what})"


#: threads of the per-slice screen (the numpy/scipy filters release the GIL)
SCREEN_THREADS = max(1, min(2, os.cpu_count() or 1))


def slab_size(slice_mm: float, cfg: dict[str, Any]) -> int:
    """Slices per screen slab: ``round(screen_slab_mm / slice spacing)``, at least 1.

    A spacing that is not a positive finite number (a one-slice volume may carry any)
    gives 1: the slices are screened one by one.
    """
    spacing = float(slice_mm)
    if not (math.isfinite(spacing) and spacing > 0.0):
        return 1
    return max(1, int(round(float(cfg["screen_slab_mm"]) / spacing)))


def first_screen_size(slice_mm: float, slab: int, cfg: dict[str, Any]) -> int:
    """Slices per slab of the first screen: a whole number of screen slabs of ``slab`` slices.

    ``slab * max(1, round(first_screen_slab_mm / (slab * spacing)))`` when the slices are
    screened in slabs already (``slab`` 2 or more); otherwise ``slab`` (no first screen:
    thick slices keep their one-by-one screen). A spacing that is not a positive finite
    number gives ``slab``.
    """
    spacing = float(slice_mm)
    first_mm = float(cfg["first_screen_slab_mm"])
    if slab < 2 or first_mm <= 0.0 or not (math.isfinite(spacing) and spacing > 0.0):
        return slab
    return slab * max(1, int(round(first_mm / (slab * spacing))))


def first_screen_gate(tolerance: float, slab: int, first: int) -> float:
    """Refine threshold of the first screen: ``1 + (tolerance - 1) * slab / first``.

    A streak on the slices of one screen slab keeps ``slab / first`` of its whitened
    excess in a first-screen slab of ``first`` slices (its power falls as the square of
    the share of slices that carry it, the independent noise's power only in
    proportion), so a first-screen slab below this gate holds no screen slab above the
    tolerance that owes its excess to its own slices (see the module docstring).
    """
    return 1.0 + (float(tolerance) - 1.0) * slab / float(first)


def screen_slabs(volume: Volume, masks: "AllowedMasks", factor: int, bins: SpectralBins, cfg: dict[str, Any],
                 slab: int, ranges: list[tuple[int, int]], slab_masks: bool = False) -> dict[int, np.ndarray | str]:
    """Outcome (profile or skip reason) of every slice of ``ranges`` screened in slabs of ``slab``.

    Each range ``(z0, z1)`` starts at a multiple of ``slab``, so its slabs are those of
    the whole volume (slab ``j`` holds slices ``j * slab`` to ``(j + 1) * slab - 1``).
    Tasks of at most :data:`SCREEN_STACK` slabs (:func:`screen_tasks`) go to
    :data:`SCREEN_THREADS` threads; each slab's outcome depends on that slab only. ``slab_masks`` takes each slab's mask
    from :meth:`AllowedMasks.slab_stack` (the first screen) instead of intersecting
    the masks of its usable slices.
    """
    tasks = screen_tasks(ranges, slab, SCREEN_STACK, SCREEN_THREADS)
    per_slab = slab_masks and slab > 1

    def one(i: int) -> list[np.ndarray | str]:
        z0, z1 = tasks[i]
        with pooled_workspace() as ws:
            allowed = masks.slab_stack(z0, z1, slab, ws) if per_slab else masks.stack(z0, z1, ws)
            if slab == 1:
                return screen_stack(volume.hu[z0:z1], allowed, factor, bins, cfg, ws)
            return screen_slab_stack(volume.hu[z0:z1], allowed, factor, bins, cfg, slab, ws, per_slab)

    out: dict[int, np.ndarray | str] = {}
    for (z0, z1), found in zip(tasks, map_slices(one, len(tasks), SCREEN_THREADS)):
        out.update(zip(range(z0, z1), found))
    return out


def screen_tasks(ranges: list[tuple[int, int]], slab: int, stack: int, threads: int) -> list[tuple[int, int]]:
    """Slice ranges of the screen's tasks: whole slabs of ``slab`` slices, at most ``stack`` per task.

    Each range ``(z0, z1)`` (starting at a multiple of ``slab``) is split into the fewest
    tasks of at most ``stack`` slabs, their number rounded up to a multiple of
    ``threads`` and the slabs shared out evenly, so that the threads get about equal
    work (100 slabs, at most 8 a task, on 2 threads: 14 tasks of 7 or 8 slabs rather
    than 12 of 8 and one of 4).
    """
    out = []
    for z0, z1 in ranges:
        n = -(-(z1 - z0) // slab)
        if n <= 0:
            continue
        count = -(-n // max(1, stack))
        if threads > 1 and count > 1:
            count = min(n, -(-count // threads) * threads)
        for j in range(count):
            out.append((z0 + j * n // count * slab, min(z0 + (j + 1) * n // count * slab, z1)))
    return out


def screen_volume(volume: Volume, regions: Regions | None, cfg: dict[str, Any]) -> Screen:
    """Angular profile and streak index of every axial slice (binned screen, slabs of thin slices).

    Slices are screened in slabs of :func:`slab_size` adjacent slices (the mean of the
    slab's usable slices, see the module docstring); a slab's profile and index are
    those of each of its slices. Where slabs hold two or more slices, a first screen on
    slabs of :func:`first_screen_size` slices comes before: only its slabs above
    :func:`first_screen_gate` (and those not complete) are screened in slabs
    (:func:`refine_first_screen`). Slabs are independent; they are screened by
    :data:`SCREEN_THREADS` threads and the outcomes gathered in slice order, so the
    result does not depend on the thread count.
    """
    nz, ny, nx = volume.shape
    factor = screen_factor((ny, nx), int(cfg["screen_max_px"]))
    shape_b = (ny // factor, nx // factor)
    bins = spectral_bins(shape_b, tuple(float(v) for v in cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = AllowedMasks(regions, factor, shape_b, cfg)
    slab = min(slab_size(volume.spacing_mm[0], cfg), nz)
    first = first_screen_size(volume.spacing_mm[0], slab, cfg)
    weight = float(cfg["neighbour_weight"])
    if first > slab and nz > first:
        outcomes, indices, neighbours = refine_first_screen(volume, masks, factor, bins, cfg, slab, first)
    else:
        outcomes = screen_slabs(volume, masks, factor, bins, cfg, slab, [(0, nz)])
        neighbours = {z: o for z, o in outcomes.items() if not isinstance(o, str)}
        indices = slab_indices(neighbours, nz, slab, weight)
    profiles: dict[int, np.ndarray] = {}
    skipped = {"constant": 0, "non-finite": 0, "without usable pixels": 0}
    for z in range(nz):
        outcome = outcomes[z]
        if isinstance(outcome, str):
            skipped[outcome] += 1
        else:
            profiles[z] = outcome
    if slab > 1:
        refine_flagged_slabs(volume, masks, factor, bins, cfg, profiles, indices, neighbours)
    return Screen(factor=factor, shape_b=shape_b, profiles=profiles, indices=indices, skipped=skipped)


def refine_first_screen(volume: Volume, masks: "AllowedMasks", factor: int, bins: SpectralBins, cfg: dict[str, Any],
                        slab: int, first: int) -> tuple[dict[int, np.ndarray | str], list[float | None],
                                                        dict[int, np.ndarray]]:
    """The first screen on slabs of ``first`` slices, refined to slabs of ``slab`` where needed.

    A first-screen slab is refined when its index exceeds :func:`first_screen_gate`, when
    it has fewer than ``first`` screened slices (the volume's end, a slice without
    usable pixels) or when it is not complete. Its slices are screened in slabs of
    ``slab``, together with the one screen slab on either side of it, so that their
    neighbour-mixed indices (:func:`slab_indices`) are those of screening every slab;
    the other slices keep the first screen's outcome and index (below the gate, hence
    below ``tolerance_index``). Returns the outcome and index of every slice, and the
    profiles the per-slice refinement takes as neighbours (the screen slabs' where
    they were screened).
    """
    nz = volume.shape[0]
    weight = float(cfg["neighbour_weight"])
    coarse = screen_slabs(volume, masks, factor, bins, cfg, first, [(0, nz)], slab_masks=True)
    coarse_profiles = {z: o for z, o in coarse.items() if not isinstance(o, str)}
    coarse_indices = slab_indices(coarse_profiles, nz, first, weight)
    gate = first_screen_gate(float(cfg["tolerance_index"]), slab, first)
    chosen = []
    for z0 in range(0, nz, first):
        zs = range(z0, min(z0 + first, nz))
        if len(zs) < first or any(z not in coarse_profiles for z in zs) or coarse_indices[z0] > gate:
            chosen.append((z0, zs[-1] + 1))
    outcomes: dict[int, np.ndarray | str] = dict(coarse)
    indices = list(coarse_indices)
    neighbours = dict(coarse_profiles)
    if not chosen:
        return outcomes, indices, neighbours
    ranges = merge_ranges([(max(0, z0 - slab), min(nz, z1 + slab)) for z0, z1 in chosen])
    fine = screen_slabs(volume, masks, factor, bins, cfg, slab, ranges)
    for z, outcome in fine.items():
        if isinstance(outcome, str):
            neighbours.pop(z, None)
        else:
            neighbours[z] = outcome
    refined = [z for z0, z1 in chosen for z in range(z0, z1)]
    for z in refined:
        outcomes[z] = fine[z]
    fine_indices = slab_indices(neighbours, nz, slab, weight, only=refined)
    for z in refined:
        indices[z] = fine_indices[z]
    return outcomes, indices, neighbours


def merge_ranges(ranges: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted half-open ranges with overlapping or touching ones joined."""
    out: list[tuple[int, int]] = []
    for z0, z1 in sorted(ranges):
        if out and z0 <= out[-1][1]:
            out[-1] = (out[-1][0], max(out[-1][1], z1))
        else:
            out.append((z0, z1))
    return out


def slab_indices(profiles: dict[int, np.ndarray], nz: int, slab: int, neighbour_weight: float,
                 only: list[int] | None = None) -> list[float | None]:
    """Streak index of every slice: its slab's index mixed with the neighbouring slabs.

    Slab ``j`` holds slices ``j * slab`` to ``(j + 1) * slab - 1``; its profile is the
    one shared by its screened slices (:func:`slice_index_with_neighbours` works between
    slabs). With ``slab`` 1 this is the per-slice rule. Unscreened slices get None, and
    so do slices outside ``only`` when it is given.
    """
    by_slab: dict[int, np.ndarray] = {}
    for z in sorted(profiles):
        by_slab.setdefault(z // slab, profiles[z])
    wanted = by_slab if only is None else {z // slab for z in only if z // slab in by_slab}
    index = {j: round(slice_index_with_neighbours(by_slab, j, neighbour_weight), 3) for j in wanted}
    keep = set(range(nz)) if only is None else set(only)
    return [index[z // slab] if z in profiles and z in keep else None for z in range(nz)]


def refine_flagged_slabs(volume: Volume, masks: "AllowedMasks", factor: int, bins: SpectralBins,
                         cfg: dict[str, Any], profiles: dict[int, np.ndarray], indices: list[float | None],
                         neighbours: dict[int, np.ndarray] | None = None) -> None:
    """Screen the slices of flagged slabs one by one; each keeps the smaller index (in place).

    A slab above ``tolerance_index`` may owe its excess to some of its slices only, so
    each of its screened slices is screened alone (:func:`screen_stack`) and its index
    becomes the smaller of the slab's and its own (the per-slice rule of
    :func:`slice_index_with_neighbours`, neighbours taken from the refined slices or,
    outside them, from their slabs' profiles); its own profile replaces the slab's. A
    slice is therefore flagged only when its slab and the slice itself exceed the
    tolerance. Slabs below the tolerance are left as they are. ``neighbours`` (default
    ``profiles``) holds the slab profiles taken for unrefined neighbouring slices.
    """
    tol = float(cfg["tolerance_index"])
    chosen = [z for z in sorted(profiles) if indices[z] is not None and indices[z] > tol]
    if not chosen:
        return
    runs = [chosen[i : i + SCREEN_STACK] for i in range(0, len(chosen), SCREEN_STACK)]

    def one(i: int) -> list[np.ndarray | str]:
        zs = runs[i]
        allowed = np.stack([masks(z) for z in zs])
        with pooled_workspace() as ws:
            return screen_stack(volume.hu[zs], allowed, factor, bins, cfg, ws)

    own: dict[int, np.ndarray] = dict(profiles if neighbours is None else neighbours)
    for zs, outcomes in zip(runs, map_slices(one, len(runs), SCREEN_THREADS)):
        for z, outcome in zip(zs, outcomes):
            if not isinstance(outcome, str):
                own[z] = outcome
    weight = float(cfg["neighbour_weight"])
    for z in chosen:
        indices[z] = round(min(indices[z], slice_index_with_neighbours(own, z, weight)), 3)
    for z in chosen:
        profiles[z] = own[z]


def screen_slice(image: np.ndarray, allowed: np.ndarray, factor: int, bins: SpectralBins, cfg: dict[str, Any],
                 ws: Workspace | None = None) -> np.ndarray | str:
    """Angular profile of one full-resolution slice, or why it was skipped (a ``Screen.skipped`` key).

    ``ws`` lends the temporaries (the calling thread's :func:`thread_workspace` if None).
    """
    return screen_stack(image[None], allowed[None], factor, bins, cfg, ws or thread_workspace())[0]


def screen_stack(images: np.ndarray, allowed: np.ndarray, factor: int, bins: SpectralBins, cfg: dict[str, Any],
                 ws: Workspace | None = None) -> list[np.ndarray | str]:
    """:func:`screen_slice` of every full-resolution slice of a ``(k, ny, nx)`` stack.

    ``allowed`` is the ``(k, ny_b, nx_b)`` stack of binned masks. The slices are binned,
    textured, transformed and binned in frequency together; each outcome depends on its
    own slice only.
    """
    k = images.shape[0]
    if factor == 1:
        binned = images
    else:
        binned = scratch(ws, "slab_means", (k,) + tuple(n // factor for n in images.shape[-2:]))
        for i in range(k):
            bin_slice(images[i], factor, binned[i], ws)
    high, low = binned.reshape(k, -1).max(axis=1), binned.reshape(k, -1).min(axis=1)
    finite = np.isfinite(high) & np.isfinite(low)
    outcomes: list[np.ndarray | str] = ["without usable pixels"] * k
    keep = []
    for i in range(k):
        kind = None if finite[i] and high[i] != low[i] else _unusable(binned[i], images[i])
        if kind:
            outcomes[i] = kind
        else:
            keep.append(i)
    if not keep:
        return outcomes
    if len(keep) < k:
        binned, allowed, finite = binned[keep], allowed[keep], finite[keep]
    textures, usable = screen_textures(binned, allowed, cfg, finite, ws)
    for j, profile in profiles_of_textures(textures, usable, bins, ws):
        outcomes[keep[j]] = profile
    return outcomes


def profiles_of_textures(textures: np.ndarray, usable: Any, bins: SpectralBins,
                         ws: Workspace | None = None) -> list[tuple[int, np.ndarray]]:
    """(index, angular profile) of every usable texture of a stack that has one: the FFTs
    of the usable textures (one call for all of them), their cells summed into their
    profiles."""
    good = [j for j in range(len(textures)) if usable[j]]
    if not good:
        return []
    batch = textures if len(good) == len(textures) else textures[good]
    cells = cell_powers(sfft.rfft2(batch, overwrite_x=True), bins, ws)
    found = zip(good, profiles_of_cells(cells, bins))
    return [(j, profile) for j, profile in found if profile is not None]


def screen_slab_stack(images: np.ndarray, allowed: np.ndarray, factor: int, bins: SpectralBins,
                      cfg: dict[str, Any], slab: int, ws: Workspace | None = None,
                      per_slab: bool = False) -> list[np.ndarray | str]:
    """Outcome of every slice of a ``(k, ny, nx)`` stack screened in slabs of ``slab`` slices.

    Each slice is checked as in :func:`screen_stack` (a finite, non-constant sub-grid of
    every :data:`CHECK_STEP_PX`-th pixel proves it usable; otherwise its block means
    and pixels decide); a slab's image is the block mean over its usable slices, binned
    in one pass (:func:`bin_slab`), and its mask the intersection of their masks (every
    slice's table and body outline stay left out). The slab's profile is the outcome of
    each of its usable slices; unusable slices keep their reason. ``ws`` lends the
    stack's temporaries. With ``per_slab`` ``allowed`` holds one mask per slab of the
    stack (:meth:`AllowedMasks.slab_stack`) instead of one per slice.
    """
    k = images.shape[0]
    outcomes: list[np.ndarray | str] = ["without usable pixels"] * k
    members: list[list[int]] = []
    kinds = unusable_slices(images, factor)
    for z0 in range(0, k, slab):
        keep = []
        for i in range(z0, min(z0 + slab, k)):
            kind = kinds[i]
            if kind:
                outcomes[i] = kind
            else:
                keep.append(i)
        if keep:
            members.append(keep)
    if not members:
        return outcomes
    n = len(members)
    means = scratch(ws, "slab_means", (n,) + tuple(s // factor for s in images.shape[-2:]))
    # with one mask per slab and every slab screened, the masks are those given, in order
    as_given = per_slab and n == len(allowed) and all(m[0] // slab == j for j, m in enumerate(members))
    masks = allowed if as_given else scratch(ws, "slab_masks", (n,) + allowed.shape[-2:], bool)
    for j, m in enumerate(members):
        bin_slab(images, m, factor, out=means[j], ws=ws)
        if as_given:
            continue
        if per_slab:
            np.copyto(masks[j], allowed[m[0] // slab])
            continue
        np.copyto(masks[j], allowed[m[0]])
        for i in m[1:]:
            masks[j] &= allowed[i]
    # a sum of finite float32 HU is finite: one pass proves each slab mean free of NaN and
    # infinity (a non-finite sum only sends the slab down the careful path)
    all_finite = np.isfinite(means.reshape(n, -1).sum(axis=1))
    textures, usable = screen_textures(means, masks, cfg, all_finite, ws)
    for j, profile in profiles_of_textures(textures, usable, bins, ws):
        for i in members[j]:
            outcomes[i] = profile
    return outcomes


#: pixel step of the sub-grid that proves a slice finite somewhere and non-constant
CHECK_STEP_PX = 16


def unusable_slice(image: np.ndarray, factor: int) -> str | None:
    """"non-finite" or "constant" if the full-resolution slice ``image`` is so, else None.

    A sub-grid of every :data:`CHECK_STEP_PX`-th pixel that is finite and not constant
    proves the slice usable (a sixteenth of its rows is read); otherwise
    :func:`_unusable` decides from the block means and the pixels.
    """
    return unusable_slices(image[None], factor)[0]


def unusable_slices(images: np.ndarray, factor: int) -> list[str | None]:
    """:func:`unusable_slice` of every slice of a ``(k, ny, nx)`` stack (the sub-grids' maxima
    and minima of all slices in one reduction each)."""
    sub = images[:, ::CHECK_STEP_PX, ::CHECK_STEP_PX]
    high, low = sub.max(axis=(1, 2)), sub.min(axis=(1, 2))
    proven = np.isfinite(high) & np.isfinite(low) & (high != low)
    return [None if proven[i] else _unusable(bin_slice(images[i], factor), images[i]) for i in range(len(images))]


def bin_slab(images: np.ndarray, members: list[int], factor: int, out: np.ndarray | None = None,
             ws: Workspace | None = None) -> np.ndarray:
    """Mean over ``factor`` x ``factor`` blocks and over the slices ``members`` of ``images``.

    One pass over the members: their pixels are summed into full-resolution float32
    rows (contiguous adds, the fastest way through the volume, :data:`SLAB_SUM_ROWS`
    rows at a time), which are then binned (:func:`bin_slice`); the same mean as :func:`bin_slice` of each slice
    followed by :func:`slab_mean`, up to float32 rounding. ``out`` receives the mean
    (a new array otherwise); ``ws`` lends the full-resolution sum.
    """
    if factor == 1:
        mean = slab_mean(images, members)
        if out is None:
            return mean
        out[...] = mean
        return out
    if len(members) == 1:
        return bin_slice(images[members[0]], factor, out, ws)
    ny, nx = images.shape[-2:]
    if out is None:
        out = np.empty((ny // factor, nx // factor), dtype=np.float32)
    step = max(1, SLAB_SUM_ROWS // factor) * factor  # rows summed at a time (they stay in cache)
    for r0 in range(0, ny // factor * factor, step):
        r1 = min(r0 + step, ny // factor * factor)
        total = np.add(images[members[0], r0:r1], images[members[1], r0:r1], dtype=np.float32,
                       out=scratch(ws, "slab_total", (r1 - r0, nx)))
        for m in members[2:]:
            total += images[m, r0:r1]
        bin_slice(total, factor, out[r0 // factor : r1 // factor], ws)
    out *= np.float32(1.0 / len(members))
    return out


#: full-resolution rows of a slab summed at a time by :func:`bin_slab`
SLAB_SUM_ROWS = 256


def slab_mean(binned: np.ndarray, members: list[int]) -> np.ndarray:
    """Mean (float32) of the binned slices ``members`` of ``binned``."""
    if len(members) == 1:
        return np.asarray(binned[members[0]], dtype=np.float32)
    out = np.add(binned[members[0]], binned[members[1]], dtype=np.float32)
    for i in members[2:]:
        out += binned[i]
    out *= np.float32(1.0 / len(members))
    return out


def map_slices(fn: Callable[[int], Any], nz: int, threads: int) -> list[Any]:
    """``[fn(z) for z in range(nz)]``, computed by ``threads`` threads when that helps."""
    if threads <= 1 or nz < 2:
        return [fn(z) for z in range(nz)]
    with ThreadPoolExecutor(max_workers=min(threads, nz)) as pool:
        return list(pool.map(fn, range(nz)))


def slice_index_with_neighbours(profiles: dict[int, np.ndarray], z: int, neighbour_weight: float) -> float:
    """The smaller of slice ``z``'s own streak index and that of its neighbour-weighted profile.

    The weighted profile is ``(1 - 2w) A_z + w A_{z-1} + w A_{z+1}`` (a missing
    neighbour is replaced by slice ``z`` itself). Streaks from the acquisition or from
    dense objects persist over neighbouring slices, while the largest of the orientation
    bins of noise varies from slice to slice; taking the smaller index keeps a slice
    flagged only when its excess is there in both. An isolated streak keeps at least
    ``1 - 2w`` of its excess; a one-slice volume is its own neighbour.
    """
    own = profiles[z]
    index = streak_index_of_profile(own)
    if neighbour_weight <= 0 or (z - 1 not in profiles and z + 1 not in profiles):
        return index
    below, above = profiles.get(z - 1, own), profiles.get(z + 1, own)
    mixed = (1.0 - 2.0 * neighbour_weight) * own + neighbour_weight * (below + above)
    return min(index, streak_index_of_profile(mixed))


def _unusable(binned: np.ndarray, image: np.ndarray) -> str | None:
    """"non-finite" or "constant" if the full-resolution ``image`` is so, else None.

    Decided on the block means ``binned`` when they suffice (a finite, non-constant
    block mean implies finite, non-constant pixels); the full slice is read otherwise.
    """
    high, low = float(binned.max()), float(binned.min())
    if math.isfinite(high) and math.isfinite(low) and high != low:
        return None
    finite = np.isfinite(binned)
    if finite.any():
        values = binned[finite] if not finite.all() else binned
        if float(values.max()) != float(values.min()):
            return None
    finite = np.isfinite(image)
    if not finite.any():
        return "non-finite"
    values = image[finite] if not finite.all() else image
    if float(values.max()) == float(values.min()):
        return "constant"
    return None


def summarise(volume: Volume, regions: Regions | None, screen: Screen, cfg: dict[str, Any]) -> AnalysisResult:
    """Record, findings and overlays from the screen (localising flagged slices)."""
    tol = float(cfg["tolerance_index"])
    valid = screen.valid_slices
    flagged_slices = [z for z in valid if screen.indices[z] > tol]
    all_mean = np.mean([screen.profiles[z] for z in valid], axis=0)
    bin_deg = float(cfg["angle_bin_deg"])
    wedge = missing_wedge(all_mean, bin_deg, float(cfg["wedge_level"]), float(cfg["wedge_min_deg"]))
    index = max(screen.indices[z] for z in valid)
    angles: list[float] = []
    overlays = Overlays(maps={"streak_strength": np.zeros(volume.shape, dtype=np.float32)})
    pair_lines: list[dict[str, Any]] = []
    if flagged_slices:
        found = map_slices(lambda i: dense_pair_lines(bin_slice(volume.hu[flagged_slices[i]], screen.factor), cfg),
                           len(flagged_slices), SCREEN_THREADS)
        per_slice = dict(zip(flagged_slices, found))
        pair_lines = pool_pair_lines({z: v for z, v in per_slice.items() if v})
        flagged_mean = np.mean([screen.profiles[z] for z in flagged_slices], axis=0)
        angles = dominant_angles(flagged_mean, wedge, cfg, [p["angle_deg"] for p in pair_lines])
        localise(volume, regions, screen, flagged_slices, wedge, cfg, overlays, per_slice)
    record = {
        "applicable": True,
        "index": round(index, 3),
        "flagged": bool(flagged_slices),
        "tolerance": tol,
        "dominant_angles_deg": angles,
        "slice_index": screen.indices,
        "flagged_slices": flagged_slices,
        "missing_wedge_deg": wedge,
        "dense_pair_lines": pair_lines,
        "angular_profile": {
            "angles_deg": [round(i * bin_deg, 3) for i in range(all_mean.size)],
            "relative_energy": [round(float(v), 4) for v in all_mean],
        },
    }
    findings = build_findings(record, screen, cfg, regions)
    return AnalysisResult(analysis=NAME, record=record, findings=findings, overlays=overlays)


def localise(volume: Volume, regions: Regions | None, screen: Screen, flagged: list[int], wedge: dict[str, float] | None, cfg: dict[str, Any], overlays: Overlays, pair_lines: dict[int, list[tuple[float, float]]] | None = None) -> None:
    """Streak map and segments on the flagged slices (the strongest ones first, capped).

    The slices are localised by :data:`SCREEN_THREADS` threads; overlays are written in
    slice order afterwards, so they do not depend on the thread count. The mask of the
    FOV and border and the angular windows are made once for all slices.
    """
    band, bin_deg = tuple(float(v) for v in cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"])
    bins = spectral_bins(screen.shape_b, band, bin_deg)
    windows = angular_windows(screen.shape_b, band, bin_deg, float(cfg["direction_window_deg"]))
    order = sorted(flagged, key=lambda z: -screen.indices[z])[: int(cfg["max_localised_slices"])]
    f = screen.factor
    chosen = sorted(order)
    base = base_allowed_mask(regions, f, screen.shape_b, cfg)

    def one(i: int) -> SliceStreaks | None:
        z = chosen[i]
        allowed = allowed_mask(regions, z, f, screen.shape_b, cfg, base)
        texture = slice_texture(bin_slice(volume.hu[z], f), allowed, cfg)
        if texture is None:
            return None
        angles = dominant_angles(screen.profiles[z], wedge, cfg, [a for a, _ in (pair_lines or {}).get(z, [])])
        return localise_slice(texture, bins, angles, cfg, windows)

    for z, found in zip(chosen, map_slices(one, len(chosen), SCREEN_THREADS)):
        if found is None:
            continue
        write_upsampled(overlays.maps["streak_strength"][z], found.strength, f)
        for angle, (y0, x0), (y1, x1), zscore in found.lines:
            overlays.segments.append(
                Segment(
                    start_zyx_vox=(float(z), float(_unbin(y0, f)), float(_unbin(x0, f))),
                    end_zyx_vox=(float(z), float(_unbin(y1, f)), float(_unbin(x1, f))),
                    label=f"streak {display_angle(angle)} deg",
                    value=round(float(zscore), 2),
                )
            )


def write_upsampled(target: np.ndarray, binned: np.ndarray, factor: int) -> None:
    """Each value of ``binned`` into its ``factor`` x ``factor`` block of the full-resolution
    ``target`` (the rows and columns past the last whole block are left as they are).

    One strided assignment per place in the block, straight into ``target``.
    """
    ny, nx = binned.shape
    for dy in range(factor):
        for dx in range(factor):
            target[dy : ny * factor : factor, dx : nx * factor : factor] = binned


def _unbin(coord: float, factor: int) -> float:
    """Binned pixel coordinate -> full-resolution voxel coordinate (pixel centres)."""
    return round((coord + 0.5) * factor - 0.5, 2)


def build_findings(record: dict[str, Any], screen: Screen, cfg: dict[str, Any], regions: Regions | None) -> list[Finding]:
    """A physicist-readable message for the flag (or the all-clear), plus skipped slices."""
    findings: list[Finding] = []
    n_valid = len(screen.valid_slices)
    tol = record["tolerance"]
    if record["flagged"]:
        fl = record["flagged_slices"]
        text = (
            f"streaks: index {record['index']:.2f} exceeds the tolerance {tol:.2f} on {len(fl)} of "
            f"{n_valid} slices (slices {describe_slices(fl)})"
        )
        if record["dominant_angles_deg"]:
            dirs = ", ".join(display_angle(a) for a in record["dominant_angles_deg"])
            text += f"; strongest directions {dirs} deg (0 = along a row, counter-clockwise on screen)"
        for line in record["dense_pair_lines"][:2]:
            kind = "dark" if line["contrast_hu"] < 0 else "bright"
            text += (
                f"; {kind} band ({line['contrast_hu']:+.0f} HU) along the line joining dense objects at "
                f"{line['angle_deg']:.0f} deg on {len(line['slices'])} slices"
            )
        wedge = record["missing_wedge_deg"]
        if wedge:
            text += (
                f"; no image content at orientations {wedge['from_deg']:.0f} to {wedge['to_deg']:.0f} deg "
                f"({wedge['width_deg']:.0f} deg wide), as left by limited angular coverage"
            )
        findings.append(Finding(NAME, severity_of(cfg), text))
    else:
        findings.append(Finding(NAME, Severity.INFO, f"streaks: index {record['index']:.2f} within the tolerance {tol:.2f} on all {n_valid} slices"))
    skipped = {k: n for k, n in screen.skipped.items() if n}
    if skipped:
        what = ", ".join(f"{n} {k}" for k, n in skipped.items())
        findings.append(Finding(NAME, Severity.INFO, f"streaks: slices not analysed: {what}"))
    if regions is not None and not regions.air.any():
        findings.append(Finding(NAME, Severity.INFO, "streaks: no air around the body; measured inside the object only"))
    return findings
