"""How good are `chitally scan`'s estimates? The scan against the real thing.

On one cloud (default: 10^6 area-uniform points on a torus in R^3), this script

1. times `scan_eps` itself (default sample and timing budget), a first call (which also
   loads the compiled code) and a second one;
2. for each eps of the scan, compares the estimated mean degree and edges with the exact
   ones of every point (scipy cKDTree counts), in standard errors and as a ratio;
3. for one or two eps (by default where the estimated mean degree reaches 10 and 20),
   with max_dim 2 (and with --uncapped also without cap), on one thread:
   - the kernel summed over the planner's tasks (build_cover + make_plan, then
     `count_jumps` on each task's halo, as a cluster run's workers call it), which is
     what the scan's "time on one core" models;
   - `euler_curve` in a fresh child process (the whole cloud as one task, and the
     in-process path's relabelling), with its peak memory, against the scan's
     "memory in one process".

Usage:

    python benchmarks/bench_scan.py                        # 10^6 torus points
    python benchmarks/bench_scan.py --points 100000 --uncapped
    python benchmarks/bench_scan.py --shape cube --run-eps 0.01,0.015

This machine class has 2 cores shared with other work: times are noisy; ratios are
measured in the same run.
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
from scipy.spatial import cKDTree

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "src"))

from chitally.cover import build_cover
from chitally.kernel import count_jumps
from chitally.planner import make_plan
from chitally.scan import scan_eps


def torus(n: int, rng: np.random.Generator, big: float = 1.0, small: float = 0.3) -> np.ndarray:
    """Area-uniform samples of a torus in R^3 (rejection on the tube angle)."""
    out = np.empty((0, 3))
    while out.shape[0] < n:
        k = 2 * (n - out.shape[0]) + 1000
        u = rng.uniform(0, 2 * np.pi, k)
        v = rng.uniform(0, 2 * np.pi, k)
        keep = rng.uniform(0, 1, k) <= (big + small * np.cos(v)) / (big + small)
        u, v = u[keep], v[keep]
        ring = big + small * np.cos(v)
        out = np.vstack([out, np.column_stack([ring * np.cos(u), ring * np.sin(u), small * np.sin(v)])])
    return np.ascontiguousarray(out[:n])


def make_cloud(shape: str, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if shape == "torus":
        return torus(n, rng)
    if shape == "cube":
        return rng.random((n, 3))
    raise SystemExit(f"unknown shape {shape!r}: torus or cube")


CHILD = r"""
import json, sys, time
import numpy as np
from chitally.inprocess import euler_curve

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024

points = np.load(sys.argv[1])
eps, cap = float(sys.argv[2]), None if sys.argv[3] == "none" else int(sys.argv[3])
euler_curve(points[:50], eps, cap, threads=1)  # loads the compiled kernel
with open("/proc/self/clear_refs", "w") as f:
    f.write("5")  # Linux: reset the peak resident size to the current one
base = status("VmRSS")
t0 = time.perf_counter()
curve, stats = euler_curve(points, eps, cap, threads=1, return_stats=True)
seconds = time.perf_counter() - t0
peak = status("VmHWM")
print(json.dumps({"seconds": seconds, "graph": stats.seconds_graph, "count": stats.seconds_count,
                  "edges": stats.edges, "peak_above_start": max(peak - base, 0)}))
"""


def tasks_seconds(x: np.ndarray, eps: float, cap: int | None) -> tuple[float, int]:
    """Kernel seconds summed over the planner's tasks, one thread; and the task count."""
    cover = build_cover(x, eps)
    xs = np.ascontiguousarray(x[cover.order])
    plan = make_plan(xs, cover, eps, cap)
    total = 0.0
    for i in range(plan.n_tasks):
        task = plan.task(i)
        coords = np.ascontiguousarray(xs[task.halo])
        lo = int(np.searchsorted(task.halo, task.row_start))
        t0 = time.perf_counter()
        count_jumps(coords, eps, cap, owned=(lo, lo + task.n_owned), threads=1)
        total += time.perf_counter() - t0
    return total, plan.n_tasks


def run_child(path: str, eps: float, cap: int | None) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parent.parent / "src") + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", CHILD, path, repr(eps), "none" if cap is None else str(cap)],
                         check=True, capture_output=True, text=True, env=env)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--points", type=int, default=1_000_000)
    ap.add_argument("--shape", default="torus")
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--run-eps", default=None, help="eps values to run for real (default: mean degree 10 and 20)")
    ap.add_argument("--uncapped", action="store_true", help="also run without cap (slow when dense)")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many, for every time compared")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()

    x = make_cloud(args.shape, args.points, args.seed)
    n = x.shape[0]
    result: dict = {"points": n, "shape": args.shape}

    t0 = time.perf_counter()
    scan_eps(x, max_dim=2, threads=2)
    cold = time.perf_counter() - t0
    t0 = time.perf_counter()
    report = scan_eps(x, max_dim=2, threads=2)
    warm = time.perf_counter() - t0
    result["scan_seconds"] = {"first_call": cold, "second_call": warm}
    print(report.table())
    print(f"\nscan time: {cold:.2f} s first call (loads compiled code), {warm:.2f} s second call "
          f"(sample {report.sample_size}, {len(report.rows)} eps, max_dim 2 and no cap)")

    tree = cKDTree(x)
    rows = []
    print("\nestimated against exact degrees of every point (scipy cKDTree counts):")
    print(f"{'eps':>9} {'estimate':>10} {'exact':>10} {'ratio':>7} {'z':>6} {'max seen':>9} {'max':>6} "
          f"{'edges ratio':>11}")
    for r in report.rows:
        full = tree.query_ball_point(x, r.eps, return_length=True, workers=2) - 1
        exact = float(full.mean())
        z = (r.mean_degree - exact) / r.mean_degree_se if r.mean_degree_se else float("nan")
        edges = float(full.sum()) / 2
        rows.append({"eps": r.eps, "estimate": r.mean_degree, "se": r.mean_degree_se, "exact": exact,
                     "max_seen": r.max_degree, "max": int(full.max()), "edges_estimate": r.edges,
                     "edges": edges})
        print(f"{r.eps:9.4g} {r.mean_degree:10.4g} {exact:10.4g} {r.mean_degree / exact:7.4f} {z:6.2f} "
              f"{r.max_degree:9d} {int(full.max()):6d} {r.edges / edges:11.4f}")
    result["degrees"] = rows

    if args.run_eps:
        run_eps = [float(e) for e in args.run_eps.split(",")]
    else:
        run_eps = [report.degree_reached[10], report.degree_reached[20]]
    runs = []
    print("\nactual runs on one thread against the scan's estimates:")
    print(f"{'eps':>9} {'cap':>6} {'estimated':>10} {'tasks':>6} {'in tasks':>9} {'ratio':>6} "
          f"{'in process':>10} {'ratio':>6} {'memory est.':>11} {'peak':>9} {'ratio':>6}")
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "points.npy")
        np.save(path, x)
        caps = [2, None] if args.uncapped else [2]
        scans = [scan_eps(x, run_eps, max_dim=2, threads=2) for _ in range(args.repeat)]
        for e, r in enumerate(scans[0].rows):
            for cap in caps:
                est = min((next(run for run in s.rows[e].runs if run.max_dim == cap) for s in scans),
                          key=lambda run: run.seconds)
                cut, n_tasks = min(tasks_seconds(x, r.eps, cap) for _ in range(args.repeat))
                got = min((run_child(path, r.eps, cap) for _ in range(args.repeat)), key=lambda g: g["seconds"])
                runs.append({"eps": r.eps, "max_dim": cap, "estimated_seconds": est.seconds,
                             "timed_rows": est.timed_rows, "tasks": n_tasks, "tasks_seconds": cut,
                             "in_process": got, "estimated_memory": r.process_memory})
                mib = 2**20
                print(f"{r.eps:9.4g} {cap!s:>6} {est.seconds:9.3g}s {n_tasks:6d} {cut:8.3g}s "
                      f"{est.seconds / cut:6.2f} {got['seconds']:9.3g}s "
                      f"{est.seconds / got['seconds']:6.2f} {r.process_memory / mib:9.0f}Mi "
                      f"{got['peak_above_start'] / mib:7.0f}Mi "
                      f"{r.process_memory / max(got['peak_above_start'], 1):6.2f}")
    result["runs"] = runs
    print(f"\nbest of {args.repeat} for every time; ratio: estimate / measured; z: (estimate - exact) / the reported standard error;"
          "\npeak: the child's peak resident memory during the run above its size before it (points loaded).")
    if args.json:
        print(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
