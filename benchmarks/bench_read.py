"""Reading and the whole check, as ratios to the read-time limit.

Usage::

    python benchmarks/bench_read.py [--slices 400] [--repeats 2]

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


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description="read limit and the check as ratios to it")
    p.add_argument("--slices", type=int, default=400)
    p.add_argument("--repeats", type=int, default=2)
    args = p.parse_args(argv)

    series_dir = harness.benchmark_series(args.slices)
    limit = harness.read_limit(series_dir, repeats=args.repeats)
    vbytes = harness.volume_bytes((args.slices, 512, 512))
    print(f"float32 volume: {vbytes / 2**20:.0f} MiB")

    from reconaudit.checker.regions import find_regions

    loaded = harness.measure("loader (discover + load_series)", load_with_reconaudit, series_dir,
                             limit_s=limit, volume_bytes=vbytes)
    volume = loaded.result
    reg = harness.measure("regions (find_regions)", find_regions, volume, limit_s=limit, volume_bytes=vbytes)
    regions = reg.result
    total = 0.0
    for name, module, note in analysis_modules():
        if module is None:
            print(f"analysis {name}: skipped ({note})")
            continue
        try:
            m = harness.measure(f"analysis {name}", module.analyse, volume, regions,
                                limit_s=limit, volume_bytes=vbytes)
        except Exception as exc:  # report and go on: a benchmark never stops at one failure
            print(f"analysis {name}: raised {type(exc).__name__}: {exc}")
            continue
        total += m.wall_s
    print(f"regions + analyses: {(total + reg.wall_s) / limit:.2f} x read on top of the read "
          f"(analyses alone {total / limit:.2f} x; target at most 1.0 x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
