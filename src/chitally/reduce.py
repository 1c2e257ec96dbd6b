"""The checkpointed reducer: verified task outputs in, a job kind's result out.

The reducer keeps the kind's fold state and the set of tasks it covers. It adds a task
only after reading its outputs back verified against the commit record, writes a new
checkpoint generation every so often (the generation lists the tasks it covers, so no
task is folded twice), and on resume starts from the newest valid generation. A task
whose stored outputs turn out damaged is set aside and reported, to be computed again.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterable, Mapping

import numpy as np

from .jobs import kind_of
from .jobs.kind import Fold
from .store import CorruptTask, RunStore

logger = logging.getLogger(__name__)


class Reducer:
    """Folds verified task outputs into a kind's result, with resumable checkpoints.

    Parameters
    ----------
    store : RunStore
    every_tasks, every_seconds : int, float
        A checkpoint is written after this many newly added tasks or this many seconds,
        whichever comes first (and always at the end).
    fold_bytes : int
        Outputs waiting for the next checkpoint are folded into the state once they hold
        this many bytes: the driver's memory stays bounded by the state, not by the
        outputs of every task finished since the last checkpoint (a hundred blocks'
        cell tables of a large cloud hold gigabytes).
    """

    def __init__(self, store: RunStore, *, every_tasks: int = 256, every_seconds: float = 30.0,
                 fold_bytes: int = 64 << 20) -> None:
        self.store = store
        kind = kind_of(store.kind)
        self.fold: Fold = kind.make_fold(store)
        self._reads = kind.fold_reads
        self.every_tasks = every_tasks
        self.every_seconds = every_seconds
        self.fold_bytes = int(fold_bytes)
        self.covered = np.zeros(store.n_tasks, dtype=bool)
        # folded into the state, not yet in a checkpoint: a crash loses them from the
        # state, and resuming adds them again from their committed outputs
        self._folded = np.zeros(store.n_tasks, dtype=bool)
        self._n_folded = 0
        self.generation = 0
        self._pending: dict[int, Mapping[str, np.ndarray]] = {}
        self._pending_bytes = 0
        self._last_checkpoint = time.monotonic()
        self._highest_seen = 0
        self.skipped_generations: tuple[int, ...] = ()
        checkpoint = store.checkpoints.latest()
        if checkpoint is not None:
            self.generation = checkpoint.generation
            # damaged newer generations keep their numbers: the next one goes above them all
            self._highest_seen = max((checkpoint.generation, *checkpoint.skipped))
            self.covered[np.asarray(checkpoint.task_ids, dtype=np.int64)] = True
            self.fold.restore(checkpoint.state)
            self.skipped_generations = tuple(checkpoint.skipped)

    @property
    def n_covered(self) -> int:
        return int(self.covered.sum()) + self._n_folded + len(self._pending)

    def is_covered(self, task: int) -> bool:
        return bool(self.covered[task]) or bool(self._folded[task]) or task in self._pending

    def add(self, task: int) -> bool:
        """Add a committed task's outputs; False (and the task set aside) if damaged."""
        if self.is_covered(task):
            return True
        try:
            outputs = self.store.commits.read(task, self._reads)
        except CorruptTask as exc:
            logger.warning("%s; setting it aside to be computed again", exc)
            self.store.commits.set_aside(task)
            return False
        self._pending[int(task)] = outputs
        self._pending_bytes += sum(np.asarray(a).nbytes for a in outputs.values())
        if (len(self._pending) + self._n_folded >= self.every_tasks
                or time.monotonic() - self._last_checkpoint >= self.every_seconds):
            self.checkpoint()
        elif self._pending_bytes >= self.fold_bytes:
            self._fold_pending()
        return True

    def add_committed(self, tasks: Iterable[int] | None = None) -> list[int]:
        """Add every committed task not yet covered; returns the tasks set aside."""
        if tasks is None:
            tasks = np.flatnonzero(self.store.commits.committed() & ~self.covered & ~self._folded)
        return [int(t) for t in tasks if not self.add(int(t))]

    def _fold_pending(self) -> None:
        if not self._pending:
            return
        tasks = sorted(self._pending)
        self.fold.add(tasks, [self._pending[t] for t in tasks])
        self._folded[np.asarray(tasks, dtype=np.int64)] = True
        self._n_folded += len(tasks)
        self._pending.clear()
        self._pending_bytes = 0

    def checkpoint(self) -> None:
        """Fold the added outputs into the state and write a new generation."""
        self._fold_pending()
        if not self._n_folded:
            return
        self.covered |= self._folded
        self._folded[:] = False
        self._n_folded = 0
        self.generation = max(self.generation, self._highest_seen) + 1
        self.store.checkpoints.write(self.generation, np.flatnonzero(self.covered), self.fold.state())
        self._last_checkpoint = time.monotonic()

    @property
    def complete(self) -> bool:
        return self.n_covered == self.store.n_tasks

    def finish(self) -> None:
        """Write the kind's result once every task is covered exactly once."""
        self.checkpoint()
        if not self.covered.all():
            missing = np.flatnonzero(~self.covered)
            raise RuntimeError(f"{missing.size} tasks are not reduced yet (first: {missing[:5].tolist()})")
        arrays, record = self.fold.result()
        self.store.write_result(arrays, record)
