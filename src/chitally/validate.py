"""Validators for every value a run is given: points, scales, counts, grids, column choices.

Each validator returns the value in its canonical type or raises :class:`InputError`
with a one-line message that starts with the name it was given, verbatim, so that the
command line can pass ``--task-cost`` and the Python API ``task_cost`` and each user
reads the name they typed: ``--task-cost must be a finite number > 0, got 0``. This
module is pure numpy: it reads no file and knows nothing of runs, stores or clusters.
"""

from __future__ import annotations

import math
import numbers
import re
from collections.abc import Iterable
from typing import Any

import numpy as np

from .curve import MAX_GRID

__all__ = [
    "InputError",
    "MAX_COORDINATE",
    "MAX_GRID",
    "validate_column",
    "validate_columns",
    "validate_count",
    "validate_eps",
    "validate_grid",
    "validate_max_dim",
    "validate_points",
    "validate_positive",
]

# float64 holds every integer of magnitude <= 2**53 exactly and not all beyond it.
_EXACT_INT_LIMIT = 2**53

# Rows per finiteness/range check are sized so the boolean temporary stays ~1 MB
# whatever n is: a 10^9-point input must not need a second full-size array.
_CHUNK_ELEMENTS = 1 << 20

# Long lists of keys or long cell values would make the one-line message unreadable.
_MAX_LISTED = 12
_MAX_VALUE_CHARS = 40

# Squared differences of coordinates beyond this overflow float64 (and the KD-tree's
# arithmetic): such input cannot follow the distance rule, so it is refused up front.
MAX_COORDINATE = 1e150


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


def _listing(names: Iterable[object]) -> str:
    names = list(names)
    shown = ", ".join(repr(n) for n in names[:_MAX_LISTED])
    if len(names) > _MAX_LISTED:
        shown += f", ... ({len(names)} in all)"
    return shown or "none"


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def _is_bool(value: object) -> bool:
    return isinstance(value, (bool, np.bool_))


# --------------------------------------------------------------------------- points


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


def _check_magnitude(out: np.ndarray, where: str, first_row: int = 0) -> None:
    # Two comparisons instead of abs(): no float temporary as large as the slice.
    hit = _first_bad(out, lambda b: (b > MAX_COORDINATE) | (b < -MAX_COORDINATE))
    if hit is not None:
        row, col = hit
        raise InputError(
            f"{where}: row {first_row + row}, column {col} is {float(out[row, col])!r}; coordinates must lie "
            f"within +-{MAX_COORDINATE:g} so that squared distances do not overflow (rescale the input)"
        )


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
        or an infinity, or a coordinate beyond +-1e150 (squared distances would
        overflow). Row and column indices in the message are 0-based.

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
    return _checked_values(a, where)


def _checked_values(a: np.ndarray, where: str, first_row: int = 0) -> np.ndarray:
    """Convert a 2-D real array whose shape and dtype passed to float64 and check each value.

    ``a`` may be one block of a larger input that starts at row ``first_row``: messages
    name rows of the whole input, so a block reader and :func:`validate_points` word
    the same fault the same way.
    """
    if a.dtype.kind in "iu":
        hit = _first_inexact_integer(a)
        if hit is not None:
            row, col = hit
            raise InputError(
                f"{where}: row {first_row + row}, column {col} {_inexact_message(a[row, col])}"
            )
    out = np.ascontiguousarray(a, dtype=np.float64)
    if a.dtype.kind != "f":
        return out  # integers are always finite
    hit = _first_bad(out, lambda b: ~np.isfinite(b))
    if hit is not None:
        row, col = hit
        raise InputError(
            f"{where}: row {first_row + row}, column {col} is {float(out[row, col])!r}; "
            f"every coordinate must be finite"
        )
    _check_magnitude(out, where, first_row)
    return out


# --------------------------------------------------------------------------- scalars


def validate_positive(value: Any, *, name: str) -> float:
    """Check a real parameter that must be finite and > 0 (a scale, a radius, a cost).

    Parameters
    ----------
    value : float
        Python and numpy integers and floats are accepted; bools and strings are not.
    name : str
        How the message names the parameter, verbatim (``"task_cost"``, ``"--task-cost"``).

    Returns
    -------
    float

    Raises
    ------
    InputError
        ``"<name> must be a finite number > 0, got <value>"``, with the type appended
        when the value is not a real number at all.

    Examples
    --------
    >>> validate_positive(2, name="cover_radius")
    2.0
    """
    problem = f"{name} must be a finite number > 0, got {_short(value)}"
    if _is_bool(value) or not isinstance(value, numbers.Real):
        raise InputError(f"{problem} ({type(value).__name__})")
    try:
        as_float = float(value)
    except OverflowError:  # an int beyond float64's range
        as_float = math.inf
    if not (math.isfinite(as_float) and as_float > 0):
        raise InputError(problem)
    return as_float


def validate_eps(eps: Any, *, name: str = "eps") -> float:
    """Check the scale eps: a real number, finite and > 0.

    Parameters
    ----------
    eps : float
        The largest filtration value; integers and numpy scalars are accepted.
    name : str, optional
        How the message names the parameter, verbatim. Default ``"eps"``.

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
    return validate_positive(eps, name=name)


def validate_max_dim(max_dim: Any, *, name: str = "max_dim") -> int | None:
    """Check the simplex dimension cap D: ``None`` (no cap) or an integer >= 0.

    Parameters
    ----------
    max_dim : int or None
        Floats are accepted only when integral (``3.0``); bools are refused.
    name : str, optional
        How the message names the parameter, verbatim. Default ``"max_dim"``.

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
    problem = f"{name} must be None or an integer >= 0, got {_short(max_dim)}"
    if _is_bool(max_dim):
        raise InputError(f"{problem} (bool)")
    if isinstance(max_dim, numbers.Integral):
        value = int(max_dim)
    elif isinstance(max_dim, numbers.Real):
        as_float = float(max_dim)
        if not (math.isfinite(as_float) and as_float.is_integer()):
            raise InputError(problem)
        value = int(as_float)
    else:
        raise InputError(f"{problem} ({type(max_dim).__name__})")
    if value < 0:
        raise InputError(problem)
    return value


def validate_count(value: Any, *, name: str, minimum: int) -> int:
    """Check a count: an integer >= ``minimum`` (workers, threads, retries, replicates).

    Parameters
    ----------
    value : int
        Python or numpy integers. Floats are refused even when integral (``2.0``), as
        are bools: a count that arrives as either means something upstream went wrong.
    name : str
        How the message names the parameter, verbatim (``"workers"``, ``"--workers"``).
    minimum : int
        The smallest value allowed (1 for workers and threads, 0 for retries).

    Returns
    -------
    int

    Raises
    ------
    InputError
        ``"<name> must be an integer >= <minimum>, got <value>"``, with the type
        appended when the value is not an integer.

    Examples
    --------
    >>> validate_count(0, name="retries", minimum=0)
    0
    """
    problem = f"{name} must be an integer >= {minimum}, got {_short(value)}"
    if _is_bool(value) or not isinstance(value, numbers.Integral):
        raise InputError(f"{problem} ({type(value).__name__})")
    count = int(value)
    if count < minimum:
        raise InputError(problem)
    return count


# --------------------------------------------------------------------------- grids


def validate_grid(values: Any, *, lo: float, hi: float, name: str = "grid") -> np.ndarray:
    """Check the scales a curve is sampled at and return them as float64.

    Parameters
    ----------
    values : array_like
        One-dimensional, at least one and at most :data:`MAX_GRID` real numbers, all
        finite, **non-decreasing** and within ``[lo, hi]``. Repeats are allowed: a
        curve's value is a function of the scale, so a repeated scale is only a repeated
        sample, and ``parse_grid("0.5:0.5:3")`` makes them; a decrease is refused because
        it is almost always a mistake (reversed bounds, a shuffled column).
    lo, hi : float
        The closed range the scales must lie in (typically ``0`` and eps).
    name : str, optional
        How the message names the grid, verbatim. Default ``"grid"``.

    Returns
    -------
    numpy.ndarray
        A new 1-D float64 array; ``-0.0`` becomes ``0.0``.

    Raises
    ------
    InputError
        Naming the first offending entry by its 0-based index.

    Examples
    --------
    >>> validate_grid([0, 0.25, 0.5], lo=0.0, hi=0.5).tolist()
    [0.0, 0.25, 0.5]
    """
    lo, hi = float(lo), float(hi)
    if not (math.isfinite(lo) and math.isfinite(hi) and lo <= hi):
        raise InputError(f"{name}: bounds must be finite with lo <= hi, got [{lo!r}, {hi!r}]")
    try:
        arr = np.asarray(values)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{name} must be a 1-D array of numbers: {_one_line(exc)}") from exc
    if arr.ndim != 1:
        raise InputError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if arr.size == 0:
        raise InputError(f"{name} must hold at least one scale, got none")
    # The size is checked before any conversion copies the array.
    if arr.size > MAX_GRID:
        raise InputError(f"{name} has {arr.size} scales, more than the limit of {MAX_GRID}")
    if arr.dtype.kind not in "fiu":
        raise InputError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    grid = arr.astype(np.float64, copy=False)
    finite = np.isfinite(grid)
    if not finite.all():
        i = int(np.argmin(finite))
        raise InputError(f"{name} must be finite, but entry {i} is {float(grid[i])!r}")
    drops = np.diff(grid) < 0
    if drops.any():
        i = int(np.argmax(drops))
        raise InputError(
            f"{name} must be non-decreasing, but entry {i + 1} ({float(grid[i + 1])!r}) "
            f"is below entry {i} ({float(grid[i])!r})"
        )
    # Sorted, so only the ends can leave the range.
    if grid[0] < lo:
        raise InputError(f"{name} must lie within [{lo!r}, {hi!r}], but entry 0 is {float(grid[0])!r}")
    if grid[-1] > hi:
        i = int(np.argmax(grid > hi))
        raise InputError(f"{name} must lie within [{lo!r}, {hi!r}], but entry {i} is {float(grid[i])!r}")
    return grid + 0.0  # -0.0 -> 0.0, as parse_grid gives


# --------------------------------------------------------------------------- columns


def _column_item(item: Any, name: str, text: str) -> int | str:
    if isinstance(item, str):
        token = item.strip()
        if not token:
            raise InputError(f"{name} holds an empty column name in {text}")
        # In text (the command line, or a comma-separated string) a bare decimal integer
        # is a column number; pass a list to select a column whose name is all digits.
        return int(token) if re.fullmatch(r"\d+", token) else token
    if not _is_bool(item) and isinstance(item, numbers.Integral):
        if int(item) < 0:
            raise InputError(f"{name}: column numbers are 0-based and >= 0, got {int(item)}")
        return int(item)
    raise InputError(
        f"{name} must hold column names or 0-based column numbers, got {_short(item)} "
        f"({type(item).__name__})"
    )


def validate_columns(columns: Any, *, name: str = "columns") -> tuple[int | str, ...] | None:
    """Check a choice of table columns: names or 0-based numbers, in the order wanted.

    Parameters
    ----------
    columns : str, sequence of str or int, or None
        A comma-separated string (``"x,y,z"``, ``"1,2,3"``; a token of decimal digits
        is a number) or a sequence of names (``str``) and numbers (``int``). ``None``
        means no choice.
    name : str, optional
        How the message names the parameter, verbatim. Default ``"columns"``.

    Returns
    -------
    tuple of (int or str), or None
        Names stripped of surrounding spaces, numbers as ``int``.

    Raises
    ------
    InputError
        If the choice is empty, holds something that is neither a name nor a
        non-negative integer, or names the same column twice.

    Examples
    --------
    >>> validate_columns("x, y ,z"), validate_columns([3, "mass"]), validate_columns("1,2")
    (('x', 'y', 'z'), (3, 'mass'), (1, 2))
    """
    if columns is None:
        return None
    if isinstance(columns, str):
        text = repr(columns)
        items: list[Any] = columns.split(",")
    elif isinstance(columns, (bytes, bytearray)) or not isinstance(columns, Iterable):
        raise InputError(
            f"{name} must be column names or 0-based numbers (a list, or text like 'x,y,z'), "
            f"got {_short(columns)} ({type(columns).__name__})"
        )
    else:
        items = list(columns)
        text = _short(columns)
    if not items or (len(items) == 1 and isinstance(items[0], str) and not items[0].strip()):
        raise InputError(f"{name} must choose at least one column, got {text}")
    chosen = tuple(_column_item(item, name, text) for item in items)
    seen: set[int | str] = set()
    for item in chosen:
        if item in seen:
            raise InputError(f"{name} chooses column {item!r} twice")
        seen.add(item)
    return chosen


def validate_column(column: Any, *, name: str = "index_col") -> int | str | None:
    """Check one column choice (the index column to drop): a name, a 0-based number or None.

    Parameters
    ----------
    column : str, int or None
        A name, or a number (an ``int``, or a string of decimal digits such as ``"0"``).
    name : str, optional
        How the message names the parameter, verbatim. Default ``"index_col"``.

    Returns
    -------
    int, str or None

    Raises
    ------
    InputError
        If the value is empty, negative, a bool, a float or of another type.

    Examples
    --------
    >>> validate_column("0"), validate_column("id"), validate_column(None)
    (0, 'id', None)
    """
    if column is None:
        return None
    return _column_item(column, name, _short(column))


def validate_flag(value: Any, *, name: str) -> bool:
    """True or False (numpy booleans too); anything else is refused naming `name`."""
    if not isinstance(value, (bool, np.bool_)):
        raise InputError(f"{name} must be True or False, got {value!r}")
    return bool(value)


def validate_finite(value: Any, *, name: str) -> float:
    """A finite real number (not a boolean) as a float, -0.0 folded into 0.0."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(
            value, (int, float, np.integer, np.floating)) or not math.isfinite(float(value)):
        raise InputError(f"{name} must be a finite number, got {value!r}")
    return float(value) + 0.0
