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
    assert "pip install -e ." in demo_line


def test_readme_warmstart_commands_run(tmp_path):
    from warmstart.demo.scenario import write_archive

    write_archive(tmp_path / "archive", n_per_scanner=1, shape=(64, 128, 128))
    from warmstart.demo.scenario import write_labelled_set

    write_labelled_set(tmp_path / "labelled", n=2, shape=(16, 64, 64))
    commands = [line for line in LINES if line.startswith("warmstart ")]
    assert len(commands) >= 8
    for line in commands:
        args = shlex.split(line)[1:]
        proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", *args], cwd=tmp_path,
                              capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, (line, proc.stdout[-1500:], proc.stderr[-1500:])
    assert json.loads((tmp_path / "merged.zarr" / "manifest.json").read_text())["counts"]["sources_ok"] == 4
    bench = json.loads((tmp_path / "bench" / "bench.json").read_text())
    assert len(bench["runs"]) == 2 * 2 * 2 and (tmp_path / "bench" / "bench.html").exists()


def test_demo_quick_reuses_finished_stages(tmp_path):
    from warmstart.demo.run import run_demo

    lines: list[str] = []
    first = run_demo(tmp_path / "demo", quick=True, progress=False, echo=lines.append)
    assert first["build"]["n_patches"] > 100 and first["build"]["exit_code"] == 0
    assert all(r["status"] == "ok" for r in first["scan"]["sources"])
    formats = {r["format"] for r in first["scan"]["sources"]}
    assert formats == {"tiff", "slices", "mrc", "ome-zarr"}
    dtypes = {r["dtype"] for r in first["scan"]["sources"]}
    assert dtypes == {"uint8", "uint16", "float32"}
    assert Path(first["report"]).exists()
    again = run_demo(tmp_path / "demo", quick=True, progress=False, echo=lines.append)
    assert again["build"].get("reused") and any("already" in line for line in lines)


@pytest.mark.slow
def test_demo_default_from_the_command_line(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", "demo", "--out", str(tmp_path), "--json"],
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(proc.stdout)
    assert result["build"]["n_patches"] > 500


PYTHON_BLOCKS = re.findall(r"```python\n(.*?)```", README, flags=re.S)


def test_readme_python_snippets_run(tmp_path, monkeypatch):
    import warnings

    import tifffile
    from conftest import textured, tiny_corpus

    import warmstart as ws
    from warmstart.errors import DataMismatchWarning
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    corpus = tiny_corpus(tmp_path, n=2, shape=(8, 64, 64), sampling=dict(patch_size=32, stride=16))
    quick = dict(batch_size=8, max_steps=1, num_workers=0, precision="32-true", accelerator="cpu")
    for name, enc in (("encoder", "resnet18"), ("unet-encoder", "unet")):
        pretrain(corpus, tmp_path / name, PretrainSettings(encoder=enc, **quick), progress=False)
        ws.export_encoder(tmp_path / name, tmp_path / f"{name}.safetensors")
    tifffile.imwrite(tmp_path / "slice.tif", textured(shape=(1, 64, 64), seed=7)[0])
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
