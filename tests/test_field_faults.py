"""Failures during field runs (the `field` job kind through `chitally field --run`): a
block whose process dies between its outputs and its commit record, damaged block
outputs in a committed store, and a second run on a store another run holds.

The machinery is the cloud runs' (tests/test_faults.py): faults injected around the
engine's task function by `faultwrap` (every attempt logged with its pid), real
`chitally` processes, waits that poll the store's files. The field lies in an HDF5 file
and its mask in a ``.npy`` file, both read block by block where they are. Every run must
end with exactly the curve of `chitally.field_curve`, itself equal to gudhi's
(``CubicalComplex`` with missing entries at +inf, ``tests/cubical_references.py``).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from cubical_references import gudhi_field_curve
from helpers import (
    chitally,
    chunk,
    command,
    commits,
    explain,
    flip_byte,
    lease_holder,
    make_faults,
    processes,  # noqa: F401 - fixture
    truncate,
    wait_for,
)

import chitally as ct
from chitally.cli import EXIT_BUSY
from chitally.runs import open_run, read_result

pytestmark = pytest.mark.timeout(180)

SHAPE = (30, 28)
BLOCK = (6, 7)
N = 5 * 4  # tasks: blocks of 6 x 7 over 30 x 28
EXIT_BETWEEN = 17  # faultwrap's exit status for a process ended between outputs and commit


@pytest.fixture(scope="module")
def arrays() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(41)
    a = (rng.integers(0, 7, size=SHAPE) * 0.25).astype(np.float32)
    return a, rng.random(SHAPE) < 0.8


@pytest.fixture(scope="module")
def expected(arrays) -> ct.Curve:
    a, mask = arrays
    curve = ct.field_curve(a, "cells", superlevel=True, mask=mask)
    assert curve == gudhi_field_curve(a, "cells", True, mask)  # gudhi CubicalComplex, masked at +inf
    return curve


@pytest.fixture
def inputs(tmp_path: Path, arrays) -> tuple[Path, Path]:
    h5py = pytest.importorskip("h5py")
    a, mask = arrays
    with h5py.File(tmp_path / "field.h5", "w") as f:
        f.create_dataset("scan", data=a, chunks=BLOCK)
    np.save(tmp_path / "mask.npy", mask)
    return tmp_path / "field.h5", tmp_path / "mask.npy"


def field_args(inputs: tuple[Path, Path], run: Path, *extra: object) -> list[str]:
    field, mask = inputs
    return ["field", str(field), "--mask", str(mask), "--construction", "cells", "--superlevel",
            "--block", ",".join(map(str, BLOCK)), "--run", str(run), "--no-progress", *map(str, extra)]


def result_of(run: Path) -> ct.Curve | None:
    return read_result(open_run(str(run)))


def one_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


@pytest.mark.parametrize("how", ["serial", pytest.param("dask", marks=pytest.mark.slow)])
def test_a_block_dying_between_its_outputs_and_its_commit_is_recomputed(tmp_path, inputs, expected, how):
    """Serially the driver itself dies in the victim's block and `resume` recomputes it;
    on Dask the worker dies (its nanny starts another) and the same run recomputes it."""
    victim = 7
    faults = make_faults(tmp_path, exit_between=[victim])
    run = tmp_path / "run.zarr"
    if how == "serial":
        res = chitally(*field_args(inputs, run, "--serial"), faults=faults)
        assert res.returncode == EXIT_BETWEEN, explain(res)
        # tasks run in order: those before the victim committed; the victim's outputs
        # are on disk without a commit record, so it is pending
        assert commits(run) == set(range(victim))
        assert chunk(run, victim, "values").is_file() and chunk(run, victim, "range").is_file()
        assert result_of(run) is None
        res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
        assert res.returncode == 0, explain(res)
        assert f"{N}/{N} tasks done, {N - victim} computed now, 0 failed" in res.stderr
    else:
        res = chitally(*field_args(inputs, run, "--workers", 2, "--threads", 1), faults=faults)
        assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    attempts = faults.attempts()
    assert set(attempts) == set(range(N)) and attempts[victim] == 2
    assert faults.pids(victim)[0] != faults.pids(victim)[1]
    # only blocks whose first attempt ran in the process that died may have run twice
    died = faults.pids(victim)[0]
    again = {t for t, k in attempts.items() if k > 1} - {victim}
    assert all(attempts[t] == 2 and faults.pids(t)[0] == died for t in again)
    if how == "serial":
        assert not again
    assert commits(run) == set(range(N)) and lease_holder(run) is None


def test_damaged_block_outputs_are_set_aside_and_recomputed(tmp_path, inputs, expected):
    """In a complete store, one block's jump values are cut short and a byte of another
    block's range is flipped; with the result and checkpoints gone the outputs are read
    again: both blocks are set aside (their records kept in the quarantine) and computed
    again, and the curve is identical."""
    run = tmp_path / "run.zarr"
    res = chitally(*field_args(inputs, run, "--serial"))
    assert res.returncode == 0, explain(res)
    assert result_of(run) == expected
    truncated, flipped = 3, 12
    truncate(chunk(run, truncated, "values"))
    flip_byte(chunk(run, flipped, "range"))
    shutil.rmtree(run / "result")
    shutil.rmtree(run / "checkpoints")
    faults = make_faults(tmp_path)
    res = chitally("resume", run, "--serial", "--no-progress", faults=faults)
    assert res.returncode == 0, explain(res)
    assert f"damaged outputs set aside and computed again: tasks {[truncated, flipped]}" in res.stderr
    assert f"{N}/{N} tasks done, 2 computed now, 0 failed" in res.stderr
    assert faults.attempts() == {truncated: 1, flipped: 1}
    assert result_of(run) == expected
    kept = {p.relative_to(p.parents[1]).as_posix() for p in (run / "quarantine").rglob("task-*.json")}
    assert kept == {f"commits/task-{t:06d}.json" for t in (truncated, flipped)}


def test_a_second_run_on_a_busy_store_is_refused(tmp_path, processes, inputs, expected):
    """While a field run holds its store (its block 5 waits at a gate), a second
    `chitally field --run` or `resume` on the store exits 4 with one line naming the
    holder and computes nothing; the first run then completes with the exact curve."""
    gate = tmp_path / "gate"
    faults = make_faults(tmp_path, gate={"5": str(gate)})
    run = tmp_path / "run.zarr"
    first = processes.start(command(*field_args(inputs, run, "--serial"), faults=faults), name="first")
    wait_for(lambda: faults.pids(5), 60, "the first run to reach block 5")
    assert commits(run) == set(range(5))
    for args in (field_args(inputs, run, "--serial"), ["resume", str(run), "--serial", "--no-progress"]):
        res = chitally(*args, faults=faults)
        assert res.returncode == EXIT_BUSY, explain(res)
        line = one_line(res.stderr)
        assert f"is in use by chitally field run (pid {first.pid} on " in line and "last heartbeat" in line
    assert first.popen.poll() is None and commits(run) == set(range(5))
    gate.touch()
    assert first.wait(120) == 0, first.stderr()
    assert result_of(run) == expected
    assert faults.attempts() == {t: 1 for t in range(N)}
