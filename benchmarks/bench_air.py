"""Time and memory of the shared regions and the air analysis on a large series.

Prints, never asserts. The volume is invented: a water torso with arms and a table in
air, 512 x 512 pixels of 0.7 mm, ``--slices`` slices of 1.25 mm, correlated noise of
12 HU, and two faint structures in the air. When ``benchmarks/harness.py`` offers
``read_limit`` the times are also printed as ratios to the time of reading such a
series; otherwise absolute times only.

With ``--stages`` the analysis is also timed stage by stage (CPU time, the least of
``--repeats`` runs): the coarse grid (the one full-resolution pass), the air sample and
its robust statistics, the body noise, the matched filter on the coarse grids, the
hysteresis, the full-resolution refinement in the boxes and the label volume.

With ``--series`` the volume is instead the cached benchmark DICOM series of
``benchmarks/harness.py`` (the one ``bench_read.py`` times), read with reconaudit's loader.

``--threads`` sets ``air.AIR_THREADS`` (default: the module's, two on two cores).

Usage: ``python benchmarks/bench_air.py [--slices 400] [--series] [--stages] [--repeats 3] [--threads N]``
"""
from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy import ndimage

from reconaudit.checker.analyses import air
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume


def _ellipse(n: int, cy: float, cx: float, ay: float, ax: float) -> np.ndarray:
    y, x = np.mgrid[0:n, 0:n]
    return ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0


def make_volume(nz: int, n: int = 512, seed: int = 3) -> Volume:
    """Invented torso series; noise is made on a 16-slice slab and tiled (fast)."""
    img = np.full((n, n), -1000.0, dtype=np.float32)
    c = n / 2
    img[_ellipse(n, c - 0.06 * n, c, 0.2 * n, 0.28 * n)] = 0.0
    for side in (-1, 1):
        img[_ellipse(n, c - 0.04 * n, c + side * 0.38 * n, 0.06 * n, 0.045 * n)] = 40.0
    img[int(c + 0.205 * n) : int(c + 0.24 * n), int(c - 0.33 * n) : int(c + 0.33 * n)] = 250.0
    fov = _ellipse(n, c - 0.5, c - 0.5, 0.49 * n, 0.49 * n)
    rng = np.random.default_rng(seed)
    w = rng.standard_normal((16, n, n)).astype(np.float32)
    slab = ndimage.gaussian_filter(w, (0.6, 0.9, 0.9)) - ndimage.gaussian_filter(w, (0.6, 2.2, 2.2))
    slab *= 12.0 / slab.std()
    hu = np.empty((nz, n, n), dtype=np.float32)
    for z0 in range(0, nz, 16):
        k = min(16, nz - z0)
        hu[z0 : z0 + k] = img[None] + np.roll(slab[:k], shift=(z0 * 7) % n, axis=2)
    zc = nz // 2
    for (cy, cx, value) in ((0.12 * n, 0.3 * n, -930.0), (0.15 * n, 0.7 * n, -960.0)):
        zz, yy, xx = np.ogrid[-10:11, -14:15, -14:15]
        ball = (zz * 1.25) ** 2 + (yy * 0.7) ** 2 + (xx * 0.7) ** 2 <= 100.0
        sub = hu[zc - 10 : zc + 11, int(cy) - 14 : int(cy) + 15, int(cx) - 14 : int(cx) + 15]
        sub[ball] += value + 1000.0
    hu[:, ~fov] = -3024.0
    return Volume.from_array(hu, spacing_mm=(1.25, 0.7, 0.7), padding_mask=~fov)


def load_series_volume(nz: int) -> Volume:
    """The cached benchmark series of ``benchmarks/harness.py`` read with reconaudit's loader."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import harness  # type: ignore[import-not-found]
    from reconaudit.checker.load import discover, load_series

    found = discover([harness.benchmark_series(nz)])
    return load_series(found.series[0])


def _measure(fn, *args):
    """Wall time, CPU time of this process and peak traced memory of one call."""
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn(*args)
    dt, dc = time.perf_counter() - t0, time.process_time() - c0
    tracemalloc.start()
    fn(*args)  # a second run for the memory peak (tracing slows the first one down)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"  ({fn.__module__}.{fn.__name__}: wall {dt:.2f} s, cpu {dc:.2f} s)")
    return out, dt, peak


def _peak_rss(fn, *args):
    """Peak resident-memory increase of one call (``harness.measure``, Linux), or None."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    try:
        import harness  # type: ignore[import-not-found]

        m = harness.measure("air.analyse", fn, *args, quiet=True)
    except Exception:  # the harness belongs to another part; go on without it
        return None
    return m.peak_bytes if getattr(m, "memory_method", "") == "peak RSS" else None


def _read_limit(nz: int):
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    try:
        import harness  # type: ignore[import-not-found]
    except ImportError:
        return None
    fn = getattr(harness, "read_limit", None)
    if fn is None:
        return None
    try:
        return float(fn(nz) if callable(fn) else fn)
    except Exception as exc:  # the harness belongs to another part; report and go on
        print(f"harness.read_limit failed: {exc}")
        return None


def _least_cpu(fn, repeats: int):
    """The result of ``fn()`` and the least CPU time of ``repeats`` calls."""
    best, out = float("inf"), None
    for _ in range(max(1, repeats)):
        c0 = time.process_time()
        out = fn()
        best = min(best, time.process_time() - c0)
    return out, best


def stage_times(vol: Volume, regions, repeats: int = 3) -> dict[str, float]:
    """CPU seconds of each stage of ``air.analyse`` with the default settings."""
    s = air.resolve_settings(None)
    hu, mask = vol.hu, regions.air
    times: dict[str, float] = {}
    base = air.block_factors(vol.spacing_mm, hu.shape[0])
    (sums, counts), times["coarse grid"] = _least_cpu(lambda: air.coarse_air_grid(hu, mask, base), repeats)
    n_air = int(counts.sum(dtype=np.float64))
    sample, times["air sample"] = _least_cpu(lambda: air._air_sample(hu, mask, n=n_air), repeats)
    (mean, noise), times["air statistics"] = _least_cpu(lambda: air.robust_mean_and_noise(sample, s["clip_sigma"]), repeats)
    _, times["body noise"] = _least_cpu(lambda: air.body_noise_hu(vol, regions), repeats)
    sums -= np.float32(mean) * counts
    (maps, per_scale, _), times["matched filter + per-scale hysteresis"] = _least_cpu(
        lambda: air.scale_structures(sums, counts, base, vol.spacing_mm, s, s["min_air_noise_hu"], hu.shape[0]), repeats
    )
    (lab0, base0, boxes0), times["scales combined"] = _least_cpu(
        lambda: air.combine_scales_boxes(maps, s["grow_sigma"], structures=per_scale), repeats)
    ctx = air.Context(regions, air._margin_px(vol, regions), hu.shape[0] == 1, hu.shape[0], grid_px=(max(base[1:]) + 1) // 2)
    found, times["refinement"] = _least_cpu(
        lambda: air.measure_structures(vol, mask, lab0, boxes0, base0, mean, noise, ctx, s, (sums, counts)), repeats
    )
    for i, (record, _, _) in enumerate(found, start=1):
        record["id"] = i
    _, times["label volume"] = _least_cpu(lambda: air.label_overlay(hu.shape, found), repeats)
    return times


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slices", type=int, default=400)
    ap.add_argument("--series", action="store_true", help="use the cached benchmark DICOM series (bench_read's)")
    ap.add_argument("--stages", action="store_true", help="also time the analysis stage by stage")
    ap.add_argument("--repeats", type=int, default=3, help="runs per stage with --stages")
    ap.add_argument("--threads", type=int, default=0, help="air.AIR_THREADS (0: the module's default)")
    args = ap.parse_args()
    vol = load_series_volume(args.slices) if args.series else make_volume(args.slices)
    vol_bytes = vol.hu.nbytes
    print(f"volume {vol.shape} float32 = {vol_bytes / 2**20:.0f} MiB")
    regions, t_reg, m_reg = _measure(find_regions, vol)
    print(f"find_regions: {t_reg:.2f} s, peak extra memory {m_reg / vol_bytes:.2f}x the float32 volume")
    if args.threads:
        air.AIR_THREADS = args.threads
    print(f"air threads: {air.AIR_THREADS}")
    res, t_air, m_air = _measure(air.analyse, vol, regions)
    print(f"air.analyse:  {t_air:.2f} s, peak extra memory {m_air / vol_bytes:.2f}x the float32 volume")
    rss = _peak_rss(air.analyse, vol, regions)
    if rss is not None:  # tracemalloc does not see memory maps (label volume, large-page arrays)
        print(f"air.analyse:  peak resident-memory increase {rss / vol_bytes:.2f}x the float32 volume "
              "(includes the memory maps that tracemalloc does not see)")
    m_air = max(m_air, rss or 0)  # the larger of the two, so the memory maps count
    rec = res.record
    print(f"air mean {rec.get('mean_hu')} HU, noise {rec.get('noise_hu')} HU, structures:")
    for st in rec.get("structures", []):
        print(f"  {st['id']}: {st['kind']}, {st['volume_mm3']:.0f} mm3, mean {st['mean_hu']:.0f} HU, flagged {st['flagged']}")
    print(
        "whole-check memory for these two (volume + regions + air peak): "
        f"{(vol_bytes + m_reg + m_air) / vol_bytes:.2f}x (target 2.5x)"
    )
    limit = _read_limit(args.slices)
    if limit:
        print(f"read limit {limit:.2f} s; air/read = {t_air / limit:.2f} (target 0.35), regions/read = {t_reg / limit:.2f}")
    else:
        print("no read limit available (benchmarks/harness.py absent): absolute times only")
    if args.stages:
        times = stage_times(vol, regions, args.repeats)
        print(f"air stages, CPU (least of {args.repeats}):")
        for name, t in times.items():
            extra = f" = {t / limit:.3f} x read" if limit else ""
            print(f"  {name:16s} {t * 1000:7.1f} ms{extra}")
        total = sum(times.values())
        print(f"  {'sum':16s} {total * 1000:7.1f} ms" + (f" = {total / limit:.3f} x read" if limit else ""))


if __name__ == "__main__":
    main()
