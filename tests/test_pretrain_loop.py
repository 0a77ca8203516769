"""The pretraining loop: run folder, deterministic reruns, exact resume, NaN stop, collapse warning, DDP."""
from __future__ import annotations

import csv
import json
import shutil
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.errors import PretrainError  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

from faulty_methods import NanAfter3  # noqa: E402  (registers the broken test methods)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    from conftest import tiny_corpus

    return tiny_corpus(tmp_path_factory.mktemp("pre"))


FAST = dict(encoder_params={"base_width": 8}, batch_size=32, num_workers=0, checkpoint_every=5, deterministic=True,
            precision="32-true", accelerator="cpu")


def _losses(run: Path) -> dict[int, float]:
    return {int(r["step"]): float(r["loss"]) for r in csv.DictReader(open(run / "history.csv"))}


def test_run_folder_history_and_safe_checkpoint(corpus, tmp_path):
    res = pretrain(corpus, tmp_path / "run", PretrainSettings(max_steps=12, **FAST), progress=False)
    run = res.path
    assert res.steps == 12 and sorted(_losses(run)) == list(range(12))
    rows = list(csv.DictReader(open(run / "history.csv")))
    assert {"loss", "lr", "spread", "alignment", "uniformity"} <= set(rows[0])
    ck = torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)  # no pickled code needed
    assert ck["global_step"] == 12 and any(k.startswith("method.encoder.") for k in ck["state_dict"])
    summary = json.loads((run / "summary.json").read_text())
    assert summary["steps"] == 12 and summary["encoder"]["name"] == "resnet_narrow"
    assert json.loads((run / "recipe.json").read_text())["pretrain"]["max_steps"] == 12
    with pytest.raises(PretrainError, match="holds a run already"):
        pretrain(corpus, run, PretrainSettings(max_steps=12, **FAST), progress=False)


def test_run_folder_holds_only_the_documented_files(corpus, tmp_path):
    # The layout documented in warmstart.run_folder (and the README): the training library's own
    # files under lightning/, one history file, no metrics.csv beside it.
    from warmstart import run_folder

    run = pretrain(corpus, tmp_path / "run", PretrainSettings(max_steps=6, method="moco_v2", **FAST), progress=False).path
    documented = {run_folder.RECIPE, run_folder.CORPUS_MANIFEST, run_folder.NETWORKS, run_folder.CHECKPOINTS,
                  run_folder.HISTORY, run_folder.SUMMARY, run_folder.LIBRARY_LOGS}
    top = {p.name for p in run.iterdir()}
    assert top <= documented and documented - {run_folder.LIBRARY_LOGS} <= top
    assert not list(run.rglob("metrics*.csv")) and not (run / "hparams.yaml").exists()
    nets = run_folder.read_networks(run)
    state = torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    assert nets["encoder"] == {"online": "method.encoder.", "momentum": "method.encoder_momentum."}
    assert nets["decoder"] is None and any(k.startswith(nets["encoder"]["momentum"]) for k in state)


def test_progress_to_a_pipe_is_plain_lines(corpus, tmp_path):
    # stderr is a pipe here: no carriage-return bar, a line per interval and one at the end.
    code = ("import sys; from warmstart.pretrain.loop import pretrain; from warmstart.pretrain.settings import "
            f"PretrainSettings; pretrain({str(corpus)!r}, {str(tmp_path / 'run')!r}, PretrainSettings(max_steps=4, "
            f"**{FAST!r}), progress=True)")
    err = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stderr
    assert "\r" not in err
    assert "weights_only" not in err  # Lightning's note on our final checkpoint: we say which one we want
    assert any(line.startswith("pretrain: 4/4 steps (100 %)") for line in err.splitlines()), err


def test_deterministic_reruns_give_identical_losses(corpus, tmp_path):
    s = PretrainSettings(max_steps=10, method="byol", **FAST)
    a = pretrain(corpus, tmp_path / "a", s, progress=False)
    b = pretrain(corpus, tmp_path / "b", s, progress=False)
    assert _losses(a.path) == _losses(b.path)


@pytest.mark.parametrize("method,params,workers", [
    ("moco_v2", {"queue_size": 64}, 0), ("simclr", {}, 2),
    # the views' geometry and the corruptions draw from the step's generator too: resumes stay exact
    ("combined", {"contrastive": "dense", "contrastive_params": {"max_points": 64}}, 0),
])
def test_resume_joins_the_uninterrupted_loss_curve(corpus, tmp_path, method, params, workers):
    s = PretrainSettings(max_steps=24, method=method, method_params=params,
                         **{**FAST, "num_workers": workers, "in_memory": workers == 0})  # workers read from disk
    full = pretrain(corpus, tmp_path / "full", s, progress=False)
    part = tmp_path / "part"
    (part / "checkpoints").mkdir(parents=True)
    shutil.copy(full.path / "checkpoints" / "step-15.ckpt", part / "checkpoints" / "last.ckpt")  # as if killed at 15
    pretrain(corpus, part, s, resume=True, progress=False)
    a, b = _losses(full.path), _losses(part)
    assert sorted(b) == list(range(15, 24))
    for step in b:
        assert b[step] == pytest.approx(a[step], rel=1e-6), step


def test_nonfinite_loss_stops_and_keeps_the_last_good_checkpoint(corpus, tmp_path):
    NanAfter3.calls = 0
    s = PretrainSettings(max_steps=20, method="test_nan_after_3", **{**FAST, "checkpoint_every": 2})
    with pytest.raises(PretrainError, match="loss is nan at step 3"):
        pretrain(corpus, tmp_path / "run", s, progress=False)
    kept = sorted(p.name for p in (tmp_path / "run" / "checkpoints").glob("step-*.ckpt"))
    assert kept == ["step-2.ckpt"]
    assert torch.load(tmp_path / "run" / "checkpoints" / "step-2.ckpt", weights_only=True)["global_step"] == 2


def test_collapse_warning_for_a_collapsed_encoder(corpus, tmp_path):
    s = PretrainSettings(epochs=1, method="test_collapsed", **FAST)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = pretrain(corpus, tmp_path / "run", s, progress=False)
    assert any("representation collapse" in str(w.message) for w in caught)
    assert res.summary["final_spread"] < 0.1
    healthy = pretrain(corpus, tmp_path / "ok", PretrainSettings(max_steps=5, **FAST), progress=False)
    assert healthy.summary["final_spread"] > 0.3
    # Restoration does not learn an embedding: the same low spread is logged but not called collapse.
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = pretrain(corpus, tmp_path / "restore", PretrainSettings(epochs=1, method="test_collapsed_restore", **FAST),
                       progress=False)
    assert res.summary["final_spread"] < 0.1
    assert not any("representation collapse" in str(w.message) for w in caught)


def test_mixed_precision_runs_on_cpu(corpus, tmp_path, monkeypatch):
    """bf16 autocast (the GPU default where supported) exercised on the CPU: a regression test for
    views that mixed bfloat16 and float32 tensors. On a CPU without native bf16 a run is refused
    (tests/test_cpu_compute.py); here the check is told yes, so four tiny steps run emulated."""
    import warmstart.pretrain.precision as precision

    monkeypatch.setattr(precision, "native_low_precision", lambda dtype: True)
    s = PretrainSettings(max_steps=4, method="moco_v2", method_params={"queue_size": 64}, **{**FAST, "precision": "bf16-mixed"})
    res = pretrain(corpus, tmp_path / "bf16", s, progress=False)
    assert res.steps == 4 and np.isfinite(res.final_loss)


def test_unknown_source_weight_and_missing_resume(corpus, tmp_path):
    with pytest.raises(PretrainError, match="not a source"):
        pretrain(corpus, tmp_path / "r", PretrainSettings(source_weights={"nope.tif": 1.0}, **FAST), progress=False)
    with pytest.raises(PretrainError, match="nothing to resume"):
        pretrain(corpus, tmp_path / "r2", PretrainSettings(**FAST), resume=True, progress=False)


def _cli(*args):
    return [sys.executable, "-m", "warmstart", "-q", "pretrain", *map(str, args)]


def _latest_step(run: Path) -> int:
    steps = [int(p.stem.split("-")[1]) for p in (run / "checkpoints").glob("step-*.ckpt")] if (run / "checkpoints").exists() else []
    return max(steps, default=-1)


@pytest.mark.slow
def test_kill_and_resume_a_real_training_process(corpus, tmp_path):
    common = ["--recipe", "smoke", "--max-steps", "300", "--deterministic", "--set", "pretrain.checkpoint_every=10"]
    subprocess.run(_cli(corpus, "-o", tmp_path / "full", *common), check=True, capture_output=True)
    run = tmp_path / "killed"
    proc = subprocess.Popen(_cli(corpus, "-o", run, *common), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 300
    while time.time() < deadline and _latest_step(run) < 30:  # older checkpoints are pruned: look for any >= 30
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    killed_at = _latest_step(run)
    assert 30 <= killed_at < 300 and not (run / "summary.json").exists(), "the run was not killed mid-way"
    subprocess.run(_cli(corpus, "-o", run, *common, "--resume"), check=True, capture_output=True)
    a, b = _losses(tmp_path / "full"), _losses(run)
    assert set(range(killed_at, 300)) <= set(b)  # the resumed part, and the killed part's flushed rows
    for step, loss in b.items():  # deterministic: the killed part and the resumed part both match
        assert loss == pytest.approx(a[step], rel=1e-6), step
    assert torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)["global_step"] == 300


@pytest.mark.slow
def test_ddp_two_cpu_processes_end_with_identical_weights(corpus, tmp_path):
    proc = subprocess.run(_cli(corpus, "-o", tmp_path / "ddp", "--recipe", "smoke", "--max-steps", "6", "--devices", "2",
                               "--strategy", "ddp", "--accelerator", "cpu", "--json"),
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    summary = json.loads((tmp_path / "ddp" / "summary.json").read_text())
    checks = summary["rank_checksums"]
    assert len(checks) == 2 and checks[0] == checks[1]
    assert summary["steps"] == 6


def test_knn_accuracy_against_brute_force_and_in_a_run(corpus, tmp_path):
    from warmstart.pretrain.monitors import knn_accuracy

    g = torch.Generator().manual_seed(0)
    z, y = torch.randn(60, 8, generator=g), torch.randint(0, 3, (60,), generator=g)
    zn = (z / z.norm(dim=1, keepdim=True)).numpy().astype(np.float64)
    sim = zn @ zn.T
    np.fill_diagonal(sim, -np.inf)
    correct = 0
    for i in range(60):  # brute force: 20 nearest others, votes weighted by exp(sim / 0.07)
        nn = np.argsort(-sim[i])[:20]
        votes = np.zeros(3)
        for j in nn:
            votes[y[j]] += np.exp(sim[i, j] / 0.07)
        correct += votes.argmax() == y[i]
    assert knn_accuracy(z, y) == pytest.approx(correct / 60)
    clusters = torch.cat([torch.randn(30, 8, generator=g) * 0.05 + c for c in (torch.eye(8)[0] * 3, torch.eye(8)[1] * 3)])
    assert knn_accuracy(clusters, torch.repeat_interleave(torch.tensor([0, 1]), 30)) == 1.0
    # in a run: a probe of bright and dark patches, one figure per epoch
    rng = np.random.default_rng(0)
    patches = np.concatenate([rng.random((20, 1, 32, 32)) * 0.2, 0.8 + rng.random((20, 1, 32, 32)) * 0.2]).astype(np.float32)
    np.savez(tmp_path / "probe.npz", patches=patches, labels=np.repeat([0, 1], 20))
    res = pretrain(corpus, tmp_path / "run", PretrainSettings(epochs=2, probe=str(tmp_path / "probe.npz"), **FAST), progress=False)
    assert len(res.summary["knn_per_epoch"]) == 2 and all(0 <= a <= 1 for a in res.summary["knn_per_epoch"])
    rows = list(csv.DictReader(open(res.path / "history.csv")))
    assert sum(1 for r in rows if r["knn"]) == 2 and all(r["loss"] for r in rows)


def test_cli_pretrain_prints_no_library_advertisements(corpus, tmp_path):
    # Lightning's start-up lines ("Tip: ...", "GPU available: ...") are silenced by default, not only under -q.
    cmd = [sys.executable, "-m", "warmstart", "pretrain", str(corpus), "-o", str(tmp_path / "run"), "--max-steps", "2",
           "--batch-size", "32", "--loader-workers", "0", "--accelerator", "cpu", "--set", "encoder_params={base_width=8}"]
    out = subprocess.run(cmd, capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert "Tip" not in out.stderr and "GPU available" not in out.stderr and "TPU available" not in out.stderr
    assert "2 steps of simclr" in out.stdout
