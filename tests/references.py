"""Reference computations that the kernel and `euler_curve` are checked against.

Two independent routes to the exact curve of a Vietoris-Rips filtration, both simplex by
simplex (so only for inputs of moderate size), plus the distance rule they share:

* `brute_force_curve`: networkx ``enumerate_all_cliques`` on the eps-graph (brute force).
* `gudhi_curve`: gudhi ``RipsComplex`` / ``SimplexTree`` (an independent Rips
  implementation).

Each simplex contributes (-1)^dim at its value (0 for a vertex, its longest edge
otherwise); the contributions are folded into a `Curve` by ``Curve.from_jumps``.

Exactness. Our curves are compared with ``==`` (bitwise scales, exact integers), so the
references must produce the same float64 edge lengths as chitally's one rule: squared
coordinate differences summed left to right in coordinate order, then a correctly rounded
sqrt; an edge iff that length is <= eps. `pairwise_lengths` follows the rule with numpy
elementwise operations (one multiply and one add per coordinate, no reductions whose
order depends on the length, no fused multiply-add).
"""

from __future__ import annotations

import math

import gudhi
import networkx as nx
import numpy as np

from chitally import Curve

__all__ = [
    "brute_force_curve",
    "count_edges",
    "diameter",
    "gudhi_curve",
    "pair_lengths",
    "pairwise_lengths",
    "skeleton_chi",
]


def pairwise_lengths(points: np.ndarray) -> np.ndarray:
    """(n, n) matrix of edge lengths by the distance rule (sum in coordinate order, sqrt)."""
    p = np.asarray(points, dtype=np.float64)
    n, m = p.shape
    d2 = np.zeros((n, n), dtype=np.float64)
    for k in range(m):
        t = p[:, None, k] - p[None, :, k]
        d2 = d2 + t * t
    return np.sqrt(d2)


def pair_lengths(points: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Lengths of the pairs (a[i], b[i]) by the distance rule."""
    p = np.asarray(points, dtype=np.float64)
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    d2 = np.zeros(a.shape[0], dtype=np.float64)
    for k in range(p.shape[1]):
        t = p[a, k] - p[b, k]
        d2 = d2 + t * t
    return np.sqrt(d2)


def count_edges(points: np.ndarray, eps: float, block: int = 512) -> int:
    """Number of pairs i < j with length <= eps, by the rule, in row blocks (bounded memory)."""
    p = np.asarray(points, dtype=np.float64)
    n = p.shape[0]
    total = 0
    for start in range(0, n, block):
        rows = p[start : start + block]
        d2 = np.zeros((rows.shape[0], n), dtype=np.float64)
        for k in range(p.shape[1]):
            t = rows[:, None, k] - p[None, :, k]
            d2 = d2 + t * t
        hit = np.sqrt(d2) <= eps
        # keep j > i only
        i = np.arange(start, start + rows.shape[0])[:, None]
        total += int(np.count_nonzero(hit & (np.arange(n)[None, :] > i)))
    return total


def diameter(points: np.ndarray) -> float:
    """The largest edge length of the cloud, by the rule."""
    return float(pairwise_lengths(points).max())


def skeleton_chi(n: int, max_dim: int | None) -> int:
    """Euler characteristic of the max_dim-skeleton of the full (n-1)-simplex.

    Closed form: the full simplex on n vertices has C(n, k+1) faces of dimension k, so
    chi = sum_{k=0..D} (-1)^k C(n, k+1) = 1 + (-1)^D C(n-1, D+1) (the alternating partial
    sum of binomial coefficients, sum_{j<=m} (-1)^j C(n, j) = (-1)^m C(n-1, m)). With no
    cap the simplex is contractible: chi = 1. Both forms are computed and must agree.
    """
    if max_dim is None:
        return 1
    direct = sum((-1) ** k * math.comb(n, k + 1) for k in range(max_dim + 1))
    closed = 1 + (-1) ** max_dim * math.comb(n - 1, max_dim + 1)
    assert direct == closed, (n, max_dim, direct, closed)
    return closed


def _curve(values: list[float] | np.ndarray, jumps: list[int] | np.ndarray, eps: float,
           max_dim: int | None, n_points: int) -> Curve:
    return Curve.from_jumps(
        np.asarray(values, dtype=np.float64),
        np.asarray(jumps, dtype=np.int64),
        eps=float(eps),
        max_dim=max_dim,
        n_points=n_points,
    )


def brute_force_curve(points: np.ndarray, eps: float, max_dim: int | None) -> Curve:
    """The curve by listing every simplex: networkx ``enumerate_all_cliques`` (brute force).

    The eps-graph is built with `pairwise_lengths` (our rule, bit for bit) and each clique
    of k+1 vertices is a k-simplex whose value is its longest edge. ``enumerate_all_cliques``
    yields cliques by nondecreasing size, so a cap stops the enumeration at size D+1;
    without a cap every clique is listed, which is only feasible on sparse graphs.
    """
    p = np.asarray(points, dtype=np.float64)
    n = p.shape[0]
    lengths = pairwise_lengths(p)
    graph = nx.Graph()
    graph.add_nodes_from(range(n))
    ii, jj = np.nonzero(np.triu(lengths <= eps, k=1))
    graph.add_edges_from(zip(ii.tolist(), jj.tolist()))
    values: list[float] = []
    jumps: list[int] = []
    # value of each clique seen so far, keyed by its vertex tuple; a clique is yielded as
    # an earlier clique (its prefix) plus one vertex, so its value extends the prefix's.
    seen: dict[tuple[int, ...], float] = {}
    for clique in nx.enumerate_all_cliques(graph):
        size = len(clique)
        if max_dim is not None and size > max_dim + 1:
            break
        if size == 1:
            value = 0.0
        else:
            last = clique[-1]
            value = max(seen[tuple(clique[:-1])], float(lengths[clique[:-1], last].max()))
        seen[tuple(clique)] = value
        values.append(value)
        jumps.append(1 if size % 2 == 1 else -1)
    return _curve(values, jumps, eps, max_dim, n)


def gudhi_curve(points: np.ndarray, eps: float, max_dim: int | None) -> Curve:
    """The curve read out of gudhi's Rips filtration (an independent Rips implementation).

    Built with ``gudhi.RipsComplex(points=..., max_edge_length=eps)`` and
    ``create_simplex_tree(max_dimension=D)``; every simplex's filtration value is read from
    ``SimplexTree.get_simplices()``. With no cap, ``max_dimension = n - 1`` (the expansion
    stops by itself at the largest clique), so keep such inputs small or sparse.

    What we found about gudhi 3.13 (checked here, and on every call, see below):

    * Inclusion rule: an edge iff length <= max_edge_length, the same as ours (a 3-4-5
      right triangle keeps its hypotenuse at max_edge_length = 5.0 and drops it at the
      next double below 5.0; test_kernel checks this).
    * Precision: filtration values are float64 and gudhi's edge lengths are bit-identical
      to our rule (squares summed in coordinate order, then sqrt). We checked every pair
      of 400-point clouds in R^2, R^3, R^5 and R^8 with coordinates scaled over six orders
      of magnitude (4 x 79,800 pairs, no difference), and this function re-checks every
      edge of every complex it builds: each edge's filtration value must equal our length
      bit for bit, and the number of edges must equal the number of pairs with our length
      <= eps. A gudhi build whose arithmetic differed (say, compiled with fused
      multiply-add contraction) would fail that check loudly instead of making a curve
      comparison fail somewhere obscure, and no tolerance is ever applied.
    * Higher simplices get the largest filtration of their edges (the Rips filtration),
      vertices get 0.0, as in chitally.
    * Quirk: ``create_simplex_tree(max_dimension=0)`` still holds the edges of the graph
      (only the expansion above the graph is limited), so simplices of dimension > D are
      dropped here when reading the tree out.
    """
    p = np.ascontiguousarray(points, dtype=np.float64)
    n = p.shape[0]
    cap = max(n - 1, 1) if max_dim is None else max_dim
    tree = gudhi.RipsComplex(points=p, max_edge_length=float(eps)).create_simplex_tree(
        max_dimension=cap
    )
    values: list[float] = []
    jumps: list[int] = []
    edge_a: list[int] = []
    edge_b: list[int] = []
    edge_f: list[float] = []
    for simplex, filtration in tree.get_simplices():
        dim = len(simplex) - 1
        if dim == 1:
            edge_a.append(simplex[0])
            edge_b.append(simplex[1])
            edge_f.append(filtration)
        if dim > cap:
            continue
        values.append(filtration)
        jumps.append(1 if dim % 2 == 0 else -1)
    # gudhi's edges must be exactly our edges, with exactly our lengths
    ours = pair_lengths(p, np.array(edge_a, dtype=np.int64), np.array(edge_b, dtype=np.int64))
    theirs = np.array(edge_f, dtype=np.float64)
    differ = np.flatnonzero(ours.view(np.int64) != theirs.view(np.int64))
    if differ.size:
        k = int(differ[0])
        raise AssertionError(
            f"gudhi's length of edge ({edge_a[k]}, {edge_b[k]}) is {theirs[k]!r}, "
            f"our rule gives {ours[k]!r} ({differ.size} edges differ)"
        )
    expected_edges = count_edges(p, eps)
    if expected_edges != len(edge_f):
        raise AssertionError(
            f"gudhi has {len(edge_f)} edges at max_edge_length={eps!r}, "
            f"our rule has {expected_edges}"
        )
    return _curve(values, jumps, eps, max_dim, n)


# ------------------------------------------------------------ other metrics, by matrix

#: scipy.spatial.distance.cdist's name of each metric chitally offers.
SCIPY_METRIC = {"euclidean": "euclidean", "manhattan": "cityblock", "chebyshev": "chebyshev"}


def metric_lengths(points: np.ndarray, metric: str) -> np.ndarray:
    """(n, n) edge lengths by chitally's rule of `metric`, with numpy elementwise
    operations in coordinate order: squares summed then sqrt (Euclidean), absolute
    differences summed (Manhattan), their largest (Chebyshev)."""
    if metric == "euclidean":
        return pairwise_lengths(points)
    p = np.asarray(points, dtype=np.float64)
    n, m = p.shape
    out = np.zeros((n, n), dtype=np.float64)
    for k in range(m):
        t = np.abs(p[:, None, k] - p[None, :, k])
        out = out + t if metric == "manhattan" else np.maximum(out, t)
    return out


def scipy_lengths(points: np.ndarray, metric: str) -> np.ndarray:
    """scipy's ``cdist(points, points, name)`` for `metric` (see SCIPY_METRIC)."""
    from scipy.spatial.distance import cdist

    p = np.asarray(points, dtype=np.float64)
    return cdist(p, p, SCIPY_METRIC[metric])


def brute_force_matrix_curve(lengths: np.ndarray, eps: float, max_dim: int | None) -> Curve:
    """`brute_force_curve` on a given matrix of lengths: networkx
    ``enumerate_all_cliques`` on the graph of the pairs with length <= eps, each clique
    valued by its longest edge."""
    lengths = np.asarray(lengths, dtype=np.float64)
    n = lengths.shape[0]
    graph = nx.Graph()
    graph.add_nodes_from(range(n))
    ii, jj = np.nonzero(np.triu(lengths <= eps, k=1))
    graph.add_edges_from(zip(ii.tolist(), jj.tolist()))
    values: list[float] = []
    jumps: list[int] = []
    seen: dict[tuple[int, ...], float] = {}
    for clique in nx.enumerate_all_cliques(graph):
        size = len(clique)
        if max_dim is not None and size > max_dim + 1:
            break
        value = 0.0 if size == 1 else max(seen[tuple(clique[:-1])], float(lengths[clique[:-1], clique[-1]].max()))
        seen[tuple(clique)] = value
        values.append(value)
        jumps.append(1 if size % 2 == 1 else -1)
    return _curve(values, jumps, eps, max_dim, n)


def gudhi_matrix_curve(lengths: np.ndarray, eps: float, max_dim: int | None) -> Curve:
    """The curve read out of ``gudhi.RipsComplex(distance_matrix=lengths,
    max_edge_length=eps)`` expanded to the cap (to n - 1 without one), as `gudhi_curve`
    does for points. Every edge gudhi keeps must carry its matrix entry bit for bit, and
    gudhi must keep exactly the pairs with entry <= eps."""
    lengths = np.asarray(lengths, dtype=np.float64)
    n = lengths.shape[0]
    cap = max(n - 1, 1) if max_dim is None else max_dim
    tree = gudhi.RipsComplex(distance_matrix=lengths, max_edge_length=float(eps)).create_simplex_tree(
        max_dimension=cap
    )
    values: list[float] = []
    jumps: list[int] = []
    edges = 0
    for simplex, filtration in tree.get_simplices():
        dim = len(simplex) - 1
        if dim == 1:
            edges += 1
            entry = lengths[simplex[0], simplex[1]]
            if np.float64(filtration).view(np.int64) != entry.view(np.int64):
                raise AssertionError(f"gudhi's edge {simplex} has value {filtration!r}, the matrix {entry!r}")
        if dim > cap:
            continue
        values.append(filtration)
        jumps.append(1 if dim % 2 == 0 else -1)
    expected_edges = int(np.count_nonzero(np.triu(lengths <= eps, k=1)))
    if edges != expected_edges:
        raise AssertionError(f"gudhi has {edges} edges at max_edge_length={eps!r}, the matrix {expected_edges}")
    return _curve(values, jumps, eps, max_dim, n)
