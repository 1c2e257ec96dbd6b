"""Tests for chitally.euler_curve (the in-process path: validation, relabelling in
KD-tree leaf order, threaded kernel, Curve): exact agreement with gudhi and networkx,
closed forms, the topology of sampled manifolds, invariances, and bad input.

Every comparison is exact: curves are compared with ``==`` (bitwise scales, exact
integers) or evaluated with ``Curve.at`` to exact integers.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from references import (
    brute_force_curve,
    count_edges,
    diameter,
    gudhi_curve,
    pairwise_lengths,
    skeleton_chi,
)

import chitally
from chitally import Curve, InputError, euler_curve
from chitally.kernel import KernelStats, count_jumps

SQRT2 = math.sqrt(2.0)
SQRT3 = math.sqrt(3.0)

PROPERTY = settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def constant(value: int, eps: float, max_dim: int | None, n_points: int) -> Curve:
    return Curve(np.array([0.0]), np.array([value]), eps, max_dim, n_points)


# ------------------------------------------------------------------------ by hand


def test_unit_square_by_hand() -> None:
    """The docstring's square, counted by hand: 4 vertices; at 1.0 the 4-cycle (chi 0); at
    sqrt(2) the diagonals close the full 3-simplex (contractible, chi 1)."""
    square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    curve = euler_curve(square, eps=1.5)
    assert curve == Curve(np.array([0.0, 1.0, SQRT2]), np.array([4, 0, 1]), 1.5, None, 4)
    assert (curve.at(0.0), curve.at(1.0), curve.at(1.5)) == (4, 0, 1)


# ---------------------------------------------------------- independent references


@pytest.mark.parametrize(
    ("m", "n", "eps"),
    [(2, 2000, 0.04), (3, 2000, 0.1), (5, 2000, 0.3), (8, 1000, 0.6)],
)
def test_matches_gudhi_up_to_2000_points(m: int, n: int, eps: float) -> None:
    """euler_curve == gudhi RipsComplex/SimplexTree (independent Rips implementation) on
    random clouds of up to 2,000 points, caps 0 to 4 (at most ~400k simplices each)."""
    points = np.random.default_rng(2024 + m).random((n, m))
    for max_dim in (0, 1, 2, 3, 4):
        ours = euler_curve(points, eps, max_dim)
        assert ours == gudhi_curve(points, eps, max_dim), max_dim
        assert ours.n_points == n and ours.chi[0] == n
    assert len(ours.values) > 1000


def test_matches_gudhi_clustered_cloud_uncapped() -> None:
    """2,000 points in blobs of very different densities (R^3), uncapped (the collapse
    kernel) and cap 4, against gudhi RipsComplex/SimplexTree with a full expansion
    (independent Rips implementation)."""
    rng = np.random.default_rng(17)
    centres = rng.random((8, 3)) * 4
    # spreads chosen so that the densest blob keeps cliques small enough for a full
    # expansion in gudhi (a blob much denser than eps would have a clique of ~200 points)
    spreads = np.array([0.13, 0.16, 0.2, 0.25, 0.3, 0.4, 0.5, 0.6])
    points = np.concatenate([rng.normal(c, s, (250, 3)) for c, s in zip(centres, spreads)])
    for eps in (0.1, 0.12):
        for max_dim in (4, None):
            assert euler_curve(points, eps, max_dim) == gudhi_curve(points, eps, max_dim)


@pytest.mark.parametrize("max_dim", [0, 1, 2, 3, None])
@pytest.mark.parametrize("m", [2, 3, 5])
def test_matches_networkx_brute_force(m: int, max_dim: int | None) -> None:
    """euler_curve (through its relabelling) == networkx enumerate_all_cliques (brute
    force) on 60 random points at three eps."""
    points = np.random.default_rng(60 + m).random((60, m))
    for eps in (0.08 * m**0.5, 0.12 * m**0.5, 0.16 * m**0.5):
        assert euler_curve(points, eps, max_dim) == brute_force_curve(points, eps, max_dim)


# -------------------------------------------------------------------- closed forms


@pytest.mark.parametrize("max_dim", [0, 1, 2, 3, 4, 5, 6, None])
def test_eps_at_and_beyond_the_diameter(max_dim: int | None) -> None:
    """eps >= diameter: the complex is the D-skeleton of the full (N-1)-simplex, so the
    final value is 1 + (-1)^D C(N-1, D+1) (binomial identity, references.skeleton_chi),
    and 1 with no cap (a full simplex is contractible). eps exactly the diameter must
    include the longest edge.

    One double below the diameter the (unique) longest edge is out, and with it the
    C(N-2, k-1) k-simplices that contain both its endpoints (counted by hand); uncapped,
    what is left is two full simplices glued along a full simplex: contractible, chi 1.
    """
    n = 40
    points = np.random.default_rng(40).standard_normal((n, 3))
    diam = diameter(points)
    for eps in (diam, 2.0 * diam):
        curve = euler_curve(points, eps, max_dim)
        assert curve.final == skeleton_chi(n, max_dim)
        assert curve.at(diam) == curve.final
    lengths = np.sort(pairwise_lengths(points), axis=None)
    assert lengths[-2] == diam > lengths[-3]  # the longest edge is unique (seen twice: i-j, j-i)
    below = float(np.nextafter(diam, 0.0))
    if max_dim is None:
        expected = 1
    else:
        expected = skeleton_chi(n, max_dim) - sum((-1) ** k * math.comb(n - 2, k - 1) for k in range(1, max_dim + 1))
    assert euler_curve(points, below, max_dim).final == expected


def test_single_point() -> None:
    """One vertex: the curve is the constant 1, whatever the cap."""
    for max_dim in (None, 0, 1, 5):
        assert euler_curve(np.array([[1.5, -2.0, 3.0]]), 0.7, max_dim) == constant(1, 0.7, max_dim, 1)


def test_cap_zero_is_the_point_count() -> None:
    """Cap 0 counts vertices only: the constant N."""
    points = np.random.default_rng(1).random((1234, 2))
    assert euler_curve(points, 0.5, 0) == constant(1234, 0.5, 0, 1234)


@pytest.mark.parametrize("copies", [4, 70, 130])
def test_coincident_points(copies: int) -> None:
    """k copies of one point: the full (k-1)-simplex at scale 0, so the curve is constant
    from 0 on: 1 uncapped, 1 + (-1)^D C(k-1, D+1) capped (references.skeleton_chi). 70 and
    130 copies take two and three 64-bit words per neighbourhood."""
    points = np.tile(np.array([[3.0, 1.0]]), (copies, 1))
    for max_dim in (None, 0, 1, 2, 3):
        assert euler_curve(points, 1.0, max_dim) == constant(skeleton_chi(copies, max_dim), 1.0, max_dim, copies)


def test_two_far_apart_clumps_of_coincident_points() -> None:
    """Two clumps of 70 coincident points, 10 apart: two contractible components (chi 2)
    until eps reaches 10, where everything joins into one simplex (chi 1)."""
    points = np.concatenate([np.zeros((70, 2)), np.tile([[6.0, 8.0]], (70, 1))])
    assert euler_curve(points, 9.0) == constant(2, 9.0, None, 140)
    assert euler_curve(points, 10.0) == Curve(np.array([0.0, 10.0]), np.array([2, 1]), 10.0, None, 140)


def test_cubic_lattice_ties() -> None:
    """5x5x5 integer grid, shuffled: exact ties at 1, sqrt(2), sqrt(3). The curve changes at
    exactly those doubles. At 1: V - E = 125 - 300 = -175 (the unit-distance graph of Z^3 is
    bipartite, so no triangles); at sqrt(3): 1 (contractible, by the nerve theorem; see
    test_kernel.test_cubic_lattice_all_three_tied_scales); the whole curve also equals
    networkx enumerate_all_cliques (brute force)."""
    points = np.array(list(itertools.product(range(5), repeat=3)), dtype=np.float64)
    points = points[np.random.default_rng(0).permutation(125)]
    curve = euler_curve(points, SQRT3)
    assert curve.values.tolist() == [0.0, 1.0, SQRT2, SQRT3]
    assert curve.chi[0] == 125 and curve.chi[1] == -175 and curve.final == 1
    assert curve == brute_force_curve(points, SQRT3, None)
    assert euler_curve(points, 1.0) == Curve(np.array([0.0, 1.0]), np.array([125, -175]), 1.0, None, 125)
    below = float(np.nextafter(1.0, 0.0))
    assert euler_curve(points, below) == constant(125, below, None, 125)


def test_ball_of_300_points_closed_form_and_gudhi() -> None:
    """300 points in a small ball (neighbourhoods far above 128): at eps = diameter the
    closed form (1 uncapped, 1 + (-1)^D C(299, D+1) capped); at a smaller eps (maximum
    degree above 128) gudhi RipsComplex/SimplexTree, cap 2 (independent Rips)."""
    rng = np.random.default_rng(3)
    points = rng.standard_normal((300, 4)) * 0.01
    diam = diameter(points)
    for max_dim in (None, 1, 2, 3):
        assert euler_curve(points, diam, max_dim).final == skeleton_chi(300, max_dim)
    eps = 0.3 * diam  # maximum degree 196, 89 vertices above 128; ~376k simplices
    degrees = (pairwise_lengths(points) <= eps).sum(axis=1) - 1
    assert degrees.max() > 128
    for max_dim in (1, 2):
        assert euler_curve(points, eps, max_dim) == gudhi_curve(points, eps, max_dim)


# ---------------------------------------------------------------------- topology


def in_plateau(curve: Curve, start: float, value: int) -> None:
    """The curve equals value at several scales from start to eps, and does not change
    anywhere in between."""
    scales = np.linspace(start, curve.eps, 7)
    assert curve.sample(scales).tolist() == [value] * 7
    assert not np.any(curve.values > start)


def test_circle() -> None:
    """200 random points on the unit circle (fixed seed), uncapped. Once eps exceeds the
    largest gap between neighbouring points, and while it stays well below the chord of a
    third of the circle (sqrt(3)), the Rips complex of a dense circle sample is homotopy
    equivalent to S^1 (from memory: the known homotopy types of Rips complexes of circle
    samples), so chi = 1 - 1 = 0 (Euler-Poincare with Betti numbers (1, 1))."""
    rng = np.random.default_rng(20240601)
    theta = rng.uniform(0.0, 2.0 * np.pi, 200)
    points = np.c_[np.cos(theta), np.sin(theta)]
    ordered = np.sort(theta)
    largest_gap = np.max(np.diff(np.concatenate([ordered, [ordered[0] + 2.0 * np.pi]])))
    assert 2.0 * np.sin(largest_gap / 2.0) < 0.17  # chord of the largest gap
    curve = euler_curve(points, 1.0)
    assert curve.chi[0] == 200
    in_plateau(curve, 0.2, 0)


def test_two_sphere() -> None:
    """3,000 uniform points on the unit sphere S^2 (fixed seed), uncapped: on a plateau of
    scales the Rips complex has the homotopy type of S^2 (from memory: Hausmann's theorem
    for the manifold at small scales and Latschev's for dense samples of it), chi = 1 - 0 + 1 = 2 (Euler-Poincare
    with Betti numbers (1, 0, 1)). For this seed the plateau was observed to start near 0.24,
    so the checks start at 0.3."""
    rng = np.random.default_rng(20240602)
    x = rng.standard_normal((3000, 3))
    points = x / np.linalg.norm(x, axis=1)[:, None]
    curve, stats = euler_curve(points, 0.45, return_stats=True)
    in_plateau(curve, 0.3, 2)
    assert stats.splits > 0  # the collapse kernel had to split somewhere


def torus(rng: np.random.Generator, n: int, big: float, small: float) -> np.ndarray:
    """n points uniform (by area, rejection sampling) on the torus of radii big, small in R^3."""
    out: list[np.ndarray] = []
    while sum(len(o) for o in out) < n:
        u = rng.uniform(0.0, 2.0 * np.pi, 2 * n)
        v = rng.uniform(0.0, 2.0 * np.pi, 2 * n)
        keep = rng.uniform(0.0, big + small, 2 * n) < big + small * np.cos(v)
        u, v = u[keep], v[keep]
        ring = big + small * np.cos(v)
        out.append(np.c_[ring * np.cos(u), ring * np.sin(u), small * np.sin(v)])
    return np.concatenate(out)[:n]


def test_torus() -> None:
    """3,000 points on a torus (radii 1 and 0.4, fixed seed), uncapped: on a plateau of
    scales the Rips complex has the homotopy type of T^2 (from memory, as for S^2), chi = 1 - 2 + 1 = 0 (Euler-Poincare
    with Betti numbers (1, 2, 1)). For this seed the plateau was observed to start near
    0.28, so the checks start at 0.33."""
    points = torus(np.random.default_rng(7), 3000, 1.0, 0.4)
    curve = euler_curve(points, 0.5)
    assert curve.chi[0] == 3000
    in_plateau(curve, 0.33, 0)


# ------------------------------------------------------------------- invariances


@st.composite
def clouds(draw: st.DrawFn, max_points: int = 30) -> tuple[np.ndarray, float, int | None]:
    """A small cloud (integer lattice with ties and duplicates, or floats in [-1, 1]),
    an eps and a cap."""
    n = draw(st.integers(1, max_points))
    m = draw(st.integers(1, 4))
    if draw(st.booleans()):
        points = draw(hnp.arrays(np.float64, (n, m), elements=st.integers(-2, 2).map(float)))
        eps = draw(st.sampled_from([0.5, 1.0, SQRT2, SQRT3, 2.0]))
    else:
        points = draw(hnp.arrays(np.float64, (n, m), elements=st.floats(-1.0, 1.0, width=64)))
        eps = draw(st.floats(1e-3, 2.0))
    max_dim = draw(st.sampled_from([None, 0, 1, 2, 3, 4]))
    return points, eps, max_dim


@PROPERTY
@given(case=clouds(), data=st.data())
def test_permuting_the_points_keeps_the_curve(case: tuple[np.ndarray, float, int | None], data: st.DataObject) -> None:
    """The curve does not depend on the order of the rows."""
    points, eps, max_dim = case
    perm = np.array(data.draw(st.permutations(range(len(points)))), dtype=np.int64)
    assert euler_curve(points, eps, max_dim) == euler_curve(points[perm], eps, max_dim)


@PROPERTY
@given(case=clouds())
def test_threads_keep_the_curve(case: tuple[np.ndarray, float, int | None]) -> None:
    """threads=1 and threads=2 give the identical curve; so does the kernel on the rows in
    input order (no relabelling)."""
    points, eps, max_dim = case
    one = euler_curve(points, eps, max_dim, threads=1)
    assert one == euler_curve(points, eps, max_dim, threads=2)
    table = count_jumps(points, eps, max_dim)
    assert one == Curve.from_jumps(table.values, table.jumps, eps=eps, max_dim=max_dim, n_points=len(points))


def test_threads_keep_the_curve_on_a_larger_cloud() -> None:
    """threads=1 vs 2 on 5,000 points in R^3, capped and uncapped."""
    points = np.random.default_rng(99).random((5000, 3))
    for max_dim in (2, 4, None):
        assert euler_curve(points, 0.07, max_dim, threads=1) == euler_curve(points, 0.07, max_dim, threads=2)


def test_integer_input_and_input_left_untouched() -> None:
    """An integer array gives the curve of its float64 copy, and euler_curve does not
    modify its input."""
    ints = np.random.default_rng(4).integers(-5, 6, size=(80, 3))
    before = ints.copy()
    assert euler_curve(ints, 2.0) == euler_curve(ints.astype(np.float64), 2.0)
    assert np.array_equal(ints, before)


def test_return_stats() -> None:
    """return_stats gives the kernel's counters: vertices and edges match the cloud."""
    points = np.random.default_rng(6).random((700, 3))
    curve, stats = euler_curve(points, 0.12, 3, return_stats=True)
    assert isinstance(stats, KernelStats)
    assert curve == euler_curve(points, 0.12, 3)
    assert stats.vertices == 700 and stats.edges == count_edges(points, 0.12)
    assert stats.seconds_graph >= 0.0 and stats.seconds_count >= 0.0


# ------------------------------------------------------------------------ bad input

GOOD = np.zeros((3, 2))


@pytest.mark.parametrize(
    ("points", "eps", "max_dim", "names"),
    [
        (np.array([[0.0, np.nan], [1.0, 2.0]]), 1.0, None, "row 0, column 1"),
        (np.array([[0.0, 1.0], [np.inf, 2.0]]), 1.0, None, "row 1, column 0"),
        (np.array([[0.0, 1.0], [-np.inf, 2.0]]), 1.0, None, "finite"),
        (np.zeros(5), 1.0, None, "2-D"),
        (np.zeros((2, 2, 2)), 1.0, None, "2-D"),
        (np.zeros((0, 3)), 1.0, None, "at least one point"),
        (np.zeros((3, 0)), 1.0, None, "at least one"),
        ([], 1.0, None, "shape"),
        ([[1.0, 2.0], [3.0]], 1.0, None, "points"),
        (np.array([["a", "b"]]), 1.0, None, "dtype"),
        (GOOD, 0.0, None, "eps"),
        (GOOD, -0.0, None, "eps"),
        (GOOD, -1.0, None, "eps"),
        (GOOD, math.nan, None, "eps"),
        (GOOD, math.inf, None, "eps"),
        (GOOD, "1.0", None, "eps"),
        (GOOD, 1.0, -1, "max_dim"),
        (GOOD, 1.0, 2.5, "max_dim"),
        (GOOD, 1.0, math.nan, "max_dim"),
        (GOOD, 1.0, "3", "max_dim"),
        (GOOD, 1.0, True, "max_dim"),
    ],
)
def test_bad_input_is_refused_with_one_line(points: object, eps: object, max_dim: object, names: str) -> None:
    """Bad points, eps or max_dim raise chitally.InputError with a one-line message that
    names what is wrong."""
    with pytest.raises(InputError) as info:
        euler_curve(points, eps, max_dim)  # type: ignore[arg-type]
    message = str(info.value)
    assert message and "\n" not in message and "\r" not in message
    assert names in message
    assert issubclass(chitally.InputError, ValueError)


# ------------------------------------------------------------------ overflow


def test_huge_coordinates_follow_the_rule_or_are_refused() -> None:
    """Points 1e200 apart: by the rule d2 overflows to inf, so those pairs are not edges,
    while the pair at distance 1 is; the curve is 3 at 0 and 2 from 1.0 on, which gudhi
    RipsComplex/SimplexTree (independent Rips implementation) also gives. Refusing such
    input with a one-line InputError would be acceptable too; a raw scipy error is not."""
    points = np.array([[0.0, 0.0], [1e200, 0.0], [1e200, 1.0]])
    expected = Curve(np.array([0.0, 1.0]), np.array([3, 2]), 1.0, None, 3)
    with np.errstate(over="ignore"):
        assert gudhi_curve(points, 1.0, None) == expected
    # chitally refuses coordinates beyond 1e150 rather than follow inf arithmetic
    with pytest.raises(InputError, match="row 1, column 0") as info:
        euler_curve(points, 1.0)
    assert "\n" not in str(info.value)


# ------------------------------------------------------------------ Ctrl-C

# 512 copies of one cluster of 150 points, far enough apart to share no edge; the
# coordinates sit on a grid of 2^-20 and the offsets are integers, so every copy has the
# very same squared lengths and the same counting work. The call is interrupted by a
# SIGINT sent to the process 1.5 s after it starts.
INTERRUPT_SCRIPT = r"""
import json, os, signal, sys, threading, time
import numpy as np
from chitally import euler_curve

threads = int(sys.argv[1])
rng = np.random.default_rng(7)
cluster = np.round(rng.random((150, 3)) * 2.0**20) / 2.0**20
euler_curve(cluster, 0.8, 5, threads=1)  # compile (or load) outside the timing
one = []
for _ in range(3):
    t = time.perf_counter()
    euler_curve(cluster, 0.8, 5, threads=1)
    one.append(time.perf_counter() - t)
side = 8
offsets = 4.0 * np.stack(np.meshgrid(*[np.arange(side)] * 3), -1).reshape(-1, 3)
cloud = (offsets[:, None, :] + cluster[None]).reshape(-1, 3)
sent = []

def interrupt():
    sent.append(time.perf_counter())
    os.kill(os.getpid(), signal.SIGINT)

timer = threading.Timer(1.5, interrupt)
timer.start()
try:
    euler_curve(cloud, 0.8, 5, threads=threads)
    outcome = "finished"
except KeyboardInterrupt:
    outcome = "interrupted"
end = time.perf_counter()
timer.join()
print(json.dumps({"outcome": outcome, "reaction": end - sent[0] if sent else None,
                  "cluster_seconds": min(one), "clusters": len(offsets),
                  "threads_left": threading.active_count()}))
"""


@pytest.mark.parametrize("threads", [1, 2])
def test_ctrl_c_stops_a_long_call_within_a_second(threads: int) -> None:
    """SIGINT during a long euler_curve raises KeyboardInterrupt within about a second of
    the signal (bounded at 2 s for a loaded machine) and leaves no thread running. The
    call would take far longer: its 512 disjoint copies of a cluster cost 512 times one
    cluster's time, measured in the same process (Euler characteristic and the count are
    additive over components that share no edge)."""
    import json
    import os
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", INTERRUPT_SCRIPT, str(threads)], capture_output=True,
                          text=True, timeout=600, env=dict(os.environ), check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    result = json.loads(done.stdout.strip().splitlines()[-1])
    expected = result["clusters"] * result["cluster_seconds"] / threads
    assert expected > 10.0, result  # the uninterrupted call would take much longer
    assert result["outcome"] == "interrupted", result
    assert result["reaction"] < 2.0, result
    assert result["threads_left"] == 1, result


# ------------------------------------------------------------------ threads


def test_default_threads_by_the_size_of_the_counting() -> None:
    """One thread below the threshold (higher at cap 2), every usable core from it on."""
    import os

    from chitally.kernel import (
        AUTO_THREADS_WORK,
        AUTO_THREADS_WORK_CAP2,
        default_threads,
    )

    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    for max_dim in (None, 3, 5):
        assert default_threads(0.0, max_dim) == 1
        assert default_threads(AUTO_THREADS_WORK - 1.0, max_dim) == 1
        assert default_threads(float(AUTO_THREADS_WORK), max_dim) == cores
    assert default_threads(AUTO_THREADS_WORK_CAP2 - 1.0, 2) == 1
    assert default_threads(float(AUTO_THREADS_WORK_CAP2), 2) == cores


def test_leaf_order_is_a_permutation_of_spatially_grouped_rows() -> None:
    """leaf_order permutes the rows so that each run of 16 consecutive rows (one leaf of
    a median-split tree of 1024 = 64 x 16 points) spans a box of a 64th of the square's
    area on average, where 16 random rows span nearly the whole square."""
    from chitally.inprocess import leaf_order

    points = np.random.default_rng(36).random((1024, 2))
    order = leaf_order(points)
    assert order.dtype == np.int64 and np.array_equal(np.sort(order), np.arange(1024))
    leaves = points[order].reshape(64, 16, 2)
    areas = np.prod(leaves.max(axis=1) - leaves.min(axis=1), axis=1)
    assert areas.mean() < 2.0 / 64
