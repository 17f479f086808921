"""One ``check`` run: discover, decide what to check, dispatch, record, write outputs.

Outputs in ``--out`` (every file written atomically):

* ``series/<id>.json`` — one complete record per series, written by the worker;
* ``results.json`` — the run's document (schema ``reconaudit.results/1``);
* ``results.csv`` — one row per series with the headline numbers;
* ``report.html`` and ``figures/`` — the report.

Every finished series is on disk at once in ``series/<id>.json``, so whatever was
measured before a crash or a full disk is kept. ``results.json`` is rewritten while the
run goes on (so a reader can follow it), but at most as often as :class:`InterimWrites`
allows: its cost grows with the number of series, and rewriting it after every series of
a run of thousands would make the run quadratic. It is always written at the end. A rerun
with the same ``--out`` reuses the complete per-series records (same content hash and
profile) instead of re-checking.
"""
from __future__ import annotations

import json
import logging
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from . import __version__
from .batch import (SeriesTask, default_workers, error_record, previous_record, results_document, run_dask,
                    run_local, series_id_for)
from .baseline import BaselineStore
from .errors import ReconauditError
from .fsutil import atomic_write_text, fingerprint_and_bytes, safe_name, short_hash
from .profile import Profile, load_profile
from .results import dumps

log = logging.getLogger(__name__)


class OutputWriteError(ReconauditError):
    """An output file (CSV, report) could not be written; the results are on disk."""

    kind = "output_not_written"


@dataclass
class CheckOptions:
    inputs: list[Path]
    out_dir: Path
    profile_path: str | None = None
    workers: int | None = None
    scheduler: str | None = None
    db_path: Path | None = None
    baselines_path: Path | None = None
    force: bool = False
    include_identifiers: bool = False
    figures: bool = True


@dataclass
class CheckOutcome:
    document: dict[str, Any]
    skipped: list[dict[str, Any]] = field(default_factory=list)
    run_id: str = ""


def _problem_record(problem) -> dict[str, Any]:
    path = str(problem.path)
    sid = f"{safe_name(Path(path).name, max_length=40, fallback='file')}-{short_hash(path)}"
    return error_record(sid, path, "", problem.error)


def _unique_ids(sources) -> dict[str, str]:
    """series key -> id; ids are unique even when descriptions repeat."""
    ids: dict[str, str] = {}
    seen: set[str] = set()
    for src in sources:
        base = series_id_for(src.description or Path(str(src.source)).name, src.key)
        sid, n = base, 2
        while sid in seen:
            sid, n = f"{base}-{n}", n + 1
        seen.add(sid)
        ids[src.key] = sid
    return ids


def _remove_partial_files(out_dir: Path) -> list[Path]:
    """Delete the temporary files a killed run left behind (atomic writes in progress).

    Only names our own writers make: ``.<name>.<random>.part`` (fsutil) and
    ``.report-<random>.html.tmp`` (the report). They were never renamed into place, so
    nothing that was complete is lost.
    """
    removed = []
    for path in out_dir.rglob(".*"):
        if path.is_file() and (path.name.endswith(".part") or
                               (path.name.startswith(".report-") and path.name.endswith(".html.tmp"))):
            try:
                path.unlink()
            except OSError as exc:
                log.warning("could not remove the partial file %s: %s", path, exc)
                continue
            removed.append(path)
    if removed:
        log.info("removed %d partial file(s) left by an interrupted run", len(removed))
    return removed


def _run_id(out_dir: Path) -> str:
    """Reuse the run id of an unfinished run in the same folder (a resume)."""
    state = out_dir / "run.json"
    try:
        doc = json.loads(state.read_text())
        if not doc.get("finished"):
            return str(doc["run_id"])
    except (OSError, ValueError, KeyError):
        pass
    return uuid.uuid4().hex[:16]


class InterimWrites:
    """When to rewrite the interim ``results.json``: bounded share of the run's time.

    A rewrite is due when at least ``min_interval_s`` has passed since the last one and
    at least ``cost_factor`` times the last rewrite's own duration, so the rewrites never
    take more than about ``1 / cost_factor`` of the run however many series it holds.
    The first finished series is always written (a reader sees the run has started).
    """

    def __init__(self, min_interval_s: float = 5.0, cost_factor: float = 20.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.min_interval_s = min_interval_s
        self.cost_factor = cost_factor
        self._clock = clock
        self._last_end: float | None = None
        self._last_cost = 0.0

    def due(self) -> bool:
        if self._last_end is None:
            return True
        waited = self._clock() - self._last_end
        return waited >= max(self.min_interval_s, self.cost_factor * self._last_cost)

    def write(self, writer: Callable[[], None]) -> None:
        start = self._clock()
        writer()
        self._last_end = self._clock()
        self._last_cost = self._last_end - start


def _write_run_state(out_dir: Path, run_id: str, finished: bool) -> None:
    atomic_write_text(out_dir / "run.json", json.dumps({"run_id": run_id, "finished": finished,
                                                        "tool_version": __version__, "time": time.time()}))


def _write_outputs(out_dir: Path, doc: dict[str, Any], *, final: bool, include_identifiers: bool,
                   trends: dict[str, str] | None = None) -> None:
    from .cli import _headline_rows

    atomic_write_text(out_dir / "results.json", dumps(doc))
    if not final:
        return
    from .report import write_report

    figures = {r["id"]: r.get("figures") or {} for r in doc["series"]}
    writers = (
        ("results.csv", lambda: atomic_write_text(out_dir / "results.csv", _headline_rows(doc["series"]))),
        ("report.html", lambda: write_report(doc, out_dir, figures=figures, trends=trends,
                                             include_identifiers=include_identifiers)),
    )
    for name, write in writers:
        try:
            write()
        except OSError as exc:  # a full disk, a read-only folder: say so, keep what is written
            raise OutputWriteError(
                f"cannot write {name} ({exc.strerror or exc}); results.json and series/*.json are complete "
                "and intact; free space and rerun with the same --out to finish", source=str(out_dir),
            ) from exc


def _trend_figures(history, records: list[dict[str, Any]], out_dir: Path) -> dict[str, str]:
    """One trend chart per protocol seen in this run (its noise, else its first metric)."""
    trends: dict[str, str] = {}
    for proto in sorted({r.get("protocol_key") for r in records if r.get("protocol_key")}):
        metrics = history.metrics(proto)
        if not metrics or len(history.trend(proto, metrics[0])) < 2:
            continue
        metric = "nps.noise_hu" if "nps.noise_hu" in metrics else metrics[0]
        rel = Path("figures") / "trends" / f"{safe_name(proto)}__{safe_name(metric)}.png"
        try:
            history.plot_trend(proto, metric, out_dir / rel)
        except Exception as exc:  # a chart never costs the run
            log.warning("trend chart for %s not drawn: %s", proto, exc)
            continue
        trends[proto] = str(rel)
    return trends


def _worker_count(opts: CheckOptions, n_tasks: int, cores: int) -> int:
    """Local worker processes: as asked (default: the cores), never more than the tasks
    (a lone series runs in this process and keeps the run's cores for its analyses)."""
    return max(1, min(opts.workers or cores, n_tasks))


def _threads_per_task(opts: CheckOptions, workers: int, cores: int) -> int:
    """Threads an analysis may use: 1 on a Dask cluster (its workers share their
    machines); else the cores the run may use (``--workers``, default all of them)
    shared among its local processes, so ``--workers 1`` keeps a check on one core.
    0 (the analyses' own default) when one process has every core."""
    if opts.scheduler:
        return 1
    budget = min(opts.workers or cores, cores)
    if workers <= 1 and budget >= cores:
        return 0
    return max(1, budget // max(1, workers))


def largest_first(tasks: list[SeriesTask]) -> list[SeriesTask]:
    """The tasks in the order they are handed out: largest series (``size_bytes``, the
    bytes on disk counted with the fingerprint, to two significant digits) first.

    Workers take the next task as they finish one, so starting with the long ones keeps
    a large series from starting last while the other workers stand idle (longest
    processing time first; Graham, SIAM J Appl Math 17, 1969). Series of about the same
    size (the same two leading digits) keep the discovery order: a few bytes of header
    say nothing about which will take longer. The outputs are sorted by id whatever the
    order of work.
    """
    return sorted(tasks, key=lambda t: -_two_digits(t.size_bytes))


def _two_digits(n: int) -> float:
    return float(f"{n:.2g}")


def check(opts: CheckOptions, progress_factory: Callable[[int], Any] | None = None) -> CheckOutcome:
    """Run one check over ``opts.inputs``; see the module docstring."""
    from .history import History
    from .load import discover

    profile: Profile = load_profile(opts.profile_path)
    out_dir = opts.out_dir
    out_dir.mkdir(parents=True, exist_ok=True)
    _remove_partial_files(out_dir)
    run_id = _run_id(out_dir)
    started = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    _write_run_state(out_dir, run_id, finished=False)

    for p in opts.inputs:
        if not p.exists():
            raise ReconauditError("input not found", source=str(p))
    found = discover(opts.inputs)
    baselines = BaselineStore(opts.baselines_path).entries if opts.baselines_path else {}
    history = History(opts.db_path) if opts.db_path else None
    if history:
        history.start_run(run_id, tool_version=__version__, profile_name=profile.name)

    records: dict[str, dict[str, Any]] = {}
    for prob in found.problems:
        rec = _problem_record(prob)
        records[rec["id"]] = rec
    ids = _unique_ids(found.series)
    tasks, skipped = [], []
    cores = default_workers()
    digest = profile.digest()
    for src in found.series:
        sid = ids[src.key]
        content, size = fingerprint_and_bytes(list(src.files))
        previous = previous_record(out_dir, sid, content, digest)
        if previous is not None and not opts.force:
            records[sid] = previous  # resume: measured in an earlier, unfinished run
            if history and not history.already_checked(content, digest):
                history.record_series(run_id, previous, content, digest, previous.get("protocol_key") or "")
            continue
        if history and not opts.force and history.already_checked(content, digest):
            skipped.append({"id": sid, "source": str(src.source), "content_hash": content})
            continue
        tasks.append(SeriesTask(series_id=sid, source=src, content_hash=content, out_dir=str(out_dir),
                                profile=profile, baselines=baselines, include_identifiers=opts.include_identifiers,
                                figures=opts.figures, size_bytes=size))
    tasks = largest_first(tasks)
    workers = _worker_count(opts, len(tasks), cores)
    for task in tasks:
        task.threads = _threads_per_task(opts, workers, cores)

    progress = progress_factory(len(tasks)) if progress_factory else None
    interim = InterimWrites()

    def on_done(record: dict[str, Any]) -> None:
        records[record["id"]] = record
        if history and record.get("content_hash"):
            history.record_series(run_id, record, record["content_hash"], digest, record.get("protocol_key") or "")
        if interim.due():
            interim.write(lambda: _write_outputs(out_dir, _document(records, profile, skipped, started),
                                                 final=False, include_identifiers=opts.include_identifiers))
        if progress:
            progress.step(record)

    if opts.scheduler:
        run_dask(tasks, on_done, address=opts.scheduler)
    else:
        run_local(tasks, on_done, workers=workers)

    doc = _document(records, profile, skipped, started)
    trends = _trend_figures(history, list(records.values()), out_dir) if history else None
    _write_outputs(out_dir, doc, final=True, include_identifiers=opts.include_identifiers, trends=trends)
    if history:
        history.close()
    _write_run_state(out_dir, run_id, finished=True)
    return CheckOutcome(document=doc, skipped=skipped, run_id=run_id)


def _document(records: dict[str, dict[str, Any]], profile: Profile, skipped: list[dict[str, Any]],
              started: str) -> dict[str, Any]:
    doc = results_document(records.values(), profile, started)
    doc["skipped"] = list(skipped)
    return doc
