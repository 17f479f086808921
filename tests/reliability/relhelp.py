"""Helpers of the reliability tests (imported by conftest.py and the test modules)."""
from __future__ import annotations

import contextlib
import io
import json
import logging
import os
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


class DyingSource:
    """Builds a series source whose worker process dies (``os._exit``) while loading it.

    The returned object is a :class:`SeriesSource` subclass instance; reading its
    ``files`` in any process other than the one that made it (a pool or Dask worker)
    kills that process, ``deaths`` times in all (counted by marker files in ``marks``).
    The class lives in this importable module so spawned workers can unpickle it.
    """

    @staticmethod
    def wrap(src, marks: Path, deaths: int):
        return _Dying(src.key, src.source, src.series_uid, src.kind, list(src.files), src.description,
                      src.modality, list(src.notes), str(marks), deaths, os.getpid())


from dataclasses import dataclass  # noqa: E402

from reconaudit.checker.load import SeriesSource  # noqa: E402


@dataclass
class _Dying(SeriesSource):
    marks: str = ""
    deaths: int = 0
    home_pid: int = 0

    def __getattribute__(self, name: str):
        if name == "files" and os.getpid() != object.__getattribute__(self, "home_pid"):
            marks = Path(object.__getattribute__(self, "marks"))
            n = len(list(marks.glob("death-*")))
            if n < object.__getattribute__(self, "deaths"):
                (marks / f"death-{n}-{os.getpid()}").touch()
                os._exit(13)  # the worker dies mid-series, no cleanup
        return object.__getattribute__(self, name)


def patch_discovery_to_kill(monkeypatch, fragment: str, marks: Path, deaths: int) -> None:
    """Make the series whose description contains ``fragment`` kill its worker."""
    from reconaudit.checker import load

    real = load.discover

    def discover(inputs):
        found = real(inputs)
        found.series = [DyingSource.wrap(s, marks, deaths) if fragment in s.description else s for s in found.series]
        return found

    monkeypatch.setattr(load, "discover", discover)
