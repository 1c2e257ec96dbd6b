"""The run store, in parts: store I/O (`io`), the commit log (`commits`), checkpoints,
the lease, and the store itself (`runstore`). Only this package knows paths in a store."""

from .checkpoints import Checkpoint, Checkpoints
from .commits import CommitLog
from .errors import (
    CommitConflict,
    CorruptTask,
    CurveDamaged,
    IncompleteStore,
    InputsDamaged,
    LeaseHeld,
    LeaseLost,
    NotAStore,
    ResultDamaged,
    StoreError,
    StoreExists,
    StoreMismatch,
)
from .io import StoreIO, arrays_digest
from .lease import Lease
from .runstore import FORMAT, JobSpec, RunStore, describe_layout, fingerprint

__all__ = [
    "FORMAT", "Checkpoint", "Checkpoints", "CommitConflict", "CommitLog", "CorruptTask",
    "CurveDamaged", "IncompleteStore", "InputsDamaged", "JobSpec", "Lease", "LeaseHeld",
    "LeaseLost", "NotAStore", "ResultDamaged", "RunStore", "StoreError", "StoreExists",
    "StoreIO", "StoreMismatch", "arrays_digest", "describe_layout", "fingerprint",
]
