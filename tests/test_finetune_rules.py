"""Fine-tuning rules the benchmark applies: class-aware patches, schedules, convergence.

Class-aware sampling follows the common practice of foreground oversampling (nnU-Net forces a
third of its patches onto foreground voxels, Isensee et al., Nature Methods 2021). The poly
decay exponent 0.9 is nnU-Net's (from memory of its PolyLRScheduler); the cosine values are the
closed form torch's own CosineAnnealingLR follows, checked against it below.
"""
from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.bench.data import Split  # noqa: E402
from warmstart.bench.feeds import class_aware_count, cube_plan, patch_plan  # noqa: E402
from warmstart.bench.settings import BenchSettings  # noqa: E402
from warmstart.bench.train import converged  # noqa: E402
from warmstart.errors import RecipeError  # noqa: E402
from warmstart.finetune import lr_factor  # noqa: E402


def _thin_label(shape=(1, 96, 96)):
    """A one-pixel-wide line of class 1 and a 3x3 speck of class 2 in a large background."""
    lab = np.zeros(shape, dtype=np.int64)
    lab[..., 40, :] = 1
    lab[..., 80:83, 10:13] = 2
    return lab


def test_class_aware_patches_hold_the_class_they_were_centred_on():
    lab = _thin_label()
    split = Split(tiles=[(0, 0, 0, 0, 96, 96)])
    s = BenchSettings(tile_size=96, patch_size=16, batch_size=6, epochs=5, steps_per_epoch=10, class_aware_fraction=0.5)
    plan = patch_plan(split, 1, s, seed=3, labels=[lab])
    forced = class_aware_count(6, 0.5)
    assert forced == 3
    for step in plan:
        for j, (_, top, left, *_rest) in enumerate(step):
            window = lab[0, top:top + 16, left:left + 16]
            if j >= 6 - forced:
                assert window.max() > 0  # every forced patch holds a labelled voxel
    forced_hits = [np.isin(2, lab[0, t:t + 16, l:l + 16]) for st in plan for _, t, l, *_ in st[6 - forced:]]
    uniform_hits = [np.isin(2, lab[0, t:t + 16, l:l + 16]) for st in plan for _, t, l, *_ in st[:6 - forced]]
    assert np.mean(forced_hits) > 0.3 > np.mean(uniform_hits)  # the speck: about half of forced, few uniform


def test_class_aware_plans_are_repeatable_and_leave_the_uniform_patches_as_they_were():
    lab = _thin_label()
    split = Split(tiles=[(0, 0, 0, 0, 96, 96)])
    s = BenchSettings(tile_size=96, patch_size=16, batch_size=4, class_aware_fraction=0.33)
    a = patch_plan(split, 1, s, seed=1, labels=[lab])
    assert np.array_equal(a, patch_plan(split, 1, s, seed=1, labels=[lab]))
    plain = patch_plan(split, 1, s, seed=1)
    assert np.array_equal(a[:, :3], plain[:, :3]) and not np.array_equal(a[:, 3], plain[:, 3])


def test_3d_class_aware_patches_are_centred_inside_the_cube():
    lab = np.zeros((40, 40, 40), dtype=np.int64)
    lab[30:32, 5:7, 33:35] = 1
    split = Split(kind="cubes", cubes=[(0, 0, 0, 0, 40, 40, 40)])
    s = BenchSettings(cube_size=40, cube_patch_size=16, cube_batch_size=2, epochs=2, steps_per_epoch=5)
    plan = cube_plan(split, 1, s, seed=0, labels=[lab])
    for step in plan:
        _, z, y, x = step[-1][:4]
        assert lab[z:z + 16, y:y + 16, x:x + 16].max() == 1
        assert 0 <= z <= 24 and 0 <= y <= 24 and 0 <= x <= 24


def test_schedules_follow_their_closed_forms_and_torchs_cosine():
    opt = torch.optim.SGD([torch.nn.Parameter(torch.zeros(1))], lr=1.0)
    ref = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=100)
    for k in range(100):  # torch's CosineAnnealingLR is the reference for the cosine decay
        assert lr_factor(k, 100, "cosine") == pytest.approx(opt.param_groups[0]["lr"], abs=1e-9)
        opt.step()
        ref.step()
    assert lr_factor(0, 100, "cosine", warmup=10) == pytest.approx(0.1)
    assert lr_factor(9, 100, "cosine", warmup=10) == pytest.approx(1.0)
    assert lr_factor(55, 100, "poly", warmup=10) == pytest.approx(0.5 ** 0.9)
    assert lr_factor(70, 100, "constant", warmup=10) == 1.0


def test_the_convergence_rule():
    assert converged([0.2, 0.5, 0.7, 0.705, 0.70, 0.708], epochs=3, margin=0.01)
    assert not converged([0.2, 0.5, 0.6, 0.65, 0.70, 0.74], epochs=3, margin=0.01)
    assert not converged([0.7, 0.7, 0.7], epochs=3, margin=0.01)  # too short to show a plateau


@pytest.mark.parametrize("bad", [{"optimizer": "adam"}, {"schedule": "step"}, {"class_aware_fraction": 1.5},
                                 {"plateau_epochs": 0}, {"inflate": "tile"}, {"momentum": 1.0}])
def test_bad_fine_tuning_settings_are_refused_by_name(bad):
    with pytest.raises(RecipeError, match=next(iter(bad))):
        BenchSettings(**bad)
