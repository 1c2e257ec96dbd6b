"""The compiled KD-tree shared by the cover and the kernel's edge join."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from chitally import kdtree


@pytest.mark.parametrize("n, m, leaf", [(1, 2, 16), (37, 3, 4), (500, 5, 16), (300, 1, 7)])
def test_serial_and_parallel_builds_agree_and_boxes_hold_their_rows(n: int, m: int, leaf: int) -> None:
    x = np.random.default_rng(n).standard_normal((n, m))
    x[: n // 3] = x[0]  # duplicates must still split evenly
    serial = kdtree.build_tree(x, leaf)
    parallel = kdtree.build_tree_parallel(x, leaf)
    for a, b in zip(serial, parallel):
        assert np.array_equal(a, b)
    xs, perm, start, stop, box_lo, box_hi = serial
    assert sorted(perm.tolist()) == list(range(n))
    assert np.array_equal(xs, x[perm])
    first_leaf = (start.shape[0] - 1) // 2
    assert max(stop[first_leaf:] - start[first_leaf:]) <= leaf
    for node in range(start.shape[0]):
        rows = xs[start[node] : stop[node]]
        if rows.shape[0]:
            assert np.array_equal(box_lo[node], rows.min(axis=0))
            assert np.array_equal(box_hi[node], rows.max(axis=0))


def test_near_leaves_find_every_leaf_holding_a_neighbour() -> None:
    # reference: scipy's cKDTree radius query (an independent KD-tree)
    x = np.random.default_rng(1).random((400, 3))
    radius = 0.15
    xs, perm, start, stop, box_lo, box_hi = kdtree.build_tree(x, 8)
    first_leaf = (start.shape[0] - 1) // 2
    leaf_of_row = np.empty(x.shape[0], dtype=np.int64)
    for leaf in range(first_leaf, start.shape[0]):
        leaf_of_row[start[leaf] : stop[leaf]] = leaf
    ref = cKDTree(xs)
    for leaf in range(first_leaf, start.shape[0], 5):
        out = np.empty(start.shape[0], dtype=np.int64)
        count = kdtree.near_leaves(start, stop, box_lo, box_hi, leaf, radius * radius * (1 + 1e-9), out, 0)
        found = set(out[:count].tolist())
        needed = {int(leaf_of_row[j]) for i in range(start[leaf], stop[leaf]) for j in ref.query_ball_point(xs[i], radius)}
        assert needed <= found
        later = kdtree.near_leaves(start, stop, box_lo, box_hi, leaf, radius * radius * (1 + 1e-9), out, start[leaf])
        assert set(out[:later].tolist()) == {b for b in found if stop[b] > start[leaf]}
