"""Store I/O: one location (a local path or an fsspec URL), one choke point for every
operation, JSON documents, whole-array writes verified by reading them back, and the one
digest scheme every record uses.

This is the only module that talks to Zarr and fsspec. It knows no layout: callers name
keys. It never unpickles anything (only numeric arrays and JSON are stored) and never
computes anything but digests.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
from collections.abc import Callable, Mapping
from datetime import datetime, timezone
from typing import Any, TypeVar

import numpy as np
import zarr
from zarr.abc.store import Store
from zarr.codecs import Crc32cCodec, ZstdCodec
from zarr.core.buffer import default_buffer_prototype
from zarr.core.sync import sync
from zarr.errors import ContainsArrayError
from zarr.storage import FsspecStore, LocalStore

from .errors import CorruptTask, NotAStore, StoreError
from .localfs import SMALL_ARRAY_BYTES, LocalKeys, RowReader

logger = logging.getLogger("chitally.store")

T = TypeVar("T")

#: Keys ending in this are temporary and may be removed by the lease holder.
PARTIAL = ".partial"

# A missing chunk reads back as fill: always writing every chunk keeps "present" and
# "all zeros" distinguishable on disk (the digest in a record is the real proof).
_ARRAY_CONFIG = {"write_empty_chunks": True}


# ------------------------------------------------------------------------ small helpers


def now() -> datetime:
    return datetime.now(timezone.utc)


def iso(t: datetime | None = None) -> str:
    return (t or now()).isoformat(timespec="microseconds")


def one_line(text: object) -> str:
    return " ".join(str(text).split())


def jsonable(obj: Any, where: str = "value") -> Any:
    """Plain JSON types for `obj` (numpy scalars and arrays, tuples allowed)."""
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v, f"{where}.{k}") for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v, where) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist(), where)
    if isinstance(obj, np.generic):
        return jsonable(obj.item(), where)
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


def dumps(obj: Any) -> bytes:
    return json.dumps(jsonable(obj), sort_keys=True, allow_nan=False).encode()


def little_endian(arr: np.ndarray) -> np.ndarray:
    """`arr` as a C-contiguous array of the little-endian form of its dtype."""
    arr = np.asarray(arr)
    return np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<"))


def arrays_digest(arrays: Mapping[str, np.ndarray]) -> str:
    """The one digest of named arrays: sha256 over, in the given order, each name, its
    little-endian dtype, its shape and its little-endian bytes.

    Task outputs, checkpoints and results are all proven by this digest, so a reader
    never trusts an array whose bytes, dtype, shape or name differ from what was written.
    """
    h = hashlib.sha256()
    for name, arr in arrays.items():
        a = little_endian(arr)
        h.update(f"{name}|{a.dtype.str}|{','.join(map(str, a.shape))}|".encode())
        h.update(memoryview(a).cast("B") if a.size else b"")
    return h.hexdigest()


def open_zarr_store(url: str, storage_options: Mapping[str, Any] | None = None) -> Store:
    """LocalStore for paths and file:// URLs, FsspecStore for every other URL."""
    if "://" not in url:
        return LocalStore(url)
    scheme, rest = url.split("://", 1)
    if scheme == "file":
        # LocalStore rather than fsspec's local filesystem: its create-only write is an
        # atomic link(2), where fsspec's is a check followed by a write.
        return LocalStore(rest)
    # No listings cache: fsspec answers exists() and size lookups from a cached listing
    # of the parent folder, so a commit record, failure record or lease generation
    # written by another process after a listing would stay invisible to this one (the
    # reducer would set committed work aside, the lease fence would miss a takeover).
    options = {**dict(storage_options or {}), "use_listings_cache": False}
    return FsspecStore.from_url(url, storage_options=options)


def local_path(url: str) -> str | None:
    """The filesystem path of a local store location, None for remote URLs."""
    if "://" not in url:
        return url
    if url.startswith("file://"):
        return url[len("file://"):]
    return None


#: Arrays above this size are stored in chunks of rows of about this size, so that a
#: reader of a few rows (a region reading its part of every block) reads only those.
ROW_CHUNK_BYTES = 1 << 20


def _row_chunks(data: np.ndarray) -> tuple[int, ...]:
    shape = tuple(max(int(s), 1) for s in data.shape)
    if not shape or data.nbytes <= ROW_CHUNK_BYTES:
        return shape
    row_bytes = max(1, data.nbytes // max(1, data.shape[0]))
    return (max(1, ROW_CHUNK_BYTES // row_bytes), *shape[1:])


def _compressors() -> tuple[ZstdCodec, Crc32cCodec]:
    # The checksum comes after compression so that it covers the bytes on disk.
    return (ZstdCodec(level=1), Crc32cCodec())


async def _collect(it: Any) -> list[str]:
    return [x async for x in it]


class StoreIO:
    """Keys and arrays at one store location; every operation goes through `op`.

    Pickles as its URL and storage options (no I/O when unpickled), so it can travel to
    Dask workers. Storage options are never written into the store.
    """

    def __init__(self, url: str, storage_options: Mapping[str, Any] | None = None) -> None:
        self.url = os.fspath(url)
        self.storage_options = dict(storage_options or {})
        self._store: Store | None = None
        self._local: LocalKeys | None = None
        self._rows: RowReader | None = None
        self._arrays: dict[str, Any] = {}

    def __reduce__(self) -> tuple[Any, ...]:
        return (StoreIO, (self.url, self.storage_options))

    def __repr__(self) -> str:
        return f"StoreIO({self.url!r})"

    @property
    def zarr_store(self) -> Store:
        if self._store is None:
            path = local_path(self.url)
            if path is not None and os.path.exists(path) and not os.path.isdir(path):
                raise NotAStore(f"{self.url} is a file, not a run store folder")
            self._store = open_zarr_store(self.url, self.storage_options)
            if isinstance(self._store, LocalStore):
                self._local = LocalKeys(str(self._store.root), label=self.url)
                self._rows = RowReader(self._local)
        return self._store

    @property
    def local(self) -> LocalKeys | None:
        """Synchronous file operations when the store is a local folder, else None
        (the same files zarr's LocalStore reads and writes, without its event loop)."""
        if self._store is None:
            _ = self.zarr_store  # opening it decides whether the store is local
        return self._local

    # ------------------------------------------------------------------ the choke point

    def op(self, what: str, key: str, fn: Callable[[], T], *, task: int | None = None,
           attempt: str | None = None) -> T:
        """Run one store operation; any failure becomes a `StoreError` with context."""
        try:
            return fn()
        except StoreError:
            raise
        except Exception as exc:
            where = []
            if task is not None:
                where.append(f"task {task}")
            if attempt is not None:
                where.append(f"attempt {attempt}")
            context = f" ({', '.join(where)})" if where else ""
            msg = (f"{what} failed at key {key!r} of {self.url}{context}: "
                   f"{type(exc).__name__}: {one_line(exc)}")
            logger.error(msg)
            raise StoreError(msg) from exc

    # ------------------------------------------------------------------ raw keys

    def get(self, key: str) -> bytes | None:
        local = self.local
        if local is not None:
            return self.op("read", key, lambda: local.get(key))
        buf = self.op("read", key, lambda: sync(self.zarr_store.get(key, default_buffer_prototype())))
        return None if buf is None else buf.to_bytes()

    def get_json(self, key: str) -> Any:
        """Parsed JSON at `key`, None if absent; ValueError if it is not JSON."""
        raw = self.get(key)
        return None if raw is None else json.loads(raw)

    def set(self, key: str, data: bytes, *, what: str, task: int | None = None) -> None:
        local = self.local
        if local is not None:
            self.op(what, key, lambda: local.set(key, data), task=task)
            return
        buf = default_buffer_prototype().buffer.from_bytes(data)
        self.op(what, key, lambda: sync(self.zarr_store.set(key, buf)), task=task)

    def create_only(self, key: str, data: bytes, *, what: str, task: int | None = None) -> bool:
        """Write `key` only if absent; True if `data` is what the key now holds.

        Local paths use an atomic link(2); object stores use fsspec's conditional create
        where the backend has one (S3 ``If-None-Match``, GCS generation match), else zarr's
        check-then-write, which cannot exclude a racing writer (the lease guards there).
        """
        buf = default_buffer_prototype().buffer.from_bytes(data)

        def run() -> bool:
            store = self.zarr_store
            if self._local is not None:
                # link(2) says whether it was ours: nothing to read back then
                return self._local.set_if_not_exists(key, data)
            if isinstance(store, FsspecStore):
                path = f"{store.path.rstrip('/')}/{key}"
                try:
                    sync(store.fs._pipe_file(path, data, mode="create"))
                except FileExistsError:
                    pass
                except (TypeError, NotImplementedError):
                    sync(store.set_if_not_exists(key, buf))
            else:
                sync(store.set_if_not_exists(key, buf))
            return False

        if self.op(what, key, run, task=task):
            return True
        # Whoever won, reading back tells us whether it was us: our bytes carry a unique
        # token or attempt id, or are identical to the winner's anyway.
        return self.get(key) == data

    def delete(self, key: str, *, what: str, task: int | None = None) -> None:
        self.op(what, key, lambda: sync(self.zarr_store.delete(key)), task=task)

    def delete_dir(self, prefix: str, *, what: str, task: int | None = None) -> None:
        self.op(what, prefix, lambda: sync(self.zarr_store.delete_dir(prefix)), task=task)

    def clear(self, *, what: str) -> None:
        """Remove every key at this location (the location itself stays)."""

        def run() -> None:
            store = self.zarr_store
            if isinstance(store, LocalStore):
                sync(store.clear())
                return
            # Key by key: zarr's FsspecStore.clear stops at the first path it finds
            # already removed with its folder, leaving the rest of the store behind.
            for key in sync(_collect(store.list())):
                sync(store.delete(key))

        self.op(what, "", run)

    def list(self, prefix: str) -> list[str]:
        def run() -> list[str]:
            try:
                return sync(_collect(self.zarr_store.list_prefix(prefix)))
            except FileNotFoundError:
                return []

        return self.op("list", prefix, run)

    def exists(self, key: str) -> bool:
        local = self.local
        if local is not None:
            return self.op("exists", key, lambda: local.exists(key))
        return self.op("exists", key, lambda: sync(self.zarr_store.exists(key)))

    # ------------------------------------------------------------------ arrays

    def create_group(self, path: str, attributes: Mapping[str, Any] | None = None) -> None:
        attrs = jsonable(dict(attributes or {}), "attributes")
        if path in ("", "/"):
            self.op("create root group", "zarr.json",
                    lambda: zarr.create_group(self.zarr_store, attributes=attrs, overwrite=True))
        else:
            self.op("create group", f"{path}/zarr.json",
                    lambda: zarr.create_group(self.zarr_store, path=path, attributes=attrs,
                                              overwrite=True))

    def group_attrs(self, path: str) -> dict[str, Any]:
        key = "zarr.json" if path in ("", "/") else f"{path}/zarr.json"
        doc = self.op("read group", key, lambda: self.get_json(key))
        if not isinstance(doc, dict):
            raise StoreError(f"group {path!r} missing in {self.url}")
        return dict(doc.get("attributes", {}))

    def write_array(self, path: str, data: np.ndarray, *, what: str,
                    chunks: tuple[int, ...] | None = None, task: int | None = None,
                    attempt: str | None = None) -> None:
        """Write a whole array at `path` (one chunk unless `chunks` is given)."""
        data = little_endian(data)
        local = self.local
        if local is not None and chunks is None and data.nbytes <= SMALL_ARRAY_BYTES \
                and data.dtype.kind in "biuf":
            self.op(what, path, lambda: local.write_small(path, data), task=task, attempt=attempt)
            return
        if chunks is None:
            chunks = _row_chunks(data)

        def create(overwrite: bool) -> Any:
            return zarr.create_array(
                self.zarr_store, name=path, shape=data.shape, dtype=data.dtype, chunks=chunks,
                compressors=_compressors(), fill_value=0, config=_ARRAY_CONFIG, overwrite=overwrite)

        def fits(arr: Any) -> bool:
            return arr.shape == data.shape and arr.dtype == data.dtype and tuple(arr.chunks) == chunks

        def run() -> None:
            try:
                arr = zarr.open_array(self.zarr_store, path=path, mode="r+")
            except Exception:
                try:
                    # Not overwrite: a duplicate attempt of the same task may be creating
                    # it at this moment, and must not have its files deleted under it.
                    arr = create(overwrite=False)
                except ContainsArrayError:
                    arr = zarr.open_array(self.zarr_store, path=path, mode="r+")
            # Rewriting an array of the same shape in place never deletes anything, so a
            # duplicate attempt of a deterministic task cannot open a window in which a
            # reader finds the committed data gone; another shape is stale data.
            arr = arr.with_config(_ARRAY_CONFIG) if fits(arr) else create(overwrite=True)
            if data.size:
                arr[...] = data

        self.op(what, path, run, task=task, attempt=attempt)

    def read_array(self, path: str, *, task: int | None = None) -> np.ndarray:
        """A whole array as written; `CorruptTask` when it is missing or unreadable,
        `StoreError` when the failure may be the network rather than the data."""
        local = self.local
        if local is not None:
            try:
                small = local.read_small(path)
            except OSError as exc:
                raise StoreError(f"reading {path} of {self.url} failed: {one_line(exc)}") from exc
            if small is not None:
                return small
        try:
            arr = zarr.open_array(self.zarr_store, path=path, mode="r")
            return np.asarray(arr[...])
        except FileNotFoundError as exc:
            raise CorruptTask(f"{path} is missing in {self.url}") from exc
        except OSError as exc:
            raise StoreError(f"reading {path} of {self.url} failed: {one_line(exc)}") from exc
        except Exception as exc:
            raise CorruptTask(f"{path} of {self.url} is unreadable: "
                              f"{type(exc).__name__}: {one_line(exc)}") from exc

    def read_rows(self, path: str, start: int, stop: int, *, task: int | None = None) -> np.ndarray:
        """Rows ``start:stop`` of the array at `path`; only the chunks holding them are
        read, each checked against its checksum (`CorruptTask` when one fails)."""
        try:
            arr = self._arrays.get(path)
            if arr is None:
                arr = zarr.open_array(self.zarr_store, path=path, mode="r")
                self._arrays[path] = arr
            if not (0 <= start <= stop <= arr.shape[0]):
                raise CorruptTask(f"{path} of {self.url} has {arr.shape[0]} rows, rows "
                                  f"{start}:{stop} were asked for")
            return np.asarray(arr[start:stop])
        except CorruptTask:
            raise
        except FileNotFoundError as exc:
            raise CorruptTask(f"{path} is missing in {self.url}") from exc
        except OSError as exc:
            raise StoreError(f"reading {path} of {self.url} failed: {one_line(exc)}") from exc
        except Exception as exc:
            raise CorruptTask(f"{path} of {self.url} is unreadable: "
                              f"{type(exc).__name__}: {one_line(exc)}") from exc

    def write_verified(self, prefix: str, arrays: Mapping[str, np.ndarray], *, what: str,
                       task: int | None = None, attempt: str | None = None) -> str:
        """Write named arrays under `prefix`, read them back, and return their digest.

        The single write-then-verify step behind task outputs, checkpoints and results:
        the caller writes its record (holding the digest) only after this returns.
        """
        digest = arrays_digest(arrays)
        for name, data in arrays.items():
            self.write_array(f"{prefix}/{name}", data, what=what, task=task, attempt=attempt)
        try:
            back = self.read_arrays(prefix, list(arrays))
        except CorruptTask as exc:
            raise StoreError(f"{what}: {prefix} did not read back: {exc}") from exc
        if arrays_digest(back) != digest:
            raise StoreError(f"{what}: {prefix} of {self.url} read back differently from what "
                             "was written")
        return digest

    def read_arrays(self, prefix: str, names: list[str], *, task: int | None = None) -> dict[str, np.ndarray]:
        return {name: self.read_array(f"{prefix}/{name}", task=task) for name in names}

    def create_chunked(self, path: str, shape: tuple[int, ...], dtype: str,
                       chunks: tuple[int, ...], *, what: str) -> Any:
        arr = self.op(what, path, lambda: zarr.create_array(
            self.zarr_store, name=path, shape=shape, dtype=dtype, chunks=chunks,
            compressors=_compressors(), fill_value=0, config=_ARRAY_CONFIG, overwrite=True))
        return arr.with_config(_ARRAY_CONFIG)

    def static_rows(self, path: str, selection: Any, *, cached: bool = True) -> np.ndarray | None:
        """Rows of an array written once (``...`` or a slice of its first axis) read
        from a local folder through a cache of decoded, checksum-verified chunks; None
        where this does not apply (remote stores, other selections or layouts), for the
        caller to slice `static_array` instead. `CorruptTask` for a damaged chunk."""
        if self.local is None or self._rows is None:
            return None
        if selection is Ellipsis:
            start, stop = None, None
        elif isinstance(selection, slice) and selection.step in (None, 1):
            start, stop = selection.start, selection.stop
        else:
            return None
        try:
            return self._rows.rows(path, start, stop, cached=cached)
        except OSError as exc:
            raise StoreError(f"reading {path} of {self.url} failed: {one_line(exc)}") from exc

    def static_array(self, path: str) -> Any:
        """A cached read handle on an array written once at creation."""
        arr = self._arrays.get(path)
        if arr is None:
            arr = self.op("open array", path,
                          lambda: zarr.open_array(self.zarr_store, path=path, mode="r"))
            self._arrays[path] = arr
        return arr
