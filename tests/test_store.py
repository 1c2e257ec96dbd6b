"""Tests of the run store, part by part: store I/O, the commit log, checkpoints, the
store itself, and the fenced generation lease.

Each part is tested on its own through its public methods; the keys a test touches on
disk come from `CommitLog`'s key helpers or from the layout the store documents. Stores
are local paths or ``memory://`` URLs (both where a test needs no file on disk); every
comparison is exact. The lease's takeover race runs real processes.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import pickle
import socket
import subprocess
import sys
import threading
import uuid
from datetime import datetime
from pathlib import Path

import fsspec
import numpy as np
import pytest
import zarr
from engine_fixtures import child_env, flip_byte, tree_hashes, truncate, wait_for

from chitally import euler_curve, runs
from chitally.execute import Callbacks, SerialExecutor
from chitally.jobs import CLOUD, cloud
from chitally.store import (
    FORMAT,
    Checkpoints,
    CommitConflict,
    CommitLog,
    CorruptTask,
    IncompleteStore,
    InputsDamaged,
    JobSpec,
    LeaseHeld,
    LeaseLost,
    NotAStore,
    ResultDamaged,
    RunStore,
    StoreError,
    StoreExists,
    StoreIO,
    StoreMismatch,
    arrays_digest,
    describe_layout,
    fingerprint,
)
from chitally.store import lease as lease_mod

EPS = 0.1 + 0.2  # not a short decimal: checks that floats survive JSON bit for bit
OUTPUTS = (("values", "<f8"), ("jumps", "<i8"))
HOST = socket.gethostname()


@pytest.fixture(params=["memory", "local"])
def url(request, tmp_path):
    if request.param == "local":
        yield str(tmp_path / "run.zarr")
        return
    name = f"chitally-test-{uuid.uuid4().hex}"
    yield f"memory://{name}"
    fs = fsspec.filesystem("memory")
    if fs.exists(f"/{name}"):
        fs.rm(f"/{name}", recursive=True)


@pytest.fixture
def local(tmp_path) -> str:
    return str(tmp_path / "run.zarr")


def table(shift: float = 0.0) -> dict[str, np.ndarray]:
    return {"values": np.array([0.0, 0.125, 0.25]) + shift, "jumps": np.array([-1, -3, 2], dtype=np.int64)}


def chunk(root: str, prefix: str, name: str) -> Path:
    """The one chunk file of a 1-D array written whole under `prefix` (Zarr v3 keys)."""
    return Path(root, prefix, name, "c", "0")


# ============================================================================ StoreIO


def test_storeio_keys_round_trip(url):
    io = StoreIO(url)
    assert io.get("a/b.json") is None and io.get_json("a/b.json") is None
    assert not io.exists("a/b.json") and io.list("a/") == []

    io.set("a/b.json", b'{"x": [1, 2.5]}', what="test write")
    assert io.get("a/b.json") == b'{"x": [1, 2.5]}'
    assert io.get_json("a/b.json") == {"x": [1, 2.5]} and io.exists("a/b.json")

    assert io.create_only("a/c.json", b"first", what="test create") is True
    assert io.create_only("a/c.json", b"second", what="test create") is False
    assert io.get("a/c.json") == b"first"
    # True means "the key holds these bytes": an identical second writer agrees
    assert io.create_only("a/c.json", b"first", what="test create") is True

    io.set("a/d/e.bin", b"\x00\x01", what="test write")
    assert sorted(io.list("a/")) == ["a/b.json", "a/c.json", "a/d/e.bin"]
    io.delete("a/b.json", what="test delete")
    assert not io.exists("a/b.json")
    io.delete_dir("a/d", what="test delete")
    assert sorted(io.list("a/")) == ["a/c.json"]

    io.set("bad.json", b"{not json", what="test write")
    with pytest.raises(ValueError):
        io.get_json("bad.json")
    io.clear(what="test clear")
    assert io.list("") == []


ARRAYS = {
    "f8": np.array([0.0, -0.0, 0.1 + 0.2, np.nan, -np.inf, 1e-310]),
    "big-endian-i4": np.arange(-3, 4, dtype=">i4"),
    "u1": np.array([0, 7, 255], dtype=np.uint8),
    "bool": np.array([True, False, True]),
    "2d-i2": np.arange(12, dtype=np.int16).reshape(3, 4),
    "fortran-f4": np.asfortranarray(np.arange(6, dtype=np.float32).reshape(2, 3)),
    "empty-f8": np.zeros(0),
    "empty-2d": np.zeros((0, 3), dtype=np.int64),
}


def test_storeio_arrays_round_trip_bit_for_bit(url):
    io = StoreIO(url)
    for name, arr in ARRAYS.items():
        io.write_array(f"arrays/{name}", arr, what="test write")
    for name, arr in ARRAYS.items():
        back = io.read_array(f"arrays/{name}")
        want = np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<"))
        assert back.dtype == want.dtype and back.dtype.byteorder in "<|=", name
        assert back.shape == arr.shape and back.tobytes() == want.tobytes(), name
    # rewritten in place (same shape) and recreated (other shape)
    io.write_array("arrays/u1", np.array([1, 2, 3], dtype=np.uint8), what="test write")
    assert io.read_array("arrays/u1").tolist() == [1, 2, 3]
    io.write_array("arrays/u1", np.array([9], dtype=np.int64), what="test write")
    back = io.read_array("arrays/u1")
    assert back.dtype == np.int64 and back.tolist() == [9]
    with pytest.raises(CorruptTask, match="arrays/absent is missing"):
        io.read_array("arrays/absent")


def test_write_verified_returns_the_digest_of_what_reads_back(url):
    io = StoreIO(url)
    arrays = {"values": np.array([0.5, 0.25]), "jumps": np.array([3, -1], dtype=">i8")}
    digest = io.write_verified("out/t", arrays, what="test write")
    assert digest == arrays_digest(arrays)
    back = io.read_arrays("out/t", ["values", "jumps"])
    assert arrays_digest(back) == digest


class ShiftingIO(StoreIO):
    """Store I/O whose writes of `victim` land with their first element changed, as a
    faulty storage layer (or a bug between memory and disk) would leave them."""

    victim = "jumps"

    def write_array(self, path, data, **kwargs):
        data = np.array(data, copy=True)
        if path.endswith("/" + self.victim) and data.size:
            data.flat[0] += 1
        super().write_array(path, data, **kwargs)


class DroppingIO(StoreIO):
    """Store I/O that silently loses the write of `jumps`."""

    def write_array(self, path, data, **kwargs):
        if not path.endswith("/jumps"):
            super().write_array(path, data, **kwargs)


def test_write_verified_detects_an_array_that_reads_back_differently(url):
    with pytest.raises(StoreError, match="read back differently"):
        ShiftingIO(url).write_verified("out/t", table(), what="test write")
    with pytest.raises(StoreError, match="did not read back"):
        DroppingIO(url).write_verified("out/u", table(), what="test write")


def test_arrays_digest_depends_on_names_dtypes_shapes_and_bytes():
    z = np.zeros(6, dtype="<i8")
    one = z.copy()
    one[3] = 1
    variants = {
        "base": {"a": z},
        "name": {"b": z},
        "dtype (same bytes)": {"a": np.zeros(6, dtype="<f8")},
        "signedness (same bytes)": {"a": np.zeros(6, dtype="<u8")},
        "shape 2x3": {"a": z.reshape(2, 3)},
        "shape 3x2": {"a": z.reshape(3, 2)},
        "bytes": {"a": one},
        "one more array": {"a": z, "b": np.zeros(0)},
        "order": {"b": np.zeros(0), "a": z},
    }
    digests = {k: arrays_digest(v) for k, v in variants.items()}
    assert len(set(digests.values())) == len(variants), digests
    # byte order and memory layout of the given arrays do not matter, only the values
    assert arrays_digest({"a": z.astype(">i8")}) == digests["base"]
    m = np.arange(6.0).reshape(2, 3)
    assert arrays_digest({"m": np.asfortranarray(m)}) == arrays_digest({"m": m})
    # the documented scheme: sha256 over name | LE dtype | shape | LE bytes, in order
    h = hashlib.sha256()
    h.update(b"a|<i8|6|" + z.tobytes())
    assert digests["base"] == h.hexdigest()
    assert arrays_digest({}) == hashlib.sha256(b"").hexdigest()


def test_storeio_pickles_as_its_location(url):
    io = StoreIO(url, storage_options={})
    io.set("k.json", b"[1]", what="test write")
    again = pickle.loads(pickle.dumps(io))
    assert again.url == url and again.storage_options == {}
    assert again.get_json("k.json") == [1]


def test_op_failures_carry_their_context(url, monkeypatch):
    io = StoreIO(url)
    with pytest.raises(StoreError) as err:
        io.op("frobnicate", "k/ey", lambda: 1 / 0, task=3, attempt="h-3-1")
    msg = str(err.value)
    assert msg == (f"frobnicate failed at key 'k/ey' of {url} (task 3, attempt h-3-1): "
                   "ZeroDivisionError: division by zero")
    mine = StoreError("already explained")
    with pytest.raises(StoreError) as err:
        io.op("x", "y", lambda: (_ for _ in ()).throw(mine))
    assert err.value is mine

    async def broken_set(key, value):
        raise OSError("disk full")

    def broken_local_set(key, value):
        raise OSError("disk full")

    monkeypatch.setattr(io.zarr_store, "set", broken_set)
    if io.local is not None:  # a local folder is written without zarr's event loop
        monkeypatch.setattr(io.local, "set", broken_local_set)
    with pytest.raises(StoreError) as err:
        io.set("failures/task-000002.json", b"{}", what="write failure record", task=2)
    msg = str(err.value)
    assert "write failure record failed" in msg and "failures/task-000002.json" in msg
    assert "(task 2)" in msg and "OSError: disk full" in msg and "\n" not in msg


def test_a_file_is_not_a_store_location(tmp_path):
    path = tmp_path / "points.npy"
    path.write_bytes(b"not a folder")
    with pytest.raises(NotAStore, match="is a file"):
        StoreIO(str(path)).get("zarr.json")
    with pytest.raises(NotAStore, match="is a file"):
        RunStore.open(str(path))
    with pytest.raises(NotAStore, match="is a file"):
        RunStore.create(str(path), make_spec())
    assert path.read_bytes() == b"not a folder"


# ========================================================================= CommitLog


def commit_log(url: str, n_tasks: int = 3) -> CommitLog:
    return CommitLog(StoreIO(url), n_tasks, OUTPUTS)


def test_commit_read_and_state(url):
    log = commit_log(url)
    assert not log.committed().any() and log.failures() == {}
    assert [log.state(i) for i in range(3)] == ["pending"] * 3
    assert log.record(1) is None and log.verified_record(1) is None
    with pytest.raises(CorruptTask, match="task 1: no commit record"):
        log.read(1)

    info = {"seconds": 0.5, "counters": {"edges": 7}}
    digest = log.commit(1, "h-1-0", {"values": [0, 0.125, 0.25], "jumps": np.array([-1, -3, 2], ">i4")},
                        info=info)
    assert digest == arrays_digest(table())  # given as list and int32: stored as the kind says
    assert log.committed().tolist() == [False, True, False]
    assert [log.state(i) for i in range(3)] == ["pending", "done", "pending"]
    got = log.read(1)
    assert list(got) == ["values", "jumps"]
    assert got["values"].dtype == np.float64 and got["jumps"].dtype == np.int64
    assert got["values"].tolist() == [0.0, 0.125, 0.25] and got["jumps"].tolist() == [-1, -3, 2]

    rec = log.record(1)
    assert log.verified_record(1) == rec
    assert rec["task"] == 1 and rec["attempt"] == "h-1-0" and rec["digest"] == digest
    assert rec["outputs"] == {"values": {"dtype": "<f8", "shape": [3]},
                              "jumps": {"dtype": "<i8", "shape": [3]}}
    assert rec["seconds"] == 0.5 and rec["counters"] == {"edges": 7} and rec["host"] == HOST
    datetime.fromisoformat(rec["committed"])
    assert log.io.exists(CommitLog.commit_key(1))


def test_empty_outputs_commit_and_read(url):
    log = commit_log(url)
    empty = {"values": np.zeros(0), "jumps": np.zeros(0, dtype=np.int64)}
    assert log.commit(0, "a", empty) == arrays_digest(empty)
    got = log.read(0)
    assert got["values"].shape == (0,) and got["jumps"].shape == (0,)


def test_commit_refuses_wrong_outputs_and_tasks(url):
    log = commit_log(url)
    with pytest.raises(ValueError, match=r"outputs must be \['values', 'jumps'\]"):
        log.commit(0, "a", {"values": np.zeros(1)})
    with pytest.raises(IndexError, match="task 3 out of range: the store has 3 tasks"):
        log.commit(3, "a", table())
    with pytest.raises(IndexError):
        log.state(-1)
    assert log.io.list("") == []


def test_recommit_with_the_same_digest_is_harmless(url):
    log = commit_log(url)
    d1 = log.commit(0, "first", table())
    before = log.io.get(CommitLog.commit_key(0))
    assert log.commit(0, "second", table()) == d1
    assert log.io.get(CommitLog.commit_key(0)) == before
    assert log.record(0)["attempt"] == "first"


def test_a_different_digest_is_a_conflict_and_writes_nothing(url):
    log = commit_log(url)
    d1 = log.commit(0, "first", table())
    record = log.io.get(CommitLog.commit_key(0))
    other = table()
    other["jumps"][0] += 1
    with pytest.raises(CommitConflict) as err:
        log.commit(0, "second", other)
    msg = str(err.value)
    assert "task 0" in msg and d1 in msg and arrays_digest(other) in msg and "first" in msg
    assert log.io.get(CommitLog.commit_key(0)) == record
    assert log.read(0)["jumps"].tolist() == [-1, -3, 2]


def test_outputs_without_a_record_are_pending(url, monkeypatch):
    log = commit_log(url)

    def crash(*args, **kwargs):
        raise StoreError("simulated crash before the commit record")

    monkeypatch.setattr(log.io, "create_only", crash)
    with pytest.raises(StoreError, match="simulated"):
        log.commit(2, "a", table())
    monkeypatch.undo()
    assert log.io.list(CommitLog.output_prefix(2) + "/")  # the data is there ...
    assert log.state(2) == "pending" and not log.committed()[2]  # ... but not trusted
    with pytest.raises(CorruptTask, match="no commit record"):
        log.read(2)
    log.commit(2, "b", table())
    assert log.state(2) == "done" and log.record(2)["attempt"] == "b"


def test_a_flipped_byte_in_an_output_chunk_is_corrupt(local):
    log = commit_log(local)
    log.commit(0, "a", table())
    flip_byte(chunk(local, CommitLog.output_prefix(0), "values"))
    with pytest.raises(CorruptTask, match="task 0: .*values.*unreadable"):
        log.read(0)
    assert log.verified_record(0) is None
    # the listing does not verify: the record is still there
    assert log.committed()[0] and log.state(0) == "done"
    # a new attempt of the (deterministic) task repairs the data under the same record
    log.commit(0, "b", table())
    assert log.read(0)["values"].tolist() == [0.0, 0.125, 0.25]
    assert log.record(0)["attempt"] == "a"


@pytest.mark.parametrize("damage", ["other values", "shorter", "missing"])
def test_outputs_that_do_not_match_the_record_are_corrupt(url, damage):
    log = commit_log(url)
    log.commit(1, "a", table())
    path = f"{CommitLog.output_prefix(1)}/jumps"
    if damage == "other values":
        log.io.write_array(path, np.array([-1, -3, 3]), what="damage")
        match = "do not match the commit record"
    elif damage == "shorter":
        log.io.write_array(path, np.array([-1, -3]), what="damage")
        match = "do not match the commit record"
    else:
        log.io.delete_dir(CommitLog.output_prefix(1), what="damage")
        match = "missing"
    with pytest.raises(CorruptTask, match=f"task 1: .*{match}"):
        log.read(1)
    assert log.verified_record(1) is None


@pytest.mark.parametrize("how", ["truncated", "no digest"])
def test_a_damaged_record_is_corrupt(url, how):
    log = commit_log(url)
    log.commit(1, "a", table())
    key = CommitLog.commit_key(1)
    raw = log.io.get(key)
    if how == "truncated":
        log.io.set(key, raw[: len(raw) // 2], what="damage")
        match = "is not JSON"
    else:
        rec = json.loads(raw)
        del rec["digest"]
        log.io.set(key, json.dumps(rec).encode(), what="damage")
        match = "lacks its digest"
    with pytest.raises(CorruptTask, match=f"task 1: commit record .*{match}"):
        log.record(1)
    with pytest.raises(CorruptTask):
        log.read(1)
    assert log.verified_record(1) is None


def test_a_truncated_record_file_on_disk_is_corrupt(local):
    log = commit_log(local)
    log.commit(2, "a", table())
    truncate(Path(local, CommitLog.commit_key(2)))
    with pytest.raises(CorruptTask, match="not JSON"):
        log.read(2)


def test_set_aside_keeps_a_copy_and_makes_the_task_pending(local):
    log = commit_log(local)
    log.commit(0, "a", table())
    log.commit(1, "a", table(1.0))
    record = log.io.get(CommitLog.commit_key(1))
    flip_byte(chunk(local, CommitLog.output_prefix(1), "jumps"))
    damaged = Path(chunk(local, CommitLog.output_prefix(1), "jumps")).read_bytes()

    prefix = log.set_aside(1)

    assert prefix.startswith("quarantine/")
    assert log.state(1) == "pending" and log.committed().tolist() == [True, False, False]
    assert log.io.list(CommitLog.output_prefix(1) + "/") == []
    assert log.io.get(f"{prefix}/{CommitLog.commit_key(1)}") == record
    assert chunk(local, f"{prefix}/{CommitLog.output_prefix(1)}", "jumps").read_bytes() == damaged
    assert log.read(0)["values"].tolist() == [0.0, 0.125, 0.25]  # the neighbour is untouched
    log.commit(1, "b", table(1.0))
    assert log.read(1)["values"].tolist() == [1.0, 1.125, 1.25]


def test_failures_are_recorded_and_cleared(url):
    log = commit_log(url)
    log.record_failure(2, "kernel ran out of memory", attempts=3)
    assert log.state(2) == "failed"
    rec = log.failures()[2]
    assert (rec["task"], rec["message"], rec["attempts"], rec["host"]) == (
        2, "kernel ran out of memory", 3, HOST)
    log.clear_failure(2)
    log.clear_failure(2)  # absent is fine
    assert log.failures() == {} and log.state(2) == "pending"

    log.record_failure(0, "boom", attempts=1)
    log.commit(0, "a", table())  # a commit clears the task's failure
    assert log.failures() == {} and log.state(0) == "done"

    log.io.set(CommitLog.failure_key(1), b"{torn", what="damage")
    assert log.failures() == {1: {"message": f"unreadable failure record {CommitLog.failure_key(1)!r}"}}


def test_a_commit_touches_only_its_own_keys(local):
    log = commit_log(local)
    log.commit(0, "a", table())
    before = tree_hashes(local)
    log.commit(1, "a", table(2.0))
    after = tree_hashes(local)
    changed = {k for k in before.keys() | after.keys() if before.get(k) != after.get(k)}
    assert f"{CommitLog.output_prefix(1)}/values/c/0" in changed
    for key in changed:
        assert key.startswith(CommitLog.output_prefix(1) + "/") or key == CommitLog.commit_key(1), key


def test_committed_ignores_records_of_other_tasks(url, caplog):
    log = commit_log(url, n_tasks=2)
    log.commit(1, "a", table())
    log.io.set("commits/task-000007.json", b"{}", what="stray")
    log.io.set("commits/notes.txt", b"x", what="stray")
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        assert log.committed().tolist() == [False, True]
    assert "names no task of this plan" in caplog.text


# ======================================================================= Checkpoints


def state(g: int) -> dict[str, np.ndarray]:
    return {"values": np.array([0.0, 0.5 + g]), "jumps": np.array([-1, g], dtype=np.int64)}


def gen_chunk(root: str, g: int, name: str) -> Path:
    # the documented layout: checkpoints/gen-000007/<array>
    return chunk(root, f"checkpoints/gen-{g:06d}", name)


def test_checkpoints_write_latest_and_prune(url):
    cps = Checkpoints(StoreIO(url))
    assert cps.latest() is None and cps.pointer() is None and cps.generations() == []
    for g in range(1, 6):
        cps.write(g, np.arange(g), state(g))
        cp = cps.latest()
        assert cp.generation == g and cps.pointer() == g and cp.skipped == ()
        assert cp.task_ids.dtype == np.int64 and cp.task_ids.tolist() == list(range(g))
        assert sorted(cp.state) == ["jumps", "values"]
        assert cp.state["values"].tolist() == [0.0, 0.5 + g] and cp.state["jumps"].tolist() == [-1, g]
    assert cps.generations() == [3, 4, 5]  # the newest three are kept
    assert cps.load(1) is None and cps.load(4)["jumps"].tolist() == [-1, 4]

    with pytest.raises(StoreError, match="generation 4 is older than the current 5"):
        cps.write(4, np.arange(4), state(4))
    cps.write(5, np.arange(5), state(50))  # the current generation may be written again
    assert cps.latest().state["jumps"].tolist() == [-1, 50]


def test_a_damaged_newest_checkpoint_falls_back(local, caplog):
    cps = Checkpoints(StoreIO(local))
    for g in (1, 2, 3):
        cps.write(g, np.arange(g), state(g))
    flip_byte(gen_chunk(local, 3, "values"))
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        cp = cps.latest()
    assert cp.generation == 2 and cp.skipped == (3,)
    assert cp.task_ids.tolist() == [0, 1] and cp.state["values"].tolist() == [0.0, 2.5]
    assert "instead of damaged 3" in caplog.text

    flip_byte(gen_chunk(local, 2, "task_ids"))
    cp = cps.latest()
    assert cp.generation == 1 and cp.skipped == (3, 2)
    flip_byte(gen_chunk(local, 1, "jumps"))
    assert cps.latest() is None


def test_a_checkpoint_with_other_values_than_its_record_falls_back(url):
    cps = Checkpoints(StoreIO(url))
    cps.write(1, np.arange(1), state(1))
    cps.write(2, np.arange(2), state(2))
    cps.io.write_array("checkpoints/gen-000002/jumps", np.array([-1, 42]), what="damage")
    cp = cps.latest()
    assert cp.generation == 1 and cp.skipped == (2,)


def test_a_damaged_pointer_falls_back_to_the_newest_recorded_generation(url):
    cps = Checkpoints(StoreIO(url))
    cps.write(1, np.arange(1), state(1))
    cps.write(2, np.arange(2), state(2))
    cps.io.set("checkpoints/latest.json", b"{not json", what="damage")
    assert cps.pointer() is None
    assert cps.latest().generation == 2


def test_a_generation_never_published_is_ignored(url):
    io = StoreIO(url)

    def fence():
        # the lease is lost once generation 2 is recorded, before the pointer moves to it
        if io.exists("checkpoints/gen-000002/record.json"):
            raise LeaseLost("lease lost before the pointer moved")

    cps = Checkpoints(io, fence=fence)
    cps.write(1, np.arange(1), state(1))
    with pytest.raises(LeaseLost):
        cps.write(2, np.arange(2), state(2))
    assert cps.generations() == [1, 2]  # generation 2 is complete on disk ...
    assert cps.pointer() == 1 and cps.latest().generation == 1  # ... but never published


# ========================================================================== RunStore


def make_spec(eps: float = EPS, points: np.ndarray | None = None, **params) -> JobSpec:
    """A hand-made cloud-kind spec: 10 points in the plane, 3 tasks."""
    if points is None:
        points = np.random.default_rng(7).random((10, 2))
    p = {"eps": eps, "max_dim": 3, "cover_radius": eps, "task_cost": {"alpha": 1.5}, **params}
    return JobSpec(
        kind="cloud",
        params=p,
        fingerprint=fingerprint(points),
        outputs=CLOUD.outputs,
        cost=np.array([3.5, 2.25, 1.0]),
        memory=np.array([4096, 2048, 1024], dtype=np.int64),
        inputs={"points": points, "original_ids": np.array([3, 0, 9, 1, 4, 8, 2, 7, 5, 6]),
                "big_endian": np.arange(5, dtype=">i4")},
        attrs={"eps": eps, "n_points": 10, "note": "hand-made"},
    )


def test_create_and_open_round_trip(url):
    spec = make_spec()
    RunStore.create(url, spec)
    rs = RunStore.open(url)

    assert rs.url == url and rs.kind == "cloud" and rs.n_tasks == 3
    assert rs.params == dict(spec.params) and rs.params["eps"] == EPS
    assert rs.fingerprint == dict(spec.fingerprint) and rs.attrs == dict(spec.attrs)
    assert rs.plan_digest == spec.digest()
    assert rs.input_names == ["points", "original_ids", "big_endian"]
    datetime.fromisoformat(rs.created)
    for name, arr in spec.inputs.items():
        back = rs.read_input(name)
        assert back.dtype == arr.dtype.newbyteorder("<") and np.array_equal(back, arr), name
    pts = spec.inputs["points"]
    assert np.array_equal(rs.read_input("points", slice(2, 5)), pts[2:5])
    assert np.array_equal(rs.read_input("points", np.array([0, 4, 9])), pts[[0, 4, 9]])
    cost, memory = rs.task_cost(), rs.task_memory()
    assert cost.dtype == np.float64 and cost.tolist() == [3.5, 2.25, 1.0]
    assert memory.dtype == np.int64 and memory.tolist() == [4096, 2048, 1024]
    assert rs.commits.n_tasks == 3 and rs.commits.outputs == OUTPUTS
    assert not rs.commits.committed().any() and rs.checkpoints.latest() is None
    assert not rs.is_complete() and rs.read_result() is None and rs.holder() is None
    rs.verify_inputs()


def test_plan_digest_covers_inputs_costs_and_attrs():
    base = make_spec().digest()
    other_points = make_spec(points=np.random.default_rng(8).random((10, 2))).digest()
    spec = make_spec()
    other_cost = JobSpec(**{**spec.__dict__, "cost": np.array([3.5, 2.25, 1.5])}).digest()
    other_attrs = JobSpec(**{**spec.__dict__, "attrs": {**spec.attrs, "note": "x"}}).digest()
    assert len({base, other_points, other_cost, other_attrs}) == 4
    assert make_spec().digest() == base


def test_a_store_pickles_as_its_location_and_record(tmp_path):
    url = f"file://{tmp_path / 'run.zarr'}"
    spec = make_spec()
    rs = RunStore.create(url, spec)
    again = pickle.loads(pickle.dumps(RunStore.open(url)))
    assert again.url == url and again.plan_digest == rs.plan_digest
    assert np.array_equal(again.read_input("points"), spec.inputs["points"])


def test_describe_layout_names_the_task_range():
    text = describe_layout(1200)
    assert "task-000000..001199" in text and "commits/" in text and "created.json" in text


def test_create_refuses_an_existing_store(url):
    RunStore.create(url, make_spec())
    with pytest.raises(StoreExists, match="already exists"):
        RunStore.create(url, make_spec())


def test_create_refuses_foreign_data(local):
    os.makedirs(local)
    Path(local, "notes.txt").write_text("mine")
    with pytest.raises(StoreExists, match="not a chitally run store"):
        RunStore.create(local, make_spec())
    assert Path(local, "notes.txt").read_text() == "mine"


def test_an_incomplete_store_without_work_is_detected_and_redone(local):
    RunStore.create(local, make_spec())
    os.remove(os.path.join(local, "created.json"))  # as if creation died before the end
    with pytest.raises(IncompleteStore, match="incomplete"):
        RunStore.open(local)
    assert RunStore.open(local, allow_incomplete=True).n_tasks == 3
    spec = make_spec(eps=0.5)
    RunStore.create(local, spec)
    assert RunStore.open(local).params["eps"] == 0.5


def test_open_refuses_what_is_not_a_store(tmp_path):
    with pytest.raises(NotAStore, match="no such directory"):
        RunStore.open(str(tmp_path / "nothing"))
    assert not (tmp_path / "nothing").exists()
    with pytest.raises(NotAStore, match="no zarr.json"):
        RunStore.open(f"memory://chitally-absent-{uuid.uuid4().hex}")
    zarr.create_group(str(tmp_path / "plain.zarr"))
    with pytest.raises(NotAStore, match="not a chitally run store"):
        RunStore.open(str(tmp_path / "plain.zarr"))


def test_a_format_1_store_is_refused_naming_its_version(tmp_path):
    old = tmp_path / "old.zarr"
    old.mkdir()
    root = {"zarr_format": 3, "node_type": "group",
            "attributes": {"chitally": {"format": 1, "version": "0.1.0", "params": {"eps": 0.5}}}}
    (old / "zarr.json").write_text(json.dumps(root))
    (old / "created.json").write_text("{}")
    before = tree_hashes(old)
    with pytest.raises(StoreError) as err:
        RunStore.open(str(old))
    msg = str(err.value)
    assert "format 1" in msg and "chitally 0.1.0" in msg and f"reads format {FORMAT}" in msg
    assert FORMAT == 2 and "\n" not in msg
    with pytest.raises(StoreExists):
        RunStore.create(str(old), make_spec())
    assert tree_hashes(old) == before


def test_check_matches_names_every_difference(url):
    spec = make_spec()
    rs = RunStore.create(url, spec)
    rs.check_matches("cloud", spec.params, spec.fingerprint)
    rs.check_matches("cloud", {**spec.params, "max_dim": 3.0}, spec.fingerprint)  # same after JSON
    rs.check_matches("cloud", {**spec.params, "absent_default": None}, spec.fingerprint)

    other = {**spec.params, "eps": 0.5, "extra": True, "task_cost": {"alpha": 2.0}}
    moved = np.random.default_rng(7).random((10, 2)) + 1.0
    fp = fingerprint(moved)
    with pytest.raises(StoreMismatch) as err:
        rs.check_matches("cloud", other, fp)
    msg = str(err.value)
    assert "\n" not in msg
    assert f"eps: store {json.dumps(EPS)}, given 0.5" in msg
    assert "extra: store <absent>, given true" in msg
    assert "task_cost.alpha: store 1.5, given 2.0" in msg
    old, new = spec.fingerprint["sha256"], fp["sha256"]
    assert f'input.sha256: store "{old}", given "{new}"' in msg
    assert "input.shape" not in msg and "max_dim" not in msg and "cover_radius" not in msg
    with pytest.raises(StoreMismatch, match="holds a 'cloud' job, not 'batch'"):
        rs.check_matches("batch", spec.params, spec.fingerprint)
    with pytest.raises(StoreMismatch, match="max_dim: store 3, given true"):
        rs.check_matches("cloud", {**spec.params, "max_dim": True}, spec.fingerprint)


def test_open_and_check_leave_the_store_byte_identical(local):
    spec = make_spec()
    rs = RunStore.create(local, spec)
    rs.commits.commit(0, "a", table())
    before = tree_hashes(local)
    again = RunStore.open(local)
    with pytest.raises(StoreMismatch):
        again.check_matches("cloud", {**spec.params, "eps": 1.0}, fingerprint(np.zeros((3, 2))))
    again.read_input("points")
    again.verify_inputs()
    again.commits.read(0)
    again.commits.committed()
    again.checkpoints.latest()
    again.read_result()
    again.holder()
    assert tree_hashes(local) == before


def test_fingerprint_is_chunkwise_and_dtype_aware():
    pts = np.random.default_rng(1).random((1000, 3))
    fp = fingerprint(pts)
    # sha256 of the little-endian float64 bytes (hashlib, independently of the store)
    assert fp == {"shape": [1000, 3], "dtype": "float64",
                  "sha256": hashlib.sha256(pts.astype("<f8").tobytes()).hexdigest()}
    f32 = pts.astype(np.float32)
    assert fingerprint(f32)["dtype"] == "float32"
    assert fingerprint(f32)["sha256"] == fingerprint(f32.astype(np.float64))["sha256"]
    assert fingerprint(np.asfortranarray(pts)) == fp


def test_a_flipped_byte_in_an_input_chunk_is_inputs_damaged(local):
    spec = make_spec()
    RunStore.create(local, spec)
    flip_byte(Path(local, "inputs", "points", "c", "0", "0"))
    again = RunStore.open(local)  # opening reads no input
    with pytest.raises(InputsDamaged, match="inputs stored in .* are damaged .*points"):
        again.read_input("points", slice(0, 3))
    with pytest.raises(InputsDamaged):
        again.verify_inputs()
    assert np.array_equal(again.read_input("original_ids"), spec.inputs["original_ids"])


def test_an_input_rewritten_with_other_values_fails_verification(url):
    rs = RunStore.create(url, make_spec())
    rs.io.write_array("inputs/original_ids", np.arange(10), what="damage",
                      chunks=(10,))
    with pytest.raises(InputsDamaged, match="original_ids does not match its digest"):
        RunStore.open(url).verify_inputs()


def test_result_round_trip_and_damage(local):
    rs = RunStore.create(local, make_spec())
    arrays = {"values": np.array([0.0, 0.25]), "chi": np.array([10, 7], dtype=np.int64)}
    rs.write_result(arrays, {"eps": EPS, "n_points": 10, "digest": "abc"})
    got, record = RunStore.open(local).read_result()
    assert got["values"].tolist() == [0.0, 0.25] and got["chi"].tolist() == [10, 7]
    assert record["eps"] == EPS and record["n_points"] == 10 and record["digest"] == "abc"
    assert record["names"] == ["values", "chi"] and record["sha256"] == arrays_digest(arrays)
    assert rs.is_complete()

    flip_byte(chunk(local, "result", "chi"))
    with pytest.raises(ResultDamaged, match="unreadable"):
        rs.read_result()
    rs.write_result(arrays, {"eps": EPS})  # written again: readable again
    assert rs.read_result()[0]["chi"].tolist() == [10, 7]

    rs.io.write_array("result/chi", np.array([10, 8]), what="damage")
    with pytest.raises(ResultDamaged, match="does not match its record"):
        rs.read_result()
    truncate(Path(local, "result", "record.json"))
    with pytest.raises(ResultDamaged, match="not JSON"):
        rs.read_result()


def test_clean_partials(local):
    rs = RunStore.create(local, make_spec())
    left = Path(local, CommitLog.output_prefix(1), "values")
    left.mkdir(parents=True)
    (left / "0.3f2a.partial").write_bytes(b"half")
    assert rs.clean_partials() == [f"{CommitLog.output_prefix(1)}/values/0.3f2a.partial"]
    assert rs.clean_partials() == []


# ------------------------------------------------ the completion marker and committed work

CLOUD_EPS = 0.3


def cloud_points() -> np.ndarray:
    return np.random.default_rng(3).random((12, 2))


def cloud_params(**over) -> cloud.Params:
    p = {"eps": CLOUD_EPS, "max_dim": 2, "cover_radius": None, "task_cost": 1e-9, **over}
    return cloud.Params.checked(**p)


def committed_cloud_store(path: str, tasks: list[int]) -> RunStore:
    store = cloud.create_or_open(path, cloud_points(), cloud_params())
    outcome = SerialExecutor().run(store, tasks, Callbacks())
    assert sorted(outcome.done) == sorted(tasks)
    return store


def test_a_lost_marker_is_rebuilt_when_params_and_input_verify(local):
    store = committed_cloud_store(local, [0, 1, 2])
    commits_before = {k: v for k, v in tree_hashes(local).items() if k.startswith("commits/")}
    os.remove(os.path.join(local, "created.json"))
    with pytest.raises(IncompleteStore):
        RunStore.open(local)

    def never():
        raise AssertionError("a verified store must not be planned and created again")

    again = runs.open_or_create(local, "cloud", cloud_params().as_dict(), fingerprint(cloud_points()),
                                never)

    assert Path(local, "created.json").exists()
    assert again.plan_digest == store.plan_digest
    assert {k: v for k, v in tree_hashes(local).items() if k.startswith("commits/")} == commits_before
    report = runs.execute(again, SerialExecutor())
    assert report.computed == store.n_tasks - 3
    # chitally.euler_curve computes the same curve in one process, without a store
    assert report.curve == euler_curve(cloud_points(), CLOUD_EPS, 2)


@pytest.mark.parametrize("other", ["params", "input"])
def test_a_lost_marker_with_other_params_is_refused_and_nothing_deleted(local, other):
    committed_cloud_store(local, [0, 1])
    os.remove(os.path.join(local, "created.json"))
    before = tree_hashes(local)
    points, params = cloud_points(), cloud_params()
    if other == "params":
        params = cloud_params(max_dim=3)
    else:
        points = points + 1.0
    with pytest.raises(StoreExists, match="holds 2 committed tasks; nothing was deleted"):
        runs.open_or_create(local, "cloud", params.as_dict(), fingerprint(points),
                            lambda: cloud.job_spec(points, params))
    assert tree_hashes(local) == before
    # asked directly, the store names what differs and writes no marker
    store = RunStore.open(local, allow_incomplete=True)
    with pytest.raises(StoreMismatch):
        store.rebuild_marker(params.as_dict(), fingerprint(points))
    assert tree_hashes(local) == before


def test_a_lost_marker_with_damaged_inputs_is_not_rebuilt(local):
    committed_cloud_store(local, [0])
    os.remove(os.path.join(local, "created.json"))
    flip_byte(Path(local, "inputs", "points", "c", "0", "0"))
    before = tree_hashes(local)
    store = RunStore.open(local, allow_incomplete=True)
    with pytest.raises(InputsDamaged):
        store.rebuild_marker(cloud_params().as_dict(), fingerprint(cloud_points()))
    with pytest.raises(StoreExists, match="nothing was deleted"):
        cloud.create_or_open(local, cloud_points(), cloud_params())
    assert tree_hashes(local) == before


def test_only_create_with_discard_deletes_committed_work(local):
    committed_cloud_store(local, [0, 1])
    os.remove(os.path.join(local, "created.json"))
    spec = cloud.job_spec(cloud_points(), cloud_params(max_dim=3))
    with pytest.raises(StoreExists):
        RunStore.create(local, spec)
    assert len(list(Path(local, "commits").glob("task-*.json"))) == 2

    store = RunStore.create(local, spec, discard=True)

    assert not store.commits.committed().any()
    assert not Path(local, "commits").exists() or not list(Path(local, "commits").iterdir())
    assert RunStore.open(local).params["max_dim"] == 3


def test_discard_deletes_every_key_of_the_old_store(url):
    rs = RunStore.create(url, make_spec())
    for t in range(3):
        rs.commits.commit(t, "a", table(t))
    rs.checkpoints.write(1, np.arange(3), state(1))
    rs.io.delete("created.json", what="lose the marker")
    with pytest.raises(StoreExists, match="holds 3 committed tasks"):
        RunStore.create(url, make_spec(eps=0.5))

    new = RunStore.create(url, make_spec(eps=0.5), discard=True)

    assert new.params["eps"] == 0.5 and not new.commits.committed().any()
    assert new.checkpoints.latest() is None
    left = [k for k in new.io.list("") if k.startswith(("commits/", "outputs/task", "checkpoints/gen"))]
    assert left == []


# ============================================================================= lease

HOLDER = r"""
import os, sys, time
from chitally.store import StoreIO
from chitally.store.lease import acquire

path, owner, then = sys.argv[1], sys.argv[2], sys.argv[3]
lease = acquire(StoreIO(path), owner)
print(os.getpid(), flush=True)
if then == "exit":
    os._exit(0)  # gone without releasing: a crash
deadline = time.monotonic() + 60
while not os.path.exists(then) and time.monotonic() < deadline:
    time.sleep(0.01)
"""


def hold_and_exit(path: str, owner: str) -> int:
    """Take the lease of `path` in a child process that then dies holding it; its pid."""
    proc = subprocess.run([sys.executable, "-c", HOLDER, path, owner, "exit"], capture_output=True,
                          text=True, env=child_env(), timeout=120, check=False)
    assert proc.returncode == 0, proc.stderr
    return int(proc.stdout)


def test_acquire_and_release(url):
    io = StoreIO(url)
    assert lease_mod.current_generation(io) == 0 and lease_mod.describe_holder(io) is None
    lease = lease_mod.acquire(io, "run-1")
    assert lease.generation == 1 and lease.held
    holder = lease_mod.describe_holder(io)
    assert (holder["owner"], holder["host"], holder["pid"], holder["generation"], holder["verdict"]) == (
        "run-1", HOST, os.getpid(), 1, "live")
    lease.check()
    assert lease.release() is True
    assert lease.release() is False  # released once
    assert not lease.held and lease_mod.describe_holder(io) is None
    with pytest.raises(LeaseLost, match="released"):
        lease.check()
    again = lease_mod.acquire(io, "run-2")
    assert again.generation == 2 and lease_mod.describe_holder(io)["owner"] == "run-2"
    again.release()


def test_a_second_acquire_is_refused_naming_the_holder(url):
    io = StoreIO(url)
    lease = lease_mod.acquire(io, "run-1")
    for takeover in (False, True):  # a live holder is never taken over
        with pytest.raises(LeaseHeld) as err:
            lease_mod.acquire(io, "run-2", takeover=takeover)
        msg = str(err.value)
        assert f"in use by run-1 (pid {os.getpid()} on {HOST}, last heartbeat" in msg
        assert "\n" not in msg and not isinstance(err.value, LeaseLost)
    assert lease.held and lease_mod.current_generation(io) == 1
    lease.release()


def test_a_holder_in_another_live_process_is_named(local, tmp_path):
    stop = tmp_path / "stop"
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, local, "the-other-run", str(stop)],
                            stdout=subprocess.PIPE, text=True, env=child_env())
    try:
        pid = int(proc.stdout.readline())
        with pytest.raises(LeaseHeld, match=f"in use by the-other-run \\(pid {pid} on {HOST}"):
            lease_mod.acquire(StoreIO(local), "me", takeover=True)
    finally:
        stop.touch()
        proc.wait(timeout=60)


def test_a_holder_whose_process_died_is_taken_over(local, caplog):
    pid = hold_and_exit(local, "crashed-run")
    io = StoreIO(local)
    assert lease_mod.describe_holder(io)["verdict"] == "dead"
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        lease = lease_mod.acquire(io, "run-2")  # no takeover asked: a dead holder needs none
    assert f"taking over the lease of crashed-run (pid {pid} on {HOST}" in caplog.text
    assert "its process is gone" in caplog.text
    assert lease.generation == 2 and lease_mod.describe_holder(io)["owner"] == "run-2"
    lease.release()


def test_a_stale_holder_is_taken_over_only_when_asked(url):
    io = StoreIO(url)
    old = lease_mod.acquire(io, "slow-run")  # alive but never beats
    # stale_after=0: any heartbeat age counts as stale, without waiting for time to pass
    with pytest.raises(LeaseHeld, match=r"in use by slow-run .*takeover=True"):
        lease_mod.acquire(io, "me", stale_after=0.0)
    assert old.held

    new = lease_mod.acquire(io, "me", takeover=True, stale_after=0.0)

    assert new.generation == 2 and new.held
    with pytest.raises(LeaseLost, match=f"taken over by me \\(pid {os.getpid()} on {HOST}\\)"):
        old.check()
    assert not old.held and old.lost
    with pytest.raises(LeaseLost):
        old.heartbeat()
    assert old.release() is False  # not ours: no release record for generation 1 or 2
    assert not any("end-" in k for k in io.list("lease/"))
    assert lease_mod.describe_holder(io)["owner"] == "me"
    new.release()


def test_fencing_survives_later_generations(url):
    # a holder paused for a long time must find its lease lost however many holders
    # came and went meanwhile (old lease records are pruned as generations pass)
    io = StoreIO(url)
    zombie = lease_mod.acquire(io, "paused-run")
    for owner in ("b", "c", "d", "e"):
        lease = lease_mod.acquire(io, owner, takeover=True, stale_after=0.0)
        lease.release()
    assert lease_mod.current_generation(io) == 5
    with pytest.raises(LeaseLost, match="taken over by e "):
        zombie.check()
    assert not zombie.held


def test_a_lease_whose_records_were_removed_is_lost(url):
    io = StoreIO(url)
    lease = lease_mod.acquire(io, "run")
    io.delete_dir("lease", what="remove the lease records")
    with pytest.raises(LeaseLost, match="was removed"):
        lease.check()


def fenced_store(local: str, tasks_done: int = 2) -> tuple[RunStore, RunStore]:
    """A store whose lease `old` held and `new` took over; (old, new)."""
    rs = RunStore.create(local, make_spec())
    for t in range(tasks_done):
        rs.commits.commit(t, "a", table(t))
    old = RunStore.open(local, allow_incomplete=True)
    old.acquire_lease("old-run")
    new = RunStore.open(local, allow_incomplete=True)
    new.acquire_lease("new-run", takeover=True, stale_after=0.0)
    return old, new


def test_after_a_takeover_every_fenced_write_of_the_old_holder_writes_nothing(local):
    old, new = fenced_store(local)
    before = tree_hashes(local)
    attempts = {
        "checkpoint": lambda: old.checkpoints.write(1, np.arange(2), state(1)),
        "result": lambda: old.write_result({"values": np.zeros(1)}, {"eps": EPS}),
        "failure record": lambda: old.commits.record_failure(2, "boom", 3),
        "clear failure": lambda: old.commits.clear_failure(2),
        "set aside": lambda: old.commits.set_aside(0),
        "clean partials": lambda: (Path(local, "x.partial").write_bytes(b"p"), old.clean_partials()),
    }
    for what, write in attempts.items():
        with pytest.raises(LeaseLost, match="taken over by new-run"):
            write()
        Path(local, "x.partial").unlink(missing_ok=True)
        assert tree_hashes(local) == before, what
    with pytest.raises(LeaseLost):
        old.fence()
    # the new holder's writes go through
    new.checkpoints.write(1, np.arange(2), state(1))
    new.commits.record_failure(2, "boom", 3)
    assert new.checkpoints.latest().generation == 1 and list(new.commits.failures()) == [2]


def test_after_a_takeover_the_old_holder_cannot_rebuild_the_marker(local):
    old, new = fenced_store(local)
    os.remove(os.path.join(local, "created.json"))
    before = tree_hashes(local)
    with pytest.raises(LeaseLost):
        old.rebuild_marker(old.params, old.fingerprint)
    assert tree_hashes(local) == before and not Path(local, "created.json").exists()
    new.rebuild_marker(new.params, new.fingerprint)
    assert RunStore.open(local).plan_digest == new.plan_digest


def test_the_heartbeat_is_withheld_while_the_run_is_not_alive(url, caplog):
    io = StoreIO(url)
    lease = lease_mod.acquire(io, "run")
    asked = threading.Event()
    calls = []

    def alive() -> bool:
        calls.append(1)
        if len(calls) >= 5:
            asked.set()
        return answer[0]

    answer = [False]
    lease.alive = alive
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        lease.start(interval=0.01)
        assert asked.wait(30), "the heartbeat thread never asked whether the run is alive"
        assert not any("beat-" in k for k in io.list("lease/"))
        answer[0] = True
        wait_for(lambda: any("beat-" in k for k in io.list("lease/")), 30, "a heartbeat")
    assert "no sign of life; heartbeat withheld" in caplog.text
    assert lease_mod.describe_holder(io)["heartbeat_age"] < 30
    assert lease.error is None
    lease.release()


def test_the_lease_as_a_context_manager_beats_and_releases(url):
    io = StoreIO(url)
    with lease_mod.acquire(io, "run", stale_after=0.04) as lease:  # beats every 0.01 s
        wait_for(lambda: any("beat-" in k for k in io.list("lease/")), 30, "a heartbeat")
    assert not lease.held and lease.error is None
    assert lease_mod.describe_holder(io) is None
    assert any("end-000000001" in k for k in io.list("lease/"))


# --------------------------------------------------------------------- the takeover race

CONTENDER = r"""
import os, sys, time
from chitally.store import LeaseHeld, StoreIO
from chitally.store.lease import acquire

root, me, trials = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])


def put(name, text):
    tmp = os.path.join(root, name + ".tmp")
    with open(tmp, "w") as f:
        f.write(text)
    os.replace(tmp, os.path.join(root, name))


held = []  # winners keep their leases: this process stays their live holder
for t in range(trials):
    io = StoreIO(os.path.join(root, f"store-{t}"))
    io.list("lease/")  # open the store before the barrier
    put(f"ready-{t}-{me}", "")
    go = os.path.join(root, f"go-{t}")
    deadline = time.monotonic() + 60
    while not os.path.exists(go):
        if time.monotonic() > deadline:
            sys.exit(f"contender {me}: no go for trial {t} within 60 s")
        time.sleep(0.0005)
    try:
        lease = acquire(io, f"contender-{me}")
        held.append(lease)
        outcome = f"won {lease.generation}"
    except LeaseHeld as exc:
        outcome = "held"
    except Exception as exc:
        outcome = f"error {type(exc).__name__}: {exc}"
    put(f"result-{t}-{me}", outcome)
"""

DEAD_HOLDER = r"""
import os, sys
from chitally.store import StoreIO
from chitally.store.lease import acquire

root, trials = sys.argv[1], int(sys.argv[2])
for t in range(trials):
    acquire(StoreIO(os.path.join(root, f"store-{t}")), "crashed-run")
os._exit(0)  # dies holding every lease
"""


def race(tmp_path: Path, n_procs: int, trials: int) -> None:
    root = tmp_path / "race"
    root.mkdir()
    dead = subprocess.run([sys.executable, "-c", DEAD_HOLDER, str(root), str(trials)],
                          capture_output=True, text=True, env=child_env(), timeout=120, check=False)
    assert dead.returncode == 0, dead.stderr
    for t in range(trials):
        assert lease_mod.describe_holder(StoreIO(str(root / f"store-{t}")))["verdict"] == "dead"
    procs = [subprocess.Popen([sys.executable, "-c", CONTENDER, str(root), str(k), str(trials)],
                              stderr=subprocess.PIPE, text=True, env=child_env())
             for k in range(n_procs)]
    try:
        for t in range(trials):
            ready = [root / f"ready-{t}-{k}" for k in range(n_procs)]
            wait_for(lambda ready=ready: all(r.exists() for r in ready), 60,
                     f"every contender ready for trial {t}")
            (root / f"go-{t}").touch()  # the barrier: all are polling for this file
            results = [root / f"result-{t}-{k}" for k in range(n_procs)]
            wait_for(lambda results=results: all(r.exists() for r in results), 60,
                     f"the results of trial {t}")
            outcomes = [r.read_text() for r in results]
            winners = [k for k, o in enumerate(outcomes) if o.startswith("won")]
            assert len(winners) == 1, f"trial {t}: {outcomes}"
            assert outcomes[winners[0]] == "won 2"
            assert sorted(outcomes) == ["held"] * (n_procs - 1) + ["won 2"], f"trial {t}: {outcomes}"
            holder = lease_mod.describe_holder(StoreIO(str(root / f"store-{t}")))
            assert holder["owner"] == f"contender-{winners[0]}" and holder["generation"] == 2
            assert holder["verdict"] == "live"
        for p in procs:
            assert p.wait(timeout=60) == 0, p.stderr.read()
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait(timeout=10)


def test_takeover_race_has_exactly_one_winner(tmp_path):
    # 8 processes x 30 trials, all released at once onto a lease whose holder died
    race(tmp_path, n_procs=8, trials=30)


@pytest.mark.slow
def test_takeover_race_has_exactly_one_winner_many_trials(tmp_path):
    race(tmp_path, n_procs=8, trials=300)
