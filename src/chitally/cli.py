"""The `chitally` command: thin over the Python API.

Parses options, calls the API, prints, and sets exit codes: 0 done, 1 failure,
2 bad input or usage, including a RUN that is no run store (nothing is created), 3 incomplete but resumable (`chitally
resume RUN`), 4 the run store is in use by another run.
"""

from __future__ import annotations

import json
import logging
import os
import sys
from pathlib import Path
from typing import Any, NoReturn

import click
import numpy as np

from . import __version__
from .curve import Curve, parse_grid
from .runs import (
    EXIT_BUSY,
    EXIT_FAILURE,
    EXIT_INCOMPLETE,
    EXIT_USAGE,
    Params,
    RunReport,
    acquire_lease,
    create_or_open,
    describe_plan,
    execute,
    open_run,
    read_result,
    status,
)
from .sources import InputError, read_points

GRID_HELP = "Also sample the curve on START:STOP:COUNT evenly spaced scales."


def _fail(message: str, code: int) -> NoReturn:
    click.echo(f"chitally: error: {' '.join(str(message).split())}", err=True)
    sys.exit(code)


def _store_url(text: str) -> str:
    # Workers resolve a relative path against their own working directory, which need not
    # be ours: hand them the absolute path of the store we mean.
    return text if "://" in text else os.path.abspath(text)


def _grid(text: str | None) -> np.ndarray | None:
    if text is None:
        return None
    try:
        return parse_grid(text)
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--grid") from None


def _guarded(fn):  # one place that turns our exceptions into one line and an exit code
    import functools

    from .cluster import ClusterError
    from .store import CurveDamaged, LeaseHeld, NotAStore, StoreError, StoreMismatch

    @functools.wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except InputError as exc:
            _fail(str(exc), EXIT_USAGE)
        except (StoreMismatch, NotAStore) as exc:
            _fail(str(exc), EXIT_USAGE)
        except LeaseHeld as exc:
            # the store words its hint for the Python API; here the switch is a flag
            _fail(str(exc).replace("pass takeover=True", "rerun with --takeover"), EXIT_BUSY)
        except CurveDamaged as exc:
            _fail(f"{exc}; `chitally resume` writes it again from the task tables", EXIT_INCOMPLETE)
        except (StoreError, ClusterError) as exc:
            _fail(str(exc), EXIT_FAILURE)
        except ValueError as exc:
            _fail(str(exc), EXIT_USAGE)

    return wrapper


def _print_samples(curve: Curve, grid: np.ndarray) -> None:
    click.echo("scale,chi")
    for t, v in zip(grid, curve.sample(grid)):
        click.echo(f"{float(t)!r},{int(v)}")


@click.group(context_settings={"help_option_names": ["-h", "--help"], "auto_envvar_prefix": "CHITALLY"})
@click.version_option(__version__, prog_name="chitally")
@click.option("-v", "--verbose", count=True, help="More log output (-v info, -vv debug).")
def main(verbose: int) -> None:
    """Exact Euler characteristic curves of Vietoris-Rips filtrations of large point sets."""
    level = logging.WARNING - 10 * min(verbose, 2)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    # distributed configures its own INFO handlers; keep the terminal for our progress
    if not verbose:
        import dask

        dask.config.set({"logging.distributed": "warning", "logging.bokeh": "error", "logging.tornado": "error"})


input_arg = click.argument("input", metavar="INPUT")
eps_opt = click.option("--eps", type=float, required=True, help="Largest scale (> 0): edges are pairs at distance <= eps.")
dim_opt = click.option("--max-dim", type=int, default=None, help="Count simplices up to this dimension (default: all).")
key_opt = click.option("--key", default=None, help="Array, dataset or columns inside INPUT (npz, zarr, hdf5, parquet).")
radius_opt = click.option("--cover-radius", type=float, default=None, help="Ball radius of the cover (default: eps).")
cost_opt = click.option("--task-cost", type=float, default=None, help="Target cost per task (default: planner's choice).")


@main.command("curve")
@input_arg
@eps_opt
@dim_opt
@key_opt
@click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
              help="Write the curve here; format from the ending (.csv, .json, .npz).")
@click.option("--grid", default=None, help=GRID_HELP + " With --out, the file holds the samples.")
@click.option("--threads", type=int, default=None, help="Kernel threads (default: all cores).")
@_guarded
def curve_cmd(input: str, eps: float, max_dim: int | None, key: str | None, out: str | None,
              grid: str | None, threads: int | None) -> None:
    """Compute the curve of INPUT in this process."""
    from .inprocess import euler_curve

    params = Params.checked(eps, max_dim)
    grid_values = _grid(grid)
    points = read_points(input, key=key)
    curve, stats = euler_curve(points, params.eps, params.max_dim, threads=threads, return_stats=True)
    click.echo(
        f"{points.shape[0]} points in R^{points.shape[1]}, eps {params.eps:g}, "
        f"max_dim {params.max_dim if params.max_dim is not None else 'none'}: "
        f"{stats.edges} edges, {stats.cones} cones, {stats.collapsed} collapses, {stats.splits} splits; "
        f"{curve.n_jumps} jumps, chi(0) = {curve.at(0.0)}, chi(eps) = {curve.final}; "
        f"{stats.seconds_graph + stats.seconds_count:.2f} s",
        err=True,
    )
    if out is not None:
        if grid_values is not None:
            curve.save_samples(out, grid_values)
        else:
            curve.save(out)
        click.echo(f"wrote {out}", err=True)
    elif grid_values is not None:
        _print_samples(curve, grid_values)


def format_figure(name: str, value: Any) -> str:
    """One figure of a plan summary as `chitally plan` prints it."""
    if name.endswith("memory"):
        return f"{value / 2**20:.1f} MiB (estimate)"
    if isinstance(value, dict):
        return ", ".join(f"{k} {v:g}" for k, v in value.items())
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


@main.command("plan")
@input_arg
@eps_opt
@dim_opt
@key_opt
@radius_opt
@cost_opt
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON.")
@_guarded
def plan_cmd(input: str, eps: float, max_dim: int | None, key: str | None, cover_radius: float | None,
             task_cost: float | None, as_json: bool) -> None:
    """Show what a run would do (balls, tasks, halos, cost, memory, store layout); writes nothing."""
    params = Params.checked(eps, max_dim, cover_radius, task_cost)
    summary = describe_plan(read_points(input, key=key), params)
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    layout = summary.pop("layout")
    for name, value in summary.items():
        click.echo(f"{name:>22}: {format_figure(name, value)}")
    click.echo("store layout:")
    click.echo(layout)


class _ProgressBar:
    """Terminal progress weighted by task cost (one adapter among the executor's events)."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled
        self.bar = None
        self.cost: np.ndarray | None = None

    def on_pending(self, store: Any, pending: list[int]) -> None:
        if not self.enabled:
            return
        from tqdm import tqdm

        self.cost = store.read_plan().cost.astype(np.float64)
        total = float(self.cost[pending].sum())
        if self.bar is not None:
            self.bar.close()
        self.bar = tqdm(total=total, unit="cost", unit_scale=True, desc=f"{len(pending)} tasks",
                        file=sys.stderr, dynamic_ncols=True)

    def task_started(self, task: int, attempt: str) -> None:
        pass

    def task_done(self, result: Any) -> None:
        if self.bar is not None and self.cost is not None:
            self.bar.update(float(self.cost[result.task]))

    def task_retry(self, task: int, attempt: str, message: str) -> None:
        if self.bar is not None:
            self.bar.write(f"task {task}: attempt {attempt} failed, retrying: {message}")

    def task_failed(self, task: int, message: str, attempts: int) -> None:
        if self.bar is not None:
            self.bar.write(f"task {task} failed after {attempts} attempts: {message}")

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _executor_options(fn):
    for opt in reversed([
        click.option("--scheduler", default=None, envvar="DASK_SCHEDULER_ADDRESS", show_envvar=True,
                     help="Address of a running Dask scheduler (default: start a LocalCluster)."),
        click.option("--scheduler-file", default=None, type=click.Path(exists=True, dir_okay=False),
                     help="Dask scheduler file of a running cluster."),
        click.option("--workers", type=int, default=None, help="LocalCluster worker processes (default: one per core)."),
        click.option("--threads", type=int, default=None, help="Threads per LocalCluster worker."),
        click.option("--serial", is_flag=True, help="Run the tasks one by one in this process (no Dask)."),
        click.option("--retries", type=int, default=2, show_default=True, help="Retries of a task that raised an error."),
        click.option("--takeover", is_flag=True, help="Take over the lease of a run that stopped heartbeating."),
        click.option("--grid", default=None, help=GRID_HELP),
        click.option("--progress/--no-progress", default=True, help="Terminal progress bar."),
    ]):
        fn = opt(fn)
    return fn


def _execute(store: Any, *, scheduler: str | None, scheduler_file: str | None, workers: int | None,
             threads: int | None, serial: bool, retries: int, takeover: bool, progress: bool) -> RunReport:
    from .execute import DaskExecutor, SerialExecutor

    bar = _ProgressBar(progress)
    try:
        if serial:
            return execute(store, SerialExecutor(retries=retries, threads=threads or 1), events=bar,
                           takeover=takeover, on_pending=bar.on_pending)
        from .cluster import check_workers, connect, preflight_memory

        # a run refused for a held lease must not start (and tear down) a cluster first
        with acquire_lease(store, takeover=takeover) as lease:
            conn = connect(scheduler, scheduler_file, workers, threads)
            try:
                if conn.dashboard:
                    click.echo(f"dashboard: {conn.dashboard}", err=True)
                    if conn.cluster is not None:
                        click.echo(f"  from another machine: {conn.ssh_hint()}", err=True)
                check_workers(conn.client, store.url)
                preflight_memory(conn.client, int(store.read_plan().memory.max()))
                executor = DaskExecutor(conn.client, retries=retries)
                return execute(store, executor, events=bar, on_pending=bar.on_pending, lease=lease)
            finally:
                conn.close()
    finally:
        bar.close()


def _report(report: RunReport, grid: np.ndarray | None) -> None:
    click.echo(
        f"{report.url}: {report.done}/{report.n_tasks} tasks reduced, {report.computed} computed now, "
        f"{len(report.failed)} failed, {report.seconds:.1f} s",
        err=True,
    )
    if report.set_aside:
        click.echo(f"  damaged outputs set aside and computed again: tasks {sorted(set(report.set_aside))}",
                   err=True)
    for task, message in sorted(report.failed.items()):
        click.echo(f"  task {task} failed: {message}", err=True)
    if report.curve is None:
        click.echo(f"incomplete: fix the cause, then `chitally resume {report.url}`", err=True)
        sys.exit(report.exit_code)
    c = report.curve
    click.echo(f"curve: {c.n_jumps} jumps, chi(0) = {c.at(0.0)}, chi(eps) = {c.final}, digest {c.digest()[:16]}",
               err=True)
    if grid is not None:
        _print_samples(c, grid)


@main.command("run")
@input_arg
@eps_opt
@dim_opt
@key_opt
@click.option("--out", "out", required=True, help="The run store: a local path or an fsspec URL all workers reach.")
@radius_opt
@cost_opt
@_executor_options
@_guarded
def run_cmd(input: str, eps: float, max_dim: int | None, key: str | None, out: str,
            cover_radius: float | None, task_cost: float | None, grid: str | None, **how: Any) -> None:
    """Plan, execute and reduce: the exact curve of INPUT on a Dask cluster."""
    params = Params.checked(eps, max_dim, cover_radius, task_cost)
    grid_values = _grid(grid)
    points = read_points(input, key=key)  # validated before any store exists
    store = create_or_open(_store_url(out), points, params)
    _report(_execute(store, **how), grid_values)


@main.command("resume")
@click.argument("run", metavar="RUN")
@click.option("--input", "input_", default=None, help="Check the store was made for this input.")
@click.option("--key", default=None, help="Array inside --input.")
@click.option("--eps", type=float, default=None, help="Check the store was made for this eps.")
@click.option("--max-dim", type=int, default=None, help="Check the store was made for this cap.")
@_executor_options
@_guarded
def resume_cmd(run: str, input_: str | None, key: str | None, eps: float | None, max_dim: int | None,
               grid: str | None, **how: Any) -> None:
    """Continue RUN: compute only the tasks without a valid commit, then reduce."""
    from .store import fingerprint

    grid_values = _grid(grid)
    store = open_run(_store_url(run))
    stored = store.params
    if eps is not None or max_dim is not None or input_ is not None:
        wanted = dict(stored)
        if eps is not None:
            wanted["eps"] = Params.checked(eps).eps
        if max_dim is not None:
            wanted["max_dim"] = max_dim
        fp = fingerprint(read_points(input_, key=key)) if input_ is not None else store.fingerprint
        store.check_matches(wanted, fp)
    _report(_execute(store, **how), grid_values)


@main.command("status")
@click.argument("run", metavar="RUN")
@click.option("--json", "as_json", is_flag=True, help="Print as JSON.")
@_guarded
def status_cmd(run: str, as_json: bool) -> None:
    """Tasks done, pending and failed, cost-weighted progress and a time estimate."""
    info = status(open_run(run))
    if as_json:
        click.echo(json.dumps(info, indent=2))
        return
    click.echo(f"{info['store']}: {info['done']}/{info['tasks']} tasks done ({info['percent']}% of the cost), "
               f"{info['pending']} pending, {info['failed']} failed; complete: {info['complete']}")
    click.echo(f"task time so far {info['task_seconds']} s; estimated task time left "
               f"{info['task_seconds_left_estimate']} s; commits from {info['first_commit']} to {info['last_commit']}")
    for task, message in info["failures"].items():
        click.echo(f"  task {task} failed: {message}")
    if info["curve_damaged"]:
        click.echo(f"  the final curve is damaged ({info['curve_damaged']}): `chitally resume {run}` writes it again")


@main.command("export")
@click.argument("run", metavar="RUN")
@click.option("--format", "fmt", type=click.Choice(["csv", "npz", "json"]), default=None,
              help="Output format (default: from --out's ending, else csv).")
@click.option("--grid", default=None, help="Export samples on START:STOP:COUNT instead of the exact jumps.")
@click.option("--out", "out", default=None, type=click.Path(dir_okay=False), help="File to write (default: stdout, csv/json only).")
@_guarded
def export_cmd(run: str, fmt: str | None, grid: str | None, out: str | None) -> None:
    """Write the curve of a complete RUN (CSV: header row, then scale and the value from there on)."""
    grid_values = _grid(grid)
    curve = read_result(open_run(run))
    if curve is None:
        _fail(f"{run} has no curve yet: run `chitally resume {run}`", 3)
    if fmt is None:
        fmt = Path(out).suffix.lstrip(".").lower() if out else "csv"
    if out is None:
        if fmt == "npz":
            raise click.UsageError("npz needs --out")
        import tempfile

        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"curve.{fmt}"
            curve.save_samples(path, grid_values) if grid_values is not None else curve.save(path)
            click.echo(path.read_text(), nl=False)
        return
    curve.save_samples(out, grid_values, format=fmt) if grid_values is not None else curve.save(out, format=fmt)
    click.echo(f"wrote {out}", err=True)


def _scan_eps_values(eps: str | None, eps_range: str | None) -> list[float] | None:
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
@click.option("--json", "as_json", is_flag=True, help="Print the figures as JSON.")
@_guarded
def scan_cmd(input: str, eps: str | None, eps_range: str | None, max_dim: int | None, sample: int | None,
             seed: int, key: str | None, as_json: bool) -> None:
    """Which eps? Degrees, edges, time and memory of a run at several scales, estimated from a sample; writes nothing."""
    from .scan import scan_eps

    values = _scan_eps_values(eps, eps_range)
    more = {} if sample is None else {"sample": sample}
    report = scan_eps(read_points(input, key=key), values, max_dim=max_dim, seed=seed,
                      threads=os.cpu_count() or 1, **more)
    click.echo(json.dumps(report.as_dict(), indent=2) if as_json else report.table())


@main.command("demo")
@click.option("--points", "n_points", type=int, default=20000, show_default=True, help="Points to generate.")
@click.option("--out", "out", default="chitally-demo.run", show_default=True, help="Run store of the demo.")
@click.option("--workers", type=int, default=None, help="LocalCluster worker processes.")
@click.option("--seed", type=int, default=7, show_default=True)
@_guarded
def demo_cmd(n_points: int, out: str, workers: int | None, seed: int) -> None:
    """Generate a scenario of our own and run the main job on an embedded LocalCluster."""
    from .demo import demo_scenario

    points, eps, story = demo_scenario(n_points, seed)
    click.echo(story, err=True)
    params = Params.checked(eps, None)
    store = create_or_open(out, points, params)
    report = _execute(store, scheduler=None, scheduler_file=None, workers=workers, threads=None,
                      serial=False, retries=2, takeover=False, progress=True)
    _report(report, parse_grid(f"0:{eps!r}:9"))


if __name__ == "__main__":  # pragma: no cover
    main()
