"""Demo, end to end: the debris ring around a young star (invented data, our own scenario).

Writes the grains to an .npy file, runs the main job on an embedded LocalCluster through
the CLI, checks the run against the in-process curve, exports the exact curve and grid
samples, and draws a figure if matplotlib is installed.

    python demo/debris_ring.py [--points 20000] [--workdir demo-output]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

import numpy as np

from chitally import Curve, euler_curve
from chitally.demo import DEMO_EPS, debris_ring


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=20000)
    ap.add_argument("--workdir", default="demo-output")
    args = ap.parse_args()
    work = Path(args.workdir)
    work.mkdir(exist_ok=True)
    grains = debris_ring(args.points)
    np.save(work / "grains.npy", grains)
    run = work / "ring.run"
    cli = [sys.executable, "-m", "chitally.cli"]
    subprocess.run([*cli, "run", str(work / "grains.npy"), "--eps", repr(DEMO_EPS), "--out", str(run)], check=True)
    subprocess.run([*cli, "export", str(run), "--out", str(work / "curve.csv")], check=True)
    subprocess.run([*cli, "export", str(run), "--grid", f"0:{DEMO_EPS!r}:64", "--out", str(work / "samples.csv")],
                   check=True)
    distributed = Curve.load(work / "curve.csv")
    assert distributed == euler_curve(grains, DEMO_EPS), "the run and the in-process curve differ"
    print(f"curve of {args.points} grains: chi(0) = {distributed.at(0.0)}, chi({DEMO_EPS}) = {distributed.final} "
          "(a torus: 0); run and in-process curves are identical")
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return
    fig, ax = plt.subplots(figsize=(6, 3.5))
    ax.step(np.append(distributed.values, DEMO_EPS), np.append(distributed.chi, distributed.final), where="post")
    ax.set_yscale("symlog")
    ax.set_xlabel("scale")
    ax.set_ylabel("Euler characteristic")
    ax.set_title("debris ring: exact Euler characteristic curve")
    fig.tight_layout()
    fig.savefig(work / "curve.png", dpi=120)
    print(f"figure: {work / 'curve.png'}")


if __name__ == "__main__":
    main()
