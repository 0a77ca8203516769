"""TIFF reader: single images, multi-page stacks, BigTIFF, ImageJ hyperstacks, OME-TIFF.

Pixels come through tifffile. Uncompressed contiguous data is read with plain file reads
(:class:`~warmstart.volumes.base.RawBackend`); everything else (compressed, tiled, strips spread
over the file) through tifffile's chunk-wise zarr view, so neither path loads the whole file.

Voxel size, first source that has it wins: OME-XML ``PhysicalSize{X,Y,Z}`` with their units;
ImageJ ``spacing`` (Z) and ``unit`` with the resolution tags (Y, X); the TIFF 6.0 resolution tags
``XResolution``/``YResolution`` (pixels per ``ResolutionUnit``: 2 = inch, 3 = centimetre, 1 = no
absolute unit, read as unknown).
"""
from __future__ import annotations

import os
import warnings
import xml.etree.ElementTree as ET
from typing import Any

import numpy as np

from ..errors import VolumeReadError
from .base import ArrayBackend, GrayscaleBackend, RawBackend, Volume, check_pixel_dtype, make_source
from .units import to_micrometres

__all__ = ["open_tiff", "tiff_voxel_size_um"]

SUFFIXES = (".tif", ".tiff", ".btf", ".tf8", ".tf2")
_STACK_AXES = "ZQIT"  # tifffile's names for a page sequence: Z planes, Q unknown, I images, T time
# 72 and 96 dpi are the defaults of image editors and screens, not a measurement of the sample.
_SCREEN_DPI = (72.0, 96.0)


class _AxisSelect:
    """Index a tifffile series (any axes) as (Z, Y, X[, S])."""

    def __init__(self, array: Any, axes: str, stack: str | None, fixed: dict[str, int], keep_samples: bool):
        self._array, self._axes, self._stack, self._fixed = array, axes, stack, fixed
        self._keep_samples = keep_samples
        sizes = dict(zip(axes, array.shape))
        self.shape = (sizes.get(stack, 1) if stack else 1, sizes["Y"], sizes["X"])
        if keep_samples:
            self.shape = self.shape + (sizes["S"],)
        self.dtype = array.dtype

    def __getitem__(self, region: tuple[slice, ...]) -> np.ndarray:
        zs, ys, xs = region[:3]
        index: list[Any] = []
        for ax in self._axes:
            if ax == self._stack:
                index.append(zs)
            elif ax == "Y":
                index.append(ys)
            elif ax == "X":
                index.append(xs)
            elif ax == "S" and self._keep_samples:
                index.append(region[3] if len(region) > 3 else slice(None))
            else:
                index.append(self._fixed.get(ax, 0))
        out = np.asarray(self._array[tuple(index)])
        if self._stack is None:
            out = out[np.newaxis]
        return out


def _ome_voxel_size(xml: str) -> tuple[float | None, float | None, float | None]:
    root = ET.fromstring(xml)
    pixels = next((el for el in root.iter() if el.tag.endswith("Pixels")), None)
    if pixels is None:
        return (None, None, None)
    a = pixels.attrib
    return tuple(  # type: ignore[return-value]
        to_micrometres(a.get(f"PhysicalSize{ax}"), a.get(f"PhysicalSize{ax}Unit", "µm")) for ax in "ZYX"
    )


def _resolution_um(page: Any, unit_um: float | None) -> tuple[float | None, float | None]:
    """Pixel size (Y, X) in µm from XResolution/YResolution, given µm per ResolutionUnit."""
    out = []
    for tag in ("YResolution", "XResolution"):
        t = page.tags.get(tag)
        if t is None or unit_um is None:
            out.append(None)
            continue
        num, den = t.value
        ppu = num / den if den else 0.0  # pixels per unit
        out.append(unit_um / ppu if ppu > 0 else None)
    return out[0], out[1]


def tiff_voxel_size_um(tif: Any) -> tuple[tuple[float | None, float | None, float | None], str]:
    """Voxel size (Z, Y, X) in µm of an open ``tifffile.TiffFile`` and where it came from."""
    if tif.is_ome and tif.ome_metadata:
        try:
            vs = _ome_voxel_size(tif.ome_metadata)
            if any(v is not None for v in vs):
                return vs, "ome-xml"
        except ET.ParseError:
            pass
    page = tif.pages.first
    if tif.is_imagej and tif.imagej_metadata:
        md = tif.imagej_metadata
        unit = md.get("unit")
        per_unit = to_micrometres(1.0, unit) if unit else None
        y, x = _resolution_um(page, per_unit)
        z = to_micrometres(md.get("spacing"), unit) if unit else None
        if any(v is not None for v in (z, y, x)):
            return (z, y, x), "imagej"
    unit_tag = page.tags.get("ResolutionUnit")
    code = int(unit_tag.value) if unit_tag is not None else 2  # TIFF 6.0 default: inch
    per_unit = {2: 25400.0, 3: 10000.0}.get(code)
    y, x = _resolution_um(page, per_unit)
    if code == 2 and x is not None and any(abs(25400.0 / x - d) < 1e-6 for d in _SCREEN_DPI):
        return (None, None, None), "none (screen-default dpi in the resolution tags)"
    if x is not None or y is not None:
        return (None, y, x), "tiff-resolution-tags"
    return (None, None, None), "none"


def open_tiff(path: str | os.PathLike[str], rgb: str = "refuse", channel: int | None = None) -> Volume:
    """Open a TIFF file as a lazy volume.

    Parameters
    ----------
    path : path
        ``.tif``/``.tiff``/``.btf`` file: a 2-D image, a page stack, an ImageJ hyperstack or OME-TIFF.
    rgb : {"refuse", "luminance"}
        What to do with colour data: refuse it (default) or convert it to luminance.
    channel : int, optional
        Which channel of a multi-channel (C axis) file to read; required when there are several.

    Returns
    -------
    Volume
    """
    import tifffile

    path = os.fspath(path)
    try:
        tif = tifffile.TiffFile(path)
    except (tifffile.TiffFileError, ValueError, OSError, EOFError, IndexError, KeyError) as err:
        raise VolumeReadError(f"{path}: not a readable TIFF file ({err})") from err
    try:
        return _open_series(tif, path, rgb, channel)
    except Exception:
        tif.close()
        raise


def _open_series(tif: Any, path: str, rgb: str, channel: int | None) -> Volume:
    try:
        series = tif.series[0]
        axes, shape = series.axes, tuple(series.shape)
    except (IndexError, ValueError, KeyError, EOFError) as err:
        raise VolumeReadError(f"{path}: TIFF has no readable image series; the file is corrupt or truncated ({err})") from err
    dtype = check_pixel_dtype(series.dtype, path)
    sizes = dict(zip(axes, shape))
    if "Y" not in sizes or "X" not in sizes:
        raise VolumeReadError(f"{path}: TIFF series has axes {axes!r}; expected Y and X among them")
    fixed: dict[str, int] = {}
    keep_samples = False
    if sizes.get("S", 1) > 1:
        if rgb != "luminance":
            raise VolumeReadError(
                f"{path}: colour image ({sizes['S']} samples per pixel); warmstart reads grayscale. "
                "Pass rgb='luminance' (CLI: --rgb luminance) to convert it"
            )
        keep_samples = True
    if sizes.get("C", 1) > 1:
        if channel is None:
            raise VolumeReadError(
                f"{path}: {sizes['C']} channels (axes {axes}); choose one with channel=N (CLI: --channel N)"
            )
        if not 0 <= channel < sizes["C"]:
            raise VolumeReadError(f"{path}: channel {channel} asked, the file has {sizes['C']}")
        fixed["C"] = channel
    stacks = [a for a in axes if a in _STACK_AXES and sizes[a] > 1]
    if len(stacks) > 1:
        if "T" in stacks:
            warnings.warn(f"{path}: {sizes['T']} time points; reading the first", stacklevel=3)
            stacks.remove("T")
            fixed["T"] = 0
        if len(stacks) > 1:
            raise VolumeReadError(f"{path}: axes {axes} hold more than one stack axis ({stacks}); cannot read as one volume")
    stack = stacks[0] if stacks else None
    others = [a for a in axes if a not in "YXS" and a != stack and a not in fixed and sizes[a] > 1]
    if others:
        raise VolumeReadError(f"{path}: unexpected non-singleton axes {others} in {axes}")
    voxel, voxel_from = tiff_voxel_size_um(tif)
    meta = {"tiff_axes": axes, "voxel_size_from": voxel_from, "bigtiff": bool(tif.is_bigtiff),
            "flavour": "ome" if tif.is_ome else "imagej" if tif.is_imagej else "plain"}
    nz = sizes[stack] if stack else 1
    backend: Any
    offset = getattr(series, "dataoffset", None)
    if offset is not None and not keep_samples and not fixed:
        backend = RawBackend(path, offset, (nz, sizes["Y"], sizes["X"]), dtype)
        tif.close()
    else:
        import zarr

        try:
            arr = zarr.open(series.aszarr(), mode="r")
        except Exception as err:  # tifffile raises many kinds for odd layouts
            raise VolumeReadError(f"{path}: cannot index the TIFF pixel data ({err})") from err
        select = _AxisSelect(arr, axes, stack, fixed, keep_samples)
        backend = GrayscaleBackend(select, closer=tif.close) if keep_samples else ArrayBackend(select, closer=tif.close)
    return Volume(backend, make_source(path, "tiff"), voxel, meta)
