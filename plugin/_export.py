"""The panel's exports: a results.json document and the HTML report of the last run."""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from reconaudit.checker import SAFETY_NOTICE, __version__
from reconaudit.checker.results import SCHEMA, Finding, Severity, dumps, to_jsonable, worst_verdict

from ._jobs import RunOutcome


def series_id(outcome: RunOutcome) -> str:
    """A file-system-safe id for the analysed image (and slice, in slice scope)."""
    base = re.sub(r"[^A-Za-z0-9._-]+", "-", outcome.source).strip("-") or "series"
    if outcome.volume.shape[0] == 1 and outcome.z_offset:
        base += f"-slice{outcome.z_offset}"
    return base[:64]


def series_record(outcome: RunOutcome, *, include_identifiers: bool = False) -> dict[str, Any]:
    """One series entry of results.json: geometry, safe metadata, records, findings, verdict."""
    vol = outcome.volume
    findings = list(outcome.analysis.findings) + [Finding("load", Severity.INFO, n) for n in vol.notes]
    record: dict[str, Any] = {
        "id": series_id(outcome),
        "source": vol.source,
        "series_instance_uid": vol.series_uid,
        "status": "error" if outcome.analysis.errors else "ok",
        "scope": "whole volume" if vol.shape[0] > 1 or outcome.z_offset == 0 else "one slice",
        "z_offset_vox": outcome.z_offset,
        "geometry": vol.geometry_record(),
        "metadata": dict(vol.metadata),
        "notes": list(vol.notes) + list(outcome.analysis.regions.notes),
        "regions": outcome.analysis.regions.facts(),
        "settings": to_jsonable(outcome.settings),
    }
    if include_identifiers:
        record["identifiers"] = dict(vol.identifiers)
    for name, result in outcome.analysis.results.items():
        record[name] = to_jsonable(result.record)
    record["findings"] = [f.to_json() for f in findings]
    record["verdict"] = worst_verdict(findings).value
    return record


def results_document(outcome: RunOutcome) -> dict[str, Any]:
    """The results.json document of the panel's last run (schema ``reconaudit.results/1``)."""
    return {
        "schema": SCHEMA,
        "tool_version": __version__,
        "produced_by": "napari panel",
        "safety_notice": SAFETY_NOTICE,
        "profile": {"source": "settings edited in the napari panel", "settings": to_jsonable(outcome.settings)},
        "series": [series_record(outcome)],
    }


def write_results_json(outcome: RunOutcome, path: str | Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(dumps(results_document(outcome)), encoding="utf-8")
    return path


def write_html_report(outcome: RunOutcome, out_dir: str | Path) -> tuple[Path, str]:
    """results.json and, when the report module provides it, report.html in ``out_dir``.

    Returns the path written last and a note for the user (what was and was not written).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    json_path = write_results_json(outcome, out / "results.json")
    try:
        from reconaudit.checker.report import render_series_figures, write_report
    except ImportError:
        return json_path, "the HTML report is not available in this installation; wrote results.json only"
    doc = results_document(outcome)
    sid = doc["series"][0]["id"]
    figures = render_series_figures(outcome.volume, outcome.analysis.regions, outcome.analysis.results, out, sid)
    doc["series"][0]["figures"] = figures
    report = write_report(doc, out, figures={sid: figures})
    return Path(report), f"wrote {Path(report).name} and results.json"
