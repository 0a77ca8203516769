"""Batched image corruptions for restoration pretraining (after Models Genesis).

A network that restores the original from a corrupted patch has to learn intensity appearance
(non-linear remapping), local texture (pixel shuffling) and context (in- and out-painting).
Every transform is per sample, drawn from a ``torch.Generator``, and works on tensors (CPU or GPU),
on 2-D patches (B, C, P, P) and on 3-D cubes (B, C, P, P, P) alike (blocks and boxes in 3-D).
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

import math
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
        ``shuffle_block`` (x ``shuffle_block``) blocks of a patch.
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
    every = tuple(range(1, x.dim()))
    lo = x.amin(dim=every, keepdim=True)
    hi = x.amax(dim=every, keepdim=True)
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
    return torch.where(select.reshape(-1, *([1] * (x.dim() - 1))), v, x)


def local_shuffle(x: torch.Tensor, select: torch.Tensor, g: torch.Generator, block: int, fraction: float) -> torch.Tensor:
    """Permute the voxels within a random ``fraction`` of the ``block``-sided tiles (squares, or
    cubes in 3-D) of each selected sample (the tiling starts at a random offset; the edge
    remainder is untouched)."""
    b, c = x.shape[:2]
    spatial = x.shape[2:]
    n = len(spatial)
    offsets = [int(v) for v in torch.randint(0, block, (n,), generator=g, device=x.device)]
    counts = [(size - o) // block for size, o in zip(spatial, offsets)]
    if min(counts) < 1:
        return x
    window = (slice(None), slice(None), *(slice(o, o + k * block) for o, k in zip(offsets, counts)))
    split = [b, c] + [v for k in counts for v in (k, block)]  # (b, c, k1, B, k2, B[, k3, B])
    tile_axes = [2 + 2 * i for i in range(n)]
    inner_axes = [3 + 2 * i for i in range(n)]
    tiles_n, cell = math.prod(counts), block**n
    tiles = x[window].reshape(split).permute(0, 1, *tile_axes, *inner_axes).reshape(b, c, tiles_n, cell)
    keys = torch.rand(b, tiles_n, cell, generator=g, device=x.device)
    chosen = (torch.rand(b, tiles_n, generator=g, device=x.device) < fraction) & select[:, None]
    ident = torch.arange(cell, device=x.device, dtype=torch.float32).expand_as(keys)
    order = torch.where(chosen[..., None], keys, ident / cell - 2.0).argsort(dim=-1)  # identity when not chosen
    shuffled = tiles.gather(3, order[:, None].expand(b, c, -1, -1))
    back = [0] * (2 + 2 * n)  # inverse of the permutation above
    for j, axis in enumerate([0, 1, *tile_axes, *inner_axes]):
        back[axis] = j
    out = x.clone()
    out[window] = shuffled.reshape(b, c, *counts, *([block] * n)).permute(*back).reshape(x[window].shape)
    return out


def _boxes(b: int, n: int, size: tuple[float, float], side: int, g: torch.Generator, device: torch.device,
           dims: int = 2) -> torch.Tensor:
    """(B, S, S[, S]) mask of the union of ``n`` random boxes per sample, sides in ``size`` fractions."""
    extents = [(size[0] + (size[1] - size[0]) * torch.rand(b, n, generator=g, device=device)) * side for _ in range(dims)]
    starts = [torch.rand(b, n, generator=g, device=device) * (side - e) for e in extents]
    keep = torch.rand(b, n, generator=g, device=device) < 0.7
    keep[:, 0] = True  # at least one box
    r = torch.arange(side, device=device, dtype=torch.float32) + 0.5
    mask = keep.reshape(b, n, *([1] * dims))
    for a, (lo, e) in enumerate(zip(starts, extents)):  # a box is the product of one interval per axis
        inside = (r[None, None] >= lo[..., None]) & (r[None, None] < (lo + e)[..., None])  # (B, n, S)
        shape = [1] * dims
        shape[a] = side
        mask = mask & inside.reshape(b, n, *shape)
    return mask.any(dim=1)


def paint(x: torch.Tensor, select: torch.Tensor, g: torch.Generator, outpaint_share: float, boxes: int) -> torch.Tensor:
    """In-paint (boxes of 1/6 to 1/3 of the side replaced by noise) or out-paint (all but boxes of
    3/7 to 4/7 of the side replaced by noise) each selected sample (boxes are cuboids in 3-D). The
    noise is uniform between the sample's minimum and maximum."""
    b = x.shape[0]
    spatial = tuple(x.shape[2:])
    if len(set(spatial)) != 1:
        raise ValueError(f"paint needs square patches or cubes, got {' x '.join(map(str, spatial))}")
    side, dims = spatial[0], len(spatial)
    every = tuple(range(1, x.dim()))
    out_mode = torch.rand(b, generator=g, device=x.device) < outpaint_share
    inner = _boxes(b, boxes, (1 / 6, 1 / 3), side, g, x.device, dims)
    outer = ~_boxes(b, boxes, (3 / 7, 4 / 7), side, g, x.device, dims)
    mask = torch.where(out_mode.reshape(-1, *([1] * dims)), outer, inner) & select.reshape(-1, *([1] * dims))
    lo = x.amin(dim=every, keepdim=True)
    hi = x.amax(dim=every, keepdim=True)
    noise = lo + (hi - lo) * torch.rand(x.shape, generator=g, device=x.device)
    return torch.where(mask[:, None], noise, x)


def corrupt(x: torch.Tensor, s: CorruptionSettings, g: torch.Generator) -> torch.Tensor:
    """All corruptions in the order of the paper: non-linear remap, local shuffling, painting,
    then noise.

    Parameters
    ----------
    x : (B, C, P, P) or (B, C, P, P, P) tensor
        The original (standardized) patches or cubes.
    s : CorruptionSettings
    g : torch.Generator

    Returns
    -------
    tensor of the same shape
    """
    b, dev = x.shape[0], x.device
    x = bezier_remap(x, _on(b, s.nonlinear_prob, g, dev), g)
    x = local_shuffle(x, _on(b, s.shuffle_prob, g, dev), g, s.shuffle_block, s.shuffle_fraction)
    x = paint(x, _on(b, s.paint_prob, g, dev), g, s.outpaint_share, s.boxes)
    if s.noise_sigma > 0:
        x = x + s.noise_sigma * torch.randn(x.shape, generator=g, device=dev)
    return x
