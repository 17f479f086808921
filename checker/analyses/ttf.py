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
correction after Cunningham & Fenster 1987).

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

import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from ..errors import ProfileError
from ..regions import Regions
from ..results import AnalysisResult, Finding, Overlays, Point, Roi, Severity
from ..volume import Volume
from . import _edges
from ._edges import BinnedEsf, TtfCurve, bin_esf, condition_esf, esf_shape, ttf_from_esf
from ._phantom import disc_of, find_phantom

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
    "skin_max_slices": 32,  # evenly spaced slices the skin edge is measured on
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
    "skin_max_slices": "site choice: tens of slices give tens of thousands of edge pixels",
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


def find_rod_inserts(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> list[Insert]:
    """Find the rod inserts of a water phantom automatically.

    ``find_phantom`` (on an in-plane decimated copy when the slices are larger than 256
    pixels, to keep it cheap) gives the phantom and its slices with inserts. On the mean
    of each contiguous run of such slices, smoothed by 1 mm, connected groups departing
    from the phantom median by more than ``min_contrast_hu`` (each sign on its own)
    whose shape is a disc of ``min_insert_diameter_mm`` to ``max_insert_diameter_mm``
    are inserts; each insert's slices are those where its disc keeps at least 3/4 of
    its contrast to the surrounding ring.

    Returns
    -------
    list of Insert

    References
    ----------
    Common practice, no source (threshold, connected components, disc test).
    """
    s = resolve_settings(settings)
    phantom, factor, step = _phantom_of(volume, regions)
    if not phantom.found or not phantom.inserts.any():
        return []
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    inserts: list[Insert] = []
    for k0, k1 in _runs_of(phantom.inserts):
        kmid = (k0 + k1) // 2
        z0, z1, mid = k0 * step, min(k1 * step, volume.shape[0] - 1), kmid * step
        centre = phantom.centre_yx_vox[kmid] * factor
        radius = phantom.radius_vox[kmid] * factor
        mean = volume.hu[z0 : z1 + 1 : max(1, (z1 - z0 + 1) // 8)].mean(axis=0)
        smooth = ndimage.gaussian_filter(mean, 1.0 / px) - float(np.nanmedian(phantom.median_hu[k0 : k1 + 1]))
        inner = _disc(mean.shape, centre, 0.92 * radius)
        for sign in (1.0, -1.0):
            lab, _ = ndimage.label((sign * smooth > float(s["min_contrast_hu"])) & inner)
            for i, sl in enumerate(ndimage.find_objects(lab), start=1):
                if sl is None:
                    continue
                found = _insert_from_component(volume.hu, sign * smooth[sl], lab[sl] == i, sl, mid, px, s)
                if found is not None:
                    inserts.append(found)
    inserts.sort(key=lambda r: (r.z0, r.centre_yx_vox[0], r.centre_yx_vox[1]))
    return inserts


def _phantom_of(volume: Volume, regions: Regions) -> tuple[Any, int, int]:
    """``find_phantom`` on a copy decimated to at most 256 pixels a side and about 32
    slices (rods are long; their exact slices are found later at full resolution).

    Returns the phantom, the in-plane factor and the slice step.
    """
    factor = max(1, int(math.ceil(max(volume.shape[1:]) / 256)))
    step = max(1, int(math.ceil(volume.shape[0] / 32)))
    if factor == 1 and step == 1:
        return find_phantom(volume, regions), 1, 1
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
    return find_phantom(small, small_regions), factor, step


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
                           px: float, s: dict[str, Any]) -> Insert | None:
    """An Insert if the 2-D component is a disc of the allowed size; its slices from ``z``.

    The disc is re-thresholded at half its own contrast (``dev``: smoothed departure from
    the phantom, sign made positive) so that its radius does not grow with contrast.
    """
    (cy, cx), r_eq, _ = disc_of(comp)
    core = dev[_disc(comp.shape, (cy, cx), 0.5 * r_eq) & comp]
    if core.size:
        half = comp & (dev > 0.5 * float(np.median(core)))
        if half.any():
            comp = ndimage.binary_fill_holes(half)
    (cy, cx), r_eq, fill = disc_of(comp)
    diameter = 2.0 * r_eq * px
    if fill < 0.7 or not s["min_insert_diameter_mm"] <= diameter <= s["max_insert_diameter_mm"]:
        return None
    centre = (cy + sl[0].start, cx + sl[1].start)
    z0, z1 = _slices_of_rod(hu, z, centre, r_eq)
    return Insert(z0, z1, centre, r_eq * px, "auto")


def _slices_of_rod(hu: np.ndarray, z: int, centre: tuple[float, float], r_px: float,
                   keep: float = 0.75) -> tuple[int, int]:
    """Extend from slice ``z`` while the disc keeps at least ``keep`` of its contrast to its ring."""

    def contrast(k: int) -> float:
        return _disc_contrast(hu[k], centre, r_px)

    c0 = contrast(z)
    if c0 == 0 or not np.isfinite(c0):
        return z, z
    lo = z
    while lo - 1 >= 0 and contrast(lo - 1) / c0 >= keep:
        lo -= 1
    hi = z
    while hi + 1 < hu.shape[0] and contrast(hi + 1) / c0 >= keep:
        hi += 1
    return lo, hi


def _disc_contrast(image: np.ndarray, centre: Sequence[float], r_px: float) -> float:
    """Mean inside 0.6 r minus mean of the ring 1.4 r .. 2 r (crop about the centre)."""
    y0, x0, crop = _crop(image, centre, 2.2 * r_px)
    d = np.hypot(*(np.indices(crop.shape) - np.array([centre[0] - y0, centre[1] - x0])[:, None, None]))
    inside, ring = crop[d <= 0.6 * r_px], crop[(d >= 1.4 * r_px) & (d <= 2.0 * r_px)]
    if inside.size == 0 or ring.size == 0:
        return float("nan")
    return float(inside.mean() - ring.mean())


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
    s = resolve_settings(settings)
    sy, sx = volume.spacing_mm[1], volume.spacing_mm[2]
    px = 0.5 * (sy + sx)
    r_px = insert.radius_mm / px
    half_mm = min(float(s["esf_half_range_mm"]), 0.9 * insert.radius_mm)
    stack = volume.hu[insert.z0 : insert.z1 + 1]
    y0, x0, crop = _crop(stack, insert.centre_yx_vox, r_px + half_mm / px + 3)
    free = _free_mask(crop.shape[1:], (y0, x0), volume.hu.shape[1:], insert, others, allowed, px)
    c_local = (insert.centre_yx_vox[0] - y0, insert.centre_yx_vox[1] - x0)
    centres, inside_hu, outside_hu = _refine_centres(crop, c_local, r_px, px)
    dist = np.stack([_edges.radial_distances(crop.shape[1:], c, (sy, sx)) for c in centres])
    reach_mm = _free_reach_mm(dist, free, insert.radius_mm)
    problems: list[str] = []
    if reach_mm < half_mm:
        if reach_mm < float(s["min_half_range_mm"]):
            problems.append(
                f"the insert touches the border of its region (ROI, phantom or another insert): "
                f"{max(reach_mm, 0):.1f} mm free beyond the edge, {s['min_half_range_mm']:g} mm needed"
            )
        half_mm = max(reach_mm, px)
    radius_mm = insert.radius_mm
    for _ in range(2):  # the second pass centres the range on the measured edge radius
        use = free[None] & (np.abs(dist - radius_mm) < half_mm)
        esf = bin_esf(dist[use] - radius_mm, crop[use], bin_mm=px * float(s["bin_fraction"]), lo_mm=-half_mm, hi_mm=half_mm)
        shift = _esf_centre_or_zero(esf)
        if abs(shift) > 0.5 * half_mm:
            break
        radius_mm += shift
    contrast, noise = _contrast_and_noise(crop, dist, free, radius_mm, half_mm, px)
    centre_zyx = (0.5 * (insert.z0 + insert.z1), float(np.mean([c[0] for c in centres])) + y0, float(np.mean([c[1] for c in centres])) + x0)
    extra = {"radius_mm": round(radius_mm, 3), "source": insert.source}
    return _edge_result("circular", volume, esf, contrast, inside_hu if contrast else float("nan"), noise,
                        (insert.z0, insert.z1), centre_zyx, s, problems, extra)


def _esf_centre_or_zero(esf: BinnedEsf) -> float:
    c = esf_shape(esf).centre_mm
    return float(c) if np.isfinite(c) else 0.0


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
        free &= ~_disc(shape, c, other.radius_mm / px + 1.0 / px)
    # the crop itself ends at the image border: mark the border ring as not free
    edge = np.zeros(shape, dtype=bool)
    if y0 == 0 or x0 == 0 or y0 + shape[0] >= full_shape[0] or x0 + shape[1] >= full_shape[1]:
        edge[[0, -1], :] = True
        edge[:, [0, -1]] = True
    return free & ~edge


def _free_reach_mm(dist: np.ndarray, free: np.ndarray, radius_mm: float) -> float:
    """How far beyond the edge (outwards) the region stays free, on every slice."""
    blocked = ~free
    if not blocked.any():
        return float("inf")
    return float(dist[:, blocked].min()) - radius_mm


def _refine_centres(crop: np.ndarray, centre: tuple[float, float], r_px: float, px: float) -> tuple[list[tuple[float, float]], float, float]:
    """Sub-pixel centre on every slice, then a straight line through them along z."""
    first = crop.mean(axis=0)
    d = np.hypot(*(np.indices(first.shape) - np.array(centre)[:, None, None]))
    inside_hu = float(np.median(first[d <= 0.6 * r_px])) if (d <= 0.6 * r_px).any() else float(first.mean())
    ring = (d >= r_px + 2.0 / px) & (d <= r_px + 4.0 / px)
    outside_hu = float(np.median(first[ring])) if ring.any() else float(np.median(first))
    reach = min(3.0 / px, 0.5 * r_px + 1)
    c0 = _edges.refine_circle_centre(first, centre, r_px, inside_hu, outside_hu, reach_px=reach)
    per = np.array([_edges.refine_circle_centre(img, c0, r_px, inside_hu, outside_hu, reach_px=reach) for img in crop])
    if len(per) >= 3:
        z = np.arange(len(per), dtype=float)
        fit_y, fit_x = np.polyval(np.polyfit(z, per[:, 0], 1), z), np.polyval(np.polyfit(z, per[:, 1], 1), z)
        per = np.stack([fit_y, fit_x], axis=1)
    return [tuple(p) for p in per], inside_hu, outside_hu


def _contrast_and_noise(crop: np.ndarray, dist: np.ndarray, free: np.ndarray, radius_mm: float, half_mm: float,
                        px: float) -> tuple[float, float]:
    """Insert minus background mean, and the pooled per-slice pixel noise of both sides.

    Both sides are taken at least two pixels and a third of the range away from the edge.
    """
    gap = max(2 * px, half_mm / 3)
    inner = free[None] & (dist <= radius_mm - gap)
    outer = free[None] & (dist >= radius_mm + gap) & (dist <= radius_mm + half_mm)
    if not inner.any() or not outer.any():
        return float("nan"), float("nan")
    contrast = float(crop[inner].mean() - crop[outer].mean())
    residuals = []
    for k in range(crop.shape[0]):
        for m in (inner[k], outer[k]):
            v = crop[k][m]
            if v.size > 1:
                residuals.append(v - v.mean())
    res = np.concatenate(residuals) if residuals else np.array([])
    return contrast, float(np.sqrt(np.mean(res**2))) if res.size > 1 else float("nan")


# =========================================================================== common record
def _edge_result(kind: str, volume: Volume, esf: BinnedEsf, contrast: float, insert_hu: float, noise: float,
                 slices: tuple[int, int], centre_zyx: tuple[float, float, float], s: dict[str, Any],
                 problems: list[str], extra: dict[str, Any]) -> EdgeMeasurement:
    """ESF -> TTF and the JSON record shared by all edge kinds."""
    px = 0.5 * (volume.spacing_mm[1] + volume.spacing_mm[2])
    nyquist = 0.5 / px
    conditioned, used = condition_esf(esf, s["esf_conditioning"]) if esf.counts.sum() else (esf, "none")
    curve = _safe_ttf(conditioned, s, nyquist)
    problems = list(problems) + _reliability_problems(contrast, noise, slices, esf, curve, s)
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
        "frequency_per_mm": [round(float(f), 4) for f in curve.frequency_per_mm],
        "ttf": [_round(t, 4) for t in curve.ttf],
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
                          curve: TtfCurve, s: dict[str, Any]) -> list[str]:
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
    if not np.isfinite(curve.f50_per_mm):
        out.append("the TTF does not fall to 0.5 below the Nyquist frequency")
    return out


def _edge_label(kind: str, contrast: float, f50: float) -> str:
    c = "?" if not np.isfinite(contrast) else f"{contrast:+.0f} HU"
    f = "f50 ?" if not np.isfinite(f50) else f"f50 {f50:.3f}/mm"
    return f"{kind} {c}, {f}"


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
def skin_edge_ttf(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> EdgeMeasurement | None:
    """TTF of the patient's skin-air edge along the body outline, away from the table.

    On up to ``skin_max_slices`` evenly spaced slices (every slice of a shorter series),
    sub-pixel outline points are found along the outline normals (where
    the 2-pixel smoothed image crosses halfway between air and tissue); pixels within
    ``skin_band_mm`` get their signed distance to the nearest outline point along its
    normal, and all slices' pixels build one ESF. Outline points within
    ``table_clearance_mm`` of the table, at the field-of-view or image border, or
    whose normal profile does not go from tissue to air are left out.

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
    d_all, v_all, zs = [], [], []
    nz = volume.shape[0]
    cache: dict[str, Any] = {}
    for z in np.unique(np.linspace(0, nz - 1, max(1, min(nz, int(s["skin_max_slices"])))).round().astype(int)):
        z = int(z)
        got = _skin_slice(volume.hu[z], regions, z, px, band, float(s["table_clearance_mm"]), cache)
        if got is not None:
            d_all.append(got[0])
            v_all.append(got[1])
            zs.append(z)
    if not zs:
        return None
    d, v = np.concatenate(d_all), np.concatenate(v_all)
    esf = bin_esf(d, v, bin_mm=px * float(s["bin_fraction"]), lo_mm=-band, hi_mm=band)
    gap = max(2 * px, band / 3)
    outer, inner = v[(d >= gap) & (d <= band)], v[(d <= -gap) & (d >= -band)]
    if outer.size < 2 or inner.size < 2:
        return None
    contrast = float(inner.mean() - outer.mean())
    noise = float(np.sqrt(0.5 * (outer.var() + inner.var())))
    centre = (0.5 * (zs[0] + zs[-1]),) + tuple(float(c) for c in regions.body_centroid_zyx_vox[1:])
    extra = {"source": "outline", "outline_points": int(sum(len(x) for x in d_all))}
    # distance is positive into the air, so the ESF falls; the TTF path handles polarity
    return _edge_result("skin", volume, esf, contrast, float(inner.mean()), noise, (zs[0], zs[-1]), centre, s, [], extra)


def _skin_slice(image: np.ndarray, regions: Regions, z: int, px: float, band_mm: float,
                clearance_mm: float, cache: dict[str, Any] | None = None) -> tuple[np.ndarray, np.ndarray] | None:
    """Signed distances (mm, + into air) and values of the band pixels of one slice.

    ``cache`` keeps the distance map to the table and field-of-view edge between slices
    whose table cross-section is the same (it usually is).
    """
    body = regions.body[z]
    if body.sum() < 50:
        return None
    boundary = body & ~ndimage.binary_erosion(body)
    bad = ~regions.fov if regions.fov is not None else np.zeros_like(body)
    bad = bad | regions.table[z]
    bad_dist = _distance_to(bad, px, cache)
    edge = np.ones(body.shape, dtype=bool)
    edge[2:-2, 2:-2] = False
    boundary &= (bad_dist > clearance_mm) & ~edge
    by, bx = np.nonzero(boundary)
    if by.size < 20:
        return None
    # everything below reaches at most the band (+ the smoothing kernel) beyond the
    # outline: work on the outline's box grown by that much, which changes no value used
    band_px = band_mm / px
    (y0, x0), box = _grown_box(by, bx, int(math.ceil(band_px)) + 2 + 9, body.shape)
    smooth = ndimage.gaussian_filter(image[box].astype(float), 2.0)
    cy, cx = by - y0, bx - x0
    gy, gx = ndimage.sobel(smooth, 0), ndimage.sobel(smooth, 1)
    g = np.hypot(gy[cy, cx], gx[cy, cx])
    ok = g > 0
    ny, nx = -gy[cy, cx] / np.where(ok, g, 1), -gx[cy, cx] / np.where(ok, g, 1)  # towards the air (falling values)
    pts = _outline_points(smooth, cy.astype(float), cx.astype(float), ny, nx, band_px)
    if pts is None:
        return None
    qy, qx, qny, qnx = pts
    qy, qx = qy + y0, qx + x0
    (e0, f0), ebox = _grown_box(by, bx, int(math.ceil(band_px + 1)) + 2, body.shape)
    ys, xs = np.nonzero(ndimage.distance_transform_edt(~boundary[ebox]) * px <= band_mm + px)
    ys, xs = ys + e0, xs + f0
    tree = cKDTree(np.column_stack([qy, qx]))
    dist_px, idx = tree.query(np.column_stack([ys, xs]), distance_upper_bound=band_mm / px + 2)
    found = np.isfinite(dist_px)
    ys, xs, idx = ys[found], xs[found], idx[found]
    signed = ((ys - qy[idx]) * qny[idx] + (xs - qx[idx]) * qnx[idx]) * px
    keep = regions.fov[ys, xs] & ~regions.table[z][ys, xs]
    return signed[keep], image[ys[keep], xs[keep]].astype(float)


def _grown_box(ys: np.ndarray, xs: np.ndarray, pad: int, shape: tuple[int, int]
               ) -> tuple[tuple[int, int], tuple[slice, slice]]:
    """Bounding box of the points grown by ``pad`` pixels (clipped to ``shape``): its
    corner and its slices."""
    y0, x0 = max(0, int(ys.min()) - pad), max(0, int(xs.min()) - pad)
    y1, x1 = min(shape[0], int(ys.max()) + 1 + pad), min(shape[1], int(xs.max()) + 1 + pad)
    return (y0, x0), (slice(y0, y1), slice(x0, x1))


def _distance_to(bad: np.ndarray, px: float, cache: dict[str, Any] | None) -> np.ndarray:
    """Distance (mm) of every pixel to the nearest ``bad`` pixel (inf when none), reused
    from ``cache`` when ``bad`` is the mask it was computed for."""
    if cache is not None and "bad" in cache and np.array_equal(cache["bad"], bad):
        return cache["dist"]
    dist = ndimage.distance_transform_edt(~bad) * px if bad.any() else np.full(bad.shape, np.inf)
    if cache is not None:
        cache["bad"], cache["dist"] = bad, dist
    return dist


def _outline_points(smooth: np.ndarray, by: np.ndarray, bx: np.ndarray, ny: np.ndarray, nx: np.ndarray,
                    band_px: float) -> tuple[np.ndarray, ...] | None:
    """Sub-pixel crossing of the tissue/air midpoint along each normal; profiles that do
    not run from tissue (> -300 HU) to air (< -800 HU) are dropped."""
    t = np.linspace(-band_px, band_px, int(4 * band_px) + 1)
    yy, xx = by[:, None] + t[None] * ny[:, None], bx[:, None] + t[None] * nx[:, None]
    prof = ndimage.map_coordinates(smooth, [yy.ravel(), xx.ravel()], order=1, mode="nearest").reshape(yy.shape)
    inside, outside = prof[:, 0], prof[:, -1]
    good = (inside > -300) & (outside < -800)
    if good.sum() < 20:
        return None
    prof, inside, outside = prof[good], inside[good], outside[good]
    mid = 0.5 * (inside + outside)
    above = prof >= mid[:, None]
    # last sample above the midpoint before the first one below, per profile
    first_below = np.argmax(~above, axis=1)
    i = np.clip(first_below - 1, 0, t.size - 2)
    rows = np.arange(prof.shape[0])
    p0, p1 = prof[rows, i], prof[rows, i + 1]
    frac = np.where(p0 != p1, (p0 - mid) / (p0 - p1), 0.5)
    tc = t[i] + frac * (t[1] - t[0])
    ny, nx = ny[good], nx[good]
    return by[good] + tc * ny, bx[good] + tc * nx, ny, nx


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
    if s["find_inserts"] == "always" or (s["find_inserts"] == "auto" and not user):
        auto = find_rod_inserts(volume, regions, s)
    inserts = user + auto
    allowed = regions.body.any(axis=0) if auto and regions.has_body else None
    for ins in inserts:
        measurements.append(measure_circular_edge(volume, ins, s, allowed=allowed if ins.source == "auto" else None,
                                                  others=inserts))
    want_skin = s["skin_edge"] == "always" or (s["skin_edge"] == "auto" and not measurements)
    if want_skin and not (s["skin_edge"] == "auto" and _phantom_of(volume, regions)[0].found):
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
