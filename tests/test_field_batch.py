"""Feature matrices of fields (arrays: images, volumes) through the batch kind.

Every row must equal the field's exact curve on the grid: `field_curve(field).at(t)`
inside the field's domain, 0 below it (the empty complex) and the whole complex's value
above it. Outside checks, named at each: scikit-image's Euler number (Ohser, Nagel,
Schladitz 2002) on binary items, and gudhi's CubicalComplex (tests/cubical_references.py).
The classifier check uses random fields of our own (smoothed Gaussian noise).
"""

from __future__ import annotations

import numpy as np
import pytest
from cubical_references import gudhi_chi

from chitally import CurveFeatures, feature_matrix, field_curve
from chitally.execute import Callbacks, SerialExecutor
from chitally.field_sources import FieldCollection, read_fields
from chitally.jobs.batch import FieldBatchParams, create_or_open_fields, field_rows
from chitally.runs import Where, execute, open_run, read_result
from chitally.store import StoreMismatch
from chitally.validate import InputError

CONSTRUCTIONS = ("vertices", "cells")
# in-process clusters talk inproc://; the scheduler's HTTP routes go to a free port on 127.0.0.1
QUIET_HTTP = {"dashboard_address": "127.0.0.1:0"}
# scikit-image's connectivity matching each construction (as in tests/test_cubical.py):
# vertices = low connectivity (4 in 2-D, 6 in 3-D: connectivity 1), cells = high
# (8 / 26: connectivity ndim)
CONNECTIVITY = {"vertices": lambda nd: 1, "cells": lambda nd: nd}


def on_grid(curve, grid) -> np.ndarray:
    """A curve read as a feature-matrix row: 0 below its domain, its final value above."""
    grid = np.asarray(grid, np.float64)
    out = np.zeros(grid.size, dtype=np.int64)
    inside = (grid >= curve.start) & (grid <= curve.eps)
    out[inside] = curve.at(grid[inside])
    out[grid > curve.eps] = curve.final
    return out


def tied_fields(seed: int, shapes, kind: str) -> list[np.ndarray]:
    """Random items with many ties: small integers, or quarter steps as floats."""
    rng = np.random.default_rng(seed)
    out = []
    for shape in shapes:
        levels = rng.integers(0, 6, size=shape)
        out.append(levels.astype(np.int16) if kind == "int" else (levels * 0.25 - 0.5).astype(np.float64))
    return out


SHAPES_2D = [(7, 9), (1, 5), (12, 3), (6, 6), (2, 2)]
SHAPES_3D = [(4, 5, 3), (2, 7, 2), (5, 5, 5)]
SHAPES_MIXED = [(17,), (6, 5), (3, 4, 2), (2, 3, 2, 3)]


def grid_for(kind: str, superlevel: bool) -> np.ndarray:
    # steps of 0.25 hit every tied value of both kinds, and run past both ends
    g = np.arange(-2.0, 6.5, 0.25) if kind == "int" else np.arange(-1.5, 1.5, 0.125)
    return np.sort(-g) if superlevel else g


@pytest.mark.parametrize("construction", CONSTRUCTIONS)
@pytest.mark.parametrize("superlevel", [False, True])
@pytest.mark.parametrize("kind", ["int", "float"])
@pytest.mark.parametrize("shapes", [SHAPES_2D, SHAPES_3D, SHAPES_MIXED], ids=["2d", "3d", "1d-4d"])
def test_rows_equal_each_fields_curve_on_the_grid(construction, superlevel, kind, shapes):
    fields = tied_fields(len(shapes) + 7 * superlevel, shapes, kind)
    grid = grid_for(kind, superlevel)
    fm = feature_matrix(fields, grid=grid, construction=construction, superlevel=superlevel)
    assert fm.values.dtype == np.int64 and fm.values.shape == (len(fields), grid.size)
    assert fm.sizes.tolist() == [a.size for a in fields] and fm.eps is None
    for row, a in zip(fm.values, fields):
        assert np.array_equal(row, on_grid(field_curve(a, construction, superlevel=superlevel), grid))
    assert np.array_equal(field_rows(fields, construction, superlevel, False, grid), fm.values)


@pytest.mark.parametrize("construction", CONSTRUCTIONS)
def test_the_engine_gives_the_in_process_matrix_for_mixed_shapes_and_dtypes(tmp_path, construction):
    rng = np.random.default_rng(3)
    fields = [rng.integers(0, 4, (9, 11)).astype(np.uint8), (rng.integers(0, 4, (5, 4, 3)) * 0.5).astype(np.float32),
              rng.integers(-3, 3, 23).astype(np.int64), rng.integers(0, 4, (3, 2, 2, 4)).astype(np.int32),
              rng.random((6, 6)) < 0.5]
    grid = np.arange(-3.0, 4.5, 0.5)
    ref = feature_matrix(fields, grid=grid, construction=construction, names=list("abcde"), labels=[0, 1, 0, 1, 0])
    for row, a in zip(ref.values, fields):
        assert np.array_equal(row, on_grid(field_curve(a, construction), grid))
    params = FieldBatchParams.checked(grid, construction, task_cost=200.0)
    store = create_or_open_fields(str(tmp_path / "fm.zarr"), read_fields(fields, names=list("abcde"))
                                  .with_labels([0, 1, 0, 1, 0]), params)
    assert store.n_tasks >= 3
    report = execute(store, SerialExecutor())
    assert report.complete and report.result == ref
    assert read_result(open_run(str(tmp_path / "fm.zarr"))) == ref
    assert execute(create_or_open_fields(str(tmp_path / "fm.zarr"), read_fields(fields, names=list("abcde"))
                                         .with_labels([0, 1, 0, 1, 0]), params), SerialExecutor()).computed == 0
    again = feature_matrix(fields, grid=grid, construction=construction, names=list("abcde"),
                           labels=[0, 1, 0, 1, 0], store=str(tmp_path / "fm2.zarr"), where=Where(serial=True))
    assert again == ref
    with pytest.raises(StoreMismatch, match="construction"):
        feature_matrix(fields, grid=grid, construction="cells" if construction == "vertices" else "vertices",
                       names=list("abcde"), store=str(tmp_path / "fm2.zarr"), where=Where(serial=True))
    fields[0][0, 0] += 1  # another input
    with pytest.raises(StoreMismatch, match="sha256"):
        feature_matrix(fields, grid=grid, construction=construction, names=list("abcde"),
                       store=str(tmp_path / "fm2.zarr"), where=Where(serial=True))


@pytest.mark.parametrize("construction", CONSTRUCTIONS)
@pytest.mark.parametrize("shapes", [[(7, 9), (12, 5), (3, 3), (1, 8)], [(5, 6, 4), (3, 3, 3), (2, 6, 5)]],
                         ids=["2d", "3d"])
def test_binary_items_match_scikit_image_euler_number(construction, shapes):
    skimage_measure = pytest.importorskip("skimage.measure")
    rng = np.random.default_rng(21 + len(shapes[0]))
    images = [rng.random(shape) < rng.uniform(0.2, 0.8) for shape in shapes for _ in range(12)]
    # the object (True) enters at scale 0, the background at 1
    fm = feature_matrix([np.where(im, 0, 1).astype(np.int8) for im in images], grid=[0.0, 1.0],
                        construction=construction)
    for row, im in zip(fm.values, images):
        # source: skimage.measure.euler_number (Ohser, Nagel, Schladitz 2002, as implemented
        # in scikit-image), with the connectivity of the construction
        expected = skimage_measure.euler_number(im, connectivity=CONNECTIVITY[construction](im.ndim))
        assert row[0] == (expected if im.any() else 0)


@pytest.mark.parametrize("construction", CONSTRUCTIONS)
@pytest.mark.parametrize("superlevel", [False, True])
def test_engine_rows_match_gudhi_cubical_complexes(tmp_path, construction, superlevel):
    fields = tied_fields(5, [(6, 7), (4, 4, 3), (9, 2), (3, 5, 2)], "float")
    grid = grid_for("float", superlevel)
    params = FieldBatchParams.checked(grid, construction, superlevel, task_cost=150.0)
    store = create_or_open_fields(str(tmp_path / "fm.zarr"), read_fields(fields), params)
    fm = execute(store, SerialExecutor()).result
    for row, a in zip(fm.values, fields):
        # source: gudhi CubicalComplex persistence (vertices= / top_dimensional_cells=),
        # chi(t) = sum_d (-1)^d #intervals alive at t; superlevel as the sublevel sets of -f
        assert np.array_equal(row, gudhi_chi(-a if superlevel else a, construction, grid))


def test_nan_entries_are_refused_or_missing():
    fields = tied_fields(8, [(5, 5), (4, 6)], "float")
    fields[1][2, 3] = np.nan
    with pytest.raises(InputError, match=r"field '1' holds NaN at position \(2, 3\)") as err:
        feature_matrix(fields, grid=[0.0, 0.5], fields=True)
    assert "\n" not in str(err.value)
    grid = np.arange(-1.0, 1.5, 0.25)
    fm = feature_matrix(fields, grid=grid, mask_nan=True, normalise=True)
    assert fm.sizes.tolist() == [25, 23] and fm.values.dtype == np.float64
    for row, a, n in zip(fm.values, fields, fm.sizes):
        assert np.array_equal(row, on_grid(field_curve(a, mask_nan=True), grid) / n)
    empty = np.full((2, 2), np.nan)
    assert feature_matrix([empty], grid=[0.0], mask_nan=True).values.tolist() == [[0]]
    with pytest.raises(InputError, match="no present entry"):
        feature_matrix([empty], grid=[0.0], mask_nan=True, normalise=True)


def test_serial_and_an_in_process_dask_cluster_give_identical_matrices(tmp_path):
    from distributed import Client, LocalCluster

    from chitally.execute import DaskExecutor

    fields = tied_fields(9, [(8, 8)] * 6 + [(4, 5, 3)] * 6 + [(30,)] * 3, "int")
    params = FieldBatchParams.checked(np.arange(-1.0, 7.0), "cells", task_cost=300.0)
    col = read_fields(fields)
    serial = execute(create_or_open_fields(str(tmp_path / "s.zarr"), col, params), SerialExecutor())
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None,
                      scheduler_kwargs=QUIET_HTTP) as cluster, Client(cluster) as client:
        store = create_or_open_fields(str(tmp_path / "d.zarr"), col, params)
        assert store.n_tasks >= 3
        dask = execute(store, DaskExecutor(client))
    assert dask.complete and dask.result == serial.result
    assert np.array_equal(dask.result.values, feature_matrix(fields, grid=np.arange(-1.0, 7.0),
                                                             construction="cells").values)


@pytest.mark.slow
@pytest.mark.cluster
def test_two_worker_processes_give_the_serial_matrix(tmp_path):
    fields = tied_fields(10, [(16, 16)] * 8 + [(6, 6, 6)] * 4, "float")
    grid = grid_for("float", False)
    ref = feature_matrix(fields, grid=grid, fields=True)
    fm = feature_matrix(fields, grid=grid, fields=True, store=str(tmp_path / "fm.zarr"),
                        where=Where(workers=2, threads=1))
    assert fm == ref


def test_an_interrupted_run_resumes_to_the_same_matrix(tmp_path):
    fields = tied_fields(11, [(10, 9)] * 10 + [(5, 4, 4)] * 6, "int")
    grid = np.arange(-1.0, 7.0, 0.5)
    params = FieldBatchParams.checked(grid, "vertices", superlevel=False, task_cost=400.0)
    url = str(tmp_path / "fm.zarr")
    store = create_or_open_fields(url, read_fields(fields), params)
    assert store.n_tasks >= 5
    # an earlier run committed some tasks, then stopped
    SerialExecutor(threads=1, retries=0).run(store, [0, 2, 3], Callbacks())
    report = execute(open_run(url), SerialExecutor())
    assert report.computed == store.n_tasks - 3 and report.complete
    assert report.result == feature_matrix(fields, grid=grid, fields=True)


def test_collections_from_files_stacks_and_folders(tmp_path):
    import zarr

    rng = np.random.default_rng(12)
    stack = rng.integers(0, 5, (6, 7, 8)).astype(np.int16)
    np.save(tmp_path / "stack.npy", stack)
    z = zarr.create_array(str(tmp_path / "stack.zarr"), shape=stack.shape, chunks=(2, 7, 8), dtype=stack.dtype)
    z[...] = stack
    grid = np.arange(-1.0, 6.0)
    ref = feature_matrix(list(stack), grid=grid, fields=True)
    assert feature_matrix(stack, grid=grid, fields=True) == ref  # an array: its first axis indexes the items
    assert feature_matrix(str(tmp_path / "stack.npy"), grid=grid, fields=True) == ref
    assert feature_matrix(str(tmp_path / "stack.zarr"), grid=grid, fields=True) == ref
    folder = tmp_path / "arrays"
    folder.mkdir()
    for i, a in enumerate(stack[:3]):
        np.save(folder / f"f{i}.npy", a)
    col = read_fields(str(folder))
    assert col.names == ("f0", "f1", "f2") and col.labels is None
    assert all(np.array_equal(x, y) for x, y in zip(col.fields, stack[:3]))
    classes = tmp_path / "classes"
    for label, items in (("rough", stack[:2]), ("smooth", stack[2:5])):
        (classes / label).mkdir(parents=True)
        for i, a in enumerate(items):
            np.save(classes / label / f"x{i}.npy", a)
    fm = feature_matrix(str(classes), grid=grid, fields=True)
    assert fm.names == ("rough/x0", "rough/x1", "smooth/x0", "smooth/x1", "smooth/x2")
    assert fm.labels == ("rough", "rough", "smooth", "smooth", "smooth")
    assert np.array_equal(fm.values, ref.values[:5])


@pytest.mark.parametrize("call, message", [
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], fields=True, graphs=True), "one or the other"),
    (lambda: feature_matrix([np.zeros((2, 2))], 1.0, [0.0], fields=True), "eps is the largest scale"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], max_dim=2, fields=True), "max_dim applies"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], construction="cells", fields=False),
     "construction applies"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], fields=True, values="degree"), "values applies to graphs"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], construction="edges"), "construction must be one of"),
    (lambda: feature_matrix([], grid=[0.0], fields=True), "holds no fields"),
    (lambda: feature_matrix([np.zeros((2, 2)), np.array(["a"])], grid=[0.0], fields=True), "field '1' must hold real"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], fields=True, names=["a", "b"]), "2 names for 1 fields"),
    (lambda: feature_matrix([np.zeros((2, 2))], grid=[0.0], fields=True, labels=[1, 2]), "2 labels for 1 fields"),
    (lambda: feature_matrix([np.full((2, 2), np.inf)], grid=[0.0], fields=True), "infinite value at position (0, 0)"),
])
def test_bad_field_collections_are_refused_in_one_line(call, message):
    with pytest.raises(InputError) as err:
        call()
    assert message in str(err.value) and "\n" not in str(err.value)


# ---------------------------------------------------------------- scikit-learn


def smoothed_noise(count: int, sigma: float, seed: int, shape=(32, 32)) -> list[np.ndarray]:
    """Gaussian white noise smoothed by a Gaussian kernel of width `sigma` (periodic), each
    field standardised to mean 0 and variance 1, so only its spatial structure differs."""
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        f = gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
        out.append((f - f.mean()) / f.std())
    return out


def test_curve_features_tell_two_smoothing_scales_apart():
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import StratifiedKFold, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    fields = smoothed_noise(40, 1.5, seed=0) + smoothed_noise(40, 2.5, seed=1)
    labels = np.repeat([0, 1], 40)
    # the standardised values alone cannot tell them apart: mean 0, variance 1 for both
    model = make_pipeline(CurveFeatures(grid="-2.5:2.5:21", construction="cells"), StandardScaler(),
                          LogisticRegression(max_iter=1000))
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    acc = cross_val_score(model, fields, labels, cv=folds)
    # chance is 1/2; with 80 fields the standard error of an accuracy at chance is
    # sqrt(1/4 / 80) = 0.056, so 0.9 is 7 of them above it
    assert acc.mean() > 0.9
    # the same classifier on a histogram of the values on the same scales stays near chance:
    # the curves see the spatial structure, the values alone do not
    hist = np.array([np.histogram(f, bins=np.linspace(-2.5, 2.5, 21))[0] for f in fields])
    baseline = cross_val_score(make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000)), hist, labels,
                               cv=folds)
    assert baseline.mean() < 0.75


def test_curve_features_takes_arrays_in_and_out_of_process(tmp_path):
    from sklearn.base import clone

    fields = tied_fields(13, [(6, 5), (4, 4, 2), (9,)], "float")
    tf = CurveFeatures(grid="-1:1:9", construction="cells", superlevel=True, normalise=True)
    assert clone(tf).get_params() == tf.get_params()
    X = tf.fit(fields).transform(fields)
    fm = feature_matrix(fields, grid=np.linspace(-1, 1, 9), construction="cells", superlevel=True, normalise=True)
    assert X.dtype == np.float64 and np.array_equal(X, fm.values)
    assert tf.get_feature_names_out()[0] == "chi(-1.0)"
    assert np.array_equal(CurveFeatures(grid="-1:1:9", fields=True).fit_transform(fields),
                          feature_matrix(fields, grid=np.linspace(-1, 1, 9), fields=True).values.astype(float))
    with pytest.raises(InputError, match="eps is the largest scale"):
        CurveFeatures(eps=1.0, grid="0:1:3", fields=True).fit(fields)


def test_curve_features_on_a_scheduler(tmp_path):
    from distributed import LocalCluster

    fields = tied_fields(14, [(6, 5), (4, 4, 2), (9,), (3, 3)], "int")
    tf = CurveFeatures(grid="0:5:6", construction="cells")
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None,
                      scheduler_kwargs=QUIET_HTTP) as cluster:
        out = CurveFeatures(grid="0:5:6", construction="cells", scheduler=cluster.scheduler_address) \
            .fit_transform(fields)
    assert np.array_equal(out, tf.fit_transform(fields))


def test_field_collections_are_told_apart_from_clouds_and_graphs(tmp_path):
    from chitally.field_sources import is_field_collection

    pil = pytest.importorskip("PIL.Image")
    (tmp_path / "png").mkdir()
    pil.fromarray(np.zeros((3, 3), np.uint8)).save(tmp_path / "png" / "a.png")
    (tmp_path / "npy").mkdir()
    np.save(tmp_path / "npy" / "a.npy", np.zeros((3, 2)))
    (tmp_path / "classes" / "x").mkdir(parents=True)
    pil.fromarray(np.zeros((3, 3), np.uint8)).save(tmp_path / "classes" / "x" / "a.png")
    assert is_field_collection(str(tmp_path / "png")) and is_field_collection(str(tmp_path / "classes"))
    assert not is_field_collection(str(tmp_path / "npy"))  # could be point clouds: say fields=True
    assert is_field_collection(FieldCollection(("a",), (np.zeros(2),)))
    assert not is_field_collection([np.zeros((3, 2))])
    assert feature_matrix(str(tmp_path / "png"), grid=[0.0]).values.tolist() == [[1]]


# ------------------------------------------------------------------------- the CLI


def run_cli(*args):
    from click.testing import CliRunner

    from chitally.cli import main

    return CliRunner().invoke(main, [str(a) for a in args])


def test_cli_folder_of_pngs_with_class_subfolders(tmp_path):
    pil = pytest.importorskip("PIL.Image")
    rng = np.random.default_rng(15)
    images = {}
    for label in ("cats", "dogs"):
        (tmp_path / "images" / label).mkdir(parents=True)
        for i in range(3):
            a = rng.integers(0, 256, (10 + i, 12 - i), dtype=np.uint8)
            pil.fromarray(a).save(tmp_path / "images" / label / f"im{i}.png")
            images[f"{label}/im{i}"] = a
    res = run_cli("batch", tmp_path / "images", "--grid", "0:255:18", "--construction", "cells",
                  "--out", tmp_path / "fm.zarr", "--serial", "--no-progress")
    assert res.exit_code == 0, res.output
    assert "6 fields (3 shapes)" in res.stderr and "with labels" in res.stderr
    res = run_cli("export", tmp_path / "fm.zarr", "--out", tmp_path / "m.csv")
    assert res.exit_code == 0, res.output
    lines = (tmp_path / "m.csv").read_text().splitlines()
    grid = np.linspace(0, 255, 18)
    assert lines[0] == "name,label," + ",".join(f"chi({float(t)!r})" for t in grid)
    assert len(lines) == 7
    for line, (name, a) in zip(lines[1:], images.items()):
        cells = line.split(",")
        assert cells[:2] == [name, name.split("/")[0]]
        assert [int(x) for x in cells[2:]] == on_grid(field_curve(a, "cells"), grid).tolist()


def test_cli_npy_folder_with_a_labels_file_and_a_stack(tmp_path):
    fields = tied_fields(16, [(5, 7), (8, 3), (4, 4)], "float")
    (tmp_path / "arrays").mkdir()
    for i, a in enumerate(fields):
        np.save(tmp_path / "arrays" / f"a{i}.npy", a)
    (tmp_path / "labels.csv").write_text("name,label\na0,x\na1,y\na2,x\n")
    grid = np.linspace(-1.5, 0.0, 7)  # superlevel: scales are -f
    res = run_cli("batch", tmp_path / "arrays", "--fields", "--superlevel", "--grid", "-1.5:0:7",
                  "--labels", tmp_path / "labels.csv", "--normalise", "--out", tmp_path / "fm.zarr",
                  "--serial", "--no-progress")
    assert res.exit_code == 0, res.output
    res = run_cli("export", tmp_path / "fm.zarr", "--out", tmp_path / "m.npz")
    assert res.exit_code == 0, res.output
    with np.load(tmp_path / "m.npz") as z:
        assert z["names"].tolist() == ["a0", "a1", "a2"] and z["labels"].tolist() == ["x", "y", "x"]
        assert np.array_equal(z["grid"], grid) and z["sizes"].tolist() == [35, 24, 16]
        expected = [on_grid(field_curve(a, superlevel=True), grid) / a.size for a in fields]
        assert np.array_equal(z["values"], np.array(expected))
    stack = np.stack([f[:4, :3] for f in fields])
    np.save(tmp_path / "stack.npy", stack)
    res = run_cli("batch", tmp_path / "stack.npy", "--mask-nan", "--grid", "-1:1:5", "--out",
                  tmp_path / "s.zarr", "--serial", "--no-progress")
    assert res.exit_code == 0, res.output
    m = read_result(open_run(str(tmp_path / "s.zarr")))
    assert m.names == ("0", "1", "2")
    assert np.array_equal(m.values, [on_grid(field_curve(a), np.linspace(-1, 1, 5)) for a in stack])


def test_cli_bad_field_inputs_exit_2_with_one_line(tmp_path):
    (tmp_path / "empty").mkdir()
    (tmp_path / "arrays").mkdir()
    a = np.zeros((4, 4))
    np.save(tmp_path / "arrays" / "ok.npy", a)
    a[1, 2] = np.nan
    np.save(tmp_path / "arrays" / "hole.npy", a)
    (tmp_path / "labels.csv").write_text("name,label\nok,x\nother,y\n")
    out = tmp_path / "never.zarr"
    cases = [
        (["batch", tmp_path / "empty", "--fields"], "holds no images or .npy arrays"),
        (["batch", tmp_path / "arrays", "--fields"], "field 'hole' holds NaN at position (1, 2)"),
        (["batch", tmp_path / "arrays", "--mask-nan", "--labels", tmp_path / "labels.csv"],
         "no label for field 'hole'"),
        (["batch", tmp_path / "arrays", "--fields", "--eps", "1"], "--eps does not apply to fields"),
        (["batch", tmp_path / "arrays", "--fields", "--graphs"], "one or the other"),
    ]
    for args, message in cases:
        res = run_cli(*args, "--grid", "0:1:3", "--out", out, "--serial", "--no-progress")
        assert res.exit_code == 2, (args, res.output)
        assert message in res.stderr and res.stderr.count("\n") == 1, (args, res.stderr)
        assert not out.exists()
    res = run_cli("batch", tmp_path / "arrays", "--mask-nan", "--grid", "0:1:3", "--out", out, "--serial",
                  "--no-progress")
    assert res.exit_code == 0, res.output
