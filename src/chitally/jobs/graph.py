"""The `graph` job kind: the exact curve of one large graph filtration, task by task.

Planning (pure) takes a filtered graph (`chitally.graphs.filtered_graph` or
`matrix_filtration`) and cuts its vertices into contiguous ranges of about equal
estimated cost, heaviest task first. A vertex's cost comes from degrees: the square of
its lower degree for vertex values (the size of the lower link whose cliques it counts),
its degree times the edges it owns for edge values. The store's inputs are the filtered
graph's CSR arrays and values (`FILTRATION_ARRAYS`) and the task table (``range_lo``,
``range_hi``). A task reads its range's halo from the store (the range, its neighbours,
and their rows restricted to them: `chitally.graphs.gather_halo`), counts the jumps its
range owns with the in-process kernels (`graph_jumps`), and commits its jump table; the
fold (`chitally.jobs.cloud.JumpSum`) sums the tables into the curve, on the domain
`graph_curve` gives the same filtration. The curve is identical to `graph_curve`'s.

`graph_run` is the Python entry point: the same arguments as `graph_curve`, plus a run
store and where to run.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..graphs import (
    FilteredGraph,
    check_start,
    curve_domain,
    filtered_graph,
    gather_halo,
    graph_jumps,
)
from ..store import JobSpec, RunStore, arrays_digest
from ..validate import InputError, validate_count, validate_finite, validate_flag, validate_max_dim
from . import GRAPH

#: Default number of tasks (fewer for small graphs: see `MIN_TASK_COST`).
DEFAULT_TASKS = 64
#: Estimated cost below which a task is not worth its store and scheduling overhead.
MIN_TASK_COST = 2.0e6


def _describe(spec: Any) -> str | None:
    """How a values or weights argument is recorded in the parameters: a name as given,
    ``"array"`` for explicit numbers (whose content the fingerprint covers), or None."""
    if spec is None or isinstance(spec, str):
        return spec
    return "array"


@dataclass(frozen=True)
class GraphParams:
    """The parameters a graph run store is made for; any difference is a different run.

    ``values`` and ``weights`` say how the filtration was given (a name, ``"array"``,
    ``"matrix"`` for a distance matrix, or None); the filtration's own numbers are in
    the store's input fingerprint.
    """

    values: str | None = "degree"
    weights: str | None = None
    max_dim: int | None = None
    superlevel: bool = False
    threshold: float | None = None
    start: float | None = None
    tasks: int | None = None

    def as_dict(self) -> dict[str, Any]:
        return {"values": self.values, "weights": self.weights, "max_dim": self.max_dim,
                "superlevel": self.superlevel, "threshold": self.threshold, "start": self.start,
                "tasks": self.tasks}

    @staticmethod
    def checked(values: Any = "auto", weights: Any = None, max_dim: Any = None,
                superlevel: Any = False, threshold: Any = None, start: Any = None,
                tasks: Any = None, *, names: Mapping[str, str] | None = None) -> GraphParams:
        """Validated parameters (as `graph_curve` takes them); `names` maps a parameter
        to how the user spelled it, for the error messages."""
        n = {"max_dim": "max_dim", "threshold": "threshold", "start": "start", "tasks": "tasks",
             "superlevel": "superlevel", **(names or {})}
        if isinstance(values, str) and values == "auto":
            values = "degree" if weights is None else None
        superlevel = validate_flag(superlevel, name=n["superlevel"])
        thr = None if threshold is None else validate_finite(threshold, name=n["threshold"])
        try:
            first = check_start(start)
        except InputError:
            raise InputError(f"{n['start']} must be a finite number, got {start!r}") from None
        return GraphParams(
            _describe(values), _describe(weights), validate_max_dim(max_dim, name=n["max_dim"]),
            bool(superlevel), thr, first,
            None if tasks is None else validate_count(tasks, name=n["tasks"], minimum=1),
        )


# ------------------------------------------------------------------------ planning


def vertex_costs(fg: FilteredGraph) -> np.ndarray:
    """Estimated cost of each vertex's owned jumps, from degrees (float64, n)."""
    n = fg.n_vertices
    deg = np.diff(fg.offsets)
    if fg.kind == "vertex":
        row = np.repeat(np.arange(n), deg)
        lower = np.bincount(row[fg.vrank[fg.nbrs] < fg.vrank[row]], minlength=n).astype(np.float64)
        return 1.0 + lower * lower
    owned = np.bincount(fg.edge_lo, minlength=n).astype(np.float64) if fg.edge_lo.size else np.zeros(n)
    return 1.0 + owned * deg.astype(np.float64)


def split_ranges(costs: np.ndarray, tasks: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Contiguous vertex ranges of about equal total cost, as (lo, hi) arrays.

    ``tasks`` ranges when given (fewer if vertices run out); by default as many as keep
    every range above `MIN_TASK_COST`, at most `DEFAULT_TASKS`. A vertex heavier than
    a range's share makes a range of its own. Ranges are in vertex order here.
    """
    n = costs.shape[0]
    if n == 0:
        return np.zeros(1, np.int64), np.zeros(1, np.int64)
    total = float(costs.sum())
    if tasks is None:
        tasks = int(min(DEFAULT_TASKS, max(1, total // MIN_TASK_COST)))
    tasks = max(1, min(int(tasks), n))
    cum = np.cumsum(costs)
    # cut after the vertex where the running cost first reaches k/tasks of the total
    cuts = np.searchsorted(cum, total * np.arange(1, tasks) / tasks, side="left") + 1
    bounds = np.unique(np.concatenate([[0], np.minimum(cuts, n), [n]])).astype(np.int64)
    return bounds[:-1], bounds[1:]


def halo_sizes(fg: FilteredGraph, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Vertices and CSR entries each range's halo reads (before restriction)."""
    deg = np.diff(fg.offsets)
    verts = np.zeros(lo.shape[0], np.int64)
    entries = np.zeros(lo.shape[0], np.int64)
    for t, (a, b) in enumerate(zip(lo.tolist(), hi.tolist())):
        ids = np.unique(np.concatenate([np.arange(a, b), fg.nbrs[fg.offsets[a]:fg.offsets[b]]]))
        verts[t] = ids.shape[0]
        entries[t] = int(deg[ids].sum())
    return verts, entries


def _memory(fg: FilteredGraph, lo: np.ndarray, hi: np.ndarray, verts: np.ndarray,
            entries: np.ndarray) -> np.ndarray:
    deg = np.diff(fg.offsets)
    top = np.array([int(deg[a:b].max(initial=0)) for a, b in zip(lo.tolist(), hi.tolist())], np.int64)
    # the halo's arrays and their index work (about 6 words an entry, 8 a vertex), the
    # kernel's bitsets of the largest neighbourhood, and a fixed allowance
    return 48 * entries + 64 * verts + top * ((top + 63) // 64) * 8 * 4 + (8 << 20)


def fingerprint_of(fg: FilteredGraph) -> dict[str, Any]:
    """The identity of a filtered graph: its kind, size, threshold and the digest of
    its arrays (the store's one digest scheme)."""
    return {"filtration": fg.kind, "vertices": fg.n_vertices, "edges": fg.n_edges,
            "threshold": None if math.isinf(fg.threshold) else float(fg.threshold),
            "sha256": arrays_digest(fg.arrays())}


def job_spec(fg: FilteredGraph, params: GraphParams) -> JobSpec:
    """The run store contents for a filtered graph (pure)."""
    start, end, n_points = curve_domain(fg, params.start)
    costs = vertex_costs(fg)
    lo, hi = split_ranges(costs, params.tasks)
    cum = np.concatenate([[0.0], np.cumsum(costs)])
    cost = cum[hi] - cum[lo]
    order = np.argsort(-cost, kind="stable")  # heaviest first
    lo, hi, cost = lo[order], hi[order], cost[order]
    verts, entries = halo_sizes(fg, lo, hi)
    inputs: dict[str, Any] = dict(fg.arrays())
    inputs.update({"range_lo": lo, "range_hi": hi})
    attrs = {"filtration": fg.kind, "n_vertices": fg.n_vertices, "n_edges": fg.n_edges,
             "threshold": None if math.isinf(fg.threshold) else float(fg.threshold),
             "start": start, "eps": end, "n_points": n_points,
             "halo_vertices": int(verts.sum()), "halo_entries": int(entries.sum())}
    return JobSpec(kind=GRAPH.name, params=params.as_dict(), fingerprint=fingerprint_of(fg),
                   outputs=GRAPH.outputs, cost=np.maximum(cost, 1.0),
                   memory=_memory(fg, lo, hi, verts, entries), inputs=inputs, attrs=attrs)


def create_or_open(url: str, fg: FilteredGraph, params: GraphParams, *,
                   storage_options: Mapping[str, Any] | None = None,
                   discard: bool = False) -> RunStore:
    """The graph run store at `url` for this filtered graph and these parameters:
    opened if it exists (it must match: `StoreMismatch` otherwise, nothing written),
    else planned and created."""
    from ..runs import open_or_create

    curve_domain(fg, params.start)  # a bad start is refused before anything is written
    return open_or_create(url, GRAPH.name, params.as_dict(), fingerprint_of(fg),
                          lambda: job_spec(fg, params), storage_options=storage_options,
                          discard=discard)


# ------------------------------------------------------------------------ the task


#: A gather reads the slice between its first and last index when that slice is at most
#: this many times longer than the gather (zarr decompresses whole chunks either way).
_DENSE = 8


def task_halo(store: RunStore, i: int) -> tuple[FilteredGraph, int, int]:
    """Task `i`'s halo, read from the store, and its owned range in local ids."""
    lo = int(store.read_input("range_lo", slice(i, i + 1), task=i)[0])
    hi = int(store.read_input("range_hi", slice(i, i + 1), task=i)[0])
    a = store.attrs
    threshold = math.inf if a["threshold"] is None else float(a["threshold"])

    def take(name: str, sel: Any) -> np.ndarray:
        if isinstance(sel, np.ndarray):
            a, b = int(sel[0]), int(sel[-1]) + 1  # sorted
            if b - a <= _DENSE * sel.shape[0]:
                # indices close together: one slice read, then numpy picks
                return store.read_input(name, slice(a, b), task=i)[sel - a]
        return store.read_input(name, sel, task=i)

    return gather_halo(a["filtration"], lo, hi, take, threshold)


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the jump table owned by task `i`'s vertex range."""
    halo, a, b = task_halo(store, i)
    values, jumps = graph_jumps(halo, a, b, max_dim=store.params["max_dim"])
    counters = {"vertices": b - a, "halo": halo.n_vertices, "halo_edges": halo.n_edges}
    return {"values": values, "jumps": jumps}, counters


# ------------------------------------------------------------------------ the run API


def graph_run(graph: Any, store: str, where: Any = None, *, values: Any = "auto", weights: Any = None,
              max_dim: int | None = None, superlevel: bool = False, threshold: float | None = None,
              n: int | None = None, start: float | None = None, tasks: int | None = None,
              storage_options: Mapping[str, Any] | None = None, discard: bool = False) -> Any:
    """The exact curve of a graph filtration, computed over tasks on the engine.

    The same filtration and the same curve as `chitally.graphs.graph_curve` with the
    same arguments; the work is cut into vertex ranges committed to a run store, so the
    run resumes where it stopped (call it again with the same arguments, or `chitally
    resume STORE`).

    Parameters
    ----------
    graph, values, weights, max_dim, superlevel, threshold, n, start
        As for `graph_curve`.
    store : str
        The run store: a local path or an fsspec URL every worker reaches.
    where : chitally.runs.Where, optional
        Where the tasks run (default: a LocalCluster on this machine).
    tasks : int, optional
        About how many tasks (default: up to 64, fewer for small graphs).
    storage_options : mapping, optional
        fsspec options of the store.
    discard : bool
        Delete committed work of an unfinished store at `store` made for another input.

    Returns
    -------
    Curve

    Raises
    ------
    InputError
        For invalid input or parameters (nothing is written).
    StoreMismatch
        If `store` holds a run of another graph or other parameters.
    RuntimeError
        If tasks failed (the message names how many); the committed ones are kept.
    """
    from ..runs import Where, run

    params = GraphParams.checked(values, weights, max_dim, superlevel, threshold, start, tasks)
    fg = filtered_graph(graph, values, weights, superlevel, threshold, n=n)
    rs = create_or_open(store, fg, params, storage_options=storage_options, discard=discard)
    report = run(rs, where if where is not None else Where())
    if not report.complete:
        raise RuntimeError(f"{len(report.failed)} tasks failed; `chitally resume {rs.url}` continues")
    return report.result
