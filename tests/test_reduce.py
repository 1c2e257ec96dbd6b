"""The checkpointed reducer: resumable, exactly once, robust to a damaged checkpoint.

Runs are cut short by hand: the serial executor is run on a subset of the task ids with
a reducer fed from its events, then that reducer is dropped (a crash) and a new one, or
`runs.execute`, takes over from the newest valid checkpoint. Every final curve must be
identical to `euler_curve` and to networkx ``enumerate_all_cliques`` on the eps-graph
(brute force, ``tests/references.py``). Stores are local paths so checkpoint chunks can
be damaged on disk.
"""

from __future__ import annotations

import functools
import json
from pathlib import Path

import numpy as np
import pytest
from references import brute_force_curve

from chitally import Curve, euler_curve, merge_jumps
from chitally import runs
from chitally.execute import Callbacks, SerialExecutor
from chitally.reduce import Reducer

EPS = 0.55
CAP = 3


@functools.lru_cache(maxsize=None)
def points() -> np.ndarray:
    rng = np.random.default_rng(21)
    pts = rng.random((14, 3))
    return np.concatenate([pts, pts[[2, 9]]])  # two coincident pairs


@functools.lru_cache(maxsize=None)
def expected() -> Curve:
    curve = euler_curve(points(), EPS, CAP)
    assert curve == brute_force_curve(points(), EPS, CAP), (
        "euler_curve differs from networkx enumerate_all_cliques (brute force)"
    )
    return curve


def new_store(tmp_path: Path, name: str = "run", task_cost: float = 1e-9):
    """A store with one task per row (task_cost below any row's cost)."""
    params = runs.Params.checked(EPS, CAP, None, task_cost)
    store = runs.create_or_open(str(tmp_path / f"{name}.zarr"), points(), params)
    assert store.n_tasks == points().shape[0]
    return store


class Feed(Callbacks):
    """Adds each finished task to a reducer, as the run driver does."""

    def __init__(self, reducer: Reducer) -> None:
        self.reducer = reducer

    def task_done(self, result):
        assert self.reducer.add(result.task)


def run_some(store, tasks, reducer: Reducer | None = None) -> None:
    events = Feed(reducer) if reducer is not None else Callbacks()
    outcome = SerialExecutor().run(store.url, list(tasks), events)
    assert sorted(outcome.done) == sorted(tasks) and outcome.failed == {}


def checkpoint_file(store, generation: int, array: str) -> Path:
    return Path(store.url) / "checkpoints" / f"gen-{generation:06d}" / array / "c" / "0"


def damage(path: Path) -> None:
    """Flip one byte of a chunk (its crc32c no longer matches)."""
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))


def covered(reducer: Reducer) -> list[int]:
    return np.flatnonzero(reducer.covered).tolist()


# ---------------------------------------------------------------------- checkpoints


def test_every_task_is_checkpointed_with_every_tasks_1(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=1, every_seconds=1e9)
    order = list(range(store.n_tasks))
    for k, task in enumerate(order[:6], start=1):
        run_some(store, [task], reducer)
        cp = store.latest_checkpoint()
        assert cp.generation == k == reducer.generation
        assert cp.task_ids.tolist() == order[:k]
        assert reducer.n_covered == k and covered(reducer) == order[:k]
        tables = [store.read_jump_table(t) for t in order[:k]]
        values, jumps = merge_jumps([t[0] for t in tables], [t[1] for t in tables])
        assert cp.values.tobytes() == values.tobytes() and cp.jumps.tolist() == jumps.tolist()


def test_every_seconds_also_triggers_a_checkpoint(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=10**6, every_seconds=0.0)
    run_some(store, [0, 1, 2], reducer)
    assert store.latest_checkpoint().generation == 3


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
        curve = second.finish()
    else:
        report = runs.execute(store, SerialExecutor())
        assert report.computed == n - stop_after and report.done == n
        curve = report.curve
    assert curve == expected()
    final = store.latest_checkpoint()
    assert final.task_ids.tolist() == list(range(n))  # every task once
    assert runs.read_result(store) == expected()


def test_tasks_committed_after_the_last_checkpoint_are_added_not_recomputed(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    reducer = Reducer(store, every_tasks=1)
    run_some(store, range(3), reducer)
    run_some(store, range(3, 8))  # committed, but the driver died before reducing them
    assert store.latest_checkpoint().task_ids.tolist() == [0, 1, 2]

    report = runs.execute(store, SerialExecutor())

    assert report.computed == n - 8
    assert report.curve == expected()
    assert store.latest_checkpoint().task_ids.tolist() == list(range(n))


# ------------------------------------------------------------------- damaged checkpoints


@pytest.mark.parametrize("array", ["task_ids", "values", "jumps"])
def test_a_damaged_newest_checkpoint_falls_back_to_the_previous_one(tmp_path, array, caplog):
    store = new_store(tmp_path)
    n = store.n_tasks
    k = 5
    run_some(store, range(k), Reducer(store, every_tasks=1))
    damage(checkpoint_file(store, k, array))

    resumed = Reducer(store, every_tasks=1)
    assert resumed.generation == k - 1
    assert resumed.skipped_generations == (k,)
    assert covered(resumed) == list(range(k - 1))
    assert "damaged" in caplog.text

    report = runs.execute(store, SerialExecutor())
    assert report.computed == n - k  # task k-1 is committed: added again, not recomputed
    assert report.curve == expected()
    assert store.latest_checkpoint().task_ids.tolist() == list(range(n))


def test_two_damaged_generations_fall_back_two(tmp_path):
    store = new_store(tmp_path)
    k = 5
    run_some(store, range(k), Reducer(store, every_tasks=1))
    damage(checkpoint_file(store, k, "values"))
    damage(checkpoint_file(store, k - 1, "task_ids"))

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


def test_a_damaged_task_table_is_set_aside_and_computed_again(tmp_path):
    store = new_store(tmp_path)
    run_some(store, range(store.n_tasks))
    victim = 4
    damage(Path(store.url) / "tables" / f"task-{victim:06d}" / "jumps" / "c" / "0")

    reducer = Reducer(store, every_tasks=1)
    assert reducer.add(victim) is False
    assert not store.committed()[victim] and not reducer.is_covered(victim)

    report = runs.execute(store, SerialExecutor())
    assert report.computed == 1
    assert report.curve == expected()


# ------------------------------------------------------------------- exactly once


def test_a_task_is_never_summed_twice(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    run_some(store, range(n))
    # summing a table twice would show: each table holds its rows' vertices at 0.0
    v, j = store.read_jump_table(0)
    twice = Curve.from_jumps(*merge_jumps([v, v], [j, j]), eps=EPS, max_dim=CAP, n_points=n)
    once = Curve.from_jumps(v, j, eps=EPS, max_dim=CAP, n_points=n)
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
    assert reducer.finish() == expected()

    again = Reducer(store, every_tasks=1)  # resumed from the final checkpoint
    for task in range(n):
        assert again.add(task)
    assert again.add_committed() == [] and again.n_covered == n
    assert again.finish() == expected()
    assert store.latest_checkpoint().task_ids.tolist() == list(range(n))


def test_running_a_task_twice_then_adding_it_twice_gives_the_same_curve(tmp_path):
    store = new_store(tmp_path)
    n = store.n_tasks
    reducer = Reducer(store, every_tasks=1)
    run_some(store, [0, 1, 2], reducer)
    run_some(store, [1, 2], reducer)  # duplicate attempts, reported done again
    run_some(store, range(3, n), reducer)
    assert reducer.finish() == expected()


def test_finish_refuses_an_incomplete_sum(tmp_path):
    store = new_store(tmp_path)
    reducer = Reducer(store, every_tasks=1)
    run_some(store, range(3), reducer)
    assert not reducer.complete
    with pytest.raises(RuntimeError, match="not reduced yet"):
        reducer.finish()
    assert store.read_curve() is None


def test_checkpoint_record_names_its_tasks(tmp_path):
    store = new_store(tmp_path)
    run_some(store, range(3), Reducer(store, every_tasks=1))
    record = json.loads((checkpoint_file(store, 3, "values").parents[2] / "record.json").read_text())
    assert record["generation"] == 3 and record["n_task_ids"] == 3
