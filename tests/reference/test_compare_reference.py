"""Checks of the reference comparison on phantoms with a known truth.

The truths are built in: a body wall moved by a known distance, a lesion inserted in
one image only. Geometry (distances in mm) is analytic; the statistics of two
independent noise realisations follow from the Gaussian noise model.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from reconaudit.checker.analyses.compare import compare_volumes
from reconaudit.checker.volume import Volume

SPACING = (2.5, 1.0, 1.0)
SHAPE = (14, 160, 160)


def _body(shift_mm: float = 0.0) -> np.ndarray:
    """An elliptical body (semi-axes 60 x 45 mm); its anterior wall (small row index)
    moved outward by ``shift_mm`` between columns 60 and 100."""
    z, y, x = np.mgrid[0:SHAPE[0], 0:SHAPE[1], 0:SHAPE[2]].astype(float)
    cy, cx = 80.0, 80.0
    inside = ((x - cx) / 60.0) ** 2 + ((y - cy) / 45.0) ** 2 <= 1.0
    if shift_mm:
        moved = ((x - cx) / 60.0) ** 2 + ((y + shift_mm - cy) / 45.0) ** 2 <= 1.0
        part = (x >= 60) & (x <= 100) & (y < cy)
        inside = inside | (moved & part)
    return inside


def _image(body: np.ndarray, seed: int, lesion: bool = False) -> Volume:
    rng = np.random.default_rng(seed)
    hu = np.where(body, 40.0, -1000.0)
    if lesion:
        z, y, x = np.mgrid[0:SHAPE[0], 0:SHAPE[1], 0:SHAPE[2]].astype(float)
        r = np.sqrt(((z - 7) * SPACING[0]) ** 2 + (y - 95) ** 2 + (x - 70) ** 2)
        hu = hu + 40.0 * (r <= 5.0)  # 10 mm diameter, +40 HU
    noise = ndimage.gaussian_filter(rng.normal(0, 1, SHAPE), (0, 0.8, 0.8))
    noise *= 15.0 / noise.std()
    return Volume.from_array((hu + noise).astype(np.float32), SPACING, (-80.0, -80.0, 0.0))


def test_displaced_anterior_wall_is_measured_at_the_right_place():
    """A wall moved outward by 10 mm: max shift 10 +/- 1.5 mm, located on the moved part."""
    ref = _image(_body(0.0), seed=1)
    test = _image(_body(10.0), seed=2)
    res = compare_volumes(test, ref, {"measure_nps_ttf": False})
    shift = res.record["body_surface_shift_mm"]
    assert abs(shift["max"] - 10.0) <= 1.5, shift
    z, y, x = shift["max_at_zyx_vox"]
    assert 60 <= x <= 100 and y < 80 - 30, shift  # on the anterior, moved part
    assert any("displaced" in f.message for f in res.findings)


def test_lesion_only_in_reference_is_found_within_3mm():
    """A 10 mm, +40 HU lesion present only in the reference is reported as a loss."""
    ref = _image(_body(), seed=3, lesion=True)
    test = _image(_body(), seed=4)
    res = compare_volumes(test, ref, {"measure_nps_ttf": False})
    lost = res.record["only_in_reference"]
    assert len(lost) == 1, res.record
    truth = ref.index_to_patient([7, 95, 70])
    assert np.linalg.norm(np.array(lost[0]["centroid_mm"]) - truth) <= 3.0
    assert res.record["only_in_test"] == []


def test_structure_only_in_test_is_found():
    ref = _image(_body(), seed=5)
    test = _image(_body(), seed=6, lesion=True)
    res = compare_volumes(test, ref, {"measure_nps_ttf": False})
    assert len(res.record["only_in_test"]) == 1
    assert res.record["only_in_reference"] == []


@pytest.mark.parametrize("seeds", [(7, 8), (9, 10)])
def test_two_noise_realisations_of_one_object_give_nothing(seeds):
    ref = _image(_body(), seed=seeds[0])
    test = _image(_body(), seed=seeds[1])
    res = compare_volumes(test, ref, {"measure_nps_ttf": False})
    assert res.record["only_in_test"] == [] and res.record["only_in_reference"] == []
    assert abs(res.record["body_surface_shift_mm"]["max"]) <= 1.5
    assert res.findings == []


def test_different_grids_are_resampled_and_offset_reported():
    ref = _image(_body(), seed=11)
    test = _image(_body(), seed=12)
    coarse = Volume(hu=test.hu[:, ::2, ::2].copy(), spacing_mm=(2.5, 2.0, 2.0),
                    affine=np.diag([1.0, 1.0, 1.0, 1.0]) @ test.affine @ np.diag([1.0, 2.0, 2.0, 1.0]))
    res = compare_volumes(coarse, ref, {"measure_nps_ttf": False})
    assert res.record["notes"] and "resampled" in res.record["notes"][0]
    assert max(abs(v) for v in res.record["rigid_offset_mm"]) < 1.5
