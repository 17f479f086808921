"""Write the demo scenario (an invented imaging centre's nightly series) as CT DICOM.

Usage::

    python sample_volumes/generate.py [--out DIR] [--size small|full] [--series NAME ...]

Default output: ``sample_volumes/`` itself for ``--size small`` (the committed series)
and ``sample_volumes/generated/`` (not committed) for ``--size full``. Series land in
``<out>/fernhollow/<date>/<series name>/``, one file per slice. Running it twice gives
byte-identical files: the UIDs come from fixed seeds and nothing depends on the clock.

The data are simulated phantoms of an invented centre; no patient data. reconaudit
supports, and never replaces, a qualified medical physicist.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from reconaudit.checker import demo

HERE = Path(__file__).resolve().parent


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description="Write the demo CT series as DICOM.")
    p.add_argument("--out", type=Path, default=None, help="root folder (see module docstring)")
    p.add_argument("--size", choices=("small", "full"), default="small")
    p.add_argument("--series", nargs="*", choices=list(demo.SERIES), default=None,
                   help="only these series (default: all)")
    return p.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    out = args.out if args.out is not None else (HERE if args.size == "small" else HERE / "generated")
    start = time.perf_counter()

    def report(message: str, fraction: float) -> None:
        print(f"[{time.perf_counter() - start:6.1f} s] {message}", flush=True)

    files = demo.write_scenario(out, size=args.size, names=args.series, progress=report)
    total = sum(f.stat().st_size for f in files)
    print(f"{len(files)} files, {total / 2**20:.1f} MiB under {out / 'fernhollow'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
