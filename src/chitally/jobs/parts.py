"""Curves larger than the driver: the run's jump tables reduced in parts of the scale.

Two kinds reduce their curve in parts: a cloud planned on the cluster with more edges
than one part holds jumps (``cloud-parts``) and a field that may have more distinct
values than that (``field-parts``, `chitally.jobs.field`). Each task commits its jump table with the
offsets where it crosses the part boundaries fixed at planning, the run's input
``part_bounds`` (quantiles of the edge lengths the region stage counted; of a sample of
a field's values), and the input ``part_cost`` estimates each part's jumps (edges of a
cloud; named ``part_edges`` in cloud stores made before fields had parts). The driver folds the offsets only (a field's fold also
keeps its values' range: the curve's domain). The ``curve-merge`` kind then merges part
p of every task's table on a worker (a slice of rows each) and commits the part; its fold
keeps each part's total. The curve is the parts in order, each offset by the totals
before it: `PartedCurve`, read part by part, never whole unless asked.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..curve import Curve, merge_jumps, write_samples
from ..store import JobSpec, RunStore

#: Jumps a part holds at most (about 256 MB as values and jumps), the unit of merging.
PART_JUMPS = 1 << 24
#: Bins of the edge-length histogram the region stage keeps to place part boundaries.
LENGTH_BINS = 4096


def part_bounds(hist: np.ndarray, eps: float, n_parts: int) -> np.ndarray:
    """Interior boundaries b_1 < ... < b_{P-1} in (0, eps) splitting the edges counted in
    `hist` (LENGTH_BINS bins over [0, eps]) into about equal parts; part p holds the
    scales in (b_p, b_{p+1}]."""
    hist = np.asarray(hist, np.float64)
    cum = np.cumsum(hist)
    total = cum[-1] if cum.size else 0.0
    if n_parts < 2 or total <= 0:
        return np.zeros(0, np.float64)
    idx = np.searchsorted(cum, total * np.arange(1, n_parts) / n_parts)
    edges = (np.minimum(idx, hist.size - 1) + 1) * (float(eps) / hist.size)
    return np.unique(edges[edges < eps])


def offsets_at(values: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Where a sorted jump table crosses each part boundary: [P + 1] offsets."""
    return np.concatenate(([0], np.searchsorted(values, bounds, side="right"), [values.size])).astype(np.int64)


# ---------------------------------------------------------------------------- merging

def merge_url(run_url: str) -> str:
    from .stages import stage_url

    return stage_url(run_url, "merge")


def _run_url(store: RunStore) -> str:
    from .stages import SUFFIX

    base = store.url.rstrip("/").rsplit("/", 1)[0]
    return base[: -len(SUFFIX)] if base.endswith(SUFFIX) else base


_OFFSETS: dict[tuple[str, str], np.ndarray] = {}


def _task_offsets(run: RunStore) -> np.ndarray:
    """Every task's part offsets, [n_tasks, P + 1], read once per process."""
    key = (run.url, run.plan_digest)
    got = _OFFSETS.get(key)
    if got is None:
        _OFFSETS.clear()
        got = _OFFSETS[key] = np.stack([run.commits.read(t, ["parts"])["parts"] for t in range(run.n_tasks)])
    return got


def merge_task(store: RunStore, p: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    from .stages import open_stage

    run = open_stage(_run_url(store), store.io.storage_options)
    offsets = _task_offsets(run)
    values, jumps = [], []
    for t in range(run.n_tasks):
        a, b = int(offsets[t, p]), int(offsets[t, p + 1])
        if b > a:
            values.append(run.commits.read_rows(t, "values", a, b))
            jumps.append(run.commits.read_rows(t, "jumps", a, b))
    v, j = merge_jumps(values, jumps) if values else (np.zeros(0), np.zeros(0, np.int64))
    return ({"values": v, "jumps": j, "total": np.array([int(j.sum())], np.int64)},
            {"jumps": int(v.size), "tables": len(values)})


class PartTotals:
    """The fold of ``curve-merge``: each part's total jump (the curve's offset after it)."""

    def __init__(self, store: RunStore) -> None:
        self.totals = np.zeros(store.n_tasks, np.int64)
        self.sizes = np.zeros(store.n_tasks, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.totals = np.array(state["totals"], np.int64)
        self.sizes = np.array(state["sizes"], np.int64)

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for t, o in zip(tasks, outputs):
            self.totals[t] = int(o["total"][0])

    def state(self) -> dict[str, np.ndarray]:
        return {"totals": self.totals, "sizes": self.sizes}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        return {"totals": self.totals}, {"parts": int(self.totals.size)}


def read_totals(store: RunStore) -> dict[str, np.ndarray] | None:
    got = store.read_result()
    return None if got is None else got[0]


def merge_store(run: RunStore) -> RunStore:
    """The ``curve-merge`` store of a run reduced in parts (created on first use)."""
    from ..runs import open_or_create
    from . import CURVE_MERGE

    bounds = run.read_input("part_bounds")
    n_parts = int(bounds.size) + 1
    params = {"run": run.plan_digest}
    cost = np.asarray(run.read_input("part_cost" if "part_cost" in run.input_names else "part_edges"),
                      np.float64)
    memory = (cost * 48).astype(np.int64)  # the tables read, merged and written

    def spec() -> JobSpec:
        return JobSpec(kind=CURVE_MERGE.name, params=params, fingerprint=run.fingerprint,
                       outputs=CURVE_MERGE.outputs, cost=cost, memory=memory,
                       attrs={"n_parts": n_parts})

    return open_or_create(merge_url(run.url), CURVE_MERGE.name, params, run.fingerprint, spec,
                          storage_options=run.io.storage_options)


def curve_domain(run: RunStore) -> dict[str, Any] | None:
    """The curve's ``start``, ``eps``, ``max_dim`` and ``n_points``: a cloud's from its
    attrs, a field's from its fold's result (None before it is written)."""
    if run.kind == "field-parts":
        got = run.read_result()
        if got is None:
            return None
        rec = got[1]
        return {"start": float(rec["start"]), "eps": float(rec["eps"]), "max_dim": None,
                "n_points": int(rec["n_points"])}
    a = run.attrs
    return {"start": float(a.get("start", 0.0)), "eps": float(a["eps"]), "max_dim": run.params["max_dim"],
            "n_points": int(a["n_points"])}


def read_parted(run: RunStore) -> Any:
    """The curve of a complete run reduced in parts (None until its parts are merged): a
    `Curve` when it is small, else a `PartedCurve` read part by part."""
    from ..store import NotAStore

    domain = curve_domain(run)
    if domain is None:
        return None
    if domain["n_points"] == 0:  # nothing present (a field masked out): no parts to merge
        return Curve.zero(eps=domain["eps"], max_dim=domain["max_dim"], start=domain["start"])
    try:
        merge = RunStore.open(merge_url(run.url), storage_options=run.io.storage_options)
    except NotAStore:
        return None
    got = merge.read_result()
    if got is None:
        return None
    curve = PartedCurve(merge, run, np.asarray(got[0]["totals"], np.int64), domain)
    limit = int(run.params.get("part_jumps") or PART_JUMPS)
    return curve.to_curve() if curve.n_stored <= limit else curve


class PartedCurve:
    """An exact curve stored in parts of its scale; the same answers as `Curve` for
    `at`, `sample`, `final`, `n_jumps`, `digest`, `save` and `save_samples`, reading one
    part at a time. `to_curve()` loads it whole."""

    def __init__(self, merge: RunStore, run: RunStore, totals: np.ndarray,
                 domain: Mapping[str, Any] | None = None) -> None:
        d = domain if domain is not None else curve_domain(run)
        self.merge = merge
        self.eps = float(d["eps"]) + 0.0  # -0.0 -> 0.0 as in `Curve` (a negated field's top)
        self.start = float(d["start"]) + 0.0
        self.max_dim = d["max_dim"]
        self.n_points = int(d["n_points"])
        self.bounds = np.asarray(run.read_input("part_bounds"), np.float64)
        self.totals = totals
        self.offsets = np.concatenate(([0], np.cumsum(totals))).astype(np.int64)
        self.sizes = np.array([int(merge.commits.record(p)["outputs"]["values"]["shape"][0])
                               for p in range(merge.n_tasks)], np.int64)

    @property
    def domain(self) -> tuple[float, float]:
        return (self.start, self.eps)

    @property
    def n_stored(self) -> int:
        return int(self.sizes.sum())

    def part(self, p: int) -> tuple[np.ndarray, np.ndarray]:
        """Part p's scales and the curve's values there (chi)."""
        got = self.merge.commits.read(p, ["values", "jumps"])
        return got["values"], self.offsets[p] + np.cumsum(got["jumps"], dtype=np.int64)

    def _parts(self):
        for p in range(self.merge.n_tasks):
            yield self.part(p)

    @property
    def final(self) -> int:
        return int(self.offsets[-1])

    @property
    def _prepend(self) -> bool:
        """Whether the curve starts with a step of 0 at `start` (no jump there)."""
        for values, _ in self._parts():
            if values.size:
                return bool(values[0] != self.start)
        return True

    @property
    def n_jumps(self) -> int:
        return self.n_stored

    def at(self, t: Any) -> Any:
        arr = np.asarray(t, dtype=np.float64)
        out = self.sample(arr.reshape(-1)).reshape(arr.shape)
        return int(out) if arr.ndim == 0 else out

    def sample(self, grid: Any) -> np.ndarray:
        """The curve at each scale of `grid` (in its domain), one part at a time."""
        g = np.asarray(grid, dtype=np.float64)
        if g.ndim != 1:
            raise ValueError(f"grid must be one-dimensional, got shape {g.shape}")
        if g.size and (np.isnan(g).any() or g.min() < self.start or g.max() > self.eps):
            bad = g[np.isnan(g) | (g < self.start) | (g > self.eps)][0]
            raise ValueError(f"scale {float(bad)!r} lies outside the curve's domain "
                             f"[{self.start:g}, {self.eps:g}]")
        which = np.searchsorted(self.bounds, g, side="left")  # part p holds (b_p, b_{p+1}]
        out = np.empty(g.size, np.int64)
        for p in np.unique(which):
            sel = which == p
            values, chi = self.part(int(p))
            idx = np.searchsorted(values, g[sel], side="right") - 1
            before = self.offsets[p]
            out[sel] = np.where(idx >= 0, chi[np.maximum(idx, 0)] if chi.size else before, before)
        return out

    def to_curve(self) -> Curve:
        """The whole curve in memory."""
        values, jumps = [], []
        for p in range(self.merge.n_tasks):
            got = self.merge.commits.read(p, ["values", "jumps"])
            values.append(got["values"])
            jumps.append(got["jumps"])
        return Curve.from_jumps(np.concatenate(values), np.concatenate(jumps), eps=self.eps,
                                max_dim=self.max_dim, n_points=self.n_points, start=self.start)

    def digest(self) -> str:
        """The digest `Curve.digest` gives the same curve, computed part by part."""
        import hashlib

        from ..curve import CURVE_FORMAT, CURVE_VERSION

        prepend = self._prepend
        fields: dict[str, Any] = {"format": CURVE_FORMAT, "version": CURVE_VERSION,
                                  "eps": float(self.eps).hex(), "max_dim": self.max_dim,
                                  "n_points": self.n_points, "length": self.n_stored + int(prepend)}
        if self.start != 0.0:
            fields["start"] = float(self.start).hex()
        header = json.dumps(fields, sort_keys=True, separators=(",", ":")).encode("ascii")
        h = hashlib.sha256()
        h.update(len(header).to_bytes(8, "little"))
        h.update(header)
        if prepend:
            h.update(np.array([self.start], "<f8").tobytes())
        for values, _ in self._parts():
            h.update((values + 0.0).astype("<f8").tobytes())
        if prepend:
            h.update(np.zeros(1, "<i8").tobytes())
        for _, chi in self._parts():
            h.update(chi.astype("<i8").tobytes())
        return h.hexdigest()

    def save(self, path: Any, format: str | None = None) -> Any:
        """Write the exact steps; csv streams part by part, npz and json load it whole."""
        from ..curve import _resolve_format

        fmt = _resolve_format(path, format)
        if fmt != "csv":
            return self.to_curve().save(path, format=fmt)
        import os
        import tempfile
        from pathlib import Path

        from ..curve import _CSV_HEADER, _CSV_MAGIC, CURVE_VERSION, _floats_text

        meta = {"version": CURVE_VERSION, "eps": self.eps, "max_dim": self.max_dim, "n_points": self.n_points}
        if self.start != 0.0:
            meta["start"] = self.start
        target = Path(path)
        fd, tmp = tempfile.mkstemp(dir=target.parent or ".", prefix=f".{target.name}.")
        with os.fdopen(fd, "w") as f:
            f.write(_CSV_MAGIC + json.dumps(meta, allow_nan=False) + "\n" + _CSV_HEADER + "\n")
            if self._prepend:
                f.write(f"{_floats_text(np.array([self.start]))[0]},0\n")
            for values, chi in self._parts():
                f.writelines(f"{s},{c}\n" for s, c in zip(_floats_text(values + 0.0), chi.tolist()))
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, target)
        return target

    def save_samples(self, path: Any, grid: Any, format: str | None = None) -> Any:
        g = np.asarray(grid, dtype=np.float64)
        return write_samples(path, g, self.sample(g), format=format)

    def __eq__(self, other: object) -> bool:
        """Equal to a `Curve` or `PartedCurve` of the same steps and metadata (by digest,
        which covers all of them)."""
        if isinstance(other, (Curve, PartedCurve)):
            return self.digest() == other.digest()
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return (f"PartedCurve({self.merge.n_tasks} parts, {self.n_stored} steps, domain "
                f"[{self.start:g}, {self.eps:g}], final {self.final})")
