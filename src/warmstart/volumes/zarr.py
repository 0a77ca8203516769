"""Zarr reader: plain v2/v3 arrays and OME-Zarr images (OME-NGFF 0.4 and 0.5 multiscales).

Pixels are read chunk-wise through zarr-python. For an OME-Zarr image the voxel size of each
resolution level is the product of the dataset's ``scale`` coordinateTransformation and the
optional multiscale-wide one, with each axis's ``unit`` (OME-NGFF 0.4 section "multiscales";
0.5 keeps the same fields under the ``ome`` attribute key).
"""
from __future__ import annotations

import os
import warnings
from typing import Any

import numpy as np

from ..errors import VolumeReadError
from .base import ArrayBackend, Volume, check_pixel_dtype, make_source
from .gaps import GapMasked, missing_chunks, project_boxes
from .units import to_micrometres

__all__ = ["open_zarr", "ome_levels", "choose_level", "is_zarr_path"]


def is_zarr_path(path: str | os.PathLike[str]) -> bool:
    """True for a folder holding zarr metadata (v2 ``.zarray``/``.zgroup`` or v3 ``zarr.json``)."""
    p = os.fspath(path)
    return os.path.isdir(p) and any(os.path.exists(os.path.join(p, f)) for f in ("zarr.json", ".zarray", ".zgroup"))


def _multiscales(attrs: dict[str, Any]) -> list[dict[str, Any]] | None:
    if "ome" in attrs and isinstance(attrs["ome"], dict) and "multiscales" in attrs["ome"]:
        return attrs["ome"]["multiscales"]  # OME-NGFF 0.5
    return attrs.get("multiscales")  # OME-NGFF 0.4


def _scale_of(transforms: list[dict[str, Any]] | None, n: int) -> list[float]:
    scale = [1.0] * n
    for t in transforms or []:
        if t.get("type") == "scale" and "scale" in t:
            scale = [a * float(b) for a, b in zip(scale, t["scale"])]
    return scale


def ome_levels(attrs: dict[str, Any], ndim: int = 5) -> tuple[list[dict[str, Any]], list[str]]:
    """Resolution levels of an OME-Zarr image.

    Parameters
    ----------
    attrs : dict
        The image group's attributes.
    ndim : int
        Rank of the level arrays; names the axes of pre-0.3 images, which have no ``axes`` field
        (their axes are the last ``ndim`` of t, c, z, y, x).

    Returns
    -------
    levels : list of dict
        ``{"path": str, "voxel_size_um": {axis name: µm or None}}`` per level, finest first as the
        specification orders them.
    axes : list of str
        Axis names (``t``, ``c``, ``z``, ``y``, ``x`` subset) in array order.
    """
    ms = _multiscales(attrs)
    if not ms:
        raise KeyError("no multiscales metadata")
    m = ms[0]
    axes_md = m.get("axes") or list("tczyx"[-ndim:])
    axes_md = [{"name": a} if isinstance(a, str) else a for a in axes_md]  # 0.3 stored plain names
    names = [a["name"].lower() for a in axes_md]
    global_scale = _scale_of(m.get("coordinateTransformations"), len(names))
    levels = []
    for ds in m["datasets"]:
        scale = _scale_of(ds.get("coordinateTransformations"), len(names))
        vs = {}
        for a, s, g in zip(axes_md, scale, global_scale):
            if a.get("type", "space" if a["name"].lower() in "zyx" else None) == "space":
                # OME-NGFF gives a unit no default: a scale without one is a number of unknown
                # length, so the voxel size stays unknown (never guessed as micrometres).
                unit = a.get("unit")
                vs[a["name"].lower()] = None if not unit else to_micrometres(s * g, unit)
        levels.append({"path": ds["path"], "voxel_size_um": vs})
    return levels, names


def choose_level(levels: list[dict[str, Any]], target_um: float | None) -> int:
    """Pick the resolution level to sample from.

    The coarsest level whose finest in-plane voxel size does not exceed ``target_um`` (so the
    sampler only ever downsamples to the target); the finest level when none is that fine or no
    target is given or sizes are unknown.
    """
    if target_um is None:
        return 0
    best = 0
    for i, lv in enumerate(levels):
        vs = [lv["voxel_size_um"].get(a) for a in ("y", "x")]
        vs = [v for v in vs if v is not None]
        if not vs:
            return 0
        if min(vs) <= target_um * (1 + 1e-6):
            best = i
    return best


class _OmeSelect:
    """Index a t/c/z/y/x array as (Z, Y, X)."""

    def __init__(self, array: Any, names: list[str], fixed: dict[str, int]):
        self._array, self._names, self._fixed = array, names, fixed
        sizes = dict(zip(names, array.shape))
        self.shape = (sizes.get("z", 1), sizes["y"], sizes["x"])
        self.dtype = array.dtype

    def __getitem__(self, region: tuple[slice, slice, slice]) -> np.ndarray:
        idx = {"z": region[0], "y": region[1], "x": region[2]}
        out = np.asarray(self._array[tuple(idx.get(n, self._fixed.get(n, 0)) for n in self._names)])
        return out if "z" in self._names else out[np.newaxis]


def _names_of(arr: Any) -> list[str]:
    """Axis names of a plain array as :func:`_squeeze_to_3d` reads it."""
    n = len(arr.shape)
    return ["y", "x"] if n == 2 else [f"_{i}" for i in range(n - 3)] + ["z", "y", "x"]


def _squeeze_to_3d(arr: Any, path: str) -> Any:
    shape = tuple(arr.shape)
    if len(shape) == 2:
        return _OmeSelect(arr, ["y", "x"], {})
    if len(shape) == 3:
        return arr
    extra = [i for i, s in enumerate(shape[:-3]) if s != 1]
    if extra:
        raise VolumeReadError(f"{path}: zarr array of shape {shape} has more than 3 non-singleton axes")
    names = [f"_{i}" for i in range(len(shape) - 3)] + ["z", "y", "x"]
    return _OmeSelect(arr, names, {})


def open_zarr(
    path: str | os.PathLike[str],
    target_voxel_um: float | None = None,
    level: int | None = None,
    channel: int | None = None,
) -> Volume:
    """Open a zarr array or OME-Zarr image as a lazy volume.

    Parameters
    ----------
    path : path
        Folder of a zarr array, of a group holding one array, or of an OME-Zarr image.
    target_voxel_um : float, optional
        In-plane voxel size (µm) the sampler will resample to; picks the nearest OME-Zarr level
        that is not coarser (see :func:`choose_level`).
    level : int, optional
        Explicit level index; overrides ``target_voxel_um``.
    channel : int, optional
        Channel of a multi-channel image.
    """
    import zarr

    path = os.fspath(path)
    try:
        node = zarr.open(path, mode="r")
    except Exception as err:  # zarr raises several unrelated types for unreadable metadata
        raise VolumeReadError(f"{path}: not a readable zarr store ({err})") from err
    meta: dict[str, Any] = {}
    voxel: tuple[float | None, float | None, float | None] = (None, None, None)
    fmt = "zarr"
    if isinstance(node, zarr.Group):
        attrs = dict(node.attrs)
        if _multiscales(attrs):
            fmt = "ome-zarr"
            first = _multiscales(attrs)[0]["datasets"][0]["path"]  # type: ignore[index]
            levels, names = ome_levels(attrs, ndim=len(node[first].shape))
            i = level if level is not None else choose_level(levels, target_voxel_um)
            if not 0 <= i < len(levels):
                raise VolumeReadError(f"{path}: level {i} asked, the image has {len(levels)}")
            arr = node[levels[i]["path"]]
            sizes = dict(zip(names, arr.shape))
            fixed: dict[str, int] = {}
            if sizes.get("c", 1) > 1:
                if channel is None:
                    raise VolumeReadError(f"{path}: {sizes['c']} channels; choose one with channel=N (CLI: --channel N)")
                fixed["c"] = channel
            if sizes.get("t", 1) > 1:
                warnings.warn(f"{path}: {sizes['t']} time points; reading the first", stacklevel=2)
            vs = levels[i]["voxel_size_um"]
            voxel = (vs.get("z"), vs.get("y"), vs.get("x"))
            meta.update(level=i, levels=[[lv["voxel_size_um"].get(a) for a in "zyx"] for lv in levels],
                        voxel_size_from="ome-ngff coordinateTransformations")
            array: Any = _OmeSelect(arr, names, fixed)
            raw, raw_dir, raw_names, raw_fixed = arr, os.path.join(path, levels[i]["path"]), names, fixed
        else:
            arrays = list(node.array_keys())
            if len(arrays) != 1:
                raise VolumeReadError(
                    f"{path}: zarr group without OME multiscales metadata holds {len(arrays)} arrays "
                    f"({', '.join(arrays[:5])}); point at one array"
                )
            raw, raw_dir = node[arrays[0]], os.path.join(path, arrays[0])
            array = _squeeze_to_3d(raw, path)
            raw_names, raw_fixed = _names_of(raw), {}
    else:
        raw, raw_dir = node, path
        array = _squeeze_to_3d(node, path)
        raw_names, raw_fixed = _names_of(raw), {}
    check_pixel_dtype(array.dtype, path)
    gaps = missing_chunks(raw, raw_dir)
    if gaps is not None and gaps[0]:
        boxes, total = [box for _, box in gaps[0]], gaps[1]
        if len(boxes) == total:
            raise VolumeReadError(f"{path}: all {total} chunk files are missing: the array holds no data "
                                  "(a damaged copy, or one written empty)")
        warnings.warn(f"{path}: {len(boxes)} of {total} chunk files are missing; read as gaps, left out of the "
                      "intensity fit and of the patches", stacklevel=2)
        meta.update(missing_chunks=len(boxes), chunks=total, stored_dtype=str(array.dtype))
        array = GapMasked(array, project_boxes(boxes, raw_names, raw_fixed))
    meta["zarr_format"] = int(getattr(getattr(node, "metadata", None), "zarr_format", 0) or 0)
    return Volume(ArrayBackend(array), make_source(path, fmt), voxel, meta)
