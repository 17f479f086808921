"""The DICOM loader (``discover`` + ``load_series``) of the cached benchmark series.

Usage::

    python benchmarks/bench_loader.py [--slices 400] [--runs 5] [--profile]

Prints the median and best wall and CPU times of discovery and of the load over
``--runs`` runs, each as a ratio to the plain-pydicom read limit
(benchmarks/harness.py). Target (round 4): loader at most 0.6 x the read limit.
Printed, never asserted.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import harness


def _timed(fn, *args):
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn(*args)
    return out, time.perf_counter() - t0, time.process_time() - c0


def one_run(series_dir: Path) -> tuple[float, float, float, float]:
    """(discover wall, discover CPU, load wall, load CPU) of one discover + load."""
    from reconaudit.checker.load import discover, load_series

    found, dw, dc = _timed(discover, [series_dir])
    _, lw, lc = _timed(load_series, found.series[0])
    return dw, dc, lw, lc


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description="loader time as a ratio to the read limit")
    p.add_argument("--slices", type=int, default=400)
    p.add_argument("--runs", type=int, default=5)
    p.add_argument("--profile", action="store_true", help="print a cProfile of one run")
    args = p.parse_args(argv)
    series_dir = harness.benchmark_series(args.slices)
    limit = harness.read_limit(series_dir, repeats=2, quiet=True)
    print(f"read limit: {limit:.3f} s")
    one_run(series_dir)  # warm-up (imports, disk cache)
    runs = [one_run(series_dir) for _ in range(args.runs)]
    names = ("discover wall", "discover CPU", "load wall", "load CPU")
    for k, name in enumerate(names):
        vals = [r[k] for r in runs]
        med, best = statistics.median(vals), min(vals)
        print(f"{name:14s} median {med:.3f} s = {med / limit:.2f}x  best {best:.3f} s = {best / limit:.2f}x")
    total_wall = [r[0] + r[2] for r in runs]
    total_cpu = [r[1] + r[3] for r in runs]
    print(f"loader wall    median {statistics.median(total_wall) / limit:.2f}x  best {min(total_wall) / limit:.2f}x")
    print(f"loader CPU     median {statistics.median(total_cpu) / limit:.2f}x  best {min(total_cpu) / limit:.2f}x")
    if args.profile:
        import cProfile
        import pstats

        prof = cProfile.Profile()
        prof.enable()
        one_run(series_dir)
        prof.disable()
        pstats.Stats(prof).sort_stats("cumulative").print_stats(35)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
