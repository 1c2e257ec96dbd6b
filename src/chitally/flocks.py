"""A scenario of our own for the classifier example: flocks of drones seen from above.

Three formations a swarm controller flies: a milling ring (one loop), a figure-eight
patrol (two loops joined at a crossing) and a compact hover (a filled disc). Each flock
has 60 to 150 drones, a random size, rotation and offset, and positional jitter. Their
curves differ where the loops live: a ring's curve settles at 0, a figure-eight's at -1,
a disc's at 1 (Euler characteristics of a circle, a wedge of two circles and a disc).
Invented data, for the demo and tests only.
"""

from __future__ import annotations

import numpy as np

FORMATIONS = ("ring", "figure-eight", "hover")


def flock(kind: str, rng: np.random.Generator, n: int | None = None, jitter: float = 0.03) -> np.ndarray:
    """One flock of `kind` as (n, 2) positions in units of its formation radius."""
    n = int(rng.integers(60, 151)) if n is None else n
    if kind == "ring":
        t = rng.uniform(0, 2 * np.pi, n)
        pts = np.stack([np.cos(t), np.sin(t)], axis=1)
    elif kind == "figure-eight":
        t = rng.uniform(0, 2 * np.pi, n)
        pts = np.stack([np.sin(t), np.sin(t) * np.cos(t)], axis=1) * [1.0, 1.6]
    elif kind == "hover":
        r = np.sqrt(rng.uniform(0, 1, n))
        t = rng.uniform(0, 2 * np.pi, n)
        pts = np.stack([r * np.cos(t), r * np.sin(t)], axis=1)
    else:
        raise ValueError(f"unknown formation {kind!r}; choose from {FORMATIONS}")
    pts = pts + rng.normal(0, jitter, pts.shape)
    angle = rng.uniform(0, 2 * np.pi)
    rot = np.array([[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]])
    scale = rng.uniform(0.8, 1.25)
    return np.ascontiguousarray(scale * pts @ rot.T + rng.normal(0, 5, 2))


def flocks(per_kind: int, seed: int = 0) -> tuple[list[np.ndarray], np.ndarray]:
    """`per_kind` flocks of each formation, shuffled; returns (clouds, labels 0..2)."""
    rng = np.random.default_rng(seed)
    clouds, labels = [], []
    for label, kind in enumerate(FORMATIONS):
        for _ in range(per_kind):
            clouds.append(flock(kind, rng))
            labels.append(label)
    order = rng.permutation(len(clouds))
    return [clouds[i] for i in order], np.asarray(labels)[order]
