"""The reader on series written by the project's DICOM writer and on pydicom's CT file."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.errors import ReconauditError
from reconaudit.checker.volume import Volume
from reconaudit.plugin._reader import VOLUME_KEY, napari_get_reader, read_ct

from plugin_phantom import ORIGIN_LPS, SPACING, make_phantom


@pytest.fixture(scope="module")
def series_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("ct") / "series_a"
    write_ct_series(make_phantom(), folder, series_description="phantom P1 soft", uid_seed="plugin-test-a",
                    padding_value=-3024)
    return folder


def _single_image(layers):
    assert len(layers) == 1
    data, kwargs, kind = layers[0]
    assert kind == "image"
    return data, kwargs


def test_folder_gives_one_hu_layer_in_mm(series_dir):
    reader = napari_get_reader(str(series_dir))
    assert callable(reader)
    data, kw = _single_image(reader(str(series_dir)))
    original = make_phantom()
    assert data.shape == original.shape
    inside = ~original.padding_mask
    # int16 storage with slope 1 rounds to whole HU
    assert np.abs(data[:, inside] - original.hu[:, inside]).max() <= 0.51
    assert kw["scale"] == pytest.approx(SPACING)
    assert kw["translate"] == pytest.approx(ORIGIN_LPS[::-1])
    assert kw["contrast_limits"] == pytest.approx((-160.0, 240.0))  # soft tissue W 400 L 40
    meta = kw["metadata"]
    assert isinstance(meta[VOLUME_KEY], Volume)
    text = repr({k: v for k, v in meta.items() if k != VOLUME_KEY})
    assert "DEMO^PHANTOM" not in text and "DEMO-0001" not in text  # no patient identifiers
    # the invented PatientName "DEMO^PHANTOM" has the component "PHANTOM", which the
    # description repeats: free text is cleared of name components (checker/identifiers.py)
    assert meta["series_description"] == "[withheld] P1 soft"


def test_single_file_of_a_series(series_dir):
    one = sorted(series_dir.iterdir())[3]
    reader = napari_get_reader(str(one))
    assert callable(reader)
    layers = reader(str(one))
    assert len(layers) >= 1
    data, kw, _ = layers[0]
    assert data.ndim == 3
    assert kw["scale"][1:] == pytest.approx(SPACING[1:])


def test_two_series_in_one_folder_give_two_layers(series_dir, tmp_path):
    both = tmp_path / "both"
    shutil.copytree(series_dir, both / "a")
    second = make_phantom(seed=11)
    write_ct_series(second, both / "b", series_description="phantom P1 sharp", series_number=2,
                    uid_seed="plugin-test-b", padding_value=-3024)
    layers = read_ct(str(both))
    assert len(layers) == 2
    names = sorted(kw["name"] for _, kw, _ in layers)
    assert len(set(names)) == 2
    assert any("sharp" in n for n in names) and any("soft" in n for n in names)


def test_bad_file_names_the_file(tmp_path):
    bad = tmp_path / "broken.dcm"
    bad.write_bytes(b"\0" * 128 + b"DICM" + b"garbage" * 10)
    reader = napari_get_reader(str(bad))
    assert callable(reader)
    with pytest.raises(ReconauditError) as info:
        reader(str(bad))
    assert "broken.dcm" in str(info.value)


def test_unrelated_file_is_not_claimed(tmp_path):
    txt = tmp_path / "notes.txt"
    txt.write_text("not an image")
    assert napari_get_reader(str(txt)) is None


def test_pydicom_ct_small_geometry():
    """pydicom's shipped CT test file CT_small.dcm (pydicom.data.get_testdata_file): the
    layer's scale is PixelSpacing (row, column) and its translate is ImagePositionPatient
    in (z, y, x) order, as DICOM PS3.3 C.7.6.2 defines them for an axial image."""
    import pydicom
    from pydicom.data import get_testdata_file

    path = get_testdata_file("CT_small.dcm")
    ds = pydicom.dcmread(path)
    layers = read_ct(path)
    data, kw, _ = layers[0]
    assert data.shape[-2:] == (ds.Rows, ds.Columns)
    row, col = (float(v) for v in ds.PixelSpacing)
    assert kw["scale"][1:] == pytest.approx((row, col))
    x, y, z = (float(v) for v in ds.ImagePositionPatient)
    assert kw["translate"] == pytest.approx((z, y, x))
    expected = ds.pixel_array.astype(float) * float(ds.RescaleSlope) + float(ds.RescaleIntercept)
    assert np.allclose(data[0], expected)
