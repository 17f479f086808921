"""Baselines: known-good measurements per protocol, and the comparison against them.

A baseline is recorded from a series a physicist accepts (``reconaudit baseline``) and
stored per protocol key (by default series description + kernel + slice thickness) in a
JSON file. ``check`` compares each new series with the baseline of its protocol and
reports the relative changes of noise, NPS texture (f_av) and sharpness (f50 per
insert), each against the profile's tolerance.
"""
from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Any

from .fsutil import atomic_write_text
from .results import Finding, Severity, to_jsonable

SCHEMA = "reconaudit.baselines/1"


def protocol_key(metadata: dict[str, Any], fields: list[str]) -> str:
    """The protocol a series belongs to: its values of ``fields`` joined with ' | '."""
    parts = []
    for f in fields:
        v = metadata.get(f)
        if isinstance(v, float):
            v = f"{v:g}"
        parts.append(str(v).strip() if v not in (None, "") else "?")
    return " | ".join(parts)


def _num(record: dict[str, Any] | None, key: str) -> float | None:
    if not record or not record.get("applicable", True):
        return None
    v = record.get(key)
    return float(v) if isinstance(v, (int, float)) and math.isfinite(v) else None


def baseline_entry(series: dict[str, Any]) -> dict[str, Any]:
    """What a baseline keeps of a series record: headline numbers and curves."""
    nps = series.get("nps") or {}
    ttf = series.get("ttf") or {}
    air = series.get("air") or {}
    edges = [
        {k: e.get(k) for k in ("contrast_hu", "f50_per_mm", "f10_per_mm", "frequency_per_mm", "ttf")}
        for e in (ttf.get("edges") or [])
        if e.get("reliable", True)
    ]
    return {
        "series_id": series.get("id"),
        "series_instance_uid": series.get("series_instance_uid"),
        "recorded_at": time.strftime("%Y-%m-%dT%H:%M:%S"),
        "metrics": {
            "noise_hu": _num(nps, "noise_hu"),
            "f_av_per_mm": _num(nps, "f_av_per_mm"),
            "f_peak_per_mm": _num(nps, "f_peak_per_mm"),
            "air_noise_hu": _num(air, "noise_hu"),
        },
        "nps": {"frequency_per_mm": nps.get("frequency_per_mm"), "nps_1d_hu2mm2": nps.get("nps_1d_hu2mm2")}
        if nps.get("frequency_per_mm")
        else None,
        "ttf_edges": edges,
    }


class BaselineStore:
    """Baselines per protocol key in one JSON file, written atomically."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self.entries: dict[str, dict[str, Any]] = {}
        if self.path.exists():
            try:
                doc = json.loads(self.path.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                raise ValueError(f"{self.path}: not a readable baseline file: {exc}") from None
            self.entries = dict(doc.get("protocols", {}))

    def get(self, key: str) -> dict[str, Any] | None:
        return self.entries.get(key)

    def set(self, key: str, entry: dict[str, Any]) -> None:
        self.entries[key] = entry

    def save(self) -> Path:
        doc = {"schema": SCHEMA, "protocols": self.entries}
        return atomic_write_text(self.path, json.dumps(to_jsonable(doc), indent=2, allow_nan=False))


def _relative(new: float | None, old: float | None) -> float | None:
    if new is None or old is None or old == 0:
        return None
    return (new - old) / abs(old)


def _nearest_edge(edges: list[dict[str, Any]], contrast: float) -> dict[str, Any] | None:
    usable = [e for e in edges if isinstance(e.get("contrast_hu"), (int, float))]
    if not usable:
        return None
    best = min(usable, key=lambda e: abs(e["contrast_hu"] - contrast))
    # the same insert: contrast within 30 % (or 30 HU for near-zero contrasts)
    return best if abs(best["contrast_hu"] - contrast) <= max(30.0, 0.3 * abs(contrast)) else None


def compare_to_baseline(
    series: dict[str, Any], entry: dict[str, Any], tolerances: dict[str, float]
) -> tuple[dict[str, Any], list[Finding]]:
    """Relative changes of ``series`` against a baseline ``entry``, and findings.

    ``tolerances`` maps a metric (``noise_hu``, ``f_av_per_mm``, ``f50_per_mm``,
    ``air_noise_hu``) to the relative change that asks for review.
    """
    current = baseline_entry(series)["metrics"]
    changes: dict[str, Any] = {}
    findings: list[Finding] = []
    for metric in ("noise_hu", "f_av_per_mm", "air_noise_hu"):
        rel = _relative(current.get(metric), entry["metrics"].get(metric))
        if rel is None:
            continue
        changes[metric] = {"now": current[metric], "baseline": entry["metrics"][metric], "relative_change": rel}
        tol = tolerances.get(metric, math.inf)
        if abs(rel) > tol:
            findings.append(Finding("baseline", Severity.REVIEW,
                f"{metric} changed by {rel:+.0%} from the protocol baseline "
                f"({entry['metrics'][metric]:.3g} -> {current[metric]:.3g}; tolerance ±{tol:.0%})"))
    edge_changes = []
    for edge in (series.get("ttf") or {}).get("edges") or []:
        if not edge.get("reliable", True) or not isinstance(edge.get("contrast_hu"), (int, float)):
            continue
        ref = _nearest_edge(entry.get("ttf_edges") or [], edge["contrast_hu"])
        rel = _relative(edge.get("f50_per_mm"), (ref or {}).get("f50_per_mm"))
        if rel is None:
            continue
        edge_changes.append({"contrast_hu": edge["contrast_hu"], "f50_now": edge["f50_per_mm"],
                             "f50_baseline": ref["f50_per_mm"], "relative_change": rel})
        tol = tolerances.get("f50_per_mm", math.inf)
        if abs(rel) > tol:
            findings.append(Finding("baseline", Severity.REVIEW,
                f"f50 of the {edge['contrast_hu']:+.0f} HU edge changed by {rel:+.0%} from the protocol "
                f"baseline ({ref['f50_per_mm']:.3f} -> {edge['f50_per_mm']:.3f} /mm; tolerance ±{tol:.0%})"))
    if edge_changes:
        changes["f50_per_mm"] = edge_changes
    comparison = {"recorded_at": entry.get("recorded_at"), "from_series": entry.get("series_id"), "changes": changes,
                  "nps": entry.get("nps"), "ttf_edges": entry.get("ttf_edges")}
    return comparison, findings
