"""Plan a cloud on the cluster, stage by stage, then hand back its `cloud` run store.

Each stage (see `chitally.jobs.stages`) is a run store of its own in ``<run>.plan/``,
run on the engine like any job: resumable (a stage already complete is read, a stage
interrupted continues with its committed tasks), leased, checked. Between stages the
driver holds per-cell and per-task summaries only, never the points.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .jobs import CLOUD, PLAN_COUNT, PLAN_HALO, PLAN_REGION, PLAN_SCATTER
from .jobs.cloud import Params
from .jobs.stages import StageParams, make_regions, read_arrays, stage_url
from .planner import DEFAULT_MAX_TASK_ROWS, DEFAULT_MIN_TASKS, DEFAULT_TASK_ROWS
from .runs import RunReport, Session, open_or_create
from .store import JobSpec, RunStore


@dataclass
class StageReport:
    """How long each stage took, in order, and the driver's peak memory: over all
    stages, and by the end of each (`peaks`, a running maximum: the stage where it
    grows is the one that needed it)."""

    seconds: dict[str, float] = field(default_factory=dict)
    tasks: dict[str, int] = field(default_factory=dict)
    driver_peak: int = 0
    peaks: dict[str, int] = field(default_factory=dict)

    def measured(self, stage: str, seconds: float) -> None:
        from .engine import peak_memory

        self.seconds[stage] = self.seconds.get(stage, 0.0) + seconds
        self.peaks[stage] = peak_memory()
        self.driver_peak = max(self.driver_peak, self.peaks[stage])


def _block_memory(rows: int, dim: int) -> int:
    # a block, its codes and the sorted copies scatter makes (about five times the block)
    return int(rows) * (dim * 8 + 8) * 5


def run_params(params: Params, stage: StageParams) -> dict[str, Any]:
    """The `cloud` store's params for a plan made on the cluster."""
    return {**params.as_dict(), "planner": "cluster", **stage.as_dict(params.eps)}


def plan_on_cluster(url: str, points: np.ndarray | None, params: Params, stage: StageParams,
                    session: Session, *, n_rows: int, dim: int, fingerprint: Mapping[str, Any],
                    source: Mapping[str, Any] | None = None,
                    storage_options: Mapping[str, Any] | None = None,
                    events: Callable[[str], Any] | None = None,
                    report: StageReport | None = None) -> RunStore:
    """The `cloud` run store at `url`, planned by the four stages on `session`'s cluster.

    Give either the validated `points` (written into the first stage's store) or a
    `source` spec (``path``, ``key``, ``columns``, ``index_col``) that every worker opens
    with `chitally.lazy.open_points`. `events(stage)` returns the `Events` of a stage's
    run (progress), or None.
    """
    report = report if report is not None else StageReport()
    so = storage_options
    block_rows = int(stage.block_rows)
    base_params = {"eps": float(params.eps), "max_dim": params.max_dim, "task_cost": params.task_cost,
                   "metric": params.metric,
                   **stage.as_dict(params.eps), "source": None if source is None else dict(source)}
    fp = dict(fingerprint)
    n_blocks = max(1, -(-int(n_rows) // block_rows))
    block_cost = np.full(n_blocks, float(block_rows))
    block_mem = np.full(n_blocks, _block_memory(block_rows, dim), np.int64)
    attrs = {"n_rows": int(n_rows), "dim": int(dim), "block_rows": block_rows}

    def run_stage(name: str, store: RunStore) -> dict[str, np.ndarray]:
        t0 = time.perf_counter()
        ev = events(name) if events else None
        try:
            rep: RunReport = session.run(store, events=ev, on_pending=getattr(ev, "on_pending", None))
        finally:
            if hasattr(ev, "close"):
                ev.close()
        report.measured(name, time.perf_counter() - t0)
        report.tasks[name] = store.n_tasks
        if rep.result is None:
            raise StageIncomplete(name, store.url, rep)
        return rep.result

    # 1. count
    count = open_or_create(
        stage_url(url, "count"), PLAN_COUNT.name, base_params, fp,
        lambda: JobSpec(kind=PLAN_COUNT.name, params=base_params, fingerprint=fp,
                        outputs=PLAN_COUNT.outputs, cost=block_cost, memory=block_mem,
                        inputs={} if points is None else {"points": points}, attrs=attrs),
        storage_options=so)
    cells = run_stage("count", count)
    if int(cells["counts"].sum()) != int(n_rows):
        raise ValueError(f"the count stage saw {int(cells['counts'].sum())} rows of {n_rows}")

    # 2. regions (driver: per-cell summaries only)
    t0 = time.perf_counter()
    regions = make_regions(cells["codes"], cells["counts"], dim, stage.region_rows)
    del cells
    report.measured("regions", time.perf_counter() - t0)
    n_regions = regions.n_regions

    # 3. scatter
    scatter_inputs = {"codes": regions.codes, "cell_region": regions.cell_region,
                      "halo_offsets": regions.halo_offsets, "halo_regions": regions.halo_regions}
    scatter = open_or_create(
        stage_url(url, "scatter"), PLAN_SCATTER.name, base_params, fp,
        lambda: JobSpec(kind=PLAN_SCATTER.name, params=base_params, fingerprint=fp,
                        outputs=PLAN_SCATTER.outputs, cost=block_cost, memory=block_mem,
                        inputs=scatter_inputs, attrs={**attrs, "n_regions": n_regions}),
        storage_options=so)
    run_stage("scatter", scatter)

    # 4. region: exact degrees, costs
    region_rows = regions.region_rows
    rows_per_region = np.diff(region_rows).astype(np.float64)
    region_mem = (rows_per_region * 1.5 * (dim * 8 + 64)).astype(np.int64)
    region_inputs = {"cell_start": regions.cell_start, "region_rows": region_rows}
    region = open_or_create(
        stage_url(url, "region"), PLAN_REGION.name, base_params, fp,
        lambda: JobSpec(kind=PLAN_REGION.name, params=base_params, fingerprint=fp,
                        outputs=PLAN_REGION.outputs, cost=rows_per_region, memory=region_mem,
                        inputs=region_inputs, attrs={**attrs, "n_regions": n_regions}),
        storage_options=so)
    del regions, scatter_inputs, region_inputs
    region_result = run_stage("region", region)
    summary, hist = region_result["summary"], region_result["hist"]
    total = float(summary[:, 1].sum())
    n_edges = int(summary[:, 2].sum()) // 2  # each edge's two ends are own rows of some region
    if params.task_cost is None:
        target = max(total / DEFAULT_MIN_TASKS, total * DEFAULT_TASK_ROWS / max(int(n_rows), 1))
    else:
        target = float(params.task_cost)

    # 5. halo: tasks and their materialised halos; its memory is known now: the region's
    # rows and its pairs (about 80 bytes each through the join, the keys and their sort)
    halo_mem = (rows_per_region * 1.3 * (dim * 8 + 64) + summary[:, 2] * 0.65 * 80).astype(np.int64)
    halo_attrs = {**attrs, "n_regions": n_regions, "target": target,
                  "max_task_rows": DEFAULT_MAX_TASK_ROWS}
    halo = open_or_create(
        stage_url(url, "halo"), PLAN_HALO.name, base_params, fp,
        lambda: JobSpec(kind=PLAN_HALO.name, params=base_params, fingerprint=fp,
                        outputs=PLAN_HALO.outputs, cost=summary[:, 1].copy(), memory=halo_mem,
                        attrs=halo_attrs),
        storage_options=so)
    table = run_stage("halo", halo)

    # the run: an ordinary cloud store whose tasks read their halos from the halo stage
    t0 = time.perf_counter()
    kind, extra = _parts_of(n_edges, hist, params, stage)
    store = open_or_create(url, kind.name, run_params(params, stage), fp,
                           lambda: _cloud_spec(table, params, stage, n_rows, dim, n_regions, fp, n_edges,
                                               kind, extra),
                           storage_options=so)
    report.measured("create", time.perf_counter() - t0)
    return store


def _cloud_spec(table: Mapping[str, np.ndarray], params: Params, stage: StageParams, n_rows: int,
                dim: int, n_regions: int, fp: Mapping[str, Any], n_edges: int,
                kind: Any, extra: Mapping[str, np.ndarray]) -> JobSpec:
    cost = np.asarray(table["cost"], np.float64)
    rows = np.asarray(table["rows"], np.int64).reshape(-1, 2)
    rank = np.lexsort((rows[:, 0], -cost))  # heaviest first, as the driver's planner does
    inputs = {
        "row_start": rows[rank, 0], "row_stop": rows[rank, 1],
        "halo_region": np.asarray(table["region"], np.int64)[rank],
        "halo_span": np.asarray(table["offsets"], np.int64).reshape(-1, 2)[rank],
        "owned": np.asarray(table["owned"], np.int64).reshape(-1, 2)[rank],
    }
    inputs.update(extra)
    attrs = {"eps": float(params.eps), "max_dim": params.max_dim, "cover_radius": stage.side(params.eps),
             "n_points": int(n_rows), "dim": int(dim), "n_balls": int(n_regions), "layout": "staged",
             "n_edges": int(n_edges)}
    return JobSpec(kind=kind.name, params=run_params(params, stage), fingerprint=fp,
                   outputs=kind.outputs, cost=cost[rank], memory=np.asarray(table["memory"], np.int64)[rank],
                   inputs=inputs, attrs=attrs)


def _parts_of(n_edges: int, hist: np.ndarray, params: Params, stage: StageParams) -> tuple[Any, dict]:
    """The run's kind, and its part boundaries when its curve is reduced in parts.

    The curve has at most one jump per edge (and one at 0): beyond one part it is reduced
    in parts of the scale, never whole on the driver.
    """
    from .jobs import CLOUD_PARTS
    from .jobs.parts import PART_JUMPS, part_bounds

    per_part = int(stage.part_jumps or PART_JUMPS)
    n_parts = -(-(int(n_edges) + 1) // per_part)
    if n_parts < 2:
        return CLOUD, {}
    bounds = part_bounds(hist, params.eps, n_parts)
    if not bounds.size:
        return CLOUD, {}
    which = np.searchsorted(bounds, (np.arange(hist.size) + 0.5) * params.eps / hist.size)
    return CLOUD_PARTS, {"part_bounds": bounds,
                         "part_cost": np.bincount(which, weights=hist, minlength=bounds.size + 1)}


class StageIncomplete(Exception):
    """A planning stage stopped with tasks failed; resuming continues it."""

    def __init__(self, stage: str, url: str, report: RunReport) -> None:
        super().__init__(f"planning stage {stage} ({url}) stopped with {len(report.failed)} "
                         f"failed and {report.n_tasks - report.done} unfinished tasks; run again "
                         "to continue it")
        self.stage, self.url, self.report = stage, url, report


# ---------------------------------------------------------------------------- the API

#: The driver's planner holds about this many times the coordinates at its peak.
DRIVER_PLANNER_FACTOR = 5
#: `planner="auto"` plans on the cluster when the driver's planner would need more.
DRIVER_PLANNER_BUDGET = 2 << 30


@dataclass(frozen=True)
class PlanInput:
    """What the cluster planner needs to know of its input: the validated points (held
    here) or a source spec the workers open themselves, and its shape and identity."""

    n_rows: int
    dim: int
    fingerprint: Mapping[str, Any]
    points: np.ndarray | None = None
    source: Mapping[str, Any] | None = None
    opened: Any = None  # the open `chitally.lazy` source behind `source`, when there is one

    @staticmethod
    def of_points(points: np.ndarray) -> PlanInput:
        from .store import fingerprint
        from .validate import validate_points

        points = validate_points(points)
        return PlanInput(int(points.shape[0]), int(points.shape[1]), fingerprint(points), points=points)


def choose_planner(planner: str, n_rows: int, dim: int) -> str:
    """"driver" or "cluster"; "auto" plans on the cluster when the driver's planner
    would need more than `DRIVER_PLANNER_BUDGET` (about five times the coordinates)."""
    if planner in ("driver", "cluster"):
        return planner
    if planner != "auto":
        raise ValueError(f"planner must be auto, driver or cluster, got {planner!r}")
    need = int(n_rows) * int(dim) * 8 * DRIVER_PLANNER_FACTOR
    return "cluster" if need > DRIVER_PLANNER_BUDGET else "driver"


def plan_run(url: str, inp: PlanInput, params: Params, stage: StageParams, session: Session, *,
             storage_options: Mapping[str, Any] | None = None,
             events: Callable[[str], Any] | None = None,
             report: StageReport | None = None) -> RunStore:
    """The `cloud` run store at `url` planned on `session`'s cluster (see `plan_on_cluster`)."""
    return plan_on_cluster(url, inp.points, params, stage, session, n_rows=inp.n_rows, dim=inp.dim,
                           fingerprint=inp.fingerprint, source=inp.source,
                           storage_options=storage_options, events=events, report=report)


def planning_started(url: str, storage_options: Mapping[str, Any] | None = None) -> bool:
    """Whether planning stages exist for a run at `url` (planning began there)."""
    from .store.io import StoreIO

    return StoreIO(stage_url(url, "count"), storage_options).get("created.json") is not None


def resume_planning(url: str, session: Session, *, storage_options: Mapping[str, Any] | None = None,
                    events: Callable[[str], Any] | None = None,
                    report: StageReport | None = None) -> RunStore:
    """Continue the planning stages of the run at `url` from what its first stage
    recorded (input, parameters), then create the run store."""
    count = RunStore.open(stage_url(url, "count"), storage_options=storage_options)
    p, a = count.params, count.attrs
    params = Params.checked(p["eps"], p["max_dim"], None, p.get("task_cost"),
                            metric=p.get("metric", "euclidean"))
    stage = StageParams(p["cell_size"], p["region_rows"], p["block_rows"], p.get("part_jumps"))
    points = count.read_input("points") if "points" in count.input_names else None
    return plan_on_cluster(url, points, params, stage, session, n_rows=int(a["n_rows"]),
                           dim=int(a["dim"]), fingerprint=count.fingerprint, source=p.get("source"),
                           storage_options=storage_options, events=events, report=report)


def summarise(store: RunStore) -> dict[str, Any]:
    """The figures of `chitally plan` for a run planned on the cluster (from its store)."""

    def spread(v: np.ndarray) -> dict[str, Any]:
        if v.size == 0:
            return {"min": 0, "median": 0.0, "max": 0}
        return {"min": int(v.min()), "median": float(np.median(v)), "max": int(v.max())}

    a = store.attrs
    owned = store.read_input("row_stop") - store.read_input("row_start")
    span = store.read_input("halo_span").reshape(-1, 2)
    halo = span[:, 1] - span[:, 0]
    cost, memory = store.task_cost(), store.task_memory()
    heaviest = int(np.argmax(cost)) if cost.size else None
    return {
        "points": int(a["n_points"]), "dim": int(a["dim"]), "eps": float(a["eps"]),
        "max_dim": a["max_dim"], "radius": float(a["cover_radius"]), "balls": int(a["n_balls"]),
        "tasks": int(store.n_tasks), "owned_rows": spread(owned), "halo_rows": spread(halo),
        "replication": float(halo.sum()) / max(int(a["n_points"]), 1),
        "total_cost": float(cost.sum()),
        "heaviest_task_cost": float(cost[heaviest]) if heaviest is not None else 0.0,
        "heaviest_task_memory": int(memory[heaviest]) if heaviest is not None else 0,
        "max_task_memory": int(memory.max()) if memory.size else 0,
        "edges": int(a.get("n_edges", 0)),
    }
