"""The commit log: each task's named output arrays, proven by a create-only commit record.

A task attempt writes its arrays under its own prefix (no two tasks share a chunk),
reads them back, and only then creates its commit record (digest, dtypes, shapes). A
reader trusts a task's outputs only through that record; anything else is pending and is
computed again. Failure records and quarantine moves are the lease holder's: they pass
through the fence first.
"""

from __future__ import annotations

import logging
import re
import secrets
import socket
from collections.abc import Callable, Mapping, Sequence
from typing import Any, Literal

import numpy as np

from .errors import CommitConflict, CorruptTask
from .io import PARTIAL, StoreIO, arrays_digest, dumps, iso, jsonable, now

logger = logging.getLogger("chitally.store")

OUTPUTS = "outputs"
COMMITS = "commits"
FAILURES = "failures"
QUARANTINE = "quarantine"

_TASK_KEY = re.compile(r"task-(\d+)\.json$")


def _no_fence() -> None:
    pass


class CommitLog:
    """Task outputs and their commit records in one store.

    Parameters
    ----------
    io : StoreIO
    n_tasks : int
    outputs : sequence of (name, dtype)
        The arrays every task commits, in digest order (from the job kind).
    fence : callable, optional
        Called before each write only the lease holder may make (failure records,
        quarantine moves); raises when the lease is no longer ours.
    """

    def __init__(self, io: StoreIO, n_tasks: int, outputs: Sequence[tuple[str, str]],
                 fence: Callable[[], None] | None = None) -> None:
        self.io = io
        self.n_tasks = int(n_tasks)
        self.outputs = tuple((str(n), str(d)) for n, d in outputs)
        self.fence = fence or _no_fence

    # ------------------------------------------------------------------ keys

    @staticmethod
    def output_prefix(i: int) -> str:
        return f"{OUTPUTS}/task-{int(i):06d}"

    @staticmethod
    def commit_key(i: int) -> str:
        return f"{COMMITS}/task-{int(i):06d}.json"

    @staticmethod
    def failure_key(i: int) -> str:
        return f"{FAILURES}/task-{int(i):06d}.json"

    def _index(self, i: int) -> int:
        i = int(i)
        if not 0 <= i < self.n_tasks:
            raise IndexError(f"task {i} out of range: the store has {self.n_tasks} tasks")
        return i

    # ------------------------------------------------------------------ committing

    def _checked(self, i: int, arrays: Mapping[str, Any]) -> dict[str, np.ndarray]:
        names = [n for n, _ in self.outputs]
        if sorted(arrays) != sorted(names):
            raise ValueError(f"task {i}: outputs must be {names}, got {sorted(arrays)}")
        return {n: np.ascontiguousarray(arrays[n], dtype=np.dtype(d).newbyteorder("<"))
                for n, d in self.outputs}

    def commit(self, i: int, attempt: str, arrays: Mapping[str, Any], *,
               info: Mapping[str, Any] | None = None) -> str:
        """Write task `i`'s outputs, verify them, then commit them create-only.

        Returns the outputs' digest. A task already committed with the same digest is
        left as it is (its data rewritten if it was found damaged); a different digest
        raises `CommitConflict` and writes nothing.
        """
        i = self._index(i)
        data = self._checked(i, arrays)
        digest = arrays_digest(data)
        existing = self.record(i)
        if existing is not None:
            self._check_same(i, existing, digest)
            try:
                self.read(i)
            except CorruptTask as exc:
                logger.warning("task %d: rewriting its committed outputs (%s)", i, exc)
                self.io.write_verified(self.output_prefix(i), data, what="write task outputs",
                                       task=i, attempt=attempt)
            return digest
        self.io.write_verified(self.output_prefix(i), data, what="write task outputs", task=i,
                               attempt=attempt)
        record = {
            "host": socket.gethostname(),
            **jsonable(dict(info or {}), "info"),
            "task": i,
            "attempt": str(attempt),
            "digest": digest,
            # each array's own digest too, so a reader that needs only some of them
            # (a fold of summaries beside large data) verifies what it reads
            "digests": {n: arrays_digest({n: a}) for n, a in data.items()},
            "outputs": {n: {"dtype": a.dtype.str, "shape": list(a.shape)} for n, a in data.items()},
            "committed": iso(),
        }
        if not self.io.create_only(self.commit_key(i), dumps(record), what="write commit record",
                                   task=i):
            # Another attempt committed first; a deterministic task agrees with it.
            self._check_same(i, self.record(i), digest)
        if self.io.exists(self.failure_key(i)):
            self.io.delete(self.failure_key(i), what="clear failure record", task=i)
        return digest

    def _check_same(self, i: int, record: dict[str, Any] | None, digest: str) -> None:
        theirs = None if record is None else record.get("digest")
        if theirs != digest:
            raise CommitConflict(
                f"task {i} is already committed with digest {theirs} (attempt "
                f"{None if record is None else record.get('attempt')}); this attempt's "
                f"digest is {digest}")

    # ------------------------------------------------------------------ reading

    def record(self, i: int) -> dict[str, Any] | None:
        """Task `i`'s commit record, None if it is not committed; `CorruptTask` if the
        record is damaged."""
        key = self.commit_key(self._index(i))
        try:
            rec = self.io.get_json(key)
        except ValueError as exc:
            raise CorruptTask(f"task {i}: commit record {key!r} is not JSON ({exc})") from exc
        if rec is not None and not (isinstance(rec, dict) and {"digest", "outputs"} <= rec.keys()):
            raise CorruptTask(f"task {i}: commit record {key!r} lacks its digest or outputs")
        return rec

    def read(self, i: int, names: Sequence[str] | None = None) -> dict[str, np.ndarray]:
        """Task `i`'s outputs (or only those in `names`), proven by its commit record.

        Raises `CorruptTask`: no record, data missing or unreadable, wrong dtype, shape
        or digest.
        """
        i = self._index(i)
        record = self.record(i)
        if record is None:
            raise CorruptTask(f"task {i}: no commit record (the task is pending)")
        digests = record.get("digests")
        if names is not None and isinstance(digests, dict) and set(names) <= digests.keys():
            return self._read_some(i, list(names), digests)
        names = [n for n, _ in self.outputs]
        try:
            data = self.io.read_arrays(self.output_prefix(i), names, task=i)
        except CorruptTask as exc:
            raise CorruptTask(f"task {i}: {exc}") from exc
        found = arrays_digest(data)
        if found != record["digest"]:
            raise CorruptTask(f"task {i}: outputs do not match the commit record "
                              f"(digest {found[:12]}, recorded {str(record['digest'])[:12]})")
        return data

    def _read_some(self, i: int, names: list[str], digests: Mapping[str, Any]) -> dict[str, np.ndarray]:
        try:
            data = self.io.read_arrays(self.output_prefix(i), names, task=i)
        except CorruptTask as exc:
            raise CorruptTask(f"task {i}: {exc}") from exc
        for name, arr in data.items():
            if arrays_digest({name: arr}) != digests[name]:
                raise CorruptTask(f"task {i}: output {name!r} does not match its commit record")
        return data

    def read_rows(self, i: int, name: str, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of task `i`'s committed output `name`, without reading the
        rest: large outputs are stored in row chunks, each with its own checksum, so a
        damaged chunk raises `CorruptTask` here (the whole array's digest is checked by
        the commit and by whoever reads it whole)."""
        i = self._index(i)
        return self.io.read_rows(f"{self.output_prefix(i)}/{name}", int(start), int(stop), task=i)

    def verified_record(self, i: int) -> dict[str, Any] | None:
        """The commit record if the outputs match it, else None (damaged or pending)."""
        try:
            record = self.record(i)
            if record is not None:
                self.read(i)
            return record
        except CorruptTask:
            return None

    def committed(self) -> np.ndarray:
        """Which tasks have a commit record, from one listing (records not verified)."""
        done = np.zeros(self.n_tasks, dtype=bool)
        for key in self.io.list(f"{COMMITS}/"):
            match = _TASK_KEY.search(key)
            if match is None:
                continue
            i = int(match.group(1))
            if i < self.n_tasks:
                done[i] = True
            else:
                logger.warning("%s: commit record %r names no task of this plan", self.io.url, key)
        return done

    def state(self, i: int) -> Literal["done", "pending", "failed"]:
        """'done' if committed (not verified here), 'failed' if a failure is recorded."""
        i = self._index(i)
        if self.io.exists(self.commit_key(i)):
            return "done"
        if self.io.exists(self.failure_key(i)):
            return "failed"
        return "pending"

    # ------------------------------------------------------------------ the holder's writes

    def set_aside(self, i: int) -> str:
        """Make task `i` pending again, keeping a copy of its record and outputs under
        ``quarantine/<UTC stamp>/``. The record goes before the data, so a crash half-way
        leaves the task pending, never trusted. Returns the quarantine prefix."""
        i = self._index(i)
        self.fence()
        stamp = now().strftime("%Y%m%dT%H%M%S%fZ") + f"-{secrets.token_hex(3)}"
        prefix = f"{QUARANTINE}/{stamp}"
        for key in [self.commit_key(i)] + self.io.list(f"{self.output_prefix(i)}/"):
            data = self.io.get(key)
            if data is not None and not key.endswith(PARTIAL):
                self.io.set(f"{prefix}/{key}", data, what="quarantine copy", task=i)
        self.fence()
        self.io.delete(self.commit_key(i), what="remove commit record", task=i)
        self.io.delete_dir(self.output_prefix(i), what="remove task outputs", task=i)
        logger.warning("task %d set aside to %s/%s; it is pending again", i, self.io.url, prefix)
        return prefix

    def record_failure(self, i: int, message: str, attempts: int) -> None:
        """Record that task `i` failed `attempts` times, the last with `message`."""
        i = self._index(i)
        self.fence()
        record = {"task": i, "message": str(message), "attempts": int(attempts), "time": iso(),
                  "host": socket.gethostname()}
        self.io.set(self.failure_key(i), dumps(record), what="write failure record", task=i)

    def failures(self) -> dict[int, dict[str, Any]]:
        """Every recorded failure, by task (an unreadable record says so)."""
        out: dict[int, dict[str, Any]] = {}
        for key in self.io.list(f"{FAILURES}/"):
            match = _TASK_KEY.search(key)
            if match is None:
                continue
            try:
                rec = self.io.get_json(key)
            except ValueError:
                rec = {"message": f"unreadable failure record {key!r}"}
            if rec is not None:
                out[int(match.group(1))] = rec
        return dict(sorted(out.items()))

    def clear_failure(self, i: int) -> None:
        """Forget task `i`'s failure record (absent is fine)."""
        i = self._index(i)
        self.fence()
        self.io.delete(self.failure_key(i), what="clear failure record", task=i)
