"""Lazy point inputs: the files :func:`chitally.sources.read_points` reads, in row blocks.

A cloud of 10^8-10^9 points does not fit one process, so a cluster plans on a
:class:`PointSource` instead of an array: it knows its shape and natural block size from
metadata alone, reads any row range on demand, validates each block exactly as
``read_points`` validates the whole (the same one-line messages, naming rows of the
whole input), and pickles to a few hundred bytes so that workers can be sent it. Files
are opened on first use in each process and open handles are never pickled.

``read_points`` itself is ``open`` + :meth:`read_all` of these sources, so the two
never disagree about a file. This module reads only; it plans and computes nothing.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import os
import struct
import zipfile
from collections.abc import Iterator
from dataclasses import dataclass, field, fields
from typing import Any, Protocol, runtime_checkable

import fsspec
import fsspec.core
import numpy as np

from . import sources as _s
from .validate import InputError, _check_shape_and_dtype, _checked_values, _one_line

__all__ = [
    "DEFAULT_BLOCK_ROWS",
    "ArraySource",
    "PointSource",
    "content_digest",
    "open_points",
]

#: Block size, in rows, of formats with no block structure of their own.
DEFAULT_BLOCK_ROWS = 1 << 20


@runtime_checkable
class PointSource(Protocol):
    """An (n_rows, dim) point set read in row ranges; every block comes back validated.

    Attributes
    ----------
    name : str
        How messages name the input (no password; the key or columns when chosen).
    n_rows, dim : int
        Shape of the whole input.
    block_rows : int
        The format's natural block: Zarr chunk (or shard) rows, HDF5 chunk rows, the
        largest Parquet row group, else :data:`DEFAULT_BLOCK_ROWS`.
    random_access : bool
        False where a range can only be reached by reading from the start (text).
    """

    name: str
    n_rows: int
    dim: int
    block_rows: int
    random_access: bool

    def read(self, start: int, stop: int) -> np.ndarray: ...

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]: ...

    def read_all(self) -> np.ndarray: ...

    def token(self) -> str: ...


# --------------------------------------------------------------------------- base


def _check_range(name: str, n_rows: int, start: Any, stop: Any) -> tuple[int, int]:
    if isinstance(start, bool) or isinstance(stop, bool) or not (
        isinstance(start, (int, np.integer)) and isinstance(stop, (int, np.integer))
    ):
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


# Keys of fsspec ``info`` that change when a file is rewritten, across backends.
_STAMP_KEYS = (
    "size", "mtime", "ETag", "etag", "LastModified", "last_modified", "updated",
    "generation", "created", "modified", "version_id",
)


def _info_stamps(src: _s._Source, inner: tuple[str, ...] = ("",)) -> dict[str, Any]:
    """Size and modification stamps of the source (and of paths ``inner`` below it)."""
    try:
        fs, root = fsspec.core.url_to_fs(src.text, **src.options)
    except (ImportError, ValueError) as exc:
        raise InputError(f"{src.display}: cannot open this URL: {_one_line(exc)}") from exc
    stamps: dict[str, Any] = {}
    for sub in inner:
        path = f"{root.rstrip('/')}/{sub}" if sub else root
        try:
            info = fs.info(path)
        except (OSError, ValueError):
            continue  # the metadata document of the other Zarr version, say
        stamps[sub or "."] = {k: str(info[k]) for k in _STAMP_KEYS if k in info}
    return stamps


@dataclass(frozen=True)
class _Lazy:
    """What every source shares: range checks, blocks, pickling without open handles."""

    name: str
    n_rows: int
    dim: int
    block_rows: int
    random_access: bool

    # True where _raw may return a view of memory that outlives the call (a file mapping,
    # a cached or wrapped array): read() then copies, so no block aliases the input.
    _shared_raw = False

    def _raw(self, start: int, stop: int) -> np.ndarray:
        """Rows [start, stop) of the chosen data in its own real dtype, unchecked."""
        raise NotImplementedError

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)`` as a new C-contiguous float64 array, validated.

        Parameters
        ----------
        start, stop : int
            Row range of the whole input, ``0 <= start <= stop <= n_rows``.

        Returns
        -------
        numpy.ndarray
            Shape ``(stop - start, dim)``, owned and writable (never a view of a file
            mapping or of a wrapped array).

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
        if not block.flags.writeable or (self._shared_raw and not block.flags.owndata):
            block = block.copy()
        return block

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in order, ``rows`` rows each (default ``block_rows``).

        Each block is validated as :meth:`read` validates; only one block is held at a time.
        """
        step = _check_rows(self.name, rows, self.block_rows)
        for start in range(0, self.n_rows, step):
            yield start, self.read(start, min(self.n_rows, start + step))

    def read_all(self) -> np.ndarray:
        """The whole input, validated: what :func:`chitally.sources.read_points` returns.

        Unlike :meth:`read`, no defensive copy is made: a local float64 ``.npy`` comes
        back as its read-only memory map.
        """
        return _checked_values(self._raw(0, self.n_rows), self.name, 0)

    def __getstate__(self) -> dict[str, Any]:
        # Only the dataclass fields travel; open files and caches belong to one process.
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
    dtype: str  # the stored dtype (arrays) or column types (tables), for the token

    def _token_parts(self) -> dict[str, Any]:
        path = self.src.display if self.src.is_url else os.path.abspath(self.src.text)
        return {
            "format": self.src.fmt,
            "path": path,
            "key": self.key,
            "shape": [self.n_rows, self.dim],
            "dtype": self.dtype,
            "stamps": _info_stamps(self.src),
        }

    def token(self) -> str:
        """A cheap identity for fingerprints; reads metadata, not data.

        Returns
        -------
        str
            JSON of the format, absolute path or password-free URL, key or columns,
            shape, dtype and the file's size and modification stamps (mtime, etag, ...)
            from fsspec ``info``. It changes when the file is rewritten; it is not a
            content hash (see :func:`content_digest`).
        """
        return json.dumps(self._token_parts(), sort_keys=True, default=str)


# --------------------------------------------------------------------------- npy / npz


@dataclass(frozen=True)
class _Layout:
    """Where an uncompressed array lies in a file: byte offset, shape, dtype, order."""

    offset: int
    shape: tuple[int, ...]
    dtype: np.dtype
    fortran: bool

    @property
    def nbytes(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64)) * self.dtype.itemsize


def _npy_layout(f: Any, end: int | None) -> _Layout | None:
    """The array behind the ``.npy`` header at ``f``'s position, or None when it cannot
    be read by byte ranges (then it is read whole, with numpy's own messages)."""
    fmt = np.lib.format
    try:
        version = fmt.read_magic(f)
        if version == (1, 0):
            shape, fortran, dtype = fmt.read_array_header_1_0(f)
        elif version == (2, 0):
            shape, fortran, dtype = fmt.read_array_header_2_0(f)
        else:
            return None
        offset = f.tell()
    except (ValueError, OSError, EOFError, SyntaxError):
        return None
    layout = _Layout(offset, tuple(shape), np.dtype(dtype), bool(fortran))
    if layout.dtype.hasobject or (end is not None and offset + layout.nbytes > end):
        return None  # pickled objects, or a truncated file
    return layout


@dataclass(frozen=True)
class _NumpyFile(_FileSource):
    """Shared by ``.npy`` files and ``.npz`` members: a memory map of a local file,
    byte ranges of a URL, or (``layout`` None) the whole array read on first use."""

    layout: _Layout | None = None
    _shared_raw = True

    def _whole(self) -> np.ndarray:
        raise NotImplementedError

    def _kind(self) -> str:
        return f".{self.src.fmt}"

    def _raw(self, start: int, stop: int) -> np.ndarray:
        lay = self.layout
        if lay is None:
            return self._cached("_data", self._whole)[start:stop]
        try:
            if not self.src.is_url:
                mapped = self._cached("_data", lambda: np.memmap(
                    self.src.text, dtype=lay.dtype, mode="r", offset=lay.offset,
                    shape=lay.shape, order="F" if lay.fortran else "C",
                ))
                return mapped[start:stop]
            return self._ranges(lay, start, stop)
        except (OSError, ValueError) as exc:
            raise InputError(f"{self.src.display}: cannot read as {self._kind()}: {_one_line(exc)}") from exc

    def _ranges(self, lay: _Layout, start: int, stop: int) -> np.ndarray:
        fs, path = self._cached("_fs", lambda: fsspec.core.url_to_fs(self.src.text, **self.src.options))
        k, item = stop - start, lay.dtype.itemsize
        if k == 0:
            return np.empty((0, self.dim), dtype=lay.dtype)
        if not lay.fortran:
            row = item * self.dim
            data = fs.cat_file(path, start=lay.offset + start * row, end=lay.offset + stop * row)
            return np.frombuffer(data, dtype=lay.dtype, count=k * self.dim).reshape(k, self.dim)
        # Column-major: each column's rows are one range.
        out = np.empty((k, self.dim), dtype=lay.dtype)
        for j in range(self.dim):
            first = lay.offset + (j * self.n_rows + start) * item
            out[:, j] = np.frombuffer(fs.cat_file(path, start=first, end=first + k * item), dtype=lay.dtype, count=k)
        return out


@dataclass(frozen=True)
class NpySource(_NumpyFile):
    """A ``.npy`` file: memory-mapped when local, read by byte ranges from a URL, so a
    block costs only its own rows. ``block_rows`` is :data:`DEFAULT_BLOCK_ROWS`."""

    def _whole(self) -> np.ndarray:
        return np.asarray(_s._read_npy(self.src, None))


@dataclass(frozen=True)
class NpzSource(_NumpyFile):
    """One array of an ``.npz`` archive.

    A member stored uncompressed (``numpy.savez``) is read lazily like a ``.npy``: mapped
    locally, by byte ranges from a URL. A compressed member (``numpy.savez_compressed``)
    cannot be sliced, so it is read whole into memory on first use in each process;
    ``stored`` says which, and ``block_rows`` is :data:`DEFAULT_BLOCK_ROWS` either way.
    """

    stored: bool = False

    def _whole(self) -> np.ndarray:
        return _read_npz_member(self.src, self.key or "")


def _read_npz_member(src: _s._Source, key: str) -> np.ndarray:
    try:
        with src.open("rb") as f, np.load(f, allow_pickle=False) as z:
            return np.asarray(z[key])
    except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise InputError(f"{src.display}: cannot read as .npz: {_one_line(exc)}") from exc


def _open_npy(src: _s._Source, key: str | None) -> NpySource:
    _s._reject_key(src, key, "a .npy file holds one array")
    name = src.display
    data: np.ndarray | None = None
    layout: _Layout | None = None
    if not src.is_url:
        data = _s._read_npy(src, None)  # a memory map: reads the header only
        if isinstance(data, np.memmap):
            fortran = bool(data.flags.f_contiguous and not data.flags.c_contiguous)
            layout = _Layout(int(data.offset), data.shape, data.dtype, fortran)
    else:
        try:
            fs, path = fsspec.core.url_to_fs(src.text, **src.options)
            size = fs.size(path)
            with src.open("rb") as f:
                layout = _npy_layout(f, size)
        except (OSError, ValueError, EOFError) as exc:
            raise InputError(f"{src.display}: cannot read as .npy: {_one_line(exc)}") from exc
        if layout is None:
            data = np.asarray(_s._read_npy(src, None))  # numpy's message, or an odd but valid file
    shape, dtype = (data.shape, data.dtype) if layout is None else (layout.shape, layout.dtype)
    _check_shape_and_dtype(shape, dtype, name)
    source = NpySource(name, shape[0], shape[1], DEFAULT_BLOCK_ROWS, True, src, None, dtype.str, layout)
    if data is not None:
        object.__setattr__(source, "_data", data)  # already open here: keep it in this process
    return source


def _open_npz(src: _s._Source, key: str | None) -> NpzSource:
    layout: _Layout | None = None
    try:
        with src.open("rb") as f:
            archive = zipfile.ZipFile(f)
            members = archive.namelist()
            # numpy.load calls a member "a.npy" "a" (and takes its full name too).
            names = [m.removesuffix(".npy") for m in members]
            key, name = _s._npz_key(src, names, key)
            info = archive.getinfo(key if key in members else key + ".npy")
            if info.compress_type == zipfile.ZIP_STORED and not info.flag_bits & 1:
                f.seek(info.header_offset)
                head = f.read(30)
                if head[:4] == b"PK\x03\x04":
                    name_len, extra_len = struct.unpack("<HH", head[26:30])
                    start = info.header_offset + 30 + name_len + extra_len
                    f.seek(start)
                    layout = _npy_layout(f, start + info.file_size)
    except InputError:
        raise
    except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise InputError(f"{src.display}: cannot read as .npz: {_one_line(exc)}") from exc
    data = _read_npz_member(src, key) if layout is None else None
    shape, dtype = (data.shape, data.dtype) if data is not None else (layout.shape, layout.dtype)  # type: ignore[union-attr]
    _check_shape_and_dtype(shape, dtype, name)
    source = NpzSource(name, shape[0], shape[1], DEFAULT_BLOCK_ROWS, True, src, key, dtype.str,
                       layout, layout is not None)
    if data is not None:
        object.__setattr__(source, "_data", data)
    return source


# --------------------------------------------------------------------------- Zarr, HDF5


@dataclass(frozen=True)
class ZarrSource(_FileSource):
    """A Zarr (v2 or v3) array, alone or in a group; ``block_rows`` is its chunk rows
    (shard rows when sharded), so a block decodes each chunk it needs once."""

    def _node(self) -> Any:
        return self._cached("_handle", lambda: _s._zarr_array(self.src, self.key)[0])

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return _s._zarr_rows(self._node(), self.name, start, stop)

    def _token_parts(self) -> dict[str, Any]:
        parts = super()._token_parts()
        # A directory's own stamp need not change when an array in it is rewritten; the
        # array's metadata document is rewritten whenever the array is created anew.
        inner = (self.key or "").strip("/")
        docs = tuple(f"{inner}/{doc}".lstrip("/") for doc in ("zarr.json", ".zarray"))
        parts["stamps"] = _info_stamps(self.src, ("", *docs))
        return parts


def _open_zarr(src: _s._Source, key: str | None) -> ZarrSource:
    node, name = _s._zarr_array(src, key)
    rows = int((getattr(node, "shards", None) or node.chunks)[0])
    return ZarrSource(name, node.shape[0], node.shape[1], max(rows, 1), True, src, key, np.dtype(node.dtype).str)


@dataclass(frozen=True)
class Hdf5Source(_FileSource):
    """An HDF5 dataset read by h5py slicing; ``block_rows`` is its chunk rows
    (:data:`DEFAULT_BLOCK_ROWS` for a contiguous dataset)."""

    def _node(self) -> Any:
        def make() -> Any:
            opened = _s._hdf5_file(self.src)
            h5 = opened.__enter__()
            # The file stays open for the life of this object in this process.
            object.__setattr__(self, "_opened", opened)
            return _s._hdf5_dataset(h5, self.src, self.key)[0]

        return self._cached("_handle", make)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        node = self._node()
        try:
            return np.asarray(node[start:stop])
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise InputError(f"{self.src.display}: cannot read as HDF5: {_one_line(exc)}") from exc


def _open_hdf5(src: _s._Source, key: str | None) -> Hdf5Source:
    with _s._hdf5_file(src) as h5:
        node, name = _s._hdf5_dataset(h5, src, key)
        rows = int(node.chunks[0]) if node.chunks else DEFAULT_BLOCK_ROWS
        return Hdf5Source(name, node.shape[0], node.shape[1], max(rows, 1), True, src, key, node.dtype.str)


# --------------------------------------------------------------------------- Parquet


@dataclass(frozen=True)
class ParquetSource(_FileSource):
    """Chosen columns of a Parquet file. Blocks are its row groups by default
    (``block_rows`` is the largest); a range reads only the row groups it overlaps."""

    columns: tuple[int | str, ...] | None = None
    index_col: int | str | None = None
    group_starts: tuple[int, ...] = ()  # first row of each row group, then n_rows

    def _open(self) -> tuple[Any, list[str]]:
        def make() -> tuple[Any, list[str]]:
            opened = _s._parquet_file(self.src, self.key, self.columns, self.index_col)
            pf, names, _ = opened.__enter__()
            object.__setattr__(self, "_opened", opened)
            return pf, names

        return self._cached("_handle", make)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        pf, names = self._open()
        starts = self.group_starts
        first = max(int(np.searchsorted(starts, start, side="right")) - 1, 0)
        last = min(int(np.searchsorted(starts, stop, side="left")), len(starts) - 1)
        if stop == start:
            return np.empty((0, self.dim))
        import pyarrow as pa

        try:
            table = pf.read_row_groups(list(range(first, last)), columns=list(dict.fromkeys(names)))
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise InputError(f"{self.src.display}: cannot read as Parquet: {_one_line(exc)}") from exc
        table = table.slice(start - starts[first], stop - start)
        return _s._parquet_points(table, names, self.name, start)

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in order: one per row group by default, else
        ``rows`` rows each."""
        if rows is not None:
            yield from super().blocks(rows)
            return
        starts = self.group_starts
        for a, b in itertools.pairwise(starts):
            if b > a:
                yield a, self.read(a, b)

    def _token_parts(self) -> dict[str, Any]:
        parts = super()._token_parts()
        parts["columns"] = None if self.columns is None else list(self.columns)
        parts["index_col"] = self.index_col
        return parts


def _open_parquet(src: _s._Source, key: str | None, chosen: Any, drop: Any) -> ParquetSource:
    with _s._parquet_file(src, key, chosen, drop) as (pf, names, name):
        meta = pf.metadata
        sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        types = ",".join(f"{c}:{pf.schema_arrow.field(c).type}" for c in names)
    starts = tuple(int(x) for x in np.concatenate([[0], np.cumsum(sizes, dtype=np.int64)]))
    n = starts[-1]
    # The message validate_points gives an empty array, as read_points has always said.
    _check_shape_and_dtype((n, len(names)), np.dtype(np.float64), name)
    return ParquetSource(name, n, len(names), max(max(sizes), 1), True, src, key, types, chosen, drop, starts)


# --------------------------------------------------------------------------- text


@dataclass(frozen=True)
class TextSource(_FileSource):
    """A text table parsed in blocks of rows, with the sniffing, header and column rules
    of :func:`chitally.sources.read_points` (settled once, when the file is opened).

    Text has no index of rows, so it is read sequentially and ``random_access`` is
    False: :meth:`blocks` is one pass over the file, :meth:`read` scans from the top
    each time (correct, slow for late ranges), and opening counts the rows, one more
    pass. A bad cell is named by its row and line in the whole file, as read_points
    names it.
    """

    columns: tuple[int | str, ...] | None = None
    index_col: int | str | None = None

    def _table(self) -> Any:
        return _s._text_table(self.src, self.key, self.columns, self.index_col)

    def _parse(self, table: Any, chunk: list[str], first_row: int) -> np.ndarray:
        data = _s._parse_text_lines(table, chunk)
        if data.shape[1] != self.dim:
            # Rows of another width in a later block: the table's locator names the first.
            raise ValueError(f"rows of {data.shape[1]} columns, the first have {self.dim}")
        return _checked_values(data, self.name, first_row)

    def _chunks(self, table: Any, step: int, start: int, stop: int) -> Iterator[tuple[int, list[str]]]:
        """Lines of data rows [start, stop) in lists of at most ``step``; rows before
        ``start`` are counted, not parsed. Checks the row count on a full pass."""
        row, first, chunk = 0, start, []
        for line in table.lines:
            if not _s._content(line).strip():
                continue  # blank and comment lines are no rows
            if row >= start:
                chunk.append(line)
                if len(chunk) == step:
                    yield first, chunk
                    first, chunk = first + step, []
            row += 1
            if row >= stop:
                break
        if chunk:
            yield first, chunk
        if row < stop:
            raise InputError(f"{self.name}: now has {row} data rows, not {self.n_rows}; the file changed")

    def blocks(self, rows: int | None = None) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first row, block)`` in one sequential pass, ``rows`` rows each."""
        step = _check_rows(self.name, rows, self.block_rows)
        with self._table() as table:
            for first, chunk in self._chunks(table, step, 0, self.n_rows):
                yield first, self._parse(table, chunk, first)

    def read(self, start: int, stop: int) -> np.ndarray:
        """Rows ``[start, stop)``, validated; counts lines from the top of the file to
        reach ``start``, parsing only the rows asked for."""
        start, stop = _check_range(self.name, self.n_rows, start, stop)
        parts: list[np.ndarray] = [np.empty((0, self.dim))]
        if stop > start:
            with self._table() as table:
                for first, chunk in self._chunks(table, self.block_rows, start, stop):
                    parts.append(self._parse(table, chunk, first))
        return np.concatenate(parts)

    def read_all(self) -> np.ndarray:
        """The whole table in one parse, as read_points has always read it."""
        data, _ = _s._read_text(self.src, self.key, self.columns, self.index_col)
        return _checked_values(data, self.name, 0)


def _open_text(src: _s._Source, key: str | None, chosen: Any, drop: Any, count_rows: bool) -> TextSource:
    n = -1
    with _s._text_table(src, key, chosen, drop) as table:
        if count_rows:
            n = sum(1 for line in table.lines if _s._content(line).strip())
        dim, name = table.dim, table.where
    if n == 0:
        raise InputError(f"{src.display}: holds no data rows")
    return TextSource(name, n, dim, DEFAULT_BLOCK_ROWS, False, src, key, "text", chosen, drop)


# --------------------------------------------------------------------------- in memory


@dataclass(frozen=True, eq=False, init=False)
class ArraySource(_Lazy):
    """An in-memory (n, m) array behind the :class:`PointSource` interface.

    Parameters
    ----------
    array : array_like
        n points in R^m; shape and dtype are checked now, values as each block is read.
    name : str, optional
        How messages name it. Default ``"points"``, as :func:`validate_points` says.
    block_rows : int, optional
        Rows per block. Default :data:`DEFAULT_BLOCK_ROWS`.

    Notes
    -----
    The array travels with the object when pickled. :meth:`token` hashes the contents
    (once per process), since an array has no path or modification time to stand for it.

    Examples
    --------
    >>> src = ArraySource([[0, 1], [2, 3], [4, 5]], block_rows=2)
    >>> [(start, block.tolist()) for start, block in src.blocks()]
    [(0, [[0.0, 1.0], [2.0, 3.0]]), (2, [[4.0, 5.0]])]
    """

    array: np.ndarray = field(repr=False)
    _shared_raw = True

    def __init__(self, array: Any, *, name: str = "points", block_rows: int = DEFAULT_BLOCK_ROWS) -> None:
        try:
            a = np.asarray(array)
        except (ValueError, TypeError) as exc:
            raise InputError(f"{name}: not an (n, m) array of numbers: {_one_line(exc)}") from exc
        _check_shape_and_dtype(a.shape, a.dtype, name)
        rows = _check_rows(name, block_rows, DEFAULT_BLOCK_ROWS)
        for attr, value in (("name", name), ("n_rows", a.shape[0]), ("dim", a.shape[1]),
                            ("block_rows", rows), ("random_access", True), ("array", a)):
            object.__setattr__(self, attr, value)

    def _raw(self, start: int, stop: int) -> np.ndarray:
        return self.array[start:stop]

    def token(self) -> str:
        """Shape, dtype and a BLAKE2b digest of the stored bytes, hashed block by block."""

        def digest() -> str:
            h = hashlib.blake2b(digest_size=16)
            for start in range(0, self.n_rows, self.block_rows):
                h.update(np.ascontiguousarray(self.array[start : start + self.block_rows]).data)
            return h.hexdigest()

        return json.dumps(
            {"format": "array", "shape": [self.n_rows, self.dim], "dtype": self.array.dtype.str,
             "blake2b": self._cached("_digest", digest)},
            sort_keys=True,
        )


# --------------------------------------------------------------------------- public


def content_digest(source: PointSource, rows: int | None = None) -> str:
    """A digest of a source's validated float64 rows, streamed block by block.

    Parameters
    ----------
    source : PointSource
        Any source; it is read once, in order.
    rows : int, optional
        Rows per block read (default the source's ``block_rows``); the digest does not
        depend on it.

    Returns
    -------
    str
        Hex BLAKE2b (32 bytes) of the shape and the little-endian float64 values in row
        order: equal for the same points stored in any format or dtype that reads to
        the same float64 values. Memory is bounded by one block.

    Raises
    ------
    InputError
        As the source's :meth:`~PointSource.blocks` raises for a bad value.
    """
    h = hashlib.blake2b(digest_size=32)
    h.update(f"chitally points float64<\n{source.n_rows} {source.dim}\n".encode())
    for _, block in source.blocks(rows):
        h.update(np.ascontiguousarray(block, dtype="<f8").data)
    return h.hexdigest()


def _open(
    source: Any,
    key: str | None,
    columns: Any,
    index_col: Any,
    storage_options: dict[str, Any] | None,
    *,
    count_rows: bool = True,
) -> _Lazy:
    # count_rows=False leaves a text table's n_rows at -1: only for read_all, which then
    # reads the file once instead of twice.
    src, chosen, drop = _s._resolve(source, columns, index_col, storage_options)
    if src.fmt == "npy":
        return _open_npy(src, key)
    if src.fmt == "npz":
        return _open_npz(src, key)
    if src.fmt == "zarr":
        return _open_zarr(src, key)
    if src.fmt == "hdf5":
        return _open_hdf5(src, key)
    if src.fmt == "parquet":
        return _open_parquet(src, key, chosen, drop)
    return _open_text(src, key, chosen, drop, count_rows)


def open_points(
    source: str | os.PathLike[str],
    *,
    key: str | None = None,
    columns: Any = None,
    index_col: int | str | None = None,
    storage_options: dict[str, Any] | None = None,
) -> PointSource:
    """Open a point input lazily: metadata now, values block by block.

    Parameters
    ----------
    source, key, columns, index_col, storage_options
        As for :func:`chitally.sources.read_points`, with the same meaning and checks.

    Returns
    -------
    PointSource
        A picklable source whose blocks, concatenated, equal ``read_points(...)`` bit
        for bit, and whose ``read_all()`` is ``read_points(...)``.

    Raises
    ------
    InputError
        For everything :func:`~chitally.sources.read_points` refuses before reading
        values (missing file, unknown type, key and column choices, shape, dtype), in
        the same words; a bad value is refused by the ``read`` or ``blocks`` call that
        meets it, naming its row (and column) in the whole input.

    Notes
    -----
    Natural blocks (``block_rows``): Zarr chunk or shard rows; HDF5 chunk rows; the
    largest Parquet row group (and ``blocks()`` follows the row groups); otherwise
    :data:`DEFAULT_BLOCK_ROWS`. A local ``.npy`` and an uncompressed ``.npz`` member are
    memory-mapped, and read by byte ranges from a URL; a compressed ``.npz`` member is
    read whole on first use in each process. A text table is read sequentially:
    opening it counts its rows, and ``read`` scans from the top.

    Examples
    --------
    >>> import numpy as np, fsspec
    >>> with fsspec.open("memory://lazy-example.npy", "wb") as f:
    ...     np.save(f, np.arange(10.0).reshape(5, 2))
    >>> src = open_points("memory://lazy-example.npy")
    >>> src.n_rows, src.dim, src.read(1, 3).tolist()
    (5, 2, [[2.0, 3.0], [4.0, 5.0]])
    """
    return _open(source, key, columns, index_col, storage_options)  # type: ignore[return-value]
