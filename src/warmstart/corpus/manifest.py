"""The corpus manifest: sources, their intensity references, and patch statistics.

Assembled from the journal records alone (never from the patches), so a build, a resumed build
and a merge of shards produce it the same way. Statistics combine exactly: sums, sums of
squares and fixed-range histograms add up across sources and shards.
"""
from __future__ import annotations

import math
import time
from collections import Counter
from typing import Any, Sequence

import numpy as np

from .. import __version__
from .settings import CorpusSettings
from .store import CORPUS_FORMAT, STORE_VERSION, quantization_note, voxel_section

__all__ = ["build_manifest", "combine_stats"]

_RULES = ("planned", "nonfinite", "low_variance", "background", "duplicate", "kept")


def combine_stats(parts: Sequence[dict[str, Any]], rng: Sequence[float]) -> dict[str, Any]:
    """Combine per-source value statistics into mean, std and a 256-bin histogram."""
    n = sum(p["n"] for p in parts)
    total = sum(p["sum"] for p in parts)
    sq = sum(p["sumsq"] for p in parts)
    counts = np.sum([p["counts"] for p in parts], axis=0).astype(int).tolist() if parts else [0] * 256
    mean = total / n if n else None
    var = max(sq / n - mean * mean, 0.0) if n else None
    return {"values": n, "mean": mean, "std": None if var is None else math.sqrt(var),
            "below_range": sum(p["below"] for p in parts), "above_range": sum(p["above"] for p in parts),
            "histogram": {"range": list(rng), "bins": len(counts), "counts": counts}}


def _source_entry(r: dict[str, Any], s: CorpusSettings) -> dict[str, Any]:
    entry = {k: r.get(k) for k in ("position", "name", "path", "format", "status", "reason", "warnings", "seconds")}
    entry["patch_range"] = [r["start"], r["stop"]]
    entry["patches_sha256"] = r.get("patches_sha256")
    if r["status"] == "ok":
        vol = r["volume"]
        entry.update(
            sha256=vol["source"]["sha256"], hash_kind=vol["source"]["hash_kind"], size_bytes=vol["source"]["size_bytes"],
            shape=vol["shape"], dtype=vol["dtype"], voxel_size_um=vol["voxel_size_um"], meta=vol["meta"],
            reference=r["reference"], downscale_factors=r["factors"], counts=r["counts"],
            quantization=r["quantization"], parts=r.get("parts", 1),
            modality=s.read.modality_of(r["name"]) or vol["meta"].get("modality"),
            patch_mean=r["stats"]["sum"] / r["stats"]["n"] if r["stats"]["n"] else None,
        )
        if s.sampling.spatial_dims == 3:  # the cubes' voxel shape was read or stated, or assumed
            entry["voxels_assumed_cubic"] = any(v is None for v in vol["voxel_size_um"])
    return entry


def build_manifest(build: dict[str, Any], records: list[dict[str, Any]], s: CorpusSettings,
                   patches_shape: Sequence[int]) -> dict[str, Any]:
    """Assemble ``manifest.json`` from a build description and its journal records."""
    ok = [r for r in records if r["status"] == "ok"]
    stats = combine_stats([r["stats"] for r in ok], s.histogram_range())
    totals = {rule: sum(r["counts"][rule] for r in ok) for rule in _RULES}
    qnote = quantization_note(s.encoding())
    qnote["measured_max_abs_error"] = max((r["quantization"]["max_abs_error"] for r in ok), default=0.0)
    qnote["clipped_values"] = sum(r["quantization"]["clipped"] for r in ok)
    encoding = s.encoding()
    sources = [_source_entry(r, s) for r in records]
    used = [e for e in sources if e["status"] == "ok"]
    return {
        "format": CORPUS_FORMAT,
        "format_version": STORE_VERSION,
        "warmstart_version": __version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "archive": build["archive"],
        "shard": build["shard"],
        "settings": s.identity(),
        "patches": {"count": int(patches_shape[0]), "shape": list(patches_shape[1:]),
                    "spatial_dims": s.sampling.spatial_dims, "axis_order": "ZYX" if s.sampling.spatial_dims == 3 else "YX",
                    "encoding": encoding,
                    "chunk_patches": s.store.chunk_patches, "quantization": qnote},
        "statistics": stats,
        "counts": {"sources": len(records), "sources_ok": len(ok), "sources_failed": len(records) - len(ok), **totals},
        "voxel_size_um": voxel_section(used, s.sampling.target_voxel_um,
                                       sum(1 for r in ok if r["volume"]["voxel_size_um"][1] is None)),
        "formats": dict(sorted(Counter(e["format"] for e in used).items())),
        "modalities": sorted({e["modality"] for e in used if e.get("modality")}),
        "clinical": any(r["volume"]["meta"].get("clinical") for r in ok),
        "sources": sources,
        "ignored": build.get("ignored", []),
    }
