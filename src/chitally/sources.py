"""Input readers: the gate every point set passes before any work.

This module turns a local path or an fsspec URL (npy, npz, csv/txt/tsv, Zarr, HDF5,
Parquet) into one C-contiguous float64 array of shape (n, m), choosing table columns
when asked. Every problem surfaces as an :class:`InputError` whose message is one line
naming what is wrong and where (file, key, row, column, shape, dtype or value), so the
command line can print it and exit 2. It must not plan, compute, write anything, or
know about the run store; it must not silently reinterpret data (no 1-D arrays taken
as points on a line, no rounding of integers beyond 2**53, no NaN or inf let through,
no unnamed index column taken for a coordinate). h5py and pyarrow are optional and
imported only when their format is read. The validators live in :mod:`chitally.validate`
and are re-exported here, where callers have always found them.
"""

from __future__ import annotations

import contextlib
import importlib
import itertools
import os
import re
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from types import ModuleType
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import fsspec
import fsspec.core
import fsspec.utils
import numpy as np

from .validate import (
    MAX_COORDINATE,
    InputError,
    _check_shape_and_dtype,
    _first_inexact_integer,
    _inexact_message,
    _listing,
    _MAX_LISTED,
    _one_line,
    _short,
    validate_column,
    validate_columns,
    validate_eps,
    validate_max_dim,
    validate_points,
)

__all__ = [
    "InputError",
    "MAX_COORDINATE",
    "SUPPORTED_ENDINGS",
    "describe_source",
    "read_points",
    "validate_eps",
    "validate_max_dim",
    "validate_points",
]

#: Recognised file endings and the format each selects.
SUPPORTED_ENDINGS: dict[str, str] = {
    ".npy": "npy",
    ".npz": "npz",
    ".csv": "text",
    ".txt": "text",
    ".tsv": "text",
    ".zarr": "zarr",
    ".h5": "hdf5",
    ".hdf5": "hdf5",
    ".parquet": "parquet",
    ".pq": "parquet",
}

_SUPPORTED_TEXT = (
    ".npy, .npz, .csv, .txt, .tsv (also compressed, e.g. .csv.gz), "
    ".zarr or any Zarr store directory, .h5, .hdf5, .parquet, .pq"
)

_FORMAT_LABELS = {
    "npy": "NumPy .npy",
    "npz": "NumPy .npz",
    "text": "text table",
    "zarr": "Zarr",
    "hdf5": "HDF5",
    "parquet": "Parquet",
}

# --------------------------------------------------------------------------- helpers


def _require(module: str, extra: str, what: str, where: str) -> ModuleType:
    try:
        return importlib.import_module(module)
    except ImportError as exc:
        raise InputError(
            f"{where}: reading {what} files needs the optional package {module.split('.')[0]}: "
            f'install it with pip install "chitally[{extra}]"'
        ) from exc


# --------------------------------------------------------------------------- locating


@dataclass(frozen=True)
class _Source:
    text: str  # what numpy, fsspec and zarr are given
    display: str  # what messages show: no password
    is_url: bool
    is_dir: bool
    fmt: str | None
    compression: str | None
    # fsspec options for URLs (credentials, endpoints); never shown in messages.
    options: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    def open(self, mode: str = "rb", **kwargs: Any) -> Any:
        """An fsspec file for this source, with its storage options."""
        return fsspec.open(self.text, mode, **{**self.options, **kwargs})


def _is_url(text: str) -> bool:
    return "://" in text or "::" in text


def _named_segment(text: str) -> str:
    """The part of a (possibly chained) URL that carries the file name.

    ``zip://points.npy::s3://b/a.zip`` names the file in its first link; a bare cache
    prefix such as ``simplecache::s3://b/points.npy`` names it in the next one.
    """
    for segment in text.split("::"):
        if "://" in segment:
            return segment
    return text


def _strip_password(segment: str) -> str:
    if "://" not in segment:
        return segment
    parts = urlsplit(segment)
    if parts.password is None:
        return segment
    netloc = parts.netloc.rsplit("@", 1)[1]
    if parts.username:
        netloc = f"{parts.username}@{netloc}"
    return urlunsplit(parts._replace(netloc=netloc))


def _display(text: str) -> str:
    if not _is_url(text):
        return text
    return "::".join(_strip_password(segment) for segment in text.split("::"))


def _format_of(text: str, is_url: bool) -> tuple[str | None, str | None]:
    """(format, compression) chosen by the name's ending; format None when unknown."""
    name = text
    if is_url:
        name = _named_segment(text)
        # Query strings (signed URLs) and fragments are not part of the name.
        name = urlsplit(name).path or name
    name = name.rstrip("/\\").lower()
    compression = fsspec.utils.infer_compression(name)
    if compression is not None:
        inner = os.path.splitext(name)[0]
        fmt = SUPPORTED_ENDINGS.get(os.path.splitext(inner)[1])
        # Only text streams are read sequentially; the binary formats need random access.
        return ("text", compression) if fmt == "text" else (None, None)
    return SUPPORTED_ENDINGS.get(os.path.splitext(name)[1]), None


def _coerce_source(source: Any) -> str:
    if isinstance(source, (str, os.PathLike)):
        text = os.fspath(source)
        if isinstance(text, str):
            return text
    raise InputError(f"source must be a path or URL string, got {_short(source)} ({type(source).__name__})")


def _locate(source: Any, storage_options: dict[str, Any] | None = None) -> _Source:
    text = _coerce_source(source)
    is_url = _is_url(text)
    display = _display(text)
    options = dict(storage_options or {})
    if is_url:
        try:
            fs, path = fsspec.core.url_to_fs(text, **options)
        except (ImportError, ValueError) as exc:
            raise InputError(f"{display}: cannot open this URL: {_one_line(exc)}") from exc
        try:
            exists = fs.exists(path)
            is_dir = exists and fs.isdir(path)
        except Exception as exc:  # any backend (s3, http, ...) may fail its own way
            raise InputError(f"{display}: cannot reach: {_one_line(exc)}") from exc
    else:
        text = os.path.expanduser(text)
        exists = os.path.exists(text)
        is_dir = os.path.isdir(text)
    if not exists:
        raise InputError(f"{display}: no such file or directory")
    fmt, compression = _format_of(text, is_url)
    if fmt is None and is_dir:
        fmt = "zarr"
    if fmt is None:
        raise InputError(f"{display}: unknown file type; supported: {_SUPPORTED_TEXT}")
    return _Source(text, display, is_url, is_dir, fmt, compression, options)


# --------------------------------------------------------------------------- readers


def _reject_key(src: _Source, key: str | None, holds: str) -> None:
    if key is not None:
        raise InputError(f"{src.display}: key {key!r} was given but {holds}; leave key unset")


def _read_npy(src: _Source, key: str | None) -> np.ndarray:
    _reject_key(src, key, "a .npy file holds one array")
    try:
        if not src.is_url:
            # A memory map lets a float64 file pass validation without a second copy.
            try:
                a = np.load(src.text, mmap_mode="r", allow_pickle=False)
            except ValueError:
                # Zero-length arrays cannot be mapped; read them normally.
                a = np.load(src.text, allow_pickle=False)
            return a
        with src.open("rb") as f:
            return np.load(f, allow_pickle=False)
    except (OSError, ValueError, EOFError) as exc:
        raise InputError(f"{src.display}: cannot read as .npy: {_one_line(exc)}") from exc


def _npz_key(src: _Source, names: list[str], key: str | None) -> tuple[str, str]:
    """The array of an ``.npz`` archive that ``key`` chooses, and how messages name it."""
    if key is None:
        if len(names) != 1:
            raise InputError(
                f"{src.display}: holds {len(names)} arrays ({_listing(names)}); "
                f"choose one with key"
            )
        key = names[0]
    elif key not in names:
        raise InputError(
            f"{src.display}: no array {key!r}; arrays: {_listing(names)}"
        )
    return key, f"{src.display}[{key!r}]"


# ---- text tables


def _content(line: str) -> str:
    # Only the comment and the line break go: a trailing delimiter marks an empty cell.
    return line.split("#", 1)[0].rstrip("\r\n")


def _split(line: str, delimiter: str | None) -> list[str]:
    return line.split(delimiter)


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def _delimiter_of(line: str) -> str | None:
    if "," in line:
        return ","
    if "\t" in line:
        return "\t"
    return None  # runs of spaces


# pandas names a column it read without a header "Unnamed: 0" (or "Unnamed: 0_level_0"
# under a MultiIndex); writing the frame again keeps that name.
_UNNAMED = re.compile(r"Unnamed: \d+(_level_\d+)?")


def _header_name(cell: str) -> str:
    # Spreadsheets and R quote every name; a quoted name is the same name.
    cell = cell.strip()
    if len(cell) >= 2 and cell[0] == cell[-1] == '"':
        cell = cell[1:-1].strip()
    return cell


def _is_unnamed(name: str) -> bool:
    return not name or _UNNAMED.fullmatch(name) is not None


@dataclass(frozen=True)
class _TextLayout:
    delimiter: str | None
    header_line: int | None  # 0-based index of the header line among all lines
    width: int  # cells in the first data row
    # One name per data column when the header lines up with the rows, else None. A
    # header one cell short (R's write.table, pandas with sep=" ") lines up with an
    # unnamed first column.
    names: tuple[str, ...] | None = None
    header_cells: int = 0


def _header_names(line: str, delimiter: str | None, width: int) -> tuple[tuple[str, ...] | None, int]:
    """Header names aligned with ``width`` data columns (or None) and the header's cell count."""
    raw = _content(line)
    # Split by the data's delimiter first (a leading empty cell survives only there),
    # then by the header's own, for headers such as "x y" over tab-separated rows.
    tried: list[list[str]] = []
    for delim in dict.fromkeys([delimiter, _delimiter_of(raw.strip())]):
        text = raw if delim is not None else raw.strip()
        tried.append([_header_name(c) for c in _split(text, delim)])
    for cells in tried:
        if len(cells) == width:
            return tuple(cells), len(cells)
    for cells in tried:
        if len(cells) == width - 1:
            return ("", *cells), len(cells)
    return None, len(tried[0])


def _sniff(lines: Iterator[str], buffered: list[str]) -> _TextLayout | None:
    """Find the delimiter, the header and the row width; consumed lines go to ``buffered``."""
    first: tuple[int, str] | None = None
    for index, line in enumerate(lines):
        buffered.append(line)
        body = _content(line).strip()
        if not body:
            continue
        delimiter = _delimiter_of(body)
        width = len(_split(body, delimiter))
        if first is None:
            cells = [c.strip() for c in _split(body, delimiter)]
            # A header is a line with no number in it; a line mixing numbers and words is
            # a bad data row, reported as such rather than silently skipped.
            if any(_is_number(c) for c in cells):
                return _TextLayout(delimiter, None, width)
            first = (index, line)
            continue
        names, header_cells = _header_names(first[1], delimiter, width)
        return _TextLayout(delimiter, first[0], width, names, header_cells)
    if first is not None:
        body = _content(first[1]).strip()
        return _TextLayout(_delimiter_of(body), first[0], 0)
    return None


def _open_text(src: _Source) -> Any:
    # utf-8-sig drops the byte-order mark that spreadsheet exports put first.
    return src.open("rt", compression=src.compression, encoding="utf-8-sig")


def _locate_text_error(src: _Source, layout: _TextLayout, usecols: list[int] | None) -> str | None:
    """Describe the first bad cell or ragged row; run only after the parser has failed."""
    width: int | None = None
    row = -1
    with _open_text(src) as f:
        for index, line in enumerate(f):
            body = _content(line)
            if not body.strip() or index == layout.header_line:
                continue
            row += 1
            cells = [c.strip() for c in _split(body, layout.delimiter)]
            if usecols is not None:
                # Only the chosen columns are parsed; the others may hold anything.
                for col in usecols:
                    if col >= len(cells):
                        return f"row {row} (line {index + 1}) has {len(cells)} columns, so no column {col}"
                    if not _is_number(cells[col]):
                        return f"row {row} (line {index + 1}), column {col}: {_short(cells[col])} is not a number"
                continue
            for col, cell in enumerate(cells):
                if not _is_number(cell):
                    return f"row {row} (line {index + 1}), column {col}: {_short(cell)} is not a number"
            if width is None:
                width = len(cells)
            elif len(cells) != width:
                return (
                    f"row {row} (line {index + 1}) has {len(cells)} columns, "
                    f"the rows before it have {width}"
                )
    return None


# Lines read ahead whose first cells decide how the refusal of an unnamed first column is
# worded; the refusal itself does not depend on them.
_INDEX_PEEK_ROWS = 1000


def _looks_like_row_index(lines: list[str], layout: _TextLayout) -> tuple[int, ...] | None:
    """The first cells of ``lines`` as integers when they count up by one, else None."""
    values: list[int] = []
    for index, line in enumerate(lines):
        body = _content(line)
        if not body.strip() or index == layout.header_line:
            continue
        cell = _header_name(_split(body.strip() if layout.delimiter is None else body, layout.delimiter)[0])
        if not re.fullmatch(r"[+-]?\d+", cell):
            return None
        values.append(int(cell))
    if not values or any(b - a != 1 for a, b in zip(values, values[1:])):
        return None
    return tuple(values)


def _choice_hint(names: tuple[str, ...] | None, width: int) -> str:
    """How to say which columns to read when the first one is not a coordinate."""
    if width <= 1:
        return "pass columns=[0] / --columns 0 to read it all the same"
    rest = list(names[1:]) if names is not None else []
    if rest and len(rest) <= _MAX_LISTED and all(not _is_unnamed(n) and "," not in n for n in rest):
        api, cli = repr(rest), ",".join(rest)
    elif width - 1 <= _MAX_LISTED:
        numbers = [str(i) for i in range(1, width)]
        api, cli = "[" + ", ".join(numbers) + "]", ",".join(numbers)
    else:
        api, cli = "[...]", "..."
    return (
        "pass index_col=0 / --index-col 0 to drop it, "
        f"or columns={api} / --columns {cli} to choose the columns to read"
    )


def _refuse_unnamed_first_column(src: _Source, layout: _TextLayout, peeked: list[str]) -> None:
    hint = _choice_hint(layout.names, layout.width)
    index = _looks_like_row_index(peeked, layout)
    if index is not None:
        shown = ", ".join(str(v) for v in index[:3]) + (", ..." if len(index) > 3 else "")
        raise InputError(
            f"{src.display}: the first column has no name in the header and holds {shown}: "
            f"it looks like a row index written by pandas, not a coordinate; {hint}"
        )
    raise InputError(
        f"{src.display}: the first column has no name in the header (pandas writes a row "
        f"index that way), so it is not read as a coordinate unless chosen; {hint}"
    )


def _text_column(src: _Source, layout: _TextLayout, column: int | str) -> int:
    """The 0-based file column that ``column`` (a number or a header name) names."""
    width = layout.width
    if isinstance(column, int):
        if column >= width:
            listed = f": {_listing(layout.names)}" if layout.names is not None else ""
            raise InputError(
                f"{src.display}: no column {column}; the rows have {width} columns, "
                f"numbered 0 to {width - 1}{listed}"
            )
        return column
    if layout.header_line is None:
        raise InputError(
            f"{src.display}: column {column!r} is a name, but the file has no header "
            f"line; choose columns by 0-based number (0 to {width - 1})"
        )
    if layout.names is None:
        raise InputError(
            f"{src.display}: cannot find column {column!r}: the header has "
            f"{layout.header_cells} names but the rows have {width} columns; choose columns "
            f"by 0-based number (0 to {width - 1})"
        )
    hits = [i for i, n in enumerate(layout.names) if n == column]
    if not hits:
        raise InputError(f"{src.display}: no column {column!r}; columns: {_listing(layout.names)}")
    if len(hits) > 1:
        raise InputError(
            f"{src.display}: the header names {column!r} {len(hits)} times "
            f"(columns {', '.join(map(str, hits))}); choose by 0-based number"
        )
    return hits[0]


def _text_selection(
    src: _Source,
    layout: _TextLayout,
    columns: tuple[int | str, ...] | None,
    index_col: int | str | None,
) -> tuple[list[int] | None, str]:
    """The file columns to read (None: all) and how messages name the selection."""
    if columns is None and index_col is None:
        return None, src.display
    usecols = (
        list(range(layout.width))
        if columns is None
        else [_text_column(src, layout, c) for c in columns]
    )
    twice = [c for i, c in enumerate(usecols) if c in usecols[:i]]
    if twice:
        raise InputError(f"{src.display}: columns chooses column {twice[0]} twice (by name and by number)")
    if index_col is not None:
        drop = _text_column(src, layout, index_col)
        if columns is not None and drop in usecols:
            raise InputError(
                f"{src.display}: column {drop} is both chosen by columns and dropped by index_col"
            )
        usecols = [c for c in usecols if c != drop]
    if not usecols:
        raise InputError(f"{src.display}: no column is left to read once index_col is dropped")
    labels = [layout.names[c] for c in usecols] if layout.names is not None else []
    if not labels or any(_is_unnamed(n) for n in labels):
        labels = [str(c) for c in usecols]
    return usecols, f"{src.display}[{', '.join(labels)}]"


@dataclass(frozen=True)
class _TextTable:
    layout: _TextLayout
    usecols: list[int] | None  # file columns to parse; None: all
    where: str  # how messages name the selection
    lines: Iterator[str]  # every line after the header (blank and comment lines too)

    @property
    def dim(self) -> int:
        return self.layout.width if self.usecols is None else len(self.usecols)


@contextlib.contextmanager
def _text_table(
    src: _Source,
    key: str | None,
    columns: tuple[int | str, ...] | None,
    index_col: int | str | None,
) -> Iterator[_TextTable]:
    """Open a text table, settle its layout and columns, and word every parse failure.

    A ``ValueError`` raised by the caller's parsing inside the block (numpy's loadtxt)
    is turned into a message naming the first bad row of the whole file, so whole-file
    and block-wise readers report a fault identically.
    """
    _reject_key(src, key, "a text table holds one array")
    layout: _TextLayout | None = None
    usecols: list[int] | None = None
    try:
        with _open_text(src) as f:
            buffered: list[str] = []
            lines = iter(f)
            layout = _sniff(lines, buffered)
            if layout is None or layout.width == 0:
                raise InputError(f"{src.display}: holds no data rows")
            if columns is None and index_col is None and layout.names is not None and _is_unnamed(layout.names[0]):
                # Never guess: an unnamed first column is refused, and only its wording
                # depends on the values, so a bounded peek is enough.
                peeked = buffered + list(itertools.islice(lines, _INDEX_PEEK_ROWS))
                _refuse_unnamed_first_column(src, layout, peeked)
            usecols, where = _text_selection(src, layout, columns, index_col)
            if layout.header_line is not None:
                del buffered[layout.header_line]
            yield _TextTable(layout, usecols, where, itertools.chain(buffered, lines))
    except InputError:
        raise
    except ValueError as exc:
        if isinstance(exc, UnicodeDecodeError):
            raise InputError(f"{src.display}: not UTF-8 text: {_one_line(exc)}") from exc
        located = _locate_text_error(src, layout, usecols) if layout is not None else None
        raise InputError(f"{src.display}: {located or _one_line(exc)}") from exc
    except (OSError, EOFError) as exc:
        raise InputError(f"{src.display}: cannot read: {_one_line(exc)}") from exc


def _parse_text_lines(table: _TextTable, lines: Iterator[str] | list[str]) -> np.ndarray:
    """Parse data lines of ``table`` as float64, shape (k, table.dim); raises ValueError."""
    with warnings.catch_warnings():
        # An input with a header only is reported by the caller, not warned about.
        warnings.simplefilter("ignore", UserWarning)
        return np.loadtxt(
            lines,
            dtype=np.float64,
            delimiter=table.layout.delimiter,
            comments="#",
            ndmin=2,
            usecols=table.usecols,
        )


def _read_text(
    src: _Source,
    key: str | None,
    columns: tuple[int | str, ...] | None,
    index_col: int | str | None,
) -> tuple[np.ndarray, str]:
    with _text_table(src, key, columns, index_col) as table:
        data = _parse_text_lines(table, table.lines)
    if data.shape[0] == 0:
        raise InputError(f"{src.display}: holds no data rows")
    return data, table.where


# ---- Zarr


def _zarr_array(src: _Source, key: str | None) -> tuple[Any, str]:
    """The Zarr array chosen by ``key`` (shape and dtype checked, no data read) and its name."""
    import zarr

    try:
        store = fsspec.get_mapper(src.text, **src.options) if src.is_url else src.text
        node = zarr.open(store=store, mode="r")
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"{src.display}: no Zarr array or group here: {_one_line(exc)}") from exc
    where = src.display
    if isinstance(node, zarr.Group):
        group = node
        arrays = sorted(p for p, m in group.members(max_depth=None) if isinstance(m, zarr.Array))
        if key is None:
            if len(arrays) != 1:
                raise InputError(
                    f"{src.display}: Zarr group holds {len(arrays)} arrays ({_listing(arrays)}); "
                    f"choose one with key"
                )
            key = arrays[0]
        try:
            node = group[key.strip("/")]
        except KeyError as exc:
            raise InputError(
                f"{src.display}: no array {key!r} in the Zarr group; arrays: {_listing(arrays)}"
            ) from exc
        if not isinstance(node, zarr.Array):
            raise InputError(
                f"{src.display}: {key!r} is a Zarr group, not an array; arrays: {_listing(arrays)}"
            )
        where = f"{src.display}[{key!r}]"
    else:
        _reject_key(src, key, "it is a single Zarr array")
    _check_shape_and_dtype(node.shape, np.dtype(node.dtype), where)
    return node, where


def _zarr_rows(node: Any, where: str, start: int, stop: int) -> np.ndarray:
    try:
        return np.asarray(node[start:stop])
    except (OSError, ValueError, KeyError) as exc:
        raise InputError(f"{where}: cannot read the Zarr array: {_one_line(exc)}") from exc


# ---- HDF5


@contextlib.contextmanager
def _hdf5_file(src: _Source) -> Iterator[Any]:
    """The open h5py file; any HDF5 failure inside the block is worded as one line."""
    h5py = _require("h5py", "hdf5", "HDF5", src.display)
    try:
        with contextlib.ExitStack() as stack:
            target = stack.enter_context(src.open("rb")) if src.is_url else src.text
            yield stack.enter_context(h5py.File(target, "r"))
    except InputError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"{src.display}: cannot read as HDF5: {_one_line(exc)}") from exc


def _hdf5_dataset(h5: Any, src: _Source, key: str | None) -> tuple[Any, str]:
    """The dataset chosen by ``key`` (shape and dtype checked, no data read) and its name."""
    import h5py

    datasets: list[str] = []
    h5.visititems(lambda name, obj: datasets.append(name) if isinstance(obj, h5py.Dataset) else None)
    if key is None:
        if len(datasets) != 1:
            raise InputError(
                f"{src.display}: HDF5 file holds {len(datasets)} datasets ({_listing(datasets)}); "
                f"choose one with key"
            )
        key = datasets[0]
    node = h5.get(key)
    if node is None:
        raise InputError(f"{src.display}: no dataset {key!r}; datasets: {_listing(datasets)}")
    if not isinstance(node, h5py.Dataset):
        raise InputError(
            f"{src.display}: {key!r} is an HDF5 group, not a dataset; datasets: {_listing(datasets)}"
        )
    where = f"{src.display}[{key!r}]"
    _check_shape_and_dtype(node.shape, node.dtype, where)
    return node, where


# ---- Parquet


def _pandas_index_columns(schema: Any) -> set[str]:
    # A frame written with its index stores that index as an ordinary column; it is a
    # row label, not a coordinate.
    meta = schema.pandas_metadata or {}
    return {c for c in meta.get("index_columns", []) if isinstance(c, str)}


@contextlib.contextmanager
def _parquet_file(
    src: _Source,
    key: str | None,
    columns: tuple[int | str, ...] | None,
    index_col: int | str | None,
) -> Iterator[tuple[Any, list[str], str]]:
    """The open ``pyarrow.parquet.ParquetFile``, the chosen column names and how messages
    name them; Arrow failures inside the block become one line."""
    pa = _require("pyarrow", "parquet", "Parquet", src.display)
    pq = _require("pyarrow.parquet", "parquet", "Parquet", src.display)
    if key is not None and columns is not None:
        raise InputError(f"{src.display}: key and columns both choose Parquet columns; give only one")
    try:
        with contextlib.ExitStack() as stack:
            target = stack.enter_context(src.open("rb")) if src.is_url else src.text
            pf = pq.ParquetFile(target)
            names, where = _parquet_selection(pf, src, key, columns, index_col)
            yield pf, names, where
    except InputError:
        raise
    except (OSError, ValueError, pa.ArrowException) as exc:
        raise InputError(f"{src.display}: cannot read as Parquet: {_one_line(exc)}") from exc


def _parquet_column(src: _Source, all_names: list[str], column: int | str) -> str:
    if isinstance(column, int):
        if column >= len(all_names):
            raise InputError(
                f"{src.display}: no column {column}; the file has {len(all_names)} columns, "
                f"numbered 0 to {len(all_names) - 1}: {_listing(all_names)}"
            )
        return all_names[column]
    if column not in all_names:
        raise InputError(f"{src.display}: no column {column!r}; columns: {_listing(all_names)}")
    return column


def _parquet_selection(
    pf: Any,
    src: _Source,
    key: str | None,
    columns: tuple[int | str, ...] | None,
    index_col: int | str | None,
) -> tuple[list[str], str]:
    """The Parquet columns to read, in point-column order, and how messages name them."""
    import pyarrow as pa

    schema = pf.schema_arrow
    all_names = list(schema.names)

    def numeric(name: str) -> bool:
        t = schema.field(name).type
        return bool(pa.types.is_integer(t) or pa.types.is_floating(t))

    drop = None if index_col is None else _parquet_column(src, all_names, index_col)
    if columns is not None:
        names = [_parquet_column(src, all_names, c) for c in columns]
        twice = [n for i, n in enumerate(names) if n in names[:i]]
        if twice:
            raise InputError(f"{src.display}: columns chooses column {twice[0]!r} twice (by name and by number)")
    elif key is not None:
        names = [n.strip() for n in key.split(",")]
        for name in names:
            _parquet_column(src, all_names, name)
    else:
        names = None
    if names is None:
        skip = _pandas_index_columns(schema)
        first = all_names[0] if all_names else None
        if (
            drop is None
            and first is not None
            and first not in skip
            and _is_unnamed(first)
            and numeric(first)
        ):
            # A frame read from a CSV with its index and written again keeps the index as
            # a column named "Unnamed: 0": never taken for a coordinate without being asked.
            rest = tuple(n for n in all_names[1:] if n not in skip and numeric(n))
            raise InputError(
                f"{src.display}: the first column {first!r} has no real name: it looks like a "
                f"row index written by pandas, not a coordinate; "
                f"{_choice_hint((first, *rest), len(all_names))}"
            )
        names = [n for n in all_names if n not in skip and n != drop and numeric(n)]
        if not names:
            raise InputError(
                f"{src.display}: no integer or float columns; columns: {_listing(all_names)}"
            )
        where = src.display if drop is None else f"{src.display}[{', '.join(names)}]"
    else:
        if drop is not None and drop in names:
            raise InputError(f"{src.display}: column {drop!r} is both chosen and dropped by index_col")
        for name in names:
            if not numeric(name):
                raise InputError(
                    f"{src.display}: column {name!r} has type {schema.field(name).type}, "
                    f"not an integer or float type"
                )
        where = f"{src.display}[{', '.join(names)}]"
    return names, where


def _parquet_points(table: Any, names: list[str], where: str, first_row: int = 0) -> np.ndarray:
    """Columns ``names`` of an Arrow table as float64 (n, len(names)); nulls and integers
    float64 would round are refused, naming rows of the whole file from ``first_row``."""
    out = np.empty((table.num_rows, len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        column = table.column(name)
        if column.null_count:
            row = int(np.argmax(column.is_null().to_numpy(zero_copy_only=False)))
            raise InputError(f"{where}: row {first_row + row}, column {j} ({name!r}) is null")
        values = column.to_numpy()
        if values.dtype.kind in "iu":
            hit = _first_inexact_integer(values.reshape(-1, 1))
            if hit is not None:
                row = hit[0]
                raise InputError(
                    f"{where}: row {first_row + row}, column {j} ({name!r}) {_inexact_message(values[row])}"
                )
        out[:, j] = values
    return out


# --------------------------------------------------------------------------- public


def _resolve(
    source: Any,
    columns: Any,
    index_col: Any,
    storage_options: dict[str, Any] | None,
) -> tuple[_Source, tuple[int | str, ...] | None, int | str | None]:
    """Locate a source and check that the column choices suit its format."""
    chosen = validate_columns(columns, name="columns")
    drop = validate_column(index_col, name="index_col")
    src = _locate(source, storage_options)
    if (chosen is not None or drop is not None) and src.fmt not in ("text", "parquet"):
        raise InputError(
            f"{src.display}: columns and index_col choose columns of text tables and Parquet "
            f"files; a {_FORMAT_LABELS[src.fmt or '']} input holds arrays (choose one with key)"
        )
    return src, chosen, drop


def read_points(
    source: str | os.PathLike[str],
    *,
    key: str | None = None,
    columns: str | Sequence[int | str] | None = None,
    index_col: int | str | None = None,
    storage_options: dict[str, Any] | None = None,
) -> np.ndarray:
    """Read a point set and validate it.

    Parameters
    ----------
    source : str or os.PathLike
        A local path or an fsspec URL (``memory://``, ``file://``, ``s3://``, chained
        URLs, ...). The format follows the ending: ``.npy``; ``.npz``; ``.csv``,
        ``.txt``, ``.tsv`` (optionally compressed, e.g. ``.csv.gz``); ``.zarr`` or any
        other directory Zarr can open; ``.h5``, ``.hdf5``; ``.parquet``, ``.pq``.
    key : str, optional
        Which array to read where a file holds several: the array name in an ``.npz``,
        the array path in a Zarr group, the dataset path in an HDF5 file, or
        comma-separated column names in a Parquet file. By default the only array
        (or, for Parquet, every integer and float column in order, a stored pandas
        index excepted). Giving a key for a single-array format is an error.
    columns : str or sequence of (str or int), optional
        Text tables and Parquet only: the columns to read, in that order, as header
        names or 0-based column numbers, or a comma-separated string of them
        (``"x,y,z"``, ``"1,2,3"``; a token of decimal digits is a number). Names need
        a header line. The other columns are not parsed and may hold anything, text
        included. For Parquet, give ``columns`` or ``key``, not both.
    index_col : str or int, optional
        Text tables and Parquet only: a column (name or 0-based number) to leave out,
        typically a row index written by pandas. It may not also be in ``columns``.
    storage_options : dict, optional
        fsspec options for a URL (credentials, endpoint); ignored for local paths.

    Returns
    -------
    numpy.ndarray
        C-contiguous float64 array of shape (n, m). A local float64 ``.npy`` is returned
        as a read-only memory map rather than copied.

    Raises
    ------
    InputError
        If the source is missing, has an unknown ending, cannot be parsed, the key is
        missing or ambiguous, a chosen column does not exist (the message lists those
        that do), the first column of a table has no name and neither ``columns`` nor
        ``index_col`` says what to do with it, or the data fail :func:`validate_points`.
        1-D arrays are refused (a one-column text table loads as (n, 1) and is fine).

    Notes
    -----
    Text tables: the delimiter (comma, else tab, else runs of spaces) is taken from the
    first data line; lines starting with ``#`` are comments; a first line with no number
    in it is a header (names may be quoted). Errors give 0-based data row and column
    indices and the 1-based line number; once columns are chosen, the point array's
    column ``j`` is the ``j``-th chosen column, as the message's ``file[x, y, z]`` says.

    An unnamed first column, i.e. a header whose first cell is empty or ``Unnamed: N``
    (or a header one name short of the rows), is what pandas writes for a frame's row
    index. It is never read silently: without ``columns`` or ``index_col`` it is
    refused with a hint, whether or not its values count up by one (the values only
    change the wording), because a column nobody named is no evidence of a coordinate.
    A named first column is read like any other. The same holds for a Parquet file
    whose first integer or float column is named ``""`` or ``Unnamed: N``; a pandas
    index recorded as such in the Parquet metadata is left out without asking.

    HDF5 needs ``pip install "chitally[hdf5]"``, Parquet ``pip install "chitally[parquet]"``.

    Examples
    --------
    >>> import numpy as np, fsspec
    >>> with fsspec.open("memory://doc-example.npy", "wb") as f:
    ...     np.save(f, np.array([[0.0, 1.0], [2.0, 3.0]]))
    >>> read_points("memory://doc-example.npy").shape
    (2, 2)
    >>> with fsspec.open("memory://doc-example.csv", "w") as f:
    ...     _ = f.write(",x,y\\n0,0.5,1.5\\n1,2.5,3.5\\n")
    >>> read_points("memory://doc-example.csv", index_col=0).tolist()
    [[0.5, 1.5], [2.5, 3.5]]
    """
    # One implementation of every format: the lazy source, read whole. Imported here
    # because chitally.lazy builds on this module's helpers.
    from .lazy import _open

    return _open(source, key, columns, index_col, storage_options, count_rows=False).read_all()


def describe_source(
    source: str | os.PathLike[str],
    key: str | None = None,
    *,
    columns: str | Sequence[int | str] | None = None,
    index_col: int | str | None = None,
) -> str:
    """A short human description of an input, for summaries; reads no data.

    Parameters
    ----------
    source : str or os.PathLike
        As for :func:`read_points`.
    key, columns, index_col : optional
        As for :func:`read_points`.

    Returns
    -------
    str
        For example ``"cloud.npz (NumPy .npz, array 'b')"``.

    Examples
    --------
    >>> describe_source("galaxies.parquet", key="x,y,z")
    'galaxies.parquet (Parquet, columns x,y,z)'
    >>> describe_source("frame.csv", index_col=0)
    'frame.csv (text table, without column 0)'
    """
    text = _coerce_source(source)
    is_url = _is_url(text)
    fmt, compression = _format_of(text, is_url)
    if fmt is None and not is_url and os.path.isdir(os.path.expanduser(text)):
        fmt = "zarr"
    label = _FORMAT_LABELS.get(fmt or "", "unknown format")
    if compression is not None:
        label += f", {compression}"
    if key is not None:
        noun = {"hdf5": "dataset", "parquet": "columns"}.get(fmt or "", "array")
        quoted = key if noun == "columns" else repr(key)
        label += f", {noun} {quoted}"
    chosen = validate_columns(columns, name="columns")
    if chosen is not None:
        label += ", columns " + ",".join(str(c) for c in chosen)
    drop = validate_column(index_col, name="index_col")
    if drop is not None:
        label += f", without column {drop}"
    return f"{_display(text)} ({label})"
