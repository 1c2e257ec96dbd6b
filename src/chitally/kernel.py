"""Per-edge counting kernels: the exact jump table of a block of owned rows.

Given the coordinates of a halo (rows sorted by global id, so local order is global order)
and the contiguous range of rows it owns, the kernel returns the jumps of the Euler
characteristic curve contributed by the owned vertices and by every edge whose lower
endpoint is owned. Every simplex with two or more vertices is counted at its maximal
edge e (edges ordered by (d2, lower id, higher id)); see DESIGN.md for the identity

    c(e) = sum over cliques S of G_e, |S| <= D - 1, of (-1)^(|S| + 1)

and, without a cap, c(e) = reduced Euler characteristic of the clique complex of G_e,
computed by strong collapses and the split rule chi~(G) = chi~(G - v) - chi~(G[N(v)]).

The halo's edges are sorted once by the edge order, and every edge is known by its rank
in that order: comparing two edges is comparing two integers, each CSR row comes out
already in edge order, and the jumps come out in increasing scale, so that grouping them
is one linear pass.

This module knows nothing of files, Zarr or Dask: arrays in, arrays out. The compiled
functions release the GIL, and each runs over a range (of rows, edges, tree nodes) that
the Python drivers here cut into blocks of about 50 ms (blocks.py): threads share the
blocks of the counting, and Ctrl-C is seen between two blocks. `compiled_calls` lists
what a run compiles (warmup.py compiles it ahead).
"""

from __future__ import annotations

import contextlib
import math
import os
import threading
import time
from dataclasses import dataclass, field

import llvmlite.binding as llvm
import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic
from scipy.spatial import cKDTree

from . import kdtree
from .blocks import Pacer, run_blocks, whole_calls
from .metric import (
    accumulate,
    distance_key,
    key_bound,
    key_length,
    metric_tag,
    minkowski_p,
    query_radius,
    within_key,
)

UNCAPPED = -1  # the compiled code's spelling of max_dim=None

# counters reported by the kernel, in this order
STAT_NAMES = ("edges", "cones", "collapsed", "splits", "frame_pairs")

# edge ranks and neighbour ids are stored as int32 to halve the memory traffic of the
# hot scans; a halo needing more is far beyond what one task is planned to hold
_MAX_EDGES = 2**31 - 2


@intrinsic
def _popcount(typingctx, x):
    sig = types.int64(types.uint64)

    def codegen(context, builder, signature, args):
        return builder.ctpop(args[0])

    return sig, codegen


@intrinsic
def _trailing_zeros(typingctx, x):
    sig = types.int64(types.uint64)

    def codegen(context, builder, signature, args):
        return builder.cttz(args[0], ir.Constant(ir.IntType(1), 1))

    return sig, codegen


@intrinsic
def _pext_hw(typingctx, x, m):
    sig = types.uint64(types.uint64, types.uint64)

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.IntType(64), [ir.IntType(64), ir.IntType(64)])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.x86.bmi.pext.64")
        return builder.call(fn, args)

    return sig, codegen


ONE = np.uint64(1)
ZERO = np.uint64(0)
ALL_ONES = np.uint64(0xFFFFFFFFFFFFFFFF)


@nb.njit(inline="always", nogil=True, cache=True)
def _pext_sw(x, m):
    r = ZERO
    k = ZERO
    while m != 0:
        low = m & (~m + ONE)
        if x & low:
            r |= ONE << k
        k += ONE
        m &= m - ONE
    return r


def _has_bmi2() -> bool:
    # the hardware instruction is used only when numba compiles for this very CPU
    if nb.config.CPU_NAME not in (None, "host") or nb.config.CPU_FEATURES:
        return False
    try:
        return "+bmi2" in llvm.get_host_cpu_features().flatten().split(",")
    except (RuntimeError, OSError):
        return False


_pext = _pext_hw if _has_bmi2() else _pext_sw


# ---------------------------------------------------------------------------------------
# the neighbour graph
# ---------------------------------------------------------------------------------------

# Every loop over edges, rows or tree nodes below is a compiled call over one block of
# them, driven from Python by `blocks.run_blocks`, so that Ctrl-C is seen between blocks
# (see blocks.py). A loop over few items is one call. First blocks, in items:
_FIRST_EDGES = 1 << 16
_FIRST_ROWS = 1 << 16
# a leaf of a dense halo may meet thousands of others
_FIRST_LEAVES = 8
# halos from this many rows on estimate their edges before the join
_SAMPLED_ROWS = 1 << 12


def _plain(x: np.ndarray) -> np.ndarray:
    """x as a C-contiguous, aligned, writeable float64 array (a copy only if it is not):
    the one array type the compiled functions are compiled and cached for, where a
    read-only or strided input would compile another signature in the middle of a run."""
    return np.require(x, dtype=np.float64, requirements=["C", "A", "W"])


def _edge_blocks(n: int, call) -> None:
    """call(a, b) over consecutive blocks of the n edges (one call when n is small)."""
    if n <= _FIRST_EDGES:
        call(0, n)
    else:
        run_blocks(0, n, call, Pacer(_FIRST_EDGES))


@nb.njit(nogil=True, cache=True)
def _filter_pairs(coords, pairs, eps, mt):
    """Keep the candidate pairs that pass the one distance rule, as (lo, hi, d2); d2 is
    the key of the metric of `mt` (metric.metric_tag)."""
    k = pairs.shape[0]
    lo = np.empty(k, dtype=np.int32)
    hi = np.empty(k, dtype=np.int32)
    d2 = np.empty(k, dtype=np.float64)
    m = 0
    for t in range(k):
        i = pairs[t, 0]
        j = pairs[t, 1]
        s = distance_key(coords, i, coords, j, mt)
        if within_key(s, eps, mt):
            if i > j:
                i, j = j, i
            lo[m] = i
            hi[m] = j
            d2[m] = s
            m += 1
    return lo, hi, d2, m


@nb.njit(inline="always", nogil=True, cache=True)
def _before(d2a, loa, hia, d2b, lob, hib):
    """The edge order: (d2, lo, hi) lexicographically."""
    return d2a < d2b or (d2a == d2b and (loa < lob or (loa == lob and hia < hib)))


@nb.njit(nogil=True, cache=True)
def _sort_bucket_small(elo, ehi, ed2, a, b):
    """Insertion sort of records [a, b) by (d2, lo, hi); buckets are a handful long."""
    for t in range(a + 1, b):
        x = ed2[t]
        l = elo[t]
        u = ehi[t]
        s = t - 1
        while s >= a:
            y = ed2[s]
            if y < x or (y == x and (elo[s] < l or (elo[s] == l and ehi[s] < u))):
                break
            ed2[s + 1] = y
            elo[s + 1] = elo[s]
            ehi[s + 1] = ehi[s]
            s -= 1
        ed2[s + 1] = x
        elo[s + 1] = l
        ehi[s + 1] = u


@nb.njit(nogil=True, cache=True)
def _merge_runs(slo, shi, sd2, s0, dlo, dhi, dd2, d0, a, mid, end):
    """Merge sorted runs [a, mid) and [mid, end) of the source (indices from s0) into
    [a, end) of the destination (indices from d0)."""
    i = a
    j = mid
    for k in range(a, end):
        if j >= end or (i < mid and _before(sd2[s0 + i], slo[s0 + i], shi[s0 + i],
                                            sd2[s0 + j], slo[s0 + j], shi[s0 + j])):
            dlo[d0 + k] = slo[s0 + i]
            dhi[d0 + k] = shi[s0 + i]
            dd2[d0 + k] = sd2[s0 + i]
            i += 1
        else:
            dlo[d0 + k] = slo[s0 + j]
            dhi[d0 + k] = shi[s0 + j]
            dd2[d0 + k] = sd2[s0 + j]
            j += 1


@nb.njit(nogil=True, cache=True)
def _sort_bucket_large(elo, ehi, ed2, a, b, tlo, thi, td2):
    """Sort records [a, b) by (d2, lo, hi) when a bucket is crowded (ties, clusters),
    where insertion sort would be quadratic: insertion-sorted runs, then merges through
    the scratch arrays t* (at least b - a long). The keys are distinct, so this is the
    one order any sort gives; a merge sort of our own compiles in a fraction of the time
    numba's argsort takes."""
    n = b - a
    run = 32
    for s in range(a, b, run):
        _sort_bucket_small(elo, ehi, ed2, s, min(s + run, b))
    width = run
    in_place = True  # where the sorted runs are: [a, b) of e*, or [0, n) of t*
    zero = a - a  # an int64 like a, not a literal: one compiled _merge_runs
    while width < n:
        for s in range(0, n, 2 * width):
            mid = min(s + width, n)
            end = min(s + 2 * width, n)
            if in_place:
                _merge_runs(elo, ehi, ed2, a, tlo, thi, td2, zero, s, mid, end)
            else:
                _merge_runs(tlo, thi, td2, zero, elo, ehi, ed2, a, s, mid, end)
        in_place = not in_place
        width *= 2
    if not in_place:
        for k in range(n):
            elo[a + k] = tlo[k]
            ehi[a + k] = thi[k]
            ed2[a + k] = td2[k]


# buckets longer than this are sorted by _sort_bucket_large
_SMALL_BUCKET = 48
# coarse buckets of the first distribution pass: few enough write streams to stay cached
_COARSE = 2048


def _edge_graph(coords: np.ndarray, pairs: np.ndarray, eps: float):
    """The eps-graph of the halo with its edges sorted by (d2, lo, hi).

    Returns (offsets int64[h+1], nbrs int32[2m], erank int32[2m], elo int32[m],
    ehi int32[m], ed2 float64[m]): edge g is (elo[g], ehi[g]) of squared length ed2[g];
    CSR entry k is neighbour nbrs[k] through edge erank[k], rows in increasing rank.
    """
    lo0, hi0, d20, m = _filter_pairs(coords, pairs, eps, ())
    return _sorted_graph(coords.shape[0], lo0, hi0, d20, m)


def _sorted_graph(h: int, lo0: np.ndarray, hi0: np.ndarray, d20: np.ndarray, m: int):
    """_edge_graph from the first m accepted records (lo0 < hi0, d2) in any order: the
    sort fixes the edge order, so the neighbour search may emit pairs as it likes."""
    offsets, elo, ehi, ed2 = _sorted_edges(h, lo0, hi0, d20, m)
    nbrs, erank = _rows(offsets, elo, ehi)
    return offsets, nbrs, erank, elo, ehi, ed2


def _sorted_edges(h: int, lo0: np.ndarray, hi0: np.ndarray, d20: np.ndarray, m: int):
    """(offsets, elo, ehi, ed2): the first m records sorted by (d2, lo, hi), and the CSR
    row offsets of the h vertices (their degrees summed).

    The arrays are numpy's: large numpy arrays are backed by huge pages where the system
    allows it, and the page faults of arrays allocated inside compiled code measured a
    third of a kernel call.

    Two distribution passes by value instead of a multi-pass radix sort plus a gather:
    u = d2 * scale is non-decreasing in d2 (a product by a positive constant, a
    difference with a constant and floor are all monotone), so coarse buckets floor(u),
    fine buckets floor((u - coarse) * nfine) inside them, and a sort of every fine bucket
    by (d2, lo, hi) sort the whole edge list, ties included. The coarse pass writes to
    few streams and each coarse bucket fits in cache for the fine pass, where one random
    scatter over all edges would miss the cache on nearly every write.
    """
    offsets = np.zeros(h + 1, dtype=np.int64)
    elo = np.empty(m, dtype=np.int32)
    ehi = np.empty(m, dtype=np.int32)
    ed2 = np.empty(m, dtype=np.float64)
    dmax = float(d20[:m].max()) if m else 0.0
    ncoarse = _COARSE if m > 4 * _COARSE else max(1, m >> 2)
    # dmax == 0 (all duplicates) or inf gives scale 0: every finite d2 goes to bucket 0
    # and an infinite one (inf * 0 is nan) to the last bucket, which is still monotone
    scale = ncoarse / dmax if dmax > 0.0 else 0.0
    if not (scale < math.inf):
        scale = 0.0
    top = ncoarse - 1
    start = np.zeros(ncoarse + 1, dtype=np.int64)
    _edge_blocks(m, lambda a, b: _coarse_count(lo0, hi0, d20, a, b, scale, top, start, offsets))
    np.cumsum(start, out=start)
    np.cumsum(offsets, out=offsets)
    fill = start[:-1].copy()
    _edge_blocks(m, lambda a, b: _coarse_scatter(lo0, hi0, d20, a, b, scale, top, fill, elo, ehi, ed2))
    biggest = int(np.diff(start).max())
    fend = np.empty((biggest >> 2) + 1, dtype=np.int64)
    tlo = np.empty(biggest, dtype=np.int32)
    thi = np.empty(biggest, dtype=np.int32)
    td2 = np.empty(biggest, dtype=np.float64)

    def fine(a: int, b: int) -> None:
        _fine_sort(elo, ehi, ed2, start, a, b, scale, fend, tlo, thi, td2)

    if m <= _FIRST_EDGES:
        fine(0, ncoarse)
    else:
        # a coarse bucket costs about its edges
        run_blocks(0, ncoarse, fine, Pacer(_FIRST_EDGES), weights=start.astype(np.float64))
    return offsets, elo, ehi, ed2


def _rows(offsets: np.ndarray, elo: np.ndarray, ehi: np.ndarray):
    """(nbrs, erank): the CSR rows of the sorted edges, each row in increasing rank."""
    m = elo.shape[0]
    nbrs = np.empty(2 * m, dtype=np.int32)
    erank = np.empty(2 * m, dtype=np.int32)
    fill = offsets[:-1].copy()
    _edge_blocks(m, lambda a, b: _fill_rows(elo, ehi, a, b, fill, nbrs, erank))
    return nbrs, erank


@nb.njit(nogil=True, cache=True)
def _coarse_count(lo0, hi0, d20, g0, g1, scale, top, start, offsets):
    """Count records [g0, g1) into coarse buckets (start[c + 1]) and degrees."""
    for g in range(g0, g1):
        u = d20[g] * scale
        c = int(u) if u < top else top
        start[c + 1] += 1
        # degrees do not depend on the order, so the CSR row sizes are counted here too
        offsets[lo0[g] + 1] += 1
        offsets[hi0[g] + 1] += 1


@nb.njit(nogil=True, cache=True)
def _coarse_scatter(lo0, hi0, d20, g0, g1, scale, top, fill, elo, ehi, ed2):
    """Move records [g0, g1) to the next free slot of their coarse bucket."""
    for g in range(g0, g1):
        x = d20[g]
        u = x * scale
        c = int(u) if u < top else top
        y = fill[c]
        elo[y] = lo0[g]
        ehi[y] = hi0[g]
        ed2[y] = x
        fill[c] = y + 1


@nb.njit(nogil=True, cache=True)
def _fine_sort(elo, ehi, ed2, start, c0, c1, scale, fend, tlo, thi, td2):
    """Sort coarse buckets [c0, c1): distribute each into about four edges a fine
    bucket through the scratch arrays, then sort every fine bucket."""
    for c in range(c0, c1):
        a = start[c]
        e = start[c + 1]
        if e - a <= _SMALL_BUCKET:
            if e - a > 1:
                _sort_bucket_small(elo, ehi, ed2, a, e)
            continue
        nf = (e - a) >> 2
        last = nf - 1
        for f in range(nf):
            fend[f] = 0
        for t in range(a, e):
            v = (ed2[t] * scale - c) * nf
            f = int(v) if v < last else last
            fend[f] += 1
        acc = 0
        for f in range(nf):
            k = fend[f]
            fend[f] = acc
            acc += k
        for t in range(a, e):
            v = (ed2[t] * scale - c) * nf
            f = int(v) if v < last else last
            y = fend[f]
            tlo[y] = elo[t]
            thi[y] = ehi[t]
            td2[y] = ed2[t]
            fend[f] = y + 1
        for t in range(e - a):
            elo[a + t] = tlo[t]
            ehi[a + t] = thi[t]
            ed2[a + t] = td2[t]
        # fend[f] is now where fine bucket f ends; the scratch arrays are free again
        p = a
        for f in range(nf):
            q = a + fend[f]
            if q - p > 1:
                if q - p <= _SMALL_BUCKET:
                    _sort_bucket_small(elo, ehi, ed2, p, q)
                else:
                    _sort_bucket_large(elo, ehi, ed2, p, q, tlo, thi, td2)
            p = q


@nb.njit(nogil=True, cache=True)
def _fill_rows(elo, ehi, g0, g1, fill, nbrs, erank):
    """Append edges [g0, g1) to the CSR rows of both endpoints."""
    for g in range(g0, g1):
        a = elo[g]
        b = ehi[g]
        nbrs[fill[a]] = b
        erank[fill[a]] = g
        fill[a] += 1
        nbrs[fill[b]] = a
        erank[fill[b]] = g
        fill[b] += 1


# ---------------------------------------------------------------------------------------
# the neighbour search: a compiled KD-tree joined leaf by leaf
# ---------------------------------------------------------------------------------------

# cKDTree.query_pairs builds a Python-level result and is followed by a second pass that
# recomputes every distance by the one rule; the join below applies the rule once, in
# compiled code, and writes (lo, hi, d2) straight into the arrays _sorted_graph sorts.
# A uniform grid over the widest 2-5 coordinates (cells eps wide, 3^k stencil) was tried
# and lost to this tree on the 4-sphere in R^5: its cells either held too few rows to
# amortise the stencil or proposed several times more candidates than the tree's boxes.
# Loops compiled for a known number of coordinates: a loop of known length unrolls, and
# the loop over rows around it vectorises. Coordinates sit in rows (X[k, j] is coordinate
# k of point j) and every sum of squares runs in coordinate order from 0.0, so each
# distance has the bits of metric.squared_distance.
_UNROLLED_DIMS = 8

# Rows per KD-tree leaf in the join: a row is tested against a whole leaf at once, one bit
# per row in a 64-bit mask.
_TREE_LEAF = 64


def width_tag(dims: int) -> tuple:
    """The compile-time width of the distance loops: a tuple of `dims` zeros for 1 to
    _UNROLLED_DIMS coordinates, () for any other count.

    The compiled functions that take it are specialised on its type, so a run compiles
    the loops of its own number of coordinates only (numba compiles one signature per
    tuple length, on first use), where one function holding every width compiled them
    all.
    """
    return (0,) * dims if 1 <= dims <= _UNROLLED_DIMS else ()


@nb.njit(inline="always", nogil=True)
def _within_mask(X, tag, mt, i, j0, e2, buf):
    """Bit u set when d2(i, j0 + u) <= e2, for the _TREE_LEAF rows from j0.

    len(tag) coordinates unrolled; with an empty tag, the X.shape[0] coordinates build
    up in buf one at a time (the same order, so the same bits)."""
    width = len(tag)
    mask = ZERO
    if width > 0:
        for u in range(_TREE_LEAF):
            s = 0.0
            for k in range(width):
                d = X[k, i] - X[k, j0 + u]
                s = accumulate(s, d, mt)
            mask |= np.uint64(s <= e2) << np.uint64(u)
        return mask
    for u in range(_TREE_LEAF):
        buf[u] = 0.0
    for k in range(X.shape[0]):
        xi = X[k, i]
        for u in range(_TREE_LEAF):
            d = xi - X[k, j0 + u]
            buf[u] = accumulate(buf[u], d, mt)
    for u in range(_TREE_LEAF):
        mask |= np.uint64(buf[u] <= e2) << np.uint64(u)
    return mask


@nb.njit(inline="always", nogil=True)
def _closer_count(X, tag, mt, c, thr):
    """(#j < c with d2(j, c) < thr, #j < c with d2(j, c) == thr) for len(tag) >= 1
    coordinates."""
    width = len(tag)
    below = 0
    equal = 0
    # whole blocks of 8 with the tail masked: no scalar remainder loop
    for j in range((c + 7) & ~7):
        s = 0.0
        for k in range(width):
            d = X[k, j] - X[k, c]
            s = accumulate(s, d, mt)
        inside = j < c
        below += (s < thr) & inside
        equal += (s == thr) & inside
    return below, equal


def _new_tree(x: np.ndarray, leaf_size: int):
    """kdtree._new_tree in numpy (one compiled function fewer to wait for): the depth,
    a copy of the rows to reorder, and the node arrays, the root holding every row."""
    n, m = x.shape
    depth = 0
    while (n + (1 << depth) - 1) >> depth > leaf_size:
        depth += 1
    n_nodes = (1 << (depth + 1)) - 1
    start = np.empty(n_nodes, dtype=np.int64)
    stop = np.empty(n_nodes, dtype=np.int64)
    start[0] = 0
    stop[0] = n
    return (depth, x.copy(), np.arange(n, dtype=np.int64), start, stop,
            np.empty((n_nodes, m), dtype=np.float64), np.empty((n_nodes, m), dtype=np.float64))


@nb.njit(nogil=True, cache=True)
def _split_nodes(xs, perm, start, stop, box_lo, box_hi, first, last, first_leaf):
    """kdtree's split of nodes [first, last), one level of the tree at a time."""
    for node in range(first, last):
        kdtree._split_node(xs, perm, start, stop, box_lo, box_hi, node, first_leaf)


def build_tree(x: np.ndarray, leaf_size: int):
    """`kdtree.build_tree` in blocks of nodes (the same splits in the same order, so the
    same tree): (xs, perm, start, stop, box_lo, box_hi)."""
    x = _plain(x)
    n = x.shape[0]
    depth, xs, perm, start, stop, box_lo, box_hi = _new_tree(x, int(leaf_size))
    first_leaf = (1 << depth) - 1
    if n <= _FIRST_ROWS:
        _split_nodes(xs, perm, start, stop, box_lo, box_hi, 0, start.shape[0], first_leaf)
        return xs, perm, start, stop, box_lo, box_hi
    pacer = Pacer(_FIRST_ROWS)  # in rows: splitting a node costs about its rows
    for level in range(depth + 1):
        first = (1 << level) - 1
        run_blocks(first, 2 * first + 1,
                   lambda a, b: _split_nodes(xs, perm, start, stop, box_lo, box_hi, a, b, first_leaf),
                   pacer, unit=max(1.0, n / (first + 1)))
    return xs, perm, start, stop, box_lo, box_hi


@nb.njit(nogil=True, cache=True)
def _sampled_edges(X, tag, mt, h, e2, buf, samples, t0, t1):
    """Rows within reach of samples [t0, t1) of `samples` evenly spaced rows (themselves
    included)."""
    found = 0
    for t in range(t0, t1):
        i = t * h // samples
        for j0 in range(0, h, _TREE_LEAF):
            mask = _within_mask(X, tag, mt, i, j0, e2, buf)
            if h - j0 < _TREE_LEAF:
                mask &= ALL_ONES >> np.uint64(_TREE_LEAF - (h - j0))
            found += _popcount(mask)
    return found


def _sampled_edge_count(X: np.ndarray, tag: tuple, h: int, e2: float, buf: np.ndarray, mt: tuple = ()) -> int:
    """A generous estimate of the edges among h rows, from the degrees of 64 evenly
    spaced rows: the join then rarely grows (and copies) its output. None (0) below
    _SAMPLED_ROWS rows, where 64 samples would cost a good part of the join itself and
    growing the output is cheap."""
    if h < _SAMPLED_ROWS:
        return 0
    samples = 64
    found = [0]

    def count(a: int, b: int) -> None:
        found[0] += _sampled_edges(X, tag, mt, h, e2, buf, samples, a, b)

    if samples * h <= _FIRST_ROWS:
        count(0, samples)
    else:
        run_blocks(0, samples, count, Pacer(_FIRST_ROWS), unit=float(h))  # a sample costs h rows
    # each row is within reach of itself
    return int(1.25 * h * (found[0] - samples) / (2 * samples))


def _rows_by_coordinate(xs: np.ndarray, pad: int) -> np.ndarray:
    """X[k, i] = xs[i, k], with pad zero columns after the last row."""
    h, dims = xs.shape
    X = np.zeros((dims, h + pad))
    X[:, :h] = xs.T
    return X


@nb.njit(nogil=True, cache=True)
def _join_leaves(X, tag, mt, xs, perm, start, stop, box_lo, box_hi, eps, e2, prune2, max_edges,
                 a_from, a_to, olo, ohi, od2, m, near, buf):
    """The pairs within eps of leaves [a_from, a_to) (heap node numbers) with every leaf
    at or after them, appended to (olo, ohi, od2) from m; returns the arrays (grown when
    full), the new m (-1 past max_edges) and the near-leaf buffer (grown when short).
    buf is scratch of _TREE_LEAF values for the loops of an empty tag."""
    for a in range(a_from, a_to):
        a0 = start[a]
        a1 = stop[a]
        if a0 == a1:
            continue
        # leaves wholly before leaf a were joined with it when their turn came
        n_near = kdtree.near_leaves_by(start, stop, box_lo, box_hi, a, prune2, near, a0, mt)
        if n_near > near.shape[0]:
            near = np.empty(2 * n_near, dtype=np.int64)
            kdtree.near_leaves_by(start, stop, box_lo, box_hi, a, prune2, near, a0, mt)
        for i in range(a0, a1):
            p = perm[i]
            for t in range(n_near):
                b = near[t]
                if b != a and kdtree.box_key(box_lo, box_hi, b, xs, i, mt) > prune2:
                    continue
                b0 = start[b]
                b1 = stop[b]
                jfrom = i + 1 if b == a else b0
                if jfrom >= b1:
                    continue
                # room for the whole leaf first, so that the hot loop never reallocates
                need = m + (b1 - jfrom)
                if need > olo.shape[0]:
                    if m > max_edges:
                        return olo, ohi, od2, -1, near
                    cap = max(2 * olo.shape[0], need)
                    nlo = np.empty(cap, dtype=np.int32)
                    nhi = np.empty(cap, dtype=np.int32)
                    nd2 = np.empty(cap, dtype=np.float64)
                    for k in range(m):
                        nlo[k] = olo[k]
                        nhi[k] = ohi[k]
                        nd2[k] = od2[k]
                    olo = nlo
                    ohi = nhi
                    od2 = nd2
                # the mask proposes (rows jfrom..b1-1 of the leaf only); the one rule decides
                mask = _within_mask(X, tag, mt, i, b0, e2, buf)
                mask &= ALL_ONES >> np.uint64(_TREE_LEAF - (b1 - b0))
                mask &= ~((ONE << np.uint64(jfrom - b0)) - ONE)
                while mask != ZERO:
                    j = b0 + _trailing_zeros(mask)
                    mask &= mask - ONE
                    d2 = distance_key(xs, i, xs, j, mt)
                    if within_key(d2, eps, mt):
                        q = perm[j]
                        if p < q:
                            olo[m] = p
                            ohi[m] = q
                        else:
                            olo[m] = q
                            ohi[m] = p
                        od2[m] = d2
                        m += 1
    if m > max_edges:
        return olo, ohi, od2, -1, near
    return olo, ohi, od2, m, near


def _tree_edges(coords: np.ndarray, eps: float, prune2: float, max_edges: int, metric: str = "euclidean"):
    """Every pair within eps by the one rule of `metric`, as (lo, hi, d2, m) like
    _filter_pairs (d2 the metric's key; prune2 a key too, metric.key_bound); m = -1 when
    there are more than max_edges.

    Leaf by leaf: one walk finds the leaves at or after it in leaf order whose boxes come
    within the pruning bound of its box, then each row is tested against the boxes of
    those leaves and joined with the rows of the ones it can reach (rows after it in its
    own leaf), so each pair is seen once: a whole leaf at a time, as a bit mask of the
    rows within the widened bound. The boxes and the mask only propose (with the widened
    bound of metric.query_radius); membership is the one rule.
    """
    coords = _plain(coords)
    h, dims = coords.shape
    eps = float(eps)
    tag = width_tag(dims)
    xs, perm, start, stop, box_lo, box_hi = build_tree(coords, _TREE_LEAF)
    # coordinates in rows; a leaf's mask may read up to _TREE_LEAF rows past the end
    X = _rows_by_coordinate(xs, _TREE_LEAF)
    buf = np.empty(_TREE_LEAF)
    n_nodes = start.shape[0]
    first_leaf = (n_nodes - 1) // 2
    mt = metric_tag(metric)
    e2 = key_bound(eps, metric) * (1.0 + 1e-12) + 1e-300
    # a dense halo's estimate may be huge: beyond 2**27 edges the output grows as it fills
    cap = max(1024, 4 * h, min(_sampled_edge_count(X, tag, h, e2, buf, mt), 1 << 27))
    out = [np.empty(cap, dtype=np.int32), np.empty(cap, dtype=np.int32), np.empty(cap, dtype=np.float64),
           0, np.empty(64, dtype=np.int64)]

    def join(a: int, b: int) -> None:
        if out[3] >= 0:  # past max_edges: the rest is skipped
            out[:] = _join_leaves(X, tag, mt, xs, perm, start, stop, box_lo, box_hi, eps, e2, prune2,
                                  max_edges, a, b, out[0], out[1], out[2], out[3], out[4], buf)

    if n_nodes - first_leaf <= _FIRST_LEAVES:
        join(first_leaf, n_nodes)
    else:
        run_blocks(first_leaf, n_nodes, join, Pacer(_FIRST_LEAVES))
    return out[0], out[1], out[2], out[3]



# ---------------------------------------------------------------------------------------
# counting on G_e
# ---------------------------------------------------------------------------------------


@nb.njit(inline="always", nogil=True, cache=True)
def _set_edge(adj, i, j):
    adj[i, j >> 6] |= ONE << np.uint64(j & 63)
    adj[j, i >> 6] |= ONE << np.uint64(i & 63)


@nb.njit(inline="always", nogil=True, cache=True)
def _signed_clique_sum(counts, depth_max):
    """c(e) from clique counts by size: sum over k of (-1)^(k+1) counts[k]."""
    total = 0
    sign = -1
    for k in range(depth_max + 1):
        total += sign * counts[k]
        sign = -sign
    return total


@nb.njit(nogil=True, cache=True)
def _count_capped(adj, L, W, depth_max, rem, wstart, counts):
    """Signed clique count of G_e (vertex set L) for cliques of size <= depth_max.

    Cliques are extended in increasing vertex order; the deepest level is a popcount.
    Multi-word version, for the rare G_e with more than 64 vertices.
    """
    for k in range(depth_max + 1):
        counts[k] = 0
    counts[0] = 1
    n1 = 0
    for w in range(W):
        n1 += _popcount(L[w])
    counts[1] = n1
    if depth_max >= 2 and n1 >= 2:
        for w in range(W):
            rem[0, w] = L[w]
        wstart[0] = 0
        level = 0
        while level >= 0:
            w = wstart[level]
            while w < W and rem[level, w] == 0:
                w += 1
            wstart[level] = w
            if w == W:
                level -= 1
                continue
            word = rem[level, w]
            b = _trailing_zeros(word)
            rem[level, w] = word & (word - ONE)
            v = w * 64 + b
            cnt = 0
            for x in range(w, W):
                y = rem[level, x] & adj[v, x]
                rem[level + 1, x] = y
                cnt += _popcount(y)
            counts[level + 2] += cnt
            if level + 3 <= depth_max and cnt >= 2:
                for x in range(w):
                    rem[level + 1, x] = 0
                wstart[level + 1] = w
                level += 1
    return _signed_clique_sum(counts, depth_max)


@nb.njit(nogil=True, cache=True)
def _count_capped1(cadj, n, depth_max, rem, counts):
    """_count_capped on a compacted G_e of at most 64 vertices (one word per row)."""
    for k in range(depth_max + 1):
        counts[k] = 0
    counts[0] = 1
    counts[1] = n
    if depth_max >= 2 and n >= 2:
        rem[0] = (ONE << np.uint64(n)) - ONE if n < 64 else ~ZERO
        level = 0
        while level >= 0:
            word = rem[level]
            if word == 0:
                level -= 1
                continue
            b = _trailing_zeros(word)
            word &= word - ONE
            rem[level] = word
            y = word & cadj[b]
            cnt = _popcount(y)
            counts[level + 2] += cnt
            if level + 3 <= depth_max and cnt >= 2:
                rem[level + 1] = y
                level += 1
    return _signed_clique_sum(counts, depth_max)


@nb.njit(nogil=True, cache=True)
def _reduced_euler1(cadj, n, stack, signs, stats):
    """chi~ of the clique complex of a compacted G_e of at most 64 vertices.

    Almost every G_e of a geometric cloud is a cone, so the cone test runs first and
    costs one popcount per vertex.
    """
    total = 0
    stack[0] = (ONE << np.uint64(n)) - ONE if n < 64 else ~ZERO
    signs[0] = 1
    top = 1
    while top > 0:
        top -= 1
        s = signs[top]
        V = stack[top]
        while True:
            if V == 0:
                total -= s
                break
            nv1 = _popcount(V) - 1
            cone = False
            word = V
            while word != 0:
                b = _trailing_zeros(word)
                word &= word - ONE
                if _popcount(cadj[b] & V) == nv1:
                    cone = True
                    break
            if cone:
                stats[1] += 1
                break
            # strong collapse: drop every vertex whose closed neighbourhood sits inside
            # another's; isolated vertices peel off as +1 each (a disjoint point)
            removed = False
            word = V
            while word != 0:
                b = _trailing_zeros(word)
                word &= word - ONE
                bit = ONE << np.uint64(b)
                nbv = cadj[b] & V
                if nbv == 0:
                    V &= ~bit
                    total += s
                    removed = True
                    continue
                cand = nbv
                while cand != 0:
                    u = _trailing_zeros(cand)
                    cand &= cand - ONE
                    if (nbv & ~cadj[u] & ~(ONE << np.uint64(u))) == 0:
                        V &= ~bit
                        stats[2] += 1
                        removed = True
                        break
            if removed:
                continue
            # no collapse left: split on a vertex of least degree
            best = -1
            bestd = 65
            word = V
            while word != 0:
                b = _trailing_zeros(word)
                word &= word - ONE
                d = _popcount(cadj[b] & V)
                if d < bestd:
                    bestd = d
                    best = b
            stats[3] += 1
            V &= ~(ONE << np.uint64(best))
            stack[top] = V
            signs[top] = s
            stack[top + 1] = cadj[best] & V
            signs[top + 1] = -s
            top += 2
            break
    return total


@nb.njit(nogil=True, cache=True)
def _reduced_euler(adj, L, W, stack, signs, degs, verts, stats):
    """chi~ of the clique complex of G_e by strong collapses and the split rule.

    Multi-word version, for the rare G_e with more than 64 vertices.
    """
    total = 0
    for w in range(W):
        stack[0, w] = L[w]
    signs[0] = 1
    top = 1
    while top > 0:
        top -= 1
        s = signs[top]
        V = stack[top]
        while True:
            n = 0
            for w in range(W):
                word = V[w]
                while word != 0:
                    b = _trailing_zeros(word)
                    word &= word - ONE
                    verts[n] = w * 64 + b
                    n += 1
            if n == 0:
                total -= s
                break
            cone = False
            for a in range(n):
                v = verts[a]
                d = 0
                for w in range(W):
                    d += _popcount(adj[v, w] & V[w])
                degs[a] = d
                if d == n - 1:
                    cone = True
                    break
            if cone:
                stats[1] += 1
                break
            removed = False
            for a in range(n):
                v = verts[a]
                dv = degs[a]
                if dv == 0:
                    V[v >> 6] &= ~(ONE << np.uint64(v & 63))
                    total += s
                    removed = True
                    continue
                dominated = False
                for w in range(W):
                    word = adj[v, w] & V[w]
                    while word != 0:
                        b = _trailing_zeros(word)
                        word &= word - ONE
                        u = w * 64 + b
                        inside = True
                        for x in range(W):
                            # N(v) \ {u} must lie in N(u)
                            rest = adj[v, x] & V[x] & ~adj[u, x]
                            if x == (u >> 6):
                                rest &= ~(ONE << np.uint64(u & 63))
                            if rest != 0:
                                inside = False
                                break
                        if inside:
                            dominated = True
                            break
                    if dominated:
                        break
                if dominated:
                    V[v >> 6] &= ~(ONE << np.uint64(v & 63))
                    stats[2] += 1
                    removed = True
            if removed:
                continue
            best = 0
            for a in range(1, n):
                if degs[a] < degs[best]:
                    best = a
            v = verts[best]
            stats[3] += 1
            V[v >> 6] &= ~(ONE << np.uint64(v & 63))
            for w in range(W):
                stack[top + 1, w] = adj[v, w] & V[w]
            signs[top] = s
            signs[top + 1] = -s
            top += 2
            break
    return total


# ---------------------------------------------------------------------------------------
# per-vertex loops
# ---------------------------------------------------------------------------------------


# Cap 2 by geometry. |L(e)| for e = (p, w_c) counts the w_j earlier in the row of p
# (key(p, w_j) < key(e)) that are closer to w_c than p is (key(w_j, w_c) < key(e)). The
# second test is a distance computed by the one rule from coordinates copied next to each
# other, which vectorises, instead of a walk along the row of w_c, which gathers: on 50k
# points of S^4 at eps 0.40 it measured about 2.5x faster. Its cost grows with the
# dimension and the walk's does not, so it serves up to _UNROLLED_DIMS coordinates.


@nb.njit(nogil=True, cache=True)
def _cap2_near(coords, tag, offsets, nbrs, erank, own_lo, own_hi, out_jump, mt):
    """Cap 2 for len(tag) = the 1 to _UNROLLED_DIMS coordinates: c(e) = -1 + |L(e)| by
    distances."""
    m = coords.shape[1]
    maxdeg = 0
    for p in range(own_lo, own_hi):
        maxdeg = max(maxdeg, offsets[p + 1] - offsets[p])
    X = np.zeros((m, maxdeg + 8))  # row k: coordinate k of the neighbours of p
    T = np.empty(maxdeg + 8)  # d2(p, w_a), by the same rule: the edge's own d2
    for p in range(own_lo, own_hi):
        s = offsets[p]
        t = offsets[p + 1]
        last = t - 1
        while last >= s and nbrs[last] < p:
            last -= 1
        n_act = last - s + 1
        for a in range(n_act):
            w = nbrs[s + a]
            v = 0.0
            for k in range(m):
                xk = coords[w, k]
                X[k, a] = xk
                d = coords[p, k] - xk
                v = accumulate(v, d, mt)
            T[a] = v
        for c in range(n_act):
            q = nbrs[s + c]
            if q < p:
                continue
            thr = T[c]
            below, equal = _closer_count(X, tag, mt, c, thr)
            if equal:
                # equal lengths: the edge order breaks the tie by (lower id, higher id).
                # e = (p, q) with p < q, and r is neither p nor q, so (r, q) comes first
                # exactly when its lower id is below p
                for j in range(c):
                    d2 = 0.0
                    for k in range(m):
                        d = X[k, j] - X[k, c]
                        d2 = accumulate(d2, d, mt)
                    if d2 == thr and min(nbrs[s + j], q) < p:
                        below += 1
            out_jump[erank[s + c]] = below - 1


def _count_cap2_near(coords, offsets, nbrs, erank, own_lo, own_hi, out_jump, mt=()):
    """_cap2_near for the number of coordinates of coords."""
    _cap2_near(coords, width_tag(coords.shape[1]), offsets, nbrs, erank, own_lo, own_hi, out_jump, mt)


@nb.njit(nogil=True, cache=True)
def _count_cap2(offsets, nbrs, erank, own_lo, own_hi, out_jump, mark):
    """Cap 2: c(e) = -1 + |L(e)|, the triangles whose longest edge is e.

    For p, the neighbours met so far in its row (edges shorter than e) are marked; the
    row of q is scanned up to the edge itself, counting the marked ones. The path for
    more than _UNROLLED_DIMS coordinates (see _count_cap2_near).
    """
    for p in range(own_lo, own_hi):
        s = offsets[p]
        t = offsets[p + 1]
        last = t - 1
        while last >= s and nbrs[last] < p:
            last -= 1
        for k in range(s, last + 1):
            q = nbrs[k]
            if q > p:
                g = erank[k]
                cnt = 0
                for kk in range(offsets[q], offsets[q + 1]):
                    if erank[kk] >= g:
                        break
                    cnt += mark[nbrs[kk]]
                out_jump[g] = cnt - 1
            mark[q] = 1
        for k in range(s, last + 1):
            mark[nbrs[k]] = 0


@nb.njit(nogil=True, cache=True)
def _pending_bound(offsets, nbrs, own_lo, own_hi):
    """The most frame pairs any owned vertex can leave pending, and its largest degree."""
    best = 0
    maxdeg = 0
    for p in range(own_lo, own_hi):
        s = offsets[p]
        t = offsets[p + 1]
        maxdeg = max(maxdeg, t - s)
        b = 0
        for k in range(s, t):
            w = nbrs[k]
            b += offsets[w + 1] - offsets[w]
        best = max(best, b)
    return best, maxdeg


@nb.njit(inline="always", nogil=True, cache=True)
def _compact(adj, L, Wr, cadj):
    """G_e (vertex set L, at most 64 vertices) as one word per vertex in cadj; returns
    its number of vertices."""
    n = np.int64(0)
    for w in range(Wr):
        word = L[w]
        while word != 0:
            b = _trailing_zeros(word)
            word &= word - ONE
            v = w * 64 + b
            row = ZERO
            off = 0
            for x in range(Wr):
                lx = L[x]
                if lx != 0:
                    row |= _pext(adj[v, x], lx) << np.uint64(off)
                    off += _popcount(lx)
            cadj[n] = row
            n += 1
    return n


@nb.njit(nogil=True, cache=True)
def _vertex(p, offsets, nbrs, erank, max_dim, collapse, out_jump, stats, rank_of, prow, adj,
            pend_g, pend_b, pend_i, pend_j, srt_i, srt_j, bstart, tab, L, cadj, rem1, rem, wstart, counts,
            stack1, signs, stack, degs, verts):
    """The jumps of every edge (p, q), q > p: capped (max_dim >= 3, collapse None) by
    clique counts, uncapped (max_dim None, collapse 0) by collapses. numba prunes a
    branch on `x is not None` before typing when x is None, so a capped run compiles no
    collapse code and an uncapped one no clique counts."""
    s = offsets[p]
    t = offsets[p + 1]
    last = t - 1
    while last >= s and nbrs[last] < p:
        last -= 1
    if last < s:
        return
    n_act = last - s + 1  # ranks beyond the last owned edge never matter
    W = (n_act + 63) >> 6
    dummy = prow.shape[0] - 1
    for a in range(n_act):
        rank_of[nbrs[s + a]] = a
        prow[a] = erank[s + a]
        for w in range(W):
            adj[a, w] = 0
    gmax = prow[n_act - 1]
    # the frame: edges among N(p). The row of w_c is in edge order, so it splits at
    # (w_c, p): a pair (w_j, w_c), j < c, met before it is shorter than (p, w_c) and is
    # in the frame from the start (a pair with j > c there is met again, as such, in the
    # row of w_j); a pair met after it is the longest edge of its triangle with p and
    # waits in the bucket of the first edge of p that is longer. Rows are read up to
    # the last owned edge of p only. Vertices outside the first n_act of N(p) carry the
    # dummy rank, larger than any c.
    npend = 0
    for c in range(n_act):
        w = nbrs[s + c]
        k = offsets[w]
        kend = offsets[w + 1]
        pc = prow[c]
        bit = ONE << np.uint64(c & 63)
        cw = c >> 6
        while k < kend:
            if erank[k] >= pc:
                break
            j = rank_of[nbrs[k]]
            if j < c:
                adj[c, j >> 6] |= ONE << np.uint64(j & 63)
                adj[j, cw] |= bit
            k += 1
        while k < kend:
            g = erank[k]
            if g > gmax:
                break
            j = rank_of[nbrs[k]]
            if j < c:
                pend_g[npend] = g
                pend_i[npend] = j
                pend_j[npend] = c
                npend += 1
            k += 1
    # bucket of a waiting pair: the first r with prow[r] > g, found from a coarse table
    g0 = prow[0]
    shift = 0
    while ((gmax - g0) >> shift) >= tab.shape[0] - 1:
        shift += 1
    r = 0
    for x in range(((gmax - g0) >> shift) + 1):
        lim = g0 + (x << shift)
        while prow[r] < lim:
            r += 1
        tab[x] = r
    for x in range(npend):
        g = pend_g[x]
        r = tab[(g - g0) >> shift]
        while prow[r] < g:
            r += 1
        pend_b[x] = r
    stats[4] += npend
    for r in range(n_act + 1):
        bstart[r] = 0
    for x in range(npend):
        bstart[pend_b[x] + 1] += 1
    for r in range(n_act):
        bstart[r + 1] += bstart[r]
    for x in range(npend):
        a = pend_b[x]
        y = bstart[a]
        srt_i[y] = pend_i[x]
        srt_j[y] = pend_j[x]
        bstart[a] = y + 1
    # bstart[r] is now the end of bucket r, and the end of bucket r - 1 its start
    y = 0
    for r in range(n_act):
        while y < bstart[r]:
            _set_edge(adj, srt_i[y], srt_j[y])
            y += 1
        q = nbrs[s + r]
        if q <= p:
            continue
        # L(e): neighbours of p before rank r joined to q by an earlier edge
        Wr = (r + 63) >> 6
        size = 0
        for w in range(Wr):
            word = adj[r, w]
            if w == Wr - 1 and (r & 63) != 0:
                word &= (ONE << np.uint64(r & 63)) - ONE
            L[w] = word
            size += _popcount(word)
        if size == 0:
            c = -1
        elif max_dim is not None:
            if max_dim == 3:
                # -1 + |L| - |edges of G_e|
                ne = 0
                for w in range(Wr):
                    word = L[w]
                    while word != 0:
                        b = _trailing_zeros(word)
                        word &= word - ONE
                        v = w * 64 + b
                        for x in range(Wr):
                            ne += _popcount(adj[v, x] & L[x])
                c = size - 1 - (ne >> 1)
            elif size <= 64:
                c = _count_capped1(cadj, _compact(adj, L, Wr, cadj), max_dim - 1, rem1, counts)
            else:
                c = _count_capped(adj, L, Wr, max_dim - 1, rem, wstart, counts)
        elif collapse is not None:
            if size <= 64:
                c = _reduced_euler1(cadj, _compact(adj, L, Wr, cadj), stack1, signs, stats)
            else:
                c = _reduced_euler(adj, L, Wr, stack, signs, degs, verts, stats)
        else:
            c = 0  # not reached: one of max_dim and collapse is None
        out_jump[prow[r]] = c
    for a in range(n_act):
        rank_of[nbrs[s + a]] = dummy


@nb.njit(nogil=True, cache=True)
def _count_rows(offsets, nbrs, erank, own_lo, own_hi, max_dim, collapse, out_jump, stats, rank_of, prow, adj,
                pend_g, pend_b, pend_i, pend_j, srt_i, srt_j, bstart, tab, L, cadj, rem1, rem, wstart,
                counts, stack1, signs, stack, degs, verts):
    """Per-edge jumps for every edge whose lower endpoint p is in [own_lo, own_hi), for
    max_dim >= 3 (collapse None) or uncapped (max_dim None, collapse 0), in a workspace
    (see _Frame) that fits these rows.

    out_jump is indexed by edge rank; each edge is written by its lower endpoint only,
    so several calls on disjoint vertex ranges may run in parallel threads.
    """
    for p in range(own_lo, own_hi):
        _vertex(p, offsets, nbrs, erank, max_dim, collapse, out_jump, stats, rank_of, prow, adj,
                pend_g, pend_b, pend_i, pend_j, srt_i, srt_j, bstart, tab, L, cadj, rem1, rem, wstart, counts,
                stack1, signs, stack, degs, verts)


class _Frame:
    """One thread's workspace for _count_rows, grown to the largest block it met: the
    frame of a neighbourhood as bitsets, the pending frame pairs, the clique and
    collapse stacks. Allocated once per thread and call, not once per block."""

    # a thread keeps its last workspace up to this size for its next call: many small
    # halos in a row then allocate nothing
    KEEP_BYTES = 1 << 22
    _kept = threading.local()

    def __init__(self, h: int, max_dim: int) -> None:
        self.h = h
        self.depth = max(max_dim - 1, 1) + 1
        self.maxdeg = 0
        self.bound = 0
        self.arrays: tuple = ()
        self.stats = np.zeros(len(STAT_NAMES), dtype=np.int64)

    @classmethod
    def take(cls, h: int, max_dim: int) -> _Frame:
        """This thread's kept workspace if it serves h rows and max_dim, else a new one.
        A kept workspace is as good as new: every vertex leaves rank_of as it found it."""
        frame = getattr(cls._kept, "frame", None)
        cls._kept.frame = None
        if frame is None or frame.h < h or frame.depth < max(max_dim - 1, 1) + 1:
            return cls(h, max_dim)
        frame.stats[:] = 0
        return frame

    def keep(self) -> None:
        """Offer this workspace to the calling thread's next call, if it is small."""
        if sum(a.nbytes for a in self.arrays) <= self.KEEP_BYTES:
            type(self)._kept.frame = self

    def fit(self, bound: int, maxdeg: int) -> tuple:
        if maxdeg > self.maxdeg or bound > self.bound:
            self.maxdeg = maxdeg = max(maxdeg, self.maxdeg)
            self.bound = bound = max(bound, self.bound)
            Wmax = (maxdeg + 63) // 64
            # the dummy rank: a column past every real one, with an unreachable threshold
            dummy = 64 * Wmax
            prow = np.empty(dummy + 1, dtype=np.int64)
            prow[dummy] = np.iinfo(np.int64).max
            depth = self.depth
            self.arrays = (
                np.full(self.h, dummy, dtype=np.int32),  # rank_of
                prow,
                np.zeros((maxdeg, Wmax), dtype=np.uint64),  # adj
                np.empty(bound, dtype=np.int64),  # pend_g
                np.empty(bound, dtype=np.int32),  # pend_b
                np.empty(bound, dtype=np.int32),  # pend_i
                np.empty(bound, dtype=np.int32),  # pend_j
                np.empty(bound, dtype=np.int32),  # srt_i
                np.empty(bound, dtype=np.int32),  # srt_j
                np.empty(maxdeg + 2, dtype=np.int64),  # bstart
                np.empty(1024, dtype=np.int32),  # tab
                np.empty(Wmax, dtype=np.uint64),  # L
                np.empty(64, dtype=np.uint64),  # cadj
                np.empty(depth, dtype=np.uint64),  # rem1
                np.empty((depth, Wmax), dtype=np.uint64),  # rem
                np.empty(depth, dtype=np.int64),  # wstart
                np.empty(depth, dtype=np.int64),  # counts
                np.empty(2 * 64 + 2, dtype=np.uint64),  # stack1
                np.empty(2 * maxdeg + 130, dtype=np.int64),  # signs
                np.empty((2 * maxdeg + 2, Wmax), dtype=np.uint64),  # stack
                np.empty(maxdeg, dtype=np.int64),  # degs
                np.empty(maxdeg, dtype=np.int64),  # verts
            )
        return self.arrays


# ---------------------------------------------------------------------------------------
# uncapped counting by distances
# ---------------------------------------------------------------------------------------

# Without a cap and with the coordinates at hand, G_e needs no frame. For e = (p, q) of
# key thr, L(e) is the set of neighbours w of p before q in the row of p with (w, q) < e:
# one vectorised pass of distances over the row. Almost every G_e of a dense cloud is a
# cone or close to one, with its apex near the middle of e: the vertex a of L(e) with the
# least key(p, a) + key(q, a) is tested against L(e) by distances, and if it misses some,
# the best-placed vertex it hits. The vertices the better of the two misses (B) are split
# off one at a time by chi~(G) = chi~(G - b) - chi~(G[N(b)]); what is left,
# G - B, is a cone with apex a, so chi~(G) = -sum_k chi~(G_k), G_k the link of b_k in
# G - {b_1, ..., b_(k-1)}, each solved the same way, its apex guessed by the sum of keys
# to p, q and the split vertices above it. A subproblem that misses more than bad_max
# vertices, or any after an edge has split `budget` times (_NEAR_LIMITS), gets the frame's
# exact collapses on its bitset adjacency, built from distances (`_exact_chi`). On 50k points
# of S^4 at eps 0.50 (mean degree 560), L(e) held 78 vertices on average, the first guess
# was the apex of about two edges in three (the vertex nearest the centroid of L(e), or
# the one of least max(key(p, w), key(q, w)), did worse), and 17% of the G_e were no cones
# at all; there the frame (the adjacency among the whole neighbourhood, from the
# neighbours' rows) cost as much as the whole uncapped counting on it, which the distances
# replace.

# (bad_max, budget); read at each call, so that tests can force either route
_NEAR_LIMITS = (16, 64)


@nb.njit(inline="always", nogil=True, cache=True)
def _point_key(P, tag, mt, i, j):
    """The key between rows i and j of P (points in rows), by the one rule."""
    width = len(tag)
    s = 0.0
    if width > 0:
        for k in range(width):
            s = accumulate(s, P[i, k] - P[j, k], mt)
    else:
        for k in range(P.shape[1]):
            s = accumulate(s, P[i, k] - P[j, k], mt)
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def _keys_to(X, tag, mt, c, D):
    """D[j] = key(j, c) for j < c, X holding coordinate k of point j in X[k, j]."""
    width = len(tag)
    if width > 0:
        for j in range(c):
            s = 0.0
            for k in range(width):
                s = accumulate(s, X[k, j] - X[k, c], mt)
            D[j] = s
    else:
        for j in range(c):
            D[j] = 0.0
        for k in range(X.shape[0]):
            xc = X[k, c]
            for j in range(c):
                D[j] = accumulate(D[j], X[k, j] - xc, mt)


@nb.njit(nogil=True, cache=True)
def _exact_chi(P, tag, mt, wid, p, thr, idx, a0, n, cadj, stack1, signs, adj, Lw, stack, degs, verts, stats):
    """chi~ of the clique complex of G_e on the n neighbours idx[a0:a0 + n] of p, by the
    frame's collapses on its adjacency, built from distances (pairs before e of key thr:
    an equal key comes first when its lower endpoint is below p)."""
    if n <= 64:
        for i in range(n):
            cadj[i] = 0
        for i in range(n):
            xi = idx[a0 + i]
            wi = wid[xi]
            for j in range(i + 1, n):
                xj = idx[a0 + j]
                key = _point_key(P, tag, mt, xi, xj)
                if key < thr or (key == thr and min(wi, wid[xj]) < p):
                    cadj[i] |= ONE << np.uint64(j)
                    cadj[j] |= ONE << np.uint64(i)
        return _reduced_euler1(cadj, n, stack1, signs, stats)
    W = (n + 63) >> 6
    for i in range(n):
        for w in range(W):
            adj[i, w] = 0
    for i in range(n):
        xi = idx[a0 + i]
        wi = wid[xi]
        for j in range(i + 1, n):
            xj = idx[a0 + j]
            key = _point_key(P, tag, mt, xi, xj)
            if key < thr or (key == thr and min(wi, wid[xj]) < p):
                _set_edge(adj, i, j)
    for w in range(W):
        Lw[w] = ALL_ONES
    if n & 63:
        Lw[W - 1] = (ONE << np.uint64(n & 63)) - ONE
    return _reduced_euler(adj, Lw, W, stack, signs, degs, verts, stats)


@nb.njit(nogil=True, cache=True)
def _near_chi(P, tag, mt, wid, p, thr, n, idx, score, segs, bad_max, budget, cadj, stack1, signs, adj, Lw,
              stack, degs, verts, stats):
    """chi~ of the clique complex of G_e on L(e) = idx[:n] (positions in the row of p),
    score[:n] the apex guesses' sums of keys; see the comment above. A subproblem is a
    segment of idx and score (start, length, sign) on the stack segs; a split writes the
    positions it missed and then the links after its segment."""
    room = idx.shape[0]
    total = 0
    segs[0, 0] = 0
    segs[0, 1] = n
    segs[0, 2] = 1
    top = 1
    while top > 0:
        top -= 1
        a0 = segs[top, 0]
        nn = segs[top, 1]
        sg = segs[top, 2]
        if nn == 0:
            total -= sg
            continue
        best = a0
        for y in range(a0 + 1, a0 + nn):
            if score[y] < score[best]:
                best = y
        b0 = a0 + nn
        if b0 + 2 * nn > room:
            total += sg * _exact_chi(P, tag, mt, wid, p, thr, idx, a0, nn, cadj, stack1, signs, adj, Lw, stack,
                                     degs, verts, stats)
            continue
        # the positions the guess misses go after the segment; the best guess among the
        # vertices it hits is the second chance (a missed vertex cannot be an apex)
        ai = idx[best]
        wa = wid[ai]
        nb_ = 0
        second = -1
        s2 = math.inf
        for y in range(a0, a0 + nn):
            xi = idx[y]
            key = _point_key(P, tag, mt, ai, xi)
            hit = (key < thr) | ((key == thr) & (min(wa, wid[xi]) < p)) | (y == best)
            idx[b0 + nb_] = y
            nb_ += 1 - np.int64(hit)
            if hit and y != best and score[y] < s2:
                s2 = score[y]
                second = y
        if nb_ > 0 and second >= 0:
            ai = idx[second]
            wa = wid[ai]
            c0 = b0 + nb_
            nb2 = 0
            for y in range(a0, a0 + nn):
                xi = idx[y]
                key = _point_key(P, tag, mt, ai, xi)
                hit = (key < thr) | ((key == thr) & (min(wa, wid[xi]) < p)) | (y == second)
                idx[c0 + nb2] = y
                nb2 += 1 - np.int64(hit)
            if nb2 < nb_:  # split off the fewer
                for k in range(nb2):
                    idx[b0 + k] = idx[c0 + k]
                nb_ = nb2
        if nb_ == 0:
            stats[1] += 1
            continue
        budget -= 1
        if nb_ > bad_max or budget < 0 or top + nb_ > segs.shape[0] or b0 + nb_ * (nn + 1) > room:
            total += sg * _exact_chi(P, tag, mt, wid, p, thr, idx, a0, nn, cadj, stack1, signs, adj, Lw, stack,
                                     degs, verts, stats)
            continue
        stats[3] += nb_
        l0 = b0 + nb_
        for kb in range(nb_):
            yb = idx[b0 + kb]
            bi = idx[yb]
            wb = wid[bi]
            ln = 0
            for y in range(a0, a0 + nn):
                xi = idx[y]
                if xi < 0 or y == yb:
                    continue  # split off before, or b itself
                key = _point_key(P, tag, mt, bi, xi)
                idx[l0 + ln] = xi
                score[l0 + ln] = score[y] + key
                ln += np.int64((key < thr) | ((key == thr) & (min(wb, wid[xi]) < p)))
            idx[yb] = -1 - bi  # b_k leaves G for the links after it
            segs[top, 0] = l0
            segs[top, 1] = ln
            segs[top, 2] = -sg
            top += 1
            l0 += ln
    return total


@nb.njit(nogil=True, cache=True)
def _near_rows(coords, tag, mt, offsets, nbrs, erank, own_lo, own_hi, bad_max, budget, out_jump, stats, X, P,
               wid, T, D, idx, score, segs, cadj, stack1, signs, adj, Lw, stack, degs, verts):
    """Uncapped per-edge jumps of every edge whose lower endpoint p is in [own_lo,
    own_hi), by distances (see the comment above), in a workspace (`_Near`) that fits
    these rows; len(tag) coordinates unrolled (any number with an empty tag).

    out_jump is indexed by edge rank; each edge is written by its lower endpoint only,
    so several calls on disjoint vertex ranges may run in parallel threads.
    """
    m = coords.shape[1]
    for p in range(own_lo, own_hi):
        s = offsets[p]
        last = offsets[p + 1] - 1
        while last >= s and nbrs[last] < p:
            last -= 1
        n_act = last - s + 1  # ranks beyond the last owned edge never matter
        # the row of p: coordinates by column for the vectorised pass, by row for the
        # gathers of the apex tests, and the keys from p
        for a in range(n_act):
            w = nbrs[s + a]
            wid[a] = w
            v = 0.0
            for k in range(m):
                xk = coords[w, k]
                X[k, a] = xk
                P[a, k] = xk
                v = accumulate(v, coords[p, k] - xk, mt)
            T[a] = v
        for c in range(n_act):
            if wid[c] < p:
                continue
            stats[0] += 1
            thr = T[c]
            _keys_to(X, tag, mt, c, D)
            # L(e): (p, w_j) comes before e for every j < c; (w_j, q) must too, an equal
            # key first when its lower endpoint w_j is below p (q > p)
            n = 0
            for j in range(c):
                dj = D[j]
                idx[n] = j
                score[n] = T[j] + dj
                n += np.int64((dj < thr) | ((dj == thr) & (wid[j] < p)))
            if n == 0:
                out_jump[erank[s + c]] = -1
            else:
                out_jump[erank[s + c]] = _near_chi(P, tag, mt, wid, p, thr, n, idx, score, segs, bad_max, budget,
                                                   cadj, stack1, signs, adj, Lw, stack, degs, verts, stats)


class _Near:
    """One thread's workspace for _near_rows, grown to the largest degree it met: the
    row of a vertex (coordinates twice, ids, keys), the subproblem stack, and the exact
    collapses' bitsets."""

    KEEP_BYTES = _Frame.KEEP_BYTES
    _kept = threading.local()

    def __init__(self, m: int) -> None:
        self.m = m
        self.maxdeg = -1
        self.arrays: tuple = ()
        self.stats = np.zeros(len(STAT_NAMES), dtype=np.int64)

    @classmethod
    def take(cls, m: int) -> _Near:
        near = getattr(cls._kept, "near", None)
        cls._kept.near = None
        if near is None or near.m != m:
            return cls(m)
        near.stats[:] = 0
        return near

    def keep(self) -> None:
        if sum(a.nbytes for a in self.arrays) <= self.KEEP_BYTES:
            type(self)._kept.near = self

    def fit(self, maxdeg: int) -> tuple:
        if maxdeg > self.maxdeg:
            self.maxdeg = maxdeg
            wmax = (maxdeg + 63) // 64
            # room for L(e) and a few levels of splits; a split that finds no room is
            # solved exactly instead
            room = 16 * maxdeg + 4096
            self.arrays = (
                np.zeros((max(self.m, 1), maxdeg + 8)),  # X
                np.zeros((maxdeg + 8, self.m)),  # P
                np.empty(maxdeg + 8, dtype=np.int64),  # wid
                np.empty(maxdeg + 8),  # T
                np.empty(maxdeg + 8),  # D
                np.empty(room, dtype=np.int64),  # idx
                np.empty(room),  # score
                np.empty((1024, 3), dtype=np.int64),  # segs
                np.empty(64, dtype=np.uint64),  # cadj
                np.empty(2 * 64 + 2, dtype=np.uint64),  # stack1
                np.empty(2 * maxdeg + 130, dtype=np.int64),  # signs
                np.zeros((maxdeg, wmax), dtype=np.uint64),  # adj
                np.empty(wmax, dtype=np.uint64),  # Lw
                np.empty((2 * maxdeg + 2, wmax), dtype=np.uint64),  # stack
                np.empty(maxdeg, dtype=np.int64),  # degs
                np.empty(maxdeg, dtype=np.int64),  # verts
            )
        return self.arrays


@nb.njit(nogil=True, cache=True)
def _group_lengths(ed2, elo, g0, g1, own_lo, own_hi, out_jump, n, mt):
    """Group the nonzero jumps of the owned edges in [g0, g1) by length (edges are in
    increasing d2) after the first n groups, in ed2 (now lengths) and out_jump; returns
    the new n. Entry g is written at an index of at most g, after it was read."""
    for g in range(g0, g1):
        if own_lo <= elo[g] < own_hi:
            j = out_jump[g]
            if j != 0:
                v = key_length(ed2[g], mt)
                if n > 0 and v == ed2[n - 1]:
                    out_jump[n - 1] += j
                else:
                    ed2[n] = v
                    out_jump[n] = j
                    n += 1
    return n


def _owned_count(elo: np.ndarray, lo: int, hi: int, h: int) -> int:
    """The edges whose lower endpoint is in [lo, hi) of the h rows."""
    if lo == 0 and hi == h:
        return elo.shape[0]
    total = [0]

    def count(a: int, b: int) -> None:
        e = elo[a:b]
        total[0] += int(np.count_nonzero((e >= lo) & (e < hi)))

    _edge_blocks(elo.shape[0], count)
    return total[0]


def _collect(ed2: np.ndarray, elo: np.ndarray, lo: int, hi: int, out_jump: np.ndarray,
             n_vertices: int, metric: str = "euclidean") -> tuple[np.ndarray, np.ndarray]:
    """The jump table of the owned edges and vertices; consumes ed2 and out_jump."""
    n = [0]
    mt = metric_tag(metric)

    def group(a: int, b: int) -> None:
        n[0] = _group_lengths(ed2, elo, a, b, lo, hi, out_jump, n[0], mt)

    _edge_blocks(ed2.shape[0], group)
    k = [0]

    def drop(a: int, b: int) -> None:
        # the groups with a nonzero jump move down, after the first k; boolean indexing
        # reads into a copy before the write
        keep = out_jump[a:b] != 0
        c = int(np.count_nonzero(keep))
        ed2[k[0] : k[0] + c] = ed2[a:b][keep]
        out_jump[k[0] : k[0] + c] = out_jump[a:b][keep]
        k[0] += c

    _edge_blocks(n[0], drop)
    # views: a copy of tens of MB costs page faults
    return _with_vertices(ed2[: k[0]], out_jump[: k[0]], n_vertices)


def _with_vertices(values: np.ndarray, jumps: np.ndarray, n_vertices: int) -> tuple[np.ndarray, np.ndarray]:
    """The edges' table (increasing lengths, nonzero jumps) with the vertices at 0.0."""
    if values.shape[0] and values[0] == 0.0:  # coincident points: their 0-length edges meet the vertices
        jumps[0] += n_vertices
        if jumps[0] == 0:
            values, jumps = values[1:], jumps[1:]
    elif n_vertices:
        values = np.concatenate((np.zeros(1), values))
        jumps = np.concatenate((np.full(1, n_vertices, dtype=np.int64), jumps))
    return values, jumps


# ---------------------------------------------------------------------------------------
# the public entry point
# ---------------------------------------------------------------------------------------


@dataclass
class KernelStats:
    """What one kernel call did; summed over tasks for the run summary."""

    vertices: int = 0
    edges: int = 0
    cones: int = 0
    collapsed: int = 0
    splits: int = 0
    frame_pairs: int = 0
    seconds_graph: float = 0.0
    seconds_count: float = 0.0

    def __add__(self, other: KernelStats) -> KernelStats:
        return KernelStats(**{k: getattr(self, k) + getattr(other, k) for k in self.__dataclass_fields__})

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True)
class JumpTable:
    """The output of one kernel call: sorted distinct scales and their nonzero jumps.

    The owned vertices are included as a jump at scale 0.0.
    """

    values: np.ndarray
    jumps: np.ndarray
    stats: KernelStats = field(default_factory=KernelStats, compare=False)


def _halo_edges(coords: np.ndarray, eps: float, metric: str = "euclidean"):
    """(lo, hi, d2, m): the m edges of the halo in `metric` (d2 its key), in any order."""
    eps = float(eps)
    h = coords.shape[0]
    if not eps >= 0.0:  # negative or nan: no pair passes the rule
        none = np.empty(0, dtype=np.int32)
        return none, none, np.empty(0, dtype=np.float64), 0
    if h == 0 or coords.shape[1] == 0 or not np.isfinite(coords).all():
        # the tree's boxes and median splits assume finite coordinates; keep the old
        # behaviour for anything else
        tree = cKDTree(coords)
        pairs = tree.query_pairs(query_radius(eps), p=minkowski_p(metric), output_type="ndarray")
        if pairs.shape[0] > _MAX_EDGES:
            raise ValueError(f"a halo of {pairs.shape[0]} candidate pairs is too large for one task")
        if pairs.dtype != np.int64 and pairs.dtype != np.int32:
            pairs = pairs.astype(np.int64)
        return _filter_pairs(coords, pairs, eps, metric_tag(metric))
    lo0, hi0, d20, m = _tree_edges(coords, eps, key_bound(query_radius(eps), metric), _MAX_EDGES, metric)
    if m < 0:
        raise ValueError(f"a halo of more than {_MAX_EDGES} edges is too large for one task")
    return lo0, hi0, d20, m


def _halo_graph(coords: np.ndarray, eps: float, metric: str = "euclidean"):
    """(offsets, nbrs, erank, elo, ehi, ed2) of the halo; see _edge_graph."""
    return _sorted_graph(coords.shape[0], *_halo_edges(coords, eps, metric))


@nb.njit(nogil=True, cache=True)
def _keep_owned(lo0, d20, g0, g1, own_lo, own_hi, k):
    """Move the lengths of the records of [g0, g1) with an owned lower endpoint after the
    first k; returns the new k (values move to lower indices only)."""
    for g in range(g0, g1):
        if own_lo <= lo0[g] < own_hi:
            d20[k] = d20[g]
            k += 1
    return k


@nb.njit(nogil=True, cache=True)
def _bucket_values(d2, g0, g1, scale, top, fill, out, scatter):
    """Values [g0, g1) by coarse bucket, as in _coarse_count / _coarse_scatter: count
    them (fill[c + 1] += 1), or move each to the next free slot of its bucket in out."""
    for g in range(g0, g1):
        x = d2[g]
        u = x * scale
        c = int(u) if u < top else top
        if scatter:
            y = fill[c]
            out[y] = x
            fill[c] = y + 1
        else:
            fill[c + 1] += 1


@nb.njit(nogil=True, cache=True)
def _group_values(d2, g0, g1, counts, n, mt):
    """Group the square roots of the sorted d2[g0:g1] after the first n groups: lengths
    into d2 itself (entry g is written at an index of at most g, after it was read),
    their multiplicities into counts; returns the new n."""
    for g in range(g0, g1):
        v = key_length(d2[g], mt)
        if n > 0 and v == d2[n - 1]:
            counts[n - 1] += 1
        else:
            d2[n] = v
            counts[n] = 1
            n += 1
    return n


def _sorted_values(d2: np.ndarray) -> np.ndarray:
    """d2 sorted (a new array or d2 itself): coarse buckets by value as in _sorted_edges,
    then numpy's sort on runs of whole buckets, all in blocks."""
    m = d2.shape[0]
    if m <= _FIRST_EDGES:
        d2.sort()
        return d2
    dmax = float(d2.max())
    ncoarse = _COARSE
    scale = ncoarse / dmax if dmax > 0.0 else 0.0
    if not (scale < math.inf):
        scale = 0.0
    top = ncoarse - 1
    start = np.zeros(ncoarse + 1, dtype=np.int64)
    _edge_blocks(m, lambda a, b: _bucket_values(d2, a, b, scale, top, start, d2, False))
    np.cumsum(start, out=start)
    out = np.empty(m, dtype=np.float64)
    fill = start[:-1].copy()
    _edge_blocks(m, lambda a, b: _bucket_values(d2, a, b, scale, top, fill, out, True))

    def sort(a: int, b: int) -> None:
        out[start[a] : start[b]].sort()  # whole buckets: sorted runs side by side

    run_blocks(0, ncoarse, sort, Pacer(_FIRST_EDGES), weights=start.astype(np.float64))
    return out


def _cap1(h: int, edges: tuple, lo: int, hi: int, metric: str = "euclidean"):
    """Cap 1: -1 per owned edge at its length. Only the owned edges' squared lengths are
    sorted, and their square roots grouped: no edge order, no CSR. Returns (values,
    jumps, owned edges)."""
    lo0, _hi0, d20, m = edges
    if (lo, hi) != (0, h):
        k = [0]

        def keep(a: int, b: int) -> None:
            k[0] = _keep_owned(lo0, d20, a, b, lo, hi, k[0])

        _edge_blocks(m, keep)
        m = k[0]
    d2 = _sorted_values(d20[:m])
    counts = np.empty(m, dtype=np.int64)
    n = [0]
    mt = metric_tag(metric)

    def group(a: int, b: int) -> None:
        n[0] = _group_values(d2, a, b, counts, n[0], mt)

    _edge_blocks(m, group)
    jumps = counts[: n[0]]
    np.negative(jumps, out=jumps)
    values, jumps = _with_vertices(d2[: n[0]], jumps, hi - lo)
    return values, jumps, m


def default_threads(work: float, max_dim: int | None = None) -> int:
    """Threads for counting `work` units when none are asked for.

    The rule: one thread while the work (the sum over owned rows of degree^2 + 1) is
    below AUTO_THREADS_WORK, or below AUTO_THREADS_WORK_CAP2 at cap 2, whose counting
    costs about a tenth as much per unit; every core this process may use from there on.
    Both thresholds stand for about 20 ms of counting on one thread: below that,
    starting and joining threads and sharing the cores cost more than a second thread
    saves (measured on a shared 2-core machine: benchmarks/bench_threads.py --crossover,
    where threads began to pay between 20 and 50 ms).
    """
    if work < (AUTO_THREADS_WORK_CAP2 if max_dim == 2 else AUTO_THREADS_WORK):
        return 1
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on every platform
        return os.cpu_count() or 1


# see default_threads
AUTO_THREADS_WORK = 1 << 20
AUTO_THREADS_WORK_CAP2 = 1 << 23

# first block of the counting, in units of degree^2 + 1: small enough that even the
# costliest rows met (dense neighbourhoods, high caps: microseconds a unit) finish it
# well within a second, large enough that a small halo is one block
_FIRST_WORK = 1 << 16


def _count(coords, offsets, nbrs, erank, lo: int, hi: int, cap: int, out_jump: np.ndarray,
           threads: int | None, mt: tuple = (), near: bool = True) -> np.ndarray:
    """Fill out_jump for the owned edges (cap >= 2) in blocks of rows over threads;
    returns the summed counters. Without a cap the counting runs by distances
    (`_near_rows`) when `near`, which needs finite coordinates, else by frames."""
    h = offsets.shape[0] - 1
    stats = np.zeros(len(STAT_NAMES), dtype=np.int64)
    if cap == 2 and 1 <= coords.shape[1] <= _UNROLLED_DIMS:
        tag = width_tag(coords.shape[1])

        def call(a: int, b: int, _state: None) -> None:
            _cap2_near(coords, tag, offsets, nbrs, erank, a, b, out_jump, mt)

        def state() -> None:
            return None
    elif cap == 2:
        def call(a: int, b: int, mark: np.ndarray) -> None:
            _count_cap2(offsets, nbrs, erank, a, b, out_jump, mark)

        def state() -> np.ndarray:
            return np.zeros(h, dtype=np.int64)
    elif cap == UNCAPPED and near:
        tag = width_tag(coords.shape[1])
        bad_max, budget = _NEAR_LIMITS

        def call(a: int, b: int, work: _Near) -> None:
            maxdeg = int(np.diff(offsets[a : b + 1]).max(initial=0))
            if maxdeg:
                _near_rows(coords, tag, mt, offsets, nbrs, erank, a, b, bad_max, budget, out_jump, work.stats,
                           *work.fit(maxdeg))

        def state() -> _Near:
            return _Near.take(coords.shape[1])
    else:
        # one of the two is None: see _vertex
        max_dim, collapse = (None, 0) if cap == UNCAPPED else (cap, None)

        def call(a: int, b: int, frame: _Frame) -> None:
            bound, maxdeg = _pending_bound(offsets, nbrs, a, b)
            if maxdeg:
                _count_rows(offsets, nbrs, erank, a, b, max_dim, collapse, out_jump, frame.stats,
                            *frame.fit(bound, maxdeg))

        def state() -> _Frame:
            return _Frame.take(h, cap)

    deg = np.diff(offsets[lo : hi + 1])
    # the frame of a row costs about its degree squared: a small halo (bounded through
    # the largest degree) is one call, without the blocks' bookkeeping
    if hi - lo + int(deg.max(initial=0)) * int(offsets[hi] - offsets[lo]) <= _FIRST_WORK:
        states = [state()]
        call(lo, hi, states[0])
    else:
        deg = deg.astype(np.float64)
        weights = np.zeros(hi - lo + 1)
        np.cumsum(deg * deg + 1.0, out=weights[1:])
        if threads is None:
            threads = default_threads(float(weights[-1]), cap)
        states = run_blocks(lo, hi, call, Pacer(_FIRST_WORK), weights=weights, threads=threads,
                            state=state)
    for s in states:
        if isinstance(s, (_Frame, _Near)):
            stats += s.stats
            s.keep()
    return stats


def count_jumps(
    coords: np.ndarray,
    eps: float,
    max_dim: int | None = None,
    owned: tuple[int, int] | None = None,
    threads: int | None = 1,
    *,
    blocks: bool = True,
    metric: str = "euclidean",
) -> JumpTable:
    """The jump table of the owned rows of a halo.

    Parameters
    ----------
    coords : float64 (h, m)
        The halo: every point within eps of an owned row, the owned rows included, in
        increasing global id (so local order is the global edge tie-break order).
    eps : float
        The largest scale; an edge iff its length is at most eps.
    max_dim : int or None
        Cap on simplex dimension; None counts every dimension.
    owned : (start, stop), optional
        Local rows owned by this call (default: all rows).
    threads : int or None
        Threads over which the owned rows are spread (the kernel releases the GIL);
        None chooses from the size of the counting (see `default_threads`).
    blocks : bool
        Run every compiled loop in blocks of about `blocks.BLOCK_SECONDS` each, so that
        a KeyboardInterrupt is raised within a fraction of a second (default). False
        makes one call per loop, which cannot be interrupted before its end; the result
        is the same.
    metric : {"euclidean", "manhattan", "chebyshev"}
        The metric of the edge lengths, by its one rule in :mod:`chitally.metric`.

    Returns
    -------
    JumpTable
        Sorted distinct scales and nonzero integer jumps, owned vertices at 0.0.

    Examples
    --------
    >>> import numpy as np
    >>> t = count_jumps(np.array([[0.0], [1.0], [2.0]]), eps=1.5)
    >>> t.values.tolist(), t.jumps.tolist()
    ([0.0, 1.0], [3, -2])
    """
    coords = _plain(coords)
    h = coords.shape[0]
    lo, hi = (0, h) if owned is None else (int(owned[0]), int(owned[1]))
    if not (0 <= lo <= hi <= h):
        raise ValueError(f"owned rows [{lo}, {hi}) do not fit a halo of {h} rows")
    cap = UNCAPPED if max_dim is None else int(max_dim)
    stats = KernelStats(vertices=hi - lo)
    if cap == 0 or hi == lo:
        values = np.zeros(1 if hi > lo else 0, dtype=np.float64)
        jumps = np.full(values.shape, hi - lo, dtype=np.int64)
        return JumpTable(values, jumps, stats)
    with contextlib.nullcontext() if blocks else whole_calls():
        t0 = time.perf_counter()
        edges = _halo_edges(coords, eps, metric)
        if cap == 1:
            t1 = time.perf_counter()
            values, jumps, stats.edges = _cap1(h, edges, lo, hi, metric)
            counted = np.zeros(len(STAT_NAMES), dtype=np.int64)
        else:
            offsets, nbrs, erank, elo, _ehi, ed2 = _sorted_graph(h, *edges)
            del edges
            t1 = time.perf_counter()
            out_jump = np.empty(ed2.shape[0], dtype=np.int64)
            stats.edges = _owned_count(elo, lo, hi, h)
            counted = _count(coords, offsets, nbrs, erank, lo, hi, cap, out_jump, threads, metric_tag(metric),
                             near=bool(np.isfinite(coords).all()))
            values, jumps = _collect(ed2, elo, lo, hi, out_jump, hi - lo, metric)
    t2 = time.perf_counter()
    for name, value in zip(STAT_NAMES[1:], counted[1:]):
        setattr(stats, name, int(value))
    stats.seconds_graph = t1 - t0
    stats.seconds_count = t2 - t1
    return JumpTable(values, jumps, stats)


# ---------------------------------------------------------------------------------------
# what a run compiles
# ---------------------------------------------------------------------------------------


def compiled_calls(max_dim: int | None, dims: int, metric: str = "euclidean") -> list[tuple[object, tuple]]:
    """The compiled functions `count_jumps` calls from Python for one cap and number of
    coordinates, each with the numba argument types of its call.

    Their callees are compiled into them, so this list is what a run needs compiled or
    loaded from numba's cache (see warmup.py); caps from 3 up share one signature. The
    cKDTree fallback for halos the compiled tree does not take (no rows, no coordinates,
    non-finite values, eps < 0) is not listed: `euler_curve` never takes it.
    tests/test_warmup.py checks the list against the calls a run makes.
    """
    cap = UNCAPPED if max_dim is None else int(max_dim)
    if cap == 0:
        return []
    i8, f8 = types.int64, types.float64
    I4, I8, F8, U8 = (types.Array(t, 1, "C") for t in (types.int32, types.int64, types.float64, types.uint64))
    F8_2, U8_2 = types.Array(types.float64, 2, "C"), types.Array(types.uint64, 2, "C")
    I8_2 = types.Array(types.int64, 2, "C")
    tag = nb.typeof(width_tag(int(dims)))
    mt = nb.typeof(metric_tag(metric))
    calls: list[tuple[object, tuple]] = [
        (_split_nodes, (F8_2, I8, I8, I8, F8_2, F8_2, i8, i8, i8)),
        (_sampled_edges, (F8_2, tag, mt, i8, f8, F8, i8, i8, i8)),
        (_join_leaves, (F8_2, tag, mt, F8_2, I8, I8, I8, F8_2, F8_2, f8, f8, f8, i8, i8, i8, I4, I4, F8, i8, I8,
                        F8)),
    ]
    if cap == 1:
        calls += [(_keep_owned, (I4, F8, i8, i8, i8, i8, i8)),
                  (_bucket_values, (F8, i8, i8, f8, i8, I8, F8, types.boolean)),
                  (_group_values, (F8, i8, i8, I8, i8, mt))]
        return calls
    calls += [(_coarse_count, (I4, I4, F8, i8, i8, f8, i8, I8, I8)),
              (_coarse_scatter, (I4, I4, F8, i8, i8, f8, i8, I8, I4, I4, F8)),
              (_fine_sort, (I4, I4, F8, I8, i8, i8, f8, I8, I4, I4, F8)),
              (_fill_rows, (I4, I4, i8, i8, I8, I4, I4)),
              (_group_lengths, (F8, I4, i8, i8, i8, i8, I8, i8, mt))]
    if cap == 2 and 1 <= dims <= _UNROLLED_DIMS:
        calls.append((_cap2_near, (F8_2, tag, I8, I4, I4, i8, i8, I8, mt)))
    elif cap == 2:
        calls.append((_count_cap2, (I8, I4, I4, i8, i8, I8, I8)))
    elif cap == UNCAPPED:
        workspace = (F8_2, F8_2, I8, F8, F8, I8, F8, I8_2, U8, U8, I8, U8_2, U8, U8_2, I8, I8)
        calls.append((_near_rows, (F8_2, tag, mt, I8, I4, I4, i8, i8, i8, i8, I8, I8) + workspace))
    else:
        max_dim_t, collapse_t = (types.none, i8) if cap == UNCAPPED else (i8, types.none)
        workspace = (I4, I8, U8_2, I8, I4, I4, I4, I4, I4, I8, I4, U8, U8, U8, U8_2, I8, I8, U8, I8,
                     U8_2, I8, I8)
        calls += [(_pending_bound, (I8, I4, i8, i8)),
                  (_count_rows, (I8, I4, I4, i8, i8, max_dim_t, collapse_t, I8, I8) + workspace)]
    return calls


def count_range(offsets: np.ndarray, nbrs: np.ndarray, erank: np.ndarray, own_lo: int, own_hi: int,
                max_dim: int, out_jump: np.ndarray, stats: np.ndarray) -> None:
    """Per-edge jumps of every edge whose lower endpoint is in [own_lo, own_hi), on a
    sorted graph given as CSR in edge order (``max_dim`` >= 2, or UNCAPPED): the entry
    the graph filtrations use with an edge order read from weights. ``out_jump`` is
    indexed by edge rank; counters are added into ``stats``."""
    h = offsets.shape[0] - 1
    if max_dim == 2:
        _count_cap2(offsets, nbrs, erank, own_lo, own_hi, out_jump, np.zeros(h, dtype=np.int64))
        return
    bound, maxdeg = _pending_bound(offsets, nbrs, own_lo, own_hi)
    if maxdeg == 0:
        return
    cap, collapse = (None, 0) if max_dim == UNCAPPED else (int(max_dim), None)
    frame = _Frame.take(h, UNCAPPED if cap is None else cap)
    _count_rows(offsets, nbrs, erank, own_lo, own_hi, cap, collapse, out_jump, frame.stats,
                *frame.fit(bound, maxdeg))
    n = min(stats.shape[0], frame.stats.shape[0])
    stats[:n] += frame.stats[:n]
    frame.keep()
