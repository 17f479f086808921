"""Unit tests of the streak analysis: conventions, record, overlays and bad input."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.fft as sfft
from scipy import ndimage

from reconaudit.checker.analyses import REGISTRY, streaks
from reconaudit.checker.errors import ProfileError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import dumps
from reconaudit.checker.volume import Volume


def line_image(angle_deg: float, n: int = 128, offset: float = 0.0, contrast: float = 30.0, seed: int = 1) -> np.ndarray:
    """Gaussian noise (SD 10 HU) with one thin line at display orientation ``angle_deg``."""
    rng = np.random.default_rng(seed)
    img = rng.normal(0.0, 10.0, (n, n)).astype(np.float32)
    yy, xx = np.mgrid[0:n, 0:n]
    c = (n - 1) / 2.0
    a = math.radians(angle_deg)
    t = (yy - c) * math.cos(a) + (xx - c) * math.sin(a)  # across the line (dy, dx) = (-sin a, cos a)
    img[np.abs(t - offset) < 0.7] += contrast
    return img


def analyse(hu: np.ndarray, settings=None, spacing=(1.0, 1.0, 1.0)):
    vol = Volume.from_array(hu if hu.ndim == 3 else hu[None], spacing)
    return streaks.analyse(vol, find_regions(vol), settings)


def test_registered():
    assert REGISTRY["streaks"].endswith(".streaks")
    assert streaks.NAME == "streaks"
    assert set(streaks.SOURCES) <= set(streaks.DEFAULTS)


def test_frequency_orientation_convention():
    """A frequency on the ky axis carries horizontal lines (0 deg), on kx vertical (90)."""
    ang = streaks.line_angle_of_frequency(np.array([1.0, 0.0, 1.0, -1.0]), np.array([0.0, 1.0, 1.0, 1.0]))
    assert np.allclose(ang, [0.0, 90.0, 45.0, 135.0])


@pytest.mark.parametrize("angle", [0.0, 30.0, 90.0, 125.0])
def test_line_direction_and_segment(angle):
    res = analyse(line_image(angle))
    rec = res.record
    assert rec["flagged"]
    assert streaks.angle_distance(rec["dominant_angles_deg"][0], angle) <= 2.0
    seg = res.overlays.segments[0]
    dy = seg.end_zyx_vox[1] - seg.start_zyx_vox[1]
    dx = seg.end_zyx_vox[2] - seg.start_zyx_vox[2]
    assert streaks.angle_distance(math.degrees(math.atan2(-dy, dx)) % 180.0, angle) <= 2.0
    assert math.hypot(dy, dx) > 60  # the line crosses most of the 128-px slice


def test_segment_offset_matches_line():
    res = analyse(line_image(0.0, offset=20.0))
    seg = res.overlays.segments[0]
    # a horizontal line 20 px below the centre row (63.5)
    assert abs(seg.start_zyx_vox[1] - 83.5) <= 1.5 and abs(seg.end_zyx_vox[1] - 83.5) <= 1.5


def test_record_keys_json_and_map():
    hu = np.stack([np.random.default_rng(0).normal(0, 10, (96, 96)), line_image(60.0, n=96)]).astype(np.float32)
    res = analyse(hu)
    rec = res.record
    for key in ("index", "flagged", "dominant_angles_deg", "slice_index", "flagged_slices", "missing_wedge_deg"):
        assert key in rec
    assert len(rec["slice_index"]) == 2
    assert rec["flagged_slices"] == [1]
    assert rec["index"] == max(rec["slice_index"])
    m = res.overlays.maps["streak_strength"]
    assert m.shape == hu.shape and m.dtype == np.float32
    assert m[0].max() == 0.0 and m[1].max() > 1.0
    assert all(s.start_zyx_vox[0] == 1.0 for s in res.overlays.segments)
    json.loads(dumps(rec))
    assert res.findings[0].severity.value == "review"
    assert "60" in res.findings[0].message and "slices 1" in res.findings[0].message


def test_isotropic_noise_index_near_one():
    res = analyse(np.random.default_rng(5).normal(0, 15, (4, 128, 128)).astype(np.float32))
    assert not res.flagged
    assert all(1.0 <= v < 1.6 for v in res.record["slice_index"])
    assert res.findings[0].severity.value == "info"


def test_tolerance_and_severity_settings():
    img = line_image(45.0)
    res = analyse(img, {"tolerance_index": 1000.0})
    assert not res.flagged
    res = analyse(img, {"severity": "fail"})
    assert res.findings[0].severity.value == "fail"


def test_unknown_setting_raises():
    with pytest.raises(ProfileError):
        analyse(line_image(0.0), {"no_such_key": 1})
    with pytest.raises(ProfileError):
        analyse(line_image(0.0), {"band_cycles_per_px": [0.3, 0.1]})


def test_larger_slices_are_binned_and_mapped_back():
    img = np.kron(line_image(30.0, n=160), np.ones((2, 2), dtype=np.float32))  # 320 px
    res = analyse(img, {"screen_max_px": 160})
    assert res.flagged
    assert res.overlays.maps["streak_strength"].shape == (1, 320, 320)
    seg = res.overlays.segments[0]
    assert max(seg.start_zyx_vox[1:] + seg.end_zyx_vox[1:]) > 200  # full-resolution coordinates


# ------------------------------------------------------------------------- bad input
def test_constant_volume_not_applicable():
    res = analyse(np.zeros((3, 64, 64), dtype=np.float32))
    assert not res.applicable
    assert "constant" in res.record["reason"]


def test_some_constant_slices_skipped():
    hu = np.stack([np.zeros((64, 64)), np.random.default_rng(1).normal(0, 10, (64, 64))]).astype(np.float32)
    res = analyse(hu)
    assert res.applicable
    assert res.record["slice_index"][0] is None and res.record["slice_index"][1] is not None
    assert any("constant" in f.message for f in res.findings)


def test_all_nan_not_applicable():
    res = analyse(np.full((2, 64, 64), np.nan, dtype=np.float32))
    assert not res.applicable
    assert "non-finite" in res.record["reason"]


def test_partial_nan_is_masked():
    img = line_image(90.0)
    img[:20, :20] = np.nan
    res = analyse(img)
    assert res.applicable and res.flagged
    assert np.isfinite(res.record["index"])
    assert np.all(np.isfinite(res.overlays.maps["streak_strength"]))


def test_tiny_slices_not_applicable():
    res = analyse(np.random.default_rng(0).normal(size=(4, 20, 20)).astype(np.float32))
    assert not res.applicable
    assert "too small" in res.record["reason"]


def test_single_slice_works():
    res = analyse(line_image(150.0)[None])
    assert res.applicable and res.flagged
    assert len(res.record["slice_index"]) == 1


def test_no_air_still_measures():
    """An object filling the whole slice (no air): the analysis runs inside it."""
    img = (40.0 + np.random.default_rng(2).normal(0, 10, (128, 128))).astype(np.float32)
    vol = Volume.from_array(img[None])
    regions = find_regions(vol)
    assert not regions.air.any()
    res = streaks.analyse(vol, regions)
    assert res.applicable and not res.flagged
    assert any("no air" in f.message for f in res.findings)


def test_regions_none_accepted():
    res = streaks.analyse(Volume.from_array(line_image(10.0)[None]), None)
    assert res.flagged


def test_describe_slices():
    assert streaks.describe_slices([1, 2, 3, 7, 9, 10]) == "1-3, 7, 9-10"


# ------------------------------------------------------------------------- demo scenario
DEMO_ROOT = __import__("pathlib").Path(__file__).resolve().parents[2] / "sample_volumes" / "fernhollow" / "20240611"


@pytest.fixture(scope="module")
def demo_results():
    """Streak results of the committed demo series (16 slices of 256 px each)."""
    from reconaudit.checker.load import load_path

    out = {}
    for name in ("torso_clean", "torso_air_structure", "qa_phantom", "qa_phantom_nonlinear", "compare_reference",
                 "compare_test", "torso_limited_angle", "torso_sparse_views", "torso_metal"):
        folder = DEMO_ROOT / name
        if not folder.is_dir():
            pytest.skip(f"demo series {folder} not committed")
        vol = load_path(folder)[0]
        out[name] = streaks.analyse(vol, find_regions(vol))
    return out


@pytest.mark.parametrize("name", ["torso_clean", "torso_air_structure", "qa_phantom", "qa_phantom_nonlinear",
                                  "compare_reference", "compare_test"])
def test_demo_clean_series_not_flagged(demo_results, name):
    rec = demo_results[name].record
    assert rec["applicable"]
    assert not rec["flagged"], (rec["index"], rec["dominant_angles_deg"])
    assert rec["missing_wedge_deg"] is None


@pytest.mark.parametrize("name", ["torso_limited_angle", "torso_sparse_views", "torso_metal"])
def test_demo_streak_series_flagged(demo_results, name):
    rec = demo_results[name].record
    assert rec["flagged"], rec["index"]
    assert len(rec["flagged_slices"]) >= len(rec["slice_index"]) // 2


def test_demo_limited_angle_directions(demo_results):
    """The 120-degree arc leaves streaks along its two boundary rays (checker/demo.py)."""
    from reconaudit.checker import demo

    rec = demo_results["torso_limited_angle"].record
    assert rec["missing_wedge_deg"] is not None
    top = rec["dominant_angles_deg"][:3]
    for expected in demo.LIMITED_STREAK_ANGLES_DEG:
        assert min(streaks.angle_distance(expected, a) for a in top) <= 5.0, (expected, top)


def test_demo_limited_angle_wedge_and_only_its_boundaries(demo_results):
    """The 120-degree arc misses 60 degrees of line orientations (Fourier slice theorem,
    Kak & Slaney 1988): the wedge is about that wide and its two boundary rays are the
    only directions listed (no noise peaks of the measured orientations)."""
    from reconaudit.checker import demo

    rec = demo_results["torso_limited_angle"].record
    assert abs(rec["missing_wedge_deg"]["width_deg"] - 60.0) <= 10.0, rec["missing_wedge_deg"]
    angles = rec["dominant_angles_deg"]
    assert len(angles) == 2, angles
    for expected in demo.LIMITED_STREAK_ANGLES_DEG:
        assert min(streaks.angle_distance(expected, a) for a in angles) <= 5.0, (expected, angles)


def test_peaks_are_judged_against_the_level_outside_a_wedge():
    """An empty wedge of 50 deg lifts every other orientation to about 180 / 130 = 1.38 of
    the mean: a noise bump of 1.7 there is 1.23 of its own level (no direction), a line
    of 2.8 is 2.0 (a direction)."""
    cfg = streaks.resolve_settings(None)
    angles = np.arange(90) * 2.0
    profile = np.full(90, 1.3)
    profile[(angles >= 40) & (angles <= 90)] = 0.1
    profile[65] = 1.7  # 130 deg: noise on the measured orientations
    profile[75] = 2.8  # 150 deg: a line structure
    wedge = streaks.missing_wedge(profile, 2.0, cfg["wedge_level"], cfg["wedge_min_deg"])
    assert wedge is not None
    level = streaks.level_outside_wedge(profile, wedge, 2.0)
    assert 1.3 < level < 1.35
    found = streaks.dominant_angles(profile, wedge, cfg)
    assert any(streaks.angle_distance(a, 150.0) <= 1.0 for a in found), found
    assert all(streaks.angle_distance(a, 130.0) > 2.0 for a in found), found
    assert streaks.level_outside_wedge(profile, None, 2.0) == 1.0


def test_demo_sparse_views_not_a_wedge(demo_results):
    rec = demo_results["torso_sparse_views"].record
    assert rec["missing_wedge_deg"] is None
    assert rec["dominant_angles_deg"]


def test_demo_metal_direction_along_joining_line(demo_results):
    from reconaudit.checker import demo

    rec = demo_results["torso_metal"].record
    assert rec["dominant_angles_deg"]
    assert streaks.angle_distance(rec["dominant_angles_deg"][0], demo.METAL_LINE_ANGLE_DEG) <= 5.0
    line = rec["dense_pair_lines"][0]
    assert line["contrast_hu"] < -100.0  # a dark band between the implants
    assert len(line["slices"]) >= len(rec["flagged_slices"]) // 2


def test_demo_no_dense_pair_lines_without_metal(demo_results):
    for name in ("torso_limited_angle", "torso_sparse_views"):
        assert demo_results[name].record["dense_pair_lines"] == []


def dense_pair_image(angle_deg: float, band_hu: float, n: int = 128, seed: int = 3) -> np.ndarray:
    """Noise (SD 10 HU) on 40 HU, two 5000 HU discs 60 px apart along ``angle_deg``, and
    a band of ``band_hu`` as wide as the discs on the segment between them."""
    rng = np.random.default_rng(seed)
    img = (40.0 + rng.normal(0.0, 10.0, (n, n))).astype(np.float32)
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    c = (n - 1) / 2.0
    a = math.radians(angle_deg)
    u = (-math.sin(a), math.cos(a))  # (dy, dx) of display orientation a
    along = (yy - c) * u[0] + (xx - c) * u[1]
    across = (yy - c) * math.cos(a) + (xx - c) * math.sin(a)
    img[(np.abs(across) <= 5.0) & (np.abs(along) <= 30.0)] += band_hu
    for s in (-30.0, 30.0):
        img[(yy - c - s * u[0]) ** 2 + (xx - c - s * u[1]) ** 2 <= 25.0] = 5000.0
    return img


@pytest.mark.parametrize("angle", [0.0, 35.0, 90.0, 150.0])
def test_dense_pair_line_orientation_and_contrast(angle):
    lines = streaks.dense_pair_lines(dense_pair_image(angle, -300.0), streaks.resolve_settings(None))
    assert len(lines) == 1
    got, contrast = lines[0]
    assert streaks.angle_distance(got, angle) <= 2.0 and 0.0 <= got < 180.0
    assert -330.0 <= contrast <= -270.0


def test_dense_pair_without_band_not_reported():
    assert streaks.dense_pair_lines(dense_pair_image(20.0, 0.0), streaks.resolve_settings(None)) == []


def test_dense_pair_lines_ignore_single_and_bone_level_objects():
    cfg = streaks.resolve_settings(None)
    img = dense_pair_image(0.0, -300.0)
    assert streaks.dense_pair_lines(np.minimum(img, 1500.0), cfg) == []  # bone-level objects: not dense
    one = img.copy()
    one[:, :64][one[:, :64] > 3000] = 40.0
    assert streaks.dense_pair_lines(one, cfg) == []


def test_dense_pair_lines_put_first_in_directions():
    img = dense_pair_image(0.0, -600.0) + line_image(60.0, contrast=40.0, seed=4)
    rec = analyse(img).record
    assert rec["flagged"]
    assert streaks.angle_distance(rec["dominant_angles_deg"][0], 0.0) <= 2.0
    assert any(streaks.angle_distance(a, 60.0) <= 2.0 for a in rec["dominant_angles_deg"])


def random_masks(count: int = 60, seed: int = 5):
    """Blobby boolean masks of odd sizes, plus an all-True and an all-False one."""
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    out = [np.ones((9, 11), bool), np.zeros((9, 11), bool)]
    for _ in range(count):
        shape = tuple(int(v) for v in rng.integers(5, 40, 2))
        out.append(ndimage.gaussian_filter(rng.normal(size=shape), 1.5) > rng.uniform(-0.2, 0.3))
    return out


def test_mask_helpers_equal_their_filter_definitions():
    """The shifted-view mask helpers equal scipy.ndimage's erosion and maximum filter."""
    from scipy import ndimage

    for m in random_masks():
        assert np.array_equal(streaks.inner_boundary(m), m ^ ndimage.binary_erosion(m))
        for r in (1, 2, 3):
            expected = ndimage.maximum_filter(m.view(np.uint8), size=2 * r + 1).astype(bool)
            assert np.array_equal(streaks.grow(m, r), expected)
        ny, nx = (n // 2 * 2 for n in m.shape)
        if ny and nx:
            expected = m[0:ny:2, 0:nx:2] | m[1:ny:2, 0:nx:2] | m[0:ny:2, 1:nx:2] | m[1:ny:2, 1:nx:2]
            assert np.array_equal(streaks.bin_mask(m, 2), expected)


def test_screen_does_not_depend_on_thread_count(monkeypatch):
    """Threads only share the slices out: one thread and two give the same record and overlays."""
    rng = np.random.default_rng(2)
    hu = np.stack([line_image(30.0 + 20 * k, n=96, seed=k) for k in range(5)])
    hu[2] = 7.0  # a constant slice is skipped in both
    hu += rng.normal(0.0, 1.0, hu.shape).astype(np.float32)
    hu[2] = 7.0
    records, segments, maps = [], [], []
    for threads in (1, 2):
        monkeypatch.setattr(streaks, "SCREEN_THREADS", threads)
        res = analyse(hu)
        records.append(res.record)
        segments.append(res.overlays.segments)
        maps.append(res.overlays.maps["streak_strength"])
    assert records[0] == records[1]
    assert records[0]["slice_index"][2] is None
    assert records[0]["flagged"] and segments[0]  # the localisation ran on both
    assert segments[0] == segments[1]
    assert np.array_equal(maps[0], maps[1])


@pytest.mark.parametrize("shape", [(64, 64), (7, 90), (3, 5)])
@pytest.mark.parametrize("sigma,truncate", [(1.5, 3.0), (2.5, 2.5), (0.3, 3.0)])
def test_gaussian_blur_equals_scipy_up_to_float32_rounding(shape, sigma, truncate):
    """Same sampled kernel and mirror border as scipy.ndimage.gaussian_filter."""
    from scipy import ndimage

    image = (np.random.default_rng(4).normal(size=shape) * 100.0).astype(np.float32)
    expected = ndimage.gaussian_filter(image, sigma, truncate=truncate)
    got = streaks.gaussian_blur(image, sigma, truncate)
    assert got.dtype == np.float32 and got.shape == image.shape
    assert np.max(np.abs(got - expected)) <= 1e-5 * np.max(np.abs(image))


@pytest.mark.parametrize("shape", [(64, 64), (40, 33), (5, 7)])
@pytest.mark.parametrize("sigma", [10.0, 3.0, 0.1])
def test_smooth_box2_equals_two_2d_box_passes(shape, sigma):
    """Row passes then column passes give the sums of two zero-padded 2-D box passes."""
    from scipy import ndimage

    values = (np.random.default_rng(6).normal(size=shape) ** 2).astype(np.float32)
    width = max(1, int(round(math.sqrt(6.0 * sigma * sigma + 1.0))))
    expected = ndimage.uniform_filter(ndimage.uniform_filter(values, width, mode="constant"), width, mode="constant")
    got = streaks.smooth_box2(values, sigma)
    assert got.shape == shape and got.dtype == np.float32
    assert np.max(np.abs(got - expected)) <= 1e-6 * np.max(np.abs(expected))


# ------------------------------------------------------------------------- screen helpers
def test_stacked_screen_equals_one_slice_at_a_time():
    """The screen of a stack gives each slice the profile it gets alone (slices are independent)."""
    rng = np.random.default_rng(8)
    hu = np.stack([line_image(20.0 + 35 * k, n=96, seed=k) for k in range(5)])
    hu += rng.normal(0.0, 1.0, hu.shape).astype(np.float32)
    hu[3] = 5.0  # constant: skipped in both
    vol = Volume.from_array(hu)
    regions = find_regions(vol)
    cfg = streaks.resolve_settings(None)
    bins = streaks.spectral_bins((96, 96), tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(regions, 1, (96, 96), cfg)
    stacked = streaks.screen_stack(vol.hu, masks.stack(0, 5), 1, bins, cfg)
    for z in range(5):
        alone = streaks.screen_slice(vol.hu[z], masks(z), 1, bins, cfg)
        if isinstance(alone, str):
            assert stacked[z] == alone == "constant"
        else:
            assert np.allclose(stacked[z], alone, rtol=1e-6, atol=1e-9)


def test_mask_stack_equals_per_slice_masks():
    """AllowedMasks.stack gives the same masks as allowed_mask slice by slice (table and body)."""
    from dataclasses import replace

    n = 128
    yy, xx = np.mgrid[0:n, 0:n]
    hu = np.full((4, n, n), -1000.0, dtype=np.float32)
    hu[:, ((xx - 64) / 40.0) ** 2 + ((yy - 60) / 30.0) ** 2 <= 1] = 40.0
    hu[2] = -1000.0  # one slice with no body
    hu += np.random.default_rng(3).normal(0, 5, hu.shape).astype(np.float32)
    vol = Volume.from_array(hu)
    table = np.zeros(hu.shape, dtype=bool)
    table[:, 100:106, 20:108] = True  # a flat couch below the body ...
    table[1] = False  # ... missing on one slice
    table[3, 100:107, 20:108] = True  # ... and one row thicker on another
    regions = replace(find_regions(vol), table=table)
    assert regions.body[0].any() and not regions.body[2].any()
    cfg = streaks.resolve_settings(None)
    masks = streaks.AllowedMasks(regions, 2, (64, 64), cfg)
    stack = masks.stack(0, 4)
    for z in range(4):
        assert np.array_equal(stack[z], streaks.allowed_mask(regions, z, 2, (64, 64), cfg))
        assert np.array_equal(masks(z), stack[z])
    assert not stack[0, 50:53].any()  # the couch band is left out across the slice
    assert stack[1, 50:53].any()


@pytest.mark.parametrize("factor", [2, 4, 8])
def test_upsample_linear_is_bilinear_between_block_centres(factor):
    """Block centres at factor*j + (factor-1)/2; values between them linear, edges held."""
    from scipy import interpolate

    coarse = np.random.default_rng(factor).random((2, 6, 5)).astype(np.float32)
    shape = (6 * factor - 1, 5 * factor)
    got = streaks.upsample_linear(coarse, factor, shape)
    y = np.clip((np.arange(shape[0]) - (factor - 1) / 2) / factor, 0, 5)
    x = np.clip((np.arange(shape[1]) - (factor - 1) / 2) / factor, 0, 4)
    pts = np.stack(np.meshgrid(y, x, indexing="ij"), -1)
    for i in range(2):
        expected = interpolate.RegularGridInterpolator((np.arange(6), np.arange(5)), coarse[i])(pts)
        assert np.max(np.abs(got[i] - expected)) <= 1e-6


@pytest.mark.parametrize("mode", ["reflect", "constant"])
@pytest.mark.parametrize("sigma", [1.5, 0.6, 2.5, 1.155])
@pytest.mark.parametrize("shape", [(3, 37, 41), (2, 64, 64), (1, 300, 520), (40, 33), (4, 6)])
def test_banded_blur_equals_scipy(mode, sigma, shape):
    """The banded matrix products compute scipy.ndimage.gaussian_filter's blur (the same
    sampled kernel and border rule) slice by slice, up to float32 rounding; widths that
    are not whole blocks, more rows and columns than one product takes and kernels longer
    than a side included; a workspace gives the same values as fresh arrays."""
    from scipy import ndimage

    rng = np.random.default_rng(15)
    stack = (rng.normal(size=shape) * 50.0 + 1000.0).astype(np.float32)
    flat = stack.reshape((-1,) + shape[-2:])
    got = streaks.banded_blur(stack, sigma, 3.0, mode)
    lent = streaks.banded_blur(stack, sigma, 3.0, mode, streaks.Workspace())
    assert got.shape == shape and got.dtype == np.float32
    assert np.array_equal(got, lent)
    for i, got_i in enumerate(got.reshape(flat.shape)):
        expected = ndimage.gaussian_filter(flat[i], sigma, truncate=3.0, mode=mode)
        assert np.max(np.abs(got_i - expected)) <= 1e-5 * np.max(np.abs(flat[i]))


def test_segment_products_equal_the_segments_times_the_matrix():
    """Each block of outputs is its segment of the input rows times the matrix (numpy's
    product of the copied segments), for stacked and plain 2-D rows."""
    rng = np.random.default_rng(16)
    matrix = rng.random((7, 4)).astype(np.float32)
    for shape in [(3, 9, 3 * 5 + 7), (9, 2 * 5 + 7)]:
        ext = rng.random(shape).astype(np.float32)
        nb = (shape[-1] - 7) // 3 + 1
        out = np.empty(shape[:-1] + (nb * 4,), np.float32)
        streaks.segment_products(ext, matrix, 3, out)
        for b in range(nb):
            expected = ext[..., 3 * b : 3 * b + 7] @ matrix
            assert np.allclose(out[..., 4 * b : 4 * b + 4], expected, rtol=1e-6, atol=1e-6)


def test_screen_tasks_cover_whole_slabs_evenly():
    """Tasks cover every slice of the ranges once, in whole slabs starting at multiples of
    the slab size, at most ``stack`` slabs each; with several threads their number is a
    multiple of the thread count where there is more than one task, and their sizes
    differ by at most one slab."""
    for ranges, slab, stack, threads in [([(0, 400)], 4, 8, 2), ([(0, 401)], 4, 8, 2), ([(0, 37)], 1, 8, 1),
                                         ([(0, 12), (20, 90)], 2, 8, 2), ([(6, 8)], 2, 8, 2), ([(0, 400)], 4, 8, 3)]:
        tasks = streaks.screen_tasks(ranges, slab, stack, threads)
        covered = [z for a, b in tasks for z in range(a, b)]
        assert covered == [z for z0, z1 in ranges for z in range(z0, z1)]
        assert all(a % slab == 0 and -(-(b - a) // slab) <= stack for a, b in tasks)
        for z0, z1 in ranges:
            part = [(a, b) for a, b in tasks if z0 <= a < z1]
            sizes = [-(-(b - a) // slab) for a, b in part]
            assert max(sizes) - min(sizes) <= 1
            if threads > 1 and len(part) > 1:
                assert len(part) % threads == 0
    assert len(streaks.screen_tasks([(0, 400)], 4, 8, 2)) == 14  # 100 slabs: 14 tasks of 7 or 8


def test_gaussian_matrix_equals_constant_mode_correlation():
    from scipy import ndimage

    x = np.random.default_rng(10).random((32, 7)).astype(np.float32)
    for n in (32, 5, 2):
        g = streaks.gaussian_matrix(n, 1.146, 3.0)
        expected = ndimage.correlate1d(x[:n], np.asarray(streaks.gaussian_taps(1.146, 3.0)), axis=0, mode="constant")
        assert np.max(np.abs(g @ x[:n] - expected)) <= 1e-6


def test_block_mean_even_pads_odd_sides():
    values = np.arange(5 * 6, dtype=np.float32).reshape(5, 6)
    got = streaks.block_mean_even(values, 2, "edge")
    padded = np.vstack([values, values[-1:]])
    expected = padded.reshape(3, 2, 3, 2).mean(axis=(1, 3))
    assert got.shape == (3, 3) and np.allclose(got, expected)
    zero = streaks.block_mean_even(values, 2, "zero")
    assert np.allclose(zero[-1], values[-1].reshape(3, 2).sum(axis=1) / 4.0)


def test_screen_gain_flattens_a_two_level_noise():
    """A slice with noise SD 5 on the left and 20 on the right: after the screen's noise
    equalisation the two halves have about the same RMS (common practice, no source)."""
    rng = np.random.default_rng(11)
    img = rng.normal(0.0, 5.0, (128, 128)).astype(np.float32)
    img[:, 64:] *= 4.0
    allowed = np.ones(img.shape, dtype=bool)
    texture = streaks.screen_texture(img, allowed, streaks.resolve_settings(None))
    left, right = texture[20:108, 20:44], texture[20:108, 84:108]
    ratio = float(np.sqrt(np.mean(right**2) / np.mean(left**2)))
    assert 0.8 <= ratio <= 1.25, ratio
    plain = streaks.screen_texture(img, allowed, streaks.resolve_settings({"noise_equalise_sigma_px": 0.0}))
    plain_ratio = float(np.sqrt(np.mean(plain[20:108, 84:108] ** 2) / np.mean(plain[20:108, 20:44] ** 2)))
    assert plain_ratio > 3.0, plain_ratio  # without the equalisation the halves differ


# ------------------------------------------------------------------------- slabs of thin slices
def test_slab_screen_is_the_screen_of_the_slab_mean():
    """A slab's outcome is that of the mean of its slices under the intersection of their masks."""
    rng = np.random.default_rng(9)
    hu = np.stack([line_image(40.0, n=96, seed=k) for k in range(4)])
    hu += rng.normal(0.0, 1.0, hu.shape).astype(np.float32)
    vol = Volume.from_array(hu, (1.25, 1.0, 1.0))
    regions = find_regions(vol)
    cfg = streaks.resolve_settings(None)
    bins = streaks.spectral_bins((96, 96), tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(regions, 1, (96, 96), cfg)
    slabbed = streaks.screen_slab_stack(vol.hu, masks.stack(0, 4), 1, bins, cfg, 2)
    for z0 in (0, 2):
        mean = (0.5 * (vol.hu[z0].astype(np.float64) + vol.hu[z0 + 1])).astype(np.float32)
        alone = streaks.screen_slice(mean, masks(z0) & masks(z0 + 1), 1, bins, cfg)
        assert slabbed[z0] is slabbed[z0 + 1]
        assert np.allclose(slabbed[z0], alone, rtol=1e-5, atol=1e-7)


def test_flagged_slab_refined_to_the_slices_that_carry_the_flag():
    """Slabs of two 1.25 mm slices: a line on slice 1 only flags slice 1, not its slab partner."""
    rng = np.random.default_rng(4)
    hu = rng.normal(0.0, 10.0, (4, 128, 128)).astype(np.float32)
    hu[1] = line_image(30.0, seed=7)
    res = analyse(hu, spacing=(1.25, 1.0, 1.0))
    rec = res.record
    assert rec["flagged_slices"] == [1]
    assert rec["slice_index"][0] <= rec["tolerance"] < rec["slice_index"][1]
    assert rec["slice_index"][2] == rec["slice_index"][3]  # an unflagged slab: one index
    m = res.overlays.maps["streak_strength"]
    assert m[0].max() == 0.0 and m[1].max() > 1.0


def test_slab_setting_validated():
    with pytest.raises(ProfileError):
        streaks.resolve_settings({"screen_slab_mm": -1.0})
    with pytest.raises(ProfileError):
        streaks.resolve_settings({"screen_slab_mm": float("nan")})


# ------------------------------------------------------------------------- reused buffers
def test_bin_mask_column_pair_path_equals_the_block_or():
    """Masks of even width are binned from 16-bit column pairs; that equals the 2 x 2 any-of."""
    rng = np.random.default_rng(12)
    for shape in [(3, 10, 64), (2, 7, 16), (40, 8), (4, 9, 6)]:
        m = rng.random(shape) > 0.7
        ny = shape[-2] // 2 * 2
        expected = m[..., 0:ny:2, 0::2] | m[..., 1:ny:2, 0::2] | m[..., 0:ny:2, 1::2] | m[..., 1:ny:2, 1::2]
        assert np.array_equal(streaks.bin_mask(m, 2), expected)
        assert np.array_equal(streaks.bin_mask(m, 2, streaks.Workspace()), expected)


def test_workspace_screen_equals_the_screen_with_fresh_arrays():
    """A workspace reused over stacks of different content gives each stack exactly the
    outcome computed with fresh arrays (no state carried from one stack to the next)."""
    rng = np.random.default_rng(13)
    hu = np.stack([line_image(15.0 + 40 * k, n=128, seed=k) for k in range(8)])
    hu += rng.normal(0.0, 1.0, hu.shape).astype(np.float32)
    hu[:, :, :20] = -1000.0  # an air band: masked pixels and a strong edge
    vol = Volume.from_array(hu, (1.25, 1.0, 1.0))
    regions = find_regions(vol)
    cfg = streaks.resolve_settings(None)
    bins = streaks.spectral_bins((64, 64), tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(regions, 2, (64, 64), cfg)
    ws = streaks.Workspace()
    for z0 in (0, 4, 0):
        lent = streaks.screen_slab_stack(vol.hu[z0:z0 + 4], masks.stack(z0, z0 + 4, ws), 2, bins, cfg, 2, ws)
        fresh = streaks.screen_slab_stack(vol.hu[z0:z0 + 4], masks.stack(z0, z0 + 4), 2, bins, cfg, 2)
        assert len(lent) == len(fresh) == 4
        for a, b in zip(lent, fresh):
            assert not isinstance(a, str) and np.array_equal(a, b)
        one = streaks.screen_stack(vol.hu[z0:z0 + 4], masks.stack(z0, z0 + 4, ws), 2, bins, cfg, ws)
        alone = [streaks.screen_slice(vol.hu[z], masks(z), 2, bins, cfg) for z in range(z0, z0 + 4)]
        for a, b in zip(one, alone):
            assert np.allclose(a, b, rtol=1e-6, atol=1e-9)


def test_inner_boundary_word_path_equals_the_erosion():
    """Masks whose rows are whole 64-bit words are eroded by word shifts; the outline equals
    ``mask ^ binary_erosion(mask)`` (scipy.ndimage, cross-shaped element, False border)."""
    from scipy import ndimage

    rng = np.random.default_rng(14)
    for shape in [(3, 12, 64), (9, 16), (2, 5, 8)]:
        m = ndimage.gaussian_filter(rng.normal(size=shape), (0, 1.0, 1.0)[-len(shape):]) > 0.0
        m[..., :, 7] = True  # a column across word boundaries
        got = streaks.inner_boundary(m)
        lent = streaks.inner_boundary(m, streaks.Workspace())
        for z in np.ndindex(shape[:-2]):
            expected = m[z] ^ ndimage.binary_erosion(m[z])
            assert np.array_equal(got[z], expected)
            assert np.array_equal(lent[z], expected)


# ------------------------------------------------------------------------- first screen
def _changing_body_regions(n: int = 128, nz: int = 8, width: int | None = None):
    """A body whose outline grows from slice to slice, a couch (missing on slice 5)."""
    from dataclasses import replace

    nx = width or n
    yy, xx = np.mgrid[0:n, 0:nx]
    hu = np.full((nz, n, nx), -1000.0, dtype=np.float32)
    for z in range(nz):
        hu[z, ((xx - nx / 2) / (30.0 + 3.0 * z)) ** 2 + ((yy - 60) / (22.0 + 2.0 * z)) ** 2 <= 1] = 40.0
    hu += np.random.default_rng(8).normal(0, 5, hu.shape).astype(np.float32)
    vol = Volume.from_array(hu, (1.25, 1.0, 1.0))
    table = np.zeros(hu.shape, dtype=bool)
    table[:, 100:106, 20 : nx - 20] = True
    table[5] = False
    return vol, replace(find_regions(vol), table=table)


def test_slab_mask_leaves_out_every_slice_outline_and_little_more():
    """The first screen's slab mask lies inside the intersection of its slices' masks (each
    slice's table and body outline stay out); what it leaves out beyond that lies within
    one binned pixel of some slice's outline; where the body and table are the same on
    every slice it equals the intersection, and masks that are not whole 64-bit words
    are intersected slice by slice (exactly)."""
    cfg = streaks.resolve_settings(None)
    vol, regions = _changing_body_regions()
    masks = streaks.AllowedMasks(regions, 2, (64, 64), cfg)
    extra_total = 0
    for z0 in (0, 4):
        exact = np.logical_and.reduce([masks(z) for z in range(z0, z0 + 4)])
        slab = masks.slab_mask(z0, z0 + 4, streaks.Workspace())
        assert not (slab & ~exact).any()
        outlines = np.logical_or.reduce([streaks.inner_boundary(streaks.bin_mask(regions.body[z], 2))
                                         for z in range(z0, z0 + 4)])
        near = streaks.grow(outlines, 1)
        extra = exact & ~slab
        assert not (extra & ~near).any()
        extra_total += int(extra.sum())
    assert extra_total > 0  # the body changes: the superset is used
    stacked = masks.slab_stack(0, 8, 4)
    assert np.array_equal(stacked[0], masks.slab_mask(0, 4)) and np.array_equal(stacked[1], masks.slab_mask(4, 8))
    from dataclasses import replace

    same = replace(regions, body=np.repeat(regions.body[:1], 8, axis=0), table=np.repeat(regions.table[:1], 8, axis=0))
    masks_same = streaks.AllowedMasks(same, 2, (64, 64), cfg)
    assert np.array_equal(masks_same.slab_mask(0, 4), np.logical_and.reduce([masks_same(z) for z in range(4)]))
    vol_odd, regions_odd = _changing_body_regions(n=127, width=125)  # 127 x 125 bytes: not whole words
    masks_odd = streaks.AllowedMasks(regions_odd, 2, (63, 62), cfg)
    assert np.array_equal(masks_odd.slab_mask(0, 4), np.logical_and.reduce([masks_odd(z) for z in range(4)]))


def test_first_screen_refines_incomplete_and_gated_slabs():
    """12 slices of 1.25 mm (first-screen slabs of 4): a strong line on slice 9 is found
    and flagged on that slice alone, with the index of screening every two-slice slab;
    a constant slice makes its first-screen slab incomplete, so it is screened in
    two-slice slabs (its slab partner gets the two-slice index)."""
    rng = np.random.default_rng(5)
    hu = rng.normal(0.0, 10.0, (12, 128, 128)).astype(np.float32)
    hu[9] = line_image(30.0, seed=7, contrast=60.0)
    hu[2] = 0.0  # constant
    default = analyse(hu, spacing=(1.25, 1.0, 1.0)).record
    every_slab = analyse(hu, {"first_screen_slab_mm": 0.0}, spacing=(1.25, 1.0, 1.0)).record
    assert default["flagged_slices"] == every_slab["flagged_slices"] == [9]
    assert default["slice_index"][9] == every_slab["slice_index"][9]
    assert default["slice_index"][2] is None and every_slab["slice_index"][2] is None
    assert default["slice_index"][3] == every_slab["slice_index"][3]  # refined: the slab is incomplete
    assert default["slice_index"][0] == default["slice_index"][1] == every_slab["slice_index"][0]


def test_slab_stack_equals_the_slab_mask_definition():
    """The first screen's masks of several slabs at once (with a workspace, a last partial
    slab, a slab whose slices carry different tables and slabs whose body changes) equal
    their definition slab by slab: the base mask without each slice's table exclusion,
    without the outline of the binned AND of the bodies and the binned OR outside it."""
    cfg = streaks.resolve_settings(None)
    vol, regions = _changing_body_regions(nz=11)
    masks = streaks.AllowedMasks(regions, 2, (64, 64), cfg)
    ws = streaks.Workspace()
    for z0, z1 in [(0, 11), (0, 8), (4, 11), (0, 9)]:
        got = masks.slab_stack(z0, z1, 4, ws).copy()
        assert got.shape == (-(-(z1 - z0) // 4), 64, 64)
        for j, a in enumerate(range(z0, z1, 4)):
            zs = range(a, min(a + 4, z1))
            kept = np.logical_and.reduce([
                masks.base & ~streaks.table_exclusion(streaks.bin_mask(regions.table[z], 2), int(cfg["table_band_px"]))
                if regions.table[z].any() else masks.base for z in zs])
            every = streaks.bin_mask(np.logical_and.reduce([regions.body[z] for z in zs]), 2)
            some = streaks.bin_mask(np.logical_or.reduce([regions.body[z] for z in zs]), 2)
            outline = (every ^ ndimage_erosion(every)) | (some & ~every)
            expected = kept & ~outline
            if len(zs) == 1:  # one slice: its own mask
                expected = masks(a)
            assert np.array_equal(got[j], expected), (z0, z1, j)


def ndimage_erosion(mask: np.ndarray) -> np.ndarray:
    from scipy import ndimage

    return ndimage.binary_erosion(mask)


def test_pooled_workspaces_outlive_the_screening_threads(monkeypatch):
    """Screening tasks borrow workspaces from one pool: no workspace is lent to two tasks
    at a time, and a second volume's threads reuse the first one's workspaces (none are
    made anew) and give the same record."""
    import threading
    import time
    from contextlib import contextmanager

    monkeypatch.setattr(streaks, "_WORKSPACE_POOL", [])
    lent, busy, shared = [], set(), []
    lock = threading.Lock()
    real = streaks.pooled_workspace

    @contextmanager
    def watched():
        with real() as ws:
            with lock:
                shared.append(id(ws) in busy)
                busy.add(id(ws))
                lent.append(id(ws))
            time.sleep(0.002)  # let the other thread take a task meanwhile
            try:
                yield ws
            finally:
                with lock:
                    busy.discard(id(ws))

    monkeypatch.setattr(streaks, "pooled_workspace", watched)
    monkeypatch.setattr(streaks, "SCREEN_THREADS", 2)
    monkeypatch.setattr(streaks, "SCREEN_STACK", 1)
    rng = np.random.default_rng(17)
    hu = rng.normal(0.0, 10.0, (6, 64, 64)).astype(np.float32)
    first = analyse(hu, spacing=(3.0, 1.0, 1.0)).record  # one slice per slab: six tasks
    made = set(lent)
    assert len(lent) == 6 and 1 <= len(made) <= 2
    assert not any(shared)
    lent.clear()
    second = analyse(hu, spacing=(3.0, 1.0, 1.0)).record
    assert len(lent) == 6 and set(lent) <= made
    assert first == second


def test_slab_outcomes_do_not_depend_on_the_stack_they_are_screened_in(monkeypatch):
    """Each slab's profile is the same, bit for bit, whatever stack it is screened in
    (stacks of 1 to 5 slabs and the tasks of 1 or 2 threads), so that records do not
    depend on the thread count or the stack size: the matrix products of a stack's blurs
    are taken image by image."""
    rng = np.random.default_rng(18)
    hu = rng.normal(0.0, 10.0, (20, 256, 256)).astype(np.float32)
    hu[:, 100:180, 40:220] += 40.0  # an edge-bearing block: masks, fill and soft weight at work
    hu[7] += line_image(30.0, n=256, seed=3, contrast=25.0)
    records = []
    for threads, stack in [(1, 1), (1, 3), (2, 2), (2, 5)]:
        monkeypatch.setattr(streaks, "SCREEN_THREADS", threads)
        monkeypatch.setattr(streaks, "SCREEN_STACK", stack)
        records.append(analyse(hu, spacing=(1.25, 1.0, 1.0)).record)
    assert all(r == records[0] for r in records[1:])
    vol = Volume.from_array(hu, (1.25, 1.0, 1.0))
    cfg = streaks.resolve_settings(None)
    bins = streaks.spectral_bins((256, 256), tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(find_regions(vol), 1, (256, 256), cfg)
    whole = streaks.screen_slab_stack(vol.hu[0:16], masks.slab_stack(0, 16, 4), 1, bins, cfg, 4, per_slab=True)
    for z0 in (4, 8):
        part = streaks.screen_slab_stack(vol.hu[z0:z0 + 4], masks.slab_stack(z0, z0 + 4, 4), 1, bins, cfg, 4,
                                         per_slab=True)
        assert all(np.array_equal(a, b) for a, b in zip(part, whole[z0:z0 + 4]))


# --------------------------------------------------------------------------- localisation
# The localisation computes the directions of a slice together (one inverse FFT and one
# blur over the stack of components, the ring means and the pixels' coordinates once).
# The reference below is the straightforward per-direction code path it replaced: every
# direction's window, ring means, component, blur and full-image line masks computed
# alone. The components, hence the lines, must be the same; the strength map equal up to
# float32 rounding (its blur sums the taps in another order).
def reference_directional_component(texture, bins, angle_deg, window_deg):
    d = np.abs(bins.line_angle_deg - np.float32(angle_deg)) % 180.0
    d = np.minimum(d, 180.0 - d)
    band = (bins.radius >= bins.radius.ravel()[bins.sample].min()) & (bins.radius <= bins.radius.ravel()[bins.sample].max())
    window = (np.exp(-0.5 * (d / window_deg) ** 2) * band).astype(np.float32)
    component = sfft.irfft2(texture.spectrum * window, s=texture.residual.shape)
    p = streaks.power(texture.spectrum).ravel()[bins.sample].astype(np.float64)
    ring_mean = np.bincount(bins.ring, weights=p, minlength=bins.n_rings) / np.maximum(bins.ring_count, 1)
    w2 = window.ravel()[bins.sample].astype(np.float64) ** 2
    ny, nx = texture.residual.shape
    expected = 2.0 * float(np.sum(ring_mean[bins.ring] * w2)) / (ny * nx) ** 2
    return component.astype(np.float32), max(expected, 1e-12)


def reference_line_extent(comp, weight, t, s, offset, amplitude, cfg):
    on_line = weight & (np.abs(t - offset) <= 0.5)
    pos = np.rint(s[on_line]).astype(np.int64)
    if pos.size < int(cfg["segment_min_px"]):
        return None
    base = pos.min()
    sums = np.bincount(pos - base, weights=comp[on_line].astype(np.float64))
    counts = np.bincount(pos - base)
    run = max(5, int(cfg["segment_min_px"]) // 2)
    local_count = ndimage.uniform_filter1d(counts.astype(float), run, mode="constant")
    mean = ndimage.uniform_filter1d(sums, run, mode="constant") / np.maximum(local_count, 1e-9)
    keep = (np.sign(amplitude) * mean >= float(cfg["segment_keep"]) * abs(amplitude)) & (local_count > 0.2)
    best = loop_longest_run(keep)
    if best[1] - best[0] + 1 < int(cfg["segment_min_px"]):
        return None
    return float(best[0] + base), float(best[1] + base)


def reference_lines_at_angle(comp, weight, angle_deg, cfg):
    a = math.radians(angle_deg)
    u = np.array([-math.sin(a), math.cos(a)])
    n = np.array([math.cos(a), math.sin(a)])
    cy, cx = (comp.shape[0] - 1) / 2.0, (comp.shape[1] - 1) / 2.0
    yy, xx = np.mgrid[0 : comp.shape[0], 0 : comp.shape[1]].astype(np.float32)
    yy -= np.float32(cy)
    xx -= np.float32(cx)
    t, s = yy * n[0] + xx * n[1], yy * u[0] + xx * u[1]
    off = np.rint(t[weight]).astype(np.int64)
    base = off.min()
    idx = off - base
    vals = comp[weight].astype(np.float64)
    count = np.bincount(idx)
    means = np.bincount(idx, weights=vals) / np.maximum(count, 1)
    enough = count >= int(cfg["segment_min_px"])
    if enough.sum() < 8:
        return []
    centre = float(np.median(means[enough]))
    spread = 1.4826 * float(np.median(np.abs(means[enough] - centre)))
    if not spread > 0:
        return []
    z = np.where(enough, (means - centre) / spread, 0.0)
    out = []
    for i in np.argsort(-np.abs(z)):
        if abs(z[i]) < float(cfg["segment_z"]) or len(out) >= int(cfg["max_segments_per_slice"]):
            break
        if abs(z[i]) < np.abs(z[max(0, i - 2) : i + 3]).max():
            continue
        extent = reference_line_extent(comp, weight, t, s, float(i + base), float(means[i] - centre), cfg)
        if extent is None:
            continue
        s0, s1 = extent
        offset = float(i + base)
        start = (cy + offset * n[0] + s0 * u[0], cx + offset * n[1] + s0 * u[1])
        end = (cy + offset * n[0] + s1 * u[0], cx + offset * n[1] + s1 * u[1])
        out.append((angle_deg, start, end, float(abs(z[i]))))
    return out


def reference_localise_slice(texture, bins, angles, cfg):
    strength = np.zeros(texture.residual.shape, dtype=np.float32)
    lines = []
    smooth_px = max(2.0, 2.0 * float(cfg["highpass_sigma_px"]))
    for angle in angles:
        comp, expected = reference_directional_component(texture, bins, angle, float(cfg["direction_window_deg"]))
        local = np.sqrt(streaks.gaussian_blur(comp * comp, smooth_px, 3.0) / np.float32(expected))
        np.maximum(strength, local * texture.weight, out=strength)
        lines += reference_lines_at_angle(comp, texture.weight, angle, cfg)
    lines.sort(key=lambda ln: -ln[3])
    return strength, lines[: int(cfg["max_segments_per_slice"])]


def streaked_disc(n: int = 192, seed: int = 11, lines=((25.0, 12.0, 25.0), (110.0, -20.0, -30.0))) -> np.ndarray:
    """A 40 HU disc in air with noise (SD 10 HU) and thin streaks (angle, offset, contrast)
    across it, by default at 25 and 110 deg."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:n, 0:n]
    c = (n - 1) / 2.0
    img = np.where((yy - c) ** 2 + (xx - c) ** 2 <= (0.4 * n) ** 2, 40.0, -1000.0).astype(np.float32)
    img += rng.normal(0.0, 10.0, (n, n)).astype(np.float32)
    for angle, offset, contrast in lines:
        a = math.radians(angle)
        t = (yy - c) * math.cos(a) + (xx - c) * math.sin(a)
        img[np.abs(t - offset) < 0.7] += contrast
    return img


def limited_angle_like(n: int = 160, seed: int = 12) -> np.ndarray:
    """Noise with no content at line orientations 60-100 deg and extra energy along the wedge's
    two boundaries, on a disc, with a thin streak along each boundary (as limited angular
    coverage leaves them)."""
    rng = np.random.default_rng(seed)
    ky = np.fft.fftfreq(n)[:, None]
    kx = np.fft.rfftfreq(n)[None, :]
    angle = streaks.line_angle_of_frequency(ky, kx)
    gain = np.where((angle > 60.0) & (angle < 100.0), 0.0, 1.0)
    gain[(np.abs(angle - 60.0) < 1.5) | (np.abs(angle - 100.0) < 1.5)] = 4.0
    noise = np.fft.irfft2(np.fft.rfft2(rng.normal(0.0, 10.0, (n, n))) * gain, s=(n, n))
    yy, xx = np.mgrid[0:n, 0:n]
    c = (n - 1) / 2.0
    disc = np.where((yy - c) ** 2 + (xx - c) ** 2 <= (0.35 * n) ** 2, 60.0, 0.0)
    for angle, offset, contrast in [(60.0, -9.0, 35.0), (60.0, 25.0, 30.0), (100.0, 15.0, -35.0)]:
        a = math.radians(angle)
        disc[np.abs((yy - c) * math.cos(a) + (xx - c) * math.sin(a) - offset) < 0.7] += contrast
    return (disc + noise).astype(np.float32)


def texture_of(image: np.ndarray, cfg):
    shape = image.shape
    bins = streaks.spectral_bins(shape, tuple(float(v) for v in cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    allowed = streaks.base_allowed_mask(None, 1, shape, cfg)
    return streaks.slice_texture(image, allowed, cfg), bins


@pytest.mark.parametrize("image,angles", [
    (streaked_disc(), [25.0, 110.0, 70.3]),
    (streaked_disc(n=128, seed=4), [110.0, 25.0]),
    # along the rows and columns of an even grid every pixel lies half a pixel from two
    # line offsets: both lines count it
    (streaked_disc(n=128, seed=5, lines=((0.0, 10.5, 30.0), (90.0, -6.5, -30.0))), [0.0, 90.0]),
    (limited_angle_like(), [60.0, 100.0]),
    (limited_angle_like(n=96, seed=3), [100.0, 60.0, 151.5, 8.0]),
])
def test_localise_slice_equals_the_per_direction_reference(image, angles):
    """The directions localised together give the per-direction code path's lines (the same
    components: angles, ends, z-scores) and its strength map up to float32 rounding."""
    cfg = streaks.resolve_settings(None)
    texture, bins = texture_of(image, cfg)
    got = streaks.localise_slice(texture, bins, angles, cfg)
    strength, lines = reference_localise_slice(texture, bins, angles, cfg)
    assert lines  # the images carry streaks: the comparison has lines to compare
    assert len(got.lines) == len(lines)
    for (a, s0, e0, z0), (b, s1, e1, z1) in zip(got.lines, lines):
        assert a == b and round(z0, 2) == round(z1, 2) and z0 == z1
        assert s0 == s1 and e0 == e1
    assert np.array_equal(got.strength == 0, strength == 0)
    on = strength > 0
    assert on.any()
    assert np.max(np.abs(got.strength[on] - strength[on]) / strength[on]) <= 1e-5


def test_localise_slice_without_directions_is_empty():
    cfg = streaks.resolve_settings(None)
    texture, bins = texture_of(streaked_disc(n=96), cfg)
    got = streaks.localise_slice(texture, bins, [], cfg)
    assert got.lines == [] and not got.strength.any()


def test_a_direction_does_not_depend_on_the_others_localised_with_it():
    """One inverse FFT over the stack of windowed spectra gives each direction the
    component and expected variance it has alone, bit for bit."""
    cfg = streaks.resolve_settings(None)
    texture, bins = texture_of(streaked_disc(), cfg)
    windows = streaks.AngularWindows(bins, float(cfg["direction_window_deg"]))
    together, expected = streaks.directional_components(texture, bins, [25.0, 110.0, 47.5], windows)
    for k, angle in enumerate([25.0, 110.0, 47.5]):
        alone, exp_alone = streaks.directional_components(texture, bins, [angle], windows)
        assert np.array_equal(together[k], alone[0]) and expected[k] == exp_alone[0]
        ref, exp_ref = reference_directional_component(texture, bins, angle, float(cfg["direction_window_deg"]))
        assert np.array_equal(together[k], ref) and expected[k] == exp_ref


def test_angular_windows_kept_and_remade_alike(monkeypatch):
    """A window served from the cache, or made again after the cache was emptied, is the
    one a fresh instance makes; the cache holds at most KEPT_WINDOWS angles."""
    monkeypatch.setattr(streaks, "KEPT_WINDOWS", 2)
    cfg = streaks.resolve_settings(None)
    bins = streaks.spectral_bins((64, 64), tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    windows = streaks.AngularWindows(bins, 3.0)
    first = windows.window(30.0)
    assert windows.window(30.0) is first
    for angle in (10.0, 170.0, 30.0):
        windows.window(angle)
        assert len(windows._made) <= 2
    fresh = streaks.AngularWindows(bins, 3.0)
    for angle in (30.0, 10.0, 170.0):
        assert np.array_equal(windows.window(angle), fresh.window(angle))
    assert not windows.window(30.0).flags.writeable


def loop_longest_run(keep):
    best, i = (0, -1), 0
    while i < keep.size:
        if keep[i]:
            j = i
            while j < keep.size and keep[j]:
                j += 1
            if j - i > best[1] - best[0] + 1:
                best = (i, j - 1)
            i = j
        else:
            i += 1
    return best


def test_longest_run_is_the_first_longest_run():
    rng = np.random.default_rng(21)
    cases = [np.zeros(0, bool), np.zeros(7, bool), np.ones(9, bool), np.array([1, 1, 0, 1, 1, 0, 1], bool)]
    cases += [rng.random(int(rng.integers(1, 80))) < p for p in (0.3, 0.6, 0.9) for _ in range(30)]
    for keep in cases:
        assert streaks.longest_run(keep) == loop_longest_run(keep)
    assert streaks.longest_run(np.array([1, 1, 0, 1, 1], bool)) == (0, 1)


@pytest.mark.parametrize("shape,factor", [((8, 10), 2), ((7, 9), 2), ((10, 11), 3), ((4, 5), 1)])
def test_write_upsampled_equals_repeated_blocks(shape, factor):
    rng = np.random.default_rng(22)
    binned = rng.random((shape[0] // factor, shape[1] // factor)).astype(np.float32)
    target = np.full(shape, -1.0, dtype=np.float32)
    streaks.write_upsampled(target, binned, factor)
    full = np.repeat(np.repeat(binned, factor, axis=0), factor, axis=1)
    expected = np.full(shape, -1.0, dtype=np.float32)
    expected[: full.shape[0], : full.shape[1]] = full
    assert np.array_equal(target, expected)


def test_analysis_overlays_equal_the_per_direction_reference():
    """The whole analysis (a binned 320-px series, three flagged slices) writes the segments
    and the streak map the per-direction code path gives, slice by slice."""
    hu = np.stack([streaked_disc(n=320, seed=s) for s in (31, 32, 33)])
    vol = Volume.from_array(hu, (3.0, 0.7, 0.7))
    regions = find_regions(vol)
    got = streaks.analyse(vol, regions)
    cfg = streaks.resolve_settings(None)
    screen = streaks.screen_volume(vol, regions, cfg)
    f, shape_b = screen.factor, screen.shape_b
    assert f == 2 and got.record["flagged_slices"] == [0, 1, 2]
    bins = streaks.spectral_bins(shape_b, tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    segments, strength = [], np.zeros(vol.shape, dtype=np.float32)
    for z in got.record["flagged_slices"]:
        texture = streaks.slice_texture(streaks.bin_slice(vol.hu[z], f), streaks.allowed_mask(regions, z, f, shape_b, cfg), cfg)
        pairs = [a for a, _ in streaks.dense_pair_lines(streaks.bin_slice(vol.hu[z], f), cfg)]
        angles = streaks.dominant_angles(screen.profiles[z], got.record["missing_wedge_deg"], cfg, pairs)
        ref_map, ref_lines = reference_localise_slice(texture, bins, angles, cfg)
        full = np.repeat(np.repeat(ref_map, f, axis=0), f, axis=1)
        strength[z, : full.shape[0], : full.shape[1]] = full
        segments += [(z, round((y0 + 0.5) * f - 0.5, 2), round((x0 + 0.5) * f - 0.5, 2), round((y1 + 0.5) * f - 0.5, 2),
                      round((x1 + 0.5) * f - 0.5, 2), f"streak {streaks.display_angle(a)} deg", round(zs, 2))
                     for a, (y0, x0), (y1, x1), zs in ref_lines]
    assert segments
    assert [(s.start_zyx_vox[0], *s.start_zyx_vox[1:], *s.end_zyx_vox[1:], s.label, s.value)
            for s in got.overlays.segments] == segments
    mine = got.overlays.maps["streak_strength"]
    assert np.array_equal(mine == 0, strength == 0)
    on = strength > 0
    assert np.max(np.abs(mine[on] - strength[on]) / strength[on]) <= 1e-5
