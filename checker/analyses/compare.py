"""Compare a reconstruction with a reference reconstruction of the same scan.

The strongest test of a nonlinear reconstruction is a conventional (e.g. filtered
back-projection) reconstruction of the same raw data. This module finds:

* **body surface displacement** — the signed distance of each surface voxel of one body
  from the other body's surface (SimpleITK signed Maurer distance maps, in mm;
  positive = the test's surface lies outside the reference's);
* **structure differences** — connected regions where the two images, smoothed to a
  common noise level, differ by more than their noise allows; each classified as
  ``only_in_test`` (a possible hallucination) or ``only_in_reference`` (a possible
  loss) by which image departs from its own local background;
* **NPS and TTF of both** where measurable, with the ratios test / reference.

Statistics of the structure test: both images are smoothed with the same Gaussian
(``smooth_mm``), so that the difference image's noise is small and nearly Gaussian;
its standard deviation ``sd_diff`` is measured robustly (1.4826 x MAD) inside the body,
away from the body surfaces. A voxel seeds a region when ``|diff| > seed_sigma *
sd_diff`` (5 by default: a one-sided Gaussian false-alarm rate of 2.9e-7 per voxel,
about 0.1 false seed voxels per 512 x 512 x 10 voxels after smoothing has removed most
of the independence), grows by hysteresis down to ``grow_sigma * sd_diff``, and is kept
when its volume is at least ``min_volume_mm3``. The band where the two body masks
disagree (dilated by ``surface_band_mm``) belongs to the surface displacement, not to
structure differences.

References
----------
.. [1] Maurer, Qi, Raghavan, "A linear time algorithm for computing exact Euclidean
   distance transforms of binary images in arbitrary dimensions", IEEE PAMI 25(2), 2003
   (SimpleITK's SignedMaurerDistanceMap).
.. [2] Canny, "A computational approach to edge detection", IEEE PAMI 8(6), 1986
   (hysteresis thresholding).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage

from ..errors import InconsistentGeometryError, InvalidVolumeError, ProfileError
from ..regions import Regions, find_regions
from ..results import Finding, Overlays, Point, Severity, worst_verdict
from ..volume import Volume, to_sitk

NAME = "compare"

DEFAULTS: dict[str, Any] = {
    "surface_shift_tolerance_mm": 3.0,
    "smooth_mm": 2.0,
    "seed_sigma": 5.0,
    "grow_sigma": 3.0,
    "min_volume_mm3": 60.0,
    "surface_band_mm": 3.0,
    "shell_mm": 5.0,
    "min_difference_hu": 10.0,
    "edge_gradient_hu_per_mm": 40.0,
    "present_fraction": 0.5,
    "measure_nps_ttf": True,
}
SOURCES: dict[str, str] = {
    "surface_shift_tolerance_mm": "site choice",
    "seed_sigma": "site choice (false-alarm rate stated in the module docstring)",
    "min_volume_mm3": "site choice",
    "min_difference_hu": "site choice",
    "edge_gradient_hu_per_mm": "site choice (a 10 mm, 40 HU lesion smoothed by 2 mm peaks near 8 HU/mm)",
}


@dataclass
class ComparisonResult:
    record: dict[str, Any]
    findings: list[Finding] = field(default_factory=list)
    overlays: Overlays = field(default_factory=Overlays)
    test_on_grid: Volume | None = None
    reference: Volume | None = None

    @property
    def verdict(self) -> str:
        return worst_verdict(self.findings).value


def _settings(settings: dict[str, Any] | None) -> dict[str, Any]:
    s = dict(DEFAULTS)
    unknown = set(settings or {}) - set(DEFAULTS)
    if unknown:
        raise ProfileError(f"unknown compare settings {sorted(unknown)}; known: {', '.join(sorted(DEFAULTS))}")
    s.update(settings or {})
    return s


# ---------------------------------------------------------------------- one grid
def same_grid(a: Volume, b: Volume, tol_mm: float = 1e-3) -> bool:
    return a.shape == b.shape and np.allclose(a.affine, b.affine, atol=tol_mm)


def resample_onto(moving: Volume, fixed: Volume) -> Volume:
    """``moving`` resampled onto ``fixed``'s grid (linear; outside -> -1000 HU)."""
    import SimpleITK as sitk

    out = sitk.Resample(to_sitk(moving), to_sitk(fixed), sitk.Transform(), sitk.sitkLinear, -1000.0, sitk.sitkFloat32)
    hu = sitk.GetArrayFromImage(out).astype(np.float32)
    return Volume(hu=hu, spacing_mm=fixed.spacing_mm, affine=fixed.affine.copy(), series_uid=moving.series_uid,
                  metadata=dict(moving.metadata), source=moving.source,
                  notes=list(moving.notes) + ["resampled onto the reference grid"])


def rigid_offset_mm(test: Volume, reference: Volume) -> list[float]:
    """Translation (LPS mm) that best aligns the test with the reference.

    In-plane: phase correlation of the slice-averaged, soft-tissue-clipped images;
    along z: cross-correlation of the per-slice mean profiles, only when the profile
    varies (an object constant along z has no measurable z offset, reported as 0).
    Reported, not applied: a shift is itself a finding.
    """
    from skimage.registration import phase_cross_correlation

    a = np.clip(reference.hu, -200, 300)
    b = np.clip(test.hu, -200, 300)
    (dy, dx), _, _ = phase_cross_correlation(a.mean(axis=0), b.mean(axis=0), upsample_factor=4, normalization=None)
    pa, pb = a.mean(axis=(1, 2)), b.mean(axis=(1, 2))
    dz = 0.0
    if pa.size > 2 and pa.std() > 1.0 and pb.std() > 1.0:
        pa, pb = pa - pa.mean(), pb - pb.mean()
        corr = np.correlate(pa, pb, mode="full")
        dz = float(np.argmax(corr) - (pb.size - 1))
    steps = reference.affine[:3, :3]
    return [float(v) for v in steps @ np.array([dz, dy, dx], dtype=float)]


# ---------------------------------------------------------------------- surfaces
_INPLANE = np.zeros((3, 3, 3), bool)
_INPLANE[1] = ndimage.generate_binary_structure(2, 1)

def _surface(mask: np.ndarray) -> np.ndarray:
    inplane = np.zeros((3, 3, 3), bool)
    inplane[1] = ndimage.generate_binary_structure(2, 1)
    return mask & ~ndimage.binary_erosion(mask, structure=inplane, border_value=1)


def _signed_distance_mm(mask: np.ndarray, volume: Volume) -> np.ndarray:
    """Signed distance (mm) to the surface of ``mask``: negative inside, positive outside."""
    import SimpleITK as sitk

    img = to_sitk(volume, mask.astype(np.uint8))
    dist = sitk.SignedMaurerDistanceMap(img, insideIsPositive=False, squaredDistance=False, useImageSpacing=True)
    return sitk.GetArrayFromImage(dist).astype(np.float32)


def surface_displacement(test_body: np.ndarray, ref_body: np.ndarray, volume: Volume,
                         tolerance_mm: float) -> tuple[dict[str, Any], np.ndarray]:
    """Signed shift of the test body surface from the reference body surface.

    Each test surface voxel gets the reference's signed distance there (positive:
    outside the reference body = displaced outward); each reference surface voxel gets
    minus the test's (so a part of the body missing in the test counts as inward).
    Returns the statistics and a boolean (z, y, x) mask of surface voxels beyond
    ``tolerance_mm``.
    """
    d_ref = _signed_distance_mm(ref_body, volume)
    d_test = _signed_distance_mm(test_body, volume)
    s_test, s_ref = _surface(test_body), _surface(ref_body)
    shifts = np.concatenate([d_ref[s_test], -d_test[s_ref]])
    where = np.concatenate([np.argwhere(s_test), np.argwhere(s_ref)])
    if shifts.size == 0:
        return {"mean": None, "p95": None, "max": None, "max_at_mm": None, "max_at_zyx_vox": None}, np.zeros_like(test_body)
    # the voxel pitch is the resolution of this measure: shifts below half a voxel are 0
    pitch = 0.5 * min(volume.spacing_mm[1:])
    shifts = np.where(np.abs(shifts) <= pitch, 0.0, shifts)
    i = int(np.argmax(np.abs(shifts)))
    beyond = np.zeros(test_body.shape, dtype=bool)
    big = np.abs(shifts) > tolerance_mm
    beyond[tuple(where[big].T)] = True
    at = where[i]
    stats = {
        "mean": float(np.mean(shifts)),
        "p95": float(np.percentile(np.abs(shifts), 95)),
        "max": float(shifts[i]),
        "max_at_mm": [round(float(v), 2) for v in volume.index_to_patient(at)],
        "max_at_zyx_vox": [int(v) for v in at],
        "beyond_tolerance_fraction": float(big.mean()),
    }
    return stats, beyond


# ---------------------------------------------------------------------- structures
def _sigma_vox(volume: Volume, mm: float) -> tuple[float, float, float]:
    dz, dy, dx = volume.spacing_mm
    return (mm / dz if volume.shape[0] > 1 else 0.0, mm / dy, mm / dx)


def _robust_sd(x: np.ndarray) -> float:
    if x.size == 0:
        return float("nan")
    med = np.median(x)
    return float(1.4826 * np.median(np.abs(x - med)))


def structure_differences(test: Volume, reference: Volume, test_regions: Regions, ref_regions: Regions,
                          s: dict[str, Any], surface_shift_mm: float = 0.0) -> tuple[dict[str, Any], np.ndarray]:
    """Regions present in one image and not the other; see the module docstring.

    The band left to the surface displacement is ``surface_band_mm`` plus the largest
    displacement found: tissue under a moved wall moves with it.
    """
    sig = _sigma_vox(reference, s["smooth_mm"])
    a = ndimage.gaussian_filter(test.hu, sig).astype(np.float32)
    b = ndimage.gaussian_filter(reference.hu, sig).astype(np.float32)
    diff = a - b
    band_mm = s["surface_band_mm"] + abs(surface_shift_mm)
    band_px = max(1, int(round(band_mm / min(reference.spacing_mm[1:]))))
    disagree = test_regions.body ^ ref_regions.body
    surfaces = _surface(test_regions.body) | _surface(ref_regions.body) | disagree
    exclude = ndimage.maximum_filter(surfaces.view(np.uint8), size=(1, 2 * band_px + 1, 2 * band_px + 1)).astype(bool)
    exclude |= ~reference_fov(ref_regions, reference.shape)
    # filters are biased near the image and FOV borders: leave out 3 smoothing widths
    edge = max(1, int(math.ceil(3 * max(sig[1:]))))
    border = ~ndimage.binary_erosion(ref_regions.fov, iterations=edge, border_value=0)
    exclude |= border[None]
    exclude |= _edge_band(a, b, reference, s["edge_gradient_hu_per_mm"])
    zmap, sd = _difference_z_scores(diff, ref_regions.body & test_regions.body, exclude)
    stats = {"smooth_mm": s["smooth_mm"], "sd_diff_hu": sd, "seed_sigma": s["seed_sigma"],
             "grow_sigma": s["grow_sigma"], "noise_model": "robust SD per slice, inside and outside the body"}
    labels = np.zeros(reference.shape, dtype=np.int32)
    if not math.isfinite(sd) or sd <= 0:
        return {"statistics": stats, "only_in_test": [], "only_in_reference": [], "contrast_changed": []}, labels
    strong = (np.abs(zmap) > s["seed_sigma"]) & ~exclude
    weak = (np.abs(zmap) > s["grow_sigma"]) & ~exclude
    lab, n = ndimage.label(weak)
    keep = np.unique(lab[strong])
    keep = keep[keep > 0]
    found = {"only_in_test": [], "only_in_reference": [], "contrast_changed": []}
    vox_mm3 = reference.voxel_volume_mm3
    shell_px = max(1, int(round(s["shell_mm"] / min(reference.spacing_mm[1:]))))
    objects = ndimage.find_objects(lab)
    next_id = 1
    for comp in keep:
        sl = _grow_slices(objects[comp - 1], shell_px, reference.shape)
        m_crop = lab[sl] == comp
        vol = float(m_crop.sum() * vox_mm3)
        if vol < s["min_volume_mm3"] or abs(float(np.mean(diff[sl][m_crop]))) < s["min_difference_hu"]:
            continue
        shell = _shell(m_crop, shell_px) & ~exclude[sl]
        if not shell.any():
            continue
        c_test = float(a[sl][m_crop].mean() - a[sl][shell].mean())
        c_ref = float(b[sl][m_crop].mean() - b[sl][shell].mean())
        kind = _difference_kind(c_test, c_ref, s["present_fraction"])
        m = np.zeros(reference.shape, dtype=bool)
        m[sl] = m_crop
        centroid = np.array(ndimage.center_of_mass(m))
        found[kind].append({
            "id": next_id,
            "centroid_mm": [round(float(v), 2) for v in reference.index_to_patient(centroid)],
            "centroid_zyx_vox": [round(float(v), 2) for v in centroid],
            "volume_mm3": round(vol, 1),
            "contrast_hu": round(c_ref if kind == "only_in_reference" else c_test, 1),
            "contrast_other_hu": round(c_test if kind == "only_in_reference" else c_ref, 1),
            "difference_hu": round(float(np.mean(diff[m])), 1),
        })
        labels[m] = next_id
        next_id += 1
    return {"statistics": stats, **found}, labels


def _grow_slices(sl: tuple[slice, ...], px: int, shape: tuple[int, ...]) -> tuple[slice, ...]:
    grow = (1, px, px)
    return tuple(slice(max(0, a.start - g), min(n, a.stop + g)) for a, g, n in zip(sl, grow, shape))


def _shell(mask: np.ndarray, px: int) -> np.ndarray:
    """The in-plane ring of width ``px`` around ``mask`` (one slice more above/below)."""
    grown = ndimage.maximum_filter(mask.view(np.uint8), size=(3, 2 * px + 1, 2 * px + 1)).astype(bool)
    return grown & ~mask


def _difference_kind(c_test: float, c_ref: float, present_fraction: float) -> str:
    """Where a difference region belongs, from each image's contrast to its background.

    Present in one image only when the other shows less than ``present_fraction`` of
    that contrast; otherwise both show it and only its contrast changed.
    """
    if abs(c_test) >= abs(c_ref):
        return "only_in_test" if abs(c_ref) < present_fraction * abs(c_test) else "contrast_changed"
    return "only_in_reference" if abs(c_test) < present_fraction * abs(c_ref) else "contrast_changed"


def _edge_band(a: np.ndarray, b: np.ndarray, volume: Volume, limit_hu_per_mm: float) -> np.ndarray:
    """Voxels on strong edges of either smoothed image (in-plane gradient above the limit).

    Two reconstructions of different sharpness differ most at high-contrast edges
    (bone, lung, table) even when nothing is added or lost; those differences are what
    the NPS/TTF comparison measures, not structures.
    """
    dy, dx = volume.spacing_mm[1], volume.spacing_mm[2]
    band = np.zeros(a.shape, dtype=bool)
    for img in (a, b):
        gy = np.gradient(img, axis=1) / dy
        gx = np.gradient(img, axis=2) / dx
        band |= np.hypot(gy, gx) > limit_hu_per_mm
    return band


def _difference_z_scores(diff: np.ndarray, body: np.ndarray, exclude: np.ndarray) -> tuple[np.ndarray, float]:
    """``diff`` divided by its robust SD, estimated per slice inside and outside the body.

    The noise of a smoothed difference differs between the body and the air and rises
    in the first and last slices (the filter sees fewer independent voxels there), so
    one global SD would give false alarms there. Returns the z-score volume and the
    median SD (HU) for the record.
    """
    z = np.zeros(diff.shape, dtype=np.float32)
    sds = []
    for k in range(diff.shape[0]):
        for part in (body[k], ~body[k]):
            use = part & ~exclude[k]
            if use.sum() < 50:
                continue
            sd = _robust_sd(diff[k][use])
            if sd > 0:
                z[k][part] = diff[k][part] / sd
                sds.append(sd)
    return z, float(np.median(sds)) if sds else float("nan")


def reference_fov(regions: Regions, shape: tuple[int, int, int]) -> np.ndarray:
    return np.broadcast_to(regions.fov[None], shape)


# ---------------------------------------------------------------------- NPS / TTF
def _measure(volume: Volume, regions: Regions, name: str) -> dict[str, Any] | None:
    from . import get

    try:
        rec = get(name)(volume, regions, None).record
    except Exception as exc:  # measured where measurable
        return {"applicable": False, "reason": f"{type(exc).__name__}: {exc}"}
    return rec


def _ratio(a: Any, b: Any) -> float | None:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and b:
        return float(a) / float(b)
    return None


def nps_ttf_comparison(test: Volume, reference: Volume, rt: Regions, rr: Regions) -> tuple[dict, dict]:
    nt, nr = _measure(test, rt, "nps"), _measure(reference, rr, "nps")
    nps = {"test": nt, "reference": nr}
    if nt and nr and nt.get("applicable", True) and nr.get("applicable", True):
        nps["noise_ratio"] = _ratio(nt.get("noise_hu"), nr.get("noise_hu"))
        nps["f_av_ratio"] = _ratio(nt.get("f_av_per_mm"), nr.get("f_av_per_mm"))
    tt, tr = _measure(test, rt, "ttf"), _measure(reference, rr, "ttf")
    ttf = {"test": tt, "reference": tr, "f50_ratios": []}
    for e in (tt or {}).get("edges", []) or []:
        refs = [(abs(r.get("contrast_hu", 0) - e.get("contrast_hu", 0)), r) for r in (tr or {}).get("edges", []) or []]
        if refs:
            _, r = min(refs, key=lambda x: x[0])
            ttf["f50_ratios"].append({"contrast_hu": e.get("contrast_hu"), "ratio": _ratio(e.get("f50_per_mm"), r.get("f50_per_mm"))})
    return nps, ttf


# ---------------------------------------------------------------------- entry point
MIN_INPLANE_VOXELS = 16


def _check_comparable(volume: Volume, role: str) -> None:
    """Refuse volumes the comparison cannot measure, with the reason."""
    name = volume.source or role
    if min(volume.shape[1:]) < MIN_INPLANE_VOXELS:
        raise InvalidVolumeError(f"the {role} is {volume.shape[2]} x {volume.shape[1]} pixels in-plane; "
                                 f"comparing needs at least {MIN_INPLANE_VOXELS} x {MIN_INPLANE_VOXELS}", source=name)
    bad = int(volume.hu.size - np.count_nonzero(np.isfinite(volume.hu)))
    if bad:
        raise InvalidVolumeError(f"the {role} holds {bad} non-finite (NaN or infinite) voxels; expected CT numbers in HU",
                                 source=name)

def compare_volumes(test: Volume, reference: Volume, settings: dict[str, Any] | None = None) -> ComparisonResult:
    """Compare ``test`` with ``reference``; see the module docstring.

    Returns a :class:`ComparisonResult` whose ``record`` is the comparison.json content.
    """
    s = _settings(settings)
    for role, vol in (("test", test), ("reference", reference)):
        _check_comparable(vol, role)
    notes = []
    if same_grid(test, reference):
        on_grid = test
    else:
        if test.hu.size == 0 or reference.hu.size == 0:
            raise InconsistentGeometryError("an empty volume cannot be compared")
        on_grid = resample_onto(test, reference)
        notes.append("the test was resampled onto the reference grid from the DICOM geometry")
    offset = rigid_offset_mm(on_grid, reference)
    rt, rr = find_regions(on_grid), find_regions(reference)
    findings: list[Finding] = []
    if not (rt.has_body and rr.has_body):
        shift, beyond = {"mean": None, "p95": None, "max": None, "max_at_mm": None}, np.zeros(reference.shape, bool)
        notes.append("no body in one of the images: surface displacement not measured")
    else:
        shift, beyond = surface_displacement(rt.body, rr.body, reference, s["surface_shift_tolerance_mm"])
    structures, labels = structure_differences(on_grid, reference, rt, rr, s, shift.get("max") or 0.0)
    if shift.get("max") is not None and abs(shift["max"]) > s["surface_shift_tolerance_mm"]:
        findings.append(Finding(NAME, Severity.REVIEW,
            f"the body surface of the test is displaced by up to {shift['max']:+.1f} mm from the reference "
            f"at LPS {shift['max_at_mm']} mm (tolerance {s['surface_shift_tolerance_mm']} mm)"))
    for item in structures["only_in_test"]:
        findings.append(Finding(NAME, Severity.REVIEW,
            f"a structure of {item['volume_mm3']:.0f} mm3 ({item['contrast_hu']:+.0f} HU) is in the test and not in "
            f"the reference at LPS {item['centroid_mm']} mm: possibly not real"))
    for item in structures["only_in_reference"]:
        findings.append(Finding(NAME, Severity.REVIEW,
            f"a structure of {item['volume_mm3']:.0f} mm3 ({item['contrast_hu']:+.0f} HU) is in the reference and "
            f"missing or blurred in the test at LPS {item['centroid_mm']} mm"))
    if structures["contrast_changed"]:
        n = len(structures["contrast_changed"])
        findings.append(Finding(NAME, Severity.INFO,
            f"{n} region(s) present in both images with a different contrast (largest "
            f"{max(abs(i['contrast_hu'] - i['contrast_other_hu']) for i in structures['contrast_changed']):.0f} HU apart)"))
    if max(abs(v) for v in offset) > 2 * max(reference.spacing_mm):
        findings.append(Finding(NAME, Severity.REVIEW, f"the test is offset from the reference by {offset} mm (LPS)"))
    nps, ttf = nps_ttf_comparison(on_grid, reference, rt, rr) if s["measure_nps_ttf"] else ({}, {})
    record = {
        "body_surface_shift_mm": shift,
        "rigid_offset_mm": offset,
        "only_in_test": structures["only_in_test"],
        "only_in_reference": structures["only_in_reference"],
        "contrast_changed": structures["contrast_changed"],
        "difference_statistics": structures["statistics"],
        "nps": nps,
        "ttf": ttf,
        "notes": notes,
    }
    points = [Point(tuple(i["centroid_zyx_vox"]), f"{k}: {i['contrast_hu']:+.0f} HU") for k in ("only_in_test", "only_in_reference")
              for i in structures[k]]
    overlays = Overlays(labels=labels, points=points, maps={"surface_shift_beyond_tolerance": beyond.astype(np.float32)})
    return ComparisonResult(record=record, findings=findings, overlays=overlays, test_on_grid=on_grid, reference=reference)
