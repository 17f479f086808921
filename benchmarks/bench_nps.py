"""Time of the NPS and uniformity analyses on a large water phantom series, as a ratio to
the time of reading that series (goal: <= 0.1x). Prints, never asserts.

The series is invented: a 200 mm water cylinder in air, 512 x 512 pixels of 0.45 mm,
``--slices`` slices of 1.25 mm, FBP-like band-pass noise of 20 HU (made on a 16-slice
slab and tiled). The read limit is ``benchmarks/harness.py``'s ``read_limit`` when it is
there; otherwise the series is written as CT DICOM (``reconaudit.checker.dicom_write``)
into a temporary folder and timed while pydicom reads every file and builds the HU array.

Usage: ``python benchmarks/bench_nps.py [--slices 400]``
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage

from reconaudit.checker.analyses import nps, uniformity
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--slices", type=int, default=120)
    args = parser.parse_args()
    vol = make_phantom(args.slices)
    limit, how = float(harness.read_limit(vol)), "benchmarks/harness.py read_limit"
    t0 = time.perf_counter()
    regions = find_regions(vol)
    t_regions = time.perf_counter() - t0
    timings = {}
    for label, fn, settings in (
        ("nps (2-D)", nps.analyse, None),
        ("nps (2-D + 3-D)", nps.analyse, {"nps_3d": True}),
        ("uniformity", uniformity.analyse, None),
    ):
        t0 = time.perf_counter()
        res = fn(vol, regions, settings)
        timings[label] = time.perf_counter() - t0
        if not res.record.get("applicable", True):
            print(f"  {label}: not applicable: {res.record.get('reason')}")
    print(f"series {vol.shape} (z, y, x); read limit {limit:.2f} s ({how})")
    print(f"  shared regions: {t_regions:.2f} s = {t_regions / limit:.3f} x read (not counted below)")
    for label, t in timings.items():
        print(f"  {label}: {t:.3f} s = {t / limit:.3f} x read (goal <= 0.1)")


if __name__ == "__main__":
    main()
