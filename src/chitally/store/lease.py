"""The writer lease: one process at a time may write what only a run's driver writes.

Leases are numbered generations, each created create-only (``lease/gen-<g>.json``), so
taking over a dead or stale holder is one atomic step: of any number of processes that
try to create generation g+1, exactly one succeeds. The holder of generation g proves it
still holds the lease before every fenced write (checkpoint pointer, final result,
completion marker, failure records, quarantine moves) by checking that no generation g+1
exists and that it has not released g: a fencing token in the sense of lock services.

The heartbeat (``lease/beat-<g>.json``) is written by a thread, but only while the run
says it is alive (`Lease.alive`): a driver whose scheduler is gone must not look alive
because one of its threads is.
"""

from __future__ import annotations

import logging
import math
import os
import re
import secrets
import socket
import threading
import time
from collections.abc import Callable
from datetime import datetime
from typing import Any

from .errors import LeaseHeld, LeaseLost, StoreError
from .io import StoreIO, dumps, iso, now

logger = logging.getLogger("chitally.store")

LEASE = "lease"
_GEN = re.compile(r"lease/gen-(\d+)\.json$")
STALE_AFTER = 60.0


def _gen_key(g: int) -> str:
    return f"{LEASE}/gen-{int(g):09d}.json"


def _beat_key(g: int) -> str:
    return f"{LEASE}/beat-{int(g):09d}.json"


def _end_key(g: int) -> str:
    return f"{LEASE}/end-{int(g):09d}.json"


def pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


def current_generation(io: StoreIO) -> int:
    """The newest lease generation in the store (0 when none was ever taken)."""
    found = [int(m.group(1)) for k in io.list(f"{LEASE}/") if (m := _GEN.search(k))]
    return max(found, default=0)


def describe_holder(io: StoreIO, stale_after: float = STALE_AFTER) -> dict[str, Any] | None:
    """The current holder (owner, host, pid, heartbeat age, verdict) or None if free."""
    g = current_generation(io)
    if g == 0 or io.exists(_end_key(g)):
        return None
    rec = _read(io, _gen_key(g)) or {"owner": "<unreadable lease>"}
    verdict, age = _verdict(io, g, rec, stale_after)
    return {**rec, "generation": g, "verdict": verdict, "heartbeat_age": age}


def _read(io: StoreIO, key: str) -> dict[str, Any] | None:
    try:
        rec = io.get_json(key)
    except ValueError:
        return None
    return rec if isinstance(rec, dict) else None


def _verdict(io: StoreIO, g: int, rec: dict[str, Any], stale_after: float) -> tuple[str, float]:
    """('dead' | 'stale' | 'live', seconds since the last sign of life)."""
    beat = _read(io, _beat_key(g)) or {}
    stamps = [s for s in (beat.get("time"), rec.get("started")) if s]
    try:
        age = min((now() - datetime.fromisoformat(str(s))).total_seconds() for s in stamps)
    except (TypeError, ValueError):
        age = math.inf
    if not stamps:
        age = math.inf
    if rec.get("host") == socket.gethostname() and not pid_alive(int(rec.get("pid") or -1)):
        return "dead", age
    return ("stale" if age > stale_after else "live"), age


def _holder_text(rec: dict[str, Any], age: float) -> str:
    beat = "never" if age == math.inf else f"{age:.0f} s ago"
    return (f"{rec.get('owner')} (pid {rec.get('pid')} on {rec.get('host')}, last heartbeat "
            f"{beat})")


def acquire(io: StoreIO, owner: str, *, takeover: bool = False,
            stale_after: float = STALE_AFTER) -> Lease:
    """Become the one writer of the store at `io` (see the module's description).

    A lease whose process is gone from this host is taken over without asking (and
    logged); a stale one (no heartbeat for `stale_after` seconds) only with `takeover`.
    Raises `LeaseHeld` naming the holder otherwise.
    """
    for _ in range(8):
        g = current_generation(io)
        if g and not io.exists(_end_key(g)):
            rec = _read(io, _gen_key(g)) or {"owner": "<unreadable lease>"}
            verdict, age = _verdict(io, g, rec, stale_after)
            holder = _holder_text(rec, age)
            if verdict == "live" or (verdict == "stale" and not takeover):
                hint = "; pass takeover=True to take it over" if verdict == "stale" else ""
                raise LeaseHeld(f"run store {io.url} is in use by {holder}{hint}")
            why = "its process is gone" if verdict == "dead" else f"stale after {stale_after:g} s"
            logger.warning("%s: taking over the lease of %s: %s", io.url, holder, why)
        lease = Lease(io, owner, g + 1, stale_after=stale_after)
        if io.create_only(_gen_key(g + 1), lease.encode(), what="take the lease"):
            lease.prune()
            return lease
        # another process created generation g+1 first: judge it on the next round
    raise LeaseHeld(f"run store {io.url}: lost the race for the lease eight times")


class Lease:
    """Generation `generation` of a store's writer lease, held by this process.

    Used as a context manager it beats in the background and is released on exit.
    """

    def __init__(self, io: StoreIO, owner: str, generation: int, *,
                 stale_after: float = STALE_AFTER) -> None:
        self.io = io
        self.owner = str(owner)
        self.generation = int(generation)
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self.token = secrets.token_hex(16)
        self.started = iso()
        self.stale_after = float(stale_after)
        #: The run's own proof of life; the heartbeat is skipped while it returns False.
        self.alive: Callable[[], bool] = lambda: True
        self.error: BaseException | None = None
        self._released = False
        self._lost = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def encode(self) -> bytes:
        return dumps({"owner": self.owner, "host": self.host, "pid": self.pid,
                      "started": self.started, "token": self.token,
                      "generation": self.generation})

    def prune(self) -> None:
        """Remove the records of generations before the previous one (never read again)."""
        for key in self.io.list(f"{LEASE}/"):
            m = re.search(r"-(\d+)\.json$", key)
            if m and int(m.group(1)) < self.generation - 1:
                try:
                    self.io.delete(key, what="prune old lease records")
                except StoreError:
                    pass

    @property
    def lost(self) -> bool:
        return self._lost

    def check(self) -> None:
        """The fence: raise `LeaseLost` unless this lease is still the store's newest
        generation and not released. Call before every write only the holder may make."""
        if self._released:
            raise LeaseLost(f"the lease on {self.io.url} was released")
        if self._lost or self._superseded():
            self._lost = True
            newest = max(current_generation(self.io), self.generation + 1)
            rec = _read(self.io, _gen_key(newest))
            if rec is None:
                raise LeaseLost(f"the lease on {self.io.url} was removed; this run stopped writing")
            raise LeaseLost(
                f"the lease on {self.io.url} was taken over by {rec.get('owner')} (pid "
                f"{rec.get('pid')} on {rec.get('host')}); this run stopped writing")

    def _superseded(self) -> bool:
        # Generation g+1 exists, or our own record is gone (or another's): each new
        # holder prunes the records of generations before its previous one, so after two
        # more takeovers g+1 is gone as well, but then so is g.
        if self.io.exists(_gen_key(self.generation + 1)):
            return True
        mine = _read(self.io, _gen_key(self.generation))
        return mine is None or mine.get("token") != self.token

    @property
    def held(self) -> bool:
        try:
            self.check()
        except LeaseLost:
            return False
        return True

    def heartbeat(self) -> None:
        """Record a sign of life (fenced). Raises `LeaseLost` if the lease is gone."""
        self.check()
        self.io.set(_beat_key(self.generation), dumps({"time": iso(), "token": self.token}),
                    what="lease heartbeat")

    def _beat(self, interval: float) -> None:
        while not self._stop.wait(interval):
            try:
                if self.alive():
                    self.heartbeat()
                else:
                    logger.warning("%s: the run shows no sign of life; heartbeat withheld",
                                   self.io.url)
            except LeaseLost as exc:
                self.error = exc
                logger.error("%s", exc)
                return
            except Exception as exc:  # recorded for the owner to inspect; never silent
                self.error = exc
                logger.error("%s", exc)

    def start(self, interval: float | None = None) -> None:
        """Beat every `interval` seconds (default: a quarter of stale_after) in a thread."""
        if self._thread is not None and self._thread.is_alive():
            return
        interval = self.stale_after / 4 if interval is None else float(interval)
        self._stop.clear()
        self._thread = threading.Thread(target=self._beat, args=(interval,),
                                        name="chitally-lease-heartbeat", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop the heartbeat thread (the lease stays held)."""
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join(timeout=10)
        self._thread = None

    def release(self) -> bool:
        """Stop beating and end this generation if it is still ours.

        Returns True if it was ours and is now released; False if it was lost, or was
        released before.
        """
        if self._released:  # nested holders release once
            return False
        self.stop()
        known = self._lost  # already raised to the run as LeaseLost, which reports it
        if not self.held:
            self._released = True
            (logger.info if known else logger.warning)(
                "lease on %s is no longer ours; leaving it alone", self.io.url)
            return False
        self._released = True
        self.io.create_only(_end_key(self.generation), dumps({"ended": iso(), "token": self.token}),
                            what="release the lease")
        return True

    def __enter__(self) -> Lease:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()

    def __repr__(self) -> str:
        return f"Lease({self.owner!r}, generation={self.generation}, pid={self.pid})"


def wait_released(io: StoreIO, timeout: float) -> bool:
    """Wait until no live holder remains (for tests and tools); True if free in time."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if describe_holder(io) is None:
            return True
        time.sleep(0.05)
    return False
