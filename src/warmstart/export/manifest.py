"""The manifest of an encoder file: what the encoder is, what it was trained on, and how new
data must be prepared for it (no torch needed).

Version 2 fields
----------------
``format`` (``warmstart-encoder``), ``format_version``, ``created``, ``warmstart_version`` (the
same ``format`` / ``format_version`` convention as the corpus manifest)
``encoder``
    EncoderSpec dict, ``first_conv`` (the module whose weight sees the input channels) and
    ``weights`` (``online`` or ``momentum``: which copy of the network the file holds).
``input``
    ``channels`` (1, or k adjacent slices for 2.5-D), ``patch_size`` in pixels, ``axes`` sliced,
    ``spatial_dims`` (2: slices (B, C, H, W); 3: volumes (B, C, D, H, W)), ``axis_order`` of the
    patch axes (``YX`` or ``ZYX``), ``patch_shape`` (pixels or voxels per patch axis, in that
    order) and ``voxel_size_um``: the patches' voxel size per axis Z, Y, X, each [min, max] in µm
    or null (for 2-D patches Z is the spacing of the slices they were cut from). Files written
    before these fields existed are 2-D and are read as such (``voxel_size_um`` then null).
``intensity``
    ``rule`` (IntensitySettings dict); ``fit`` = ``per_volume`` (fit the rule on each new volume,
    as every corpus source was) or ``fixed`` (one reference for all data: a physical scale or
    given two-point values), then ``reference`` (IntensityReference dict) for ``fixed``.
``standardization``
    ``mean``, ``std``: the encoder's input is ``(normalized - mean) / std``.
``corpus_values``
    Percentiles of the corpus's normalized values (before standardization), for mismatch checks.
``voxel_size_um``
    As in the corpus manifest: ``source_range`` and ``patch_range`` (in-plane voxel sizes in
    micrometres of the sources and of the patches after resampling, [min, max] or null),
    ``target`` (the resampling target, µm, or null) and ``unknown_sources``.
``corpus``
    Sources, ``formats`` (file formats and their counts), ``modalities`` (imaging modalities as
    the files or the recipe's ``corpus.read.modality`` name them; sources with none are counted
    in ``modality_unrecorded``), counts, clinical flag and provenance hashes.
``training``
    Method, steps, epochs, final loss, embedding spread, kNN accuracy, seconds, library versions.
``timm``
    A timm-style pretrained configuration (ResNet-18/34/50 only), or null.
``tensors``
    ``count``, ``parameters`` and ``sha256`` of the tensor data (see :func:`~.file.tensor_digest`).

Version 1 files (``version`` instead of ``format_version``, ``input.slices_per_patch`` beside
``input.channels``, file formats listed among the modalities) are read and converted in memory by
:func:`check_manifest`.
"""
from __future__ import annotations

import os
import time
from collections import Counter
from typing import Any, Mapping

import numpy as np

from .. import __version__
from ..errors import ExportError
from ..finetune import fine_tuning_section

__all__ = ["FORMAT", "MANIFEST_VERSION", "build_manifest", "check_manifest", "intensity_section",
           "histogram_percentiles", "patch_voxel_ranges", "timm_config", "spatial_dims"]

FORMAT = "warmstart-encoder"
MANIFEST_VERSION = 2
_READABLE = (1, 2)
_REQUIRED = ("encoder", "input", "intensity", "standardization", "corpus_values", "voxel_size_um", "corpus",
             "training", "tensors")
_TIMM_ARCHS = {"resnet18", "resnet34", "resnet50"}
_PERCENTILES = (1, 5, 25, 50, 75, 95, 99)


def histogram_percentiles(hist: Mapping[str, Any], qs: tuple[float, ...] = _PERCENTILES) -> dict[str, float]:
    """Percentiles (0-100) from a fixed-range histogram ``{"range": [lo, hi], "counts": [...]}``,
    interpolated linearly inside a bin.

    Examples
    --------
    >>> histogram_percentiles({"range": [0, 4], "counts": [1, 1, 1, 1]}, (25, 50))
    {'25': 1.0, '50': 2.0}
    """
    counts = np.asarray(hist["counts"], dtype=float)
    lo, hi = (float(v) for v in hist["range"])
    edges = np.linspace(lo, hi, len(counts) + 1)
    cdf = np.concatenate([[0.0], np.cumsum(counts)])
    total = cdf[-1]
    if total <= 0:
        return {}
    return {f"{q:g}": round(float(np.interp(q / 100 * total, cdf, edges)), 6) for q in qs}


def intensity_section(corpus: Mapping[str, Any]) -> dict[str, Any]:
    """How new data is normalized: the corpus's rule, fitted per volume or one fixed reference."""
    rule = dict(corpus["settings"]["intensity"])
    fixed = rule["scheme"] == "fixed" or (rule["scheme"] == "two_point" and rule.get("reference_values") is not None)
    out: dict[str, Any] = {"rule": rule, "fit": "fixed" if fixed else "per_volume"}
    refs = [s["reference"] for s in corpus["sources"] if s.get("status") == "ok"]
    if fixed and refs:
        ref = {k: v for k, v in refs[0].items() if k != "stats"}
        out["reference"] = ref
    out["source_references"] = len(refs)
    return out


def _corpus_section(corpus: Mapping[str, Any], path: str | None) -> dict[str, Any]:
    ok = [s for s in corpus["sources"] if s.get("status") == "ok"]
    return {
        "path": path,
        "created": corpus.get("created"),
        "sources": len(ok),
        "sources_failed": corpus["counts"]["sources_failed"],
        "formats": dict(sorted(Counter(s["format"] for s in ok).items())),
        "modalities": sorted({s["modality"] for s in ok if s.get("modality")}),
        "modality_unrecorded": sum(1 for s in ok if not s.get("modality")),
        "clinical": bool(corpus.get("clinical")),
        "patches": corpus["patches"]["count"],
        "counts": {k: corpus["counts"][k] for k in ("planned", "kept") if k in corpus["counts"]},
        "provenance": [{"name": s["name"], "sha256": s["sha256"], "hash_kind": s["hash_kind"]} for s in ok],
    }


def patch_voxel_ranges(corpus: Mapping[str, Any]) -> list[list[float] | None]:
    """The corpus patches' voxel size per axis (Z, Y, X) in micrometres, each ``[min, max]`` over
    the sources that know it, or ``None`` (source voxel size times its downscale factor).

    Examples
    --------
    >>> patch_voxel_ranges({"sources": [
    ...     {"status": "ok", "voxel_size_um": [2.0, 1.0, 1.0], "downscale_factors": [1.0, 2.0, 2.0]},
    ...     {"status": "ok", "voxel_size_um": [None, None, None], "downscale_factors": [1.0, 1.0, 1.0]}]})
    [[2.0, 2.0], [2.0, 2.0], [2.0, 2.0]]
    """
    out: list[list[float] | None] = []
    for axis in range(3):
        vals = [float(s["voxel_size_um"][axis]) * float(s["downscale_factors"][axis]) for s in corpus["sources"]
                if s.get("status") == "ok" and s.get("voxel_size_um") and s["voxel_size_um"][axis] is not None]
        out.append([min(vals), max(vals)] if vals else None)
    return out


def timm_config(arch: str, channels: int, patch: int, mean: float, std: float, first_conv: str) -> dict[str, Any] | None:
    """A timm-style pretrained configuration, for the architectures timm names like ours.

    ``mean``/``std`` apply to data already normalized by the file's intensity rule (timm's own
    convention applies them to pixel values scaled to [0, 1]; here the rule takes that place).
    """
    if arch not in _TIMM_ARCHS:
        return None
    return {"architecture": arch, "pretrained_cfg": {
        "input_size": [channels, patch, patch], "mean": [mean] * channels, "std": [std] * channels,
        "first_conv": first_conv, "classifier": "fc", "num_classes": 0, "interpolation": "bilinear",
        "crop_pct": 1.0, "tag": "warmstart"}}


def build_manifest(*, spec: Mapping[str, Any], first_conv: str, weights: str, corpus: Mapping[str, Any],
                   corpus_path: str | None, standardization: tuple[float, float], training: Mapping[str, Any],
                   decoder: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Assemble a manifest (without ``tensors``, which the writer adds).

    Parameters
    ----------
    spec : dict
        EncoderSpec dict.
    first_conv : str
        Module name of the input convolution.
    weights : {"online", "momentum"}
    corpus : dict
        The corpus's ``manifest.json``.
    corpus_path : str, optional
    standardization : (mean, std)
        What the encoder's input was standardized with during training.
    training : dict
        Training summary.
    decoder : dict, optional
        The decoder section when the file holds the decoder too (``kind``, ``norm``,
        ``out_channels``, ``tensors``, ``parameters``, ``key_prefix``). ``parts`` lists what the
        file holds: ``["encoder"]`` or ``["encoder", "decoder"]`` (files without ``parts`` hold the
        encoder only).
    """
    shape = [int(n) for n in corpus["patches"]["shape"]]  # (C, H, W) or (C, D, H, W)
    channels, patch = shape[0], shape[-1]
    dims = int(corpus["patches"].get("spatial_dims", len(shape) - 1))
    mean, std = (float(v) for v in standardization)
    hist = corpus["statistics"]["histogram"]
    return {
        "format": FORMAT,
        "format_version": MANIFEST_VERSION,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "warmstart_version": __version__,
        "encoder": {"spec": dict(spec), "first_conv": first_conv, "weights": weights},
        "input": {"channels": channels, "patch_size": patch, "axes": corpus["settings"]["sampling"]["axes"],
                  "spatial_dims": dims, "axis_order": "ZYX" if dims == 3 else "YX", "patch_shape": shape[1:],
                  "voxel_size_um": patch_voxel_ranges(corpus)},
        "intensity": intensity_section(corpus),
        "standardization": {"mean": mean, "std": std},
        "corpus_values": {"percentiles": histogram_percentiles(hist), "mean": corpus["statistics"]["mean"],
                          "std": corpus["statistics"]["std"]},
        "voxel_size_um": dict(corpus["voxel_size_um"]),
        "corpus": _corpus_section(corpus, corpus_path),
        "training": dict(training),
        "timm": timm_config(spec["name"], channels, patch, mean, std, first_conv) if dims == 2 else None,
        "parts": ["encoder", "decoder"] if decoder else ["encoder"],
        "decoder": dict(decoder) if decoder else None,
        "fine_tuning": fine_tuning_section(dict(spec)),
    }


def check_manifest(d: Any, path: str | os.PathLike[str]) -> dict[str, Any]:
    """Refuse a manifest of another format, an unknown version or with missing fields."""
    if not isinstance(d, dict) or d.get("format") != FORMAT:
        raise ExportError(f"{path}: not a warmstart encoder manifest (format {d.get('format') if isinstance(d, dict) else None!r})")
    version = d.get("format_version", d.get("version"))
    if version not in _READABLE:
        raise ExportError(f"{path}: encoder manifest version {version!r} is unknown; this warmstart "
                          f"({__version__}) reads versions {', '.join(map(str, _READABLE))}; upgrade warmstart or "
                          "re-export the encoder")
    missing = [k for k in _REQUIRED if k not in d]
    if missing:
        raise ExportError(f"{path}: the encoder manifest lacks {', '.join(missing)}")
    return _with_dims(_upgraded(d))


def spatial_dims(manifest: Mapping[str, Any]) -> int:
    """2 or 3: whether an encoder file's network works on slices or on volumes."""
    return int(manifest["input"].get("spatial_dims", 2))


def _with_dims(d: dict[str, Any]) -> dict[str, Any]:
    """Fill the input's ``spatial_dims``, ``axis_order``, ``patch_shape`` and ``voxel_size_um`` in a manifest written
    before they existed (every such file is 2-D); the file itself is not changed."""
    inp = d["input"]
    if "spatial_dims" in inp:
        return d
    patch = int(inp["patch_size"])
    return {**d, "input": {**inp, "spatial_dims": 2, "axis_order": "YX", "patch_shape": [patch, patch],
                           "voxel_size_um": None}}


def _upgraded(d: dict[str, Any]) -> dict[str, Any]:
    """A version 1 manifest in the version 2 layout (the file itself is not changed)."""
    if "format_version" in d:
        return d
    d = {**d, "format_version": MANIFEST_VERSION}
    d.pop("version", None)
    d["input"] = {k: v for k, v in d["input"].items() if k != "slices_per_patch"}
    corpus = dict(d["corpus"])
    formats = set(corpus.get("formats", {}))
    corpus["modalities"] = [x for x in corpus.get("modalities", []) if x not in formats]  # v1 listed formats too
    d["corpus"] = corpus
    vox = dict(d["voxel_size_um"])
    vox.setdefault("target", None)
    d["voxel_size_um"] = vox
    return d
