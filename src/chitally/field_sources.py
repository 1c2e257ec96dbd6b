"""Readers for arrays whose cubical filtrations chitally counts (`chitally field`,
`chitally batch --fields`).

One array: ``.npy`` (memory-mapped), ``.npz`` (an array named by key, or its only one),
Zarr arrays and groups (local path or fsspec URL; key names a group's array), HDF5
datasets (``.h5``/``.hdf5`` through h5py; key names one when the file holds several),
PNG/JPEG images through Pillow and TIFF stacks through tifffile, each only when that
library is installed (the ``images`` extra). Colour images are converted to grey with
Pillow's ``"L"`` conversion.

Many arrays (`read_fields`, for a feature matrix): a folder of images and ``.npy``
arrays, or a folder with one subfolder of them per class (the subfolder names are the
labels, as image classification datasets are commonly laid out), a stack whose first
axis indexes the items (an array in memory, a ``.npy`` file, a Zarr array), an ``.npz``
or a Zarr group of arrays (one item each), or a sequence of arrays. Shapes and numbers
of dimensions may differ from item to item. Nothing here computes a curve.
"""

from __future__ import annotations

import importlib.util
import os
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .validate import InputError

IMAGE_ENDINGS = (".png", ".jpg", ".jpeg")
TIFF_ENDINGS = (".tif", ".tiff")
HDF5_ENDINGS = (".h5", ".hdf5")


def stays_in_place(path: str) -> bool:
    """Whether a run can read this input where it is (Zarr, HDF5 or .npy), block by block."""
    lower = path.lower().rstrip("/")
    return lower.endswith((".npy", ".zarr", *HDF5_ENDINGS)) or "://" in path


def read_field(path: str, key: str | None = None) -> np.ndarray:
    """The array stored at `path` (whole, or memory-mapped for .npy)."""
    lower = path.lower().rstrip("/")
    if "://" not in path and not os.path.exists(path):
        raise InputError(f"no such file or directory: {path}")
    if lower.endswith(".npy"):
        return np.load(path, mmap_mode="r", allow_pickle=False)
    if lower.endswith(".npz"):
        with np.load(path, allow_pickle=False) as z:
            names = list(z.files)
            if key is None and len(names) != 1:
                raise InputError(f"{path} holds {len(names)} arrays: name one with --key ({names})")
            name = key if key is not None else names[0]
            if name not in names:
                raise InputError(f"{path} has no array {name!r} ({names})")
            return z[name]
    if lower.endswith(HDF5_ENDINGS):
        from .jobs.field import open_field

        return open_field({"format": "hdf5", "url": path, "key": key})[...]
    if lower.endswith(IMAGE_ENDINGS):
        if importlib.util.find_spec("PIL") is None:
            raise InputError(f"{path}: reading PNG/JPEG needs Pillow (pip install 'chitally[images]')")
        from PIL import Image

        with Image.open(path) as im:
            if im.mode not in ("L", "I", "I;16", "F", "1"):
                im = im.convert("L")
            return np.asarray(im)
    if lower.endswith(TIFF_ENDINGS):
        if importlib.util.find_spec("tifffile") is None:
            raise InputError(f"{path}: reading TIFF needs tifffile (pip install 'chitally[images]')")
        import tifffile

        return np.asarray(tifffile.imread(path))
    if lower.endswith(".zarr") or "://" in path or os.path.isdir(path):
        from .jobs.field import open_field

        return np.asarray(open_field({"format": "zarr", "url": path, "key": key})[...])
    raise InputError(f"{path}: unknown array format (.npy, .npz, .zarr, .h5, .hdf5, .png, .jpg, .tif)")


#: What a folder of fields holds: one array or image per file.
FIELD_ENDINGS = (".npy", *IMAGE_ENDINGS, *TIFF_ENDINGS)


def _field_files(folder: str) -> list[str]:
    return sorted(n for n in os.listdir(folder) if not n.startswith(".") and n.lower().endswith(FIELD_ENDINGS)
                  and os.path.isfile(os.path.join(folder, n)))


def list_images(folder: str) -> list[str]:
    """The image and array files of a folder, sorted by name."""
    names = _field_files(folder)
    if not names:
        raise InputError(f"{folder} holds no images or .npy arrays")
    return [os.path.join(folder, n) for n in names]


# ---------------------------------------------------------------- collections


@dataclass(frozen=True)
class FieldCollection:
    """Named arrays (images, volumes, any n-D arrays) with optional labels.

    Attributes
    ----------
    names : tuple of str
        One name a field, never repeated (the row names of a feature matrix).
    fields : tuple of ndarray
        Checked by `chitally.cubical.check_field` (real dtype, 1 to 8 dimensions, not
        empty); values are checked where they are counted.
    labels : tuple or None
    """

    names: tuple[str, ...]
    fields: tuple[np.ndarray, ...]
    labels: tuple[Any, ...] | None = None

    def __len__(self) -> int:
        return len(self.fields)

    def with_labels(self, labels: Sequence[Any] | None) -> FieldCollection:
        return replace(self, labels=None if labels is None else tuple(labels))


def _is_zarr_folder(path: str) -> bool:
    return any(os.path.exists(os.path.join(path, m)) for m in ("zarr.json", ".zgroup", ".zarray"))


def _class_folders(folder: str) -> list[str]:
    return sorted(n for n in os.listdir(folder) if not n.startswith(".")
                  and os.path.isdir(os.path.join(folder, n)))


def is_field_collection(source: Any) -> bool:
    """Whether `source` is unmistakably a collection of fields: a `FieldCollection`, or
    a folder holding PNG/JPEG/TIFF images, directly or in subfolders. A folder of
    ``.npy`` files alone could be point clouds, so it is not (say so explicitly)."""
    if isinstance(source, FieldCollection):
        return True
    if not isinstance(source, (str, os.PathLike)):
        return False
    folder = os.fspath(source)
    if not os.path.isdir(folder) or _is_zarr_folder(folder):
        return False
    images = (*IMAGE_ENDINGS, *TIFF_ENDINGS)
    files = _field_files(folder)
    if files:
        return any(n.lower().endswith(images) for n in files)
    return any(n.lower().endswith(images) for sub in _class_folders(folder)
               for n in _field_files(os.path.join(folder, sub)))


def _stem_names(files: Sequence[str]) -> list[str]:
    names = [os.path.basename(f).split(".")[0] for f in files]
    return names if len(set(names)) == len(names) else [os.path.basename(f) for f in files]


def _read_folder(folder: str) -> FieldCollection:
    files = _field_files(folder)
    if files:  # images at the top: these are the items (subfolders, if any, are not read)
        paths = [os.path.join(folder, n) for n in files]
        return _checked(_stem_names(paths), [read_field(p) for p in paths], folder)
    names: list[str] = []
    fields: list[np.ndarray] = []
    labels: list[str] = []
    for sub in _class_folders(folder):
        inner = os.path.join(folder, sub)
        paths = [os.path.join(inner, n) for n in _field_files(inner)]
        if not paths:
            raise InputError(f"{folder}: the class folder {sub!r} holds no images or .npy arrays")
        names += [f"{sub}/{n}" for n in _stem_names(paths)]
        fields += [read_field(p) for p in paths]
        labels += [sub] * len(paths)
    if not fields:
        raise InputError(f"{folder} holds no images or .npy arrays, nor one subfolder of them per class")
    return _checked(names, fields, folder).with_labels(labels)


def _stack(arr: Any, where: str) -> list[Any]:
    if len(arr.shape) < 2:
        raise InputError(f"{where}: a stack of fields needs 2 or more dimensions (the first indexes the "
                         f"items), got shape {tuple(arr.shape)}")
    return [arr[i] for i in range(arr.shape[0])]


def _read_path(path: str, key: str | None) -> FieldCollection:
    lower = path.lower().rstrip("/")
    local = "://" not in path
    if local and not os.path.exists(path):
        raise InputError(f"no such file or directory: {path}")
    if local and os.path.isdir(path) and not _is_zarr_folder(path) and not lower.endswith(".zarr"):
        return _read_folder(path)
    if lower.endswith(".npy"):
        a = np.load(path, mmap_mode="r", allow_pickle=False)
        return _checked([str(i) for i in range(a.shape[0])] if a.ndim else [], _stack(a, path), path)
    if lower.endswith(".npz") and key is None:
        with np.load(path, allow_pickle=False) as z:
            names = sorted(z.files)
            return _checked(names, [z[n] for n in names], path)
    if lower.endswith(".npz"):
        a = read_field(path, key)
        return _checked([str(i) for i in range(a.shape[0])] if a.ndim else [], _stack(a, path), path)
    if lower.endswith(".zarr") or not local or _is_zarr_folder(path):
        import zarr

        try:
            node = zarr.open(store=path, mode="r")
        except Exception as exc:  # zarr raises many kinds for a missing or foreign location
            raise InputError(f"cannot open {path} as a Zarr array or group: {exc}") from exc
        if key is not None:
            try:
                node = node[key]
            except KeyError:
                raise InputError(f"{path} has no array {key!r}") from None
        if hasattr(node, "shape"):
            return _checked([str(i) for i in range(node.shape[0])] if node.shape else [],
                            _stack(node, path), path)
        arrays = sorted(node.arrays(), key=lambda kv: kv[0])
        return _checked([n for n, _ in arrays], [a for _, a in arrays], path)
    raise InputError(f"{path}: a collection of fields is a folder of images or .npy arrays (or of one "
                     "subfolder per class), a .npy or Zarr stack, or an .npz of arrays")


def _checked(names: Sequence[str], fields: Sequence[Any], where: str) -> FieldCollection:
    from .cubical import check_field

    if len(fields) == 0:
        raise InputError(f"{where}: the collection holds no fields")
    if len(set(names)) != len(names):
        raise InputError(f"{where}: field names repeat")
    out = tuple(check_field(np.asarray(f) if not isinstance(f, np.ndarray) else f, what=f"field {n!r}")
                for n, f in zip(names, fields))
    return FieldCollection(tuple(str(n) for n in names), out)


def read_fields(source: Any, *, names: Sequence[str] | None = None, key: str | None = None) -> FieldCollection:
    """Read a collection of fields for a feature matrix (see the module's description).

    Parameters
    ----------
    source : FieldCollection, sequence of arrays, array, or path / URL
        A sequence holds one array per item; an array (a ``.npy`` file, a Zarr array) is
        a stack whose first axis indexes the items; a folder holds images and ``.npy``
        arrays, or one subfolder of them per class (labelled by the subfolder's name,
        items named ``<class>/<file name>``); an ``.npz`` or a Zarr group holds one item
        per array.
    names : sequence of str, optional
        Names for in-memory items (default: their positions, "0", "1", ...).
    key : str, optional
        The stack inside an ``.npz`` or a Zarr group.

    Returns
    -------
    FieldCollection
        With labels when a folder has one subfolder per class.

    Raises
    ------
    InputError
        An empty collection, an item that is not an array of real numbers of 1 to 8
        dimensions (the message names it), names that repeat or do not match in number.
    """
    if isinstance(source, FieldCollection):
        col = source
    elif isinstance(source, (str, os.PathLike)):
        col = _read_path(os.fspath(source), key)
    elif isinstance(source, np.ndarray):
        col = _checked([str(i) for i in range(source.shape[0])] if source.ndim else [],
                       _stack(source, "the stack"), "the stack")
    else:
        try:
            items = list(source)
        except TypeError:
            raise InputError(f"a collection of fields is a sequence of arrays, an array whose first axis "
                             f"indexes them, or a path, not {type(source).__name__}") from None
        col = _checked([str(i) for i in range(len(items))], items, "the collection")
    if names is not None:
        names = [str(n) for n in names]
        if len(names) != len(col):
            raise InputError(f"{len(names)} names for {len(col)} fields")
        if len(set(names)) != len(names):
            raise InputError("field names repeat")
        col = replace(col, names=tuple(names))
    return col
