"""Unit tests of the air analysis: bad input, settings, record and overlays, findings."""
from __future__ import annotations

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
