"""Predicting and scoring the validation and test sets, for 2-D and 3-D contenders alike.

The sets are made of units: whole slices (tiles split) or slabs of slices (cubes split). A 2-D
network predicts a slab slice by slice; a 3-D one by sliding windows (:mod:`.window`) over the
slab and some image context on either side of it (a quarter window, or enough to fill one
window; image voxels only: labels outside the slab are never read). Dice is pooled over every voxel of the set, so 2-D and 3-D
contenders are scored on the same voxels with the same metric.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from .data import Split
from .settings import BenchSettings
from .stats import dice_counts, dice_from_counts
from .window import sliding_window_logits

__all__ = ["units", "predict_slice", "predict_unit", "evaluate", "network_dims"]


def network_dims(model: torch.nn.Module) -> int:
    """2 or 3: whether a benchmark network works on slices or volumes."""
    return int(getattr(getattr(model, "decoder", None), "spatial_dims", 2))


def units(split: Split, which: str) -> list[tuple[int, int, int]]:
    """The (pair, z0, z1) units of the ``test`` or ``val`` set: single slices or slabs."""
    if split.kind == "cubes":
        return [tuple(r) for r in (split.test_regions if which == "test" else split.val_regions)]  # type: ignore[misc]
    return [(i, z, z + 1) for i, z in (split.test if which == "test" else split.val)]


@torch.no_grad()
def predict_slice(model: torch.nn.Module, image: np.ndarray, device: torch.device) -> np.ndarray:
    """Class map of one whole slice (Y, X)."""
    x = torch.from_numpy(np.ascontiguousarray(image, dtype=np.float32))[None, None].to(device)
    return model(x).argmax(1)[0].cpu().numpy()


def predict_unit(model: torch.nn.Module, image: np.ndarray, unit: tuple[int, int, int], dims: int,
                 s: BenchSettings, device: torch.device) -> np.ndarray:
    """Class map (z1 - z0, Y, X) of slices z0..z1 of ``image`` (Z, Y, X)."""
    _, z0, z1 = unit
    if dims == 2:
        return np.stack([predict_slice(model, image[z], device) for z in range(z0, z1)])
    window = (min(s.cube_patch_size, image.shape[0]),) + (min(s.cube_patch_size, *image.shape[1:]),) * 2
    # Image context on either side of the slab: a quarter window, or more to fill one window.
    want = max(z1 - z0 + 2 * (window[0] // 4), window[0])
    za = max(0, min(z0 - (want - (z1 - z0)) // 2, image.shape[0] - want))
    zb = min(image.shape[0], za + want)
    logits = sliding_window_logits(model, image[za:zb], window, s.window_overlap, device,
                                   channels_last=s.channels_last)
    return logits[:, z0 - za:z1 - za].argmax(0).numpy()


def evaluate(model: torch.nn.Module, images: Sequence[np.ndarray], labels: Sequence[np.ndarray], split: Split,
             which: str, classes: int, s: BenchSettings, device: torch.device,
             predictions: list[np.ndarray] | None = None,
             by_volume: dict[int, np.ndarray] | None = None) -> np.ndarray:
    """Dice per class pooled over the ``which`` set; each unit's prediction is appended to
    ``predictions`` (a slice (Y, X) for the tiles split, a slab (z, Y, X) for the cubes split),
    and its Dice counts are added to ``by_volume[pair]`` (see :func:`.stats.dice_counts`)."""
    was = model.training
    model.eval()
    dims = network_dims(model)
    counts = np.zeros((classes, 3), dtype=np.int64)
    for unit in units(split, which):
        i, z0, z1 = unit
        pred = predict_unit(model, images[i], unit, dims, s, device)
        unit_counts = dice_counts(pred, labels[i][z0:z1], classes, s.ignore_label)
        counts += unit_counts
        if by_volume is not None:
            by_volume[i] = by_volume.get(i, 0) + unit_counts
        if predictions is not None:
            predictions.append((pred[0] if split.kind == "tiles" else pred).astype(np.uint8))
    model.train(was)
    return dice_from_counts(counts)
