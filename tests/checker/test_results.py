"""The JSON writer of the checker's outputs (results.json, series/<id>.json)."""
from __future__ import annotations

import enum
import json

import numpy as np
import pytest

from reconaudit.checker.results import Severity, dumps, to_jsonable


class _Colour(enum.Enum):
    GREEN = 2


def _mixed() -> dict:
    return {
        "schema": "reconaudit.results/1",
        "numbers": {"f32": np.float32(0.25), "i64": np.int64(7), "nan": float("nan"), "inf": np.float64(np.inf)},
        "flags": [np.bool_(True), False, None],
        "array": np.arange(3, dtype=np.int16),
        "tuple": (1.5, "two"),
        "enums": [Severity.REVIEW, _Colour.GREEN],
        "empty_list": [],
        "empty_dict": {},
        "series": [{"id": "a", "index": np.float64(1.25)}, {"id": "b", "index": float("nan")}],
    }


def test_dumps_is_strict_json_equal_to_the_converted_document() -> None:
    """Numpy scalars and arrays, enums, tuples and non-finite floats (null) come out as
    ``to_jsonable`` converts them; the text is strict JSON (no NaN literals)."""
    text = dumps(_mixed())
    assert "NaN" not in text and "Infinity" not in text
    assert json.loads(text) == to_jsonable(_mixed())
    assert json.loads(text)["numbers"]["nan"] is None


def test_dumps_puts_one_key_per_line_and_one_series_per_line() -> None:
    doc = _mixed()
    lines = dumps(doc).splitlines()
    assert lines[0] == "{" and lines[-1] == "}"
    series_lines = [ln for ln in lines if ln.startswith('    {"id": ')]
    assert [json.loads(ln.strip().rstrip(","))["id"] for ln in series_lines] == ["a", "b"]
    key_lines = [ln for ln in lines if ln.startswith('  "')]
    assert [ln.split('"')[1] for ln in key_lines] == list(doc)


@pytest.mark.parametrize("value", [[1, 2], "text", 3.5, {}])
def test_dumps_of_other_values_round_trips(value) -> None:
    assert json.loads(dumps(value)) == value
