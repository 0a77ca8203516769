"""The pretraining run folder: what ``warmstart pretrain`` writes and ``warmstart export`` reads.

Layout of ``RUN/``::

    recipe.json           the resolved pretraining settings and the corpus path
    corpus-manifest.json  a copy of the corpus's manifest (an export works after the corpus moved)
    networks.json         which entries of a checkpoint are the encoder (online and, for momentum
                          methods, momentum copy) and the decoder, if the method trains one
    checkpoints/          step-N.ckpt every checkpoint_every steps (the newest 3) and last.ckpt
    history.csv           one row per step: loss, lr, spread, alignment, uniformity (knn per epoch)
    summary.json          written last: steps, final loss, seconds, library versions
    lightning/            the training library's own logs (hparams.yaml; TensorBoard's files in
                          lightning/tensorboard/ when tensorboard is installed)

The pretraining stage writes these files; the export stage only reads them, so it never imports
the trainer. Nothing here imports torch.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .base.atomic import write_json
from .errors import ExportError

__all__ = ["RECIPE", "CORPUS_MANIFEST", "NETWORKS", "CHECKPOINTS", "HISTORY", "SUMMARY", "LIBRARY_LOGS",
           "NETWORKS_FORMAT", "NETWORKS_VERSION", "write_networks", "read_networks"]

RECIPE = "recipe.json"
CORPUS_MANIFEST = "corpus-manifest.json"
NETWORKS = "networks.json"
CHECKPOINTS = "checkpoints"
HISTORY = "history.csv"
SUMMARY = "summary.json"
LIBRARY_LOGS = "lightning"

NETWORKS_FORMAT = "warmstart-run-networks"
NETWORKS_VERSION = 1


def write_networks(run: str | os.PathLike[str], networks: dict[str, Any]) -> Path:
    """Write ``networks.json`` (the method's :meth:`trained_networks`, keys as in a checkpoint)."""
    path = Path(run) / NETWORKS
    write_json(path, {"format": NETWORKS_FORMAT, "format_version": NETWORKS_VERSION, **networks})
    return path


def read_networks(run: str | os.PathLike[str]) -> dict[str, Any]:
    """Read and check ``networks.json``.

    Returns
    -------
    dict
        ``{"encoder": {"online": PREFIX, "momentum": PREFIX or None}, "decoder": None or
        {"kind", "norm", "key_prefix"}}``: key prefixes of a checkpoint's ``state_dict``.

    Raises
    ------
    ExportError
        The file is missing, not JSON, of another format or of an unknown version.
    """
    path = Path(run) / NETWORKS
    try:
        d = json.loads(path.read_text())
    except FileNotFoundError:
        raise ExportError(f"{path}: missing (which networks the run trained; 'warmstart export' writes it "
                          "for runs made before it existed)") from None
    except json.JSONDecodeError as e:
        raise ExportError(f"{path}: not valid JSON ({e})") from e
    if not isinstance(d, dict) or d.get("format") != NETWORKS_FORMAT:
        raise ExportError(f"{path}: not a warmstart networks record")
    if d.get("format_version") != NETWORKS_VERSION:
        raise ExportError(f"{path}: networks record version {d.get('format_version')!r} is unknown "
                          f"(this warmstart reads {NETWORKS_VERSION})")
    enc = d.get("encoder")
    if not isinstance(enc, dict) or not isinstance(enc.get("online"), str):
        raise ExportError(f"{path}: names no encoder")
    return {"encoder": {"online": enc["online"], "momentum": enc.get("momentum")}, "decoder": d.get("decoder")}
