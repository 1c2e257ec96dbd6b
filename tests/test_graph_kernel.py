"""The per-graph lower-star kernel of the batch path (`lower_star_row`) and its order.

Every row is checked against networkx's clique listing, simplex by simplex
(tests/graph_references.py `brute_force_jumps`, built on ``nx.enumerate_all_cliques``),
sampled on a grid by summing the jumps of value <= t. The graphs are chosen to reach
each of the kernel's paths: bitset lower rows of one and of several words, plain lower
rows (more than 64 * BIT_WORDS vertices), lower links with and without triangles, a hub
whose lower link compacts to more than 64 vertices, ties in values, isolated vertices,
values sorted by counting and by merging.
"""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
from graph_references import brute_force_jumps, edge_value_map

from chitally.graph_data import GraphData
from chitally.graph_kernel import (
    BIT_WORDS,
    UNCAPPED,
    degree_square_sum,
    degree_values,
    lower_star_degree_row,
    lower_star_row,
    stable_order,
)

CAPS = [0, 1, 2, 3, None]


def with_cliques(n: int, p: float, sizes: list[int], seed: int, extra_isolated: int = 0) -> GraphData:
    """G(n, p) with cliques of the given sizes planted on random vertices, and
    `extra_isolated` vertices without an edge after them."""
    rng = np.random.default_rng(seed)
    G = nx.gnp_random_graph(n, p, seed=seed)
    for k in sizes:
        nodes = rng.choice(n, size=k, replace=False).tolist()
        G.add_edges_from((a, b) for i, a in enumerate(nodes) for b in nodes[i + 1:])
    edges = np.array(list(G.edges), dtype=np.int64).reshape(-1, 2)
    return GraphData.from_edges(edges, n + extra_isolated)


def hub_graph(rim: int, seed: int) -> GraphData:
    """A sparse graph on `rim` vertices with a few triangles and a K4, and one hub joined
    to all of them: the hub's lower link (degree filtration: the hub comes last) is the
    whole rim, more than 64 vertices once compacted."""
    rng = np.random.default_rng(seed)
    G = nx.cycle_graph(rim)
    G.add_edges_from((int(a), int(b)) for a, b in rng.integers(0, rim, size=(rim // 2, 2)) if a != b)
    G.add_edges_from([(0, 2), (1, 3), (0, 3)])  # {0, 1, 2, 3} is a K4
    G.add_edges_from((rim, v) for v in range(rim))
    edges = np.array(list(G.edges), dtype=np.int64).reshape(-1, 2)
    return GraphData.from_edges(edges, rim + 1)


def brute_row(g: GraphData, f: np.ndarray, cap, grid: np.ndarray, threshold=None) -> np.ndarray:
    """networkx brute force (graph_references.brute_force_jumps, nx.enumerate_all_cliques):
    each clique valued by the largest value of its vertices, chi at every grid point."""
    values, jumps = brute_force_jumps(g.n, g.edges, f, edge_value_map(g.edges, f), max_dim=cap,
                                      threshold=threshold)
    values, jumps = np.asarray(values, dtype=np.float64), np.asarray(jumps, dtype=np.int64)
    return np.array([int(jumps[values <= t].sum()) for t in grid], dtype=np.int64)


def kernel_row(g: GraphData, f: np.ndarray, cap, grid: np.ndarray, threshold=None) -> np.ndarray:
    row = np.zeros(grid.size + 1, dtype=np.int64)
    stats = np.zeros(5, dtype=np.int64)
    thr = math.inf if threshold is None else float(threshold)
    lower_star_row(g.edges, np.ascontiguousarray(f, dtype=np.float64), thr,
                   UNCAPPED if cap is None else cap, grid, row, stats)
    return np.cumsum(row)[:grid.size]


def degrees_written_out(g: GraphData) -> np.ndarray:
    f = np.zeros(g.n)
    for u, v in g.edges:
        f[u] += 1
        f[v] += 1
    return f


GRAPHS = {
    # one-word bitsets, dense enough for lower links with triangles, isolated vertices
    "small": lambda: with_cliques(40, 0.25, [5, 4], seed=1, extra_isolated=3),
    # several words (65..512 vertices)
    "mid": lambda: with_cliques(200, 0.03, [6, 5, 4, 4], seed=2),
    # more than 64 * BIT_WORDS vertices: plain lower rows
    "large": lambda: with_cliques(64 * BIT_WORDS + 90, 0.008, [6, 5, 4], seed=3, extra_isolated=2),
    # a lower link of more than 64 vertices after compaction
    "hub": lambda: hub_graph(90, seed=4),
}


@pytest.mark.parametrize("cap", CAPS)
@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_degree_rows_equal_networkx_brute_force(name, cap):
    g = GRAPHS[name]()
    f = degrees_written_out(g)
    grid = np.arange(-1.0, f.max() + 2.0, 1.0)
    expected = brute_row(g, f, cap, grid)
    assert np.array_equal(kernel_row(g, f, cap, grid), expected)
    # the degrees found in the same call, and negated (superlevel) against -f
    for sign, want in ((1.0, expected), (-1.0, brute_row(g, -f + 0.0, cap, -grid[::-1]))):
        row = np.zeros(grid.size + 1, dtype=np.int64)
        lower_star_degree_row(g.edges, g.n, sign, math.inf, UNCAPPED if cap is None else cap,
                              sign * grid[::int(sign)], row, np.zeros(5, dtype=np.int64))
        assert np.array_equal(np.cumsum(row)[:grid.size], want)


@pytest.mark.parametrize("cap", CAPS)
@pytest.mark.parametrize("kind", ["ties", "floats", "wide", "superlevel"])
def test_other_values_and_thresholds_equal_networkx_brute_force(kind, cap):
    g = with_cliques(120, 0.06, [6, 5, 4], seed=5, extra_isolated=2)
    rng = np.random.default_rng(6)
    if kind == "ties":  # three values: most vertices tie, ids break the ties
        f = rng.integers(0, 3, size=g.n).astype(np.float64)
    elif kind == "floats":  # sorted by merging
        f = rng.normal(size=g.n)
    elif kind == "wide":  # integers over a range too wide to count
        f = rng.integers(-10**9, 10**9, size=g.n).astype(np.float64)
    else:  # superlevel as the batch path takes it: degrees negated
        f = -degrees_written_out(g) + 0.0
    grid = np.quantile(f, np.linspace(0.0, 1.0, 17))
    assert np.array_equal(kernel_row(g, f, cap, grid), brute_row(g, f, cap, grid))
    # a threshold inside the values: the simplices above it are not counted
    thr = float(np.quantile(f, 0.6))
    assert np.array_equal(kernel_row(g, f, cap, grid, thr), brute_row(g, f, cap, grid, thr))


def test_empty_and_edgeless_graphs():
    grid = np.array([-1.0, 0.0, 1.0])
    empty = GraphData.from_edges(np.zeros((0, 2), dtype=np.int64), 0)
    assert np.array_equal(kernel_row(empty, np.zeros(0), None, grid), [0, 0, 0])
    points = GraphData.from_edges(np.zeros((0, 2), dtype=np.int64), 4)
    # four isolated points at value 0 (closed form: chi = 4 from 0 on)
    assert np.array_equal(kernel_row(points, np.zeros(4), None, grid), [0, 4, 4])


@pytest.mark.parametrize("vals", [
    np.array([2.0, 1.0, 2.0, 0.0, 1.0, 2.0]),
    np.array([-0.0, 0.0, -1.0, -0.0, 3.0]),
    np.array([0.5, -0.5, 0.5, 1e300, -1e300]),
    np.array([5e9, 1.0, 5e9, -3.0]),
    np.zeros(0),
    np.random.default_rng(7).integers(0, 4, size=1000).astype(np.float64),
])
def test_stable_order_is_numpys_stable_argsort(vals):
    # numpy's stable argsort: (value, index) order
    assert np.array_equal(stable_order(vals), np.argsort(vals, kind="stable"))


def test_degree_helpers_equal_numpy():
    g = with_cliques(50, 0.1, [4], seed=8, extra_isolated=2)
    d = np.bincount(g.edges.ravel(), minlength=g.n)  # numpy's count of each vertex's edges
    assert np.array_equal(degree_values(g.edges, g.n, -1.0), -d.astype(np.float64))
    assert degree_square_sum(g.edges, g.n) == float(np.dot(d, d))


@pytest.mark.parametrize("values", ["auto", "degree", None])
def test_batch_rows_of_vertex_values_equal_networkx_brute_force(values):
    from chitally.jobs.batch import graph_rows

    graphs = [GRAPHS["small"](), with_cliques(30, 0.3, [5], seed=9),
              GraphData.from_edges(np.zeros((0, 2), dtype=np.int64), 2)]
    grid = np.arange(-1.0, 25.0, 0.5)
    rows = graph_rows(graphs, values, None, None, False, None, grid)
    for g, row in zip(graphs, rows):
        # None puts every vertex at 0; "auto" without weights is the degree
        f = np.zeros(g.n) if values is None else degrees_written_out(g)
        assert np.array_equal(row, brute_row(g, f, None, grid))
