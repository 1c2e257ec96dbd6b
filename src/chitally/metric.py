"""The one distance rule per metric that every part of chitally uses.

Three Minkowski metrics are offered, each by one rule on a *key* computed in
coordinate order from 0.0, so that one pair of points gives the same bits everywhere
(the cover, the planner's halos, the kernel, the scan):

- ``"euclidean"`` (p = 2, the default): key = d2, the sum of squared differences;
  an edge iff sqrt(d2) <= eps; the length is sqrt(d2).
- ``"manhattan"`` (p = 1): key = the sum of absolute differences; an edge iff
  key <= eps; the length is the key.
- ``"chebyshev"`` (p = inf): key = the largest absolute difference; an edge iff
  key <= eps; the length is the key.

The key is a non-decreasing function of the length, so edges sorted by key are sorted
by length. numpy's reductions are avoided on purpose because their summation order
depends on the length.

Compiled code receives the metric as a *tag*, a tuple whose length is the metric's
code (() Euclidean, (0,) Manhattan, (0, 0) Chebyshev): numba compiles one version per
tuple length, in which ``len(tag)`` is a constant, so the branches on it fold away and
the Euclidean loops are the ones they were before there was a choice.

The ball cover and the halos (balls whose centres are within R + eps, neighbour balls
within 2R + eps) rest only on the triangle inequality, which every one of these
metrics satisfies. No I/O, no Dask, no Zarr here.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

# cKDTree decides membership with its own arithmetic, so radius queries are widened by
# this relative margin and then filtered again with `within`.
QUERY_SLACK = 1e-9

#: The metrics a cloud may be measured in, by name; the default first.
METRICS = ("euclidean", "manhattan", "chebyshev")
EUCLIDEAN = "euclidean"

# the Minkowski p of each metric, as scipy.spatial.cKDTree takes it
_MINKOWSKI_P = {"euclidean": 2.0, "manhattan": 1.0, "chebyshev": math.inf}


def validate_metric(metric: object, *, name: str = "metric") -> str:
    """`metric` as one of `METRICS` (None is the default, Euclidean); anything else is an
    `InputError` naming the choices."""
    from .validate import InputError

    if metric is None:
        return EUCLIDEAN
    if isinstance(metric, str) and metric.lower() in METRICS:
        return metric.lower()
    raise InputError(f"{name} must be one of {', '.join(METRICS)}, got {metric!r}")


def metric_tag(metric: str = EUCLIDEAN) -> tuple:
    """The compile-time spelling of `metric` for the compiled functions (see above)."""
    return (0,) * METRICS.index(validate_metric(metric))


def minkowski_p(metric: str = EUCLIDEAN) -> float:
    """The metric's p (1, 2 or inf), as scipy's cKDTree and cdist take it."""
    return _MINKOWSKI_P[validate_metric(metric)]


# ------------------------------------------------------------------------- Euclidean


@nb.njit(inline="always", nogil=True, cache=True)
def squared_distance(x, i, y, j):
    """d2 between row i of x and row j of y, summed in coordinate order."""
    s = 0.0
    for k in range(x.shape[1]):
        t = x[i, k] - y[j, k]
        s += t * t
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def within(d2, eps):
    """The Euclidean inclusion rule: an edge iff its Euclidean length is at most eps."""
    return math.sqrt(d2) <= eps


# ------------------------------------------------------------------------ any metric


@nb.njit(inline="always", nogil=True, cache=True)
def accumulate(s, d, tag):
    """The key so far, s, extended by one coordinate difference d: s + d*d, s + |d| or
    max(s, |d|). Every key in chitally is built by this, from 0.0, in coordinate order."""
    code = len(tag)
    if code == 0:
        return s + d * d
    a = abs(d)
    if code == 1:
        return s + a
    return max(s, a)


@nb.njit(inline="always", nogil=True, cache=True)
def distance_key(x, i, y, j, tag):
    """The key between row i of x and row j of y for the metric of `tag`."""
    if len(tag) == 0:
        return squared_distance(x, i, y, j)
    s = 0.0
    for k in range(x.shape[1]):
        s = accumulate(s, x[i, k] - y[j, k], tag)
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def within_key(key, eps, tag):
    """The inclusion rule: an edge iff its length in the metric of `tag` is at most eps."""
    if len(tag) == 0:
        return math.sqrt(key) <= eps
    return key <= eps


@nb.njit(inline="always", nogil=True, cache=True)
def key_length(key, tag):
    """The length of an edge from its key (IEEE sqrt is correctly rounded, as numpy's)."""
    if len(tag) == 0:
        return math.sqrt(key)
    return key


@nb.njit(nogil=True, cache=True)
def _pair_keys(x, left, y, right, tag):
    out = np.empty(left.shape[0], dtype=np.float64)
    for k in range(left.shape[0]):
        out[k] = distance_key(x, left[k], y, right[k], tag)
    return out


def pair_keys(x: np.ndarray, left: np.ndarray, y: np.ndarray, right: np.ndarray,
              metric: str = EUCLIDEAN) -> np.ndarray:
    """The key between ``x[left[k]]`` and ``y[right[k]]`` for every k, by the one rule."""
    return _pair_keys(
        np.ascontiguousarray(x, dtype=np.float64),
        np.ascontiguousarray(left, dtype=np.int64),
        np.ascontiguousarray(y, dtype=np.float64),
        np.ascontiguousarray(right, dtype=np.int64),
        metric_tag(metric),
    )


def pair_squared_distances(x: np.ndarray, left: np.ndarray, y: np.ndarray, right: np.ndarray) -> np.ndarray:
    """d2 between ``x[left[k]]`` and ``y[right[k]]`` for every k, by the one rule."""
    return pair_keys(x, left, y, right)


def pair_lengths(x: np.ndarray, left: np.ndarray, y: np.ndarray, right: np.ndarray,
                 metric: str = EUCLIDEAN) -> np.ndarray:
    """The lengths between ``x[left[k]]`` and ``y[right[k]]``, by the one rule of `metric`."""
    return lengths(pair_keys(x, left, y, right, metric), metric)


def lengths(keys: np.ndarray, metric: str = EUCLIDEAN) -> np.ndarray:
    """Edge lengths from keys: square roots of d2 (IEEE sqrt is correctly rounded, as
    in numba) for the Euclidean metric, the keys themselves for the others."""
    if validate_metric(metric) == EUCLIDEAN:
        return np.sqrt(keys)
    return np.asarray(keys, dtype=np.float64)


def key_bound(radius: float, metric: str = EUCLIDEAN) -> float:
    """The key of a length `radius`: radius**2 for the Euclidean metric, radius for the
    others (what a box bound or a widened reach is compared with)."""
    r = float(radius)
    return r * r if validate_metric(metric) == EUCLIDEAN else r


def query_radius(eps: float) -> float:
    """The widened radius to hand to cKDTree before filtering with the exact rule."""
    return float(eps) * (1.0 + QUERY_SLACK) + 1e-300
