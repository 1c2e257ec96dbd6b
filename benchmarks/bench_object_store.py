"""A run store on a local S3-compatible server against one on a local path, same input,
in one script.

Starts moto in server mode on 127.0.0.1 (a separate process speaking HTTP; its request
log is counted), then for each location:

1. creates the run store (plan + inputs written),
2. runs every task with the serial executor (no Dask in the way): per-task overhead =
   wall time per task minus the task function's own time as the commit records hold it
   (which includes reading the task's rows from the store); requests per task on the
   object store,
3. runs the same job again on a fresh store with a 2-worker LocalCluster (cluster start
   included): the run's total time.

The local S3 server answers a GET in tens of milliseconds (its HTTP server, not the
network): real object stores differ, but the request count per task carries over.

Run:  python benchmarks/bench_object_store.py [--points 4000] [--eps 0.04] [--task-cost 20000]
Needs the test extra (moto[server], s3fs).
"""

from __future__ import annotations

import argparse
import re
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from chitally import euler_curve
from chitally.jobs.cloud import Params, create_or_open, read_curve
from chitally.runs import Where, run, status

_REQUEST = re.compile(r'"(GET|PUT|HEAD|DELETE|POST) ')


class Server:
    """moto's S3 server on 127.0.0.1, its request log in a file."""

    def __init__(self, folder: Path) -> None:
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.log = folder / "moto.log"
        self._log = open(self.log, "wb")
        self.proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1",
                                      "-p", str(self.port)], stdout=self._log, stderr=self._log)
        deadline = time.monotonic() + 60
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.5).close()
                break
            except OSError:
                if time.monotonic() > deadline:
                    raise RuntimeError("the S3 server did not start")
                time.sleep(0.1)
        self.options = {"key": "bench", "secret": "bench", "endpoint_url": f"http://127.0.0.1:{self.port}"}
        import s3fs

        s3fs.S3FileSystem(skip_instance_cache=True, **self.options).mkdir("bench")

    def requests(self) -> int:
        self._log.flush()
        return sum(1 for line in self.log.read_text(errors="replace").splitlines() if _REQUEST.search(line))

    def close(self) -> None:
        self.proc.kill()
        self.proc.wait()
        self._log.close()


def measure(name: str, url: str, url2: str, points: np.ndarray, params: Params,
            options: dict | None, server: Server | None) -> dict:
    r0 = server.requests() if server else 0
    t0 = time.perf_counter()
    store = create_or_open(url, points, params, storage_options=options)
    create = time.perf_counter() - t0
    r1 = server.requests() if server else 0
    t0 = time.perf_counter()
    report = run(store, Where(serial=True))
    serial = time.perf_counter() - t0
    r2 = server.requests() if server else 0
    task_fn = status(store)["task_seconds"]  # the task function: its reads and the kernel
    curve = read_curve(store)
    store2 = create_or_open(url2, points, params, storage_options=options)
    t0 = time.perf_counter()
    report2 = run(store2, Where(workers=2, threads=1))
    dask_total = time.perf_counter() - t0
    assert report.complete and report2.complete
    n = store.n_tasks
    return {"name": name, "tasks": n, "create_s": create, "serial_s": serial, "task_fn_s": task_fn,
            "overhead_ms": 1000 * (serial - task_fn) / n, "dask_s": dask_total,
            "create_requests": r1 - r0, "requests_per_task": (r2 - r1) / n if server else None,
            "curve": curve, "curve2": read_curve(store2)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=4000)
    ap.add_argument("--eps", type=float, default=0.04)
    ap.add_argument("--task-cost", type=float, default=20000)
    args = ap.parse_args()
    points = np.random.default_rng(3).random((args.points, 2))
    params = Params.checked(args.eps, None, None, args.task_cost)
    reference = euler_curve(points, args.eps)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        server = Server(tmp)
        try:
            rows = [measure("local path", str(tmp / "a.run"), str(tmp / "b.run"), points, params, None, None),
                    measure("S3 (local moto server)", "s3://bench/a.run", "s3://bench/b.run", points,
                            params, server.options, server)]
        finally:
            server.close()
    for row in rows:
        assert row["curve"] == reference and row["curve2"] == reference, row["name"]
    print(f"{args.points} points in R^2, eps {args.eps}, {rows[0]['tasks']} tasks; curves identical "
          "to euler_curve in every run")
    print(f"{'store':<24}{'create s':>10}{'serial s':>10}{'task fn s':>10}{'overhead/task':>15}"
          f"{'requests/task':>15}{'2-worker run s':>16}")
    for r in rows:
        req = "-" if r["requests_per_task"] is None else f"{r['requests_per_task']:.0f}"
        print(f"{r['name']:<24}{r['create_s']:>10.2f}{r['serial_s']:>10.2f}{r['task_fn_s']:>10.2f}"
              f"{r['overhead_ms']:>12.0f} ms{req:>15}{r['dask_s']:>16.2f}")
    a, b = rows
    print(f"object store / local path: serial {b['serial_s'] / a['serial_s']:.1f}x, "
          f"2-worker run {b['dask_s'] / a['dask_s']:.1f}x, per-task overhead "
          f"{b['overhead_ms'] - a['overhead_ms']:.0f} ms more; store creation used "
          f"{b['create_requests']} requests")


if __name__ == "__main__":
    main()
