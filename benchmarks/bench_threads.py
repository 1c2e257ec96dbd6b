"""Threads by problem size: where threads start to pay, and what the default costs on
many small clouds.

Part 1 (--crossover): count_jumps on clouds of growing size, one thread against every
core, best of 5 each; the counting work (the sum over rows of degree^2 + 1, what
`kernel.default_threads` looks at) is printed beside the ratio, to place
`kernel.AUTO_THREADS_WORK`.

Part 2: per-cloud time of euler_curve on 1,000 clouds of 100 points in R^3 and in R^64
(uniform in the unit cube, eps the 10% quantile of the distances: about 10 neighbours a
point), uncapped: the old code (the package at --baseline, imported beside this one)
with its default (every core) and with one thread, the new code with every core (the
old default) and with threads=None (the new default). Best of 3 passes over the 1,000
clouds, the ways taking turns, in this one process.

Run:  python benchmarks/bench_threads.py [--crossover] [--clouds 1000] [--rounds 3] [--baseline REV]
"""

from __future__ import annotations

import argparse
import os
import time

import baseline
import numpy as np

from chitally import kernel
from chitally.inprocess import euler_curve


def cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def work_of(points: np.ndarray, eps: float) -> float:
    offsets = kernel._halo_graph(points, eps)[0]
    deg = np.diff(offsets).astype(np.float64)
    return float(np.sum(deg * deg + 1.0))


def crossover() -> None:
    print(f"counting phase of count_jumps (seconds_count), 1 thread against {cores()}, interleaved, best of 5;")
    print("counting work = sum over rows of (degree^2 + 1), what kernel.default_threads looks at")
    print(f"{'case':<26} {'work':>10} {'1 thread ms':>12} {'all ms':>9} {'all/1':>7} {'ns/unit':>8}")
    rng = np.random.default_rng(0)
    for dims, cap, sizes in ((3, None, (300, 1000, 3000, 10000, 30000)), (3, 3, (1000, 3000, 10000, 30000)),
                             (3, 2, (1000, 3000, 10000, 30000)), (64, None, (300, 1000, 3000)),
                             (64, 2, (300, 1000, 3000))):
        for n in sizes:
            points = rng.random((n, dims))
            # about 15 neighbours a row whatever n: the 15/n quantile of the distances
            sample = points[:400]
            d = np.sqrt(((sample[:, None, :] - sample[None, :, :]) ** 2).sum(-1))
            eps = float(np.quantile(d[np.triu_indices(len(sample), 1)], min(0.5, 15.0 / n)))
            coords = kernel.build_tree(points, 16)[0]
            work = work_of(coords, eps)
            times: dict[int, list[float]] = {1: [], cores(): []}
            for _ in range(5):
                for t, runs in times.items():
                    runs.append(kernel.count_jumps(coords, eps, cap, threads=t).stats.seconds_count)
            one, every = min(times[1]), min(times[cores()])
            name = f"R^{dims} n={n} cap {cap}"
            print(f"{name:<26} {work:10.3g} {one * 1e3:12.3f} {every * 1e3:9.3f} {every / one:7.2f} "
                  f"{one / work * 1e9:8.1f}", flush=True)


def many_clouds(count: int, rev: str, rounds: int) -> None:
    base = baseline.load(rev)
    print(f"\n{count} clouds of 100 points, uncapped; ms per cloud (wall / CPU), best of {rounds} passes taken in "
          f"turn; {cores()} cores")
    names = ("old code, default", "old code, threads=1", "threads=all", "threads=None (new default)")
    print(f"{'points':<8}" + "".join(f"{n:>28}" for n in names))
    for dims in (3, 64):
        rng = np.random.default_rng(dims)
        clouds = [rng.random((100, dims)) for _ in range(count)]
        d = np.sqrt(((clouds[0][:, None, :] - clouds[0][None, :, :]) ** 2).sum(-1))
        eps = float(np.quantile(d[np.triu_indices(100, 1)], 0.1))
        ways = [lambda c, e=eps: base.euler_curve(c, e), lambda c, e=eps: base.euler_curve(c, e, threads=1),
                lambda c, e=eps: euler_curve(c, e, threads=cores()), lambda c, e=eps: euler_curve(c, e)]
        for c in clouds[:3]:  # compile (or load) outside the timing
            for f in ways:
                f(c)
        wall: list[list[float]] = [[] for _ in ways]
        cpu: list[list[float]] = [[] for _ in ways]
        for r in range(rounds):
            for k in [(k + r) % len(ways) for k in range(len(ways))]:
                t0, c0 = time.perf_counter(), time.process_time()
                for c in clouds:
                    ways[k](c)
                wall[k].append((time.perf_counter() - t0) / count * 1e3)
                cpu[k].append((time.process_time() - c0) / count * 1e3)
        print(f"R^{dims:<6}" + "".join(f"{min(w):19.3f} /{min(c):6.3f}" for w, c in zip(wall, cpu)), flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--crossover", action="store_true", help="only part 1")
    ap.add_argument("--clouds", type=int, default=1000)
    ap.add_argument("--rounds", type=int, default=3, help="passes over the clouds per way")
    ap.add_argument("--baseline", default=baseline.DEFAULT_REV)
    args = ap.parse_args()
    if args.crossover:
        crossover()
        return
    many_clouds(args.clouds, args.baseline, args.rounds)


if __name__ == "__main__":
    main()
