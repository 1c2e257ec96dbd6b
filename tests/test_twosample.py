"""The permutation test of two groups of curves (chitally.twosample) and `chitally test`.

Checked against statistics worked out by hand, against the exact permutation
distribution enumerated with itertools (all splits of a small pool), against the
permutation test's defining property (under exchangeability P(p <= alpha) <= alpha: a
binomial check on the share of p-values below 0.05 over seeded repetitions), and for
power on clearly different groups.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from click.testing import CliRunner

from chitally import euler_curve
from chitally.cli import main
from chitally.distances import StepFunction, distance, mean_step
from chitally.features import feature_matrix
from chitally.runs import Where
from chitally.twosample import two_sample_test


def const(v: float, end: float = 2.0) -> StepFunction:
    return StepFunction([0.0], [v], end=end)


def test_statistic_is_the_distance_between_group_means_by_hand():
    a = [const(1.0), const(3.0)]  # mean 2 on [0, 2]
    b = [const(6.0), const(8.0), const(10.0)]  # mean 8
    # |2 - 8| = 6 over a length of 2: L1 = 12, L2 = sqrt(36 * 2), sup = 6
    assert two_sample_test(a, b, p=1, permutations=10).statistic == 12.0
    assert two_sample_test(a, b, p=2, permutations=10).statistic == pytest.approx(math.sqrt(72.0), rel=1e-15)
    assert two_sample_test(a, b, p="inf", permutations=10).statistic == 6.0
    assert two_sample_test(a, b, p=3, permutations=10).statistic == pytest.approx((216 * 2) ** (1 / 3), rel=1e-14)
    r = two_sample_test(a, b, permutations=10, range=(0.5, 1.0))
    assert r.statistic == 3.0 and r.range == (0.5, 1.0) and r.sizes == (2, 3)


def test_statistic_equals_distance_between_exact_mean_curves():
    rng = np.random.default_rng(0)
    a = [euler_curve(rng.random((40, 2)), 0.3) for _ in range(3)]
    b = [euler_curve(rng.random((50, 2)), 0.3) for _ in range(4)]
    r = two_sample_test(a, b, p=1, permutations=20)
    assert r.statistic == pytest.approx(distance(mean_step(a), mean_step(b), p=1), rel=1e-12)


def test_p_value_matches_the_enumerated_permutation_distribution():
    """All C(6, 3) = 20 splits enumerated (itertools): the exact permutation p-value is the
    share of splits whose statistic is at least the observed one. Random relabellings
    estimate it: 20,000 draws, 4 binomial standard errors."""
    rng = np.random.default_rng(1)
    curves = [euler_curve(rng.random((25, 2)), 0.4) for _ in range(6)]
    a, b = curves[:3], curves[3:]
    observed = distance(mean_step(a), mean_step(b))
    stats = []
    for idx in itertools.combinations(range(6), 3):
        rest = [curves[i] for i in range(6) if i not in idx]
        stats.append(distance(mean_step([curves[i] for i in idx]), mean_step(rest)))
    exact = np.mean(np.array(stats) >= observed * (1 - 1e-12))
    r = two_sample_test(a, b, permutations=20000, seed=3)
    assert abs(r.exceed / r.permutations - exact) <= 4 * math.sqrt(exact * (1 - exact) / 20000)
    assert r.p_value == (1 + r.exceed) / 20001


def test_seeded_and_reproducible():
    rng = np.random.default_rng(2)
    a = [euler_curve(rng.random((30, 2)), 0.3) for _ in range(5)]
    b = [euler_curve(rng.random((30, 2)), 0.3) for _ in range(5)]
    assert two_sample_test(a, b, permutations=500, seed=4) == two_sample_test(a, b, permutations=500, seed=4)


def _pool(reps: int, per_group: int, seed: int) -> list:
    rng = np.random.default_rng(seed)
    return [[euler_curve(rng.random((15, 1)), 0.3) for _ in range(2 * per_group)] for _ in range(reps)]


def test_same_distribution_p_values_are_roughly_uniform():
    """100 seeded repetitions, 8 vs 8 curves of 15 uniform points on [0, 1], 199
    relabellings each. Under the null a permutation p-value with the +1 correction has
    P(p <= alpha) <= alpha; the count below 0.05 is then at most Binomial(100, 0.05):
    P(count >= 13) < 0.002. The share below 0.5 must be near a half (3 standard errors)."""
    pvalues = []
    for k, curves in enumerate(_pool(100, 8, seed=5)):
        pvalues.append(two_sample_test(curves[:8], curves[8:], permutations=199, seed=k).p_value)
    pvalues = np.array(pvalues)
    assert (pvalues < 0.05).sum() <= 12
    assert 0.35 <= (pvalues < 0.5).mean() <= 0.65
    assert pvalues.min() >= 1 / 200


def test_clearly_different_groups_give_small_p_values():
    rng = np.random.default_rng(6)
    spread = [euler_curve(rng.random((60, 2)), 0.25) for _ in range(8)]
    # the same number of points in eight tight clumps
    clumped = []
    for _ in range(8):
        centres = rng.random((8, 2))
        clumped.append(euler_curve(centres[rng.integers(0, 8, 60)] + 0.01 * rng.standard_normal((60, 2)), 0.25))
    r = two_sample_test(spread, clumped, permutations=999, seed=0)
    assert r.p_value <= 0.01 and r.exceed <= 9


def test_bad_groups_are_refused():
    with pytest.raises(ValueError, match="at least one curve each"):
        two_sample_test([], [const(1.0)])
    with pytest.raises(ValueError, match="three in all"):
        two_sample_test([const(1.0)], [const(2.0)])
    with pytest.raises(ValueError, match="p must be a number >= 1"):
        two_sample_test([const(1.0)] * 2, [const(2.0)], p=0)
    with pytest.raises(ValueError, match="permutations must be an integer >= 1"):
        two_sample_test([const(1.0)] * 2, [const(2.0)], permutations=0)


def test_cli_test_from_files_and_from_a_labelled_batch_store(tmp_path):
    rng = np.random.default_rng(7)
    clouds = [rng.random((40, 2)) for _ in range(6)] + [rng.random((40, 2)) * [1.0, 0.3] for _ in range(6)]
    names = []
    for i, c in enumerate(clouds):
        euler_curve(c, 0.3).save(tmp_path / f"c{i}.csv")
        names.append(str(tmp_path / f"c{i}.csv"))
    runner = CliRunner()
    res = runner.invoke(main, ["test", "--a", *names[:6], "--b", *names[6:], "--permutations", "499",
                               "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.output)
    want = two_sample_test([euler_curve(c, 0.3) for c in clouds[:6]],
                           [euler_curve(c, 0.3) for c in clouds[6:]], permutations=499)
    assert out == want.as_dict() and out["p_value"] < 0.01
    res = runner.invoke(main, ["test", "--p", "inf", "--a", *names[:3], "--b", *names[3:6]])
    assert res.exit_code == 0 and "sup distance between the group means" in res.output
    fm = feature_matrix(clouds, 0.3, "0:0.3:16", labels=["box"] * 6 + ["strip"] * 6,
                        store=str(tmp_path / "fm.zarr"), where=Where(serial=True))
    res = runner.invoke(main, ["test", "--store", str(tmp_path / "fm.zarr"), "--labels", "box,strip",
                               "--permutations", "499", "--json"])
    assert res.exit_code == 0, res.output
    rows = [(fm.grid, r) for r in fm.values]
    assert json.loads(res.output) == two_sample_test(rows[:6], rows[6:], permutations=499).as_dict()
    for bad, message in ((["--a", names[0]], "test needs --a"),
                         ([names[0], "--a", names[1], "--b", names[2]], "name the group first"),
                         (["--a", *names[:2], "--b", names[2], "--c", names[3]], "no such option: --c"),
                         (["--store", str(tmp_path / "fm.zarr"), "--labels", "box,round"],
                          "no row of"),
                         (["--store", str(tmp_path / "fm.zarr")], "--labels X,Y")):
        res = runner.invoke(main, ["test", *bad])
        assert res.exit_code == 2 and message in res.output and res.output.count("\n") == 1, res.output
