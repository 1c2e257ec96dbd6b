"""The run store: one Zarr v3 group per job, shared by the driver and every worker.

`RunStore` composes the parts (store I/O, commit log, checkpoints, lease) with the
store's root record, its input arrays and its final result. The layout is the same for
every job kind; a kind only names its inputs, its per-task outputs and its result::

    zarr.json                  root group; attribute "chitally": format, kind, version,
                               params, fingerprint, plan_digest, n_tasks, outputs, attrs,
                               inputs (name -> shape, dtype, sha256), created
    inputs/<name>              arrays written once at creation (chunk checksums)
    tasks/cost, tasks/memory   each task's estimated cost and peak memory
    outputs/task-000123/<name> written by task 123 only
    commits/task-000123.json   commit record, create-only
    failures/task-000123.json  failure record, removed when the task commits
    checkpoints/gen-000007/    fold state + task_ids + record.json; checkpoints/latest.json
    result/                    final arrays + record.json
    quarantine/<stamp>/...     copies of set-aside task outputs
    lease/                     lease generations, heartbeats, releases
    created.json               written last by `create`: the store is complete
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import lease as lease_mod
from .checkpoints import Checkpoints
from .commits import CommitLog
from .errors import (
    CorruptTask,
    IncompleteStore,
    InputsDamaged,
    LeaseHeld,
    NotAStore,
    ResultDamaged,
    StoreError,
    StoreExists,
    StoreMismatch,
)
from .io import PARTIAL, StoreIO, arrays_digest, dumps, iso, jsonable, little_endian, local_path

logger = logging.getLogger("chitally.store")

#: Version of the layout above. Format 1 (chitally 0.1) is refused with its version named.
FORMAT = 2

ROOT_ATTR = "chitally"
MARKER = "created.json"
INPUTS = "inputs"
TASKS = "tasks"
RESULT = "result"

# 1-D arrays are cut into 8 MB chunks; row arrays into blocks of rows.
_VECTOR_CHUNK = 2**20
_ROW_CHUNK_BYTES = 8 << 20


def chitally_version() -> str:
    # Not `from chitally import __version__`: the package may import this module while
    # its own __init__ is still running.
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("chitally")
    except PackageNotFoundError:
        return "0.0.0"


def fingerprint(points: Any) -> dict[str, Any]:
    """The identity of an input array: shape, dtype and a content hash.

    The hash is the sha256 of the C-order little-endian float64 bytes, computed block by
    block so that a memory-mapped or lazily sliced input is never held in memory at once.

    Examples
    --------
    >>> import numpy as np
    >>> fp = fingerprint(np.zeros((3, 2)))
    >>> fp["shape"], fp["dtype"], len(fp["sha256"])
    ([3, 2], 'float64', 64)
    """
    shape = [int(s) for s in points.shape]
    h = hashlib.sha256()
    if len(shape) == 0:
        h.update(np.ascontiguousarray(points, dtype="<f8").tobytes())
    else:
        row_bytes = 8 * int(np.prod(shape[1:], dtype=np.int64))
        step = max(1, (64 << 20) // max(row_bytes, 1))
        for start in range(0, shape[0], step):
            block = np.ascontiguousarray(np.asarray(points[start:start + step]), dtype="<f8")
            h.update(memoryview(block).cast("B"))
    return {"shape": shape, "dtype": str(np.dtype(points.dtype)), "sha256": h.hexdigest()}


def _flatten(d: Mapping[str, Any], prefix: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in d.items():
        name = f"{prefix}.{k}"
        if isinstance(v, Mapping) and v:
            out.update(_flatten(v, name))
        else:
            out[name] = v
    return out


@dataclass(frozen=True)
class JobSpec:
    """Everything `RunStore.create` writes: frozen data made by a job kind's planner.

    Attributes
    ----------
    kind : str
        The job kind's name (see `chitally.jobs`).
    params : mapping
        The parameters the store is made for; any difference is another run.
    fingerprint : mapping
        The identity of the input (shape, dtype, content hash).
    outputs : tuple of (name, dtype)
        The arrays every task commits.
    cost, memory : arrays of shape (n_tasks,)
        Each task's estimated cost (progress weights, ordering) and peak memory in bytes.
    inputs : mapping of name -> array
        Arrays written once under ``inputs/`` (2-D ones chunked by rows).
    attrs : mapping
        The kind's own JSON (e.g. the plan's scalars), covered by the plan digest.
    """

    kind: str
    params: Mapping[str, Any]
    fingerprint: Mapping[str, Any]
    outputs: tuple[tuple[str, str], ...]
    cost: np.ndarray
    memory: np.ndarray
    inputs: Mapping[str, Any] = field(default_factory=dict)
    attrs: Mapping[str, Any] = field(default_factory=dict)

    @property
    def n_tasks(self) -> int:
        return int(np.asarray(self.cost).shape[0])

    def input_digests(self) -> dict[str, str]:
        return {name: arrays_digest({name: np.asarray(a)}) for name, a in self.inputs.items()}

    def digest(self, input_digests: Mapping[str, str] | None = None) -> str:
        """The plan digest: kind, attrs, outputs, costs, memory and every input."""
        h = hashlib.sha256()
        h.update(dumps({"kind": self.kind, "attrs": dict(self.attrs),
                        "outputs": [list(o) for o in self.outputs],
                        "inputs": dict(sorted((input_digests or self.input_digests()).items()))}))
        h.update(arrays_digest({"cost": np.asarray(self.cost, np.float64),
                                "memory": np.asarray(self.memory, np.int64)}).encode())
        return h.hexdigest()


def _reattach(io: StoreIO, meta: dict[str, Any]) -> RunStore:
    return RunStore(io, meta)


class RunStore:
    """One job's run store, on a local path or any fsspec URL.

    Make one with `RunStore.create`, attach with `RunStore.open`. Pickles as its URL,
    storage options and root record (no I/O when unpickled), so it travels to workers.
    """

    def __init__(self, io: StoreIO, meta: dict[str, Any]) -> None:
        # Private: go through create() or open(), which validate the store first.
        self.io = io
        self._meta = meta
        self._lease: lease_mod.Lease | None = None
        self.commits = CommitLog(io, int(meta.get("n_tasks", 0)),
                                 [tuple(o) for o in meta.get("outputs", [])], fence=self.fence)
        self.checkpoints = Checkpoints(io, fence=self.fence)

    def __reduce__(self) -> tuple[Any, ...]:
        return (_reattach, (self.io, self._meta))

    def __repr__(self) -> str:
        return f"RunStore({self.url!r}, kind={self.kind!r}, n_tasks={self.n_tasks})"

    # ------------------------------------------------------------------ the root record

    @property
    def url(self) -> str:
        return self.io.url

    @property
    def kind(self) -> str:
        return str(self._meta["kind"])

    @property
    def params(self) -> dict[str, Any]:
        return dict(self._meta["params"])

    @property
    def fingerprint(self) -> dict[str, Any]:
        return dict(self._meta["fingerprint"])

    @property
    def attrs(self) -> dict[str, Any]:
        return dict(self._meta.get("attrs", {}))

    @property
    def plan_digest(self) -> str:
        return str(self._meta["plan_digest"])

    @property
    def n_tasks(self) -> int:
        return int(self._meta["n_tasks"])

    @property
    def created(self) -> str:
        return str(self._meta["created"])

    @property
    def version(self) -> str:
        return str(self._meta["version"])

    @property
    def input_names(self) -> list[str]:
        return list(self._meta.get("inputs", {}))

    # ------------------------------------------------------------------ create and open

    @classmethod
    def create(cls, url: str | os.PathLike[str], spec: JobSpec, *,
               storage_options: Mapping[str, Any] | None = None,
               discard: bool = False) -> RunStore:
        """Create a run store and write the inputs of every task into it.

        Writes the root record, the inputs and the task table, then the completion marker
        last. A location holding a half-created store with no committed task is reused;
        one with committed tasks is refused unless `discard` (see `prepare_location`).
        """
        io = StoreIO(os.fspath(url), storage_options)
        n = spec.n_tasks
        if np.asarray(spec.memory).shape != (n,):
            raise ValueError(f"memory has shape {np.asarray(spec.memory).shape}, cost has ({n},)")
        digests = spec.input_digests()
        meta: dict[str, Any] = {
            "format": FORMAT,
            "kind": spec.kind,
            "version": chitally_version(),
            "params": jsonable(dict(spec.params), "params"),
            "fingerprint": jsonable(dict(spec.fingerprint), "fingerprint"),
            "plan_digest": spec.digest(digests),
            "created": iso(),
            "n_tasks": n,
            "outputs": [list(o) for o in spec.outputs],
            "attrs": jsonable(dict(spec.attrs), "attrs"),
            "inputs": {name: {"shape": list(np.shape(a)), "dtype": little_endian(np.asarray(a[:0])).dtype.str,
                              "sha256": digests[name]} for name, a in spec.inputs.items()},
        }
        self = cls(io, meta)
        self.prepare_location(discard=discard)
        io.create_group("", {ROOT_ATTR: meta})
        for name in (INPUTS, TASKS, "outputs", "checkpoints", RESULT):
            io.create_group(name)
        self._write_vector(f"{TASKS}/cost", np.asarray(spec.cost, "<f8"))
        self._write_vector(f"{TASKS}/memory", np.asarray(spec.memory, "<i8"))
        for name, data in spec.inputs.items():
            self._write_input(name, data)
        marker = dumps({"created": meta["created"], "plan_digest": meta["plan_digest"]})
        if not io.create_only(MARKER, marker, what="write completion marker"):
            raise StoreExists(f"{url}: another process created a run store here at the same time")
        logger.info("created run store %s: kind %s, %d tasks", url, spec.kind, n)
        return self

    def _write_vector(self, path: str, data: np.ndarray) -> None:
        self.io.write_array(path, data, what="write array",
                            chunks=(max(1, min(data.size, _VECTOR_CHUNK)),))

    def _write_input(self, name: str, data: Any) -> None:
        path = f"{INPUTS}/{name}"
        shape = tuple(int(s) for s in np.shape(data))
        if len(shape) != 2:
            self._write_vector(path, little_endian(np.asarray(data)).reshape(-1)) if len(shape) == 1 \
                else self.io.write_array(path, np.asarray(data), what="write array")
            return
        dtype = little_endian(np.asarray(data[:0])).dtype
        rows = max(1, min(shape[0], _ROW_CHUNK_BYTES // max(1, dtype.itemsize * shape[1])))
        arr = self.io.create_chunked(path, shape, dtype.str, (rows, shape[1]), what=f"create {name}")
        for start in range(0, shape[0], rows):
            block = little_endian(np.asarray(data[start:start + rows], dtype=dtype))

            def put(block: np.ndarray = block, start: int = start) -> None:
                arr[start:start + block.shape[0]] = block

            self.io.op(f"write {name} rows {start}:{start + block.shape[0]}", path, put)

    def prepare_location(self, *, discard: bool = False) -> None:
        """Refuse a complete store, foreign data, a live creator, or a half-created store
        holding committed work (unless `discard`); clear a half-created store otherwise."""
        io = self.io
        path = local_path(io.url)
        if path is not None and os.path.exists(path) and not os.path.isdir(path):
            raise NotAStore(f"{io.url} is a file, not a run store folder")
        if io.get(MARKER) is not None:
            raise StoreExists(f"a run store already exists at {io.url}; open it, or choose "
                              "another location")
        try:
            root = io.get_json("zarr.json")
        except ValueError:
            root = None
        ours = isinstance(root, dict) and ROOT_ATTR in root.get("attributes", {})
        if not ours:
            if io.list(""):
                raise StoreExists(f"{io.url} holds data that is not a chitally run store; "
                                  "refusing to write there")
            return
        holder = lease_mod.describe_holder(io)
        if holder is not None and holder["verdict"] == "live":
            raise LeaseHeld(f"{io.url} is being created by {holder.get('owner')} (host "
                            f"{holder.get('host')}, pid {holder.get('pid')})")
        n_commits = sum(1 for k in io.list("commits/") if k.endswith(".json"))
        if n_commits and not discard:
            raise StoreExists(
                f"{io.url} has no completion marker but holds {n_commits} committed tasks; "
                "nothing was deleted: resume it with the same input and parameters (the "
                "marker is rebuilt when they verify), or pass --discard to delete that work")
        logger.warning("%s: clearing a run store whose creation did not finish (%d committed "
                       "tasks discarded)", io.url, n_commits)
        io.clear(what="clear an unfinished store")

    @classmethod
    def open(cls, url: str | os.PathLike[str], *,
             storage_options: Mapping[str, Any] | None = None,
             allow_incomplete: bool = False) -> RunStore:
        """Attach to an existing, complete run store. Writes nothing."""
        url = os.fspath(url)
        path = local_path(url)
        if path is not None:
            if os.path.exists(path) and not os.path.isdir(path):
                raise NotAStore(f"{url} is a file, not a run store")
            if not os.path.isdir(path):
                raise NotAStore(f"no run store at {url}: no such directory")
        io = StoreIO(url, storage_options)
        try:
            root = io.get_json("zarr.json")
        except ValueError as exc:
            raise NotAStore(f"no run store at {url}: zarr.json is not JSON ({exc})") from exc
        if root is None:
            raise NotAStore(f"no run store at {url}: no zarr.json")
        meta = root.get("attributes", {}).get(ROOT_ATTR) if isinstance(root, dict) else None
        if not isinstance(meta, dict):
            raise NotAStore(f"{url} is a Zarr store but not a chitally run store")
        if meta.get("format") != FORMAT:
            raise StoreError(
                f"{url} is a run store of format {meta.get('format')!r}, made by chitally "
                f"{meta.get('version')}; this chitally ({chitally_version()}) reads format "
                f"{FORMAT}: create the run again")
        self = cls(io, meta)
        if not allow_incomplete and io.get(MARKER) is None:
            raise IncompleteStore(f"run store at {url} is incomplete: its creation did not "
                                  "finish")
        return self

    def rebuild_marker(self, params: Mapping[str, Any], fingerprint: Mapping[str, Any],
                       defaults: Mapping[str, Any] | None = None) -> None:
        """Write the completion marker of a store whose creation finished every write but
        the marker: only after the parameters, the input fingerprint, the task table and
        every input array verify against the root record (`defaults` as for
        `check_matches`)."""
        self.check_matches(self.kind, params, fingerprint, defaults)
        self.verify_inputs()
        cost = self.io.read_array(f"{TASKS}/cost")
        memory = self.io.read_array(f"{TASKS}/memory")
        if cost.shape != (self.n_tasks,) or memory.shape != (self.n_tasks,):
            raise StoreError(f"{self.url}: the task table is incomplete; it cannot be rebuilt")
        self.fence()
        marker = dumps({"created": self._meta["created"], "plan_digest": self.plan_digest,
                        "rebuilt": iso()})
        self.io.create_only(MARKER, marker, what="rebuild completion marker")
        logger.warning("%s: rebuilt the missing completion marker (inputs verified)", self.url)

    def check_matches(self, kind: str, params: Mapping[str, Any],
                      fingerprint: Mapping[str, Any], defaults: Mapping[str, Any] | None = None) -> None:
        """Refuse to mix job kinds, inputs or parameters; one line naming every field
        that differs, with the stored and given values. `defaults` holds parameters
        added after stores were first made: absent on either side, one reads as its
        default (a store made before the parameter existed was made for that value)."""
        if kind != self.kind:
            raise StoreMismatch(f"run store {self.url} holds a {self.kind!r} job, not {kind!r}")
        implied = dict(defaults or {})
        stored = {**_flatten(implied, "params"), **_flatten(self._meta["params"], "params"),
                  **_flatten(self._meta["fingerprint"], "input")}
        given = {**_flatten(jsonable(implied, "params"), "params"),
                 **_flatten(jsonable(dict(params), "params"), "params"),
                 **_flatten(jsonable(dict(fingerprint), "fingerprint"), "input")}
        absent = object()
        diffs = []
        for name in sorted(set(stored) | set(given)):
            a, b = stored.get(name, absent), given.get(name, absent)
            if a is absent and b is None or b is absent and a is None:
                continue  # a parameter left at its default
            # 1 and 1.0 are one value after a JSON round trip; True and 1 are not.
            if a != b or isinstance(a, bool) != isinstance(b, bool):
                show_a = "<absent>" if a is absent else json.dumps(a)
                show_b = "<absent>" if b is absent else json.dumps(b)
                diffs.append(f"{name.split('.', 1)[1] if name.startswith('params.') else name}: "
                             f"store {show_a}, given {show_b}")
        if diffs:
            raise StoreMismatch(f"run store {self.url} was made for another input or "
                                "parameters: " + "; ".join(diffs))

    # ------------------------------------------------------------------ inputs and tasks

    def input_array(self, name: str) -> Any:
        """A read handle on input `name` (zarr array: slice it to read)."""
        if name not in self._meta.get("inputs", {}):
            raise KeyError(f"{self.url} has no input {name!r} (it has {self.input_names})")
        return self.io.static_array(f"{INPUTS}/{name}")

    def read_input(self, name: str, selection: Any = Ellipsis, *, task: int | None = None) -> np.ndarray:
        """Read (part of) input `name`; a chunk failing its checksum raises `InputsDamaged`."""
        return self._read_input(name, selection, task=task, cached=True)

    def _read_input(self, name: str, selection: Any, *, task: int | None, cached: bool) -> np.ndarray:
        arr = self.input_array(name)

        def run() -> np.ndarray:
            try:
                fast = self.io.static_rows(f"{INPUTS}/{name}", selection, cached=cached)
            except CorruptTask as exc:
                raise InputsDamaged(
                    f"the inputs stored in {self.url} are damaged ({name}: {exc}); no "
                    "output can be trusted to come from the original input: create the "
                    "run again from the original input") from exc
            if fast is not None:
                return fast
            try:
                if isinstance(selection, np.ndarray):
                    return np.asarray(arr.get_orthogonal_selection((selection,) + (slice(None),) * (arr.ndim - 1)))
                return np.asarray(arr[selection])
            except (ValueError, RuntimeError) as exc:
                text = str(exc).lower()
                if "checksum" in text or "crc" in text or "decompress" in text or "zstd" in text:
                    raise InputsDamaged(
                        f"the inputs stored in {self.url} are damaged ({name}: {exc}); no "
                        "output can be trusted to come from the original input: create the "
                        "run again from the original input") from exc
                raise

        return self.io.op(f"read {name}", f"{INPUTS}/{name}", run, task=task)

    def verify_inputs(self) -> None:
        """Check every input array against the digest recorded at creation."""
        for name, info in self._meta.get("inputs", {}).items():
            data = self._read_input(name, Ellipsis, task=None, cached=False)
            if arrays_digest({name: data}) != info.get("sha256"):
                raise InputsDamaged(
                    f"the inputs stored in {self.url} are damaged ({name} does not match its "
                    "digest); create the run again from the original input")

    def task_cost(self) -> np.ndarray:
        return self.io.read_array(f"{TASKS}/cost")

    def task_memory(self) -> np.ndarray:
        return self.io.read_array(f"{TASKS}/memory")

    # ------------------------------------------------------------------ the lease and fence

    def acquire_lease(self, owner: str, *, takeover: bool = False,
                      stale_after: float = lease_mod.STALE_AFTER) -> lease_mod.Lease:
        """Become this store's one writer; its fence then guards every holder's write."""
        lease = lease_mod.acquire(self.io, owner, takeover=takeover, stale_after=stale_after)
        self._lease = lease
        return lease

    def fence(self) -> None:
        """Raise `LeaseLost` if this process took the lease and no longer holds it."""
        if self._lease is not None:
            self._lease.check()

    def holder(self) -> dict[str, Any] | None:
        return lease_mod.describe_holder(self.io)

    # ------------------------------------------------------------------ the result

    def write_result(self, arrays: Mapping[str, np.ndarray], record: Mapping[str, Any]) -> None:
        """Write the job's final arrays, then their record (fenced)."""
        self.fence()
        self.io.delete(f"{RESULT}/record.json", what="remove old result record")
        digest = self.io.write_verified(RESULT, arrays, what="write result")
        doc = {**jsonable(dict(record), "record"), "names": list(arrays), "sha256": digest,
               "written": iso()}
        self.fence()
        self.io.set(f"{RESULT}/record.json", dumps(doc), what="write result record")

    def read_result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]] | None:
        """The final arrays and record, None if none was written; `ResultDamaged` if
        they do not match."""
        try:
            record = self.io.get_json(f"{RESULT}/record.json")
        except ValueError as exc:
            raise ResultDamaged(f"the result record in {self.url} is not JSON: {exc}") from exc
        if record is None:
            return None
        try:
            arrays = self.io.read_arrays(RESULT, list(record["names"]))
        except Exception as exc:
            raise ResultDamaged(f"the result in {self.url} is unreadable: {exc}") from exc
        if arrays_digest(arrays) != record.get("sha256"):
            raise ResultDamaged(f"the result in {self.url} does not match its record")
        return arrays, record

    # ------------------------------------------------------------------ housekeeping

    def clean_partials(self) -> list[str]:
        """Remove leftovers of interrupted writes (keys ending in ``.partial``); call it
        holding the lease, before dispatch."""
        removed = [key for key in self.io.list("") if key.endswith(PARTIAL)]
        for key in removed:
            self.fence()
            self.io.delete(key, what="remove partial write")
        return removed

    def is_complete(self) -> bool:
        return self.io.exists(f"{RESULT}/record.json")


def describe_layout(n_tasks: int | None = None) -> str:
    """A human-readable outline of a run store, for dry runs."""
    last = f"{max(int(n_tasks) - 1, 0):06d}" if n_tasks else "NNNNNN"
    return "\n".join([
        "zarr.json                  root record: kind, parameters, input fingerprint, plan digest",
        "inputs/                    the job's inputs, written once",
        "tasks/                     each task's estimated cost and memory",
        f"outputs/task-000000..{last}/  each task's outputs",
        "commits/task-*.json        commit records (digest, dtypes, shapes)",
        "failures/task-*.json       failure records",
        "checkpoints/gen-*/         reducer checkpoints; checkpoints/latest.json names the newest",
        "result/                    the final result",
        "lease/                     the writer lease",
        f"{MARKER:<26} completion marker of the store",
    ])
