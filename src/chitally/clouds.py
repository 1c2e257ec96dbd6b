"""Collections of point clouds for feature matrices: read, name, validate.

A collection is a Python sequence of arrays, a 3-D array (clouds x points x dims), a
folder of point files (any format `read_points` reads), an ``.npz`` of many arrays, or a
Zarr group of arrays. Every cloud is validated like a single input (the message names
the cloud); clouds may differ in size but not in dimension. Labels come from a sequence
or a CSV of ``name,label`` lines. Nothing here computes a curve.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .sources import InputError, read_points
from .validate import validate_points

_POINT_FILES = (".npy", ".csv", ".txt", ".tsv", ".csv.gz", ".txt.gz", ".h5", ".hdf5", ".parquet", ".pq")


@dataclass(frozen=True)
class Collection:
    """Named, validated clouds of one dimension, with optional labels."""

    names: tuple[str, ...]
    clouds: tuple[np.ndarray, ...]
    labels: tuple[Any, ...] | None = None

    @property
    def dim(self) -> int:
        return int(self.clouds[0].shape[1])

    def __len__(self) -> int:
        return len(self.clouds)


def _checked(names: Sequence[str], clouds: Sequence[Any], where: str) -> Collection:
    if len(clouds) == 0:
        raise InputError(f"{where}: the collection holds no clouds")
    out = []
    for name, cloud in zip(names, clouds):
        out.append(validate_points(cloud, where=f"cloud {name!r}"))
    dims = {c.shape[1] for c in out}
    if len(dims) > 1:
        first = out[0].shape[1]
        odd = next(n for n, c in zip(names, out) if c.shape[1] != first)
        raise InputError(f"{where}: clouds of different dimensions (cloud {names[0]!r} has "
                         f"{first} coordinates, cloud {odd!r} has "
                         f"{out[list(names).index(odd)].shape[1]})")
    if len(set(names)) != len(names):
        raise InputError(f"{where}: cloud names repeat")
    return Collection(tuple(str(n) for n in names), tuple(out))


def read_collection(source: Any, *, names: Sequence[str] | None = None, key: str | None = None) -> Collection:
    """Read and validate a collection of clouds (see the module's description).

    Parameters
    ----------
    source : sequence of arrays, 3-D array, or path / URL
        The clouds.
    names : sequence of str, optional
        Names for in-memory clouds (default: their positions, "0", "1", ...).
    key : str, optional
        Inside each file of a folder: as for `read_points`.
    """
    if isinstance(source, Collection):
        return source
    if isinstance(source, (str, os.PathLike)):
        return _read_path(os.fspath(source), key)
    if isinstance(source, np.ndarray) and source.ndim == 3:
        clouds = [source[i] for i in range(source.shape[0])]
    elif isinstance(source, np.ndarray):
        raise InputError(f"a collection array must be 3-D (clouds x points x dims), got shape {source.shape}")
    else:
        try:
            clouds = list(source)
        except TypeError:
            raise InputError(f"a collection must be a sequence of arrays, a 3-D array or a path, "
                             f"not {type(source).__name__}") from None
    labels = [str(i) for i in range(len(clouds))] if names is None else [str(n) for n in names]
    if len(labels) != len(clouds):
        raise InputError(f"{len(labels)} names for {len(clouds)} clouds")
    return _checked(labels, clouds, "the collection")


def _read_path(path: str, key: str | None) -> Collection:
    p = Path(os.path.expanduser(path))
    if p.is_dir() and not (p / "zarr.json").exists() and not (p / ".zgroup").exists():
        files = sorted(f for f in p.iterdir() if not f.name.startswith(".")
                       and f.name.lower().endswith(_POINT_FILES))
        if not files:
            raise InputError(f"{path}: no point files in this folder (looked for {', '.join(_POINT_FILES)})")
        names = [f.name.split(".")[0] for f in files]
        if len(set(names)) != len(names):
            names = [f.name for f in files]
        return _checked(names, [read_points(f, key=key) for f in files], path)
    if p.is_dir():
        import zarr

        group = zarr.open_group(str(p), mode="r")
        arrays = sorted(group.arrays(), key=lambda kv: kv[0])
        if not arrays:
            raise InputError(f"{path}: the Zarr group holds no arrays")
        return _checked([n for n, _ in arrays], [np.asarray(a[...]) for _, a in arrays], path)
    if path.lower().endswith(".npz"):
        if not p.exists():
            raise InputError(f"{path}: no such file")
        with np.load(p, allow_pickle=False) as z:
            names = sorted(z.files)
            return _checked(names, [z[n] for n in names], path)
    if path.lower().endswith(".npy"):
        if not p.exists():
            raise InputError(f"{path}: no such file")
        a = np.load(p, mmap_mode="r", allow_pickle=False)
        if a.ndim != 3:
            raise InputError(f"{path}: a collection in one .npy must be 3-D (clouds x points x dims), "
                             f"got shape {a.shape}")
        return _checked([str(i) for i in range(a.shape[0])], [a[i] for i in range(a.shape[0])], path)
    raise InputError(f"{path}: a collection is a folder of point files, an .npz of arrays, a 3-D "
                     ".npy or a Zarr group")


def read_labels(source: Any, names: Sequence[str], *, item: str = "cloud") -> tuple[Any, ...]:
    """Labels in `names`' order, from a sequence or a CSV file of ``name,label`` lines
    (a header line ``name,label`` is allowed). Every item needs a label; `item` is
    what the messages call one (cloud, field)."""
    if isinstance(source, (str, os.PathLike)):
        found: dict[str, str] = {}
        with open(source, newline="") as f:
            for i, row in enumerate(csv.reader(f)):
                if not row or row[0].startswith("#"):
                    continue
                if len(row) < 2:
                    raise InputError(f"{source}: line {i + 1} needs name,label")
                if i == 0 and [c.strip().lower() for c in row[:2]] == ["name", "label"]:
                    continue
                found[row[0].strip()] = row[1].strip()
        missing = [n for n in names if n not in found]
        if missing:
            raise InputError(f"{source}: no label for {item} {missing[0]!r} ({len(missing)} missing)")
        return tuple(found[n] for n in names)
    labels = tuple(source)
    if len(labels) != len(names):
        raise InputError(f"{len(labels)} labels for {len(names)} {item}s")
    return labels
