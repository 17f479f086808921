"""Streak analysis of thin-slice series (screened in slabs) checked against simulations.

Source of the simulator: scikit-image (general-purpose reference library),
``skimage.transform.radon`` / ``iradon`` (parallel beam, ramp-filtered back-projection).
The phantom is our own (an elliptical soft-tissue body with two low-contrast inserts and
a bone insert, the same on every slice, as in a cylinder); every slice gets its own
Poisson noise on the transmitted counts, so the noise of adjacent slices is independent.
Attenuation of water 0.02 /mm at about 70 keV is a value from memory; only ratios matter.

Physics of the expectations: Fourier slice theorem, Kak & Slaney, *Principles of
Computerized Tomographic Imaging* (1988): a missing arc of views leaves a missing wedge
of line orientations whose boundary streaks run along the rays of the first and last
views; too few views leave streaks along the view directions (view aliasing). Both are
properties of the acquisition, so they persist from slice to slice; the slab screen of
1.0-1.25 mm slices must find them as the per-slice screen does, and must not flag
complete data or isotropic noise.

View angles are offset by 0.23 deg so that no view falls exactly on a grid axis (a
discretisation effect of skimage's rotation-based projector, not of CT).
"""
from __future__ import annotations

import numpy as np
import pytest

skimage_transform = pytest.importorskip("skimage.transform")
radon, iradon = skimage_transform.radon, skimage_transform.iradon

from reconaudit.checker.analyses import streaks
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume
from test_streaks_reference import fbp_like_noise  # same folder: the FBP-like noise of the one-by-one checks

MU_WATER_PER_MM = 0.02  # from memory (water near 70 keV); only ratios matter
PIXEL_MM = 1.5
N = 160  # as in test_streaks_reference.py; at 128 px the wedge edges are found about 6 deg
# inside the boundary rays by the per-slice screen too (a grid effect, not of the slabs)
OFFSET_DEG = 0.23
DIRECTION_TOL_DEG = 5.0
SLICE_MM = 1.25


def body_phantom(n: int = N) -> np.ndarray:
    """Our own test phantom in HU: a soft-tissue body, two low-contrast inserts, a bone."""
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    c = (n - 1) / 2.0
    y, x = (yy - c) / n, (xx - c) / n
    hu = np.full((n, n), -1000.0)
    hu[(x / 0.34) ** 2 + (y / 0.27) ** 2 <= 1] = 40.0
    hu[((x + 0.17) / 0.06) ** 2 + ((y + 0.02) / 0.08) ** 2 <= 1] = -60.0
    hu[((x - 0.17) / 0.05) ** 2 + ((y + 0.04) / 0.05) ** 2 <= 1] = 120.0
    hu[(x / 0.04) ** 2 + ((y - 0.15) / 0.04) ** 2 <= 1] = 700.0
    return hu


def views(start: float, stop: float, count: int) -> np.ndarray:
    return np.linspace(start, stop, count, endpoint=False) + OFFSET_DEG


def simulate_series(theta_deg: np.ndarray, n_slices: int, *, i0: float = 1e5, seed: int = 0) -> np.ndarray:
    """One projection of the phantom, independent Poisson counts per slice, FBP per slice."""
    mu = np.clip(MU_WATER_PER_MM * (1.0 + body_phantom() / 1000.0), 0.0, None)
    expected = i0 * np.exp(-radon(mu, theta=theta_deg, circle=True) * PIXEL_MM)
    rng = np.random.default_rng(seed)
    out = np.empty((n_slices, N, N), dtype=np.float32)
    for z in range(n_slices):
        p = -np.log(np.maximum(rng.poisson(expected).astype(float), 1.0) / i0)
        mu_rec = iradon(p / PIXEL_MM, theta=theta_deg, circle=True, filter_name="ramp")
        out[z] = 1000.0 * (mu_rec / MU_WATER_PER_MM - 1.0)
    return out


def run(hu: np.ndarray, slice_mm: float = SLICE_MM, settings=None) -> streaks.AnalysisResult:
    vol = Volume.from_array(hu, (slice_mm, PIXEL_MM, PIXEL_MM))
    return streaks.analyse(vol, find_regions(vol), settings)


def ray_display_angle(theta_deg: float) -> float:
    """Display orientation (GUIDE convention) of the rays of skimage's view ``theta``:
    90 + theta (derived and checked numerically in test_streaks_reference.py)."""
    return (90.0 + theta_deg) % 180.0


def test_slab_size_rule():
    """round(screen_slab_mm / spacing), at least 1 (the rule of the module docstring;
    Python's round, half to even): 1.25 mm -> 2, 0.625 mm -> 4, 2.5 mm and 5 mm -> 1."""
    cfg = streaks.resolve_settings(None)
    assert cfg["screen_slab_mm"] == 2.5
    assert [streaks.slab_size(mm, cfg) for mm in (0.625, 1.0, 1.25, 2.5, 5.0)] == [4, 2, 2, 1, 1]
    assert streaks.slab_size(float("nan"), cfg) == 1 and streaks.slab_size(0.0, cfg) == 1


@pytest.fixture(scope="module")
def limited_arc() -> tuple[np.ndarray, np.ndarray]:
    theta = views(100.0 - 60.0, 100.0 + 60.0, 240)
    return theta, simulate_series(theta, 24, seed=11)


def test_thin_slice_limited_arc_flagged_with_boundary_directions(limited_arc):
    """24 slices of 1.25 mm from a 120 deg arc symmetric about theta = 100 deg: the
    missing wedge is 180 - 120 = 60 deg wide and its boundary streaks run along the rays
    of the first and last views, 90 + theta (Fourier slice theorem, Kak & Slaney 1988)."""
    theta, hu = limited_arc
    rec = run(hu).record
    assert rec["flagged"], rec["index"]
    assert len(rec["flagged_slices"]) >= 20, rec["flagged_slices"]
    expected = sorted([ray_display_angle(theta[0]), ray_display_angle(theta[-1] + 0.5)])
    wedge = rec["missing_wedge_deg"]
    assert wedge is not None
    assert abs(wedge["width_deg"] - 60.0) <= 10.0, wedge
    top_two = rec["dominant_angles_deg"][:2]
    for e in expected:
        assert min(streaks.angle_distance(e, a) for a in top_two) <= DIRECTION_TOL_DEG, (expected, top_two)


def test_thin_slice_limited_arc_localised_per_slice(limited_arc):
    """The localisation of a flagged slab stays per slice: every flagged slice gets its
    own streak map (strength above the noise level 1) and segments on that slice."""
    _, hu = limited_arc
    res = run(hu[:6])
    flagged = res.record["flagged_slices"]
    assert flagged
    strength = res.overlays.maps["streak_strength"]
    assert all(strength[z].max() > 1.0 for z in flagged)
    assert {int(s.start_zyx_vox[0]) for s in res.overlays.segments} <= set(flagged)


def test_thin_slice_sparse_views_flagged():
    """30 views over 180 deg on 24 slices of 1.25 mm: view aliasing (Kak & Slaney 1988,
    sampling of the views) on every slice, flagged, and not read as a missing wedge."""
    rec = run(simulate_series(views(0.0, 180.0, 30), 24, seed=12)).record
    assert rec["flagged"], rec["index"]
    assert len(rec["flagged_slices"]) >= 20, rec["flagged_slices"]
    assert rec["missing_wedge_deg"] is None


def test_thin_slice_full_coverage_not_flagged():
    """40 slices of 1.25 mm from 360 views over 180 deg (complete parallel-beam data,
    Kak & Slaney 1988): no slab and no slice flagged, no wedge."""
    rec = run(simulate_series(views(0.0, 180.0, 360), 40, seed=13)).record
    assert len(rec["slice_index"]) == 40
    assert not rec["flagged"], max(rec["slice_index"])
    assert rec["flagged_slices"] == []
    assert rec["missing_wedge_deg"] is None


def test_thin_slice_noise_only_not_flagged():
    """48 slices of 1.0 mm of isotropic, slice-independent FBP-like noise (slabs of 2):
    no slice exceeds the default tolerance, and the index stays near 1 (whitening
    against the measured spectrum; common practice, no source)."""
    rec = run(fbp_like_noise((48, 160, 160), 20.0, seed=5).astype(np.float32), slice_mm=1.0).record
    assert len(rec["slice_index"]) == 48
    assert not rec["flagged"], max(rec["slice_index"])
    assert rec["flagged_slices"] == []
    assert float(np.median(rec["slice_index"])) < 1.6
    assert all(rec["slice_index"][z] == rec["slice_index"][z + 1] for z in range(0, 48, 2))  # one index per slab


def test_slab_rule_leaves_thick_slices_unchanged(limited_arc):
    """At 2.5 mm the slab is one slice: the same indices, profile and flags as screening
    one by one (screen_slab_mm 0 forces slabs of one slice; common practice, no source)."""
    _, hu = limited_arc
    noisy = np.concatenate([hu[:4], fbp_like_noise((4, N, N), 20.0, seed=6).astype(np.float32)])
    default = run(noisy, slice_mm=2.5).record
    one_by_one = run(noisy, slice_mm=2.5, settings={"screen_slab_mm": 0.0}).record
    assert default == one_by_one
    assert default["flagged_slices"] and len(default["flagged_slices"]) < 8
