"""The `field` job kind: the exact curve of an n-dimensional array's cubical filtration.

The array is cut into blocks (whole chunks of a Zarr input); task ``i`` owns block ``i``
of that grid, reads it with a one-entry halo and commits the jump table of the cells it
owns (`chitally.cubical.block_jumps`), with the range and number of its present entries;
the fold sums jump tables exactly and takes the curve's domain from the ranges.

Where the input lives:

- a Zarr array reachable by URL (local path or fsspec URL) or a ``.npy`` file stays
  where it is: the store records its location and a fingerprint (shape, dtype and the
  sha256 of a fixed sample of blocks: up to `SAMPLE_BLOCKS` blocks spread evenly over
  the block grid, always the first and the last), and workers read their blocks from
  it (a ``.npy`` file through a memory map). The driver never holds more than one
  block, so its memory does not grow with the array.
- a numpy array in memory is written into the store as the input ``field`` (its
  fingerprint hashes every entry).

Workers open a URL input with the run store's storage options.
"""

from __future__ import annotations

import hashlib
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..cubical import CONSTRUCTIONS, block_jumps, check_construction, check_field, halo_ranges
from ..curve import Curve
from ..store import JobSpec, ResultDamaged, RunStore, fingerprint
from ..validate import InputError
from . import FIELD
from .cloud import JumpSum

#: Entries per block when the input has no chunks to follow (and the floor for chunks).
DEFAULT_BLOCK_ENTRIES = 1 << 22
#: Blocks hashed into the fingerprint of an input that stays where it is.
SAMPLE_BLOCKS = 16
#: A task's memory per halo entry beyond two copies of its values (the halo, the
#: distinct values): ranks and padded ranks, a copied slice (int32), bincount's int64
#: input and count bins (one bin per distinct value: up to one per entry), plus
#: `TASK_BYTES_PER_AXIS` per axis for the reduced views held down the cell-type
#: recursion and the padding. Measured 72 to 98 bytes per entry in all, 2 to 6 axes,
#: when every entry is distinct; tests/test_field_jobs.py holds the estimate above it.
TASK_BYTES_PER_ENTRY = 64
TASK_BYTES_PER_AXIS = 8


@dataclass(frozen=True)
class FieldParams:
    """What a field run store is made for; any difference is another run."""

    construction: str = "vertices"
    superlevel: bool = False
    mask_nan: bool = False
    block: tuple[int, ...] | None = None

    @staticmethod
    def checked(construction: Any = "vertices", superlevel: Any = False, mask_nan: Any = False,
                block: Any = None, *, names: Mapping[str, str] | None = None) -> FieldParams:
        n = {"construction": "construction", "block": "block", **(names or {})}
        construction = check_construction(construction, name=n["construction"])
        if block is not None:
            try:
                block = tuple(int(b) for b in block)
            except (TypeError, ValueError):
                raise InputError(f"{n['block']} must be a sequence of positive integers, got {block!r}") from None
            if not block or min(block) < 1:
                raise InputError(f"{n['block']} must be a sequence of positive integers, got {block!r}")
        return FieldParams(construction, bool(superlevel), bool(mask_nan), block)

    def as_dict(self) -> dict[str, Any]:
        return {"construction": self.construction, "superlevel": self.superlevel,
                "mask_nan": self.mask_nan, "block": None if self.block is None else list(self.block)}


# ---------------------------------------------------------------------------- the input

def _is_npy(path: str) -> bool:
    return path.lower().endswith(".npy")


def open_field(location: Mapping[str, Any], storage_options: Mapping[str, Any] | None = None) -> Any:
    """A sliceable read handle on a field input that stays where it is."""
    url, key = location["url"], location.get("key")
    if location["format"] == "npy":
        return np.load(url, mmap_mode="r", allow_pickle=False)
    import zarr

    so = dict(storage_options or {}) if "://" in url else None
    try:
        node = zarr.open(store=url, mode="r", storage_options=so) if so else zarr.open(store=url, mode="r")
    except Exception as exc:  # zarr raises many kinds for a missing or foreign location
        raise InputError(f"cannot open {url} as a Zarr array or group: {exc}") from exc
    if key:
        try:
            node = node[key]
        except KeyError:
            raise InputError(f"{url} has no array {key!r}") from None
    if not hasattr(node, "shape") or not hasattr(node, "dtype"):
        names = sorted(getattr(node, "array_keys", lambda: [])())
        raise InputError(f"{url} is a Zarr group: name one of its arrays with key ({names})")
    return node


def locate(source: Any, key: str | None = None) -> dict[str, Any] | None:
    """Where a field input stays (a Zarr or .npy location), or None for in-memory data."""
    if isinstance(source, (str, os.PathLike)):
        url = os.fspath(source)
        if "://" not in url:
            if not os.path.exists(url):
                raise InputError(f"no such file or directory: {url}")
            url = os.path.abspath(url)
        return {"format": "npy" if _is_npy(url) else "zarr", "url": url, "key": key}
    return None


def _chunks(arr: Any) -> tuple[int, ...] | None:
    chunks = getattr(arr, "chunks", None)
    if chunks is None or not isinstance(chunks, tuple) or not all(isinstance(c, int) for c in chunks):
        return None
    return tuple(int(c) for c in chunks)


def block_shape(shape: tuple[int, ...], chunks: tuple[int, ...] | None,
                requested: tuple[int, ...] | None) -> tuple[int, ...]:
    """The owned block of every task: the requested one, else whole chunks grown along
    the leading axes to about `DEFAULT_BLOCK_ENTRIES` entries."""
    if requested is not None:
        if len(requested) != len(shape):
            raise InputError(f"block has {len(requested)} sides for an array of {len(shape)} dimensions")
        return tuple(min(b, s) for b, s in zip(requested, shape))
    if chunks is None:
        base = [1] * len(shape)
        # whole trailing axes first, so blocks are contiguous rows of memory
        for a in range(len(shape) - 1, -1, -1):
            inner = math.prod(shape[a + 1:])
            base[a] = max(1, min(shape[a], DEFAULT_BLOCK_ENTRIES // max(inner, 1)))
            if base[a] < shape[a]:
                break
        return tuple(base)
    base = list(chunks)
    block = [min(c, s) for c, s in zip(base, shape)]
    for a in range(len(shape)):
        while math.prod(block) * 2 <= DEFAULT_BLOCK_ENTRIES and block[a] < shape[a]:
            block[a] = min(shape[a], block[a] * 2)
    return tuple(block)


def grid_of(shape: tuple[int, ...], block: tuple[int, ...]) -> tuple[int, ...]:
    return tuple(-(-s // b) for s, b in zip(shape, block))


def owned_slices(i: int, shape: tuple[int, ...], block: tuple[int, ...]) -> tuple[slice, ...]:
    """The entries task `i` owns (block `i` of the grid, C order)."""
    idx = np.unravel_index(i, grid_of(shape, block))
    return tuple(slice(int(k) * b, min((int(k) + 1) * b, s)) for k, b, s in zip(idx, block, shape))


def sample_fingerprint(arr: Any, block: tuple[int, ...], location: Mapping[str, Any]) -> dict[str, Any]:
    """Shape, dtype and the sha256 of up to `SAMPLE_BLOCKS` blocks spread over the grid
    (read one at a time: bounded memory), and the input's location."""
    shape = tuple(int(s) for s in arr.shape)
    n = math.prod(grid_of(shape, block))
    picks = sorted({int(round(k * (n - 1) / max(SAMPLE_BLOCKS - 1, 1))) for k in range(min(n, SAMPLE_BLOCKS))})
    h = hashlib.sha256()
    for i in picks:
        part = np.asarray(arr[owned_slices(i, shape, block)])
        h.update(np.asarray(i, "<i8").tobytes())
        h.update(np.ascontiguousarray(part, part.dtype.newbyteorder("<")).tobytes())
    return {"shape": list(shape), "dtype": str(np.dtype(arr.dtype)), "sample_sha256": h.hexdigest(),
            "sampled_blocks": len(picks), "url": location["url"], "key": location.get("key")}


# ---------------------------------------------------------------------------- planning

def job_spec(arr: Any, params: FieldParams, location: Mapping[str, Any] | None,
             fp: Mapping[str, Any] | None = None) -> JobSpec:
    """The run store contents for a field (pure apart from reading the fingerprint
    sample of a located input)."""
    shape = tuple(int(s) for s in arr.shape)
    block = block_shape(shape, _chunks(arr) if location else None, params.block)
    n_tasks = math.prod(grid_of(shape, block))
    itemsize = np.dtype(arr.dtype).itemsize
    halo_entries = math.prod(min(b + 2, s) for b, s in zip(block, shape))
    cost = np.array([math.prod(sl.stop - sl.start for sl in owned_slices(i, shape, block))
                     for i in range(n_tasks)], dtype=np.float64) if n_tasks <= 1 << 16 else \
        np.full(n_tasks, float(math.prod(block)))
    memory = np.full(n_tasks, halo_entries * (2 * itemsize + TASK_BYTES_PER_ENTRY + TASK_BYTES_PER_AXIS * len(shape))
                     + 1_000_000, dtype=np.int64)
    attrs = {"shape": list(shape), "dtype": str(np.dtype(arr.dtype)), "block": list(block),
             "location": None if location is None else dict(location)}
    inputs: dict[str, Any] = {}
    if location is None:
        inputs["field"] = np.asarray(arr)
    return JobSpec(kind=FIELD.name, params=params.as_dict(),
                   fingerprint=fp if fp is not None else fingerprint_of(arr, params, location),
                   outputs=FIELD.outputs, cost=cost, memory=memory, inputs=inputs, attrs=attrs)


def fingerprint_of(arr: Any, params: FieldParams, location: Mapping[str, Any] | None) -> dict[str, Any]:
    if location is None:
        fp = fingerprint(np.asarray(arr).reshape(-1))
        fp["shape"] = [int(s) for s in arr.shape]
        return fp
    shape = tuple(int(s) for s in arr.shape)
    return sample_fingerprint(arr, block_shape(shape, _chunks(arr), params.block), location)


def prepare(source: Any, key: str | None = None,
            storage_options: Mapping[str, Any] | None = None) -> tuple[Any, dict[str, Any] | None]:
    """(array handle, location) for a numpy array, a Zarr URL or a ``.npy`` path."""
    location = locate(source, key)
    if location is None:
        return check_field(source), None
    arr = open_field(location, storage_options)
    # checks dtype, dimensions and emptiness on one entry, not the data
    probe = np.empty(tuple(arr.shape) and (1,) * len(arr.shape), dtype=arr.dtype) if all(arr.shape) else \
        np.empty(tuple(int(s) for s in arr.shape), dtype=arr.dtype)
    check_field(probe, what=location["url"])
    return arr, location


def create_or_open(url: str, source: Any, params: FieldParams, *, key: str | None = None,
                   storage_options: Mapping[str, Any] | None = None,
                   discard: bool = False) -> RunStore:
    """The field run store at `url` for this input and these parameters: opened if it
    exists (and must match), else planned and created."""
    from ..runs import open_or_create

    arr, location = prepare(source, key, storage_options)
    fp = fingerprint_of(arr, params, location)
    return open_or_create(url, FIELD.name, params.as_dict(), fp,
                          lambda: job_spec(arr, params, location, fp),
                          storage_options=storage_options, discard=discard)


# ---------------------------------------------------------------------------- the task

def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the jump table of the cells block `i` owns."""
    p, a = store.params, store.attrs
    shape, block = tuple(a["shape"]), tuple(a["block"])
    owned = owned_slices(i, shape, block)
    ext = halo_ranges([(s.start, s.stop) for s in owned], shape)
    sel = tuple(slice(lo, hi) for lo, hi in ext)
    if a["location"] is None:
        halo = store.read_input("field", sel, task=i)
    else:
        handle = open_field(a["location"], store.io.storage_options)
        halo = store.io.op("read field block", a["location"]["url"], lambda: np.asarray(handle[sel]), task=i)
    values, jumps = block_jumps(None, p["construction"], owned, superlevel=p["superlevel"],
                                mask_nan=p["mask_nan"], halo=halo, halo_offset=[lo for lo, _ in ext],
                                shape=shape)
    own = halo[tuple(slice(s.start - lo, s.stop - lo) for s, (lo, _) in zip(owned, ext))]
    present = ~np.isnan(own) if own.dtype.kind == "f" and p["mask_nan"] else None
    vals = own if present is None else own[present]
    n_present = int(vals.size)
    if n_present:
        lo_v, hi_v = float(vals.min()), float(vals.max())
        rng = np.array([-hi_v, -lo_v] if p["superlevel"] else [lo_v, hi_v], np.float64)
    else:
        rng = np.array([np.inf, -np.inf])
    out = {"values": values, "jumps": jumps, "range": rng, "present": np.array([n_present], np.int64)}
    return out, {"entries": int(own.size), "halo": int(halo.size), "jumps": int(values.size)}


# ---------------------------------------------------------------------------- the fold

class FieldSum(JumpSum):
    """The field fold: jump tables summed as in the cloud fold, with the domain taken
    from the blocks' ranges and the present entries counted."""

    def __init__(self, store: RunStore) -> None:
        super().__init__(store)
        self.range = np.array([np.inf, -np.inf])
        self.present = np.zeros(1, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        super().restore(state)
        self.range = np.asarray(state["range"], np.float64).copy()
        self.present = np.asarray(state["present"], np.int64).copy()

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        super().add(tasks, outputs)
        for o in outputs:
            self.range = np.array([min(self.range[0], o["range"][0]), max(self.range[1], o["range"][1])])
            self.present = self.present + np.asarray(o["present"], np.int64)

    def state(self) -> dict[str, np.ndarray]:
        return {**super().state(), "range": self.range, "present": self.present}

    def curve(self) -> Curve:
        n = int(self.present[0])
        if n == 0:
            return Curve.zero(eps=0.0, max_dim=None, start=0.0)
        return Curve.from_jumps(self.values, self.jumps, eps=float(self.range[1]), max_dim=None,
                                n_points=n, start=float(self.range[0]))

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        c = self.curve()
        return ({"values": np.asarray(c.values), "chi": np.asarray(c.chi)},
                {"start": c.start, "eps": c.eps, "max_dim": None, "n_points": c.n_points,
                 "digest": c.digest()})


def read_curve(store: RunStore) -> Curve | None:
    """The final curve of a complete field run, verified; None if not written yet."""
    got = store.read_result()
    if got is None:
        return None
    arrays, rec = got
    try:
        curve = Curve(values=arrays["values"], chi=arrays["chi"], eps=rec["eps"], max_dim=None,
                      n_points=rec["n_points"], start=rec["start"])
    except (KeyError, ValueError) as exc:
        raise ResultDamaged(f"the curve in {store.url} is not a valid curve: {exc}") from exc
    if curve.digest() != rec.get("digest"):
        raise ResultDamaged(f"the curve in {store.url} does not match its digest")
    return curve


def field_run(array_or_url: Any, store: str, where: Any = None, *, key: str | None = None,
              construction: str = "vertices", superlevel: bool = False, mask_nan: bool = False,
              block: Any = None, storage_options: Mapping[str, Any] | None = None,
              discard: bool = False, events: Any = None) -> Any:
    """Compute a field's exact curve as a resumable run on the run store `store`.

    Parameters
    ----------
    array_or_url : ndarray, str or path
        A numpy array (written into the store), a Zarr array's URL (a group's array
        named by `key`) or a ``.npy`` path; the last two stay where they are.
    store : str
        The run store's URL; an existing store for the same input and parameters is
        resumed.
    where : chitally.runs.Where, optional
        Where tasks run; default: serially in this process.
    construction, superlevel, mask_nan
        As in `chitally.cubical.field_curve`.
    block : sequence of int, optional
        The entries each task owns along each axis (default: whole chunks of the input,
        about 4 million entries).

    Returns
    -------
    chitally.runs.RunReport
        Its ``result`` is the `Curve` when the run is complete.
    """
    from ..runs import Where, run

    params = FieldParams.checked(construction, superlevel, mask_nan, block)
    rs = create_or_open(store, array_or_url, params, key=key, storage_options=storage_options,
                        discard=discard)
    return run(rs, where if where is not None else Where(serial=True), events=events)


__all__ = ["CONSTRUCTIONS", "FieldParams", "FieldSum", "compute_task", "create_or_open", "field_run",
           "job_spec", "open_field", "owned_slices", "read_curve"]
