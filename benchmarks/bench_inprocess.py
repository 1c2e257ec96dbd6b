"""Side-by-side timing of chitally's in-process curve against gudhi's Rips route.

For each case both run in this one process on the same cloud, their curves are checked
to be identical where gudhi can finish, and the script prints seconds, the ratio and
simplices per second. Run:  python benchmarks/bench_inprocess.py [--quick] [--threads 1]

The gudhi route: RipsComplex(points, max_edge_length=eps).create_simplex_tree(D), then
every simplex's filtration value read out and summed into a curve.
"""

from __future__ import annotations

import argparse
import gc
import time

import numpy as np
from scipy.spatial import cKDTree

from chitally import Curve, euler_curve
from chitally.kernel import count_jumps
from chitally.inprocess import leaf_order


def sphere4(n: int, seed: int = 0) -> np.ndarray:
    """Uniform on the unit 4-sphere in R^5 (normalised Gaussian samples)."""
    x = np.random.default_rng(seed).standard_normal((n, 5))
    return x / np.linalg.norm(x, axis=1)[:, None]


def gudhi_curve(points: np.ndarray, eps: float, max_dim: int | None, build_dim: int | None = None
                ) -> tuple[Curve, int, float]:
    import gudhi

    t0 = time.perf_counter()
    tree = gudhi.RipsComplex(points=points, max_edge_length=eps).create_simplex_tree(
        max_dimension=max_dim if build_dim is None else build_dim)
    values, signs = [], []
    for simplex, value in tree.get_simplices():
        values.append(value)
        signs.append(1 if len(simplex) % 2 else -1)
    n = tree.num_simplices()
    curve = Curve.from_jumps(np.array(values), np.array(signs, dtype=np.int64), eps=eps, max_dim=max_dim,
                             n_points=points.shape[0])
    seconds = time.perf_counter() - t0
    del tree
    gc.collect()
    return curve, n, seconds


def ours(points: np.ndarray, eps: float, max_dim: int | None, threads: int) -> tuple[Curve, float, object]:
    t0 = time.perf_counter()
    curve, stats = euler_curve(points, eps, max_dim, threads=threads, return_stats=True)
    return curve, time.perf_counter() - t0, stats


def neighbour_search_seconds(points: np.ndarray, eps: float) -> float:
    """The KD-tree relabelling plus the eps-graph build: what any Rips method must do."""
    t0 = time.perf_counter()
    coords = np.ascontiguousarray(points[leaf_order(points)])
    pairs = cKDTree(coords).query_pairs(eps, output_type="ndarray")
    del pairs
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="skip the slow gudhi cases")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--low-caps", action="store_true", help="only the cap 1 and cap 2 section")
    args = ap.parse_args()
    # warm the compiled kernels so compile time is not measured
    euler_curve(np.random.default_rng(1).random((200, 3)), 0.3, 4)
    euler_curve(np.random.default_rng(1).random((200, 3)), 0.3)

    cube = np.random.default_rng(0).random((100, 3))
    s4 = sphere4(50_000)
    print(f"threads={args.threads}")
    if args.low_caps:
        low_caps(s4, args.threads)
        return
    print(f"{'case':<34} {'ours s':>8} {'gudhi s':>8} {'ratio':>7} {'simplices':>12} {'ours simpl/s':>13}  same")
    for name, pts, eps, cap, with_gudhi in [
        ("cube 100, eps 0.5, cap 3", cube, 0.5, 3, True),
        ("cube 100, eps 0.5, no cap", cube, 0.5, None, False),
        ("S^4 50k, eps 0.20, cap 5", s4, 0.20, 5, True),
        ("S^4 50k, eps 0.25, cap 5", s4, 0.25, 5, not args.quick),
        ("S^4 50k, eps 0.30, no cap", s4, 0.30, None, False),
        ("S^4 50k, eps 0.35, no cap", s4, 0.35, None, False),
    ]:
        curve, secs, stats = ours(pts, eps, cap, args.threads)
        if with_gudhi:
            ref, n_simplices, gsecs = gudhi_curve(pts, eps, cap)
            same = curve == ref
            print(f"{name:<34} {secs:8.2f} {gsecs:8.2f} {gsecs / secs:7.1f} {n_simplices:12d} "
                  f"{n_simplices / secs:13.3g}  {same}")
        else:
            print(f"{name:<34} {secs:8.2f} {'-':>8} {'-':>7} {'-':>12} {'-':>13}  "
                  f"(edges {stats.edges}, cones {stats.cones}, collapses {stats.collapsed}, splits {stats.splits})")
    # no cap: gudhi on the 100-point cube needs a full clique enumeration; compare there
    curve, secs, _ = ours(cube, 0.5, None, args.threads)
    ref, n_simplices, gsecs = gudhi_curve(cube, 0.5, None, build_dim=100)  # 100 > any clique here
    print(f"{'cube 100, eps 0.5, no cap (gudhi D=100)':<34} {secs:8.3f} {gsecs:8.2f} {gsecs / secs:7.1f} "
          f"{n_simplices:12d} {n_simplices / secs:13.3g}  {curve == ref}")

    low_caps(s4, args.threads)


def low_caps(s4: np.ndarray, threads: int) -> None:
    """Cap 1 and cap 2 on S^4 at eps 0.40 against the neighbour search alone."""
    ours(s4[:2000], 0.40, 2, threads)  # compile outside the timing
    print("\nlow caps against the neighbour search itself (S^4 50k, eps 0.40; best of 3 each):")
    search = min(neighbour_search_seconds(s4, 0.40) for _ in range(3))
    print(f"  neighbour search (leaf order + cKDTree.query_pairs): {search:.2f} s")
    for cap in (1, 2):
        runs = [ours(s4, 0.40, cap, threads) for _ in range(3)]
        _, secs, stats = min(runs, key=lambda r: r[1])
        print(f"  cap {cap}: {secs:.2f} s = {secs / search:.2f} x the neighbour search "
              f"(our graph {stats.seconds_graph:.2f} s, count {stats.seconds_count:.2f} s)")


if __name__ == "__main__":
    main()
