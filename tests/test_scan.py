"""`chitally.scan.scan_eps` and `chitally scan`: sampled degrees, estimates, bad input.

Sampled figures are checked exactly against numpy brute force by the distance rule
(`references.pair_lengths`: squared differences summed in coordinate order, sqrt); the
whole-cloud mean degree against scipy's cKDTree counts, within a tolerance set by the
standard error of a sample of that size; triangles against networkx.
"""

from __future__ import annotations

import json
import math

import networkx as nx
import numpy as np
import pytest
from click.testing import CliRunner
from references import pair_lengths
from scipy.spatial import cKDTree

from chitally.cli import main
from chitally.cover import build_cover
from chitally.planner import make_plan
from chitally.scan import DEGREE_TARGETS, ScanReport, default_eps_range, scan_eps
from chitally.sources import InputError

pytestmark = pytest.mark.timeout(300)

TORUS_N = 20_000
TORUS_EPS = [0.03, 0.06, 0.12]


def torus(n: int, seed: int) -> np.ndarray:
    """Points on a torus in R^3 (radii 1 and 0.3), angles uniform."""
    rng = np.random.default_rng(seed)
    u, v = rng.uniform(0.0, 2 * np.pi, (2, n))
    r = 1.0 + 0.3 * np.cos(v)
    return np.column_stack([r * np.cos(u), r * np.sin(u), 0.3 * np.sin(v)])


def brute_distances(points: np.ndarray, rows: np.ndarray, block: int = 100):
    """(rows_block, distances to every point) by the rule, numpy brute force."""
    n = points.shape[0]
    for s in range(0, rows.shape[0], block):
        part = rows[s : s + block]
        d = pair_lengths(points, np.repeat(part, n), np.tile(np.arange(n), part.shape[0]))
        yield part, d.reshape(part.shape[0], n)


def brute_degrees(points: np.ndarray, rows: np.ndarray, eps_values) -> np.ndarray:
    """(len(eps), len(rows)) degrees: points within eps by the rule, the row itself excluded."""
    out = np.zeros((len(eps_values), rows.shape[0]), dtype=np.int64)
    at = 0
    for part, d in brute_distances(points, rows):
        for e, eps in enumerate(eps_values):
            out[e, at : at + part.shape[0]] = np.count_nonzero(d <= eps, axis=1) - 1
        at += part.shape[0]
    return out


@pytest.fixture(scope="module")
def cloud() -> np.ndarray:
    return torus(TORUS_N, seed=11)


@pytest.fixture(scope="module")
def report(cloud) -> ScanReport:
    return scan_eps(cloud, TORUS_EPS, max_dim=2, sample=2000, seed=5, timing_seconds=0)


def test_sampled_degrees_equal_brute_force(cloud, report):
    # numpy brute force by the rule over all N points (references.pair_lengths)
    expected = brute_degrees(cloud, report.sample_rows, TORUS_EPS)
    assert report.sample_size == 2000
    assert np.unique(report.sample_rows).shape[0] == 2000
    for e, row in enumerate(report.rows):
        assert row.eps == TORUS_EPS[e]
        np.testing.assert_array_equal(row.degrees, expected[e])
        assert row.max_degree == expected[e].max()
        assert row.isolated == np.count_nonzero(expected[e] == 0) / 2000


def test_degrees_at_exact_ties_follow_the_rule():
    # An integer grid: many pairs lie at exactly 1 and sqrt(2), and at eps one float
    # below those, cKDTree's widened count holds pairs the rule refuses.
    g = np.arange(12, dtype=np.float64)
    grid = np.stack(np.meshgrid(g, g, g[:5], indexing="ij"), axis=-1).reshape(-1, 3)
    root2 = math.sqrt(2.0)
    eps = [np.nextafter(1.0, 0.0), 1.0, np.nextafter(root2, 0.0), root2]
    rep = scan_eps(grid, eps, sample=300, seed=1, timing_seconds=0)
    expected = brute_degrees(grid, rep.sample_rows, eps)  # numpy brute force by the rule
    for e, row in enumerate(rep.rows):
        np.testing.assert_array_equal(row.degrees, expected[e])
    # interior points of the grid have 0, 6, 6 and 18 neighbours (closed form)
    assert [row.max_degree for row in rep.rows] == [0, 6, 6, 18]


def test_mean_degree_within_standard_errors(cloud, report):
    # exact degrees of every point from scipy's cKDTree counts (an outside reference)
    full = cKDTree(cloud).query_ball_point(cloud, TORUS_EPS[1], return_length=True) - 1
    n, n_s = TORUS_N, report.sample_size
    # A simple random sample of n_s of N rows: the sample mean has standard error
    # sigma / sqrt(n_s) * sqrt(1 - n_s / N). Four of them: a miss has odds of about
    # 6e-5 under the normal approximation (the seed is fixed, so the test is stable).
    se = full.std() / math.sqrt(n_s) * math.sqrt(1 - n_s / n)
    row = report.rows[1]
    assert abs(row.mean_degree - full.mean()) <= 4 * se
    # the reported standard error estimates the same quantity from the sample alone;
    # with 2000 rows the sample standard deviation is within a few percent
    assert row.mean_degree_se == pytest.approx(se, rel=0.15)
    assert row.edges == pytest.approx(n * row.mean_degree / 2, rel=1e-12)


def test_every_row_sampled_is_exact_and_costs_what_the_planner_charges():
    pts = torus(3000, seed=2)
    eps = 0.1
    rep = scan_eps(pts, [eps], max_dim=[1, 3], sample=5000, timing_seconds=0)
    row = rep.rows[0]
    np.testing.assert_array_equal(rep.sample_rows, np.arange(3000))
    graph = nx.Graph()
    graph.add_nodes_from(range(3000))
    for part, d in brute_distances(pts, np.arange(3000)):  # numpy brute force by the rule
        for i, drow in zip(part, d):
            graph.add_edges_from((int(i), int(j)) for j in np.flatnonzero(drow <= eps) if j > i)
    assert row.mean_degree_se == 0.0
    assert row.edges == graph.number_of_edges()
    assert row.triangles == sum(nx.triangles(graph).values()) / 3  # networkx
    np.testing.assert_array_equal(row.degrees, [graph.degree(i) for i in range(3000)])
    assert [r.max_dim for r in row.runs] == [1, 3, None]
    cover = build_cover(pts, eps)
    for run in row.runs:
        plan = make_plan(pts[cover.order], cover, eps, run.max_dim)
        assert run.cost == plan.cost.sum()


def test_nearest_neighbour_quantiles_and_degree_scales_equal_brute_force():
    # A dense clump inside a sparse cloud: the clump's rows have far more than the 100
    # nearest neighbours the scan lists at the scale where the mean degree reaches 50,
    # so the exact fallback for such rows runs.
    rng = np.random.default_rng(4)
    pts = np.vstack([rng.random((6000, 2)), 0.5 + 0.01 * rng.random((1500, 2))])
    rep = scan_eps(pts, [0.01], sample=800, seed=2, timing_seconds=0)
    rows = rep.sample_rows
    nn, near = [], []
    for part, d in brute_distances(pts, rows):  # numpy brute force by the rule
        d[np.arange(part.shape[0]), part] = np.inf  # not the row itself
        nn.append(d.min(axis=1))
        near.append(d[np.isfinite(d)])
    nn = np.concatenate(nn)
    q = np.quantile(nn, [0, 0.01, 0.5, 0.99, 1])
    assert list(rep.nn_quantiles.values()) == list(q)
    everything = np.sort(np.concatenate(near))
    for t in DEGREE_TARGETS:
        # mean degree >= t at v iff at least ceil(t * n) row-to-point distances are <= v
        assert rep.degree_reached[t] == everything[math.ceil(t * rows.shape[0]) - 1]
    # the fallback ran: some sampled row has more than the 100 listed neighbours there
    v = rep.degree_reached[50]
    most = max(int(np.count_nonzero(d <= v)) - 1 for _, d in brute_distances(pts, rows) for d in d)
    assert most > 100


def test_default_range(cloud):
    rep = scan_eps(cloud, sample=500, seed=3, timing_seconds=0)
    assert rep.default_range
    # numpy brute force by the rule: the median distance to the nearest other point
    nn = []
    for part, d in brute_distances(cloud, rep.sample_rows):
        d[np.arange(part.shape[0]), part] = np.inf
        nn.append(d.min(axis=1))
    median = float(np.quantile(np.concatenate(nn), 0.5))
    # a surface: 16 x the median gap is a mean degree in the hundreds, under the stop at 1000
    np.testing.assert_array_equal(rep.eps_values, median * np.sqrt(2.0) ** np.arange(9))
    np.testing.assert_array_equal(rep.eps_values, default_eps_range(median))
    # in a volume of random points the range stops after the first mean degree above 1000
    cube = np.random.default_rng(0).random((50_000, 3))
    dense = scan_eps(cube, sample=200, timing_seconds=0)
    means = [r.mean_degree for r in dense.rows]
    assert means[-1] > 1000 and all(m <= 1000 for m in means[:-1])


def test_same_seed_same_report_other_seed_other_sample(cloud):
    a = scan_eps(cloud, [0.05], sample=300, seed=9, timing_seconds=0)
    b = scan_eps(cloud, [0.05], sample=300, seed=9, timing_seconds=0)
    c = scan_eps(cloud, [0.05], sample=300, seed=10, timing_seconds=0)
    assert a.as_dict() == b.as_dict()
    np.testing.assert_array_equal(a.sample_rows, b.sample_rows)
    np.testing.assert_array_equal(a.rows[0].degrees, b.rows[0].degrees)
    assert not np.array_equal(a.sample_rows, c.sample_rows)


def test_timing_gives_seconds_from_the_measured_rates():
    pts = torus(4000, seed=6)
    rep = scan_eps(pts, [0.05, 0.1], max_dim=2, sample=500, timing_seconds=0.5)
    for row in rep.rows:
        edges = max(rep.n_points * row.mean_degree / 2.0, rep.n_points) * (row.task_halo_rows / row.task_rows)
        for run in row.runs:
            assert run.timed_at == row.eps and run.timed_rows > 0
            assert run.seconds_per_unit > 0 and run.seconds_per_edge > 0
            assert run.seconds == run.cost * run.seconds_per_unit + edges * run.seconds_per_edge
    untimed = scan_eps(pts, [0.05], sample=500, timing_seconds=0)
    assert all(r.seconds is None and r.timed_rows == 0 for r in untimed.rows[0].runs)


def test_too_dense_to_time_uses_the_rate_of_a_smaller_eps():
    pts = torus(3000, seed=7)
    # eps 3 exceeds the torus's diameter (2.6): every point is a neighbour of every other
    rep = scan_eps(pts, [0.05, 3.0], sample=300, timing_seconds=0.3)
    timed, dense = rep.rows
    assert dense.mean_degree == 2999 and dense.triangles is None
    for a, b in zip(timed.runs, dense.runs):
        assert a.timed_at == 0.05 and a.timed_rows > 0
        assert (b.timed_at, b.timed_rows, b.seconds_per_unit) == (0.05, 0, a.seconds_per_unit)
    assert "~" in rep.table()


def test_table_and_json(report):
    text = report.table()
    for row in report.rows:
        assert any(line.lstrip().startswith(f"{row.eps:.4g} ") for line in text.splitlines())
    assert "time, max_dim 2" in text and "time, no cap" in text
    back = json.loads(json.dumps(report.as_dict()))
    assert [r["eps"] for r in back["rows"]] == TORUS_EPS
    assert back["eps_for_mean_degree"].keys() == {str(t) for t in DEGREE_TARGETS}


@pytest.mark.parametrize(
    "points, eps, kwargs",
    [
        ("ok", [0.1, 0.0], {}),
        ("ok", [-1.0], {}),
        ("ok", [float("nan")], {}),
        ("ok", [], {}),
        ("nan", [0.1], {}),
        ("ok", [0.1], {"sample": 0}),
        ("ok", [0.1], {"max_dim": -1}),
        ("ok", [0.1], {"threads": 0}),
    ],
)
def test_bad_input_is_one_line(points, eps, kwargs):
    pts = np.random.default_rng(0).random((50, 2))
    if points == "nan":
        pts[7, 1] = np.nan
    with pytest.raises(InputError) as info:
        scan_eps(pts, eps, timing_seconds=0, **kwargs)
    assert "\n" not in str(info.value) and str(info.value)


def test_no_default_range_for_coincident_points():
    with pytest.raises(InputError, match="coincides"):
        scan_eps(np.zeros((10, 2)), timing_seconds=0)


# --------------------------------------------------------------------------- the command


def _untimed(d: dict) -> dict:
    """A scan's JSON without the figures that depend on the kernel's speed."""
    for row in d["rows"]:
        row["runs"] = [{k: v for k, v in run.items() if k in ("max_dim", "cost")} for run in row["runs"]]
    return d


def test_cli_scan(tmp_path):
    pts = torus(3000, seed=8)
    src = tmp_path / "points.npy"
    np.save(src, pts)
    runner = CliRunner()
    res = runner.invoke(main, ["scan", str(src), "--eps", "0.05,0.1", "--max-dim", "2", "--sample", "400",
                               "--seed", "3", "--json"])
    assert res.exit_code == 0, res.output
    expected = scan_eps(pts, [0.05, 0.1], max_dim=2, sample=400, seed=3, timing_seconds=0).as_dict()
    assert _untimed(json.loads(res.output)) == _untimed(expected)

    res = runner.invoke(main, ["scan", str(src), "--eps-range", "0.05:0.2:3", "--sample", "400"])
    assert res.exit_code == 0, res.output
    assert "0.05 " in res.output and "0.1 " in res.output and "0.2 " in res.output
    assert "time, no cap" in res.output

    for bad in (["--eps", "0,0.1"], ["--eps-range", "0.1:0.05:3"], ["--eps-range", "0.1:0.2"],
                ["--eps", "0.1", "--eps-range", "0.1:0.2:2"], ["--sample", "0", "--eps", "0.1"]):
        res = runner.invoke(main, ["scan", str(src), *bad])
        assert res.exit_code == 2, (bad, res.output)
