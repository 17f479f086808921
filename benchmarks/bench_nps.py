"""Time of the NPS and uniformity analyses on a large water phantom series, as a ratio to
the time of reading that series (goal: <= 0.1x). Prints, never asserts.

The series is invented: a 200 mm water cylinder in air, 512 x 512 pixels of 0.45 mm,
``--slices`` slices of 1.25 mm, FBP-like band-pass noise of 20 HU (made on a 16-slice
slab and tiled). The read limit is ``benchmarks/harness.py``'s ``read_limit`` when it is
there; otherwise the series is written as CT DICOM (``reconaudit.checker.dicom_write``)
into a temporary folder and timed while pydicom reads every file and builds the HU array.

"cold" runs clear the shared phantom search and finite checks first, so each analysis
pays for them; uniformity is also shown after the noise analysis, as in a check, and the
subtraction (pair) NPS of two invented repeated scans of the phantom.

``--breakdown`` adds the CPU time of the parts of a cold noise analysis (phantom
search, finite check of the measured slices, ROI gather, 2-D measurement, 2-D + 3-D
measurement), each part timed alone in the same loop, parts alternating, so the
shares are not skewed by the load changing between stages.

Usage: ``python benchmarks/bench_nps.py [--slices 400] [--repeats 5] [--breakdown]``
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage

from reconaudit.checker.analyses import _phantom, nps, uniformity
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume

sys.path.insert(0, str(Path(__file__).resolve().parent))
import harness  # noqa: E402  (benchmarks/ is not a package)


def make_phantom(nz: int, n: int = 512, pixel_mm: float = 0.45, seed: int = 7) -> Volume:
    """Invented water cylinder series with band-pass noise."""
    yy, xx = np.mgrid[:n, :n]
    c = (n - 1) / 2.0
    img = np.where((yy - c) ** 2 + (xx - c) ** 2 <= (100.0 / pixel_mm) ** 2, 0.0, -1000.0)
    rng = np.random.default_rng(seed)
    w = rng.standard_normal((16, n, n)).astype(np.float32)
    slab = ndimage.gaussian_filter(w, (0, 0.8, 0.8)) - ndimage.gaussian_filter(w, (0, 2.5, 2.5))
    slab *= 20.0 / slab.std()
    hu = np.empty((nz, n, n), dtype=np.float32)
    for z0 in range(0, nz, 16):
        k = min(16, nz - z0)
        hu[z0 : z0 + k] = img[None] + np.roll(slab[:k], shift=(z0 * 5) % n, axis=2)
    return Volume.from_array(hu, spacing_mm=(1.25, pixel_mm, pixel_mm))


def _timed(fn, *args, repeats: int, cold: bool) -> tuple[float, float, float, object]:
    """Median wall, median CPU and least CPU seconds of ``fn(*args)`` over ``repeats``
    runs; ``cold`` clears the phantom search and finite-check caches before every run."""
    walls, cpus, res = [], [], None
    for _ in range(repeats):
        if cold:
            _phantom._LAST.clear()
            _phantom._LAST_COUNT.clear()
            _phantom._LAST_SLICES_COUNT.clear()
        t0, c0 = time.perf_counter(), time.process_time()
        res = fn(*args)
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    return float(np.median(walls)), float(np.median(cpus)), float(np.min(cpus)), res


def _clear_shared() -> None:
    _phantom._LAST.clear()
    _phantom._LAST_COUNT.clear()
    _phantom._LAST_SLICES_COUNT.clear()


def breakdown(vol: Volume, regions, repeats: int) -> dict[str, tuple[float, float]]:
    """Least and median CPU seconds of each part of a cold ``nps.analyse`` with the 3-D
    record, the parts timed one after the other within each of ``repeats`` rounds."""
    s = nps._settings({"nps_3d": True})
    s2 = {**s, "nps_3d": False}
    parts: dict[str, list[float]] = {k: [] for k in
                                     ("phantom search", "finite check", "ROI gather", "2-D measurement",
                                      "2-D + 3-D measurement", "whole (2-D + 3-D)")}

    def timed(key: str, fn):
        c0 = time.process_time()
        out = fn()
        parts[key].append(time.process_time() - c0)
        return out

    for _ in range(repeats):
        _clear_shared()
        timed("phantom search", lambda: _phantom.find_phantom(vol, regions))
        rois = nps.phantom_rois(vol, regions, s).rois
        timed("finite check", lambda: _phantom.nonfinite_reason(vol, rois))
        stack = timed("ROI gather", lambda: nps.roi_images(vol.hu, rois))
        timed("2-D measurement", lambda: nps.measure_roi_images(stack, vol.spacing_mm, rois, s2))
        stack = nps.roi_images(vol.hu, rois)
        timed("2-D + 3-D measurement", lambda: nps.measure_roi_images(stack, vol.spacing_mm, rois, s))
        _clear_shared()
        timed("whole (2-D + 3-D)", lambda: nps.analyse(vol, regions, {"nps_3d": True}))
    return {k: (float(np.min(v)), float(np.median(v))) for k, v in parts.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=120)
    parser.add_argument("--repeats", type=int, default=5, help="runs per stage (medians printed)")
    parser.add_argument("--breakdown", action="store_true", help="CPU time of the parts of a cold nps")
    args = parser.parse_args()
    vol = make_phantom(args.slices)
    limit, how = float(harness.read_limit(vol)), "benchmarks/harness.py read_limit"
    t0 = time.perf_counter()
    regions = find_regions(vol)
    t_regions = time.perf_counter() - t0
    print(f"series {vol.shape} (z, y, x); read limit {limit:.2f} s ({how})")
    print(f"  shared regions: {t_regions:.2f} s = {t_regions / limit:.3f} x read (not counted below)")
    stages = (
        ("phantom search (find_phantom)", lambda v, r, _s: _phantom.find_phantom(v, r), None, True),
        ("nps (2-D), cold", nps.analyse, None, True),
        ("nps (2-D + 3-D), cold", nps.analyse, {"nps_3d": True}, True),
        ("uniformity, cold", uniformity.analyse, None, True),
        ("uniformity after nps (shared search)", uniformity.analyse, None, False),
    )
    other = make_phantom(args.slices, seed=8)  # a repeated scan of the same phantom
    stages += (("nps pair (subtraction), shared search",
                lambda v, r, _s: nps.nps_from_pair(v, other, r), None, False),)
    for label, fn, settings, cold in stages:
        wall, cpu, cpu_min, res = _timed(fn, vol, regions, settings, repeats=args.repeats, cold=cold)
        record = getattr(res, "record", {})
        if not record.get("applicable", True):
            print(f"  {label}: not applicable: {record.get('reason')}")
        print(f"  {label}: {wall * 1e3:.1f} ms = {wall / limit:.3f} x read (CPU {cpu * 1e3:.1f} ms = "
              f"{cpu / limit:.3f} x, least {cpu_min * 1e3:.1f} ms; goal <= 0.1, median of {args.repeats})")
    if args.breakdown:
        runs = max(args.repeats, 11)
        print(f"  parts of a cold nps (2-D + 3-D), CPU least / median of {runs} rounds:")
        for label, (least, median) in breakdown(vol, regions, runs).items():
            print(f"    {label}: {least * 1e3:.2f} / {median * 1e3:.2f} ms = {median / limit:.3f} x read")


if __name__ == "__main__":
    main()
