"""One benchmark run: fine-tune the reference U-Net on n tiles, validate every epoch, test at the end."""
from __future__ import annotations

import math
import time
from typing import Any, Callable, Sequence

import numpy as np
import torch
import torch.nn.functional as F

from ..encoders.memory import module_channels_last, to_channels_last
from .data import Split
from .measures import measurement_errors
from .settings import BenchSettings
from .stats import curve_area, dice_counts, dice_from_counts, epochs_to_reach

__all__ = ["patch_plan", "fine_tune", "predict_slice"]


def patch_plan(split: Split, n_tiles: int, s: BenchSettings, seed: int) -> np.ndarray:
    """Every step's patches, fixed by (seed, n_tiles) alone, so every contender sees the same ones.

    Returns
    -------
    (steps, batch, 6) int64: tile index, top, left (in the tile), vertical flip, horizontal
    flip, quarter turns.
    """
    rng = np.random.default_rng([seed, n_tiles, 7919])
    steps, b = s.total_steps, s.batch_size
    out = np.zeros((steps, b, 6), dtype=np.int64)
    out[..., 0] = rng.integers(n_tiles, size=(steps, b))
    for k in range(n_tiles):
        _, _, _, _, h, w = split.tiles[k]
        p = min(s.patch_size, h, w)
        sel = out[..., 0] == k
        out[..., 1][sel] = rng.integers(h - p + 1, size=int(sel.sum()))
        out[..., 2][sel] = rng.integers(w - p + 1, size=int(sel.sum()))
    out[..., 3:5] = rng.integers(2, size=(steps, b, 2))
    out[..., 5] = rng.integers(4, size=(steps, b))
    return out


def _batch(images: Sequence[np.ndarray], labels: Sequence[np.ndarray], split: Split, plan: np.ndarray,
           patch: int) -> tuple[torch.Tensor, torch.Tensor]:
    xs, ys = [], []
    for f, top, left, fv, fh, turns in plan:
        i, z, y, x, h, w = split.tiles[int(f)]
        p = min(patch, h, w)
        img = images[i][z, y + top:y + top + p, x + left:x + left + p]
        lab = labels[i][z, y + top:y + top + p, x + left:x + left + p]
        if fv:
            img, lab = img[::-1], lab[::-1]
        if fh:
            img, lab = img[:, ::-1], lab[:, ::-1]
        img, lab = np.rot90(img, int(turns)), np.rot90(lab, int(turns))
        xs.append(np.ascontiguousarray(img))
        ys.append(np.ascontiguousarray(lab))
    return torch.from_numpy(np.stack(xs)[:, None].astype(np.float32)), torch.from_numpy(np.stack(ys))


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


@torch.no_grad()
def predict_slice(model: torch.nn.Module, image: np.ndarray, device: torch.device) -> np.ndarray:
    """Class map of one whole slice (Y, X)."""
    x = torch.from_numpy(np.ascontiguousarray(image, dtype=np.float32))[None, None].to(device)
    return model(x).argmax(1)[0].cpu().numpy()


def _evaluate(model: torch.nn.Module, images: Sequence[np.ndarray], labels: Sequence[np.ndarray],
              slices: Sequence[tuple[int, int]], classes: int, ignore: int | None, device: torch.device,
              predictions: list[np.ndarray] | None = None) -> np.ndarray:
    """Dice per class pooled over ``slices``; the predicted slices are appended to ``predictions``."""
    was = model.training
    model.eval()
    counts = np.zeros((classes, 3), dtype=np.int64)
    for i, z in slices:
        pred = predict_slice(model, images[i][z], device)
        counts += dice_counts(pred, labels[i][z], classes, ignore)
        if predictions is not None:
            predictions.append(pred.astype(np.uint8))
    model.train(was)
    return dice_from_counts(counts)


def _foreground_mean(d: np.ndarray) -> float:
    return float(np.mean(d[1:])) if len(d) > 1 else float(d[0])


def fine_tune(make_model: Callable[[], torch.nn.Module], images: Sequence[np.ndarray], labels: Sequence[np.ndarray],
              split: Split, n_tiles: int, seed: int, classes: int, s: BenchSettings, device: torch.device,
              keep_predictions: int = 0) -> dict[str, Any]:
    """Fine-tune one network and measure it.

    Parameters
    ----------
    make_model : callable
        Builds the network (called after seeding torch with ``seed``, so the decoder starts the
        same for every contender).
    images, labels : sequences of (Z, Y, X) arrays
        Prepared (normalized) images of this contender and their labels.
    split, n_tiles, seed, classes, s, device
    keep_predictions : int
        Also return the predictions of this many test slices (for the report's montage).

    Returns
    -------
    dict
        ``val_dice`` per epoch, ``early_dice`` (validation after ``early_steps`` steps),
        ``test_dice`` (mean foreground), ``test_dice_per_class``, ``curve_area``, ``epochs_to_threshold``,
        ``seconds``, ``measures`` (per class and quantity, the truth's and the prediction's value on
        every test slice and their mean absolute and relative errors: :mod:`.measures`) and
        optionally ``predictions``.
    """
    torch.manual_seed(seed)
    model = make_model().to(device)
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
    ids = {id(p) for p in enc}
    rest = [p for p in model.parameters() if id(p) not in ids]
    opt = torch.optim.AdamW([{"params": enc, "lr": s.lr * s.encoder_lr_factor}, {"params": rest, "lr": s.lr}],
                            weight_decay=s.weight_decay)
    total = s.total_steps
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda k: 0.5 * (1 + math.cos(math.pi * min(k, total) / total)))
    plan = patch_plan(split, n_tiles, s, seed)
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
            x, y = _batch(images, labels, split, plan[step], s.patch_size)
            x = x.to(device)
            loss = _loss(model(to_channels_last(x) if s.channels_last else x), y.to(device), classes, s.ignore_label)
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            sched.step()
            if step + 1 == s.early_steps:
                early = _foreground_mean(_evaluate(model, images, labels, split.val, classes, s.ignore_label, device))
        val_curve.append(_foreground_mean(_evaluate(model, images, labels, split.val, classes, s.ignore_label, device)))
    test_preds: list[np.ndarray] = []
    test = _evaluate(model, images, labels, split.test, classes, s.ignore_label, device, test_preds)
    measures = measurement_errors(test_preds, [labels[i][z] for i, z in split.test], classes, s.ignore_label)
    out: dict[str, Any] = {
        "val_dice": val_curve, "early_dice": early if early is not None else val_curve[0],
        "test_dice": _foreground_mean(test), "test_dice_per_class": test.tolist(), "curve_area": curve_area(val_curve),
        "epochs_to_threshold": epochs_to_reach(val_curve, s.dice_threshold),
        "final_loss": float(loss.detach()), "seconds": round(time.perf_counter() - t0, 2),
        "measures": measures,
    }
    if keep_predictions:
        out["predictions"] = test_preds[:keep_predictions]
    return out
