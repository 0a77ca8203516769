"""An encoder file whose manifest or tensors were changed after export is refused by every reader.

The file is edited the way an attacker or a careless script would: the JSON manifest inside the
safetensors header is rewritten (safetensors' header layout: an 8-byte little-endian length, then
the JSON header whose ``__metadata__`` holds string values; the tensor data after it is untouched).
"""
from __future__ import annotations

import json
import struct
import warnings
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

import warmstart as ws  # noqa: E402
from warmstart.cli import main  # noqa: E402
from warmstart.errors import ExportError  # noqa: E402
from warmstart.export.file import METADATA_KEY, read_encoder_file, read_manifest  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402


def _edit_manifest(src: Path, dst: Path, edit) -> None:
    raw = src.read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8:8 + n])
    manifest = json.loads(header["__metadata__"][METADATA_KEY])
    edit(manifest)
    header["__metadata__"][METADATA_KEY] = json.dumps(manifest)
    new = json.dumps(header).encode()
    new += b" " * (-len(new) % 8)  # safetensors pads the header to 8 bytes
    dst.write_bytes(struct.pack("<Q", len(new)) + new + raw[8 + n:])


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    from conftest import tiny_corpus

    root = tmp_path_factory.mktemp("tamper")
    corpus = tiny_corpus(root)
    pretrain(corpus, root / "run", PretrainSettings(max_steps=2, batch_size=16, encoder_params={"base_width": 8},
                                                     num_workers=0, accelerator="cpu", precision="32-true"), progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        path, _ = ws.export_encoder(root / "run", root / "enc.safetensors")
    return path


def _shift_mean(m):
    m["standardization"]["mean"] += 0.5


def test_the_untouched_file_passes_and_prints_its_fingerprint(exported, capsys):
    m = read_manifest(exported)
    assert set(m["digest"]) == {"sections", "manifest_sha256", "sha256"}
    assert main(["inspect", str(exported), "--expect-sha256", m["digest"]["sha256"]]) == 0
    assert m["digest"]["sha256"] in capsys.readouterr().out


@pytest.mark.parametrize("edit, field", [
    (_shift_mean, "standardization"),
    (lambda m: m["intensity"]["rule"].update(percentiles=[2.0, 98.0]), "intensity"),
    (lambda m: m["corpus"].update(clinical=False, sources=99), "corpus"),
    (lambda m: m["tensors"].update(sha256="0" * 64), "tensors"),
])
def test_an_edited_manifest_is_refused_by_every_reader_naming_the_field(exported, tmp_path, edit, field, capsys):
    bad = tmp_path / "edited.safetensors"
    _edit_manifest(exported, bad, edit)
    with pytest.raises(ExportError, match=rf"manifest was altered after export .*{field}"):
        read_manifest(bad)
    with pytest.raises(ExportError, match="altered"):
        ws.load_encoder(bad)
    with pytest.raises(ExportError, match="altered"):
        ws.prepare(np.zeros((8, 8), np.float32), bad)
    with pytest.raises(ExportError, match="altered"):
        ws.warm_start(ws.UNet("resnet_narrow", classes=2, base_width=8), bad)
    assert main(["inspect", str(bad), "--verify"]) == 1
    assert field in capsys.readouterr().err


def test_a_recomputed_section_hash_does_not_fool_the_whole_manifest_hash(exported, tmp_path):
    # Editing a field and its section hash, but not the whole-manifest hash, is still caught.
    from warmstart.export.file import manifest_digest

    def forge(m):
        _shift_mean(m)
        m["digest"]["sections"] = manifest_digest(m)["sections"]

    bad = tmp_path / "forged.safetensors"
    _edit_manifest(exported, bad, forge)
    with pytest.raises(ExportError, match="altered"):
        read_manifest(bad)


def test_a_fully_recomputed_digest_passes_the_file_check_but_not_the_publishers_fingerprint(exported, tmp_path, capsys):
    # Whoever can rewrite a file can recompute its hashes: integrity, not authorship. The fingerprint
    # a facility publishes is what catches that.
    from warmstart.export.file import manifest_digest

    def forge(m):
        _shift_mean(m)
        m["digest"] = manifest_digest(m)

    bad = tmp_path / "reforged.safetensors"
    _edit_manifest(exported, bad, forge)
    assert read_manifest(bad)["standardization"]["mean"] != read_manifest(exported)["standardization"]["mean"]
    published = read_manifest(exported)["digest"]["sha256"]
    assert main(["inspect", str(bad), "--expect-sha256", published]) == 1
    assert "not the expected" in capsys.readouterr().err


def test_flipped_tensor_bytes_are_refused_on_load(exported, tmp_path):
    raw = bytearray(exported.read_bytes())
    raw[-10] ^= 0xFF
    bad = tmp_path / "flipped.safetensors"
    bad.write_bytes(bytes(raw))
    read_manifest(bad)  # the header is intact
    with pytest.raises(ExportError, match="tensors do not match"):
        read_encoder_file(bad)


def test_bench_checks_every_file_before_training_anything(exported, tmp_path):
    from warmstart.bench.run import run_bench
    from warmstart.bench.settings import BenchSettings
    from warmstart.demo.scenario import write_labelled_set

    labelled = write_labelled_set(tmp_path / "lab", n=2, shape=(20, 64, 64))  # unit fixture: generated data

    bad = tmp_path / "edited.safetensors"
    _edit_manifest(exported, bad, _shift_mean)
    with pytest.raises(ExportError, match="altered"):
        run_bench(labelled, [exported, bad], tmp_path / "out", BenchSettings(sizes=[1]), progress=False)
    assert not list((tmp_path / "out" / "runs").glob("*.json"))  # nothing was trained
