"""Executors: one conformance suite run on every executor (serial and Dask).

Every executor must give, through `runs.execute`, the curve that `euler_curve` gives in
process and that two outside references give: networkx ``enumerate_all_cliques`` on the
eps-graph (brute force) and gudhi's ``RipsComplex``/``SimplexTree`` (an independent Rips
implementation), both from ``tests/references.py``. The cases cover clouds in R^2, R^3
and R^5 (uniform, clustered, with coincident points, an integer lattice with exact ties),
cover radii 0.5, 1 and 2 times eps, three task splits (one task per row, a few rows per
task, one task) and caps None, 1, 2, 3: every cloud meets every cap, and every pair of
factor levels appears in some case. The events an executor calls (started, done, retry,
failed) are checked with the fault-injection hook of `chitally.tasks` (``CHITALLY_FAULTS``),
so retry and failure tests are exact, not timing-dependent.

Dask tests share one LocalCluster per module (2 worker processes x 1 thread on
127.0.0.1) and local-path run stores: ``memory://`` stores do not cross processes.
"""

from __future__ import annotations

import contextlib
import functools
import json
import os
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from references import brute_force_curve, gudhi_curve

from chitally import euler_curve
from chitally import runs
from chitally.execute import Callbacks, DaskExecutor, SerialExecutor
from chitally.tasks import FAULTS_ENV, TaskResult

# ------------------------------------------------------------------------- clouds

TINY = 1e-9  # below any row's cost (>= 1): every row is a task of its own
HUGE = 1e18  # above the whole cloud's cost: a single task
SPLITS = ("tiny", "medium", "huge")  # medium: a sixth of the whole cost, a few rows per task
RADII = (0.5, 1.0, 2.0)  # cover radius as a multiple of eps
CAPS = (None, 1, 2, 3)


@functools.lru_cache(maxsize=None)
def cloud(name: str) -> tuple[np.ndarray, float]:
    """A named test cloud and its eps (deterministic)."""
    if name == "uniform-R2":
        return np.random.default_rng(11).random((40, 2)), 0.25
    if name == "clustered-R3":
        rng = np.random.default_rng(12)
        centres = np.array([[0.0, 0.0, 0.0], [0.45, 0.0, 0.0], [0.2, 0.5, 0.3]])
        pts = np.concatenate([c + 0.07 * rng.standard_normal((12, 3)) for c in centres])
        return pts[rng.permutation(pts.shape[0])], 0.3
    if name == "uniform-R5":
        return np.random.default_rng(13).random((36, 5)), 0.7
    if name == "duplicates-R2":
        rng = np.random.default_rng(14)
        base = rng.random((20, 2))
        # a pair, a triple and two more pairs of coincident points
        pts = np.concatenate([base, base[[0, 3, 3, 7, 12]]])
        return pts[rng.permutation(pts.shape[0])], 0.3
    if name == "lattice-R2":
        # integer 5 x 5 grid: lengths 1, sqrt 2, 2 tie exactly, and 2 == eps is kept
        g = np.arange(5, dtype=np.float64)
        pts = np.stack(np.meshgrid(g, g, indexing="ij"), axis=-1).reshape(-1, 2)
        return pts[np.random.default_rng(15).permutation(25)], 2.0
    raise KeyError(name)


CLOUDS = ("uniform-R2", "clustered-R3", "uniform-R5", "duplicates-R2", "lattice-R2")


@functools.lru_cache(maxsize=None)
def references(name: str, cap: int | None):
    """(in-process, brute force, gudhi) curves of a named cloud; they must agree."""
    pts, eps = cloud(name)
    inproc = euler_curve(pts, eps, cap)
    brute = brute_force_curve(pts, eps, cap)
    rips = gudhi_curve(pts, eps, cap)
    return inproc, brute, rips


@dataclass(frozen=True)
class Case:
    cloud: str
    radius: float
    split: str
    cap: int | None

    @property
    def id(self) -> str:
        return f"{self.cloud}-R{self.radius:g}eps-{self.split}-cap{self.cap}"


def _cases() -> list[Case]:
    # Every (cloud, cap) once; radius index (i + j) % 3 and split index (i + 2j) % 3 make
    # every pair of levels of any two factors appear (the map is invertible mod 3).
    out = []
    splits = SPLITS
    for i, name in enumerate(CLOUDS):
        for j, cap in enumerate(CAPS):
            out.append(Case(name, RADII[(i + j) % 3], splits[(i + 2 * j) % 3], cap))
    return out


CASES = _cases()


def test_the_cases_cover_every_pair_of_levels():
    pairs = {
        ("cloud", "radius"): {(c.cloud, c.radius) for c in CASES},
        ("cloud", "split"): {(c.cloud, c.split) for c in CASES},
        ("cap", "radius"): {(c.cap, c.radius) for c in CASES},
        ("cap", "split"): {(c.cap, c.split) for c in CASES},
        ("radius", "split"): {(c.radius, c.split) for c in CASES},
    }
    sizes = {"cloud": len(CLOUDS), "cap": len(CAPS), "radius": len(RADII), "split": len(SPLITS)}
    for (a, b), seen in pairs.items():
        assert len(seen) == sizes[a] * sizes[b], (a, b)
    assert len({(c.cloud, c.cap) for c in CASES}) == len(CLOUDS) * len(CAPS)


# ------------------------------------------------------------------------ fixtures


@pytest.fixture(scope="module")
def client():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
        dashboard_address=":0",
    )
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


@pytest.fixture(params=["serial", "dask"])
def kind(request) -> str:
    return request.param


@pytest.fixture
def make_executor(kind, request):
    """`make_executor(retries=...)` builds an executor of this test's kind."""
    if kind == "serial":
        return lambda **kw: SerialExecutor(**kw)
    client = request.getfixturevalue("client")
    return lambda **kw: DaskExecutor(client, **kw)


@pytest.fixture
def faults(kind, request, monkeypatch, tmp_path):
    """`faults(spec)` arms the CHITALLY_FAULTS hook where this kind's tasks run.

    Serial tasks run here (monkeypatch the environment). Dask workers are running
    processes that read the variable at each task, so it is set and removed in them with
    ``client.run`` (a variable set here now would not reach them).
    """
    log = tmp_path / "fault-log"
    log.mkdir()
    path = tmp_path / "faults.json"
    armed = []

    def arm(spec: dict) -> Path:
        path.write_text(json.dumps({"log": str(log), **spec}))
        if kind == "serial":
            monkeypatch.setenv(FAULTS_ENV, str(path))
        else:
            client = request.getfixturevalue("client")
            client.run(lambda: os.environ.__setitem__(FAULTS_ENV, str(path)))
            armed.append(client)
        return log

    yield arm
    for client in armed:
        client.run(lambda: os.environ.pop(FAULTS_ENV, None))


@contextlib.contextmanager
def dask_faults(client, tmp_path: Path, spec: dict):
    """Arms CHITALLY_FAULTS in the running Dask workers for the block; yields the log."""
    log = tmp_path / "dask-fault-log"
    log.mkdir()
    path = tmp_path / "dask-faults.json"
    path.write_text(json.dumps({"log": str(log), **spec}))
    client.run(lambda: os.environ.__setitem__(FAULTS_ENV, str(path)))
    try:
        yield log
    finally:
        client.run(lambda: os.environ.pop(FAULTS_ENV, None))


def disarm(kind, request, monkeypatch) -> None:
    if kind == "serial":
        monkeypatch.delenv(FAULTS_ENV, raising=False)
    else:
        request.getfixturevalue("client").run(lambda: os.environ.pop(FAULTS_ENV, None))


class Recorder(Callbacks):
    """Every event, in order, as tuples."""

    def __init__(self) -> None:
        self.events: list[tuple] = []

    def task_started(self, task, attempt):
        self.events.append(("started", task, attempt))

    def task_done(self, result):
        self.events.append(("done", result.task, result))

    def task_retry(self, task, attempt, message):
        self.events.append(("retry", task, attempt, message))

    def task_failed(self, task, message, attempts):
        self.events.append(("failed", task, message, attempts))

    def of(self, kind: str, task: int | None = None) -> list[tuple]:
        return [e for e in self.events if e[0] == kind and (task is None or e[1] == task)]


def split_cost(split: str, points, eps, cap=None, radius=None) -> float:
    """The task_cost that makes `split` of this cloud (the planner is pure: no store)."""
    if split == "tiny":
        return TINY
    if split == "huge":
        return HUGE
    _, plan, _ = runs.plan_points(points, runs.Params.checked(eps, cap, radius, HUGE))
    return float(plan.cost.sum()) / 6


def new_store(tmp_path: Path, name: str, points, eps, cap=None, radius=None, split="medium"):
    cost = split_cost(split, points, eps, cap, radius)
    params = runs.Params.checked(eps, cap, radius, cost)
    return runs.create_or_open(str(tmp_path / f"{name}.zarr"), points, params)


def log_lines(log: Path, task: int) -> list[str]:
    f = log / f"task-{task}"
    return f.read_text().splitlines() if f.exists() else []


# --------------------------------------------------------------- conformance suite


class TestExecutorConformance:
    """What every executor must do; parametrised over serial and Dask by `kind`."""

    @pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
    def test_curve_is_exact(self, case, make_executor, tmp_path):
        pts, eps = cloud(case.cloud)
        inproc, brute, rips = references(case.cloud, case.cap)
        store = new_store(tmp_path, "run", pts, eps, case.cap, case.radius * eps, case.split)
        if case.split == "tiny":
            assert store.n_tasks == pts.shape[0]
        elif case.split == "huge":
            assert store.n_tasks == 1
        else:
            assert 1 < store.n_tasks < pts.shape[0]

        report = runs.execute(store, make_executor())

        assert report.failed == {}
        assert report.done == store.n_tasks == report.computed
        assert report.complete and report.exit_code == runs.EXIT_OK
        curve = report.curve
        assert curve == inproc, "distributed curve differs from chitally.euler_curve"
        assert curve == brute, "differs from networkx enumerate_all_cliques on the eps-graph"
        assert curve == rips, "differs from gudhi RipsComplex / SimplexTree"
        assert runs.read_result(store) == curve
        assert curve.n_points == pts.shape[0] and curve.max_dim == case.cap and curve.eps == eps

    def test_every_task_reports_done_once(self, make_executor, tmp_path):
        pts, eps = cloud("uniform-R2")
        store = new_store(tmp_path, "events", pts, eps, 2)
        plan = store.read_plan()
        rec = Recorder()
        tasks = list(range(store.n_tasks))

        outcome = make_executor().run(store.url, tasks, rec, plan.digest())

        assert sorted(outcome.done) == tasks and outcome.failed == {}
        assert sorted(e[1] for e in rec.of("started")) == tasks
        assert sorted(e[1] for e in rec.of("done")) == tasks
        assert rec.of("retry") == [] and rec.of("failed") == []
        for _, task, result in rec.of("done"):
            assert isinstance(result, TaskResult)
            assert result.digest == store.read_commit(task)["digest"]
            assert result.n_owned == int(plan.row_stop[task] - plan.row_start[task])
            started = [i for i, e in enumerate(rec.events) if e[:2] == ("started", task)]
            done = [i for i, e in enumerate(rec.events) if e[:2] == ("done", task)]
            assert started[0] < done[0]
        assert store.committed().all()

    def test_a_task_failing_once_is_retried_then_done(self, make_executor, faults, tmp_path):
        pts, eps = cloud("duplicates-R2")
        store = new_store(tmp_path, "retry", pts, eps, 3)
        victim = store.n_tasks - 1
        log = faults({"fail": {str(victim): 1}})
        rec = Recorder()

        report = runs.execute(store, make_executor(retries=2), events=rec)

        assert report.failed == {} and report.done == store.n_tasks
        mine = [e for e in rec.events if e[1] == victim]
        assert [e[0] for e in mine] == ["started", "retry", "started", "done"]
        _, _, first_attempt, message = mine[1]
        assert first_attempt == mine[0][2] != mine[2][2]
        assert f"injected failure in task {victim}, attempt 1" in message
        assert len(log_lines(log, victim)) == 2
        for task in range(store.n_tasks):
            if task != victim:
                assert [e[0] for e in rec.events if e[1] == task] == ["started", "done"]
                assert len(log_lines(log, task)) == 1
        assert report.curve == references("duplicates-R2", 3)[0]

    @pytest.mark.parametrize("retries", [0, 2])
    def test_a_task_that_keeps_failing_is_reported_with_its_message(
        self, make_executor, faults, tmp_path, retries, kind, request, monkeypatch
    ):
        pts, eps = cloud("lattice-R2")
        store = new_store(tmp_path, "poison", pts, eps, None)
        victim = 0
        log = faults({"poison": [victim]})
        rec = Recorder()

        report = runs.execute(store, make_executor(retries=retries), events=rec)

        message = f"RuntimeError: injected poison in task {victim}"
        assert report.failed == {victim: message}
        assert report.curve is None and report.exit_code == runs.EXIT_INCOMPLETE
        assert report.done == store.n_tasks - 1
        assert [e[0] for e in rec.events if e[1] == victim] == (
            ["started", "retry"] * retries + ["started", "failed"]
        )
        assert rec.of("failed") == [("failed", victim, message, retries + 1)]
        assert all(e[3] == message for e in rec.of("retry"))
        assert len(log_lines(log, victim)) == retries + 1
        recorded = store.failures()
        assert list(recorded) == [victim]
        assert recorded[victim]["message"] == message and recorded[victim]["attempts"] == retries + 1
        st = runs.status(store)
        assert (st["done"], st["failed"], st["pending"]) == (store.n_tasks - 1, 1, 0)
        assert st["failures"] == {victim: message} and not st["complete"]
        assert runs.read_result(store) is None

        # resume once the cause is gone: only the failed task is computed again
        disarm(kind, request, monkeypatch)
        again = runs.execute(store, make_executor(retries=retries))
        assert again.computed == 1 and again.failed == {}
        assert again.curve == references("lattice-R2", None)[0]
        assert store.failures() == {}
        assert runs.status(store)["complete"]
        assert len(log_lines(log, victim)) == retries + 1  # the hook was off for the resume

    def test_a_resume_right_after_exhausted_retries_runs_the_task_afresh(
        self, make_executor, faults, tmp_path
    ):
        # the hook fails the first 3 attempts: the first run exhausts its retries, the
        # resume (submitted at once, reusing the task's names) succeeds on attempt 4
        pts, eps = cloud("uniform-R5")
        store = new_store(tmp_path, "resume", pts, eps, 1)
        victim = 0
        log = faults({"fail": {str(victim): 3}})
        ex = make_executor(retries=2)
        first = runs.execute(store, ex)
        assert first.failed == {victim: f"RuntimeError: injected failure in task {victim}, attempt 3"}
        second = runs.execute(store, ex)
        assert second.failed == {} and second.computed == 1
        assert len(log_lines(log, victim)) == 4
        assert second.curve == references("uniform-R5", 1)[0]

    def test_tasks_already_committed_are_not_computed_again(self, make_executor, tmp_path):
        pts, eps = cloud("uniform-R5")
        store = new_store(tmp_path, "again", pts, eps, 2)
        first = runs.execute(store, make_executor())
        second = runs.execute(store, make_executor())
        assert first.computed == store.n_tasks and second.computed == 0
        assert first.curve == second.curve == references("uniform-R5", 2)[0]

    def test_running_a_committed_task_again_is_harmless(self, make_executor, tmp_path):
        pts, eps = cloud("clustered-R3")
        store = new_store(tmp_path, "dup", pts, eps, 2)
        tasks = list(range(store.n_tasks))
        ex = make_executor()
        first = ex.run(store.url, tasks, Callbacks(), "")
        digests = [store.read_commit(t)["digest"] for t in tasks]
        second = ex.run(store.url, tasks[:3], Callbacks(), "")
        assert sorted(first.done) == tasks and sorted(second.done) == tasks[:3]
        assert [store.read_commit(t)["digest"] for t in tasks] == digests
        assert runs.execute(store, ex).curve == references("clustered-R3", 2)[0]


# ------------------------------------------------------------------- Dask specifics


@pytest.mark.parametrize("window", [1, 3])
def test_a_window_smaller_than_the_task_count_runs_every_task(client, tmp_path, window):
    pts, eps = cloud("uniform-R2")
    store = new_store(tmp_path, "window", pts, eps, 1, split="tiny")
    n = store.n_tasks
    assert n > 10 * window
    in_flight = [0]
    peak = [0]

    class Watch(Recorder):
        def task_started(self, task, attempt):
            super().task_started(task, attempt)
            in_flight[0] += 1
            peak[0] = max(peak[0], in_flight[0])

        def task_done(self, result):
            super().task_done(result)
            in_flight[0] -= 1

    rec = Watch()
    report = runs.execute(store, DaskExecutor(client, window=window), events=rec)

    assert report.done == report.computed == n and report.failed == {}
    assert sorted(e[1] for e in rec.of("done")) == list(range(n))
    assert 1 <= peak[0] <= window
    assert report.curve == euler_curve(pts, eps, 1)


def test_dask_keys_name_the_run_and_the_task(client, tmp_path, monkeypatch):
    pts, eps = cloud("uniform-R2")
    store = new_store(tmp_path, "keys", pts, eps, 2)
    digest = store.read_plan().digest()
    seen: list[str] = []
    # the executor releases each future once done: watch the keys as they are submitted
    submit = client.submit

    def spy(*args, **kwargs):
        seen.append(kwargs["key"])
        return submit(*args, **kwargs)

    monkeypatch.setattr(client, "submit", spy)
    DaskExecutor(client).run(store.url, list(range(store.n_tasks)), Callbacks(), digest)
    # chitally-task-<plan digest>-<store hash>-<task>: one prefix per run, so the dashboard
    # groups a run's tasks and two stores of one plan never share a key
    prefixes = {key.rsplit("-", 1)[0] for key in seen}
    assert len(prefixes) == 1 and prefixes.pop().startswith(f"chitally-task-{digest}-")
    assert sorted(int(key.rsplit("-", 1)[1]) for key in seen) == list(range(store.n_tasks))


def test_two_stores_of_one_plan_running_at_once_do_not_share_tasks(client, tmp_path):
    pts, eps = cloud("uniform-R2")
    first = new_store(tmp_path, "first", pts, eps, 2, split="huge")
    second = new_store(tmp_path, "second", pts, eps, 2, split="huge")
    digest = first.read_plan().digest()
    assert second.read_plan().digest() == digest
    started = threading.Event()

    class Signal(Callbacks):
        def task_started(self, task, attempt):
            started.set()

    with dask_faults(client, tmp_path, {"delay": 2.0}):  # keeps the first run's task in flight
        thread = threading.Thread(
            target=DaskExecutor(client).run, args=(first.url, [0], Signal(), digest)
        )
        thread.start()
        assert started.wait(30)
        outcome = DaskExecutor(client).run(second.url, [0], Callbacks(), digest)
        thread.join(60)
    assert outcome.done == [0]
    assert first.committed()[0]
    assert second.committed()[0], "the second store's task was reported done but never committed"


def test_a_worker_lost_between_data_and_commit_is_recomputed_by_dask(client, tmp_path):
    # Last in the module: it ends a worker process (the nanny starts a fresh one).
    pts, eps = cloud("clustered-R3")
    store = new_store(tmp_path, "lost", pts, eps, 2)
    victim = 1
    try:
        with dask_faults(client, tmp_path, {"exit_between": [victim]}) as log:
            rec = Recorder()
            report = runs.execute(store, DaskExecutor(client), events=rec)
    finally:
        client.wait_for_workers(2, timeout=60)
    attempts = log_lines(log, victim)
    assert len(attempts) == 2 and attempts[0].split()[1] != attempts[1].split()[1]  # two pids
    assert report.failed == {} and report.computed == report.done == store.n_tasks
    assert sorted(e[1] for e in rec.of("done")) == list(range(store.n_tasks))
    assert report.curve == references("clustered-R3", 2)[0]
