"""The dense regime of the point-cloud kernel: the working tree against an older revision.

Each case runs the older chitally (imported by benchmarks/baseline.py, default revision
c51bdbf, the last one counting uncapped edges through per-vertex frames) and the working
tree's side by side in this one process, one thread each, on the same cloud; the curves
must be identical. Printed: wall and CPU seconds of both, and the ratio of CPU times
(the steadier measure on a shared machine).

Cases: 50,000 points uniform on the 4-sphere in R^5 at eps 0.50 without a cap (mean
degree about 560: neighbourhoods of hundreds of points), the same cloud at eps 0.25 with
cap 5 (the capped kernel, unchanged), and 10^6 points on a torus in R^3 at eps 0.009
(mean degree about 21: the sparse regime), without a cap and with cap 3.

Run:  python benchmarks/bench_dense.py [--rev c51bdbf] [--only dense|capped|sparse ...] [--scale 0.5]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import chitally
from baseline import load

REV = "c51bdbf"


def sphere4(n: int, seed: int = 0) -> np.ndarray:
    """Uniform on the unit 4-sphere in R^5 (normalised Gaussian samples)."""
    x = np.random.default_rng(seed).standard_normal((n, 5))
    return x / np.linalg.norm(x, axis=1)[:, None]


def torus(n: int, seed: int = 0, big: float = 1.0, small: float = 0.3) -> np.ndarray:
    """Area-uniform samples of a torus in R^3 (rejection on the tube angle)."""
    rng = np.random.default_rng(seed)
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


def timed(module, points: np.ndarray, eps: float, cap: int | None):
    w0, c0 = time.perf_counter(), time.process_time()
    curve, stats = module.euler_curve(points, eps, cap, threads=1, return_stats=True)
    return curve, time.perf_counter() - w0, time.process_time() - c0, stats


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rev", default=REV, help="the older revision (default %(default)s)")
    ap.add_argument("--only", nargs="*", choices=["dense", "capped", "sparse"], default=None)
    ap.add_argument("--scale", type=float, default=1.0, help="multiply every cloud's size (smoke runs)")
    args = ap.parse_args()
    old = load(args.rev)
    assert old.euler_curve.__module__ == "chitally_base.inprocess", "the old package reached the new modules"
    small = sphere4(300, seed=1)
    for module in (old, chitally):  # compile (or load the cache) outside the timing
        for cap in (None, 3, 5):
            module.euler_curve(small, 0.6, cap, threads=1)
            module.euler_curve(small[:, :3], 0.3, cap, threads=1)
    s4 = sphere4(int(50_000 * args.scale))
    ring = torus(int(1_000_000 * args.scale))
    cases = [
        ("dense", "S^4 50k, eps 0.50, no cap", s4, 0.50, None),
        ("capped", "S^4 50k, eps 0.25, cap 5", s4, 0.25, 5),
        ("sparse", "torus 10^6, eps 0.009, no cap", ring, 0.009, None),
        ("sparse", "torus 10^6, eps 0.009, cap 3", ring, 0.009, 3),
    ]
    print(f"before: chitally at {args.rev}; after: the working tree; one thread each; scale {args.scale}")
    print(f"{'case':<32} {'before wall/cpu s':>18} {'after wall/cpu s':>17} {'cpu ratio':>9}  "
          f"{'mean deg':>8}  same")
    for group, name, points, eps, cap in cases:
        if args.only and group not in args.only:
            continue
        c_old, w_old, t_old, _ = timed(old, points, eps, cap)
        c_new, w_new, t_new, stats = timed(chitally, points, eps, cap)
        # bitwise, as Curve.__eq__ compares (the two Curve classes are distinct types)
        same = bool(np.array_equal(c_old.values.view(np.int64), c_new.values.view(np.int64))
                    and np.array_equal(c_old.chi, c_new.chi))
        print(f"{name:<32} {w_old:8.2f} /{t_old:8.2f} {w_new:7.2f} /{t_new:8.2f} {t_old / t_new:9.2f}  "
              f"{2 * stats.edges / points.shape[0]:8.1f}  {same}", flush=True)
        assert same, f"{name}: the curves differ"


if __name__ == "__main__":
    main()
