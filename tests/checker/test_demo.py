"""The demo scenario: deterministic, and each series has the physics it claims.

The "small" series are simulated once per test session (module fixture) and shared.
"""
from __future__ import annotations

import numpy as np
import pytest

from reconaudit.checker import demo
from reconaudit.checker.volume import Volume

TORSO_PX_MM = 1.4
PHANTOM_PX_MM = 0.9


@pytest.fixture(scope="module")
def series() -> dict[str, Volume]:
    return {name: demo.make_volume(name) for name in demo.SERIES}


def _mm_to_index(x_mm: float, y_mm: float, n: int, px: float) -> tuple[int, int]:
    return int(round(n // 2 + y_mm / px)), int(round(n // 2 + x_mm / px))


def _uniform_rois(hu: np.ndarray, slices: range, size: int = 64) -> list[np.ndarray]:
    c = hu.shape[1] // 2
    offsets = ((-40, -40), (-40, 40), (40, -40), (40, 40), (0, 0))
    return [
        hu[k, c + dy - size // 2 : c + dy + size // 2, c + dx - size // 2 : c + dx + size // 2].astype(float)
        for k in slices
        for dy, dx in offsets
    ]


def radial_nps(rois: list[np.ndarray], px_mm: float) -> tuple[np.ndarray, np.ndarray, float]:
    """Radial NPS of mean-subtracted square ROIs, and the 2-D NPS integral (variance).

    NPS = (dx dy / (Nx Ny)) <|DFT(ROI - mean)|^2> (IEC 62220-1-1 normalisation, ICRU
    Report 87); Parseval: the integral of the 2-D NPS equals the pixel variance.
    """
    n = rois[0].shape[0]
    nps2d = np.mean([np.abs(np.fft.fft2(r - r.mean())) ** 2 for r in rois], axis=0) * px_mm**2 / (n * n)
    f = np.fft.fftfreq(n, px_mm)
    fr = np.hypot(f[:, None], f[None, :]).ravel()
    edges = np.arange(0.0, f.max() + 1e-9, 1.0 / (n * px_mm))
    idx = np.digitize(fr, edges)
    counts = np.maximum(np.bincount(idx, minlength=edges.size + 1), 1)
    rad = np.bincount(idx, nps2d.ravel(), edges.size + 1) / counts
    fc = np.bincount(idx, fr, edges.size + 1) / counts
    ok = (fc > 0) & (fc <= f.max())
    return fc[ok], rad[ok], float(nps2d.sum() / (n * px_mm) ** 2)


def f_av(freq: np.ndarray, nps: np.ndarray) -> float:
    """Mean NPS frequency (Solomon, Christianson & Samei, Med Phys 39(10), 2012)."""
    return float((freq * nps).sum() / nps.sum())


# --------------------------------------------------------------------------- API
def test_every_series_is_a_padded_hu_volume(series):
    for name, vol in series.items():
        assert vol.hu.dtype == np.float32 and vol.hu.shape == (16, 256, 256), name
        assert vol.padding_mask is not None and vol.padding_mask.shape == (256, 256)
        assert np.all(vol.hu[:, vol.padding_mask] == demo.PADDING_HU), name
        inside = vol.hu[:, ~vol.padding_mask]
        assert inside.min() >= -1024.0 and np.isfinite(inside).all(), name
        assert vol.metadata["modality"] == "CT" and vol.identifiers == {}


def test_spacing_and_geometry(series):
    assert series["qa_phantom"].spacing_mm == (2.5, PHANTOM_PX_MM, PHANTOM_PX_MM)
    assert series["torso_clean"].spacing_mm == (2.5, TORSO_PX_MM, TORSO_PX_MM)
    # the centre pixel of the reconstruction circle sits at LPS x = y = 0
    xyz = series["torso_clean"].index_to_patient((0, 128, 128))
    assert xyz[0] == pytest.approx(0.0) and xyz[1] == pytest.approx(0.0)


def test_unknown_series_and_size_are_refused():
    with pytest.raises(KeyError, match="unknown demo series"):
        demo.make_volume("no_such_series")
    with pytest.raises(ValueError, match="size"):
        demo.make_volume("qa_phantom", size="huge")


def test_same_seed_gives_identical_arrays(series):
    again = demo.make_volume("torso_metal")
    np.testing.assert_array_equal(again.hu, series["torso_metal"].hu)


def test_different_series_get_different_noise(series):
    diff = series["torso_clean"].hu - series["compare_reference"].hu
    body = series["torso_clean"].hu > -200
    assert 3.0 < diff[body].std() < 40.0


# --------------------------------------------------------------------------- physics
def test_qa_phantom_water_and_air_read_their_definitions(series):
    """Water reads 0 HU and air -1000 HU (definition of the Hounsfield scale).

    Tolerance +-5 HU for water, +-15 HU for the air rod: common practice, no source.
    """
    hu = series["qa_phantom"].hu
    water = hu[8:, 128 - 60 : 128 + 60, 128 - 60 : 128 + 60]
    assert abs(float(water.mean())) < 5.0
    iy, ix = _mm_to_index(*demo.qa_rod_centres_mm()[0], 256, PHANTOM_PX_MM)
    air = hu[1:7, iy - 5 : iy + 5, ix - 5 : ix + 5]
    assert abs(float(air.mean()) - demo.AIR_HU) < 15.0


def test_qa_phantom_rods_read_their_nominal_values(series):
    hu = series["qa_phantom"].hu
    for (cx, cy), nominal in zip(demo.qa_rod_centres_mm(), demo.QA_ROD_HU):
        iy, ix = _mm_to_index(cx, cy, 256, PHANTOM_PX_MM)
        measured = float(hu[1:7, iy - 5 : iy + 5, ix - 5 : ix + 5].mean())
        assert measured == pytest.approx(nominal, abs=15.0), nominal
        # and the uniform module has no rod there
        assert abs(float(hu[9:15, iy - 5 : iy + 5, ix - 5 : ix + 5].mean())) < 5.0


def test_nps_integral_equals_pixel_variance(series):
    """Parseval: the integral of the 2-D NPS equals the pixel variance (ICRU 87)."""
    rois = _uniform_rois(series["qa_phantom"].hu, range(8, 16))
    _, _, var = radial_nps(rois, PHANTOM_PX_MM)
    direct = np.mean([r.var() for r in rois])
    assert var == pytest.approx(direct, rel=1e-6)


def test_nonlinear_phantom_has_lower_noise_and_lower_f_av(series):
    """The TV reconstruction lowers noise and moves the NPS to low frequencies.

    f_av as in Solomon, Christianson & Samei, Med Phys 39(10), 2012. The values this
    measures are the ones documented in ``demo.F_AV_PER_MM`` (within 10 %).
    """
    out = {}
    for name in ("qa_phantom", "qa_phantom_nonlinear"):
        freq, nps, var = radial_nps(_uniform_rois(series[name].hu, range(8, 16)), PHANTOM_PX_MM)
        out[name] = (f_av(freq, nps), np.sqrt(var))
        assert out[name][0] == pytest.approx(demo.F_AV_PER_MM[name], rel=0.10), name
        assert out[name][1] == pytest.approx(demo.NOISE_SD_HU[name], rel=0.10), name
    (fav_fbp, sd_fbp), (fav_nl, sd_nl) = out["qa_phantom"], out["qa_phantom_nonlinear"]
    assert sd_nl < 0.6 * sd_fbp
    assert fav_nl < 0.75 * fav_fbp


def _angular_hf_energy(image: np.ndarray, n_sectors: int = 12, f_min: float = 0.25) -> np.ndarray:
    """Spectral energy above ``f_min`` (fraction of Nyquist) in angular sectors."""
    n = image.shape[0]
    spec = np.abs(np.fft.fftshift(np.fft.fft2(image * np.hanning(n)[:, None] * np.hanning(n)[None, :]))) ** 2
    f = np.fft.fftshift(np.fft.fftfreq(n)) * 2.0
    fy, fx = np.meshgrid(f, f, indexing="ij")
    radius = np.hypot(fx, fy)
    angle = np.mod(np.degrees(np.arctan2(-fy, fx)), 180.0)
    sector = (angle // (180.0 / n_sectors)).astype(int)
    keep = (radius > f_min) & (radius < 1.0)
    return np.bincount(sector[keep], spec[keep], n_sectors)


def _error_image(vol: Volume, k: int, name: str) -> np.ndarray:
    truth = demo.section_hu(name, demo.grid_for(name), k)
    err = vol.hu[k].astype(float) - truth
    err[vol.padding_mask] = 0.0
    return err


def test_limited_angle_leaves_anisotropic_high_frequency_error(series):
    """A missing wedge of views leaves streaks: direction-dependent error energy.

    Fourier slice theorem (Kak & Slaney 1988, ch. 3 and 5): the error of a limited-angle
    reconstruction is concentrated in and near the missing wedge of the 2-D spectrum,
    while the error of a full-view FBP (noise) is nearly isotropic.
    """
    k = 6
    inner = (slice(64, 192), slice(64, 192))  # inside the body: skin edges in all directions
    lim = _angular_hf_energy(_error_image(series["torso_limited_angle"], k, "torso_limited_angle")[inner])
    full = _angular_hf_energy(_error_image(series["torso_clean"], k, "torso_clean")[inner])
    sector_deg = np.arange(12) * 15.0 + 7.5
    lo, hi = demo.LIMITED_ARC_DEG
    missing = (sector_deg >= hi) | (sector_deg < lo)  # views theta in [120, 180) not measured
    assert full.max() / full.min() < 2.5
    assert lim.max() / lim.min() > 4.0
    assert missing[int(np.argmax(lim))]
    assert lim[missing].mean() > 3.0 * full[missing].mean()
    assert lim[~missing].mean() < 2.0 * full[~missing].mean()


def test_sparse_views_streak_the_air(series):
    """Too few views leave view-aliasing streaks that reach into the air around the
    object (Kak & Slaney 1988, section 5.1.3)."""
    air_ring = _air_band(series["torso_clean"])
    sparse = series["torso_sparse_views"].hu[:, air_ring].std()
    clean = series["torso_clean"].hu[:, air_ring].std()
    assert sparse > 4.0 * clean


def _air_band(vol: Volume) -> np.ndarray:
    """Anterior air between the body and the edge of the field of view."""
    band = np.zeros(vol.hu.shape[1:], dtype=bool)
    band[20:40, 90:166] = True  # y from -151 to -123 mm: clear of the body (y >= -86 mm)
    return band & ~vol.padding_mask


def test_metal_darkens_the_line_between_the_implants(series):
    """Photon starvation and beam hardening: a dark streak along the line joining two
    dense objects (common practice, no source)."""
    (x0, y0), (x1, _) = [(e.cx, e.cy) for e in demo.METAL_IMPLANTS]
    iy, ix0 = _mm_to_index(x0 + 16.0, y0, 256, TORSO_PX_MM)
    _, ix1 = _mm_to_index(x1 - 16.0, y0, 256, TORSO_PX_MM)
    between_metal = series["torso_metal"].hu[:, iy - 1 : iy + 2, ix0:ix1].mean()
    between_clean = series["torso_clean"].hu[:, iy - 1 : iy + 2, ix0:ix1].mean()
    assert between_metal < between_clean - 200.0


def test_air_structures_sit_where_specified(series):
    vol = series["torso_air_structure"]
    extra = vol.hu - series["torso_clean"].hu
    for s in demo.AIR_STRUCTURES:
        iy, ix = _mm_to_index(s.section.cx, s.section.cy, 256, TORSO_PX_MM)
        profile = extra[:, iy - 2 : iy + 3, ix - 2 : ix + 3].mean(axis=(1, 2))
        contrast = s.section.hu - demo.AIR_HU
        inside = [k for k in range(16) if abs((k + 0.5) * 2.5 - s.cz) < 0.6 * s.az]
        outside = [k for k in range(16) if abs((k + 0.5) * 2.5 - s.cz) > s.az + 1.0]
        assert profile[inside].min() > 0.6 * contrast
        assert np.abs(profile[outside]).max() < 0.2 * contrast
        assert 0 not in inside and 15 not in inside  # begins and ends inside the range


def test_air_structures_touch_nothing(series):
    """Each structure is its own connected component above -950 HU, away from the body."""
    from scipy import ndimage

    hu = series["torso_air_structure"].hu
    lab, _ = ndimage.label(hu > -950.0)
    body_label = lab[8, 128, 128]
    for s in demo.AIR_STRUCTURES:
        if s.section.hu < -950.0:
            continue
        iy, ix = _mm_to_index(s.section.cx, s.section.cy, 256, TORSO_PX_MM)
        k = int(s.cz // 2.5)
        assert lab[k, iy, ix] not in (0, body_label)
        comp = lab == lab[k, iy, ix]
        zs = np.nonzero(comp.any(axis=(1, 2)))[0]
        assert zs.min() > 0 and zs.max() < 15


def test_compare_test_moves_the_anterior_wall_and_drops_the_lesion(series):
    ref, test = series["compare_reference"].hu, series["compare_test"].hu
    k, col = 8, 128
    ref_top = int(np.argmax(ref[k, :, col] > -500.0))
    test_top = int(np.argmax(test[k, :, col] > -500.0))
    assert (ref_top - test_top) * TORSO_PX_MM == pytest.approx(demo.WALL_SHIFT_MM, abs=2.0 * TORSO_PX_MM)
    iy, ix = _mm_to_index(demo.LESION.section.cx, demo.LESION.section.cy, 256, TORSO_PX_MM)
    kz = int(demo.LESION.cz // 2.5)
    lesion_ref = ref[kz, iy - 1 : iy + 2, ix - 1 : ix + 2].mean() - ref[kz, iy - 1 : iy + 2, ix - 12 : ix - 9].mean()
    lesion_test = test[kz, iy - 1 : iy + 2, ix - 1 : ix + 2].mean() - test[kz, iy - 1 : iy + 2, ix - 12 : ix - 9].mean()
    assert lesion_ref > 25.0
    assert abs(lesion_test) < 10.0
    # posterior side unchanged: same surface row
    ref_bottom = 255 - int(np.argmax(ref[k, ::-1, col] > -500.0))
    test_bottom = 255 - int(np.argmax(test[k, ::-1, col] > -500.0))
    assert abs(ref_bottom - test_bottom) <= 1


def test_torso_has_table_mattress_cable_and_arms(series):
    hu = series["torso_clean"].hu
    table_row = _mm_to_index(0.0, 82.0, 256, TORSO_PX_MM)[0]
    assert hu[:, table_row, 128].mean() > 100.0  # table shell (+250 HU)
    mattress_row = _mm_to_index(0.0, 74.0, 256, TORSO_PX_MM)[0]
    assert hu[:, mattress_row, 60:70].mean() == pytest.approx(-850.0, abs=40.0)
    iy, ix = _mm_to_index(*demo.CABLE_XY_MM, 256, TORSO_PX_MM)
    assert (hu[:, iy - 1 : iy + 2, ix - 1 : ix + 2].max(axis=(1, 2)) > 300.0).all()  # every slice
    for side in (-1.0, 1.0):
        iy, ix = _mm_to_index(side * 134.0, 2.0 + 7.5, 256, TORSO_PX_MM)
        assert hu[:, iy, ix].mean() > 500.0  # humerus cortex (+1000 HU, 3 mm thick)


# --------------------------------------------------------------------------- projection
def test_analytic_ellipse_projection_matches_skimage_radon():
    """Analytic projection of an ellipse (Kak & Slaney 1988, eq. 3.6) against
    scikit-image's ``radon`` of the same ellipse rasterised with 4x4 supersampling:
    same area under every projection (1 %) and same centroid (0.05 pixel)."""
    from skimage.transform import radon

    grid = demo.grid_for("torso_air_structure")
    theta = grid.theta(n_views=36)
    e = demo.Ellipse(45.0, -118.0, 10.0, 8.0, 1.0, angle_deg=20.0)
    x, y = demo._pixel_coords(grid, 4)
    img = np.zeros(x.shape)
    demo._paint(img, x, y, [e])
    ref = radon(demo._downsample(img, 4) * grid.pixel_mm, theta=theta, circle=True)
    ana = demo.ellipse_projection(e, 1.0, grid, theta)
    t = np.arange(grid.n)[:, None]
    np.testing.assert_allclose(ana.sum(axis=0), ref.sum(axis=0), rtol=0.01)
    np.testing.assert_allclose((ana * t).sum(0) / ana.sum(0), (ref * t).sum(0) / ref.sum(0), atol=0.05)
    area_px = np.pi * e.ax * e.ay / grid.pixel_mm**2
    assert ana.sum(axis=0)[0] == pytest.approx(area_px * grid.pixel_mm, rel=0.01)
