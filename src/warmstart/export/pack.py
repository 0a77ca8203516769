"""Export: a pretraining run folder -> one encoder file (weights + manifest)."""
from __future__ import annotations

import csv
import json
import os
import platform
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from ..corpus.store import upgrade_manifest
from ..errors import ExportError
from ..run_folder import CHECKPOINTS, CORPUS_MANIFEST, HISTORY, RECIPE, SUMMARY, read_networks
from .file import write_encoder_file
from .manifest import build_manifest

__all__ = ["export_encoder", "packed_run", "encoder_arrays", "WEIGHT_CHOICES"]

WEIGHT_CHOICES = ("auto", "online", "momentum")


def _read_json(path: Path, what: str) -> dict[str, Any]:
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise ExportError(f"{path}: missing ({what})") from None
    except json.JSONDecodeError as e:
        raise ExportError(f"{path}: not valid JSON ({e})") from e


def _corpus_manifest(run: Path) -> tuple[dict[str, Any], str | None]:
    """The corpus manifest the run saved, else the one at the corpus path it names."""
    recipe = _read_json(run / RECIPE, "the run's resolved recipe; is this a pretraining run folder?")
    saved = run / CORPUS_MANIFEST
    if saved.exists():
        return upgrade_manifest(_read_json(saved, "corpus manifest")), recipe.get("corpus")
    corpus = Path(recipe.get("corpus", ""))
    found = _read_json(corpus / "manifest.json", f"manifest of the corpus {corpus} the run was trained on")
    return upgrade_manifest(found), str(corpus)


def _training_section(run: Path, ckpt: dict[str, Any], hp: dict[str, Any]) -> dict[str, Any]:
    import torch

    summary_path = run / SUMMARY
    summary = json.loads(summary_path.read_text()) if summary_path.exists() else {}
    rows = list(csv.DictReader(open(run / HISTORY))) if (run / HISTORY).exists() else []
    last = rows[-1] if rows else {}
    steps = int(ckpt.get("global_step", 0))
    total = int(hp.get("total_steps", steps))
    knn = [float(r["knn"]) for r in rows if r.get("knn") not in (None, "")]
    settings = hp["settings"]
    versions = {"warmstart": summary.get("warmstart_version"), "torch": summary.get("torch_version", torch.__version__),
                "lightning": summary.get("lightning_version"), "python": platform.python_version()}
    try:
        import lightly

        versions["lightly"] = lightly.__version__
    except ImportError:  # pragma: no cover - lightly is part of the train extra
        pass
    return {
        "method": settings["method"], "method_params": settings.get("method_params", {}),
        "steps": steps, "planned_steps": total, "finished": bool(summary) and steps >= total,
        "epochs": summary.get("epochs"), "batch_size": settings["batch_size"], "lr": settings["lr"],
        "seed": settings["seed"],
        "final_loss": float(last["loss"]) if last.get("loss") else summary.get("final_loss"),
        "final_spread": float(last["spread"]) if last.get("spread") else summary.get("final_spread"),
        "knn_accuracy": knn[-1] if knn else None,
        "seconds": summary.get("seconds"),
        "library_versions": versions,
    }


def _trained_networks(run: Path, state: dict[str, Any], hp: dict[str, Any], ckpt_path: Path) -> tuple[Any, Any, Any]:
    """The online encoder, the momentum encoder (or None) and the decoder (or None) of a run, built
    from the encoder registry and filled from the checkpoint entries that the run's
    ``networks.json`` names (the pretraining stage wrote it; nothing of the trainer is imported)."""
    from ..encoders import build_encoder
    from ..unet import UNetDecoder

    s = hp["settings"]
    nets = read_networks(run)

    def filled(module: Any, prefix: str, what: str) -> Any:
        part = {k[len(prefix):]: v for k, v in state.items() if k.startswith(prefix)}
        try:
            module.load_state_dict(part, strict=True)
        except RuntimeError as e:
            raise ExportError(f"{ckpt_path}: the {what} weights (entries {prefix}*) do not fit encoder "
                              f"{s['encoder']!r} of method {s['method']!r}: {e}") from e
        return module

    def encoder() -> Any:
        return build_encoder(s["encoder"], **{"in_channels": int(hp["in_channels"]), **s.get("encoder_params", {})})

    online = filled(encoder(), nets["encoder"]["online"], "encoder")
    momentum = filled(encoder(), nets["encoder"]["momentum"], "momentum encoder") if nets["encoder"]["momentum"] else None
    dec = nets["decoder"]
    dims = int(online.spec.params.get("spatial_dims", 2))
    if dec and dec.get("kind", "unet") != "unet":  # a client network's own decoder (nnU-Net's)
        from ..encoders.registry import own_decoder

        built = own_decoder(online, int(hp["in_channels"]))
        if built is None or built.kind != dec["kind"]:
            raise ExportError(f"{ckpt_path}: the run trained a {dec['kind']} decoder, which encoder {s['encoder']!r} "
                              "does not build")
        decoder = filled(built, dec["key_prefix"], "decoder")
    else:
        decoder = filled(UNetDecoder(online.spec.stages, dec["norm"], dims), dec["key_prefix"], "decoder") if dec else None
    return online, momentum, decoder


def _decoder_section(dec: Any) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """A decoder's tensors as ``decoder.*`` and the manifest's decoder section.

    warmstart's U-Net decoder is written whole. A client network's own decoder (``kind``
    ``nnunet``) is written under that network's own ``decoder.*`` keys, without the encoder it
    refers to (already in the file) and without its output layers (``seg_layers``: they restored
    patches, and a segmentation network has its own)."""
    kind = getattr(dec, "kind", "unet")
    if kind == "unet":
        arrays = {f"decoder.{k}": v for k, v in encoder_arrays(dec).items()}
        params = int(sum(p.numel() for p in dec.parameters()))
    else:
        arrays = {f"decoder.{k}": v for k, v in encoder_arrays(dec.decoder).items()
                  if not k.startswith("encoder.") and not k.startswith("seg_layers.")}
        params = int(sum(v.size for k, v in arrays.items() if not k.endswith("num_batches_tracked")))
    section = {"kind": kind, "norm": getattr(dec, "norm", None), "out_channels": int(dec.out_channels),
               "tensors": len(arrays), "parameters": params, "key_prefix": "decoder."}
    return arrays, section


def export_encoder(run: str | os.PathLike[str], out: str | os.PathLike[str], *, weights: str = "auto",
                   checkpoint: str | os.PathLike[str] | None = None,
                   with_decoder: bool = False) -> tuple[Path, dict[str, Any]]:
    """Write a run's encoder (and, on request, its decoder) to one safetensors file with its manifest.

    Parameters
    ----------
    run : path
        A pretraining run folder (``warmstart pretrain ... -o RUN``).
    out : path
        The encoder file to write (``.safetensors``); written atomically.
    weights : {"auto", "online", "momentum"}
        Which copy of the encoder: ``momentum`` is the EMA copy of MoCo / BYOL (the one usually
        kept after training), ``online`` the one the optimizer trained; ``auto`` takes the
        momentum copy where the method has one.
    checkpoint : path, optional
        A checkpoint of the run other than ``checkpoints/last.ckpt``.
    with_decoder : bool
        Also write the U-Net decoder the method trained (``restore``, ``combined``), as tensors
        ``decoder.*``; the manifest's ``parts`` and ``decoder`` say so. :func:`warmstart.warm_start`
        loads it into networks whose decoder matches it exactly.

    Returns
    -------
    (Path, dict)
        The file written and its manifest.

    Raises
    ------
    ExportError
        Not a run folder, no checkpoint, no momentum copy when one is asked for, no decoder when
        one is asked for, or a checkpoint whose weights do not fit the method and encoder it records.
    """
    arrays, manifest = packed_run(run, weights=weights, checkpoint=checkpoint, with_decoder=with_decoder)
    path = write_encoder_file(out, arrays, manifest)
    from .file import read_manifest

    return path, read_manifest(path)


def packed_run(run: str | os.PathLike[str], *, weights: str = "auto", checkpoint: str | os.PathLike[str] | None = None,
               with_decoder: bool = False) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """A run's chosen encoder (and decoder) as arrays, and the manifest without its ``tensors`` and
    ``digest`` entries (the writer of each file format adds them). Parameters and errors as for
    :func:`export_encoder`."""
    import torch

    if weights not in WEIGHT_CHOICES:
        raise ExportError(f"weights must be one of {', '.join(WEIGHT_CHOICES)}, got {weights!r}")
    run = Path(run)
    ckpt_path = Path(checkpoint) if checkpoint else run / CHECKPOINTS / "last.ckpt"
    if not ckpt_path.is_file():
        raise ExportError(f"{ckpt_path}: no checkpoint to export (has the run in {run} started?)")
    corpus, corpus_path = _corpus_manifest(run)
    try:
        ckpt = torch.load(ckpt_path, map_location="cpu", weights_only=True)
    except Exception as e:
        raise ExportError(f"{ckpt_path}: cannot be read as a checkpoint ({e})") from e
    hp = ckpt.get("hyper_parameters") or {}
    if "settings" not in hp or "in_channels" not in hp:
        raise ExportError(f"{ckpt_path}: not a warmstart pretraining checkpoint (no recorded settings)")
    s = hp["settings"]
    online, momentum, dec = _trained_networks(run, ckpt["state_dict"], hp, ckpt_path)
    if weights == "momentum" and momentum is None:
        raise ExportError(f"{ckpt_path}: method {s['method']!r} keeps no momentum copy of the encoder; "
                          "export --weights online")
    chosen = "momentum" if (weights == "momentum" or (weights == "auto" and momentum is not None)) else "online"
    enc = momentum if chosen == "momentum" else online
    arrays = encoder_arrays(enc)
    decoder = None
    if with_decoder:
        if dec is None:
            raise ExportError(f"{ckpt_path}: method {s['method']!r} trains no decoder; export without --with-decoder "
                              "(restore and combined train one)")
        dec_arrays, decoder = _decoder_section(dec)
        arrays.update(dec_arrays)
    training = _training_section(run, ckpt, hp)
    if not training["finished"]:
        warnings.warn(f"{run}: the run stopped at step {training['steps']} of {training['planned_steps']}; "
                      "exporting that state (the manifest says so)", stacklevel=3)
    std = tuple(hp.get("standardization", (0.0, 1.0)))
    manifest = build_manifest(spec=enc.spec.to_dict(), first_conv=enc.first_conv, weights=chosen, corpus=corpus,
                              corpus_path=corpus_path, standardization=std, training=training,  # type: ignore[arg-type]
                              decoder=decoder)
    return arrays, manifest


def encoder_arrays(encoder: Any) -> dict[str, np.ndarray]:
    """A module's state dict as numpy arrays (the tensors an encoder file holds)."""
    return {k: v.detach().cpu().contiguous().numpy() for k, v in encoder.state_dict().items()}
