"""Deterministic faults around the engine's task function, injected from the test side.

`FaultWrapper(spec)` is a picklable callable with the signature of
`chitally.engine.run_task`. Executors take it as ``task_function=``; a test that drives
the CLI in its own process replaces ``chitally.engine.run_task`` with it (the executors
look that name up at call time). Dask pickles the wrapper by reference to this module, so
every worker must find ``tests/`` on its ``PYTHONPATH`` (`helpers.child_env` sees to it).

The spec (a JSON-able dict):

``log``
    A folder: every attempt appends ``<attempt> <pid>`` to ``task-<i>`` there, before any
    fault, so a test counts exactly which tasks ran, how often and in which process.
``fail``
    ``{task: n}``: the first `n` attempts of the task raise.
``poison``
    ``[task, ...]``: every attempt raises.
``exit_between``
    ``[task, ...]``: the first attempt computes and writes its outputs as a real attempt
    would, then ends its process (``os._exit(17)``) before the commit record.
``delay``
    Seconds every attempt sleeps before running.
``delay_first``
    ``{task: seconds}`` slept by the first attempt only: a stalled attempt that a test
    can kill, knowing the next attempt goes through.
``kind``
    Only tasks of run stores of this job kind are logged and faulted; the others run
    untouched (a run planned in stages runs several kinds, each numbering from 0).
``gate``
    ``{task: path}``: the attempt waits until the file exists (at most ``gate_timeout``
    seconds, default 300), so a test acts while a run is surely under way.

Run as a program, ``python -m faultwrap SPEC.json ARGS...`` is the ``chitally`` command
with the faults of the JSON file SPEC.json around every task it runs.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path
from typing import Any

from chitally import engine

#: The engine's own task function, captured before anything can replace it.
ORIGINAL = engine.run_task

EXIT_BETWEEN_CODE = 17


class InjectedFault(RuntimeError):
    """The error a fault raises (any other task error: retried by the executors)."""


class FaultWrapper:
    """`chitally.engine.run_task` with the faults of `spec` (see the module docstring)."""

    def __init__(self, spec: dict[str, Any] | None = None) -> None:
        self.spec = dict(spec or {})

    def __repr__(self) -> str:
        return f"FaultWrapper({self.spec!r})"

    # -------------------------------------------------------------- the attempt log

    def _log_file(self, task: int) -> Path | None:
        log = self.spec.get("log")
        return None if not log else Path(log) / f"task-{int(task)}"

    def _record(self, task: int, attempt: str) -> int:
        """Log this attempt; returns how many attempts of `task` the log now holds."""
        f = self._log_file(task)
        if f is None:
            return 1
        with open(f, "a") as out:  # O_APPEND: concurrent attempts never interleave a line
            out.write(f"{attempt} {os.getpid()}\n")
        return len(f.read_text().splitlines())

    def _get(self, key: str, task: int, default: Any = None) -> Any:
        table = self.spec.get(key) or {}
        return table.get(str(int(task)), default)

    # -------------------------------------------------------------- the task function

    def __call__(self, store: Any, task: int, attempt: str, *, threads: int = 1) -> Any:
        kind = self.spec.get("kind")
        if kind is not None and store.kind != kind:
            return ORIGINAL(store, task, attempt, threads=threads)
        n = self._record(task, attempt)
        if int(task) in self.spec.get("poison", []):
            raise InjectedFault(f"injected poison in task {task}")
        if n <= int(self._get("fail", task, 0)):
            raise InjectedFault(f"injected failure in task {task}, attempt {n}")
        delay = float(self.spec.get("delay", 0))
        if n <= 1:
            delay += float(self._get("delay_first", task, 0))
        if delay:
            time.sleep(delay)
        gate = self._get("gate", task)
        if gate:
            deadline = time.monotonic() + float(self.spec.get("gate_timeout", 300))
            while not Path(gate).exists():
                if time.monotonic() > deadline:
                    raise InjectedFault(f"task {task}: gate {gate} never opened")
                time.sleep(0.02)
        if int(task) in self.spec.get("exit_between", []) and n <= 1:
            self._write_then_exit(store, task, attempt, threads)
        return ORIGINAL(store, task, attempt, threads=threads)

    @staticmethod
    def _write_then_exit(store: Any, task: int, attempt: str, threads: int) -> None:
        """Write the task's outputs exactly as an attempt does, then die before the
        commit record."""
        import numpy as np

        from chitally.jobs import kind_of
        from chitally.store import CommitLog

        store = engine.worker_store(store)
        outputs, _ = kind_of(store.kind).task_function()(store, task, threads=threads)
        arrays = {name: np.ascontiguousarray(outputs[name], dtype=np.dtype(dtype).newbyteorder("<"))
                  for name, dtype in store.commits.outputs}
        store.io.write_verified(CommitLog.output_prefix(task), arrays, what="write task outputs",
                                task=task, attempt=attempt)
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(EXIT_BETWEEN_CODE)


def load(path: str | os.PathLike[str]) -> FaultWrapper:
    return FaultWrapper(json.loads(Path(path).read_text()))


def main(argv: list[str] | None = None) -> Any:
    """``python -m faultwrap SPEC.json ARGS...``: the chitally command with faults."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv:
        sys.exit("usage: python -m faultwrap SPEC.json CHITALLY-ARGS...")
    engine.run_task = load(argv[0])
    from chitally.cli import main as cli

    return cli.main(args=argv[1:], prog_name="chitally")


if __name__ == "__main__":
    # Import this file again under its own name: the wrapper must pickle as
    # `faultwrap.FaultWrapper` (which workers import), not as `__main__.FaultWrapper`.
    import faultwrap

    sys.exit(faultwrap.main())
