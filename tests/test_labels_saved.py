"""Labels saved: the tiles random initialization needs to match a warm start.

Reference for the interpolation: numpy's ``interp`` on the log2(tiles) axis (for a rising curve
the first crossing is the inverse interpolation). The run records are unit fixture data.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from warmstart.bench.labels_saved import labels_saved, labels_saved_sentence, tiles_needed

SIZES = [1, 4, 16]


def _runs(random_means, warm_means, spread=0.0, seeds=5):
    rng = np.random.default_rng(0)
    out = []
    for cid, means in (("random", random_means), ("warm", warm_means)):
        for n, m in zip(SIZES, means):
            for s in range(seeds):
                out.append({"contender": cid, "size": n, "seed": s, "test_dice": m + spread * rng.standard_normal()})
    return out


@pytest.mark.parametrize("target", [0.55, 0.62, 0.7, 0.75, 0.79])
def test_tiles_needed_is_the_inverse_of_numpys_log2_interpolation(target):
    dice = [0.5, 0.7, 0.8]
    want = 2 ** np.interp(target, dice, np.log2(SIZES))  # numpy's interp, on the log2 axis
    assert tiles_needed(SIZES, dice, target) == pytest.approx(want)


def test_tiles_needed_edges():
    assert tiles_needed(SIZES, [0.5, 0.7, 0.8], 0.4) == 1.0        # already there with the fewest tiles
    assert math.isinf(tiles_needed(SIZES, [0.5, 0.7, 0.8], 0.85))  # never there: not extrapolated
    assert tiles_needed(SIZES, [0.5, 0.45, 0.8], 0.6) == pytest.approx(2 ** (2 + (0.6 - 0.45) / 0.35 * 2))
    assert tiles_needed(SIZES, [None, None, None], 0.6) is None


def test_a_warm_start_that_matches_random_init_at_four_tiles_saves_three():
    r = labels_saved(_runs([0.5, 0.7, 0.8], [0.7, 0.8, 0.85]), "warm", "random", 1, SIZES)
    assert r["status"] == "reached" and r["tiles"] == pytest.approx(4.0)
    assert r["low"] == pytest.approx(4.0) and r["high"] == pytest.approx(4.0)  # no spread: no uncertainty
    assert r["n"] == 5
    s = labels_saved_sentence(r, "encoder A")
    assert s.startswith("With 1 labelled tile, encoder A reached the Dice that random initialization reached with "
                        "about 4.0 [4.0, 4.0] tiles") and "n = 5 replicates" in s


def test_more_than_the_largest_size_and_not_reached():
    more = labels_saved(_runs([0.5, 0.7, 0.8], [0.9, 0.9, 0.9]), "warm", "random", 1, SIZES)
    assert more["status"] == "more" and more["tiles"] == "more"
    assert "more than 16 [more than 16, more than 16]" in labels_saved_sentence(more, "A")
    worse = labels_saved(_runs([0.5, 0.7, 0.8], [0.4, 0.6, 0.7]), "warm", "random", 1, SIZES)
    assert worse["status"] == "not_reached" and worse["tiles"] == "not reached"
    assert "did worse than random initialization" in labels_saved_sentence(worse, "A")


def test_the_interval_widens_with_replicate_noise_and_is_repeatable():
    runs = _runs([0.5, 0.7, 0.8], [0.7, 0.8, 0.85], spread=0.03)
    a = labels_saved(runs, "warm", "random", 1, SIZES)
    b = labels_saved(runs, "warm", "random", 1, SIZES)
    assert a == b and json.dumps(a, allow_nan=False)  # seeded bootstrap; plain JSON (bench.json)
    assert a["low"] < a["tiles"] < a["high"] and 1.0 <= a["low"] and a["high"] <= 16.0
