"""The volumetric split of a labelled set: test and validation slabs, and nested training cubes (no torch).

Test and validation regions are slabs of consecutive whole slices (``bench.region_slices`` thick,
the full Y-X extent) of the labelled volumes, spread over the volumes in turn and packed at the
top or bottom of each volume (so the rest of it stays one run of slices). Training cubes
(side ``bench.cube_size``, clipped to the volume) lie at least ``bench.gap_slices`` slices away
from every slab of their volume; they are drawn in one seeded order, so the 4 cubes include the
1 and the 16 include the 4. A cube prefers a region holding at least two classes and, where it
can, one that does not overlap the cubes drawn before it.

2-D contenders train on the slices of the same cubes and are tested slice by slice on the same
slabs, so every contender has the same labelled voxels and the same test voxels.
"""
from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from ..errors import VolumeReadError
from .settings import BenchSettings

__all__ = ["make_cube_split", "labelled_voxels"]


def _place_slabs(depths: Sequence[int], count: int, thick: int,
                 rng: np.random.Generator) -> list[tuple[int, int, int]]:
    """``count`` slabs (pair, z0, z1), in volumes taken in turn (a seeded order). Each goes to the
    top or the bottom of what is still free in its volume (a seeded choice), so the slabs of a
    volume pack together and leave the longest free run of slices for training cubes."""
    order = [int(i) for i in rng.permutation(len(depths))]
    free = {i: [0, depths[i]] for i in order}  # [first free slice, one past the last]
    out: list[tuple[int, int, int]] = []
    k, misses = 0, 0
    while len(out) < count:
        if misses >= len(order):
            raise VolumeReadError(f"the labelled volumes have room for {len(out)} slabs of {thick} slices; the "
                                  f"benchmark needs {count} (lower bench.test_regions, val_regions or region_slices)")
        i = order[k % len(order)]
        k += 1
        lo, hi = free[i]
        t = min(thick, depths[i])
        if hi - lo < t:
            misses += 1
            continue
        misses = 0
        if rng.integers(2):
            out.append((i, lo, lo + t))
            free[i][0] = lo + t
        else:
            out.append((i, hi - t, hi))
            free[i][1] = hi - t
    return out


def make_cube_split(pairs: Sequence[Any], s: BenchSettings) -> Any:
    """Test slabs, validation slabs and training cubes of a labelled set (see the module docstring).

    Returns
    -------
    Split
        ``kind="cubes"``; ``test`` and ``val`` hold the slabs' slices (pair, z) as the 2-D split
        does, ``test_regions``/``val_regions`` the slabs (pair, z0, z1), ``cubes`` the training
        cubes (pair, z, y, x, d, h, w) in draw order, and ``tiles`` every slice of every cube in
        the same order (the 2-D contenders' training tiles).
    """
    from .data import Split

    rng = np.random.default_rng(s.split_seed)
    depths = [int(p.image.shape[0]) for p in pairs]
    slabs = _place_slabs(depths, s.test_regions + s.val_regions, s.region_slices, rng)
    test, val = sorted(slabs[:s.test_regions]), sorted(slabs[s.test_regions:])
    allowed: dict[int, list[int]] = {}
    for i, p in enumerate(pairs):
        d = min(s.cube_size, depths[i])
        held = [(a, b) for j, a, b in slabs if j == i]
        ok = [z for z in range(depths[i] - d + 1) if all(z + d + s.gap_slices <= a or z >= b + s.gap_slices
                                                        for a, b in held)]
        if ok:
            allowed[i] = ok
    if not allowed:
        raise VolumeReadError(
            f"no training cube of {s.cube_size} slices fits {s.gap_slices} slices away from the test and validation "
            f"slabs in any labelled volume (depths {depths}); use thicker or more volumes, or lower bench.cube_size, "
            "region_slices, test_regions or gap_slices")
    volumes = sorted(allowed)
    cubes: list[tuple[int, int, int, int, int, int, int]] = []
    for _ in range(max(s.sizes)):
        best, fallback = None, None
        for _attempt in range(40):
            i = volumes[int(rng.integers(len(volumes)))]
            p = pairs[i]
            d, h, w = min(s.cube_size, depths[i]), min(s.cube_size, p.image.shape[1]), min(s.cube_size, p.image.shape[2])
            z = allowed[i][int(rng.integers(len(allowed[i])))]
            y = int(rng.integers(p.image.shape[1] - h + 1))
            x = int(rng.integers(p.image.shape[2] - w + 1))
            cube = (i, z, y, x, d, h, w)
            varied = len(np.unique(p.label[z:z + d, y:y + h, x:x + w])) >= 2
            apart = all(not _overlap(cube, c) for c in cubes)
            if varied and apart:
                best = cube
                break
            if fallback is None or (varied and not fallback[1]):
                fallback = (cube, varied)
        cubes.append(best if best is not None else fallback[0])  # type: ignore[index]
    tiles = [(i, z + k, y, x, h, w) for i, z, y, x, d, h, w in cubes for k in range(d)]
    split = Split([(i, z) for i, a, b in test for z in range(a, b)], [(i, z) for i, a, b in val for z in range(a, b)],
                  tiles, s.split_seed)
    split.kind, split.cubes, split.test_regions, split.val_regions = "cubes", cubes, test, val
    return split


def _overlap(a: tuple[int, ...], b: tuple[int, ...]) -> bool:
    if a[0] != b[0]:
        return False
    return all(a[1 + k] < b[1 + k] + b[4 + k] and b[1 + k] < a[1 + k] + a[4 + k] for k in range(3))


def labelled_voxels(split: Any, n: int, shapes: Sequence[Sequence[int]]) -> int:
    """Distinct labelled voxels in the training set of size ``n`` (cubes or tiles; overlaps count once)."""
    masks: dict[int, np.ndarray] = {}
    if split.kind == "cubes":
        for i, z, y, x, d, h, w in split.cubes[:n]:
            m = masks.setdefault(i, np.zeros(shapes[i], dtype=bool))
            m[z:z + d, y:y + h, x:x + w] = True
    else:
        for i, z, y, x, h, w in split.tiles[:n]:
            m = masks.setdefault(i, np.zeros(shapes[i], dtype=bool))
            m[z, y:y + h, x:x + w] = True
    return int(sum(int(m.sum()) for m in masks.values()))
