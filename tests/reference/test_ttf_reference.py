"""TTF against analytic truth: Gaussian-blurred discs and straight edges.

Truth (analytic): a Gaussian PSF of standard deviation s has MTF exp(-2 pi^2 s^2 f^2),
so f50 = sqrt(ln 2 / 2) / (pi s) = 0.18739 / s and f10 = sqrt(ln 10 / 2) / (pi s) =
0.34152 / s cycles/mm. A disc of radius R blurred by it and point-sampled at distance r
from its centre is exactly P(chi'^2_2(lambda = (r/s)^2) <= (R/s)^2), the non-central
chi-square CDF with 2 degrees of freedom (scipy.stats.ncx2); a blurred straight edge is
the normal CDF of the signed distance. Method references: Richard et al., Med Phys 39(7)
2012 and AAPM TG-233 (circular edge); ISO 12233 (slanted edge); Cunningham & Fenster,
Med Phys 14(4) 1987 (finite-difference correction).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from reconaudit.checker.regions import find_regions
from reconaudit.checker.analyses import ttf
from reconaudit.checker.results import Roi
from reconaudit.checker.volume import Volume

PX = 0.5  # mm


def f50_true(s: float) -> float:
    return math.sqrt(math.log(2) / 2) / (math.pi * s)


def f10_true(s: float) -> float:
    return math.sqrt(math.log(10) / 2) / (math.pi * s)


def blurred_disc(shape, radius_mm, s, cy, cx, px=PX):
    yy, xx = np.indices(shape, dtype=float)
    r = np.hypot((yy - cy) * px, (xx - cx) * px)
    return stats.ncx2.cdf((radius_mm / s) ** 2, 2, (r / s) ** 2)


def disc_volume(diameter_mm, s, *, cnr=None, nz=8, n=112, seed=0, contrast=100.0):
    cy, cx = n / 2 + 0.31, n / 2 - 0.27
    img = contrast * blurred_disc((n, n), diameter_mm / 2, s, cy, cx)
    st = np.repeat(img[None], nz, axis=0)
    if cnr:
        st = st + np.random.default_rng(seed).normal(0.0, abs(contrast) / cnr, st.shape)
    return Volume.from_array(st.astype(np.float32), (1.0, PX, PX)), [nz // 2, round(cy), round(cx)]


def only_edge(volume, centre):
    res = ttf.analyse(volume, find_regions(volume), {"centres_zyx_vox": [centre]})
    assert res.applicable
    (edge,) = res.record["edges"]
    return edge


def test_gaussian_mtf_constants():
    """The f50/f10 constants of the brief follow from exp(-2 pi^2 s^2 f^2) (analytic)."""
    assert f50_true(1.0) == pytest.approx(0.18739, abs=5e-5)
    assert f10_true(1.0) == pytest.approx(0.34152, abs=5e-5)


@pytest.mark.parametrize("s", [0.4, 0.7, 1.0])
@pytest.mark.parametrize("diameter", [10.0, 16.0, 25.0])
def test_disc_noiseless_within_2_percent(s, diameter):
    """Noiseless blurred disc (ncx2 profile, analytic): f50 and f10 within 2 %."""
    vol, c = disc_volume(diameter, s)
    e = only_edge(vol, c)
    assert e["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.02)
    assert e["f10_per_mm"] == pytest.approx(f10_true(s), rel=0.02)
    assert e["radius_mm"] == pytest.approx(diameter / 2, abs=0.15)
    assert e["ttf"][0] == pytest.approx(1.0)


@pytest.mark.parametrize("s", [0.4, 0.7, 1.0])
@pytest.mark.parametrize("diameter", [10.0, 16.0, 25.0])
def test_disc_noisy_f50_within_5_percent(s, diameter):
    """Blurred disc with white noise at contrast-to-noise 10 over 8 slices (analytic
    truth): f50 within 5 %."""
    vol, c = disc_volume(diameter, s, cnr=10, nz=8, seed=int(100 * s + diameter))
    e = only_edge(vol, c)
    assert e["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.05)
    assert e["contrast_to_noise"] == pytest.approx(10, rel=0.1)


@pytest.mark.parametrize("s", [0.4, 1.0])
@pytest.mark.parametrize("diameter", [10.0, 25.0])
def test_disc_noisy_f10_within_5_percent(s, diameter):
    """f10 is noisier than f50 (it sits where the TTF is small): within 5 % at
    contrast-to-noise 20 over 8 slices (analytic truth). At contrast-to-noise 10 over 8
    slices a 10 mm rod gives f10 errors up to about 10 % (measured, not asserted)."""
    vol, c = disc_volume(diameter, s, cnr=20, nz=8, seed=int(10 * s + diameter))
    e = only_edge(vol, c)
    assert e["f10_per_mm"] == pytest.approx(f10_true(s), rel=0.05)


@pytest.mark.parametrize("contrast", [-1000.0, 100.0])
def test_disc_polarity_does_not_matter(contrast):
    """An air rod and a bright rod with the same blur give the same TTF (analytic:
    the MTF does not depend on the sign of the edge)."""
    vol, c = disc_volume(12.0, 0.6, contrast=contrast)
    e = only_edge(vol, c)
    assert e["f50_per_mm"] == pytest.approx(f50_true(0.6), rel=0.02)
    assert np.sign(e["contrast_hu"]) == np.sign(contrast)


def straight_volume(angle_deg, s, *, cnr=None, nz=8, n=96, seed=0, horizontal=False):
    yy, xx = np.indices((n, n), dtype=float)
    th = math.radians(angle_deg)
    d = ((xx - n / 2 - 0.3) * math.cos(th) - (yy - n / 2) * math.sin(th)) * PX
    img = 100.0 * stats.norm.cdf(d / s)
    if horizontal:
        img = img.T
    st = np.repeat(img[None], nz, axis=0)
    if cnr:
        st = st + np.random.default_rng(seed).normal(0.0, 100.0 / cnr, st.shape)
    return Volume.from_array(st.astype(np.float32), (1.0, PX, PX))


@pytest.mark.parametrize("angle", [3.0, 5.0, 10.0])
@pytest.mark.parametrize("s", [0.4, 1.0])
@pytest.mark.parametrize("horizontal", [False, True])
def test_straight_edge(angle, s, horizontal):
    """Slanted straight edge (normal-CDF profile, analytic; ISO 12233 style): angle
    recovered to 0.05 deg, f50/f10 within 2 % noiseless, f50 within 5 % at
    contrast-to-noise 10 over 8 slices."""
    vol = straight_volume(angle, s, horizontal=horizontal)
    rec = ttf.straight_edge_ttf(vol, Roi(0, 7, 0, 0, 96, 96)).record
    expected_angle = 180.0 - angle if horizontal else 90.0 + angle
    assert rec["angle_deg"] == pytest.approx(expected_angle, abs=0.05)
    assert rec["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.02)
    assert rec["f10_per_mm"] == pytest.approx(f10_true(s), rel=0.02)
    noisy = straight_volume(angle, s, cnr=10, seed=int(angle * 10 + s * 7), horizontal=horizontal)
    rec = ttf.straight_edge_ttf(noisy, Roi(0, 7, 0, 0, 96, 96)).record
    assert rec["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.05)


INSERTS = [(-1000.0, 0.5), (-100.0, 0.95), (120.0, 0.85), (340.0, 0.65), (900.0, 0.45)]


def phantom_with_inserts(inserts=INSERTS, *, n=200, nz=10, noise_hu=2.0, seed=3, radius_mm=6.0):
    """A 0 HU water cylinder in air with rods on a ring, each blurred with its own s."""
    c = n / 2
    img = -1000.0 + 1000.0 * blurred_disc((n, n), 0.45 * n * PX, 0.6, c, c)
    centres = []
    for k, (hu, s) in enumerate(inserts):
        a = 2 * math.pi * k / len(inserts) + 0.3
        cy, cx = c + 0.24 * n * math.sin(a) + 0.3, c + 0.24 * n * math.cos(a) - 0.2
        img = img + hu * blurred_disc((n, n), radius_mm, s, cy, cx)
        centres.append((cy, cx))
    st = np.repeat(img[None], nz, axis=0)
    st = st + np.random.default_rng(seed).normal(0.0, noise_hu, st.shape)
    return Volume.from_array(st.astype(np.float32), (1.0, PX, PX)), centres


def test_contrast_dependence_each_insert_its_own_f50():
    """Inserts blurred by different Gaussians (low contrast more) are each reported
    with their own f50 within 5 % (analytic truth), so the contrast dependence of a
    nonlinear reconstruction shows; the spread raises a review finding."""
    vol, _ = phantom_with_inserts()
    res = ttf.analyse(vol, find_regions(vol))
    edges = res.record["edges"]
    assert len(edges) == len(INSERTS)
    for hu, s in INSERTS:
        e = min(edges, key=lambda e: abs(e["contrast_hu"] - hu))
        assert e["contrast_hu"] == pytest.approx(hu, rel=0.05)
        assert e["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.05)
        assert e["reliable"], e["reason"]
    assert any("depends on contrast" in f.message for f in res.findings)


def test_automatic_insert_finding_finds_all():
    """Automatic finding on a phantom with air, -100, +120, +340, +900 HU-like rods
    (typical CT phantom insert materials: common practice, no source; values from
    memory) finds every rod, at its place, once."""
    vol, centres = phantom_with_inserts(noise_hu=8.0, seed=5)
    found = ttf.find_rod_inserts(vol, find_regions(vol))
    assert len(found) == len(INSERTS)
    for cy, cx in centres:
        dist = min(math.hypot(f.centre_yx_vox[0] - cy, f.centre_yx_vox[1] - cx) for f in found)
        assert dist < 1.0
    assert all(f.z0 == 0 and f.z1 == vol.shape[0] - 1 for f in found)
    assert all(f.radius_mm == pytest.approx(6.0, abs=0.5) for f in found)


def test_skin_edge_of_a_large_blurred_disc():
    """Skin-air edge (Sanders, Hurwitz, Samei, Med Phys 43(10) 2016) of a 0 HU disc of
    60 mm radius in air blurred by s = 0.8 mm (ncx2 profile, analytic): f50 within 5 %
    (the outline's curvature is negligible at this radius)."""
    n, px, s = 170, 0.8, 0.8
    img = -1000.0 + 1000.0 * blurred_disc((n, n), 60.0, s, n / 2 + 0.2, n / 2 - 0.4, px=px)
    st = np.repeat(img[None], 4, axis=0) + np.random.default_rng(1).normal(0, 10.0, (4, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, px, px))
    res = ttf.analyse(vol, find_regions(vol), {"skin_edge": "always", "find_inserts": "never"})
    (edge,) = res.record["edges"]
    assert edge["kind"] == "skin"
    assert edge["f50_per_mm"] == pytest.approx(f50_true(s), rel=0.05)


def test_straight_noisy_rods_flattened_centre_line_is_not_less_accurate(monkeypatch):
    """Centre line of a straight rod in noise: with the tilt-significance rule
    (``ttf.TILT_SIGNIFICANCE`` standard errors) a noise tilt is dropped and the rod's
    slices pool about one centre. Over 16 noise seeds (12 mm disc, s = 0.7 mm, CNR 10,
    24 slices) the mean |error| of f50 and f10 against the analytic Gaussian MTF
    (f50 = 0.18739 / s, f10 = 0.34152 / s) is not larger than with the tilt always kept
    (measured: f50 0.57 % against 0.61 %, f10 1.57 % against 1.64 %), and every f50 stays
    within the 5 % of the noisy-disc checks."""
    errors = {}
    for significance in (0.0, ttf.TILT_SIGNIFICANCE):
        monkeypatch.setattr(ttf, "TILT_SIGNIFICANCE", significance)
        rows = []
        for seed in range(16):
            vol, centre = disc_volume(12.0, 0.7, cnr=10, nz=24, seed=seed)
            e = only_edge(vol, centre)
            rows.append((e["f50_per_mm"] / f50_true(0.7) - 1.0, e["f10_per_mm"] / f10_true(0.7) - 1.0))
        errors[significance] = np.abs(np.array(rows))
    kept, flattened = errors[0.0], errors[ttf.TILT_SIGNIFICANCE]
    assert flattened[:, 0].mean() <= kept[:, 0].mean()
    assert flattened[:, 1].mean() <= kept[:, 1].mean()
    assert flattened[:, 0].max() <= 0.05
