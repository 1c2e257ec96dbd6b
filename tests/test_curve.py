"""Tests for chitally.curve: exact jump-table merging and the Curve step function."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from chitally.curve import (
    MAX_GRID,
    Curve,
    merge_jumps,
    parse_grid,
    read_samples,
    write_samples,
)

EPS = 1.0

# Scales that stress exact float handling: the smallest subnormal, the smallest normal,
# a 17-significant-digit value (0.1 + 0.2 != 0.3), values one ulp apart, and eps itself.
AWKWARD_SCALES = [
    0.0,
    5e-324,
    2.2250738585072014e-308,
    1e-300,
    0.1 + 0.2,
    0.3,
    1 / 3,
    float(np.nextafter(0.5, 0.0)),
    0.5,
    float(np.nextafter(0.5, 1.0)),
    0.7071067811865476,
    float(np.nextafter(EPS, 0.0)),
    EPS,
]

FAST = settings(max_examples=60, deadline=None)

scales = st.one_of(
    st.sampled_from(AWKWARD_SCALES),
    st.floats(min_value=0.0, max_value=EPS, allow_nan=False, allow_subnormal=True),
)
jump_values = st.one_of(st.integers(-3, 3), st.integers(-(2**40), 2**40))
jump_tables = st.lists(st.tuples(scales, jump_values), max_size=40).map(
    lambda rows: (
        np.array([r[0] for r in rows], dtype=np.float64),
        np.array([r[1] for r in rows], dtype=np.int64),
    )
)


def brute_value(raw_values: np.ndarray, raw_jumps: np.ndarray, t: float) -> int:
    """The curve at t straight from its definition: the sum of every jump at scale <= t."""
    return sum(int(j) for v, j in zip(raw_values.tolist(), raw_jumps.tolist()) if v <= t)


def probe_points(*value_arrays: np.ndarray, eps: float = EPS) -> list[float]:
    """Every breakpoint, its neighbours one ulp away, midpoints, 0 and eps."""
    pts = {0.0, eps}
    for arr in value_arrays:
        for v in arr.tolist():
            for p in (v, float(np.nextafter(v, -1.0)), float(np.nextafter(v, 2.0))):
                if 0.0 <= p <= eps:
                    pts.add(p)
    ordered = sorted(pts)
    pts.update((a + b) / 2 for a, b in zip(ordered, ordered[1:]))
    return sorted(pts)


def make(raw: tuple[np.ndarray, np.ndarray], n_points: int = 0, max_dim: int | None = None) -> Curve:
    return Curve.from_jumps(raw[0], raw[1], eps=EPS, max_dim=max_dim, n_points=n_points)


def example_curve() -> Curve:
    # chi: 4 on [0, .25), 2 on [.25, .5), 3 on [.5, .75), 0 on [.75, 1]
    return Curve.from_jumps(
        [0.75, 0.0, 0.25, 0.5], [-3, 4, -2, 1], eps=1.0, max_dim=2, n_points=4
    )


# ----------------------------------------------------------------------- merge_jumps


def test_merge_sums_duplicates_and_drops_cancellations() -> None:
    values, jumps = merge_jumps(
        [np.array([0.0, 0.5, 0.5, 1.0]), np.array([0.5, 1.0, 2.0])],
        [np.array([3, -1, -1, 2]), np.array([2, -2, -1])],
    )
    assert values.dtype == np.float64 and jumps.dtype == np.int64
    assert values.tolist() == [0.0, 2.0]
    assert jumps.tolist() == [3, -1]


def test_merge_accepts_a_single_pair() -> None:
    v, j = merge_jumps(np.array([0.3, 0.1, 0.3]), np.array([1, 2, 5]))
    assert v.tolist() == [0.1, 0.3]
    assert j.tolist() == [2, 6]
    v2, j2 = merge_jumps([0.3, 0.1, 0.3], [1, 2, 5])
    assert v2.tolist() == [0.1, 0.3] and j2.tolist() == [2, 6]


def test_merge_of_a_table_already_in_order_matches_the_shuffled_one() -> None:
    # a kernel's table arrives sorted and skips the sort; ties, zeros and -0.0 must
    # still be merged exactly as for the same entries in any order
    values = np.array([-0.0, 0.0, 0.1, 0.1, 0.2, 0.3, 0.3, 0.3])
    jumps = np.array([2, 1, -1, 1, 0, -4, 2, 1])
    kept = values.copy()
    sorted_v, sorted_j = merge_jumps(values, jumps)
    order = np.random.default_rng(3).permutation(values.size)
    shuffled_v, shuffled_j = merge_jumps(values[order], jumps[order])
    assert sorted_v.tolist() == shuffled_v.tolist() == [0.0, 0.3]
    assert sorted_j.tolist() == shuffled_j.tolist() == [3, -1]
    assert sorted_v.view(np.uint64)[0] == 0  # +0.0
    assert values.view(np.uint64).tolist() == kept.view(np.uint64).tolist()  # input untouched


def test_merge_empty_and_all_cancelled() -> None:
    for v, j in (merge_jumps([], []), merge_jumps([np.array([0.5])], [np.array([0])])):
        assert v.shape == (0,) and v.dtype == np.float64
        assert j.shape == (0,) and j.dtype == np.int64
    v, j = merge_jumps([[0.25, 0.25], [0.25]], [[1, 1], [-2]])
    assert v.size == 0 and j.size == 0


def test_merge_folds_negative_zero_into_zero() -> None:
    v, j = merge_jumps([-0.0, 0.0, -0.0], [1, 1, 1])
    assert j.tolist() == [3]
    assert v.view(np.uint64).tolist() == [0]  # +0.0, not -0.0


def test_merge_keeps_neighbouring_ulps_apart() -> None:
    a = 0.5
    b = float(np.nextafter(0.5, 1.0))
    v, j = merge_jumps([b, a, b], [1, 2, 3])
    assert v.tolist() == [a, b]
    assert j.tolist() == [2, 4]


def test_merge_is_exact_beyond_float_precision() -> None:
    # 2**53 + 1 is not a double: a float accumulator would lose the +1.
    v, j = merge_jumps([[0.5], [0.5], [0.5]], [[2**53], [1], [2**60]])
    assert j.tolist() == [2**53 + 1 + 2**60]


@pytest.mark.parametrize(
    ("values", "jumps", "message"),
    [
        ([[0.1, math.nan]], [[1, 1]], "finite"),
        ([[0.1, math.inf]], [[1, 1]], "finite"),
        ([[0.1, 0.2]], [[1.0, 1.0]], "integers"),
        ([[0.1, 0.2]], [[1]], "2 scales but 1 jumps"),
        ([[0.1], [0.2]], [[1]], "2 scale arrays but 1 jump arrays"),
    ],
)
def test_merge_rejects_bad_tables(values, jumps, message) -> None:
    with pytest.raises(ValueError, match=message):
        merge_jumps([np.asarray(v) for v in values], [np.asarray(j) for j in jumps])


@FAST
@given(st.lists(jump_tables, max_size=5))
def test_merge_matches_a_dictionary_sum(tables) -> None:
    expected: dict[float, int] = {}
    for vs, js in tables:
        for v, j in zip(vs.tolist(), js.tolist()):
            expected[v] = expected.get(v, 0) + j
    expected = {v: j for v, j in expected.items() if j != 0}
    v, j = merge_jumps([t[0] for t in tables], [t[1] for t in tables])
    assert v.tolist() == sorted(expected)
    assert j.tolist() == [expected[x] for x in sorted(expected)]
    assert (np.diff(v) > 0).all() and (j != 0).all()


def test_merge_million_entries_preserves_total_and_order() -> None:
    rng = np.random.default_rng(7)
    tables_v = [np.sort(rng.integers(0, 50_000, 100_000) / 50_000.0) for _ in range(10)]
    tables_j = [rng.integers(-4, 5, 100_000) for _ in range(10)]
    v, j = merge_jumps(tables_v, tables_j)
    all_v = np.concatenate(tables_v)
    all_j = np.concatenate(tables_j)
    assert int(j.sum()) == int(all_j.sum())
    assert (np.diff(v) > 0).all() and (j != 0).all()
    # Spot-check the net jump at a few scales against a direct mask sum.
    for x in v[:: max(1, v.size // 20)].tolist():
        assert int(all_j[all_v == x].sum()) == int(j[np.searchsorted(v, x)])


# ------------------------------------------------------------------ construction


def test_from_jumps_builds_cumulative_sum() -> None:
    c = example_curve()
    assert c.values.tolist() == [0.0, 0.25, 0.5, 0.75]
    assert c.chi.tolist() == [4, 2, 3, 0]
    assert c.chi.dtype == np.int64 and c.values.dtype == np.float64
    assert (c.eps, c.max_dim, c.n_points) == (1.0, 2, 4)
    assert c.final == 0
    assert c.n_jumps == 4


def test_from_jumps_without_jump_at_zero_starts_at_zero() -> None:
    c = Curve.from_jumps([0.5, 0.2], [1, -1], eps=1.0, max_dim=None, n_points=0)
    assert c.values.tolist() == [0.0, 0.2, 0.5]
    assert c.chi.tolist() == [0, -1, 0]
    assert c.n_jumps == 2


def test_from_jumps_zero_net_jump_at_zero_keeps_the_zero_entry() -> None:
    c = Curve.from_jumps([0.0, 0.0, 0.4], [2, -2, 1], eps=1.0, max_dim=None, n_points=2)
    assert c.values.tolist() == [0.0, 0.4]
    assert c.chi.tolist() == [0, 1]


def test_from_empty_table_is_the_zero_curve() -> None:
    c = Curve.from_jumps([], [], eps=0.5, max_dim=3, n_points=0)
    assert c == Curve.zero(eps=0.5, max_dim=3)
    assert c.values.tolist() == [0.0] and c.chi.tolist() == [0]
    assert c.n_jumps == 0 and c.final == 0


def test_from_jumps_accepts_jumps_at_exactly_zero_and_eps() -> None:
    c = Curve.from_jumps([-0.0, 0.5], [3, -1], eps=0.5, max_dim=None, n_points=3)
    assert c.values.view(np.uint64)[0] == 0  # stored as +0.0
    assert c.at(0.5) == 2


@pytest.mark.parametrize("bad", [-1e-12, -5e-324, 1.0 + 2**-52, 2.0])
def test_from_jumps_rejects_scales_outside_range(bad: float) -> None:
    with pytest.raises(ValueError, match=r"outside the allowed range \[0, eps\] = \[0, 1.0\]"):
        Curve.from_jumps([0.0, bad], [1, 0], eps=1.0, max_dim=None, n_points=1)


def test_from_jumps_rejects_nan_scale() -> None:
    with pytest.raises(ValueError, match="finite"):
        Curve.from_jumps([0.0, math.nan], [1, 1], eps=1.0, max_dim=None, n_points=1)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (dict(values=[0.1, 0.2], chi=[1, 2]), r"values\[0\] must be 0.0"),
        (dict(values=[0.0, 0.2, 0.2], chi=[1, 2, 3]), "strictly increasing"),
        (dict(values=[0.0, 0.3, 0.2], chi=[1, 2, 3]), "strictly increasing"),
        (dict(values=[0.0, 0.2, 0.3], chi=[1, 2, 2]), "does not change the curve"),
        (dict(values=[0.0, 0.2], chi=[1, 1]), "does not change the curve"),
        (dict(values=[0.0, 0.2], chi=[1]), "2 entries but chi has 1"),
        (dict(values=[], chi=[]), "at least the entry at scale 0.0"),
        (dict(values=[0.0, 2.0], chi=[1, 2]), "beyond eps"),
        (dict(values=[0.0, 0.5], chi=[1.0, 2.0]), "integers"),
        (dict(values=[0.0, math.nan], chi=[1, 2]), "finite"),
        (dict(eps=-1.0), "eps must be finite and >= 0"),
        (dict(eps=math.inf), "eps must be finite and >= 0"),
        (dict(eps="1"), "eps must be a real number"),
        (dict(max_dim=-1), "max_dim"),
        (dict(max_dim=2.0), "max_dim"),
        (dict(max_dim=True), "max_dim"),
        (dict(n_points=-3), "n_points"),
        (dict(n_points=1.5), "n_points"),
    ],
)
def test_invalid_curves_are_refused(kwargs, message) -> None:
    fields = dict(values=[0.0, 0.5], chi=[3, 1], eps=1.0, max_dim=None, n_points=3)
    fields.update(kwargs)
    with pytest.raises(ValueError, match=message):
        Curve(**fields)


def test_arrays_are_read_only_and_detached_from_input() -> None:
    values = np.array([0.0, 0.5])
    chi = np.array([3, 1])
    c = Curve(values, chi, 1.0, None, 3)
    values[1] = 0.75
    chi[0] = 9
    assert c.values.tolist() == [0.0, 0.5] and c.chi.tolist() == [3, 1]
    with pytest.raises(ValueError):
        c.values[0] = 1.0
    with pytest.raises(ValueError):
        c.chi[0] = 1
    with pytest.raises(AttributeError):
        c.eps = 2.0  # type: ignore[misc]


@FAST
@given(jump_tables, st.integers(0, 10**6), st.one_of(st.none(), st.integers(0, 9)))
def test_jumps_round_trip(raw, n_points, max_dim) -> None:
    c = make(raw, n_points, max_dim)
    v, j = c.jumps()
    assert j[0] == c.chi[0]
    assert Curve.from_jumps(v, j, eps=EPS, max_dim=max_dim, n_points=n_points) == c
    assert (c.values == v).all()
    v[0] = 99.0  # the returned arrays are the caller's to change
    assert c.values[0] == 0.0


# -------------------------------------------------------------------- evaluation


def test_at_is_right_continuous_at_jumps() -> None:
    c = example_curve()
    assert c.at(0.0) == 4
    assert c.at(0.25) == 2
    assert c.at(float(np.nextafter(0.25, 0.0))) == 4
    assert c.at(0.5) == 3
    assert c.at(float(np.nextafter(0.5, 0.0))) == 2
    assert c.at(0.75) == 0
    assert c.at(1.0) == 0
    assert c.at(0.6) == 3
    assert type(c.at(0.3)) is int
    assert type(c.at(np.float64(0.3))) is int


def test_at_vectorised_keeps_shape_and_dtype() -> None:
    c = example_curve()
    out = c.at(np.array([[0.0, 0.25], [0.74, 1.0]]))
    assert out.dtype == np.int64
    assert out.tolist() == [[4, 2], [3, 0]]
    assert c.at([0, 0.5]).tolist() == [4, 3]
    assert c.at(np.array([], dtype=np.float64)).shape == (0,)


def test_sample_on_grid() -> None:
    c = example_curve()
    grid = parse_grid("0:1:9")
    s = c.sample(grid)
    assert s.dtype == np.int64
    assert s.tolist() == [4, 4, 2, 2, 3, 3, 0, 0, 0]
    with pytest.raises(ValueError, match="one-dimensional"):
        c.sample(np.zeros((2, 2)))


@pytest.mark.parametrize("t", [-1e-300, -1.0, 1.0 + 2**-52, 5.0, math.nan, math.inf, -math.inf])
def test_at_rejects_scales_outside_zero_eps(t: float) -> None:
    c = example_curve()
    with pytest.raises(ValueError, match=r"scale .* is outside the allowed range \[0, eps\] = \[0, 1.0\]") as info:
        c.at(t)
    assert repr(t) in str(info.value)
    with pytest.raises(ValueError, match=r"\(at index 2\)"):
        c.at(np.array([0.0, 0.5, t]))
    with pytest.raises(ValueError, match="outside the allowed range"):
        c.sample([0.5, t])


def test_at_accepts_negative_zero() -> None:
    assert example_curve().at(-0.0) == 4


@FAST
@given(jump_tables)
def test_at_matches_definition(raw) -> None:
    c = make(raw)
    pts = probe_points(raw[0])
    got = c.at(np.array(pts))
    assert got.tolist() == [brute_value(*raw, t) for t in pts]
    assert c.final == brute_value(*raw, EPS)


# ----------------------------------------------------------------------- algebra


@FAST
@given(jump_tables, jump_tables, jump_tables)
def test_addition_is_pointwise_commutative_and_associative(ra, rb, rc) -> None:
    a, b, c = make(ra, 1), make(rb, 2), make(rc, 4)
    ab = a + b
    assert ab == b + a
    assert (a + b) + c == a + (b + c)
    assert ((a + b) + c).n_points == 7
    pts = probe_points(ra[0], rb[0], rc[0])
    both = (np.concatenate([ra[0], rb[0]]), np.concatenate([ra[1], rb[1]]))
    assert ab.at(np.array(pts)).tolist() == [brute_value(*both, t) for t in pts]
    assert ab == make(both, 3)


def test_addition_cancels_steps() -> None:
    a = Curve.from_jumps([0.0, 0.5], [2, -1], eps=1.0, max_dim=None, n_points=2)
    b = Curve.from_jumps([0.0, 0.5, 0.7], [1, 1, -1], eps=1.0, max_dim=None, n_points=1)
    s = a + b
    assert s.values.tolist() == [0.0, 0.7]
    assert s.chi.tolist() == [3, 2]
    assert s.n_points == 3


def test_sum_builtin_and_zero_identity() -> None:
    c = example_curve()
    z = Curve.zero(eps=1.0, max_dim=2)
    assert c + z == c and z + c == c
    total = sum([c, c, c])
    assert total.chi.tolist() == [12, 6, 9, 0]
    assert total.n_points == 12


def test_addition_requires_same_eps_and_max_dim() -> None:
    c = example_curve()
    with pytest.raises(ValueError, match="different eps: 1.0 != 0.5"):
        c + Curve.zero(eps=0.5, max_dim=2)
    with pytest.raises(ValueError, match="different max_dim: 2 != None"):
        c + Curve.zero(eps=1.0, max_dim=None)
    with pytest.raises(TypeError):
        c + 1  # type: ignore[operator]


def test_equality_is_exact() -> None:
    c = example_curve()
    same = Curve(np.array([0.0, 0.25, 0.5, 0.75]), np.array([4, 2, 3, 0]), 1.0, 2, 4)
    assert c == same and hash(c) == hash(same)
    assert c != Curve(c.values, c.chi, 1.0, 2, 5)
    assert c != Curve(c.values, c.chi, 1.0, None, 4)
    assert c != Curve(c.values, c.chi, float(np.nextafter(1.0, 2.0)), 2, 4)
    shifted = c.values.copy()
    shifted[1] = np.nextafter(0.25, 1.0)
    assert c != Curve(shifted, c.chi, 1.0, 2, 4)
    assert c != Curve(c.values, np.array([4, 2, 3, 1]), 1.0, 2, 4)
    assert c != Curve(c.values[:3], c.chi[:3], 1.0, 2, 4)
    assert c != "not a curve"


def test_repr_is_short() -> None:
    text = repr(example_curve())
    assert text == "Curve(eps=1.0, max_dim=2, n_points=4, steps=4, chi(0)=4, final=0)"


# ------------------------------------------------------------------------ digest


def test_digest_is_pinned() -> None:
    # Pinned value: digests are recorded next to curves, so the canonical encoding must
    # not drift; if this changes on purpose, bump the curve format version.
    assert example_curve().digest() == EXPECTED_EXAMPLE_DIGEST


def test_digest_independent_of_memory_layout() -> None:
    c = example_curve()
    big_endian = Curve(
        np.array([0.0, 0.25, 0.5, 0.75], dtype=">f8"), np.array([4, 2, 3, 0], dtype=">i8"), 1.0, 2, 4
    )
    strided = Curve(
        np.array([0.0, 9, 0.25, 9, 0.5, 9, 0.75, 9])[::2], np.array([4, 2, 3, 0], dtype=np.int32), 1.0, 2, 4
    )
    assert big_endian == c and strided == c
    assert big_endian.digest() == c.digest() == strided.digest()
    assert len(c.digest()) == 64 and int(c.digest(), 16) >= 0


def test_digest_changes_with_any_field() -> None:
    c = example_curve()
    variants = [
        Curve(c.values, c.chi, float(np.nextafter(1.0, 2.0)), 2, 4),
        Curve(c.values, c.chi, 1.0, None, 4),
        Curve(c.values, c.chi, 1.0, 3, 4),
        Curve(c.values, c.chi, 1.0, 2, 5),
        Curve(np.array([0.0, 0.25, 0.5, float(np.nextafter(0.75, 1.0))]), c.chi, 1.0, 2, 4),
        Curve(c.values, np.array([4, 2, 3, -1]), 1.0, 2, 4),
        Curve(c.values[:3], c.chi[:3], 1.0, 2, 4),
    ]
    digests = {c.digest()} | {v.digest() for v in variants}
    assert len(digests) == len(variants) + 1


@FAST
@given(jump_tables, jump_tables)
def test_digest_agrees_with_equality(ra, rb) -> None:
    a, b = make(ra), make(rb)
    assert (a.digest() == b.digest()) == (a == b)
    assert make(ra).digest() == a.digest()


# ------------------------------------------------------------------- persistence


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("curves")


@pytest.mark.parametrize("fmt", ["npz", "json", "csv"])
def test_save_load_awkward_floats_bit_exact(fmt: str, workdir: Path) -> None:
    vals = np.array(sorted(set(AWKWARD_SCALES)), dtype=np.float64)
    chi = (np.arange(vals.size, dtype=np.int64) % 2) * (2**62) - (2**61)  # alternate, large
    c = Curve(vals, chi, EPS, 7, 123)
    path = c.save(workdir / f"awkward.{fmt}")
    back = Curve.load(path)
    assert back == c
    assert back.values.view(np.uint64).tolist() == vals.view(np.uint64).tolist()
    assert back.digest() == c.digest()


@settings(max_examples=40, deadline=None)
@given(jump_tables, st.integers(0, 2**40), st.one_of(st.none(), st.integers(0, 9)))
def test_save_load_round_trip_every_format(raw, n_points, max_dim) -> None:
    import tempfile

    c = make(raw, n_points, max_dim)
    with tempfile.TemporaryDirectory() as d:
        for fmt in ("npz", "json", "csv"):
            assert Curve.load(c.save(Path(d) / f"c.{fmt}")) == c
        assert sorted(os.listdir(d)) == ["c.csv", "c.json", "c.npz"]  # no temp files left


def test_json_layout(workdir: Path) -> None:
    c = example_curve()
    doc = json.loads((c.save(workdir / "layout.json")).read_text())
    assert doc == {
        "format": "chitally-curve",
        "version": 1,
        "eps": 1.0,
        "max_dim": 2,
        "n_points": 4,
        "values": [0.0, 0.25, 0.5, 0.75],
        "chi": [4, 2, 3, 0],
    }
    assert Curve.from_dict(json.loads(json.dumps(c.to_dict()))) == c


def test_csv_layout(workdir: Path) -> None:
    c = Curve.from_jumps([0.0, 0.1 + 0.2, 0.5], [3, -1, -3], eps=0.5, max_dim=None, n_points=3)
    text = c.save(workdir / "layout.csv").read_text()
    lines = text.splitlines()
    assert lines[0].startswith("# chitally-curve ")
    assert json.loads(lines[0][len("# chitally-curve "):]) == {
        "version": 1,
        "eps": 0.5,
        "max_dim": None,
        "n_points": 3,
    }
    assert lines[1:] == ["scale,chi", "0.0,3", "0.30000000000000004,2", "0.5,-1"]


def test_npz_layout_needs_no_pickle(workdir: Path) -> None:
    c = example_curve()
    path = c.save(workdir / "layout.npz")
    with np.load(path, allow_pickle=False) as npz:
        assert sorted(npz.files) == ["chi", "metadata", "values"]
        assert npz["values"].dtype == np.dtype("<f8") and npz["chi"].dtype == np.dtype("<i8")
        assert json.loads(str(npz["metadata"][()]))["format"] == "chitally-curve"


def test_explicit_format_and_case_insensitive_ending(workdir: Path) -> None:
    c = example_curve()
    odd = c.save(workdir / "curve.data", format="json")
    assert odd.name == "curve.data"  # np.savez-style suffixing must not happen
    assert Curve.load(odd, format="json") == c
    assert Curve.load(c.save(workdir / "upper.NPZ")) == c
    npz_named = c.save(workdir / "plain", format="npz")
    assert npz_named.name == "plain" and Curve.load(npz_named, format="npz") == c


def test_unknown_format_is_refused(workdir: Path) -> None:
    c = example_curve()
    with pytest.raises(ValueError, match="cannot tell the file format"):
        c.save(workdir / "curve.txt")
    with pytest.raises(ValueError, match="unknown format 'parquet'"):
        c.save(workdir / "curve.json", format="parquet")
    with pytest.raises(ValueError, match="cannot tell the file format"):
        Curve.load(workdir / "curve")


@pytest.mark.parametrize(
    ("name", "content", "message"),
    [
        ("foreign.json", '{"format": "something-else", "version": 1}', "not a chitally-curve document"),
        ("future.json", '{"format": "chitally-curve", "version": 2}', "unsupported chitally-curve version 2"),
        ("broken.json", "{not json", "not valid JSON"),
        ("lacking.json", '{"format": "chitally-curve", "version": 1, "eps": 1.0}', "lacks"),
        (
            "floatchi.json",
            '{"format": "chitally-curve", "version": 1, "eps": 1.0, "max_dim": null,'
            ' "n_points": 1, "values": [0.0], "chi": [1.5]}',
            "integers",
        ),
        ("nomagic.csv", "scale,chi\n0.0,1\n", "first line must start with"),
        ("noheader.csv", '# chitally-curve {"version": 1, "eps": 1.0, "max_dim": null, "n_points": 1}\n0.0,1\n', "header"),
        (
            "badrow.csv",
            '# chitally-curve {"version": 1, "eps": 1.0, "max_dim": null, "n_points": 1}\nscale,chi\n0.0,1\n0.5;2\n',
            "line 4",
        ),
        (
            "badnum.csv",
            '# chitally-curve {"version": 1, "eps": 1.0, "max_dim": null, "n_points": 1}\nscale,chi\n0.0,x\n',
            "line 3",
        ),
    ],
)
def test_malformed_files_are_refused(workdir: Path, name: str, content: str, message: str) -> None:
    path = workdir / name
    path.write_text(content)
    with pytest.raises(ValueError, match=message):
        Curve.load(path)


def test_from_dict_checks_the_tag() -> None:
    with pytest.raises(ValueError, match="not a chitally-curve document"):
        Curve.from_dict({"values": [0.0], "chi": [1]})


# ------------------------------------------------------------------------ grids


def test_parse_grid_values() -> None:
    assert parse_grid("0:1:5").tolist() == [0.0, 0.25, 0.5, 0.75, 1.0]
    assert parse_grid(" 0.5 : 0.5 : 3 ").tolist() == [0.5, 0.5, 0.5]
    assert parse_grid("0.2:0.9:1").tolist() == [0.2]
    g = parse_grid("0:0.3:7")
    assert g.dtype == np.float64 and g.shape == (7,)
    assert g[-1] == 0.3  # the endpoint is exact, so sampling at eps is allowed
    assert parse_grid("-0:1:2").view(np.uint64)[0] == 0
    # Vertex-value filtrations have negative scales: the grid accepts them and the domain
    # check happens where the grid meets a curve.
    assert parse_grid("-1:1:3").tolist() == [-1.0, 0.0, 1.0]
    assert MAX_GRID == 10**7
    assert parse_grid("0:1:0000000000000000000000003").tolist() == [0.0, 0.5, 1.0]  # leading zeros


def test_parse_grid_limit_is_refused_at_once() -> None:
    # Refused before anything is allocated: a 10**12-point grid would need 8 TB.
    with pytest.raises(ValueError) as info:
        parse_grid("0:1:1000000000000")
    assert str(info.value) == "grid '0:1:1000000000000': COUNT must be at most 10000000, got 1000000000000"


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("0:1", "START:STOP:COUNT"),
        ("0:1:2:3", "START:STOP:COUNT"),
        ("a:1:3", "must be numbers"),
        ("0:nan:3", "finite"),
        ("0:inf:3", "finite"),
        ("0:1:0", "COUNT must be >= 1"),
        ("0:1:-4", "COUNT must be >= 1"),
        ("0:1:2.5", "COUNT must be an integer"),
        ("1:0:3", "greater than STOP"),
        ("", "START:STOP:COUNT"),
        ("0:1:10000001", "COUNT must be at most 10000000, got 10000001$"),
        ("0:1:1000000000000", "COUNT must be at most 10000000, got 1000000000000$"),
        # Too long for int() to parse; refused by its length, not with a parse error.
        ("0:1:" + "9" * 5000, "COUNT must be at most 10000000, got a 5000-digit number$"),
    ],
)
def test_parse_grid_errors(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        parse_grid(text)


@pytest.mark.parametrize("fmt", ["csv", "json", "npz"])
def test_samples_round_trip(fmt: str, workdir: Path) -> None:
    c = example_curve()
    grid = np.array([0.0, 0.1 + 0.2, 5e-324, 0.75, 1.0])
    path = c.save_samples(workdir / f"samples.{fmt}", grid)
    g, s = read_samples(path)
    assert g.view(np.uint64).tolist() == grid.view(np.uint64).tolist()
    assert s.dtype == np.int64 and s.tolist() == [4, 2, 4, 0, 0]


def test_samples_csv_text(workdir: Path) -> None:
    path = write_samples(workdir / "plain.csv", [0.0, 0.5, 1 / 3], [7, -2, 0])
    assert path.read_text() == "scale,chi\n0.0,7\n0.5,-2\n0.3333333333333333,0\n"


def test_samples_shape_mismatch(workdir: Path) -> None:
    with pytest.raises(ValueError, match="3 points but there are 2 samples"):
        write_samples(workdir / "bad.csv", [0.0, 0.5, 1.0], [1, 2])
    with pytest.raises(ValueError, match="outside the allowed range"):
        example_curve().save_samples(workdir / "bad.csv", [0.0, 1.5])


# ------------------------------------------------------------------------ domains


def shifted_curve() -> Curve:
    # 0 on [-2, -1), 3 on [-1, 0.5), 1 on [0.5, 1.5), 2 on [1.5, 2]
    return Curve.from_jumps([1.5, -1.0, 0.5, -1.0], [1, 2, -2, 1], eps=2.0, max_dim=None, n_points=3, start=-2.0)


def test_domain_of_a_distance_curve_starts_at_zero() -> None:
    c = example_curve()
    assert c.start == 0.0 and c.domain == (0.0, 1.0)


def test_curve_with_negative_start() -> None:
    c = shifted_curve()
    assert c.domain == (-2.0, 2.0)
    assert c.values.tolist() == [-2.0, -1.0, 0.5, 1.5]
    assert c.chi.tolist() == [0, 3, 1, 2]
    assert c.at(-2.0) == 0 and c.at(np.nextafter(-1.0, -2.0)) == 0 and c.at(-1.0) == 3
    assert c.sample([-2.0, -1.0, 0.0, 0.5, 2.0]).tolist() == [0, 3, 3, 1, 2]
    assert c.n_jumps == 3 and c.final == 2
    values, jumps = c.jumps()
    assert Curve.from_jumps(values, jumps, eps=2.0, max_dim=None, n_points=3, start=-2.0) == c
    assert repr(c) == "Curve(start=-2.0, eps=2.0, max_dim=None, n_points=3, steps=4, chi(-2.0)=0, final=2)"


def test_domain_may_lie_wholly_below_zero() -> None:
    c = Curve.from_jumps([-5.0, -3.0], [2, -1], eps=-3.0, max_dim=1, n_points=2, start=-5.0)
    assert c.domain == (-5.0, -3.0) and c.chi.tolist() == [2, 1] and c.at(-3.0) == 1


def test_jump_at_start_is_the_first_entry() -> None:
    c = Curve.from_jumps([-1.0, 0.0], [2, -1], eps=1.0, max_dim=None, n_points=2, start=-1.0)
    assert c.values.tolist() == [-1.0, 0.0] and c.chi.tolist() == [2, 1] and c.n_jumps == 2


@pytest.mark.parametrize("t", [-2.0 - 2**-51, -3.0, 2.0 + 2**-51, math.nan, -math.inf])
def test_at_rejects_scales_outside_the_domain(t: float) -> None:
    with pytest.raises(ValueError, match=r"outside the allowed range \[start, eps\] = \[-2.0, 2.0\]"):
        shifted_curve().at(t)
    with pytest.raises(ValueError, match=r"\(at index 1\)"):
        shifted_curve().sample([0.0, t])


def test_from_jumps_rejects_scales_outside_the_domain() -> None:
    with pytest.raises(ValueError, match=r"-2.5 lies outside the allowed range \[start, eps\] = \[-2.0, 2.0\]"):
        Curve.from_jumps([-2.5], [1], eps=2.0, max_dim=None, n_points=1, start=-2.0)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (dict(values=[-1.0, 0.5], chi=[0, 1]), r"values\[0\] must be -2.0 \(the domain's start\)"),
        (dict(values=[], chi=[]), "at least the entry at scale -2.0"),
        (dict(eps=-3.0), r"eps must be finite and >= -2.0"),
        (dict(start=math.nan), "start must be finite"),
        (dict(start=-math.inf), "start must be finite"),
        (dict(start="0"), "start must be a real number"),
        (dict(start=True), "start must be a real number"),
    ],
)
def test_invalid_domains_are_refused(kwargs, message) -> None:
    fields = dict(values=[-2.0, 0.5], chi=[0, 1], eps=1.0, max_dim=None, n_points=1, start=-2.0)
    fields.update(kwargs)
    with pytest.raises(ValueError, match=message):
        Curve(**fields)


def test_zero_curve_on_a_domain() -> None:
    z = Curve.zero(eps=2.0, max_dim=None, start=-2.0)
    assert z.domain == (-2.0, 2.0) and z.values.tolist() == [-2.0] and z.chi.tolist() == [0]
    assert z + shifted_curve() == shifted_curve()


def test_adding_needs_equal_domains() -> None:
    c = shifted_curve()
    doubled = c + c
    assert doubled.domain == (-2.0, 2.0) and doubled.chi.tolist() == [0, 6, 2, 4] and doubled.n_points == 6
    other = Curve.from_jumps([-1.0], [3], eps=2.0, max_dim=None, n_points=3, start=-1.0)
    with pytest.raises(ValueError, match=r"different domains: \[-2.0, 2.0\] != \[-1.0, 2.0\]"):
        c + other
    with pytest.raises(ValueError, match="different domains"):
        Curve.from_jumps([0.0], [3], eps=2.0, max_dim=None, n_points=3) + c


def test_equality_and_digest_see_the_start() -> None:
    a = Curve.from_jumps([0.0], [1], eps=1.0, max_dim=None, n_points=1, start=-1.0)
    b = Curve.from_jumps([0.0], [1], eps=1.0, max_dim=None, n_points=1, start=-0.5)
    assert a != b and a.digest() != b.digest()
    explicit_zero = Curve(example_curve().values, example_curve().chi, 1.0, 2, 4, start=-0.0)
    assert explicit_zero == example_curve() and explicit_zero.start == 0.0


def test_digest_unchanged_for_start_zero() -> None:
    # The digest of a start-0 curve is the pinned pre-domain digest: run stores already
    # hold digests of distance curves, and they must still verify.
    assert Curve(example_curve().values, example_curve().chi, 1.0, 2, 4, start=0.0).digest() == EXPECTED_EXAMPLE_DIGEST
    # A nonzero start enters the documented header as float.hex; rebuilt here by hand.
    import hashlib

    c = shifted_curve()
    header = json.dumps(
        {"format": "chitally-curve", "version": 1, "eps": (2.0).hex(), "max_dim": None,
         "n_points": 3, "length": 4, "start": (-2.0).hex()},
        sort_keys=True, separators=(",", ":"),
    ).encode("ascii")
    h = hashlib.sha256(len(header).to_bytes(8, "little") + header)
    h.update(np.array([-2.0, -1.0, 0.5, 1.5], "<f8").tobytes() + np.array([0, 3, 1, 2], "<i8").tobytes())
    assert c.digest() == h.hexdigest()


@pytest.mark.parametrize("fmt", ["npz", "json", "csv"])
def test_save_load_carries_the_start(fmt: str, workdir: Path) -> None:
    c = shifted_curve()
    back = Curve.load(c.save(workdir / f"shifted.{fmt}"))
    assert back == c and back.domain == (-2.0, 2.0) and back.digest() == c.digest()


def test_start_is_written_only_when_not_zero(workdir: Path) -> None:
    doc = json.loads(shifted_curve().save(workdir / "start.json").read_text())
    assert doc["start"] == -2.0 and doc["values"] == [-2.0, -1.0, 0.5, 1.5]
    assert "start" not in json.loads(example_curve().save(workdir / "nostart.json").read_text())
    line = shifted_curve().save(workdir / "start.csv").read_text().splitlines()[0]
    assert json.loads(line[len("# chitally-curve "):])["start"] == -2.0


def test_files_without_start_load_at_zero(workdir: Path) -> None:
    path = workdir / "old.json"
    path.write_text(
        '{"format": "chitally-curve", "version": 1, "eps": 1.0, "max_dim": null,'
        ' "n_points": 2, "values": [0.0, 0.5], "chi": [2, 1]}'
    )
    c = Curve.load(path)
    assert c.domain == (0.0, 1.0) and c.chi.tolist() == [2, 1]


EXPECTED_EXAMPLE_DIGEST = "0d0ab2cbb83b29230211c381a62b55b7e4074e7e5bf905b97eaad770201260d5"
