"""Comparison of two image layers (test vs reference) for the panel: job, layers, rows, summary.

No Qt here: the job runs in a thread worker and everything it returns is plain data, so
the GUI thread only adds finished layers. The engine does the work
(:func:`reconaudit.checker.analyses.compare.compare_volumes`); every overlay it returns
lies on the *reference's* grid, so every layer made here gets the reference layer's
scale and translate.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any, Generator, Mapping

import numpy as np

from reconaudit.checker.analyses.compare import ComparisonResult, compare_volumes
from reconaudit.checker.pipeline import Cancelled
from reconaudit.checker.results import Severity
from reconaudit.checker.volume import Volume

from ._geometry import LayerGeometry, layer_geometry
from ._layers import LayerData, ResultView, TableRow, _meta, format_value, short_source

Progress = tuple[str, float]

#: analysis name used in layer metadata and table rows
COMPARE = "compare"
#: structure kinds of the comparison record -> wording in the viewer (our own)
KIND_WORDS: dict[str, str] = {
    "only_in_test": "only in the test",
    "only_in_reference": "only in the reference",
}
# Colours (our own choice): a structure that appeared, one that vanished, the moved surface.
COLOUR_ONLY_IN_TEST = "#ff9f1c"
COLOUR_ONLY_IN_REFERENCE = "#a78bfa"
COLOUR_SURFACE = "#19e6c1"
#: the engine's map of surface voxels displaced beyond the tolerance
SURFACE_MAP_KEY = "surface_shift_beyond_tolerance"


@dataclass
class ComparisonOutcome:
    """One comparison: the engine's result and what the viewer shows of it."""

    test_name: str
    reference_name: str
    result: ComparisonResult
    geometry: LayerGeometry  # the reference layer's geometry: every overlay is on its grid
    settings: dict[str, Any] = field(default_factory=dict)
    view: ResultView = field(default_factory=lambda: ResultView(COMPARE))

    @property
    def verdict(self) -> str:
        return self.result.verdict


def run_comparison(
    test: Volume,
    reference: Volume,
    settings: dict[str, Any] | None,
    test_name: str,
    reference_name: str,
    stop: threading.Event | None = None,
) -> Generator[Progress, None, ComparisonOutcome]:
    """Compare ``test`` with ``reference`` (a generator yielding progress for a thread worker).

    Parameters
    ----------
    test, reference : Volume
        The two reconstructions; the test is resampled onto the reference's grid by the
        engine when the grids differ.
    settings : dict, optional
        Overrides of the comparison's DEFAULTS.
    test_name, reference_name : str
        The image layer names (used to name the overlay layers).
    stop : threading.Event, optional
        Checked before and after the engine runs.

    Raises
    ------
    reconaudit.checker.pipeline.Cancelled
        When ``stop`` is set.

    References
    ----------
    Maurer, Qi, Raghavan, IEEE PAMI 25(2), 2003 (signed distance of the body surfaces,
    used by the engine).
    """
    stop = stop or threading.Event()
    yield ("comparing", 0.05)
    if stop.is_set():
        raise Cancelled("comparison cancelled")
    result = compare_volumes(test, reference, settings or None)
    if stop.is_set():
        raise Cancelled("comparison cancelled")
    yield ("layers", 0.9)
    geometry = layer_geometry(reference)
    view = comparison_view(result, geometry, test_name, reference_name)
    yield ("done", 1.0)
    return ComparisonOutcome(test_name, reference_name, result, geometry, dict(settings or {}), view)


# ----------------------------------------------------------------- structures
def structure_items(record: Mapping[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    """(kind, item) of every structure difference, in label-id order."""
    items = [(kind, dict(item)) for kind in KIND_WORDS for item in record.get(kind) or [] if isinstance(item, Mapping)]
    return sorted(items, key=lambda ki: int(ki[1].get("id", 0)))


def difference_colours(record: Mapping[str, Any]) -> dict[Any, str]:
    """Direct label colours: one colour for 'only in the test', another for 'only in the reference'."""
    colours: dict[Any, str] = {0: "transparent", None: COLOUR_ONLY_IN_TEST}
    for kind, item in structure_items(record):
        colours[int(item["id"])] = COLOUR_ONLY_IN_TEST if kind == "only_in_test" else COLOUR_ONLY_IN_REFERENCE
    return colours


def comparison_name(what: str, test_name: str, reference_name: str) -> str:
    """'<what> · <test> vs <reference>': the layer names of one comparison."""
    test, ref = short_source(test_name), short_source(reference_name)
    if test.startswith("series ") and ref.startswith("series "):
        ref = ref[len("series "):]
    return f"{what} · {test} vs {ref}"


def differences_layer(result: ComparisonResult, geometry: LayerGeometry, test_name: str, reference_name: str) -> LayerData:
    """The structure differences as a Labels layer on the reference's grid."""
    labels = np.asarray(result.overlays.labels).astype(np.int32, copy=False)
    kwargs = {
        "name": comparison_name("differences", test_name, reference_name),
        "scale": geometry.scale,
        "translate": geometry.translate,
        "opacity": 0.6,
        "colormap": difference_colours(result.record),
        "metadata": _meta("labels", COMPARE, reference_name, 0, compared_with=test_name),
    }
    return (labels, kwargs, "labels")


def surface_layer(mask: np.ndarray, geometry: LayerGeometry, test_name: str, reference_name: str) -> LayerData:
    """Surface voxels displaced beyond the tolerance, as a one-colour Labels layer."""
    data = (np.asarray(mask) > 0.5).astype(np.uint8)
    kwargs = {
        "name": comparison_name("surface moved", test_name, reference_name),
        "scale": geometry.scale,
        "translate": geometry.translate,
        "opacity": 0.9,
        "colormap": {0: "transparent", 1: COLOUR_SURFACE, None: COLOUR_SURFACE},
        "metadata": _meta("map", COMPARE, reference_name, 0, compared_with=test_name, map_key=SURFACE_MAP_KEY),
    }
    return (data, kwargs, "labels")


def centres_layer(record: Mapping[str, Any], geometry: LayerGeometry, test_name: str, reference_name: str) -> LayerData:
    """The centroid of each structure difference, labelled with its kind and contrast."""
    items = structure_items(record)
    data = np.array([item["centroid_zyx_vox"] for _, item in items], dtype=float).reshape(-1, 3)
    labels = [f"{item['id']}: {KIND_WORDS[kind]}, {format_signed(item.get('contrast_hu'))} HU" for kind, item in items]
    colours = [COLOUR_ONLY_IN_TEST if kind == "only_in_test" else COLOUR_ONLY_IN_REFERENCE for kind, _ in items]
    size_vox = max(3.0, 5.0 / max(min(geometry.scale[1:]), 1e-6))
    kwargs = {
        "name": comparison_name("centres", test_name, reference_name),
        "scale": geometry.scale,
        "translate": geometry.translate,
        "size": size_vox,
        "symbol": "disc",
        "face_color": "transparent",
        "border_color": colours or COLOUR_ONLY_IN_TEST,
        "border_width": 0.15,
        "features": {"label": labels},
        "text": {"string": "{label}", "color": "#ffffff", "size": 10, "anchor": "upper_left", "translation": [0, -4, 4]},
        "metadata": _meta("points", COMPARE, reference_name, 0, compared_with=test_name),
    }
    return (data, kwargs, "points")


# ----------------------------------------------------------------- rows and summary
def format_signed(value: Any, digits: int = 0) -> str:
    """``+12`` / ``-3.4``; 'n/a' for a missing value."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return f"{v:+.{digits}f}" if np.isfinite(v) else "n/a"


def _lps_text(values: Any) -> str:
    try:
        x, y, z = (float(v) for v in values)
    except (TypeError, ValueError):
        return "n/a"
    return f"LPS x {x:.1f}, y {y:.1f}, z {z:.1f} mm"


def shift_rows(record: Mapping[str, Any], geometry: LayerGeometry) -> list[TableRow]:
    """Rows of the body-surface shift statistics and the rigid offset."""
    shift = record.get("body_surface_shift_mm") or {}
    rows = []
    for key, what, note in (("mean", "surface shift, mean", "signed: + = test surface outside the reference's"),
                            ("p95", "surface shift, p95", "95th percentile of |shift| over both surfaces")):
        rows.append(TableRow(COMPARE, what, format_value(shift.get(key)), note, unit="mm" if shift.get(key) is not None else ""))
    at = shift.get("max_at_zyx_vox")
    centre = tuple(float(v) for v in at) if at is not None else None
    rows.append(TableRow(COMPARE, "surface shift, largest", format_value(shift.get("max")),
                         f"at {_lps_text(shift.get('max_at_mm'))}", centre,
                         unit="mm" if shift.get("max") is not None else "", geometry=geometry))
    frac = shift.get("beyond_tolerance_fraction")
    if frac is not None:
        rows.append(TableRow(COMPARE, "surface beyond tolerance", f"{100.0 * float(frac):.1f}",
                             "share of the surface voxels displaced beyond the tolerance", unit="%"))
    offset = record.get("rigid_offset_mm")
    if offset is not None:
        text = ", ".join(f"{a} {format_signed(v, 1)}" for a, v in zip("xyz", offset))
        rows.append(TableRow(COMPARE, "rigid offset", "", f"of the test, LPS: {text} mm"))
    return rows


def structure_rows(record: Mapping[str, Any], geometry: LayerGeometry) -> list[TableRow]:
    """One row per structure difference; clicking it goes to its centroid on the reference grid."""
    rows = []
    for kind, item in structure_items(record):
        note = (f"{KIND_WORDS[kind]}: contrast {format_signed(item.get('contrast_hu'))} HU, "
                f"at {_lps_text(item.get('centroid_mm'))}")
        centre = tuple(float(v) for v in item["centroid_zyx_vox"])
        rows.append(TableRow(COMPARE, f"difference {item['id']}", format_value(item.get("volume_mm3")), note, centre,
                             unit="mm³", geometry=geometry))
    return rows


def texture_rows(record: Mapping[str, Any]) -> list[TableRow]:
    """Noise, texture and sharpness ratios test / reference, where both were measured."""
    rows = []
    nps = record.get("nps") or {}
    for key, what in (("noise_ratio", "noise ratio (test / reference)"), ("f_av_ratio", "NPS f_av ratio (test / reference)")):
        if nps.get(key) is not None:
            rows.append(TableRow(COMPARE, what, format_value(nps[key]), what, unit="ratio"))
    for item in (record.get("ttf") or {}).get("f50_ratios") or []:
        if item.get("ratio") is not None:
            what = f"TTF f50 ratio, edge of {format_signed(item.get('contrast_hu'))} HU"
            rows.append(TableRow(COMPARE, what, format_value(item["ratio"]), what + " (test / reference)", unit="ratio"))
    sd = (record.get("difference_statistics") or {}).get("sd_diff_hu")
    if sd is not None:
        rows.append(TableRow(COMPARE, "difference noise", format_value(sd, "HU"), "SD of the smoothed difference image (inside the body)", unit="HU"))
    return rows


def comparison_rows(result: ComparisonResult, geometry: LayerGeometry) -> list[TableRow]:
    """Findings first, then the surface shift, the structure differences and the ratios.

    A finding about one place (its message names the LPS position of a structure
    difference or of the largest surface shift) is not repeated as a row of its own:
    that place's row takes the finding's severity (and its colour) and keeps its value;
    the full message is the row's tooltip.
    """
    rec = result.record
    structures = structure_rows(rec, geometry)
    shifts = shift_rows(rec, geometry)
    by_place = {str(item.get("centroid_mm")): row for (_, item), row in zip(structure_items(rec), structures)}
    at = (rec.get("body_surface_shift_mm") or {}).get("max_at_mm")
    if at is not None:
        by_place[str(at)] = next(r for r in shifts if r.item == "surface shift, largest")
    findings = []
    for f in result.findings:
        severity = Severity(f.severity).value
        row = next((r for place, r in by_place.items() if place in f.message), None)
        if row is not None:
            row.severity = severity
            row.tooltip = f.message
        else:
            findings.append(TableRow(COMPARE, severity, "", f.message, None, severity))
    return findings + shifts + structures + texture_rows(rec)


def comparison_view(result: ComparisonResult, geometry: LayerGeometry, test_name: str, reference_name: str) -> ResultView:
    """Layers and table rows of one comparison (computed off the GUI thread)."""
    view = ResultView(COMPARE)
    labels = result.overlays.labels
    if labels is not None and np.asarray(labels).any():
        view.layers.append(differences_layer(result, geometry, test_name, reference_name))
    mask = result.overlays.maps.get(SURFACE_MAP_KEY)
    if mask is not None and np.asarray(mask).any():
        view.layers.append(surface_layer(mask, geometry, test_name, reference_name))
    if structure_items(result.record):
        view.layers.append(centres_layer(result.record, geometry, test_name, reference_name))
    view.rows = comparison_rows(result, geometry)
    return view


def surface_summary(record: Mapping[str, Any], tolerance_mm: float, verdict: str) -> str:
    """The comparison in three short lines for the panel (numbers with their units)."""
    shift = record.get("body_surface_shift_mm") or {}
    if shift.get("max") is None:
        surface = "Body surface: not measured (no body found in one of the images)."
    else:
        frac = shift.get("beyond_tolerance_fraction")
        beyond = f"; {100.0 * float(frac):.1f} % of it beyond {tolerance_mm:g} mm" if frac is not None else ""
        surface = (f"Body surface shift (test vs reference): mean {format_signed(shift['mean'], 1)} mm, "
                   f"95th percentile {float(shift['p95']):.1f} mm, largest {format_signed(shift['max'], 1)} mm "
                   f"at {_lps_text(shift.get('max_at_mm'))}{beyond}.")
    offset = record.get("rigid_offset_mm") or []
    offset_text = ", ".join(f"{a} {format_signed(v, 1)}" for a, v in zip("xyz", offset)) or "n/a"
    n_test, n_ref = len(record.get("only_in_test") or []), len(record.get("only_in_reference") or [])
    return (f"{surface}\nRigid offset (LPS): {offset_text} mm.\n"
            f"Structures only in the test: {n_test}; only in the reference: {n_ref}. Verdict: {verdict}.")
