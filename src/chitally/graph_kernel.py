"""Compiled counting for graph filtrations: CSR builders and the per-vertex kernel.

Two filtrations of a graph's clique complex are counted here, both exactly:

* **Vertex values (lower star).** Vertices are ordered by (value, id) and a simplex takes
  the value of its top vertex. The simplices whose top vertex is v are v plus the cliques
  S of its lower link G_v (the neighbours of v that come before it, with the edges among
  them), so v's jump at its value is

      c(v) = sum over cliques S of G_v, |S| <= D, of (-1)^|S|,

  a clique count by size with a cap D, or minus the reduced Euler characteristic of the
  clique complex of G_v without one. Both reuse the point-cloud kernel's bitset counting
  and its strong collapses and splits (`chitally.kernel`), fed with the adjacency of G_v.
  Vertices of G_v without a neighbour there are taken out first: each is a clique of
  size one and nothing more (a disjoint point adds 1 to the reduced Euler
  characteristic), and leaving them out keeps the bitsets of hubs small.

* **Edge values (flag).** Edges are ordered by (value, lower id, higher id) and counted by
  the point-cloud kernel's `count_range` on a CSR built from that order (`fill_csr_by_rank`).

Arrays in, arrays out: no files, no Dask, no Zarr. The compiled functions release the GIL.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .kernel import (
    _count_capped,
    _fill_rows,
    _count_capped1,
    _reduced_euler,
    _reduced_euler1,
)

UNCAPPED = -1  # the compiled code's spelling of max_dim=None

ONE = np.uint64(1)
ZERO = np.uint64(0)


# ---------------------------------------------------------------------------------------
# CSR builders
# ---------------------------------------------------------------------------------------


@nb.njit(nogil=True, cache=True)
def fill_csr_by_rank(n, elo, ehi, offsets, nbrs, erank):
    """CSR of edges given in rank order (edge g = (elo[g], ehi[g])): rows in rank order.

    offsets has n + 1 entries, nbrs and erank 2m. A counting sort by vertex that visits
    the edges in rank order leaves every row sorted by rank, which is what
    `chitally.kernel.count_range` reads.
    """
    m = elo.shape[0]
    for i in range(n + 1):
        offsets[i] = 0
    for g in range(m):
        offsets[elo[g] + 1] += 1
        offsets[ehi[g] + 1] += 1
    for i in range(n):
        offsets[i + 1] += offsets[i]
    _fill_rows(elo, ehi, 0, m, offsets[:-1].copy(), nbrs, erank)


@nb.njit(nogil=True, cache=True)
def fill_csr_by_vertex_rank(n, elo, ehi, order, offsets, nbrs):
    """CSR of undirected edges with every row sorted by the neighbours' vertex rank.

    order[r] is the vertex of rank r. Visiting the vertices in rank order and appending
    each to the rows of its neighbours sorts every row in one pass, so the lower
    neighbours of a vertex are a prefix of its row.
    """
    m = elo.shape[0]
    # a plain CSR first (rows in any order), to find each vertex's neighbours
    start = np.zeros(n + 1, dtype=np.int64)
    for g in range(m):
        start[elo[g] + 1] += 1
        start[ehi[g] + 1] += 1
    for i in range(n):
        start[i + 1] += start[i]
    plain = np.empty(2 * m, dtype=np.int32)
    fill = start[:-1].copy()
    for g in range(m):
        a = elo[g]
        b = ehi[g]
        plain[fill[a]] = b
        fill[a] += 1
        plain[fill[b]] = a
        fill[b] += 1
    for i in range(n + 1):
        offsets[i] = start[i]
    for i in range(n):
        fill[i] = start[i]
    for r in range(n):
        u = order[r]
        for k in range(start[u], start[u + 1]):
            v = plain[k]
            nbrs[fill[v]] = u
            fill[v] += 1


# ---------------------------------------------------------------------------------------
# the lower-star kernel
# ---------------------------------------------------------------------------------------


@nb.njit(nogil=True, cache=True)
def _lower_degree(offsets, nbrs, vrank, v):
    """Number of neighbours of v before it (its row is sorted by vertex rank)."""
    s = offsets[v]
    t = offsets[v + 1]
    rv = vrank[v]
    k = s
    while k < t and vrank[nbrs[k]] < rv:
        k += 1
    return k - s


@nb.njit(nogil=True, cache=True)
def _lower_link_edges(offsets, nbrs, vrank, s, n, loc, low, pa, pj):
    """The edges of G_v (v's lower neighbours are nbrs[s:s+n], loc maps each to its
    position there, -1 elsewhere), each found once from its later endpoint's lower
    prefix, as pairs (pa, pj) of positions; returns their number, writing only as many
    as the arrays hold. low caches lower degrees (-1: not known yet)."""
    ne = 0
    cap = pa.shape[0]
    for a in range(n):
        u = nbrs[s + a]
        lu = low[u]
        if lu < 0:
            lu = _lower_degree(offsets, nbrs, vrank, u)
            low[u] = lu
        start = offsets[u]
        for k in range(start, start + lu):
            w = nbrs[k]
            j = loc[w]
            if j >= 0:
                if ne < cap:
                    pa[ne] = a
                    pj[ne] = j
                ne += 1
    return ne


@nb.njit(nogil=True, cache=True)
def lower_star_range(offsets, nbrs, vrank, lo, hi, max_dim, out, stats):
    """c(v) for every vertex v in [lo, hi), written to out[v - lo].

    Parameters
    ----------
    offsets, nbrs : CSR (int64 n+1, int32 2m), every row sorted by vrank of the neighbour.
    vrank : int64 (n)
        Position of each vertex in the (value, id) order; only comparisons are used, so
        a halo may carry the global positions.
    lo, hi : the owned vertices.
    max_dim : int, the cap D, or UNCAPPED (-1).
    out : int64 (hi - lo)
    stats : int64 (5), counters of the collapses (cones, collapsed, splits at 1, 2, 3).
    """
    n_all = offsets.shape[0] - 1
    loc = np.full(n_all, -1, dtype=np.int32)
    # lower degrees, found once per vertex: a vertex's lower prefix is read once for
    # every later neighbour
    low = np.full(n_all, -1, dtype=np.int32)
    maxlow = 0
    for v in range(lo, hi):
        low[v] = _lower_degree(offsets, nbrs, vrank, v)
        maxlow = max(maxlow, low[v])
    pa = np.empty(max(maxlow, 16), dtype=np.int32)  # pairs (a, j), j < a, of G_v
    pj = np.empty(max(maxlow, 16), dtype=np.int32)
    deg = np.zeros(maxlow + 1, dtype=np.int64)
    newid = np.empty(maxlow + 1, dtype=np.int32)
    depth = max(max_dim, 1) + 1
    counts = np.empty(depth, dtype=np.int64)
    rem1 = np.empty(depth, dtype=np.uint64)
    wstart = np.empty(depth, dtype=np.int64)
    cadj = np.zeros(64, dtype=np.uint64)
    stack1 = np.empty(2 * 64 + 2, dtype=np.uint64)
    signs1 = np.empty(2 * 64 + 130, dtype=np.int64)
    # multi-word buffers, grown on demand: most lower links compact to <= 64 vertices
    kcap = 0
    wcap = 1
    adj = np.zeros((0, 1), dtype=np.uint64)
    L = np.zeros(1, dtype=np.uint64)
    rem = np.zeros((depth, 1), dtype=np.uint64)
    stack = np.zeros((2, 1), dtype=np.uint64)
    signs = np.zeros(130, dtype=np.int64)
    degs = np.zeros(1, dtype=np.int64)
    verts = np.zeros(1, dtype=np.int64)
    for v in range(lo, hi):
        s = offsets[v]
        n = low[v]
        if n == 0 or max_dim == 0:
            out[v - lo] = 1
            continue
        if max_dim == 1:
            out[v - lo] = 1 - n
            continue
        for a in range(n):
            loc[nbrs[s + a]] = a
        ne = _lower_link_edges(offsets, nbrs, vrank, s, n, loc, low, pa, pj)
        if ne > pa.shape[0]:
            # grown here, between vertices: an array rebound inside the pair loop costs
            # reference counting at every step of it
            pa = np.empty(2 * ne, dtype=np.int32)
            pj = np.empty(2 * ne, dtype=np.int32)
            ne = _lower_link_edges(offsets, nbrs, vrank, s, n, loc, low, pa, pj)
        for a in range(n):
            loc[nbrs[s + a]] = -1
        if max_dim == 2 or ne == 0:
            # vertices and edges only (or G_v has no edge): 1 - |V(G_v)| + |E(G_v)|
            out[v - lo] = 1 - n + ne
            continue
        # take out the vertices of G_v with no neighbour there
        for a in range(n):
            deg[a] = 0
        for x in range(ne):
            deg[pa[x]] += 1
            deg[pj[x]] += 1
        k = 0
        for a in range(n):
            if deg[a] > 0:
                newid[a] = k
                k += 1
        iso = n - k
        if k <= 64:
            for a in range(k):
                cadj[a] = ZERO
            for x in range(ne):
                i = newid[pa[x]]
                j = newid[pj[x]]
                cadj[i] |= ONE << np.uint64(j)
                cadj[j] |= ONE << np.uint64(i)
            if max_dim > 0:
                # _count_capped1 returns sum_k (-1)^(k+1) #cliques of size k <= D
                out[v - lo] = -_count_capped1(cadj, k, max_dim, rem1, counts) - iso
            else:
                # chi~(H + iso points) = chi~(H) + iso, for H not empty
                out[v - lo] = -(_reduced_euler1(cadj, k, stack1, signs1, stats) + iso)
            continue
        W = (k + 63) >> 6
        if k > kcap or W > wcap:
            kcap = max(k, 2 * kcap)
            wcap = (kcap + 63) >> 6
            adj = np.zeros((kcap, wcap), dtype=np.uint64)
            L = np.zeros(wcap, dtype=np.uint64)
            rem = np.zeros((depth, wcap), dtype=np.uint64)
            stack = np.zeros((2 * kcap + 2, wcap), dtype=np.uint64)
            signs = np.zeros(2 * kcap + 130, dtype=np.int64)
            degs = np.zeros(kcap, dtype=np.int64)
            verts = np.zeros(kcap, dtype=np.int64)
        for a in range(k):
            for w in range(W):
                adj[a, w] = ZERO
        for x in range(ne):
            i = newid[pa[x]]
            j = newid[pj[x]]
            adj[i, j >> 6] |= ONE << np.uint64(j & 63)
            adj[j, i >> 6] |= ONE << np.uint64(i & 63)
        for w in range(W):
            L[w] = ~ZERO
        if (k & 63) != 0:
            L[W - 1] = (ONE << np.uint64(k & 63)) - ONE
        if max_dim > 0:
            out[v - lo] = -_count_capped(adj, L, W, max_dim, rem, wstart, counts) - iso
        else:
            out[v - lo] = -(_reduced_euler(adj, L, W, stack, signs, degs, verts, stats) + iso)
