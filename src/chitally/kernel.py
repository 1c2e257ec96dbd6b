"""Per-edge counting kernels: the exact jump table of a block of owned rows.

Given the coordinates of a halo (rows sorted by global id, so local order is global order)
and the contiguous range of rows it owns, the kernel returns the jumps of the Euler
characteristic curve contributed by the owned vertices and by every edge whose lower
endpoint is owned. Every simplex with two or more vertices is counted at its maximal
edge e (edges ordered by (d2, lower id, higher id)); see DESIGN.md for the identity

    c(e) = sum over cliques S of G_e, |S| <= D - 1, of (-1)^(|S| + 1)

and, without a cap, c(e) = reduced Euler characteristic of the clique complex of G_e,
computed by strong collapses and the split rule chi~(G) = chi~(G - v) - chi~(G[N(v)]).

This module knows nothing of files, Zarr or Dask: arrays in, arrays out. The compiled
functions release the GIL so that callers may run several owned ranges in threads.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import intrinsic
from scipy.spatial import cKDTree

from .metric import query_radius, squared_distance

UNCAPPED = -1  # the compiled code's spelling of max_dim=None

# counters reported by the kernel, in this order
STAT_NAMES = ("edges", "cones", "collapsed", "splits", "frame_pairs")


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


ONE = np.uint64(1)


@nb.njit(inline="always", nogil=True, cache=True)
def _key_less(d2a, loa, hia, d2b, lob, hib):
    """The total edge order (d2, lower id, higher id)."""
    if d2a != d2b:
        return d2a < d2b
    if loa != lob:
        return loa < lob
    return hia < hib


@nb.njit(nogil=True, cache=True)
def build_graph(coords, pairs, eps):
    """CSR eps-graph of the halo from candidate pairs, filtered by the one distance rule.

    Returns (offsets int64[h+1], neighbours int32[2k], d2 float64[2k]).
    """
    h = coords.shape[0]
    k = pairs.shape[0]
    keep = np.empty(k, dtype=np.bool_)
    d2 = np.empty(k, dtype=np.float64)
    deg = np.zeros(h + 1, dtype=np.int64)
    for t in range(k):
        i = pairs[t, 0]
        j = pairs[t, 1]
        s = squared_distance(coords, i, coords, j)
        d2[t] = s
        ok = math.sqrt(s) <= eps
        keep[t] = ok
        if ok:
            deg[i + 1] += 1
            deg[j + 1] += 1
    for i in range(h):
        deg[i + 1] += deg[i]
    offsets = deg
    fill = offsets[:-1].copy()
    nbrs = np.empty(offsets[h], dtype=np.int32)
    nd2 = np.empty(offsets[h], dtype=np.float64)
    for t in range(k):
        if keep[t]:
            i = pairs[t, 0]
            j = pairs[t, 1]
            nbrs[fill[i]] = j
            nd2[fill[i]] = d2[t]
            fill[i] += 1
            nbrs[fill[j]] = i
            nd2[fill[j]] = d2[t]
            fill[j] += 1
    return offsets, nbrs, nd2


@nb.njit(nogil=True, cache=True)
def _sort_by_key(d2, lo, hi, n, order):
    """Fill order[:n] with the positions of entries sorted by (d2, lo, hi)."""
    base = np.argsort(d2[:n])
    for t in range(n):
        order[t] = base[t]
    # ties in d2 are rare (lattices, duplicates): insertion sort inside each run
    t = 0
    while t < n:
        u = t + 1
        while u < n and d2[order[u]] == d2[order[t]]:
            u += 1
        if u - t > 1:
            for a in range(t + 1, u):
                x = order[a]
                b = a - 1
                while b >= t and (lo[order[b]] > lo[x] or (lo[order[b]] == lo[x] and hi[order[b]] > hi[x])):
                    order[b + 1] = order[b]
                    b -= 1
                order[b + 1] = x
        t = u


@nb.njit(inline="always", nogil=True, cache=True)
def _set_edge(adj, i, j):
    adj[i, j >> 6] |= ONE << np.uint64(j & 63)
    adj[j, i >> 6] |= ONE << np.uint64(i & 63)


@nb.njit(nogil=True, cache=True)
def _count_capped(adj, L, W, depth_max, rem, wstart, counts):
    """Signed clique count of G_e (vertex set L) for cliques of size <= depth_max.

    Cliques are extended in increasing vertex order; the deepest level is a popcount.
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
            # next candidate at this level: lowest remaining bit
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
    total = 0
    sign = -1
    for k in range(depth_max + 1):
        total += sign * counts[k]
        sign = -sign
    return total


@nb.njit(nogil=True, cache=True)
def _reduced_euler(adj, L, W, stack, signs, degs, verts, stats):
    """chi~ of the clique complex of G_e by strong collapses and the split rule."""
    total = 0
    top = 0
    for w in range(W):
        stack[0, w] = L[w]
    signs[0] = 1
    top = 1
    while top > 0:
        top -= 1
        s = signs[top]
        V = stack[top]
        while True:
            # list the vertices of V with their degrees inside V
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
            # strong collapse: drop every vertex whose closed neighbourhood sits inside
            # another's; isolated vertices peel off as +1 each (a disjoint point)
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
            # no collapse left: split on a vertex of least degree
            best = 0
            for a in range(1, n):
                if degs[a] < degs[best]:
                    best = a
            v = verts[best]
            stats[3] += 1
            V[v >> 6] &= ~(ONE << np.uint64(v & 63))
            # V (now G - v) stays in slot `top` with sign s; push G[N(v)] with -s
            for w in range(W):
                stack[top + 1, w] = adj[v, w] & V[w]
            signs[top] = s
            signs[top + 1] = -s
            top += 2
            break
    return total


@nb.njit(nogil=True, cache=True)
def _build_frame(p, n_act, offsets, nbrs, nd2, sorted_loc, sorted_d2, rank_of, adj,
                 pend_d2, pend_lo, pend_hi, pend_i, pend_j):
    """Insert the frame edges that are never the longest of their triangle with p.

    Returns how many longest-edge pairs were left in the pending arrays.
    """
    npend = 0
    for i in range(n_act):
        w = sorted_loc[i]
        for k in range(offsets[w], offsets[w + 1]):
            x = nbrs[k]
            j = rank_of[x]
            if j > i:
                f_d2 = nd2[k]
                f_lo = min(w, x)
                f_hi = max(w, x)
                if _key_less(f_d2, f_lo, f_hi, sorted_d2[j], min(p, x), max(p, x)):
                    _set_edge(adj, i, j)
                else:
                    pend_d2[npend] = f_d2
                    pend_lo[npend] = f_lo
                    pend_hi[npend] = f_hi
                    pend_i[npend] = i
                    pend_j[npend] = j
                    npend += 1
    return npend


@nb.njit(nogil=True, cache=True)
def _owned_edge_offsets(offsets, nbrs, own_lo, own_hi):
    out = np.zeros(own_hi - own_lo + 1, dtype=np.int64)
    for p in range(own_lo, own_hi):
        c = 0
        for k in range(offsets[p], offsets[p + 1]):
            if nbrs[k] > p:
                c += 1
        out[p - own_lo + 1] = out[p - own_lo] + c
    return out


@nb.njit(nogil=True, cache=True)
def count_range(offsets, nbrs, nd2, own_lo, own_hi, max_dim, edge_offsets, out_d2, out_jump, stats):
    """Per-edge jumps for every edge whose lower endpoint p is in [own_lo, own_hi).

    edge_offsets gives, relative to the first owned row of the whole block, where each
    vertex's edges go in out_d2/out_jump; ranges never overlap between vertices, so
    several calls on disjoint vertex ranges may run in parallel threads.
    """
    h = offsets.shape[0] - 1
    maxdeg = 0
    for p in range(own_lo, own_hi):
        d = offsets[p + 1] - offsets[p]
        if d > maxdeg:
            maxdeg = d
    if maxdeg == 0:
        return
    Wmax = (maxdeg + 63) // 64
    rank_of = np.full(h, -1, dtype=np.int64)
    nb_loc = np.empty(maxdeg, dtype=np.int64)
    nb_d2 = np.empty(maxdeg, dtype=np.float64)
    nb_lo = np.empty(maxdeg, dtype=np.int64)
    nb_hi = np.empty(maxdeg, dtype=np.int64)
    nb_order = np.empty(maxdeg, dtype=np.int64)
    sorted_loc = np.empty(maxdeg, dtype=np.int64)
    sorted_d2 = np.empty(maxdeg, dtype=np.float64)
    adj = np.zeros((maxdeg, Wmax), dtype=np.uint64)
    L = np.empty(Wmax, dtype=np.uint64)
    cap = 1024
    pend_d2 = np.empty(cap, dtype=np.float64)
    pend_lo = np.empty(cap, dtype=np.int64)
    pend_hi = np.empty(cap, dtype=np.int64)
    pend_i = np.empty(cap, dtype=np.int64)
    pend_j = np.empty(cap, dtype=np.int64)
    pend_order = np.empty(cap, dtype=np.int64)
    depth_max = max_dim - 1 if max_dim >= 0 else 0
    rem = np.empty((max(depth_max, 1) + 1, Wmax), dtype=np.uint64)
    wstart = np.empty(max(depth_max, 1) + 1, dtype=np.int64)
    counts = np.empty(max(depth_max, 1) + 1, dtype=np.int64)
    stack = np.empty((maxdeg + 2, Wmax), dtype=np.uint64)
    signs = np.empty(maxdeg + 2, dtype=np.int64)
    degs = np.empty(maxdeg, dtype=np.int64)
    verts = np.empty(maxdeg, dtype=np.int64)
    base_slot = edge_offsets[0]

    for p in range(own_lo, own_hi):
        start = offsets[p]
        deg = offsets[p + 1] - start
        if deg == 0:
            continue
        slot = edge_offsets[p - own_lo] - base_slot + 0
        # sort N(p) by the edge order of (p, w)
        for a in range(deg):
            w = nbrs[start + a]
            nb_loc[a] = w
            nb_d2[a] = nd2[start + a]
            nb_lo[a] = min(p, w)
            nb_hi[a] = max(p, w)
        _sort_by_key(nb_d2, nb_lo, nb_hi, deg, nb_order)
        last = -1
        for r in range(deg):
            a = nb_order[r]
            sorted_loc[r] = nb_loc[a]
            sorted_d2[r] = nb_d2[a]
            if nb_loc[a] > p:
                last = r
        if last < 0:
            continue
        stats[0] += edge_offsets[p - own_lo + 1] - edge_offsets[p - own_lo]
        if max_dim == 1:
            for r in range(last + 1):
                if sorted_loc[r] > p:
                    out_d2[slot] = sorted_d2[r]
                    out_jump[slot] = -1
                    slot += 1
            continue
        n_act = last + 1  # ranks beyond the last owned edge never matter
        W = (n_act + 63) // 64
        for r in range(n_act):
            rank_of[sorted_loc[r]] = r
            for w in range(W):
                adj[r, w] = 0
        # the frame: edges among N(p). A pair that is not the longest edge of its
        # triangle with p is shorter than (p, w_j) for the later neighbour j, so it can
        # be inserted at once; only the longest ones wait for their turn in edge order.
        bound = 0
        for i in range(n_act):
            w = sorted_loc[i]
            bound += offsets[w + 1] - offsets[w]
        if bound > pend_d2.shape[0]:
            cap = max(bound, 2 * pend_d2.shape[0])
            pend_d2 = np.empty(cap, dtype=np.float64)
            pend_lo = np.empty(cap, dtype=np.int64)
            pend_hi = np.empty(cap, dtype=np.int64)
            pend_i = np.empty(cap, dtype=np.int64)
            pend_j = np.empty(cap, dtype=np.int64)
            pend_order = np.empty(cap, dtype=np.int64)
        npend = _build_frame(p, n_act, offsets, nbrs, nd2, sorted_loc, sorted_d2, rank_of, adj,
                             pend_d2, pend_lo, pend_hi, pend_i, pend_j)
        stats[4] += npend
        if npend > 0:
            _sort_by_key(pend_d2, pend_lo, pend_hi, npend, pend_order)
        ptr = 0
        for r in range(n_act):
            q = sorted_loc[r]
            e_d2 = sorted_d2[r]
            e_lo = min(p, q)
            e_hi = max(p, q)
            while ptr < npend:
                t = pend_order[ptr]
                if not _key_less(pend_d2[t], pend_lo[t], pend_hi[t], e_d2, e_lo, e_hi):
                    break
                _set_edge(adj, pend_i[t], pend_j[t])
                ptr += 1
            if q <= p:
                continue
            # L(e): neighbours of p before rank r that are joined to q by an earlier edge
            Wr = (r + 63) // 64
            size = 0
            for w in range(Wr):
                word = adj[r, w]
                if w == Wr - 1 and (r & 63) != 0:
                    word &= (ONE << np.uint64(r & 63)) - ONE
                L[w] = word
                size += _popcount(word)
            if max_dim == 2:
                c = size - 1
            elif size == 0:
                c = -1
            elif max_dim >= 3:
                c = _count_capped(adj, L, Wr, depth_max, rem, wstart, counts)
            else:
                c = _reduced_euler(adj, L, Wr, stack, signs, degs, verts, stats)
            out_d2[slot] = e_d2
            out_jump[slot] = c
            slot += 1
        for r in range(n_act):
            rank_of[sorted_loc[r]] = -1


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

    def __add__(self, other: "KernelStats") -> "KernelStats":
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


def _halo_graph(coords: np.ndarray, eps: float):
    tree = cKDTree(coords)
    pairs = tree.query_pairs(query_radius(eps), output_type="ndarray")
    return build_graph(coords, np.ascontiguousarray(pairs, dtype=np.int64), float(eps))


def _split_evenly(offsets: np.ndarray, lo: int, hi: int, pieces: int) -> list[tuple[int, int]]:
    """Cut [lo, hi) into pieces of about equal deg^2 weight (the frame dominates)."""
    if pieces <= 1 or hi - lo <= 1:
        return [(lo, hi)]
    deg = np.diff(offsets[lo : hi + 1]).astype(np.float64)
    weight = np.cumsum(deg * deg + 1.0)
    cuts = np.searchsorted(weight, weight[-1] * np.arange(1, pieces) / pieces)
    bounds = np.unique(np.concatenate([[0], cuts, [hi - lo]])) + lo
    return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]


def count_jumps(
    coords: np.ndarray,
    eps: float,
    max_dim: int | None = None,
    owned: tuple[int, int] | None = None,
    threads: int = 1,
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
    threads : int
        Threads over which the owned rows are spread (the kernel releases the GIL).

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
    import time

    coords = np.ascontiguousarray(coords, dtype=np.float64)
    h = coords.shape[0]
    lo, hi = (0, h) if owned is None else (int(owned[0]), int(owned[1]))
    if not (0 <= lo <= hi <= h):
        raise ValueError(f"owned rows [{lo}, {hi}) do not fit a halo of {h} rows")
    cap = UNCAPPED if max_dim is None else int(max_dim)
    stats = KernelStats(vertices=hi - lo)
    t0 = time.perf_counter()
    if cap == 0 or hi == lo:
        values = np.zeros(1 if hi > lo else 0, dtype=np.float64)
        jumps = np.full(values.shape, hi - lo, dtype=np.int64)
        return JumpTable(values, jumps, stats)
    offsets, nbrs, nd2 = _halo_graph(coords, eps)
    t1 = time.perf_counter()
    edge_offsets = _owned_edge_offsets(offsets, nbrs, lo, hi)
    n_edges = int(edge_offsets[-1])
    out_d2 = np.empty(n_edges, dtype=np.float64)
    out_jump = np.empty(n_edges, dtype=np.int64)
    ranges = _split_evenly(offsets, lo, hi, max(1, threads) * 8 if threads > 1 else 1)
    raw = np.zeros((len(ranges), len(STAT_NAMES)), dtype=np.int64)

    def work(k: int) -> None:
        a, b = ranges[k]
        count_range(offsets, nbrs, nd2, a, b, cap, edge_offsets[a - lo : b - lo + 1],
                    out_d2[edge_offsets[a - lo] :], out_jump[edge_offsets[a - lo] :], raw[k])

    if len(ranges) == 1:
        work(0)
    else:
        with ThreadPoolExecutor(max_workers=threads) as pool:
            list(pool.map(work, range(len(ranges))))
    t2 = time.perf_counter()
    counted = raw.sum(axis=0)
    for name, value in zip(STAT_NAMES, counted):
        setattr(stats, name, int(value))
    stats.seconds_graph = t1 - t0
    stats.seconds_count = t2 - t1
    nz = out_jump != 0
    values = np.concatenate([[0.0], np.sqrt(out_d2[nz])])
    jumps = np.concatenate([[hi - lo], out_jump[nz]])
    uniq, inverse = np.unique(values, return_inverse=True)
    summed = np.zeros(uniq.shape[0], dtype=np.int64)
    np.add.at(summed, inverse, jumps)
    keep = summed != 0
    return JumpTable(uniq[keep], summed[keep], stats)
