"""Feature matrices: exact curves of many clouds sampled on a grid, for machine learning.

`feature_matrix` computes one row per cloud, in this process (threads over groups of
clouds) or through a run store on the engine (resumable, on any cluster). `CurveFeatures`
is the same as a scikit-learn transformer. Both share the batch kind's computation, so
a row is always ``euler_curve(cloud).sample(grid)`` exactly (divided by the cloud's size
when normalised).
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
from .jobs.batch import BatchParams, cloud_cost, cloud_rows, group

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
    """A feature matrix: one row per cloud (its curve on the grid), with names.

    Attributes
    ----------
    values : ndarray, (clouds, grid)
        int64 counts, or float64 divided by each cloud's number of points.
    names : tuple of str
    grid : ndarray of float64
    labels : tuple or None
    sizes : ndarray of int64
        Points per cloud.
    """

    values: np.ndarray
    names: tuple[str, ...]
    grid: np.ndarray
    labels: tuple[Any, ...] | None
    sizes: np.ndarray
    eps: float
    max_dim: int | None
    normalised: bool

    @staticmethod
    def of_counts(counts: np.ndarray, sizes: np.ndarray, *, names: Sequence[str], labels: Sequence[Any] | None,
                  grid: Sequence[float], eps: float, max_dim: int | None, normalise: bool) -> FeatureMatrix:
        counts = np.asarray(counts, dtype=np.int64)
        sizes = np.asarray(sizes, dtype=np.int64)
        values = counts / sizes[:, None] if normalise else counts
        return FeatureMatrix(values, tuple(names), np.asarray(grid, np.float64),
                             None if labels is None else tuple(labels), sizes, float(eps), max_dim,
                             bool(normalise))

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


def _in_process(col: Collection, params: BatchParams, threads: int | None) -> np.ndarray:
    grid = np.asarray(params.grid, np.float64)
    sizes = np.array([c.shape[0] for c in col.clouds])
    threads = threads or os.cpu_count() or 1
    costs = cloud_cost(sizes)
    groups = group(costs, max(float(costs.sum()) / (8 * threads), float(costs.max())))
    out = np.empty((len(col), grid.size), dtype=np.int64)

    def work(ids: np.ndarray) -> None:
        out[ids] = cloud_rows([col.clouds[i] for i in ids], params.eps, params.max_dim, grid)

    if threads == 1 or len(groups) == 1:
        for g in groups:
            work(g)
    else:  # the kernel releases the GIL: threads share the cores without copies
        with ThreadPoolExecutor(threads) as pool:
            list(pool.map(work, groups))
    return out


def feature_matrix(clouds: Any, eps: float, grid: Any, max_dim: int | None = None,
                   normalise: bool = False, *, names: Sequence[str] | None = None,
                   labels: Any = None, store: str | None = None, where: Any = None,
                   threads: int | None = None, storage_options: Mapping[str, Any] | None = None) -> FeatureMatrix:
    """The exact feature matrix of a collection of clouds.

    Parameters
    ----------
    clouds : sequence of arrays, 3-D array, or path
        The clouds (sizes may differ; one dimension), see `chitally.clouds.read_collection`.
    eps : float
        Largest scale of every cloud's Rips filtration.
    grid : sequence of float or "START:STOP:COUNT"
        Strictly increasing scales in [0, eps] where each curve is sampled.
    max_dim : int, optional
        Simplex dimension cap.
    normalise : bool
        Divide each row by its cloud's number of points (float64); counts otherwise (int64).
    names, labels : optional
        Names for in-memory clouds; labels as a sequence or a CSV of ``name,label``.
    store : str, optional
        A run store location: computed on the engine (resumable) with `where`
        (a `chitally.runs.Where`; default a LocalCluster), instead of in this process.
    threads : int, optional
        In-process threads (default: all cores).

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
    """
    if isinstance(grid, str):
        from .curve import parse_grid

        grid = parse_grid(grid)
    params = BatchParams.checked(eps, grid, max_dim, normalise)
    col = read_collection(clouds, names=names)
    if labels is not None:
        col = Collection(col.names, col.clouds, read_labels(labels, col.names))
    if store is None:
        counts = _in_process(col, params, threads)
        return FeatureMatrix.of_counts(counts, [c.shape[0] for c in col.clouds], names=col.names,
                                       labels=col.labels, grid=params.grid, eps=params.eps,
                                       max_dim=params.max_dim, normalise=params.normalise)
    from .jobs.batch import create_or_open
    from .runs import Where, run

    rs = create_or_open(store, col, params, storage_options=storage_options)
    report = run(rs, where if where is not None else Where())
    if not report.complete:
        raise RuntimeError(f"{len(report.failed)} tasks failed; `chitally resume {rs.url}` continues")
    return report.result


class CurveFeatures(TransformerMixin, BaseEstimator):
    """scikit-learn transformer: each cloud's exact curve sampled on a grid.

    `fit` learns nothing (it validates the parameters); `transform` takes a list of
    clouds of any sizes (one dimension) and returns a float64 matrix (clouds x grid).

    Parameters
    ----------
    eps : float
    grid : sequence of float or "START:STOP:COUNT"
    max_dim : int, optional
    normalise : bool
    n_jobs : int, optional
        Threads in this process (default: all cores).
    scheduler : str, optional
        ``"local"`` for a LocalCluster, or a Dask scheduler address: the clouds then run
        as a batch job on the engine through a temporary run store.

    Examples
    --------
    >>> from sklearn.pipeline import make_pipeline              # doctest: +SKIP
    >>> from sklearn.svm import SVC                             # doctest: +SKIP
    >>> model = make_pipeline(CurveFeatures(eps=0.5, grid="0:0.5:32"), SVC())  # doctest: +SKIP
    """

    def __init__(self, eps: float = 1.0, grid: Any = "0:1:16", max_dim: int | None = None,
                 normalise: bool = False, n_jobs: int | None = None, scheduler: str | None = None) -> None:
        self.eps = eps
        self.grid = grid
        self.max_dim = max_dim
        self.normalise = normalise
        self.n_jobs = n_jobs
        self.scheduler = scheduler

    def _params(self) -> BatchParams:
        grid = self.grid
        if isinstance(grid, str):
            from .curve import parse_grid

            grid = parse_grid(grid)
        return BatchParams.checked(self.eps, grid, self.max_dim, self.normalise)

    def fit(self, X: Any, y: Any = None) -> CurveFeatures:
        params = self._params()
        self.n_features_out_ = len(params.grid)
        self.grid_ = np.asarray(params.grid)
        return self

    def transform(self, X: Any) -> np.ndarray:
        from sklearn.utils.validation import check_is_fitted

        check_is_fitted(self, "grid_")
        params = self._params()
        if self.scheduler is None:
            col = read_collection(X)
            counts = _in_process(col, params, self.n_jobs)
            sizes = np.array([c.shape[0] for c in col.clouds], dtype=np.float64)
            return counts / sizes[:, None] if params.normalise else counts.astype(np.float64)
        import tempfile

        from .runs import Where

        where = Where() if self.scheduler == "local" else Where(scheduler=self.scheduler)
        with tempfile.TemporaryDirectory(prefix="chitally-features-") as tmp:
            fm = feature_matrix(X, params.eps, list(params.grid), params.max_dim, params.normalise,
                                store=os.path.join(tmp, "run.zarr"), where=where)
        return fm.values.astype(np.float64)

    def get_feature_names_out(self, input_features: Any = None) -> np.ndarray:
        return np.asarray(grid_names(self._params().grid), dtype=object)

    def __sklearn_tags__(self) -> Any:
        tags = super().__sklearn_tags__()
        tags.input_tags.two_d_array = False  # a list of clouds, not one 2-D array
        tags.requires_fit = True
        return tags
