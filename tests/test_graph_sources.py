"""Tests for chitally.graph_sources: graphs and collections read from files.

Files are written by the tests' own code or by networkx/scipy/numpy writers; where a
reader is checked against an outside parser (networkx), the source is named.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

from chitally import InputError
from chitally.graph_sources import (
    read_collection,
    read_edge_list,
    read_edge_list_folder,
    read_graph,
    read_matrix,
    read_tu,
)
from chitally.graphs import graph_curve, matrix_curve


def edge_set(g) -> set[tuple[int, int]]:
    return {tuple(e) for e in g.edges.tolist()}


# ------------------------------------------------------------------- edge lists


def test_csv_with_header_and_weights(tmp_path: Path) -> None:
    path = tmp_path / "g.csv"
    path.write_text("source,target,weight\n0,1,0.5\n# a comment line\n2,1,1.5\n3,0,-2\n")
    g = read_edge_list(path)
    assert g.n == 4 and g.edges.tolist() == [[0, 1], [0, 3], [1, 2]]
    assert g.edge_data["weight"].tolist() == [0.5, -2.0, 1.5]
    assert g.name == str(path)


def test_whitespace_edge_list_matches_networkx_parser(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    G = nx.gnp_random_graph(30, 0.2, seed=3)
    for u, v in G.edges:
        G.edges[u, v]["weight"] = float(rng.integers(1, 9)) / 4
    path = tmp_path / "g.edges"
    nx.write_weighted_edgelist(G, path)  # networkx's writer: "u v weight" lines
    g = read_graph(path, n=30)
    # networkx read_weighted_edgelist (an outside parser) on the same file
    H = nx.read_weighted_edgelist(path, nodetype=int)
    assert edge_set(g) == {(min(u, v), max(u, v)) for u, v in H.edges}
    expected = {(min(u, v), max(u, v)): d["weight"] for u, v, d in H.edges(data=True)}
    assert {tuple(e): w for e, w in zip(g.edges.tolist(), g.edge_data["weight"].tolist())} == expected
    assert graph_curve(g, weights="weight") == graph_curve(G, weights="weight")


def test_tsv_and_compressed_csv(tmp_path: Path) -> None:
    (tmp_path / "g.tsv").write_text("0\t1\n1\t2\n")
    assert read_graph(tmp_path / "g.tsv").edges.tolist() == [[0, 1], [1, 2]]
    with gzip.open(tmp_path / "g.csv.gz", "wt") as f:
        f.write("0,1\n1,2\n2,0\n")
    g = read_graph(tmp_path / "g.csv.gz", n=5)
    assert g.n == 5 and g.edges.tolist() == [[0, 1], [0, 2], [1, 2]] and g.edge_data == {}


def test_empty_edge_list(tmp_path: Path) -> None:
    (tmp_path / "empty.csv").write_text("u,v\n")
    g = read_edge_list(tmp_path / "empty.csv", n=3)
    assert g.n == 3 and g.n_edges == 0


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("0,1\n2,2\n", r"g.csv: row 1 is a self-loop at vertex 2"),
        ("0,1,1.0\n1,0,2.0\n", r"g.csv: the edge \{0, 1\} appears twice with different weight \(1.0 in row 0, 2.0 in row 1\)"),
        ("0,1,1.0\n1,2,nan\n", r"g.csv: edge attribute 'weight': row 1 \(edge \{1, 2\}\) is nan"),
        ("0,1\n-1,2\n", r"g.csv: row 1 has vertex id -1; vertex ids must be integers >= 0"),
        ("0,1\n1.5,2\n", r"g.csv: row 1 has vertex id 1.5; vertex ids must be integers >= 0"),
        ("0,1,2,3\n", r"g.csv: 4 columns; an edge list has 2 \(u, v\) or 3 \(u, v, weight\)"),
        ("0,1\n1,x\n", r"g.csv: row 1 \(line 2\), column 1: 'x' is not a number"),
    ],
)
def test_bad_edge_lists_are_one_line(tmp_path: Path, content: str, message: str) -> None:
    path = tmp_path / "g.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=message) as info:
        read_graph(path)
    assert "\n" not in str(info.value)


def test_unknown_and_missing_files(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="unknown graph file type"):
        read_graph(tmp_path / "g.xyz")
    with pytest.raises(InputError, match="no such file or directory"):
        read_graph(tmp_path / "absent.csv")
    with pytest.raises(InputError, match="no such file or directory"):
        read_graph(tmp_path / "absent.graphml")
    np.save(tmp_path / "d.npy", np.zeros((2, 2)))
    with pytest.raises(InputError, match="read it with read_matrix"):
        read_graph(tmp_path / "d.npy")


# ------------------------------------------------------------- networkx formats


def test_graphml_gml_and_adjlist_round_trip(tmp_path: Path) -> None:
    G = nx.Graph()
    G.add_edge("x", "y", weight=0.25)
    G.add_edge("y", "z", weight=1.0)
    G.add_edge("z", "x", weight=0.5)
    G.add_node("lonely")
    nx.set_node_attributes(G, {"x": 1.0, "y": 2.0, "z": 3.0, "lonely": -1.0}, "height")
    # networkx's own writers produce the files
    nx.write_graphml(G, tmp_path / "g.graphml")
    nx.write_gml(G, tmp_path / "g.gml")
    nx.write_adjlist(G, tmp_path / "g.adjlist")
    for ending in ("graphml", "gml"):
        g = read_graph(tmp_path / f"g.{ending}")
        names = list(g.node_names)
        assert sorted(names) == ["lonely", "x", "y", "z"] or ending == "gml"
        assert g.n == 4 and g.n_edges == 3
        assert sorted(g.edge_data["weight"].tolist()) == [0.25, 0.5, 1.0]
        assert sorted(g.node_data["height"].tolist()) == [-1.0, 1.0, 2.0, 3.0]
        assert graph_curve(g, values="height", weights="weight").final == 2  # a filled triangle and a point
    g = read_graph(tmp_path / "g.adjlist")
    assert g.n == 4 and g.n_edges == 3 and g.edge_data == {}


def test_malformed_graphml(tmp_path: Path) -> None:
    (tmp_path / "bad.graphml").write_text("<graphml><graph><node id=")
    with pytest.raises(InputError, match="bad.graphml: cannot read as graphml") as info:
        read_graph(tmp_path / "bad.graphml")
    assert "\n" not in str(info.value)


# -------------------------------------------------------------------- matrices


def test_sparse_npz(tmp_path: Path) -> None:
    A = sp.csr_matrix(np.array([[0, 2.0, 0], [2.0, 0, 3.0], [0, 3.0, 0]]))
    sp.save_npz(tmp_path / "a.npz", A)  # scipy's writer
    g = read_graph(tmp_path / "a.npz")
    assert g.n == 3 and g.edges.tolist() == [[0, 1], [1, 2]] and g.edge_data["weight"].tolist() == [2.0, 3.0]
    sp.save_npz(tmp_path / "b.npz", sp.csr_matrix(np.array([[0, 2.0], [1.0, 0]])))
    with pytest.raises(InputError, match=r"b.npz: not symmetric: entry \(0, 1\) is 2.0 but \(1, 0\) is 1.0"):
        read_graph(tmp_path / "b.npz")
    np.savez(tmp_path / "c.npz", x=np.zeros(3))
    with pytest.raises(InputError, match="c.npz: not a scipy sparse matrix"):
        read_graph(tmp_path / "c.npz")


def test_dense_npy_matrix(tmp_path: Path) -> None:
    D = np.array([[0.0, 1.0, 2.0], [1.0, 0.0, 1.5], [2.0, 1.5, 0.0]])
    np.save(tmp_path / "d.npy", D)
    back = read_matrix(tmp_path / "d.npy")
    assert back.tolist() == D.tolist()
    c = matrix_curve(back, 2.0)
    # by hand: edges at 1.0 and 1.5, the third edge and the triangle at 2.0 cancel
    assert c.values.tolist() == [0.0, 1.0, 1.5] and c.chi.tolist() == [3, 2, 1]
    np.save(tmp_path / "bad.npy", np.array([[0.0, 1.0], [1.5, 0.0]]))
    with pytest.raises(InputError, match=r"bad.npy: not symmetric: entry \(0, 1\) is 1.0 but \(1, 0\) is 1.5"):
        read_matrix(tmp_path / "bad.npy")


# ------------------------------------------------------------------ collections


def write_tu(folder: Path, name: str = "TOY", *, a_lines=None, indicator=None, labels=None) -> Path:
    """Three graphs in the benchmark layout: a triangle (nodes 1-3), a path (4-5-6-7),
    a single node (8); edges listed in both directions, as the benchmarks do."""
    folder.mkdir(parents=True, exist_ok=True)
    if a_lines is None:
        pairs = [(1, 2), (2, 3), (3, 1), (4, 5), (5, 6), (6, 7)]
        a_lines = [f"{a}, {b}" for a, b in pairs] + [f"{b}, {a}" for a, b in pairs]
    (folder / f"{name}_A.txt").write_text("\n".join(a_lines) + "\n")
    indicator = indicator or [1, 1, 1, 2, 2, 2, 2, 3]
    (folder / f"{name}_graph_indicator.txt").write_text("\n".join(map(str, indicator)) + "\n")
    labels = labels or [1, -1, 1]
    (folder / f"{name}_graph_labels.txt").write_text("\n".join(map(str, labels)) + "\n")
    (folder / f"{name}_node_labels.txt").write_text("\n".join(str(k % 3) for k in range(len(indicator))) + "\n")
    (folder / f"{name}_node_attributes.txt").write_text(
        "\n".join(f"{k / 10}, {-k}" for k in range(len(indicator))) + "\n"
    )
    (folder / f"{name}_edge_attributes.txt").write_text("\n".join(str(k % 6) for k in range(len(a_lines))) + "\n")
    return folder


def test_tu_layout_reads_back_graphs_labels_and_attributes(tmp_path: Path) -> None:
    folder = write_tu(tmp_path / "toy")
    coll = read_collection(folder)
    assert coll.name == "TOY" and len(coll) == 3
    assert coll.labels.tolist() == [1, -1, 1] and coll.labels.dtype == np.int64
    tri, path, single = coll
    assert (tri.n, tri.edges.tolist()) == (3, [[0, 1], [0, 2], [1, 2]])
    assert (path.n, path.edges.tolist()) == (4, [[0, 1], [1, 2], [2, 3]])
    assert (single.n, single.n_edges) == (1, 0)
    assert [g.label for g in coll] == [1, -1, 1]
    assert tri.node_data["label"].tolist() == [0.0, 1.0, 2.0]
    assert path.node_data["label"].tolist() == [0.0, 1.0, 2.0, 0.0]
    assert path.node_data["attribute_0"].tolist() == [0.3, 0.4, 0.5, 0.6]
    assert single.node_data["attribute_1"].tolist() == [-7.0]
    # edge attribute k % 6 of line k: the pair (a, b) on line k and (b, a) on line k + 6 agree
    assert tri.edge_data["attribute_0"].tolist() == [0.0, 2.0, 1.0]
    assert graph_curve(tri).final == 1 and graph_curve(path).final == 1 and graph_curve(single).final == 1


def test_tu_nodes_need_not_be_grouped(tmp_path: Path) -> None:
    # nodes of graph 2 before and after those of graph 1: vertices keep increasing node id
    folder = write_tu(tmp_path / "mixed", a_lines=["1, 4", "2, 3"], indicator=[2, 1, 1, 2], labels=[0, 1])
    a, b = read_tu(folder)
    assert (a.n, a.edges.tolist()) == (2, [[0, 1]]) and (b.n, b.edges.tolist()) == (2, [[0, 1]])
    assert b.node_data["attribute_0"].tolist() == [0.0, 0.3]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (dict(a_lines=["1, 4"]), r"TOY_A.txt: line 1 joins node 1 of graph 1 to node 4 of graph 2"),
        (dict(a_lines=["1, 9"]), r"TOY_A.txt: line 1 has node id 9; node ids are integers 1..8"),
        (dict(a_lines=["0, 1"]), r"TOY_A.txt: line 1 has node id 0; node ids are integers 1..8"),
        (dict(a_lines=["1, 2", "2, 2"]), r"TOY_A.txt: line 2 is a self-loop at node 2"),
        (dict(labels=[1, 2]), r"TOY_graph_labels.txt: 2 labels but there are 3 graphs"),
        (dict(indicator=[1, 1, 1, 2, 2, 2, 2, 0]), r"TOY_graph_indicator.txt: line 8 is 0; graph ids are integers from 1"),
    ],
)
def test_bad_tu_collections_are_one_line(tmp_path: Path, kwargs, message) -> None:
    folder = write_tu(tmp_path / "bad", **kwargs)
    with pytest.raises(InputError, match=message) as info:
        read_tu(folder)
    assert "\n" not in str(info.value)


def test_tu_missing_parts(tmp_path: Path) -> None:
    folder = write_tu(tmp_path / "partial")
    (folder / "TOY_graph_indicator.txt").unlink()
    with pytest.raises(InputError, match="TOY_graph_indicator.txt is missing"):
        read_tu(folder)
    write_tu(tmp_path / "two", name="ONE")
    write_tu(tmp_path / "two", name="OTHER")
    with pytest.raises(InputError, match=r"holds several collections \(ONE, OTHER\); choose one with name"):
        read_collection(tmp_path / "two")
    assert len(read_collection(tmp_path / "two", name="OTHER")) == 3
    write_tu(tmp_path / "short")
    (tmp_path / "short" / "TOY_node_labels.txt").write_text("1\n2\n")
    with pytest.raises(InputError, match="TOY_node_labels.txt: 2 lines but there are 8 nodes"):
        read_tu(tmp_path / "short")


def test_folder_of_edge_lists(tmp_path: Path) -> None:
    folder = tmp_path / "many"
    folder.mkdir()
    (folder / "b.csv").write_text("0,1\n1,2\n")
    (folder / "a.txt").write_text("0 1 0.5\n")
    (folder / "notes.md").write_text("not a graph\n")
    coll = read_collection(folder)
    assert coll.labels is None and len(coll) == 2
    assert [Path(g.name).name for g in coll] == ["a.txt", "b.csv"]
    assert coll[0].edge_data["weight"].tolist() == [0.5] and coll[1].n_edges == 2
    empty = tmp_path / "none"
    empty.mkdir()
    with pytest.raises(InputError, match="no edge-list file here"):
        read_edge_list_folder(empty)
    with pytest.raises(InputError, match="not a folder"):
        read_collection(tmp_path / "absent")


def test_a_collection_names_its_graphs_without_changing_them():
    from dataclasses import fields

    from chitally.graph_data import GraphData
    from chitally.graph_sources import graph_collection

    g = GraphData.from_edges([[0, 1], [1, 2]], 4, node_data={"h": [1.0, 2.0, 3.0, 4.0]},
                             edge_data={"w": [0.5, 1.5]}, label="a", name="first")
    col = graph_collection([g, g.named("second")], names=["x", "first"])
    assert [h.name for h in col.graphs] == ["x", "first"]
    assert col.graphs[1] is not g and g.named("first") is g
    for h in col.graphs:
        # every field but the name is the very object of the graph given
        assert all(getattr(h, f.name) is getattr(g, f.name) for f in fields(GraphData) if f.name != "name")
