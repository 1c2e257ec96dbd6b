"""Keep an embedded LocalCluster's workers from repeating our task errors on the terminal.

The workers of a LocalCluster write to the driver's terminal. A task that raises is
logged there by its worker as a multi-line "Compute Failed" report, and the driver then
reports the same error itself: a retry line, a failure line, or the one line a fatal
error ends the run with. This worker plugin drops the worker's report for our own tasks
(keys ``chitally-...``) and nothing else. It is registered on the scheduler, so workers
that a nanny restarts get it too.
"""

from __future__ import annotations

import logging
from typing import Any

from distributed.diagnostics.plugin import WorkerPlugin

TASK_KEY_PREFIX = "chitally-"


class _OurTaskErrors(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        if not str(record.msg).startswith("Compute Failed") or not record.args:
            return True
        args = record.args if isinstance(record.args, tuple) else (record.args,)
        return not str(args[0]).startswith(TASK_KEY_PREFIX)


class QuietTaskErrors(WorkerPlugin):
    """Drop a worker's "Compute Failed" log records of chitally tasks."""

    idempotent = True
    name = "chitally-quiet-task-errors"

    def setup(self, worker: Any) -> None:
        log = logging.getLogger("distributed.worker")
        if not any(isinstance(f, _OurTaskErrors) for f in log.filters):
            log.addFilter(_OurTaskErrors())
