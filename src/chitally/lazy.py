"""Lazy point inputs: the same files :func:`chitally.sources.read_points` reads, in row blocks.

A cloud of 10^8-10^9 points does not fit one process comfortably, so a cluster plans on
a :class:`PointSource` instead of an array: it knows its shape and natural block size
from metadata alone, reads any row range on demand, validates each block exactly as
``read_points`` validates the whole (same one-line messages, naming rows of the whole
input), and pickles to a few hundred bytes so Dask can ship it to workers. Files are
opened on first use in each process and their handles are never pickled.

Formats and their natural blocks: ``.npy`` (memory-mapped locally; 1<<20 rows), Zarr
v2 and v3 (chunk or shard rows), HDF5 (chunk rows, else 1<<20), Parquet (row groups),
text tables (1<<20 rows, sequential only) and ``.npz`` (read whole, 1<<20 rows).
This module reads only; it plans and computes nothing.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass, field, fields
from typing import Any, Protocol, runtime_checkable

import fsspec
import fsspec.core
import numpy as np

from . import sources as _s
from .validate import InputError, _check_shape_and_dtype, _checked_values

__all__ = ["DEFAULT_BLOCK_ROWS", "ArraySource", "PointSource", "open_points"]

#: Block size, in rows, of formats with no block structure of their own.
DEFAULT_BLOCK_ROWS = 1 << 20


@runtime_checkable
class PointSource(Protocol):
    """An (n_rows, dim) point set read in row ranges; every block comes back validated."""

    name: str
    n_rows: int
    dim: int
    block_rows: int
    random_access: bool

    def read(self, start: int, stop: int) -> np.ndarray: ...

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]: ...

    def token(self) -> str: ...


# --------------------------------------------------------------------------- base


def _check_range(name: str, n_rows: int, start: Any, stop: Any) -> tuple[int, int]:
    if not (isinstance(start, (int, np.integer)) and isinstance(stop, (int, np.integer))):
        raise TypeError(f"{name}: start and stop must be integers, got {start!r}, {stop!r}")
    start, stop = int(start), int(stop)
    if not 0 <= start <= stop <= n_rows:
        raise ValueError(f"{name}: rows [{start}, {stop}) are not within [0, {n_rows}]")
    return start, stop


def _check_rows(name: str, rows: Any, default: int) -> int:
    if rows is None:
        return default
    if isinstance(rows, bool) or not isinstance(rows, (int, np.integer)) or rows < 1:
        raise ValueError(f"{name}: rows per block must be an integer >= 1, got {rows!r}")
    return int(rows)


def _info_token(src: _s._Source, paths: tuple[str, ...] = ("",)) -> dict[str, Any]:
    """Size and modification stamps of the source (and of ``paths`` inside a directory)."""
    keep = ("size", "mtime", "ETag", "etag", "LastModified", "last_modified", "updated",
            "generation", "created", "modified", "version_id")
    fs, root = fsspec.core.url_to_fs(src.text, **src.options)
    stamps: dict[str, Any] = {}
    for sub in paths:
        path = f"{root.rstrip('/')}/{sub}" if sub else root
        try:
            info = fs.info(path)
        except (OSError, ValueError):
            continue  # a metadata file of the other Zarr version, say
        stamps[sub or "."] = {k: str(info[k]) for k in keep if k in info}
    return stamps


@dataclass(frozen=True)
class _Lazy:
    """Shared behaviour: range checks, block iteration, pickling without handles."""

    name: str
    n_rows: int
    dim: int
    block_rows: int
    random_access: bool

    # Subclasses read raw rows [start, stop) of the selected data (any real dtype).
    def _raw(self, start: int, stop: int) -> np.ndarray:
        raise NotImplementedError

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)`` as a new C-contiguous float64 array, validated.

        Raises
        ------
        InputError
            As :func:`chitally.sources.read_points` would for the same fault, naming
            the row of the whole input.
        ValueError
            If the range is not within ``[0, n_rows]``.
        """
        start, stop = _check_range(self.name, self.n_rows, start, stop)
        block = _checked_values(self._raw(start, stop), self.name, start)
        if not (block.flags.owndata and block.flags.writeable):
            # A private copy: a block must outlive a memory map or the caller's array.
            block = block.copy()
        return block

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in order, ``rows`` rows each (default ``block_rows``)."""
        step = _check_rows(self.name, rows, self.block_rows)
        for start in range(0, self.n_rows, step):
            yield start, self.read(start, min(self.n_rows, start + step))

    def __getstate__(self) -> dict[str, Any]:
        # Only the dataclass fields travel; open files and caches are per process.
        return {f.name: getattr(self, f.name) for f in fields(self)}

    def __setstate__(self, state: dict[str, Any]) -> None:
        for k, v in state.items():
            object.__setattr__(self, k, v)

    def _cached(self, attr: str, make: Any) -> Any:
        value = self.__dict__.get(attr)
        if value is None:
            value = make()
            object.__setattr__(self, attr, value)
        return value


@dataclass(frozen=True)
class _FileSource(_Lazy):
    src: _s._Source = field(repr=False)
    key: str | None
    fmt_detail: str  # dtype (arrays) or column types (tables), for the token

    def _token_parts(self) -> dict[str, Any]:
        return {"format": self.src.fmt, "path": self.src.display, "key": self.key,
                "shape": [self.n_rows, self.dim], "dtype": self.fmt_detail,
                "stamps": _info_token(self.src)}

    def token(self) -> str:
        """Cheap identity for fingerprints: format, path, selection, shape, dtype and the
        file's size and modification stamp (mtime or etag) from fsspec; no data is read."""
        return json.dumps(self._token_parts(), sort_keys=True, default=str)


# --------------------------------------------------------------------------- npy / npz


@dataclass(frozen=True)
class NpySource(_FileSource):
    """A ``.npy`` file. Local files are memory-mapped, so a block costs only its own
    rows; an fsspec URL is read whole into memory on first use in each process."""

    def _array(self) -> np.ndarray:
        return self._cached("_data", lambda: _s._read_npy(self.src, None))

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return self._array()[start:stop]


@dataclass(frozen=True)
class NpzSource(_FileSource):
    """One array of an ``.npz`` archive. Archive members cannot be memory-mapped, so the
    array is read whole on first use in each process; only the blocks are lazy."""

    def _array(self) -> np.ndarray:
        return self._cached("_data", lambda: _s._read_npz(self.src, self.key)[0])

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return self._array()[start:stop]


# --------------------------------------------------------------------------- Zarr, HDF5


@dataclass(frozen=True)
class ZarrSource(_FileSource):
    """A Zarr (v2 or v3) array, alone or in a group; a block is one chunk (or shard) of rows."""

    def _node(self) -> Any:
        return self._cached("_handle", lambda: _s._zarr_array(self.src, self.key)[0])

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return _s._zarr_rows(self._node(), self.name, start, stop)

    def _token_parts(self) -> dict[str, Any]:
        parts = super()._token_parts()
        # A directory's own stamp need not change when its arrays are rewritten; the
        # array's metadata document is rewritten whenever the array is created anew.
        inner = (self.key or "").strip("/")
        docs = tuple(f"{inner}/{doc}".lstrip("/") for doc in ("zarr.json", ".zarray"))
        parts["stamps"] = _info_token(self.src, ("", *docs))
        return parts


@dataclass(frozen=True)
class Hdf5Source(_FileSource):
    """An HDF5 dataset read by h5py slicing; a block is one chunk of rows (or 1<<20 rows
    for a contiguous dataset)."""

    def _node(self) -> Any:
        def make() -> Any:
            stack = _s._hdf5_file(self.src)
            h5 = stack.__enter__()
            # The context stays open for the life of this object in this process.
            object.__setattr__(self, "_stack", stack)
            return _s._hdf5_dataset(h5, self.src, self.key)[0]

        return self._cached("_handle", make)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        try:
            return np.asarray(self._node()[start:stop])
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise InputError(f"{self.name}: cannot read as HDF5: {_s._one_line(exc)}") from exc


# --------------------------------------------------------------------------- Parquet


@dataclass(frozen=True)
class ParquetSource(_FileSource):
    """Chosen columns of a Parquet file; blocks are its row groups (``block_rows`` is the
    largest), and a range reads only the row groups it overlaps."""

    columns: tuple[int | str, ...] | None = None
    index_col: int | str | None = None
    group_starts: tuple[int, ...] = ()  # first row of each row group, then n_rows

    def _open(self) -> tuple[Any, list[str]]:
        def make() -> tuple[Any, list[str]]:
            cm = _s._parquet_file(self.src, self.key, self.columns, self.index_col)
            pf, names, _ = cm.__enter__()
            object.__setattr__(self, "_stack", cm)
            return pf, names

        return self._cached("_handle", make)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        pf, names = self._open()
        starts = self.group_starts
        first = int(np.searchsorted(starts, start, side="right")) - 1
        last = int(np.searchsorted(starts, stop, side="left"))
        groups = list(range(max(first, 0), min(last, pf.num_row_groups)))
        if stop == start or not groups:
            return np.empty((0, self.dim))
        table = pf.read_row_groups(groups, columns=list(dict.fromkeys(names)))
        offset = start - starts[groups[0]]
        table = table.slice(offset, stop - start)
        return _s._parquet_points(table, names, self.name, start)

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in order: one per row group by default, else
        ``rows`` rows each."""
        if rows is not None:
            yield from super().blocks(rows)
            return
        starts = self.group_starts
        for a, b in zip(starts[:-1], starts[1:]):
            if b > a:
                yield a, self.read(a, b)

    def _token_parts(self) -> dict[str, Any]:
        parts = super()._token_parts()
        parts["columns"] = None if self.columns is None else list(self.columns)
        parts["index_col"] = self.index_col
        return parts


# --------------------------------------------------------------------------- text


@dataclass(frozen=True)
class TextSource(_FileSource):
    """A text table parsed in blocks of rows, with the sniffing, header and column rules
    of :func:`chitally.sources.read_points`.

    Text has no index of rows, so it is read sequentially: :meth:`blocks` is one pass
    over the file, but :meth:`read` scans from the beginning of the file every time
    (correct, slow for late ranges), and ``random_access`` is False. Opening the source
    counts its rows, which is also a pass over the file.
    """

    columns: tuple[int | str, ...] | None = None
    index_col: int | str | None = None

    def _table(self) -> Any:
        return _s._text_table(self.src, self.key, self.columns, self.index_col)

    def _parse(self, table: Any, chunk: list[str], first_row: int) -> np.ndarray:
        data = _s._parse_text_lines(table, chunk)
        if data.shape[1] != self.dim:
            # Rows of another width in a later block: let the locator name the first.
            raise ValueError(f"rows of {data.shape[1]} columns, the first have {self.dim}")
        return _checked_values(data, self.name, first_row)

    def _chunks(self, step: int, start: int, stop: int) -> Iterator[tuple[int, np.ndarray]]:
        """Parse and validate data rows [start, stop) in chunks of ``step``, one pass."""
        row = 0  # data rows seen so far
        with self._table() as table:
            chunk: list[str] = []
            for line in table.lines:
                if row >= stop:
                    break
                if not _s._content(line).strip():
                    continue
                row += 1
                if row <= start:
                    continue  # counted, not parsed: a range validates only its own rows
                chunk.append(line)
                if len(chunk) == step:
                    yield row - step, self._parse(table, chunk, row - step)
                    chunk = []
            if chunk:
                yield row - len(chunk), self._parse(table, chunk, row - len(chunk))
        if row < stop:
            raise InputError(f"{self.name}: now has {row} data rows, not {self.n_rows}; the file changed")

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in one sequential pass, ``rows`` rows each."""
        yield from self._chunks(_check_rows(self.name, rows, self.block_rows), 0, self.n_rows)

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)``, validated; scans the file from its beginning."""
        start, stop = _check_range(self.name, self.n_rows, start, stop)
        if stop == start:
            return np.empty((0, self.dim))
        return next(self._chunks(stop - start, start, stop))[1]


def _count_text_rows(src: _s._Source, key: Any, columns: Any, index_col: Any) -> tuple[int, int, str]:
    with _s._text_table(src, key, columns, index_col) as table:
        n = sum(1 for line in table.lines if _s._content(line).strip())
        dim, where = table.dim, table.where
    if n == 0:
        raise InputError(f"{src.display}: holds no data rows")
    return n, dim, where


# --------------------------------------------------------------------------- in memory


@dataclass(frozen=True, eq=False)
class ArraySource(_Lazy):
    """An in-memory (n, m) array behind the :class:`PointSource` interface.

    Use :meth:`of` to build one. The array travels with the object when pickled. Its
    :meth:`token` hashes the contents (once per process), since an array has no path
    or modification time to stand for it.
    """

    array: np.ndarray = field(default=None, repr=False)  # type: ignore[assignment]

    @classmethod
    def of(cls, array: Any, *, name: str = "points", block_rows: int = DEFAULT_BLOCK_ROWS) -> ArraySource:
        """Wrap ``array`` (shape and dtype checked now, values as each block is read)."""
        try:
            a = np.asarray(array)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{name}: not an (n, m) array of numbers: {_s._one_line(exc)}") from exc
        _check_shape_and_dtype(a.shape, a.dtype, name)
        rows = _check_rows(name, block_rows, DEFAULT_BLOCK_ROWS)
        return cls(name, a.shape[0], a.shape[1], rows, True, a)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return self.array[start:stop]

    def token(self) -> str:
        """Shape, dtype and a BLAKE2 digest of the contents, hashed block by block."""

        def digest() -> str:
            h = hashlib.blake2b(digest_size=16)
            for start in range(0, self.n_rows, self.block_rows):
                h.update(np.ascontiguousarray(self.array[start : start + self.block_rows]).tobytes())
            return h.hexdigest()

        return json.dumps({"format": "array", "shape": [self.n_rows, self.dim],
                           "dtype": str(self.array.dtype), "blake2b": self._cached("_digest", digest)},
                          sort_keys=True)


# --------------------------------------------------------------------------- public


def open_points(
    source: str | os.PathLike[str],
    *,
    key: str | None = None,
    columns: Any = None,
    index_col: int | str | None = None,
    storage_options: dict[str, Any] | None = None,
) -> PointSource:
    """Open a point input lazily: metadata now, data block by block.

    Parameters
    ----------
    source, key, columns, index_col, storage_options
        As for :func:`chitally.sources.read_points`, with the same meaning and checks.

    Returns
    -------
    PointSource
        A picklable source whose blocks, concatenated, equal ``read_points(...)`` bit
        for bit. Its ``block_rows`` is the format's natural block: Zarr chunk (or shard)
        rows, HDF5 chunk rows, the largest Parquet row group, else 1<<20 rows.

    Raises
    ------
    InputError
        For everything :func:`~chitally.sources.read_points` refuses before reading
        values (missing file, unknown type, key or column choices, shape, dtype); a bad
        value is refused by the ``read`` or ``blocks`` call that meets it, naming its
        row in the whole input.

    Notes
    -----
    A local ``.npy`` is memory-mapped; an ``.npy`` URL and an ``.npz`` member are read
    whole on first use in each process (neither can be mapped). A text table is read
    sequentially: opening it counts its rows and ``read`` scans from the top.

    Examples
    --------
    >>> import numpy as np, fsspec
    >>> with fsspec.open("memory://lazy-example.npy", "wb") as f:
    ...     np.save(f, np.arange(10.0).reshape(5, 2))
    >>> src = open_points("memory://lazy-example.npy")
    >>> src.n_rows, src.dim, src.read(1, 3).tolist()
    (5, 2, [[2.0, 3.0], [4.0, 5.0]])
    """
    src, chosen, drop = _s._resolve(source, columns, index_col, storage_options)
    name = src.display
    if src.fmt == "npy":
        a = _s._read_npy(src, key)
        _check_shape_and_dtype(a.shape, a.dtype, name)
        s: _Lazy = NpySource(name, a.shape[0], a.shape[1], DEFAULT_BLOCK_ROWS, True, src, None, str(a.dtype))
        object.__setattr__(s, "_data", a)  # the map (or array) already open in this process
        return s  # type: ignore[return-value]
    if src.fmt == "npz":
        a, name = _s._read_npz(src, key)
        _check_shape_and_dtype(a.shape, a.dtype, name)
        s = NpzSource(name, a.shape[0], a.shape[1], DEFAULT_BLOCK_ROWS, True, src, key, str(a.dtype))
        object.__setattr__(s, "_data", a)
        return s  # type: ignore[return-value]
    if src.fmt == "zarr":
        node, name = _s._zarr_array(src, key)
        shards = getattr(node, "shards", None)
        rows = int((shards or node.chunks)[0])
        return ZarrSource(name, node.shape[0], node.shape[1], max(rows, 1), True, src, key,  # type: ignore[return-value]
                          str(np.dtype(node.dtype)))
    if src.fmt == "hdf5":
        with _s._hdf5_file(src) as h5:
            node, name = _s._hdf5_dataset(h5, src, key)
            rows = int(node.chunks[0]) if node.chunks else DEFAULT_BLOCK_ROWS
            return Hdf5Source(name, node.shape[0], node.shape[1], rows, True, src, key,  # type: ignore[return-value]
                              str(node.dtype))
    if src.fmt == "parquet":
        with _s._parquet_file(src, key, chosen, drop) as (pf, names, name):
            meta = pf.metadata
            sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
            starts = tuple(int(x) for x in np.concatenate([[0], np.cumsum(sizes, dtype=np.int64)]))
            n = starts[-1]
            if n == 0:
                raise InputError(f"{name}: expected at least one point with at least one coordinate, "
                                 f"got shape {(0, len(names))}")
            types = ",".join(f"{c}:{pf.schema_arrow.field(c).type}" for c in names)
            return ParquetSource(name, n, len(names), max(max(sizes), 1), True, src, key, types,  # type: ignore[return-value]
                                 chosen, drop, starts)
    n, dim, name = _count_text_rows(src, key, chosen, drop)
    return TextSource(name, n, dim, DEFAULT_BLOCK_ROWS, False, src, key, "text",  # type: ignore[return-value]
                      chosen, drop)
