"""Where the work runs: an embedded LocalCluster or an existing Dask scheduler.

Connects (over TLS when given a `Security` or the ``distributed.comm.tls.*`` keys), waits
for the workers an existing scheduler must have, checks that the workers run the same
chitally and numba and can open the run store, and refuses to dispatch a task whose
estimated memory exceeds what a worker thread may use. Nothing here computes or writes.

chitally's defaults live in the packaged ``chitally.yaml``, loaded into the Dask
configuration when this module is imported: a user's Dask config file or a
``DASK_CHITALLY__...`` environment variable overrides them, and a keyword argument given
to a function overrides both (`setting`, `seconds`).
"""

from __future__ import annotations

import asyncio
import getpass
import logging
import os
import signal
import socket
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import dask.config
import numba
import yaml
from dask.utils import parse_timedelta

from . import __version__

_DEFAULTS = os.path.join(os.path.dirname(__file__), "chitally.yaml")
with open(_DEFAULTS, encoding="utf-8") as _f:
    # Defaults only: values a user already set (config files, DASK_* variables) win.
    dask.config.update_defaults(yaml.safe_load(_f))


def setting(name: str, given: Any = None) -> Any:
    """`given` if it is not None, else the Dask config value ``chitally.<name>``."""
    return given if given is not None else dask.config.get(f"chitally.{name}")


def seconds(name: str, given: float | str | None = None) -> float:
    """A duration in seconds: `given`, else ``chitally.<name>`` ("90s", "5m" or a number)."""
    value = parse_timedelta(setting(name, given), default="seconds")
    if value is None or value < 0:
        raise ValueError(f"chitally.{name} = {value!r}: a duration must be 0 or more")
    return float(value)


class ClusterError(RuntimeError):
    """The cluster cannot run this job (unreachable, refused, too few workers, versions,
    store access, memory)."""


def make_security(ca_file: str | None = None, cert: str | None = None,
                  key: str | None = None) -> Any:
    """A distributed `Security` for TLS with these files, or None when none is given
    (then the ``distributed.comm.tls.*`` keys of the Dask config apply, if any).

    One certificate serves the client, and the scheduler and workers of a LocalCluster
    started here; `key` may be omitted when `cert` holds the key too.

    Raises
    ------
    ValueError
        A certificate without its certificate authority, or the other way round.
    """
    if not (ca_file or cert or key):
        return None
    if not ca_file or not cert:
        raise ValueError("TLS needs both --tls-ca-file (the authority that signed the "
                         "scheduler's and workers' certificates) and --tls-cert (this "
                         "client's certificate, with --tls-key unless it holds the key)")
    from distributed import Security

    return Security(tls_ca_file=ca_file, tls_client_cert=cert, tls_client_key=key,
                    tls_scheduler_cert=cert, tls_scheduler_key=key,
                    tls_worker_cert=cert, tls_worker_key=key, require_encryption=True)


def _uses_tls(security: Any) -> bool:
    if security is None:
        return bool(dask.config.get("distributed.comm.tls.client.cert", None))
    return bool(getattr(security, "tls_client_cert", None))


@dataclass
class Connection:
    client: Any
    cluster: Any | None  # the LocalCluster we started, if any
    dashboard: str | None

    def close(self) -> None:
        if getattr(self.client, "status", "running") != "running":
            # A client that lost its scheduler is still trying to reconnect; closing it
            # ends that attempt, which distributed then logs (from its event loop, after
            # close returns) as an error, with a traceback. The loss has been reported
            # already, in one line.
            _quiet_abandoned_reconnects()
        self.client.close()
        if self.cluster is not None:
            # our workers may be in the middle of a task (a run interrupted or stopped by
            # an error): the nanny kills them after a grace period, and says so; we
            # meant it
            drop_messages("distributed.nanny", "Worker process still alive after")
            try:
                self.cluster.close()
            except (TimeoutError, asyncio.TimeoutError):
                # a nanny slow to stop its worker on a loaded machine: the run's work is
                # committed by now, and the worker processes are daemons of this one, so
                # they end with it; failing the command here would report finished work
                # as failed
                logging.getLogger(__name__).warning("the local cluster was slow to stop; its workers end with this process")

    def ssh_hint(self) -> str | None:
        """A ready `ssh -L` line for reaching the dashboard from another machine."""
        if not self.dashboard:
            return None
        from urllib.parse import urlparse

        port = urlparse(self.dashboard).port or 8787
        return f"ssh -N -L {port}:127.0.0.1:{port} {getpass.getuser()}@{reachable_host_name()}"


def reachable_host_name() -> str:
    """A name another machine can use for this one, or a placeholder saying what to put.

    ``getfqdn`` answers "localhost" on machines whose name resolves to the loopback
    address, which is useless in an ssh line typed elsewhere.
    """
    for name in (socket.getfqdn(), socket.gethostname()):
        if name and not name.startswith("localhost") and name not in ("127.0.0.1", "::1"):
            try:
                if socket.gethostbyname(name).startswith("127."):
                    continue
            except OSError:
                continue
            return name
    return "<this-machine's-address>"


def free_port(host: str = "127.0.0.1", preferred: int = 8787) -> int:
    """`preferred` if nothing listens there, else a free port the system picks."""
    for port in (preferred, 0):
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
            try:
                sock.bind((host, port))
            except OSError:
                continue
            return int(sock.getsockname()[1])
    return 0


class _DropMessages(logging.Filter):
    """Drops log records whose message starts with one of `prefixes`, or that carry a
    CancelledError when `cancelled` is set."""

    def __init__(self, prefixes: tuple[str, ...], cancelled: bool = False) -> None:
        super().__init__()
        self.prefixes = prefixes
        self.cancelled = cancelled

    def filter(self, record: logging.LogRecord) -> bool:
        if record.getMessage().startswith(self.prefixes):
            return False
        exc = record.exc_info[1] if record.exc_info else None
        return not (self.cancelled and isinstance(exc, asyncio.CancelledError))


def drop_messages(logger: str, *prefixes: str, cancelled: bool = False) -> None:
    """From now on, drop `logger`'s records that start with one of `prefixes` (and, with
    `cancelled`, those carrying a CancelledError): for messages distributed logs about
    something we did on purpose."""
    log = logging.getLogger(logger)
    if not any(isinstance(f, _DropMessages) and f.prefixes == prefixes for f in log.filters):
        log.addFilter(_DropMessages(prefixes, cancelled))


def _quiet_abandoned_reconnects() -> None:
    drop_messages("distributed.client", "Failed to reconnect to scheduler", cancelled=True)


def _dashboard_of(client: Any) -> str | None:
    """The dashboard link, or None when the scheduler serves none.

    The client makes a link up either way, and a scheduler started with
    ``--no-dashboard`` still answers HTTP on that port (metrics, health) with 404 for
    the dashboard pages; so the page is asked for. A link that cannot be reached from
    here is kept: it may be meant for a tunnel.
    """
    from urllib.error import HTTPError, URLError
    from urllib.request import urlopen

    link = client.dashboard_link
    if not link:
        return None
    try:
        with urlopen(link, timeout=3):
            return link
    except HTTPError:
        return None
    except (URLError, OSError, ValueError):
        return link


@contextmanager
def _children_ignore_sigint() -> Iterator[None]:
    """Start worker processes with SIGINT ignored.

    A Ctrl-C on the terminal reaches every process of the foreground group, the
    LocalCluster's workers too, and each printed a KeyboardInterrupt traceback while the
    driver was stopping them in order. An ignored disposition survives fork and exec
    (and Python then installs no handler of its own), so workers spawned in this window
    leave the interruption to the driver. A Ctrl-C during these seconds is ignored by
    the driver too.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        # None: a handler installed outside Python, which cannot be put back exactly
        signal.signal(signal.SIGINT, signal.SIG_DFL if previous is None else previous)


def connect(
    scheduler: str | None = None,
    scheduler_file: str | None = None,
    workers: int | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
    dashboard_address: str | None = None,
    *,
    security: Any = None,
    wait_workers: int | None = None,
    wait_timeout: float | None = None,
    connect_timeout: float | None = None,
) -> Connection:
    """A Dask client: to `scheduler` / `scheduler_file` / DASK_SCHEDULER_ADDRESS if given,
    else to a new LocalCluster sized to this machine (one single-threaded worker process
    per core by default: the kernel holds no GIL, but the store I/O around it does).

    The LocalCluster and its dashboard listen on 127.0.0.1 only; the dashboard takes port
    8787 when it is free, else another free port (the link printed says which). With
    `security` (see `make_security`) it speaks TLS too.

    An existing scheduler is given `connect_timeout` seconds to answer, then until
    `wait_timeout` seconds to have `wait_workers` workers (each falls back to
    ``chitally.scheduler.*`` in the Dask config; 0 workers means do not wait).

    Raises
    ------
    ClusterError
        The scheduler cannot be reached or refuses us (TLS), or too few workers came.
    """
    from distributed import Client, LocalCluster

    scheduler = scheduler or os.environ.get("DASK_SCHEDULER_ADDRESS") or None
    if scheduler_file or scheduler:
        where = (_address_in(scheduler_file) or f"the scheduler of {scheduler_file}"
                 if scheduler_file else str(scheduler))
        timeout = seconds("scheduler.connect-timeout", connect_timeout)
        try:
            if scheduler_file:
                client = Client(scheduler_file=scheduler_file, security=security, timeout=timeout)
            else:
                client = Client(scheduler, security=security, timeout=timeout)
        except Exception as exc:  # OSError, TimeoutError, ssl errors: all one line
            raise ClusterError(_refusal(where, exc, security)) from None
        try:
            _wait_for_workers(client, where, int(setting("scheduler.wait-workers", wait_workers)),
                              seconds("scheduler.wait-timeout", wait_timeout))
        except BaseException:
            client.close()
            raise
        return Connection(client, None, _dashboard_of(client))
    cores = os.cpu_count() or 1
    n_workers = workers or cores
    threads = threads or max(1, cores // n_workers)
    tls = security is not None and _uses_tls(security)
    with _children_ignore_sigint():
        cluster = LocalCluster(
            n_workers=n_workers,
            threads_per_worker=threads,
            processes=True,
            host="127.0.0.1",
            dashboard_address=dashboard_address or f"127.0.0.1:{free_port()}",
            memory_limit=memory_limit or "auto",
            silence_logs=logging.WARNING,
            **({"security": security, "protocol": "tls://"} if tls else {}),
        )
    client = Client(cluster, security=security) if tls else Client(cluster)
    from .workerlogs import QuietTaskErrors

    # its workers write to our terminal, where the driver reports task errors itself
    client.register_plugin(QuietTaskErrors(), name=QuietTaskErrors.name)
    return Connection(client, cluster, _dashboard_of(client))


def _address_in(scheduler_file: str | None) -> str | None:
    import json

    try:
        with open(str(scheduler_file), encoding="utf-8") as f:
            return str(json.load(f)["address"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def _refusal(where: str, exc: BaseException, security: Any) -> str:
    """One line on why the scheduler at `where` could not be reached, and what to do."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    tls = _uses_tls(security)
    if where.startswith("tls://") and not tls:
        hint = ("it speaks TLS: give --tls-ca-file, --tls-cert and --tls-key (or the "
                "distributed.comm.tls.* keys of the Dask config)")
    elif tls and not where.startswith("tls://") and "://" in where:
        hint = "TLS certificates were given but the address is not tls://"
    elif tls:
        hint = ("check that --tls-cert was signed by the authority the scheduler trusts and "
                "--tls-ca-file is the authority that signed the scheduler's certificate")
    else:
        hint = ("check the address, that the scheduler runs, and that this machine may "
                "reach its port")
    return f"cannot connect to the Dask scheduler at {where}: {text}; {hint}"


def _wait_for_workers(client: Any, where: str, n: int, timeout: float) -> None:
    if n <= 0:
        return
    try:
        client.wait_for_workers(n, timeout=timeout)
    except (TimeoutError, OSError) as exc:
        try:
            have = len(client.scheduler_info()["workers"])
        except Exception:
            have = 0
        raise ClusterError(
            f"{have} of {n} workers connected to the scheduler at {where} within "
            f"{timeout:g} s; start workers (`dask worker {where}`), check that they can reach "
            "the scheduler, or wait longer (--wait-timeout)") from exc


def _worker_facts(store: Any) -> dict[str, Any]:
    import chitally
    from chitally.engine import worker_store

    try:
        worker_store(store)
        reach = None
    except Exception as exc:  # reported to the driver, which names the worker
        reach = f"{type(exc).__name__}: {exc}"
    return {"chitally": chitally.__version__, "numba": numba.__version__, "store_error": reach}


def check_workers(client: Any, store: Any) -> int:
    """Every worker runs our chitally and numba versions and can open the store.

    Returns the number of worker threads.
    """
    url = store.url
    facts = client.run(_worker_facts, store)
    if not facts:
        raise ClusterError("the cluster has no workers")
    for worker, f in facts.items():
        if f["chitally"] != __version__ or f["numba"] != numba.__version__:
            raise ClusterError(
                f"worker {worker} runs chitally {f['chitally']} / numba {f['numba']}, "
                f"this driver runs chitally {__version__} / numba {numba.__version__}"
            )
        if f["store_error"]:
            raise ClusterError(f"worker {worker} cannot open the run store {url}: {f['store_error']}")
    return sum(w.get("nthreads", 1) for w in client.scheduler_info()["workers"].values())


def preflight_memory(client: Any, heaviest_bytes: int) -> None:
    """Refuse when the heaviest task's estimate exceeds a worker's memory per thread."""
    for address, w in client.scheduler_info()["workers"].items():
        limit = w.get("memory_limit") or 0
        per_thread = limit / max(1, w.get("nthreads", 1))
        if limit and heaviest_bytes > per_thread:
            raise ClusterError(
                f"the heaviest task needs about {heaviest_bytes / 2**20:.0f} MiB but worker {address} "
                f"allows {per_thread / 2**20:.0f} MiB per thread; use smaller tasks (--task-cost) "
                "or workers with more memory per thread"
            )
