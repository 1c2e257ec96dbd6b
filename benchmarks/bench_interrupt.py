"""What the blocks cost and what they buy: the in-process curve in blocks (Ctrl-C within a
fraction of a second) against one compiled call per loop, on the same clouds in one run.

For every case three ways, best of 3 each, interleaved in turn (wall seconds, and CPU seconds of
the process, the steadier figure on a shared machine): the blocked kernel (the default),
the same code with one call per loop (count_jumps(blocks=False), as before blocks) and
the old code (the package at --baseline, imported beside this one). Then the reaction to
a SIGINT sent 1 s into the largest uncapped case: the seconds from the signal to the
KeyboardInterrupt, blocked against the old code.

Run:  python benchmarks/bench_interrupt.py [--threads 1] [--quick] [--baseline REV]
"""

from __future__ import annotations

import argparse
import os
import signal
import threading
import time

import baseline
import numpy as np

from chitally import Curve, euler_curve
from chitally.inprocess import _leaf_ordered
from chitally.kernel import count_jumps


def sphere4(n: int, seed: int = 0) -> np.ndarray:
    x = np.random.default_rng(seed).standard_normal((n, 5))
    return x / np.linalg.norm(x, axis=1)[:, None]


def blobs(n: int, dims: int, seed: int = 0) -> np.ndarray:
    """n points around 50 random centres in the unit cube of R^dims (sd 0.05)."""
    rng = np.random.default_rng(seed)
    centres = rng.random((50, dims))
    return centres[rng.integers(0, 50, n)] + 0.05 * rng.standard_normal((n, dims))


def whole(points: np.ndarray, eps: float, cap: int | None, threads: int) -> Curve:
    """euler_curve with one compiled call per loop."""
    coords = _leaf_ordered(points)[0]
    t = count_jumps(coords, eps, cap, threads=threads, blocks=False)
    return Curve.from_jumps(t.values, t.jumps, eps=eps, max_dim=cap, n_points=len(points))


def reaction(run, delay: float = 1.0) -> float | None:
    """Seconds from a SIGINT sent `delay` s into run() to its KeyboardInterrupt (None if
    run() finished first)."""
    sent: list[float] = []

    def fire() -> None:
        sent.append(time.perf_counter())
        os.kill(os.getpid(), signal.SIGINT)

    timer = threading.Timer(delay, fire)
    timer.start()
    try:
        run()
    except KeyboardInterrupt:
        return time.perf_counter() - sent[0]
    finally:
        timer.join()
    return None


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--quick", action="store_true", help="skip the largest cases")
    ap.add_argument("--baseline", default=baseline.DEFAULT_REV)
    args = ap.parse_args()
    base = baseline.load(args.baseline)
    T = args.threads
    s4 = sphere4(50_000)
    cube = np.random.default_rng(1).random((1_000_000 if not args.quick else 200_000, 3))
    cases = [
        ("S^4 50k, eps 0.30, no cap", s4, 0.30, None),
        ("S^4 50k, eps 0.25, cap 5", s4, 0.25, 5),
        ("S^4 50k, eps 0.40, cap 2", s4, 0.40, 2),
        ("S^4 50k, eps 0.40, cap 1", s4, 0.40, 1),
        (f"cube {len(cube) // 1000}k R^3, eps 0.012, cap 3", cube, 0.012, 3),
        ("blobs 20k R^16, eps 0.25, cap 3", blobs(20_000, 16), 0.25, 3),
    ]
    small = np.random.default_rng(2).random((300, 3))
    for cap in (None, 1, 2, 3, 5):  # compile (or load) outside the timing
        euler_curve(small, 0.3, cap)
        base.euler_curve(small, 0.3, cap)
        euler_curve(blobs(300, 16), 0.25, cap)
        base.euler_curve(blobs(300, 16), 0.25, cap)
    print(f"threads={T}; wall / CPU seconds, best of 3; ratios of CPU seconds against one call per loop"
          " and against the old code")
    print(f"{'case':<34} {'blocked':>13} {'whole':>13} {'old':>13} {'blk/whole':>10} {'blk/old':>8}  same")
    for name, points, eps, cap in cases:
        ways = {"blocked": lambda p=points, e=eps, c=cap: euler_curve(p, e, c, threads=T),
                "whole": lambda p=points, e=eps, c=cap: whole(p, e, c, T),
                "old": lambda p=points, e=eps, c=cap: base.euler_curve(p, e, c, threads=T)}
        times: dict[str, list[float]] = {k: [] for k in ways}
        cpu: dict[str, list[float]] = {k: [] for k in ways}
        curves = {}
        for r in range(3):
            order = list(ways.items())
            for k, f in order[r:] + order[:r]:  # each way runs first once
                t0, c0 = time.perf_counter(), time.process_time()
                curves[k] = f()
                times[k].append(time.perf_counter() - t0)
                cpu[k].append(time.process_time() - c0)
        b, w, o = (min(times[k]) for k in ways)
        bc, wc, oc = (min(cpu[k]) for k in ways)
        same = curves["blocked"] == curves["whole"] and np.array_equal(curves["blocked"].chi, curves["old"].chi) \
            and np.array_equal(curves["blocked"].values, curves["old"].values)
        print(f"{name:<34} {b:6.2f} /{bc:5.2f} {w:6.2f} /{wc:5.2f} {o:6.2f} /{oc:5.2f} {bc / wc:10.3f} "
              f"{bc / oc:8.3f}  {same}", flush=True)
    name, points, eps, cap = cases[0]
    new = reaction(lambda: euler_curve(points, eps, cap, threads=T))
    old = reaction(lambda: base.euler_curve(points, eps, cap, threads=T))
    print(f"\nSIGINT 1 s into '{name}': KeyboardInterrupt after "
          f"{new if new is None else round(new, 3)} s (blocked), {old if old is None else round(old, 3)} s (old)")


if __name__ == "__main__":
    main()
