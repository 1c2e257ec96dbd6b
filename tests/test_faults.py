"""Failures during a run: lost workers, a killed driver, a task dying between its data and
its commit record, a task that always fails, damaged task outputs and checkpoints, a
second writer, and a store reused with other input or parameters.

Faults are injected deterministically through the hook of `chitally.tasks` (env
``CHITALLY_FAULTS``: a JSON file; every attempt appends a line with its pid to a log, so
the tests count exactly which tasks were computed and how often). Processes are real
(``chitally``, ``dask scheduler``, ``dask worker``), each in its own process group, and
every wait polls the run store's files with a timeout. Every run must end with exactly the
curve of `chitally.euler_curve` on the same points, itself checked against an outside
reference (networkx ``enumerate_all_cliques``, brute force).
"""

from __future__ import annotations

import json
import logging
import shutil
import signal
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from references import brute_force_curve
from helpers import (
    CHITALLY,
    chitally,
    chunk,
    cloud,
    commits,
    explain,
    flip_byte,
    make_faults,
    n_tasks,
    processes,  # noqa: F401 - fixture
    start_cluster,
    tree_digest,
    truncate,
    wait_for,
    write_points,
)

import chitally as ct
from chitally.cli import main
from chitally.execute import Callbacks, SerialExecutor
from chitally.runs import (
    EXIT_BUSY,
    EXIT_INCOMPLETE,
    EXIT_USAGE,
    Params,
    create_or_open,
    execute,
    open_run,
    read_result,
)

pytestmark = pytest.mark.timeout(180)

EPS = 0.03
COST = 4000  # 38 tasks for these 2,500 points


@pytest.fixture(scope="module")
def points() -> np.ndarray:
    return cloud(2500, seed=5)


@pytest.fixture(scope="module")
def expected(points: np.ndarray) -> ct.Curve:
    """The curve by `euler_curve`, which must equal the outside reference: every simplex
    listed by networkx ``enumerate_all_cliques`` (references.brute_force_curve)."""
    curve = ct.euler_curve(points, EPS)
    assert curve == brute_force_curve(points, EPS, None)
    return curve


@pytest.fixture
def src(tmp_path: Path, points: np.ndarray) -> Path:
    return write_points(tmp_path / "points.npy", points)


def run_args(src: Path, run: Path, *extra: object) -> list[str]:
    return ["run", str(src), "--eps", str(EPS), "--task-cost", str(COST), "--out", str(run),
            "--no-progress", *map(str, extra)]


def result_of(run: Path) -> ct.Curve | None:
    return read_result(open_run(str(run)))


def one_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


# ------------------------------------------------------------------ lost processes


@pytest.mark.cluster
def test_killed_worker_loses_nothing(tmp_path, processes, src, expected):
    """SIGKILL one of two workers (no nanny: it stays dead) while half the tasks are
    committed: the other worker takes over its task and the curve is exact."""
    # task 0 (the heaviest, submitted first) stalls on its first attempt: its worker is
    # then certainly busy with it when killed, and its second attempt goes through
    faults = make_faults(tmp_path, delay=0.02, delay_first={"0": 120})
    cluster = start_cluster(processes, tmp_path / "cluster", 2, nanny=False, env=faults.env())
    run = tmp_path / "run.zarr"
    driver = processes.start([CHITALLY, *run_args(src, run, "--scheduler", cluster.address)], name="run")
    n = wait_for(lambda: n_tasks(run), 60, "the run store")
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
    assert f"{n}/{n} tasks reduced, {n} computed now, 0 failed" in driver.stderr()


def test_killed_run_resumes_without_recomputing(tmp_path, processes, src, expected):
    """SIGKILL the whole `chitally run` process group at about 30% of the commits:
    `resume` computes only the tasks without a commit record."""
    faults = make_faults(tmp_path, delay=0.1)
    run = tmp_path / "run.zarr"
    driver = processes.start([CHITALLY, *run_args(src, run, "--serial")], env=faults.env(), name="run")
    n = wait_for(lambda: n_tasks(run), 60, "the run store")
    wait_for(lambda: len(commits(run)) >= 0.3 * n, 60, "30% of the tasks committed")
    assert processes.kill(driver) == -signal.SIGKILL
    before = commits(run)  # listed after the kill: exactly what the run committed
    assert 0.3 * n <= len(before) < n
    assert not (run / "curve" / "record.json").exists()
    lease = json.loads((run / "lease.json").read_text())
    assert lease["pid"] == driver.pid  # left behind by the killed run
    assert all(faults.attempts()[t] == 1 for t in before)

    res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert f"{n}/{n} tasks reduced, {n - len(before)} computed now, 0 failed" in res.stderr
    attempts = faults.attempts()
    assert set(attempts) == set(range(n))
    assert all(attempts[t] == 1 for t in before)
    # only the task under way at the kill (if any) was tried twice
    assert len([t for t in attempts if attempts[t] > 1]) <= 1
    assert not (run / "lease.json").exists()


@pytest.mark.parametrize("how", ["serial", "dask"])
def test_task_dying_between_data_and_commit_is_recomputed(tmp_path, processes, src, expected, how):
    """A task attempt writes its jump table and its process dies before the commit record.
    With Dask the worker dies (its nanny starts a new one) and the same run recomputes the
    task; serially the driver itself dies, and `resume` recomputes it."""
    victim = 12
    faults = make_faults(tmp_path, exit_between=[victim])
    run = tmp_path / "run.zarr"
    table = run / "tables" / f"task-{victim:06d}"
    if how == "dask":
        res = chitally(*run_args(src, run, "--workers", 2, "--threads", 1), env=faults.env())
        assert res.returncode == 0, explain(res)
    else:
        res = chitally(*run_args(src, run, "--serial"), env=faults.env())
        assert res.returncode == 17, explain(res)  # the driver was the process that died
        # serially, tasks run in order: those before the victim are committed, and the
        # victim's data is on disk without a commit record
        assert commits(run) == set(range(victim))
        assert (table / "values" / "c" / "0").is_file() and (table / "jumps" / "c" / "0").is_file()
        res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
        assert res.returncode == 0, explain(res)
        n = n_tasks(run)
        assert f"{n}/{n} tasks reduced, {n - victim} computed now" in res.stderr
    assert result_of(run) == expected
    n = n_tasks(run)
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


# ------------------------------------------------------------------------- failures


def test_poison_task_then_resume_after_fix(tmp_path, src, expected):
    """A task that always fails ends the run with exit 3 naming it, after its retries;
    every other task stays committed. Once the cause is gone, `resume` computes only it."""
    poison = 7
    faults = make_faults(tmp_path, poison=[poison])
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--workers", 2, "--threads", 1), env=faults.env())
    assert res.returncode == EXIT_INCOMPLETE, explain(res)
    assert f"task {poison} failed: RuntimeError: injected poison in task {poison}" in res.stderr
    assert f"chitally resume {run}" in res.stderr
    n = n_tasks(run)
    assert commits(run) == set(range(n)) - {poison}
    assert faults.attempts() == {t: 3 if t == poison else 1 for t in range(n)}  # --retries 2
    assert result_of(run) is None
    runner = CliRunner()
    info = json.loads(runner.invoke(main, ["status", str(run), "--json"]).stdout)
    assert (info["done"], info["failed"], info["pending"], info["complete"]) == (n - 1, 1, 0, False)
    assert f"injected poison in task {poison}" in info["failures"][str(poison)]
    # export of an incomplete run says so, with the resumable exit code
    res = runner.invoke(main, ["export", str(run)])
    assert res.exit_code == EXIT_INCOMPLETE and "no curve yet" in one_line(res.stderr)

    faults.write()  # the cause is fixed
    res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
    assert res.returncode == 0, explain(res)
    assert f"{n}/{n} tasks reduced, 1 computed now, 0 failed" in res.stderr
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


def test_damaged_task_output_after_complete_run(tmp_path, src, expected):
    """Damage two committed jump tables of a complete run, remove its curve and
    checkpoints so the tables must be read again: both are set aside (copies kept in the
    quarantine), recomputed, and the curve is exact."""
    faults = make_faults(tmp_path)
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"), env=faults.env())
    assert res.returncode == 0, explain(res)
    n = n_tasks(run)
    assert result_of(run) == expected
    # a damaged final curve is refused on export (exit 3, with the way out), reported by
    # `status`, and written again by `resume`, which computes nothing: the last
    # checkpoint covers every task
    flip_byte(run / "curve" / "values" / "c" / "0")
    res = CliRunner().invoke(main, ["export", str(run)])
    assert res.exit_code == EXIT_INCOMPLETE, res.output
    line = one_line(res.stderr)
    assert f"curve in {run} is unreadable: " in line and "`chitally resume` writes it again" in line
    res = CliRunner().invoke(main, ["status", str(run), "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.stdout)
    assert info["complete"] is False and f"curve in {run} is unreadable: " in info["curve_damaged"]
    assert info["done"] == n
    res = CliRunner().invoke(main, ["status", str(run)])
    assert res.exit_code == 0 and "the final curve is damaged" in res.stdout, res.output
    res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
    assert res.returncode == 0 and "0 computed now" in res.stderr, explain(res)
    assert result_of(run) == expected

    damaged = damage_two_tasks(run)
    shutil.rmtree(run / "curve")
    shutil.rmtree(run / "checkpoints")
    res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
    assert res.returncode == 0, explain(res)
    assert f"{n}/{n} tasks reduced, 2 computed now, 0 failed" in res.stderr
    assert f"damaged outputs set aside and computed again: tasks {sorted(damaged)}" in res.stderr
    assert result_of(run) == expected
    assert faults.attempts() == {t: 2 if t in damaged else 1 for t in range(n)}
    kept = {p.relative_to(p.parents[1]).as_posix() for p in (run / "quarantine").rglob("task-*.json")}
    assert kept == {f"commits/task-{t:06d}.json" for t in damaged}


def test_damaged_task_output_before_resume(tmp_path, src, expected):
    """Mid-way: the driver dies (deterministically, at task 12), two of the tasks it
    committed are damaged on disk, and `resume` recomputes them with the rest."""
    stop = 12
    faults = make_faults(tmp_path, exit_between=[stop])
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"), env=faults.env())
    assert res.returncode == 17, explain(res)
    assert commits(run) == set(range(stop))
    damaged = damage_two_tasks(run)
    n = n_tasks(run)
    res = chitally("resume", run, "--serial", "--no-progress", env=faults.env())
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    assert f"{n}/{n} tasks reduced, {n - stop + 2} computed now" in res.stderr
    assert f"damaged outputs set aside and computed again: tasks {sorted(damaged)}" in res.stderr
    assert faults.attempts() == {t: 2 if t in (*damaged, stop) else 1 for t in range(n)}


def test_damaged_checkpoint_falls_back_to_the_one_before(tmp_path, points, expected, monkeypatch, caplog):
    """The reducer checkpoints after every task; the run stops after 10 tasks and the
    newest generation is damaged: resuming starts from the generation before it, adds the
    task that generation lacks from its commit record, recomputes nothing."""
    faults = make_faults(tmp_path)
    monkeypatch.setenv("CHITALLY_FAULTS", str(faults.path))
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
        execute(store, SerialExecutor(), events=StopAfter(), checkpoint_every=1)
    assert commits(run) == set(range(10))
    newest = store.latest_checkpoint()
    assert newest.generation == 10 and sorted(newest.task_ids.tolist()) == list(range(10))
    flip_byte(run / "checkpoints" / "gen-000010" / "values" / "c" / "0")
    fallback = store.latest_checkpoint()
    assert fallback.generation == 9 and fallback.skipped == (10,)
    assert sorted(fallback.task_ids.tolist()) == list(range(9))

    with caplog.at_level(logging.WARNING, logger="chitally"):
        report = execute(store, SerialExecutor(), checkpoint_every=1)
    assert "using checkpoint generation 9 instead of damaged 10" in caplog.text
    assert report.curve == expected and result_of(run) == expected
    assert report.computed == store.n_tasks - 10
    assert faults.attempts() == {t: 1 for t in range(store.n_tasks)}


# ----------------------------------------------------------------- one store, one run


def test_second_run_on_a_busy_store_is_refused(tmp_path, processes, src, expected):
    """While a run holds the store, a second `run` or a `resume` exits 4 naming the
    holder and computes nothing; the first run then completes with the exact curve."""
    # the first run's task 5 waits for a gate file: the run is surely under way, holding
    # the store, for as long as the test needs
    gate = tmp_path / "gate"
    faults = make_faults(tmp_path, gate={"5": str(gate)})
    run = tmp_path / "run.zarr"
    first = processes.start([CHITALLY, *run_args(src, run, "--serial")], env=faults.env(), name="first")
    wait_for(lambda: faults.pids(5), 60, "the first run to reach task 5")
    assert commits(run) == set(range(5))
    for args in (run_args(src, run, "--serial"), ["resume", str(run), "--serial", "--no-progress"]):
        res = chitally(*args, env=faults.env())
        assert res.returncode == EXIT_BUSY, explain(res)
        line = one_line(res.stderr)
        assert f"is leased to chitally pid {first.pid} on " in line and f"pid {first.pid}, heartbeat" in line
    assert first.popen.poll() is None
    assert commits(run) == set(range(5))
    gate.touch()
    assert first.wait(120) == 0, first.stderr()
    assert result_of(run) == expected
    assert faults.attempts() == {t: 1 for t in range(n_tasks(run))}


def test_busy_store_is_refused_before_any_cluster_starts(tmp_path, src, expected, monkeypatch):
    """A Dask `resume` of a store leased elsewhere exits 4 without connecting to or
    starting a cluster, and leaves the holder's lease alone."""
    from chitally import cluster

    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"))
    assert res.returncode == 0, explain(res)
    theirs = {"owner": "chitally pid 4242 on elsewhere", "host": "elsewhere", "pid": 4242,
              "started": "2026-01-01T00:00:00+00:00", "heartbeat": datetime.now(timezone.utc).isoformat(),
              "token": "theirs"}
    (run / "lease.json").write_text(json.dumps(theirs))

    def no_cluster(*args, **kwargs):
        raise AssertionError("a cluster was started for a run that the lease refuses")

    monkeypatch.setattr(cluster, "connect", no_cluster)
    res = CliRunner().invoke(main, ["resume", str(run), "--no-progress"])
    assert res.exit_code == EXIT_BUSY, res.output
    assert "leased to chitally pid 4242 on elsewhere" in one_line(res.stderr)
    assert "dashboard" not in res.stderr
    assert json.loads((run / "lease.json").read_text())["token"] == "theirs"
    assert result_of(run) == expected


def test_stale_lease_is_taken_over_only_when_asked(tmp_path, src, expected):
    """A lease left by a process on another machine: refused while its heartbeat is
    fresh, even with --takeover; once stale, refused with a hint, taken with --takeover."""
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"))
    assert res.returncode == 0, explain(res)
    runner = CliRunner()

    def lease(heartbeat: str) -> None:
        (run / "lease.json").write_text(json.dumps({
            "owner": "chitally pid 4242 on elsewhere", "host": "elsewhere", "pid": 4242,
            "started": "2026-01-01T00:00:00+00:00", "heartbeat": heartbeat, "token": "theirs"}))

    lease(datetime.now(timezone.utc).isoformat())
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress", "--takeover"])
    assert res.exit_code == EXIT_BUSY, res.output
    assert "leased to chitally pid 4242 on elsewhere (host elsewhere" in one_line(res.stderr)
    assert "takeover" not in res.stderr

    lease("2026-01-01T00:00:00+00:00")
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress"])
    assert res.exit_code == EXIT_BUSY, res.output
    assert one_line(res.stderr).endswith("rerun with --takeover to take it over")
    res = runner.invoke(main, ["resume", str(run), "--serial", "--no-progress", "--takeover"])
    assert res.exit_code == 0, res.output
    assert "0 computed now" in res.stderr
    assert not (run / "lease.json").exists()
    assert result_of(run) == expected


def test_other_input_or_parameters_are_refused(tmp_path, src, points, expected):
    """`run` or `resume` with another input, eps, cap or task cost exit 2 naming every
    differing field, and leave the store byte for byte as it was."""
    run = tmp_path / "run.zarr"
    res = chitally(*run_args(src, run, "--serial"))
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    moved = points.copy()
    moved[100, 0] += 1e-9
    fewer = points[:-1]
    write_points(tmp_path / "moved.npy", moved)
    write_points(tmp_path / "fewer.npy", fewer)
    before = tree_digest(run)

    base = ["--task-cost", str(COST), "--out", str(run), "--serial", "--no-progress"]
    cases = [
        (["run", str(src), "--eps", "0.031", *base], ["params.eps: store 0.03, given 0.031"]),
        (["run", str(src), "--eps", str(EPS), "--max-dim", "3", *base], ["params.max_dim: store null, given 3"]),
        (["run", str(src), "--eps", str(EPS), "--out", str(run), "--task-cost", "5000", "--serial"],
         ["params.task_cost: store 4000.0, given 5000.0"]),
        (["run", str(tmp_path / "moved.npy"), "--eps", str(EPS), *base], ["fingerprint.sha256"]),
        (["run", str(tmp_path / "fewer.npy"), "--eps", str(EPS), *base],
         ["fingerprint.shape: store [2500, 2], given [2499, 2]", "fingerprint.sha256"]),
        (["resume", str(run), "--eps", "0.02", "--serial"], ["params.eps: store 0.03, given 0.02"]),
        (["resume", str(run), "--max-dim", "2", "--serial"], ["params.max_dim: store null, given 2"]),
        (["resume", str(run), "--input", str(tmp_path / "moved.npy"), "--serial"], ["fingerprint.sha256"]),
    ]
    runner = CliRunner()
    for args, fields in cases:
        res = runner.invoke(main, args)
        assert res.exit_code == EXIT_USAGE, (args, res.output, res.stderr)
        line = one_line(res.stderr)
        assert line.startswith(f"chitally: error: run store {run} was made for another input or parameters")
        for f in fields:
            assert f in line, (args, line)
        assert tree_digest(run) == before, args
    # the unchanged input and parameters are accepted (a complete run: nothing to compute)
    for args in (["resume", str(run), "--input", str(src), "--eps", str(EPS), "--serial", "--no-progress"],
                 run_args(src, run, "--serial")):
        res = runner.invoke(main, args)
        assert res.exit_code == 0, res.stderr
        assert "0 computed now" in res.stderr
        assert result_of(run) == expected
