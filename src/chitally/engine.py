"""The engine's task runner: one task of any job kind, from the store to its commit.

Every executor runs `run_task`, so what a task computes never depends on where it runs.
It opens the store once per worker process, returns at once for a task already committed
(Dask may rerun a finished task whose result lived on a lost worker), calls the kind's
task function, commits the outputs through the commit log and returns a small
`TaskResult`: the outputs themselves travel through the store.
"""

from __future__ import annotations

import resource
import time
from dataclasses import dataclass, field
from typing import Any

from .jobs import kind_of
from .store import RunStore, StoreMismatch


@dataclass(frozen=True)
class TaskResult:
    """What a task sends back to the driver: small, picklable, no arrays. `seconds` is
    the kind's task function's time (recorded in the commit); `wall` the engine's whole
    time for the task on its worker, store reads and the commit included."""

    task: int
    digest: str
    seconds: float
    counters: dict[str, int | float] = field(default_factory=dict)
    cached: bool = False
    wall: float = 0.0


_OPEN: dict[str, RunStore] = {}


def peak_memory() -> int:
    """This process's peak resident memory in bytes: VmHWM, which starts afresh in a
    new program, where ru_maxrss keeps what the process held before its exec (a worker
    started from a large driver would report the driver's peak)."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def reset_peak_memory() -> bool:
    """Start this process's peak (VmHWM) afresh from its current resident memory, so a
    phase's own peak can be read after it; False where the system cannot (not Linux)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def worker_store(store: RunStore) -> RunStore:
    """This process's open copy of `store` (its array handles cached across tasks).

    A long-lived worker outlives run stores: one deleted and created again at the same
    URL must not be read through handles this process opened for its predecessor.
    """
    mine = _OPEN.get(store.url)
    if mine is None or mine.plan_digest != store.plan_digest:
        fresh = RunStore.open(store.url, storage_options=store.io.storage_options)
        if fresh.plan_digest != store.plan_digest:
            raise StoreMismatch(f"run store {store.url} holds plan {fresh.plan_digest[:16]}, the "
                                f"driver runs plan {store.plan_digest[:16]}")
        _OPEN[store.url] = mine = fresh
    return mine


def run_task(store: RunStore, task: int, attempt: str, *, threads: int = 1) -> TaskResult:
    """Compute task `task` of `store` and commit its outputs (idempotent).

    Outputs are deterministic, so a duplicate attempt writes the same bytes and agrees
    with the commit record whichever attempt wrote it first.
    """
    start = time.perf_counter()
    store = worker_store(store)
    done = store.commits.verified_record(task)
    if done is not None:
        return TaskResult(task, str(done["digest"]), 0.0, dict(done.get("counters", {})), cached=True,
                          wall=time.perf_counter() - start)
    compute = kind_of(store.kind).task_function()
    t0 = time.perf_counter()
    outputs, counters = compute(store, task, threads=threads)
    seconds = time.perf_counter() - t0
    info: dict[str, Any] = {
        "seconds": round(seconds, 6),
        "peak_memory": peak_memory(),
        "counters": dict(counters),
    }
    digest = store.commits.commit(task, attempt, outputs, info=info)
    return TaskResult(task, digest, seconds, dict(counters), wall=time.perf_counter() - start)
