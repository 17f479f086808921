"""Streak analysis timings: per-slice screen of a 512 x 512 slice, and a 512 x 512 x 400
volume (printed, never asserted).

If ``benchmarks/harness.py`` provides ``read_limit`` (the time to read and build the HU
array of such a series), the whole-analysis time is printed as a ratio to it (target
<= 0.25); otherwise absolute times are printed. Wall and CPU times are the medians of
``--repeats`` runs (the machine may be shared); ``--threads`` sets the screen's threads.

``--torso`` uses the harness's torso-like benchmark volume (the phantom of the cached
benchmark series, built in memory) instead of the synthetic ellipse.

``--stages`` also prints the wall and CPU medians of the first screen's stages run
alone over the volume's tasks (slab binning, slab masks, texture, FFT and cell sums), on
one thread and on ``--threads`` threads, alternating stages and thread counts so that a
load change does not skew one stage; the stage inputs are formed once beforehand.

``--flagged`` times the localisation of flagged slices alone (:func:`streaks.localise`,
after one screen), on one thread: the committed demo series with streaks (limited angle,
metal) and the synthetic volume with two added streaks on every slice (all slices
flagged). It prints the median CPU ms per flagged slice and the localisation's share of
the whole analysis's CPU time.

Run: python benchmarks/bench_streaks.py [--slices 400] [--repeats 3] [--threads 2] [--torso] [--stages]
     [--flagged]
"""
from __future__ import annotations

import argparse
import resource
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from reconaudit.checker.analyses import streaks
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import Overlays
from reconaudit.checker.volume import Volume


def synthetic_volume(nz: int, n: int = 512, seed: int = 0) -> Volume:
    """An invented elliptical body (40 HU) in air with noise, inside a padded FOV circle."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:n, 0:n].astype(np.float32)
    c = (n - 1) / 2.0
    body = ((xx - c) / (0.36 * n)) ** 2 + ((yy - c) / (0.27 * n)) ** 2 <= 1
    fov = (xx - c) ** 2 + (yy - c) ** 2 <= (0.49 * n) ** 2
    base = np.where(body, 40.0, -1000.0).astype(np.float32)
    hu = np.empty((nz, n, n), dtype=np.float32)
    for z in range(nz):
        hu[z] = base + rng.normal(0.0, 15.0, (n, n)).astype(np.float32)
    hu[:, ~fov] = -3024.0
    return Volume.from_array(hu, (1.0, 0.7, 0.7), padding_mask=~fov)


def bench_slice_screen(vol: Volume, regions, repeats: int = 30) -> tuple[float, float]:
    """Median wall and CPU seconds of the screen of one full-resolution slice (mask included)."""
    cfg = streaks.resolve_settings(None)
    f = streaks.screen_factor(vol.shape[1:], int(cfg["screen_max_px"]))
    shape_b = (vol.shape[1] // f, vol.shape[2] // f)
    bins = streaks.spectral_bins(shape_b, tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    walls, cpus = [], []
    for i in range(repeats):
        z = i % vol.shape[0]
        t0, c0 = time.perf_counter(), time.process_time()
        allowed = streaks.allowed_mask(regions, z, f, shape_b, cfg)
        profile = streaks.screen_slice(vol.hu[z], allowed, f, bins, cfg)
        streaks.streak_index_of_profile(profile)
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    return statistics.median(walls), statistics.median(cpus)


def torso_volume(nz: int) -> Volume:
    """The harness's torso-like benchmark volume (same phantom as the cached series)."""
    sys.path.insert(0, str(Path(__file__).parent))
    import harness  # type: ignore

    return harness.benchmark_volume(nz)


def read_limit_s(nz: int) -> float | None:
    sys.path.insert(0, str(Path(__file__).parent))
    try:
        import harness  # type: ignore
    except ImportError:
        return None
    fn = getattr(harness, "read_limit", None)
    if fn is None:
        return None
    try:
        return float(fn(nz) if callable(fn) else fn)
    except TypeError:
        return float(fn())


def timed_runs(fn, repeats: int) -> tuple[float, float, object]:
    """Median wall and CPU seconds of ``repeats`` calls of ``fn`` and the last result
    (also prints the minima and the minor page faults of the last call)."""
    walls, cpus, result, faults = [], [], None, 0
    for _ in range(max(1, repeats)):
        f0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
        t0, c0 = time.perf_counter(), time.process_time()
        result = fn()
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
        faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt - f0
    print(f"  runs: wall min {min(walls):.3f} s, CPU min {min(cpus):.3f} s, minor page faults of the last run {faults}")
    return statistics.median(walls), statistics.median(cpus), result


def first_screen_stages(vol: Volume, regions) -> dict[str, Callable[[int], None]] | None:
    """The first screen's stages as functions of a task index (None when there is no first screen).

    Each stage runs alone on one task (the analysis's tasks, :func:`streaks.screen_tasks`, with
    workspaces from :func:`streaks.pooled_workspace` as in the analysis): binning
    (:func:`streaks.bin_slab`), masks (:meth:`streaks.AllowedMasks.slab_stack`), texture
    (:func:`streaks.screen_textures`) and the FFT with the cell sums
    (:func:`streaks.profiles_of_textures`); the later stages read the outputs of the
    earlier ones, formed once here.
    """
    cfg = streaks.resolve_settings(None)
    nz, ny, nx = vol.shape
    slab = streaks.slab_size(vol.spacing_mm[0], cfg)
    first = streaks.first_screen_size(vol.spacing_mm[0], slab, cfg)
    if first <= slab or nz <= first:
        return None
    f = streaks.screen_factor((ny, nx), int(cfg["screen_max_px"]))
    shape_b = (ny // f, nx // f)
    bins = streaks.spectral_bins(shape_b, tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(regions, f, shape_b, cfg)
    n_slabs = nz // first
    # the analysis's tasks (in slabs): streaks.screen_tasks of the slab range on the module's threads
    tasks = [(a // first, b // first) for a, b in
             streaks.screen_tasks([(0, n_slabs * first)], first, streaks.SCREEN_STACK, streaks.SCREEN_THREADS)]
    means = np.empty((n_slabs,) + shape_b, np.float32)
    allowed = np.empty((n_slabs,) + shape_b, bool)
    textures = np.empty((n_slabs,) + shape_b, np.float32)

    def binning(i: int) -> None:
        with streaks.pooled_workspace() as ws:
            for j in range(*tasks[i]):
                streaks.bin_slab(vol.hu, list(range(j * first, (j + 1) * first)), f, out=means[j], ws=ws)

    def slab_masks(i: int) -> None:
        a, b = tasks[i]
        with streaks.pooled_workspace() as ws:
            allowed[a:b] = masks.slab_stack(a * first, b * first, first, ws)

    def texture(i: int) -> None:
        a, b = tasks[i]
        with streaks.pooled_workspace() as ws:
            tex, _ = streaks.screen_textures(means[a:b], allowed[a:b], cfg, np.ones(b - a, bool), ws)
            textures[a:b] = tex

    def fft_cells(i: int) -> None:
        a, b = tasks[i]
        with streaks.pooled_workspace() as ws:
            streaks.profiles_of_textures(textures[a:b].copy(), [True] * (b - a), bins, ws)

    stages = {"binning": binning, "masks": slab_masks, "texture": texture, "FFT + cells": fft_cells}
    for fn in stages.values():  # inputs of the later stages
        streaks.map_slices(fn, len(tasks), 1)
    stages["_tasks"] = len(tasks)  # type: ignore[assignment]
    return stages


def print_stages(vol: Volume, regions, threads: int, repeats: int) -> None:
    """Wall and CPU medians of each first-screen stage on 1 and ``threads`` threads (alternating)."""
    stages = first_screen_stages(vol, regions)
    if stages is None:
        print("stages: no first screen at this slice spacing")
        return
    n_tasks = stages.pop("_tasks")
    counts = sorted({1, max(1, threads)})
    times: dict[tuple[str, int], list[tuple[float, float]]] = {}
    for _ in range(max(1, repeats)):
        for th in counts:
            for name, fn in stages.items():
                t0, c0 = time.perf_counter(), time.process_time()
                streaks.map_slices(fn, n_tasks, th)
                times.setdefault((name, th), []).append((time.perf_counter() - t0, time.process_time() - c0))
    for th in counts:
        parts = ", ".join(f"{name} {statistics.median(w for w, _ in times[(name, th)]) * 1e3:.1f}/"
                          f"{statistics.median(c for _, c in times[(name, th)]) * 1e3:.1f}"
                          for name in stages)
        print(f"first-screen stages, {th} thread(s), median of {repeats}, wall/CPU ms: {parts}")


DEMO_STREAK_SERIES = ("torso_limited_angle", "torso_metal")


def streaked_volume(nz: int, n: int = 512) -> Volume:
    """:func:`synthetic_volume` with two thin straight streaks (30 and 115 deg, +-40 HU) on every slice."""
    vol = synthetic_volume(nz, n)
    yy, xx = np.mgrid[0:n, 0:n].astype(np.float32)
    c = (n - 1) / 2.0
    for angle, offset, contrast in [(30.0, 20.0, 40.0), (115.0, -35.0, -40.0)]:
        a = np.radians(angle)
        on = np.abs((yy - c) * np.cos(a) + (xx - c) * np.sin(a) - offset) < 1.0
        vol.hu[:, on & (vol.hu[0] > -2000.0)] += np.float32(contrast)
    return vol


def localisation_inputs(vol: Volume, regions) -> tuple:
    """What :func:`streaks.localise` needs, from one screen (as :func:`streaks.summarise` forms it)."""
    cfg = streaks.resolve_settings(None)
    screen = streaks.screen_volume(vol, regions, cfg)
    flagged = [z for z in screen.valid_slices if screen.indices[z] > cfg["tolerance_index"]]
    mean = np.mean([screen.profiles[z] for z in screen.valid_slices], axis=0)
    wedge = streaks.missing_wedge(mean, float(cfg["angle_bin_deg"]), float(cfg["wedge_level"]), float(cfg["wedge_min_deg"]))
    pairs = {z: streaks.dense_pair_lines(streaks.bin_slice(vol.hu[z], screen.factor), cfg) for z in flagged}
    return screen, flagged, wedge, cfg, pairs


def print_flagged(name: str, vol: Volume, repeats: int) -> None:
    """Median CPU time of the localisation per flagged slice and its share of the whole analysis (one thread)."""
    regions = find_regions(vol)
    screen, flagged, wedge, cfg, pairs = localisation_inputs(vol, regions)
    if not flagged:
        print(f"{name}: no flagged slice")
        return

    def localise() -> None:
        overlays = Overlays(maps={"streak_strength": np.zeros(vol.shape, dtype=np.float32)})
        streaks.localise(vol, regions, screen, flagged, wedge, cfg, overlays, pairs)

    cpu_loc, cpu_all = [], []
    for _ in range(max(1, repeats)):  # alternating, so that a change of the machine's load hits both
        c0 = time.process_time()
        localise()
        cpu_loc.append(time.process_time() - c0)
        c0 = time.process_time()
        streaks.analyse(vol, regions)
        cpu_all.append(time.process_time() - c0)
    loc, whole = statistics.median(cpu_loc), statistics.median(cpu_all)
    n = min(len(flagged), int(cfg["max_localised_slices"]))
    print(f"{name} {vol.shape}: {n} slices localised, CPU {loc * 1e3:.1f} ms ({loc / n * 1e3:.2f} ms per slice), "
          f"{loc / whole:.2f} of the whole analysis ({whole * 1e3:.1f} ms), median of {repeats}, 1 thread")


def flagged_benchmarks(slices: int, repeats: int) -> None:
    """:func:`print_flagged` for the demo series with streaks and the streaked synthetic volume."""
    from reconaudit.checker.load import load_path

    streaks.SCREEN_THREADS = 1
    root = Path(__file__).resolve().parents[1] / "sample_volumes" / "fernhollow" / "20240611"
    for name in DEMO_STREAK_SERIES:
        if (root / name).is_dir():
            print_flagged(name, load_path(root / name)[0], repeats)
    print_flagged("synthetic with streaks", streaked_volume(slices), repeats)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--slices", type=int, default=400)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=None, help="threads of the screen (default: the module's)")
    parser.add_argument("--torso", action="store_true", help="the harness's torso-like volume instead of the ellipse")
    parser.add_argument("--stages", action="store_true", help="also time the first screen's stages alone")
    parser.add_argument("--flagged", action="store_true",
                        help="only time the localisation of flagged slices (demo series, streaked volume of --slices)")
    args = parser.parse_args()
    if args.flagged:
        flagged_benchmarks(args.slices, max(args.repeats, 7))
        return
    if args.threads is not None:
        streaks.SCREEN_THREADS = max(1, args.threads)
    vol = torso_volume(args.slices) if args.torso else synthetic_volume(args.slices)
    regions = find_regions(vol)
    per_slice, per_slice_cpu = bench_slice_screen(vol, regions, 60)
    print(f"per-slice screen, 512 x 512: median {per_slice * 1e3:.2f} ms, CPU {per_slice_cpu * 1e3:.2f} ms "
          f"(target <= 10 ms)")
    wall, cpu, res = timed_runs(lambda: streaks.analyse(vol, regions), args.repeats)
    n = args.slices
    cfg = streaks.resolve_settings(None)
    slab = streaks.slab_size(vol.spacing_mm[0], cfg)
    first = streaks.first_screen_size(vol.spacing_mm[0], slab, cfg)
    print(f"slices of {vol.spacing_mm[0]:g} mm screened in slabs of {slab} (screen_slab_mm "
          f"{streaks.DEFAULTS['screen_slab_mm']:g}), first screen on slabs of {first} (first_screen_slab_mm "
          f"{streaks.DEFAULTS['first_screen_slab_mm']:g}, refined above "
          f"{streaks.first_screen_gate(float(cfg['tolerance_index']), slab, first):.2f})")
    print(f"whole analysis, 512 x 512 x {n}, {streaks.SCREEN_THREADS} thread(s), median of {args.repeats}: "
          f"wall {wall:.2f} s ({wall / n * 1e3:.2f} ms/slice), CPU {cpu:.2f} s ({cpu / n * 1e3:.2f} ms/slice), "
          f"index {res.record['index']:.2f}, flagged {res.record['flagged']}")
    limit = read_limit_s(n)
    if limit:
        print(f"read limit {limit:.2f} s -> ratio wall {wall / limit:.3f}, CPU {cpu / limit:.3f} (target <= 0.25)")
    else:
        print("benchmarks/harness.py read_limit not available; absolute times only")
    if args.stages:
        print_stages(vol, regions, streaks.SCREEN_THREADS, max(args.repeats, 5))


if __name__ == "__main__":
    main()
