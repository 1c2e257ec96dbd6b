"""Reducer checkpoints: generations of a fold's state behind one pointer.

A generation holds the fold's state arrays and the ids of the tasks folded into it, so
no task is folded twice. It is written and verified first; its record, then the pointer,
come after, each passing the lease holder's fence. A reader takes the newest valid
generation the pointer allows, falling back past damaged ones.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple

import numpy as np

from .errors import StoreError
from .io import StoreIO, arrays_digest, dumps, iso, one_line

logger = logging.getLogger("chitally.store")

CHECKPOINTS = "checkpoints"
POINTER = f"{CHECKPOINTS}/latest.json"
#: Generations kept: enough to fall back past one damaged write.
KEEP = 3
_GENERATION_KEY = re.compile(r"gen-(\d+)/(record\.json$)?")


class Checkpoint(NamedTuple):
    """A verified checkpoint: its generation, the tasks folded in, the fold's state
    arrays, and newer generations that were damaged and passed over."""

    generation: int
    task_ids: np.ndarray
    state: dict[str, np.ndarray]
    skipped: tuple[int, ...]


def _path(g: int) -> str:
    return f"{CHECKPOINTS}/gen-{int(g):06d}"


class Checkpoints:
    """The checkpoint generations of one store."""

    def __init__(self, io: StoreIO, fence: Callable[[], None] | None = None) -> None:
        self.io = io
        self.fence = fence or (lambda: None)

    def pointer(self) -> int | None:
        try:
            doc = self.io.get_json(POINTER)
            return None if doc is None else int(doc["generation"])
        except (ValueError, KeyError, TypeError):
            logger.warning("%s: checkpoint pointer is damaged; scanning generations", self.io.url)
            return None

    def write(self, generation: int, task_ids: np.ndarray, state: Mapping[str, np.ndarray],
              *, keep: int = KEEP) -> None:
        """Write `generation`, then point at it and prune older generations."""
        generation = int(generation)
        current = self.pointer()
        if generation < 0 or (current is not None and generation < current):
            raise StoreError(f"checkpoint generation {generation} is older than the current "
                             f"{current} in {self.io.url}")
        arrays = {"task_ids": np.asarray(task_ids, dtype=np.int64), **state}
        base = _path(generation)
        self.fence()
        self.io.delete(f"{base}/record.json", what="remove old checkpoint record")
        digest = self.io.write_verified(base, arrays, what=f"write checkpoint {generation}")
        record = {"generation": generation, "digest": digest, "names": list(arrays),
                  "n_task_ids": int(arrays["task_ids"].size), "written": iso()}
        self.fence()
        self.io.set(f"{base}/record.json", dumps(record), what="write checkpoint record")
        self.fence()
        self.io.set(POINTER, dumps({"generation": generation, "written": iso()}),
                    what="move checkpoint pointer")
        older = sorted((g for g in self.generations(recorded=False) if g < generation), reverse=True)
        for g in older[max(keep, 2) - 1:]:
            self.io.delete_dir(_path(g), what="prune checkpoint")

    def generations(self, *, recorded: bool = True) -> list[int]:
        """Generations present (only those with a record unless `recorded` is False)."""
        found = set()
        for key in self.io.list(f"{CHECKPOINTS}/"):
            m = _GENERATION_KEY.search(key)
            if m is not None and (m.group(2) or not recorded):
                found.add(int(m.group(1)))
        return sorted(found)

    def load(self, g: int) -> dict[str, np.ndarray] | None:
        """Generation `g`'s arrays if they match their record, else None (with a log)."""
        base = _path(g)
        try:
            record = self.io.get_json(f"{base}/record.json")
            if not isinstance(record, dict):
                raise ValueError("no record")
            arrays = self.io.read_arrays(base, list(record["names"]))
            if arrays_digest(arrays) != record["digest"]:
                raise ValueError("digest mismatch")
        except Exception as exc:
            logger.warning("%s: checkpoint generation %d is damaged: %s", self.io.url, g, one_line(exc))
            return None
        return arrays

    def latest(self) -> Checkpoint | None:
        """The newest valid checkpoint, falling back past damaged generations."""
        pointer = self.pointer()
        generations = self.generations()
        if pointer is not None:
            # A generation beyond the pointer was never published: ignore it.
            generations = [g for g in generations if g <= pointer]
            if pointer not in generations:
                generations.append(pointer)
        skipped: list[int] = []
        for g in sorted(generations, reverse=True):
            loaded = self.load(g)
            if loaded is not None:
                if skipped:
                    logger.warning("%s: using checkpoint generation %d instead of damaged %s",
                                   self.io.url, g, ", ".join(map(str, skipped)))
                task_ids = loaded.pop("task_ids")
                return Checkpoint(g, task_ids, loaded, tuple(skipped))
            skipped.append(g)
        if skipped:
            logger.warning("%s: no valid checkpoint (damaged: %s)", self.io.url, skipped)
        return None

    def describe(self) -> dict[str, Any]:
        return {"pointer": self.pointer(), "generations": self.generations()}
