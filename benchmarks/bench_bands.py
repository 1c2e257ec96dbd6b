"""Bands on the engine against the same curves computed one by one in process.

B = 200 replicates of m = 10,000 points from 10^6 points on a torus in R^3 (radii 1 and
0.3, area-uniform), uncapped. The curves are computed on the subsamples, so eps is chosen
for the subsample's density: m points on a surface of area A = 4 pi^2 R r have about
m pi eps^2 / A neighbours within eps (eps much smaller than r), so eps = sqrt(20 A /
(pi m)) gives a mean degree of about 20 (the measured degree is printed). The full cloud
has 100 times that density; its own curve is never computed.

Printed, from one run:

1. the reference: B times one in-process curve of m points (mean over a sample of
   replicates, one thread), and the in-process `bands` on all cores;
2. the engine on a 2-worker LocalCluster (one thread each, the embedded default here):
   planning and store (the cloud written once), execution and reduction; the sum of the
   task times from the commit records; the engine's overhead = worker time not spent in
   tasks, over the task time; and the whole `bands(store=...)` call, cluster start included.

Run:  python benchmarks/bench_bands.py [--points 1000000] [--replicates 200] [--sample 10000]
"""

from __future__ import annotations

import argparse
import math
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from chitally import euler_curve
from chitally.bands import bands
from chitally.cluster import connect
from chitally.execute import DaskExecutor
from chitally.jobs.bands import BandsParams, create_or_open, draw_rows
from chitally.runs import Where, execute


def torus(n: int, rng: np.random.Generator, big: float = 1.0, small: float = 0.3) -> np.ndarray:
    """Area-uniform points on the torus of radii big, small in R^3 (rejection on the
    tube angle: the area element grows with big + small cos v)."""
    out = np.empty((0, 3))
    while out.shape[0] < n:
        k = 2 * (n - out.shape[0]) + 1000
        u, v = rng.uniform(0, 2 * np.pi, k), rng.uniform(0, 2 * np.pi, k)
        keep = rng.uniform(0, big + small, k) < big + small * np.cos(v)
        u, v = u[keep], v[keep]
        ring = big + small * np.cos(v)
        out = np.vstack([out, np.column_stack([ring * np.cos(u), ring * np.sin(u), small * np.sin(v)])])
    return np.ascontiguousarray(out[:n])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=1_000_000)
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--sample", type=int, default=10_000)
    ap.add_argument("--reference-sample", type=int, default=40, help="replicates timed in process")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    pts = torus(args.points, rng)
    area = 4 * math.pi ** 2 * 1.0 * 0.3
    eps = round(math.sqrt(20 * area / (math.pi * args.sample)), 5)
    params = BandsParams.checked(eps, args.replicates, args.sample, f"0:{eps!r}:101", seed=1)
    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-bands-"))
    print(f"{args.points} torus points; B = {args.replicates} replicates of m = {args.sample}; eps = {eps}")

    # warm the kernels here and in the workers
    euler_curve(pts[:2000], eps, threads=1)
    conn = connect(workers=2, threads=1, dashboard_address=":0")
    warm = create_or_open(str(tmp / "warm.zarr"), pts[:20000],
                          BandsParams.checked(eps, 4, 2000, "0:0.01:3", per_task=1))
    execute(warm, DaskExecutor(conn.client))

    print("== in process")
    k = min(args.reference_sample, args.replicates)
    subs = [pts[draw_rows(args.points, args.sample, 1, i)] for i in range(k)]
    t0 = time.perf_counter()
    edges = 0
    for sub in subs:
        _, stats = euler_curve(sub, eps, threads=1, return_stats=True)
        edges += stats.edges
    t_one = (time.perf_counter() - t0) / k
    t_ref = t_one * args.replicates
    print(f"one curve of {args.sample} points: {1000 * t_one:.1f} ms (mean of {k}, one thread), mean degree "
          f"{2 * edges / (k * args.sample):.1f}; B x one curve = {t_ref:.2f} s")
    t0 = time.perf_counter()
    ref = bands(pts, eps, args.replicates, args.sample, grid=list(params.grid), seed=1)
    t_inproc = time.perf_counter() - t0
    print(f"in-process bands (all cores, draws and statistics included): {t_inproc:.2f} s")

    print("== engine, 2 workers x 1 thread")
    t0 = time.perf_counter()
    store = create_or_open(str(tmp / "bands.zarr"), pts, params)
    t_plan = time.perf_counter() - t0
    t0 = time.perf_counter()
    report = execute(store, DaskExecutor(conn.client))
    t_exec = time.perf_counter() - t0
    task_seconds = sum(float(store.commits.record(t)["seconds"]) for t in range(store.n_tasks))
    worker_time = 2 * t_exec
    overhead = (worker_time - task_seconds) / task_seconds
    print(f"plan + store {t_plan:.2f} s; execute + reduce {t_exec:.2f} s wall ({store.n_tasks} tasks); "
          f"task time {task_seconds:.2f} s (B x one curve {t_ref:.2f} s: tasks {task_seconds / t_ref - 1:+.1%})")
    print(f"engine overhead: worker time {worker_time:.2f} s vs task time {task_seconds:.2f} s -> {overhead:.1%}")
    print(f"engine vs B x one curve: 2 x wall {worker_time:.2f} s / {t_ref:.2f} s -> {worker_time / t_ref - 1:+.1%}"
          f"; identical to in process: {report.result == ref}")
    conn.close()

    t0 = time.perf_counter()
    again = bands(pts, eps, args.replicates, args.sample, grid=list(params.grid), seed=1,
                  store=str(tmp / "whole.zarr"), where=Where(workers=2, threads=1))
    t_whole = time.perf_counter() - t0
    print(f"bands(store=..., 2-worker LocalCluster) whole call, cluster start included: {t_whole:.2f} s; "
          f"identical: {again == ref}")
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
