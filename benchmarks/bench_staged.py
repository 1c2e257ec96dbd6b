"""Planning a large cloud: the driver's planner against the cluster planner, in one run.

The cloud: N points uniform on the unit sphere (a 2-D surface in R^3), eps chosen for a
mean degree of about 20 (degree ~ N/(4 pi) * pi eps^2), generated chunk by chunk into a
Zarr store by our own seeded code, never held whole by this script.

Each planner runs in a child process of its own, so that its peak resident memory
(VmHWM) is its alone:

* driver: read the points, build the ball cover and the task table (`plan_points`);
* cluster: the four planning stages on the embedded default (a LocalCluster), the workers
  reading the Zarr input themselves; optionally (--run) the run itself afterwards.

    python benchmarks/bench_staged.py --points 10000000            # both planners
    python benchmarks/bench_staged.py --points 100000000 --only cluster --run --max-dim 2
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

CHUNK = 1 << 20


def make_input(path: Path, n: int, seed: int = 0) -> None:
    import zarr

    if (path / "zarr.json").exists():
        return
    arr = zarr.create_array(str(path), shape=(n, 3), chunks=(CHUNK, 3), dtype="f8")
    for k, start in enumerate(range(0, n, CHUNK)):
        rng = np.random.default_rng([seed, k])
        x = rng.standard_normal((min(CHUNK, n - start), 3))
        arr[start:start + x.shape[0]] = x / np.linalg.norm(x, axis=1, keepdims=True)


def eps_for(n: int, degree: float = 20.0) -> float:
    return float(np.sqrt(4.0 * degree / n))


def vm_hwm() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    return 0


def child_driver(src: str, eps: float, max_dim) -> dict:
    from chitally.jobs.cloud import Params, plan_points
    from chitally.sources import read_points

    t0 = time.perf_counter()
    pts = read_points(src)
    t1 = time.perf_counter()
    _, plan, _ = plan_points(pts, Params.checked(eps, max_dim))
    t2 = time.perf_counter()
    return {"read": t1 - t0, "plan": t2 - t1, "tasks": plan.n_tasks, "edges": plan.n_edges,
            "driver_peak": vm_hwm()}


def child_cluster(src: str, eps: float, max_dim, out: str, run: bool, workers: int) -> dict:
    from chitally.jobs.cloud import Params
    from chitally.jobs.stages import StageParams
    from chitally.runs import Session, Where
    from chitally.staged import StageReport, plan_run
    from chitally.cli import _plan_input  # the CLI's own way of opening an input lazily

    report = StageReport()
    t0 = time.perf_counter()
    inp = _plan_input(src, None, None, None)
    with Session(Where(workers=workers, threads=1)) as session:
        store = plan_run(out, inp, Params.checked(eps, max_dim), StageParams(), session, report=report)
        t1 = time.perf_counter()
        client = session.conn.client
        result = {"stages": report.seconds, "plan": t1 - t0, "tasks": store.n_tasks,
                  "edges": int(store.attrs["n_edges"]), "planner_driver_peak": report.driver_peak,
                  "driver_peak_by_stage_end": report.peaks,
                  "planner_worker_peaks": sorted(client.run(vm_hwm).values())}
        if run:
            # the run's own peaks, apart from the planner's
            from chitally.engine import reset_peak_memory

            run_peaks = reset_peak_memory() and all(client.run(reset_peak_memory).values())
            rep = session.run(store)
            result["run"] = time.perf_counter() - t1
            result["jumps"] = rep.result.n_jumps
            result["chi_eps"] = int(rep.result.final)
            result["digest"] = rep.result.digest()
            if run_peaks:
                result["run_driver_peak"] = vm_hwm()
                result["run_worker_peaks"] = sorted(client.run(vm_hwm).values())
            result["heaviest_task_memory_estimate"] = int(store.task_memory().max())
    result["driver_peak"] = vm_hwm()
    result["total"] = time.perf_counter() - t0
    return result


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=10_000_000)
    ap.add_argument("--max-dim", type=int, default=None)
    ap.add_argument("--only", choices=["driver", "cluster"], default=None)
    ap.add_argument("--run", action="store_true", help="Also run the cluster-planned store.")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--folder", default=None)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    folder = Path(args.folder or tempfile.mkdtemp(prefix="bench-staged-"))
    src = folder / f"sphere-{args.points}.zarr"
    eps = eps_for(args.points)
    if args.child == "driver":
        print(json.dumps(child_driver(str(src), eps, args.max_dim)))
        return
    if args.child == "cluster":
        out = str(folder / f"run-{time.time_ns()}.zarr")
        print(json.dumps(child_cluster(str(src), eps, args.max_dim, out, args.run, args.workers)))
        return
    t0 = time.perf_counter()
    make_input(src, args.points)
    print(f"input: {args.points} points on S^2 in {src} ({time.perf_counter() - t0:.1f} s), eps {eps:.6g}, "
          f"cap {args.max_dim}; load {os.getloadavg()}")
    for mode in (["driver", "cluster"] if args.only is None else [args.only]):
        cmd = [sys.executable, __file__, "--points", str(args.points), "--folder", str(folder),
               "--child", mode, "--workers", str(args.workers)]
        if args.max_dim is not None:
            cmd += ["--max-dim", str(args.max_dim)]
        if args.run:
            cmd.append("--run")
        t0 = time.perf_counter()
        res = subprocess.run(cmd, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        if res.returncode != 0:
            print(f"{mode}: failed ({res.returncode})\n{res.stderr[-3000:]}")
            continue
        out = json.loads(res.stdout.strip().splitlines()[-1])
        print(f"{mode}: wall {wall:.1f} s, {json.dumps(out)}")


if __name__ == "__main__":
    main()
