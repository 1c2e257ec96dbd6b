"""The greedy ball cover, checked against brute force over all pairs of small clouds."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from chitally.cover import build_cover
from chitally.metric import lengths, pair_squared_distances, query_radius


def all_distances(x: np.ndarray) -> np.ndarray:
    """Every pairwise distance by the one rule, as an (N, N) matrix."""
    n = x.shape[0]
    left, right = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    d2 = pair_squared_distances(x, left.ravel(), x, right.ravel())
    return lengths(d2).reshape(n, n)


def ball_of_rows(cover) -> np.ndarray:
    return np.repeat(np.arange(cover.n_balls), np.diff(cover.ball_offsets))


def check_cover(points: np.ndarray, eps: float, radius: float | None) -> None:
    """Every invariant of a cover, by brute force."""
    cover = build_cover(points, eps, radius)
    r = eps if radius is None else radius
    n = points.shape[0]
    assert cover.radius == r
    # order is a permutation, balls are non-empty contiguous ranges covering 0..N-1
    assert np.array_equal(np.sort(cover.order), np.arange(n))
    assert cover.ball_offsets[0] == 0 and cover.ball_offsets[-1] == n
    assert np.all(np.diff(cover.ball_offsets) > 0)
    assert cover.centres.shape == (cover.n_balls,)
    # a centre is picked before the rest of its ball, so it is the ball's first row
    assert np.array_equal(cover.centres, cover.ball_offsets[:-1])
    for name in ("order", "ball_offsets", "centres", "neighbour_offsets", "neighbour_balls"):
        assert getattr(cover, name).dtype == np.int64

    x = points[cover.order]
    dist = all_distances(x)
    owner = ball_of_rows(cover)
    to_centres = dist[:, cover.centres]
    # every row lies within R of its own centre (exact rule) ...
    assert np.all(to_centres[np.arange(n), owner] <= r)
    # ... and belongs to the first ball whose centre is within R of it: the greedy rule
    first = np.argmax(to_centres <= r, axis=1)
    assert np.array_equal(first, owner)
    # hence no centre lies within R of another one
    between = to_centres[cover.centres]
    np.fill_diagonal(between, np.inf)
    assert np.all(between > r)

    # neighbour lists: sorted, self included, symmetric
    nbrs = [
        cover.neighbour_balls[cover.neighbour_offsets[b] : cover.neighbour_offsets[b + 1]]
        for b in range(cover.n_balls)
    ]
    assert cover.neighbour_offsets[0] == 0
    assert cover.neighbour_offsets[-1] == cover.neighbour_balls.shape[0]
    pairs = set()
    for b, lst in enumerate(nbrs):
        assert np.all(np.diff(lst) > 0)
        assert b in lst
        pairs.update((b, int(o)) for o in lst)
    assert all((o, b) in pairs for b, o in pairs)
    # every ball holding an eps-neighbour of one of b's rows is listed (brute force)
    touches = np.zeros((cover.n_balls, cover.n_balls), dtype=bool)
    rows, cols = np.nonzero(dist <= eps)
    touches[owner[rows], owner[cols]] = True
    for b, lst in enumerate(nbrs):
        assert set(np.flatnonzero(touches[b])) <= set(lst.tolist())
    # the lists are the balls within 2R + eps of the centre, widened only by rounding
    for b, lst in enumerate(nbrs):
        must = np.flatnonzero(between[b] <= 2 * r + eps)
        may = np.flatnonzero(between[b] <= query_radius(2 * r + eps))
        assert set(must.tolist()) | {b} <= set(lst.tolist()) <= set(may.tolist()) | {b}


@pytest.mark.parametrize("dim", [2, 3, 5])
@pytest.mark.parametrize("eps,radius", [(0.1, None), (0.15, 0.05), (0.08, 0.2), (0.3, None)])
def test_invariants_on_random_clouds(dim: int, eps: float, radius: float | None) -> None:
    rng = np.random.default_rng(dim * 100 + int(eps * 1000))
    points = rng.random((400, dim))
    if dim == 5:
        points *= 0.5
    check_cover(points, eps, radius)


def test_invariants_on_clustered_cloud_with_deep_tree() -> None:
    rng = np.random.default_rng(7)
    centres = rng.random((12, 2)) * 10
    points = np.vstack([c + 0.2 * rng.standard_normal((250, 2)) for c in centres])
    check_cover(points, 0.1, None)
    check_cover(points, 0.05, 0.3)


def test_integer_lattice_ties_are_inside() -> None:
    # On a lattice, distances equal to R are exact: the boundary must be included.
    g = np.arange(8, dtype=np.float64)
    points = np.array(np.meshgrid(g, g, g)).reshape(3, -1).T
    check_cover(points, 1.0, None)
    check_cover(points, np.sqrt(2.0), 1.0)
    cover = build_cover(points, 1.0)
    # with ties at R the balls are unions of a point and some lattice neighbours
    assert cover.n_balls < points.shape[0]


def test_single_point() -> None:
    cover = build_cover(np.array([[0.5, -1.0, 2.0]]), 0.1)
    assert cover.n_balls == 1
    assert cover.order.tolist() == [0]
    assert cover.ball_offsets.tolist() == [0, 1]
    assert cover.centres.tolist() == [0]
    assert cover.neighbour_offsets.tolist() == [0, 1]
    assert cover.neighbour_balls.tolist() == [0]


def test_duplicate_points_share_a_ball() -> None:
    points = np.repeat(np.array([[0.0, 0.0], [5.0, 5.0], [0.0, 0.0]]), 40, axis=0)
    cover = build_cover(points, 0.5)
    assert cover.n_balls == 2
    check_cover(points, 0.5, None)
    for b in range(2):
        rows = cover.order[cover.ball_offsets[b] : cover.ball_offsets[b + 1]]
        assert np.unique(points[rows], axis=0).shape[0] == 1


def test_all_points_identical() -> None:
    points = np.zeros((300, 4))
    cover = build_cover(points, 1e-9)
    assert cover.n_balls == 1
    assert cover.ball_offsets.tolist() == [0, 300]


def test_points_far_apart_each_own_ball() -> None:
    points = np.arange(60, dtype=np.float64).reshape(-1, 2) * 10.0
    cover = build_cover(points, 1.0)
    assert cover.n_balls == 30
    assert np.array_equal(np.diff(cover.neighbour_offsets), np.ones(30, dtype=np.int64))
    assert np.array_equal(cover.neighbour_balls, np.arange(30))


def test_consecutive_balls_are_spatial_neighbours() -> None:
    rng = np.random.default_rng(3)
    points = rng.random((20_000, 2))
    cover = build_cover(points, 0.01)
    c = points[cover.order][cover.centres]
    step = np.linalg.norm(np.diff(c, axis=0), axis=1)
    random_pairs = np.linalg.norm(c - c[rng.permutation(len(c))], axis=1)
    # The leaf order walks the plane in short steps; a random order jumps ~0.5 on average.
    assert np.median(step) < 0.05 * np.median(random_pairs)
    # Rows inside a ball, and balls one after another, follow a KD-tree leaf order, so a
    # run of consecutive rows spans a small box.
    x = points[cover.order]
    spans = [np.ptp(x[k : k + 1000], axis=0).max() for k in range(0, 20_000, 1000)]
    assert np.median(spans) < 0.5


def test_larger_cloud_partition_and_radius() -> None:
    # Enough rows for a deep tree; checked without the quadratic brute force.
    rng = np.random.default_rng(11)
    points = rng.random((60_000, 3))
    eps = 0.03
    cover = build_cover(points, eps)
    assert np.array_equal(np.sort(cover.order), np.arange(60_000))
    x = points[cover.order]
    owner = ball_of_rows(cover)
    d2 = pair_squared_distances(x, np.arange(60_000), x, cover.centres[owner])
    assert np.all(lengths(d2) <= eps)


@pytest.mark.parametrize(
    "points,eps,radius",
    [
        (np.zeros((0, 3)), 0.1, None),
        (np.zeros(5), 0.1, None),
        (np.zeros((4, 2)), 0.0, None),
        (np.zeros((4, 2)), -1.0, None),
        (np.zeros((4, 2)), 0.1, 0.0),
        (np.zeros((4, 2)), float("nan"), None),
        (np.array([[0.0, np.inf]]), 0.1, None),
    ],
)
def test_rejects_bad_input(points: np.ndarray, eps: float, radius: float | None) -> None:
    with pytest.raises(ValueError):
        build_cover(points, eps, radius)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    n=st.integers(1, 120),
    dim=st.integers(1, 4),
    grid=st.integers(1, 6),
    eps_units=st.integers(1, 5),
    radius_factor=st.sampled_from([None, 0.5, 1.0, 2.0]),
    seed=st.integers(0, 2**31 - 1),
)
def test_property_invariants_on_lattices(n, dim, grid, eps_units, radius_factor, seed) -> None:
    # Integer lattices make exact ties at distance R and eps common.
    rng = np.random.default_rng(seed)
    points = rng.integers(0, grid, size=(n, dim)).astype(np.float64)
    eps = float(eps_units) * 0.5
    radius = None if radius_factor is None else radius_factor * eps
    check_cover(points, eps, radius)
