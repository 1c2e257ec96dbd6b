"""Classify drone formations by their exact Euler characteristic curves.

Three formations of our own (a milling ring, a figure-eight patrol, a compact hover),
60 to 150 drones each with jitter, random size and rotation. A scikit-learn pipeline
turns each flock into its curve sampled on a grid, scales it and fits a support vector
classifier; 5-fold cross-validation reports the accuracy (chance is 1/3).

    python demo/classify_flocks.py [--per-kind 60] [--seed 0]
"""

from __future__ import annotations

import argparse

from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from chitally import CurveFeatures
from chitally.flocks import flocks


def main(argv: list[str] | None = None) -> float:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--per-kind", type=int, default=60)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    clouds, labels = flocks(args.per_kind, args.seed)
    model = make_pipeline(CurveFeatures(eps=1.0, grid="0:1:41"),
                          StandardScaler(), SVC())
    scores = cross_val_score(model, clouds, labels, cv=5)
    print(f"{len(clouds)} flocks, 3 formations: 5-fold accuracy {scores.mean():.3f} "
          f"(folds {', '.join(f'{s:.2f}' for s in scores)}; chance 0.333)")
    return float(scores.mean())


if __name__ == "__main__":
    main()
