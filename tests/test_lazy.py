"""Tests for chitally.lazy: every lazy source reads what read_points reads, bit for bit,
in any row range, refuses the same faults with the same one-line messages (naming rows
of the whole input), survives pickling, and changes its token when its file changes."""

from __future__ import annotations

import os
import pickle
import tracemalloc
from collections.abc import Callable
from pathlib import Path

import fsspec
import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from chitally.lazy import ArraySource, PointSource, open_points
from chitally.sources import InputError, read_points
from chitally.validate import validate_points

N, M, CHUNK = 47, 3, 10  # chunks of 10 rows: a row in [20, 30) lies in the third block


def _points(seed: int = 3) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal((N, M))


def _write_npy(path: Path, a: np.ndarray) -> tuple[str, dict]:
    np.save(path / "p.npy", a)
    return str(path / "p.npy"), {}


def _write_npz(path: Path, a: np.ndarray) -> tuple[str, dict]:
    np.savez(path / "p.npz", other=np.zeros(2), pts=a)
    return str(path / "p.npz"), {"key": "pts"}


def _write_zarr3(path: Path, a: np.ndarray) -> tuple[str, dict]:
    g = zarr.open_group(str(path / "p.zarr"), mode="w", zarr_format=3)
    g.create_array("sub/pts", shape=a.shape, chunks=(CHUNK, M), dtype=a.dtype)[...] = a
    g.create_array("labels", shape=(N,), chunks=(CHUNK,), dtype="i4")
    return str(path / "p.zarr"), {"key": "sub/pts"}


def _write_zarr2(path: Path, a: np.ndarray) -> tuple[str, dict]:
    z = zarr.open_array(str(path / "p2.zarr"), mode="w", shape=a.shape, chunks=(CHUNK, M),
                        dtype=a.dtype, zarr_format=2)
    z[...] = a
    return str(path / "p2.zarr"), {}


def _write_hdf5(path: Path, a: np.ndarray) -> tuple[str, dict]:
    with h5py.File(path / "p.h5", "w") as f:
        f.create_dataset("grp/pts", data=a, chunks=(CHUNK, M))
        f.create_dataset("labels", data=np.arange(N))
    return str(path / "p.h5"), {"key": "grp/pts"}


def _write_parquet(path: Path, a: np.ndarray) -> tuple[str, dict]:
    table = pa.table({"id": pa.array(np.arange(N)), "name": pa.array([f"s{i}" for i in range(N)]),
                      "x": a[:, 0], "y": a[:, 1], "z": a[:, 2]})
    pq.write_table(table, path / "p.parquet", row_group_size=CHUNK)
    return str(path / "p.parquet"), {"columns": ["x", "y", "z"]}


def _write_csv(path: Path, a: np.ndarray) -> tuple[str, dict]:
    lines = ["# made for a test", "id,x,y,z"]
    for i, row in enumerate(a):
        lines.append(f"{i}," + ",".join(repr(float(v)) for v in row))
        if i == 15:
            lines.append("")  # blank lines are not rows
    (path / "p.csv").write_text("\n".join(lines) + "\n")
    return str(path / "p.csv"), {"index_col": "id"}


WRITERS: dict[str, Callable[[Path, np.ndarray], tuple[str, dict]]] = {
    "npy": _write_npy,
    "npz": _write_npz,
    "zarr3": _write_zarr3,
    "zarr2": _write_zarr2,
    "hdf5": _write_hdf5,
    "parquet": _write_parquet,
    "csv": _write_csv,
}
NATURAL_BLOCKS = {"zarr3": CHUNK, "zarr2": CHUNK, "hdf5": CHUNK, "parquet": CHUNK}


def _block_rows(fmt: str) -> int | None:
    # Formats with no chunks of their own default to 1<<20 rows; ask for 10 to get blocks.
    return None if fmt in NATURAL_BLOCKS else CHUNK


def _same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.fixture(params=sorted(WRITERS))
def fmt(request: pytest.FixtureRequest) -> str:
    return request.param


def _message(func: Callable[..., object], *args: object, **kwargs: object) -> str:
    """Call ``func`` expecting an InputError; return its message after checking it is one line."""
    with pytest.raises(InputError) as info:
        func(*args, **kwargs)
    message = str(info.value)
    assert "\n" not in message and "\r" not in message
    return message


def test_blocks_concatenate_to_read_points(tmp_path: Path, fmt: str) -> None:
    path, kw = WRITERS[fmt](tmp_path, _points())
    src = open_points(path, **kw)
    assert isinstance(src, PointSource)
    whole = read_points(path, **kw)
    assert (src.n_rows, src.dim) == whole.shape == (N, M)
    assert src.block_rows == NATURAL_BLOCKS.get(fmt, 1 << 20)
    assert src.random_access is (fmt != "csv")
    blocks = list(src.blocks(_block_rows(fmt)))
    assert [start for start, _ in blocks] == list(range(0, N, CHUNK))
    for _, block in blocks:
        assert block.dtype == np.float64 and block.flags.c_contiguous
    assert _same_bits(np.concatenate([b for _, b in blocks]), whole)
    # Any other block size gives the same rows.
    assert _same_bits(np.concatenate([b for _, b in src.blocks(7)]), whole)


@pytest.mark.parametrize("start,stop", [(3, 27), (0, 1), (9, 11), (19, 41), (46, 47), (0, N), (5, 5)])
def test_read_unaligned_ranges(tmp_path: Path, fmt: str, start: int, stop: int) -> None:
    path, kw = WRITERS[fmt](tmp_path, _points())
    got = open_points(path, **kw).read(start, stop)
    assert got.shape == (stop - start, M) and got.flags.c_contiguous
    assert _same_bits(got, read_points(path, **kw)[start:stop])


def test_read_refuses_ranges_outside(tmp_path: Path) -> None:
    path, kw = _write_npy(tmp_path, _points())
    src = open_points(path, **kw)
    for start, stop in [(-1, 3), (5, 4), (0, N + 1)]:
        with pytest.raises(ValueError, match=r"not within \[0, 47\]"):
            src.read(start, stop)
    with pytest.raises(ValueError, match="rows per block"):
        next(src.blocks(0))


@pytest.mark.parametrize("bad", [np.nan, -np.inf, 1e200])
def test_first_bad_row_is_named_like_read_points(tmp_path: Path, fmt: str, bad: float) -> None:
    a = _points()
    a[34, 2] = 5.0  # a later row stays good: the first bad one is named
    a[25, 1] = bad
    a[31, 0] = bad
    path, kw = WRITERS[fmt](tmp_path, a)
    expected = _message(read_points, path, **kw)
    assert "row 25, column 1" in expected
    src = open_points(path, **kw)
    blocks = src.blocks(_block_rows(fmt))
    assert next(blocks)[0] == 0 and next(blocks)[0] == CHUNK  # the first two blocks are good
    assert _message(next, blocks) == expected
    assert _message(src.read, 22, 40) == expected
    assert _same_bits(src.read(26, 31), a[26:31])  # ranges without the bad rows still read


def test_integers_beyond_2_53_are_named_by_global_row(tmp_path: Path) -> None:
    a = np.arange(N * M, dtype=np.int64).reshape(N, M)
    a[23, 2] = 2**53 + 1
    for writer in (_write_npy, _write_zarr2, _write_hdf5):
        path, kw = writer(tmp_path, a)
        expected = _message(read_points, path, **kw)
        assert "row 23, column 2" in expected
        assert _message(list, open_points(path, **kw).blocks(CHUNK)) == expected
        assert _same_bits(open_points(path, **kw).read(0, 20), a[:20].astype(np.float64))


def test_parquet_null_and_wide_integers_are_named_by_global_row(tmp_path: Path) -> None:
    x = pa.array([float(i) for i in range(N)], mask=np.arange(N) == 27)
    y = pa.array(np.where(np.arange(N) == 33, 2**60, np.arange(N)).astype(np.int64))
    pq.write_table(pa.table({"x": x, "y": y}), tmp_path / "n.parquet", row_group_size=CHUNK)
    path = str(tmp_path / "n.parquet")
    expected = _message(read_points, path)
    assert "row 27, column 0 ('x') is null" in expected
    assert _message(list, open_points(path).blocks()) == expected
    expected_y = _message(read_points, path, columns="y")
    assert "row 33, column 0 ('y')" in expected_y
    assert _message(open_points(path, columns="y").read, 30, 40) == expected_y


def test_text_faults_in_later_blocks_are_named_like_read_points(tmp_path: Path) -> None:
    rows = [",".join(str(i * M + j) for j in range(M)) for i in range(N)]
    for bad, line in [("word", "1,oops,3"), ("ragged", "1,2,3,4"), ("short", "1,2")]:
        lines = rows.copy()
        lines[28] = line
        path = tmp_path / f"{bad}.csv"
        path.write_text("\n".join(lines) + "\n")
        expected = _message(read_points, path)
        assert "row 28 (line 29)" in expected
        src = open_points(path)
        blocks = src.blocks(CHUNK)
        assert [next(blocks)[0], next(blocks)[0]] == [0, CHUNK]
        assert _message(next, blocks) == expected


def test_text_rows_of_another_width_from_one_block_on(tmp_path: Path) -> None:
    # Every block parses on its own; only the width of the first rows tells the fault.
    lines = ["1,2,3"] * 20 + ["1,2,3,4"] * 20
    (tmp_path / "w.csv").write_text("\n".join(lines) + "\n")
    path = tmp_path / "w.csv"
    expected = _message(read_points, path)
    assert "row 20 (line 21) has 4 columns, the rows before it have 3" in expected
    assert _message(list, open_points(path).blocks(CHUNK)) == expected


def test_open_refuses_what_read_points_refuses(tmp_path: Path) -> None:
    a = _points()
    zpath, _ = _write_zarr3(tmp_path, a)
    hpath, _ = _write_hdf5(tmp_path, a)
    qpath, _ = _write_parquet(tmp_path, a)
    cpath, _ = _write_csv(tmp_path, a)
    np.save(tmp_path / "one.npy", np.arange(4.0))
    cases = [
        (str(tmp_path / "none.npy"), {}),
        (str(tmp_path / "one.npy"), {}),
        (zpath, {}),
        (zpath, {"key": "labels"}),
        (hpath, {"key": "nothing"}),
        (qpath, {"columns": ["x", "w"]}),
        (qpath, {"key": "x", "columns": ["y"]}),
        (cpath, {"columns": ["x", "y", "q"]}),
        (hpath, {"columns": ["x"]}),
    ]
    for path, kw in cases:
        assert _message(open_points, path, **kw) == _message(read_points, path, **kw)


def test_pickle_round_trip_reads_the_same(tmp_path: Path, fmt: str) -> None:
    path, kw = WRITERS[fmt](tmp_path, _points())
    src = open_points(path, **kw)
    before = src.read(3, 29)  # a handle is open now; it must not travel
    data = pickle.dumps(src)
    assert len(data) < 4096  # metadata only: no data, no open file
    copy = pickle.loads(data)
    assert (copy.name, copy.n_rows, copy.dim, copy.block_rows) == (src.name, src.n_rows, src.dim, src.block_rows)
    assert _same_bits(copy.read(3, 29), before)
    assert _same_bits(np.concatenate([b for _, b in copy.blocks(_block_rows(fmt))]), read_points(path, **kw))
    assert copy.token() == src.token()


def _touch_all(path: Path) -> None:
    # Rewrites within one clock tick may keep a stamp; move every stamp on to be sure.
    items = [path] if path.is_file() else [path, *path.rglob("*")]
    for item in items:
        st = item.stat()
        os.utime(item, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))


def test_token_changes_when_the_file_changes(tmp_path: Path, fmt: str) -> None:
    path, kw = WRITERS[fmt](tmp_path, _points())
    token = open_points(path, **kw).token()
    assert open_points(path, **kw).token() == token  # stable while nothing changes
    WRITERS[fmt](tmp_path, _points(seed=4))  # same shape, other values
    _touch_all(Path(path))
    assert open_points(path, **kw).token() != token


def test_zarr_token_follows_an_array_rewritten_in_place(tmp_path: Path) -> None:
    path, kw = _write_zarr3(tmp_path, _points())
    token = open_points(path, **kw).token()
    _write_zarr3(tmp_path, _points()[:40])
    assert open_points(path, **kw).token() != token  # the shape alone changes it


def test_memory_urls_and_storage_options(tmp_path: Path) -> None:
    a = _points()
    with fsspec.open("memory://lazy-test/p.npy", "wb") as f:
        np.save(f, a)
    src = open_points("memory://lazy-test/p.npy", storage_options={})
    assert _same_bits(src.read(4, 44), a[4:44])
    assert _same_bits(pickle.loads(pickle.dumps(src)).read(0, N), a)
    path, _ = _write_zarr2(tmp_path, a)
    url = "file://" + path
    assert _same_bits(np.concatenate([b for _, b in open_points(url, storage_options={"auto_mkdir": False}).blocks()]), a)


def test_array_source_matches_validate_points() -> None:
    a = _points()
    src = ArraySource.of(a, block_rows=CHUNK)
    assert isinstance(src, PointSource) and src.block_rows == CHUNK
    got = np.concatenate([b for _, b in src.blocks()])
    assert _same_bits(got, validate_points(a))
    block = src.read(0, 5)
    block[0, 0] = 99.0  # blocks are private copies
    assert a[0, 0] != 99.0
    copy = pickle.loads(pickle.dumps(src))
    assert _same_bits(copy.read(7, 33), a[7:33]) and copy.token() == src.token()
    b = a.copy()
    b[46, 2] += 1.0
    assert ArraySource.of(b, block_rows=CHUNK).token() != src.token()
    b[21, 0] = np.nan
    bad = ArraySource.of(b, block_rows=CHUNK)
    assert _message(list, bad.blocks()) == _message(validate_points, b)
    assert _message(ArraySource.of, np.zeros(3)) == _message(validate_points, np.zeros(3))


def _peak_while_iterating(src: PointSource) -> tuple[int, int]:
    total_rows = 0
    tracemalloc.start()
    try:
        for _, block in src.blocks():
            total_rows += block.shape[0]
            del block
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return peak, total_rows


# A memory-mapped npy block costs its own copy only; a Zarr read holds the compressed
# chunk, the decoded chunk and the output at once, plus the codec's working buffers.
@pytest.mark.parametrize("kind,block_rows,max_blocks", [("npy", 1 << 20, 2), ("zarr", 1 << 18, 6)])
def test_iterating_a_large_file_keeps_only_a_few_blocks(
    tmp_path: Path, kind: str, block_rows: int, max_blocks: int
) -> None:
    rows = 1 << 23  # 8 Mi points in R^3: 201 MB of float64, 8 or 32 blocks
    a = np.random.default_rng(0).standard_normal((rows, M))
    if kind == "npy":
        path = str(tmp_path / "big.npy")
        np.save(path, a)
    else:
        path = str(tmp_path / "big.zarr")
        zarr.open_array(path, mode="w", shape=a.shape, chunks=(block_rows, M), dtype=a.dtype)[...] = a
    del a
    src = open_points(path)
    assert src.block_rows == block_rows
    peak, total_rows = _peak_while_iterating(src)
    block_bytes = block_rows * M * 8
    assert total_rows == rows
    assert peak < max_blocks * block_bytes, (
        f"peak {peak / 2**20:.1f} MiB for blocks of {block_bytes / 2**20:.1f} MiB"
    )
