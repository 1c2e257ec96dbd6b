"""chitally: exact Euler characteristic curves, in process or on a Dask cluster.

The public API is small: `euler_curve` computes a point cloud's curve in process, `Curve`
is the exact step function, `read_points` loads any supported input, `feature_matrix` and
`CurveFeatures` turn many clouds, graphs or fields (images, volumes) into an exact
feature matrix, `graph_curve` and `graph_run` give the curve of a graph filtration (in
process, or over tasks on the engine), `field_curve` the curve of an array's cubical
filtration, and `chitally.runs` drives resumable runs on a run store. Attributes are
imported on first use, so that ``import chitally`` (and the command line) starts fast.
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version
from typing import Any

try:
    __version__ = version("chitally")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0.0.0"

_LAZY = {
    "Curve": "chitally.curve",
    "merge_jumps": "chitally.curve",
    "parse_grid": "chitally.curve",
    "euler_curve": "chitally.inprocess",
    "InputError": "chitally.sources",
    "read_points": "chitally.sources",
    "feature_matrix": "chitally.features",
    "FeatureMatrix": "chitally.features",
    "CurveFeatures": "chitally.features",
    "open_run": "chitally.runs",
    "graph_curve": "chitally.graphs",
    "graph_run": "chitally.jobs.graph",
    "field_curve": "chitally.cubical",
}

__all__ = sorted([*_LAZY, "__version__"])


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'chitally' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return __all__
