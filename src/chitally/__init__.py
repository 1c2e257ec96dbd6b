"""chitally: exact Euler characteristic curves of Vietoris-Rips filtrations."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("chitally")
except PackageNotFoundError:  # running from a source tree without an install
    __version__ = "0.0.0"
