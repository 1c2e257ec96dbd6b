"""Executors: one conformance suite run on every executor and every job kind.

`TestExecutorConformance` is parametrised over the executors (serial; Dask on a
LocalCluster of 2 worker processes x 1 thread on 127.0.0.1, started once per module, with
its own bundles and with every two tasks in one bundle) and,
through `JOB_KINDS`, over job kinds. A kind enters the suite with one `JobKindCase`: how
to make a run store of it from a store input, the inputs to run, and a reference giving
the expected result of an input from outside the engine, by source. Adding a kind is
adding one entry.

The `cloud` kind's inputs are clouds in R^2, R^3 and R^5 (uniform, clustered, with
coincident points, an integer lattice with exact ties), cover radii 0.5, 1 and 2 times eps,
three task splits (one task per row, a few rows per task, one task) and caps None, 1, 2, 3:
every cloud meets every cap, and every pair of factor levels appears in some case. Each
result must equal `chitally.euler_curve` and two outside references: networkx
``enumerate_all_cliques`` on the eps-graph (brute force) and gudhi's ``RipsComplex`` /
``SimplexTree`` (``tests/references.py``).

The `field` kind's inputs are arrays of 2 to 4 dimensions with many ties, in memory, in a
Zarr array, an HDF5 dataset (one of two, named by key) or a ``.npy`` file, both
constructions, sublevel and superlevel, with and without a mask; each result must equal
`chitally.field_curve` and gudhi's ``CubicalComplex`` (``tests/cubical_references.py``).

Faults come from the test side: `FailingTask` wraps the engine's task function, fails
chosen tasks on chosen attempts and counts every attempt in files, so retry tests are
exact, not timing-dependent. Stores are local paths (``memory://`` does not cross
processes).
"""

from __future__ import annotations

import functools
import logging
import hashlib
import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from engine_fixtures import wait_for
from references import (
    brute_force_curve,
    brute_force_matrix_curve,
    gudhi_curve,
    gudhi_matrix_curve,
    scipy_lengths,
)

from chitally import engine, euler_curve, runs
from chitally.engine import TaskResult
from chitally.execute import (
    FATAL,
    NOT_RETRIED,
    Callbacks,
    DaskExecutor,
    SchedulerLost,
    SerialExecutor,
)
from chitally.jobs import cloud
from chitally.store import (
    CommitConflict,
    CommitLog,
    InputsDamaged,
    LeaseLost,
    RunStore,
    StoreMismatch,
)
from chitally.validate import InputError

HOST = "127.0.0.1"
# With the dashboard off the scheduler still serves its health routes over HTTP, on 8787
# unless told otherwise: a free port on 127.0.0.1 instead.
QUIET_HTTP = {"dashboard_address": f"{HOST}:0"}

# ===================================================================== the cloud kind

TINY = 1e-9  # below any row's cost (>= 1): every row is a task of its own
HUGE = 1e18  # above the whole cloud's cost: a single task
SPLITS = ("tiny", "medium", "huge")  # medium: a sixth of the whole cost, a few rows per task
RADII = (0.5, 1.0, 2.0)  # cover radius as a multiple of eps
CAPS = (None, 1, 2, 3)
CLOUDS = ("uniform-R2", "clustered-R3", "uniform-R5", "duplicates-R2", "lattice-R2")


@functools.cache
def points_of(name: str) -> tuple[np.ndarray, float]:
    """A named test cloud and its eps (deterministic)."""
    if name == "uniform-R2":
        return np.random.default_rng(11).random((40, 2)), 0.25
    if name == "clustered-R3":
        rng = np.random.default_rng(12)
        centres = np.array([[0.0, 0.0, 0.0], [0.45, 0.0, 0.0], [0.2, 0.5, 0.3]])
        pts = np.concatenate([c + 0.07 * rng.standard_normal((12, 3)) for c in centres])
        return pts[rng.permutation(pts.shape[0])], 0.3
    if name == "uniform-R5":
        return np.random.default_rng(13).random((36, 5)), 0.7
    if name == "duplicates-R2":
        rng = np.random.default_rng(14)
        base = rng.random((20, 2))
        # a pair, a triple and two more pairs of coincident points
        pts = np.concatenate([base, base[[0, 3, 3, 7, 12]]])
        return pts[rng.permutation(pts.shape[0])], 0.3
    if name == "lattice-R2":
        # integer 5 x 5 grid: lengths 1, sqrt 2, 2 tie exactly, and 2 == eps is kept
        g = np.arange(5, dtype=np.float64)
        pts = np.stack(np.meshgrid(g, g, indexing="ij"), axis=-1).reshape(-1, 2)
        return pts[np.random.default_rng(15).permutation(25)], 2.0
    raise KeyError(name)


@dataclass(frozen=True)
class CloudInput:
    """A cloud run store's input: a named cloud, a cover radius (in eps), a split, a cap."""

    cloud: str
    radius: float
    split: str
    cap: int | None

    @property
    def id(self) -> str:
        return f"{self.cloud}-R{self.radius:g}eps-{self.split}-cap{self.cap}"


def split_cost(split: str, pts: np.ndarray, eps: float, cap, radius, metric: str = "euclidean") -> float:
    """The task_cost that makes `split` of this cloud (planning is pure: no store)."""
    if split == "tiny":
        return TINY
    if split == "huge":
        return HUGE
    _, plan, _ = cloud.plan_points(pts, cloud.Params.checked(eps, cap, radius, HUGE, metric=metric))
    return float(plan.cost.sum()) / 6


def cloud_store(tmp_path: Path, inp: CloudInput, name: str = "run") -> RunStore:
    pts, eps = points_of(inp.cloud)
    radius = inp.radius * eps
    params = cloud.Params.checked(eps, inp.cap, radius, split_cost(inp.split, pts, eps, inp.cap, radius))
    store = cloud.create_or_open(str(tmp_path / f"{name}.zarr"), pts, params)
    if inp.split == "tiny":
        assert store.n_tasks == pts.shape[0]
    elif inp.split == "huge":
        assert store.n_tasks == 1
    else:
        assert 1 < store.n_tasks < pts.shape[0]
    return store


@functools.cache
def cloud_curves(name: str, cap: int | None) -> dict[str, Any]:
    pts, eps = points_of(name)
    return {
        "chitally.euler_curve (in process, no store)": euler_curve(pts, eps, cap),
        "networkx enumerate_all_cliques on the eps-graph (brute force)": brute_force_curve(pts, eps, cap),
        "gudhi RipsComplex / SimplexTree": gudhi_curve(pts, eps, cap),
    }


def cloud_reference(inp: CloudInput) -> dict[str, Any]:
    # the curve depends on the cloud and the cap only, never on the cover or the split
    return cloud_curves(inp.cloud, inp.cap)


def _cloud_inputs() -> tuple[CloudInput, ...]:
    # Every (cloud, cap) once; radius index (i + j) % 3 and split index (i + 2j) % 3 make
    # every pair of levels of any two factors appear (the map is invertible mod 3).
    return tuple(CloudInput(name, RADII[(i + j) % 3], SPLITS[(i + 2 * j) % 3], cap)
                 for i, name in enumerate(CLOUDS) for j, cap in enumerate(CAPS))


# ------------------------------------------------------------------ cloud planned in stages

CELLS = (1.0, 2.0, 4.0)  # cell side as a multiple of eps
REGIONS = (4, 11, 10**9)  # rows per region: many small regions, a few, one


@dataclass(frozen=True)
class StagedInput:
    """A cloud planned on the engine's stages: a named cloud, cell side (in eps), rows
    per region, rows per input block, a cap."""

    cloud: str
    cell: float
    region_rows: int
    block_rows: int
    cap: int | None

    @property
    def id(self) -> str:
        return f"{self.cloud}-cell{self.cell:g}eps-regions{self.region_rows}-blocks{self.block_rows}-cap{self.cap}"


def staged_store(tmp_path: Path, inp: StagedInput, name: str = "run") -> RunStore:
    from chitally.jobs.stages import StageParams
    from chitally.staged import plan_on_cluster
    from chitally.store import fingerprint

    pts, eps = points_of(inp.cloud)
    params = cloud.Params.checked(eps, inp.cap)
    stage = StageParams(cell_size=inp.cell * eps, region_rows=inp.region_rows, block_rows=inp.block_rows)
    # the stages themselves run serially here; tests/test_staged.py runs them on Dask
    with runs.Session(runs.Where(serial=True)) as session:
        return plan_on_cluster(str(tmp_path / f"{name}.zarr"), pts, params, stage, session,
                               n_rows=pts.shape[0], dim=pts.shape[1], fingerprint=fingerprint(pts))


def staged_reference(inp: StagedInput) -> dict[str, Any]:
    # the curve depends on the cloud and the cap only, never on cells, regions or blocks
    return cloud_curves(inp.cloud, inp.cap)


def _staged_inputs() -> tuple[StagedInput, ...]:
    # every (cloud, cap) once, with cell sides and region sizes crossed as for the cover
    return tuple(StagedInput(name, CELLS[(i + j) % 3], REGIONS[(i + 2 * j) % 3], (7, 16, 1000)[j % 3], cap)
                 for i, name in enumerate(CLOUDS) for j, cap in enumerate(CAPS))


# ------------------------------------------------------------ the cloud kind in other metrics

# Clouds whose distances are exact in any summation order (so scipy's cdist and the rule
# agree bit for bit), with many ties, and an eps equal to many distances.
METRIC_EPS = {("lattice-R3", "manhattan"): 2.0, ("lattice-R3", "chebyshev"): 1.0,
              ("dyadic-R2", "manhattan"): 0.625, ("dyadic-R2", "chebyshev"): 0.375}


@functools.cache
def metric_points(name: str) -> np.ndarray:
    if name == "lattice-R3":  # integers in [0, 5)^3, coincident points included
        return np.random.default_rng(21).integers(0, 5, (40, 3)).astype(np.float64)
    if name == "dyadic-R2":  # multiples of 1/16
        return np.random.default_rng(22).integers(0, 64, (50, 2)) / 16.0
    raise KeyError(name)


@dataclass(frozen=True)
class MetricInput:
    """A cloud run store's input in another metric: a named cloud, a metric, a split, a cap."""

    cloud: str
    metric: str
    split: str
    cap: int | None

    @property
    def id(self) -> str:
        return f"{self.cloud}-{self.metric}-{self.split}-cap{self.cap}"


def metric_store(tmp_path: Path, inp: MetricInput, name: str = "run") -> RunStore:
    pts, eps = metric_points(inp.cloud), METRIC_EPS[inp.cloud, inp.metric]
    cost = split_cost(inp.split, pts, eps, inp.cap, None, inp.metric)
    params = cloud.Params.checked(eps, inp.cap, None, cost, metric=inp.metric)
    store = cloud.create_or_open(str(tmp_path / f"{name}.zarr"), pts, params)
    assert store.params["metric"] == inp.metric
    assert (store.n_tasks == pts.shape[0]) if inp.split == "tiny" else (store.n_tasks == 1) if inp.split == "huge" \
        else (1 < store.n_tasks < pts.shape[0])
    return store


@functools.cache
def metric_curves(name: str, metric: str, cap: int | None) -> dict[str, Any]:
    pts, eps = metric_points(name), METRIC_EPS[name, metric]
    D = scipy_lengths(pts, metric)  # scipy.spatial.distance.cdist(pts, pts, "cityblock" | "chebyshev")
    return {
        "chitally.euler_curve(metric=...) (in process, no store)": euler_curve(pts, eps, cap, metric=metric),
        "networkx enumerate_all_cliques on the eps-graph of scipy's cdist (brute force)":
            brute_force_matrix_curve(D, eps, cap),
        "gudhi RipsComplex(distance_matrix=scipy's cdist)": gudhi_matrix_curve(D, eps, cap),
    }


def metric_reference(inp: MetricInput) -> dict[str, Any]:
    return metric_curves(inp.cloud, inp.metric, inp.cap)


# ------------------------------------------------------------------ batch, graph, bands


@dataclass(frozen=True)
class SimpleInput:
    """An input of the other kinds: a name and a seed (ids in test names)."""

    kind: str
    size: int
    seed: int

    @property
    def id(self) -> str:
        return f"{self.kind}{self.size}-s{self.seed}"


BATCH_GRID = tuple(np.linspace(0.0, 0.4, 9).tolist())


@functools.cache
def batch_clouds(inp: SimpleInput) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(inp.seed)
    return tuple(rng.random((int(n), 2)) for n in rng.integers(3, 40, inp.size))


def batch_store(tmp_path: Path, inp: SimpleInput, name: str = "run") -> RunStore:
    from chitally.clouds import read_collection
    from chitally.jobs import batch

    col = read_collection(list(batch_clouds(inp)))
    params = batch.BatchParams.checked(0.4, BATCH_GRID, None, False, task_cost=3000.0)
    return batch.create_or_open(str(tmp_path / f"{name}.zarr"), col, params)


def batch_reference(inp: SimpleInput) -> dict[str, Any]:
    from chitally import feature_matrix

    clouds = list(batch_clouds(inp))
    grid = np.asarray(BATCH_GRID)
    fm = feature_matrix(clouds, 0.4, grid, threads=1)
    # gudhi rows, each compared through the in-process matrix (same names and grid)
    assert all(np.array_equal(row, gudhi_curve(c, 0.4, None).sample(grid)) for row, c in zip(fm.values, clouds))
    return {"chitally.feature_matrix in process (rows checked against gudhi RipsComplex)": fm}


FIELD_GRID = tuple(np.arange(-1.0, 6.0, 0.5).tolist())


@functools.cache
def batch_fields(inp: SimpleInput) -> tuple[np.ndarray, ...]:
    """2-D and 3-D arrays of several shapes with tied integer values."""
    rng = np.random.default_rng(inp.seed)
    shapes = [tuple(int(x) for x in rng.integers(2, 9, int(rng.integers(2, 4)))) for _ in range(inp.size)]
    return tuple(rng.integers(0, 5, shape).astype(np.int16) for shape in shapes)


def _field_construction(inp: SimpleInput) -> str:
    return "cells" if inp.seed % 2 else "vertices"


def field_batch_store(tmp_path: Path, inp: SimpleInput, name: str = "run") -> RunStore:
    from chitally.field_sources import read_fields
    from chitally.jobs import batch

    fields = batch_fields(inp)
    total = float(batch.field_cost(np.array([a.size for a in fields]), np.array([a.ndim for a in fields])).sum())
    params = batch.FieldBatchParams.checked(FIELD_GRID, _field_construction(inp), task_cost=total / 5)
    return batch.create_or_open_fields(str(tmp_path / f"{name}.zarr"), read_fields(list(fields)), params)


def field_batch_reference(inp: SimpleInput) -> dict[str, Any]:
    from cubical_references import gudhi_chi

    from chitally import feature_matrix

    fields = list(batch_fields(inp))
    grid = np.asarray(FIELD_GRID)
    construction = _field_construction(inp)
    fm = feature_matrix(fields, grid=grid, construction=construction, threads=1)
    assert all(np.array_equal(row, gudhi_chi(a, construction, grid)) for row, a in zip(fm.values, fields))
    return {"chitally.feature_matrix of fields in process (rows checked against gudhi CubicalComplex)": fm}


@functools.cache
def random_graph(inp: SimpleInput) -> Any:
    import networkx as nx

    return nx.gnm_random_graph(inp.size, 3 * inp.size, seed=inp.seed)


def graph_store(tmp_path: Path, inp: SimpleInput, name: str = "run") -> RunStore:
    from chitally.graphs import filtered_graph
    from chitally.jobs import graph

    params = graph.GraphParams.checked("degree", None, None, tasks=5)
    fg = filtered_graph(random_graph(inp), "degree")
    return graph.create_or_open(str(tmp_path / f"{name}.zarr"), fg, params)


def graph_reference(inp: SimpleInput) -> dict[str, Any]:
    from graph_references import brute_force_jumps, curve_of, edge_value_map

    from chitally.graphs import graph_curve

    g = random_graph(inp)
    ours = graph_curve(g, "degree")
    degrees = np.array([d for _, d in sorted(g.degree())], dtype=np.float64)
    edges = list(g.edges())
    values, jumps = brute_force_jumps(g.number_of_nodes(), edges, degrees, edge_value_map(edges, degrees))
    brute = curve_of(values, jumps, start=ours.domain[0], eps=ours.domain[1], max_dim=None,
                     n_points=ours.n_points)
    return {"chitally.graph_curve in process": ours,
            "networkx enumerate_all_cliques valued by the largest vertex degree (brute force)": brute}


@functools.cache
def bands_cloud(inp: SimpleInput) -> np.ndarray:
    return np.random.default_rng(inp.seed).random((inp.size, 2))


def bands_store(tmp_path: Path, inp: SimpleInput, name: str = "run") -> RunStore:
    from chitally.jobs import bands

    params = bands.BandsParams.checked(0.2, 12, 40, "0:0.2:11", seed=inp.seed, per_task=3)
    return bands.create_or_open(str(tmp_path / f"{name}.zarr"), bands_cloud(inp), params)


def bands_reference(inp: SimpleInput) -> dict[str, Any]:
    from chitally.bands import bands

    return {"chitally.bands.bands in process (same seed)":
            bands(bands_cloud(inp), 0.2, 12, 40, grid="0:0.2:11", seed=inp.seed, threads=1)}


# ------------------------------------------------------------------------------- field


@dataclass(frozen=True)
class FieldInput:
    """A field run store's input: an array (seeded), where it lives (``memory``: written
    into the store; ``zarr``, ``hdf5``, ``npy``: a file the workers read block by block),
    a construction, superlevel or not, a mask (in memory, or a ``.npy`` file beside a
    located array) and the owned block."""

    shape: tuple[int, ...]
    seed: int
    where: str
    construction: str
    superlevel: bool
    masked: bool
    block: tuple[int, ...]

    @property
    def id(self) -> str:
        return (f"{'x'.join(map(str, self.shape))}-{self.where}-{self.construction}"
                f"{'-super' if self.superlevel else ''}{'-masked' if self.masked else ''}")


@functools.cache
def field_arrays(inp: FieldInput) -> tuple[np.ndarray, np.ndarray | None]:
    rng = np.random.default_rng(inp.seed)
    # few levels: many exact ties between cells of every dimension
    a = (rng.integers(0, 5, size=inp.shape) * 0.5 - 1.0).astype(np.float32)
    mask = rng.random(inp.shape) < 0.75 if inp.masked else None
    return a, mask


def field_store(tmp_path: Path, inp: FieldInput, name: str = "run") -> RunStore:
    from chitally.jobs import field

    a, mask = field_arrays(inp)
    source: Any = a
    key = None
    if inp.where == "zarr":
        import zarr

        source = str(tmp_path / f"{name}-in.zarr")
        zarr.create_array(source, shape=a.shape, chunks=inp.block, dtype=a.dtype)[...] = a
    elif inp.where == "hdf5":
        import h5py

        source, key = str(tmp_path / f"{name}-in.h5"), "data/field"
        with h5py.File(source, "w") as f:
            f.create_dataset(key, data=a, chunks=inp.block)
            f.create_dataset("other", data=a[:1])
    elif inp.where == "npy":
        source = str(tmp_path / f"{name}-in.npy")
        np.save(source, a)
    if mask is not None and inp.where != "memory":
        np.save(tmp_path / f"{name}-mask.npy", mask)
        mask = str(tmp_path / f"{name}-mask.npy")
    params = field.FieldParams.checked(inp.construction, inp.superlevel, block=inp.block)
    store = field.create_or_open(str(tmp_path / f"{name}.zarr"), source, params, key=key, mask=mask)
    assert store.input_names == ([] if inp.where != "memory" else ["field"] + (["mask"] if inp.masked else []))
    return store


@functools.cache
def field_reference(inp: FieldInput) -> dict[str, Any]:
    from cubical_references import gudhi_field_curve

    from chitally import field_curve

    a, mask = field_arrays(inp)
    return {
        "chitally.field_curve (in process, no store)": field_curve(a, inp.construction, inp.superlevel, mask),
        "gudhi CubicalComplex persistence (missing entries at +inf)":
            gudhi_field_curve(a, inp.construction, inp.superlevel, mask),
    }


# ==================================================================== the kind registry


@dataclass(frozen=True)
class JobKindCase:
    """How the conformance suite runs one job kind.

    Attributes
    ----------
    name : str
        The kind's name (as `RunStore.kind`).
    inputs : tuple
        Store inputs (each with an ``id``) whose results must be exact.
    small : object
        One input of several tasks, quick to run, for the event, retry and cache tests.
    make_store : callable
        ``make_store(tmp_path, input) -> RunStore``.
    reference : callable
        ``reference(input) -> {source: expected result}`` from outside the engine.
    """

    name: str
    inputs: tuple[Any, ...]
    small: Any
    make_store: Callable[[Path, Any], RunStore]
    reference: Callable[[Any], dict[str, Any]]


JOB_KINDS: dict[str, JobKindCase] = {
    "cloud": JobKindCase(
        name="cloud",
        inputs=_cloud_inputs(),
        small=CloudInput("duplicates-R2", 1.0, "medium", 3),
        make_store=cloud_store,
        reference=cloud_reference,
    ),
    "cloud-staged": JobKindCase(
        name="cloud",
        inputs=_staged_inputs(),
        small=StagedInput("duplicates-R2", 2.0, 4, 7, 3),
        make_store=staged_store,
        reference=staged_reference,
    ),
    "cloud-metric": JobKindCase(
        name="cloud",
        inputs=(MetricInput("lattice-R3", "manhattan", "medium", None),
                MetricInput("lattice-R3", "chebyshev", "tiny", 2),
                MetricInput("dyadic-R2", "chebyshev", "huge", 3),
                MetricInput("dyadic-R2", "manhattan", "medium", 1)),
        small=MetricInput("lattice-R3", "chebyshev", "medium", 3),
        make_store=metric_store,
        reference=metric_reference,
    ),
    "batch": JobKindCase(
        name="batch",
        inputs=(SimpleInput("clouds", 30, 1), SimpleInput("clouds", 7, 2)),
        small=SimpleInput("clouds", 30, 1),
        make_store=batch_store,
        reference=batch_reference,
    ),
    "batch-fields": JobKindCase(
        name="batch",
        inputs=(SimpleInput("fields", 24, 1), SimpleInput("fields", 9, 2)),
        small=SimpleInput("fields", 24, 1),
        make_store=field_batch_store,
        reference=field_batch_reference,
    ),
    "graph": JobKindCase(
        name="graph",
        inputs=(SimpleInput("gnm", 40, 3), SimpleInput("gnm", 25, 4)),
        small=SimpleInput("gnm", 40, 3),
        make_store=graph_store,
        reference=graph_reference,
    ),
    "field": JobKindCase(
        name="field",
        inputs=(FieldInput((9, 11), 31, "memory", "vertices", False, False, (4, 4)),
                FieldInput((6, 5, 7), 32, "memory", "cells", True, True, (3, 5, 3)),
                FieldInput((10, 8), 33, "zarr", "cells", False, True, (3, 4)),
                FieldInput((5, 6, 4), 34, "hdf5", "vertices", True, False, (2, 3, 4)),
                FieldInput((3, 4, 3, 4), 35, "npy", "vertices", False, True, (2, 2, 3, 4))),
        small=FieldInput((8, 9), 36, "hdf5", "cells", True, True, (3, 4)),
        make_store=field_store,
        reference=field_reference,
    ),
    "bands": JobKindCase(
        name="bands",
        inputs=(SimpleInput("uniform", 300, 5),),
        small=SimpleInput("uniform", 300, 5),
        make_store=bands_store,
        reference=bands_reference,
    ),
}

KIND_PARAMS = [pytest.param(k, id=case) for case, k in JOB_KINDS.items()]
RESULT_PARAMS = [pytest.param(k, inp, id=f"{case}-{inp.id}") for case, k in JOB_KINDS.items() for inp in k.inputs]


def test_the_cloud_inputs_cover_every_pair_of_levels():
    inputs = JOB_KINDS["cloud"].inputs
    factors = {"cloud": CLOUDS, "radius": RADII, "split": SPLITS, "cap": CAPS}
    for a, levels_a in factors.items():
        for b, levels_b in factors.items():
            if a < b:
                seen = {(getattr(c, a), getattr(c, b)) for c in inputs}
                assert len(seen) == len(levels_a) * len(levels_b), (a, b)


def test_the_references_agree():
    # the three routes to each expected curve must agree before they judge anything
    for name in CLOUDS:
        for cap in CAPS:
            curves = list(cloud_curves(name, cap).values())
            assert curves[0] == curves[1] == curves[2], (name, cap)
    for inp in JOB_KINDS["cloud-metric"].inputs:
        curves = list(metric_reference(inp).values())
        assert curves[0] == curves[1] == curves[2], inp.id
    for inp in (*JOB_KINDS["field"].inputs, JOB_KINDS["field"].small):
        curves = list(field_reference(inp).values())
        assert curves[0] == curves[1], inp.id


# ============================================================= the faulty task function


class FailingTask:
    """The engine's task function, wrapped: fails chosen tasks on chosen attempts.

    Every call counts as an attempt, numbered from 1 per task by create-exclusive files
    ``task-<i>-attempt-<n>`` in `folder` (so the count is exact across processes and
    holds the attempt's name and pid). Attempt numbers in ``fail[task]`` raise
    ``error("injected failure in task <i>, attempt <n>")``. With `gate`, every attempt
    waits (bounded) for that file before running; `exit_after_commit` tasks end their
    process right after their first attempt committed. Picklable, so Dask workers run it.
    """

    def __init__(self, folder: Path, fail: dict[int, Any] | None = None,
                 error: type[BaseException] = RuntimeError, gate: Path | None = None,
                 exit_after_commit: tuple[int, ...] = ()) -> None:
        self.folder = str(folder)
        os.makedirs(self.folder, exist_ok=True)
        self.fail = {int(t): tuple(int(a) for a in at) for t, at in (fail or {}).items()}
        self.error = error
        self.gate = None if gate is None else str(gate)
        self.exit_after_commit = tuple(exit_after_commit)

    def _count(self, task: int, attempt: str) -> int:
        for n in range(1, 1000):
            try:
                fd = os.open(os.path.join(self.folder, f"task-{task}-attempt-{n}"),
                             os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                continue
            with os.fdopen(fd, "w") as f:
                f.write(f"{attempt} {os.getpid()}\n")
            return n
        raise RuntimeError(f"task {task}: more than 999 attempts")

    def __call__(self, store: RunStore, task: int, attempt: str, *, threads: int = 1) -> TaskResult:
        n = self._count(task, attempt)
        if self.gate is not None:
            deadline = time.monotonic() + 120
            while not os.path.exists(self.gate):
                if time.monotonic() > deadline:
                    raise TimeoutError(f"task {task}: the gate {self.gate} never opened")
                time.sleep(0.01)
        if n in self.fail.get(task, ()):
            raise self.error(f"injected failure in task {task}, attempt {n}")
        result = engine.run_task(store, task, attempt, threads=threads)
        if task in self.exit_after_commit and n == 1:
            os._exit(1)  # the worker dies after the commit, before the driver hears of it
        return result

    def attempts(self, task: int) -> list[tuple[str, int]]:
        """(attempt name, pid) of every attempt of `task`, in order."""
        out = []
        for n in range(1, 1000):
            path = Path(self.folder, f"task-{task}-attempt-{n}")
            if not path.exists():
                return out
            name, pid = path.read_text().split()
            out.append((name, int(pid)))
        return out


class Recorder(Callbacks):
    """Every event, in order, as tuples."""

    def __init__(self) -> None:
        self.events: list[tuple] = []
        self.ticks = 0

    def task_started(self, task, attempt):
        self.events.append(("started", task, attempt))

    def task_done(self, result):
        self.events.append(("done", result.task, result))

    def task_retry(self, task, attempt, message):
        self.events.append(("retry", task, attempt, message))

    def task_failed(self, task, message, attempts):
        self.events.append(("failed", task, message, attempts))

    def tick(self):
        self.ticks += 1

    def of(self, kind: str, task: int | None = None) -> list[tuple]:
        return [e for e in self.events if e[0] == kind and (task is None or e[1] == task)]

    def kinds(self, task: int) -> list[str]:
        return [e[0] for e in self.events if e[1] == task]


# ============================================================================ Dask


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host=HOST,
                      dashboard_address=None, scheduler_kwargs=QUIET_HTTP) as c:
        yield c


@pytest.fixture(scope="module")
def client(cluster):
    from distributed import Client

    with Client(cluster) as c:
        yield c


@pytest.fixture
def make_executor(executor, request):
    """`make_executor(**kw)` builds an executor of this test's kind."""
    if executor == "serial":
        return lambda **kw: SerialExecutor(**kw)
    client = request.getfixturevalue("client")
    if executor == "dask-bundled":
        return lambda **kw: DaskExecutor(client, bundle_tasks=2, **kw)
    return lambda **kw: DaskExecutor(client, **kw)


def committed_records(store: RunStore) -> dict[int, bytes]:
    return {t: store.io.get(CommitLog.commit_key(t)) for t in np.flatnonzero(store.commits.committed())}


# ============================================================== the conformance suite


@pytest.mark.parametrize("executor", ["serial", "dask", "dask-bundled"])
class TestExecutorConformance:
    """What every executor must do for every job kind."""

    @pytest.mark.parametrize("job, inp", RESULT_PARAMS)
    def test_the_result_is_exact(self, job, inp, make_executor, tmp_path):
        store = job.make_store(tmp_path, inp)

        report = runs.execute(store, make_executor())

        assert report.failed == {} and report.complete
        assert report.done == store.n_tasks == report.computed
        for source, expected in job.reference(inp).items():
            assert report.result == expected, f"the {job.name} result differs from {source}"
        assert runs.read_result(store) == report.result

    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_every_task_reports_done_once(self, job, make_executor, tmp_path):
        store = job.make_store(tmp_path, job.small)
        tasks = list(range(store.n_tasks))
        assert len(tasks) >= 3
        rec = Recorder()

        outcome = make_executor().run(store, tasks, rec)

        assert sorted(outcome.done) == tasks and outcome.failed == {}
        assert sorted(e[1] for e in rec.of("started")) == tasks
        assert sorted(e[1] for e in rec.of("done")) == tasks
        assert rec.of("retry") == [] and rec.of("failed") == []
        for _, task, result in rec.of("done"):
            record = store.commits.verified_record(task)
            assert isinstance(result, TaskResult) and not result.cached
            assert result.digest == record["digest"] and result.counters == record["counters"]
            assert round(result.seconds, 6) == record["seconds"]
            assert rec.kinds(task) == ["started", "done"]
        assert store.commits.committed().all()

    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_a_task_failing_once_is_retried_then_done(self, job, make_executor, tmp_path):
        store = job.make_store(tmp_path, job.small)
        victim = store.n_tasks - 1
        fn = FailingTask(tmp_path / "attempts", fail={victim: [1]})
        rec = Recorder()

        report = runs.execute(store, make_executor(retries=2, task_function=fn), events=rec)

        assert report.failed == {} and report.done == store.n_tasks
        mine = [e for e in rec.events if e[1] == victim]
        assert [e[0] for e in mine] == ["started", "retry", "started", "done"]
        first_attempt, message = mine[1][2], mine[1][3]
        assert first_attempt == mine[0][2] != mine[2][2]
        assert message == f"RuntimeError: injected failure in task {victim}, attempt 1"
        assert [a for a, _ in fn.attempts(victim)] == [mine[0][2], mine[2][2]]
        for task in range(store.n_tasks - 1):
            assert rec.kinds(task) == ["started", "done"]
            assert len(fn.attempts(task)) == 1
        for source, expected in job.reference(job.small).items():
            assert report.result == expected, f"differs from {source}"

    @pytest.mark.parametrize("retries", [0, 2])
    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_a_task_that_keeps_failing_is_reported_with_its_message(self, job, make_executor,
                                                                     tmp_path, retries):
        store = job.make_store(tmp_path, job.small)
        victim = 0
        fn = FailingTask(tmp_path / "attempts", fail={victim: range(1, retries + 2)})
        rec = Recorder()

        report = runs.execute(store, make_executor(retries=retries, task_function=fn), events=rec)

        last = f"RuntimeError: injected failure in task {victim}, attempt {retries + 1}"
        assert report.failed == {victim: last}
        assert report.result is None and not report.complete
        assert report.done == store.n_tasks - 1
        assert rec.kinds(victim) == ["started", "retry"] * retries + ["started", "failed"]
        assert rec.of("failed") == [("failed", victim, last, retries + 1)]
        assert [e[3] for e in rec.of("retry")] == [
            f"RuntimeError: injected failure in task {victim}, attempt {n}" for n in range(1, retries + 1)]
        assert len(fn.attempts(victim)) == retries + 1
        recorded = store.commits.failures()
        assert list(recorded) == [victim]
        assert recorded[victim]["message"] == last and recorded[victim]["attempts"] == retries + 1
        st = runs.status(store)
        assert (st["done"], st["failed"], st["pending"]) == (store.n_tasks - 1, 1, 0)
        assert st["failures"] == {victim: last} and not st["complete"]
        assert runs.read_result(store) is None

        # resume with the plain task function: only the failed task is computed again
        again = runs.execute(store, make_executor(retries=retries))
        assert again.computed == 1 and again.failed == {}
        assert store.commits.failures() == {} and runs.status(store)["complete"]
        assert len(fn.attempts(victim)) == retries + 1  # the wrapper was not used
        for source, expected in job.reference(job.small).items():
            assert again.result == expected, f"differs from {source}"

    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_a_resume_right_after_exhausted_retries_runs_the_task_afresh(self, job, make_executor,
                                                                         tmp_path):
        # attempts 1-3 fail: the first run exhausts its retries; the resume, submitted at
        # once under the same task names, succeeds on attempt 4
        store = job.make_store(tmp_path, job.small)
        victim = 1
        fn = FailingTask(tmp_path / "attempts", fail={victim: [1, 2, 3]})
        ex = make_executor(retries=2, task_function=fn)
        first = runs.execute(store, ex)
        assert first.failed == {victim: f"RuntimeError: injected failure in task {victim}, attempt 3"}
        second = runs.execute(store, ex)
        assert second.failed == {} and second.computed == 1
        assert len(fn.attempts(victim)) == 4
        for source, expected in job.reference(job.small).items():
            assert second.result == expected, f"differs from {source}"

    @pytest.mark.parametrize("error", [InputError, CommitConflict, StoreMismatch])
    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_errors_another_attempt_cannot_cure_are_not_retried(self, job, error, make_executor,
                                                                tmp_path):
        assert issubclass(error, NOT_RETRIED) and not issubclass(error, FATAL)
        store = job.make_store(tmp_path, job.small)
        victim = 1
        fn = FailingTask(tmp_path / "attempts", fail={victim: [1, 2, 3]}, error=error)
        rec = Recorder()

        outcome = make_executor(retries=2, task_function=fn).run(store, list(range(store.n_tasks)), rec)

        message = f"{error.__name__}: injected failure in task {victim}, attempt 1"
        assert outcome.failed == {victim: message}
        assert sorted(outcome.done) == [t for t in range(store.n_tasks) if t != victim]
        assert rec.kinds(victim) == ["started", "failed"]
        assert rec.of("failed") == [("failed", victim, message, 1)] and rec.of("retry") == []
        assert len(fn.attempts(victim)) == 1

    @pytest.mark.parametrize("error", [InputsDamaged, LeaseLost])
    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_fatal_errors_end_the_run_and_keep_what_was_committed(self, job, error, make_executor,
                                                                  executor, tmp_path):
        assert issubclass(error, FATAL)
        store = job.make_store(tmp_path, job.small)
        victim = 1
        fn = FailingTask(tmp_path / "attempts", fail={victim: [1]}, error=error)
        rec = Recorder()

        with pytest.raises(error, match=f"injected failure in task {victim}, attempt 1"):
            make_executor(retries=2, task_function=fn).run(store, list(range(store.n_tasks)), rec)

        assert len(fn.attempts(victim)) == 1 and rec.of("retry") == [] and rec.of("failed") == []
        for task in np.flatnonzero(store.commits.committed()):
            assert store.commits.verified_record(int(task)) is not None
        if executor == "serial":  # one after the other: nothing after the victim started
            assert [e[1] for e in rec.of("started")] == [0, 1]
            assert store.commits.committed().tolist() == [True] + [False] * (store.n_tasks - 1)

    @pytest.mark.parametrize("job", KIND_PARAMS)
    def test_a_task_already_committed_returns_at_once(self, job, make_executor, tmp_path):
        store = job.make_store(tmp_path, job.small)
        tasks = list(range(store.n_tasks))
        fn = FailingTask(tmp_path / "attempts")
        ex = make_executor(task_function=fn)
        first, again = Recorder(), Recorder()
        ex.run(store, tasks, first)
        records = committed_records(store)

        outcome = ex.run(store, tasks, again)

        assert sorted(outcome.done) == tasks and outcome.failed == {}
        before = {e[1]: e[2] for e in first.of("done")}
        for _, task, result in again.of("done"):
            assert result.cached and result.seconds == 0.0
            assert not before[task].cached
            assert (result.digest, result.counters) == (before[task].digest, before[task].counters)
            assert len(fn.attempts(task)) == 2  # called twice, computed once
        assert committed_records(store) == records  # byte for byte
        report = runs.execute(store, ex)
        assert report.computed == 0
        for source, expected in job.reference(job.small).items():
            assert report.result == expected, f"differs from {source}"


# =================================================================== Dask specifics


class Window(Recorder):
    """Tracks how many tasks are in flight (started, not yet done) at most."""

    def __init__(self) -> None:
        super().__init__()
        self.in_flight = 0
        self.peak = 0

    def task_started(self, task, attempt):
        super().task_started(task, attempt)
        self.in_flight += 1
        self.peak = max(self.peak, self.in_flight)

    def task_done(self, result):
        super().task_done(result)
        self.in_flight -= 1


def tiny_store(tmp_path: Path, name: str = "run", cap: int | None = 1) -> RunStore:
    return cloud_store(tmp_path, CloudInput("uniform-R2", 1.0, "tiny", cap), name)


@pytest.mark.parametrize("window, bundle", [(1, None), (2, None), (2, 3)])
def test_a_window_smaller_than_the_task_count_runs_every_task(client, tmp_path, window, bundle):
    store = tiny_store(tmp_path)
    tasks = list(range(10))
    # the window counts Dask tasks: single tasks, or bundles of `bundle`
    ex = DaskExecutor(client, window=window, bundle_seconds=0, bundle_tasks=bundle)
    assert ex.window() == window
    rec = Window()

    outcome = ex.run(store, tasks, rec)

    assert sorted(outcome.done) == tasks and outcome.failed == {}
    assert sorted(e[1] for e in rec.of("done")) == tasks
    assert 1 <= rec.peak <= window * (bundle or 1)
    assert store.commits.committed().tolist() == [True] * 10 + [False] * (store.n_tasks - 10)


def test_the_window_follows_the_live_cluster(tmp_path):
    from distributed import Client, LocalCluster

    store = tiny_store(tmp_path)
    gate = tmp_path / "gate"
    fn = FailingTask(tmp_path / "attempts", gate=gate)
    tasks = list(range(12))
    four, eight = threading.Event(), threading.Event()

    class Watch(Window):
        def task_started(self, task, attempt):
            super().task_started(task, attempt)
            n = len(self.of("started"))
            if n >= 4:
                four.set()
            if n >= 8:
                eight.set()

    rec = Watch()
    outcome: list[Any] = []
    # in-process workers (threads, inproc:// comms): quick to start and to add
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=None, scheduler_kwargs=QUIET_HTTP) as lc, Client(lc) as c:
        ex = DaskExecutor(c, task_function=fn)
        assert ex.window() == 4  # four per worker thread: one worker of one thread
        runner = threading.Thread(target=lambda: outcome.append(ex.run(store, tasks, rec)))
        runner.start()
        try:
            assert four.wait(60)
            # every task waits at the gate: the executor ticks each second and recounts
            # the cluster; two ticks later it still holds four in flight
            ticks = rec.ticks
            wait_for(lambda: rec.ticks >= ticks + 2, 30, "two ticks of the executor")
            assert len(rec.of("started")) == 4

            lc.scale(2)
            c.wait_for_workers(2, timeout=60)
            assert eight.wait(60), "the window did not grow with the second worker"
            assert ex.window() == 8
            assert len(rec.of("started")) == 8 and rec.of("done") == []
        finally:
            gate.touch()
            runner.join(120)
    assert not runner.is_alive()
    assert sorted(outcome[0].done) == tasks and outcome[0].failed == {}
    assert rec.peak == 8


@pytest.mark.parametrize("window, close_on", [(2, 4), (2, 1), (None, 6)])
def test_scheduler_lost_when_the_client_closes_mid_run(cluster, tmp_path, window, close_on):
    from distributed import Client

    store = tiny_store(tmp_path)
    own = Client(cluster)  # closed by the test: the module's client stays open
    closed_at: list[float] = []

    class Closer(Recorder):
        def task_started(self, task, attempt):
            super().task_started(task, attempt)
            if len(self.of("started")) == close_on:
                closed_at.append(time.monotonic())
                own.close()

    rec = Closer()
    ex = DaskExecutor(own, window=window)
    try:
        with pytest.raises(SchedulerLost, match="scheduler was lost"):
            ex.run(store, list(range(store.n_tasks)), rec)
    finally:
        own.close()
    assert time.monotonic() - closed_at[0] < 30  # promptly, not after a timeout
    done = [e[1] for e in rec.of("done")]
    assert len(done) <= close_on
    for task in done:  # what was committed stays committed and verified
        assert store.commits.verified_record(task) is not None
    report = runs.execute(store, SerialExecutor())
    assert report.complete
    pts, eps = points_of("uniform-R2")
    assert report.curve == euler_curve(pts, eps, 1)


def test_scheduler_lost_when_no_worker_joins(tmp_path):
    from distributed import Client, LocalCluster

    store = tiny_store(tmp_path)
    with LocalCluster(n_workers=0, processes=False, dashboard_address=None,
                      scheduler_kwargs=QUIET_HTTP) as lc, \
            Client(lc) as c:
        t0 = time.monotonic()
        with pytest.raises(SchedulerLost, match="no Dask worker for 1 s"):
            DaskExecutor(c, lost_after=1.0).run(store, [0, 1], Callbacks())
        assert time.monotonic() - t0 < 30
    assert not store.commits.committed().any()


def test_an_interruption_inside_a_gather_leaves_no_scheduler_error(tmp_path, monkeypatch):
    """Ctrl-C (or SIGTERM, which the CLI turns into the same interruption) can land while
    the driver gathers finished results: the scheduler, in this process under the
    embedded cluster, then finds the keys we cancel gone and logs an ERROR line on the
    user's terminal. The interruption must leave the terminal to our one-line message."""
    from distributed import Client, LocalCluster

    store = tiny_store(tmp_path)
    gathered: list[Any] = []

    def interrupted(self, finished):
        gathered.extend(f.key for f in finished)
        raise KeyboardInterrupt

    records: list[logging.LogRecord] = []
    catch = logging.Handler(logging.ERROR)
    catch.emit = records.append  # type: ignore[method-assign]
    scheduler_log = logging.getLogger("distributed.scheduler")
    scheduler_log.addHandler(catch)
    try:
        with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                          dashboard_address=None, scheduler_kwargs=QUIET_HTTP) as lc, Client(lc) as c:
            # the scheduler's own complaint, before any interruption: the handler sees it
            c.sync(lc.scheduler.gather, ["chitally-no-such-key"])
            assert [r.getMessage().startswith("Couldn't gather keys") for r in records] == [True]
            records.clear()

            monkeypatch.setattr(DaskExecutor, "_gather", interrupted)
            with pytest.raises(KeyboardInterrupt):
                DaskExecutor(c).run(store, [0, 1], Callbacks())
            assert gathered
            c.sync(lc.scheduler.gather, gathered)  # what the interrupted gather goes on to do
    finally:
        scheduler_log.removeHandler(catch)
    assert records == []


def test_dask_keys_name_the_run_the_task_and_the_retry(client, tmp_path, monkeypatch):
    store = tiny_store(tmp_path, cap=2)
    fn = FailingTask(tmp_path / "attempts", fail={0: [1]})
    seen: list[str] = []
    submit = client.submit

    def spy(*args, **kwargs):
        seen.append(kwargs["key"])
        return submit(*args, **kwargs)

    monkeypatch.setattr(client, "submit", spy)
    tasks = list(range(5))
    DaskExecutor(client, task_function=fn).run(store, tasks, Callbacks())
    # chitally-<kind>-<plan digest>-<store hash>-<task>[-r<retry>]: one prefix per run, so
    # the dashboard groups a run's tasks and two stores of one plan never share a key
    prefix = (f"chitally-cloud-{store.plan_digest[:16]}-"
              f"{hashlib.sha256(store.url.encode()).hexdigest()[:6]}")
    assert sorted(seen) == sorted([f"{prefix}-{t}" for t in tasks] + [f"{prefix}-0-r1"])


def test_bundle_keys_name_their_first_task_and_their_size(client, tmp_path, monkeypatch):
    store = tiny_store(tmp_path, cap=2)
    fn = FailingTask(tmp_path / "attempts", fail={0: [1]})
    seen: list[str] = []
    submit = client.submit

    def spy(*args, **kwargs):
        seen.append(kwargs["key"])
        return submit(*args, **kwargs)

    monkeypatch.setattr(client, "submit", spy)
    rec = Recorder()
    outcome = DaskExecutor(client, task_function=fn, bundle_tasks=2).run(store, [0, 1, 2, 3, 4], rec)
    assert sorted(outcome.done) == [0, 1, 2, 3, 4] and outcome.failed == {}
    prefix = (f"chitally-cloud-{store.plan_digest[:16]}-"
              f"{hashlib.sha256(store.url.encode()).hexdigest()[:6]}")
    # two bundles of two, the last task alone, and the retry of task 0 alone
    assert sorted(seen) == sorted([f"{prefix}-0-n2", f"{prefix}-2-n2", f"{prefix}-4", f"{prefix}-0-r1"])
    assert rec.kinds(0) == ["started", "retry", "started", "done"]
    assert [rec.kinds(t) for t in (1, 2, 3, 4)] == [["started", "done"]] * 4
    assert [len(fn.attempts(t)) for t in range(5)] == [2, 1, 1, 1, 1]


def test_cheap_tasks_are_bundled_once_one_has_finished(client, tmp_path, monkeypatch):
    from chitally import feature_matrix
    from chitally.clouds import read_collection
    from chitally.jobs import batch

    rng = np.random.default_rng(31)
    clouds = [rng.random((4, 2)) for _ in range(60)]
    params = batch.BatchParams.checked(0.5, BATCH_GRID, task_cost=1.0)  # a cloud a task
    store = batch.create_or_open(str(tmp_path / "fm.zarr"), read_collection(clouds), params)
    assert store.n_tasks == 60
    sizes: list[int] = []
    submit = client.submit

    def spy(*args, **kwargs):
        last = kwargs["key"].rsplit("-", 1)[1]  # n<tasks> for a bundle
        sizes.append(int(last[1:]) if last.startswith("n") else 1)
        return submit(*args, **kwargs)

    monkeypatch.setattr(client, "submit", spy)
    rec = Recorder()
    # ten seconds a bundle: far more than 60 tiny tasks take, so only the spread over
    # the two workers and the first tasks (nothing measured yet) limit the bundles
    report = runs.execute(store, DaskExecutor(client, bundle_seconds=10.0), events=rec)

    assert report.complete and report.computed == 60 and sum(sizes) == 60
    assert sizes[0] == 1 and max(sizes) > 1 and len(sizes) < 60
    assert sorted(e[1] for e in rec.of("done")) == list(range(60))
    assert [e[1] for e in rec.of("retry")] == []
    # the in-process matrix of the same clouds: bundling changes nothing
    expected = feature_matrix(clouds, 0.5, np.asarray(BATCH_GRID), threads=1)
    assert np.array_equal(report.result.values, expected.values)


def test_two_stores_of_one_plan_running_at_once_do_not_share_tasks(client, tmp_path):
    inp = CloudInput("uniform-R2", 1.0, "huge", 2)
    first = cloud_store(tmp_path, inp, "first")
    second = cloud_store(tmp_path, inp, "second")
    assert first.plan_digest == second.plan_digest
    gate = tmp_path / "gate"
    held = FailingTask(tmp_path / "held", gate=gate)  # keeps the first run's task in flight
    outcomes: list[Any] = []
    thread = threading.Thread(
        target=lambda: outcomes.append(DaskExecutor(client, task_function=held).run(first, [0], Callbacks())))
    thread.start()
    try:
        wait_for(lambda: held.attempts(0), 60, "the first store's task to run")
        outcome = DaskExecutor(client).run(second, [0], Callbacks())
    finally:
        gate.touch()
        thread.join(120)
    assert outcome.done == [0] and outcomes[0].done == [0]
    assert second.commits.verified_record(0) is not None, "reported done but never committed"
    assert first.commits.verified_record(0) is not None


def test_a_bundle_whose_worker_died_recomputes_only_its_uncommitted_tasks(client, tmp_path):
    # Near the end of the module: it ends a worker process (the nanny starts a fresh one).
    inp = CloudInput("uniform-R2", 1.0, "tiny", 2)
    store = cloud_store(tmp_path, inp)
    assert store.n_tasks > 10
    victim = 2
    fn = FailingTask(tmp_path / "attempts", exit_after_commit=(victim,))
    rec = Recorder()
    try:
        # the first bundle, tasks 0 to 4, runs first: its worker dies after the commit
        # of task 2, before tasks 3 and 4 are called
        report = runs.execute(store, DaskExecutor(client, task_function=fn, bundle_tasks=5),
                              events=rec)
    finally:
        client.wait_for_workers(2, timeout=60)
    assert report.failed == {} and report.computed == report.done == store.n_tasks
    results = {e[1]: e[2] for e in rec.of("done")}
    assert sorted(results) == list(range(store.n_tasks))
    # Dask ran the bundle again on the other worker: what was committed came back
    # cached, what was not was computed there, once
    for task in (0, 1, 2):
        assert results[task].cached and len(fn.attempts(task)) == 2, task
    first, second = fn.attempts(0)[0][1], fn.attempts(0)[1][1]
    assert first != second and fn.attempts(2)[0][1] == first
    for task in (3, 4):
        assert not results[task].cached and [pid for _, pid in fn.attempts(task)] == [second], task
    # any other bundle lost with that worker: cached exactly where it ran twice
    for task, result in results.items():
        assert result.cached == (len(fn.attempts(task)) == 2), task
    assert rec.of("retry") == []  # Dask reran it: not one of our retries
    for source, expected in cloud_reference(inp).items():
        assert report.curve == expected, f"differs from {source}"


def test_a_task_whose_worker_died_after_its_commit_returns_cached(client, tmp_path):
    # Last in the module: it ends a worker process (the nanny starts a fresh one).
    inp = CloudInput("clustered-R3", 1.0, "medium", 2)
    store = cloud_store(tmp_path, inp)
    victim = 1
    fn = FailingTask(tmp_path / "attempts", exit_after_commit=(victim,))
    rec = Recorder()
    try:
        report = runs.execute(store, DaskExecutor(client, task_function=fn), events=rec)
    finally:
        client.wait_for_workers(2, timeout=60)
    attempts = fn.attempts(victim)
    assert len(attempts) == 2 and attempts[0][1] != attempts[1][1]  # two worker processes
    assert report.failed == {} and report.computed == report.done == store.n_tasks
    results = {e[1]: e[2] for e in rec.of("done")}
    assert sorted(results) == list(range(store.n_tasks))
    assert results[victim].cached
    # a task whose result was still held by the dead worker ran again too, and found its
    # commit: cached exactly when it ran twice
    for task, result in results.items():
        assert result.cached == (len(fn.attempts(task)) == 2), task
    assert rec.of("retry") == []  # Dask reran it: not one of our retries
    for source, expected in cloud_reference(inp).items():
        assert report.curve == expected, f"differs from {source}"
