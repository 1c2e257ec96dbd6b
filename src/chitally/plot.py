"""Figures of curves, bands and feature matrices (matplotlib, the `plot` extra).

Every function draws on an ``Axes`` it is given or on a new figure's, and returns the
Axes; `save` writes a figure as PNG, SVG or PDF by the file's ending. Figures are made
with ``matplotlib.figure.Figure`` directly, never through pyplot, so no window or
global figure state is involved and any backend (or none) works. matplotlib is imported
only when a figure is drawn.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["FIGURE_FORMATS", "figure", "plot_bands", "plot_curve", "plot_curves", "plot_matrix", "save"]

FIGURE_FORMATS = ("png", "svg", "pdf")

#: Default figure size in inches and resolution: 1000 x 600 pixels as PNG.
SIZE = (10.0, 6.0)
DPI = 100

_BAND_STYLE = {"simultaneous": 0.22, "normal": 0.45, "percentile": None}
_BAND_TEXT = {"simultaneous": "simultaneous", "normal": "pointwise (normal)",
              "percentile": "pointwise (percentile)"}


def _matplotlib() -> Any:
    try:
        import matplotlib
    except ImportError:  # pragma: no cover - depends on the environment
        raise ImportError("figures need matplotlib: pip install 'chitally[plot]'") from None
    return matplotlib


def figure(size: tuple[float, float] = SIZE, dpi: int = DPI, ncols: int = 1) -> tuple[Any, Any]:
    """A new figure (no pyplot) and its axes: one Axes, or an array of `ncols`."""
    _matplotlib()
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, dpi=dpi, layout="constrained")
    return fig, fig.subplots(1, ncols)


def _axes(ax: Any) -> Any:
    return figure()[1] if ax is None else ax


def _scale(ax: Any, symlog: bool) -> None:
    if symlog:
        # Euler characteristics are integers: linear within +-1, logarithmic beyond
        ax.set_yscale("symlog", linthresh=1.0)


def plot_curve(curve: Any, ax: Any = None, *, label: str | None = None, symlog: bool = False,
               **kw: Any) -> Any:
    """Draw one curve as the exact step function it is (right-continuous steps).

    Parameters
    ----------
    curve : Curve
    ax : matplotlib Axes, optional
        Drawn on a new figure's when None.
    label : str, optional
        Legend entry.
    symlog : bool
        Symmetric-logarithmic y axis (linear within +-1).
    **kw
        Passed to ``Axes.step`` (color, linewidth, ...).

    Returns
    -------
    matplotlib Axes
    """
    ax = _axes(ax)
    x = np.append(np.asarray(curve.values, dtype=np.float64), curve.eps)
    y = np.append(np.asarray(curve.chi), curve.chi[-1])
    ax.step(x, y, where="post", label=label, **kw)
    ax.set_xlabel("scale")
    ax.set_ylabel("Euler characteristic")
    _scale(ax, symlog)
    return ax


def plot_curves(curves: Sequence[Any], labels: Sequence[str] | None = None, ax: Any = None, *,
                symlog: bool = False, title: str | None = None) -> Any:
    """Overlay several curves with a legend."""
    ax = _axes(ax)
    labels = list(labels) if labels is not None else [f"curve {i + 1}" for i in range(len(curves))]
    if len(labels) != len(curves):
        raise ValueError(f"{len(curves)} curves but {len(labels)} labels")
    for curve, label in zip(curves, labels):
        plot_curve(curve, ax, label=label, symlog=symlog, linewidth=1.4)
    if curves:
        ax.legend(loc="best", fontsize="small")
    if title:
        ax.set_title(title)
    return ax


def plot_bands(bands: Any, ax: Any = None, *, label: str | None = None,
               kinds: Sequence[str] = ("simultaneous", "normal"), symlog: bool = False,
               color: Any = None, title: str | None = None) -> Any:
    """The mean curve at sample size m with its bands shaded.

    The simultaneous band is the lighter shade (it holds on the whole grid at once); the
    pointwise normal band the darker; the percentile band, if asked for, dashed lines.
    """
    ax = _axes(ax)
    name = label or "mean"
    line, = ax.plot(bands.grid, bands.mean, color=color, linewidth=1.6,
                    label=f"{name} (m = {bands.sample_size}, B = {bands.replicates})")
    color = line.get_color()
    pct = f"{100 * bands.level:g}%"
    for kind in kinds:
        lo, hi = bands.band(kind)
        alpha = _BAND_STYLE[kind]
        if alpha is None:
            ax.plot(bands.grid, lo, color=color, linestyle="--", linewidth=0.9,
                    label=f"{name}: {pct} {_BAND_TEXT[kind]}")
            ax.plot(bands.grid, hi, color=color, linestyle="--", linewidth=0.9)
        else:
            ax.fill_between(bands.grid, lo, hi, color=color, alpha=alpha, linewidth=0,
                            label=f"{name}: {pct} {_BAND_TEXT[kind]}")
    ax.set_xlabel("scale")
    ax.set_ylabel(f"mean Euler characteristic of {bands.sample_size} points")
    _scale(ax, symlog)
    ax.legend(loc="best", fontsize="small")
    if title:
        ax.set_title(title)
    return ax


def _groups(labels: Sequence[Any] | None, n: int) -> tuple[np.ndarray, list[tuple[str, int, int]]]:
    """Row order grouping equal labels (in order of first appearance) and the groups'
    (label, first row, end row)."""
    if labels is None:
        return np.arange(n), []
    keys = [str(x) for x in labels]
    first = {k: i for i, k in reversed(list(enumerate(keys)))}
    rank = sorted(first, key=first.get)
    order = np.array(sorted(range(n), key=lambda i: (rank.index(keys[i]), i)), dtype=np.int64)
    groups, start = [], 0
    for k in rank:
        size = keys.count(k)
        groups.append((k, start, start + size))
        start += size
    return order, groups


def plot_matrix(matrix: Any, ax: Any = None, *, symlog: bool = False, title: str | None = None,
                cmap: str = "viridis") -> Any:
    """A feature matrix as a heatmap: one row per cloud, rows grouped by label.

    Groups follow their labels' first appearance, separated by white lines and named on
    the y axis; the colour scale is symmetric-logarithmic with `symlog`.
    """
    mpl = _matplotlib()
    ax = _axes(ax)
    values = np.asarray(matrix.values, dtype=np.float64)
    grid = np.asarray(matrix.grid, dtype=np.float64)
    order, groups = _groups(matrix.labels, values.shape[0])
    norm = None
    if symlog:
        top = float(np.abs(values).max(initial=1.0))
        norm = mpl.colors.SymLogNorm(linthresh=1.0, vmin=-top if values.min() < 0 else 0.0, vmax=top)
    # half a step beyond the ends, so each column is centred on its scale
    step = float(np.diff(grid).mean()) if grid.size > 1 else 1.0
    extent = (grid[0] - step / 2, grid[-1] + step / 2, values.shape[0], 0)
    image = ax.imshow(values[order], aspect="auto", interpolation="nearest", extent=extent,
                      cmap=cmap, norm=norm)
    ax.figure.colorbar(image, ax=ax, label="Euler characteristic" + (" / points" if matrix.normalised else ""))
    for _, start, _ in groups[1:]:
        ax.axhline(start, color="white", linewidth=1.5)
    if groups:
        ax.set_yticks([(a + b) / 2 for _, a, b in groups])
        ax.set_yticklabels([f"{k} ({b - a})" for k, a, b in groups])
        ax.set_ylabel("clouds by label")
    else:
        ax.set_ylabel("cloud")
    ax.set_xlabel("scale")
    if title:
        ax.set_title(title)
    return ax


def save(fig: Any, path: str | os.PathLike[str]) -> Path:
    """Write a figure (or an Axes' figure) as PNG, SVG or PDF, by the ending of `path`."""
    fmt = Path(os.fspath(path)).suffix.lower().lstrip(".")
    if fmt not in FIGURE_FORMATS:
        raise ValueError(f"cannot tell the figure format from the ending of {os.fspath(path)!r}; "
                         f"use one of {', '.join('.' + f for f in FIGURE_FORMATS)}")
    fig = getattr(fig, "figure", fig)
    fig.savefig(os.fspath(path), format=fmt, dpi=fig.dpi)
    return Path(os.fspath(path))
