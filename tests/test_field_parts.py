"""A field run whose curve is larger than one part (`field-parts`, chitally.jobs.parts):
the tables are merged part by part on the workers and the curve read back part by part
equals the in-process `field_curve` exactly (which tests/test_cubical.py checks against
gudhi and scikit-image); here the parted curve is also checked against gudhi directly
(source named at the check)."""

from __future__ import annotations

import numpy as np
import pytest
from cubical_references import gudhi_field_curve
from helpers import chitally, explain

from chitally import Curve, field_curve, runs
from chitally.jobs.field import FieldParams, field_run
from chitally.jobs.parts import PartedCurve
from chitally.runs import Where, open_run, read_result
from chitally.validate import InputError

QUIET_HTTP = {"http_prefix": None}


def _array(seed, shape, levels=400):
    # many distinct values, with ties (levels < entries), some negative
    rng = np.random.default_rng(seed)
    return ((rng.integers(0, levels, size=shape) - levels // 3) / 8).astype(np.float32)


def _same(curve, ref: Curve, store) -> None:
    """Every answer of the parted curve equals the whole curve's."""
    assert isinstance(curve, PartedCurve) and curve.merge.n_tasks >= 3
    assert curve.to_curve() == ref and curve.digest() == ref.digest() and curve == ref
    assert (curve.final, curve.n_jumps, curve.n_points) == (ref.final, ref.n_jumps, ref.n_points)
    assert curve.domain == (ref.start, ref.eps)
    bounds = store.read_input("part_bounds")
    grid = np.concatenate([np.linspace(ref.start, ref.eps, 257), ref.values,
                           bounds[(bounds >= ref.start) & (bounds <= ref.eps)]])
    assert np.array_equal(curve.sample(grid), ref.sample(grid))
    assert curve.at(ref.start) == ref.at(ref.start) and curve.at(ref.eps) == ref.final


@pytest.mark.parametrize("construction", ["vertices", "cells"])
@pytest.mark.parametrize("shape, block, superlevel, masked", [
    ((23, 31), (7, 8), False, False),
    ((23, 31), (7, 8), True, True),
    ((9, 11, 7), (4, 5, 7), False, True),
    ((9, 11, 7), (4, 5, 7), True, False),
])
def test_a_field_reduced_in_parts_is_the_whole_curve(tmp_path, construction, shape, block, superlevel, masked):
    a = _array(sum(shape) + superlevel, shape)
    mask = np.random.default_rng(3).random(shape) < 0.8 if masked else None
    url = str(tmp_path / "f.zarr")
    report = field_run(a, url, construction=construction, superlevel=superlevel, mask=mask, block=block,
                       part_jumps=50)
    store = open_run(url)
    assert store.kind == "field-parts" and report.complete
    ref = field_curve(a, construction, superlevel=superlevel, mask=mask)
    _same(report.curve, ref, store)
    # source: gudhi CubicalComplex persistence, chi = sum_d (-1)^d #alive intervals at
    # every distinct present value (missing entries at +inf; superlevel as -f)
    assert report.curve.to_curve() == gudhi_field_curve(a, construction, superlevel, mask)
    # a run opened again reads its curve from the parts
    assert read_result(open_run(url)) == ref


def test_a_small_array_keeps_the_field_kind_and_old_parameters(tmp_path):
    a = _array(1, (6, 7))
    report = field_run(a, str(tmp_path / "f.zarr"), block=(3, 3))
    store = open_run(str(tmp_path / "f.zarr"))
    # no part_jumps given: the parameters are those of stores made before parts existed
    assert store.kind == "field" and "part_jumps" not in store.params
    assert report.curve == field_curve(a, "vertices")
    with pytest.raises(InputError, match="part_jumps"):
        FieldParams.checked(part_jumps=1)
    # 400 entries, but a byte spells at most 256 values: one part of 300 holds them all
    b = np.random.default_rng(2).integers(0, 256, (20, 20)).astype(np.uint8)
    report = field_run(b, str(tmp_path / "b.zarr"), block=(8, 8), part_jumps=300)
    assert open_run(str(tmp_path / "b.zarr")).kind == "field" and report.curve == field_curve(b, "vertices")
    report = field_run(b, str(tmp_path / "c.zarr"), block=(8, 8), part_jumps=100)
    assert open_run(str(tmp_path / "c.zarr")).kind == "field-parts"
    _same(report.curve, field_curve(b, "vertices"), open_run(str(tmp_path / "c.zarr")))


def test_a_masked_out_field_in_parts_is_the_zero_curve(tmp_path):
    a = _array(2, (10, 10))
    report = field_run(a, str(tmp_path / "f.zarr"), mask=np.zeros(a.shape, bool), block=(4, 4), part_jumps=20)
    ref = field_curve(a, "vertices", mask=np.zeros(a.shape, bool))
    assert report.complete and report.curve == ref and ref.n_points == 0


def test_a_zarr_field_in_parts_on_dask(tmp_path):
    # in-process Dask workers (threads, inproc:// comms): quick to start
    import zarr
    from distributed import LocalCluster

    a = _array(4, (16, 12, 10))
    z = zarr.create_array(str(tmp_path / "a.zarr"), shape=a.shape, chunks=(5, 6, 10), dtype=a.dtype)
    z[...] = a
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None,
                      scheduler_kwargs=QUIET_HTTP) as lc:
        report = field_run(str(tmp_path / "a.zarr"), str(tmp_path / "f.zarr"),
                           Where(scheduler=lc.scheduler_address, wait_workers=2),
                           construction="cells", part_jumps=100)
        # the blocks and the parts went through this cluster's scheduler
        assert lc.scheduler.transition_counter > 0
    store = open_run(str(tmp_path / "f.zarr"))
    assert store.kind == "field-parts" and store.attrs["location"] is not None
    _same(report.curve, field_curve(a, "cells"), store)


def test_an_unfinished_field_merge_resumes(tmp_path, monkeypatch):
    from chitally import engine

    a = _array(5, (20, 20))
    original = engine.run_task
    merged: list[int] = []

    def failing(store, task, attempt, *, threads=1):
        if store.kind == "curve-merge":
            merged.append(int(task))
            if task == 1 and merged.count(1) == 1:
                raise RuntimeError("injected failure of a merge task")
        return original(store, task, attempt, threads=threads)

    monkeypatch.setattr(engine, "run_task", failing)
    url = str(tmp_path / "f.zarr")
    report = field_run(a, url, Where(serial=True, retries=0), block=(6, 6), part_jumps=60)
    assert not report.complete and report.failed
    n_first = len(merged)
    report = runs.run(open_run(url), Where(serial=True))
    ref = field_curve(a, "vertices")
    assert report.complete and report.curve == ref
    assert merged[n_first:] == [1]  # only the failed part is merged again
    _same(report.curve, ref, open_run(url))


def test_command_line_run_and_export_of_a_field_in_parts(tmp_path):
    a = _array(6, (14, 15))
    mask = np.random.default_rng(7).random(a.shape) < 0.9
    np.save(tmp_path / "v.npy", a)
    np.save(tmp_path / "m.npy", mask)  # stays where it is: the value sample reads it by block
    run = str(tmp_path / "f.zarr")
    res = chitally("field", tmp_path / "v.npy", "--superlevel", "--mask", tmp_path / "m.npy", "--run", run,
                   "--serial", "--block", "5,5", "--part-jumps", "40", "--no-progress")
    assert res.returncode == 0, explain(res)
    ref = field_curve(a, "vertices", superlevel=True, mask=mask)
    assert f"chi({ref.eps:g}) = {ref.final}" in res.stdout + res.stderr
    assert open_run(run).kind == "field-parts"
    for name in ("c.csv", "c.json"):
        res = chitally("export", run, "--out", tmp_path / name)
        assert res.returncode == 0, explain(res)
        assert Curve.load(tmp_path / name) == ref
    res = chitally("field", tmp_path / "v.npy", "--run", str(tmp_path / "g.zarr"), "--part-jumps", "1")
    assert res.returncode == 2 and "--part-jumps" in res.stderr, explain(res)
