"""The checkpointed reducer: generic over the kind's fold, resumable, exactly once, robust
to damaged task outputs and checkpoints.

The reducer folds with whatever fold the store's job kind names; the `cloud` kind's is
`chitally.jobs.cloud.JumpSum`. Runs are cut short by hand: the serial executor runs a
subset of the task ids with a reducer fed from its events, then that reducer is dropped (a
crash) and a new one, or `runs.execute`, takes over from the newest valid checkpoint.
Every final curve must be identical to `euler_curve` and to networkx
``enumerate_all_cliques`` on the eps-graph (brute force, ``tests/references.py``). Stores
are local paths so chunks can be damaged on disk.
"""

from __future__ import annotations

import functools
import json
import logging
from pathlib import Path

import numpy as np
import pytest
from engine_fixtures import flip_byte
from references import brute_force_curve

from chitally import Curve, euler_curve, merge_jumps, runs
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs import cloud, kind_of
from chitally.jobs.cloud import JumpSum
from chitally.reduce import Reducer
from chitally.store import CommitLog, RunStore

EPS = 0.55
CAP = 3


@functools.cache
def points() -> np.ndarray:
    rng = np.random.default_rng(21)
    pts = rng.random((14, 3))
    return np.concatenate([pts, pts[[2, 9]]])  # two coincident pairs


@functools.cache
def expected() -> Curve:
    curve = euler_curve(points(), EPS, CAP)
    assert curve == brute_force_curve(points(), EPS, CAP), (
        "euler_curve differs from networkx enumerate_all_cliques (brute force)"
    )
    return curve


def new_store(tmp_path: Path, name: str = "run", task_cost: float = 1e-9) -> RunStore:
    """A store with one task per row (task_cost below any row's cost)."""
    params = cloud.Params.checked(EPS, CAP, None, task_cost)
    store = cloud.create_or_open(str(tmp_path / f"{name}.zarr"), points(), params)
    assert store.n_tasks == points().shape[0]
    return store


class Feed(Callbacks):
    """Adds each finished task to a reducer, as the run driver does."""

    def __init__(self, reducer: Reducer) -> None:
        self.reducer = reducer

    def task_done(self, result):
        assert self.reducer.add(result.task)


def run_some(store: RunStore, tasks, reducer: Reducer | None = None) -> None:
    events = Feed(reducer) if reducer is not None else Callbacks()
    outcome = SerialExecutor().run(store, list(tasks), events)
    assert sorted(outcome.done) == sorted(tasks) and outcome.failed == {}


def checkpoint_file(store: RunStore, generation: int, array: str) -> Path:
    # the documented layout: checkpoints/gen-000007/<array>; one chunk per array
    return Path(store.url, "checkpoints", f"gen-{generation:06d}", array, "c", "0")


def covered(reducer: Reducer) -> list[int]:
    return np.flatnonzero(reducer.covered).tolist()


def folded(store: RunStore, tasks) -> dict[str, np.ndarray]:
    """The state of a fresh fold of the kind fed `tasks`' verified outputs at once."""
    fold = kind_of(store.kind).make_fold(store)
    tasks = list(tasks)
    fold.add(tasks, [store.commits.read(t) for t in tasks])
    return fold.state()


def final_curve(store: RunStore) -> Curve:
    return runs.read_result(store)


# ------------------------------------------------------------------- the kind's fold


def test_the_reducer_folds_with_the_kinds_fold(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=5, every_seconds=1e9)
    assert kind_of(store.kind).fold == "chitally.jobs.cloud:JumpSum"
    assert type(reducer.fold) is JumpSum
    run_some(store, range(store.n_tasks), reducer)
    reducer.finish()
    # checkpointed in batches of 5 or in one batch: the same state, bit for bit
    cp = store.checkpoints.latest()
    state = folded(store, range(store.n_tasks))
    assert sorted(cp.state) == sorted(state)
    for name in state:
        assert cp.state[name].dtype == state[name].dtype
        assert cp.state[name].tobytes() == state[name].tobytes(), name
    # and the same as merging every jump table by hand
    tables = [store.commits.read(t) for t in range(store.n_tasks)]
    values, jumps = merge_jumps([t["values"] for t in tables], [t["jumps"] for t in tables])
    assert state["values"].tobytes() == values.tobytes() and state["jumps"].tolist() == jumps.tolist()
    assert final_curve(store) == expected()


# ---------------------------------------------------------------------- checkpoints


@pytest.mark.parametrize("k", [1, 3, 5])
def test_a_checkpoint_is_written_every_k_tasks(tmp_path, k):
    store = new_store(tmp_path)
    n = store.n_tasks
    reducer = Reducer(store, every_tasks=k, every_seconds=1e9)
    for m, task in enumerate(range(n), start=1):
        run_some(store, [task], reducer)
        cp = store.checkpoints.latest()
        generation = m // k
        assert reducer.generation == generation
        assert reducer.n_covered == m
        if generation == 0:
            assert cp is None
            continue
        assert cp.generation == generation
        assert cp.task_ids.tolist() == list(range(generation * k))
        assert covered(reducer) == list(range(generation * k))
        state = folded(store, range(generation * k))
        assert cp.state["values"].tobytes() == state["values"].tobytes()
        assert cp.state["jumps"].tolist() == state["jumps"].tolist()
    reducer.finish()  # writes the remainder as one more generation
    assert store.checkpoints.latest().generation == -(-n // k)
    assert store.checkpoints.latest().task_ids.tolist() == list(range(n))
    assert final_curve(store) == expected()


def test_every_seconds_also_triggers_a_checkpoint(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=10**6, every_seconds=0.0)
    run_some(store, [0, 1, 2], reducer)
    assert store.checkpoints.latest().generation == 3


def test_checkpoint_record_names_its_tasks(tmp_path):
    store = new_store(tmp_path)
    run_some(store, range(3), Reducer(store, every_tasks=1))
    record = json.loads((checkpoint_file(store, 3, "values").parents[2] / "record.json").read_text())
    assert record["generation"] == 3 and record["n_task_ids"] == 3


# ------------------------------------------------------------------------- resuming


@pytest.mark.parametrize("how", ["new reducer", "runs.execute"])
@pytest.mark.parametrize("stop_after", [1, 7])
def test_a_stopped_run_resumes_from_its_checkpoint_and_covers_the_rest_once(tmp_path, how, stop_after):
    store = new_store(tmp_path)
    n = store.n_tasks
    first = Reducer(store, every_tasks=1)
    run_some(store, range(stop_after), first)
    del first  # the driver stops here

    if how == "new reducer":
        second = Reducer(store, every_tasks=1)
        assert second.generation == stop_after
        assert covered(second) == list(range(stop_after))
        assert second.add_committed() == []  # nothing new, nothing twice
        assert second.n_covered == stop_after
        run_some(store, range(stop_after, n), second)
        assert second.complete
        second.finish()
    else:
        report = runs.execute(store, SerialExecutor())
        assert report.computed == n - stop_after and report.done == n
        assert report.curve == expected()
    final = store.checkpoints.latest()
    assert final.task_ids.tolist() == list(range(n))  # every task once
    assert final.state["values"].tobytes() == folded(store, range(n))["values"].tobytes()
    assert final_curve(store) == expected()


def test_tasks_committed_after_the_last_checkpoint_are_added_not_recomputed(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    reducer = Reducer(store, every_tasks=1)
    run_some(store, range(3), reducer)
    run_some(store, range(3, 8))  # committed, but the driver died before reducing them
    assert store.checkpoints.latest().task_ids.tolist() == [0, 1, 2]

    report = runs.execute(store, SerialExecutor())

    assert report.computed == n - 8
    assert report.curve == expected()
    assert store.checkpoints.latest().task_ids.tolist() == list(range(n))


# ------------------------------------------------------------------ damaged checkpoints


@pytest.mark.parametrize("array", ["task_ids", "values", "jumps"])
def test_a_damaged_newest_checkpoint_falls_back_to_the_previous_one(tmp_path, array, caplog):
    store = new_store(tmp_path)
    n = store.n_tasks
    k = 5
    run_some(store, range(k), Reducer(store, every_tasks=1))
    flip_byte(checkpoint_file(store, k, array))

    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        resumed = Reducer(store, every_tasks=1)
    assert resumed.generation == k - 1
    assert resumed.skipped_generations == (k,)
    assert covered(resumed) == list(range(k - 1))
    assert f"instead of damaged {k}" in caplog.text

    report = runs.execute(store, SerialExecutor())
    assert report.computed == n - k  # task k-1 is committed: added again, not recomputed
    assert report.curve == expected()
    latest = store.checkpoints.latest()
    assert latest.task_ids.tolist() == list(range(n))
    assert latest.generation > k  # the next generation goes above the damaged one


def test_two_damaged_generations_fall_back_two(tmp_path):
    store = new_store(tmp_path)
    k = 5
    run_some(store, range(k), Reducer(store, every_tasks=1))
    flip_byte(checkpoint_file(store, k, "values"))
    flip_byte(checkpoint_file(store, k - 1, "task_ids"))

    resumed = Reducer(store, every_tasks=1)
    assert resumed.generation == k - 2 and resumed.skipped_generations == (k, k - 1)
    assert covered(resumed) == list(range(k - 2))
    assert runs.execute(store, SerialExecutor()).curve == expected()


def test_a_damaged_pointer_falls_back_to_the_newest_recorded_generation(tmp_path):
    store = new_store(tmp_path)
    k = 4
    run_some(store, range(k), Reducer(store, every_tasks=1))
    (Path(store.url) / "checkpoints" / "latest.json").write_text("{not json")

    resumed = Reducer(store, every_tasks=1)
    assert resumed.generation == k and covered(resumed) == list(range(k))
    assert runs.execute(store, SerialExecutor()).curve == expected()


# ---------------------------------------------------------------- damaged task outputs


@pytest.mark.parametrize("damage", ["flipped byte", "truncated record"])
def test_a_damaged_task_output_is_set_aside_and_computed_again(tmp_path, damage):
    store = new_store(tmp_path)
    run_some(store, range(store.n_tasks))
    victim = 4
    record = store.io.get(CommitLog.commit_key(victim))
    if damage == "flipped byte":
        flip_byte(Path(store.url, CommitLog.output_prefix(victim), "jumps", "c", "0"))
    else:
        Path(store.url, CommitLog.commit_key(victim)).write_bytes(record[: len(record) // 2])

    reducer = Reducer(store, every_tasks=1)
    assert reducer.add(victim) is False
    assert not store.commits.committed()[victim] and not reducer.is_covered(victim)
    assert store.commits.state(victim) == "pending"
    kept = sorted(p.relative_to(store.url).as_posix()
                  for p in Path(store.url, "quarantine").glob(f"*/{CommitLog.commit_key(victim)}"))
    assert len(kept) == 1  # the damaged record is kept aside, not deleted

    report = runs.execute(store, SerialExecutor())
    assert report.computed == 1
    assert report.curve == expected()


def test_damaged_outputs_found_when_resuming_are_reported_as_set_aside(tmp_path):
    store = new_store(tmp_path)
    run_some(store, range(6))
    for victim in (2, 5):
        flip_byte(Path(store.url, CommitLog.output_prefix(victim), "values", "c", "0"))

    report = runs.execute(store, SerialExecutor())

    assert sorted(report.set_aside) == [2, 5]
    assert report.computed == store.n_tasks - 6 + 2
    assert report.curve == expected()


# ------------------------------------------------------------------- exactly once


def test_a_task_is_never_folded_twice(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    run_some(store, range(n))
    # folding a table twice would show: each table holds its rows' vertices at 0.0
    t = store.commits.read(0)
    twice = Curve.from_jumps(*merge_jumps([t["values"]] * 2, [t["jumps"]] * 2), eps=EPS,
                             max_dim=CAP, n_points=n)
    once = Curve.from_jumps(t["values"], t["jumps"], eps=EPS, max_dim=CAP, n_points=n)
    assert twice != once

    reducer = Reducer(store, every_tasks=4, every_seconds=1e9)
    for task in [0, 0, 1, 2, 1, 0]:  # pending duplicates, before the first checkpoint
        assert reducer.add(task)
    assert reducer.n_covered == 3
    for task in range(n):  # 4 added: a checkpoint with tasks 0..3 was written
        assert reducer.add(task)
    assert reducer.add(0) and reducer.add(n - 1)  # covered duplicates, after checkpoints
    assert reducer.add_committed() == []
    assert reducer.n_covered == n
    reducer.finish()
    assert final_curve(store) == expected()

    again = Reducer(store, every_tasks=1)  # resumed from the final checkpoint
    for task in range(n):
        assert again.add(task)
    assert again.add_committed() == [] and again.n_covered == n
    again.finish()
    assert final_curve(store) == expected()
    assert store.checkpoints.latest().task_ids.tolist() == list(range(n))


def test_running_a_task_twice_then_adding_it_twice_gives_the_same_curve(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    reducer = Reducer(store, every_tasks=1)
    run_some(store, [0, 1, 2], reducer)
    run_some(store, [1, 2], reducer)  # duplicate attempts, reported done again
    run_some(store, range(3, n), reducer)
    reducer.finish()
    assert final_curve(store) == expected()


def test_finish_refuses_an_incomplete_fold(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=1)
    run_some(store, range(3), reducer)
    assert not reducer.complete
    with pytest.raises(RuntimeError, match=f"{store.n_tasks - 3} tasks are not reduced yet"):
        reducer.finish()
    assert final_curve(store) is None and not store.is_complete()


# ------------------------------------------------------------ bounded driver memory


class Batches:
    """Records the task batches a fold is given."""

    def __init__(self, fold) -> None:
        self.fold, self.batches = fold, []

    def __getattr__(self, name):
        return getattr(self.fold, name)

    def add(self, tasks, outputs):
        self.batches.append(list(tasks))
        self.fold.add(tasks, outputs)


def output_bytes(store: RunStore, task: int) -> int:
    return sum(a.nbytes for a in store.commits.read(task, kind_of(store.kind).fold_reads).values())


def test_outputs_are_folded_once_they_hold_fold_bytes_between_checkpoints(tmp_path):
    """Outputs waiting for a checkpoint are folded when they reach `fold_bytes`, so the
    driver never holds many tasks' outputs at once; the checkpoints and the curve are
    those of folding everything at each checkpoint."""
    store = new_store(tmp_path)
    n = store.n_tasks
    run_some(store, range(n))
    budget = max(output_bytes(store, t) for t in range(n)) + 1  # two outputs pass it
    reducer = Reducer(store, every_tasks=6, every_seconds=1e9, fold_bytes=budget)
    reducer.fold = spy = Batches(reducer.fold)
    for task in range(n):
        assert reducer.add(task)
        assert reducer.n_covered == task + 1
        # folded or not, only a checkpoint covers a task
        assert covered(reducer) == list(range((task + 1) // 6 * 6))
    # a batch is folded as soon as its outputs reach the budget: all but its last task's
    # stay under it; and more batches than checkpoints
    assert all(sum(output_bytes(store, t) for t in b[:-1]) < budget for b in spy.batches)
    assert len(spy.batches) > n // 6 + 1
    assert store.checkpoints.latest().generation == n // 6
    reducer.finish()
    final = store.checkpoints.latest()
    assert final.task_ids.tolist() == list(range(n))
    for name, array in folded(store, range(n)).items():
        assert final.state[name].tobytes() == array.tobytes(), name
    assert final_curve(store) == expected()


def test_a_crash_after_folding_before_the_checkpoint_loses_nothing_and_adds_nothing_twice(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    first = Reducer(store, every_tasks=5, every_seconds=1e9, fold_bytes=1)  # folds every task
    run_some(store, range(8), first)
    assert first.generation == 1 and first.n_covered == 8  # 5 checkpointed, 3 folded
    del first  # the driver dies: tasks 5 to 7 are in no checkpoint

    second = Reducer(store, every_tasks=5, every_seconds=1e9, fold_bytes=1)
    assert covered(second) == list(range(5)) and second.n_covered == 5
    assert second.add_committed() == []  # 5, 6, 7 again, from their committed outputs
    assert second.n_covered == 8
    run_some(store, range(8, n), second)
    second.finish()
    assert store.checkpoints.latest().task_ids.tolist() == list(range(n))
    assert final_curve(store) == expected()
