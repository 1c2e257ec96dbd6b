"""Tests for chitally.warmup and kernel.compiled_calls: the listed signatures are exactly
the compiled calls a run makes; kernels_cached reads numba's cache without compiling and
tells a warm cache from a cold or partial one; warm_up and ``python -m chitally.warmup``
fill the cache so that a later process runs without compiling."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import numba as nb
import numpy as np
import pytest
from numba.core import event

from chitally import kernel
from chitally.inprocess import euler_curve
from chitally.warmup import ALL_DIMS, kernels_cached, warm_up


def cloud(dims: int) -> tuple[np.ndarray, float]:
    """A small cloud in R^dims and an eps giving every row a few neighbours."""
    points = np.random.default_rng(dims).random((200, dims))
    return points, 0.35 * dims**0.5


class CompileLog(event.Listener):
    """Names of the functions numba compiles (not loads) while installed."""

    def __init__(self) -> None:
        self.names: list[str] = []

    def on_start(self, ev: event.Event) -> None:
        self.names.append(ev.data["dispatcher"].py_func.__name__)

    def on_end(self, ev: event.Event) -> None:
        pass


@pytest.mark.parametrize("dims", [3, 9])
@pytest.mark.parametrize("max_dim", [None, 1, 2, 3, 5])
def test_compiled_calls_are_exactly_the_calls_of_a_run(monkeypatch: pytest.MonkeyPatch, max_dim: int | None,
                                                      dims: int) -> None:
    """Every compiled function the Python side of euler_curve and of count_jumps on a
    partly owned halo (as tasks call it) calls, with the numba types of its arguments, is
    listed, and nothing else is. (The edge estimate and the bucket sort of cap 1 that
    only large halos need are made here too.)"""
    monkeypatch.setattr(kernel, "_SAMPLED_ROWS", 64)
    monkeypatch.setattr(kernel, "_FIRST_EDGES", 16)
    points, eps = cloud(dims)

    def run() -> None:
        euler_curve(points, eps, max_dim)
        euler_curve(points, eps, max_dim, threads=2)
        kernel.count_jumps(points, eps, max_dim, owned=(50, 120))

    run()  # compiled or loaded before the functions are wrapped
    calls = set()

    def spy(name: str, dispatcher: object):
        def call(*args: object) -> object:
            calls.add((name, tuple(nb.typeof(a) for a in args)))
            return dispatcher(*args)
        return call

    for name, value in list(vars(kernel).items()):
        if isinstance(value, nb.core.registry.CPUDispatcher):
            monkeypatch.setattr(kernel, name, spy(name, value))
    run()
    monkeypatch.undo()
    listed = {(d.py_func.__name__, sig) for d, sig in kernel.compiled_calls(max_dim, dims)}
    assert calls == listed


def test_compiled_calls_cover_the_caps_and_widths() -> None:
    """Cap 0 needs nothing; caps from 3 up share one list; 1 to 8 coordinates have their
    own loops and every larger number shares one."""
    assert kernel.compiled_calls(0, 3) == []
    assert kernel.compiled_calls(3, 3) == kernel.compiled_calls(7, 3)
    assert kernel.compiled_calls(None, 9) == kernel.compiled_calls(None, 40)
    assert kernel.compiled_calls(None, 8) != kernel.compiled_calls(None, 9)
    assert ALL_DIMS == tuple(range(1, 10))


def test_kernels_cached_reads_the_cache_and_compiles_nothing() -> None:
    """In a process that has run cap 1 in R^3, kernels_cached says so at once, without a
    single compile; any cap it has not run may or may not be on disk, but asking about
    it compiles nothing either."""
    points, eps = cloud(3)
    euler_curve(points, eps, 1)
    log = CompileLog()
    with event.install_listener("numba:compile", log):
        t0 = time.perf_counter()
        assert kernels_cached([1], [3])
        kernels_cached()
        seconds = time.perf_counter() - t0
    assert log.names == []
    assert seconds < 2.0


def test_warm_up_in_this_process_leaves_nothing_to_compile() -> None:
    """After warm_up for cap 2 in R^5, that run compiles nothing, and a second warm_up
    costs next to nothing."""
    warm_up([2], [5])
    points, eps = cloud(5)
    log = CompileLog()
    with event.install_listener("numba:compile", log):
        euler_curve(points, eps, 2)
        again = warm_up([2], [5])
    assert log.names == []
    assert again < 0.5


COLD_SCRIPT = r"""
import json, sys
import numpy as np
from numba.core import event
from chitally.warmup import kernels_cached, warm_up
from chitally.inprocess import euler_curve

class Log(event.Listener):
    def __init__(self): self.names = []
    def on_start(self, ev): self.names.append(ev.data["dispatcher"].py_func.__name__)
    def on_end(self, ev): pass

log = Log()
answers = {"cap 1, R^2": kernels_cached([1], [2]), "uncapped, R^2": kernels_cached([None], [2]),
           "cap 1, R^3": kernels_cached([1], [3])}
with event.install_listener("numba:compile", log):
    if sys.argv[1] == "run":
        warm_up([1], [2])
        euler_curve(np.random.default_rng(0).random((100, 2)), 0.3, 1)
print(json.dumps({"cached": answers, "compiled": log.names}))
"""


def test_a_fresh_cache_is_cold_and_warm_up_fills_it(tmp_path: os.PathLike) -> None:
    """With an empty numba cache (NUMBA_CACHE_DIR) kernels_cached is False; after
    ``python -m chitally.warmup --max-dims 1 --dims 2 --processes 2`` (compiling in two
    processes) a new process finds cap 1 in R^2 cached, and only that, and runs it
    without compiling anything."""
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path))

    def child(*args: str) -> subprocess.CompletedProcess:
        done = subprocess.run([sys.executable, *args], env=env, capture_output=True, text=True, timeout=900,
                              check=False)
        assert done.returncode == 0, done.stderr[-2000:]
        return done

    before = json.loads(child("-c", COLD_SCRIPT, "ask").stdout.strip().splitlines()[-1])
    assert before["cached"] == {"cap 1, R^2": False, "uncapped, R^2": False, "cap 1, R^3": False}
    assert before["compiled"] == []
    first = child("-m", "chitally.warmup", "--max-dims", "1", "--dims", "2", "--processes", "2")
    assert first.stdout.startswith("chitally kernels compiled in ")
    after = json.loads(child("-c", COLD_SCRIPT, "run").stdout.strip().splitlines()[-1])
    assert after["cached"] == {"cap 1, R^2": True, "uncapped, R^2": False, "cap 1, R^3": False}
    assert after["compiled"] == []
    again = child("-m", "chitally.warmup", "--max-dims", "1", "--dims", "2")
    assert again.stdout.startswith("chitally kernels loaded from numba's cache in ")


def test_processes_share_whole_functions() -> None:
    """Every function's signatures go to one process (one index file, one writer), and
    every call to exactly one process."""
    from chitally.warmup import _needed, _shares

    calls = _needed([None, 1, 2, 3], None)
    shares = _shares(calls, list(range(len(calls))), 3)
    assert len(shares) == 3 and all(shares)
    assert sorted(k for share in shares for k in share) == list(range(len(calls)))
    owner = {}
    for j, share in enumerate(shares):
        for k in share:
            assert owner.setdefault(id(calls[k][0]), j) == j
