"""The planner: exact halos, a partition of the rows, costs, grouping and splitting."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from chitally.cover import build_cover
from chitally.metric import lengths, pair_squared_distances
from chitally.plan import Plan
from chitally.planner import (
    DEFAULT_MAX_TASK_ROWS,
    make_plan,
    summarise_plan,
)


def adjacency(x: np.ndarray, eps: float) -> np.ndarray:
    """The eps-graph by brute force over all pairs, by the one rule, self loops included."""
    n = x.shape[0]
    left, right = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    d2 = pair_squared_distances(x, left.ravel(), x, right.ravel())
    return (lengths(d2) <= eps).reshape(n, n)


def plan_for(points: np.ndarray, eps: float, radius: float | None = None, max_dim=None, **kw):
    cover = build_cover(points, eps, radius)
    x = points[cover.order]
    return x, cover, make_plan(x, cover, eps, max_dim, **kw)


def check_plan(x: np.ndarray, cover, plan: Plan, eps: float, max_dim) -> None:
    """Partition, exact halos, costs, order and memory estimates, by brute force."""
    n, dim = x.shape
    adj = adjacency(x, eps)
    deg = adj.sum(axis=1) - 1
    assert plan.n_points == n and plan.dim == dim and plan.eps == eps
    assert plan.cover_radius == cover.radius
    # tasks own contiguous ranges that cover every row exactly once
    owned = np.zeros(n, dtype=np.int64)
    for k in range(plan.n_tasks):
        assert 0 <= plan.row_start[k] < plan.row_stop[k] <= n
        owned[plan.row_start[k] : plan.row_stop[k]] += 1
    assert np.all(owned == 1)
    assert plan.halo_offsets[0] == 0 and plan.halo_offsets[-1] == plan.halo_rows.shape[0]
    linear = max_dim is not None and max_dim <= 1
    row_cost = deg + 1.0 if linear else deg.astype(float) ** 2 + 1.0
    for k in range(plan.n_tasks):
        task = plan.task(k)
        rows = np.arange(task.row_start, task.row_stop)
        # the halo is exactly the rows within eps of an owned row, owned rows included
        expected = np.flatnonzero(adj[rows].any(axis=0))
        assert np.array_equal(task.halo, expected), k
        assert task.cost == pytest.approx(row_cost[rows].sum(), rel=1e-12)
        halo_edges = int(deg[expected].sum())
        upper = np.triu(adj, 1)[rows].sum()
        frame = (int(deg[rows].max()) ** 2 + 7) // 8
        mem = expected.size * (dim * 8 + 8) + halo_edges * 24 + int(upper) * 16 + 2 * frame
        assert task.memory == mem
    # heaviest first, ties by row_start
    key = list(zip(-plan.cost, plan.row_start))
    assert key == sorted(key)
    for arr in (plan.row_start, plan.row_stop, plan.halo_offsets, plan.halo_rows, plan.memory):
        assert arr.dtype == np.int64


@pytest.mark.parametrize("dim,eps,radius", [
    (2, 0.05, None), (2, 0.08, 0.03), (2, 0.04, 0.1),
    (3, 0.12, None), (3, 0.2, 0.1), (3, 0.1, 0.25),
    (5, 0.35, None), (5, 0.5, 0.2),
])
@pytest.mark.parametrize("task_cost", [None, 500.0, 5_000.0])
def test_halos_and_partition_on_random_clouds(dim, eps, radius, task_cost) -> None:
    rng = np.random.default_rng(dim * 1000 + int(eps * 100))
    points = rng.random((600, dim))
    x, cover, plan = plan_for(points, eps, radius, task_cost=task_cost)
    check_plan(x, cover, plan, eps, None)
    if task_cost is not None:
        assert plan.n_tasks > 1


@pytest.mark.parametrize("max_dim", [None, 0, 1, 2, 5])
def test_cost_model_follows_the_cap(max_dim) -> None:
    rng = np.random.default_rng(5)
    points = rng.random((300, 2))
    x, cover, plan = plan_for(points, 0.1, max_dim=max_dim, task_cost=200.0)
    check_plan(x, cover, plan, 0.1, max_dim)
    assert plan.max_dim == max_dim


def test_heavy_ball_is_split_by_rows() -> None:
    rng = np.random.default_rng(1)
    # one dense clump (a single ball, every row of degree ~199) among sparse points
    clump = 0.001 * rng.random((200, 3))
    sparse = 5.0 + 10.0 * rng.random((300, 3))
    points = np.vstack([sparse, clump])
    eps = 0.05
    x, cover, plan = plan_for(points, eps, task_cost=50 * (199**2 + 1))
    check_plan(x, cover, plan, eps, None)
    sizes = np.diff(cover.ball_offsets)
    heavy = int(np.argmax(sizes))
    assert sizes[heavy] == 200
    lo, hi = cover.ball_offsets[heavy], cover.ball_offsets[heavy + 1]
    inside = (plan.row_start >= lo) & (plan.row_stop <= hi)
    # the clump's 200 rows are cut into tasks of at most 50 rows
    assert inside.sum() >= 4
    assert np.all((plan.row_stop - plan.row_start)[inside] <= 50)
    # every piece of the clump needs the whole clump as its halo
    for k in np.flatnonzero(inside):
        assert np.all(np.isin(np.arange(lo, hi), plan.task(int(k)).halo))


def test_max_task_rows_splits_a_big_ball() -> None:
    points = np.zeros((250, 2))
    x, cover, plan = plan_for(points, 1.0, max_task_rows=100)
    check_plan(x, cover, plan, 1.0, None)
    assert cover.n_balls == 1
    assert sorted((plan.row_stop - plan.row_start).tolist()) == [50, 100, 100]


def test_small_balls_are_grouped() -> None:
    # isolated points: one ball each, cost 1 each; the default groups them all
    points = np.arange(200, dtype=np.float64).reshape(-1, 2) * 10.0
    x, cover, plan = plan_for(points, 1.0)
    check_plan(x, cover, plan, 1.0, None)
    assert cover.n_balls == 100
    assert plan.n_tasks == 1
    assert plan.row_start.tolist() == [0] and plan.row_stop.tolist() == [100]
    # with a row cap, groups of ten balls
    x, cover, plan = plan_for(points, 1.0, max_task_rows=10)
    check_plan(x, cover, plan, 1.0, None)
    assert plan.n_tasks == 10
    assert np.all(plan.row_stop - plan.row_start == 10)


def test_grouping_keeps_tasks_spatially_compact() -> None:
    rng = np.random.default_rng(2)
    points = rng.random((40_000, 2))
    eps = 0.005
    x, cover, plan = plan_for(points, eps, task_cost=None)
    # the default target gives ~10^4 rows per task here, many balls per task
    assert plan.n_tasks >= 3
    balls_per_task = [
        np.count_nonzero((cover.ball_offsets >= a) & (cover.ball_offsets < b))
        for a, b in zip(plan.row_start, plan.row_stop)
    ]
    assert np.median(balls_per_task) > 100
    # a compact task reads little more than its own rows
    assert plan.replication() < 1.3


def test_default_target_bounds() -> None:
    rng = np.random.default_rng(4)
    points = rng.random((30_000, 2))
    x, cover, plan = plan_for(points, 0.01)
    total = plan.cost.sum()
    target = max(total / 256, total * 10_000 / 30_000)
    assert plan.cost.max() <= target
    assert np.all(plan.row_stop - plan.row_start <= DEFAULT_MAX_TASK_ROWS)


def test_single_point() -> None:
    x, cover, plan = plan_for(np.array([[1.0, 2.0]]), 0.5)
    check_plan(x, cover, plan, 0.5, None)
    assert plan.n_tasks == 1
    assert plan.task(0).halo.tolist() == [0]
    assert plan.cost.tolist() == [1.0]
    assert plan.replication() == 1.0


def test_duplicate_points() -> None:
    rng = np.random.default_rng(8)
    base = rng.random((60, 3))
    points = np.vstack([base, base[:30], base[:10]])
    x, cover, plan = plan_for(points, 0.2, task_cost=300.0)
    check_plan(x, cover, plan, 0.2, None)
    # identical rows are distinct vertices joined by a 0-length edge
    x, cover, plan = plan_for(np.zeros((40, 2)), 0.1)
    check_plan(x, cover, plan, 0.1, None)
    assert plan.cost.sum() == 40 * (39**2 + 1)


def test_points_far_apart_have_trivial_halos() -> None:
    points = np.arange(90, dtype=np.float64).reshape(-1, 3) * 7.0
    x, cover, plan = plan_for(points, 1.0, max_task_rows=4)
    check_plan(x, cover, plan, 1.0, None)
    assert plan.replication() == 1.0
    for k in range(plan.n_tasks):
        t = plan.task(k)
        assert t.halo.tolist() == list(range(t.row_start, t.row_stop))


def test_integer_lattice_ties() -> None:
    g = np.arange(6, dtype=np.float64)
    points = np.array(np.meshgrid(g, g, g)).reshape(3, -1).T
    for eps in (1.0, np.sqrt(2.0), np.sqrt(3.0)):
        x, cover, plan = plan_for(points, eps, task_cost=2_000.0)
        check_plan(x, cover, plan, eps, None)


def test_summary_is_plain_json() -> None:
    rng = np.random.default_rng(9)
    points = rng.random((2_000, 3))
    x, cover, plan = plan_for(points, 0.1, max_dim=3, task_cost=20_000.0)
    summary = summarise_plan(plan, cover)
    assert json.loads(json.dumps(summary)) == summary
    assert summary["balls"] == cover.n_balls
    assert summary["tasks"] == plan.n_tasks
    assert summary["replication"] == plan.replication()
    assert summary["total_cost"] == pytest.approx(plan.cost.sum())
    assert summary["heaviest_task_cost"] == plan.cost[0]
    assert summary["heaviest_task_memory"] == plan.memory[0]
    assert summary["max_task_memory"] == plan.memory.max()
    halo = plan.halo_sizes()
    expected = {"min": int(halo.min()), "median": float(np.median(halo)), "max": int(halo.max())}
    assert summary["halo_rows"] == expected
    owned = plan.row_stop - plan.row_start
    assert summary["owned_rows"]["max"] == int(owned.max())
    assert summary["max_dim"] == 3


def test_plan_digest_is_deterministic() -> None:
    rng = np.random.default_rng(10)
    points = rng.random((3_000, 3))
    a = plan_for(points, 0.08, task_cost=10_000.0)[2]
    b = plan_for(points, 0.08, task_cost=10_000.0)[2]
    assert a.digest() == b.digest()
    assert np.array_equal(a.memory, b.memory) and np.array_equal(a.cost, b.cost)


def test_rejects_bad_input() -> None:
    points = np.random.default_rng(0).random((50, 2))
    cover = build_cover(points, 0.1)
    x = points[cover.order]
    with pytest.raises(ValueError):
        make_plan(x[:-1], cover, 0.1, None)
    with pytest.raises(ValueError):
        make_plan(x, cover, 0.0, None)
    with pytest.raises(ValueError):
        make_plan(x, cover, 0.1, -1)
    with pytest.raises(ValueError):
        make_plan(x, cover, 0.1, None, task_cost=0.0)
    with pytest.raises(ValueError):
        make_plan(x, cover, 0.1, None, max_task_rows=0)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    n=st.integers(1, 150),
    dim=st.integers(1, 5),
    grid=st.integers(1, 6),
    eps_units=st.integers(1, 6),
    radius_factor=st.sampled_from([None, 0.5, 1.0, 1.5, 3.0]),
    task_cost=st.one_of(st.none(), st.floats(1.0, 5_000.0)),
    max_task_rows=st.one_of(st.none(), st.integers(1, 40)),
    jitter=st.booleans(),
    seed=st.integers(0, 2**31 - 1),
)
def test_property_partition_and_exact_halos(
    n, dim, grid, eps_units, radius_factor, task_cost, max_task_rows, jitter, seed
) -> None:
    # Lattice points give exact ties at eps; jitter gives generic positions.
    rng = np.random.default_rng(seed)
    points = rng.integers(0, grid, size=(n, dim)).astype(np.float64)
    if jitter:
        points += 0.3 * rng.random((n, dim))
    eps = 0.5 * eps_units
    radius = None if radius_factor is None else radius_factor * eps
    x, cover, plan = plan_for(points, eps, radius, task_cost=task_cost, max_task_rows=max_task_rows)
    check_plan(x, cover, plan, eps, None)
    if max_task_rows is not None:
        assert np.all(plan.row_stop - plan.row_start <= max_task_rows)
