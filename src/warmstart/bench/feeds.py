"""Fine-tuning batches: every step's patches planned up front from (seed, training-set size) alone,
so every contender of the same dimensionality sees the same patches.

2-D contenders draw square patches from training tiles (flips and quarter turns); 3-D contenders
draw cubic patches from training cubes (flips along each axis and quarter turns in the Y-X plane,
the plane whose voxels are square in every volume).
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from .data import Split
from .settings import BenchSettings

__all__ = ["patch_plan", "cube_plan", "tile_batch", "cube_batch"]


def patch_plan(split: Split, n_tiles: int, s: BenchSettings, seed: int) -> np.ndarray:
    """2-D: every step's patches, fixed by (seed, n_tiles) alone.

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


def cube_patch_shape(cube: Sequence[int], s: BenchSettings) -> tuple[int, int, int]:
    """(z, y, x) side of the 3-D patches drawn from one cube (pair, z, y, x, d, h, w)."""
    d, h, w = cube[4:7]
    side = min(s.cube_patch_size, h, w)  # square in Y-X, so quarter turns keep the shape
    return min(s.cube_patch_size, d), side, side


def cube_plan(split: Split, n_cubes: int, s: BenchSettings, seed: int) -> np.ndarray:
    """3-D: every step's patches, fixed by (seed, n_cubes) alone.

    Returns
    -------
    (steps, batch, 8) int64: cube index, z, y, x offsets (in the cube), flips along Z, Y and X,
    quarter turns in the Y-X plane.
    """
    rng = np.random.default_rng([seed, n_cubes, 104729])
    steps, b = s.total_steps, s.cube_batch_size
    out = np.zeros((steps, b, 8), dtype=np.int64)
    out[..., 0] = rng.integers(n_cubes, size=(steps, b))
    for k in range(n_cubes):
        cube = split.cubes[k]
        shape = cube_patch_shape(cube, s)
        sel = out[..., 0] == k
        for a in range(3):
            out[..., 1 + a][sel] = rng.integers(cube[4 + a] - shape[a] + 1, size=int(sel.sum()))
    out[..., 4:7] = rng.integers(2, size=(steps, b, 3))
    out[..., 7] = rng.integers(4, size=(steps, b))
    return out


def tile_batch(images: Sequence[np.ndarray], labels: Sequence[np.ndarray], split: Split, plan: np.ndarray,
               patch: int) -> tuple[torch.Tensor, torch.Tensor]:
    """One step's 2-D batch: (B, 1, p, p) float32 images and (B, p, p) int64 labels."""
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


def cube_batch(images: Sequence[np.ndarray], labels: Sequence[np.ndarray], split: Split, plan: np.ndarray,
               s: BenchSettings) -> tuple[torch.Tensor, torch.Tensor]:
    """One step's 3-D batch: (B, 1, z, y, x) float32 images and (B, z, y, x) int64 labels."""
    xs, ys = [], []
    for c, dz, dy, dx, fz, fy, fx, turns in plan:
        cube = split.cubes[int(c)]
        i, z, y, x = cube[:4]
        pz, py, px = cube_patch_shape(cube, s)
        box = (slice(z + dz, z + dz + pz), slice(y + dy, y + dy + py), slice(x + dx, x + dx + px))
        img, lab = images[i][box], labels[i][box]
        for axis, flip in enumerate((fz, fy, fx)):
            if flip:
                img, lab = np.flip(img, axis), np.flip(lab, axis)
        img, lab = np.rot90(img, int(turns), axes=(1, 2)), np.rot90(lab, int(turns), axes=(1, 2))
        xs.append(np.ascontiguousarray(img))
        ys.append(np.ascontiguousarray(lab))
    return torch.from_numpy(np.stack(xs)[:, None].astype(np.float32)), torch.from_numpy(np.stack(ys))
