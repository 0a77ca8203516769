"""warmstart: self-supervised pretrained encoders from a facility's own archive of grayscale volumes.

The public functions are imported on first use, so ``import warmstart`` stays fast and never
imports torch for reading or corpus work.
"""
from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

_LAZY = {
    "open_volume": "warmstart.volumes",
    "discover": "warmstart.volumes",
    "Volume": "warmstart.volumes",
    "fit_intensity": "warmstart.intensity",
    "IntensityReference": "warmstart.intensity",
    "IntensitySettings": "warmstart.intensity",
    "scan_archive": "warmstart.corpus.scan",
    "build_corpus": "warmstart.corpus.build",
    "merge_corpora": "warmstart.corpus.merge",
    "open_corpus": "warmstart.corpus.store",
    "write_report": "warmstart.corpus.report",
    "load_recipe": "warmstart.recipe",
    "export_encoder": "warmstart.export.pack",
    "read_manifest": "warmstart.export.file",
    "load_encoder": "warmstart.export.load",
    "warm_start": "warmstart.export.load",
    "WarmStartReport": "warmstart.export.load",
    "prepare": "warmstart.export.prepare",
    "UNet": "warmstart.unet",
    "finetune_groups": "warmstart.finetune",
    "finetune_scheduler": "warmstart.finetune",
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'warmstart' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
