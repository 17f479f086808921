"""The reconstruction audit bench: one dock panel that runs the checks and shows the results.

The panel never computes on the GUI thread: every run and every re-measurement is a
napari thread worker (a generator yielding progress) around
:func:`reconaudit.checker.pipeline.analyse_volume`; the GUI thread only turns finished
results into layers, table rows and curves.
"""
from __future__ import annotations

import json
import threading
from pathlib import Path
from typing import Any, Callable

import numpy as np
from magicgui import widgets as mg
from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
from matplotlib.figure import Figure
from napari.layers import Image, Points, Shapes
from napari.qt.threading import thread_worker
from napari.utils.notifications import show_error, show_info, show_warning
from qtpy.QtCore import Qt, QTimer
from qtpy.QtWidgets import (
    QAbstractItemView,
    QFileDialog,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPlainTextEdit,
    QProgressBar,
    QPushButton,
    QSizePolicy,
    QTableWidget,
    QTableWidgetItem,
    QTabWidget,
    QVBoxLayout,
    QWidget,
)

from reconaudit.checker import SAFETY_NOTICE
from reconaudit.checker import analyses as _analyses
from reconaudit.checker.errors import ReconauditError
from reconaudit.checker.pipeline import Cancelled
from reconaudit.checker.volume import Volume

from ._compare import COMPARE, ComparisonOutcome, run_comparison, surface_summary
from ._export import write_html_report, write_results_json
from ._geometry import LayerGeometry, layer_geometry
from ._jobs import RegionsCache, RunOutcome, remeasure, run_checks
from ._layers import (
    EDITABLE,
    OFFSET_KEY,
    ROLE_KEY,
    SOURCE_KEY,
    TableRow,
    points_to_edge_centres,
    rectangles_to_nps_rois,
)
from ._plots import PLOTS
from ._presets import WINDOW_PRESETS, preset_limits
from ._reader import VOLUME_KEY, volume_from_layer

SCOPE_VOLUME = "whole volume"
SCOPE_SLICE = "displayed slice"
TABLE_COLUMNS = ("Check", "Slice", "Value", "Unit", "What")
EDIT_DELAY_MS = 300
#: longest text shown in a table cell; the full text is in the tooltip and the detail line
CELL_CHARS = 150
_SEVERITY_COLOURS = {"fail": "#ffb3b3", "review": "#ffe3a3"}


def module_defaults(name: str) -> dict[str, Any]:
    """The analysis module's DEFAULTS (empty if it has none); also the comparison's."""
    import importlib

    path = "reconaudit.checker.analyses.compare" if name == COMPARE else _analyses.REGISTRY[name]
    module = importlib.import_module(path)
    return dict(getattr(module, "DEFAULTS", {}) or {})


def parse_settings(text: str, name: str) -> dict[str, Any]:
    """The JSON object typed in the settings box, or a ReconauditError naming the problem."""
    from reconaudit.checker.errors import ProfileError

    try:
        value = json.loads(text) if text.strip() else {}
    except json.JSONDecodeError as exc:
        raise ProfileError(f"settings of {name!r} are not valid JSON: {exc.msg} (line {exc.lineno}, column {exc.colno})") from None
    if not isinstance(value, dict):
        raise ProfileError(f"settings of {name!r} must be a JSON object {{...}}, got {type(value).__name__}")
    return value


class AuditBench(QWidget):
    """Dock panel: choose an image and checks, run them, read and revisit the results."""

    def __init__(self, napari_viewer: Any, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.viewer = napari_viewer
        self.outcome: RunOutcome | None = None
        self.comparison: ComparisonOutcome | None = None
        self.regions_cache = RegionsCache(size=4)  # regions of recently analysed volumes/slices
        self.worker: Any = None
        self._stop = threading.Event()
        self._rows: list[TableRow] = []
        self._settings_text: dict[str, str] = {}
        self._pending_edit: str | None = None
        self._edited_index: int | None = None
        self._muted_layers: set[int] = set()
        self._edit_timer = QTimer(self)
        self._edit_timer.setSingleShot(True)
        self._edit_timer.timeout.connect(self._remeasure_pending)
        self._build()
        self.viewer.layers.events.inserted.connect(self._refresh_images)
        self.viewer.layers.events.removed.connect(self._refresh_images)
        self._refresh_images()

    # ------------------------------------------------------------------ building
    def _build(self) -> None:
        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        layout.setSpacing(6)
        layout.addWidget(self._caution())
        self.task_tabs = QTabWidget()
        self.task_tabs.addTab(self._check_page(), "Check one image")
        self.task_tabs.addTab(self._compare_box(), "Compare two images")
        layout.addWidget(self.task_tabs)
        layout.addWidget(self._run_box())
        layout.addWidget(self._results_tabs(), stretch=1)
        layout.addLayout(self._export_row())
        self.setMinimumWidth(420)

    def _check_page(self) -> QWidget:
        page = QWidget()
        lay = QVBoxLayout(page)
        lay.setContentsMargins(2, 4, 2, 2)
        lay.addWidget(self._source_box())
        lay.addWidget(self._checks_box())
        return page

    def _compare_box(self) -> QWidget:
        """Pick a test and a reference image; the summary of the last comparison below."""
        page = QWidget()
        lay = QVBoxLayout(page)
        lay.setContentsMargins(2, 4, 2, 2)
        intro = QLabel("Compares a reconstruction under test with a reference reconstruction of the same scan "
                       "(for example filtered back-projection). Overlays lie on the reference's grid.")
        intro.setWordWrap(True)
        lay.addWidget(intro)
        self.test_choice = mg.ComboBox(label="test", choices=self._image_layer_names)
        self.reference_choice = mg.ComboBox(label="reference", choices=self._image_layer_names)
        for text, combo in (("test:", self.test_choice), ("reference:", self.reference_choice)):
            row = QHBoxLayout()
            label = QLabel(text)
            label.setMinimumWidth(70)
            row.addWidget(label)
            row.addWidget(combo.native, stretch=1)
            lay.addLayout(row)
        self.compare_settings_edit = QPlainTextEdit(json.dumps(module_defaults(COMPARE), indent=1))
        self.compare_settings_edit.setToolTip("JSON object; keys override the comparison's defaults")
        self.compare_settings_edit.setMinimumHeight(60)
        self.compare_settings_edit.setMaximumHeight(100)
        lay.addWidget(QLabel("comparison settings:"))
        lay.addWidget(self.compare_settings_edit)
        row = QHBoxLayout()
        self.compare_button = QPushButton("Compare")
        self.compare_button.setToolTip("run the comparison in the background; overlays and rows appear when done")
        self.compare_button.clicked.connect(self.start_comparison)
        row.addWidget(self.compare_button)
        row.addStretch(1)
        lay.addLayout(row)
        self.comparison_summary = QLabel("No comparison yet.")
        self.comparison_summary.setWordWrap(True)
        self.comparison_summary.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.comparison_summary.setObjectName("reconaudit_comparison_summary")
        lay.addWidget(self.comparison_summary)
        lay.addStretch(1)
        return page

    def _caution(self) -> QLabel:
        label = QLabel("⚠ " + SAFETY_NOTICE)
        label.setWordWrap(True)
        label.setObjectName("reconaudit_caution")
        label.setStyleSheet(
            "QLabel#reconaudit_caution { background: #4a3b12; color: #ffe9a8; border: 1px solid #c9a227;"
            " border-radius: 3px; padding: 4px; font-size: 11px; }"
        )
        return label

    def _source_box(self) -> QGroupBox:
        box = QGroupBox("Image under review")
        lay = QVBoxLayout(box)
        self.image_choice = mg.ComboBox(label="image", choices=self._image_layer_names)
        self.image_choice.changed.connect(self._image_changed)
        lay.addWidget(self.image_choice.native)
        row = QHBoxLayout()
        row.addWidget(QLabel("window:"))
        self.preset_buttons: dict[str, QPushButton] = {}
        for name in WINDOW_PRESETS:
            w, lv = WINDOW_PRESETS[name]
            button = QPushButton(name)
            button.setToolTip(f"W {w:g} / L {lv:g} HU (common practice, from memory)")
            button.clicked.connect(lambda _=False, n=name: self.apply_window(n))
            row.addWidget(button)
            self.preset_buttons[name] = button
        lay.addLayout(row)
        return box

    def _checks_box(self) -> QGroupBox:
        box = QGroupBox("Checks")
        lay = QVBoxLayout(box)
        self.names = _analyses.available()
        row = QHBoxLayout()
        self.check_boxes: dict[str, mg.CheckBox] = {}
        for name in self.names:
            cb = mg.CheckBox(text=name, value=True)
            self.check_boxes[name] = cb
            row.addWidget(cb.native)
        if not self.names:
            row.addWidget(QLabel("no analysis is installed"))
        row.addStretch(1)
        lay.addLayout(row)
        self.scope = mg.RadioButtons(choices=[SCOPE_VOLUME, SCOPE_SLICE], value=SCOPE_VOLUME, orientation="horizontal", label="scope")
        scope_row = QHBoxLayout()
        scope_row.addWidget(QLabel("scope:"))
        scope_row.addWidget(self.scope.native)
        scope_row.addStretch(1)
        lay.addLayout(scope_row)
        settings_row = QHBoxLayout()
        self.settings_toggle = QPushButton("settings…")
        self.settings_toggle.setCheckable(True)
        self.settings_toggle.setToolTip("show or hide the settings of each check (JSON)")
        settings_row.addWidget(self.settings_toggle)
        settings_row.addWidget(QLabel("of:"))
        self.settings_choice = mg.ComboBox(choices=self.names or [""])
        self.settings_choice.changed.connect(self._show_settings)
        settings_row.addWidget(self.settings_choice.native, stretch=1)
        reset = QPushButton("defaults")
        reset.setToolTip("put back the analysis module's defaults")
        reset.clicked.connect(self._reset_settings)
        settings_row.addWidget(reset)
        lay.addLayout(settings_row)
        self.settings_edit = QPlainTextEdit()
        self.settings_edit.setToolTip("JSON object; keys override the analysis defaults")
        self.settings_edit.setMinimumHeight(70)
        self.settings_edit.setMaximumHeight(120)
        self.settings_edit.textChanged.connect(self._keep_settings_text)
        lay.addWidget(self.settings_edit)
        self.settings_edit.setVisible(False)
        self.settings_toggle.toggled.connect(self.settings_edit.setVisible)
        self._current_settings_name = self.names[0] if self.names else ""
        self._show_settings()
        return box

    def _run_box(self) -> QWidget:
        box = QWidget()
        lay = QHBoxLayout(box)
        lay.setContentsMargins(0, 0, 0, 0)
        self.run_button = QPushButton("Run checks")
        self.run_button.clicked.connect(self.start_run)
        self.stop_button = QPushButton("Stop")
        self.stop_button.setEnabled(False)
        self.stop_button.clicked.connect(self.cancel)
        self.progress = QProgressBar()
        self.progress.setRange(0, 100)
        self.progress.setValue(0)
        self.status = QLabel("idle")
        self.status.setMinimumWidth(90)
        lay.addWidget(self.run_button)
        lay.addWidget(self.stop_button)
        lay.addWidget(self.progress, stretch=1)
        lay.addWidget(self.status)
        return box

    def _results_tabs(self) -> QTabWidget:
        self.tabs = QTabWidget()
        self.table = QTableWidget(0, len(TABLE_COLUMNS))
        self.table.setHorizontalHeaderLabels(TABLE_COLUMNS)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.setWordWrap(True)
        self.table.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        header = self.table.horizontalHeader()
        modes = (QHeaderView.ResizeMode.ResizeToContents, QHeaderView.ResizeMode.ResizeToContents,
                 QHeaderView.ResizeMode.Interactive, QHeaderView.ResizeMode.ResizeToContents,
                 QHeaderView.ResizeMode.Stretch)
        for col, mode in enumerate(modes):
            header.setSectionResizeMode(col, mode)
        header.resizeSection(2, 80)
        self.table.cellClicked.connect(self.go_to_row)
        self.table.setMinimumHeight(200)
        findings = QWidget()
        flay = QVBoxLayout(findings)
        flay.setContentsMargins(0, 0, 0, 0)
        flay.addWidget(self.table, stretch=1)
        self.detail = QLabel("Click a row to go to its place in the image; its full text shows here.")
        self.detail.setWordWrap(True)
        self.detail.setObjectName("reconaudit_detail")
        self.detail.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.detail.setStyleSheet("QLabel#reconaudit_detail { padding: 3px; }")
        flay.addWidget(self.detail)
        self.tabs.addTab(findings, "Findings and values")
        plots = QWidget()
        play = QVBoxLayout(plots)
        self.plot_choice = mg.ComboBox(choices=list(PLOTS), label="curve")
        self.plot_choice.changed.connect(self.redraw_plot)
        play.addWidget(self.plot_choice.native)
        self.figure = Figure(figsize=(4.2, 3.0), dpi=100, layout="tight")
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.canvas.setMinimumHeight(220)
        play.addWidget(self.canvas, stretch=1)
        self.tabs.addTab(plots, "Curves")
        return self.tabs

    def _export_row(self) -> QHBoxLayout:
        row = QHBoxLayout()
        self.json_button = QPushButton("Save results JSON…")
        self.json_button.clicked.connect(self._ask_json_path)
        self.report_button = QPushButton("Save HTML report…")
        self.report_button.clicked.connect(self._ask_report_dir)
        row.addWidget(self.json_button)
        row.addWidget(self.report_button)
        return row

    # ------------------------------------------------------------------ images and windows
    def _image_layer_names(self, *_: Any) -> list[str]:
        return [layer.name for layer in self.viewer.layers if isinstance(layer, Image) and ROLE_KEY not in layer.metadata]

    def _refresh_images(self, *_: Any) -> None:
        self.image_choice.reset_choices()
        self._image_changed()
        self.test_choice.reset_choices()
        self.reference_choice.reset_choices()
        names = self._image_layer_names()
        if len(names) >= 2 and self.test_choice.value == self.reference_choice.value:
            self.test_choice.value = next(n for n in names if n != self.reference_choice.value)

    def image_layer(self) -> Image | None:
        name = self.image_choice.value
        if name and name in self.viewer.layers:
            layer = self.viewer.layers[name]
            return layer if isinstance(layer, Image) else None
        return None

    def _image_changed(self, *_: Any) -> None:
        layer = self.image_layer()
        if layer is not None and layer.ndim == 3 and self.viewer.dims.ndim == 3:
            axes = layer.metadata.get("reconaudit_geometry", {}).get("world_axes_zyx")
            if axes:
                self.viewer.dims.axis_labels = world_axis_labels(axes)

    def apply_window(self, name: str) -> None:
        """Set the chosen image's contrast limits to the window preset ``name``."""
        layer = self.image_layer()
        if layer is None:
            show_warning("choose an image first")
            return
        layer.contrast_limits = preset_limits(name)

    # ------------------------------------------------------------------ settings
    def _show_settings(self, *_: Any) -> None:
        name = self.settings_choice.value or ""
        self._current_settings_name = name
        if not name:
            self.settings_edit.setPlainText("")
            return
        text = self._settings_text.get(name)
        if text is None:
            text = json.dumps(module_defaults(name), indent=1)
        self.settings_edit.blockSignals(True)
        self.settings_edit.setPlainText(text)
        self.settings_edit.blockSignals(False)

    def _keep_settings_text(self) -> None:
        if self._current_settings_name:
            self._settings_text[self._current_settings_name] = self.settings_edit.toPlainText()

    def _reset_settings(self) -> None:
        self._settings_text.pop(self._current_settings_name, None)
        self._show_settings()

    def settings_for(self, names: list[str]) -> dict[str, dict[str, Any]]:
        """Settings typed in the panel for ``names`` (only keys that differ from DEFAULTS)."""
        out: dict[str, dict[str, Any]] = {}
        for name in names:
            text = self._settings_text.get(name)
            if text is None:
                continue
            given = parse_settings(text, name)
            defaults = module_defaults(name)
            changed = {k: v for k, v in given.items() if k not in defaults or defaults[k] != v}
            if changed:
                out[name] = changed
        return out

    def set_settings(self, name: str, values: dict[str, Any]) -> None:
        """Put ``values`` (over the defaults) into the settings box of analysis ``name``."""
        merged = module_defaults(name)
        merged.update(values)
        self._settings_text[name] = json.dumps(merged, indent=1)
        if self._current_settings_name == name:
            self._show_settings()

    def comparison_settings(self) -> dict[str, Any]:
        """Comparison settings typed in the compare tab (only keys that differ from DEFAULTS)."""
        given = parse_settings(self.compare_settings_edit.toPlainText(), COMPARE)
        defaults = module_defaults(COMPARE)
        return {k: v for k, v in given.items() if k not in defaults or defaults[k] != v}

    def set_comparison_settings(self, values: dict[str, Any]) -> None:
        """Put ``values`` (over the defaults) into the comparison's settings box."""
        merged = module_defaults(COMPARE)
        merged.update(values)
        self.compare_settings_edit.setPlainText(json.dumps(merged, indent=1))

    def chosen_checks(self) -> list[str]:
        return [n for n, cb in self.check_boxes.items() if cb.value]

    # ------------------------------------------------------------------ running
    def current_slice(self, layer: Image) -> int:
        """The image's slice index displayed now."""
        data_pos = layer.world_to_data(self.viewer.dims.point)
        return int(np.clip(round(float(data_pos[-3])), 0, layer.data.shape[-3] - 1))

    def start_run(self) -> Any:
        """Run the chosen checks on the chosen image in a worker; returns the worker (or None)."""
        layer = self.image_layer()
        if layer is None:
            show_error("reconaudit: choose an image layer to check (open a CT series or a sample first)")
            return None
        names = self.chosen_checks()
        if not names:
            show_error("reconaudit: tick at least one check")
            return None
        z = self.current_slice(layer) if self.scope.value == SCOPE_SLICE else None
        from_reader = isinstance(layer.metadata.get(VOLUME_KEY), Volume)
        try:
            # a layer from elsewhere is converted slice-only in slice scope (no whole-volume copy)
            volume = volume_from_layer(layer, z_index=None if from_reader else z)
            settings = self.settings_for(names)
        except ReconauditError as exc:
            show_error(f"reconaudit: {exc}")
            return None
        job = thread_worker(run_checks, start_thread=False, ignore_errors=True)
        if z is not None and not from_reader:
            geometry = layer_geometry(volume).shifted(-z)  # the full layer's geometry
            work = job(volume, names, settings, geometry, layer.name, z_offset=z,
                       regions_cache=self.regions_cache, stop=self._new_stop())
        else:
            work = job(volume, names, settings, layer_geometry(volume), layer.name, z_index=z,
                       regions_cache=self.regions_cache, stop=self._new_stop())
        return self._start(work, "run")

    def _new_stop(self) -> threading.Event:
        self._stop = threading.Event()
        return self._stop

    def _start(self, worker: Any, kind: str, on_returned: Callable[[Any], None] | None = None) -> Any:
        if self.worker is not None:
            show_warning("reconaudit: a check is already running; wait or stop it")
            return None
        self.worker = worker
        worker.yielded.connect(self._on_progress)
        worker.returned.connect(on_returned or self._on_outcome)
        worker.errored.connect(self._on_error)
        worker.finished.connect(self._on_finished)
        self._set_busy(True)
        self.progress.setValue(0)
        self.status.setText("starting")
        worker.start()
        return worker

    def _set_busy(self, busy: bool) -> None:
        self.run_button.setEnabled(not busy)
        self.compare_button.setEnabled(not busy)
        self.stop_button.setEnabled(busy)

    # ------------------------------------------------------------------ comparing
    def start_comparison(self) -> Any:
        """Compare the chosen test image with the chosen reference in a worker (None if refused)."""
        names = self._image_layer_names()
        test_name, ref_name = self.test_choice.value, self.reference_choice.value
        if not test_name or not ref_name or test_name not in names or ref_name not in names:
            show_error("reconaudit: choose a test image and a reference image to compare")
            return None
        if test_name == ref_name:
            show_error("reconaudit: the test and the reference are the same image; choose two different images")
            return None
        try:
            test = volume_from_layer(self.viewer.layers[test_name])
            reference = volume_from_layer(self.viewer.layers[ref_name])
            settings = self.comparison_settings()
        except ReconauditError as exc:
            show_error(f"reconaudit: {exc}")
            return None
        job = thread_worker(run_comparison, start_thread=False, ignore_errors=True)
        worker = job(test, reference, settings, test_name, ref_name, stop=self._new_stop())
        return self._start(worker, "compare", self._on_comparison)

    def _on_comparison(self, outcome: ComparisonOutcome) -> None:
        self.comparison = outcome
        self.status.setText("compared")
        self.progress.setValue(100)
        for lay in [lay for lay in self.viewer.layers if lay.metadata.get("reconaudit_analysis") == COMPARE]:
            self._remove_layer(lay)
        for data, kwargs, kind in outcome.view.layers:
            getattr(self.viewer, f"add_{kind}")(data, **kwargs)
        tolerance = float(outcome.settings.get("surface_shift_tolerance_mm", module_defaults(COMPARE)["surface_shift_tolerance_mm"]))
        self.comparison_summary.setText(surface_summary(outcome.result.record, tolerance, outcome.verdict))
        self.refill_table()

    def cancel(self) -> None:
        """Ask the running worker to stop at the next stage."""
        self._stop.set()
        if self.worker is not None:
            self.worker.quit()
            self.status.setText("stopping")

    def _on_progress(self, value: tuple[str, float]) -> None:
        stage, fraction = value
        self.progress.setValue(int(round(100 * fraction)))
        self.status.setText(stage)

    def _on_error(self, exc: BaseException) -> None:
        if isinstance(exc, Cancelled):
            show_info("reconaudit: checks stopped")
            return
        show_error(f"reconaudit: {exc}")

    def _on_finished(self) -> None:
        self.worker = None
        self._set_busy(False)
        if self._stop.is_set():
            self.status.setText("stopped")
        if self._pending_edit and not self._edit_timer.isActive():
            self._edit_timer.start(EDIT_DELAY_MS)

    def _on_outcome(self, outcome: RunOutcome) -> None:
        self.outcome = outcome
        self.status.setText("done")
        self.progress.setValue(100)
        self.show_layers(outcome)
        self.fill_table(outcome)
        self.redraw_plot()

    # ------------------------------------------------------------------ layers
    def _overlay_layers(self, source: str) -> list[Any]:
        """Overlay layers of one image's check runs (comparison layers are kept apart)."""
        return [lay for lay in self.viewer.layers if lay.metadata.get(SOURCE_KEY) == source and ROLE_KEY in lay.metadata
                and lay.metadata.get("reconaudit_analysis") != COMPARE]

    def show_layers(self, outcome: RunOutcome, only: str | None = None) -> None:
        """Replace the overlay layers of ``outcome.source`` by the outcome's (one analysis if ``only``)."""
        views = {k: v for k, v in outcome.views.items() if only is None or k == only}
        for lay in self._overlay_layers(outcome.source):
            if only is None or lay.metadata.get("reconaudit_analysis") == only:
                self._remove_layer(lay)
        for name, view in views.items():
            for data, kwargs, kind in view.layers:
                layer = getattr(self.viewer, f"add_{kind}")(data, **kwargs)
                self._connect_editable(layer)
            self._ensure_edit_layer(outcome, name)

    def _remove_layer(self, layer: Any) -> None:
        self._muted_layers.discard(id(layer))
        try:
            layer.events.data.disconnect(self._on_shape_edit)
        except (TypeError, RuntimeError, ValueError):
            pass
        self.viewer.layers.remove(layer)

    def _ensure_edit_layer(self, outcome: RunOutcome, name: str) -> None:
        """An empty edge-centre layer after a ttf run without edges, so a point can be added."""
        if name != "ttf":
            return
        if any(lay.metadata.get(ROLE_KEY) == "points" and lay.metadata.get("reconaudit_analysis") == "ttf"
               for lay in self._overlay_layers(outcome.source)):
            return
        from ._layers import points_layer

        data, kwargs, _ = points_layer([], outcome.geometry, "ttf", outcome.source, outcome.z_offset)
        self._connect_editable(self.viewer.add_points(data, **kwargs))

    def _connect_editable(self, layer: Any) -> None:
        key = (layer.metadata.get("reconaudit_analysis"), layer.metadata.get(ROLE_KEY))
        if key in EDITABLE and isinstance(layer, (Shapes, Points)):
            layer.events.data.connect(self._on_shape_edit)

    def _on_shape_edit(self, event: Any) -> None:
        layer = event.source
        if id(layer) in self._muted_layers:
            return
        action = str(getattr(event, "action", "changed"))
        if action not in ("changed", "added", "removed"):
            return
        role = layer.metadata.get(ROLE_KEY)
        indices = tuple(getattr(event, "data_indices", ()) or ())
        self._edited_index = indices[0] if len(indices) == 1 and isinstance(indices[0], int) else None
        self._pending_edit = "nps" if role == "rois" else "ttf"
        self._pending_layer = layer
        self._edit_timer.start(EDIT_DELAY_MS)

    def _remeasure_pending(self) -> Any:
        """Re-measure the analysis whose ROIs or points were just edited (in a worker)."""
        name, layer = self._pending_edit, getattr(self, "_pending_layer", None)
        if name is None or layer is None or self.outcome is None or self.worker is not None:
            return None
        self._pending_edit = None
        outcome = self.outcome
        settings = dict(outcome.settings.get(name, {}))
        offset = int(layer.metadata.get(OFFSET_KEY, 0))
        if name == "nps":
            rois = rectangles_to_nps_rois(list(layer.data), layer.features, offset, outcome.volume.shape)
            if not rois:
                show_warning("reconaudit: no noise ROI left; draw a rectangle to measure the NPS")
                return None
            if self._edited_index is not None and self._edited_index < len(rois):
                size = rois[self._edited_index]["size_vox"]
            else:
                size = min(r["size_vox"] for r in rois)
            settings["rois"] = [self._with_size(r, size, outcome.volume.shape) for r in rois]
        else:
            centres = points_to_edge_centres(layer.data, offset, outcome.volume.shape)
            if not centres:
                return None
            settings["centres_zyx_vox"] = centres
        self.set_settings(name, settings)
        job = thread_worker(remeasure, start_thread=False, ignore_errors=True)
        worker = job(outcome, name, settings, self._new_stop())
        worker.returned.connect(lambda out, n=name: self._on_remeasured(out, n))
        worker.errored.connect(self._on_error)
        self.worker = worker
        worker.yielded.connect(self._on_progress)
        worker.finished.connect(self._on_finished)
        self._set_busy(True)
        worker.start()
        return worker

    @staticmethod
    def _with_size(roi: dict[str, Any], size: int, shape: tuple[int, int, int]) -> dict[str, Any]:
        y, x = roi["yx0_vox"]
        y = int(np.clip(y, 0, shape[1] - size))
        x = int(np.clip(x, 0, shape[2] - size))
        return {"slices": roi["slices"], "yx0_vox": [y, x], "size_vox": int(size)}

    def _on_remeasured(self, outcome: RunOutcome, name: str) -> None:
        """Show a re-measurement; the edited layer keeps its shapes, the others are rebuilt."""
        self.outcome = outcome
        self.status.setText(f"{name} re-measured")
        self.progress.setValue(100)
        view = outcome.views[name]
        edited_role = "rois" if name == "nps" else "points"
        for lay in self._overlay_layers(outcome.source):
            if lay.metadata.get("reconaudit_analysis") != name:
                continue
            if lay.metadata.get(ROLE_KEY) == edited_role:
                self._refresh_edited(lay, view)
            else:
                self._remove_layer(lay)
        for data, kwargs, kind in view.layers:
            if kwargs["metadata"][ROLE_KEY] == edited_role and any(
                lay.metadata.get(ROLE_KEY) == edited_role and lay.metadata.get("reconaudit_analysis") == name
                for lay in self._overlay_layers(outcome.source)
            ):
                continue
            self._connect_editable(getattr(self.viewer, f"add_{kind}")(data, **kwargs))
        self.fill_table(outcome)
        self.redraw_plot()

    def _refresh_edited(self, layer: Any, view: Any) -> None:
        """Replace the edited layer's shapes by the measured ones without re-triggering an edit."""
        match = [d for d in view.layers if d[1]["metadata"][ROLE_KEY] == layer.metadata.get(ROLE_KEY)]
        if not match:
            return
        data, kwargs, _ = match[0]
        self._muted_layers.add(id(layer))
        try:
            if isinstance(layer, Shapes):
                layer.data = data
                layer.shape_type = ["rectangle"] * len(data)
            else:
                layer.data = data
            layer.features = kwargs.get("features", {})
            layer.metadata[OFFSET_KEY] = kwargs["metadata"][OFFSET_KEY]
        finally:
            self._muted_layers.discard(id(layer))

    # ------------------------------------------------------------------ table
    def fill_table(self, outcome: RunOutcome | None = None) -> None:
        """One row per finding, record value and overlay item of every analysis, then the comparison's."""
        if outcome is not None:
            self.outcome = outcome
        self.refill_table()

    def refill_table(self) -> None:
        """Rows of the last check run followed by those of the last comparison."""
        rows = [row for view in self.outcome.views.values() for row in view.rows] if self.outcome is not None else []
        if self.comparison is not None:
            rows += self.comparison.view.rows
        self._rows = rows
        self.table.setRowCount(len(self._rows))
        for r, row in enumerate(self._rows):
            if row.severity and not row.value:
                what = row.note
            else:
                what = row.note if row.note.startswith(row.item) else (f"{row.item}: {row.note}" if row.note else row.item)
            value = row.value or row.severity
            cells = (row.analysis, "" if row.slice_index is None else str(row.slice_index), value, row.unit,
                     shorten(what, CELL_CHARS))
            for c, text in enumerate(cells):
                item = QTableWidgetItem(text)
                item.setToolTip(row.tooltip or what if c == len(cells) - 1 else text)
                if row.severity in _SEVERITY_COLOURS:
                    item.setBackground(_qcolor(_SEVERITY_COLOURS[row.severity]))
                    item.setForeground(_qcolor("#1a1a1a"))
                self.table.setItem(r, c, item)
        self.table.resizeRowsToContents()

    def go_to_row(self, row: int, _column: int = 0) -> None:
        """Move the viewer to the slice of the row's item and centre it."""
        if not (0 <= row < len(self._rows)):
            return
        entry = self._rows[row]
        self.detail.setText(row_detail(entry))
        geometry = entry.geometry or (self.outcome.geometry if self.outcome is not None else None)
        centre = entry.centre_zyx_vox
        if centre is None or geometry is None:
            return
        world = geometry.voxel_to_world(np.array(centre))
        z_world = float(np.round(centre[0])) * geometry.scale[0] + geometry.translate[0]
        if self.viewer.dims.ndim >= 3:
            axis = self.viewer.dims.ndim - 3
            self.viewer.dims.set_point(axis, z_world)
        scene = getattr(self.viewer, "scene", None)
        camera = scene.camera if scene is not None and hasattr(scene, "camera") else self.viewer.camera
        camera.center = (float(world[1]), float(world[2]))

    # ------------------------------------------------------------------ plots
    def redraw_plot(self, *_: Any) -> None:
        """Draw the chosen curve of the last outcome in the embedded canvas."""
        self.figure.clear()
        title = self.plot_choice.value
        name, draw = PLOTS[title]
        record = None
        if self.outcome is not None and name in self.outcome.analysis.results:
            record = dict(self.outcome.analysis.results[name].record)
            record["_z_offset"] = self.outcome.z_offset
        draw(self.figure, record)
        self.canvas.draw_idle()

    # ------------------------------------------------------------------ export
    def _ask_json_path(self) -> None:
        if self.outcome is None:
            show_warning("reconaudit: run the checks first")
            return
        path, _ = QFileDialog.getSaveFileName(self, "Save results JSON", "results.json", "JSON (*.json)")
        if path:
            self.export_json(path)

    def _ask_report_dir(self) -> None:
        if self.outcome is None:
            show_warning("reconaudit: run the checks first")
            return
        folder = QFileDialog.getExistingDirectory(self, "Folder for the HTML report")
        if folder:
            self.export_report(folder)

    def export_json(self, path: str | Path) -> Path | None:
        """Write results.json of the last run (small: done on the GUI thread)."""
        if self.outcome is None:
            show_warning("reconaudit: run the checks first")
            return None
        written = write_results_json(self.outcome, path)
        show_info(f"reconaudit: wrote {written}")
        return written

    def export_report(self, folder: str | Path) -> Any:
        """Write the HTML report (figures drawn in a worker); returns the worker."""
        if self.outcome is None:
            show_warning("reconaudit: run the checks first")
            return None
        job = thread_worker(_report_job, start_thread=False, ignore_errors=True)
        worker = job(self.outcome, str(folder))
        worker.returned.connect(lambda res: show_info(f"reconaudit: {res[1]} ({res[0]})"))
        worker.errored.connect(self._on_error)
        worker.start()
        return worker


def world_axis_labels(axes: list[str]) -> list[str]:
    """Slider labels naming each world axis' patient direction: ``"z (mm, +S)"``."""
    return [f"{name} (mm, {axis})" for name, axis in zip("zyx", axes)]


def shorten(text: str, limit: int) -> str:
    """``text`` cut at a word boundary to at most ``limit`` characters, with an ellipsis."""
    if len(text) <= limit:
        return text
    cut = text[: limit - 1].rsplit(" ", 1)[0].rstrip(" ,;:")
    return cut + " …"


def row_detail(row: TableRow) -> str:
    """The full text of a table row for the detail line under the table."""
    parts = [row.analysis]
    if row.slice_index is not None:
        parts.append(f"slice {row.slice_index}")
    head = " · ".join(parts)
    value = f"{row.value} {row.unit}".strip()
    body = row.tooltip or row.note or row.item
    if row.item and row.item not in body and not row.severity:
        body = f"{row.item}: {body}"
    return f"{head} — {value + ' — ' if value else ''}{body}"


def _report_job(outcome: RunOutcome, folder: str) -> Any:
    yield ("report", 0.5)
    return write_html_report(outcome, folder)


def _qcolor(hex_colour: str) -> Any:
    from qtpy.QtGui import QColor

    return QColor(hex_colour)
