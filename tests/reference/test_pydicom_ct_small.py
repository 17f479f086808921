"""Reference check: pydicom's bundled real CT slice, CT_small.dcm.

Source: the test data shipped with pydicom (``pydicom.data.get_testdata_file("CT_small.dcm")``),
a 128 x 128 single-slice CT Image Storage object. The expected numbers below are the values
its header states; each test also reads them with plain pydicom so a changed file fails.
"""
from __future__ import annotations

import numpy as np
import pydicom
import pytest
from pydicom.data import get_testdata_file

from reconaudit.checker.load import discover, load_series

CT_SMALL = get_testdata_file("CT_small.dcm")
#: Header values of CT_small.dcm as shipped with pydicom 3.0 (stated explicitly).
EXPECTED_PIXEL_SPACING_MM = (0.661468, 0.661468)
EXPECTED_POSITION_MM = (-158.135803, -179.035797, -75.699997)
EXPECTED_SLICE_THICKNESS_MM = 5.0
EXPECTED_STORED_RANGE = (128, 2191)
EXPECTED_INTERCEPT, EXPECTED_SLOPE = -1024.0, 1.0


@pytest.fixture(scope="module")
def header():
    return pydicom.dcmread(CT_SMALL)


@pytest.fixture(scope="module")
def volume():
    found = discover([CT_SMALL])
    assert len(found.series) == 1 and not found.problems
    return load_series(found.series[0])


def test_header_states_the_expected_values(header):
    """The file's own header (pydicom) holds the numbers stated above."""
    assert tuple(float(v) for v in header.PixelSpacing) == EXPECTED_PIXEL_SPACING_MM
    assert tuple(float(v) for v in header.ImagePositionPatient) == EXPECTED_POSITION_MM
    assert float(header.SliceThickness) == EXPECTED_SLICE_THICKNESS_MM
    assert (float(header.RescaleIntercept), float(header.RescaleSlope)) == (EXPECTED_INTERCEPT, EXPECTED_SLOPE)
    stored = header.pixel_array
    assert (int(stored.min()), int(stored.max())) == EXPECTED_STORED_RANGE


def test_hu_range(volume, header):
    """HU = stored * RescaleSlope + RescaleIntercept (DICOM PS3.3 C.11.1): -896 .. 1167 HU."""
    expected_lo = EXPECTED_STORED_RANGE[0] * EXPECTED_SLOPE + EXPECTED_INTERCEPT
    expected_hi = EXPECTED_STORED_RANGE[1] * EXPECTED_SLOPE + EXPECTED_INTERCEPT
    assert (float(volume.hu.min()), float(volume.hu.max())) == (expected_lo, expected_hi) == (-896.0, 1167.0)
    direct = header.pixel_array * float(header.RescaleSlope) + float(header.RescaleIntercept)
    np.testing.assert_array_equal(volume.hu[0], direct)


def test_geometry(volume, header):
    """PixelSpacing 0.661468 mm, position of voxel [0,0,0] = ImagePositionPatient, axial orientation."""
    assert volume.shape == (1, 128, 128)
    assert volume.spacing_mm[1:] == EXPECTED_PIXEL_SPACING_MM
    np.testing.assert_allclose(volume.origin_mm, EXPECTED_POSITION_MM, atol=1e-9)
    np.testing.assert_allclose(volume.origin_mm, [float(v) for v in header.ImagePositionPatient], atol=1e-9)
    # one column step goes along the row direction cosine (1, 0, 0): +x by PixelSpacing[1]
    np.testing.assert_allclose(volume.index_to_patient((0, 0, 1)) - volume.origin_mm, (0.661468, 0.0, 0.0), atol=1e-9)
    np.testing.assert_allclose(volume.index_to_patient((0, 1, 0)) - volume.origin_mm, (0.0, 0.661468, 0.0), atol=1e-9)


def test_single_slice_z_spacing_and_metadata(volume, header):
    """One slice: z spacing from SpacingBetweenSlices/SliceThickness (5 mm); safe metadata only."""
    assert volume.spacing_mm[0] == EXPECTED_SLICE_THICKNESS_MM
    assert volume.metadata["slice_thickness_mm"] == EXPECTED_SLICE_THICKNESS_MM
    assert volume.metadata["modality"] == "CT"
    assert volume.metadata["kvp"] == float(header.KVP)
    assert volume.identifiers == {}
    assert str(header.PatientName) not in repr(volume.metadata)
