"""Labels saved: how many labelled tiles random initialization needs to reach what a warm start
reaches with few (numpy only, no torch).

Random initialization's mean final Dice is interpolated linearly against log2(tiles) between the
measured training-set sizes; the answer is the number of tiles at which that curve reaches the
warm start's mean final Dice at the size asked for. Its interval comes from resampling the
replicates (seeds) of every contender and size with replacement (a percentile bootstrap; seeded,
so a report is repeatable). Beyond the largest size measured the answer is "more than" it (the
curve is not extrapolated), and a warm start that does worse than random initialization at the
same size has "not reached" it.
"""
from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

import numpy as np

__all__ = ["tiles_needed", "labels_saved", "labels_saved_sentence", "headline"]


def tiles_needed(sizes: Sequence[int], random_dice: Sequence[float], target: float) -> float | None:
    """Tiles random initialization needs to reach ``target`` Dice, by log-linear interpolation.

    Returns ``math.inf`` when its curve never reaches ``target`` over the measured sizes, and the
    smallest size when it reaches it there already; None when nothing was measured.

    Examples
    --------
    >>> tiles_needed([1, 4, 16], [0.5, 0.7, 0.8], 0.6)  # halfway between 1 and 4 on a log2 axis
    2.0
    >>> tiles_needed([1, 4, 16], [0.5, 0.7, 0.8], 0.9)
    inf
    """
    pts = sorted((int(n), float(d)) for n, d in zip(sizes, random_dice) if d is not None and np.isfinite(d))
    if not pts:
        return None
    if target <= pts[0][1]:
        return float(pts[0][0])
    best = pts[0][1]
    for (n0, d0), (n1, d1) in zip(pts, pts[1:]):
        best = max(best, d0)
        if d1 >= target > best:  # first crossing, on the log2 axis
            frac = (target - d0) / (d1 - d0)
            return float(2 ** (math.log2(n0) + frac * (math.log2(n1) - math.log2(n0))))
    return math.inf


def labels_saved(runs: Sequence[Mapping[str, Any]], warm: str, random: str, size: int, sizes: Sequence[int],
                 figure: str = "test_dice", resamples: int = 2000, level: float = 0.95,
                 seed: int = 0) -> dict[str, Any]:
    """Tiles random initialization needs to match contender ``warm`` trained on ``size`` tiles.

    Parameters
    ----------
    runs : list of dict
        Run records (``contender``, ``size``, ``seed`` and ``figure``).
    warm, random : str
        Contender ids of the warm start and of its random initialization.
    size : int
        The warm start's training-set size (tiles).
    sizes : sequence of int
        Every measured size.
    resamples : int
        Bootstrap resamples of the replicates.

    Returns
    -------
    dict
        ``tiles`` (a number, ``"more"`` for more than the largest size, ``"not reached"`` when
        the warm start did worse than random initialization with the same tiles), ``low`` /
        ``high`` (percentile interval over resamples, same conventions), ``status``
        (``reached``, ``more``, ``not_reached``, ``n/a``), ``target`` (the warm start's mean),
        ``n`` (replicates of the warm start) and ``largest`` (the largest size measured).
    """
    def values(cid: str, n: int) -> np.ndarray:
        return np.array([float(r[figure]) for r in runs if r["contender"] == cid and r["size"] == n
                         and r.get(figure) is not None], dtype=float)

    sizes = sorted(int(n) for n in sizes)
    warm_vals = values(warm, size)
    rand_vals = [values(random, n) for n in sizes]
    base = {"target": None, "n": int(warm_vals.size), "largest": sizes[-1] if sizes else None, "size": int(size),
            "method": f"log2-linear interpolation; {level:.0%} percentile bootstrap over replicates ({resamples} resamples)"}
    if not warm_vals.size or any(v.size == 0 for v in rand_vals):
        return {**base, "tiles": None, "low": None, "high": None, "status": "n/a"}  # runs missing

    def answer(w: np.ndarray, rs: list[np.ndarray]) -> float | None:
        target = float(w.mean())
        at_same = float(rs[sizes.index(size)].mean()) if size in sizes else None
        if at_same is not None and target < at_same:
            return None  # worse than random initialization with the same labels
        return tiles_needed(sizes, [float(v.mean()) for v in rs], target)

    point = answer(warm_vals, rand_vals)
    rng = np.random.default_rng(seed)
    draws = []
    for _ in range(int(resamples)):
        w = rng.choice(warm_vals, warm_vals.size)
        rs = [rng.choice(v, v.size) for v in rand_vals]
        a = answer(w, rs)
        draws.append(-1.0 if a is None else a)  # "not reached" sorts below every count
    lo, hi = np.quantile(np.array(draws), [(1 - level) / 2, (1 + level) / 2], method="inverted_cdf")
    status = "not_reached" if point is None else ("more" if math.isinf(point) else "reached")
    return {**base, "target": float(warm_vals.mean()), "tiles": _json_count(point),
            "low": _json_count(None if lo < 0 else float(lo)), "high": _json_count(None if hi < 0 else float(hi)),
            "status": status}


def _json_count(v: float | None) -> float | str:
    """A count as JSON holds it: a number, ``"more"`` (beyond the largest size) or ``"not reached"``."""
    if v is None:
        return "not reached"
    return "more" if math.isinf(v) else float(v)


def _count(v: float | str, largest: int) -> str:
    if v == "more":
        return f"more than {largest}"
    return v if isinstance(v, str) else f"{v:.1f}"


def labels_saved_sentence(r: Mapping[str, Any], label: str, unit: str = "tile") -> str:
    """The headline sentence for one warm start and size (the report's first lines); ``unit``
    names what the training sets count (``tile`` or ``cube``)."""
    n, size, largest = r["n"], r["size"], r["largest"]
    tiles = unit if size == 1 else f"{unit}s"
    if r["status"] == "n/a":
        return f"{label}: labels saved at {size} {tiles} cannot be estimated (runs missing)."
    if r["status"] == "not_reached":
        return (f"With {size} labelled {tiles}, {label} did worse than random initialization with the same "
                f"{tiles} (mean final Dice {r['target']:.3f}; n = {n} replicates): no labels saved.")
    about = f"more than {largest}" if r["status"] == "more" else f"about {r['tiles']:.1f}"
    return (f"With {size} labelled {tiles}, {label} reached the Dice that random initialization reached with "
            f"{about} [{_count(r['low'], largest)}, {_count(r['high'], largest)}] {unit}s (final Dice {r['target']:.3f}; "
            f"n = {n} replicates; 95 % bootstrap interval over replicates).")


def headline(runs: Sequence[Mapping[str, Any]], contenders: Sequence[Mapping[str, Any]],
             sizes: Sequence[int], unit: str = "tile") -> list[dict[str, Any]]:
    """Labels saved for every warm start (a contender with a ``baseline``) at 1 and 4 tiles, where
    those sizes were measured and a larger one was too; each entry adds ``contender``, ``label``
    and ``sentence`` to :func:`labels_saved`'s answer."""
    out = []
    largest = max(sizes) if sizes else 0
    for c in contenders:
        if not c.get("baseline"):
            continue
        for size in (1, 4):
            if size in sizes and size < largest:
                r = labels_saved(runs, c["id"], c["baseline"], size, sizes)
                out.append({"contender": c["id"], "label": c["label"], **r,
                            "sentence": labels_saved_sentence(r, c["label"], unit)})
    return out
