"""What users measure from a segmentation, computed from a prediction and from its label, so that
the benchmark reports the measurement error each contender would put into a paper (numpy,
scipy and scikit-image; no torch).

For one class of a 2-D image (H, W) or a 3-D volume (D, H, W), with square / cubic pixels of
side 1 (the benchmark's tiles and test slices are in pixels):

``fraction``
    Phase fraction: the class's share of the pixels (area or volume fraction).
``surface``
    Specific surface: interface length per unit area in 2-D (scikit-image's Crofton perimeter,
    4 directions) or interface area per unit volume in 3-D (scikit-image's marching cubes at
    level 0.5, then the mesh area), divided by the image's area or volume; in 1/pixel.
``thickness``
    Mean local thickness in pixels: each pixel of the class gets the diameter of the largest
    disc / ball that fits in the class and covers it (from scipy's Euclidean distance transform;
    written here because scipy and scikit-image have no local thickness), averaged over the
    class's pixels.
``objects``
    Connected objects of the class (scipy's ``label`` with full connectivity: 8 in 2-D, 26 in 3-D).
"""
from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

__all__ = ["QUANTITIES", "NAMES", "local_thickness", "phase_measures", "measurement_errors", "errors_by_key"]

QUANTITIES = ("fraction", "surface", "thickness", "objects")
NAMES = {"fraction": "phase fraction", "surface": "specific surface (1/px)", "thickness": "mean thickness (px)",
         "objects": "objects"}


def local_thickness(mask: np.ndarray) -> np.ndarray:
    """Local thickness of a binary 2-D or 3-D mask (0 outside it), in pixels.

    The thickness at a pixel is the diameter of the largest disc (ball) inside the mask that
    contains it (Hildebrand & Rüegsegger's definition), in pixels counted whole: a slab of t
    pixels is t thick. Computed from the distance transform d (distance to the nearest pixel
    outside): a centre with d >= r holds a ball of radius r - 1/2 that spans 2 r - 1 pixels; for
    every whole r from the largest down, the pixels within r - 1/2 of such a centre that are not
    yet assigned take 2 r - 1 (so thicknesses are odd whole numbers of pixels, as a digital
    structure's are along an axis).
    """
    from scipy import ndimage

    mask = np.asarray(mask, dtype=bool)
    out = np.zeros(mask.shape, dtype=np.float32)
    if not mask.any():
        return out
    dist = ndimage.distance_transform_edt(mask)
    radii = np.unique(np.floor(dist[mask]))  # whole-pixel steps of the radius (one transform each)
    for r in radii[::-1]:
        if r <= 0:
            continue
        centres = dist >= r
        covered = ndimage.distance_transform_edt(~centres) <= r - 0.5  # inside a ball of radius r - 1/2
        covered &= mask & (out == 0)
        out[covered] = 2 * r - 1
    out[mask & (out == 0)] = 1.0  # pixels of one-pixel structures
    return out


def _surface(mask: np.ndarray) -> float:
    from skimage import measure

    if mask.ndim == 2:
        return float(measure.perimeter_crofton(mask, directions=4))
    if not mask.any() or mask.all():
        return 0.0
    padded = np.pad(mask.astype(np.float32), 1)  # closes the surface at the volume's border
    verts, faces, _, _ = measure.marching_cubes(padded, level=0.5)
    return float(measure.mesh_surface_area(verts, faces))


def phase_measures(mask: np.ndarray) -> dict[str, float]:
    """Phase fraction, specific surface (1/pixel), mean local thickness (pixels) and object count
    of a binary mask; see the module docstring."""
    from scipy import ndimage

    mask = np.asarray(mask, dtype=bool)
    n = mask.size
    thick = local_thickness(mask)
    _, objects = ndimage.label(mask, structure=np.ones((3,) * mask.ndim))
    return {"fraction": float(mask.sum() / n) if n else 0.0,
            "surface": _surface(mask) / n if n else 0.0,
            "thickness": float(thick[mask].mean()) if mask.any() else 0.0,
            "objects": float(objects)}


_TRUTH: dict[bytes, dict[str, float]] = {}


def _cached_measures(mask: np.ndarray) -> dict[str, float]:
    """:func:`phase_measures` of a label mask, remembered: every run of a benchmark measures the
    same test labels (keyed by a hash of the mask; a few hundred entries at most)."""
    import hashlib

    key = hashlib.blake2b(np.packbits(mask).tobytes() + repr(mask.shape).encode(), digest_size=16).digest()
    if key not in _TRUTH:
        if len(_TRUTH) > 4096:
            _TRUTH.clear()
        _TRUTH[key] = phase_measures(mask)
    return _TRUTH[key]


def measurement_errors(preds: Sequence[np.ndarray], labels: Sequence[np.ndarray], classes: int,
                       ignore_label: int | None = None) -> dict[str, Any]:
    """Per class (1 .. classes - 1) and quantity: the truth and the prediction's value on every
    test image, and the mean absolute and mean relative error (relative to the truth; images
    where the truth is 0 are left out of the relative error).

    Pixels of ``ignore_label`` count as neither class.
    """
    out: dict[str, Any] = {}
    for k in range(1, int(classes)):
        per: dict[str, Any] = {q: {"truth": [], "pred": []} for q in QUANTITIES}
        for p, t in zip(preds, labels):
            keep = np.ones(t.shape, dtype=bool) if ignore_label is None else (t != ignore_label)
            mt, mp = _cached_measures((t == k) & keep), phase_measures((p == k) & keep)
            for q in QUANTITIES:
                per[q]["truth"].append(mt[q])
                per[q]["pred"].append(mp[q])
        for q, v in per.items():
            truth, pred = np.array(v["truth"]), np.array(v["pred"])
            err = np.abs(pred - truth)
            rel = err[truth != 0] / np.abs(truth[truth != 0])
            v["abs_error"] = float(err.mean()) if err.size else None
            v["rel_error"] = float(rel.mean()) if rel.size else None
        out[str(k)] = per
    return out


def errors_by_key(errors: Mapping[str, Any], kind: str = "abs_error") -> dict[str, float | None]:
    """``{"class/quantity": mean error}`` of :func:`measurement_errors`'s answer (``kind``:
    ``abs_error`` or ``rel_error``)."""
    return {f"{k}/{q}": v[q][kind] for k, v in errors.items() for q in QUANTITIES}
