"""The loader and the shared regions against the read limit, interleaved.

Usage::

    python benchmarks/bench_regions_load.py [--slices 400] [--rounds 5]

Each round runs the read limit (plain pydicom, ``harness.read_series_hu``), the loader
(``discover`` + ``load_series``) and ``find_regions`` once each, one after the other, so
that all three see the same load from other processes on a shared machine. Prints, per
stage, the best and median wall and CPU seconds over the rounds and the ratios of the
best times to the best read time (targets: loader at most 0.9 x, regions at most 0.2 x).
Printed, never asserted.
"""
from __future__ import annotations

import argparse
import gc
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import harness  # noqa: E402


def _timed(fn, *args):
    gc.collect()
    w, c = time.perf_counter(), time.process_time()
    out = fn(*args)
    return out, time.perf_counter() - w, time.process_time() - c


def _load(folder: Path):
    from reconaudit.checker.load import discover, load_series

    return load_series(discover([folder]).series[0])


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description="loader and regions against the read limit, interleaved")
    p.add_argument("--slices", type=int, default=400)
    p.add_argument("--rounds", type=int, default=5)
    args = p.parse_args(argv)
    from reconaudit.checker.regions import find_regions

    folder = harness.benchmark_series(args.slices)
    times: dict[str, list[tuple[float, float]]] = {"read limit": [], "loader": [], "regions": []}
    for _ in range(args.rounds):
        hu, w, c = _timed(harness.read_series_hu, folder)
        del hu
        times["read limit"].append((w, c))
        volume, w, c = _timed(_load, folder)
        times["loader"].append((w, c))
        regions, w, c = _timed(find_regions, volume)
        times["regions"].append((w, c))
        del volume, regions
    best_read = min(w for w, _ in times["read limit"])
    best_read_cpu = min(c for _, c in times["read limit"])
    for name, runs in times.items():
        walls, cpus = [w for w, _ in runs], [c for _, c in runs]
        print(f"{name:10s} wall best {min(walls):6.3f} s median {statistics.median(walls):6.3f} s | "
              f"CPU best {min(cpus):6.3f} s median {statistics.median(cpus):6.3f} s | "
              f"best wall {min(walls) / best_read:5.2f} x read, best CPU {min(cpus) / best_read_cpu:5.2f} x read CPU")
    return 0


if __name__ == "__main__":
    sys.exit(main())
