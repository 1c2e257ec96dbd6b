"""Graphs side by side: feature matrices of many graphs, and one large graph over tasks.

(a) Many graphs: 10,000 random graphs G(n, m) of our own (n uniform in 100..500, mean
    degree uniform in 5..20), degree filtration (lower star), uncapped, sampled on the
    integer scales 0..48:

    1. chitally `feature_matrix` in process (threads over groups of graphs);
    2. the same on the embedded default (a 2-worker LocalCluster through a run store:
       start, store, planning, tasks and reduction included);
    3. the gudhi route on a sample of the graphs, scaled to all of them: a SimplexTree
       with every vertex inserted at its degree and every edge at the larger degree of
       its ends (one `insert` a simplex, and also `insert_batch`), `expansion` to a
       dimension above the largest clique (n), every simplex read out into a curve,
       sampled on the grid. Timed before and after chitally's in-process runs (the
       machine may be shared): the mean of both passes is scaled.

    Every sampled row is checked against gudhi's, and the engine's matrix against the
    in-process one.

(b) One large graph: a random geometric graph of our own (N points uniform in the unit
    square, joined within the radius that gives mean degree 20: about 10 N edges;
    vertices numbered along rows of cells of that radius, so a range of vertices is a
    strip of the square and its halo a little wider), degree filtration capped at 3:
    time and peak memory in process (`graph_curve`) and on a 2-worker LocalCluster (the
    `graph` kind; driver peak RSS, and the largest worker peak RSS read from the workers
    when the last task is done). Each measurement runs in a fresh process that loads the
    edges from disk; peaks are VmHWM.

Run:

    python benchmarks/bench_graphs.py                     # both parts, full size
    python benchmarks/bench_graphs.py --part a --graphs 2000 --sample 40
    python benchmarks/bench_graphs.py --part b --vertices 250000
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

# ----------------------------------------------------------------------- (a)


def random_graphs(count: int, seed: int = 0) -> list:
    """G(n, m) graphs: n uniform in 100..500, m = n * d / 2 for d uniform in 5..20."""
    from chitally.graph_data import GraphData

    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        n = int(rng.integers(100, 501))
        m = round(n * rng.uniform(5, 20) / 2)
        keys = rng.choice(n * (n - 1) // 2, size=m, replace=False)
        # pair number -> (i, j), i < j, numbering the upper triangle row by row
        rows = np.arange(n, dtype=np.int64)
        first = rows * n - rows * (rows + 1) // 2
        i = np.searchsorted(first, keys, side="right") - 1
        j = keys - first[i] + i + 1
        out.append(GraphData.from_edges(np.stack([i, j], axis=1), n))
    return out


def gudhi_row(graph, grid: np.ndarray, batch: bool = False) -> np.ndarray:
    """The gudhi route: a SimplexTree of the vertices at their degrees and the edges at
    the larger degree of their ends (one insert each, or `insert_batch`), expanded to
    dimension n (above the largest clique), every simplex read out into a curve."""
    import gudhi

    deg = graph.degrees().astype(np.float64)
    st = gudhi.SimplexTree()
    if batch:
        st.insert_batch(np.arange(graph.n).reshape(1, -1), deg)
        if graph.n_edges:
            st.insert_batch(graph.edges.T, np.maximum(deg[graph.edges[:, 0]], deg[graph.edges[:, 1]]))
    else:
        for v in range(graph.n):
            st.insert([v], filtration=float(deg[v]))
        for u, v in graph.edges.tolist():
            st.insert([u, v], filtration=float(max(deg[u], deg[v])))
    st.expansion(graph.n)  # above the largest clique: every clique is a simplex
    values, jumps = [], []
    for simplex, value in st.get_simplices():
        values.append(value)
        jumps.append(1 if len(simplex) % 2 else -1)
    values, jumps = np.asarray(values), np.asarray(jumps, dtype=np.int64)
    order = np.argsort(values, kind="stable")
    cum = np.concatenate([[0], np.cumsum(jumps[order])])
    return cum[np.searchsorted(values[order], grid, side="right")]


def time_gudhi(graphs: list, grid: np.ndarray, batch: bool) -> tuple[float, list]:
    t0 = time.perf_counter()
    rows = [gudhi_row(g, grid, batch) for g in graphs]
    return (time.perf_counter() - t0) / len(graphs), rows


def part_a(args: argparse.Namespace) -> None:
    from chitally import feature_matrix
    from chitally.runs import Where, open_run

    t0 = time.perf_counter()
    graphs = random_graphs(args.graphs)
    t_make = time.perf_counter() - t0
    grid = np.arange(0.0, 49.0)
    feature_matrix(graphs[:4], grid=grid, threads=1)  # compile or load the kernels
    edges = sum(g.n_edges for g in graphs)
    vertices = sum(g.n for g in graphs)
    rng = np.random.default_rng(1)
    sample = [graphs[i] for i in rng.choice(args.graphs, args.sample, replace=False)]
    sample_ids = [graphs.index(g) for g in sample]

    # gudhi before and after chitally's in-process runs: the machine is shared, so the
    # two routes are timed close together and gudhi's time is the mean of both passes
    g_loop1, rows = time_gudhi(sample, grid, batch=False)
    g_batch1, rows_b = time_gudhi(sample, grid, batch=True)
    t0 = time.perf_counter()
    inproc1 = feature_matrix(graphs, grid=grid, threads=1)
    t_inproc1 = time.perf_counter() - t0
    t0 = time.perf_counter()
    inproc = feature_matrix(graphs, grid=grid)
    t_inproc = time.perf_counter() - t0
    g_loop2, _ = time_gudhi(sample, grid, batch=False)
    g_batch2, _ = time_gudhi(sample, grid, batch=True)
    g_loop, g_batch = (g_loop1 + g_loop2) / 2, (g_batch1 + g_batch2) / 2

    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-graphs-"))
    t0 = time.perf_counter()
    engine = feature_matrix(graphs, grid=grid, store=str(tmp / "fm.zarr"), where=Where(workers=2))
    t_engine = time.perf_counter() - t0
    store = open_run(str(tmp / "fm.zarr"))
    compute = sum(float(store.commits.record(t)["seconds"]) for t in range(store.n_tasks))
    n_tasks = store.n_tasks
    shutil.rmtree(tmp)

    same = all(np.array_equal(r, inproc.values[i]) and np.array_equal(rb, r)
               for r, rb, i in zip(rows, rows_b, sample_ids))
    best = min(t_inproc, t_inproc1)
    n = args.graphs
    print(f"(a) {n} graphs G(n, m), n 100..500, mean degree 5..20 ({vertices} vertices, "
          f"{edges} edges; made in {t_make:.1f} s), degree filtration, uncapped, {grid.size} scales")
    print(f"  chitally feature_matrix in process: one thread {t_inproc1:.2f} s ({1000 * t_inproc1 / n:.3f} ms a "
          f"graph), all threads {t_inproc:.2f} s")
    print(f"  chitally batch on the embedded 2-worker LocalCluster (start, store, tasks, reduce): "
          f"{t_engine:.1f} s ({n_tasks} tasks; {compute:.1f} s of task time)")
    print(f"  gudhi, {args.sample} graphs, timed before and after: insert loop {1000 * g_loop1:.2f} / "
          f"{1000 * g_loop2:.2f} ms a graph, insert_batch {1000 * g_batch1:.2f} / {1000 * g_batch2:.2f} ms a graph")
    print(f"  scaled to {n} graphs: gudhi insert loop {g_loop * n:.1f} s, insert_batch {g_batch * n:.1f} s")
    print(f"  ratio gudhi insert loop / chitally in process: {g_loop * n / best:.1f}x "
          f"(insert_batch: {g_batch * n / best:.1f}x); / the 2-worker run: {g_loop * n / t_engine:.1f}x")
    print(f"  rows identical to gudhi's on the sample: {same}; engine == in process: "
          f"{engine == inproc}; one thread == all threads: {inproc1 == inproc}")


# ----------------------------------------------------------------------- (b)


def geometric_graph(n: int, degree: float, seed: int = 0) -> np.ndarray:
    """Edges of a random geometric graph in the unit square (mean degree `degree`),
    vertices numbered along rows of cells (row by row, left to right)."""
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(seed)
    pts = rng.random((n, 2))
    r = float(np.sqrt(degree / (np.pi * n)))
    cells = np.floor(pts / r).astype(np.int64)
    pts = pts[np.lexsort((pts[:, 0], cells[:, 0], cells[:, 1]))]
    return cKDTree(pts).query_pairs(r, output_type="ndarray").astype(np.int64)


def peak_rss() -> int:
    """This process's peak resident set (VmHWM), in bytes. Not ru_maxrss: Linux keeps
    that across exec, so a process started by a large one would report its parent's."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


class WorkerPeaks:
    """Run events that read every worker's peak RSS once the last task is done, while
    the cluster is still up."""

    def __init__(self) -> None:
        self.conn = None
        self.left = 0
        self.peaks: dict = {}

    def on_connect(self, conn) -> None:
        self.conn = conn

    def on_pending(self, store, pending) -> None:
        self.left = len(pending)

    def task_started(self, task, attempt) -> None:
        pass

    def task_retry(self, task, attempt, message) -> None:
        pass

    def task_failed(self, task, message, attempts) -> None:
        pass

    def tick(self) -> None:
        pass

    def task_done(self, result) -> None:
        self.left -= 1
        if self.left == 0 and self.conn is not None:
            self.peaks = self.conn.client.run(peak_rss)


def child_inproc(edges_path: str, n: int, cap: int) -> dict:
    from chitally.graphs import graph_curve

    edges = np.load(edges_path)
    graph_curve(np.array([[0, 1], [1, 2], [0, 2]]), max_dim=cap)  # load the kernels
    base = peak_rss()
    t0 = time.perf_counter()
    curve = graph_curve(edges, n=n, max_dim=cap)
    return {"seconds": time.perf_counter() - t0, "peak": peak_rss(), "before": base,
            "digest": curve.digest(), "final": curve.final}


def child_engine(edges_path: str, n: int, cap: int, store: str) -> dict:
    from chitally.graphs import filtered_graph
    from chitally.jobs.graph import GraphParams, create_or_open
    from chitally.runs import Where, run

    edges = np.load(edges_path)
    base = peak_rss()
    t0 = time.perf_counter()
    fg = filtered_graph(edges, n=n)
    rs = create_or_open(store, fg, GraphParams.checked(max_dim=cap))
    t_plan = time.perf_counter() - t0
    del fg
    watch = WorkerPeaks()
    report = run(rs, Where(workers=2, threads=1), events=watch, on_pending=watch.on_pending,
                 on_connect=watch.on_connect)
    seconds = time.perf_counter() - t0
    records = [rs.commits.record(t) for t in range(rs.n_tasks)]
    return {"seconds": seconds, "plan_seconds": t_plan, "tasks": rs.n_tasks, "peak": peak_rss(),
            "before": base, "worker_peak": max(watch.peaks.values()),
            "task_seconds": sum(float(r["seconds"]) for r in records),
            "halo_vertices": rs.attrs["halo_vertices"], "digest": report.curve.digest(),
            "final": report.curve.final}


def part_b(args: argparse.Namespace) -> None:
    tmp = Path(tempfile.mkdtemp(prefix="chitally-bench-graph-"))
    try:
        t0 = time.perf_counter()
        edges = geometric_graph(args.vertices, 20.0)
        np.save(tmp / "edges.npy", edges)
        t_make = time.perf_counter() - t0
        m = edges.shape[0]
        del edges
        me = [sys.executable, __file__, "--child"]
        inproc = json.loads(subprocess.run(me + ["inproc", str(tmp / "edges.npy"), str(args.vertices), "3"],
                                           check=True, capture_output=True, text=True).stdout.splitlines()[-1])
        engine = json.loads(subprocess.run(me + ["engine", str(tmp / "edges.npy"), str(args.vertices), "3",
                                                 str(tmp / "g.zarr")],
                                           check=True, capture_output=True, text=True).stdout.splitlines()[-1])
        gib = 2.0**30
        print(f"(b) random geometric graph: {args.vertices} vertices, {m} edges (made in {t_make:.1f} s), "
              "degree filtration, max_dim 3")
        print(f"  in process (graph_curve): {inproc['seconds']:.1f} s, peak RSS {inproc['peak'] / gib:.2f} GiB "
              f"({inproc['before'] / gib:.2f} GiB with the edges loaded, before)")
        print(f"  2-worker LocalCluster (graph kind): {engine['seconds']:.1f} s in all ({engine['plan_seconds']:.1f} s "
              f"filtration, plan and store; {engine['tasks']} tasks, {engine['task_seconds']:.1f} s of task time; "
              f"halos {engine['halo_vertices'] / args.vertices:.2f} x the vertices)")
        print(f"    driver peak RSS {engine['peak'] / gib:.2f} GiB ({engine['before'] / gib:.2f} GiB with the edges "
              f"loaded); largest worker peak RSS {engine['worker_peak'] / gib:.2f} GiB")
        print(f"  same curve: {inproc['digest'] == engine['digest']} (chi at the end {inproc['final']})")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def main() -> None:
    if len(sys.argv) > 2 and sys.argv[1] == "--child":
        what, rest = sys.argv[2], sys.argv[3:]
        if what == "inproc":
            out = child_inproc(rest[0], int(rest[1]), int(rest[2]))
        else:
            out = child_engine(rest[0], int(rest[1]), int(rest[2]), rest[3])
        print(json.dumps(out))
        return
    ap = argparse.ArgumentParser()
    ap.add_argument("--part", choices=["a", "b", "all"], default="all")
    ap.add_argument("--graphs", type=int, default=10_000)
    ap.add_argument("--sample", type=int, default=300, help="graphs the gudhi route runs on")
    ap.add_argument("--vertices", type=int, default=1_000_000)
    args = ap.parse_args()
    os.environ.setdefault("PYTHONWARNINGS", "ignore")
    if args.part in ("a", "all"):
        part_a(args)
    if args.part in ("b", "all"):
        part_b(args)


if __name__ == "__main__":
    main()
