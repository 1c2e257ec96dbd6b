"""Which eps? What a run would cost at each scale, estimated from a sample of rows.

`scan_eps` draws a seeded sample of rows and, for each eps, counts their neighbours
against all N points by the one distance rule of :mod:`chitally.metric` (cKDTree only
proposes: a count at a radius just under eps and one just over it agree for almost every
row, and the rows where they differ are decided by the rule). From those exact sampled
degrees it estimates, for the whole cloud, the mean degree (with its standard error),
the edges and triangles, and what a run would cost through the planner's own cost and
memory models (`planner._row_cost`, `planner._task_memory`). The cost is turned into
seconds by timing the kernel (`kernel.count_jumps`, one thread) on a compact patch of the
user's own points at each eps, so the time is an estimate for this machine and this data.

Pure: numpy, scipy and the project's compiled rule; no files, no Dask, no Zarr.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numba as nb
import numpy as np
from scipy.spatial import cKDTree

from .inprocess import leaf_order
from .kernel import count_jumps
from .metric import (
    QUERY_SLACK,
    distance_key,
    lengths,
    metric_tag,
    minkowski_p,
    pair_keys,
    query_radius,
    validate_metric,
    within_key,
)

# The planner's models are private functions of planner.py; they are imported, not
# copied, so the scan predicts exactly what `chitally plan` would charge per row.
from .planner import (
    DEFAULT_MAX_TASK_ROWS,
    DEFAULT_MIN_TASKS,
    DEFAULT_TASK_ROWS,
    _row_cost,
    _task_memory,
)
from .sources import InputError, validate_eps, validate_max_dim, validate_points

__all__ = [
    "DEFAULT_SAMPLE",
    "DEGREE_TARGETS",
    "RunEstimate",
    "ScaleEstimate",
    "ScanReport",
    "default_eps_range",
    "scan_eps",
]

DEFAULT_SAMPLE = 2000

# The default range: DEFAULT_STEPS scales from the median nearest-neighbour distance r
# upwards by factors of sqrt(2), i.e. r, 1.41 r, 2 r, ..., 16 r. At r about half the
# points are alone (for points spread at random, the mean degree at r is ln 2 = 0.69 in
# any dimension), and the mean degree grows like the factor to the power of the data's
# dimension: at 16 r it is about 180 on a surface and 2800 in a volume, which brackets
# every practical run. Below r there is nothing to choose from: most points are alone.
DEFAULT_STEPS = 9
DEFAULT_FACTOR = math.sqrt(2.0)
# The default range stops after the first scale whose mean degree exceeds this: in a
# high-dimensional cloud 16 r would reach every point, and counting that is the scan's
# only cost that grows with eps.
DEFAULT_DEGREE_LIMIT = 1000.0

#: Mean degrees whose scale the report gives ("the mean degree reaches 10 at eps ...").
DEGREE_TARGETS = (10, 20, 50)

# Total seconds spent timing the kernel, spread over every (eps, cap) pair.
DEFAULT_TIMING_SECONDS = 2.0
# A timing patch owns at most one typical task's rows, at least a few rows.
_MIN_PATCH_ROWS = 16
_MAX_PATCH_ROWS = DEFAULT_TASK_ROWS
# First guess of the kernel's seconds per cost unit and per edge, before anything was
# timed: about the slowest rates measured (edges, 1e-7 to 2e-7 s), so that the first
# patch is small rather than long.
_PRIOR_SECONDS_PER_UNIT = 2e-7
# Above this degree a single row's halo holds millions of edges: not timed, scaled from
# the densest scale that was.
_TIMING_DEGREE_LIMIT = 2000
# Rows sampled for the memory of a typical task (median over their patches).
_MEMORY_CENTRES = 4

# Triangles are counted at the sampled rows only while the pairs of neighbours to test
# (sum of d(d-1)/2 over the sample) stay below this: well under a second.
_TRIANGLE_PAIR_LIMIT = 2e7

# A cKDTree count at eps * (1 - QUERY_SLACK) never holds a pair the rule refuses, and one
# at metric.query_radius(eps) never misses one the rule accepts.
_INNER = 1.0 - QUERY_SLACK


@dataclass(frozen=True)
class RunEstimate:
    """What a run at one eps and one cap would cost (estimates for the whole cloud).

    Attributes
    ----------
    max_dim : int or None
        The cap (largest simplex dimension counted); None for no cap.
    cost : float
        The planner's total cost (its units: ``d**2 + 1`` per row of degree d, or
        ``d + 1`` with ``max_dim <= 1``), N times the sampled rows' mean.
    seconds : float or None
        Estimated time on one core of the whole run cut into the planner's tasks:
        ``cost * seconds_per_unit + max(edges, N) * (task_halo_rows / task_rows) *
        seconds_per_edge`` (every task finds the edges of its halo); None when nothing
        was timed. A run of a large cloud in one process (`euler_curve`) is slower per
        edge: measured up to about twice this at 10^6 points.
    seconds_per_unit : float or None
        The kernel's measured counting time per cost unit.
    seconds_per_edge : float or None
        The kernel's measured time to find and sort the edges, per edge. Timed apart
        because a small patch reads many more edges than it owns, where a run reads
        each about once.
    timed_at : float or None
        The eps at which that rate was measured: this row's eps, or a smaller one when
        this eps was too dense to time quickly (then the time is likely low).
    timed_rows : int
        Rows the timing patch owned (0 when not timed at this eps).
    """

    max_dim: int | None
    cost: float
    seconds: float | None
    seconds_per_unit: float | None
    seconds_per_edge: float | None
    timed_at: float | None
    timed_rows: int

    def as_dict(self) -> dict[str, Any]:
        return {
            "max_dim": self.max_dim,
            "cost": self.cost,
            "seconds_one_core": self.seconds,
            "seconds_per_cost_unit": self.seconds_per_unit,
            "seconds_per_edge": self.seconds_per_edge,
            "timed_at_eps": self.timed_at,
            "timed_rows": self.timed_rows,
        }


@dataclass(frozen=True, eq=False)
class ScaleEstimate:
    """One row of a scan: the figures at one eps.

    Attributes
    ----------
    eps : float
    mean_degree : float
        Mean number of neighbours within eps over the sampled rows: the estimate of the
        whole cloud's mean degree.
    mean_degree_se : float or None
        Its standard error (sample standard deviation / sqrt(n), times the finite
        population correction sqrt(1 - n/N); 0 when every row is sampled, None for a
        sample of one row).
    max_degree : int
        The largest degree among the sampled rows (the cloud's may be larger).
    isolated : float
        Fraction of the sampled rows with no neighbour.
    edges, edges_se : float
        ``N * mean_degree / 2`` and its standard error.
    triangles : float or None
        ``N * mean(t) / 3``, t the triangles at each sampled row; None when too dense to
        count cheaply.
    task_rows, task_halo_rows : int
        Rows a typical task of a cluster run owns (the planner's default size) and the
        rows it reads (estimated from round patches of that many rows).
    task_memory, process_memory : int
        Estimated peak bytes of one such task, and of the whole cloud as one task (an
        in-process run), by the planner's memory model. The model does not depend on the
        cap.
    runs : tuple of RunEstimate
        One per cap asked for, then no cap.
    degrees : ndarray of int64
        The exact degrees of the sampled rows (in ``ScanReport.sample_rows`` order).
    """

    eps: float
    mean_degree: float
    mean_degree_se: float | None
    max_degree: int
    isolated: float
    edges: float
    edges_se: float | None
    triangles: float | None
    task_rows: int
    task_halo_rows: int
    task_memory: int
    process_memory: int
    runs: tuple[RunEstimate, ...]
    degrees: np.ndarray = field(repr=False)

    def as_dict(self) -> dict[str, Any]:
        return {
            "eps": self.eps,
            "mean_degree": self.mean_degree,
            "mean_degree_se": self.mean_degree_se,
            "max_degree_in_sample": self.max_degree,
            "isolated_fraction": self.isolated,
            "edges": self.edges,
            "edges_se": self.edges_se,
            "triangles": self.triangles,
            "task_rows": self.task_rows,
            "task_halo_rows": self.task_halo_rows,
            "task_memory_bytes": self.task_memory,
            "process_memory_bytes": self.process_memory,
            "runs": [r.as_dict() for r in self.runs],
        }


@dataclass(frozen=True, eq=False)
class ScanReport:
    """What runs at several eps would cost, estimated from a sample of rows.

    Attributes
    ----------
    n_points, dim : int
        The cloud's size.
    seed : int
        The seed the sample was drawn with.
    sample_rows : ndarray of int64
        The sampled rows, sorted (all rows when the sample is at least N).
    nn_quantiles : dict or None
        Distance from a sampled row to its nearest other point: ``min``, ``1%``,
        ``50%``, ``99%``, ``max`` (None for a single point).
    degree_reached : dict
        For each t in `DEGREE_TARGETS`, the smallest eps at which the sampled rows' mean
        degree reaches t (exact for the sample; None when the cloud is too small).
    default_range : bool
        True when the eps values are the default range (see `default_eps_range`).
    rows : tuple of ScaleEstimate
        One per eps, in increasing eps.
    """

    n_points: int
    dim: int
    seed: int
    sample_rows: np.ndarray = field(repr=False)
    nn_quantiles: dict[str, float] | None
    degree_reached: dict[int, float | None]
    default_range: bool
    rows: tuple[ScaleEstimate, ...]

    @property
    def sample_size(self) -> int:
        return int(self.sample_rows.shape[0])

    @property
    def eps_values(self) -> np.ndarray:
        return np.array([r.eps for r in self.rows], dtype=np.float64)

    def as_dict(self) -> dict[str, Any]:
        """Every figure as plain JSON-able values (the sampled degrees left out)."""
        return {
            "points": self.n_points,
            "dim": self.dim,
            "sample": self.sample_size,
            "seed": self.seed,
            "nearest_neighbour_distance": self.nn_quantiles,
            "eps_for_mean_degree": {str(t): v for t, v in self.degree_reached.items()},
            "default_range": self.default_range,
            "rows": [r.as_dict() for r in self.rows],
        }

    def table(self) -> str:
        """The report for a terminal: a few lines of context, one line per eps, a legend."""
        return _table(self)


# --------------------------------------------------------------------------- validation


def _check_count(value: Any, name: str, least: int) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < least:
        raise InputError(f"{name} must be an integer >= {least}, got {value!r}")
    return int(value)


def _eps_list(eps_values: Any) -> np.ndarray:
    if isinstance(eps_values, (str, bytes)) or not isinstance(eps_values, Iterable):
        values = [eps_values]
    else:
        values = list(eps_values)
    if not values:
        raise InputError("eps_values is empty: give at least one eps, or None for the default range")
    return np.unique(np.array([validate_eps(e) for e in values], dtype=np.float64))


def _caps(max_dim: Any) -> tuple[int | None, ...]:
    if max_dim is None:
        return (None,)
    given = max_dim if isinstance(max_dim, Sequence) and not isinstance(max_dim, str) else [max_dim]
    caps = sorted({validate_max_dim(d) for d in given} - {None})
    return (*caps, None)


# --------------------------------------------------------------------------- degrees


class _MetricTree:
    """A cKDTree that answers every query in one metric (its Minkowski p); the exact
    rule of that metric then decides, as for the Euclidean one."""

    def __init__(self, x: np.ndarray, metric: str) -> None:
        self.metric = metric
        self.p = minkowski_p(metric)
        # cKDTree only proposes; the sliding-midpoint tree builds in a third of the time.
        self.tree = cKDTree(x, leafsize=16, balanced_tree=False, compact_nodes=False)

    def query(self, x: np.ndarray, k: int = 1, **kw: Any) -> Any:
        return self.tree.query(x, k=k, p=self.p, **kw)

    def query_ball_point(self, x: np.ndarray, r: float, **kw: Any) -> Any:
        return self.tree.query_ball_point(x, r, p=self.p, **kw)


def _sample_degrees(tree: _MetricTree, x: np.ndarray, rows: np.ndarray, eps: float, workers: int) -> np.ndarray:
    """Exact degrees (by the rule) of `rows` against every point."""
    q = x[rows]
    outer = tree.query_ball_point(q, query_radius(eps), return_length=True, workers=workers)
    inner = tree.query_ball_point(q, eps * _INNER, return_length=True, workers=workers)
    deg = outer.astype(np.int64) - 1  # the row itself
    for k in np.flatnonzero(outer != inner):
        # A point at (nearly) exactly eps: the rule decides.
        cand = np.asarray(tree.query_ball_point(q[k], query_radius(eps)), dtype=np.int64)
        d2 = pair_keys(x, np.full(cand.shape[0], rows[k]), x, cand, tree.metric)
        deg[k] = int(np.count_nonzero(lengths(d2, tree.metric) <= eps)) - 1
    return deg


def _neighbour_lists(tree: _MetricTree, x: np.ndarray, rows: np.ndarray, eps: float, workers: int):
    """Each row's neighbours within eps by the rule, self excluded, as flat arrays:
    (owner: index into rows, neighbour id, distance)."""
    lists = tree.query_ball_point(x[rows], query_radius(eps), workers=workers)
    sizes = np.array([len(c) for c in lists], dtype=np.int64)
    owner = np.repeat(np.arange(rows.shape[0]), sizes)
    cand = np.concatenate([np.asarray(c, dtype=np.int64) for c in lists]) if sizes.sum() else sizes[:0]
    dist = lengths(pair_keys(x, rows[owner], x, cand, tree.metric), tree.metric)
    keep = (dist <= eps) & (cand != rows[owner])
    return owner[keep], cand[keep], dist[keep]


@nb.njit(nogil=True, cache=True)
def _link_edges(x, offsets, nbrs, eps, tag):
    """For each row, the pairs of its neighbours that are within eps of each other
    (the triangles at the row), by the one rule."""
    out = np.zeros(offsets.shape[0] - 1, dtype=np.int64)
    for r in range(offsets.shape[0] - 1):
        count = 0
        for a in range(offsets[r], offsets[r + 1]):
            for b in range(a + 1, offsets[r + 1]):
                if within_key(distance_key(x, nbrs[a], x, nbrs[b], tag), eps, tag):
                    count += 1
        out[r] = count
    return out


def _triangles(tree, x, rows, eps_list, degrees, n_points, workers) -> list[float | None]:
    """``N * mean(t) / 3`` per eps, t the triangles at each sampled row; None where the
    pairs of neighbours to test exceed `_TRIANGLE_PAIR_LIMIT`. The neighbour lists are
    fetched once, at the densest scale counted, and cut down for the others."""
    pairs = [float(np.sum(d.astype(np.float64) * (d - 1) / 2)) for d in degrees]
    counted = [i for i, p in enumerate(pairs) if p <= _TRIANGLE_PAIR_LIMIT]
    out: list[float | None] = [None] * len(eps_list)
    if not counted:
        return out
    owner, nbrs, dist = _neighbour_lists(tree, x, rows, float(eps_list[counted[-1]]), workers)
    for i in counted:
        keep = dist <= eps_list[i]
        offsets = np.zeros(rows.shape[0] + 1, dtype=np.int64)
        np.cumsum(np.bincount(owner[keep], minlength=rows.shape[0]), out=offsets[1:])
        t = _link_edges(x, offsets, np.ascontiguousarray(nbrs[keep]), float(eps_list[i]), metric_tag(tree.metric))
        # sum, then scale: exactly the triangle count when every row is sampled
        out[i] = float(t.sum()) * (n_points / rows.shape[0]) / 3.0
    return out


# --------------------------------------------------------------------------- nearest neighbours


def _sorted_neighbour_distances(tree, x, rows, k, workers) -> np.ndarray:
    """(n, k) distances by the rule from each row to its k nearest other points, sorted."""
    _, idx = tree.query(x[rows], k=k + 1, workers=workers)
    idx = np.asarray(idx, dtype=np.int64).reshape(rows.shape[0], k + 1)
    d = lengths(pair_keys(x, np.repeat(rows, k + 1), x, idx.ravel(), tree.metric), tree.metric).reshape(idx.shape)
    is_self = idx == rows[:, None]
    # More than k points coincide with a row: cKDTree may list k + 1 of them and not the
    # row itself; they are all at distance 0, so drop the last.
    drop = np.where(is_self.any(axis=1), np.argmax(is_self, axis=1), k)
    keep = np.ones(idx.shape, dtype=bool)
    keep[np.arange(rows.shape[0]), drop] = False
    return np.sort(d[keep].reshape(rows.shape[0], k), axis=1)


def _degree_reached(tree, x, rows, dist, target, workers) -> float:
    """Smallest eps at which the rows' mean degree (exact, by the rule) reaches target.

    The mean degree at v is (number of row-to-point distances <= v) / n, so the answer
    is the T-th smallest such distance, T = ceil(target * n). The k nearest distances
    hold them all unless a row has all k of them <= v; such rows get their full list.
    """
    n = dist.shape[0]
    need = math.ceil(target * n)
    v = float(np.partition(dist.ravel(), need - 1)[need - 1])
    full = np.flatnonzero(dist[:, -1] <= v)
    if full.size == 0:
        return v
    parts = [dist[np.setdiff1d(np.arange(n), full)].ravel()]
    for r in rows[full]:
        cand = np.asarray(tree.query_ball_point(x[r], query_radius(v)), dtype=np.int64)
        cand = cand[cand != r]
        d = lengths(pair_keys(x, np.full(cand.shape[0], r), x, cand, tree.metric), tree.metric)
        parts.append(d[d <= v])
    values = np.concatenate(parts)
    return float(np.partition(values, need - 1)[need - 1])


def default_eps_range(median_nn: float) -> np.ndarray:
    """The default scales: `DEFAULT_STEPS` values from the median nearest-neighbour
    distance up by factors of sqrt(2) (1x to 16x); see the module constants for why.

    `scan_eps` stops this range after the first scale whose sampled mean degree exceeds
    `DEFAULT_DEGREE_LIMIT` (1000).
    """
    return float(median_nn) * DEFAULT_FACTOR ** np.arange(DEFAULT_STEPS)


# --------------------------------------------------------------------------- timing


class _Timer:
    """Rates of the kernel on compact patches of the user's points.

    A patch is the k points nearest a centre (a sampled row where the cost is typical);
    its halo is every point within r_k + eps of the centre (a superset of the points
    within eps of the patch), owned rows first. The kernel runs on one thread, as one
    core of a run would, and reports its edge-finding and counting times apart: the
    counting time per cost unit of the owned rows, and the edge time per edge of the
    halo. The budget is shared between every (eps, cap) pair; a pair may time up to
    three patches, each sized from the rate the last one measured, and times the last
    one twice when the budget allows.
    """

    def __init__(self, tree: _MetricTree, x: np.ndarray, budget: float, pairs: int, workers: int) -> None:
        self.tree, self.x, self.workers = tree, x, workers
        self.left = float(budget)
        self.pairs_left = pairs
        # cap -> (seconds/unit, seconds/edge, eps): the densest scale timed so far
        self.rate: dict[int | None, tuple[float, float, float]] = {}
        self.warm: set[int | None] = set()
        self.nearest: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def _patch(self, centre: int, eps: float, k: int):
        x = self.x
        if centre not in self.nearest:
            # the nearest rows once per centre, as many as any patch may own
            dist, idx = self.tree.query(x[centre], k=min(x.shape[0], _MAX_PATCH_ROWS))
            self.nearest[centre] = (np.atleast_1d(dist), np.atleast_1d(np.asarray(idx, dtype=np.int64)))
        dist, idx = self.nearest[centre]
        owned = idx[:k]
        reach = float(dist[k - 1]) + eps
        halo = np.asarray(self.tree.query_ball_point(x[centre], query_radius(reach)), dtype=np.int64)
        rest = np.setdiff1d(halo, owned)
        own_xyz = x[owned]
        parts = [own_xyz[leaf_order(own_xyz)]]
        if rest.size:
            rest_xyz = x[rest]
            parts.append(rest_xyz[leaf_order(rest_xyz)])
        coords = np.ascontiguousarray(np.concatenate(parts))
        # Rates need no exact rule: cKDTree's own pairs are close enough here. The halo
        # holds every neighbour of an owned row, so their degrees in it are exact.
        pairs = cKDTree(coords).query_pairs(query_radius(eps), p=self.tree.p, output_type="ndarray")
        deg = np.bincount(pairs.ravel(), minlength=coords.shape[0])[:k]
        return coords, k, deg, pairs.shape[0]

    def _run(self, coords: np.ndarray, eps: float, cap: int | None, owned: int) -> tuple[float, float]:
        """(edge seconds, counting seconds) of the kernel on the patch, one thread."""
        stats = count_jumps(coords, eps, cap, owned=(0, owned), threads=1, metric=self.tree.metric).stats
        return stats.seconds_graph, stats.seconds_count

    def measure(self, centre: int, centre_degree: int, eps: float, cap: int | None):
        """(seconds per unit, seconds per edge, eps they were measured at, rows timed)."""
        budget = self.left / max(self.pairs_left, 1)
        self.pairs_left -= 1
        known = self.rate.get(cap)
        fallback = (*known, 0) if known else (None, None, None, 0)
        if budget <= 0 or centre_degree > _TIMING_DEGREE_LIMIT:
            return fallback
        n = self.x.shape[0]
        top = min(n, _MAX_PATCH_ROWS)
        per_row = float(_row_cost(np.array([centre_degree]), cap)[0]) + centre_degree
        guess = max(known[0], known[1]) * 4.0 if known else _PRIOR_SECONDS_PER_UNIT
        k = int(min(top, max(_MIN_PATCH_ROWS, budget / 4.0 / (guess * per_row))))
        if cap not in self.warm:
            # The first calls load the compiled kernel, which is not part of any rate: a
            # small clique near the centre takes every path a patch will.
            offsets = np.random.default_rng(0).uniform(-0.2 * eps, 0.2 * eps, (12, self.x.shape[1]))
            count_jumps(np.ascontiguousarray(self.x[centre] + offsets), eps, cap, owned=(0, 6), threads=1,
                        metric=self.tree.metric)
            self.warm.add(cap)
        spent = 0.0
        for _ in range(3):
            coords, owned, deg, edges = self._patch(centre, eps, k)
            graph, count = self._run(coords, eps, cap, owned)
            seconds = graph + count
            spent += seconds
            if seconds >= budget / 4.0 or k >= top or spent >= budget / 2.0:
                break
            k = int(min(top, k * min(16.0, (budget - spent) / 2.0 / max(seconds, 1e-4))))
        if spent + seconds <= budget:
            # once more on the same patch: the faster of two is less disturbed by other work
            again = self._run(coords, eps, cap, owned)
            spent += sum(again)
            graph, count = min(graph, again[0]), min(count, again[1])
        units = float(_row_cost(deg, cap).sum())
        # the graph is built for every row of the halo even with no edge at all
        result = (count / units, graph / max(edges, coords.shape[0]), eps, owned)
        self.left -= spent
        self.rate[cap] = result[:3]
        return result


def _typical_centre(rows: np.ndarray, deg: np.ndarray, cap: int | None) -> tuple[int, int]:
    """The sampled row at the cost-weighted median degree: where half the work is in
    rows no denser than it. Returns (row, its degree)."""
    order = np.argsort(deg, kind="stable")
    cum = np.cumsum(_row_cost(deg[order], cap))
    i = int(order[np.searchsorted(cum, cum[-1] / 2.0)])
    return int(rows[i]), int(deg[i])


# --------------------------------------------------------------------------- the scan


def scan_eps(
    points: Any,
    eps_values: Iterable[float] | float | None = None,
    *,
    max_dim: int | Sequence[int] | None = None,
    sample: int = DEFAULT_SAMPLE,
    seed: int = 0,
    threads: int = 1,
    timing_seconds: float = DEFAULT_TIMING_SECONDS,
    metric: str = "euclidean",
) -> ScanReport:
    """Estimate, for each eps, what a run would cost: degrees, edges, time and memory.

    Parameters
    ----------
    points : array_like, shape (N, m)
        The cloud (validated like every input: finite, 2-D).
    eps_values : float or iterable of float, optional
        Scales to scan (each > 0; duplicates dropped, reported in increasing order).
        Default: `default_eps_range` around the sample's median nearest-neighbour
        distance, stopped after the first scale with mean degree above 1000.
    max_dim : int or sequence of int, optional
        Caps to estimate a run for; a run without cap is always estimated too.
    sample : int
        Rows to sample (>= 1); all rows when N is smaller.
    seed : int
        Seed of the sample (and of the patches the memory and time come from).
    threads : int
        Threads for the neighbour searches of the scan itself. The kernel is always
        timed on one thread.
    timing_seconds : float
        Seconds of kernel time to spend on the time estimates, shared by every eps and
        cap (>= 0; 0 times nothing and leaves the times None).
    metric : {"euclidean", "manhattan", "chebyshev"}
        The metric of the distances (degrees, nearest neighbours, the timed kernel).

    Returns
    -------
    ScanReport

    Raises
    ------
    InputError
        Bad points (NaN, wrong shape), an eps <= 0, an empty eps list, a negative cap,
        a sample or threads < 1; or no default range (every sampled point coincides
        with another).

    Notes
    -----
    The degrees of the sampled rows are exact: counted against all N points by the
    rule of :mod:`chitally.metric`. Everything for the whole cloud is an estimate from
    them: the mean degree with its standard error, edges ``N * mean / 2``, triangles
    ``N * mean(t) / 3``, the planner's cost ``N * mean(row cost)``, the time (cost times
    the kernel's measured seconds per unit at that eps) and the memory (the planner's
    model fed with the estimated degrees). Time of the scan: one KD-tree over the points,
    two counting queries per eps (proportional to sample x mean degree), and
    ``timing_seconds``.

    Examples
    --------
    >>> import numpy as np
    >>> pts = np.random.default_rng(0).random((5000, 2))
    >>> report = scan_eps(pts, [0.01, 0.02], sample=500, timing_seconds=0)
    >>> [round(r.mean_degree) for r in report.rows]
    [2, 6]
    """
    x = validate_points(points)
    n, m = x.shape
    sample = _check_count(sample, "sample", 1)
    threads = _check_count(threads, "threads", 1)
    seed = _check_count(seed, "seed", 0)
    caps = _caps(max_dim)
    given = None if eps_values is None else _eps_list(eps_values)
    if not (isinstance(timing_seconds, (int, float)) and math.isfinite(timing_seconds) and timing_seconds >= 0):
        raise InputError(f"timing_seconds must be a finite number >= 0, got {timing_seconds!r}")

    rng = np.random.default_rng(seed)
    n_s = min(sample, n)
    rows = np.arange(n, dtype=np.int64) if n_s == n else np.sort(rng.choice(n, size=n_s, replace=False))
    tree = _MetricTree(x, validate_metric(metric))

    k = min(n - 1, 2 * max(DEGREE_TARGETS))
    quantiles: dict[str, float] | None = None
    reached: dict[int, float | None] = {t: None for t in DEGREE_TARGETS}
    if k > 0:
        dist = _sorted_neighbour_distances(tree, x, rows, k, threads)
        nn = dist[:, 0]
        qs = np.quantile(nn, [0.0, 0.01, 0.5, 0.99, 1.0])
        quantiles = {name: float(v) for name, v in zip(("min", "1%", "50%", "99%", "max"), qs)}
        for t in DEGREE_TARGETS:
            if t <= n - 1:
                reached[t] = _degree_reached(tree, x, rows, dist, t, threads)

    if given is None:
        if quantiles is None:
            raise InputError("a single point has no neighbour distances to choose eps from: give eps values")
        positive = nn[nn > 0]
        if positive.size == 0:
            raise InputError(
                "every sampled point coincides with another, so there is no distance to choose eps "
                "from: give eps values"
            )
        base = quantiles["50%"] if quantiles["50%"] > 0 else float(np.median(positive))
        eps_list = default_eps_range(base)
    else:
        eps_list = given

    task_rows = int(min(n, DEFAULT_MAX_TASK_ROWS, max(math.ceil(n / DEFAULT_MIN_TASKS), DEFAULT_TASK_ROWS)))
    centres = rows[rng.permutation(n_s)[:_MEMORY_CENTRES]]
    if task_rows < n:
        patch_radius = [float(np.max(tree.query(x[c], k=task_rows)[0])) for c in centres]

    degrees = []
    for eps in eps_list:
        degrees.append(_sample_degrees(tree, x, rows, float(eps), threads))
        if given is None and degrees[-1].mean() > DEFAULT_DEGREE_LIMIT:
            break
    eps_list = eps_list[: len(degrees)]
    triangles = _triangles(tree, x, rows, eps_list, degrees, n, threads)

    timer = _Timer(tree, x, timing_seconds, len(eps_list) * len(caps), threads)
    out: list[ScaleEstimate] = []
    for eps, deg, tri in zip((float(e) for e in eps_list), degrees, triangles):
        mean = float(deg.mean())
        se = _standard_error(deg, n)
        max_deg = int(deg.max())

        if task_rows < n:
            halo = int(np.median([tree.query_ball_point(x[c], r + eps, return_length=True)
                                  for c, r in zip(centres, patch_radius)]))
        else:
            halo = n
        # Every task finds the edges of its whole halo: the edges (or, with hardly any,
        # the rows) read by all tasks, in the units of the timed edge rate.
        replication = halo / task_rows
        edge_work = max(n * mean / 2.0, n) * replication
        task_memory = int(_task_memory(halo, m, round(halo * mean), round(task_rows * mean / 2), max_deg))
        process_memory = int(_task_memory(n, m, round(n * mean), round(n * mean / 2), max_deg))

        runs = []
        for cap in caps:
            cost = float(_row_cost(deg, cap).sum()) * (n / n_s)  # exact when every row is sampled
            if timing_seconds > 0:
                centre, centre_deg = _typical_centre(rows, deg, cap)
                rate, edge_rate, at, timed = timer.measure(centre, centre_deg, eps, cap)
            else:
                rate, edge_rate, at, timed = None, None, None, 0
            runs.append(RunEstimate(
                max_dim=cap, cost=cost,
                seconds=None if rate is None else cost * rate + edge_work * edge_rate,
                seconds_per_unit=rate, seconds_per_edge=edge_rate, timed_at=at, timed_rows=timed,
            ))
        out.append(ScaleEstimate(
            eps=eps, mean_degree=mean, mean_degree_se=se, max_degree=max_deg,
            isolated=float(np.count_nonzero(deg == 0)) / n_s,
            edges=float(deg.sum()) * (n / n_s) / 2.0, edges_se=None if se is None else n * se / 2.0,
            triangles=tri,
            task_rows=task_rows, task_halo_rows=halo,
            task_memory=task_memory, process_memory=process_memory,
            runs=tuple(runs), degrees=deg,
        ))
    return ScanReport(
        n_points=int(n), dim=int(m), seed=seed, sample_rows=rows, nn_quantiles=quantiles,
        degree_reached=reached, default_range=given is None, rows=tuple(out),
    )


def _standard_error(deg: np.ndarray, n: int) -> float | None:
    """Standard error of the sample mean for a sample drawn without replacement."""
    n_s = deg.shape[0]
    if n_s == n:
        return 0.0
    if n_s < 2:
        return None
    return float(np.std(deg, ddof=1) / math.sqrt(n_s) * math.sqrt(1.0 - n_s / n))


# --------------------------------------------------------------------------- the table


def _seconds(s: float | None, timed_at: float | None = None, eps: float | None = None) -> str:
    if s is None:
        return "-"
    mark = "~" if timed_at is not None and eps is not None and timed_at != eps else ""
    for unit, size in (("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if s >= size:
            return f"{mark}{s / size:.3g} {unit}"
    return f"{mark}{s:.2g} s" if s < 10 else f"{mark}{s:.0f} s"


def _bytes(b: int) -> str:
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if b >= size:
            return f"{b / size:.3g} {unit}"
    return f"{b} B"


def _count(v: float | None) -> str:
    if v is None:
        return "-"
    for unit, size in (("T", 1e12), ("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if v >= size:
            return f"{v / size:.3g}{unit}"
    return f"{v:.3g}"


def _degree(v: float) -> str:
    return f"{v:.3g}" if v < 100 else f"{v:.0f}"


def _cap_name(cap: int | None) -> str:
    return "no cap" if cap is None else f"max_dim {cap}"


def _table(report: ScanReport) -> str:
    lines = [
        f"{report.n_points} points in R^{report.dim}; "
        + ("every row counted exactly." if report.sample_size == report.n_points else
           f"{report.sample_size} rows sampled at random (seed {report.seed}): their degrees are exact, "
           "figures for the whole cloud are estimates from them."),
    ]
    q = report.nn_quantiles
    if q is not None:
        lines.append("distance to the nearest other point (sampled rows): "
                     + ", ".join(f"{'median' if k == '50%' else k} {v:.4g}" for k, v in q.items()))
    reached = [f"{t} at eps {v:.4g}" for t, v in report.degree_reached.items() if v is not None]
    if reached:
        lines.append("the mean degree reaches " + ", ".join(reached))
    if report.default_range:
        lines.append("eps: the default range, from the median nearest-neighbour distance up by factors of 1.41")
    caps = [r.max_dim for r in report.rows[0].runs] if report.rows else []
    head = ["eps", "mean degree", "max", "alone", "edges", "triangles"]
    head += [f"time, {_cap_name(c)}" for c in caps]
    head += ["memory per task", "memory in one process"]
    body = []
    for r in report.rows:
        deg = _degree(r.mean_degree) + (f" ±{_degree(r.mean_degree_se)}" if r.mean_degree_se else "")
        cells = [f"{r.eps:.4g}", deg, str(r.max_degree), f"{100 * r.isolated:.0f}%", _count(r.edges),
                 _count(r.triangles)]
        cells += [_seconds(run.seconds, run.timed_at, r.eps) for run in r.runs]
        cells += [_bytes(r.task_memory), _bytes(r.process_memory)]
        body.append(cells)
    widths = [max(len(row[i]) for row in [head, *body]) for i in range(len(head))]
    lines.append("")
    for row in [head, *body]:
        lines.append("  ".join(cell.rjust(w) for cell, w in zip(row, widths)))
    lines += [
        "",
        "degree: the number of other points within eps of a point. max: the largest degree among the",
        "sampled rows. alone: sampled points with no neighbour. ±: one standard error of the estimate.",
        "edges, triangles: estimated for the whole cloud (k, M, G: thousand, million, billion;",
        "- where too dense to count quickly).",
        "time: estimated time of the whole run on one core (divide by the cores you will use), from",
        "timing the counting on a patch of these points at that eps; for a run cut into tasks, as",
        "`chitally run` does (one process, `chitally curve`, may take up to twice as long on a large",
        "cloud). ~: that eps was too dense to time and the rate of a smaller eps was used (likely",
        "too low). -: not timed.",
    ]
    if report.rows:
        lines.append(
            f"memory: estimated peak of one task of a cluster run (about {report.rows[0].task_rows} points) "
            "and of the whole cloud in one process, by the planner's model."
        )
    return "\n".join(lines)
