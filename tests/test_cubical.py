"""Exact curves of cubical filtrations (chitally.cubical), checked against sources outside
the project: scikit-image's Euler number (Ohser, Nagel, Schladitz 2002), gudhi's cubical
complexes, and closed forms of elementary topology. Each check names its source."""

from __future__ import annotations

import numpy as np
import pytest
from cubical_references import gudhi_chi
from hypothesis import given, settings
from hypothesis import strategies as st

from chitally import Curve, InputError, field_curve, merge_jumps
from chitally.cubical import block_jumps

skimage_measure = pytest.importorskip("skimage.measure")

# scikit-image's connectivity matching each construction: vertices = low connectivity
# (4 in 2-D, 6 in 3-D: connectivity 1), cells = high (8 / 26: connectivity ndim).
CONNECTIVITY = {"vertices": lambda nd: 1, "cells": lambda nd: nd}


def binary_curve_at_object(image: np.ndarray, construction: str) -> int:
    # the object (True) enters at scale 0, the background at 1
    f = np.where(image, 0, 1).astype(np.int8)
    return int(field_curve(f, construction).at(0.0)) if image.any() else 0


@pytest.mark.parametrize("construction", ["vertices", "cells"])
@pytest.mark.parametrize("shape", [(7, 9), (5, 6, 4)])
def test_binary_images_match_scikit_image_euler_number(construction, shape):
    rng = np.random.default_rng(11 + len(shape))
    for _ in range(150):
        image = rng.random(shape) < rng.uniform(0.2, 0.8)
        # source: skimage.measure.euler_number (Ohser, Nagel, Schladitz 2002)
        expected = skimage_measure.euler_number(image, connectivity=CONNECTIVITY[construction](len(shape)))
        assert binary_curve_at_object(image, construction) == expected


def _ties(rng, shape, levels=5):
    return rng.integers(0, levels, size=shape).astype(np.float64) * 0.5 - 1.0


@pytest.mark.parametrize("construction", ["vertices", "cells"])
@pytest.mark.parametrize("shape", [(9,), (8, 11), (5, 6, 7), (3, 4, 3, 4)])
def test_random_arrays_with_ties_match_gudhi(construction, shape):
    rng = np.random.default_rng(sum(shape))
    for trial in range(6):
        a = _ties(rng, shape) if trial % 2 else rng.normal(size=shape)
        c = field_curve(a, construction)
        scales = np.unique(a)
        # source: gudhi CubicalComplex persistence, chi = sum_d (-1)^d #alive intervals
        np.testing.assert_array_equal(c.at(scales), gudhi_chi(a, construction, scales))
        assert c.domain == (float(a.min()), float(a.max()))


@pytest.mark.parametrize("construction", ["vertices", "cells"])
def test_masked_entries_match_gudhi_with_missing_at_infinity(construction):
    rng = np.random.default_rng(5)
    for _ in range(6):
        a = _ties(rng, (7, 8))
        mask = rng.random(a.shape) < 0.75
        c = field_curve(a, construction, mask=mask)
        scales = np.unique(a[mask])
        # source: gudhi CubicalComplex with missing entries at +inf (never in a finite
        # sublevel set; in the cell construction a face takes the min of its top cells)
        ref = gudhi_chi(np.where(mask, a, np.inf), construction, scales)
        np.testing.assert_array_equal(c.at(scales), ref)
        with_nan = np.where(mask, a, np.nan)
        assert field_curve(with_nan, construction, mask_nan=True) == c


def test_nan_refused_naming_its_position():
    a = np.zeros((3, 4))
    a[1, 2] = np.nan
    with pytest.raises(InputError, match=r"NaN at position \(1, 2\)"):
        field_curve(a)
    a[1, 2] = np.inf
    with pytest.raises(InputError, match=r"infinite value at position \(1, 2\)"):
        field_curve(a)


def test_bad_inputs_one_line():
    with pytest.raises(InputError, match="construction"):
        field_curve(np.zeros(3), "faces")
    with pytest.raises(InputError, match="dtype"):
        field_curve(np.array(["a"]))
    with pytest.raises(InputError, match="mask has shape"):
        field_curve(np.zeros((2, 2)), mask=np.ones((2, 3), bool))
    with pytest.raises(InputError, match="dimensions"):
        field_curve(np.float64(1.0))


def _ball(shape, centre, radius):
    idx = np.indices(shape).astype(np.float64)
    d2 = sum((i - c) ** 2 for i, c in zip(idx, centre))
    return d2 <= radius**2


@pytest.mark.parametrize("construction", ["vertices", "cells"])
def test_closed_forms(construction):
    # closed forms (elementary topology): a solid cube is contractible (chi 1); a cube
    # with a cavity is a thickened sphere (chi 2); a solid torus retracts to a circle
    # (chi 0); k disjoint blobs have chi k.
    solid = np.zeros((8, 8, 8), bool)
    solid[1:7, 1:7, 1:7] = True
    assert binary_curve_at_object(solid, construction) == 1
    cavity = solid.copy()
    cavity[3:5, 3:5, 3:5] = False
    assert binary_curve_at_object(cavity, construction) == 2
    torus = np.zeros((9, 9, 5), bool)
    torus[1:8, 1:8, 1:4] = True
    torus[3:6, 3:6, :] = False
    assert binary_curve_at_object(torus, construction) == 0
    blobs = np.zeros((20, 20, 20), bool)
    for k, centre in enumerate([(4, 4, 4), (4, 14, 5), (14, 5, 14), (15, 15, 15)]):
        blobs |= _ball(blobs.shape, centre, 2.5)
        assert binary_curve_at_object(blobs, construction) == k + 1


def test_superlevel_is_sublevel_of_negation_for_every_dtype():
    rng = np.random.default_rng(3)
    u = rng.integers(0, 256, size=(9, 10)).astype(np.uint8)
    for construction in ("vertices", "cells"):
        up = field_curve(u, construction, superlevel=True)
        # source: the definition (superlevel of f = sublevel of -f), on an int64 copy
        assert up == field_curve(-(u.astype(np.int64)), construction)
        assert up.domain == (-float(u.max()), -float(u.min()))
    big = np.array([[-(2**62), 2**62], [2**62 + 1, 5]], dtype=np.int64)
    c = field_curve(big, "vertices")
    # 2**62 and 2**62 + 1 are one float64: the curve's scale is float64
    assert c.final == 1 and c.at(5.0) == 2


def test_one_dimensional_closed_form():
    # closed form: a 1-D sublevel set is a union of intervals; chi = number of runs
    a = np.array([0, 3, 0, 0, 2, 0, 3, 0], dtype=np.int16)
    c = field_curve(a, "vertices")
    assert c.at(0.0) == 4 and c.at(2.0) == 3 and c.at(3.0) == 1
    # in 1-D both constructions join only neighbours: the same counts
    assert field_curve(a, "cells").at(0.0) == 4 and field_curve(a, "cells").at(2.0) == 3


def _blocks(shape, cuts):
    edges = [np.unique(np.concatenate(([0], np.asarray(c, int) % s, [s]))) for c, s in zip(cuts, shape)]
    grids = np.meshgrid(*[np.arange(e.size - 1) for e in edges], indexing="ij")
    for idx in zip(*(g.ravel() for g in grids)):
        yield tuple(slice(int(e[i]), int(e[i + 1])) for e, i in zip(edges, idx))


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), nd=st.integers(1, 4), construction=st.sampled_from(["vertices", "cells"]),
       superlevel=st.booleans(), masked=st.booleans(), data=st.data())
def test_blocks_add_to_the_whole(seed, nd, construction, superlevel, masked, data):
    rng = np.random.default_rng(seed)
    shape = tuple(int(x) for x in rng.integers(1, 7 if nd < 4 else 4, size=nd))
    a = rng.integers(0, 4, size=shape).astype(np.float32)
    mask = rng.random(shape) < 0.8 if masked else None
    cuts = [data.draw(st.lists(st.integers(0, 6), max_size=3)) for _ in range(nd)]
    vals, jumps = [], []
    for block in _blocks(shape, cuts):
        v, j = block_jumps(a, construction, block, superlevel=superlevel, mask=mask)
        vals.append(v)
        jumps.append(j)
    whole = field_curve(a, construction, superlevel=superlevel, mask=mask)
    v, j = merge_jumps(vals, jumps)
    if whole.n_points == 0:
        assert v.size == 0
    else:
        assert Curve.from_jumps(v, j, eps=whole.eps, max_dim=None, n_points=whole.n_points,
                                start=whole.start) == whole
