"""Failures during a run: lost workers, a killed driver, a lost scheduler, a lost lease,
a task dying between its outputs and its commit record, a task that always fails, damaged
task outputs, commit records, checkpoints and inputs, a store without its completion
marker, a read-only store, interruptions from the terminal, a second writer, and a store
reused with other input or parameters.

Faults are injected deterministically from the test side (`faultwrap`: a wrapper of the
engine's task function; every attempt appends a line with its pid to a log, so the tests
count exactly which tasks were computed and how often). Processes are real (the
`chitally` command, ``dask scheduler``, ``dask worker``, a LocalCluster's workers), each in
its own process group, and every wait polls the run store's files or the attempt log
with a timeout. Every run must end with exactly the curve of `chitally.euler_curve` on
the same points, itself checked against outside references (networkx
``enumerate_all_cliques``, brute force; gudhi's Rips filtration).
"""

from __future__ import annotations

import json
import logging
import re
import shutil
import signal
import subprocess
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import (
    child_env,
    chitally,
    chunk,
    cloud,
    command,
    commits,
    explain,
    flip_byte,
    lease_holder,
    make_faults,
    processes,  # noqa: F401 - fixture
    start_cluster,
    terminals,  # noqa: F401 - fixture
    tree_digest,
    tree_times,
    truncate,
    wait_for,
    write_points,
)
from references import brute_force_curve, gudhi_curve

import chitally as ct
from chitally.cli import EXIT_BUSY, EXIT_FAILURE, EXIT_INCOMPLETE, EXIT_USAGE, main
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs.cloud import Params, create_or_open, plan_points
from chitally.runs import execute, open_run, read_result
from chitally.store import StoreIO
from chitally.store.lease import acquire

pytestmark = pytest.mark.timeout(180)

EPS = 0.03
COST = 4000  # 38 tasks for these 2,500 points
EXIT_BETWEEN = 17  # faultwrap's exit status for a process ended between outputs and commit


@pytest.fixture(scope="module")
def points() -> np.ndarray:
    return cloud(2500, seed=5)


@pytest.fixture(scope="module")
def expected(points: np.ndarray) -> ct.Curve:
    """The curve by `euler_curve`, which must equal two outside references: every
    simplex listed by networkx ``enumerate_all_cliques`` (references.brute_force_curve),
    and gudhi's Rips filtration (references.gudhi_curve)."""
    curve = ct.euler_curve(points, EPS)
    assert curve == brute_force_curve(points, EPS, None)  # networkx, brute force
    assert curve == gudhi_curve(points, EPS, None)  # gudhi RipsComplex
    return curve


@pytest.fixture(scope="module")
def n(points: np.ndarray) -> int:
    """The number of tasks of every run here (the planner's, before any store exists)."""
    _, plan, _ = plan_points(points, Params.checked(EPS, None, None, COST))
    return plan.n_tasks


@pytest.fixture
def src(tmp_path: Path, points: np.ndarray) -> Path:
    return write_points(tmp_path / "points.npy", points)


@pytest.fixture(scope="module")
def stopped_at_12(tmp_path_factory, points) -> Path:
    """A run store whose serial run died in task 12, between that task's outputs and its
    commit record: tasks 0 to 11 committed, no checkpoint, the lease left by a dead
    process. Tests work on copies."""
    folder = tmp_path_factory.mktemp("stopped")
    src = write_points(folder / "points.npy", points)
    run = folder / "run.zarr"
    faults = make_faults(folder, exit_between=[12])
    res = chitally(*run_args(src, run, "--serial"), faults=faults)
    assert res.returncode == EXIT_BETWEEN, explain(res)
    assert commits(run) == set(range(12))
    assert not (run / "checkpoints" / "latest.json").exists()
    return run


@pytest.fixture(scope="module")
def complete(tmp_path_factory, points, expected) -> Path:
    """A complete run store of the points (serial). Tests work on copies."""
    folder = tmp_path_factory.mktemp("complete")
    src = write_points(folder / "points.npy", points)
    run = folder / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"))
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    return run


def copy_store(store: Path, to: Path) -> Path:
    shutil.copytree(store, to)
    return to


def run_args(src: Path, run: Path, *extra: object) -> list[str]:
    return ["run", str(src), "--eps", str(EPS), "--task-cost", str(COST), "--out", str(run),
            "--no-progress", *map(str, extra)]


def result_of(run: Path) -> ct.Curve | None:
    return read_result(open_run(str(run)))


def one_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


def error_line(text: str) -> str:
    """The one `chitally: error:` line of an output (exactly one must be there)."""
    lines = [line for line in text.splitlines() if line.startswith("chitally: error: ")]
    assert len(lines) == 1, text
    return lines[0]


def done_line(n_done: int, n_all: int, computed: int, failed: int = 0) -> str:
    return f"{n_done}/{n_all} tasks done, {computed} computed now, {failed} failed"


def gated(tmp: Path, first: int, n: int) -> tuple[Path, dict[str, str]]:
    """A gate file (not yet there) and a `gate` spec holding every task from `first` on."""
    gate = tmp / "gate"
    return gate, {str(t): str(gate) for t in range(first, n)}


def under_way(faults, first: int, count: int):
    """The tasks from `first` on whose attempts have started (and wait at their gate)."""
    return len([t for t in faults.attempts() if t >= first]) >= count


#: Lines of a LocalCluster run that are not ours to judge: the dashboard link, and
#: distributed's warning when another process holds the default dashboard port.
NOISE = re.compile(r"^(dashboard: http://127\.0\.0\.1:\d+/status|  from another machine: ssh .*|"
                   r".*Port \d+ is already in use.*|Perhaps you already have a cluster running\?|"
                   r".*Hosting the HTTP server on port.*|\s*warnings\.warn\(|)$")


def terminal_lines(text: str) -> list[str]:
    """What a terminal shows, without echoed ^C, blank lines and the NOISE."""
    lines = [line.replace("^C", "").rstrip() for line in text.splitlines()]
    return [line for line in lines if line and not NOISE.match(line)]


# ------------------------------------------------------------------ lost processes


@pytest.mark.cluster
def test_killed_worker_loses_nothing(tmp_path, processes, src, expected, n):
    """SIGKILL one of two workers (no nanny: it stays dead) while half the tasks are
    committed: the other worker takes over its task and the curve is exact."""
    # task 0 (submitted first) stalls on its first attempt: its worker is then certainly
    # busy with it when killed, and its second attempt goes through
    faults = make_faults(tmp_path, delay=0.02, delay_first={"0": 120})
    cluster = start_cluster(processes, tmp_path / "cluster", 2, nanny=False)
    run = tmp_path / "run.zarr"
    driver = processes.start(command(*run_args(src, run, "--scheduler", cluster.address),
                                     faults=faults), name="run")
    wait_for(lambda: len(commits(run)) >= n // 2 and faults.pids(0), 90,
             "half the tasks committed and task 0 under way")
    pid = faults.pids(0)[0]
    victim = cluster.worker_of_pid(pid)
    assert 0 not in commits(run)
    processes.kill(victim)

    assert driver.wait(120) == 0, driver.stderr()
    assert result_of(run) == expected
    # task 0 ran twice (the second time elsewhere); every other task once
    assert faults.attempts() == {t: 2 if t == 0 else 1 for t in range(n)}
    survivor = next(w for w in cluster.workers if w is not victim)
    assert faults.pids(0) == [pid, survivor.pid]
    assert commits(run) == set(range(n))
    assert done_line(n, n, n) in driver.stderr()


def test_killed_run_resumes_without_recomputing(tmp_path, processes, src, expected, n):
    """SIGKILL the whole `chitally run` process group at about 30% of the commits:
    `resume` computes only the tasks without a commit record."""
    faults = make_faults(tmp_path, delay=0.1)
    run = tmp_path / "run.zarr"
    driver = processes.start(command(*run_args(src, run, "--serial"), faults=faults), name="run")
    wait_for(lambda: len(commits(run)) >= 0.3 * n, 60, "30% of the tasks committed")
    assert processes.kill(driver) == -signal.SIGKILL
    before = commits(run)  # listed after the kill: exactly what the run committed
    assert 0.3 * n <= len(before) < n
    assert not (run / "result" / "record.json").exists()
    holder = lease_holder(run)  # left behind by the killed run, which is gone
    assert holder["pid"] == driver.pid and holder["verdict"] == "dead"
    assert all(faults.attempts()[t] == 1 for t in before)

    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert done_line(n, n, n - len(before)) in res.stderr
    attempts = faults.attempts()
    assert set(attempts) == set(range(n))
    assert all(attempts[t] == 1 for t in before)
    # only the task under way at the kill (if any) was tried twice
    assert len([t for t in attempts if attempts[t] > 1]) <= 1
    assert lease_holder(run) is None


@pytest.mark.parametrize("how", ["serial", pytest.param("dask", marks=pytest.mark.slow)])
def test_task_dying_between_data_and_commit_is_recomputed(tmp_path, src, expected, n, how):
    """A task attempt writes its outputs and its process dies before the commit record.
    With Dask the worker dies (its nanny starts a new one) and the same run recomputes the
    task; serially the driver itself dies, and `resume` recomputes it."""
    victim = 12
    faults = make_faults(tmp_path, exit_between=[victim])
    run = tmp_path / "run.zarr"
    if how == "dask":
        res = chitally(*run_args(src, run, "--workers", 2, "--threads", 1), faults=faults)
        assert res.returncode == 0, explain(res)
    else:
        res = chitally(*run_args(src, run, "--serial"), faults=faults)
        assert res.returncode == EXIT_BETWEEN, explain(res)  # the driver was the process that died
        # serially, tasks run in order: those before the victim are committed, and the
        # victim's outputs are on disk without a commit record
        assert commits(run) == set(range(victim))
        assert chunk(run, victim, "values").is_file() and chunk(run, victim, "jumps").is_file()
        res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
        assert res.returncode == 0, explain(res)
        assert done_line(n, n, n - victim) in res.stderr
    assert result_of(run) == expected
    attempts = faults.attempts()
    assert set(attempts) == set(range(n)) and attempts[victim] == 2
    died = faults.pids(victim)[0]
    assert faults.pids(victim)[1] != died
    # Dask also recomputes results that were still held by the dead worker: only tasks
    # whose first attempt ran in the process that died may have run twice
    again = {t for t, k in attempts.items() if k > 1} - {victim}
    assert all(attempts[t] == 2 and faults.pids(t)[0] == died for t in again)
    if how == "serial":
        assert not again
    assert commits(run) == set(range(n))


@pytest.mark.cluster
def test_lost_scheduler_exits_3_and_resume_recomputes_nothing(tmp_path, processes, src, expected, n):
    """SIGKILL an external scheduler at about 20% of the commits: the driver exits 3
    within seconds with one line saying the scheduler was lost and that `chitally
    resume` continues, releasing the lease; `resume` on a new cluster gives the exact
    curve and computes only the tasks without a commit record.

    The client's loss of its scheduler cancels every future; the executor takes that as
    the end at once (it does not wait for distributed's reconnection attempts, 30 s by
    default), so no Dask timeout is lowered here.
    """
    first = n // 5
    _, gates = gated(tmp_path, first, n)
    faults = make_faults(tmp_path, gate=gates)
    cluster = start_cluster(processes, tmp_path / "cluster", 2)
    run = tmp_path / "run.zarr"
    driver = processes.start(command(*run_args(src, run, "--scheduler-file", cluster.scheduler_file,
                                               "--lost-after", 10), faults=faults), name="run")
    # both workers wait at the gate: exactly the tasks before it are committed
    wait_for(lambda: commits(run) == set(range(first)) and under_way(faults, first, 2), 90,
             f"tasks 0 to {first - 1} committed and both workers at the gate")
    t0 = time.monotonic()
    processes.kill(cluster.scheduler)
    status = driver.wait(60)
    seconds = time.monotonic() - t0
    assert status == EXIT_INCOMPLETE, explain_proc(driver)
    assert seconds < 20, f"the driver took {seconds:.1f} s to notice the lost scheduler"
    line = one_line(driver.stderr())
    assert re.match(rf"chitally: error: the Dask scheduler was lost \(client \w+, scheduler "
                    rf"{re.escape(cluster.address)}\); ", line), line
    assert line.endswith(f"`chitally resume {run}` continues on a new cluster")
    assert lease_holder(run) is None
    assert commits(run) == set(range(first))
    for worker in cluster.workers:  # the old cluster is gone for good
        processes.kill(worker)

    faults.write()  # no more gates
    res = chitally("resume", run, "--workers", 2, "--threads", 1, "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert done_line(n, n, n - first) in res.stderr
    attempts = faults.attempts()
    assert set(attempts) == set(range(n))
    assert all(attempts[t] == 1 for t in range(first))  # committed: never computed again
    # the two attempts stopped at the gate ran again; no other task ran twice
    twice = {t for t in attempts if attempts[t] == 2}
    assert len(twice) == 2 and twice <= set(range(first, n)) and max(attempts.values()) == 2


def explain_proc(proc) -> str:
    return f"--- stdout\n{proc.stdout()}\n--- stderr\n{proc.stderr()}"


# ------------------------------------------------------------------------- failures


def test_poison_task_then_resume_after_fix(tmp_path, src, expected, n):
    """A task that always fails ends the run with exit 3 naming it, after its retries;
    every other task stays committed. Once the cause is gone, `resume` computes only it."""
    poison = 7
    faults = make_faults(tmp_path, poison=[poison])
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--workers", 2, "--threads", 1), faults=faults)
    assert res.returncode == EXIT_INCOMPLETE, explain(res)
    assert f"task {poison} failed: InjectedFault: injected poison in task {poison}" in res.stderr
    assert f"chitally resume {run}" in res.stderr
    assert "Compute Failed" not in res.stderr  # the workers do not repeat what the driver says
    assert commits(run) == set(range(n)) - {poison}
    assert faults.attempts() == {t: 3 if t == poison else 1 for t in range(n)}  # --retries 2
    assert result_of(run) is None
    runner = CliRunner()
    info = json.loads(runner.invoke(main, ["status", str(run), "--json"]).stdout)
    assert (info["done"], info["failed"], info["pending"], info["complete"]) == (n - 1, 1, 0, False)
    assert f"injected poison in task {poison}" in info["failures"][str(poison)]
    # export of an incomplete run says so, with the resumable exit code
    res = runner.invoke(main, ["export", str(run)])
    assert res.exit_code == EXIT_INCOMPLETE and "has no result yet" in one_line(res.stderr)

    faults.write()  # the cause is fixed
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert done_line(n, n, 1) in res.stderr
    assert result_of(run) == expected
    assert faults.attempts() == {t: 4 if t == poison else 1 for t in range(n)}
    info = json.loads(runner.invoke(main, ["status", str(run), "--json"]).stdout)
    assert (info["done"], info["failed"], info["pending"], info["complete"]) == (n, 0, 0, True)


# --------------------------------------------------------------------- damaged data


def damage_two_tasks(run: Path, truncated: int = 3, flipped: int = 8) -> tuple[int, int]:
    """Truncate one committed task's values chunk and flip a byte in another's jumps."""
    truncate(chunk(run, truncated, "values"))
    flip_byte(chunk(run, flipped, "jumps"))
    return truncated, flipped


def quarantined(run: Path) -> set[str]:
    """The commit records kept in the quarantine (relative to their quarantine folder)."""
    return {p.relative_to(p.parents[1]).as_posix() for p in (run / "quarantine").rglob("task-*.json")}


def test_damaged_result_and_task_outputs_of_a_complete_run(tmp_path, complete, expected, n):
    """A damaged final result is refused on export (exit 3, with the way out), reported
    by `status`, and written again by `resume`, which computes nothing. Then two
    committed task outputs are damaged and the result and checkpoints removed, so the
    outputs must be read again: both are set aside (copies kept in the quarantine),
    recomputed, and the curve is exact."""
    run = copy_store(complete, tmp_path / "run.zarr")
    faults = make_faults(tmp_path)
    flip_byte(run / "result" / "values" / "c" / "0")
    runner = CliRunner()
    res = runner.invoke(main, ["export", str(run)])
    assert res.exit_code == EXIT_INCOMPLETE, res.output
    line = one_line(res.stderr)
    assert f"the result in {run} is unreadable: " in line and "`chitally resume` writes it again" in line
    res = runner.invoke(main, ["status", str(run), "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.stdout)
    assert info["complete"] is False and f"the result in {run} is unreadable: " in info["result_damaged"]
    assert info["done"] == n
    res = runner.invoke(main, ["status", str(run)])
    assert res.exit_code == 0 and "the result is damaged" in res.stdout, res.output
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert done_line(n, n, 0) in res.stderr  # the last checkpoint covers every task
    assert result_of(run) == expected
    assert faults.attempts() == {}

    damaged = damage_two_tasks(run)
    shutil.rmtree(run / "result")
    shutil.rmtree(run / "checkpoints")
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert done_line(n, n, 2) in res.stderr
    assert f"damaged outputs set aside and computed again: tasks {sorted(damaged)}" in res.stderr
    assert result_of(run) == expected
    assert faults.attempts() == {t: 1 for t in damaged}
    assert quarantined(run) == {f"commits/task-{t:06d}.json" for t in damaged}


def test_damaged_task_output_before_resume(tmp_path, stopped_at_12, expected, n):
    """Mid-way: the driver died (deterministically, in task 12), two of the tasks it
    committed are damaged on disk, and `resume` recomputes them with the rest."""
    run = copy_store(stopped_at_12, tmp_path / "run.zarr")
    faults = make_faults(tmp_path)
    damaged = damage_two_tasks(run)
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert done_line(n, n, n - 12 + 2) in res.stderr
    assert f"damaged outputs set aside and computed again: tasks {sorted(damaged)}" in res.stderr
    assert faults.attempts() == {t: 1 for t in (*damaged, *range(12, n))}


def test_truncated_commit_record_status_reports_it_and_resume_recomputes(tmp_path, stopped_at_12,
                                                                         expected, n):
    """A commit record cut in half: `status` exits 0 and reports the damage (text and
    JSON); `resume` sets the task aside and computes it again with the pending ones."""
    run = copy_store(stopped_at_12, tmp_path / "run.zarr")
    truncate(run / "commits" / "task-000005.json")
    faults = make_faults(tmp_path)
    runner = CliRunner()
    res = runner.invoke(main, ["status", str(run)])
    assert res.exit_code == 0, res.output
    assert "damaged commit records (resume recomputes them): tasks [5]" in res.stdout
    assert f"12/{n} tasks done" in res.stdout
    res = runner.invoke(main, ["status", str(run), "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.stdout)
    assert info["damaged_commit_records"] == [5] and info["complete"] is False

    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert "damaged outputs set aside and computed again: tasks [5]" in res.stderr
    assert done_line(n, n, n - 12 + 1) in res.stderr
    assert faults.attempts() == {t: 1 for t in (5, *range(12, n))}
    assert quarantined(run) == {"commits/task-000005.json"}


def test_damaged_checkpoint_falls_back_to_the_one_before(tmp_path, points, expected, caplog):
    """The reducer checkpoints after every task; the run stops after 10 tasks and the
    newest generation is damaged: resuming starts from the generation before it, adds the
    task that generation lacks from its commit record, recomputes nothing."""
    faults = make_faults(tmp_path)
    run = tmp_path / "run.zarr"
    store = create_or_open(str(run), points, Params.checked(EPS, None, None, COST))

    class Stop(Exception):
        pass

    class StopAfter(Callbacks):
        done = 0

        def task_done(self, result):
            self.done += 1
            if self.done == 10:
                raise Stop

    with pytest.raises(Stop):
        execute(store, SerialExecutor(task_function=faults.wrapper()), events=StopAfter(),
                checkpoint_every=1)
    assert commits(run) == set(range(10))
    newest = store.checkpoints.latest()
    assert newest.generation == 10 and sorted(newest.task_ids.tolist()) == list(range(10))
    flip_byte(run / "checkpoints" / "gen-000010" / "values" / "c" / "0")
    fallback = store.checkpoints.latest()
    assert fallback.generation == 9 and fallback.skipped == (10,)
    assert sorted(fallback.task_ids.tolist()) == list(range(9))

    with caplog.at_level(logging.WARNING, logger="chitally"):
        report = execute(store, SerialExecutor(task_function=faults.wrapper()), checkpoint_every=1)
    assert "using checkpoint generation 9 instead of damaged 10" in caplog.text
    assert report.curve == expected and result_of(run) == expected
    assert report.computed == store.n_tasks - 10
    assert faults.attempts() == {t: 1 for t in range(store.n_tasks)}


@pytest.mark.parametrize("how", ["serial", "dask"])
def test_damaged_inputs_stop_the_run_with_one_line(tmp_path, stopped_at_12, how):
    """A chunk of the stored points fails its checksum: no output can be trusted to come
    from the original input, so the run stops at once (exit 1) with one line saying the
    run must be created again; no task is committed or recorded as failed, and the
    workers do not flood the terminal with the same error."""
    run = copy_store(stopped_at_12, tmp_path / "run.zarr")
    flip_byte(run / "inputs" / "points" / "c" / "0" / "0")
    before = commits(run)
    faults = make_faults(tmp_path)
    where = ["--serial"] if how == "serial" else ["--workers", 2, "--threads", 1]
    res = chitally("resume", run, *where, "--no-progress", faults=faults)
    assert res.returncode == EXIT_FAILURE, explain(res)
    line = error_line(res.stderr)
    assert f"the inputs stored in {run} are damaged (points: " in line
    assert line.endswith("create the run again from the original input")
    assert "Traceback" not in res.stderr and "Compute Failed" not in res.stderr
    if how == "serial":
        # the store's lease was left by a process that died: taken over, and said so
        others = [x for x in res.stderr.strip().splitlines() if x != line]
        assert len(others) == 1 and "taking over the lease of chitally cloud run (pid" in others[0], res.stderr
        assert faults.attempts() == {12: 1}  # the first task stops the run
    else:
        # at most a couple of lines of the cluster stopping besides; before, every task
        # in flight printed a multi-line worker report
        assert len(terminal_lines(res.stderr)) <= 3, res.stderr
    assert commits(run) == before
    assert not (run / "failures").exists() or not any((run / "failures").iterdir())
    assert lease_holder(run) is None


# ------------------------------------------------------------ the completion marker


def test_complete_store_without_its_completion_marker(tmp_path, complete, src, expected):
    """A complete store whose `created.json` is gone: the same input and parameters
    rebuild the marker, and the run is reported complete with nothing computed."""
    run = copy_store(complete, tmp_path / "run.zarr")
    (run / "created.json").unlink()
    res = CliRunner().invoke(main, run_args(src, run, "--serial"))
    assert res.exit_code == 0, res.output
    assert "0 computed now" in res.stderr
    assert json.loads((run / "created.json").read_text())["rebuilt"]
    assert result_of(run) == expected


def test_store_without_its_completion_marker(tmp_path, src, stopped_at_12, points, expected, n):
    """A store whose `created.json` is gone (its creation looks unfinished) but which
    holds committed tasks: other parameters are refused in one line and nothing is
    deleted; the same input and parameters rebuild the marker and keep every commit;
    `--discard` deletes the work and starts over with the new parameters."""
    run = copy_store(stopped_at_12, tmp_path / "run.zarr")
    (run / "created.json").unlink()
    before = tree_digest(run)
    res = chitally("run", src, "--eps", 0.031, "--task-cost", COST, "--out", run, "--serial",
                   "--no-progress")
    assert res.returncode == EXIT_USAGE, explain(res)
    line = one_line(res.stderr)
    assert f"{run} has no completion marker but holds 12 committed tasks; nothing was deleted" in line
    assert "--discard" in line
    assert tree_digest(run) == before

    faults = make_faults(tmp_path)
    res = chitally(*run_args(src, run, "--serial"), faults=faults)
    assert res.returncode == 0, explain(res)
    assert (run / "created.json").is_file()
    assert done_line(n, n, n - 12) in res.stderr
    assert result_of(run) == expected
    assert faults.attempts() == {t: 1 for t in range(12, n)}  # no commit computed again

    other = copy_store(stopped_at_12, tmp_path / "other.zarr")
    (other / "created.json").unlink()
    faults.clear_log()
    res = chitally("run", src, "--eps", 0.031, "--out", other, "--serial", "--no-progress",
                   "--discard", faults=faults)
    assert res.returncode == 0, explain(res)
    store = open_run(str(other))
    assert store.params["eps"] == 0.031
    assert faults.attempts() == {t: 1 for t in range(store.n_tasks)}  # all computed anew
    curve = result_of(other)
    assert curve == ct.euler_curve(points, 0.031)
    assert curve == gudhi_curve(points, 0.031, None)  # gudhi RipsComplex


# ------------------------------------------------------------------ one store, one run


def test_second_run_on_a_busy_store_is_refused(tmp_path, processes, src, expected, n):
    """While a run holds the store, a second `run` or a `resume` exits 4 naming the
    holder and computes nothing; the first run then completes with the exact curve."""
    # the first run's task 5 waits for a gate file: the run is surely under way, holding
    # the store, for as long as the test needs
    gate = tmp_path / "gate"
    faults = make_faults(tmp_path, gate={"5": str(gate)})
    run = tmp_path / "run.zarr"
    first = processes.start(command(*run_args(src, run, "--serial"), faults=faults), name="first")
    wait_for(lambda: faults.pids(5), 60, "the first run to reach task 5")
    assert commits(run) == set(range(5))
    for args in (run_args(src, run, "--serial"), ["resume", str(run), "--serial", "--no-progress"]):
        res = chitally(*args, faults=faults)
        assert res.returncode == EXIT_BUSY, explain(res)
        line = one_line(res.stderr)
        assert f"is in use by chitally cloud run (pid {first.pid} on " in line and "last heartbeat" in line
    assert first.popen.poll() is None
    assert commits(run) == set(range(5))
    gate.touch()
    assert first.wait(120) == 0, first.stderr()
    assert result_of(run) == expected
    assert faults.attempts() == {t: 1 for t in range(n)}


def write_lease(run: Path, generation: int, host: str, started: datetime, beat: datetime | None = None) -> None:
    """A lease generation as another machine's run would leave it."""
    doc = {"owner": "chitally pid 4242 on elsewhere", "host": host, "pid": 4242,
           "started": started.isoformat(), "token": "theirs", "generation": generation}
    (run / "lease").mkdir(exist_ok=True)
    (run / "lease" / f"gen-{generation:09d}.json").write_text(json.dumps(doc))
    if beat is not None:
        (run / "lease" / f"beat-{generation:09d}.json").write_text(
            json.dumps({"time": beat.isoformat(), "token": "theirs"}))


def test_busy_store_is_refused_before_any_cluster_starts(tmp_path, points, monkeypatch):
    """A Dask `resume` of a store leased elsewhere exits 4 without connecting to or
    starting a cluster, and leaves the holder's lease alone."""
    from chitally import cluster

    run = tmp_path / "run.zarr"
    create_or_open(str(run), points, Params.checked(EPS, None, None, COST))
    now = datetime.now(timezone.utc)
    write_lease(run, 1, "elsewhere", now, now)

    def no_cluster(*args, **kwargs):
        raise AssertionError("a cluster was started for a run that the lease refuses")

    monkeypatch.setattr(cluster, "connect", no_cluster)
    before = tree_digest(run)
    res = CliRunner().invoke(main, ["resume", str(run), "--no-progress"])
    assert res.exit_code == EXIT_BUSY, res.output
    line = one_line(res.stderr)
    assert "(pid 4242 on elsewhere, last heartbeat" in line and "is in use by" in line
    assert "dashboard" not in res.stderr
    assert tree_digest(run) == before


def test_stale_lease_is_taken_over_only_when_asked(tmp_path, complete, expected):
    """A lease left by a process on another machine: refused while its heartbeat is
    fresh, even with --takeover; once stale, refused with a hint, taken with --takeover."""
    run = copy_store(complete, tmp_path / "run.zarr")
    (run / "result" / "record.json").unlink()  # incomplete again: resume needs the lease
    runner = CliRunner()
    now = datetime.now(timezone.utc)
    write_lease(run, 2, "elsewhere", now - timedelta(hours=1), now)
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress", "--takeover"])
    assert res.exit_code == EXIT_BUSY, res.output
    assert "(pid 4242 on elsewhere, last heartbeat" in one_line(res.stderr)
    assert "takeover" not in res.stderr

    write_lease(run, 2, "elsewhere", now - timedelta(hours=1), now - timedelta(minutes=10))
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress"])
    assert res.exit_code == EXIT_BUSY, res.output
    assert one_line(res.stderr).endswith("rerun with --takeover to take it over")
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress", "--takeover"])
    assert res.exit_code == 0, res.output
    assert "0 computed now" in res.stderr
    assert lease_holder(run) is None
    assert (run / "lease" / "gen-000000003.json").is_file()  # ours, after theirs
    assert result_of(run) == expected


def test_lease_lost_mid_run_stops_at_once(tmp_path, processes, src, n):
    """Another process takes the lease over while a run waits in task 10: the run stops
    at once (no further task starts) with exit 4 and one line, and writes nothing only
    the holder may write (no checkpoint, result, failure record, quarantine or lease
    record) after the takeover; only the task under way commits its own outputs."""
    stop = 10
    gate = tmp_path / "gate"
    faults = make_faults(tmp_path, gate={str(stop): str(gate)})
    run = tmp_path / "run.zarr"
    driver = processes.start(command(*run_args(src, run, "--serial"), faults=faults), name="run")
    wait_for(lambda: faults.pids(stop), 60, f"the run to reach task {stop}")
    intruder = acquire(StoreIO(str(run)), "intruder", takeover=True, stale_after=0)
    assert intruder.generation == 2
    at_takeover = tree_times(run)
    time.sleep(0.01)  # file times after this instant differ from those before it
    gate.touch()
    assert driver.wait(60) == EXIT_BUSY, explain_proc(driver)
    line = one_line(driver.stderr())
    assert line == (f"chitally: error: the lease on {run} was taken over by intruder (pid "
                    f"{intruder.pid} on {intruder.host}); this run stopped writing")
    assert set(faults.attempts()) == set(range(stop + 1))  # task 11 never started
    after = tree_times(run)
    assert set(at_takeover) <= set(after)  # nothing deleted
    written = {k for k, t in after.items() if at_takeover.get(k) != t}
    task = {k for k in written if k.startswith(f"outputs/task-{stop:06d}/")}
    assert written - task == {f"commits/task-{stop:06d}.json"}, sorted(written)
    assert lease_holder(run)["owner"] == "intruder"  # left alone


# ------------------------------------------------------------------ read-only stores


NO_MOUNT, NOT_READ_ONLY = 97, 98


def read_only(run: Path, *args: object) -> subprocess.CompletedProcess:
    """Run `chitally ARGS` in a mount namespace of its own where `run` is a read-only
    bind mount of itself (chmod does not stop root, which these tests may run as). The
    mount ends with the command; nothing outside the namespace sees it."""
    script = (f'{{ mount --bind "$0" "$0" && mount -o remount,ro,bind "$0" "$0"; }} || exit {NO_MOUNT}; '
              f'touch "$0/probe" 2>/dev/null && exit {NOT_READ_ONLY}; exec "$@"')
    return subprocess.run(["unshare", "--mount", "sh", "-c", script, str(run), *command(*args)],
                          capture_output=True, text=True, timeout=120, env=child_env(), check=False)


def test_resume_and_status_of_a_complete_store_on_a_read_only_folder(tmp_path, complete, expected, n):
    """A complete run on read-only storage: `resume` reports it complete (exit 0, the
    curve) and `status` and `export` work; nothing needs the lease."""
    if shutil.which("unshare") is None:
        pytest.skip("no unshare(1) to make a private read-only bind mount")
    run = copy_store(complete, tmp_path / "run.zarr")
    before = tree_digest(run)
    res = read_only(run, "resume", run, "--serial", "--no-progress")
    if res.returncode == NO_MOUNT:
        pytest.skip(f"cannot make a private read-only bind mount here: {res.stderr.strip()}")
    assert res.returncode != NOT_READ_ONLY, "the bind mount is not read-only"
    assert res.returncode == 0, explain(res)
    assert done_line(n, n, 0) in res.stderr
    assert f"digest {expected.digest()[:16]}" in res.stderr
    res = read_only(run, "status", run, "--json")
    assert res.returncode == 0, explain(res)
    assert json.loads(res.stdout)["complete"] is True
    res = read_only(run, "export", run, "--format", "json")
    assert res.returncode == 0, explain(res)
    assert ct.Curve.from_dict(json.loads(res.stdout)) == expected
    assert tree_digest(run) == before


def test_other_input_or_parameters_are_refused(tmp_path, complete, src, points, expected):
    """`run` or `resume` with another input, eps, cap or task cost exit 2 naming every
    differing field, and leave the store byte for byte as it was."""
    run = copy_store(complete, tmp_path / "run.zarr")
    moved = points.copy()
    moved[100, 0] += 1e-9
    fewer = points[:-1]
    write_points(tmp_path / "moved.npy", moved)
    write_points(tmp_path / "fewer.npy", fewer)
    before = tree_digest(run)

    base = ["--task-cost", str(COST), "--out", str(run), "--serial", "--no-progress"]
    cases = [
        (["run", str(src), "--eps", "0.031", *base],
         ["eps: store 0.03, given 0.031"]),
        (["run", str(src), "--eps", str(EPS), "--max-dim", "3", *base], ["max_dim: store null, given 3"]),
        (["run", str(src), "--eps", str(EPS), "--out", str(run), "--task-cost", "5000", "--serial"],
         ["task_cost: store 4000.0, given 5000.0"]),
        (["run", str(src), "--eps", str(EPS), "--cover-radius", "0.05", *base],
         ["cover_radius: store null, given 0.05"]),
        (["run", str(tmp_path / "moved.npy"), "--eps", str(EPS), *base], ["input.sha256"]),
        (["run", str(tmp_path / "fewer.npy"), "--eps", str(EPS), *base],
         ["input.sha256", "input.shape: store [2500, 2], given [2499, 2]"]),
        (["resume", str(run), "--eps", "0.02", "--serial"], ["eps: store 0.03, given 0.02"]),
        (["resume", str(run), "--max-dim", "2", "--serial"], ["max_dim: store null, given 2"]),
        (["resume", str(run), "--input", str(tmp_path / "moved.npy"), "--serial"], ["input.sha256"]),
    ]
    runner = CliRunner()
    for args, fields in cases:
        res = runner.invoke(main, args)
        assert res.exit_code == EXIT_USAGE, (args, res.output, res.stderr)
        line = one_line(res.stderr)
        assert line.startswith(f"chitally: error: run store {run} was made for another input or parameters: ")
        for f in fields:
            assert f in line, (args, line)
        if "--cover-radius" not in args:  # a radius left at its default is never listed
            assert "cover_radius" not in line, (args, line)
        assert tree_digest(run) == before, args
    # the unchanged input and parameters are accepted (a complete run: nothing to compute)
    for args in (["resume", str(run), "--input", str(src), "--eps", str(EPS), "--serial", "--no-progress"],
                 run_args(src, run, "--serial")):
        res = runner.invoke(main, args)
        assert res.exit_code == 0, res.stderr
        assert "0 computed now" in res.stderr
        assert result_of(run) == expected


# ---------------------------------------------------------------- interruptions


@pytest.mark.parametrize("how", ["SIGINT", "SIGTERM"])
def test_interrupted_run_exits_cleanly_and_resumes(tmp_path, terminals, src, expected, n, how):
    """On a terminal, with an embedded LocalCluster at work: Ctrl-C at about 30% of the
    commits, then twice more in quick succession (or one SIGTERM to the driver, as a
    process manager sends it): one line saying how many tasks are committed and that
    `chitally resume` continues, exit 130 (143), the lease free, no traceback from the
    driver or its workers, no leaked-semaphore warning. `resume` gives the exact curve
    and computes no committed task again."""
    first = int(0.3 * n)
    _, gates = gated(tmp_path, first, n)
    faults = make_faults(tmp_path, gate=gates)
    run = tmp_path / "run.zarr"
    workers = 2 if how == "SIGINT" else 1  # SIGTERM reaches the driver alone
    term = terminals(command(*run_args(src, run, "--workers", workers, "--threads", 1), faults=faults))
    term.wait_until(lambda: commits(run) == set(range(first)) and under_way(faults, first, workers),
                    90, f"tasks 0 to {first - 1} committed and every worker at the gate")
    if how == "SIGINT":
        for _ in range(3):
            term.type(b"\x03")
            term.pump(0.1)
    else:
        term.popen.send_signal(signal.SIGTERM)
    status = term.wait(60)
    text = term.output()
    assert status == (130 if how == "SIGINT" else 143), text
    assert terminal_lines(text) == [(f"chitally: error: interrupted: {first} of {n} tasks committed; "
                                     f"`chitally resume {run}` continues")], text
    assert "Traceback" not in text and "KeyboardInterrupt" not in text
    assert "leaked semaphore" not in text
    assert lease_holder(run) is None
    assert commits(run) == set(range(first))

    faults.write()  # no more gates
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert done_line(n, n, n - first) in res.stderr
    attempts = faults.attempts()
    assert set(attempts) == set(range(n))
    assert all(attempts[t] == 1 for t in range(first))  # committed: never computed again
    # the attempts stopped at the gate ran again; no other task ran twice
    twice = {t for t in attempts if attempts[t] == 2}
    assert len(twice) == workers and twice <= set(range(first, n)) and max(attempts.values()) == 2
