"""Executors: run task ids of one run store and report through callbacks.

An executor has one method, ``run(store, tasks, events) -> Outcome``, and knows nothing
of what a task computes: it calls a task function (`chitally.engine.run_task` unless
another is given, e.g. a test's fault-injecting wrapper). The serial for-loop is the
reference; the Dask executor sends small tasks in bundles (`chitally.bundles`), submits
in a window that follows the live cluster (workers that join later raise it), notices a
lost scheduler, and keeps our own bounded retries so every attempt has a name and errors
that another attempt cannot cure are not retried. Executors never print; progress,
logging and checkpointing hang off `Events`.
"""

from __future__ import annotations

import logging
import math
import pickle
import socket
import time
import traceback
from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import CancelledError
from dataclasses import dataclass, field
from typing import Any, Protocol

from . import engine
from .bundles import Bundler
from .engine import TaskResult
from .store import CommitConflict, InputsDamaged, LeaseLost, RunStore, StoreMismatch
from .validate import InputError

logger = logging.getLogger(__name__)

# errors that another attempt of the same task cannot cure
NOT_RETRIED: tuple[type[BaseException], ...] = (InputError, CommitConflict, StoreMismatch, InputsDamaged)
# errors that end the whole run at once: no other task can succeed either
FATAL: tuple[type[BaseException], ...] = (InputsDamaged, LeaseLost)


class SchedulerLost(RuntimeError):
    """The Dask scheduler (or every worker) went away; the run can be resumed."""


class Events(Protocol):
    """Callbacks an executor calls; every one is optional in `Callbacks`."""

    def task_started(self, task: int, attempt: str) -> None: ...
    def task_done(self, result: TaskResult) -> None: ...
    def task_retry(self, task: int, attempt: str, message: str) -> None: ...
    def task_failed(self, task: int, message: str, attempts: int) -> None: ...
    def tick(self) -> None: ...


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

    def tick(self) -> None:
        """Called at least every second or so while the executor waits: proof of life."""


@dataclass
class Outcome:
    """What an executor did: tasks done and tasks that failed with their messages."""

    done: list[int] = field(default_factory=list)
    failed: dict[int, str] = field(default_factory=dict)


class Executor(Protocol):
    def run(self, store: RunStore, tasks: Sequence[int], events: Events) -> Outcome: ...


TaskFunction = Callable[..., TaskResult]


def message_of(exc: BaseException) -> str:
    text = " ".join(f"{type(exc).__name__}: {exc}".split())
    return text if len(text) < 2000 else text[:2000] + "..."


def attempt_name(task: int, number: int) -> str:
    return f"{socket.gethostname()}-{task}-{number}"


def _task_function(given: TaskFunction | None) -> TaskFunction:
    # looked up at run time, so a test can wrap the engine's function from its own side
    return given if given is not None else engine.run_task


#: What a bundle reports per task: its id, and its result or the error it raised.
BundleOutcome = tuple[int, "TaskResult | BaseException"]


def _sendable(exc: Exception) -> Exception:
    """`exc` if it survives pickling (the driver needs its type to judge a retry), else
    a RuntimeError with its message."""
    try:
        pickle.loads(pickle.dumps(exc))
        return exc
    except Exception:
        return RuntimeError(message_of(exc))


def run_bundle(fn: TaskFunction, store: RunStore, tasks: Sequence[int], attempts: Sequence[str], *,
               threads: int = 1) -> list[BundleOutcome]:
    """Run `tasks` one after the other on this worker, each through `fn` (committed on
    its own), and report each one's outcome: an error of one task does not stop the
    others, except a fatal one (no other task can succeed either), after which the rest
    are not run and not reported."""
    out: list[BundleOutcome] = []
    for task, attempt in zip(tasks, attempts):
        try:
            result: TaskResult | BaseException = fn(store, task, attempt, threads=threads)
        except Exception as exc:
            logger.debug("task %d attempt %s failed:\n%s", task, attempt, traceback.format_exc())
            result = _sendable(exc)
        out.append((int(task), result))
        if isinstance(result, FATAL):
            break
    return out


class SerialExecutor:
    """Runs tasks one after the other in this process: the reference executor."""

    def __init__(self, threads: int = 1, retries: int = 2,
                 task_function: TaskFunction | None = None) -> None:
        self.threads = threads
        self.retries = retries
        self.task_function = task_function

    def run(self, store: RunStore, tasks: Sequence[int], events: Events) -> Outcome:
        fn = _task_function(self.task_function)
        outcome = Outcome()
        for task in tasks:
            for number in range(self.retries + 1):
                attempt = attempt_name(task, number)
                events.task_started(task, attempt)
                try:
                    result = fn(store, task, attempt, threads=self.threads)
                except FATAL:
                    raise
                except NOT_RETRIED as exc:
                    outcome.failed[task] = message_of(exc)
                    events.task_failed(task, outcome.failed[task], number + 1)
                    break
                except Exception as exc:  # any other error: bounded retries
                    logger.debug("task %d attempt %s failed:\n%s", task, attempt, traceback.format_exc())
                    if number == self.retries:
                        outcome.failed[task] = message_of(exc)
                        events.task_failed(task, outcome.failed[task], number + 1)
                    else:
                        events.task_retry(task, attempt, message_of(exc))
                    continue
                outcome.done.append(task)
                events.task_done(result)
                events.tick()
                break
        return outcome


class DaskExecutor:
    """Runs tasks on a Dask cluster through `client`.

    Small tasks travel in bundles (see `chitally.bundles`): a Dask task that runs several
    engine tasks one after the other, each committed on its own, so that a bundle holds
    about `bundle_seconds` of estimated work (0: every task alone; `bundle_tasks`: that
    many tasks a bundle instead). A retry always runs alone. At most `window` Dask tasks
    are in flight; by default `window_factor` per worker thread of the live cluster,
    recounted (at most once a second) as workers come and go. Keys are
    ``chitally-<kind>-<plan digest>-<store hash>-<task>[-r<retry>]``, and
    ``...-<first task>-n<tasks>`` for a bundle, so the dashboard groups them by run;
    tasks arrive heaviest first and keep that priority. When the client closes, or no
    worker is connected for `lost_after` seconds, `SchedulerLost` is raised with the
    in-flight tasks cancelled.
    """

    def __init__(self, client: Any, retries: int = 2, window: int | None = None, threads: int = 1,
                 task_function: TaskFunction | None = None, lost_after: float = 60.0,
                 window_factor: float = 4.0, bundle_seconds: float = 0.1,
                 bundle_tasks: int | None = None) -> None:
        self.client = client
        self.retries = retries
        self.threads = threads
        self.fixed_window = window
        self.window_factor = float(window_factor)
        self.task_function = task_function
        self.lost_after = float(lost_after)
        self.bundle_seconds = float(bundle_seconds)
        self.bundle_tasks = bundle_tasks
        self._window_at = -1.0
        self._window = max(1, math.ceil(self.window_factor))
        self._slots = 1

    def window(self) -> int:
        if self.fixed_window is not None:
            return self.fixed_window
        now = time.monotonic()
        if now - self._window_at > 1.0:
            try:
                workers = self.client.scheduler_info(n_workers=-1)["workers"].values()
            except TypeError:  # older distributed: no n_workers argument
                workers = self.client.scheduler_info()["workers"].values()
            except Exception:
                workers = []
            slots = sum(w.get("nthreads", 1) for w in workers)
            self._slots = max(1, slots)
            factor = self.window_factor
            self._window = max(1, math.ceil(factor), math.ceil(factor * slots))
            self._window_at = now
        return self._window

    def _client_gone(self) -> str | None:
        """The client's status if it lost its scheduler, else None. "connecting": the
        client lost its scheduler and cancelled every future; even if it reconnects,
        nothing submitted survives."""
        status = getattr(self.client, "status", "running")
        return status if status in ("closed", "closing", "failed", "connecting") else None

    def _lost(self) -> SchedulerLost:
        status = getattr(self.client, "status", "running")
        try:
            where = f", scheduler {self.client.scheduler.address}"
        except Exception:
            where = ""
        return SchedulerLost(f"the Dask scheduler was lost (client {status}{where})")

    def _check_alive(self, since_workers: list[float]) -> None:
        if self._client_gone():
            raise self._lost()
        now = time.monotonic()
        try:
            n = len(self.client.scheduler_info()["workers"])
        except Exception:
            n = 0
        if n:
            since_workers[0] = now
        elif now - since_workers[0] > self.lost_after:
            raise SchedulerLost(f"no Dask worker for {self.lost_after:g} s")

    def run(self, store: RunStore, tasks: Sequence[int], events: Events, *,
            cost: Any = None) -> Outcome:
        """Run `tasks` of `store`; `cost` is each task's estimated cost (the store's own,
        read here, when None)."""
        import hashlib

        from distributed import wait

        fn = _task_function(self.task_function)
        outcome = Outcome()
        # two stores of one plan may run at once on one cluster: keys must differ
        prefix = (f"chitally-{store.kind}-{store.plan_digest[:16]}-"
                  f"{hashlib.sha256(store.url.encode()).hexdigest()[:6]}")
        queue = deque(int(t) for t in tasks)
        if cost is None:
            cost = store.task_cost() if queue else []
        bundler = Bundler(cost, self.bundle_seconds, size=self.bundle_tasks)
        attempts: dict[int, int] = {}
        in_flight: dict[Any, list[int]] = {}
        submitted = 0
        since_workers = [time.monotonic()]

        def submit(bundle: list[int]) -> None:
            nonlocal submitted
            names = [attempt_name(t, attempts.get(t, 0)) for t in bundle]
            first, number = bundle[0], attempts.get(bundle[0], 0)
            if len(bundle) == 1:
                # alone, the task function is the Dask task: its error is the future's
                key = f"{prefix}-{first}" + (f"-r{number}" if number else "")
                fut = self.client.submit(fn, store, first, names[0], threads=self.threads, key=key,
                                         pure=False, priority=-submitted)
            else:
                fut = self.client.submit(run_bundle, fn, store, bundle, names, threads=self.threads,
                                         key=f"{prefix}-{first}-n{len(bundle)}", pure=False,
                                         priority=-submitted)
            submitted += 1
            in_flight[fut] = bundle
            for task, name in zip(bundle, names):
                events.task_started(task, name)

        def refill() -> None:
            while queue and len(in_flight) < self.window():
                # at least two bundles per worker thread for what is left: the last
                # bundles keep every worker busy
                submit(bundler.take(queue, spread=2 * self._slots if self.fixed_window is None
                                    else self.window()))

        def settle(task: int, result: Any) -> None:
            """One task's outcome: its result, or the error its attempt ended with."""
            if not isinstance(result, BaseException):
                outcome.done.append(task)
                events.task_done(result)
                return
            if isinstance(result, CancelledError):
                raise self._lost() from result
            if isinstance(result, FATAL):
                raise result
            if isinstance(result, NOT_RETRIED):
                outcome.failed[task] = message_of(result)
                events.task_failed(task, outcome.failed[task], attempts.get(task, 0) + 1)
                return
            if self._client_gone():
                raise self._lost() from result
            number = attempts.get(task, 0)
            if number >= self.retries:
                outcome.failed[task] = message_of(result)
                events.task_failed(task, outcome.failed[task], number + 1)
            else:
                events.task_retry(task, attempt_name(task, number), message_of(result))
                attempts[task] = number + 1
                submit([task])

        try:
            refill()
            while in_flight:
                try:
                    finished = wait(list(in_flight), timeout=1.0, return_when="FIRST_COMPLETED").done
                except TimeoutError:
                    finished = set()
                except CancelledError as exc:
                    # the client cancels all our futures when it loses the scheduler
                    raise self._lost() from exc
                events.tick()
                if not finished:
                    self._check_alive(since_workers)
                    refill()
                    continue
                results = self._gather(finished)
                for fut in finished:
                    bundle = in_flight.pop(fut)
                    try:
                        try:
                            value = results[fut] if fut in results else fut.result()
                        except (CancelledError, *FATAL):
                            raise
                        except Exception as exc:
                            # the Dask task failed (a bundle as a whole: its worker died
                            # too often, say): one failed attempt for each of its tasks
                            for task in bundle:
                                settle(task, exc)
                            continue
                        for task, result in ([(bundle[0], value)] if len(bundle) == 1 else value):
                            if isinstance(result, TaskResult) and not result.cached and result.wall:
                                bundler.observe(task, result.seconds, result.wall)
                            settle(task, result)
                    except CancelledError as exc:
                        raise self._lost() from exc
                    finally:
                        fut.release()
                results.clear()
                refill()
        except BaseException as exc:
            if isinstance(exc, KeyboardInterrupt):
                # an interruption can land inside a gather: the scheduler in this process
                # then finds the keys we cancel gone, and logs that as an error
                from .cluster import drop_messages

                drop_messages("distributed.scheduler", "Couldn't gather keys")
            self._cancel(list(in_flight))
            # A closed client fails whatever touches it next (waiting raises
            # FuturesCancelledError, submitting raises too): that is a lost scheduler.
            status = self._client_gone()
            if (status and isinstance(exc, Exception)
                    and not isinstance(exc, (SchedulerLost, *FATAL))):
                raise self._lost() from exc
            raise
        self._settle_releases()
        return outcome

    def _settle_releases(self) -> None:
        """Let the client forget the futures released above before anyone submits again.

        `Future.release` only queues the release on the client's event loop; a run right
        after this one submits the same keys, and a key the client still holds would hand
        back the old result instead of running the task. A no-op run on that loop comes
        after every queued release."""
        if getattr(self.client, "status", "") != "running":
            return

        async def settled() -> None:
            return None

        try:
            self.client.sync(settled)
        except Exception:  # best effort: the cluster may be going away
            logger.debug("waiting for released futures failed", exc_info=True)

    def _gather(self, finished: set[Any]) -> dict[Any, Any]:
        """The results of the futures that finished without error, in one gather: one
        round trip for all of them, where each ``Future.result()`` makes its own (tens
        of milliseconds each on a busy machine, more than a small task takes). Empty
        when the gather fails: each future then answers for itself."""
        ok = [f for f in finished if f.status == "finished"]
        if not ok:
            return {}
        try:
            return dict(zip(ok, self.client.gather(ok)))
        except Exception:
            logger.debug("gathering %d results failed; one at a time", len(ok), exc_info=True)
            return {}

    def _cancel(self, futures: list[Any]) -> None:
        if not futures or getattr(self.client, "status", "") != "running":
            return
        try:
            self.client.cancel(futures, force=True)
        except Exception:  # best effort: the cluster may be going away
            logger.debug("cancelling in-flight tasks failed", exc_info=True)
