"""The `bands` job kind: B subsample curves of one cloud, and confidence bands from them.

Planning (pure) stores the cloud as given and cuts the B replicates into tasks of
`per_task` consecutive replicates. Replicate i draws its m rows from a generator seeded
by ``(seed, i)`` alone (`chitally.bands.replicate_generator`), so it is the same
subsample whichever task, worker or executor computes it, and however the replicates are
grouped. A task computes each of its replicates' exact curve and samples it on the grid;
the fold keeps every replicate's row (a B x grid int64 matrix, checkpointed); the result
is that matrix with the mean curve and its bands (`chitally.bands.band_statistics`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..bands import (
    DEFAULT_DRAWS,
    Bands,
    band_statistics,
    default_grid,
    replicate_generator,
)
from ..store import JobSpec, ResultDamaged, RunStore, fingerprint
from ..validate import (
    InputError,
    validate_count,
    validate_eps,
    validate_grid,
    validate_max_dim,
    validate_points,
)
from . import BANDS

#: Tasks the replicates are cut into unless `per_task` says otherwise: enough for a
#: cluster to share out, few enough that each task's fixed cost stays small.
DEFAULT_TASKS = 16


@dataclass(frozen=True)
class BandsParams:
    """What a bands store is made for; any difference is a different run."""

    eps: float
    replicates: int
    sample_size: int
    grid: tuple[float, ...]
    max_dim: int | None = None
    level: float = 0.95
    seed: int = 0
    replace: bool = False
    per_task: int | None = None
    draws: int = DEFAULT_DRAWS

    @staticmethod
    def checked(eps: Any, replicates: Any, sample_size: Any, grid: Any = None, max_dim: Any = None,
                level: Any = 0.95, seed: Any = 0, replace: bool = False, per_task: Any = None,
                draws: Any = DEFAULT_DRAWS, *, names: Mapping[str, str] | None = None) -> BandsParams:
        """Validated parameters; `names` maps a parameter to how the user spelled it."""
        n = {k: k for k in ("eps", "replicates", "sample_size", "grid", "max_dim", "level", "seed",
                            "per_task", "draws")}
        n.update(names or {})
        eps = validate_eps(eps, name=n["eps"])
        if grid is None:
            g = default_grid(eps)
        else:
            if isinstance(grid, str):
                from ..curve import parse_grid

                try:
                    grid = parse_grid(grid)
                except ValueError as exc:
                    raise InputError(f"{n['grid']}: {exc}") from None
            g = validate_grid(grid, lo=0.0, hi=eps, name=n["grid"])
        if isinstance(level, (bool, np.bool_)) or not isinstance(level, (int, float, np.integer, np.floating)) \
                or not 0.0 < float(level) < 1.0:
            raise InputError(f"{n['level']} must be a number strictly between 0 and 1, got {level!r}")
        return BandsParams(
            eps=eps,
            replicates=validate_count(replicates, name=n["replicates"], minimum=2),
            sample_size=validate_count(sample_size, name=n["sample_size"], minimum=1),
            grid=tuple(float(x) for x in g),
            max_dim=validate_max_dim(max_dim, name=n["max_dim"]),
            level=float(level),
            seed=validate_count(seed, name=n["seed"], minimum=0),
            replace=bool(replace),
            per_task=None if per_task is None else validate_count(per_task, name=n["per_task"], minimum=1),
            draws=validate_count(draws, name=n["draws"], minimum=1),
        )

    @staticmethod
    def of(stored: Mapping[str, Any]) -> BandsParams:
        """The parameters recorded in a store."""
        return BandsParams(**{**stored, "grid": tuple(float(x) for x in stored["grid"])})

    def as_dict(self) -> dict[str, Any]:
        return {"eps": self.eps, "replicates": self.replicates, "sample_size": self.sample_size,
                "grid": list(self.grid), "max_dim": self.max_dim, "level": self.level,
                "seed": self.seed, "replace": self.replace, "per_task": self.per_task,
                "draws": self.draws}

    @property
    def tasks_of(self) -> int:
        """Replicates per task."""
        return self.per_task or max(1, math.ceil(self.replicates / DEFAULT_TASKS))

    def statistics(self, rows: np.ndarray, n_points: int) -> Bands:
        """The bands of the (B x grid) replicate matrix, as these parameters say."""
        return band_statistics(rows, np.asarray(self.grid), level=self.level, seed=self.seed,
                               draws=self.draws, sample_size=self.sample_size, eps=self.eps,
                               max_dim=self.max_dim, n_points=n_points, replace=self.replace)


def check_cloud(points: Any, params: BandsParams, *, where: str = "points",
                sample_size_name: str = "sample_size") -> np.ndarray:
    """The validated cloud; a sample size above its number of points is refused unless
    drawing with replacement."""
    pts = validate_points(points, where=where)
    if not params.replace and params.sample_size > pts.shape[0]:
        raise InputError(f"{sample_size_name} {params.sample_size} exceeds the {pts.shape[0]} points of "
                         f"{where}: a subsample without replacement holds at most that many")
    return pts


def draw_rows(n: int, sample_size: int, seed: int, i: int, replace: bool = False) -> np.ndarray:
    """The rows (of a cloud of n points) that replicate `i` holds, sorted."""
    rows = replicate_generator(seed, i).choice(n, size=sample_size, replace=replace)
    return np.sort(rows)


def replicate_rows(points: np.ndarray, ids: Iterable[int], params: BandsParams, *,
                   threads: int | None = 1) -> np.ndarray:
    """Replicates `ids`' exact curves on the grid: an int64 array (replicates x grid).

    The one computation behind the bands task and the in-process `chitally.bands.bands`;
    each curve on one thread, replicates spread over `threads` (the kernel releases the GIL).
    """
    from ..inprocess import euler_curve

    ids = [int(i) for i in ids]
    grid = np.asarray(params.grid, dtype=np.float64)
    out = np.empty((len(ids), grid.size), dtype=np.int64)
    n = points.shape[0]

    def work(k: int) -> None:
        rows = draw_rows(n, params.sample_size, params.seed, ids[k], params.replace)
        out[k] = euler_curve(points[rows], params.eps, params.max_dim, threads=1).sample(grid)

    threads = threads or os.cpu_count() or 1
    if threads == 1 or len(ids) <= 1:
        for k in range(len(ids)):
            work(k)
    else:
        with ThreadPoolExecutor(min(threads, len(ids))) as pool:
            list(pool.map(work, range(len(ids))))
    return out


def estimate_edges(points: np.ndarray, params: BandsParams) -> int:
    """Edges of replicate 0's Rips graph at eps: what one replicate's memory and time
    grow with (every replicate is alike in distribution)."""
    from scipy.spatial import cKDTree

    sub = points[draw_rows(points.shape[0], params.sample_size, params.seed, 0, params.replace)]
    tree = cKDTree(sub)
    ordered = int(tree.count_neighbors(tree, params.eps))  # ordered pairs, self pairs included
    return (ordered - sub.shape[0]) // 2


def job_spec(points: np.ndarray, params: BandsParams) -> JobSpec:
    """The run store contents for a validated cloud (pure)."""
    n, d = points.shape
    k = params.tasks_of
    starts = np.arange(0, params.replicates, k, dtype=np.int64)
    sizes = np.minimum(k, params.replicates - starts)
    edges = estimate_edges(points, params)
    m = params.sample_size
    cost = sizes.astype(np.float64) * (m + edges)
    # the cloud (each worker keeps it while it runs tasks of this store), one replicate's
    # kernel (points, edge arrays, neighbourhood frames) and the task's rows
    one = m * d * 8 * 3 + edges * 96 + m * 64 + (4 << 20)
    memory = (n * d * 8 + one + sizes * len(params.grid) * 8).astype(np.int64)
    attrs = {"n_points": int(n), "dim": int(d), "per_task": int(k), "edges_estimate": int(edges)}
    return JobSpec(kind=BANDS.name, params=params.as_dict(), fingerprint=fingerprint(points),
                   outputs=BANDS.outputs, cost=cost, memory=memory, inputs={"points": points},
                   attrs=attrs)


def create_or_open(url: str, points: Any, params: BandsParams, *,
                   storage_options: Mapping[str, Any] | None = None, discard: bool = False) -> RunStore:
    """The bands run store at `url` for this cloud and these parameters: opened if it
    exists (it must match: `StoreMismatch` otherwise), else planned and created."""
    from ..runs import open_or_create

    pts = check_cloud(points, params)
    return open_or_create(url, BANDS.name, params.as_dict(), fingerprint(pts),
                          lambda: job_spec(pts, params), storage_options=storage_options,
                          discard=discard)


def task_replicates(store: RunStore, i: int) -> range:
    """The replicates task `i` computes."""
    k = int(store.attrs["per_task"])
    return range(i * k, min(int(store.params["replicates"]), (i + 1) * k))


# One cloud per worker process: every task of a store needs the whole cloud, and reading
# it again for each task would cost as much as the task itself at small m. The key is the
# plan digest, which covers the input's digest. A worker keeps it until it runs tasks of
# another bands store (the task memory declared in the plan counts it).
_CLOUD: dict[str, tuple[str, np.ndarray]] = {}


def _cloud(store: RunStore, i: int) -> np.ndarray:
    got = _CLOUD.get(store.url)
    if got is not None and got[0] == store.plan_digest:
        return got[1]
    points = store.read_input("points", task=i)
    _CLOUD.clear()
    _CLOUD[store.url] = (store.plan_digest, points)
    return points


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the grid rows of task `i`'s replicates."""
    params = BandsParams.of(store.params)
    ids = task_replicates(store, i)
    rows = replicate_rows(_cloud(store, i), ids, params, threads=threads)
    return {"rows": rows}, {"replicates": len(ids), "points": len(ids) * params.sample_size}


class KeepRows:
    """The bands fold: each task's rows kept at its replicates' positions."""

    def __init__(self, store: RunStore) -> None:
        self.store = store
        self.params = BandsParams.of(store.params)
        self.rows = np.zeros((self.params.replicates, len(self.params.grid)), dtype=np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        rows = np.asarray(state["rows"], dtype=np.int64)
        if rows.shape != self.rows.shape:
            raise ValueError(f"a checkpoint of {self.store.url} holds rows of shape {rows.shape}, "
                             f"expected {self.rows.shape}")
        self.rows = rows.copy()

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, out in zip(tasks, outputs):
            ids = task_replicates(self.store, t)
            self.rows[ids.start:ids.stop] = out["rows"]

    def state(self) -> dict[str, np.ndarray]:
        return {"rows": self.rows}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        # the driver runs the fold; a serial run may have left the cloud in its cache
        _CLOUD.pop(self.store.url, None)
        b = self.params.statistics(self.rows, int(self.store.attrs["n_points"]))
        return {"rows": self.rows, **b.arrays()}, b.metadata()


def read_bands(store: RunStore) -> Bands | None:
    """The bands of a complete bands run, verified; None if not written yet."""
    got = store.read_result()
    if got is None:
        return None
    arrays, rec = got
    params = BandsParams.of(store.params)
    try:
        b = Bands(**{k: arrays[k] for k in Bands.__dataclass_fields__ if k in arrays},
                  **{k: rec[k] for k in Bands.__dataclass_fields__ if k not in arrays})
    except (KeyError, TypeError, ValueError) as exc:
        raise ResultDamaged(f"the bands in {store.url} are not valid: {exc}") from exc
    if arrays["rows"].shape != (params.replicates, len(params.grid)) \
            or not np.array_equal(b.grid, np.asarray(params.grid)):
        raise ResultDamaged(f"the bands in {store.url} do not match the store's replicates and grid")
    return b


def read_replicates(store: RunStore) -> np.ndarray | None:
    """The (B x grid) replicate matrix of a complete bands run; None before."""
    got = store.read_result()
    return None if got is None else got[0]["rows"]
