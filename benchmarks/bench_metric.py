"""Did the metric choice slow the Euclidean path? And what do the other metrics cost?

Times `euler_curve` (uncapped, one thread) on points of the 4-sphere in R^5 with the
package as it was before the metric choice (`--before`, default cb5aabb, exported by
`baseline.export`) and with the working tree, each in a subprocess of its own, in
alternating rounds, in one run; the best time of each is reported with their ratio, and
the two curves must be identical. Then the working tree's Manhattan and Chebyshev times
on the same points. Wall time and the process's CPU time are both reported: on a shared
machine the CPU time (one thread) is the steadier of the two.

Run:  python benchmarks/bench_metric.py [--points 20000] [--eps 0.3] [--rounds 3]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

from baseline import ROOT, export

# one measurement, in a process of its own: a warm-up call loads (or compiles) the
# kernels, then `repeat` timed calls, the best kept
CHILD = r"""
import json, sys, time
import numpy as np
import chitally
from chitally import euler_curve

n, eps, repeat, metric = int(sys.argv[1]), float(sys.argv[2]), int(sys.argv[3]), sys.argv[4]
x = np.random.default_rng(0).standard_normal((n, 5))
x /= np.linalg.norm(x, axis=1)[:, None]
kw = {} if metric == "-" else {"metric": metric}
euler_curve(x[:2000], eps, None, threads=1, **kw)
best, cpu = float("inf"), float("inf")
for _ in range(repeat):
    t0, c0 = time.perf_counter(), time.process_time()
    curve = euler_curve(x, eps, None, threads=1, **kw)
    best, cpu = min(best, time.perf_counter() - t0), min(cpu, time.process_time() - c0)
print(json.dumps({"seconds": best, "cpu": cpu, "digest": curve.digest(), "jumps": curve.n_jumps,
                  "where": chitally.__file__}))
"""


def measure(path: Path, n: int, eps: float, repeat: int, metric: str) -> dict:
    env = dict(os.environ, PYTHONPATH=str(path))
    out = subprocess.run([sys.executable, "-c", CHILD, str(n), str(eps), str(repeat), metric],
                         env=env, check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=20000)
    ap.add_argument("--eps", type=float, default=0.3)
    ap.add_argument("--rounds", type=int, default=3, help="alternating before/after subprocesses")
    ap.add_argument("--repeat", type=int, default=2, help="timed calls per subprocess (best kept)")
    ap.add_argument("--before", default="cb5aabb", help="git revision before the metric choice")
    args = ap.parse_args()

    before_path, after_path = export(args.before), ROOT / "src"
    times: dict[str, list[float]] = {"before": [], "after": []}
    cpu: dict[str, list[float]] = {"before": [], "after": []}
    digests = {}
    for r in range(args.rounds):
        for label, path, metric in (("before", before_path, "-"), ("after", after_path, "euclidean")):
            got = measure(path, args.points, args.eps, args.repeat, metric)
            assert Path(got["where"]).resolve().is_relative_to(path.resolve()), got["where"]
            times[label].append(got["seconds"])
            cpu[label].append(got["cpu"])
            digests[label] = got["digest"]
            print(f"round {r + 1} {label:>6}: {got['seconds']:.3f} s wall, {got['cpu']:.3f} s CPU "
                  f"({got['jumps']} jumps)", flush=True)
    assert digests["before"] == digests["after"], "the Euclidean curve changed"
    print(f"euclidean, {args.points} points of S^4, eps {args.eps}, uncapped, 1 thread "
          f"(best of {args.rounds} x {args.repeat}):")
    for what, t in (("wall", times), ("CPU", cpu)):
        b, a = min(t["before"]), min(t["after"])
        print(f"  {what:>4}: before {b:.3f} s, after {a:.3f} s, after/before {a / b:.3f}")
    for metric in ("manhattan", "chebyshev"):
        got = measure(after_path, args.points, args.eps, args.repeat, metric)
        print(f"{metric}: {got['seconds']:.3f} s wall, {got['cpu']:.3f} s CPU ({got['jumps']} jumps)")


if __name__ == "__main__":
    main()
