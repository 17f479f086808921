"""Unit tests of the air analysis: bad input, settings, record and overlays, findings."""
from __future__ import annotations

import functools
import json

import numpy as np
import pytest
from scipy import ndimage

from reconaudit.checker.analyses import air
from reconaudit.checker.errors import ProfileError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import dumps
from reconaudit.checker.volume import Volume


def _ellipse(n, cy, cx, ay, ax):
    y, x = np.mgrid[0:n, 0:n]
    return ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0


def small_body(nz=20, n=96, air_hu=-1000.0, noise=10.0, seed=0, blob_hu=None) -> Volume:
    """A 96 x 96 water ellipse in air (1.5 mm pixels), optional blob in the air."""
    rng = np.random.default_rng(seed)
    img = np.full((n, n), air_hu, dtype=np.float32)
    img[_ellipse(n, 50, 48, 22, 30)] = 0.0
    vol = np.repeat(img[None], nz, axis=0)
    if blob_hu is not None:
        z, y, x = np.ogrid[:nz, :n, :n]
        blob = ((z - nz // 2) * 2.0) ** 2 + ((y - 14) * 1.5) ** 2 + ((x - 48) * 1.5) ** 2 <= 7.0**2
        vol[blob] = blob_hu
    w = rng.standard_normal(vol.shape).astype(np.float32)
    w = ndimage.gaussian_filter(w, (0.5, 1.0, 1.0))
    vol = vol + w * (noise / max(w.std(), 1e-6))
    return Volume.from_array(vol, spacing_mm=(2.0, 1.5, 1.5))


def run(vol, settings=None):
    return air.analyse(vol, find_regions(vol), settings)


def test_no_air_is_not_applicable():
    vol = Volume.from_array(np.random.default_rng(1).normal(0, 10, (3, 40, 40)).astype(np.float32))
    res = run(vol)
    assert not res.applicable and "air" in res.record["reason"]


def test_no_body_is_not_applicable():
    vol = Volume.from_array(np.random.default_rng(2).normal(-1000, 10, (3, 40, 40)).astype(np.float32))
    res = run(vol)
    assert not res.applicable and "no body" in res.record["reason"]


def test_padding_only_is_not_applicable():
    vol = Volume.from_array(np.full((2, 32, 32), -3024.0, dtype=np.float32))
    res = run(vol)
    assert not res.applicable and "padding" in res.record["reason"]


def test_unknown_setting_and_bad_kind_raise_profile_error():
    vol = small_body(nz=4)
    with pytest.raises(ProfileError):
        run(vol, {"no_such_setting": 1})
    with pytest.raises(ProfileError):
        run(vol, {"flag_kinds": ["everything"]})


def test_record_is_json_and_labels_match_ids():
    vol = small_body(blob_hu=-900.0)
    res = run(vol)
    rec = json.loads(dumps(res.record))
    assert {"mean_hu", "noise_hu", "structures", "flagged", "applicable"} <= set(rec)
    keys = {"id", "centroid_zyx_vox", "centroid_mm", "bbox_zyx_vox", "volume_mm3", "mean_hu", "max_hu",
            "contrast_to_noise", "slices", "kind", "flagged"}
    assert rec["structures"] and all(keys <= set(st) for st in rec["structures"])
    labels = res.overlays.labels
    assert labels.dtype == np.int32 and labels.shape == vol.shape
    for st in rec["structures"]:
        z, y, x = (int(round(v)) for v in st["centroid_zyx_vox"])
        assert labels[z, y, x] == st["id"]
        (z0, y0, x0), (z1, y1, x1) = st["bbox_zyx_vox"]
        assert (labels == st["id"]).sum() == (labels[z0 : z1 + 1, y0 : y1 + 1, x0 : x1 + 1] == st["id"]).sum()
        assert np.allclose(st["centroid_mm"], vol.index_to_patient(st["centroid_zyx_vox"]), atol=0.05)
    blob = [st for st in rec["structures"] if st["flagged"]]
    assert len(blob) == 1 and blob[0]["kind"] == "isolated"
    assert any("structure" in f.message and "LPS" in f.message for f in res.findings)
    assert len(res.overlays.points) == 1


def test_flag_kinds_setting_decides_what_flags():
    vol = small_body(blob_hu=-900.0)
    res = run(vol, {"flag_kinds": []})
    assert res.record["structures"] and not any(st["flagged"] for st in res.record["structures"])
    assert not res.flagged


def test_calibration_offset_gives_finding():
    vol = small_body(air_hu=-950.0)
    res = run(vol)
    assert res.record["mean_hu"] == pytest.approx(-950.0, abs=2.0)
    assert res.flagged and any("calibration" in f.message for f in res.findings)


def test_flattened_air_gives_finding():
    vol = small_body(noise=10.0)
    regions = find_regions(vol)
    hu = vol.hu.copy()
    hu[regions.air] = -1000.0  # air replaced by a constant
    flat = Volume(hu=hu, spacing_mm=vol.spacing_mm, affine=vol.affine)
    res = air.analyse(flat, regions)
    assert res.record["noise_hu"] < 1.0
    assert any("flattened" in f.message for f in res.findings)
    clean = air.analyse(vol, regions)
    assert not any("flattened" in f.message for f in clean.findings)


def test_structure_at_first_slice_leaves_scan_unless_single_slice_forced():
    vol = small_body(nz=12, blob_hu=-900.0)
    hu = vol.hu.copy()
    hu[:3] = hu[5:8]  # the blob's slices copied onto the first slices: it now starts there
    moved = Volume(hu=hu, spacing_mm=vol.spacing_mm, affine=vol.affine)
    res = run(moved)
    kinds = [st["kind"] for st in res.record["structures"]]
    assert "leaves_scan" in kinds
    forced = run(moved, {"single_slice_mode": True})
    assert any(st["kind"] == "isolated" for st in forced.record["structures"])


def test_euler_threshold_grows_with_search_volume():
    """The expected Euler characteristic falls with the level and grows with the resels."""
    t_small = air.threshold_for_false_alarms(0.05, 100.0, 3)
    t_large = air.threshold_for_false_alarms(0.05, 1e6, 3)
    assert 3.0 < t_small < t_large < 7.0
    assert air.expected_euler_characteristic(t_large, 1e6, 3) == pytest.approx(0.05, rel=1e-6)


def test_robust_mean_and_noise_ignores_outliers():
    rng = np.random.default_rng(4)
    v = np.concatenate([rng.normal(-1000, 10, 20000), np.full(500, 40.0)])
    mean, sd = air.robust_mean_and_noise(v)
    assert mean == pytest.approx(-1000, abs=0.5) and sd == pytest.approx(10, rel=0.05)


def test_gaussian_3d_equals_scipy_gaussian_filter():
    """The banded-matrix Gaussian is scipy.ndimage.gaussian_filter (reflect, truncate 3)."""
    from scipy import ndimage as ndi

    from reconaudit.checker.analyses.air import gaussian_3d

    rng = np.random.default_rng(3)
    a = rng.normal(0, 1, (7, 33, 29)).astype(np.float32)
    for sigma in [(1.0, 2.0, 1.5), (0.0, 3.0, 3.0), (2.5, 0.7, 0.0)]:
        want = ndi.gaussian_filter(a.astype(np.float64), sigma, mode="reflect", truncate=3.0)
        got = gaussian_3d(a.copy(), sigma, np.empty_like(a), np.empty_like(a))
        assert np.max(np.abs(got - want)) < 1e-5, sigma


def test_block_count_equals_a_plain_block_sum():
    from reconaudit.checker.analyses.air import block_count

    rng = np.random.default_rng(4)
    mask = rng.random((5, 17, 23)) > 0.6
    f = (1, 4, 3)
    got = block_count(mask, f)
    pad = [(0, (-n) % k) for n, k in zip(mask.shape, f)]
    m = np.pad(mask, pad).astype(int)
    want = m.reshape(m.shape[0], m.shape[1] // 4, 4, m.shape[2] // 3, 3).sum(axis=(2, 4))
    assert np.array_equal(got, want.astype(np.float32))


# ------------------------------------------------------------------ coarse grid
def _plain_masked_block_sums(hu, air, f):
    """Reference: pad to whole blocks, zero outside the air, reshape and sum (float64)."""
    pad = [(0, (-n) % k) for n, k in zip(hu.shape, f)]
    v = np.pad(np.where(air, hu.astype(np.float64), 0.0), pad)
    m = np.pad(air, pad).astype(np.int64)
    shape = (v.shape[0] // f[0], f[0], v.shape[1] // f[1], f[1], v.shape[2] // f[2], f[2])
    return v.reshape(shape).sum(axis=(1, 3, 5)), m.reshape(shape).sum(axis=(1, 3, 5))


def test_coarse_air_grid_equals_plain_masked_block_sums():
    """Block sums over the air pixels equal a plain masked reshape-sum, with a mask that
    changes from slice to slice, edges that are not whole blocks, and infinite values
    outside the air (ignored) and inside it (that block left out)."""
    rng = np.random.default_rng(7)
    hu = rng.normal(-1000, 12, (7, 37, 42)).astype(np.float32)
    mask = rng.random(hu.shape) > 0.3
    mask[:, :5] = True
    mask[1:3, 10:20, 10:20] = False  # changes along z
    hu[~mask & (rng.random(hu.shape) > 0.9)] = np.inf
    for f in [(2, 4, 4), (3, 3, 5), (1, 2, 2), (1, 1, 1)]:
        sums, counts = air.coarse_air_grid(hu, mask, f)
        want_s, want_c = _plain_masked_block_sums(hu, mask, f)
        assert sums.shape == want_s.shape
        assert np.array_equal(counts, want_c.astype(np.float32)), f
        assert np.max(np.abs(sums - want_s)) < 1e-2, f
    whole = (slice(None), slice(0, 36), slice(0, 40))  # images of whole blocks (the buffered path)
    for f in [(2, 4, 4), (3, 2, 5), (1, 4, 8)]:
        sums, counts = air.coarse_air_grid(hu[whole], mask[whole], f)
        want_s, want_c = _plain_masked_block_sums(hu[whole], mask[whole], f)
        assert sums.shape == want_s.shape
        assert np.array_equal(counts, want_c.astype(np.float32)), f
        assert np.max(np.abs(sums - want_s)) < 1e-2, f
    for part in [(slice(None),) * 3, whole]:
        bad = hu[part].copy()
        bad[0, 0, 0] = np.nan  # an air pixel (row 0 is air everywhere)
        sums, counts = air.coarse_air_grid(bad, mask[part], (2, 4, 4))
        want_s, want_c = _plain_masked_block_sums(hu[part], mask[part], (2, 4, 4))
        assert counts[0, 0, 0] == 0 and sums[0, 0, 0] == 0
        assert np.array_equal(counts[1:], want_c[1:].astype(np.float32))
        assert np.max(np.abs(sums[1:] - want_s[1:])) < 1e-2


def test_packed_mask_block_count_equals_plain_count():
    """Counting a contiguous bool layer with the pixels of a block row packed into one
    word gives the plain reshape-sum counts for 2, 4 and 8 pixels per row (blocks of up
    to 255 pixels), and the coarse grid takes that path on contiguous masks; a layer of
    256 or more pixels per block is not accepted (byte counts would overflow)."""
    rng = np.random.default_rng(11)
    mask = np.ascontiguousarray(rng.random((6, 24, 48)) > 0.4)
    mask[:, :4] = True
    mask[:, 8:16, 16:40] = False
    for f in [(2, 4, 4), (3, 2, 2), (1, 4, 8), (2, 3, 8), (1, 1, 2), (3, 4, 8)]:
        kz, ky, kx = f
        a = mask[:kz]
        assert air.packed_mask_count_fits(a, ky, kx)
        word = {2: np.uint16, 4: np.uint32, 8: np.uint64}[kx]
        words = np.empty((24, 48 // kx), dtype=word)
        wrows = np.empty((24 // ky, 48 // kx), dtype=word)
        out = np.empty((24 // ky, 48 // kx), dtype=np.float32)
        got = air.packed_mask_block_count(a, ky, kx, words, wrows, out)
        want = a.reshape(kz, 24 // ky, ky, 48 // kx, kx).sum(axis=(0, 2, 4))
        assert np.array_equal(got, want.astype(np.float32)), f
        hu = rng.normal(-1000, 12, mask.shape).astype(np.float32)
        sums, counts = air.coarse_air_grid(hu, mask, f)
        want_s, want_c = _plain_masked_block_sums(hu, mask, f)
        assert np.array_equal(counts, want_c.astype(np.float32)), f
        assert np.max(np.abs(sums - want_s)) < 1e-2, f
    assert not air.packed_mask_count_fits(np.ones((4, 8, 8), dtype=bool), 8, 8)  # 256 pixels a block
    assert not air.packed_mask_count_fits(np.ones((2, 8, 9), dtype=bool), 4, 3)  # no word of 3 bytes
    assert not air.packed_mask_count_fits(np.ones((2, 8, 16), dtype=bool)[:, :, :8], 4, 4)  # not contiguous


def test_block_factors_make_blocks_of_about_three_mm():
    """Blocks of about 3 mm, never above 4 mm, at least one pixel, along z at most a
    quarter of the slices, one slice for a single-slice volume."""
    assert air.block_factors((1.25, 0.7, 0.7), 400) == (2, 4, 4)
    assert air.block_factors((2.0, 1.5, 1.5), 20) == (2, 2, 2)
    assert air.block_factors((5.0, 0.5, 0.5), 40) == (1, 6, 6)
    assert air.block_factors((1.25, 0.7, 0.7), 1) == (1, 4, 4)
    assert air.block_factors((0.6, 0.7, 0.7), 8) == (2, 4, 4)
    for spacing in [(0.5, 0.35, 0.35), (3.0, 1.9, 1.9), (1.0, 0.98, 0.98)]:
        f = air.block_factors(spacing, 200)
        assert all(k >= 1 and (k == 1 or k * d <= air.MAX_BLOCK_MM) for k, d in zip(f, spacing))


def test_scale_levels_finest_is_the_block_mean_and_coarser_ones_filtered():
    levels = air.scale_levels((2, 4, 4), (1.25, 0.7, 0.7), [1.5, 3.0, 6.0, 12.0], 400)
    (rel0, sig0), (rel1, sig1) = levels[0], levels[1]
    assert rel0 == (1, 1, 1) and sig0 == (0.0, 0.0, 0.0)
    assert rel1 == (2, 2, 2) and all(0.4 < s < 0.7 for s in sig1)
    assert [r[1] for r, _ in levels] == [1, 2, 4, 8]
    one = air.scale_levels((1, 4, 4), (1.25, 0.7, 0.7), [1.5, 3.0], 1)
    assert all(r[0] == 1 and s[0] == 0.0 for r, s in one)


def _fine_torso(nz=24, n=128, noise=12.0, seed=21, sphere=None):
    """An invented small torso at 0.7 mm pixels and 1.25 mm slices (so the coarse grid has
    4 x 4 x 2 blocks), correlated noise, optional sphere (centre z, y, x in mm, radius mm, HU)."""
    dz, dy, dx = 1.25, 0.7, 0.7
    img = np.full((n, n), -1000.0, dtype=np.float32)
    img[_ellipse(n, 80, 64, 30, 45)] = 0.0
    return _with_balls_and_noise(img, nz, [sphere] if sphere is not None else [], noise, seed, (dz, dy, dx))


def _with_balls_and_noise(img, nz, balls, noise, seed, spacing):
    """``nz`` copies of ``img`` with balls painted in (centre z, y, x in mm, radius mm,
    HU), slightly blurred, plus band-pass correlated noise of SD ``noise``."""
    dz, dy, dx = spacing
    vol = np.repeat(img[None], nz, axis=0)
    z, y, x = np.ogrid[: vol.shape[0], : vol.shape[1], : vol.shape[2]]
    for (cz, cy, cx), r, value in balls:
        vol[((z * dz - cz) ** 2 + (y * dy - cy) ** 2 + (x * dx - cx) ** 2) <= r * r] = value
    vol = ndimage.gaussian_filter(vol, (0.4, 0.6, 0.6))
    rng = np.random.default_rng(seed)
    w = rng.standard_normal(vol.shape).astype(np.float32)
    w = ndimage.gaussian_filter(w, (0.6, 0.9, 0.9)) - ndimage.gaussian_filter(w, (0.6, 2.2, 2.2))
    vol = vol + w * (noise / w.std())
    return Volume.from_array(vol.astype(np.float32), spacing_mm=(dz, dy, dx))


def test_five_mm_sphere_at_high_contrast_is_found():
    """The smallest structure asked for, "from a few mm": a sphere of 5 mm diameter at
    0 HU (1000 HU above the air) in the air of a torso with 12 HU correlated noise.
    Basis of its expected detectability (analytic, the matched-filter SNR of a known
    signal in white noise, Barrett & Myers, Foundations of Image Science, 2004): the
    sphere holds about 65 mm3 = 106 voxels of 0.61 mm3, so even if only a tenth of its
    contrast reached one coarse block of 32 voxels, that block's mean would stand about
    100 HU x sqrt(32) / 12 HU = 47 noise SDs above the air -- far above the threshold
    (about 5-6 SDs). It is found, flagged as isolated, its centroid within 1.5 mm of the
    centre; the same torso without it flags nothing."""
    centre = (15.0, 18.0, 45.0)  # mm from the first voxel: in the air, anterior to the body
    vol = _fine_torso(sphere=(centre, 2.5, 0.0))
    res = run(vol)
    flagged = [st for st in res.record["structures"] if st["flagged"]]
    assert len(flagged) == 1 and flagged[0]["kind"] == "isolated"
    got = np.array(flagged[0]["centroid_zyx_vox"]) * np.array(vol.spacing_mm)
    assert np.linalg.norm(got - np.array(centre)) <= 1.5
    assert flagged[0]["mean_hu"] > -1000.0 + 100.0
    clean = run(_fine_torso())
    assert not any(st["flagged"] for st in clean.record["structures"]) and not clean.flagged


def test_order_statistics_equal_numpy_median_and_percentile():
    """The one-partition median and percentile give numpy's numbers (odd and even counts,
    float32 and float64, tiny and large samples)."""
    rng = np.random.default_rng(12)
    for n in [1, 2, 3, 4, 7, 10, 101, 1000, 20001]:
        for dtype in (np.float32, np.float64):
            v = (rng.normal(-1000.0, 12.0, n)).astype(dtype)
            assert air.order_median(v) == float(np.median(v)), (n, dtype)
            for q in (10.0, 50.0, 90.0, 99.0):
                assert air.order_percentile(v, q) == float(np.percentile(v, q)), (n, dtype, q)
    assert np.isnan(air.order_median(np.zeros(0))) and np.isnan(air.order_percentile(np.zeros(0), 90.0))


@pytest.mark.parametrize("factors", [(2, 4, 4), (3, 2, 2), (1, 4, 8)])
def test_coarse_air_grid_on_two_threads_equals_one_thread_and_plain_sums(monkeypatch, factors):
    """The coarse grid made over slabs of slices on two threads (cut on whole layers of
    blocks, a short last layer included) is the single-thread grid value for value and
    the plain masked reshape-sum; a non-finite air value in the second slab still leaves
    only its own block out."""
    rng = np.random.default_rng(31)
    hu = rng.normal(-1000, 12, (41, 24, 32)).astype(np.float32)
    mask = rng.random(hu.shape) > 0.3
    mask[:, :4] = True
    mask[20:30, 8:16, 8:24] = False
    hu[35, 0, 0] = np.nan  # an air pixel in the second slab
    grids = {}
    for threads in (1, 2):
        monkeypatch.setattr(air, "AIR_THREADS", threads)
        grids[threads] = air.coarse_air_grid(hu, mask, factors)
    assert np.array_equal(grids[1][0], grids[2][0]) and np.array_equal(grids[1][1], grids[2][1])
    clean = hu.copy()
    clean[35, 0, 0] = -1000.0
    want_s, want_c = _plain_masked_block_sums(clean, mask, factors)
    b = 35 // factors[0]
    sums, counts = grids[2]
    assert counts[b, 0, 0] == 0 and sums[b, 0, 0] == 0
    keep = np.ones(counts.shape, dtype=bool)
    keep[b, 0, 0] = False
    assert np.array_equal(counts[keep], want_c.astype(np.float32)[keep])
    assert np.max(np.abs(sums[keep] - want_s[keep])) < 1e-2


def test_run_lanes_and_map_threads_keep_order_and_raise_errors():
    """Lanes and mapped items come back in their order on one and on two threads, the
    first lane on the calling thread; an error in a lane or an item is raised."""
    import threading

    caller = threading.get_ident()
    for threads in (1, 2):
        got = air.run_lanes([lambda: threading.get_ident(), lambda: "b", lambda: 3], threads=threads)
        assert got[0] == caller and got[1:] == ["b", 3]
        assert air.map_threads(lambda x: x * x, list(range(9)), threads=threads) == [x * x for x in range(9)]
        assert air.map_threads(lambda x: -x, [3, 1, 2], threads=threads, cost=[1.0, 5.0, 2.0]) == [-3, -1, -2]
        many = [functools.partial(lambda k: (k, sum(range(20000 * (k % 3)))), k) for k in range(12)]
        assert air.run_lanes(many, threads=threads) == [lane() for lane in many]  # taken from front and back

        def fails():
            raise ValueError("lane failed")

        with pytest.raises(ValueError, match="lane failed"):
            air.run_lanes([lambda: 1, fails], threads=threads)
        with pytest.raises(ZeroDivisionError):
            air.map_threads(lambda x: 1 // x, [1, 0, 2], threads=threads)


def test_row_ranges_cover_the_rows_once():
    """The label volume's rows are cut into disjoint ranges that cover every row, split
    where the structures' cells are, and one range for one thread or no structure."""
    boxes = [(slice(0, 5), slice(10, 30), slice(0, 4)), (slice(0, 5), slice(60, 64), slice(0, 4))]
    sizes = [5 * 20 * 4, 5 * 4 * 4]
    for parts in (1, 2, 3):
        cuts = air._row_ranges(64, boxes, sizes, parts)
        assert cuts[0][0] == 0 and cuts[-1][1] == 64 and len(cuts) <= parts
        assert all(a < b for a, b in cuts) and all(b == c for (_, b), (c, _) in zip(cuts[:-1], cuts[1:]))
    assert air._row_ranges(64, boxes, sizes, 2)[0][1] <= 30  # the larger structure is split
    assert air._row_ranges(64, [], [], 2) == [(0, 64)]


def _armed_torso(nz=40, n=128, noise=12.0, seed=5, balls=(((24.0, 14.0, 30.0), 4.0, -900.0), ((30.0, 16.0, 62.0), 3.0, -930.0))):
    """An invented torso with two arms apart from it and a table bar below it, at 0.7 mm
    pixels and 1.25 mm slices, correlated noise, balls in the air (centre z, y, x in mm,
    radius mm, HU)."""
    dz, dy, dx = 1.25, 0.7, 0.7
    img = np.full((n, n), -1000.0, dtype=np.float32)
    img[_ellipse(n, 64, 64, 26, 36)] = 0.0
    for cx in (12, 116):
        img[_ellipse(n, 64, cx, 10, 7)] = 40.0
    img[100:106, 20:108] = 250.0
    return _with_balls_and_noise(img, nz, balls, noise, seed, (dz, dy, dx))


def test_two_threads_give_the_single_thread_record_and_labels(monkeypatch):
    """The whole analysis on two threads (coarse grid on slabs, scales in two lanes with
    the body noise, structures measured and label rows written side by side) gives the
    single-thread record and label volume exactly, on a torso with arms, a table, a
    cable and two faint structures in the air."""
    vol = _armed_torso(nz=40)
    regions = find_regions(vol)
    out = {}
    for threads in (1, 2):
        monkeypatch.setattr(air, "AIR_THREADS", threads)
        out[threads] = air.analyse(vol, regions)
    one, two = out[1], out[2]
    assert len(one.record["structures"]) >= 4
    assert dumps(one.record) == dumps(two.record)
    assert np.array_equal(one.overlays.labels, two.overlays.labels)
    assert [f.message for f in one.findings] == [f.message for f in two.findings]


def _blob_map(seed=3, shape=(60, 80, 90)):
    """A ScaleMap of smooth unit noise with blobs: two far apart, two close together (their
    padded boxes overlap), a long bar through every slice, and a faint halo joining a
    blob to a low ridge that runs far beyond the blob's box."""
    rng = np.random.default_rng(seed)
    z = ndimage.gaussian_filter(rng.standard_normal(shape), 1.0)
    z = (z / z.std()).astype(np.float32)
    zz, yy, xx = np.ogrid[: shape[0], : shape[1], : shape[2]]
    for (cz, cy, cx), r, v in [((10, 10, 10), 3, 9.0), ((45, 70, 80), 4, 12.0), ((30, 40, 40), 3, 8.0),
                               ((33, 40, 47), 2, 7.0), ((30, 15, 70), 3, 10.0)]:
        z[((zz - cz) ** 2 + (yy - cy) ** 2 + (xx - cx) ** 2) <= r * r] += v
    z[:, 60:63, 5:9] += 9.0  # a bar through every slice (leaves the box of any group)
    z[30, 15, 20:70] += 3.0  # a low ridge from the blob at x 70 far to the left
    valid = np.ones(shape, dtype=bool)
    valid[:, :, :2] = False
    return air.ScaleMap(1.5, (1, 1, 1), z, valid, 0.0, 1.0, 5.0, 1000.0, contrast_hu=z)


def test_grouped_hysteresis_equals_one_box(monkeypatch):
    """Labelling the components only in boxes around groups of cores (boxes grown, and
    joined where they overlap) gives the label map, contrast-to-noise and boxes of one
    labelling around every core, on a map with far-apart, close and joined structures and
    a bar through every slice; every label lies in components above the low level that
    hold a core (checked against a plain labelling of the whole map)."""
    m = _blob_map()
    monkeypatch.setattr(air, "MIN_GROUPED_CELLS", 0)
    high = m.above(m.threshold)
    groups = air._group_boxes(high, air._padded_box_3d(high, 2), 2)
    assert groups is not None and len(groups) >= 4  # grouped, with the close pair joined
    assert not any(air.boxes_overlap(a, b) for i, a in enumerate(groups) for b in groups[i + 1:])
    grouped = air.hysteresis_structures_boxes(m, 2.0)
    monkeypatch.setattr(air, "MIN_GROUPED_CELLS", 10**12)
    single = air.hysteresis_structures_boxes(m, 2.0)
    assert np.array_equal(grouped[0], single[0])
    assert grouped[1] == single[1] and grouped[2] == single[2]
    assert len(grouped[1]) >= 5
    low_lab, _ = ndimage.label(m.above(2.0))
    holders = set(np.unique(low_lab[high])) - {0}
    assert set(np.unique(low_lab[grouped[0] > 0])) <= holders
    assert grouped[2] == ndimage.find_objects(grouped[0])


def test_join_overlapping_boxes_leaves_none_overlapping():
    """Boxes that overlap (also through a chain: a meets b, b meets c) become one box
    around them; boxes apart stay as they are."""
    b = lambda *r: tuple(slice(a, c) for a, c in r)  # noqa: E731
    boxes = [b((0, 5), (0, 5), (0, 5)), b((20, 25), (0, 5), (0, 5)), b((4, 8), (4, 8), (4, 8)), b((7, 12), (7, 9), (0, 3))]
    out = air._join_overlapping(boxes)
    assert b((0, 12), (0, 9), (0, 8)) in out and b((20, 25), (0, 5), (0, 5)) in out and len(out) == 2


def test_dense_empty_and_zero_int32_arrays_behave_as_numpy_arrays():
    """Arrays on large pages (written whole) and the label volume's zero map are plain
    writable numpy arrays of the asked shape and dtype; the zero map reads zero before
    any write; small arrays come from np.empty; subtract_scaled equals a - float32(k) * b
    value for value."""
    big = air.dense_empty((3, 700, 1000), np.float32)  # 8.4 MB: a map of its own
    assert big.shape == (3, 700, 1000) and big.dtype == np.float32 and big.flags.writeable
    big[...] = 2.5
    assert float(big.sum(dtype=np.float64)) == 2.5 * big.size
    small = air.dense_empty((4, 5), np.bool_)
    assert small.shape == (4, 5) and small.dtype == np.bool_
    labels = air.zero_int32((6, 300, 400))
    assert labels.dtype == np.int32 and not labels.any()
    labels[2, 10:20, 30:40] = 7
    assert int(labels.sum()) == 7 * 100
    rng = np.random.default_rng(2)
    a = rng.normal(0, 100, (70, 40, 50)).astype(np.float32)
    b = rng.integers(0, 32, a.shape).astype(np.float32)
    want = a - np.float32(-1000.03) * b
    assert np.array_equal(air.subtract_scaled(a, b, -1000.03), want)


@pytest.mark.parametrize(
    "where, centre_from_ends",
    [("across the cut between the two threads' slabs", None), ("near the first slice", 9.0),
     ("near the last slice", -9.0), ("6 mm from the body", "body")],
)
def test_faint_ellipsoid_found_on_one_and_two_threads(monkeypatch, where, centre_from_ends):
    """A faint structure, a 14 mm ball at -920 HU (80 HU above the air, 6.7 times the
    12 HU noise) is found, isolated and flagged, at each of several places: across the
    slice where the coarse grid is cut between two threads (slice 24 of 48), 9 mm from
    either end of the scan (its edge 2 mm inside), and 6 mm from the body; the same
    structure on one and on two threads. Its centroid lies within 2 mm of the ball's
    centre and its volume within 25 % of the ball's 1437 mm3 (4/3 pi 7^3, analytic)."""
    nz, dz = 48, 1.25
    cz = {None: 30.0, 9.0: 9.0, -9.0: (nz - 1) * dz - 9.0, "body": 30.0}[centre_from_ends]
    centre = (cz, 13.5, 60.0) if centre_from_ends == "body" else (cz, 12.0, 45.0)
    vol = _armed_torso(nz=nz, balls=((centre, 7.0, -920.0),))
    regions = find_regions(vol)
    found = {}
    for threads in (1, 2):
        monkeypatch.setattr(air, "AIR_THREADS", threads)
        found[threads] = air.analyse(vol, regions).record["structures"]
    assert found[1] == found[2], where
    flagged = [st for st in found[2] if st["flagged"]]
    assert len(flagged) == 1 and flagged[0]["kind"] == "isolated", where
    got = np.array(flagged[0]["centroid_zyx_vox"]) * np.array(vol.spacing_mm)
    assert np.linalg.norm(got - np.array(centre)) <= 2.0, where
    assert abs(flagged[0]["volume_mm3"] - 4.0 / 3.0 * np.pi * 7.0**3) <= 0.25 * 1437.0, where


def test_poorly_measured_fine_structure_is_replaced_by_the_coarser_outline():
    """A structure measured poorly at the fine scale (contrast-to-noise below 10 there)
    and seen whole at a coarser scale is outlined at the coarser scale: its fine label is
    cleared everywhere, the coarser region takes its place, and its box is dropped; a
    well measured fine structure elsewhere is kept as it is."""
    rng = np.random.default_rng(8)
    fine_shape, coarse_shape = (40, 32, 32), (20, 16, 16)
    zf = (0.3 * rng.standard_normal(fine_shape)).astype(np.float32)
    zf[18:22, 14:18, 14:18] = 7.0  # faint at the fine scale (SNR 7 < 10)
    zf[4:7, 3:6, 3:6] = 30.0  # well measured at the fine scale
    zc = (0.3 * rng.standard_normal(coarse_shape)).astype(np.float32)
    zc[8:12, 6:10, 6:10] = 20.0  # the same place, whole and larger, at the coarser scale
    zc[2:3, 1:3, 1:3] = 20.0  # the well measured one seen again coarser: not replaced
    ones_f, ones_c = np.ones(fine_shape, dtype=bool), np.ones(coarse_shape, dtype=bool)
    fine = air.ScaleMap(1.5, (2, 4, 4), zf, ones_f, 0.0, 1.0, 5.0, 100.0, contrast_hu=zf)
    coarse = air.ScaleMap(3.0, (4, 8, 8), zc, ones_c, 0.0, 1.0, 5.0, 100.0, contrast_hu=zc)
    combined, base, boxes = air.combine_scales_boxes([fine, coarse], 2.0)
    assert base == (2, 4, 4)
    labels = set(np.unique(combined)) - {0}
    assert len(labels) == 2
    strong = int(combined[5, 4, 4])
    outlined = int(combined[20, 16, 16])
    assert strong and outlined and strong != outlined
    assert boxes[outlined - 1] == (slice(16, 24), slice(12, 20), slice(12, 20))
    assert np.all(combined[16:24, 12:20, 12:20] == outlined)
    assert np.count_nonzero(combined == outlined) == 8 * 8 * 8
    assert sum(b is None for b in boxes) == 1  # the faint fine label, replaced
    assert boxes[strong - 1] == (slice(4, 7), slice(3, 6), slice(3, 6))


def test_findings_name_the_kinds_of_structure_in_words():
    """The sentences a physicist reads say what a structure is in words, not the record's
    key (``leaves_scan`` reads "leaving the scanned slices"); every kind has words."""
    from reconaudit.checker.analyses import air

    assert set(air.KIND_WORDS) == set(air.KINDS)
    st = {"id": 3, "kind": "leaves_scan", "volume_mm3": 500.0, "mean_hu": -850.0, "contrast_to_noise": 6.0,
          "slices": [0, 4], "centroid_mm": [10.0, -20.0, 5.0]}
    text = air.describe(st, None)
    assert "leaving the scanned slices" in text and "leaves_scan" not in text
