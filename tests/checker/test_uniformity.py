"""Tests of the phantom finder and the uniformity analysis on invented phantoms."""
from __future__ import annotations

import numpy as np
import pytest

from reconaudit.checker.analyses import _phantom, uniformity
from reconaudit.checker.errors import ProfileError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume


def water_cylinder(nz: int = 8, n: int = 160, radius: int = 64, sd: float = 6.0,
                   insert_slices: int = 3, cupping_hu: float = 0.0, offset_hu: float = 0.0,
                   seed: int = 0) -> Volume:
    """An invented water cylinder in air; the first ``insert_slices`` carry a bone rod.

    ``cupping_hu`` raises the edge relative to the centre (a radial quadratic profile).
    """
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n]
    c = n / 2.0
    r2 = (yy - c) ** 2 + (xx - c) ** 2
    img = np.full((n, n), -1000.0)
    disc = r2 <= radius**2
    img[disc] = offset_hu + cupping_hu * r2[disc] / radius**2
    hu = np.repeat(img[None], nz, axis=0)
    for z in range(insert_slices):
        hu[z][(yy - c) ** 2 + (xx - c - 30) ** 2 <= 8**2] = 800.0
    hu += rng.normal(0.0, sd, hu.shape)
    return Volume.from_array(hu, (2.0, 0.8, 0.8))


def test_find_phantom_sees_uniform_and_insert_slices():
    vol = water_cylinder()
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert ph.found
    assert list(np.nonzero(ph.inserts)[0]) == [0, 1, 2]
    assert ph.longest_uniform_run() == (3, 7)
    assert abs(ph.radius_mm - 64 * 0.8) < 1.0
    assert np.allclose(ph.centre_yx_vox[5], (79.5, 79.5), atol=0.5)


def test_find_phantom_rejects_elliptical_body():
    yy, xx = np.mgrid[:160, :160]
    img = np.where(((yy - 80) / 40.0) ** 2 + ((xx - 80) / 70.0) ** 2 <= 1, 0.0, -1000.0)
    vol = Volume.from_array(np.repeat(img[None], 3, axis=0), (2.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert not ph.found and "no water cylinder" in ph.reason


def test_uniform_phantom_passes_with_expected_numbers():
    vol = water_cylinder(sd=6.0)
    res = uniformity.analyse(vol, find_regions(vol))
    rec = res.record
    assert rec["applicable"] and not rec["flagged"]
    assert rec["slices"] == [3, 7]
    assert abs(rec["water_hu"]) < 1.0
    assert rec["uniformity_hu"] < 1.5
    assert abs(rec["centre_sd_hu"] - 6.0) < 0.5
    assert [p["position"] for p in rec["periphery"]] == ["top", "right", "bottom", "left"]
    assert len(res.overlays.rois) == 5
    for roi in res.overlays.rois:  # every ROI inside the phantom, clear of the edge
        corners = np.array([[roi.y0, roi.x0], [roi.y1 - 1, roi.x1 - 1], [roi.y0, roi.x1 - 1], [roi.y1 - 1, roi.x0]])
        assert np.hypot(*(corners - 79.5).T).max() < 64 - 10 / 0.8 + 1


def test_cupping_exceeds_uniformity_tolerance():
    vol = water_cylinder(cupping_hu=15.0)
    rec = uniformity.analyse(vol, find_regions(vol)).record
    assert rec["flagged"] and rec["uniformity_hu"] > 5.0


def test_water_offset_fails_water_tolerance():
    vol = water_cylinder(offset_hu=8.0)
    res = uniformity.analyse(vol, find_regions(vol))
    assert res.record["flagged"]
    assert any("water CT number" in f.message for f in res.findings)


def test_one_slice_volume():
    vol = water_cylinder(nz=1, insert_slices=0)
    rec = uniformity.analyse(vol, find_regions(vol)).record
    assert rec["applicable"] and rec["slices"] == [0, 0]


def test_no_uniform_region_is_not_applicable():
    vol = water_cylinder(nz=3, insert_slices=3)
    rec = uniformity.analyse(vol, find_regions(vol)).record
    assert rec["applicable"] is False and "no uniform region" in rec["reason"]


def test_constant_volume_is_not_applicable():
    vol = Volume.from_array(np.zeros((3, 64, 64)), (1.0, 1.0, 1.0))
    rec = uniformity.analyse(vol, find_regions(vol)).record
    assert rec["applicable"] is False and rec["reason"]


def test_nan_volume_is_not_applicable():
    vol = water_cylinder(nz=3, insert_slices=0)
    vol.hu[1, 10, 10] = np.nan
    rec = uniformity.analyse(vol, find_regions(vol)).record
    assert rec["applicable"] is False and "NaN" in rec["reason"]


def test_small_phantom_roi_does_not_fit():
    vol = water_cylinder(n=64, radius=28, insert_slices=0)
    rec = uniformity.analyse(vol, find_regions(vol), {"roi_size_mm": 20.0}).record
    assert rec["applicable"] is False and "too small" in rec["reason"]


def test_unknown_setting_raises():
    vol = water_cylinder(nz=2, insert_slices=0)
    with pytest.raises(ProfileError):
        uniformity.analyse(vol, find_regions(vol), {"no_such_key": 1})


def test_every_tolerance_has_a_source():
    for key in uniformity.DEFAULTS:
        if key.endswith(("_tolerance", "_max", "_expected")):
            assert key in uniformity.SOURCES


# ------------------------------------------------------- the phantom finder's helpers
def _disc_stats_match_disc_of(masks, slices):
    """disc_stats of the stack equals disc_of on each of ``slices``; returns the stack's values."""
    cy, cx, r, fill = _phantom.disc_stats(masks)
    for z in slices:
        (ey, ex), er, ef = _phantom.disc_of(masks[z])
        assert (cy[z], cx[z], r[z], fill[z]) == pytest.approx((ey, ex, er, ef), rel=1e-12)
    return cy, cx, r, fill


def test_disc_stats_agrees_with_disc_of_slice_by_slice():
    """The stack version gives disc_of's centre, radius and fill on every slice
    (including an empty slice: NaN centre, zero radius and fill)."""
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[:70, :90]
    masks = np.zeros((4, 70, 90), dtype=bool)
    masks[0] = (yy - 30.3) ** 2 + (xx - 41.7) ** 2 <= 20**2
    masks[1] = ((yy - 35) / 12.0) ** 2 + ((xx - 45) / 30.0) ** 2 <= 1
    masks[2] = rng.random((70, 90)) > 0.6
    cy, cx, r, fill = _disc_stats_match_disc_of(masks, range(3))
    assert np.isnan(cy[3]) and np.isnan(cx[3]) and r[3] == 0 and fill[3] == 0


@pytest.mark.parametrize("sigma", [0.3, 0.83, 1.7, 4.0])
def test_smooth_in_plane_equals_scipy_gaussian_filter(sigma):
    """Reference: scipy.ndimage.gaussian_filter with sigma 0 along z (same truncation,
    reflect edges), to float32 rounding."""
    from scipy import ndimage

    stack = np.random.default_rng(4).normal(0, 20, (3, 41, 37)).astype(np.float32)
    ref = ndimage.gaussian_filter(stack, (0, sigma, sigma), truncate=2.5)
    assert np.abs(_phantom.smooth_in_plane(stack, sigma) - ref).max() < 1e-4


def test_medians_of_equals_numpy_median_of_the_subgrid():
    """Reference: numpy.median of the masked values on every step-th row and column."""
    rng = np.random.default_rng(5)
    values = rng.normal(0, 10, (4, 30, 33)).astype(np.float32)
    masks = rng.random((4, 30, 33)) > 0.4
    masks[2] = False
    got = _phantom._medians_of(values, masks, step=2)
    for z in (0, 1, 3):
        sub = values[z, ::2, ::2][masks[z, ::2, ::2]]
        assert got[z] == pytest.approx(float(np.median(sub)), abs=1e-5)
    assert np.isnan(got[2])


def test_count_nonfinite_counts_and_is_shared_per_volume():
    vol = water_cylinder(nz=3, insert_slices=0)
    regions = find_regions(vol)
    assert _phantom.count_nonfinite(vol, regions) == 0
    other = water_cylinder(nz=3, insert_slices=0)
    other.hu[0, 1, 1] = np.inf
    other.hu[2, 3, 4] = np.nan
    assert _phantom.count_nonfinite(other) == 2
    assert _phantom.count_nonfinite(other, find_regions(other)) == 2


def test_thin_insert_on_one_slice_is_seen():
    """Every slice is examined: a bone rod on one slice only marks that slice."""
    vol = water_cylinder(nz=9, insert_slices=0)
    yy, xx = np.mgrid[:160, :160]
    vol.hu[4][(yy - 80) ** 2 + (xx - 110) ** 2 <= 8**2] = 800.0
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert list(np.flatnonzero(ph.inserts)) == [4]
    assert ph.uniform_runs()[0] in ((5, 8), (0, 3))


def test_slices_between_screened_slices_are_measured_near_a_disc():
    """With 1 mm slices the disc test screens every 5th slice; a phantom starting
    between two screened slices is found from its first slice on."""
    yy, xx = np.mgrid[:160, :160]
    disc = np.where((yy - 80) ** 2 + (xx - 80) ** 2 <= 60**2, 0.0, -1000.0)
    ellipse = np.where(((yy - 80) / 30.0) ** 2 + ((xx - 80) / 70.0) ** 2 <= 1, 0.0, -1000.0)
    hu = np.stack([ellipse, ellipse] + [disc] * 7)
    hu += np.random.default_rng(8).normal(0.0, 5.0, hu.shape)
    vol = Volume.from_array(hu, (1.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert list(np.flatnonzero(ph.on_slice)) == list(range(2, 9))


def test_nonfinite_check_covers_every_pixel_of_the_measured_slices():
    """The finite check of nps/uniformity counts NaN and infinities on every pixel of
    the slices the ROIs lie on (air included) and nothing on the other slices."""
    from reconaudit.checker.results import Roi

    vol = water_cylinder(nz=9, insert_slices=0)
    vol.hu[2, 1, 1] = np.nan  # air, on a measured slice
    vol.hu[3, 150, 5] = -np.inf
    vol.hu[7, 80, 80] = np.nan  # a slice no ROI lies on
    rois = [Roi(1, 3, 60, 60, 80, 80, "a"), Roi(2, 4, 90, 90, 110, 110, "b")]
    assert _phantom._slice_runs(rois + [Roi(6, 6, 0, 0, 4, 4, "c")]) == [(1, 4), (6, 6)]
    assert _phantom.count_nonfinite_in_slices(vol, 1, 4) == 2
    assert _phantom.count_nonfinite_in_slices(vol, 4, 6) == 0
    assert _phantom.count_nonfinite_in_slices(vol, 0, 8) == 3
    assert "2 NaN" in _phantom.nonfinite_reason(vol, rois)
    assert _phantom.nonfinite_reason(vol, [Roi(5, 6, 60, 60, 80, 80, "d")]) == ""
    vol.hu[5, 0, 0] = np.nan  # a new array value, same array: a fresh volume is needed
    fresh = Volume.from_array(vol.hu.copy(), vol.spacing_mm)
    assert _phantom.nonfinite_reason(fresh, [Roi(5, 6, 60, 60, 80, 80, "d")]) != ""


def test_smooth_in_plane_on_small_and_one_slice_stacks():
    """Reference: scipy.ndimage.gaussian_filter (reflect edges), also when the kernel
    is wider than the slice (the padding falls back to numpy.pad) and for one slice."""
    from scipy import ndimage

    rng = np.random.default_rng(13)
    for shape, sigma in (((1, 9, 7), 4.0), ((2, 5, 30), 1.2), ((1, 64, 64), 0.83)):
        stack = rng.normal(0, 20, shape).astype(np.float32)
        ref = ndimage.gaussian_filter(stack, (0, sigma, sigma), truncate=2.5)
        got = _phantom.smooth_in_plane(stack, sigma)
        assert got.shape == shape and np.abs(got - ref).max() < 1e-4


def test_finite_inside_looks_only_at_masked_values():
    """A slice passes when every masked value is finite, whatever lies outside the mask."""
    values = np.zeros((4, 6, 6), dtype=np.float32)
    masks = np.zeros((4, 6, 6), dtype=bool)
    masks[:, 2:4, 2:4] = True
    values[1, 0, 0] = np.nan  # outside the mask
    values[2, 3, 3] = np.inf  # inside
    values[3, 2, 2] = np.nan  # inside
    assert list(_phantom._finite_inside(values, masks)) == [True, True, False, False]


def test_block_means_2x2_and_blocks_within_against_direct_sums():
    """Block means of the insert test equal the reshaped means (numpy, exact up to float32
    rounding); a block lies within a mask only when all four pixels do. Odd edges are
    left out."""
    rng = np.random.default_rng(11)
    stack = rng.normal(0.0, 20.0, (3, 9, 7)).astype(np.float32)
    mask = rng.random((3, 9, 7)) > 0.3
    means = _phantom.block_means_2x2(stack)
    expected = stack[:, :8, :6].reshape(3, 4, 2, 3, 2).astype(np.float64).mean(axis=(2, 4))
    assert means.shape == (3, 4, 3) and means.dtype == np.float32
    assert np.allclose(means, expected, atol=1e-4)
    within = _phantom.blocks_within(mask)
    assert np.array_equal(within, mask[:, :8, :6].reshape(3, 4, 2, 3, 2).all(axis=(2, 4)))


@pytest.mark.parametrize("f", [1, 2, 3, 4, 8])
def test_strided_masks_equal_numpy_slicing(f):
    """The strided copies of masks (one word per kept pixel when the step is 2, 4 or 8)
    equal numpy's own slicing, for runs, evenly spaced and scattered slices and boxes
    (numpy as the reference)."""
    rng = np.random.default_rng(f)
    mask = rng.random((12, 40, 48)) > 0.5
    rows, cols = slice(3, 37), slice(8, 40)
    for zs in (None, np.arange(2, 9), np.arange(0, 12, 3), np.array([0, 1, 5, 7, 8, 11])):
        z = slice(None) if zs is None else zs
        got = _phantom._strided(mask, f, rows, cols, zs)
        assert got.dtype == bool and got.flags.c_contiguous
        assert np.array_equal(got, mask[z][:, rows.start : rows.stop : f, cols.start : cols.stop : f])
        assert np.array_equal(_phantom._strided(mask, f, zs=zs), mask[z][:, ::f, ::f])


def _discs(radii: list[float], n: int = 160, centre: float = 80.0, sd: float = 5.0, seed: int = 9) -> np.ndarray:
    """Slices of water discs of the given radii (0: air only) in air, with noise."""
    yy, xx = np.mgrid[:n, :n]
    r2 = (yy - centre) ** 2 + (xx - centre) ** 2
    hu = np.stack([np.where(r2 <= r * r, 0.0, -1000.0) if r > 0 else np.full((n, n), -1000.0) for r in radii])
    return hu + np.random.default_rng(seed).normal(0.0, sd, hu.shape)


def test_slices_between_agreeing_screened_slices_are_not_taken_on_trust():
    """Sensitivity of the filled-in slices (between two screened slices showing the same
    disc, 5 slices apart at 1 mm): two slices of the same outline filled with a plastic of
    300 HU there are not water phantom slices, and a rod on one slice there marks that
    slice as having an insert (the water and insert tests still look at every slice)."""
    hu = _discs([60.0] * 11)
    hu[2:4][hu[2:4] > -500.0] += 300.0  # a solid plastic module on two slices
    yy, xx = np.mgrid[:160, :160]
    hu[7][(yy - 80) ** 2 + (xx - 110) ** 2 <= 8**2] = 800.0  # a rod on one slice
    vol = Volume.from_array(hu, (1.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert list(np.flatnonzero(ph.on_slice)) == [0, 1, 4, 5, 6, 7, 8, 9, 10]
    assert list(np.flatnonzero(ph.inserts)) == [7]


def test_a_change_of_disc_between_screened_slices_is_measured_slice_by_slice():
    """Two phantom modules of different radius (60 and 45 px) meeting between two
    screened slices: the slices between are measured, each slice gets its own radius
    (within a working pixel of 2.4 mm here), and a 6 px centre shift between modules is
    followed."""
    hu = _discs([60.0] * 7 + [45.0] * 6)
    vol = Volume.from_array(hu, (1.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert ph.on_slice.all()
    assert np.all(np.abs(ph.radius_vox[:7] - 60.0) < 3.0) and np.all(np.abs(ph.radius_vox[7:] - 45.0) < 3.0)
    shifted = np.concatenate([_discs([60.0] * 7, centre=80.0), _discs([60.0] * 6, centre=86.0, seed=4)])
    vol = Volume.from_array(shifted, (1.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert ph.on_slice.all()
    assert np.all(np.abs(ph.centre_yx_vox[:7] - 80.0) < 1.5) and np.all(np.abs(ph.centre_yx_vox[7:] - 86.0) < 1.5)


def test_slice_counts_kept_per_slice_equal_direct_counts_in_any_order():
    """The finite check keeps each slice's count: ranges asked for in any order, nested
    or overlapping, give numpy's own count of non-finite voxels (the reference)."""
    rng = np.random.default_rng(17)
    hu = rng.normal(0.0, 10.0, (12, 24, 24)).astype(np.float32)
    for _ in range(9):
        hu[rng.integers(12), rng.integers(24), rng.integers(24)] = rng.choice([np.nan, np.inf, -np.inf])
    vol = Volume.from_array(hu, (1.0, 1.0, 1.0))
    for z0, z1 in ((3, 5), (0, 11), (4, 9), (7, 7), (0, 2), (10, 20), (5, 3)):
        expected = int(np.count_nonzero(~np.isfinite(hu[max(z0, 0) : z1 + 1]))) if z1 >= z0 else 0
        assert _phantom.count_nonfinite_in_slices(vol, z0, z1) == expected, (z0, z1)


def test_inner_discs_made_where_needed_equal_the_whole_masks():
    """The inner discs made per grid (every pixel, every 4th row and column, 2 x 2
    blocks) equal those cut from the whole stack of masks (:func:`_phantom._inner_discs`,
    and :func:`_phantom.blocks_within` of it as the reference); slices whose body was
    not measured count as all body."""
    rng = np.random.default_rng(23)
    nz, n = 6, 41
    body = rng.random((nz, n, n)) > 0.1
    measured = np.array([True, False, True, True, False, True])
    cy, cx = rng.uniform(18, 22, nz), rng.uniform(17, 23, nz)
    radius = rng.uniform(12, 17, nz)
    as_body = body.copy()
    as_body[~measured] = True
    ref, box = _phantom._inner_discs(as_body, cy, cx, radius)
    discs = _phantom._InnerDiscs(body, measured, cy, cx, radius)
    assert discs.box == box
    assert np.array_equal(discs.full(np.arange(nz)), ref)
    assert np.array_equal(discs.full(np.array([1, 3])), ref[[1, 3]])
    assert np.array_equal(discs.every(4), ref[:, ::4, ::4])
    assert np.array_equal(discs.blocks(), _phantom.blocks_within(ref))
    keep = np.array([True, True, False, True, False, False])
    assert np.array_equal(discs.take(keep).blocks(), _phantom.blocks_within(ref[keep]))
    values = rng.normal(0, 5, ref.shape).astype(np.float32)
    values[~ref] = np.nan  # non-finite outside the discs only: every slice passes
    values[2][ref[2]] = np.inf  # inside on slice 2
    assert list(_phantom._finite_in_discs(values, discs)) == [True, True, False, True, True, True]


def test_grid_reads_in_pieces_equal_one_copy_of_the_grid():
    """The water and insert tests' reads of the working grid, taken a few slices at a
    time, equal numpy's slicing of one copy of the grid (the reference): every fourth
    row and column, the 2 x 2 block means and each slice's finite sum (odd sizes, runs,
    evenly spaced and scattered slices)."""
    rng = np.random.default_rng(29)
    hu = rng.normal(0.0, 20.0, (21, 70, 66)).astype(np.float32)
    rows, cols = slice(3, 61), slice(5, 64)
    for zs in (np.arange(21), np.arange(1, 20, 2), np.array([0, 2, 3, 9, 10, 11, 17, 20])):
        sums, every4, blocks = _phantom._grid_reads(hu, 3, rows, cols, zs)
        grid = hu[zs][:, rows.start : rows.stop : 3, cols.start : cols.stop : 3]
        assert np.array_equal(every4, grid[:, ::4, ::4])
        assert np.array_equal(blocks, _phantom.block_means_2x2(grid))
        assert np.allclose(sums, grid.astype(np.float64).sum(axis=(1, 2)), rtol=1e-4, atol=1e-2)


def test_a_non_finite_pixel_inside_the_disc_drops_only_its_slice():
    """A NaN inside the inner disc of one slice of a long series (on the working grid,
    every second pixel here) makes that slice no phantom slice; a NaN or infinity in
    the air beside the phantom changes nothing (pixel by pixel check of the slices whose
    sum is not finite)."""
    hu = _discs([60.0] * 12)
    hu[4, 80, 84] = np.nan  # inside the disc
    hu[7, 30, 30] = np.nan  # in the air, on the grid inside the box read about the discs
    hu[9, 150, 150] = np.inf
    vol = Volume.from_array(hu, (2.0, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert list(np.flatnonzero(~ph.on_slice)) == [4]


def test_sixteen_middle_slices_keep_the_numbers_and_the_flags():
    """Sensitivity of the 16-slice default (``max_slices``) on a 40-slice uniform run:
    the ROIs span its 16 middle slices; water CT number, uniformity and centre SD lie
    within 0.4 HU of those from 32 slices (a tenth of the 4 and 5 HU tolerances); a
    water offset of 5 HU and a cupping of 12 HU at the edge (some 6.5 HU between the
    centre and peripheral ROIs) are still flagged, plain water is not."""
    for seed in range(3):
        vol = water_cylinder(nz=40, insert_slices=0, sd=10.0, seed=seed)
        regions = find_regions(vol)
        rec = uniformity.analyse(vol, regions).record
        wide = uniformity.analyse(vol, regions, {"max_slices": 32}).record
        assert rec["slices"] == [11, 26] and wide["slices"] == [3, 34]
        for key in ("water_hu", "uniformity_hu", "centre_sd_hu"):
            assert abs(rec[key] - wide[key]) < 0.4, (key, rec[key], wide[key])
        assert not rec["flagged"]
    offset = water_cylinder(nz=40, insert_slices=0, sd=10.0, offset_hu=5.0)
    assert uniformity.analyse(offset, find_regions(offset)).record["flagged"]
    cupped = water_cylinder(nz=40, insert_slices=0, sd=10.0, cupping_hu=12.0)
    rec = uniformity.analyse(cupped, find_regions(cupped)).record
    assert rec["flagged"] and rec["uniformity_hu"] > 5.0


def test_insert_test_with_the_noise_scale_only_where_needed_equals_the_direct_rule():
    """The insert test takes the noise scale (MAD) only on slices with an inner
    deviation above ``insert_contrast_hu``; the answer must equal the rule applied to
    every slice directly (scipy Gaussian, numpy median, ndimage labels): plain water,
    a 45 HU rod in quiet water (an insert), the same rod in noisy water whose 5 x MAD
    threshold is above 45 HU (not an insert), a 400 HU rod in that noisy water (an
    insert), and a slice with no inner pixel."""
    from scipy import ndimage

    rng = np.random.default_rng(21)
    n, pixel_mm = 40, 1.0
    yy, xx = np.mgrid[:n, :n]
    inner = np.broadcast_to((yy - 19.5) ** 2 + (xx - 19.5) ** 2 <= 17**2, (5, n, n)).copy()
    inner[4] = False
    rod = (yy - 12) ** 2 + (xx - 24) ** 2 <= 3**2
    stack = rng.normal(0.0, 2.0, (5, n, n))
    stack[2] = rng.normal(0.0, 90.0, (n, n))
    stack[3] = rng.normal(0.0, 90.0, (n, n))
    stack[1][rod] += 45.0
    stack[2][rod] += 45.0
    stack[3][rod] += 400.0
    stack = stack.astype(np.float32)
    s = dict(_phantom.PHANTOM_DEFAULTS)
    median = np.array([np.median(stack[z][inner[z]]) if inner[z].any() else np.nan for z in range(5)])
    got = _phantom._insert_slices(stack, inner, median, pixel_mm, s)
    blocks = _phantom.block_means_2x2(stack)
    block_inner = _phantom.blocks_within(inner)
    expected = []
    for z in range(5):
        dev = np.abs(ndimage.gaussian_filter(blocks[z], s["smooth_mm"] / (2 * pixel_mm), truncate=2.5) - median[z])
        sub = block_inner[z, ::2, ::2]
        mad = 1.4826 * np.median(dev[::2, ::2][sub]) if sub.any() else np.nan
        above = (dev > max(s["insert_contrast_hu"], 5.0 * mad)) & block_inner[z]
        lab, count = ndimage.label(above)
        largest = np.bincount(lab.ravel())[1:].max() if count else 0
        expected.append(largest * (2 * pixel_mm) ** 2 >= s["min_insert_mm2"])
    assert list(got) == expected, (list(got), expected)
    assert expected == [False, True, False, True, False], expected


# ------------------------------------------------------------------ insert test: clipped level and scale
def _rod_phantom(noise_hu: float, rod_hu: float = 80.0, rod_radius_px: float = 20.0, seed: int = 2,
                 n: int = 200, nz: int = 10) -> Volume:
    """Water cylinder (radius 45 mm at 0.5 mm pixels) with four rods at 25 mm from its
    axis, Gaussian noise (invented case)."""
    yy, xx = np.indices((n, n), dtype=float)
    img = np.where(np.hypot(yy - 100, xx - 100) <= 90, 0.0, -1000.0)
    for k in range(4 if rod_hu else 0):
        a = 2 * np.pi * k / 4 + 0.4
        img[np.hypot(yy - 100 - 50 * np.sin(a), xx - 100 - 50 * np.cos(a)) <= rod_radius_px] = rod_hu
    st = np.repeat(img[None], nz, axis=0) + np.random.default_rng(seed).normal(0, noise_hu, (nz, n, n))
    return Volume.from_array(st.astype(np.float32), (1.0, 0.5, 0.5))


def test_large_faint_rods_in_noise_are_inserts():
    """Four 20 mm rods of +80 HU cover over a quarter of the inner disc: a plain median
    and MAD of the disc were pulled and widened by them until the 5-scale threshold
    reached their contrast (no slice had inserts at 20 HU noise). With the clipped
    level and scale every slice has inserts, and the edge analysis finds the 4 rods."""
    from reconaudit.checker.analyses import ttf

    vol = _rod_phantom(20.0)
    regions = find_regions(vol)
    ph = _phantom.find_phantom(vol, regions)
    assert ph.found and ph.inserts.all() and not ph.uniform.any()
    assert len(ttf.find_rod_inserts(vol, regions)) == 4


@pytest.mark.parametrize("noise_hu", [5.0, 20.0, 40.0])
def test_uniform_water_has_no_inserts_with_the_clipped_scale(noise_hu):
    """Pure water at several noise levels, three seeds: no slice has an insert (the
    clipped scale of pure noise is that of the plain MAD to about 1 %)."""
    for seed in range(3):
        vol = _rod_phantom(noise_hu, rod_hu=0.0, seed=seed, nz=8)
        ph = _phantom.find_phantom(vol, find_regions(vol))
        assert ph.found and not ph.inserts.any() and ph.uniform.all(), (noise_hu, seed)


def test_clipped_level_and_scale_of_pure_noise_and_of_a_mixture():
    """Gaussian noise of SD 10 (256 samples a slice): the clipped level and scale equal
    the plain median and MAD of the same samples to 0.1 HU and 1 %; with a quarter of
    the pixels at +80 HU the plain median moves by over 3 HU and the plain scale by over
    40 %, the clipped ones stay within 1.5 HU of 0 and 15 % of 10 (the MAD's consistency
    factor 1.4826: Rousseeuw & Croux 1993)."""
    rng = np.random.default_rng(5)
    noise = rng.normal(0.0, 10.0, (3, 80, 80)).astype(np.float32)
    inner = np.ones(noise.shape, dtype=bool)
    step = _phantom.clip_sample_step(inner)
    assert step == 5

    def plain(values):
        level = _phantom._medians_of(values, inner, step=step)
        return level, _phantom._medians_of(np.abs(values - level[:, None, None].astype(np.float32)), inner, step=step) * 1.4826

    level, scale = _phantom.clipped_level_and_scale(noise, inner)
    plain_level, plain_scale = plain(noise)
    assert np.all(np.abs(level - plain_level) < 0.1) and np.all(np.abs(scale / plain_scale - 1.0) < 0.01)
    mixed = noise.copy()
    mixed[:, :40, :40] += 80.0
    plain_level, plain_scale = plain(mixed)
    level, scale = _phantom.clipped_level_and_scale(mixed, inner)
    assert np.all(plain_level > 3.0) and np.all(plain_scale > 14.0)
    assert np.all(np.abs(level) < 1.5) and np.all(np.abs(scale / 10.0 - 1.0) < 0.15)


def test_last_true_index_of_whole_word_rows_equals_the_reversed_search():
    """The last True of each row, found on rows reversed word by word (widths that are a
    whole number of 8-byte words) or on the reversed view (other widths), equals numpy's
    search of the reversed rows (the reference), rows with none and full rows included;
    disc_stats on such masks still gives disc_of's numbers slice by slice."""
    rng = np.random.default_rng(17)
    for nx in (8, 64, 72, 90, 128):
        masks = rng.random((5, 9, nx)) > 0.9
        masks[0, 0] = False
        masks[1, 2] = True
        masks[2, 3] = False
        masks[2, 3, nx - 1] = True
        masks[3, 4] = False
        masks[3, 4, 0] = True
        expected = nx - 1 - np.argmax(masks[:, :, ::-1], axis=2)
        got = _phantom._last_true_index(masks)
        assert np.array_equal(got, expected), nx
        assert got[2, 3] == nx - 1 and got[3, 4] == 0
    yy, xx = np.mgrid[:96, :128]
    masks = np.zeros((3, 96, 128), dtype=bool)
    masks[0] = (yy - 47.2) ** 2 + (xx - 70.9) ** 2 <= 30**2
    masks[1] = ((yy - 40) / 20.0) ** 2 + ((xx - 60) / 50.0) ** 2 <= 1
    masks[2] = rng.random((96, 128)) > 0.7
    fill = _disc_stats_match_disc_of(masks, range(3))[3]
    assert fill[1] < 0.6 < fill[0]  # the ellipse is told from the disc


def test_disc_stats_of_runs_of_equal_slices_equals_disc_of_on_each():
    """disc_stats computes each run of equal slices once (a cylinder's masks repeat); the
    numbers of every slice still equal disc_of on that slice (the reference): runs at
    the start, middle and end, single slices between them, an empty slice in a run,
    widths that are and are not a whole number of 8-byte words."""
    rng = np.random.default_rng(23)
    for nx in (64, 90):
        yy, xx = np.mgrid[:60, :nx]
        disc = (yy - 28.4) ** 2 + (xx - nx / 2.0) ** 2 <= 22**2
        ellipse = ((yy - 30) / 12.0) ** 2 + ((xx - nx / 2.0) / 28.0) ** 2 <= 1
        masks = np.stack([disc, disc, disc, ellipse, disc, rng.random((60, nx)) > 0.5, disc, disc,
                          np.zeros_like(disc), np.zeros_like(disc), ellipse, ellipse])
        assert list(_phantom._first_of_equal_runs(masks)) == [0, 3, 4, 5, 6, 8, 10]
        cy, cx, r, fill = _disc_stats_match_disc_of(masks, [0, 1, 2, 3, 4, 5, 6, 7, 10, 11])
        assert np.isnan(cy[8:10]).all() and (r[8:10] == 0).all() and (fill[8:10] == 0).all()
        assert fill[3] < 0.7 < fill[1]
        moved = masks.copy()
        moved[1, 5, 5] = True  # one pixel differs: slice 1 is its own run
        assert list(_phantom._first_of_equal_runs(moved)) == [0, 1, 2, 3, 4, 5, 6, 8, 10]
        _disc_stats_match_disc_of(moved, range(8))


def test_medians_of_by_partition_equal_the_median_of_the_sorted_values():
    """With few distinct counts of masked values per slice, the medians come from one
    partition per count; they equal numpy.median of the masked values (the reference:
    the mean of the two middle values, in double) on stacks with one count (a disc
    repeated), two counts, odd and even counts, ties, infinities among the values and
    slices with no masked value; with a NaN among the values, or many distinct counts,
    the sorted path is taken and the NaN slice has the median of the sorted values
    (NaN sorted last, after the +inf filling)."""
    rng = np.random.default_rng(31)
    yy, xx = np.mgrid[:24, :26]
    disc = (yy - 11.5) ** 2 + (xx - 12.2) ** 2 <= 9**2
    cases = {
        "one count": np.broadcast_to(disc, (6, 24, 26)).copy(),
        "two counts": np.stack([disc, disc, disc & (xx > 3), disc, disc & (xx > 3), disc]),
        "with empty": np.stack([disc, np.zeros_like(disc), disc]),
        "many counts": rng.random((9, 24, 26)) < 0.5,
    }
    for name, masks in cases.items():
        for rounded in (False, True):
            values = rng.normal(0, 10, masks.shape).astype(np.float32)
            if rounded:
                values = np.round(values / 4.0)  # many ties
            values[0, 11, 12] = np.inf
            values[-1, 11, 13] = -np.inf
            got = _phantom._medians_of(values, masks, step=1)
            for z in range(masks.shape[0]):
                sub = values[z][masks[z]]
                expected = np.median(sub.astype(np.float64)) if sub.size else np.nan
                assert np.array_equal(got[z], expected, equal_nan=True), (name, rounded, z, got[z], expected)
    masks = np.broadcast_to(disc, (3, 24, 26)).copy()
    values = rng.normal(0, 10, masks.shape).astype(np.float32)
    values[1, 11, 12] = np.nan
    got = _phantom._medians_of(values, masks, step=1)
    for z in range(3):
        row = np.sort(np.where(masks[z], values[z], np.float32(np.inf)).ravel())
        c = int(masks[z].sum())
        expected = 0.5 * (float(row[(c - 1) // 2]) + float(row[c // 2]))
        assert got[z] == expected, (z, got[z], expected)
    assert got[0] == np.median(values[0][masks[0]].astype(np.float64))


def test_grid_reads_in_several_pieces_equal_one_piece(monkeypatch):
    """The grid read a few slices at a time (the piece size cut to one, then three
    slices) gives the values of one read of the whole grid: sums, every fourth row and
    column, block means."""
    rng = np.random.default_rng(37)
    hu = rng.normal(0.0, 20.0, (13, 61, 58)).astype(np.float32)
    rows, cols = slice(2, 59), slice(4, 57)
    zs = np.array([0, 1, 2, 5, 6, 7, 8, 12])
    monkeypatch.setattr(_phantom, "_READ_BYTES", 1 << 30)
    whole = _phantom._grid_reads(hu, 2, rows, cols, zs)
    per_slice = 4 * len(range(2, 59, 2)) * len(range(4, 57, 2))
    for slices in (1, 3):
        monkeypatch.setattr(_phantom, "_READ_BYTES", slices * per_slice)
        pieces = _phantom._grid_reads(hu, 2, rows, cols, zs)
        for a, b in zip(whole, pieces):
            assert np.array_equal(a, b)


# ------------------------------------------------------------------ search sensitivity
def _bandpass_noise(shape, sd: float, seed: int) -> np.ndarray:
    """FBP-like band-pass noise (difference of two in-plane Gaussians of white noise)
    scaled to standard deviation ``sd`` (invented)."""
    from scipy import ndimage

    w = np.random.default_rng(seed).standard_normal(shape).astype(np.float32)
    noise = ndimage.gaussian_filter(w, (0, 0.8, 0.8)) - ndimage.gaussian_filter(w, (0, 2.5, 2.5))
    return noise * np.float32(sd / noise.std())


def _off_centre_phantom(nz: int = 24, centre=(110.0, 150.0), radius: float = 70.0,
                        rods: bool = True) -> Volume:
    """An invented 56 mm water cylinder off the image centre (256 px of 0.8 mm, 1.25 mm
    slices, band-pass noise of 15 HU); with ``rods``: a 10 mm rod of +120 HU on slices
    5-8, an 8 mm air hole on slice 15 and a 9.6 mm bone rod on the last slice."""
    n = 256
    yy, xx = np.mgrid[:n, :n]
    cy, cx = centre
    img = np.where((yy - cy) ** 2 + (xx - cx) ** 2 <= radius**2, 0.0, -1000.0)
    hu = np.repeat(img[None], nz, axis=0).astype(np.float32)

    def rod(z: int, dy: float, dx: float, r: float, value: float) -> None:
        hu[z][(yy - cy - dy) ** 2 + (xx - cx - dx) ** 2 <= r * r] = value

    if rods:
        for z in range(5, 9):
            rod(z, -30, 20, 6.25, 120.0)
        rod(15, 25, -25, 5.0, -1000.0)
        rod(nz - 1, 0, 35, 6.0, 800.0)
    hu += _bandpass_noise(hu.shape, 15.0, seed=41)
    return Volume.from_array(hu, (1.25, 0.8, 0.8))


def test_search_finds_exactly_the_insert_slices_of_an_off_centre_phantom():
    """Sensitivity of the search: an off-centre phantom with inserts on some slices only
    (a faint rod over four slices, an air hole and a bone rod on one slice each, one of
    them the last slice) has exactly those insert slices; every other slice is uniform;
    the centre and radius are those drawn (within a pixel)."""
    vol = _off_centre_phantom()
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert ph.found and ph.on_slice.all()
    assert list(np.flatnonzero(ph.inserts)) == [5, 6, 7, 8, 15, 23]
    assert ph.uniform_runs() == [(16, 22), (9, 14), (0, 4)]
    assert np.all(np.abs(ph.centre_yx_vox - (110.0, 150.0)) < 1.0)
    assert np.all(np.abs(ph.radius_vox - 70.0) < 1.0)
    clean = _off_centre_phantom(rods=False)
    ph = _phantom.find_phantom(clean, find_regions(clean))
    assert ph.uniform.all() and not ph.inserts.any()


@pytest.mark.parametrize("keep", [(4, 5), (4,)])
def test_search_short_uniform_section_is_measured_on_its_slices(keep):
    """A phantom whose uniform section is two slices or one (a +300 HU rod on every
    other slice): the search finds exactly that section, and the noise and uniformity
    analyses measure on its slices only (5 ROIs a slice fit this 56 mm phantom)."""
    from reconaudit.checker.analyses import nps

    vol = _off_centre_phantom(nz=10, centre=(128.0, 128.0), rods=False)
    yy, xx = np.mgrid[:256, :256]
    for z in range(10):
        if z not in keep:
            vol.hu[z][(yy - 100) ** 2 + (xx - 150) ** 2 <= 7**2] = 300.0
    regions = find_regions(vol)
    ph = _phantom.find_phantom(vol, regions)
    assert list(np.flatnonzero(ph.uniform)) == list(keep)
    assert list(np.flatnonzero(ph.inserts)) == [z for z in range(10) if z not in keep]
    rec = nps.analyse(vol, regions).record
    assert rec["applicable"] and rec["roi_count"] == 5 * len(keep)
    rec = uniformity.analyse(vol, regions).record
    assert rec["applicable"] and rec["slices"] == [keep[0], keep[-1]]


def test_search_patient_like_torso_has_no_phantom():
    """An invented torso (elliptical body with a fat rim, two lungs, a spine) is no water
    cylinder on any slice."""
    rng = np.random.default_rng(2)
    ny, nx = 200, 280
    yy, xx = np.mgrid[:ny, :nx]
    img = np.full((ny, nx), -1000.0)
    img[((yy - 100) / 85.0) ** 2 + ((xx - 140) / 125.0) ** 2 <= 1] = -100.0
    img[((yy - 100) / 78.0) ** 2 + ((xx - 140) / 118.0) ** 2 <= 1] = 40.0
    for side in (-55, 55):
        img[((yy - 90) / 45.0) ** 2 + ((xx - 140 - side) / 35.0) ** 2 <= 1] = -850.0
    img[(yy - 160) ** 2 + (xx - 140) ** 2 <= 12**2] = 700.0
    vol = Volume.from_array((img[None] + rng.normal(0, 12, (6, ny, nx))).astype(np.float32), (2.5, 0.8, 0.8))
    ph = _phantom.find_phantom(vol, find_regions(vol))
    assert not ph.found and not ph.on_slice.any() and "no water cylinder" in ph.reason


def _round_object(shell_hu: float, shell_mm: float, inside_hu: float, sd: float, aspect: float = 1.1,
                  rod_hu: float | None = None, nz: int = 6, n: int = 256, px: float = 0.9, seed: int = 4) -> Volume:
    """An invented round object in air: an ellipse (``aspect`` of its axes) of 82 mm mean
    radius with a shell of ``shell_mm`` at ``shell_hu`` around ``inside_hu``; optionally a
    rod of ``rod_hu`` touching the shell."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:n, :n]
    a = 82.0 * np.sqrt(aspect)
    rho = np.hypot((yy - n / 2) * px * aspect / a, (xx - n / 2) * px / a)  # 1 on the outer edge
    img = np.full((n, n), -1000.0)
    img[rho <= 1.0] = shell_hu
    img[rho <= 1.0 - shell_mm / 82.0] = inside_hu
    if rod_hu is not None:
        img[np.hypot((yy - n / 2) * px, (xx - n / 2) * px - 62.0) <= 8.0] = rod_hu
    hu = np.repeat(img[None], nz, axis=0) + rng.normal(0.0, sd, (nz, n, n))
    return Volume.from_array(hu.astype(np.float32), (2.5, px, px))


def test_a_round_head_is_not_taken_for_a_water_phantom():
    """A round head (brain +35 HU inside the water window, a 7 mm skull of +1000 HU; from
    memory) passes the disc and water tests but not the shell test: no phantom, and the
    noise is measured as in patient images, on soft tissue."""
    from reconaudit.checker.analyses import nps

    head = _round_object(shell_hu=1000.0, shell_mm=7.0, inside_hu=35.0, sd=8.0)
    regions = find_regions(head)
    ph = _phantom.find_phantom(head, regions)
    assert not ph.found and "bone-like shell" in ph.reason
    rec = nps.analyse(head, regions).record
    assert rec["applicable"] is True and rec["method"] == "patient"
    assert abs(rec["noise_hu"] - 8.0) < 1.5


@pytest.mark.parametrize("sd", [6.0, 40.0])
def test_a_water_phantom_with_a_plastic_wall_and_a_bone_rod_by_it_is_still_a_phantom(sd):
    """A 5 mm acrylic-like wall (+120 HU, from memory) and a +900 HU rod touching it,
    at low and at high noise: the shell test leaves the phantom as it was found."""
    vol = _round_object(shell_hu=120.0, shell_mm=5.0, inside_hu=0.0, sd=sd, aspect=1.0, rod_hu=900.0)
    regions = find_regions(vol)
    ph = _phantom.find_phantom(vol, regions)
    assert ph.found and ph.on_slice.all()
    level = _phantom.shell_level_hu(vol.hu, np.flatnonzero(ph.on_slice), ph.centre_yx_vox, ph.radius_vox)
    assert level < 0.6 * _phantom.PHANTOM_DEFAULTS["dense_shell_hu"]
