"""DICOM reader: a series of single-frame slices (or one multi-frame file), through pydicom.

Slices are grouped by Series Instance UID (0020,000E) and ordered by their position along the
slice normal: the cross product of the two Image Orientation (Patient) (0020,0037) direction
cosines, dotted with Image Position (Patient) (0020,0032) (DICOM PS3.3 C.7.6.2.1.1); Instance
Number orders them when positions are missing. Stored values go through the Modality LUT
(Rescale Slope/Intercept, PS3.3 C.11.1), so CT slices come out in Hounsfield units. Pixel
Spacing (0028,0030) is (row spacing, column spacing) in mm, i.e. (Y, X); the slice spacing is
the median step between sorted positions, else Spacing Between Slices, else Slice Thickness.

Clinical data: warmstart is a research tool; nothing it computes is for diagnosis.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..errors import VolumeReadError
from .base import ArrayBackend, SliceFilesBackend, Volume, check_pixel_dtype, make_source
from .geometry import check_slice_steps

__all__ = ["open_dicom", "is_dicom_file", "dicom_series", "CLINICAL_MODALITIES"]

SUFFIXES = (".dcm", ".dicom", ".ima")
#: Modalities acquired from patients; volumes of these trigger the clinical-use caution.
CLINICAL_MODALITIES = {"CT", "MR", "PT", "NM", "CR", "DX", "MG", "US", "XA", "RF", "OT"}


def is_dicom_file(path: str | os.PathLike[str]) -> bool:
    """True when the file has the DICOM suffix or the ``DICM`` marker at byte 128 (PS3.10 7.1)."""
    p = os.fspath(path)
    if p.lower().endswith(SUFFIXES):
        return True
    try:
        with open(p, "rb") as fh:
            fh.seek(128)
            return fh.read(4) == b"DICM"
    except OSError:
        return False


@dataclass
class _SliceHeader:
    path: str
    uid: str
    position: tuple[float, ...] | None
    orientation: tuple[float, ...] | None
    instance: int
    rows: int
    cols: int
    ds: Any


def _read_header(path: str) -> _SliceHeader | None:
    """The header of one DICOM image file, or None when it is not one or cannot be parsed (pydicom
    raises many kinds on damaged headers: unknown value representations, values that are not
    numbers, ...); the file is then listed as ignored, never read as a slice."""
    import pydicom

    try:
        ds = pydicom.dcmread(path, stop_before_pixels=True)
        if "Rows" not in ds or "Columns" not in ds:
            return None
        pos = tuple(float(v) for v in ds.ImagePositionPatient) if "ImagePositionPatient" in ds else None
        ori = tuple(float(v) for v in ds.ImageOrientationPatient) if "ImageOrientationPatient" in ds else None
        if (pos is not None and len(pos) != 3) or (ori is not None and len(ori) != 6):
            return None
        return _SliceHeader(path, str(ds.get("SeriesInstanceUID", "")), pos, ori,
                            int(ds.get("InstanceNumber", 0) or 0), int(ds.Rows), int(ds.Columns), ds)
    except Exception:
        return None


def dicom_series(files: Sequence[str]) -> dict[str, list[_SliceHeader]]:
    """Group readable DICOM image files by Series Instance UID (non-image files are dropped)."""
    groups: dict[str, list[_SliceHeader]] = {}
    for f in files:
        h = _read_header(os.fspath(f))
        if h is not None:
            groups.setdefault(h.uid, []).append(h)
    return groups


def _sort_slices(headers: list[_SliceHeader]) -> tuple[list[_SliceHeader], float | None]:
    """Order slices along the normal; return them and the slice step in mm (None if unknown)."""
    if all(h.position is not None and h.orientation is not None for h in headers):
        ori = np.asarray(headers[0].orientation, dtype=float)
        normal = np.cross(ori[:3], ori[3:])
        depth = [float(np.dot(h.position, normal)) for h in headers]  # type: ignore[arg-type]
        order = np.argsort(depth, kind="stable")
        headers = [headers[i] for i in order]
        sorted_depth = np.sort(depth)
        steps = np.diff(sorted_depth)
        step = float(np.median(steps)) if len(steps) else None
        check_slice_steps(sorted_depth, os.path.dirname(headers[0].path), "mm",
                          [os.path.basename(h.path) for h in headers])
        return headers, step
    return sorted(headers, key=lambda h: h.instance), None


def _modality_reader(dtype: np.dtype):
    def read_one(path: str) -> np.ndarray:
        import pydicom
        from pydicom.pixels import apply_modality_lut

        try:
            ds = pydicom.dcmread(path)
            arr = ds.pixel_array
        except Exception as err:  # pydicom raises many kinds for bad pixel data
            raise VolumeReadError(f"{path}: cannot decode DICOM pixel data ({err})") from err
        return np.asarray(apply_modality_lut(arr, ds), dtype=dtype)

    return read_one


def _voxel(ds: Any, step_mm: float | None) -> tuple[float | None, float | None, float | None]:
    ps = [float(v) * 1000.0 for v in ds.PixelSpacing] if "PixelSpacing" in ds else [None, None]
    z = step_mm
    if z is None:
        for key in ("SpacingBetweenSlices", "SliceThickness"):
            if key in ds and ds.get(key):
                z = float(ds.get(key))
                break
    return (None if z is None else abs(z) * 1000.0, ps[0], ps[1])


def open_dicom(path: str | os.PathLike[str], series_uid: str | None = None, files: Sequence[str] | None = None) -> Volume:
    """Open a DICOM series (folder) or a single DICOM file as a lazy volume.

    Parameters
    ----------
    path : path
        A folder of slices or one file (single- or multi-frame).
    series_uid : str, optional
        Series to read when the folder holds several.
    files : sequence of path, optional
        The files of the series, when already known (from :func:`~warmstart.volumes.discover`).

    Returns
    -------
    Volume
        Values after the Modality LUT (Hounsfield units for CT) as float32 when a rescale applies,
        else in the stored integer type; voxel size in µm.
    """
    path = os.fspath(path)
    if files is None:
        files = [str(q) for q in sorted(Path(path).iterdir()) if q.is_file()] if os.path.isdir(path) else [path]
    groups = dicom_series(files)
    if not groups:
        raise VolumeReadError(f"{path}: no readable DICOM image found")
    if series_uid is None:
        if len(groups) > 1:
            raise VolumeReadError(f"{path}: {len(groups)} DICOM series in one folder; choose one with series_uid")
        series_uid = next(iter(groups))
    if series_uid not in groups:
        raise VolumeReadError(f"{path}: no series with UID {series_uid}")
    headers, step = _sort_slices(groups[series_uid])
    ds = headers[0].ds
    shapes = {(h.rows, h.cols) for h in headers}
    if len(shapes) > 1:
        raise VolumeReadError(f"{path}: slices of series {series_uid} differ in size: {sorted(shapes)}")
    if int(ds.get("SamplesPerPixel", 1)) != 1:
        raise VolumeReadError(f"{headers[0].path}: colour DICOM ({ds.get('PhotometricInterpretation')}); warmstart reads grayscale")
    slopes = {(float(h.ds.get("RescaleSlope", 1) or 1), float(h.ds.get("RescaleIntercept", 0) or 0)) for h in headers}
    rescaled = slopes != {(1.0, 0.0)}
    bits, signed = int(ds.get("BitsAllocated", 16)), int(ds.get("PixelRepresentation", 0))
    stored = np.dtype(f"{'i' if signed else 'u'}{max(1, bits // 8)}")
    dtype = check_pixel_dtype(np.dtype(np.float32) if rescaled else stored, path)
    modality = str(ds.get("Modality", ""))
    meta: dict[str, Any] = {
        "modality": modality,
        "series_uid": series_uid,
        "unit": "HU" if modality == "CT" and rescaled and str(ds.get("RescaleType", "HU")) in ("HU", "") else "stored value",
        "clinical": modality in CLINICAL_MODALITIES,
        "voxel_size_from": "dicom PixelSpacing + slice positions",
    }
    reader = _modality_reader(dtype)
    nframes = int(ds.get("NumberOfFrames", 1) or 1)
    if len(headers) == 1 and nframes > 1:
        # A multi-frame file decodes as one block in pydicom; it is read once, when asked.
        frames = reader(headers[0].path)
        backend: Any = ArrayBackend(frames.reshape((nframes, headers[0].rows, headers[0].cols)))
        step = None
    else:
        backend = SliceFilesBackend([h.path for h in headers], reader, (headers[0].rows, headers[0].cols), dtype)
    source_path = os.path.dirname(headers[0].path) if os.path.isdir(path) else path
    source = make_source(source_path, "dicom", files=[h.path for h in headers] if os.path.isdir(path) else None)
    return Volume(backend, source, _voxel(ds, step), meta)
