"""Sharpness: the task transfer function (TTF) of every edge the series offers.

Nonlinear reconstructions make sharpness depend on contrast and noise, so each rod
insert of a phantom is measured and reported on its own (its contrast, contrast-to-noise,
f50, f10 and curve). Three kinds of edge:

- ``circular``: the rod inserts of a phantom, found automatically (inside a water
  cylinder found by :func:`reconaudit.checker.analyses._phantom.find_phantom`), or at
  centres / in ROIs the user gives. Radial ESF from every pixel about the sub-pixel
  centre, binned at ``bin_fraction`` of a pixel over all slices of the insert
  (Richard et al. 2012; AAPM TG-233).
- ``straight``: a slanted straight edge in a user ROI; angle fitted, pixels projected
  onto the edge normal with at least 4x oversampling (ISO 12233 style).
- ``skin``: the patient's skin-air outline, away from the table, for series without a
  phantom (Sanders, Hurwitz, Samei 2016).

Every ESF goes through :func:`reconaudit.checker.analyses._edges.ttf_from_esf`
(conditioning, LSF, flat-topped window, FFT, normalisation at f = 0, finite-difference
correction after Cunningham & Fenster 1987); the rods of a series go through its
several-rows form, :func:`reconaudit.checker.analyses._edges.ttf_from_esfs`, together.

Speed (method choices, documented so that a reader knows the records are estimates):
the skin edge is measured on a fixed budget of outline normals (``skin_normals_per_slice``
on at most ``skin_max_slices`` slices) found on a decimated screen of the body outline,
from the pixels of a thin strip along each normal; the insert search and the rod
measurements work on crops about each rod. The phantom search that tells where rods
may be runs on a decimated copy: at most 256 pixels a side and about 16 slices, at most
10 mm apart unless that takes more than 32 slices (a rod module shorter than the step
may fall between two of them); in-plane it takes the pixels of the working grid the
phantom search strides a whole volume with (every ``work_pixel_mm`` / pixel-th), so the
search reads those pixels directly instead of striding a finer copy again.
A rod's centre line is fitted from a few sub-stack mean images (a method
choice): its slices are split into up to 3 contiguous runs, the centre is refined
once on each run's mean image (noise lower by the square root of the run's slice
count, so each refinement is more stable than a per-slice one), and a straight line
through the run centres gives every slice's centre; a rod is straight, so the line
needs only a few points. The line's tilt is kept only when it exceeds
``TILT_SIGNIFICANCE`` (3) standard errors estimated from the scatter of the run centres
about it; otherwise every slice takes the mean centre (a noise tilt of a few hundredths
of a pixel would split a straight rod's pooled slices into groups, each binned: slower,
and no more accurate). The insert search looks at the mean of 3 slices of each run of
phantom-search slices (at a quarter, half and three quarters of it), smoothed by a box
mean of about 2 mm (a few shifted additions; the full-resolution crops keep their 1 mm
Gaussian, so the screen only says where to look); the full-resolution
crops about the screen's groups of one run are smoothed, labelled and disc-tested as one
stack (one pass for all rods, the same inserts as crop by crop).
Each rod's pixels are copied once, as one contiguous block over the slices the search
saw it on, when its slices are found; its slice extent and its measurement read that
copy (the same pixel values). A rod's consecutive slices whose fitted
centres agree within a fifth of an ESF bin are summed before the radial binning (one
binning of one summed image per group instead of one per slice; each pixel's distance
is then taken to its group's centre, at most 0.02 px from its own slice's). The ESF
about the measured edge radius comes from one binning of the pixels near the edge (bins
reaching half a range beyond the range on both sides): the range is moved onto the
edge by whole bins, so it is centred on the edge to half a bin (0.05 px) instead of
being binned again about each new radius (:func:`_centred_esf`). The rods found in a
series are measured together only where that saves work without changing a value: the
centre refinement of all their sub-stack mean images runs as one vectorised iteration
(:func:`measure_circular_edges`; each image reaches its own fixed point), their pixels
are binned with one ``np.bincount`` into bins offset rod by rod, and their ESFs (each of
its own length) are described, conditioned, differentiated, windowed and transformed as
the rows of 2-D arrays (:func:`_centred_esfs`, :func:`_ttf_curves`; each rod's record is
the one it gets alone, up to the order of a few sums). Values in
the records may therefore differ from a full-resolution, slice-by-slice pass by their
estimation error: record values are estimates and may change, while the record keys, types and meaning do not, the checks of
tests/reference/ and tests/checker/ hold with their assertions unchanged, and the demo
series keep their flags and verdicts.

References
----------
Richard S, Husarik DB, Yadava G, Murphy SN, Samei E. Med Phys 39(7):4115-4122, 2012.
Samei E, Bakalyar D, Boedeker KL, et al. Performance evaluation of computed tomography
systems: the report of AAPM Task Group 233. Med Phys 46(11):e735-e756, 2019.
Cunningham IA, Fenster A. Med Phys 14(4):533-537, 1987.
ISO 12233:2017, slanted-edge spatial frequency response.
Sanders J, Hurwitz L, Samei E. Patient-specific quantification of image quality: an
automated method for measuring spatial resolution in clinical CT images. Med Phys
43(10):5330-5338, 2016.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
from scipy import ndimage

from ..errors import ProfileError
from ..regions import Regions
from ..results import AnalysisResult, Finding, Overlays, Point, Roi, Severity
from ..volume import Volume
from . import _edges, _phantom
from ._edges import BinnedEsf, BinnedEsfs, TtfCurve, bin_esf, condition_esf, ttf_from_esf
from ._phantom import PHANTOM_DEFAULTS, _grid_step, disc_of, disc_stats, find_phantom

NAME = "ttf"

#: Every setting and tolerance, with its default.
DEFAULTS: dict[str, Any] = {
    # where the edges are
    "find_inserts": "auto",  # "auto" (when no centres/ROIs given), "always", "never"
    "centres_zyx_vox": [],  # [[z, y, x], ...] rod centres picked by the user
    "radius_mm": 0.0,  # radius of the user's rods; 0 = measure it
    "rois": [],  # [{"slices": [z0, z1], "yx0_vox": [y0, x0], "yx1_vox": [y1, x1]}], one rod each
    "straight_edge_rois": [],  # same form, one slanted straight edge each
    "skin_edge": "auto",  # "auto" (no phantom edge measured and a body present), "always", "never"
    # insert detection
    "min_contrast_hu": 40.0,
    "min_insert_diameter_mm": 5.0,
    "max_insert_diameter_mm": 45.0,
    # ESF -> TTF
    "bin_fraction": 0.1,  # bin width in pixels (<= 0.25: at least 4x oversampling)
    "esf_half_range_mm": 8.0,
    "min_half_range_mm": 2.0,
    "lsf_window_widths": 3.0,
    "esf_conditioning": "auto",  # "auto", "monotone", "none"
    "skin_band_mm": 6.0,
    "table_clearance_mm": 15.0,
    "skin_max_slices": 16,  # evenly spaced slices the skin edge is measured on
    "skin_normals_per_slice": 256,  # outline points (normals) per slice, spread in angle
    "skin_min_per_bin": 20.0,  # fewer edge pixels per ESF bin (mean) make the skin edge unreliable
    # reliability and tolerances
    "min_contrast_to_noise": 10.0,
    "min_slices": 8,
    "f50_min_per_mm": 0.0,  # 0 = no limit
    "f50_max_per_mm": 0.0,  # 0 = no limit
    "max_f50_contrast_ratio": 1.3,
}

#: Where each default comes from.
SOURCES: dict[str, str] = {
    "bin_fraction": "Richard et al., Med Phys 39(7) 2012 (ESF binned at a tenth of a pixel); ISO 12233 (>= 4x)",
    "esf_conditioning": "common practice, no source",
    "lsf_window_widths": "common practice, no source",
    "esf_half_range_mm": "common practice, no source",
    "min_half_range_mm": "common practice, no source",
    "min_contrast_to_noise": "validated regime of tests/reference/test_ttf_reference.py (f50 within 5 %)",
    "min_slices": "validated regime of tests/reference/test_ttf_reference.py (f50 within 5 %)",
    "min_contrast_hu": "common practice, no source",
    "min_insert_diameter_mm": "common practice, no source",
    "max_insert_diameter_mm": "common practice, no source",
    "skin_band_mm": "Sanders, Hurwitz, Samei, Med Phys 43(10) 2016 (band about the skin outline), width from memory",
    "table_clearance_mm": "site choice",
    "skin_max_slices": "site choice: 16 slices x 256 normals x ~50 strip pixels (3 px wide, +/- 6 mm at 0.7 mm) "
                       "give ~2e5 edge pixels, ~1000 per ESF bin of a tenth of a pixel",
    "skin_normals_per_slice": "site choice: see skin_max_slices; spread over a slice, they cover the whole outline",
    "skin_min_per_bin": "common practice, no source (a bin mean of >= 20 pixels keeps its noise below a "
                        "quarter of the pixel noise)",
    "f50_min_per_mm": "site choice",
    "f50_max_per_mm": "site choice",
    "max_f50_contrast_ratio": "site choice",
}

METHOD = (
    "TTF from edges: radial ESF of rod inserts about sub-pixel centres (Richard et al., "
    "Med Phys 39(7) 2012; AAPM TG-233), slanted straight edges (ISO 12233 style) and the "
    "skin-air outline (Sanders, Hurwitz, Samei, Med Phys 43(10) 2016); ESF binned at "
    "{bin:g} pixel, conditioned ({cond}), central-difference LSF in a flat-topped window, "
    "FFT normalised at f = 0, finite-difference and bin corrections (Cunningham & "
    "Fenster, Med Phys 14(4) 1987)."
)

_CHOICES = {
    "find_inserts": ("auto", "always", "never"),
    "skin_edge": ("auto", "always", "never"),
    "esf_conditioning": _edges.CONDITIONING,
}


# =========================================================================== settings
def resolve_settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    """DEFAULTS overridden by ``settings``; unknown keys or bad values raise ProfileError."""
    s = dict(DEFAULTS)
    for key, value in (settings or {}).items():
        if key not in DEFAULTS:
            raise ProfileError(f"ttf: unknown setting {key!r}; known: {', '.join(DEFAULTS)}")
        s[key] = value
    for key, choices in _CHOICES.items():
        if s[key] not in choices:
            raise ProfileError(f"ttf: {key} = {s[key]!r}; expected one of {choices}")
    if not 0 < float(s["bin_fraction"]) <= 0.25:
        raise ProfileError(f"ttf: bin_fraction = {s['bin_fraction']!r}; expected 0 < value <= 0.25 (>= 4x oversampling)")
    for key in ("centres_zyx_vox", "rois", "straight_edge_rois"):
        if not isinstance(s[key], (list, tuple)):
            raise ProfileError(f"ttf: {key} must be a list, got {type(s[key]).__name__}")
    for c in s["centres_zyx_vox"]:
        if len(c) != 3 or not all(isinstance(v, (int, float)) and math.isfinite(v) for v in c):
            raise ProfileError(f"ttf: centres_zyx_vox entry {c!r}; expected [z, y, x] numbers")
    return s


def _roi_from_setting(entry: Any, shape: tuple[int, int, int], key: str) -> Roi:
    """A settings ROI ({"slices", "yx0_vox", "yx1_vox"}) clipped to the volume."""
    try:
        z0, z1 = (int(v) for v in entry["slices"])
        y0, x0 = (int(v) for v in entry["yx0_vox"])
        y1, x1 = (int(v) for v in entry["yx1_vox"])
    except (KeyError, TypeError, ValueError) as exc:
        raise ProfileError(f"ttf: {key} entry {entry!r}; expected slices [z0, z1], yx0_vox [y, x], yx1_vox [y, x]") from exc
    z0, z1 = sorted((max(z0, 0), min(z1, shape[0] - 1)))
    y0, y1 = sorted((max(y0, 0), min(y1, shape[1])))
    x0, x1 = sorted((max(x0, 0), min(x1, shape[2])))
    return Roi(z0, z1, y0, x0, y1, x1, label=str(entry.get("label", "")) if isinstance(entry, dict) else "")


# =========================================================================== inserts
@dataclass
class Insert:
    """A rod insert: where it is and roughly what it contains (before refinement)."""

    z0: int
    z1: int
    centre_yx_vox: tuple[float, float]
    radius_mm: float
    source: str  # "auto", "centre", "roi"
    limit: tuple[int, int, int, int] | None = None  # (y0, x0, y1, x1) the user's ROI
    #: A contiguous copy of the pixels about the rod read while its slices were found:
    #: (first slice, first row, first column, float32 (z, y, x) block), so that
    #: :func:`measure_circular_edge` takes its crop from it instead of reading the
    #: volume's strided slices again (the same pixel values); None when not taken.
    pixels: tuple[int, int, int, np.ndarray] | None = field(default=None, compare=False, repr=False)


def find_rod_inserts(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None, *,
                     phantom: tuple[Any, int, int] | None = None) -> list[Insert]:
    """Find the rod inserts of a water phantom automatically.

    ``find_phantom`` (on an in-plane decimated copy when the slices are larger than 256
    pixels, to keep it cheap) gives the phantom and its slices with inserts. On the mean
    of three slices of each contiguous run of such slices (:func:`_search_slices`), smoothed by
    a box mean of about 2 mm (:func:`_screen_smoothed`), connected groups departing from the phantom median by more than
    ``min_contrast_hu`` (each sign on its own) whose shape is a disc of
    ``min_insert_diameter_mm`` to ``max_insert_diameter_mm`` are inserts; each insert's
    slices are those where its disc keeps at least 3/4 of its contrast to the
    surrounding ring. The groups are screened on every second row and column of the
    phantom's box (when the smallest insert spans at least 8 pixels); each group found
    is then thresholded, labelled and tested as a disc again on a full-resolution crop
    about it, so the screen decides only where to look. The crops of one run are of
    one size and go through the smoothing, labelling, hole filling and disc measures
    together (:func:`_inserts_at_full_resolution`; the same inserts as one crop at a
    time).

    Parameters
    ----------
    phantom : tuple, optional
        What :func:`_phantom_of` returned for this volume, when the caller has it.

    Returns
    -------
    list of Insert

    References
    ----------
    Common practice, no source (threshold, connected components, disc test).
    """
    s = resolve_settings(settings)
    phantom, factor, step = phantom if phantom is not None else _phantom_of(volume, regions)
    if not phantom.found or not phantom.inserts.any():
        return []
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    f = _screen_factor(px, float(s["min_insert_diameter_mm"]))
    inserts: list[Insert] = []
    for k0, k1 in _runs_of(phantom.inserts):
        kmid = (k0 + k1) // 2
        z0, z1, mid = k0 * step, min(k1 * step, volume.shape[0] - 1), kmid * step
        zs = _search_slices(z0, z1)
        centre = phantom.centre_yx_vox[kmid] * factor
        radius = phantom.radius_vox[kmid] * factor
        median_hu = _finite_median(phantom.median_hu[k0 : k1 + 1])
        (by0, bx0), box = _box_about(centre, 0.92 * radius + int(4.0 / px + 0.5) + 1, volume.shape[1:])
        coarse = volume.hu[zs, box[0].start : box[0].stop : f, box[1].start : box[1].stop : f].mean(axis=0)
        smooth = _screen_smoothed(coarse, px * f) - median_hu
        inner = _disc(coarse.shape, ((centre[0] - by0) / f, (centre[1] - bx0) / f), 0.92 * radius / f)
        candidates = []
        limit = float(s["min_contrast_hu"])
        # both signs labelled at once, as two planes never connected to each other (the
        # labels of the brighter plane come first, in the order of its own labelling)
        lab, _ = ndimage.label(np.stack([smooth > limit, -smooth > limit]) & inner, structure=_IN_PLANE)
        for i, sl in enumerate(ndimage.find_objects(lab), start=1):
            if sl is None or not _may_be_insert(lab[sl][0] == i, f, px, s):
                continue
            comp_yx = np.nonzero(lab[sl][0] == i)
            at = (comp_yx[0] + sl[1].start) * f + by0, (comp_yx[1] + sl[2].start) * f + bx0
            candidates.append((at, 1.0 if sl[0].start == 0 else -1.0))
        found = _inserts_at_full_resolution(volume.hu, zs, candidates, median_hu, centre, radius, mid, px, s,
                                            window=(z0 - step, z1 + step))
        inserts.extend(ins for ins in found if ins is not None)
    inserts = distinct_inserts(inserts, px)
    inserts.sort(key=lambda r: (r.z0, r.centre_yx_vox[0], r.centre_yx_vox[1]))
    return inserts


def distinct_inserts(inserts: list[Insert], pixel_mm: float) -> list[Insert]:
    """One insert per rod: of inserts whose slices overlap and whose centres lie within
    half the smaller radius of each other, the one over the most slices is kept.

    Runs of phantom-search slices are searched one by one, and each found rod's slices
    are extended to wherever its disc keeps its contrast, so when the phantom search
    marks a rod's slices in several runs (a low-contrast rod in noise) the same rod is
    found once per run with the same slices; measured twice, it would be reported as
    two edges.

    References
    ----------
    Common practice, no source (one measurement per physical insert).
    """
    kept: list[Insert] = []
    for ins in sorted(inserts, key=lambda r: (-(r.z1 - r.z0), r.z0)):
        if not any(_same_rod(ins, other, pixel_mm) for other in kept):
            kept.append(ins)
    return kept


def _same_rod(a: Insert, b: Insert, pixel_mm: float) -> bool:
    """Whether two inserts overlap in z and their centres are within half the smaller radius."""
    if a.z0 > b.z1 or b.z0 > a.z1:
        return False
    reach_vox = 0.5 * min(a.radius_mm, b.radius_mm) / max(pixel_mm, 1e-9)
    dy, dx = a.centre_yx_vox[0] - b.centre_yx_vox[0], a.centre_yx_vox[1] - b.centre_yx_vox[1]
    return dy * dy + dx * dx <= reach_vox * reach_vox


def _finite_median(values: np.ndarray) -> float:
    """``np.nanmedian`` of a small 1-D array (NaN when no value is finite), from one sort."""
    v = np.asarray(values, dtype=float)
    return _edges._median(v[np.isfinite(v)])


def _search_slices(z0: int, z1: int) -> slice:
    """The slices whose mean the insert search looks at in a run of phantom-search
    slices ``z0``..``z1``: three, at a quarter, half and three quarters of the run (all
    of a run of fewer than 5 slices). A method choice for speed: the rods run through
    the whole run, and the 1 mm smoothing of the search lowers the noise of a mean of
    three slices far below ``min_contrast_hu``; the exact slices and the measurement
    use every slice."""
    n = z1 - z0
    if n < 4:
        return slice(z0, z1 + 1)
    step = n // 4
    start = z0 + step
    return slice(start, start + 2 * step + 1, step)


#: Half-width (mm) of the box mean that smooths the insert screen (:func:`_screen_smoothed`).
SCREEN_BOX_HALF_MM = 1.0


def _screen_smoothed(image: np.ndarray, pixel_mm: float) -> np.ndarray:
    """Box mean of the insert screen: (2 h + 1) x (2 h + 1) pixels, h = ``SCREEN_BOX_HALF_MM``
    / ``pixel_mm`` rounded (at least 1), edges mirrored (as ``ndimage.uniform_filter``).

    A method choice for speed: the screen only says where the
    full-resolution search looks (it smooths its own crops by a 1 mm Gaussian as before),
    and a box of about 2 mm lowers the screen's noise by its width (3 x for 3 x 3 pixels,
    against about 3.9 x for the 1 mm Gaussian of 0.9 mm pixels) while keeping the full
    contrast of a disc wider than the box; it is a few shifted additions instead of a
    Gaussian correlation. The smallest, faintest inserts the search must find are
    found as before (tests/checker/test_ttf.py, box screen against Gaussian screen).

    References
    ----------
    Common practice, no source (box mean before a threshold).
    """
    h = max(1, int(round(SCREEN_BOX_HALF_MM / pixel_mm)))
    w = 2 * h + 1
    p = np.pad(image, h, mode="symmetric")
    rows = p[: p.shape[0] - w + 1].copy()
    for k in range(1, w):
        rows += p[k : p.shape[0] - w + 1 + k]
    out = rows[:, : rows.shape[1] - w + 1].copy()
    for k in range(1, w):
        out += rows[:, k : rows.shape[1] - w + 1 + k]
    out *= out.dtype.type(1.0 / (w * w))
    return out


def _screen_factor(px: float, min_diameter_mm: float) -> int:
    """In-plane step of the insert screen: 2 when the smallest insert still spans at
    least 8 pixels (4 on the screen), else 1 (full resolution)."""
    return 2 if min_diameter_mm / px >= 8.0 else 1


def _may_be_insert(comp: np.ndarray, f: int, px: float, s: dict[str, Any]) -> bool:
    """Whether a component of the screen is large enough to be a disc of the allowed
    diameters (generously: a quarter of the smallest disc's area, up to four times the
    largest); the disc test proper runs at full resolution."""
    area_mm2 = float(np.count_nonzero(comp)) * (f * px) ** 2
    lo = 0.25 * math.pi * (0.5 * float(s["min_insert_diameter_mm"])) ** 2
    hi = 4.0 * math.pi * (0.5 * float(s["max_insert_diameter_mm"])) ** 2
    return lo <= area_mm2 <= hi


def _insert_at_full_resolution(hu: np.ndarray, zs: slice, at: tuple[np.ndarray, np.ndarray], sign: float,
                               median_hu: float, centre: Sequence[float], radius: float, mid: int, px: float,
                               s: dict[str, Any], window: tuple[int, int] | None = None) -> Insert | None:
    """The insert a screen component (pixels ``at``, full-resolution indices) stands for:
    the slice mean over ``zs`` on a crop about the component, smoothed by 1 mm (the crop
    grown by the kernel's reach, so its values are those of the whole image), thresholded
    and labelled as on the screen inside the phantom's 0.92 radius; the full-resolution
    component that covers most of the screen's pixels goes to the disc test."""
    sigma = 1.0 / px
    reach = int(4.0 * sigma + 0.5) + 1
    ny, nx = hu.shape[1:]
    y0, y1 = max(int(at[0].min()) - 2 * reach, 0), min(int(at[0].max()) + 2 * reach + 2, ny)
    x0, x1 = max(int(at[1].min()) - 2 * reach, 0), min(int(at[1].max()) + 2 * reach + 2, nx)
    mean = hu[zs, y0:y1, x0:x1].mean(axis=0)
    dev = sign * (ndimage.gaussian_filter(mean, sigma) - median_hu)
    inner = _disc(mean.shape, (centre[0] - y0, centre[1] - x0), 0.92 * radius)
    lab, n = ndimage.label((dev > float(s["min_contrast_hu"])) & inner)
    if n == 0:
        return None
    votes = np.bincount(lab[at[0] - y0, at[1] - x0], minlength=n + 1)[1:]
    if votes.max() == 0:
        return None
    j = 1 + int(np.argmax(votes))
    sl = ndimage.find_objects(lab, max_label=j)[j - 1]
    full = (slice(sl[0].start + y0, sl[0].stop + y0), slice(sl[1].start + x0, sl[1].stop + x0))
    return _insert_from_component(hu, dev[sl], lab[sl] == j, full, mid, px, s, window=window)


#: Labelling structure of a stack of (y, x) images: 4-connected within each image, never
#: across images.
_IN_PLANE = np.zeros((3, 3, 3), dtype=bool)
_IN_PLANE[1] = ndimage.generate_binary_structure(2, 1)
_IN_PLANE.flags.writeable = False


def _inserts_at_full_resolution(hu: np.ndarray, zs: slice, candidates: Sequence[tuple[tuple[np.ndarray, np.ndarray], float]],
                                median_hu: float, centre: Sequence[float], radius: float, mid: int, px: float,
                                s: dict[str, Any], window: tuple[int, int] | None = None) -> list[Insert | None]:
    """:func:`_insert_at_full_resolution` of every screen component of a run at once.

    Each component (pixels ``at``, full-resolution indices, and the sign of its
    departure) gets a crop of one common size holding the crop that function takes about
    it (grown, not moved, where it can), so that the slice means of all crops are taken
    with one gather, smoothed with one filter (no smoothing across crops) and thresholded
    and labelled at once (4-connected within each crop only): one pass for all rods
    instead of one per rod. Inside each crop's own box the smoothed values are those of
    the whole image wherever the single-crop pass has them, so the component found is
    the same. The disc test and the slice extent then run per insert.
    """
    if not candidates:
        return []
    sigma = 1.0 / px
    reach = int(4.0 * sigma + 0.5) + 1
    ny, nx = hu.shape[1:]
    boxes = []
    for at, _ in candidates:
        y0, y1 = max(int(at[0].min()) - 2 * reach, 0), min(int(at[0].max()) + 2 * reach + 2, ny)
        x0, x1 = max(int(at[1].min()) - 2 * reach, 0), min(int(at[1].max()) + 2 * reach + 2, nx)
        boxes.append((y0, y1, x0, x1))
    h = max(b[1] - b[0] for b in boxes)
    w = max(b[3] - b[2] for b in boxes)
    origin = np.array([(min(b[0], ny - h), min(b[2], nx - w)) for b in boxes], dtype=np.intp)  # grown to h x w
    mean = np.empty((len(candidates), h, w), dtype=hu.dtype)
    for k, (oy, ox) in enumerate(origin.tolist()):
        np.mean(hu[zs, oy : oy + h, ox : ox + w], axis=0, out=mean[k])
    signs = np.array([sg for _, sg in candidates], dtype=float)[:, None, None]
    dev = signs * (ndimage.gaussian_filter(mean, (0.0, sigma, sigma)) - median_hu)
    yy = np.arange(h, dtype=float)[None, :, None] - (centre[0] - origin[:, 0, None, None])
    xx = np.arange(w, dtype=float)[None, None, :] - (centre[1] - origin[:, 1, None, None])
    inner = yy * yy + xx * xx <= (0.92 * radius) ** 2
    lab, _ = ndimage.label((dev > float(s["min_contrast_hu"])) & inner, structure=_IN_PLANE)
    winners = np.zeros(len(candidates), dtype=lab.dtype)
    for k, (at, _) in enumerate(candidates):
        hits = lab[k, at[0] - origin[k, 0], at[1] - origin[k, 1]]
        hits = hits[hits > 0]
        if hits.size:
            low = int(hits.min())  # the lowest label among the most voted, as np.argmax of a bincount
            winners[k] = low + int(np.argmax(np.bincount(hits - low)))
    found = np.flatnonzero(winners)
    out: list[Insert | None] = [None] * len(candidates)
    if found.size == 0:
        return out
    comps = lab[found] == winners[found, None, None]
    cy, cx, r_eq, fill = _discs_of_components(dev[found], comps)
    for i, k in enumerate(found.tolist()):
        if _is_insert_disc(float(r_eq[i]), float(fill[i]), px, s):
            at_yx = (float(cy[i]) + float(origin[k, 0]), float(cx[i]) + float(origin[k, 1]))
            out[k] = _insert_at(hu, at_yx, float(r_eq[i]), mid, px, s, window)
    return out


def _discs_of_components(dev: np.ndarray, comps: np.ndarray) -> tuple[np.ndarray, ...]:
    """The disc test's measures of each component of a stack (one per crop), as
    :func:`_insert_from_component` takes them, for all at once: the component is
    re-thresholded at half the median departure ``dev`` of its core (inside half its
    equal-area radius about its centroid), its holes filled (background not 4-connected
    to the crop's border: the component's box lies inside the crop, so these are the
    holes of the box), and its centroid, equal-area radius and fill ratio measured
    (:func:`reconaudit.checker.analyses._phantom.disc_stats`), in crop indices.

    References
    ----------
    Common practice, no source (threshold at half contrast, hole filling, disc test).
    """
    n, h, w = comps.shape
    cy, cx, r_eq = _centroids_and_radii(comps)
    yy = np.arange(h, dtype=float)[None, :, None] - cy[:, None, None]
    xx = np.arange(w, dtype=float)[None, None, :] - cx[:, None, None]
    core = (yy**2 + xx**2 <= (0.5 * r_eq[:, None, None]) ** 2) & comps
    half = comps.copy()
    for k in range(n):
        values = dev[k][core[k]]
        if values.size:
            cut = comps[k] & (dev[k] > 0.5 * _edges._median(values))
            if cut.any():
                half[k] = cut
    return disc_stats(_fill_holes_each(half))


def _centroids_and_radii(masks: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centroid and equal-area radius of every (y, x) mask of a stack, computed as
    :func:`reconaudit.checker.analyses._phantom.disc_stats` computes them (integer row
    and column counts; NaN centroid for an empty mask), without its fill ratio."""
    row_counts = np.count_nonzero(masks, axis=2).astype(np.int64)
    col_counts = np.count_nonzero(masks, axis=1).astype(np.int64)
    n = row_counts.sum(axis=1)
    safe = np.maximum(n, 1)
    cy = (row_counts @ np.arange(masks.shape[1])) / safe
    cx = (col_counts @ np.arange(masks.shape[2])) / safe
    empty = n == 0
    return np.where(empty, np.nan, cy), np.where(empty, np.nan, cx), np.sqrt(n / np.pi)


def _fill_holes_each(masks: np.ndarray) -> np.ndarray:
    """:func:`_fill_holes` of every (y, x) mask of a stack at once, from one labelling
    (4-connected within each mask only, the border of each mask counting as outside)."""
    lab, n = ndimage.label(~masks, structure=_IN_PLANE)
    outside = np.zeros(n + 1, dtype=bool)
    outside[lab[:, 0]] = outside[lab[:, -1]] = outside[lab[:, :, 0]] = outside[lab[:, :, -1]] = True
    outside[0] = False
    return ~outside[lab]


#: Largest distance (mm) between the slices of the decimated phantom search that
#: :func:`_phantom_of` makes when a series has more than 16 slices (see there).
PHANTOM_SEARCH_STEP_MM = 10.0


def _phantom_of(volume: Volume, regions: Regions) -> tuple[Any, int, int]:
    """``find_phantom`` on a copy decimated to at most 256 pixels a side and to about
    16 slices, at most ``PHANTOM_SEARCH_STEP_MM`` apart (and at most 32 slices in all
    however long the series): rods are long, and their exact slices are found later
    at full resolution, so the search needs only one slice in each rod module. A
    method choice for speed: the search costs about its number of slices.

    When a decimated copy is made, its in-plane factor is at least the step of the
    working grid ``find_phantom`` would take on the whole volume (every
    ``work_pixel_mm`` / pixel-th pixel): the search then runs on that same grid with
    no further striding inside (the same pixels, fewer index steps), instead of on a
    finer copy it strides again.

    The search of a copy is not kept as ``find_phantom``'s shared answer (a copy is a new
    array every time, so it could never be reused), so the full-volume answer that the
    noise and uniformity analyses of the same volume share stays in place.

    Returns the phantom, the in-plane factor and the slice step.
    """
    factor = max(1, int(math.ceil(max(volume.shape[1:]) / 256)))
    step = _phantom_search_step(volume.shape[0], float(volume.spacing_mm[0]))
    if factor == 1 and step == 1:
        return find_phantom(volume, regions), 1, 1
    px = 0.5 * (float(volume.spacing_mm[1]) + float(volume.spacing_mm[2]))
    factor = max(factor, _grid_step(px, float(PHANTOM_DEFAULTS["work_pixel_mm"])))
    dz, dy, dx = volume.spacing_mm
    zf, yf = slice(None, None, step), slice(None, None, factor)
    small = Volume.from_array(volume.hu[zf, yf, yf], (dz * step, dy * factor, dx * factor))
    centroid = regions.body_centroid_zyx_vox
    small_regions = Regions(
        fov=regions.fov[yf, yf], body=regions.body[zf, yf, yf],
        table=regions.table[zf, yf, yf], air=regions.air[zf, yf, yf],
        fov_center_yx_vox=tuple(c / factor for c in regions.fov_center_yx_vox),  # type: ignore[arg-type]
        fov_radius_vox=regions.fov_radius_vox / factor, fov_is_circle=regions.fov_is_circle,
        body_centroid_zyx_vox=None if centroid is None else (centroid[0] / step, centroid[1] / factor, centroid[2] / factor),
    )
    # searched directly, not through find_phantom's shared answer: the copy is a new
    # array at every call, so its answer would never be reused, and keeping it would
    # push out the full-volume answer that the noise analyses of this volume share
    return _phantom._find_phantom(small, small_regions, dict(PHANTOM_DEFAULTS)), factor, step


def _phantom_search_step(nz: int, dz_mm: float) -> int:
    """Slice step of the decimated phantom search: about 16 slices in all, but no more
    than ``PHANTOM_SEARCH_STEP_MM`` apart unless that would take more than 32."""
    sixteen, thirty_two = math.ceil(nz / 16), math.ceil(nz / 32)
    by_mm = int(PHANTOM_SEARCH_STEP_MM // max(dz_mm, 1e-6))
    return max(1, thirty_two, min(sixteen, by_mm))


def _box_about(centre: Sequence[float], half: float, shape: tuple[int, int]
               ) -> tuple[tuple[int, int], tuple[slice, slice]]:
    """The square of half-size ``half`` about ``centre`` clipped to ``shape``: its corner
    and its slices. The smoothing of the insert search reaches at most 4 sigma (1 mm), so
    inside the phantom a crop grown by that much gives the values of the whole image."""
    y0, x0 = max(int(math.floor(centre[0] - half)), 0), max(int(math.floor(centre[1] - half)), 0)
    y1 = min(int(math.ceil(centre[0] + half)) + 1, shape[0])
    x1 = min(int(math.ceil(centre[1] + half)) + 1, shape[1])
    return (y0, x0), (slice(y0, y1), slice(x0, x1))


def _runs_of(flags: np.ndarray) -> list[tuple[int, int]]:
    lab, n = ndimage.label(np.asarray(flags, dtype=bool))
    out = []
    for sl in ndimage.find_objects(lab):
        out.append((int(sl[0].start), int(sl[0].stop - 1)))
    return out


def _disc(shape: tuple[int, int], centre: Sequence[float], radius: float) -> np.ndarray:
    yy, xx = np.ogrid[: shape[0], : shape[1]]
    return (yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 <= radius**2


def _insert_from_component(hu: np.ndarray, dev: np.ndarray, comp: np.ndarray, sl: tuple[slice, ...], z: int,
                           px: float, s: dict[str, Any], window: tuple[int, int] | None = None) -> Insert | None:
    """An Insert if the 2-D component is a disc of the allowed size; its slices from ``z``
    (looked at first over ``window``, the slices the phantom search saw it on).

    The disc is re-thresholded at half its own contrast (``dev``: smoothed departure from
    the phantom, sign made positive) so that its radius does not grow with contrast.
    """
    (cy, cx), r_eq, _ = disc_of(comp)
    core = dev[_disc(comp.shape, (cy, cx), 0.5 * r_eq) & comp]
    if core.size:
        half = comp & (dev > 0.5 * _edges._median(core))
        if half.any():
            comp = _fill_holes(half)
    (cy, cx), r_eq, fill = disc_of(comp)
    if not _is_insert_disc(r_eq, fill, px, s):
        return None
    return _insert_at(hu, (cy + sl[0].start, cx + sl[1].start), r_eq, z, px, s, window)


def _is_insert_disc(r_eq: float, fill: float, px: float, s: dict[str, Any]) -> bool:
    """Whether a component of equal-area radius ``r_eq`` (px) and fill ratio ``fill`` is
    a disc of the allowed diameters."""
    diameter = 2.0 * r_eq * px
    return fill >= 0.7 and s["min_insert_diameter_mm"] <= diameter <= s["max_insert_diameter_mm"]


def _insert_at(hu: np.ndarray, centre: tuple[float, float], r_eq: float, z: int, px: float, s: dict[str, Any],
               window: tuple[int, int] | None) -> Insert:
    """The Insert of a disc found at ``centre`` (equal-area radius ``r_eq`` px): its
    pixels copied over ``window`` and its slices from ``z``."""
    ins = Insert(0, 0, centre, r_eq * px, "auto")
    block = _copy_about_rod(hu, centre, _measure_half_px(ins, px, s), 2.2 * r_eq, window or (z, z))
    ins.z0, ins.z1 = _slices_of_rod(hu, z, centre, r_eq, window=window, pixels=block)
    ins.pixels = block
    return ins


def _fill_holes(mask: np.ndarray) -> np.ndarray:
    """``ndimage.binary_fill_holes(mask)`` of a 2-D mask from one labelling: the pixels
    outside ``mask`` not 4-connected to the image border are holes (the same mask,
    checked on 2000 random masks)."""
    lab, n = ndimage.label(~mask)
    outside = np.zeros(n + 1, dtype=bool)
    outside[lab[0]] = outside[lab[-1]] = outside[lab[:, 0]] = outside[lab[:, -1]] = True
    outside[0] = False
    return ~outside[lab]


def _measure_half_px(insert: Insert, px: float, s: dict[str, Any]) -> float:
    """Half-size (px) of the square crop :func:`measure_circular_edge` reads about a rod."""
    half_mm = min(float(s["esf_half_range_mm"]), 0.9 * insert.radius_mm)
    return insert.radius_mm / px + half_mm / px + 3


def _copy_about_rod(hu: np.ndarray, centre: Sequence[float], measure_half: float, ring_half: float,
                    window: tuple[int, int]) -> tuple[int, int, int, np.ndarray]:
    """A contiguous copy of the slices ``window`` (inclusive, clipped) of the square
    about ``centre`` that holds both the slice-extent crop (half ``ring_half``) and the
    measurement crop (half ``measure_half``), one pixel wider: (z0, y0, x0, block)."""
    nz = hu.shape[0]
    z0, z1 = max(0, int(window[0])), min(nz - 1, int(window[1]))
    y0, x0, crop = _crop(hu[z0 : z1 + 1], centre, max(measure_half, ring_half) + 1.0)
    return z0, y0, x0, np.ascontiguousarray(crop)


def _crop_from(pixels: tuple[int, int, int, np.ndarray] | None, hu: np.ndarray, z0: int, z1: int,
               centre: Sequence[float], half: float) -> tuple[int, int, np.ndarray]:
    """:func:`_crop` of slices ``z0``..``z1`` of ``hu``, taken from ``pixels`` (a copy of
    part of ``hu``, :attr:`Insert.pixels`) when it holds them all, else from ``hu``."""
    y0, x0, view = _crop(hu[z0 : z1 + 1], centre, half)
    at = _place_in(pixels, z0, y0, x0, view.shape)
    if at is None:
        return y0, x0, view
    block = pixels[3]  # type: ignore[index]
    return y0, x0, block[at[0] : at[0] + view.shape[0], at[1] : at[1] + view.shape[1], at[2] : at[2] + view.shape[2]]


def _place_in(pixels: tuple[int, int, int, np.ndarray] | None, z0: int, y0: int, x0: int,
              shape: tuple[int, ...]) -> tuple[int, int, int] | None:
    """Where the box of ``shape`` at (``z0``, ``y0``, ``x0``) of the volume starts in the
    block of ``pixels``, or None when the block does not hold all of it."""
    if pixels is None:
        return None
    pz, py, px_, block = pixels
    zs, ys, xs = z0 - pz, y0 - py, x0 - px_
    if min(zs, ys, xs) < 0 or zs + shape[0] > block.shape[0] or ys + shape[1] > block.shape[1] \
            or xs + shape[2] > block.shape[2]:
        return None
    return zs, ys, xs


def _slices_of_rod(hu: np.ndarray, z: int, centre: tuple[float, float], r_px: float,
                   keep: float = 0.75, chunk: int = 16, window: tuple[int, int] | None = None,
                   pixels: tuple[int, int, int, np.ndarray] | None = None) -> tuple[int, int]:
    """Extend from slice ``z`` while the disc keeps at least ``keep`` of its contrast to its
    ring (mean inside 0.6 r minus mean of the ring 1.4 r .. 2 r).

    The contrasts are computed first over ``window`` (the slices the rod is expected on,
    inclusive; default: ``chunk`` slices from ``z``), then ``chunk`` slices at a time
    beyond it while the disc keeps its contrast. Each contrast is one weighted sum of
    the pixels inside and on the ring (weights 1/n inside, -1/n on the ring, float64),
    taken out of the slices with one gather per batch of slices: the same means as
    slice by slice, without reading the rest of the crop. Slices held by ``pixels`` (a
    copy of part of ``hu``, see :func:`_copy_about_rod`) are read from it.
    """
    y0, x0, crop = _crop(hu, centre, 2.2 * r_px)
    ny, nx = crop.shape[1:]
    d2 = (np.arange(ny) - (centre[0] - y0))[:, None] ** 2 + (np.arange(nx) - (centre[1] - x0))[None, :] ** 2
    inside, ring = d2 <= (0.6 * r_px) ** 2, (d2 >= (1.4 * r_px) ** 2) & (d2 <= (2.0 * r_px) ** 2)
    n_in, n_ring = int(np.count_nonzero(inside)), int(np.count_nonzero(ring))
    if not n_in or not n_ring:
        return z, z
    iy, ix = np.nonzero(inside | ring)  # row-major, the pixels of the weight image that are not 0
    w = np.where(inside[iy, ix], 1.0 / n_in, -1.0 / n_ring)

    def contrasts(k0: int, k1: int) -> np.ndarray:
        at = _place_in(pixels, k0, y0, x0, (k1 - k0, ny, nx))
        if at is None:
            return np.einsum("ij,j->i", crop[k0:k1, iy, ix], w)  # in float64 (w's type); no BLAS threads
        block = pixels[3]  # type: ignore[index]
        flat = block.reshape(block.shape[0], -1)[at[0] : at[0] + k1 - k0]
        return np.einsum("ij,j->i", flat.take((iy + at[1]) * block.shape[2] + ix + at[2], axis=1), w)

    nz = hu.shape[0]
    lo_w, hi_w = (z, min(z + chunk, nz) - 1) if window is None else window
    lo_w, hi_w = max(0, min(int(lo_w), z)), min(nz - 1, max(int(hi_w), z))
    first = contrasts(lo_w, hi_w + 1)
    c0 = float(first[z - lo_w])
    if c0 == 0 or not np.isfinite(c0):
        return z, z
    ok = first / c0 >= keep
    hi, up = z, ok[z - lo_w + 1 :]
    while True:
        if not up.all():
            hi += int(np.argmin(up))
            break
        hi += up.size
        if hi + 1 >= nz:
            break
        up = contrasts(hi + 1, min(hi + 1 + chunk, nz)) / c0 >= keep
    lo, down = z, ok[: z - lo_w][::-1]
    while True:
        if not down.all():
            lo -= int(np.argmin(down))
            break
        lo -= down.size
        if lo - 1 < 0:
            break
        start = max(lo - chunk, 0)
        down = (contrasts(start, lo) / c0 >= keep)[::-1]
    return lo, hi


def _crop(image: np.ndarray, centre: Sequence[float], half: float) -> tuple[int, int, np.ndarray]:
    y0 = max(int(math.floor(centre[0] - half)), 0)
    x0 = max(int(math.floor(centre[1] - half)), 0)
    y1 = min(int(math.ceil(centre[0] + half)) + 1, image.shape[-2])
    x1 = min(int(math.ceil(centre[1] + half)) + 1, image.shape[-1])
    return y0, x0, image[..., y0:y1, x0:x1]


def radius_from_profile(image: np.ndarray, centre: Sequence[float], px: float, max_mm: float = 25.0) -> float:
    """Radius (mm) where the azimuthal mean profile crosses halfway between its centre
    and its outer values; NaN if there is no crossing.

    References
    ----------
    Common practice, no source.
    """
    y0, x0, crop = _crop(image, centre, max_mm / px)
    d = np.hypot(*(np.indices(crop.shape) - np.array([centre[0] - y0, centre[1] - x0])[:, None, None])) * px
    idx = np.minimum((d / (0.5 * px)).astype(int), int(max_mm / (0.5 * px)))
    counts = np.bincount(idx.ravel())
    prof = np.bincount(idx.ravel(), weights=crop.ravel()) / np.maximum(counts, 1)
    prof = prof[counts > 0]
    r = (np.nonzero(counts > 0)[0] + 0.5) * 0.5 * px
    if prof.size < 6:
        return float("nan")
    inner, outer = prof[0], float(np.median(prof[-max(prof.size // 5, 1):]))
    t = (prof - outer) / (inner - outer) if inner != outer else np.zeros_like(prof)
    below = np.nonzero(t < 0.5)[0]
    if below.size == 0 or below[0] == 0:
        return float("nan")
    i = int(below[0])
    return float(r[i - 1] + (t[i - 1] - 0.5) * (r[i] - r[i - 1]) / (t[i - 1] - t[i]))


# =========================================================================== circular edge
@dataclass
class EdgeMeasurement:
    """One measured edge (any kind): the JSON record and the overlay point."""

    record: dict[str, Any]
    point_zyx_vox: tuple[float, float, float]
    notes: list[str] = field(default_factory=list)


def measure_circular_edge(
    volume: Volume,
    insert: Insert,
    settings: dict[str, Any] | None = None,
    *,
    allowed: np.ndarray | None = None,
    others: Sequence[Insert] = (),
) -> EdgeMeasurement:
    """TTF of one rod insert from its radial ESF over all its slices.

    Parameters
    ----------
    volume : Volume
    insert : Insert
        Approximate centre, radius and slices (``find_rod_inserts`` or the user's).
    settings : dict, optional
        Overrides of :data:`DEFAULTS`.
    allowed : ndarray of bool (y, x), optional
        Pixels that may be used (e.g. inside the phantom); others count as a border.
    others : sequence of Insert
        Other inserts whose discs (plus 1 mm) are kept out of this edge's ESF.

    Returns
    -------
    EdgeMeasurement
        ``reliable`` is false, with a reason, when the edge region reaches a border,
        the contrast-to-noise is below ``min_contrast_to_noise`` or there are fewer than
        ``min_slices`` slices.

    References
    ----------
    Richard et al., Med Phys 39(7) 2012; AAPM TG-233 (2019); Cunningham & Fenster,
    Med Phys 14(4) 1987.
    """
    return measure_circular_edges(volume, [insert], settings, allowed=allowed, others=others)[0]


def measure_circular_edges(
    volume: Volume,
    inserts: Sequence[Insert],
    settings: dict[str, Any] | None = None,
    *,
    allowed: np.ndarray | None = None,
    others: Sequence[Insert] = (),
) -> list[EdgeMeasurement]:
    """:func:`measure_circular_edge` of several rods, measured together: the centre
    refinement of all their sub-stack mean images runs as one vectorised iteration
    (:func:`reconaudit.checker.analyses._edges.refine_circle_centres_of_stacks`; the same
    fixed point for each image as refined alone), their ESFs are binned with one
    ``np.bincount`` (:func:`_centred_esfs`), and their ESFs are conditioned,
    differentiated, windowed and Fourier transformed as the rows of 2-D arrays
    (:func:`_ttf_curves`). Each rod's record is the one it gets measured alone (the same
    arithmetic row by row, up to the order of a few sums; tests/checker/test_ttf.py).

    ``allowed`` applies to every rod (pass None for rods the user placed).

    References
    ----------
    Richard et al., Med Phys 39(7) 2012; AAPM TG-233 (2019); Cunningham & Fenster,
    Med Phys 14(4) 1987.
    """
    s = resolve_settings(settings)
    sy, sx = volume.spacing_mm[1], volume.spacing_mm[2]
    px = 0.5 * (sy + sx)
    prepared = []
    for insert in inserts:
        r_px = insert.radius_mm / px
        half_mm = min(float(s["esf_half_range_mm"]), 0.9 * insert.radius_mm)
        # the rod's pixels are read where they are (the copy made when its slices were
        # found): the run sums accumulate in float64, the side noise casts its few
        # gathered pixels, so no float64 copy of the whole crop is made
        y0, x0, crop = _crop_from(insert.pixels, volume.hu, insert.z0, insert.z1, insert.centre_yx_vox,
                                  r_px + half_mm / px + 3)
        c_local = (insert.centre_yx_vox[0] - y0, insert.centre_yx_vox[1] - x0)
        prepared.append((insert, y0, x0, crop, half_mm, _run_images(crop, c_local, r_px, px)))
    if not prepared:
        return []
    runs = [p[5] for p in prepared]
    per_rod = _edges.refine_circle_centres_of_stacks(
        [ri.images for ri in runs], [ri.start for ri in runs], [ri.r_px for ri in runs],
        [ri.inside_hu for ri in runs], [ri.outside_hu for ri in runs], [ri.reach_px for ri in runs])
    lines = _centre_lines(runs, per_rod, [p[3].shape[0] for p in prepared])
    rods = [_rod_geometry(volume, insert, y0, x0, crop, half_mm, ri, centres, s, allowed, others)
            for (insert, y0, x0, crop, half_mm, ri), centres in zip(prepared, lines)]
    pixels = _rod_pixels([r.pool for r in rods], [r.free for r in rods])
    radii_in = [r.insert.radius_mm for r in rods]
    for rod, reach_mm in zip(rods, _free_reaches_mm(pixels, radii_in).tolist()):
        _shorten_to_free_reach(rod, reach_mm, s, px)
    halves = [r.half_mm for r in rods]
    group, radii = _centred_esfs(pixels, radii_in, halves, px * float(s["bin_fraction"]))
    curves = _ttf_curves(group, s, 0.5 / px)
    measured = _contrasts_and_noises([r.crop for r in rods], pixels, radii, halves, px)
    out = []
    for j, (rod, radius_mm, (used, curve), (contrast, noise)) in enumerate(zip(rods, radii.tolist(), curves, measured)):
        mean_yx = rod.centres.mean(axis=0)
        centre_zyx = (0.5 * (rod.insert.z0 + rod.insert.z1), float(mean_yx[0]) + rod.y0, float(mean_yx[1]) + rod.x0)
        extra = {"radius_mm": round(radius_mm, 3), "source": rod.insert.source}
        out.append(_edge_record("circular", volume, group.row(j), used, curve, contrast,
                                rod.ri.inside_hu if contrast else float("nan"), noise,
                                (rod.insert.z0, rod.insert.z1), centre_zyx, s, rod.problems, extra))
    return out


@dataclass
class RodGeometry:
    """What a rod's ESF is binned from (:func:`_rod_geometry`)."""

    insert: Insert
    y0: int  # the crop's first row and column in the image
    x0: int
    crop: np.ndarray  # (z, y, x) the rod's slices about it
    ri: "RunImages"
    centres: np.ndarray  # (z, 2) every slice's centre (crop indices)
    pool: "PooledSlices"
    free: np.ndarray  # (y, x) pixels the ESF may use
    half_mm: float  # half range of the ESF
    problems: list[str]


def _rod_geometry(volume: Volume, insert: Insert, y0: int, x0: int, crop: np.ndarray, half_mm: float,
                  ri: RunImages, centres: np.ndarray, s: dict[str, Any], allowed: np.ndarray | None,
                  others: Sequence[Insert]) -> RodGeometry:
    """A rod once its slices' centres are known (:func:`_centre_lines`): pooled slices
    and free pixels (the ESF's half range ``half_mm`` as asked;
    :func:`_shorten_to_free_reach` shortens it where the free region ends before it)."""
    sy, sx = volume.spacing_mm[1], volume.spacing_mm[2]
    px = 0.5 * (sy + sx)
    free = _free_mask(crop.shape[1:], (y0, x0), volume.hu.shape[1:], insert, others, allowed, px)
    pool = _pool_slices(crop, centres, (sy, sx), float(s["bin_fraction"]), total=ri.total)
    return RodGeometry(insert, y0, x0, crop, ri, centres, pool, free, half_mm, [])


@dataclass
class RodPixels:
    """Every rod's pooled pixels laid end to end, so that one pass of each operation
    serves all rods: rod j's pixels (all its groups, each group's (y, x) image in
    row-major order, as ``pool.dist[g].ravel()``) are ``starts[j]`` ..
    ``starts[j] + sizes[j]`` - 1.

    Attributes
    ----------
    which : ndarray of int (n,)
        The rod of each pixel.
    dist, sums, mult : ndarray (n,)
        Distance (mm) to its group's centre, sum over its group's slices, and the group's
        slice count (float).
    free : ndarray of bool (n,)
        Whether the pixel may be used (the rod's free mask, the same for all its groups).
    starts, sizes : list of int
    planes : list of int
        Pixels of one group's image, rod by rod.
    """

    which: np.ndarray
    dist: np.ndarray
    sums: np.ndarray
    mult: np.ndarray
    free: np.ndarray
    starts: list[int]
    sizes: list[int]
    planes: list[int]


def _rod_pixels(pools: Sequence[PooledSlices], frees: Sequence[np.ndarray]) -> RodPixels:
    """:class:`RodPixels` of the rods' pooled slices and free masks."""
    sizes = [p.dist.size for p in pools]
    planes = [p.dist[0].size for p in pools]
    starts = [0]
    for size in sizes[:-1]:
        starts.append(starts[-1] + size)
    return RodPixels(
        which=np.repeat(np.arange(len(pools)), sizes),
        dist=np.concatenate([p.dist.ravel() for p in pools]),
        sums=np.concatenate([p.sums.ravel() for p in pools]),
        mult=np.concatenate([np.repeat(p.n_slices.astype(float), plane) for p, plane in zip(pools, planes)]),
        free=np.concatenate([np.broadcast_to(f, p.dist.shape).ravel() for f, p in zip(frees, pools)]),
        starts=starts, sizes=sizes, planes=planes)


def _centred_esf(pool: PooledSlices, free: np.ndarray, radius_mm: float, half_mm: float,
                 bin_mm: float) -> tuple[BinnedEsf, float]:
    """The rod's ESF over +/- ``half_mm`` about its measured edge radius, from one
    binning, and that radius (:func:`_centred_esfs` of one rod).

    References
    ----------
    Richard et al., Med Phys 39(7) 2012 (radial ESF about the edge radius).
    """
    esfs, radii = _centred_esfs(_rod_pixels([pool], [free]), [radius_mm], [half_mm], bin_mm)
    return esfs.row(0), float(radii[0])


def _centred_esfs(pixels: RodPixels, radii_mm: Sequence[float], halves_mm: Sequence[float],
                  bin_mm: float) -> tuple[BinnedEsfs, np.ndarray]:
    """Each rod's ESF over +/- its ``halves_mm`` about its measured edge radius, all
    from one binning (row j: rod j), and those radii.

    For each rod, the pixels within 1.5 ``half_mm`` of ``radius_mm`` are binned once, on
    bins aligned with those of the range about ``radius_mm`` and reaching half a range
    (rounded up to whole bins) beyond it on both sides. The ESF of the range about
    ``radius_mm`` gives the edge's offset; the range is then moved by that offset
    rounded to whole bins (so its bins are bins of the one binning, at most half a bin
    from a range centred exactly) and its ESF's own centre corrects the radius. An
    offset of more than half the range keeps the first range and radius. A method choice
    for speed (one binning instead of one per range): the ESF window is placed on the
    edge to half a bin (a twentieth of a pixel), the radius is measured to the same
    precision as before. The pixels of every rod (all its pooled groups, laid end to end
    in ``pixels``) are binned with one ``np.bincount`` into bins offset rod by rod
    (:class:`reconaudit.checker.analyses._edges.EsfAccumulators`); the ranges, their
    centres and the moves are computed for all rods at once (rows of
    :class:`reconaudit.checker.analyses._edges.BinnedEsfs`, each of its rod's length).

    References
    ----------
    Richard et al., Med Phys 39(7) 2012 (radial ESF about the edge radius).
    """
    k = len(pixels.sizes)
    half = np.asarray(halves_mm, dtype=float)
    radii = np.asarray(radii_mm, dtype=float)
    # the bins of each range, as EsfAccumulator counts them, and the bins beyond it on each side
    ns = np.array([max(int(math.floor((h - (-h)) / bin_mm)), 1) for h in half.tolist()], dtype=np.int64)
    extra = np.array([int(math.ceil(0.5 * h / bin_mm)) for h in half.tolist()], dtype=np.int64)
    acc = _edges.EsfAccumulators(bin_mm=bin_mm, lo_mm=-half - extra * bin_mm, hi_mm=-half + (ns + extra) * bin_mm)
    d = pixels.dist - np.repeat(radii, pixels.sizes)
    near = pixels.free & (np.abs(d) < np.repeat(1.5 * half, pixels.sizes))
    acc.add(pixels.which, d, pixels.sums, near, multiplicity=pixels.mult)
    first = acc.binned_ranges(extra, ns)
    shift = _esf_centres_or_zero(first)
    # a range whose edge is more than half the range away stays (q = 0): its second range
    # is its first, whose centre is as far, so its radius stays too
    q = np.where(np.abs(shift) <= 0.5 * half, np.clip(np.rint(shift / bin_mm), -extra, extra), 0).astype(np.int64)
    second = acc.binned_ranges(extra + q, ns, offsets_mm=q * bin_mm)
    shift = _esf_centres_or_zero(second)
    radii = radii + q * bin_mm
    return second, np.where(np.abs(shift) <= 0.5 * half, radii + shift, radii)


def _esf_centres_or_zero(esfs: BinnedEsfs) -> np.ndarray:
    """The centre (mm, :func:`_edges.esf_shapes`) of every row's ESF, 0 where it has none."""
    c = _edges.esf_shapes(esfs).centre_mm
    return np.where(np.isfinite(c), c, 0.0)


def _ttf_curves(esfs: BinnedEsfs, s: dict[str, Any], nyquist: float) -> list[tuple[str, TtfCurve]]:
    """The conditioning used and the TTF of every row of ``esfs``, as :func:`_edge_result`
    computes them for one ESF: all rows at once (:func:`_edges.condition_esfs`,
    :func:`_edges.ttf_from_esfs`) when every row has at least 10 pixels and finite bins
    and the rows' FFTs are of one length, else row by row."""
    fft_lengths = {_edges._fft_length(_edges.PAD_TO_MM, esfs.bin_mm, int(n)) for n in (esfs.lengths.min(), esfs.lengths.max())}
    regular = ((esfs.counts.sum(axis=1) >= 10).all() and np.isfinite(esfs.esf_hu).all() and (esfs.lengths >= 2).all()
               and len(fft_lengths) == 1)
    if not regular:
        return [_ttf_curve(esfs.row(j), s, nyquist) for j in range(len(esfs))]
    conditioned, used = _edges.condition_esfs(esfs, s["esf_conditioning"])
    curves = _edges.ttf_from_esfs(conditioned, window_widths=float(s["lsf_window_widths"]),
                                  max_frequency_per_mm=nyquist)
    return list(zip(used, curves))


#: Largest distance (in ESF bins) between the centres of two slices pooled into one group
#: before binning, so also between a slice's centre and its group's (see :func:`_pool_slices`).
POOL_TOLERANCE_BINS = 0.2


@dataclass
class PooledSlices:
    """A rod's crop stack pooled into groups of consecutive slices whose centres agree.

    Attributes
    ----------
    starts : ndarray of int (g,)
        First slice (crop index) of each group; a group runs to the next start.
    n_slices : ndarray of int (g,)
        Slices in each group.
    sums : ndarray (g, y, x), float64
        Sum over each group's slices of every pixel.
    dist : ndarray (g, y, x)
        Distance (mm) of every pixel to the group's centre.
    """

    starts: np.ndarray
    n_slices: np.ndarray
    sums: np.ndarray
    dist: np.ndarray

    def slices(self, g: int) -> slice:
        """The crop slices of group ``g``."""
        start = int(self.starts[g])
        return slice(start, start + int(self.n_slices[g]))


def _pool_slices(crop: np.ndarray, centres: Sequence[tuple[float, float]] | np.ndarray, spacing_yx_mm: tuple[float, float],
                 bin_fraction: float, *, total: np.ndarray | None = None) -> PooledSlices:
    """Pool consecutive slices whose centres lie within ``POOL_TOLERANCE_BINS`` ESF bins
    of each other (so within that of their group's centre, the mean of theirs).

    The radial ESF is a sum over pixels binned by distance; pixels of the slices of one
    group at the same (y, x) have the same distance to the group's centre, so summing
    them first and binning the sum once with its slice count gives the bins of the
    slice-by-slice binning about that centre. The only departure is the centre: each
    slice's distance is taken to the group's centre instead of its own, which moves a
    pixel's distance by at most the tolerance (a fifth of a bin, 0.02 px at the default
    bin width): a method choice that makes the ESF of a straight rod one binning of one
    summed image instead of one per slice. A tilted rod (centre moving by more than the
    tolerance from slice to slice) keeps one group per slice, as before. ``total``, the
    float64 sum of all the crop's slices when the caller has it, is taken as the sum of
    a group that holds every slice (not summed again).

    References
    ----------
    Richard et al., Med Phys 39(7) 2012 (radial ESF from every pixel about the centre).
    """
    c = np.asarray(centres, dtype=float).reshape(-1, 2)
    tol_px = POOL_TOLERANCE_BINS * bin_fraction
    span = c.max(axis=0) - c.min(axis=0)
    if math.hypot(float(span[0]), float(span[1])) <= tol_px:  # all in one group: the loop would not split
        n1 = np.array([c.shape[0]], dtype=np.int64)
        sums = total[None] if total is not None else crop.sum(axis=0, dtype=np.float64)[None]
        return PooledSlices(np.zeros(1, dtype=np.int64), n1, sums,
                            _radial_distance_stack(crop.shape[1:], c.mean(axis=0)[None], spacing_yx_mm))
    starts = [0]
    ys, xs = c[:, 0].tolist(), c[:, 1].tolist()
    lo_y = hi_y = ys[0]
    lo_x = hi_x = xs[0]
    for k in range(1, len(ys)):
        lo_y, hi_y, lo_x, hi_x = min(lo_y, ys[k]), max(hi_y, ys[k]), min(lo_x, xs[k]), max(hi_x, xs[k])
        if math.hypot(hi_y - lo_y, hi_x - lo_x) > tol_px:  # the group's box diagonal (>= its diameter)
            starts.append(k)
            lo_y = hi_y = ys[k]
            lo_x = hi_x = xs[k]
    starts_a = np.asarray(starts, dtype=np.int64)
    n = np.diff(np.append(starts_a, c.shape[0]))
    if total is not None and n.size == 1:
        sums = total[None]
    else:
        sums = np.stack([crop[s0 : s0 + k].sum(axis=0, dtype=np.float64) for s0, k in zip(starts_a, n)])
    mids = np.stack([c[s0 : s0 + k].mean(axis=0) for s0, k in zip(starts_a, n)])
    return PooledSlices(starts_a, n, sums, _radial_distance_stack(crop.shape[1:], mids, spacing_yx_mm))


def _radial_distance_stack(shape: tuple[int, int], centres: Sequence[tuple[float, float]] | np.ndarray,
                           spacing_yx_mm: tuple[float, float]) -> np.ndarray:
    """Distance (mm) of every pixel of a (y, x) crop to each centre: (n, y, x)."""
    c = np.asarray(centres, dtype=float)
    dy = (np.arange(shape[0])[None, :, None] - c[:, 0, None, None]) * spacing_yx_mm[0]
    dx = (np.arange(shape[1])[None, None, :] - c[:, 1, None, None]) * spacing_yx_mm[1]
    return np.sqrt(dy * dy + dx * dx)


def _free_mask(shape: tuple[int, int], origin: tuple[int, int], full_shape: tuple[int, int], insert: Insert,
               others: Sequence[Insert], allowed: np.ndarray | None, px: float) -> np.ndarray:
    """Crop pixels usable for this edge: in the allowed area, the user's ROI and away from other inserts."""
    y0, x0 = origin
    free = np.ones(shape, dtype=bool)
    if allowed is not None:
        free &= allowed[y0 : y0 + shape[0], x0 : x0 + shape[1]]
    if insert.limit is not None:
        ly0, lx0, ly1, lx1 = insert.limit
        yy, xx = np.indices(shape)
        free &= (yy + y0 >= ly0) & (yy + y0 < ly1) & (xx + x0 >= lx0) & (xx + x0 < lx1)
    for other in others:
        if other is insert:
            continue
        c = (other.centre_yx_vox[0] - y0, other.centre_yx_vox[1] - x0)
        r = other.radius_mm / px + 1.0 / px
        # nearest crop pixel to the other disc's centre: a disc that misses it misses the crop
        gy, gx = max(-c[0], 0.0, c[0] - (shape[0] - 1)), max(-c[1], 0.0, c[1] - (shape[1] - 1))
        if gy * gy + gx * gx <= r * r:
            free &= ~_disc(shape, c, r)
    # the crop itself ends at the image border: mark the border ring as not free
    edge = np.zeros(shape, dtype=bool)
    if y0 == 0 or x0 == 0 or y0 + shape[0] >= full_shape[0] or x0 + shape[1] >= full_shape[1]:
        edge[[0, -1], :] = True
        edge[:, [0, -1]] = True
    return free & ~edge


def _free_reaches_mm(pixels: RodPixels, radii_mm: Sequence[float]) -> np.ndarray:
    """How far beyond its edge (outwards) each rod's region stays free, on every slice:
    the least distance of a pixel that is not free, less the radius (inf where every
    pixel is free); one minimum over each rod's pixels."""
    blocked = np.where(pixels.free, np.inf, pixels.dist)
    return np.minimum.reduceat(blocked, pixels.starts) - np.asarray(radii_mm, dtype=float)


def _shorten_to_free_reach(rod: RodGeometry, reach_mm: float, s: dict[str, Any], px: float) -> None:
    """Shorten the rod's ESF half range to ``reach_mm`` (at least a pixel) where the free
    region ends before it, with a problem when less than ``min_half_range_mm`` is free."""
    if reach_mm < rod.half_mm:
        if reach_mm < float(s["min_half_range_mm"]):
            rod.problems.append(
                f"the insert touches the border of its region (ROI, phantom or another insert): "
                f"{max(reach_mm, 0):.1f} mm free beyond the edge, {s['min_half_range_mm']:g} mm needed"
            )
        rod.half_mm = max(reach_mm, px)


@dataclass
class RunImages:
    """What the centre line of a rod is refined from (:func:`_run_images`)."""

    runs: list[np.ndarray]  # crop slice indices of each run
    sizes: np.ndarray  # slices in each run (float)
    images: np.ndarray  # (runs, y, x) mean image of each run (the crop itself when a run is a slice)
    total: np.ndarray  # float64 sum of all the crop's slices
    start: tuple[float, float]  # where the refinement starts (crop indices)
    r_px: float
    inside_hu: float
    outside_hu: float
    reach_px: float


def _run_images(crop: np.ndarray, centre: tuple[float, float], r_px: float, px: float,
                groups: int = 3) -> RunImages:
    """The sub-stack mean images a rod's centre line is refined from, and the inside and
    outside CT numbers of its disc (medians inside 0.6 r and on the ring r + 2 mm ..
    r + 4 mm of the mean of all slices).

    The centre line: the rod's slices are split into at most ``groups`` (3) contiguous
    runs; the centre is refined once on each run's mean image (all runs of all rods
    together, in :func:`measure_circular_edges`), and a straight line through the run
    centres along z (weighted by their slice counts) gives every slice's centre; a rod
    of fewer slices than ``groups`` takes each run's centre for its slices. A method
    choice for speed: a rod is straight, so its centre line needs only a few points, and
    each run's mean has the noise of one slice lowered by the square root of its slice
    count, which makes each refinement more stable than a per-slice one. When the line
    moves by less than the pooling tolerance over the rod, :func:`_pool_slices` makes
    one group of all slices about its mean (the ESF of all slices is then one binning of
    the summed image).

    References
    ----------
    Richard et al., Med Phys 39(7) 2012 (radial ESF about the sub-pixel rod centre);
    common practice, no source (centroid refinement, straight line along z).
    """
    nz = crop.shape[0]
    runs = _split_runs(nz, min(groups, nz))
    run_sums = _run_sums(crop, runs)
    total = run_sums.sum(axis=0)
    first = total / nz
    d2 = (np.arange(first.shape[0]) - centre[0])[:, None] ** 2 + (np.arange(first.shape[1]) - centre[1])[None, :] ** 2
    core = d2 <= (0.6 * r_px) ** 2
    inside_hu = _edges._median(first[core]) if core.any() else float(first.mean())
    ring = (d2 >= (r_px + 2.0 / px) ** 2) & (d2 <= (r_px + 4.0 / px) ** 2)
    outside_hu = _edges._median(first[ring]) if ring.any() else _edges._median(first.ravel())
    reach = min(3.0 / px, 0.5 * r_px + 1)
    sizes = np.array([r.size for r in runs], dtype=float)
    images = crop if len(runs) == nz else run_sums / sizes[:, None, None]
    return RunImages(runs, sizes, images, total, (float(centre[0]), float(centre[1])), float(r_px),
                     inside_hu, outside_hu, float(reach))


#: A rod's fitted tilt counts only when it exceeds this many of its standard errors
#: (:func:`_tilt_is_significant`); otherwise its centre line is its mean centre.
TILT_SIGNIFICANCE = 3.0


def _split_runs(nz: int, k: int) -> list[np.ndarray]:
    """``np.array_split(np.arange(nz), k)`` (the first ``nz % k`` runs one slice longer),
    without its generic splitting."""
    size, extra = divmod(nz, k)
    bounds = [0]
    for i in range(k):
        bounds.append(bounds[-1] + size + (1 if i < extra else 0))
    return [np.arange(a, b) for a, b in zip(bounds[:-1], bounds[1:])]


def _centre_line(ri: RunImages, per: np.ndarray, nz: int) -> np.ndarray:
    """Every slice's centre (nz, 2) from the run centres ``per`` (runs, 2): a straight
    line along z through them (weighted by their slice counts), or each run's centre for
    its slices when there is one run.

    With three or more runs the line's tilt is kept only when it is significant
    (:func:`_tilt_is_significant`); a tilt within the scatter of the run centres about
    the line is noise, and every slice then takes the line's mean centre (the weighted
    mean of the run centres, where the line passes at the rod's middle slice). A method
    choice: the centre of a straight rod in noise is then not
    tilted by the noise of its run centres, so its slices pool into one group
    (:func:`_pool_slices`) instead of being split by a noise tilt of a few hundredths of
    a pixel; a tilted rod keeps its line (tests/checker/test_ttf.py).
    """
    if len(per) >= 2:
        z = np.arange(nz, dtype=float)
        mid_z = np.array([float(r[0]) for r in ri.runs]) + 0.5 * (ri.sizes - 1.0)  # each run's mean slice, exactly
        if len(per) >= 3 and not _tilt_is_significant(mid_z, per, ri.sizes):
            mean = ri.sizes @ per / ri.sizes.sum()
            return np.repeat(mean[None], nz, axis=0)
        return _line_along_z(mid_z, per, ri.sizes, z)
    return np.concatenate([np.repeat(p[None], r.size, axis=0) for p, r in zip(per, ri.runs)])


def _centre_lines(ris: Sequence[RunImages], pers: Sequence[np.ndarray], nzs: Sequence[int]) -> list[np.ndarray]:
    """:func:`_centre_line` of several rods: the tilt tests and mean centres of the rods
    of three runs (every rod of three slices or more) at once
    (:func:`_tilts_are_significant`), the others one by one."""
    out: list[np.ndarray | None] = [None] * len(ris)
    three = [j for j, per in enumerate(pers) if len(per) == 3]
    if three:
        w = np.stack([ris[j].sizes for j in three])
        zc = np.array([[float(r[0]) for r in ris[j].runs] for j in three]) + 0.5 * (w - 1.0)  # runs' mean slices
        yx = np.stack([pers[j] for j in three])
        significant = _tilts_are_significant(zc, yx, w).tolist()
        means = np.einsum("kn,knc->kc", w, yx) / w.sum(axis=1)[:, None]
        for i, j in enumerate(three):
            out[j] = (_line_along_z(zc[i], yx[i], w[i], np.arange(nzs[j], dtype=float)) if significant[i]
                      else np.repeat(means[i][None], nzs[j], axis=0))
    return [line if line is not None else _centre_line(ri, per, nz) for line, ri, per, nz in zip(out, ris, pers, nzs)]


def _tilt_is_significant(zc: np.ndarray, yx: np.ndarray, weights: np.ndarray) -> bool:
    """Whether the weighted least-squares tilt of the points ``yx`` (n >= 3, 2) at ``zc``
    exceeds ``TILT_SIGNIFICANCE`` standard errors.

    Each point is the mean centre of ``weights`` slices, so its variance is taken as
    sigma^2 / weight; sigma^2 is estimated from the weighted residuals about the line,
    pooled over both coordinates (2 (n - 2) degrees of freedom), and the standard error
    of each slope component is sigma / sqrt(sum w (z - z_mean)^2). The tilt is the
    length of the slope vector. Residuals of exactly zero (a noiseless line) make any
    tilt significant.

    References
    ----------
    Draper NR, Smith H. Applied Regression Analysis, 3rd ed. Wiley, 1998 (weighted least
    squares, standard error of the slope).
    """
    zc, yx, w = (np.asarray(a, dtype=float)[None] for a in (zc, yx, weights))
    return bool(_tilts_are_significant(zc, yx, w)[0])


def _tilts_are_significant(zc: np.ndarray, yx: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """:func:`_tilt_is_significant` of several rods at once: ``zc`` and ``weights`` (k, n),
    ``yx`` (k, n, 2), n >= 3; (k,) bool.

    References
    ----------
    Draper NR, Smith H. Applied Regression Analysis, 3rd ed. Wiley, 1998 (weighted least
    squares, standard error of the slope).
    """
    w = weights
    w_sum = w.sum(axis=1)
    dz = zc - ((w * zc).sum(axis=1) / w_sum)[:, None]
    sxx = (w * dz * dz).sum(axis=1)
    safe_sxx = np.where(sxx > 0, sxx, 1.0)
    mean = np.einsum("kn,knc->kc", w, yx) / w_sum[:, None]  # einsum: no BLAS threads
    slope = np.einsum("kn,knc->kc", w * dz, yx - mean[:, None, :]) / safe_sxx[:, None]
    resid = yx - mean[:, None, :] - dz[:, :, None] * slope[:, None, :]
    sigma2 = (w[:, :, None] * resid * resid).sum(axis=(1, 2)) / (2 * (zc.shape[1] - 2))
    tilt2 = slope[:, 0] * slope[:, 0] + slope[:, 1] * slope[:, 1]
    return (sxx > 0) & (tilt2 > TILT_SIGNIFICANCE**2 * sigma2 / safe_sxx)


def _run_sums(crop: np.ndarray, runs: Sequence[np.ndarray]) -> np.ndarray:
    """Float64 sum of the crop's slices over each run of consecutive slices: (runs, y, x)
    (the crop may be a strided view; each run's sum accumulates in float64)."""
    return np.stack([crop[int(r[0]) : int(r[-1]) + 1].sum(axis=0, dtype=np.float64) for r in runs])


def _line_along_z(zc: np.ndarray, yx: np.ndarray, weights: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Weighted least-squares straight line through the points ``yx`` (n, 2) at ``zc``
    (weights: the number of slices behind each point), both coordinates at once,
    evaluated at ``z``: (len(z), 2)."""
    zm = float(np.dot(weights, zc) / weights.sum())
    dz = zc - zm
    mean = weights @ yx / weights.sum()
    slope = (weights * dz) @ (yx - mean) / float(np.dot(weights, dz * dz))
    return mean[None, :] + (z - zm)[:, None] * slope[None, :]


#: Most slices of each pooled group whose side pixels enter the noise estimate of
#: :func:`_contrasts_and_noises` (evenly spread over the group).
NOISE_SLICES_PER_GROUP = 8


def _contrasts_and_noises(crops: Sequence[np.ndarray], pixels: RodPixels, radii_mm: Sequence[float] | np.ndarray,
                          halves_mm: Sequence[float], px: float) -> list[tuple[float, float]]:
    """Each rod's insert minus background mean, and its pooled per-slice pixel noise of
    both sides (each slice's side about its own mean).

    Both sides are taken at least two pixels and a third of the range away from the edge
    (distances to the centre of each slice's group, :func:`_pool_slices`). The contrast
    is the mean of every slice's side pixels, read from the groups' slice sums
    (``pixels.sums``; one ``np.add.reduceat`` per side and sum serves all rods). The noise
    is a subsampled statistic (a method choice for speed): the side pixels of at most
    ``NOISE_SLICES_PER_GROUP`` slices of each group, evenly spread, each slice about
    its own mean (about 1e4 pixels for a 12 mm rod, a relative standard error of the
    noise below 1 %); the sums run in float64.

    References
    ----------
    AAPM TG-233 (2019) (contrast and noise of the insert and its background);
    common practice, no source (subsampled pixel standard deviation).
    """
    k = len(crops)
    radii = np.asarray(radii_mm, dtype=float)
    half = np.asarray(halves_mm, dtype=float)
    gap = np.maximum(2 * px, half / 3)
    d = pixels.dist
    inner = pixels.free & (d <= np.repeat(radii - gap, pixels.sizes))
    outer = pixels.free & (d >= np.repeat(radii + gap, pixels.sizes)) & (d <= np.repeat(radii + half, pixels.sizes))
    sums = []
    for side in (inner, outer):  # each rod's pixels are one segment: one reduceat a sum serves every rod
        sums.append((np.add.reduceat(np.where(side, pixels.mult, 0.0), pixels.starts).tolist(),
                     np.add.reduceat(np.where(side, pixels.sums, 0.0), pixels.starts).tolist()))
    out = []
    for j in range(k):
        (n_in, s_in), (n_out, s_out) = ((c[j], t[j]) for c, t in sums)
        if not n_in or not n_out:
            out.append((float("nan"), float("nan")))
            continue
        start, plane = pixels.starts[j], pixels.planes[j]
        out.append((s_in / n_in - s_out / n_out,
                    _side_noise(crops[j], inner[start : start + pixels.sizes[j]].reshape(-1, plane),
                                outer[start : start + pixels.sizes[j]].reshape(-1, plane),
                                pixels.mult[start : start + pixels.sizes[j] : plane])))
    return out


def _side_noise(crop: np.ndarray, inner: np.ndarray, outer: np.ndarray, n_slices: np.ndarray) -> float:
    """Pooled per-slice pixel noise of a rod's two sides: ``inner`` and ``outer`` (groups,
    y * x) are each group's side pixels, ``n_slices`` each group's slice count; at most
    ``NOISE_SLICES_PER_GROUP`` slices of each group, evenly spread, each slice's side
    about its own mean (see :func:`_contrasts_and_noises`)."""
    ss, n = 0.0, 0
    start = 0
    for g, count in enumerate(n_slices.astype(int).tolist()):
        sides = (np.flatnonzero(inner[g]), np.flatnonzero(outer[g]))
        rows = crop[_spread_slices(slice(start, start + count), NOISE_SLICES_PER_GROUP)]
        start += count
        flat = rows.reshape(rows.shape[0], -1)  # a copy of these slices only when the crop is a view
        both = flat.take(np.concatenate(sides), axis=1).astype(float, copy=False)  # one gather
        for j, idx in enumerate(sides):
            m = idx.size
            if m < 2:
                continue
            v = both[:, :m] if j == 0 else both[:, both.shape[1] - m :]
            dev = v - (v.sum(axis=1) / m)[:, None]
            ss += float(np.einsum("ij,ij->", dev, dev))  # no BLAS threads
            n += v.size
    return float(np.sqrt(ss / n)) if n > 1 else float("nan")


def _spread_slices(group: slice, most: int) -> slice:
    """At most ``most`` slices of the run ``group``, evenly spread (every k-th)."""
    count = group.stop - group.start
    step = max(1, -(-count // most))
    return slice(group.start, group.stop, step)


# =========================================================================== common record
def _edge_result(kind: str, volume: Volume, esf: BinnedEsf, contrast: float, insert_hu: float, noise: float,
                 slices: tuple[int, int], centre_zyx: tuple[float, float, float], s: dict[str, Any],
                 problems: list[str], extra: dict[str, Any]) -> EdgeMeasurement:
    """ESF -> TTF and the JSON record shared by all edge kinds."""
    nyquist = 0.5 / (0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2]))
    used, curve = _ttf_curve(esf, s, nyquist)
    return _edge_record(kind, volume, esf, used, curve, contrast, insert_hu, noise, slices, centre_zyx, s,
                        problems, extra)


def _ttf_curve(esf: BinnedEsf, s: dict[str, Any], nyquist: float) -> tuple[str, TtfCurve]:
    """The conditioning used and the TTF of one ESF (:func:`_safe_ttf` of the conditioned ESF)."""
    conditioned, used = condition_esf(esf, s["esf_conditioning"]) if esf.counts.sum() else (esf, "none")
    return used, _safe_ttf(conditioned, s, nyquist)


def _edge_record(kind: str, volume: Volume, esf: BinnedEsf, used: str, curve: TtfCurve, contrast: float,
                 insert_hu: float, noise: float, slices: tuple[int, int], centre_zyx: tuple[float, float, float],
                 s: dict[str, Any], problems: list[str], extra: dict[str, Any]) -> EdgeMeasurement:
    """The JSON record of an edge whose ESF ``esf`` gave ``curve`` (conditioned by ``used``)."""
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    nyquist = 0.5 / px
    problems = list(problems) + _reliability_problems(contrast, noise, slices, esf, curve, s, nyquist)
    cnr = abs(contrast) / noise if noise and np.isfinite(noise) and noise > 0 else float("nan")
    label = _edge_label(kind, contrast, curve.f50_per_mm)
    record = {
        "kind": kind,
        "label": label,
        "contrast_hu": _round(contrast, 1),
        "insert_hu": _round(insert_hu, 1),
        "noise_hu": _round(noise, 2),
        "contrast_to_noise": _round(cnr, 2),
        "f50_per_mm": _round(curve.f50_per_mm, 4),
        "f10_per_mm": _round(curve.f10_per_mm, 4),
        "frequency_per_mm": _rounded_list(curve.frequency_per_mm, 4),
        "ttf": _rounded_list(curve.ttf, 4),
        "center_mm": [round(float(v), 3) for v in volume.index_to_patient(centre_zyx)],
        "slices": [int(slices[0]), int(slices[1])],
        "n_slices": int(slices[1] - slices[0] + 1),
        "esf_conditioning": used,
        "bin_mm": round(esf.bin_mm, 5),
        "lsf_window_mm": _round(curve.lsf_window_mm, 3),
        **extra,
        "reliable": not problems,
        "reason": "; ".join(problems),
    }
    return EdgeMeasurement(record, centre_zyx, curve.notes)


def _safe_ttf(esf: BinnedEsf, s: dict[str, Any], nyquist: float) -> TtfCurve:
    if esf.counts.sum() < 10 or not np.all(np.isfinite(esf.esf_hu)):
        nan = float("nan")
        return TtfCurve(np.array([]), np.array([]), nan, nan, nan, ["too few pixels on the edge"])
    return ttf_from_esf(esf, window_widths=float(s["lsf_window_widths"]), max_frequency_per_mm=nyquist)


def _reliability_problems(contrast: float, noise: float, slices: tuple[int, int], esf: BinnedEsf,
                          curve: TtfCurve, s: dict[str, Any], nyquist: float) -> list[str]:
    out = []
    n_slices = slices[1] - slices[0] + 1
    if not np.isfinite(contrast) or not np.isfinite(noise):
        out.append("contrast or noise not measurable (too few pixels on one side of the edge)")
    elif noise > 0 and abs(contrast) / noise < float(s["min_contrast_to_noise"]):
        out.append(f"contrast-to-noise {abs(contrast) / noise:.1f} below {s['min_contrast_to_noise']:g}: "
                   "the TTF would not be stable")
    elif noise == 0 and contrast == 0:
        out.append("no contrast across the edge")
    if n_slices < int(s["min_slices"]):
        out.append(f"{n_slices} slice(s); at least {int(s['min_slices'])} needed for a stable estimate")
    if esf.empty_fraction > 0.3:
        out.append(f"{esf.empty_fraction:.0%} of the ESF bins are empty (too little oversampling)")
    if not np.isfinite(curve.f50_per_mm) or curve.f50_per_mm > nyquist:
        out.append("the TTF does not fall to 0.5 below the Nyquist frequency")
    return out


def _edge_label(kind: str, contrast: float, f50: float) -> str:
    c = "?" if not np.isfinite(contrast) else f"{contrast:+.0f} HU"
    f = "f50 ?" if not np.isfinite(f50) else f"f50 {f50:.3f}/mm"
    return f"{kind} {c}, {f}"


def _rounded_list(values: np.ndarray, nd: int) -> list[float | None]:
    """``values`` rounded to ``nd`` decimals (one vectorised rounding), None where not
    finite, as a list for the JSON record."""
    v = np.asarray(values, dtype=float)
    out = np.round(v, nd).tolist()
    if not np.isfinite(v).all():
        out = [x if math.isfinite(x) else None for x in out]
    return out


def _round(v: float, nd: int) -> float | None:
    return None if v is None or not np.isfinite(v) else round(float(v), nd)


# =========================================================================== straight edge
def straight_edge_ttf(volume: Volume, roi: Roi, settings: dict[str, Any] | None = None) -> EdgeMeasurement:
    """TTF of a slanted straight edge inside ``roi`` (all its slices).

    The edge line is fitted on the slice mean (per-row derivative centroids, ISO 12233);
    every pixel of every slice is projected onto the edge normal and binned at
    ``bin_fraction`` of a pixel (at least 4x oversampling).

    Returns
    -------
    EdgeMeasurement
        Its record also gives ``angle_deg`` (project convention); an edge within 1 degree
        of the pixel grid is not reliable (the projection would not fill the bins).

    References
    ----------
    ISO 12233:2017 slanted-edge SFR; IEC 62220-1-1:2015 (edge method);
    Cunningham & Fenster, Med Phys 14(4) 1987.
    """
    s = resolve_settings(settings)
    stack = volume.hu[roi.z0 : roi.z1 + 1, roi.y0 : roi.y1, roi.x0 : roi.x1]
    if stack.shape[1] < 8 or stack.shape[2] < 8:
        raise ProfileError(f"ttf: straight-edge ROI {roi.to_json()} is smaller than 8 x 8 pixels")
    sy, sx = volume.spacing_mm[1], volume.spacing_mm[2]
    px = 0.5 * (sy + sx)
    slope, intercept, transposed = _edges.fit_straight_edge(stack.mean(axis=0))
    d = _edges.straight_edge_distances(stack.shape[1:], slope, intercept, transposed, px)
    angle = _edges.edge_angle_deg(slope, transposed)
    half = min(float(s["esf_half_range_mm"]), _half_span_mm(d))
    dist = np.broadcast_to(d, stack.shape)
    esf = bin_esf(dist, stack, bin_mm=px * float(s["bin_fraction"]), lo_mm=-half, hi_mm=half)
    contrast, noise, high = _straight_contrast(stack, dist, half, px)
    problems = []
    tilt = math.degrees(math.atan(abs(slope)))
    if tilt < 1.0:
        problems.append(f"edge {tilt:.2f} deg from the pixel grid; tilt it by 3-10 deg for the oversampled projection")
    centre = (0.5 * (roi.z0 + roi.z1), roi.y0 + 0.5 * (stack.shape[1] - 1), roi.x0 + 0.5 * (stack.shape[2] - 1))
    extra = {"angle_deg": round(angle, 3), "source": "roi"}
    return _edge_result("straight", volume, esf, contrast, high, noise, (roi.z0, roi.z1), centre, s, problems, extra)


def _half_span_mm(d: np.ndarray) -> float:
    """Largest half-range fully covered on both sides of the edge."""
    return float(min(d.max(), -d.min()))


def _straight_contrast(stack: np.ndarray, dist: np.ndarray, half: float, px: float) -> tuple[float, float, float]:
    """Bright-side minus dark-side mean (as the positive-distance side minus the other),
    pooled residual noise, and the positive side's mean."""
    gap = max(2 * px, half / 3)
    pos, neg = (dist >= gap) & (dist <= half), (dist <= -gap) & (dist >= -half)
    if not pos.any() or not neg.any():
        return float("nan"), float("nan"), float("nan")
    res = []
    for k in range(stack.shape[0]):
        for m in (pos[k], neg[k]):
            v = stack[k][m]
            if v.size > 1:
                res.append(v - v.mean())
    r = np.concatenate(res)
    high = float(stack[pos].mean())
    return high - float(stack[neg].mean()), float(np.sqrt(np.mean(r**2))), high


# =========================================================================== skin edge
@dataclass
class _SkinSampler:
    """Pixel offsets used around every outline point of one image size (computed once).

    ``grad_*``: the derivative-of-Gaussian (sigma 2 px) weights of a disc of radius 5 px
    that give the outline normal. ``strip_*``: for each of ``directions`` quantised normal
    directions, the offsets of the pixels within ``locate_px`` (+ slack) of the normal line
    and within the band (+ slack) along it, padded to one length (``strip_ok`` marks
    the real ones); exact distances are computed later with the exact normal.
    """

    width: int
    band_px: float
    reach_px: int
    grad_flat: np.ndarray
    grad_wy: np.ndarray
    grad_wx: np.ndarray
    strip_oy: np.ndarray  # (directions, L)
    strip_ox: np.ndarray
    strip_flat: np.ndarray
    strip_ok: np.ndarray

    directions = 128
    sigma_px = 2.0
    locate_px = 1.5  # half-width of the strip that locates the edge on a normal
    esf_px = 1.5  # half-width of the strip whose pixels go into the ESF

    @classmethod
    def build(cls, width: int, band_px: float) -> "_SkinSampler":
        """The sampler of an image ``width`` pixels wide and a band of ``band_px`` (cached)."""
        return _skin_sampler(cls, int(width), float(band_px))

    @classmethod
    def _build(cls, width: int, band_px: float) -> "_SkinSampler":
        r = 5
        gy, gx = np.mgrid[-r : r + 1, -r : r + 1]
        disc = gy**2 + gx**2 <= r * r
        gy, gx = gy[disc].astype(float), gx[disc].astype(float)
        g = np.exp(-(gy**2 + gx**2) / (2 * cls.sigma_px**2))
        reach = int(math.ceil(band_px + 3))
        oy, ox = (a.ravel().astype(float) for a in np.mgrid[-reach : reach + 1, -reach : reach + 1])
        # a pixel at distance rho moves by at most rho sin(pi / directions) across a quantised normal
        slack = (reach + 2) * math.sin(math.pi / cls.directions)
        rows = []
        for a in (np.arange(cls.directions) + 0.5) * 2 * math.pi / cls.directions:
            ny, nx = math.sin(a), math.cos(a)
            t, perp = oy * ny + ox * nx, -oy * nx + ox * ny
            rows.append(np.nonzero((np.abs(perp) <= cls.locate_px + slack) & (np.abs(t) <= band_px + 3))[0])
        length = max(len(k) for k in rows)
        pick = np.stack([np.pad(k, (0, length - len(k)), mode="edge") for k in rows])
        ok = np.stack([np.arange(length) < len(k) for k in rows])
        sy, sx = oy[pick].astype(np.int64), ox[pick].astype(np.int64)
        return cls(width, band_px, reach, (gy * width + gx).astype(np.int64), gy * g, gx * g,
                   sy, sx, sy * width + sx, ok)


@functools.lru_cache(maxsize=8)
def _skin_sampler(cls: type, width: int, band_px: float) -> _SkinSampler:
    return cls._build(width, band_px)


def skin_edge_ttf(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> EdgeMeasurement | None:
    """TTF of the patient's skin-air edge along the body outline, away from the table.

    On up to ``skin_max_slices`` evenly spaced slices (every slice of a shorter series),
    up to ``skin_normals_per_slice`` outline points (a seeded random subset of the outline
    pixels of the body mask, screened on every second row and column) are taken (a decimated screen of the outline: the ESF needs a few
    thousand pixels per bin, not every outline pixel). At each, the normal comes from the
    derivative-of-Gaussian (2 px) gradient; the sub-pixel edge is where the profile of
    the pixels within 1.5 px of the normal (1-px bins along it) crosses halfway between
    tissue and air; profiles that do not run from tissue (> -300 HU) to air (< -800 HU)
    are dropped. The pixels within 1.5 px of each normal and ``skin_band_mm`` of the edge
    enter the ESF with their exact signed distance (the pixel values themselves, never
    interpolated ones, so the sampling adds no blur of its own). Outline points within
    ``table_clearance_mm`` of the table or the field-of-view edge (measured on a 4x
    coarser grid, conservatively), or too near the image border, are left out. Fewer
    than ``skin_min_per_bin`` pixels per ESF bin on average make the edge unreliable.

    Returns
    -------
    EdgeMeasurement or None
        None when there is no body or no usable outline.

    References
    ----------
    Sanders J, Hurwitz L, Samei E. Med Phys 43(10):5330-5338, 2016.
    """
    s = resolve_settings(settings)
    if not regions.has_body:
        return None
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    band = float(s["skin_band_mm"])
    sampler = _SkinSampler.build(volume.shape[2], band / px)
    acc = _edges.EsfAccumulator(bin_mm=px * float(s["bin_fraction"]), lo_mm=-band, hi_mm=band)
    sides = _SideSums(gap_mm=max(2 * px, band / 3), band_mm=band)
    nz = volume.shape[0]
    zs, n_points = [], 0
    cache: dict[str, Any] = {}
    for z in np.unique(np.linspace(0, nz - 1, max(1, min(nz, int(s["skin_max_slices"])))).round().astype(int)):
        got = _skin_slice(volume.hu[int(z)], regions, int(z), px, s, sampler, cache, acc, sides)
        if got:
            zs.append(int(z))
            n_points += got
    if not zs or sides.n_in < 2 or sides.n_out < 2:
        return None
    esf = acc.binned()
    contrast = sides.mean_in - sides.mean_out
    noise = float(np.sqrt(0.5 * (sides.var_out + sides.var_in)))
    problems = []
    per_bin = float(esf.counts.mean()) if esf.counts.size else 0.0
    if per_bin < float(s["skin_min_per_bin"]):
        problems.append(f"{per_bin:.0f} edge pixels per ESF bin on average; at least {s['skin_min_per_bin']:g} needed")
    centre = (0.5 * (zs[0] + zs[-1]),) + tuple(float(c) for c in regions.body_centroid_zyx_vox[1:])
    extra = {"source": "outline", "outline_points": int(n_points)}
    # distance is positive into the air, so the ESF falls; the TTF path handles polarity
    return _edge_result("skin", volume, esf, contrast, sides.mean_in, noise, (zs[0], zs[-1]), centre, s,
                        problems, extra)


@dataclass
class _SideSums:
    """Count, sum and sum of squares of the pixels on each side of an edge, between
    ``gap_mm`` and ``band_mm`` from it (inside: negative distances)."""

    gap_mm: float
    band_mm: float
    n_in: int = 0
    s_in: float = 0.0
    ss_in: float = 0.0
    n_out: int = 0
    s_out: float = 0.0
    ss_out: float = 0.0

    def add(self, d: np.ndarray, v: np.ndarray, use: np.ndarray) -> None:
        a = np.abs(d)
        near = use & (a >= self.gap_mm) & (a <= self.band_mm)
        inner, outer = near & (d < 0), near & (d > 0)
        v2 = v * v
        self.n_in += int(np.count_nonzero(inner))
        self.s_in += float(v.sum(where=inner))
        self.ss_in += float(v2.sum(where=inner))
        self.n_out += int(np.count_nonzero(outer))
        self.s_out += float(v.sum(where=outer))
        self.ss_out += float(v2.sum(where=outer))

    @property
    def mean_in(self) -> float:
        return self.s_in / self.n_in

    @property
    def mean_out(self) -> float:
        return self.s_out / self.n_out

    @property
    def var_in(self) -> float:
        return max(self.ss_in / self.n_in - self.mean_in**2, 0.0)

    @property
    def var_out(self) -> float:
        return max(self.ss_out / self.n_out - self.mean_out**2, 0.0)


def _skin_slice(image: np.ndarray, regions: Regions, z: int, px: float, s: dict[str, Any],
                sampler: _SkinSampler, cache: dict[str, Any], acc: _edges.EsfAccumulator,
                sides: "_SideSums") -> int:
    """Add the ESF pixels of one slice (signed distance in mm, + into the air) to ``acc``
    and ``sides``; returns the number of outline points they come from (0: none)."""
    by, bx = _outline_candidates(regions.body[z])
    if by.size < 20:
        return 0
    clear, sample_ok = _clear_of_table(regions, z, px, float(s["table_clearance_mm"]), sampler.reach_px, cache)
    usable = clear[by, bx]
    by, bx = by[usable], bx[usable]
    if by.size < 20:
        return 0
    pick = _spread_along_outline(by.size, int(s["skin_normals_per_slice"]), seed=z)
    flat_img = image.ravel()
    centre = by[pick] * sampler.width + bx[pick]
    got = _normals(flat_img, centre, sampler)
    if got is None:
        return 0
    keep, ny, nx = got
    k = _direction_index(ny, nx, sampler.directions)
    idx = centre[keep, None] + sampler.strip_flat[k]
    vals = flat_img[idx].astype(float)
    oy, ox, ok = sampler.strip_oy[k], sampler.strip_ox[k], sampler.strip_ok[k]
    t = oy * ny[:, None] + ox * nx[:, None]
    perp = np.abs(ox * ny[:, None] - oy * nx[:, None])
    t0, good = _edge_positions(t, vals, ok & (perp <= sampler.locate_px), sampler.band_px)
    if good.sum() < 20:
        return 0
    d = (t - t0[:, None]) * px
    use = ok & (perp <= sampler.esf_px) & good[:, None] & sample_ok[idx]
    acc.add(d, vals, use)
    sides.add(d, vals, use)
    return int(good.sum())


def _outline_candidates(body: np.ndarray, f: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Outline pixels of the body found on every ``f``-th row and column (a decimated
    screen): the boundary pixels of the subsampled mask, in full-resolution indices.

    They lie within ``f`` - 1 pixels of the true outline; the edge is then located to a
    fraction of a pixel along each normal, so the screen costs no precision.
    """
    by, bx = np.nonzero(_boundary_of(np.ascontiguousarray(body[::f, ::f])))
    return by * f, bx * f


def _boundary_of(mask: np.ndarray) -> np.ndarray:
    """Pixels of ``mask`` with a 4-neighbour outside it (the image border counts as
    outside): ``mask`` minus its erosion by the cross."""
    inner = np.zeros_like(mask)
    c = mask[1:-1, 1:-1]
    inner[1:-1, 1:-1] = c & mask[:-2, 1:-1] & mask[2:, 1:-1] & mask[1:-1, :-2] & mask[1:-1, 2:]
    return mask & ~inner


def _clear_of_table(regions: Regions, z: int, px: float, clearance_mm: float, reach_px: int,
                    cache: dict[str, Any], f: int = 4) -> tuple[np.ndarray, np.ndarray]:
    """Pixels farther than ``clearance_mm`` from the table and the field-of-view edge, and
    at least ``reach_px`` + 1 from the image border (where outline points may be); and,
    flattened, the pixels inside the field of view and off the table (where ESF pixels
    may be).

    The distance is taken on a grid ``f`` times coarser, where a cell is bad when any of
    its pixels is, and reduced by the largest pixel-to-cell-centre offset on both ends,
    so it never exceeds the true distance (a few outline pixels too many are left out,
    never one too near). Reused between slices with the same table cross-section.
    """
    table = regions.table[z]
    if "table" in cache and np.array_equal(cache["table"], table):
        return cache["clear"], cache["sample_ok"]
    bad = table if regions.fov is None else (table | ~regions.fov)
    ny, nx = bad.shape
    py, px_ = (-ny) % f, (-nx) % f
    coarse = np.pad(bad, ((0, py), (0, px_))).reshape((ny + py) // f, f, (nx + px_) // f, f).any(axis=(1, 3))
    if coarse.any():
        dist_px = ndimage.distance_transform_edt(~coarse) * f - (f - 1) * math.sqrt(2.0)
        clear = np.repeat(np.repeat(dist_px * px > clearance_mm, f, axis=0), f, axis=1)[:ny, :nx]
    else:
        clear = np.ones(bad.shape, dtype=bool)
    m = reach_px + 1
    border = np.zeros(bad.shape, dtype=bool)
    border[m:-m, m:-m] = True
    clear = clear & border
    sample_ok = ~bad.ravel()
    cache["table"], cache["clear"], cache["sample_ok"] = table, clear, sample_ok
    return clear, sample_ok


def _spread_along_outline(n_points: int, n: int, seed: int) -> np.ndarray:
    """Indices of at most ``n`` of ``n_points`` outline pixels: a random subset, seeded
    (by the slice index) so that a run is reproducible, and uniform along the outline
    as the pixels themselves are (sampling in angle would favour the flat sides)."""
    if n_points <= n:
        return np.arange(n_points)
    return np.sort(np.random.default_rng(seed).choice(n_points, n, replace=False))


def _normals(flat_img: np.ndarray, centre: np.ndarray, sampler: _SkinSampler
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Unit normals towards falling values (the air) from the Gaussian-derivative gradient
    at each outline pixel; which points have a non-zero gradient."""
    vals = flat_img[centre[:, None] + sampler.grad_flat[None]].astype(float)
    gy, gx = np.einsum("ij,j->i", vals, sampler.grad_wy), np.einsum("ij,j->i", vals, sampler.grad_wx)  # no BLAS threads
    g = np.hypot(gy, gx)
    keep = g > 0
    if keep.sum() < 20:
        return None
    return keep, -gy[keep] / g[keep], -gx[keep] / g[keep]


def _direction_index(ny: np.ndarray, nx: np.ndarray, directions: int) -> np.ndarray:
    a = np.mod(np.arctan2(ny, nx), 2 * math.pi)
    return np.minimum((a * (directions / (2 * math.pi))).astype(np.int64), directions - 1)


def _edge_positions(t: np.ndarray, vals: np.ndarray, mask: np.ndarray, band_px: float
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Sub-pixel edge position along each normal (px from the outline pixel) and whether
    the profile runs from tissue (> -300 HU) to air (< -800 HU).

    The pixels of ``mask`` are binned at 1 px along the normal (one ``np.bincount`` for
    all normals); tissue and air are the bin means weighted by a Gaussian of 2 px about
    the two ends of the band; the edge is where the bin means (at their mean distance)
    cross halfway between them: the last bin above before the first one below.
    """
    m, _ = t.shape
    half = int(math.ceil(band_px))
    nb = 2 * half + 1
    b = np.rint(t).astype(np.int64) + half
    inside_band = mask & (b >= 0) & (b < nb)
    idx = np.where(inside_band, np.arange(m)[:, None] * nb + b, m * nb)
    counts = np.bincount(idx.ravel(), minlength=m * nb + 1)[: m * nb].reshape(m, nb)
    sums = np.bincount(idx.ravel(), weights=vals.ravel(), minlength=m * nb + 1)[: m * nb].reshape(m, nb)
    tsum = np.bincount(idx.ravel(), weights=t.ravel(), minlength=m * nb + 1)[: m * nb].reshape(m, nb)
    filled = counts > 0
    safe = np.maximum(counts, 1)
    mean = np.where(filled, sums / safe, np.nan)
    tmean = np.where(filled, tsum / safe, np.nan)
    pos = np.arange(nb) - half
    inside = _weighted_mean(sums, counts, np.exp(-0.5 * ((pos + band_px) / 2.0) ** 2))
    outside = _weighted_mean(sums, counts, np.exp(-0.5 * ((pos - band_px) / 2.0) ** 2))
    good = (inside > -300) & (outside < -800) & filled.all(axis=1)
    mid = 0.5 * (inside + outside)
    above = np.where(filled, mean >= mid[:, None], True)
    first_below = np.argmax(~above, axis=1)
    i = np.clip(first_below - 1, 0, nb - 2)
    rows = np.arange(m)
    p0, p1, t_a, t_b = mean[rows, i], mean[rows, i + 1], tmean[rows, i], tmean[rows, i + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(p0 != p1, (p0 - mid) / (p0 - p1), 0.5)
    t0 = t_a + frac * (t_b - t_a)
    good &= (first_below > 0) & np.isfinite(t0)
    return np.where(good, t0, 0.0), good


def _weighted_mean(sums: np.ndarray, counts: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Per row: the mean of the binned pixels, each bin's pixels weighted by ``w``."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.einsum("ij,j->i", sums, w) / np.einsum("ij,j->i", counts, w)



# =========================================================================== analysis
def analyse(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> AnalysisResult:
    """Measure the TTF of every edge the series offers (see the module docstring).

    Returns
    -------
    AnalysisResult
        ``record``: ``edges`` (one record per edge), ``method``; not applicable, with the
        reason, when nothing can be measured. Overlays: one Point per edge centre.

    References
    ----------
    Richard et al. 2012; AAPM TG-233 (2019); Cunningham & Fenster 1987; ISO 12233;
    Sanders, Hurwitz, Samei 2016.
    """
    s = resolve_settings(settings)
    shape = volume.shape
    measurements: list[EdgeMeasurement] = []
    notes: list[str] = []
    for entry in s["straight_edge_rois"]:
        measurements.append(straight_edge_ttf(volume, _roi_from_setting(entry, shape, "straight_edge_rois"), s))
    user = _user_inserts(volume, s)
    auto: list[Insert] = []
    phantom: list[tuple[Any, int, int]] = []  # found once, when first needed

    def phantom_found() -> tuple[Any, int, int]:
        if not phantom:
            phantom.append(_phantom_of(volume, regions))
        return phantom[0]

    if s["find_inserts"] == "always" or (s["find_inserts"] == "auto" and not user):
        auto = find_rod_inserts(volume, regions, s, phantom=phantom_found())
    inserts = user + auto
    allowed = _body_footprint(volume, regions, inserts, s) if auto and regions.has_body else None
    if user:
        measurements.extend(measure_circular_edges(volume, user, s, allowed=None, others=inserts))
    if auto:
        measurements.extend(measure_circular_edges(volume, auto, s, allowed=allowed, others=inserts))
    want_skin = s["skin_edge"] == "always" or (s["skin_edge"] == "auto" and not measurements)
    if want_skin and not (s["skin_edge"] == "auto" and phantom_found()[0].found):
        skin = skin_edge_ttf(volume, regions, s)
        if skin is not None:
            measurements.append(skin)
        else:
            notes.append("no usable skin-air outline (no body, or every outline point near the table or border)")
    if not measurements:
        reason = "no edge to measure: no rod inserts found, no centres, ROIs or straight-edge ROIs given"
        if notes:
            reason += "; " + notes[0]
        return AnalysisResult.not_applicable(NAME, reason)
    return _assemble(measurements, s, notes)


def _body_footprint(volume: Volume, regions: Regions, inserts: Sequence[Insert], s: dict[str, Any]) -> np.ndarray:
    """(y, x) pixels inside the body on some slice of the inserts' slices, computed only
    over each rod's crop (the only place :func:`measure_circular_edge` looks); False
    elsewhere. A rod's ESF reads only its own slices, so slices outside every insert's
    range are not looked at; a crop inside the body on the middle slice is inside it
    whatever the other slices hold, so they are read only for a crop that is not."""
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    out = np.zeros(volume.shape[1:], dtype=bool)
    if not inserts:
        return out
    z0, z1 = min(ins.z0 for ins in inserts), max(ins.z1 for ins in inserts)
    for ins in inserts:
        half = ins.radius_mm / px + min(float(s["esf_half_range_mm"]), 0.9 * ins.radius_mm) / px + 3
        box = _box_about(ins.centre_yx_vox, half, volume.shape[1:])[1]
        # a box inside the body on one of the slices is inside it on some slice everywhere:
        # the union over the slices is then the whole box without reading the others
        one = regions.body[(z0 + z1) // 2, box[0], box[1]]
        out[box] |= True if one.all() else regions.body[z0 : z1 + 1, box[0], box[1]].any(axis=0)
    return out


def _user_inserts(volume: Volume, s: dict[str, Any]) -> list[Insert]:
    """Inserts at the user's centres and in the user's ROIs."""
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    out = []
    for c in s["centres_zyx_vox"]:
        z = int(round(min(max(c[0], 0), volume.shape[0] - 1)))
        centre = (float(c[1]), float(c[2]))
        radius = float(s["radius_mm"]) or radius_from_profile(volume.hu[z], centre, px)
        if not np.isfinite(radius) or radius <= 0:
            radius = 5.0
        z0, z1 = _slices_of_rod(volume.hu, z, centre, radius / px)
        out.append(Insert(z0, z1, centre, radius, "centre"))
    for entry in s["rois"]:
        roi = _roi_from_setting(entry, volume.shape, "rois")
        out.append(_insert_in_roi(volume, roi, s, px))
    return out


def _insert_in_roi(volume: Volume, roi: Roi, s: dict[str, Any], px: float) -> Insert:
    """The disc inside a user ROI: the largest group departing from the ROI median."""
    sub = volume.hu[roi.z0 : roi.z1 + 1, roi.y0 : roi.y1, roi.x0 : roi.x1].mean(axis=0)
    smooth = ndimage.gaussian_filter(sub, 1.0 / px)
    dev = smooth - np.median(smooth)
    sign = 1.0 if dev.max() >= -dev.min() else -1.0
    peak = float((sign * dev).max())
    mask = sign * dev > 0.5 * peak
    lab, n = ndimage.label(mask)
    if n == 0:
        cy, cx, r = 0.5 * sub.shape[0], 0.5 * sub.shape[1], 1.0
    else:
        sizes = np.bincount(lab.ravel())[1:]
        (cy, cx), r, _ = disc_of(lab == 1 + int(np.argmax(sizes)))
    return Insert(roi.z0, roi.z1, (cy + roi.y0, cx + roi.x0), max(r, 1.0) * px, "roi",
                  limit=(roi.y0, roi.x0, roi.y1, roi.x1))


def _assemble(measurements: list[EdgeMeasurement], s: dict[str, Any], notes: list[str]) -> AnalysisResult:
    """Record, findings and overlays from the measured edges."""
    edges = [m.record for m in measurements]
    findings = _findings(edges, s)
    points = [Point(tuple(float(v) for v in m.point_zyx_vox), label=m.record["label"],
                    value=m.record["f50_per_mm"] if m.record["f50_per_mm"] is not None else float("nan"))
              for m in measurements]
    record = {
        "applicable": True,
        "flagged": any(f.severity != Severity.INFO for f in findings),
        "method": METHOD.format(bin=float(s["bin_fraction"]), cond=s["esf_conditioning"]),
        "edges": edges,
        "notes": notes + [n for m in measurements for n in m.notes],
    }
    return AnalysisResult(NAME, record, findings, Overlays(points=points))


def _findings(edges: list[dict[str, Any]], s: dict[str, Any]) -> list[Finding]:
    out = []
    for e in edges:
        if not e["reliable"]:
            out.append(Finding(NAME, Severity.INFO, f"{e['label']}: not reliable ({e['reason']})"))
            continue
        f50 = e["f50_per_mm"]
        lo, hi = float(s["f50_min_per_mm"]), float(s["f50_max_per_mm"])
        if lo > 0 and f50 < lo:
            out.append(Finding(NAME, Severity.REVIEW, f"{e['label']}: f50 {f50:.3f}/mm below the limit {lo:g}/mm"))
        if hi > 0 and f50 > hi:
            out.append(Finding(NAME, Severity.REVIEW, f"{e['label']}: f50 {f50:.3f}/mm above the limit {hi:g}/mm"))
    rods = [e for e in edges if e["reliable"] and e["kind"] == "circular"]
    if len(rods) >= 2:
        f = [e["f50_per_mm"] for e in rods]
        ratio = max(f) / min(f)
        if ratio > float(s["max_f50_contrast_ratio"]):
            sharp, soft = rods[int(np.argmax(f))], rods[int(np.argmin(f))]
            out.append(Finding(NAME, Severity.REVIEW,
                               f"sharpness depends on contrast: f50 {soft['f50_per_mm']:.3f}/mm at "
                               f"{soft['contrast_hu']:+.0f} HU vs {sharp['f50_per_mm']:.3f}/mm at "
                               f"{sharp['contrast_hu']:+.0f} HU (ratio {ratio:.2f} > {s['max_f50_contrast_ratio']:g})"))
    return out
