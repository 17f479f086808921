"""The audit bench panel end to end in a real napari viewer (run under Xvfb)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from napari.layers import Labels, Points, Shapes

import reconaudit.plugin._widget as widget_mod
from reconaudit.checker import SAFETY_NOTICE
from reconaudit.plugin._layers import ROLE_KEY
from reconaudit.plugin._reader import volume_layer_data
from reconaudit.plugin._widget import SCOPE_SLICE, AuditBench

from plugin_phantom import BLOB_ZYX, ORIGIN_LPS, ROD_YX, SPACING

ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
TIMEOUT_MS = 180_000


@pytest.fixture
def bench(make_napari_viewer, phantom):
    viewer = make_napari_viewer()
    data, kwargs, _ = volume_layer_data(phantom, name="phantom P1")
    viewer.add_image(data, **kwargs)
    panel = AuditBench(viewer)
    viewer.window.add_dock_widget(panel, name="Reconstruction audit bench", area="right")
    return panel


def choose(panel: AuditBench, names: list[str]) -> None:
    for n, cb in panel.check_boxes.items():
        cb.value = n in names


def run_and_wait(qtbot, panel: AuditBench) -> None:
    worker = panel.start_run()
    assert worker is not None
    qtbot.waitUntil(lambda: panel.worker is None, timeout=TIMEOUT_MS)
    assert panel.outcome is not None


def layers_with(panel: AuditBench, analysis: str, role: str) -> list:
    return [lay for lay in panel.viewer.layers
            if lay.metadata.get(ROLE_KEY) == role and lay.metadata.get("reconaudit_analysis") == analysis]


def blob_world_mm() -> np.ndarray:
    """The blob's centre in world (z, y, x) mm = LPS (z, y, x) for this axial stack."""
    return np.array(BLOB_ZYX) * np.array(SPACING) + np.array(ORIGIN_LPS[::-1])


def label_world_centroid(layer: Labels) -> np.ndarray:
    idx = np.argwhere(np.asarray(layer.data) > 0).mean(axis=0)
    return np.asarray(layer.data_to_world(idx), dtype=float)


def test_caution_and_checks_are_shown(bench):
    texts = [w.text() for w in bench.findChildren(widget_mod.QLabel)]
    assert any(SAFETY_NOTICE in t for t in texts)
    assert set(bench.check_boxes) == set(widget_mod._analyses.available())


def test_air_structure_lands_on_the_blob(bench, qtbot):
    choose(bench, ["air"])
    run_and_wait(qtbot, bench)
    labels = layers_with(bench, "air", "labels")
    assert len(labels) == 1 and isinstance(labels[0], Labels)
    layer = labels[0]
    image = bench.viewer.layers["phantom P1"]
    assert tuple(layer.scale) == pytest.approx(tuple(image.scale))
    assert tuple(layer.translate) == pytest.approx(tuple(image.translate))
    assert label_world_centroid(layer) == pytest.approx(blob_world_mm(), abs=1.0)
    rows = [r for r in bench._rows if r.item.startswith("structure")]
    assert rows and rows[0].slice_index == int(BLOB_ZYX[0])


def test_displayed_slice_scope_keeps_the_slice(bench, qtbot):
    image = bench.viewer.layers["phantom P1"]
    z_world = BLOB_ZYX[0] * SPACING[0] + ORIGIN_LPS[2]
    bench.viewer.dims.set_point(0, z_world)
    assert bench.current_slice(image) == int(BLOB_ZYX[0])
    choose(bench, ["air", "streaks"])
    bench.scope.value = SCOPE_SLICE
    run_and_wait(qtbot, bench)
    assert bench.outcome.volume.shape[0] == 1 and bench.outcome.z_offset == int(BLOB_ZYX[0])
    layer = layers_with(bench, "air", "labels")[0]
    assert np.asarray(layer.data).shape[0] == 1
    assert label_world_centroid(layer) == pytest.approx(blob_world_mm(), abs=1.0)


def test_table_click_moves_to_the_structure(bench, qtbot):
    choose(bench, ["air"])
    run_and_wait(qtbot, bench)
    bench.viewer.dims.set_point(0, ORIGIN_LPS[2])  # slice 0
    row = next(i for i, r in enumerate(bench._rows) if r.item.startswith("structure"))
    bench.table.cellClicked.emit(row, 0)
    blob = blob_world_mm()
    assert bench.viewer.dims.point[0] == pytest.approx(blob[0])
    assert tuple(bench.viewer.scene.camera.center[-2:]) == pytest.approx(tuple(blob[1:]), abs=0.6)


def test_moving_a_noise_roi_remeasures_it(bench, qtbot):
    choose(bench, ["nps"])
    run_and_wait(qtbot, bench)
    before = dict(bench.outcome.analysis.results["nps"].record)
    assert before["applicable"] and abs(before["roi_mean_hu"]) < 20  # all ROIs in water
    rois = layers_with(bench, "nps", "rois")
    assert len(rois) == 1 and isinstance(rois[0], Shapes)
    layer = rois[0]
    data = [np.array(d, dtype=float) for d in layer.data]
    first = data[0]
    # move the first ROI into the air above the cylinder (rows 8.., columns 40..)
    shift = np.array([0.0, 8.0 - (first[:, 1].min() + 0.5), 40.0 - (first[:, 2].min() + 0.5)])
    data[0] = first + shift
    old = bench.outcome
    layer.data = data
    qtbot.waitUntil(lambda: bench.outcome is not old and bench.worker is None, timeout=TIMEOUT_MS)
    after = bench.outcome.analysis.results["nps"].record
    assert after["method"] == "user"
    assert bench.outcome.settings["nps"]["rois"][0]["yx0_vox"] == [8, 40]
    # one of five equal ROIs now holds air (-1000 HU): the mean moves by about -200 HU
    assert after["roi_mean_hu"] == pytest.approx(before["roi_mean_hu"] - 200.0, abs=25.0)
    assert len(layer.data) == len(data)  # the edited layer was kept, not replaced


def test_adding_a_point_measures_a_new_edge(bench, qtbot):
    choose(bench, ["ttf"])
    bench.set_settings("ttf", {"find_inserts": "never", "skin_edge": "never"})
    run_and_wait(qtbot, bench)
    points = layers_with(bench, "ttf", "points")
    assert len(points) == 1 and isinstance(points[0], Points)
    layer = points[0]
    assert len(layer.data) == 0
    old = bench.outcome
    layer.add([2.0, ROD_YX[0] + 1.0, ROD_YX[1] - 1.0])  # roughly on the rod, as a click would be
    qtbot.waitUntil(lambda: bench.outcome is not old and bench.worker is None, timeout=TIMEOUT_MS)
    record = bench.outcome.analysis.results["ttf"].record
    assert record["applicable"]
    edges = record["edges"]
    assert len(edges) == 1
    rod_lps = np.array([ORIGIN_LPS[0] + ROD_YX[1] * SPACING[2], ORIGIN_LPS[1] + ROD_YX[0] * SPACING[1]])
    assert np.array(edges[0]["center_mm"][:2]) == pytest.approx(rod_lps, abs=1.0)
    assert edges[0]["f50_per_mm"] is not None and edges[0]["f50_per_mm"] > 0
    assert any(r.analysis == "ttf" and "f50" in r.note for r in bench._rows)


def test_bad_settings_are_notified(bench, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_error", lambda msg: shown.append(msg))
    bench._settings_text["air"] = "{not json"
    choose(bench, ["air"])
    assert bench.start_run() is None
    assert shown and "air" in shown[0] and "JSON" in shown[0]


def test_no_image_is_notified(make_napari_viewer, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_error", lambda msg: shown.append(msg))
    panel = AuditBench(make_napari_viewer())
    assert panel.start_run() is None
    assert shown and "image" in shown[0]


def test_stop_cancels_the_run(bench, qtbot, monkeypatch):
    shown = []
    monkeypatch.setattr(widget_mod, "show_info", lambda msg: shown.append(msg))
    choose(bench, list(bench.check_boxes))
    worker = bench.start_run()
    bench.cancel()
    qtbot.waitUntil(lambda: bench.worker is None, timeout=TIMEOUT_MS)
    assert bench.outcome is None
    assert bench.status.text() == "stopped"


def test_curves_and_exports(bench, qtbot, tmp_path):
    choose(bench, ["nps", "streaks", "air", "ttf"])
    run_and_wait(qtbot, bench)
    drawn = {}
    for title in widget_mod.PLOTS:
        bench.plot_choice.value = title
        drawn[title] = len(bench.figure.axes[0].lines)
    assert drawn["Noise power spectrum"] >= 1
    assert drawn["Streak index by slice"] >= 1
    path = bench.export_json(tmp_path / "out" / "results.json")
    import json

    doc = json.loads(path.read_text())
    series = doc["series"][0]
    assert series["nps"]["noise_hu"] == pytest.approx(bench.outcome.analysis.results["nps"].record["noise_hu"])
    assert "DEMO" not in path.read_text()
    worker = bench.export_report(tmp_path / "report")
    with qtbot.waitSignal(worker.finished, timeout=TIMEOUT_MS):
        pass
    assert (tmp_path / "report" / "results.json").exists()


def test_screenshot_of_the_panel(bench, qtbot):
    choose(bench, ["air", "streaks", "nps", "ttf"])
    bench.viewer.window._qt_window.resize(1500, 950)
    run_and_wait(qtbot, bench)
    row = next(i for i, r in enumerate(bench._rows) if r.item.startswith("structure"))
    bench.go_to_row(row)
    bench.apply_window("air")
    qtbot.wait(300)
    ARTIFACTS.mkdir(exist_ok=True)
    out = ARTIFACTS / "plugin_panel.png"
    shot = bench.viewer.screenshot(str(out), canvas_only=False)
    assert out.exists()
    assert shot.shape[0] > 500 and shot.shape[1] > 1000
    assert shot[..., :3].std() > 10  # not a blank window


def test_slice_scope_on_a_layer_from_elsewhere(make_napari_viewer, phantom, qtbot):
    """A plain numpy layer (no reader metadata): the slice run lands on the blob; a re-run reuses the regions."""
    viewer = make_napari_viewer()
    viewer.add_image(phantom.hu.copy(), name="plain P1", scale=SPACING, translate=ORIGIN_LPS[::-1])
    panel = AuditBench(viewer)
    viewer.dims.set_point(0, BLOB_ZYX[0] * SPACING[0] + ORIGIN_LPS[2])
    choose(panel, ["air"])
    panel.scope.value = SCOPE_SLICE
    run_and_wait(qtbot, panel)
    assert panel.outcome.volume.shape[0] == 1 and panel.outcome.z_offset == int(BLOB_ZYX[0])
    layer = layers_with(panel, "air", "labels")[0]
    assert label_world_centroid(layer) == pytest.approx(blob_world_mm(), abs=1.0)
    run_and_wait(qtbot, panel)
    assert panel.regions_cache.hits == 1
