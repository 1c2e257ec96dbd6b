"""Long compiled loops cut into short calls, so that Ctrl-C is seen within a second.

A numba call that releases the GIL runs to its end before the interpreter looks at a
pending signal: one call over a whole halo makes KeyboardInterrupt wait for all of it.
The drivers here call the compiled code once per block of consecutive items (rows,
edges, tree nodes) sized to take about `BLOCK_SECONDS`; the interpreter raises a pending
KeyboardInterrupt between two blocks. Block sizes follow the measured rate, so a block
costs one dispatch (microseconds) against tens of milliseconds of work, and a small
problem is one block.

With several threads the main thread takes blocks too (signals are only handled there)
and the helpers stop at their next block once anything fails or is interrupted. Blocks
write disjoint output, so the result does not depend on the blocking.

No numba, no Dask, no Zarr here: callables in, calls out.
"""

from __future__ import annotations

import contextlib
import contextvars
import threading
import time
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np

# the time one block aims at: far below the one second Ctrl-C may take, far above the
# cost of one call
BLOCK_SECONDS = 0.05

# a block never grows by more than this factor on the previous one's rate
_GROWTH = 8.0

# set by whole_calls: one block per thread
_WHOLE = contextvars.ContextVar("chitally_whole_calls", default=False)


@contextlib.contextmanager
def whole_calls(enabled: bool = True) -> Iterator[None]:
    """Within this context (in this thread), `run_blocks` gives each thread one block:
    one compiled call per loop, as if there were no blocks (to measure what they cost).
    A KeyboardInterrupt then waits for the end of the loop."""
    token = _WHOLE.set(enabled)
    try:
        yield
    finally:
        _WHOLE.reset(token)


class Pacer:
    """Block sizes, in units of work, that take about `seconds` each (default
    `BLOCK_SECONDS`).

    The first block is `first` units; every later one is sized from the rate of the
    blocks measured so far (at most `_GROWTH` times the previous size), so that a cheap
    problem reaches full blocks in a few steps and a costly one never runs a long block.
    Safe to share between threads.
    """

    def __init__(self, first: float, seconds: float | None = None) -> None:
        self.budget = max(1.0, float(first))
        self.seconds = BLOCK_SECONDS if seconds is None else seconds
        self._lock = threading.Lock()

    def observe(self, work: float, elapsed: float) -> None:
        """Record that `work` units took `elapsed` seconds."""
        if work <= 0:
            return
        with self._lock:
            if elapsed <= 0.0:
                self.budget = max(self.budget, work * _GROWTH)
            else:
                self.budget = max(1.0, work * min(_GROWTH, self.seconds / elapsed))


def run_blocks(
    lo: int,
    hi: int,
    call: Callable[..., Any],
    pacer: Pacer,
    *,
    weights: np.ndarray | None = None,
    unit: float = 1.0,
    threads: int = 1,
    state: Callable[[], Any] | None = None,
) -> list[Any]:
    """Call ``call(a, b[, s])`` on consecutive blocks [a, b) covering [lo, hi).

    Parameters
    ----------
    lo, hi : int
        The items to cover.
    call : callable
        ``call(a, b)``, or ``call(a, b, s)`` with the calling thread's state s.
    pacer : Pacer
        Sizes the blocks, in units of work; may be shared by several calls so that a
        later loop starts at the rate an earlier one measured.
    weights : float64 array of hi - lo + 1, optional
        Cumulative work: items [a, b) cost ``weights[b - lo] - weights[a - lo]`` units.
        Default: every item costs `unit`.
    threads : int
        Threads taking blocks (the main thread is one of them); helpers start only if
        work remains after the first block.
    state : callable, optional
        Makes a thread's state (a workspace) when it takes its first block.

    Returns
    -------
    list
        The states made, one per thread that took a block.
    """
    if hi <= lo:
        return []
    if weights is not None and weights.shape[0] != hi - lo + 1:
        raise ValueError("weights must hold hi - lo + 1 cumulative values")
    total = (hi - lo) * unit if weights is None else float(weights[-1] - weights[0])
    if total <= pacer.budget:  # one block: none of the bookkeeping below
        if state is None:
            call(lo, hi)
            return []
        s = state()
        call(lo, hi, s)
        return [s]
    threads = max(1, int(threads))
    queue = _Queue(lo, hi, pacer, weights, unit, threads if _WHOLE.get() else 0)
    states: list[Any] = []
    failures: list[BaseException] = []
    stop = threading.Event()

    def work(first_block: tuple[int, int] | None = None) -> None:
        made = None  # [this thread's state] once made
        block = first_block
        while not stop.is_set():
            if block is None:
                block = queue.take()
                if block is None:
                    return
            if made is None and state is not None:
                made = [state()]
                with queue.lock:
                    states.append(made[0])
            a, b = block
            t0 = time.perf_counter()
            if made is None:
                call(a, b)
            else:
                call(a, b, made[0])
            pacer.observe(queue.cost(a, b), time.perf_counter() - t0)
            block = None

    def helper() -> None:
        try:
            work()
        except BaseException as exc:  # noqa: BLE001 - re-raised in the main thread
            failures.append(exc)
            stop.set()

    first = queue.take()
    helpers: list[threading.Thread] = []
    try:
        if threads > 1 and not queue.empty():
            # daemon threads: a second Ctrl-C during the join below leaves at once
            helpers = [threading.Thread(target=helper, daemon=True) for _ in range(threads - 1)]
            for t in helpers:
                t.start()
        work(first)
    finally:
        stop.set()
        for t in helpers:
            t.join()
    if failures:
        raise failures[0]
    return states


class _Queue:
    """The next block of items, under a lock."""

    def __init__(self, lo: int, hi: int, pacer: Pacer, weights: np.ndarray | None, unit: float,
                 whole: int) -> None:
        self.lock = threading.Lock()
        self.lo = lo
        self.next = lo
        self.hi = hi
        self.pacer = pacer
        self.weights = weights
        self.unit = unit
        # whole = k > 0: k blocks of equal cost, one per thread, whatever the pacer says
        self.whole = whole
        if whole:
            self.total = self.cost(lo, hi)

    def cost(self, a: int, b: int) -> float:
        if self.weights is None:
            return (b - a) * self.unit
        return float(self.weights[b - self.lo] - self.weights[a - self.lo])

    def empty(self) -> bool:
        with self.lock:
            return self.next >= self.hi

    def take(self) -> tuple[int, int] | None:
        with self.lock:
            a = self.next
            if a >= self.hi:
                return None
            if self.weights is None:
                if self.whole:
                    size = -(-(self.hi - self.lo) // self.whole)
                else:
                    size = max(1, int(self.pacer.budget / self.unit))
                b = min(self.hi, a + size)
            else:
                # a share of the whole, a hair over so that rounding cannot add a block
                budget = self.total / self.whole * (1.0 + 1e-9) if self.whole else self.pacer.budget
                w = self.weights
                goal = w[a - self.lo] + budget
                # the last item whose cumulative cost stays within the budget, and at
                # least one item
                b = self.lo + int(np.searchsorted(w, goal, side="right")) - 1
                b = min(self.hi, max(a + 1, b))
            self.next = b
            return a, b
