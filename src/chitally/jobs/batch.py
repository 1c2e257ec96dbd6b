"""The `batch` job kind: many clouds, graphs or fields in, one exact feature matrix out.

The items are point clouds (Rips curves), graphs (curves of a vertex-value or
edge-weight filtration of each clique complex) or fields (cubical sublevel curves of
arrays: images, volumes): the parameter ``items`` says which (absent in stores made for
clouds). Planning (pure) groups the items into tasks of about
equal estimated cost, heaviest first, and lays each task's items out contiguously, so a
task reads one slice of rows and thousands of small items are a few dozen tasks, not
thousands. A task computes each of its items' exact curves and samples them on the grid
(integer rows) with the items' rows function (`cloud_rows`, `graph_rows`,
`field_rows`); the fold places rows into the matrix; the result is the matrix,
normalised by each item's size (points, vertices, present entries) on request.

A graph's row at a scale t is the Euler characteristic of the subcomplex of simplices of
value <= t: 0 below the graph's smallest vertex value (the empty complex), the whole
clique complex's above its largest value. The grid is the user's and the same for every
graph, whatever each graph's own domain; with a threshold it may not pass it. A field's
row follows the same rule: 0 below its smallest value, the whole complex's Euler
characteristic above its largest, whatever each field's shape.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..clouds import Collection
from ..cubical import MAX_NDIM, block_jumps, check_construction, present_entries
from ..curve import Curve
from ..field_sources import FieldCollection
from ..graph_data import GraphData, vertex_values
from ..graph_kernel import (
    UNCAPPED,
    degree_square_sum,
    lower_star_degree_row,
    lower_star_row,
)
from ..graph_sources import GraphCollection
from ..graphs import filtered_graph, owned_jumps
from ..kernel import count_jumps
from ..metric import validate_metric
from ..store import JobSpec, ResultDamaged, RunStore
from ..validate import (
    InputError,
    validate_eps,
    validate_finite,
    validate_flag,
    validate_max_dim,
    validate_positive,
)
from . import BATCH

#: Default number of tasks a collection is cut into (fewer for fewer clouds).
DEFAULT_TASKS = 64


@dataclass(frozen=True)
class BatchParams:
    """What a feature-matrix store is made for."""

    eps: float
    grid: tuple[float, ...]
    max_dim: int | None = None
    normalise: bool = False
    task_cost: float | None = None
    metric: str = "euclidean"

    @staticmethod
    def checked(eps: Any, grid: Any, max_dim: Any = None, normalise: bool = False,
                task_cost: Any = None, *, names: Mapping[str, str] | None = None,
                metric: Any = "euclidean") -> BatchParams:
        n = {"eps": "eps", "grid": "grid", "max_dim": "max_dim", "task_cost": "task_cost",
             "metric": "metric", **(names or {})}
        eps = validate_eps(eps, name=n["eps"])
        g = checked_grid(grid, n["grid"])
        if g[0] < 0 or g[-1] > eps:
            bad = g[0] if g[0] < 0 else g[-1]
            raise InputError(f"{n['grid']} value {float(bad)!r} lies outside [0, eps] = [0, {eps!r}]")
        cost = None if task_cost is None else validate_positive(task_cost, name=n["task_cost"])
        return BatchParams(eps, tuple(float(x) for x in g), validate_max_dim(max_dim, name=n["max_dim"]),
                           bool(normalise), cost, validate_metric(metric, name=n["metric"]))

    def as_dict(self) -> dict[str, Any]:
        # the metric is always written; a store made before there was a choice reads as
        # Euclidean (the kind's `defaults`)
        return {"eps": self.eps, "grid": list(self.grid), "max_dim": self.max_dim,
                "normalise": self.normalise, "task_cost": self.task_cost, "metric": self.metric}


def checked_grid(grid: Any, name: str = "grid") -> np.ndarray:
    """A grid as a feature matrix takes it: a non-empty, finite, strictly increasing 1-D
    sequence of scales (float64)."""
    try:
        g = np.asarray(grid, dtype=np.float64) if not isinstance(grid, str) else None
    except (TypeError, ValueError):
        g = None
    if g is None or g.ndim != 1 or g.size == 0:
        raise InputError(f"{name} must be a non-empty 1-D sequence of scales")
    if not np.isfinite(g).all():
        raise InputError(f"{name} holds a value that is not a finite number")
    if np.any(np.diff(g) <= 0):
        i = int(np.flatnonzero(np.diff(g) <= 0)[0])
        raise InputError(f"{name} must be strictly increasing: {g[i]!r} then {g[i + 1]!r}")
    return g + 0.0


def cloud_rows(clouds: Sequence[np.ndarray], eps: float, max_dim: int | None,
               grid: np.ndarray, metric: str = "euclidean") -> np.ndarray:
    """Each cloud's exact curve sampled on `grid`: an int64 array (clouds x grid).

    The one computation behind the batch task and the in-process feature matrix;
    distances in `metric` (see :mod:`chitally.metric`).
    """
    out = np.empty((len(clouds), grid.size), dtype=np.int64)
    for k, coords in enumerate(clouds):
        table = count_jumps(np.ascontiguousarray(coords, dtype=np.float64), eps, max_dim, threads=1,
                            metric=metric)
        curve = Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=max_dim,
                                 n_points=coords.shape[0])
        out[k] = curve.sample(grid)
    return out


def cloud_cost(n: np.ndarray) -> np.ndarray:
    """Relative cost of a cloud of n points (pairs dominate small dense clouds)."""
    n = np.asarray(n, dtype=np.float64)
    return n * n + 64.0  # the constant: per-cloud work that does not grow with n


def group(costs: np.ndarray, target: float) -> list[np.ndarray]:
    """Cloud ids in groups of about `target` cost, heaviest clouds (and groups) first."""
    order = np.argsort(-costs, kind="stable")
    groups: list[list[int]] = []
    current: list[int] = []
    acc = 0.0
    for i in order:
        current.append(int(i))
        acc += float(costs[i])
        if acc >= target:
            groups.append(current)
            current, acc = [], 0.0
    if current:
        groups.append(current)
    return [np.asarray(g, dtype=np.int64) for g in groups]


def collection_fingerprint(col: Collection) -> dict[str, Any]:
    h = hashlib.sha256()
    for name, c in zip(col.names, col.clouds):
        h.update(name.encode() + b"\0")
        h.update(np.asarray(c.shape, "<i8").tobytes())
        h.update(np.ascontiguousarray(c, "<f8").tobytes())
    return {"clouds": len(col), "dim": col.dim, "points": int(sum(c.shape[0] for c in col.clouds)),
            "sha256": h.hexdigest()}


def job_spec(col: Collection, params: BatchParams) -> JobSpec:
    """The run store contents for a validated collection (pure)."""
    sizes = np.array([c.shape[0] for c in col.clouds], dtype=np.int64)
    costs = cloud_cost(sizes)
    target = params.task_cost or max(float(costs.sum()) / DEFAULT_TASKS, float(costs.max()))
    groups = group(costs, target)
    cloud_ids = np.concatenate(groups)
    task_offsets = np.concatenate(([0], np.cumsum([g.size for g in groups]))).astype(np.int64)
    row_offsets = np.concatenate(([0], np.cumsum(sizes[cloud_ids]))).astype(np.int64)
    points = np.concatenate([col.clouds[i] for i in cloud_ids]).astype(np.float64, copy=False)
    task_cost = np.array([costs[g].sum() for g in groups])
    memory = np.array([int(sizes[g].max()) ** 2 * 16 + 1_000_000 for g in groups], dtype=np.int64)
    attrs = {"names": list(col.names), "labels": None if col.labels is None else list(col.labels),
             "dim": col.dim}
    return JobSpec(kind=BATCH.name, params=params.as_dict(), fingerprint=collection_fingerprint(col),
                   outputs=BATCH.outputs, cost=task_cost, memory=memory,
                   inputs={"points": points, "row_offsets": row_offsets, "cloud_ids": cloud_ids,
                           "task_offsets": task_offsets, "sizes": sizes},
                   attrs=attrs)


def create_or_open(url: str, collection: Collection, params: BatchParams, *,
                   storage_options: Mapping[str, Any] | None = None, discard: bool = False) -> RunStore:
    """The feature-matrix run store at `url` for this collection and these parameters."""
    from ..runs import open_or_create

    return open_or_create(url, BATCH.name, params.as_dict(), collection_fingerprint(collection),
                          lambda: job_spec(collection, params), storage_options=storage_options,
                          discard=discard)


# ------------------------------------------------------------------------ graphs


@dataclass(frozen=True)
class GraphBatchParams:
    """What a feature-matrix store of graphs is made for (options as `graph_curve`'s)."""

    grid: tuple[float, ...]
    values: str | None = "degree"
    weights: str | None = None
    max_dim: int | None = None
    superlevel: bool = False
    threshold: float | None = None
    normalise: bool = False
    task_cost: float | None = None

    @staticmethod
    def checked(grid: Any, values: Any = "auto", weights: Any = None, max_dim: Any = None,
                superlevel: Any = False, threshold: Any = None, normalise: bool = False,
                task_cost: Any = None, *, names: Mapping[str, str] | None = None) -> GraphBatchParams:
        """Validated parameters; `names` maps a parameter to how the user spelled it.

        ``values`` is a name (``"degree"``, ``"closeness"``, ``"heat:<t>"``, a node
        attribute every graph has) or None, ``weights`` an edge attribute or None: one
        specification for every graph. The grid is in the curve's scale (negated values
        with ``superlevel``) and, with a threshold, may not pass its end.
        """
        n = {"grid": "grid", "values": "values", "weights": "weights", "max_dim": "max_dim",
             "threshold": "threshold", "task_cost": "task_cost", "superlevel": "superlevel",
             **(names or {})}
        if isinstance(values, str) and values == "auto":
            values = "degree" if weights is None else None
        if values is not None and not isinstance(values, str):
            raise InputError(f"{n['values']}: for a collection of graphs, a name ('degree', 'closeness', "
                             "'heat:<t>', a node attribute) or None")
        if isinstance(values, str) and values.startswith("heat:"):
            try:
                t = float(values[len("heat:"):])
            except ValueError:
                t = float("nan")
            if not (math.isfinite(t) and t > 0):
                raise InputError(f"{n['values']} {values!r}: heat:<t> needs a number t > 0")
        if weights is not None and not isinstance(weights, str):
            raise InputError(f"{n['weights']}: for a collection of graphs, the name of an edge attribute or None")
        superlevel = validate_flag(superlevel, name=n["superlevel"])
        thr = None if threshold is None else validate_finite(threshold, name=n["threshold"])
        g = checked_grid(grid, n["grid"])
        if thr is not None:
            end = -thr if superlevel else thr
            if g[-1] > end:
                raise InputError(f"{n['grid']} value {float(g[-1])!r} lies above the end {end!r} of the domain "
                                 f"({n['threshold']} {thr!r}{', superlevel' if superlevel else ''}): simplices "
                                 "beyond the threshold are not counted")
        cost = None if task_cost is None else validate_positive(task_cost, name=n["task_cost"])
        return GraphBatchParams(tuple(float(x) for x in g), values, weights,
                                validate_max_dim(max_dim, name=n["max_dim"]), bool(superlevel), thr,
                                bool(normalise), cost)

    def as_dict(self) -> dict[str, Any]:
        return {"items": "graphs", "grid": list(self.grid), "values": self.values,
                "weights": self.weights, "max_dim": self.max_dim, "superlevel": self.superlevel,
                "threshold": self.threshold, "normalise": self.normalise, "task_cost": self.task_cost}


#: vertex-value specifications computed from the graph itself (not a stored attribute)
_COMPUTED_VALUES = ("degree", "closeness")


def _node_column(params: GraphBatchParams) -> str | None:
    v = params.values
    if v is None or v in _COMPUTED_VALUES or v.startswith("heat:"):
        return None
    return v


def chi_on_grid(values: np.ndarray, jumps: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """The Euler characteristic of the simplices of value <= t, for each t of `grid`,
    from a jump table: 0 below the first jump, the total above the last."""
    cum = np.concatenate(([0], np.cumsum(jumps, dtype=np.int64)))
    return cum[np.searchsorted(values, grid, side="right")]


#: Vertices and CSR entries of the graphs counted together at once.
_UNION_ENTRIES = 1 << 15


def _union(graphs: Sequence[GraphData], values: str | None,
           weights: str | None) -> tuple[GraphData, Any, np.ndarray]:
    """The disjoint union of `graphs` (each one's vertices after the previous ones', in
    order), its vertex values as the filtration takes them, and each graph's first vertex.

    Degrees, node attributes and edge attributes of the union are the graphs' own; the
    other vertex values (closeness, heat kernel signatures) are computed graph by graph,
    since they depend on the whole graph.
    """
    sizes = np.array([g.n for g in graphs], dtype=np.int64)
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1])).astype(np.int64)
    m = np.array([g.n_edges for g in graphs], dtype=np.int64)
    edges = np.concatenate([g.edges for g in graphs] + [np.zeros((0, 2), np.int64)]) \
        + np.repeat(starts, m)[:, None]
    edge_data = {}
    if weights is not None:
        # a graph without edges has every edge attribute (see `filtered_graph`)
        edge_data[weights] = np.concatenate([g.edge_data.get(weights, np.zeros(0)) for g in graphs]
                                            + [np.zeros(0)])
    spec: Any = values
    node_data = {}
    if values == "closeness" or (isinstance(values, str) and values.startswith("heat:")):
        spec = np.concatenate([vertex_values(g, values) for g in graphs] + [np.zeros(0)])
    elif isinstance(values, str) and values != "degree":
        node_data[values] = np.concatenate([g.node_data.get(values, np.zeros(0)) for g in graphs]
                                           + [np.zeros(0)])
    # each graph's edges are sorted and distinct, offsets keep them so: no validation again
    union = GraphData(int(sizes.sum()), edges, edge_data, node_data)
    return union, spec, starts


def graph_rows(graphs: Sequence[GraphData], values: str | None, weights: str | None,
               max_dim: int | None, superlevel: bool, threshold: float | None,
               grid: np.ndarray) -> np.ndarray:
    """Each graph's exact curve sampled on `grid` (as `chi_on_grid`): int64 (graphs x grid).

    The one computation behind the batch task and the in-process feature matrix; at
    every grid point inside a graph's domain it is ``graph_curve(...).sample``. The
    graphs are counted together, as their disjoint union: the jumps a vertex or edge
    owns depend on its own graph alone (`owned_jumps`), and the union keeps each graph's
    order of vertices and edges, so ties break as in the graph alone. Vertex values
    (no weights) are counted one graph a call instead (`lower_star_row`), which needs
    no union and adds each vertex's jump to its graph's row as it goes.
    """
    if weights is None:
        return _lower_star_rows(graphs, values, max_dim, superlevel, threshold, grid)
    out = np.zeros((len(graphs), grid.size + 1), dtype=np.int64)
    flat = out.reshape(-1)  # a view: exact int64 sums at (graph, first grid point) cells
    # unions small enough for the caches: the kernels visit vertices in filtration
    # order, which jumps from graph to graph
    size = np.cumsum([g.n + 2 * g.n_edges for g in graphs])
    cuts = np.unique(np.searchsorted(size, np.arange(_UNION_ENTRIES, int(size[-1]) if size.size else 0,
                                                     _UNION_ENTRIES), side="right"))
    for a, b in zip(np.concatenate(([0], cuts)), np.concatenate((cuts, [len(graphs)]))):
        if b <= a:
            continue
        union, spec, starts = _union(graphs[a:b], values, weights)
        fg = filtered_graph(union, spec, weights, superlevel, threshold)
        v, j, owners = owned_jumps(fg, max_dim=max_dim)
        item_of = np.repeat(np.arange(a, b, dtype=np.int64), np.diff(np.append(starts, union.n)))
        # a jump at v counts at every grid point t >= v: from the first one not below v on
        np.add.at(flat, item_of[owners] * (grid.size + 1) + np.searchsorted(grid, v, side="left"), j)
    return np.cumsum(out, axis=1)[:, :grid.size]


def _lower_star_rows(graphs: Sequence[GraphData], values: str | None, max_dim: int | None,
                     superlevel: bool, threshold: float | None, grid: np.ndarray) -> np.ndarray:
    """`graph_rows` of the lower-star filtration: each graph in one compiled call, with
    the values and threshold `filtered_graph` would give it."""
    sign = -1.0 if superlevel else 1.0
    thr = math.inf if threshold is None else sign * float(threshold) + 0.0
    cap = UNCAPPED if max_dim is None else int(max_dim)
    grid = np.ascontiguousarray(grid, dtype=np.float64)
    out = np.zeros((len(graphs), grid.size + 1), dtype=np.int64)
    stats = np.zeros(5, dtype=np.int64)
    for i, g in enumerate(graphs):
        edges = np.ascontiguousarray(g.edges, dtype=np.int64)
        if values in ("degree", "auto"):  # "auto" is the degree without weights, as in `filtered_graph`
            lower_star_degree_row(edges, g.n, sign, thr, cap, grid, out[i], stats)
        else:
            vals = np.ascontiguousarray(sign * vertex_values(g, values) + 0.0, dtype=np.float64)
            lower_star_row(edges, vals, thr, cap, grid, out[i], stats)
    return np.cumsum(out, axis=1)[:, :grid.size]


def graph_cost(graph: GraphData) -> float:
    """Relative cost of one graph: its vertices and the pairs among each vertex's
    neighbours (the lower links and edge neighbourhoods the kernels read)."""
    edges = np.ascontiguousarray(graph.edges, dtype=np.int64)
    return float(graph.n + 0.5 * degree_square_sum(edges, graph.n) + 64.0)


def graph_fingerprint(col: GraphCollection, params: GraphBatchParams) -> dict[str, Any]:
    """The identity of a collection as a feature matrix reads it: names, structure, and
    the node and edge data the parameters use."""
    h = hashlib.sha256()
    column = _node_column(params)
    for g in col.graphs:
        h.update(str(g.name).encode() + b"\0")
        h.update(np.asarray([g.n, g.n_edges], "<i8").tobytes())
        h.update(np.ascontiguousarray(g.edges, "<i8").tobytes())
        if column is not None and column in g.node_data:
            h.update(np.ascontiguousarray(g.node_data[column], "<f8").tobytes())
        if params.weights is not None and params.weights in g.edge_data:
            h.update(np.ascontiguousarray(g.edge_data[params.weights], "<f8").tobytes())
    return {"graphs": len(col), "vertices": int(sum(g.n for g in col.graphs)),
            "edges": int(sum(g.n_edges for g in col.graphs)), "sha256": h.hexdigest()}


def _check_data(col: GraphCollection, params: GraphBatchParams) -> None:
    """Every graph has the node and edge attributes the parameters name (a graph
    without vertices, or edges, has them all)."""
    column = _node_column(params)
    for g in col.graphs:
        if column is not None and column not in g.node_data and g.n > 0:
            known = ", ".join(repr(k) for k in g.node_data) or "none"
            raise InputError(f"graph {g.name!r}: vertex values {column!r}: not 'degree', 'closeness', "
                             f"'heat:<t>' nor a node attribute of this graph (its numeric node attributes: {known})")
        if params.weights is not None and params.weights not in g.edge_data and g.n_edges > 0:
            known = ", ".join(repr(k) for k in g.edge_data) or "none"
            raise InputError(f"graph {g.name!r}: weights {params.weights!r}: no such edge attribute "
                             f"(its numeric edge attributes: {known})")
        if params.normalise and g.n == 0:
            raise InputError(f"graph {g.name!r} has no vertex: its row cannot be divided by its size")


def graph_job_spec(col: GraphCollection, params: GraphBatchParams) -> JobSpec:
    """The run store contents for a collection of graphs (`graph_collection`; pure)."""
    _check_data(col, params)
    sizes = np.array([g.n for g in col.graphs], dtype=np.int64)
    m = np.array([g.n_edges for g in col.graphs], dtype=np.int64)
    costs = np.array([graph_cost(g) for g in col.graphs])
    target = params.task_cost or max(float(costs.sum()) / DEFAULT_TASKS, float(costs.max()))
    groups = group(costs, target)
    graph_ids = np.concatenate(groups)
    task_offsets = np.concatenate(([0], np.cumsum([g.size for g in groups]))).astype(np.int64)
    vertex_offsets = np.concatenate(([0], np.cumsum(sizes[graph_ids]))).astype(np.int64)
    edge_offsets = np.concatenate(([0], np.cumsum(m[graph_ids]))).astype(np.int64)
    edges = np.concatenate([col.graphs[i].edges for i in graph_ids] + [np.zeros((0, 2), np.int64)])
    inputs: dict[str, Any] = {"graph_ids": graph_ids, "task_offsets": task_offsets,
                              "vertex_offsets": vertex_offsets, "edge_offsets": edge_offsets,
                              "edges": edges.astype(np.int32), "sizes": sizes}
    column = _node_column(params)
    if column is not None:
        inputs["node_values"] = np.concatenate([col.graphs[i].node_data.get(column, np.zeros(0))
                                                for i in graph_ids] + [np.zeros(0)])
    if params.weights is not None:
        inputs["edge_weights"] = np.concatenate([col.graphs[i].edge_data.get(params.weights, np.zeros(0))
                                                 for i in graph_ids] + [np.zeros(0)])
    task_cost = np.array([costs[g].sum() for g in groups])
    memory = np.array([int(max(sizes[g].max() ** 2 // 4, 1) + 96 * m[g].max()) + 1_000_000 for g in groups],
                      dtype=np.int64)
    labels = None if col.labels is None else [x.item() if hasattr(x, "item") else x for x in col.labels]
    attrs = {"names": [g.name for g in col.graphs], "labels": labels, "collection": col.name}
    return JobSpec(kind=BATCH.name, params=params.as_dict(), fingerprint=graph_fingerprint(col, params),
                   outputs=BATCH.outputs, cost=task_cost, memory=memory, inputs=inputs, attrs=attrs)


def create_or_open_graphs(url: str, col: GraphCollection, params: GraphBatchParams, *,
                          storage_options: Mapping[str, Any] | None = None,
                          discard: bool = False) -> RunStore:
    """The feature-matrix run store at `url` for this collection of graphs (named and
    labelled: `graph_collection`) and these parameters."""
    from ..runs import open_or_create

    _check_data(col, params)
    return open_or_create(url, BATCH.name, params.as_dict(), graph_fingerprint(col, params),
                          lambda: graph_job_spec(col, params), storage_options=storage_options,
                          discard=discard)


def _graph_task(store: RunStore, i: int) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    p = store.params
    a, b = (int(x) for x in store.read_input("task_offsets", slice(i, i + 2), task=i))
    voff = store.read_input("vertex_offsets", slice(a, b + 1), task=i)
    eoff = store.read_input("edge_offsets", slice(a, b + 1), task=i)
    e0, e1 = int(eoff[0]), int(eoff[-1])
    edges = store.read_input("edges", slice(e0, e1), task=i).astype(np.int64)
    column = p["values"] if "node_values" in store.input_names else None
    nodes = store.read_input("node_values", slice(int(voff[0]), int(voff[-1])), task=i) if column else None
    weights = store.read_input("edge_weights", slice(e0, e1), task=i) if p["weights"] is not None else None
    graphs = []
    for k in range(b - a):
        lo, hi = int(eoff[k]) - e0, int(eoff[k + 1]) - e0
        va, vb = int(voff[k]) - int(voff[0]), int(voff[k + 1]) - int(voff[0])
        # stored from validated graphs: rebuilt as they were, without validating again
        graphs.append(GraphData(vb - va, edges[lo:hi],
                                {p["weights"]: weights[lo:hi]} if weights is not None else {},
                                {column: nodes[va:vb]} if column else {}))
    out = graph_rows(graphs, p["values"], p["weights"], p["max_dim"], p["superlevel"], p["threshold"],
                     np.asarray(p["grid"], np.float64))
    return {"rows": out}, {"graphs": b - a, "vertices": int(voff[-1] - voff[0]), "edges": e1 - e0}


# ------------------------------------------------------------------------ fields


@dataclass(frozen=True)
class FieldBatchParams:
    """What a feature-matrix store of fields is made for (options as `field_curve`'s)."""

    grid: tuple[float, ...]
    construction: str = "vertices"
    superlevel: bool = False
    mask_nan: bool = False
    normalise: bool = False
    task_cost: float | None = None

    @staticmethod
    def checked(grid: Any, construction: Any = "vertices", superlevel: Any = False, mask_nan: Any = False,
                normalise: Any = False, task_cost: Any = None, *,
                names: Mapping[str, str] | None = None) -> FieldBatchParams:
        """Validated parameters; `names` maps a parameter to how the user spelled it.

        The grid is any strictly increasing sequence of scales, in the curve's scale
        (``-f`` with ``superlevel``), the same for every field: a field's row is 0 below
        its smallest value and its whole complex's value above its largest.
        """
        n = {"grid": "grid", "construction": "construction", "superlevel": "superlevel",
             "mask_nan": "mask_nan", "normalise": "normalise", "task_cost": "task_cost", **(names or {})}
        construction = check_construction(construction, name=n["construction"])
        g = checked_grid(grid, n["grid"])
        cost = None if task_cost is None else validate_positive(task_cost, name=n["task_cost"])
        return FieldBatchParams(tuple(float(x) for x in g), construction,
                                validate_flag(superlevel, name=n["superlevel"]),
                                validate_flag(mask_nan, name=n["mask_nan"]),
                                validate_flag(normalise, name=n["normalise"]), cost)

    def as_dict(self) -> dict[str, Any]:
        return {"items": "fields", "grid": list(self.grid), "construction": self.construction,
                "superlevel": self.superlevel, "mask_nan": self.mask_nan, "normalise": self.normalise,
                "task_cost": self.task_cost}


def field_rows(fields: Sequence[np.ndarray], construction: str, superlevel: bool, mask_nan: bool,
               grid: np.ndarray) -> np.ndarray:
    """Each field's exact curve sampled on `grid` (as `chi_on_grid`): int64 (fields x grid).

    The one computation behind the batch task and the in-process feature matrix; at
    every grid point inside a field's domain it is ``field_curve(field, ...).at(t)``:
    the same cell counts (`chitally.cubical.block_jumps` over the whole array) read
    off at the grid.
    """
    grid = np.asarray(grid, dtype=np.float64)
    out = np.empty((len(fields), grid.size), dtype=np.int64)
    for k, arr in enumerate(fields):
        values, jumps = block_jumps(arr, construction, superlevel=superlevel, mask_nan=mask_nan)
        out[k] = chi_on_grid(values, jumps, grid)
    return out


def field_cost(entries: np.ndarray, ndims: np.ndarray) -> np.ndarray:
    """Relative cost of fields: their cells (entries times the 2^ndim cell types each
    entry heads), plus the per-item work that does not grow with the size."""
    return np.asarray(entries, np.float64) * np.exp2(np.asarray(ndims, np.float64)) + 64.0


def field_sizes(col: FieldCollection, params: FieldBatchParams) -> np.ndarray:
    """The present entries of every field (its size for `normalise`), checking the
    values: a NaN (without ``mask_nan``) or an infinite value is refused naming the
    field and its position, before any store is made or any curve counted."""
    sizes = np.empty(len(col), dtype=np.int64)
    for k, (name, arr) in enumerate(zip(col.names, col.fields)):
        present = present_entries(arr, None, params.mask_nan, what=f"field {name!r}")
        sizes[k] = arr.size if present is None else int(np.count_nonzero(present))
        if params.normalise and sizes[k] == 0:
            raise InputError(f"field {name!r} has no present entry: its row cannot be divided by its size")
    return sizes


def _stored_dtype(col: FieldCollection) -> np.dtype:
    """One dtype for every field's entries: numpy's common type (uint8 images stay
    bytes), little-endian."""
    return np.dtype(np.result_type(*[a.dtype for a in col.fields])).newbyteorder("<")


def field_fingerprint(col: FieldCollection) -> dict[str, Any]:
    """The identity of a collection of fields: names, dtypes, shapes and every entry."""
    h = hashlib.sha256()
    for name, arr in zip(col.names, col.fields):
        h.update(str(name).encode() + b"\0")
        h.update(arr.dtype.newbyteorder("<").str.encode() + b"\0")
        h.update(np.asarray([arr.ndim, *arr.shape], "<i8").tobytes())
        h.update(np.ascontiguousarray(arr, arr.dtype.newbyteorder("<")).tobytes())
    return {"fields": len(col), "entries": int(sum(a.size for a in col.fields)), "sha256": h.hexdigest()}


def field_job_spec(col: FieldCollection, params: FieldBatchParams, sizes: np.ndarray | None = None) -> JobSpec:
    """The run store contents for a collection of fields (`read_fields`; pure). Every
    field's entries are flattened into one input in task order, with its shape."""
    sizes = field_sizes(col, params) if sizes is None else sizes
    entries = np.array([a.size for a in col.fields], dtype=np.int64)
    ndims = np.array([a.ndim for a in col.fields], dtype=np.int64)
    costs = field_cost(entries, ndims)
    target = params.task_cost or max(float(costs.sum()) / DEFAULT_TASKS, float(costs.max()))
    groups = group(costs, target)
    field_ids = np.concatenate(groups)
    task_offsets = np.concatenate(([0], np.cumsum([g.size for g in groups]))).astype(np.int64)
    entry_offsets = np.concatenate(([0], np.cumsum(entries[field_ids]))).astype(np.int64)
    dtype = _stored_dtype(col)
    flat = np.concatenate([np.asarray(col.fields[i]).astype(dtype, copy=False).reshape(-1) for i in field_ids])
    shapes = np.zeros((field_ids.size, MAX_NDIM), dtype=np.int64)
    for k, i in enumerate(field_ids):
        shapes[k, :ndims[i]] = col.fields[i].shape
    # per field: its values, ranks and two reduced views at a time, the count bins
    memory = np.array([int(entries[g].max()) * (dtype.itemsize + 4 * 8 + 1) + 1_000_000 for g in groups],
                      dtype=np.int64)
    labels = None if col.labels is None else [x.item() if hasattr(x, "item") else x for x in col.labels]
    return JobSpec(kind=BATCH.name, params=params.as_dict(), fingerprint=field_fingerprint(col),
                   outputs=BATCH.outputs, cost=np.array([costs[g].sum() for g in groups]), memory=memory,
                   inputs={"field_ids": field_ids, "task_offsets": task_offsets, "entry_offsets": entry_offsets,
                           "entries": flat, "shapes": shapes, "ndims": ndims[field_ids], "sizes": sizes},
                   attrs={"names": list(col.names), "labels": labels})


def create_or_open_fields(url: str, col: FieldCollection, params: FieldBatchParams, *,
                          storage_options: Mapping[str, Any] | None = None,
                          discard: bool = False) -> RunStore:
    """The feature-matrix run store at `url` for this collection of fields (named and
    labelled: `chitally.field_sources.read_fields`) and these parameters. The values
    are checked before anything is written."""
    from ..runs import open_or_create

    sizes = field_sizes(col, params)
    return open_or_create(url, BATCH.name, params.as_dict(), field_fingerprint(col),
                          lambda: field_job_spec(col, params, sizes), storage_options=storage_options,
                          discard=discard)


def _field_task(store: RunStore, i: int) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    p = store.params
    a, b = (int(x) for x in store.read_input("task_offsets", slice(i, i + 2), task=i))
    offsets = store.read_input("entry_offsets", slice(a, b + 1), task=i)
    base = int(offsets[0])
    flat = store.read_input("entries", slice(base, int(offsets[-1])), task=i)
    shapes = store.read_input("shapes", slice(a, b), task=i)
    ndims = store.read_input("ndims", slice(a, b), task=i)
    fields = [flat[int(lo) - base:int(hi) - base].reshape(tuple(int(s) for s in shapes[k, :int(ndims[k])]))
              for k, (lo, hi) in enumerate(zip(offsets[:-1], offsets[1:]))]
    out = field_rows(fields, p["construction"], p["superlevel"], p["mask_nan"], np.asarray(p["grid"], np.float64))
    return {"rows": out}, {"fields": b - a, "entries": int(offsets[-1]) - base}


# ------------------------------------------------------------------------ the task


def items_of(params: Mapping[str, Any]) -> str:
    """What a batch store's items are: "clouds" (stores made before graphs name none),
    "graphs" or "fields"."""
    return str(params.get("items", "clouds"))


#: The input naming each position's item in the order the caller gave them.
_IDS = {"clouds": "cloud_ids", "graphs": "graph_ids", "fields": "field_ids"}


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the grid rows of task `i`'s items."""
    p = store.params
    if items_of(p) == "graphs":
        return _graph_task(store, i)
    if items_of(p) == "fields":
        return _field_task(store, i)
    a, b = (int(x) for x in store.read_input("task_offsets", slice(i, i + 2), task=i))
    offsets = store.read_input("row_offsets", slice(a, b + 1), task=i)
    rows = store.read_input("points", slice(int(offsets[0]), int(offsets[-1])), task=i)
    base = int(offsets[0])
    clouds = [rows[int(lo) - base:int(hi) - base] for lo, hi in zip(offsets[:-1], offsets[1:])]
    out = cloud_rows(clouds, float(p["eps"]), p["max_dim"], np.asarray(p["grid"], np.float64),
                     validate_metric(p.get("metric")))
    return {"rows": out}, {"clouds": b - a, "points": int(offsets[-1] - offsets[0])}


class PlaceRows:
    """The batch fold: each task's rows placed at its items' positions."""

    def __init__(self, store: RunStore) -> None:
        self.store = store
        self.cloud_ids = store.read_input(_IDS[items_of(store.params)])
        self.task_offsets = store.read_input("task_offsets")
        grid = store.params["grid"]
        self.matrix = np.zeros((self.cloud_ids.size, len(grid)), dtype=np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.matrix = np.asarray(state["matrix"], dtype=np.int64).copy()

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, out in zip(tasks, outputs):
            ids = self.cloud_ids[self.task_offsets[t]:self.task_offsets[t + 1]]
            self.matrix[ids] = out["rows"]

    def state(self) -> dict[str, np.ndarray]:
        return {"matrix": self.matrix}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        sizes = self.store.read_input("sizes")
        return ({"matrix": self.matrix, "sizes": sizes},
                {"rows": int(self.matrix.shape[0]), "grid_points": int(self.matrix.shape[1])})


def read_matrix(store: RunStore) -> Any:
    """The feature matrix of a complete batch run, verified; None if not written yet."""
    from ..features import FeatureMatrix

    got = store.read_result()
    if got is None:
        return None
    arrays, _ = got
    p, a = store.params, store.attrs
    matrix = arrays["matrix"]
    if matrix.shape != (len(a["names"]), len(p["grid"])):
        raise ResultDamaged(f"the matrix in {store.url} has shape {matrix.shape}")
    return FeatureMatrix.of_counts(matrix, arrays["sizes"], names=a["names"], labels=a["labels"],
                                   grid=p["grid"], eps=p.get("eps"), max_dim=p.get("max_dim"),
                                   normalise=p["normalise"])
