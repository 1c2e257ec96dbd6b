"""Tests for chitally.kernel.count_jumps: exact agreement with independent references
(networkx brute force, gudhi), closed forms, exact ties, coincident points, neighbourhoods
spanning several 64-bit words, and the invariances the distributed run relies on (owned
pieces add up, halos suffice, threads and row order do not matter).

Every comparison is exact: curves are compared with ``==`` (bitwise scales, exact
integers) and jump tables with ``np.array_equal``.
"""

from __future__ import annotations

import itertools
import math

import gudhi
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from numba.core import types as nb_types
from references import (
    brute_force_curve,
    count_edges,
    diameter,
    gudhi_curve,
    pair_lengths,
    pairwise_lengths,
    skeleton_chi,
)

from chitally import Curve, merge_jumps
from chitally.kernel import JumpTable, count_jumps

CAPS = [0, 1, 2, 3, None]
SQRT2 = math.sqrt(2.0)
SQRT3 = math.sqrt(3.0)

PROPERTY = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


# ---------------------------------------------------------------------------- helpers


def kernel_curve(coords: np.ndarray, eps: float, max_dim: int | None, **kwargs: object) -> Curve:
    """The curve of a whole cloud straight from the kernel, rows in the given order."""
    table = count_jumps(coords, eps, max_dim, **kwargs)
    check_table(table, owned=len(coords))
    return Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=max_dim, n_points=len(coords))


def check_table(table: JumpTable, owned: int) -> None:
    """A jump table is canonical: strictly increasing scales, nonzero int64 jumps. (The
    jump at 0.0 is the owned vertex count plus the simplices of coincident points, which
    may cancel it: two copies of a point owned together net 2 - 1 = 1, owned apart the
    first nets 1 - 1 = 0 and has an empty table.)"""
    assert table.values.dtype == np.float64 and table.jumps.dtype == np.int64
    assert table.values.shape == table.jumps.shape
    assert np.all(np.diff(table.values) > 0)
    assert np.all(table.jumps != 0)
    assert table.stats.vertices == owned
    if table.values.size:
        assert table.values[0] >= 0.0
    if owned == 0:
        assert table.values.size == 0


def tables_equal(a: JumpTable, b: JumpTable) -> bool:
    return bool(
        np.array_equal(a.values.view(np.int64), b.values.view(np.int64))
        and np.array_equal(a.jumps, b.jumps)
    )


def edge_quantile(points: np.ndarray, q: float) -> float:
    """An actual edge length of the cloud, so that eps sits exactly on the <= boundary."""
    lengths = pairwise_lengths(points)
    upper = lengths[np.triu_indices(len(points), 1)]
    return float(np.quantile(upper, q, method="inverted_cdf"))


def grid(side: int, dim: int) -> np.ndarray:
    """The integer lattice {0..side-1}^dim as float64 rows."""
    return np.array(list(itertools.product(range(side), repeat=dim)), dtype=np.float64)


def cross_polytope(n: int) -> np.ndarray:
    """The 2n points +-e_i of R^n."""
    eye = np.eye(n)
    return np.concatenate([eye, -eye])


def cross_polytope_chi(n: int, max_dim: int | None) -> int:
    """chi of the boundary of the n-dimensional cross-polytope, capped at dimension D.

    From memory (standard facts, cross-checked by brute force in
    test_cross_polytope_facts_by_brute_force): it has 2^(k+1) C(n, k+1) faces of dimension
    k (choose k+1 axes and a sign on each) and is a simplicial (n-1)-sphere, so uncapped
    chi = 1 + (-1)^(n-1) (Euler-Poincare with the Betti numbers of S^(n-1)).
    """
    if max_dim is None:
        return 1 + (-1) ** (n - 1)
    return sum((-1) ** k * 2 ** (k + 1) * math.comb(n, k + 1) for k in range(min(max_dim, n - 1) + 1))


def ball(rng: np.random.Generator, n: int, m: int) -> np.ndarray:
    """n points uniform in the unit ball of R^m."""
    x = rng.standard_normal((n, m))
    return x * (rng.random(n) ** (1 / m) / np.linalg.norm(x, axis=1))[:, None]


# ------------------------------------------------------------------ a hand-made case


def test_path_of_three_points_by_hand() -> None:
    """Three points on a line at eps 1.5: a path with two unit edges (counted by hand)."""
    table = count_jumps(np.array([[0.0], [1.0], [2.0]]), eps=1.5)
    assert table.values.tolist() == [0.0, 1.0]
    assert table.jumps.tolist() == [3, -2]
    # at eps = 2 the long edge and the triangle enter together: -1 + 1 = 0 net, dropped
    table = count_jumps(np.array([[0.0], [1.0], [2.0]]), eps=2.0)
    assert table.values.tolist() == [0.0, 1.0]
    assert table.jumps.tolist() == [3, -2]
    table = count_jumps(np.array([[0.0], [1.0], [2.0]]), eps=2.0, max_dim=1)
    assert table.values.tolist() == [0.0, 1.0, 2.0]
    assert table.jumps.tolist() == [3, -2, -1]


# ------------------------------------------------------- networkx brute force (kernel)


@pytest.mark.parametrize("max_dim", CAPS)
@pytest.mark.parametrize("m", [2, 3, 5])
def test_matches_networkx_brute_force_random_clouds(m: int, max_dim: int | None) -> None:
    """count_jumps == networkx enumerate_all_cliques (brute force) on 60 random points.

    Several eps per cloud, most of them exactly an edge length of the cloud (the <= rule's
    boundary). Uncapped brute force lists every clique, so its eps stay sparse.
    """
    rng = np.random.default_rng(1000 + m)
    points = rng.random((60, m))
    quantiles = (0.02, 0.08, 0.15, 0.2) if max_dim is None else (0.02, 0.1, 0.2, 0.3)
    scales = [edge_quantile(points, q) for q in quantiles] + [0.1 * m]
    for eps in scales:
        ours = kernel_curve(points, eps, max_dim)
        assert ours == brute_force_curve(points, eps, max_dim), eps
    if max_dim != 0:
        assert len(ours.values) > 10  # the comparison covers real curves, not constants


@pytest.mark.parametrize("max_dim", CAPS)
def test_matches_networkx_brute_force_clustered_cloud(max_dim: int | None) -> None:
    """Three Gaussian blobs of very different spreads in R^3 (dense and sparse regions in
    one cloud) against networkx enumerate_all_cliques (brute force)."""
    rng = np.random.default_rng(77)
    points = np.concatenate([
        rng.normal(0.0, 0.03, (12, 3)),
        rng.normal(1.0, 0.15, (24, 3)),
        rng.normal(-1.0, 0.4, (24, 3)),
    ])
    for eps in (0.05, 0.12, edge_quantile(points, 0.1)):
        assert kernel_curve(points, eps, max_dim) == brute_force_curve(points, eps, max_dim)


@pytest.mark.parametrize("m", [1, 2, 3, 5, 8, 9, 13])
@pytest.mark.parametrize("n", [1, 2, 63, 64, 65, 130, 700])
def test_edge_join_finds_exactly_the_pairs_within_eps(m: int, n: int) -> None:
    """The compiled join (a row against whole leaves of 64 through bit masks) against
    scipy's cKDTree.query_pairs, an independent KD-tree, widened and then filtered by the
    one rule: the same pairs with the same squared lengths, on random points and on a
    lattice with repeated rows whose lengths tie eps exactly."""
    from scipy.spatial import cKDTree

    from chitally import kernel
    from chitally.metric import pair_squared_distances, query_radius

    rng = np.random.default_rng(n * 31 + m)
    cases = ((rng.random((n, m)), 0.35 * math.sqrt(m)), (rng.integers(0, 3, (n, m)).astype(np.float64), SQRT2))
    for points, eps in cases:
        pairs = cKDTree(points).query_pairs(query_radius(eps), output_type="ndarray").reshape(-1, 2)
        d2 = pair_squared_distances(points, pairs[:, 0], points, pairs[:, 1])
        keep = np.sqrt(d2) <= eps
        expected = sorted(zip(pairs[keep].min(axis=1).tolist(), pairs[keep].max(axis=1).tolist(), d2[keep].tolist()))
        reach = query_radius(eps)
        lo, hi, sq, count = kernel._tree_edges(points, eps, reach * reach, kernel._MAX_EDGES)
        assert sorted(zip(lo[:count].tolist(), hi[:count].tolist(), sq[:count].tolist())) == expected


@pytest.mark.parametrize("m", [1, 2, 3, 4, 6, 7, 8, 9, 12])
def test_cap_2_in_every_dimension_matches_networkx(m: int) -> None:
    """Cap 2 counts by distances up to 8 coordinates and by walking rows beyond; both
    against networkx enumerate_all_cliques (brute force), on random points and on an
    integer lattice with coincident points (every length tied many times over), with
    owned pieces that must add up."""
    rng = np.random.default_rng(500 + m)
    points = rng.random((60, m))
    for eps in (edge_quantile(points, 0.1), edge_quantile(points, 0.3)):
        assert kernel_curve(points, eps, 2) == brute_force_curve(points, eps, 2), eps
    lattice = rng.integers(0, 3, (40, m)).astype(np.float64)  # repeats rows, ties lengths
    for eps in (1.0, SQRT2, SQRT3, 2.0):
        whole = kernel_curve(lattice, eps, 2)
        assert whole == brute_force_curve(lattice, eps, 2), eps
        pieces = [count_jumps(lattice, eps, 2, owned=(a, b)) for a, b in ((0, 7), (7, 30), (30, 40))]
        values, jumps = merge_jumps([t.values for t in pieces], [t.jumps for t in pieces])
        assert Curve.from_jumps(values, jumps, eps=eps, max_dim=2, n_points=40) == whole


def test_cap_2_distance_count_equals_the_row_walk() -> None:
    """The two cap-2 counts, edge by edge, on tied lattices and random clouds in 1 to 8
    coordinates with neighbourhoods of dozens to hundreds of rows (an internal cross-check; the
    outside reference is the networkx test above)."""
    from chitally import kernel

    rng = np.random.default_rng(9)
    for m in range(1, kernel._UNROLLED_DIMS + 1):
        cloud = rng.random((600, m))
        for points, eps in ((rng.integers(0, 4 if m <= 4 else 2, (400, m)).astype(np.float64), 2.0),
                            (cloud, edge_quantile(cloud, 0.1))):
            offsets, nbrs, erank, elo, _ehi, ed2 = kernel._halo_graph(points, eps)
            unset = -2  # every jump is at least -1
            by_distance = np.full(ed2.shape[0], unset, dtype=np.int64)
            by_walk = np.full(ed2.shape[0], unset, dtype=np.int64)
            kernel._count_cap2_near(points, offsets, nbrs, erank, 0, len(points), by_distance)
            kernel._count_cap2(offsets, nbrs, erank, 0, len(points), by_walk, np.zeros(len(points), np.int64))
            assert np.array_equal(by_distance, by_walk), m
            assert (by_walk != unset).all() and np.diff(offsets).max() > 40


# ----------------------------------------------------------------- gudhi (kernel level)


def test_gudhi_includes_edges_of_length_equal_to_max_edge_length() -> None:
    """gudhi RipsComplex keeps an edge iff length <= max_edge_length, like our rule: a 3-4-5
    right triangle's hypotenuse is in at 5.0 and out at the next double below."""
    points = np.array([[0.0, 0.0], [3.0, 0.0], [0.0, 4.0]])
    inside = gudhi.RipsComplex(points=points, max_edge_length=5.0).create_simplex_tree(max_dimension=2)
    below = np.nextafter(5.0, 0.0)
    outside = gudhi.RipsComplex(points=points, max_edge_length=below).create_simplex_tree(max_dimension=2)
    assert inside.num_simplices() == 7 and outside.num_simplices() == 5
    for eps in (5.0, below):
        assert kernel_curve(points, eps, None) == gudhi_curve(points, eps, None)
    assert kernel_curve(points, 5.0, None).values.tolist() == [0.0, 3.0, 4.0]  # 5.0 nets to 0


@pytest.mark.parametrize("m", [2, 3, 5, 8])
def test_gudhi_edge_lengths_are_our_rule_bit_for_bit(m: int) -> None:
    """Every pair of a 400-point cloud whose coordinates span six orders of magnitude:
    gudhi RipsComplex (independent Rips implementation) gives exactly our float64 lengths
    (squares summed in coordinate order, then sqrt). This is what lets every gudhi
    comparison in this suite be exact."""
    rng = np.random.default_rng(m)
    points = rng.standard_normal((400, m)) * rng.uniform(1e-3, 1e3, size=m)
    tree = gudhi.RipsComplex(points=points, max_edge_length=math.inf).create_simplex_tree(max_dimension=1)
    pairs, theirs = [], []
    for simplex, value in tree.get_skeleton(1):
        if len(simplex) == 2:
            pairs.append(simplex)
            theirs.append(value)
    a, b = np.array(pairs).T
    ours = pair_lengths(points, a, b)
    assert len(pairs) == 400 * 399 // 2
    assert np.array_equal(np.array(theirs).view(np.int64), ours.view(np.int64))


def test_gudhi_cap_zero_keeps_edges_and_the_reference_drops_them() -> None:
    """gudhi's create_simplex_tree(max_dimension=0) still holds the graph's edges; the
    reference reads only dimension <= D, so cap 0 gives the constant N."""
    points = np.random.default_rng(3).random((50, 2))
    tree = gudhi.RipsComplex(points=points, max_edge_length=0.3).create_simplex_tree(max_dimension=0)
    assert tree.num_simplices() == 50 + count_edges(points, 0.3) > 50
    expected = Curve(np.array([0.0]), np.array([50]), 0.3, 0, 50)
    assert gudhi_curve(points, 0.3, 0) == expected == kernel_curve(points, 0.3, 0)


@pytest.mark.parametrize("max_dim", [0, 1, 2, 3, 4])
@pytest.mark.parametrize(("m", "eps"), [(2, 0.09), (3, 0.18), (5, 0.5)])
def test_matches_gudhi_500_points(m: int, eps: float, max_dim: int) -> None:
    """count_jumps on 500 random points in input order == gudhi RipsComplex/SimplexTree
    (independent Rips implementation)."""
    points = np.random.default_rng(500 + m).random((500, m))
    ours = kernel_curve(points, eps, max_dim)
    assert ours == gudhi_curve(points, eps, max_dim)
    assert len(ours.values) > (100 if max_dim else 0)


def test_matches_gudhi_uncapped_sparse_cloud() -> None:
    """Uncapped (the collapse kernel) on 400 points in R^3 against gudhi RipsComplex with
    a full expansion (independent Rips implementation), at several eps."""
    points = np.random.default_rng(41).random((400, 3))
    for eps in (0.08, 0.12, 0.16):
        assert kernel_curve(points, eps, None) == gudhi_curve(points, eps, None)


# ---------------------------------------------------------- ties on integer lattices


def test_cubic_lattice_unit_scale_closed_form() -> None:
    """5x5x5 grid at eps = 1: the unit-distance graph of Z^3 is bipartite (parity of the
    coordinate sum), so it has no triangles and chi = V - E = 125 - 3*5*5*4 = -175, all at
    the single tied scale 1.0; one double below 1.0 no edge is in."""
    points = grid(5, 3)
    for max_dim in CAPS:
        curve = kernel_curve(points, 1.0, max_dim)
        if max_dim == 0:
            assert curve.values.tolist() == [0.0] and curve.chi.tolist() == [125]
        else:
            assert curve.values.tolist() == [0.0, 1.0] and curve.chi.tolist() == [125, -175]
    below = np.nextafter(1.0, 0.0)
    assert kernel_curve(points, below, None) == Curve(np.array([0.0]), np.array([125]), below, None, 125)


def test_cubic_lattice_all_three_tied_scales() -> None:
    """5x5x5 grid at eps = sqrt(3): every edge length is exactly 1, sqrt(2) or sqrt(3)
    (massive ties), so the curve changes at exactly those three doubles. Checked against
    networkx enumerate_all_cliques (brute force) and gudhi (independent Rips).

    Closed form for the end value (derived here): sets of diameter <= sqrt(3) in Z^3 are
    exactly the vertex sets inside one unit cube, so the complex is the union of the full
    simplices on the 64 cubes; their nonempty intersections are full simplices (contractible),
    so by the nerve theorem it has the homotopy type of the nerve of the cubes, which by the
    nerve theorem again is the solid block [0,4]^3: contractible, chi = 1.
    """
    points = grid(5, 3)
    curve = kernel_curve(points, SQRT3, None)
    assert curve.values.tolist() == [0.0, 1.0, SQRT2, SQRT3]
    assert curve.chi[1] == -175 and curve.final == 1
    assert curve == brute_force_curve(points, SQRT3, None)
    for max_dim in (2, 3):
        assert kernel_curve(points, SQRT3, max_dim) == gudhi_curve(points, SQRT3, max_dim)


@pytest.mark.parametrize("max_dim", CAPS)
def test_cubic_lattice_at_sqrt2_and_just_below(max_dim: int | None) -> None:
    """eps exactly sqrt(2) (the face diagonals are in) and one double below (they are out),
    against networkx enumerate_all_cliques (brute force); shuffled rows change every tie
    break and must give the same curve."""
    points = grid(5, 3)
    shuffled = points[np.random.default_rng(9).permutation(len(points))]
    for eps in (SQRT2, float(np.nextafter(SQRT2, 0.0))):
        expected = brute_force_curve(points, eps, max_dim)
        assert kernel_curve(points, eps, max_dim) == expected
        assert kernel_curve(shuffled, eps, max_dim) == expected
    assert expected.values.tolist() == ([0.0] if max_dim == 0 else [0.0, 1.0])


@pytest.mark.parametrize(("side", "dim", "eps"), [(9, 2, 2.0), (9, 2, math.sqrt(5.0)), (3, 4, SQRT2), (3, 4, 2.0)])
def test_other_lattices_match_gudhi(side: int, dim: int, eps: float) -> None:
    """Square and 4-D grids with eps on a tied length, caps 1..4, against gudhi
    RipsComplex/SimplexTree (independent Rips implementation)."""
    points = grid(side, dim)
    for max_dim in (1, 2, 3, 4):
        assert kernel_curve(points, eps, max_dim) == gudhi_curve(points, eps, max_dim)


# ------------------------------------------------------------------ coincident points


@pytest.mark.parametrize("copies", [2, 3, 7, 65, 66, 67, 130, 131, 150])
def test_coincident_points_form_a_simplex_at_zero(copies: int) -> None:
    """k copies of one point are k vertices joined by 0-length edges: the full (k-1)-simplex
    at scale 0. Closed form (binomial identity, see references.skeleton_chi): the
    D-skeleton has chi = 1 + (-1)^D C(k-1, D+1); uncapped 1 (contractible). All edges tie,
    so the last edge (k-2, k-1) has |L(e)| = k - 2: 66, 67, 130 and 131 copies put G_e at
    exactly 64, 65, 128 and 129 vertices (the one-word limit and the word boundaries)."""
    points = np.tile(np.array([[0.25, -3.5, 7.0]]), (copies, 1))
    for max_dim in [None, 0, 1, 2, 3, 4] + ([5] if copies <= 67 else []):
        curve = kernel_curve(points, 0.5, max_dim)
        assert curve.values.tolist() == [0.0]
        assert curve.chi.tolist() == [skeleton_chi(copies, max_dim)]


@pytest.mark.parametrize("max_dim", CAPS + [4])
def test_cloud_with_duplicates_matches_references(max_dim: int | None) -> None:
    """30 random points with rows repeated up to 4 times, shuffled, against networkx
    enumerate_all_cliques (brute force) and gudhi (independent Rips implementation)."""
    rng = np.random.default_rng(31)
    base = rng.random((30, 2))
    points = np.repeat(base, rng.integers(1, 5, size=30), axis=0)
    points = points[rng.permutation(len(points))]
    for eps in (0.1, 0.2):
        ours = kernel_curve(points, eps, max_dim)
        assert ours == brute_force_curve(points, eps, max_dim)
        assert ours == gudhi_curve(points, eps, max_dim)


# -------------------------------------------------------------- tiny and trivial cases


@pytest.mark.parametrize("max_dim", CAPS + [7])
def test_single_point(max_dim: int | None) -> None:
    """One vertex: the curve is 1 from 0 on, whatever the cap."""
    table = count_jumps(np.array([[0.3, -2.0]]), 1.0, max_dim)
    assert table.values.tolist() == [0.0] and table.jumps.tolist() == [1]


def test_cap_zero_counts_owned_vertices_only() -> None:
    """Cap 0: only vertices, so the table is the owned row count at 0.0."""
    points = np.random.default_rng(5).random((500, 3))
    full = count_jumps(points, 10.0, 0)
    assert full.values.tolist() == [0.0] and full.jumps.tolist() == [500]
    part = count_jumps(points, 10.0, 0, owned=(100, 350))
    assert part.values.tolist() == [0.0] and part.jumps.tolist() == [250]
    empty = count_jumps(points, 10.0, 0, owned=(7, 7))
    assert empty.values.size == 0 and empty.jumps.size == 0


def test_low_cap_identities() -> None:
    """Cap 1 adds -1 per edge; cap 2 adds -1 + (triangles closed by the edge) per edge, so
    at eps the cap-1 value is V - E and the cap-2 value is V - E + T, with E and T counted
    by networkx (brute force triangle count)."""
    import networkx as nx

    points = np.random.default_rng(12).random((200, 3))
    eps = 0.2
    lengths = pairwise_lengths(points)
    graph = nx.Graph(np.triu(lengths <= eps, 1))
    n_edges = graph.number_of_edges()
    n_triangles = sum(nx.triangles(graph).values()) // 3
    assert kernel_curve(points, eps, 1).final == 200 - n_edges
    assert kernel_curve(points, eps, 2).final == 200 - n_edges + n_triangles


def test_owned_range_outside_the_halo_is_refused() -> None:
    points = np.zeros((4, 2))
    with pytest.raises(ValueError, match="owned rows"):
        count_jumps(points, 1.0, owned=(2, 5))


# ------------------------------------------------- neighbourhoods of several 64-bit words


@pytest.mark.parametrize("max_dim", [0, 1, 2, 3, None])
def test_ball_of_300_points_at_its_diameter(max_dim: int | None) -> None:
    """300 points in a ball with eps = the diameter exactly: every set is a simplex, the
    complex is the full 299-simplex (neighbourhoods of 299 vertices, five words). Closed
    form: chi of its D-skeleton = 1 + (-1)^D C(299, D+1), and 1 uncapped (contractible)."""
    points = ball(np.random.default_rng(300), 300, 8)
    eps = diameter(points)
    curve = kernel_curve(points, eps, max_dim)
    assert curve.final == skeleton_chi(300, max_dim)
    assert curve.chi[0] == 300


@pytest.mark.parametrize("max_dim", [1, 2])
def test_ball_of_300_points_matches_gudhi(max_dim: int) -> None:
    """300 points in a ball of R^8 at eps = the 0.4 quantile of the lengths: mean degree
    about 120, maximum 270 (91 vertices above 128), against gudhi (independent Rips)."""
    points = ball(np.random.default_rng(300), 300, 8)
    eps = edge_quantile(points, 0.4)
    degrees = (pairwise_lengths(points) <= eps).sum(axis=1) - 1
    assert degrees.max() > 128 and (degrees > 64).sum() > 100
    assert kernel_curve(points, eps, max_dim) == gudhi_curve(points, eps, max_dim)


def hub_cloud(seed: int, k: int = 200) -> np.ndarray:
    """Two hubs at distance 0.99 and k points on a sphere of radius 0.85 in the plane
    between them (R^10), at eps 1. Each hub sees all k + 1 other points (hub-sphere length
    0.9836...); the hub-hub edge is longer than those, so its L(e) is the whole sphere and
    G_e the k-point sphere graph below 0.99 (k = 200: four words); both hubs are adjacent
    to everything."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((k, 9))
    x *= 0.85 / np.linalg.norm(x, axis=1)[:, None]
    hubs = np.zeros((2, 10))
    hubs[0, 0], hubs[1, 0] = 0.495, -0.495
    return np.concatenate([hubs, np.concatenate([np.zeros((k, 1)), x], axis=1)])


@pytest.mark.parametrize("max_dim", [2, 3, 4, 5, None])
def test_hub_cloud_matches_gudhi(max_dim: int | None) -> None:
    """Multi-word neighbourhoods in the capped clique counts and in the collapse kernel,
    against gudhi RipsComplex/SimplexTree (independent Rips implementation). Uncapped, the
    whole complex is a cone (each hub is adjacent to every point), hence contractible:
    final value 1."""
    points = hub_cloud(11)
    lengths = pairwise_lengths(points)
    assert lengths[0, 1] == 0.99 > lengths[:2, 2:].max()
    assert (lengths[:2] <= 1.0).all() and 20 < ((lengths[2:, 2:] <= 1.0).sum(axis=1) - 1).mean() < 60
    ours = kernel_curve(points, 1.0, max_dim)
    assert ours == gudhi_curve(points, 1.0, max_dim)
    if max_dim is None:
        assert ours.final == 1


@pytest.mark.parametrize("k", [63, 64, 65, 127, 128, 129])
def test_hub_cloud_at_word_boundaries(k: int) -> None:
    """The hub-hub edge's G_e has exactly k vertices (a sparse random geometric graph, so
    the collapse kernel collapses and splits): sizes at both sides of the one-word limit and
    of the two-word boundary, against gudhi RipsComplex/SimplexTree (independent Rips)."""
    points = hub_cloud(k, k)
    for max_dim in (3, 4, 5, None):
        ours = kernel_curve(points, 1.0, max_dim)
        assert ours == gudhi_curve(points, 1.0, max_dim)
    assert ours.final == 1  # uncapped: a cone


def test_cross_polytope_facts_by_brute_force() -> None:
    """Cross-check of the remembered cross-polytope facts used below (face counts
    2^(k+1) C(n, k+1), uncapped chi 1 + (-1)^(n-1)) with networkx enumerate_all_cliques
    (brute force) for n = 2..5, and the kernel on the same inputs."""
    for n in range(2, 6):
        points = cross_polytope(n)
        for max_dim in [None, 0, 1, 2, 3]:
            reference = brute_force_curve(points, 1.5, max_dim)
            assert reference.final == cross_polytope_chi(n, max_dim)
            assert kernel_curve(points, 1.5, max_dim) == reference


@pytest.mark.parametrize("n", [33, 65, 70])
def test_cross_polytope_many_words(n: int) -> None:
    """The 2n points +-e_i at eps 1.5: every edge has length sqrt(2) exactly (all tied),
    antipodes (length 2) are out, no vertex is dominated, so the collapse kernel must split;
    neighbourhoods of 2n-2 vertices (64, 128 and 138: one, two and three words). Closed
    forms: see cross_polytope_chi."""
    points = cross_polytope(n)
    for max_dim in [None, 0, 1, 2, 3, 4]:
        curve = kernel_curve(points, 1.5, max_dim)
        assert curve.values.tolist() == ([0.0] if max_dim == 0 else [0.0, SQRT2])
        assert curve.chi[0] == 2 * n
        assert curve.final == cross_polytope_chi(n, max_dim)


# ------------------------------------------------------------- property-based invariants


@st.composite
def clouds(draw: st.DrawFn, max_points: int = 24) -> tuple[np.ndarray, float, int | None]:
    """A small cloud with an eps and a cap: either a small integer lattice (exact ties,
    coincident points, eps on tied lengths) or arbitrary floats in [-1, 1] (subnormals,
    -0.0), with eps possibly exactly one of the cloud's edge lengths."""
    n = draw(st.integers(1, max_points))
    m = draw(st.integers(1, 4))
    if draw(st.booleans()):
        points = draw(hnp.arrays(np.float64, (n, m), elements=st.integers(-2, 2).map(float)))
        eps = draw(st.sampled_from([0.5, 1.0, SQRT2, SQRT3, 2.0, 3.0]))
    else:
        points = draw(hnp.arrays(np.float64, (n, m), elements=st.floats(-1.0, 1.0, width=64)))
        eps = draw(st.floats(1e-3, 2.0))
        if n >= 2 and draw(st.booleans()):
            lengths = pairwise_lengths(points)
            i = draw(st.integers(0, n - 2))
            j = draw(st.integers(i + 1, n - 1))
            if lengths[i, j] > 0:
                eps = float(lengths[i, j])
    max_dim = draw(st.sampled_from([None, 0, 1, 2, 3, 4]))
    return points, eps, max_dim


@PROPERTY
@given(case=clouds(max_points=12))
def test_small_clouds_match_networkx_brute_force(case: tuple[np.ndarray, float, int | None]) -> None:
    """Any small cloud, any cap: count_jumps == networkx enumerate_all_cliques (brute force)."""
    points, eps, max_dim = case
    assert kernel_curve(points, eps, max_dim) == brute_force_curve(points, eps, max_dim)


@PROPERTY
@given(case=clouds(), cuts=st.lists(st.integers(0, 24), max_size=6))
def test_owned_pieces_add_up_to_the_whole(case: tuple[np.ndarray, float, int | None], cuts: list[int]) -> None:
    """Cutting the rows into contiguous owned ranges (each run on the full coordinates)
    and merging their jump tables gives exactly the whole table."""
    points, eps, max_dim = case
    n = len(points)
    bounds = sorted({0, n, *(c for c in cuts if c <= n)})
    pieces = [count_jumps(points, eps, max_dim, owned=(a, b)) for a, b in zip(bounds[:-1], bounds[1:])]
    for (a, b), piece in zip(zip(bounds[:-1], bounds[1:]), pieces):
        check_table(piece, owned=b - a)
    values, jumps = merge_jumps([p.values for p in pieces], [p.jumps for p in pieces])
    whole = count_jumps(points, eps, max_dim)
    assert np.array_equal(values.view(np.int64), whole.values.view(np.int64))
    assert np.array_equal(jumps, whole.jumps)


@PROPERTY
@given(case=clouds(), cuts=st.lists(st.integers(0, 24), max_size=6))
def test_a_halo_is_enough(case: tuple[np.ndarray, float, int | None], cuts: list[int]) -> None:
    """Locality: a piece run on its halo only (its owned rows plus every row within eps of
    one of them, in increasing global id) gives the same table as on the full cloud."""
    points, eps, max_dim = case
    n = len(points)
    near = pairwise_lengths(points) <= eps
    bounds = sorted({0, n, *(c for c in cuts if c <= n)})
    for a, b in zip(bounds[:-1], bounds[1:]):
        rows = np.flatnonzero(near[a:b].any(axis=0) | ((np.arange(n) >= a) & (np.arange(n) < b)))
        start = int(np.searchsorted(rows, a))
        local = count_jumps(points[rows], eps, max_dim, owned=(start, start + b - a))
        full = count_jumps(points, eps, max_dim, owned=(a, b))
        assert tables_equal(local, full)


@PROPERTY
@given(case=clouds(max_points=40))
def test_threads_do_not_change_the_table(case: tuple[np.ndarray, float, int | None]) -> None:
    """threads=1 and threads=2 (and 3, more ranges than rows on tiny clouds) give the
    same jump table, bit for bit."""
    points, eps, max_dim = case
    one = count_jumps(points, eps, max_dim, threads=1)
    assert tables_equal(one, count_jumps(points, eps, max_dim, threads=2))
    assert tables_equal(one, count_jumps(points, eps, max_dim, threads=3))


@PROPERTY
@given(case=clouds(), data=st.data())
def test_row_order_does_not_change_the_table(case: tuple[np.ndarray, float, int | None], data: st.DataObject) -> None:
    """Relabelling the rows changes every tie break of the edge order, never the table."""
    points, eps, max_dim = case
    perm = np.array(data.draw(st.permutations(range(len(points)))), dtype=np.int64)
    assert tables_equal(count_jumps(points, eps, max_dim), count_jumps(points[perm], eps, max_dim))


def test_threads_on_a_larger_cloud() -> None:
    """Threads taking blocks of rows on 3,000 points, capped and uncapped."""
    points = np.random.default_rng(8).random((3000, 3))
    for max_dim in (1, 3, None):
        one = count_jumps(points, 0.09, max_dim, threads=1)
        assert tables_equal(one, count_jumps(points, 0.09, max_dim, threads=2))
        assert one.stats.vertices == 3000 and one.stats.edges == count_edges(points, 0.09)


# ------------------------------------------------------------------------- blocks


@pytest.fixture
def one_item_blocks(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every compiled loop in blocks of one item (edge, coarse bucket, tree node, sample of
    the edge estimate, leaf, row): the most cuts the drivers can make."""
    from chitally import blocks, kernel

    monkeypatch.setattr(blocks, "BLOCK_SECONDS", 1e-12)
    for name in ("_FIRST_EDGES", "_FIRST_ROWS", "_FIRST_LEAVES", "_FIRST_WORK"):
        monkeypatch.setattr(kernel, name, 0)
    monkeypatch.setattr(kernel, "_SAMPLED_ROWS", 64)  # the edge estimate, one sample a block


@pytest.mark.parametrize("max_dim", [1, 2, 3, 5, None])
def test_blocks_of_one_item_give_the_same_table(one_item_blocks: None, max_dim: int | None) -> None:
    """Cutting every loop into one-item blocks, on one thread or two, changes nothing:
    against one call per loop (blocks=False) and against gudhi (independent Rips)."""
    rng = np.random.default_rng(31)
    cloud = rng.random((260, 3))
    lattice = np.repeat(rng.integers(0, 3, (40, 3)).astype(np.float64), 2, axis=0)  # ties, copies
    for points, eps in ((lattice, SQRT2), (cloud, 0.2)):  # the cloud's table is kept below
        whole = count_jumps(points, eps, max_dim, blocks=False)
        for threads in (1, 2):
            assert tables_equal(count_jumps(points, eps, max_dim, threads=threads), whole)
            pieces = [count_jumps(points, eps, max_dim, owned=(a, b), threads=threads)
                      for a, b in ((0, 33), (33, 70), (70, len(points)))]
            values, jumps = merge_jumps([t.values for t in pieces], [t.jumps for t in pieces])
            assert np.array_equal(values, whole.values) and np.array_equal(jumps, whole.jumps)
    curve = Curve.from_jumps(whole.values, whole.jumps, eps=0.2, max_dim=max_dim, n_points=len(cloud))
    assert curve == gudhi_curve(cloud, 0.2, max_dim)


def test_blocks_of_one_item_in_many_coordinates(one_item_blocks: None) -> None:
    """The same beyond the unrolled widths (the generic distance loops), cap 2 by row
    walks and uncapped, against networkx enumerate_all_cliques (brute force)."""
    points = np.random.default_rng(32).random((70, 11))
    eps = edge_quantile(points, 0.15)
    for max_dim in (2, 3):
        assert kernel_curve(points, eps, max_dim) == brute_force_curve(points, eps, max_dim)


def test_join_grows_its_output_when_the_estimate_falls_short(monkeypatch: pytest.MonkeyPatch) -> None:
    """With no edge estimate the join starts at 4 edges a row and must grow its output
    many times on a dense cloud, also across blocks of leaves; the pairs are scipy's
    cKDTree.query_pairs filtered by the one rule (an independent KD-tree)."""
    from scipy.spatial import cKDTree

    from chitally import kernel
    from chitally.metric import pair_squared_distances, query_radius

    monkeypatch.setattr(kernel, "_sampled_edge_count", lambda *args: 0)
    points = np.random.default_rng(33).random((1500, 2))
    eps = 0.2  # about 180 neighbours a row
    pairs = cKDTree(points).query_pairs(query_radius(eps), output_type="ndarray")
    d2 = pair_squared_distances(points, pairs[:, 0], points, pairs[:, 1])
    keep = np.sqrt(d2) <= eps
    expected = sorted(zip(pairs[keep].min(axis=1).tolist(), pairs[keep].max(axis=1).tolist(), d2[keep].tolist()))
    assert len(expected) > 8 * 4 * len(points)  # at least three doublings
    reach = query_radius(eps)
    for first_leaves in (kernel._FIRST_LEAVES, 1):
        monkeypatch.setattr(kernel, "_FIRST_LEAVES", first_leaves)
        lo, hi, sq, count = kernel._tree_edges(points, eps, reach * reach, kernel._MAX_EDGES)
        assert sorted(zip(lo[:count].tolist(), hi[:count].tolist(), sq[:count].tolist())) == expected


def test_join_gives_up_past_the_edge_limit(monkeypatch: pytest.MonkeyPatch) -> None:
    """More edges than max_edges: m = -1, also when the limit is passed in an early block
    of leaves; at the exact count the edges are all there. Counted by brute force."""
    from chitally import kernel
    from chitally.metric import query_radius

    points = np.random.default_rng(34).random((900, 2))
    eps = 0.08
    total = count_edges(points, eps)
    reach = query_radius(eps)
    monkeypatch.setattr(kernel, "_sampled_edge_count", lambda *args: 0)
    monkeypatch.setattr(kernel, "_FIRST_LEAVES", 1)
    assert kernel._tree_edges(points, eps, reach * reach, total // 3)[3] == -1
    assert kernel._tree_edges(points, eps, reach * reach, total)[3] == total


@pytest.mark.parametrize("n", [0, 1, 2, 31, 32, 33, 64, 65, 200, 517])
def test_crowded_bucket_sort_matches_numpy_lexsort(n: int) -> None:
    """The merge sort for crowded buckets, by (d2, lo, hi), against numpy's lexsort, on
    records with many tied lengths and tied lower ends, at an offset inside the arrays."""
    from chitally import kernel

    rng = np.random.default_rng(n)
    pairs = rng.choice(60 * 60, size=n, replace=False)  # distinct (lo, hi)
    lo = (pairs // 60).astype(np.int32)
    hi = (pairs % 60 + 60).astype(np.int32)
    d2 = rng.integers(0, 4, n).astype(np.float64) / 4.0
    a = 5
    elo = np.concatenate([np.zeros(a, np.int32), lo, np.zeros(3, np.int32)])
    ehi = np.concatenate([np.zeros(a, np.int32), hi, np.zeros(3, np.int32)])
    ed2 = np.concatenate([np.zeros(a), d2, np.zeros(3)])
    scratch = (np.empty(n, np.int32), np.empty(n, np.int32), np.empty(n))
    kernel._sort_bucket_large(elo, ehi, ed2, a, a + n, *scratch)
    order = np.lexsort((hi, lo, d2))  # numpy: last key is the primary one
    assert np.array_equal(elo[a : a + n], lo[order]) and np.array_equal(ehi[a : a + n], hi[order])
    assert np.array_equal(ed2[a : a + n], d2[order])
    assert not elo[:a].any() and not elo[a + n :].any()


def test_read_only_and_strided_input_compile_nothing_new() -> None:
    """A read-only or non-contiguous halo gives the same table through the one compiled
    signature (the input is copied to a plain array first)."""
    from chitally import kernel

    points = np.random.default_rng(35).random((300, 6))
    plain = count_jumps(points, 0.5, 3)
    frozen = points.copy()
    frozen.setflags(write=False)
    wide = np.zeros((300, 12))
    wide[:, ::2] = points
    assert tables_equal(count_jumps(frozen, 0.5, 3), plain)
    assert tables_equal(count_jumps(wide[:, ::2], 0.5, 3), plain)
    for dispatcher in (kernel._join_leaves, kernel._split_nodes, kernel._sampled_edges):
        for sig in dispatcher.signatures:
            arrays = [t for t in sig if isinstance(t, nb_types.Array)]
            assert all(t.layout == "C" and t.mutable and t.aligned for t in arrays), sig


# ------------------------------------------------------------ portable bit extraction

SOFTWARE_PEXT_SCRIPT = """
import numpy as np
from chitally import kernel
assert kernel._pext is kernel._pext_sw, "expected the portable bit extraction"
from references import gudhi_curve
from test_kernel import hub_cloud, kernel_curve
points = np.random.default_rng(1).random((300, 3))
for max_dim in (4, None):
    assert kernel_curve(points, 0.25, max_dim) == gudhi_curve(points, 0.25, max_dim)
points = hub_cloud(64, 64)
for max_dim in (4, 5, None):
    assert kernel_curve(points, 1.0, max_dim) == gudhi_curve(points, 1.0, max_dim)
print("portable ok")
"""


@pytest.mark.slow
def test_portable_bit_extraction_matches_gudhi() -> None:
    """On a CPU without BMI2 the kernel compacts G_e with a portable bit extraction instead
    of the pext instruction. A subprocess compiled for a generic CPU (NUMBA_CPU_NAME=generic,
    so the fallback is chosen; a cold numba cache makes this take ~30 s) is compared with
    gudhi RipsComplex/SimplexTree (independent Rips implementation)."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    env = dict(os.environ, NUMBA_CPU_NAME="generic")
    env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).parent), env.get("PYTHONPATH", "")])
    done = subprocess.run(
        [sys.executable, "-c", SOFTWARE_PEXT_SCRIPT], env=env, capture_output=True, text=True, timeout=900
    )
    assert done.returncode == 0, done.stderr[-2000:]
    assert "portable ok" in done.stdout
