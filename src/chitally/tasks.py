"""The task function: one task of a run, from its halo in the store to its commit record.

Every executor (serial, Dask, and later the batch and bands drivers) runs this same
function, so what a task computes never depends on where it runs. It returns only
(task id, digest, small counters); the jump table itself travels through the run store.

A fault-injection hook for tests lives here too: when the environment variable
``CHITALLY_FAULTS`` names a JSON file, the task logs each attempt there and can fail,
or end its process, on chosen tasks and attempts (see `_FaultPlan`). It is inert
otherwise.
"""

from __future__ import annotations

import json
import os
import resource
import socket
import time
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from .kernel import count_jumps
from .store import CorruptTask, RunStore, StoreMismatch, table_digest

FAULTS_ENV = "CHITALLY_FAULTS"


@dataclass(frozen=True)
class TaskResult:
    """What a task sends back to the driver: small, picklable, no arrays."""

    task: int
    digest: str
    seconds: float
    edges: int
    n_owned: int


class InputFault(ValueError):
    """A task's input is unusable: retrying the same input cannot help."""


@lru_cache(maxsize=8)
def _open_store(url: str) -> RunStore:
    # One open per worker process and store: opening reads the root metadata.
    return RunStore.open(url)


def _store_for(url: str, plan_digest: str | None) -> RunStore:
    """The cached store at `url`, reopened if the driver expects another plan there.

    A long-lived worker outlives run stores: one deleted and created again at the same
    URL must not be read through the metadata (eps, number of tasks, array shapes) this
    process cached for its predecessor.
    """
    store = _open_store(url)
    if plan_digest and store.plan_digest != plan_digest:
        _open_store.cache_clear()
        store = _open_store(url)
        if store.plan_digest != plan_digest:
            raise StoreMismatch(
                f"run store {url} holds plan {store.plan_digest}, the driver runs plan {plan_digest}"
            )
    return store


def _verified_commit(store: RunStore, task: int) -> dict[str, Any] | None:
    record = store.read_commit(task)
    if record is None:
        return None
    try:
        store.read_jump_table(task, verify=True)
    except CorruptTask:
        return None  # computed again; commit_task repairs the data under the same digest
    return record


def run_task(url: str, task: int, attempt: str, *, threads: int = 1, plan_digest: str | None = None) -> TaskResult:
    """Compute task `task` of the run store at `url` and commit its jump table.

    Idempotent: a task already committed with the same digest is harmless; outputs are
    deterministic, so a duplicate attempt writes the same bytes. `plan_digest`, when
    given, is the plan the caller expects at `url` (checked before anything is read).
    """
    faults = _FaultPlan.from_env()
    if faults is not None:
        faults.before(task, attempt)
    store = _store_for(url, plan_digest)
    done = _verified_commit(store, task)
    if done is not None:
        # Dask may rerun a finished task whose result lived on a lost worker
        return TaskResult(task, done["digest"], 0.0, int(done.get("edges", 0)), int(done.get("n_owned", 0)))
    params = store.params
    t0 = time.perf_counter()
    coords, _halo, owned_start, owned_stop = store.read_task_input(task)
    table = count_jumps(
        coords, float(params["eps"]), params["max_dim"], owned=(owned_start, owned_stop), threads=threads
    )
    seconds = time.perf_counter() - t0
    if faults is not None:
        faults.between(task, attempt, store, table)
    info = {
        "n_owned": owned_stop - owned_start,
        "halo": int(coords.shape[0]),
        "seconds": round(seconds, 6),
        "peak_memory": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
        "host": socket.gethostname(),
        "edges": table.stats.edges,
        "splits": table.stats.splits,
    }
    digest = store.commit_task(task, attempt, table.values, table.jumps, info=info)
    return TaskResult(task, digest, seconds, table.stats.edges, owned_stop - owned_start)


@dataclass(frozen=True)
class _FaultPlan:
    """Deterministic faults for tests, read from the JSON file named by CHITALLY_FAULTS.

    Keys: ``log`` (a directory: one line per attempt is appended to ``task-<i>``),
    ``fail`` ({task: number of first attempts that raise}), ``poison`` ([tasks that
    always raise]), ``exit_between`` ([tasks whose first attempt ends its process after
    writing data but before the commit record]), ``delay`` (seconds to sleep in every task, to let a test act while a run is under way), ``delay_first``
    ({task: seconds} slept by that task's first attempt only: a stalled attempt that a
    test can kill, knowing the next attempt will go through), ``gate`` ({task: path}: that
    task waits until the file exists, so a test acts while a run is surely under way).
    """

    spec: dict[str, Any]

    @staticmethod
    def from_env() -> _FaultPlan | None:
        path = os.environ.get(FAULTS_ENV)
        if not path:
            return None
        return _FaultPlan(json.loads(Path(path).read_text()))

    def _attempts(self, task: int) -> int:
        log = self.spec.get("log")
        if not log:
            return 0
        f = Path(log) / f"task-{task}"
        return len(f.read_text().splitlines()) if f.exists() else 0

    def before(self, task: int, attempt: str) -> None:
        log = self.spec.get("log")
        if log:
            with open(Path(log) / f"task-{task}", "a") as f:
                f.write(f"{attempt} {os.getpid()}\n")
        n = self._attempts(task)
        if task in self.spec.get("poison", []):
            raise RuntimeError(f"injected poison in task {task}")
        if n <= int(self.spec.get("fail", {}).get(str(task), 0)):
            raise RuntimeError(f"injected failure in task {task}, attempt {n}")
        delay = float(self.spec.get("delay", 0))
        if n <= 1:
            delay += float(self.spec.get("delay_first", {}).get(str(task), 0))
        if delay:
            time.sleep(delay)
        gate = self.spec.get("gate", {}).get(str(task))
        deadline = time.monotonic() + 600
        while gate and not Path(gate).exists():
            if time.monotonic() > deadline:
                raise RuntimeError(f"task {task}: gate {gate} never opened")
            time.sleep(0.02)

    def between(self, task: int, attempt: str, store: RunStore, table: Any) -> None:
        if task in self.spec.get("exit_between", []) and self._attempts(task) <= 1:
            # write the data as a real attempt would, then die before the record
            store._write_table(task, attempt, table.values, table.jumps, table_digest(table.values, table.jumps))
            os._exit(17)
