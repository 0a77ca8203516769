"""Ranking several encoders: pairwise paired t tests with Holm's correction.

References: Holm (1979)'s step-down procedure computed by hand from its definition for a small
family; scipy.stats.ttest_rel for the paired t test. Run records are unit fixture data.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from warmstart.bench.ranking import holm, pairwise, recommendation


def test_holm_follows_its_definition():
    p = [0.01, 0.04, 0.03, 0.005, None]
    # by hand: sorted 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1 -> 0.02, 0.03, 0.06, 0.04 -> running max
    assert holm(p) == [pytest.approx(0.03), pytest.approx(0.06), pytest.approx(0.06), pytest.approx(0.02), None]
    assert holm([0.5, 0.9]) == [1.0, 1.0]  # capped at 1
    assert holm([]) == []


def _runs(means, seeds=8, spread=0.01, sizes=(1, 4)):
    rng = np.random.default_rng(3)
    out = []
    for n in sizes:
        shared = rng.standard_normal(seeds) * 0.02  # a replicate effect common to every contender (paired)
        for cid, m in means.items():
            for s in range(seeds):
                out.append({"contender": cid, "size": n, "seed": s,
                            "test_dice": m + shared[s] + spread * rng.standard_normal()})
    return out


CONTENDERS = [{"id": "random", "label": "random init"}, {"id": "a", "label": "encoder A"},
              {"id": "b", "label": "encoder B"}]


def test_pairwise_p_values_are_scipys_paired_t_test_holm_adjusted():
    runs = _runs({"random": 0.5, "a": 0.6, "b": 0.62})
    rows = pairwise(runs, ["random", "a", "b"], [1, 4])
    assert len(rows) == 6
    for r in rows:
        xa = [x["test_dice"] for x in runs if x["contender"] == r["a"] and x["size"] == r["size"]]
        xb = [x["test_dice"] for x in runs if x["contender"] == r["b"] and x["size"] == r["size"]]
        assert r["p"] == pytest.approx(stats.ttest_rel(xa, xb).pvalue)
        assert r["difference"] == pytest.approx(np.mean(xa) - np.mean(xb))
    assert [r["p_holm"] for r in rows] == pytest.approx(holm([r["p"] for r in rows]))


def test_a_clear_winner_is_recommended_and_a_close_race_is_called_noise():
    clear = recommendation(_runs({"random": 0.5, "a": 0.6, "b": 0.7}), CONTENDERS, [1, 4])
    assert clear["choice"] == "b" and clear["supported"]
    assert clear["sentence"].startswith("Use encoder B: it has the highest final test Dice with 1 labelled tile")
    assert "better than every other contender after Holm's correction (n = 8 replicates)" in clear["sentence"]
    close = recommendation(_runs({"random": 0.5, "a": 0.6, "b": 0.601}), CONTENDERS, [1, 4])
    assert close["choice"] in ("a", "b") and not close["supported"]
    assert "within replicate noise after Holm's correction" in close["sentence"]
    assert "the data do not single it out" in close["sentence"]
