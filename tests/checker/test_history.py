"""Tests of the measurement history (SQLite): WAL, idempotent recording, crash safety,
skip logic, control limits and trend charts."""
from __future__ import annotations

import math
import sqlite3
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from reconaudit.checker import history as history_mod
from reconaudit.checker.history import History, control_limits, flatten_metrics


def series_record(sid: str, noise: float = 10.0, status: str = "ok") -> dict:
    """An invented series entry with the record keys the analyses produce."""
    return {
        "id": sid, "status": status, "verdict": "pass" if status == "ok" else None,
        "nps": {"noise_hu": noise, "f_peak_per_mm": 0.25, "f_av_per_mm": 0.3, "roi_count": 4,
                "frequency_per_mm": [0.0, 0.1], "nps_1d_hu2mm2": [0.0, 1.0]},
        "uniformity": {"water_hu": 1.0, "uniformity_hu": 2.0, "centre_sd_hu": noise},
        "streaks": {"index": 1.2, "flagged_slices": [3, 4], "missing_wedge_deg": None},
        "air": {"mean_hu": -998.0, "noise_hu": 8.0, "structures": [{"flagged": True}, {"flagged": False}]},
        "ttf": {"edges": [{"contrast_hu": 340.2, "f50_per_mm": 0.4, "f10_per_mm": 0.7},
                          {"contrast_hu": 340.0, "f50_per_mm": 0.41, "f10_per_mm": float("nan")},
                          {"contrast_hu": -900.0, "f50_per_mm": 0.38}]},
    }


@pytest.fixture()
def hist(tmp_path):
    h = History(tmp_path / "db" / "history.sqlite")
    yield h
    h.close()


# -------------------------------------------------------------------------- metrics
def test_flatten_metrics_keys_and_values():
    m = flatten_metrics(series_record("a"))
    assert m["nps.noise_hu"] == 10.0 and m["nps.f_av_per_mm"] == 0.3 and m["nps.f_peak_per_mm"] == 0.25
    assert m["uniformity.water_hu"] == 1.0 and m["uniformity.uniformity_hu"] == 2.0
    assert m["streaks.index"] == 1.2 and m["streaks.flagged_slice_count"] == 2.0
    assert "streaks.missing_wedge_deg" not in m  # None is not a number
    assert m["air.flagged_count"] == 1.0 and m["air.structure_count"] == 2.0 and m["air.noise_hu"] == 8.0
    assert m["ttf.f50_per_mm@+340HU"] == 0.4 and m["ttf.f50_per_mm@+340HU#2"] == 0.41
    assert "ttf.f10_per_mm@+340HU#2" not in m  # NaN dropped
    assert m["ttf.f50_per_mm@-900HU"] == 0.38
    assert all(isinstance(v, float) and math.isfinite(v) for v in m.values())


def test_flatten_metrics_skips_not_applicable_and_missing():
    rec = {"id": "x", "nps": {"applicable": False, "reason": "no ROI"}, "ttf": {"edges": "broken"}}
    assert flatten_metrics(rec) == {}


# ------------------------------------------------------------------------- database
def test_wal_mode_and_schema_version(hist):
    assert hist.journal_mode == "wal"
    other = sqlite3.connect(str(hist.db_path))
    assert other.execute("PRAGMA journal_mode").fetchone()[0].lower() == "wal"
    assert other.execute("SELECT value FROM schema_info WHERE key='schema_version'").fetchone()[0] == str(
        history_mod.SCHEMA_VERSION)
    other.close()
    assert hist.schema_version == history_mod.SCHEMA_VERSION


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "h.sqlite"
    History(path).close()
    con = sqlite3.connect(str(path))
    con.execute("UPDATE schema_info SET value = '99' WHERE key = 'schema_version'")
    con.commit()
    con.close()
    with pytest.raises(history_mod.HistoryError, match="99"):
        History(path)


def test_rerecording_replaces_never_duplicates(hist):
    run = hist.start_run("run-1", tool_version="0.1.0", profile_name="nightly")
    n = hist.record_series(run, series_record("s1"), "hash-1", "prof-1", "head")
    assert n == len(flatten_metrics(series_record("s1")))
    hist.record_series(run, series_record("s1", noise=11.0), "hash-1", "prof-1", "head")
    hist.start_run("run-1", tool_version="0.1.0", profile_name="nightly")  # restarted run
    assert hist.count_rows("runs") == 1 and hist.count_rows("series") == 1
    assert hist.count_rows("measurements") == n
    assert [v for _, v, _ in hist.trend("head", "nps.noise_hu")] == [11.0]


def test_failed_transaction_leaves_nothing(hist, monkeypatch):
    run = hist.start_run("run-1")
    hist.record_series(run, series_record("s1"), "h1", "p", "head")
    before = (hist.count_rows("series"), hist.count_rows("measurements"))
    monkeypatch.setattr(history_mod, "flatten_metrics", lambda rec: {"nps.noise_hu": 1.0, "nps.bad": None})
    with pytest.raises(sqlite3.IntegrityError):
        hist.record_series(run, series_record("s2"), "h2", "p", "head")
    assert (hist.count_rows("series"), hist.count_rows("measurements")) == before
    assert not hist.already_checked("h2", "p")


def test_killed_process_then_rerun_has_no_duplicates(tmp_path):
    """A process killed inside record_series (after the series row, before the
    measurements) leaves no partial series; re-running the same run records each once."""
    db = tmp_path / "h.sqlite"
    script = textwrap.dedent(f"""
        import os, sys
        sys.path.insert(0, {str(__import__('pathlib').Path(__file__).parent)!r})
        from test_history import series_record
        from reconaudit.checker.history import History
        h = History({str(db)!r})
        run = h.start_run("nightly-7")
        h.record_series(run, series_record("s1"), "h1", "p", "head")
        class Killer:
            def __getattr__(self, name):
                return getattr(h._conn_real, name)
            def execute(self, *a):
                return h._conn_real.execute(*a)
            def executemany(self, *a):
                os._exit(9)   # the machine dies half-way through the second series
        h._conn_real = h._conn
        h._conn = Killer()
        h.record_series(run, series_record("s2"), "h2", "p", "head")
    """)
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 9, proc.stderr
    with History(db) as h:
        assert h.count_rows("series") == 1  # s2 was rolled back with the dead process
        assert h.already_checked("h1", "p") and not h.already_checked("h2", "p")
        run = h.start_run("nightly-7")
        for sid, chash in (("s1", "h1"), ("s2", "h2")):
            h.record_series(run, series_record(sid), chash, "p", "head")
        per_series = len(flatten_metrics(series_record("s1")))
        assert h.count_rows("series") == 2 and h.count_rows("measurements") == 2 * per_series


def test_already_checked(hist):
    run = hist.start_run()
    assert not hist.already_checked("h1", "p1")
    hist.record_series(run, series_record("s1"), "h1", "p1", "head")
    assert hist.already_checked("h1", "p1")
    assert not hist.already_checked("h1", "p2")  # another profile: check again
    assert not hist.already_checked("h9", "p1")
    hist.record_series(run, series_record("s2", status="error"), "h2", "p1", "head")
    assert not hist.already_checked("h2", "p1")  # errors are retried
    assert hist.count_rows("series") == 2


# -------------------------------------------------------------------- control limits
def test_control_limits_worked_example():
    """mean 12, sample SD 2 (n - 1) -> limits 6 and 18 (arithmetic)."""
    mean, lo, hi = control_limits([10.0, 12.0, 14.0])
    assert (mean, lo, hi) == pytest.approx((12.0, 6.0, 18.0))
    assert control_limits([1.0, float("nan"), 3.0])[0] == pytest.approx(2.0)
    with pytest.raises(ValueError):
        control_limits([5.0])


def _fill(hist: History, values: list[float], protocol: str = "head") -> list[str]:
    runs = []
    for i, v in enumerate(values):
        run = hist.start_run(f"{protocol}-run-{i:02d}", started=f"2026-01-{i + 1:02d}T01:00:00")
        hist.record_series(run, series_record(f"{protocol}-s{i}", noise=v), f"{protocol}-h{i}", "p", protocol,
                           checked_at=f"2026-01-{i + 1:02d}T01:30:00")
        runs.append(run)
    return runs


def test_outlier_outside_limits_first_n(hist, tmp_path):
    values = [10.0, 10.4, 9.7, 10.2, 9.9, 10.1, 10.3, 14.0, 9.8]
    runs = _fill(hist, values)
    mean, lo, hi = hist.limits("head", "nps.noise_hu")
    assert mean == pytest.approx(np.mean(values[:5]))
    assert hi - mean == pytest.approx(3 * np.std(values[:5], ddof=1))
    outside = hist.outside_limits("head", "nps.noise_hu")
    assert [(r, v) for _, v, r in outside] == [(runs[7], 14.0)]
    assert [v for _, v, _ in hist.trend("head", "nps.noise_hu")] == values  # oldest first
    png = hist.plot_trend("head", "nps.noise_hu", tmp_path / "charts" / "noise.png")
    from matplotlib.image import imread

    img = imread(str(png))
    assert img.ndim == 3 and float(img[..., :3].std()) > 0.02
    # the outlier cross is drawn in the limit colour (#c0392b)
    red = (np.abs(img[..., 0] - 0xC0 / 255) < 0.06) & (np.abs(img[..., 1] - 0x39 / 255) < 0.06) & (
        np.abs(img[..., 2] - 0x2B / 255) < 0.06)
    assert red.sum() > 50


def test_marked_baseline_runs_take_precedence(hist):
    values = [20.0, 20.5, 19.5, 10.0, 10.2, 9.8, 10.1]
    runs = _fill(hist, values)
    for run in runs[3:6]:
        hist.mark_baseline(run)
    vals, rule = hist.baseline_values("head", "nps.noise_hu")
    assert rule == "marked" and vals == [10.0, 10.2, 9.8]
    outside = {v for _, v, _ in hist.outside_limits("head", "nps.noise_hu")}
    assert outside == {20.0, 20.5, 19.5}
    with pytest.raises(KeyError):
        hist.mark_baseline("no-such-run")


def test_too_few_points_gives_no_limits(hist, tmp_path):
    _fill(hist, [10.0])
    assert hist.limits("head", "nps.noise_hu") is None
    assert hist.outside_limits("head", "nps.noise_hu") == []
    assert hist.plot_trend("head", "nps.noise_hu", tmp_path / "one.png").is_file()


def test_protocols_and_metrics_listed(hist):
    _fill(hist, [10.0, 11.0], protocol="head")
    _fill(hist, [5.0], protocol="body")
    assert hist.protocols() == ["body", "head"]
    assert "nps.noise_hu" in hist.metrics("head") and "ttf.f50_per_mm@+340HU" in hist.metrics("head")
