"""Tests of the NPS analysis: ROI sources, records, baseline comparison, 3-D NPS, pairs
and bad input, on invented phantoms and images."""
from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import ndimage

from reconaudit.checker.analyses import nps
from reconaudit.checker.errors import ProfileError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import dumps
from reconaudit.checker.volume import Volume


def water_cylinder(nz: int = 8, n: int = 160, radius: int = 70, sd: float = 10.0,
                   blur_px: float = 0.0, seed: int = 0, inserts: bool = False) -> Volume:
    """An invented water cylinder in air with (optionally blurred) noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n]
    c = n / 2.0
    img = np.where((yy - c) ** 2 + (xx - c) ** 2 <= radius**2, 0.0, -1000.0)
    if inserts:
        img[(yy - c) ** 2 + (xx - c - 30) ** 2 <= 8**2] = 800.0
    noise = rng.normal(0.0, 1.0, (nz, n, n))
    if blur_px:
        noise = ndimage.gaussian_filter(noise, (0, blur_px, blur_px))
        noise /= noise.std()
    return Volume.from_array(img[None] + sd * noise, (2.0, 0.8, 0.8))


def run(vol: Volume, **settings):
    return nps.analyse(vol, find_regions(vol), settings or None)


REQUIRED = ("noise_hu", "f_peak_per_mm", "f_av_per_mm", "frequency_per_mm", "nps_1d_hu2mm2",
            "roi_count", "method")


def test_phantom_record_and_overlays():
    res = run(water_cylinder())
    rec = res.record
    assert rec["applicable"] and rec["method"] == "phantom"
    for key in REQUIRED:
        assert key in rec
    assert len(rec["frequency_per_mm"]) == len(rec["nps_1d_hu2mm2"])
    assert abs(rec["frequency_per_mm"][-1] - 0.5 / 0.8) < 0.02
    assert abs(rec["noise_hu"] - 10.0) < 0.5
    rois = res.overlays.rois
    assert len(rois) >= 5 and rec["roi_count"] == len(rois) * 8
    for a in rois:
        for b in rois:
            if a is not b:
                assert not (a.y0 < b.y1 and b.y0 < a.y1 and a.x0 < b.x1 and b.x0 < a.x1)
    json.loads(dumps(rec))  # strict JSON


def test_smoother_noise_has_lower_f_av_and_texture_comparison():
    sharp = run(water_cylinder(seed=1)).record
    blotchy = run(water_cylinder(seed=2, blur_px=1.5)).record
    assert blotchy["f_av_per_mm"] < 0.7 * sharp["f_av_per_mm"]
    same = nps.compare_nps(sharp, run(water_cylinder(seed=3)).record)
    assert abs(same["f_av_ratio"] - 1) < 0.05 and abs(same["noise_ratio"] - 1) < 0.05
    assert same["nps_correlation"] > 0.5
    diff = nps.compare_nps(blotchy, sharp)
    assert diff["f_av_ratio"] < 0.7 and diff["nps_correlation"] < same["nps_correlation"]


def test_baseline_setting_flags_texture_change():
    sharp = run(water_cylinder(seed=1)).record
    res = run(water_cylinder(seed=2, blur_px=1.5), baseline=sharp)
    assert res.record["flagged"]
    assert "texture_vs_baseline" in res.record
    assert any("f_av" in f.message for f in res.findings)
    ok = run(water_cylinder(seed=4), baseline=sharp, nps_correlation_min=0.0)
    assert not ok.record["flagged"], [f.message for f in ok.findings]


def test_noise_limit_finding():
    res = run(water_cylinder(sd=20.0), noise_hu_max=15.0)
    assert res.record["flagged"] and "exceeds" in res.findings[0].message


def test_user_rois_and_their_overlays():
    vol = water_cylinder()
    rois = [{"slices": [2, 5], "yx0_vox": [48, 48 + 40 * k], "size_vox": 32} for k in range(2)]
    res = run(vol, rois=rois)
    assert res.record["method"] == "user" and res.record["roi_count"] == 8
    assert [(r.y0, r.x0, r.y1, r.x1) for r in res.overlays.rois] == [(48, 48, 80, 80), (48, 88, 80, 120)]


@pytest.mark.parametrize("rois, words", [
    ([{"slices": [0, 1], "yx0_vox": [150, 150], "size_vox": 32}], "does not fit"),
    ([{"slices": [0, 9], "yx0_vox": [10, 10], "size_vox": 32}], "does not fit"),
    ([{"slices": [0, 0], "yx0_vox": [60, 60], "size_vox": 32}], "at least"),
    ([{"slices": [0, 3], "yx0_vox": [60, 60], "size_vox": 32},
      {"slices": [0, 3], "yx0_vox": [20, 60], "size_vox": 24}], "one size"),
    ([{"slices": [0, 3], "yx0_vox": [60, 60]}], "malformed"),
])
def test_bad_user_rois_are_not_applicable(rois, words):
    rec = run(water_cylinder(), rois=rois).record
    assert rec["applicable"] is False and words in rec["reason"]


def test_no_uniform_region():
    rec = run(water_cylinder(nz=3, inserts=True)).record
    assert rec["applicable"] is False and "no uniform region" in rec["reason"]


def test_constant_volume():
    rec = run(Volume.from_array(np.zeros((4, 96, 96)), (1, 1, 1))).record
    assert rec["applicable"] is False and rec["reason"]


def test_constant_user_rois_have_no_noise():
    vol = Volume.from_array(np.zeros((4, 96, 96)), (1, 1, 1))
    rec = run(vol, rois=[{"slices": [0, 3], "yx0_vox": [10, 10], "size_vox": 32}]).record
    assert rec["applicable"] is False and "no noise" in rec["reason"]


def test_nan_volume():
    vol = water_cylinder(nz=3)
    vol.hu[1, 5, 5] = np.nan
    rec = run(vol).record
    assert rec["applicable"] is False and "NaN" in rec["reason"]


def test_unknown_setting_and_detrend():
    vol = water_cylinder(nz=2)
    with pytest.raises(ProfileError):
        run(vol, roi_sise_vox=3)
    with pytest.raises(ProfileError):
        run(vol, detrend="cubic")


def test_one_slice_volume():
    rec = run(water_cylinder(nz=1)).record
    assert rec["applicable"] and rec["roi_count"] >= 4


def test_nps_3d_white_noise_is_flat():
    """White 3-D noise: 3-D NPS flat at s^2 dx dy dz, so the z profile (integral over fx, fy)
    is flat at s^2 dz and its integral is s^2 (Parseval; analytic)."""
    rec = run(water_cylinder(nz=16), nps_3d=True, detrend="mean").record["nps_3d"]
    assert rec["applicable"] and rec["roi_count"] >= 5
    assert abs(rec["noise_hu"] - 10.0) < 0.5
    nz = np.asarray(rec["nps_z_hu2mm"])
    fz = np.asarray(rec["frequency_z_per_mm"])
    nonzero = np.abs(fz) > 0
    assert np.all(np.abs(nz[nonzero] / (100.0 * 2.0) - 1) < 0.15)


def test_nps_3d_needs_deep_rois():
    rec = run(water_cylinder(nz=4), nps_3d=True).record["nps_3d"]
    assert rec["applicable"] is False and "contiguous" in rec["reason"]


def test_pair_subtraction_removes_structure():
    """(I1 - I2)/sqrt 2 keeps the noise of one image and removes fixed structure."""
    a = water_cylinder(seed=10)
    b = water_cylinder(seed=11)
    ramp = np.linspace(0, 40, a.shape[2])[None, None, :]
    a.hu += ramp
    b.hu += ramp
    rec = nps.nps_from_pair(a, b).record
    assert rec["method"] == "pair" and abs(rec["noise_hu"] - 10.0) < 0.5
    via_setting = nps.analyse(a, find_regions(a), {"pair_with": b}).record
    assert via_setting["method"] == "pair" and via_setting["noise_hu"] == pytest.approx(rec["noise_hu"])


def test_pair_shape_mismatch_is_not_applicable():
    rec = nps.nps_from_pair(water_cylinder(), water_cylinder(nz=4)).record
    assert rec["applicable"] is False and "differ" in rec["reason"]


def _torso(sd: float, seed: int = 0) -> Volume:
    """An invented elliptical torso: soft tissue 40 HU, an organ 60 HU, bone, fat rim."""
    rng = np.random.default_rng(seed)
    ny, nx = 160, 220
    yy, xx = np.mgrid[:ny, :nx]
    img = np.full((ny, nx), -1000.0)
    img[((yy - 80) / 72.0) ** 2 + ((xx - 110) / 100.0) ** 2 <= 1] = -100.0
    img[((yy - 80) / 64.0) ** 2 + ((xx - 110) / 92.0) ** 2 <= 1] = 40.0
    img[((yy - 70) / 25.0) ** 2 + ((xx - 80) / 30.0) ** 2 <= 1] = 60.0
    img[(yy - 120) ** 2 + (xx - 110) ** 2 <= 10**2] = 700.0
    return Volume.from_array(img[None] + rng.normal(0, sd, (4, ny, nx)), (3.0, 0.8, 0.8))


def test_patient_patches_and_global_noise():
    res = run(_torso(12.0))
    rec = res.record
    assert rec["applicable"] and rec["method"] == "patient"
    assert abs(rec["global_noise_hu"] - 12.0) < 1.2
    assert abs(rec["noise_hu"] - 12.0) < 1.5
    vol = _torso(12.0)
    for r in res.overlays.rois:  # every patch in soft tissue
        patch = vol.hu[r.z0, r.y0:r.y1, r.x0:r.x1]
        assert 0 < patch.mean() < 100


def test_no_body_no_phantom():
    vol = Volume.from_array(np.random.default_rng(0).normal(-1000, 5, (2, 64, 64)), (1, 1, 1))
    rec = run(vol).record
    assert rec["applicable"] is False and rec["reason"]


def test_smooth_curve_keeps_linear_trend_and_dc():
    c = np.array([0.0, 1, 2, 3, 4, 5, 6])
    out = nps.smooth_curve(c, 3)
    assert out[0] == 0 and np.allclose(out[2:-1], c[2:-1])


def test_detrend_poly2_removes_quadratic_exactly():
    y, x = np.mgrid[:16, :16]
    q = (3 + 0.5 * x - 0.2 * y + 0.1 * x * x - 0.05 * x * y + 0.02 * y * y)[None].astype(float)
    assert np.abs(nps.detrend_rois(q, "poly2")).max() < 1e-9
    assert np.abs(nps.detrend_rois(q, "mean")).max() > 1.0


def test_real_fft_power_equals_full_fft_power():
    """The real-input DFT completed by Hermitian symmetry gives the whole |DFT|^2
    (reference: numpy.fft.fftn), for odd and even sizes, in 2-D and 3-D."""
    rng = np.random.default_rng(6)
    for shape in ((5, 16, 16), (4, 15, 17), (3, 8, 12, 9)):
        res = rng.normal(size=shape)
        axes = tuple(range(1, len(shape)))
        ref = (np.abs(np.fft.fftn(res, axes=axes)) ** 2).mean(axis=0)
        assert np.allclose(nps.mean_power_spectrum(res), ref, rtol=1e-10, atol=1e-9)


def test_nps_3d_equals_direct_3d_dft_of_mean_free_blocks():
    """3-D NPS from the in-plane spectra equals (dx dy dz / N) <|DFTn(block - mean)|^2>
    computed directly with numpy.fft.fftn (IEC 62220-1-1 normalisation)."""
    rng = np.random.default_rng(7)
    blocks = rng.normal(5.0, 3.0, (6, 4, 16, 16))
    got, fz, fy, fx = nps.nps_3d(blocks, (2.0, 0.5, 0.5), "mean")
    res = blocks - blocks.mean(axis=(2, 3), keepdims=True)
    res -= res.mean(axis=(1, 2, 3), keepdims=True)
    ref = np.fft.fftshift((np.abs(np.fft.fftn(res, axes=(1, 2, 3))) ** 2).mean(axis=0)) * 2.0 * 0.25 / (4 * 256)
    assert np.allclose(got, ref, rtol=1e-10, atol=1e-12)


def test_patient_patches_found_on_more_slices_when_few():
    """Fewer than patient_min_rois patches on the first slices: the other slices are
    searched too, and every patch still lies in soft tissue."""
    vol = _torso(12.0)
    few = run(vol, patient_slices=1, patient_min_rois=1).record
    more = run(vol, patient_slices=1, patient_min_rois=1000).record
    assert few["applicable"] and more["applicable"]
    assert more["roi_count"] > few["roi_count"]
    assert abs(more["noise_hu"] - 12.0) < 1.5


@pytest.mark.parametrize("method, order", [("poly1", 1), ("poly2", 2)])
def test_detrend_equals_least_squares_fit(method, order):
    """The axis-by-axis projection equals the least-squares polynomial fit of
    numpy.linalg.lstsq (reference), on square and non-square ROIs."""
    rng = np.random.default_rng(9)
    for shape in ((4, 16, 16), (3, 15, 23)):
        stack = rng.normal(40.0, 10.0, shape)
        n, ny, nx = shape
        y, x = (a.ravel().astype(float) for a in np.mgrid[:ny, :nx])
        cols = [np.ones_like(x), x, y] + ([x * x, x * y, y * y] if order == 2 else [])
        a = np.stack(cols, axis=1)
        flat = stack.reshape(n, -1)
        ref = flat - (a @ np.linalg.lstsq(a, flat.T, rcond=None)[0]).T
        assert np.abs(nps.detrend_rois(stack, method).reshape(n, -1) - ref).max() < 1e-9


def test_z_profile_from_slice_gram_equals_integrated_3d_nps():
    """The 3-D record's z profile (from the Gram matrices of the blocks' slices) equals
    the 3-D NPS of nps_3d (direct spectra) integrated over fy and fx, for blocks that
    tile the ROI slices and blocks that do not (Parseval; the DFT is separable)."""
    from reconaudit.checker.results import Roi

    rng = np.random.default_rng(11)
    spacing = (1.5, 0.6, 0.6)
    for z1, depth in ((15, 4), (13, 4)):  # 16 slices: 4 blocks tile; 14: 3 blocks, 2 left over
        rois = [Roi(0, z1, 0, 0, 16, 16, "a"), Roi(2, 2 + z1, 0, 0, 16, 16, "b")]
        stack = rng.normal(3.0, 7.0, (2 * (z1 + 1), 16, 16)).astype(np.float32)
        stack += np.linspace(0.0, 9.0, 16, dtype=np.float32)[None, :, None]
        res, _ = nps._remove_fit_in_place(stack - stack.mean(axis=(1, 2), keepdims=True), "poly1")
        s = {**nps.DEFAULTS, "roi_depth_vox": depth}
        got = nps._measure_3d(res, spacing, rois, s)
        starts = nps._block_starts(rois, depth)
        blocks = np.stack([res[i : i + depth] for i in starts]).astype(np.float64)
        ref, fz, fy, fx = nps.nps_3d(blocks, spacing, "mean")  # residuals: "mean" fits nothing more
        ref_z = ref.sum(axis=(1, 2)) * abs(fy[1] - fy[0]) * abs(fx[1] - fx[0])
        assert got["roi_count"] == len(starts)
        assert np.allclose(got["frequency_z_per_mm"], np.round(fz, 6))
        assert np.allclose(got["nps_z_hu2mm"], ref_z, rtol=1e-5, atol=1e-6 * ref_z.max())
        dfz = abs(fz[1] - fz[0])
        assert got["noise_hu"] == pytest.approx(float(np.sqrt(ref.sum() * dfz * abs(fy[1] - fy[0])
                                                              * abs(fx[1] - fx[0]))), rel=1e-5)


@pytest.mark.parametrize("method", ["mean", "poly1", "poly2"])
def test_in_place_fit_removal_equals_detrend_and_keeps_pythagoras(method):
    """The single-precision in-place fit removal gives detrend_rois's residuals (float64
    reference) and the fit energy it returns closes |raw|^2 = |res|^2 + |fit|^2."""
    rng = np.random.default_rng(12)
    for shape in ((20, 24, 24), (5, 15, 23)):
        yy, xx = np.mgrid[: shape[1], : shape[2]]
        stack = rng.normal(0.0, 10.0, shape) + 0.3 * xx + 0.02 * (yy - 7.0) ** 2
        stack -= stack.mean(axis=(1, 2), keepdims=True)
        ref = nps.detrend_rois(stack, method)
        res, energy = nps._remove_fit_in_place(stack.astype(np.float32), method)
        assert np.abs(res - ref).max() < 1e-4
        raw2 = (stack**2).sum(axis=(1, 2))
        assert np.allclose((ref**2).sum(axis=(1, 2)) + energy, raw2, rtol=1e-5)


def test_phantom_rois_on_the_middle_sixteen_slices_keep_noise_and_texture():
    """Sensitivity of the 16-slice default (``phantom_slices``): on a 40-slice uniform run
    the ROIs span its 16 middle slices; against ROIs on 32 slices the noise and f_av
    differ by under 2 %; over four repeated scans (seeds) f_av varies by under 3 %, less
    than a third of the 10 % texture tolerance, so a scan 14 % lower in f_av (Gaussian
    blur 1.2 instead of 1.0 px) is flagged against a baseline and a repeat is not."""
    vols = [water_cylinder(nz=40, blur_px=1.0, seed=seed) for seed in range(4)]
    recs = []
    for vol in vols:
        regions = find_regions(vol)
        res = nps.analyse(vol, regions)
        rec, wide = res.record, nps.analyse(vol, regions, {"phantom_slices": 32}).record
        assert {(r.z0, r.z1) for r in res.overlays.rois} == {(11, 26)}  # about slice (0 + 39) // 2
        assert rec["roi_count"] == 16 * len(res.overlays.rois) and wide["roi_count"] == 2 * rec["roi_count"]
        assert abs(rec["noise_hu"] / wide["noise_hu"] - 1.0) < 0.02
        assert abs(rec["f_av_per_mm"] / wide["f_av_per_mm"] - 1.0) < 0.02
        recs.append(rec)
    f_av = np.array([r["f_av_per_mm"] for r in recs])
    assert np.abs(f_av / f_av.mean() - 1.0).max() < 0.03, f_av
    repeat = run(vols[1], baseline=recs[0]).record
    assert not repeat["flagged"], repeat["texture_vs_baseline"]
    blurred = run(water_cylinder(nz=40, blur_px=1.2, seed=5), baseline=recs[0]).record
    assert blurred["flagged"] and blurred["texture_vs_baseline"]["f_av_ratio"] < 0.9


def test_fit_removal_over_several_products_equals_detrend():
    """40 ROIs of 64 x 64 px take three matrix products of at most 16 ROIs (poly2); the
    residuals equal detrend_rois's (float64 reference) for every ROI, the last partial
    product included."""
    assert nps._fit_rois_per_call(6, 64 * 64) == 16
    rng = np.random.default_rng(41)
    yy, xx = np.mgrid[:64, :64]
    stack = rng.normal(0.0, 10.0, (40, 64, 64)) + 0.2 * xx - 0.01 * (yy - 30.0) ** 2
    stack -= stack.mean(axis=(1, 2), keepdims=True)
    res, _ = nps._remove_fit_in_place(stack.astype(np.float32), "poly2")
    assert np.abs(res - nps.detrend_rois(stack, "poly2")).max() < 1e-3


@pytest.mark.parametrize("shape, spacing", [((64, 64), (0.45, 0.45)), ((63, 64), (0.8, 0.8)),
                                            ((40, 33), (0.5, 0.7)), ((17, 20), (1.0, 0.6))])
def test_radial_nps_from_the_half_spectrum_equals_the_whole_spectrum(shape, spacing):
    """The variance and radial NPS taken from the real DFT's half spectrum equal the sum
    and :func:`nps.radial_average` of the whole centred 2-D NPS (the reference), for even
    and odd, square and rectangular ROIs, white and band-pass noise; a change of the
    noise changes them (the comparison can fail)."""
    rng = np.random.default_rng(41)
    for blur in (0.0, 1.5):
        w = rng.normal(0.0, 12.0, (20, *shape))
        res = ndimage.gaussian_filter(w, (0, blur, blur)) if blur else w
        res = res - res.mean(axis=(1, 2), keepdims=True)
        variance, f, curve = nps._radial_nps_of_residuals(res, spacing)
        full, fy, fx = nps._nps_2d_of_residuals(res, spacing)
        f_ref, curve_ref = nps.radial_average(full, fy, fx)
        assert variance == pytest.approx(float(full.sum() * abs(fy[1] - fy[0]) * abs(fx[1] - fx[0])), rel=1e-12)
        assert variance == pytest.approx(float(np.mean(res**2)), rel=1e-9)  # Parseval
        assert np.array_equal(f, f_ref)
        assert np.allclose(curve, curve_ref, rtol=1e-12, atol=0.0)
        other = nps._radial_nps_of_residuals(res * np.linspace(0.5, 1.5, shape[1]), spacing)[2]
        assert not np.allclose(other[1:], curve[1:], rtol=1e-3)


def test_roi_inside_disc_test_equals_every_corner_distance():
    """An ROI is inside the usable disc exactly when each of its four corner pixel
    centres is (the reference: the squared distances of all four corners, numpy),
    for ROIs inside, crossing and outside the disc."""
    from reconaudit.checker.results import Roi

    rng = np.random.default_rng(5)
    seen = set()
    for _ in range(400):
        y0, x0, n = int(rng.integers(0, 200)), int(rng.integers(0, 200)), int(rng.integers(1, 70))
        roi = Roi(0, 3, y0, x0, y0 + n, x0 + n, "t")
        cy, cx, r = 130.0 + rng.normal(0, 3), 128.0 + rng.normal(0, 3), float(rng.uniform(20, 110))
        ys, xs = np.array([y0, y0 + n - 1], float), np.array([x0, x0 + n - 1], float)
        expected = bool((((ys[:, None] - cy) ** 2 + (xs[None, :] - cx) ** 2)).max() <= r * r)
        assert nps._inside_disc(roi, cy, cx, r) is expected
        seen.add(expected)
    assert seen == {True, False}
