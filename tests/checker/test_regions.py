"""Unit tests of the shared regions: FOV from padding, hole filling, centroid, facts."""
from __future__ import annotations

import numpy as np
from scipy import ndimage

from reconaudit.checker.regions import centroid_of, fill_holes_in_plane, find_fov, find_regions
from reconaudit.checker.volume import Volume


def _disc(n, cy, cx, r):
    y, x = np.mgrid[0:n, 0:n]
    return (y - cy) ** 2 + (x - cx) ** 2 <= r * r


def test_fill_holes_in_plane_matches_per_slice_scipy():
    rng = np.random.default_rng(0)
    mask = rng.random((5, 40, 40)) > 0.55
    expected = np.stack([ndimage.binary_fill_holes(m) for m in mask])
    assert np.array_equal(fill_holes_in_plane(mask), expected)


def test_centroid_of_matches_center_of_mass():
    rng = np.random.default_rng(1)
    mask = rng.random((6, 20, 30)) > 0.7
    assert np.allclose(centroid_of(mask), ndimage.center_of_mass(mask))


def test_fov_from_padding_value_and_from_constant_border():
    n = 64
    inside = _disc(n, 31.5, 31.5, 30)
    hu = np.where(inside, -1000.0, -3024.0).astype(np.float32)[None].repeat(3, 0)
    hu += np.random.default_rng(2).normal(0, 5, hu.shape).astype(np.float32) * inside
    fov, is_circle = find_fov(Volume.from_array(hu))
    assert is_circle and np.array_equal(fov, inside)
    hu2 = np.where(inside[None], hu, -1024.0).astype(np.float32)  # constant, above -1500
    fov2, is_circle2 = find_fov(Volume.from_array(hu2))
    assert is_circle2 and np.array_equal(fov2, inside)


def test_regions_of_padding_only_and_of_air_only():
    pad = np.full((2, 32, 32), -3024.0, dtype=np.float32)
    r = find_regions(Volume.from_array(pad))
    assert not r.fov.any() and not r.air.any() and not r.has_body
    air = np.random.default_rng(3).normal(-1000, 10, (2, 32, 32)).astype(np.float32)
    r2 = find_regions(Volume.from_array(air))
    assert r2.air.all() and not r2.has_body and r2.notes


def _ellipse(n, cy, cx, ay, ax):
    y, x = np.mgrid[0:n, 0:n]
    return ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0


def test_body_holes_filled_and_margin_kept():
    """Noise-free air around an elliptical body is air, not padding; holes are body."""
    n = 64
    ring = _ellipse(n, 32, 32, 14, 20) & ~_disc(n, 32, 32, 6)
    hu = np.where(ring, 0.0, -1000.0).astype(np.float32)[None].repeat(4, 0)
    r = find_regions(Volume.from_array(hu, spacing_mm=(1.0, 1.0, 1.0)), margin_mm=3.0)
    assert r.body[:, 32, 32].all()  # the hole is part of the body
    assert r.margin_mm == 3.0
    assert not r.air[:, 32, 32 + 22].any() and r.air[:, 32, 32 + 25].all()
    facts = r.facts()
    assert facts["body_voxels"] == int(r.body.sum()) and facts["air_voxels"] == int(r.air.sum())
