"""The few-shot benchmark: metrics and statistics against reference libraries, the split and the
patch plan, and an end-to-end run whose report must agree with its raw runs."""
from __future__ import annotations

import json
import re
import warnings

import numpy as np
import pytest
import torch

from warmstart.bench.data import load_pairs, make_split
from warmstart.bench.settings import BenchSettings
from warmstart.bench.stats import dice_per_class, mean_ci, paired_difference
from warmstart.errors import VolumeReadError


# ----------------------------------------------------------------------------- metrics / statistics


def test_dice_against_hand_computation_torchmetrics_and_monai():
    # By hand: class 1 has |P & G| = 2, |P| = 3, |G| = 3 -> 2*2/6 = 0.667.
    pred = np.array([[0, 1, 1], [1, 0, 2]])
    truth = np.array([[0, 1, 0], [1, 1, 2]])
    d = dice_per_class(pred, truth, 3)
    assert d[1] == pytest.approx(2 * 2 / 6) and d[2] == pytest.approx(1.0) and d[0] == pytest.approx(2 * 1 / 4)
    rng = np.random.default_rng(0)
    p, t = rng.integers(0, 3, (2, 16, 16)), rng.integers(0, 3, (2, 16, 16))
    ours = dice_per_class(p, t, 3)
    # torchmetrics: per-class F1 over pooled voxels equals pooled Dice.
    from torchmetrics.classification import MulticlassF1Score

    tm = MulticlassF1Score(num_classes=3, average=None)(torch.from_numpy(p).flatten(), torch.from_numpy(t).flatten())
    np.testing.assert_allclose(ours, tm.numpy(), rtol=1e-6)
    # MONAI's compute_dice on one-hot maps, with the batch pooled into one image.
    from monai.metrics import compute_dice

    oh = lambda a: torch.nn.functional.one_hot(torch.from_numpy(a).reshape(1, -1), 3).permute(0, 2, 1).float()  # noqa: E731
    mo = compute_dice(oh(p), oh(t), include_background=True)
    np.testing.assert_allclose(ours, mo.numpy()[0], rtol=1e-6)
    # Ignore label: those voxels count for nothing.
    t2 = t.copy()
    t2[0] = 9
    np.testing.assert_allclose(dice_per_class(p, t2, 3, ignore_label=9), dice_per_class(p[1], t[1], 3))


def test_confidence_interval_against_scipy_and_a_worked_example():
    from scipy import stats

    x = [0.71, 0.74, 0.69, 0.80, 0.77, 0.73]
    r = mean_ci(x)
    lo, hi = stats.t.interval(0.95, len(x) - 1, loc=np.mean(x), scale=stats.sem(x))  # scipy's own interval
    assert (r["low"], r["high"]) == pytest.approx((lo, hi))
    # Worked example (textbook arithmetic, from memory): 1..5 has mean 3, s = 1.581, t(0.975, 4) = 2.776.
    r = mean_ci([1, 2, 3, 4, 5])
    assert r["low"] == pytest.approx(3 - 2.7764 * 1.5811 / 5**0.5, abs=1e-3)
    assert mean_ci([0.5])["low"] is None and mean_ci([])["mean"] is None


def test_paired_difference_against_scipy_wilcoxon():
    from scipy import stats

    a = [0.81, 0.79, 0.85, 0.80, 0.83, 0.78, 0.84]
    b = [0.76, 0.78, 0.80, 0.79, 0.75, 0.79, 0.77]
    r = paired_difference(a, b)
    d = np.subtract(a, b)
    assert r["wilcoxon_p"] == pytest.approx(stats.wilcoxon(d).pvalue)
    assert r["mean"] == pytest.approx(d.mean()) and r["wins"] == 6 and r["pairs"] == 7
    assert r["significant"] == (r["low"] > 0)
    assert paired_difference([1, 1], [1, 1])["wilcoxon_p"] is None


# ------------------------------------------------------------------------------------ split, plan


@pytest.fixture(scope="module")
def labelled(tmp_path_factory):
    from warmstart.demo.scenario import write_labelled_set

    return write_labelled_set(tmp_path_factory.mktemp("lab") / "labelled", n=2, shape=(20, 64, 64))


def test_split_is_deterministic_nested_and_keeps_away_from_test_slices(labelled):
    pairs = load_pairs(labelled)
    s = BenchSettings(sizes=[1, 4, 16], tile_size=48, patch_size=32, val_slices=3, test_slices=5, gap_slices=2)
    a, b = make_split(pairs, s), make_split(pairs, s)
    assert a.to_dict() == b.to_dict() and len(a.tiles) == 16
    assert make_split(pairs, BenchSettings(**{**s.to_dict(), "split_seed": 1})).to_dict() != a.to_dict()
    held = set(a.test) | set(a.val)
    assert not set(a.test) & set(a.val) and len(held) == 8
    for i, z, y, x, h, w in a.tiles:
        assert all(not (j == i and abs(z - zz) <= 2) for j, zz in held)
        assert (h, w) == (48, 48) and 0 <= y <= 64 - 48 and 0 <= x <= 64 - 48
    assert make_split(pairs, BenchSettings(**{**s.to_dict(), "sizes": [4]})).tiles[:4] == a.tiles[:4]  # nested


def test_same_seed_same_patches_for_every_contender(labelled):
    from warmstart.bench.train import patch_plan

    s = BenchSettings(sizes=[1, 4], tile_size=48, patch_size=32, epochs=2, steps_per_epoch=3, val_slices=2, test_slices=2)
    split = make_split(load_pairs(labelled), s)
    p = patch_plan(split, 4, s, seed=3)
    assert np.array_equal(p, patch_plan(split, 4, s, seed=3)) and p.shape == (6, 8, 6)
    assert not np.array_equal(p, patch_plan(split, 4, s, seed=4))
    assert set(np.unique(p[..., 0])) <= {0, 1, 2, 3} and p[..., 1].max() <= 16


def test_bad_labelled_sets_name_the_file(tmp_path, labelled):
    import shutil

    import tifffile

    bad = tmp_path / "bad"
    shutil.copytree(labelled, bad)
    tifffile.imwrite(bad / "labels" / "labelled_00.tif", np.zeros((3, 8, 8), np.uint8), imagej=True, metadata={"axes": "ZYX"})
    with pytest.raises(VolumeReadError, match=r"labelled_00.tif.*differ in shape"):
        load_pairs(bad)
    (bad / "labels" / "labelled_01.tif").unlink()
    with pytest.raises(VolumeReadError, match="no matching image/label for labelled_01"):
        load_pairs(bad)
    toml = tmp_path / "pairs.toml"
    toml.write_text(f'[[pair]]\nimage = "{labelled}/images/labelled_00.tif"\nlabel = "{labelled}/labels/labelled_00.tif"\n')
    assert [p.name for p in load_pairs(toml)] == ["labelled_00"]


# ------------------------------------------------------------------------------------- end to end


def _helpful_encoder(labelled, tmp_path):
    """An encoder known to help: a U-Net trained with labels on the same kind of images, whose
    encoder is written into an encoder file (the manifest of a real, quick export)."""
    import warmstart as ws
    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings
    from warmstart.export.file import read_encoder_file, write_encoder_file
    from warmstart.export.pack import encoder_arrays
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings
    from warmstart.unet import UNet

    import shutil

    (tmp_path / "unlabelled").mkdir()  # pretraining saw one of the two labelled volumes
    shutil.copy(labelled / "images" / "labelled_01.tif", tmp_path / "unlabelled" / "scan.tif")
    c = build_corpus(tmp_path / "unlabelled", tmp_path / "c.zarr",
                     CorpusSettings(sampling=SamplingSettings(patch_size=32, stride=16)), report=False, progress=False).path
    params = {"base_width": 8, "depth": 3}
    pretrain(c, tmp_path / "run", PretrainSettings(encoder="unet", encoder_params=params, batch_size=8, max_steps=1,
                                                   num_workers=0, precision="32-true", accelerator="cpu"), progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ws.export_encoder(tmp_path / "run", tmp_path / "quick.safetensors")
    manifest, _ = read_encoder_file(tmp_path / "quick.safetensors")
    pairs = load_pairs(labelled)
    torch.manual_seed(0)
    net = UNet("unet", int(max(p.label.max() for p in pairs)) + 1, **params)
    opt = torch.optim.Adam(net.parameters(), 3e-3)
    st = manifest["standardization"]
    from warmstart.intensity import fit_intensity

    x = np.concatenate([(fit_intensity(p.image).apply(p.image) - st["mean"]) / st["std"] for p in pairs])
    y = np.concatenate([p.label for p in pairs])
    rng = np.random.default_rng(0)
    for _ in range(60):
        k = rng.integers(len(x), size=8)
        loss = torch.nn.functional.cross_entropy(net(torch.from_numpy(x[k, None].astype(np.float32))), torch.from_numpy(y[k]))
        opt.zero_grad()
        loss.backward()
        opt.step()
    write_encoder_file(tmp_path / "helpful.safetensors", encoder_arrays(net.encoder), manifest)
    return tmp_path / "helpful.safetensors"


def test_bench_end_to_end_report_agrees_with_runs_and_resumes(labelled, tmp_path):
    from warmstart.bench.run import run_bench

    enc = _helpful_encoder(labelled, tmp_path)
    s = BenchSettings(sizes=[1, 4], replicates=3, tile_size=48, patch_size=32, epochs=3, steps_per_epoch=4, batch_size=4,
                      val_slices=3, test_slices=4, early_steps=2, lr=2e-3, threads=2)
    res = run_bench(labelled, [enc], tmp_path / "out", s, progress=False)
    runs = res["runs"]
    assert len(runs) == 2 * 2 * 3 and {r["contender"] for r in runs} == {"random", "helpful"}
    saved = json.loads((tmp_path / "out" / "bench.json").read_text())
    md = (tmp_path / "out" / "bench.md").read_text()
    for n in ("1", "4"):
        for cid in ("random", "helpful"):
            vals = [r["test_dice"] for r in saved["runs"] if str(r["size"]) == n and r["contender"] == cid]
            summ = saved["summary"][n][cid]["test_dice"]
            assert summ["mean"] == pytest.approx(np.mean(vals)) and summ["n"] == 3
            assert f"{summ['mean']:.3f} [{summ['low']:.3f}, {summ['high']:.3f}]" in md  # the table shows those numbers
        diff = saved["summary"][n]["helpful"]["vs_random"]["early_dice"]
        by = {(r["contender"], r["seed"]): r["early_dice"] for r in saved["runs"] if str(r["size"]) == n}
        assert diff["mean"] == pytest.approx(np.mean([by["helpful", k] - by["random", k] for k in range(3)]))
    # A supervised encoder of the same task converges faster: early Dice higher on every seed at 1 tile.
    assert saved["summary"]["1"]["helpful"]["vs_random"]["early_dice"]["wins"] == 3
    helpful = next(c for c in saved["contenders"] if c["id"] == "helpful")
    assert helpful["leakage"] == ["labelled_01"] and "tested on data seen in pretraining" in md
    assert "significant at 95 %" in md and re.search(r"random init \(unet\)", md)
    html = (tmp_path / "out" / "bench.html").read_text()
    assert html.count("data:image/png;base64,") == 4  # per-replicate Dice, learning curve, curves, predictions
    # Labels saved: one headline per warm start at 1 tile (4 is the largest size), first in the report.
    from warmstart.bench.labels_saved import labels_saved

    ls = saved["labels_saved"]
    assert [(r["contender"], r["size"]) for r in ls] == [("helpful", 1)]
    assert md.splitlines()[2] == f"**{ls[0]['sentence']}**"
    rec = saved["recommendation"]  # two contenders: one pair per size, Holm over both
    assert rec["sentence"] and md.splitlines()[3] == f"**{rec['sentence']}**" and len(rec["pairs"]) == 2
    assert "| p (Holm) |" in md
    assert labels_saved(saved["runs"], "helpful", "random", 1, [1, 4])["tiles"] == ls[0]["tiles"]
    # Rerun: every finished run is reused, nothing is retrained, the report is identical.
    stamp = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out" / "runs").glob("*.json")}
    again = run_bench(labelled, [enc], tmp_path / "out", s, progress=False)
    assert {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out" / "runs").glob("*.json")} == stamp
    assert again["summary"] == res["summary"]
    # A run record written before the figure was renamed (auc -> curve_area) is read with the new name.
    one = next((tmp_path / "out" / "runs").glob("random-n1-s0.json"))
    rec = json.loads(one.read_text())
    rec["auc"] = rec.pop("curve_area")
    one.write_text(json.dumps(rec))
    assert run_bench(labelled, [enc], tmp_path / "out", s, progress=False)["summary"] == res["summary"]
    # The file is exported again with other weights: its runs are made again, random init's are
    # reused, and the old records are kept under runs/superseded/.
    from warmstart.export.file import read_encoder_file, write_encoder_file

    manifest, arrays = read_encoder_file(enc)
    assert {c["id"]: c["file_digest"] for c in res["contenders"]} == {"random": None, "helpful": manifest["digest"]["sha256"]}
    write_encoder_file(enc, {k: (a * 1.01 if a.dtype.kind == "f" else a) for k, a in arrays.items()}, manifest)
    stamp = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out" / "runs").glob("*.json")}
    with pytest.warns(UserWarning, match=r"6 saved run\(s\) were made otherwise \(the contender"):
        changed = run_bench(labelled, [enc], tmp_path / "out", s, progress=False)
    now = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out" / "runs").glob("*.json")}
    assert {k for k in now if now[k] != stamp[k]} == {k for k in now if k.startswith("helpful")} and len(now) == 12
    kept = list((tmp_path / "out" / "runs" / "superseded").glob("*/helpful-n*-s*"))
    assert sorted(p.name for p in kept if p.suffix == ".json") == sorted(k for k in stamp if k.startswith("helpful"))
    assert any(p.name == "helpful-n1-s0-pred.npz" for p in kept)  # its predictions go with it
    assert [r for r in changed["runs"] if r["contender"] == "random"] == [r for r in runs if r["contender"] == "random"]
    assert "Curve area: the mean validation Dice over the epochs" in md and "(reached) counts those replicates" in md


@pytest.mark.parametrize("option", [{"freeze_encoder_epochs": 2}, {"encoder_lr_factor": 0.0}])
def test_frozen_encoder_and_encoder_lr_factor_keep_the_encoder_weights(labelled, option):
    from warmstart.bench.train import fine_tune
    from warmstart.intensity import fit_intensity
    from warmstart.unet import UNet

    s = BenchSettings(sizes=[1], tile_size=48, patch_size=32, epochs=2, steps_per_epoch=2, batch_size=2,
                      val_slices=2, test_slices=2, early_steps=1, **option)
    pairs = load_pairs(labelled)
    split = make_split(pairs, s)
    built = []

    def make():
        built.append(UNet("unet", 3, base_width=4, depth=3))
        built.append({k: v.clone() for k, v in built[0].named_parameters()})
        return built[0]

    images = [fit_intensity(p.image).apply(p.image) for p in pairs]
    fine_tune(make, images, [p.label for p in pairs], split, 1, 0, 3, s, torch.device("cpu"))
    net, before = built
    after = dict(net.named_parameters())
    assert all(torch.equal(before[k], after[k]) for k in before if k.startswith("encoder."))
    assert any(not torch.equal(before[k], after[k]) for k in before if k.startswith("decoder."))


@pytest.fixture(scope="module")
def report(labelled, tmp_path_factory):
    """One small bench with a warm contender: its report folder."""
    from warmstart.bench.run import run_bench

    tmp = tmp_path_factory.mktemp("report")
    enc = _helpful_encoder(labelled, tmp)
    s = BenchSettings(sizes=[1, 4], replicates=3, tile_size=48, patch_size=32, epochs=2, steps_per_epoch=3, batch_size=4,
                      val_slices=3, test_slices=4, early_steps=2, lr=2e-3, threads=2)
    run_bench(labelled, [enc], tmp / "out", s, progress=False)
    return tmp / "out"


def test_the_html_report_in_a_real_browser(report, tmp_path):
    # Headless Chromium (Debian's package) loads the page: no console errors, a screenshot that is
    # not blank, and every table and figure of the report in the DOM.
    from PIL import Image

    from browser import render

    saved = json.loads((report / "bench.json").read_text())
    dom, shot, log = render(report / "bench.html", tmp_path)
    assert "<h1>Few-shot segmentation benchmark</h1>" in dom
    # the page has no scripts: any console message (a failed resource, a script error) is a fault
    assert ":CONSOLE(" not in log and "Uncaught" not in log and "ERR_FILE_NOT_FOUND" not in log, log[-2000:]
    # headline sentences first, then one table per size, per class, pairs, settings and split
    first = dom.index("class=\"headline\"")
    assert first < dom.index("<table") and saved["labels_saved"][0]["sentence"].split(",")[0] in dom
    # sizes, per class, convergence, per volume, measurement error, pairs, settings, split
    assert dom.count("<table") == len(saved["summary"]) + 7 and "<h2>Convergence</h2>" in dom
    assert "Measurement error" in dom and "mean thickness (px) error" in dom and "; relative " in dom
    # the measurement errors of one run are those of its own recorded values
    run = saved["runs"][0]
    f = run["measures"]["1"]["fraction"]
    assert f["abs_error"] == pytest.approx(np.mean(np.abs(np.subtract(f["pred"], f["truth"]))))
    for title in ("Learning curve", "Final test Dice per replicate", "Validation Dice per epoch", "Test predictions"):
        assert title in dom
    assert dom.count("data:image/png;base64,") == 4 and "<script" not in dom.lower()
    assert "class 0 (background)" in dom and "class 1" in dom  # the legend names every class
    px = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert px.std() > 10 and (px < 128).mean() > 0.005  # text and figures, not a blank page

def test_rerun_reuses_only_the_runs_made_with_the_same_settings(labelled, tmp_path):
    from warmstart.bench.run import run_bench

    out = tmp_path / "out"
    runs_dir = out / "runs"
    s = BenchSettings(sizes=[1], replicates=2, tile_size=32, patch_size=32, epochs=1, steps_per_epoch=2, batch_size=2,
                      val_slices=2, test_slices=2, early_steps=1, threads=2)
    first = run_bench(labelled, [], out, s, progress=False)
    assert all("made_with" not in r for r in first["runs"])  # kept in the records, not in bench.json
    stamp = {p.name: p.stat().st_mtime_ns for p in runs_dir.glob("*.json")}
    assert json.loads((runs_dir / "random-n1-s0.json").read_text())["made_with"]["settings"]["epochs"] == 1
    # More replicates and another thread count: the two saved runs are reused, one run is added.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        more = run_bench(labelled, [], out, BenchSettings(**{**s.to_dict(), "replicates": 3, "threads": 1}), progress=False)
    assert {p.name: p.stat().st_mtime_ns for p in runs_dir.glob("*.json") if p.name in stamp} == stamp
    assert len(more["runs"]) == 3 and more["runs"][:2] == first["runs"]
    # Another fine-tuning length: every saved run is made again; the old records are kept aside.
    longer = BenchSettings(**{**s.to_dict(), "replicates": 3, "epochs": 2})
    with pytest.warns(UserWarning, match=r"3 saved run\(s\) were made otherwise \(epochs 1 -> 2\)"):
        run_bench(labelled, [], out, longer, progress=False)
    (aside,) = (runs_dir / "superseded").iterdir()
    assert sorted(p.name for p in aside.glob("*.json")) == ["random-n1-s0.json", "random-n1-s1.json", "random-n1-s2.json"]
    assert json.loads((aside / "random-n1-s0.json").read_text())["made_with"]["settings"]["epochs"] == 1
    assert json.loads((runs_dir / "random-n1-s0.json").read_text())["made_with"]["settings"]["epochs"] == 2
    # A record from a version that kept no such note, and a damaged one: made again, no traceback.
    rec = json.loads((runs_dir / "random-n1-s0.json").read_text())
    rec.pop("made_with")
    (runs_dir / "random-n1-s0.json").write_text(json.dumps(rec))
    (runs_dir / "random-n1-s1.json").write_text("{\"contender\": ")
    with pytest.warns(UserWarning, match=r"2 saved run\(s\) were made otherwise \(not recorded .*; unreadable"):
        again = run_bench(labelled, [], out, longer, progress=False)
    assert len(list((runs_dir / "superseded").iterdir())) == 2 and len(again["runs"]) == 3
    assert all("made_with" in json.loads(p.read_text()) for p in runs_dir.glob("*.json"))


def test_the_command_line_says_which_saved_runs_it_makes_again_in_one_warning_line(labelled, tmp_path, capsys):
    from warmstart.cli import main

    argv = ["-q", "bench", str(labelled), "-o", str(tmp_path / "out"), "--sizes", "1", "--replicates", "1",
            "--threads", "2", *(x for kv in ("tile_size=32", "patch_size=32", "steps_per_epoch=2", "batch_size=2",
                                             "val_slices=2", "test_slices=2", "early_steps=1") for x in ("--set", f"bench.{kv}"))]
    assert main([*argv, "--epochs", "1"]) == 0
    capsys.readouterr()
    assert main([*argv, "--epochs", "2"]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if "made otherwise" in ln]
    assert len(lines) == 1 and lines[0].startswith("warning: ") and "(epochs 1 -> 2)" in lines[0]
    assert ".py:" not in err and "Traceback" not in err  # no Python file, line or source shown to the user
