"""The engine's runner of analyses: side by side or one after the other, the same results."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from reconaudit.checker import pipeline
from reconaudit.checker.load import load_path
from reconaudit.checker.results import dumps

DEMO = Path(__file__).resolve().parents[2] / "sample_volumes" / "fernhollow" / "20240611"


@pytest.fixture(scope="module")
def phantom_volume():
    (volume,) = load_path(DEMO / "qa_phantom")
    return volume


def _run(volume, monkeypatch, threads: int, **kwargs):
    monkeypatch.setattr(pipeline, "ANALYSIS_THREADS", threads)
    return pipeline.analyse_volume(volume, **kwargs)


def test_concurrent_analyses_give_the_sequential_results_in_the_same_order(phantom_volume, monkeypatch):
    one = _run(phantom_volume, monkeypatch, 1)
    two = _run(phantom_volume, monkeypatch, 2)
    assert list(two.results) == list(one.results) == pipeline._analyses.available()
    for name in one.results:
        assert dumps(two.results[name].record) == dumps(one.results[name].record), name
        assert [f.message for f in two.results[name].findings] == [f.message for f in one.results[name].findings]
    assert two.verdict == one.verdict


def test_a_failing_analysis_is_recorded_and_the_others_still_run(phantom_volume, monkeypatch):
    real_get = pipeline._analyses.get

    def get(name):
        if name == "air":
            def broken(volume, regions, settings=None):
                raise ValueError("simulated failure")
            return broken
        return real_get(name)

    monkeypatch.setattr(pipeline._analyses, "get", get)
    out = _run(phantom_volume, monkeypatch, 2)
    assert out.errors["air"]["kind"] == "analysis_failed"
    assert "simulated failure" in out.results["air"].record["reason"]
    others = [n for n in out.results if n != "air"]
    assert others and all(n not in out.errors for n in others)


def test_progress_reaches_done_and_cancel_stops_the_run(phantom_volume, monkeypatch):
    seen = []
    _run(phantom_volume, monkeypatch, 2, progress=lambda stage, fraction: seen.append((stage, fraction)))
    assert seen[-1] == ("done", 1.0)
    assert {s for s, _ in seen} >= set(pipeline._analyses.available())
    fractions = [f for _, f in seen]
    assert fractions == sorted(fractions)

    calls = {"n": 0}

    def cancel_after_first() -> bool:
        calls["n"] += 1
        return calls["n"] > 1

    with pytest.raises(pipeline.Cancelled):
        _run(phantom_volume, monkeypatch, 2, cancel=cancel_after_first)


def test_threads_follow_the_task_budget():
    from reconaudit.checker import batch, regions
    from reconaudit.checker.analyses import air, streaks

    saved = pipeline.ANALYSIS_THREADS, streaks.SCREEN_THREADS, regions.REGIONS_THREADS, air.AIR_THREADS
    try:
        batch._limit_threads(1)
        assert (pipeline.ANALYSIS_THREADS, streaks.SCREEN_THREADS, regions.REGIONS_THREADS, air.AIR_THREADS) == (1, 1, 1, 1)
    finally:
        pipeline.ANALYSIS_THREADS, streaks.SCREEN_THREADS, regions.REGIONS_THREADS, air.AIR_THREADS = saved
    assert np.isfinite(pipeline._cores())


def test_workers_is_the_core_budget_of_a_run():
    from pathlib import Path

    from reconaudit.checker.runner import CheckOptions, _threads_per_task, _worker_count

    def plan(workers, tasks, cores, scheduler=None):
        opts = CheckOptions(inputs=[Path(".")], out_dir=Path("."), workers=workers, scheduler=scheduler)
        n = _worker_count(opts, tasks, cores)
        return n, _threads_per_task(opts, n, cores)

    assert plan(None, 1, 2) == (1, 0)  # a lone series, every core: the analyses' default
    assert plan(None, 8, 2) == (2, 1)
    assert plan(1, 8, 2) == (1, 1)  # --workers 1 keeps the check on one core
    assert plan(1, 1, 4) == (1, 1)
    assert plan(2, 1, 4) == (1, 2)  # a lone series keeps the two cores it was given
    assert plan(2, 8, 4) == (2, 1)
    assert plan(4, 8, 2) == (4, 1)  # more processes than cores: one thread each
    assert plan(None, 8, 2, scheduler="tcp://127.0.0.1:1") == (2, 1)


def test_a_series_checked_in_process_leaves_the_thread_settings_as_they_were():
    from reconaudit.checker import batch, regions
    from reconaudit.checker.analyses import air, streaks

    def settings():
        return pipeline.ANALYSIS_THREADS, streaks.SCREEN_THREADS, regions.REGIONS_THREADS, air.AIR_THREADS

    before = settings()
    with batch.thread_budget(1):
        assert settings() == (1, 1, 1, 1)
    assert settings() == before
    with pytest.raises(RuntimeError):
        with batch.thread_budget(3):
            raise RuntimeError("an analysis failed")
    assert settings() == before


def test_workers_are_forked_with_the_enabled_analyses_already_imported():
    import subprocess
    import sys

    code = ("import sys\n"
            "from reconaudit.checker import batch\n"
            "batch.preload_worker_modules(['streaks', 'air', 'no-such-analysis'])\n"
            "names = ('reconaudit.checker.analyses.streaks', 'reconaudit.checker.analyses.air',\n"
            "         'reconaudit.checker.load', 'reconaudit.checker.pipeline')\n"
            "ok = all(n in sys.modules for n in names) and 'reconaudit.checker.analyses.ttf' not in sys.modules\n"
            "ok = ok and 'matplotlib' not in sys.modules\n"
            "batch.preload_worker_modules([], figures=True)\n"
            "sys.exit(0 if ok and 'matplotlib' in sys.modules else 1)\n")
    assert subprocess.run([sys.executable, "-c", code], timeout=300).returncode == 0
