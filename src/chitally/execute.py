"""Executors: run a set of tasks of one run store and report through callbacks.

Two executors run the same task function (`chitally.tasks.run_task`): a serial for-loop,
the reference in tests, and a Dask executor that submits in a bounded window so a
million tasks never flood the scheduler. Retries are ours, not Dask's, so that every
attempt has a name, input errors are not retried, and a task that keeps failing is
handed back with its message. Lost workers are Dask's business: it recomputes their
tasks. Executors never print; progress, logging and checkpointing hang off `Events`.
"""

from __future__ import annotations

import hashlib
import logging
import socket
import traceback
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

from .sources import InputError
from .store import CommitConflict, StoreMismatch
from .tasks import InputFault, TaskResult, run_task

logger = logging.getLogger(__name__)

# errors that another attempt of the same task cannot cure
NOT_RETRIED = (InputError, InputFault, CommitConflict, StoreMismatch)


class Events(Protocol):
    """Callbacks an executor calls; every one is optional in `Callbacks`."""

    def task_started(self, task: int, attempt: str) -> None: ...
    def task_done(self, result: TaskResult) -> None: ...
    def task_retry(self, task: int, attempt: str, message: str) -> None: ...
    def task_failed(self, task: int, message: str, attempts: int) -> None: ...


class Callbacks:
    """A do-nothing `Events`; subclass and override what you need."""

    def task_started(self, task: int, attempt: str) -> None:
        pass

    def task_done(self, result: TaskResult) -> None:
        pass

    def task_retry(self, task: int, attempt: str, message: str) -> None:
        pass

    def task_failed(self, task: int, message: str, attempts: int) -> None:
        pass


@dataclass
class Outcome:
    """What an executor did: tasks done and tasks that failed with their messages."""

    done: list[int] = field(default_factory=list)
    failed: dict[int, str] = field(default_factory=dict)


def _message(exc: BaseException) -> str:
    text = f"{type(exc).__name__}: {exc}".replace("\n", " ")
    return text if len(text) < 2000 else text[:2000] + "..."


def attempt_name(task: int, number: int) -> str:
    return f"{socket.gethostname()}-{task}-{number}"


class SerialExecutor:
    """Runs tasks one after the other in this process: the reference executor."""

    def __init__(self, threads: int = 1, retries: int = 2) -> None:
        self.threads = threads
        self.retries = retries

    def run(self, url: str, tasks: Sequence[int], events: Events, plan_digest: str = "") -> Outcome:
        outcome = Outcome()
        for task in tasks:
            for number in range(self.retries + 1):
                attempt = attempt_name(task, number)
                events.task_started(task, attempt)
                try:
                    result = run_task(url, task, attempt, threads=self.threads,
                                      plan_digest=plan_digest or None)
                except NOT_RETRIED as exc:
                    outcome.failed[task] = _message(exc)
                    events.task_failed(task, outcome.failed[task], number + 1)
                    break
                except Exception as exc:  # any other error: bounded retries
                    logger.debug("task %d attempt %s failed:\n%s", task, attempt, traceback.format_exc())
                    if number == self.retries:
                        outcome.failed[task] = _message(exc)
                        events.task_failed(task, outcome.failed[task], number + 1)
                    else:
                        events.task_retry(task, attempt, _message(exc))
                    continue
                outcome.done.append(task)
                events.task_done(result)
                break
        return outcome


class DaskExecutor:
    """Runs tasks on a Dask cluster through `client`, at most `window` in flight.

    Keys are ``chitally-task-<plan digest>-<store hash>-<task>[-r<retry>]`` so the dashboard groups
    them by run. Higher-cost tasks get higher priority (tasks arrive heaviest first).
    """

    def __init__(self, client: Any, retries: int = 2, window: int | None = None, threads: int = 1) -> None:
        self.client = client
        self.retries = retries
        self.threads = threads
        if window is None:
            slots = sum(w.get("nthreads", 1) for w in client.scheduler_info()["workers"].values())
            window = max(4, 4 * slots)
        self.window = window

    def run(self, url: str, tasks: Sequence[int], events: Events, plan_digest: str = "") -> Outcome:
        from distributed import as_completed

        outcome = Outcome()
        # two stores of one plan may run at once on one cluster: keys must differ
        key_prefix = f"chitally-task-{plan_digest}-{hashlib.sha256(url.encode()).hexdigest()[:6]}"
        queue = iter(list(tasks))
        attempts: dict[int, int] = {}
        in_flight: dict[Any, int] = {}
        ac = as_completed()
        submitted = [0]

        def submit(task: int) -> None:
            number = attempts.get(task, 0)
            attempt = attempt_name(task, number)
            key = f"{key_prefix}-{task}" + (f"-r{number}" if number else "")
            fut = self.client.submit(
                run_task, url, task, attempt, threads=self.threads, plan_digest=plan_digest or None,
                key=key, pure=False,
                priority=-submitted[0],  # tasks arrive heaviest first: keep that order
            )
            submitted[0] += 1
            in_flight[fut] = task
            events.task_started(task, attempt)
            ac.add(fut)

        def refill() -> None:
            while len(in_flight) < self.window:
                task = next(queue, None)
                if task is None:
                    return
                submit(task)

        refill()
        for fut in ac:
            task = in_flight.pop(fut)
            try:
                result = fut.result()
            except NOT_RETRIED as exc:
                outcome.failed[task] = _message(exc)
                events.task_failed(task, outcome.failed[task], attempts.get(task, 0) + 1)
            except Exception as exc:
                number = attempts.get(task, 0)
                if number >= self.retries:
                    outcome.failed[task] = _message(exc)
                    events.task_failed(task, outcome.failed[task], number + 1)
                else:
                    events.task_retry(task, attempt_name(task, number), _message(exc))
                    attempts[task] = number + 1
                    submit(task)
            else:
                outcome.done.append(task)
                events.task_done(result)
            finally:
                fut.release()
            refill()
        return outcome


def run_tasks(executor: SerialExecutor | DaskExecutor, url: str, tasks: Iterable[int],
              events: Events | None = None, plan_digest: str = "") -> Outcome:
    """Run `tasks` of the store at `url` on `executor` (a thin convenience)."""
    return executor.run(url, list(tasks), events or Callbacks(), plan_digest)
