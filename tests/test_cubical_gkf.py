"""Superlevel curves of smooth Gaussian fields against the Gaussian kinematic formula.

Source (quoted from memory, constants re-derived here): R. J. Adler and J. E. Taylor,
*Random Fields and Geometry* (Springer, 2007), Theorem 12.4.1 (the Gaussian kinematic
formula) with the Euler characteristic densities of their Section 12.4; K. J. Worsley,
"Boundary corrections for the expected Euler characteristic of excursion sets of random
fields, with an application to astrophysics", Adv. Appl. Prob. 27 (1995) 943-959.

For a centred, unit-variance, stationary Gaussian field f on a compact set T whose
partial derivatives are uncorrelated with common variance lambda (the second spectral
moment; isotropic fields have this form),

    E chi({t in T : f(t) >= u}) = sum_j L_j(T) lambda^(j/2) rho_j(u),

with L_j the Euclidean Lipschitz-Killing curvatures of T and the EC densities
rho_0(u) = 1 - Phi(u), rho_j(u) = (2 pi)^(-(j+1)/2) He_(j-1)(u) exp(-u^2/2) for j >= 1
(He: probabilists' Hermite polynomials, He_0 = 1, He_1(u) = u). A rectangle of sides
a, b has L_0 = 1, L_1 = a + b (half its perimeter), L_2 = a b, so

    E chi(u) = (1 - Phi(u)) + (a + b) sqrt(lambda) / (2 pi) exp(-u^2/2)
               + a b lambda / (2 pi)^(3/2) u exp(-u^2/2).

The fields are our own: seeded white noise on an n x n torus smoothed by
`scipy.ndimage.gaussian_filter` (kernel sd s pixels, ``mode="wrap"``, so every pixel sees
the same kernel and the field is stationary), divided by its exact standard deviation
(the root sum of squares of the periodic kernel). The smoothed noise's correlation is the
kernel convolved with itself, exp(-|h|^2 / (4 s^2)), whose second derivative at 0 gives
lambda = 1 / (2 s^2) per pixel^2; the test also checks that against the mean squared
finite difference of the simulated fields (2 (1 - exp(-1/(4 s^2))), a lattice value).

The vertex construction's superlevel complex has the n x n pixel centres as vertices and
covers [0, n-1]^2 (a = b = n - 1); the cell construction's pixels are unit squares
covering [0, n]^2 (a = b = n). Both converge to the smooth excursion set as s grows.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter
from scipy.stats import norm

from chitally import Curve, field_curve

LEVELS = np.linspace(-3.0, 3.0, 25)


def expected_chi(u: np.ndarray, a: float, b: float, lam: float) -> np.ndarray:
    """E chi of {f >= u} on an a x b rectangle (the formula of the module docstring)."""
    g = np.exp(-(u**2) / 2)
    return norm.sf(u) + (a + b) * np.sqrt(lam) / (2 * np.pi) * g + a * b * lam / (2 * np.pi) ** 1.5 * u * g


def superlevel_chi(curve: Curve, u: np.ndarray) -> np.ndarray:
    """chi({f >= u}) from the curve of -f: scale t = -u; below the domain nothing is
    present yet, above it everything is."""
    t = -u
    return np.where(t < curve.start, 0, curve.at(np.clip(t, curve.start, curve.eps)))


def smooth_fields(n: int, s: float, count: int, seed: int):
    impulse = np.zeros((n, n))
    impulse[0, 0] = 1.0
    sd = np.sqrt(np.square(gaussian_filter(impulse, s, mode="wrap")).sum())
    rng = np.random.default_rng(seed)
    for _ in range(count):
        yield gaussian_filter(rng.standard_normal((n, n)), s, mode="wrap") / sd


def simulate(n: int, s: float, count: int, seed: int) -> dict[str, np.ndarray]:
    """Per construction, the chi of every field at every level; and the fields' mean
    squared finite difference along each axis."""
    out: dict[str, list[np.ndarray]] = {"vertices": [], "cells": [], "fd": []}
    for f in smooth_fields(n, s, count, seed):
        for construction in ("vertices", "cells"):
            out[construction].append(superlevel_chi(field_curve(f, construction, superlevel=True), LEVELS))
        out["fd"].append([np.mean(np.diff(f, axis=0) ** 2), np.mean(np.diff(f, axis=1) ** 2)])
    return {k: np.asarray(v, dtype=np.float64) for k, v in out.items()}


def deviations(chi: np.ndarray, expected: np.ndarray, rel: float, k_se: float) -> tuple[np.ndarray, np.ndarray]:
    """|mean - expected| and the allowed deviation at each level: `rel` of the largest
    |E chi| (the lattice's bias) plus `k_se` standard errors of the mean."""
    mean = chi.mean(axis=0)
    se = chi.std(axis=0, ddof=1) / np.sqrt(chi.shape[0])
    return np.abs(mean - expected), rel * np.abs(expected).max() + k_se * se


def check_against_gkf(n: int, s: float, count: int, seed: int, rel: float, k_se: float) -> None:
    sim = simulate(n, s, count, seed)
    lam = 1.0 / (2.0 * s**2)
    # the fields' own lambda: the lattice's exact value, within sampling error
    lattice_lam = 2.0 * (1.0 - np.exp(-1.0 / (4.0 * s**2)))
    np.testing.assert_allclose(sim["fd"].mean(axis=0), lattice_lam, rtol=0.02)
    assert abs(lattice_lam / lam - 1) < 0.01
    for construction, side in (("vertices", n - 1), ("cells", n)):
        chi = sim[construction]
        dev, allowed = deviations(chi, expected_chi(LEVELS, side, side, lam), rel, k_se)
        assert (dev <= allowed).all(), (
            f"{construction}: levels {LEVELS[dev > allowed]} deviate by {dev[dev > allowed]} "
            f"(allowed {allowed[dev > allowed]})")
        # the comparison has power: lambda off by 15% either way, or the boundary term
        # dropped, is rejected on the same simulations
        for wrong in (expected_chi(LEVELS, side, side, lam * 1.15), expected_chi(LEVELS, side, side, lam / 1.15),
                      expected_chi(LEVELS, side, side, lam) - (2 * side) * np.sqrt(lam) / (2 * np.pi)
                      * np.exp(-(LEVELS**2) / 2)):
            dev_w, allowed_w = deviations(chi, wrong, rel, k_se)
            assert (dev_w > allowed_w).any()


def test_smooth_gaussian_fields_follow_the_gaussian_kinematic_formula():
    # 100 fields of 256 x 256, s = 4 pixels (about 2 s here). Measured: the largest
    # |E chi| is 87, the largest standard error of the mean 1.1, and the largest
    # deviation 1.4 (vertices) and 1.9 (cells), largest near u = 0 and on the negative
    # side (a lattice bias). Allowed: 3% of 87 plus 3 standard errors.
    check_against_gkf(n=256, s=4.0, count=100, seed=1, rel=0.03, k_se=3.0)


@pytest.mark.slow
def test_smoother_larger_fields_follow_it_more_closely():
    # s = 8 pixels on 512 x 512, 400 fields: the lattice bias shrinks with s, so the
    # allowance drops to 1.5% of the largest |E chi| (plus 3 standard errors)
    check_against_gkf(n=512, s=8.0, count=400, seed=2, rel=0.015, k_se=3.0)
