"""The one distance rule every part of chitally uses.

An edge {i, j} exists iff sqrt(d2) <= eps, where d2 is the sum of squared coordinate
differences taken in coordinate order. Every task, the planner and the in-process path
call these functions so that one pair of points gives the same bits everywhere; numpy's
reductions are avoided on purpose because their summation order depends on the length.
No I/O, no Dask, no Zarr here.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

# cKDTree decides membership with its own arithmetic, so radius queries are widened by
# this relative margin and then filtered again with `within`.
QUERY_SLACK = 1e-9


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
    """The inclusion rule: an edge iff its Euclidean length is at most eps."""
    return math.sqrt(d2) <= eps


@nb.njit(nogil=True, cache=True)
def _pair_squared_distances(x, left, y, right):
    out = np.empty(left.shape[0], dtype=np.float64)
    for k in range(left.shape[0]):
        out[k] = squared_distance(x, left[k], y, right[k])
    return out


def pair_squared_distances(x: np.ndarray, left: np.ndarray, y: np.ndarray, right: np.ndarray) -> np.ndarray:
    """d2 between ``x[left[k]]`` and ``y[right[k]]`` for every k, by the one rule."""
    return _pair_squared_distances(
        np.ascontiguousarray(x, dtype=np.float64),
        np.ascontiguousarray(left, dtype=np.int64),
        np.ascontiguousarray(y, dtype=np.float64),
        np.ascontiguousarray(right, dtype=np.int64),
    )


def lengths(d2: np.ndarray) -> np.ndarray:
    """Edge lengths from squared distances (IEEE sqrt is correctly rounded, as in numba)."""
    return np.sqrt(d2)


def query_radius(eps: float) -> float:
    """The widened radius to hand to cKDTree before filtering with the exact rule."""
    return float(eps) * (1.0 + QUERY_SLACK) + 1e-300
