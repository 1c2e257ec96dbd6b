"""Planning a cloud on the cluster: four job kinds, one run store each.

The driver never holds the points. It holds per-cell and per-task summaries only:

1. ``plan-count`` (one task per input block): each row's cell (`chitally.cells`); the
   block's distinct cells with their row counts. The fold merges them into the cell
   table, in Morton order.
2. The driver cuts the cells into regions of at most ``region_rows`` rows (runs of
   consecutive cells: compact pieces of space) and finds, for each cell, the other
   regions next door to it.
3. ``plan-scatter`` (one task per input block): the block's rows grouped by region, each
   row once for its own region and once for every region whose halo it is in.
4. ``plan-region`` (one task per region): the region's rows and its halo rows from every
   block, numbered in the global row order (cells in Morton order, input row id inside a
   cell, known to everyone from the cell table), and the exact eps-degree of each own
   row. The fold sums the costs, which fixes the target cost of a task.
5. ``plan-halo`` (one task per region): tasks cut along cells at the target cost (a cell
   heavier than the target is cut by rows), and each task's exact halo (its rows and
   every row within eps of one) materialised as coordinates in global row order, so a
   cloud task reads one contiguous slice. The fold gathers the task table.

The run itself is then an ordinary `cloud` store whose task inputs point into the halo
stage's outputs. Any grid gives the same curve: a task owns a contiguous range of global
row ids, its halo holds every eps-neighbour of its rows, and an edge belongs to the task
owning its lower-numbered endpoint, exactly as with the ball cover.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..cells import cell_codes, cut_regions, grid_dims, halo_regions
from ..store import RunStore

#: Stage stores live beside the run, in ``<run>.plan/<stage>``.
SUFFIX = ".plan"
STAGES = ("count", "scatter", "region", "halo")


@dataclass(frozen=True)
class StageParams:
    """How the cluster planner cuts the work (beside the cloud's own `Params`)."""

    cell_size: float | None = None  # default: 2 eps
    region_rows: int = 1_000_000
    block_rows: int = 1 << 20
    part_jumps: int | None = None  # default: chitally.jobs.parts.PART_JUMPS

    def side(self, eps: float) -> float:
        side = float(self.cell_size) if self.cell_size is not None else 2.0 * float(eps)
        # a hair above eps, so that rounding in x / side never puts two points within
        # eps of each other two cells apart
        return max(side, float(eps) * (1.0 + 1e-6))

    @staticmethod
    def checked(eps: float, cell_size: Any = None, region_rows: Any = None, block_rows: Any = None,
                *, names: Mapping[str, str] | None = None) -> StageParams:
        """Validated stage parameters; `names` maps a parameter to how the user spelled it."""
        from ..validate import InputError, validate_count, validate_positive

        n = {"cell_size": "cell_size", "region_rows": "region_rows", "block_rows": "block_rows",
             **(names or {})}
        if cell_size is not None:
            cell_size = validate_positive(cell_size, name=n["cell_size"])
            if cell_size < float(eps):
                raise InputError(f"{n['cell_size']} must be at least eps ({float(eps)!r}), got "
                                 f"{cell_size!r}: an eps-neighbour must lie in a cell next door")
        default = StageParams()
        return StageParams(
            cell_size,
            default.region_rows if region_rows is None else validate_count(region_rows, name=n["region_rows"], minimum=1),
            default.block_rows if block_rows is None else validate_count(block_rows, name=n["block_rows"], minimum=1),
        )

    def as_dict(self, eps: float) -> dict[str, Any]:
        return {"cell_size": self.side(eps), "region_rows": int(self.region_rows),
                "block_rows": int(self.block_rows),
                "part_jumps": None if self.part_jumps is None else int(self.part_jumps)}


def stage_url(run_url: str, stage: str) -> str:
    return f"{run_url.rstrip('/')}{SUFFIX}/{stage}"


def _sibling_url(store: RunStore, stage: str) -> str:
    return f"{store.url.rstrip('/').rsplit('/', 1)[0]}/{stage}"


_OPEN: dict[str, RunStore] = {}
_CACHE: dict[tuple[str, str, str], np.ndarray] = {}


def open_stage(url: str, storage_options: Mapping[str, Any] | None) -> RunStore:
    """A stage store opened once per process (its handles reused across tasks)."""
    store = _OPEN.get(url)
    if store is None:
        store = _OPEN[url] = RunStore.open(url, storage_options=storage_options)
    return store


def sibling(store: RunStore, stage: str) -> RunStore:
    return open_stage(_sibling_url(store, stage), store.io.storage_options)


def _input(store: RunStore, name: str) -> np.ndarray:
    """A whole input array of `store`, read once per process."""
    key = (store.url, store.plan_digest, name)
    arr = _CACHE.get(key)
    if arr is None:
        if len(_CACHE) > 32:
            _CACHE.clear()
        arr = _CACHE[key] = store.read_input(name)
    return arr


# ---------------------------------------------------------------------------- blocks

def _block_range(count: RunStore, i: int) -> tuple[int, int]:
    rows, n = int(count.attrs["block_rows"]), int(count.attrs["n_rows"])
    return i * rows, min(n, (i + 1) * rows)


def _block(count: RunStore, i: int) -> tuple[np.ndarray, int]:
    """Rows of input block `i` (validated floats) and the id of its first row."""
    a, b = _block_range(count, i)
    source = count.params.get("source")
    if source is None:
        x = count.read_input("points", slice(a, b), task=i)
    else:
        from ..lazy import open_points

        # the input's own location and options (the run store's may be another service)
        x = _source(source, None).read(a, b)
    return np.ascontiguousarray(x, dtype=np.float64), a


_SOURCES: dict[str, Any] = {}


def _source(spec: Mapping[str, Any], storage_options: Mapping[str, Any] | None) -> Any:
    import json

    key = json.dumps(dict(spec), sort_keys=True)
    src = _SOURCES.get(key)
    if src is None:
        from ..lazy import open_points

        src = _SOURCES[key] = open_points(spec["path"], key=spec.get("key"),
                                          columns=spec.get("columns"),
                                          index_col=spec.get("index_col"),
                                          storage_options=storage_options)
    return src


# ---------------------------------------------------------------------------- 1. count

def count_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    x, _ = _block(store, i)
    codes = cell_codes(x, float(store.params["cell_size"]))
    u, c = np.unique(codes, return_counts=True)
    return {"codes": u, "counts": c.astype(np.int64)}, {"rows": int(x.shape[0]), "cells": int(u.size)}


def _merge_counts(codes: list[np.ndarray], counts: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Rows per cell of several tables of distinct sorted codes. The first is the fold's
    state, which can hold far more cells than the rest together: the others are merged
    by a sort of their own, then into the first by binary search, so the state is
    copied once and never sorted again."""
    state, state_counts = codes[0], np.asarray(counts[0], np.int64)
    if len(codes) == 1:
        return state, state_counts
    new = np.concatenate(codes[1:])
    order = np.argsort(new, kind="stable")
    new, new_counts = new[order], np.concatenate(counts[1:]).astype(np.int64)[order]
    del order
    if new.size:
        starts = np.flatnonzero(np.r_[True, new[1:] != new[:-1]])
        new, new_counts = new[starts], np.add.reduceat(new_counts, starts)
    at = np.searchsorted(state, new)
    known = at < state.size
    known[known] = state[at[known]] == new[known]
    merged_counts = state_counts.copy()
    merged_counts[at[known]] += new_counts[known]  # distinct positions: new codes are distinct
    fresh = ~known
    return np.insert(state, at[fresh], new[fresh]), np.insert(merged_counts, at[fresh], new_counts[fresh])


class CellCounts:
    """The fold of ``plan-count``: rows per cell, cells in Morton order."""

    def __init__(self, store: RunStore) -> None:
        self.codes = np.zeros(0, np.int64)
        self.counts = np.zeros(0, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.codes, self.counts = np.asarray(state["codes"]), np.asarray(state["counts"])

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        self.codes, self.counts = _merge_counts([self.codes, *(o["codes"] for o in outputs)],
                                                [self.counts, *(o["counts"] for o in outputs)])

    def state(self) -> dict[str, np.ndarray]:
        return {"codes": self.codes, "counts": self.counts}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        return self.state(), {"cells": int(self.codes.size), "rows": int(self.counts.sum())}


def read_arrays(store: RunStore) -> dict[str, np.ndarray] | None:
    """The result arrays of a complete stage, None before."""
    got = store.read_result()
    return None if got is None else got[0]


# ---------------------------------------------------------------------------- 2. regions

@dataclass(frozen=True)
class Regions:
    """The driver's summary between counting and scattering: per cell and per region."""

    codes: np.ndarray  # Morton code of each cell, sorted
    cell_start: np.ndarray  # global row id of each cell's first row; [n_cells + 1]
    region_cells: np.ndarray  # first cell of each region; [n_regions + 1]
    cell_region: np.ndarray  # region of each cell
    halo_offsets: np.ndarray  # CSR: the other regions next to each cell
    halo_regions: np.ndarray

    @property
    def n_regions(self) -> int:
        return int(self.region_cells.shape[0] - 1)

    @property
    def region_rows(self) -> np.ndarray:
        """Global row range of each region: [n_regions + 1]."""
        return self.cell_start[self.region_cells]


def make_regions(codes: np.ndarray, counts: np.ndarray, dim: int, region_rows: int) -> Regions:
    cell_start = np.zeros(codes.size + 1, dtype=np.int64)
    np.cumsum(counts, out=cell_start[1:])
    region_cells = cut_regions(counts, int(region_rows))
    cell_region = np.repeat(np.arange(region_cells.size - 1, dtype=np.int64), np.diff(region_cells))
    offsets, regions = halo_regions(codes, cell_region, grid_dims(dim))
    return Regions(codes, cell_start, region_cells, cell_region, offsets, regions)


# ---------------------------------------------------------------------------- 3. scatter

def scatter_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    count = sibling(store, "count")
    x, first = _block(count, i)
    n_regions = int(store.attrs["n_regions"])
    codes_all = _input(store, "codes")
    cell_region = _input(store, "cell_region")
    ho, hr = _input(store, "halo_offsets"), _input(store, "halo_regions")
    codes = cell_codes(x, float(store.params["cell_size"]))
    ci = np.searchsorted(codes_all, codes)
    if ci.size and (ci.max() >= codes_all.size or not np.array_equal(codes_all[ci], codes)):
        raise ValueError(f"block {i}: a row's cell is not in the cell table (the input changed "
                         "after it was counted?)")
    n = x.shape[0]
    n_halo = ho[ci + 1] - ho[ci]
    rep = np.repeat(np.arange(n, dtype=np.int64), n_halo)
    within = np.arange(rep.size, dtype=np.int64) - np.repeat(np.cumsum(n_halo) - n_halo, n_halo)
    rows = np.concatenate([np.arange(n, dtype=np.int64), rep])
    region = np.concatenate([cell_region[ci], hr[np.repeat(ho[ci], n_halo) + within]])
    flag = np.concatenate([np.zeros(n, np.int64), np.ones(rep.size, np.int64)])
    order = np.lexsort((rows, ci[rows], flag, region))
    rows, slot = rows[order], (region * 2 + flag)[order]
    bounds = np.searchsorted(slot, np.arange(2 * n_regions + 1, dtype=np.int64)).astype(np.int64)
    return ({"coords": x[rows], "ids": rows + first, "cells": ci[rows], "bounds": bounds},
            {"rows": int(n), "copies": int(rows.size)})


class Nothing:
    """The fold of a stage whose outputs are read by the next stage, not by the driver:
    it verifies the small output it is given and keeps a count."""

    def __init__(self, store: RunStore) -> None:
        self.seen = np.zeros(1, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.seen = np.asarray(state["seen"], np.int64)

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        self.seen = self.seen + len(tasks)

    def state(self) -> dict[str, np.ndarray]:
        return {"seen": self.seen}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        return self.state(), {"tasks": int(self.seen[0])}


# ---------------------------------------------------------------------------- 4. region

def _global_ids(cells: np.ndarray, ids: np.ndarray, cell_start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort rows of whole cells into the global order; their order and global ids."""
    order = np.lexsort((ids, cells))
    c = cells[order]
    rank = np.arange(c.size, dtype=np.int64) - np.searchsorted(c, c)
    return order, cell_start[c] + rank


def _gather(store: RunStore, r: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Region `r`'s rows and its halo rows in global order: (coords, global ids, cells,
    index of the first own row, number of own rows)."""
    scatter = sibling(store, "scatter")
    own, halo = [], []
    for b in range(scatter.n_tasks):
        bounds = scatter.commits.read(b, ["bounds"])["bounds"]
        o0, h0, end = (int(v) for v in bounds[2 * r: 2 * r + 3])
        if end == o0:
            continue
        part = {name: scatter.commits.read_rows(b, name, o0, end) for name in ("coords", "ids", "cells")}
        own.append({k: v[: h0 - o0] for k, v in part.items()})
        halo.append({k: v[h0 - o0:] for k, v in part.items()})
    cell_start = _input(store, "cell_start")
    dim = int(store.attrs["dim"])
    out = []
    for parts in (own, halo):
        if parts:
            coords = np.concatenate([p["coords"] for p in parts])
            ids = np.concatenate([p["ids"] for p in parts])
            cells = np.concatenate([p["cells"] for p in parts])
        else:
            coords, ids, cells = np.zeros((0, dim)), np.zeros(0, np.int64), np.zeros(0, np.int64)
        order, gid = _global_ids(cells, ids, cell_start)
        out.append((coords[order], gid, cells[order]))
    (oc, og, ocell), (hc, hg, hcell) = out
    rows = _input(store, "region_rows")
    if not np.array_equal(og, np.arange(rows[r], rows[r + 1])):
        raise ValueError(f"region {r}: its rows do not cover its global row range "
                         f"{int(rows[r])}:{int(rows[r + 1])} (a block output is incomplete)")
    # all rows in global order: the own rows, a contiguous range of global ids, are then
    # one slice, and a row's index orders rows as the global ids do
    gids = np.concatenate([og, hg])
    order = np.argsort(gids, kind="stable")
    own_start = int(np.searchsorted(gids[order], rows[r]))
    return (np.concatenate([oc, hc])[order], gids[order], np.concatenate([ocell, hcell])[order],
            own_start, int(og.size))


def _pairs(coords: np.ndarray, eps: float, metric: str, lengths: bool = False) -> tuple[np.ndarray, ...]:
    """Every pair of rows within eps in `metric` (by the kernel's own edge join), and
    their lengths."""
    from ..kernel import _halo_edges
    from ..metric import lengths as key_lengths

    lo, hi, key, m = _halo_edges(np.ascontiguousarray(coords), eps, metric)
    out = (lo[:m].astype(np.int64), hi[:m].astype(np.int64))
    return (*out, key_lengths(key[:m], metric)) if lengths else out


def _metric(store: RunStore) -> str:
    return str(store.params.get("metric") or "euclidean")


def region_task(store: RunStore, r: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    from ..planner import _row_cost

    from .parts import LENGTH_BINS

    eps = float(store.params["eps"])
    coords, gids, cells, s0, n_own = _gather(store, r)
    own = slice(s0, s0 + n_own)
    lo, hi, length = _pairs(coords, eps, _metric(store), lengths=True)
    degree = (np.bincount(lo, minlength=gids.size) + np.bincount(hi, minlength=gids.size)).astype(np.int64)
    # each edge once, in the region owning its lower-numbered end: where the curve's
    # jumps lie, to cut its reduction into parts of about equal size
    low = np.where(gids[lo] < gids[hi], lo, hi)
    mine = (low >= s0) & (low < s0 + n_own)
    hist = np.histogram(length[mine], bins=LENGTH_BINS, range=(0.0, eps))[0].astype(np.int64)
    cost = float(_row_cost(degree[own], store.params["max_dim"]).sum())
    return ({"coords": coords, "gids": gids, "cells": cells, "degree": degree, "hist": hist,
             "summary": np.array([float(n_own), cost, float(degree[own].sum()), float(s0)])},
            {"rows": n_own, "halo": int(gids.size - n_own), "edges": int(lo.size)})


class RegionCosts:
    """The fold of ``plan-region``: rows and total cost of each region."""

    def __init__(self, store: RunStore) -> None:
        from .parts import LENGTH_BINS

        self.summary = np.zeros((store.n_tasks, 4), np.float64)
        self.hist = np.zeros(LENGTH_BINS, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.summary = np.array(state["summary"], np.float64)
        self.hist = np.array(state["hist"], np.int64)

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, o in zip(tasks, outputs):
            self.summary[t] = o["summary"]
            self.hist = self.hist + o["hist"]

    def state(self) -> dict[str, np.ndarray]:
        return {"summary": self.summary, "hist": self.hist}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        return self.state(), {"rows": int(self.summary[:, 0].sum()), "cost": float(self.summary[:, 1].sum()),
                              "edges": int(self.summary[:, 2].sum()) // 2}


# ---------------------------------------------------------------------------- 5. halo

def halo_task(store: RunStore, r: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    from ..planner import _cut_tasks, _row_cost, _task_memory

    region = sibling(store, "region")
    got = region.commits.read(r)
    coords, gids, cells, degree = got["coords"], got["gids"], got["cells"], got["degree"]
    n_own, s0 = int(got["summary"][0]), int(got["summary"][3])
    own = slice(s0, s0 + n_own)
    eps, max_dim = float(store.params["eps"]), store.params["max_dim"]
    dim = int(store.attrs["dim"])
    n = gids.size
    row_cost = _row_cost(degree[own], max_dim)
    cell_bounds = np.concatenate([[0], np.flatnonzero(np.diff(cells[own])) + 1, [n_own]]).astype(np.int64)
    if n_own == 0:
        starts = np.zeros(0, np.int64)
    else:
        starts = _cut_tasks(cell_bounds, row_cost, float(store.attrs["target"]),
                            int(store.attrs["max_task_rows"]))
    stops = np.append(starts[1:], n_own).astype(np.int64)
    n_tasks = starts.size
    lo, hi = _pairs(coords, eps, _metric(store))
    task_of = np.full(n, -1, np.int64)
    task_of[own] = np.repeat(np.arange(n_tasks, dtype=np.int64), stops - starts)
    # the halo of a task: its rows and both ends of every edge with an end among them,
    # as keys task * n + row: sorted, they list each task's rows in global order
    t = np.concatenate([task_of[own], task_of[lo], task_of[hi]])
    row = np.concatenate([np.arange(s0, s0 + n_own, dtype=np.int64), hi, lo])
    key = (t * n + row)[t >= 0]
    key.sort()
    if key.size:
        key = key[np.concatenate(([True], key[1:] != key[:-1]))]
    t, row = key // n, key % n
    offsets = np.searchsorted(t, np.arange(n_tasks + 1, dtype=np.int64)).astype(np.int64)
    task_ids = np.arange(n_tasks, dtype=np.int64)
    owned = np.stack([np.searchsorted(key, task_ids * n + s0 + starts) - offsets[:-1],
                      np.searchsorted(key, task_ids * n + s0 + stops) - offsets[:-1]], axis=1)
    g0 = gids[s0 + starts] if n_tasks else starts
    g1 = gids[s0 + stops - 1] + 1 if n_tasks else stops
    # an edge belongs to the task owning its lower-numbered end (row order is id order)
    low = np.minimum(lo, hi)
    owner = task_of[low]
    owned_edges = np.bincount(owner[owner >= 0], minlength=n_tasks)
    halo_edges = np.add.reduceat(degree[row], offsets[:-1]) if row.size else np.zeros(n_tasks, np.int64)
    max_deg = np.maximum.reduceat(degree[own], starts) if n_tasks else np.zeros(0, np.int64)
    memory = _task_memory(np.diff(offsets), dim, halo_edges, owned_edges, max_deg).astype(np.int64)
    cost = np.add.reduceat(row_cost, starts) if n_tasks else np.zeros(0)
    return ({"coords": np.ascontiguousarray(coords[row]), "offsets": offsets, "owned": owned,
             "rows": np.stack([g0, g1], axis=1).astype(np.int64).reshape(-1, 2),
             "cost": cost.astype(np.float64), "memory": memory},
            {"tasks": int(n_tasks), "halo_rows": int(row.size)})


class TaskTable:
    """The fold of ``plan-halo``: every region's tasks, in region order."""

    _NAMES = ("offsets", "owned", "rows", "cost", "memory")

    def __init__(self, store: RunStore) -> None:
        self.parts: dict[int, dict[str, np.ndarray]] = {}

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        region = np.asarray(state["region"])
        self.parts = {}
        for r in np.unique(region):
            sel = region == r
            self.parts[int(r)] = {
                "offsets": np.asarray(state["offsets"])[sel],
                "owned": np.asarray(state["owned"])[sel], "rows": np.asarray(state["rows"])[sel],
                "cost": np.asarray(state["cost"])[sel], "memory": np.asarray(state["memory"])[sel]}

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, o in zip(tasks, outputs):
            off = np.asarray(o["offsets"], np.int64)
            self.parts[int(t)] = {"offsets": np.stack([off[:-1], off[1:]], axis=1),
                                  "owned": np.asarray(o["owned"], np.int64).reshape(-1, 2),
                                  "rows": np.asarray(o["rows"], np.int64).reshape(-1, 2),
                                  "cost": np.asarray(o["cost"], np.float64),
                                  "memory": np.asarray(o["memory"], np.int64)}

    def state(self) -> dict[str, np.ndarray]:
        keys = sorted(self.parts)
        region = np.concatenate([np.full(self.parts[k]["cost"].size, k, np.int64) for k in keys]) \
            if keys else np.zeros(0, np.int64)

        def cat(name: str, shape: tuple[int, ...], dtype: Any) -> np.ndarray:
            return np.concatenate([self.parts[k][name] for k in keys]) if keys else np.zeros(shape, dtype)

        return {"region": region, "offsets": cat("offsets", (0, 2), np.int64),
                "owned": cat("owned", (0, 2), np.int64), "rows": cat("rows", (0, 2), np.int64),
                "cost": cat("cost", (0,), np.float64), "memory": cat("memory", (0,), np.int64)}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        s = self.state()
        return s, {"tasks": int(s["cost"].size)}
