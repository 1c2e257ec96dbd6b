"""The `field` job kind: the exact curve of an n-dimensional array's cubical filtration.

The array is cut into blocks (whole chunks of a Zarr input); task ``i`` owns block ``i``
of that grid, reads it with a one-entry halo and commits the jump table of the cells it
owns (`chitally.cubical.block_jumps`), with the range and number of its present entries;
the fold sums jump tables exactly and takes the curve's domain from the ranges.

An array that may have more distinct values than one part of a curve holds jumps
(`chitally.jobs.parts.PART_JUMPS`; a cubical curve has at most one jump per distinct
value, and an array at most one distinct value per entry, 2^16 with a dtype of two
bytes) runs as the ``field-parts`` kind instead: tasks also commit where their tables cross part boundaries placed at
quantiles of a sample of the values, the fold keeps only the range and the present
entries, and the ``curve-merge`` kind reduces the tables part by part on the workers
(`chitally.jobs.parts`), so the driver's memory does not grow with the distinct values.

Where the input lives:

- a Zarr array reachable by URL (local path or fsspec URL), an HDF5 dataset (``.h5``,
  ``.hdf5``) or a ``.npy`` file stays where it is: the store records its location and
  a fingerprint (shape, dtype and the sha256 of a fixed sample of blocks: up to
  `SAMPLE_BLOCKS` blocks spread evenly over the block grid, always the first and the
  last), and workers read their blocks from it (a ``.npy`` file through a memory map,
  an HDF5 dataset through h5py, the file opened for each read). The driver never holds
  more than one block, so its memory does not grow with the array.
- a numpy array in memory is written into the store as the input ``field`` (its
  fingerprint hashes every entry).

An optional boolean mask of the same shape (True where an entry is part of the complex)
follows the same rules: one in a file stays there and is read block by block with the
same halo, one in memory becomes the input ``mask``; its fingerprint sits under
``mask`` in the input fingerprint, so another mask is another run.

Workers open a URL input with the run store's storage options.
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib.util
import math
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..cubical import CONSTRUCTIONS, block_jumps, check_construction, check_field, check_mask, halo_ranges
from ..curve import Curve
from ..store import JobSpec, ResultDamaged, RunStore, fingerprint
from ..validate import InputError
from . import FIELD, FIELD_PARTS
from .cloud import JumpSum

#: Entries per block when the input has no chunks to follow (and the floor for chunks).
DEFAULT_BLOCK_ENTRIES = 1 << 22
#: Blocks hashed into the fingerprint of an input that stays where it is (and read for
#: the part boundaries of a curve reduced in parts).
SAMPLE_BLOCKS = 16
#: Values at most kept from the sample that places part boundaries.
SAMPLE_VALUES = 1 << 20
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
    part_jumps: int | None = None  # default: chitally.jobs.parts.PART_JUMPS

    @staticmethod
    def checked(construction: Any = "vertices", superlevel: Any = False, mask_nan: Any = False,
                block: Any = None, part_jumps: Any = None, *,
                names: Mapping[str, str] | None = None) -> FieldParams:
        n = {"construction": "construction", "block": "block", "part_jumps": "part_jumps", **(names or {})}
        construction = check_construction(construction, name=n["construction"])
        if block is not None:
            try:
                block = tuple(int(b) for b in block)
            except (TypeError, ValueError):
                raise InputError(f"{n['block']} must be a sequence of positive integers, got {block!r}") from None
            if not block or min(block) < 1:
                raise InputError(f"{n['block']} must be a sequence of positive integers, got {block!r}")
        if part_jumps is not None:
            if isinstance(part_jumps, bool) or not isinstance(part_jumps, (int, np.integer)) or part_jumps < 2:
                raise InputError(f"{n['part_jumps']} must be an integer >= 2, got {part_jumps!r}")
            part_jumps = int(part_jumps)
        return FieldParams(construction, bool(superlevel), bool(mask_nan), block, part_jumps)

    def as_dict(self) -> dict[str, Any]:
        # part_jumps only when given: stores made before it existed keep their parameters
        d = {"construction": self.construction, "superlevel": self.superlevel,
             "mask_nan": self.mask_nan, "block": None if self.block is None else list(self.block)}
        if self.part_jumps is not None:
            d["part_jumps"] = self.part_jumps
        return d

    def kind(self, shape: tuple[int, ...], dtype: Any) -> Any:
        """``field``, or ``field-parts`` when the curve's jumps may exceed one part."""
        from .parts import PART_JUMPS

        return FIELD_PARTS if distinct_bound(shape, dtype) > (self.part_jumps or PART_JUMPS) else FIELD


def distinct_bound(shape: tuple[int, ...], dtype: Any) -> int:
    """At most this many distinct values, hence jumps: one per entry, and no more than a
    dtype of one or two bytes can spell."""
    dt = np.dtype(dtype)
    n = math.prod(shape)
    return min(n, 1 << (8 * dt.itemsize)) if dt.itemsize <= 2 else n


# ---------------------------------------------------------------------------- the input

HDF5_ENDINGS = (".h5", ".hdf5")


def _format_of(path: str) -> str:
    lower = path.lower().rstrip("/")
    if lower.endswith(".npy"):
        return "npy"
    if lower.endswith(HDF5_ENDINGS):
        return "hdf5"
    return "zarr"


class Hdf5Field:
    """An HDF5 dataset as a sliceable array: shape, dtype and chunks read once, and the
    file opened for each read, so no handle is held between reads (h5py handles do not
    pickle, and a worker reads only its own blocks).

    Parameters
    ----------
    url : str
        A local path or an fsspec URL (read through a file object).
    key : str, optional
        The dataset's path in the file; needed only when the file holds more than one.
    storage_options : mapping, optional
        fsspec options for a URL.
    """

    def __init__(self, url: str, key: str | None = None,
                 storage_options: Mapping[str, Any] | None = None) -> None:
        if importlib.util.find_spec("h5py") is None:
            raise InputError(f"{url}: reading HDF5 needs h5py (pip install h5py)")
        self.url = url
        self.storage_options = dict(storage_options or {})
        self.key = key
        with self._dataset() as d:
            self.key = d.name
            self.shape = tuple(int(x) for x in d.shape)
            self.dtype = d.dtype
            self.chunks = None if d.chunks is None else tuple(int(c) for c in d.chunks)
            self.ndim = len(self.shape)

    @contextlib.contextmanager
    def _dataset(self) -> Iterator[Any]:
        import h5py

        try:
            with contextlib.ExitStack() as stack:
                if "://" in self.url:
                    import fsspec

                    target: Any = stack.enter_context(fsspec.open(self.url, "rb", **self.storage_options))
                else:
                    target = self.url
                h5 = stack.enter_context(h5py.File(target, "r"))
                yield self._pick(h5)
        except InputError:
            raise
        except (OSError, ValueError, KeyError, TypeError) as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InputError(f"cannot read {self.url} as HDF5: {first}") from exc

    def _pick(self, h5: Any) -> Any:
        import h5py

        datasets: list[str] = []
        h5.visititems(lambda name, obj: datasets.append(name) if isinstance(obj, h5py.Dataset) else None)
        if self.key is None:
            if len(datasets) != 1:
                raise InputError(f"{self.url} holds {len(datasets)} HDF5 datasets: name one with key "
                                 f"({sorted(datasets)})")
            return h5[datasets[0]]
        node = h5.get(self.key)
        if not isinstance(node, h5py.Dataset):
            what = "no dataset" if node is None else "a group, not a dataset, at"
            raise InputError(f"{self.url} has {what} {self.key!r} (datasets: {sorted(datasets)})")
        return node

    def __getitem__(self, selection: Any) -> np.ndarray:
        with self._dataset() as d:
            return np.asarray(d[selection])


def open_field(location: Mapping[str, Any], storage_options: Mapping[str, Any] | None = None) -> Any:
    """A sliceable read handle on a field input that stays where it is."""
    url, key = location["url"], location.get("key")
    if location["format"] == "npy":
        return np.load(url, mmap_mode="r", allow_pickle=False)
    if location["format"] == "hdf5":
        return Hdf5Field(url, key, storage_options if "://" in url else None)
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
    """Where a field input stays (a Zarr, HDF5 or .npy location), or None for in-memory
    data."""
    if isinstance(source, (str, os.PathLike)):
        url = os.fspath(source)
        if "://" not in url:
            if not os.path.exists(url):
                raise InputError(f"no such file or directory: {url}")
            url = os.path.abspath(url)
        return {"format": _format_of(url), "url": url, "key": key}
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

#: A prepared input: (array handle, location), the location None for data in memory.
Prepared = tuple[Any, dict[str, Any] | None]


def value_sample(arr: Any, params: FieldParams, block: tuple[int, ...], mask: Prepared | None = None) -> np.ndarray:
    """Present values (negated for superlevel: the curve's scales) of up to
    `SAMPLE_BLOCKS` blocks spread over the grid, each read whole and thinned by a stride
    to keep at most `SAMPLE_VALUES` in all; one block in memory at a time."""
    shape = tuple(int(s) for s in arr.shape)
    n = math.prod(grid_of(shape, block))
    picks = sorted({int(round(k * (n - 1) / max(SAMPLE_BLOCKS - 1, 1))) for k in range(min(n, SAMPLE_BLOCKS))})
    per_block = max(1, SAMPLE_VALUES // len(picks))
    got = []
    for i in picks:
        sel = owned_slices(i, shape, block)
        vals = np.asarray(arr[sel]).reshape(-1)
        keep = np.ones(vals.size, bool) if mask is None else np.asarray(mask[0][sel], bool).reshape(-1)
        if vals.dtype.kind == "f":
            keep &= ~np.isnan(vals)
        vals = vals[keep]
        got.append(vals[:: max(1, -(-vals.size // per_block))].astype(np.float64))
    out = np.concatenate(got) if got else np.zeros(0)
    return -out if params.superlevel else out


def part_plan(sample: np.ndarray, n_jumps: int, n_parts: int) -> tuple[np.ndarray, np.ndarray]:
    """Part boundaries (quantiles of `sample`; part p holds the scales in (b_p, b_{p+1}])
    and each part's estimated jumps (its share of the sample times `n_jumps`). Only
    the balance of the parts depends on them, never the curve."""
    if sample.size == 0 or n_parts < 2:
        return np.zeros(0), np.array([float(n_jumps)])
    bounds = np.unique(np.quantile(sample, np.arange(1, n_parts) / n_parts, method="inverted_cdf"))
    bounds = bounds[bounds < sample.max()]  # a bound at the top would leave its last part empty
    share = np.bincount(np.searchsorted(bounds, sample, side="left"), minlength=bounds.size + 1) / sample.size
    return bounds.astype(np.float64), share * float(n_jumps)


def job_spec(arr: Any, params: FieldParams, location: Mapping[str, Any] | None,
             fp: Mapping[str, Any] | None = None, mask: Prepared | None = None) -> JobSpec:
    """The run store contents for a field (pure apart from reading the fingerprint
    sample of a located input, and the value sample of one reduced in parts)."""
    shape = tuple(int(s) for s in arr.shape)
    block = block_shape(shape, _chunks(arr) if location else None, params.block)
    n_tasks = math.prod(grid_of(shape, block))
    itemsize = np.dtype(arr.dtype).itemsize + (1 if mask is not None else 0)
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
    if mask is not None:
        m, m_location = mask
        attrs["mask"] = {"location": None if m_location is None else dict(m_location)}
        if m_location is None:
            inputs["mask"] = np.asarray(m)
    kind = params.kind(shape, arr.dtype)
    if kind is FIELD_PARTS:
        from .parts import PART_JUMPS

        n_jumps = distinct_bound(shape, arr.dtype)
        n_parts = -(-n_jumps // (params.part_jumps or PART_JUMPS))
        inputs["part_bounds"], inputs["part_cost"] = part_plan(value_sample(arr, params, block, mask),
                                                               n_jumps, n_parts)
    return JobSpec(kind=kind.name, params=params.as_dict(),
                   fingerprint=fp if fp is not None else fingerprint_of(arr, params, location, mask),
                   outputs=kind.outputs, cost=cost, memory=memory, inputs=inputs, attrs=attrs)


def _content_fingerprint(arr: Any, params: FieldParams, location: Mapping[str, Any] | None,
                         block_of: Any) -> dict[str, Any]:
    if location is None:
        fp = fingerprint(np.asarray(arr).reshape(-1))
        fp["shape"] = [int(s) for s in arr.shape]
        return fp
    shape = tuple(int(s) for s in arr.shape)
    return sample_fingerprint(arr, block_shape(shape, _chunks(block_of), params.block), location)


def fingerprint_of(arr: Any, params: FieldParams, location: Mapping[str, Any] | None,
                   mask: Prepared | None = None) -> dict[str, Any]:
    """The input's fingerprint; a mask's own sits under ``mask`` (absent without one, so
    stores made before masks existed still match)."""
    fp = _content_fingerprint(arr, params, location, arr)
    if mask is not None:
        # a located mask is sampled on the field's block grid
        fp["mask"] = _content_fingerprint(mask[0], params, mask[1], arr if location else None)
    return fp


def _probe(arr: Any) -> np.ndarray:
    """One entry of `arr`'s dtype per axis (or its empty shape): checks dtype,
    dimensions and emptiness without reading data."""
    shape = tuple(int(s) for s in arr.shape)
    return np.empty((1,) * len(shape) if all(shape) else shape, dtype=arr.dtype)


def prepare(source: Any, key: str | None = None,
            storage_options: Mapping[str, Any] | None = None) -> Prepared:
    """(array handle, location) for a numpy array, a Zarr URL, an HDF5 file or a
    ``.npy`` path."""
    location = locate(source, key)
    if location is None:
        return check_field(source), None
    arr = open_field(location, storage_options)
    check_field(_probe(arr), what=location["url"])
    return arr, location


def prepare_mask(source: Any, shape: tuple[int, ...], key: str | None = None,
                 storage_options: Mapping[str, Any] | None = None, *, name: str = "mask") -> Prepared | None:
    """(mask handle, location) for a boolean array of `shape` in memory or in a file
    that stays where it is (``.npy``, Zarr, HDF5); None for no mask. Dtype and shape
    are checked from the metadata, not the data."""
    if source is None:
        return None
    location = locate(source, key)
    if location is None:
        return check_mask(source, shape, what=name), None
    handle = open_field(location, storage_options)
    if np.dtype(handle.dtype) != np.bool_:
        raise InputError(f"{name} {location['url']} must be boolean (True where an entry is part of the "
                         f"complex), got dtype {np.dtype(handle.dtype)}")
    if tuple(int(s) for s in handle.shape) != tuple(shape):
        raise InputError(f"{name} {location['url']} has shape {tuple(int(s) for s in handle.shape)}, "
                         f"the array {tuple(shape)}")
    return handle, location


def create_or_open(url: str, source: Any, params: FieldParams, *, key: str | None = None,
                   mask: Any = None, mask_key: str | None = None,
                   storage_options: Mapping[str, Any] | None = None,
                   discard: bool = False, names: Mapping[str, str] | None = None) -> RunStore:
    """The field run store at `url` for this input (and `mask`) and these parameters:
    opened if it exists (and must match), else planned and created. `names` spells the
    mask's parameter as the caller does in messages (``{"mask": "--mask"}``)."""
    from ..runs import open_or_create

    arr, location = prepare(source, key, storage_options)
    prepared_mask = prepare_mask(mask, tuple(int(s) for s in arr.shape), mask_key, storage_options,
                                 name=(names or {}).get("mask", "mask"))
    fp = fingerprint_of(arr, params, location, prepared_mask)
    return open_or_create(url, params.kind(tuple(int(s) for s in arr.shape), arr.dtype).name, params.as_dict(), fp,
                          lambda: job_spec(arr, params, location, fp, prepared_mask),
                          storage_options=storage_options, discard=discard)


# ---------------------------------------------------------------------------- the task

def _read_block(store: RunStore, name: str, location: Mapping[str, Any] | None,
                sel: tuple[slice, ...], task: int) -> np.ndarray:
    """Entries `sel` of the input `name`, from the store or from where it stays."""
    if location is None:
        return store.read_input(name, sel, task=task)
    handle = open_field(location, store.io.storage_options)
    return store.io.op(f"read {name} block", location["url"], lambda: np.asarray(handle[sel]), task=task)


def compute_task(store: RunStore, i: int, *, threads: int = 1) -> tuple[dict[str, np.ndarray], dict[str, int]]:
    """The task function: the jump table of the cells block `i` owns."""
    p, a = store.params, store.attrs
    shape, block = tuple(a["shape"]), tuple(a["block"])
    owned = owned_slices(i, shape, block)
    ext = halo_ranges([(s.start, s.stop) for s in owned], shape)
    sel = tuple(slice(lo, hi) for lo, hi in ext)
    halo = _read_block(store, "field", a["location"], sel, i)
    mask_spec = a.get("mask")
    halo_mask = None if mask_spec is None else \
        _read_block(store, "mask", mask_spec["location"], sel, i).astype(bool, copy=False)
    values, jumps = block_jumps(None, p["construction"], owned, superlevel=p["superlevel"],
                                mask_nan=p["mask_nan"], halo=halo, halo_offset=[lo for lo, _ in ext],
                                halo_mask=halo_mask, shape=shape)
    own_sel = tuple(slice(s.start - lo, s.stop - lo) for s, (lo, _) in zip(owned, ext))
    own = halo[own_sel]
    present = None if halo_mask is None else halo_mask[own_sel]
    if own.dtype.kind == "f" and p["mask_nan"]:
        present = ~np.isnan(own) if present is None else present & ~np.isnan(own)
    vals = own if present is None else own[present]
    n_present = int(vals.size)
    if n_present:
        lo_v, hi_v = float(vals.min()), float(vals.max())
        rng = np.array([-hi_v, -lo_v] if p["superlevel"] else [lo_v, hi_v], np.float64)
    else:
        rng = np.array([np.inf, -np.inf])
    out = {"values": values, "jumps": jumps, "range": rng, "present": np.array([n_present], np.int64)}
    if "part_bounds" in store.input_names:
        from .parts import offsets_at

        out["parts"] = offsets_at(values, store.read_input("part_bounds"))
    return out, {"entries": int(own.size), "halo": int(halo.size), "jumps": int(values.size)}


# ---------------------------------------------------------------------------- the fold

class FieldExtent:
    """The fold of ``field-parts``: the curve's domain (the blocks' ranges) and its
    present entries, nothing that grows with the curve (its parts are merged apart)."""

    def __init__(self, store: RunStore) -> None:
        self.range = np.array([np.inf, -np.inf])
        self.present = np.zeros(1, np.int64)

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        self.range = np.asarray(state["range"], np.float64).copy()
        self.present = np.asarray(state["present"], np.int64).copy()

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        for o in outputs:
            self.range = np.array([min(self.range[0], o["range"][0]), max(self.range[1], o["range"][1])])
            self.present = self.present + np.asarray(o["present"], np.int64)

    def state(self) -> dict[str, np.ndarray]:
        return {"range": self.range, "present": self.present}

    def domain(self) -> dict[str, Any]:
        """The curve's ``start``, ``eps`` and ``n_points`` as `FieldSum.curve` sets them."""
        n = int(self.present[0])
        if n == 0:
            return {"start": 0.0, "eps": 0.0, "n_points": 0}
        return {"start": float(self.range[0]), "eps": float(self.range[1]), "n_points": n}

    def result(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        return self.state(), {**self.domain(), "max_dim": None}


class FieldSum(JumpSum):
    """The field fold: jump tables summed as in the cloud fold, with the domain taken
    from the blocks' ranges and the present entries counted (`FieldExtent`)."""

    def __init__(self, store: RunStore) -> None:
        super().__init__(store)
        self.extent = FieldExtent(store)

    @property
    def range(self) -> np.ndarray:
        return self.extent.range

    @property
    def present(self) -> np.ndarray:
        return self.extent.present

    def restore(self, state: Mapping[str, np.ndarray]) -> None:
        super().restore(state)
        self.extent.restore(state)

    def add(self, tasks: list[int], outputs: list[Mapping[str, np.ndarray]]) -> None:
        super().add(tasks, outputs)
        self.extent.add(tasks, outputs)

    def state(self) -> dict[str, np.ndarray]:
        return {**super().state(), **self.extent.state()}

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
              construction: str = "vertices", superlevel: bool = False, mask: Any = None,
              mask_key: str | None = None, mask_nan: bool = False,
              block: Any = None, part_jumps: int | None = None,
              storage_options: Mapping[str, Any] | None = None,
              discard: bool = False, events: Any = None) -> Any:
    """Compute a field's exact curve as a resumable run on the run store `store`.

    Parameters
    ----------
    array_or_url : ndarray, str or path
        A numpy array (written into the store), a Zarr array's URL (a group's array
        named by `key`), an HDF5 file (``.h5``, ``.hdf5``; its dataset named by `key`
        unless it holds one) or a ``.npy`` path; the last three stay where they are.
    store : str
        The run store's URL; an existing store for the same input and parameters is
        resumed.
    where : chitally.runs.Where, optional
        Where tasks run; default: serially in this process.
    construction, superlevel, mask_nan
        As in `chitally.cubical.field_curve`.
    mask : ndarray of bool, str or path, optional
        True where an entry is part of the complex: a boolean array of the input's shape,
        in memory (written into the store) or in a ``.npy``, Zarr or HDF5 file (read
        block by block where it is; `mask_key` names its array or dataset).
    block : sequence of int, optional
        The entries each task owns along each axis (default: whole chunks of the input,
        about 4 million entries).
    part_jumps : int, optional
        Jumps one part of the curve holds (default `chitally.jobs.parts.PART_JUMPS`): an
        array that may have more distinct values (`distinct_bound`) runs as ``field-parts``, its curve reduced in parts of
        the scale on the workers.

    Returns
    -------
    chitally.runs.RunReport
        Its ``result`` is the `Curve` when the run is complete (a
        `chitally.jobs.parts.PartedCurve` when the curve is larger than one part).
    """
    from ..runs import Where, run

    params = FieldParams.checked(construction, superlevel, mask_nan, block, part_jumps)
    rs = create_or_open(store, array_or_url, params, key=key, mask=mask, mask_key=mask_key,
                        storage_options=storage_options, discard=discard)
    return run(rs, where if where is not None else Where(serial=True), events=events)


__all__ = ["CONSTRUCTIONS", "FieldExtent", "FieldParams", "FieldSum", "Hdf5Field", "compute_task", "create_or_open",
           "distinct_bound", "field_run", "job_spec", "open_field", "owned_slices", "prepare_mask", "read_curve"]
