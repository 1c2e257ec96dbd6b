"""A grid of cells over a point cloud, for planning on the cluster (pure; no I/O).

Cells are cubes of side ``side`` on the first ``k = min(m, 3)`` coordinates. Two points
within eps of each other differ by at most eps in every coordinate under each metric
chitally knows (Euclidean, Manhattan, Chebyshev), so with ``side >= eps`` an eps-neighbour
of a point lies in its own cell or one next door (``3**k`` cells in all): halos can be
found region by region without looking further. Cells are named by a Morton code of
their integer coordinates (21 bits per axis), so sorting the codes walks a Z-order curve
and a run of consecutive cells is a compact region.

The global row order of a staged plan is: cells in Morton order, rows inside a cell by
their input row id. Every stage can compute the id of any row it holds from the cell
table alone, without asking its neighbours.
"""

from __future__ import annotations

import numba as nb
import numpy as np

#: Bits of a cell coordinate per axis in a Morton code (3 x 21 = 63 bits).
BITS = 21
#: Cell coordinates are offset by this so that they are non-negative.
OFFSET = 1 << (BITS - 1)
#: At most this many coordinates take part in the grid.
MAX_GRID_DIMS = 3


class GridTooFine(ValueError):
    """The cells are too small for the coordinates' range (more than 2**21 per axis)."""


def grid_dims(dim: int) -> int:
    return min(int(dim), MAX_GRID_DIMS)


@nb.njit(nogil=True, cache=True)
def _codes(x, side, k, out):
    bad = -1
    for i in range(x.shape[0]):
        code = np.uint64(0)
        for a in range(k):
            c = np.int64(np.floor(x[i, a] / side)) + OFFSET
            if c < 0 or c >= (1 << BITS):
                bad = i
                return bad
            u = np.uint64(c)
            for b in range(BITS):
                code |= ((u >> np.uint64(b)) & np.uint64(1)) << np.uint64(b * k + a)
        out[i] = np.int64(code)
    return bad


def cell_codes(x: np.ndarray, side: float) -> np.ndarray:
    """The Morton code (int64) of each row's cell.

    Raises
    ------
    GridTooFine
        When a row's cell coordinate does not fit in 21 bits.
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    k = grid_dims(x.shape[1])
    out = np.empty(x.shape[0], dtype=np.int64)
    bad = _codes(x, float(side), k, out)
    if bad >= 0:
        raise GridTooFine(
            f"row {bad} lies {int(np.max(np.abs(x[bad, :k])) / side)} cells from the origin; "
            f"cells of side {side:g} allow at most {OFFSET - 1} per axis (a larger --cell-size, "
            "or coordinates centred on the data)")
    return out


@nb.njit(nogil=True, cache=True)
def _decode(codes, k, out):
    for i in range(codes.shape[0]):
        u = np.uint64(codes[i])
        for a in range(k):
            c = np.uint64(0)
            for b in range(BITS):
                c |= ((u >> np.uint64(b * k + a)) & np.uint64(1)) << np.uint64(b)
            out[i, a] = np.int64(c)


@nb.njit(nogil=True, cache=True)
def _encode(coords, k, out):
    for i in range(coords.shape[0]):
        code = np.uint64(0)
        ok = True
        for a in range(k):
            c = coords[i, a]
            if c < 0 or c >= (1 << BITS):
                ok = False
                break
            u = np.uint64(c)
            for b in range(BITS):
                code |= ((u >> np.uint64(b)) & np.uint64(1)) << np.uint64(b * k + a)
        out[i] = np.int64(code) if ok else -1


def neighbour_codes(codes: np.ndarray, k: int) -> np.ndarray:
    """For each cell, the codes of the ``3**k`` cells around it (itself included);
    -1 where a neighbour falls off the grid. Shape (len(codes), 3**k)."""
    codes = np.ascontiguousarray(codes, dtype=np.int64)
    coords = np.empty((codes.shape[0], k), dtype=np.int64)
    _decode(codes, k, coords)
    steps = np.stack(np.meshgrid(*([np.array([-1, 0, 1])] * k), indexing="ij"), -1).reshape(-1, k)
    out = np.empty((codes.shape[0], steps.shape[0]), dtype=np.int64)
    for s, step in enumerate(steps):
        _encode(coords + step, k, out[:, s])
    return out


def cut_regions(counts: np.ndarray, region_rows: int) -> np.ndarray:
    """Region boundaries over cells in Morton order: cell indices where regions start
    (and the number of cells at the end), each region at most `region_rows` rows unless
    one cell alone holds more."""
    counts = np.asarray(counts, dtype=np.int64)
    starts = [0]
    total = 0
    csum = np.cumsum(counts)
    n = counts.shape[0]
    while True:
        s = starts[-1]
        base = csum[s - 1] if s else 0
        # the first cell that would push this region past region_rows starts the next
        nxt = int(np.searchsorted(csum, base + region_rows, side="right"))
        nxt = max(nxt, s + 1)
        if nxt >= n:
            break
        starts.append(nxt)
        total += 1
    starts.append(n)
    return np.asarray(starts, dtype=np.int64)


def halo_regions(codes: np.ndarray, region_of_cell: np.ndarray, k: int,
                 chunk: int = 1 << 16) -> tuple[np.ndarray, np.ndarray]:
    """For each cell, the regions other than its own that hold a cell next to it, as
    CSR (offsets, regions): those regions need the cell's rows in their halo. Cells are
    looked at `chunk` at a time: the temporaries hold 3**k neighbours of each, about
    (3**k * 8 * 5) bytes per cell, so the chunk bounds the driver's peak here."""
    codes = np.asarray(codes, dtype=np.int64)
    n = codes.shape[0]
    lengths = np.zeros(n, dtype=np.int64)
    parts = []
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        nb_codes = neighbour_codes(codes[a:b], k)
        pos = np.searchsorted(codes, nb_codes)
        pos_c = np.minimum(pos, n - 1)
        found = (nb_codes >= 0) & (codes[pos_c] == nb_codes)
        reg = np.where(found, region_of_cell[pos_c], -1)
        own = region_of_cell[a:b, None]
        reg = np.where(reg == own, -1, reg)
        reg.sort(axis=1)
        # unique per row: keep entries that differ from their left neighbour
        keep = reg >= 0
        keep[:, 1:] &= reg[:, 1:] != reg[:, :-1]
        lengths[a:b] = keep.sum(axis=1)
        parts.append(reg[keep])
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    regions = np.concatenate(parts) if parts else np.zeros(0, np.int64)
    return offsets, regions.astype(np.int64)
