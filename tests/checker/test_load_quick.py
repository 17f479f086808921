"""The quick DICOM read (own header parse, pixels read straight from disk) against pydicom.

Every file the quick read accepts must give pydicom's elements and pydicom's stored
pixel values; a series loads to the same Volume whether the quick read is used or not;
a disagreement found by the once-per-series cross-check sends every file to pydicom.
"""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.data import get_testdata_file
from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.errors import UnreadableFileError
from reconaudit.checker.load import _dicom, _headers, _quick, discover, load_series
from reconaudit.checker.volume import Volume


def _volume(nz: int = 5, n: int = 24) -> Volume:
    rng = np.random.default_rng(3)
    hu = rng.normal(-300.0, 400.0, (nz, n, n)).round().astype(np.float32)
    pad = np.zeros((n, n), dtype=bool)
    pad[:3, :3] = True
    hu[:, pad] = -2000.0
    return Volume.from_array(hu, spacing_mm=(2.0, 0.8, 0.8), origin_mm=(-10.0, -10.0, 40.0), padding_mask=pad)


def _series(folder: Path, **kw) -> list[Path]:
    return write_ct_series(_volume(), folder, series_description="quick read test", padding_value=-2000, **kw)


def _load(folder: Path) -> Volume:
    found = discover([folder])
    assert len(found.series) == 1
    return load_series(found.series[0])


def _same_volume(a: Volume, b: Volume) -> None:
    assert a.hu.dtype == b.hu.dtype == np.float32
    np.testing.assert_array_equal(a.hu, b.hu)
    np.testing.assert_array_equal(a.affine, b.affine)
    assert a.spacing_mm == b.spacing_mm and a.metadata == b.metadata and a.notes == b.notes
    assert (a.padding_mask is None) == (b.padding_mask is None)
    if a.padding_mask is not None:
        np.testing.assert_array_equal(a.padding_mask, b.padding_mask)


def test_pydicom_ct_small_read_quickly_equals_pydicom():
    """pydicom's shipped CT test file CT_small.dcm (pydicom.data.get_testdata_file): the
    quick read accepts it (a sequence of undefined length, elements after the pixel data)
    and gives pydicom's elements and pydicom's stored pixel values."""
    path = Path(get_testdata_file("CT_small.dcm"))
    quick = _headers.quick_dataset(path)
    assert quick is not None
    full = pydicom.dcmread(path)
    assert _dicom._same_elements(quick, full)
    stored = _headers.read_quick_pixels(path, _headers.quick_pixels_of(quick))
    np.testing.assert_array_equal(stored.reshape(full.pixel_array.shape), full.pixel_array)
    assert float(quick.RescaleIntercept) == float(full.RescaleIntercept)


def test_every_pydicom_test_file_accepted_quickly_equals_pydicom():
    """Every file shipped with pydicom (pydicom.data) that the quick read accepts gives
    pydicom's elements and stored values; the rest are left to pydicom (None)."""
    from pydicom.data import get_testdata_files

    accepted = 0
    for name in get_testdata_files("*"):
        path = Path(name)
        quick = _headers.quick_dataset(path)
        if quick is None:
            continue
        accepted += 1
        full = pydicom.dcmread(path)
        assert _dicom._same_elements(quick, full), path.name
        stored = _headers.read_quick_pixels(path, _headers.quick_pixels_of(quick))
        np.testing.assert_array_equal(stored.reshape(full.pixel_array.shape), full.pixel_array, err_msg=path.name)
    assert accepted >= 1


def test_series_loads_the_same_with_and_without_the_quick_read(tmp_path, monkeypatch):
    _series(tmp_path)
    assert all(_headers.quick_dataset(p) is not None for p in tmp_path.glob("*.dcm"))
    quick = _load(tmp_path)
    monkeypatch.setattr(_dicom, "quick_dataset", lambda path: None)
    plain = _load(tmp_path)
    _same_volume(quick, plain)
    np.testing.assert_array_equal(quick.hu[:, ~quick.padding_mask], _volume().hu[:, ~quick.padding_mask])


def test_one_reading_thread_gives_the_same_volume(tmp_path, monkeypatch):
    _series(tmp_path)
    two = _load(tmp_path)
    monkeypatch.setattr(_dicom, "READ_THREADS", 1)
    _same_volume(two, _load(tmp_path))


def test_cross_check_disagreement_sends_every_file_to_pydicom(tmp_path, monkeypatch):
    """When the quick read of the first file disagrees with pydicom, no quick pixels are used."""
    _series(tmp_path)
    real = _headers.read_quick_pixels

    def wrong(path, where):
        return real(path, where) + 1  # a quick read that is off by one stored value

    monkeypatch.setattr(_dicom, "read_quick_pixels", wrong)
    vol = _load(tmp_path)
    monkeypatch.setattr(_dicom, "quick_dataset", lambda path: None)
    _same_volume(vol, _load(tmp_path))


def test_file_truncated_inside_pixel_data_is_left_to_pydicom_and_refused(tmp_path):
    paths = _series(tmp_path)
    data = paths[2].read_bytes()
    paths[2].write_bytes(data[: len(data) - 100])
    assert _headers.quick_dataset(paths[2]) is None
    with pytest.raises(UnreadableFileError) as info:
        _load(tmp_path)
    assert paths[2].name in str(info.value)


def test_file_truncated_after_the_quick_parse_names_the_file(tmp_path):
    paths = _series(tmp_path)
    quick = _headers.quick_dataset(paths[1])
    data = paths[1].read_bytes()
    paths[1].write_bytes(data[:-10])
    with pytest.raises(UnreadableFileError, match="truncated pixel data") as info:
        _headers.read_quick_pixels(paths[1], _headers.quick_pixels_of(quick))
    assert paths[1].name in str(info.value)


def test_other_bit_depths_and_implicit_vr_are_left_to_pydicom(tmp_path):
    paths = _series(tmp_path)
    ds = pydicom.dcmread(paths[0])
    ds.BitsStored = 12
    ds.HighBit = 11
    ds.save_as(paths[0])
    assert _headers.quick_dataset(paths[0]) is None
    other = tmp_path / "implicit.dcm"
    shutil.copy(paths[1], other)
    ds = pydicom.dcmread(other)
    ds.file_meta.TransferSyntaxUID = pydicom.uid.ImplicitVRLittleEndian
    ds.save_as(other, implicit_vr=True, little_endian=True, enforce_file_format=True)
    assert pydicom.dcmread(other).file_meta.TransferSyntaxUID == pydicom.uid.ImplicitVRLittleEndian
    assert _headers.quick_dataset(other) is None


# --------------------------------------------------------------------------- raw values, kept scans, threads
LOADER_NAMES = ("Rows", "Columns", "BitsAllocated", "BitsStored", "PixelRepresentation", "SamplesPerPixel",
                "PhotometricInterpretation", "Modality", "SOPClassUID", "SOPInstanceUID", "NumberOfFrames",
                "PixelPaddingValue", "PixelPaddingRangeLimit", "RescaleSlope", "ImagePositionPatient", "PatientWeight")


@pytest.mark.parametrize("which", ["written", "CT_small"])
def test_values_from_the_raw_bytes_equal_pydicom(tmp_path, which):
    """The values the loader takes from a quick header's raw bytes are pydicom's values
    (pydicom's CT_small.dcm from pydicom.data, and a series written by the project)."""
    path = Path(get_testdata_file("CT_small.dcm")) if which == "CT_small" else _series(tmp_path)[0]
    quick = _headers.quick_dataset(path)
    full = pydicom.dcmread(path)
    assert isinstance(quick, _quick.QuickHeader)
    for name in LOADER_NAMES:
        assert (name in quick) == (name in full), name
        assert _headers.quick_get(quick, name) == _headers.quick_get(full, name), name
    assert _dicom._same_loader_values(quick, full, path)
    assert quick.dataset() is quick.dataset()  # built once


def test_cross_check_catches_a_wrong_raw_value(tmp_path, monkeypatch):
    """A raw-value reading that disagrees with pydicom on the first file is caught by the
    once-per-series cross-check, and the series is read by pydicom."""
    paths = _series(tmp_path)
    real = _headers._quick_header_get

    def wrong(ds, name, default):
        value = real(ds, name, default)
        return value + 1 if name == "PixelPaddingValue" else value

    monkeypatch.setattr(_headers, "_quick_header_get", wrong)
    quick = _headers.quick_dataset(paths[0])
    assert not _dicom._same_loader_values(quick, pydicom.dcmread(paths[0]), paths[0])
    vol = _load(tmp_path)
    monkeypatch.setattr(_dicom, "quick_dataset", lambda path: None)
    _same_volume(vol, _load(tmp_path))


def test_discovery_scan_is_kept_for_the_load_and_dropped_after_it(tmp_path):
    paths = _series(tmp_path)
    _quick.forget_scans()
    found = discover([tmp_path])
    assert all(str(p) in _quick._REMEMBERED for p in paths)
    load_series(found.series[0])
    assert not any(str(p) in _quick._REMEMBERED for p in paths)
    assert _quick._REMEMBERED_BYTES[0] == 0


def test_file_changed_between_discovery_and_load_is_scanned_again(tmp_path):
    """The load never uses a kept scan of a file that changed since discovery."""
    paths = _series(tmp_path)
    found = discover([tmp_path])
    ds = pydicom.dcmread(paths[1])
    ds.RescaleIntercept = "-1000.5"  # other length, other values
    ds.save_as(paths[1])
    vol = load_series(found.series[0])
    stored = pydicom.dcmread(paths[1]).pixel_array
    assert np.array_equal(vol.hu[1], stored.astype(np.float32) - np.float32(1000.5))
    _same_volume(vol, _load(tmp_path))


def test_kept_scans_stay_under_their_byte_limit(tmp_path, monkeypatch):
    _series(tmp_path)
    _quick.forget_scans()
    monkeypatch.setattr(_quick, "CACHE_LIMIT_BYTES", 4000)
    discover([tmp_path])
    kept = sum(len(r.buf) for r in _quick._REMEMBERED.values())
    assert 0 < kept <= 4000 and kept == _quick._REMEMBERED_BYTES[0]
    assert len(_quick._REMEMBERED) < 5
    _quick.forget_scans()
    vol = _load(tmp_path)  # files without a kept scan are scanned again
    np.testing.assert_array_equal(vol.hu[:, ~vol.padding_mask], _volume().hu[:, ~vol.padding_mask])


@pytest.mark.parametrize("threads", [1, 2, 3, 7])
@pytest.mark.parametrize("odd_slice", [None, 0, 2, 4])
def test_padding_found_the_same_with_any_number_of_threads(tmp_path, monkeypatch, threads, odd_slice):
    """Slices are cut into one run per thread; the padding mask and note do not depend on
    where the cuts fall (a slice with other padded pixels anywhere gives no common mask)."""
    vol = _volume()
    if odd_slice is not None:
        vol.hu[odd_slice, 10, 10] = -2000.0 - 1024.0  # stored as the padding value
    write_ct_series(vol, tmp_path, series_description="threads", padding_value=-2000)
    monkeypatch.setattr(_dicom, "READ_THREADS", threads)
    out = _load(tmp_path)
    np.testing.assert_array_equal(out.hu[:, ~vol.padding_mask], vol.hu[:, ~vol.padding_mask])
    assert np.all(out.hu[:, vol.padding_mask] == -2000.0 - 1024.0)
    if odd_slice is None:
        np.testing.assert_array_equal(out.padding_mask, vol.padding_mask)
    else:
        assert out.padding_mask is None
        assert any("different pixels on different slices" in n for n in out.notes)


def test_scans_never_loaded_make_room_for_newer_ones(tmp_path, monkeypatch):
    """Kept scans of a series that is never loaded are dropped, oldest first, so the
    scans of a later discovery are still kept for its load."""
    _series(tmp_path / "a")
    newer = _series(tmp_path / "b")
    _quick.forget_scans()
    monkeypatch.setattr(_quick, "CACHE_LIMIT_BYTES", 8000)
    discover([tmp_path / "a"])
    discover([tmp_path / "b"])
    assert all(str(p) in _quick._REMEMBERED for p in newer)
    assert len(_quick._REMEMBERED) < 10  # some of the older series' scans were dropped
    assert _quick._REMEMBERED_BYTES[0] == sum(len(r.buf) for r in _quick._REMEMBERED.values()) <= 8000
    _quick.forget_scans()
