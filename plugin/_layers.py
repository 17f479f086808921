"""Analysis overlays (viewer-neutral, voxel [z, y, x]) -> napari LayerData and table rows.

Pure numpy: runs in the worker thread, so the GUI thread only adds finished layers.
Every layer gets the image layer's scale and translate. A result computed on one slice
(the panel's "displayed slice" scope) carries ``z_offset``: vector geometry (lines,
rectangles, points) is shifted into the full volume's voxel frame; raster layers (labels,
maps) are one slice thick and their translate is moved to that slice.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage

from reconaudit.checker.analyses.air import KIND_WORDS
from reconaudit.checker.results import AnalysisResult, Point, Roi, Segment, Severity, display_number

from ._geometry import LayerGeometry

LayerData = tuple[Any, dict[str, Any], str]

#: layer.metadata keys set on every overlay layer
ROLE_KEY = "reconaudit_role"
SOURCE_KEY = "reconaudit_source"
OFFSET_KEY = "reconaudit_z_offset"

# Roles and their layer-name suffixes (our own wording).
ROLE_NAMES: dict[str, str] = {
    "labels": "structures",
    "segments": "lines",
    "map": "map",
    "rois": "ROIs",
    "points": "points",
}
#: (analysis, role) -> layer-name wording where a better one exists
SPECIFIC_NAMES: dict[tuple[str, str], str] = {
    ("air", "labels"): "air structures",
    ("air", "points"): "air flags",
    ("streaks", "segments"): "streak lines",
    ("streaks", "map"): "streak strength",
    ("nps", "rois"): "noise ROIs",
    ("ttf", "points"): "edge centres",
}
#: the overlay layers whose edits are re-measured: (analysis, role)
EDITABLE = {("nps", "rois"), ("ttf", "points")}

# Colours (our own choice).
COLOUR_LABELS = "#f5d90a"  # flagged structures in the air
COLOUR_LABELS_OTHER = "#7f8c9966"  # structures of kinds not flagged (touching the body, table, ...): faint
COLOUR_SEGMENTS = "#ff7b39"
COLOUR_ROIS = "#35d0ff"
COLOUR_POINTS = "#ff4fd8"
MAP_COLORMAP = "magma"


@dataclass
class TableRow:
    """One line of the panel's results table; ``centre_zyx_vox`` is in the full volume."""

    analysis: str
    item: str
    value: str = ""
    note: str = ""
    centre_zyx_vox: tuple[float, float, float] | None = None
    severity: str = ""
    unit: str = ""
    geometry: LayerGeometry | None = None  # the grid of ``centre_zyx_vox`` when not the run's image
    tooltip: str = ""  # longer text shown on hover (defaults to the cell's text)

    @property
    def slice_index(self) -> int | None:
        return None if self.centre_zyx_vox is None else int(round(self.centre_zyx_vox[0]))


@dataclass
class ResultView:
    """Everything the GUI needs to show one analysis' result."""

    analysis: str
    layers: list[LayerData] = field(default_factory=list)
    rows: list[TableRow] = field(default_factory=list)


SHORT_SOURCE_CHARS = 26


def short_source(source: str) -> str:
    """A short tag of the image layer name for overlay names: the series number if it has one.

    ``"Torso FH-T1, 120 deg arc (series 4)"`` -> ``"series 4"``; a short name stays as it
    is; a long one is cut to :data:`SHORT_SOURCE_CHARS` characters with an ellipsis. The
    full name stays in the layer's metadata.
    """
    import re

    found = re.search(r"\((series [^)]+)\)(\s*\[\d+/\d+\])?\s*$", source)
    if found:
        return found.group(1) + (found.group(2) or "")
    return source if len(source) <= SHORT_SOURCE_CHARS else source[: SHORT_SOURCE_CHARS - 1].rstrip() + "…"


def layer_name(source: str, analysis: str, role: str, key: str = "") -> str:
    """'<what> · <image tag>': short, the role first, unique per image, analysis and role."""
    what = SPECIFIC_NAMES.get((analysis, role)) if role != "map" or key == "streak_strength" else None
    if what is None:
        what = f"{analysis} {key.replace('_', ' ') if key else ROLE_NAMES[role]}"
    return f"{what} · {short_source(source)}"


def _meta(role: str, analysis: str, source: str, z_offset: int, **extra: Any) -> dict[str, Any]:
    return {ROLE_KEY: role, "reconaudit_analysis": analysis, SOURCE_KEY: source, OFFSET_KEY: int(z_offset), **extra}


def format_value(value: Any, unit: str = "", metric: str = "") -> str:
    """A value as the table shows it: a number as the report shows it (fixed decimals by
    ``metric``, ``analysis.key``, or by ``unit``, e.g. 0.01 HU; else 4 significant
    digits); yes/no; '—' for no value."""
    if value is None:
        return "—"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not math.isfinite(v):
            return "n/a"
        return display_number(v, unit, metric)
    return str(value)


#: key suffix -> unit shown in the table (the project's unit-in-the-name convention)
UNIT_SUFFIXES: tuple[tuple[str, str], ...] = (
    ("_hu2mm2", "HU² mm²"),
    ("_per_mm", "cycles/mm"),
    ("_per_px", "cycles/px"),
    ("_mm3", "mm³"),
    ("_mm2", "mm²"),
    ("_mm", "mm"),
    ("_hu", "HU"),
    ("_deg", "°"),
    ("_vox", "voxels"),
    ("_px", "px"),
    ("_s", "s"),
    ("_fraction", "fraction"),
)


def split_unit(key: str) -> tuple[str, str]:
    """A record key -> (readable name, unit): ``"noise_hu"`` -> ``("noise", "HU")``.

    Keys without a unit suffix keep their name (underscores as spaces) and get no unit.
    """
    for suffix, unit in UNIT_SUFFIXES:
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)].replace("_", " "), unit
    return key.replace("_", " "), ""


# ----------------------------------------------------------------- labels
def label_centroids(labels: np.ndarray) -> list[tuple[int, tuple[float, float, float], int]]:
    """(label, centroid (z, y, x) voxel, voxel count) of every non-zero label (bincount sums)."""
    labels = np.asarray(labels)
    coords = np.nonzero(labels)  # any memory layout (the air labels are stored z fastest), no full copy
    if coords[0].size == 0:
        return []
    lab = labels[coords].astype(np.int64)
    counts = np.bincount(lab)
    ids = np.flatnonzero(counts)
    sums = [np.bincount(lab, weights=c.astype(float), minlength=counts.size) for c in coords]
    return [(int(i), tuple(float(sm[i] / counts[i]) for sm in sums), int(counts[i])) for i in ids]


def label_colours(ids: list[int], flagged: dict[int, bool]) -> dict[Any, str]:
    """Direct label colours: flagged structures bright, the others grey, background clear."""
    colours: dict[Any, str] = {0: "transparent", None: COLOUR_LABELS}
    for i in ids:
        colours[int(i)] = COLOUR_LABELS if flagged.get(int(i), True) else COLOUR_LABELS_OTHER
    return colours


def structure_flags(record: dict[str, Any]) -> dict[int, bool]:
    """label id -> flagged, from the air record's ``structures`` (if present)."""
    out = {}
    for st in record.get("structures") or []:
        if isinstance(st, dict) and "id" in st:
            out[int(st["id"])] = bool(st.get("flagged", True))
    return out


def labels_layer(
    labels: np.ndarray, geometry: LayerGeometry, analysis: str, source: str, z_offset: int, record: dict[str, Any] | None = None
) -> LayerData:
    g = geometry.shifted(z_offset)
    present = np.asarray(labels)
    ids = [int(i) for i in np.unique(present[present > 0])]  # the labels in use, without a full-size copy
    kwargs = {
        "name": layer_name(source, analysis, "labels"),
        "scale": g.scale,
        "translate": g.translate,
        "opacity": 0.55,
        "colormap": label_colours(ids, structure_flags(record or {})),
        "metadata": _meta("labels", analysis, source, z_offset),
    }
    return (np.asarray(labels).astype(np.int32, copy=False), kwargs, "labels")


def map_layer(values: np.ndarray, key: str, geometry: LayerGeometry, analysis: str, source: str, z_offset: int) -> LayerData:
    g = geometry.shifted(z_offset)
    values = np.asarray(values, dtype=np.float32)
    finite = values[np.isfinite(values)]
    low, high = (float(v) for v in np.percentile(finite, [50.0, 99.5])) if finite.size else (0.0, 1.0)
    low = max(low, 0.0)
    high = high if high > low else low + 1.0
    kwargs = {
        "name": layer_name(source, analysis, "map", key),
        "scale": g.scale,
        "translate": g.translate,
        "blending": "additive",
        "colormap": MAP_COLORMAP,
        "opacity": 0.35,
        "contrast_limits": (low, high),  # additive: values below the median add nothing
        "metadata": _meta("map", analysis, source, z_offset, map_key=key),
    }
    return (values, kwargs, "image")


# ----------------------------------------------------------------- vectors
def shift_zyx(zyx: tuple[float, float, float], z_offset: int) -> tuple[float, float, float]:
    return (float(zyx[0]) + z_offset, float(zyx[1]), float(zyx[2]))


def segments_layer(segments: list[Segment], geometry: LayerGeometry, analysis: str, source: str, z_offset: int) -> LayerData:
    data = [np.array([shift_zyx(s.start_zyx_vox, z_offset), shift_zyx(s.end_zyx_vox, z_offset)]) for s in segments]
    kwargs = {
        "name": layer_name(source, analysis, "segments"),
        "shape_type": "line",
        "scale": geometry.scale,
        "translate": geometry.translate,
        "edge_color": COLOUR_SEGMENTS,
        "edge_width": 1.5,
        "opacity": 0.9,
        "features": {"label": [s.label for s in segments], "value": [float(s.value) for s in segments]},
        "metadata": _meta("segments", analysis, source, z_offset),
    }
    return (data, kwargs, "shapes")


def roi_rectangle(roi: Roi, z_offset: int) -> np.ndarray:
    """The 4 corners (z, y, x) of ``roi`` on its middle slice (pixel edges, so it frames the pixels)."""
    z = z_offset + 0.5 * (roi.z0 + roi.z1)
    z = float(math.floor(z))
    y0, x0, y1, x1 = roi.y0 - 0.5, roi.x0 - 0.5, roi.y1 - 0.5, roi.x1 - 0.5
    return np.array([[z, y0, x0], [z, y0, x1], [z, y1, x1], [z, y1, x0]], dtype=float)


def rois_layer(rois: list[Roi], geometry: LayerGeometry, analysis: str, source: str, z_offset: int) -> LayerData:
    data = [roi_rectangle(r, z_offset) for r in rois]
    kwargs = {
        "name": layer_name(source, analysis, "rois"),
        "shape_type": "rectangle",
        "scale": geometry.scale,
        "translate": geometry.translate,
        "edge_color": COLOUR_ROIS,
        "face_color": "transparent",
        "edge_width": 1.5,
        "features": {
            "label": [r.label or f"ROI {i + 1}" for i, r in enumerate(rois)],
            "z0": [r.z0 + z_offset for r in rois],
            "z1": [r.z1 + z_offset for r in rois],
        },
        "text": {"string": "{label}", "color": COLOUR_ROIS, "size": 9, "anchor": "upper_left"},
        "metadata": _meta("rois", analysis, source, z_offset),
    }
    return (data, kwargs, "shapes")


def points_layer(points: list[Point], geometry: LayerGeometry, analysis: str, source: str, z_offset: int) -> LayerData:
    data = np.array([shift_zyx(p.zyx_vox, z_offset) for p in points], dtype=float).reshape(-1, 3)
    size_vox = max(3.0, 4.0 / max(min(geometry.scale[1:]), 1e-6))
    kwargs = {
        "name": layer_name(source, analysis, "points"),
        "scale": geometry.scale,
        "translate": geometry.translate,
        "size": size_vox,
        "symbol": "cross",
        "face_color": COLOUR_POINTS,
        "border_color": COLOUR_POINTS,
        "features": {"label": [p.label for p in points], "value": [float(p.value) for p in points]},
        "text": {"string": "{label}", "color": COLOUR_POINTS, "size": 9, "anchor": "upper_left"},
        "metadata": _meta("points", analysis, source, z_offset),
    }
    return (data, kwargs, "points")


# ----------------------------------------------------------------- rows
def record_rows(analysis: str, record: dict[str, Any]) -> list[TableRow]:
    """One row per top-level scalar of the record (the analysis' own JSON keys)."""
    rows = []
    for key, value in record.items():
        if isinstance(value, (bool, int, float, str, np.integer, np.floating)) or value is None:
            if key == "reason" and record.get("applicable", True):
                continue
            if key == "applicable" and value is True:
                continue
            name, unit = split_unit(key)
            text = format_value(value, unit, f"{analysis}.{key}")
            if len(text) > 16:  # long text reads better in the wide column
                rows.append(TableRow(analysis, name, "", text))
            else:
                rows.append(TableRow(analysis, name, text, unit=unit if value is not None else ""))
    return rows


def overlay_rows(analysis: str, result: AnalysisResult, z_offset: int, centroids: list | None) -> list[TableRow]:
    rows: list[TableRow] = []
    ov = result.overlays
    kinds = {int(st["id"]): st for st in result.record.get("structures") or [] if isinstance(st, dict) and "id" in st}
    for lab, centre, count in centroids or []:
        st = kinds.get(lab, {})
        kind = KIND_WORDS.get(st.get("kind"), st.get("kind"))
        note = ", ".join(str(v) for v in (kind, "flagged" if st.get("flagged") else "") if v)
        rows.append(TableRow(analysis, f"structure {lab}", str(count), note or "label", shift_zyx(centre, z_offset), unit="voxels"))
    rows += segment_rows(analysis, ov.segments, z_offset)
    for i, r in enumerate(ov.rois, start=1):
        centre = (0.5 * (r.z0 + r.z1), 0.5 * (r.y0 + r.y1 - 1), 0.5 * (r.x0 + r.x1 - 1))
        note = f"slices {r.z0 + z_offset}-{r.z1 + z_offset}, {r.y1 - r.y0}x{r.x1 - r.x0} px"
        rows.append(TableRow(analysis, r.label or f"ROI {i}", "", note, shift_zyx(centre, z_offset)))
    for i, p in enumerate(ov.points, start=1):
        what, unit = POINT_MEANINGS.get(analysis, ("centre", ""))
        rows.append(TableRow(analysis, p.label or f"point {i}", format_value(p.value, unit), what, shift_zyx(p.zyx_vox, z_offset), unit=unit))
    return rows


def segment_rows(analysis: str, segments: list[Segment], z_offset: int) -> list[TableRow]:
    """One row per slice with lines: how many, and the strongest (clicking goes to it)."""
    by_slice: dict[int, list[Segment]] = {}
    for s in segments:
        by_slice.setdefault(int(round(0.5 * (s.start_zyx_vox[0] + s.end_zyx_vox[0]))), []).append(s)
    rows = []
    for z in sorted(by_slice):
        group = by_slice[z]
        best = max(group, key=lambda s: float(s.value))
        mid = 0.5 * (np.asarray(best.start_zyx_vox, float) + np.asarray(best.end_zyx_vox, float))
        kinds = sorted({s.label for s in group if s.label})
        note = f"{len(group)} line{'s' if len(group) != 1 else ''}"
        note += f" ({', '.join(kinds)})" if kinds else ""
        note += f"; strongest: {best.label or 'line'}"
        rows.append(TableRow(analysis, "lines", format_value(best.value), note, shift_zyx(tuple(mid), z_offset),
                             unit="relative"))
    return rows


#: what the value of an analysis' points means: analysis -> (note, unit)
POINT_MEANINGS: dict[str, tuple[str, str]] = {
    "ttf": ("edge centre, value f50", "cycles/mm"),
    "air": ("centre, value contrast-to-noise", "CNR"),
}


def finding_rows(analysis: str, result: AnalysisResult) -> list[TableRow]:
    return [
        TableRow(analysis, Severity(f.severity).value, "", f.message, None, Severity(f.severity).value)
        for f in result.findings
    ]


def result_view(analysis: str, result: AnalysisResult, geometry: LayerGeometry, source: str, z_offset: int = 0) -> ResultView:
    """Layers and table rows of one analysis' result (computed off the GUI thread)."""
    view = ResultView(analysis)
    ov = result.overlays
    centroids = None
    if ov.labels is not None and np.asarray(ov.labels).any():
        view.layers.append(labels_layer(ov.labels, geometry, analysis, source, z_offset, result.record))
        centroids = label_centroids(ov.labels)
    for key, values in ov.maps.items():
        view.layers.append(map_layer(values, key, geometry, analysis, source, z_offset))
    if ov.segments:
        view.layers.append(segments_layer(ov.segments, geometry, analysis, source, z_offset))
    if ov.rois:
        view.layers.append(rois_layer(ov.rois, geometry, analysis, source, z_offset))
    if ov.points:
        view.layers.append(points_layer(ov.points, geometry, analysis, source, z_offset))
    view.rows = finding_rows(analysis, result) + record_rows(analysis, result.record) + overlay_rows(analysis, result, z_offset, centroids)
    return view


# ----------------------------------------------------------------- edits -> settings
def rectangles_to_nps_rois(shapes: list[np.ndarray], features: Any, z_offset: int, shape_zyx: tuple[int, int, int]) -> list[dict[str, Any]]:
    """Edited rectangles (full-volume voxel corners) -> the nps "rois" setting.

    A rectangle becomes a square ROI ``size_vox`` = the shorter side, placed at the
    rectangle's top-left corner and kept inside the image; its slices come from the
    ``z0``/``z1`` features (or the rectangle's own slice), relative to ``z_offset``.
    """
    nz, ny, nx = shape_zyx
    out = []
    for i, corners in enumerate(shapes):
        corners = np.asarray(corners, dtype=float)
        y0, x0 = corners[:, 1].min() + 0.5, corners[:, 2].min() + 0.5
        y1, x1 = corners[:, 1].max() + 0.5, corners[:, 2].max() + 0.5
        size = int(max(2, round(min(y1 - y0, x1 - x0))))
        size = min(size, ny, nx)
        yi = int(np.clip(round(y0), 0, ny - size))
        xi = int(np.clip(round(x0), 0, nx - size))
        z_here = int(round(corners[:, 0].mean()))
        try:
            z0, z1 = int(features["z0"][i]), int(features["z1"][i])
        except (KeyError, IndexError, TypeError, ValueError):
            z0 = z1 = z_here
        if not (z0 <= z_here <= z1):
            z0 = z1 = z_here
        z0, z1 = z0 - z_offset, z1 - z_offset
        z0, z1 = int(np.clip(z0, 0, nz - 1)), int(np.clip(z1, 0, nz - 1))
        out.append({"slices": [z0, z1], "yx0_vox": [yi, xi], "size_vox": size})
    return out


def points_to_edge_centres(points: np.ndarray, z_offset: int, shape_zyx: tuple[int, int, int]) -> list[list[float]]:
    """Points layer data (full-volume voxels) -> the ttf "centres_zyx_vox" setting."""
    nz = shape_zyx[0]
    out = []
    for z, y, x in np.asarray(points, dtype=float).reshape(-1, 3):
        zl = int(np.clip(round(z) - z_offset, 0, nz - 1))
        out.append([zl, float(y), float(x)])
    return out
