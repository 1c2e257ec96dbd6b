"""Synchronous key and small-array I/O on a local store folder.

zarr's `LocalStore` runs every file operation as a coroutine on zarr's event-loop
thread; each call from ours is a thread hand-off that costs far more than the file
operation itself, and a task's commit makes a dozen of them. Here the same operations
are plain system calls with the same semantics and the same files on disk:

- a write goes to ``<key>.<random>.partial`` and is renamed into place (a reader sees
  the old or the new bytes, never half); a create-only write links the temporary file
  to its key, so exactly one of several racing writers creates it (link(2) fails on an
  existing name);
- a small array (one chunk, at most `SMALL_ARRAY_BYTES`) is an ordinary Zarr v3 array:
  its ``zarr.json`` is the one zarr itself writes for that shape and dtype, its single
  chunk ``c/0/...`` is the little-endian bytes, zstd-compressed, followed by their
  crc32c, exactly what the codecs `StoreIO` declares produce. zarr reads it as any
  other array; `read_small` reads it back without zarr, checking the crc32c.

Anything else (larger arrays, arrays written with other chunks or codecs) goes through
zarr as before.
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from collections import OrderedDict
from typing import Any

import google_crc32c
import numpy as np
from numcodecs import Zstd

from .errors import CorruptTask

#: Decoded input chunks kept per open store (inputs never change once written).
CHUNK_CACHE_BYTES = 64 << 20

#: Arrays up to this many bytes are written as one chunk without zarr; larger outputs
#: keep going through zarr (and may be stored in row chunks there).
SMALL_ARRAY_BYTES = 1 << 20

_ZSTD = Zstd(level=1)
_TEMPLATES: dict[tuple[str, int], dict[str, Any]] = {}
_METADATA: dict[tuple[str, tuple[int, ...]], bytes] = {}


class LocalKeys:
    """Keys under one local folder, read and written synchronously.

    Parameters
    ----------
    root : str
        The store folder (created on the first write).
    label : str, optional
        How messages name the store (its URL); the folder by default.
    """

    def __init__(self, root: str, label: str | None = None) -> None:
        self.root = os.fspath(root)
        self.label = label or self.root

    def path(self, key: str) -> str:
        return os.path.join(self.root, key)

    def get(self, key: str) -> bytes | None:
        try:
            with open(self.path(key), "rb") as f:
                return f.read()
        except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
            return None

    def exists(self, key: str) -> bool:
        return os.path.isfile(self.path(key))

    def _write(self, key: str, data: bytes, exclusive: bool) -> bool:
        """Write `key`; False when `exclusive` and the key existed (left as it was)."""
        path = self.path(key)
        tmp = f"{path}.{uuid.uuid4().hex}.partial"
        try:
            try:
                _write_file(tmp, data)
            except FileNotFoundError:
                # folders are made only when missing: a mkdir per write is costly
                os.makedirs(os.path.dirname(path), exist_ok=True)
                _write_file(tmp, data)
            created = True
            if exclusive:
                try:
                    os.link(tmp, path)
                except FileExistsError:
                    created = False
                os.unlink(tmp)
            else:
                os.replace(tmp, path)
            return created
        except BaseException:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
            raise

    def set(self, key: str, data: bytes) -> None:
        """Write `key` whole (atomically replacing what it held)."""
        self._write(key, data, exclusive=False)

    def set_if_not_exists(self, key: str, data: bytes) -> bool:
        """Write `key` only if no such key exists (an existing key is left as it is);
        True when this call created it."""
        return self._write(key, data, exclusive=True)

    def delete_dir(self, prefix: str) -> None:
        shutil.rmtree(self.path(prefix), ignore_errors=True)

    # ------------------------------------------------------------------ small arrays

    def write_small(self, path: str, data: np.ndarray) -> None:
        """Write a little-endian, C-contiguous array as a one-chunk Zarr array at `path`.

        The array's files are rewritten in place when its metadata stays the same (no
        window in which a reader finds them gone); an array of another shape or layout
        there is stale and removed first.
        """
        meta = small_metadata(data.shape, data.dtype)
        key = f"{path}/zarr.json"
        old = self.get(key)
        if old is None or not _same_json(old, meta):
            if old is not None or os.path.isdir(self.path(path)):
                self.delete_dir(path)
            # the folders of the metadata and of the chunk at once (a new array's usual case)
            os.makedirs(os.path.dirname(self.path(f"{path}/{chunk_key(data.ndim)}")), exist_ok=True)
            self.set(key, meta)
        if data.size:
            self.set(f"{path}/{chunk_key(data.ndim)}", encode_chunk(data))

    def read_small(self, path: str) -> np.ndarray | None:
        """The array at `path` if it has the one-chunk layout `write_small` writes, None
        when it has another layout (read it with zarr); `CorruptTask` when it is missing
        or damaged."""
        raw = self.get(f"{path}/zarr.json")
        if raw is None:
            raise CorruptTask(f"{path} is missing in {self.label}")
        try:
            doc = json.loads(raw)
            shape, dtype = small_layout(doc)
        except (ValueError, TypeError, KeyError) as exc:
            raise CorruptTask(f"{path}/zarr.json of {self.label} is unreadable: {exc}") from exc
        if shape is None:
            return None
        if 0 in shape:
            return np.zeros(shape, dtype=dtype)
        chunk = self.get(f"{path}/{chunk_key(len(shape))}")
        if chunk is None:
            raise CorruptTask(f"{path}: its data chunk is missing in {self.label}")
        return decode_chunk(chunk, shape, dtype, where=f"{path} of {self.label}")


class RowReader:
    """Row ranges of arrays written once (a run's inputs) in row chunks, read without
    zarr through a bounded cache of decoded chunks.

    Every chunk's crc32c is checked when it is decoded; a chunk failing it, or missing,
    raises `CorruptTask`. Arrays of another layout are left to zarr (`rows` returns
    None).
    """

    def __init__(self, keys: LocalKeys, limit: int = CHUNK_CACHE_BYTES) -> None:
        self.keys = keys
        self.limit = int(limit)
        self._layouts: dict[str, tuple[tuple[int, ...], np.dtype, int] | None] = {}
        self._chunks: OrderedDict[tuple[str, int], np.ndarray] = OrderedDict()
        self._held = 0

    def layout(self, path: str) -> tuple[tuple[int, ...], np.dtype, int] | None:
        """(shape, dtype, rows per chunk) of a row-chunked array, None for another layout."""
        if path not in self._layouts:
            raw = self.keys.get(f"{path}/zarr.json")
            if raw is None:
                raise CorruptTask(f"{path} is missing in {self.keys.label}")
            try:
                self._layouts[path] = row_layout(json.loads(raw))
            except (ValueError, TypeError, KeyError) as exc:
                raise CorruptTask(f"{path}/zarr.json of {self.keys.label} is unreadable: {exc}") from exc
        return self._layouts[path]

    def rows(self, path: str, start: int | None, stop: int | None, *,
             cached: bool = True) -> np.ndarray | None:
        """Rows ``start:stop`` (Python slice rules) of the array at `path`, or None when
        it is not a row-chunked array of the store's codecs."""
        layout = self.layout(path)
        if layout is None:
            return None
        shape, dtype, step = layout
        lo, hi, _ = slice(start, stop).indices(shape[0] if shape else 0)
        hi = max(lo, hi)
        if hi == lo:
            return np.zeros((0, *shape[1:]), dtype=dtype)
        parts = []
        for c in range(lo // step, (hi - 1) // step + 1):
            chunk = self._chunk(path, c, shape, dtype, step, cached)
            a, b = max(lo - c * step, 0), min(hi - c * step, chunk.shape[0])
            parts.append(chunk[a:b])
        return parts[0].copy() if len(parts) == 1 else np.concatenate(parts)

    def _chunk(self, path: str, c: int, shape: tuple[int, ...], dtype: np.dtype, step: int,
               cached: bool) -> np.ndarray:
        key = (path, c)
        got = self._chunks.get(key) if cached else None
        if got is not None:
            self._chunks.move_to_end(key)
            return got
        name = "/".join(["c", str(c)] + ["0"] * (len(shape) - 1))
        raw = self.keys.get(f"{path}/{name}")
        if raw is None:
            raise CorruptTask(f"{path} of {self.keys.label}: its chunk {name} is missing")
        # zarr stores edge chunks whole (padded with fill): the shape is the chunk's
        got = decode_chunk(raw, (step, *shape[1:]), dtype, where=f"{path}/{name} of {self.keys.label}")
        got = got[:min(step, shape[0] - c * step)]
        if cached and got.nbytes <= self.limit:
            self._chunks[key] = got
            self._held += got.nbytes
            while self._held > self.limit:
                _, old = self._chunks.popitem(last=False)
                self._held -= old.nbytes
        return got


def row_layout(doc: Any) -> tuple[tuple[int, ...], np.dtype, int] | None:
    """(shape, dtype, rows per chunk) when `doc` describes an array chunked along its
    first axis only, with the default chunk keys and the store's codecs; None else."""
    if not isinstance(doc, dict) or doc.get("node_type") != "array" or doc.get("zarr_format") != 3:
        raise ValueError("not a Zarr v3 array's metadata")
    shape = tuple(int(s) for s in doc["shape"])
    try:
        dtype = np.dtype(doc["data_type"]).newbyteorder("<")
    except TypeError:
        return None
    if dtype.kind not in "biuf" or not shape:
        return None
    template = _template(dtype, len(shape))
    grid = doc.get("chunk_grid", {})
    chunks = grid.get("configuration", {}).get("chunk_shape")
    if (grid.get("name") != "regular" or not isinstance(chunks, list) or len(chunks) != len(shape)
            or [int(x) for x in chunks[1:]] != [max(s, 1) for s in shape[1:]] or int(chunks[0]) < 1
            or doc.get("codecs") != template["codecs"]
            or doc.get("chunk_key_encoding") != template["chunk_key_encoding"]
            or doc.get("storage_transformers", []) != []):
        return None
    return shape, dtype, int(chunks[0])


def _write_file(path: str, data: bytes) -> None:
    with open(path, "wb") as f:
        f.write(data)


def _same_json(a: bytes, b: bytes) -> bool:
    if a == b:
        return True
    try:
        return json.loads(a) == json.loads(b)
    except ValueError:
        return False


def chunk_key(ndim: int) -> str:
    """The key of chunk 0 in zarr's default v3 chunk key encoding."""
    return "/".join(["c"] + ["0"] * ndim)


def encode_chunk(data: np.ndarray) -> bytes:
    """Raw little-endian bytes -> zstd level 1 -> crc32c appended (little-endian)."""
    body = bytes(_ZSTD.encode(memoryview(data).cast("B")))
    return body + np.uint32(google_crc32c.value(body)).astype("<u4").tobytes()


def decode_chunk(raw: bytes, shape: tuple[int, ...], dtype: np.dtype, *, where: str) -> np.ndarray:
    body, stored = raw[:-4], raw[-4:]
    if len(raw) < 4 or np.uint32(google_crc32c.value(body)).astype("<u4").tobytes() != stored:
        raise CorruptTask(f"{where} is unreadable: its chunk's checksum does not match")
    try:
        flat = np.frombuffer(_ZSTD.decode(body), dtype=dtype)
        return flat.reshape(shape).copy()
    except Exception as exc:
        raise CorruptTask(f"{where} is unreadable: {type(exc).__name__}: {exc}") from exc


def _template(dtype: np.dtype, ndim: int) -> dict[str, Any]:
    """The metadata document zarr writes for a one-chunk array of this dtype and rank
    (made once per process by zarr itself, in memory)."""
    key = (dtype.str, ndim)
    doc = _TEMPLATES.get(key)
    if doc is None:
        import zarr
        from zarr.core.buffer import default_buffer_prototype
        from zarr.core.sync import sync
        from zarr.storage import MemoryStore

        from .io import _ARRAY_CONFIG, _compressors

        store = MemoryStore()
        shape = (1,) * ndim
        zarr.create_array(store, name="a", shape=shape, dtype=dtype, chunks=shape,
                          compressors=_compressors(), fill_value=0, config=_ARRAY_CONFIG)
        doc = json.loads(sync(store.get("a/zarr.json", default_buffer_prototype())).to_bytes())
        _TEMPLATES[key] = doc
    return doc


def small_metadata(shape: tuple[int, ...], dtype: np.dtype) -> bytes:
    """``zarr.json`` of a one-chunk array of this shape and dtype (made once per process
    for each: a task's outputs have the same shapes task after task)."""
    dtype = np.dtype(dtype)
    shape = tuple(int(s) for s in shape)
    key = (dtype.str, shape)
    meta = _METADATA.get(key)
    if meta is None:
        doc = dict(_template(dtype, len(shape)))
        doc["shape"] = list(shape)
        doc["chunk_grid"] = {"name": "regular",
                             "configuration": {"chunk_shape": [max(s, 1) for s in shape]}}
        meta = json.dumps(doc, indent=2).encode()
        if len(_METADATA) < 4096:
            _METADATA[key] = meta
    return meta


def small_layout(doc: Any) -> tuple[tuple[int, ...] | None, np.dtype | None]:
    """(shape, dtype) when `doc` describes an array `read_small` can read: one chunk,
    the default chunk keys and exactly the codecs of `write_small`; (None, None) else."""
    if not isinstance(doc, dict) or doc.get("node_type") != "array" or doc.get("zarr_format") != 3:
        raise ValueError("not a Zarr v3 array's metadata")
    shape = tuple(int(s) for s in doc["shape"])
    try:
        dtype = np.dtype(doc["data_type"]).newbyteorder("<")
    except TypeError:
        return None, None
    if dtype.kind not in "biuf":
        return None, None
    template = _template(dtype, len(shape))
    grid = doc.get("chunk_grid", {}).get("configuration", {}).get("chunk_shape")
    same = (grid == [max(s, 1) for s in shape]
            and doc.get("codecs") == template["codecs"]
            and doc.get("chunk_key_encoding") == template["chunk_key_encoding"]
            and doc.get("storage_transformers", []) == [])
    return (shape, dtype) if same else (None, None)
