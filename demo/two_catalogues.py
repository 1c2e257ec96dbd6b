"""Demo: are two source catalogues shaped alike? (invented data, our own scenario)

Two surveys of the same cubic volume each list N sources. In the first the sources are
scattered uniformly; in the second they are strung along filaments (random segments
between random nodes, with a small thickness), as matter gathers in a cosmic web. The
script computes

1. each catalogue's exact curve up to eps (chosen so that a uniform source has about
   ten neighbours within eps), and the exact L1 and sup distances between the two;
2. confidence bands for each catalogue's mean curve at sample size m (subsamples of m
   sources drawn without replacement, at a scale grown by (N/m)^(1/3) so that a
   subsample sees as many neighbours as the full catalogue does at eps). The bands
   cover the mean curve of m sources, not the curve of the whole catalogue;
3. a permutation test: each catalogue cut into K disjoint random parts of m sources
   (K independent samples of size m), and the exact distance between the two groups'
   mean curves set against random relabellings;

and draws one figure, two_catalogues.png. `--small` runs CI-sized catalogues.

    python demo/two_catalogues.py [--small] [--workdir demo-output] [--seed 3]
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

import numpy as np

from chitally import euler_curve
from chitally.bands import bands
from chitally.distances import distance
from chitally.twosample import two_sample_test

SIZES = {"full": {"sources": 20000, "sample": 1000, "replicates": 60, "parts": 12},
         "small": {"sources": 3000, "sample": 250, "replicates": 24, "parts": 8}}


def uniform_catalogue(n: int, rng: np.random.Generator) -> np.ndarray:
    """n sources uniform in the unit cube."""
    return rng.random((n, 3))


def filament_catalogue(n: int, rng: np.random.Generator, filaments: int = 40,
                       thickness: float = 0.012) -> np.ndarray:
    """n sources along `filaments` random segments between nodes in the unit cube, each
    source uniform along its segment (segments chosen in proportion to their length)
    and scattered around it by a Gaussian of width `thickness`."""
    nodes = rng.random((filaments // 2 + 2, 3))
    ends = np.array([rng.choice(len(nodes), 2, replace=False) for _ in range(filaments)])
    a, b = nodes[ends[:, 0]], nodes[ends[:, 1]]
    length = np.linalg.norm(b - a, axis=1)
    which = rng.choice(filaments, size=n, p=length / length.sum())
    t = rng.random(n)[:, None]
    points = a[which] + t * (b[which] - a[which]) + thickness * rng.standard_normal((n, 3))
    return np.clip(points, 0.0, 1.0)


def disjoint_parts(points: np.ndarray, parts: int, size: int, rng: np.random.Generator) -> list[np.ndarray]:
    """`parts` disjoint random subsets of `size` rows: independent samples of that size
    from the catalogue's population (its rows are i.i.d.)."""
    order = rng.permutation(points.shape[0])
    return [points[order[k * size:(k + 1) * size]] for k in range(parts)]


def main(argv: list[str] | None = None) -> dict[str, Any]:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", action="store_true", help="CI-sized catalogues")
    ap.add_argument("--workdir", default="demo-output")
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    size = SIZES["small" if args.small else "full"]
    n, m = size["sources"], size["sample"]
    rng = np.random.default_rng(args.seed)
    work = Path(args.workdir)
    work.mkdir(parents=True, exist_ok=True)
    catalogues = {"uniform": uniform_catalogue(n, rng), "filaments": filament_catalogue(n, rng)}

    # about ten neighbours for a uniform source: n * (4/3) pi eps^3 = 10
    eps = round((10 * 3 / (4 * math.pi * n)) ** (1 / 3), 4)
    eps_m = round(eps * (n / m) ** (1 / 3), 4)
    print(f"two catalogues of {n} sources in the unit cube; eps = {eps}, subsample scale {eps_m} for m = {m}")

    curves = {name: euler_curve(pts, eps) for name, pts in catalogues.items()}
    for name, c in curves.items():
        print(f"  {name:9s}: {c.n_jumps} jumps, chi(0) = {c.at(0.0)}, chi({eps}) = {c.final}")
    l1 = distance(curves["uniform"], curves["filaments"], p=1)
    sup = distance(curves["uniform"], curves["filaments"], p="inf")
    print(f"exact distances between the full curves: L1 = {l1:.6g}, sup = {sup:.6g}")

    grid = f"0:{eps_m!r}:41"
    band = {name: bands(pts, eps_m, size["replicates"], m, grid=grid, seed=args.seed)
            for name, pts in catalogues.items()}
    for name, b in band.items():
        print(f"  {name:9s}: mean curve of {m} sources from {b.replicates} subsamples; 95% simultaneous "
              f"half-width {b.sup_quantile / math.sqrt(b.replicates):.3g}")
    apart = np.flatnonzero((band["uniform"].upper_simultaneous < band["filaments"].lower_simultaneous)
                           | (band["filaments"].upper_simultaneous < band["uniform"].lower_simultaneous))
    print(f"the two simultaneous bands are disjoint at {apart.size} of {band['uniform'].grid.size} scales")

    groups = {name: [euler_curve(part, eps_m) for part in disjoint_parts(pts, size["parts"], m, rng)]
              for name, pts in catalogues.items()}
    test = two_sample_test(groups["uniform"], groups["filaments"], p=1, permutations=999, seed=args.seed)
    print(f"permutation test, {size['parts']} vs {size['parts']} disjoint samples of {m} sources: "
          f"L1 between group means {test.statistic:.6g}, p = {test.p_value:.4g} ({test.permutations} relabellings)")

    figure_path = work / "two_catalogues.png"
    try:
        draw(catalogues, curves, band, eps, m, l1, test, figure_path)
        print(f"figure: {figure_path}")
    except ImportError:
        figure_path = None
        print("no figure: matplotlib is not installed (pip install 'chitally[plot]')")
    return {"eps": eps, "eps_m": eps_m, "l1": l1, "sup": sup, "apart": int(apart.size),
            "p_value": test.p_value, "figure": figure_path}


def draw(catalogues, curves, band, eps, m, l1, test, path: Path) -> None:
    from chitally.plot import figure, plot_bands, plot_curves, save

    fig, (ax0, ax1, ax2) = figure(size=(15.0, 4.8), ncols=3)
    colours = {"uniform": "tab:blue", "filaments": "tab:orange"}
    for name, pts in catalogues.items():
        shown = pts[:3000]
        ax0.scatter(shown[:, 0], shown[:, 1], s=1.0, alpha=0.5, color=colours[name], label=name)
    ax0.set_aspect("equal")
    ax0.set_xlabel("x")
    ax0.set_ylabel("y")
    ax0.set_title("the catalogues, seen along z")
    ax0.legend(loc="upper right", markerscale=6, fontsize="small")
    plot_curves(list(curves.values()), list(curves), ax1, symlog=True,
                title=f"exact curves of all sources (L1 apart: {l1:.4g})")
    for line, name in zip(ax1.get_lines(), curves):
        line.set_color(colours[name])
    ax1.legend(loc="best", fontsize="small")
    for name, b in band.items():
        plot_bands(b, ax2, label=name, color=colours[name])
    ax2.set_title(f"mean curve of {m} sources, 95% bands")
    ax2.legend(loc="upper right", fontsize="x-small")
    # the bands are narrow at this scale: a magnified window where the mean curves cross
    # (else the middle scales), so both bands show
    zoom = ax2.inset_axes([0.1, 0.08, 0.36, 0.4])
    u, f = band["uniform"], band["filaments"]
    sign = np.sign(u.mean - f.mean)
    crossings = np.flatnonzero((sign[2:] != sign[1:-1]) & (sign[1:-1] != 0)) + 2
    centre = int(np.clip(crossings[0] if crossings.size else u.grid.size // 2, 2, u.grid.size - 3))
    for name, b in band.items():
        plot_bands(b, zoom, label=name, color=colours[name])
    window = slice(centre - 2, centre + 3)
    ends = np.concatenate([np.concatenate(b.band("simultaneous"))[np.r_[window, window.start + b.grid.size:
                                                                          window.stop + b.grid.size]]
                           for b in band.values()])
    zoom.set_xlim(u.grid[centre - 2], u.grid[centre + 2])
    pad = 0.1 * (ends.max() - ends.min())
    zoom.set_ylim(ends.min() - pad, ends.max() + pad)
    zoom.get_legend().remove()
    zoom.set_xlabel("")
    zoom.set_ylabel("")
    zoom.tick_params(labelsize="x-small")
    ax2.indicate_inset_zoom(zoom, edgecolor="0.4")
    fig.suptitle("uniform sources against filaments: exact Euler characteristic curves; "
                 f"permutation test, {test.sizes[0]} against {test.sizes[1]} samples: p = {test.p_value:.3g}")
    save(fig, path)


if __name__ == "__main__":
    main()
