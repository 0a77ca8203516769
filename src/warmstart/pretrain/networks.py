"""``networks.json`` for a run folder made before warmstart wrote it (from the checkpoint's settings).

New runs write the record when they start (:func:`warmstart.pretrain.loop.pretrain`); this module
rebuilds the method a checkpoint records, without its weights, only to learn where its networks
sit, so the export stage can read any run without importing the trainer.
"""
from __future__ import annotations

import os
from pathlib import Path

import torch

from ..encoders import build_encoder
from ..errors import ExportError
from ..run_folder import CHECKPOINTS, NETWORKS, write_networks
from .methods import build_method

__all__ = ["record_networks"]


def record_networks(run: str | os.PathLike[str], checkpoint: str | os.PathLike[str] | None = None) -> Path | None:
    """Write ``RUN/networks.json`` where it is missing; returns its path (None when nothing to do).

    Raises
    ------
    ExportError
        No checkpoint to learn from, or one without warmstart's recorded settings.
    """
    run = Path(run)
    if (run / NETWORKS).exists():
        return None
    ckpt_path = Path(checkpoint) if checkpoint else run / CHECKPOINTS / "last.ckpt"
    if not ckpt_path.is_file():
        return None  # the export names what is missing
    try:
        hp = torch.load(ckpt_path, map_location="cpu", weights_only=True).get("hyper_parameters") or {}
    except Exception as e:
        raise ExportError(f"{ckpt_path}: cannot be read as a checkpoint ({e})") from e
    if "settings" not in hp or "in_channels" not in hp:
        raise ExportError(f"{ckpt_path}: not a warmstart pretraining checkpoint (no recorded settings)")
    s = hp["settings"]
    enc = build_encoder(s["encoder"], **{"in_channels": int(hp["in_channels"]), **s.get("encoder_params", {})})
    method = build_method(s["method"], enc, **s.get("method_params", {}))
    return write_networks(run, method.trained_networks("method."))
