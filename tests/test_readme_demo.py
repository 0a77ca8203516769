"""The README's commands run as written, CI runs the README's test command, and the demo works."""
from __future__ import annotations

import json
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()
BLOCKS = re.findall(r"```sh\n(.*?)```", README, flags=re.S)
LINES = [line.strip() for block in BLOCKS for line in block.splitlines() if line.strip()]


def test_first_paragraph_states_the_job():
    first = README.split("\n\n")[1]
    for word in ("archive", "self-supervised", "encoder", "warm start", "segmentation", "intensity"):
        assert word in first


def test_ci_runs_the_readme_test_command():
    test_line = next(line for line in LINES if "pytest" in line)
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert test_line in ci, "the README's test command and .ci/run have drifted apart"
    demo_line = next(line for line in LINES if line.endswith("warmstart demo"))
    assert "pip install -e '.[demo]'" in demo_line


def test_readme_warmstart_commands_run(tmp_path):
    from warmstart.demo.scenario import write_archive

    write_archive(tmp_path / "archive", n_per_scanner=1, shape=(64, 128, 128))
    from warmstart.demo.scenario import write_labelled_set

    write_labelled_set(tmp_path / "labelled", n=2, shape=(16, 64, 64))
    commands = [line for line in LINES if line.startswith("warmstart ")]
    assert len(commands) >= 8
    for line in commands:
        args = shlex.split(line)[1:]
        if "$FINGERPRINT" in args:  # the README's stand-in for a facility's published value
            from warmstart.export.file import read_manifest

            fingerprint = read_manifest(tmp_path / "encoder.safetensors")["digest"]["sha256"]
            args = [fingerprint if a == "$FINGERPRINT" else a for a in args]
        proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", *args], cwd=tmp_path,
                              capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, (line, proc.stdout[-1500:], proc.stderr[-1500:])
    assert json.loads((tmp_path / "merged.zarr" / "manifest.json").read_text())["counts"]["sources_ok"] == 5
    bench = json.loads((tmp_path / "bench" / "bench.json").read_text())
    assert len(bench["runs"]) == 2 * 2 * 2 and (tmp_path / "bench" / "bench.html").exists()
    from warmstart.export.file import read_manifest

    cubes = read_manifest(tmp_path / "cubes-encoder.safetensors")  # the 3-D section's export
    assert cubes["input"]["spatial_dims"] == 3 and cubes["encoder"]["spec"]["params"]["spatial_dims"] == 3
    b3 = json.loads((tmp_path / "bench3d" / "bench.json").read_text())  # the 3-D bench: cubes, 2-D beside 3-D
    assert b3["unit"] == "cube" and len(b3["contenders"]) == 4 and len(b3["runs"]) == 4 * 2 * 2


TINY_DEMO = ("corpus.sampling.patch_size=32", "corpus.sampling.stride=16", "corpus.workers=1",
             "pretrain.max_steps=3", "pretrain.batch_size=16", "pretrain.checkpoint_every=1",
             "bench.sizes=[1, 2]", "bench.replicates=2", "bench.epochs=1", "bench.steps_per_epoch=3",
             "bench.tile_size=48", "bench.patch_size=32", "bench.val_slices=2", "bench.test_slices=3",
             "bench.early_steps=2")


def test_readme_cluster_template_lines_parse():
    """The SLURM template cannot run here; its warmstart lines must at least be valid commands."""
    from warmstart.cli import build_parser
    from warmstart.recipe import load_recipe

    blocks = re.findall(r"```text\n(.*?)```", README, flags=re.S)
    lines = [line.split("srun ", 1)[-1] for b in blocks for line in b.splitlines()
             if "warmstart " in line and not line.startswith("#")]
    assert len(lines) >= 3
    for line in lines:
        args = build_parser().parse_args(shlex.split(line.replace("$SLURM_ARRAY_TASK_ID", "3"))[1:])
        if getattr(args, "recipe", None):
            load_recipe(args.recipe, args.overrides)


def test_demo_runs_every_stage_and_reuses_them(tmp_path):
    from warmstart.demo.run import DemoPlan, run_demo
    from warmstart.export.file import read_manifest

    plan = DemoPlan(1, (12, 64, 64), 2, (16, 64, 64), "demo-quick", TINY_DEMO)
    lines: list[str] = []
    first = run_demo(tmp_path / "demo", plan=plan, progress=False, echo=lines.append)
    text = "\n".join(lines)
    assert all(r["status"] == "ok" for r in first["scan"]["sources"])
    assert {r["format"] for r in first["scan"]["sources"]} == {"tiff", "slices", "mrc", "ome-zarr"}
    assert {r["dtype"] for r in first["scan"]["sources"]} == {"uint8", "uint16", "float32"}
    assert first["build"]["n_patches"] > 50 and first["pretrain"]["steps"] == 3
    # The exported file describes this corpus and run, and the card was written from it.
    m = read_manifest(first["encoder"])
    assert m["corpus"]["sources"] == 5 and m["training"]["steps"] == 3
    assert "Intended use" in Path(first["card"]).read_text()
    # Bench: random vs the new encoder, every run done, and the table and reports printed.
    assert len(json.loads(Path(first["reports"]["bench_md"]).with_suffix(".json").read_text())["runs"]) == 2 * 2 * 2
    assert "| random init (unet) |" in text and "final test Dice" in text and "early Dice vs random" in text
    for path in first["reports"].values():
        assert Path(path).exists() and path in text
    # Nothing is redone on a rerun: the same files, the same summary.
    before = {p: p.stat().st_mtime_ns for p in (tmp_path / "demo").rglob("*") if p.is_file() and "report" not in p.parts}
    lines.clear()
    again = run_demo(tmp_path / "demo", plan=plan, progress=False, echo=lines.append)
    assert sum("already there" in line or "already built" in line or "already finished" in line
               or "already exported" in line for line in lines) == 4  # archive, corpus, pretraining, export
    assert any("(8 fine-tuning runs, 8 already done)" in line for line in lines)
    assert again["bench"] == first["bench"] and again["stage_seconds"].keys() <= {"scan", "benchmark"}
    changed = [p for p, t in before.items() if p.exists() and p.stat().st_mtime_ns != t and p.suffix != ".md"]
    assert not [p for p in changed if "runs" in p.parts or p.suffix in (".safetensors", ".ckpt", ".zarr")]
    from warmstart.errors import WarmstartError

    with pytest.raises(WarmstartError, match="another variant"):  # finished stages of one plan never feed another
        run_demo(tmp_path / "demo", quick=True, progress=False, echo=lines.append)


TINY_3D = ("corpus.sampling.patch_size=16", "corpus.sampling.stride=16", "corpus.workers=1",
           "pretrain.max_steps=2", "pretrain.batch_size=8", "pretrain.checkpoint_every=1",
           "bench.sizes=[1, 2]", "bench.replicates=2", "bench.epochs=1", "bench.steps_per_epoch=2",
           "bench.cube_size=16", "bench.cube_patch_size=16", "bench.patch_size=16", "bench.region_slices=6",
           "bench.early_steps=1")


def test_the_3d_demo_exports_for_nnunet_and_benches_3d_against_2d(tmp_path):
    import torch

    from warmstart.demo.run import DemoPlan, run_demo
    from warmstart.export.file import read_manifest

    plan = DemoPlan(1, (16, 48, 48), 3, (32, 48, 48), "demo-3d-quick", TINY_3D, recipe_2d="demo-quick")
    lines: list[str] = []
    first = run_demo(tmp_path / "demo", plan=plan, progress=False, echo=lines.append)
    text = "\n".join(lines)
    m3, m2 = read_manifest(first["encoder_3d"]), read_manifest(first["encoder"])
    assert m3["input"]["spatial_dims"] == 3 and m3["encoder"]["spec"]["name"] == "nnunet"
    assert m2["input"].get("spatial_dims", 2) == 2
    # the checkpoint nnU-Net's loader reads: network_weights, loadable without unpickling code
    ckpt = torch.load(first["nnunet"], map_location="cpu", weights_only=True)
    assert any(k.startswith("encoder.") for k in ckpt["network_weights"])
    bench = json.loads(Path(first["reports"]["bench_md"]).with_suffix(".json").read_text())
    dims = sorted(int(c["spec"]["params"].get("spatial_dims", 2)) for c in bench["contenders"])
    assert bench["unit"] == "cube" and dims == [2, 2, 3, 3] and len(bench["runs"]) == 4 * 2 * 2
    assert "training cube" in text and "(3-D)" in text and "nnU-Net" in text and "says nothing about which wins" in text
    # restoration trained nnU-Net's own decoder: the bench says it uses the encoder alone
    assert "nnunet's own, not the benchmark's reference U-Net decoder: only its encoder is used" in \
        Path(first["reports"]["bench_md"]).read_text()
    # rerun: every stage reused (archive, two corpora, two pretraining runs, two exports, the nnU-Net file)
    lines.clear()
    again = run_demo(tmp_path / "demo", plan=plan, progress=False, echo=lines.append)
    assert sum("already" in line for line in lines) >= 8 and again["bench"] == first["bench"]
    assert again["stage_seconds"].keys() <= {"scan", "benchmark"}


@pytest.mark.slow
def test_demo_quick_from_the_command_line(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", "demo", "--quick", "--output", str(tmp_path), "--json"],
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(proc.stdout)
    assert result["build"]["n_patches"] > 300 and result["pretrain"]["steps"] == 200
    sizes = {row["size"] for row in result["bench"]["rows"]} if "rows" in result["bench"] else None
    assert Path(result["reports"]["bench_html"]).exists() and (sizes is None or sizes == {1, 4})
    print(f"demo --quick: {result['seconds']} s, stages {result['stage_seconds']}")


PYTHON_BLOCKS = re.findall(r"```python\n(.*?)```", README, flags=re.S)


def test_readme_python_snippets_run(tmp_path, monkeypatch):
    import warnings

    import numpy as np
    import tifffile
    from conftest import textured, tiny_corpus

    import warmstart as ws
    from warmstart.errors import DataMismatchWarning
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    corpus = tiny_corpus(tmp_path, n=2, shape=(8, 64, 64), sampling=dict(patch_size=32, stride=16))
    quick = dict(batch_size=8, max_steps=1, num_workers=0, precision="32-true", accelerator="cpu")
    for name, enc, method, params in (("encoder", "resnet18", "simclr", {}), ("unet-encoder", "unet", "simclr", {}),
                                      ("whole-unet", "resnet18", "restore", {}),
                                      ("smp-encoder", "smp", "simclr", {"encoder_name": "efficientnet-b0"})):
        pretrain(corpus, tmp_path / name, PretrainSettings(encoder=enc, encoder_params=params, method=method, **quick),
                 progress=False)
        ws.export_encoder(tmp_path / name, tmp_path / f"{name}.safetensors", with_decoder=method == "restore")
    tifffile.imwrite(tmp_path / "slice.tif", textured(shape=(1, 64, 64), seed=7)[0])
    # The 3-D and nnU-Net sections: a cube corpus, a depth-5 3-D U-Net run and an nnU-Net run
    # from a tiny plans file, exported as those sections name their files.
    from tiny_plans import PLANS

    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings
    from warmstart.export.nnunet_file import export_for_nnunet

    (tmp_path / "vols").mkdir()
    np.save(tmp_path / "vols" / "v.npy", textured(shape=(32, 48, 48), seed=3))
    cubes = build_corpus(tmp_path / "vols", tmp_path / "cubes.zarr", CorpusSettings(sampling=SamplingSettings(
        spatial_dims=3, patch_size=16, assume_cubic_voxels=True)), report=False, progress=False).path
    (tmp_path / "nnUNetPlans.json").write_text(json.dumps(PLANS))
    for name, enc, params in (("cubes-encoder", "unet", {"base_width": 4, "depth": 5}),
                              ("nnunet-encoder", "nnunet", {"plans": str(tmp_path / "nnUNetPlans.json"),
                                                            "configuration": "3d_fullres"}),
                              ("dynunet-encoder", "monai_dynunet", {"filters": [4, 8, 16, 32], "strides": [1, 2, 2, 2]})):
        pretrain(cubes, tmp_path / name, PretrainSettings(encoder=enc, encoder_params=params, **quick), progress=False)
        ws.export_encoder(tmp_path / name, tmp_path / f"{name}.safetensors")
    export_for_nnunet(tmp_path / "nnunet-encoder", tmp_path / "pretrained.pth")
    monkeypatch.chdir(tmp_path)
    assert len(PYTHON_BLOCKS) >= 3
    assert any("segmentation_models_pytorch" in b for b in PYTHON_BLOCKS) and any("monai" in b for b in PYTHON_BLOCKS)
    for block in PYTHON_BLOCKS:
        scope: dict = {}
        with warnings.catch_warnings():
            warnings.simplefilter("error", DataMismatchWarning)  # the snippets' image is corpus-like
            exec(compile(block, "README.md", "exec"), scope)  # noqa: S102 - the README's own code
    # The plain-PyTorch snippet really warm-started and ran the network.
    first = next(b for b in PYTHON_BLOCKS if "UNet.from_file" in b)
    scope = {}
    exec(compile(first, "README.md", "exec"), scope)
    assert scope["net"].warm_start_report.complete and tuple(scope["logits"].shape) == (1, 3, 64, 64)
    assert len(scope["features"]) == 5
    whole = next(b for b in PYTHON_BLOCKS if "whole-unet" in b)
    scope = {}
    exec(compile(whole, "README.md", "exec"), scope)
    assert scope["report"].complete and scope["report"].decoder
