"""Local store folders: plain-system-call keys and one-chunk arrays that zarr reads as its own.

The reference for every array here is zarr itself: what `StoreIO` writes without zarr
must read back through ``zarr.open_array`` unchanged, and what zarr writes with the
store's codecs must read back through the fast reader unchanged.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
import zarr

from chitally.store import CorruptTask, StoreIO
from chitally.store.commits import CommitLog
from chitally.store.io import _ARRAY_CONFIG, _compressors
from chitally.store.localfs import SMALL_ARRAY_BYTES, LocalKeys, chunk_key

ARRAYS = {
    "rows": np.arange(24, dtype=np.int64).reshape(3, 8) - 7,
    "one": np.array([3.25]),
    "empty": np.zeros((0, 4), dtype=np.int32),
    "flags": np.array([True, False, True]),
    "big_endian": np.arange(5, dtype=">f4") / 3,
    "bytes": np.arange(250, dtype=np.uint8),
}


def flip(path: str, at: int | str, mask: int) -> None:
    """Damage one byte of a file ("middle": its middle byte)."""
    raw = bytearray(Path(path).read_bytes())
    raw[len(raw) // 2 if at == "middle" else int(at)] ^= mask
    Path(path).write_bytes(bytes(raw))


@pytest.fixture
def io(tmp_path):
    return StoreIO(str(tmp_path / "s.zarr"))


@pytest.mark.parametrize("name", sorted(ARRAYS))
def test_small_arrays_read_back_through_zarr(io, name):
    data = ARRAYS[name]
    io.write_array(f"out/{name}", data, what="test write")
    assert io.local is not None
    back = np.asarray(zarr.open_array(io.zarr_store, path=f"out/{name}", mode="r")[...])
    assert back.dtype == data.dtype.newbyteorder("<") and back.shape == data.shape
    assert np.array_equal(back, data)
    mine = io.read_array(f"out/{name}")
    assert mine.dtype == back.dtype and np.array_equal(mine, data)


@pytest.mark.parametrize("name", ["rows", "one", "flags", "big_endian"])
def test_arrays_written_by_zarr_read_back_without_it(io, name):
    data = ARRAYS[name].astype(ARRAYS[name].dtype.newbyteorder("<"))
    chunks = tuple(max(s, 1) for s in data.shape)
    arr = zarr.create_array(io.zarr_store, name="z", shape=data.shape, dtype=data.dtype,
                            chunks=chunks, compressors=_compressors(), fill_value=0,
                            config=_ARRAY_CONFIG)
    arr[...] = data
    got = io.local.read_small("z")
    assert got is not None and got.dtype == data.dtype and np.array_equal(got, data)


def test_other_layouts_are_left_to_zarr(io):
    data = np.arange(40, dtype=np.int64).reshape(10, 4)
    arr = zarr.create_array(io.zarr_store, name="rowchunks", shape=data.shape, dtype=data.dtype,
                            chunks=(3, 4), compressors=_compressors(), fill_value=0,
                            config=_ARRAY_CONFIG)
    arr[...] = data
    assert io.local.read_small("rowchunks") is None
    assert np.array_equal(io.read_array("rowchunks"), data)


def test_large_arrays_still_go_through_zarr(io, monkeypatch):
    def refuse(path, data):
        raise AssertionError("a large array was written without zarr")

    monkeypatch.setattr(io.local, "write_small", refuse)
    big = np.arange(SMALL_ARRAY_BYTES // 8 + 1, dtype=np.int64)
    io.write_array("big", big, what="test write")
    assert np.array_equal(io.read_array("big"), big)
    small = np.arange(4, dtype=np.int64)
    with pytest.raises(Exception, match="without zarr"):
        io.write_array("small", small, what="test write")


def test_a_new_shape_replaces_the_stale_array_whole(io):
    data = np.arange(40, dtype=np.int64).reshape(10, 4)
    arr = zarr.create_array(io.zarr_store, name="a", shape=data.shape, dtype=data.dtype,
                            chunks=(3, 4), compressors=_compressors(), fill_value=0,
                            config=_ARRAY_CONFIG)
    arr[...] = data
    new = np.array([[5, 6]], dtype=np.int64)
    io.write_array("a", new, what="test write")
    root = io.local.path("a")
    files = sorted(os.path.relpath(os.path.join(d, f), root) for d, _, fs in os.walk(root) for f in fs)
    assert files == ["c/0/0", "zarr.json"]
    assert np.array_equal(np.asarray(zarr.open_array(io.zarr_store, path="a", mode="r")[...]), new)


def test_damaged_or_missing_chunks_are_corrupt(io):
    io.write_array("a", ARRAYS["rows"], what="test write")
    chunk = io.local.path(f"a/{chunk_key(2)}")
    flip(chunk, "middle", 0xFF)
    with pytest.raises(CorruptTask, match="checksum"):
        io.read_array("a")
    with pytest.raises(Exception, match="[Cc]hecksum"):  # zarr's own crc32c check agrees
        zarr.open_array(io.zarr_store, path="a", mode="r")[...]
    os.unlink(chunk)
    with pytest.raises(CorruptTask, match="chunk is missing"):
        io.read_array("a")
    os.unlink(io.local.path("a/zarr.json"))
    with pytest.raises(CorruptTask, match="missing"):
        io.read_array("a")


def test_unreadable_metadata_is_corrupt(io):
    io.write_array("a", ARRAYS["rows"], what="test write")
    Path(io.local.path("a/zarr.json")).write_bytes(b"{not json")
    with pytest.raises(CorruptTask, match="unreadable"):
        io.read_array("a")


def test_create_only_keeps_the_first_writer(tmp_path):
    keys = LocalKeys(str(tmp_path / "k"))
    keys.set_if_not_exists("commits/task-000001.json", b"first")
    keys.set_if_not_exists("commits/task-000001.json", b"second")
    assert keys.get("commits/task-000001.json") == b"first"
    assert os.listdir(tmp_path / "k" / "commits") == ["task-000001.json"]  # no temporary left
    keys.set("commits/task-000001.json", b"third")
    assert keys.get("commits/task-000001.json") == b"third"
    assert keys.get("commits") is None and keys.get("absent/x") is None
    assert keys.exists("commits/task-000001.json") and not keys.exists("commits")


def test_commit_log_sets_damaged_local_outputs_aside(tmp_path):
    io = StoreIO(str(tmp_path / "s.zarr"))
    log = CommitLog(io, 2, [("rows", "<i8"), ("total", "<f8")])
    rows = np.arange(16, dtype=np.int64).reshape(2, 8)
    digest = log.commit(0, "a-0-0", {"rows": rows, "total": np.array([1.5])}, info={"seconds": 0.0})
    rec = log.verified_record(0)
    assert rec is not None and rec["digest"] == digest
    got = log.read(0)
    assert np.array_equal(got["rows"], rows) and got["total"].tolist() == [1.5]
    # damage the data: the record no longer proves it
    chunk = io.local.path(f"{CommitLog.output_prefix(0)}/rows/{chunk_key(2)}")
    flip(chunk, 0, 0x01)
    assert log.verified_record(0) is None
    with pytest.raises(CorruptTask):
        log.read(0)
    # committing again (same outputs) repairs the data under the existing record
    assert log.commit(0, "a-0-1", {"rows": rows, "total": np.array([1.5])}) == digest
    assert log.verified_record(0)["attempt"] == "a-0-0"
    doc = json.loads(Path(io.local.path(f"{CommitLog.output_prefix(0)}/rows/zarr.json")).read_text())
    assert doc["shape"] == [2, 8] and doc["node_type"] == "array"


@pytest.mark.parametrize("shape,chunk", [((10, 3), 4), ((7,), 3), ((9,), 9), ((5, 2), 8)])
def test_row_reads_of_chunked_arrays_match_zarr(io, shape, chunk):
    data = (np.arange(int(np.prod(shape)), dtype=np.float64) * 1.5 - 4).reshape(shape)
    arr = io.create_chunked("inp", shape, "<f8", (chunk, *shape[1:]), what="create")
    arr[...] = data
    ref = zarr.open_array(io.zarr_store, path="inp", mode="r")
    for sel in [Ellipsis, slice(0, 1), slice(2, 6), slice(3, None), slice(None, -2), slice(4, 4),
                slice(0, 100)]:
        got = io.static_rows("inp", sel)
        want = np.asarray(ref[sel])
        assert got.dtype == want.dtype and got.shape == want.shape and np.array_equal(got, want)
        again = io.static_rows("inp", sel)  # from the cache: the same rows
        assert np.array_equal(again, want)
    assert io.static_rows("inp", np.array([1, 2])) is None  # left to zarr
    assert io.static_rows("inp", slice(0, 4, 2)) is None


def test_row_reads_check_every_chunk(io):
    data = np.arange(12, dtype=np.int64)
    arr = io.create_chunked("inp", (12,), "<i8", (5,), what="create")
    arr[...] = data
    chunk = io.local.path("inp/c/1")
    flip(chunk, 3, 0x10)
    assert np.array_equal(io.static_rows("inp", slice(0, 5)), data[:5])  # chunk 0 is sound
    with pytest.raises(CorruptTask, match="checksum"):
        io.static_rows("inp", slice(4, 7))
    os.unlink(chunk)
    with pytest.raises(CorruptTask, match="missing"):
        io.static_rows("inp", slice(4, 7), cached=False)


def test_damaged_inputs_are_reported_and_verify_reads_afresh(tmp_path):
    from chitally.clouds import read_collection
    from chitally.jobs.batch import BatchParams, create_or_open
    from chitally.store import InputsDamaged

    rng = np.random.default_rng(1)
    clouds = read_collection([rng.random((4, 2)) for _ in range(3)])
    store = create_or_open(str(tmp_path / "b.zarr"), clouds, BatchParams.checked(0.5, [0.0, 0.5]))
    points = store.read_input("points")  # now cached
    assert points.shape == (12, 2)
    store.verify_inputs()
    chunk = store.io.local.path("inputs/points/c/0/0")
    flip(chunk, -1, 0x01)
    with pytest.raises(InputsDamaged, match="points"):
        store.verify_inputs()
