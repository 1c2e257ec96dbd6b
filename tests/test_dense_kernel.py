"""Tests for the kernel's uncapped counting by distances (`kernel._near_rows`) in the
dense regime, where neighbourhoods hold tens to hundreds of points: exact agreement with
networkx brute force and gudhi on small dense clouds (balls, the 4-sphere, integer
lattices with tied lengths), edge by edge with the frame kernel (`_count_rows`, the
previous route) on denser ones, in the three metrics, along each of its routes (the
default; every missed apex solved by exact collapses; splits only), and with the
previous revision of the package on larger clouds (slow).

Every comparison is exact: curves with ``==`` (bitwise scales, exact integers), jump
arrays with ``np.array_equal``.
"""

from __future__ import annotations

import itertools
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from references import brute_force_curve, brute_force_matrix_curve, gudhi_curve, gudhi_matrix_curve, metric_lengths

from chitally import Curve, euler_curve
from chitally import kernel
from chitally.kernel import count_jumps

# (bad_max, budget) of the counting by distances: the default; any missed apex solved by
# the exact collapses at once; splits only (exact collapses only when scratch runs out)
ROUTES = {"default": None, "exact": (0, 0), "splits": (10**9, 10**9)}


@pytest.fixture(params=list(ROUTES))
def route(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    limits = ROUTES[request.param]
    if limits is not None:
        monkeypatch.setattr(kernel, "_NEAR_LIMITS", limits)
    return request.param


def ball(n: int, m: int, seed: int) -> np.ndarray:
    """n points uniform in the unit ball of R^m."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, m))
    x /= np.linalg.norm(x, axis=1)[:, None]
    return x * rng.random((n, 1)) ** (1.0 / m)


def sphere4(n: int, seed: int) -> np.ndarray:
    """n points uniform on the unit 4-sphere in R^5 (normalised Gaussian samples)."""
    x = np.random.default_rng(seed).standard_normal((n, 5))
    return x / np.linalg.norm(x, axis=1)[:, None]


def lattice(side: int, dim: int) -> np.ndarray:
    """The integer grid {0, ..., side - 1}^dim: lengths tie exactly (DESIGN.md: only
    integer lattices give exactly equal float lengths)."""
    return np.array(list(itertools.product(range(side), repeat=dim)), dtype=np.float64)


def kernel_curve(points: np.ndarray, eps: float, metric: str = "euclidean") -> Curve:
    table = count_jumps(points, eps, None, metric=metric)
    return Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=None, n_points=len(points))


def per_edge(points: np.ndarray, eps: float, near: bool, metric: str = "euclidean") -> np.ndarray:
    """The uncapped jump of every edge of the whole cloud, by edge rank: by distances
    (near) or by frames."""
    offsets, nbrs, erank, _elo, _ehi, ed2 = kernel._halo_graph(points, eps, metric)
    out = np.zeros(ed2.shape[0], dtype=np.int64)
    kernel._count(points, offsets, nbrs, erank, 0, len(points), kernel.UNCAPPED, out, 1,
                  kernel.metric_tag(metric), near=near)
    return out


# dense enough that most edges see tens of common neighbours, sparse enough that the
# references can list every simplex
SMALL = {
    "S^4, 150 points, eps 1.0 (mean degree 23)": (sphere4(150, 3), 1.0),
    "ball in R^5, 120 points, eps 0.9 (mean degree 24)": (ball(120, 5, 2), 0.9),
    "ball in R^3, 100 points, eps 0.6 (mean degree 16)": (ball(100, 3, 1), 0.6),
    "lattice 5^3, eps sqrt 3 (lengths 1, sqrt 2, sqrt 3 tied)": (lattice(5, 3), math.sqrt(3.0)),
    "lattice 3^4, eps sqrt 3 (lengths 1, sqrt 2, sqrt 3 tied)": (lattice(3, 4), math.sqrt(3.0)),
}

# denser: the references cannot list these, the frame kernel can count them
DENSE = {
    "ball in R^8, 150 points, eps 1.25 (mean degree 78)": (ball(150, 8, 4), 1.25),
    "S^4, 1500 points, eps 0.9 (mean degree 160)": (sphere4(1500, 7), 0.9),
    "ball in R^3, 400 points, eps 1.1 (mean degree 221)": (ball(400, 3, 8), 1.1),
    "lattice 5^4, eps sqrt 6 (tied lengths, mean degree 109)": (lattice(5, 4), math.sqrt(6.0)),
    "lattice 9^3 with some points twice, eps sqrt 8 (tied lengths, mean degree 73)": (
        np.concatenate([lattice(9, 3), lattice(9, 3)[::7]]), math.sqrt(8.0)),
}


@pytest.mark.parametrize("name", list(SMALL))
def test_dense_small_clouds_match_networkx_brute_force(name: str, route: str) -> None:
    """Reference: networkx enumerate_all_cliques on the eps-graph (tests/references.py)."""
    points, eps = SMALL[name]
    assert kernel_curve(points, eps) == brute_force_curve(points, eps, None)


@pytest.mark.parametrize(("points", "eps"), [(sphere4(150, 3), 1.1), (ball(120, 5, 2), 1.0), (lattice(4, 3), 2.0)],
                         ids=["S^4 150 eps 1.1", "R^5 ball 120 eps 1.0", "lattice 4^3 eps 2"])
def test_dense_small_clouds_match_gudhi(points: np.ndarray, eps: float, route: str) -> None:
    """Reference: gudhi RipsComplex expanded to every dimension (tests/references.py), on
    clouds of mean degree 33 to 35."""
    assert kernel_curve(points, eps) == gudhi_curve(points, eps, None)


@pytest.mark.parametrize("name", list(DENSE))
def test_every_edge_matches_the_frame_kernel(name: str, route: str) -> None:
    """Edge by edge, the jump by distances equals the jump by frames (the uncapped route
    before this one, itself checked against networkx and gudhi in test_kernel.py), on
    neighbourhoods past one 64-bit word."""
    points, eps = DENSE[name]
    near = per_edge(points, eps, True)
    assert np.array_equal(near, per_edge(points, eps, False))
    assert np.count_nonzero(near) > 0


def test_the_routes_report_their_work_on_a_dense_cloud(monkeypatch: pytest.MonkeyPatch) -> None:
    """By default a dense cloud's edges meet guessed apexes and splits, and no frame is
    built; when every missed guess goes to the exact collapses, they collapse vertices."""
    points, eps = DENSE["S^4, 1500 points, eps 0.9 (mean degree 160)"]
    stats = count_jumps(points, eps, None).stats
    assert stats.cones > 0 and stats.splits > 0
    assert stats.frame_pairs == 0
    monkeypatch.setattr(kernel, "_NEAR_LIMITS", ROUTES["exact"])
    exact = count_jumps(points, eps, None).stats
    assert exact.collapsed > 0 and exact.splits < stats.splits


@pytest.mark.parametrize("metric", ["manhattan", "chebyshev"])
def test_other_metrics_match_networkx_and_gudhi(metric: str, route: str) -> None:
    """References: networkx brute force and gudhi on the matrix of lengths by the metric's
    rule (tests/references.py), on a dense small ball of R^4."""
    points = ball(110, 4, 11)
    eps = {"manhattan": 1.1, "chebyshev": 0.6}[metric]
    lengths = metric_lengths(points, metric)
    ours = kernel_curve(points, eps, metric)
    assert ours == brute_force_matrix_curve(lengths, eps, None)
    assert ours == gudhi_matrix_curve(lengths, eps, None)


@pytest.mark.parametrize("metric", ["manhattan", "chebyshev"])
def test_other_metrics_every_edge_matches_the_frame_kernel(metric: str) -> None:
    points = sphere4(1200, 12)
    eps = {"manhattan": 1.6, "chebyshev": 0.45}[metric]
    near = per_edge(points, eps, True, metric)
    assert np.array_equal(near, per_edge(points, eps, False, metric))


@pytest.mark.parametrize("dims", [1, 2, 9, 12])
def test_every_number_of_coordinates(dims: int) -> None:
    """Unrolled distance loops (1 to 8 coordinates) and the generic ones (9 and more)."""
    points = ball(300, dims, dims)
    eps = 0.5 if dims <= 2 else 1.0
    assert np.array_equal(per_edge(points, eps, True), per_edge(points, eps, False))


def test_threads_and_owned_pieces_give_the_same_table() -> None:
    points, eps = DENSE["S^4, 1500 points, eps 0.9 (mean degree 160)"]
    whole = count_jumps(points, eps, None, threads=1)
    threaded = count_jumps(points, eps, None, threads=2)
    assert np.array_equal(whole.values, threaded.values) and np.array_equal(whole.jumps, threaded.jumps)
    parts = [count_jumps(points, eps, None, owned=(a, b)) for a, b in [(0, 400), (400, 1100), (1100, 1500)]]
    summed = Curve.from_jumps(np.concatenate([t.values for t in parts]), np.concatenate([t.jumps for t in parts]),
                              eps=eps, max_dim=None, n_points=len(points))
    assert summed == Curve.from_jumps(whole.values, whole.jumps, eps=eps, max_dim=None, n_points=len(points))


# ------------------------------------------------------------ the previous revision


BEFORE = "c51bdbf"  # the last revision counting uncapped edges by frames only


@pytest.fixture(scope="module")
def before():
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))
    try:
        from baseline import load
    finally:
        sys.path.pop(0)
    old = load(BEFORE)
    assert old.euler_curve.__module__ == "chitally_base.inprocess"
    return old


def torus(n: int, seed: int, big: float = 1.0, small: float = 0.3) -> np.ndarray:
    """Area-uniform samples of a torus in R^3 (rejection on the tube angle)."""
    rng = np.random.default_rng(seed)
    out = np.empty((0, 3))
    while out.shape[0] < n:
        k = 2 * (n - out.shape[0]) + 1000
        u, v = rng.uniform(0, 2 * np.pi, k), rng.uniform(0, 2 * np.pi, k)
        keep = rng.uniform(0, 1, k) <= (big + small * np.cos(v)) / (big + small)
        u, v = u[keep], v[keep]
        ring = big + small * np.cos(v)
        out = np.vstack([out, np.column_stack([ring * np.cos(u), ring * np.sin(u), small * np.sin(v)])])
    return np.ascontiguousarray(out[:n])


@pytest.mark.slow
@pytest.mark.parametrize(("name", "points", "eps", "metric"), [
    ("S^4 10k, eps 0.50 (mean degree about 110)", sphere4(10_000, 0), 0.50, "euclidean"),
    ("S^4 5k, eps 0.70 (mean degree about 190)", sphere4(5_000, 1), 0.70, "euclidean"),
    ("torus 10^5, eps 0.03 (mean degree about 24)", torus(100_000, 0), 0.03, "euclidean"),
    ("S^4 5k, Manhattan eps 1.2", sphere4(5_000, 2), 1.2, "manhattan"),
    ("S^4 5k, Chebyshev eps 0.4", sphere4(5_000, 3), 0.4, "chebyshev"),
])
def test_benchmark_style_clouds_match_the_previous_revision(before, name: str, points: np.ndarray, eps: float,
                                                           metric: str) -> None:
    """The curves of the benchmark's clouds at a smaller size (benchmarks/bench_dense.py)
    equal those of the package at the previous revision, bit for bit."""
    ours = euler_curve(points, eps, metric=metric)
    theirs = before.euler_curve(points, eps, metric=metric)
    assert np.array_equal(ours.values.view(np.int64), theirs.values.view(np.int64))
    assert np.array_equal(ours.chi, theirs.chi)
