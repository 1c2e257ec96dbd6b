"""The `chitally` command: thin over the Python API.

Parses options, calls the API, prints, and sets the exit codes (documented in the
README): 0 done, 1 failure, 2 bad input or usage (nothing created), 3 incomplete but
resumable, 4 the run store is in use by another run (or this run lost its lease),
130 interrupted by SIGINT, 143 by SIGTERM. Heavy modules are imported inside commands so
that `chitally --help` starts fast.
"""

from __future__ import annotations

import functools
import json
import logging
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, NoReturn

import click

from . import __version__

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_INCOMPLETE = 3
EXIT_BUSY = 4
EXIT_SIGINT = 130
EXIT_SIGTERM = 143

GRID_HELP = "Also sample on START:STOP:COUNT evenly spaced scales."
CURVE_FORMATS = ("csv", "json", "npz")
_CURVE_KINDS = ("cloud", "cloud-parts", "graph", "field", "field-parts")  # job kinds whose result is one curve


def fail(message: str, code: int) -> NoReturn:
    """The one error style: `chitally: error: <one line>` on stderr, then exit `code`."""
    click.echo(f"chitally: error: {' '.join(str(message).split())}", err=True)
    sys.exit(code)


def say(message: str) -> None:
    click.echo(message, err=True)


def _store_url(text: str) -> str:
    # Workers resolve a relative path against their own working directory, which need not
    # be ours: hand them the absolute path of the store we mean.
    return text if "://" in text else os.path.abspath(text)


def _grid(text: str | None, option: str = "--grid") -> Any:
    if text is None:
        return None
    from .curve import parse_grid

    try:
        return parse_grid(text)
    except ValueError as exc:
        fail(f"{option}: {exc}", EXIT_USAGE)


def check_output(path: str | None, fmt: str | None, formats: tuple[str, ...] = CURVE_FORMATS,
                 option: str = "--out") -> str | None:
    """Check an output file and its format before any work; returns the format."""
    if path is None:
        return fmt
    if fmt is None:
        fmt = Path(path).suffix.lstrip(".").lower()
        if fmt not in formats:
            fail(f"{option} {path}: cannot tell the format from the ending "
                 f"{Path(path).suffix or '(none)'!r}; use one of {', '.join('.' + f for f in formats)} "
                 "or --format", EXIT_USAGE)
    folder = Path(path).resolve().parent
    if not folder.is_dir():
        fail(f"{option} {path}: the folder {folder} does not exist", EXIT_USAGE)
    if not os.access(folder, os.W_OK):
        fail(f"{option} {path}: the folder {folder} is not writable", EXIT_USAGE)
    if Path(path).is_dir():
        fail(f"{option} {path} is a folder, not a file", EXIT_USAGE)
    return fmt


def guarded(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Turn the API's exceptions into one line and an exit code (the only place)."""

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        from .cluster import ClusterError
        from .execute import SchedulerLost
        from .runs import Interrupted
        from .sources import InputError
        from .store import (
            InputsDamaged,
            LeaseHeld,
            LeaseLost,
            NotAStore,
            ResultDamaged,
            StoreError,
            StoreExists,
            StoreMismatch,
        )

        try:
            return fn(*args, **kwargs)
        except Interrupted as exc:
            fail(str(exc), EXIT_SIGTERM if exc.signal == 15 else EXIT_SIGINT)
        except KeyboardInterrupt:
            fail("interrupted", EXIT_SIGINT)
        except (InputError, StoreMismatch, NotAStore, StoreExists) as exc:
            fail(str(exc), EXIT_USAGE)
        except LeaseLost as exc:
            fail(str(exc), EXIT_BUSY)
        except LeaseHeld as exc:
            fail(str(exc).replace("pass takeover=True", "rerun with --takeover"), EXIT_BUSY)
        except SchedulerLost as exc:
            fail(f"{exc}; committed tasks are kept: `chitally resume {getattr(exc, 'url', 'RUN')}` "
                 "continues on a new cluster", EXIT_INCOMPLETE)
        except ResultDamaged as exc:
            fail(f"{exc}; `chitally resume` writes it again from the task outputs", EXIT_INCOMPLETE)
        except InputsDamaged as exc:
            fail(str(exc), EXIT_FAILURE)
        except (StoreError, ClusterError) as exc:
            fail(str(exc), EXIT_FAILURE)
        except ValueError as exc:
            fail(str(exc), EXIT_USAGE)

    return wrapper


class _Group(click.Group):
    def main(self, *args: Any, **kwargs: Any) -> Any:
        # click's own usage errors in our one style: "chitally: error: ..." and exit 2
        try:
            return super().main(*args, standalone_mode=False, **kwargs)
        except click.exceptions.NoArgsIsHelpError as exc:
            click.echo(exc.ctx.get_help() if exc.ctx else str(exc))
            sys.exit(EXIT_OK)
        except click.UsageError as exc:
            hint = f" (see `{exc.ctx.command_path} --help`)" if exc.ctx else ""
            fail(f"{exc.format_message()}{hint}", EXIT_USAGE)
        except click.exceptions.Abort:
            fail("interrupted", EXIT_SIGINT)
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            fail(exc.format_message(), exc.exit_code)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"],
                                           "auto_envvar_prefix": "CHITALLY"})
@click.version_option(__version__, prog_name="chitally")
@click.option("-v", "--verbose", count=True, help="More log output (-v info, -vv debug).")
def main(verbose: int) -> None:
    """Exact Euler characteristic curves of Vietoris-Rips filtrations of large point sets."""
    level = logging.WARNING - 10 * min(verbose, 2)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    # distributed configures its own INFO handlers when first imported; keep the terminal
    # for our progress and our one-line errors
    if not verbose:
        import dask

        dask.config.set({"logging.distributed": "warning", "logging.bokeh": "error",
                         "logging.tornado": "error"})


# ------------------------------------------------------------------ shared options

input_arg = click.argument("input", metavar="INPUT")
eps_opt = click.option("--eps", type=float, required=True,
                       help="Largest scale (> 0): edges join points at distance <= eps.")
dim_opt = click.option("--max-dim", type=int, default=None,
                       help="Count simplices up to this dimension (default: all).")
_key_opt = click.option("--key", default=None,
                        help="Array, dataset or columns inside INPUT (npz, zarr, hdf5, parquet).")
_columns_opt = click.option("--columns", default=None,
                            help="Columns of a CSV/TSV/Parquet INPUT to read, by name or 0-based number: x,y,z or 1,2,3.")
_index_col_opt = click.option("--index-col", default=None,
                              help="A column of a CSV/TSV INPUT to drop (a row index), by name or number.")


def key_opt(fn: Callable[..., Any]) -> Callable[..., Any]:
    """--key, --columns and --index-col: which data inside INPUT to read."""
    return _key_opt(_columns_opt(_index_col_opt(fn)))


def _read(input: str, key: str | None, columns: str | None, index_col: str | None) -> Any:
    from .sources import read_points
    from .validate import validate_column, validate_columns

    return read_points(input, key=key, columns=validate_columns(columns, name="--columns"),
                       index_col=validate_column(index_col, name="--index-col"))
radius_opt = click.option("--cover-radius", type=float, default=None,
                          help="Ball radius of the cover (default: eps).")
cost_opt = click.option("--task-cost", type=float, default=None,
                        help="Target cost per task (default: the planner's choice).")

# chitally.metric.METRICS, spelled out so that the CLI starts without importing numba
# (tests/test_metric.py checks that the two agree)
METRIC_CHOICES = ("euclidean", "manhattan", "chebyshev")
metric_opt = click.option("--metric", type=click.Choice(METRIC_CHOICES), default="euclidean",
                          show_default=True,
                          help="Distance between points: euclidean, manhattan (sum of |dx|, p = 1) "
                               "or chebyshev (largest |dx|, p = inf).")

_NAMES = {"eps": "--eps", "max_dim": "--max-dim", "cover_radius": "--cover-radius",
          "task_cost": "--task-cost", "cell_size": "--cell-size", "region_rows": "--region-rows",
          "metric": "--metric"}


def planner_opts(fn: Callable[..., Any]) -> Callable[..., Any]:
    """--planner, --cell-size, --region-rows: where a cloud is planned."""
    for opt in reversed([
        click.option("--planner", type=click.Choice(["auto", "driver", "cluster"]), default="auto",
                     show_default=True,
                     help="Plan in this process (driver) or as stages on the cluster, never "
                          "holding the points (cluster); auto plans on the cluster when the "
                          "driver would need more than 2 GiB (about 5x the coordinates)."),
        click.option("--cell-size", type=float, default=None,
                     help="Cluster planner: side of the grid cells, >= eps (default: 2 eps)."),
        click.option("--region-rows", type=int, default=None,
                     help="Cluster planner: most points of a region, the unit of a planning "
                          "task (default: 1,000,000)."),
    ]):
        fn = opt(fn)
    return fn


def _stage_params(eps: float, cell_size: float | None, region_rows: int | None) -> Any:
    from .jobs.stages import StageParams

    return StageParams.checked(eps, cell_size, region_rows, names=_NAMES)


def _stage_bars(progress: bool) -> Callable[[str], Any]:
    def bar(stage: str) -> Any:
        say(f"planning stage {stage}")
        return ProgressBar(progress, "tasks")

    return bar


def _say_stages(report: Any) -> None:
    parts = ", ".join(f"{name} {sec:.1f} s" for name, sec in report.seconds.items())
    say(f"planned on the cluster: {parts}; driver peak {report.driver_peak / 2**20:.0f} MiB")


def _cloud_params(eps: float, max_dim: int | None, cover_radius: float | None = None,
                  task_cost: float | None = None, metric: str = "euclidean") -> Any:
    from .jobs.cloud import Params

    return Params.checked(eps, max_dim, cover_radius, task_cost, names=_NAMES, metric=metric)


def _executor_options(fn: Callable[..., Any]) -> Callable[..., Any]:
    for opt in reversed([
        click.option("--scheduler", default=None, envvar="DASK_SCHEDULER_ADDRESS", show_envvar=True,
                     help="Address of a running Dask scheduler, tcp:// or tls:// (default: start a LocalCluster)."),
        click.option("--scheduler-file", default=None, type=click.Path(exists=True, dir_okay=False),
                     help="Dask scheduler file of a running cluster."),
        click.option("--workers", type=int, default=None,
                     help="LocalCluster worker processes (default: one per core)."),
        click.option("--threads", type=int, default=None, help="Threads per LocalCluster worker."),
        click.option("--serial", is_flag=True, help="Run the tasks one by one in this process (no Dask)."),
        click.option("--retries", type=int, default=None,
                     help="Retries of a task that raised an error (default: chitally.retries "
                          "of the Dask config, 2)."),
        click.option("--takeover", is_flag=True, help="Take over the lease of a run that stopped heartbeating."),
        click.option("--lost-after", type=float, default=None,
                     help="Seconds without any worker before a run stops as lost, exit 3, "
                          "resumable (default: chitally.lost-after, 60 s)."),
        click.option("--wait-workers", type=int, default=None,
                     help="Workers an existing scheduler must have before tasks are sent "
                          "(default: chitally.scheduler.wait-workers, 1; 0: do not wait)."),
        click.option("--wait-timeout", type=float, default=None,
                     help="Seconds to wait for them (default: chitally.scheduler.wait-timeout, 300)."),
        click.option("--tls-ca-file", default=None, type=click.Path(exists=True, dir_okay=False),
                     help="TLS: the authority that signed the scheduler's and workers' certificates."),
        click.option("--tls-cert", default=None, type=click.Path(exists=True, dir_okay=False),
                     help="TLS: this client's certificate (PEM)."),
        click.option("--tls-key", default=None, type=click.Path(exists=True, dir_okay=False),
                     help="TLS: this client's private key (PEM), unless --tls-cert holds it."),
        click.option("--progress/--no-progress", default=True, help="Terminal progress bar."),
    ]):
        fn = opt(fn)
    return fn


def _where(scheduler: str | None, scheduler_file: str | None, workers: int | None,
           threads: int | None, serial: bool, retries: int | None, takeover: bool,
           lost_after: float | None, wait_workers: int | None = None,
           wait_timeout: float | None = None, tls_ca_file: str | None = None,
           tls_cert: str | None = None, tls_key: str | None = None) -> Any:
    from .runs import Where
    from .validate import validate_count, validate_positive

    if workers is not None:
        validate_count(workers, name="--workers", minimum=1)
    if threads is not None:
        validate_count(threads, name="--threads", minimum=1)
    if retries is not None:
        validate_count(retries, name="--retries", minimum=0)
    if lost_after is not None:
        validate_positive(lost_after, name="--lost-after")
    if wait_workers is not None:
        validate_count(wait_workers, name="--wait-workers", minimum=0)
    if wait_timeout is not None:
        validate_positive(wait_timeout, name="--wait-timeout")
    security = None
    if tls_ca_file or tls_cert or tls_key:
        from .cluster import make_security

        security = make_security(tls_ca_file, tls_cert, tls_key)
    return Where(scheduler=scheduler, scheduler_file=scheduler_file, workers=workers,
                 threads=threads, serial=serial, retries=retries, takeover=takeover,
                 lost_after=lost_after, wait_workers=wait_workers, wait_timeout=wait_timeout,
                 security=security)


def parse_storage_options(pairs: tuple[str, ...] | list[str] = (),
                          file: str | None = None) -> dict[str, Any] | None:
    """Storage options for fsspec from a JSON file and KEY=VALUE pairs (pairs win).

    A VALUE that parses as JSON is taken as such (``anon=true``, ``config_kwargs={...}``),
    anything else as a string. Returns None when neither is given.
    """
    if not pairs and file is None:
        return None
    options: dict[str, Any] = {}
    if file is not None:
        try:
            with open(file, encoding="utf-8") as f:
                loaded = json.load(f)
        except (OSError, ValueError) as exc:
            raise click.BadParameter(f"{file}: {exc}", param_hint="--storage-options") from None
        if not isinstance(loaded, dict):
            raise click.BadParameter(f"{file} holds a JSON {type(loaded).__name__}, not an object",
                                     param_hint="--storage-options")
        options.update(loaded)
    for pair in pairs:
        key, sep, text = pair.partition("=")
        if not sep or not key.strip():
            # never echo the pair: it may hold a secret
            raise click.BadParameter("expected KEY=VALUE", param_hint="--storage-option")
        try:
            value: Any = json.loads(text)
        except ValueError:
            value = text
        options[key.strip()] = value
    return options


def storage_opts(fn: Callable[..., Any]) -> Callable[..., Any]:
    """--storage-option KEY=VALUE (repeatable) and --storage-options FILE.json, handed to
    the command as one `store_options` dict (or None)."""

    @functools.wraps(fn)
    def wrapper(*args: Any, storage_option: tuple[str, ...] = (),
                storage_options_file: str | None = None, **kwargs: Any) -> Any:
        kwargs["store_options"] = parse_storage_options(storage_option, storage_options_file)
        return fn(*args, **kwargs)

    for opt in reversed([
        click.option("--storage-option", "storage_option", multiple=True, metavar="KEY=VALUE",
                     help="An fsspec option for an object-store run store (repeatable; VALUE "
                          "may be JSON). Prefer credentials from the environment."),
        click.option("--storage-options", "storage_options_file", default=None, metavar="FILE.json",
                     type=click.Path(exists=True, dir_okay=False),
                     help="fsspec options for the run store from a JSON object (--storage-option wins)."),
    ]):
        wrapper = opt(wrapper)
    return wrapper


class ProgressBar:
    """Terminal progress weighted by task cost (one adapter among the executor's events)."""

    def __init__(self, enabled: bool, unit: str = "tasks") -> None:
        self.enabled = enabled
        self.unit = unit
        self.units = 0
        self.bar: Any = None
        self.cost: Any = None

    def on_pending(self, store: Any, pending: list[int]) -> None:
        if not self.enabled:
            return
        from tqdm import tqdm

        self.cost = store.task_cost()
        if self.bar is not None:
            self.bar.close()
        self.bar = tqdm(total=float(self.cost[pending].sum()), desc=f"{len(pending)} tasks",
                        file=sys.stderr, dynamic_ncols=True, disable=None,
                        bar_format="{desc}: {percentage:3.0f}%|{bar}| {elapsed}<{remaining}")

    def on_connect(self, conn: Any) -> None:
        if conn.dashboard:
            say(f"dashboard: {conn.dashboard}")
            if conn.cluster is not None:
                say(f"  from another machine: {conn.ssh_hint()}")

    def task_started(self, task: int, attempt: str) -> None:
        pass

    def task_done(self, result: Any) -> None:
        if self.bar is not None and self.cost is not None:
            # progress in the kind's own unit (clouds, points, replicates) beside the bar
            self.units += int(result.counters.get(self.unit, 0))
            if self.units:
                self.bar.set_description(f"{self.units} {self.unit} done", refresh=False)
            self.bar.update(float(self.cost[result.task]))

    def task_retry(self, task: int, attempt: str, message: str) -> None:
        if self.bar is not None:
            self.bar.write(f"task {task}: attempt {attempt} failed, retrying: {message}")

    def task_failed(self, task: int, message: str, attempts: int) -> None:
        if self.bar is not None:
            self.bar.write(f"task {task} failed after {attempts} attempts: {message}")

    def tick(self) -> None:
        if self.bar is not None:
            self.bar.refresh()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _plan_and_run(url: str, inp: Any, params: Any, stage: Any, where: Any, progress: bool,
                  store_options: dict[str, Any] | None, resume: bool = False) -> Any:
    """Plan on the cluster (or continue planning), then run, on one cluster."""
    from .runs import Session
    from .staged import StageReport, plan_run, resume_planning

    report = StageReport()
    bar = ProgressBar(progress, "points")
    with Session(where, on_connect=bar.on_connect) as session:
        if resume:
            store = resume_planning(url, session, storage_options=store_options,
                                    events=_stage_bars(progress), report=report)
        else:
            store = plan_run(url, inp, params, stage, session, storage_options=store_options,
                             events=_stage_bars(progress), report=report)
        _say_stages(report)
        try:
            return session.run(store, events=bar, on_pending=bar.on_pending)
        finally:
            bar.close()


def _run_store(store: Any, where: Any, progress: bool) -> Any:
    from .jobs import kind_of
    from .runs import run

    unit = kind_of(store.kind).unit
    if store.kind == "batch":  # a batch counts its own items (clouds, graphs or fields)
        from .jobs.batch import items_of

        unit = items_of(store.params)
    bar = ProgressBar(progress, unit)
    try:
        return run(store, where, events=bar, on_pending=bar.on_pending, on_connect=bar.on_connect)
    finally:
        bar.close()


def _print_samples(curve: Any, grid: Any) -> None:
    click.echo("scale,chi")
    for t, v in zip(grid, curve.sample(grid)):
        click.echo(f"{float(t)!r},{int(v)}")


def _emit_curve(curve: Any, grid: Any, out: str | None, fmt: str | None) -> None:
    """Write a curve (or its samples on `grid`) to `out`, or print the samples."""
    if out is not None:
        _save(curve, out, fmt, grid)
        say(f"wrote {out}")
    elif grid is not None:
        _print_samples(curve, grid)


def _report(report: Any, grid: Any = None) -> None:
    say(f"{report.url}: {report.done}/{report.n_tasks} tasks done, {report.computed} computed now, "
        f"{len(report.failed)} failed, {report.seconds:.1f} s")
    if report.set_aside:
        say(f"  damaged outputs set aside and computed again: tasks {sorted(set(report.set_aside))}")
    for task, message in sorted(report.failed.items()):
        say(f"  task {task} failed: {message}")
    if not report.complete:
        say(f"incomplete: fix the cause, then `chitally resume {report.url}`")
        sys.exit(EXIT_INCOMPLETE)
    if report.kind in _CURVE_KINDS:
        c = report.result
        end = "eps" if report.kind == "cloud" else f"{c.eps:g}"
        say(f"curve: {c.n_jumps} jumps, chi({c.start:g}) = {c.at(c.start)}, chi({end}) = {c.final}, "
            f"digest {c.digest()[:16]}")
        _emit_curve(c, grid, None, None)
    elif report.kind == "bands":
        b = report.result
        say(f"bands: mean curve of {b.sample_size} points from {b.replicates} replicates on "
            f"{b.grid.size} scales; {100 * b.level:g}% simultaneous half-width "
            f"{b.sup_quantile / b.replicates ** 0.5:.4g}")
    else:
        m = report.result
        say(f"feature matrix: {m.values.shape[0]} rows x {m.values.shape[1]} grid points")
    say(f"export: chitally export {report.url} --out FILE")


def _compile_first(max_dim: int | None, dim: int | None) -> float:
    """Compile (or load) the kernels a run needs before it starts, saying so when the
    cache is cold, so a first run does not sit silent at 0 %; returns the seconds."""
    from .warmup import kernels_cached, warm_up

    dims = None if dim is None else [dim]
    if kernels_cached([max_dim], dims):
        return 0.0
    say("compiling kernels (first run only, about a minute; `python -m chitally.warmup` does it ahead)")
    seconds = warm_up([max_dim], dims, processes=min(2, os.cpu_count() or 1))
    say(f"kernels compiled in {seconds:.0f} s")
    return seconds


# ------------------------------------------------------------------ commands

@main.command("curve")
@input_arg
@eps_opt
@dim_opt
@key_opt
@click.option("--out", "out", default=None, help="Write the curve here (.csv, .json, .npz).")
@click.option("--format", "fmt", type=click.Choice(CURVE_FORMATS), default=None,
              help="Output format (default: from --out's ending).")
@click.option("--grid", default=None, help=GRID_HELP + " With --out, the file holds the samples.")
@click.option("--threads", type=int, default=None, help="Kernel threads (default: by size).")
@metric_opt
@guarded
def curve_cmd(input: str, eps: float, max_dim: int | None, key: str | None, columns: str | None,
              index_col: str | None, out: str | None, fmt: str | None, grid: str | None,
              threads: int | None, metric: str) -> None:
    """Compute the curve of INPUT in this process."""
    params = _cloud_params(eps, max_dim, metric=metric)
    grid_values = _grid(grid)
    fmt = check_output(out, fmt)
    from .inprocess import euler_curve

    points = _read(input, key, columns, index_col)
    _compile_first(params.max_dim, points.shape[1])
    curve, stats = euler_curve(points, params.eps, params.max_dim, threads=threads, return_stats=True,
                               metric=params.metric)
    say(f"{points.shape[0]} points in R^{points.shape[1]}"
        f"{'' if params.metric == 'euclidean' else ' (' + params.metric + ')'}, eps {params.eps:g}, max_dim "
        f"{params.max_dim if params.max_dim is not None else 'none'}: {stats.edges} edges; "
        f"{curve.n_jumps} jumps, chi(0) = {curve.at(0.0)}, chi(eps) = {curve.final}; "
        f"{stats.seconds_graph + stats.seconds_count:.2f} s")
    _emit_curve(curve, grid_values, out, fmt)


_PLAN_LABELS = {
    "points": "points",
    "dim": "coordinates per point",
    "eps": "eps (largest scale)",
    "metric": "distance between points",
    "max_dim": "simplex dimension cap",
    "radius": "ball radius of the cover",
    "balls": "balls in the cover",
    "tasks": "tasks",
    "owned_rows": "points owned per task",
    "halo_rows": "points read per task",
    "replication": "points read / points",
}


def plan_lines(summary: dict[str, Any]) -> list[str]:
    """A plan summary in plain words, one figure a line."""
    lines = []
    labels = dict(_PLAN_LABELS)
    if (summary.get("planner") or {}).get("kind") == "cluster":
        labels.update(radius="side of a grid cell", balls="regions")
    for key, label in labels.items():
        if key not in summary:
            continue
        value = summary[key]
        if isinstance(value, dict):
            text = f"{value['min']:g} to {value['max']:g} (median {value['median']:g})"
        elif value is None:
            text = "none"
        elif isinstance(value, float):
            text = f"{value:.4g}"
        else:
            text = str(value)
        lines.append(f"{label:>28}: {text}")
    share = summary["heaviest_task_cost"] / summary["total_cost"] if summary["total_cost"] else 0.0
    lines.append(f"{'largest task':>28}: {share:.1%} of the work")
    lines.append(f"{'peak memory of a task':>28}: {summary['max_task_memory'] / 2**20:.1f} MiB (estimate)")
    return lines


def planner_lines(planner: dict[str, Any] | None) -> list[str]:
    if not planner:
        return []
    secs = planner["seconds"]
    when = ", ".join(f"{k} {v:.2f} s" for k, v in secs.items()) if isinstance(secs, dict) else f"{secs:.2f} s"
    return [f"{'planner':>28}: {planner['kind']} ({when})",
            f"{'planner peak memory':>28}: {planner['driver_peak'] / 2**20:.1f} MiB",
            f"{'expected driver peak':>28}: {planner['expected_driver_peak'] / 2**20:.1f} MiB (estimate)"]


def _plan_input(input: str, key: str | None, columns: str | None, index_col: str | None) -> Any:
    """The input as the cluster planner sees it: a source its workers open (never read
    whole here) where the format allows, else the validated points."""
    from .lazy import open_points
    from .staged import PlanInput
    from .validate import validate_column, validate_columns

    cols = validate_columns(columns, name="--columns")
    idx = validate_column(index_col, name="--index-col")
    source = open_points(input, key=key, columns=cols, index_col=idx)
    if not source.random_access:  # a text table: read once here rather than by every block
        return PlanInput.of_points(source.read_all())
    where = input if "://" in str(input) else os.path.abspath(input)
    spec = {"path": where, "key": key, "columns": cols, "index_col": idx}
    return PlanInput(source.n_rows, source.dim, {"source": source.token(), "shape": [source.n_rows, source.dim]},
                     source=spec, opened=source)


def choose(planner: str, inp: Any) -> str:
    from .staged import choose_planner

    return choose_planner(planner, inp.n_rows, inp.dim)


@main.command("plan")
@input_arg
@eps_opt
@dim_opt
@key_opt
@radius_opt
@cost_opt
@metric_opt
@planner_opts
@click.option("--out", "out", default=None,
              help="Cluster planner: the run store to plan into (the stages run; no curve yet).")
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON.")
@_executor_options
@storage_opts
@guarded
def plan_cmd(input: str, eps: float, max_dim: int | None, key: str | None, columns: str | None,
             index_col: str | None, cover_radius: float | None, task_cost: float | None,
             metric: str, planner: str, cell_size: float | None, region_rows: int | None,
             out: str | None, as_json: bool, progress: bool, store_options: dict[str, Any] | None,
             **how: Any) -> None:
    """Show what a run would do (tasks, halos, cost, memory, the planner's own time and
    memory, store layout). The driver's planner writes nothing; the cluster planner runs
    its stages into --out, and `chitally run` or `resume` then computes the curve."""
    from .jobs.cloud import describe

    params = _cloud_params(eps, max_dim, cover_radius, task_cost, metric)
    stage = _stage_params(params.eps, cell_size, region_rows)
    inp = _plan_input(input, key, columns, index_col)
    if choose(planner, inp) == "cluster":
        if out is None:
            from .validate import InputError

            raise InputError("--planner cluster plans into a run store: give --out RUN")
        from .jobs.cloud import expected_driver_peak
        from .runs import Session
        from .staged import StageReport, plan_run, summarise
        from .store import describe_layout

        report = StageReport()
        with Session(_where(**how)) as session:
            store = plan_run(_store_url(out), inp, params, stage, session, storage_options=store_options,
                             events=_stage_bars(progress), report=report)
        summary = summarise(store)
        summary["planner"] = {"kind": "cluster", "seconds": report.seconds,
                              "driver_peak": report.driver_peak,
                              "expected_driver_peak": max(report.driver_peak, expected_driver_peak(summary))}
        summary["warnings"] = []
        summary["layout"] = describe_layout(summary["tasks"])
    else:
        summary = describe(inp.points if inp.points is not None else inp.opened.read_all(), params)
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    for line in plan_lines(summary):
        click.echo(line)
    for line in planner_lines(summary.get("planner")):
        click.echo(line)
    for w in summary["warnings"]:
        click.echo(f"warning: {w}")
    click.echo("store layout:")
    click.echo(summary["layout"])


@main.command("run")
@input_arg
@eps_opt
@dim_opt
@key_opt
@click.option("--out", "out", required=True, help="The run store: a local path or an fsspec URL all workers reach.")
@radius_opt
@cost_opt
@metric_opt
@click.option("--grid", default=None, help=GRID_HELP)
@click.option("--discard", is_flag=True, help="Delete committed work of an unfinished store at --out.")
@planner_opts
@_executor_options
@storage_opts
@guarded
def run_cmd(input: str, eps: float, max_dim: int | None, key: str | None, columns: str | None,
            index_col: str | None, out: str,
            cover_radius: float | None, task_cost: float | None, metric: str, grid: str | None,
            discard: bool, planner: str, cell_size: float | None, region_rows: int | None,
            progress: bool, store_options: dict[str, Any] | None, **how: Any) -> None:
    """Plan, execute and reduce: the exact curve of INPUT on a Dask cluster."""
    from .jobs.cloud import create_or_open, plan_warnings

    params = _cloud_params(eps, max_dim, cover_radius, task_cost, metric)
    stage = _stage_params(params.eps, cell_size, region_rows)
    grid_values = _grid(grid)
    where = _where(**how)
    inp = _plan_input(input, key, columns, index_col)  # validated before any store exists
    if choose(planner, inp) == "cluster":
        _compile_first(params.max_dim, inp.dim)
        _report(_plan_and_run(_store_url(out), inp, params, stage, where, progress, store_options),
                grid_values)
        return
    points = inp.points if inp.points is not None else inp.opened.read_all()
    _compile_first(params.max_dim, points.shape[1])  # workers then load from the cache
    store = create_or_open(_store_url(out), points, params, storage_options=store_options,
                           discard=discard)
    from .jobs.cloud import read_plan

    for w in plan_warnings(read_plan(store)):
        say(f"warning: {w}")
    _report(_run_store(store, where, progress), grid_values)


_GRAPH_NAMES = {"max_dim": "--max-dim", "threshold": "--threshold", "task_cost": "--task-cost",
                "grid": "--grid", "values": "--values", "weights": "--weights", "tasks": "--tasks",
                "superlevel": "--superlevel", "start": "--start"}
values_opt = click.option("--values", default=None,
                          help="Vertex values: degree (the default without --weights), closeness, heat:T, "
                               "or a node attribute.")
weights_opt = click.option("--weights", default=None,
                           help="Edge attribute to filter by (edge weights, flag filtration); an edge "
                                "list's third column is 'weight'.")
superlevel_opt = click.option("--superlevel", is_flag=True,
                              help="Filter from the largest value down (the curve's scale is the negated values).")
threshold_opt = click.option("--threshold", type=float, default=None,
                             help="Count only simplices of value <= X (>= X with --superlevel).")


@main.command("field")
@input_arg
@click.option("--key", default=None,
              help="Array inside INPUT (an .npz name, a Zarr group's array, an HDF5 dataset).")
@click.option("--construction", type=click.Choice(["vertices", "cells"]), default="vertices", show_default=True,
              help="vertices: entries are vertices, cubes take the max of their corners (4/6-connected); "
                   "cells: entries are top cubes, faces take the min around them (8/26-connected).")
@click.option("--superlevel", is_flag=True, help="Superlevel sets {f >= s}: the curve of -f (its scale is -s).")
@click.option("--mask", "mask_path", default=None,
              help="A boolean array of INPUT's shape (.npy, .npz, .zarr, .h5): True where an entry "
                   "is part of the complex, the others are missing. With --run, .npy/Zarr/HDF5 masks "
                   "are read block by block where they are.")
@click.option("--mask-key", default=None, help="Array inside the --mask file (as --key).")
@click.option("--mask-nan", is_flag=True, help="NaN entries are missing (default: refused).")
@click.option("--grid", default=None, help="START:STOP:COUNT scales to sample, within the values' range.")
@click.option("--block", default=None, help="Entries each task owns along each axis, e.g. 64,64,64 (with --run).")
@click.option("--part-jumps", type=int, default=None,
              help="With --run: jumps one part of the curve holds (default 2^24); an array that may "
                   "have more distinct values has its curve reduced in parts of the scale on the workers.")
@click.option("--out", "out", default=None, help="Write the curve here (.csv, .json, .npz), in process.")
@click.option("--format", "fmt", type=click.Choice(CURVE_FORMATS), default=None,
              help="Output format (default: from --out's ending).")
@click.option("--run", "run_url", default=None,
              help="Compute as a resumable run on this run store (a path or fsspec URL all workers reach).")
@click.option("--discard", is_flag=True, help="Delete committed work of an unfinished store at --run.")
@_executor_options
@storage_opts
@guarded
def field_cmd(input: str, key: str | None, construction: str, superlevel: bool, mask_path: str | None,
              mask_key: str | None, mask_nan: bool, grid: str | None, block: str | None, part_jumps: int | None,
              out: str | None, fmt: str | None,
              run_url: str | None, discard: bool, progress: bool,
              store_options: dict[str, Any] | None, **how: Any) -> None:
    """The exact curve of an array's cubical filtration (image, volume, any n-D array)."""
    from .field_sources import read_field, stays_in_place
    from .jobs.field import FieldParams

    grid_values = _grid(grid)
    block_shape = None
    if block is not None:
        try:
            block_shape = tuple(int(x) for x in block.split(","))
        except ValueError:
            fail(f"--block must be comma-separated integers, got {block!r}", EXIT_USAGE)
    params = FieldParams.checked(construction, superlevel, mask_nan, block_shape, part_jumps,
                                 names={"construction": "--construction", "block": "--block",
                                        "part_jumps": "--part-jumps"})
    if run_url is None:
        if out is not None and block is not None:
            say("warning: --block applies to --run only")
        if part_jumps is not None:
            say("warning: --part-jumps applies to --run only")
        fmt = check_output(out, fmt)
        from .cubical import check_mask, field_curve

        arr = read_field(input, key)
        mask = None if mask_path is None else \
            check_mask(read_field(mask_path, mask_key), tuple(arr.shape), what=f"--mask {mask_path}")
        curve = field_curve(arr, construction, superlevel=superlevel, mask=mask, mask_nan=mask_nan)
        say(f"{arr.ndim}-D array of shape {tuple(arr.shape)} ({arr.dtype}), {construction}: "
            f"{curve.n_jumps} jumps on [{curve.start:g}, {curve.eps:g}], chi(end) = {curve.final}")
        _emit_curve(curve, grid_values, out, fmt)
        return
    if out is not None:
        fail("--out writes an in-process curve; with --run use `chitally export`", EXIT_USAGE)
    from .jobs.field import create_or_open

    where = _where(**how)
    source: Any = input if stays_in_place(input) else read_field(input, key)
    if isinstance(source, str) and "://" not in source:
        source = os.path.abspath(source)
    mask: Any = None
    if mask_path is not None:
        mask = mask_path if stays_in_place(mask_path) else read_field(mask_path, mask_key)
        if isinstance(mask, str) and "://" not in mask:
            mask = os.path.abspath(mask)
    store = create_or_open(_store_url(run_url), source, params, key=key, mask=mask, mask_key=mask_key,
                           storage_options=store_options, discard=discard, names={"mask": "--mask"})
    _report(_run_store(store, where, progress), grid_values)


@main.command("batch")
@input_arg
@click.option("--eps", type=float, default=None,
              help="Point clouds: largest scale (> 0): edges join points at distance <= eps.")
@click.option("--grid", required=True,
              help="Sample every curve on START:STOP:COUNT scales (in [0, eps] for clouds; any scales for "
                   "graphs and fields, negated with --superlevel).")
@dim_opt
@click.option("--normalise", is_flag=True,
              help="Divide each row by its cloud's points (graph's vertices, field's present entries).")
@click.option("--labels", default=None, type=click.Path(exists=True, dir_okay=False),
              help="CSV of name,label lines; labels travel with the rows (a graph collection's own "
                   "labels, or a field folder's class subfolders, otherwise).")
@key_opt
@click.option("--graphs", is_flag=True,
              help="INPUT is a folder of edge lists (detected for the benchmark layout and for "
                   ".edges/.edgelist files).")
@click.option("--fields", is_flag=True,
              help="INPUT holds arrays (images, volumes): a folder of images or .npy arrays, or of one "
                   "subfolder per class (the subfolder names are the labels), or one .npy/.zarr stack "
                   "whose first axis indexes the items (detected for folders of PNG/JPEG/TIFF images, "
                   "implied by --construction and --mask-nan).")
@click.option("--construction", type=click.Choice(["vertices", "cells"]), default=None,
              help="Fields: vertices (entries are vertices, cubes take the max of their corners; "
                   "4/6-connected; the default) or cells (entries are top cubes, faces take the min "
                   "around them; 8/26-connected).")
@click.option("--mask-nan", is_flag=True, help="Fields: NaN entries are missing (default: refused).")
@values_opt
@weights_opt
@superlevel_opt
@threshold_opt
@cost_opt
@click.option("--metric", type=click.Choice(METRIC_CHOICES), default=None,
              help="Point clouds: distance between points (default euclidean); manhattan (sum of |dx|, "
                   "p = 1) or chebyshev (largest |dx|, p = inf).")
@click.option("--out", "out", required=True, help="The run store: a local path or an fsspec URL all workers reach.")
@click.option("--discard", is_flag=True, help="Delete committed work of an unfinished store at --out.")
@_executor_options
@storage_opts
@guarded
def batch_cmd(input: str, eps: float | None, grid: str, max_dim: int | None, normalise: bool,
              labels: str | None, key: str | None, columns: str | None, index_col: str | None,
              graphs: bool, fields: bool, construction: str | None, mask_nan: bool,
              values: str | None, weights: str | None, superlevel: bool,
              threshold: float | None, task_cost: float | None, metric: str | None, out: str, discard: bool,
              progress: bool, store_options: dict[str, Any] | None, **how: Any) -> None:
    """A feature matrix: every cloud of INPUT (a folder of point files, an .npz of
    arrays, a 3-D .npy or a Zarr group), every graph of INPUT (a folder in the graph
    benchmark layout, or of edge lists), or every field of INPUT (--fields: a folder of
    images or .npy arrays, or of one subfolder per class; a .npy or Zarr stack whose
    first axis indexes the items; an .npz of arrays), as its exact curve sampled on the
    grid. A graph's or field's row is 0 at scales below its smallest value and the whole
    complex's value above its largest."""
    from .field_sources import is_field_collection
    from .graph_sources import is_graph_collection

    grid_values = _grid(grid)
    if fields or construction is not None or mask_nan or (not graphs and is_field_collection(input)):
        if graphs:
            fail("--graphs and --fields (or --construction, --mask-nan): INPUT is one or the other", EXIT_USAGE)
        _field_batch(input, eps, grid_values, max_dim, normalise, labels, key, columns, index_col, construction,
                     mask_nan, values, weights, superlevel, threshold, task_cost, metric, out, discard, progress,
                     how, store_options)
        return
    if graphs or is_graph_collection(input):
        if metric is not None:
            fail("--metric applies to point clouds; graphs have no coordinates", EXIT_USAGE)
        _graph_batch(input, eps, grid_values, max_dim, normalise, labels, key, columns, index_col,
                     values, weights, superlevel, threshold, task_cost, out, discard, progress, how,
                     store_options)
        return
    from .clouds import Collection, read_collection, read_labels
    from .jobs.batch import BatchParams, create_or_open

    for option, value in (("--values", values), ("--weights", weights), ("--threshold", threshold),
                          ("--superlevel", superlevel or None)):
        if value is not None:
            fail(f"{option} applies to graphs; {input} is read as point clouds (--graphs says otherwise)",
                 EXIT_USAGE)
    if eps is None:
        fail("--eps is required for point clouds (the largest scale)", EXIT_USAGE)
    params = BatchParams.checked(eps, grid_values, max_dim, normalise, task_cost,
                                 names={**_NAMES, "grid": "--grid"}, metric=metric)
    where = _where(**how)
    if columns is not None or index_col is not None:
        fail("--columns and --index-col apply to one file, not to a collection (use --key)", EXIT_USAGE)
    col = read_collection(input, key=key)
    if labels is not None:
        col = Collection(col.names, col.clouds, read_labels(labels, col.names))
    store = create_or_open(_store_url(out), col, params, storage_options=store_options,
                           discard=discard)
    say(f"{len(col)} clouds in R^{col.dim}"
        f"{'' if params.metric == 'euclidean' else ' (' + params.metric + ')'}, "
        f"{sum(c.shape[0] for c in col.clouds)} points, {store.n_tasks} tasks")
    _report(_run_store(store, where, progress))


def _graph_batch(input: str, eps: float | None, grid_values: Any, max_dim: int | None, normalise: bool,
                 labels: str | None, key: str | None, columns: str | None, index_col: str | None,
                 values: str | None, weights: str | None, superlevel: bool, threshold: float | None,
                 task_cost: float | None, out: str, discard: bool, progress: bool,
                 how: dict[str, Any], store_options: dict[str, Any] | None = None) -> None:
    import numpy as np

    from .clouds import read_labels
    from .graph_sources import GraphCollection, graph_collection
    from .jobs.batch import GraphBatchParams, create_or_open_graphs

    if eps is not None:
        fail("--eps is the largest scale of point clouds; graphs take --threshold", EXIT_USAGE)
    if key is not None or columns is not None or index_col is not None:
        fail("--key, --columns and --index-col apply to point files, not to graphs", EXIT_USAGE)
    params = GraphBatchParams.checked(grid_values, "auto" if values is None else values, weights, max_dim,
                                      superlevel, threshold, normalise, task_cost, names=_GRAPH_NAMES)
    where = _where(**how)
    col = graph_collection(input)
    if labels is not None:
        names = [g.name for g in col.graphs]
        col = GraphCollection(col.graphs, np.asarray(read_labels(labels, names), dtype=object), col.name)
    store = create_or_open_graphs(_store_url(out), col, params, storage_options=store_options,
                                  discard=discard)
    say(f"{len(col)} graphs, {sum(g.n for g in col.graphs)} vertices, "
        f"{sum(g.n_edges for g in col.graphs)} edges, {store.n_tasks} tasks"
        f"{'' if col.labels is None else ', with labels'}")
    _report(_run_store(store, where, progress))


def _field_batch(input: str, eps: float | None, grid_values: Any, max_dim: int | None, normalise: bool,
                 labels: str | None, key: str | None, columns: str | None, index_col: str | None,
                 construction: str | None, mask_nan: bool, values: str | None, weights: str | None,
                 superlevel: bool, threshold: float | None, task_cost: float | None, metric: str | None,
                 out: str, discard: bool, progress: bool, how: dict[str, Any],
                 store_options: dict[str, Any] | None = None) -> None:
    from .clouds import read_labels
    from .field_sources import read_fields
    from .jobs.batch import FieldBatchParams, create_or_open_fields

    for option, value in (("--eps", eps), ("--max-dim", max_dim), ("--values", values), ("--weights", weights),
                          ("--threshold", threshold), ("--metric", metric), ("--columns", columns),
                          ("--index-col", index_col)):
        if value is not None:
            fail(f"{option} does not apply to fields (arrays); see `chitally batch --help`", EXIT_USAGE)
    params = FieldBatchParams.checked(grid_values, construction or "vertices", superlevel, mask_nan, normalise,
                                      task_cost, names={"construction": "--construction", "grid": "--grid",
                                                        "task_cost": "--task-cost"})
    where = _where(**how)
    col = read_fields(input, key=key)
    if labels is not None:
        col = col.with_labels(read_labels(labels, col.names, item="field"))
    store = create_or_open_fields(_store_url(out), col, params, storage_options=store_options, discard=discard)
    shapes = {tuple(a.shape) for a in col.fields}
    shape = f"shape {shapes.pop()}" if len(shapes) == 1 else f"{len(shapes)} shapes"
    say(f"{len(col)} fields ({shape}), {sum(a.size for a in col.fields)} entries, {store.n_tasks} tasks"
        f"{'' if col.labels is None else ', with labels'}")
    _report(_run_store(store, where, progress))


@main.command("graph")
@input_arg
@click.option("--values", default=None,
              help="Vertex values: degree (the default without --weights), closeness, heat:T, a file "
                   "of one value per vertex (.npy, or text one a line), or a node attribute.")
@weights_opt
@dim_opt
@superlevel_opt
@click.option("--threshold", type=float, default=None,
              help="Count only simplices of value <= X (>= X with --superlevel); required for a "
                   ".npy distance matrix.")
@click.option("--grid", default=None,
              help=GRID_HELP + " Scales below the smallest vertex value give 0 (the empty complex), above "
                   "the largest the whole complex's value. With --out, the file holds the samples.")
@click.option("--out", "out", default=None, help="Write the curve here (.csv, .json, .npz).")
@click.option("--format", "fmt", type=click.Choice(CURVE_FORMATS), default=None,
              help="Output format (default: from --out's ending).")
@click.option("--run", "run_url", default=None,
              help="Compute over tasks on the engine through this run store (a local path or an fsspec "
                   "URL all workers reach): resumable, for large graphs.")
@click.option("--tasks", type=int, default=None, help="With --run: about this many tasks (default: by size).")
@click.option("--discard", is_flag=True, help="With --run: delete committed work of an unfinished store there.")
@_executor_options
@guarded
def graph_cmd(input: str, values: str | None, weights: str | None, max_dim: int | None, superlevel: bool,
              threshold: float | None, grid: str | None, out: str | None, fmt: str | None,
              run_url: str | None, tasks: int | None, discard: bool, progress: bool, **how: Any) -> None:
    """The curve of a filtration of the clique complex of the graph INPUT: an edge list
    (.csv, .tsv, .txt, .edges, .edgelist), .graphml, .gml, .adjlist, a scipy sparse .npz,
    or a dense distance matrix (.npy, with --threshold). In this process, or over tasks
    on the engine with --run."""
    from .graph_sources import read_graph, read_matrix, read_vertex_values
    from .graphs import filtered_graph, matrix_filtration

    grid_values = _grid(grid)
    fmt = check_output(out, fmt)
    matrix = input.lower().endswith(".npy")
    if matrix:
        for option, value in (("--values", values), ("--weights", weights), ("--superlevel", superlevel or None)):
            if value is not None:
                fail(f"{option} does not apply to a distance matrix (its entries are the edge values)", EXIT_USAGE)
        if threshold is None:
            fail("a distance matrix needs --threshold (the largest distance joined by an edge)", EXIT_USAGE)
    spec: Any = "auto" if values is None else values
    if isinstance(spec, str) and spec not in ("auto", "degree", "closeness") and not spec.startswith("heat:") \
            and os.path.isfile(spec):
        spec = read_vertex_values(spec)
    if run_url is None:
        for option, value in (("--tasks", tasks), ("--discard", discard or None)):
            if value is not None:
                fail(f"{option} applies with --run only", EXIT_USAGE)
        from .graphs import graph_curve, matrix_curve

        if matrix:
            curve = matrix_curve(read_matrix(input), threshold, max_dim)
        else:
            curve = graph_curve(read_graph(input), spec, weights, max_dim, superlevel, threshold)
        say(f"{input}: {curve.n_points} vertices counted, max_dim "
            f"{max_dim if max_dim is not None else 'none'}; {curve.n_jumps} jumps on "
            f"[{curve.start:g}, {curve.eps:g}], chi({curve.start:g}) = {curve.chi[0]}, "
            f"chi({curve.eps:g}) = {curve.final}")
        _emit_curve(_graph_domain(curve, grid_values, threshold), grid_values, out, fmt)
        return
    from .jobs.graph import GraphParams, create_or_open

    if matrix:
        params = GraphParams.checked(None, "matrix", max_dim, False, threshold, None, tasks, names=_GRAPH_NAMES)
    else:
        params = GraphParams.checked(spec, weights, max_dim, superlevel, threshold, None, tasks,
                                     names=_GRAPH_NAMES)
    where = _where(**how)
    fg = matrix_filtration(read_matrix(input), threshold) if matrix else \
        filtered_graph(read_graph(input), spec, weights, superlevel, threshold)
    store = create_or_open(_store_url(run_url), fg, params, discard=discard)
    say(f"{input}: {fg.n_vertices} vertices, {fg.n_edges} edges, {store.n_tasks} tasks")
    report = _run_store(store, where, progress)
    _report(report)
    _emit_curve(_graph_domain(report.result, grid_values, threshold), grid_values, out, fmt)


def _graph_domain(curve: Any, grid: Any, threshold: float | None) -> Any:
    """A graph's curve on a domain that holds the grid: 0 below its smallest vertex value
    (the empty complex) and, without a threshold, its final value above its largest."""
    if grid is None:
        return curve
    lo = min(curve.start, float(grid[0]))
    hi = curve.eps if threshold is not None else max(curve.eps, float(grid[-1]))
    if (lo, hi) == (curve.start, curve.eps):
        return curve
    from .curve import Curve

    values, jumps = curve.jumps()
    return Curve.from_jumps(values, jumps, eps=hi, max_dim=curve.max_dim, n_points=curve.n_points, start=lo)


@main.command("resume")
@click.argument("run", metavar="RUN")
@click.option("--input", "input_", default=None, help="Check the store was made for this input.")
@click.option("--key", default=None, help="Array inside --input.")
@click.option("--eps", type=float, default=None, help="Check the store was made for this eps.")
@click.option("--max-dim", type=int, default=None, help="Check the store was made for this cap.")
@click.option("--grid", default=None, help=GRID_HELP)
@_executor_options
@storage_opts
@guarded
def resume_cmd(run: str, input_: str | None, key: str | None, eps: float | None, max_dim: int | None,
               grid: str | None, progress: bool, store_options: dict[str, Any] | None,
               **how: Any) -> None:
    """Continue RUN: compute only the tasks without a valid commit, then reduce."""
    from .jobs import kind_of
    from .runs import open_run
    from .store import fingerprint

    grid_values = _grid(grid)
    where = _where(**how)
    from .staged import planning_started
    from .store import NotAStore

    try:
        store = open_run(_store_url(run), storage_options=store_options)
    except NotAStore:
        if not planning_started(_store_url(run), store_options):
            raise
        say(f"{run}: planning on the cluster did not finish; continuing it")
        _report(_plan_and_run(_store_url(run), None, None, None, where, progress, store_options,
                              resume=True), grid_values)
        return
    if eps is not None or max_dim is not None or input_ is not None:
        from .sources import read_points

        wanted = store.params
        if eps is not None:
            wanted["eps"] = _cloud_params(eps, None).eps
        if max_dim is not None:
            wanted["max_dim"] = max_dim
        fp = fingerprint(read_points(input_, key=key)) if input_ is not None else store.fingerprint
        store.check_matches(store.kind, wanted, fp, dict(kind_of(store.kind).defaults))
    _report(_run_store(store, where, progress), grid_values)


@main.command("status")
@click.argument("run", metavar="RUN")
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@storage_opts
@guarded
def status_cmd(run: str, as_json: bool, store_options: dict[str, Any] | None) -> None:
    """Tasks done, pending and failed, cost-weighted progress and a time estimate."""
    from .runs import open_run, status

    info = status(open_run(_store_url(run), storage_options=store_options))
    if as_json:
        click.echo(json.dumps(info, indent=2))
        return
    click.echo(f"{info['store']} ({info['kind']}): {info['done']}/{info['tasks']} tasks done "
               f"({info['percent']}% of the work), {info['pending']} pending, {info['failed']} failed; "
               f"complete: {info['complete']}")
    click.echo(f"task time so far {info['task_seconds']} s; estimated task time left "
               f"{info['task_seconds_left_estimate']} s; commits from {info['first_commit']} to "
               f"{info['last_commit']}")
    if info["running"]:
        r = info["running"]
        click.echo(f"  in use by {r['owner']} (host {r['host']}, pid {r['pid']}; {r['verdict']})")
    for task, message in info["failures"].items():
        click.echo(f"  task {task} failed: {message}")
    if info["damaged_commit_records"]:
        click.echo(f"  damaged commit records (resume recomputes them): tasks {info['damaged_commit_records']}")
    if info["result_damaged"]:
        click.echo(f"  the result is damaged ({info['result_damaged']}): `chitally resume {run}` writes it again")


@main.command("export")
@click.argument("run", metavar="RUN")
@click.option("--format", "fmt", type=click.Choice(["csv", "npz", "json", "npy", "parquet"]), default=None,
              help="Output format (default: from --out's ending, else csv).")
@click.option("--grid", default=None, help="Export a curve's samples on START:STOP:COUNT instead of its exact steps.")
@click.option("--out", "out", default=None, help="File to write (default: stdout, csv/json only).")
@storage_opts
@guarded
def export_cmd(run: str, fmt: str | None, grid: str | None, out: str | None,
               store_options: dict[str, Any] | None) -> None:
    """Write the result of a complete RUN: a curve's exact steps or samples, or a feature matrix."""
    from .runs import open_run, read_result

    grid_values = _grid(grid)
    store = open_run(_store_url(run), storage_options=store_options)
    formats = (CURVE_FORMATS if store.kind in _CURVE_KINDS
               else ("csv", "json", "npz") if store.kind == "bands"
               else ("csv", "npy", "npz", "parquet"))
    if fmt is not None and fmt not in formats:
        fail(f"--format {fmt}: a {store.kind} result exports as {', '.join(formats)}", EXIT_USAGE)
    fmt = check_output(out, fmt, formats) or "csv"
    result = read_result(store)
    if result is None:
        fail(f"{run} has no result yet: run `chitally resume {run}`", EXIT_INCOMPLETE)
    if out is None:
        if fmt not in ("csv", "json"):
            fail(f"{fmt} needs --out", EXIT_USAGE)
        import tempfile

        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"result.{fmt}"
            _save(result, path, fmt, grid_values)
            click.echo(path.read_text(), nl=False)
        return
    _save(result, out, fmt, grid_values)
    say(f"wrote {out}")


def _save(result: Any, path: Any, fmt: str | None, grid: Any) -> None:
    from .curve import Curve

    if isinstance(result, Curve) or hasattr(result, "save_samples"):  # a Curve or a PartedCurve
        result.save_samples(path, grid, format=fmt) if grid is not None else result.save(path, format=fmt)
    else:
        result.save(path, format=fmt)


def _scan_eps_values(eps: str | None, eps_range: str | None) -> Any:
    """The scales `chitally scan` was given: a comma list, LO:HI:COUNT, or None for its default."""
    if eps is not None and eps_range is not None:
        raise click.UsageError("give --eps or --eps-range, not both")
    if eps is not None:
        try:
            return [float(part) for part in eps.split(",")]
        except ValueError:
            raise click.BadParameter(f"{eps!r} is not a comma-separated list of numbers", param_hint="--eps") from None
    if eps_range is None:
        return None
    parts = eps_range.split(":")
    try:
        lo, hi, count = float(parts[0]), float(parts[1]), int(parts[2])
        if len(parts) != 3:
            raise ValueError
    except (ValueError, IndexError):
        raise click.BadParameter(f"{eps_range!r} is not LO:HI:COUNT", param_hint="--eps-range") from None
    if not (0 < lo <= hi < float("inf")) or count < 1 or (count > 1 and lo == hi):
        raise click.BadParameter(f"{eps_range!r}: need 0 < LO < HI and COUNT >= 1", param_hint="--eps-range")
    import numpy as np

    return [float(v) for v in np.geomspace(lo, hi, count)]


@main.command("scan")
@input_arg
@click.option("--eps", "eps", default=None, help="Scales to scan, comma-separated, e.g. 0.1,0.2,0.4.")
@click.option("--eps-range", default=None,
              help="LO:HI:COUNT: COUNT scales from LO to HI, evenly spaced on a log scale "
                   "(default: around the median distance to the nearest neighbour).")
@click.option("--max-dim", type=int, default=None,
              help="Also estimate a run counting simplices up to this dimension (a run without cap is always estimated).")
@click.option("--sample", type=int, default=None, help="Rows to sample; their degrees are exact (default 2000).")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the sample.")
@key_opt
@metric_opt
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON.")
@guarded
def scan_cmd(input: str, eps: str | None, eps_range: str | None, max_dim: int | None, sample: int | None,
             seed: int, key: str | None, columns: str | None, index_col: str | None, metric: str,
             as_json: bool) -> None:
    """Which eps? Degrees, edges, time and memory of a run at several scales, estimated from a sample; writes nothing."""
    from .scan import scan_eps

    values = _scan_eps_values(eps, eps_range)
    more = {} if sample is None else {"sample": sample}
    report = scan_eps(_read(input, key, columns, index_col), values, max_dim=max_dim, seed=seed,
                      threads=os.cpu_count() or 1, metric=metric, **more)
    click.echo(json.dumps(report.as_dict(), indent=2) if as_json else report.table())


# ------------------------------------------------------------------ statistics and figures


def _load_result(text: str) -> tuple[str, Any]:
    """A file written by `Curve.save` or `Bands.save`, or a run store's result, with a name."""
    from .bands import Bands, is_bands_file
    from .curve import Curve

    path = Path(text)
    if path.is_file():
        return path.stem, (Bands.load(path) if is_bands_file(path) else Curve.load(path))
    from .runs import open_run, read_result

    store = open_run(_store_url(text))
    result = read_result(store)
    if result is None:
        fail(f"{text} has no result yet: run `chitally resume {text}`", EXIT_INCOMPLETE)
    return Path(text.rstrip("/")).stem or text, result


def _named_curves(items: Any, what: str) -> tuple[list[str], list[Any]]:
    """Curves by name: a curve file or a cloud run gives one, a batch run its rows."""
    from .curve import Curve
    from .features import FeatureMatrix

    names: list[str] = []
    curves: list[Any] = []
    for text in items:
        name, result = _load_result(text)
        if isinstance(result, Curve):
            names.append(name)
            curves.append(result)
        elif isinstance(result, FeatureMatrix):
            names += [f"{name}/{n}" for n in result.names]
            curves += [(result.grid, row) for row in result.values]
        else:
            fail(f"{text}: {what} takes curves (curve files, cloud or batch runs), not "
                 f"{type(result).__name__.lower()}", EXIT_USAGE)
    return names, curves


def _p_text(p: float) -> str:
    return "sup" if p == float("inf") else f"L{p:g}"


@main.command("bands")
@input_arg
@eps_opt
@click.option("--replicates", type=int, required=True, help="B: subsamples drawn (>= 2).")
@click.option("--sample-size", type=int, required=True,
              help="m: points per subsample; the bands cover the mean curve of m points.")
@click.option("--grid", default=None, help="START:STOP:COUNT scales in [0, eps] (default 0:EPS:101).")
@click.option("--level", type=float, default=0.95, show_default=True, help="Confidence level.")
@click.option("--seed", type=int, default=0, show_default=True,
              help="Replicate i draws its rows from (seed, i) alone.")
@dim_opt
@click.option("--replace", is_flag=True,
              help="Draw with replacement (repeated rows are dominated vertices: smaller samples in effect).")
@click.option("--per-task", type=int, default=None, help="Replicates per task (default: about 16 tasks).")
@click.option("--draws", type=int, default=2000, show_default=True, help="Bootstrap draws.")
@key_opt
@click.option("--out", "out", required=True, help="The run store: a local path or an fsspec URL all workers reach.")
@click.option("--discard", is_flag=True, help="Delete committed work of an unfinished store at --out.")
@_executor_options
@guarded
def bands_cmd(input: str, eps: float, replicates: int, sample_size: int, grid: str | None, level: float,
              seed: int, max_dim: int | None, replace: bool, per_task: int | None, draws: int,
              key: str | None, columns: str | None, index_col: str | None, out: str, discard: bool,
              progress: bool, **how: Any) -> None:
    """Confidence bands for the mean curve of subsamples of size M of INPUT: B replicates
    drawn without replacement, their exact curves on the grid, the mean curve with
    simultaneous (multiplier bootstrap) and pointwise bands. The bands cover the mean
    curve at sample size M, not the curve of all of INPUT."""
    from .bands import REPLACE_WARNING
    from .jobs.bands import BandsParams, check_cloud, create_or_open

    params = BandsParams.checked(eps, replicates, sample_size, grid, max_dim, level, seed, replace,
                                 per_task, draws,
                                 names={**_NAMES, "replicates": "--replicates", "sample_size": "--sample-size",
                                        "grid": "--grid", "level": "--level", "seed": "--seed",
                                        "per_task": "--per-task", "draws": "--draws"})
    where = _where(**how)
    points = check_cloud(_read(input, key, columns, index_col), params, where=input,
                         sample_size_name="--sample-size")
    if replace:
        say(f"chitally: warning: {REPLACE_WARNING}")
    store = create_or_open(_store_url(out), points, params, discard=discard)
    say(f"{points.shape[0]} points in R^{points.shape[1]}; {params.replicates} replicates of "
        f"{params.sample_size} points in {store.n_tasks} tasks")
    _report(_run_store(store, where, progress))


@main.command("compare")
@click.argument("items", nargs=-1, required=True, metavar="A B [C ...]")
@click.option("--p", "p", default="1", show_default=True, help="Exponent: 1, 2, any number >= 1, or inf (sup).")
@click.option("--range", "range_", default=None, help="A:B, the scales compared (default: where all curves are defined).")
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@guarded
def compare_cmd(items: tuple[str, ...], p: str, range_: str | None, as_json: bool) -> None:
    """Exact Lp distances between curves: curve files (csv, json, npz), cloud runs, or
    the rows of batch runs (each row the step function through its grid samples)."""
    from .distances import common_range, pairwise, parse_p, parse_range, steps_of

    exponent = parse_p(p)
    parse_range(range_)
    names, curves = _named_curves(items, "compare")
    if len(curves) < 2:
        fail("compare needs at least two curves", EXIT_USAGE)
    lo, hi = common_range(steps_of(curves), range_)
    matrix = pairwise(curves, p=exponent, range=(lo, hi))
    if as_json:
        click.echo(json.dumps({"p": "inf" if exponent == float("inf") else exponent, "range": [lo, hi],
                               "names": names, "matrix": matrix.tolist()}, indent=1))
        return
    say(f"{_p_text(exponent)} distances over [{lo!r}, {hi!r}]")
    click.echo(",".join(["", *names]))
    for name, row in zip(names, matrix):
        click.echo(",".join([name, *(repr(float(x)) for x in row)]))


@main.command("test", context_settings={"ignore_unknown_options": True})
@click.argument("groups", nargs=-1, type=click.UNPROCESSED, metavar="--a F1 F2 ... --b G1 G2 ...")
@click.option("--store", default=None, help="A batch run whose labelled rows form the groups (with --labels).")
@click.option("--labels", default=None, help="X,Y: the two labels of --store's rows to compare.")
@click.option("--p", "p", default="1", show_default=True, help="Exponent of the distance between group means.")
@click.option("--permutations", type=int, default=9999, show_default=True, help="Random relabellings.")
@click.option("--seed", type=int, default=0, show_default=True)
@click.option("--range", "range_", default=None, help="A:B, the scales compared.")
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@guarded
def test_cmd(groups: tuple[str, ...], store: str | None, labels: str | None, p: str, permutations: int,
             seed: int, range_: str | None, as_json: bool) -> None:
    """Permutation test: do two groups of curves differ? The statistic is the exact
    distance between the groups' mean curves; p = (1 + relabellings at least as large) /
    (1 + relabellings)."""
    from .twosample import two_sample_test

    exponent = p
    if store is not None:
        from .features import FeatureMatrix

        if groups:
            fail("give either --store with --labels, or --a ... --b ..., not both", EXIT_USAGE)
        if labels is None or len(labels.split(",")) != 2:
            fail("--store needs --labels X,Y naming the two groups", EXIT_USAGE)
        x, y = labels.split(",")
        _, fm = _load_result(store)
        if not isinstance(fm, FeatureMatrix) or fm.labels is None:
            fail(f"--store {store}: a batch run with labels is needed", EXIT_USAGE)
        keys = [str(label) for label in fm.labels]
        a = [(fm.grid, row) for row, k in zip(fm.values, keys) if k == x]
        b = [(fm.grid, row) for row, k in zip(fm.values, keys) if k == y]
        for label, rows in ((x, a), (y, b)):
            if not rows:
                fail(f"--labels: no row of {store} is labelled {label!r} (labels: "
                     f"{', '.join(sorted(set(keys)))})", EXIT_USAGE)
    else:
        sides: dict[str, list[str]] = {"--a": [], "--b": []}
        side = None
        for token in groups:
            if token in sides:
                side = token
            elif token.startswith("-"):
                fail(f"no such option: {token} (see `chitally test --help`)", EXIT_USAGE)
            elif side is None:
                fail(f"{token}: name the group first: --a F1 F2 ... --b G1 G2 ...", EXIT_USAGE)
            else:
                sides[side].append(token)
        if not sides["--a"] or not sides["--b"]:
            fail("test needs --a F1 ... and --b G1 ... (or --store RUN --labels X,Y)", EXIT_USAGE)
        a = _named_curves(sides["--a"], "test")[1]
        b = _named_curves(sides["--b"], "test")[1]
    result = two_sample_test(a, b, p=exponent, permutations=permutations, seed=seed, range=range_)
    if as_json:
        click.echo(json.dumps(result.as_dict(), indent=1))
        return
    lo, hi = result.range
    click.echo(f"{_p_text(result.p)} distance between the group means over [{lo!r}, {hi!r}]: "
               f"{result.statistic!r}")
    click.echo(f"p = {result.p_value:.6g} ({result.exceed} of {result.permutations} relabellings at "
               f"least as large; seed {result.seed}); groups of {result.sizes[0]} and {result.sizes[1]} curves")


@main.command("plot")
@click.argument("items", nargs=-1, required=True, metavar="RUN_OR_FILES...")
@click.option("--out", "out", required=True, help="Figure file: .png, .svg or .pdf.")
@click.option("--symlog", is_flag=True, help="Symmetric-logarithmic y axis (colour scale for a matrix).")
@click.option("--title", default=None, help="Figure title.")
@guarded
def plot_cmd(items: tuple[str, ...], out: str, symlog: bool, title: str | None) -> None:
    """A figure: curves overlaid (curve files, cloud runs), a band (bands runs or files),
    or a heatmap of a feature matrix (a batch run)."""
    from .bands import Bands
    from .curve import Curve
    from .features import FeatureMatrix
    from .plot import FIGURE_FORMATS, plot_bands, plot_curves, plot_matrix, save

    fmt = Path(out).suffix.lstrip(".").lower()
    if fmt not in FIGURE_FORMATS:
        fail(f"--out {out}: the figure format comes from the ending: "
             f"{', '.join('.' + f for f in FIGURE_FORMATS)}", EXIT_USAGE)
    check_output(out, fmt, FIGURE_FORMATS)
    loaded = [_load_result(text) for text in items]
    kinds = {type(r) for _, r in loaded}
    if kinds == {Curve}:
        ax = plot_curves([r for _, r in loaded], [n for n, _ in loaded], symlog=symlog, title=title)
    elif kinds == {Bands}:
        ax = None
        for name, b in loaded:
            ax = plot_bands(b, ax, label=name, symlog=symlog, title=title)
    elif kinds == {FeatureMatrix} and len(loaded) == 1:
        ax = plot_matrix(loaded[0][1], symlog=symlog, title=title)
    else:
        fail("plot draws curves together, bands together, or one feature matrix; got "
             f"{', '.join(sorted(k.__name__ for k in kinds))} from {len(loaded)} inputs", EXIT_USAGE)
    save(ax, out)
    say(f"wrote {out}")


@main.command("demo")
@click.option("--points", "n_points", type=int, default=20000, show_default=True, help="Points to generate.")
@click.option("--out", "out", default="chitally-demo.run", show_default=True, help="Run store of the demo.")
@click.option("--workers", type=int, default=None, help="LocalCluster worker processes.")
@click.option("--seed", type=int, default=7, show_default=True)
@guarded
def demo_cmd(n_points: int, out: str, workers: int | None, seed: int) -> None:
    """Generate a scenario of our own and run the main job on an embedded LocalCluster."""
    from .curve import parse_grid
    from .demo import demo_scenario
    from .jobs.cloud import create_or_open

    where = _where(None, None, workers, None, False, None, False, None)
    points, eps, story = demo_scenario(n_points, seed)
    say(story)
    _compile_first(None, points.shape[1])
    store = create_or_open(_store_url(out), points, _cloud_params(eps, None))
    _report(_run_store(store, where, True), parse_grid(f"0:{eps!r}:9"))


if __name__ == "__main__":  # pragma: no cover
    main()
