"""A compiled, implicit KD-tree shared by the planner's cover and the kernel's edge join.

scipy's cKDTree answers batched radius queries as Python lists, which at 10^7 queries
costs gigabytes of objects, and the greedy cover is sequential by nature (each query
depends on what the previous ones covered). So chitally keeps its own tree inside numba:
median splits on the dimension of widest spread, all leaves at one depth, nodes in heap
order (children of k are 2k+1 and 2k+2), no pointers. The build reorders a copy of the
coordinates physically, so queries and the final leaf order read memory sequentially.

The tree only proposes candidates: its boxes are compared against a widened bound
(`metric.query_radius`), in the key of the metric at hand (box gaps squared and summed,
summed, or their largest), and membership is always decided by the one distance rule of
:mod:`chitally.metric`. No I/O, no Dask, no Zarr here.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from .metric import accumulate

# Deepest tree the fixed traversal stacks can walk: 2**127 leaves is far beyond any
# point count a process can hold.
STACK_DEPTH = 128


@nb.njit(nogil=True, cache=True)
def _swap_rows(xs, perm, i, j):
    t = perm[i]
    perm[i] = perm[j]
    perm[j] = t
    for k in range(xs.shape[1]):
        v = xs[i, k]
        xs[i, k] = xs[j, k]
        xs[j, k] = v


@nb.njit(nogil=True, cache=True)
def nth_element(xs, perm, lo, hi, nth, dim):
    """Reorder rows lo..hi-1 so that row `nth` holds the value it would hold if sorted by
    coordinate `dim`, with no larger value before it and no smaller one after it
    (Hoare's selection; equal keys split evenly, so duplicate points stay cheap)."""
    left = lo
    right = hi - 1
    while right > left:
        a = xs[left, dim]
        b = xs[(left + right) // 2, dim]
        c = xs[right, dim]
        # median of three: robust on rows that are already sorted
        pivot = max(min(a, b), min(max(a, b), c))
        i = left
        j = right
        while i <= j:
            while xs[i, dim] < pivot:
                i += 1
            while xs[j, dim] > pivot:
                j -= 1
            if i <= j:
                _swap_rows(xs, perm, i, j)
                i += 1
                j -= 1
        if nth <= j:
            right = j
        elif nth >= i:
            left = i
        else:
            return


@nb.njit(nogil=True, cache=True)
def tree_depth(n, leaf_size):
    """Levels below the root so that no leaf holds more than leaf_size rows."""
    depth = 0
    while (n + (1 << depth) - 1) >> depth > leaf_size:
        depth += 1
    return depth


@nb.njit(nogil=True, cache=True)
def _new_tree(x, leaf_size):
    n, m = x.shape
    depth = tree_depth(n, leaf_size)
    n_nodes = (1 << (depth + 1)) - 1
    xs = x.copy()
    perm = np.arange(n, dtype=np.int64)
    start = np.empty(n_nodes, dtype=np.int64)
    stop = np.empty(n_nodes, dtype=np.int64)
    box_lo = np.empty((n_nodes, m), dtype=np.float64)
    box_hi = np.empty((n_nodes, m), dtype=np.float64)
    start[0] = 0
    stop[0] = n
    return depth, xs, perm, start, stop, box_lo, box_hi


@nb.njit(nogil=True, cache=True)
def _split_node(xs, perm, start, stop, box_lo, box_hi, node, first_leaf):
    """Set the exact box of one node and, above the leaves, split its rows at the median
    of the widest coordinate into its two children."""
    m = xs.shape[1]
    s = start[node]
    e = stop[node]
    for k in range(m):
        box_lo[node, k] = math.inf
        box_hi[node, k] = -math.inf
    for i in range(s, e):
        for k in range(m):
            v = xs[i, k]
            if v < box_lo[node, k]:
                box_lo[node, k] = v
            if v > box_hi[node, k]:
                box_hi[node, k] = v
    if node < first_leaf:
        dim = 0
        spread = -1.0
        for k in range(m):
            w = box_hi[node, k] - box_lo[node, k]
            if w > spread:
                spread = w
                dim = k
        mid = (s + e) // 2
        if e - s > 1:
            nth_element(xs, perm, s, e, mid, dim)
        start[2 * node + 1] = s
        stop[2 * node + 1] = mid
        start[2 * node + 2] = mid
        stop[2 * node + 2] = e


@nb.njit(nogil=True, cache=True)
def build_tree(x, leaf_size):
    """Return (xs, perm, start, stop, box_lo, box_hi): xs = x[perm] in leaf order and,
    per heap node, its row range in xs and its exact bounding box. Serial, for callers
    that already run in threads of their own (the kernel)."""
    depth, xs, perm, start, stop, box_lo, box_hi = _new_tree(x, leaf_size)
    first_leaf = (1 << depth) - 1
    for node in range(start.shape[0]):
        _split_node(xs, perm, start, stop, box_lo, box_hi, node, first_leaf)
    return xs, perm, start, stop, box_lo, box_hi


@nb.njit(parallel=True, cache=True)
def build_tree_parallel(x, leaf_size):
    """`build_tree` level by level: the nodes of one level own disjoint row ranges, so
    they are split in parallel."""
    depth, xs, perm, start, stop, box_lo, box_hi = _new_tree(x, leaf_size)
    first_leaf = (1 << depth) - 1
    for level in range(depth + 1):
        first = (1 << level) - 1
        for t in nb.prange(1 << level):
            _split_node(xs, perm, start, stop, box_lo, box_hi, first + t, first_leaf)
    return xs, perm, start, stop, box_lo, box_hi


@nb.njit(inline="always", nogil=True, cache=True)
def box_squared_distance(box_lo, box_hi, node, q, qi):
    """A lower bound on d2 between row qi of q and any point in the box of `node`."""
    s = 0.0
    for k in range(box_lo.shape[1]):
        v = q[qi, k]
        t = 0.0
        if v < box_lo[node, k]:
            t = box_lo[node, k] - v
        elif v > box_hi[node, k]:
            t = v - box_hi[node, k]
        s += t * t
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def box_box_squared_distance(box_lo, box_hi, a, b):
    """A lower bound on d2 between any point of box a and any point of box b."""
    s = 0.0
    for k in range(box_lo.shape[1]):
        t = 0.0
        if box_hi[a, k] < box_lo[b, k]:
            t = box_lo[b, k] - box_hi[a, k]
        elif box_hi[b, k] < box_lo[a, k]:
            t = box_lo[a, k] - box_hi[b, k]
        s += t * t
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def box_key(box_lo, box_hi, node, q, qi, tag):
    """A lower bound on the key (metric.distance_key, metric of `tag`) between row qi of
    q and any point in the box of `node`: the per-coordinate gaps combined by the
    metric's own rule."""
    if len(tag) == 0:
        return box_squared_distance(box_lo, box_hi, node, q, qi)
    s = 0.0
    for k in range(box_lo.shape[1]):
        v = q[qi, k]
        t = 0.0
        if v < box_lo[node, k]:
            t = box_lo[node, k] - v
        elif v > box_hi[node, k]:
            t = v - box_hi[node, k]
        s = accumulate(s, t, tag)
    return s


@nb.njit(inline="always", nogil=True, cache=True)
def box_box_key(box_lo, box_hi, a, b, tag):
    """A lower bound on the key between any point of box a and any point of box b."""
    if len(tag) == 0:
        return box_box_squared_distance(box_lo, box_hi, a, b)
    s = 0.0
    for k in range(box_lo.shape[1]):
        t = 0.0
        if box_hi[a, k] < box_lo[b, k]:
            t = box_lo[b, k] - box_hi[a, k]
        elif box_hi[b, k] < box_lo[a, k]:
            t = box_lo[a, k] - box_hi[b, k]
        s = accumulate(s, t, tag)
    return s


@nb.njit(nogil=True, cache=True)
def near_leaves(start, stop, box_lo, box_hi, a, prune2, out, from_row):
    """Leaves holding a row at or after `from_row` whose boxes come within sqrt(prune2)
    of node a's box, in leaf order, written into `out` while it has room; returns how
    many there are (call again with a bigger `out` when that exceeds its length)."""
    return near_leaves_by(start, stop, box_lo, box_hi, a, prune2, out, from_row, ())


@nb.njit(nogil=True, cache=True)
def near_leaves_by(start, stop, box_lo, box_hi, a, prune, out, from_row, tag):
    """`near_leaves` in the metric of `tag`: `prune` is a key (metric.key_bound)."""
    n_nodes = start.shape[0]
    first_leaf = (n_nodes - 1) // 2
    stack = np.empty(STACK_DEPTH, dtype=np.int64)
    top = 1
    stack[0] = 0
    count = 0
    while top > 0:
        top -= 1
        node = stack[top]
        if stop[node] == start[node] or stop[node] <= from_row:
            continue
        if box_box_key(box_lo, box_hi, a, node, tag) > prune:
            continue
        if node >= first_leaf:
            if count < out.shape[0]:
                out[count] = node
            count += 1
        else:
            stack[top] = 2 * node + 2
            stack[top + 1] = 2 * node + 1
            top += 2
    return count
