"""Helpers of the reliability tests (imported by conftest.py and the test modules)."""
from __future__ import annotations

import contextlib
import io
import json
import logging
import sys
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "corpus"))

import make_corpus  # noqa: E402


def write_good_series(folder: Path, n_series: int, *, nz: int = 4, n: int = 40, prefix: str = "series") -> list[Path]:
    """``n_series`` small valid CT series, one sub-folder each; returns the folders."""
    out = []
    for i in range(n_series):
        sub = folder / f"{prefix}_{i:03d}"
        make_corpus.write_series(sub, f"{prefix}-{i}", nz=nz, n=n, description=f"Fernhollow {prefix} {i}")
        out.append(sub)
    return out


class LogText(logging.Handler):
    """Collects every log line of a run as text."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(self.format(record))


def run_cli(argv: list[str]) -> dict[str, Any]:
    """``reconaudit`` in this process; exit code, stdout, stderr and log lines."""
    from reconaudit.checker import cli

    handler = LogText()
    root = logging.getLogger()
    old_level = root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    out, err = io.StringIO(), io.StringIO()
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            rc = cli.main(argv)
    finally:
        root.removeHandler(handler)
        root.setLevel(old_level)
    return {"rc": rc, "stdout": out.getvalue(), "stderr": err.getvalue(), "log": "\n".join(handler.lines)}


def comparable(record: dict[str, Any]) -> dict[str, Any]:
    """A series record without the fields that depend on timing or the output folder."""
    drop = {"analysis_seconds", "figures"}
    return {k: v for k, v in json.loads(json.dumps(record)).items() if k not in drop}
