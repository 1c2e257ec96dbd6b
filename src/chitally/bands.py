"""Confidence bands for the mean Euler characteristic curve at a sample size m.

From one cloud of n points, `bands` draws B replicates, each a subsample of m points
drawn without replacement (replicate i always from its own generator, seeded by
``(seed, i)``), computes each replicate's exact curve on a grid, and returns the mean
curve with three bands around it:

- ``simultaneous``: ``Ybar(t) +- Z / sqrt(B)``, where ``Z`` is the (1 - alpha) quantile,
  over multiplier draws ``xi_i ~ N(0, 1)``, of ``sup_t |B^(-1/2) sum_i xi_i (Y_i(t) -
  Ybar(t))|`` (the multiplier bootstrap of Chazal, Fasy, Lecci, Rinaldo and Wasserman,
  "Stochastic convergence of persistence landscapes and silhouettes", SoCG 2014). It
  holds on the whole grid at once.
- ``normal``: pointwise ``Ybar(t) +- z_(1-alpha/2) s(t) / sqrt(B)``.
- ``percentile``: pointwise percentile bootstrap of the mean (the B replicate rows
  resampled with replacement, the mean of each resample, its alpha/2 and 1 - alpha/2
  quantiles at each scale).

**What the bands cover.** Their target is the mean curve of size-m subsamples,
``E chi_m(t)``, not the curve of the full cloud (which counts n points and is a single,
much larger curve). Strictly, B subsamples of one cloud estimate the mean over all
size-m subsets *of that cloud*; when the cloud is an i.i.d. sample of size n from a
population, that average is itself an unbiased estimate of the population's mean curve
at size m, off by a standard error of order ``sqrt(m / n)`` times the spread of one
replicate curve. Against the band's half-width, of order ``1 / sqrt(B)`` times that
spread, the extra error is negligible when ``m * B`` is much smaller than n.

**Sampling with replacement** (``replace=True``) is allowed with a warning: a resample
with repeated rows holds coincident points, which are distinct vertices joined by an
edge of length 0. A copy's closed neighbourhood equals its twin's at every scale, so it
is a dominated vertex and the complex collapses onto the distinct points: the curve of a
resample of m rows is the curve of its roughly ``0.632 m`` distinct points, i.e. of a
smaller subsample. Bands from resamples therefore describe a mix of smaller sample sizes.

The statistics (`band_statistics`) are pure numpy on the (B x grid) matrix of replicate
curves and are tested on their own; the replicates are computed in this process or, with
`store`, as the `bands` job on the engine (resumable, any executor): the same seed gives
the same replicates, hence identical bands, whatever runs them.
"""

from __future__ import annotations

import io
import json
import math
import os
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, fields
from pathlib import Path
from statistics import NormalDist
from typing import Any

import numpy as np

from .curve import _write_atomically

__all__ = [
    "BANDS_FORMAT",
    "BAND_KINDS",
    "DEFAULT_DRAWS",
    "DEFAULT_GRID_COUNT",
    "REPLACE_WARNING",
    "Bands",
    "band_statistics",
    "bands",
    "replicate_generator",
    "statistics_generator",
]

BANDS_FORMAT = "chitally-bands"
BANDS_VERSION = 1
FORMATS = ("npz", "json", "csv")

#: The bands a `Bands` holds, widest-in-principle first.
BAND_KINDS = ("simultaneous", "normal", "percentile")

#: Bootstrap draws (multiplier and percentile) unless told otherwise.
DEFAULT_DRAWS = 2000

#: Scales of the default grid START:STOP:COUNT = 0:eps:101.
DEFAULT_GRID_COUNT = 101

REPLACE_WARNING = (
    "sampling with replacement repeats rows; a repeated point is a dominated vertex, so "
    "each resample's curve is that of its distinct points (about 63% of the sample size): "
    "the bands then describe smaller samples than the size asked for")

# Bootstrap products are formed in blocks of about this many float64 entries (32 MB).
_BLOCK = 1 << 22
# Multiplier and resampling weights are drawn in fixed row blocks, so the draws never
# depend on the grid's size.
_DRAW_BLOCK = 256

_CSV_MAGIC = "# " + BANDS_FORMAT + " "
_COLUMNS = ("scale", "mean", "sd", *(f"{side}_{kind}" for kind in BAND_KINDS
                                    for side in ("lower", "upper")))


# ------------------------------------------------------------------------ generators


def replicate_generator(seed: int, i: int) -> np.random.Generator:
    """The generator of replicate `i`: a function of ``(seed, i)`` only.

    Replicate i draws the same rows whichever task, worker or executor computes it.
    (Spawn keys rather than an entropy list ``[seed, i]``: entropy lists that differ
    only by trailing zeros seed the same stream.)
    """
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(0, int(i))))


def statistics_generator(seed: int, stream: int) -> np.random.Generator:
    """The generator of bootstrap stream `stream` (1 multiplier, 2 percentile), apart
    from every replicate's."""
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(1, int(stream))))


# ------------------------------------------------------------------------ the result


def _floats(values: Any) -> np.ndarray:
    arr = np.array(values, dtype=np.float64, copy=True)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class Bands:
    """The mean curve of size-m subsamples on a grid, with confidence bands.

    The bands cover ``E chi_m(t)``, the mean curve of samples of `sample_size` points
    (see the module docstring), not the curve of the full cloud.

    Attributes
    ----------
    grid : ndarray of float64
        The scales.
    mean : ndarray of float64
        ``Ybar(t)``, the mean of the replicate curves on the grid.
    sd : ndarray of float64
        The replicate curves' standard deviation (ddof 1) at each scale.
    lower_simultaneous, upper_simultaneous : ndarray of float64
        ``Ybar +- sup_quantile / sqrt(B)``: holds on the whole grid at once.
    lower_normal, upper_normal : ndarray of float64
        Pointwise normal intervals for the mean.
    lower_percentile, upper_percentile : ndarray of float64
        Pointwise percentile-bootstrap intervals for the mean.
    level : float
        Confidence level, e.g. 0.95.
    replicates : int
        B.
    sample_size : int
        m, the points in each replicate.
    sup_quantile : float
        Z, the multiplier bootstrap's quantile of the sup-norm.
    draws : int
        Bootstrap draws behind the simultaneous and percentile bands.
    seed : int
    eps : float
    max_dim : int or None
    n_points : int
        Points of the cloud the replicates were drawn from.
    replace : bool
        Whether the replicates were drawn with replacement.
    """

    grid: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    lower_simultaneous: np.ndarray
    upper_simultaneous: np.ndarray
    lower_normal: np.ndarray
    upper_normal: np.ndarray
    lower_percentile: np.ndarray
    upper_percentile: np.ndarray
    level: float
    replicates: int
    sample_size: int
    sup_quantile: float
    draws: int
    seed: int
    eps: float
    max_dim: int | None
    n_points: int
    replace: bool = False

    def __post_init__(self) -> None:
        size = None
        for name in _array_fields():
            arr = _floats(getattr(self, name))
            if arr.ndim != 1:
                raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
            if size is not None and arr.size != size:
                raise ValueError(f"{name} has {arr.size} entries, the grid {size}")
            size = arr.size
            object.__setattr__(self, name, arr)
        for name in ("replicates", "sample_size", "draws", "seed", "n_points"):
            object.__setattr__(self, name, int(getattr(self, name)))
        for name in ("level", "sup_quantile", "eps"):
            object.__setattr__(self, name, float(getattr(self, name)))
        object.__setattr__(self, "max_dim", None if self.max_dim is None else int(self.max_dim))
        object.__setattr__(self, "replace", bool(self.replace))

    def band(self, kind: str = "simultaneous") -> tuple[np.ndarray, np.ndarray]:
        """``(lower, upper)`` of a band: "simultaneous", "normal" or "percentile"."""
        if kind not in BAND_KINDS:
            raise ValueError(f"unknown band {kind!r}; bands are {', '.join(BAND_KINDS)}")
        return getattr(self, f"lower_{kind}"), getattr(self, f"upper_{kind}")

    def covers(self, values: Any, kind: str = "simultaneous") -> np.ndarray:
        """Whether the band holds `values` (one per grid scale), scale by scale.

        ``covers(mu).all()`` is the event a simultaneous band is built for.
        """
        v = np.asarray(values, dtype=np.float64)
        lo, hi = self.band(kind)
        if v.shape != lo.shape:
            raise ValueError(f"expected {lo.size} values (one per grid scale), got shape {v.shape}")
        return (lo <= v) & (v <= hi)

    def metadata(self) -> dict[str, Any]:
        """The scalar attributes, as JSON-ready values."""
        return {name: getattr(self, name) for name in _scalar_fields()}

    def arrays(self) -> dict[str, np.ndarray]:
        """The array attributes by name."""
        return {name: getattr(self, name) for name in _array_fields()}

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Bands):
            return NotImplemented
        return self.metadata() == other.metadata() and all(
            # bitwise, so that equal bands are equal to the last bit (and NaN to NaN)
            np.array_equal(a.view(np.int64), b.view(np.int64))
            for a, b in zip(self.arrays().values(), other.arrays().values()))

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return (f"Bands(level={self.level!r}, replicates={self.replicates}, sample_size="
                f"{self.sample_size}, grid={self.grid.size} scales on [{float(self.grid[0])!r}, "
                f"{float(self.grid[-1])!r}], sup_quantile={self.sup_quantile:.4g})")

    # ---------------------------------------------------------------------- files

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict (floats round-trip exactly through Python's json)."""
        return {"format": BANDS_FORMAT, "version": BANDS_VERSION, **self.metadata(),
                **{k: v.tolist() for k, v in self.arrays().items()}}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], source: str = "bands") -> Bands:
        _check_header(data, source)
        try:
            return cls(**{f.name: data[f.name] for f in fields(cls)})
        except KeyError as exc:
            raise ValueError(f"{source}: missing {exc.args[0]!r}") from None
        except (TypeError, ValueError) as exc:
            raise ValueError(f"{source}: not valid bands: {exc}") from None

    def save(self, path: str | os.PathLike[str], format: str | None = None) -> Path:
        """Write to `path` as npz, json or csv (from its ending unless `format` is given).

        csv: a first line ``# chitally-bands {json of the scalars}``, then the columns
        scale, mean, sd, lower_/upper_ simultaneous, normal, percentile, one row per
        scale, numbers in their shortest exact form. npz: the arrays and a ``meta``
        JSON string (no pickles). json: everything in one document.
        """
        fmt = _resolve_format(path, format)
        if fmt == "json":
            data = (json.dumps(self.to_dict(), indent=1) + "\n").encode()
        elif fmt == "npz":
            buf = io.BytesIO()
            np.savez(buf, meta=np.array(json.dumps({"format": BANDS_FORMAT, "version": BANDS_VERSION,
                                                    **self.metadata()})),
                     **self.arrays())
            data = buf.getvalue()
        else:
            head = json.dumps({"format": BANDS_FORMAT, "version": BANDS_VERSION, **self.metadata()},
                              separators=(",", ":"))
            cols = np.column_stack(list(self.arrays().values())).tolist()
            lines = [f"{_CSV_MAGIC.rstrip()} {head}", ",".join(_COLUMNS)]
            lines += [",".join(repr(float(x)) for x in row) for row in cols]
            data = ("\n".join(lines) + "\n").encode()
        return _write_atomically(path, data)

    @classmethod
    def load(cls, path: str | os.PathLike[str], format: str | None = None) -> Bands:
        """Read bands written by `save`."""
        fmt = _resolve_format(path, format)
        name = os.fspath(path)
        if fmt == "json":
            try:
                data = json.loads(Path(name).read_text())
            except json.JSONDecodeError as exc:
                raise ValueError(f"{name}: not JSON: {exc}") from None
            return cls.from_dict(data, name)
        if fmt == "npz":
            with np.load(name, allow_pickle=False) as z:
                if "meta" not in z.files:
                    raise ValueError(f"{name}: not a {BANDS_FORMAT} file (no meta)")
                meta = json.loads(str(z["meta"]))
                arrays = {k: z[k] for k in _array_fields() if k in z.files}
            return cls.from_dict({**meta, **arrays}, name)
        lines = Path(name).read_text().splitlines()
        if not lines or not lines[0].startswith(_CSV_MAGIC):
            raise ValueError(f"{name}: not a {BANDS_FORMAT} csv file (first line)")
        meta = json.loads(lines[0][len(_CSV_MAGIC):])
        if len(lines) < 2 or tuple(lines[1].split(",")) != _COLUMNS:
            raise ValueError(f"{name}: expected the header {','.join(_COLUMNS)}")
        try:
            table = np.array([[float(x) for x in line.split(",")] for line in lines[2:] if line],
                             dtype=np.float64).reshape(-1, len(_COLUMNS))
        except ValueError as exc:
            raise ValueError(f"{name}: a row is not {len(_COLUMNS)} numbers: {exc}") from None
        arrays = {k: table[:, j] for j, k in enumerate(_array_fields())}
        return cls.from_dict({**meta, **arrays}, name)


def _array_fields() -> tuple[str, ...]:
    return ("grid", "mean", "sd", *(f"{side}_{kind}" for kind in BAND_KINDS for side in ("lower", "upper")))


def _scalar_fields() -> tuple[str, ...]:
    arrays = set(_array_fields())
    return tuple(f.name for f in fields(Bands) if f.name not in arrays)


def is_bands_file(path: str | os.PathLike[str]) -> bool:
    """Whether `path` looks like a file written by `Bands.save` (by its first bytes)."""
    name = os.fspath(path)
    try:
        fmt = _resolve_format(name, None)
        if fmt == "npz":
            with np.load(name, allow_pickle=False) as z:
                return "meta" in z.files and BANDS_FORMAT in str(z["meta"])
        with open(name, encoding="utf-8", errors="replace") as fh:
            head = fh.read(256)
        return BANDS_FORMAT in head
    except (OSError, ValueError):
        return False


def _check_header(meta: Mapping[str, Any], source: str) -> None:
    if meta.get("format") != BANDS_FORMAT:
        raise ValueError(f"{source}: not a {BANDS_FORMAT} document (format={meta.get('format')!r})")
    if meta.get("version") != BANDS_VERSION:
        raise ValueError(f"{source}: unsupported {BANDS_FORMAT} version {meta.get('version')!r} "
                         f"(this chitally reads version {BANDS_VERSION})")


def _resolve_format(path: Any, format: str | None) -> str:
    if format is None:
        fmt = Path(os.fspath(path)).suffix.lower().lstrip(".")
        if fmt not in FORMATS:
            raise ValueError(f"cannot tell the file format from the ending of {os.fspath(path)!r}; "
                             f"use one of {', '.join('.' + f for f in FORMATS)} or pass format=")
        return fmt
    fmt = format.lower().lstrip(".")
    if fmt not in FORMATS:
        raise ValueError(f"bands are written as {', '.join(FORMATS)}, not {format!r}")
    return fmt


# ------------------------------------------------------------------- the statistics


def _sup_norms(rng: np.random.Generator, centred: np.ndarray, draws: int) -> np.ndarray:
    """``sup_t |B^(-1/2) sum_i xi_i centred_i(t)|`` for `draws` multiplier vectors."""
    b, g = centred.shape
    out = np.empty(draws, dtype=np.float64)
    cols = max(1, _BLOCK // _DRAW_BLOCK)
    for start in range(0, draws, _DRAW_BLOCK):
        xi = rng.standard_normal((min(_DRAW_BLOCK, draws - start), b))
        best = np.zeros(xi.shape[0])
        for c in range(0, g, cols):
            np.maximum(best, np.abs(xi @ centred[:, c:c + cols]).max(axis=1), out=best)
        out[start:start + xi.shape[0]] = best / math.sqrt(b)
    return out


def _percentile_band(rng: np.random.Generator, rows: np.ndarray, draws: int,
                     alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Pointwise alpha/2 and 1 - alpha/2 quantiles of the mean of B rows resampled with
    replacement (multinomial counts: the mean of a resample is counts @ rows / B)."""
    b, g = rows.shape
    counts = np.concatenate([rng.multinomial(b, np.full(b, 1.0 / b), size=min(_DRAW_BLOCK, draws - s))
                             for s in range(0, draws, _DRAW_BLOCK)]).astype(np.float64)
    lower, upper = np.empty(g), np.empty(g)
    cols = max(1, _BLOCK // max(draws, 1))
    for c in range(0, g, cols):
        means = counts @ rows[:, c:c + cols] / b
        lower[c:c + cols], upper[c:c + cols] = np.quantile(
            means, [alpha / 2, 1 - alpha / 2], axis=0, method="inverted_cdf")
    return lower, upper


def band_statistics(rows: Any, grid: Any, *, level: float = 0.95, seed: int = 0,
                    draws: int = DEFAULT_DRAWS, sample_size: int, eps: float,
                    max_dim: int | None = None, n_points: int, replace: bool = False) -> Bands:
    """Mean curve and bands from the (B x grid) matrix of replicate curves.

    Parameters
    ----------
    rows : array_like, (B, grid)
        Replicate i's curve on the grid in row i (integers; B >= 2).
    grid : array_like, (grid,)
        The scales.
    level : float
        Confidence level in (0, 1).
    seed : int
        Seeds the bootstrap draws (streams apart from the replicates').
    draws : int
        Multiplier and percentile bootstrap draws.
    sample_size, eps, max_dim, n_points, replace
        Recorded in the result (how the replicates were made).

    Returns
    -------
    Bands
        The simultaneous band is ``Ybar +- Z / sqrt(B)`` with Z the (1 - alpha) quantile
        of ``sup_t |B^(-1/2) sum_i xi_i (Y_i(t) - Ybar(t))|`` over ``xi ~ N(0, I_B)``;
        quantiles are empirical (``inverted_cdf``).

    Examples
    --------
    >>> rows = np.array([[5, 3], [5, 2], [5, 4], [5, 3]])
    >>> b = band_statistics(rows, [0.0, 1.0], sample_size=5, eps=1.0, n_points=50)
    >>> b.mean.tolist(), bool(b.lower_simultaneous[1] < 3.0 < b.upper_simultaneous[1])
    ([5.0, 3.0], True)
    """
    y = np.asarray(rows)
    if y.ndim != 2 or y.shape[0] < 2:
        raise ValueError(f"rows must be a (B, grid) matrix with B >= 2, got shape {y.shape}")
    g = np.asarray(grid, dtype=np.float64)
    if g.shape != (y.shape[1],):
        raise ValueError(f"grid has shape {g.shape}, the rows {y.shape[1]} columns")
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level!r}")
    y = y.astype(np.float64)
    b = y.shape[0]
    alpha = 1.0 - float(level)
    mean = y.mean(axis=0)
    sd = y.std(axis=0, ddof=1)
    half = NormalDist().inv_cdf(1.0 - alpha / 2) * sd / math.sqrt(b)
    sups = _sup_norms(statistics_generator(seed, 1), y - mean, draws)
    z = float(np.quantile(sups, 1.0 - alpha, method="inverted_cdf"))
    lo_p, hi_p = _percentile_band(statistics_generator(seed, 2), y, draws, alpha)
    return Bands(grid=g, mean=mean, sd=sd,
                 lower_simultaneous=mean - z / math.sqrt(b), upper_simultaneous=mean + z / math.sqrt(b),
                 lower_normal=mean - half, upper_normal=mean + half,
                 lower_percentile=lo_p, upper_percentile=hi_p,
                 level=float(level), replicates=b, sample_size=sample_size, sup_quantile=z,
                 draws=draws, seed=seed, eps=eps, max_dim=max_dim, n_points=n_points,
                 replace=replace)


# ------------------------------------------------------------------------ the driver


def bands(points: Any, eps: float, replicates: int, sample_size: int, *, grid: Any = None,
          max_dim: int | None = None, level: float = 0.95, seed: int = 0, replace: bool = False,
          draws: int = DEFAULT_DRAWS, per_task: int | None = None, store: str | None = None,
          where: Any = None, threads: int | None = None,
          storage_options: Mapping[str, Any] | None = None) -> Bands:
    """Confidence bands for the mean curve of size-m subsamples of a cloud.

    The bands cover the mean curve at sample size m (``E chi_m(t)`` on the grid), not the
    curve of the full cloud: see the module docstring for what that target is and when it
    approximates the population's mean at size m (``m * replicates`` much smaller than
    the cloud's size).

    Parameters
    ----------
    points : array of shape (n, d)
        The cloud.
    eps : float
        Largest scale of every replicate's Rips filtration.
    replicates : int
        B >= 2, the number of subsamples.
    sample_size : int
        m, points per subsample (at most n without replacement).
    grid : sequence of float or "START:STOP:COUNT", optional
        Scales in [0, eps]; default ``0:eps:101``.
    max_dim : int, optional
        Simplex dimension cap.
    level : float
        Confidence level in (0, 1).
    seed : int
        Replicate i draws its rows from a generator seeded by ``(seed, i)`` alone; the
        bootstrap draws from streams of their own.
    replace : bool
        Draw with replacement (a warning: repeated rows are dominated vertices, so each
        resample behaves like a smaller subsample).
    draws : int
        Bootstrap draws for the simultaneous and percentile bands.
    per_task : int, optional
        Replicates per engine task (default: about 16 tasks).
    store : str, optional
        A run store location: the replicates run as the `bands` job on the engine
        (resumable) with `where` (a `chitally.runs.Where`; default a LocalCluster).
    threads : int, optional
        In-process threads over replicates (default: all cores).

    Returns
    -------
    Bands

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> b = bands(rng.random((2000, 2)), 0.1, replicates=20, sample_size=100, grid="0:0.1:5")
    >>> float(b.mean[0]), b.replicates, b.sample_size
    (100.0, 20, 100)
    """
    from .jobs.bands import BandsParams, check_cloud, replicate_rows

    params = BandsParams.checked(eps, replicates, sample_size, grid, max_dim, level, seed, replace,
                                 per_task, draws)
    pts = check_cloud(points, params)
    if params.replace:
        warnings.warn(REPLACE_WARNING, UserWarning, stacklevel=2)
    if store is None:
        rows = replicate_rows(pts, range(params.replicates), params, threads=threads)
        return params.statistics(rows, pts.shape[0])
    from .jobs.bands import create_or_open
    from .runs import Where, run

    rs = create_or_open(store, pts, params, storage_options=storage_options)
    report = run(rs, where if where is not None else Where())
    if not report.complete:
        raise RuntimeError(f"{len(report.failed)} tasks failed; `chitally resume {rs.url}` continues")
    return report.result


def default_grid(eps: float) -> np.ndarray:
    """The default grid ``0:eps:101``."""
    from .curve import parse_grid

    return parse_grid(f"0:{float(eps)!r}:{DEFAULT_GRID_COUNT}")
