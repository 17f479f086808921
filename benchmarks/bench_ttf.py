"""Time of the TTF analysis on a large phantom series, as a ratio to the time of reading
that series (goal: <= 0.1x). Prints, never asserts.

The series is invented: a 200 mm water cylinder in air, 512 x 512 pixels of 0.45 mm,
``--slices`` slices of 1.25 mm; the first third carries five 12 mm rods (-1000, -100,
+120, +340, +900 HU), the rest is uniform; Gaussian blur of 0.6 mm and 10 HU white noise.
The read limit is ``benchmarks/harness.py``'s ``read_limit`` when it is there; otherwise
the series is written as CT DICOM (``reconaudit.checker.dicom_write``) into a temporary
folder and timed while pydicom reads every file and builds the HU array.

With ``--torso N`` the cached 512 x 512 x N torso benchmark series of
``benchmarks/harness.py`` is loaded instead (no phantom: the skin-air edge path).
Times are the median (and the best) of ``--repeats`` runs (wall and CPU), each cold: the
phantom search's shared answer (``_phantom``'s cache, which the noise analyses of the same
volume would also use) is cleared before every run. The machine may be shared, so compare
CPU medians and minima. The parts list also times the rods measured one at a time (each as
``measure_circular_edge`` alone) beside the rods measured together, as the analysis does,
and prints the ratio of the two.

Usage: ``python benchmarks/bench_ttf.py [--slices 120] [--torso 400] [--repeats 5]``
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage

from reconaudit.checker.analyses import _phantom, ttf
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume

sys.path.insert(0, str(Path(__file__).resolve().parent))
import harness  # noqa: E402  (benchmarks/ is not a package)

RODS_HU = (-1000.0, -100.0, 120.0, 340.0, 900.0)


def make_phantom(nz: int, n: int = 512, pixel_mm: float = 0.45, seed: int = 11) -> Volume:
    """Invented water phantom with a rod module and a uniform module."""
    yy, xx = np.mgrid[:n, :n].astype(float)
    c = (n - 1) / 2.0
    water = np.where(np.hypot(yy - c, xx - c) <= 100.0 / pixel_mm, 0.0, -1000.0)
    rods = water.copy()
    for k, hu in enumerate(RODS_HU):
        a = 2 * np.pi * k / len(RODS_HU)
        cy, cx = c + 55.0 / pixel_mm * np.sin(a), c + 55.0 / pixel_mm * np.cos(a)
        rods[np.hypot(yy - cy, xx - cx) <= 6.0 / pixel_mm] = hu
    sigma = 0.6 / pixel_mm
    water, rods = ndimage.gaussian_filter(water, sigma), ndimage.gaussian_filter(rods, sigma)
    rng = np.random.default_rng(seed)
    hu = np.empty((nz, n, n), dtype=np.float32)
    for z in range(nz):
        hu[z] = (rods if z < nz // 3 else water) + rng.normal(0.0, 10.0, (n, n))
    return Volume.from_array(hu, spacing_mm=(1.25, pixel_mm, pixel_mm))


def _cold() -> None:
    """Forget the shared phantom search and finite-value counts (each run pays for its own)."""
    for name in ("_LAST", "_LAST_COUNT", "_LAST_SLICES_COUNT"):
        getattr(_phantom, name, {}).clear()


def _timed(fn, repeats: int, best: list[float] | None = None):
    """Median wall and CPU seconds of ``repeats`` cold calls, and the last result; the
    best CPU time is appended to ``best`` when given."""
    walls, cpus, out = [], [], None
    for _ in range(max(1, repeats)):
        _cold()
        w0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
    if best is not None:
        best.append(min(cpus))
    return float(np.median(walls)), float(np.median(cpus)), out


def _torso(nz: int) -> tuple[Volume, float]:
    from reconaudit.checker.load import discover, load_series

    folder = harness.benchmark_series(nz)
    limit = float(harness.read_limit(folder))
    return load_series(discover([folder]).series[0]), limit


def _print_parts(vol: Volume, regions, repeats: int) -> None:
    """CPU time of the phantom search, the insert search and the rod measurements on
    their own (median and best of ``repeats``, ms): the best is the least disturbed by
    other work on a shared machine."""
    s = ttf.resolve_settings({})
    parts = {}
    _, _, found = _timed(lambda: ttf._phantom_of(vol, regions), 1)
    parts["phantom search"] = lambda: ttf._phantom_of(vol, regions)
    parts["insert search"] = lambda: ttf.find_rod_inserts(vol, regions, s, phantom=found)
    inserts = ttf.find_rod_inserts(vol, regions, s, phantom=found)
    allowed = ttf._body_footprint(vol, regions, inserts, s)
    together = f"measuring {len(inserts)} rods"
    parts[together] = lambda: ttf.measure_circular_edges(  # as analyse measures them
        vol, inserts, s, allowed=allowed, others=inserts)
    parts["  the same rods one at a time"] = lambda: [  # each rod alone: what measuring them together saves
        ttf.measure_circular_edge(vol, ins, s, allowed=allowed, others=inserts) for ins in inserts]
    medians = {}
    for name, fn in parts.items():
        cpus = []
        for _ in range(max(1, repeats)):
            _cold()
            c0 = time.process_time()
            fn()
            cpus.append(time.process_time() - c0)
        medians[name] = float(np.median(cpus))
        print(f"    {name}: CPU median {1e3 * medians[name]:.1f} ms, best {1e3 * min(cpus):.1f} ms")
    alone = medians["  the same rods one at a time"]
    print(f"    rods together / one at a time: {medians[together] / alone:.2f} (CPU medians)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=120)
    parser.add_argument("--torso", type=int, default=0, help="slices of the cached torso series (0: the phantom)")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    if args.torso:
        vol, limit = _torso(args.torso)
    else:
        vol = make_phantom(args.slices)
        limit = float(harness.read_limit(vol))
    how = "benchmarks/harness.py read_limit"
    t0 = time.perf_counter()
    regions = find_regions(vol)
    t_regions = time.perf_counter() - t0
    print(f"series {vol.shape} (z, y, x); read limit {limit:.2f} s ({how})")
    print(f"  shared regions: {t_regions:.2f} s = {t_regions / limit:.3f} x read (not counted below)")
    ttf.analyse(vol, regions)  # warm-up (imports, caches of the sampler)
    w, c, inserts = _timed(lambda: ttf.find_rod_inserts(vol, regions), args.repeats)
    print(f"  insert finding alone: wall {w:.3f} s = {w / limit:.3f} x, CPU {c:.3f} s = {c / limit:.3f} x read"
          f" ({len(inserts)} rods)")
    if inserts:
        _print_parts(vol, regions, args.repeats)
    best: list[float] = []
    w, c, res = _timed(lambda: ttf.analyse(vol, regions), args.repeats, best)
    print(f"  ttf analysis (median of {args.repeats}): wall {w:.3f} s = {w / limit:.3f} x, "
          f"CPU {c:.3f} s = {c / limit:.3f} x read (goal <= 0.1); best CPU {best[0]:.3f} s = "
          f"{best[0] / limit:.3f} x")
    for e in res.record.get("edges", []):
        print(f"    {e['label']}: slices {e['slices']}, f10 {e['f10_per_mm']}, reliable {e['reliable']}")


if __name__ == "__main__":
    main()
