"""Job kinds: what the engine runs, as frozen data.

A job kind names its task function and its fold by import path inside this package (so
workers import them; a store only ever names a kind, never code), and the arrays every
task commits. Executors run task ids of a kind without knowing what they compute; the
reducer folds committed outputs with the kind's fold.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from functools import cache
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

if TYPE_CHECKING:
    from ..store import RunStore

#: What a task function returns: its named output arrays and a few counters.
TaskOutput = tuple[Mapping[str, np.ndarray], Mapping[str, int | float]]
TaskFunction = Callable[..., TaskOutput]


class Fold(Protocol):
    """How a kind's committed outputs become its result, through checkpointable state."""

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        """Start from a checkpoint's state."""

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        """Fold in a batch of verified task outputs (each task exactly once)."""

    def state(self) -> dict[str, np.ndarray]:
        """The state to checkpoint."""

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """The final arrays and record, once every task is folded."""


@dataclass(frozen=True)
class JobKind:
    """A kind of job: its name, task function, outputs and fold.

    Attributes
    ----------
    name : str
        As recorded in run stores.
    task : str
        ``module:function`` of the task function ``f(store, task, *, threads) ->
        (outputs, counters)``.
    fold : str
        ``module:Class`` of its `Fold`, constructed as ``Class(store)``.
    outputs : tuple of (name, dtype)
        The arrays each task commits.
    read : str
        ``module:function`` reading the verified result from a store, None before.
    unit : str
        What progress counts (shown to the user), e.g. "points", "clouds".
    fold_reads : tuple of str, optional
        The outputs the fold reads (each verified against its own digest in the commit
        record); all of them when None. A stage whose tasks commit large data for later
        stages beside a small summary folds the summary only.
    then : str, optional
        ``module:function`` giving, for a store of this kind whose tasks are all done,
        the store of the job that finishes it (``f(store) -> RunStore``, created on first
        use); the run continues there, and this kind's result reader reads through it.
    defaults : tuple of (name, value)
        Parameters added after stores of this kind were first made, with the value a
        store without them was made for: a missing one reads as that value when a
        store's parameters are compared (`RunStore.check_matches`).
    """

    name: str
    task: str
    fold: str
    outputs: tuple[tuple[str, str], ...]
    read: str
    unit: str = "tasks"
    fold_reads: tuple[str, ...] | None = None
    then: str | None = None
    defaults: tuple[tuple[str, Any], ...] = ()

    def follow_up(self, store: RunStore) -> RunStore | None:
        return None if self.then is None else _resolve(self.then)(store)

    def task_function(self) -> TaskFunction:
        return _resolve(self.task)

    def make_fold(self, store: RunStore) -> Fold:
        return _resolve(self.fold)(store)

    def read_result(self, store: RunStore) -> Any:
        return _resolve(self.read)(store)


@cache
def _resolve(path: str) -> Any:
    module, _, name = path.partition(":")
    if not module.startswith("chitally."):
        raise ValueError(f"job kinds live in chitally, not {module!r}")
    return getattr(importlib.import_module(module), name)
