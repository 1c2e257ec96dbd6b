"""The `chitally` command: bad input and bad options, plan, curve, export, status,
--version, tiny-task warnings, a file where a run store belongs.

Driven in process with click's CliRunner (nothing here needs a second process), except a
check of the command in a process of its own. Curves are compared exactly with
`chitally.euler_curve` on the same points and, once, with outside references (networkx
``enumerate_all_cliques``, brute force; gudhi's Rips filtration).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import chitally, cloud, explain, make_faults, tree_digest, write_points
from references import brute_force_curve, gudhi_curve

import chitally as ct
from chitally import engine
from chitally.cli import EXIT_INCOMPLETE, EXIT_USAGE, main, plan_lines
from chitally.curve import read_samples
from chitally.jobs.cloud import Params, create_or_open, describe
from chitally.runs import open_run, read_result

pytestmark = pytest.mark.timeout(120)

EPS = 0.03
COST = 4000
GRID = "0:0.03:7"


@pytest.fixture(scope="module")
def points() -> np.ndarray:
    return cloud(2000, seed=3)


@pytest.fixture(scope="module")
def expected(points: np.ndarray) -> ct.Curve:
    """`euler_curve`, which must equal two outside references: every simplex listed by
    networkx ``enumerate_all_cliques`` (references.brute_force_curve), and gudhi's Rips
    filtration (references.gudhi_curve)."""
    curve = ct.euler_curve(points, EPS)
    assert curve == brute_force_curve(points, EPS, None)  # networkx, brute force
    assert curve == gudhi_curve(points, EPS, None)  # gudhi RipsComplex
    return curve


@pytest.fixture(scope="module")
def src(tmp_path_factory, points) -> Path:
    return write_points(tmp_path_factory.mktemp("input") / "points.npy", points)


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


@pytest.fixture(scope="module")
def complete_run(tmp_path_factory, src, expected) -> Path:
    """A run store of `src` run to its end (serially, in this process), printing the
    curve's samples on a grid."""
    run = tmp_path_factory.mktemp("complete") / "run.zarr"
    res = CliRunner().invoke(main, ["run", str(src), "--eps", str(EPS), "--task-cost", str(COST),
                                    "--out", str(run), "--serial", "--no-progress", "--grid", GRID])
    assert res.exit_code == 0, res.output
    grid = ct.parse_grid(GRID)
    rows = res.stdout.strip().splitlines()
    assert rows[0] == "scale,chi"
    assert [int(r.split(",")[1]) for r in rows[1:]] == expected.sample(grid).tolist()
    return run


def one_error_line(res) -> str:
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("chitally: error: "), res.stderr
    return lines[0]


# ----------------------------------------------------------------------- version


def test_version(runner):
    res = runner.invoke(main, ["--version"])
    assert res.exit_code == 0
    assert res.stdout.strip() == f"chitally, version {ct.__version__}"


# --------------------------------------------------------------------- bad input


def _write_bad(folder: Path, kind: str) -> Path:
    path = folder / f"{kind}.npy"
    if kind == "nan":
        np.save(path, np.array([[0.0, 1.0], [np.nan, 2.0]]))
    elif kind == "inf":
        np.save(path, np.array([[0.0, 1.0], [1.0, -np.inf]]))
    elif kind == "flat":
        np.save(path, np.array([0.0, 1.0, 2.0]))
    elif kind == "empty":
        np.save(path, np.zeros((0, 2)))
    elif kind == "good":
        np.save(path, cloud(50, seed=9))
    return path  # "missing": never written


BAD = [
    # (file kind, extra options, words the message must contain)
    ("nan", [], ["nan", "finite"]),
    ("inf", [], ["inf", "finite"]),
    ("flat", [], ["2-D", "(3,)"]),
    ("empty", [], ["at least one point"]),
    ("missing", [], ["missing.npy", "no such file"]),
    ("good", ["--eps", "0"], ["eps", "finite number > 0"]),
    ("good", ["--eps", "-0.5"], ["eps", "finite number > 0"]),
    ("good", ["--eps", "nan"], ["eps", "finite number > 0"]),
    ("good", ["--max-dim", "-1"], ["--max-dim", ">= 0"]),
]


@pytest.mark.parametrize("command", ["run", "curve"])
@pytest.mark.parametrize("kind,options,words", BAD, ids=[f"{b[0]}{''.join(b[1])}" for b in BAD])
def test_bad_input_exits_2_with_one_line_and_creates_nothing(tmp_path, runner, command, kind, options, words):
    src = _write_bad(tmp_path, kind)
    before = sorted(p.name for p in tmp_path.iterdir())
    opts = dict(zip(options[::2], options[1::2]))
    args = [command, str(src), "--eps", opts.pop("--eps", "0.1")]
    args += [x for kv in opts.items() for x in kv]
    if command == "run":
        args += ["--out", str(tmp_path / "run.zarr"), "--no-progress"]  # validated before any cluster
    else:
        args += ["--out", str(tmp_path / "curve.csv")]
    res = runner.invoke(main, args)
    assert res.exit_code == EXIT_USAGE, res.output
    line = one_error_line(res)
    assert all(w in line for w in words), line
    assert res.stdout == ""
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # no store, no curve file


def test_bad_input_through_the_command(tmp_path):
    """The command in a process of its own, as a user runs it: exit status 2, one line,
    no store."""
    src = _write_bad(tmp_path, "nan")
    res = chitally("run", src, "--eps", 0.1, "--out", tmp_path / "run.zarr", "--serial")
    assert res.returncode == EXIT_USAGE, explain(res)
    assert res.stderr.strip().count("\n") == 0 and "row 1, column 0 is nan" in res.stderr
    assert not (tmp_path / "run.zarr").exists()


# ------------------------------------------------------------------------ plan


def test_plan_prints_the_plan_and_writes_nothing(tmp_path, runner, src, points, complete_run, monkeypatch):
    before = sorted(str(p) for p in src.parent.rglob("*"))
    monkeypatch.chdir(tmp_path)
    args = ["plan", str(src), "--eps", str(EPS), "--task-cost", str(COST)]
    res = runner.invoke(main, args)
    assert res.exit_code == 0, res.output
    text = res.stdout
    as_json = runner.invoke(main, [*args, "--json"])
    assert as_json.exit_code == 0, as_json.output
    assert list(tmp_path.iterdir()) == []
    assert sorted(str(p) for p in src.parent.rglob("*")) == before
    summary = json.loads(as_json.stdout)
    want = describe(points, Params.checked(EPS, None, None, COST))
    for name in ("balls", "tasks", "halo_rows", "replication"):
        assert summary[name] == want[name]
    for line in plan_lines(want):  # the same figures, in plain words
        assert line in text
    assert summary["points"] == points.shape[0]
    assert "store layout:" in text and "outputs/task-000000.." in text
    # the plan is the one a run makes
    assert summary["tasks"] == open_run(str(complete_run)).n_tasks


# ----------------------------------------------------------------------- curve


def test_curve_writes_exact_curves_and_samples(tmp_path, runner, src, expected):
    for ending in ("csv", "json", "npz"):
        out = tmp_path / f"curve.{ending}"
        res = runner.invoke(main, ["curve", str(src), "--eps", str(EPS), "--out", str(out), "--threads", "1"])
        assert res.exit_code == 0, res.output
        assert ct.Curve.load(out) == expected
    grid = ct.parse_grid(GRID)
    res = runner.invoke(main, ["curve", str(src), "--eps", str(EPS), "--grid", GRID])
    assert res.exit_code == 0, res.output
    lines = res.stdout.strip().splitlines()
    assert lines[0] == "scale,chi"
    assert [float(r.split(",")[0]) for r in lines[1:]] == grid.tolist()
    assert [int(r.split(",")[1]) for r in lines[1:]] == expected.sample(grid).tolist()
    out = tmp_path / "samples.csv"
    res = runner.invoke(main, ["curve", str(src), "--eps", str(EPS), "--grid", GRID, "--out", str(out)])
    assert res.exit_code == 0, res.output
    scale, chi = read_samples(out)
    assert scale.tolist() == grid.tolist() and chi.tolist() == expected.sample(grid).tolist()
    # a capped curve too
    out = tmp_path / "capped.csv"
    res = runner.invoke(main, ["curve", str(src), "--eps", str(EPS), "--max-dim", "1", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert ct.Curve.load(out) == ct.euler_curve(np.load(src), EPS, 1)


def test_bad_grid_is_a_usage_error(tmp_path, runner, src):
    res = runner.invoke(main, ["curve", str(src), "--eps", str(EPS), "--grid", "0.5:0.1:3"])
    assert res.exit_code == EXIT_USAGE
    assert "--grid" in res.stderr and "START" in res.stderr


# ---------------------------------------------------------------------- export


@pytest.mark.parametrize("fmt", ["csv", "json", "npz"])
def test_export_round_trips(tmp_path, runner, complete_run, expected, fmt):
    by_ending = tmp_path / f"curve.{fmt}"
    res = runner.invoke(main, ["export", str(complete_run), "--out", str(by_ending)])
    assert res.exit_code == 0, res.output
    assert ct.Curve.load(by_ending) == expected
    named = tmp_path / "curve.data"
    res = runner.invoke(main, ["export", str(complete_run), "--format", fmt, "--out", str(named)])
    assert res.exit_code == 0, res.output
    assert ct.Curve.load(named, format=fmt) == expected
    grid = ct.parse_grid(GRID)
    samples = tmp_path / f"samples.{fmt}"
    res = runner.invoke(main, ["export", str(complete_run), "--grid", GRID, "--out", str(samples)])
    assert res.exit_code == 0, res.output
    scale, chi = read_samples(samples)
    assert scale.tolist() == grid.tolist() and chi.tolist() == expected.sample(grid).tolist()


def test_export_to_stdout(tmp_path, runner, complete_run, expected):
    res = runner.invoke(main, ["export", str(complete_run), "--format", "json"])
    assert res.exit_code == 0, res.output
    assert ct.Curve.from_dict(json.loads(res.stdout)) == expected
    res = runner.invoke(main, ["export", str(complete_run)])  # csv by default
    assert res.exit_code == 0, res.output
    (tmp_path / "out.csv").write_text(res.stdout)
    assert ct.Curve.load(tmp_path / "out.csv") == expected
    res = runner.invoke(main, ["export", str(complete_run), "--format", "npz"])
    assert res.exit_code == EXIT_USAGE and "npz needs --out" in res.stderr


# ---------------------------------------------------------------------- status


def test_status_of_a_complete_run(runner, complete_run, expected):
    assert read_result(open_run(str(complete_run))) == expected
    n = open_run(str(complete_run)).n_tasks
    res = runner.invoke(main, ["status", str(complete_run)])
    assert res.exit_code == 0, res.output
    assert f"{n}/{n} tasks done (100.0% of the work), 0 pending, 0 failed; complete: True" in res.stdout
    info = json.loads(runner.invoke(main, ["status", str(complete_run), "--json"]).stdout)
    assert (info["tasks"], info["done"], info["pending"], info["failed"]) == (n, n, 0, 0)
    assert info["complete"] is True and info["percent"] == 100.0 and info["failures"] == {}
    assert info["task_seconds_left_estimate"] == 0.0


def test_status_of_incomplete_runs(tmp_path, runner, src, points, monkeypatch):
    # created, nothing computed yet
    fresh = tmp_path / "fresh.zarr"
    store = create_or_open(str(fresh), points, Params.checked(EPS, None, None, COST))
    n = store.n_tasks
    info = json.loads(runner.invoke(main, ["status", str(fresh), "--json"]).stdout)
    assert (info["done"], info["pending"], info["failed"], info["complete"]) == (0, n, 0, False)
    assert info["percent"] == 0.0 and info["task_seconds_left_estimate"] is None
    # one task that always fails: the run ends incomplete (exit 3), status names it
    poison = 2
    faults = make_faults(tmp_path, poison=[poison])
    # the executors look the task function up when they run: this one injects the fault
    monkeypatch.setattr(engine, "run_task", faults.wrapper())
    run = tmp_path / "run.zarr"
    res = runner.invoke(main, ["run", str(src), "--eps", str(EPS), "--task-cost", str(COST), "--out", str(run),
                               "--serial", "--no-progress"])
    assert res.exit_code == EXIT_INCOMPLETE, res.output
    assert f"task {poison} failed: InjectedFault: injected poison in task {poison}" in res.stderr
    res = runner.invoke(main, ["status", str(run)])
    assert res.exit_code == 0, res.output
    assert f"{n - 1}/{n} tasks done" in res.stdout and "0 pending, 1 failed; complete: False" in res.stdout
    assert f"task {poison} failed: InjectedFault: injected poison in task {poison}" in res.stdout
    assert faults.attempts() == {t: 3 if t == poison else 1 for t in range(n)}
    assert read_result(open_run(str(run))) is None and read_result(open_run(str(fresh))) is None


def test_status_of_no_store(tmp_path, runner):
    res = runner.invoke(main, ["status", str(tmp_path / "nothing.zarr")])
    assert res.exit_code == 2  # naming a store that is not there is a usage error
    assert "no run store" in one_error_line(res)
    assert not (tmp_path / "nothing.zarr").exists()


# ---------------------------------------------------------- options checked first


def _grid_is_bounded() -> bool:
    """Whether `parse_grid` refuses a grid too large to sample (a bound on COUNT)."""
    try:
        ct.parse_grid("0:1:1000000000000")
    except ValueError:
        return True
    except MemoryError:
        return False
    return False


BAD_OPTIONS = [
    # (command, option, value)
    ("run", "--task-cost", "0"),
    ("plan", "--task-cost", "0"),
    ("run", "--cover-radius", "0"),
    ("plan", "--cover-radius", "0"),
    pytest.param("run", "--grid", "0:1:1000000000000", marks=pytest.mark.xfail(
        not _grid_is_bounded(), strict=False,
        reason="parse_grid does not bound COUNT yet (the validators branch adds the bound)")),
    ("run", "--retries", "-1"),
    ("run", "--workers", "0"),
    ("run", "--workers", "-1"),
    ("resume", "--workers", "0"),
    ("resume", "--retries", "-1"),
    ("run", "--threads", "0"),
    ("run", "--lost-after", "0"),
]


@pytest.mark.parametrize("command,option,value", BAD_OPTIONS)
def test_bad_option_exits_2_naming_it_before_anything_starts(tmp_path, runner, src, points,
                                                            monkeypatch, command, option, value):
    """A bad number of an option: one line naming the option, exit 2, no store created or
    touched, no cluster started."""
    from chitally import cluster

    def no_cluster(*args, **kwargs):
        raise AssertionError("a cluster was started for a command with a bad option")

    monkeypatch.setattr(cluster, "connect", no_cluster)
    if command == "run":
        args = ["run", str(src), "--eps", str(EPS), "--out", str(tmp_path / "run.zarr"), "--no-progress"]
    elif command == "plan":
        args = ["plan", str(src), "--eps", str(EPS)]
    else:  # a store with every task pending: resuming it would start a cluster
        pending = tmp_path / "pending.zarr"
        create_or_open(str(pending), points, Params.checked(EPS, None, None, COST))
        args = ["resume", str(pending), "--no-progress"]
    before = tree_digest(tmp_path)
    res = runner.invoke(main, [*args, option, value])
    assert res.exit_code == EXIT_USAGE, res.output
    line = one_error_line(res)
    assert re.match(rf"chitally: error: {re.escape(option)}\b", line), line  # named first
    assert res.stdout == ""
    assert tree_digest(tmp_path) == before  # nothing created, nothing touched


def test_a_file_where_a_run_store_belongs_exits_2(tmp_path, runner, src):
    """RUN (or --out) naming a regular file: one line, exit 2, the file left as it was."""
    not_a_store = tmp_path / "notes.txt"
    not_a_store.write_text("not a run store\n")
    for args in (["resume", str(not_a_store), "--serial", "--no-progress"],
                 ["status", str(not_a_store)],
                 ["export", str(not_a_store)],
                 ["run", str(src), "--eps", str(EPS), "--out", str(not_a_store), "--serial", "--no-progress"]):
        res = runner.invoke(main, args)
        assert res.exit_code == EXIT_USAGE, (args, res.output)
        assert f"{not_a_store} is a file, not a run store" in one_error_line(res), args
        assert not_a_store.read_text() == "not a run store\n"


# ----------------------------------------------------------------------- tiny tasks


def test_tiny_tasks_warn_with_the_figures(tmp_path, runner, monkeypatch):
    """A task cost 200 times below the planner's default makes many tiny tasks: `plan`
    and `run` say how many, and about how long the overhead alone takes, and suggest a
    larger --task-cost."""
    import os

    from chitally.jobs.cloud import TASK_OVERHEAD_SECONDS, plan_points
    from chitally.planner import DEFAULT_MIN_TASKS, DEFAULT_TASK_ROWS

    monkeypatch.setattr(os, "cpu_count", lambda: 2)  # the warning's threshold scales with cores
    points = cloud(7000, seed=21)
    eps = 0.004
    src = write_points(tmp_path / "many.npy", points)
    _, default, _ = plan_points(points, Params.checked(eps))
    total = float(default.cost.sum())
    default_cost = max(total / DEFAULT_MIN_TASKS, total * DEFAULT_TASK_ROWS / points.shape[0])
    tiny = default_cost / 200
    _, plan, _ = plan_points(points, Params.checked(eps, None, None, tiny))
    cores = os.cpu_count() or 1
    assert plan.n_tasks > 64 * cores  # many more tasks than the default plan's
    figures = [f"warning: {plan.n_tasks} tasks of ",
               f"take about {plan.n_tasks * TASK_OVERHEAD_SECONDS / cores:.0f} s on {cores} cores",
               "a larger --task-cost makes fewer, bigger tasks"]

    res = runner.invoke(main, ["plan", str(src), "--eps", str(eps), "--task-cost", repr(tiny)])
    assert res.exit_code == 0, res.output
    assert all(f in res.stdout for f in figures), res.stdout
    res = runner.invoke(main, ["plan", str(src), "--eps", str(eps)])
    assert res.exit_code == 0 and "warning:" not in res.stdout, res.stdout  # the default: none

    run = tmp_path / "run.zarr"
    res = runner.invoke(main, ["run", str(src), "--eps", str(eps), "--task-cost", repr(tiny),
                               "--out", str(run), "--serial", "--no-progress"])
    assert res.exit_code == 0, res.output
    warning = next(line for line in res.stderr.splitlines() if line.startswith("warning: "))
    assert all(f in warning for f in figures), res.stderr
    assert f"{plan.n_tasks}/{plan.n_tasks} tasks done" in res.stderr
    curve = read_result(open_run(str(run)))
    assert curve == ct.euler_curve(points, eps)
    assert curve == gudhi_curve(points, eps, None)  # gudhi RipsComplex


@pytest.mark.parametrize("out, extra, words", [
    ("missing/c.csv", [], "does not exist"),
    ("c.txt", [], "cannot tell the format"),
    (".", ["--format", "csv"], "is a folder"),
])
def test_bad_output_paths_exit_2_before_any_computation(tmp_path, runner, src, monkeypatch, out, extra,
                                                        words):
    import chitally.inprocess

    def no_kernel(*args, **kwargs):
        raise AssertionError("the curve was computed before the output path was checked")

    monkeypatch.setattr(chitally.inprocess, "euler_curve", no_kernel)
    monkeypatch.chdir(tmp_path)
    res = runner.invoke(main, ["curve", str(src), "--eps", "0.1", "--out", out, *extra])
    assert res.exit_code == EXIT_USAGE, res.output
    line = one_error_line(res)
    assert f"--out {out}" in line and words in line


def test_export_to_a_missing_folder_exits_2_naming_the_path(tmp_path, runner, complete_run):
    target = tmp_path / "nowhere" / "curve.csv"
    res = runner.invoke(main, ["export", str(complete_run), "--out", str(target)])
    assert res.exit_code == EXIT_USAGE, res.output
    assert str(target) in one_error_line(res) and not target.parent.exists()
