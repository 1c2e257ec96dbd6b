"""Graphs on the engine: the `graph` job kind (one large graph over vertex ranges), the
`batch` kind over collections of graphs, `feature_matrix`/`CurveFeatures` with graphs,
and the `chitally graph` / `chitally batch` commands.

Every curve and row is checked against something outside the engine: networkx's clique
listing simplex by simplex (tests/graph_references.py, brute force), and the in-process
`graph_curve` that tests/test_graphs.py checks against networkx and gudhi. Classifier
figures are cross-validated accuracies on random-graph models of our own choice.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
from graph_references import brute_force_jumps, curve_of, edge_value_map

from chitally import engine
from chitally.execute import SerialExecutor
from chitally.features import CurveFeatures, feature_matrix
from chitally.graph_data import as_graph
from chitally.graph_sources import read_tu
from chitally.graphs import filtered_graph, graph_curve
from chitally.jobs.batch import GraphBatchParams, create_or_open_graphs
from chitally.jobs.graph import (
    GraphParams,
    create_or_open,
    graph_run,
    split_ranges,
    vertex_costs,
)
from chitally.runs import Where, execute, open_run, run, status
from chitally.sources import InputError

# ------------------------------------------------------------------------ helpers


def random_graph(n: int, p: float, seed: int) -> nx.Graph:
    return nx.gnp_random_graph(n, p, seed=seed)


def edges_of(G: nx.Graph) -> np.ndarray:
    return np.array(list(G.edges), dtype=np.int64).reshape(-1, 2)


def min_zero(n: int, edges: np.ndarray, w: np.ndarray) -> np.ndarray:
    """The documented default vertex values of an edge filtration, written out:
    min(0, least weight of an edge at the vertex)."""
    out = np.zeros(n)
    for (u, v), x in zip(edges, w):
        out[u] = min(out[u], x)
        out[v] = min(out[v], x)
    return out


def brute_curve(G: nx.Graph, f: np.ndarray, w: np.ndarray | None, cap, threshold=None):
    """networkx enumerate_all_cliques (brute force): every clique valued by its largest
    vertex and edge value, on the domain [min f, threshold or largest value]."""
    n = G.number_of_nodes()
    edges = edges_of(G)
    ev = edge_value_map(edges, f, w)
    vals, jumps = brute_force_jumps(n, edges, f, ev, cap, threshold)
    top = threshold if threshold is not None else max([float(f.max())] + list(ev.values()))
    kept = f[f <= top] if threshold is not None else f
    return curve_of(vals, jumps, start=min(float(f.min()), top), eps=top, max_dim=cap, n_points=int(kept.size))


def brute_rows(G: nx.Graph, f: np.ndarray, w: np.ndarray | None, cap, grid, threshold=None) -> np.ndarray:
    """networkx brute force: the Euler characteristic of the cliques of value <= t."""
    edges = edges_of(G)
    vals, jumps = brute_force_jumps(G.number_of_nodes(), edges, f, edge_value_map(edges, f, w), cap, threshold)
    vals, jumps = np.asarray(vals), np.asarray(jumps, dtype=np.int64)
    return np.array([int(jumps[vals <= t].sum()) for t in grid], dtype=np.int64)


def degrees(G: nx.Graph) -> np.ndarray:
    return np.array([G.degree(v) for v in range(G.number_of_nodes())], dtype=np.float64)


class FailOn:
    """A task function for the executors: fails the chosen tasks, runs the engine's
    `run_task` for the others, and records every task it is called for."""

    def __init__(self, fail=()):
        self.fail = set(fail)
        self.calls: list[int] = []

    def __call__(self, store, task, attempt, *, threads=1):
        self.calls.append(task)
        if task in self.fail:
            raise RuntimeError(f"injected failure in task {task}")
        return engine.run_task(store, task, attempt, threads=threads)


def cli(*args, cwd=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "chitally.cli", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout)


# --------------------------------------------------------------- one graph, many tasks


CASES = [
    # (graph seed, kind of filtration, cap)
    (1, "degree", None), (2, "degree", 3), (3, "ties", None), (4, "ties", 2),
    (5, "weights", None), (6, "weights", 3), (7, "superlevel", None), (8, "weights", 1),
]


def filtration_case(seed: int, kind: str):
    """A random graph, `graph_curve` keyword arguments, and the filtration's values
    written out (vertex values f, edge weights w or None) for the brute force."""
    G = random_graph(45 + seed, 0.18, seed)
    n = G.number_of_nodes()
    rng = np.random.default_rng(seed)
    if kind == "degree":
        return G, {}, degrees(G), None, None
    if kind == "ties":
        f = rng.integers(-2, 3, n).astype(np.float64)
        return G, {"values": f}, f, None, None
    if kind == "weights":
        w = rng.integers(-1, 6, G.number_of_edges()).astype(np.float64)  # ties and negatives
        return G, {"weights": w}, min_zero(n, edges_of(G), w), w, None
    f = rng.random(n)
    # superlevel at threshold 0.3: the sublevel filtration of -f, cut at -0.3
    return G, {"values": f, "superlevel": True, "threshold": 0.3}, -f, None, -0.3


@pytest.mark.parametrize(("seed", "kind", "cap"), CASES)
@pytest.mark.parametrize("tasks", [1, 4, 11, 1000])
def test_graph_run_equals_in_process_and_networkx(tmp_path, seed, kind, cap, tasks):
    G, kwargs, f, w, thr = filtration_case(seed, kind)
    ref = graph_curve(G, max_dim=cap, **kwargs)
    # networkx enumerate_all_cliques, simplex by simplex (brute force)
    assert ref == brute_curve(G, f, w, cap, thr)
    curve = graph_run(G, str(tmp_path / "g.zarr"), Where(serial=True), max_dim=cap, tasks=tasks, **kwargs)
    assert curve == ref
    store = open_run(str(tmp_path / "g.zarr"))
    # a vertex heavier than a task's share makes one range of several shares
    assert store.kind == "graph" and 1 <= store.n_tasks <= min(tasks, G.number_of_nodes())
    assert store.n_tasks > 1 or tasks == 1
    # tasks own disjoint vertex ranges covering every vertex, heaviest first
    lo, hi = store.read_input("range_lo"), store.read_input("range_hi")
    assert min(lo.tolist()) == 0
    assert np.array_equal(np.sort(lo)[1:], np.sort(hi)[:-1]) and hi.max() == G.number_of_nodes()
    assert np.all(np.diff(store.task_cost()) <= 0)


def test_ranges_split_the_cost_about_evenly():
    # a hub among many small vertices: its range is the hub alone, the rest share evenly
    G = nx.barabasi_albert_graph(3000, 4, seed=3)
    fg = filtered_graph(G)
    costs = vertex_costs(fg)
    lo, hi = split_ranges(costs, 16)
    cum = np.concatenate([[0.0], np.cumsum(costs)])
    assert 8 <= lo.size <= 16 and lo[0] == 0 and hi[-1] == 3000 and np.array_equal(lo[1:], hi[:-1])
    # each range ends at the first vertex that takes it past its share of the total:
    # without its last vertex, a range costs less than a share
    assert np.all(cum[hi - 1] - cum[lo] < cum[-1] / 16)
    # lower degrees, the cost's input, counted with networkx's own adjacency
    d = degrees(G)
    lower = np.array([sum((d[u], u) < (d[v], v) for u in G.adj[v]) for v in range(3000)])
    assert np.array_equal(costs, 1.0 + lower.astype(float) ** 2)


def test_graph_run_on_two_worker_processes(tmp_path):
    G = random_graph(400, 0.04, 11)
    rng = np.random.default_rng(11)
    w = rng.random(G.number_of_edges())
    for kwargs, tasks in (({}, 5), ({"weights": w, "max_dim": 3}, 13)):
        ref = graph_curve(G, **kwargs)
        fg = filtered_graph(G, kwargs.get("values", "auto"), kwargs.get("weights"))
        store = create_or_open(str(tmp_path / f"g{tasks}.zarr"), fg,
                               GraphParams.checked(weights=kwargs.get("weights"), max_dim=kwargs.get("max_dim"),
                                                   tasks=tasks))
        report = run(store, Where(workers=2, threads=1))
        assert report.complete and report.computed == store.n_tasks > 1 and report.curve == ref


def test_failed_tasks_are_reported_then_only_they_are_computed(tmp_path):
    G = random_graph(120, 0.1, 5)
    ref = graph_curve(G, max_dim=4)
    fg = filtered_graph(G)
    store = create_or_open(str(tmp_path / "g.zarr"), fg, GraphParams.checked(max_dim=4, tasks=9))
    first = FailOn(fail={1, 6})
    report = execute(store, SerialExecutor(retries=1, task_function=first))
    n = store.n_tasks
    assert set(report.failed) == {1, 6} and not report.complete and report.done == n - 2
    assert "injected failure in task 6" in report.failed[6]
    assert first.calls.count(1) == 2 and first.calls.count(6) == 2  # one retry each
    info = status(store)
    assert (info["done"], info["failed"], info["complete"]) == (n - 2, 2, False)
    second = FailOn()
    report = execute(open_run(str(tmp_path / "g.zarr")), SerialExecutor(task_function=second))
    assert sorted(second.calls) == [1, 6] and report.computed == 2
    assert report.complete and report.result == ref
    # and a run on a complete store computes nothing
    assert run(open_run(str(tmp_path / "g.zarr")), Where(serial=True)).computed == 0


def test_other_graph_or_parameters_are_refused(tmp_path):
    from chitally.store import StoreMismatch

    G = random_graph(60, 0.1, 8)
    graph_run(G, str(tmp_path / "g.zarr"), Where(serial=True), max_dim=2)
    with pytest.raises(StoreMismatch):
        graph_run(G, str(tmp_path / "g.zarr"), Where(serial=True), max_dim=3)
    H = G.copy()
    H.add_edge(0, 59) if not H.has_edge(0, 59) else H.remove_edge(0, 59)
    with pytest.raises(StoreMismatch):
        graph_run(H, str(tmp_path / "g.zarr"), Where(serial=True), max_dim=2)


def test_empty_and_edgeless_graphs_run():
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        for k, (edges, n) in enumerate(((np.zeros((0, 2), int), 0), (np.zeros((0, 2), int), 5))):
            ref = graph_curve(edges, n=n)
            assert graph_run(edges, f"{tmp}/e{k}.zarr", Where(serial=True), n=n, tasks=3) == ref
            # closed form: n isolated vertices of degree 0 have chi = n
            assert ref.final == n


# --------------------------------------------------------- collections of graphs


def collection(seed: int, count: int = 14):
    rng = np.random.default_rng(seed)
    graphs = []
    for k in range(count):
        G = random_graph(int(rng.integers(1, 30)), float(rng.uniform(0.1, 0.6)), seed * 100 + k)
        for v in G.nodes:
            G.nodes[v]["h"] = float(rng.integers(-3, 4))
        for u, v in G.edges:
            G.edges[u, v]["w"] = float(rng.integers(0, 5))
        graphs.append(G)
    return graphs


SPECS = [
    ({}, None, np.arange(-1.0, 15.0, 1.0)),
    ({}, 2, np.arange(-1.0, 15.0, 1.0)),
    ({"values": "h"}, None, np.arange(-4.0, 5.0, 0.5)),
    ({"values": "h", "superlevel": True, "threshold": -1.0}, 3, np.arange(-4.0, 1.01, 0.5)),
    ({"weights": "w"}, None, np.arange(-1.0, 6.0, 1.0)),
    ({"weights": "w", "threshold": 3.0}, 2, np.arange(-1.0, 3.01, 0.5)),
]


def written_out(G: nx.Graph, options: dict):
    """The filtration's numbers written out from the graph's attributes."""
    n = G.number_of_nodes()
    if "weights" in options:
        w = np.array([G.edges[u, v]["w"] for u, v in edges_of(G)])
        return min_zero(n, edges_of(G), w), w
    f = degrees(G) if "values" not in options else np.array([G.nodes[v]["h"] for v in range(n)])
    return (-f if options.get("superlevel") else f), None


@pytest.mark.parametrize(("options", "cap", "grid"), SPECS)
def test_graph_feature_matrix_rows_are_the_curves_on_the_grid(tmp_path, options, cap, grid):
    graphs = collection(len(options) * 10 + (cap or 0))
    fm = feature_matrix(graphs, grid=grid, max_dim=cap, **options)
    engine_fm = feature_matrix(graphs, grid=grid, max_dim=cap, store=str(tmp_path / "fm.zarr"),
                               where=Where(serial=True), **options)
    assert engine_fm == fm and fm.values.dtype == np.int64 and fm.names == tuple(map(str, range(len(graphs))))
    thr = options.get("threshold")
    end = None if thr is None else (-thr if options.get("superlevel") else thr)
    for G, row in zip(graphs, fm.values):
        f, w = written_out(G, options)
        # networkx brute force: chi of the cliques of value <= t, at every grid point
        assert np.array_equal(row, brute_rows(G, f, w, cap, grid, end))
        # inside the graph's domain, the row is graph_curve's samples
        c = graph_curve(G, max_dim=cap, **options)
        inside = (grid >= c.start) & (grid <= c.eps)
        assert np.array_equal(row[inside], c.sample(grid[inside]))
        assert np.all(row[grid < c.start] == 0)  # below the domain: the empty complex
        if end is None:
            assert np.all(row[grid > c.eps] == c.final)


@pytest.mark.parametrize("values", ["degree", "closeness", "heat:0.5"])
def test_rows_do_not_depend_on_how_many_graphs_are_counted_together(monkeypatch, values):
    from chitally.jobs import batch

    graphs = collection(5, count=12)
    grid = np.linspace(-1.0, 12.0, 27) if values == "degree" else np.linspace(-0.1, 1.1, 25)
    together = feature_matrix(graphs, grid=grid, values=values, threads=1)
    monkeypatch.setattr(batch, "_UNION_ENTRIES", 40)  # a few graphs at a time, or one
    apart = feature_matrix(graphs, grid=grid, values=values, threads=1)
    assert apart == together
    for G, row in zip(graphs, together.values):
        # each graph alone, in process (checked against networkx and gudhi in test_graphs.py)
        c = graph_curve(G, values=values)
        inside = (grid >= c.start) & (grid <= c.eps)
        assert np.array_equal(row[inside], c.sample(grid[inside]))
        assert np.all(row[grid < c.start] == 0) and np.all(row[grid > c.eps] == c.final)


def test_normalised_graph_rows_divide_by_vertices_and_labels_travel(tmp_path):
    graphs = collection(3, count=6)
    grid = [0.0, 2.0, 4.0]
    counts = feature_matrix(graphs, grid=grid, labels=list("ababab"))
    norm = feature_matrix(graphs, grid=grid, normalise=True, labels=list("ababab"),
                          store=str(tmp_path / "n.zarr"), where=Where(serial=True))
    sizes = np.array([G.number_of_nodes() for G in graphs])
    assert np.array_equal(norm.values, counts.values / sizes[:, None]) and norm.values.dtype == np.float64
    assert norm.labels == counts.labels == tuple("ababab") and np.array_equal(norm.sizes, sizes)


def test_edge_arrays_and_sparse_matrices_are_graphs():
    import scipy.sparse as sp

    rng = np.random.default_rng(4)
    graphs = [random_graph(12, 0.4, s) for s in range(4)]
    grid = np.arange(0.0, 9.0)
    ref = feature_matrix(graphs, grid=grid)
    arrays = [edges_of(G) for G in graphs]
    # an edge array alone has no vertices beyond its largest id: give every graph its n
    assert all(a.max() == G.number_of_nodes() - 1 for a, G in zip(arrays, graphs) if a.size)
    assert feature_matrix(arrays, grid=grid).values.tolist() == ref.values.tolist()
    assert feature_matrix(arrays, grid=grid, graphs=True).values.tolist() == ref.values.tolist()
    mats = [sp.csr_matrix(nx.to_scipy_sparse_array(G, nodelist=range(12), weight=None)) for G in graphs]
    assert feature_matrix(mats, grid=grid).values.tolist() == ref.values.tolist()
    for G in graphs:
        for u, v in G.edges:
            G.edges[u, v]["w"] = float(rng.random())
    w = [sp.csr_matrix(nx.to_scipy_sparse_array(G, nodelist=range(12), weight="w")) for G in graphs]
    # with weights, every row is graph_curve's of the same sparse matrix (flag filtration)
    g2 = np.linspace(0.0, 2.0, 9)
    fm = feature_matrix(w, grid=g2, weights="weight")
    for m, row in zip(w, fm.values):
        c = graph_curve(m, weights="weight")
        inside = (g2 >= c.start) & (g2 <= c.eps)
        assert np.array_equal(row[inside], c.sample(g2[inside]))


@pytest.mark.parametrize(("call", "message"), [
    (lambda g: feature_matrix(g, 0.5, [0.0]), "eps is the largest scale of point clouds"),
    (lambda g: feature_matrix(g, grid=[0.0, 3.0], threshold=2.0), "lies above the end 2.0"),
    (lambda g: feature_matrix(g, grid=[0.0, 1.0], values="nope"), "'nope'"),
    (lambda g: feature_matrix(g, grid=[0.0, 1.0], weights="nope"), "no such edge attribute"),
    (lambda g: feature_matrix(g, grid=[1.0, 0.0]), "strictly increasing"),
    (lambda g: feature_matrix(g, grid=[0.0], values=np.zeros(3)), "a name"),
    (lambda g: feature_matrix([np.zeros((3, 2))], 0.5, [0.0], values="degree"), "applies to graphs"),
    (lambda g: feature_matrix([], grid=[0.0], graphs=True), "no graphs"),
])
def test_bad_graph_collections_are_refused_in_one_line(call, message):
    graphs = collection(1, count=3)
    with pytest.raises(InputError) as err:
        call(graphs)
    assert message in str(err.value) and "\n" not in str(err.value)


def test_batch_of_graphs_resumes_only_the_failed_tasks(tmp_path):
    graphs = collection(9, count=40)
    grid = np.arange(0.0, 12.0)
    ref = feature_matrix(graphs, grid=grid, max_dim=3)
    from chitally.graph_sources import graph_collection
    from chitally.jobs.batch import graph_cost

    total = sum(graph_cost(as_graph(G)) for G in graphs)
    params = GraphBatchParams.checked(grid, max_dim=3, task_cost=total / 8)
    store = create_or_open_graphs(str(tmp_path / "b.zarr"), graph_collection(graphs), params)
    assert 3 < store.n_tasks < 20  # graphs are grouped
    first = FailOn(fail={0, 2})
    report = execute(store, SerialExecutor(retries=0, task_function=first))
    assert set(report.failed) == {0, 2} and not report.complete
    second = FailOn()
    report = execute(open_run(str(tmp_path / "b.zarr")), SerialExecutor(task_function=second))
    assert sorted(second.calls) == [0, 2] and report.result == ref


# ---------------------------------------------------------------- classification


def three_models(per_model: int, seed: int):
    """Erdős–Rényi G(n, 6/(n-1)), Watts–Strogatz (k = 6, rewiring 0.2) and
    Barabási–Albert (m = 3): mean degree about 6 each, n from 60 to 120 vertices."""
    rng = np.random.default_rng(seed)
    graphs, labels = [], []
    for _ in range(per_model):
        for label in range(3):
            n, s = int(rng.integers(60, 121)), int(rng.integers(2**31))
            if label == 0:
                G = nx.gnp_random_graph(n, 6 / (n - 1), seed=s)
            elif label == 1:
                G = nx.watts_strogatz_graph(n, 6, 0.2, seed=s)
            else:
                G = nx.barabasi_albert_graph(n, 3, seed=s)
            graphs.append(G)
            labels.append(label)
    return graphs, np.array(labels)


def test_classifier_tells_three_random_graph_models_apart():
    from sklearn.model_selection import StratifiedKFold, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    graphs, labels = three_models(40, seed=0)
    mean_degree = np.array([2 * G.number_of_edges() / G.number_of_nodes() for G in graphs])
    for label in range(3):  # the models are matched on mean degree, so it cannot tell them apart
        assert abs(mean_degree[labels == label].mean() - 6.0) < 0.5
    model = make_pipeline(CurveFeatures(grid="0:24:25", normalise=True), StandardScaler(), SVC())
    acc = cross_val_score(model, graphs, labels, cv=StratifiedKFold(5, shuffle=True, random_state=0))
    # chance is 1/3; with 120 graphs the standard error of an accuracy at chance is
    # sqrt(1/3 * 2/3 / 120) = 0.043, so 0.9 is 13 of them above it
    assert acc.mean() > 0.9


def test_curve_features_takes_graphs_and_clouds_need_eps():
    from sklearn.base import clone

    graphs = collection(2, count=5)
    tf = CurveFeatures(grid="0:8:9")
    assert clone(tf).get_params() == tf.get_params()
    X = tf.fit(graphs).transform(graphs)
    assert X.dtype == np.float64 and X.tolist() == feature_matrix(graphs, grid=np.arange(9.0)).values.tolist()
    with pytest.raises(InputError, match="eps is required"):
        CurveFeatures(grid="0:1:3", graphs=False).fit([np.zeros((2, 2))])
    with pytest.raises(InputError, match="applies to graphs"):
        CurveFeatures(eps=1.0, grid="0:1:3", values="closeness").fit([np.zeros((2, 2))])


# ------------------------------------------------------------------------- the CLI


def write_tu(folder: Path, graphs: list[nx.Graph], labels: list[int], name: str = "TOY") -> None:
    """The benchmark folder layout, written here: 1-based node ids over the collection."""
    folder.mkdir()
    a, indicator = [], []
    base = 0
    for k, G in enumerate(graphs):
        for u, v in G.edges:
            a.append(f"{base + u + 1}, {base + v + 1}")
            a.append(f"{base + v + 1}, {base + u + 1}")  # both directions, as such files list them
        indicator += [str(k + 1)] * G.number_of_nodes()
        base += G.number_of_nodes()
    (folder / f"{name}_A.txt").write_text("\n".join(a) + "\n")
    (folder / f"{name}_graph_indicator.txt").write_text("\n".join(indicator) + "\n")
    (folder / f"{name}_graph_labels.txt").write_text("\n".join(map(str, labels)) + "\n")


def test_cli_batch_reads_a_graph_folder_with_its_labels(tmp_path):
    graphs = [nx.cycle_graph(5), nx.complete_graph(4), nx.path_graph(6), nx.star_graph(4),
              nx.petersen_graph(), random_graph(15, 0.3, 2)]
    labels = [1, 2, 1, 2, -1, 1]
    write_tu(tmp_path / "toy", graphs, labels)
    run_store = tmp_path / "run.zarr"
    res = cli("batch", tmp_path / "toy", "--grid", "0:6:7", "--out", run_store, "--serial", "--no-progress")
    assert res.returncode == 0, res.stderr
    assert "6 graphs" in res.stderr and "with labels" in res.stderr
    res = cli("export", run_store, "--out", tmp_path / "m.csv")
    assert res.returncode == 0, res.stderr
    lines = (tmp_path / "m.csv").read_text().splitlines()
    assert lines[0] == "name,label," + ",".join(f"chi({float(t)!r})" for t in range(7))
    grid = np.arange(7.0)
    for k, (G, line) in enumerate(zip(graphs, lines[1:])):
        cells = line.split(",")
        assert cells[:2] == [f"TOY[{k}]", str(labels[k])]
        # networkx brute force on the degree filtration
        assert [int(x) for x in cells[2:]] == brute_rows(G, degrees(G), None, None, grid).tolist()
    # the same folder read in Python carries the labels too
    fm = feature_matrix(read_tu(tmp_path / "toy"), grid=grid)
    assert fm.labels == tuple(labels) and fm.values.tolist() == [[int(x) for x in r.split(",")[2:]] for r in lines[1:]]
    res = cli("status", run_store)
    assert res.returncode == 0 and "(batch)" in res.stdout and "complete: True" in res.stdout


def test_cli_batch_edge_list_folder_and_bad_options(tmp_path):
    folder = tmp_path / "lists"
    folder.mkdir()
    graphs = [random_graph(10, 0.4, s) for s in range(3)]
    for k, G in enumerate(graphs):
        (folder / f"g{k}.csv").write_text("".join(f"{u},{v},{(u + v) % 3}\n" for u, v in G.edges))
    (tmp_path / "labels.csv").write_text("name,label\ng0,x\ng1,y\ng2,x\n")
    out = tmp_path / "b.zarr"
    res = cli("batch", folder, "--graphs", "--weights", "weight", "--grid", "0:2:3", "--labels",
              tmp_path / "labels.csv", "--out", out, "--serial", "--no-progress")
    assert res.returncode == 0, res.stderr
    fm = open_run(str(out))
    from chitally.runs import read_result

    m = read_result(fm)
    assert m.names == ("g0", "g1", "g2") and m.labels == ("x", "y", "x")
    for G, row in zip(graphs, m.values):
        w = np.array([(u + v) % 3 for u, v in edges_of(G)], dtype=float)
        # networkx brute force on the flag filtration of the weights
        assert row.tolist() == brute_rows(G, min_zero(10, edges_of(G), w), w, None, [0, 1, 2]).tolist()
    for bad in (["--eps", 1.0], ["--threshold", 1.0], ["--values", "nope"]):
        res = cli("batch", folder, "--graphs", "--grid", "0:2:3", *bad, "--out", tmp_path / "x.zarr", "--serial")
        assert res.returncode == 2 and res.stderr.count("\n") == 1, res.stderr
        assert not (tmp_path / "x.zarr").exists()


def test_cli_graph_in_process_and_on_the_engine(tmp_path):
    G = random_graph(150, 0.06, 12)
    rng = np.random.default_rng(12)
    w = rng.integers(0, 7, G.number_of_edges())
    (tmp_path / "g.edges").write_text("".join(f"{u} {v} {x}\n" for (u, v), x in zip(edges_of(G), w)))
    np.save(tmp_path / "f.npy", rng.random(150))
    grid = "0:7:8"
    ref = graph_curve(G, weights=w.astype(float), max_dim=3)
    res = cli("graph", tmp_path / "g.edges", "--weights", "weight", "--max-dim", 3, "--out", tmp_path / "c.json")
    assert res.returncode == 0, res.stderr
    from chitally import Curve

    assert Curve.load(tmp_path / "c.json") == ref
    res = cli("graph", tmp_path / "g.edges", "--weights", "weight", "--max-dim", 3, "--grid", grid,
              "--run", tmp_path / "g.zarr", "--tasks", 6, "--serial", "--no-progress")
    assert res.returncode == 0, res.stderr
    samples = [line.split(",") for line in res.stdout.splitlines()[1:]]
    # networkx brute force (the grid passes the largest weight, 6: the whole complex there)
    wf = w.astype(float)
    expected = brute_rows(G, min_zero(150, edges_of(G), wf), wf, 3, np.linspace(0, 7, 8))
    assert [int(v) for _, v in samples] == expected.tolist()
    assert open_run(str(tmp_path / "g.zarr")).n_tasks == 6
    res = cli("export", tmp_path / "g.zarr", "--out", tmp_path / "e.json")
    assert res.returncode == 0 and Curve.load(tmp_path / "e.json") == ref
    # vertex values from a file, superlevel; a grid below the domain reads 0
    f = np.load(tmp_path / "f.npy")
    res = cli("graph", tmp_path / "g.edges", "--values", tmp_path / "f.npy", "--superlevel", "--grid=-2:0:5")
    assert res.returncode == 0, res.stderr
    got = [int(line.split(",")[1]) for line in res.stdout.splitlines()[1:]]
    # networkx brute force on -f
    assert got == brute_rows(G, -f, None, None, np.linspace(-2, 0, 5)).tolist()
    for bad in (["--weights", "nope"], ["--values", "nope"], ["--tasks", 3], ["--max-dim", -1]):
        res = cli("graph", tmp_path / "g.edges", *bad)
        assert res.returncode == 2 and res.stderr.count("\n") == 1, res.stderr


def test_cli_graph_distance_matrix_equals_the_matrix_curve(tmp_path):
    rng = np.random.default_rng(3)
    pts = rng.random((40, 2))
    D = np.sqrt(((pts[:, None, :] - pts[None, :, :]) ** 2).sum(-1))
    np.save(tmp_path / "d.npy", D)
    from chitally import Curve
    from chitally.graphs import matrix_curve

    ref = matrix_curve(D, 0.3)
    res = cli("graph", tmp_path / "d.npy", "--threshold", 0.3, "--run", tmp_path / "d.zarr", "--tasks", 4,
              "--serial", "--no-progress", "--out", tmp_path / "d.json")
    assert res.returncode == 0, res.stderr
    assert Curve.load(tmp_path / "d.json") == ref
    res = cli("graph", tmp_path / "d.npy")
    assert res.returncode == 2 and "--threshold" in res.stderr
    info = json.loads(cli("status", tmp_path / "d.zarr", "--json").stdout)
    assert info["kind"] == "graph" and info["complete"]
