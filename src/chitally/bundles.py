"""Task bundles: which engine tasks the Dask executor sends to a worker together.

A Dask task costs the driver, the scheduler and a worker a few milliseconds of messages
whatever it computes, more than a small engine task takes. So the executor sends the
small ones several at a time: a *bundle* is consecutive tasks of the queue that a
worker runs one after the other, each committed on its own (a bundle lost with its
worker is run again, and every task it had already committed returns at once).

How many tasks make a bundle follows from the tasks' estimated costs (the kind's
``tasks/cost``, in its own units) and what finished tasks measured: the seconds of the
task function per unit of cost, and the seconds each task spent in the engine beside
it (reading its inputs, committing). A bundle closes when its estimate would pass
`target` seconds, so a heavy task stays alone and cheap ones travel together; until a
task has finished there is nothing to go by, and every bundle is one task. A bundle
never holds more than a share of what is left (`spread`), so the last bundles still
keep every worker busy. Pure: no Dask, no store.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Sequence

import numpy as np

#: Most tasks in one bundle: progress still moves every few hundred tasks when the
#: estimates say a task costs nothing at all.
MAX_TASKS = 256

#: Weight left to what was measured before each new task: the estimates follow the last
#: few dozen tasks, so a slow first call (a worker loading its compiled kernels) fades.
DECAY = 0.9


class Bundler:
    """Cuts a queue of task ids into bundles.

    Parameters
    ----------
    cost : array of shape (n_tasks,)
        Each task's estimated cost (the store's ``task_cost()``).
    target : float
        Estimated seconds a bundle should reach; 0 sends every task alone.
    size : int, optional
        A fixed number of tasks per bundle instead (the last one may hold fewer).
    max_tasks : int
        At most this many tasks per bundle.
    decay : float
        Weight of the earlier measurements at each new one (1: all count alike).
    """

    def __init__(self, cost: Sequence[float] | np.ndarray, target: float, *, size: int | None = None,
                 max_tasks: int = MAX_TASKS, decay: float = DECAY) -> None:
        if target < 0 or math.isnan(target):
            raise ValueError(f"bundle target {target!r}: seconds must be 0 or more")
        if size is not None and size < 1:
            raise ValueError(f"bundle size {size!r}: at least one task")
        self.cost = np.asarray(cost, dtype=np.float64)
        self.target = float(target)
        self.size = size
        self.max_tasks = max(1, int(max_tasks))
        self.decay = float(decay)
        self._cost_seen = 0.0
        self._compute = 0.0
        self._engine = 0.0
        self._seen = 0.0  # tasks measured, weighted as the sums are

    def observe(self, task: int, seconds: float, wall: float) -> None:
        """A task finished: `seconds` in its task function, `wall` in the engine in all
        (reads and commit included). Tasks found committed already tell nothing."""
        d = self.decay
        self._cost_seen = d * self._cost_seen + float(self.cost[task])
        self._compute = d * self._compute + max(float(seconds), 0.0)
        self._engine = d * self._engine + max(float(wall) - float(seconds), 0.0)
        self._seen = d * self._seen + 1.0

    def estimate(self, task: int) -> float | None:
        """Estimated seconds of `task` on a worker, None before any task finished."""
        if not self._seen:
            return None
        per_task = self._engine / self._seen
        if self._cost_seen > 0:
            return per_task + self._compute * float(self.cost[task]) / self._cost_seen
        return per_task + self._compute / self._seen

    def take(self, queue: deque[int], spread: int = 1) -> list[int]:
        """The next bundle, taken from the front of `queue` (not empty); at most
        ``ceil(len(queue) / spread)`` tasks."""
        first = queue.popleft()
        bundle = [first]
        if self.size is not None:
            limit = self.size
        else:
            limit = min(self.max_tasks, math.ceil((len(queue) + 1) / max(1, spread)))
            if self.target <= 0 or self.estimate(first) is None:
                return bundle
        total = self.estimate(first) or 0.0
        while queue and len(bundle) < limit:
            if self.size is None:
                more = self.estimate(queue[0]) or 0.0
                if total + more > self.target:
                    break
                total += more
            bundle.append(queue.popleft())
        return bundle
