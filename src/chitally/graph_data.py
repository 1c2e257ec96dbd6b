"""Graphs as chitally takes them: validated edge lists with vertex and edge data.

`GraphData` is a simple undirected graph on vertices 0..n-1 with numeric per-vertex and
per-edge data; `as_graph` makes one from a networkx graph, an edge array or a scipy
sparse matrix; `vertex_values` turns a specification (degree, closeness, a heat kernel
signature, a node attribute, an array) into one value per vertex. Every problem is an
`InputError` with a one-line message: self-loops, negative or non-integer vertex ids, an
edge repeated with different data, NaN or infinite values, asymmetric matrices, arrays
of the wrong length. No counting here and no files (`chitally.graph_sources` reads them).

Node ids. A networkx graph's nodes are numbered in ``G.nodes`` order (which then breaks
ties of values); an edge array's ids are the vertex numbers.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .sources import InputError

__all__ = [
    "GraphData",
    "as_graph",
    "heat_kernel_signature",
    "validate_distance_matrix",
    "vertex_values",
    "vertex_values_array",
]

# neighbour ids and edge ranks are int32 in the kernels
MAX_VERTICES = 2**31 - 2
MAX_EDGES = 2**31 - 2

# heat kernel signatures use a dense eigendecomposition: n^2 doubles
_MAX_HEAT_VERTICES = 6000


# ---------------------------------------------------------------------------- input


@dataclass(frozen=True, eq=False)
class GraphData:
    """A simple undirected graph on vertices 0..n-1, with per-vertex and per-edge data.

    Build it with `GraphData.from_edges` (which validates) or `as_graph`.

    Attributes
    ----------
    n : int
        Number of vertices.
    edges : ndarray of int64, shape (m, 2)
        Distinct edges, each row (lower id, higher id), rows sorted.
    edge_data : mapping of str to ndarray of float64 (m,)
        Numeric edge attributes aligned with ``edges`` (``"weight"`` for a weight column).
    node_data : mapping of str to ndarray of float64 (n,)
        Numeric vertex attributes (node attributes of a networkx graph, the node labels
        and attributes of a collection).
    node_names : tuple or None
        The original node of each vertex, for graphs read from networkx.
    label : object
        The graph's label in a collection, or None.
    name : str or None
        Where the graph came from (file name, collection index).
    """

    n: int
    edges: np.ndarray
    edge_data: Mapping[str, np.ndarray] = field(default_factory=dict)
    node_data: Mapping[str, np.ndarray] = field(default_factory=dict)
    node_names: tuple | None = None
    label: Any = None
    name: str | None = None

    @property
    def n_edges(self) -> int:
        return int(self.edges.shape[0])

    def named(self, name: str | None) -> GraphData:
        """The same graph under another name (itself if the name is its own).

        A plain constructor call: `dataclasses.replace` costs several times more, which
        shows on collections of many thousand small graphs."""
        if name == self.name:
            return self
        return GraphData(self.n, self.edges, self.edge_data, self.node_data, self.node_names, self.label, name)

    def degrees(self) -> np.ndarray:
        """Number of neighbours of each vertex (int64)."""
        return np.bincount(self.edges.ravel(), minlength=self.n).astype(np.int64)

    @classmethod
    def from_edges(
        cls,
        edges: Any,
        n: int | None = None,
        *,
        edge_data: Mapping[str, Any] | None = None,
        node_data: Mapping[str, Any] | None = None,
        node_names: tuple | None = None,
        label: Any = None,
        name: str | None = None,
        where: str = "edges",
    ) -> GraphData:
        """Validate an edge list and build the graph.

        Parameters
        ----------
        edges : array_like, shape (E, 2)
            Vertex ids (integers >= 0, or floats with integer values). ``(u, v)`` and
            ``(v, u)`` are the same edge; repeated edges are merged when their data
            agree.
        n : int, optional
            Number of vertices (default: largest id + 1).
        edge_data, node_data : mapping of str to array_like, optional
            Per-edge values aligned with the rows of ``edges``; per-vertex values of
            length n. Each must be finite.
        node_names, label, name
            Stored as given.
        where : str
            How error messages name the input.

        Raises
        ------
        InputError
            One line naming the problem: a bad shape, a negative or non-integer id, an
            id >= n, a self-loop, a NaN or infinite value, an edge repeated with
            different data, data of the wrong length.
        """
        arr = np.asarray(edges)
        if arr.ndim != 2 or arr.shape[1] != 2:
            if arr.size == 0 and arr.ndim <= 2:
                arr = np.empty((0, 2), dtype=np.int64)
            else:
                raise InputError(f"{where}: expected an (E, 2) array of vertex ids, got shape {arr.shape}")
        ids = _vertex_ids(arr, where)
        m_in = ids.shape[0]
        if n is None:
            n = int(ids.max()) + 1 if m_in else 0
        n = _check_count(n, "n", where)
        if n > MAX_VERTICES:
            raise InputError(f"{where}: {n} vertices is more than the {MAX_VERTICES} one graph may hold")
        if m_in and int(ids.max()) >= n:
            row = int(np.argmax(ids.max(axis=1) >= n))
            raise InputError(
                f"{where}: row {row} has vertex id {int(ids[row].max())} but the graph has "
                f"n = {n} vertices (ids 0..{n - 1})"
            )
        loops = np.flatnonzero(ids[:, 0] == ids[:, 1])
        if loops.size:
            row = int(loops[0])
            raise InputError(
                f"{where}: row {row} is a self-loop at vertex {int(ids[row, 0])}; "
                f"a clique complex has no loops (drop the row)"
            )
        data_in = {k: _edge_values(v, m_in, f"{where}: edge attribute {k!r}", ids) for k, v in (edge_data or {}).items()}
        lo = ids.min(axis=1)
        hi = ids.max(axis=1)
        key = lo * np.int64(max(n, 1)) + hi
        order = np.argsort(key, kind="stable")
        key_sorted = key[order]
        first = np.ones(m_in, dtype=bool)
        if m_in:
            first[1:] = key_sorted[1:] != key_sorted[:-1]
        # a repeated edge must carry the same data each time: compare each repeat with
        # the first occurrence of its edge
        group_first = order[np.maximum.accumulate(np.where(first, np.arange(m_in), 0))] if m_in else order
        for k, vals in data_in.items():
            differ = vals[order] != vals[group_first]
            if differ.any():
                x = int(np.argmax(differ))
                a, b = int(order[x]), int(group_first[x])
                r0, r1 = min(a, b), max(a, b)
                raise InputError(
                    f"{where}: the edge {{{int(lo[a])}, {int(hi[a])}}} appears twice with "
                    f"different {k} ({float(vals[r0])!r} in row {r0}, {float(vals[r1])!r} in row {r1})"
                )
        keep = order[first]
        out_edges = np.stack([lo[keep], hi[keep]], axis=1).astype(np.int64, copy=False)
        if out_edges.shape[0] > MAX_EDGES:
            raise InputError(f"{where}: {out_edges.shape[0]} edges is more than one graph may hold")
        out_data = {k: np.ascontiguousarray(v[keep]) for k, v in data_in.items()}
        nodes = {k: vertex_values_array(v, n, f"{where}: node attribute {k!r}") for k, v in (node_data or {}).items()}
        for arr_ in (out_edges, *out_data.values(), *nodes.values()):
            arr_.setflags(write=False)
        return cls(n, out_edges, out_data, nodes, node_names, label, name)


def _check_count(value: Any, what: str, where: str) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < 0:
        raise InputError(f"{where}: {what} must be an integer >= 0, got {value!r}")
    return int(value)


def _vertex_ids(arr: np.ndarray, where: str) -> np.ndarray:
    if arr.dtype.kind in "iu":
        if arr.size and arr.dtype.kind == "i" and int(arr.min()) < 0:
            row = int(np.argwhere(arr < 0)[0][0])
            raise InputError(f"{where}: row {row} has vertex id {int(arr[row].min())}; vertex ids must be integers >= 0")
        if arr.size and int(arr.max()) > MAX_VERTICES:
            row = int(np.argwhere(arr > MAX_VERTICES)[0][0])
            raise InputError(f"{where}: row {row} has vertex id {int(arr[row].max())}, beyond the {MAX_VERTICES} one graph may hold")
        return arr.astype(np.int64, copy=False)
    if arr.dtype.kind != "f":
        raise InputError(f"{where}: vertex ids must be integers, got dtype {arr.dtype}")
    bad = ~np.isfinite(arr) | (np.floor(arr) != arr) | (arr < 0) | (arr > MAX_VERTICES)
    if bad.any():
        row, col = (int(x) for x in np.argwhere(bad)[0])
        value = float(arr[row, col])
        if math.isfinite(value) and value == math.floor(value) and value > MAX_VERTICES:
            raise InputError(f"{where}: row {row} has vertex id {value!r}, beyond the {MAX_VERTICES} one graph may hold")
        shown = int(value) if math.isfinite(value) and value == math.floor(value) else value
        raise InputError(f"{where}: row {row} has vertex id {shown!r}; vertex ids must be integers >= 0")
    return arr.astype(np.int64)


def _edge_values(values: Any, m: int, where: str, ids: np.ndarray | None = None) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.shape[0] != m:
        raise InputError(f"{where}: expected {m} values, one per edge, got shape {arr.shape}")
    if arr.size and arr.dtype.kind not in "fiu":
        raise InputError(f"{where}: expected real numbers, got dtype {arr.dtype}")
    out = arr.astype(np.float64)
    bad = ~np.isfinite(out)
    if bad.any():
        row = int(np.argmax(bad))
        edge = f" (edge {{{int(ids[row, 0])}, {int(ids[row, 1])}}})" if ids is not None else ""
        raise InputError(f"{where}: row {row}{edge} is {float(out[row])!r}; edge values must be finite numbers")
    return out + 0.0


def vertex_values_array(values: Any, n: int, where: str = "vertex values") -> np.ndarray:
    """Check a per-vertex array: length n, real, finite; returned as float64.

    Raises
    ------
    InputError
        For a wrong length or dtype, or a NaN or infinite value.
    """
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise InputError(f"{where}: expected {n} values, one per vertex, got shape {arr.shape}")
    if arr.size and arr.dtype.kind not in "fiu":
        raise InputError(f"{where}: expected real numbers, got dtype {arr.dtype}")
    out = arr.astype(np.float64)
    bad = ~np.isfinite(out)
    if bad.any():
        v = int(np.argmax(bad))
        raise InputError(f"{where}: vertex {v} has value {float(out[v])!r}; values must be finite")
    return out + 0.0  # -0.0 -> 0.0: one scale for both zeros


def _is_networkx(obj: Any) -> bool:
    return type(obj).__module__.startswith("networkx") and hasattr(obj, "adj")


def _is_sparse(obj: Any) -> bool:
    try:
        import scipy.sparse as sp
    except ImportError:  # pragma: no cover - scipy is a dependency
        return False
    return sp.issparse(obj)


def _numeric(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _from_networkx(G: Any, where: str) -> GraphData:
    if G.is_directed():
        raise InputError(f"{where}: a directed graph; pass G.to_undirected() (the clique complex is undirected)")
    if G.is_multigraph():
        raise InputError(f"{where}: a multigraph; pass nx.Graph(G) to merge parallel edges")
    nodes = list(G.nodes)
    index = {v: i for i, v in enumerate(nodes)}
    m = G.number_of_edges()
    ids = np.empty((m, 2), dtype=np.int64)
    complete: set[str] | None = None
    for k, (u, v, d) in enumerate(G.edges(data=True)):
        ids[k, 0] = index[u]
        ids[k, 1] = index[v]
        names = {a for a, x in d.items() if _numeric(x)}
        complete = names if complete is None else complete & names
    edge_data: dict[str, np.ndarray] = {}
    for a in sorted(complete or ()):
        edge_data[a] = np.array([d[a] for _, _, d in G.edges(data=True)], dtype=np.float64)
    node_data: dict[str, np.ndarray] = {}
    if nodes:
        common = None
        for v in nodes:
            names = {a for a, x in G.nodes[v].items() if _numeric(x)}
            common = names if common is None else common & names
        for a in sorted(common or ()):
            node_data[a] = np.array([G.nodes[v][a] for v in nodes], dtype=np.float64)
    loops = ids[:, 0] == ids[:, 1]
    if loops.any():
        k = int(np.argmax(loops))
        raise InputError(
            f"{where}: a self-loop at node {nodes[int(ids[k, 0])]!r}; a clique complex has no loops "
            f"(G.remove_edges_from(nx.selfloop_edges(G)))"
        )
    return GraphData.from_edges(
        ids, len(nodes), edge_data=edge_data, node_data=node_data, node_names=tuple(nodes), where=where
    )


def _from_sparse(A: Any, where: str) -> GraphData:
    import scipy.sparse as sp

    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise InputError(f"{where}: expected a square matrix, got shape {A.shape}")
    if A.dtype.kind not in "fiub":
        raise InputError(f"{where}: expected real entries, got dtype {A.dtype}")
    n = int(A.shape[0])
    C = sp.coo_matrix(A)
    C.sum_duplicates()  # repeated coordinates add up, as they do for scipy itself
    r = C.row.astype(np.int64)
    c = C.col.astype(np.int64)
    d = C.data.astype(np.float64)
    bad = ~np.isfinite(d)
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(f"{where}: entry ({int(r[k])}, {int(c[k])}) is {float(d[k])!r}; entries must be finite")
    diag = (r == c) & (d != 0)
    if diag.any():
        k = int(np.argmax(diag))
        raise InputError(
            f"{where}: diagonal entry ({int(r[k])}, {int(r[k])}) is {float(d[k])!r}, a self-loop; "
            f"the diagonal must be empty or 0"
        )
    up = r < c
    low = r > c
    ku = r[up] * n + c[up]
    kl = c[low] * n + r[low]
    ou = np.argsort(ku)
    ol = np.argsort(kl)
    ku, du = ku[ou], d[up][ou]
    kl, dl = kl[ol], d[low][ol]
    if ku.shape != kl.shape or not np.array_equal(ku, kl):
        only = np.setxor1d(ku, kl)[0]
        i, j = divmod(int(only), n)
        present = (i, j) if np.isin(only, ku) else (j, i)
        raise InputError(
            f"{where}: not symmetric: entry {present} is stored but {present[::-1]} is not"
        )
    differ = du != dl
    if differ.any():
        k = int(np.argmax(differ))
        i, j = divmod(int(ku[k]), n)
        raise InputError(
            f"{where}: not symmetric: entry ({i}, {j}) is {float(du[k])!r} but ({j}, {i}) is {float(dl[k])!r}"
        )
    ids = np.stack([ku // max(n, 1), ku % max(n, 1)], axis=1)
    return GraphData.from_edges(ids, n, edge_data={"weight": du}, where=where)


def as_graph(graph: Any, n: int | None = None, *, where: str | None = None) -> GraphData:
    """Turn a networkx graph, an edge array or a scipy sparse matrix into a `GraphData`.

    Parameters
    ----------
    graph : networkx.Graph, array_like (E, 2) or (E, 3), scipy sparse matrix, or GraphData
        An (E, 3) array's third column is the edge attribute ``"weight"``. A sparse
        matrix must be square and symmetric; each stored off-diagonal entry is an edge
        (explicit zeros included) whose ``"weight"`` is the entry; its diagonal must be
        empty or 0. A networkx graph keeps its numeric node and edge attributes that
        every node (edge) has.
    n : int, optional
        Number of vertices of an edge array (default: largest id + 1).
    where : str, optional
        How error messages name the input.

    Returns
    -------
    GraphData

    Raises
    ------
    InputError
        For invalid input (see `GraphData.from_edges`), a directed graph or multigraph,
        an asymmetric matrix.
    """
    if isinstance(graph, GraphData):
        if n is not None and n != graph.n:
            raise InputError(f"{where or 'graph'}: n = {n} but the graph has {graph.n} vertices")
        return graph
    if _is_networkx(graph):
        return _from_networkx(graph, where or "graph")
    if _is_sparse(graph):
        if n is not None and n != graph.shape[0]:
            raise InputError(f"{where or 'matrix'}: n = {n} but the matrix is {graph.shape[0]} x {graph.shape[1]}")
        return _from_sparse(graph, where or "matrix")
    where = where or "edges"
    try:
        arr = np.asarray(graph)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where}: not an array of edges: {exc}") from None
    if arr.ndim == 2 and arr.shape[1] == 3:
        if arr.dtype.kind not in "fiu":
            raise InputError(f"{where}: expected numbers, got dtype {arr.dtype}")
        return GraphData.from_edges(arr[:, :2], n, edge_data={"weight": arr[:, 2]}, where=where)
    if arr.ndim != 2 or arr.shape[1] != 2:
        if not (arr.size == 0 and arr.ndim <= 2):
            raise InputError(
                f"{where}: expected an (E, 2) array of vertex ids or (E, 3) with a weight column, "
                f"a networkx graph or a scipy sparse matrix, got shape {arr.shape}"
            )
    return GraphData.from_edges(arr, n, where=where)


# ---------------------------------------------------------------------- vertex values


def heat_kernel_signature(graph: GraphData, t: float) -> np.ndarray:
    """The heat kernel signature of every vertex at time t: ``diag(exp(-t L))``.

    L = D - A is the combinatorial Laplacian of the (unweighted) graph; with its
    eigenpairs (lambda_i, phi_i), ``hks(v) = sum_i exp(-t lambda_i) phi_i(v)^2``. A dense
    eigendecomposition (scipy), so for graphs of up to a few thousand vertices.

    Raises
    ------
    InputError
        If t is not a finite number > 0 or the graph is too large.
    """
    import scipy.linalg

    if not (_numeric(t) and math.isfinite(float(t)) and float(t) > 0):
        raise InputError(f"heat kernel signature: the time t must be a finite number > 0, got {t!r}")
    n = graph.n
    if n > _MAX_HEAT_VERTICES:
        raise InputError(
            f"heat kernel signature: {n} vertices is more than the {_MAX_HEAT_VERTICES} a dense "
            f"eigendecomposition serves here; pass the values as an array"
        )
    if n == 0:
        return np.empty(0, dtype=np.float64)
    L = np.zeros((n, n), dtype=np.float64)
    a, b = graph.edges[:, 0], graph.edges[:, 1]
    L[a, b] = -1.0
    L[b, a] = -1.0
    L[np.arange(n), np.arange(n)] = graph.degrees().astype(np.float64)
    lam, phi = scipy.linalg.eigh(L)
    return (phi * phi) @ np.exp(-float(t) * lam)


def _networkx_graph(graph: GraphData) -> Any:
    try:
        import networkx as nx
    except ImportError as exc:
        raise InputError(
            'closeness values need the optional package networkx: install it with pip install "chitally[graphs]"'
        ) from exc
    G = nx.Graph()
    G.add_nodes_from(range(graph.n))
    G.add_edges_from(graph.edges.tolist())
    return G


def vertex_values(graph: GraphData, spec: Any) -> np.ndarray:
    """The value of every vertex, from a specification.

    Parameters
    ----------
    graph : GraphData
    spec : None, str or array_like
        ``None``: 0 for every vertex. ``"degree"``: the number of neighbours.
        ``"closeness"``: closeness centrality (networkx). ``"heat:<t>"``: the heat kernel
        signature at time t (`heat_kernel_signature`). Another string: the node
        attribute of that name (`GraphData.node_data`). An array: one finite value per
        vertex.

    Returns
    -------
    ndarray of float64, shape (n,)

    Raises
    ------
    InputError
        For an unknown name, a bad heat time, or an array of the wrong length or with
        a NaN or infinite value.
    """
    n = graph.n
    if spec is None:
        return np.zeros(n, dtype=np.float64)
    if isinstance(spec, str):
        if spec == "degree":
            return graph.degrees().astype(np.float64)
        if spec == "closeness":
            G = _networkx_graph(graph)
            import networkx as nx

            cc = nx.closeness_centrality(G)
            return np.array([cc[v] for v in range(n)], dtype=np.float64)
        if spec.startswith("heat:"):
            text = spec[len("heat:"):]
            try:
                t = float(text)
            except ValueError:
                raise InputError(f"vertex values {spec!r}: heat:<t> needs a number t > 0, got {text!r}") from None
            return heat_kernel_signature(graph, t)
        if spec in graph.node_data:
            return np.asarray(graph.node_data[spec], dtype=np.float64)
        if n == 0:  # a graph without vertices has every node attribute, with no value
            return np.zeros(0, dtype=np.float64)
        known = ", ".join(repr(k) for k in graph.node_data) or "none"
        raise InputError(
            f"vertex values {spec!r}: not 'degree', 'closeness', 'heat:<t>' nor a node attribute "
            f"of this graph (its numeric node attributes: {known})"
        )
    return vertex_values_array(spec, n)


def validate_distance_matrix(D: Any, *, where: str = "distance matrix") -> np.ndarray:
    """Check a dense distance matrix and return it as float64.

    Raises
    ------
    InputError
        If D is not a square real matrix, has a NaN or a negative entry, a nonzero
        diagonal entry, or is not exactly symmetric (``inf`` entries are allowed: no
        edge).
    """
    arr = np.asarray(D)
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1]:
        raise InputError(f"{where}: expected a square matrix, got shape {arr.shape}")
    if arr.size and arr.dtype.kind not in "fiu":
        raise InputError(f"{where}: expected real numbers, got dtype {arr.dtype}")
    arr = np.asarray(arr, dtype=np.float64)
    for test, what in ((np.isnan, "NaN"), (lambda x: x < 0, "negative")):
        bad = test(arr)
        if bad.any():
            i, j = (int(x) for x in np.argwhere(bad)[0])
            raise InputError(f"{where}: entry ({i}, {j}) is {float(arr[i, j])!r}; distances must not be {what}")
    diag = np.diagonal(arr)
    if (diag != 0).any():
        i = int(np.argmax(diag != 0))
        raise InputError(f"{where}: diagonal entry ({i}, {i}) is {float(diag[i])!r}; the diagonal must be 0")
    asym = arr != arr.T
    if asym.any():
        i, j = (int(x) for x in np.argwhere(asym)[0])
        raise InputError(
            f"{where}: not symmetric: entry ({i}, {j}) is {float(arr[i, j])!r} but ({j}, {i}) is {float(arr[j, i])!r}"
        )
    return arr
