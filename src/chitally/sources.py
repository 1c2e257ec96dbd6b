"""Input readers and parameter validation: the gate every run passes before any work.

This module turns a local path or an fsspec URL (npy, npz, csv/txt/tsv, Zarr, HDF5,
Parquet) into one C-contiguous float64 array of shape (n, m), and checks eps and the
dimension cap. Every problem surfaces as an :class:`InputError` whose message is one line
naming what is wrong and where (file, key, row, column, shape, dtype or value), so the
command line can print it and exit 2. It must not plan, compute, write anything, or
know about the run store; it must not silently reinterpret data (no 1-D arrays taken
as points on a line, no rounding of integers beyond 2**53, no NaN or inf let through).
h5py and pyarrow are optional and imported only when their format is read.
"""

from __future__ import annotations

import importlib
import itertools
import numbers
import os
import re
import warnings
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from types import ModuleType
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import fsspec
import fsspec.core
import fsspec.utils
import numpy as np

__all__ = [
    "InputError",
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

# float64 holds every integer of magnitude <= 2**53 exactly and not all beyond it.
_EXACT_INT_LIMIT = 2**53

# Rows per finiteness/range check are sized so the boolean temporary stays ~1 MB
# whatever n is: a 10^9-point input must not need a second full-size array.
_CHUNK_ELEMENTS = 1 << 20

# Long lists of keys or long cell values would make the one-line message unreadable.
_MAX_LISTED = 12
_MAX_VALUE_CHARS = 40


class InputError(ValueError):
    """Invalid input: a bad file, array, key or parameter.

    The message is always a single line that says what is wrong and where; line breaks
    in the text it is given are folded into spaces so that the guarantee holds even
    for messages that quote third-party errors.
    """

    def __init__(self, message: str) -> None:
        super().__init__(re.sub(r"\s*[\r\n]+\s*", " ", str(message)).strip())


# --------------------------------------------------------------------------- helpers


def _short(value: object) -> str:
    text = repr(value)
    if len(text) > _MAX_VALUE_CHARS:
        text = text[: _MAX_VALUE_CHARS - 3] + "..."
    return text


def _listing(names: Iterable[str]) -> str:
    names = list(names)
    shown = ", ".join(repr(n) for n in names[:_MAX_LISTED])
    if len(names) > _MAX_LISTED:
        shown += f", ... ({len(names)} in all)"
    return shown or "none"


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def _require(module: str, extra: str, what: str, where: str) -> ModuleType:
    try:
        return importlib.import_module(module)
    except ImportError as exc:
        raise InputError(
            f"{where}: reading {what} files needs the optional package {module.split('.')[0]}: "
            f'install it with pip install "chitally[{extra}]"'
        ) from exc


# --------------------------------------------------------------------------- validation


def _check_shape_and_dtype(shape: tuple[int, ...] | None, dtype: np.dtype, where: str) -> None:
    # Used both on in-memory arrays and on array metadata (Zarr, HDF5, memory-mapped npy),
    # so a wrong file is refused before its data is read.
    shape = () if shape is None else tuple(shape)
    if len(shape) != 2:
        hint = "; reshape n values to (n, 1) for points on a line" if len(shape) == 1 else ""
        raise InputError(
            f"{where}: expected a 2-D array of shape (n, m) for n points in R^m, "
            f"got shape {shape}{hint}"
        )
    if shape[0] == 0 or shape[1] == 0:
        raise InputError(
            f"{where}: expected at least one point with at least one coordinate, got shape {shape}"
        )
    kind = dtype.kind
    if kind not in "fiu":
        raise InputError(
            f"{where}: expected real numbers (a float or integer dtype), got dtype {dtype}"
        )
    if kind == "f" and np.finfo(dtype).nmant > np.finfo(np.float64).nmant:
        raise InputError(
            f"{where}: dtype {dtype} would be rounded to float64; convert it to float64 first"
        )


def _first_bad(a: np.ndarray, test: Any) -> tuple[int, int] | None:
    """First (row, column) in C order where ``test(block)`` is true, scanning in row blocks."""
    n, m = a.shape
    step = max(1, _CHUNK_ELEMENTS // m)
    for start in range(0, n, step):
        bad = test(a[start : start + step])
        if bad.any():
            row, col = divmod(int(np.argmax(bad)), m)
            return start + row, col
    return None


def _first_inexact_integer(a: np.ndarray) -> tuple[int, int] | None:
    """First (row, column) of a 2-D integer array whose value float64 would round."""
    if a.dtype.itemsize * 8 <= 53:
        return None
    if a.dtype.kind == "u":
        return _first_bad(a, lambda b: b > _EXACT_INT_LIMIT)
    return _first_bad(a, lambda b: (b > _EXACT_INT_LIMIT) | (b < -_EXACT_INT_LIMIT))


def _inexact_message(value: Any) -> str:
    return f"holds the integer {int(value)}, beyond 2**53 in magnitude, which float64 cannot hold exactly"


def validate_points(points: Any, *, where: str = "points") -> np.ndarray:
    """Check a point array and return it as C-contiguous float64 of shape (n, m).

    Parameters
    ----------
    points : array_like
        n points in R^m as an (n, m) array of floats or integers.
    where : str, optional
        How error messages name the input (a file name, say). Default ``"points"``.

    Returns
    -------
    numpy.ndarray
        ``points`` itself when it already is a C-contiguous native float64 array (a
        read-only input stays read-only), otherwise a float64 copy. Integers and
        float16/float32 are converted exactly.

    Raises
    ------
    InputError
        If the array is not 2-D, has no rows or no columns, has a dtype that is not a
        real number type (bool, complex, strings, objects, and floats wider than
        float64 are refused), holds an integer beyond 2**53 in magnitude, holds NaN
        or an infinity, or a coordinate beyond +-1e150 (squared distances would overflow). Row and column indices in the message are 0-based.

    Examples
    --------
    >>> validate_points([[0, 1], [2, 3]]).dtype
    dtype('float64')
    """
    try:
        a = np.asarray(points)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{where}: not an (n, m) array of numbers: {_one_line(exc)}") from exc
    _check_shape_and_dtype(a.shape, a.dtype, where)
    if a.dtype.kind in "iu":
        hit = _first_inexact_integer(a)
        if hit is not None:
            row, col = hit
            raise InputError(f"{where}: row {row}, column {col} {_inexact_message(a[row, col])}")
    out = np.ascontiguousarray(a, dtype=np.float64)
    if a.dtype.kind != "f":
        return out  # integers are always finite
    hit = _first_bad(out, lambda b: ~np.isfinite(b))
    if hit is not None:
        row, col = hit
        raise InputError(
            f"{where}: row {row}, column {col} is {float(out[row, col])!r}; "
            f"every coordinate must be finite"
        )
    _check_magnitude(out, where)
    return out


# Squared differences of coordinates beyond this overflow float64 (and the KD-tree's
# arithmetic): such input cannot follow the distance rule, so it is refused up front.
MAX_COORDINATE = 1e150


def _check_magnitude(out: np.ndarray, where: str) -> None:
    hit = _first_bad(out, lambda b: np.abs(b) > MAX_COORDINATE)
    if hit is not None:
        row, col = hit
        raise InputError(
            f"{where}: row {row}, column {col} is {float(out[row, col])!r}; coordinates must lie "
            f"within +-{MAX_COORDINATE:g} so that squared distances do not overflow (rescale the input)"
        )


def validate_eps(eps: Any) -> float:
    """Check the scale eps: a real number, finite and > 0.

    Parameters
    ----------
    eps : float
        The largest filtration value; integers and numpy scalars are accepted.

    Returns
    -------
    float

    Raises
    ------
    InputError
        If eps is not a real number (bool and strings included), is not finite or is <= 0.

    Examples
    --------
    >>> validate_eps(1)
    1.0
    """
    if isinstance(eps, (bool, np.bool_)) or not isinstance(eps, numbers.Real):
        raise InputError(f"eps must be a positive finite number, got {_short(eps)} ({type(eps).__name__})")
    try:
        value = float(eps)
    except OverflowError:
        value = float("inf")
    if not (np.isfinite(value) and value > 0):
        raise InputError(f"eps must be a positive finite number, got {_short(eps)}")
    return value


def validate_max_dim(max_dim: Any) -> int | None:
    """Check the simplex dimension cap D: ``None`` (no cap) or an integer >= 0.

    Parameters
    ----------
    max_dim : int or None
        Floats are accepted only when integral (``3.0``); bools are refused.

    Returns
    -------
    int or None

    Raises
    ------
    InputError
        If the value is a bool, a non-integral or non-finite float, negative, or not a number.

    Examples
    --------
    >>> validate_max_dim(3.0), validate_max_dim(None)
    (3, None)
    """
    if max_dim is None:
        return None
    problem = f"max_dim must be None or an integer >= 0, got {_short(max_dim)}"
    if isinstance(max_dim, (bool, np.bool_)):
        raise InputError(f"{problem} (bool)")
    if isinstance(max_dim, numbers.Integral):
        value = int(max_dim)
    elif isinstance(max_dim, numbers.Real):
        as_float = float(max_dim)
        if not (np.isfinite(as_float) and as_float.is_integer()):
            raise InputError(problem)
        value = int(as_float)
    else:
        raise InputError(f"{problem} ({type(max_dim).__name__})")
    if value < 0:
        raise InputError(problem)
    return value


# --------------------------------------------------------------------------- locating


@dataclass(frozen=True)
class _Source:
    text: str  # what numpy, fsspec and zarr are given
    display: str  # what messages show: no password
    is_url: bool
    is_dir: bool
    fmt: str | None
    compression: str | None


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


def _locate(source: Any) -> _Source:
    text = _coerce_source(source)
    is_url = _is_url(text)
    display = _display(text)
    if is_url:
        try:
            fs, path = fsspec.core.url_to_fs(text)
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
    return _Source(text, display, is_url, is_dir, fmt, compression)


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
        with fsspec.open(src.text, "rb") as f:
            return np.load(f, allow_pickle=False)
    except (OSError, ValueError, EOFError) as exc:
        raise InputError(f"{src.display}: cannot read as .npy: {_one_line(exc)}") from exc


def _read_npz(src: _Source, key: str | None) -> tuple[np.ndarray, str]:
    try:
        with fsspec.open(src.text, "rb") as f, np.load(f, allow_pickle=False) as z:
            names = list(z.files)
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
            return z[key], f"{src.display}[{key!r}]"
    except InputError:
        raise
    except (OSError, ValueError, EOFError) as exc:
        raise InputError(f"{src.display}: cannot read as .npz: {_one_line(exc)}") from exc


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


@dataclass(frozen=True)
class _TextLayout:
    delimiter: str | None
    header_line: int | None  # 0-based index of the header line among all lines


def _sniff(lines: Iterator[str], buffered: list[str]) -> _TextLayout | None:
    """Find the delimiter and whether a header comes first; consumed lines go to ``buffered``."""
    first: tuple[int, str] | None = None
    for index, line in enumerate(lines):
        buffered.append(line)
        body = _content(line).strip()
        if not body:
            continue
        if first is None:
            cells = [c.strip() for c in _split(body, _delimiter_of(body))]
            # A header is a line with no number in it; a line mixing numbers and words is
            # a bad data row, reported as such rather than silently skipped.
            if any(_is_number(c) for c in cells):
                return _TextLayout(_delimiter_of(body), None)
            first = (index, body)
            continue
        return _TextLayout(_delimiter_of(body), first[0])
    if first is not None:
        return _TextLayout(_delimiter_of(first[1]), first[0])
    return None


def _open_text(src: _Source) -> Any:
    # utf-8-sig drops the byte-order mark that spreadsheet exports put first.
    return fsspec.open(src.text, "rt", compression=src.compression, encoding="utf-8-sig")


def _locate_text_error(src: _Source, layout: _TextLayout) -> str | None:
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


def _read_text(src: _Source, key: str | None) -> np.ndarray:
    _reject_key(src, key, "a text table holds one array")
    layout: _TextLayout | None = None
    try:
        with _open_text(src) as f:
            buffered: list[str] = []
            layout = _sniff(iter(f), buffered)
            if layout is None:
                raise InputError(f"{src.display}: holds no data rows")
            if layout.header_line is not None:
                del buffered[layout.header_line]
            with warnings.catch_warnings():
                # An input with a header only is reported below, not warned about.
                warnings.simplefilter("ignore", UserWarning)
                data = np.loadtxt(
                    itertools.chain(buffered, f),
                    dtype=np.float64,
                    delimiter=layout.delimiter,
                    comments="#",
                    ndmin=2,
                )
    except InputError:
        raise
    except ValueError as exc:
        if isinstance(exc, UnicodeDecodeError):
            raise InputError(f"{src.display}: not UTF-8 text: {_one_line(exc)}") from exc
        where = _locate_text_error(src, layout) if layout is not None else None
        raise InputError(f"{src.display}: {where or _one_line(exc)}") from exc
    except (OSError, EOFError) as exc:
        raise InputError(f"{src.display}: cannot read: {_one_line(exc)}") from exc
    if data.shape[0] == 0:
        raise InputError(f"{src.display}: holds no data rows")
    return data


# ---- Zarr


def _read_zarr(src: _Source, key: str | None) -> tuple[np.ndarray, str]:
    import zarr

    try:
        store = fsspec.get_mapper(src.text) if src.is_url else src.text
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
    try:
        return np.asarray(node[...]), where
    except (OSError, ValueError, KeyError) as exc:
        raise InputError(f"{where}: cannot read the Zarr array: {_one_line(exc)}") from exc


# ---- HDF5


def _read_hdf5(src: _Source, key: str | None) -> tuple[np.ndarray, str]:
    h5py = _require("h5py", "hdf5", "HDF5", src.display)
    try:
        if src.is_url:
            with fsspec.open(src.text, "rb") as f, h5py.File(f, "r") as h5:
                return _read_hdf5_dataset(h5py, h5, src, key)
        with h5py.File(src.text, "r") as h5:
            return _read_hdf5_dataset(h5py, h5, src, key)
    except InputError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"{src.display}: cannot read as HDF5: {_one_line(exc)}") from exc


def _read_hdf5_dataset(h5py: ModuleType, h5: Any, src: _Source, key: str | None) -> tuple[np.ndarray, str]:
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
    return np.asarray(node[()]), where


# ---- Parquet


def _pandas_index_columns(schema: Any) -> set[str]:
    # A frame written with its index stores that index as an ordinary column; it is a
    # row label, not a coordinate.
    meta = schema.pandas_metadata or {}
    return {c for c in meta.get("index_columns", []) if isinstance(c, str)}


def _read_parquet(src: _Source, key: str | None) -> tuple[np.ndarray, str]:
    pa = _require("pyarrow", "parquet", "Parquet", src.display)
    pq = _require("pyarrow.parquet", "parquet", "Parquet", src.display)
    try:
        if src.is_url:
            with fsspec.open(src.text, "rb") as f:
                return _read_parquet_columns(pa, pq.ParquetFile(f), src, key)
        return _read_parquet_columns(pa, pq.ParquetFile(src.text), src, key)
    except InputError:
        raise
    except (OSError, ValueError, pa.ArrowException) as exc:
        raise InputError(f"{src.display}: cannot read as Parquet: {_one_line(exc)}") from exc


def _read_parquet_columns(pa: ModuleType, pf: Any, src: _Source, key: str | None) -> tuple[np.ndarray, str]:
    schema = pf.schema_arrow
    all_names = list(schema.names)

    def numeric(name: str) -> bool:
        t = schema.field(name).type
        return bool(pa.types.is_integer(t) or pa.types.is_floating(t))

    if key is None:
        skip = _pandas_index_columns(schema)
        names = [n for n in all_names if n not in skip and numeric(n)]
        if not names:
            raise InputError(
                f"{src.display}: no integer or float columns; columns: {_listing(all_names)}"
            )
        where = src.display
    else:
        names = [n.strip() for n in key.split(",")]
        for name in names:
            if name not in all_names:
                raise InputError(f"{src.display}: no column {name!r}; columns: {_listing(all_names)}")
            if not numeric(name):
                raise InputError(
                    f"{src.display}: column {name!r} has type {schema.field(name).type}, "
                    f"not an integer or float type"
                )
        where = f"{src.display}[{', '.join(names)}]"
    table = pf.read(columns=list(dict.fromkeys(names)))
    out = np.empty((table.num_rows, len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        column = table.column(name)
        if column.null_count:
            row = int(np.argmax(column.is_null().to_numpy(zero_copy_only=False)))
            raise InputError(f"{where}: row {row}, column {j} ({name!r}) is null")
        values = column.to_numpy()
        if values.dtype.kind in "iu":
            hit = _first_inexact_integer(values.reshape(-1, 1))
            if hit is not None:
                row = hit[0]
                raise InputError(f"{where}: row {row}, column {j} ({name!r}) {_inexact_message(values[row])}")
        out[:, j] = values
    return out, where


# --------------------------------------------------------------------------- public


def read_points(source: str | os.PathLike[str], *, key: str | None = None) -> np.ndarray:
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

    Returns
    -------
    numpy.ndarray
        C-contiguous float64 array of shape (n, m). A local float64 ``.npy`` is returned
        as a read-only memory map rather than copied.

    Raises
    ------
    InputError
        If the source is missing, has an unknown ending, cannot be parsed, the key is
        missing or ambiguous, or the data fail :func:`validate_points`. 1-D arrays are
        refused (a one-column text table loads as (n, 1) and is fine).

    Notes
    -----
    Text tables: the delimiter (comma, else tab, else runs of spaces) is taken from the
    first data line; lines starting with ``#`` are comments; a first line with no number
    in it is a header and is skipped. Errors give 0-based data row and column indices
    and the 1-based line number. HDF5 needs ``pip install "chitally[hdf5]"``, Parquet
    ``pip install "chitally[parquet]"``.

    Examples
    --------
    >>> import numpy as np, fsspec
    >>> with fsspec.open("memory://doc-example.npy", "wb") as f:
    ...     np.save(f, np.array([[0.0, 1.0], [2.0, 3.0]]))
    >>> read_points("memory://doc-example.npy").shape
    (2, 2)
    """
    src = _locate(source)
    where = src.display
    if src.fmt == "npy":
        data = _read_npy(src, key)
    elif src.fmt == "npz":
        data, where = _read_npz(src, key)
    elif src.fmt == "text":
        data = _read_text(src, key)
    elif src.fmt == "zarr":
        data, where = _read_zarr(src, key)
    elif src.fmt == "hdf5":
        data, where = _read_hdf5(src, key)
    else:
        data, where = _read_parquet(src, key)
    return validate_points(data, where=where)


def describe_source(source: str | os.PathLike[str], key: str | None = None) -> str:
    """A short human description of an input, for summaries; reads no data.

    Parameters
    ----------
    source : str or os.PathLike
        As for :func:`read_points`.
    key : str, optional
        As for :func:`read_points`.

    Returns
    -------
    str
        For example ``"cloud.npz (NumPy .npz, array 'b')"``.

    Examples
    --------
    >>> describe_source("galaxies.parquet", key="x,y,z")
    'galaxies.parquet (Parquet, columns x,y,z)'
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
    return f"{_display(text)} ({label})"
