"""The engine's overhead per task, before and after, on near-empty tasks.

N clouds of 3 points in the plane, one cloud per task (a tiny `task_cost`), so a task
computes almost nothing and its time is the engine's: reading its input, writing and
verifying its outputs, its commit record, the driver's reduction and checkpoints, the
lease fence and (on Dask) the scheduling. Overhead per task is

    (wall time of `execute` - sum of the task seconds in the commit records) / N,

measured through the serial executor and through a 2-worker LocalCluster (one thread
each, started and warmed up before the clock starts), for the code at BEFORE (run in a
subprocess from a temporary ``git worktree`` of that commit) and for this tree. `status`
on the finished store is timed too. Run:

    python benchmarks/bench_overhead.py [--tasks 300] [--before c51bdbf] [--repeat 2] [--rounds 2]

On the Dask side of this tree, tasks this small travel in bundles (`chitally.bundles`).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent.parent


def measure(n: int, repeat: int, dask: bool) -> dict[str, float]:
    """Overhead figures of the chitally importable here (one process)."""
    from chitally.clouds import read_collection
    from chitally.execute import DaskExecutor, SerialExecutor
    from chitally.jobs.batch import BatchParams, create_or_open
    from chitally.runs import execute, status

    rng = np.random.default_rng(0)
    clouds = read_collection([rng.random((3, 2)) for _ in range(n)])
    params = BatchParams.checked(0.5, np.linspace(0.0, 0.5, 8), task_cost=1.0)
    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-overhead-"))

    def one(name: str, executor: object) -> tuple[float, float, int, float]:
        store = create_or_open(str(tmp / f"{name}.zarr"), clouds, params)
        t0 = time.perf_counter()
        execute(store, executor)
        wall = time.perf_counter() - t0
        tasks = store.n_tasks
        compute = sum(float(store.commits.record(t)["seconds"]) for t in range(tasks))
        t0 = time.perf_counter()
        status(store)
        return (wall - compute) / tasks * 1000, time.perf_counter() - t0, tasks, wall / tasks * 1000

    out: dict[str, float] = {}
    try:
        warm = create_or_open(str(tmp / "warm.zarr"), read_collection(clouds.clouds[:4]), params)
        execute(warm, SerialExecutor())  # compile or load the kernels
        serial = [one(f"serial-{k}", SerialExecutor()) for k in range(repeat)]
        out["tasks"] = serial[0][2]
        out["serial_ms"] = min(s[0] for s in serial)
        out["status_s"] = min(s[1] for s in serial)
        out["serial_wall_ms"] = min(s[3] for s in serial)
        if dask:
            from chitally.cluster import connect

            conn = connect(workers=2, threads=1)
            try:
                warm2 = create_or_open(str(tmp / "warm2.zarr"), read_collection(clouds.clouds[:8]), params)
                execute(warm2, DaskExecutor(conn.client))
                runs = [one(f"dask-{k}", DaskExecutor(conn.client)) for k in range(repeat)]
                out["dask_ms"] = min(r[0] for r in runs)
                out["dask_wall_ms"] = min(r[3] for r in runs)
            finally:
                conn.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return out


def before(commit: str, n: int, repeat: int, dask: bool) -> dict[str, float]:
    """The same measurement for `commit`, in a subprocess on a temporary worktree."""
    # one folder per commit: a folder left by a run against another commit is not reused
    wt = Path(tempfile.gettempdir()) / f"wt-before-tasks-{commit}"
    if not wt.exists():
        subprocess.run(["git", "-C", str(HERE), "worktree", "add", "--detach", str(wt), commit],
                       check=True, capture_output=True)
    env = {**os.environ, "PYTHONPATH": str(wt / "src")}
    cmd = [sys.executable, __file__, "--measure", "--tasks", str(n), "--repeat", str(repeat)]
    if not dask:
        cmd.append("--no-dask")
    done = subprocess.run(cmd, env=env, check=True, capture_output=True, text=True, cwd=str(wt))
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--tasks", type=int, default=300)
    ap.add_argument("--repeat", type=int, default=2, help="runs per figure and process (the best is kept)")
    ap.add_argument("--rounds", type=int, default=2,
                    help="processes per side, before and after in turn (the best is kept)")
    ap.add_argument("--before", default="c51bdbf")
    ap.add_argument("--no-dask", action="store_true")
    ap.add_argument("--measure", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.measure:
        print(json.dumps(measure(args.tasks, args.repeat, not args.no_dask)))
        return
    print("uptime:", subprocess.run(["uptime"], check=False, capture_output=True, text=True).stdout.strip())
    env = {**os.environ, "PYTHONPATH": str(HERE / "src")}
    cmd = [sys.executable, __file__, "--measure", "--tasks", str(args.tasks), "--repeat", str(args.repeat)]
    if args.no_dask:
        cmd.append("--no-dask")
    olds, news = [], []
    # before and after take turns, so a change in the machine's load falls on both
    for _ in range(args.rounds):
        olds.append(before(args.before, args.tasks, args.repeat, not args.no_dask))
        news.append(json.loads(subprocess.run(cmd, env=env, check=True, capture_output=True, text=True,
                                              cwd=str(HERE)).stdout.strip().splitlines()[-1]))
    old = {k: min(r[k] for r in olds) for k in olds[0]}
    new = {k: min(r[k] for r in news) for k in news[0]}
    print(f"{int(new['tasks'])} near-empty tasks (batch kind, one 3-point cloud each), best of "
          f"{args.repeat} x {args.rounds} rounds")
    print("overhead = (wall - task seconds in the commit records) / tasks; wall = wall / tasks")
    print(f"{'':26}{'before ' + args.before:>18}{'after':>12}{'ratio':>8}")
    rows = [("serial: overhead ms/task", "serial_ms"), ("serial: wall ms/task", "serial_wall_ms"),
            ("Dask: overhead ms/task", "dask_ms"), ("Dask: wall ms/task", "dask_wall_ms"),
            ("status, s", "status_s")]
    for label, key in rows:
        if key in old and key in new:
            print(f"{label:26}{old[key]:18.2f}{new[key]:12.2f}{old[key] / new[key]:8.1f}")
    print("uptime:", subprocess.run(["uptime"], check=False, capture_output=True, text=True).stdout.strip())


if __name__ == "__main__":
    main()
