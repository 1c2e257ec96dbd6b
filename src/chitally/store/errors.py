"""The run store's errors: each says what failed, where, and for which task."""

from __future__ import annotations


class StoreError(RuntimeError):
    """A run store operation failed; the message names what, which key and which task."""


class NotAStore(StoreError):
    """There is no chitally run store at the location (or the location is not a folder)."""


class IncompleteStore(StoreError):
    """A run store whose creation never finished (no completion marker)."""


class StoreExists(StoreError):
    """`RunStore.create` found a run store (or other data) where it was asked to write."""


class StoreMismatch(StoreError):
    """The store was made for another input, other parameters or another job kind."""


class CommitConflict(StoreError):
    """A task was committed twice with different outputs."""


class CorruptTask(StoreError):
    """A task's outputs do not match its commit record (missing, shape, digest)."""


class InputsDamaged(StoreError):
    """An input array of the store fails its checksum: no output can be trusted to come
    from the original input, so the run must be created again."""


class LeaseHeld(StoreError):
    """Another live process holds (or has taken over) the writer lease."""


class LeaseLost(LeaseHeld):
    """This run's lease was taken over or removed while it ran: it must stop writing."""


class ResultDamaged(StoreError):
    """The final result is unreadable or does not match its record; the task outputs it
    was folded from are untouched, so a resume writes it again."""


#: The name earlier releases used for a damaged final curve.
CurveDamaged = ResultDamaged
