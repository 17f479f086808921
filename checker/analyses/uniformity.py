"""Water phantom uniformity: water CT number, centre and peripheral ROI means and SDs.

In the uniform section of a water cylinder (:func:`._phantom.find_phantom`, longest run of
contiguous uniform slices, at most ``max_slices``), one square ROI sits at the centre
and four on the periphery (top, right, bottom, left as displayed), their outer side
``edge_margin_mm`` inside the phantom edge. The ROI side is ``roi_size_mm`` or, when 0,
a tenth of the phantom diameter. Means and SDs are pooled over the slices.

- ``water_hu``: mean of the centre ROI (expected 0 HU: the Hounsfield scale's definition);
- ``uniformity_hu``: max |peripheral mean - centre mean|;
- ``centre_sd_hu``: pixel SD in the centre ROI.

The ROIs span the middle ``max_slices`` (16) slices of that run (32 before: a method
choice for speed, records may change; half the pixels to
read and check, the same slices as the noise analysis). On invented scans the water
CT number, uniformity and centre SD from 16 slices differ from those of 32 by at most
0.25 HU (10 HU noise, tested), a twentieth of the tolerances.

The phantom's centre, radius and uniform slices come from the shared search of
:mod:`._phantom`, made on a strided working grid for speed: they are estimates, so the
ROIs may sit a pixel away from where a full-resolution search would put them; the
statistics are then taken over every pixel of the ROIs. Non-finite voxels are looked
for on every pixel of the slices the ROIs lie on, not the whole volume (a method choice
for speed, records may change; the count is shared with the
noise analysis, which measures the same slices).

References
----------
Hounsfield scale (water 0 HU, by definition). The ROI layout (one central and four
peripheral ROIs about 1 cm from the edge, ROI size about 10% of the phantom diameter)
follows common acceptance-test practice, e.g. IEC 61223-3-5 (from memory; not checked).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import ProfileError
from ..regions import Regions
from ..results import AnalysisResult, Finding, Overlays, Roi, Severity
from ..volume import Volume
from ._phantom import find_phantom, nonfinite_reason

NAME = "uniformity"

DEFAULTS: dict[str, Any] = {
    "roi_size_mm": 0.0,
    "edge_margin_mm": 10.0,
    "max_slices": 16,
    "water_hu_expected": 0.0,
    "water_hu_tolerance": 4.0,
    "uniformity_hu_max": 5.0,
    "centre_sd_hu_max": None,
}

SOURCES: dict[str, str] = {
    "roi_size_mm": "from memory: ROI about 10% of the phantom diameter (common acceptance-test "
    "practice, e.g. IEC 61223-3-5; not checked)",
    "edge_margin_mm": "from memory: peripheral ROIs about 1 cm inside the edge (common practice)",
    "max_slices": "our choice for speed: the ROI means of 16 slices differ from those of 32 by at "
    "most 0.25 HU on invented scans (tested), a twentieth of the tolerances",
    "water_hu_expected": "Hounsfield scale: water is 0 HU by definition",
    "water_hu_tolerance": "from memory: water CT number 0 +/- 4 HU is a commonly quoted limit",
    "uniformity_hu_max": "from memory: centre-to-periphery difference <= 5 HU is a commonly "
    "quoted limit",
    "centre_sd_hu_max": "site choice (depends on protocol, dose and phantom); off by default",
}

#: Peripheral positions: label, direction (dy, dx) in array index terms.
_PERIPHERY = (("top", (-1, 0)), ("right", (0, 1)), ("bottom", (1, 0)), ("left", (0, -1)))


def _settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    s = dict(DEFAULTS)
    for key, value in (settings or {}).items():
        if key not in DEFAULTS:
            raise ProfileError(f"unknown uniformity setting {key!r}; known: {', '.join(DEFAULTS)}")
        s[key] = value
    return s


def uniformity_rois(
    centre_yx: tuple[float, float], radius_vox: float, size_vox: int, margin_vox: float,
    z0: int, z1: int,
) -> list[Roi]:
    """Centre ROI and four peripheral ROIs, outer sides ``margin_vox`` inside the edge."""
    cy, cx = centre_yx
    d = radius_vox - margin_vox - size_vox / 2.0
    rois = [_roi(z0, z1, cy, cx, size_vox, "centre")]
    for label, (uy, ux) in _PERIPHERY:
        rois.append(_roi(z0, z1, cy + uy * d, cx + ux * d, size_vox, label))
    return rois


def _roi(z0: int, z1: int, cy: float, cx: float, n: int, label: str) -> Roi:
    y0, x0 = int(round(cy - n / 2.0)), int(round(cx - n / 2.0))
    return Roi(z0, z1, y0, x0, y0 + n, x0 + n, label)


def roi_stats(hu: np.ndarray, roi: Roi) -> dict[str, float]:
    """Mean and SD (pooled over the ROI's slices) of the ROI pixels."""
    px = hu[roi.z0 : roi.z1 + 1, roi.y0 : roi.y1, roi.x0 : roi.x1].astype(np.float64)
    return {"mean_hu": float(px.mean()), "sd_hu": float(px.std(ddof=1)) if px.size > 1 else 0.0}


def _layout(volume: Volume, regions: Regions, s: dict[str, Any]) -> list[Roi] | str:
    ph = find_phantom(volume, regions)
    if not ph.found:
        return ph.reason
    run = ph.longest_uniform_run()
    if run is None:
        return "phantom found but every phantom slice has inserts: no uniform region"
    z0, z1 = run
    if z1 - z0 + 1 > s["max_slices"]:
        z0 = (z0 + z1) // 2 - s["max_slices"] // 2
        z1 = z0 + s["max_slices"] - 1
    sl = slice(z0, z1 + 1)
    centre = tuple(float(v) for v in np.median(ph.centre_yx_vox[sl], axis=0))
    radius = float(np.min(ph.radius_vox[sl]))
    size_mm = s["roi_size_mm"] or 0.2 * radius * ph.pixel_mm
    size = max(1, int(round(size_mm / ph.pixel_mm)))
    margin = s["edge_margin_mm"] / ph.pixel_mm
    if size < 3 or radius - margin - size < size / 2.0:
        return (f"phantom radius {radius * ph.pixel_mm:.1f} mm too small for {size}-px ROIs "
                f"{s['edge_margin_mm']:g} mm inside the edge")
    return uniformity_rois(centre, radius, size, margin, z0, z1)


def _findings(rec: dict[str, Any], s: dict[str, Any]) -> list[Finding]:
    out = []
    dev = rec["water_hu"] - s["water_hu_expected"]
    if abs(dev) > s["water_hu_tolerance"]:
        out.append(Finding(NAME, Severity.FAIL, f"water CT number {rec['water_hu']:.1f} HU is outside "
                                                f"{s['water_hu_expected']:g} +/- {s['water_hu_tolerance']:g} HU"))
    if rec["uniformity_hu"] > s["uniformity_hu_max"]:
        out.append(Finding(NAME, Severity.FAIL, f"uniformity {rec['uniformity_hu']:.1f} HU exceeds "
                                                f"{s['uniformity_hu_max']:g} HU (worst: {rec['worst_position']})"))
    if s["centre_sd_hu_max"] is not None and rec["centre_sd_hu"] > s["centre_sd_hu_max"]:
        out.append(Finding(NAME, Severity.FAIL, f"centre noise {rec['centre_sd_hu']:.1f} HU exceeds "
                                                f"{float(s['centre_sd_hu_max']):g} HU"))
    return out


def analyse(volume: Volume, regions: Regions, settings: dict[str, Any] | None = None) -> AnalysisResult:
    """Water CT number, uniformity and centre noise of a water phantom.

    Parameters
    ----------
    volume : Volume
    regions : Regions
    settings : dict, optional
        Overrides of :data:`DEFAULTS`; unknown keys raise :class:`ProfileError`.

    Returns
    -------
    AnalysisResult
        ``record`` with water_hu, uniformity_hu, centre_sd_hu, centre, periphery (per ROI
        mean and SD), slices; ``overlays.rois`` the five ROIs. Not applicable without a
        uniform water phantom section.

    References
    ----------
    Hounsfield scale (water 0 HU); ROI layout and limits: common acceptance-test practice,
    e.g. IEC 61223-3-5 (from memory).
    """
    s = _settings(settings)
    rois = _layout(volume, regions, s)
    if isinstance(rois, str):
        return AnalysisResult.not_applicable(NAME, rois)
    reason = nonfinite_reason(volume, rois)  # every pixel of the measured slices, shared with nps
    if reason:
        return AnalysisResult.not_applicable(NAME, reason)
    stats = {r.label: roi_stats(volume.hu, r) for r in rois}
    centre = stats["centre"]
    diffs = {label: stats[label]["mean_hu"] - centre["mean_hu"] for label, _ in _PERIPHERY}
    worst = max(diffs, key=lambda k: abs(diffs[k]))
    rec: dict[str, Any] = {
        "water_hu": centre["mean_hu"],
        "uniformity_hu": abs(diffs[worst]),
        "centre_sd_hu": centre["sd_hu"],
        "worst_position": worst,
        "centre": centre,
        "periphery": [{"position": label, **stats[label], "difference_hu": diffs[label]}
                      for label, _ in _PERIPHERY],
        "roi_size_vox": rois[0].y1 - rois[0].y0,
        "slices": [rois[0].z0, rois[0].z1],
    }
    findings = _findings(rec, s)
    rec["applicable"] = True
    rec["flagged"] = bool(findings)
    for r in rois:
        r.label = f"uniformity {r.label}"
    return AnalysisResult(NAME, rec, findings, Overlays(rois=rois))
