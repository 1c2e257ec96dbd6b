"""Distributed runs side by side with the in-process path, in one script.

1. Scaling: the same job in process on one thread, then as a run on a 2-worker
   LocalCluster (plan, store, execute, reduce all included); prints the speedup.
2. Per-task overhead (Dask plus store): many tasks with almost nothing to compute.
3. Worker memory: peak RSS of the workers (from the commit records) for two sizes of N
   at the same density: bounded by the heaviest task, not by N.

Run:  python benchmarks/bench_distributed.py [--scale-points 100000] [--scale-eps 0.35]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from chitally import euler_curve
from chitally.cluster import connect
from chitally.execute import DaskExecutor
from chitally.jobs.cloud import Params, create_or_open, read_plan
from chitally.runs import execute


def sphere4(n: int, seed: int = 0) -> np.ndarray:
    x = np.random.default_rng(seed).standard_normal((n, 5))
    return x / np.linalg.norm(x, axis=1)[:, None]


def cube_at_density(n: int, seed: int = 0) -> np.ndarray:
    """n points uniform in a cube whose side grows with n: the density stays the same."""
    side = (n / 1e5) ** (1 / 3)
    return np.random.default_rng(seed).random((n, 3)) * side


def _spin(n: int) -> float:
    t0 = time.perf_counter()
    s = 0
    for i in range(n):
        s += i * i
    return time.perf_counter() - t0


def parallel_ceiling(n: int = 20_000_000) -> float:
    """How much faster two CPU-bound processes finish than one after the other, here.

    On a machine whose two vCPUs share one physical core this is well below 2, and no
    scheduler can beat it: the scaling figure is reported against it.
    """
    from multiprocessing import get_context

    one = _spin(n)
    with get_context("spawn").Pool(2) as pool:
        t0 = time.perf_counter()
        pool.map(_spin, [n, n])
        both = time.perf_counter() - t0
    return 2 * one / both


def timed_run(client, points, params, where: Path):
    t0 = time.perf_counter()
    store = create_or_open(str(where), points, params)
    t1 = time.perf_counter()
    report = execute(store, DaskExecutor(client))
    t2 = time.perf_counter()
    return report, store, t1 - t0, t2 - t1


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--scale-points", type=int, default=100_000)  # ~60 s in process on one core here
    ap.add_argument("--scale-eps", type=float, default=0.35)
    ap.add_argument("--scale-cap", type=int, default=None)
    args = ap.parse_args()
    conn = connect(workers=2, threads=1, dashboard_address=":0")
    client = conn.client
    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-"))
    # warm the kernels in this process and in the workers
    warm = sphere4(2000, 9)
    euler_curve(warm, 0.3, threads=1)
    timed_run(client, warm, Params.checked(0.3), tmp / "warm.zarr")

    print("== scaling")
    ceiling = parallel_ceiling()
    print(f"this machine runs two CPU-bound processes {ceiling:.2f}x faster than one after the other")
    pts = sphere4(args.scale_points)
    params = Params.checked(args.scale_eps, args.scale_cap)
    t0 = time.perf_counter()
    ref = euler_curve(pts, params.eps, params.max_dim, threads=1)
    t_in = time.perf_counter() - t0
    report, store, t_plan, t_exec = timed_run(client, pts, params, tmp / "scale.zarr")
    t_run = t_plan + t_exec
    print(f"S^4 {args.scale_points} points, eps {params.eps}, cap {params.max_dim}: in process 1 thread {t_in:.1f} s; "
          f"2-worker run {t_run:.1f} s (plan+store {t_plan:.1f} s, execute+reduce {t_exec:.1f} s, "
          f"{store.n_tasks} tasks); speedup {t_in / t_run:.2f}x (execute only {t_in / t_exec:.2f}x; "
          f"{t_in / t_run / ceiling:.0%} of the machine's ceiling); "
          f"identical: {report.curve == ref}")

    print("== per-task overhead")
    few = np.random.default_rng(3).random((4000, 3)) * 100.0  # eps 0.01: almost no edges
    params = Params.checked(0.01, None, None, 1.0)  # task_cost 1: one task per tiny group
    report, store, t_plan, t_exec = timed_run(client, few, params, tmp / "overhead.zarr")
    kernel = sum(float(store.commits.record(t)["seconds"]) for t in range(store.n_tasks))
    print(f"{store.n_tasks} tasks in {t_exec:.2f} s on 2 workers: {1000 * (2 * t_exec - kernel) / store.n_tasks:.1f} ms "
          f"of Dask + store per task (worker-time), {1000 * t_exec / store.n_tasks:.1f} ms wall per task")

    print("== worker peak memory against N (same density, eps 0.05, cap 3)")
    for n in (200_000, 1_000_000):
        pts = cube_at_density(n)
        report, store, t_plan, t_exec = timed_run(client, pts, Params.checked(0.05, 3), tmp / f"mem{n}.zarr")
        peaks = [int(store.commits.record(t)["peak_memory"]) for t in range(store.n_tasks)]
        plan = read_plan(store)
        print(f"N={n}: {store.n_tasks} tasks, largest halo {int(plan.halo_sizes().max())} rows, "
              f"worker peak RSS max {max(peaks) / 2**20:.0f} MiB, replication {plan.replication():.2f}, "
              f"plan+store {t_plan:.1f} s, execute {t_exec:.1f} s")
    conn.close()


if __name__ == "__main__":
    main()
