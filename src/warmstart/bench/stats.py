"""Metrics and statistics of the benchmark (numpy and scipy; no torch).

Dice per class is ``2 |P & G| / (|P| + |G|)`` over all voxels of a set (pooled over its slices),
voxels of the ignore label excluded; a class absent from both prediction and truth scores 1.
Confidence intervals are Student t intervals over replicates; for figures bounded to [0, 1] (Dice,
curve area) the t interval is computed on the logit scale and mapped back, so it stays inside the
bounds (:func:`bounded_ci`). Paired differences are paired by seed (same patches, same decoder
initialization), keep their signed t intervals and are tested with the Wilcoxon signed-rank test.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

__all__ = ["dice_counts", "dice_from_counts", "dice_per_class", "mean_ci", "bounded_ci", "paired_difference",
           "epochs_to_reach", "curve_area", "LOGIT_EPS"]

LOGIT_EPS = 1e-3
"""Values are kept inside [LOGIT_EPS, 1 - LOGIT_EPS] before the logit, so a replicate at exactly 0 or
1 (a class absent from prediction and truth scores 1) has a finite logit; the common practice of
bounding proportions away from 0 and 1 before a logit transform (the value is our choice)."""


def dice_counts(pred: np.ndarray, truth: np.ndarray, classes: int, ignore_label: int | None = None) -> np.ndarray:
    """Per class: [intersection, |pred|, |truth|] as a (classes, 3) int array (add them over slices)."""
    pred, truth = np.asarray(pred).ravel(), np.asarray(truth).ravel()
    if ignore_label is not None:
        keep = truth != ignore_label
        pred, truth = pred[keep], truth[keep]
    out = np.zeros((classes, 3), dtype=np.int64)
    out[:, 0] = np.bincount(truth[pred == truth], minlength=classes)[:classes]
    out[:, 1] = np.bincount(pred, minlength=classes)[:classes]
    out[:, 2] = np.bincount(truth, minlength=classes)[:classes]
    return out


def dice_from_counts(counts: np.ndarray) -> np.ndarray:
    """Dice per class from :func:`dice_counts`; 1 where a class is absent from both."""
    inter, p, t = counts[:, 0].astype(float), counts[:, 1].astype(float), counts[:, 2].astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.where(p + t > 0, 2 * inter / (p + t), 1.0)
    return d


def dice_per_class(pred: np.ndarray, truth: np.ndarray, classes: int, ignore_label: int | None = None) -> np.ndarray:
    """Dice of each class.

    Examples
    --------
    >>> dice_per_class(np.array([0, 1, 1, 0]), np.array([0, 1, 0, 0]), 2).round(3).tolist()
    [0.8, 0.667]
    """
    return dice_from_counts(dice_counts(pred, truth, classes, ignore_label))


def mean_ci(values: Sequence[float], level: float = 0.95) -> dict[str, Any]:
    """Mean, standard deviation and the Student t confidence interval of the mean.

    Examples
    --------
    >>> r = mean_ci([1, 2, 3, 4, 5])
    >>> round(r["mean"], 3), round(r["low"], 3), round(r["high"], 3)
    (3.0, 1.037, 4.963)
    """
    from scipy import stats

    x = np.asarray([v for v in values if v is not None and np.isfinite(v)], dtype=float)
    n = int(x.size)
    if n == 0:
        return {"n": 0, "mean": None, "sd": None, "low": None, "high": None}
    mean = float(x.mean())
    if n == 1:
        return {"n": 1, "mean": mean, "sd": None, "low": None, "high": None}
    sd = float(x.std(ddof=1))
    half = float(stats.t.ppf(0.5 + level / 2, n - 1)) * sd / math.sqrt(n)
    return {"n": n, "mean": mean, "sd": sd, "low": mean - half, "high": mean + half}


def bounded_ci(values: Sequence[float], level: float = 0.95, eps: float = LOGIT_EPS) -> dict[str, Any]:
    """Mean and a confidence interval that stays inside [0, 1]: the Student t interval of the
    mean logit, mapped back through the logistic function.

    ``mean`` and ``sd`` are those of the values themselves; ``low`` and ``high`` come from the
    logit scale (values clipped to [eps, 1 - eps] first); ``interval`` names the method.

    Examples
    --------
    >>> r = bounded_ci([0.2, 0.9, 0.95])
    >>> 0 < r["low"] < r["mean"] < r["high"] < 1
    True
    """
    from scipy import stats

    out = mean_ci(values, level)
    out["interval"] = "Student t on the logit scale"
    if out["n"] < 2:
        return out
    x = np.clip(np.asarray([v for v in values if v is not None and np.isfinite(v)], dtype=float), eps, 1 - eps)
    z = np.log(x / (1 - x))
    sd = float(z.std(ddof=1))
    centre = float(z.mean())
    half = float(stats.t.ppf(0.5 + level / 2, z.size - 1)) * sd / math.sqrt(z.size)
    out["low"], out["high"] = (float(1 / (1 + math.exp(-v))) for v in (centre - half, centre + half))
    return out


def paired_difference(a: Sequence[float], b: Sequence[float], level: float = 0.95) -> dict[str, Any]:
    """``a - b`` paired by position: mean and t interval of the differences, the Wilcoxon
    signed-rank p (two-sided; None with fewer than two pairs or all differences zero), how many
    pairs favour ``a``, and whether the interval excludes zero."""
    from scipy import stats

    pairs = [(x, y) for x, y in zip(a, b) if x is not None and y is not None and np.isfinite(x) and np.isfinite(y)]
    d = [x - y for x, y in pairs]
    out = mean_ci(d, level)
    p = None
    if len(d) >= 2 and any(v != 0 for v in d):
        p = float(stats.wilcoxon(d).pvalue)
    out.update(wilcoxon_p=p, wins=sum(v > 0 for v in d), pairs=len(d),
               significant=bool(out["low"] is not None and (out["low"] > 0 or out["high"] < 0)))
    return out


def epochs_to_reach(curve: Sequence[float], threshold: float) -> int | None:
    """First epoch (1-based) whose validation Dice reaches ``threshold``; None if none does."""
    for i, v in enumerate(curve):
        if v >= threshold:
            return i + 1
    return None


def curve_area(curve: Sequence[float]) -> float:
    """Area under the validation-Dice curve per epoch, normalized to [0, 1] (the mean over epochs):
    higher means good Dice earlier."""
    return float(np.mean(curve)) if len(curve) else float("nan")
