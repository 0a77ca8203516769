"""The Volume contract: a lazy, grayscale (Z, Y, X) array with voxel size and provenance.

Every reader returns a :class:`Volume`. Nothing is read at open time beyond headers; pixels come
from :meth:`Volume.read`, region by region, so a volume larger than memory is never loaded whole.
"""
from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol, Sequence

import numpy as np

from ..errors import VolumeReadError, WarmstartError

__all__ = [
    "Volume",
    "SourceInfo",
    "Backend",
    "RawBackend",
    "ArrayBackend",
    "SliceFilesBackend",
    "content_hash",
    "check_pixel_dtype",
]

#: Files up to this size are hashed whole; larger ones by their size and first block.
FULL_HASH_LIMIT = 64 * 2**20
HEAD_HASH_BYTES = 16 * 2**20
_DIR_FILE_HEAD = 64 * 2**10
_DIR_HEAD_FILES = 256  # folders: names and sizes of every file, content heads of the first 256

Region = tuple[slice, slice, slice]


@dataclass(frozen=True)
class SourceInfo:
    """Where a volume came from.

    Attributes
    ----------
    path : str
        Absolute path of the file or folder.
    format : str
        Reader name: ``tiff``, ``zarr``, ``ome-zarr``, ``mrc``, ``npy``, ``dicom``, ``slices``.
    sha256 : str
        Hex digest identifying the content (see ``hash_kind``).
    hash_kind : str
        ``file`` (whole file), ``head`` (file size and first 16 MiB, for files over 64 MiB) or
        ``listing`` (a folder: names, sizes and the first 64 KiB of each file).
    size_bytes : int
        Bytes on disk (sum over files for folders).
    """

    path: str
    format: str
    sha256: str
    hash_kind: str
    size_bytes: int

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


class Backend(Protocol):
    """What a reader plugs into a Volume: shape, dtype and region reads of a 3-D array."""

    shape: tuple[int, int, int]
    dtype: np.dtype

    def read(self, region: Region) -> np.ndarray: ...

    def close(self) -> None: ...


def _normalize_region(region: Any, shape: Sequence[int]) -> Region:
    """Turn ints, slices, Ellipsis or None into three step-1 slices clipped to ``shape``."""
    if region is None:
        region = ()
    if not isinstance(region, tuple):
        region = (region,)
    if any(r is Ellipsis for r in region):
        i = next(k for k, r in enumerate(region) if r is Ellipsis)
        region = region[:i] + (slice(None),) * (3 - len(region) + 1) + region[i + 1:]
    region = tuple(region) + (slice(None),) * (3 - len(region))
    if len(region) != 3:
        raise IndexError(f"a volume region has 3 axes, got {len(region)}")
    out = []
    for r, n in zip(region, shape):
        if isinstance(r, (int, np.integer)):
            i = int(r) + n if r < 0 else int(r)
            if not 0 <= i < n:
                raise IndexError(f"index {r} outside an axis of length {n}")
            out.append(slice(i, i + 1))
        else:
            start, stop, step = r.indices(n)
            if step != 1:
                raise IndexError("volume regions take step-1 slices; subsample after reading")
            out.append(slice(start, max(start, stop)))
    return tuple(out)  # type: ignore[return-value]


class Volume:
    """A lazy grayscale volume with axes (Z, Y, X).

    Parameters
    ----------
    backend : Backend
        Region reader supplied by a format module.
    source : SourceInfo
        Provenance.
    voxel_size_um : tuple of 3 (float or None)
        Voxel size along (Z, Y, X) in micrometres; ``None`` where the file does not say. Never
        guessed.
    meta : dict, optional
        Format-specific metadata worth keeping (units, modality, series UID, ...).

    Examples
    --------
    >>> import numpy as np
    >>> from warmstart.volumes.base import ArrayBackend, SourceInfo, Volume
    >>> v = Volume(ArrayBackend(np.arange(24, dtype=np.uint8).reshape(2, 3, 4)),
    ...            SourceInfo("mem", "npy", "0" * 64, "file", 24), (None, 0.5, 0.5))
    >>> v.shape, v.read((1, slice(0, 2), 3)).ravel().tolist()
    ((2, 3, 4), [15, 19])
    """

    axes = "ZYX"

    def __init__(
        self,
        backend: Backend,
        source: SourceInfo,
        voxel_size_um: tuple[float | None, float | None, float | None] = (None, None, None),
        meta: dict[str, Any] | None = None,
    ) -> None:
        self._backend = backend
        self.source = source
        if len(voxel_size_um) != 3:
            raise ValueError(f"voxel_size_um needs 3 entries (Z, Y, X), got {voxel_size_um!r}")
        self.voxel_size_um = tuple(
            None if v is None or not np.isfinite(v) or v <= 0 else float(v) for v in voxel_size_um
        )
        self.meta: dict[str, Any] = dict(meta or {})

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(s) for s in self._backend.shape)  # type: ignore[return-value]

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self._backend.dtype)

    @property
    def nbytes(self) -> int:
        return int(np.prod(self.shape)) * self.dtype.itemsize

    def read(self, region: Any = None) -> np.ndarray:
        """Read a region.

        Parameters
        ----------
        region : tuple of int or slice, optional
            Up to three entries for (Z, Y, X); ints keep their axis (length 1). Default: all.

        Returns
        -------
        (z, y, x) ndarray
            A new array in the volume's dtype.
        """
        reg = _normalize_region(region, self.shape)
        try:
            out = self._backend.read(reg)
        except WarmstartError:
            raise
        except MemoryError as err:
            raise VolumeReadError(f"{self.source.path}: region {reg} is too large to read with the memory available") from err
        except Exception as err:  # the reader library's error on damaged data: in the user's words
            from .failures import describe_failure

            raise VolumeReadError(describe_failure(err, self.source.path)) from err
        want = tuple(s.stop - s.start for s in reg)
        if out.shape != want:
            raise VolumeReadError(
                f"{self.source.path}: read {out.shape} for region {want}; the file is probably truncated"
            )
        return out

    def close(self) -> None:
        self._backend.close()

    def __enter__(self) -> "Volume":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def describe(self) -> dict[str, Any]:
        """A JSON-able summary: source, shape, dtype, voxel size (µm), meta."""
        return {
            "source": self.source.to_dict(),
            "shape": list(self.shape),
            "dtype": str(self.dtype),
            "axes": self.axes,
            "voxel_size_um": list(self.voxel_size_um),
            "meta": {k: v for k, v in self.meta.items() if isinstance(v, (str, int, float, bool, list))},
        }

    def __repr__(self) -> str:
        vs = "x".join("?" if v is None else f"{v:g}" for v in self.voxel_size_um)
        return f"Volume({self.source.format} {self.shape} {self.dtype} {vs} µm, {self.source.path})"


_SUPPORTED_KINDS = {"u", "i", "f"}


def check_pixel_dtype(dtype: np.dtype, path: str | os.PathLike[str]) -> np.dtype:
    """Accept 8/16/32-bit integers and float16/32/64; refuse complex, bool and structured types."""
    dtype = np.dtype(dtype)
    if dtype.kind not in _SUPPORTED_KINDS or dtype.itemsize > 8 or dtype.names is not None:
        raise VolumeReadError(
            f"{path}: pixel type {dtype} is not a grayscale intensity type "
            "(expected 8/16/32-bit integers or float16/32/64)"
        )
    return dtype


class RawBackend:
    """Uncompressed C-ordered pixels at a byte offset in one file (raw TIFF, MRC, NPY).

    Reads with explicit ``seek`` + ``readinto`` of contiguous runs instead of a long-lived memory
    map: a memory map keeps every touched page resident (and counted in RSS) for the life of the
    mapping, which breaks the memory bound on volumes larger than RAM.
    """

    def __init__(self, path: str | os.PathLike[str], offset: int, shape: Sequence[int], dtype: np.dtype) -> None:
        self.path = os.fspath(path)
        self.offset = int(offset)
        self.shape = tuple(int(s) for s in shape)  # type: ignore[assignment]
        self.dtype = np.dtype(dtype)
        need = self.offset + int(np.prod(self.shape)) * self.dtype.itemsize
        size = os.path.getsize(self.path)
        if size < need:
            raise VolumeReadError(
                f"{self.path}: file holds {size} bytes but its header promises {need}; it is truncated"
            )
        self._fh = open(self.path, "rb", buffering=0)

    def _read_run(self, start_elem: int, count: int, out: np.ndarray) -> None:
        self._fh.seek(self.offset + start_elem * self.dtype.itemsize)
        view = memoryview(out.reshape(-1).view(np.uint8))
        got = 0
        while got < view.nbytes:
            n = self._fh.readinto(view[got:])
            if not n:
                raise EOFError(f"unexpected end of file at byte {self._fh.tell()}")
            got += n

    def read(self, region: Region) -> np.ndarray:
        (z0, z1), (y0, y1), (x0, x1) = [(s.start, s.stop) for s in region]
        nz, ny, nx = self.shape
        out = np.empty((z1 - z0, y1 - y0, x1 - x0), dtype=self.dtype)
        if out.size == 0:
            return out
        if (y0, y1, x0, x1) == (0, ny, 0, nx):
            self._read_run(z0 * ny * nx, out.size, out)
        elif (x0, x1) == (0, nx):
            for k in range(z1 - z0):
                self._read_run(((z0 + k) * ny + y0) * nx, (y1 - y0) * nx, out[k])
        else:
            # Whole rows then crop: one contiguous read per slice beats many short ones on disk.
            rows = np.empty((y1 - y0, nx), dtype=self.dtype)
            for k in range(z1 - z0):
                self._read_run(((z0 + k) * ny + y0) * nx, rows.size, rows)
                out[k] = rows[:, x0:x1]
        return out

    def close(self) -> None:
        self._fh.close()


class ArrayBackend:
    """Any lazily indexable 3-D array (zarr array, tifffile's zarr view, an ndarray)."""

    def __init__(self, array: Any, closer: Any = None) -> None:
        self._array = array
        self.shape = tuple(int(s) for s in array.shape)  # type: ignore[assignment]
        self.dtype = np.dtype(array.dtype)
        self._closer = closer

    def read(self, region: Region) -> np.ndarray:
        return np.array(self._array[region], dtype=self.dtype, copy=True)

    def close(self) -> None:
        if self._closer is not None:
            self._closer()


class SliceFilesBackend:
    """One 2-D image per Z index (slice folders, DICOM series): reads only the slices asked for.

    Parameters
    ----------
    files : sequence of path
        One file per Z index, in order.
    read_one : callable
        ``read_one(path) -> (Y, X) ndarray``; raises on a bad file.
    shape2d, dtype
        What every slice must be; a slice that differs is an error naming it.
    """

    def __init__(self, files: Sequence[str], read_one: Any, shape2d: tuple[int, int], dtype: np.dtype) -> None:
        self.files = list(files)
        self._read_one = read_one
        self.shape = (len(self.files), int(shape2d[0]), int(shape2d[1]))  # type: ignore[assignment]
        self.dtype = np.dtype(dtype)

    def read(self, region: Region) -> np.ndarray:
        zs, ys, xs = region
        out = np.empty((zs.stop - zs.start, ys.stop - ys.start, xs.stop - xs.start), dtype=self.dtype)
        for k, z in enumerate(range(zs.start, zs.stop)):
            img = self._read_one(self.files[z])
            if img.shape != self.shape[1:]:
                raise VolumeReadError(
                    f"{self.files[z]}: slice is {img.shape}, the rest of the stack is {self.shape[1:]}"
                )
            out[k] = img[ys, xs]
        return out

    def close(self) -> None:
        pass


def _hash_file(path: Path) -> tuple[str, str]:
    size = path.stat().st_size
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        if size <= FULL_HASH_LIMIT:
            for block in iter(lambda: fh.read(2**20), b""):
                h.update(block)
            return h.hexdigest(), "file"
        h.update(f"size={size};".encode())
        h.update(fh.read(HEAD_HASH_BYTES))
        return h.hexdigest(), "head"


def content_hash(path: str | os.PathLike[str], files: Sequence[str | os.PathLike[str]] | None = None) -> tuple[str, str, int]:
    """Identify the content of a file or folder.

    Parameters
    ----------
    path : path
        File or folder.
    files : sequence of path, optional
        For a folder source made of chosen files (a DICOM series), the files to cover.

    Returns
    -------
    sha256 : str
    kind : str
        ``file``, ``head`` or ``listing`` (see :class:`SourceInfo`).
    size_bytes : int
    """
    p = Path(path)
    if p.is_file() and files is None:
        digest, kind = _hash_file(p)
        return digest, kind, p.stat().st_size
    members = sorted(Path(f) for f in files) if files is not None else sorted(q for q in p.rglob("*") if q.is_file())
    h = hashlib.sha256()
    total = 0
    for i, q in enumerate(members):
        size = q.stat().st_size
        total += size
        rel = os.path.relpath(q, p if p.is_dir() else p.parent)
        h.update(f"{rel}\0{size}\0".encode())
        if i < _DIR_HEAD_FILES:
            with open(q, "rb") as fh:
                h.update(fh.read(_DIR_FILE_HEAD))
    return h.hexdigest(), "listing", total


def make_source(path: str | os.PathLike[str], fmt: str, files: Sequence[str] | None = None) -> SourceInfo:
    """Build the :class:`SourceInfo` of ``path`` (hashing it)."""
    digest, kind, size = content_hash(path, files)
    return SourceInfo(os.path.abspath(os.fspath(path)), fmt, digest, kind, size)


def add_slice_axis(array: np.ndarray) -> np.ndarray:
    """View a 2-D image as a one-slice volume."""
    return array[np.newaxis] if array.ndim == 2 else array


@dataclass
class GrayscaleBackend:
    """Turn an RGB(A) backend of shape (Z, Y, X, S) into luminance (ITU-R BT.601 weights).

    Used only when the caller asks for it (``rgb="luminance"``): silently dropping colour is a
    decision the user must make.
    """

    inner: Any
    closer: Any = None
    weights: tuple[float, float, float] = (0.299, 0.587, 0.114)  # ITU-R BT.601 luma, common practice
    shape: tuple[int, int, int] = field(init=False)
    dtype: np.dtype = field(init=False)

    def __post_init__(self) -> None:
        self.shape = tuple(self.inner.shape[:3])  # type: ignore[assignment]
        self.dtype = np.dtype(np.float32)

    def read(self, region: Region) -> np.ndarray:
        rgb = np.asarray(self.inner[region + (slice(0, 3),)], dtype=np.float32)
        return rgb @ np.asarray(self.weights, dtype=np.float32)

    def close(self) -> None:
        if self.closer is not None:
            self.closer()
