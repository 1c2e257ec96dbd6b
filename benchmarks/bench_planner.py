"""Time and memory of the planning stage (build_cover + make_plan) on large clouds.

Prints, per case: points, dimension, eps, measured mean degree, balls, tasks, owned and
halo rows per task, the replication factor (rows read by all tasks / N), wall time of
each stage and the peak resident memory of the process against the size of the input.
Each case runs in a fresh child process so that its peak is its own. Usage:

    /work/venv/bin/python benchmarks/bench_planner.py            # every case
    /work/venv/bin/python benchmarks/bench_planner.py torus-1e6  # chosen cases

The first run also compiles the numba kernels (cached afterwards); a tiny warm-up in
each child keeps compilation out of the timings.
"""

from __future__ import annotations

import json
import math
import resource
import subprocess
import sys
import time

import numpy as np

CASES = ["sphere4-5e4", "torus-1e6", "cube-1e7"]


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
        xyz = np.column_stack([ring * np.cos(u), ring * np.sin(u), small * np.sin(v)])
        out = np.vstack([out, xyz])
    return np.ascontiguousarray(out[:n])


def make_case(name: str) -> tuple[np.ndarray, float]:
    rng = np.random.default_rng(20240601)
    if name == "sphere4-5e4":
        g = rng.standard_normal((50_000, 5))
        return g / np.linalg.norm(g, axis=1, keepdims=True), 0.25
    if name == "torus-1e6":
        n = 1_000_000
        area = 4 * math.pi**2 * 1.0 * 0.3
        return torus(n, rng), math.sqrt(20 * area / (n * math.pi))
    if name == "cube-1e7":
        n = 10_000_000
        return rng.random((n, 3)), (20 / (n * 4 / 3 * math.pi)) ** (1 / 3)
    raise SystemExit(f"unknown case {name!r}; known: {CASES}")


def peak_rss_bytes() -> int:
    # ru_maxrss is in kilobytes on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def run_case(name: str) -> dict:
    from chitally.cover import build_cover
    from chitally.planner import make_plan, summarise_plan

    warm = np.random.default_rng(0).random((500, 3))
    wc = build_cover(warm, 0.1)
    make_plan(warm[wc.order], wc, 0.1, None)

    points, eps = make_case(name)
    # The peak after making the input: what planning adds is peak - base.
    base = peak_rss_bytes()
    t0 = time.perf_counter()
    cover = build_cover(points, eps)
    t1 = time.perf_counter()
    sorted_points = points[cover.order]
    t2 = time.perf_counter()
    plan = make_plan(sorted_points, cover, eps, None)
    t3 = time.perf_counter()
    peak = peak_rss_bytes()  # before the check below, which builds a tree of its own
    summary = summarise_plan(plan, cover)
    # The plan keeps costs, not degrees: estimate the mean degree on a sample of rows.
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(1)
    sample = rng.choice(points.shape[0], size=min(2000, points.shape[0]), replace=False)
    found = cKDTree(sorted_points).query_ball_point(sorted_points[sample], eps)
    mean_degree = float(np.mean([len(r) - 1 for r in found]))
    return {
        "case": name,
        "points": int(points.shape[0]),
        "dim": int(points.shape[1]),
        "eps": eps,
        "mean_degree_sampled": round(mean_degree, 2),
        "balls": summary["balls"],
        "tasks": summary["tasks"],
        "owned_rows": summary["owned_rows"],
        "halo_rows": summary["halo_rows"],
        "replication": round(summary["replication"], 4),
        "max_task_memory_MB": round(summary["max_task_memory"] / 2**20, 2),
        "cover_s": round(t1 - t0, 2),
        "reorder_s": round(t2 - t1, 2),
        "plan_s": round(t3 - t2, 2),
        "total_s": round(t3 - t0, 2),
        "input_MB": round(points.nbytes / 2**20, 1),
        "rss_before_MB": round(base / 2**20, 1),
        "peak_rss_MB": round(peak / 2**20, 1),
        "peak_over_input": round((peak - base) / points.nbytes, 2),
    }


def main(argv: list[str]) -> None:
    if len(argv) == 2 and argv[0] == "--child":
        print(json.dumps(run_case(argv[1])))
        return
    for name in argv or CASES:
        proc = subprocess.run(
            [sys.executable, __file__, "--child", name], capture_output=True, text=True, check=False
        )
        if proc.returncode != 0:
            print(f"{name}: failed\n{proc.stderr}")
            continue
        result = json.loads(proc.stdout.strip().splitlines()[-1])
        print(json.dumps(result, indent=1), flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
