"""NumPy ``.npy`` reader: the header is parsed by numpy; pixels are read at the data offset.

An ``.npy`` file holds no voxel size; pass one with ``voxel_size_um`` (CLI recipes:
``voxel_size_um`` per source) or accept "unknown".
"""
from __future__ import annotations

import os

import numpy as np

from ..errors import VolumeReadError
from .base import ArrayBackend, RawBackend, Volume, check_pixel_dtype, make_source

__all__ = ["open_npy"]

SUFFIXES = (".npy",)


def open_npy(path: str | os.PathLike[str]) -> Volume:
    """Open a 2-D or 3-D ``.npy`` array as a lazy volume."""
    path = os.fspath(path)
    try:
        mm = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as err:
        raise VolumeReadError(f"{path}: not a readable .npy file ({err})") from err
    if not isinstance(mm, np.memmap) and mm.size:
        raise VolumeReadError(f"{path}: .npy file could not be memory-mapped")
    dtype = check_pixel_dtype(mm.dtype, path)
    if mm.ndim not in (2, 3):
        raise VolumeReadError(f"{path}: array has shape {mm.shape}; expected 2-D or 3-D")
    shape = mm.shape if mm.ndim == 3 else (1,) + mm.shape
    if mm.flags.c_contiguous and mm.size:
        backend = RawBackend(path, mm.offset, shape, dtype)
        del mm
    else:  # Fortran order: strided memory map, still lazy
        backend = ArrayBackend(mm.reshape(shape))
    return Volume(backend, make_source(path, "npy"), (None, None, None), {"voxel_size_from": "none (.npy)"})
