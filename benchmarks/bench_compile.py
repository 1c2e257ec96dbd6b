"""Cold compile time of the kernels a first in-process run needs, old code against new.

Every measurement is a fresh subprocess whose numba cache is an empty temporary
directory (NUMBA_CACHE_DIR), so neither tree's own cache is used or touched. It imports
chitally, then calls euler_curve once on 50 points in R^dims, uncapped or capped at 3:
that first call is the compile (the count itself takes a millisecond). A second fresh
process on the same, now warm, cache gives the load time. The new tree is also measured
with warm_up(processes=2) before the call (the compile shared between two processes).

Wall and CPU seconds are printed (CPU of the process and of its children, the import
left out): on a shared machine the CPU seconds are the steadier figure.

Run:  python benchmarks/bench_compile.py [--baseline REV] [--dims 3] [--repeat 1]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import baseline

CHILD = r"""
import json, resource, sys, time
t0 = time.perf_counter()
import numpy as np
from chitally.inprocess import euler_curve
t1 = time.perf_counter()
c1 = time.process_time()
cap = None if sys.argv[1] == "none" else int(sys.argv[1])
dims, processes = int(sys.argv[2]), int(sys.argv[3])
if processes:
    from chitally.warmup import warm_up
    warm_up([cap], [dims], processes=processes)
points = np.random.default_rng(0).random((50, dims))
euler_curve(points, 0.5 * dims ** 0.5, cap, threads=1)
t2 = time.perf_counter()
children = resource.getrusage(resource.RUSAGE_CHILDREN)
cpu = time.process_time() - c1 + children.ru_utime + children.ru_stime
print(json.dumps({"import": t1 - t0, "wall": t2 - t1, "cpu": cpu}))
"""


def measure(src: Path, cache: Path, cap: str, dims: int, processes: int = 0) -> dict:
    env = dict(os.environ, PYTHONPATH=str(src), NUMBA_CACHE_DIR=str(cache))
    out = subprocess.run([sys.executable, "-c", CHILD, cap, str(dims), str(processes)], env=env,
                         check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def best(runs: list[dict]) -> dict:
    return min(runs, key=lambda r: r["cpu"])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--baseline", default=baseline.DEFAULT_REV, help="git revision of the old code")
    ap.add_argument("--dims", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=1, help="cold compiles per case (best CPU kept)")
    args = ap.parse_args()
    trees = {"old": baseline.export(args.baseline), "new": baseline.ROOT / "src"}
    print(f"points in R^{args.dims}; old = {args.baseline}; seconds (wall / CPU)")
    print(f"{'case':<28} {'cold compile':>18} {'warm load':>16}")
    rows = []
    for cap in ("none", "3"):
        for label, src, processes in (("old", trees["old"], 0), ("new", trees["new"], 0),
                                      ("new, warm_up 2 procs", trees["new"], 2)):
            cold, warm = [], []
            for _ in range(args.repeat):
                with tempfile.TemporaryDirectory() as cache:
                    cold.append(measure(src, Path(cache), cap, args.dims, processes))
                    warm.append(measure(src, Path(cache), cap, args.dims))
            c, w = best(cold), best(warm)
            name = f"cap {cap}, {label}"
            rows.append((name, c, w))
            print(f"{name:<28} {c['wall']:8.1f} /{c['cpu']:6.1f}   {w['wall']:7.2f} /{w['cpu']:5.2f}", flush=True)
    for cap in ("none", "3"):
        old = next(r for r in rows if r[0] == f"cap {cap}, old")[1]
        new = next(r for r in rows if r[0] == f"cap {cap}, new")[1]
        par = next(r for r in rows if r[0] == f"cap {cap}, new, warm_up 2 procs")[1]
        print(f"cap {cap}: new/old CPU {new['cpu'] / old['cpu']:.2f}, wall {new['wall'] / old['wall']:.2f}; "
              f"2 processes wall/old wall {par['wall'] / old['wall']:.2f}")


if __name__ == "__main__":
    main()
