"""Scan an archive: what is there, what it looks like, and what cannot be used and why."""
from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import WarmstartError
from ..intensity import IntensitySettings, fit_intensity
from ..volumes import describe_failure, discover, open_volume
from .sampling import downscale_factors, plan_patches
from .settings import CorpusSettings

__all__ = ["scan_archive", "ScanResult"]


@dataclass
class ScanResult:
    """Rows (one per source) and the files passed over.

    Each row has ``name``, ``path``, ``format``, ``status`` (``ok`` or ``failed``) and, when
    readable, ``shape``, ``dtype``, ``voxel_size_um`` (Z, Y, X in µm), ``range`` (0.5 and 99.5
    percentiles of a sample), ``min``/``max``, ``nonfinite`` (NaN/Inf in the sample) and
    ``clinical``; failed rows have ``reason``.
    """

    rows: list[dict[str, Any]] = field(default_factory=list)
    ignored: list[dict[str, str]] = field(default_factory=list)

    @property
    def n_failed(self) -> int:
        return sum(r["status"] != "ok" for r in self.rows)

    def to_dict(self) -> dict[str, Any]:
        return {"sources": self.rows, "ignored": self.ignored, "failed": self.n_failed}


def scan_archive(archive: str | os.PathLike[str], settings: CorpusSettings | None = None, *,
                 sample_slices: int = 8, progress: bool = True) -> ScanResult:
    """Open every source of an archive, sample its intensities, and report problems.

    A source fails the scan when it cannot be read, has no finite voxel, is constant, or is
    smaller than one patch under ``settings``.

    Parameters
    ----------
    archive : path
    settings : CorpusSettings, optional
        Read options and patch geometry to check against (defaults otherwise).
    sample_slices : int
        Slices read per source for the intensity summary.
    """
    from ..base.progress import progress_bar

    s = settings or CorpusSettings()
    cands, ignored = discover(archive)
    result = ScanResult(ignored=[{"path": i.path, "reason": i.reason} for i in ignored])
    quick = IntensitySettings(percentiles=(0.5, 99.5), sample_slices=sample_slices, sample_voxels=200_000)
    for c in progress_bar(cands, desc="scan", unit="src", disable=not progress, leave=False):
        row: dict[str, Any] = {"name": c.name, "path": c.path, "format": c.format}
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                with open_volume(c, rgb=s.read.rgb, channel=s.read.channel, target_voxel_um=s.sampling.target_voxel_um,
                                 voxel_size_um=s.read.voxel_size_um) as vol:
                    row.update(format=vol.source.format, shape=list(vol.shape), dtype=str(vol.dtype),
                               voxel_size_um=list(vol.voxel_size_um), clinical=bool(vol.meta.get("clinical")),
                               unit=vol.meta.get("unit"))
                    ref = fit_intensity(vol, quick)
                    row.update(range=[ref.params["low"], ref.params["high"]], min=ref.stats["min"], max=ref.stats["max"],
                               nonfinite=ref.stats["n_nonfinite"])
                    factors, _ = downscale_factors(vol.voxel_size_um, s.sampling, vol.shape)
                    if len(plan_patches(vol.shape, factors, s.sampling, np.random.default_rng(0))) == 0:
                        raise WarmstartError(f"{c.path}: smaller than one {s.sampling.patch_size} px patch")
            row["status"] = "ok"
            row["warnings"] = [str(w.message) for w in caught]
        except Exception as err:  # report, never crash a scan on one odd file (same words as the build)
            row.update(status="failed", reason=describe_failure(err, c.path))
        result.rows.append(row)
    return result
