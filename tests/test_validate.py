"""Tests for chitally.validate: every validator accepts what it should, returns the
canonical type, and refuses the rest with one line that starts with the name it was given."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest

from chitally import sources, validate
from chitally.curve import MAX_GRID, parse_grid
from chitally.validate import (
    InputError,
    validate_column,
    validate_columns,
    validate_count,
    validate_eps,
    validate_grid,
    validate_max_dim,
    validate_points,
    validate_positive,
)

POINTS = np.random.default_rng(7).standard_normal((9, 3))


def refused(func: Callable[..., object], *args: object, **kwargs: object) -> str:
    """Call ``func`` expecting an InputError; return its message after checking it is one line."""
    with pytest.raises(InputError) as info:
        func(*args, **kwargs)
    message = str(info.value)
    assert message
    assert "\n" not in message and "\r" not in message
    return message


def test_sources_reexports_the_same_objects() -> None:
    # Other modules import these from sources; they must be the very same objects.
    for name in ("InputError", "validate_points", "validate_eps", "validate_max_dim", "MAX_COORDINATE"):
        assert getattr(sources, name) is getattr(validate, name)
    assert issubclass(InputError, ValueError)


def test_input_error_folds_line_breaks() -> None:
    assert str(InputError("a\n  b\r\nc ")) == "a b c"


# --------------------------------------------------------------------------- points


class TestValidatePoints:
    def test_float64_c_contiguous_is_not_copied(self) -> None:
        assert validate_points(POINTS) is POINTS

    def test_conversions(self) -> None:
        assert validate_points([[1, 2], [3, 4]]).tolist() == [[1.0, 2.0], [3.0, 4.0]]
        big_endian = POINTS.astype(">f8")
        got = validate_points(big_endian)
        assert got.dtype == np.dtype("=f8")
        np.testing.assert_array_equal(got, POINTS)
        assert validate_points(np.array([[2**53]], dtype=np.uint64)).tolist() == [[2.0**53]]
        assert validate_points(np.array([[-5]], dtype=np.int8)).tolist() == [[-5.0]]

    @pytest.mark.parametrize(
        ("data", "shape"),
        [(np.arange(5.0), "(5,)"), (np.float64(1.0), "()"), (np.zeros((2, 2, 2)), "(2, 2, 2)")],
    )
    def test_not_2d(self, data: np.ndarray, shape: str) -> None:
        message = refused(validate_points, data)
        assert message.startswith("points: expected a 2-D array of shape (n, m) for n points in R^m")
        assert f"got shape {shape}" in message

    def test_1d_gets_a_hint(self) -> None:
        assert "reshape n values to (n, 1)" in refused(validate_points, np.arange(3.0))

    @pytest.mark.parametrize("shape", [(0, 3), (3, 0), (0, 0)])
    def test_empty(self, shape: tuple[int, int]) -> None:
        assert refused(validate_points, np.zeros(shape)) == (
            f"points: expected at least one point with at least one coordinate, got shape {shape}"
        )

    @pytest.mark.parametrize(
        ("data", "dtype"),
        [
            (np.ones((2, 2), dtype=bool), "bool"),
            (np.ones((2, 2), dtype=complex), "complex128"),
            (np.array([["a", "b"]]), "<U1"),
            (np.array([[1, None]], dtype=object), "object"),
            (np.zeros((1, 1), dtype="M8[s]"), "datetime64[s]"),
        ],
    )
    def test_non_real_dtype(self, data: np.ndarray, dtype: str) -> None:
        assert refused(validate_points, data) == (
            f"points: expected real numbers (a float or integer dtype), got dtype {dtype}"
        )

    @pytest.mark.skipif(np.finfo(np.longdouble).nmant <= 52, reason="longdouble is float64 here")
    def test_longdouble_refused(self) -> None:
        assert "would be rounded to float64" in refused(validate_points, np.ones((1, 1), np.longdouble))

    def test_ragged_list(self) -> None:
        assert refused(validate_points, [[1.0, 2.0], [3.0]]).startswith("points: not an (n, m) array of numbers")

    @pytest.mark.parametrize(
        ("value", "text"), [(np.nan, "nan"), (np.inf, "inf"), (-np.inf, "-inf")]
    )
    def test_non_finite_first_in_row_order(self, value: float, text: str) -> None:
        data = np.zeros((5, 3))
        data[3, 0] = np.nan  # later row: not the first
        data[2, 2] = value
        assert refused(validate_points, data, where="cloud.npy") == (
            f"cloud.npy: row 2, column 2 is {text}; every coordinate must be finite"
        )

    def test_non_finite_fortran_order_reported_in_row_order(self) -> None:
        data = np.asfortranarray(np.zeros((4, 3)))
        data[3, 0] = np.inf
        data[1, 2] = np.nan
        assert "row 1, column 2 is nan" in refused(validate_points, data)

    def test_float32_inf(self) -> None:
        data = np.zeros((2, 2), dtype=np.float32)
        data[1, 0] = np.float32(-np.inf)
        assert "row 1, column 0 is -inf" in refused(validate_points, data)

    def test_scan_is_chunked(self, monkeypatch: pytest.MonkeyPatch) -> None:
        # Tiny chunks so the bad value lies many chunks in: exercises the row offset.
        monkeypatch.setattr(validate, "_CHUNK_ELEMENTS", 6)
        data = np.zeros((50, 3))
        data[37, 1] = np.nan
        assert "row 37, column 1 is nan" in refused(validate_points, data)
        ints = np.zeros((50, 3), dtype=np.int64)
        ints[41, 2] = -(2**53) - 1
        assert "row 41, column 2 holds the integer -9007199254740993" in refused(validate_points, ints)

    @pytest.mark.parametrize(
        ("value", "dtype"),
        [(2**53 + 1, np.int64), (-(2**53) - 1, np.int64), (2**64 - 1, np.uint64)],
    )
    def test_integer_beyond_2_53(self, value: int, dtype: type) -> None:
        data = np.zeros((3, 2), dtype=dtype)
        data[1, 1] = value
        assert refused(validate_points, data) == (
            f"points: row 1, column 1 holds the integer {value}, beyond 2**53 in magnitude, "
            "which float64 cannot hold exactly"
        )

    def test_magnitude_beyond_limit(self) -> None:
        data = np.zeros((3, 2))
        data[2, 0] = -2e150
        assert refused(validate_points, data, where="c.npy") == (
            "c.npy: row 2, column 0 is -2e+150; coordinates must lie within +-1e+150 "
            "so that squared distances do not overflow (rescale the input)"
        )
        data[2, 0] = 1e150  # the limit itself is allowed
        assert validate_points(data)[2, 0] == 1e150


# --------------------------------------------------------------------------- scalars


class TestPositive:
    @pytest.mark.parametrize(
        ("value", "expected"),
        [(0.25, 0.25), (2, 2.0), (np.float32(0.5), 0.5), (np.int64(3), 3.0), (1e-300, 1e-300), (5e-324, 5e-324)],
    )
    @pytest.mark.parametrize("func", [validate_eps, lambda v: validate_positive(v, name="task_cost")])
    def test_accepted(self, func: Callable[[object], float], value: object, expected: float) -> None:
        got = func(value)
        assert type(got) is float and got == expected

    @pytest.mark.parametrize(
        ("value", "shown"),
        [(0, "0"), (0.0, "0.0"), (-0.0, "-0.0"), (-1.5, "-1.5"), (float("nan"), "nan"),
         (float("inf"), "inf"), (-float("inf"), "-inf")],
    )
    @pytest.mark.parametrize("name", ["eps", "--task-cost", "cover_radius"])
    def test_refused_names_the_parameter(self, name: str, value: object, shown: str) -> None:
        assert refused(validate_positive, value, name=name) == f"{name} must be a finite number > 0, got {shown}"

    def test_huge_integer_is_not_finite(self) -> None:
        message = refused(validate_positive, 10**400, name="--cover-radius")
        assert message.startswith("--cover-radius must be a finite number > 0, got 1000")

    @pytest.mark.parametrize(
        ("value", "kind"), [(True, "bool"), (np.bool_(True), "bool"), ("0.5", "str"), (1j, "complex"), (None, "NoneType")]
    )
    def test_wrong_type(self, value: object, kind: str) -> None:
        assert refused(validate_positive, value, name="--task-cost") == (
            f"--task-cost must be a finite number > 0, got {value!r} ({kind})"
        )

    def test_eps_default_and_given_name(self) -> None:
        assert refused(validate_eps, 0) == "eps must be a finite number > 0, got 0"
        assert refused(validate_eps, -1, name="--eps") == "--eps must be a finite number > 0, got -1"


class TestMaxDim:
    @pytest.mark.parametrize(
        ("max_dim", "expected"), [(None, None), (0, 0), (3, 3), (4.0, 4), (np.int64(2), 2), (np.float64(1.0), 1)]
    )
    def test_accepted(self, max_dim: object, expected: int | None) -> None:
        got = validate_max_dim(max_dim)
        assert got == expected and (got is None or type(got) is int)

    @pytest.mark.parametrize(
        ("max_dim", "suffix"),
        [(-1, ""), (2.5, ""), (float("nan"), ""), (float("inf"), ""), (-2.0, ""),
         (True, " (bool)"), (np.bool_(False), " (bool)"), ("3", " (str)")],
    )
    @pytest.mark.parametrize("name", ["max_dim", "--max-dim"])
    def test_refused_names_the_parameter(self, name: str, max_dim: object, suffix: str) -> None:
        assert refused(validate_max_dim, max_dim, name=name) == (
            f"{name} must be None or an integer >= 0, got {max_dim!r}{suffix}"
        )

    def test_default_name(self) -> None:
        assert refused(validate_max_dim, -1) == "max_dim must be None or an integer >= 0, got -1"


class TestCount:
    @pytest.mark.parametrize(
        ("value", "minimum", "expected"),
        [(1, 1, 1), (8, 1, 8), (0, 0, 0), (np.int64(5), 0, 5), (np.uint8(3), 3, 3), (10**30, 1, 10**30)],
    )
    def test_accepted(self, value: object, minimum: int, expected: int) -> None:
        got = validate_count(value, name="workers", minimum=minimum)
        assert type(got) is int and got == expected

    @pytest.mark.parametrize(
        ("name", "value", "minimum"),
        [("--workers", 0, 1), ("threads", -3, 1), ("--retries", -1, 0), ("replicates", 1, 2)],
    )
    def test_below_minimum(self, name: str, value: int, minimum: int) -> None:
        assert refused(validate_count, value, name=name, minimum=minimum) == (
            f"{name} must be an integer >= {minimum}, got {value}"
        )

    @pytest.mark.parametrize(
        ("value", "kind"),
        [(True, "bool"), (False, "bool"), (np.bool_(True), "bool"), (2.0, "float"),
         (np.float64(2.0), "float64"), ("2", "str"), (None, "NoneType")],
    )
    def test_wrong_type(self, value: object, kind: str) -> None:
        assert refused(validate_count, value, name="--workers", minimum=1) == (
            f"--workers must be an integer >= 1, got {value!r} ({kind})"
        )


# --------------------------------------------------------------------------- grids


class TestGrid:
    def test_accepted_with_repeats_and_ends(self) -> None:
        got = validate_grid([0, 0.25, 0.25, 0.5], lo=0.0, hi=0.5)
        assert got.dtype == np.float64 and got.tolist() == [0.0, 0.25, 0.25, 0.5]

    def test_integers_and_negative_zero(self) -> None:
        got = validate_grid(np.array([0, 1, 2], dtype=np.int32), lo=0, hi=2)
        assert got.dtype == np.float64 and got.tolist() == [0.0, 1.0, 2.0]
        zero = validate_grid([-0.0], lo=0.0, hi=1.0)
        assert zero.view(np.uint64)[0] == 0  # -0.0 comes back as +0.0

    def test_parse_grid_output_passes(self) -> None:
        grid = parse_grid("0:0.3:7")
        np.testing.assert_array_equal(validate_grid(grid, lo=0.0, hi=0.3), grid)
        assert validate_grid(parse_grid("0.5:0.5:3"), lo=0.0, hi=1.0).tolist() == [0.5, 0.5, 0.5]

    @pytest.mark.parametrize(
        ("values", "message"),
        [
            ([[0.0, 0.1]], "must be one-dimensional, got shape (1, 2)"),
            (np.float64(0.5), "must be one-dimensional, got shape ()"),
            ([], "must hold at least one scale, got none"),
            (["a", "b"], "must hold real numbers, got dtype <U1"),
            ([True, False], "must hold real numbers, got dtype bool"),
            ([0.0, np.nan, 0.2], "must be finite, but entry 1 is nan"),
            ([0.0, 0.1, np.inf], "must be finite, but entry 2 is inf"),
            ([0.0, 0.3, 0.2, 0.1], "must be non-decreasing, but entry 2 (0.2) is below entry 1 (0.3)"),
            ([-0.1, 0.0], "must lie within [0.0, 1.0], but entry 0 is -0.1"),
            ([0.5, 1.0, 1.5, 2.0], "must lie within [0.0, 1.0], but entry 2 is 1.5"),
        ],
    )
    @pytest.mark.parametrize("name", ["grid", "--grid"])
    def test_refused_names_the_grid(self, name: str, values: object, message: str) -> None:
        assert refused(validate_grid, values, lo=0.0, hi=1.0, name=name) == f"{name} {message}"

    def test_ragged(self) -> None:
        assert refused(validate_grid, [[0.0], [0.1, 0.2]], lo=0, hi=1).startswith(
            "grid must be a 1-D array of numbers"
        )

    def test_size_limit(self) -> None:
        # A zero-copy broadcast view: the limit is checked before anything is allocated.
        over = np.broadcast_to(np.float64(0.5), (MAX_GRID + 1,))
        assert refused(validate_grid, over, lo=0, hi=1, name="--grid") == (
            f"--grid has {MAX_GRID + 1} scales, more than the limit of {MAX_GRID}"
        )
        at_limit = np.broadcast_to(np.float64(0.5), (MAX_GRID,))
        assert validate_grid(at_limit, lo=0, hi=1).shape == (MAX_GRID,)

    def test_bad_bounds(self) -> None:
        assert refused(validate_grid, [0.5], lo=1.0, hi=0.0) == (
            "grid: bounds must be finite with lo <= hi, got [1.0, 0.0]"
        )


# --------------------------------------------------------------------------- columns


class TestColumns:
    @pytest.mark.parametrize(
        ("columns", "expected"),
        [
            (None, None),
            ("x,y,z", ("x", "y", "z")),
            (" x , y ", ("x", "y")),
            ("1,2,3", (1, 2, 3)),
            ("0", (0,)),
            ("mass,2", ("mass", 2)),
            (["x", "y"], ("x", "y")),
            ([3, 1], (3, 1)),
            ((np.int64(2), "b"), (2, "b")),
            (["12"], (12,)),
            ("Unnamed: 0", ("Unnamed: 0",)),
        ],
    )
    def test_accepted(self, columns: object, expected: object) -> None:
        assert validate_columns(columns) == expected

    @pytest.mark.parametrize(
        ("columns", "message"),
        [
            ("", "must choose at least one column, got ''"),
            ([], "must choose at least one column, got []"),
            ("x,,z", "holds an empty column name in 'x,,z'"),
            ([-1], ": column numbers are 0-based and >= 0, got -1"),
            ([1.0], " must hold column names or 0-based column numbers, got 1.0 (float)"),
            ([True], " must hold column names or 0-based column numbers, got True (bool)"),
            (5, " must be column names or 0-based numbers (a list, or text like 'x,y,z'), got 5 (int)"),
            (b"x,y", " must be column names or 0-based numbers (a list, or text like 'x,y,z'), got b'x,y' (bytes)"),
            ("x,y,x", " chooses column 'x' twice"),
            ([2, "a", 2], " chooses column 2 twice"),
        ],
    )
    @pytest.mark.parametrize("name", ["columns", "--columns"])
    def test_refused_names_the_parameter(self, name: str, columns: object, message: str) -> None:
        got = refused(validate_columns, columns, name=name)
        assert got.startswith(name)
        assert message in got

    def test_refused_messages_exact(self) -> None:
        assert refused(validate_columns, "x,y,x", name="--columns") == "--columns chooses column 'x' twice"
        assert refused(validate_columns, [-1]) == "columns: column numbers are 0-based and >= 0, got -1"

    @pytest.mark.parametrize(
        ("column", "expected"), [(None, None), (0, 0), ("0", 0), (" 3 ", 3), ("id", "id"), (np.int32(1), 1)]
    )
    def test_one_column_accepted(self, column: object, expected: object) -> None:
        assert validate_column(column) == expected

    @pytest.mark.parametrize(
        ("column", "message"),
        [
            (-1, "--index-col: column numbers are 0-based and >= 0, got -1"),
            ("", "--index-col holds an empty column name in ''"),
            (0.0, "--index-col must hold column names or 0-based column numbers, got 0.0 (float)"),
            (False, "--index-col must hold column names or 0-based column numbers, got False (bool)"),
        ],
    )
    def test_one_column_refused(self, column: object, message: str) -> None:
        assert refused(validate_column, column, name="--index-col") == message

    def test_one_column_default_name(self) -> None:
        assert refused(validate_column, -2).startswith("index_col: ")
