"""Unit tests of the TTF analysis: settings, bad input, records, findings, overlays."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from reconaudit.checker.analyses import REGISTRY, get, ttf
from reconaudit.checker.analyses._edges import BinnedEsf, bin_esf, condition_esf, first_crossing, lsf_window
from reconaudit.checker.errors import ProfileError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import Roi, dumps
from reconaudit.checker.volume import Volume

PX = 0.5


def disc_stack(*, n=96, nz=8, radius_mm=6.0, s=0.6, contrast=100.0, noise=0.0, seed=0, cy=None, cx=None):
    cy = n / 2 + 0.3 if cy is None else cy
    cx = n / 2 - 0.2 if cx is None else cx
    yy, xx = np.indices((n, n), dtype=float)
    r = np.hypot((yy - cy) * PX, (xx - cx) * PX)
    img = contrast * stats.ncx2.cdf((radius_mm / s) ** 2, 2, (r / s) ** 2)
    st = np.repeat(img[None], nz, axis=0)
    if noise:
        st = st + np.random.default_rng(seed).normal(0, noise, st.shape)
    return Volume.from_array(st.astype(np.float32), (1.0, PX, PX)), (cy, cx)


def run(vol, **settings):
    return ttf.analyse(vol, find_regions(vol), settings)


# ------------------------------------------------------------------ interface
def test_module_interface():
    assert "ttf" in REGISTRY and get("ttf") is ttf.analyse
    assert ttf.NAME == "ttf"
    for key in ("f50_min_per_mm", "f50_max_per_mm", "max_f50_contrast_ratio", "min_contrast_to_noise"):
        assert key in ttf.DEFAULTS and key in ttf.SOURCES


def test_unknown_setting_raises():
    vol, _ = disc_stack()
    with pytest.raises(ProfileError, match="unknown setting"):
        run(vol, nonsense=1)


def test_bin_fraction_must_oversample_4x():
    vol, _ = disc_stack()
    with pytest.raises(ProfileError, match="4x"):
        run(vol, bin_fraction=0.5)


def test_bad_centre_raises():
    vol, _ = disc_stack()
    with pytest.raises(ProfileError, match="centres_zyx_vox"):
        run(vol, centres_zyx_vox=[[1, 2]])


# ------------------------------------------------------------------ helpers
def test_bin_esf_counts_and_fills_empty_bins():
    d = np.array([0.05, 0.05, 0.35])
    v = np.array([1.0, 3.0, 5.0])
    esf = bin_esf(d, v, bin_mm=0.1, lo_mm=0.0, hi_mm=0.4)
    assert esf.counts.tolist() == [2, 0, 0, 1]
    assert esf.esf_hu[0] == 2.0 and esf.esf_hu[3] == 5.0
    assert esf.esf_hu[1] == pytest.approx(3.0) and esf.esf_hu[2] == pytest.approx(4.0)


def test_monotone_conditioning_is_monotone_and_auto_keeps_overshoot():
    x = np.linspace(-4, 4, 161)
    noisy = stats.norm.cdf(x) * 100 + np.random.default_rng(0).normal(0, 3, x.size)
    esf = bin_esf(x, noisy, bin_mm=0.05, lo_mm=-4.01, hi_mm=4.01)
    fitted, used = condition_esf(esf, "monotone")
    assert used == "monotone" and np.all(np.diff(fitted.esf_hu) >= -1e-9)
    ringing = stats.norm.cdf(x) * 100 + 15 * np.exp(-((x - 2.0) ** 2) / 0.1)  # ~12 % overshoot
    _, used = condition_esf(bin_esf(x, ringing, bin_mm=0.05, lo_mm=-4.01, hi_mm=4.01), "auto")
    assert used == "none"


def test_window_is_flat_in_the_core():
    w = lsf_window(np.linspace(-5, 5, 101), 0.0, 5.0, taper=0.3)
    assert np.all(w[np.abs(np.linspace(-5, 5, 101)) <= 3.5] == 1.0)
    assert w[0] == 0.0 and w[-1] == 0.0


def test_first_crossing_interpolates():
    assert first_crossing(np.array([0.0, 1.0, 2.0]), np.array([1.0, 0.6, 0.2]), 0.5) == pytest.approx(1.25)
    assert math.isnan(first_crossing(np.array([0.0, 1.0]), np.array([1.0, 0.9]), 0.5))


# ------------------------------------------------------------------ records
def test_record_of_a_user_centre():
    vol, (cy, cx) = disc_stack(noise=2.0)
    res = run(vol, centres_zyx_vox=[[4, round(cy), round(cx)]])
    assert res.applicable
    (e,) = res.record["edges"]
    for key in ("contrast_hu", "contrast_to_noise", "f50_per_mm", "f10_per_mm", "frequency_per_mm", "ttf",
                "center_mm", "slices", "reliable", "reason", "kind"):
        assert key in e
    assert e["kind"] == "circular" and e["source"] == "centre"
    assert e["slices"] == [0, 7]
    assert e["radius_mm"] == pytest.approx(6.0, abs=0.15)
    assert e["frequency_per_mm"][0] == 0.0 and e["frequency_per_mm"][-1] <= 1.0 / (2 * PX) + 1e-9
    assert e["ttf"][0] == pytest.approx(1.0)
    assert e["center_mm"][0] == pytest.approx(cx * PX, abs=0.05)  # LPS x = column * spacing
    assert e["center_mm"][1] == pytest.approx(cy * PX, abs=0.05)
    assert e["reliable"] and e["reason"] == ""
    assert "method" in res.record and "Cunningham" in res.record["method"]
    json.loads(dumps(res.record))  # strict JSON


def test_overlay_point_per_edge_with_label():
    vol, (cy, cx) = disc_stack()
    res = run(vol, centres_zyx_vox=[[4, cy, cx]])
    (p,) = res.overlays.points
    assert p.zyx_vox[1] == pytest.approx(cy, abs=0.05) and p.zyx_vox[2] == pytest.approx(cx, abs=0.05)
    assert "HU" in p.label and "f50" in p.label
    assert p.value == res.record["edges"][0]["f50_per_mm"]


def test_roi_with_one_insert():
    vol, (cy, cx) = disc_stack(n=112)
    roi = {"slices": [0, 7], "yx0_vox": [int(cy) - 40, int(cx) - 40], "yx1_vox": [int(cy) + 40, int(cx) + 40]}
    (e,) = run(vol, rois=[roi]).record["edges"]
    assert e["source"] == "roi" and e["reliable"], e["reason"]
    assert e["f50_per_mm"] == pytest.approx(0.18739 / 0.6, rel=0.02)


def test_straight_edge_through_settings():
    n = 80
    yy, xx = np.indices((n, n), dtype=float)
    d = ((xx - 40) * math.cos(math.radians(6)) - (yy - 40) * math.sin(math.radians(6))) * PX
    st = np.repeat((200 * stats.norm.cdf(d / 0.5))[None], 8, axis=0)
    vol = Volume.from_array(st.astype(np.float32), (1.0, PX, PX))
    res = run(vol, straight_edge_rois=[{"slices": [0, 7], "yx0_vox": [0, 0], "yx1_vox": [80, 80]}])
    (e,) = res.record["edges"]
    assert e["kind"] == "straight" and e["angle_deg"] == pytest.approx(96.0, abs=0.1)
    assert e["f50_per_mm"] == pytest.approx(0.18739 / 0.5, rel=0.02)


# ------------------------------------------------------------------ bad input
def test_insert_touching_roi_border_is_unreliable():
    vol, (cy, cx) = disc_stack(n=112)
    r_px = 6.0 / PX
    roi = {"slices": [0, 7], "yx0_vox": [int(cy - r_px - 1), int(cx) - 40], "yx1_vox": [int(cy) + 40, int(cx) + 40]}
    (e,) = run(vol, rois=[roi]).record["edges"]
    assert not e["reliable"] and "touches the border" in e["reason"]


def test_insert_at_the_image_border_is_unreliable():
    vol, (cy, cx) = disc_stack(n=96, cx=14.0)
    (e,) = run(vol, centres_zyx_vox=[[4, cy, 14]]).record["edges"]
    assert not e["reliable"] and "touches the border" in e["reason"]


def test_contrast_below_noise_is_unreliable():
    vol, (cy, cx) = disc_stack(contrast=20.0, noise=25.0, seed=4)
    res = run(vol, centres_zyx_vox=[[4, cy, cx]], radius_mm=6.0)
    (e,) = res.record["edges"]
    assert not e["reliable"] and "contrast-to-noise" in e["reason"]
    assert any("not reliable" in f.message for f in res.findings)


def test_single_slice_is_unreliable_but_measured():
    vol, (cy, cx) = disc_stack(nz=1)
    (e,) = run(vol, centres_zyx_vox=[[0, cy, cx]]).record["edges"]
    assert not e["reliable"] and "1 slice" in e["reason"]
    assert e["f50_per_mm"] == pytest.approx(0.18739 / 0.6, rel=0.03)


def test_nothing_to_measure_is_not_applicable():
    vol = Volume.from_array(np.zeros((3, 64, 64), np.float32), (1.0, PX, PX))
    res = run(vol, skin_edge="never")
    assert not res.applicable and "no edge" in res.record["reason"]


def test_edge_parallel_to_the_grid_is_unreliable():
    st = np.zeros((8, 64, 64), np.float32)
    st[:, :, 32:] = 100.0
    vol = Volume.from_array(st, (1.0, PX, PX))
    e = ttf.straight_edge_ttf(vol, Roi(0, 7, 0, 0, 64, 64)).record
    assert not e["reliable"] and "pixel grid" in e["reason"]


# ------------------------------------------------------------------ findings
def test_f50_limits_raise_review_findings():
    vol, (cy, cx) = disc_stack()
    res = run(vol, centres_zyx_vox=[[4, cy, cx]], f50_min_per_mm=0.5)
    assert res.flagged and any("below the limit" in f.message and f.severity.value == "review" for f in res.findings)
    res = run(vol, centres_zyx_vox=[[4, cy, cx]], f50_max_per_mm=0.1)
    assert any("above the limit" in f.message for f in res.findings)
    res = run(vol, centres_zyx_vox=[[4, cy, cx]])
    assert not res.flagged and res.findings == []


def test_skin_edge_keeps_away_from_the_table():
    """A disc 'patient' on a flat table: the outline next to the table is left out."""
    n = 140
    yy, xx = np.indices((n, n), dtype=float)
    img = np.full((n, n), -1000.0)
    img[np.hypot(yy - 60, xx - 70) < 45] = 0.0
    img[108:114, 10:130] = 300.0  # table below the body
    img = np.asarray(__import__("scipy").ndimage.gaussian_filter(img, 1.2))
    st = np.repeat(img[None], 6, axis=0) + np.random.default_rng(2).normal(0, 5, (6, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, 1.0, 1.0))
    regions = find_regions(vol)
    assert regions.table.any()
    m = ttf.skin_edge_ttf(vol, regions, {"table_clearance_mm": 8.0})
    assert m is not None and m.record["kind"] == "skin"
    assert m.record["contrast_hu"] == pytest.approx(1000, rel=0.05)
    assert m.record["f50_per_mm"] == pytest.approx(0.18739 / 1.2, rel=0.08)


# ------------------------------------------------------------------ sampled skin edge, accumulated ESF
def test_accumulated_esf_equals_one_binning_of_all_pixels():
    """Batches added to an EsfAccumulator (masked pixels, out-of-range and NaN values
    left out) give the same ESF as bin_esf of the kept pixels at once."""
    from reconaudit.checker.analyses._edges import EsfAccumulator

    rng = np.random.default_rng(3)
    d = [rng.uniform(-3, 3, 500) for _ in range(3)]
    v = [rng.normal(0, 10, 500) for _ in range(3)]
    v[1][:7] = np.nan
    masks = [rng.random(500) < 0.7 for _ in range(3)]
    acc = EsfAccumulator(bin_mm=0.05, lo_mm=-2.0, hi_mm=2.0)
    for di, vi, mi in zip(d, v, masks):
        acc.add(di, vi, mi)
    got = acc.binned()
    ref = bin_esf(np.concatenate([di[mi] for di, mi in zip(d, masks)]),
                  np.concatenate([vi[mi] for vi, mi in zip(v, masks)]), bin_mm=0.05, lo_mm=-2.0, hi_mm=2.0)
    assert np.array_equal(got.counts, ref.counts)
    np.testing.assert_allclose(got.esf_hu, ref.esf_hu, rtol=1e-12, atol=1e-9)
    assert got.counts.sum() < sum(int(m.sum()) for m in masks)  # the range and NaN cut some


def _skin_phantom(nz=6, n=150, px=0.8, s=0.8, seed=1):
    yy, xx = np.indices((n, n), dtype=float)
    r = np.hypot((yy - n / 2 - 0.2) * px, (xx - n / 2 + 0.4) * px)
    img = -1000.0 + 1000.0 * stats.ncx2.cdf((50.0 / s) ** 2, 2, (r / s) ** 2)
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(seed).normal(0, 10.0, (nz, n, n))
    return Volume.from_array(st.astype(np.float32), (1.0, px, px))


def test_skin_edge_is_reproducible_and_counts_its_normals():
    """The outline subset is seeded by the slice index: two runs give the same record;
    every slice contributes at most skin_normals_per_slice outline points."""
    vol = _skin_phantom(nz=8)
    regions = find_regions(vol)
    a = ttf.skin_edge_ttf(vol, regions, {"skin_normals_per_slice": 64}).record
    b = ttf.skin_edge_ttf(vol, regions, {"skin_normals_per_slice": 64}).record
    assert a == b
    assert 0 < a["outline_points"] <= 64 * vol.shape[0]
    assert a["reliable"], a["reason"]
    assert a["f50_per_mm"] == pytest.approx(0.18739 / 0.8, rel=0.05)


def test_too_few_skin_pixels_per_bin_is_unreliable():
    """A handful of normals cannot fill the oversampled ESF: the edge is measured but
    marked unreliable, naming the count."""
    vol = _skin_phantom(nz=1)
    m = ttf.skin_edge_ttf(vol, find_regions(vol), {"skin_normals_per_slice": 24, "skin_min_per_bin": 20})
    assert m is not None and not m.record["reliable"]
    assert "per ESF bin" in m.record["reason"]


def test_unblurred_step_is_unreliable_above_nyquist():
    """A perfect step (no blur) has no TTF crossing of 0.5 below the Nyquist frequency;
    the edge is never reported as reliable (common practice, no source)."""
    n = 120
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 60.3, xx - 59.6) <= 40, 0.0, -1000.0)
    st = np.repeat(img[None], 8, axis=0) + np.random.default_rng(0).normal(0, 5, (8, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, 0.7, 0.7))
    m = ttf.skin_edge_ttf(vol, find_regions(vol), {})
    assert m is not None and not m.record["reliable"]
    assert "Nyquist" in m.record["reason"]


def test_rod_centre_follows_a_tilted_rod():
    """A rod tilted across 24 slices (centre moving 0.1 px per slice): the centre line
    fitted through runs of slices puts the overlay point at the middle of the rod, and
    the TTF stays that of the blur (analytic ncx2 profile)."""
    n, nz, s = 96, 24, 0.6
    yy, xx = np.indices((n, n), dtype=float)
    slices = []
    for k in range(nz):
        r = np.hypot((yy - 48.2 - 0.1 * k) * PX, (xx - 47.7 + 0.05 * k) * PX)
        slices.append(100.0 * stats.ncx2.cdf((6.0 / s) ** 2, 2, (r / s) ** 2))
    vol = Volume.from_array(np.stack(slices).astype(np.float32), (1.0, PX, PX))
    res = run(vol, centres_zyx_vox=[[12, 49, 47]], radius_mm=6.0)
    (e,) = res.record["edges"]
    (p,) = res.overlays.points
    assert p.zyx_vox[1] == pytest.approx(48.2 + 0.1 * 11.5, abs=0.05)
    assert p.zyx_vox[2] == pytest.approx(47.7 - 0.05 * 11.5, abs=0.05)
    assert e["f50_per_mm"] == pytest.approx(0.18739 / s, rel=0.02)


# ------------------------------------------------------------------ slices pooled before binning
def test_pooled_slices_bin_as_slice_by_slice_about_the_group_centre():
    """Pixels of slices pooled (summed) before binning, each sum counted with its slice
    count, give the same ESF bins as binning every slice's pixels about the same centre;
    groups never span centres further apart than the pooling tolerance."""
    from reconaudit.checker.analyses._edges import EsfAccumulator

    rng = np.random.default_rng(7)
    crop = rng.normal(0, 50, (12, 40, 40)).astype(np.float32)
    centres = [(20.3 + 0.004 * k, 19.6 - 0.003 * k) for k in range(6)] + [(21.0, 19.0)] * 6
    pool = ttf._pool_slices(crop, centres, (PX, PX), 0.1)
    assert pool.n_slices.sum() == 12 and pool.n_slices.size >= 2
    c = np.asarray(centres)
    for g in range(pool.starts.size):
        part = c[pool.slices(g)]
        assert np.hypot(*(part[:, None] - part[None]).transpose(2, 0, 1)).max() <= ttf.POOL_TOLERANCE_BINS * 0.1
    pooled = EsfAccumulator(bin_mm=0.05, lo_mm=2.0, hi_mm=9.0)
    single = EsfAccumulator(bin_mm=0.05, lo_mm=2.0, hi_mm=9.0)
    for g in range(pool.starts.size):
        pooled.add(pool.dist[g], pool.sums[g], multiplicity=np.full(pool.dist[g].shape, pool.n_slices[g]))
        block = crop[pool.slices(g)]
        single.add(np.broadcast_to(pool.dist[g], block.shape), block)
    a, b = pooled.binned(), single.binned()
    assert np.array_equal(a.counts, b.counts)
    np.testing.assert_allclose(a.esf_hu, b.esf_hu, rtol=1e-9, atol=1e-6)


def test_strided_insert_screen_finds_what_full_resolution_finds(monkeypatch):
    """The insert screen on every second row and column only says where to look: the
    inserts (centre, radius, slices) equal those of a screen at full resolution."""
    n, nz = 160, 6
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 80, xx - 80) <= 70, 0.0, -1000.0)
    for k, hu in enumerate((-1000.0, 120.0, 340.0, 900.0)):
        a = 2 * math.pi * k / 4 + 0.4
        img[np.hypot(yy - 80 - 38 * math.sin(a), xx - 80 - 38 * math.cos(a)) <= 12.0] = hu
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(2).normal(0, 5, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, PX, PX))
    regions = find_regions(vol)
    assert ttf._screen_factor(PX, ttf.DEFAULTS["min_insert_diameter_mm"]) == 2
    strided = ttf.find_rod_inserts(vol, regions)
    monkeypatch.setattr(ttf, "_screen_factor", lambda px, d: 1)
    full = ttf.find_rod_inserts(vol, regions)
    assert len(strided) == len(full) == 4
    for a, b in zip(strided, full):
        _assert_same_insert(a, b)


def _assert_same_insert(a, b):
    """Two inserts with the same slices, centre and radius (to 1e-9)."""
    assert (a.z0, a.z1) == (b.z0, b.z1)
    assert a.centre_yx_vox == pytest.approx(b.centre_yx_vox, abs=1e-9)
    assert a.radius_mm == pytest.approx(b.radius_mm, abs=1e-9)


# ------------------------------------------------------------------ one binning for the centred range
def test_binned_range_is_the_binning_of_those_bins_alone():
    """A range of an accumulator's bins gives the ESF an accumulator of those bins alone
    gives (same counts, same means, same positions relative to its offset), and one
    multiplicity for all pixels counts as that multiplicity given pixel by pixel."""
    from reconaudit.checker.analyses._edges import EsfAccumulator

    rng = np.random.default_rng(11)
    d, v = rng.uniform(-3.0, 3.0, 4000), rng.normal(0.0, 10.0, 4000)
    wide = EsfAccumulator(bin_mm=0.05, lo_mm=-3.0, hi_mm=3.0)
    wide.add(d, v, multiplicity=3)
    part = wide.binned_range(20, 40, offset_mm=-0.5)  # bins of -2.0 .. 0.0 mm, as -1.5 .. 0.5
    alone = EsfAccumulator(bin_mm=0.05, lo_mm=-1.5, hi_mm=0.5)
    alone.add(d + 0.5, v, multiplicity=np.full(d.shape, 3))
    ref = alone.binned()
    assert np.array_equal(part.counts, ref.counts) and part.counts.sum() > 0
    np.testing.assert_allclose(part.position_mm, ref.position_mm, atol=1e-12)
    np.testing.assert_allclose(part.esf_hu, ref.esf_hu, rtol=1e-12, atol=1e-9)
    with pytest.raises(ValueError):
        wide.binned_range(100, 40)


@pytest.mark.parametrize("offset_mm", [-0.9, -0.35, 0.0, 0.4, 1.1])
def test_one_binning_centres_the_range_on_the_edge(offset_mm):
    """The rod's ESF comes from one binning whose range is moved by whole bins: however
    far (up to half the range) the first radius is from the edge, the range ends up
    centred on the blurred disc's edge to half a bin, and the radius matches the 50 %
    crossing of the analytic profile (ncx2, as the reference tests) to 0.02 mm: the same
    precision as re-binning about each new radius (case: 12 mm rod, s = 0.6 mm, noiseless)."""
    from reconaudit.checker.analyses._edges import esf_shape

    vol, (cy, cx) = disc_stack(nz=4)
    radius_true = 6.0
    # 50 % crossing of the blurred disc's radial profile: P(ncx2(2, (r/s)^2) <= (R/s)^2) = 1/2
    from scipy.optimize import brentq

    r50 = brentq(lambda r: stats.ncx2.cdf((radius_true / 0.6) ** 2, 2, (r / 0.6) ** 2) - 0.5, 4.0, 8.0)
    crop = vol.hu[:, :, :].astype(np.float64)
    pool = ttf._pool_slices(crop, [(cy, cx)] * 4, (PX, PX), 0.1)
    free = np.ones(crop.shape[1:], dtype=bool)
    half = 5.0
    esf, radius = ttf._centred_esf(pool, free, radius_true + offset_mm, half, PX * 0.1)
    assert abs(esf_shape(esf).centre_mm) <= 0.5 * PX * 0.1 + 0.02
    assert radius == pytest.approx(r50, abs=0.02)
    assert esf.position_mm[0] == pytest.approx(-half + 0.5 * PX * 0.1, abs=1e-9)


def _one_by_one(monkeypatch):
    """Make find_rod_inserts look at each screen component on its own crop (the
    single-component path) instead of all of a run's at once."""
    def each(hu, zs, candidates, median_hu, centre, radius, mid, px, s, window=None):
        return [ttf._insert_at_full_resolution(hu, zs, at, sign, median_hu, centre, radius, mid, px, s, window=window)
                for at, sign in candidates]
    monkeypatch.setattr(ttf, "_inserts_at_full_resolution", each)


@pytest.mark.parametrize("near_border", [False, True])
def test_inserts_of_a_run_at_once_equal_one_by_one(monkeypatch, near_border):
    """The screen components of a run thresholded, labelled and disc-tested together (one
    smoothing, one labelling, one hole filling) give the inserts the one-component-at-a-
    time path gives: same centres, radii and slices (case: four rods of -1000..+900 HU in
    a water disc, one rod 10 px from the image border when ``near_border``)."""
    n, nz = 150, 6
    yy, xx = np.indices((n, n), dtype=float)
    c = 75.0 if not near_border else 68.0
    img = np.where(np.hypot(yy - c, xx - c) <= 66, 0.0, -1000.0)
    for k, hu in enumerate((-1000.0, 120.0, 340.0, 900.0)):
        a = 2 * math.pi * k / 4 + 0.4
        img[np.hypot(yy - c - 44 * math.sin(a) - 0.3, xx - c - 44 * math.cos(a) + 0.2) <= 11.5 - k] = hu
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(4).normal(0, 5, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, PX, PX))
    regions = find_regions(vol)
    together = ttf.find_rod_inserts(vol, regions)
    _one_by_one(monkeypatch)
    alone = ttf.find_rod_inserts(vol, regions)
    assert len(together) == len(alone) == 4
    for a, b in zip(together, alone):
        _assert_same_insert(a, b)
        np.testing.assert_array_equal(a.pixels[3], b.pixels[3])


def test_centres_of_several_stacks_refined_together_equal_each_alone():
    """Run images of several rods (own starts, radii, CT numbers; one stack of a
    constant image that cannot be refined) iterated together reach each image's own
    fixed point: the centre refine_circle_centre gives each image alone, to 1e-9 px."""
    from reconaudit.checker.analyses._edges import refine_circle_centre, refine_circle_centres_of_stacks

    stacks, starts, radii, ins, outs, reaches = [], [], [], [], [], []
    for k, (hu, r_mm, cy, cx) in enumerate([(900.0, 6.0, 40.3, 39.6), (-1000.0, 4.0, 41.1, 38.2), (120.0, 9.0, 39.4, 40.8)]):
        vol, _ = disc_stack(n=80, nz=3, radius_mm=r_mm, contrast=hu, noise=8.0, seed=k, cy=cy, cx=cx)
        stacks.append(vol.hu.astype(np.float64))
        starts.append((round(cy) + 0.4, round(cx) - 0.3))
        radii.append(r_mm / PX)
        ins.append(hu)
        outs.append(0.0)
        reaches.append(min(3.0 / PX, 0.5 * r_mm / PX + 1))
    stacks.append(np.zeros((2, 80, 80)))
    starts.append((40.0, 40.0))
    radii.append(10.0)
    ins.append(0.0)
    outs.append(0.0)
    reaches.append(3.0)
    together = refine_circle_centres_of_stacks(stacks, starts, radii, ins, outs, reaches)
    for j in range(len(stacks)):
        alone = [refine_circle_centre(image, starts[j], radii[j], ins[j], outs[j], reach_px=reaches[j])
                 for image in stacks[j]]
        np.testing.assert_allclose(together[j], np.array(alone, dtype=float), atol=1e-9, rtol=0)
    assert np.abs(together[0] - np.array([40.3, 39.6])).max() < 0.05  # the disc's centre, not the start


def test_body_footprint_equals_the_union_over_the_rods_slices():
    """The pixels a rod's ESF may use are those inside the body on some slice of the
    rods' slices: reading only the middle slice for a crop wholly inside the body there
    gives the same mask as the union over every slice (case: a body that shrinks along
    z so that one rod's crop leaves it on the middle slice)."""
    from reconaudit.checker.regions import Regions

    nz, n = 9, 120
    hu = np.zeros((nz, n, n), dtype=np.float32)
    vol = Volume.from_array(hu, (1.0, PX, PX))
    yy, xx = np.indices((n, n))
    body = np.stack([np.hypot(yy - 60, xx - 60) <= 55 - 3 * k for k in range(nz)])
    regions = Regions(fov=np.ones((n, n), dtype=bool), body=body, table=np.zeros_like(body),
                      air=~body, fov_center_yx_vox=(60.0, 60.0), fov_radius_vox=60.0, fov_is_circle=True,
                      body_centroid_zyx_vox=(4.0, 60.0, 60.0))
    inserts = [ttf.Insert(1, 7, (60.0, 60.0), 5.0, "auto"), ttf.Insert(1, 7, (60.0, 22.0), 5.0, "auto")]
    got = ttf._body_footprint(vol, regions, inserts, ttf.DEFAULTS)
    want = np.zeros((n, n), dtype=bool)
    for ins in inserts:
        half = ins.radius_mm / PX + min(ttf.DEFAULTS["esf_half_range_mm"], 0.9 * ins.radius_mm) / PX + 3
        box = ttf._box_about(ins.centre_yx_vox, half, (n, n))[1]
        want[box] |= body[1:8, box[0], box[1]].any(axis=0)
    np.testing.assert_array_equal(got, want)
    assert want.any() and not want.all()
    box = ttf._box_about((60.0, 22.0), 5.0 / PX + 4.5 / PX + 3, (n, n))[1]
    assert not body[4][box].all() and not want[box].all()  # the second crop leaves the body


def test_centroids_and_radii_are_those_of_disc_stats():
    """The first disc measure of the insert test (centroid and equal-area radius only)
    equals disc_stats on random masks, an empty one included."""
    from reconaudit.checker.analyses._phantom import disc_stats

    rng = np.random.default_rng(5)
    masks = rng.random((6, 31, 27)) < 0.3
    masks[2] = False
    cy, cx, r = ttf._centroids_and_radii(masks)
    ry, rx, rr, _ = disc_stats(masks)
    np.testing.assert_array_equal(np.isnan(cy), np.isnan(ry))
    np.testing.assert_allclose(cy[~np.isnan(cy)], ry[~np.isnan(ry)], rtol=0, atol=1e-12)
    np.testing.assert_allclose(cx[~np.isnan(cx)], rx[~np.isnan(rx)], rtol=0, atol=1e-12)
    np.testing.assert_allclose(r, rr, rtol=0, atol=1e-12)


def test_phantom_search_copy_runs_on_the_working_grid_of_the_whole_volume():
    """The decimated phantom search (more than 256 pixels a side) takes every
    ``work_pixel_mm`` / pixel-th pixel, the grid ``find_phantom`` itself strides the
    whole volume with, and finds what a copy of half that step finds: the same slices
    with inserts and the same centres, radii and medians (case: a 300 x 300 x 24 water
    disc of 0.45 mm pixels, a +340 HU rod on the first 8 slices; grid step 4)."""
    from reconaudit.checker.analyses import _phantom

    n, nz, px = 300, 24, 0.45
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 150, xx - 150) <= 120, 0.0, -1000.0)
    rods = img.copy()
    rods[np.hypot(yy - 150, xx - 200) <= 14] = 340.0
    st = np.stack([rods if z < 8 else img for z in range(nz)]) + np.random.default_rng(5).normal(0, 5, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (2.5, px, px))
    regions = find_regions(vol)
    _phantom._LAST.clear()
    phantom, factor, step = ttf._phantom_of(vol, regions)
    assert factor == _phantom._grid_step(px, _phantom.PHANTOM_DEFAULTS["work_pixel_mm"]) == 4
    assert step == 2 and phantom.found
    assert np.array_equal(np.flatnonzero(phantom.inserts), [0, 1, 2, 3])  # slices 0, 2, 4, 6 of the 24
    orig = ttf._grid_step
    try:  # the copy of the previous rule: half the step, strided again inside the search
        ttf._grid_step = lambda p, w: 1
        _phantom._LAST.clear()
        finer, f2, step2 = ttf._phantom_of(vol, regions)
    finally:
        ttf._grid_step = orig
    assert (f2, step2) == (2, 2)
    np.testing.assert_array_equal(phantom.inserts, finer.inserts)
    np.testing.assert_allclose(phantom.centre_yx_vox * factor, finer.centre_yx_vox * f2, atol=1e-9)
    np.testing.assert_allclose(phantom.radius_vox * factor, finer.radius_vox * f2, atol=1e-9)
    np.testing.assert_allclose(phantom.median_hu, finer.median_hu, atol=1e-9)


@pytest.mark.parametrize("noise, seed", [(0.0, 0), (15.0, 0), (15.0, 1), (15.0, 2)])
def test_box_screen_finds_the_small_faint_inserts_the_gaussian_screen_finds(monkeypatch, noise, seed):
    """Sensitivity of the box-mean insert screen (:func:`ttf._screen_smoothed`): the
    small, faint inserts are found exactly as with the 1 mm Gaussian screen it replaces
    (the same inserts: centres, radii and slices). Case: a 70 mm water disc of 0.5 mm
    pixels with four rods of 6.5 and 8 mm diameter at +/-60 HU (the default
    ``min_contrast_hu`` is 40 HU), blurred by 0.6 mm, 12 slices; without noise all four
    are found, with 15 HU white noise per slice both screens find the same (3 or 4)."""
    from scipy import ndimage

    n, nz = 160, 12
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 80, xx - 80) <= 70, 0.0, -1000.0)
    for k, (hu, d_mm) in enumerate(((60.0, 6.5), (-60.0, 6.5), (60.0, 8.0), (-60.0, 8.0))):
        a = 2 * math.pi * k / 4 + 0.3
        img[np.hypot(yy - 80 - 40 * math.sin(a), xx - 80 - 40 * math.cos(a)) <= 0.5 * d_mm / PX] = hu
    img = ndimage.gaussian_filter(img, 0.6 / PX)
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(seed).normal(0, noise, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, PX, PX))
    regions = find_regions(vol)
    boxed = ttf.find_rod_inserts(vol, regions)
    monkeypatch.setattr(ttf, "_screen_smoothed", lambda image, p: ndimage.gaussian_filter(image, 1.0 / p))
    gaussian = ttf.find_rod_inserts(vol, regions)
    assert len(boxed) == len(gaussian) >= (4 if noise == 0 else 3)
    for a, b in zip(boxed, gaussian):
        assert (a.z0, a.z1) == (b.z0, b.z1) == (0, nz - 1)
        assert a.centre_yx_vox == pytest.approx(b.centre_yx_vox, abs=1e-9)
        assert a.radius_mm == pytest.approx(b.radius_mm, abs=1e-9)


def _groups_of_pooling(monkeypatch) -> list:
    """Record the number of pooled groups of every rod measured."""
    groups: list = []
    pool_slices = ttf._pool_slices

    def counted(*args, **kwargs):
        pool = pool_slices(*args, **kwargs)
        groups.append(int(pool.starts.size))
        return pool

    monkeypatch.setattr(ttf, "_pool_slices", counted)
    return groups


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_noisy_tilted_rod_keeps_its_tilt(monkeypatch, seed):
    """The significance rule of the centre line (:func:`ttf._tilt_is_significant`) keeps
    a real tilt in noise: a rod moving 0.1 px per slice over 24 slices with 10 HU noise
    (contrast 100 HU) is measured along its tilted line (its slices are not pooled about
    one centre), its overlay point sits at the rod's middle and its f50 is that of the
    blur within 5 % (Gaussian MTF, analytic: f50 = 0.18739 / s)."""
    n, nz, s = 96, 24, 0.6
    yy, xx = np.indices((n, n), dtype=float)
    rng = np.random.default_rng(seed)
    slices = []
    for k in range(nz):
        r = np.hypot((yy - 48.2 - 0.1 * k) * PX, (xx - 47.7 + 0.05 * k) * PX)
        slices.append(100.0 * stats.ncx2.cdf((6.0 / s) ** 2, 2, (r / s) ** 2) + rng.normal(0, 10.0, (n, n)))
    vol = Volume.from_array(np.stack(slices).astype(np.float32), (1.0, PX, PX))
    groups = _groups_of_pooling(monkeypatch)
    res = run(vol, centres_zyx_vox=[[12, 49, 47]], radius_mm=6.0)
    (e,) = res.record["edges"]
    (p,) = res.overlays.points
    assert groups[0] > 3
    assert p.zyx_vox[1] == pytest.approx(48.2 + 0.1 * 11.5, abs=0.05)
    assert p.zyx_vox[2] == pytest.approx(47.7 - 0.05 * 11.5, abs=0.05)
    assert e["f50_per_mm"] == pytest.approx(0.18739 / s, rel=0.05)


def test_tilt_significance_of_run_centres():
    """A tilt far beyond the scatter of the run centres is significant, one within it is
    not, and a noiseless line (zero residuals) is significant however small its tilt."""
    z = np.array([6.5, 19.5, 32.5])
    w = np.array([14.0, 13.0, 13.0])
    straight = np.array([[30.01, 29.99], [29.98, 30.02], [30.01, 30.0]])
    tilted = np.array([[30.0, 30.0], [31.3, 29.35], [32.6, 28.7]]) + straight - 30.0
    noiseless = np.array([[30.0, 30.0], [30.001, 30.0], [30.002, 30.0]])
    assert not ttf._tilt_is_significant(z, straight, w)
    assert ttf._tilt_is_significant(z, tilted, w)
    assert ttf._tilt_is_significant(z, noiseless, w)


def test_decimated_phantom_search_keeps_the_shared_full_volume_answer():
    """The decimated phantom search of the TTF analysis leaves the full-volume answer
    that the noise analyses share (``find_phantom``'s cache) in place, and finds the same
    phantom as before (case: a 300 x 300 x 24 water disc with a +340 HU rod)."""
    from reconaudit.checker.analyses import _phantom

    n, nz, px = 300, 24, 0.45
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 150, xx - 150) <= 120, 0.0, -1000.0)
    img[np.hypot(yy - 150, xx - 200) <= 14] = 340.0
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(6).normal(0, 5, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (2.5, px, px))
    regions = find_regions(vol)
    _phantom._LAST.clear()
    shared = _phantom.find_phantom(vol, regions)
    entry = _phantom._LAST["entry"]
    phantom, factor, step = ttf._phantom_of(vol, regions)
    assert (factor, step) == (4, 2)
    assert _phantom._LAST["entry"] is entry
    assert _phantom.find_phantom(vol, regions) is shared
    assert phantom.found and phantom.inserts.all()
    np.testing.assert_allclose(phantom.centre_yx_vox * factor, shared.centre_yx_vox[::step], atol=0.5)


def test_runs_of_slices_split_as_array_split():
    """The runs a rod's slices are split into for its centre line are those of
    ``np.array_split`` (the first ones one slice longer when the count does not divide)."""
    for nz in range(1, 50):
        for k in range(1, min(nz, 5) + 1):
            ours, numpy_runs = ttf._split_runs(nz, k), np.array_split(np.arange(nz), k)
            assert len(ours) == len(numpy_runs) == k
            for a, b in zip(ours, numpy_runs):
                np.testing.assert_array_equal(a, b)


# ------------------------------------------------------------------ one insert per rod
def test_each_rod_is_found_once_when_its_slices_fall_into_several_runs():
    """Four 20 mm rods of +80 HU in water with 10 HU noise: the phantom search marks the
    rods' slices patchily (several runs of insert slices), and each run used to find
    every rod again with the same slices (8 inserts for 4 rods). One insert per rod,
    each at its own rod (case invented, common practice, no source)."""
    n, nz, r_px = 200, 10, 20.0
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 100, xx - 100) <= 90, 0.0, -1000.0)
    centres = []
    for k in range(4):
        a = 2 * math.pi * k / 4 + 0.4
        cy, cx = 100 + 50 * math.sin(a), 100 + 50 * math.cos(a)
        centres.append((cy, cx))
        img[np.hypot(yy - cy, xx - cx) <= r_px] = 80.0
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(2).normal(0, 10.0, (nz, n, n))
    vol = Volume.from_array(st.astype(np.float32), (1.0, 0.5, 0.5))
    found = ttf.find_rod_inserts(vol, find_regions(vol))
    assert len(found) == 4, [(f.z0, f.z1, f.centre_yx_vox) for f in found]
    for cy, cx in centres:
        near = [f for f in found if math.hypot(f.centre_yx_vox[0] - cy, f.centre_yx_vox[1] - cx) < 2.0]
        assert len(near) == 1


def test_distinct_inserts_keeps_separate_rods_and_separate_slices():
    """Overlapping slices and near centres: one rod (the longer kept); far centres or
    disjoint slices: two."""
    a = ttf.Insert(0, 9, (50.0, 50.0), 10.0, "auto")
    b = ttf.Insert(2, 9, (50.5, 49.8), 9.7, "auto")
    c = ttf.Insert(0, 9, (90.0, 50.0), 10.0, "auto")
    d = ttf.Insert(12, 20, (50.0, 50.0), 10.0, "auto")
    kept = ttf.distinct_inserts([b, a, c, d], 0.5)
    assert a in kept and b not in kept and c in kept and d in kept and len(kept) == 3


# ------------------------------------------------------------------ rods measured together
def _mixed_rod_phantom(nz=10, n=256, noise=12.0, seed=3):
    """Invented water disc with six rods of different radii (3.9..9 mm) and contrasts,
    two of them too faint for their noise (contrast-to-noise below 10)."""
    yy, xx = np.indices((n, n), dtype=float)
    c = n / 2 - 0.3
    img = np.where(np.hypot(yy - c, xx - c) <= 110, 0.0, -1000.0)
    for k, (hu, r_mm) in enumerate([(-1000.0, 7.0), (900.0, 5.0), (120.0, 9.0), (340.0, 4.0), (45.0, 8.0),
                                    (-100.0, 6.5)]):
        a = 2 * math.pi * k / 6 + 0.3
        cy, cx = c + 65 * math.sin(a) + 0.17 * k, c + 65 * math.cos(a) - 0.11 * k
        img[np.hypot(yy - cy, xx - cx) <= r_mm / PX] = hu
    from scipy import ndimage

    img = ndimage.gaussian_filter(img, 0.7 / PX)
    st = img[None] + np.random.default_rng(seed).normal(0, noise, (nz, n, n))
    return Volume.from_array(st.astype(np.float32), (1.0, PX, PX))


#: Decimals each rounded number of a rod's record keeps (ttf._edge_record).
_RECORD_DECIMALS = {"contrast_hu": 1, "insert_hu": 1, "noise_hu": 2, "contrast_to_noise": 2, "f50_per_mm": 4,
                    "f10_per_mm": 4, "frequency_per_mm": 4, "ttf": 4, "center_mm": 3, "bin_mm": 5,
                    "lsf_window_mm": 3, "radius_mm": 3}


def _mixed_rod_centres(nz=10, n=256):
    """[z, y, x] of the six rods of :func:`_mixed_rod_phantom` (its middle slice)."""
    c = n / 2 - 0.3
    return [[nz // 2, c + 65 * math.sin(2 * math.pi * k / 6 + 0.3) + 0.17 * k,
             c + 65 * math.cos(2 * math.pi * k / 6 + 0.3) - 0.11 * k] for k in range(6)]


def _assert_same_records(together, alone):
    """Each rod's record measured together equals its record measured alone: the same
    texts, flags and slices, every number the same up to float rounding (at most one
    unit of its last rounded decimal), the same overlay point and notes."""
    assert len(together) == len(alone)
    for a, b in zip(together, alone):
        assert a.record.keys() == b.record.keys()
        for key, value in a.record.items():
            if key in _RECORD_DECIMALS:
                x = np.array(value if isinstance(value, list) else [value], dtype=float)
                y = np.array(b.record[key] if isinstance(b.record[key], list) else [b.record[key]], dtype=float)
                assert x.shape == y.shape, key
                assert np.array_equal(np.isnan(x), np.isnan(y)), key
                np.testing.assert_allclose(x, y, rtol=0, atol=1.01 * 10.0 ** -_RECORD_DECIMALS[key], err_msg=key)
            else:
                assert value == b.record[key], key
        assert a.point_zyx_vox == pytest.approx(b.point_zyx_vox, abs=1e-6)
        assert a.notes == b.notes


def test_rods_measured_together_equal_each_rod_measured_alone():
    """The rods of a phantom measured together (one binning of all their pixels, their
    ESFs of different lengths conditioned and transformed as the rows of 2-D arrays)
    give each rod the record it gets measured alone (case: six rods of 4..9 mm radius,
    -1000..+900 HU, found automatically; two of them unreliable, contrast-to-noise
    below 10)."""
    vol = _mixed_rod_phantom()
    regions = find_regions(vol)
    inserts = ttf.find_rod_inserts(vol, regions)
    assert len(inserts) == 6
    s = ttf.resolve_settings({})
    allowed = ttf._body_footprint(vol, regions, inserts, s)
    together = ttf.measure_circular_edges(vol, inserts, s, allowed=allowed, others=inserts)
    alone = [ttf.measure_circular_edge(vol, ins, s, allowed=allowed, others=inserts) for ins in inserts]
    radii = [m.record["radius_mm"] for m in together]
    assert max(radii) - min(radii) > 4.0  # ESF ranges of their own lengths (0.9 r below 8 mm)
    reliable = [m.record["reliable"] for m in together]
    assert reliable.count(False) == 2 and all("contrast-to-noise" in m.record["reason"]
                                              for m in together if not m.record["reliable"])
    _assert_same_records(together, alone)


def test_user_rods_measured_together_equal_each_alone_when_some_ranges_stay():
    """User centres with a radius of 4 mm given for rods of 4..9 mm: the ESF range of a
    rod whose edge lies more than half the range from 4 mm stays where it was (radius
    4.0 in the record), the others move onto their edges; measured together, each rod
    still gets the record it gets alone."""
    vol = _mixed_rod_phantom()
    s = ttf.resolve_settings({"centres_zyx_vox": _mixed_rod_centres(), "radius_mm": 4.0})
    inserts = ttf._user_inserts(vol, s)
    together = ttf.measure_circular_edges(vol, inserts, s, allowed=None, others=inserts)
    alone = [ttf.measure_circular_edge(vol, ins, s, allowed=None, others=inserts) for ins in inserts]
    radii = [m.record["radius_mm"] for m in together]
    assert 4.0 in radii and any(abs(r - 4.0) > 0.2 for r in radii)  # ranges kept and ranges moved
    _assert_same_records(together, alone)


def _esfs_of_several_kinds():
    """Invented ESFs of one bin width and different lengths: rising and falling edges in
    noise, an overshoot, a flat one (no crossing), one whose edge lies near the end of its
    range (window limited), one with empty bins."""
    rng = np.random.default_rng(5)
    bin_mm = 0.045
    out = []
    for n, kind in [(235, "rising"), (234, "falling"), (236, "over"), (200, "flat"), (235, "near_end"),
                    (221, "rising"), (180, "over")]:
        pos = -0.5 * n * bin_mm + (np.arange(n) + 0.5) * bin_mm
        if kind == "rising":
            y = 100 * stats.norm.cdf(pos / 0.5) + rng.normal(0, 3, n)
        elif kind == "falling":
            y = -900 * stats.norm.cdf(pos / 0.4) + rng.normal(0, 2, n)
        elif kind == "over":
            y = 100 * stats.norm.cdf(pos / 0.5) + 30 * np.exp(-(((pos - 0.8) / 0.3) ** 2))
        elif kind == "flat":
            y = np.full(n, 5.0)
        else:
            y = 100 * stats.norm.cdf((pos - 0.35 * n * bin_mm) / 0.3)
        out.append(BinnedEsf(pos, y, rng.integers(5, 40, n), bin_mm))
    return out


def test_rows_of_several_esfs_are_each_esf_alone():
    """Shapes, overshoots, conditioning and TTF of ESFs of different lengths stacked as
    rows equal esf_shape, esf_overshoot, condition_esf and ttf_from_esf of each ESF
    alone (to 1e-12: only the order of a few sums over a row may differ), with the same
    notes; the monotone fit is taken where there is no overshoot and the overshoot kept."""
    from reconaudit.checker.analyses import _edges

    esfs = _esfs_of_several_kinds()
    rows = _edges.BinnedEsfs.stack(esfs)
    shapes = _edges.esf_shapes(rows)
    overshoots = _edges.esf_overshoots(rows)
    conditioned, used = _edges.condition_esfs(rows)
    curves = _edges.ttf_from_esfs(conditioned, max_frequency_per_mm=1.0)
    assert used.count("none") == 2 and used.count("monotone") == 5  # the two overshoots kept
    for j, e in enumerate(esfs):
        alone = _edges.BinnedEsf(e.position_mm, e.esf_hu, e.counts, e.bin_mm)
        shape = _edges.esf_shape(alone)
        np.testing.assert_allclose([shapes.low_hu[j], shapes.high_hu[j], shapes.centre_mm[j], shapes.width_10_90_mm[j]],
                                   [shape.low_hu, shape.high_hu, shape.centre_mm, shape.width_10_90_mm],
                                   rtol=1e-12, atol=1e-12)
        assert overshoots[j] == pytest.approx(_edges.esf_overshoot(alone), rel=1e-12, abs=1e-12)
        cond, how = condition_esf(alone)
        assert how == used[j]
        np.testing.assert_allclose(conditioned.row(j).esf_hu, cond.esf_hu, rtol=1e-12, atol=1e-9)
        ref = _edges.ttf_from_esf(cond, max_frequency_per_mm=1.0)
        got = curves[j]
        np.testing.assert_array_equal(got.frequency_per_mm, ref.frequency_per_mm)
        np.testing.assert_allclose(got.ttf, ref.ttf, rtol=1e-12, atol=1e-12)
        for a, b in [(got.f50_per_mm, ref.f50_per_mm), (got.f10_per_mm, ref.f10_per_mm),
                     (got.lsf_window_mm, ref.lsf_window_mm)]:
            assert (math.isnan(a) and math.isnan(b)) or a == pytest.approx(b, rel=1e-12)
        assert got.notes == ref.notes
    flat = [j for j, e in enumerate(esfs) if np.ptp(e.esf_hu) == 0]
    assert flat and all(math.isnan(shapes.centre_mm[j]) and math.isnan(curves[j].f50_per_mm) for j in flat)
    assert any("limited" in n for c in curves for n in c.notes)  # the edge near the end of its range


def test_accumulators_end_to_end_equal_each_alone():
    """Pixels of several accumulators binned with one bincount (EsfAccumulators) give each
    the counts and sums of an EsfAccumulator of its own pixels (masked, out-of-range and
    NaN pixels left out; multiplicities), and their ranges (with offsets, empty bins
    interpolated, rows of different lengths) the ESFs binned_range gives; a range beyond
    an accumulator raises ValueError."""
    from reconaudit.checker.analyses._edges import EsfAccumulator, EsfAccumulators

    rng = np.random.default_rng(9)
    bin_mm = 0.05
    lo, hi = [-3.0, -2.0, -2.5], [3.0, 2.0, 1.0]
    which = rng.integers(0, 3, 3000)
    d = rng.uniform(-3.5, 3.5, 3000) ** 3 / 10  # dense near 0, sparse (empty bins) far out
    v = rng.normal(0, 10, 3000)
    v[:9] = np.nan
    mask = rng.random(3000) < 0.8
    mult = rng.integers(1, 4, 3000).astype(float)
    together = EsfAccumulators(bin_mm=bin_mm, lo_mm=lo, hi_mm=hi)
    together.add(which, d, v, mask, multiplicity=mult)
    alone = []
    for j in range(3):
        acc = EsfAccumulator(bin_mm=bin_mm, lo_mm=lo[j], hi_mm=hi[j])
        sel = which == j
        acc.add(d[sel], v[sel], mask[sel], multiplicity=mult[sel])
        alone.append(acc)
        part = slice(together.first_bin[j], together.first_bin[j] + together.n_bins[j])
        assert np.array_equal(together.counts[part], acc.counts)
        np.testing.assert_allclose(together.sums[part], acc.sums, rtol=1e-12, atol=1e-9)
    starts, lengths, offsets = [10, 5, 0], [100, 60, 70], [0.3, -0.2, 0.0]
    rows = together.binned_ranges(starts, lengths, offsets_mm=offsets)
    assert (rows.counts == 0).any(axis=1).all()  # every row has empty bins (interpolated)
    for j in range(3):
        ref = alone[j].binned_range(starts[j], lengths[j], offset_mm=offsets[j])
        got = rows.row(j)
        assert np.array_equal(got.counts, ref.counts)
        np.testing.assert_allclose(got.position_mm, ref.position_mm, rtol=0, atol=1e-12)
        np.testing.assert_allclose(got.esf_hu, ref.esf_hu, rtol=1e-12, atol=1e-9)
    with pytest.raises(ValueError):
        together.binned_ranges([0, 0, 40], [100, 60, 70])
