"""Prepare new data for an exported encoder: its intensity rule, its standardization, and a
warning when the result does not look like the corpus (numpy only, no torch)."""
from __future__ import annotations

import os
import warnings
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import DataMismatchWarning
from ..intensity import IntensityReference, IntensitySettings, fit_intensity
from .file import read_manifest

__all__ = ["prepare", "fit_reference", "check_like_corpus", "PERCENTILE_TOLERANCE", "VOXEL_TOLERANCE"]

PERCENTILE_TOLERANCE = 0.25
"""A percentile of the new data (after the intensity rule) that lies further than this fraction
of the corpus's 1-99 % range from the corpus's own triggers a warning."""

VOXEL_TOLERANCE = 2.0
"""A voxel size more than this factor outside the corpus's patch voxel sizes triggers a warning."""

_CHECKED = ("1", "50", "99")


def _manifest(file_or_manifest: str | os.PathLike[str] | Mapping[str, Any]) -> Mapping[str, Any]:
    return file_or_manifest if isinstance(file_or_manifest, Mapping) else read_manifest(file_or_manifest)


def fit_reference(data: Any, file: str | os.PathLike[str] | Mapping[str, Any]) -> IntensityReference:
    """The intensity reference an encoder file prescribes for ``data``: its fixed reference (a
    physical scale, given two-point values), or its rule fitted on ``data`` as every corpus
    source was."""
    m = _manifest(file)
    if m["intensity"]["fit"] == "fixed":
        return IntensityReference.from_dict({**m["intensity"]["reference"], "stats": {}})
    return fit_intensity(data, IntensitySettings.from_dict(m["intensity"]["rule"]))


def check_like_corpus(normalized: np.ndarray, file: str | os.PathLike[str] | Mapping[str, Any],
                      voxel_size_um: Sequence[float | None] | float | None = None, name: str = "data") -> list[str]:
    """Ways in which normalized data does not look like the encoder's corpus (empty: none found).

    Compares the 1st, 50th and 99th percentiles with the corpus's (tolerance
    :data:`PERCENTILE_TOLERANCE` of the corpus's 1-99 % range), and the voxel size (micrometres)
    with the corpus patches' range (tolerance factor :data:`VOXEL_TOLERANCE`): in-plane for a
    2-D encoder, each of Z, Y and X for a 3-D one.
    """
    m = _manifest(file)
    out: list[str] = []
    ref = m["corpus_values"]["percentiles"]
    finite = normalized[np.isfinite(normalized)]
    if ref and finite.size:
        mine = dict(zip(_CHECKED, np.percentile(finite, [float(q) for q in _CHECKED]).tolist()))
        span = max(ref["99"] - ref["1"], 1e-6)
        off = [q for q in _CHECKED if abs(mine[q] - ref[q]) > PERCENTILE_TOLERANCE * span]
        if off:
            out.append(f"{name}: after the intensity rule its 1/50/99th percentiles are "
                       f"{mine['1']:.3g}/{mine['50']:.3g}/{mine['99']:.3g}, the corpus's "
                       f"{ref['1']:.3g}/{ref['50']:.3g}/{ref['99']:.3g} (percentile(s) {', '.join(off)} off by more than "
                       f"{PERCENTILE_TOLERANCE:.0%} of the corpus's 1-99 % range): other material, modality or "
                       "scanner setting than the corpus?")
    out += _voxel_mismatch(m, voxel_size_um, name)
    return out


def _voxel_mismatch(m: Mapping[str, Any], voxel_size_um: Sequence[float | None] | float | None, name: str) -> list[str]:
    """The voxel-size warnings: per axis (Z, Y, X) for a 3-D encoder, in-plane for a 2-D one."""
    if voxel_size_um is None:
        return []
    out: list[str] = []
    per_axis = m["input"].get("voxel_size_um")
    if int(m["input"].get("spatial_dims", 2)) == 3 and per_axis and not np.isscalar(voxel_size_um):
        sizes = list(voxel_size_um)[-3:]
        for axis, v, r in zip("ZYX"[3 - len(sizes):], sizes, per_axis[3 - len(sizes):]):
            if v is None or not r:
                continue
            lo, hi = r
            if float(v) < lo / VOXEL_TOLERANCE or float(v) > hi * VOXEL_TOLERANCE:
                out.append(f"{name}: voxel size along {axis} is {float(v):.4g} µm, the corpus cubes' {lo:.4g}-{hi:.4g} µm "
                           f"(more than a factor {VOXEL_TOLERANCE:g} apart): resample it to cubic voxels of about "
                           f"{(lo * hi) ** 0.5:.4g} µm (features are scale-dependent)")
        return out
    rng = m["voxel_size_um"].get("patch_range")
    if rng:
        sizes = [voxel_size_um] if np.isscalar(voxel_size_um) else list(voxel_size_um)[-2:]
        known = [float(v) for v in sizes if v is not None]
        if known:
            v = float(np.mean(known))
            lo, hi = rng
            if v < lo / VOXEL_TOLERANCE or v > hi * VOXEL_TOLERANCE:
                out.append(f"{name}: voxel size {v:.4g} µm is outside the corpus patches' {lo:.4g}-{hi:.4g} µm by more "
                           f"than a factor {VOXEL_TOLERANCE:g}: resample it (features are scale-dependent)")
    return out


def prepare(data: Any, file: str | os.PathLike[str] | Mapping[str, Any], *,
            voxel_size_um: Sequence[float | None] | float | None = None, warn: bool = True,
            reference: IntensityReference | None = None) -> np.ndarray:
    """Apply an encoder file's intensity rule and standardization to new data.

    Parameters
    ----------
    data : ndarray or Volume
        Raw values, any shape (a Volume is read whole).
    file : path or dict
        The encoder file (or its manifest).
    voxel_size_um : float or sequence, optional
        Voxel size in micrometres, (Z, Y, X) or in-plane (a 2-D encoder uses the last two
        entries; a 3-D encoder checks each axis). Default: the Volume's own.
    warn : bool
        Issue a :class:`~warmstart.errors.DataMismatchWarning` for each way the result does not
        look like the corpus (see :func:`check_like_corpus`).
    reference : IntensityReference, optional
        Use this instead of fitting the file's rule (e.g. one reference for a whole series).

    Returns
    -------
    ndarray, float32
        ``(rule(raw) - mean) / std``: what the encoder was trained on.
    """
    m = _manifest(file)
    if hasattr(data, "read") and hasattr(data, "voxel_size_um"):
        if voxel_size_um is None:
            voxel_size_um = data.voxel_size_um
        name = str(data.source.path)
        raw = data.read()
    else:
        name, raw = "data", np.asarray(data)
    ref = reference or fit_reference(raw, m)
    normalized = ref.apply(raw)
    if warn:
        for msg in check_like_corpus(normalized, m, voxel_size_um, name):
            warnings.warn(msg, DataMismatchWarning, stacklevel=2)
    mean, std = m["standardization"]["mean"], m["standardization"]["std"]
    return ((normalized - mean) / std).astype(np.float32, copy=False)
