"""MRC/CCP4 reader (electron tomography, cryo-EM maps), through mrcfile.

The header is validated by mrcfile; pixels are read with plain file reads at the data offset
(1024 + the extended-header length, MRC2014). Voxel size is the header's ``voxel_size``
(``cella / mx`` etc., in ångström per MRC2014), converted to µm; a zero voxel size means
"not set" and is reported as unknown.
"""
from __future__ import annotations

import os
import warnings

from ..errors import VolumeReadError
from .base import RawBackend, Volume, check_pixel_dtype, make_source
from .units import to_micrometres

__all__ = ["open_mrc"]

SUFFIXES = (".mrc", ".mrcs", ".map", ".ccp4", ".rec", ".st", ".ali")


def open_mrc(path: str | os.PathLike[str]) -> Volume:
    """Open an MRC/CCP4 file as a lazy volume (axes Z, Y, X as mrcfile returns them)."""
    import mrcfile

    path = os.fspath(path)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            mrc = mrcfile.mmap(path, mode="r", permissive=True)
        if mrc.data is None:
            raise ValueError("; ".join(str(w.message) for w in caught) or "no data block")
    except (ValueError, OSError, EOFError) as err:
        raise VolumeReadError(f"{path}: not a readable MRC file ({err})") from err
    try:
        data = mrc.data
        dtype = check_pixel_dtype(data.dtype, path)
        shape = data.shape if data.ndim == 3 else (1,) + tuple(data.shape)
        if len(shape) != 3:
            raise VolumeReadError(f"{path}: MRC data has {data.ndim} dimensions; expected 2 or 3")
        vs = mrc.voxel_size  # ångström, record (x, y, z)
        voxel = tuple(to_micrometres(float(v), "angstrom") for v in (vs.z, vs.y, vs.x))
        offset = int(data.offset)
        meta = {"mrc_mode": int(mrc.header.mode), "voxel_size_from": "mrc header (cella/mxyz)",
                "space_group": int(mrc.header.ispg)}
    finally:
        mrc.close()
    return Volume(RawBackend(path, offset, shape, dtype), make_source(path, "mrc"), voxel, meta)
