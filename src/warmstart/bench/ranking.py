"""Which encoder to use: every contender against every other on final test Dice, paired by
replicate, with Holm's correction for the many comparisons (numpy and scipy; no torch).

At each training-set size, every pair of contenders is compared with a paired t test on the
replicates' final test Dice (the same pairing and the same t distribution as the benchmark's
intervals). The p values of all pairs of all sizes form one family, adjusted by Holm's step-down
method (S. Holm, "A simple sequentially rejective multiple test procedure", Scand. J. Statist.
6, 1979), which controls the family-wise error rate without assuming independence.
"""
from __future__ import annotations

from itertools import combinations
from typing import Any, Mapping, Sequence

import numpy as np

__all__ = ["holm", "pairwise", "recommendation"]


def holm(pvalues: Sequence[float | None]) -> list[float | None]:
    """Holm-adjusted p values, in the input order (None stays None and does not count).

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03, 0.005])
    [0.03, 0.06, 0.06, 0.02]
    """
    idx = [i for i, p in enumerate(pvalues) if p is not None]
    m = len(idx)
    out: list[float | None] = [None] * len(pvalues)
    running = 0.0
    for rank, i in enumerate(sorted(idx, key=lambda i: pvalues[i])):  # smallest first
        running = max(running, min(1.0, (m - rank) * float(pvalues[i])))  # step-down: never decreases
        out[i] = round(running, 12)
    return out


def _paired_t_p(a: Sequence[float], b: Sequence[float]) -> float | None:
    from scipy import stats

    d = np.asarray(a, dtype=float) - np.asarray(b, dtype=float)
    if d.size < 2 or np.allclose(d, d[0]):
        return None if d.size < 2 else (1.0 if d[0] == 0 else 0.0)
    return float(stats.ttest_rel(a, b).pvalue)


def pairwise(runs: Sequence[Mapping[str, Any]], contenders: Sequence[str], sizes: Sequence[int],
             figure: str = "test_dice") -> list[dict[str, Any]]:
    """Every pair of contenders at every size: mean difference ``a - b``, replicates paired,
    paired t p and its Holm-adjusted value over the whole family."""
    rows = []
    for n in sizes:
        by = {c: {r["seed"]: float(r[figure]) for r in runs if r["contender"] == c and r["size"] == n
                  and r.get(figure) is not None} for c in contenders}
        for a, b in combinations(contenders, 2):
            seeds = sorted(set(by[a]) & set(by[b]))
            xa, xb = [by[a][s] for s in seeds], [by[b][s] for s in seeds]
            rows.append({"size": int(n), "a": a, "b": b, "pairs": len(seeds),
                         "difference": float(np.mean(np.subtract(xa, xb))) if seeds else None,
                         "p": _paired_t_p(xa, xb) if seeds else None})
    for row, adj in zip(rows, holm([r["p"] for r in rows])):
        row["p_holm"] = adj
    return rows


def recommendation(runs: Sequence[Mapping[str, Any]], contenders: Sequence[Mapping[str, Any]],
                   sizes: Sequence[int], alpha: float = 0.05, unit: str = "tile") -> dict[str, Any]:
    """Which contender to use, and whether the data support the choice.

    The choice is the contender with the highest mean final test Dice at the smallest size (the
    few-label case a warm start is for). The data support it when, after Holm's correction, it is
    significantly better than every other contender at that size; otherwise the sentence says
    which differences are within replicate noise.
    """
    ids = [c["id"] for c in contenders]
    labels = {c["id"]: c["label"] for c in contenders}
    sizes = sorted(int(n) for n in sizes)
    rows = pairwise(runs, ids, sizes)
    if not sizes or len(ids) < 2:
        return {"choice": None, "supported": False, "pairs": rows, "sentence": ""}
    n0 = sizes[0]
    means = {c: np.mean([float(r["test_dice"]) for r in runs if r["contender"] == c and r["size"] == n0] or [np.nan])
             for c in ids}
    best = max((c for c in ids if np.isfinite(means[c])), key=lambda c: means[c], default=None)
    if best is None:
        return {"choice": None, "supported": False, "pairs": rows, "sentence": ""}
    against = [r for r in rows if r["size"] == n0 and best in (r["a"], r["b"])]
    beaten = [r for r in against if r["p_holm"] is not None and r["p_holm"] < alpha
              and (r["difference"] > 0) == (r["a"] == best)]
    supported = len(beaten) == len(against) and bool(against)
    reps = min((r["pairs"] for r in against), default=0)
    tiles = unit if n0 == 1 else f"{unit}s"
    if supported:
        why = f"it is better than every other contender after Holm's correction (n = {reps} replicates)"
    else:
        close = [labels[r["b"] if r["a"] == best else r["a"]] for r in against if r not in beaten]
        why = (f"but its lead over {', '.join(close)} is within replicate noise after Holm's correction "
               f"(n = {reps} replicates): the data do not single it out")
    sentence = (f"Use {labels[best]}: it has the highest final test Dice with {n0} labelled {tiles} "
                f"({means[best]:.3f}), {why}.")
    return {"choice": best, "supported": supported, "size": n0, "pairs": rows, "sentence": sentence}
