"""Batched image corruptions for restoration pretraining (after Models Genesis).

A network that restores the original from a corrupted patch has to learn intensity appearance
(non-linear remapping), local texture (pixel shuffling) and context (in- and out-painting).
Every transform is per sample, drawn from a ``torch.Generator``, and works on tensors (CPU or GPU).
Written here because no maintained library offers these four as batched tensor transforms with
a caller-supplied generator (which resumable, rank-aware training needs).

References
----------
Z. Zhou, V. Sodha, M. M. Rahman Siddiquee, R. Feng, N. Tajbakhsh, M. B. Gotway, J. Liang,
"Models Genesis: Generic Autodidactic Models for 3D Medical Image Analysis", MICCAI 2019,
arXiv:1908.06912. The default probabilities follow the configuration released with the paper
(from memory: non-linear 0.9, local shuffling 0.5, painting 0.9 of which out-painting 0.8).
"""
from __future__ import annotations

from dataclasses import dataclass

import torch

__all__ = ["CorruptionSettings", "bezier_remap", "local_shuffle", "paint", "corrupt"]


@dataclass(frozen=True)
class CorruptionSettings:
    """Probabilities and sizes of the corruptions.

    Parameters
    ----------
    nonlinear_prob : float
        Remap intensities through a random monotone cubic Bézier curve.
    shuffle_prob, shuffle_block, shuffle_fraction : float, int, float
        Permute the pixels inside ``shuffle_fraction`` of the ``shuffle_block`` x
        ``shuffle_block`` blocks of a patch.
    paint_prob, outpaint_share : float, float
        Paint a patch; a painted patch is out-painted with probability ``outpaint_share``
        (everything outside a few boxes replaced by noise), else in-painted (a few boxes
        replaced by noise).
    boxes : int
        At most this many boxes per painted patch.
    noise_sigma : float
        Gaussian noise added to every corrupted patch (standardized units).
    """

    nonlinear_prob: float = 0.9
    shuffle_prob: float = 0.5
    shuffle_block: int = 4
    shuffle_fraction: float = 0.3
    paint_prob: float = 0.9
    outpaint_share: float = 0.8
    boxes: int = 5
    noise_sigma: float = 0.05


def _on(n: int, p: float, g: torch.Generator, device: torch.device) -> torch.Tensor:
    return torch.rand(n, generator=g, device=device) < p


def bezier_remap(x: torch.Tensor, select: torch.Tensor, g: torch.Generator, knots: int = 256) -> torch.Tensor:
    """Map each selected sample's intensities through a random monotone Bézier curve.

    The sample is scaled to [0, 1] by its own minimum and maximum; the curve runs from (0, 0) to
    (1, 1) with two random control points; the result is scaled back. Non-selected samples pass
    unchanged.
    """
    b = x.shape[0]
    lo = x.amin(dim=(1, 2, 3), keepdim=True)
    hi = x.amax(dim=(1, 2, 3), keepdim=True)
    u = ((x - lo) / (hi - lo).clamp(min=1e-6)).reshape(b, -1)
    ctrl = torch.rand(b, 2, 2, generator=g, device=x.device)  # (B, point, (x, y))
    t = torch.linspace(0, 1, knots, device=x.device)[None]
    p1x, p1y, p2x, p2y = ctrl[:, 0, 0:1], ctrl[:, 0, 1:2], ctrl[:, 1, 0:1], ctrl[:, 1, 1:2]
    bx = 3 * (1 - t) ** 2 * t * p1x + 3 * (1 - t) * t**2 * p2x + t**3
    by = 3 * (1 - t) ** 2 * t * p1y + 3 * (1 - t) * t**2 * p2y + t**3
    bx = bx.cummax(dim=1).values  # a curve whose x turns back is read as its monotone envelope
    by = by.cummax(dim=1).values
    i = torch.searchsorted(bx.contiguous(), u.contiguous()).clamp(1, knots - 1)
    x0, x1 = bx.gather(1, i - 1), bx.gather(1, i)
    y0, y1 = by.gather(1, i - 1), by.gather(1, i)
    w = ((u - x0) / (x1 - x0).clamp(min=1e-9)).clamp(0, 1)
    v = (y0 + w * (y1 - y0)).reshape(x.shape) * (hi - lo) + lo
    return torch.where(select[:, None, None, None], v, x)


def local_shuffle(x: torch.Tensor, select: torch.Tensor, g: torch.Generator, block: int, fraction: float) -> torch.Tensor:
    """Permute the pixels within a random ``fraction`` of the ``block`` x ``block`` tiles of each
    selected sample (the tiling starts at a random offset; the edge remainder is untouched)."""
    b, c, h, w = x.shape
    oy, ox = (int(v) for v in torch.randint(0, block, (2,), generator=g, device=x.device))
    ny, nx = (h - oy) // block, (w - ox) // block
    if ny < 1 or nx < 1:
        return x
    region = x[:, :, oy:oy + ny * block, ox:ox + nx * block]
    tiles = region.reshape(b, c, ny, block, nx, block).permute(0, 1, 2, 4, 3, 5).reshape(b, c, ny * nx, block * block)
    keys = torch.rand(b, ny * nx, block * block, generator=g, device=x.device)
    chosen = (torch.rand(b, ny * nx, generator=g, device=x.device) < fraction) & select[:, None]
    ident = torch.arange(block * block, device=x.device, dtype=torch.float32).expand_as(keys)
    order = torch.where(chosen[..., None], keys, ident / (block * block) - 2.0).argsort(dim=-1)  # identity when not chosen
    shuffled = tiles.gather(3, order[:, None].expand(b, c, -1, -1))
    out = x.clone()
    out[:, :, oy:oy + ny * block, ox:ox + nx * block] = (
        shuffled.reshape(b, c, ny, nx, block, block).permute(0, 1, 2, 4, 3, 5).reshape(b, c, ny * block, nx * block))
    return out


def _boxes(b: int, n: int, size: tuple[float, float], side: int, g: torch.Generator, device: torch.device) -> torch.Tensor:
    """(B, H, W) mask of the union of ``n`` random boxes per sample, sides in ``size`` fractions."""
    hh = (size[0] + (size[1] - size[0]) * torch.rand(b, n, generator=g, device=device)) * side
    ww = (size[0] + (size[1] - size[0]) * torch.rand(b, n, generator=g, device=device)) * side
    top = torch.rand(b, n, generator=g, device=device) * (side - hh)
    left = torch.rand(b, n, generator=g, device=device) * (side - ww)
    keep = torch.rand(b, n, generator=g, device=device) < 0.7
    keep[:, 0] = True  # at least one box
    r = torch.arange(side, device=device, dtype=torch.float32) + 0.5
    iny = (r[None, None] >= top[..., None]) & (r[None, None] < (top + hh)[..., None])  # (B, n, S)
    inx = (r[None, None] >= left[..., None]) & (r[None, None] < (left + ww)[..., None])
    return ((iny[..., :, None] & inx[..., None, :]) & keep[..., None, None]).any(dim=1)


def paint(x: torch.Tensor, select: torch.Tensor, g: torch.Generator, outpaint_share: float, boxes: int) -> torch.Tensor:
    """In-paint (boxes of 1/6 to 1/3 of the side replaced by noise) or out-paint (all but boxes of
    3/7 to 4/7 of the side replaced by noise) each selected sample. The noise is uniform between
    the sample's minimum and maximum."""
    b, _, h, w = x.shape
    if h != w:
        raise ValueError(f"paint needs square patches, got {h} x {w}")
    side = h
    out_mode = torch.rand(b, generator=g, device=x.device) < outpaint_share
    inner = _boxes(b, boxes, (1 / 6, 1 / 3), side, g, x.device)
    outer = ~_boxes(b, boxes, (3 / 7, 4 / 7), side, g, x.device)
    mask = torch.where(out_mode[:, None, None], outer, inner) & select[:, None, None]
    lo = x.amin(dim=(1, 2, 3), keepdim=True)
    hi = x.amax(dim=(1, 2, 3), keepdim=True)
    noise = lo + (hi - lo) * torch.rand(x.shape, generator=g, device=x.device)
    return torch.where(mask[:, None], noise, x)


def corrupt(x: torch.Tensor, s: CorruptionSettings, g: torch.Generator) -> torch.Tensor:
    """All corruptions in the order of the paper: non-linear remap, local shuffling, painting,
    then noise.

    Parameters
    ----------
    x : (B, C, P, P) tensor
        The original (standardized) patches.
    s : CorruptionSettings
    g : torch.Generator

    Returns
    -------
    (B, C, P, P) tensor
    """
    b, dev = x.shape[0], x.device
    x = bezier_remap(x, _on(b, s.nonlinear_prob, g, dev), g)
    x = local_shuffle(x, _on(b, s.shuffle_prob, g, dev), g, s.shuffle_block, s.shuffle_fraction)
    x = paint(x, _on(b, s.paint_prob, g, dev), g, s.outpaint_share, s.boxes)
    if s.noise_sigma > 0:
        x = x + s.noise_sigma * torch.randn(x.shape, generator=g, device=dev)
    return x
