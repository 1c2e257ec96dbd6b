"""Are two groups of curves different? A permutation test on their mean curves.

The statistic is the exact Lp (or sup) distance between the two groups' mean curves over
a common range (the mean of step functions is a step function, so the distance is a
finite sum over the merged change points: `chitally.distances`). Under the null
hypothesis that both groups come from one distribution, the curves are exchangeable, so
relabelling them at random gives the statistic's null distribution. The p-value counts
the observed labelling too (the "+1" correction), so it is never 0 and the test keeps
its level exactly: ``P(p <= alpha) <= alpha`` for every alpha.

Every labelling's statistic is computed the same way from the exact group sums
(integer curves sum exactly in float64), so a relabelling that reproduces the observed
groups reproduces the observed statistic to the bit.
"""

from __future__ import annotations

import builtins
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .distances import common_range, merge, parse_p, steps_of
from .validate import validate_count

__all__ = ["TwoSampleResult", "two_sample_test"]

# Labellings per block (fixed, so the draws never depend on the data's size).
_ROWS = 256
# Entries of a (labellings x pieces) block.
_BLOCK = 1 << 22


@dataclass(frozen=True)
class TwoSampleResult:
    """The outcome of `two_sample_test`.

    Attributes
    ----------
    statistic : float
        The distance between the two groups' mean curves.
    p_value : float
        ``(1 + exceed) / (permutations + 1)``.
    permutations : int
        Random relabellings drawn.
    exceed : int
        Relabellings whose statistic is at least the observed one.
    p : float
        The distance's exponent (inf for the sup distance).
    range : (float, float)
        Where the distance was taken.
    sizes : (int, int)
        Curves in each group.
    seed : int
    """

    statistic: float
    p_value: float
    permutations: int
    exceed: int
    p: float
    range: tuple[float, float]
    sizes: tuple[int, int]
    seed: int

    def as_dict(self) -> dict[str, Any]:
        return {"statistic": self.statistic, "p_value": self.p_value, "permutations": self.permutations,
                "exceed": self.exceed, "p": "inf" if math.isinf(self.p) else self.p,
                "range": list(self.range), "sizes": list(self.sizes), "seed": self.seed}


def _statistics(labels: np.ndarray, values: np.ndarray, widths: np.ndarray, total: np.ndarray,
                n_a: int, n_b: int, p: float) -> np.ndarray:
    """The statistic of each labelling (rows of 0/1 indicators of group a)."""
    rows = labels.shape[0]
    cols = max(1, _BLOCK // max(rows, 1))

    def gaps():  # |mean_a - mean_b| piece by piece, a block of pieces at a time
        for c in range(0, values.shape[1], cols):
            s = labels @ values[:, c:c + cols]  # exact for integer curves: sums of integers
            yield c, np.abs(s / n_a - (total[c:c + cols] - s) / n_b)

    sup = np.zeros(rows)
    if math.isinf(p) or p not in (1.0, 2.0):
        for _, d in gaps():
            np.maximum(sup, d.max(axis=1, initial=0.0), out=sup)
        if math.isinf(p):
            return sup
    acc = np.zeros(rows)
    # a general p is scaled by each labelling's sup, so |d|^p neither overflows nor vanishes
    scale = np.where(sup > 0, sup, 1.0)[:, None]
    for c, d in gaps():
        w = widths[c:c + cols]
        acc += d @ w if p == 1.0 else (d * d) @ w if p == 2.0 else ((d / scale) ** p) @ w
    if p == 1.0:
        return acc
    if p == 2.0:
        return np.sqrt(acc)
    return scale[:, 0] * acc ** (1.0 / p)


def two_sample_test(group_a: Any, group_b: Any, p: Any = 1, permutations: int = 9999, seed: int = 0,
                    range: Any = None) -> TwoSampleResult:
    """Permutation test of "both groups of curves come from one distribution".

    Parameters
    ----------
    group_a, group_b : sequences of Curve / StepFunction / (grid, values), or FeatureMatrix
        The two groups (at least one curve each, three in all). Feature-matrix rows are
        the step functions through their grid samples.
    p : float >= 1, or inf / "inf"
        Exponent of the distance between the group means (1: the area between them).
    permutations : int
        Random relabellings (>= 1); the smallest p-value possible is
        ``1 / (permutations + 1)``.
    seed : int
        Seeds the relabellings.
    range : (a, b) or "a:b", optional
        Where the distance is taken; default the intersection of all domains.

    Returns
    -------
    TwoSampleResult

    Examples
    --------
    >>> from chitally.distances import StepFunction
    >>> low = [StepFunction([0.0, 1.0], [5.0, float(k)], end=2.0) for k in range(4)]
    >>> high = [StepFunction([0.0, 1.0], [5.0, 10.0 + k], end=2.0) for k in range(4)]
    >>> r = two_sample_test(low, high, permutations=999)
    >>> r.statistic, r.p_value < 0.1, r.sizes
    (10.0, True, (4, 4))
    """
    a, b = steps_of(group_a), steps_of(group_b)
    if not a or not b or len(a) + len(b) < 3:
        raise ValueError(f"two groups of at least one curve each and three in all are needed, got "
                         f"{len(a)} and {len(b)}")
    p = parse_p(p)
    permutations = validate_count(permutations, name="permutations", minimum=1)
    seed = validate_count(seed, name="seed", minimum=0)
    fns = a + b
    n_a, n_b, n = len(a), len(b), len(a) + len(b)
    lo, hi = common_range(fns, range)
    m = merge(fns, lo, hi)
    # the closed range's end is a zero-width piece: it counts for the sup only
    values = np.column_stack((m.values, m.at_end))
    widths = np.append(m.widths, 0.0)
    varies = values.max(axis=0) != values.min(axis=0)  # pieces where every labelling gives 0
    values, widths = np.ascontiguousarray(values[:, varies]), widths[varies]
    total = values.sum(axis=0)
    observed_labels = np.zeros((1, n))
    observed_labels[0, :n_a] = 1.0
    observed = float(_statistics(observed_labels, values, widths, total, n_a, n_b, p)[0])
    rng = np.random.default_rng(seed)
    exceed = 0
    # rounding of non-integer curves may split a tie: those within 1e-12 count as ties
    threshold = observed - 1e-12 * abs(observed)
    for start in builtins.range(0, permutations, _ROWS):  # `range` is the parameter
        rows = min(_ROWS, permutations - start)
        perms = rng.permuted(np.tile(np.arange(n), (rows, 1)), axis=1)
        labels = np.zeros((rows, n))
        np.put_along_axis(labels, perms[:, :n_a], 1.0, axis=1)
        exceed += int((_statistics(labels, values, widths, total, n_a, n_b, p) >= threshold).sum())
    return TwoSampleResult(statistic=observed, p_value=(1 + exceed) / (permutations + 1),
                           permutations=permutations, exceed=exceed, p=p, range=(lo, hi),
                           sizes=(n_a, n_b), seed=seed)
