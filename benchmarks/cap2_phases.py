"""Cap 2 on 50,000 points of S^4 at eps 0.40, phase by phase, against cKDTree's search.

Usage: python benchmarks/cap2_phases.py
Each phase of `euler_curve(points, 0.40, 2)` is timed on its own, best of 3, next to the
neighbour search alone (leaf order, cKDTree, query_pairs), and the ratio of the sum to the
search is printed.
"""

from __future__ import annotations

import time

import numpy as np
from bench_inprocess import neighbour_search_seconds, sphere4

from chitally import Curve, kernel
from chitally.inprocess import leaf_order
from chitally.metric import query_radius


def main() -> None:
    points = sphere4(50_000)
    n, eps = points.shape[0], 0.40
    kernel.count_jumps(points[:2000], eps, 2)  # compile outside the timing
    best: dict[str, float] = {}

    def lap(name: str, since: float) -> float:
        now = time.perf_counter()
        best[name] = min(best.get(name, np.inf), now - since)
        return now

    for _ in range(3):
        t = time.perf_counter()
        coords = np.ascontiguousarray(points[leaf_order(points)])
        t = lap("leaf order", t)
        reach = query_radius(eps)
        lo, hi, d2, m = kernel._tree_edges(coords, eps, reach * reach, kernel._MAX_EDGES)
        t = lap("edge join", t)
        offsets, nbrs, erank, elo, _ehi, ed2 = kernel._sorted_graph(n, lo, hi, d2, m)
        t = lap("edge order + rows", t)
        out = np.empty(m, dtype=np.int64)
        kernel._count_cap2_near(coords, offsets, nbrs, erank, 0, n, out)
        t = lap("count", t)
        values, jumps = kernel._collect(ed2, elo, 0, n, out, n)
        t = lap("collect", t)
        Curve.from_jumps(values, jumps, eps=eps, max_dim=2, n_points=n)
        lap("curve", t)
        best["search"] = min(best.get("search", np.inf), neighbour_search_seconds(points, eps))
    total = sum(v for k, v in best.items() if k != "search")
    for name, seconds in best.items():
        print(f"{name:<20} {seconds:6.3f} s")
    print(f"{'sum':<20} {total:6.3f} s = {total / best['search']:.2f} x the search")


if __name__ == "__main__":
    main()
