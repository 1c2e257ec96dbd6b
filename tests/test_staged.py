"""Planning a cloud on the cluster (`chitally.staged`, `chitally.jobs.stages`, `chitally.cells`).

The conformance suite (tests/test_execute.py, kind ``cloud-staged``) runs every test cloud
planned in stages on every executor. Here: the stages themselves on a Dask cluster, ties
on cell borders, the grid's invariants, resuming after a failed stage and after a
killed driver, and bad parameters.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import chitally, explain, make_faults, tree_times, write_points
from references import brute_force_curve, gudhi_curve

from chitally import euler_curve, runs
from chitally.cells import cell_codes, cut_regions, halo_regions, neighbour_codes
from chitally.jobs.cloud import Params
from chitally.jobs.stages import CellCounts, StageParams, stage_url
from chitally.staged import PlanInput, StageIncomplete, plan_run

HOST = "127.0.0.1"


def plan(tmp_path: Path, pts: np.ndarray, eps: float, cap, stage: StageParams, where=None,
         name: str = "run"):
    with runs.Session(where or runs.Where(serial=True)) as session:
        store = plan_run(str(tmp_path / f"{name}.zarr"), PlanInput.of_points(pts),
                         Params.checked(eps, cap), stage, session)
        return store, session.run(store)


def clustered(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    centres = rng.random((6, 3))
    pts = np.concatenate([c + 0.03 * rng.standard_normal((n // 6, 3)) for c in centres])
    # coincident points: copies of rows far apart in the input, so in different blocks
    return np.concatenate([pts, pts[[0, 5, 5, 40]]])


# ------------------------------------------------------------------------- the grid

def test_neighbour_cells_hold_every_eps_neighbour():
    # brute force: every pair within eps (the one distance rule) has its cells next door
    rng = np.random.default_rng(3)
    x = rng.random((400, 3)) * 4 - 2
    eps = 0.5
    side = StageParams().side(eps)
    codes = cell_codes(x, side)
    around = neighbour_codes(codes, 3)
    d = np.sqrt(((x[:, None, :] - x[None, :, :]) ** 2).sum(-1))
    for i, j in zip(*np.nonzero(d <= eps)):
        assert codes[j] in around[i]


def test_regions_cover_cells_in_order_and_know_their_neighbours():
    counts = np.array([3, 1, 5, 2, 2, 9, 1])
    starts = cut_regions(counts, 5)
    assert starts[0] == 0 and starts[-1] == counts.size and np.all(np.diff(starts) > 0)
    for a, b in zip(starts[:-1], starts[1:]):
        assert counts[a:b].sum() <= 5 or b - a == 1
    # a 1-D row of cells 0..5, two regions: only the cells at the border see the other
    codes = cell_codes(np.arange(6, dtype=float)[:, None] + 0.5, 1.0)
    region = np.array([0, 0, 0, 1, 1, 1])
    offsets, regions = halo_regions(np.sort(codes), region[np.argsort(codes)], 1)
    got = {int(c): list(regions[offsets[k]:offsets[k + 1]]) for k, c in enumerate(np.sort(codes))}
    by_cell = dict(zip(codes.tolist(), range(6)))
    assert {by_cell[c]: r for c, r in got.items()} == {0: [], 1: [], 2: [1], 3: [0], 4: [], 5: []}



@pytest.mark.parametrize("seed", range(4))
def test_cell_counts_merge_like_a_global_unique(seed):
    """The count stage's fold merges block tables into its state by binary search; the
    reference is numpy's unique over every table at once, weights summed by bincount.
    Tables overlap, some are empty, codes span the int64 range."""
    rng = np.random.default_rng(seed)
    fold = CellCounts(None)
    everything, weights = [], []
    for _ in range(6):
        batch = []
        for _ in range(int(rng.integers(1, 4))):
            pool = rng.choice([50, 2000, 2**62], p=[0.4, 0.4, 0.2])
            codes = np.unique(rng.integers(-pool, pool, int(rng.integers(0, 300)), dtype=np.int64))
            counts = rng.integers(1, 40, codes.size).astype(np.int64)
            batch.append({"codes": codes, "counts": counts})
            everything.append(codes)
            weights.append(counts)
        fold.add(list(range(len(batch))), batch)
        want, inverse = np.unique(np.concatenate(everything), return_inverse=True)
        want_counts = np.bincount(inverse, weights=np.concatenate(weights)).astype(np.int64)
        assert fold.codes.tolist() == want.tolist() and fold.counts.tolist() == want_counts.tolist()
        assert fold.codes.dtype == np.int64 and fold.counts.dtype == np.int64


# ------------------------------------------------------------------------- exact curves

@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, host=HOST, dashboard_address=f"{HOST}:0",
                      processes=True) as c:
        yield c


@pytest.mark.parametrize("cap", [None, pytest.param(2, marks=pytest.mark.slow)])
def test_stages_on_dask_give_the_in_process_curve(tmp_path, cluster, cap):
    pts = clustered(1200, 5)
    where = runs.Where(scheduler=cluster.scheduler_address, wait_workers=2)
    store, report = plan(tmp_path, pts, 0.08, cap, StageParams(region_rows=250, block_rows=300), where)
    assert store.attrs["layout"] == "staged" and store.attrs["n_balls"] > 3
    assert report.result == euler_curve(pts, 0.08, cap)


@pytest.mark.parametrize("cap", [None, 1, 3])
def test_small_clouds_match_gudhi(tmp_path, cap):
    pts = clustered(72, 9)
    _, report = plan(tmp_path, pts, 0.1, cap, StageParams(cell_size=0.1, region_rows=9, block_rows=11))
    # gudhi RipsComplex / SimplexTree: an independent Rips implementation
    assert report.result == gudhi_curve(pts, 0.1, cap)


def test_ties_on_cell_borders_match_brute_force(tmp_path):
    # an integer lattice whose cells have side exactly eps... and a hair: every point sits
    # on a cell border, every length ties with many others, and eps itself is a length
    g = np.arange(6, dtype=np.float64)
    pts = np.stack(np.meshgrid(g, g, g[:3], indexing="ij"), -1).reshape(-1, 3)
    pts = np.concatenate([pts, pts[::7]])  # coincident points too
    for cap in (None, 2):
        _, report = plan(tmp_path, pts, 1.0, cap, StageParams(cell_size=1.0, region_rows=20, block_rows=33),
                         name=f"run{cap}")
        # networkx enumerate_all_cliques on the eps-graph (brute force)
        assert report.result == brute_force_curve(pts, 1.0, cap)


# ------------------------------------------------------------------------- resuming

def test_a_failed_stage_resumes_without_recomputing_earlier_stages(tmp_path, monkeypatch):
    from chitally import engine

    pts = clustered(600, 2)
    stage = StageParams(region_rows=120, block_rows=150)
    params = Params.checked(0.08, None)
    calls: dict[str, list[int]] = {}
    original = engine.run_task
    failing = {"plan-region": {1}}

    def counting(store, task, attempt, *, threads=1):
        calls.setdefault(store.kind, []).append(int(task))
        if task in failing.get(store.kind, ()):
            raise RuntimeError(f"injected failure of {store.kind} task {task}")
        return original(store, task, attempt, threads=threads)

    monkeypatch.setattr(engine, "run_task", counting)
    url = str(tmp_path / "run.zarr")
    with runs.Session(runs.Where(serial=True, retries=0)) as session:
        with pytest.raises(StageIncomplete, match="planning stage region"):
            plan_run(url, PlanInput.of_points(pts), params, stage, session)
    first = {k: sorted(v) for k, v in calls.items()}
    assert set(first) == {"plan-count", "plan-scatter", "plan-region"}
    calls.clear()
    failing.clear()
    with runs.Session(runs.Where(serial=True)) as session:
        store = plan_run(url, PlanInput.of_points(pts), params, stage, session)
        report = session.run(store)
    # only the failed region task is computed again; the earlier stages are read
    assert sorted(calls) == ["cloud", "plan-halo", "plan-region"]
    assert calls["plan-region"] == [1]
    assert report.result == euler_curve(pts, 0.08)


def test_a_killed_driver_resumes_from_its_stages(tmp_path):
    pts = clustered(600, 4)
    src = write_points(tmp_path / "pts.npy", pts)
    run = tmp_path / "run.zarr"
    # the driver itself runs the tasks (--serial): the third region task writes its
    # outputs, then its process (the driver) dies before the commit record
    faults = make_faults(tmp_path, kind="plan-region", exit_between=[2])
    args = ("run", src, "--eps", "0.08", "--out", run, "--planner", "cluster", "--region-rows", "120",
            "--serial", "--no-progress")
    res = chitally(*args, faults=faults, timeout=300)
    assert res.returncode == 17, explain(res)
    assert not (run / "created.json").exists()
    before = tree_times(Path(stage_url(str(run), "count")))
    before.update(tree_times(Path(stage_url(str(run), "scatter"))))
    res = chitally("resume", run, "--serial", "--no-progress", timeout=300)
    assert res.returncode == 0, explain(res)
    assert "continuing it" in res.stderr
    after = tree_times(Path(stage_url(str(run), "count")))
    after.update(tree_times(Path(stage_url(str(run), "scatter"))))
    assert {k: v for k, v in after.items() if "commits/" in k} == \
        {k: v for k, v in before.items() if "commits/" in k}
    res = chitally("export", run, "--out", tmp_path / "c.json", timeout=120)
    assert res.returncode == 0, explain(res)
    from chitally import Curve

    assert Curve.load(tmp_path / "c.json") == euler_curve(pts, 0.08)


# ------------------------------------------------------------------------- bad input

@pytest.mark.parametrize("args, message", [
    (("--cell-size", "0.01"), "--cell-size must be at least eps"),
    (("--region-rows", "0"), "--region-rows"),
    (("--cell-size", "nan"), "--cell-size"),
])
def test_bad_stage_parameters_are_one_line(tmp_path, args, message):
    src = write_points(tmp_path / "pts.npy", clustered(60, 1))
    res = chitally("run", src, "--eps", "0.08", "--out", tmp_path / "r.zarr", "--planner", "cluster",
                   "--serial", *args)
    assert res.returncode == 2, explain(res)
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and message in lines[0], explain(res)
    assert not (tmp_path / "r.zarr").exists() and not (tmp_path / "r.zarr.plan").exists()


def test_plan_on_the_cluster_reports_its_stages(tmp_path):
    pts = clustered(300, 6)
    src = write_points(tmp_path / "pts.npy", pts)
    res = chitally("plan", src, "--eps", "0.08", "--planner", "cluster", "--out", tmp_path / "r.zarr",
                   "--serial", "--json", "--no-progress")
    assert res.returncode == 0, explain(res)
    summary = json.loads(res.stdout)
    planner = summary["planner"]
    assert planner["kind"] == "cluster"
    assert set(planner["seconds"]) >= {"count", "regions", "scatter", "region", "halo"}
    assert planner["driver_peak"] > 0 and planner["expected_driver_peak"] >= planner["driver_peak"]
    assert summary["points"] == pts.shape[0]
    # the edges the stages counted are the eps-graph's (networkx-free: by brute force here)
    d = np.sqrt(((pts[:, None] - pts[None]) ** 2).sum(-1))
    assert summary["edges"] == int((np.triu(d <= 0.08, 1)).sum())
    res = chitally("plan", src, "--eps", "0.08", "--planner", "cluster", "--serial")
    assert res.returncode == 2 and "--out" in res.stderr, explain(res)
    # the driver's planner reports its own time and memory too
    res = chitally("plan", src, "--eps", "0.08", "--json")
    assert res.returncode == 0, explain(res)
    drv = json.loads(res.stdout)
    assert drv["planner"]["kind"] == "driver" and drv["edges"] == summary["edges"]


def test_a_killed_worker_during_a_stage_is_survived(tmp_path):
    pts = clustered(600, 8)
    src = write_points(tmp_path / "pts.npy", pts)
    run = tmp_path / "run.zarr"
    # a worker writes the outputs of a region task, then its process dies before the
    # commit record; the nanny starts another and the task runs again
    faults = make_faults(tmp_path, kind="plan-region", exit_between=[1])
    res = chitally("run", src, "--eps", "0.08", "--out", run, "--planner", "cluster", "--region-rows",
                   "120", "--workers", "2", "--threads", "1", "--no-progress", faults=faults, timeout=300)
    assert res.returncode == 0, explain(res)
    assert faults.attempts()[1] >= 2  # the killed attempt and the one that committed
    res = chitally("export", run, "--out", tmp_path / "c.json", timeout=120)
    assert res.returncode == 0, explain(res)
    from chitally import Curve

    assert Curve.load(tmp_path / "c.json") == euler_curve(pts, 0.08)


# ------------------------------------------------------------------------- curves in parts

@pytest.mark.parametrize("executor", ["serial", pytest.param("dask", marks=pytest.mark.slow)])
def test_a_curve_reduced_in_parts_is_the_whole_curve(tmp_path, cluster, executor):
    from chitally import Curve
    from chitally.jobs.parts import PartedCurve

    pts = clustered(1500, 12)
    eps = 0.08
    where = runs.Where(serial=True) if executor == "serial" else \
        runs.Where(scheduler=cluster.scheduler_address, wait_workers=2)
    store, report = plan(tmp_path, pts, eps, None, StageParams(region_rows=300, block_rows=400, part_jumps=400),
                         where)
    assert store.kind == "cloud-parts" and store.read_input("part_bounds").size >= 3
    curve, ref = report.result, euler_curve(pts, eps)
    assert isinstance(curve, PartedCurve) and curve.n_jumps > 400
    # the same steps, read part by part or whole, and the same digest computed either way
    assert curve.to_curve() == ref and curve.digest() == ref.digest() and curve == ref
    assert (curve.final, curve.n_jumps) == (ref.final, ref.n_jumps)
    grid = np.concatenate([np.linspace(0.0, eps, 501), store.read_input("part_bounds")])
    assert np.array_equal(curve.sample(grid), ref.sample(grid))
    assert curve.at(0.05) == ref.at(0.05)
    assert Curve.load(curve.save(tmp_path / "c.csv")) == ref
    # a run opened again reads its curve from the parts
    assert runs.read_result(runs.open_run(store.url)) == ref


def test_an_unfinished_merge_resumes(tmp_path, monkeypatch):
    from chitally import engine

    pts = clustered(900, 13)
    original = engine.run_task
    merged: list[int] = []

    def failing(store, task, attempt, *, threads=1):
        if store.kind == "curve-merge":
            merged.append(int(task))
            if task == 1 and merged.count(1) == 1:
                raise RuntimeError("injected failure of a merge task")
        return original(store, task, attempt, threads=threads)

    monkeypatch.setattr(engine, "run_task", failing)
    stage = StageParams(region_rows=200, block_rows=300, part_jumps=300)
    with runs.Session(runs.Where(serial=True, retries=0)) as session:
        store = plan_run(str(tmp_path / "run.zarr"), PlanInput.of_points(pts), Params.checked(0.08, None),
                         stage, session)
        report = session.run(store)
    assert not report.complete and report.failed
    n_first = len(merged)
    report = runs.run(runs.open_run(store.url), runs.Where(serial=True))
    assert report.complete and report.curve == euler_curve(pts, 0.08)
    assert merged[n_first:] == [1]  # only the failed part is merged again


def test_a_store_naming_its_part_costs_part_edges_still_merges(tmp_path, monkeypatch):
    # cloud stores made before fields had parts name the merge's cost input part_edges
    from chitally import staged

    original = staged._parts_of

    def old_names(*args):
        kind, inputs = original(*args)
        return kind, {("part_edges" if k == "part_cost" else k): v for k, v in inputs.items()}

    monkeypatch.setattr(staged, "_parts_of", old_names)
    pts = clustered(600, 14)
    store, report = plan(tmp_path, pts, 0.08, None, StageParams(region_rows=200, block_rows=300, part_jumps=300))
    assert store.kind == "cloud-parts" and "part_edges" in store.input_names and "part_cost" not in store.input_names
    assert report.complete and report.curve == euler_curve(pts, 0.08)


@pytest.mark.parametrize("metric", ["manhattan", "chebyshev"])
def test_other_metrics_plan_on_the_cluster_too(tmp_path, metric):
    # a coordinate difference is at most the distance in these metrics too, so the cells
    # next door hold every eps-neighbour; gudhi on scipy's cdist is the outside reference
    from references import gudhi_matrix_curve
    from scipy.spatial.distance import cdist

    pts = np.random.default_rng(31).integers(0, 6, (90, 3)).astype(np.float64)  # many ties
    eps = 2.0
    with runs.Session(runs.Where(serial=True)) as session:
        store = plan_run(str(tmp_path / "run.zarr"), PlanInput.of_points(pts),
                         Params.checked(eps, None, metric=metric),
                         StageParams(cell_size=2.0, region_rows=15, block_rows=20), session)
        curve = session.run(store).result
    assert curve == euler_curve(pts, eps, metric=metric)
    D = cdist(pts, pts, {"manhattan": "cityblock", "chebyshev": "chebyshev"}[metric])
    assert curve == gudhi_matrix_curve(D, eps, None)
