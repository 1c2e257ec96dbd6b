"""Outside references for the curves of graph filtrations, simplex by simplex.

* `brute_force_jumps`: networkx ``enumerate_all_cliques`` lists every clique of the
  graph; each clique of k vertices is a (k-1)-simplex valued by the largest value of its
  vertices and edges, and adds (-1)^(k-1) at that value.
* `gudhi_jumps`: gudhi ``SimplexTree``: vertices and edges inserted with their filtration
  values, ``expansion(k)`` builds the flag complex (a simplex takes the largest value of
  its edges), and every simplex is read back with its value.

Both take the filtration as plain data (vertex values, and edge values or None for the
lower-star rule), so the rules that define the filtration (degree, default vertex
values, superlevel negation) are written out again in the tests, not taken from
chitally.
"""

from __future__ import annotations

import gudhi
import networkx as nx
import numpy as np

from chitally import Curve


def edge_value_map(edges, vertex_values, weights=None) -> dict[frozenset, float]:
    """Value of each edge: max(weight, endpoint values); without weights, max of endpoints."""
    out = {}
    for k, (u, v) in enumerate(edges):
        value = max(vertex_values[u], vertex_values[v])
        if weights is not None:
            value = max(value, weights[k])
        out[frozenset((int(u), int(v)))] = float(value)
    return out


def brute_force_jumps(n, edges, vertex_values, edge_values, max_dim=None, threshold=None):
    """(values, jumps) of every clique of value <= threshold and dimension <= max_dim."""
    G = nx.Graph()
    G.add_nodes_from(range(n))
    G.add_edges_from((int(u), int(v)) for u, v in edges)
    values, jumps = [], []
    for clique in nx.enumerate_all_cliques(G):
        k = len(clique)
        if max_dim is not None and k > max_dim + 1:
            break
        value = max(float(vertex_values[v]) for v in clique)
        for i in range(k):
            for j in range(i + 1, k):
                value = max(value, edge_values[frozenset((clique[i], clique[j]))])
        if threshold is not None and value > threshold:
            continue
        values.append(value)
        jumps.append(1 if k % 2 == 1 else -1)
    return values, jumps


def gudhi_jumps(n, edges, vertex_values, edge_values, max_dim=None):
    """(values, jumps) of the flag complex built by gudhi's SimplexTree."""
    st = gudhi.SimplexTree()
    for v in range(n):
        st.insert([v], filtration=float(vertex_values[v]))
    for u, v in edges:
        st.insert([int(u), int(v)], filtration=edge_values[frozenset((int(u), int(v)))])
    cap = max(n - 1, 1) if max_dim is None else max_dim
    st.expansion(cap)
    values, jumps = [], []
    for simplex, value in st.get_simplices():
        dim = len(simplex) - 1
        if dim > cap:
            continue  # the tree holds the edges whatever the cap
        values.append(value)
        jumps.append(1 if dim % 2 == 0 else -1)
    return values, jumps


def curve_of(values, jumps, *, start, eps, max_dim, n_points) -> Curve:
    return Curve.from_jumps(
        np.asarray(values, dtype=np.float64), np.asarray(jumps, dtype=np.int64),
        eps=eps, max_dim=max_dim, n_points=n_points, start=start,
    )
