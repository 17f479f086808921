"""The panel on the committed demo DICOM series, as a physicist would look at it (run under Xvfb).

The series come from the invented demo scenario (sample_volumes/fernhollow/, see its
README for where each structure is). Screenshots go to test-artifacts/ for a person to
look at; the assertions check what a screenshot cannot: that overlays sit where the
scenario put things, that the caution stays visible and that the table gives units.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from napari.layers import Labels, Shapes

from reconaudit.checker import SAFETY_NOTICE
from reconaudit.plugin._layers import ROLE_KEY
from reconaudit.plugin._reader import VOLUME_KEY, read_ct
from reconaudit.plugin._widget import AuditBench

ROOT = Path(__file__).resolve().parents[2]
SERIES = ROOT / "sample_volumes" / "fernhollow" / "20240611"
ARTIFACTS = ROOT / "test-artifacts"
TIMEOUT_MS = 300_000


def open_series(make_napari_viewer, name: str):
    viewer = make_napari_viewer(show=True)  # shown, so widget visibility means something
    viewer.window._qt_window.resize(1600, 1000)
    for data, kwargs, _ in read_ct(str(SERIES / name)):
        viewer.add_image(data, **kwargs)
    panel = AuditBench(viewer)
    viewer.window.add_dock_widget(panel, name="Reconstruction audit bench", area="right")
    return viewer, panel


def run(qtbot, panel: AuditBench, names: list[str]) -> None:
    for n, cb in panel.check_boxes.items():
        cb.value = n in names
    assert panel.start_run() is not None
    qtbot.waitUntil(lambda: panel.worker is None, timeout=TIMEOUT_MS)
    assert panel.outcome is not None


def overlay(viewer, analysis: str, role: str):
    found = [lay for lay in viewer.layers if lay.metadata.get(ROLE_KEY) == role and lay.metadata.get("reconaudit_analysis") == analysis]
    assert len(found) == 1
    return found[0]


def screenshot(viewer, qtbot, name: str) -> np.ndarray:
    qtbot.wait(200)
    viewer.reset_view()
    qtbot.wait(200)
    ARTIFACTS.mkdir(exist_ok=True)
    shot = viewer.screenshot(str(ARTIFACTS / name), canvas_only=False)
    assert (ARTIFACTS / name).exists() and shot[..., :3].std() > 10
    return shot


def caution_is_visible(panel: AuditBench) -> bool:
    from qtpy.QtWidgets import QLabel

    label = next(w for w in panel.findChildren(QLabel) if SAFETY_NOTICE in w.text())
    return label.isVisible() and not label.visibleRegion().isEmpty()


def test_air_structure_series(make_napari_viewer, qtbot):
    """The +30 HU structure documented at LPS x = +45, y = -118 mm (slices 4-9) is labelled and flagged."""
    viewer, panel = open_series(make_napari_viewer, "torso_air_structure")
    run(qtbot, panel, ["air"])
    image = viewer.layers[panel.image_choice.value]
    volume = image.metadata[VOLUME_KEY]
    labels = overlay(viewer, "air", "labels")
    assert isinstance(labels, Labels)
    assert tuple(labels.scale) == pytest.approx(tuple(image.scale))
    assert tuple(labels.translate) == pytest.approx(tuple(image.translate))
    z_mid = 6.5 * volume.spacing_mm[0] + volume.affine[2, 3]
    vox = np.round(volume.patient_to_index([45.0, -118.0, z_mid])).astype(int)
    lid = int(np.asarray(labels.data)[tuple(vox)])
    assert lid > 0
    flagged = {int(s["id"]) for s in panel.outcome.analysis.results["air"].record["structures"] if s.get("flagged")}
    assert lid in flagged
    row = next(i for i, r in enumerate(panel._rows) if r.item == f"structure {lid}")
    panel.go_to_row(row)
    assert 4 <= panel.current_slice(image) <= 9
    assert panel._rows[row].unit == "voxels"
    assert all(r.unit for r in panel._rows if r.item in ("noise", "mean"))
    panel.apply_window("air")
    assert caution_is_visible(panel)
    screenshot(viewer, qtbot, "demo_torso_air_structure.png")


def test_limited_angle_series(make_napari_viewer, qtbot):
    """Streak lines lie on the image, one summary row per slice with lines, curves labelled."""
    viewer, panel = open_series(make_napari_viewer, "torso_limited_angle")
    run(qtbot, panel, ["streaks"])
    image = viewer.layers[panel.image_choice.value]
    lines = overlay(viewer, "streaks", "segments")
    assert isinstance(lines, Shapes) and len(lines.data) > 0
    assert tuple(lines.scale) == pytest.approx(tuple(image.scale))
    vertices = np.concatenate([np.asarray(d) for d in lines.data])
    shape = np.array(image.data.shape)
    assert np.all(vertices >= -0.5) and np.all(vertices <= shape - 0.5)  # inside the image
    line_slices = {int(round(d[:, 0].mean())) for d in map(np.asarray, lines.data)}
    rows = [r for r in panel._rows if r.analysis == "streaks" and r.item == "lines"]
    assert {r.slice_index for r in rows} == line_slices
    panel.tabs.setCurrentIndex(1)
    for title in ("Streak index by slice", "Streak orientation"):
        panel.plot_choice.value = title
        ax = panel.figure.axes[0]
        assert ax.get_title()
        if title == "Streak index by slice":
            assert "slice" in ax.get_xlabel() and ax.get_ylabel()
            assert any("tolerance" in t.get_text() for t in ax.get_legend().get_texts())
    assert caution_is_visible(panel)
    busiest = max(line_slices, key=lambda z: sum(int(round(np.asarray(d)[:, 0].mean())) == z for d in lines.data))
    viewer.dims.set_current_step(0, busiest)  # the picture shows a slice with streak lines
    assert panel.current_slice(image) == busiest
    screenshot(viewer, qtbot, "demo_torso_limited_angle.png")
