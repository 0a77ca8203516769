"""Fine-tuning a warm-started network: optimizer parameter groups and the learning-rate schedule.

The benchmark fine-tunes every contender with these functions, and users call the same ones in
their own training loops, so that what the benchmark measured is what they run::

    import torch, warmstart
    net = warmstart.UNet.from_file("encoder.safetensors", classes=3)
    groups = warmstart.finetune_groups(net, "encoder.safetensors", lr=2e-3)
    opt = torch.optim.AdamW(groups, weight_decay=1e-4)
    sched = warmstart.finetune_scheduler(opt, total_steps=2000, file="encoder.safetensors")
    for step in range(2000):
        ...  # loss.backward(); opt.step(); sched.step()

The recommendation a file carries (manifest ``fine_tuning``, the encoder card) is
:data:`RECOMMENDED`: it was chosen with ``tools/diagnose_finetune.py`` (README, "Fine-tuning a
warm start").
"""
from __future__ import annotations

import math
import os
from typing import Any

__all__ = ["RECOMMENDED", "NNUNET_LINE", "finetune_groups", "finetune_scheduler", "lr_factor", "recommendation",
           "fine_tuning_section", "fine_tuning_lines"]

# What tools/diagnose_finetune.py measured (README, "Fine-tuning a warm start"): no warm-start-only
# setting (encoder at 0.1 x, decoder first, warm-up) gave a gain whose interval lies above zero, so
# a warm start fine-tunes as random init does.
RECOMMENDED: dict[str, Any] = {
    "optimizer": "adamw",
    "encoder_lr_factor": 1.0,
    "schedule": "cosine",
    "warmup_fraction": 0.0,
    "class_aware_fraction": 0.33,
}

# nnU-Net users: nnU-Net's own schedule with the checkpoint warmstart writes. Measured with
# tools/diagnose_finetune.py (README, "Fine-tuning a warm start"): its plain schedule gave the warm
# start a gain whose interval lies above zero, its warm-up trainer (nnunetv2 2.8's
# nnUNetTrainer_warmup) none.
NNUNET_LINE = "nnUNetv2_train DATASET CONFIGURATION FOLD -pretrained_weights pretrained.pth"
NNUNET_TRIED = "nnUNetTrainer_warmup"


NNUNET_WHY = ("measured on the 3-D demo's bench cell (1 cube, 5 replicates): nnU-Net's own schedule (SGD, Nesterov "
              "momentum 0.99, lr 1e-2, poly decay) gave the warm start +0.086 final Dice over random init, 95 % "
              f"interval +0.005 to +0.166; the same after a linear warm-up ({NNUNET_TRIED}'s schedule) +0.038, "
              "interval -0.049 to +0.124: no warm-up needed")


def fine_tuning_section(spec: dict[str, Any]) -> dict[str, Any]:
    """The manifest's ``fine_tuning`` entry: :data:`RECOMMENDED`, and for nnU-Net networks the
    ``nnUNetv2_train`` line and why."""
    out: dict[str, Any] = dict(RECOMMENDED)
    if spec.get("name") == "nnunet":
        out["nnunet"] = {"command": NNUNET_LINE, "why": NNUNET_WHY}
    return out


def fine_tuning_lines(section: dict[str, Any] | None) -> list[str]:
    """The recommendation in words (encoder card, export message)."""
    r = {**RECOMMENDED, **(section or {})}
    warm = f"a linear warm-up over the first {r['warmup_fraction']:.0%} of the steps, then " if r["warmup_fraction"] else ""
    lines = [f"{r['optimizer']} with the encoder at {r['encoder_lr_factor']:g} x the learning rate, {warm}"
             f"{r['schedule']} decay; "
             f"{r['class_aware_fraction']:.0%} of each batch's patches centred on a labelled class "
             "(warmstart.finetune_groups and warmstart.finetune_scheduler set up the first three)"]
    nn = (section or {}).get("nnunet")
    if nn:
        lines.append(f"nnU-Net: {nn['command']} ({nn['why']})")
    return lines


def lr_factor(step: int, total: int, schedule: str = "cosine", warmup: int = 0) -> float:
    """The learning-rate multiplier at optimizer step ``step`` (0-based) of ``total``.

    A linear warm-up from ``1 / warmup`` to 1 over the first ``warmup`` steps, then ``cosine``
    (half a cosine from 1 to 0), ``poly`` (``(1 - t) ** 0.9``, nnU-Net's decay) or ``constant``,
    with ``t`` the fraction of the steps after the warm-up that have passed.
    """
    if warmup > 0 and step < warmup:
        return (step + 1) / warmup
    rest = max(total - warmup, 1)
    t = min(max(step - warmup, 0), rest) / rest
    if schedule == "cosine":
        return 0.5 * (1 + math.cos(math.pi * t))
    if schedule == "poly":
        return (1 - t) ** 0.9
    if schedule == "constant":
        return 1.0
    raise ValueError(f"schedule must be cosine, poly or constant, got {schedule!r}")


def recommendation(file: str | os.PathLike[str] | None = None) -> dict[str, Any]:
    """The fine-tuning a file recommends (its manifest's ``fine_tuning``), else :data:`RECOMMENDED`."""
    if file is None:
        return dict(RECOMMENDED)
    from .export.file import read_manifest

    return {**RECOMMENDED, **(read_manifest(file).get("fine_tuning") or {})}


def finetune_groups(model: Any, file: str | os.PathLike[str] | None = None, lr: float = 1e-3,
                    encoder_lr_factor: float | None = None, layout: str = "auto",
                    inflate: str | None = None) -> list[dict[str, Any]]:
    """Optimizer parameter groups: the warm-started encoder's, and the rest of the network's.

    Parameters
    ----------
    model : torch.nn.Module
        The network (warm-started from ``file`` or about to be).
    file : path, optional
        The encoder file: its parameters are those :func:`warmstart.warm_start` fills (any
        layout: warmstart's U-Net, smp, nnU-Net, MONAI...). Without a file, a ``model.encoder``
        attribute names the encoder.
    lr : float
        The learning rate of the rest (decoder, head).
    encoder_lr_factor : float, optional
        The encoder's learning rate is ``lr * encoder_lr_factor`` (default: the file's
        recommendation).
    layout, inflate
        As for :func:`warmstart.warm_start`.

    Returns
    -------
    list of dict
        ``[{"params": [...], "lr": ..., "name": "encoder"}, {"params": [...], "lr": lr, "name":
        "rest"}]``, for any torch optimizer; every trainable parameter in exactly one group.
    """
    factor = float(recommendation(file)["encoder_lr_factor"] if encoder_lr_factor is None else encoder_lr_factor)
    if file is not None:
        from .export.load import placed_keys

        placed = set(placed_keys(model, file, layout=layout, inflate=inflate))
        enc_ids = {id(p) for k, p in model.named_parameters() if k in placed}
    elif hasattr(model, "encoder"):
        enc_ids = {id(p) for p in model.encoder.parameters()}
    else:
        raise ValueError("finetune_groups needs the encoder file, or a model with an .encoder attribute")
    enc = [p for p in model.parameters() if id(p) in enc_ids and p.requires_grad]
    rest = [p for p in model.parameters() if id(p) not in enc_ids and p.requires_grad]
    return [{"params": enc, "lr": lr * factor, "name": "encoder"}, {"params": rest, "lr": lr, "name": "rest"}]


def finetune_scheduler(optimizer: Any, total_steps: int, file: str | os.PathLike[str] | None = None,
                       schedule: str | None = None, warmup_steps: int | None = None) -> Any:
    """A ``torch.optim.lr_scheduler.LambdaLR`` with :func:`lr_factor` (step it once per optimizer step).

    ``schedule`` and ``warmup_steps`` default to the file's recommendation (its
    ``warmup_fraction`` of ``total_steps``).
    """
    import torch

    rec = recommendation(file)
    kind = schedule or rec["schedule"]
    warm = int(round(rec["warmup_fraction"] * total_steps)) if warmup_steps is None else int(warmup_steps)
    return torch.optim.lr_scheduler.LambdaLR(optimizer, lambda k: lr_factor(k, total_steps, kind, warm))
