"""Independent references for cubical curves: gudhi's cubical complexes.

From gudhi's persistence of a filtered cubical complex, chi(t) is the alternating sum
over dimensions of the number of intervals alive at t (born at or before t, dying
after t): the Euler-Poincare formula applied to the complex at scale t.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def gudhi_chi(array: np.ndarray, construction: str, scales: np.ndarray) -> np.ndarray:
    """chi at `scales` of gudhi's cubical complex of `array` (missing entries as +inf)."""
    import gudhi

    a = np.asarray(array, dtype=np.float64)
    if construction == "cells":
        cc = gudhi.CubicalComplex(top_dimensional_cells=a)
    else:
        cc = gudhi.CubicalComplex(vertices=a)
    cc.compute_persistence(homology_coeff_field=2, min_persistence=-1.0)
    out = np.zeros(len(scales), dtype=np.int64)
    for dim, (birth, death) in cc.persistence(homology_coeff_field=2, min_persistence=-1.0):
        alive = (birth <= scales) & (scales < death)
        out += (-1) ** dim * alive.astype(np.int64)
    return out


def gudhi_field_curve(array: np.ndarray, construction: str, superlevel: bool = False,
                      mask: np.ndarray | None = None) -> Any:
    """The whole curve from gudhi: `gudhi_chi` at every distinct present value (the
    only scales where a cubical curve can change), as a `chitally.Curve` (superlevel as
    the sublevel filtration of -f; missing entries at +inf)."""
    from chitally import Curve

    a = -np.asarray(array, np.float64) if superlevel else np.asarray(array, np.float64)
    present = np.ones(a.shape, bool) if mask is None else np.asarray(mask, bool)
    scales = np.unique(a[present])
    chi = gudhi_chi(np.where(present, a, np.inf), construction, scales)
    jumps = np.diff(chi, prepend=0)
    return Curve.from_jumps(scales, jumps, eps=float(scales[-1]), max_dim=None,
                            n_points=int(present.sum()), start=float(scales[0]))
