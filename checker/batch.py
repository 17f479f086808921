"""Check many series: one series per task, in local worker processes or on Dask.

The main process discovers the series, decides which need checking (content hash and
profile digest), dispatches one task per series and collects the records. A worker
loads the series, runs the analyses, compares with the protocol baseline, renders the
series' figures and writes ``series/<id>.json`` atomically; so a killed run loses only
the series in flight, and a rerun with the same ``--out`` resumes from what is on disk.
A series whose worker dies is retried once, then recorded as an error.
"""
from __future__ import annotations

import contextlib
import gc
import json
import logging
import os
import tempfile
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

from . import __version__
from .baseline import compare_to_baseline, protocol_key
from .errors import ReconauditError
from .fsutil import atomic_write_text, safe_name, short_hash
from .profile import Profile
from .results import SCHEMA, Finding, Severity, dumps, to_jsonable, worst_verdict

log = logging.getLogger(__name__)

#: Series one worker process checks before it is replaced by a fresh one.
TASKS_PER_WORKER = 25

RESULT_KEYS = ("streaks", "air", "nps", "uniformity", "ttf")


@dataclass
class SeriesTask:
    """Everything a worker needs for one series (picklable)."""

    series_id: str
    source: Any  # load.SeriesSource
    content_hash: str
    out_dir: str
    profile: Profile
    baselines: dict[str, dict[str, Any]] = field(default_factory=dict)
    include_identifiers: bool = False
    figures: bool = True
    #: threads an analysis may use inside this worker (0: the analyses' own default);
    #: 1 when several worker processes already share the cores
    threads: int = 0
    #: bytes of the series' files on disk (the order of work: largest first)
    size_bytes: int = 0


def _thread_settings() -> tuple[tuple[Any, str], ...]:
    """(module, name) of every module-level thread limit of the stages that use threads."""
    from . import pipeline, regions
    from .analyses import air, streaks

    return ((pipeline, "ANALYSIS_THREADS"), (regions, "REGIONS_THREADS"), (streaks, "SCREEN_THREADS"),
            (air, "AIR_THREADS"))


def _limit_threads(n: int) -> None:
    """Keep the analyses that use threads to ``n`` in this process (0: leave them be)."""
    if n > 0:
        for module, name in _thread_settings():
            setattr(module, name, n)


@contextlib.contextmanager
def thread_budget(n: int):
    """``_limit_threads(n)`` for the duration of the block, then the settings as they were
    (a series checked in the calling process must not change its later analyses)."""
    saved = [(module, name, getattr(module, name)) for module, name in _thread_settings()]
    try:
        _limit_threads(n)
        yield
    finally:
        for module, name, value in saved:
            setattr(module, name, value)


def series_id_for(description: str, key: str) -> str:
    """Unique, file-system-safe id: a readable part and a hash of the series key."""
    return f"{safe_name(description or 'series', max_length=48)}-{short_hash(key)}"


def error_record(series_id: str, source: str, uid: str, exc: BaseException, **extra: Any) -> dict[str, Any]:
    kind = exc.kind if isinstance(exc, ReconauditError) else "internal_error"
    record = {
        "id": series_id,
        "source": source,
        "series_instance_uid": uid,
        "status": "error",
        "error": {"kind": kind, "message": str(exc) or type(exc).__name__},
        "verdict": None,
        "geometry": None,
        "findings": [],
    }
    record.update(extra)
    return record


# ---------------------------------------------------------------------- worker side
def _load(task: SeriesTask):
    from .load import load_series

    return load_series(task.source, include_identifiers=task.include_identifiers)


def _baseline_part(record: dict[str, Any], task: SeriesTask) -> tuple[dict | None, list[Finding]]:
    entry = task.baselines.get(record["protocol_key"])
    if entry is None:
        return None, []
    tolerances = {m: task.profile.baseline_tolerance(m) for m in task.profile.baseline}
    return compare_to_baseline(record, entry, tolerances)


def _render_figures(task: SeriesTask, volume, analysis, baseline: dict | None) -> dict[str, str]:
    if not task.figures:
        return {}
    try:
        from .report import render_series_figures
    except ImportError:
        return {}
    try:
        return render_series_figures(volume, analysis.regions, analysis.results, task.out_dir, task.series_id,
                                     baseline=baseline)
    except Exception as exc:  # a figure never costs the measurements
        log.warning("%s: figures not drawn: %s", task.series_id, exc)
        return {}


def run_series(task: SeriesTask) -> dict[str, Any]:
    """Check one series; returns its record (also written to ``series/<id>.json``)."""
    from .pipeline import analyse_volume

    src = task.source
    started = time.perf_counter()
    base = {"id": task.series_id, "source": str(src.source), "series_instance_uid": src.series_uid,
            "content_hash": task.content_hash, "profile_digest": task.profile.digest()}
    try:
        volume = _load(task)
    except Exception as exc:
        record = error_record(task.series_id, str(src.source), src.series_uid, exc,
                              content_hash=task.content_hash, profile_digest=task.profile.digest())
        _write_series_json(task, record)
        return record
    analysis = analyse_volume(volume, analyses=task.profile.enabled_analyses(), settings=task.profile.all_settings())
    record: dict[str, Any] = dict(base)
    record.update({
        "status": "error" if analysis.errors else "ok",
        "error": _analysis_error(analysis.errors),
        "geometry": volume.geometry_record(),
        "metadata": dict(volume.metadata),
        "protocol_key": protocol_key(volume.metadata, task.profile.protocol_key),
        "notes": list(volume.notes) + list(analysis.regions.notes),
        "regions": analysis.regions.facts(),
    })
    if task.include_identifiers:
        record["identifiers"] = dict(volume.identifiers)
    for name, result in analysis.results.items():
        record[name] = to_jsonable(result.record)
    findings = list(analysis.findings)
    findings += [Finding("load", Severity.INFO, n) for n in volume.notes]
    record["baseline"], base_findings = _baseline_part(record, task)
    findings += base_findings
    record["findings"] = [f.to_json() for f in findings]
    record["verdict"] = worst_verdict(findings).value
    record["figures"] = _render_figures(task, volume, analysis, task.baselines.get(record["protocol_key"]))
    record["analysis_seconds"] = round(time.perf_counter() - started, 3)
    _write_series_json(task, record)
    return record


def _analysis_error(errors: dict[str, dict[str, str]]) -> dict[str, str] | None:
    if not errors:
        return None
    names = ", ".join(sorted(errors))
    first = next(iter(errors.values()))
    return {"kind": "analysis_failed", "message": f"analysis failed: {names} ({first['message']})"}


def _write_series_json(task: SeriesTask, record: dict[str, Any]) -> None:
    atomic_write_text(Path(task.out_dir) / "series" / f"{task.series_id}.json", dumps(record))


def previous_record(out_dir: Path, series_id: str, content_hash: str, digest: str) -> dict[str, Any] | None:
    """A complete record of this series from an earlier (possibly killed) run."""
    path = out_dir / "series" / f"{series_id}.json"
    try:
        rec = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if rec.get("content_hash") == content_hash and rec.get("profile_digest") == digest and rec.get("status") == "ok":
        return rec
    return None


# ---------------------------------------------------------------------- dispatch
Runner = Callable[[list[SeriesTask], Callable[[dict[str, Any]], None]], None]


def _crash_record(task: SeriesTask, why: str) -> dict[str, Any]:
    exc = ReconauditError(f"the worker checking this series died twice ({why}); recorded as an error")
    exc.kind = "worker_died"  # type: ignore[misc]
    rec = error_record(task.series_id, str(task.source.source), task.source.series_uid, exc,
                       content_hash=task.content_hash, profile_digest=task.profile.digest())
    return rec


def run_local(tasks: list[SeriesTask], on_done: Callable[[dict[str, Any]], None], *, workers: int = 1,
              max_attempts: int = 2) -> None:
    """Run tasks in ``workers`` processes (in-process when workers == 1).

    When a worker dies the whole pool breaks and every unfinished task fails with it, so
    the death is charged only to the tasks that had started (each worker marks the task
    it runs); the others are resubmitted free. A charged task is retried alone in its
    own process, so a second death is unambiguously its own and it is recorded as an
    error (``worker_died``) after ``max_attempts`` attempts.

    Workers are recycled by giving each pool at most ``TASKS_PER_WORKER`` tasks per
    worker (memory stays bounded over a long batch). The executor's own
    ``max_tasks_per_child`` is not used: on Python 3.11 a pool given more tasks than
    ``max_workers * max_tasks_per_child`` hangs once its first workers retire.
    """
    if workers <= 1:
        for task in tasks:
            on_done(_safe_run(task))
        return
    if tasks:
        preload_worker_modules(tasks[0].profile.enabled_analyses(), figures=any(t.figures for t in tasks))
    attempts = {t.series_id: 0 for t in tasks}
    shared, alone = list(tasks), []
    with tempfile.TemporaryDirectory(prefix="reconaudit-running-") as marks:
        while shared or alone:
            chunks = [shared[i:i + workers * TASKS_PER_WORKER] for i in range(0, len(shared), workers * TASKS_PER_WORKER)]
            groups = [(chunk, workers) for chunk in chunks] + [([t], 1) for t in alone]
            shared, alone = [], []
            for group, n_proc in groups:
                lost = _pool_round(group, on_done, n_proc, marks)
                if lost and not any(started for _, _, started in lost):  # broke before any task ran
                    lost = [(task, why, True) for task, why, _ in lost]
                for task, why, started in lost:
                    if not started:
                        shared.append(task)  # never ran: resubmitted, no attempt charged
                    elif attempts[task.series_id] + 1 < max_attempts:
                        attempts[task.series_id] += 1
                        log.warning("%s: worker died; retrying once, alone", task.series_id)
                        alone.append(task)
                    else:
                        on_done(_crash_record(task, why))


def preload_worker_modules(analyses: Iterable[str], figures: bool = False) -> None:
    """Import what a worker runs (loader, pipeline, the enabled analyses, the figures when
    they are drawn) in this process.

    Local workers are forked from it, so they start with these modules in memory instead
    of importing them again (about half a second each) whenever a pool is started or
    recycled. An analysis whose module does not import is left to fail in its series.
    """
    from . import load, pipeline  # noqa: F401
    from .analyses import get

    for name in analyses:
        with contextlib.suppress(ImportError, KeyError):
            get(name)
    if figures:
        with contextlib.suppress(ImportError):
            from .report import figures as _figures  # noqa: F401


def _pool_round(tasks: list[SeriesTask], on_done: Callable[[dict[str, Any]], None], workers: int,
                marks: str) -> list[tuple[SeriesTask, str, bool]]:
    """Run ``tasks`` in one pool; return (task, reason, started) for those lost with the pool.

    The objects of this process are frozen out of the garbage collector while the pool
    runs, so a forked worker's collections do not write to (and copy) every page it
    inherited (``gc.freeze``, Python documentation). Once every result is in, the pool is
    shut down without waiting for its idle processes to exit (they have nothing left to
    do; waiting only delays the outputs)."""
    lost = []
    gc.freeze()
    pool = ProcessPoolExecutor(max_workers=min(workers, len(tasks)))
    try:
        futures = {pool.submit(_marked_run, task, marks): task for task in tasks}
        for fut in as_completed(futures):
            task = futures[fut]
            try:
                record = fut.result()
            except BrokenProcessPool as exc:
                started = os.path.exists(_mark_path(marks, task))
                lost.append((task, str(exc) or "process pool broken", started))
                continue
            on_done(record)
    except BaseException:
        pool.shutdown(wait=True, cancel_futures=True)
        raise
    finally:
        gc.unfreeze()
    pool.shutdown(wait=False)
    for task, _, _ in lost:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(_mark_path(marks, task))
    return lost


def _mark_path(marks: str, task: SeriesTask) -> str:
    return os.path.join(marks, f"{short_hash(task.series_id, length=16)}.running")


def _marked_run(task: SeriesTask, marks: str) -> dict[str, Any]:
    """_safe_run in a pool worker, with a marker file present while the task runs."""
    path = _mark_path(marks, task)
    with open(path, "w"):
        pass
    record = _safe_run(task)
    os.unlink(path)
    return record


def run_dask(tasks: list[SeriesTask], on_done: Callable[[dict[str, Any]], None], *, address: str,
             max_attempts: int = 2) -> None:
    """Send one task per series to a Dask distributed scheduler at ``address``."""
    try:
        from distributed import Client, as_completed
    except ImportError as exc:  # pragma: no cover - optional extra
        raise ReconauditError("--scheduler needs the 'dask' extra: pip install 'reconaudit[dask]'") from exc
    with Client(address, timeout="30s") as client:
        futures = {client.submit(_safe_run, t, key=f"reconaudit-{t.series_id}-{t.content_hash[:8]}",
                                 retries=max_attempts - 1, pure=False): t for t in tasks}
        for fut in as_completed(futures):
            task = futures[fut]
            try:
                on_done(fut.result())
            except Exception as exc:
                on_done(_crash_record(task, f"{type(exc).__name__}: {exc}"))


def _safe_run(task: SeriesTask) -> dict[str, Any]:
    """run_series, turning any unexpected exception into an error record."""
    try:
        with thread_budget(task.threads):
            return run_series(task)
    except Exception as exc:
        log.debug("%s failed:\n%s", task.series_id, traceback.format_exc())
        return error_record(task.series_id, str(task.source.source), task.source.series_uid, exc,
                            content_hash=task.content_hash, profile_digest=task.profile.digest())


def default_workers() -> int:
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))


def results_document(records: Iterable[dict[str, Any]], profile: Profile, started: str = "") -> dict[str, Any]:
    return {
        "schema": SCHEMA,
        "tool_version": __version__,
        "started": started,
        "profile": profile.summary(),
        "series": sorted(records, key=lambda r: r["id"]),
    }
