"""Clouds measured in other metrics: Manhattan (p = 1) and Chebyshev (p = inf) beside the
Euclidean default.

Every curve is checked against outside references on the same cloud: gudhi's
``RipsComplex(distance_matrix=scipy.spatial.distance.cdist(x, x, ...))`` expanded to the
cap, networkx ``enumerate_all_cliques`` on the eps-graph (brute force), and
``chitally.matrix_curve`` of the cdist matrix. Coordinates are integers or small dyadic
fractions, so every sum is exact in any order (cdist's arithmetic and ours agree bit for
bit, which is checked first) and many distances tie; clouds with arbitrary coordinates
are checked against the rule written out in numpy (`references.metric_lengths`). The
cover, the halos, the KD-tree join and the scan are checked by brute force; stores
refuse a metric they were not made for, and stores made before there was a choice read
as Euclidean.
"""

from __future__ import annotations

import dataclasses
import functools
import json

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import write_points
from references import (
    brute_force_matrix_curve,
    gudhi_matrix_curve,
    metric_lengths,
    scipy_lengths,
)

from chitally import euler_curve, feature_matrix
from chitally.cli import EXIT_USAGE, METRIC_CHOICES, main
from chitally.cover import build_cover
from chitally.graphs import matrix_curve
from chitally.jobs import batch, cloud
from chitally.kernel import _MAX_EDGES, _tree_edges
from chitally.metric import METRICS, key_bound, query_radius
from chitally.planner import make_plan
from chitally.scan import scan_eps
from chitally.store import RunStore, StoreMismatch
from chitally.validate import InputError

pytestmark = pytest.mark.timeout(300)

OTHER = ("manhattan", "chebyshev")


@functools.cache
def exact_cloud(name: str) -> np.ndarray:
    """Clouds whose distances are exact in any summation order, with many ties."""
    if name == "lattice-R3":  # integers in [0, 5)^3, coincident points included
        return np.random.default_rng(31).integers(0, 5, (40, 3)).astype(np.float64)
    if name == "dyadic-R2":  # multiples of 1/16
        return np.random.default_rng(32).integers(0, 64, (50, 2)) / 16.0
    if name == "halves-R10":  # past the unrolled widths of the kernel's distance loops
        return np.random.default_rng(33).integers(0, 4, (30, 10)) / 2.0
    raise KeyError(name)


# eps per (cloud, metric): a sparse enough graph for an uncapped reference, and an eps
# that equals many distances (a tie at eps must be kept)
EPS = {
    ("lattice-R3", "euclidean"): float(np.sqrt(2.0)), ("lattice-R3", "manhattan"): 2.0, ("lattice-R3", "chebyshev"): 1.0,
    ("dyadic-R2", "euclidean"): 0.625, ("dyadic-R2", "manhattan"): 0.625, ("dyadic-R2", "chebyshev"): 0.375,
    ("halves-R10", "euclidean"): 2.0, ("halves-R10", "manhattan"): 4.5, ("halves-R10", "chebyshev"): 1.0,
}
CAPS = (None, 1, 2, 3)


def test_the_cli_offers_exactly_the_metrics():
    assert METRIC_CHOICES == METRICS


@pytest.mark.parametrize("name", ["lattice-R3", "dyadic-R2", "halves-R10"])
@pytest.mark.parametrize("metric", METRICS)
def test_scipy_and_the_rule_agree_on_exact_clouds(name, metric):
    x = exact_cloud(name)
    ours, theirs = metric_lengths(x, metric), scipy_lengths(x, metric)
    assert np.array_equal(ours.view(np.int64), theirs.view(np.int64))
    # ties at eps exist, so the inclusion rule at equality is exercised
    assert np.count_nonzero(np.triu(ours == EPS[name, metric], k=1)) > 0


@pytest.mark.parametrize("cap", CAPS)
@pytest.mark.parametrize("name", ["lattice-R3", "dyadic-R2", "halves-R10"])
@pytest.mark.parametrize("metric", METRICS)
def test_the_curve_equals_gudhi_networkx_and_the_matrix_curve(name, metric, cap):
    x = exact_cloud(name)
    eps = EPS[name, metric]
    D = scipy_lengths(x, metric)  # scipy.spatial.distance.cdist
    ours = euler_curve(x, eps, cap, metric=metric)
    # gudhi RipsComplex(distance_matrix=cdist(x, x, ...)), expanded to the cap
    assert ours == gudhi_matrix_curve(D, eps, cap)
    # networkx enumerate_all_cliques on the eps-graph of the cdist matrix (brute force)
    assert ours == brute_force_matrix_curve(D, eps, cap)
    # the flag filtration of the same matrix, through chitally's graph path
    assert ours == matrix_curve(D, eps, cap)


@pytest.mark.parametrize("cap", CAPS)
@pytest.mark.parametrize("metric", OTHER)
def test_arbitrary_coordinates_follow_the_rule_bit_for_bit(metric, cap):
    # coordinates whose sums round: the curve's scales must be the rule's own lengths
    x = np.random.default_rng(34).normal(size=(45, 4))
    eps = 1.0 if metric == "chebyshev" else 2.0
    lengths = metric_lengths(x, metric)  # the rule written out in numpy, coordinate order
    ours = euler_curve(x, eps, cap, metric=metric)
    assert ours == brute_force_matrix_curve(lengths, eps, cap)  # networkx brute force
    assert ours == gudhi_matrix_curve(lengths, eps, cap)  # gudhi RipsComplex(distance_matrix=)


def test_the_euclidean_default_is_the_euclidean_metric():
    x = np.random.default_rng(35).random((300, 3))
    assert euler_curve(x, 0.2) == euler_curve(x, 0.2, metric="euclidean") == euler_curve(x, 0.2, metric="Euclidean")


def test_the_metrics_give_different_curves():
    # on the unit square's corners: diagonal sqrt 2 (Euclidean), 2 (Manhattan), 1 (Chebyshev)
    square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    assert euler_curve(square, 2.0, metric="euclidean").values.tolist() == [0.0, 1.0, 2.0 ** 0.5]
    assert euler_curve(square, 2.0, metric="manhattan").values.tolist() == [0.0, 1.0, 2.0]
    assert euler_curve(square, 2.0, metric="chebyshev").values.tolist() == [0.0, 1.0]


def test_a_bad_metric_is_one_line():
    with pytest.raises(InputError, match=r"^metric must be one of euclidean, manhattan, chebyshev, got 'l3'$"):
        euler_curve(np.zeros((2, 2)), 1.0, metric="l3")


# ------------------------------------------------------------ tree, cover, halos, scan


@pytest.mark.parametrize("dims, n, eps", [(3, 3000, 0.08), (10, 400, 0.5)])
@pytest.mark.parametrize("metric", METRICS)
def test_the_tree_join_finds_exactly_the_pairs_of_the_rule(metric, dims, n, eps):
    x = np.random.default_rng(36).random((n, dims))
    if metric == "manhattan":
        eps *= 2.0
    lo, hi, keys, m = _tree_edges(x, eps, key_bound(query_radius(eps), metric), _MAX_EDGES, metric)
    lengths = metric_lengths(x, metric)  # brute force, the rule written out in numpy
    want = set(zip(*np.nonzero(np.triu(lengths <= eps, k=1))))
    got = set(zip(lo[:m].tolist(), hi[:m].tolist()))
    assert m == len(got) and got == {(int(a), int(b)) for a, b in want}
    found = np.sqrt(keys[:m]) if metric == "euclidean" else keys[:m]
    assert np.array_equal(found, lengths[lo[:m], hi[:m]])


@pytest.mark.parametrize("radius", [0.5, 1.0, 2.0])
@pytest.mark.parametrize("metric", OTHER)
def test_cover_and_halos_hold_in_the_metric(metric, radius):
    x = np.random.default_rng(37).random((600, 3))
    eps = 0.15
    R = radius * eps
    cover = build_cover(x, eps, R, metric=metric)
    xs = x[cover.order]
    L = metric_lengths(xs, metric)  # brute force by the rule
    centres = cover.centres
    ball = np.repeat(np.arange(cover.n_balls), np.diff(cover.ball_offsets))
    # every row lies within R of its centre, and its ball is the first whose centre is
    assert np.all(L[np.arange(xs.shape[0]), centres[ball]] <= R)
    assert np.array_equal(np.argmax(L[:, centres] <= R, axis=1), ball)
    # neighbour lists: every ball whose centre is within 2R + eps (extra balls are harmless)
    for b in range(cover.n_balls):
        listed = set(cover.neighbour_balls[cover.neighbour_offsets[b]:cover.neighbour_offsets[b + 1]].tolist())
        assert set(np.flatnonzero(L[centres[b], centres] <= 2 * R + eps).tolist()) <= listed
    plan = make_plan(xs, cover, eps, None, task_cost=800.0, metric=metric)
    assert plan.n_tasks > 3
    for t in range(plan.n_tasks):
        owned = np.arange(plan.row_start[t], plan.row_stop[t])
        halo = plan.halo_rows[plan.halo_offsets[t]:plan.halo_offsets[t + 1]]
        assert np.array_equal(halo, np.flatnonzero((L[owned] <= eps).any(axis=0)))


@pytest.mark.parametrize("metric", OTHER)
def test_the_scan_counts_degrees_in_the_metric(metric):
    x = np.random.default_rng(38).random((500, 3))
    eps_values = [0.1, 0.2]
    report = scan_eps(x, eps_values, sample=500, timing_seconds=0, metric=metric)
    L = metric_lengths(x, metric)  # brute force by the rule
    for row, eps in zip(report.rows, eps_values):
        assert np.array_equal(row.degrees, (L[report.sample_rows] <= eps).sum(axis=1) - 1)


# ------------------------------------------------------------ stores, batch, features


def _params(metric="euclidean", eps=0.2):
    return cloud.Params.checked(eps, None, None, 500.0, metric=metric)


def test_a_cloud_run_in_a_metric_equals_the_in_process_curve(tmp_path):
    from chitally.execute import SerialExecutor
    from chitally.runs import execute

    x = np.random.default_rng(39).random((200, 3))
    for metric in OTHER:
        store = cloud.create_or_open(str(tmp_path / f"{metric}.zarr"), x, _params(metric))
        assert store.params["metric"] == metric and store.n_tasks > 1
        report = execute(store, SerialExecutor())
        assert report.result == euler_curve(x, 0.2, metric=metric)


def test_a_store_refuses_another_metric(tmp_path):
    x = np.random.default_rng(40).random((100, 2))
    url = str(tmp_path / "run.zarr")
    cloud.create_or_open(url, x, _params("manhattan"))
    with pytest.raises(StoreMismatch) as exc:
        cloud.create_or_open(url, x, _params("chebyshev"))
    msg = str(exc.value)
    assert "\n" not in msg and 'metric: store "manhattan", given "chebyshev"' in msg
    with pytest.raises(StoreMismatch, match='metric: store "manhattan", given "euclidean"'):
        cloud.create_or_open(url, x, _params())


def test_a_store_made_before_the_metric_existed_reads_as_euclidean(tmp_path):
    from chitally.execute import SerialExecutor
    from chitally.runs import execute

    x = np.random.default_rng(41).random((100, 2))
    url = str(tmp_path / "old.zarr")
    spec = cloud.job_spec(x, _params())
    old = {k: v for k, v in spec.params.items() if k != "metric"}
    RunStore.create(url, dataclasses.replace(spec, params=old))
    store = cloud.create_or_open(url, x, _params())  # no mismatch: it is a Euclidean store
    assert "metric" not in store.params and cloud.metric_of(store.params) == "euclidean"
    assert execute(store, SerialExecutor()).result == euler_curve(x, 0.2)
    with pytest.raises(StoreMismatch, match='metric: store "euclidean", given "manhattan"'):
        cloud.create_or_open(url, x, _params("manhattan"))


def test_feature_matrix_and_batch_runs_take_the_metric(tmp_path):
    from chitally.clouds import read_collection
    from chitally.execute import SerialExecutor
    from chitally.runs import execute

    rng = np.random.default_rng(42)
    clouds = [rng.integers(0, 4, (int(n), 2)).astype(np.float64) for n in rng.integers(3, 25, 8)]
    grid = [0.0, 1.0, 2.0, 3.0]
    for metric in OTHER:
        want = np.array([euler_curve(c, 3.0, metric=metric).sample(grid) for c in clouds])
        fm = feature_matrix(clouds, 3.0, grid, metric=metric, threads=1)
        assert np.array_equal(fm.values, want)
        params = batch.BatchParams.checked(3.0, grid, task_cost=200.0, metric=metric)
        store = batch.create_or_open(str(tmp_path / f"{metric}.zarr"), read_collection(clouds), params)
        assert store.n_tasks > 1
        assert np.array_equal(execute(store, SerialExecutor()).result.values, want)
        other = batch.BatchParams.checked(3.0, grid, task_cost=200.0)
        with pytest.raises(StoreMismatch, match=f'metric: store "{metric}", given "euclidean"'):
            batch.create_or_open(str(tmp_path / f"{metric}.zarr"), read_collection(clouds), other)
    with pytest.raises(InputError, match="metric applies to point clouds"):
        feature_matrix([np.array([[0, 1]])], grid=[0, 1], metric="manhattan")


def test_curve_features_has_metric_as_a_parameter():
    from sklearn.base import clone

    from chitally import CurveFeatures

    rng = np.random.default_rng(43)
    clouds = [rng.integers(0, 4, (12, 2)).astype(np.float64) for _ in range(4)]
    est = CurveFeatures(eps=3.0, grid=[0.0, 1.0, 3.0], metric="chebyshev", n_jobs=1)
    assert est.get_params()["metric"] == "chebyshev" and clone(est).metric == "chebyshev"
    got = est.fit(clouds).transform(clouds)
    want = np.array([euler_curve(c, 3.0, metric="chebyshev").sample([0.0, 1.0, 3.0]) for c in clouds])
    assert np.array_equal(got, want)
    assert not np.array_equal(est.set_params(metric="manhattan").transform(clouds), got)


# ------------------------------------------------------------------------------ CLI


@pytest.fixture
def src(tmp_path):
    return write_points(tmp_path / "points.npy", exact_cloud("lattice-R3"))


def _one_error_line(res) -> str:
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("chitally: error: "), res.stderr
    return lines[0]


def test_cli_curve_takes_the_metric(src, tmp_path):
    out = tmp_path / "c.json"
    res = CliRunner().invoke(main, ["curve", str(src), "--eps", "2", "--metric", "manhattan",
                                    "--out", str(out)])
    assert res.exit_code == 0, res.output
    from chitally import Curve

    assert Curve.load(out) == euler_curve(exact_cloud("lattice-R3"), 2.0, metric="manhattan")


@pytest.mark.parametrize("command", ["curve", "run", "plan", "batch", "scan"])
def test_cli_refuses_an_unknown_metric_with_exit_2(src, tmp_path, command):
    args = [command, str(src), "--metric", "minkowski"]
    args += {"curve": ["--eps", "1"], "run": ["--eps", "1", "--out", str(tmp_path / "r.zarr")],
             "plan": ["--eps", "1"], "batch": ["--eps", "1", "--grid", "0:1:2", "--out", str(tmp_path / "b.zarr")],
             "scan": []}[command]
    res = CliRunner().invoke(main, args)
    assert res.exit_code == EXIT_USAGE
    assert "'minkowski' is not one of 'euclidean', 'manhattan', 'chebyshev'" in res.output
    assert not (tmp_path / "r.zarr").exists() and not (tmp_path / "b.zarr").exists()


def test_cli_run_refuses_a_store_made_with_another_metric(src, tmp_path):
    run = str(tmp_path / "run.zarr")
    base = ["run", str(src), "--eps", "2", "--out", run, "--serial", "--no-progress", "--task-cost", "50"]
    res = CliRunner().invoke(main, [*base, "--metric", "chebyshev"])
    assert res.exit_code == 0, res.output
    res = CliRunner().invoke(main, [*base, "--metric", "manhattan"])
    assert res.exit_code == EXIT_USAGE
    assert 'metric: store "chebyshev", given "manhattan"' in _one_error_line(res)
    res = CliRunner().invoke(main, base)  # the default is Euclidean
    assert res.exit_code == EXIT_USAGE
    assert 'metric: store "chebyshev", given "euclidean"' in _one_error_line(res)


def test_cli_plan_names_the_metric(src):
    res = CliRunner().invoke(main, ["plan", str(src), "--eps", "2", "--metric", "chebyshev", "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    want = cloud.describe(exact_cloud("lattice-R3"), cloud.Params.checked(2.0, metric="chebyshev"))
    assert summary["metric"] == "chebyshev" and summary["tasks"] == want["tasks"]
    assert summary["halo_rows"] == want["halo_rows"]


def test_cli_scan_counts_in_the_metric(src):
    res = CliRunner().invoke(main, ["scan", str(src), "--eps", "1,2", "--metric", "manhattan", "--json"])
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)["rows"]
    L = metric_lengths(exact_cloud("lattice-R3"), "manhattan")  # brute force by the rule
    for row, eps in zip(rows, (1.0, 2.0)):
        assert row["mean_degree"] == pytest.approx(float(((L <= eps).sum(axis=1) - 1).mean()), abs=0, rel=1e-15)


def test_cli_batch_refuses_a_metric_for_graphs(tmp_path):
    folder = tmp_path / "graphs"
    folder.mkdir()
    (folder / "a.edges").write_text("0 1\n1 2\n")
    res = CliRunner().invoke(main, ["batch", str(folder), "--graphs", "--grid", "0:2:3", "--metric", "manhattan",
                                    "--out", str(tmp_path / "g.zarr")])
    assert res.exit_code == EXIT_USAGE
    assert "--metric applies to point clouds" in _one_error_line(res)
