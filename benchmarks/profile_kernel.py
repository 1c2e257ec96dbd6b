"""Phase times of the per-edge kernel on points uniform on the unit 4-sphere.

Usage: python benchmarks/profile_kernel.py [N] [case ...]
A case is CAP:EPS with CAP an integer or "none", e.g. 5:0.25 none:0.35 1:0.40 2:0.40.
Every case is run once to compile, then timed; the neighbour-graph phases and the
counting phase are printed separately, with the final ECC value and the kernel counters.
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy.spatial import cKDTree

from chitally import kernel
from chitally.metric import query_radius


def sphere(n: int, dim: int = 5, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, dim))
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x[cKDTree(x).indices]


# CPU time of this process: the figures stay meaningful on a shared, busy machine
clock = time.process_time


def graph_phases(x: np.ndarray, eps: float) -> dict:
    t = {}
    t0 = clock()
    tree = cKDTree(x)
    t1 = clock()
    pairs = tree.query_pairs(query_radius(eps), output_type="ndarray")
    t2 = clock()
    t["tree"] = t1 - t0
    t["query_pairs"] = t2 - t1
    t["pairs"] = pairs.shape[0]
    t0 = clock()
    kernel._filter_pairs(x, pairs, eps, ())
    t1 = clock()
    kernel._edge_graph(x, pairs, eps)
    t2 = clock()
    t["filter"] = t1 - t0
    t["filter+sort+csr"] = t2 - t1
    t0 = clock()
    reach = query_radius(eps)
    kernel._tree_edges(x, eps, reach * reach, kernel._MAX_EDGES)
    t["tree_join(used)"] = clock() - t0
    t0 = clock()
    g = kernel._halo_graph(x, eps)
    t["halo_graph(total)"] = clock() - t0
    t["edges"] = g[0][-1] // 2
    return t


def main() -> None:
    args = sys.argv[1:]
    n = 50_000
    if args and args[0].isdigit():
        n = int(args.pop(0))
    cases = args or ["5:0.25", "none:0.35", "1:0.40", "2:0.40"]
    x = sphere(n)
    small = x[:2000]
    for case in cases:
        cap_s, eps_s = case.split(":")
        cap = None if cap_s == "none" else int(cap_s)
        eps = float(eps_s)
        kernel.count_jumps(small, eps, cap)  # compile outside the timing
        g = graph_phases(x, eps)
        t0 = time.perf_counter()
        c0 = clock()
        table = kernel.count_jumps(x, eps, cap)
        total = time.perf_counter() - t0
        cpu = clock() - c0
        s = table.stats
        print(
            f"N={n} cap={cap_s} eps={eps}: cpu {cpu:.2f} s, wall {total:.2f} s "
            f"(graph {s.seconds_graph:.2f} + count {s.seconds_count:.2f}) "
            f"final {int(table.jumps.sum())}"
        )
        print("   graph phases: " + ", ".join(f"{k} {v:.3f}" if isinstance(v, float) else f"{k} {v}" for k, v in g.items()))
        print(f"   edges {s.edges} cones {s.cones} collapsed {s.collapsed} splits {s.splits} frame_pairs {s.frame_pairs}")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
