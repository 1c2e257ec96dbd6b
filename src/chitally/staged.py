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
    """How long each stage took, in order, and the driver's peak memory."""

    seconds: dict[str, float] = field(default_factory=dict)
    tasks: dict[str, int] = field(default_factory=dict)
    driver_peak: int = 0


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
    from .engine import peak_memory

    report = report if report is not None else StageReport()
    so = storage_options
    block_rows = int(stage.block_rows)
    base_params = {"eps": float(params.eps), "max_dim": params.max_dim,
                   **stage.as_dict(params.eps), "source": None if source is None else dict(source)}
    fp = dict(fingerprint)
    n_blocks = max(1, -(-int(n_rows) // block_rows))
    block_cost = np.full(n_blocks, float(block_rows))
    block_mem = np.full(n_blocks, _block_memory(block_rows, dim), np.int64)
    attrs = {"n_rows": int(n_rows), "dim": int(dim), "block_rows": block_rows}

    def run_stage(name: str, store: RunStore) -> dict[str, np.ndarray]:
        t0 = time.perf_counter()
        rep: RunReport = session.run(store, events=events(name) if events else None)
        report.seconds[name] = report.seconds.get(name, 0.0) + time.perf_counter() - t0
        report.tasks[name] = store.n_tasks
        report.driver_peak = max(report.driver_peak, peak_memory())
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
    report.seconds["regions"] = time.perf_counter() - t0
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
    summary = run_stage("region", region)["summary"]
    total = float(summary[:, 1].sum())
    if params.task_cost is None:
        target = max(total / DEFAULT_MIN_TASKS, total * DEFAULT_TASK_ROWS / max(int(n_rows), 1))
    else:
        target = float(params.task_cost)

    # 5. halo: tasks and their materialised halos
    halo_attrs = {**attrs, "n_regions": n_regions, "target": target,
                  "max_task_rows": DEFAULT_MAX_TASK_ROWS}
    halo = open_or_create(
        stage_url(url, "halo"), PLAN_HALO.name, base_params, fp,
        lambda: JobSpec(kind=PLAN_HALO.name, params=base_params, fingerprint=fp,
                        outputs=PLAN_HALO.outputs, cost=summary[:, 1].copy(), memory=region_mem,
                        attrs=halo_attrs),
        storage_options=so)
    table = run_stage("halo", halo)

    # the run: an ordinary cloud store whose tasks read their halos from the halo stage
    t0 = time.perf_counter()
    store = open_or_create(url, CLOUD.name, run_params(params, stage), fp,
                           lambda: _cloud_spec(table, params, stage, n_rows, dim, n_regions, fp),
                           storage_options=so)
    report.seconds["create"] = time.perf_counter() - t0
    report.driver_peak = max(report.driver_peak, peak_memory())
    return store


def _cloud_spec(table: Mapping[str, np.ndarray], params: Params, stage: StageParams, n_rows: int,
                dim: int, n_regions: int, fp: Mapping[str, Any]) -> JobSpec:
    cost = np.asarray(table["cost"], np.float64)
    rows = np.asarray(table["rows"], np.int64).reshape(-1, 2)
    rank = np.lexsort((rows[:, 0], -cost))  # heaviest first, as the driver's planner does
    inputs = {
        "row_start": rows[rank, 0], "row_stop": rows[rank, 1],
        "halo_region": np.asarray(table["region"], np.int64)[rank],
        "halo_span": np.asarray(table["offsets"], np.int64).reshape(-1, 2)[rank],
        "owned": np.asarray(table["owned"], np.int64).reshape(-1, 2)[rank],
    }
    attrs = {"eps": float(params.eps), "max_dim": params.max_dim, "cover_radius": stage.side(params.eps),
             "n_points": int(n_rows), "dim": int(dim), "n_balls": int(n_regions), "layout": "staged"}
    return JobSpec(kind=CLOUD.name, params=run_params(params, stage), fingerprint=fp,
                   outputs=CLOUD.outputs, cost=cost[rank], memory=np.asarray(table["memory"], np.int64)[rank],
                   inputs=inputs, attrs=attrs)


class StageIncomplete(Exception):
    """A planning stage stopped with tasks failed; resuming continues it."""

    def __init__(self, stage: str, url: str, report: RunReport) -> None:
        super().__init__(f"planning stage {stage} ({url}) stopped with {len(report.failed)} "
                         f"failed and {report.n_tasks - report.done} unfinished tasks; run again "
                         "to continue it")
        self.stage, self.url, self.report = stage, url, report
