"""Reference check: DICOM -> NIfTI / MHA -> reload, against SimpleITK as the outside reader.

Sources: SimpleITK (ITK/GDCM) as the reference library for DICOM geometry — its
ImageSeriesReader reads our written series independently of our loader, and its
``TransformIndexToPhysicalPoint`` gives the LPS position of a voxel (SimpleITK
documentation, "Fundamental Concepts": physical space is LPS). The DICOM geometry rule
IPP + i * PixelSpacing[1] * row cosine + j * PixelSpacing[0] * column cosine is DICOM PS3.3
C.7.6.2.1.1.

The series is oblique (rotated about two axes), has an offset origin and anisotropic
spacing, and one bright voxel at a known index, so a swapped axis, a flipped sign or a
transposed spacing moves the voxel and fails the check.
"""
from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk

from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.load import discover, load_series
from reconaudit.checker.volume import Volume

MARK_ZYX = (3, 5, 9)
MARK_HU = 2500.0
SPACING = (2.5, 0.7, 0.9)  # z, y, x mm
ORIGIN = (-87.3, 41.2, 215.6)


def _rotation(ax: float, az: float) -> np.ndarray:
    cx, sx, cz, sz = np.cos(ax), np.sin(ax), np.cos(az), np.sin(az)
    rx = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    rz = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return rz @ rx


def _truth() -> Volume:
    rng = np.random.default_rng(11)
    hu = np.round(rng.normal(0, 20, (6, 10, 14))).astype(np.float32)
    hu[MARK_ZYX] = MARK_HU
    r = _rotation(np.radians(17.0), np.radians(-28.0))
    row_cos, col_cos = r[:, 0], r[:, 1]
    affine = np.eye(4)
    affine[:3, 0] = SPACING[0] * np.cross(row_cos, col_cos)
    affine[:3, 1] = SPACING[1] * col_cos
    affine[:3, 2] = SPACING[2] * row_cos
    affine[:3, 3] = ORIGIN
    return Volume(hu=hu, spacing_mm=SPACING, affine=affine)


def _mark_lps_by_rule(truth: Volume) -> np.ndarray:
    """Position of the mark from the DICOM rule written out by hand (PS3.3 C.7.6.2.1.1)."""
    k, j, i = MARK_ZYX
    row_cos, col_cos = truth.affine[:3, 2] / SPACING[2], truth.affine[:3, 1] / SPACING[1]
    ipp_k = np.asarray(ORIGIN) + k * truth.affine[:3, 0]
    return ipp_k + i * SPACING[2] * row_cos + j * SPACING[1] * col_cos


def _to_sitk(vol: Volume) -> sitk.Image:
    """A SimpleITK image from a loaded Volume: x, y, z spacing and direction columns."""
    img = sitk.GetImageFromArray(vol.hu)
    img.SetSpacing((vol.spacing_mm[2], vol.spacing_mm[1], vol.spacing_mm[0]))
    img.SetOrigin(tuple(float(v) for v in vol.origin_mm))
    cols = [vol.affine[:3, 2] / vol.spacing_mm[2], vol.affine[:3, 1] / vol.spacing_mm[1], vol.affine[:3, 0] / vol.spacing_mm[0]]
    img.SetDirection(tuple(float(v) for v in np.column_stack(cols).ravel()))
    return img


def _mark_lps(vol: Volume) -> np.ndarray:
    found = np.argwhere(vol.hu == vol.hu.max())
    assert len(found) == 1
    return vol.index_to_patient(found[0])


@pytest.fixture(scope="module")
def dicom_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("oblique")
    write_ct_series(_truth(), folder, series_description="oblique round trip", shuffle_names=True)
    return folder


@pytest.fixture(scope="module")
def loaded(dicom_folder):
    return load_series(discover([dicom_folder]).series[0])


def test_dicom_load_matches_the_rule_and_simpleitk_series_reader(loaded, dicom_folder):
    """Our DICOM load vs SimpleITK's ImageSeriesReader (GDCM) and vs the PS3.3 rule."""
    truth = _truth()
    np.testing.assert_allclose(_mark_lps(loaded), _mark_lps_by_rule(truth), atol=1e-3)
    np.testing.assert_array_equal(loaded.hu, truth.hu)
    reader = sitk.ImageSeriesReader()
    reader.SetFileNames(sitk.ImageSeriesReader.GetGDCMSeriesFileNames(str(dicom_folder)))
    ref = reader.Execute()
    ref_hu = sitk.GetArrayFromImage(ref).astype(np.float32)
    idx = np.unravel_index(int(np.argmax(ref_hu)), ref_hu.shape)
    assert ref_hu[idx] == MARK_HU
    ref_lps = np.array(ref.TransformIndexToPhysicalPoint((int(idx[2]), int(idx[1]), int(idx[0]))))
    np.testing.assert_allclose(_mark_lps(loaded), ref_lps, atol=1e-3)
    np.testing.assert_array_equal(np.sort(ref_hu.ravel()), np.sort(loaded.hu.ravel()))


@pytest.mark.parametrize("name", ["roundtrip.nii.gz", "roundtrip.mha"])
def test_nifti_and_mha_round_trip_keep_hu_and_patient_position(loaded, tmp_path, name):
    """DICOM -> our Volume -> SimpleITK writer -> our SimpleITK-based reader."""
    sitk.WriteImage(_to_sitk(loaded), str(tmp_path / name))
    back = load_series(discover([tmp_path / name]).series[0])
    np.testing.assert_array_equal(back.hu, loaded.hu)
    np.testing.assert_allclose(_mark_lps(back), _mark_lps_by_rule(_truth()), atol=1e-3)
    np.testing.assert_allclose(back.affine, loaded.affine, atol=1e-3)
    assert back.spacing_mm == pytest.approx(SPACING, abs=1e-5)


def test_simpleitk_reads_our_nifti_at_the_same_position(loaded, tmp_path):
    """The written NIfTI read by plain SimpleITK puts the mark at the same LPS point."""
    path = tmp_path / "plain.nii"
    sitk.WriteImage(_to_sitk(loaded), str(path))
    img = sitk.ReadImage(str(path))
    lps = img.TransformIndexToPhysicalPoint((MARK_ZYX[2], MARK_ZYX[1], MARK_ZYX[0]))
    assert sitk.GetArrayViewFromImage(img)[MARK_ZYX] == MARK_HU
    np.testing.assert_allclose(lps, _mark_lps_by_rule(_truth()), atol=1e-3)
