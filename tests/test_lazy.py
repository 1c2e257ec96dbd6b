"""Tests for chitally.lazy: every format read in blocks equals read_points bit for bit,
bad values are named by their row in the whole input, sources survive pickling, and a
block costs memory in proportion to the block, not to the input."""

from __future__ import annotations

import gc
import gzip
import io
import os
import pickle
import shutil
import subprocess
import sys
import tracemalloc
import uuid
import zipfile
from collections.abc import Callable, Iterator
from pathlib import Path

import fsspec
import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from chitally.lazy import (
    DEFAULT_BLOCK_ROWS,
    ArraySource,
    PointSource,
    content_digest,
    open_points,
)
from chitally.sources import InputError, read_points

N = 1000
DATA = np.random.default_rng(11).standard_normal((N, 3))
INTS = np.random.default_rng(12).integers(-(2**53), 2**53, size=(N, 3), endpoint=True)
RANGES = [(0, 1), (63, 65), (100, 357), (511, 1000), (999, 1000), (5, 5), (0, 1000)]


def refused(func: Callable[..., object], *args: object, **kwargs: object) -> str:
    """Call ``func`` expecting an InputError; return its one-line message."""
    with pytest.raises(InputError) as info:
        func(*args, **kwargs)
    message = str(info.value)
    assert message and "\n" not in message
    return message


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    """Equal shape and identical float64 bit patterns (so -0.0 differs from 0.0)."""
    a, b = np.asarray(a), np.asarray(b)
    return a.shape == b.shape and a.dtype == b.dtype == np.float64 and a.tobytes() == b.tobytes()


def concatenated(source: PointSource, rows: int | None = None) -> np.ndarray:
    parts, expected_start = [], 0
    for start, block in source.blocks(rows):
        assert start == expected_start
        assert block.dtype == np.float64 and block.flags.c_contiguous and block.shape[1] == source.dim
        expected_start += len(block)
        parts.append(block)
    assert expected_start == source.n_rows
    return np.concatenate(parts)


@pytest.fixture
def memory_dir() -> Iterator[str]:
    root = f"memory://chitally-lazy-{uuid.uuid4().hex}"
    yield root
    fs = fsspec.filesystem("memory")
    path = root[len("memory://") :]
    if fs.exists(path):
        fs.rm(path, recursive=True)


# --------------------------------------------------------------------------- writers
# Each stores `data` (n, 3) its own way and returns the read_points arguments for it.


def w_npy(tmp: Path, data: np.ndarray) -> dict:
    np.save(tmp / "p.npy", data)
    return {"source": str(tmp / "p.npy")}


def w_npy_fortran_float32(tmp: Path, data: np.ndarray) -> dict:
    np.save(tmp / "p.npy", np.asfortranarray(data.astype(np.float32)))
    return {"source": str(tmp / "p.npy")}


def w_npy_big_endian(tmp: Path, data: np.ndarray) -> dict:
    np.save(tmp / "p.npy", data.astype(">f8"))
    return {"source": str(tmp / "p.npy")}


def w_npz_stored(tmp: Path, data: np.ndarray) -> dict:
    np.savez(tmp / "p.npz", other=np.zeros((2, 2)), pts=data)
    return {"source": str(tmp / "p.npz"), "key": "pts"}


def w_npz_compressed(tmp: Path, data: np.ndarray) -> dict:
    np.savez_compressed(tmp / "p.npz", pts=data)
    return {"source": str(tmp / "p.npz")}


def w_csv(tmp: Path, data: np.ndarray) -> dict:
    np.savetxt(tmp / "p.csv", data, delimiter=",", fmt="%.17g")
    return {"source": str(tmp / "p.csv")}


def w_csv_pandas_columns(tmp: Path, data: np.ndarray) -> dict:
    # A row index in an unnamed first column, a text column, comments and blank lines.
    lines = [",x,label,y,z"]
    for i, row in enumerate(data):
        lines.append(f"{i},{float(row[0])!r},p{i},{float(row[1])!r},{float(row[2])!r}")
        if i % 97 == 0:
            lines.append("# a comment")
            lines.append("")
    (tmp / "p.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return {"source": str(tmp / "p.csv"), "columns": "x,y,z"}


def w_tsv_index_col(tmp: Path, data: np.ndarray) -> dict:
    lines = ["\tx\ty\tz"] + [f"{i}\t" + "\t".join(repr(float(v)) for v in row) for i, row in enumerate(data)]
    (tmp / "p.tsv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return {"source": str(tmp / "p.tsv"), "index_col": 0}


def w_txt_gz(tmp: Path, data: np.ndarray) -> dict:
    with gzip.open(tmp / "p.txt.gz", "wt") as f:
        np.savetxt(f, data, delimiter="  ", fmt="%.17g", header="spaces")
    return {"source": str(tmp / "p.txt.gz")}


def w_zarr_v3(tmp: Path, data: np.ndarray) -> dict:
    zarr.create_array(str(tmp / "p.zarr"), data=data, chunks=(64, 2))
    return {"source": str(tmp / "p.zarr")}


def w_zarr_v3_sharded(tmp: Path, data: np.ndarray) -> dict:
    group = zarr.open_group(str(tmp / "g.zarr"), mode="w")
    group.create_array("a/pts", data=data, chunks=(32, 3), shards=(128, 3))
    group.create_array("mass", data=np.ones(len(data)))
    return {"source": str(tmp / "g.zarr"), "key": "a/pts"}


def w_zarr_v2(tmp: Path, data: np.ndarray) -> dict:
    zarr.create_array(str(tmp / "p.zarr"), data=data, chunks=(100, 3), zarr_format=2)
    return {"source": str(tmp / "p.zarr")}


def w_hdf5_chunked(tmp: Path, data: np.ndarray) -> dict:
    with h5py.File(tmp / "p.h5", "w") as h5:
        h5.create_dataset("snap/pos", data=data, chunks=(50, 3), compression="gzip")
        h5.create_dataset("snap/vel", data=np.zeros_like(data))
    return {"source": str(tmp / "p.h5"), "key": "snap/pos"}


def w_hdf5_contiguous(tmp: Path, data: np.ndarray) -> dict:
    with h5py.File(tmp / "p.hdf5", "w") as h5:
        h5.create_dataset("pos", data=data)
    return {"source": str(tmp / "p.hdf5")}


def w_parquet(tmp: Path, data: np.ndarray) -> dict:
    columns = {"name": [f"p{i}" for i in range(len(data))]} | {f"c{j}": data[:, j] for j in range(3)}
    pq.write_table(pa.table(columns), tmp / "p.parquet", row_group_size=150)
    return {"source": str(tmp / "p.parquet")}


def w_parquet_columns(tmp: Path, data: np.ndarray) -> dict:
    columns = {"w": np.ones(len(data))} | {f"c{j}": data[:, j] for j in (2, 0, 1)}
    pq.write_table(pa.table(columns), tmp / "p.pq", row_group_size=333)
    return {"source": str(tmp / "p.pq"), "columns": ["c0", 3, "c2"]}


LOCAL = {
    f.__name__[2:]: f
    for f in (
        w_npy, w_npy_fortran_float32, w_npy_big_endian, w_npz_stored, w_npz_compressed,
        w_csv, w_csv_pandas_columns, w_tsv_index_col, w_txt_gz, w_zarr_v3, w_zarr_v3_sharded,
        w_zarr_v2, w_hdf5_chunked, w_hdf5_contiguous, w_parquet, w_parquet_columns,
    )
}
# Formats that hold integers (text holds their decimal digits, also exact).
INTEGER_WRITERS = [w_npy, w_npz_stored, w_zarr_v3, w_hdf5_chunked, w_parquet, w_csv]


def expected(writer: Callable[..., dict], data: np.ndarray) -> np.ndarray:
    if writer is w_npy_fortran_float32:
        return data.astype(np.float32).astype(np.float64)
    return data.astype(np.float64)


def as_url(tmp: Path, memory_dir: str, args: dict) -> dict:
    """The same input copied into fsspec's memory filesystem, read by URL."""
    local = Path(args["source"])
    target = f"{memory_dir}/{local.name}"
    fs = fsspec.filesystem("memory")
    if local.is_dir():
        fs.put(str(local), target[len("memory://") :], recursive=True)
    else:
        fs.pipe(target[len("memory://") :], local.read_bytes())
    return {**args, "source": target}


# --------------------------------------------------------------------------- equality


class TestBlocksEqualReadPoints:
    @pytest.mark.parametrize("writer", LOCAL.values(), ids=LOCAL.keys())
    def test_local(self, tmp_path: Path, writer: Callable[..., dict]) -> None:
        args = writer(tmp_path, DATA)
        whole = read_points(**args)
        assert same_bits(whole, expected(writer, DATA))
        source = open_points(**args)
        assert isinstance(source, PointSource)
        assert (source.n_rows, source.dim) == (N, 3)
        assert same_bits(concatenated(source), whole)
        assert same_bits(concatenated(source, rows=37), whole)
        assert same_bits(concatenated(source, rows=N + 5), whole)
        assert same_bits(source.read_all(), whole)

    @pytest.mark.parametrize(
        "writer",
        [w_npy, w_npy_fortran_float32, w_npz_stored, w_npz_compressed, w_csv, w_zarr_v3_sharded,
         w_zarr_v2, w_hdf5_chunked, w_parquet_columns],
        ids=lambda f: f.__name__[2:],
    )
    def test_memory_url(self, tmp_path: Path, memory_dir: str, writer: Callable[..., dict]) -> None:
        args = as_url(tmp_path, memory_dir, writer(tmp_path, DATA))
        whole = read_points(**args)
        assert same_bits(whole, expected(writer, DATA))
        source = open_points(**args)
        assert same_bits(concatenated(source, rows=129), whole)
        for start, stop in RANGES:
            assert same_bits(source.read(start, stop), whole[start:stop])

    def test_chained_url_into_a_zip(self, memory_dir: str) -> None:
        inner = io.BytesIO()
        np.save(inner, np.asfortranarray(DATA))
        archive = io.BytesIO()
        with zipfile.ZipFile(archive, "w") as z:
            z.writestr("inner.npy", inner.getvalue())
        fsspec.filesystem("memory").pipe(f"{memory_dir}/a.zip"[len("memory://") :], archive.getvalue())
        url = f"zip://inner.npy::{memory_dir}/a.zip"
        source = open_points(url)
        assert same_bits(source.read(17, 333), DATA[17:333])
        assert same_bits(concatenated(pickle.loads(pickle.dumps(source)), rows=300), read_points(url))

    @pytest.mark.parametrize("writer", INTEGER_WRITERS, ids=lambda f: f.__name__[2:])
    def test_integers_up_to_2_53_exact(self, tmp_path: Path, writer: Callable[..., dict]) -> None:
        args = writer(tmp_path, INTS)
        source = open_points(**args)
        got = concatenated(source, rows=100)
        # float64 holds every integer of magnitude <= 2**53 exactly (IEEE 754: 53-bit significand).
        assert got.tolist() == INTS.astype(float).tolist()
        assert np.array_equal(got.astype(np.int64), INTS)
        assert same_bits(got, read_points(**args))

    def test_read_points_keeps_the_local_npy_mapped(self, tmp_path: Path) -> None:
        args = w_npy(tmp_path, DATA)
        assert not read_points(**args).flags.writeable  # read_all, as before: no copy
        block = open_points(**args).read(3, 9)
        assert block.flags.writeable and block.flags.owndata  # read: a private copy


class TestRanges:
    @pytest.mark.parametrize("writer", LOCAL.values(), ids=LOCAL.keys())
    def test_unaligned_ranges(self, tmp_path: Path, writer: Callable[..., dict]) -> None:
        args = writer(tmp_path, DATA)
        source = open_points(**args)
        want = expected(writer, DATA)
        for start, stop in RANGES:
            got = source.read(start, stop)
            assert got.shape == (stop - start, 3)
            assert got.flags.c_contiguous and got.flags.writeable
            assert same_bits(got, want[start:stop]), (start, stop)

    def test_range_and_block_arguments_checked(self, tmp_path: Path) -> None:
        source = open_points(**w_npy(tmp_path, DATA))
        with pytest.raises(ValueError, match=r"rows \[5, 1001\) are not within \[0, 1000\]"):
            source.read(5, 1001)
        with pytest.raises(ValueError, match=r"rows \[7, 6\)"):
            source.read(7, 6)
        with pytest.raises(TypeError):
            source.read(0.0, 3)
        with pytest.raises(ValueError, match="rows per block must be an integer >= 1, got 0"):
            next(source.blocks(0))

    def test_natural_block_sizes(self, tmp_path: Path) -> None:
        (tmp_path / "a").mkdir()
        (tmp_path / "b").mkdir()
        (tmp_path / "c").mkdir()
        assert open_points(**w_zarr_v3(tmp_path, DATA)).block_rows == 64
        assert open_points(**w_zarr_v3_sharded(tmp_path, DATA)).block_rows == 128
        assert open_points(**w_zarr_v2(tmp_path / "a", DATA)).block_rows == 100
        assert open_points(**w_hdf5_chunked(tmp_path, DATA)).block_rows == 50
        assert open_points(**w_hdf5_contiguous(tmp_path, DATA)).block_rows == DEFAULT_BLOCK_ROWS
        assert open_points(**w_npy(tmp_path, DATA)).block_rows == DEFAULT_BLOCK_ROWS
        parquet = open_points(**w_parquet(tmp_path / "b", DATA))
        assert parquet.block_rows == 150
        # Row groups of 150 rows: 6 full ones and the rest.
        assert [(s, len(b)) for s, b in parquet.blocks()] == [(i * 150, 150) for i in range(6)] + [(900, 100)]
        text = open_points(**w_csv(tmp_path / "c", DATA))
        assert (text.block_rows, text.random_access) == (DEFAULT_BLOCK_ROWS, False)
        assert open_points(**w_zarr_v3(tmp_path / "c", DATA)).random_access

    def test_npz_says_whether_it_is_read_lazily(self, tmp_path: Path) -> None:
        (tmp_path / "a").mkdir()
        assert open_points(**w_npz_stored(tmp_path, DATA)).stored
        assert not open_points(**w_npz_compressed(tmp_path / "a", DATA)).stored


# --------------------------------------------------------------------------- bad values

BIG = 200_000
BAD_ROW = 123_456  # in block 3 of 2**15-row blocks: 98304 <= 123456 < 131072
BLOCK = 1 << 15


def big_with_nan() -> np.ndarray:
    data = np.arange(BIG * 2, dtype=np.float64).reshape(BIG, 2)
    data[BAD_ROW, 1] = np.nan
    return data


def first_failure(source: PointSource, rows: int | None = None) -> tuple[list[int], str]:
    """Starts of the blocks read before the first refusal, and the refusal's message."""
    starts: list[int] = []
    with pytest.raises(InputError) as info:
        for start, _ in source.blocks(rows):
            starts.append(start)
    message = str(info.value)
    assert "\n" not in message
    return starts, message


class TestBadValues:
    @pytest.mark.parametrize("fmt", ["npy", "zarr", "hdf5", "npz", "csv"])
    def test_nan_named_by_its_global_row(self, tmp_path: Path, fmt: str) -> None:
        data = big_with_nan()
        if fmt == "npy":
            source = str(tmp_path / "p.npy")
            np.save(source, data)
        elif fmt == "zarr":
            source = str(tmp_path / "p.zarr")
            zarr.create_array(source, data=data, chunks=(BLOCK, 2))
        elif fmt == "hdf5":
            source = str(tmp_path / "p.h5")
            with h5py.File(source, "w") as h5:
                h5.create_dataset("x", data=data, chunks=(BLOCK, 2))
        elif fmt == "npz":
            source = str(tmp_path / "p.npz")
            np.savez(source, data)
        else:
            source = str(tmp_path / "p.csv")
            np.savetxt(source, data, delimiter=",", fmt="%.17g")
        lazy = open_points(source)
        starts, message = first_failure(lazy, BLOCK)
        assert starts == [0, BLOCK, 2 * BLOCK]  # blocks 0-2 were good; block 3 was refused
        name = {"hdf5": f"{source}['x']", "npz": f"{source}['arr_0']"}.get(fmt, source)
        assert message == f"{name}: row {BAD_ROW}, column 1 is nan; every coordinate must be finite"
        assert refused(read_points, source) == message
        assert refused(lazy.read, BAD_ROW - 3, BAD_ROW + 1) == message
        assert lazy.read(BAD_ROW + 1, BAD_ROW + 9).shape == (8, 2)

    def test_text_cell_named_by_global_row_and_line(self, tmp_path: Path) -> None:
        lines = ["x,y"] + [f"{i},{i + 0.5}" for i in range(BIG)]
        lines[1 + BAD_ROW] = f"{BAD_ROW},oops"
        source = write(tmp_path / "p.csv", "\n".join(lines) + "\n")
        starts, message = first_failure(open_points(source), BLOCK)
        assert starts == [0, BLOCK, 2 * BLOCK]
        # Line numbers are 1-based and count the header line.
        assert message == f"{source}: row {BAD_ROW} (line {BAD_ROW + 2}), column 1: 'oops' is not a number"
        assert refused(read_points, source) == message

    def test_text_ragged_row_in_a_later_block(self, tmp_path: Path) -> None:
        lines = [f"{i},{i}" for i in range(100)]
        lines[70] = "70,70,70"
        source = write(tmp_path / "p.csv", "\n".join(lines) + "\n")
        _, message = first_failure(open_points(source), 32)
        assert message == f"{source}: row 70 (line 71) has 3 columns, the rows before it have 2"
        assert refused(read_points, source) == message

    def test_parquet_null_in_a_later_row_group(self, tmp_path: Path) -> None:
        y = pa.array([float(i) if i != 777 else None for i in range(N)])
        pq.write_table(pa.table({"x": DATA[:, 0], "y": y}), tmp_path / "p.parquet", row_group_size=100)
        source = str(tmp_path / "p.parquet")
        starts, message = first_failure(open_points(source))
        assert starts == list(range(0, 700, 100))
        assert message == f"{source}: row 777, column 1 ('y') is null"
        assert refused(read_points, source) == message

    def test_integer_beyond_2_53_and_huge_coordinate(self, tmp_path: Path) -> None:
        ints = np.zeros((N, 2), dtype=np.int64)
        ints[901, 0] = 2**53 + 1
        with h5py.File(tmp_path / "p.h5", "w") as h5:
            h5.create_dataset("i", data=ints, chunks=(100, 2))
        source = str(tmp_path / "p.h5")
        _, message = first_failure(open_points(source))
        assert message == (
            f"{source}['i']: row 901, column 0 holds the integer 9007199254740993, beyond 2**53 "
            f"in magnitude, which float64 cannot hold exactly"
        )
        assert refused(read_points, source) == message
        floats = DATA.copy()
        floats[444, 2] = 1e200
        zarr.create_array(str(tmp_path / "f.zarr"), data=floats, chunks=(64, 3))
        _, message = first_failure(open_points(str(tmp_path / "f.zarr")))
        assert message.startswith(f"{tmp_path / 'f.zarr'}: row 444, column 2 is 1e+200; coordinates must lie")
        assert refused(read_points, str(tmp_path / "f.zarr")) == message

    def test_array_source_validated_per_block(self) -> None:
        data = DATA.copy()
        data[600, 1] = -np.inf
        source = ArraySource(data, block_rows=256)
        assert same_bits(source.read(0, 512), data[:512])
        starts, message = first_failure(source)
        assert starts == [0, 256]
        assert message == "points: row 600, column 1 is -inf; every coordinate must be finite"
        assert "got shape (4,)" in refused(ArraySource, np.zeros(4))
        assert "got dtype bool" in refused(ArraySource, np.zeros((4, 2), dtype=bool), name="mask")

    def test_metadata_faults_refused_at_open_as_read_points_refuses_them(self, tmp_path: Path) -> None:
        np.savez(tmp_path / "p.npz", a=DATA, b=DATA)
        source = tmp_path / "p.npz"
        assert refused(open_points, source) == refused(read_points, source) == (
            f"{source}: holds 2 arrays ('a', 'b'); choose one with key"
        )
        np.save(tmp_path / "line.npy", np.arange(4.0))
        assert refused(open_points, tmp_path / "line.npy") == refused(read_points, tmp_path / "line.npy")
        (tmp_path / "p.csv").write_text("x,y\n", encoding="utf-8")
        assert refused(open_points, tmp_path / "p.csv") == f"{tmp_path / 'p.csv'}: holds no data rows"
        (tmp_path / "bad.npz").write_bytes(b"not a zip file")
        assert refused(open_points, tmp_path / "bad.npz").startswith(f"{tmp_path / 'bad.npz'}: cannot read as .npz")


def write(path: Path, text: str) -> str:
    path.write_text(text, encoding="utf-8")
    return str(path)


# --------------------------------------------------------------------------- pickling


class TestPickle:
    @pytest.mark.parametrize("writer", LOCAL.values(), ids=LOCAL.keys())
    def test_round_trip_after_use(self, tmp_path: Path, writer: Callable[..., dict]) -> None:
        source = open_points(**writer(tmp_path, DATA))
        first = source.read(10, 20)  # opens the file (or map) in this process
        payload = pickle.dumps(source)
        assert len(payload) < 4096  # metadata only: no data and no handle travel
        copy = pickle.loads(payload)
        assert copy == source
        assert same_bits(copy.read(10, 20), first)
        assert same_bits(concatenated(copy, rows=300), concatenated(source, rows=300))

    def test_memory_url_source_round_trip(self, tmp_path: Path, memory_dir: str) -> None:
        source = open_points(**as_url(tmp_path, memory_dir, w_npy(tmp_path, DATA)))
        copy = pickle.loads(pickle.dumps(source))
        assert same_bits(copy.read(250, 750), DATA[250:750])

    def test_storage_options_travel_with_the_source(self, tmp_path: Path, memory_dir: str) -> None:
        args = as_url(tmp_path, memory_dir, w_npz_stored(tmp_path, DATA))
        options = {"skip_instance_cache": True}  # accepted by every fsspec filesystem
        source = open_points(**args, storage_options=options)
        copy = pickle.loads(pickle.dumps(source))
        assert copy.src.options == options
        assert same_bits(copy.read(400, 600), DATA[400:600])

    def test_in_a_subprocess(self, tmp_path: Path) -> None:
        writers = [w_npy, w_npz_stored, w_zarr_v3, w_hdf5_chunked, w_parquet_columns, w_csv_pandas_columns]
        sources = []
        for i, writer in enumerate(writers):
            (tmp_path / str(i)).mkdir()
            source = open_points(**writer(tmp_path / str(i), DATA))
            source.read(0, 1)
            sources.append(source)
        (tmp_path / "sources.pickle").write_bytes(pickle.dumps(sources))
        script = (
            "import pickle, sys, numpy as np\n"
            "sources = pickle.load(open(sys.argv[1], 'rb'))\n"
            "np.save(sys.argv[2], np.stack([s.read(123, 789) for s in sources]))\n"
        )
        env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(__file__).parents[1] / "src"), *sys.path])}
        done = subprocess.run(
            [sys.executable, "-c", script, str(tmp_path / "sources.pickle"), str(tmp_path / "out.npy")],
            env=env, capture_output=True, text=True, timeout=120, check=False,
        )
        assert done.returncode == 0, done.stderr
        got = np.load(tmp_path / "out.npy")
        for i in range(len(writers)):
            assert same_bits(got[i], DATA[123:789])


# --------------------------------------------------------------------------- identity


def bump_mtime(path: Path) -> None:
    """Mark a file as written one second later, as a rewrite by another program would."""
    stat = path.stat()
    os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns + 1_000_000_000))


class TestToken:
    def test_npy_token_follows_the_file(self, tmp_path: Path) -> None:
        args = w_npy(tmp_path, DATA)
        token = open_points(**args).token()
        assert open_points(**args).token() == token  # stable while the file is untouched
        assert str(tmp_path / "p.npy") in token and "<f8" in token
        np.save(tmp_path / "p.npy", DATA[:-1])  # another size
        assert open_points(**args).token() != token
        np.save(tmp_path / "p.npy", DATA + 1)  # same size, later write
        bump_mtime(tmp_path / "p.npy")
        assert open_points(**args).token() != token

    def test_same_size_rewrite_changes_the_token(self, tmp_path: Path) -> None:
        args = w_csv(tmp_path, DATA)
        source = open_points(**args)
        token = source.token()
        bump_mtime(tmp_path / "p.csv")
        assert source.token() != token  # the same object sees the new stamp

    def test_zarr_token_follows_the_array(self, tmp_path: Path) -> None:
        args = w_zarr_v3_sharded(tmp_path, DATA)
        token = open_points(**args).token()
        assert open_points(**args).token() == token
        group = zarr.open_group(args["source"], mode="a")
        group.create_array("a/pts", data=DATA, chunks=(64, 3), overwrite=True)
        bump_mtime(Path(args["source"]) / "a" / "pts" / "zarr.json")
        assert open_points(**args).token() != token

    def test_selection_is_part_of_the_token(self, tmp_path: Path) -> None:
        args = w_parquet(tmp_path, DATA)
        assert open_points(**args).token() != open_points(**args, columns="c0,c1").token()
        args = w_hdf5_chunked(tmp_path, DATA)
        assert open_points(**args).token() != open_points(args["source"], key="snap/vel").token()

    def test_memory_url_token(self, tmp_path: Path, memory_dir: str) -> None:
        args = as_url(tmp_path, memory_dir, w_npy(tmp_path, DATA))
        token = open_points(**args).token()
        assert args["source"] in token
        with fsspec.open(args["source"], "wb") as f:
            np.save(f, DATA[:10])
        assert open_points(**args).token() != token

    def test_array_token_is_content(self) -> None:
        assert ArraySource(DATA).token() == ArraySource(DATA.copy(), block_rows=7).token()
        changed = DATA.copy()
        changed[999, 2] += 1
        assert ArraySource(changed).token() != ArraySource(DATA).token()


class TestContentDigest:
    def test_equal_across_formats(self, tmp_path: Path) -> None:
        digests = set()
        for i, writer in enumerate([w_npy, w_csv, w_zarr_v2, w_parquet_columns, w_hdf5_chunked, w_npz_compressed]):
            (tmp_path / str(i)).mkdir()
            digests.add(content_digest(open_points(**writer(tmp_path / str(i), DATA)), rows=77))
        digests.add(content_digest(ArraySource(DATA)))
        assert len(digests) == 1

    def test_integers_and_their_floats_agree(self, tmp_path: Path) -> None:
        ints = INTS // 2**20
        np.save(tmp_path / "i.npy", ints)
        assert content_digest(open_points(tmp_path / "i.npy")) == content_digest(ArraySource(ints.astype(float)))

    def test_differs_for_other_values_or_shape(self) -> None:
        base = content_digest(ArraySource(DATA))
        assert content_digest(ArraySource(DATA, block_rows=3), rows=10) == base
        changed = DATA.copy()
        changed[0, 0] = np.nextafter(changed[0, 0], np.inf)
        assert content_digest(ArraySource(changed)) != base
        assert content_digest(ArraySource(DATA.reshape(N * 3 // 2, 2))) != base
        assert content_digest(ArraySource(DATA[:-1])) != base


# --------------------------------------------------------------------------- memory


def peak_while_iterating(source: PointSource, rows: int) -> int:
    gc.collect()
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        total = 0.0
        for _, block in source.blocks(rows):
            total += float(block[-1, -1])
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert total != 0.0
    return peak


BIG_ROWS = 8_400_000  # 8.4e6 x 3 float64 = 201.6 MB
BIG_BLOCK = 1 << 18  # 6.3 MB blocks


@pytest.fixture(scope="module")
def big_inputs(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, str]]:
    root = tmp_path_factory.mktemp("big")
    data = np.random.default_rng(5).standard_normal((BIG_ROWS, 3))
    np.save(root / "p.npy", data)
    zarr.create_array(str(root / "p.zarr"), data=data, chunks=(BIG_BLOCK, 3), compressors=None)
    del data
    yield {"npy": str(root / "p.npy"), "zarr": str(root / "p.zarr")}
    shutil.rmtree(root)  # 400 MB: not left for pytest's retention of old temp folders


class TestMemory:
    @pytest.mark.parametrize("fmt", ["npy", "zarr"])
    def test_peak_is_a_few_blocks(self, big_inputs: dict[str, str], fmt: str) -> None:
        size = os.path.getsize(big_inputs["npy"])
        assert size > 200e6
        source = open_points(big_inputs[fmt])
        block_bytes = BIG_BLOCK * 3 * 8
        peak = peak_while_iterating(source, BIG_BLOCK)
        # The consumer's previous block, the format's read buffer(s) and the new block;
        # Zarr's I/O thread may free its buffer a little late, hence five and not three.
        assert peak < 5 * block_bytes, (peak, block_bytes)
        assert peak < size / 6
