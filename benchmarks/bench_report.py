"""Time the report: figures of one series and the HTML of a many-series run.

Prints seconds and the ratio of the figure time to the time the analyses took on the
same volume (the report is outside the check's performance target, but it should stay
a small fraction of it). The figures are timed twice: the first series of a process
(which builds its figures) and the median of ``--repeats`` series after it (drawn on
those figures, as in a worker that checks many series). Volumes are invented (a water
cylinder with a rod in air).

    python benchmarks/bench_report.py [--size 256] [--slices 32] [--series 200] [--repeats 7]
"""
from __future__ import annotations

import argparse
import copy
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from reconaudit.checker.pipeline import analyse_volume
from reconaudit.checker.report import render_series_figures, write_report
from reconaudit.checker.results import to_jsonable
from reconaudit.checker.volume import Volume


def phantom(nz: int, n: int) -> Volume:
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[:n, :n]
    sl = np.where(np.hypot(yy - n / 2, xx - n / 2) < 0.35 * n, 0.0, -1000.0)
    sl[np.hypot(yy - n / 2, xx - 0.62 * n) < 0.04 * n] = 340.0
    hu = np.repeat(sl[None], nz, axis=0) + rng.normal(0, 10, (nz, n, n))
    vol = Volume.from_array(hu.astype(np.float32), spacing_mm=(2.0, 250.0 / n, 250.0 / n), series_uid="2.25.1")
    vol.metadata = {"series_description": "invented bench phantom", "convolution_kernel": "SOFT-B"}
    return vol


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--slices", type=int, default=32)
    ap.add_argument("--series", type=int, default=200)
    ap.add_argument("--repeats", type=int, default=7, help="series drawn after the first, for the median")
    args = ap.parse_args()
    vol = phantom(args.slices, args.size)
    t0 = time.perf_counter()
    analysis = analyse_volume(vol)
    t_analyse = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        t0 = time.perf_counter()
        figs = render_series_figures(vol, analysis.regions, analysis.results, out, "bench")
        t_first = time.perf_counter() - t0
        t_next = []
        for i in range(args.repeats):
            t0 = time.perf_counter()
            render_series_figures(vol, analysis.regions, analysis.results, out, f"bench-next-{i}")
            t_next.append(time.perf_counter() - t0)
        t_figs = statistics.median(t_next) if t_next else t_first
        png_kib = sum((out / rel).stat().st_size for rel in figs.values()) / 1024
        entry = {"id": "bench", "status": "ok", "verdict": analysis.verdict.value, "metadata": vol.metadata,
                 "geometry": vol.geometry_record(), "findings": [f.to_json() for f in analysis.findings]}
        entry.update({k: to_jsonable(r.record) for k, r in analysis.results.items()})
        series = []
        for i in range(args.series):
            e = copy.deepcopy(entry)
            e["id"] = f"bench-{i:04d}"
            series.append(e)
        doc = {"schema": "reconaudit.results/1", "tool_version": "bench", "profile": {"name": "bench"}, "series": series}
        t0 = time.perf_counter()
        path = write_report(doc, out, figures={s["id"]: figs for s in series})
        t_html = time.perf_counter() - t0
        size_mb = path.stat().st_size / 2**20
    print(f"volume {vol.shape}: analyses {t_analyse:.2f} s")
    print(f"figures ({len(figs)}, {png_kib:.0f} KiB): first series {t_first:.3f} s "
          f"= {t_first / t_analyse:.2f} x the analyses; next series (median of {len(t_next)}) {t_figs:.3f} s "
          f"= {t_figs / t_analyse:.2f} x the analyses, {t_figs / t_first:.2f} x the first")
    print(f"report of {args.series} series: {t_html:.2f} s, {size_mb:.1f} MiB "
          f"({1000 * t_html / args.series:.1f} ms per series)")


if __name__ == "__main__":
    main()
