"""Tests of the CT DICOM writer, read back with plain pydicom (not our loader)."""
from __future__ import annotations

import numpy as np
import pydicom
import pytest

from reconaudit.checker.dicom_write import (
    CT_IMAGE_STORAGE,
    ENHANCED_CT_IMAGE_STORAGE,
    plane_geometry,
    write_ct_series,
    write_enhanced_ct,
)
from reconaudit.checker.errors import InvalidVolumeError
from reconaudit.checker.volume import Volume


def _oblique_volume() -> Volume:
    """4 x 6 x 5 volume, rotated 30 degrees about the LPS y axis, anisotropic spacing."""
    rng = np.random.default_rng(3)
    hu = rng.integers(-1000, 1500, size=(4, 6, 5)).astype(np.float32)
    c, s = np.cos(np.radians(30)), np.sin(np.radians(30))
    row_cos = np.array([c, 0.0, -s])  # column step direction
    col_cos = np.array([0.0, 1.0, 0.0])  # row step direction
    normal = np.cross(row_cos, col_cos)
    affine = np.eye(4)
    affine[:3, 0] = 2.5 * normal
    affine[:3, 1] = 0.7 * col_cos
    affine[:3, 2] = 0.9 * row_cos
    affine[:3, 3] = (-12.5, 40.25, 101.0)
    return Volume(hu=hu, spacing_mm=(2.5, 0.7, 0.9), affine=affine)


def test_positions_orientation_spacing_and_values(tmp_path):
    vol = _oblique_volume()
    paths = write_ct_series(vol, tmp_path, series_description="oblique test")
    assert len(paths) == 4
    for k, path in enumerate(paths):
        ds = pydicom.dcmread(path)
        assert ds.SOPClassUID == CT_IMAGE_STORAGE
        assert ds.Modality == "CT"
        np.testing.assert_allclose([float(v) for v in ds.ImagePositionPatient], vol.index_to_patient([k, 0, 0]), atol=1e-6)
        np.testing.assert_allclose([float(v) for v in ds.ImageOrientationPatient], [np.cos(np.radians(30)), 0, -0.5, 0, 1, 0], atol=1e-9)
        assert [float(v) for v in ds.PixelSpacing] == [0.7, 0.9]
        hu = ds.pixel_array * float(ds.RescaleSlope) + float(ds.RescaleIntercept)
        np.testing.assert_array_equal(hu, vol.hu[k])
        assert ds.pixel_array.dtype == np.int16


def test_same_seed_same_uids_other_seed_other_uids(tmp_path):
    vol = Volume.from_array(np.zeros((2, 4, 4)))
    a = write_ct_series(vol, tmp_path / "a", series_description="x", uid_seed="s1")
    b = write_ct_series(vol, tmp_path / "b", series_description="x", uid_seed="s1")
    c = write_ct_series(vol, tmp_path / "c", series_description="x", uid_seed="s2")
    ua = [pydicom.dcmread(p).SOPInstanceUID for p in a]
    ub = [pydicom.dcmread(p).SOPInstanceUID for p in b]
    uc = [pydicom.dcmread(p).SOPInstanceUID for p in c]
    assert ua == ub
    assert len(set(ua)) == 2
    assert not set(ua) & set(uc)
    assert pydicom.dcmread(a[0]).SeriesInstanceUID != pydicom.dcmread(c[0]).SeriesInstanceUID
    assert a[0].read_bytes() == b[0].read_bytes()


def test_shuffled_names_do_not_sort_in_slice_order(tmp_path):
    vol = Volume.from_array(np.zeros((12, 4, 4)))
    paths = write_ct_series(vol, tmp_path, series_description="x", shuffle_names=True)
    names = [p.name for p in paths]
    assert sorted(names) != names
    assert len(set(names)) == 12


def test_unsigned_storage_when_int16_does_not_fit(tmp_path):
    hu = np.array([[[0.0, 40000.0], [100.0, 200.0]]])
    paths = write_ct_series(Volume.from_array(hu), tmp_path, series_description="x", rescale_intercept=0.0)
    ds = pydicom.dcmread(paths[0])
    assert ds.PixelRepresentation == 0
    assert ds.pixel_array.dtype == np.uint16
    np.testing.assert_array_equal(ds.pixel_array, hu[0])


def test_padding_value_written_on_masked_pixels(tmp_path):
    hu = np.full((2, 4, 4), 20.0)
    mask = np.zeros((4, 4), bool)
    mask[0, :] = True
    vol = Volume.from_array(hu, padding_mask=mask)
    paths = write_ct_series(vol, tmp_path, series_description="x", padding_value=-2000)
    ds = pydicom.dcmread(paths[1])
    assert ds.PixelPaddingValue == -2000
    assert np.all(ds.pixel_array[0] == -2000)
    assert np.all(ds.pixel_array[1:] == 20 + 1024)


def test_bad_volumes_raise_typed_errors(tmp_path):
    hu = np.zeros((1, 3, 3))
    hu[0, 1, 1] = np.nan
    with pytest.raises(InvalidVolumeError, match="NaN"):
        write_ct_series(Volume.from_array(hu), tmp_path, series_description="x")
    with pytest.raises(InvalidVolumeError, match="int16"):
        write_ct_series(Volume.from_array(np.array([[[-5000.0, 70000.0]]])), tmp_path, series_description="x")
    with pytest.raises(InvalidVolumeError, match="orthogonal"):
        affine = np.eye(4)
        affine[:3, 1] = (0.0, 1.0, 1.0)
        plane_geometry(affine)


def test_enhanced_ct_frames_and_functional_groups(tmp_path):
    vol = _oblique_volume()
    path = write_enhanced_ct(vol, tmp_path / "enh.dcm", series_description="enh", per_frame_rescale=True)
    ds = pydicom.dcmread(path)
    assert ds.SOPClassUID == ENHANCED_CT_IMAGE_STORAGE
    assert int(ds.NumberOfFrames) == 4
    frames = ds.pixel_array
    assert frames.shape == (4, 6, 5)
    for k, item in enumerate(ds.PerFrameFunctionalGroupsSequence):
        pos = [float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient]
        np.testing.assert_allclose(pos, vol.index_to_patient([k, 0, 0]), atol=1e-6)
        tr = item.PixelValueTransformationSequence[0]
        np.testing.assert_array_equal(frames[k] * float(tr.RescaleSlope) + float(tr.RescaleIntercept), vol.hu[k])
    shared = ds.SharedFunctionalGroupsSequence[0]
    assert [float(v) for v in shared.PixelMeasuresSequence[0].PixelSpacing] == [0.7, 0.9]


def test_long_texts_are_cut_to_their_vr_length(tmp_path):
    paths = write_ct_series(Volume.from_array(np.zeros((1, 2, 2))), tmp_path, series_description="d" * 80,
                            convolution_kernel="K" * 20)
    ds = pydicom.dcmread(paths[0])
    assert ds.SeriesDescription == "d" * 64
    assert ds.ConvolutionKernel == "K" * 16
