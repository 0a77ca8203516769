"""Sliding-window inference over a volume larger than the network's training patch.

Windows of ``window`` voxels start every ``stride = round(window * (1 - overlap))`` voxels along
each axis, the last one flush with the far edge, so every voxel is covered; an axis shorter than
the window is padded (reflection) to the window and cropped back. The logits of overlapping
windows are blended with a Gaussian weight centred on each window (sigma = 1/8 of its side per
axis, the common practice for patch-based 3-D segmentation: a window's centre saw more context
than its rim), normalized by the summed weights. Written here rather than taken from MONAI so
that the benchmark does not need MONAI at run time; the tests check it against MONAI's
``sliding_window_inference`` with the same window, overlap and Gaussian.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

__all__ = ["window_starts", "gaussian_weight", "sliding_window_logits", "SIGMA_FRACTION", "WEIGHT_FLOOR"]

SIGMA_FRACTION = 0.125
"""Gaussian sigma as a fraction of the window side (common practice: 1/8)."""


def window_starts(length: int, window: int, overlap: float) -> list[int]:
    """Start offsets of the windows along one axis.

    Examples
    --------
    >>> window_starts(100, 32, 0.5)
    [0, 16, 32, 48, 64, 68]
    >>> window_starts(20, 32, 0.5)
    [0]
    """
    if length <= window:
        return [0]
    stride = max(1, int(round(window * (1 - overlap))))
    starts = list(range(0, length - window + 1, stride))
    if starts[-1] != length - window:
        starts.append(length - window)
    return starts


WEIGHT_FLOOR = 1e-3
"""The smallest blending weight, relative to the peak: a window's corner voxels still count a
little, so a voxel that only corners cover gets a defined value (MONAI's importance map uses
the same floor)."""


def gaussian_weight(window: Sequence[int], sigma_fraction: float = SIGMA_FRACTION) -> np.ndarray:
    """Blending weight of one window: a separable Gaussian, peak 1, floored at :data:`WEIGHT_FLOOR`."""
    w = np.ones((), dtype=np.float64)
    for n in window:
        centre = (n - 1) / 2
        x = np.arange(n, dtype=np.float64)
        g = np.exp(-0.5 * ((x - centre) / max(sigma_fraction * n, 1e-6)) ** 2)
        w = np.multiply.outer(w, g)
    w = (w / w.max()).astype(np.float32)
    return np.maximum(w, np.float32(WEIGHT_FLOOR))


@torch.no_grad()
def sliding_window_logits(model: torch.nn.Module, volume: np.ndarray, window: int | Sequence[int],
                          overlap: float = 0.5, device: torch.device | str = "cpu", batch: int = 4,
                          channels_last: bool = False) -> torch.Tensor:
    """Blended logits of ``model`` over a whole (Z, Y, X) volume.

    Parameters
    ----------
    model : torch.nn.Module
        A 3-D network mapping (B, 1, z, y, x) to (B, C, z, y, x); run in eval mode.
    volume : (Z, Y, X) ndarray
        The prepared (normalized) image.
    window : int or (z, y, x)
        Window side in voxels (the training patch's, usually).
    overlap : float
        Fraction of a window shared with its neighbour along each axis, in [0, 1).
    device, batch, channels_last
        Where the windows run, how many at once, and in which memory layout.

    Returns
    -------
    (C, Z, Y, X) float32 tensor on the CPU.
    """
    if not 0 <= overlap < 1:
        raise ValueError(f"overlap must be in [0, 1), got {overlap}")
    vol = np.asarray(volume, dtype=np.float32)
    win = (int(window),) * 3 if np.isscalar(window) else tuple(int(w) for w in window)  # type: ignore[arg-type]
    shape = vol.shape
    pad = [(0, max(0, w - n)) for w, n in zip(win, shape)]
    if any(p for _, p in pad):
        vol = np.pad(vol, pad, mode="reflect" if all(n > 1 for n in shape) else "edge")
    full = vol.shape  # at least the window along every axis (padded above)
    weight = torch.from_numpy(gaussian_weight(win))
    corners = [(z, y, x) for z in window_starts(full[0], win[0], overlap)
               for y in window_starts(full[1], win[1], overlap) for x in window_starts(full[2], win[2], overlap)]
    x_all = torch.from_numpy(np.ascontiguousarray(vol))
    acc: torch.Tensor | None = None
    norm = torch.zeros(full, dtype=torch.float32)
    for k in range(0, len(corners), batch):
        group = corners[k:k + batch]
        xs = torch.stack([x_all[z:z + win[0], y:y + win[1], x:x + win[2]] for z, y, x in group])[:, None].to(device)
        if channels_last:
            xs = xs.contiguous(memory_format=torch.channels_last_3d)
        out = model(xs).float().cpu()
        if acc is None:
            acc = torch.zeros((out.shape[1], *full), dtype=torch.float32)
        for (z, y, x), o in zip(group, out):
            acc[:, z:z + win[0], y:y + win[1], x:x + win[2]] += o * weight
            norm[z:z + win[0], y:y + win[1], x:x + win[2]] += weight
    assert acc is not None
    acc /= norm
    return acc[:, :shape[0], :shape[1], :shape[2]].contiguous()
