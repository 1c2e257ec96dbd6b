"""Independent references for cubical curves: gudhi's cubical complexes.

From gudhi's persistence of a filtered cubical complex, chi(t) is the alternating sum
over dimensions of the number of intervals alive at t (born at or before t, dying
after t): the Euler-Poincare formula applied to the complex at scale t.
"""

from __future__ import annotations

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
