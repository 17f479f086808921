"""Tests of the non-DICOM readers: NIfTI, MHA/MHD, NRRD (SimpleITK) and .npy + JSON."""
from __future__ import annotations

import json

import numpy as np
import pytest
import SimpleITK as sitk

from reconaudit.checker.errors import InconsistentGeometryError, InvalidVolumeError, NotMonochromeError, TooLargeError, UnreadableFileError
from reconaudit.checker.load import discover, load_path, load_series


def _image(shape_zyx=(3, 5, 7)) -> sitk.Image:
    arr = np.arange(np.prod(shape_zyx), dtype=np.int16).reshape(shape_zyx) - 1000
    img = sitk.GetImageFromArray(arr)
    img.SetSpacing((0.8, 0.6, 2.5))  # x, y, z
    img.SetOrigin((-40.0, 25.0, 310.0))
    c, s = np.cos(0.3), np.sin(0.3)
    img.SetDirection((c, -s, 0.0, s, c, 0.0, 0.0, 0.0, 1.0))
    return img


@pytest.mark.parametrize("name", ["vol.nii.gz", "vol.nii", "vol.mha", "vol.mhd", "vol.nrrd"])
def test_sitk_formats_give_zyx_hu_and_lps_affine(tmp_path, name):
    img = _image()
    sitk.WriteImage(img, str(tmp_path / name))
    found = discover([tmp_path])
    assert [s.kind for s in found.series] == ["image"] and not found.problems  # .raw of .mhd is skipped
    vol = load_series(found.series[0])
    np.testing.assert_array_equal(vol.hu, sitk.GetArrayFromImage(img).astype(np.float32))
    assert vol.spacing_mm == pytest.approx((2.5, 0.6, 0.8))
    for zyx in [(0, 0, 0), (2, 4, 6), (1, 3, 2)]:
        expect = img.TransformIndexToPhysicalPoint((zyx[2], zyx[1], zyx[0]))
        np.testing.assert_allclose(vol.index_to_patient(zyx), expect, atol=1e-4)
    assert any("assumed to be HU" in n for n in vol.notes)
    assert vol.metadata["modality"] == "CT"


def test_2d_image_becomes_one_slice(tmp_path):
    img = sitk.GetImageFromArray(np.full((4, 6), 40, np.int16))
    img.SetSpacing((0.5, 0.7))
    sitk.WriteImage(img, str(tmp_path / "one.mha"))
    vol = load_path(tmp_path / "one.mha")[0]
    assert vol.shape == (1, 4, 6)
    assert vol.spacing_mm[1:] == pytest.approx((0.7, 0.5))


def test_vector_image_is_refused(tmp_path):
    img = sitk.GetImageFromArray(np.zeros((3, 4, 5, 3), np.uint8), isVector=True)
    sitk.WriteImage(img, str(tmp_path / "rgb.mha"))
    with pytest.raises(NotMonochromeError, match="3 components"):
        load_path(tmp_path / "rgb.mha")


def test_image_size_guard_reads_the_header_only(tmp_path):
    sitk.WriteImage(_image(), str(tmp_path / "v.nrrd"))
    with pytest.raises(TooLargeError, match="3 x 5 x 7|7 x 5 x 3"):
        load_series(discover([tmp_path]).series[0], max_bytes=100)


def test_corrupt_image_file_is_unreadable(tmp_path):
    (tmp_path / "bad.mha").write_bytes(b"ObjectType = Image\nNDims = 3\nDimSize = 4 4 4\nElementType = MET_SHORT\nElementDataFile = LOCAL\n")
    with pytest.raises(UnreadableFileError, match="bad.mha"):
        load_path(tmp_path / "bad.mha")


def test_npy_with_sidecar(tmp_path):
    arr = np.random.default_rng(1).normal(0, 10, (4, 6, 5)).astype(np.float32)
    np.save(tmp_path / "scan.npy", arr)
    (tmp_path / "scan.json").write_text(json.dumps({"spacing_mm_zyx": [3.0, 0.5, 0.6], "origin_mm": [1.0, 2.0, 3.0]}))
    found = discover([tmp_path])
    assert [s.kind for s in found.series] == ["numpy"]
    vol = load_series(found.series[0])
    np.testing.assert_array_equal(vol.hu, arr)
    np.testing.assert_allclose(vol.index_to_patient((1, 2, 3)), (1.0 + 3 * 0.6, 2.0 + 2 * 0.5, 3.0 + 3.0))


def test_npy_without_sidecar_or_with_bad_sidecar_is_refused(tmp_path):
    np.save(tmp_path / "a.npy", np.zeros((2, 3, 3), np.float32))
    with pytest.raises(InconsistentGeometryError, match="a.json"):
        load_path(tmp_path / "a.npy")
    (tmp_path / "a.json").write_text(json.dumps({"spacing_mm_zyx": [1.0, 2.0]}))
    with pytest.raises(InconsistentGeometryError, match="spacing_mm_zyx"):
        load_path(tmp_path / "a.npy")
    (tmp_path / "a.json").write_text("{broken")
    with pytest.raises(UnreadableFileError, match="not valid JSON"):
        load_path(tmp_path / "a.npy")


def test_npy_of_wrong_shape_is_refused(tmp_path):
    np.save(tmp_path / "b.npy", np.zeros((2, 3, 3, 2), np.float32))
    (tmp_path / "b.json").write_text(json.dumps({"spacing_mm_zyx": [1, 1, 1]}))
    with pytest.raises(InvalidVolumeError, match="3-D"):
        load_path(tmp_path / "b.npy")


def test_image_series_uid_is_stable(tmp_path):
    sitk.WriteImage(_image(), str(tmp_path / "v.mha"))
    a, b = discover([tmp_path]).series[0], discover([tmp_path / "v.mha"]).series[0]
    assert a.series_uid == b.series_uid and a.series_uid.startswith("2.25.")
