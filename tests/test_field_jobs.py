"""The `field` job kind (chitally.jobs.field): the engine's curve of an array equals the
in-process curve, which tests/test_cubical.py checks against gudhi and scikit-image; here
the distributed curve is also checked against gudhi directly (source named at the check)."""

from __future__ import annotations

import numpy as np
import pytest
from cubical_references import gudhi_chi
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from chitally import field_curve
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs.field import FieldParams, create_or_open, field_run
from chitally.runs import Where, open_run, read_result
from chitally.validate import InputError


def _array(seed, shape, levels=6):
    rng = np.random.default_rng(seed)
    return (rng.integers(0, levels, size=shape) * 0.25).astype(np.float32)


@pytest.mark.parametrize("construction", ["vertices", "cells"])
def test_in_memory_field_on_the_serial_engine_matches_gudhi(tmp_path, construction):
    a = _array(1, (13, 17, 9))
    report = field_run(a, str(tmp_path / "f.zarr"), construction=construction, block=(5, 4, 9))
    assert report.complete and report.n_tasks == 3 * 5
    c = report.curve
    assert c == field_curve(a, construction)
    scales = np.unique(a).astype(np.float64)
    # source: gudhi CubicalComplex persistence, chi = sum_d (-1)^d #alive intervals
    np.testing.assert_array_equal(c.at(scales), gudhi_chi(a, construction, scales))
    assert read_result(open_run(str(tmp_path / "f.zarr"))) == c


def test_zarr_input_stays_where_it_is(tmp_path):
    import zarr

    a = _array(2, (20, 30))
    url = str(tmp_path / "in.zarr")
    z = zarr.create_array(url, shape=a.shape, chunks=(7, 8), dtype=a.dtype)
    z[...] = a
    report = field_run(url, str(tmp_path / "f.zarr"), construction="cells", superlevel=True)
    assert report.curve == field_curve(a, "cells", superlevel=True)
    store = open_run(str(tmp_path / "f.zarr"))
    assert store.input_names == []  # nothing copied
    assert store.fingerprint["url"] == url and store.fingerprint["shape"] == [20, 30]
    assert store.attrs["block"] == [20, 30] or store.n_tasks >= 1
    # the same input and parameters resume the same store; other parameters are refused
    again = field_run(url, str(tmp_path / "f.zarr"), construction="cells", superlevel=True)
    assert again.curve == report.curve
    from chitally.store import StoreMismatch

    with pytest.raises(StoreMismatch):
        field_run(url, str(tmp_path / "f.zarr"), construction="vertices", superlevel=True)


def test_zarr_group_key_and_npy_memory_map(tmp_path):
    import zarr

    a = _array(3, (9, 8, 7))
    g = zarr.open_group(str(tmp_path / "g.zarr"), mode="w")
    g.create_array("vol", shape=a.shape, chunks=(4, 4, 4), dtype=a.dtype)[...] = a
    r = field_run(str(tmp_path / "g.zarr"), str(tmp_path / "f1.zarr"), key="vol", block=(4, 4, 4))
    assert r.n_tasks == 3 * 2 * 2 and r.curve == field_curve(a)
    with pytest.raises(InputError, match="key"):
        field_run(str(tmp_path / "g.zarr"), str(tmp_path / "f2.zarr"))
    np.save(tmp_path / "v.npy", a)
    r = field_run(str(tmp_path / "v.npy"), str(tmp_path / "f3.zarr"), block=(2, 8, 7))
    assert r.curve == field_curve(a)


def test_nan_in_a_block_fails_its_task_with_the_position(tmp_path):
    a = _array(4, (6, 6))
    a[4, 1] = np.nan
    report = field_run(a, str(tmp_path / "f.zarr"), block=(3, 3))
    assert not report.complete and report.failed
    assert any("NaN at position (4, 1)" in m for m in report.failed.values())
    ok = field_run(a, str(tmp_path / "g.zarr"), block=(3, 3), mask_nan=True)
    assert ok.curve == field_curve(a, mask_nan=True)


def test_partial_commits_then_resume_give_the_same_curve(tmp_path):
    a = _array(5, (10, 11))
    params = FieldParams.checked("cells", block=(3, 4))
    store = create_or_open(str(tmp_path / "f.zarr"), a, params)
    # tasks committed by an earlier, interrupted run
    SerialExecutor(threads=1, retries=0).run(store, [0, 2, 5], Callbacks())
    report = field_run(a, str(tmp_path / "f.zarr"), construction="cells", block=(3, 4))
    assert report.computed == store.n_tasks - 3
    assert report.curve == field_curve(a, "cells")


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 10**6), construction=st.sampled_from(["vertices", "cells"]),
       block=st.tuples(st.integers(2, 7), st.integers(2, 6), st.integers(1, 5)))
def test_any_block_shape_gives_the_same_curve(tmp_path_factory, seed, construction, block):
    a = _array(seed, (7, 6, 5), levels=3)
    url = str(tmp_path_factory.mktemp("f") / "f.zarr")
    assert field_run(a, url, construction=construction, block=block).curve == field_curve(a, construction)


@pytest.mark.parametrize("shape, side", [((1536, 1536), 512), ((192,) * 3, 64), ((48,) * 4, 16)])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_planned_task_memory_covers_a_block_of_distinct_values(shape, side, dtype):
    """The memory preflight trusts the plan's estimate: it must cover what a task holds
    (its halo) and allocates (traced by tracemalloc, which numpy reports to) in the worst
    case, every entry distinct (one count bin per entry)."""
    import tracemalloc

    from chitally.cubical import block_jumps, halo_ranges
    from chitally.jobs.field import job_spec

    a = np.random.default_rng(9).random(shape).astype(dtype)
    nd = len(shape)
    for construction in ("vertices", "cells"):
        spec = job_spec(a, FieldParams.checked(construction, block=(side,) * nd), None)
        owned = [(side, 2 * side)] * nd  # an inner block: a full halo on every side
        ext = halo_ranges(owned, shape)
        halo = np.ascontiguousarray(a[tuple(slice(lo, hi) for lo, hi in ext)])
        tracemalloc.start()
        try:
            block_jumps(None, construction, [slice(lo, hi) for lo, hi in owned], halo=halo,
                        halo_offset=[lo for lo, _ in ext], shape=shape)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        assert peak + halo.nbytes <= spec.memory.max()


@pytest.mark.cluster
def test_two_process_cluster_gives_the_same_curve(tmp_path):
    a = _array(6, (16, 12, 10))
    for construction in ("vertices", "cells"):
        url = str(tmp_path / f"{construction}.zarr")
        report = field_run(a, url, Where(workers=2, threads=1), construction=construction, block=(5, 5, 5))
        assert report.curve == field_curve(a, construction)


def test_command_line_in_process_and_as_a_run(tmp_path):
    from click.testing import CliRunner

    from chitally.cli import main
    from chitally.curve import Curve

    a = _array(7, (9, 10, 6))
    np.save(tmp_path / "v.npy", a)
    runner = CliRunner()
    r = runner.invoke(main, ["field", str(tmp_path / "v.npy"), "--construction", "cells",
                             "--out", str(tmp_path / "c.json")])
    assert r.exit_code == 0, r.output
    assert Curve.load(tmp_path / "c.json") == field_curve(a, "cells")
    r = runner.invoke(main, ["field", str(tmp_path / "v.npy"), "--construction", "cells", "--superlevel",
                             "--run", str(tmp_path / "f.zarr"), "--serial", "--block", "4,4,6",
                             "--no-progress"])
    assert r.exit_code == 0, r.output
    assert read_result(open_run(str(tmp_path / "f.zarr"))) == field_curve(a, "cells", superlevel=True)
    a[1, 2, 3] = np.nan
    np.save(tmp_path / "n.npy", a)
    r = runner.invoke(main, ["field", str(tmp_path / "n.npy")])
    assert r.exit_code == 2 and "NaN at position (1, 2, 3)" in r.output


def test_command_line_reads_png_and_tiff(tmp_path):
    pil = pytest.importorskip("PIL.Image")
    tifffile = pytest.importorskip("tifffile")
    from click.testing import CliRunner

    from chitally.cli import main
    from chitally.field_sources import read_field

    img = (np.random.default_rng(8).integers(0, 4, size=(12, 14)) * 60).astype(np.uint8)
    pil.fromarray(img).save(tmp_path / "i.png")
    vol = _array(9, (4, 8, 9))
    tifffile.imwrite(tmp_path / "v.tif", vol, photometric="minisblack")
    np.testing.assert_array_equal(read_field(str(tmp_path / "i.png")), img)
    np.testing.assert_array_equal(read_field(str(tmp_path / "v.tif")), vol)
    r = CliRunner().invoke(main, ["field", str(tmp_path / "i.png"), "--out", str(tmp_path / "c.npz")])
    assert r.exit_code == 0, r.output


# ------------------------------------------------------------------------------ HDF5


def _h5(path, datasets, chunks=None):
    h5py = pytest.importorskip("h5py")
    with h5py.File(path, "w") as f:
        for name, data in datasets.items():
            f.create_dataset(name, data=data, chunks=chunks if np.ndim(data) else None)
    return str(path)


def test_hdf5_dataset_stays_where_it_is_and_is_read_block_by_block(tmp_path, monkeypatch):
    from chitally.jobs import field as field_kind

    a = _array(10, (14, 11, 6))
    path = _h5(tmp_path / "v.h5", {"grp/vol": a}, chunks=(4, 4, 6))
    # one dataset: no key needed; the blocks follow the chunks unless told otherwise
    reads: list[tuple] = []
    original = field_kind.Hdf5Field.__getitem__

    def spy(self, selection):
        reads.append(selection)
        return original(self, selection)

    monkeypatch.setattr(field_kind.Hdf5Field, "__getitem__", spy)
    report = field_run(path, str(tmp_path / "f.zarr"), construction="cells", block=(4, 4, 6))
    assert report.complete and report.n_tasks == 4 * 3
    assert report.curve == field_curve(a, "cells")
    store = open_run(str(tmp_path / "f.zarr"))
    assert store.input_names == []  # nothing copied into the store
    assert store.attrs["location"]["format"] == "hdf5"
    # every read is one block with its halo (the fingerprint's samples and the tasks')
    assert reads and all(np.prod([s.stop - s.start for s in sel]) <= 6 * 6 * 6 for sel in reads)
    # a second dataset: the key chooses it
    path2 = _h5(tmp_path / "two.hdf5", {"a": a, "b": a[::-1] * 2})
    r = field_run(path2, str(tmp_path / "g.zarr"), key="b", superlevel=True, block=(5, 5, 5))
    assert r.curve == field_curve(a[::-1] * 2, superlevel=True)


def test_hdf5_in_process_and_on_the_command_line(tmp_path):
    from click.testing import CliRunner

    from chitally.cli import main
    from chitally.curve import Curve
    from chitally.field_sources import read_field

    a = _array(11, (12, 9))
    path = _h5(tmp_path / "i.h5", {"img": a, "other": a.T.copy()})
    np.testing.assert_array_equal(read_field(path, "img"), a)
    runner = CliRunner()
    r = runner.invoke(main, ["field", path, "--key", "img", "--out", str(tmp_path / "c.json")])
    assert r.exit_code == 0, r.output
    assert Curve.load(tmp_path / "c.json") == field_curve(a)
    r = runner.invoke(main, ["field", path, "--key", "img", "--run", str(tmp_path / "f.zarr"), "--serial",
                             "--block", "5,4", "--no-progress"])
    assert r.exit_code == 0, r.output
    assert read_result(open_run(str(tmp_path / "f.zarr"))) == field_curve(a)


@pytest.mark.parametrize("run", [False, True])
def test_hdf5_mistakes_are_one_line_exit_2(tmp_path, run):
    from click.testing import CliRunner

    from chitally.cli import main

    a = _array(12, (6, 5))
    several = _h5(tmp_path / "s.h5", {"x": a, "y": a})
    text = _h5(tmp_path / "t.h5", {"names": np.array([b"ab", b"cd"])})
    (tmp_path / "not.h5").write_bytes(b"not an HDF5 file at all")
    extra = ["--run", str(tmp_path / "f.zarr"), "--serial", "--no-progress"] if run else []
    cases = [([several], "holds 2 HDF5 datasets: name one with key (['x', 'y'])"),
             ([several, "--key", "z"], "has no dataset 'z' (datasets: ['x', 'y'])"),
             ([text], "must hold real numbers (integers or floats), got dtype |S2"),
             ([str(tmp_path / "not.h5")], "cannot read"),
             ([str(tmp_path / "missing.h5")], "no such file or directory")]
    for args, message in cases:
        r = CliRunner().invoke(main, ["field", *args, *extra])
        assert r.exit_code == 2, r.output
        assert r.output.count("\n") == 1 and message in r.output, r.output
    assert not (tmp_path / "f.zarr").exists()


# ------------------------------------------------------------------------------ masks


@pytest.mark.parametrize("construction", ["vertices", "cells"])
@pytest.mark.parametrize("where", ["memory", "npy", "zarr", "hdf5"])
def test_a_mask_is_honoured_block_by_block(tmp_path, construction, where):
    a = _array(13, (11, 13))
    mask = np.random.default_rng(14).random(a.shape) < 0.7
    mask[:, 6:8] = False  # a whole block column missing: empty blocks fold too
    if where == "memory":
        source = mask
    elif where == "npy":
        np.save(tmp_path / "m.npy", mask)
        source = str(tmp_path / "m.npy")
    elif where == "zarr":
        import zarr

        z = zarr.create_array(str(tmp_path / "m.zarr"), shape=mask.shape, chunks=(4, 4), dtype=bool)
        z[...] = mask
        source = str(tmp_path / "m.zarr")
    else:
        source = _h5(tmp_path / "m.h5", {"mask": mask})
    report = field_run(a, str(tmp_path / "f.zarr"), construction=construction, mask=source, block=(4, 3))
    c = report.curve
    assert report.n_tasks == 3 * 5 and c == field_curve(a, construction, mask=mask)
    assert c.n_points == int(mask.sum())
    scales = np.unique(a[mask]).astype(np.float64)
    # source: gudhi CubicalComplex with missing entries at +inf (never in a finite
    # sublevel set; in the cell construction a face takes the min of its top cells)
    np.testing.assert_array_equal(c.at(scales), gudhi_chi(np.where(mask, a, np.inf), construction, scales))
    store = open_run(str(tmp_path / "f.zarr"))
    assert ("mask" in store.input_names) == (where == "memory")
    # another mask is another run; no mask is another run too
    from chitally.store import StoreMismatch

    with pytest.raises(StoreMismatch, match="mask"):
        field_run(a, str(tmp_path / "f.zarr"), construction=construction, mask=~mask, block=(4, 3))
    with pytest.raises(StoreMismatch, match="mask"):
        field_run(a, str(tmp_path / "f.zarr"), construction=construction, block=(4, 3))


def test_a_mask_with_nan_and_superlevel_from_a_zarr_field(tmp_path):
    import zarr

    a = _array(15, (10, 9, 4)).astype(np.float64)
    mask = np.random.default_rng(16).random(a.shape) < 0.8
    a[~mask & (np.random.default_rng(17).random(a.shape) < 0.5)] = np.nan  # NaN only where masked out
    a[2, 3, 1] = np.nan  # and one NaN inside the mask, treated as missing with mask_nan
    z = zarr.create_array(str(tmp_path / "in.zarr"), shape=a.shape, chunks=(3, 4, 4), dtype=a.dtype)
    z[...] = a
    np.save(tmp_path / "m.npy", mask)
    refused = field_run(str(tmp_path / "in.zarr"), str(tmp_path / "f0.zarr"), mask=str(tmp_path / "m.npy"))
    assert any("NaN at position (2, 3, 1)" in m for m in refused.failed.values())
    r = field_run(str(tmp_path / "in.zarr"), str(tmp_path / "f.zarr"), mask=str(tmp_path / "m.npy"),
                  mask_nan=True, superlevel=True)
    expected = field_curve(a, superlevel=True, mask=mask, mask_nan=True)
    assert r.curve == expected and expected.n_points == int(mask.sum()) - 1


def test_mask_on_the_command_line(tmp_path):
    from click.testing import CliRunner

    from chitally.cli import main
    from chitally.curve import Curve

    a = _array(18, (8, 9, 5))
    mask = np.random.default_rng(19).random(a.shape) < 0.6
    np.save(tmp_path / "v.npy", a)
    np.save(tmp_path / "m.npy", mask)
    np.savez(tmp_path / "m.npz", keep=mask)
    runner = CliRunner()
    r = runner.invoke(main, ["field", str(tmp_path / "v.npy"), "--mask", str(tmp_path / "m.npy"),
                             "--construction", "cells", "--out", str(tmp_path / "c.json")])
    assert r.exit_code == 0, r.output
    assert Curve.load(tmp_path / "c.json") == field_curve(a, "cells", mask=mask)
    for mask_file, store in (("m.npy", "f1.zarr"), ("m.npz", "f2.zarr")):
        r = runner.invoke(main, ["field", str(tmp_path / "v.npy"), "--mask", str(tmp_path / mask_file),
                                 "--construction", "cells", "--run", str(tmp_path / store), "--serial",
                                 "--block", "3,4,5", "--no-progress"])
        assert r.exit_code == 0, r.output
        assert read_result(open_run(str(tmp_path / store))) == field_curve(a, "cells", mask=mask)
    # a mask of another shape or dtype: one line, exit 2, nothing created
    np.save(tmp_path / "short.npy", mask[:, :-1])
    np.save(tmp_path / "ints.npy", mask.astype(np.uint8))
    for bad, message in (("short.npy", "has shape (8, 8, 5), the array (8, 9, 5)"),
                         ("ints.npy", "must be boolean (True where an entry is part of the complex), got dtype uint8")):
        for extra in ([], ["--run", str(tmp_path / "bad.zarr"), "--serial", "--no-progress"]):
            r = runner.invoke(main, ["field", str(tmp_path / "v.npy"), "--mask", str(tmp_path / bad), *extra])
            assert r.exit_code == 2, r.output
            assert r.output.count("\n") == 1 and "--mask" in r.output and message in r.output, r.output
    assert not (tmp_path / "bad.zarr").exists()


def test_hdf5_by_fsspec_url(tmp_path):
    fsspec = pytest.importorskip("fsspec")
    a = _array(20, (7, 10))
    local = _h5(tmp_path / "u.h5", {"f": a})
    url = "memory://fields/u.h5"
    with fsspec.open(url, "wb") as out:
        out.write(open(local, "rb").read())
    try:
        r = field_run(url, str(tmp_path / "f.zarr"), block=(3, 10))
        assert r.n_tasks == 3 and r.curve == field_curve(a)
        assert open_run(str(tmp_path / "f.zarr")).attrs["location"] == {"format": "hdf5", "url": url, "key": None}
    finally:
        fsspec.filesystem("memory").rm("/fields", recursive=True)
