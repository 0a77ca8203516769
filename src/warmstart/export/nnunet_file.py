"""The file nnU-Net loads: a pretrained nnU-Net network as the checkpoint its
``-pretrained_weights`` option takes.

nnU-Net's loader (``load_pretrained_weights`` in nnunetv2) reads ``checkpoint["network_weights"]``
and requires every key of its network except the segmentation layers (``.seg_layers.``), with
equal shapes. So the file holds the whole network: the pretrained encoder, and the decoder the
run trained (``restore`` and ``combined`` train nnU-Net's own decoder) or, where the method
trained none, the initialization nnU-Net itself gives a new network (the network's own
``initialize``); the manifest's ``nnunet`` section and ``warmstart inspect`` say which.

The file is written with ``torch.save`` and holds only tensors and plain values: the network's
state dict, and the warmstart manifest as a JSON string (with the same ``tensors`` sha256 and
``digest`` as an encoder file), so ``torch.load(..., weights_only=True)`` reads it.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ExportError
from .file import METADATA_KEY, _manifest, manifest_digest, tensor_digest
from .pack import packed_run

__all__ = ["export_for_nnunet", "inflate_for_nnunet", "read_nnunet_file", "is_nnunet_file", "WEIGHTS_KEY"]

WEIGHTS_KEY = "network_weights"  # what nnU-Net's loader reads


def is_nnunet_file(path: str | os.PathLike[str]) -> bool:
    """Whether ``path`` is a torch checkpoint (a zip archive), as :func:`export_for_nnunet` writes."""
    try:
        with open(path, "rb") as fh:
            return fh.read(4) == b"PK\x03\x04"
    except OSError:
        return False


def export_for_nnunet(run: str | os.PathLike[str], out: str | os.PathLike[str], *, weights: str = "auto",
                      checkpoint: str | os.PathLike[str] | None = None, seed: int = 0) -> tuple[Path, dict[str, Any]]:
    """Write a run's pretrained nnU-Net network as the checkpoint nnU-Net's ``-pretrained_weights`` loads.

    Parameters
    ----------
    run : path
        A pretraining run whose encoder is ``nnunet`` (built from an nnU-Net plans file).
    out : path
        The file to write (e.g. ``pretrained.pth``); written atomically.
    weights, checkpoint
        As for :func:`~warmstart.export.pack.export_encoder`.
    seed : int
        Seed of the decoder's initialization (nnU-Net's own scheme), so an export is repeatable.

    Returns
    -------
    (Path, dict)
        The file and its manifest.

    Raises
    ------
    ExportError
        The run's encoder is not an nnU-Net network, or anything :func:`export_encoder` refuses.
    """
    import torch

    from ..encoders.nnunet import build_network
    from ..run_folder import read_networks

    try:
        trained = read_networks(Path(run))["decoder"]
    except ExportError:  # no or an unreadable networks.json: packed_run names the problem
        trained = None
    own = bool(trained) and trained.get("kind") == "nnunet"  # the run trained nnU-Net's own decoder
    arrays, manifest = packed_run(run, weights=weights, checkpoint=checkpoint, with_decoder=own)
    spec = manifest["encoder"]["spec"]
    if spec["name"] != "nnunet":
        raise ExportError(f"{run}: export --for nnunet needs a run pretrained with the nnunet encoder (pretrain "
                          f"--encoder nnunet with an nnU-Net plans file and configuration); this run's encoder is "
                          f"{spec['name']!r}: export it without --for")
    params = spec["params"]
    torch.manual_seed(int(seed))
    net = build_network(params["architecture"], int(params["in_channels"]))
    enc = {k: torch.from_numpy(np.array(v)) for k, v in arrays.items() if not k.startswith("decoder.")}
    dec = {k[len("decoder."):]: torch.from_numpy(np.array(v)) for k, v in arrays.items() if k.startswith("decoder.")}
    try:
        net.encoder.load_state_dict(enc, strict=True)
        if own:  # every decoder key but the segmentation layers (nnU-Net keeps its own) and the shared encoder
            missing, unexpected = net.decoder.load_state_dict(dec, strict=False)
            left = [k for k in missing if not k.startswith(("encoder.", "seg_layers."))]
            if left or unexpected:
                raise RuntimeError(f"decoder keys not filled {left[:3]}, not placed {unexpected[:3]}")
    except RuntimeError as e:
        raise ExportError(f"{run}: the trained network does not fit the nnU-Net network its spec describes ({e})") from e
    full = dict(manifest)
    full["nnunet"] = {
        "checkpoint_key": WEIGHTS_KEY, "network_class_name": params["architecture"]["network_class_name"],
        "configuration": params.get("configuration"), "in_channels": int(params["in_channels"]),
        "pretrained": ["encoder", "decoder"] if own else ["encoder"],
        "decoder": (f"pretrained with the encoder by {manifest['training']['method']} (all but the segmentation "
                    "layers, which nnU-Net does not load)") if own else
                   ("not pretrained: nnU-Net's own initialization of a new network "
                    f"(the network's initialize, seed {int(seed)})"),
        "not_loaded_by_nnunet": ".seg_layers. (the segmentation layers: nnU-Net keeps its own)",
    }
    return _write(net, full, Path(out))


def _write(net: Any, manifest: dict[str, Any], path: Path) -> tuple[Path, dict[str, Any]]:
    """The network's state dict and the manifest (its tensors and digest made anew), written atomically."""
    import torch

    state = {k: v.detach().cpu().contiguous().clone() for k, v in net.state_dict().items()}
    np_state = {k: v.numpy() for k, v in state.items()}
    full = dict(manifest)
    full["tensors"] = {"count": len(np_state), "sha256": tensor_digest(np_state),
                       "parameters": int(sum(a.size for k, a in np_state.items() if not k.endswith("num_batches_tracked")))}
    full["digest"] = manifest_digest(full)
    _check_target(path)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        torch.save({WEIGHTS_KEY: state, METADATA_KEY: json.dumps(full, allow_nan=False)}, tmp)
        os.replace(tmp, path)
    except BaseException as err:
        tmp.unlink(missing_ok=True)  # never leave a partial file behind
        if isinstance(err, OSError):
            raise ExportError(f"{path}: cannot be written ({err.strerror or err}); nothing was left behind") from err
        raise
    return path, read_nnunet_file(path)[0]


def inflate_for_nnunet(file: str | os.PathLike[str], plans: str | os.PathLike[str], configuration: str,
                       out: str | os.PathLike[str], *, rule: str = "mean", seed: int = 0) -> tuple[Path, dict[str, Any]]:
    """A 2-D nnU-Net encoder file inflated into a 3-D configuration, as nnU-Net's ``-pretrained_weights`` checkpoint.

    Parameters
    ----------
    file : path
        An encoder file of a 2-D nnU-Net network (``pretrain --encoder PLANS.json:2d``).
    plans, configuration : path, str
        The nnU-Net plans file and its 3-D configuration (same stages and widths as the file's).
    out : path
        The checkpoint to write (atomically).
    rule : {"mean", "center"}
        How 2-D kernels become 3-D (:mod:`.inflate`).
    seed : int
        Seed of nnU-Net's initialization of the decoder (not pretrained here).

    Raises
    ------
    WeightsMismatchError
        The file's stages or widths differ from the configuration's (the message names the
        first tensor that does not fit).
    """
    import torch

    from ..encoders.nnunet import architecture_from_plans, build_network
    from .file import read_manifest
    from .load import warm_start

    m = read_manifest(file)
    if m["encoder"]["spec"]["name"] != "nnunet":
        raise ExportError(f"{file}: inflating for nnU-Net needs a file of a 2-D nnU-Net network (pretrain --encoder "
                          f"PLANS.json:2d); this file's encoder is {m['encoder']['spec']['name']!r}")
    try:
        arch = architecture_from_plans(plans, configuration)
    except ValueError as e:
        raise ExportError(f"{plans}: {e}") from e
    torch.manual_seed(int(seed))
    net = build_network(arch, int(m["encoder"]["spec"]["params"].get("in_channels", 1)))
    rep = warm_start(net, file, layout="nnunet", inflate=rule, decoder=False)
    full = dict(m)
    full["encoder"] = {**m["encoder"], "spec": {**m["encoder"]["spec"], "params": {
        **m["encoder"]["spec"]["params"], "architecture": arch, "configuration": configuration, "spatial_dims": 3}}}
    full["inflated"] = {"from": Path(file).name, "rule": rule, "kernels": len(rep.inflated),
                        "file_digest": (m.get("digest") or {}).get("sha256")}
    full["nnunet"] = {
        "checkpoint_key": WEIGHTS_KEY, "network_class_name": arch["network_class_name"], "configuration": configuration,
        "in_channels": int(m["encoder"]["spec"]["params"].get("in_channels", 1)), "pretrained": ["encoder"],
        "decoder": f"not pretrained: nnU-Net's own initialization of a new network (seed {int(seed)})",
        "not_loaded_by_nnunet": ".seg_layers. (the segmentation layers: nnU-Net keeps its own)",
    }
    full.pop("decoder", None)
    full["parts"] = ["encoder"]
    return _write(net, full, Path(out))


def _check_target(path: Path) -> None:
    if path.is_dir():
        raise ExportError(f"{path}: is a folder; give the file's name, e.g. {path / 'pretrained.pth'}")
    if path.exists():
        try:
            read_nnunet_file(path, verify=False)
        except ExportError:
            raise ExportError(f"{path}: exists and is not a warmstart file for nnU-Net; not overwriting it "
                              "(choose another name or remove it yourself)") from None


def read_nnunet_file(path: str | os.PathLike[str], verify: bool = True) -> tuple[dict[str, Any], dict[str, Any]]:
    """Manifest and network state dict of a file written by :func:`export_for_nnunet`.

    Read with ``torch.load(..., weights_only=True)`` (no pickled code runs); the manifest's digest
    and, with ``verify``, the tensors' sha256 are checked as for an encoder file.
    """
    import torch

    if not Path(path).is_file():
        raise ExportError(f"{path}: no such file")
    try:
        ck = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:
        raise ExportError(f"{path}: not a readable torch checkpoint ({e})") from e
    if not isinstance(ck, dict) or WEIGHTS_KEY not in ck or METADATA_KEY not in ck:
        raise ExportError(f"{path}: a torch checkpoint without a warmstart manifest; it was not written by "
                          "warmstart export --for nnunet")
    manifest = _manifest({METADATA_KEY: ck[METADATA_KEY]}, path)
    state = ck[WEIGHTS_KEY]
    if verify:
        got = tensor_digest({k: v.numpy() for k, v in state.items()})
        if got != manifest["tensors"]["sha256"]:
            raise ExportError(f"{path}: the tensors do not match the sha256 in the file's manifest: the file was "
                              "damaged or altered; refusing it")
    return manifest, state
