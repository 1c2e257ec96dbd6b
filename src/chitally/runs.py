"""Runs: create or open a run store, execute its tasks, reduce, resume, report status.

This is the Python API behind `chitally run`, `batch`, `resume`, `status` and `export`,
and it owns orchestration: the writer lease is taken before any cluster starts, then the
cluster is connected (or the serial executor chosen), the workers checked, the memory of
the heaviest task compared with what a worker thread may use, and the tasks executed
with the lease held and fenced. Every job kind runs through here; the CLI only parses
and prints.

Defaults not given here (retries, the window per worker thread, lost_after, the lease's
staleness, waiting for workers) come from the Dask configuration's ``chitally`` section
(see `chitally.cluster`). Storage options travel to the workers inside the pickled store
and are never written into the store or the logs.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .execute import (
    Callbacks,
    DaskExecutor,
    Events,
    Executor,
    Outcome,
    SchedulerLost,
    SerialExecutor,
)
from .jobs import kind_of
from .reduce import Reducer
from .store import (
    CorruptTask,
    IncompleteStore,
    JobSpec,
    Lease,
    NotAStore,
    ResultDamaged,
    RunStore,
    StoreError,
)

logger = logging.getLogger(__name__)

#: What a driver process holds before any run-specific data (Python, numpy, numba, zarr,
#: the Dask client): measured as the peak of a run of a tiny cloud, rounded up.
DRIVER_BASELINE = 400 << 20

MAX_ROUNDS = 3

#: Job kinds whose result is one curve.
CURVE_KINDS = ("cloud", "cloud-parts", "graph", "field", "field-parts")  # executor passes per run: a damaged output found on reduce gets another


class Interrupted(Exception):
    """The run was interrupted (SIGINT or SIGTERM); the lease is released and the
    committed tasks are kept. `signal` is the signal number."""

    def __init__(self, url: str, done: int, n_tasks: int, signal: int) -> None:
        super().__init__(f"interrupted: {done} of {n_tasks} tasks committed; "
                         f"`chitally resume {url}` continues")
        self.url, self.done, self.n_tasks, self.signal = url, done, n_tasks, signal


def _implied(kind: str) -> dict[str, Any]:
    """The parameters a store of `kind` made before they existed was made for."""
    try:
        return dict(kind_of(kind).defaults)
    except ValueError:  # not a kind of this chitally: nothing is implied
        return {}


def open_or_create(url: str, kind: str, params: Mapping[str, Any], fingerprint: Mapping[str, Any],
                   make_spec: Callable[[], JobSpec], *,
                   storage_options: Mapping[str, Any] | None = None,
                   discard: bool = False) -> RunStore:
    """The run store at `url` for this job: opened if it exists (and must match, else
    `StoreMismatch` and nothing written), otherwise created from ``make_spec()``.

    A store whose completion marker is missing gets it back when its parameters, input
    fingerprint, task table and inputs verify; committed work is never deleted unless
    `discard` is given.
    """
    try:
        store = RunStore.open(url, storage_options=storage_options)
    except IncompleteStore:
        store = RunStore.open(url, storage_options=storage_options, allow_incomplete=True)
        try:
            store.rebuild_marker(params, fingerprint, _implied(kind))
        except StoreError as exc:
            logger.info("%s: the marker cannot be rebuilt (%s)", url, exc)
            return RunStore.create(url, make_spec(), storage_options=storage_options, discard=discard)
        return store
    except NotAStore as exc:
        if "is a file" in str(exc):
            raise
        return RunStore.create(url, make_spec(), storage_options=storage_options, discard=discard)
    store.check_matches(kind, params, fingerprint, _implied(kind))
    return store


@dataclass
class RunReport:
    """How a run ended."""

    url: str
    kind: str
    n_tasks: int
    done: int
    failed: dict[int, str] = field(default_factory=dict)
    result: Any = None  # the kind's result (a Curve, a FeatureMatrix) when complete
    seconds: float = 0.0
    computed: int = 0  # tasks computed by this invocation
    set_aside: list[int] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        return self.result is not None

    @property
    def curve(self) -> Any:
        """The curve of a complete `cloud`, `graph` or `field` run (None otherwise); a
        `PartedCurve` for a curve too large for one part."""
        return self.result if self.kind in CURVE_KINDS else None


class _Driver(Callbacks):
    """Feeds completed tasks to the reducer and failures to the store, then to the user."""

    def __init__(self, store: RunStore, reducer: Reducer, user: Events | None, lease: Lease) -> None:
        self.store = store
        self.reducer = reducer
        self.user = user or Callbacks()
        self.lease = lease
        self.set_aside: list[int] = []
        self.last_tick = time.monotonic()

    def task_started(self, task: int, attempt: str) -> None:
        self.user.task_started(task, attempt)

    def task_done(self, result: Any) -> None:
        if not self.reducer.add(result.task):
            self.set_aside.append(result.task)
        self.user.task_done(result)

    def task_retry(self, task: int, attempt: str, message: str) -> None:
        logger.info("task %d attempt %s failed, retrying: %s", task, attempt, message)
        self.user.task_retry(task, attempt, message)

    def task_failed(self, task: int, message: str, attempts: int) -> None:
        self.store.commits.record_failure(task, message, attempts)
        self.user.task_failed(task, message, attempts)

    def tick(self) -> None:
        self.last_tick = time.monotonic()
        self.lease.check()  # a lost lease stops the run at once
        getattr(self.user, "tick", lambda: None)()


def acquire_lease(store: RunStore, *, takeover: bool = False) -> Lease:
    """The store's writer lease for this process (raises `LeaseHeld` if another run has
    it), beating from now on: starting a cluster can take a while."""
    from .cluster import seconds

    # the lease records host and pid itself: the owner names only what is running
    lease = store.acquire_lease(f"chitally {store.kind} run", takeover=takeover,
                                stale_after=seconds("lease.stale-after"))
    lease.start()
    return lease


def read_result(store: RunStore) -> Any:
    """The verified result of a complete run (a `Curve` for `cloud`), None before."""
    return kind_of(store.kind).read_result(store)


def execute(store: RunStore, executor: Executor, *, events: Events | None = None,
            takeover: bool = False, on_pending: Callable[[RunStore, list[int]], None] | None = None,
            checkpoint_every: int = 256, lease: Lease | None = None) -> RunReport:
    """Compute every task not yet committed, reduce, and write the result if complete.

    Holds the store's writer lease throughout: the one given (taken earlier with
    `acquire_lease`) or one taken here; released when this returns or raises. Every
    write only the holder may make is fenced: if another process takes the lease over,
    the run stops at once with `LeaseLost`.
    """
    t0 = time.perf_counter()
    if lease is None:
        lease = acquire_lease(store, takeover=takeover)
    with lease:
        store.clean_partials()
        reducer = Reducer(store, every_tasks=checkpoint_every)
        driver = _Driver(store, reducer, events, lease)
        # the heartbeat proves this loop is alive, not only that a thread is
        lease.alive = lambda: time.monotonic() - driver.last_tick < lease.stale_after / 2 \
            or isinstance(executor, SerialExecutor)
        driver.set_aside.extend(reducer.add_committed())
        outcome = Outcome()
        computed = 0
        for _ in range(MAX_ROUNDS):
            committed = store.commits.committed()
            pending = [t for t in range(store.n_tasks) if not committed[t] and not reducer.is_covered(t)]
            if not pending:
                break
            if on_pending is not None:
                on_pending(store, pending)
            seen = len(driver.set_aside)
            outcome = executor.run(store, pending, driver)
            computed += len(outcome.done)
            if outcome.failed or len(driver.set_aside) == seen:
                break
        # tasks committed by an earlier, interrupted driver after our first listing
        reducer.add_committed()
        result = None
        if reducer.complete:
            reducer.finish()
            result = read_result(store)
        else:
            reducer.checkpoint()
    return RunReport(url=store.url, kind=store.kind, n_tasks=store.n_tasks, done=reducer.n_covered,
                     failed=dict(outcome.failed), result=result,
                     seconds=time.perf_counter() - t0, computed=computed,
                     set_aside=list(driver.set_aside))


@dataclass(frozen=True)
class Where:
    """Where a run's tasks execute: in this process (`serial`), on an existing Dask
    scheduler (`scheduler`, `scheduler_file`, or DASK_SCHEDULER_ADDRESS), or on a
    LocalCluster started here (the default) with `workers` processes of `threads`.

    `retries`, `lost_after`, `wait_workers` and `wait_timeout` left at None take the
    Dask config's ``chitally`` values. `security` is a distributed `Security` (see
    `chitally.cluster.make_security`); None means the ``distributed.comm.tls.*`` config
    keys, if any. `storage_options` are the workers' options for the run store when they
    reach it otherwise than this process (another endpoint, say); None means the
    store's own, which travel with it.
    """

    scheduler: str | None = None
    scheduler_file: str | None = None
    workers: int | None = None
    threads: int | None = None
    serial: bool = False
    retries: int | None = None
    takeover: bool = False
    lost_after: float | None = None
    storage_options: Mapping[str, Any] | None = None
    security: Any = None
    wait_workers: int | None = None
    wait_timeout: float | None = None


class _OnWorkers:
    """An executor that hands its workers the run store opened with other storage options."""

    def __init__(self, inner: DaskExecutor, store: RunStore) -> None:
        self.inner, self.store = inner, store

    def run(self, store: RunStore, tasks: Any, events: Events) -> Outcome:
        # the task costs (bundle sizes) as this process reads them, not as the workers do
        return self.inner.run(self.store, tasks, events, cost=store.task_cost())


def _for_workers(store: RunStore, storage_options: Mapping[str, Any] | None) -> RunStore:
    """`store` as the workers open it: with `storage_options` instead of the driver's."""
    if storage_options is None:
        return store
    from .store.io import StoreIO

    # a store pickles as (reattach, (io, root record)): the same record, another io
    reattach, args = store.__reduce__()
    return reattach(StoreIO(store.url, storage_options), *args[1:])


class Session:
    """One place to run tasks for several stores in turn: the cluster is connected when
    the first store needs it and kept for the next (planning stages, then the run).

    Each store still gets its own lease, taken before the cluster starts, its worker
    check and its memory preflight. Use as a context manager; `close` shuts the cluster.
    """

    def __init__(self, where: Where = Where(), *, on_connect: Callable[[Any], None] | None = None) -> None:
        self.where = where
        self.on_connect = on_connect
        self.conn: Any = None

    def __enter__(self) -> Session:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        if self.conn is not None:
            conn, self.conn = self.conn, None
            conn.close()

    def run(self, store: RunStore, *, events: Events | None = None,
            on_pending: Callable[[RunStore, list[int]], None] | None = None) -> RunReport:
        """Execute `store`'s pending tasks (see `run`), then the job that finishes it if
        its kind has one (the merge of a curve reduced in parts)."""
        report = self._run_one(store, events=events, on_pending=on_pending)
        kind = kind_of(store.kind)
        if kind.then is None or report.complete or report.failed or report.done < report.n_tasks:
            return report
        follow = self.run(kind.follow_up(store), events=events, on_pending=on_pending)
        result = read_result(store) if follow.complete else None
        return RunReport(url=store.url, kind=store.kind, n_tasks=store.n_tasks, done=report.done,
                         failed=dict(follow.failed), result=result,
                         seconds=report.seconds + follow.seconds, computed=report.computed,
                         set_aside=report.set_aside)

    def _run_one(self, store: RunStore, *, events: Events | None = None,
                 on_pending: Callable[[RunStore, list[int]], None] | None = None) -> RunReport:
        from .cluster import check_workers, connect, preflight_memory, seconds, setting
        from .interrupts import signals_as_interrupts

        where = self.where
        if store.is_complete():
            try:
                result = read_result(store)
            except ResultDamaged:
                result = None
            if result is not None:
                return RunReport(url=store.url, kind=store.kind, n_tasks=store.n_tasks,
                                 done=store.n_tasks, result=result)
        retries = int(setting("retries", where.retries))
        lease = acquire_lease(store, takeover=where.takeover)
        with signals_as_interrupts() as caught:
            try:
                with lease:
                    if where.serial:
                        executor: Executor = SerialExecutor(threads=where.threads or 1, retries=retries)
                        return execute(store, executor, events=events, on_pending=on_pending, lease=lease)
                    if self.conn is None:
                        self.conn = connect(where.scheduler, where.scheduler_file, where.workers,
                                            where.threads, security=where.security,
                                            wait_workers=where.wait_workers,
                                            wait_timeout=where.wait_timeout)
                        if self.on_connect is not None:
                            self.on_connect(self.conn)
                    remote = _for_workers(store, where.storage_options)
                    check_workers(self.conn.client, remote)
                    preflight_memory(self.conn.client, int(store.task_memory().max(initial=0)))
                    executor = DaskExecutor(self.conn.client, window_factor=setting("window-factor"),
                                            bundle_seconds=seconds("bundle-seconds"),
                                            retries=retries,
                                            lost_after=seconds("lost-after", where.lost_after))
                    if remote is not store:
                        executor = _OnWorkers(executor, remote)
                    return execute(store, executor, events=events, on_pending=on_pending, lease=lease)
            except KeyboardInterrupt:
                self.close()
                done = int(store.commits.committed().sum())
                raise Interrupted(store.url, done, store.n_tasks, caught.signal or 2) from None
            except SchedulerLost as exc:
                exc.url = store.url  # for the way out: resuming this store
                raise


def run(store: RunStore, where: Where = Where(), *, events: Events | None = None,
        on_pending: Callable[[RunStore, list[int]], None] | None = None,
        on_connect: Callable[[Any], None] | None = None) -> RunReport:
    """Execute `store`'s pending tasks where `where` says, with every check first.

    A complete store is reported as it is, without a lease (a read-only store is fine).
    Otherwise the lease is taken before any cluster starts, so a refused run costs
    nothing; an existing scheduler is given time for its workers to arrive; the cluster
    is checked (versions, store access, memory per thread) before dispatch; SIGINT and
    SIGTERM raise `Interrupted` after the lease is released and the cluster closed.
    """
    with Session(where, on_connect=on_connect) as session:
        return session.run(store, events=events, on_pending=on_pending)


def status(store: RunStore) -> dict[str, Any]:
    """Tasks done, pending and failed; cost-weighted progress; time so far and left;
    damaged records reported, never raised."""
    committed = store.commits.committed()
    failures = store.commits.failures()
    failed = np.zeros(store.n_tasks, dtype=bool)
    for t in failures:
        failed[t] = not committed[t]
    cost = store.task_cost().astype(np.float64)
    done_cost = float(cost[committed].sum())
    total_cost = float(cost.sum()) or 1.0
    seconds, stamps, damaged = [], [], []
    for t in np.flatnonzero(committed):
        try:
            rec = store.commits.record(int(t)) or {}
        except CorruptTask:
            damaged.append(int(t))
            continue
        seconds.append(float(rec.get("seconds", 0.0)))
        stamps.append(rec.get("committed"))
    compute = float(np.sum(seconds)) if seconds else 0.0
    left = compute * (total_cost - done_cost) / done_cost if done_cost else None
    try:
        result, result_damage = read_result(store), None
    except ResultDamaged as exc:
        result, result_damage = None, str(exc)
    holder = store.holder()
    return {
        "store": store.url,
        "kind": store.kind,
        "tasks": int(store.n_tasks),
        "done": int(committed.sum()),
        "failed": int(failed.sum()),
        "pending": int(store.n_tasks - committed.sum() - failed.sum()),
        "percent": round(100.0 * done_cost / total_cost, 2),
        "task_seconds": round(compute, 3),
        "task_seconds_left_estimate": None if left is None else round(left, 3),
        "first_commit": min((s for s in stamps if s), default=None),
        "last_commit": max((s for s in stamps if s), default=None),
        "complete": result is not None,
        "result_damaged": result_damage,
        "damaged_commit_records": damaged,
        "running": None if holder is None else {k: holder.get(k) for k in ("owner", "host", "pid", "verdict")},
        "failures": {int(t): failures[t].get("message", "") for t in failures if not committed[t]},
    }


def open_run(url: str, *, storage_options: Mapping[str, Any] | None = None) -> RunStore:
    """Open an existing run store (read-only use needs no lease)."""
    return RunStore.open(url, storage_options=storage_options)
