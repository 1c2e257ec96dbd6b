"""Exact Euler characteristic curves of cubical filtrations of n-dimensional arrays.

Two constructions, as users of images and volumes expect them:

``"vertices"``
    Every entry is a vertex of the grid; every cube of the grid (edge, square, cube, ...)
    takes the largest value of its corners. A cube exists when all its corners exist.
    This is the low-connectivity convention (4 neighbours in 2-D, 6 in 3-D).
``"cells"``
    Every entry is a top-dimensional cube; every face takes the smallest value of the
    top cubes around it. A face exists when at least one of the top cubes around it
    exists. This is the high-connectivity convention (8 neighbours in 2-D, 26 in 3-D).

The curve is ``chi(t) = sum over cells c with value(c) <= t of (-1)**dim(c)``, stored as
a jump table (distinct values, integer jumps) on the domain ``[min f, max f]``.

Missing entries (a mask, or NaN with ``mask_nan=True``) are not part of the complex: in
the vertex construction a cube touching a missing entry is absent; in the cell
construction a missing top cube is absent and a face exists when at least one top cube
around it exists (its value is the smallest over the existing ones).

Counting is vectorised per cell type: each subset of axes is one type of cell, whose
values are a max (or min) over shifted views of the array. Values are first replaced by
their ranks, so that every dtype (integers of any width, floats) is counted exactly and
the per-type count is one `numpy.bincount`.

Block counting, for distribution: `block_jumps` counts exactly the cells one block of
entries owns, reading the block with a one-entry halo, so that the jump tables of
disjoint blocks that tile the array add to the whole array's. Ownership of a cell:

- vertex construction: the block holding the cell's lowest corner;
- cell construction: along each axis a cell either spans a top cube (index ``c``: owned
  by the block holding ``c``) or lies on the grid hyperplane ``v`` between top cubes
  ``v - 1`` and ``v`` (owned by the block holding ``v``, and the last hyperplane ``v =
  n`` by the block holding ``n - 1``).

No Dask, no Zarr: the job kind `chitally.jobs.field` distributes this module.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from .curve import Curve
from .validate import InputError

CONSTRUCTIONS = ("vertices", "cells")
#: Arrays of more dimensions than this are refused (2**n cell types).
MAX_NDIM = 8


def check_construction(construction: Any, *, name: str = "construction") -> str:
    """The construction's name, or `InputError` naming the allowed ones."""
    if construction not in CONSTRUCTIONS:
        raise InputError(f"{name} must be one of {', '.join(CONSTRUCTIONS)}, got {construction!r}")
    return str(construction)


def check_field(array: Any, *, what: str = "array") -> np.ndarray:
    """`array` as a numpy array of real numbers with 1 to `MAX_NDIM` dimensions.

    Booleans become 0/1. Values are not scanned here (NaN and infinities are found
    where the values are counted).
    """
    arr = array if isinstance(array, np.ndarray) else np.asarray(array)
    if arr.dtype == np.bool_:
        arr = arr.astype(np.uint8)
    if arr.dtype.kind not in "iuf":
        raise InputError(f"{what} must hold real numbers (integers or floats), got dtype {arr.dtype}")
    if not 1 <= arr.ndim <= MAX_NDIM:
        raise InputError(f"{what} must have 1 to {MAX_NDIM} dimensions, got {arr.ndim}")
    if arr.size == 0:
        raise InputError(f"{what} is empty (shape {arr.shape})")
    return arr


def check_mask(mask: Any, shape: tuple[int, ...], *, what: str = "mask") -> np.ndarray | None:
    """A boolean mask of `shape` (True = present), or None."""
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.dtype != np.bool_:
        raise InputError(f"{what} must be boolean (True where an entry is part of the complex), "
                         f"got dtype {m.dtype}")
    if m.shape != shape:
        raise InputError(f"{what} has shape {m.shape}, the array {shape}")
    return m


def present_entries(values: np.ndarray, mask: np.ndarray | None, mask_nan: bool,
                    *, offset: Sequence[int] | None = None, what: str = "array") -> np.ndarray | None:
    """Which entries are part of the complex (None: all), checking the values.

    NaN is refused unless `mask_nan` (one line naming its position, shifted by `offset`
    into the whole array's indices); infinite values are refused always (the curve's
    domain is the values' range, which must be finite).
    """
    present = mask
    if values.dtype.kind == "f":
        finite = np.isfinite(values)
        if not finite.all():
            nan = np.isnan(values)
            if mask_nan:
                present = ~nan if present is None else present & ~nan
            bad = ~finite if not mask_nan else (~finite & ~nan)
            if present is not None:
                bad &= present
            if bad.any():
                local = np.unravel_index(int(np.flatnonzero(bad.ravel())[0]), values.shape)
                kind = "NaN" if np.isnan(values[local]) else "an infinite value"
                where = tuple(int(p) + int(o) for p, o in zip(local, offset or [0] * values.ndim))
                hint = " (mask_nan treats NaN as missing)" if kind == "NaN" else ""
                raise InputError(f"{what} holds {kind} at position {where}{hint}")
    return present


def _ranks(values: np.ndarray, present: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """(distinct present values sorted, rank array with the sentinel len(distinct) at
    absent entries). Ranks are int32 when they fit: the shifted views stay small."""
    flat = values.ravel()
    if present is not None:
        keep = present.ravel()
        distinct, inv = np.unique(flat[keep], return_inverse=True)
    else:
        distinct, inv = np.unique(flat, return_inverse=True)
    k = distinct.size
    dtype = np.int32 if k < np.iinfo(np.int32).max else np.int64
    if present is None:
        ranks = inv.astype(dtype, copy=False).reshape(values.shape)
    else:
        ranks = np.full(values.size, k, dtype=dtype)
        ranks[keep] = inv
        ranks = ranks.reshape(values.shape)
    return distinct, ranks


def _shift_op(arr: np.ndarray, axis: int, op: Any) -> np.ndarray:
    lo = [slice(None)] * arr.ndim
    hi = [slice(None)] * arr.ndim
    lo[axis] = slice(None, -1)
    hi[axis] = slice(1, None)
    return op(arr[tuple(lo)], arr[tuple(hi)])


def _signed_counts(ranks: np.ndarray, k: int, construction: str,
                   owned_plain: Sequence[slice], owned_reduced: Sequence[slice]) -> np.ndarray:
    """Signed cell counts per rank (int64, length k) over every cell type.

    A cell type is the set R of axes along which the array is reduced (max over two
    neighbours for vertices: the cell spans that axis; min for cells: the face lies on a
    hyperplane across that axis). Along an axis in R the owned cells are
    ``owned_reduced[a]`` of the reduced array, otherwise ``owned_plain[a]``.
    """
    n = ranks.ndim
    op = np.maximum if construction == "vertices" else np.minimum
    total = np.zeros(k + 1, dtype=np.int64)

    def visit(arr: np.ndarray, reduced: tuple[int, ...], next_axis: int) -> None:
        sel = tuple(owned_reduced[a] if a in reduced else owned_plain[a] for a in range(n))
        part = arr[sel]
        if part.size:
            dim = len(reduced) if construction == "vertices" else n - len(reduced)
            counts = np.bincount(part.ravel(), minlength=k + 1)
            if dim % 2:
                total[: k + 1] -= counts
            else:
                total[: k + 1] += counts
        for a in range(next_axis, n):
            if arr.shape[a] >= 2:
                visit(_shift_op(arr, a, op), reduced + (a,), a + 1)

    visit(ranks, (), 0)
    return total[:k]  # the last bin counts absent cells (the sentinel)


def _block_counts(values: np.ndarray, present: np.ndarray | None, construction: str,
                  ext_lo: Sequence[int], owned: Sequence[tuple[int, int]],
                  shape: Sequence[int], superlevel: bool) -> tuple[np.ndarray, np.ndarray]:
    """Jump table of the cells owned by the block `owned` (global entry ranges), given
    the entries `values` read from global offsets `ext_lo` (the block and its halo)."""
    distinct, ranks = _ranks(values, present)
    k = distinct.size
    if superlevel:
        # the sublevel filtration of -f: ranks reversed, scales negated (no overflow:
        # negation happens in float64 after ranking)
        present_mask = ranks < k
        ranks = np.where(present_mask, k - 1 - ranks, k).astype(ranks.dtype, copy=False)
        scales = -distinct[::-1].astype(np.float64)
    else:
        scales = distinct.astype(np.float64)
    n = values.ndim
    plain, reduced = [], []
    if construction == "vertices":
        for a in range(n):
            lo, hi = owned[a]
            base = lo - ext_lo[a]
            plain.append(slice(base, hi - ext_lo[a]))
            # a cube along a needs its upper corner: bases up to shape - 2
            reduced.append(slice(base, min(hi, shape[a] - 1) - ext_lo[a]))
    else:
        pads = []
        for a in range(n):
            lo, hi = owned[a]
            pad_lo = 1 if ext_lo[a] == 0 else 0
            pad_hi = 1 if ext_lo[a] + values.shape[a] == shape[a] else 0
            pads.append((pad_lo, pad_hi))
            first = ext_lo[a] - pad_lo  # global index of padded local 0
            plain.append(slice(lo - first, hi - first))
            # hyperplane v sits between padded entries v-1 and v: reduced local v-first-1
            top = hi + 1 if hi == shape[a] else hi
            reduced.append(slice(lo - first - 1, top - first - 1))
        if any(p != (0, 0) for p in pads):
            ranks = np.pad(ranks, pads, mode="constant", constant_values=k)
    counts = _signed_counts(ranks, k, construction, plain, reduced)
    nz = np.flatnonzero(counts)
    return scales[nz], counts[nz]


def _owned_ranges(block: Sequence[slice] | None, shape: Sequence[int]) -> list[tuple[int, int]]:
    if block is None:
        return [(0, s) for s in shape]
    if len(block) != len(shape):
        raise InputError(f"a block needs one slice per axis: {len(block)} for {len(shape)} axes")
    out = []
    for a, (s, size) in enumerate(zip(block, shape)):
        lo, hi, step = s.indices(size)
        if step != 1 or hi <= lo:
            raise InputError(f"block slice {s} along axis {a} must be a non-empty step-1 range")
        out.append((lo, hi))
    return out


def halo_ranges(owned: Sequence[tuple[int, int]], shape: Sequence[int]) -> list[tuple[int, int]]:
    """The entries a block reads: its own plus one entry on each side (within the array).

    The vertex construction needs only the upper side and the cell construction only
    the lower one; reading both keeps one rule for both and costs one layer.
    """
    return [(max(lo - 1, 0), min(hi + 1, s)) for (lo, hi), s in zip(owned, shape)]


def block_jumps(array: Any, construction: str, block_slices: Sequence[slice] | None = None, *,
                superlevel: bool = False, mask: Any = None, mask_nan: bool = False,
                halo: Any = None, halo_offset: Sequence[int] | None = None,
                halo_mask: Any = None, shape: Sequence[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Jump table of the cells one block of an array owns (see the module docstring).

    Either pass the whole `array` (and its `mask`), and the block's entries with their
    halo are sliced from it; or pass ``array=None`` with `halo` (the entries
    `halo_ranges` names, read by the caller from wherever the array lives),
    `halo_offset` (global index of ``halo[0, 0, ...]``), `halo_mask` and the whole
    array's `shape`.

    Parameters
    ----------
    array : array_like or None
        The whole array of values.
    construction : {"vertices", "cells"}
    block_slices : sequence of slice, optional
        The owned entries, one step-1 slice per axis; None means the whole array.
    superlevel : bool
        Count the sublevel filtration of ``-array`` (scales are ``-f``).
    mask : array_like of bool, optional
        True where an entry is part of the complex.
    mask_nan : bool
        Treat NaN entries as missing instead of refusing them.

    Returns
    -------
    values : ndarray of float64
        Distinct scales, increasing.
    jumps : ndarray of int64
        Signed count of the owned cells at each scale (nonzero).

    Raises
    ------
    InputError
        On a bad construction, block, mask, NaN (unless `mask_nan`) or infinity.
    """
    construction = check_construction(construction)
    if array is not None:
        arr = check_field(array)
        shape = arr.shape
        m = check_mask(mask, shape)
        owned = _owned_ranges(block_slices, shape)
        ext = halo_ranges(owned, shape)
        sel = tuple(slice(lo, hi) for lo, hi in ext)
        values = arr[sel]
        sub_mask = None if m is None else m[sel]
        ext_lo = [lo for lo, _ in ext]
    else:
        if halo is None or shape is None or halo_offset is None:
            raise ValueError("block_jumps needs the whole array, or halo, halo_offset and shape")
        shape = tuple(int(s) for s in shape)
        values = check_field(halo)
        owned = _owned_ranges(block_slices, shape)
        ext_lo = [int(o) for o in halo_offset]
        sub_mask = check_mask(halo_mask, values.shape, what="halo mask")
        for a, ((lo, hi), e0, e) in enumerate(zip(owned, ext_lo, values.shape)):
            need = halo_ranges(owned, shape)[a]
            if e0 > need[0] or e0 + e < need[1]:
                raise ValueError(f"the halo along axis {a} covers [{e0}, {e0 + e}), "
                                 f"the block needs [{need[0]}, {need[1]})")
    present = present_entries(values, sub_mask, mask_nan, offset=ext_lo)
    if present is not None and not present.any():
        return np.zeros(0, np.float64), np.zeros(0, np.int64)
    return _block_counts(values, present, construction, ext_lo, owned, shape, superlevel)


def field_domain(array: np.ndarray, present: np.ndarray | None, superlevel: bool) -> tuple[float, float]:
    """The curve's domain: the range of the present values (of ``-f`` for superlevel);
    ``(0, 0)`` when nothing is present."""
    vals = array if present is None else array[present]
    if vals.size == 0:
        return 0.0, 0.0
    lo, hi = float(vals.min()), float(vals.max())
    return (-hi, -lo) if superlevel else (lo, hi)


def field_curve(array: Any, construction: str = "vertices", superlevel: bool = False,
                mask: Any = None, mask_nan: bool = False) -> Curve:
    """The exact Euler characteristic curve of an array's cubical sublevel filtration.

    Parameters
    ----------
    array : array_like
        An n-dimensional array (n >= 1) of integers or floats (booleans count as 0/1).
    construction : {"vertices", "cells"}
        ``"vertices"``: entries are vertices and every cube takes the largest value of
        its corners (4-connectivity in 2-D, 6 in 3-D). ``"cells"``: entries are
        top-dimensional cubes and every face takes the smallest value of the top cubes
        around it (8-connectivity in 2-D, 26 in 3-D).
    superlevel : bool
        The superlevel filtration ``{f >= s}``, computed as the sublevel filtration of
        ``-f``: the curve's scale is ``t = -s`` (its domain ``[-max f, -min f]``).
    mask : array_like of bool, optional
        True where an entry is part of the complex; other entries are missing.
    mask_nan : bool
        Treat NaN entries as missing; by default a NaN is refused naming its position.

    Returns
    -------
    Curve
        On ``[min, max]`` of the present values, ``n_points`` the number of present
        entries; ``max_dim`` None (the complex's dimension is the array's).

    Raises
    ------
    InputError
        A bad dtype or shape, a mask of another shape, a NaN (unless `mask_nan`), an
        infinite value.

    Examples
    --------
    >>> import numpy as np
    >>> c = field_curve(np.array([[0, 1], [1, 0]]), "vertices")
    >>> int(c.at(0)), int(c.at(1))
    (2, 1)
    """
    construction = check_construction(construction)
    arr = check_field(array)
    m = check_mask(mask, arr.shape)
    present = present_entries(arr, m, mask_nan)
    start, eps = field_domain(arr, present, superlevel)
    n_present = int(arr.size if present is None else present.sum())
    if n_present == 0:
        return Curve.zero(eps=0.0, max_dim=None, start=0.0)
    values, jumps = _block_counts(arr, present, construction, [0] * arr.ndim,
                                  [(0, s) for s in arr.shape], arr.shape, superlevel)
    return Curve.from_jumps(values, jumps, eps=eps, max_dim=None, n_points=n_present, start=start)


__all__ = ["CONSTRUCTIONS", "block_jumps", "check_construction", "check_field", "check_mask",
           "field_curve", "field_domain", "halo_ranges", "present_entries"]
