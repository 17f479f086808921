"""The quick header scan agrees with pydicom where it answers, and defers where it must."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.uid import ImplicitVRLittleEndian

from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.load._headers import SCAN_BYTES, header_facts, quick_get, read_header, scan_header
from reconaudit.checker.volume import Volume


@pytest.fixture()
def one_file(tmp_path: Path) -> Path:
    vol = Volume.from_array(np.zeros((1, 16, 16), np.float32), (2.0, 0.5, 0.5), (1.0, 2.0, 3.0))
    return write_ct_series(vol, tmp_path / "s", series_description="header scan", uid_seed="hdr")[0]


def test_scan_agrees_with_pydicom_on_a_plain_file(one_file):
    quick = scan_header(one_file)
    assert quick is not None
    assert quick == header_facts(read_header(one_file))


def test_implicit_vr_is_left_to_pydicom(one_file, tmp_path):
    ds = pydicom.dcmread(one_file)
    ds.file_meta.TransferSyntaxUID = ImplicitVRLittleEndian
    out = tmp_path / "implicit.dcm"
    ds.save_as(out, enforce_file_format=True, implicit_vr=True, little_endian=True)
    assert scan_header(out) is None
    assert pydicom.dcmread(out).SeriesDescription == "header scan"


def test_header_longer_than_the_scan_window_is_left_to_pydicom(one_file, tmp_path):
    ds = pydicom.dcmread(one_file)
    ds.ImageComments = "x" * (SCAN_BYTES + 1000)  # LT, before the pixel data
    out = tmp_path / "long.dcm"
    ds.save_as(out, enforce_file_format=True)
    assert scan_header(out) is None


def test_non_ascii_text_is_left_to_pydicom(one_file, tmp_path):
    ds = pydicom.dcmread(one_file)
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SeriesDescription = "Thorax séries"
    out = tmp_path / "latin1.dcm"
    ds.save_as(out, enforce_file_format=True)
    facts = scan_header(out)
    # either deferred, or (if answered) identical to what pydicom decodes
    assert facts is None or facts == header_facts(read_header(out))


def test_quick_get_equals_pydicom_get(one_file):
    raw = pydicom.dcmread(one_file, stop_before_pixels=True)
    ref = pydicom.dcmread(one_file, stop_before_pixels=True)
    for name in ("Rows", "Columns", "BitsAllocated", "PixelRepresentation", "Modality", "SOPInstanceUID",
                 "SeriesInstanceUID", "PhotometricInterpretation", "PatientWeight"):
        assert quick_get(raw, name, None) == ref.get(name, None), name


def _pixel_data_offset(path: Path) -> int:
    data = path.read_bytes()
    return data.index(b"\xe0\x7f\x10\x00OW")


def test_headers_around_the_first_read_scan_as_with_the_whole_window(one_file, tmp_path):
    """Headers that end just before, across and just after the short first read
    (``FIRST_READ`` bytes) scan exactly as pydicom reads them, and are read quickly."""
    from reconaudit.checker.load._quick import FIRST_READ, quick_dataset

    base = _pixel_data_offset(one_file)
    for target in range(FIRST_READ - 16, FIRST_READ + 6, 2):
        ds = pydicom.dcmread(one_file)
        ds.ImageComments = "c" * (target - base - 8)  # LT: 8-byte element header
        out = tmp_path / f"h{target}.dcm"
        ds.save_as(out, enforce_file_format=True)
        assert _pixel_data_offset(out) == target
        assert scan_header(out) == header_facts(read_header(out)), target
        assert quick_dataset(out) is not None, target
