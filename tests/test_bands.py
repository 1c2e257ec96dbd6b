"""Confidence bands (chitally.bands) and the `bands` job kind (chitally.jobs.bands).

The statistics are checked against their definitions and closed forms (the half-normal
quantile for a one-scale multiplier bootstrap, the normal quantile from the standard
library); each replicate curve against an outside reference (networkx brute force); the
bands against identical results from every executor and task grouping; and the coverage
of the mean curve against the closed form E chi_m(r) = 1 + (m - 1)(1 - r)^m for uniform
points on [0, 1] (uniform spacings are Beta(1, m); a Rips complex on a line has
contractible components, so chi counts components).
"""

from __future__ import annotations

import math
import subprocess
import sys
from statistics import NormalDist

import numpy as np
import pytest
from click.testing import CliRunner
from references import brute_force_curve

from chitally import euler_curve
from chitally.bands import (
    REPLACE_WARNING,
    Bands,
    band_statistics,
    bands,
    default_grid,
    is_bands_file,
    statistics_generator,
)
from chitally.cli import main
from chitally.curve import parse_grid
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs.bands import (
    BandsParams,
    create_or_open,
    draw_rows,
    read_replicates,
    replicate_rows,
)
from chitally.reduce import Reducer
from chitally.runs import Where, open_run, read_result, run
from chitally.validate import InputError

pytestmark = pytest.mark.timeout(300)


def cloud(n: int, seed: int = 0, dim: int = 2) -> np.ndarray:
    return np.random.default_rng(seed).random((n, dim))


def expected_components(grid: np.ndarray, m: int) -> np.ndarray:
    """E chi of the Rips complex of m i.i.d. uniform points on [0, 1] at scale r.

    Components are runs of points whose consecutive gaps are <= r; each is an interval
    graph's clique complex, contractible, so chi = 1 + #(interior gaps > r). The m - 1
    interior spacings of m uniform points are each Beta(1, m): P(gap > r) = (1 - r)^m
    (order statistics of the uniform distribution, e.g. David & Nagaraja, Order
    Statistics, section 6.4).
    """
    return 1.0 + (m - 1) * (1.0 - grid) ** m


# ---------------------------------------------------------------------- statistics alone


def test_mean_sd_and_normal_band_follow_their_definitions():
    rows = np.random.default_rng(3).integers(-5, 40, size=(37, 9))
    grid = np.linspace(0.0, 1.0, 9)
    b = band_statistics(rows, grid, level=0.9, seed=4, draws=500, sample_size=12, eps=1.0, n_points=99)
    assert np.array_equal(b.mean, rows.mean(axis=0))
    assert np.allclose(b.sd, rows.std(axis=0, ddof=1), rtol=1e-14, atol=0)
    # z_(0.95) = 1.6448536... (standard normal quantile, Python's statistics.NormalDist)
    half = NormalDist().inv_cdf(0.95) * b.sd / math.sqrt(37)
    assert np.allclose(b.upper_normal - b.mean, half, rtol=1e-12)
    assert np.allclose(b.mean - b.lower_normal, half, rtol=1e-12)
    assert (b.replicates, b.sample_size, b.n_points, b.level, b.draws) == (37, 12, 99, 0.9, 500)


def test_simultaneous_band_is_mean_plus_minus_the_sup_quantile_over_root_b():
    rows = np.random.default_rng(5).integers(0, 30, size=(25, 14))
    grid = np.arange(14) / 13
    b = band_statistics(rows, grid, level=0.95, seed=8, draws=700, sample_size=5, eps=1.0, n_points=50)
    # The definition, written out: Z is the (1 - alpha) empirical quantile over draws of
    # sup_t |B^(-1/2) sum_i xi_i (Y_i(t) - Ybar(t))|, xi_i ~ N(0, 1), from the seeded stream.
    xi = statistics_generator(8, 1).standard_normal((700, 25))
    centred = rows - rows.mean(axis=0)
    sups = np.abs(xi @ centred).max(axis=1) / math.sqrt(25)
    z = np.sort(sups)[math.ceil(0.95 * 700) - 1]
    assert b.sup_quantile == pytest.approx(z, rel=1e-12)
    assert np.allclose(b.upper_simultaneous - b.mean, z / 5.0, rtol=1e-12)
    assert np.allclose(b.mean - b.lower_simultaneous, z / 5.0, rtol=1e-12)


def test_one_scale_multiplier_quantile_is_the_half_normal_quantile():
    """At a single scale, B^(-1/2) sum_i xi_i D_i ~ N(0, mean(D^2)) given the D_i, so Z is
    the 0.95 quantile of |N(0, s^2)|: 1.959964 s (the half-normal quantile is the normal
    0.975 quantile; Python's statistics.NormalDist)."""
    rows = np.random.default_rng(0).integers(0, 100, size=(50, 1))
    b = band_statistics(rows, [0.5], level=0.95, seed=1, draws=40000, sample_size=3, eps=1.0, n_points=9)
    s = math.sqrt(((rows - rows.mean()) ** 2).mean())
    # 40,000 draws: the empirical quantile's relative error is about 1% at 3 standard errors
    assert b.sup_quantile == pytest.approx(NormalDist().inv_cdf(0.975) * s, rel=0.015)


def test_percentile_band_approaches_the_normal_band_for_many_replicates():
    """For the mean of B i.i.d. rows the bootstrap distribution is nearly normal (CLT):
    the percentile band's half-width approaches z * s / sqrt(B)."""
    rows = np.random.default_rng(2).poisson(30.0, size=(400, 3))
    b = band_statistics(rows, [0.0, 0.5, 1.0], seed=3, draws=6000, sample_size=4, eps=1.0, n_points=9)
    width_p = b.upper_percentile - b.lower_percentile
    width_n = b.upper_normal - b.lower_normal
    assert np.allclose(width_p, width_n, rtol=0.08)
    assert np.all(b.lower_percentile <= b.mean) and np.all(b.mean <= b.upper_percentile)


def test_bad_statistics_input_is_refused():
    with pytest.raises(ValueError, match="B >= 2"):
        band_statistics(np.zeros((1, 3), np.int64), [0, 1, 2], sample_size=1, eps=2.0, n_points=1)
    with pytest.raises(ValueError, match="level"):
        band_statistics(np.zeros((3, 2), np.int64), [0, 1], level=1.0, sample_size=1, eps=2.0, n_points=1)
    with pytest.raises(ValueError, match="grid"):
        band_statistics(np.zeros((3, 2), np.int64), [0, 1, 2], sample_size=1, eps=2.0, n_points=1)


@pytest.mark.parametrize("fmt", ["csv", "npz", "json"])
def test_bands_files_round_trip_to_the_bit(tmp_path, fmt):
    rows = np.random.default_rng(7).integers(0, 9, size=(6, 5))
    b = band_statistics(rows, np.linspace(0, 0.3, 5), level=0.8, seed=2, draws=64, sample_size=10,
                        eps=0.3, max_dim=2, n_points=40, replace=True)
    path = b.save(tmp_path / f"b.{fmt}")
    assert is_bands_file(path)
    back = Bands.load(path)
    assert back == b and back.max_dim == 2 and back.replace is True
    assert not is_bands_file(euler_curve(cloud(5), 0.2).save(tmp_path / f"c.{fmt}"))
    with pytest.raises(ValueError, match="chitally-bands"):
        Bands.load(tmp_path / f"c.{fmt}")


# ------------------------------------------------------------------------- replicates


def test_each_replicate_is_its_subsample_curve_and_depends_on_seed_and_index_only():
    points = cloud(300, seed=1)
    params = BandsParams.checked(0.2, 12, 25, "0:0.2:9", seed=11)
    rows = replicate_rows(points, range(12), params, threads=2)
    grid = np.asarray(params.grid)
    for i in (0, 5, 11):
        sub = points[draw_rows(300, 25, 11, i)]
        assert np.unique(draw_rows(300, 25, 11, i)).size == 25  # without replacement
        # outside reference: every clique listed by networkx (brute force)
        assert np.array_equal(rows[i], brute_force_curve(sub, 0.2, None).sample(grid))
        assert np.array_equal(replicate_rows(points, [i], params, threads=1)[0], rows[i])
    other = replicate_rows(points, range(12), BandsParams.checked(0.2, 12, 25, "0:0.2:9", seed=12))
    assert not np.array_equal(other, rows)


def test_a_resample_with_repeats_has_the_curve_of_its_distinct_points():
    """A repeated row is a dominated vertex (same closed neighbourhood as its twin at every
    scale), so the complex collapses onto the distinct points: same Euler characteristic."""
    points = cloud(40, seed=2)
    for i in range(5):
        rows = draw_rows(40, 40, 3, i, replace=True)
        assert np.unique(rows).size < 40
        with_repeats = euler_curve(points[rows], 0.3)
        distinct = euler_curve(points[np.unique(rows)], 0.3)
        grid = np.linspace(0, 0.3, 31)
        assert np.array_equal(with_repeats.sample(grid[1:]), distinct.sample(grid[1:]))


def test_parameters_are_checked_in_one_line():
    pts = cloud(50)
    with pytest.raises(InputError, match="sample_size 60 exceeds the 50 points"):
        bands(pts, 0.1, 5, 60)
    with pytest.raises(InputError, match="replicates must be an integer >= 2"):
        bands(pts, 0.1, 1, 10)
    with pytest.raises(InputError, match="level must be a number strictly between 0 and 1"):
        bands(pts, 0.1, 5, 10, level=1.2)
    with pytest.raises(InputError, match="grid must lie within"):
        bands(pts, 0.1, 5, 10, grid="0:0.2:3")
    with pytest.raises(InputError, match="seed must be an integer >= 0"):
        bands(pts, 0.1, 5, 10, seed=-1)
    with pytest.warns(UserWarning, match="sampling with replacement"):
        b = bands(pts, 0.1, 5, 60, replace=True, grid="0:0.1:3", draws=50)
    assert b.replace and b.sample_size == 60
    assert np.array_equal(default_grid(0.1), parse_grid("0:0.1:101"))


# ------------------------------------------------------------------ on the engine


@pytest.fixture(scope="module")
def band_cloud() -> np.ndarray:
    return cloud(2000, seed=5)


@pytest.fixture(scope="module")
def in_process(band_cloud) -> Bands:
    return bands(band_cloud, 0.12, 14, 120, grid="0:0.12:13", seed=9, draws=300, threads=2)


@pytest.mark.parametrize("per_task", [1, 3, None])
def test_serial_engine_gives_identical_bands_whatever_the_grouping(tmp_path, band_cloud, in_process, per_task):
    got = bands(band_cloud, 0.12, 14, 120, grid="0:0.12:13", seed=9, draws=300, per_task=per_task,
                store=str(tmp_path / "b.zarr"), where=Where(serial=True))
    assert got == in_process
    store = open_run(str(tmp_path / "b.zarr"))
    assert store.kind == "bands" and store.n_tasks == (14 if per_task == 1 else 5 if per_task == 3 else 14)
    assert read_result(store) == in_process
    assert np.array_equal(read_replicates(store).mean(axis=0), in_process.mean)


@pytest.mark.cluster
def test_two_process_cluster_gives_identical_bands(tmp_path, band_cloud, in_process):
    got = bands(band_cloud, 0.12, 14, 120, grid="0:0.12:13", seed=9, draws=300, per_task=4,
                store=str(tmp_path / "b.zarr"), where=Where(workers=2, threads=1))
    assert got == in_process


def test_partial_commits_checkpoints_and_resume_give_identical_bands(tmp_path, band_cloud, in_process):
    params = BandsParams.checked(0.12, 14, 120, "0:0.12:13", seed=9, per_task=2, draws=300)
    store = create_or_open(str(tmp_path / "b.zarr"), band_cloud, params)
    # some tasks committed by an earlier, interrupted run
    outcome = SerialExecutor(threads=1, retries=0).run(store, [0, 3, 6], Callbacks())
    assert sorted(outcome.done) == [0, 3, 6]
    # the fold restores from a checkpoint: rows in place, the rest still zero
    lease = store.acquire_lease("test")
    with lease:
        reducer = Reducer(store, every_tasks=1)
        for t in (0, 3):
            reducer.add(t)
    restored = Reducer(store)
    assert restored.is_covered(0) and restored.is_covered(3) and not restored.is_covered(6)
    rows = restored.fold.state()["rows"]
    expected = replicate_rows(band_cloud, range(14), params)
    assert np.array_equal(rows[[0, 1, 6, 7]], expected[[0, 1, 6, 7]])
    assert not rows[[2, 3, 12, 13]].any()
    report = run(store, Where(serial=True))
    assert report.complete and report.computed == 7 - 3 and report.result == in_process


def test_cli_bands_export_status_and_one_line_errors(tmp_path, band_cloud, in_process):
    np.save(tmp_path / "cloud.npy", band_cloud)
    runner = CliRunner()
    store = tmp_path / "run.zarr"
    res = runner.invoke(main, ["bands", str(tmp_path / "cloud.npy"), "--eps", "0.12", "--replicates", "14",
                               "--sample-size", "120", "--grid", "0:0.12:13", "--seed", "9", "--draws", "300",
                               "--out", str(store), "--serial", "--no-progress"])
    assert res.exit_code == 0, res.output
    assert "bands: mean curve of 120 points from 14 replicates on 13 scales" in res.output
    for fmt in ("csv", "npz"):
        res = runner.invoke(main, ["export", str(store), "--out", str(tmp_path / f"b.{fmt}")])
        assert res.exit_code == 0, res.output
        assert Bands.load(tmp_path / f"b.{fmt}") == in_process
    res = runner.invoke(main, ["status", str(store)])
    assert res.exit_code == 0 and "(bands)" in res.output and "complete: True" in res.output
    for bad, message in ((["--sample-size", "5000"], "--sample-size 5000 exceeds the 2000 points"),
                         (["--sample-size", "10", "--level", "2"], "--level must be a number strictly"),
                         (["--sample-size", "10", "--grid", "0:1:3"], "--grid must lie within")):
        res = subprocess.run([sys.executable, "-m", "chitally.cli", "bands", str(tmp_path / "cloud.npy"),
                              "--eps", "0.12", "--replicates", "4", *bad, "--out", str(tmp_path / "x.zarr"),
                              "--serial"], capture_output=True, text=True, timeout=120, check=False)
        assert res.returncode == 2 and res.stderr.count("\n") == 1 and message in res.stderr, res.stderr
        assert not (tmp_path / "x.zarr").exists()
    res = runner.invoke(main, ["bands", str(tmp_path / "cloud.npy"), "--eps", "0.12", "--replicates", "3",
                               "--sample-size", "50", "--replace", "--grid", "0:0.12:4", "--draws", "20",
                               "--out", str(tmp_path / "r.zarr"), "--serial", "--no-progress"])
    assert res.exit_code == 0 and REPLACE_WARNING in res.output


# -------------------------------------------------------------------------- coverage


def _coverage(trials: int, replicates: int, m: int, n: int, draws: int) -> tuple[float, float, float]:
    grid = np.linspace(0.0, 0.25, 26)
    mu = expected_components(grid, m)
    hits = np.zeros(3)
    for k in range(trials):
        points = np.random.default_rng(1000 + k).random((n, 1))
        b = bands(points, 0.25, replicates, m, grid=grid, seed=k, draws=draws, threads=1)
        hits += (b.covers(mu).all(), b.covers(mu, "normal")[5], b.covers(mu, "percentile")[5])
    return tuple(hits / trials)


def test_bands_cover_the_known_mean_curve_at_the_stated_rate():
    """200 seeded trials: each draws n = 100,000 uniform points on [0, 1] and bands the mean
    curve of size m = 20 from B = 100 subsamples; the simultaneous band must hold the
    closed-form mean curve on the whole grid, the pointwise bands at r = 0.05, in a share
    of trials within 0.06 of 95%.

    The subsamples come from one finite sample, so strictly the bands' target is the mean
    over that sample's subsets; with m * B = 2,000 much smaller than n = 100,000 it differs
    from the population's mean at size m by far less than the band's half-width.

    Tolerance: 3 binomial standard errors of a share over 200 trials (0.046) plus 0.015
    for the multiplier bootstrap's own error at B = 100 (1,000-trial runs gave 0.93 to
    0.96).
    """
    simultaneous, normal, percentile = _coverage(trials=200, replicates=100, m=20, n=100_000, draws=400)
    for share in (simultaneous, normal, percentile):
        assert abs(share - 0.95) <= 0.06, (simultaneous, normal, percentile)


@pytest.mark.slow
def test_bands_cover_the_known_mean_curve_at_the_stated_rate_many_trials():
    """As above with 1,000 trials and B = 200: 3 standard errors are 0.021, plus 0.015."""
    simultaneous, normal, percentile = _coverage(trials=1000, replicates=200, m=20, n=200_000, draws=1000)
    for share in (simultaneous, normal, percentile):
        assert abs(share - 0.95) <= 0.036, (simultaneous, normal, percentile)
