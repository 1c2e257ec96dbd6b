"""`chitally run` on a real Dask cluster: a ``dask scheduler`` and two ``dask worker``
processes on 127.0.0.1, reached through ``--scheduler``, ``--scheduler-file`` or the
``DASK_SCHEDULER_ADDRESS`` environment variable. Every run must give exactly the curve of
`chitally.euler_curve` on the same points and of outside references (networkx brute
force, gudhi), and its tasks must have run on the cluster's workers, not in the driver:
every attempt is logged with its pid by `faultwrap` (here without faults), which the
driver hands to the workers with each task.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from helpers import (
    Faults,
    Processes,
    chitally,
    cloud,
    explain,
    make_faults,
    start_cluster,
    write_points,
)
from references import brute_force_curve, gudhi_curve

import chitally as ct
from chitally.runs import open_run, read_result

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(180)]

EPS = 0.03
COST = 4000  # about 37 tasks for 2,500 points


@pytest.fixture(scope="module")
def points() -> np.ndarray:
    return cloud(2500, seed=11)


@pytest.fixture(scope="module")
def expected(points: np.ndarray) -> dict[int | None, ct.Curve]:
    """The curve by `euler_curve`, checked once against two outside references:
    networkx ``enumerate_all_cliques`` (brute force, references.brute_force_curve) and
    gudhi's Rips filtration (references.gudhi_curve)."""
    out = {}
    for max_dim in (None, 2):
        ours = ct.euler_curve(points, EPS, max_dim)
        assert ours == brute_force_curve(points, EPS, max_dim)  # networkx, brute force
        assert ours == gudhi_curve(points, EPS, max_dim)  # gudhi RipsComplex
        out[max_dim] = ours
    return out


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory):
    """One cluster for the module: a scheduler and two single-threaded workers."""
    folder = tmp_path_factory.mktemp("cluster")
    procs = Processes(folder)
    try:
        yield start_cluster(procs, folder, 2)
    finally:
        procs.close()


@pytest.fixture
def faults(tmp_path) -> Faults:
    """An attempt log of this test's runs (no faults)."""
    return make_faults(tmp_path)


def worker_pids(address: str) -> set[int]:
    from distributed import Client

    with Client(address, timeout="10s") as client:
        return set(client.run(os.getpid).values())


def check_run(run: Path, expected: ct.Curve, faults: Faults, workers: set[int]) -> None:
    store = open_run(str(run))
    assert read_result(store) == expected
    attempts = faults.attempts()
    # every task ran exactly once, and on the cluster's workers (both of them took part)
    assert attempts == {t: 1 for t in range(store.n_tasks)}
    pids = {pid for t in range(store.n_tasks) for pid in faults.pids(t)}
    assert pids == workers


def test_run_with_scheduler_address(tmp_path, points, expected, cluster, faults):
    src = write_points(tmp_path / "points.npy", points)
    run = tmp_path / "run.zarr"
    res = chitally("run", src, "--eps", EPS, "--task-cost", COST, "--out", run,
                   "--scheduler", cluster.address, "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    check_run(run, expected[None], faults, worker_pids(cluster.address))
    n = open_run(str(run)).n_tasks
    assert f"{n}/{n} tasks done, {n} computed now, 0 failed" in res.stderr
    # the test scheduler runs with --no-dashboard: no made-up link is printed
    assert "dashboard" not in res.stderr


def test_run_with_scheduler_file(tmp_path, points, expected, cluster, faults):
    src = write_points(tmp_path / "points.npy", points)
    run = tmp_path / "run.zarr"
    res = chitally("run", src, "--eps", EPS, "--max-dim", 2, "--task-cost", COST, "--out", run,
                   "--scheduler-file", cluster.scheduler_file, "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    check_run(run, expected[2], faults, worker_pids(cluster.address))


def test_run_with_scheduler_from_environment_and_relative_paths(tmp_path, points, expected, cluster, faults):
    """DASK_SCHEDULER_ADDRESS names the cluster. The workers run in another directory than
    the driver, so the relative --out must reach them as the same store (the command makes
    it absolute before handing it out)."""
    write_points(tmp_path / "points.npy", points)
    res = chitally("run", "points.npy", "--eps", EPS, "--task-cost", COST, "--out", "run.zarr",
                   "--no-progress", env={"DASK_SCHEDULER_ADDRESS": cluster.address}, cwd=tmp_path,
                   faults=faults)
    assert res.returncode == 0, explain(res)
    check_run(tmp_path / "run.zarr", expected[None], faults, worker_pids(cluster.address))


def test_store_recreated_at_same_path(tmp_path, points, expected, cluster, faults):
    """A long-lived cluster must not reuse what it knew of a deleted run store (its
    workers keep each store they opened): a new run at the same path, with other points
    and another eps, gives the new curve, computed on the same workers."""
    src = write_points(tmp_path / "points.npy", points)
    run = tmp_path / "run.zarr"
    res = chitally("run", src, "--eps", EPS, "--task-cost", COST, "--out", run,
                   "--scheduler", cluster.address, "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    check_run(run, expected[None], faults, worker_pids(cluster.address))

    shutil.rmtree(run)
    faults.clear_log()
    other = cloud(1500, seed=12)
    eps2 = 0.045
    write_points(tmp_path / "other.npy", other)
    res = chitally("run", tmp_path / "other.npy", "--eps", eps2, "--task-cost", COST, "--out", run,
                   "--scheduler", cluster.address, "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    want = ct.euler_curve(other, eps2)
    assert want == gudhi_curve(other, eps2, None)  # gudhi RipsComplex
    check_run(run, want, faults, worker_pids(cluster.address))


def test_local_cluster_reports_a_dashboard_that_answers():
    """The embedded LocalCluster serves the Dask dashboard (bokeh is a dependency), and
    the link `connect` reports opens; a scheduler without one reports None (see
    test_run_with_scheduler_address)."""
    from urllib.request import urlopen

    from chitally.cluster import connect

    conn = connect(workers=1, threads=1, dashboard_address="127.0.0.1:0")
    try:
        assert conn.dashboard and conn.dashboard.startswith("http://127.0.0.1:")
        with urlopen(conn.dashboard, timeout=10) as page:
            assert page.status == 200
    finally:
        conn.close()
