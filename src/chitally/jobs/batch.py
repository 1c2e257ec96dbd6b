"""The `batch` job kind: many clouds in, one exact feature matrix out.

Planning (pure) groups the clouds into tasks of about equal estimated cost, heaviest
first, and lays each task's clouds out contiguously, so a task reads one slice of rows
and thousands of small clouds are a few dozen tasks, not thousands. A task computes each
of its clouds' exact curves and samples them on the grid (integer rows); the fold places
rows into the matrix; the result is the matrix, normalised by each cloud's size on
request.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..clouds import Collection
from ..curve import Curve
from ..kernel import count_jumps
from ..store import JobSpec, ResultDamaged, RunStore
from ..validate import InputError, validate_eps, validate_max_dim, validate_positive
from . import BATCH

#: Default number of tasks a collection is cut into (fewer for fewer clouds).
DEFAULT_TASKS = 64


@dataclass(frozen=True)
class BatchParams:
    """What a feature-matrix store is made for."""

    eps: float
    grid: tuple[float, ...]
    max_dim: int | None = None
    normalise: bool = False
    task_cost: float | None = None

    @staticmethod
    def checked(eps: Any, grid: Any, max_dim: Any = None, normalise: bool = False,
                task_cost: Any = None, *, names: Mapping[str, str] | None = None) -> BatchParams:
        n = {"eps": "eps", "grid": "grid", "max_dim": "max_dim", "task_cost": "task_cost",
             **(names or {})}
        eps = validate_eps(eps, name=n["eps"])
        g = np.asarray(grid, dtype=np.float64) if not isinstance(grid, str) else None
        if g is None or g.ndim != 1 or g.size == 0:
            raise InputError(f"{n['grid']} must be a non-empty 1-D sequence of scales")
        if not np.isfinite(g).all():
            raise InputError(f"{n['grid']} holds a value that is not a finite number")
        if np.any(np.diff(g) <= 0):
            i = int(np.flatnonzero(np.diff(g) <= 0)[0])
            raise InputError(f"{n['grid']} must be strictly increasing: {g[i]!r} then {g[i + 1]!r}")
        if g[0] < 0 or g[-1] > eps:
            bad = g[0] if g[0] < 0 else g[-1]
            raise InputError(f"{n['grid']} value {float(bad)!r} lies outside [0, eps] = [0, {eps!r}]")
        cost = None if task_cost is None else validate_positive(task_cost, name=n["task_cost"])
        return BatchParams(eps, tuple(float(x) for x in g), validate_max_dim(max_dim, name=n["max_dim"]),
                           bool(normalise), cost)

    def as_dict(self) -> dict[str, Any]:
        return {"eps": self.eps, "grid": list(self.grid), "max_dim": self.max_dim,
                "normalise": self.normalise, "task_cost": self.task_cost}


def cloud_rows(clouds: Sequence[np.ndarray], eps: float, max_dim: int | None,
               grid: np.ndarray) -> np.ndarray:
    """Each cloud's exact curve sampled on `grid`: an int64 array (clouds x grid).

    The one computation behind the batch task and the in-process feature matrix.
    """
    out = np.empty((len(clouds), grid.size), dtype=np.int64)
    for k, coords in enumerate(clouds):
        table = count_jumps(np.ascontiguousarray(coords, dtype=np.float64), eps, max_dim, threads=1)
        curve = Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=max_dim,
                                 n_points=coords.shape[0])
        out[k] = curve.sample(grid)
    return out


def cloud_cost(n: np.ndarray) -> np.ndarray:
    """Relative cost of a cloud of n points (pairs dominate small dense clouds)."""
    n = np.asarray(n, dtype=np.float64)
    return n * n + 64.0  # the constant: per-cloud work that does not grow with n


def group(costs: np.ndarray, target: float) -> list[np.ndarray]:
    """Cloud ids in groups of about `target` cost, heaviest clouds (and groups) first."""
    order = np.argsort(-costs, kind="stable")
    groups: list[list[int]] = []
    current: list[int] = []
    acc = 0.0
    for i in order:
        current.append(int(i))
        acc += float(costs[i])
        if acc >= target:
            groups.append(current)
            current, acc = [], 0.0
    if current:
        groups.append(current)
    return [np.asarray(g, dtype=np.int64) for g in groups]


def collection_fingerprint(col: Collection) -> dict[str, Any]:
    h = hashlib.sha256()
    for name, c in zip(col.names, col.clouds):
        h.update(name.encode() + b"\0")
        h.update(np.asarray(c.shape, "<i8").tobytes())
        h.update(np.ascontiguousarray(c, "<f8").tobytes())
    return {"clouds": len(col), "dim": col.dim, "points": int(sum(c.shape[0] for c in col.clouds)),
            "sha256": h.hexdigest()}


def job_spec(col: Collection, params: BatchParams) -> JobSpec:
    """The run store contents for a validated collection (pure)."""
    sizes = np.array([c.shape[0] for c in col.clouds], dtype=np.int64)
    costs = cloud_cost(sizes)
    target = params.task_cost or max(float(costs.sum()) / DEFAULT_TASKS, float(costs.max()))
    groups = group(costs, target)
    cloud_ids = np.concatenate(groups)
    task_offsets = np.concatenate(([0], np.cumsum([g.size for g in groups]))).astype(np.int64)
    row_offsets = np.concatenate(([0], np.cumsum(sizes[cloud_ids]))).astype(np.int64)
    points = np.concatenate([col.clouds[i] for i in cloud_ids]).astype(np.float64, copy=False)
    task_cost = np.array([costs[g].sum() for g in groups])
    memory = np.array([int(sizes[g].max()) ** 2 * 16 + 1_000_000 for g in groups], dtype=np.int64)
    attrs = {"names": list(col.names), "labels": None if col.labels is None else list(col.labels),
             "dim": col.dim}
    return JobSpec(kind=BATCH.name, params=params.as_dict(), fingerprint=collection_fingerprint(col),
                   outputs=BATCH.outputs, cost=task_cost, memory=memory,
                   inputs={"points": points, "row_offsets": row_offsets, "cloud_ids": cloud_ids,
                           "task_offsets": task_offsets, "sizes": sizes},
                   attrs=attrs)


def create_or_open(url: str, collection: Collection, params: BatchParams, *,
                   storage_options: Mapping[str, Any] | None = None, discard: bool = False) -> RunStore:
    """The feature-matrix run store at `url` for this collection and these parameters."""
    from ..runs import open_or_create

    return open_or_create(url, BATCH.name, params.as_dict(), collection_fingerprint(collection),
                          lambda: job_spec(collection, params), storage_options=storage_options,
                          discard=discard)


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the grid rows of task `i`'s clouds."""
    p = store.params
    a, b = (int(x) for x in store.read_input("task_offsets", slice(i, i + 2), task=i))
    offsets = store.read_input("row_offsets", slice(a, b + 1), task=i)
    rows = store.read_input("points", slice(int(offsets[0]), int(offsets[-1])), task=i)
    base = int(offsets[0])
    clouds = [rows[int(lo) - base:int(hi) - base] for lo, hi in zip(offsets[:-1], offsets[1:])]
    out = cloud_rows(clouds, float(p["eps"]), p["max_dim"], np.asarray(p["grid"], np.float64))
    return {"rows": out}, {"clouds": b - a, "points": int(offsets[-1] - offsets[0])}


class PlaceRows:
    """The batch fold: each task's rows placed at its clouds' positions."""

    def __init__(self, store: RunStore) -> None:
        self.store = store
        self.cloud_ids = store.read_input("cloud_ids")
        self.task_offsets = store.read_input("task_offsets")
        grid = store.params["grid"]
        self.matrix = np.zeros((self.cloud_ids.size, len(grid)), dtype=np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.matrix = np.asarray(state["matrix"], dtype=np.int64).copy()

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, out in zip(tasks, outputs):
            ids = self.cloud_ids[self.task_offsets[t]:self.task_offsets[t + 1]]
            self.matrix[ids] = out["rows"]

    def state(self) -> dict[str, np.ndarray]:
        return {"matrix": self.matrix}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        sizes = self.store.read_input("sizes")
        return ({"matrix": self.matrix, "sizes": sizes},
                {"rows": int(self.matrix.shape[0]), "grid_points": int(self.matrix.shape[1])})


def read_matrix(store: RunStore) -> Any:
    """The feature matrix of a complete batch run, verified; None if not written yet."""
    from ..features import FeatureMatrix

    got = store.read_result()
    if got is None:
        return None
    arrays, _ = got
    p, a = store.params, store.attrs
    matrix = arrays["matrix"]
    if matrix.shape != (len(a["names"]), len(p["grid"])):
        raise ResultDamaged(f"the matrix in {store.url} has shape {matrix.shape}")
    return FeatureMatrix.of_counts(matrix, arrays["sizes"], names=a["names"], labels=a["labels"],
                                   grid=p["grid"], eps=p["eps"], max_dim=p["max_dim"],
                                   normalise=p["normalise"])
