"""Feature matrices side by side: the batch job on the engine against a gudhi loop.

3,000 clouds of 100 points in R^3, eps 0.5, uncapped, sampled on 64 scales:

1. chitally on the embedded default (a 2-worker LocalCluster; store, planning, tasks and
   reduction included), and the in-process `feature_matrix` for reference;
2. the gudhi route (RipsComplex -> SimplexTree expanded to every dimension, simplices read
   out into a curve, sampled) on a sample of the clouds, scaled to all of them;
3. the engine's per-cloud overhead: worker time not spent computing curves, per cloud.

Every row is checked against the gudhi row where both ran. Run:

    python benchmarks/bench_batch.py [--clouds 3000] [--points 100] [--sample 30]
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import gudhi
import numpy as np

from chitally import Curve, feature_matrix
from chitally.runs import Where


def gudhi_row(points: np.ndarray, eps: float, grid: np.ndarray) -> np.ndarray:
    st = gudhi.RipsComplex(points=points, max_edge_length=eps).create_simplex_tree(
        max_dimension=points.shape[0] - 1)
    values, jumps = [], []
    for simplex, value in st.get_filtration():
        values.append(value)
        jumps.append(1 if len(simplex) % 2 else -1)
    curve = Curve.from_jumps(values, jumps, eps=eps, max_dim=None, n_points=points.shape[0])
    return curve.sample(grid)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--clouds", type=int, default=3000)
    ap.add_argument("--points", type=int, default=100)
    ap.add_argument("--eps", type=float, default=0.5)
    ap.add_argument("--sample", type=int, default=30, help="clouds the gudhi loop runs on")
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    clouds = [rng.random((args.points, 3)) for _ in range(args.clouds)]
    grid = np.linspace(0, args.eps, 64)
    feature_matrix(clouds[:4], args.eps, grid, threads=1)  # compile or load the kernels

    t0 = time.perf_counter()
    inproc = feature_matrix(clouds, args.eps, grid)
    t_inproc = time.perf_counter() - t0

    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-batch-"))
    t0 = time.perf_counter()
    engine = feature_matrix(clouds, args.eps, grid, store=str(tmp / "fm.zarr"), where=Where(workers=2, threads=1))
    t_engine = time.perf_counter() - t0
    from chitally.runs import open_run

    store = open_run(str(tmp / "fm.zarr"))
    compute = sum(float(store.commits.record(t)["seconds"]) for t in range(store.n_tasks))
    n_tasks = store.n_tasks

    # the engine alone (store, scheduling, commits, reduction) on a cluster already running
    from chitally.clouds import read_collection
    from chitally.cluster import connect
    from chitally.execute import DaskExecutor
    from chitally.jobs.batch import BatchParams, create_or_open
    from chitally.runs import execute

    conn = connect(workers=2, threads=1)
    try:
        conn.client.run(feature_matrix, clouds[:4], args.eps, grid)  # load the kernels there too
        t0 = time.perf_counter()
        warm_store = create_or_open(str(tmp / "warm.zarr"), read_collection(clouds), BatchParams.checked(args.eps, grid))
        warm = execute(warm_store, DaskExecutor(conn.client))
        t_warm = time.perf_counter() - t0
    finally:
        conn.close()
    warm_compute = sum(float(warm_store.commits.record(t)["seconds"]) for t in range(warm_store.n_tasks))
    shutil.rmtree(tmp)

    t0 = time.perf_counter()
    sample = rng.choice(args.clouds, args.sample, replace=False)
    rows = [gudhi_row(clouds[i], args.eps, grid) for i in sample]
    t_gudhi = (time.perf_counter() - t0) * args.clouds / args.sample

    same = all(np.array_equal(r, engine.values[i]) for r, i in zip(rows, sample))
    print(f"{args.clouds} clouds x {args.points} points in R^3, eps {args.eps}, uncapped, {grid.size} scales")
    print(f"  chitally batch on a 2-worker LocalCluster (start, store, tasks, reduce): {t_engine:.1f} s "
          f"({n_tasks} tasks)")
    print(f"  chitally feature_matrix in process (all threads): {t_inproc:.1f} s")
    print(f"  gudhi loop, {args.sample} clouds timed and scaled: {t_gudhi:.1f} s")
    print(f"  ratio gudhi / batch on the cluster: {t_gudhi / t_engine:.1f}x; gudhi / in process: "
          f"{t_gudhi / t_inproc:.1f}x")
    overhead = (2 * t_engine - compute) / args.clouds
    print(f"  engine overhead per cloud (2 workers' time not computing curves, cluster start "
          f"included): {1000 * overhead:.2f} ms; curve time per cloud {1000 * compute / args.clouds:.2f} ms")
    print(f"  on a cluster already running: {t_warm:.1f} s; engine overhead per cloud (store, scheduling, "
          f"commits, reduction; 2 workers' time not computing curves): "
          f"{1000 * (2 * t_warm - warm_compute) / args.clouds:.2f} ms")
    print(f"  rows identical to gudhi's on the sample: {same}; engine == in process: {engine == inproc}; "
          f"warm run == in process: {warm.result == inproc}")


if __name__ == "__main__":
    main()
