"""Faults during a run: a worker killed mid-series, the whole run killed, a full disk.

The killed worker is real: the worker process (a spawned pool process or a Dask worker)
calls ``os._exit`` while loading the series (``relhelp.DyingSource``).
"""
from __future__ import annotations

import errno
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from relhelp import comparable, patch_discovery_to_kill, run_cli, write_good_series

from reconaudit.checker.runner import CheckOptions, check


def _options(inputs: Path, out: Path, **kw) -> CheckOptions:
    kw.setdefault("figures", False)
    return CheckOptions(inputs=[inputs], out_dir=out, **kw)


@pytest.mark.parametrize("deaths, expect", [(1, "ok"), (5, "worker_died")])
def test_local_pool_retries_a_killed_worker_once(four_series, tmp_path, monkeypatch, deaths, expect):
    """A series whose worker dies is retried once; dying twice makes it an error; the rest completes."""
    patch_discovery_to_kill(monkeypatch, "series 0", tmp_path, deaths)
    outcome = check(_options(four_series, tmp_path / "out", workers=2))
    by_id = {r["id"]: r for r in outcome.document["series"]}
    target = [r for sid, r in by_id.items() if "series-0" in sid]
    assert len(by_id) == 4 and len(target) == 1
    attempts = len(list(tmp_path.glob("death-*")))
    if expect == "ok":
        assert attempts == 1 and target[0]["status"] == "ok"
    else:
        assert attempts == 2, "retried exactly once"
        assert target[0]["status"] == "error" and target[0]["error"]["kind"] == "worker_died"
        assert target[0]["series_instance_uid"]
    others = [r for sid, r in by_id.items() if "series-0" not in sid]
    assert all(r["status"] == "ok" for r in others), [r.get("error") for r in others]
    assert json.loads((tmp_path / "out" / "results.json").read_text())["series"] == outcome.document["series"]


def test_pool_recycles_workers_without_hanging(four_series, tmp_path, monkeypatch):
    """More series than workers x TASKS_PER_WORKER: fresh pools take over and every series completes.

    (Python 3.11's own max_tasks_per_child hung in exactly this situation.)
    """
    from reconaudit.checker import batch

    monkeypatch.setattr(batch, "TASKS_PER_WORKER", 1)
    pids = []
    real = batch._safe_run
    monkeypatch.setattr(batch, "_safe_run", lambda task: dict(real(task), worker_pid=os.getpid()))
    doc = check(_options(four_series, tmp_path / "out", workers=2)).document
    assert len(doc["series"]) == 4 and all(r["status"] == "ok" for r in doc["series"])
    pids = {r["worker_pid"] for r in doc["series"]}
    assert len(pids) >= 3, "each pool of two tasks had its own worker processes"
    assert os.getpid() not in pids


def test_two_workers_equal_one_worker(four_series, tmp_path):
    one = check(_options(four_series, tmp_path / "one", workers=1)).document["series"]
    two = check(_options(four_series, tmp_path / "two", workers=2)).document["series"]
    assert [comparable(r) for r in one] == [comparable(r) for r in two]
    assert len(one) == 4 and all(r["status"] == "ok" for r in one)


# ---------------------------------------------------------------------- Dask
#: Scheduler settings under which "retried once" holds on Dask: a task whose worker dies
#: twice fails (allowed-failures 1), and a worker holds only the task it runs
#: (worker-saturation 1.0), so a death is charged to that task alone.
DASK_CONFIG = {"distributed.scheduler.allowed-failures": 1, "distributed.scheduler.worker-saturation": 1.0}


@pytest.fixture(scope="module")
def dask_cluster():
    """A real LocalCluster on loopback: 2 worker processes, 1 thread each, no dashboard."""
    distributed = pytest.importorskip("distributed")
    import dask

    with dask.config.set(DASK_CONFIG):
        cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                           host="127.0.0.1", silence_logs=50)
    yield cluster
    cluster.close()


def test_dask_run_equals_local_run(four_series, tmp_path, dask_cluster):
    """A real LocalCluster on loopback (processes, 2 workers) gives the local records."""
    cluster = dask_cluster
    local = check(_options(four_series, tmp_path / "local", workers=1)).document["series"]
    remote = check(_options(four_series, tmp_path / "dask", scheduler=cluster.scheduler_address)).document["series"]
    assert [comparable(r) for r in local] == [comparable(r) for r in remote]


@pytest.mark.parametrize("deaths, expect", [(1, "ok"), (5, "worker_died")])
def test_dask_worker_killed_mid_series(four_series, tmp_path, dask_cluster, monkeypatch, deaths, expect):
    """A Dask worker process that dies mid-series: retried once (allowed-failures 1), then an error."""
    patch_discovery_to_kill(monkeypatch, "series 1", tmp_path, deaths)
    cluster = dask_cluster
    doc = check(_options(four_series, tmp_path / "out", scheduler=cluster.scheduler_address)).document
    target = [r for r in doc["series"] if "series-1" in r["id"]]
    assert len(doc["series"]) == 4 and len(target) == 1
    deaths_seen = len(list(tmp_path.glob("death-*")))
    if expect == "ok":
        assert deaths_seen == 1 and target[0]["status"] == "ok"
    else:
        assert deaths_seen == 2
        assert target[0]["status"] == "error" and target[0]["error"]["kind"] == "worker_died"
    others = [r for r in doc["series"] if "series-1" not in r["id"]]
    assert all(r["status"] == "ok" for r in others), [r.get("error") for r in others]


# ---------------------------------------------------------------------- whole run killed
def _history_rows(db: Path) -> list[tuple]:
    with sqlite3.connect(db) as con:
        return con.execute("SELECT run_id, series_id FROM series ORDER BY series_id").fetchall()


def test_run_killed_then_resumed(tmp_path):
    """SIGKILL mid-run, rerun with the same --out: no duplicate history rows, no partial files."""
    inputs = tmp_path / "in"
    write_good_series(inputs, 6, prefix="nightly")
    out, db = tmp_path / "out", tmp_path / "history.sqlite"
    cmd = [sys.executable, "-m", "reconaudit.checker.cli", "check", str(inputs), "--out", str(out),
           "--db", str(db), "--baselines", str(tmp_path / "baselines.json"), "--workers", "1", "--no-figures"]
    env = dict(os.environ, RECONAUDIT_HOME=str(tmp_path / "home"))
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and proc.poll() is None:
        if len(list((out / "series").glob("*.json"))) >= 2:
            break
        time.sleep(0.05)
    assert proc.poll() is None, "the run finished before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done_before = {p.name: p.stat().st_mtime_ns for p in (out / "series").glob("*.json")}
    assert 2 <= len(done_before) < 6
    assert not json.loads((out / "run.json").read_text())["finished"]

    rerun = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=300)
    assert rerun.returncode in (0, 1), rerun.stderr[-2000:]
    doc = json.loads((out / "results.json").read_text())
    assert len(doc["series"]) == 6 and all(r["status"] == "ok" for r in doc["series"])
    for name, mtime in done_before.items():  # resumed: finished series were not checked again
        assert (out / "series" / name).stat().st_mtime_ns == mtime
    rows = _history_rows(db)
    assert len(rows) == 6 and len({sid for _, sid in rows}) == 6, rows
    assert len({run for run, _ in rows}) == 1, "the resumed run keeps its run id"
    leftovers = [p for p in out.rglob("*") if p.name.endswith((".part", ".tmp"))]
    assert not leftovers, leftovers
    for p in out.rglob("*.json"):
        json.loads(p.read_text())  # every JSON file is whole


# ---------------------------------------------------------------------- full disk
def test_full_disk_while_writing_the_report(four_series, tmp_path, monkeypatch):
    """ENOSPC from the report writer: a clear error (exit 2), results.json complete and intact."""
    from reconaudit.checker import report

    def no_space(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(report, "write_report", no_space)
    out = tmp_path / "out"
    res = run_cli(["check", str(four_series), "--out", str(out), "--no-history", "--workers", "1", "--no-figures"])
    assert res["rc"] == 2
    assert "cannot write report.html (No space left on device)" in res["stderr"]
    assert "internal error" not in res["stderr"]
    doc = json.loads((out / "results.json").read_text())
    assert len(doc["series"]) == 4 and all(r["status"] == "ok" for r in doc["series"])
    assert not (out / "report.html").exists()
    assert not json.loads((out / "run.json").read_text())["finished"]


def test_rerun_removes_partial_files_of_a_killed_run(four_series, tmp_path):
    """Temporary files of atomic writes interrupted by a kill are removed by the rerun."""
    out = tmp_path / "out"
    (out / "series").mkdir(parents=True)
    stale = [out / ".results.json.k1ll3d.part", out / "series" / ".x-1234.json.abcd.part", out / ".report-zz.html.tmp"]
    for p in stale:
        p.write_text('{"half": ')
    keep = out / "notes-by-the-physicist.txt"
    keep.write_text("not ours")
    check(_options(four_series, out, workers=1))
    assert not [p for p in stale if p.exists()]
    assert keep.exists()
