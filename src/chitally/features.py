"""Feature matrices: exact curves of many clouds, graphs or fields sampled on a grid,
for machine learning.

`feature_matrix` computes one row per cloud, graph or field, in this process (threads
over groups of items) or through a run store on the engine (resumable, on any cluster).
`CurveFeatures` is the same as a scikit-learn transformer. Both share the batch kind's
computation, so a cloud's row is always ``euler_curve(cloud).sample(grid)`` exactly
(divided by the cloud's size when normalised), a graph's row is
``graph_curve(graph, ...).sample(grid)`` and a field's row
``field_curve(field, ...).sample(grid)`` wherever the grid lies in that item's domain,
0 below it (the empty complex) and the whole complex's value above it.

Fields (arrays: images, volumes) when ``fields=True``, when a ``construction`` or
``mask_nan=True`` is given (only fields take them), or when the items are a
`FieldCollection` or a folder of PNG/JPEG/TIFF images (directly or one subfolder per
class). Graphs when ``graphs=True``; when the items are graph objects (networkx graphs,
scipy sparse matrices, `GraphData`, a `GraphCollection`) or a folder of graphs (the
benchmark layout with its ``<NAME>_A.txt``, or only ``.edges`` / ``.edgelist`` files);
or when no eps is given (clouds need one). Clouds otherwise. A list of 2-D arrays could
be clouds, edge arrays or images: say which with ``fields=True`` or ``graphs=True``
(or an eps for clouds).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .clouds import Collection, read_collection, read_labels
from .jobs.batch import (
    BatchParams,
    FieldBatchParams,
    GraphBatchParams,
    checked_grid,
    cloud_cost,
    cloud_rows,
    field_cost,
    field_rows,
    field_sizes,
    graph_cost,
    graph_rows,
    group,
)
from .metric import validate_metric
from .validate import InputError

try:  # scikit-learn is optional: the transformer needs it, the matrix does not
    from sklearn.base import BaseEstimator, TransformerMixin
except ImportError:  # pragma: no cover - exercised only without the extra
    BaseEstimator = object  # type: ignore[assignment,misc]
    TransformerMixin = object  # type: ignore[assignment,misc]


def grid_names(grid: Sequence[float]) -> list[str]:
    """Column names of a grid: ``chi(<scale>)`` with the shortest exact form of the scale."""
    return [f"chi({float(t)!r})" for t in grid]


@dataclass(frozen=True, eq=False)
class FeatureMatrix:
    """A feature matrix: one row per cloud, graph or field (its curve on the grid), with names.

    Attributes
    ----------
    values : ndarray, (items, grid)
        int64 counts, or float64 divided by each item's size.
    names : tuple of str
    grid : ndarray of float64
    labels : tuple or None
    sizes : ndarray of int64
        Points per cloud, vertices per graph, or present entries per field.
    eps : float or None
        The clouds' largest scale (None for graphs and fields).
    """

    values: np.ndarray
    names: tuple[str, ...]
    grid: np.ndarray
    labels: tuple[Any, ...] | None
    sizes: np.ndarray
    eps: float | None
    max_dim: int | None
    normalised: bool

    @staticmethod
    def of_counts(counts: np.ndarray, sizes: np.ndarray, *, names: Sequence[str], labels: Sequence[Any] | None,
                  grid: Sequence[float], eps: float | None, max_dim: int | None, normalise: bool) -> FeatureMatrix:
        counts = np.asarray(counts, dtype=np.int64)
        sizes = np.asarray(sizes, dtype=np.int64)
        values = counts / sizes[:, None] if normalise else counts
        return FeatureMatrix(values, tuple(names), np.asarray(grid, np.float64),
                             None if labels is None else tuple(labels), sizes,
                             None if eps is None else float(eps), max_dim, bool(normalise))

    @property
    def columns(self) -> list[str]:
        return grid_names(self.grid)

    def __eq__(self, other: object) -> bool:
        return (isinstance(other, FeatureMatrix) and self.names == other.names
                and self.labels == other.labels and np.array_equal(self.grid, other.grid)
                and self.values.dtype == other.values.dtype and np.array_equal(self.values, other.values))

    __hash__ = None  # type: ignore[assignment]

    def save(self, path: str | os.PathLike[str], format: str | None = None) -> Path:
        """Write as csv (name[,label],chi(...) columns), npy (values only), npz (values,
        names, grid, labels, sizes) or parquet (pyarrow)."""
        path = Path(path)
        fmt = (format or path.suffix.lstrip(".")).lower()
        if fmt == "csv":
            import csv

            with open(path, "w", newline="") as f:
                w = csv.writer(f)
                w.writerow(["name", *(["label"] if self.labels is not None else []), *self.columns])
                for i, name in enumerate(self.names):
                    row = [repr(float(v)) if self.normalised else int(v) for v in self.values[i]]
                    w.writerow([name, *([self.labels[i]] if self.labels is not None else []), *row])
        elif fmt == "npy":
            np.save(path, self.values)
        elif fmt == "npz":
            extra = {} if self.labels is None else {"labels": np.asarray([str(x) for x in self.labels])}
            np.savez(path, values=self.values, names=np.asarray(self.names), grid=self.grid,
                     sizes=self.sizes, **extra)
        elif fmt == "parquet":
            import pyarrow as pa
            import pyarrow.parquet as pq

            cols: dict[str, Any] = {"name": list(self.names)}
            if self.labels is not None:
                cols["label"] = [str(x) for x in self.labels]
            for j, c in enumerate(self.columns):
                cols[c] = self.values[:, j]
            pq.write_table(pa.table(cols), path)
        else:
            raise ValueError(f"unknown feature matrix format {fmt!r} (csv, npy, npz, parquet)")
        return path


def _in_groups(costs: np.ndarray, rows: Any, n_grid: int, threads: int | None) -> np.ndarray:
    """``rows(ids)`` over groups of items of about equal cost, on `threads` threads."""
    threads = threads or os.cpu_count() or 1
    groups = group(costs, max(float(costs.sum()) / (8 * threads), float(costs.max())))
    out = np.empty((costs.size, n_grid), dtype=np.int64)

    def work(ids: np.ndarray) -> None:
        out[ids] = rows(ids)

    if threads == 1 or len(groups) == 1:
        for g in groups:
            work(g)
    else:  # the kernels release the GIL: threads share the cores without copies
        with ThreadPoolExecutor(threads) as pool:
            list(pool.map(work, groups))
    return out


def _in_process(col: Collection, params: BatchParams, threads: int | None) -> np.ndarray:
    grid = np.asarray(params.grid, np.float64)
    costs = cloud_cost(np.array([c.shape[0] for c in col.clouds]))
    return _in_groups(costs, lambda ids: cloud_rows([col.clouds[i] for i in ids], params.eps,
                                                    params.max_dim, grid, params.metric), grid.size, threads)


def _graphs_in_process(col: Any, params: GraphBatchParams, threads: int | None) -> np.ndarray:
    from .jobs.batch import _check_data

    _check_data(col, params)
    grid = np.asarray(params.grid, np.float64)
    costs = np.array([graph_cost(g) for g in col.graphs])
    return _in_groups(costs, lambda ids: graph_rows([col.graphs[i] for i in ids], params.values,
                                                    params.weights, params.max_dim, params.superlevel,
                                                    params.threshold, grid), grid.size, threads)


def _fields_in_process(col: Any, params: FieldBatchParams, threads: int | None) -> np.ndarray:
    grid = np.asarray(params.grid, np.float64)
    costs = field_cost(np.array([a.size for a in col.fields]), np.array([a.ndim for a in col.fields]))
    return _in_groups(costs, lambda ids: field_rows([col.fields[i] for i in ids], params.construction,
                                                    params.superlevel, params.mask_nan, grid), grid.size, threads)


def _are_fields(items: Any, fields: bool | None, construction: Any, mask_nan: Any, graphs: bool | None) -> bool:
    """Whether the items are fields (see the module's description); options only
    fields take, given to other items, are refused."""
    if fields is not None:
        if fields and graphs:
            raise InputError("fields and graphs: the items are one or the other")
        if not fields and (construction is not None or mask_nan is not False):
            raise InputError(f"{'construction' if construction is not None else 'mask_nan'} applies to "
                             "fields (arrays), not to clouds or graphs")
        return bool(fields)
    if construction is not None or mask_nan is not False:
        if graphs:
            raise InputError(f"{'construction' if construction is not None else 'mask_nan'} applies to "
                             "fields (arrays), not to graphs")
        return True
    if graphs:
        return False
    from .field_sources import is_field_collection

    return is_field_collection(items)


def _field_params(grid: Any, eps: Any, max_dim: Any, normalise: Any, construction: Any, superlevel: Any,
                  mask_nan: Any, options: Mapping[str, Any], metric: Any) -> FieldBatchParams:
    """Validated field parameters; eps, a cap, a metric and the graph options are refused."""
    if eps is not None:
        raise InputError("eps is the largest scale of point clouds; a field's curve spans its values")
    if max_dim is not None:
        raise InputError("max_dim applies to clouds and graphs; a field's cubes go up to its number of dimensions")
    if validate_metric(metric) != "euclidean":
        raise InputError("metric applies to point clouds, not to fields")
    given = [k for k in _graph_options_given(options) if k != "superlevel"]
    if given:
        raise InputError(f"{given[0]} applies to graphs, not to fields")
    return FieldBatchParams.checked(grid, "vertices" if construction is None else construction, superlevel,
                                    mask_nan, normalise)


def _field_matrix(items: Any, params: FieldBatchParams, names: Sequence[str] | None, labels: Any,
                  store: str | None, where: Any, threads: int | None,
                  storage_options: Mapping[str, Any] | None) -> FeatureMatrix:
    from .field_sources import read_fields

    col = read_fields(items, names=names)
    if labels is not None:
        col = col.with_labels(read_labels(labels, col.names, item="field"))
    if store is None:
        sizes = field_sizes(col, params)
        counts = _fields_in_process(col, params, threads)
        return FeatureMatrix.of_counts(counts, sizes, names=col.names, labels=col.labels, grid=params.grid,
                                       eps=None, max_dim=None, normalise=params.normalise)
    from .jobs.batch import create_or_open_fields

    rs = create_or_open_fields(store, col, params, storage_options=storage_options)
    return _run_matrix(rs, where)


def _are_graphs(items: Any, eps: Any, graphs: bool | None) -> bool:
    if graphs is not None:
        return bool(graphs)
    from .graph_sources import is_graph_collection

    return is_graph_collection(items) or eps is None


#: The graph options and their defaults (clouds take none of them).
_GRAPH_DEFAULTS: dict[str, Any] = {"values": "auto", "weights": None, "superlevel": False, "threshold": None}


def _graph_options_given(options: Mapping[str, Any]) -> list[str]:
    def default(k: str) -> bool:
        d, v = _GRAPH_DEFAULTS[k], options[k]
        return isinstance(v, str) and v == d if isinstance(d, str) else v is d

    return [k for k in _GRAPH_DEFAULTS if not default(k)]


def _graph_matrix(items: Any, grid: Any, max_dim: Any, normalise: bool, options: Mapping[str, Any],
                  names: Sequence[str] | None, labels: Any, store: str | None, where: Any,
                  threads: int | None, storage_options: Mapping[str, Any] | None) -> FeatureMatrix:
    from .graph_sources import GraphCollection, graph_collection

    params = GraphBatchParams.checked(grid, max_dim=max_dim, normalise=normalise, **options)
    col = graph_collection(items, names=names)
    if labels is not None:
        col = GraphCollection(col.graphs, np.asarray(read_labels(labels, [g.name for g in col.graphs]),
                                                     dtype=object), col.name)
    if store is None:
        counts = _graphs_in_process(col, params, threads)
        lab = None if col.labels is None else [x.item() if hasattr(x, "item") else x for x in col.labels]
        return FeatureMatrix.of_counts(counts, [g.n for g in col.graphs], names=[g.name for g in col.graphs],
                                       labels=lab, grid=params.grid, eps=None, max_dim=params.max_dim,
                                       normalise=params.normalise)
    from .jobs.batch import create_or_open_graphs

    rs = create_or_open_graphs(store, col, params, storage_options=storage_options)
    return _run_matrix(rs, where)


def _no_metric(metric: Any) -> None:
    """Graphs have no coordinates: a metric other than the default is refused."""
    if validate_metric(metric) != "euclidean":
        raise InputError("metric applies to point clouds, not to graphs")


def _run_matrix(rs: Any, where: Any) -> FeatureMatrix:
    from .runs import Where, run

    report = run(rs, where if where is not None else Where())
    if not report.complete:
        raise RuntimeError(f"{len(report.failed)} tasks failed; `chitally resume {rs.url}` continues")
    return report.result


def feature_matrix(clouds: Any, eps: float | None = None, grid: Any = None, max_dim: int | None = None,
                   normalise: bool = False, *, values: Any = "auto", weights: Any = None,
                   superlevel: bool = False, threshold: float | None = None, graphs: bool | None = None,
                   fields: bool | None = None, construction: str | None = None, mask_nan: bool = False,
                   names: Sequence[str] | None = None,
                   labels: Any = None, store: str | None = None, where: Any = None,
                   threads: int | None = None, storage_options: Mapping[str, Any] | None = None,
                   metric: str = "euclidean") -> FeatureMatrix:
    """The exact feature matrix of a collection of clouds, graphs or fields.

    Parameters
    ----------
    clouds : sequence of arrays, 3-D array, path, graphs, or fields
        The clouds (sizes may differ; one dimension), see `chitally.clouds.read_collection`;
        or the graphs: a sequence of networkx graphs, edge arrays, scipy sparse matrices
        or `GraphData`, a `GraphCollection`, or a folder (the benchmark layout, or edge
        lists), see `chitally.graph_sources.graph_collection`; or the fields: a sequence
        of arrays (shapes and dimensions may differ), a stack whose first axis indexes
        them, a folder of images or ``.npy`` arrays (or of one subfolder per class,
        which labels them), see `chitally.field_sources.read_fields`. Which of the
        three: see the module's description.
    eps : float
        Clouds: largest scale of every cloud's Rips filtration. Not for graphs or fields.
    grid : sequence of float or "START:STOP:COUNT"
        Strictly increasing scales where each curve is sampled: in [0, eps] for clouds;
        any for graphs and fields (in the curve's scale, so negated with
        ``superlevel``), where a row holds 0 at scales below the item's smallest value
        (the empty complex) and the whole complex's value above its largest value.
    max_dim : int, optional
        Simplex dimension cap (clouds and graphs).
    normalise : bool
        Divide each row by its cloud's number of points (its graph's number of
        vertices, its field's number of present entries) (float64); counts otherwise
        (int64).
    values, weights, superlevel, threshold
        Graphs only: the filtration of every graph, as for `chitally.graphs.graph_curve`
        (``values`` a name or None, ``weights`` an edge attribute name or None).
        ``superlevel`` also applies to fields.
    graphs : bool, optional
        Say the items are graphs (True) or not (False) instead of detecting it.
    fields : bool, optional
        Say the items are fields (True) or not (False) instead of detecting it.
    construction : {"vertices", "cells"}, optional
        Fields: the cubical complex, as for `chitally.cubical.field_curve` (default
        "vertices"); giving it says the items are fields.
    mask_nan : bool
        Fields: NaN entries are missing (by default a NaN is refused, naming the field
        and its position); True says the items are fields.
    names, labels : optional
        Names for in-memory items; labels as a sequence or a CSV of ``name,label``
        (a graph collection's own labels are used when none are given).
    store : str, optional
        A run store location: computed on the engine (resumable) with `where`
        (a `chitally.runs.Where`; default a LocalCluster), instead of in this process.
    threads : int, optional
        In-process threads (default: all cores).
    metric : {"euclidean", "manhattan", "chebyshev"}
        Clouds: the distance between two points (see `chitally.euler_curve`).

    Returns
    -------
    FeatureMatrix

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> fm = feature_matrix([rng.random((20, 2)), rng.random((30, 2))], eps=0.3, grid=[0.0, 0.1, 0.3])
    >>> fm.values.shape, fm.values[:, 0].tolist()
    ((2, 3), [20, 30])
    >>> path, triangle = np.array([[0, 1], [1, 2]]), np.array([[0, 1], [1, 2], [0, 2]])
    >>> feature_matrix([path, triangle], grid=[0, 1, 2]).values.tolist()   # degree values
    [[0, 2, 1], [0, 0, 1]]
    >>> images = [np.array([[0, 1], [1, 0]]), np.array([[0, 0, 1]])]
    >>> feature_matrix(images, grid=[0, 1], fields=True).values.tolist()   # sublevel sets of each array
    [[2, 1], [1, 1]]
    """
    if isinstance(grid, str):
        from .curve import parse_grid

        grid = parse_grid(grid)
    if grid is None:
        raise InputError("grid is required: the scales every curve is sampled at")
    options = {"values": values, "weights": weights, "superlevel": superlevel, "threshold": threshold}
    if _are_fields(clouds, fields, construction, mask_nan, graphs):
        params = _field_params(grid, eps, max_dim, normalise, construction, superlevel, mask_nan, options, metric)
        return _field_matrix(clouds, params, names, labels, store, where, threads, storage_options)
    if _are_graphs(clouds, eps, graphs):
        if eps is not None:
            raise InputError("eps is the largest scale of point clouds; graphs take threshold")
        _no_metric(metric)
        return _graph_matrix(clouds, grid, max_dim, normalise, options, names, labels, store, where,
                             threads, storage_options)
    given = _graph_options_given(options)
    if given:
        raise InputError(f"{given[0]} applies to graphs, not to point clouds")
    params = BatchParams.checked(eps, grid, max_dim, normalise, metric=metric)
    col = read_collection(clouds, names=names)
    if labels is not None:
        col = Collection(col.names, col.clouds, read_labels(labels, col.names))
    if store is None:
        counts = _in_process(col, params, threads)
        return FeatureMatrix.of_counts(counts, [c.shape[0] for c in col.clouds], names=col.names,
                                       labels=col.labels, grid=params.grid, eps=params.eps,
                                       max_dim=params.max_dim, normalise=params.normalise)
    from .jobs.batch import create_or_open

    rs = create_or_open(store, col, params, storage_options=storage_options)
    return _run_matrix(rs, where)


class CurveFeatures(TransformerMixin, BaseEstimator):
    """scikit-learn transformer: each cloud's, graph's or field's exact curve sampled on a grid.

    `fit` learns nothing (it validates the parameters); `transform` takes a list of
    clouds of any sizes (one dimension), of graphs, or of fields (arrays: images,
    volumes; shapes may differ), see `feature_matrix` for which, and returns a float64
    matrix (items x grid).

    Parameters
    ----------
    eps : float, optional
        Clouds: the largest scale (required for clouds; leave it None for graphs and fields).
    grid : sequence of float or "START:STOP:COUNT"
    max_dim : int, optional
    normalise : bool
    values, weights, superlevel, threshold
        Graphs: the filtration, as for `chitally.graphs.graph_curve`; ``superlevel``
        also for fields.
    graphs : bool, optional
        Say the items are graphs (True) or not (False) instead of detecting it.
    fields : bool, optional
        Say the items are fields (True) or not (False) instead of detecting it.
    construction : {"vertices", "cells"}, optional
        Fields: the cubical complex (default "vertices"); giving it says the items are
        fields.
    mask_nan : bool
        Fields: NaN entries are missing; True says the items are fields.
    metric : {"euclidean", "manhattan", "chebyshev"}
        Clouds: the distance between two points (see `chitally.euler_curve`).
    n_jobs : int, optional
        Threads in this process (default: all cores).
    scheduler : str, optional
        ``"local"`` for a LocalCluster, or a Dask scheduler address: the items then run
        as a batch job on the engine through a temporary run store.

    Examples
    --------
    >>> from sklearn.pipeline import make_pipeline              # doctest: +SKIP
    >>> from sklearn.svm import SVC                             # doctest: +SKIP
    >>> model = make_pipeline(CurveFeatures(eps=0.5, grid="0:0.5:32"), SVC())  # doctest: +SKIP
    >>> graphs = make_pipeline(CurveFeatures(grid="0:20:21", values="degree"), SVC())  # doctest: +SKIP
    >>> images = make_pipeline(CurveFeatures(grid="0:255:64", construction="cells"), SVC())  # doctest: +SKIP
    """

    def __init__(self, eps: float | None = None, grid: Any = "0:1:16", max_dim: int | None = None,
                 normalise: bool = False, values: Any = "auto", weights: str | None = None,
                 superlevel: bool = False, threshold: float | None = None, graphs: bool | None = None,
                 n_jobs: int | None = None, scheduler: str | None = None, metric: str = "euclidean",
                 fields: bool | None = None, construction: str | None = None, mask_nan: bool = False) -> None:
        self.eps = eps
        self.grid = grid
        self.max_dim = max_dim
        self.normalise = normalise
        self.values = values
        self.weights = weights
        self.superlevel = superlevel
        self.threshold = threshold
        self.graphs = graphs
        self.n_jobs = n_jobs
        self.scheduler = scheduler
        self.metric = metric
        self.fields = fields
        self.construction = construction
        self.mask_nan = mask_nan

    def _grid(self) -> Any:
        grid = self.grid
        if isinstance(grid, str):
            from .curve import parse_grid

            grid = parse_grid(grid)
        return grid

    def _options(self) -> dict[str, Any]:
        return {"values": self.values, "weights": self.weights, "superlevel": self.superlevel,
                "threshold": self.threshold}

    def _params(self, X: Any = None) -> BatchParams | GraphBatchParams | FieldBatchParams:
        if _are_fields(X, self.fields, self.construction, self.mask_nan, self.graphs):
            return _field_params(self._grid(), self.eps, self.max_dim, self.normalise, self.construction,
                                 self.superlevel, self.mask_nan, self._options(), self.metric)
        if _are_graphs(X, self.eps, self.graphs):
            if self.eps is not None:
                raise InputError("eps is the largest scale of point clouds; graphs take threshold")
            _no_metric(self.metric)
            return GraphBatchParams.checked(self._grid(), max_dim=self.max_dim, normalise=self.normalise,
                                            **self._options())
        if self.eps is None:
            raise InputError("eps is required for point clouds (the largest scale)")
        given = _graph_options_given(self._options())
        if given:
            raise InputError(f"{given[0]} applies to graphs, not to point clouds")
        return BatchParams.checked(self.eps, self._grid(), self.max_dim, self.normalise, metric=self.metric)

    def fit(self, X: Any, y: Any = None) -> CurveFeatures:
        params = self._params(X)
        self.n_features_out_ = len(params.grid)
        self.grid_ = np.asarray(params.grid)
        return self

    def transform(self, X: Any) -> np.ndarray:
        from sklearn.utils.validation import check_is_fitted

        check_is_fitted(self, "grid_")
        params = self._params(X)
        if self.scheduler is None:
            if isinstance(params, FieldBatchParams):
                from .field_sources import read_fields

                col = read_fields(X)
                sizes = field_sizes(col, params).astype(np.float64)
                counts = _fields_in_process(col, params, self.n_jobs)
            elif isinstance(params, GraphBatchParams):
                from .graph_sources import graph_collection

                col = graph_collection(X)
                counts = _graphs_in_process(col, params, self.n_jobs)
                sizes = np.array([g.n for g in col.graphs], dtype=np.float64)
            else:
                col = read_collection(X)
                counts = _in_process(col, params, self.n_jobs)
                sizes = np.array([c.shape[0] for c in col.clouds], dtype=np.float64)
            return counts / sizes[:, None] if params.normalise else counts.astype(np.float64)
        import tempfile

        from .runs import Where

        where = Where() if self.scheduler == "local" else Where(scheduler=self.scheduler)
        if isinstance(params, FieldBatchParams):
            kind: dict[str, Any] = {"fields": True, "construction": params.construction,
                                    "superlevel": params.superlevel, "mask_nan": params.mask_nan}
        elif isinstance(params, GraphBatchParams):
            kind = {"graphs": True, **self._options()}
        else:
            kind = {"graphs": False, "metric": params.metric}
        with tempfile.TemporaryDirectory(prefix="chitally-features-") as tmp:
            fm = feature_matrix(X, getattr(params, "eps", None), list(params.grid), getattr(params, "max_dim", None),
                                params.normalise, store=os.path.join(tmp, "run.zarr"), where=where, **kind)
        return fm.values.astype(np.float64)

    def get_feature_names_out(self, input_features: Any = None) -> np.ndarray:
        return np.asarray(grid_names(checked_grid(self._grid())), dtype=object)

    def __sklearn_tags__(self) -> Any:
        tags = super().__sklearn_tags__()
        tags.input_tags.two_d_array = False  # a list of clouds, graphs or fields, not one 2-D array
        tags.requires_fit = True
        return tags
