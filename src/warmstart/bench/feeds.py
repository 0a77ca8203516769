"""Fine-tuning batches: every step's patches planned up front from (seed, training-set size) alone,
so every contender of the same dimensionality sees the same patches.

2-D contenders draw square patches from training tiles (flips and quarter turns); 3-D contenders
draw cubic patches from training cubes (flips along each axis and quarter turns in the Y-X plane,
the plane whose voxels are square in every volume).

Class-aware sampling: a fraction of each step's patches (``bench.class_aware_fraction``, the last
ones of the batch) is centred on a voxel of a labelled class instead of placed uniformly: the
class is drawn uniformly from the foreground classes the tile or cube holds, then the voxel
uniformly from that class's voxels, and the patch is moved inside the tile where the voxel lies
near an edge. This is the common practice of foreground oversampling in 3-D medical segmentation
frameworks (nnU-Net forces a third of its patches onto foreground, Isensee et al., Nature Methods
2021): a small patch drawn uniformly from a large tile often holds no voxel of a rare or thin
class, and a network that never sees one never learns it. The draws depend on the seed, the
training-set size and the labels alone, so every contender of a replicate sees the same patches.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from .data import Split
from .settings import BenchSettings

__all__ = ["patch_plan", "cube_plan", "tile_batch", "cube_batch", "class_aware_count"]


def class_aware_count(batch: int, fraction: float) -> int:
    """Patches of a batch centred on a labelled class: ``round(fraction * batch)``, at least one
    when ``fraction > 0`` (with batches of 2, as 3-D fine-tuning on a CPU uses, one in two)."""
    return 0 if fraction <= 0 else min(batch, max(1, round(fraction * batch)))


def _centre_on_class(rng: np.random.Generator, label: np.ndarray, patch: Sequence[int], ignore: int | None,
                     count: int) -> np.ndarray | None:
    """``count`` patch offsets (count, ndim) inside ``label`` whose patches are centred (where the
    edges allow) on a voxel of a foreground class drawn uniformly from those ``label`` holds;
    ``None`` when it holds none."""
    classes = [int(c) for c in np.unique(label) if c > 0 and (ignore is None or c != ignore)]
    if not classes or count == 0:
        return None
    where = {c: np.flatnonzero(label == c) for c in classes}
    picks = rng.integers(len(classes), size=count)
    out = np.zeros((count, label.ndim), dtype=np.int64)
    for j, ci in enumerate(picks):
        flat = where[classes[int(ci)]]
        voxel = np.unravel_index(flat[rng.integers(flat.size)], label.shape)
        for a, (v, p, n) in enumerate(zip(voxel, patch, label.shape)):
            out[j, a] = min(max(int(v) - p // 2, 0), n - p)
    return out


def patch_plan(split: Split, n_tiles: int, s: BenchSettings, seed: int,
               labels: Sequence[np.ndarray] | None = None) -> np.ndarray:
    """2-D: every step's patches, fixed by (seed, n_tiles) and the labels alone.

    With ``labels`` and ``s.class_aware_fraction > 0`` the last
    :func:`class_aware_count` patches of every step are centred on a labelled class (module
    docstring); without, every patch is placed uniformly.

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
    forced = class_aware_count(b, s.class_aware_fraction) if labels is not None else 0
    if forced:
        crng = np.random.default_rng([seed, n_tiles, 7927])
        for k in range(n_tiles):
            i, z, y, x, h, w = split.tiles[k]
            p = min(s.patch_size, h, w)
            sel = np.argwhere(out[:, b - forced:, 0] == k)
            offs = _centre_on_class(crng, labels[i][z, y:y + h, x:x + w], (p, p), s.ignore_label, len(sel))
            if offs is not None:
                out[sel[:, 0], b - forced + sel[:, 1], 1:3] = offs
    return out


def cube_patch_shape(cube: Sequence[int], s: BenchSettings) -> tuple[int, int, int]:
    """(z, y, x) side of the 3-D patches drawn from one cube (pair, z, y, x, d, h, w)."""
    d, h, w = cube[4:7]
    side = min(s.cube_patch_size, h, w)  # square in Y-X, so quarter turns keep the shape
    return min(s.cube_patch_size, d), side, side


def cube_plan(split: Split, n_cubes: int, s: BenchSettings, seed: int,
              labels: Sequence[np.ndarray] | None = None) -> np.ndarray:
    """3-D: every step's patches, fixed by (seed, n_cubes) and the labels alone (class-aware
    sampling as in :func:`patch_plan`).

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
    forced = class_aware_count(b, s.class_aware_fraction) if labels is not None else 0
    if forced:
        crng = np.random.default_rng([seed, n_cubes, 104723])
        for k in range(n_cubes):
            i, z, y, x, d, h, w = split.cubes[k]
            sel = np.argwhere(out[:, b - forced:, 0] == k)
            offs = _centre_on_class(crng, labels[i][z:z + d, y:y + h, x:x + w], cube_patch_shape(split.cubes[k], s),
                                    s.ignore_label, len(sel))
            if offs is not None:
                out[sel[:, 0], b - forced + sel[:, 1], 1:4] = offs
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
