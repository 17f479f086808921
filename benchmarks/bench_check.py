"""The whole ``check`` of the 512 x 512 x 400 benchmark series, as a ratio to the read.

Runs ``reconaudit.checker.runner.check`` (what ``reconaudit check`` runs: discovery,
loading, the shared regions, every analysis the default profile enables, the history
database, results.json and results.csv) on the cached benchmark series with figures off
and a fresh output folder and database per run, and times it. The HTML report is then
written once more on its own and timed, so that "report excluded" (the design target:
the whole check at most 2.0 x the read, i.e. at most 1.0 x the read on top of it) is
the total less that time. Also printed: the peak resident memory of the run as a ratio
to the float32 volume (target at most 2.5 x in all).

Prints, never asserts (machines differ). Run:

    python benchmarks/bench_check.py [--slices 400] [--repeats 3] [--workers N]
"""
from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import harness  # noqa: E402


def _one_check(series_dir: Path, workers: int | None) -> tuple[float, float, dict]:
    """(seconds of the check, seconds of the report alone, the results document)."""
    from reconaudit.checker.report import write_report
    from reconaudit.checker.runner import CheckOptions, check

    tmp = Path(tempfile.mkdtemp(prefix="reconaudit-bench-check-"))
    try:
        opts = CheckOptions(inputs=[series_dir], out_dir=tmp / "out", workers=workers,
                            db_path=tmp / "history.sqlite", figures=False)
        t0 = time.perf_counter()
        outcome = check(opts)
        total = time.perf_counter() - t0
        doc = outcome.document
        t0 = time.perf_counter()
        write_report(doc, tmp / "out", figures={r["id"]: {} for r in doc["series"]}, trends=None,
                     include_identifiers=False)
        report = time.perf_counter() - t0
        return total, report, doc
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slices", type=int, default=400)
    ap.add_argument("--repeats", type=int, default=3, help="runs of the check (the median is printed)")
    ap.add_argument("--workers", type=int, default=None, help="as --workers of the command (default: cores)")
    args = ap.parse_args()

    series_dir = harness.benchmark_series(args.slices)
    limit = harness.read_limit(series_dir, repeats=2)
    vol_bytes = harness.volume_bytes((args.slices, 512, 512))

    totals, reports, peaks = [], [], []
    for _ in range(args.repeats):
        m = harness.measure("check", _one_check, series_dir, args.workers, quiet=True)
        total, report, doc = m.result
        totals.append(total)
        reports.append(report)
        peaks.append(m.peak_bytes)
    total, report = statistics.median(totals), statistics.median(reports)
    excluded = total - report
    series = doc["series"][0]
    print(f"check (figures off, history on): median {total:.3f} s of {args.repeats} "
          f"({', '.join(f'{t:.2f}' for t in totals)}); status {series['status']}, verdict {series['verdict']}")
    if series["status"] != "ok":
        print(f"the series was not checked: {series['error']}")
    print(f"report.html alone: {report:.3f} s")
    print(f"whole check, report excluded: {excluded:.3f} s = {excluded / limit:.2f} x read "
          f"(target at most 2.0 x: the read plus at most 1.0 x)")
    print(f"peak memory of the check ({m.memory_method}, this process; a lone series runs in it): "
          f"{max(peaks) / vol_bytes:.2f} x float32 volume (target at most 2.5 x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
