"""Folders of 2-D slices (TIFF or PNG), read as one volume in natural name order.

``slice_2.png`` sorts before ``slice_10.png``. Each slice is read only when a region needs it;
a slice whose size or type differs from the first is an error naming that file. Voxel size (Y, X)
comes from the first TIFF's resolution tags when present; Z spacing is unknown.
"""
from __future__ import annotations

import os
import re
from typing import Sequence

import numpy as np

from ..errors import VolumeReadError
from .base import SliceFilesBackend, Volume, check_pixel_dtype, make_source
from .geometry import check_slice_steps

__all__ = ["open_slices", "natural_key", "read_2d_image"]

SUFFIXES = (".tif", ".tiff", ".png")
_DIGITS = re.compile(r"(\d+)")


def natural_key(name: str) -> list[object]:
    """Sort key treating digit runs as numbers (three lines; not worth a dependency).

    >>> sorted(["s10.png", "s2.png", "s1.png"], key=natural_key)
    ['s1.png', 's2.png', 's10.png']
    """
    return [int(t) if t.isdigit() else t.lower() for t in _DIGITS.split(name)]


def _slice_numbers(names: Sequence[str]) -> list[int] | None:
    """The slice number of each name: the one digit run that differs between the names (None
    when no single run does, e.g. names without numbers)."""
    runs = [_DIGITS.findall(n) for n in names]
    if len({len(r) for r in runs}) != 1 or not runs[0]:
        return None
    varying = [i for i in range(len(runs[0])) if len({r[i] for r in runs}) > 1]
    if len(varying) != 1:
        return None
    return [int(r[varying[0]]) for r in runs]


def read_2d_image(path: str, rgb: str = "refuse") -> np.ndarray:
    """Read one 2-D grayscale image (TIFF via tifffile, PNG via Pillow)."""
    try:
        if path.lower().endswith(".png"):
            from PIL import Image

            with Image.open(path) as im:
                arr = np.asarray(im)
        else:
            import tifffile

            arr = tifffile.imread(path)
    except Exception as err:  # both libraries raise many unrelated types for broken files
        raise VolumeReadError(f"{path}: not a readable image ({err})") from err
    if arr.ndim == 3 and arr.shape[-1] in (3, 4):
        if rgb != "luminance":
            raise VolumeReadError(f"{path}: colour image; warmstart reads grayscale (rgb='luminance' converts it)")
        arr = arr[..., :3].astype(np.float32) @ np.asarray([0.299, 0.587, 0.114], np.float32)  # ITU-R BT.601
    if arr.ndim != 2:
        raise VolumeReadError(f"{path}: image has shape {arr.shape}; a slice folder needs 2-D slices")
    return arr


def open_slices(files: Sequence[str | os.PathLike[str]], folder: str | os.PathLike[str] | None = None,
                rgb: str = "refuse") -> Volume:
    """Open 2-D slice files as one volume.

    Parameters
    ----------
    files : sequence of path
        The slices; sorted naturally here.
    folder : path, optional
        The folder they live in (the source's path); default: the first file's folder.
    rgb : {"refuse", "luminance"}
    """
    files = sorted((os.fspath(f) for f in files), key=lambda f: natural_key(os.path.basename(f)))
    if not files:
        raise VolumeReadError(f"{folder}: no slice files")
    if len(files) > 1:
        numbers = _slice_numbers([os.path.basename(f) for f in files])
        if numbers is not None:  # a gap in the numbering is a missing slice
            check_slice_steps(numbers, os.fspath(folder or os.path.dirname(files[0])), "",
                              [os.path.basename(f) for f in files])
    first = read_2d_image(files[0], rgb)
    dtype = check_pixel_dtype(first.dtype, files[0])
    voxel: tuple[float | None, float | None, float | None] = (None, None, None)
    if files[0].lower().endswith((".tif", ".tiff")):
        import tifffile

        from .tiff import tiff_voxel_size_um

        with tifffile.TiffFile(files[0]) as tif:
            voxel, _ = tiff_voxel_size_um(tif)
        voxel = (None, voxel[1], voxel[2])
    folder = os.fspath(folder) if folder is not None else os.path.dirname(os.path.abspath(files[0]))

    def read_one(path: str) -> np.ndarray:
        img = read_2d_image(path, rgb)
        if img.dtype != dtype:
            raise VolumeReadError(f"{path}: slice type {img.dtype}, the rest of the stack is {dtype}")
        return img

    backend = SliceFilesBackend(files, read_one, first.shape, dtype)
    source = make_source(folder, "slices", files=files)
    meta = {"n_files": len(files), "first_file": os.path.basename(files[0]), "voxel_size_from": "first slice's tags"}
    return Volume(backend, source, voxel, meta)
