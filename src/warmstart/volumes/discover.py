"""Find the volumes in an archive folder, and open any of them through one function.

Rules, applied per folder while walking the archive in sorted order:

- a folder with zarr metadata is one zarr / OME-Zarr source (not descended into);
- DICOM files (``.dcm`` or the ``DICM`` marker) form one source per Series Instance UID;
- 2-D TIFF/PNG files whose names differ only in their digits (``slice_0001.tif``,
  ``slice_0002.tif`` ...) form one slice-folder source; at least two files are needed;
- any other TIFF, MRC/CCP4 or ``.npy`` file is a source of its own, and so is a lone PNG;
- hidden files are skipped silently; files of other types are listed as ignored, with the reason.
"""
from __future__ import annotations

import json
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

from ..errors import SourceNotFoundError, UnsupportedFormatError, VolumeReadError, WarmstartError
from . import dicom, mrc, npy, slices, tiff
from .base import Volume
from .failures import describe_failure
from .zarr import is_zarr_path, open_zarr

__all__ = ["Candidate", "Ignored", "discover", "open_volume"]

_DIGITS = re.compile(r"\d+")


@dataclass(frozen=True)
class Candidate:
    """A source found in an archive, not yet opened.

    Attributes
    ----------
    path : str
        File or folder (absolute).
    format : str
        ``tiff``, ``zarr``, ``mrc``, ``npy``, ``dicom`` or ``slices``.
    name : str
        Path relative to the archive root (plus ``#series-uid`` for one of several DICOM series);
        the stable key that orders sources and seeds their sampling.
    files : tuple of str
        Member files for ``slices`` and ``dicom`` sources.
    series_uid : str, optional
    """

    path: str
    format: str
    name: str
    files: tuple[str, ...] = field(default=(), repr=False)
    series_uid: str | None = None


@dataclass(frozen=True)
class Ignored:
    """A file passed over, with the reason."""

    path: str
    reason: str


def _is_2d_image(path: str) -> bool:
    if path.lower().endswith(".png"):
        return True
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            return len(tif.pages) == 1 and tif.pages.first.ndim == 2
    except Exception:  # a broken file is reported when opened, as a source of its own
        return False


def _not_readable_file(path: str) -> str | None:
    """Why a directory entry cannot be a source file (None for a regular file): opening a named
    pipe would wait forever, and a link may point nowhere."""
    try:
        st = os.stat(path)  # follows links; does not open, so a pipe does not block
    except FileNotFoundError:
        return "a link to a file that does not exist"
    except OSError as err:
        return f"cannot be examined ({err.strerror or err})"
    if not stat.S_ISREG(st.st_mode):
        return "not a regular file (a named pipe, socket or device)"
    return None


def _is_warmstart_output(folder: Path) -> bool:
    """A corpus store (its build.json or manifest.json says so): warmstart's own output, never a source."""
    for name in ("manifest.json", "build.json"):
        f = folder / name
        if f.is_file():
            try:
                d = json.loads(f.read_text())
            except (OSError, ValueError):
                continue
            if isinstance(d, dict) and (d.get("format") == "warmstart-corpus" or "archive_names" in d or
                                        ("settings" in d and "shard" in d)):
                return True
    return False


def _classify_folder(folder: Path, root: Path, names: list[str]) -> tuple[list[Candidate], list[Ignored]]:
    found: list[Candidate] = []
    ignored: list[Ignored] = []
    rel = lambda p: os.path.relpath(p, root)  # noqa: E731
    dicoms, images = [], []
    for n in sorted(names, key=slices.natural_key):
        p = str(folder / n)
        low = n.lower()
        if n.startswith("."):
            continue
        why = _not_readable_file(p)
        if why:
            ignored.append(Ignored(p, why))
            continue
        if low.endswith(mrc.SUFFIXES):
            found.append(Candidate(p, "mrc", rel(p)))
        elif low.endswith(npy.SUFFIXES):
            found.append(Candidate(p, "npy", rel(p)))
        elif low.endswith(tiff.SUFFIXES) or low.endswith(".png"):
            images.append(p)
        elif dicom.is_dicom_file(p):
            dicoms.append(p)
        else:
            ignored.append(Ignored(p, "not an image format warmstart reads"))
    # Slice stacks: names equal once digits are masked, all 2-D.
    groups: dict[str, list[str]] = {}
    for p in images:
        groups.setdefault(_DIGITS.sub("#", os.path.basename(p)).lower(), []).append(p)
    for pattern, members in groups.items():
        if len(members) >= 2 and "#" in pattern and _is_2d_image(members[0]):
            name = rel(folder / pattern) if len(groups) > 1 else rel(folder)
            found.append(Candidate(str(folder), "slices", name, tuple(members)))
        else:
            for p in members:
                fmt = "slices" if p.lower().endswith(".png") else "tiff"
                found.append(Candidate(p, fmt, rel(p), (p,) if fmt == "slices" else ()))
    if dicoms:
        series = dicom.dicom_series(dicoms)
        for uid, headers in sorted(series.items()):
            name = rel(folder) if len(series) == 1 else f"{rel(folder)}#{uid}"
            found.append(Candidate(str(folder), "dicom", name, tuple(h.path for h in headers), uid))
        kept = {h.path for hs in series.values() for h in hs}
        ignored += [Ignored(p, "DICOM file without readable image data (not an image, or a damaged header)") for p in dicoms
                    if p not in kept]
    return found, ignored


def discover(archive: str | os.PathLike[str]) -> tuple[list[Candidate], list[Ignored]]:
    """Walk an archive and list its sources.

    Parameters
    ----------
    archive : path
        A folder (walked recursively) or a single file / zarr folder.

    Returns
    -------
    candidates : list of Candidate
        Sorted by ``name``: the canonical source order of every corpus built from this archive.
    ignored : list of Ignored
        Files passed over, with the reason.
    """
    root = Path(archive).absolute()
    if not root.exists():
        raise SourceNotFoundError(f"{root}: no such file or folder")
    if root.is_file() or is_zarr_path(root):
        fmt = _format_of_path(str(root))
        return [Candidate(str(root), fmt, root.name, (str(root),) if fmt == "slices" else ())], []
    found: list[Candidate] = []
    ignored: list[Ignored] = []
    seen = {os.path.realpath(root)}
    # Links to folders are followed (archives are often assembled from links); a folder reached a
    # second time (a link loop, or two links to one place) is listed as ignored, not read twice.
    for folder, dirs, files in os.walk(root, followlinks=True):
        here = Path(folder)
        dirs.sort(key=slices.natural_key)
        keep = []
        for d in dirs:
            if d.startswith("."):
                continue
            real = os.path.realpath(here / d)
            if real in seen:
                ignored.append(Ignored(str(here / d), f"a link to a folder already read ({real})"))
                continue
            seen.add(real)
            if is_zarr_path(here / d):
                if _is_warmstart_output(here / d):
                    ignored.append(Ignored(str(here / d), "a warmstart corpus store (output, not a source)"))
                else:
                    found.append(Candidate(str(here / d), "zarr", os.path.relpath(here / d, root)))
            else:
                keep.append(d)
        dirs[:] = keep
        f, i = _classify_folder(here, root, files)
        found += f
        ignored += i
    found.sort(key=lambda c: c.name)
    return found, ignored


def _format_of_path(path: str) -> str:
    low = path.lower()
    if os.path.isdir(path):
        if is_zarr_path(path):
            return "zarr"
        raise UnsupportedFormatError(f"{path}: folder is not a zarr store; open archives with discover()")
    if low.endswith(tiff.SUFFIXES):
        return "tiff"
    if low.endswith(mrc.SUFFIXES):
        return "mrc"
    if low.endswith(npy.SUFFIXES):
        return "npy"
    if low.endswith(".png"):
        return "slices"
    if dicom.is_dicom_file(path):
        return "dicom"
    raise UnsupportedFormatError(
        f"{path}: unknown format (expected TIFF, OME-Zarr/zarr, MRC, DICOM, PNG slices or .npy)"
    )


def open_volume(
    source: str | os.PathLike[str] | Candidate,
    *,
    rgb: str = "refuse",
    channel: int | None = None,
    target_voxel_um: float | None = None,
    voxel_size_um: Sequence[float | None] | None = None,
) -> Volume:
    """Open one source as a lazy :class:`~warmstart.volumes.base.Volume`.

    Parameters
    ----------
    source : path or Candidate
        A file, a zarr folder, a DICOM or slice folder, or a :class:`Candidate` from :func:`discover`.
    rgb : {"refuse", "luminance"}
        Colour data is refused unless this says to convert it.
    channel : int, optional
        Channel to read from multi-channel TIFF / OME-Zarr.
    target_voxel_um : float, optional
        Lets OME-Zarr pick the pyramid level nearest this in-plane voxel size (µm).
    voxel_size_um : 3 floats or None, optional
        (Z, Y, X) voxel size in µm that overrides what the file says (entries left ``None`` keep
        the file's value). For ``.npy`` and other files without metadata.

    Returns
    -------
    Volume

    Raises
    ------
    SourceNotFoundError
        The path does not exist.
    VolumeReadError
        The file cannot be read as a grayscale volume; the message says why.
    """
    cand = source if isinstance(source, Candidate) else None
    path = cand.path if cand else os.fspath(source)  # type: ignore[arg-type]
    if not os.path.exists(path):
        raise SourceNotFoundError(f"{path}: no such file or folder")
    if os.path.isfile(path) and os.path.getsize(path) == 0:
        raise VolumeReadError(f"{path}: empty file")
    if cand is None and os.path.isdir(path) and not is_zarr_path(path):
        cands, _ = discover(path)
        if len(cands) != 1:
            raise VolumeReadError(f"{path}: folder holds {len(cands)} sources; open them one by one (see discover)")
        cand = cands[0]
    fmt = cand.format if cand else _format_of_path(path)
    try:
        vol = _open_as(fmt, path, cand, rgb, channel, target_voxel_um)
    except WarmstartError:
        raise
    except Exception as err:  # a reader library's own error on a damaged file: in the user's words
        raise VolumeReadError(describe_failure(err, path)) from err
    if voxel_size_um is not None:
        if len(voxel_size_um) != 3:
            raise VolumeReadError(f"{path}: voxel_size_um override needs 3 values (Z, Y, X), got {voxel_size_um!r}")
        vol.voxel_size_um = tuple(o if o is not None else v for o, v in zip(voxel_size_um, vol.voxel_size_um))
        vol.meta["voxel_size_from"] = "user override"
    if cand is not None:
        vol.meta["name"] = cand.name
    return vol


def _open_as(fmt: str, path: str, cand: Candidate | None, rgb: str, channel: int | None,
             target_voxel_um: float | None) -> Volume:
    vol: Volume
    if fmt == "tiff":
        vol = tiff.open_tiff(path, rgb=rgb, channel=channel)
    elif fmt == "zarr":
        vol = open_zarr(path, target_voxel_um=target_voxel_um, channel=channel)
    elif fmt == "mrc":
        vol = mrc.open_mrc(path)
    elif fmt == "npy":
        vol = npy.open_npy(path)
    elif fmt == "dicom":
        vol = dicom.open_dicom(path, series_uid=cand.series_uid if cand else None,
                               files=list(cand.files) if cand and cand.files else None)
    elif fmt == "slices":
        files = list(cand.files) if cand and cand.files else [path]
        vol = slices.open_slices(files, folder=path if os.path.isdir(path) else None, rgb=rgb)
    else:  # pragma: no cover - formats are closed above
        raise UnsupportedFormatError(f"{path}: unknown format {fmt!r}")
    return vol
