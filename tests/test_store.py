"""Tests of the run store: layout round trip, commit protocol, damage, checkpoints, lease.

Small hand-built covers and plans; every comparison is exact. The round trip runs on a
``memory://`` URL and on a local path.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import pickle
import re
import socket
import subprocess
import sys
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

import fsspec
import numpy as np
import pytest
import zarr

from chitally.plan import Cover, Plan
from chitally.store import (
    CommitConflict,
    CorruptTask,
    IncompleteStore,
    LeaseHeld,
    NotAStore,
    RunStore,
    StoreError,
    StoreExists,
    StoreMismatch,
    _commit_key,
    _generation_path,
    _table_path,
    describe_layout,
    fingerprint,
    table_digest,
)

EPS = 0.1 + 0.2  # not a short decimal: checks that floats survive JSON bit for bit


def make_inputs() -> tuple[np.ndarray, Cover, Plan]:
    """10 points in the plane, 3 balls, 3 tasks, halos written out by hand."""
    rng = np.random.default_rng(7)
    points = rng.random((10, 2))
    order = np.array([3, 0, 9, 1, 4, 8, 2, 7, 5, 6], dtype=np.int64)
    cover = Cover(
        radius=EPS,
        order=order,
        ball_offsets=np.array([0, 4, 7, 10], dtype=np.int64),
        centres=np.array([0, 4, 7], dtype=np.int64),
        neighbour_offsets=np.array([0, 2, 5, 7], dtype=np.int64),
        neighbour_balls=np.array([0, 1, 0, 1, 2, 1, 2], dtype=np.int64),
    )
    plan = Plan(
        eps=EPS,
        max_dim=3,
        cover_radius=EPS,
        n_points=10,
        dim=2,
        row_start=np.array([0, 4, 7], dtype=np.int64),
        row_stop=np.array([4, 7, 10], dtype=np.int64),
        halo_offsets=np.array([0, 5, 10, 14], dtype=np.int64),
        halo_rows=np.array([0, 1, 2, 3, 5, 2, 4, 5, 6, 8, 6, 7, 8, 9], dtype=np.int64),
        cost=np.array([3.5, 2.25, 1.0]),
        memory=np.array([4096, 2048, 1024], dtype=np.int64),
    )
    return points[order], cover, plan


def params() -> dict:
    return {"eps": EPS, "max_dim": 3, "cover_radius": EPS, "task_cost": {"alpha": 1.5}}


def make_store(url: str) -> tuple[RunStore, np.ndarray, Cover, Plan]:
    pts, cover, plan = make_inputs()
    rs = RunStore.create(
        url,
        params=params(),
        fingerprint=fingerprint(pts),
        cover=cover,
        plan=plan,
        points_sorted=pts,
        chunk_rows=4,  # three chunks of points, so row reads cross chunk borders
    )
    return rs, pts, cover, plan


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


def tree_hashes(root: str) -> dict[str, str]:
    out = {}
    for dirpath, _, files in os.walk(root):
        for f in files:
            p = os.path.join(dirpath, f)
            out[os.path.relpath(p, root)] = hashlib.sha256(Path(p).read_bytes()).hexdigest()
    return out


def flip_byte(path: Path) -> None:
    raw = bytearray(path.read_bytes())
    raw[len(raw) // 2] ^= 0x10
    path.write_bytes(bytes(raw))


def table() -> tuple[np.ndarray, np.ndarray]:
    return np.array([0.0, 0.125, 0.25]), np.array([-1, -3, 2], dtype=np.int64)


# ------------------------------------------------------------------- round trip


def test_round_trip(url):
    rs, pts, cover, plan = make_store(url)
    rs = RunStore.open(url)

    assert rs.url == url
    assert rs.n_tasks == 3 and rs.n_points == 10 and rs.dim == 2
    assert rs.params == params()
    assert rs.params["eps"] == EPS
    assert rs.fingerprint == fingerprint(pts)
    assert rs.plan_digest == plan.digest()
    datetime.fromisoformat(rs.created)

    got = rs.read_plan()
    assert (got.eps, got.max_dim, got.cover_radius, got.n_points, got.dim) == (
        EPS, 3, EPS, 10, 2,
    )
    for name in ("row_start", "row_stop", "halo_offsets", "halo_rows", "cost", "memory"):
        a, b = getattr(got, name), getattr(plan, name)
        assert a.dtype == b.dtype and np.array_equal(a, b), name
    assert got.digest() == plan.digest()

    c = rs.read_cover()
    assert c.radius == cover.radius
    for name in ("order", "ball_offsets", "centres", "neighbour_offsets", "neighbour_balls"):
        assert np.array_equal(getattr(c, name), getattr(cover, name)), name
    assert np.array_equal(rs.read_original_ids(), cover.order)
    assert np.array_equal(rs.read_original_ids(np.array([2, 9])), cover.order[[2, 9]])

    for rows in ([0, 1, 2, 3], [2, 4, 5, 6, 8], [9], list(range(10)), [0, 9]):
        rows = np.array(rows)
        assert np.array_equal(rs.read_rows(rows), pts[rows])
    assert rs.read_rows(np.array([], dtype=np.int64)).shape == (0, 2)
    with pytest.raises(ValueError):
        rs.read_rows(np.array([3, 1]))

    for i in range(3):
        coords, halo, lo, hi = rs.read_task_input(i)
        t = plan.task(i)
        assert np.array_equal(halo, t.halo)
        assert np.array_equal(coords, pts[t.halo])
        assert np.array_equal(halo[lo:hi], np.arange(t.row_start, t.row_stop))

    # Nothing is committed yet; a commit, a failure, a checkpoint and a curve round trip.
    assert not rs.committed().any()
    assert [rs.task_state(i) for i in range(3)] == ["pending"] * 3
    values, jumps = table()
    digest = rs.commit_task(1, "a1", values, jumps, info={"n_owned": 3, "seconds": 0.5})
    assert digest == table_digest(values, jumps)
    assert rs.committed().tolist() == [False, True, False]
    v, j = rs.read_jump_table(1)
    assert v.dtype == np.float64 and j.dtype == np.int64
    assert np.array_equal(v, values) and np.array_equal(j, jumps)
    rec = rs.read_commit(1)
    assert rec["task"] == 1 and rec["attempt"] == "a1" and rec["length"] == 3
    assert rec["digest"] == digest and rec["n_owned"] == 3 and rec["host"] == socket.gethostname()

    rs.record_failure(2, "kernel ran out of memory", attempts=3)
    assert rs.task_state(2) == "failed"
    assert rs.failures()[2]["message"] == "kernel ran out of memory"
    assert rs.failures()[2]["attempts"] == 3
    rs.commit_task(2, "a4", np.array([0.5]), np.array([4]))
    assert rs.task_state(2) == "done" and rs.failures() == {}

    rs.write_checkpoint(0, np.array([1, 2]), np.array([0.0, 0.5]), np.array([-1, 4]))
    cp = rs.latest_checkpoint()
    assert cp.generation == 0 and cp.skipped == ()
    assert np.array_equal(cp.task_ids, [1, 2]) and np.array_equal(cp.jumps, [-1, 4])

    assert rs.read_curve() is None
    rs.write_curve(
        np.array([0.0, 0.25]), np.array([10, 7]), eps=EPS, max_dim=3, n_points=10, digest="abc"
    )
    curve = rs.read_curve()
    assert np.array_equal(curve["values"], [0.0, 0.25]) and np.array_equal(curve["chi"], [10, 7])
    assert (curve["eps"], curve["max_dim"], curve["n_points"], curve["digest"]) == (
        EPS, 3, 10, "abc",
    )
    assert rs.clean_partials() == []


def test_empty_jump_table_round_trips(url):
    rs, *_ = make_store(url)
    empty_f, empty_i = np.empty(0), np.empty(0, dtype=np.int64)
    digest = rs.commit_task(0, "a", empty_f, empty_i, info={})
    assert digest == hashlib.sha256(b"").hexdigest()
    v, j = rs.read_jump_table(0)
    assert v.size == 0 and j.size == 0


def test_file_url_and_pickle(tmp_path):
    url = f"file://{tmp_path / 'run.zarr'}"
    rs, pts, *_ = make_store(url)
    again = pickle.loads(pickle.dumps(RunStore.open(url)))
    assert again.url == url and again.plan_digest == rs.plan_digest
    assert np.array_equal(again.read_rows(np.arange(10)), pts)


def test_describe_layout_names_the_task_range():
    text = describe_layout(1200)
    assert "task-000000..001199" in text and "commits/" in text


# ------------------------------------------------------------ create and open


def test_create_refuses_existing_store(url):
    make_store(url)
    with pytest.raises(StoreExists, match="already exists"):
        make_store(url)


def test_create_refuses_foreign_data(local):
    os.makedirs(local)
    Path(local, "notes.txt").write_text("mine")
    with pytest.raises(StoreExists, match="not a chitally run store"):
        make_store(local)
    assert Path(local, "notes.txt").read_text() == "mine"


def test_incomplete_store_is_detected_and_redone(local):
    make_store(local)
    os.remove(os.path.join(local, "created.json"))  # as if creation died before the end
    with pytest.raises(IncompleteStore, match="incomplete"):
        RunStore.open(local)
    rs, pts, *_ = make_store(local)
    assert np.array_equal(RunStore.open(local).read_rows(np.arange(10)), pts)


def test_open_refuses_what_is_not_a_store(tmp_path):
    with pytest.raises(NotAStore, match="no such directory"):
        RunStore.open(str(tmp_path / "nothing"))
    assert not (tmp_path / "nothing").exists()
    with pytest.raises(NotAStore, match="no zarr.json"):
        RunStore.open(f"memory://chitally-absent-{uuid.uuid4().hex}")
    zarr.create_group(str(tmp_path / "plain.zarr"))
    with pytest.raises(NotAStore, match="not a chitally run store"):
        RunStore.open(str(tmp_path / "plain.zarr"))


def test_check_matches_names_every_difference(url):
    rs, pts, *_ = make_store(url)
    rs.check_matches(params(), fingerprint(pts))
    rs.check_matches({**params(), "max_dim": 3.0}, fingerprint(pts))  # same after JSON

    other = {**params(), "eps": 0.5, "extra": True}
    other["task_cost"] = {"alpha": 2.0}
    fp = fingerprint(pts + 1.0)
    with pytest.raises(StoreMismatch) as err:
        rs.check_matches(other, fp)
    msg = str(err.value)
    assert "\n" not in msg
    assert f"params.eps: store {EPS!r}, given 0.5" in msg
    assert "params.extra: store <absent>, given true" in msg
    assert "params.task_cost.alpha: store 1.5, given 2.0" in msg
    old, new = fingerprint(pts)["sha256"], fp["sha256"]
    assert f'fingerprint.sha256: store "{old}", given "{new}"' in msg
    assert "fingerprint.shape" not in msg and "params.max_dim" not in msg


def test_open_and_check_leave_the_store_byte_identical(local):
    rs, pts, *_ = make_store(local)
    rs.commit_task(0, "a", *table(), info={})
    before = tree_hashes(local)
    again = RunStore.open(local)
    with pytest.raises(StoreMismatch):
        again.check_matches({**params(), "eps": 1.0}, fingerprint(pts[:5]))
    again.read_plan()
    again.read_cover()
    again.read_task_input(0)
    again.read_jump_table(0)
    again.committed()
    assert tree_hashes(local) == before


def test_fingerprint_is_chunkwise_and_dtype_aware():
    pts = np.random.default_rng(1).random((1000, 3))
    fp = fingerprint(pts)
    assert fp == {
        "shape": [1000, 3],
        "dtype": "float64",
        "sha256": hashlib.sha256(pts.astype("<f8").tobytes()).hexdigest(),
    }
    f32 = pts.astype(np.float32)
    fp32 = fingerprint(f32)
    assert fp32["dtype"] == "float32"
    assert fp32["sha256"] == fingerprint(f32.astype(np.float64))["sha256"]
    assert fingerprint(np.asfortranarray(pts)) == fp


# ---------------------------------------------------------------- commit protocol


def test_a_commit_touches_only_its_own_keys(local):
    rs, *_ = make_store(local)
    before = tree_hashes(local)
    rs.commit_task(1, "a", *table(), info={})
    after = tree_hashes(local)
    changed = {k for k in before.keys() | after.keys() if before.get(k) != after.get(k)}
    assert changed  # the task's arrays, its own group document and its commit record
    for key in changed:
        assert key.startswith("tables/task-000001/") or key == "commits/task-000001.json", key
    assert "tables/task-000001/values/c/0" in changed


def test_double_commit_same_digest_is_harmless(url):
    rs, *_ = make_store(url)
    d1 = rs.commit_task(0, "first", *table(), info={})
    d2 = rs.commit_task(0, "second", *table(), info={})
    assert d1 == d2
    assert rs.read_commit(0)["attempt"] == "first"


def test_different_digest_is_a_conflict_and_writes_nothing(url):
    rs, *_ = make_store(url)
    values, jumps = table()
    d1 = rs.commit_task(0, "first", values, jumps, info={})
    other = jumps.copy()
    other[0] += 1
    d2 = table_digest(values, other)
    with pytest.raises(CommitConflict) as err:
        rs.commit_task(0, "second", values, other, info={})
    assert "task 0" in str(err.value) and d1 in str(err.value) and d2 in str(err.value)
    v, j = rs.read_jump_table(0)
    assert np.array_equal(j, jumps)


def test_data_without_record_is_pending(url, monkeypatch):
    rs, *_ = make_store(url)

    def crash(*args, **kwargs):
        raise StoreError("simulated crash before the commit record")

    monkeypatch.setattr(rs, "_create_only", crash)
    with pytest.raises(StoreError, match="simulated"):
        rs.commit_task(2, "a", *table(), info={})
    monkeypatch.undo()
    assert rs.task_state(2) == "pending"
    assert not rs.committed()[2]
    with pytest.raises(CorruptTask, match="no commit record"):
        rs.read_jump_table(2)
    assert np.array_equal(rs.read_jump_table(2, verify=False)[0], table()[0])
    rs.commit_task(2, "b", *table(), info={})
    assert rs.task_state(2) == "done"


def test_truncated_table_is_corrupt_and_set_aside(url):
    rs, *_ = make_store(url)
    values, jumps = table()
    rs.commit_task(1, "a", values, jumps, info={})
    # Rewrite the array shorter behind the store's back.
    zarr.create_array(
        rs._store, name=f"{_table_path(1)}/values", data=values[:2], overwrite=True
    )
    with pytest.raises(CorruptTask, match="task 1: length mismatch: record says 3"):
        rs.read_jump_table(1)
    prefix = rs.set_aside(1)
    assert rs.task_state(1) == "pending" and not rs.committed()[1]
    kept = rs._get(f"{prefix}/{_commit_key(1)}")
    assert json.loads(kept)["attempt"] == "a"
    assert rs._get(f"{prefix}/{_table_path(1)}/jumps/zarr.json") is not None
    rs.commit_task(1, "b", values, jumps, info={})
    assert np.array_equal(rs.read_jump_table(1)[0], values)


def test_same_length_other_values_is_a_digest_mismatch(url):
    rs, *_ = make_store(url)
    values, jumps = table()
    rs.commit_task(0, "a", values, jumps, info={})
    arr = zarr.open_array(rs._store, path=f"{_table_path(0)}/jumps", mode="r+")
    arr[0] = 99
    with pytest.raises(CorruptTask, match="task 0: digest mismatch"):
        rs.read_jump_table(0)
    # A new attempt of the (deterministic) task repairs the data under the same record.
    rs.commit_task(0, "b", values, jumps, info={})
    assert np.array_equal(rs.read_jump_table(0)[1], jumps)


def test_missing_data_is_corrupt(url):
    rs, *_ = make_store(url)
    rs.commit_task(0, "a", *table(), info={})
    import zarr.core.sync as zs

    zs.sync(rs._store.delete_dir(_table_path(0)))
    with pytest.raises(CorruptTask, match="task 0: jump table missing"):
        rs.read_jump_table(0)


def test_byte_flip_on_disk_is_caught(local):
    rs, *_ = make_store(local)
    rs.commit_task(0, "a", *table(), info={})
    flip_byte(Path(local, _table_path(0), "values", "c", "0"))
    with pytest.raises(CorruptTask, match="task 0: jump table unreadable .*checksum"):
        rs.read_jump_table(0)
    rs.set_aside(0)
    assert rs.task_state(0) == "pending"
    assert not Path(local, _table_path(0)).exists()
    assert list(Path(local, "quarantine").glob("*/commits/task-000000.json"))


def test_writes_fail_with_context(url, monkeypatch):
    rs, *_ = make_store(url)

    async def broken_set(key, value):
        raise OSError("disk full")

    monkeypatch.setattr(rs._store, "set", broken_set)
    with pytest.raises(StoreError) as err:
        rs.record_failure(2, "boom", attempts=1)
    msg = str(err.value)
    assert "write failure record failed" in msg and "failures/task-000002.json" in msg
    assert "(task 2)" in msg and "disk full" in msg


def test_clean_partials(local):
    rs, *_ = make_store(local)
    left = Path(local, "tables", "task-000001", "values")
    left.mkdir(parents=True)
    (left / "0.3f2a.partial").write_bytes(b"half")
    assert rs.clean_partials() == ["tables/task-000001/values/0.3f2a.partial"]
    assert rs.clean_partials() == []


# --------------------------------------------------------------------- checkpoints


def write_generations(rs: RunStore, n: int) -> None:
    for g in range(n):
        ids = np.arange(g + 1)
        rs.write_checkpoint(g, ids, np.array([0.0, 0.5 + g]), np.array([-1, g]))


def test_checkpoint_falls_back_past_a_damaged_newest(local, caplog):
    rs, *_ = make_store(local)
    write_generations(rs, 3)
    cp = rs.latest_checkpoint()
    assert cp.generation == 2 and np.array_equal(cp.task_ids, [0, 1, 2])

    flip_byte(Path(local, _generation_path(2), "values", "c", "0"))
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        cp = rs.latest_checkpoint()
    assert cp.generation == 1 and cp.skipped == (2,)
    assert np.array_equal(cp.task_ids, [0, 1]) and np.array_equal(cp.values, [0.0, 1.5])
    assert "instead of damaged 2" in caplog.text

    # The reducer may write the damaged generation again; older ones stay refused.
    rs.write_checkpoint(2, np.arange(3), np.array([0.0]), np.array([7]))
    assert rs.latest_checkpoint().generation == 2
    with pytest.raises(StoreError, match="older than the current 2"):
        rs.write_checkpoint(1, np.arange(2), np.array([0.0]), np.array([7]))


def test_checkpoint_digest_and_pointer_damage(url):
    rs, *_ = make_store(url)
    assert rs.latest_checkpoint() is None
    write_generations(rs, 2)
    arr = zarr.open_array(rs._store, path=f"{_generation_path(1)}/jumps", mode="r+")
    arr[1] = 42
    cp = rs.latest_checkpoint()
    assert cp.generation == 0 and cp.skipped == (1,)
    rs._set("checkpoints/latest.json", b"{not json", what="damage pointer")
    assert rs.latest_checkpoint().generation == 0


def test_checkpoints_are_pruned(url):
    rs, *_ = make_store(url)
    write_generations(rs, 6)
    assert rs._generations() == [3, 4, 5]


# ------------------------------------------------------------------------- lease


def fake_lease(rs: RunStore, **fields) -> None:
    now = datetime.now(timezone.utc)
    rec = {
        "owner": "other",
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "started": now.isoformat(),
        "heartbeat": now.isoformat(),
        "token": "f" * 32,
        **fields,
    }
    rs._set("lease.json", json.dumps(rec).encode(), what="test lease")


def test_second_acquire_is_refused_with_the_holder_named(url):
    rs, *_ = make_store(url)
    lease = rs.acquire_lease("run-1")
    with pytest.raises(LeaseHeld) as err:
        RunStore.open(url).acquire_lease("run-2", takeover=True)
    msg = str(err.value)
    assert "run-1" in msg and socket.gethostname() in msg and f"pid {os.getpid()}" in msg
    assert re.search(r"heartbeat \d+ s ago", msg) and "\n" not in msg
    assert lease.held
    assert lease.release() is True
    assert not lease.held
    rs.acquire_lease("run-2").release()


def test_dead_process_on_this_host_is_taken_over(url, caplog):
    rs, *_ = make_store(url)
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    fake_lease(rs, owner="crashed", pid=int(proc.stdout))
    with caplog.at_level(logging.WARNING, logger="chitally.store"):
        lease = rs.acquire_lease("run-2")
    assert "taking over the lease of crashed" in caplog.text
    assert "its process is gone" in caplog.text
    assert lease.held and rs._lease_record()["owner"] == "run-2"


def test_stale_heartbeat_needs_takeover(url):
    rs, *_ = make_store(url)
    old = (datetime.now(timezone.utc) - timedelta(seconds=300)).isoformat()
    fake_lease(rs, owner="far", host="elsewhere", pid=1, heartbeat=old)
    held = r"far \(host elsewhere, pid 1, heartbeat 300 s ago\).*takeover=True"
    with pytest.raises(LeaseHeld, match=held):
        rs.acquire_lease("me", stale_after=60.0)
    lease = rs.acquire_lease("me", takeover=True, stale_after=60.0)
    assert lease.held


def test_fresh_lease_elsewhere_is_not_taken_over(url):
    rs, *_ = make_store(url)
    fake_lease(rs, owner="busy", host="elsewhere", pid=1)
    with pytest.raises(LeaseHeld, match="busy"):
        rs.acquire_lease("me", takeover=True)


def test_heartbeat_release_and_loss(url):
    rs, *_ = make_store(url)
    with rs.acquire_lease("run", stale_after=0.2) as lease:
        first = rs._lease_record()["heartbeat"]
        lease.stop()
        lease.heartbeat()
        assert rs._lease_record()["heartbeat"] > first
        lease.start(interval=0.01)
    assert rs._lease_record() is None

    lease = rs.acquire_lease("run")
    fake_lease(rs, owner="usurper")  # somebody took it over
    with pytest.raises(LeaseHeld, match="lost.*usurper"):
        lease.heartbeat()
    assert lease.release() is False
    assert rs._lease_record()["owner"] == "usurper"


def test_heartbeat_thread_beats(url):
    import time

    rs, *_ = make_store(url)
    lease = rs.acquire_lease("run")
    first = rs._lease_record()["heartbeat"]
    lease.start(interval=0.01)
    deadline = time.monotonic() + 5
    while rs._lease_record()["heartbeat"] == first and time.monotonic() < deadline:
        time.sleep(0.01)
    lease.release()
    assert lease.error is None
    assert rs._lease_record() is None
