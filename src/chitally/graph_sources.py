"""Readers for graphs and collections of graphs, with the validation of `chitally.graphs`.

One graph:

* edge lists (``.csv``, ``.tsv``, ``.txt``, ``.edges``, ``.edgelist``, text compressed
  as ``.gz`` etc. for the first three): two columns of vertex ids (integers >= 0) and an
  optional third column, the edge attribute ``"weight"``; delimiter comma, else tab,
  else spaces; ``#`` starts a comment; a first line with no number in it is a header;
* what networkx reads (``.graphml``, ``.gml``, ``.adjlist``; networkx is the optional
  extra ``graphs``): nodes are numbered in file order and numeric node and edge
  attributes that every node (edge) has are kept;
* scipy sparse matrices saved with ``scipy.sparse.save_npz`` (``.npz``): square and
  symmetric, every stored off-diagonal entry an edge with that ``"weight"``;
* dense distance matrices (``.npy``), through `read_matrix`, for `matrix_curve`.

Collections (`read_collection`):

* the folder layout of graph classification benchmarks: ``<NAME>_A.txt`` (one edge a
  line, ``i, j`` with 1-based node ids over the whole collection),
  ``<NAME>_graph_indicator.txt`` (line i: the 1-based graph of node i),
  ``<NAME>_graph_labels.txt`` (one label a graph), and optionally
  ``<NAME>_node_labels.txt`` (node data ``"label"``), ``<NAME>_node_attributes.txt``
  (comma-separated, node data ``"attribute_0"``, ``"attribute_1"``, ...),
  ``<NAME>_edge_labels.txt`` and ``<NAME>_edge_attributes.txt`` (aligned with the lines
  of ``_A.txt``: edge data ``"label"``, ``"attribute_0"``, ...);
* a folder of edge-list files, one graph each, in name order.

Every problem is an `InputError` with a one-line message. Paths may be local or fsspec
URLs (networkx formats and folders: local paths).
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import fsspec
import numpy as np

from .graph_data import GraphData, _is_networkx, _is_sparse, as_graph, validate_distance_matrix
from .sources import InputError, _locate, _read_npy, _read_text, _Source

__all__ = [
    "EDGE_LIST_ENDINGS",
    "GraphCollection",
    "graph_collection",
    "is_graph_collection",
    "read_collection",
    "read_edge_list",
    "read_edge_list_folder",
    "read_graph",
    "read_matrix",
    "read_tu",
    "read_vertex_values",
]

#: File endings read as edge lists (also compressed, e.g. ``.csv.gz``, for the first three).
EDGE_LIST_ENDINGS = (".csv", ".tsv", ".txt", ".edges", ".edgelist")
_NETWORKX_ENDINGS = (".graphml", ".gml", ".adjlist")


@dataclass(frozen=True, eq=False)
class GraphCollection:
    """Many graphs, with a label each where the collection has labels.

    Attributes
    ----------
    graphs : tuple of GraphData
    labels : ndarray or None
        One label per graph (integers or floats as read), or None.
    name : str
    """

    graphs: tuple[GraphData, ...]
    labels: np.ndarray | None
    name: str

    def __len__(self) -> int:
        return len(self.graphs)

    def __iter__(self) -> Iterator[GraphData]:
        return iter(self.graphs)

    def __getitem__(self, i: int) -> GraphData:
        return self.graphs[i]


# ---------------------------------------------------------------------- one graph


def _ending(path: str) -> str:
    name = os.fspath(path).rstrip("/\\").lower()
    base, ext = os.path.splitext(name)
    if ext in (".gz", ".bz2", ".xz", ".zst", ".lz4") and os.path.splitext(base)[1]:
        return os.path.splitext(base)[1] + ext
    return ext


def _text_source(source: Any) -> _Source:
    text = os.fspath(source)
    ext = _ending(text)
    if ext in (".edges", ".edgelist"):
        if "://" not in text and not os.path.exists(os.path.expanduser(text)):
            raise InputError(f"{text}: no such file or directory")
        return _Source(os.path.expanduser(text), text, "://" in text, False, "text", None)
    src = _locate(source)
    if src.fmt != "text":
        raise InputError(f"{src.display}: not an edge list; edge lists end in {', '.join(EDGE_LIST_ENDINGS)}")
    return src


def _table(src: _Source) -> np.ndarray:
    return _read_text(src, None, None, None)[0]


def read_edge_list(source: str | os.PathLike[str], *, n: int | None = None) -> GraphData:
    """Read an edge list: ``u, v`` or ``u, v, weight`` per line.

    Parameters
    ----------
    source : str or os.PathLike
        A ``.csv``, ``.tsv``, ``.txt`` (optionally compressed), ``.edges`` or
        ``.edgelist`` file, local or an fsspec URL.
    n : int, optional
        Number of vertices (default: largest id + 1).

    Returns
    -------
    GraphData
        With edge data ``"weight"`` when there is a third column.

    Raises
    ------
    InputError
        For a missing file, a bad cell, a number of columns other than 2 or 3, or an
        invalid graph (`GraphData.from_edges`; rows are counted from 0 among the data
        lines).
    """
    src = _text_source(source)
    try:
        table = _table(src)
    except InputError as exc:
        if "holds no data rows" in str(exc):
            return GraphData.from_edges(np.empty((0, 2), dtype=np.int64), 0 if n is None else n, name=src.display)
        raise
    if table.shape[1] not in (2, 3):
        raise InputError(
            f"{src.display}: {table.shape[1]} columns; an edge list has 2 (u, v) or 3 (u, v, weight)"
        )
    edge_data = {"weight": table[:, 2]} if table.shape[1] == 3 else None
    return GraphData.from_edges(table[:, :2], n, edge_data=edge_data, name=src.display, where=src.display)


def _networkx(where: str) -> Any:
    try:
        import networkx as nx
    except ImportError as exc:
        raise InputError(
            f'{where}: reading this format needs the optional package networkx: install it with pip install "chitally[graphs]"'
        ) from exc
    return nx


def _read_networkx(path: str, ext: str) -> GraphData:
    nx = _networkx(path)
    try:
        with fsspec.open(path, "rb", compression="infer") as f:
            if ext.startswith(".graphml"):
                G = nx.read_graphml(f)
            elif ext.startswith(".gml"):
                G = nx.read_gml(f, label=None)
            else:
                G = nx.read_adjlist(f)
    except FileNotFoundError:
        raise InputError(f"{path}: no such file or directory") from None
    except Exception as exc:  # networkx's parsers raise many types for malformed files
        raise InputError(f"{path}: cannot read as {ext.lstrip('.')}: {' '.join(str(exc).split()) or type(exc).__name__}") from exc
    g = as_graph(G, where=path)
    return GraphData(g.n, g.edges, g.edge_data, g.node_data, g.node_names, g.label, path)


def _read_sparse(path: str) -> GraphData:
    import scipy.sparse as sp

    try:
        with fsspec.open(path, "rb") as f:
            A = sp.load_npz(f)
    except FileNotFoundError:
        raise InputError(f"{path}: no such file or directory") from None
    except (OSError, ValueError, KeyError) as exc:
        raise InputError(
            f"{path}: not a scipy sparse matrix (save one with scipy.sparse.save_npz): {' '.join(str(exc).split())}"
        ) from exc
    g = as_graph(A, where=path)
    return GraphData(g.n, g.edges, g.edge_data, g.node_data, g.node_names, g.label, path)


def read_graph(source: str | os.PathLike[str], *, n: int | None = None) -> GraphData:
    """Read one graph, the format chosen by the file's ending.

    Parameters
    ----------
    source : str or os.PathLike
        An edge list (`EDGE_LIST_ENDINGS`), ``.graphml``, ``.gml``, ``.adjlist`` (also
        ``.gz``), or a scipy sparse ``.npz``.
    n : int, optional
        Number of vertices of an edge list.

    Returns
    -------
    GraphData

    Raises
    ------
    InputError
        For an unknown ending (a ``.npy`` dense matrix is read by `read_matrix`), a
        missing or malformed file, or an invalid graph.
    """
    text = os.fspath(source)
    ext = _ending(text)
    base = ext.split(".")[1] if ext.count(".") > 1 else ext.lstrip(".")
    if "." + base in _NETWORKX_ENDINGS:
        return _read_networkx(text, "." + base)
    if ext == ".npz":
        return _read_sparse(text)
    if ext == ".npy":
        raise InputError(f"{text}: a .npy file holds a dense distance matrix: read it with read_matrix (matrix_curve)")
    if "." + base in EDGE_LIST_ENDINGS:
        return read_edge_list(source, n=n)
    raise InputError(
        f"{text}: unknown graph file type; supported: {', '.join(EDGE_LIST_ENDINGS + _NETWORKX_ENDINGS)}, "
        f".npz (scipy sparse), .npy (dense distance matrix, read_matrix)"
    )


def read_matrix(source: str | os.PathLike[str]) -> np.ndarray:
    """Read a dense distance matrix from a ``.npy`` file and validate it.

    Returns
    -------
    ndarray of float64 (n, n)

    Raises
    ------
    InputError
        If the file is missing or unreadable, or the matrix is not square, real,
        symmetric, with zero diagonal and no NaN or negative entry.
    """
    src = _locate(source)
    if src.fmt != "npy":
        raise InputError(f"{src.display}: a dense distance matrix is read from a .npy file")
    return validate_distance_matrix(np.asarray(_read_npy(src, None)), where=src.display)


def read_vertex_values(source: str | os.PathLike[str]) -> np.ndarray:
    """Read one value per vertex: a 1-D ``.npy`` array, or a text file of one number a
    line (``.csv``, ``.tsv``, ``.txt``; a header line is allowed).

    Returns
    -------
    ndarray of float64
        As read; its length and finiteness are checked against the graph when used.

    Raises
    ------
    InputError
        For a missing or malformed file, or more than one value a line.
    """
    src = _locate(source)
    if src.fmt == "npy":
        arr = np.asarray(_read_npy(src, None))
        if arr.ndim == 2 and arr.shape[1] == 1:
            arr = arr[:, 0]
        if arr.ndim != 1:
            raise InputError(f"{src.display}: vertex values are a 1-D array, got shape {arr.shape}")
        if arr.size and arr.dtype.kind not in "fiu":
            raise InputError(f"{src.display}: vertex values must be real numbers, got dtype {arr.dtype}")
        return arr.astype(np.float64)
    if src.fmt != "text":
        raise InputError(f"{src.display}: vertex values are read from a .npy file or a text file of one number a line")
    return _one_column(_table(src), src.display).astype(np.float64)


# --------------------------------------------------------------------- collections


def _tu_name(folder: str, name: str | None) -> str:
    if name is not None:
        if not os.path.exists(os.path.join(folder, f"{name}_A.txt")):
            raise InputError(f"{folder}: no {name}_A.txt here")
        return name
    names = sorted(f[: -len("_A.txt")] for f in os.listdir(folder) if f.endswith("_A.txt"))
    if not names:
        raise InputError(f"{folder}: no <NAME>_A.txt file here, so not a benchmark collection")
    if len(names) > 1:
        raise InputError(f"{folder}: holds several collections ({', '.join(names)}); choose one with name")
    return names[0]


def _tu_file(folder: str, name: str, part: str, required: bool) -> np.ndarray | None:
    path = os.path.join(folder, f"{name}_{part}.txt")
    if not os.path.exists(path):
        if required:
            raise InputError(f"{folder}: {name}_{part}.txt is missing")
        return None
    try:
        return _table(_locate(path))
    except InputError as exc:
        if "holds no data rows" in str(exc):
            return np.empty((0, 1))
        raise


def _one_column(table: np.ndarray, path: str) -> np.ndarray:
    if table.shape[1] != 1:
        raise InputError(f"{path}: expected one value per line, found {table.shape[1]} columns")
    return table[:, 0]


def _aligned(table: np.ndarray | None, rows: int, path: str, what: str) -> np.ndarray | None:
    if table is None:
        return None
    if table.shape[0] != rows:
        raise InputError(f"{path}: {table.shape[0]} lines but there are {rows} {what}")
    return table


def _as_labels(values: np.ndarray) -> np.ndarray:
    if values.size and (np.floor(values) == values).all() and np.abs(values).max() < 2**53:
        return values.astype(np.int64)
    return values


def read_tu(folder: str | os.PathLike[str], name: str | None = None) -> GraphCollection:
    """Read a collection in the benchmark folder layout (see the module's description).

    Parameters
    ----------
    folder : str or os.PathLike
        The folder holding ``<NAME>_A.txt`` and its companions (a local path).
    name : str, optional
        NAME, when the folder holds several collections.

    Returns
    -------
    GraphCollection
        Graph k is the graph of indicator k + 1; its vertices are its nodes in
        increasing node id; labels are integers when every label is one.

    Raises
    ------
    InputError
        For a missing file, a file of the wrong length, a node id outside 1..N, an edge
        between two graphs, or an invalid graph (a self-loop, say).
    """
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputError(f"{folder}: not a folder")
    name = _tu_name(folder, name)
    p = lambda part: os.path.join(folder, f"{name}_{part}.txt")  # noqa: E731
    A = _tu_file(folder, name, "A", True)
    indicator_t = _tu_file(folder, name, "graph_indicator", True)
    labels_t = _tu_file(folder, name, "graph_labels", False)
    if A.shape[0] and A.shape[1] != 2:
        raise InputError(f"{p('A')}: expected two node ids a line, found {A.shape[1]} columns")
    indicator = _one_column(indicator_t, p("graph_indicator"))
    if (np.floor(indicator) != indicator).any() or (indicator < 1).any():
        row = int(np.argmax((np.floor(indicator) != indicator) | (indicator < 1)))
        raise InputError(f"{p('graph_indicator')}: line {row + 1} is {indicator[row]:g}; graph ids are integers from 1")
    indicator = indicator.astype(np.int64) - 1
    N = indicator.shape[0]
    G = int(indicator.max()) + 1 if N else 0
    labels = None
    if labels_t is not None:
        labels = _as_labels(_one_column(labels_t, p("graph_labels")))
        if labels.shape[0] != G:
            raise InputError(f"{p('graph_labels')}: {labels.shape[0]} labels but there are {G} graphs")
    node_labels = _aligned(_tu_file(folder, name, "node_labels", False), N, p("node_labels"), "nodes")
    node_attrs = _aligned(_tu_file(folder, name, "node_attributes", False), N, p("node_attributes"), "nodes")
    edge_labels = _aligned(_tu_file(folder, name, "edge_labels", False), A.shape[0], p("edge_labels"), "edges in _A.txt")
    edge_attrs = _aligned(_tu_file(folder, name, "edge_attributes", False), A.shape[0], p("edge_attributes"), "edges in _A.txt")
    if A.shape[0]:
        bad = (np.floor(A) != A) | (A < 1) | (A > N)
        if bad.any():
            row, col = (int(x) for x in np.argwhere(bad)[0])
            raise InputError(f"{p('A')}: line {row + 1} has node id {A[row, col]:g}; node ids are integers 1..{N}")
    ends = A.astype(np.int64) - 1 if A.shape[0] else np.empty((0, 2), dtype=np.int64)
    loops = ends[:, 0] == ends[:, 1]
    if loops.any():
        row = int(np.argmax(loops))
        raise InputError(f"{p('A')}: line {row + 1} is a self-loop at node {int(ends[row, 0]) + 1}; a clique complex has no loops")
    g_of_edge = indicator[ends[:, 0]]
    across = g_of_edge != indicator[ends[:, 1]]
    if across.any():
        row = int(np.argmax(across))
        raise InputError(
            f"{p('A')}: line {row + 1} joins node {int(ends[row, 0]) + 1} of graph {int(g_of_edge[row]) + 1} "
            f"to node {int(ends[row, 1]) + 1} of graph {int(indicator[ends[row, 1]]) + 1}"
        )
    # each node's position among the nodes of its graph
    node_order = np.argsort(indicator, kind="stable")
    counts = np.bincount(indicator, minlength=G)
    first = np.concatenate([[0], np.cumsum(counts)[:-1]])
    local = np.empty(N, dtype=np.int64)
    local[node_order] = np.arange(N) - first[indicator[node_order]]
    edge_order = np.argsort(g_of_edge, kind="stable")
    ecounts = np.bincount(g_of_edge, minlength=G)
    efirst = np.concatenate([[0], np.cumsum(ecounts)[:-1]])

    def columns(table: np.ndarray | None, key: str) -> dict[str, np.ndarray]:
        if table is None:
            return {}
        if key == "label":
            return {"label": table[:, 0]} if table.shape[1] == 1 else {f"label_{k}": table[:, k] for k in range(table.shape[1])}
        return {f"attribute_{k}": table[:, k] for k in range(table.shape[1])}

    node_cols = {**columns(node_labels, "label"), **columns(node_attrs, "attribute")}
    edge_cols = {**columns(edge_labels, "label"), **columns(edge_attrs, "attribute")}
    graphs = []
    for g in range(G):
        nodes = node_order[first[g]: first[g] + counts[g]]
        rows = edge_order[efirst[g]: efirst[g] + ecounts[g]]
        where = f"{p('A')} (graph {g + 1})"
        graphs.append(
            GraphData.from_edges(
                local[ends[rows]],
                int(counts[g]),
                edge_data={k: v[rows] for k, v in edge_cols.items()},
                node_data={k: v[nodes] for k, v in node_cols.items()},
                label=None if labels is None else labels[g].item(),
                name=f"{name}[{g}]",
                where=where,
            )
        )
    return GraphCollection(tuple(graphs), labels, name)


def read_edge_list_folder(folder: str | os.PathLike[str]) -> GraphCollection:
    """Read every edge-list file of a folder (`EDGE_LIST_ENDINGS`) as one graph, in name order.

    Raises
    ------
    InputError
        If the folder holds no edge list, or one of them is invalid.
    """
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputError(f"{folder}: not a folder")
    files = sorted(
        f for f in os.listdir(folder)
        if any(f.lower().endswith(e) or f.lower().endswith(e + ".gz") for e in EDGE_LIST_ENDINGS)
        and os.path.isfile(os.path.join(folder, f))
    )
    if not files:
        raise InputError(f"{folder}: no edge-list file here ({', '.join(EDGE_LIST_ENDINGS)})")
    graphs = tuple(read_edge_list(os.path.join(folder, f)) for f in files)
    return GraphCollection(graphs, None, os.path.basename(folder.rstrip("/\\")) or folder)


def read_collection(folder: str | os.PathLike[str], name: str | None = None) -> GraphCollection:
    """Read a collection: the benchmark layout when the folder has a ``<NAME>_A.txt``,
    otherwise every edge-list file in it."""
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputError(f"{folder}: not a folder")
    if name is not None or any(f.endswith("_A.txt") for f in os.listdir(folder)):
        return read_tu(folder, name)
    return read_edge_list_folder(folder)


# ------------------------------------------------------------ collections as rows


def is_graph_collection(source: Any) -> bool:
    """Whether `source` is unmistakably graphs rather than point clouds: a
    `GraphCollection`, a sequence of networkx graphs, sparse matrices or `GraphData`,
    a folder in the benchmark layout, or a folder whose only data files are ``.edges``
    or ``.edgelist`` files. Edge arrays and folders of ``.csv``/``.txt`` files could be
    either, so they are not (say so explicitly)."""
    if isinstance(source, GraphCollection):
        return True
    if isinstance(source, (str, os.PathLike)):
        folder = os.fspath(source)
        if not os.path.isdir(folder):
            return False
        files = [f for f in os.listdir(folder) if not f.startswith(".") and os.path.isfile(os.path.join(folder, f))]
        if any(f.endswith("_A.txt") for f in files):
            return True
        return bool(files) and all(f.lower().endswith((".edges", ".edgelist")) for f in files)
    if isinstance(source, (list, tuple)) and source:
        first = source[0]
        return isinstance(first, GraphData) or _is_networkx(first) or _is_sparse(first)
    return False


def _row_name(name: str | None, k: int) -> str:
    if not name:
        return str(k)
    base = os.path.basename(name.rstrip("/\\"))
    return base.split(".")[0] if _ending(base) else base


def graph_collection(source: Any, *, names: Sequence[str] | None = None) -> GraphCollection:
    """Graphs for a feature matrix, each named for its row.

    Parameters
    ----------
    source : GraphCollection, folder, or sequence of graphs
        A folder is read by `read_collection` (the benchmark layout, or a folder of
        edge lists); a sequence holds networkx graphs, edge arrays, scipy sparse
        matrices or `GraphData` (see `as_graph`).
    names : sequence of str, optional
        One name a graph (default: a folder's file names without their endings, the
        benchmark layout's ``NAME[k]``, else positions ``"0"``, ``"1"``, ...).

    Returns
    -------
    GraphCollection
        Its graphs' ``name`` is their row name; names never repeat.

    Raises
    ------
    InputError
        For an empty collection, an invalid graph (the message names it), or names that
        repeat or do not match the graphs in number.
    """
    if isinstance(source, GraphCollection):
        col = source
    elif isinstance(source, (str, os.PathLike)):
        col = read_collection(source)
    else:
        try:
            items = list(source)
        except TypeError:
            raise InputError(f"a collection of graphs is a folder or a sequence of graphs, got {type(source).__name__}") from None
        graphs = tuple(as_graph(g, where=f"graph {k}") for k, g in enumerate(items))
        col = GraphCollection(graphs, None, "graphs")
    if len(col) == 0:
        raise InputError("the collection holds no graphs")
    if names is not None:
        names = [str(x) for x in names]
        if len(names) != len(col):
            raise InputError(f"{len(names)} names for {len(col)} graphs")
    else:
        names = [_row_name(g.name, k) for k, g in enumerate(col.graphs)]
        if len(set(names)) != len(names):
            names = [os.path.basename(g.name or str(k)) for k, g in enumerate(col.graphs)]
        if len(set(names)) != len(names):
            names = [str(k) for k in range(len(col))]
    if len(set(names)) != len(names):
        raise InputError("graph names repeat")
    graphs = tuple(g.named(name) for g, name in zip(col.graphs, names))
    return GraphCollection(graphs, col.labels, col.name)
