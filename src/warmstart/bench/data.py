"""Labelled data for the benchmark: image/label pairs and a deterministic, recorded split (no torch).

LABELS is a folder with ``images/`` and ``labels/`` whose files match by name (stem), or a TOML
file listing the pairs::

    [[pair]]
    image = "scans/filter_07.tif"
    label = "masks/filter_07_phases.tif"

Any readable volume format works (2-D images are one-slice volumes); labels are integers.
"""
from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import SourceNotFoundError, VolumeReadError
from .settings import BenchSettings

__all__ = ["LabelledPair", "Split", "read_pairs", "load_pairs", "make_split", "n_classes"]


@dataclass
class LabelledPair:
    """One labelled volume, read whole (labelled sets are small): raw image, integer labels."""

    name: str
    image_path: str
    label_path: str
    image: np.ndarray
    label: np.ndarray
    sha256: str
    voxel_size_um: tuple[float | None, ...]


@dataclass
class Split:
    """Which slices test and validate, and the training set (nested by order).

    ``test``/``val``: (pair, z) whole slices. ``tiles``: (pair, z, y, x, h, w). With
    ``kind="tiles"`` the first ``n`` tiles are the training set of size ``n``; with
    ``kind="cubes"`` (:mod:`.cubes`) the first ``n`` cubes (pair, z, y, x, d, h, w) are, ``tiles``
    holds their slices in the same order, and ``test``/``val`` are the slices of the slabs
    ``test_regions``/``val_regions`` (pair, z0, z1).
    """

    test: list[tuple[int, int]] = field(default_factory=list)
    val: list[tuple[int, int]] = field(default_factory=list)
    tiles: list[tuple[int, int, int, int, int, int]] = field(default_factory=list)
    seed: int = 0
    kind: str = "tiles"
    cubes: list[tuple[int, int, int, int, int, int, int]] = field(default_factory=list)
    test_regions: list[tuple[int, int, int]] = field(default_factory=list)
    val_regions: list[tuple[int, int, int]] = field(default_factory=list)

    def n_tiles(self, n: int) -> int:
        """2-D training tiles in the training set of size ``n`` (the slices of ``n`` cubes)."""
        return n if self.kind == "tiles" else sum(c[4] for c in self.cubes[:n])

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"seed": self.seed, "kind": self.kind, "test": [list(t) for t in self.test],
                               "val": [list(v) for v in self.val], "tiles": [list(f) for f in self.tiles]}
        if self.kind == "cubes":
            out.update(cubes=[list(c) for c in self.cubes], test_regions=[list(r) for r in self.test_regions],
                       val_regions=[list(r) for r in self.val_regions])
        return out


def read_pairs(labels: str | os.PathLike[str]) -> list[tuple[str, Path, Path]]:
    """(name, image path, label path) from a folder with images/ and labels/, or a TOML list."""
    root = Path(labels)
    if not root.exists():
        raise SourceNotFoundError(f"{root}: no such labelled set")
    if root.is_file():
        try:
            data = tomllib.loads(root.read_text())
        except tomllib.TOMLDecodeError as e:
            raise VolumeReadError(f"{root}: not valid TOML ({e})") from e
        out = []
        for i, p in enumerate(data.get("pair", [])):
            if "image" not in p or "label" not in p:
                raise VolumeReadError(f"{root}: pair {i + 1} needs 'image' and 'label'")
            img, lab = (root.parent / p["image"]), (root.parent / p["label"])
            out.append((str(p.get("name", img.stem)), img, lab))
        if not out:
            raise VolumeReadError(f"{root}: lists no [[pair]]")
        return out
    images, labs = root / "images", root / "labels"
    if not images.is_dir() or not labs.is_dir():
        raise VolumeReadError(f"{root}: a labelled set needs folders images/ and labels/ (or give a TOML file of pairs)")

    def stems(folder: Path) -> dict[str, Path]:
        out: dict[str, Path] = {}
        for p in sorted(folder.iterdir()):
            if p.name.startswith("."):
                continue
            k = image_stem(p.name)
            if k in out:
                raise VolumeReadError(f"{folder}: {out[k].name} and {p.name} have the same name {k!r}; "
                                      "keep one file per image")
            out[k] = p
        return out

    a, b = stems(images), stems(labs)
    lonely = sorted(set(a) ^ set(b))
    if lonely:
        raise VolumeReadError(f"{root}: no matching image/label for {', '.join(lonely[:5])}")
    return [(k, a[k], b[k]) for k in sorted(a)]


def _image_suffixes() -> tuple[str, ...]:
    """Every suffix the readers take, longest first (``.ome.tif`` before ``.tif``)."""
    from ..volumes import dicom, mrc, npy, slices, tiff

    known = {".ome.tiff", ".ome.tif", ".ome.zarr", ".zarr", *tiff.SUFFIXES, *slices.SUFFIXES, *mrc.SUFFIXES,
             *npy.SUFFIXES, *dicom.SUFFIXES}
    return tuple(sorted(known, key=len, reverse=True))


def image_stem(name: str) -> str:
    """A file's name without its image suffix (``scan.v1.tif`` -> ``scan.v1``, ``a.ome.tif`` -> ``a``).

    >>> image_stem("scan.v1.tif"), image_stem("scan.v2.ome.tiff"), image_stem("slices")
    ('scan.v1', 'scan.v2', 'slices')
    """
    low = name.lower()
    for suffix in _image_suffixes():
        if low.endswith(suffix):
            return name[: len(name) - len(suffix)]
    return name


def load_pairs(labels: str | os.PathLike[str], ignore_label: int | None = None) -> list[LabelledPair]:
    """Read every pair whole; refuse (naming the files) mismatched shapes and non-integer labels."""
    from ..volumes import open_volume

    pairs = []
    for name, ip, lp in read_pairs(labels):
        with open_volume(ip) as iv, open_volume(lp) as lv:
            img, lab = iv.read(), lv.read()
            sha, vs = iv.source.sha256, tuple(iv.voxel_size_um)
        if img.shape != lab.shape:
            raise VolumeReadError(f"{ip} and {lp}: image {img.shape} and label {lab.shape} differ in shape")
        if lab.dtype.kind == "f":
            if not np.all(np.isfinite(lab)) or not np.array_equal(lab, np.round(lab)):
                raise VolumeReadError(f"{lp}: labels must be integers")
        lab = lab.astype(np.int64)
        if (lab < 0).any() and ignore_label is None:
            raise VolumeReadError(f"{lp}: negative labels (set bench.ignore_label for a value to ignore)")
        pairs.append(LabelledPair(name, str(ip), str(lp), img, lab, sha, vs))
    return pairs


def n_classes(pairs: list[LabelledPair], ignore_label: int | None = None) -> int:
    """Number of classes: the largest label (other than ``ignore_label``) plus one, at least 2."""
    top, where = 0, ""
    seen: set[int] = set()
    for p in pairs:
        vals = p.label if ignore_label is None else p.label[p.label != ignore_label]
        if vals.size:
            if int(vals.max()) > top:
                top, where = int(vals.max()), p.label_path
            seen.update(int(v) for v in np.unique(vals))
    if top + 1 > 16 and top + 1 > 2 * len(seen):
        shown = ", ".join(map(str, sorted(seen)[:8])) + (", ..." if len(seen) > 8 else "")
        raise VolumeReadError(
            f"{where}: labels take {len(seen)} values ({shown}) but class numbers go up to {top}: give consecutive class numbers "
            f"0..{len(seen) - 1} (e.g. numpy's np.unique(label, return_inverse=True)), or set bench.ignore_label for "
            "a value that marks unlabelled voxels")
    return max(top + 1, 2)


def make_split(pairs: list[LabelledPair], s: BenchSettings) -> Split:
    """Test and validation slices, then training tiles at least ``gap_slices`` away from them.

    Slices are drawn evenly over all pairs (each pair in turn) from a generator seeded with
    ``split_seed``; tiles prefer regions holding at least two classes (up to 20 tries each).
    With ``s.training_set == "cubes"``: slabs and cubes instead (:func:`.cubes.make_cube_split`).
    """
    if s.training_set == "cubes":
        from .cubes import make_cube_split

        return make_cube_split(pairs, s)
    rng = np.random.default_rng(s.split_seed)
    slices = [(i, z) for i, p in enumerate(pairs) for z in range(p.image.shape[0])]
    order = [slices[k] for k in rng.permutation(len(slices))]
    need = s.test_slices + s.val_slices
    if len(slices) < need + 1:
        raise VolumeReadError(f"the labelled set has {len(slices)} slices; the benchmark needs {s.test_slices} test + "
                              f"{s.val_slices} validation + at least 1 for training (lower bench.test_slices/val_slices)")
    held = order[:need]
    test, val = sorted(held[:s.test_slices]), sorted(held[s.test_slices:])
    near = {(i, z + d) for i, z in held for d in range(-s.gap_slices, s.gap_slices + 1)}
    train = [sl for sl in order[need:] if sl not in near]
    if not train:
        # Single images or very thin volumes: no gap can be kept, the remaining slices train.
        train = list(order[need:])
    tiles = []
    want = max(s.sizes)
    for k in range(want):
        best = None
        for _ in range(20):
            i, z = train[int(rng.integers(len(train)))]
            h, w = (min(s.tile_size, n) for n in pairs[i].image.shape[1:])
            y = int(rng.integers(pairs[i].image.shape[1] - h + 1))
            x = int(rng.integers(pairs[i].image.shape[2] - w + 1))
            best = (i, z, y, x, h, w)
            region = pairs[i].label[z, y:y + h, x:x + w]
            if len(np.unique(region)) >= 2:
                break
        tiles.append(best)  # type: ignore[arg-type]
    return Split(test, val, tiles, s.split_seed)  # type: ignore[arg-type]
