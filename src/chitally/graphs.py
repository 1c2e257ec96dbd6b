"""Exact Euler characteristic curves of graphs' clique complexes.

Two filtrations of the clique complex of a graph (every clique is a simplex):

* **Vertex values** (lower star, `vertex_filtration`): each vertex has a real value
  (its degree by default, an array, a node attribute, closeness centrality or a heat
  kernel signature) and a simplex takes the largest value of its vertices, ties broken
  by vertex id. The curve counts, at scale t, the simplices of value <= t; its domain
  is ``[smallest value, largest value]``. With ``superlevel=True`` the filtration runs
  from the largest value down: it is stored as the sublevel curve of ``-f``, so the
  superlevel Euler characteristic at threshold s (simplices whose vertices all have
  ``f >= s``) is ``curve.at(-s)`` and the domain is ``[-max f, -min f]``.
* **Edge values** (flag, `edge_filtration`): each edge has a real weight and a simplex
  takes the largest value of its edges and vertices. Vertices sit at given values, or
  by default at ``min(0, smallest weight of an edge at the vertex)`` (0 for the usual
  non-negative weights, as for point clouds; a vertex whose edges are negative enters
  with its first edge, so the complex is a filtration for any real weights). An edge's
  value is ``max(weight, its endpoints' values)``. A dense distance matrix
  (`matrix_curve`) is the complete graph on its entries, cut at a threshold.

The counting is exact and never lists simplices: per vertex for vertex values (the
cliques of the lower link, `chitally.graph_kernel`), per edge for edge values (the
point-cloud kernel's `count_range` with the edge order read from the weights).

Splitting one graph over tasks. `graph_jumps` counts the jumps owned by a vertex range
``[lo, hi)``: the vertices in it and, for edge values, the edges whose lower endpoint is
in it; the tables of disjoint ranges add up to the whole curve. The range's halo is the
subgraph induced on the range and its neighbours (`FilteredGraph.halo`): a vertex's lower
link lies among its neighbours, and so does every G_e of an edge at it. The halo keeps
vertex ids in increasing order, so the (value, id) and (value, lower id, higher id) tie
breaks are the same as in the whole graph.

Inputs (networkx graphs, edge arrays, scipy sparse matrices) become `GraphData` through
`chitally.graph_data`, which also resolves vertex values; files are read by
`chitally.graph_sources`.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .curve import Curve, merge_jumps
from .graph_data import (
    GraphData,
    _edge_values,
    _is_networkx,
    _is_sparse,
    _numeric,
    as_graph,
    validate_distance_matrix,
    vertex_values,
    vertex_values_array,
)
from .graph_kernel import UNCAPPED, fill_csr_by_rank, fill_csr_by_vertex_rank, lower_star_range
from .kernel import count_range
from .sources import InputError

__all__ = [
    "FilteredGraph",
    "GraphData",
    "as_graph",
    "curve_domain",
    "edge_filtration",
    "filtered_graph",
    "gather_halo",
    "graph_curve",
    "graph_jumps",
    "matrix_curve",
    "matrix_filtration",
    "owned_jumps",
    "vertex_filtration",
    "vertex_values",
]

_STAT_SLOTS = 5


# ------------------------------------------------------------------ filtered graphs


@dataclass(frozen=True, eq=False)
class FilteredGraph:
    """A graph in CSR form with a filtration, as the counting kernels read it.

    Attributes
    ----------
    kind : {"vertex", "edge"}
        Lower-star filtration of vertex values, or flag filtration of edge values.
    offsets : ndarray of int64 (n + 1)
    nbrs : ndarray of int32 (2m)
        CSR rows: for ``"vertex"`` sorted by the neighbours' position in the (value, id)
        order; for ``"edge"`` sorted by edge rank.
    vertex_values : ndarray of float64 (n)
        Each vertex's value (its scale in the curve).
    vrank : ndarray of int64 (n) or None
        ``"vertex"``: each vertex's position in the (value, id) order (only compared).
    erank : ndarray of int32 (2m) or None
        ``"edge"``: the rank of the edge of each CSR entry in the (value, lower id,
        higher id) order.
    edge_values : ndarray of float64 (m) or None
        ``"edge"``: the value of the edge of each rank.
    edge_lo : ndarray of int32 (m) or None
        ``"edge"``: the lower endpoint of the edge of each rank (its owner).
    threshold : float
        Simplices of larger value are not counted (``inf``: none is dropped).
    ids : ndarray of int64 (n) or None
        For a halo, the vertex ids in the whole graph; None for a whole graph.
    """

    kind: str
    offsets: np.ndarray
    nbrs: np.ndarray
    vertex_values: np.ndarray
    vrank: np.ndarray | None = None
    erank: np.ndarray | None = None
    edge_values: np.ndarray | None = None
    edge_lo: np.ndarray | None = None
    threshold: float = math.inf
    ids: np.ndarray | None = None

    @property
    def n_vertices(self) -> int:
        return int(self.offsets.shape[0]) - 1

    @property
    def n_edges(self) -> int:
        return int(self.nbrs.shape[0]) // 2

    def value_range(self) -> tuple[float, float] | None:
        """(smallest, largest) value of a simplex counted, or None if none is."""
        v = self.vertex_values[self.vertex_values <= self.threshold]
        if v.size == 0:
            return None
        top = float(v.max())
        if self.kind == "edge" and self.edge_values is not None and self.edge_values.size:
            top = max(top, float(self.edge_values.max()))
        return float(v.min()), top

    def halo(self, lo: int, hi: int) -> tuple[FilteredGraph, int, int]:
        """The subgraph a task owning vertices [lo, hi) needs, and its owned range there.

        The halo is induced on the owned vertices and all their neighbours; its vertices
        keep their relative id order (so ties break as in the whole graph) and its edges
        their relative rank order. ``graph_jumps(halo, a, b)`` equals
        ``graph_jumps(self, lo, hi)``.

        Returns
        -------
        (FilteredGraph, int, int)
            The halo (its ``ids`` map local to global vertex ids) and the owned range in
            local ids.
        """
        n = self.n_vertices
        if not (0 <= lo <= hi <= n):
            raise ValueError(f"vertex range [{lo}, {hi}) does not fit a graph of {n} vertices")
        sub, a, b = gather_halo(self.kind, lo, hi, lambda name, sel: getattr(self, name)[sel],
                                self.threshold)
        if self.ids is not None:
            sub = replace(sub, ids=self.ids[sub.ids])
        return sub, a, b

    def arrays(self) -> dict[str, np.ndarray]:
        """The arrays that define the filtration, by name (`FILTRATION_ARRAYS` of its kind)."""
        return {name: getattr(self, name) for name in FILTRATION_ARRAYS[self.kind]}


#: The arrays of a filtered graph of each kind, as `gather_halo` reads them.
FILTRATION_ARRAYS = {
    "vertex": ("offsets", "nbrs", "vertex_values", "vrank"),
    "edge": ("offsets", "nbrs", "vertex_values", "erank", "edge_values", "edge_lo"),
}


def gather_halo(kind: str, lo: int, hi: int, take: Callable[[str, Any], np.ndarray],
                threshold: float = math.inf) -> tuple[FilteredGraph, int, int]:
    """The halo of the vertex range [lo, hi), read from a filtered graph's arrays by `take`.

    ``take(name, selection)`` returns ``array[selection]`` of the array `name` of
    `FILTRATION_ARRAYS` (a slice, or a sorted int64 index array, never empty). In
    memory it indexes the arrays (`FilteredGraph.halo`); a run store's task reads them
    from the store, so a task never holds more of the graph than its halo.

    Returns
    -------
    (FilteredGraph, int, int)
        The halo with ``ids`` its global vertex ids, and the owned range in local ids.
    """
    if kind not in FILTRATION_ARRAYS:
        raise ValueError(f"unknown filtration kind {kind!r}")
    if hi <= lo:
        empty_i = np.zeros(0, dtype=np.int32)
        sub = FilteredGraph(kind, np.zeros(1, dtype=np.int64), empty_i, np.zeros(0),
                            vrank=np.zeros(0, dtype=np.int64) if kind == "vertex" else None,
                            erank=empty_i if kind == "edge" else None,
                            edge_values=np.zeros(0) if kind == "edge" else None,
                            edge_lo=empty_i if kind == "edge" else None,
                            threshold=threshold, ids=np.zeros(0, dtype=np.int64))
        return sub, 0, 0
    own = take("offsets", slice(lo, hi + 1))
    around = take("nbrs", slice(int(own[0]), int(own[-1])))
    ids = np.unique(np.concatenate([np.arange(lo, hi, dtype=np.int64), around.astype(np.int64)]))
    # each halo vertex's row bounds, in one read
    bounds = np.union1d(ids, ids + 1)
    row_ends = take("offsets", bounds).astype(np.int64)
    starts = row_ends[np.searchsorted(bounds, ids)]
    deg = row_ends[np.searchsorted(bounds, ids + 1)] - starts
    total = int(deg.sum())
    # every CSR entry of every halo vertex, row by row (rows ascending, so sorted)
    entry = np.repeat(starts - np.concatenate([[0], np.cumsum(deg)[:-1]]), deg) + np.arange(total)
    row = np.repeat(np.arange(ids.shape[0]), deg)
    nb = take("nbrs", entry).astype(np.int64) if total else np.zeros(0, dtype=np.int64)
    pos = np.minimum(np.searchsorted(ids, nb), max(ids.shape[0] - 1, 0))
    keep = ids[pos] == nb
    entry, row, nbrs = entry[keep], row[keep], pos[keep].astype(np.int32)
    offsets = np.zeros(ids.shape[0] + 1, dtype=np.int64)
    np.cumsum(np.bincount(row, minlength=ids.shape[0]), out=offsets[1:])
    a, b = int(np.searchsorted(ids, lo)), int(np.searchsorted(ids, hi))
    values = take("vertex_values", ids)
    if kind == "vertex":
        sub = FilteredGraph("vertex", offsets, nbrs, values, vrank=take("vrank", ids),
                            threshold=threshold, ids=ids)
        return sub, a, b
    granks = take("erank", entry) if entry.size else np.zeros(0, dtype=np.int32)
    kept, local_rank = np.unique(granks, return_inverse=True)
    kept = kept.astype(np.int64)
    edge_lo = take("edge_lo", kept) if kept.size else np.zeros(0, dtype=np.int32)
    sub = FilteredGraph(
        "edge", offsets, nbrs, values,
        erank=local_rank.astype(np.int32).reshape(-1),
        edge_values=take("edge_values", kept) if kept.size else np.zeros(0),
        edge_lo=np.searchsorted(ids, edge_lo).astype(np.int32),
        threshold=threshold, ids=ids,
    )
    return sub, a, b


def _check_threshold(threshold: Any) -> float:
    if threshold is None:
        return math.inf
    if not _numeric(threshold) or not math.isfinite(float(threshold)):
        raise InputError(f"threshold must be a finite number or None, got {threshold!r}")
    return float(threshold) + 0.0


def vertex_filtration(graph: GraphData, values: np.ndarray, threshold: float | None = None) -> FilteredGraph:
    """The lower-star filtration of a graph's clique complex by vertex values.

    Parameters
    ----------
    graph : GraphData
    values : array_like of float (n)
        The value of every vertex (see `vertex_values`); ties are broken by vertex id.
    threshold : float, optional
        Count only simplices of value <= threshold.

    Returns
    -------
    FilteredGraph
    """
    n = graph.n
    vals = vertex_values_array(values, n)
    thr = _check_threshold(threshold)
    order = np.argsort(vals, kind="stable")  # (value, id): a stable sort keeps ids in order
    vrank = np.empty(n, dtype=np.int64)
    vrank[order] = np.arange(n)
    offsets = np.empty(n + 1, dtype=np.int64)
    nbrs = np.empty(2 * graph.n_edges, dtype=np.int32)
    elo = np.ascontiguousarray(graph.edges[:, 0], dtype=np.int32)
    ehi = np.ascontiguousarray(graph.edges[:, 1], dtype=np.int32)
    fill_csr_by_vertex_rank(n, elo, ehi, order.astype(np.int32), offsets, nbrs)
    return FilteredGraph("vertex", offsets, nbrs, vals, vrank=vrank, threshold=thr)


def edge_filtration(
    graph: GraphData,
    weights: Any,
    vertex_values: Any = None,
    threshold: float | None = None,
) -> FilteredGraph:
    """The flag filtration of a graph's clique complex by edge weights.

    Parameters
    ----------
    graph : GraphData
    weights : array_like of float (m)
        One finite weight per edge of ``graph.edges`` (any real numbers).
    vertex_values : array_like of float (n), optional
        Vertex values; an edge's value is then ``max(weight, its endpoints' values)``.
        By default each vertex sits at ``min(0, smallest weight of its edges)``.
    threshold : float, optional
        Count only simplices of value <= threshold.

    Returns
    -------
    FilteredGraph
        Edges ordered by (value, lower id, higher id).
    """
    n = graph.n
    m = graph.n_edges
    w = _edge_values(weights, m, "weights", graph.edges)
    thr = _check_threshold(threshold)
    lo = graph.edges[:, 0]
    hi = graph.edges[:, 1]
    if vertex_values is None:
        vals = np.zeros(n, dtype=np.float64)
        np.minimum.at(vals, lo, w)
        np.minimum.at(vals, hi, w)
    else:
        vals = vertex_values_array(vertex_values, n)
    ev = np.maximum(w, np.maximum(vals[lo], vals[hi])) + 0.0
    keep = ev <= thr
    ev, lo, hi = ev[keep], lo[keep], hi[keep]
    order = np.lexsort((hi, lo, ev))
    ev, lo, hi = ev[order], lo[order].astype(np.int32), hi[order].astype(np.int32)
    offsets = np.empty(n + 1, dtype=np.int64)
    nbrs = np.empty(2 * ev.shape[0], dtype=np.int32)
    erank = np.empty(2 * ev.shape[0], dtype=np.int32)
    fill_csr_by_rank(n, lo, hi, offsets, nbrs, erank)
    return FilteredGraph("edge", offsets, nbrs, vals, erank=erank, edge_values=ev, edge_lo=lo, threshold=thr)


def matrix_filtration(D: Any, threshold: float, *, where: str = "distance matrix") -> FilteredGraph:
    """The flag filtration of a dense distance matrix cut at ``threshold``.

    Vertices sit at 0 and the edge {i, j} has value ``D[i, j]`` when ``D[i, j] <=
    threshold``.

    Raises
    ------
    InputError
        If D fails `validate_distance_matrix` or the threshold is not a finite number >= 0.
    """
    thr = _check_threshold(threshold)
    if not (0 <= thr < math.inf):
        raise InputError(f"threshold must be a finite number >= 0 for a distance matrix, got {threshold!r}")
    arr = validate_distance_matrix(D, where=where)
    n = arr.shape[0]
    ii, jj = np.nonzero(np.triu(arr <= thr, k=1))
    graph = GraphData(n, np.stack([ii, jj], axis=1).astype(np.int64))
    return edge_filtration(graph, arr[ii, jj], np.zeros(n), threshold=thr)


# --------------------------------------------------------------------------- counting


def _check_max_dim(max_dim: Any) -> int:
    if max_dim is None:
        return UNCAPPED
    if isinstance(max_dim, (bool, np.bool_)) or not isinstance(max_dim, (int, np.integer)) or max_dim < 0:
        raise InputError(f"max_dim must be None or an integer >= 0, got {max_dim!r}")
    return int(max_dim)


def graph_jumps(
    graph: FilteredGraph, lo: int = 0, hi: int | None = None, max_dim: int | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """The jump table owned by the vertex range [lo, hi) of a filtered graph.

    For vertex values: c(v) at value(v) for every v in the range. For edge values: +1 at
    value(v) for every v in the range, and c(e) at value(e) for every edge whose lower
    endpoint is in it. Simplices above the graph's threshold are not counted. The tables
    of disjoint ranges covering all vertices add up (`merge_jumps`) to the whole curve's
    table; a range may be counted on its halo (`FilteredGraph.halo`).

    Parameters
    ----------
    graph : FilteredGraph
    lo, hi : int
        The owned vertices (default: all).
    max_dim : int or None
        Count simplices of dimension <= max_dim only; None counts all.

    Returns
    -------
    values : ndarray of float64
        Sorted distinct scales.
    jumps : ndarray of int64
        Nonzero net jumps.
    """
    values, jumps, _ = owned_jumps(graph, lo, hi, max_dim)
    return merge_jumps(values, jumps)


def owned_jumps(
    graph: FilteredGraph, lo: int = 0, hi: int | None = None, max_dim: int | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """`graph_jumps` before merging: one entry per counted vertex and edge of the range,
    with the vertex that owns it (the vertex itself, an edge's lower endpoint).

    The jumps owned by a connected component depend on that component alone, so one call
    on a disjoint union of graphs gives every graph's table (entries grouped by owner).

    Returns
    -------
    values : ndarray of float64
    jumps : ndarray of int64
    owners : ndarray of int64
        In the order counted, not sorted; zero jumps included.
    """
    n = graph.n_vertices
    hi = n if hi is None else int(hi)
    lo = int(lo)
    if not (0 <= lo <= hi <= n):
        raise ValueError(f"vertex range [{lo}, {hi}) does not fit a graph of {n} vertices")
    cap = _check_max_dim(max_dim)
    vvals = graph.vertex_values[lo:hi]
    vkeep = vvals <= graph.threshold
    vowners = np.arange(lo, hi, dtype=np.int64)[vkeep]
    stats = np.zeros(_STAT_SLOTS, dtype=np.int64)
    if graph.kind == "vertex":
        out = np.empty(hi - lo, dtype=np.int64)
        if hi > lo:
            lower_star_range(graph.offsets, graph.nbrs, graph.vrank, lo, hi, cap, out, stats)
        return vvals[vkeep], out[vkeep], vowners
    if graph.kind != "edge":
        raise ValueError(f"unknown filtration kind {graph.kind!r}")
    owned = (graph.edge_lo >= lo) & (graph.edge_lo < hi)
    if cap == 0:
        owned[:] = False
        ejumps = np.empty(0, dtype=np.int64)
    elif cap == 1:
        ejumps = np.full(int(owned.sum()), -1, dtype=np.int64)
    else:
        out = np.zeros(graph.edge_values.shape[0], dtype=np.int64)
        if hi > lo and graph.n_edges:
            count_range(graph.offsets, graph.nbrs, graph.erank, lo, hi, cap, out, stats)
        ejumps = out[owned]
    return (np.concatenate([vvals[vkeep], graph.edge_values[owned]]),
            np.concatenate([np.ones(vowners.shape[0], dtype=np.int64), ejumps]),
            np.concatenate([vowners, graph.edge_lo[owned].astype(np.int64)]))


def curve_domain(fg: FilteredGraph, start: float | None = None) -> tuple[float, float, int]:
    """The domain ``(start, end)`` of a filtered graph's curve and its number of vertices.

    The domain runs from the smallest vertex value (or `start`, which may only lie below
    it) to the threshold, or without one to the largest value of a simplex; the count is
    of the vertices the curve counts (those within the threshold).

    Raises
    ------
    InputError
        If `start` lies above the smallest vertex value or the domain's end.
    """
    span = fg.value_range()
    lo_v, hi_v = span if span is not None else (0.0, 0.0)
    top = hi_v if math.isinf(fg.threshold) else fg.threshold + 0.0
    bottom = min(lo_v, top) if start is None else start
    if start is not None and span is not None and start > lo_v:
        raise InputError(f"start {start!r} lies above the smallest value {lo_v!r} of the filtration")
    if bottom > top:
        raise InputError(f"start {bottom!r} lies above the end {top!r} of the domain")
    return bottom, top, int((fg.vertex_values <= fg.threshold).sum())


def _curve_of(fg: FilteredGraph, max_dim: int | None, start: float | None) -> Curve:
    values, jumps = graph_jumps(fg, max_dim=max_dim)
    bottom, top, n_points = curve_domain(fg, start)
    return Curve.from_jumps(values, jumps, eps=top, max_dim=max_dim, n_points=n_points, start=bottom)


def filtered_graph(
    graph: Any,
    values: Any = "auto",
    weights: Any = None,
    superlevel: bool = False,
    threshold: float | None = None,
    *,
    n: int | None = None,
) -> FilteredGraph:
    """The filtration `graph_curve` counts, with its options (see there).

    With ``superlevel`` every value, and the threshold, is negated: the result is the
    sublevel filtration of the negated values.

    Returns
    -------
    FilteredGraph
        Its ``threshold`` is in the curve's scale (``inf`` without one).

    Raises
    ------
    InputError
        For invalid input or parameters (one line).
    """
    g = as_graph(graph, n)
    if not isinstance(superlevel, (bool, np.bool_)):
        raise InputError(f"superlevel must be True or False, got {superlevel!r}")
    thr = None if threshold is None else _check_threshold(threshold)
    sign = -1.0 if superlevel else 1.0
    if isinstance(values, str) and values == "auto":
        values = "degree" if weights is None else None
    if weights is None:
        vals = sign * vertex_values(g, values) + 0.0
        return vertex_filtration(g, vals, None if thr is None else sign * thr)
    if isinstance(weights, str):
        # a graph without edges has every edge attribute, with no value
        if weights not in g.edge_data and g.n_edges:
            known = ", ".join(repr(k) for k in g.edge_data) or "none"
            raise InputError(f"weights {weights!r}: the graph has no such edge attribute (its numeric edge attributes: {known})")
        w = g.edge_data.get(weights, np.zeros(0))
    else:
        w = _input_order_weights(graph, g, weights)
    vals = None if values is None else sign * vertex_values(g, values) + 0.0
    return edge_filtration(g, sign * np.asarray(w, dtype=np.float64) + 0.0, vals, None if thr is None else sign * thr)


def graph_curve(
    graph: Any,
    values: Any = "auto",
    weights: Any = None,
    max_dim: int | None = None,
    superlevel: bool = False,
    threshold: float | None = None,
    *,
    n: int | None = None,
    start: float | None = None,
) -> Curve:
    """The exact Euler characteristic curve of a filtration of a graph's clique complex.

    In this process; `chitally.jobs.graph.graph_run` computes the same curve over tasks
    on the engine (a graph of millions of edges, resumable, on any cluster).

    Parameters
    ----------
    graph : networkx.Graph, array_like (E, 2) or (E, 3), scipy sparse matrix, or GraphData
        See `as_graph`.
    values : "auto", "degree", "closeness", "heat:<t>", a node attribute name, array_like or None
        Vertex values (see `vertex_values`). ``"auto"`` (the default) is ``"degree"``
        without weights and None with them. None puts every vertex at 0 without
        weights, and at ``min(0, smallest weight of its edges)`` with them.
    weights : None, str or array_like
        None: the vertex-value (lower-star) filtration. A string: the edge attribute of
        that name (``"weight"`` is an (E, 3) array's third column and a sparse matrix's
        entries). An array: one weight per edge, in the order of the input's edges (the
        rows of an edge array, ``G.edges`` of a networkx graph). With weights, the
        filtration is by edge values (flag), each edge valued ``max(weight, endpoint
        values)``.
    max_dim : int or None
        Count simplices of dimension <= max_dim only; None counts all.
    superlevel : bool
        Filter from the largest value down: every value (vertex and edge) is negated and
        the curve is the sublevel curve of the negated values, so the superlevel curve
        at s is ``curve.at(-s)``.
    threshold : float, optional
        Count only simplices of value <= threshold (with ``superlevel``, of original
        value >= threshold). The domain then ends at threshold (at -threshold with
        ``superlevel``).
    n : int, optional
        Number of vertices of an edge array (default: largest id + 1).
    start : float, optional
        Start of the curve's domain (default: the smallest value of a vertex, in the
        curve's scale); a lower one lets curves of many graphs share one domain.

    Returns
    -------
    Curve
        On the domain ``[smallest vertex value, threshold or largest value]``;
        ``n_points`` is the number of vertices counted.

    Raises
    ------
    InputError
        For invalid input or parameters (one line).

    Examples
    --------
    >>> import numpy as np
    >>> triangle = np.array([[0, 1], [1, 2], [0, 2]])
    >>> c = graph_curve(triangle)           # every vertex has degree 2
    >>> c.domain, c.chi.tolist()
    ((2.0, 2.0), [1])
    """
    cap = _check_max_dim(max_dim)
    max_dim = None if cap == UNCAPPED else cap
    start = check_start(start)
    fg = filtered_graph(graph, values, weights, superlevel, threshold, n=n)
    return _curve_of(fg, max_dim, start)


def check_start(start: Any) -> float | None:
    """A domain start as given to `graph_curve`: None or a finite number."""
    if start is None:
        return None
    if not (_numeric(start) and math.isfinite(float(start))):
        raise InputError(f"start must be a finite number or None, got {start!r}")
    return float(start) + 0.0


def _input_order_weights(graph: Any, g: GraphData, weights: Any) -> np.ndarray:
    """Per-edge weights given in the input's own edge order, moved to ``g.edges`` order."""
    if isinstance(graph, GraphData):
        return _edge_values(weights, g.n_edges, "weights", g.edges)
    if _is_sparse(graph):
        raise InputError("weights: a sparse matrix carries its weights as its entries; pass weights='weight'")
    if _is_networkx(graph):
        index = {v: i for i, v in enumerate(graph.nodes)}
        ids = np.array([(index[u], index[v]) for u, v in graph.edges()], dtype=np.int64).reshape(-1, 2)
    else:
        ids = np.asarray(graph)[:, :2]
    w = _edge_values(weights, ids.shape[0], "weights")
    sub = GraphData.from_edges(ids, g.n, edge_data={"weight": w}, where="weights")
    return sub.edge_data["weight"]


def matrix_curve(D: Any, threshold: float, max_dim: int | None = None) -> Curve:
    """The exact curve of the flag filtration of a dense distance matrix up to threshold.

    On the matrix of distances of a point cloud (computed by chitally's distance rule)
    this is exactly ``euler_curve(points, eps=threshold, max_dim=max_dim)``.

    Parameters
    ----------
    D : array_like (n, n)
        Symmetric, zero diagonal, entries >= 0 (``inf`` for no edge is allowed).
    threshold : float
        Largest scale (>= 0): the edges are the pairs with ``D[i, j] <= threshold``.
    max_dim : int or None
        Count simplices of dimension <= max_dim only; None counts all.

    Returns
    -------
    Curve
        On ``[0, threshold]``, with ``n_points = n``.

    Examples
    --------
    >>> import numpy as np
    >>> D = np.array([[0.0, 1.0, 2.0], [1.0, 0.0, 1.0], [2.0, 1.0, 0.0]])
    >>> matrix_curve(D, 2.0).chi.tolist()
    [3, 1]
    """
    cap = _check_max_dim(max_dim)
    max_dim = None if cap == UNCAPPED else cap
    fg = matrix_filtration(D, threshold)
    values, jumps = graph_jumps(fg, max_dim=max_dim)
    return Curve.from_jumps(values, jumps, eps=fg.threshold, max_dim=max_dim, n_points=fg.n_vertices)
