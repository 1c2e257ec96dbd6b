"""Keep an embedded LocalCluster's workers from repeating our task errors on the terminal.

The workers of a LocalCluster write to the driver's terminal. A task that raises is
logged there by its worker as a multi-line "Compute Failed" report, and the driver then
reports the same error itself: a retry line, a failure line, or the one line a fatal
error ends the run with. Likewise, a worker closed in the middle of a task says so. This
worker plugin drops those reports for our own tasks (keys ``chitally-...``) and nothing
else. It is registered on the scheduler, so workers
that a nanny restarts get it too.
"""

from __future__ import annotations

import logging
from typing import Any

from distributed.diagnostics.plugin import WorkerPlugin

TASK_KEY_PREFIX = "chitally-"


class _OurTaskErrors(logging.Filter):
    def filter(self, record: logging.LogRecord) -> bool:
        message = str(record.msg)
        if message.startswith("Compute Failed") and record.args:
            args = record.args if isinstance(record.args, tuple) else (record.args,)
            return not str(args[0]).startswith(TASK_KEY_PREFIX)
        # a worker closed in the middle of one of our tasks (the driver stopping its
        # cluster after an interruption or a fatal error) says so for each task
        return not ("ended with CancelledError" in message
                    and f"execute('{TASK_KEY_PREFIX}" in message)


#: The worker's loggers that report on its tasks.
LOGGERS = ("distributed.worker", "distributed.worker.state_machine")


class QuietTaskErrors(WorkerPlugin):
    """Drop a worker's log records of chitally tasks that failed or were stopped."""

    idempotent = True
    name = "chitally-quiet-task-errors"

    def setup(self, worker: Any) -> None:
        for name in LOGGERS:
            log = logging.getLogger(name)
            if not any(isinstance(f, _OurTaskErrors) for f in log.filters):
                log.addFilter(_OurTaskErrors())
