"""The exact curve of a point set that fits in one process.

Validates the input, relabels the points in KD-tree leaf order (the kernel visits
neighbourhoods far faster in a spatially coherent order), runs the kernel over every row
in threads and wraps the jump table into a `Curve`. Every compiled loop runs in blocks,
so Ctrl-C stops a long call within a fraction of a second. No files, no Zarr, no Dask.
"""

from __future__ import annotations

import time
from typing import Literal, overload

import numpy as np

from .curve import Curve
from .kernel import KernelStats, build_tree, count_jumps
from .metric import validate_metric
from .sources import validate_eps, validate_max_dim, validate_points


def leaf_order(points: np.ndarray) -> np.ndarray:
    """A permutation of the rows in KD-tree leaf order (leaves of at most 16 rows)."""
    return _leaf_ordered(points)[1]


def _leaf_ordered(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(points[order], order) for the leaf order. The tree is built in blocks of nodes,
    so that a large cloud can be interrupted while it is sorted."""
    xs, perm = build_tree(points, 16)[:2]
    return xs, perm


@overload
def euler_curve(points, eps, max_dim=..., *, threads=..., return_stats: Literal[False] = ...,
                metric=...) -> Curve: ...
@overload
def euler_curve(points, eps, max_dim=..., *, threads=..., return_stats: Literal[True],
                metric=...) -> tuple[Curve, KernelStats]: ...


def euler_curve(
    points: np.ndarray,
    eps: float,
    max_dim: int | None = None,
    *,
    threads: int | None = None,
    return_stats: bool = False,
    metric: str = "euclidean",
) -> Curve | tuple[Curve, KernelStats]:
    """The exact Euler characteristic curve of the Vietoris-Rips filtration up to eps.

    Parameters
    ----------
    points : array of shape (n, m)
        Finite real coordinates; coincident points count as distinct vertices.
    eps : float
        Largest scale (> 0). Edges are the pairs at distance <= eps in `metric`.
    max_dim : int, optional
        Count simplices of dimension <= max_dim only; None counts all of them.
    threads : int, optional
        Threads for the kernel. By default (None) the size of the counting decides: one
        thread while the sum over points of (degree^2 + 1), degrees in the eps-graph,
        stays below ``kernel.AUTO_THREADS_WORK`` (2^20; at max_dim=2
        ``kernel.AUTO_THREADS_WORK_CAP2``, 2^23), about 20 ms of counting, where starting
        threads costs more than they save; every core the process may use above it (see
        `kernel.default_threads`). Many small clouds thus run one thread each.
    return_stats : bool
        Also return the kernel's counters (edges, cones, collapses, splits, seconds).
    metric : {"euclidean", "manhattan", "chebyshev"}
        The distance between two points: Euclidean (default), Manhattan (sum of the
        absolute coordinate differences, p = 1) or Chebyshev (their largest, p = inf),
        each by its one rule in :mod:`chitally.metric`.

    Returns
    -------
    Curve, or (Curve, KernelStats) with ``return_stats=True``.

    Examples
    --------
    >>> import numpy as np
    >>> square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    >>> curve = euler_curve(square, eps=1.5)
    >>> curve.at(0.0), curve.at(1.0), curve.at(1.5)
    (4, 0, 1)
    """
    points = validate_points(points)
    eps = validate_eps(eps)
    max_dim = validate_max_dim(max_dim)
    metric = validate_metric(metric)
    t0 = time.perf_counter()
    coords = _leaf_ordered(points)[0]
    table = count_jumps(coords, eps, max_dim, threads=threads or None, metric=metric)
    curve = Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=max_dim, n_points=points.shape[0])
    if return_stats:
        # the relabelling counts as neighbour search, like the KD-tree query itself
        table.stats.seconds_graph = time.perf_counter() - t0 - table.stats.seconds_count
        return curve, table.stats
    return curve
