"""SIGINT and SIGTERM as one clean interruption of a run.

Inside `signals_as_interrupts`, SIGTERM raises KeyboardInterrupt in the main thread like
SIGINT does, and the signal that arrived first is remembered, so the caller can release
the lease, close the cluster and exit with 130 or 143. A second signal while cleaning up
is ignored rather than turned into a traceback.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass


@dataclass
class Caught:
    signal: int | None = None


@contextmanager
def signals_as_interrupts() -> Iterator[Caught]:
    caught = Caught()
    if threading.current_thread() is not threading.main_thread():
        yield caught
        return

    def handler(signum: int, frame: object) -> None:
        if caught.signal is not None:
            return  # already stopping: a second Ctrl-C must not interrupt the clean-up
        caught.signal = signum
        raise KeyboardInterrupt

    previous = {s: signal.signal(s, handler) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield caught
    finally:
        for s, h in previous.items():
            signal.signal(s, h)
