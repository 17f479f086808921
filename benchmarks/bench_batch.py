"""Batch benchmark: memory over a long batch, and the throughput of 2 workers vs 1.

1. ``--series`` (default 200) small generated CT series (water cylinders of the invented
   Fernhollow scenario, 6 x 64 x 64) checked in one batch with 2 local workers. A sampler
   thread records the resident set size (RSS) of the main process and of every worker
   every 50 ms; printed: the peak RSS of the main process in the first and the last
   quarter of the batch (flat = bounded), the peak RSS of any one worker, and
   ``ru_maxrss`` of this process and of its children.
2. The 8 first committed demo series (``sample_volumes/fernhollow/...``, 256 x 256 x 16)
   checked once untimed (warm-up), then with 1 worker and with 2 workers alternately
   ``--rounds`` times (fresh ``--out`` each, no history); printed: the wall times and the
   throughput ratio of the medians, t(1 worker) / t(2 workers), and the ratio within each
   round with its median (robust to a drift of a shared machine's speed). Measured twice: as the
   command checks by default (per-series figures drawn), and the analyses alone
   (``--no-figures``; the harder case: the serial discovery and outputs and each fresh
   worker's start weigh more against shorter tasks). Each timed check runs in a process
   forked for it from the warmed benchmark process (as each ``reconaudit check`` is a
   process of its own: the 1-worker check starts with a new process's memory, as the
   2-worker check's workers do); ``--same-process`` times them all in the benchmark's
   own process instead. The target of the design guide is at least 1.8.

Prints, never asserts (machines differ; the CI machine is shared). Run:

    python benchmarks/bench_batch.py [--series 200] [--figures] [--skip-memory] [--skip-throughput]
                                     [--rounds 5] [--modes default,no-figures] [--same-process]
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(REPO / "tests" / "corpus"))

import make_corpus  # noqa: E402  (the small-series writer of the test corpus)

MiB = 2**20


class RssSampler:
    """Samples the RSS of this process and its children every ``interval`` seconds."""

    def __init__(self, count_done, interval: float = 0.05) -> None:
        import psutil

        self.me = psutil.Process()
        self.count_done = count_done
        self.interval = interval
        self.main: list[tuple[int, int]] = []  # (series done, rss)
        self.workers: dict[int, int] = {}  # pid -> peak rss
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        import psutil

        while not self._stop.is_set():
            self.main.append((self.count_done(), self.me.memory_info().rss))
            for child in self.me.children(recursive=True):
                try:
                    rss = child.memory_info().rss
                except psutil.Error:
                    continue
                self.workers[child.pid] = max(rss, self.workers.get(child.pid, 0))
            time.sleep(self.interval)

    def __enter__(self) -> "RssSampler":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()


def _check(inputs: Path, out: Path, workers: int, figures: bool):
    from reconaudit.checker.runner import CheckOptions, check

    return check(CheckOptions(inputs=[inputs], out_dir=out, workers=workers, figures=figures))


def memory_run(n_series: int, figures: bool, work: Path) -> None:
    inputs = work / "many"
    t0 = time.perf_counter()
    for i in range(n_series):
        make_corpus.write_series(inputs / f"s{i:04d}", f"bench-{i}", nz=6, n=64, description=f"Fernhollow bench {i}")
    print(f"wrote {n_series} series of 6 x 64 x 64 in {time.perf_counter() - t0:.1f} s")
    out = work / "many_out"
    series_dir = out / "series"

    def done() -> int:
        return len(list(series_dir.glob("*.json"))) if series_dir.is_dir() else 0

    t0 = time.perf_counter()
    with RssSampler(done) as sampler:
        outcome = _check(inputs, out, 2, figures)
    wall = time.perf_counter() - t0
    records = outcome.document["series"]
    ok = sum(r["status"] == "ok" for r in records)
    q = max(1, n_series // 4)
    first = max((rss for n, rss in sampler.main if n < q), default=0)
    last = max((rss for n, rss in sampler.main if n >= n_series - q), default=0)
    print(f"{n_series} series, 2 workers: {wall:.1f} s ({n_series / wall:.2f} series/s), {ok} ok, "
          f"{len(records) - ok} not ok")
    print(f"peak RSS main process: first quarter {first / MiB:.0f} MiB, last quarter {last / MiB:.0f} MiB "
          f"(growth {(last - first) / MiB:+.0f} MiB)")
    if sampler.workers:
        print(f"peak RSS of one worker: {max(sampler.workers.values()) / MiB:.0f} MiB over {len(sampler.workers)} "
              "worker processes (a fresh pool every 25 series per worker)")
    self_max = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    child_max = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"ru_maxrss: main {self_max:.0f} MiB, largest finished child {child_max:.0f} MiB")


def sample_series(n: int = 8) -> list[Path]:
    day = REPO / "sample_volumes" / "fernhollow" / "20240611"
    folders = sorted(p for p in day.iterdir() if p.is_dir())[:n]
    if len(folders) < n:
        raise SystemExit(f"expected {n} committed sample series in {day}, found {len(folders)}")
    return folders


def _timed_check(inputs: Path, out: Path, workers: int, figures: bool, fresh: bool) -> tuple[float, int]:
    """Wall time and number of series checked ok of one check, in this process or (``fresh``)
    in a process forked from it for this run alone."""
    if not fresh:
        t0 = time.perf_counter()
        outcome = _check(inputs, out, workers, figures)
        return time.perf_counter() - t0, sum(s["status"] == "ok" for s in outcome.document["series"])
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # the fresh process: one check, its figures back through the pipe
        code = 1
        try:
            os.close(read_end)
            wall, ok = _timed_check(inputs, out, workers, figures, fresh=False)
            os.write(write_end, json.dumps([wall, ok]).encode())
            code = 0
        finally:
            os._exit(code)
    os.close(write_end)
    with os.fdopen(read_end, "rb") as pipe:
        answer = pipe.read()
    _, status = os.waitpid(pid, 0)
    if status != 0 or not answer:
        raise SystemExit(f"the check in a fresh process failed (wait status {status})")
    wall, ok = json.loads(answer)
    return wall, ok


def throughput_run(figures: bool, work: Path, rounds: int = 3, fresh: bool = True) -> float:
    """1 worker against 2 on the same eight series, after one untimed warm-up run.

    The warm-up pays the one-time costs (imports, the page cache of the files, first
    calls) that would otherwise fall on whichever run comes first; the two settings then
    alternate ``rounds`` times and the medians are compared. Returns the ratio.

    ``fresh`` (the default): each timed check runs in a process forked for it from this
    warmed one, as a ``reconaudit check`` is a process of its own: the 1-worker check
    then starts with the memory of a new process, as the 2-worker check's workers do
    (the first series of a new process touches some 75 MB of fresh pages, about 0.1 s).
    Checked in this process instead (``fresh=False``), the 1-worker check would reuse
    the memory of the runs before it, which no real check has.
    """
    inputs = work / "eight"
    if not inputs.is_dir():
        for folder in sample_series(8):
            shutil.copytree(folder, inputs / folder.name)
    mode = ("figures drawn (the default)" if figures else "analyses only (--no-figures)") + \
        (", each check a fresh process" if fresh else ", every check in the benchmark's process")
    tag = "fig" if figures else "nofig"
    _check(inputs, work / f"eight_warm_up_{tag}", 1, figures)
    times: dict[int, list[float]] = {1: [], 2: []}
    for r in range(rounds):
        for workers in (1, 2):
            wall, ok = _timed_check(inputs, work / f"eight_out_{tag}_{int(fresh)}_{workers}_{r}", workers, figures, fresh)
            times[workers].append(wall)
            print(f"{mode}, round {r + 1}: 8 sample series, {workers} worker(s): {wall:.2f} s, {ok} ok")
    median = {w: sorted(t)[len(t) // 2] for w, t in times.items()}
    ratio = median[1] / median[2]
    paired = sorted(a / b for a, b in zip(times[1], times[2]))
    print(f"{mode}: median of {rounds}: 1 worker {median[1]:.2f} s, 2 workers {median[2]:.2f} s")
    print(f"{mode}: throughput ratio 2 workers / 1 worker: {ratio:.2f} (ratio of the medians; target >= 1.8)")
    print(f"{mode}: ratio within each round (the two runs side by side in time, so a drift of the "
          f"machine's speed between rounds cancels): {', '.join(f'{r:.2f}' for r in paired)}; "
          f"median {paired[len(paired) // 2]:.2f}")
    return ratio


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--series", type=int, default=200)
    p.add_argument("--figures", action="store_true", help="draw the per-series figures in the memory run too")
    p.add_argument("--skip-memory", action="store_true")
    p.add_argument("--skip-throughput", action="store_true")
    p.add_argument("--rounds", type=int, default=5, help="alternating 1- and 2-worker runs")
    p.add_argument("--same-process", action="store_true",
                   help="time every check in the benchmark's own process (default: each in a fresh process)")
    p.add_argument("--modes", default="default,no-figures",
                   help="throughput runs: 'default' (figures drawn, as the command runs), 'no-figures', or both")
    args = p.parse_args(argv)
    modes = [m.strip() for m in args.modes.split(",") if m.strip()]
    if not set(modes) <= {"default", "no-figures"}:
        p.error(f"--modes takes default and/or no-figures, not {args.modes!r}")
    with tempfile.TemporaryDirectory(prefix="reconaudit-bench-batch-") as tmp:
        work = Path(tmp)
        if not args.skip_memory:
            memory_run(args.series, args.figures, work)
        if not args.skip_throughput:
            for mode in modes:
                throughput_run(mode == "default", work, args.rounds, fresh=not args.same_process)


if __name__ == "__main__":
    main()
