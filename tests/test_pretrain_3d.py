"""Pretraining on 3-D corpora: every method runs on cubes (3-D corruptions included), resumes
exactly, and an encoder with no 3-D form is refused by name."""
from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from conftest import textured  # noqa: E402
from warmstart.errors import PretrainError  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

FAST = dict(encoder="unet", encoder_params={"base_width": 4, "depth": 3}, batch_size=8, num_workers=0,
            checkpoint_every=2, deterministic=True, precision="32-true", accelerator="cpu")


@pytest.fixture(scope="module")
def cubes(tmp_path_factory):
    from conftest import tiny_corpus

    return tiny_corpus(tmp_path_factory.mktemp("cubes"), n=2, shape=(16, 48, 48),
                       sampling=dict(spatial_dims=3, patch_size=16, assume_cubic_voxels=True))


def _losses(run: Path) -> dict[int, float]:
    return {int(r["step"]): float(r["loss"]) for r in csv.DictReader(open(run / "history.csv"))}


@pytest.mark.parametrize("method,params", [("simclr", {}), ("moco_v2", {"queue_size": 16}), ("byol", {}),
                                           ("dense", {"max_points": 64}), ("restore", {})])
def test_every_3d_method_trains_a_3d_encoder(cubes, tmp_path, method, params):
    res = pretrain(cubes, tmp_path / "run", PretrainSettings(max_steps=3, method=method, method_params=params, **FAST),
                   progress=False)
    assert res.steps == 3 and all(np.isfinite(v) for v in _losses(res.path).values())
    ck = torch.load(res.path / "checkpoints" / "last.ckpt", weights_only=True)
    conv = ck["state_dict"]["method.encoder.levels.0.conv1.weight"]
    assert tuple(conv.shape) == (4, 1, 3, 3, 3)
    recipe = json.loads((res.path / "recipe.json").read_text())
    assert recipe["pretrain"]["encoder_params"]["spatial_dims"] == 3  # the run says it is 3-D
    assert res.summary["encoder"]["params"]["spatial_dims"] == 3


def test_the_residual_encoder_pretrains_in_3d_with_masked_modelling(cubes, tmp_path):
    s = PretrainSettings(max_steps=2, method="masked", **{**FAST, "encoder": "unet_residual"})
    res = pretrain(cubes, tmp_path / "run", s, progress=False)
    ck = torch.load(res.path / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    assert ck["method.encoder.stem.0.weight"].dim() == 5 and np.isfinite(res.final_loss)


def test_a_resumed_3d_run_joins_the_uninterrupted_loss_curve(cubes, tmp_path):
    # the 3-D views draw from the step's generator: a resume sees the same views
    s = PretrainSettings(max_steps=6, method="dense", method_params={"max_points": 64}, **FAST)
    full = pretrain(cubes, tmp_path / "full", s, progress=False)
    part = tmp_path / "part"
    (part / "checkpoints").mkdir(parents=True)
    shutil.copy(full.path / "checkpoints" / "step-4.ckpt", part / "checkpoints" / "last.ckpt")
    pretrain(cubes, part, s, resume=True, progress=False)
    a, b = _losses(full.path), _losses(part)
    assert sorted(b) == [4, 5]
    for step in b:
        assert b[step] == pytest.approx(a[step], rel=1e-6), step


def test_what_has_no_3d_form_is_refused_by_name(cubes, tmp_path):
    from conftest import tiny_corpus

    with pytest.raises(PretrainError, match="'resnet_narrow' is 2-D only"):
        pretrain(cubes, tmp_path / "r1", PretrainSettings(**{**FAST, "encoder": "resnet_narrow", "encoder_params": {}}),
                 progress=False)
    flat = tiny_corpus(tmp_path / "flat", n=1)
    with pytest.raises(PretrainError, match="2-D patches, but .* spatial_dims = 3"):
        pretrain(flat, tmp_path / "r3", PretrainSettings(**{**FAST, "encoder_params": {"spatial_dims": 3}}), progress=False)


def test_smoke_3d_recipe_runs_end_to_end_from_the_command_line(tmp_path, capsys):
    from warmstart.cli import main

    (tmp_path / "a").mkdir()
    for i in range(2):
        np.save(tmp_path / "a" / f"v{i}.npy", textured(shape=(64, 128, 128), seed=i))
    stated = ["--set", "corpus.read.voxel_size_um=[2.0, 1.0, 1.0]"]  # npy holds no voxel size
    assert main(["-q", "corpus", "build", str(tmp_path / "a"), "-o", str(tmp_path / "c.zarr"), "--recipe", "smoke-3d",
                 *stated]) == 0
    assert main(["-q", "pretrain", str(tmp_path / "c.zarr"), "-o", str(tmp_path / "run"), "--recipe", "smoke-3d"]) == 0
    out = capsys.readouterr().out
    assert "10 steps of simclr on unet" in out
    m = json.loads((tmp_path / "c.zarr" / "manifest.json").read_text())
    assert m["patches"]["shape"] == [1, 16, 16, 16] and m["sources"][0]["downscale_factors"] == [2.0, 4.0, 4.0]


def test_local_shuffle_in_3d_only_permutes_voxels_inside_cubic_tiles():
    from warmstart.pretrain.corrupt import local_shuffle

    x = torch.arange(2 * 10 * 10 * 10, dtype=torch.float32).reshape(2, 1, 10, 10, 10)
    out = local_shuffle(x, torch.tensor([True, False]), torch.Generator().manual_seed(4), block=3, fraction=0.6)
    oz, oy, ox = (int(v) for v in torch.randint(0, 3, (3,), generator=torch.Generator().manual_seed(4)))
    assert torch.equal(out[1], x[1]) and not torch.equal(out[0], x[0])
    ends = [o + ((10 - o) // 3) * 3 for o in (oz, oy, ox)]
    changed = 0
    for tz in range(oz, ends[0], 3):
        for ty in range(oy, ends[1], 3):
            for tx in range(ox, ends[2], 3):
                a, b = x[0, 0, tz:tz + 3, ty:ty + 3, tx:tx + 3], out[0, 0, tz:tz + 3, ty:ty + 3, tx:tx + 3]
                assert torch.equal(a.flatten().sort().values, b.flatten().sort().values)  # same voxels, new places
                changed += int(not torch.equal(a, b))
    assert changed > 0
    inside = torch.zeros(10, 10, 10, dtype=torch.bool)
    inside[oz:ends[0], oy:ends[1], ox:ends[2]] = True
    assert torch.equal(out[0, 0][~inside], x[0, 0][~inside])


@pytest.mark.parametrize("share,low,high", [(0.0, 0.004, 0.4), (1.0, 0.3, 0.99)])
def test_painting_in_3d_replaces_boxes_or_the_rest(share, low, high):
    from warmstart.pretrain.corrupt import bezier_remap, paint

    x = torch.zeros(8, 1, 21, 21, 21)
    x[:, :, 0, 0, 0], x[:, :, 0, 0, 1] = -1.0, 1.0
    out = paint(x, torch.ones(8, dtype=torch.bool), torch.Generator().manual_seed(3), share, boxes=5)
    changed = (out != x).float().mean(dim=(1, 2, 3, 4))
    assert bool(((changed > low) & (changed < high)).all()), changed
    assert out.min() >= -1 and out.max() <= 1
    assert torch.equal(paint(x, torch.zeros(8, dtype=torch.bool), torch.Generator(), share, 5), x)
    # the intensity curve is monotone: every cube keeps the order of its voxel values
    v = torch.randn(3, 1, 6, 6, 6, generator=torch.Generator().manual_seed(1))
    r = bezier_remap(v, torch.ones(3, dtype=torch.bool), torch.Generator().manual_seed(2))
    for i in range(3):
        order = v[i].flatten().argsort()
        assert bool((r[i].flatten()[order].diff() >= -1e-6).all())


def test_restoration_trains_a_3d_decoder(cubes, tmp_path):
    s = PretrainSettings(max_steps=2, method="combined",
                         method_params={"contrastive": "dense", "contrastive_params": {"max_points": 64}}, **FAST)
    res = pretrain(cubes, tmp_path / "run", s, progress=False)
    ck = torch.load(res.path / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    head = next(v for k, v in ck.items() if k.endswith("restore_head.weight"))
    assert head.dim() == 5 and all(np.isfinite(v) for v in _losses(res.path).values())


def test_nan_stop_and_collapse_warning_in_3d(cubes, tmp_path):
    import warnings

    from faulty_methods import NanAfter3  # registers the broken test methods

    NanAfter3.calls = 0
    with pytest.raises(PretrainError, match="loss is nan at step 3"):
        pretrain(cubes, tmp_path / "nan", PretrainSettings(max_steps=8, method="test_nan_after_3", **FAST), progress=False)
    assert (tmp_path / "nan" / "checkpoints" / "step-2.ckpt").exists()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        pretrain(cubes, tmp_path / "col", PretrainSettings(epochs=1, method="test_collapsed", **FAST), progress=False)
    assert any("representation collapse" in str(w.message) for w in caught)


@pytest.mark.slow
def test_ddp_two_cpu_processes_in_3d_end_with_identical_weights(cubes, tmp_path):
    import subprocess
    import sys

    proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", "pretrain", str(cubes), "-o", str(tmp_path / "ddp"),
                           "--recipe", "smoke-3d", "--max-steps", "4", "--devices", "2", "--strategy", "ddp",
                           "--accelerator", "cpu", "--json"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    summary = json.loads((tmp_path / "ddp" / "summary.json").read_text())
    assert len(summary["rank_checksums"]) == 2 and summary["rank_checksums"][0] == summary["rank_checksums"][1]
    assert summary["steps"] == 4 and summary["encoder"]["params"]["spatial_dims"] == 3


def test_the_same_seed_gives_the_same_3d_losses(cubes, tmp_path):
    s = PretrainSettings(max_steps=3, method="masked", **FAST)
    a = pretrain(cubes, tmp_path / "a", s, progress=False)
    b = pretrain(cubes, tmp_path / "b", s, progress=False)
    assert _losses(a.path) == _losses(b.path)
    c = pretrain(cubes, tmp_path / "c", PretrainSettings(max_steps=3, method="masked", **{**FAST, "seed": 1}),
                 progress=False)
    assert _losses(c.path) != _losses(a.path)
