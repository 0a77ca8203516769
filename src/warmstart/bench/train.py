"""One benchmark run: fine-tune the reference U-Net on n tiles or cubes, validate every epoch, test at the end."""
from __future__ import annotations

import time
from typing import Any, Callable, Sequence

import numpy as np
import torch
import torch.nn.functional as F

from ..encoders.memory import module_channels_last, to_channels_last
from ..errors import WarmstartError
from ..finetune import lr_factor
from .data import Split
from .evaluate import evaluate, network_dims, predict_slice, units
from .feeds import cube_batch, cube_plan, patch_plan, tile_batch
from .measures import measurement_errors
from .settings import BenchSettings
from .stats import curve_area, dice_from_counts, epochs_to_reach

__all__ = ["patch_plan", "fine_tune", "predict_slice"]


def _loss(logits: torch.Tensor, target: torch.Tensor, classes: int, ignore: int | None) -> torch.Tensor:
    """Cross-entropy plus soft Dice over the foreground classes (common practice for few labels)."""
    ign = -100 if ignore is None else ignore
    ce = F.cross_entropy(logits, target, ignore_index=ign)
    keep = (target != ign).unsqueeze(1).float()
    prob = logits.softmax(1) * keep
    onehot = F.one_hot(target.clamp(0, classes - 1), classes).movedim(-1, 1).float() * keep
    dims = (0, *range(2, logits.dim()))  # batch and every spatial axis (2-D or 3-D)
    inter = (prob * onehot).sum(dims)[1:]
    denom = (prob + onehot).sum(dims)[1:]
    dice = (2 * inter + 1) / (denom + 1)
    return ce + (1 - dice.mean())


def _foreground_mean(d: np.ndarray) -> float:
    return float(np.mean(d[1:])) if len(d) > 1 else float(d[0])


def converged(val_curve: Sequence[float], epochs: int, margin: float) -> bool:
    """The convergence rule (:class:`BenchSettings`): the best validation Dice of the last
    ``epochs`` epochs is at most ``margin`` above the best before them (a curve no longer than
    ``epochs`` has not shown a plateau)."""
    if len(val_curve) <= epochs:
        return False
    return max(val_curve[-epochs:]) <= max(val_curve[:-epochs]) + margin


def _optimizer(model: torch.nn.Module, s: BenchSettings, warm: bool) -> torch.optim.Optimizer:
    """AdamW or SGD (Nesterov) over two groups: the encoder at ``lr * encoder_lr_factor`` (times
    ``warm_encoder_lr_factor`` for a warm start), the rest at ``lr``."""
    factor = s.encoder_lr_factor * (s.warm_encoder_lr_factor if warm else 1.0)
    enc = list(model.encoder.parameters())
    ids = {id(p) for p in enc}
    groups = [{"params": enc, "lr": s.lr * factor}, {"params": [p for p in model.parameters() if id(p) not in ids],
                                                     "lr": s.lr}]
    if s.optimizer == "sgd":
        return torch.optim.SGD(groups, momentum=s.momentum, nesterov=True, weight_decay=s.weight_decay)
    return torch.optim.AdamW(groups, weight_decay=s.weight_decay)


def fine_tune(make_model: Callable[[], torch.nn.Module], images: Sequence[np.ndarray], labels: Sequence[np.ndarray],
              split: Split, n: int, seed: int, classes: int, s: BenchSettings, device: torch.device,
              keep_predictions: int = 0, warm: bool = False) -> dict[str, Any]:
    """Fine-tune one network and measure it.

    Parameters
    ----------
    make_model : callable
        Builds the network (called after seeding torch with ``seed``, so the decoder starts the
        same for every contender).
    images, labels : sequences of (Z, Y, X) arrays
        Prepared (normalized) images of this contender and their labels.
    split, seed, classes, s, device
    n : int
        Training-set size: tiles, or cubes (a 2-D network then trains on the slices of ``n`` cubes).
    keep_predictions : int
        Also return the predictions of this many test slices (for the report's montage; the
        middle slice of each test slab with the cubes split).
    warm : bool
        A warm start: ``s.warm_encoder_lr_factor`` applies to its encoder.

    Returns
    -------
    dict
        ``val_dice`` per epoch, ``early_dice`` (validation after ``early_steps`` steps),
        ``test_dice`` (mean foreground), ``test_dice_per_class``, ``test_dice_per_volume`` (mean
        foreground Dice of each labelled volume's test voxels), ``curve_area``,
        ``epochs_to_threshold``, ``seconds``, ``measures`` (per class and quantity, the truth's
        and the prediction's value on every test slice, or slab with the cubes split, and their
        mean absolute and relative errors: :mod:`.measures`) and optionally ``predictions``.
    """
    torch.manual_seed(seed)
    model = make_model().to(device)
    dims = network_dims(model)
    if dims == 3 and split.kind != "cubes":
        raise WarmstartError("a 3-D network trains on cubes: set bench.training_set = \"cubes\" (or \"auto\")")
    if s.channels_last:
        module_channels_last(model)
    # Batch-norm statistics: a plain average over the fine-tuning batches (momentum None), from
    # zero for every contender. With the usual running average (momentum 0.1) the statistics
    # after a few steps are mostly their initial values, so early validation would measure that
    # artefact rather than the weights being compared.
    for m in model.modules():
        if isinstance(m, torch.nn.modules.batchnorm._BatchNorm):
            m.momentum = None
            m.reset_running_stats()
    enc = list(model.encoder.parameters())
    opt = _optimizer(model, s, warm)
    total = s.total_steps
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda k: lr_factor(k, total, s.schedule, s.warmup_steps))
    if dims == 3:
        plan = cube_plan(split, n, s, seed, labels)

        def batch(step: int) -> tuple[torch.Tensor, torch.Tensor]:
            return cube_batch(images, labels, split, plan[step], s)
    else:
        plan = patch_plan(split, split.n_tiles(n), s, seed, labels)

        def batch(step: int) -> tuple[torch.Tensor, torch.Tensor]:
            return tile_batch(images, labels, split, plan[step], s.patch_size)

    def val_dice() -> float:
        return _foreground_mean(evaluate(model, images, labels, split, "val", classes, s, device))
    t0 = time.perf_counter()
    val_curve: list[float] = []
    early = None
    model.train()
    for epoch in range(s.epochs):
        frozen = epoch < s.freeze_encoder_epochs
        for p in enc:
            p.requires_grad_(not frozen)
        for k in range(s.steps_per_epoch):
            step = epoch * s.steps_per_epoch + k
            x, y = batch(step)
            x = x.to(device)
            loss = _loss(model(to_channels_last(x) if s.channels_last else x), y.to(device), classes, s.ignore_label)
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            sched.step()
            if step + 1 == s.early_steps:
                early = val_dice()
        val_curve.append(val_dice())
    test_preds: list[np.ndarray] = []
    per_volume: dict[int, np.ndarray] = {}
    test = evaluate(model, images, labels, split, "test", classes, s, device, test_preds, per_volume)
    test_units = units(split, "test")
    truths = [labels[i][z0:z1] if split.kind == "cubes" else labels[i][z0] for i, z0, z1 in test_units]
    measures = measurement_errors(test_preds, truths, classes, s.ignore_label)
    out: dict[str, Any] = {
        "val_dice": val_curve, "early_dice": early if early is not None else val_curve[0],
        "test_dice": _foreground_mean(test), "test_dice_per_class": test.tolist(),
        "test_dice_per_volume": {str(i): _foreground_mean(dice_from_counts(c)) for i, c in sorted(per_volume.items())},
        "curve_area": curve_area(val_curve),
        "epochs_to_threshold": epochs_to_reach(val_curve, s.dice_threshold),
        "final_loss": float(loss.detach()), "seconds": round(time.perf_counter() - t0, 2),
        "measures": measures,
        "converged": converged(val_curve, s.plateau_epochs, s.plateau_margin),
        "learned_every_class": bool(np.all(test[1:] >= s.learned_dice)) if len(test) > 1 else bool(test[0] >= s.learned_dice),
    }
    if keep_predictions:
        shown = test_preds[:keep_predictions]
        out["predictions"] = [p[(len(p) - 1) // 2] for p in shown] if split.kind == "cubes" else shown
    return out

