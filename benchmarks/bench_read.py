"""Reading and the whole check, as ratios to the read-time limit.

Usage::

    python benchmarks/bench_read.py [--slices 400] [--repeats 2] [--stage-repeats 3] [--only air nps]

Prints the read limit (plain pydicom, benchmarks/harness.py), then reconaudit's loader
(``discover`` + ``load_series``), the shared regions (``find_regions``) and every
analysis in ``analyses.REGISTRY`` whose module imports, each as a ratio to the read time
and with its peak memory increase as a ratio to the float32 volume. Targets (design
guide): all analyses together at most 1.0 x the read time on top of the read; peak memory
at most 2.5 x the float32 volume. Printed, never asserted.
"""
from __future__ import annotations

import argparse
import importlib
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import harness  # noqa: E402


def load_with_reconaudit(series_dir: Path):
    """Discover the one series in ``series_dir`` and load it with reconaudit's loader."""
    from reconaudit.checker.load import discover, load_series

    found = discover([series_dir])
    if not found.series:
        raise RuntimeError(f"{series_dir}: reconaudit found no series ({found.problems})")
    return load_series(found.series[0])


def analysis_modules() -> list[tuple[str, object | None, str]]:
    """(name, module or None, note) for every registered analysis."""
    from reconaudit.checker.analyses import REGISTRY

    out = []
    for name, path in REGISTRY.items():
        try:
            out.append((name, importlib.import_module(path), ""))
        except Exception as exc:  # a missing or broken analysis is skipped with a note
            out.append((name, None, f"{type(exc).__name__}: {exc}"))
    return out


def timed(name: str, fn, *args, limit: float, vbytes: int, runs: int = 1):
    """``harness.measure`` ``runs`` times; a Measurement with the median wall and CPU
    times and the largest peak memory (the result is the first run's)."""
    import statistics

    ms = [harness.measure(name, fn, *args, limit_s=limit, volume_bytes=vbytes, quiet=runs > 1)
          for _ in range(max(1, runs))]
    m = harness.Measurement(name, statistics.median(x.wall_s for x in ms), max(x.peak_bytes for x in ms),
                            ms[0].memory_method, ms[0].result, statistics.median(x.cpu_s for x in ms))
    if runs > 1:
        print(m.line(limit, vbytes).replace(": ", f" (median of {runs}): ", 1), flush=True)
    return m


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description="read limit and the check as ratios to it")
    p.add_argument("--slices", type=int, default=400)
    p.add_argument("--repeats", type=int, default=2, help="runs of the read limit (best is kept)")
    p.add_argument("--stage-repeats", type=int, default=1,
                   help="runs of every stage (median wall and CPU time are printed)")
    p.add_argument("--only", nargs="*", default=None, help="analyses to run (default: all registered)")
    args = p.parse_args(argv)

    series_dir = harness.benchmark_series(args.slices)
    limit = harness.read_limit(series_dir, repeats=args.repeats)
    vbytes = harness.volume_bytes((args.slices, 512, 512))
    print(f"float32 volume: {vbytes / 2**20:.0f} MiB")

    from reconaudit.checker.regions import find_regions

    runs = args.stage_repeats
    loaded = timed("loader (discover + load_series)", load_with_reconaudit, series_dir, limit=limit, vbytes=vbytes,
                   runs=runs)
    volume = loaded.result
    reg = timed("regions (find_regions)", find_regions, volume, limit=limit, vbytes=vbytes, runs=runs)
    regions = reg.result
    stages = {"regions": reg}
    for name, module, note in analysis_modules():
        if module is None:
            print(f"analysis {name}: skipped ({note})")
            continue
        if args.only is not None and name not in args.only:
            continue
        try:
            stages[name] = timed(f"analysis {name}", module.analyse, volume, regions, limit=limit, vbytes=vbytes,
                                 runs=runs)
        except Exception as exc:  # report and go on: a benchmark never stops at one failure
            print(f"analysis {name}: raised {type(exc).__name__}: {exc}")
    wall = sum(m.wall_s for m in stages.values())
    cpu = sum(m.cpu_s for m in stages.values())
    peak = max(m.peak_bytes for m in stages.values())
    print("-" * 72)
    for name, m in stages.items():
        print(f"  {name:12s} {m.wall_s / limit:6.2f} x read (CPU {m.cpu_s / limit:6.2f} x)  "
              f"peak {m.peak_bytes / vbytes:5.2f} x volume")
    if "air" in stages:
        ra = stages["regions"].wall_s + stages["air"].wall_s
        print(f"regions + air: {ra / limit:.2f} x read (target at most 0.35 x)")
    print(f"regions + analyses: {wall / limit:.2f} x read on top of the read, CPU {cpu / limit:.2f} x "
          f"(analyses alone {(wall - reg.wall_s) / limit:.2f} x; target at most 1.0 x)")
    print(f"largest stage peak memory: {peak / vbytes:.2f} x float32 volume on top of the loaded volume "
          f"(+1.00 x for the volume itself; target at most 2.5 x in all)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
