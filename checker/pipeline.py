"""Run the analyses on one volume: the engine both front ends call.

``analyse_volume`` computes the shared regions once and runs each requested analysis.
An analysis that raises is recorded (an error record and a finding) and the others go
on, so nothing already measured is lost.
"""
from __future__ import annotations

import logging
import os
import threading
import traceback
from concurrent.futures import ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from typing import Any, Callable

from . import analyses as _analyses
from .errors import ReconauditError
from .regions import Regions, find_regions
from .results import AnalysisResult, Finding, Severity, Verdict, worst_verdict
from .volume import Volume

log = logging.getLogger(__name__)

ProgressFn = Callable[[str, float], None]
CancelFn = Callable[[], bool]


class Cancelled(Exception):
    """The caller asked to stop (the viewer's cancel button)."""


@dataclass
class SeriesAnalysis:
    """Regions and per-analysis results of one volume."""

    regions: Regions
    results: dict[str, AnalysisResult] = field(default_factory=dict)
    errors: dict[str, dict[str, str]] = field(default_factory=dict)

    @property
    def findings(self) -> list[Finding]:
        return [f for r in self.results.values() for f in r.findings]

    @property
    def verdict(self) -> Verdict:
        return worst_verdict(self.findings)


def _error_result(name: str, exc: BaseException) -> tuple[AnalysisResult, dict[str, str]]:
    kind = exc.kind if isinstance(exc, ReconauditError) else "analysis_failed"
    message = f"{type(exc).__name__}: {exc}"
    record = {"applicable": False, "reason": f"the analysis failed: {message}", "error": {"kind": kind, "message": message}}
    finding = Finding(name, Severity.REVIEW, f"the {name} analysis failed and measured nothing: {message}")
    return AnalysisResult(analysis=name, record=record, findings=[finding]), {"kind": kind, "message": message}


#: analyses run at the same time on one volume (0: one per core). They only read the
#: volume and the regions, so running them side by side changes no result; numpy and
#: scipy release the GIL in their array loops, so a second core shortens the wall time.
ANALYSIS_THREADS = 0


def _cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def _run_one(name: str, volume: Volume, regions: Regions, settings: dict[str, dict[str, Any]],
             out: SeriesAnalysis) -> None:
    """Run one analysis into ``out``; a failure becomes an error record, never fatal."""
    try:
        fn = _analyses.get(name)
        out.results[name] = fn(volume, regions, settings.get(name))
    except Cancelled:
        raise
    except Exception as exc:  # recorded, never fatal for the other analyses
        log.debug("analysis %s failed:\n%s", name, traceback.format_exc())
        out.results[name], out.errors[name] = _error_result(name, exc)


def _run_concurrently(names: list[str], volume: Volume, regions: Regions, settings: dict[str, dict[str, Any]],
                      out: SeriesAnalysis, threads: int, report: ProgressFn, check_cancel: Callable[[], None]) -> None:
    """Run ``names`` on ``threads`` threads; results keep the order of ``names``.

    Progress is reported as analyses finish; a cancel request is honoured before each
    analysis starts (running ones finish).
    """
    parts = {name: SeriesAnalysis(regions=regions) for name in names}
    cancelled = threading.Event()

    def job(name: str) -> None:
        if cancelled.is_set():
            return
        _run_one(name, volume, regions, settings, parts[name])

    done = 0
    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="reconaudit-analysis") as pool:
        futures = {pool.submit(job, name): name for name in names}
        try:
            for fut in as_completed(futures):
                fut.result()
                done += 1
                report(futures[fut], done / (len(names) + 1))
                check_cancel()
        except BaseException:
            cancelled.set()
            raise
    for name in names:  # the order of names, whatever the order of finishing
        out.results.update(parts[name].results)
        out.errors.update(parts[name].errors)


def analyse_volume(
    volume: Volume,
    *,
    analyses: list[str] | None = None,
    settings: dict[str, dict[str, Any]] | None = None,
    regions: Regions | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelFn | None = None,
) -> SeriesAnalysis:
    """Run ``analyses`` (default: every available one) on ``volume``.

    Parameters
    ----------
    volume : Volume
    analyses : list of str, optional
        Names from :data:`reconaudit.checker.analyses.REGISTRY`.
    settings : dict, optional
        Per-analysis settings overriding each module's ``DEFAULTS``.
    regions : Regions, optional
        Precomputed regions (the viewer re-measures a ROI without recomputing them).
    progress : callable(stage, fraction), optional
    cancel : callable() -> bool, optional
        Polled between stages; when it returns True, :class:`Cancelled` is raised.
    """
    names = list(analyses) if analyses is not None else _analyses.available()
    settings = settings or {}
    report = progress or (lambda stage, fraction: None)
    steps = len(names) + 1

    def check_cancel() -> None:
        if cancel is not None and cancel():
            raise Cancelled("analysis cancelled")

    check_cancel()
    if regions is None:
        report("regions", 0.0)
        regions = find_regions(volume)
    out = SeriesAnalysis(regions=regions)
    threads = min(ANALYSIS_THREADS or _cores(), len(names))
    if threads > 1:
        _run_concurrently(names, volume, regions, settings, out, threads, report, check_cancel)
    else:
        for i, name in enumerate(names, start=1):
            check_cancel()
            report(name, i / steps)
            _run_one(name, volume, regions, settings, out)
    report("done", 1.0)
    return out
