"""Compile the kernels before a run needs them.

numba compiles a kernel on its first call and, with ``cache=True``, writes it to an
on-disk cache: for every compiled function an index file (``*.nbi``) and data files
(``*.nbc``) in the package's ``__pycache__`` (or under ``NUMBA_CACHE_DIR``, or a per-user
directory when the package directory is read-only). A later process loads them in a
fraction of a second, but a first run on a fresh install compiles for tens of seconds
without a word. `kernels_cached` tells, without compiling, whether that is about to
happen; `warm_up` does it up front, optionally in parallel processes. After installing::

    python -m chitally.warmup            # every cap, every number of coordinates
    python -m chitally.warmup --dims 3   # only what runs on points in R^3 need

What a run compiles depends on its cap (caps from 3 up share their kernels) and on its
number of coordinates (1 to 8 have loops of their own; any larger number shares one):
see `kernel.compiled_calls`. No printing here except in `main`, so that `warm_up` can run
on a Dask worker.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from collections.abc import Iterable, Sequence

from . import kernel

# every cap a run may have, as far as compiling goes (caps from 3 up share their kernels)
ALL_MAX_DIMS: tuple[int | None, ...] = (None, 1, 2, 3)

# every number of coordinates, as far as compiling goes: 1 to 8, and 9 standing for any
# count above 8
ALL_DIMS: tuple[int, ...] = tuple(range(1, kernel._UNROLLED_DIMS + 2))

# rough cold compile seconds, only to share the work fairly between processes
_COST = {"_count_rows": 6.0, "_near_rows": 4.0, "_join_leaves": 2.0, "_fine_sort": 1.6, "_split_nodes": 1.5,
         "_cap2_near": 1.0, "_new_tree": 0.7}


def _needed(max_dims: Iterable[int | None], dims: Iterable[int] | None) -> list[tuple[object, tuple]]:
    """(dispatcher, argument types) of every compiled call, without repeats."""
    seen = set()
    calls = []
    for max_dim in max_dims:
        for m in ALL_DIMS if dims is None else dims:
            for dispatcher, sig in kernel.compiled_calls(max_dim, int(m)):
                key = (id(dispatcher), sig)
                if key not in seen:
                    seen.add(key)
                    calls.append((dispatcher, sig))
    return calls


def _ready(dispatcher: object, sig: tuple) -> bool:
    """Whether this process has the signature, or numba's cache holds it: the index
    entry numba itself would look up (the signature, this machine's code generator, the
    function's bytecode), in an index that matches the source file as it is now."""
    if sig in dispatcher.overloads:
        return True
    cache = dispatcher._cache
    key = cache._index_key(sig, dispatcher.targetctx.codegen())
    return key in cache._cache_file._load_index()


def kernels_cached(max_dims: Iterable[int | None] = ALL_MAX_DIMS, dims: Iterable[int] | None = None) -> bool:
    """Whether a run can start without compiling: every kernel it needs is in numba's
    on-disk cache (or already loaded in this process).

    Reads numba's cache index files only: never compiles, and takes milliseconds.
    Answers False when it cannot tell (say, numba's cache internals changed).

    Parameters
    ----------
    max_dims : iterable of int or None
        The caps of the runs to come (None: uncapped).
    dims : iterable of int, optional
        Their numbers of coordinates; default: every number (see `ALL_DIMS`).

    Returns
    -------
    bool
    """
    try:
        return all(_ready(d, sig) for d, sig in _needed(max_dims, dims))
    except Exception:  # noqa: BLE001 - numba internals: unknown means not cached
        return False


def warm_up(max_dims: Iterable[int | None] = ALL_MAX_DIMS, dims: Iterable[int] | None = None, *,
            processes: int = 1) -> float:
    """Compile, or load from numba's cache, every kernel the given runs need.

    Safe to call on a Dask worker (prints nothing); a second call in a process costs
    nothing. The kernels are compiled from their signatures (`kernel.compiled_calls`),
    the very ones a run compiles on its first call.

    Parameters
    ----------
    max_dims : iterable of int or None
        The caps of the runs to come (None: uncapped); default: every cap.
    dims : iterable of int, optional
        Their numbers of coordinates; default: every number (see `ALL_DIMS`).
    processes : int
        Processes compiling at once (this one included). The others are fresh Python
        processes that write numba's on-disk cache, from which this one then loads
        their kernels; without a writable cache this process compiles those again.

    Returns
    -------
    float
        Seconds spent.
    """
    t0 = time.perf_counter()
    max_dims, dims = list(max_dims), None if dims is None else [int(m) for m in dims]
    needed = _needed(max_dims, dims)
    calls = [(d, sig) for d, sig in needed if sig not in d.overloads]
    if processes > 1 and calls and not kernels_cached(max_dims, dims):
        # the children number the calls of the same full list
        shares = _shares(needed, [k for k, (d, sig) in enumerate(needed) if sig not in d.overloads], processes)
        spec = _encode(max_dims, dims)
        children = [subprocess.Popen(_child_command(spec, share), env=_child_env(),
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
                    for share in shares[1:] if share]
        try:
            for k in shares[0]:
                dispatcher, sig = needed[k]
                dispatcher.compile(sig)
        except BaseException:
            for child in children:
                child.kill()
            raise
        finally:
            for child in children:
                child.communicate()  # a failed child only means compiling here below
    for dispatcher, sig in calls:
        dispatcher.compile(sig)
    return time.perf_counter() - t0


def _shares(calls: list[tuple[object, tuple]], todo: list[int], processes: int) -> list[list[int]]:
    """The indices `todo` of calls shared out between processes: all signatures of one
    function in the same process (each function has one cache index file, which two
    processes writing at once could each overwrite with their own entries), costliest
    functions first, each to the least loaded process."""
    groups: dict[int, list[int]] = {}
    for k in todo:
        groups.setdefault(id(calls[k][0]), []).append(k)
    cost = {g: sum(_COST.get(calls[k][0].py_func.__name__, 0.4) for k in ks) for g, ks in groups.items()}
    shares: list[list[int]] = [[] for _ in range(max(1, min(processes, len(groups))))]
    load = [0.0] * len(shares)
    for g in sorted(groups, key=lambda g: -cost[g]):
        j = load.index(min(load))
        shares[j].extend(groups[g])
        load[j] += cost[g]
    return shares


def _child_command(spec: str, share: list[int]) -> list[str]:
    code = f"from chitally.warmup import _compile_share; _compile_share({spec!r}, {share!r})"
    return [sys.executable, "-c", code]


def _child_env() -> dict[str, str]:
    # the child must import this very chitally, whatever put it on the path
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in sys.path if p)
    return env


def _compile_share(spec: str, share: list[int]) -> None:
    """In a child process: compile the given calls of the parent's list."""
    calls = _needed(*_decode(spec))
    for k in share:
        dispatcher, sig = calls[k]
        dispatcher.compile(sig)


def _encode(max_dims: Sequence[int | None], dims: Sequence[int] | None) -> str:
    caps = ",".join("none" if c is None else str(int(c)) for c in max_dims)
    return caps + ";" + ("all" if dims is None else ",".join(str(int(m)) for m in dims))


def _decode(text: str) -> tuple[list[int | None], list[int] | None]:
    caps, dims = text.split(";")
    max_dims = [None if c == "none" else int(c) for c in caps.split(",") if c]
    return max_dims, None if dims == "all" else [int(m) for m in dims.split(",") if m]


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m chitally.warmup``: compile the kernels and print the seconds spent."""
    ap = argparse.ArgumentParser(prog="python -m chitally.warmup", description=main.__doc__)
    ap.add_argument("--max-dims", default="none,1,2,3",
                    help="caps to compile for, comma separated; 'none' is uncapped (default: all)")
    ap.add_argument("--dims", default=None,
                    help="numbers of coordinates, comma separated (default: every number)")
    ap.add_argument("--processes", type=int, default=os.cpu_count() or 1,
                    help="processes compiling at once (default: the machine's cores)")
    args = ap.parse_args(argv)
    max_dims, dims = _decode(f"{args.max_dims};{args.dims or 'all'}")
    was_cached = kernels_cached(max_dims, dims)
    seconds = warm_up(max_dims, dims, processes=args.processes)
    what = "loaded from numba's cache" if was_cached else "compiled"
    print(f"chitally kernels {what} in {seconds:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
