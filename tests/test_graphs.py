"""Tests for chitally.graphs (and chitally.graph_data, chitally.graph_kernel): the exact
curves of vertex-value (lower-star) and edge-value (flag) filtrations of clique complexes.

Every curve is checked against something outside chitally: networkx's clique listing
(brute force), gudhi's SimplexTree, `euler_curve` on the cloud a distance matrix came
from, or a closed form; each check names its source.
"""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
from graph_references import brute_force_jumps, curve_of, edge_value_map, gudhi_jumps
from references import pairwise_lengths, skeleton_chi

from chitally import InputError, euler_curve
from chitally.graph_data import GraphData, as_graph, heat_kernel_signature, vertex_values
from chitally.graphs import (
    edge_filtration,
    graph_curve,
    graph_jumps,
    matrix_curve,
    matrix_filtration,
    vertex_filtration,
)

CAPS = [None, 0, 1, 2, 3]


def random_graph(n: int, p: float, seed: int) -> nx.Graph:
    return nx.gnp_random_graph(n, p, seed=seed)


def edges_of(G: nx.Graph) -> np.ndarray:
    return np.array(list(G.edges), dtype=np.int64).reshape(-1, 2)


def default_vertex_values(n, edges, weights):
    """The documented default for edge filtrations, written out: min(0, least weight at v)."""
    out = np.zeros(n)
    for (u, v), w in zip(edges, weights):
        out[u] = min(out[u], w)
        out[v] = min(out[v], w)
    return out


def top_value(f, ev) -> float:
    """The largest value of the filtration (its domain's end, whatever the cap)."""
    return max([float(np.max(f))] + list(ev.values()))


# ----------------------------------------------------------------- lower star


DENSITIES = [(12, 0.2, 1), (16, 0.5, 2), (20, 0.35, 3), (14, 0.8, 4), (25, 0.15, 5), (9, 1.0, 6)]


@pytest.mark.parametrize(("n", "p", "seed"), DENSITIES)
@pytest.mark.parametrize("cap", CAPS)
def test_degree_filtration_matches_networkx_brute_force(n, p, seed, cap) -> None:
    G = random_graph(n, p, seed)
    edges = edges_of(G)
    deg = np.array([G.degree(v) for v in range(n)], dtype=np.float64)  # ties galore
    curve = graph_curve(G, max_dim=cap)
    # networkx enumerate_all_cliques (brute force): a clique's value is its top vertex's degree
    vals, jumps = brute_force_jumps(n, edges, deg, edge_value_map(edges, deg), cap)
    assert curve == curve_of(vals, jumps, start=deg.min(), eps=deg.max(), max_dim=cap, n_points=n)


@pytest.mark.parametrize(("n", "p", "seed"), DENSITIES)
@pytest.mark.parametrize("cap", CAPS)
def test_vertex_values_with_ties_and_negatives_match_networkx(n, p, seed, cap) -> None:
    G = random_graph(n, p, seed)
    edges = edges_of(G)
    rng = np.random.default_rng(seed)
    f = rng.integers(-3, 3, n).astype(np.float64)  # few distinct values: many ties
    curve = graph_curve(edges, values=f, max_dim=cap, n=n)
    # networkx enumerate_all_cliques (brute force)
    vals, jumps = brute_force_jumps(n, edges, f, edge_value_map(edges, f), cap)
    assert curve == curve_of(vals, jumps, start=f.min(), eps=f.max(), max_dim=cap, n_points=n)
    assert curve.start < 0 or f.min() >= 0


@pytest.mark.parametrize("cap", CAPS)
def test_superlevel_counts_simplices_whose_vertices_all_lie_above(cap) -> None:
    G = random_graph(18, 0.4, 11)
    edges = edges_of(G)
    f = np.random.default_rng(11).integers(0, 5, 18).astype(np.float64)
    curve = graph_curve(G, values=f, max_dim=cap, superlevel=True)
    assert curve.domain == (-f.max(), -f.min())
    # networkx enumerate_all_cliques (brute force): the superlevel complex at s holds the
    # cliques whose smallest vertex value is >= s
    cliques = [c for c in nx.enumerate_all_cliques(G) if cap is None or len(c) <= cap + 1]
    for s in np.unique(f):
        expected = sum((-1) ** (len(c) - 1) for c in cliques if min(f[c]) >= s)
        assert curve.at(-s) == expected


def test_threshold_and_start_set_the_domain() -> None:
    G = random_graph(20, 0.3, 7)
    edges = edges_of(G)
    deg = np.array([G.degree(v) for v in range(20)], dtype=np.float64)
    thr = float(np.median(deg))
    curve = graph_curve(G, threshold=thr, start=-1.0)
    # networkx enumerate_all_cliques (brute force), cliques of value <= threshold only
    vals, jumps = brute_force_jumps(20, edges, deg, edge_value_map(edges, deg), None, thr)
    assert curve == curve_of(vals, jumps, start=-1.0, eps=thr, max_dim=None, n_points=int((deg <= thr).sum()))
    assert curve.at(-1.0) == 0  # the empty complex before the first vertex
    up = graph_curve(G, threshold=thr, superlevel=True)
    assert up.domain == (-deg.max(), -thr)
    with pytest.raises(InputError, match="start 5.0 lies above the smallest value"):
        graph_curve(G, start=5.0)


NETWORKX_GRAPHS = {
    "karate club": nx.karate_club_graph,
    "Les Miserables": nx.les_miserables_graph,
    "Florentine families": nx.florentine_families_graph,
    "Davis southern women": nx.davis_southern_women_graph,
}


@pytest.mark.parametrize("name", sorted(NETWORKX_GRAPHS))
@pytest.mark.parametrize("cap", [None, 2])
def test_graphs_networkx_ships_with_the_degree_filtration(name, cap) -> None:
    G = NETWORKX_GRAPHS[name]()
    nodes = list(G.nodes)
    index = {v: i for i, v in enumerate(nodes)}
    n = len(nodes)
    edges = np.array([(index[u], index[v]) for u, v in G.edges], dtype=np.int64)
    deg = np.array([G.degree(v) for v in nodes], dtype=np.float64)
    curve = graph_curve(G, max_dim=cap)
    # networkx enumerate_all_cliques (brute force) on the same graph, nodes numbered in G.nodes order
    vals, jumps = brute_force_jumps(n, edges, deg, edge_value_map(edges, deg), cap)
    assert curve == curve_of(vals, jumps, start=deg.min(), eps=deg.max(), max_dim=cap, n_points=n)
    if name == "Davis southern women":
        # a bipartite graph has no triangle: chi = V - E at the end
        assert curve.final == n - G.number_of_edges()


def test_les_miserables_weights_as_edge_values() -> None:
    G = nx.les_miserables_graph()
    nodes = list(G.nodes)
    index = {v: i for i, v in enumerate(nodes)}
    edges = np.array([(index[u], index[v]) for u, v in G.edges], dtype=np.int64)
    w = np.array([d["weight"] for _, _, d in G.edges(data=True)], dtype=np.float64)
    n = len(nodes)
    for superlevel in (False, True):
        sign = -1.0 if superlevel else 1.0
        curve = graph_curve(G, weights="weight", superlevel=superlevel)
        f = default_vertex_values(n, edges, sign * w)
        # gudhi SimplexTree (an independent flag-complex implementation)
        vals, jumps = gudhi_jumps(n, edges, f, edge_value_map(edges, f, sign * w))
        assert curve == curve_of(vals, jumps, start=f.min(), eps=max(vals), max_dim=None, n_points=n)


# ----------------------------------------------------------------- edge values


@pytest.mark.parametrize(("n", "p", "seed"), DENSITIES)
@pytest.mark.parametrize("cap", CAPS)
def test_edge_weights_match_networkx_brute_force(n, p, seed, cap) -> None:
    G = random_graph(n, p, seed)
    edges = edges_of(G)
    rng = np.random.default_rng(100 + seed)
    w = rng.integers(-2, 4, edges.shape[0]).astype(np.float64)  # ties and negatives
    table = np.column_stack([edges, w])
    curve = graph_curve(table, weights="weight", max_dim=cap, n=n)
    f = default_vertex_values(n, edges, w)
    ev = edge_value_map(edges, f, w)
    # networkx enumerate_all_cliques (brute force): a clique's value is its largest edge value
    vals, jumps = brute_force_jumps(n, edges, f, ev, cap)
    assert curve == curve_of(vals, jumps, start=f.min(), eps=top_value(f, ev), max_dim=cap, n_points=n)


@pytest.mark.parametrize(("n", "p", "seed"), DENSITIES[:4])
@pytest.mark.parametrize("cap", CAPS)
def test_edge_weights_with_vertex_values_match_networkx(n, p, seed, cap) -> None:
    G = random_graph(n, p, seed)
    edges = edges_of(G)
    rng = np.random.default_rng(200 + seed)
    w = rng.normal(size=edges.shape[0]).round(1)
    f = rng.normal(size=n).round(1) - 1.0
    thr = 0.3
    curve = graph_curve(G, values=f, weights=w, max_dim=cap, threshold=thr)
    ev = edge_value_map(edges, f, w)
    # networkx enumerate_all_cliques (brute force), cliques of value <= threshold
    vals, jumps = brute_force_jumps(n, edges, f, ev, cap, thr)
    assert curve == curve_of(vals, jumps, start=f.min(), eps=thr, max_dim=cap, n_points=int((f <= thr).sum()))


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("cap", [None, 2, 3, 4])
def test_both_filtrations_match_gudhi_simplex_tree(seed, cap) -> None:
    G = random_graph(30, 0.3 + 0.1 * seed, seed)
    edges = edges_of(G)
    n = 30
    rng = np.random.default_rng(seed)
    f = rng.integers(0, 6, n).astype(np.float64)
    w = rng.uniform(-1, 1, edges.shape[0])
    for values, weights in ((f, None), (f, w), (None, w)):
        curve = graph_curve(G, values=values, weights=weights, max_dim=cap)
        fv = f if values is not None else default_vertex_values(n, edges, w)
        ev = edge_value_map(edges, fv, weights)
        # gudhi SimplexTree with expansion(k) (an independent flag-complex implementation)
        vals, jumps = gudhi_jumps(n, edges, fv, ev, cap)
        assert curve == curve_of(vals, jumps, start=fv.min(), eps=top_value(fv, ev), max_dim=cap, n_points=n)


def test_sparse_matrix_input_uses_its_entries_as_weights() -> None:
    G = random_graph(15, 0.4, 9)
    edges = edges_of(G)
    w = np.random.default_rng(9).uniform(0.1, 2.0, edges.shape[0])
    A = sp.coo_matrix((np.concatenate([w, w]), (np.concatenate([edges[:, 0], edges[:, 1]]),
                                                 np.concatenate([edges[:, 1], edges[:, 0]]))), shape=(15, 15))
    curve = graph_curve(A.tocsr(), weights="weight")
    ev = edge_value_map(edges, np.zeros(15), w)
    # networkx enumerate_all_cliques (brute force)
    vals, jumps = brute_force_jumps(15, edges, np.zeros(15), ev)
    assert curve == curve_of(vals, jumps, start=0.0, eps=max(vals), max_dim=None, n_points=15)
    # without weights the matrix is its pattern, valued by degree
    deg = np.array([G.degree(v) for v in range(15)], dtype=np.float64)
    vals, jumps = brute_force_jumps(15, edges, deg, edge_value_map(edges, deg))
    assert graph_curve(A) == curve_of(vals, jumps, start=deg.min(), eps=deg.max(), max_dim=None, n_points=15)


def test_weight_array_follows_the_input_edge_order() -> None:
    edges = np.array([[3, 1], [0, 1], [2, 3], [1, 2]])
    w = np.array([0.4, 0.1, 0.3, 0.2])
    curve = graph_curve(edges, weights=w)
    # by hand: the path 0-1-2-3 (edges at 0.1, 0.2, 0.3) and the chord (3, 1) at 0.4, which
    # closes the triangle 1-2-3 at 0.4 (edge -1, triangle +1: no change there). Weights
    # read in sorted edge order instead would put the triangle at 0.3 and a step at 0.4.
    assert curve.values.tolist() == [0.0, 0.1, 0.2, 0.3]
    assert curve.chi.tolist() == [4, 3, 2, 1]
    assert curve.final == 1


# ------------------------------------------------------------------ distance matrix


@pytest.mark.parametrize("cap", CAPS)
@pytest.mark.parametrize("dim", [2, 3])
def test_distance_matrix_of_a_cloud_equals_euler_curve(cap, dim) -> None:
    rng = np.random.default_rng(dim)
    points = rng.uniform(0, 1, (70, dim))
    points[-3:] = points[:3]  # coincident points: 0-length edges
    D = pairwise_lengths(points)  # chitally's distance rule, bit for bit
    for eps in (0.25, 0.45):
        # chitally.euler_curve on the cloud itself (the point-cloud route)
        assert matrix_curve(D, eps, cap) == euler_curve(points, eps, cap)


def test_distance_matrix_of_a_lattice_with_ties_equals_euler_curve() -> None:
    g = np.arange(5, dtype=np.float64)
    points = np.array([(x, y) for x in g for y in g])
    D = pairwise_lengths(points)
    for cap in CAPS:
        # chitally.euler_curve on the cloud (integer lattice: exact ties of lengths)
        assert matrix_curve(D, 2.0, cap) == euler_curve(points, 2.0, cap)


def test_matrix_infinite_entries_are_missing_edges() -> None:
    D = np.array([[0.0, 1.0, np.inf], [1.0, 0.0, 2.0], [np.inf, 2.0, 0.0]])
    c = matrix_curve(D, 5.0)
    # by hand: a path on 3 vertices, its edges at 1 and 2
    assert c.values.tolist() == [0.0, 1.0, 2.0] and c.chi.tolist() == [3, 2, 1] and c.domain == (0.0, 5.0)


# ---------------------------------------------------------------------- closed forms


def test_random_complete_graph_expectation_kahle() -> None:
    """Complete graph on n vertices with i.i.d. uniform(0, 1) edge weights: by linearity
    of expectation over k-cliques (a k-clique is present at t iff its C(k, 2) edges are),
    E chi(t) = sum_k (-1)^(k-1) C(n, k) t^C(k,2) (M. Kahle, "Topology of random clique
    complexes", Discrete Math. 309 (2009)). A seeded simulation: the sample mean must lie
    within 4.5 standard errors of the closed form at every t."""
    n, trials = 10, 400
    ts = np.array([0.2, 0.35, 0.5, 0.65, 0.8])
    rng = np.random.default_rng(2009)
    iu = np.triu_indices(n, k=1)
    edges = np.column_stack(iu)
    samples = np.empty((trials, ts.size))
    for r in range(trials):
        w = rng.uniform(0.0, 1.0, edges.shape[0])
        curve = graph_curve(edges, weights=w, n=n, threshold=1.0)
        samples[r] = curve.sample(ts)
    expected = np.array([sum((-1) ** (k - 1) * math.comb(n, k) * t ** math.comb(k, 2) for k in range(1, n + 1)) for t in ts])
    mean = samples.mean(axis=0)
    se = samples.std(axis=0, ddof=1) / math.sqrt(trials)
    assert (se > 0).all()
    assert (np.abs(mean - expected) <= 4.5 * se).all(), (mean, expected, se)


def cocktail_party(pairs: int) -> np.ndarray:
    """K_{2p} minus the perfect matching {2i, 2i+1}."""
    n = 2 * pairs
    return np.array([(a, b) for a in range(n) for b in range(a + 1, n) if b != a + 1 or a % 2 == 1])


@pytest.mark.parametrize("cap", [None, 2, 3, 4, 6])
def test_cocktail_party_graph_is_a_sphere(cap) -> None:
    """The clique complex of the cocktail party graph on p pairs is the boundary of the
    p-dimensional cross-polytope, a (p-1)-sphere: it has C(p, j) 2^j faces of j vertices
    (choose j pairs, one vertex of each). With vertex values = ids, the first k vertices
    span floor(k/2) whole pairs (a sphere) plus, for odd k, a vertex joined to all of them
    (a cone). 40 pairs: lower links of up to 79 vertices, beyond one 64-bit word."""
    p = 40
    edges = cocktail_party(p)
    curve = graph_curve(edges, values=np.arange(2 * p, dtype=np.float64), max_dim=cap)

    def sphere_chi(q: int) -> int:
        return sum((-1) ** (j - 1) * math.comb(q, j) * 2**j for j in range(1, q + 1) if cap is None or j <= cap + 1)

    def cone_chi(q: int) -> int:
        # faces: those of the sphere, the apex, the apex joined to each face of <= cap vertices
        top = q if cap is None else cap
        return sphere_chi(q) + 1 - sum((-1) ** (j - 1) * math.comb(q, j) * 2**j for j in range(1, min(q, top) + 1))

    for k in range(1, 2 * p + 1):
        expected = sphere_chi(k // 2) if k % 2 == 0 else cone_chi(k // 2)
        assert curve.at(float(k - 1)) == expected, k
    if cap is None:
        assert curve.final == 1 + (-1) ** (p - 1)  # chi(S^(p-1))


@pytest.mark.parametrize("cap", [None, 1, 2, 3, 5])
def test_hub_with_many_leaves_and_a_large_clique(cap) -> None:
    """A hub joined to 200 vertices, 70 of which form a clique. Degree filtration: the 130
    leaves (degree 1), then the clique (degree 70, a full simplex on 70 vertices), then the
    hub (degree 200), whose lower link is 130 isolated vertices plus a 70-clique: the
    whole complex is a cone. Closed forms: the D-skeleton of a simplex on m vertices has
    chi = 1 + (-1)^D C(m-1, D+1) (1 without a cap), and a cone CX has chi_D(CX) =
    chi_D(X) + 1 - chi_(D-1)(X)."""
    hub = 200
    edges = [(v, hub) for v in range(200)] + [(a, b) for a in range(70) for b in range(a + 1, 70)]
    curve = graph_curve(np.array(edges), max_dim=cap)

    def chi_x(d):  # X = 130 points and a 70-simplex, counted to dimension d
        if d is not None and d < 0:
            return 0
        return 130 + skeleton_chi(70, d)

    at_clique = chi_x(cap)
    at_hub = 1 if cap is None else chi_x(cap) + 1 - chi_x(cap - 1)
    assert curve.values.tolist() == [1.0, 70.0, 200.0]
    assert curve.chi.tolist() == [130, at_clique, at_hub]


@pytest.mark.parametrize("cap", [None, 3, 4])
def test_large_lower_links_match_gudhi(cap) -> None:
    """Two hubs over a sparse random graph on 110 vertices: the hubs' lower links hold
    over 64 non-isolated vertices (the multi-word bitsets, collapses and splits)."""
    base = random_graph(110, 0.03, 31)
    edges = [tuple(e) for e in base.edges] + [(v, 110) for v in range(110)] + [(v, 111) for v in range(0, 110, 2)]
    edges = np.array(edges + [(110, 111)], dtype=np.int64)
    n = 112
    rng = np.random.default_rng(31)
    f = np.concatenate([rng.integers(0, 10, 110), [20, 20]]).astype(np.float64)
    w = rng.uniform(0, 1, edges.shape[0]).round(2)
    w[edges[:, 1] >= 110] += 1.0  # the hubs' edges come last
    for values, weights in ((f, None), (None, w)):
        curve = graph_curve(edges, values=values, weights=weights, max_dim=cap)
        fv = f if values is not None else default_vertex_values(n, edges, w)
        ev = edge_value_map(edges, fv, weights)
        # gudhi SimplexTree with expansion(k) (an independent flag-complex implementation)
        vals, jumps = gudhi_jumps(n, edges, fv, ev, cap)
        assert curve == curve_of(vals, jumps, start=fv.min(), eps=top_value(fv, ev), max_dim=cap, n_points=n)


# -------------------------------------------------------------- splitting by vertices


@pytest.mark.parametrize("kind", ["vertex", "edge"])
@pytest.mark.parametrize("cap", [None, 1, 2, 3])
def test_vertex_ranges_on_their_halos_add_up_to_the_whole(kind, cap) -> None:
    G = random_graph(60, 0.2, 21)
    g = as_graph(G)
    rng = np.random.default_rng(21)
    f = rng.integers(0, 4, g.n).astype(np.float64)
    w = rng.integers(0, 5, g.n_edges).astype(np.float64)
    fg = vertex_filtration(g, f) if kind == "vertex" else edge_filtration(g, w)
    whole = graph_jumps(fg, max_dim=cap)
    bounds = [0, 7, 8, 25, 41, 59, 60]
    parts_v, parts_j = [], []
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        halo, a, b = fg.halo(lo, hi)
        assert set(halo.ids.tolist()) >= set(range(lo, hi))
        # the halo is the range and its neighbours (networkx's adjacency)
        expected = set(range(lo, hi)).union(*(set(G.adj[v]) for v in range(lo, hi)))
        assert halo.ids.tolist() == sorted(expected)
        v, j = graph_jumps(halo, a, b, max_dim=cap)
        ref_v, ref_j = graph_jumps(fg, lo, hi, max_dim=cap)
        assert v.tolist() == ref_v.tolist() and j.tolist() == ref_j.tolist()
        parts_v.append(v)
        parts_j.append(j)
    from chitally.curve import merge_jumps

    mv, mj = merge_jumps(parts_v, parts_j)
    assert mv.tolist() == whole[0].tolist() and mj.tolist() == whole[1].tolist()
    # and the whole table is the brute-force one (networkx enumerate_all_cliques)
    edges = g.edges
    if kind == "edge":
        f = default_vertex_values(g.n, edges, w)
    ev = edge_value_map(edges, f, None if kind == "vertex" else w)
    vals, jumps = brute_force_jumps(g.n, edges, f, ev, cap)
    top = top_value(f, ev)
    ref = curve_of(vals, jumps, start=f.min(), eps=top, max_dim=cap, n_points=g.n)
    assert curve_of(whole[0], whole[1], start=f.min(), eps=top, max_dim=cap, n_points=g.n) == ref


# ----------------------------------------------------------------- vertex values


def test_named_vertex_values() -> None:
    G = nx.Graph()
    G.add_edges_from([("c", "a"), ("a", "b"), ("b", "c"), ("c", "d")])
    nx.set_node_attributes(G, {"c": 3.5, "a": -1, "b": 2, "d": 0}, "height")
    g = as_graph(G)
    assert g.node_names == ("c", "a", "b", "d")
    # networkx's own degree, closeness centrality and node attributes, in G.nodes order
    assert vertex_values(g, "degree").tolist() == [float(G.degree(v)) for v in G.nodes]
    cc = nx.closeness_centrality(G)
    assert vertex_values(g, "closeness").tolist() == [cc[v] for v in G.nodes]
    assert vertex_values(g, "height").tolist() == [3.5, -1.0, 2.0, 0.0]
    assert vertex_values(g, None).tolist() == [0.0] * 4
    curve = graph_curve(G, values="height")
    # by hand: a at -1 (+1), d at 0 (+1), b at 2 (vertex and edge ab: no change), c at 3.5
    # (vertex, edges ca cb cd, triangle abc: -1)
    assert curve.values.tolist() == [-1.0, 0.0, 3.5] and curve.chi.tolist() == [1, 2, 1]


def test_heat_kernel_signature_is_the_diagonal_of_the_heat_kernel() -> None:
    G = random_graph(25, 0.2, 4)
    g = as_graph(G)
    L = nx.laplacian_matrix(G, nodelist=range(25)).toarray().astype(np.float64)
    for t in (0.1, 1.0, 5.0):
        # scipy.linalg.expm: the heat kernel exp(-tL), its diagonal
        np.testing.assert_allclose(heat_kernel_signature(g, t), np.diag(scipy.linalg.expm(-t * L)), rtol=1e-10, atol=1e-12)
    hks = heat_kernel_signature(g, 0.5)
    edges = g.edges
    # networkx enumerate_all_cliques (brute force) with the signature as vertex values
    vals, jumps = brute_force_jumps(25, edges, hks, edge_value_map(edges, hks))
    assert graph_curve(G, values="heat:0.5") == curve_of(vals, jumps, start=hks.min(), eps=hks.max(), max_dim=None, n_points=25)


def test_empty_and_edgeless_graphs() -> None:
    c = graph_curve(np.empty((0, 2), dtype=np.int64), n=4)
    assert c.domain == (0.0, 0.0) and c.chi.tolist() == [4]  # four points of degree 0
    c = graph_curve(np.empty((0, 2), dtype=np.int64))
    assert c.n_points == 0 and c.chi.tolist() == [0]
    c = graph_curve(np.empty((0, 3)), weights="weight", n=2)
    assert c.chi.tolist() == [2] and c.domain == (0.0, 0.0)


# ----------------------------------------------------------------- validation


@pytest.mark.parametrize(
    ("make", "message"),
    [
        (lambda: graph_curve(np.array([[0, 1], [2, 2]])), r"edges: row 1 is a self-loop at vertex 2"),
        (lambda: graph_curve(np.array([[0, 1], [1, -3]])), r"edges: row 1 has vertex id -3; vertex ids must be integers >= 0"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2.5]])), r"edges: row 1 has vertex id 2.5; vertex ids must be integers >= 0"),
        (lambda: graph_curve(np.array([[0.0, np.nan]])), r"edges: row 0 has vertex id nan"),
        (lambda: graph_curve(np.array([[0, 1], [1, 5]]), n=3), r"row 1 has vertex id 5 but the graph has n = 3 vertices"),
        (lambda: graph_curve(np.array([["a", "b"]])), r"vertex ids must be integers, got dtype"),
        (lambda: graph_curve(np.array([[0, 1, 1.0], [1, 0, 2.0]]), weights="weight"),
         r"the edge \{0, 1\} appears twice with different weight \(1.0 in row 0, 2.0 in row 1\)"),
        (lambda: graph_curve(np.array([[0, 1, 1.0], [1, 2, np.nan]]), weights="weight"),
         r"edge attribute 'weight': row 1 \(edge \{1, 2\}\) is nan; edge values must be finite"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), weights=[1.0]), r"weights: expected 2 values, one per edge"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), values=[1.0, 2.0]), r"vertex values: expected 3 values, one per vertex, got shape \(2,\)"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), values=[1.0, np.nan, 2.0]), r"vertex values: vertex 1 has value nan"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), values="colour"), r"vertex values 'colour': not 'degree'"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), values="heat:-1"), r"the time t must be a finite number > 0"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), values="heat:x"), r"heat:<t> needs a number t > 0, got 'x'"),
        (lambda: graph_curve(np.array([[0, 1], [1, 2]]), weights="length"), r"weights 'length': the graph has no such edge attribute"),
        (lambda: graph_curve(np.array([[0, 1]]), max_dim=-1), r"max_dim must be None or an integer >= 0"),
        (lambda: graph_curve(np.array([[0, 1]]), threshold=math.nan), r"threshold must be a finite number or None"),
        (lambda: graph_curve(np.zeros((3, 4))), r"expected an \(E, 2\) array of vertex ids or \(E, 3\)"),
        (lambda: graph_curve(nx.DiGraph([(0, 1)])), r"a directed graph"),
        (lambda: graph_curve(nx.MultiGraph([(0, 1)])), r"a multigraph"),
        (lambda: graph_curve(nx.Graph([(0, 1), (1, 1)])), r"a self-loop at node 1"),
        (lambda: graph_curve(sp.csr_matrix(np.array([[0.0, 1.0], [2.0, 0.0]]))),
         r"matrix: not symmetric: entry \(0, 1\) is 1.0 but \(1, 0\) is 2.0"),
        (lambda: graph_curve(sp.csr_matrix(np.array([[0.0, 1.0], [0.0, 0.0]]))),
         r"matrix: not symmetric: entry \(0, 1\) is stored but \(1, 0\) is not"),
        (lambda: graph_curve(sp.csr_matrix(np.array([[1.0, 0.0], [0.0, 0.0]]))), r"diagonal entry \(0, 0\) is 1.0, a self-loop"),
        (lambda: graph_curve(sp.csr_matrix(np.array([[0.0, np.nan], [np.nan, 0.0]]))), r"entry \(0, 1\) is nan"),
        (lambda: graph_curve(sp.csr_matrix(np.zeros((2, 3)))), r"expected a square matrix"),
        (lambda: matrix_curve(np.array([[0.0, 1.0], [2.0, 0.0]]), 1.0),
         r"distance matrix: not symmetric: entry \(0, 1\) is 1.0 but \(1, 0\) is 2.0"),
        (lambda: matrix_curve(np.array([[0.0, 1.0], [1.0, 0.5]]), 1.0), r"diagonal entry \(1, 1\) is 0.5; the diagonal must be 0"),
        (lambda: matrix_curve(np.array([[0.0, np.nan], [np.nan, 0.0]]), 1.0), r"entry \(0, 1\) is nan; distances must not be NaN"),
        (lambda: matrix_curve(np.array([[0.0, -1.0], [-1.0, 0.0]]), 1.0), r"entry \(0, 1\) is -1.0; distances must not be negative"),
        (lambda: matrix_curve(np.zeros((2, 3)), 1.0), r"expected a square matrix, got shape \(2, 3\)"),
        (lambda: matrix_curve(np.zeros((2, 2)), math.inf), r"threshold must be a finite number"),
        (lambda: matrix_curve(np.zeros((2, 2)), -1.0), r"threshold must be a finite number >= 0"),
    ],
)
def test_invalid_input_is_one_line(make, message) -> None:
    with pytest.raises(InputError, match=message) as info:
        make()
    assert "\n" not in str(info.value)


def test_repeated_edges_with_equal_data_are_merged() -> None:
    g = GraphData.from_edges(np.array([[1, 0], [0, 1], [1, 2]]), edge_data={"w": [0.5, 0.5, 1.0]})
    assert g.edges.tolist() == [[0, 1], [1, 2]] and g.edge_data["w"].tolist() == [0.5, 1.0]
    assert g.n == 3 and g.degrees().tolist() == [1, 2, 1]


def test_filtered_graph_rows_are_in_filtration_order() -> None:
    g = as_graph(np.array([[0, 1], [0, 2], [0, 3], [2, 3]]))
    fg = vertex_filtration(g, np.array([5.0, 3.0, 1.0, 3.0]))
    row0 = fg.nbrs[fg.offsets[0]:fg.offsets[1]].tolist()
    assert row0 == [2, 1, 3]  # by (value, id): 2 (1.0), 1 (3.0), 3 (3.0)
    fe = edge_filtration(g, np.array([0.3, 0.1, 0.2, 0.1]))
    assert fe.edge_values.tolist() == [0.1, 0.1, 0.2, 0.3]
    assert fe.edge_lo.tolist() == [0, 2, 0, 0]  # ties by (lower id, higher id)
    assert matrix_filtration(np.zeros((3, 3)), 0.0).n_edges == 3
