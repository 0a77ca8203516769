"""The standing fault suite: concurrent writers, damaged inputs and bad output paths.

Each case ends in a clean result or a named error (never a traceback, a hang or a silent wrong
result). Fixtures are generated in the tests.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from conftest import textured
from warmstart.base.lock import OutputBusyError, lock_path, output_lock
from warmstart.corpus.build import build_corpus
from warmstart.corpus.settings import CorpusSettings, SamplingSettings

TINY = CorpusSettings(sampling=SamplingSettings(patch_size=32, max_per_source=20))


@pytest.fixture
def archive(tmp_path):
    root = tmp_path / "archive"
    root.mkdir()
    np.save(root / "v.npy", textured(shape=(16, 64, 64)))
    return root


# --- one writer per output -------------------------------------------------------------------
def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_second_build_into_a_live_build_is_refused_with_the_holder(archive, tmp_path, capsys):
    from warmstart.cli import main

    out = tmp_path / "c.zarr"
    with output_lock(out, "corpus build"):
        with pytest.raises(OutputBusyError, match=r"corpus build \(process \d+ on .*\) is writing here"):
            build_corpus(archive, out, TINY, report=False, progress=False)
        assert main(["-q", "corpus", "build", str(archive), "-o", str(out)]) == 1
        assert "is writing here" in capsys.readouterr().err
    assert not out.exists()  # the refused build wrote nothing
    assert build_corpus(archive, out, TINY, report=False, progress=False).exit_code == 0
    assert not lock_path(out).exists()  # released on exit


def test_a_stale_lock_of_a_dead_process_is_taken_over(archive, tmp_path):
    import socket

    out = tmp_path / "c.zarr"
    lock_path(out).write_text(json.dumps({"pid": _dead_pid(), "host": socket.gethostname(), "what": "corpus build"}))
    assert build_corpus(archive, out, TINY, report=False, progress=False).exit_code == 0


def test_a_lock_from_another_host_is_respected_and_says_how_to_clear_it(archive, tmp_path):
    out = tmp_path / "c.zarr"
    lock_path(out).write_text(json.dumps({"pid": 1, "host": "some-other-node", "what": "corpus build"}))
    with pytest.raises(OutputBusyError, match="some-other-node.*delete"):
        build_corpus(archive, out, TINY, report=False, progress=False)


@pytest.mark.parametrize("command", ["pretrain", "bench", "merge"])
def test_pretrain_bench_and_merge_outputs_are_locked_too(tmp_path, command, capsys):
    from warmstart.cli import main

    out = tmp_path / "out"
    argv = {"pretrain": ["pretrain", str(tmp_path / "c.zarr"), "-o", str(out)],
            "bench": ["bench", str(tmp_path / "labelled"), "-o", str(out)],
            "merge": ["corpus", "merge", str(tmp_path / "a.zarr"), "-o", str(out)]}[command]
    if command != "merge":
        pytest.importorskip("torch")
    with output_lock(out, "something else"):
        assert main(["-q", *argv]) == 1
    assert "something else (process" in capsys.readouterr().err


# --- a full disk -----------------------------------------------------------------------------
def test_a_full_disk_mid_build_names_the_path_and_the_rerun_resumes(tmp_path, monkeypatch, capsys):
    import errno

    from warmstart.cli import main
    from warmstart.corpus.store import StoreWriter, open_corpus

    root = tmp_path / "archive"
    root.mkdir()
    for i in range(3):
        np.save(root / f"v{i}.npy", textured(shape=(16, 64, 64), seed=i))
    argv = ["-q", "corpus", "build", str(root), "-o", str(tmp_path / "c.zarr"), "--patch-size", "32", "--workers", "1",
            "--no-report"]
    real = StoreWriter.journal
    calls = {"n": 0}

    def full_disk(self, record, columns, start):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError(errno.ENOSPC, "No space left on device", str(self.journal_dir / "000001.json"))
        return real(self, record, columns, start)

    monkeypatch.setattr(StoreWriter, "journal", full_disk)
    assert main(argv) == 1
    err = capsys.readouterr().err
    assert "000001.json: no space left on device" in err and "Traceback" not in err
    assert not (tmp_path / "c.zarr" / "manifest.json").exists()  # nothing passes as finished
    monkeypatch.setattr(StoreWriter, "journal", real)
    assert main(argv) == 0
    main(["-q", "corpus", "build", str(root), "-o", str(tmp_path / "ref.zarr"), "--patch-size", "32", "--workers", "1",
          "--no-report"])
    np.testing.assert_array_equal(open_corpus(tmp_path / "c.zarr").read(), open_corpus(tmp_path / "ref.zarr").read())


def test_a_full_disk_during_export_leaves_no_file(tmp_path, monkeypatch):
    import errno

    import safetensors.numpy

    from warmstart.errors import ExportError
    from warmstart.export.file import write_encoder_file

    def full_disk(arrays, filename, metadata=None):
        Path(filename).write_bytes(b"half a file")
        raise OSError(errno.ENOSPC, "No space left on device", filename)

    monkeypatch.setattr(safetensors.numpy, "save_file", full_disk)
    with pytest.raises(ExportError, match="No space left on device"):
        write_encoder_file(tmp_path / "e.safetensors", {"w": np.zeros(3, np.float32)}, {"format": "warmstart-encoder"})
    assert list(tmp_path.iterdir()) == []


# --- output paths ----------------------------------------------------------------------------
def test_output_paths_that_cannot_be_used_get_a_message_and_nothing_is_overwritten(archive, tmp_path, capsys):
    from warmstart.cli import main
    from warmstart.export.file import write_encoder_file

    a_file = tmp_path / "notes.txt"
    a_file.write_text("keep me")
    assert main(["-q", "corpus", "build", str(archive), "-o", str(a_file)]) == 1
    assert "is a file, not a folder" in capsys.readouterr().err and a_file.read_text() == "keep me"
    # an encoder file aimed at a folder, or over a file that is not one of ours
    folder = tmp_path / "models"
    folder.mkdir()
    from warmstart.errors import ExportError

    with pytest.raises(ExportError, match="is a folder"):
        write_encoder_file(folder, {"w": np.zeros(2, np.float32)}, {})
    assert list(folder.iterdir()) == [] and not list(tmp_path.glob(".*.partial"))
    with pytest.raises(ExportError, match="not a warmstart encoder file; not overwriting"):
        write_encoder_file(a_file, {"w": np.zeros(2, np.float32)}, {})
    assert a_file.read_text() == "keep me"


def test_pretrain_into_a_file_is_refused(tmp_path, capsys):
    pytest.importorskip("torch")
    from conftest import tiny_corpus
    from warmstart.cli import main

    corpus = tiny_corpus(tmp_path / "t")
    target = tmp_path / "run"
    target.write_text("x")
    assert main(["-q", "pretrain", str(corpus), "-o", str(target)]) == 1
    err = capsys.readouterr().err
    assert str(target) in err and "Traceback" not in err and target.read_text() == "x"


# --- slice geometry --------------------------------------------------------------------------
def test_a_dicom_series_with_slices_missing_is_refused_naming_the_gap(tmp_path):
    # A CT series written with pydicom from its shipped CT_small.dcm; six slices deleted.
    from conftest import write_dicom_series
    from warmstart.errors import VolumeReadError
    from warmstart.volumes import discover, open_volume

    paths = write_dicom_series(tmp_path / "ct", np.zeros((16, 32, 32), np.float32), spacing_mm=(2.5, 0.5, 0.5))
    for p in paths[5:11]:
        p.unlink()
    (cand,) = discover(tmp_path / "ct")[0]
    with pytest.raises(VolumeReadError, match=r"slices missing between positions 10 and 27.5 mm .*step of 17.5 .* 2.5"):
        open_volume(cand)


def test_a_dicom_series_with_a_duplicate_position_is_refused(tmp_path):
    import pydicom

    from conftest import write_dicom_series
    from warmstart.errors import VolumeReadError
    from warmstart.volumes import discover, open_volume

    paths = write_dicom_series(tmp_path / "ct", np.zeros((6, 32, 32), np.float32))
    ds = pydicom.dcmread(paths[3])
    ds.ImagePositionPatient = pydicom.dcmread(paths[2]).ImagePositionPatient
    ds.save_as(paths[3])
    (cand,) = discover(tmp_path / "ct")[0]
    with pytest.raises(VolumeReadError, match="two slices at one position"):
        open_volume(cand)


def test_a_slice_folder_with_a_numbering_gap_is_refused_and_an_even_one_is_not(tmp_path):
    from PIL import Image

    from warmstart.errors import VolumeReadError
    from warmstart.volumes import discover, open_volume

    for name, numbers in (("gap", [0, 1, 2, 3, 5, 6, 7]), ("even", [0, 2, 4, 6, 8])):
        (tmp_path / name).mkdir()
        for i, sl in zip(numbers, textured(shape=(len(numbers), 40, 40), dtype=np.uint8, lo=5, hi=250)):
            Image.fromarray(sl).save(tmp_path / name / f"layer_{i:04d}.png")
    (gap,) = discover(tmp_path / "gap")[0]
    with pytest.raises(VolumeReadError, match=r"slices missing between positions 3 and 5 \(layer_0003.png\) "
                                              r"\(layer_0005.png\)"):
        open_volume(gap)
    (even,) = discover(tmp_path / "even")[0]
    assert open_volume(even).shape == (5, 40, 40)  # every second slice exported: evenly spaced, accepted


# --- missing chunks in a source zarr volume --------------------------------------------------
def _ome(tmp_path, data):
    from ome_zarr.writer import write_image

    path = tmp_path / "grain.ome.zarr"
    write_image(data, str(path), scale_factors=[2], axes="zyx", scale={"z": 1.0, "y": 1.0, "x": 1.0},
                axes_units={a: "micrometer" for a in "zyx"}, storage_options={"chunks": (8, 32, 32)})
    return path


def _finest(path):
    import zarr

    from warmstart.volumes.zarr import ome_levels

    group = zarr.open_group(str(path), mode="r")
    name = ome_levels(group.attrs.asdict(), 3)[0][0]["path"]  # "0" or "s0", as the writer's version names it
    return group[name], name


def test_missing_chunks_of_a_source_are_gaps_not_zeros(tmp_path):
    import warnings

    import zarr

    from warmstart.intensity import IntensitySettings, fit_intensity
    from warmstart.volumes import open_volume

    data = textured(shape=(16, 64, 64), dtype=np.uint16, lo=6000, hi=20000)
    path = _ome(tmp_path, data)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clean = fit_intensity(open_volume(path), IntensitySettings())
    level0, name = _finest(path)
    (path / name / level0.metadata.encode_chunk_key((0, 0, 0))).unlink()
    (path / name / level0.metadata.encode_chunk_key((1, 1, 1))).unlink()
    with pytest.warns(UserWarning, match="2 of 8 chunk files are missing"):
        vol = open_volume(path)
    block = vol.read()
    assert np.isnan(block[:8, :32, :32]).all() and np.isfinite(block[8:, :32, :32]).all()
    assert vol.meta["missing_chunks"] == 2
    damaged = fit_intensity(vol, IntensitySettings())
    # zarr alone would read the gaps as zeros and put the 0.5 % percentile at 0
    assert damaged.stats["percentiles"]["0.5"] > 5000
    assert damaged.stats["percentiles"]["0.5"] == pytest.approx(clean.stats["percentiles"]["0.5"], rel=0.05)


def test_missing_chunks_stay_out_of_the_patches_and_are_reported(tmp_path):
    import zarr

    from warmstart.corpus.store import open_corpus

    (tmp_path / "a").mkdir()
    data = textured(shape=(16, 64, 64), dtype=np.uint16, lo=6000, hi=20000)
    path = _ome(tmp_path / "a", data)
    arr, name = _finest(path)
    (path / name / arr.metadata.encode_chunk_key((0, 0, 0))).unlink()
    res = build_corpus(tmp_path / "a", tmp_path / "c.zarr", TINY, report=False, progress=False)
    store = open_corpus(res.path)
    e = store.manifest["sources"][0]
    assert any("chunk files are missing" in w for w in e["warnings"])
    assert e["counts"]["nonfinite"] > 0 and np.isfinite(store.read()).all()


def test_a_zarr_array_with_every_chunk_missing_is_refused_by_name(tmp_path):
    import zarr

    from warmstart.corpus.scan import scan_archive

    (tmp_path / "a").mkdir()
    arr = zarr.create_array(str(tmp_path / "a" / "v.zarr"), shape=(8, 32, 32), dtype="uint16", chunks=(4, 16, 16))
    arr[:] = textured(shape=(8, 32, 32), dtype=np.uint16)
    for coords in np.ndindex(2, 2, 2):
        (tmp_path / "a" / "v.zarr" / arr.metadata.encode_chunk_key(coords)).unlink()
    (row,) = scan_archive(tmp_path / "a", TINY, progress=False).rows
    assert row["status"] != "ok" and "all 8 chunk files are missing" in row["reason"]


# --- labelled sets ---------------------------------------------------------------------------
def _pair(folder, name, image, label):
    import tifffile

    (folder / "images").mkdir(parents=True, exist_ok=True)
    (folder / "labels").mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(folder / "images" / name, image)
    tifffile.imwrite(folder / "labels" / name, label)


def test_images_and_labels_pair_on_the_full_name(tmp_path):
    from warmstart.bench.data import read_pairs

    img, lab = textured(shape=(4, 32, 32)), np.zeros((4, 32, 32), np.uint8)
    _pair(tmp_path / "set", "scan.v1.tif", img, lab)
    _pair(tmp_path / "set", "scan.v2.tif", img, lab)
    assert [name for name, _, _ in read_pairs(tmp_path / "set")] == ["scan.v1", "scan.v2"]  # two pairs, not one
    _pair(tmp_path / "dup", "a.tif", img, lab)
    import tifffile

    tifffile.imwrite(tmp_path / "dup" / "images" / "a.tiff", img)
    from warmstart.errors import VolumeReadError

    with pytest.raises(VolumeReadError, match="a.tif and a.tiff have the same name 'a'"):
        read_pairs(tmp_path / "dup")


def test_sparse_label_values_are_refused_with_the_values_and_the_remedy(tmp_path):
    from warmstart.bench.data import load_pairs, n_classes
    from warmstart.errors import VolumeReadError

    lab = np.zeros((6, 32, 32), np.uint16)
    lab[:, 8:16] = 30000
    lab[:, 16:] = 60000
    _pair(tmp_path / "set", "s.tif", textured(shape=(6, 32, 32)), lab)
    pairs = load_pairs(tmp_path / "set")
    with pytest.raises(VolumeReadError, match=r"s.tif: labels take 3 values \(0, 30000, 60000\).*0\.\.2"):
        n_classes(pairs)


# --- tiny and empty corpora ------------------------------------------------------------------
def test_the_smoke_recipe_trains_on_the_tiny_corpus_it_builds(tmp_path):
    # Two stacks of 16 x 128 x 128: the smoke recipe keeps fewer patches than its batch of 32.
    pytest.importorskip("torch")
    from warmstart.pretrain.loop import pretrain
    from warmstart.recipe import load_recipe

    root = tmp_path / "archive"
    root.mkdir()
    for i in range(2):
        np.save(root / f"s{i}.npy", textured(shape=(16, 128, 128), seed=i))
    r = load_recipe("smoke", ["pretrain.max_steps=2"], default_section="pretrain")
    res = build_corpus(root, tmp_path / "c.zarr", r.corpus, report=False, progress=False)
    assert 2 <= res.n_patches < r.pretrain.batch_size
    with pytest.warns(UserWarning, match=f"{res.n_patches} patches make no batch of 32"):
        run = pretrain(res.path, tmp_path / "run", r.pretrain, progress=False)
    assert run.steps == 2
    assert json.loads((tmp_path / "run" / "recipe.json").read_text())["pretrain"]["batch_size"] == res.n_patches


def test_a_corpus_that_keeps_no_patch_is_an_error_at_build_time(archive, tmp_path, capsys):
    from warmstart.cli import main

    out = tmp_path / "c.zarr"
    assert main(["-q", "corpus", "build", str(archive), "-o", str(out), "--patch-size", "32",
                 "--set", "filters.min_std=50"]) == 1
    err = capsys.readouterr().err
    assert "no patch was kept" in err and "low variance" in err
    assert not (out / "manifest.json").exists()


# --- odd names, bad values, leftovers --------------------------------------------------------
def test_a_file_name_that_is_not_utf8_builds_shows_and_reports(tmp_path, capsys):
    import os

    from warmstart.cli import main

    root = tmp_path / "archive"
    root.mkdir()
    with open(os.fsencode(root) + b"/caf\xe9.npy", "wb") as fh:  # Latin-1 bytes, as an old share may hold
        np.save(fh, textured(shape=(16, 64, 64)))
    out = tmp_path / "c.zarr"
    assert main(["-q", "corpus", "build", str(root), "-o", str(out), "--patch-size", "32"]) == 0
    assert main(["-q", "corpus", "show", str(out)]) == 0
    text = capsys.readouterr().out
    assert "caf" in text and "Traceback" not in text
    assert "caf\ufffd.npy" in (out / "report" / "summary.md").read_text()


@pytest.mark.parametrize("override, message", [
    ("filters.min_std=nan", "must be a finite number"),
    ("filters.min_std=inf", "must be a finite number"),
    ("sampling.seed=-1", "sampling.seed must be >= 0"),
])
def test_non_finite_numbers_and_negative_seeds_are_refused_before_anything_is_written(archive, tmp_path, override,
                                                                                      message, capsys):
    from warmstart.cli import main

    out = tmp_path / "c.zarr"
    assert main(["-q", "corpus", "build", str(archive), "-o", str(out), "--set", override]) == 1
    assert message in capsys.readouterr().err and not out.exists()


def test_per_source_warnings_are_printed(tmp_path, capsys):
    from warmstart.cli import main

    root = tmp_path / "archive"
    root.mkdir()
    np.save(root / "v.npy", textured(shape=(16, 64, 64)))
    out = tmp_path / "c.zarr"
    # a 0.25 µm target on a 1 µm volume: upsampling 4x, which the build notes for the source
    assert main(["-q", "corpus", "build", str(root), "-o", str(out), "--patch-size", "32", "--target-voxel-um", "0.25",
                 "--set", "read.voxel_size_um=[1.0, 1.0, 1.0]", "--no-report"]) == 0
    assert "warning: v.npy: upsampling" in capsys.readouterr().out


def test_exported_files_follow_the_users_umask(tmp_path):
    import os
    import stat

    from warmstart.export.file import write_encoder_file

    old = os.umask(0o022)
    try:
        path = write_encoder_file(tmp_path / "e.safetensors", {"w": np.zeros(2, np.float32)}, {"format": "x"})
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == 0o644


@pytest.mark.slow
def test_worker_processes_exit_when_the_build_is_killed(tmp_path):
    import os
    import signal
    import time

    psutil = pytest.importorskip("psutil")
    root = tmp_path / "archive"
    root.mkdir()
    for i in range(8):
        np.save(root / f"v{i}.npy", textured(shape=(160, 384, 384), seed=i))
    proc = subprocess.Popen([sys.executable, "-m", "warmstart", "-q", "corpus", "build", str(root), "-o",
                             str(tmp_path / "c.zarr"), "--workers", "2", "--patch-size", "32", "--set",
                             "sampling.slice_stride=1", "--set", "sampling.max_per_source=100000"])
    def ours():  # every process the build started: its children and the forkserver's
        return [p for p in psutil.process_iter(["cmdline"]) if p.pid != os.getpid() and
                any("multiprocessing" in c for c in (p.info["cmdline"] or [])) and
                str(tmp_path) not in " ".join(p.info["cmdline"] or [])]

    before = {p.pid for p in ours()}
    main = psutil.Process(proc.pid)
    for _ in range(600):  # wait until the workers are busy
        kids = [p for p in ours() if p.pid not in before]
        if len(kids) >= 4:  # resource tracker, forkserver, two workers
            break
        time.sleep(0.05)
    assert len(kids) >= 3, "the build started no worker processes"
    assert main.is_running()
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    gone, alive = psutil.wait_procs(kids, timeout=20)
    assert not alive, f"workers still running after their parent was killed: {[p.pid for p in alive]}"
