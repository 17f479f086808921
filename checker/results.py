"""Result records shared by every analysis, and their JSON encoding.

Each analysis returns an :class:`AnalysisResult`: a JSON-ready ``record`` (the keys its
issue defines), ``findings`` and viewer-neutral ``overlays``. The checker turns records
into results.json, the report draws the overlays into thumbnails and the plugin turns
them into napari layers, so the geometry of a flag is computed once.
"""
from __future__ import annotations

import enum
import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

SCHEMA = "reconaudit.results/1"


class Severity(str, enum.Enum):
    """How much a finding matters; the verdict of a series is its worst finding."""

    INFO = "info"
    REVIEW = "review"
    FAIL = "fail"

    @property
    def rank(self) -> int:
        return {"info": 0, "review": 1, "fail": 2}[self.value]


class Verdict(str, enum.Enum):
    PASS = "pass"
    REVIEW = "review"
    FAIL = "fail"


@dataclass
class Finding:
    analysis: str
    severity: Severity
    message: str

    def to_json(self) -> dict[str, str]:
        return {"analysis": self.analysis, "severity": Severity(self.severity).value, "message": self.message}


@dataclass
class Segment:
    """A line segment in voxel coordinates (z, y, x); ``value`` is its strength."""

    start_zyx_vox: tuple[float, float, float]
    end_zyx_vox: tuple[float, float, float]
    label: str = ""
    value: float = 0.0


@dataclass
class Point:
    zyx_vox: tuple[float, float, float]
    label: str = ""
    value: float = 0.0


@dataclass
class Roi:
    """An axis-aligned rectangle on slices ``z0..z1`` (inclusive), rows y0:y1, cols x0:x1."""

    z0: int
    z1: int
    y0: int
    x0: int
    y1: int
    x1: int
    label: str = ""

    def to_json(self) -> dict[str, Any]:
        return {"slices": [self.z0, self.z1], "yx0_vox": [self.y0, self.x0], "yx1_vox": [self.y1, self.x1], "label": self.label}


@dataclass
class Overlays:
    """Viewer-neutral geometry of what an analysis flagged or measured."""

    labels: np.ndarray | None = None  # int32 (z, y, x), 0 = background
    segments: list[Segment] = field(default_factory=list)
    points: list[Point] = field(default_factory=list)
    rois: list[Roi] = field(default_factory=list)
    maps: dict[str, np.ndarray] = field(default_factory=dict)  # float32 (z, y, x)


@dataclass
class AnalysisResult:
    """What one analysis found on one volume."""

    analysis: str
    record: dict[str, Any]
    findings: list[Finding] = field(default_factory=list)
    overlays: Overlays = field(default_factory=Overlays)

    @property
    def applicable(self) -> bool:
        return bool(self.record.get("applicable", True))

    @property
    def flagged(self) -> bool:
        return bool(self.record.get("flagged", False))

    @classmethod
    def not_applicable(cls, analysis: str, reason: str) -> "AnalysisResult":
        return cls(
            analysis=analysis,
            record={"applicable": False, "reason": reason},
            findings=[Finding(analysis, Severity.INFO, f"not applicable: {reason}")],
        )


def worst_verdict(findings: list[Finding]) -> Verdict:
    rank = max((Severity(f.severity).rank for f in findings), default=0)
    return [Verdict.PASS, Verdict.REVIEW, Verdict.FAIL][rank]


def to_jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays, enums, tuples and non-finite floats for JSON.

    NaN and infinities become ``None`` so the output is strict JSON.
    """
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, enum.Enum):
        return obj.value
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    return obj


def finite_number(value: Any) -> float | None:
    """``value`` as a finite float, or None (bools, strings, NaN and None are not numbers)."""
    if isinstance(value, bool) or value is None:
        return None
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


#: decimals a measured value is shown with, by unit, in the report and the viewer
#: (common practice, no source): CT numbers to 0.01 HU (0.1 HU from 100 HU up), spatial
#: frequencies to 0.001 cycles/mm (finer than the NPS and TTF curves' sample spacing),
#: angles to 1 degree. Fixed decimals, so a column lines up and 0.170 does not read as
#: the less precise 0.17.
DECIMALS_BY_UNIT: dict[str, int] = {"HU": 2, "mm⁻¹": 3, "cycles/mm": 3, "deg": 0, "°": 0}
#: decimals of measured values without a unit, by ``analysis.key`` (the streak index to 0.01)
DECIMALS_BY_METRIC: dict[str, int] = {"streaks.index": 2}


def fixed_decimals(value: float, decimals: int) -> str:
    """``value`` with ``decimals`` decimals; a whole number as it is (``-1000``, ``30``)."""
    if value == int(value) and abs(value) < 1e6:
        return str(int(value))
    return f"{value:.{decimals}f}"


def display_number(value: Any, unit: str, metric: str = "") -> str | None:
    """A measured number as the report and the viewer show it: :data:`DECIMALS_BY_METRIC`
    for the metric (``analysis.key``) it lists, else :data:`DECIMALS_BY_UNIT` for the
    units it lists, else 4 significant digits; None when ``value`` is no finite number."""
    f = finite_number(value)
    if f is None:
        return None
    if metric in DECIMALS_BY_METRIC:
        return fixed_decimals(f, DECIMALS_BY_METRIC[metric])
    decimals = DECIMALS_BY_UNIT.get(unit)
    if decimals is None:
        return str(int(f)) if f == int(f) and abs(f) < 1e6 else f"{f:.4g}"
    if unit == "HU" and abs(f) >= 100:
        decimals = 1
    return fixed_decimals(f, decimals)


def _compact(value: Any) -> str:
    """One value as strict JSON on one line; numpy values, enums and non-finite floats
    are converted (``to_jsonable``) only when the value needs it."""
    try:
        return json.dumps(value, allow_nan=False)
    except (TypeError, ValueError):
        return json.dumps(to_jsonable(value), allow_nan=False)


def dumps(obj: Any) -> str:
    """Strict JSON text of ``obj``, laid out for large documents: a dict gives one line per
    key, and a list under a key gives one line per item (one line per series in
    ``results.json``); everything below is compact.

    Written with the json module's C encoder (an indented layout would use its pure
    Python encoder, several times slower on a run of thousands of series).
    """
    if not isinstance(obj, dict):
        return _compact(obj) + "\n"
    lines = []
    for key, value in obj.items():
        name = json.dumps(str(key))
        if isinstance(value, (list, tuple)) and value:
            items = ",\n".join(f"    {_compact(item)}" for item in value)
            lines.append(f"  {name}: [\n{items}\n  ]")
        else:
            lines.append(f"  {name}: {_compact(value)}")
    return "{\n" + ",\n".join(lines) + "\n}\n" if lines else "{}\n"
