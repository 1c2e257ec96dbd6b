"""Runs: plan, create the run store, execute, reduce, resume, report status, export.

This is the Python API behind `chitally run`, `resume`, `status`, `plan` and `export`.
Planning is pure; creating the store is its own explicit, idempotent step; execution
holds the store's writer lease for its whole length; the reducer follows the commits.
"""

from __future__ import annotations

import logging
import os
import socket
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .cover import build_cover
from .curve import Curve
from .execute import Callbacks, DaskExecutor, Events, Outcome, SerialExecutor
from .plan import Cover, Plan
from .planner import make_plan, summarise_plan
from .reduce import Reducer
from .sources import validate_eps, validate_max_dim, validate_points
from .store import CurveDamaged, Lease, RunStore, describe_layout, fingerprint
from .tasks import TaskResult

logger = logging.getLogger(__name__)

# exit codes of the CLI (documented in the README)
EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_INCOMPLETE = 3
EXIT_BUSY = 4

MAX_ROUNDS = 3  # executor passes per run: a damaged output found on reduce gets another


@dataclass(frozen=True)
class Params:
    """The parameters a run store is made for; any difference is a different run."""

    eps: float
    max_dim: int | None = None
    cover_radius: float | None = None
    task_cost: float | None = None

    def as_dict(self) -> dict[str, Any]:
        return {
            "eps": float(self.eps),
            "max_dim": self.max_dim,
            "cover_radius": float(self.cover_radius if self.cover_radius is not None else self.eps),
            "task_cost": None if self.task_cost is None else float(self.task_cost),
        }

    @staticmethod
    def checked(eps: Any, max_dim: Any = None, cover_radius: Any = None, task_cost: Any = None) -> "Params":
        eps = validate_eps(eps)
        radius = None if cover_radius is None else validate_eps(cover_radius)
        cost = None if task_cost is None else validate_eps(task_cost)
        return Params(eps, validate_max_dim(max_dim), radius, cost)


def plan_points(points: np.ndarray, params: Params) -> tuple[Cover, Plan, np.ndarray]:
    """Cover and task table for validated points (pure: touches no storage)."""
    p = params.as_dict()
    cover = build_cover(points, params.eps, p["cover_radius"])
    points_sorted = np.ascontiguousarray(points[cover.order])
    plan = make_plan(points_sorted, cover, params.eps, params.max_dim, task_cost=params.task_cost)
    return cover, plan, points_sorted


def describe_plan(points: np.ndarray, params: Params) -> dict[str, Any]:
    """What a run would do, for `chitally plan` / dry runs: figures and the store layout."""
    points = validate_points(points)
    cover, plan, _ = plan_points(points, params)
    summary = summarise_plan(plan, cover)
    summary["layout"] = describe_layout(plan.n_tasks)
    return summary


def create_or_open(url: str, points: np.ndarray, params: Params) -> RunStore:
    """The run store for these points and parameters: opened if it exists (and must
    match, else `StoreMismatch` and nothing written), otherwise planned and created."""
    points = validate_points(points)
    fp = fingerprint(points)
    try:
        store = RunStore.open(url)
    except Exception as exc:
        from .store import IncompleteStore, NotAStore

        if not isinstance(exc, (NotAStore, IncompleteStore)):
            raise
    else:
        store.check_matches(params.as_dict(), fp)
        return store
    cover, plan, points_sorted = plan_points(points, params)
    return RunStore.create(url, params=params.as_dict(), fingerprint=fp, cover=cover, plan=plan,
                           points_sorted=points_sorted)


@dataclass
class RunReport:
    """How a run ended."""

    url: str
    n_tasks: int
    done: int
    failed: dict[int, str] = field(default_factory=dict)
    curve: Curve | None = None
    seconds: float = 0.0
    computed: int = 0  # tasks computed by this invocation
    set_aside: list[int] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        return self.curve is not None

    @property
    def exit_code(self) -> int:
        return EXIT_OK if self.complete else EXIT_INCOMPLETE


class _Driver(Callbacks):
    """Feeds completed tasks to the reducer and failures to the store, then to the user."""

    def __init__(self, store: RunStore, reducer: Reducer, user: Events | None) -> None:
        self.store = store
        self.reducer = reducer
        self.user = user or Callbacks()
        self.set_aside: list[int] = []

    def task_started(self, task: int, attempt: str) -> None:
        self.user.task_started(task, attempt)

    def task_done(self, result: TaskResult) -> None:
        if not self.reducer.add(result.task):
            self.set_aside.append(result.task)
        self.user.task_done(result)

    def task_retry(self, task: int, attempt: str, message: str) -> None:
        logger.info("task %d attempt %s failed, retrying: %s", task, attempt, message)
        self.user.task_retry(task, attempt, message)

    def task_failed(self, task: int, message: str, attempts: int) -> None:
        self.store.record_failure(task, message, attempts)
        self.user.task_failed(task, message, attempts)


def acquire_lease(store: RunStore, *, takeover: bool = False) -> Lease:
    """The store's writer lease for this process (raises `LeaseHeld` if another run has it).

    Take it before starting a cluster, so that a refused run costs nothing; then hand it
    to `execute`, which holds it (heartbeating) and releases it at the end.
    """
    lease = store.acquire_lease(f"chitally pid {os.getpid()} on {socket.gethostname()}", takeover=takeover)
    lease.start()  # beating from now: starting a cluster can take a while
    return lease


def execute(
    store: RunStore,
    executor: SerialExecutor | DaskExecutor,
    *,
    events: Events | None = None,
    takeover: bool = False,
    on_pending: Callable[[RunStore, list[int]], None] | None = None,
    checkpoint_every: int = 256,
    lease: Lease | None = None,
) -> RunReport:
    """Compute every task not yet committed, reduce, and write the curve if complete.

    Holds the store's writer lease throughout (a second run is refused with `LeaseHeld`):
    the one given, taken earlier with `acquire_lease`, or one taken here. Either way it
    is released when this returns or raises. The reducer writes a checkpoint after every
    `checkpoint_every` newly reduced tasks (and every 30 s, and at the end).
    """
    t0 = time.perf_counter()
    if lease is None:
        lease = acquire_lease(store, takeover=takeover)
    with lease:
        store.clean_partials()
        reducer = Reducer(store, every_tasks=checkpoint_every)
        driver = _Driver(store, reducer, events)
        driver.set_aside.extend(reducer.add_committed())
        plan = store.read_plan()
        outcome = Outcome()
        computed = 0
        for _ in range(MAX_ROUNDS):
            committed = store.committed()
            pending = [t for t in range(store.n_tasks) if not committed[t] and not reducer.is_covered(t)]
            if not pending:
                break
            if on_pending is not None:
                on_pending(store, pending)
            # the report lists every task set aside, at start-up too; another round
            # only if this one set aside more
            seen = len(driver.set_aside)
            outcome = executor.run(store.url, pending, driver, plan.digest())
            computed += len(outcome.done)
            if outcome.failed or len(driver.set_aside) == seen:
                break
        # tasks committed by an earlier, interrupted driver after our first listing
        reducer.add_committed()
        curve = reducer.finish() if reducer.complete else None
        if curve is None:
            reducer.checkpoint()
    return RunReport(
        url=store.url,
        n_tasks=store.n_tasks,
        done=reducer.n_covered,
        failed=dict(outcome.failed),
        curve=curve,
        seconds=time.perf_counter() - t0,
        computed=computed,
        set_aside=list(driver.set_aside),
    )


def status(store: RunStore) -> dict[str, Any]:
    """Tasks done, pending and failed; cost-weighted progress; time so far and an estimate."""
    plan = store.read_plan()
    committed = store.committed()
    failures = store.failures()
    failed = np.zeros(store.n_tasks, dtype=bool)
    for t in failures:
        failed[t] = not committed[t]
    cost = plan.cost.astype(np.float64)
    done_cost = float(cost[committed].sum())
    total_cost = float(cost.sum()) or 1.0
    seconds = []
    stamps = []
    for t in np.flatnonzero(committed):
        rec = store.read_commit(int(t)) or {}
        seconds.append(float(rec.get("seconds", 0.0)))
        stamps.append(rec.get("committed"))
    compute = float(np.sum(seconds)) if seconds else 0.0
    left = compute * (total_cost - done_cost) / done_cost if done_cost else None
    try:
        curve, damage = store.read_curve(), None
    except CurveDamaged as exc:
        curve, damage = None, str(exc)
    return {
        "store": store.url,
        "tasks": int(store.n_tasks),
        "done": int(committed.sum()),
        "failed": int(failed.sum()),
        "pending": int(store.n_tasks - committed.sum() - failed.sum()),
        "percent": round(100.0 * done_cost / total_cost, 2),
        "task_seconds": round(compute, 3),
        "task_seconds_left_estimate": None if left is None else round(left, 3),
        "first_commit": min((s for s in stamps if s), default=None),
        "last_commit": max((s for s in stamps if s), default=None),
        "complete": curve is not None,
        "curve_damaged": damage,
        "failures": {int(t): failures[t].get("message", "") for t in failures if not committed[t]},
    }


def read_result(store: RunStore) -> Curve | None:
    """The final curve of a complete run, verified against its record."""
    rec = store.read_curve()
    if rec is None:
        return None
    curve = Curve(values=rec["values"], chi=rec["chi"], eps=rec["eps"], max_dim=rec["max_dim"],
                  n_points=rec["n_points"])
    if curve.digest() != rec["digest"]:
        raise CurveDamaged(f"the curve in {store.url} does not match its digest")
    return curve


def open_run(url: str) -> RunStore:
    """Open an existing run store (read-only use needs no lease)."""
    return RunStore.open(url)
