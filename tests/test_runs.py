"""Runs: invariance of the distributed curve, status of partial runs, reopen and resume.

The property test drives whole runs (plan, create the store, execute on the serial
executor, reduce) on ``memory://`` stores with unique names, and demands that the curve
never depends on the cover radius, the order of the points or how the rows are split
into tasks: it always equals `euler_curve` of the points. On the integer-lattice clouds
it also equals networkx ``enumerate_all_cliques`` on the eps-graph (brute force,
``tests/references.py``), where the ties between lengths are exact, and on every cloud
gudhi's Rips filtration (``references.gudhi_curve``).
"""

from __future__ import annotations

import math
import uuid

import fsspec
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from references import brute_force_curve, gudhi_curve

from chitally import euler_curve, runs
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs.cloud import Params, create_or_open, plan_points
from chitally.store import LeaseHeld, StoreMismatch

TINY = 1e-9  # every row a task of its own
HUGE = 1e18  # one task


def memory_url() -> str:
    return f"memory://chitally-test-runs/{uuid.uuid4().hex}"


def forget(url: str) -> None:
    fs = fsspec.filesystem("memory")
    path = url.split("://", 1)[1]
    if fs.exists(path):
        fs.rm(path, recursive=True)


def run_curve(points, eps, cap, radius=None, task_cost=None):
    url = memory_url()
    try:
        store = create_or_open(url, points, Params.checked(eps, cap, radius, task_cost))
        report = runs.execute(store, SerialExecutor())
        assert report.failed == {} and report.done == store.n_tasks
        return report.curve, store.n_tasks
    finally:
        forget(url)


# ------------------------------------------------------------------- invariance


@st.composite
def clouds(draw):
    """(points, eps, lattice?): small clouds in R^1..R^4, with ties and coincident points."""
    n = draw(st.integers(1, 16))
    dim = draw(st.integers(1, 4))
    if draw(st.booleans()):
        # an integer lattice: exact ties between lengths, and many coincident points
        coords = draw(st.lists(st.integers(0, 4), min_size=n * dim, max_size=n * dim))
        pts = np.array(coords, dtype=np.float64).reshape(n, dim)
        eps = draw(st.sampled_from([1.0, math.sqrt(2.0), 2.0, math.sqrt(5.0)]))
        return pts, eps, True
    coords = draw(st.lists(st.floats(0.0, 1.0, allow_nan=False, width=64),
                           min_size=n * dim, max_size=n * dim))
    pts = np.array(coords, dtype=np.float64).reshape(n, dim)
    copies = draw(st.lists(st.integers(0, n - 1), max_size=3))
    if copies:
        pts = np.concatenate([pts, pts[copies]])
    eps = draw(st.floats(0.05, 1.0))
    return pts, eps, False


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    cloud=clouds(),
    cap=st.sampled_from([None, 0, 1, 2, 3]),
    radius_factor=st.floats(0.25, 3.0),
    split=st.one_of(st.sampled_from([TINY, HUGE]), st.floats(1.0, 200.0)),
    data=st.data(),
)
def test_the_curve_depends_on_no_radius_no_order_no_split(cloud, cap, radius_factor, split, data):
    pts, eps, lattice = cloud
    expected = euler_curve(pts, eps, cap)
    if lattice and cap is not None:
        assert expected == brute_force_curve(pts, eps, cap), "networkx enumerate_all_cliques"
    # gudhi RipsComplex: an independent implementation, same inclusion rule and lengths
    assert expected == gudhi_curve(pts, eps, cap), "gudhi RipsComplex"

    default, _ = run_curve(pts, eps, cap)
    assert default == expected

    perm = np.array(data.draw(st.permutations(range(pts.shape[0])), label="order"), dtype=np.int64)
    varied, n_tasks = run_curve(pts[perm], eps, cap, radius_factor * eps, split)
    if split == TINY:
        assert n_tasks == pts.shape[0]
    if split == HUGE:
        assert n_tasks == 1
    assert varied == expected


# ------------------------------------------------------------------------ status


def cloud_r3() -> tuple[np.ndarray, float]:
    return np.random.default_rng(31).random((30, 3)), 0.4


def medium_store(url: str, cap: int | None = 2):
    pts, eps = cloud_r3()
    _, plan, _ = plan_points(pts, Params.checked(eps, cap, None, HUGE))
    params = Params.checked(eps, cap, None, float(plan.cost.sum()) / 6)
    store = create_or_open(url, pts, params)
    assert store.n_tasks >= 5
    return store


def test_status_of_a_fresh_store(tmp_path):
    store = medium_store(str(tmp_path / "fresh.zarr"))
    st_ = runs.status(store)
    assert st_["tasks"] == store.n_tasks and st_["done"] == st_["failed"] == 0
    assert st_["pending"] == store.n_tasks
    assert st_["percent"] == 0.0 and st_["task_seconds"] == 0.0
    assert st_["task_seconds_left_estimate"] is None
    assert st_["first_commit"] is None and st_["last_commit"] is None
    assert not st_["complete"] and st_["failures"] == {}


def test_status_counts_and_percent_on_a_partial_run(tmp_path):
    store = medium_store(str(tmp_path / "partial.zarr"))
    n = store.n_tasks
    cost = store.task_cost()
    some = [1, 3, n - 1]
    SerialExecutor().run(store, some, Callbacks())

    st_ = runs.status(store)
    assert (st_["tasks"], st_["done"], st_["failed"], st_["pending"]) == (n, 3, 0, n - 3)
    assert st_["percent"] == round(100.0 * float(cost[some].sum()) / float(cost.sum()), 2)
    assert 0.0 < st_["percent"] < 100.0
    assert st_["task_seconds"] > 0.0
    assert st_["task_seconds_left_estimate"] is not None and st_["task_seconds_left_estimate"] > 0
    assert st_["first_commit"] <= st_["last_commit"]
    assert not st_["complete"]

    store.commits.record_failure(0, "RuntimeError: it broke", 3)
    st_ = runs.status(store)
    assert (st_["done"], st_["failed"], st_["pending"]) == (3, 1, n - 4)
    assert st_["failures"] == {0: "RuntimeError: it broke"}

    report = runs.execute(store, SerialExecutor())
    assert report.computed == n - 3
    st_ = runs.status(store)
    assert (st_["done"], st_["failed"], st_["pending"]) == (n, 0, 0)
    assert st_["percent"] == 100.0 and st_["complete"] and st_["failures"] == {}
    assert st_["task_seconds_left_estimate"] == 0.0


# ---------------------------------------------------------------- reopen, resume


def test_execute_lists_the_pending_tasks_and_a_second_execute_computes_nothing():
    url = memory_url()
    try:
        store = medium_store(url, cap=None)
        SerialExecutor().run(store, [0, 2], Callbacks())
        seen = []
        report = runs.execute(store, SerialExecutor(), on_pending=lambda s, p: seen.append(list(p)))
        n = store.n_tasks
        assert seen == [[t for t in range(n) if t not in (0, 2)]]
        assert report.computed == n - 2 and report.done == n and report.complete
        pts, eps = cloud_r3()
        assert report.curve == euler_curve(pts, eps, None)
        assert runs.read_result(store) == report.curve

        again = runs.execute(runs.open_run(url), SerialExecutor(), on_pending=lambda s, p: seen.append(p))
        assert again.computed == 0 and again.curve == report.curve and len(seen) == 1
    finally:
        forget(url)


def test_reopening_needs_the_same_points_and_parameters():
    url = memory_url()
    try:
        pts, eps = cloud_r3()
        store = medium_store(url)
        params = Params.checked(eps, 2, None, store.params["task_cost"])
        assert create_or_open(url, pts, params).n_tasks == store.n_tasks
        with pytest.raises(StoreMismatch, match="max_dim: store 2, given 3"):
            create_or_open(url, pts, Params.checked(eps, 3, None, store.params["task_cost"]))
        with pytest.raises(StoreMismatch, match=r"(?<!cover_radius)\beps: store 0.4, given 0.8"):
            create_or_open(url, pts, Params.checked(eps * 2, 2, None, store.params["task_cost"]))
        moved = pts.copy()
        moved[0, 0] += 1e-12
        with pytest.raises(StoreMismatch, match="input.sha256"):
            create_or_open(url, moved, params)
        assert runs.status(store)["done"] == 0
    finally:
        forget(url)


def test_a_second_writer_is_refused_while_the_lease_is_held():
    url = memory_url()
    try:
        store = medium_store(url)
        with store.acquire_lease("another run"):
            with pytest.raises(LeaseHeld, match="another run"):
                runs.execute(store, SerialExecutor())
        assert runs.execute(store, SerialExecutor()).complete
    finally:
        forget(url)


def test_an_empty_eps_graph_and_a_single_point():
    # no edges at all: the curve is the number of points, whatever the split
    pts = np.arange(12, dtype=np.float64).reshape(6, 2) * 10.0
    curve, n_tasks = run_curve(pts, 1.0, None, task_cost=TINY)
    assert n_tasks == 6 and curve.chi.tolist() == [6] and curve == brute_force_curve(pts, 1.0, None)
    one, _ = run_curve(np.zeros((1, 3)), 0.5, 2)
    assert one.chi.tolist() == [1] and one == brute_force_curve(np.zeros((1, 3)), 0.5, 2)


# ------------------------------------------------------------------- the run API


def test_run_retries_a_failing_task_and_records_one_that_keeps_failing(tmp_path, monkeypatch):
    """`runs.run` in this process: a task whose first two attempts fail commits on its
    third (--retries 2); one whose first three fail is recorded as failed, the run is
    incomplete and a second `run` computes only that task. The task function is the
    engine's, wrapped with faults (`faultwrap`): the executors look it up when they run."""
    from faultwrap import FaultWrapper
    from helpers import make_faults

    from chitally import engine

    pts, eps = cloud_r3()
    faults = make_faults(tmp_path, fail={"2": 2, "4": 3})
    monkeypatch.setattr(engine, "run_task", FaultWrapper(faults.spec))
    store = medium_store(str(tmp_path / "run.zarr"), cap=None)
    n = store.n_tasks
    where = runs.Where(serial=True, retries=2)

    report = runs.run(store, where)
    assert not report.complete and report.curve is None
    assert report.failed == {4: "InjectedFault: injected failure in task 4, attempt 3"}
    assert (report.done, report.computed) == (n - 1, n - 1)
    assert faults.attempts() == {t: {2: 3, 4: 3}.get(t, 1) for t in range(n)}
    assert runs.status(store)["failures"] == {4: report.failed[4]}

    report = runs.run(runs.open_run(store.url), where)  # attempt 4 of task 4 goes through
    assert report.complete and report.computed == 1 and report.failed == {}
    assert report.curve == euler_curve(pts, eps, None)
    assert faults.attempts() == {t: {2: 3, 4: 4}.get(t, 1) for t in range(n)}
    assert runs.status(store)["failures"] == {}
    # a complete run is reported as it is: no lease, nothing computed
    again = runs.run(store, where)
    assert again.complete and again.computed == 0 and again.curve == report.curve
