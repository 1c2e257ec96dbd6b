"""A test-side wrapper of `chitally.engine.run_task` for the deployment tests.

Configured by the JSON file named in ``DEPLOYTEST_FAULTS`` (read in whichever process
runs a task: a driver or a Dask worker): ``{"log": folder, "hold_from": k, "gate": path}``.
Tasks numbered `hold_from` or more wait until the file `gate` exists (bounded), so a test
can catch a run in the middle without sleeping. Every attempt appends one line
``<task> <pid> computed|cached`` to ``<log>/attempts-<pid>``, so a test counts exactly
which tasks were computed, and where.

`install()` makes this wrapper the engine's task function in the calling process (the
driver); the executor then ships it to the workers by reference, so the workers need
this folder on their PYTHONPATH.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path
from typing import Any

import chitally.engine

_ORIGINAL = chitally.engine.run_task
HOLD_LIMIT = 300.0  # seconds a held task waits for its gate at most


def _config() -> dict[str, Any]:
    path = os.environ.get("DEPLOYTEST_FAULTS")
    if not path:
        return {}
    return json.loads(Path(path).read_text())


def run_task(store: Any, task: int, attempt: str, *, threads: int = 1) -> Any:
    cfg = _config()
    hold_from = cfg.get("hold_from")
    if hold_from is not None and task >= int(hold_from):
        gate = Path(cfg["gate"])
        deadline = time.monotonic() + HOLD_LIMIT
        while not gate.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
    result = _ORIGINAL(store, task, attempt, threads=threads)
    if cfg.get("log"):
        line = f"{task} {os.getpid()} {'cached' if result.cached else 'computed'}\n"
        with open(Path(cfg["log"]) / f"attempts-{os.getpid()}", "a", encoding="utf-8") as f:
            f.write(line)
    return result


def install() -> None:
    chitally.engine.run_task = run_task


def attempts(log: Path) -> list[tuple[int, int, str]]:
    """Every attempt logged so far: (task, pid, "computed" | "cached")."""
    out = []
    for f in sorted(Path(log).glob("attempts-*")):
        for line in f.read_text().splitlines():
            task, pid, how = line.split()
            out.append((int(task), int(pid), how))
    return out


if __name__ == "__main__":  # the `chitally` command with this wrapper as task function
    import sys

    import deploy_tasks  # by its module name, so the workers can import it too

    deploy_tasks.install()
    from chitally.cli import main

    sys.argv[0] = "chitally"
    main()
