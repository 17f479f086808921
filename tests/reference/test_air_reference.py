"""Checks of the air analysis against the Hounsfield scale and against known truth.

The phantoms are made here (not the demo scenario): an invented torso of water with
lungs, arms, a patient table, a foam mattress and a cable, in air, with spatially
correlated noise (white noise band-pass filtered like a filtered back-projection: the
noise power peaks at mid frequencies and vanishes at zero frequency and at the Nyquist
frequency, common practice, no source) and a Gaussian blur standing in for the system's
resolution. Structures of known size, CT number and position are inserted into the air.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from reconaudit.checker.analyses import air
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume

AIR_HU = -1000.0  # Hounsfield scale: air -1000 HU by definition
WATER_HU = 0.0  # Hounsfield scale: water 0 HU by definition


# ------------------------------------------------------------------ phantom builders
def correlated_noise(shape: tuple[int, int, int], sd: float, seed: int) -> np.ndarray:
    """Band-pass (FBP-like) correlated noise of standard deviation ``sd``."""
    rng = np.random.default_rng(seed)
    w = rng.standard_normal(shape).astype(np.float32)
    fine = ndimage.gaussian_filter(w, (0.6, 0.9, 0.9))
    coarse = ndimage.gaussian_filter(w, (0.6, 2.2, 2.2))
    n = fine - coarse  # difference of Gaussians: zero at zero frequency, ramp-like, then falls
    return (n * (sd / n.std())).astype(np.float32)


def ellipsoid_fraction(shape, centre_zyx_mm, semi_zyx_mm, spacing, supersample: int = 3) -> np.ndarray:
    """Fraction of each voxel inside an ellipsoid (supersampled partial volume)."""
    dz, dy, dx = spacing
    cz, cy, cx = centre_zyx_mm
    az, ay, ax = semi_zyx_mm
    out = np.zeros(shape, dtype=np.float32)
    z0 = max(0, int((cz - az) / dz) - 1)
    z1 = min(shape[0], int((cz + az) / dz) + 2)
    y0 = max(0, int((cy - ay) / dy) - 1)
    y1 = min(shape[1], int((cy + ay) / dy) + 2)
    x0 = max(0, int((cx - ax) / dx) - 1)
    x1 = min(shape[2], int((cx + ax) / dx) + 2)
    off = (np.arange(supersample) + 0.5) / supersample - 0.5
    zz = (np.arange(z0, z1)[:, None] + off[None]).ravel() * dz
    yy = (np.arange(y0, y1)[:, None] + off[None]).ravel() * dy
    xx = (np.arange(x0, x1)[:, None] + off[None]).ravel() * dx
    inside = (
        ((zz[:, None, None] - cz) / az) ** 2
        + ((yy[None, :, None] - cy) / ay) ** 2
        + ((xx[None, None, :] - cx) / ax) ** 2
    ) <= 1.0
    s = supersample
    frac = inside.reshape(z1 - z0, s, y1 - y0, s, x1 - x0, s).mean(axis=(1, 3, 5))
    out[z0:z1, y0:y1, x0:x1] = frac
    return out


def ellipse_mask(ny: int, nx: int, cy: float, cx: float, ay: float, ax: float) -> np.ndarray:
    y, x = np.mgrid[0:ny, 0:nx]
    return ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0


def torso_phantom(
    nz: int = 40,
    n: int = 160,
    spacing: tuple[float, float, float] = (2.0, 1.25, 1.25),
    noise_sd: float = 12.0,
    seed: int = 1,
    arms: bool = True,
    table: bool = True,
    mattress: bool = True,
    cable: bool = True,
    padding_hu: float | None = None,
    inserts: list[tuple[tuple[float, float, float], tuple[float, float, float], float]] = (),
) -> Volume:
    """An invented torso in air; ``inserts``: (centre_zyx_mm, semi_zyx_mm, HU) in the air.

    In-plane coordinates in pixels of an ``n`` x ``n`` image (FOV circle of radius
    0.49 n); the body is centred slightly anterior so that the table fits below it.
    """
    dz, dy, dx = spacing
    img = np.full((n, n), AIR_HU, dtype=np.float32)
    c = n / 2.0
    body = ellipse_mask(n, n, c - 0.06 * n, c, 0.20 * n, 0.28 * n)
    img[body] = WATER_HU
    for side in (-1, 1):
        lung = ellipse_mask(n, n, c - 0.08 * n, c + side * 0.12 * n, 0.10 * n, 0.07 * n)
        img[lung] = -820.0
        if arms:
            arm = ellipse_mask(n, n, c - 0.04 * n, c + side * 0.38 * n, 0.06 * n, 0.045 * n)
            img[arm] = 40.0
    if mattress:
        mat = ellipse_mask(n, n, c + 0.17 * n, c, 0.045 * n, 0.30 * n) & ~body
        img[mat] = -880.0
    if table:
        y, x = np.mgrid[0:n, 0:n]
        slab = (y >= c + 0.205 * n) & (y < c + 0.24 * n) & (np.abs(x - c) < 0.33 * n)
        img[slab] = 250.0
    if cable:
        img[ellipse_mask(n, n, c - 0.34 * n, c + 0.22 * n, 2.0 / dy, 2.0 / dx)] = 300.0
    vol = np.repeat(img[None], nz, axis=0)
    for centre, semi, value in inserts:
        f = ellipsoid_fraction(vol.shape, centre, semi, spacing)
        vol += f * (value - vol)
    vol = ndimage.gaussian_filter(vol, (0.4, 0.6, 0.6))
    vol += correlated_noise(vol.shape, noise_sd, seed)
    padding = None
    if padding_hu is not None:
        fov = ellipse_mask(n, n, c - 0.5, c - 0.5, 0.49 * n, 0.49 * n)
        vol[:, ~fov] = padding_hu
        padding = ~fov
    return Volume.from_array(vol, spacing_mm=spacing, origin_mm=(-100.0, -100.0, 0.0), padding_mask=padding)


def _analyse(vol: Volume, settings=None):
    regions = find_regions(vol)
    return regions, air.analyse(vol, regions, settings)


def _lps(vol: Volume, centre_zyx_mm) -> np.ndarray:
    cz, cy, cx = centre_zyx_mm
    return vol.index_to_patient((cz / vol.spacing_mm[0], cy / vol.spacing_mm[1], cx / vol.spacing_mm[2]))


# ------------------------------------------------------------------------- checks
def test_air_mean_is_minus_1000_hu():
    """Hounsfield scale: air is -1000 HU by definition. The air mean measured on a
    generated torso whose air is -1000 HU with 12 HU correlated noise (and arms, a
    cable and a mattress inside the air region) is -1000 +/- 2 HU, and the noise is the
    generated 12 HU within 10 %."""
    vol = torso_phantom(seed=11)
    _, res = _analyse(vol)
    assert res.applicable
    assert abs(res.record["mean_hu"] - AIR_HU) <= 2.0
    assert res.record["noise_hu"] == pytest.approx(12.0, rel=0.10)


INSERTS = [
    # (centre z, y, x in mm from the first voxel, semi-axes z, y, x in mm, HU)
    ((40.0, 30.0, 60.0), (7.5, 7.0, 8.0), 30.0),  # bright, tissue-like, about 15 mm
    ((36.0, 25.0, 130.0), (7.0, 7.0, 7.0), -920.0),  # faint ghost, 80 HU above air, 14 mm
]


def test_inserted_structures_found_located_and_sized():
    """Known truth: two ellipsoids inserted into the air of our own torso phantom (air
    noise 12 HU, correlated): a +30 HU one of about 15 mm and a faint -920 HU one of
    about 14 mm. Both are found, flagged as isolated, their centroids lie within 3 mm of
    the true centres and their volumes within +/-35 % of 4/3 pi abc (analytic)."""
    vol = torso_phantom(seed=5, inserts=INSERTS)
    _, res = _analyse(vol)
    flagged = [st for st in res.record["structures"] if st["flagged"]]
    assert len(flagged) == 2
    for centre, semi, value in INSERTS:
        truth = _lps(vol, centre)
        best = min(flagged, key=lambda st: np.linalg.norm(np.array(st["centroid_mm"]) - truth))
        assert np.linalg.norm(np.array(best["centroid_mm"]) - truth) <= 3.0
        true_volume = 4.0 / 3.0 * math.pi * np.prod(semi)
        assert abs(best["volume_mm3"] / true_volume - 1.0) <= 0.35
        assert best["kind"] == "isolated"
        assert best["mean_hu"] > AIR_HU + 40.0
    labels = res.overlays.labels
    assert labels.dtype == np.int32 and labels.shape == vol.shape
    assert sorted(np.unique(labels[labels > 0]).tolist()) == [st["id"] for st in res.record["structures"]]
    assert sum(f.severity.value == "review" for f in res.findings) == 2


def test_clean_torso_arms_cable_table_not_flagged():
    """Common practice, no source: arms, cables and a mattress run through the whole
    scanned range and the table lies under the patient; none of them is suspicious. On a
    clean torso with all of them: no structure flags, both arms and the cable are
    classified leaves_scan, and the table is the regions' table (the air excludes it)."""
    vol = torso_phantom(seed=7)
    regions, res = _analyse(vol)
    structures = res.record["structures"]
    assert not any(st["flagged"] for st in structures)
    n = vol.shape[1]
    c = n / 2.0
    arm_cols = [round(c - 0.38 * n), round(c + 0.38 * n)]
    cable_yx = (round(c - 0.34 * n), round(c + 0.22 * n))
    labels = res.overlays.labels
    kinds = {st["id"]: st["kind"] for st in structures}
    for col in arm_cols:
        assert kinds[int(labels[20, round(c - 0.04 * n), col])] == "leaves_scan"
    assert kinds[int(labels[20, cable_yx[0], cable_yx[1]])] == "leaves_scan"
    slab_row = round(c + 0.22 * n)
    assert regions.table[:, slab_row, round(c)].all()
    assert not (labels[regions.table] > 0).any()


@pytest.mark.parametrize("noise_sd", [5.0, 12.0, 25.0])
def test_clean_volumes_give_no_false_flags(noise_sd):
    """The threshold is set for a stated false-alarm rate (0.05 per series, Euler
    characteristic of a Gaussian field, Worsley et al. 1996, from memory): on three clean
    torsos of 48 slices with 5, 12 and 25 HU correlated noise, no structure flags (the
    three together make 0 false flags)."""
    vol = torso_phantom(nz=48, noise_sd=noise_sd, seed=int(noise_sd) + 100)
    _, res = _analyse(vol)
    assert res.applicable
    assert [st for st in res.record["structures"] if st["flagged"]] == []
    assert not res.flagged


def test_padding_outside_reconstruction_circle_never_flags():
    """Common practice, no source: scanners store pixels outside the reconstruction
    circle as a padding value (here -3024 HU, declared as padding). The FOV is found as a
    circle, the air mean stays -1000 +/- 2 HU and nothing at the FOV edge flags."""
    vol = torso_phantom(seed=9, padding_hu=-3024.0)
    regions, res = _analyse(vol)
    assert regions.fov_is_circle
    assert abs(res.record["mean_hu"] - AIR_HU) <= 2.0
    assert not any(st["flagged"] for st in res.record["structures"])
    vol2 = torso_phantom(seed=9, padding_hu=-3024.0)
    vol2.padding_mask = None  # the same pixels, undeclared: found from their values
    regions2, res2 = _analyse(vol2)
    assert regions2.fov_is_circle
    assert not any(st["flagged"] for st in res2.record["structures"])


def test_single_slice_structure_counts_as_isolated():
    """The viewer's current-slice mode: on a one-slice volume every structure touches the
    first and last slice; with single_slice_mode "auto" a structure that touches nothing
    in-plane is still isolated (and flags). (Arms and cables, isolated in-plane, flag too
    in this mode: one slice cannot tell them apart; this phantom has none.) With the mode
    off, every structure leaves the scan and nothing flags."""
    vol = torso_phantom(nz=40, seed=3, inserts=INSERTS[:1], arms=False, cable=False)
    z = int(round(40.0 / vol.spacing_mm[0]))
    one = Volume(hu=vol.hu[z : z + 1].copy(), spacing_mm=vol.spacing_mm, affine=vol.affine, padding_mask=None)
    _, res = _analyse(one)
    assert res.record["single_slice_mode"] is True
    flagged = [st for st in res.record["structures"] if st["flagged"]]
    assert len(flagged) == 1
    truth = _lps(vol, INSERTS[0][0])[:2]
    assert np.linalg.norm(np.array(flagged[0]["centroid_mm"][:2]) - truth) <= 3.0
    _, forced = _analyse(one, {"single_slice_mode": False})
    assert not any(st["flagged"] for st in forced.record["structures"])
