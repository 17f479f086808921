"""Streak analysis checked against simulations made with scikit-image's radon/iradon.

Source of the simulator: scikit-image (general-purpose reference library),
``skimage.transform.radon`` / ``iradon`` (parallel beam, ramp-filtered back-projection).
The phantom is our own (an elliptical soft-tissue body with two low-contrast inserts and
one bone insert); Poisson noise is added to the transmitted counts. Attenuation of water
0.02 /mm at about 70 keV is a value from memory; only ratios matter here.

Physics of the expectations: Fourier slice theorem, Kak & Slaney, *Principles of
Computerized Tomographic Imaging* (1988): a parallel projection measures the image
spectrum on one line through the origin, perpendicular to its rays, so a missing arc of
views leaves a missing wedge of line orientations whose boundary streaks run along the
boundary rays; too few views leave streaks along the view directions (view aliasing);
photon starvation through two dense objects leaves the strongest streak along the line
joining them.

View angles are offset by 0.23 deg so that no view falls exactly on a grid axis, where
skimage's rotation-based projector is exact and elsewhere interpolating (a
discretisation effect of the simulator, not of CT).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

skimage_transform = pytest.importorskip("skimage.transform")
radon, iradon = skimage_transform.radon, skimage_transform.iradon

from reconaudit.checker.analyses import streaks
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume

MU_WATER_PER_MM = 0.02  # from memory (water near 70 keV); only ratios matter
PIXEL_MM = 1.5
N = 160
OFFSET_DEG = 0.23
DIRECTION_TOL_DEG = 5.0


def body_phantom(n: int = N, round_body: bool = False) -> np.ndarray:
    """Our own test phantom in HU: a soft-tissue body, two low-contrast inserts, a bone."""
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    c = (n - 1) / 2.0
    y, x = (yy - c) / n, (xx - c) / n
    hu = np.full((n, n), -1000.0)
    ay = 0.34 if round_body else 0.27
    hu[(x / 0.34) ** 2 + (y / ay) ** 2 <= 1] = 40.0
    if not round_body:
        hu[((x + 0.17) / 0.06) ** 2 + ((y + 0.02) / 0.08) ** 2 <= 1] = -60.0
        hu[((x - 0.17) / 0.05) ** 2 + ((y + 0.04) / 0.05) ** 2 <= 1] = 120.0
    hu[(x / 0.04) ** 2 + ((y - 0.15) / 0.04) ** 2 <= 1] = 700.0
    return hu


METAL_AT = [(-0.11, 0.04), (0.11, -0.04)]  # (x, y) as fractions of the width, from the centre


def metal_phantom(n: int = N) -> np.ndarray:
    """Round body with two dense rods (50 000 HU-equivalent) for photon starvation."""
    hu = body_phantom(n, round_body=True)
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    c = (n - 1) / 2.0
    y, x = (yy - c) / n, (xx - c) / n
    for px, py in METAL_AT:
        hu[(x - px) ** 2 + (y - py) ** 2 <= 0.015**2] = 30000.0
    return hu


def simulate(hu: np.ndarray, theta_deg: np.ndarray, *, i0: float = 1e5, seed: int = 0) -> np.ndarray:
    """Project, add Poisson noise to the counts (at least one count), reconstruct (FBP)."""
    mu = np.clip(MU_WATER_PER_MM * (1.0 + hu / 1000.0), 0.0, None)
    line_integrals = radon(mu, theta=theta_deg, circle=True) * PIXEL_MM
    counts = np.random.default_rng(seed).poisson(i0 * np.exp(-line_integrals)).astype(float)
    p = -np.log(np.maximum(counts, 1.0) / i0)
    mu_rec = iradon(p / PIXEL_MM, theta=theta_deg, circle=True, filter_name="ramp")
    return (1000.0 * (mu_rec / MU_WATER_PER_MM - 1.0)).astype(np.float32)


def views(start: float, stop: float, count: int) -> np.ndarray:
    return np.linspace(start, stop, count, endpoint=False) + OFFSET_DEG


def run(image: np.ndarray) -> streaks.AnalysisResult:
    vol = Volume.from_array(np.asarray(image, dtype=np.float32)[None] if image.ndim == 2 else image, (2.0, PIXEL_MM, PIXEL_MM))
    return streaks.analyse(vol, find_regions(vol))


def ray_display_angle(theta_deg: float) -> float:
    """Display orientation (GUIDE convention) of the rays of skimage's view ``theta``.

    skimage's radon rotates the image by -theta (clockwise on screen, skimage's rotate
    being counter-clockwise for positive angles) and sums along axis 0, i.e. along
    columns (display orientation 90). A line at display orientation a becomes a - theta
    after the rotation; the rays are the lines that become vertical: a = 90 + theta.
    Checked numerically by ``test_skimage_view_angle_mapping``.
    """
    return (90.0 + theta_deg) % 180.0


def dist(a: float, b: float) -> float:
    return streaks.angle_distance(a, b)


def test_skimage_view_angle_mapping():
    """A thin line at display orientation 40 deg integrates to its maximum at the view
    whose rays are parallel to it: theta = 40 - 90 = -50 = 130 mod 180 (derivation in
    ``ray_display_angle``; skimage documentation of radon/rotate)."""
    n = 129
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    c = (n - 1) / 2.0
    a = np.radians(40.0)
    # normal of a line with direction (dy, dx) = (-sin a, cos a) is (cos a, sin a)
    offset = (yy - c) * np.cos(a) + (xx - c) * np.sin(a)
    img = ((np.abs(offset) < 0.8) & ((yy - c) ** 2 + (xx - c) ** 2 < (0.4 * n) ** 2)).astype(float)
    theta = np.arange(0.0, 180.0, 1.0)
    sino = radon(img, theta=theta, circle=True)
    best = theta[np.argmax(sino.max(axis=0))]
    assert dist(ray_display_angle(best), 40.0) <= 1.0


@pytest.fixture(scope="module")
def full_coverage() -> np.ndarray:
    return simulate(body_phantom(), views(0.0, 180.0, 360))


def test_full_coverage_not_flagged(full_coverage):
    """360 views over 180 deg (complete parallel-beam data, Kak & Slaney 1988): no flag."""
    res = run(full_coverage)
    assert res.applicable
    assert not res.flagged, res.record["index"]
    assert res.record["missing_wedge_deg"] is None
    assert res.record["index"] < streaks.DEFAULTS["tolerance_index"]


def test_smoothed_full_coverage_not_flagged(full_coverage):
    """The same reconstruction smoothed (Gaussian, SD 1 px): smoothing is isotropic, so
    the angular distribution stays flat (common practice, no source)."""
    res = run(ndimage.gaussian_filter(full_coverage, 1.0))
    assert not res.flagged, res.record["index"]
    assert res.record["missing_wedge_deg"] is None


@pytest.mark.parametrize("arc_deg", [120.0, 150.0])
def test_limited_arc_flagged_with_boundary_directions(arc_deg):
    """An arc symmetric about theta = 100 deg (common practice, no source: a full scan
    needs 180 deg plus the fan angle, about 200 deg; 120 deg leaves a large wedge).

    Fourier slice theorem (Kak & Slaney 1988): the measured views cover ray orientations
    90 + theta for theta in [100 - arc/2, 100 + arc/2]; the missing wedge of line
    orientations has width 180 - arc and its boundary streaks run along the rays of the
    first and last views.
    """
    centre = 100.0
    theta = views(centre - arc_deg / 2, centre + arc_deg / 2, int(2 * arc_deg))
    res = run(simulate(body_phantom(), theta))
    rec = res.record
    assert rec["flagged"]
    expected = sorted([ray_display_angle(theta[0]), ray_display_angle(theta[-1] + 0.5)])
    wedge = rec["missing_wedge_deg"]
    assert wedge is not None
    assert abs(wedge["width_deg"] - (180.0 - arc_deg)) <= 10.0, wedge
    top_two = rec["dominant_angles_deg"][:2]
    for e in expected:
        assert min(dist(e, a) for a in top_two) <= DIRECTION_TOL_DEG, (expected, top_two)
    assert any(s.start_zyx_vox[0] == 0 for s in res.overlays.segments) or rec["flagged_slices"] == [0]
    assert res.overlays.maps["streak_strength"][0].max() > 1.0


def test_sparse_views_flagged():
    """30 views over 180 deg: view aliasing (Kak & Slaney 1988, sampling of the views)."""
    res = run(simulate(body_phantom(), views(0.0, 180.0, 30)))
    assert res.flagged, res.record["index"]
    assert res.record["missing_wedge_deg"] is None


def test_metal_pair_strongest_along_joining_line():
    """Two dense rods with photon starvation (counts floored at one): the rays through
    both rods are starved most, so the strongest streak runs along the line joining them
    (Kak & Slaney 1988; J. Hsieh, Computed Tomography, SPIE Press, on metal artefacts)."""
    res = run(simulate(metal_phantom(), views(0.0, 180.0, 360)))
    (x0, y0), (x1, y1) = METAL_AT
    joining = float(np.degrees(np.arctan2(-(y1 - y0), x1 - x0)) % 180.0)  # atan2(-dy, dx)
    assert res.flagged, res.record["index"]
    assert dist(res.record["dominant_angles_deg"][0], joining) <= DIRECTION_TOL_DEG, (joining, res.record["dominant_angles_deg"])


def fbp_like_noise(shape: tuple[int, ...], sd: float, seed: int) -> np.ndarray:
    """White noise shaped to a ramp-like NPS, |f| with a smooth roll-off (the FBP noise
    power spectrum shape, Kak & Slaney 1988 ch. 5); isotropic by construction."""
    rng = np.random.default_rng(seed)
    white = rng.normal(size=shape)
    ky = np.fft.fftfreq(shape[-2])[:, None]
    kx = np.fft.fftfreq(shape[-1])[None, :]
    f = np.sqrt(ky**2 + kx**2)
    shaped = np.real(np.fft.ifft2(np.fft.fft2(white) * np.sqrt(f) * np.exp(-((f / 0.35) ** 2))))
    return shaped / shaped.std() * sd


def test_hundred_noise_slices_not_flagged():
    """100 slices of isotropic noise only: no slice exceeds the default tolerance."""
    noise = fbp_like_noise((100, 128, 128), 20.0, seed=3).astype(np.float32)
    res = run(noise)
    assert res.applicable
    assert not res.flagged, max(res.record["slice_index"])
    assert res.record["flagged_slices"] == []
    assert len(res.record["slice_index"]) == 100
