"""Shared helpers of the process tests (test_faults, test_cluster, test_cli, test_runs).

What they give: deterministic point clouds written to files; the `chitally` command as a
subprocess of this worktree's sources (``python -m chitally.cli``, or ``python -m
faultwrap SPEC ...`` with faults around every task); processes started in their own
process group and killed group-wise at teardown; a real Dask cluster (``dask scheduler``
and ``dask worker`` on 127.0.0.1); the attempt log of `faultwrap`; and polling of a run
store by its files (commit records) with a timeout, so that no test sleeps to
synchronise.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pytest
from faultwrap import FaultWrapper

TESTS = Path(__file__).resolve().parent
SRC = TESTS.parent / "src"
BIN = Path(sys.executable).parent
PYTHON = sys.executable
#: The command of this worktree's sources (the venv's console script may point elsewhere).
CHITALLY = [PYTHON, "-m", "chitally.cli"]
DASK = str(BIN / "dask")
HOST = "127.0.0.1"

T = TypeVar("T")


# --------------------------------------------------------------------------- clouds


def cloud(n: int, seed: int = 1, dim: int = 2, duplicates: int = 3) -> np.ndarray:
    """`n` points uniform in the unit cube, the last `duplicates` of them copies of
    earlier rows (coincident points are distinct vertices joined by a 0-length edge)."""
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0.0, 1.0, (n, dim))
    if duplicates:
        pts[n - duplicates:] = pts[rng.choice(n - duplicates, duplicates, replace=False)]
    return pts


def write_points(path: Path, points: np.ndarray) -> Path:
    np.save(path, np.asarray(points, dtype=np.float64))
    return path


# ------------------------------------------------------------------------- polling


def wait_for(condition: Callable[[], T], timeout: float, what: str, interval: float = 0.05) -> T:
    """Poll `condition` until it returns something truthy (returned), or fail after
    `timeout` seconds saying `what` was awaited."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(interval)


def commits(run: Path) -> set[int]:
    """Tasks with a commit record in the run store at `run` (by its files: temporary
    ``.partial`` files of a write under way do not count)."""
    folder = Path(run) / "commits"
    if not folder.is_dir():
        return set()
    return {int(p.name[5:11]) for p in folder.glob("task-*.json")}


def n_tasks(run: Path) -> int | None:
    """Number of tasks of a run store once its creation finished, else None."""
    if not (Path(run) / "created.json").exists():
        return None
    root = json.loads((Path(run) / "zarr.json").read_text())
    return int(root["attributes"]["chitally"]["n_tasks"])


def tree_digest(root: Path) -> dict[str, str]:
    """sha256 of every file under `root`, by relative path (the store's exact bytes)."""
    root = Path(root)
    return {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def tree_times(root: Path) -> dict[str, int]:
    """Modification time (ns) of every file under `root`, by relative path."""
    root = Path(root)
    return {str(p.relative_to(root)): p.stat().st_mtime_ns for p in sorted(root.rglob("*")) if p.is_file()}


def chunk(run: Path, task: int, name: str = "values") -> Path:
    """The one chunk file of a task's output array (`values` or `jumps` of a cloud run)."""
    path = Path(run) / "outputs" / f"task-{task:06d}" / name / "c" / "0"
    assert path.is_file(), f"no chunk file {path}"
    return path


def flip_byte(path: Path, offset: int | None = None) -> None:
    data = bytearray(path.read_bytes())
    i = len(data) // 2 if offset is None else offset
    data[i] ^= 0xFF
    path.write_bytes(bytes(data))


def truncate(path: Path, keep: int | None = None) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2 if keep is None else keep])


def lease_holder(run: Path) -> dict[str, Any] | None:
    """The live or stale holder of a store's writer lease, None when it is free."""
    from chitally.store import StoreIO
    from chitally.store.lease import describe_holder

    return describe_holder(StoreIO(str(run)))


# -------------------------------------------------------------------------- faults


@dataclass
class Faults:
    """A fault spec for `faultwrap` (a JSON file) and the attempt log it writes."""

    path: Path
    log: Path

    def write(self, **spec: Any) -> None:
        """Replace the faults (a driver reads the file when it starts)."""
        self.path.write_text(json.dumps({"log": str(self.log), **spec}))

    @property
    def spec(self) -> dict[str, Any]:
        return json.loads(self.path.read_text())

    def wrapper(self) -> FaultWrapper:
        """The task function with these faults, for ``task_function=`` or to stand in
        for `chitally.engine.run_task` in this process."""
        return FaultWrapper(self.spec)

    def command(self) -> list[str]:
        """The `chitally` command with these faults around every task it runs."""
        return [PYTHON, "-m", "faultwrap", str(self.path)]

    def attempts(self) -> dict[int, int]:
        """Attempt lines per task so far."""
        return {int(f.name[5:]): len(f.read_text().splitlines()) for f in self.log.glob("task-*")}

    def pids(self, task: int) -> list[int]:
        f = self.log / f"task-{task}"
        return [int(line.split()[1]) for line in f.read_text().splitlines()] if f.exists() else []

    def clear_log(self) -> None:
        for f in self.log.glob("task-*"):
            f.unlink()


def make_faults(tmp: Path, **spec: Any) -> Faults:
    log = tmp / "fault-log"
    log.mkdir(exist_ok=True)
    faults = Faults(tmp / "faults.json", log)
    faults.write(**spec)
    return faults


def command(*args: Any, faults: Faults | None = None) -> list[str]:
    """argv of `chitally ARGS` (with `faults` around its tasks if given)."""
    return [*(faults.command() if faults is not None else CHITALLY), *map(str, args)]


# ----------------------------------------------------------------------- processes


def child_env(extra: dict[str, str] | None = None) -> dict[str, str]:
    """The environment of a child process: ours without Dask or chitally settings, this
    worktree's sources and the tests folder (`faultwrap`, which Dask workers unpickle)
    first on the path, plus `extra`."""
    env = {k: v for k, v in os.environ.items()
           if k != "DASK_SCHEDULER_ADDRESS" and not k.startswith("CHITALLY_")}
    path = [str(SRC), str(TESTS), *filter(None, env.get("PYTHONPATH", "").split(os.pathsep))]
    env.update({"PYTHONUNBUFFERED": "1", "OMP_NUM_THREADS": "1",
                "PYTHONPATH": os.pathsep.join(dict.fromkeys(path))})
    env.update(extra or {})
    return env


@dataclass
class Proc:
    popen: subprocess.Popen
    out: Path
    err: Path

    @property
    def pid(self) -> int:
        return self.popen.pid

    def stdout(self) -> str:
        return self.out.read_text()

    def stderr(self) -> str:
        return self.err.read_text()

    def wait(self, timeout: float) -> int:
        return self.popen.wait(timeout=timeout)


@dataclass
class Processes:
    """Processes of one test, each the leader of its own process group (session), so
    that a kill reaches everything it started (a LocalCluster's workers, say)."""

    folder: Path
    procs: list[Proc] = field(default_factory=list)

    def start(self, args: Sequence[str], *, env: dict[str, str] | None = None, name: str = "proc",
              cwd: Path | None = None) -> Proc:
        k = len(self.procs)
        out, err = self.folder / f"{k:02d}-{name}.out", self.folder / f"{k:02d}-{name}.err"
        with open(out, "wb") as fo, open(err, "wb") as fe:
            popen = subprocess.Popen(list(args), stdout=fo, stderr=fe, stdin=subprocess.DEVNULL,
                                     env=child_env(env), cwd=cwd, start_new_session=True)
        proc = Proc(popen, out, err)
        self.procs.append(proc)
        return proc

    def kill(self, proc: Proc, sig: int = signal.SIGKILL) -> int:
        """Send `sig` to the process group of `proc` and reap its leader."""
        try:
            os.killpg(proc.pid, sig)
        except ProcessLookupError:
            pass
        return proc.popen.wait(timeout=30)

    def close(self) -> None:
        for proc in reversed(self.procs):
            try:  # the group may outlive its leader
                os.killpg(proc.pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
            try:
                proc.popen.wait(timeout=30)
            except subprocess.TimeoutExpired:  # pragma: no cover - reported, not hidden
                print(f"process {proc.pid} did not exit after SIGKILL", file=sys.stderr)


TAKE_TERMINAL = ("import fcntl, os, sys, termios; fcntl.ioctl(0, termios.TIOCSCTTY, 0); "
                 "os.execvp(sys.argv[1], sys.argv[1:])")


class Terminal:
    """A process on a pseudo-terminal of its own, as a user runs it at a shell prompt:
    the session leader of a new session whose controlling terminal is the pty, so a
    ``^C`` typed there reaches its whole foreground process group (a LocalCluster's
    workers too). Output of every process on the terminal is collected."""

    def __init__(self, args: Sequence[str], env: dict[str, str] | None = None,
                 cwd: Path | None = None) -> None:
        master, slave = os.openpty()
        try:
            # the new session's leader makes the pty its controlling terminal, then becomes
            # the command (same pid, session and terminal)
            self.popen = subprocess.Popen([PYTHON, "-c", TAKE_TERMINAL, *args], stdin=slave, stdout=slave,
                                          stderr=slave, env=child_env(env), cwd=cwd,
                                          start_new_session=True)
        finally:
            os.close(slave)
        self.master = master
        self.buffer = bytearray()
        self.closed = False

    @property
    def pid(self) -> int:
        return self.popen.pid

    def pump(self, seconds: float = 0.05) -> None:
        """Collect output for up to `seconds` (returns early once the terminal closes)."""
        import select

        deadline = time.monotonic() + seconds
        while not self.closed:
            left = deadline - time.monotonic()
            if left <= 0:
                return
            ready, _, _ = select.select([self.master], [], [], left)
            if not ready:
                return
            try:
                data = os.read(self.master, 1 << 16)
            except OSError:  # EIO: every process holding the terminal has ended
                data = b""
            if not data:
                self.closed = True
                return
            self.buffer.extend(data)

    def type(self, text: bytes) -> None:
        """Type on the terminal (b"\x03" is Ctrl-C)."""
        os.write(self.master, text)

    def wait_until(self, condition: Callable[[], T], timeout: float, what: str) -> T:
        """`wait_for` that keeps reading the terminal (a full pty would block its writers)."""
        def check() -> T:
            self.pump(0.05)
            return condition()

        return wait_for(check, timeout, what, interval=0)

    def wait(self, timeout: float) -> int:
        """Wait for the process to end and for its terminal to close; its exit status."""
        deadline = time.monotonic() + timeout
        while self.popen.poll() is None or not self.closed:
            if time.monotonic() > deadline:
                pytest.fail(f"the process on the terminal did not end within {timeout:g} s:\n"
                            f"{self.output()}")
            self.pump(0.2)
        return self.popen.wait(timeout=1)

    def output(self) -> str:
        return self.buffer.decode(errors="replace").replace("\r\n", "\n")

    def close(self) -> None:
        try:
            os.killpg(self.popen.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        self.popen.wait(timeout=30)
        os.close(self.master)


@pytest.fixture
def terminals():
    """Start `Terminal`s through this (a list); their process groups are killed at teardown."""
    started: list[Terminal] = []

    def start(args: Sequence[str], env: dict[str, str] | None = None) -> Terminal:
        term = Terminal(args, env)
        started.append(term)
        return term

    yield start
    for term in started:
        term.close()


@pytest.fixture
def processes(tmp_path: Path):
    """Start processes through this; every one of their process groups is killed at teardown."""
    folder = tmp_path / "procs"
    folder.mkdir()
    procs = Processes(folder)
    yield procs
    procs.close()


def chitally(*args: Any, faults: Faults | None = None, env: dict[str, str] | None = None,
             timeout: float = 120, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """Run the `chitally` command to its end (for runs that need no killing), in a process
    group of its own that is killed afterwards: nothing it started (a LocalCluster's
    workers, say) outlives it, even on a timeout. With `faults`, every task it runs
    goes through `faultwrap`."""
    argv = command(*args, faults=faults)
    with subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL,
                          text=True, env=child_env(env), cwd=cwd, start_new_session=True) as popen:
        try:
            out, err = popen.communicate(timeout=timeout)
        finally:
            try:
                os.killpg(popen.pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
    return subprocess.CompletedProcess(argv, popen.returncode, out, err)


def explain(res: Any) -> str:
    """Both streams of a finished command, for assertion messages."""
    return f"exit {res.returncode}\n--- stdout\n{res.stdout}\n--- stderr\n{res.stderr}"


# ------------------------------------------------------------------------- cluster


@dataclass
class DaskCluster:
    """A scheduler and workers, each a process group of its own."""

    scheduler_file: Path
    address: str
    scheduler: Proc
    workers: list[Proc]

    def worker_of_pid(self, pid: int) -> Proc:
        for w in self.workers:
            if w.pid == pid:
                return w
        raise AssertionError(f"pid {pid} is none of the workers {[w.pid for w in self.workers]}")


def _scheduler_address(path: Path) -> str | None:
    try:
        return json.loads(path.read_text()).get("address")
    except (OSError, ValueError):
        return None


def n_workers_of(address: str) -> int:
    from distributed import Client

    with Client(address, timeout="10s") as client:
        return len(client.scheduler_info()["workers"])


def start_cluster(processes: Processes, folder: Path, n_workers: int = 2, *, nanny: bool = True,
                  env: dict[str, str] | None = None, timeout: float = 60) -> DaskCluster:
    """``dask scheduler`` on 127.0.0.1 (port 0, a scheduler file) and `n_workers`
    single-threaded ``dask worker`` processes; returns once all workers are registered."""
    folder.mkdir(parents=True, exist_ok=True)
    sfile = folder / "scheduler.json"
    scheduler = processes.start(
        [DASK, "scheduler", "--host", HOST, "--port", "0", "--no-dashboard", "--scheduler-file", str(sfile)],
        env=env, name="scheduler",
    )
    address = wait_for(lambda: _scheduler_address(sfile), timeout, "the scheduler file")
    assert address.startswith(f"tcp://{HOST}:"), address
    workers = []
    for k in range(n_workers):
        local = folder / f"worker-{k}"
        local.mkdir(exist_ok=True)
        workers.append(processes.start(
            [DASK, "worker", "--scheduler-file", str(sfile), "--nthreads", "1", "--host", HOST,
             "--no-dashboard", "--name", f"w{k}", "--local-directory", str(local),
             "--nanny" if nanny else "--no-nanny"],
            env=env, name=f"worker{k}",
        ))
    wait_for(lambda: n_workers_of(address) == n_workers, timeout, f"{n_workers} workers to register")
    return DaskCluster(sfile, address, scheduler, workers)
