"""Task bundles: how the Dask executor groups engine tasks (`chitally.bundles`), and what
a worker does with one bundle (`chitally.execute.run_bundle`), without Dask.

The executor's bundles on a real cluster, with killed workers and failing tasks, are in
tests/test_execute.py (the conformance suite runs every kind with bundles of two too).
"""

from __future__ import annotations

import pickle
from collections import deque
from pathlib import Path

import numpy as np
import pytest

from chitally import engine, runs
from chitally.bundles import MAX_TASKS, Bundler
from chitally.engine import TaskResult
from chitally.execute import SerialExecutor, attempt_name, run_bundle
from chitally.store import InputsDamaged, RunStore

# ------------------------------------------------------------------ sizing (pure)


def taken(bundler: Bundler, tasks: list[int], spread: int = 1) -> list[list[int]]:
    """Every bundle `bundler` cuts `tasks` into, in order."""
    queue = deque(tasks)
    out = []
    while queue:
        out.append(bundler.take(queue, spread))
    return out


def test_before_any_task_finished_every_bundle_is_one_task():
    b = Bundler(np.ones(5), 0.1)
    assert b.estimate(0) is None
    assert taken(b, [0, 1, 2, 3, 4]) == [[0], [1], [2], [3], [4]]


def test_bundles_reach_the_target_from_costs_and_measured_times():
    # task 0 measured: 2 ms in its task function for cost 1, 3 ms in the engine in all,
    # so a task of cost c is estimated at 1 ms + 2 ms * c
    cost = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 4.0, 1.0, 1.0])
    b = Bundler(cost, 0.0095)
    b.observe(0, 0.002, 0.003)
    assert b.estimate(1) == pytest.approx(0.003)
    assert b.estimate(6) == pytest.approx(0.009)
    # 3 + 3 + 3 ms fit in 9.5 ms, a fourth does not; the task of cost 4 (9 ms) stays
    # alone since the next would pass the target
    assert taken(b, [1, 2, 3, 4, 5, 6, 7, 8]) == [[1, 2, 3], [4, 5], [6], [7, 8]]


def test_a_task_heavier_than_the_target_stays_alone():
    cost = np.array([1.0, 100.0, 1.0, 1.0])
    b = Bundler(cost, 0.05)
    b.observe(0, 0.001, 0.001)  # the task of cost 100 is estimated at 0.1 s
    assert taken(b, [1, 2, 3]) == [[1], [2, 3]]


def test_tasks_of_zero_cost_are_estimated_from_the_mean_time():
    b = Bundler(np.zeros(6), 0.0041, decay=1.0)
    b.observe(0, 0.001, 0.002)
    b.observe(1, 0.003, 0.004)  # on average 2 ms in the task function, 1 ms beside it
    assert b.estimate(2) == pytest.approx(0.003)
    assert taken(b, [2, 3, 4, 5]) == [[2], [3], [4], [5]]
    b2 = Bundler(np.zeros(6), 0.0061, decay=1.0)
    b2.observe(0, 0.001, 0.002)
    b2.observe(1, 0.003, 0.004)
    assert taken(b2, [2, 3, 4, 5]) == [[2, 3], [4, 5]]


def test_the_estimates_follow_the_latest_tasks():
    # a first call 100 times slower than the rest (a worker loading its kernels)
    b = Bundler(np.ones(200), 1.0, decay=0.5)
    b.observe(0, 0.1, 0.1)
    for t in range(1, 11):
        b.observe(t, 0.001, 0.001)
    # weights 1, 1/2, ..., 1/1024 for the last eleven tasks: the slow one counts 1/1024
    weights = 0.5 ** np.arange(11)
    mean = (0.001 * weights[:10].sum() + 0.1 * weights[10]) / weights.sum()
    assert b.estimate(11) == pytest.approx(mean) and b.estimate(11) < 0.00106
    flat = Bundler(np.ones(200), 1.0, decay=1.0)
    flat.observe(0, 0.1, 0.1)
    for t in range(1, 11):
        flat.observe(t, 0.001, 0.001)
    assert flat.estimate(11) == pytest.approx(0.11 / 11)


def test_what_is_left_is_spread_over_several_bundles():
    b = Bundler(np.ones(100), 10.0)
    b.observe(0, 0.0, 0.001)
    # 40 tasks left, at least four bundles: at most ten tasks each
    assert [len(x) for x in taken(b, list(range(1, 41)), spread=4)] == \
        [10, 8, 6, 4, 3, 3, 2, 1, 1, 1, 1]
    assert [len(x) for x in taken(b, list(range(1, 100)), spread=1)] == [99]


def test_no_bundle_passes_the_largest_size():
    b = Bundler(np.zeros(1000), 10.0)
    b.observe(0, 0.0, 0.0)
    sizes = [len(x) for x in taken(b, list(range(1, 1000)))]
    assert sizes == [MAX_TASKS, MAX_TASKS, MAX_TASKS, 999 - 3 * MAX_TASKS]


def test_a_zero_target_sends_every_task_alone():
    b = Bundler(np.ones(4), 0.0)
    b.observe(0, 0.001, 0.002)
    assert taken(b, [1, 2, 3]) == [[1], [2], [3]]


def test_a_fixed_size_ignores_estimates_and_spread():
    b = Bundler(np.array([1e9, 1.0, 1.0, 1.0, 1.0]), 0.1, size=2)
    assert taken(b, [0, 1, 2, 3, 4], spread=5) == [[0, 1], [2, 3], [4]]


@pytest.mark.parametrize("target, size", [(-1.0, None), (float("nan"), None), (0.1, 0)])
def test_bad_settings_are_refused(target, size):
    with pytest.raises(ValueError):
        Bundler(np.ones(3), target, size=size)


# ------------------------------------------------------------------ one bundle on a worker


def batch_store(tmp_path: Path, n: int = 6) -> tuple[RunStore, list[np.ndarray]]:
    """A feature-matrix store of `n` small clouds, one cloud per task."""
    from chitally.clouds import read_collection
    from chitally.jobs import batch

    rng = np.random.default_rng(21)
    clouds = [rng.random((5 + k, 2)) for k in range(n)]
    params = batch.BatchParams.checked(0.5, np.linspace(0.0, 0.5, 6), task_cost=1.0)
    store = batch.create_or_open(str(tmp_path / "fm.zarr"), read_collection(clouds), params)
    assert store.n_tasks == n
    return store, clouds


class Failing:
    """The engine's task function, raising `error` for the tasks in `bad`."""

    def __init__(self, bad: dict[int, BaseException]) -> None:
        self.bad = bad
        self.calls: list[int] = []

    def __call__(self, store, task, attempt, *, threads=1):
        self.calls.append(task)
        if task in self.bad:
            raise self.bad[task]
        return engine.run_task(store, task, attempt, threads=threads)


def names(tasks: list[int]) -> list[str]:
    return [attempt_name(t, 0) for t in tasks]


def test_a_failing_task_does_not_stop_the_rest_of_its_bundle(tmp_path):
    store, clouds = batch_store(tmp_path)
    fn = Failing({2: RuntimeError("injected failure in task 2")})
    tasks = [0, 1, 2, 3, 4]

    out = run_bundle(fn, store, tasks, names(tasks))

    assert [t for t, _ in out] == tasks and fn.calls == tasks
    for task, result in out:
        if task == 2:
            assert isinstance(result, RuntimeError) and str(result) == "injected failure in task 2"
        else:
            assert isinstance(result, TaskResult) and result.task == task and not result.cached
            assert result.wall >= result.seconds > 0
            assert result.digest == store.commits.verified_record(task)["digest"]
    assert store.commits.committed().tolist() == [True, True, False, True, True, False]
    pickle.loads(pickle.dumps(out))  # what the worker sends back travels

    # the failed task and the one left out go through afterwards; the committed ones
    # are not computed again
    again = run_bundle(engine.run_task, store, [0, 2, 5], names([0, 2, 5]))
    assert [(t, r.cached) for t, r in again] == [(0, True), (2, False), (5, False)]
    from chitally import feature_matrix

    report = runs.execute(store, SerialExecutor())
    assert report.computed == 0
    # the in-process matrix (same clouds, grid and eps), not an outside reference: the
    # check is that bundling changes nothing
    expected = feature_matrix(clouds, 0.5, np.linspace(0.0, 0.5, 6), threads=1)
    assert np.array_equal(report.result.values, expected.values)


def test_a_fatal_error_ends_the_bundle(tmp_path):
    store, _ = batch_store(tmp_path)
    fn = Failing({1: InputsDamaged("injected damage")})

    out = run_bundle(fn, store, [0, 1, 2, 3], names([0, 1, 2, 3]))

    assert [t for t, _ in out] == [0, 1] and fn.calls == [0, 1]
    assert isinstance(out[0][1], TaskResult) and isinstance(out[1][1], InputsDamaged)
    assert store.commits.committed().tolist() == [True] + [False] * 5


def test_an_error_that_cannot_travel_is_sent_as_its_message(tmp_path):
    store, _ = batch_store(tmp_path)
    fn = Failing({0: ValueError("no pickle for this", lambda: None)})

    out = run_bundle(fn, store, [0, 1], names([0, 1]))

    error = out[0][1]
    assert type(error) is RuntimeError and str(error).startswith("ValueError: ('no pickle for this'")
    assert isinstance(out[1][1], TaskResult)
    pickle.loads(pickle.dumps(out))
