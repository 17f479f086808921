"""Benchmark harness: the read-time limit and a measuring helper.

The limit of the project's performance targets is *reading the data*: for a
512 x 512 x 400 CT series, the time plain pydicom needs to read every file and build the
HU float32 array (``dcmread`` + ``pixel_array * slope + intercept`` into a preallocated
array). Everything else is printed as a ratio to it and to the size of the float32
volume. Ratios are printed, never asserted: machines differ.

Reusable API::

    import harness
    series_dir = harness.benchmark_series(400)        # built once, cached in benchmarks/cache/
    limit = harness.read_limit(series_dir)            # seconds (also accepts an int or a Volume)
    m = harness.measure("regions", find_regions, volume, limit_s=limit,
                        volume_bytes=harness.volume_bytes(volume))

The benchmark series is a simple torso-like phantom (ellipses of the demo torso drawn at
a few depths, Gaussian noise of 12 HU); no reconstruction is simulated at this size.
"""
from __future__ import annotations

import gc
import hashlib
import json
import sys
import time
import tracemalloc
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

HERE = Path(__file__).resolve().parent
CACHE = HERE / "cache"
_CACHE_VERSION = 1


# --------------------------------------------------------------------------- series
def benchmark_volume(nz: int = 400, n: int = 512, seed: int = 7):
    """A 512 x 512 x ``nz`` torso-like HU volume with noise (deterministic).

    Built from the demo torso's ellipses (``reconaudit.checker.demo``) drawn at eight
    depths, each slice getting its own Gaussian noise (SD 12 HU), padding outside the
    reconstruction circle.
    """
    from reconaudit.checker import demo
    from reconaudit.checker.volume import Volume

    grid = demo.Grid(n, 358.4 / n, nz, 1.25, 0, 0.0, -500.0)
    levels = [_torso_level(demo, grid, u) for u in np.linspace(0.05, 0.95, 8)]
    pad = demo.padding_mask(grid)
    rng = np.random.default_rng(seed)
    hu = np.empty((nz, n, n), dtype=np.float32)
    for k in range(nz):
        sl = levels[min(7, k * 8 // nz)] + rng.normal(0.0, 12.0, (n, n)).astype(np.float32)
        sl[pad] = demo.PADDING_HU
        hu[k] = sl
    origin = (-(n // 2) * grid.pixel_mm, -(n // 2) * grid.pixel_mm, grid.z0_mm)
    return Volume.from_array(hu, spacing_mm=(grid.slice_mm, grid.pixel_mm, grid.pixel_mm), origin_mm=origin,
                             padding_mask=pad, metadata={"modality": "CT"})


def _torso_level(demo: Any, grid: Any, u: float) -> np.ndarray:
    """One noise-free torso section at fraction ``u`` of the demo torso's length."""
    small = demo.grid_for("torso_clean", "small")
    z = u * small.coverage_mm
    x, y = demo._pixel_coords(grid, 1)
    hu = np.full(x.shape, demo.AIR_HU)
    demo._paint_mattress_and_table(hu, x, y)
    demo._paint(hu, x, y, demo.torso_surroundings_shapes())
    demo._paint(hu, x, y, demo.torso_outline_shapes(small, z))
    demo._paint(hu, x, y, demo.torso_organ_shapes(small, z))
    return hu.astype(np.float32)


def benchmark_series(nz: int = 400, *, cache: Path = CACHE, quiet: bool = False) -> Path:
    """Folder of the cached 512 x 512 x ``nz`` benchmark DICOM series (built if missing)."""
    from reconaudit.checker.dicom_write import write_ct_series

    folder = Path(cache) / f"torso_512x512x{nz}"
    done = folder / "complete.json"
    if done.is_file() and json.loads(done.read_text()).get("version") == _CACHE_VERSION:
        return folder
    if not quiet:
        print(f"building benchmark series {folder} (once; cached) ...", flush=True)
    t0 = time.perf_counter()
    vol = benchmark_volume(nz)
    write_ct_series(vol, folder, series_description=f"benchmark torso {nz} slices",
                    uid_seed=f"reconaudit-benchmark-{nz}", padding_value=-2000)
    done.write_text(json.dumps({"version": _CACHE_VERSION, "slices": nz}))
    if not quiet:
        print(f"  built in {time.perf_counter() - t0:.1f} s", flush=True)
    return folder


def volume_bytes(volume_or_shape: Any) -> int:
    """Bytes of the float32 HU array of a Volume (or of a shape)."""
    shape = getattr(volume_or_shape, "shape", volume_or_shape)
    return int(np.prod(shape)) * 4


# --------------------------------------------------------------------------- the limit
def read_series_hu(series_dir: str | Path) -> np.ndarray:
    """Plain pydicom: read every file and build the HU float32 array (the limit's work).

    Files are taken in name order (the benchmark series is written in slice order).
    """
    import pydicom

    files = sorted(p for p in Path(series_dir).iterdir() if p.suffix == ".dcm")
    if not files:
        raise FileNotFoundError(f"{series_dir}: no .dcm files")
    first = pydicom.dcmread(files[0], stop_before_pixels=True)
    out = np.empty((len(files), int(first.Rows), int(first.Columns)), dtype=np.float32)
    for k, path in enumerate(files):
        ds = pydicom.dcmread(path)
        slope = float(getattr(ds, "RescaleSlope", 1.0))
        intercept = float(getattr(ds, "RescaleIntercept", 0.0))
        np.multiply(ds.pixel_array, slope, out=out[k], casting="unsafe")
        out[k] += intercept
    return out


def read_limit(target: Any = 400, *, repeats: int = 2, quiet: bool = False) -> float:
    """Seconds plain pydicom needs to read a series and build its HU array (best of runs).

    Parameters
    ----------
    target : path, int or Volume
        A series folder; or a number of slices (the cached 512 x 512 benchmark series of
        that many slices); or a Volume (written once to the cache, keyed by its shape
        and a checksum, then read back).
    repeats : int
        Runs; the fastest is returned (the first may include a cold disk cache).

    Returns
    -------
    float
        Wall-clock seconds.
    """
    folder = _series_folder_of(target)
    times = []
    for _ in range(max(1, repeats)):
        gc.collect()
        t0 = time.perf_counter()
        hu = read_series_hu(folder)
        times.append(time.perf_counter() - t0)
        del hu
    best = min(times)
    if not quiet:
        print(f"read limit: {best:.3f} s (plain pydicom, {folder.name}, best of {len(times)})", flush=True)
    return best


def _series_folder_of(target: Any) -> Path:
    if isinstance(target, (str, Path)):
        return Path(target)
    if isinstance(target, (int, np.integer)):
        return benchmark_series(int(target))
    if hasattr(target, "hu") and hasattr(target, "affine"):
        return _cached_volume_series(target)
    raise TypeError(f"read_limit: expected a folder, a slice count or a Volume, got {type(target).__name__}")


def _cached_volume_series(volume: Any) -> Path:
    from reconaudit.checker.dicom_write import write_ct_series

    digest = hashlib.sha256(np.ascontiguousarray(volume.hu[:, ::16, ::16]).tobytes()).hexdigest()[:12]
    folder = CACHE / ("vol_" + "x".join(str(s) for s in volume.shape) + "_" + digest)
    done = folder / "complete.json"
    if not done.is_file():
        write_ct_series(volume, folder, series_description="benchmark volume", uid_seed=f"bench-{digest}",
                        padding_value=-2000 if volume.padding_mask is not None else None)
        done.write_text(json.dumps({"version": _CACHE_VERSION}))
    return folder


# --------------------------------------------------------------------------- measuring
@dataclass
class Measurement:
    """Wall time and peak memory increase of one call."""

    name: str
    wall_s: float
    peak_bytes: int
    memory_method: str
    result: Any = None
    cpu_s: float = float("nan")  # process CPU time (all threads) during the call

    def line(self, limit_s: float | None = None, volume_bytes: int | None = None) -> str:
        """One printable line, with ratios when a limit / volume size is given."""
        parts = [f"{self.name}: {self.wall_s:.3f} s"]
        if limit_s:
            parts.append(f"= {self.wall_s / limit_s:.2f} x read")
        if self.cpu_s == self.cpu_s:
            parts.append(f"(CPU {self.cpu_s:.3f} s" + (f" = {self.cpu_s / limit_s:.2f} x read)" if limit_s else ")"))
        parts.append(f"; peak +{self.peak_bytes / 2**20:.0f} MiB")
        if volume_bytes:
            parts.append(f"= {self.peak_bytes / volume_bytes:.2f} x float32 volume")
        parts.append(f"({self.memory_method})")
        return " ".join(parts)


def _proc_status_kib(key: str) -> int | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


def _reset_peak_rss() -> bool:
    """Reset the kernel's peak-RSS mark of this process (Linux /proc/self/clear_refs)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
    except OSError:
        return False
    return _proc_status_kib("VmHWM") is not None


def measure(
    name: str,
    fn: Callable[..., Any],
    *args: Any,
    limit_s: float | None = None,
    volume_bytes: int | None = None,
    quiet: bool = False,
    **kwargs: Any,
) -> Measurement:
    """Run ``fn(*args, **kwargs)`` once; wall time and peak resident-memory increase.

    Memory: on Linux the kernel's peak-RSS mark is reset before the call and read after
    it (peak RSS minus RSS before). Elsewhere the call is run a second time under
    ``tracemalloc`` (numpy reports its buffers to it) so the timing run stays untraced.
    Prints one line with the ratios to ``limit_s`` and ``volume_bytes`` when given.
    """
    gc.collect()
    rss_mark = _reset_peak_rss()
    before = _proc_status_kib("VmRSS") if rss_mark else None
    t0, c0 = time.perf_counter(), time.process_time()
    result = fn(*args, **kwargs)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    if rss_mark and before is not None:
        peak = max(0, ((_proc_status_kib("VmHWM") or before) - before) * 1024)
        method = "peak RSS"
    else:
        peak, method = _traced_peak(fn, args, kwargs), "tracemalloc"
    m = Measurement(name, wall, peak, method, result, cpu)
    if not quiet:
        print(m.line(limit_s, volume_bytes), flush=True)
    return m


def _traced_peak(fn: Callable[..., Any], args: tuple, kwargs: dict) -> int:
    gc.collect()
    tracemalloc.start()
    try:
        fn(*args, **kwargs)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return int(peak)


if __name__ == "__main__":
    nz = int(sys.argv[1]) if len(sys.argv) > 1 else 400
    read_limit(benchmark_series(nz))
