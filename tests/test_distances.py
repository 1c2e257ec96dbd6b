"""Exact distances between curves (chitally.distances) and `chitally compare`.

Checked against step functions whose distances are worked out by hand in the comments,
against the metric axioms (hypothesis), and against a Riemann sum on a fine grid within
that sum's error bound (a step function's left Riemann sum errs only on the cells that
hold a jump, each by at most the cell width times the jump).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from chitally import Curve, euler_curve, feature_matrix
from chitally.cli import main
from chitally.distances import StepFunction, distance, mean_step, pairwise, steps_of
from chitally.jobs.cloud import Params, create_or_open
from chitally.runs import Where, run

# f = 3 on [0, 1), 1 on [1, 2.5), 2 on [2.5, 4]
F = StepFunction([0.0, 1.0, 2.5], [3.0, 1.0, 2.0], end=4.0)
# g = 3 on [0, 2), 0 on [2, 4]
G = StepFunction([0.0, 2.0], [3.0, 0.0], end=4.0)
# |f - g| = 0 on [0, 1), 2 on [1, 2), 1 on [2, 2.5), 2 on [2.5, 4]


def test_hand_computed_distances():
    # L1: 2*1 + 1*0.5 + 2*1.5 = 5.5
    assert distance(F, G, p=1) == 5.5
    # L2: sqrt(4*1 + 1*0.5 + 4*1.5) = sqrt(10.5)
    assert distance(F, G, p=2) == pytest.approx(math.sqrt(10.5), rel=1e-15)
    # L3: (8*1 + 1*0.5 + 8*1.5) ** (1/3) = 20.5 ** (1/3)
    assert distance(F, G, p=3) == pytest.approx(20.5 ** (1 / 3), rel=1e-14)
    # sup: 2
    assert distance(F, G, p="inf") == 2.0 == distance(F, G, p=math.inf)
    # on [1.5, 2.25]: 2*0.5 + 1*0.25 = 1.25
    assert distance(F, G, range=(1.5, 2.25)) == 1.25
    # on the single point [2.2, 2.2]: no area, the gap there is 1
    assert distance(F, G, range="2.2:2.2") == 0.0 and distance(F, G, p="inf", range="2.2:2.2") == 1.0


def test_sup_counts_the_value_at_the_closed_range_end():
    # equal on [0, 1); at t = 1 (the domain's end) f jumps to 5, g stays 0
    f = StepFunction([0.0, 1.0], [0.0, 5.0], end=1.0)
    g = StepFunction([0.0], [0.0], end=1.0)
    assert distance(f, g, p=1) == 0.0
    assert distance(f, g, p="inf") == 5.0


def test_curves_with_different_domains_use_the_intersection():
    # a = 4 on [0, 1), 1 on [1, 3]; b = 4 on [0, 0.5), 2 on [0.5, 2]
    a = Curve.from_jumps([0.0, 1.0], [4, -3], eps=3.0, max_dim=None, n_points=4)
    b = Curve.from_jumps([0.0, 0.5], [4, -2], eps=2.0, max_dim=None, n_points=4)
    # on [0, 2]: |a - b| = 0 on [0, .5), 2 on [.5, 1), 1 on [1, 2] -> 1 + 1 = 2
    assert distance(a, b) == 2.0
    assert distance(a, b, p="inf") == 2.0
    with pytest.raises(ValueError, match="inside every domain"):
        distance(a, b, range=(0.0, 2.5))
    with pytest.raises(ValueError, match="p must be a number >= 1"):
        distance(a, b, p=0.5)
    late = StepFunction([5.0], [1.0], end=6.0)
    with pytest.raises(ValueError, match="do not overlap"):
        distance(a, late)


def test_mean_of_step_functions():
    # (f + g) / 2 = 3 on [0, 1), 2 on [1, 2), 0.5 on [2, 2.5), 1 on [2.5, 4]
    m = mean_step([F, G])
    assert m.breaks.tolist() == [0.0, 1.0, 2.0, 2.5] and m.values.tolist() == [3.0, 2.0, 0.5, 1.0]
    assert m.end == 4.0


def test_feature_matrix_rows_are_step_functions_through_their_samples():
    clouds = [np.random.default_rng(s).random((30, 2)) for s in range(4)]
    grid = [0.0, 0.1, 0.2, 0.3]
    fm = feature_matrix(clouds, 0.3, grid)
    d = pairwise(fm, p=1)
    # row i is its sample at grid[j] on [grid[j], grid[j+1]): widths 0.1 each, the last
    # sample a single point (no area)
    v = fm.values.astype(float)
    by_hand = np.abs(v[:, None, :3] - v[None, :, :3]).sum(axis=2) * 0.1
    assert np.allclose(d, by_hand, rtol=1e-14, atol=0)
    sup = np.abs(v[:, None, :] - v[None, :, :]).max(axis=2)
    assert np.array_equal(pairwise(fm, p="inf"), sup)
    assert len(steps_of(fm)) == 4


def _to_step(pairs):
    xs = sorted({round(x, 3) for x, _ in pairs} | {0.0})
    ys = [pairs[k % len(pairs)][1] for k in range(len(xs))]
    return StepFunction(xs, ys, end=10.0)


STEPS = st.lists(st.tuples(st.floats(0.0, 10.0, allow_nan=False), st.integers(-20, 20)),
                 min_size=1, max_size=8).map(_to_step)


@settings(max_examples=60, deadline=None)
@given(st.lists(STEPS, min_size=3, max_size=5), st.sampled_from([1.0, 2.0, 3.5, math.inf]))
def test_pairwise_is_a_metric(fns, p):
    d = pairwise(fns, p=p)
    assert np.array_equal(d, d.T) and not np.diag(d).any() and (d >= 0).all()
    n = len(fns)
    for i in range(n):
        for j in range(n):
            for k in range(n):
                assert d[i, k] <= d[i, j] + d[j, k] + 1e-9 * (1 + d[i, k])
    assert distance(fns[0], fns[1], p=p) == pytest.approx(d[0, 1], rel=1e-12, abs=1e-12)


def test_exact_l1_agrees_with_a_fine_riemann_sum_within_its_error_bound():
    a = euler_curve(np.random.default_rng(1).random((400, 2)), 0.12)
    b = euler_curve(np.random.default_rng(2).random((400, 2)) * [1.0, 0.6], 0.12)
    exact = distance(a, b, p=1)
    cells = 200_000
    h = 0.12 / cells
    left = np.arange(cells) * h
    riemann = float(np.abs(a.at(left) - b.at(left)).sum() * h)
    # |a - b| jumps only where a or b does, by at most the sum of their jumps there; a
    # cell holding such a jump errs by at most h times it, every other cell not at all
    bound = h * (np.abs(a.jumps()[1][1:]).sum() + np.abs(b.jumps()[1][1:]).sum())
    assert abs(exact - riemann) <= bound
    assert exact > 100 * bound  # the check has teeth


def test_cli_compare_files_and_a_cloud_run(tmp_path):
    pts = np.random.default_rng(4).random((300, 2))
    a = euler_curve(pts, 0.1)
    b = euler_curve(pts[:200], 0.1)
    c = euler_curve(pts[:100], 0.08)
    a.save(tmp_path / "a.csv")
    b.save(tmp_path / "b.json")
    c.save(tmp_path / "c.npz")
    store = create_or_open(str(tmp_path / "run.zarr"), pts, Params.checked(0.1))
    assert run(store, Where(serial=True)).complete
    runner = CliRunner()
    res = runner.invoke(main, ["compare", str(tmp_path / "a.csv"), str(tmp_path / "b.json"),
                               str(tmp_path / "c.npz"), str(tmp_path / "run.zarr"), "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.output)
    assert out["names"] == ["a", "b", "c", "run"] and out["range"] == [0.0, 0.08]
    expected = pairwise([a, b, c, a], p=1)
    assert np.array_equal(np.array(out["matrix"]), expected)
    assert out["matrix"][0][3] == 0.0
    res = runner.invoke(main, ["compare", str(tmp_path / "a.csv"), str(tmp_path / "b.json"), "--p", "inf",
                               "--range", "0:0.05"])
    assert res.exit_code == 0, res.output
    lines = res.stdout.splitlines()
    assert lines[0] == ",a,b" and lines[1] == f"a,0.0,{distance(a, b, 'inf', (0, 0.05))!r}"
    for bad, message in ((["--p", "0.5"], "p must be a number >= 1"),
                         (["--range", "0:1"], "must lie inside every domain"),
                         (["--range", "x"], "must have the form A:B")):
        res = runner.invoke(main, ["compare", str(tmp_path / "a.csv"), str(tmp_path / "b.json"), *bad])
        assert res.exit_code == 2 and message in res.output and res.output.count("\n") == 1, res.output
    res = runner.invoke(main, ["compare", str(tmp_path / "a.csv")])
    assert res.exit_code == 2 and "at least two curves" in res.output
