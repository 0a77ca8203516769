"""Reading: one lazy grayscale Volume per source, whatever the format.

Formats: TIFF (stacks, BigTIFF, ImageJ, OME-TIFF), zarr v2/v3 and OME-Zarr, MRC/CCP4, DICOM
series, folders of 2-D TIFF/PNG slices, NumPy ``.npy``. See :func:`open_volume` and
:func:`discover`.
"""
from .base import SourceInfo, Volume, content_hash
from .discover import Candidate, Ignored, describe_failure, discover, open_volume

__all__ = ["Volume", "SourceInfo", "Candidate", "Ignored", "discover", "open_volume", "content_hash", "describe_failure"]
