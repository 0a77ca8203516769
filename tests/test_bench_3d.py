"""The volumetric benchmark: sliding-window inference against a whole-volume forward and against
MONAI's ``sliding_window_inference``; the cube split's nesting and gaps; 3-D patches; and a
bench of 2-D and 3-D contenders scored on the same test voxels with the same statistics.

References: MONAI's ``sliding_window_inference`` (Gaussian mode, sigma 1/8 of the window: common
practice) for the blended logits; scipy / the stats module's own functions for the summary.
"""
from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.bench.cubes import labelled_voxels  # noqa: E402
from warmstart.bench.data import load_pairs, make_split  # noqa: E402
from warmstart.bench.feeds import cube_batch, cube_plan  # noqa: E402
from warmstart.bench.settings import BenchSettings  # noqa: E402
from warmstart.bench.window import sliding_window_logits, window_starts  # noqa: E402
from warmstart.errors import VolumeReadError, WarmstartError  # noqa: E402
from warmstart.unet import UNet  # noqa: E402

CUBES = dict(training_set="cubes", sizes=[1, 4, 8], cube_size=24, cube_patch_size=16, cube_batch_size=2,
             region_slices=8, test_regions=2, val_regions=1, gap_slices=3)


def _net3d(classes=3):
    torch.manual_seed(0)
    return UNet("unet", classes, base_width=4, depth=3, spatial_dims=3).eval()


# ----------------------------------------------------------------------------- sliding windows


def test_sliding_windows_over_a_volume_that_fits_equal_one_whole_forward():
    net = _net3d()
    vol = np.random.default_rng(0).normal(size=(16, 24, 32)).astype(np.float32)
    with torch.no_grad():
        whole = net(torch.from_numpy(vol)[None, None])[0]
    ours = sliding_window_logits(net, vol, (16, 24, 32), overlap=0.5)
    torch.testing.assert_close(ours, whole, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("overlap", [0.0, 0.25, 0.5])
def test_blending_returns_the_exact_answer_of_a_pointwise_network(overlap):
    # A 1x1x1 network's output at a voxel does not depend on the window, so any correct blend
    # (weights normalized, every voxel covered) returns the whole-volume forward exactly.
    net = torch.nn.Conv3d(1, 3, 1)
    vol = np.random.default_rng(1).normal(size=(13, 21, 17)).astype(np.float32)
    with torch.no_grad():
        whole = net(torch.from_numpy(vol)[None, None])[0]
    torch.testing.assert_close(sliding_window_logits(net, vol, 8, overlap=overlap), whole, rtol=1e-5, atol=1e-6)


def test_sliding_windows_agree_with_monai():
    from monai.inferers import sliding_window_inference

    net = _net3d()
    vol = np.random.default_rng(2).normal(size=(24, 40, 36)).astype(np.float32)
    with torch.no_grad():
        ref = sliding_window_inference(torch.from_numpy(vol)[None, None], (16, 16, 16), 4, net, overlap=0.5,
                                       mode="gaussian", sigma_scale=0.125)[0]
    ours = sliding_window_logits(net, vol, 16, overlap=0.5)
    torch.testing.assert_close(ours, ref, rtol=1e-3, atol=1e-3)
    assert (ours.argmax(0) == ref.argmax(0)).float().mean() > 0.999


def test_window_starts_cover_every_voxel_and_end_flush():
    for n, w, o in [(100, 32, 0.5), (64, 32, 0.25), (33, 32, 0.5), (7, 32, 0.5)]:
        starts = window_starts(n, w, o)
        covered = np.zeros(max(n, w), bool)
        for s0 in starts:
            covered[s0:s0 + w] = True
        assert covered[:n].all() and starts[-1] == max(0, n - w) and starts == sorted(set(starts))


# ----------------------------------------------------------------------------- the cube split


@pytest.fixture(scope="module")
def thick(tmp_path_factory):
    from warmstart.demo.scenario import write_labelled_set

    return write_labelled_set(tmp_path_factory.mktemp("lab3") / "labelled", n=2, shape=(48, 48, 48))


def test_cube_split_is_deterministic_nested_and_keeps_its_gap(thick):
    pairs = load_pairs(thick)
    s = BenchSettings(**CUBES)
    a = make_split(pairs, s)
    assert a.to_dict() == make_split(pairs, s).to_dict() and len(a.cubes) == 8
    assert make_split(pairs, BenchSettings(**{**CUBES, "split_seed": 1})).to_dict() != a.to_dict()
    assert make_split(pairs, BenchSettings(**{**CUBES, "sizes": [4]})).cubes == a.cubes[:4]  # nested
    slabs = a.test_regions + a.val_regions
    assert len(a.test_regions) == 2 and len(a.val_regions) == 1
    for j, (i, z0, z1) in enumerate(slabs):  # slabs are whole slices and never overlap
        assert z1 - z0 == 8 and all(i != k or z1 <= b or z0 >= c for k, b, c in slabs[j + 1:])
    for i, z, y, x, d, h, w in a.cubes:
        assert (d, h, w) == (24, 24, 24) and 0 <= y <= 24 and 0 <= x <= 24
        for k, z0, z1 in slabs:  # at least gap_slices slices between a cube and any slab of its volume
            assert k != i or z + d + 3 <= z0 or z >= z1 + 3
    # test and validation slices are the slabs' slices; 2-D tiles are the cubes' slices in order
    assert a.test == sorted((i, z) for i, z0, z1 in a.test_regions for z in range(z0, z1))
    assert a.tiles[:24] == [(a.cubes[0][0], a.cubes[0][1] + k, *a.cubes[0][2:4], 24, 24) for k in range(24)]
    assert a.n_tiles(4) == 96 and a.to_dict()["cubes"][0] == list(a.cubes[0])


def test_labelled_voxels_count_the_union_of_the_cubes(thick):
    pairs = load_pairs(thick)
    split = make_split(pairs, BenchSettings(**CUBES))
    masks = [np.zeros(p.label.shape, bool) for p in pairs]
    for n in (1, 4, 8):
        for i, z, y, x, d, h, w in split.cubes[:n]:
            masks[i][z:z + d, y:y + h, x:x + w] = True
        assert labelled_voxels(split, n, [p.label.shape for p in pairs]) == sum(int(m.sum()) for m in masks)
    assert labelled_voxels(split, 1, [p.label.shape for p in pairs]) == 24 ** 3


def test_no_room_for_a_cube_is_a_clear_error(thick):
    pairs = load_pairs(thick)
    with pytest.raises(VolumeReadError, match="no training cube of 40 slices fits 3 slices away"):
        make_split(pairs, BenchSettings(**{**CUBES, "cube_size": 40, "cube_patch_size": 16, "region_slices": 12}))
    with pytest.raises(VolumeReadError, match="room for .* slabs"):
        make_split(pairs, BenchSettings(**{**CUBES, "test_regions": 12}))


def test_cube_patches_are_planned_per_seed_and_keep_image_and_label_aligned(thick):
    pairs = load_pairs(thick)
    s = BenchSettings(**{**CUBES, "epochs": 2, "steps_per_epoch": 3})
    split = make_split(pairs, s)
    plan = cube_plan(split, 4, s, seed=3)
    assert plan.shape == (6, 2, 8) and np.array_equal(plan, cube_plan(split, 4, s, seed=3))
    assert not np.array_equal(plan, cube_plan(split, 4, s, seed=4))
    assert set(np.unique(plan[..., 0])) <= {0, 1, 2, 3} and plan[..., 1:4].max() <= 24 - 16
    # an image equal to 10 x its label: every flip and turn must move both alike
    images = [p.label.astype(np.float32) * 10 for p in pairs]
    for step in plan:
        x, y = cube_batch(images, [p.label for p in pairs], split, step, s)
        assert x.shape == (2, 1, 16, 16, 16) and y.shape == (2, 16, 16, 16)
        assert torch.equal(x[:, 0], y.float() * 10)


# ----------------------------------------------------------------------------- 2-D beside 3-D


def _files(root, thick):
    """A 2-D and a 3-D encoder file from two-step pretraining runs on one labelled image."""
    import shutil

    import warmstart as ws
    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, ReadSettings, SamplingSettings
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    (root / "un").mkdir()
    shutil.copy(thick / "images" / "labelled_00.tif", root / "un" / "a.tif")
    out = []
    for d in (3, 2):
        c = build_corpus(root / "un", root / f"c{d}.zarr", CorpusSettings(
            read=ReadSettings(voxel_size_um=(1.0, 1.0, 1.0)),
            sampling=SamplingSettings(spatial_dims=d, patch_size=16, stride=16)), report=False, progress=False).path
        s = PretrainSettings(encoder="unet", encoder_params={"base_width": 4, "depth": 3}, batch_size=8, max_steps=2,
                             num_workers=0, precision="32-true", accelerator="cpu")
        run = pretrain(c, root / f"run{d}", s, progress=False).path
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out.append(ws.export_encoder(run, root / f"enc{d}d.safetensors")[0])
    return out


def test_2d_and_3d_contenders_share_labels_test_voxels_and_statistics(thick, tmp_path):
    from warmstart.bench.run import run_bench
    from warmstart.bench.stats import paired_difference

    files = _files(tmp_path, thick)
    s = BenchSettings(**{**CUBES, "sizes": [1, 2]}, replicates=2, patch_size=24, batch_size=4, epochs=2,
                      steps_per_epoch=2, early_steps=1, threads=2, window_overlap=0.25)
    res = run_bench(thick, files, tmp_path / "out", s, progress=False)
    saved = json.loads((tmp_path / "out" / "bench.json").read_text())
    ids = [c["id"] for c in saved["contenders"]]
    assert saved["unit"] == "cube" and saved["settings"]["training_set"] == "cubes" and len(ids) == 4
    dims = {c["id"]: c["spec"]["params"].get("spatial_dims", 2) for c in saved["contenders"]}
    assert sorted(dims.values()) == [2, 2, 3, 3]
    # random init of each dimensionality is the file's own architecture
    for c in saved["contenders"]:
        if c["baseline"]:
            assert next(r for r in saved["contenders"] if r["id"] == c["baseline"])["spec"] == c["spec"]
    assert saved["labelled_voxels"] == {"1": 24 ** 3, "2": labelled_voxels(make_split(load_pairs(thick), BenchSettings(
        **{**CUBES, "sizes": [1, 2]})), 2, [(48, 48, 48)] * 2)}
    # every contender is measured on the same test slabs: the labels' measures agree run for run
    truths = {r["contender"]: r["measures"]["1"]["fraction"]["truth"] for r in saved["runs"]}
    assert len({json.dumps(v) for v in truths.values()}) == 1 and len(next(iter(truths.values()))) == 2
    assert all(set(r["test_dice_per_volume"]) == {str(i) for i, _, _ in saved["split"]["test_regions"]}
               for r in saved["runs"])
    # the paired statistics are the 2-D benchmark's, computed from the run records
    for c in saved["contenders"]:
        if not c["baseline"]:
            continue
        a = sorted((r for r in saved["runs"] if r["contender"] == c["id"] and r["size"] == 1), key=lambda r: r["seed"])
        b = sorted((r for r in saved["runs"] if r["contender"] == c["baseline"] and r["size"] == 1), key=lambda r: r["seed"])
        want = paired_difference([r["test_dice"] for r in a], [r["test_dice"] for r in b])
        assert saved["summary"]["1"][c["id"]]["vs_random"]["test_dice"] == pytest.approx(want)
    md = (tmp_path / "out" / "bench.md").read_text()
    assert f"## 1 training cube ({24 ** 3:,} labelled voxels)" in md and "Test Dice per labelled volume" in md
    assert "(3-D)" in md and "(2-D)" in md and "sliding windows" in md and "on every test slab, in 3-D" in md
    assert res["recommendation"]["pairs"] and "labelled cube" in res["recommendation"]["sentence"]
    html = (tmp_path / "out" / "bench.html").read_text()
    assert "training cubes (in order)" in html and "middle slice of each test slab" in html


def test_a_3d_network_is_refused_on_tiles(thick, tmp_path):
    from warmstart.bench.run import run_bench

    s = BenchSettings(training_set="tiles", sizes=[1], replicates=1, tile_size=32, patch_size=16, epochs=1,
                      steps_per_epoch=1, val_slices=2, test_slices=2, random_encoder_params={"spatial_dims": 3})
    with pytest.raises(WarmstartError, match='training_set = "tiles" cannot train a 3-D contender'):
        run_bench(thick, [], tmp_path / "out", s, progress=False)
