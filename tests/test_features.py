"""Feature matrices: the batch job kind, `feature_matrix`, `CurveFeatures`, `chitally batch`.

Every row must equal the cloud's exact curve sampled on the grid: checked against our
in-process `euler_curve` and, on small clouds, against gudhi's RipsComplex/SimplexTree
(an independent Rips implementation, tests/references.py). Classifier figures are
cross-validated accuracies on a scenario of our own (chitally.flocks).
"""

from __future__ import annotations

import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from chitally import CurveFeatures, FeatureMatrix, euler_curve, feature_matrix
from chitally.clouds import read_collection
from chitally.jobs.batch import BatchParams, create_or_open
from chitally.runs import Where, open_run, run
from chitally.sources import InputError
from helpers import chitally, commits, command, explain, make_faults, processes, wait_for  # noqa: F401
from references import gudhi_curve

REPO = Path(__file__).resolve().parents[1]


def clouds_of(sizes, dim=3, seed=0):
    rng = np.random.default_rng(seed)
    return [rng.random((int(n), dim)) for n in sizes]


def cli(*args, cwd=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "chitally.cli", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout)


@pytest.mark.parametrize("max_dim", [None, 1, 2, 3])
def test_rows_equal_each_clouds_curve_on_the_grid(max_dim):
    clouds = clouds_of([1, 2, 7, 40, 90, 13], seed=max_dim or 0)
    grid = np.linspace(0.0, 0.45, 19)
    fm = feature_matrix(clouds, 0.45, grid, max_dim=max_dim)
    assert fm.values.dtype == np.int64 and fm.values.shape == (6, 19)
    for row, cloud in zip(fm.values, clouds):
        assert np.array_equal(row, euler_curve(cloud, 0.45, max_dim).sample(grid))


@pytest.mark.parametrize("max_dim", [None, 2])
def test_rows_equal_gudhi_on_small_clouds(max_dim):
    # outside reference: gudhi RipsComplex / SimplexTree, simplex by simplex
    clouds = clouds_of([12, 25, 31], dim=2, seed=3)
    grid = np.linspace(0.0, 0.5, 26)
    fm = feature_matrix(clouds, 0.5, grid, max_dim=max_dim, threads=1)
    for row, cloud in zip(fm.values, clouds):
        assert np.array_equal(row, gudhi_curve(cloud, 0.5, max_dim).sample(grid))


def test_normalised_rows_divide_by_the_cloud_size():
    clouds = clouds_of([10, 30], seed=4)
    grid = [0.0, 0.2, 0.4]
    counts = feature_matrix(clouds, 0.4, grid)
    norm = feature_matrix(clouds, 0.4, grid, normalise=True)
    assert norm.values.dtype == np.float64
    assert np.array_equal(norm.values, counts.values / np.array([[10], [30]]))
    assert norm.values[0, 0] == 1.0  # chi(0) = N without coincident points


def test_engine_matrix_equals_in_process_and_resumes(tmp_path):
    clouds = clouds_of(np.random.default_rng(5).integers(5, 60, 150), seed=5)
    grid = np.linspace(0, 0.3, 7)
    ref = feature_matrix(clouds, 0.3, grid, names=[f"c{i}" for i in range(150)])
    params = BatchParams.checked(0.3, grid)
    store = create_or_open(str(tmp_path / "fm.zarr"), read_collection(clouds, names=ref.names), params)
    assert 1 < store.n_tasks < 150  # clouds are grouped: far fewer tasks than clouds
    report = run(store, Where(serial=True))
    assert report.complete and report.result == ref
    again = run(open_run(str(tmp_path / "fm.zarr")), Where(serial=True))
    assert again.computed == 0 and again.result == ref


def test_labels_travel_with_the_rows_and_exports_round_trip(tmp_path):
    clouds = clouds_of([5, 9, 14], seed=6)
    fm = feature_matrix(clouds, 0.5, [0.0, 0.25, 0.5], names=["a", "b", "c"], labels=["x", "y", "x"])
    assert fm.labels == ("x", "y", "x") and fm.names == ("a", "b", "c")
    fm.save(tmp_path / "m.npz")
    with np.load(tmp_path / "m.npz") as z:
        assert np.array_equal(z["values"], fm.values) and z["names"].tolist() == ["a", "b", "c"]
    fm.save(tmp_path / "m.npy")
    assert np.array_equal(np.load(tmp_path / "m.npy"), fm.values)
    fm.save(tmp_path / "m.csv")
    lines = (tmp_path / "m.csv").read_text().splitlines()
    assert lines[0] == "name,label,chi(0.0),chi(0.25),chi(0.5)"
    assert lines[1].split(",")[:3] == ["a", "x", "5"]
    pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    fm.save(tmp_path / "m.parquet")
    table = pq.read_table(tmp_path / "m.parquet")
    assert table.column("name").to_pylist() == ["a", "b", "c"]
    assert table.column("chi(0.5)").to_pylist() == fm.values[:, 2].tolist()


@pytest.mark.parametrize("clouds, grid, message", [
    ([], [0.0], "no clouds"),
    ([np.zeros((3, 2)), np.array([[0.0, np.nan]])], [0.0], "cloud '1'"),
    ([np.zeros((3, 2)), np.zeros((3, 3))], [0.0], "different dimensions"),
    ([np.zeros((3, 2))], [0.0, 0.7], "outside [0, eps]"),
    ([np.zeros((3, 2))], [0.2, 0.1], "strictly increasing"),
    ([np.zeros((3, 2))], [], "non-empty"),
])
def test_bad_collections_are_refused_in_one_line(clouds, grid, message):
    with pytest.raises(InputError) as err:
        feature_matrix(clouds, 0.5, grid)
    assert message in str(err.value) and "\n" not in str(err.value)


def test_curve_features_in_a_pipeline_and_grid_search():
    from sklearn.base import clone
    from sklearn.model_selection import GridSearchCV
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    from chitally.flocks import flocks

    clouds, labels = flocks(12, seed=1)
    tf = CurveFeatures(eps=1.0, grid="0:1:11")
    assert clone(tf).get_params() == tf.get_params()
    X = tf.fit(clouds).transform(clouds)
    assert X.dtype == np.float64 and X.shape == (36, 11)
    restored = pickle.loads(pickle.dumps(tf))
    assert np.array_equal(restored.transform(clouds), X)
    assert list(tf.get_feature_names_out())[:2] == ["chi(0.0)", "chi(0.1)"]
    pipe = make_pipeline(CurveFeatures(eps=1.0, grid="0:1:11"), StandardScaler(), SVC())
    search = GridSearchCV(pipe, {"curvefeatures__grid": ["0:1:6", "0:1:11"]}, cv=3).fit(clouds, labels)
    assert search.best_params_["curvefeatures__grid"] in ("0:1:6", "0:1:11")
    assert tf.set_output(transform="default") is tf


def test_curve_features_estimator_checks_that_apply():
    # scikit-learn's own checks that do not assume a 2-D numeric X
    from sklearn.utils.estimator_checks import (
        check_get_params_invariance,
        check_no_attributes_set_in_init,
        check_parameters_default_constructible,
        check_set_params,
    )

    for check in (check_get_params_invariance, check_no_attributes_set_in_init,
                  check_parameters_default_constructible, check_set_params):
        check("CurveFeatures", CurveFeatures(eps=0.5, grid="0:0.5:5"))
    with pytest.raises(InputError):
        CurveFeatures(eps=0.5, grid="0:0.9:5").fit([np.zeros((2, 2))])


def test_classifier_separates_three_formations():
    # 5-fold accuracy above 0.9 against chance 1/3: with 120 flocks the standard error of
    # an accuracy at chance is sqrt(1/3 * 2/3 / 120) = 0.043, so 0.9 is 13 of them above it
    sys.path.insert(0, str(REPO / "demo"))
    from classify_flocks import main

    assert main(["--per-kind", "40", "--seed", "0"]) > 0.9


def test_cli_batch_status_export_and_bad_grid(tmp_path):
    folder = tmp_path / "clouds"
    folder.mkdir()
    clouds = clouds_of([8, 20, 33, 5], dim=2, seed=9)
    for i, c in enumerate(clouds):
        np.save(folder / f"c{i}.npy", c)
    (tmp_path / "labels.csv").write_text("name,label\nc0,a\nc1,b\nc2,a\nc3,b\n")
    run_store = tmp_path / "run.zarr"
    res = cli("batch", folder, "--eps", 0.4, "--grid", "0:0.4:5", "--labels", tmp_path / "labels.csv",
              "--out", run_store, "--serial", "--no-progress")
    assert res.returncode == 0, res.stderr
    res = cli("export", run_store, "--out", tmp_path / "m.csv")
    assert res.returncode == 0, res.stderr
    rows = (tmp_path / "m.csv").read_text().splitlines()
    grid = np.linspace(0, 0.4, 5)
    assert rows[1].split(",")[:2] == ["c0", "a"]
    assert [int(x) for x in rows[1].split(",")[2:]] == euler_curve(clouds[0], 0.4).sample(grid).tolist()
    res = cli("status", run_store)
    assert res.returncode == 0 and "(batch)" in res.stdout and "complete: True" in res.stdout
    for bad in (["--grid", "0:0.5:5"], ["--grid", "0:0.4:0"]):
        res = cli("batch", folder, "--eps", 0.4, *bad, "--out", tmp_path / "other.zarr", "--serial")
        assert res.returncode == 2 and res.stderr.count("\n") == 1, res.stderr
        assert not (tmp_path / "other.zarr").exists()
    (folder / "bad.csv").write_text("x,y\n0,nan\n")
    res = cli("batch", folder, "--eps", 0.4, "--grid", "0:0.4:5", "--out", tmp_path / "other.zarr", "--serial")
    assert res.returncode == 2 and "bad" in res.stderr and not (tmp_path / "other.zarr").exists()


def test_killed_batch_driver_resumes_without_recomputing_a_group(tmp_path, processes):
    """SIGKILL `chitally batch` (a real process) once about a third of the groups are
    committed: `resume` computes only the groups without a commit record (attempts are
    counted by the test-side fault wrapper) and the matrix is the in-process one."""
    folder = tmp_path / "clouds"
    folder.mkdir()
    clouds = clouds_of(np.random.default_rng(11).integers(10, 50, 120), dim=2, seed=11)
    for i, c in enumerate(clouds):
        np.save(folder / f"c{i:03d}.npy", c)
    run_store = tmp_path / "run.zarr"
    faults = make_faults(tmp_path, delay=0.1)
    args = ["batch", folder, "--eps", 0.3, "--grid", "0:0.3:7", "--task-cost", 2000, "--out", run_store,
            "--serial", "--no-progress"]
    driver = processes.start(command(*args, faults=faults), name="batch")
    n = None

    def third_committed() -> bool:
        nonlocal n
        if not (run_store / "created.json").exists():
            return False
        n = open_run(str(run_store)).n_tasks
        return len(commits(run_store)) >= n / 3

    wait_for(third_committed, 120, "a third of the groups committed")
    processes.kill(driver)
    before = commits(run_store)
    assert n / 3 <= len(before) < n and n >= 6
    res = chitally("resume", run_store, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    attempts = faults.attempts()
    assert set(attempts) == set(range(n))
    assert all(attempts[t] == 1 for t in before)  # no committed group computed again
    assert len([t for t in attempts if attempts[t] > 1]) <= 1  # the group under way at the kill
    ref = feature_matrix(clouds, 0.3, np.linspace(0, 0.3, 7), names=[f"c{i:03d}" for i in range(120)])
    from chitally.runs import read_result

    assert np.array_equal(read_result(open_run(str(run_store))).values, ref.values)


def test_a_damaged_group_output_is_set_aside_and_computed_again(tmp_path):
    """Flip a byte of one group's stored rows after a complete run, and drop the result:
    the resume finds the digest wrong, sets the group aside to quarantine, recomputes it
    and ends with the in-process matrix."""
    from engine_fixtures import flip_byte

    from chitally.runs import execute
    from chitally.execute import SerialExecutor

    clouds = clouds_of(np.random.default_rng(12).integers(5, 40, 40), seed=12)
    grid = np.linspace(0, 0.3, 5)
    ref = feature_matrix(clouds, 0.3, grid)
    store = create_or_open(str(tmp_path / "fm.zarr"), read_collection(clouds), BatchParams.checked(0.3, grid))
    assert run(store, Where(serial=True)).result == ref
    victim = 1
    chunk = next((tmp_path / "fm.zarr" / "outputs" / f"task-{victim:06d}" / "rows" / "c").rglob("*"))
    while chunk.is_dir():
        chunk = next(chunk.iterdir())
    flip_byte(chunk)
    (tmp_path / "fm.zarr" / "result" / "record.json").unlink()
    again = open_run(str(tmp_path / "fm.zarr"))
    # a new reducer starts from the last checkpoint; drop them so every group is read again
    import shutil

    shutil.rmtree(tmp_path / "fm.zarr" / "checkpoints")
    (tmp_path / "fm.zarr" / "checkpoints").mkdir()
    report = execute(again, SerialExecutor())
    assert victim in report.set_aside and report.computed == 1
    assert report.result == ref
    assert any((tmp_path / "fm.zarr" / "quarantine").iterdir())
