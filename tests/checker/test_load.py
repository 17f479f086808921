"""Tests of DICOM discovery and loading: ordering, grouping, and every validation error.

Bad inputs are built in tmp_path with write_ct_series and pydicom edits.
"""
from __future__ import annotations

import shutil
import tracemalloc
from pathlib import Path

import numpy as np
import pydicom
import pydicom.pixels
import pytest
from pydicom.data import get_testdata_file
from pydicom.uid import JPEG2000Lossless, RLELossless

from reconaudit.checker import load as loader
from reconaudit.checker.dicom_write import seeded_uid, write_ct_series, write_enhanced_ct
from reconaudit.checker.errors import (
    DecoderMissingError,
    InconsistentGeometryError,
    MissingSlicesError,
    NoPixelDataError,
    NotCTError,
    NotMonochromeError,
    TooLargeError,
    UnreadableFileError,
)
from reconaudit.checker.load import SeriesSource, discover, load_path, load_series
from reconaudit.checker.volume import Volume


def _volume(nz: int = 6, ny: int = 8, nx: int = 10, spacing=(2.0, 0.75, 0.8), origin=(-30.0, 12.5, 100.0)) -> Volume:
    """Each slice k holds 10*k + a fixed pattern, so the order can be read back from the values."""
    pattern = np.add.outer(np.arange(ny), np.arange(nx)).astype(np.float32)
    hu = np.stack([pattern + 100.0 * k - 500.0 for k in range(nz)])
    return Volume.from_array(hu, spacing_mm=spacing, origin_mm=origin)


def _write(vol: Volume, folder: Path, **kw) -> list[Path]:
    kw.setdefault("series_description", "loader test")
    return write_ct_series(vol, folder, **kw)


def _only(folder: Path) -> SeriesSource:
    found = discover([folder])
    assert len(found.series) == 1, found
    return found.series[0]


def _edit(path: Path, **attrs) -> None:
    ds = pydicom.dcmread(path)
    for name, value in attrs.items():
        if value is None:
            delattr(ds, name)
        else:
            setattr(ds, name, value)
    ds.save_as(path)


# ------------------------------------------------------------------ order and grouping
def test_shuffled_names_without_instance_number_load_in_position_order(tmp_path):
    vol = _volume()
    paths = _write(vol, tmp_path, shuffle_names=True)
    for p in paths:
        _edit(p, InstanceNumber=None, SliceLocation=None)
    assert sorted(p.name for p in paths) != [p.name for p in paths]
    out = load_series(_only(tmp_path))
    np.testing.assert_array_equal(out.hu, vol.hu)
    np.testing.assert_allclose(out.affine, vol.affine, atol=1e-6)
    assert out.spacing_mm == pytest.approx((2.0, 0.75, 0.8))


def test_reversed_instance_numbers_do_not_change_the_order(tmp_path):
    vol = _volume()
    paths = _write(vol, tmp_path)
    for k, p in enumerate(paths):
        _edit(p, InstanceNumber=len(paths) - k)
    np.testing.assert_array_equal(load_series(_only(tmp_path)).hu, vol.hu)


def test_two_interleaved_series_in_one_folder_load_as_two(tmp_path):
    a, b = _volume(nz=5), _volume(nz=4, spacing=(3.0, 0.75, 0.8))
    b.hu += 7.0
    _write(a, tmp_path, uid_seed="series-a", shuffle_names=True)
    pb = _write(b, tmp_path / "tmp", uid_seed="series-b", shuffle_names=True)
    for p in pb:  # same folder, names interleaved with those of series a
        shutil.move(p, tmp_path / ("b" + p.name[3:]))
    (tmp_path / "tmp").rmdir()
    found = discover([tmp_path])
    assert len(found.series) == 2 and not found.problems
    vols = sorted((load_series(s) for s in found.series), key=lambda v: v.shape[0])
    np.testing.assert_array_equal(vols[0].hu, b.hu)
    np.testing.assert_array_equal(vols[1].hu, a.hu)
    assert vols[0].spacing_mm[0] == pytest.approx(3.0)


def test_two_stacks_sharing_a_uid_split_by_acquisition_number(tmp_path):
    vol = _volume(nz=4)
    pa = _write(vol, tmp_path / "a", uid_seed="shared")
    pb = _write(vol, tmp_path / "b", uid_seed="shared")
    for k, p in enumerate(pb):
        _edit(p, AcquisitionNumber=2, SOPInstanceUID=seeded_uid(["second", str(k)]))
    found = discover([tmp_path])
    assert len(found.series) == 2
    assert {s.series_uid for s in found.series} == {pydicom.dcmread(pa[0]).SeriesInstanceUID}
    assert sorted(s.key.rsplit("#", 1)[1] for s in found.series) == ["1", "2"]
    assert all("holds 2 stacks" in s.notes[0] for s in found.series)
    for s in found.series:
        np.testing.assert_array_equal(load_series(s).hu, vol.hu)


def test_two_stacks_side_by_side_sharing_a_uid_are_split(tmp_path):
    vol = _volume(nz=4)
    shifted = Volume.from_array(vol.hu + 1, spacing_mm=vol.spacing_mm, origin_mm=(120.0, 12.5, 100.0))
    _write(vol, tmp_path / "a", uid_seed="shared")
    pb = _write(shifted, tmp_path / "b", uid_seed="shared")
    for k, p in enumerate(pb):
        _edit(p, SOPInstanceUID=seeded_uid(["side", str(k)]))
    found = discover([tmp_path])
    assert len(found.series) == 2
    assert any("separate lines" in s.notes[0] for s in found.series)
    origins = sorted(load_series(s).origin_mm[0] for s in found.series)
    assert origins == pytest.approx([-30.0, 120.0])


def test_mixed_orientation_split_by_discovery_and_refused_when_forced_together(tmp_path):
    vol = _volume(nz=4)
    paths = _write(vol, tmp_path)
    _edit(paths[3], ImageOrientationPatient=[1, 0, 0, 0, 0, -1])
    found = discover([tmp_path])
    assert len(found.series) == 2
    assert "different ImageOrientationPatient" in found.series[0].notes[0]
    forced = SeriesSource("x", str(tmp_path), "x", "dicom", paths, "forced")
    with pytest.raises(InconsistentGeometryError, match="mixed orientation"):
        load_series(forced)


# ------------------------------------------------------------------ refusals
def test_mr_file_is_refused_as_not_ct(tmp_path):
    shutil.copy(get_testdata_file("MR_small.dcm"), tmp_path / "mr.dcm")
    src = _only(tmp_path)
    assert src.modality == "MR"
    with pytest.raises(NotCTError, match="not CT") as info:
        load_series(src)
    assert "MR" in str(info.value) and "mr.dcm" in str(info.value)


def test_non_image_sop_class_is_refused_naming_it(tmp_path):
    paths = _write(_volume(nz=2), tmp_path)
    for p in paths:
        _edit(p, SOPClassUID="1.2.840.10008.5.1.4.1.1.7")  # Secondary Capture Image Storage
    with pytest.raises(NotCTError, match="not a CT image.*Secondary Capture"):
        load_series(_only(tmp_path))


def test_rt_dose_is_refused_as_not_ct(tmp_path):
    shutil.copy(get_testdata_file("rtdose.dcm"), tmp_path / "dose.dcm")
    with pytest.raises(NotCTError, match="not CT: Modality is 'RTDOSE'"):
        load_series(_only(tmp_path))


def test_colour_pixels_are_refused(tmp_path):
    paths = _write(_volume(nz=3), tmp_path)
    _edit(paths[1], PhotometricInterpretation="RGB", SamplesPerPixel=3)
    with pytest.raises(NotMonochromeError, match="not monochrome.*RGB"):
        load_series(_only(tmp_path))


def test_no_pixel_data_is_refused(tmp_path):
    paths = _write(_volume(nz=3), tmp_path)
    for p in paths:
        _edit(p, PixelData=None)
    with pytest.raises(NoPixelDataError, match="no pixel data"):
        load_series(_only(tmp_path))


def test_inconsistent_rows_columns_are_refused(tmp_path):
    paths = _write(_volume(nz=3), tmp_path)
    _edit(paths[1], Rows=4, Columns=5, PixelData=np.zeros((4, 5), np.int16).tobytes())
    with pytest.raises(InconsistentGeometryError, match="inconsistent Rows/Columns: .*4x5"):
        load_series(_only(tmp_path))


def test_missing_slice_is_refused(tmp_path):
    paths = _write(_volume(nz=6), tmp_path)
    paths[3].unlink()
    with pytest.raises(MissingSlicesError, match="missing slices: gap of 4.000 mm.*median spacing 2.000 mm"):
        load_series(_only(tmp_path))


def test_duplicate_positions_are_refused(tmp_path):
    paths = _write(_volume(nz=4), tmp_path)
    copy = tmp_path / "copy.dcm"
    shutil.copy(paths[2], copy)
    _edit(copy, SOPInstanceUID=seeded_uid(["copy"]))
    with pytest.raises(InconsistentGeometryError, match="duplicate slice positions"):
        load_series(_only(tmp_path))


def test_non_uniform_spacing_is_refused(tmp_path):
    paths = _write(_volume(nz=5), tmp_path)
    for k, p in enumerate(paths):
        z = [0.0, 2.0, 4.0, 6.6, 8.6][k]
        _edit(p, ImagePositionPatient=[-30.0, 12.5, z])
    with pytest.raises(InconsistentGeometryError, match="non-uniform slice spacing"):
        load_series(_only(tmp_path))


def test_gantry_tilt_loads_with_a_note_and_sheared_affine(tmp_path):
    vol = _volume(nz=5)
    vol.affine[:3, 0] = (0.0, 0.35, 2.0)  # each slice moves 0.35 mm posterior: ~9.9 deg tilt
    _write(vol, tmp_path)
    out = load_series(_only(tmp_path))
    assert any(n.startswith("gantry tilt") and "9.93 deg" in n for n in out.notes)
    np.testing.assert_allclose(out.affine, vol.affine, atol=1e-6)
    assert out.spacing_mm[0] == pytest.approx(2.0)
    np.testing.assert_array_equal(out.hu, vol.hu)


def test_truncated_end_file_is_left_out_with_a_note(tmp_path):
    vol = _volume(nz=5)
    paths = _write(vol, tmp_path)
    data = paths[-1].read_bytes()
    paths[-1].write_bytes(data[:-60])
    out = load_series(_only(tmp_path))
    assert out.shape[0] == 4
    np.testing.assert_array_equal(out.hu, vol.hu[:4])
    assert any(paths[-1].name in n and "left out" in n for n in out.notes)


def test_truncated_middle_file_refuses_the_series(tmp_path):
    paths = _write(_volume(nz=5), tmp_path)
    paths[2].write_bytes(paths[2].read_bytes()[:-60])
    with pytest.raises(UnreadableFileError, match="truncated pixel data.*not complete"):
        load_series(_only(tmp_path))


def test_garbage_file_is_a_problem_and_the_rest_still_loads(tmp_path):
    vol = _volume(nz=3)
    _write(vol, tmp_path)
    (tmp_path / "junk.dcm").write_bytes(b"not dicom at all" * 10)
    found = discover([tmp_path])
    assert len(found.series) == 1
    assert len(found.problems) == 1 and isinstance(found.problems[0].error, UnreadableFileError)
    assert "junk.dcm" in str(found.problems[0].error)
    np.testing.assert_array_equal(load_series(found.series[0]).hu, vol.hu)


def test_header_declaring_60000_squared_is_refused_before_allocating(tmp_path, monkeypatch):
    paths = _write(_volume(nz=1, ny=4, nx=4), tmp_path)
    _edit(paths[0], Rows=60000, Columns=60000)

    def never(*args, **kwargs):
        raise AssertionError("pixel data were accessed")

    monkeypatch.setattr(loader._dicom, "_stored_frames", never)
    tracemalloc.start()
    try:
        with pytest.raises(TooLargeError, match="too large.*60000") as info:
            load_series(_only(tmp_path))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert "nothing was allocated" in str(info.value)
    assert peak < 20 * 2**20  # 60000^2 float32 would be 13.4 GiB


def test_size_guard_counts_every_slice(tmp_path):
    _write(_volume(nz=6, ny=8, nx=10), tmp_path)
    with pytest.raises(TooLargeError, match="6 slices of 8 x 10"):
        load_series(_only(tmp_path), max_bytes=6 * 8 * 10 * 4 - 1)


# ------------------------------------------------------------------ values
def test_missing_rescale_uses_slope_1_intercept_0_with_a_note(tmp_path):
    vol = _volume(nz=2)
    paths = _write(vol, tmp_path)
    for p in paths:
        _edit(p, RescaleSlope=None, RescaleIntercept=None)
    out = load_series(_only(tmp_path))
    np.testing.assert_array_equal(out.hu, vol.hu + 1024)
    assert any("RescaleSlope/RescaleIntercept missing" in n for n in out.notes)


def test_slope_and_unsigned_storage(tmp_path):
    vol = _volume(nz=3)
    vol.hu[:] = np.round(vol.hu * 2) / 2  # multiples of the 0.5 slope
    paths = _write(vol, tmp_path, rescale_slope=0.5, rescale_intercept=-2000.0)
    np.testing.assert_array_equal(load_series(_only(tmp_path)).hu, vol.hu)
    big = Volume.from_array(np.array([[[0.0, 40000.0], [3.0, 4.0]]]))
    write_ct_series(big, tmp_path / "u", series_description="u", rescale_intercept=0.0)
    np.testing.assert_array_equal(load_series(_only(tmp_path / "u")).hu, big.hu)


def test_padding_mask_and_padded_hu(tmp_path):
    vol = _volume(nz=3)
    mask = np.zeros(vol.shape[1:], bool)
    mask[:2, :] = True
    vol.padding_mask = mask
    _write(vol, tmp_path, padding_value=-3024)
    out = load_series(_only(tmp_path))
    np.testing.assert_array_equal(out.padding_mask, mask)
    assert np.all(out.hu[:, mask] == -3024 - 1024)
    np.testing.assert_array_equal(out.hu[:, ~mask], vol.hu[:, ~mask])
    assert any("padding" in n for n in out.notes)


def test_padding_that_differs_between_slices_gives_no_mask(tmp_path):
    vol = _volume(nz=3)
    vol.hu[1, 0, 0] = -3024 - 1024  # stored -3024 only on slice 1
    _write(vol, tmp_path, padding_value=-3024)
    out = load_series(_only(tmp_path))
    assert out.padding_mask is None
    assert any("different pixels on different slices" in n for n in out.notes)


def test_enhanced_ct_multiframe_oblique(tmp_path):
    vol = _volume(nz=4)
    c, s = np.cos(0.4), np.sin(0.4)
    vol.affine[:3, 1] = 0.75 * np.array([0.0, c, s])
    vol.affine[:3, 0] = 2.0 * np.cross([1.0, 0, 0], [0.0, c, s])
    write_enhanced_ct(vol, tmp_path / "enhanced.dcm", series_description="enh", per_frame_rescale=True)
    out = load_series(_only(tmp_path))
    np.testing.assert_array_equal(out.hu, vol.hu)
    np.testing.assert_allclose(out.affine, vol.affine, atol=1e-6)


def test_enhanced_ct_frames_out_of_order_are_sorted_by_position(tmp_path):
    vol = _volume(nz=4)
    path = write_enhanced_ct(vol, tmp_path / "enh.dcm", series_description="enh")
    ds = pydicom.dcmread(path)
    frames = ds.pixel_array[[2, 0, 3, 1]]
    items = list(ds.PerFrameFunctionalGroupsSequence)
    ds.PerFrameFunctionalGroupsSequence = [items[i] for i in (2, 0, 3, 1)]
    ds.PixelData = frames.tobytes()
    ds.save_as(path)
    np.testing.assert_array_equal(load_series(_only(tmp_path)).hu, vol.hu)


@pytest.mark.parametrize("syntax", [RLELossless, JPEG2000Lossless])
def test_compressed_series_decode_to_the_same_hu(tmp_path, syntax):
    vol = _volume(nz=2, ny=64, nx=64)
    for p in _write(vol, tmp_path):
        ds = pydicom.dcmread(p)
        ds.compress(syntax)
        ds.save_as(p)
    np.testing.assert_array_equal(load_series(_only(tmp_path)).hu, vol.hu)


def test_decoder_missing_names_the_package(tmp_path, monkeypatch):
    vol = _volume(nz=2, ny=64, nx=64)
    for p in _write(vol, tmp_path):
        ds = pydicom.dcmread(p)
        ds.compress(JPEG2000Lossless)
        ds.save_as(p)

    class Unavailable:
        is_available = False

    monkeypatch.setattr(pydicom.pixels, "get_decoder", lambda uid: Unavailable())
    with pytest.raises(DecoderMissingError, match="no decoder installed: install pylibjpeg and pylibjpeg-openjpeg"):
        load_series(_only(tmp_path))


def test_transfer_syntax_without_any_decoder_is_decoder_missing(tmp_path):
    """A private (vendor) transfer syntax that no pydicom decoder knows."""
    paths = _write(_volume(nz=1), tmp_path)
    ds = pydicom.dcmread(paths[0])
    private_syntax = "1.2.826.0.1.3680043.8.498.77"
    ds.file_meta.TransferSyntaxUID = private_syntax
    ds.PixelData = pydicom.encaps.encapsulate([b"\x00" * 16])
    ds["PixelData"].VR = "OB"
    ds.save_as(paths[0], implicit_vr=False, little_endian=True, enforce_file_format=True)
    with pytest.raises(DecoderMissingError, match=private_syntax.replace(".", r"\.")):
        load_series(_only(tmp_path))


# ------------------------------------------------------------------ metadata and paths
def test_metadata_is_the_safe_subset_and_identifiers_only_on_request(tmp_path):
    _write(_volume(nz=2), tmp_path, convolution_kernel="SOFT-B", kvp=100.0, series_number=7,
           patient_name="INVENTED^PERSON", patient_id="ID-42")
    src = _only(tmp_path)
    out = load_series(src)
    assert out.metadata["convolution_kernel"] == "SOFT-B"
    assert out.metadata["kvp"] == 100.0 and out.metadata["series_number"] == 7
    assert out.metadata["slice_thickness_mm"] == 2.0 and out.metadata["modality"] == "CT"
    assert out.identifiers == {}
    assert "INVENTED^PERSON" not in repr(out.metadata)
    ids = load_series(src, include_identifiers=True).identifiers
    assert ids["patient_name"] == "INVENTED^PERSON" and ids["patient_id"] == "ID-42"


def test_load_path_warns_about_a_bad_series_and_returns_the_good_one(tmp_path):
    vol = _volume(nz=3)
    _write(vol, tmp_path / "good")
    shutil.copy(get_testdata_file("MR_small.dcm"), tmp_path / "mr.dcm")
    with pytest.warns(UserWarning, match="not CT"):
        vols = load_path(tmp_path)
    assert len(vols) == 1
    np.testing.assert_array_equal(vols[0].hu, vol.hu)


def test_load_path_raises_when_nothing_loads(tmp_path):
    shutil.copy(get_testdata_file("MR_small.dcm"), tmp_path / "mr.dcm")
    with pytest.raises(NotCTError):
        load_path(tmp_path)
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(UnreadableFileError, match="no DICOM series"):
        load_path(empty)


def test_padding_only_on_later_slices_gives_no_mask(tmp_path):
    vol = _volume(nz=3)
    vol.hu[2, 1, 1] = -3024 - 1024  # slices 0 and 1 hold no padded pixel
    _write(vol, tmp_path, padding_value=-3024)
    out = load_series(_only(tmp_path))
    assert out.padding_mask is None
    assert any("different pixels on different slices" in n for n in out.notes)


def test_discovery_reads_headers_only(tmp_path, monkeypatch):
    """Every read in discover() stops before the pixels; a 60000^2 header is no problem there."""
    paths = _write(_volume(nz=2), tmp_path / "nested" / "deeper")
    _edit(paths[0], Rows=60000, Columns=60000)
    (tmp_path / "DICOMDIR").write_bytes(b"")
    calls = []
    real = pydicom.dcmread

    def spy(*args, **kwargs):
        calls.append(kwargs.get("stop_before_pixels"))
        return real(*args, **kwargs)

    monkeypatch.setattr(pydicom, "dcmread", spy)
    found = discover([tmp_path])
    assert calls and all(calls)
    assert len(found.series) == 1 and len(found.series[0].files) == 2 and not found.problems


def test_missing_input_is_a_problem(tmp_path):
    found = discover([tmp_path / "nowhere"])
    assert not found.series
    assert isinstance(found.problems[0].error, UnreadableFileError)
    assert "no such file or folder" in str(found.problems[0].error)
