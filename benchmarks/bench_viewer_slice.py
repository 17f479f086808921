"""Time the viewer's "displayed slice" analysis on a 512 x 512 slice (printed, not asserted).

Target (design guide): the streak screen and the air-structure search on the current slice
return in <= 150 ms. The slice comes from an invented 512 x 512 x 8 torso-like volume
(ellipse of soft tissue with noise, a small structure in the air), built here; the timing
covers the plugin's job (:func:`reconaudit.plugin._jobs.run_checks`: one-slice volume,
regions, both analyses, conversion to layer data) but not drawing the layers.

Run: python benchmarks/bench_viewer_slice.py
"""
from __future__ import annotations

import statistics
import threading
import time

import numpy as np

from reconaudit.checker.volume import Volume
from reconaudit.plugin._geometry import layer_geometry
from reconaudit.plugin._jobs import RegionsCache, run_checks, slice_volume
from reconaudit.plugin._layers import result_view


def make_volume(n: int = 512, nz: int = 8, seed: int = 3) -> Volume:
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:n, 0:n].astype(np.float32)
    hu2d = np.full((n, n), -1000.0, np.float32)
    body = ((y - 0.55 * n) / (0.30 * n)) ** 2 + ((x - 0.5 * n) / (0.40 * n)) ** 2 <= 1.0
    hu2d[body] = 40.0
    hu2d[(y - 0.12 * n) ** 2 + (x - 0.5 * n) ** 2 <= 16.0] = 100.0  # small structure in the air
    hu = np.repeat(hu2d[None], nz, axis=0) + rng.normal(0, 15, (nz, n, n)).astype(np.float32)
    fov = (y - (n - 1) / 2) ** 2 + (x - (n - 1) / 2) ** 2 > (0.49 * n) ** 2
    hu[:, fov] = -3024.0
    return Volume.from_array(hu, spacing_mm=(2.5, 0.8, 0.8), padding_mask=fov, source="benchmark torso")


def time_slice(volume: Volume, names: list[str], z: int, cache: RegionsCache | None = None) -> float:
    geometry = layer_geometry(volume)
    job = run_checks(volume, names, {}, geometry, "bench", z_index=z, regions_cache=cache, stop=threading.Event())
    start = time.perf_counter()
    try:
        while True:
            next(job)
    except StopIteration:
        pass
    return time.perf_counter() - start


def plugin_slice_s(volume: Volume) -> float:
    """Median time to make the one-slice view the analyses run on."""
    return statistics.median(_timed(lambda: slice_volume(volume, 4)) for _ in range(50))


def plugin_layers_s(volume: Volume, names: list[str]) -> float:
    """Median time to turn the slice results into layer data and table rows."""
    from reconaudit.checker.pipeline import analyse_volume

    one = slice_volume(volume, 4)
    results = analyse_volume(one, analyses=names).results
    geometry = layer_geometry(volume)
    return statistics.median(
        _timed(lambda: [result_view(n, r, geometry, "bench", 4) for n, r in results.items()]) for _ in range(7)
    )


def _timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def main(repeats: int = 7) -> None:
    vol = make_volume()
    names = ["streaks", "air"]
    time_slice(vol, names, 4)  # warm-up (imports, FFT plans)
    times = [time_slice(vol, names, 4) for _ in range(repeats)]
    for one in names:
        t1 = statistics.median(time_slice(vol, [one], 4) for _ in range(3))
        print(f"{one:8s} on one 512 x 512 slice (with regions): median {1000 * t1:7.1f} ms")
    cache = RegionsCache()
    time_slice(vol, names, 4, cache)
    cached = statistics.median(time_slice(vol, names, 4, cache) for _ in range(repeats))
    print(f"streaks + air, same slice again (regions from the panel's cache): median {1000 * cached:7.1f} ms")
    print(f"plugin's own share: one-slice view {1000 * plugin_slice_s(vol):.2f} ms, "
          f"layer data and rows {1000 * plugin_layers_s(vol, names):.1f} ms")
    med = statistics.median(times)
    print(f"streaks + air, one 512 x 512 slice: median {1000 * med:7.1f} ms, "
          f"min {1000 * min(times):7.1f} ms over {repeats} runs; target <= 150 ms "
          f"(ratio {med / 0.150:.2f})")


if __name__ == "__main__":
    main()
