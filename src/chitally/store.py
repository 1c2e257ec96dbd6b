"""The run store: one Zarr v3 group per job, shared by the driver and every worker.

This module is the only one that knows where things live inside a run store. It writes
the parameters and the input fingerprint, the ball-sorted points, the cover and the task
table once (`RunStore.create`), and then carries the commit protocol: each task writes its
jump table into arrays of its own and proves them with a create-only commit record
(length and sha256); the reducer writes checkpoint generations behind a pointer; the final
curve is written last; one writer process at a time holds a lease. Zarr 3.1.6 reads a
missing chunk silently as fill values, so a task's data is trusted only through its commit
record, verified on every read.

It must not unpickle anything (only numeric arrays and JSON are ever stored), must not
compute anything but digests, and must not know about Dask: it is plain synchronous code
that any worker can call. Every write goes through one choke point, `RunStore._io`, which
turns any failure into a `StoreError` naming what was done, the key and the task.

Layout (keys relative to the store root)::

    zarr.json                   root group; attribute "chitally" (format, version, params,
                                fingerprint, plan_digest, created, n_tasks, n_points, dim)
    points                      float64 (N, m) ball-sorted points, chunked by rows
    original_ids                int64 (N,): new row i is input row original_ids[i]
                                (this is also the cover's ``order``, stored once)
    cover/                      group, attribute radius; arrays ball_offsets, centres,
                                neighbour_offsets, neighbour_balls
    tasks/                      group, attributes eps, max_dim, cover_radius, n_points, dim;
                                arrays row_start, row_stop, halo_offsets, halo_rows, cost,
                                memory
    tables/task-000123/         written by task 123 only: arrays values (float64) and
                                jumps (int64), one chunk each
    commits/task-000123.json    commit record, create-only
    failures/task-000123.json   failure record, removed when the task commits
    checkpoints/gen-000007/     arrays task_ids, values, jumps and record.json (digest)
    checkpoints/latest.json     pointer to the newest generation
    curve/                      arrays values, chi and record.json
    quarantine/<stamp>/...      copies of set-aside task data
    lease.json                  the writer lease
    created.json                written last by `create`: the store is complete
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import re
import secrets
import socket
import threading
from collections.abc import Callable, Mapping
from datetime import datetime, timezone
from typing import Any, Literal, NamedTuple, TypeVar

import numpy as np
import zarr
from zarr.abc.store import Store
from zarr.codecs import Crc32cCodec, ZstdCodec
from zarr.core.buffer import default_buffer_prototype
from zarr.core.sync import sync
from zarr.storage import FsspecStore, LocalStore

from chitally.plan import Cover, Plan

__all__ = [
    "FORMAT",
    "Checkpoint",
    "CommitConflict",
    "CorruptTask",
    "IncompleteStore",
    "Lease",
    "LeaseHeld",
    "NotAStore",
    "RunStore",
    "StoreError",
    "StoreExists",
    "StoreMismatch",
    "describe_layout",
    "fingerprint",
    "table_digest",
]

logger = logging.getLogger(__name__)

T = TypeVar("T")

#: Version of the layout above; a store of another format is refused, never guessed at.
FORMAT = 1

_ROOT_ATTR = "chitally"
_MARKER = "created.json"
_POINTS = "points"
_ORIGINAL_IDS = "original_ids"
_COVER = "cover"
_TASKS = "tasks"
_TABLES = "tables"
_COMMITS = "commits"
_FAILURES = "failures"
_CHECKPOINTS = "checkpoints"
_POINTER = f"{_CHECKPOINTS}/latest.json"
_CURVE = "curve"
_QUARANTINE = "quarantine"
_LEASE = "lease.json"
_PARTIAL = ".partial"

_COVER_ARRAYS = ("ball_offsets", "centres", "neighbour_offsets", "neighbour_balls")
_PLAN_INT_ARRAYS = ("row_start", "row_stop", "halo_offsets", "halo_rows", "memory")

_DEFAULT_CHUNK_ROWS = 2**16
# 1-D index arrays (halo rows can be several times N) are cut into 8 MB chunks.
_VECTOR_CHUNK = 2**20
# Most generations of checkpoints kept: enough to fall back past one damaged write.
_KEEP_GENERATIONS = 3

_TASK_KEY = re.compile(r"task-(\d+)\.json$")
_GENERATION_KEY = re.compile(r"gen-(\d+)/(record\.json$)?")


# --------------------------------------------------------------------------- errors


class StoreError(RuntimeError):
    """A run store operation failed; the message names what, which key and which task."""


class NotAStore(StoreError):
    """There is no chitally run store at the location."""


class IncompleteStore(StoreError):
    """A run store whose creation never finished (no completion marker)."""


class StoreExists(StoreError):
    """`RunStore.create` found a run store (or other data) where it was asked to write."""


class StoreMismatch(StoreError):
    """The store was made for another input or other parameters."""


class CommitConflict(StoreError):
    """A task was committed twice with different jump tables."""


class CorruptTask(StoreError):
    """A task's jump table does not match its commit record (missing, length, digest)."""


class LeaseHeld(StoreError):
    """Another live process holds (or has taken over) the writer lease."""


class CurveDamaged(StoreError):
    """The final curve is unreadable or does not match its record; the task tables it
    was reduced from are untouched, so a resume writes it again."""


# ------------------------------------------------------------------------ small helpers


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _iso(t: datetime | None = None) -> str:
    return (t or _now()).isoformat(timespec="microseconds")


def _one_line(text: object) -> str:
    return " ".join(str(text).split())


def _chitally_version() -> str:
    # Not `from chitally import __version__`: the package may import this module while
    # its own __init__ is still running.
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("chitally")
    except PackageNotFoundError:
        return "0.0.0"


def _jsonable(obj: Any, where: str = "value") -> Any:
    """Plain JSON types for `obj` (numpy scalars and arrays, tuples allowed)."""
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v, f"{where}.{k}") for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v, where) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist(), where)
    if isinstance(obj, np.generic):
        return _jsonable(obj.item(), where)
    if isinstance(obj, np.dtype):
        return str(obj)
    if isinstance(obj, bool) or obj is None or isinstance(obj, (int, str)):
        return obj
    if isinstance(obj, float):
        if not math.isfinite(obj):
            raise ValueError(f"{where} = {obj!r} cannot be stored as JSON")
        return obj
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    raise TypeError(f"{where} of type {type(obj).__name__} cannot be stored as JSON")


def _dumps(obj: Any) -> bytes:
    return json.dumps(_jsonable(obj), sort_keys=True, allow_nan=False).encode()


def _le(arr: np.ndarray, dtype: str) -> np.ndarray:
    return np.ascontiguousarray(arr, dtype=dtype)


def _sha256(*arrays: np.ndarray) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(memoryview(a).cast("B"))
    return h.hexdigest()


def table_digest(values: np.ndarray, jumps: np.ndarray) -> str:
    """sha256 of a jump table: little-endian float64 values, then little-endian int64 jumps.

    Parameters
    ----------
    values : array_like of float
        Sorted distinct jump values.
    jumps : array_like of int
        The integer jump at each value.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    return _sha256(_le(values, "<f8"), _le(jumps, "<i8"))


def fingerprint(points: np.ndarray) -> dict[str, Any]:
    """The identity of an input point set: shape, dtype and a content hash.

    The hash is the sha256 of the C-order little-endian float64 bytes of the points,
    computed block by block so that a memory-mapped or lazily sliced input is never held
    in memory at once. Two inputs with equal values but different dtypes hash alike but
    differ in ``dtype``.

    Parameters
    ----------
    points : array_like, shape (N, m)
        Anything with ``shape``, ``dtype`` and row slicing (numpy, memmap, zarr array).

    Returns
    -------
    dict
        ``{"shape": [N, m], "dtype": "float64", "sha256": "..."}``

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
        h.update(_le(np.asarray(points), "<f8").tobytes())
    else:
        row_bytes = 8 * int(np.prod(shape[1:], dtype=np.int64))
        step = max(1, (64 << 20) // max(row_bytes, 1))
        for start in range(0, shape[0], step):
            block = _le(np.asarray(points[start : start + step]), "<f8")
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


def _table_path(i: int) -> str:
    return f"{_TABLES}/task-{int(i):06d}"


def _commit_key(i: int) -> str:
    return f"{_COMMITS}/task-{int(i):06d}.json"


def _failure_key(i: int) -> str:
    return f"{_FAILURES}/task-{int(i):06d}.json"


def _generation_path(g: int) -> str:
    return f"{_CHECKPOINTS}/gen-{int(g):06d}"


def describe_layout(n_tasks: int | None = None) -> str:
    """A human-readable outline of a run store, for ``--dry-run`` output.

    Parameters
    ----------
    n_tasks : int, optional
        Number of tasks, to show the range of per-task keys.

    Returns
    -------
    str
        One line per kind of entry.
    """
    last = f"{max(int(n_tasks) - 1, 0):06d}" if n_tasks else "NNNNNN"
    return "\n".join(
        [
            "zarr.json              root group: parameters, input fingerprint, plan digest",
            f"{_POINTS:<22} float64 (N, m) ball-sorted points",
            f"{_ORIGINAL_IDS:<22} int64 (N,) input row of each point",
            f"{_COVER + '/':<22} the ball cover",
            f"{_TASKS + '/':<22} the task table",
            f"{_TABLES}/task-000000..{last}/  per-task jump tables (values, jumps)",
            f"{_COMMITS}/task-*.json    commit records (length, sha256)",
            f"{_FAILURES}/task-*.json   failure records",
            f"{_CHECKPOINTS}/gen-*/      reducer checkpoints, {_POINTER} names the newest",
            f"{_CURVE + '/':<22} the final curve",
            f"{_LEASE:<22} writer lease",
            f"{_MARKER:<22} completion marker of the store",
        ]
    )


async def _collect(it: Any) -> list[str]:
    return [x async for x in it]


def _open_zarr_store(url: str) -> Store:
    """LocalStore for paths and file:// URLs, FsspecStore for every other URL."""
    if "://" not in url:
        return LocalStore(url)
    scheme, rest = url.split("://", 1)
    if scheme == "file":
        # LocalStore rather than fsspec's local filesystem: its create-only write is an
        # atomic link(2), where fsspec's is a check followed by a write.
        return LocalStore(rest)
    return FsspecStore.from_url(url)


def _compressors() -> tuple[ZstdCodec, Crc32cCodec]:
    # The checksum comes after compression so that it covers the bytes on disk.
    return (ZstdCodec(level=1), Crc32cCodec())


# A missing chunk reads back as fill: always writing every chunk keeps "present" and
# "all zeros" distinguishable on disk (the digest in the commit record is the real proof).
_ARRAY_CONFIG = {"write_empty_chunks": True}


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


# ----------------------------------------------------------------------- checkpoints


class Checkpoint(NamedTuple):
    """A verified reducer checkpoint.

    Attributes
    ----------
    generation : int
        The generation read.
    task_ids : int64 array
        Tasks whose jump tables are summed into it.
    values, jumps : float64 array, int64 array
        The partial jump table.
    skipped : tuple of int
        Newer generations that were damaged and passed over (empty normally).
    """

    generation: int
    task_ids: np.ndarray
    values: np.ndarray
    jumps: np.ndarray
    skipped: tuple[int, ...]


# --------------------------------------------------------------------------- the store


def _reattach(url: str, meta: dict[str, Any]) -> RunStore:
    return RunStore(url, _open_zarr_store(url), meta)


class RunStore:
    """One job's run store (Zarr v3), on a local path or any fsspec URL.

    Use `RunStore.create` to make one and `RunStore.open` to attach to one. A `RunStore`
    pickles as its URL and metadata (no I/O when unpickled), so it can be shipped to
    Dask workers; ``memory://`` stores are of course visible in one process only.

    Examples
    --------
    >>> rs = RunStore.open("run.zarr")                     # doctest: +SKIP
    >>> rs.check_matches(params, fingerprint(points))     # doctest: +SKIP
    >>> done = rs.committed()                             # doctest: +SKIP
    """

    def __init__(self, url: str, store: Store, meta: dict[str, Any]) -> None:
        # Private: go through create() or open(), which validate the store first.
        self._url = url
        self._store = store
        self._meta = meta
        self._arrays: dict[str, Any] = {}

    def __reduce__(self) -> tuple[Any, ...]:
        return (_reattach, (self._url, self._meta))

    def __repr__(self) -> str:
        return f"RunStore({self._url!r}, n_tasks={self.n_tasks})"

    # ------------------------------------------------------------------ properties

    @property
    def url(self) -> str:
        """The location this store was opened with."""
        return self._url

    @property
    def params(self) -> dict[str, Any]:
        """The parameters the store was created with (JSON types)."""
        return dict(self._meta["params"])

    @property
    def fingerprint(self) -> dict[str, Any]:
        """The input fingerprint (shape, dtype, sha256)."""
        return dict(self._meta["fingerprint"])

    @property
    def plan_digest(self) -> str:
        """`Plan.digest` of the stored task table."""
        return str(self._meta["plan_digest"])

    @property
    def n_tasks(self) -> int:
        return int(self._meta["n_tasks"])

    @property
    def n_points(self) -> int:
        return int(self._meta["n_points"])

    @property
    def dim(self) -> int:
        return int(self._meta["dim"])

    @property
    def created(self) -> str:
        """UTC ISO time of creation."""
        return str(self._meta["created"])

    @property
    def version(self) -> str:
        """chitally version that created the store."""
        return str(self._meta["version"])

    # ------------------------------------------------------------ the choke point

    def _io(
        self,
        what: str,
        key: str,
        fn: Callable[[], T],
        *,
        task: int | None = None,
        attempt: str | None = None,
    ) -> T:
        """Run one store operation; any failure becomes a `StoreError` with context."""
        try:
            return fn()
        except StoreError:
            raise
        except Exception as exc:
            where = f" (task {task}" if task is not None else ""
            if attempt is not None:
                where += f", attempt {attempt}" if where else f" (attempt {attempt}"
            where += ")" if where else ""
            msg = (
                f"{what} failed at key {key!r} of {self._url}{where}: "
                f"{type(exc).__name__}: {_one_line(exc)}"
            )
            logger.error(msg)
            raise StoreError(msg) from exc

    # ------------------------------------------------------------- raw key access

    def _get(self, key: str) -> bytes | None:
        buf = self._io("read", key, lambda: sync(self._store.get(key, default_buffer_prototype())))
        return None if buf is None else buf.to_bytes()

    def _get_json(self, key: str) -> Any:
        """Parsed JSON at `key`, None if absent; ValueError if it is not JSON."""
        raw = self._get(key)
        return None if raw is None else json.loads(raw)

    def _set(self, key: str, data: bytes, *, what: str, task: int | None = None) -> None:
        buf = default_buffer_prototype().buffer.from_bytes(data)
        self._io(what, key, lambda: sync(self._store.set(key, buf)), task=task)

    def _create_only(
        self, key: str, data: bytes, *, what: str, task: int | None = None
    ) -> bool:
        """Write `key` only if absent; True if `data` is what the key now holds."""
        buf = default_buffer_prototype().buffer.from_bytes(data)

        def op() -> None:
            store = self._store
            if isinstance(store, FsspecStore):
                path = f"{store.path.rstrip('/')}/{key}"
                try:
                    # fsspec's create mode is a conditional write on object stores that
                    # have one, where zarr's generic fallback is exists-then-set.
                    sync(store.fs._pipe_file(path, data, mode="create"))
                except FileExistsError:
                    pass
                except (TypeError, NotImplementedError):
                    sync(store.set_if_not_exists(key, buf))
            else:
                sync(store.set_if_not_exists(key, buf))

        self._io(what, key, op, task=task)
        # Whoever won, reading back tells us whether it was us: our bytes carry a unique
        # token or attempt id, or are identical to the winner's anyway.
        return self._get(key) == data

    def _delete(self, key: str, *, what: str, task: int | None = None) -> None:
        self._io(what, key, lambda: sync(self._store.delete(key)), task=task)

    def _delete_dir(self, prefix: str, *, what: str, task: int | None = None) -> None:
        self._io(what, prefix, lambda: sync(self._store.delete_dir(prefix)), task=task)

    def _list(self, prefix: str) -> list[str]:
        def op() -> list[str]:
            try:
                return sync(_collect(self._store.list_prefix(prefix)))
            except FileNotFoundError:
                return []

        return self._io("list", prefix, op)

    def _exists(self, key: str) -> bool:
        return self._io("exists", key, lambda: sync(self._store.exists(key)))

    # --------------------------------------------------------------- array access

    def _write_array(
        self,
        path: str,
        data: np.ndarray,
        *,
        what: str,
        chunks: tuple[int, ...] | None = None,
        task: int | None = None,
        attempt: str | None = None,
    ) -> None:
        """Write a whole array at `path` (one chunk unless `chunks` is given)."""
        if chunks is None:
            chunks = tuple(max(int(s), 1) for s in data.shape)

        def op() -> None:
            arr = None
            try:
                arr = zarr.open_array(self._store, path=path, mode="r+")
            except Exception:
                arr = None
            # Rewriting an array of the same shape in place never deletes anything, so a
            # duplicate attempt of a deterministic task cannot open a window in which a
            # reader finds the committed data gone.
            if (
                arr is None
                or arr.shape != data.shape
                or arr.dtype != data.dtype
                or tuple(arr.chunks) != chunks
            ):
                arr = zarr.create_array(
                    self._store,
                    name=path,
                    shape=data.shape,
                    dtype=data.dtype,
                    chunks=chunks,
                    compressors=_compressors(),
                    fill_value=0,
                    config=_ARRAY_CONFIG,
                    overwrite=True,
                )
            else:
                arr = arr.with_config(_ARRAY_CONFIG)
            if data.size:
                arr[...] = data

        self._io(what, path, op, task=task, attempt=attempt)

    def _create_chunked(
        self, path: str, shape: tuple[int, ...], dtype: str, chunks: tuple[int, ...], what: str
    ) -> Any:
        return self._io(
            what,
            path,
            lambda: zarr.create_array(
                self._store,
                name=path,
                shape=shape,
                dtype=dtype,
                chunks=chunks,
                compressors=_compressors(),
                fill_value=0,
                config=_ARRAY_CONFIG,
            ),
        )

    def _static_array(self, path: str) -> Any:
        """A cached read handle on an array written once at creation."""
        arr = self._arrays.get(path)
        if arr is None:
            arr = self._io(
                "open array", path, lambda: zarr.open_array(self._store, path=path, mode="r")
            )
            self._arrays[path] = arr
        return arr

    def _read_static(self, path: str) -> np.ndarray:
        arr = self._static_array(path)
        return np.asarray(self._io("read array", path, lambda: arr[...]))

    # ------------------------------------------------------------ create and open

    @classmethod
    def create(
        cls,
        url: str | os.PathLike[str],
        *,
        params: Mapping[str, Any],
        fingerprint: Mapping[str, Any],
        cover: Cover,
        plan: Plan,
        points_sorted: np.ndarray,
        chunk_rows: int = _DEFAULT_CHUNK_ROWS,
    ) -> RunStore:
        """Create a run store and write the inputs of every task into it.

        Writes the root attributes, the ball-sorted points and their input row ids, the
        cover, the task table and the parent groups of every later output, then the
        completion marker last. Nothing is dispatched from here.

        Parameters
        ----------
        url : str or path
            Local path, ``file://`` URL or any fsspec URL every worker can reach.
        params : mapping
            The run parameters (eps, max_dim, cover_radius, ...), JSON-serialisable.
        fingerprint : mapping
            `fingerprint` of the input points.
        cover : Cover
            The ball cover; ``cover.order`` is stored as ``original_ids``.
        plan : Plan
            The task table.
        points_sorted : array_like, shape (N, m)
            The points in ball order (new row ``i`` is input row ``cover.order[i]``).
        chunk_rows : int
            Rows per chunk of the points.

        Returns
        -------
        RunStore

        Raises
        ------
        StoreExists
            A complete run store, or data that is not a run store, is already there.
            A run store whose creation did not finish is wiped and made again.
        ValueError
            The cover, plan, points and fingerprint disagree.
        """
        url = os.fspath(url)
        n = int(points_sorted.shape[0])
        m = int(points_sorted.shape[1]) if points_sorted.ndim == 2 else -1
        if points_sorted.ndim != 2 or n != plan.n_points or m != plan.dim:
            raise ValueError(
                f"points_sorted has shape {tuple(points_sorted.shape)}, the plan expects "
                f"({plan.n_points}, {plan.dim})"
            )
        if int(cover.order.shape[0]) != n:
            raise ValueError(f"cover.order has {cover.order.shape[0]} rows, points have {n}")
        fp_shape = list(fingerprint.get("shape", []))
        if not fp_shape or int(fp_shape[0]) != n:
            raise ValueError(f"fingerprint shape {fp_shape} does not have {n} rows")
        if chunk_rows < 1:
            raise ValueError(f"chunk_rows must be positive, got {chunk_rows}")

        meta: dict[str, Any] = {
            "format": FORMAT,
            "version": _chitally_version(),
            "params": _jsonable(dict(params), "params"),
            "fingerprint": _jsonable(dict(fingerprint), "fingerprint"),
            "plan_digest": plan.digest(),
            "created": _iso(),
            "n_tasks": plan.n_tasks,
            "n_points": n,
            "dim": m,
        }
        self = cls(url, _open_zarr_store(url), meta)
        self._prepare_location()

        root = self._io(
            "create root group",
            "zarr.json",
            lambda: zarr.create_group(self._store, attributes={_ROOT_ATTR: meta}),
        )
        cover_attrs = {"radius": float(cover.radius)}
        plan_attrs = {
            "eps": float(plan.eps),
            "max_dim": None if plan.max_dim is None else int(plan.max_dim),
            "cover_radius": float(plan.cover_radius),
            "n_points": int(plan.n_points),
            "dim": int(plan.dim),
        }
        # Every parent group exists before dispatch, so a task creating its own arrays
        # never writes a metadata document another task could be writing.
        for name, attrs in (
            (_COVER, cover_attrs),
            (_TASKS, plan_attrs),
            (_TABLES, {}),
            (_CHECKPOINTS, {}),
            (_CURVE, {}),
        ):
            self._io(
                "create group",
                f"{name}/zarr.json",
                lambda name=name, attrs=attrs: root.create_group(name, attributes=attrs),
            )

        def vector(path: str, data: np.ndarray, dtype: str) -> None:
            data = _le(data, dtype)
            self._write_array(
                path, data, what="write array", chunks=(max(1, min(data.size, _VECTOR_CHUNK)),)
            )

        vector(_ORIGINAL_IDS, cover.order, "<i8")
        for name in _COVER_ARRAYS:
            vector(f"{_COVER}/{name}", getattr(cover, name), "<i8")
        for name in _PLAN_INT_ARRAYS:
            vector(f"{_TASKS}/{name}", getattr(plan, name), "<i8")
        vector(f"{_TASKS}/cost", plan.cost, "<f8")

        rows = max(1, min(chunk_rows, n))
        pts = self._create_chunked(_POINTS, (n, m), "float64", (rows, m), "create points")
        pts = pts.with_config(_ARRAY_CONFIG)
        for start in range(0, n, rows):
            block = _le(np.asarray(points_sorted[start : start + rows]), "<f8")

            def put(block: np.ndarray = block, start: int = start) -> None:
                pts[start : start + block.shape[0]] = block

            self._io(f"write points rows {start}:{start + block.shape[0]}", _POINTS, put)

        marker = _dumps({"created": meta["created"], "plan_digest": meta["plan_digest"]})
        if not self._create_only(_MARKER, marker, what="write completion marker"):
            raise StoreExists(f"{url}: another process created a run store here at the same time")
        logger.info("created run store %s: %d points, %d tasks", url, n, plan.n_tasks)
        return self

    def _prepare_location(self) -> None:
        """Refuse a complete store or foreign data; wipe a half-created run store."""
        if self._get(_MARKER) is not None:
            raise StoreExists(
                f"a run store already exists at {self._url}; open it, or choose another location"
            )
        try:
            root = self._get_json("zarr.json")
        except ValueError:
            root = None
        ours = isinstance(root, dict) and _ROOT_ATTR in root.get("attributes", {})
        if ours:
            lease = self._lease_record()
            if lease is not None and self._lease_verdict(lease, 60.0)[0] == "live":
                raise LeaseHeld(
                    f"{self._url} is being created by {lease.get('owner')} "
                    f"(host {lease.get('host')}, pid {lease.get('pid')})"
                )
            logger.warning("%s: wiping a run store whose creation did not finish", self._url)
            self._io("wipe incomplete store", "", lambda: sync(self._store.clear()))
            return
        if self._list(""):
            raise StoreExists(
                f"{self._url} holds data that is not a chitally run store; refusing to write there"
            )

    @classmethod
    def open(cls, url: str | os.PathLike[str]) -> RunStore:
        """Attach to an existing, complete run store. Writes nothing.

        Parameters
        ----------
        url : str or path
            Local path, ``file://`` URL or fsspec URL.

        Returns
        -------
        RunStore

        Raises
        ------
        NotAStore
            Nothing there, or a Zarr store that is not a chitally run store.
        IncompleteStore
            A run store whose creation did not finish.
        StoreError
            A run store of another format.
        """
        url = os.fspath(url)
        if "://" not in url or url.startswith("file://"):
            path = url[len("file://") :] if url.startswith("file://") else url
            # Checked first because a writable LocalStore creates its root on first use.
            if not os.path.isdir(path):
                raise NotAStore(f"no run store at {url}: no such directory")
        self = cls(url, _open_zarr_store(url), {})
        try:
            root = self._get_json("zarr.json")
        except ValueError as exc:
            raise NotAStore(f"no run store at {url}: zarr.json is not JSON ({exc})") from exc
        if root is None:
            raise NotAStore(f"no run store at {url}: no zarr.json")
        meta = root.get("attributes", {}).get(_ROOT_ATTR) if isinstance(root, dict) else None
        if not isinstance(meta, dict):
            raise NotAStore(f"{url} is a Zarr store but not a chitally run store")
        if meta.get("format") != FORMAT:
            raise StoreError(
                f"{url} has run store format {meta.get('format')!r} (chitally "
                f"{meta.get('version')}); this chitally reads format {FORMAT}"
            )
        if self._get(_MARKER) is None:
            raise IncompleteStore(
                f"run store at {url} is incomplete: its creation did not finish; create it again"
            )
        self._meta = meta
        return self

    def check_matches(self, params: Mapping[str, Any], fingerprint: Mapping[str, Any]) -> None:
        """Refuse to mix inputs or parameters. Writes nothing.

        Parameters
        ----------
        params : mapping
            The parameters of the run that wants to use this store.
        fingerprint : mapping
            `fingerprint` of its input.

        Raises
        ------
        StoreMismatch
            One line naming every field that differs, with the stored and given values.
        """
        stored = {
            **_flatten(self._meta["params"], "params"),
            **_flatten(self._meta["fingerprint"], "fingerprint"),
        }
        given = {
            **_flatten(_jsonable(dict(params), "params"), "params"),
            **_flatten(_jsonable(dict(fingerprint), "fingerprint"), "fingerprint"),
        }
        absent = object()
        diffs = []
        for name in sorted(set(stored) | set(given)):
            a, b = stored.get(name, absent), given.get(name, absent)
            # 1 and 1.0 are one value after a JSON round trip; True and 1 are not.
            if a != b or isinstance(a, bool) != isinstance(b, bool):
                show_a = "<absent>" if a is absent else json.dumps(a)
                show_b = "<absent>" if b is absent else json.dumps(b)
                diffs.append(f"{name}: store {show_a}, given {show_b}")
        if diffs:
            raise StoreMismatch(
                f"run store {self._url} was made for another input or parameters: "
                + "; ".join(diffs)
            )

    # ------------------------------------------------------------ reading inputs

    def read_cover(self) -> Cover:
        """The ball cover, exactly as written."""
        attrs = self._group_attrs(_COVER)
        arrays = {name: self._read_static(f"{_COVER}/{name}") for name in _COVER_ARRAYS}
        order = self._read_static(_ORIGINAL_IDS)
        return Cover(radius=float(attrs["radius"]), order=order, **arrays)

    def read_plan(self) -> Plan:
        """The task table, checked against the plan digest recorded at creation.

        Raises
        ------
        StoreError
            The stored table does not match its digest.
        """
        attrs = self._group_attrs(_TASKS)
        arrays = {name: self._read_static(f"{_TASKS}/{name}") for name in _PLAN_INT_ARRAYS}
        plan = Plan(
            eps=float(attrs["eps"]),
            max_dim=None if attrs["max_dim"] is None else int(attrs["max_dim"]),
            cover_radius=float(attrs["cover_radius"]),
            n_points=int(attrs["n_points"]),
            dim=int(attrs["dim"]),
            cost=self._read_static(f"{_TASKS}/cost"),
            **arrays,
        )
        if plan.digest() != self.plan_digest:
            raise StoreError(
                f"task table in {self._url} has digest {plan.digest()}, "
                f"the store recorded {self.plan_digest}"
            )
        return plan

    def _group_attrs(self, path: str) -> dict[str, Any]:
        key = f"{path}/zarr.json"
        doc = self._io("read group", key, lambda: self._get_json(key))
        if not isinstance(doc, dict):
            raise StoreError(f"group {path!r} missing in {self._url}")
        return dict(doc.get("attributes", {}))

    def read_original_ids(self, rows: np.ndarray | None = None) -> np.ndarray:
        """Input row ids of the given new rows (all rows if None)."""
        if rows is None:
            return self._read_static(_ORIGINAL_IDS)
        rows = np.asarray(rows, dtype=np.int64)
        arr = self._static_array(_ORIGINAL_IDS)
        pick = lambda: arr.get_orthogonal_selection(rows)  # noqa: E731
        return np.asarray(self._io("read original ids", _ORIGINAL_IDS, pick))

    def read_rows(self, rows: np.ndarray) -> np.ndarray:
        """Coordinates of the given new rows.

        Parameters
        ----------
        rows : int array
            Strictly increasing new-row ids. Only the chunks holding them are read, so
            spatially coherent rows (a task's halo) cost about their own size.

        Returns
        -------
        float64 array, shape (len(rows), m)
        """
        rows = np.asarray(rows, dtype=np.int64)
        if rows.ndim != 1:
            raise ValueError("rows must be one-dimensional")
        if rows.size == 0:
            return np.empty((0, self.dim), dtype=np.float64)
        if rows[0] < 0 or rows[-1] >= self.n_points or np.any(np.diff(rows) <= 0):
            raise ValueError(f"rows must be strictly increasing ids in [0, {self.n_points})")
        arr = self._static_array(_POINTS)
        lo, hi = int(rows[0]), int(rows[-1]) + 1
        if hi - lo == rows.size:
            # A contiguous range (the usual owned block) needs no index bookkeeping.
            return np.asarray(self._io("read points", _POINTS, lambda: arr[lo:hi]))
        return np.asarray(
            self._io(
                "read points",
                _POINTS,
                lambda: arr.get_orthogonal_selection((rows, slice(None))),
            )
        )

    def read_task_input(self, i: int) -> tuple[np.ndarray, np.ndarray, int, int]:
        """Everything task `i` reads: its halo's coordinates and where its owned rows are.

        Parameters
        ----------
        i : int
            Task index.

        Returns
        -------
        coords : float64 array, shape (H, m)
            Coordinates of the halo rows.
        halo_rows : int64 array, shape (H,)
            Sorted new-row ids of the halo (the owned rows included).
        owned_start, owned_stop : int
            Local positions: ``halo_rows[owned_start:owned_stop]`` are the owned rows.
        """
        i = self._task_index(i)

        def part(name: str, sel: slice) -> np.ndarray:
            # Slices only: a task reads its own entries, never the whole task table.
            arr = self._static_array(f"{_TASKS}/{name}")
            return np.asarray(self._io("read task table", arr.path, lambda: arr[sel], task=i))

        lo, hi = (int(x) for x in part("halo_offsets", slice(i, i + 2)))
        row_start = int(part("row_start", slice(i, i + 1))[0])
        row_stop = int(part("row_stop", slice(i, i + 1))[0])
        halo = part("halo_rows", slice(lo, hi)).astype(np.int64, copy=False)
        owned_start = int(np.searchsorted(halo, row_start))
        owned_stop = owned_start + (row_stop - row_start)
        if row_stop > row_start and (
            owned_stop > halo.size
            or halo[owned_start] != row_start
            or halo[owned_stop - 1] != row_stop - 1
        ):
            raise StoreError(
                f"task {i} in {self._url}: its halo does not contain its owned rows "
                f"{row_start}:{row_stop}"
            )
        return self.read_rows(halo), halo, owned_start, owned_stop

    def _task_index(self, i: int) -> int:
        i = int(i)
        if not 0 <= i < self.n_tasks:
            raise IndexError(f"task {i} out of range: the store has {self.n_tasks} tasks")
        return i

    # ------------------------------------------------------------- commit protocol

    def commit_task(
        self,
        i: int,
        attempt: str,
        values: np.ndarray,
        jumps: np.ndarray,
        *,
        info: Mapping[str, Any] | None = None,
    ) -> str:
        """Write task `i`'s jump table, verify it, then commit it create-only.

        Parameters
        ----------
        i : int
            Task index.
        attempt : str
            Identifies this attempt (recorded, not interpreted).
        values, jumps : array_like
            The jump table: float64 values and int64 jumps of equal length.
        info : mapping, optional
            Recorded in the commit record: n_owned, seconds, peak_memory, host (defaults
            to this host), and any other JSON.

        Returns
        -------
        str
            The digest of the jump table (see `table_digest`).

        Raises
        ------
        CommitConflict
            The task is already committed with a different digest; nothing was written.
        CorruptTask
            The task's existing commit record cannot be read: set the task aside first.
        StoreError
            A write failed, or the arrays did not read back as written.
        """
        i = self._task_index(i)
        values = _le(values, "<f8")
        jumps = _le(jumps, "<i8")
        if values.ndim != 1 or jumps.shape != values.shape:
            raise ValueError(
                f"task {i}: values and jumps must be 1-D of equal length, "
                f"got {values.shape} and {jumps.shape}"
            )
        digest = table_digest(values, jumps)
        existing = self._read_commit(i)
        if existing is not None:
            self._check_same(i, existing, digest)
            try:
                self.read_jump_table(i, verify=True)
            except CorruptTask as exc:
                logger.warning("task %d: rewriting its committed data (%s)", i, exc)
                self._write_table(i, attempt, values, jumps, digest)
            return digest

        self._write_table(i, attempt, values, jumps, digest)
        record = {
            "host": socket.gethostname(),
            **_jsonable(dict(info or {}), "info"),
            "task": i,
            "attempt": str(attempt),
            "length": int(values.size),
            "digest": digest,
            "committed": _iso(),
        }
        key = _commit_key(i)
        if not self._create_only(key, _dumps(record), what="write commit record", task=i):
            # Another attempt committed first; a deterministic task agrees with it.
            self._check_same(i, self._read_commit(i), digest)
        if self._failure_exists(i):
            self._delete(_failure_key(i), what="clear failure record", task=i)
        return digest

    def _check_same(self, i: int, record: dict[str, Any] | None, digest: str) -> None:
        theirs = None if record is None else record.get("digest")
        if theirs != digest:
            raise CommitConflict(
                f"task {i} is already committed with digest {theirs} "
                f"(attempt {None if record is None else record.get('attempt')}); "
                f"this attempt's digest is {digest}"
            )

    def _write_table(
        self, i: int, attempt: str, values: np.ndarray, jumps: np.ndarray, digest: str
    ) -> None:
        base = _table_path(i)
        for name, data in (("values", values), ("jumps", jumps)):
            self._write_array(
                f"{base}/{name}", data, what="write jump table", task=i, attempt=attempt
            )
        try:
            back_v, back_j = self._load_table(i)
        except CorruptTask as exc:
            raise StoreError(
                f"task {i}, attempt {attempt}: jump table did not read back: {exc}"
            ) from exc
        if back_v.shape != values.shape or table_digest(back_v, back_j) != digest:
            raise StoreError(
                f"task {i}, attempt {attempt}: jump table read back differently from what "
                f"was written (key {base!r} of {self._url})"
            )

    def _read_commit(self, i: int) -> dict[str, Any] | None:
        key = _commit_key(i)
        try:
            rec = self._get_json(key)
        except ValueError as exc:
            raise CorruptTask(f"task {i}: commit record {key!r} is not JSON ({exc})") from exc
        if rec is not None and not (isinstance(rec, dict) and {"digest", "length"} <= rec.keys()):
            raise CorruptTask(f"task {i}: commit record {key!r} lacks length or digest")
        return rec

    def _load_table(self, i: int) -> tuple[np.ndarray, np.ndarray]:
        base = _table_path(i)
        out = []
        for name, dtype in (("values", np.float64), ("jumps", np.int64)):
            path = f"{base}/{name}"
            try:
                arr = zarr.open_array(self._store, path=path, mode="r")
                data = np.asarray(arr[...])
            except FileNotFoundError as exc:
                raise CorruptTask(f"task {i}: jump table missing ({path})") from exc
            except OSError as exc:
                # Not proof of damage (could be the network): let the caller retry.
                raise StoreError(
                    f"task {i}: reading {path} of {self._url} failed: {_one_line(exc)}"
                ) from exc
            except Exception as exc:
                raise CorruptTask(
                    f"task {i}: jump table unreadable "
                    f"({path}: {type(exc).__name__}: {_one_line(exc)})"
                ) from exc
            if data.ndim != 1 or data.dtype != dtype:
                raise CorruptTask(
                    f"task {i}: {path} has shape {data.shape} and dtype {data.dtype}"
                )
            out.append(data)
        return out[0], out[1]

    def read_jump_table(self, i: int, verify: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """Task `i`'s jump table, proven by its commit record.

        Parameters
        ----------
        i : int
            Task index.
        verify : bool
            Check the commit record, the length and the digest (default). With False the
            arrays are returned as they read, which may be fill values for missing chunks.

        Returns
        -------
        values : float64 array
        jumps : int64 array

        Raises
        ------
        CorruptTask
            No commit record, data missing or unreadable, wrong length, wrong digest.
        """
        i = self._task_index(i)
        record = self._read_commit(i) if verify else None
        if verify and record is None:
            raise CorruptTask(f"task {i}: no commit record (the task is pending)")
        values, jumps = self._load_table(i)
        if record is not None:
            length = int(record["length"])
            if values.size != length or jumps.size != length:
                raise CorruptTask(
                    f"task {i}: length mismatch: record says {length}, data has "
                    f"{values.size} values and {jumps.size} jumps"
                )
            digest = table_digest(values, jumps)
            if digest != record["digest"]:
                raise CorruptTask(
                    f"task {i}: digest mismatch: record says {record['digest']}, data has {digest}"
                )
        return values, jumps

    def read_commit(self, i: int) -> dict[str, Any] | None:
        """Task `i`'s commit record, or None if it is not committed."""
        return self._read_commit(self._task_index(i))

    def committed(self) -> np.ndarray:
        """Which tasks have a commit record, from one listing (records are not verified).

        Returns
        -------
        bool array, shape (n_tasks,)
        """
        done = np.zeros(self.n_tasks, dtype=bool)
        for key in self._list(f"{_COMMITS}/"):
            match = _TASK_KEY.search(key)
            if match is None:
                continue
            i = int(match.group(1))
            if i < self.n_tasks:
                done[i] = True
            else:
                logger.warning("%s: commit record %r names no task of this plan", self._url, key)
        return done

    def task_state(self, i: int) -> Literal["done", "pending", "failed"]:
        """'done' if committed (not verified here), 'failed' if a failure is recorded."""
        i = self._task_index(i)
        if self._exists(_commit_key(i)):
            return "done"
        if self._failure_exists(i):
            return "failed"
        return "pending"

    def set_aside(self, i: int) -> str:
        """Make task `i` pending again, keeping a copy of its record and data.

        The copy goes under ``quarantine/<UTC stamp>/``; the commit record is removed
        before the data so that a crash half-way leaves the task pending, never trusted.

        Returns
        -------
        str
            The quarantine prefix the copy was written to.
        """
        i = self._task_index(i)
        stamp = _now().strftime("%Y%m%dT%H%M%S%fZ") + f"-{secrets.token_hex(3)}"
        prefix = f"{_QUARANTINE}/{stamp}"
        keys = [_commit_key(i)] + self._list(f"{_table_path(i)}/")
        for key in keys:
            data = self._get(key)
            if data is not None and not key.endswith(_PARTIAL):
                self._set(f"{prefix}/{key}", data, what="quarantine copy", task=i)
        self._delete(_commit_key(i), what="remove commit record", task=i)
        self._delete_dir(_table_path(i), what="remove jump table", task=i)
        logger.warning("task %d set aside to %s/%s; it is pending again", i, self._url, prefix)
        return prefix

    # --------------------------------------------------------------------- failures

    def _failure_exists(self, i: int) -> bool:
        return self._exists(_failure_key(i))

    def record_failure(self, i: int, message: str, attempts: int) -> None:
        """Record that task `i` failed `attempts` times, the last with `message`."""
        i = self._task_index(i)
        record = {
            "task": i,
            "message": str(message),
            "attempts": int(attempts),
            "time": _iso(),
            "host": socket.gethostname(),
        }
        self._set(_failure_key(i), _dumps(record), what="write failure record", task=i)

    def failures(self) -> dict[int, dict[str, Any]]:
        """Every recorded failure, by task."""
        out: dict[int, dict[str, Any]] = {}
        for key in self._list(f"{_FAILURES}/"):
            match = _TASK_KEY.search(key)
            if match is None:
                continue
            try:
                rec = self._get_json(key)
            except ValueError:
                rec = {"message": f"unreadable failure record {key!r}"}
            if rec is not None:
                out[int(match.group(1))] = rec
        return dict(sorted(out.items()))

    def clear_failure(self, i: int) -> None:
        """Forget task `i`'s failure record (absent is fine)."""
        i = self._task_index(i)
        self._delete(_failure_key(i), what="clear failure record", task=i)

    # ------------------------------------------------------------------ checkpoints

    def _pointer(self) -> int | None:
        try:
            doc = self._get_json(_POINTER)
            return None if doc is None else int(doc["generation"])
        except (ValueError, KeyError, TypeError):
            logger.warning("%s: checkpoint pointer is damaged; scanning generations", self._url)
            return None

    def write_checkpoint(
        self,
        generation: int,
        task_ids: np.ndarray,
        values: np.ndarray,
        jumps: np.ndarray,
        *,
        keep: int = _KEEP_GENERATIONS,
    ) -> None:
        """Write checkpoint `generation`, then point at it and prune old generations.

        Parameters
        ----------
        generation : int
            Not below the generation the pointer names (rewriting that one is allowed,
            e.g. after it was found damaged).
        task_ids : int array
            The tasks summed into this partial jump table, so none is summed twice.
        values, jumps : array_like
            The partial jump table.
        keep : int
            Generations kept, newest first (at least 2, so a damaged newest one has a
            predecessor).
        """
        generation = int(generation)
        current = self._pointer()
        if generation < 0 or (current is not None and generation < current):
            raise StoreError(
                f"checkpoint generation {generation} is older than the current {current} "
                f"in {self._url}"
            )
        task_ids = _le(task_ids, "<i8")
        values = _le(values, "<f8")
        jumps = _le(jumps, "<i8")
        if task_ids.ndim != 1 or values.ndim != 1 or jumps.shape != values.shape:
            raise ValueError(
                "task_ids, values and jumps must be 1-D; values and jumps of equal length"
            )
        base = _generation_path(generation)
        self._delete(f"{base}/record.json", what="remove old checkpoint record")
        for name, data in (("task_ids", task_ids), ("values", values), ("jumps", jumps)):
            self._write_array(f"{base}/{name}", data, what=f"write checkpoint {generation}")
        digest = _sha256(task_ids, values, jumps)
        back = self._load_generation(generation, {"digest": digest, "generation": generation})
        if back is None:
            raise StoreError(
                f"checkpoint {generation} did not read back as written in {self._url}"
            )
        record = {
            "generation": generation,
            "digest": digest,
            "n_task_ids": int(task_ids.size),
            "length": int(values.size),
            "written": _iso(),
        }
        self._set(f"{base}/record.json", _dumps(record), what="write checkpoint record")
        pointer = _dumps({"generation": generation, "written": _iso()})
        self._set(_POINTER, pointer, what="move checkpoint pointer")
        older = sorted(
            (g for g in self._generations(recorded=False) if g < generation), reverse=True
        )
        for g in older[max(keep, 2) - 1 :]:
            self._delete_dir(_generation_path(g), what="prune checkpoint")

    def _generations(self, *, recorded: bool = True) -> list[int]:
        """Generations present (only those with a record unless `recorded` is False)."""
        found = set()
        for key in self._list(f"{_CHECKPOINTS}/"):
            m = _GENERATION_KEY.search(key)
            if m is not None and (m.group(2) or not recorded):
                found.add(int(m.group(1)))
        return sorted(found)

    def _load_generation(
        self, g: int, record: dict[str, Any] | None = None
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """Generation `g`'s arrays if they match their record, else None (with a log)."""
        base = _generation_path(g)
        try:
            if record is None:
                record = self._get_json(f"{base}/record.json")
            if not isinstance(record, dict):
                raise ValueError("no record")
            out = []
            for name in ("task_ids", "values", "jumps"):
                arr = zarr.open_array(self._store, path=f"{base}/{name}", mode="r")
                out.append(np.asarray(arr[...]))
            task_ids, values, jumps = out
            found = _sha256(_le(task_ids, "<i8"), _le(values, "<f8"), _le(jumps, "<i8"))
            if found != record["digest"]:
                raise ValueError("digest mismatch")
        except Exception as exc:
            logger.warning(
                "%s: checkpoint generation %d is damaged: %s", self._url, g, _one_line(exc)
            )
            return None
        return task_ids, values, jumps

    def latest_checkpoint(self) -> Checkpoint | None:
        """The newest valid checkpoint, falling back past damaged generations.

        Returns
        -------
        Checkpoint or None
            None if there is no valid generation. ``skipped`` lists damaged newer
            generations that were passed over (each also logged as a warning).
        """
        pointer = self._pointer()
        generations = self._generations()
        if pointer is not None:
            # A generation beyond the pointer was never published: ignore it.
            generations = [g for g in generations if g <= pointer]
            if pointer not in generations:
                generations.append(pointer)
        skipped: list[int] = []
        for g in sorted(generations, reverse=True):
            loaded = self._load_generation(g)
            if loaded is not None:
                if skipped:
                    logger.warning(
                        "%s: using checkpoint generation %d instead of damaged %s",
                        self._url, g, ", ".join(map(str, skipped)),
                    )
                return Checkpoint(g, *loaded, skipped=tuple(skipped))
            skipped.append(g)
        if skipped:
            logger.warning("%s: no valid checkpoint (damaged: %s)", self._url, skipped)
        return None

    # ------------------------------------------------------------------------ curve

    def write_curve(
        self,
        values: np.ndarray,
        chi: np.ndarray,
        *,
        eps: float,
        max_dim: int | None,
        n_points: int,
        digest: str,
    ) -> None:
        """Write the final curve (exact jumps) and its metadata; the record goes last.

        Parameters
        ----------
        values : float64 array
            Jump values of the curve.
        chi : int64 array
            The curve's values (as the caller defines them) at `values`.
        eps, max_dim, n_points : float, int or None, int
            What the curve is of.
        digest : str
            The caller's digest of the curve, stored and returned as given.
        """
        values = _le(values, "<f8")
        chi = _le(chi, "<i8")
        if values.ndim != 1 or chi.shape != values.shape:
            raise ValueError("values and chi must be 1-D of equal length")
        self._delete(f"{_CURVE}/record.json", what="remove old curve record")
        self._write_array(f"{_CURVE}/values", values, what="write curve")
        self._write_array(f"{_CURVE}/chi", chi, what="write curve")
        record = {
            "eps": float(eps),
            "max_dim": None if max_dim is None else int(max_dim),
            "n_points": int(n_points),
            "digest": str(digest),
            "length": int(values.size),
            "sha256": _sha256(values, chi),
            "written": _iso(),
        }
        self._set(f"{_CURVE}/record.json", _dumps(record), what="write curve record")

    def read_curve(self) -> dict[str, Any] | None:
        """The final curve, or None if none was written.

        Returns
        -------
        dict or None
            ``values``, ``chi``, ``eps``, ``max_dim``, ``n_points``, ``digest``, ``written``.

        Raises
        ------
        CurveDamaged
            The stored curve is unreadable or does not match its record.
        """
        try:
            record = self._get_json(f"{_CURVE}/record.json")
        except ValueError as exc:
            raise CurveDamaged(f"curve record in {self._url} is not JSON: {exc}") from exc
        if record is None:
            return None
        try:
            values, chi = (
                np.asarray(zarr.open_array(self._store, path=f"{_CURVE}/{name}", mode="r")[...])
                for name in ("values", "chi")
            )
        except Exception as exc:
            raise CurveDamaged(f"curve in {self._url} is unreadable: {_one_line(exc)}") from exc
        found = _sha256(_le(values, "<f8"), _le(chi, "<i8"))
        if values.size != record.get("length") or found != record.get("sha256"):
            raise CurveDamaged(f"curve in {self._url} does not match its record (length or sha256)")
        out = {k: record[k] for k in ("eps", "max_dim", "n_points", "digest", "written")}
        return {"values": values, "chi": chi, **out}

    # ---------------------------------------------------------------- housekeeping

    def clean_partials(self) -> list[str]:
        """Remove leftovers of interrupted writes (keys ending in ``.partial``).

        Call it while holding the lease and before dispatching tasks: a live writer's
        temporary key would be removed too.

        Returns
        -------
        list of str
            The keys removed.
        """
        removed = [key for key in self._list("") if key.endswith(_PARTIAL)]
        for key in removed:
            self._delete(key, what="remove partial write")
        if removed:
            logger.info("%s: removed %d partial writes", self._url, len(removed))
        return removed

    # ------------------------------------------------------------------------ lease

    def _lease_record(self) -> dict[str, Any] | None:
        try:
            rec = self._get_json(_LEASE)
        except ValueError:
            return {"owner": "<unreadable lease>", "token": None, "heartbeat": None}
        return rec if isinstance(rec, dict) else None

    def _lease_verdict(self, rec: Mapping[str, Any], stale_after: float) -> tuple[str, float]:
        """('dead' | 'stale' | 'live', heartbeat age in seconds) of a lease record."""
        try:
            age = (_now() - datetime.fromisoformat(str(rec["heartbeat"]))).total_seconds()
        except (KeyError, TypeError, ValueError):
            age = math.inf
        if rec.get("host") == socket.gethostname() and not _pid_alive(int(rec.get("pid") or -1)):
            return "dead", age
        return ("stale" if age > stale_after else "live"), age

    def acquire_lease(
        self, owner: str, *, takeover: bool = False, stale_after: float = 60.0
    ) -> Lease:
        """Become the one writer process of this store.

        Parameters
        ----------
        owner : str
            Who holds it (shown to anyone refused).
        takeover : bool
            Take over a lease whose heartbeat is older than `stale_after`. A lease held
            by a dead process on this host is taken over without asking (and logged).
        stale_after : float
            Seconds without a heartbeat after which a lease counts as stale.

        Returns
        -------
        Lease

        Raises
        ------
        LeaseHeld
            A live lease belongs to another holder, or a stale one and not `takeover`.
        """
        lease = Lease(self, owner, stale_after=stale_after)
        for _ in range(3):
            if self._create_only(_LEASE, lease._encode(), what="create lease"):
                return lease
            rec = self._lease_record()
            if rec is None:
                continue  # released between our write and our read: try again
            verdict, age = self._lease_verdict(rec, stale_after)
            holder = (
                f"{rec.get('owner')} (host {rec.get('host')}, pid {rec.get('pid')}, "
                f"heartbeat {age:.0f} s ago)"
            )
            if verdict == "live" or (verdict == "stale" and not takeover):
                hint = "; pass takeover=True to take it over" if verdict == "stale" else ""
                raise LeaseHeld(f"run store {self._url} is leased to {holder}{hint}")
            why = "its process is gone" if verdict == "dead" else f"stale after {stale_after:g} s"
            logger.warning("%s: taking over the lease of %s: %s", self._url, holder, why)
            # Delete only if it is still the lease we judged; then race for it create-only.
            again = self._lease_record()
            if again is not None and again.get("token") == rec.get("token"):
                self._delete(_LEASE, what="remove stale lease")
        raise LeaseHeld(f"run store {self._url}: lost the race for the lease three times")


class Lease:
    """The writer lease of a run store: owner, host, pid, heartbeat and a random token.

    Obtain one with `RunStore.acquire_lease`. Used as a context manager it beats in the
    background and is released on exit::

        with store.acquire_lease("resume") as lease:
            ...
    """

    def __init__(self, store: RunStore, owner: str, *, stale_after: float = 60.0) -> None:
        self.store = store
        self.owner = str(owner)
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self.token = secrets.token_hex(16)
        self.started = _iso()
        self.stale_after = float(stale_after)
        self.last_beat = self.started
        self.error: BaseException | None = None
        self._released = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def _encode(self) -> bytes:
        return _dumps(
            {
                "owner": self.owner,
                "host": self.host,
                "pid": self.pid,
                "started": self.started,
                "heartbeat": self.last_beat,
                "token": self.token,
            }
        )

    def _still_ours(self) -> dict[str, Any] | None:
        rec = self.store._lease_record()
        return rec if rec is not None and rec.get("token") == self.token else None

    @property
    def held(self) -> bool:
        """Whether the store's lease still carries our token (one read)."""
        return self._still_ours() is not None

    def heartbeat(self) -> None:
        """Refresh the heartbeat time.

        Raises
        ------
        LeaseHeld
            The lease was taken over or removed: stop writing.
        """
        rec = self.store._lease_record()
        if rec is None or rec.get("token") != self.token:
            who = (
                "nobody"
                if rec is None
                else f"{rec.get('owner')} (host {rec.get('host')}, pid {rec.get('pid')})"
            )
            raise LeaseHeld(f"lease on {self.store.url} was lost: it is now held by {who}")
        self.last_beat = _iso()
        self.store._set(_LEASE, self._encode(), what="lease heartbeat")

    def _beat(self, interval: float) -> None:
        while not self._stop.wait(interval):
            try:
                self.heartbeat()
            except Exception as exc:  # recorded for the owner to inspect; never silent
                self.error = exc
                logger.error("%s", exc)
                if isinstance(exc, LeaseHeld):
                    return

    def start(self, interval: float | None = None) -> None:
        """Beat every `interval` seconds (default: a quarter of stale_after) in a thread."""
        if self._thread is not None and self._thread.is_alive():
            return
        interval = self.stale_after / 4 if interval is None else float(interval)
        self._stop.clear()
        self._thread = threading.Thread(
            target=self._beat, args=(interval,), name="chitally-lease-heartbeat", daemon=True
        )
        self._thread.start()

    def stop(self) -> None:
        """Stop the heartbeat thread (the lease stays held)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
            self._thread = None

    def release(self) -> bool:
        """Stop beating and remove the lease if it is still ours.

        Returns
        -------
        bool
            True if it was ours and is now removed; False if it was not, or was
            released before.
        """
        if self._released:  # nested holders (a caller and `runs.execute`) release once
            return False
        self._released = True
        self.stop()
        if self._still_ours() is None:
            logger.warning("lease on %s is no longer ours; leaving it alone", self.store.url)
            return False
        self.store._delete(_LEASE, what="release lease")
        return True

    def __enter__(self) -> Lease:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()

    def __repr__(self) -> str:
        return f"Lease({self.owner!r}, host={self.host!r}, pid={self.pid})"

