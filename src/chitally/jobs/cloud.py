"""The `cloud` job kind: the exact curve of one point cloud, task by task.

Planning (pure) turns validated points into a `JobSpec`: the ball-sorted points and
their input row ids, and the task table (owned rows and exact halos). A task reads its
halo, counts the jumps of the edges it owns with the kernel, and commits its jump table;
the fold sums jump tables into one curve.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..cover import build_cover
from ..curve import Curve, merge_jumps
from ..kernel import count_jumps
from ..metric import validate_metric
from ..plan import Cover, Plan
from ..planner import make_plan
from ..store import JobSpec, ResultDamaged, RunStore, fingerprint
from ..validate import validate_eps, validate_max_dim, validate_positive
from . import CLOUD

_PLAN_ARRAYS = ("row_start", "row_stop", "halo_offsets", "halo_rows")


@dataclass(frozen=True)
class Params:
    """The parameters a cloud run store is made for; any difference is a different run."""

    eps: float
    max_dim: int | None = None
    cover_radius: float | None = None
    task_cost: float | None = None
    metric: str = "euclidean"

    def as_dict(self) -> dict[str, Any]:
        return {
            "eps": float(self.eps),
            "max_dim": self.max_dim,
            # None when left at its default (eps), so a store made for another eps does
            # not list a radius the user never set among the differences
            "cover_radius": None if self.cover_radius is None else float(self.cover_radius),
            "task_cost": None if self.task_cost is None else float(self.task_cost),
            # always written; a store made before there was a choice reads as Euclidean
            # (the kind's `defaults`)
            "metric": self.metric,
        }

    @staticmethod
    def checked(eps: Any, max_dim: Any = None, cover_radius: Any = None, task_cost: Any = None,
                *, names: Mapping[str, str] | None = None, metric: Any = "euclidean") -> Params:
        """Validated parameters; `names` maps a parameter to how the user spelled it
        (e.g. ``{"task_cost": "--task-cost"}``) for the error messages."""
        n = {"eps": "eps", "max_dim": "max_dim", "cover_radius": "cover_radius",
             "task_cost": "task_cost", "metric": "metric", **(names or {})}
        return Params(
            validate_eps(eps, name=n["eps"]),
            validate_max_dim(max_dim, name=n["max_dim"]),
            None if cover_radius is None else validate_positive(cover_radius, name=n["cover_radius"]),
            None if task_cost is None else validate_positive(task_cost, name=n["task_cost"]),
            validate_metric(metric, name=n["metric"]),
        )


def plan_points(points: np.ndarray, params: Params) -> tuple[Cover, Plan, np.ndarray]:
    """Cover and task table for validated points (pure: touches no storage)."""
    radius = params.eps if params.cover_radius is None else params.cover_radius
    cover = build_cover(points, params.eps, radius, metric=params.metric)
    points_sorted = np.ascontiguousarray(points[cover.order])
    plan = make_plan(points_sorted, cover, params.eps, params.max_dim, task_cost=params.task_cost,
                     metric=params.metric)
    return cover, plan, points_sorted


def job_spec(points: np.ndarray, params: Params) -> JobSpec:
    """The run store contents for validated `points` (pure)."""
    cover, plan, points_sorted = plan_points(points, params)
    return spec_of(plan, cover, points_sorted, params, fingerprint(points))


def spec_of(plan: Plan, cover: Cover, points_sorted: np.ndarray, params: Params,
            fp: Mapping[str, Any]) -> JobSpec:
    inputs = {"points": points_sorted, "original_ids": cover.order}
    inputs.update({name: getattr(plan, name) for name in _PLAN_ARRAYS})
    attrs = {"eps": float(plan.eps), "max_dim": plan.max_dim,
             "cover_radius": float(plan.cover_radius), "n_points": int(plan.n_points),
             "dim": int(plan.dim), "n_balls": cover.n_balls}
    return JobSpec(kind=CLOUD.name, params=params.as_dict(), fingerprint=fp,
                   outputs=CLOUD.outputs, cost=plan.cost, memory=plan.memory,
                   inputs=inputs, attrs=attrs)


def read_plan(store: RunStore) -> Plan:
    """The task table of a cloud store (its digest was checked when the store opened)."""
    a = store.attrs
    arrays = {name: store.read_input(name) for name in _PLAN_ARRAYS}
    return Plan(eps=float(a["eps"]), max_dim=a["max_dim"], cover_radius=float(a["cover_radius"]),
                n_points=int(a["n_points"]), dim=int(a["dim"]), cost=store.task_cost(),
                memory=store.task_memory(), **arrays)


def task_input(store: RunStore, i: int) -> tuple[np.ndarray, int, int]:
    """Task `i`'s halo coordinates and the local range of its owned rows."""

    def part(name: str, sel: slice) -> np.ndarray:
        return store.read_input(name, sel, task=i)

    if store.attrs.get("layout") == "staged":
        return _staged_input(store, i)

    lo, hi = (int(x) for x in part("halo_offsets", slice(i, i + 2)))
    row_start = int(part("row_start", slice(i, i + 1))[0])
    row_stop = int(part("row_stop", slice(i, i + 1))[0])
    halo = part("halo_rows", slice(lo, hi)).astype(np.int64, copy=False)
    owned_start = int(np.searchsorted(halo, row_start))
    owned_stop = owned_start + (row_stop - row_start)
    if row_stop > row_start and (owned_stop > halo.size or halo[owned_start] != row_start
                                 or halo[owned_stop - 1] != row_stop - 1):
        raise ValueError(f"task {i} in {store.url}: its halo does not hold its owned rows")
    if halo.size and halo[-1] - halo[0] + 1 == halo.size:
        coords = store.read_input("points", slice(int(halo[0]), int(halo[-1]) + 1), task=i)
    else:
        coords = store.read_input("points", halo, task=i)
    return coords, owned_start, owned_stop


def _staged_input(store: RunStore, i: int) -> tuple[np.ndarray, int, int]:
    """A task of a plan made on the cluster: its halo is one slice of the halo stage's
    output for its region, in global row order, its own rows a contiguous part of it."""
    from .stages import open_stage, stage_url

    region = int(store.read_input("halo_region", slice(i, i + 1), task=i)[0])
    h0, h1 = (int(v) for v in store.read_input("halo_span", slice(i, i + 1), task=i)[0])
    lo, hi = (int(v) for v in store.read_input("owned", slice(i, i + 1), task=i)[0])
    halo = open_stage(stage_url(store.url, "halo"), store.io.storage_options)
    coords = halo.commits.read_rows(region, "coords", h0, h1)
    return coords, lo, hi


def metric_of(params: Mapping[str, Any]) -> str:
    """The metric of a store's parameters: Euclidean in a store made before there was a
    choice (no ``metric`` field)."""
    return validate_metric(params.get("metric"))


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: task `i`'s jump table and counters."""
    params = store.params
    coords, lo, hi = task_input(store, i)
    table = count_jumps(coords, float(params["eps"]), params["max_dim"], owned=(lo, hi),
                        threads=threads, metric=metric_of(params))
    counters = {"points": hi - lo, "halo": int(coords.shape[0]), "edges": int(table.stats.edges),
                "splits": int(table.stats.splits)}
    out = {"values": table.values, "jumps": table.jumps}
    if "part_bounds" in store.input_names:
        from .parts import offsets_at

        out["parts"] = offsets_at(table.values, store.read_input("part_bounds"))
    return out, counters


class JumpSum:
    """Jump tables summed exactly into one curve: the fold of every kind whose tasks
    commit jump tables (`cloud`, `graph`).

    The curve's domain is ``[start, eps]`` from the store's attrs (``start`` 0 and
    ``eps`` the parameter when absent, as in cloud stores), its cap the parameter
    ``max_dim`` and its vertex count the attr ``n_points``.
    """

    def __init__(self, store: RunStore) -> None:
        self.store = store
        self.values = np.zeros(0, np.float64)
        self.jumps = np.zeros(0, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.values = np.asarray(state["values"], np.float64)
        self.jumps = np.asarray(state["jumps"], np.int64)

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        self.values, self.jumps = merge_jumps([self.values, *(o["values"] for o in outputs)],
                                              [self.jumps, *(o["jumps"] for o in outputs)])

    def state(self) -> dict[str, np.ndarray]:
        return {"values": self.values, "jumps": self.jumps}

    def curve(self) -> Curve:
        p, a = self.store.params, self.store.attrs
        return Curve.from_jumps(self.values, self.jumps, eps=float(a.get("eps", p.get("eps"))),
                                max_dim=p["max_dim"], n_points=int(a["n_points"]),
                                start=float(a.get("start", 0.0)))

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        c = self.curve()
        return ({"values": np.asarray(c.values), "chi": np.asarray(c.chi)},
                {"eps": c.eps, "max_dim": c.max_dim, "n_points": c.n_points, "start": c.start,
                 "digest": c.digest()})


def read_curve(store: RunStore) -> Curve | None:
    """The final curve of a complete run of a `JumpSum` kind, verified; None if not
    written yet."""
    got = store.read_result()
    if got is None:
        return None
    arrays, rec = got
    try:
        curve = Curve(values=arrays["values"], chi=arrays["chi"], eps=rec["eps"],
                      max_dim=rec["max_dim"], n_points=rec["n_points"], start=rec.get("start", 0.0))
    except (KeyError, ValueError) as exc:
        raise ResultDamaged(f"the curve in {store.url} is not a valid curve: {exc}") from exc
    if curve.digest() != rec.get("digest"):
        raise ResultDamaged(f"the curve in {store.url} does not match its digest")
    return curve


def create_or_open(url: str, points: np.ndarray, params: Params, *,
                   storage_options: Mapping[str, Any] | None = None,
                   discard: bool = False) -> RunStore:
    """The cloud run store at `url` for these points and parameters: opened if it
    exists (it must match: `StoreMismatch` otherwise, nothing written), else planned and
    created."""
    from ..runs import open_or_create
    from ..validate import validate_points

    points = validate_points(points)
    return open_or_create(url, CLOUD.name, params.as_dict(), fingerprint(points),
                          lambda: job_spec(points, params), storage_options=storage_options,
                          discard=discard)


def describe(points: np.ndarray, params: Params) -> dict[str, Any]:
    """What a run would do, for `chitally plan`: figures, warnings and the store layout;
    touches no storage."""
    from ..planner import summarise_plan
    from ..store import describe_layout
    from ..validate import validate_points

    import time

    from ..engine import peak_memory, reset_peak_memory

    points = validate_points(points)
    reset_peak_memory()
    t0 = time.perf_counter()
    cover, plan, _ = plan_points(points, params)
    seconds = time.perf_counter() - t0
    summary = summarise_plan(plan, cover)
    peak = peak_memory()
    summary["planner"] = {"kind": "driver", "seconds": seconds, "driver_peak": peak,
                          "expected_driver_peak": max(peak, expected_driver_peak(summary))}
    summary["metric"] = params.metric
    summary["warnings"] = plan_warnings(plan)
    summary["layout"] = describe_layout(plan.n_tasks)
    return summary


def expected_driver_peak(summary: Mapping[str, Any]) -> int:
    """The driver's expected peak while the run executes (bytes): the process itself,
    the task table, and the reducer's curve, which holds at most one jump per edge
    (twice while merging)."""
    from ..runs import DRIVER_BASELINE

    return int(DRIVER_BASELINE + summary["tasks"] * 64 + 32 * max(int(summary.get("edges", 0)), 0))


#: Measured driver and store overhead of one task (seconds): commit, verify, schedule.
TASK_OVERHEAD_SECONDS = 0.05
#: Rows read by all tasks over N beyond which halos cost more than the work they serve.
REPLICATION_WARNING = 3.0


def plan_warnings(plan: Plan, cores: int | None = None) -> list[str]:
    """Plain-words warnings when the chosen task size makes overhead or re-reading
    dominate: many tiny tasks, or halos much larger than the rows they serve."""
    import os

    cores = cores or os.cpu_count() or 1
    out = []
    overhead = plan.n_tasks * TASK_OVERHEAD_SECONDS / cores
    owned = np.maximum(plan.row_stop - plan.row_start, 1)
    replication = plan.replication()
    if plan.n_tasks > 64 * cores and float(np.median(owned)) < 2000:
        out.append(f"{plan.n_tasks} tasks of {int(np.median(owned))} points (median): the store "
                   f"and scheduling alone take about {overhead:.0f} s on {cores} cores; a larger "
                   "--task-cost makes fewer, bigger tasks")
    if replication > REPLICATION_WARNING:
        out.append(f"each point is read {replication:.1f} times on average (halos around small "
                   "tasks); a larger --task-cost reads less")
    return out
