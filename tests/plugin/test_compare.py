"""Comparing two image layers in the panel, end to end in a real napari viewer (run under Xvfb).

The pair is invented (see plugin_phantom.py): the test phantom twice with independent
noise, a +60 HU lesion only in the reference; a second test image whose anterior body
surface bulges out by 6 mm.
"""
from __future__ import annotations

import numpy as np
import pytest
from napari.layers import Labels, Points

import reconaudit.plugin._widget as widget_mod
from matplotlib.colors import to_rgb

from reconaudit.plugin._compare import COLOUR_ONLY_IN_REFERENCE, COMPARE, surface_summary
from reconaudit.plugin._layers import ROLE_KEY
from reconaudit.plugin._reader import volume_layer_data
from reconaudit.plugin._widget import AuditBench

from plugin_phantom import LESION_ZYX, NX, NY, NZ, ORIGIN_LPS, SPACING, make_pair

TIMEOUT_MS = 180_000
BULGE_MM = 6.0


def bulged(volume):
    """A copy of ``volume`` whose body surface moves out by BULGE_MM over the anterior quarter."""
    hu = volume.hu.copy()
    y, x = np.mgrid[0:NY, 0:NX]
    r = np.hypot(y - 72.0, x - 64.0)
    anterior = (y < 72.0 - 28.0) & (r > 40.0) & (r <= 40.0 + BULGE_MM)
    rng = np.random.default_rng(5)
    hu[:, anterior] = rng.normal(0.0, 12.0, (NZ, int(anterior.sum()))).astype(np.float32)
    out = type(volume)(hu=hu, spacing_mm=volume.spacing_mm, affine=volume.affine.copy(), series_uid=volume.series_uid + ".9",
                       metadata=dict(volume.metadata, series_description="test phantom P1, bulged"),
                       padding_mask=volume.padding_mask, source="bulged test phantom")
    return out, anterior


@pytest.fixture
def pair_bench(make_napari_viewer):
    viewer = make_napari_viewer()
    test, reference = make_pair()
    for vol, name in ((reference, "reference P1"), (test, "test P1")):
        data, kwargs, _ = volume_layer_data(vol, name=name)
        viewer.add_image(data, **kwargs)
    panel = AuditBench(viewer)
    viewer.window.add_dock_widget(panel, name="Reconstruction audit bench", area="right")
    panel.test_choice.value = "test P1"
    panel.reference_choice.value = "reference P1"
    return panel


def compare_and_wait(qtbot, panel: AuditBench) -> None:
    worker = panel.start_comparison()
    assert worker is not None
    qtbot.waitUntil(lambda: panel.worker is None, timeout=TIMEOUT_MS)
    assert panel.comparison is not None


def compare_layers(panel: AuditBench, role: str) -> list:
    return [lay for lay in panel.viewer.layers
            if lay.metadata.get("reconaudit_analysis") == COMPARE and lay.metadata.get(ROLE_KEY) == role]


def lesion_world_mm() -> np.ndarray:
    return np.array(LESION_ZYX) * np.array(SPACING) + np.array(ORIGIN_LPS[::-1])


def test_lesion_only_in_the_reference_is_labelled_on_it(pair_bench, qtbot):
    compare_and_wait(qtbot, pair_bench)
    record = pair_bench.comparison.result.record
    assert record["only_in_test"] == []
    assert len(record["only_in_reference"]) == 1
    labels = compare_layers(pair_bench, "labels")
    assert len(labels) == 1 and isinstance(labels[0], Labels)
    layer = labels[0]
    reference = pair_bench.viewer.layers["reference P1"]
    assert tuple(layer.scale) == pytest.approx(tuple(reference.scale))
    assert tuple(layer.translate) == pytest.approx(tuple(reference.translate))
    data = np.asarray(layer.data)
    lid = record["only_in_reference"][0]["id"]
    assert data[tuple(int(v) for v in LESION_ZYX)] == lid  # the label covers the lesion's centre
    centroid = np.asarray(layer.data_to_world(np.argwhere(data == lid).mean(axis=0)), float)
    # within one voxel of the true centre on every axis (the lesion is cut by the last slice in z)
    assert np.all(np.abs(centroid - lesion_world_mm()) <= np.array(SPACING))
    # its colour is the 'only in the reference' colour, the background transparent
    assert tuple(layer.colormap.map(np.array([lid]))[0][:3]) == pytest.approx(to_rgb(COLOUR_ONLY_IN_REFERENCE), abs=0.02)
    points = compare_layers(pair_bench, "points")
    assert len(points) == 1 and isinstance(points[0], Points)
    assert np.asarray(points[0].data)[0] == pytest.approx(record["only_in_reference"][0]["centroid_zyx_vox"])


def test_difference_row_goes_to_the_lesion(pair_bench, qtbot):
    compare_and_wait(qtbot, pair_bench)
    pair_bench.viewer.dims.set_point(0, ORIGIN_LPS[2])  # slice 0
    row = next(i for i, r in enumerate(pair_bench._rows) if r.item.startswith("difference "))
    entry = pair_bench._rows[row]
    assert entry.unit == "mm³" and entry.severity == "review"  # the finding colours its row
    assert "only in the reference" in entry.note
    pair_bench.table.cellClicked.emit(row, 0)
    world = pair_bench.comparison.geometry.voxel_to_world(np.array(entry.centre_zyx_vox))
    assert pair_bench.viewer.dims.point[0] == pytest.approx(round(entry.centre_zyx_vox[0]) * SPACING[0] + ORIGIN_LPS[2])
    assert tuple(pair_bench.viewer.scene.camera.center[-2:]) == pytest.approx(tuple(world[1:]), abs=0.6)
    assert np.abs(world - lesion_world_mm()).max() <= max(SPACING)


def test_surface_numbers_are_in_the_panel(pair_bench, qtbot):
    compare_and_wait(qtbot, pair_bench)
    rec = pair_bench.comparison.result.record
    text = pair_bench.comparison_summary.text()
    assert text == surface_summary(rec, 3.0, pair_bench.comparison.verdict)
    shift = rec["body_surface_shift_mm"]
    assert f"mean {shift['mean']:+.1f} mm" in text and f"largest {shift['max']:+.1f} mm" in text
    assert "only in the reference: 1" in text
    units = {r.item: r.unit for r in pair_bench._rows if r.analysis == COMPARE}
    assert units["surface shift, largest"] == "mm"
    assert units["surface shift, p95"] == "mm"


def test_displaced_surface_layer_sits_on_the_bulge(make_napari_viewer, qtbot):
    viewer = make_napari_viewer()
    _, reference = make_pair()
    test, anterior = bulged(reference)
    for vol, name in ((reference, "reference P1"), (test, "bulged P1")):
        data, kwargs, _ = volume_layer_data(vol, name=name)
        viewer.add_image(data, **kwargs)
    panel = AuditBench(viewer)
    panel.test_choice.value, panel.reference_choice.value = "bulged P1", "reference P1"
    compare_and_wait(qtbot, panel)
    shift = panel.comparison.result.record["body_surface_shift_mm"]
    assert shift["max"] == pytest.approx(BULGE_MM, abs=1.0)  # outward, about the bulge's height
    surface = [lay for lay in compare_layers(panel, "map") if isinstance(lay, Labels)]
    assert len(surface) == 1
    moved = np.argwhere(np.asarray(surface[0].data) > 0)
    assert moved.size
    # every displaced surface voxel lies on the bulge's band or the reference surface below it
    y, x = moved[:, 1], moved[:, 2]
    r = np.hypot(y - 72.0, x - 64.0)
    assert np.all(y < 72.0 - 28.0 + 2) and np.all((r > 38.0) & (r <= 40.0 + BULGE_MM + 1.0))
    assert any(r.severity == "review" and r.item == "surface shift, largest" for r in panel._rows)


def test_same_image_twice_is_refused(pair_bench, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_error", lambda msg: shown.append(msg))
    pair_bench.test_choice.value = "reference P1"
    assert pair_bench.start_comparison() is None
    assert shown and "same image" in shown[0]


def test_bad_comparison_settings_are_notified(pair_bench, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_error", lambda msg: shown.append(msg))
    pair_bench.compare_settings_edit.setPlainText('{"seed_sigma": 4, ')
    assert pair_bench.start_comparison() is None
    assert shown and "JSON" in shown[0]


def test_unknown_comparison_setting_is_reported(pair_bench, qtbot, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_error", lambda msg: shown.append(msg))
    pair_bench.set_comparison_settings({"no_such_key": 1})
    worker = pair_bench.start_comparison()
    assert worker is not None
    qtbot.waitUntil(lambda: pair_bench.worker is None, timeout=TIMEOUT_MS)
    assert pair_bench.comparison is None
    assert shown and "no_such_key" in shown[0]


def test_a_check_run_keeps_the_comparison_layers(pair_bench, qtbot):
    compare_and_wait(qtbot, pair_bench)
    n_compare = len([lay for lay in pair_bench.viewer.layers if lay.metadata.get("reconaudit_analysis") == COMPARE])
    pair_bench.image_choice.value = "reference P1"
    for n, cb in pair_bench.check_boxes.items():
        cb.value = n == "air"
    assert pair_bench.start_run() is not None
    qtbot.waitUntil(lambda: pair_bench.worker is None, timeout=TIMEOUT_MS)
    assert len([lay for lay in pair_bench.viewer.layers if lay.metadata.get("reconaudit_analysis") == COMPARE]) == n_compare
    analyses = {r.analysis for r in pair_bench._rows}
    assert {"air", COMPARE} <= analyses
