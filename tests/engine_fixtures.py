"""Small helpers shared by the engine's unit tests (test_store, test_reduce, test_execute):
damaging files of a local run store on disk, hashing a store's tree, bounded polling, and
the environment of a child Python process that must import this chitally."""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

import chitally

T = TypeVar("T")

#: The folder holding the chitally package under test (first on a child's path).
SRC = str(Path(chitally.__file__).resolve().parents[1])


def flip_byte(path: Path, offset: int | None = None) -> None:
    """Flip bits of one byte of `path` (the middle one by default): a chunk's crc32c
    then fails, a JSON document no longer parses or says something else."""
    raw = bytearray(Path(path).read_bytes())
    at = len(raw) // 2 if offset is None else offset
    raw[at] ^= 0x5A
    Path(path).write_bytes(bytes(raw))


def truncate(path: Path, keep: int | None = None) -> None:
    """Cut `path` to its first `keep` bytes (half by default), as a torn write leaves it."""
    raw = Path(path).read_bytes()
    Path(path).write_bytes(raw[: len(raw) // 2 if keep is None else keep])


def tree_hashes(root: str | Path) -> dict[str, str]:
    """sha256 of every file under `root`, by relative path."""
    out = {}
    for dirpath, _, files in os.walk(root):
        for name in files:
            p = os.path.join(dirpath, name)
            out[os.path.relpath(p, root)] = hashlib.sha256(Path(p).read_bytes()).hexdigest()
    return out


def wait_for(condition: Callable[[], T], timeout: float, what: str, interval: float = 0.01) -> T:
    """Poll `condition` until it returns something truthy (returned); AssertionError
    naming `what` after `timeout` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(interval)


def child_env() -> dict[str, str]:
    """The environment of a child Python process importing the chitally under test."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([SRC, *filter(None, [env.get("PYTHONPATH")])])
    return env
