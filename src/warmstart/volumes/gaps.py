"""Missing chunks of a zarr array: gaps, not zeros.

zarr reads a chunk whose file is absent as the array's fill value, so a damaged copy of a volume
(or one whose writer skipped chunks) reads as if it held zeros there: the intensity fit and the
patches would learn them. Here the chunk files of a local zarr array are listed once when it is
opened, and every read returns float32 with NaN where a chunk is missing; the intensity fit and
the patch filter already leave non-finite voxels out (the patch filter drops any patch touching
one), and the source's warnings say how many chunks were missing. A writer that skips chunks
equal to the fill value (zarr's default) leaves the same files as a damaged copy; both are read
as gaps, which for such a writer means its all-background chunks take no part in the fit. A
volume with every chunk missing has no finite voxel and is refused by the intensity fit.
"""
from __future__ import annotations

import itertools
import os
from typing import Any

import numpy as np

__all__ = ["missing_chunks", "GapMasked", "project_boxes"]

Box = tuple[tuple[int, int], ...]


def missing_chunks(array: Any, folder: str) -> tuple[list[tuple[str, Box]], int] | None:
    """The chunks of a zarr array stored in ``folder`` whose files are missing, as (chunk key, index
    box ``((lo, hi), ...)`` per axis), and the number of chunks; None when the files cannot be named
    (a sharded or non-local array). The keys are zarr's own (``Array.metadata.encode_chunk_key``)."""
    meta = getattr(array, "metadata", None)
    encode = getattr(meta, "encode_chunk_key", None)
    if encode is None or not os.path.isdir(folder):
        return None
    codecs = getattr(meta, "codecs", ()) or ()
    if any(type(c).__name__ == "ShardingCodec" for c in codecs):
        return None
    shape = tuple(int(s) for s in array.shape)
    chunks = tuple(int(c) for c in array.chunks)
    grid = [range(-(-n // c)) for n, c in zip(shape, chunks)]
    present = set()
    for dirpath, _, files in os.walk(folder):
        rel = os.path.relpath(dirpath, folder)
        for f in files:
            present.add(f if rel == "." else os.path.join(rel, f).replace(os.sep, "/"))
    missing, total = [], 0
    for coords in itertools.product(*grid):
        total += 1
        key = encode(coords)
        if key not in present:
            missing.append((key, tuple((i * c, min((i + 1) * c, n)) for i, c, n in zip(coords, chunks, shape))))
    return missing, total


class GapMasked:
    """A (Z, Y, X) view whose reads are float32 with NaN inside ``boxes`` (Z, Y, X index boxes)."""

    def __init__(self, view: Any, boxes: list[Box]) -> None:
        self._view, self._boxes = view, boxes
        self.shape = tuple(view.shape)
        self.dtype = np.dtype(np.float32)

    def __getitem__(self, region: tuple[slice, slice, slice]) -> np.ndarray:
        out = np.asarray(self._view[region], dtype=np.float32)
        spans = [r.indices(n)[:2] for r, n in zip(region, self.shape)]
        for box in self._boxes:
            cut = []
            for (lo, hi), (a, b) in zip(box, spans):
                lo2, hi2 = max(lo, a), min(hi, b)
                if lo2 >= hi2:
                    break
                cut.append(slice(lo2 - a, hi2 - a))
            else:
                out[tuple(cut)] = np.nan
        return out


def project_boxes(boxes: list[Box], names: list[str], fixed: dict[str, int]) -> list[Box]:
    """Boxes of an array with named axes (t, c, z, y, x, or placeholders) as (Z, Y, X) boxes of the
    view that reads ``fixed`` indices of the other axes (a missing z axis becomes (0, 1))."""
    out = []
    for box in boxes:
        spans = dict(zip(names, box))
        if any(not (lo <= fixed.get(n, 0) < hi) for n, (lo, hi) in spans.items() if n not in ("z", "y", "x")):
            continue
        out.append((spans.get("z", (0, 1)), spans["y"], spans["x"]))
    return out
