"""Intervals of bounded figures (Dice, curve area) stay inside [0, 1] and cover as they should.

References: scipy.stats.t.interval (the same Student t interval, applied here to the logits and
mapped back through scipy.special.expit); coverage by simulation from known bounded distributions
(logit-normal, whose median is the logistic of its logit mean; a beta distribution).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from warmstart.bench.stats import bounded_ci, mean_ci


def test_it_is_scipys_t_interval_on_the_logit_scale():
    x = np.array([0.62, 0.71, 0.55, 0.8, 0.67])
    z = special.logit(x)
    lo, hi = stats.t.interval(0.95, len(z) - 1, loc=z.mean(), scale=stats.sem(z))
    r = bounded_ci(x)
    assert (r["low"], r["high"]) == (pytest.approx(special.expit(lo)), pytest.approx(special.expit(hi)))
    assert r["mean"] == pytest.approx(x.mean()) and r["n"] == 5 and "logit" in r["interval"]


def test_it_stays_inside_the_bounds_where_the_plain_t_interval_does_not():
    x = [0.05, 0.6, 0.9, 0.02, 0.75]  # spread over the whole range with few replicates
    plain = mean_ci(x)
    assert plain["low"] < 0  # the kind of interval that reads as broken
    r = bounded_ci(x)
    assert 0 < r["low"] < r["high"] < 1
    ones = bounded_ci([1.0, 1.0, 0.98])  # values at the bound keep a finite logit
    assert 0 < ones["low"] < ones["high"] < 1


@pytest.mark.parametrize("n", [3, 5, 9])
def test_coverage_is_95_percent_on_logit_normal_samples(n):
    # 4000 simulated benches: the standard error of a 95 % coverage is 0.34 %; accept 3.5 of them.
    rng = np.random.default_rng(n)
    mu, sigma, sims = 1.2, 0.8, 4000
    median = special.expit(mu)
    hits = 0
    for _ in range(sims):
        r = bounded_ci(special.expit(rng.normal(mu, sigma, n)))
        hits += r["low"] <= median <= r["high"]
    assert abs(hits / sims - 0.95) < 3.5 * np.sqrt(0.95 * 0.05 / sims)


def test_coverage_of_the_mean_of_a_skewed_beta_with_five_replicates_is_about_95_percent():
    # Beta(8, 2): mean 0.8, skewed towards 1, as final Dice often is. The interval is for the
    # mean logit, so its coverage of the arithmetic mean is near, not exactly, 95 % (measured:
    # 94 % at 5 replicates); accept 92-97 %.
    rng = np.random.default_rng(1)
    hits, sims = 0, 4000
    for _ in range(sims):
        r = bounded_ci(rng.beta(8, 2, 5))
        hits += r["low"] <= 0.8 <= r["high"]
    assert 0.92 <= hits / sims <= 0.97
