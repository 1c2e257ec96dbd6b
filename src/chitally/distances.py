"""Exact distances between Euler characteristic curves (and other step functions).

A curve is a right-continuous step function, so the Lp distance between two curves over
a range [a, b] is a finite sum: merge both curves' change points inside the range, and
on each piece between consecutive merged points both curves are constant, so

    d_p(f, g) = ( sum_k w_k |f_k - g_k|^p )^(1/p),   w_k the piece's length,

and the sup distance is the largest |f_k - g_k|, the value at b included (the range is
closed). Nothing is sampled: the only error is floating-point rounding of the sum.

The range is the intersection of the domains by default, or a given [a, b] inside every
domain. `pairwise` computes all distances of many curves over one merged grid of change
points, in blocks of that grid, so memory stays bounded.

Rows of a feature matrix (a curve sampled on a grid) are step functions too: each row is
taken as the right-continuous step function through its grid samples, the value at
``grid[j]`` holding on ``[grid[j], grid[j+1])``, on the domain ``[grid[0], grid[-1]]``.
That is the exact curve only where the curve does not change between grid points; the
distances are then exact distances between those sampled step functions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Merged", "StepFunction", "as_step", "common_range", "distance", "mean_step", "merge",
           "pairwise", "parse_p", "parse_range", "steps_of"]

# Merged-grid columns handled at once times the number of functions.
_BLOCK = 1 << 22


@dataclass(frozen=True, eq=False)
class StepFunction:
    """A right-continuous step function on ``[breaks[0], end]``.

    It equals ``values[k]`` on ``[breaks[k], breaks[k+1])`` and ``values[-1]`` on
    ``[breaks[-1], end]``.

    Parameters
    ----------
    breaks : array_like of float64
        Strictly increasing, finite, the first one the domain's start, none beyond `end`.
    values : array_like of float64
        One value per break.
    end : float
        The domain's end.
    """

    breaks: np.ndarray
    values: np.ndarray
    end: float

    def __post_init__(self) -> None:
        x = np.array(self.breaks, dtype=np.float64)
        y = np.array(self.values, dtype=np.float64)
        end = float(self.end)
        if x.ndim != 1 or x.size == 0 or x.shape != y.shape:
            raise ValueError(f"a step function needs matching 1-D breaks and values, got {x.shape} and {y.shape}")
        if not (np.isfinite(x).all() and np.isfinite(y).all() and math.isfinite(end)):
            raise ValueError("a step function's breaks, values and end must be finite")
        if x.size > 1 and not (np.diff(x) > 0).all():
            raise ValueError("a step function's breaks must be strictly increasing")
        if x[-1] > end:
            raise ValueError(f"break {x[-1]!r} lies beyond the end {end!r}")
        x.setflags(write=False)
        y.setflags(write=False)
        object.__setattr__(self, "breaks", x)
        object.__setattr__(self, "values", y)
        object.__setattr__(self, "end", end)

    @property
    def domain(self) -> tuple[float, float]:
        return (float(self.breaks[0]), self.end)

    def at(self, t: Any) -> np.ndarray:
        """Values at scales `t` inside the domain."""
        t = np.asarray(t, dtype=np.float64)
        if ((t < self.breaks[0]) | (t > self.end) | np.isnan(t)).any():
            raise ValueError(f"a scale lies outside the domain [{self.breaks[0]!r}, {self.end!r}]")
        return self.values[np.searchsorted(self.breaks, t, side="right") - 1]

    @classmethod
    def from_curve(cls, curve: Any) -> StepFunction:
        """A `Curve` exactly (its integers are exact in float64 below 2**53 in magnitude)."""
        return cls(curve.values, curve.chi.astype(np.float64), curve.eps)

    @classmethod
    def from_samples(cls, grid: Any, values: Any) -> StepFunction:
        """The step function through samples on a non-decreasing grid (a repeated scale
        is one sample repeated; its last copy is kept)."""
        g = np.asarray(grid, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        if g.ndim != 1 or g.shape != v.shape or g.size == 0:
            raise ValueError(f"samples need a 1-D grid and as many values, got {g.shape} and {v.shape}")
        last = np.concatenate((g[1:] != g[:-1], [True]))
        return cls(g[last], v[last], float(g[-1]))


def as_step(obj: Any) -> StepFunction:
    """A `Curve`, a `StepFunction`, or a ``(grid, values)`` pair of samples as a step function."""
    if isinstance(obj, StepFunction):
        return obj
    if hasattr(obj, "chi") and hasattr(obj, "values") and hasattr(obj, "eps"):
        return StepFunction.from_curve(obj)
    if isinstance(obj, tuple) and len(obj) == 2:
        return StepFunction.from_samples(*obj)
    raise TypeError(f"expected a Curve, a StepFunction or a (grid, values) pair, got {type(obj).__name__}")


def steps_of(objs: Any) -> list[StepFunction]:
    """Step functions of a sequence of curves (or step functions, or sample pairs), or of
    every row of a `chitally.features.FeatureMatrix` (each row through its grid samples)."""
    if hasattr(objs, "grid") and hasattr(objs, "values") and np.ndim(objs.values) == 2:
        grid = np.asarray(objs.grid, dtype=np.float64)
        return [StepFunction.from_samples(grid, row) for row in np.asarray(objs.values)]
    return [as_step(o) for o in objs]


def parse_p(p: Any) -> float:
    """The exponent: a real >= 1, or infinity for the sup distance ("inf" accepted)."""
    if isinstance(p, str):
        text = p.strip().lower()
        if text in ("inf", "infinity", "sup", "max"):
            return math.inf
        try:
            p = float(text)
        except ValueError:
            raise ValueError(f"p must be a number >= 1 or inf, got {p!r}") from None
    if isinstance(p, bool) or not isinstance(p, (int, float, np.integer, np.floating)):
        raise ValueError(f"p must be a number >= 1 or inf, got {p!r}")
    p = float(p)
    if math.isnan(p) or p < 1:
        # below 1 the triangle inequality fails: not a distance
        raise ValueError(f"p must be a number >= 1 or inf, got {p!r}")
    return p


def parse_range(text: Any) -> tuple[float, float] | None:
    """``"a:b"`` (or a pair, or None) as a range ``(a, b)`` with a <= b, both finite."""
    if text is None:
        return None
    if isinstance(text, str):
        parts = text.split(":")
        if len(parts) != 2:
            raise ValueError(f"range {text!r} must have the form A:B, e.g. 0:0.5")
        try:
            lo, hi = float(parts[0]), float(parts[1])
        except ValueError:
            raise ValueError(f"range {text!r}: A and B must be numbers") from None
    else:
        try:
            lo, hi = (float(x) for x in text)
        except (TypeError, ValueError):
            raise ValueError(f"range must be a pair (a, b) of numbers, got {text!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo > hi:
        raise ValueError(f"range [{lo!r}, {hi!r}] must be finite with a <= b")
    return lo, hi


def common_range(fns: Sequence[StepFunction], range: Any = None) -> tuple[float, float]:
    """The range distances are taken over: `range` (checked to lie in every domain) or
    the intersection of the domains."""
    lo = max(f.breaks[0] for f in fns)
    hi = min(f.end for f in fns)
    wanted = parse_range(range)
    if wanted is None:
        if lo > hi:
            raise ValueError(f"the domains do not overlap: the latest start {float(lo)!r} lies beyond "
                             f"the earliest end {float(hi)!r}")
        return float(lo), float(hi)
    a, b = wanted
    if a < lo or b > hi:
        raise ValueError(f"range [{a!r}, {b!r}] must lie inside every domain, whose intersection is "
                         f"[{float(lo)!r}, {float(hi)!r}]")
    return a, b


@dataclass(frozen=True)
class Merged:
    """Step functions on one merged grid over [lo, hi].

    ``values[i, k]`` is function i on ``[x[k], x[k] + widths[k])`` (every function is
    constant there); ``at_end[i]`` its value at `hi`.
    """

    x: np.ndarray
    widths: np.ndarray
    values: np.ndarray
    at_end: np.ndarray
    lo: float
    hi: float


def merge(fns: Sequence[StepFunction], lo: float, hi: float) -> Merged:
    """Every function's value on each piece of the merged change points in [lo, hi]."""
    x = _merged_points(fns, lo, hi)
    widths = np.diff(np.append(x, hi))
    at_end = np.array([f.values[np.searchsorted(f.breaks, hi, side="right") - 1] for f in fns])
    return Merged(x, widths, _values_on(fns, x), at_end, float(lo), float(hi))


def _merged_points(fns: Sequence[StepFunction], lo: float, hi: float) -> np.ndarray:
    inner = [f.breaks[(f.breaks > lo) & (f.breaks < hi)] for f in fns]
    return np.unique(np.concatenate([np.array([lo]), *inner]))


def _values_on(fns: Sequence[StepFunction], x: np.ndarray) -> np.ndarray:
    out = np.empty((len(fns), x.size))
    for i, f in enumerate(fns):
        out[i] = f.values[np.searchsorted(f.breaks, x, side="right") - 1]
    return out


def _accumulate(diff: np.ndarray, w: np.ndarray, p: float, scale: np.ndarray | None) -> np.ndarray:
    """Per row of |differences|: sum of w |d|^p (or max |d| for p = inf)."""
    if math.isinf(p):
        return diff.max(axis=1, initial=0.0)
    if p == 1.0:
        return diff @ w
    if p == 2.0:
        return (diff * diff) @ w
    # general p: scaled by each pair's sup, so that |d|^p neither overflows nor vanishes
    s = np.where(scale > 0, scale, 1.0)
    return ((diff / s[:, None]) ** p) @ w


def pairwise(curves: Any, p: Any = 1, range: Any = None) -> np.ndarray:
    """All exact Lp (or sup) distances between curves over a common range.

    Parameters
    ----------
    curves : sequence of Curve / StepFunction / (grid, values), or a FeatureMatrix
        The functions (a feature matrix's rows as the step functions through their
        grid samples).
    p : float >= 1, or inf / "inf"
        The exponent (1, 2, any real >= 1, or inf for the sup distance).
    range : (a, b) or "a:b", optional
        Default: the intersection of the domains.

    Returns
    -------
    ndarray of float64, (n, n)
        Symmetric, zero on the diagonal.

    Examples
    --------
    >>> f = StepFunction([0.0, 1.0], [2.0, 0.0], end=3.0)
    >>> g = StepFunction([0.0, 2.0], [2.0, 1.0], end=3.0)
    >>> pairwise([f, g], p=1).tolist()
    [[0.0, 3.0], [3.0, 0.0]]
    """
    fns = steps_of(curves)
    p = parse_p(p)
    n = len(fns)
    out = np.zeros((n, n))
    if n < 2:
        return out
    lo, hi = common_range(fns, range)
    x = _merged_points(fns, lo, hi)
    w = np.diff(np.append(x, hi))
    end = np.array([f.values[np.searchsorted(f.breaks, hi, side="right") - 1] for f in fns])
    general = not (p in (1.0, 2.0) or math.isinf(p))
    sup = np.abs(end[:, None] - end[None, :])
    block = max(1, _BLOCK // n)
    if general or math.isinf(p):
        for c in np.arange(0, x.size, block):
            v = _values_on(fns, x[c:c + block])
            for i in np.arange(n - 1):
                np.maximum(sup[i, i + 1:], np.abs(v[i + 1:] - v[i]).max(axis=1), out=sup[i, i + 1:])
        if math.isinf(p):
            upper = np.triu(sup, 1)
            return upper + upper.T
    acc = np.zeros((n, n))
    for c in np.arange(0, x.size, block):
        v = _values_on(fns, x[c:c + block])
        wb = w[c:c + block]
        for i in np.arange(n - 1):
            acc[i, i + 1:] += _accumulate(np.abs(v[i + 1:] - v[i]), wb, p, sup[i, i + 1:] if general else None)
    if p == 1.0:
        upper = acc
    elif p == 2.0:
        upper = np.sqrt(acc)
    else:
        upper = np.where(sup > 0, sup, 1.0) * acc ** (1.0 / p)
    upper = np.triu(upper, 1)
    return upper + upper.T


def distance(a: Any, b: Any, p: Any = 1, range: Any = None) -> float:
    """The exact Lp (or sup) distance between two curves over a common range.

    Parameters
    ----------
    a, b : Curve, StepFunction, or (grid, values)
    p : float >= 1, or inf / "inf"
        1 for the L1 distance (the area between the curves), 2, any real >= 1, or inf
        for the sup distance (the largest gap, the closed range's end included).
    range : (a, b) or "a:b", optional
        Default: the intersection of the two domains.

    Returns
    -------
    float

    Examples
    --------
    >>> f = StepFunction([0.0, 1.0], [2.0, 0.0], end=3.0)
    >>> g = StepFunction([0.0, 2.0], [2.0, 1.0], end=3.0)
    >>> distance(f, g, p=1), distance(f, g, p="inf"), distance(f, g, range=(1.5, 3.0))
    (3.0, 2.0, 2.0)
    """
    return float(pairwise([a, b], p=p, range=range)[0, 1])


def mean_step(curves: Any, range: Any = None) -> StepFunction:
    """The pointwise mean of curves over a common range: a step function, exact up to
    one rounding per piece (sums of integer curves are exact in float64).

    Examples
    --------
    >>> f = StepFunction([0.0, 1.0], [2.0, 0.0], end=3.0)
    >>> g = StepFunction([0.0, 2.0], [2.0, 1.0], end=3.0)
    >>> m = mean_step([f, g])
    >>> m.breaks.tolist(), m.values.tolist(), m.end
    ([0.0, 1.0, 2.0], [2.0, 1.0, 0.5], 3.0)
    """
    fns = steps_of(curves)
    if not fns:
        raise ValueError("the mean of no curves is undefined")
    lo, hi = common_range(fns, range)
    m = merge(fns, lo, hi)
    mean = m.values.sum(axis=0) / len(fns)
    end = m.at_end.sum() / len(fns)
    # the value at the range's end is a piece of its own when some curve jumps there
    if m.x[-1] < hi and end != mean[-1]:
        return StepFunction(np.append(m.x, hi), np.append(mean, end), hi)
    return StepFunction(m.x, mean, hi)
