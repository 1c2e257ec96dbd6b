"""The checkpointed reducer: committed jump tables in, one exact curve out.

The reducer keeps a running jump table and the set of tasks it covers. It adds a task
only after reading its table back from the store verified against the commit record,
writes a new checkpoint generation every so often (the generation lists the tasks it
covers, so no task is summed twice), and on resume starts from the newest valid
generation. A task whose stored output turns out damaged is set aside and reported as
pending, to be computed again.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterable

import numpy as np

from .curve import Curve, merge_jumps
from .store import CorruptTask, RunStore

logger = logging.getLogger(__name__)


class Reducer:
    """Sums verified jump tables into one curve with resumable checkpoints.

    Parameters
    ----------
    store : RunStore
    every_tasks, every_seconds : int, float
        A checkpoint is written after this many newly added tasks or this many seconds,
        whichever comes first (and always at the end).
    """

    def __init__(self, store: RunStore, *, every_tasks: int = 256, every_seconds: float = 30.0) -> None:
        self.store = store
        self.every_tasks = every_tasks
        self.every_seconds = every_seconds
        self.covered = np.zeros(store.n_tasks, dtype=bool)
        self.values = np.zeros(0, dtype=np.float64)
        self.jumps = np.zeros(0, dtype=np.int64)
        self.generation = 0
        self._pending_values: list[np.ndarray] = []
        self._pending_jumps: list[np.ndarray] = []
        self._pending_tasks: list[int] = []
        self._last_checkpoint = time.monotonic()
        self.skipped_generations: tuple[int, ...] = ()
        self._highest_seen = 0
        checkpoint = store.latest_checkpoint()
        if checkpoint is not None:
            self.generation = checkpoint.generation
            # damaged newer generations keep their numbers: the next one goes above them all
            self._highest_seen = max((checkpoint.generation, *checkpoint.skipped))
            self.covered[np.asarray(checkpoint.task_ids, dtype=np.int64)] = True
            self.values = np.asarray(checkpoint.values, dtype=np.float64)
            self.jumps = np.asarray(checkpoint.jumps, dtype=np.int64)
            self.skipped_generations = tuple(checkpoint.skipped)

    @property
    def n_covered(self) -> int:
        return int(self.covered.sum()) + len(self._pending_tasks)

    def is_covered(self, task: int) -> bool:
        return bool(self.covered[task]) or task in self._pending_tasks

    def add(self, task: int) -> bool:
        """Add a committed task's table; False (and the task set aside) if it is damaged."""
        if self.is_covered(task):
            return True
        try:
            values, jumps = self.store.read_jump_table(task, verify=True)
        except CorruptTask as exc:
            logger.warning("%s; setting it aside to be computed again", exc)
            self.store.set_aside(task)
            return False
        self._pending_values.append(values)
        self._pending_jumps.append(jumps)
        self._pending_tasks.append(task)
        if (len(self._pending_tasks) >= self.every_tasks
                or time.monotonic() - self._last_checkpoint >= self.every_seconds):
            self.checkpoint()
        return True

    def add_committed(self, tasks: Iterable[int] | None = None) -> list[int]:
        """Add every committed task not yet covered; returns the tasks set aside."""
        committed = self.store.committed()
        candidates = np.flatnonzero(committed & ~self.covered) if tasks is None else tasks
        return [int(t) for t in candidates if not self.add(int(t))]

    def checkpoint(self) -> None:
        """Fold the added tables into the running sum and write a new generation."""
        if not self._pending_tasks:
            return
        self.values, self.jumps = merge_jumps(
            [self.values, *self._pending_values], [self.jumps, *self._pending_jumps]
        )
        self.covered[np.asarray(self._pending_tasks, dtype=np.int64)] = True
        self._pending_values.clear()
        self._pending_jumps.clear()
        self._pending_tasks.clear()
        self.generation = max(self.generation, self._highest_seen) + 1
        self.store.write_checkpoint(self.generation, np.flatnonzero(self.covered), self.values, self.jumps)
        self._last_checkpoint = time.monotonic()

    @property
    def complete(self) -> bool:
        return self.n_covered == self.store.n_tasks

    def finish(self) -> Curve:
        """Write the final curve once every task is covered exactly once."""
        self.checkpoint()
        if not self.covered.all():
            missing = np.flatnonzero(~self.covered)
            raise RuntimeError(f"{missing.size} tasks are not reduced yet (first: {missing[:5].tolist()})")
        params = self.store.params
        curve = Curve.from_jumps(
            self.values, self.jumps, eps=float(params["eps"]), max_dim=params["max_dim"],
            n_points=self.store.n_points,
        )
        self.store.write_curve(curve.values, curve.chi, eps=curve.eps, max_dim=curve.max_dim,
                               n_points=curve.n_points, digest=curve.digest())
        return curve
