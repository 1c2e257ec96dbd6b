"""chitally: exact Euler characteristic curves of Vietoris-Rips filtrations.

The public API is small: `euler_curve` computes a curve in process, `Curve` is the exact
step function, `read_points` loads any supported input, and the run-store functions
(`run`, `resume`, `open_run`) drive distributed runs.
"""

from importlib.metadata import PackageNotFoundError, version

from .curve import Curve, merge_jumps, parse_grid
from .inprocess import euler_curve
from .sources import InputError, read_points

try:
    __version__ = version("chitally")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0.0.0"

__all__ = ["Curve", "InputError", "euler_curve", "merge_jumps", "parse_grid", "read_points", "__version__"]
