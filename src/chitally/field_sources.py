"""Readers for arrays whose cubical filtrations chitally counts (`chitally field`).

``.npy`` (memory-mapped), ``.npz`` (an array named by key, or its only one), Zarr arrays
and groups (local path or fsspec URL; key names a group's array), HDF5 datasets
(``.h5``/``.hdf5`` through h5py; key names one when the file holds several), PNG/JPEG images through
Pillow and TIFF stacks through tifffile, each only when that library is installed (the
``images`` extra). Colour images are converted to grey with Pillow's ``"L"`` conversion.
"""

from __future__ import annotations

import importlib.util
import os

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


def list_images(folder: str) -> list[str]:
    """The image and array files of a folder, sorted by name."""
    endings = (".npy", *IMAGE_ENDINGS, *TIFF_ENDINGS)
    names = sorted(n for n in os.listdir(folder) if n.lower().endswith(endings))
    if not names:
        raise InputError(f"{folder} holds no images or .npy arrays")
    return [os.path.join(folder, n) for n in names]
