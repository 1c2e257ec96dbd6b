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

  Many small graphs (the batch path) are counted one graph a call by `lower_star_row`
  (`lower_star_degree_row` for degrees): the graph is relabelled by rank, the lower
  rows kept as bitsets (up to 64 * BIT_WORDS vertices), and each jump added straight to
  the graph's row of a feature matrix; no CSR of the whole graph, no union of graphs.

* **Edge values (flag).** Edges are ordered by (value, lower id, higher id) and counted by
  the point-cloud kernel's `count_range` on a CSR built from that order (`fill_csr_by_rank`).

Arrays in, arrays out: no files, no Dask, no Zarr. The compiled functions release the GIL.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from .kernel import (
    _count_capped,
    _count_capped1,
    _fill_rows,
    _reduced_euler,
    _reduced_euler1,
    _trailing_zeros,
)

UNCAPPED = -1  # the compiled code's spelling of max_dim=None

# `lower_star_row` keeps every lower row as a bitset when a graph has at most 64 * BIT_WORDS
# vertices (n^2 / 8 bytes: 32 KiB at 512 vertices)
BIT_WORDS = 8

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
def _link_jump(n, ne, pa, pj, max_dim, deg, newid, cadj, rem1, counts, stack1, signs1, stats):
    """c(v) of a vertex whose lower link G_v has n vertices and the ne edges (pa, pj)
    (positions in 0..n-1), for a cap max_dim >= 3 or UNCAPPED (smaller caps need no
    edges, or only their number).

    deg and newid hold n entries; cadj, rem1, counts, stack1, signs1 are the one-word
    buffers (64, max_dim + 1 or 2, 130, 258 entries). A G_v that compacts to more than 64
    vertices gets multi-word buffers of its own (rare: a hub's lower link).
    """
    if ne == 0:
        return 1 - n
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
            return -_count_capped1(cadj, k, max_dim, rem1, counts) - iso
        # chi~(H + iso points) = chi~(H) + iso, for H not empty
        return -(_reduced_euler1(cadj, k, stack1, signs1, stats) + iso)
    W = (k + 63) >> 6
    depth = max(max_dim, 1) + 1
    adj = np.zeros((k, W), dtype=np.uint64)
    for x in range(ne):
        i = newid[pa[x]]
        j = newid[pj[x]]
        adj[i, j >> 6] |= ONE << np.uint64(j & 63)
        adj[j, i >> 6] |= ONE << np.uint64(i & 63)
    L = np.empty(W, dtype=np.uint64)
    for w in range(W):
        L[w] = ~ZERO
    if (k & 63) != 0:
        L[W - 1] = (ONE << np.uint64(k & 63)) - ONE
    if max_dim > 0:
        rem = np.zeros((depth, W), dtype=np.uint64)
        wstart = np.empty(depth, dtype=np.int64)
        return -_count_capped(adj, L, W, max_dim, rem, wstart, counts) - iso
    stack = np.zeros((2 * k + 2, W), dtype=np.uint64)
    signs = np.zeros(2 * k + 130, dtype=np.int64)
    degs = np.zeros(k, dtype=np.int64)
    verts = np.zeros(k, dtype=np.int64)
    return -(_reduced_euler(adj, L, W, stack, signs, degs, verts, stats) + iso)


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
    cadj = np.zeros(64, dtype=np.uint64)
    stack1 = np.empty(2 * 64 + 2, dtype=np.uint64)
    signs1 = np.empty(2 * 64 + 130, dtype=np.int64)
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
        if max_dim == 2:
            # vertices and edges only: 1 - |V(G_v)| + |E(G_v)|
            out[v - lo] = 1 - n + ne
            continue
        out[v - lo] = _link_jump(n, ne, pa, pj, max_dim, deg, newid, cadj, rem1, counts,
                                 stack1, signs1, stats)


# ---------------------------------------------------------------------------------------
# many small graphs: one call a graph, in rank space
# ---------------------------------------------------------------------------------------


@nb.njit(nogil=True, cache=True)
def stable_order(vals):
    """The vertices in (value, id) order, as a stable argsort of vals would list them.

    Integer values within a range of a few times n (degrees, their negatives) are sorted
    by counting; others by a merge sort (stable: ties keep id order).
    """
    n = vals.shape[0]
    order = np.empty(n, dtype=np.int64)
    if n == 0:
        return order
    lo = vals[0]
    hi = vals[0]
    integral = True
    for i in range(n):
        x = vals[i]
        lo = min(lo, x)
        hi = max(hi, x)
        if x != np.floor(x):
            integral = False
    if not integral or hi - lo > 4.0 * n + 1024.0:
        return np.argsort(vals, kind="mergesort")
    span = int(hi - lo) + 1
    start = np.zeros(span + 1, dtype=np.int64)
    for i in range(n):
        start[int(vals[i] - lo) + 1] += 1
    for b in range(span):
        start[b + 1] += start[b]
    for i in range(n):
        b = int(vals[i] - lo)
        order[start[b]] = i
        start[b] += 1
    return order


@nb.njit(nogil=True, cache=True)
def _lower_csr(n, edges, rank):
    """The lower rows of a graph in rank space: row r lists, ascending, the ranks of r's
    neighbours before it (each edge once, in the row of its later end)."""
    m = edges.shape[0]
    loff = np.zeros(n + 1, dtype=np.int64)
    boff = np.zeros(n + 1, dtype=np.int64)
    for g in range(m):
        a = rank[edges[g, 0]]
        b = rank[edges[g, 1]]
        if a > b:
            a, b = b, a
        loff[b + 1] += 1
        boff[a + 1] += 1
    for r in range(n):
        loff[r + 1] += loff[r]
        boff[r + 1] += boff[r]
    # the edges by their earlier end first, so that the rows fill in ascending order
    later = np.empty(m, dtype=np.int32)
    fill = boff[:-1].copy()
    for g in range(m):
        a = rank[edges[g, 0]]
        b = rank[edges[g, 1]]
        if a > b:
            a, b = b, a
        later[fill[a]] = b
        fill[a] += 1
    rows = np.empty(m, dtype=np.int32)
    for r in range(n):
        fill[r] = loff[r]
    for a in range(n):
        for x in range(boff[a], boff[a + 1]):
            b = later[x]
            rows[fill[b]] = a
            fill[b] += 1
    return loff, rows


@nb.njit(nogil=True, cache=True)
def _rank_pairs(loff, rows, lv, n, loc, pa, pj):
    """The edges of G_v in rank space (v's lower row is lv[:n], loc its positions),
    each once from its later end's lower row; returns their number, writing only as many
    as the arrays hold."""
    ne = 0
    cap = pa.shape[0]
    for a in range(n):
        u = lv[a]
        for x in range(loff[u], loff[u + 1]):
            j = loc[rows[x]]
            if j >= 0:
                if ne < cap:
                    pa[ne] = a
                    pj[ne] = j
                ne += 1
    return ne


@nb.njit(nogil=True, cache=True)
def _lower_bits(n, W, edges, rank):
    """Row r: the bitset of the ranks of r's neighbours before it (W words); and the
    number of them."""
    bits = np.zeros((n, W), dtype=np.uint64)
    low = np.zeros(n, dtype=np.int64)
    for g in range(edges.shape[0]):
        a = rank[edges[g, 0]]
        b = rank[edges[g, 1]]
        if a > b:
            a, b = b, a
        bits[b, a >> 6] |= ONE << np.uint64(a & 63)
        low[b] += 1
    return bits, low


@nb.njit(nogil=True, cache=True)
def _bit_pairs(bits, v, lv, n, loc, pa, pj):
    """`_rank_pairs` by bitsets: the neighbours of u in G_v that come before it are
    bits[u] & bits[v], a few words, so the pairs cost a word operation each rather than
    one look-up per lower neighbour of u. Returns (number of edges, whether G_v has a
    triangle): a triangle w' < w < u of G_v is a bit of bits[w] & bits[u] & bits[v] for
    an edge (w, u) of G_v."""
    ne = 0
    cap = pa.shape[0]
    tri = False
    for a in range(1, n):
        u = lv[a]
        for q in range((u >> 6) + 1):
            word = bits[u, q] & bits[v, q]
            while word != ZERO:
                b = _trailing_zeros(word)
                word &= word - ONE
                w = (q << 6) | b
                if ne < cap:
                    pa[ne] = a
                    pj[ne] = loc[w]
                ne += 1
                if not tri:
                    for z in range((w >> 6) + 1):
                        if (bits[w, z] & bits[u, z] & bits[v, z]) != ZERO:
                            tri = True
                            break
    return ne, tri


@nb.njit(nogil=True, cache=True)
def degree_values(edges, n, sign):
    """sign * degree of every vertex, as float64 (the default vertex values)."""
    vals = np.zeros(n, dtype=np.float64)
    for g in range(edges.shape[0]):
        vals[edges[g, 0]] += 1.0
        vals[edges[g, 1]] += 1.0
    for i in range(n):
        vals[i] = sign * vals[i] + 0.0
    return vals


@nb.njit(nogil=True, cache=True)
def degree_square_sum(edges, n):
    """The sum over vertices of degree squared (float64; a cost estimate's term)."""
    deg = np.zeros(n, dtype=np.int64)
    for g in range(edges.shape[0]):
        deg[edges[g, 0]] += 1
        deg[edges[g, 1]] += 1
    total = 0.0
    for i in range(n):
        total += float(deg[i]) * float(deg[i])
    return total


@nb.njit(nogil=True, cache=True)
def lower_star_row(edges, vals, threshold, max_dim, grid, row, stats):
    """One graph's lower-star jumps, added to a row of a feature matrix before its sums.

    c(v) (as `lower_star_range`) is added to ``row[i]`` for i the first grid point not
    below the value of v (``row`` has grid.size + 1 entries, the last for values above
    the grid), for every vertex of value <= threshold; the row's running sum is then the
    curve on the grid.

    The graph is relabelled by rank, so a vertex's lower neighbours are the ranks below
    its own: up to 64 * BIT_WORDS vertices each keeps them as a bitset (the edges of a
    lower link are then word operations, and a lower link without a triangle, the usual
    case in sparse graphs, is counted from its numbers of vertices and edges), above that
    as a sorted row.

    Parameters
    ----------
    edges : int64 (m, 2), distinct edges of vertices 0..n-1.
    vals : float64 (n), every vertex's value (ties broken by id).
    threshold : float, inf for none.
    max_dim : int, the cap D, or UNCAPPED (-1).
    grid : float64, ascending.
    row : int64 (grid.size + 1)
    stats : int64 (5), as `lower_star_range`.
    """
    n = vals.shape[0]
    order = stable_order(vals)
    rank = np.empty(n, dtype=np.int64)
    for r in range(n):
        rank[order[r]] = r
    W = (n + 63) >> 6
    use_bits = W <= BIT_WORDS
    if use_bits:
        bits, low = _lower_bits(n, W, edges, rank)
        loff = np.zeros(1, dtype=np.int64)
        rows = np.zeros(0, dtype=np.int32)
    else:
        bits = np.zeros((0, 1), dtype=np.uint64)
        loff, rows = _lower_csr(n, edges, rank)
        low = np.empty(n, dtype=np.int64)
        for r in range(n):
            low[r] = loff[r + 1] - loff[r]
    maxlow = 0
    for r in range(n):
        maxlow = max(maxlow, low[r])
    lv = np.empty(maxlow + 1, dtype=np.int64)
    loc = np.full(n, -1, dtype=np.int32)
    pa = np.empty(max(4 * maxlow, 16), dtype=np.int32)
    pj = np.empty(max(4 * maxlow, 16), dtype=np.int32)
    deg = np.zeros(maxlow + 1, dtype=np.int64)
    newid = np.empty(maxlow + 1, dtype=np.int32)
    depth = max(max_dim, 1) + 1
    counts = np.empty(depth, dtype=np.int64)
    rem1 = np.empty(depth, dtype=np.uint64)
    cadj = np.zeros(64, dtype=np.uint64)
    stack1 = np.empty(2 * 64 + 2, dtype=np.uint64)
    signs1 = np.empty(2 * 64 + 130, dtype=np.int64)
    G = grid.shape[0]
    gi = 0
    for v in range(n):
        value = vals[order[v]]
        if value > threshold:
            break  # every later vertex lies above it too
        while gi < G and grid[gi] < value:
            gi += 1
        nv = low[v]
        if nv == 0 or max_dim == 0:
            row[gi] += 1
            continue
        if max_dim == 1:
            row[gi] += 1 - nv
            continue
        # v's lower neighbours, ascending, and their positions
        if use_bits:
            a = 0
            for q in range((v >> 6) + 1):
                word = bits[v, q]
                while word != ZERO:
                    u = (q << 6) | _trailing_zeros(word)
                    word &= word - ONE
                    lv[a] = u
                    loc[u] = a
                    a += 1
        else:
            s = loff[v]
            for a in range(nv):
                u = rows[s + a]
                lv[a] = u
                loc[u] = a
        tri = True
        if use_bits:
            ne, tri = _bit_pairs(bits, v, lv, nv, loc, pa, pj)
        else:
            ne = _rank_pairs(loff, rows, lv, nv, loc, pa, pj)
        if ne > pa.shape[0]:
            pa = np.empty(2 * ne, dtype=np.int32)
            pj = np.empty(2 * ne, dtype=np.int32)
            if use_bits:
                ne, tri = _bit_pairs(bits, v, lv, nv, loc, pa, pj)
            else:
                ne = _rank_pairs(loff, rows, lv, nv, loc, pa, pj)
        for a in range(nv):
            loc[lv[a]] = -1
        if max_dim == 2 or not tri:
            # no clique of G_v above an edge: 1 - |V(G_v)| + |E(G_v)| under any cap >= 2
            row[gi] += 1 - nv + ne
            continue
        row[gi] += _link_jump(nv, ne, pa, pj, max_dim, deg, newid, cadj, rem1, counts,
                              stack1, signs1, stats)


@nb.njit(nogil=True, cache=True)
def lower_star_degree_row(edges, n, sign, threshold, max_dim, grid, row, stats):
    """`lower_star_row` with every vertex valued sign * its degree (one call a graph)."""
    lower_star_row(edges, degree_values(edges, n, sign), threshold, max_dim, grid, row, stats)
