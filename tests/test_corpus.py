"""Corpus builds: provenance, statistics, bad sources, workers, shards + merge, and resume after a real kill."""
from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import textured
from warmstart.corpus.build import EXIT_SKIPPED, build_corpus
from warmstart.corpus.merge import merge_corpora
from warmstart.corpus.settings import CorpusSettings, SamplingSettings, StoreSettings
from warmstart.corpus.store import INDEX_COLUMNS, open_corpus
from warmstart.errors import CorpusError
from warmstart.intensity import IntensityReference
from warmstart.volumes import open_volume

SMALL = CorpusSettings(sampling=SamplingSettings(patch_size=16, axes="ZY", slice_stride=3, max_per_source=60))


def _same_store(a: Path, b: Path) -> None:
    sa, sb = open_corpus(a), open_corpus(b)
    np.testing.assert_array_equal(sa.patches[:], sb.patches[:])
    ia, ib = sa.index(), sb.index()
    for c in INDEX_COLUMNS:
        np.testing.assert_array_equal(ia[c], ib[c])
    strip = lambda m: [{k: v for k, v in e.items() if k not in ("seconds", "path")} for e in m["sources"]]  # noqa: E731
    assert strip(sa.manifest) == strip(sb.manifest)
    assert sa.manifest["statistics"] == sb.manifest["statistics"]


def test_build_provenance_reproduces_every_checked_patch(small_archive, tmp_path):
    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, report=False, progress=False)
    assert res.exit_code == 0 and res.n_patches > 100
    store = open_corpus(res.path)
    idx = store.index()
    rng = np.random.default_rng(0)
    for i in rng.choice(len(store), 25, replace=False):
        entry = store.manifest["sources"][idx["source"][i]]
        ref = IntensityReference.from_dict(entry["reference"])
        with open_volume(entry["path"]) as vol:
            z, y, x, a = idx["z"][i], idx["y"][i], idx["x"][i], idx["axis"][i]
            ext = [16, 16, 16]
            ext[a] = 1
            raw = vol.read((slice(z, z + ext[0]), slice(y, y + ext[1]), slice(x, x + ext[2]))).astype(np.float32)
        expect = ref.apply(raw.transpose([a] + [d for d in range(3) if d != a]))
        # default uint16 storage over [-1, 2]: absolute error <= half a step (2.3e-5)
        np.testing.assert_allclose(store.read(i, i + 1)[0], expect, rtol=0, atol=3e-5)


def test_manifest_statistics_match_the_stored_patches(small_archive, tmp_path):
    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, report=False, progress=False)
    store = open_corpus(res.path)
    x = store.read().astype(np.float64)
    st = store.manifest["statistics"]
    assert st["values"] == x.size
    assert st["mean"] == pytest.approx(x.mean(), abs=1e-3) and st["std"] == pytest.approx(x.std(), abs=1e-3)
    counts, _ = np.histogram(x, bins=256, range=tuple(st["histogram"]["range"]))
    # Stored (quantized) values may round across a bin edge; the distributions agree (CDFs within 0.5 %).
    assert sum(st["histogram"]["counts"]) + st["below_range"] + st["above_range"] == x.size
    cdf_gap = np.abs(np.cumsum(st["histogram"]["counts"]) - np.cumsum(counts)).max() / x.size
    assert cdf_gap < 0.005
    per_source = {e["name"]: e["counts"]["kept"] for e in store.manifest["sources"]}
    assert sum(per_source.values()) == len(store)
    srcs = [e for e in store.manifest["sources"]]
    assert all(len(e["sha256"]) == 64 and e["reference"]["scheme"] == "percentile" for e in srcs)
    assert {e["format"] for e in srcs} == {"tiff", "mrc", "npy", "slices", "ome-zarr"}


def test_uint16_and_float16_errors_within_stated_bounds(small_archive, tmp_path):
    s = CorpusSettings(sampling=SMALL.sampling, store=StoreSettings(dtype="uint16", uint16_range=(-1.0, 2.0)))
    res = build_corpus(small_archive, tmp_path / "u.zarr", s, report=False, progress=False)
    q = open_corpus(res.path).manifest["patches"]["quantization"]
    assert q["dtype"] == "uint16" and 0 < q["measured_max_abs_error"] <= q["step"] / 2 + 1e-6  # + float32 decode rounding
    f16 = CorpusSettings(sampling=SMALL.sampling, store=StoreSettings(dtype="float16", compression="lz4"))
    f16 = build_corpus(small_archive, tmp_path / "f.zarr", f16, report=False, progress=False)
    qf = open_corpus(f16.path).manifest["patches"]["quantization"]
    assert qf["dtype"] == "float16" and 0 < qf["measured_max_abs_error"] <= 2**-11 * 2.0  # |x| <= 2 here
    a, b = open_corpus(res.path).read(), open_corpus(f16.path).read()
    np.testing.assert_allclose(a, b, rtol=2**-11, atol=q["step"] / 2 + 1e-6)


def test_uint16_encoding_rounds_and_counts_clipping():
    from warmstart.corpus.store import decode, encode

    enc = {"dtype": "uint16", "uint16_range": [-1.0, 2.0]}
    x = np.array([-1.5, -1.0, 0.0, 0.123456, 1.0, 2.0, 7.0], np.float32)
    codes, err = encode(x, enc)
    step = 3.0 / 65535
    assert codes[0] == 0 and codes[1] == 0 and codes[-1] == 65535 and codes[-2] == 65535 and err["clipped"] == 2
    np.testing.assert_allclose(decode(codes, enc)[1:-1], x[1:-1], atol=step / 2 + 1e-7)


def test_bad_sources_are_skipped_with_reasons(broken_archive, tmp_path):
    res = build_corpus(broken_archive, tmp_path / "c.zarr", SMALL, report=True, progress=False)
    assert res.exit_code == EXIT_SKIPPED
    reasons = dict(res.failed)
    assert set(reasons) == {"zz_truncated.tif", "flat.npy", "allnan.npy", "empty.mrc"}
    assert "empty file" in reasons["empty.mrc"] and "no finite voxel" in reasons["allnan.npy"]
    assert "no contrast" in reasons["flat.npy"] and "zz_truncated.tif" in reasons["zz_truncated.tif"]
    store = open_corpus(res.path)
    failed_pos = {e["position"] for e in store.manifest["sources"] if e["status"] == "failed"}
    assert all(e["patch_range"][0] == e["patch_range"][1] for e in store.manifest["sources"] if e["position"] in failed_pos)
    assert not failed_pos & set(np.unique(store.index()["source"]).tolist())
    summary = (res.path / "report" / "summary.md").read_text()
    assert "Skipped sources" in summary and "flat.npy" in summary
    assert "README.txt: not an image format" in summary  # a non-image file is named, not silently dropped
    assert [i["path"].endswith("README.txt") for i in store.manifest["ignored"]] == [True]


def test_report_files(small_archive, tmp_path):
    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, progress=False)
    rep = res.path / "report"
    summary = json.loads((rep / "summary.json").read_text())
    assert len(summary["sources"]) == 5
    from PIL import Image

    for row in summary["sources"]:
        montage = Image.open(rep / row["files"]["montage"])
        assert montage.size[0] > 16 and montage.size[1] >= 16
        assert (rep / row["files"]["histograms"]).stat().st_size > 1000


@pytest.mark.slow
def test_two_workers_equal_one(small_archive, tmp_path):
    one = build_corpus(small_archive, tmp_path / "one.zarr", SMALL, report=False, progress=False)
    two = build_corpus(small_archive, tmp_path / "two.zarr", CorpusSettings(**{**SMALL.__dict__, "workers": 2}),
                       report=False, progress=False)
    _same_store(one.path, two.path)


def test_parts_change_nothing_but_the_duplicate_rule(small_archive, tmp_path):
    """Sources split into Z slabs give the same store as whole sources (duplicate rule off)."""
    from dataclasses import replace

    from warmstart.corpus.build import source_parts
    from warmstart.corpus.settings import FilterSettings
    from warmstart.volumes import discover

    base = replace(SMALL, filters=FilterSettings(duplicate_threshold=0))
    split = replace(base, part_mb=0.02)  # 20 kB parts: every fixture source in several slabs
    assert all(source_parts(c, split.part_mb) > 1 for c in discover(small_archive)[0])
    whole = build_corpus(small_archive, tmp_path / "whole.zarr", base, report=False, progress=False)
    parts = build_corpus(small_archive, tmp_path / "parts.zarr", split, report=False, progress=False)
    sw, sp = open_corpus(whole.path), open_corpus(parts.path)
    np.testing.assert_array_equal(sw.patches[:], sp.patches[:])
    for c in INDEX_COLUMNS:
        np.testing.assert_array_equal(sw.index()[c], sp.index()[c])
    a, b = sw.manifest["statistics"], sp.manifest["statistics"]
    assert a["histogram"] == b["histogram"] and a["values"] == b["values"]
    assert a["mean"] == pytest.approx(b["mean"], rel=1e-12) and a["std"] == pytest.approx(b["std"], rel=1e-12)
    assert [e["counts"] for e in sw.manifest["sources"]] == [e["counts"] for e in sp.manifest["sources"]]
    assert min(e["parts"] for e in sp.manifest["sources"]) > 1


@pytest.mark.slow
def test_parts_in_parallel_equal_sequential(small_archive, tmp_path):
    from dataclasses import replace

    split = replace(SMALL, part_mb=0.03)
    one = build_corpus(small_archive, tmp_path / "one.zarr", split, report=False, progress=False)
    two = build_corpus(small_archive, tmp_path / "two.zarr", replace(split, workers=2), report=False, progress=False)
    _same_store(one.path, two.path)


def test_a_failing_part_drops_the_whole_source(small_archive, tmp_path, monkeypatch):
    from dataclasses import replace

    import warmstart.corpus.build as build_mod

    real = build_mod.process_source

    def flaky(job):
        rec = real(job)
        if job["candidate"].name == "seed.npy" and job["part"] == job["n_parts"] - 1:
            (Path(rec.pop("staging_file", "")) if rec.get("staging_file") else Path("/nonexistent")).unlink(missing_ok=True)
            rec.update(status="failed", reason="seed.npy: simulated read error in the last slab")
        return rec

    monkeypatch.setattr(build_mod, "process_source", flaky)
    res = build_corpus(small_archive, tmp_path / "c.zarr", replace(SMALL, part_mb=0.02), report=False, progress=False)
    assert dict(res.failed) == {"seed.npy": "seed.npy: simulated read error in the last slab"}
    store = open_corpus(res.path)
    seed = next(e for e in store.manifest["sources"] if e["name"] == "seed.npy")
    assert seed["patch_range"][0] == seed["patch_range"][1]
    assert seed["position"] not in set(store.index()["source"].tolist())
    assert sum(e["patch_range"][1] - e["patch_range"][0] for e in store.manifest["sources"]) == len(store)


def test_shards_merged_equal_single_build(small_archive, tmp_path):
    full = build_corpus(small_archive, tmp_path / "full.zarr", SMALL, report=False, progress=False)
    shards = [build_corpus(small_archive, tmp_path / f"s{i}.zarr", SMALL, shard=f"{i}/3", report=False, progress=False)
              for i in range(3)]
    assert sum(s.n_sources for s in shards) == full.n_sources
    merged = merge_corpora([s.path for s in shards[::-1]], tmp_path / "merged.zarr", report=False, progress=False)
    _same_store(full.path, merged)
    with pytest.raises(CorpusError, match="in both"):
        merge_corpora([shards[0].path, shards[0].path], tmp_path / "dup.zarr", progress=False)


def test_resume_cuts_unjournalled_patches(small_archive, tmp_path):
    """A crash after patches were appended but before the journal record: resume removes them."""
    ref = build_corpus(small_archive, tmp_path / "ref.zarr", SMALL, report=False, progress=False)
    out = tmp_path / "c.zarr"
    build_corpus(small_archive, out, SMALL, report=False, progress=False)
    store = open_corpus(out)
    first = store.manifest["sources"][0]["patch_range"][1]
    for j in sorted((out / "journal").glob("*.json"))[1:]:
        j.unlink()  # as if the build died while appending source 1
    (out / "manifest.json").unlink()
    # Begun by warmstart 0.1.0, whose settings had no read.modality: still resumes.
    build = json.loads((out / "build.json").read_text())
    del build["settings"]["read"]["modality"]
    (out / "build.json").write_text(json.dumps(build))
    res = build_corpus(small_archive, out, SMALL, report=False, progress=False)
    assert res.resumed == 1 and first < res.n_patches
    _same_store(ref.path, out)


def test_refuses_changed_settings_or_foreign_folder(small_archive, tmp_path):
    out = tmp_path / "c.zarr"
    build_corpus(small_archive, out, SMALL, report=False, progress=False)
    (out / "manifest.json").unlink()
    other = CorpusSettings(sampling=SamplingSettings(patch_size=32))
    with pytest.raises(CorpusError, match="different settings"):
        build_corpus(small_archive, out, other, report=False, progress=False)
    foreign = tmp_path / "notes"
    foreign.mkdir()
    (foreign / "keep.txt").write_text("precious")
    with pytest.raises(CorpusError, match="not a corpus"):
        build_corpus(small_archive, foreign, SMALL, report=False, progress=False)
    with pytest.raises(CorpusError, match="only removes a corpus store"):
        build_corpus(small_archive, foreign, SMALL, fresh=True, report=False, progress=False)
    assert (foreign / "keep.txt").read_text() == "precious"


def _many_sources(root: Path, n: int) -> None:
    root.mkdir()
    for i in range(n):
        np.save(root / f"vol_{i:03d}.npy", textured(shape=(24, 96, 96), dtype=np.float32, seed=i))


@pytest.mark.slow
def test_resume_after_real_kill_matches_uninterrupted(tmp_path):
    archive = tmp_path / "archive"
    _many_sources(archive, 40)
    args = ["--patch-size", "16", "--set", "sampling.slice_stride=1", "--set", "sampling.max_per_source=400",
            "--no-report"]
    cmd = [sys.executable, "-m", "warmstart", "-q", "corpus", "build", str(archive)]
    ref = tmp_path / "ref.zarr"
    subprocess.run(cmd + ["-o", str(ref)] + args, check=True)
    out = tmp_path / "killed.zarr"
    proc = subprocess.Popen(cmd + ["-o", str(out)] + args)
    journal = out / "journal"
    deadline = time.time() + 120
    while time.time() < deadline:
        if journal.exists() and len(list(journal.glob("*.json"))) >= 5:
            break
        time.sleep(0.005)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done_before = len(list(journal.glob("*.json")))
    assert 5 <= done_before < 40, "the build was not interrupted mid-way"
    assert not (out / "manifest.json").exists()
    rerun = subprocess.run(cmd + ["-o", str(out)] + args + ["--json"], capture_output=True, text=True, check=True)
    result = json.loads(rerun.stdout)
    assert result["resumed"] >= done_before - 1 and result["n_sources"] == 40
    _same_store(ref, out)


def test_python_api_top_level():
    import warmstart

    assert warmstart.build_corpus is build_corpus
    assert callable(warmstart.open_volume) and callable(warmstart.fit_intensity)
    with pytest.raises(AttributeError):
        warmstart.no_such_thing  # noqa: B018


def test_modality_from_dicom_and_from_the_recipe_per_folder(tmp_path):
    # DICOM's Modality tag (pydicom's CT_small.dcm template says CT) is recorded as it stands; the
    # recipe tags other folders; formats are kept apart from modalities.
    from conftest import write_dicom_series
    from warmstart.corpus.settings import ReadSettings

    root = tmp_path / "archive"
    write_dicom_series(root / "clinic" / "series", np.zeros((4, 48, 48), np.float32) + np.arange(48) * 10.0 - 200)
    (root / "seeds").mkdir()
    np.save(root / "seeds" / "s1.npy", textured(seed=7))
    np.save(root / "loose.npy", textured(seed=8))
    s = CorpusSettings(read=ReadSettings(modality={"seeds": "micro-CT"}), sampling=SMALL.sampling)
    res = build_corpus(root, tmp_path / "c.zarr", s, report=False, progress=False)
    m = open_corpus(res.path).manifest
    by = {e["name"]: e.get("modality") for e in m["sources"] if e["status"] == "ok"}
    assert by == {"clinic/series": "CT", "seeds/s1.npy": "micro-CT", "loose.npy": None}
    assert m["modalities"] == ["CT", "micro-CT"] and m["formats"] == {"dicom": 1, "npy": 2}
    assert m["clinical"] is True


def test_a_version_1_corpus_manifest_is_read_in_the_new_layout(small_archive, tmp_path):
    import shutil

    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, report=False, progress=False)
    new = open_corpus(res.path).manifest
    old_store = tmp_path / "old.zarr"
    shutil.copytree(res.path, old_store)
    v1 = json.loads((old_store / "manifest.json").read_text())
    # The layout warmstart 0.1.0 wrote: no format, voxel target as "patch", formats among modalities.
    del v1["format"], v1["formats"]
    v1["format_version"] = 1
    v1["voxel_size_um"] = {"source_range": v1["voxel_size_um"]["source_range"], "patch": None,
                           "unknown_sources": v1["voxel_size_um"]["unknown_sources"]}
    v1["modalities"] = sorted({e["format"] for e in v1["sources"] if e["status"] == "ok"})
    for e in v1["sources"]:
        e.pop("modality", None)
    (old_store / "manifest.json").write_text(json.dumps(v1))
    got = open_corpus(old_store).manifest
    assert got["format_version"] == 2 and got["voxel_size_um"] == new["voxel_size_um"]
    assert got["modalities"] == new["modalities"] == [] and got["formats"] == new["formats"]
    v1["format_version"] = 7
    (old_store / "manifest.json").write_text(json.dumps(v1))
    with pytest.raises(CorpusError, match="version 7"):
        open_corpus(old_store)


def test_corpus_show_and_summary_md_use_the_same_headings(small_archive, tmp_path, capsys):
    from warmstart.cli import main
    from warmstart.corpus.report import SUMMARY_COLUMNS

    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, report=True, progress=False)
    assert main(["-q", "corpus", "show", str(res.path)]) == 0
    shown = capsys.readouterr().out.splitlines()
    header = next(line for line in shown if line.startswith("#"))
    assert header.split() == " ".join(SUMMARY_COLUMNS).split()
    md = (res.path / "report" / "summary.md").read_text()
    assert "| " + " | ".join(SUMMARY_COLUMNS) + " | files |" in md
    assert "µm" in header and " um" not in md


# --- damage to a finished store -------------------------------------------------------------
def test_a_missing_chunk_file_is_refused_by_name_and_patch_range(small_archive, tmp_path, capsys):
    from warmstart.cli import main

    s = CorpusSettings(sampling=SMALL.sampling, store=StoreSettings(chunk_patches=32))
    res = build_corpus(small_archive, tmp_path / "c.zarr", s, report=False, progress=False)
    assert open_corpus(res.path).verify() == []
    chunk = res.path / "patches" / "c" / "1" / "0" / "0" / "0"
    assert chunk.is_file()
    chunk.unlink()  # zarr alone would read these 32 patches as the fill value
    with pytest.raises(CorpusError, match=r"chunk file patches/c/1/0/0/0 \(patches 32 to 63\) is missing"):
        open_corpus(res.path)
    assert main(["-q", "corpus", "show", str(res.path), "--no-report"]) == 1
    assert "is missing" in capsys.readouterr().err
    pytest.importorskip("torch")
    assert main(["-q", "pretrain", str(res.path), "-o", str(tmp_path / "run")]) == 1  # refused before training
    assert "patches 32 to 63" in capsys.readouterr().err and not (tmp_path / "run" / "checkpoints").exists()


def test_verify_finds_altered_patches_by_source(small_archive, tmp_path, capsys):
    import zarr

    from warmstart.cli import main

    res = build_corpus(small_archive, tmp_path / "c.zarr", SMALL, report=False, progress=False)
    m = open_corpus(res.path).manifest
    victim = next(e for e in m["sources"] if e["status"] == "ok" and e["patch_range"][1] > e["patch_range"][0])
    arr = zarr.open_array(str(res.path / "patches"), mode="r+")
    a = victim["patch_range"][0]
    arr[a] = arr[a] + 1  # a silent bit-level change inside one source's range
    problems = open_corpus(res.path).verify()
    assert problems == [f"{victim['name']}: patches {a} to {victim['patch_range'][1] - 1} do not match their "
                        "recorded sha256 (damaged)"]
    assert main(["-q", "corpus", "show", str(res.path), "--verify", "--no-report"]) == 1
    assert victim["name"] in capsys.readouterr().err


def test_checksums_survive_shards_and_merge(small_archive, tmp_path):
    a = build_corpus(small_archive, tmp_path / "a.zarr", SMALL, shard="0/2", report=False, progress=False)
    b = build_corpus(small_archive, tmp_path / "b.zarr", SMALL, shard="1/2", report=False, progress=False)
    merged = merge_corpora([a.path, b.path], tmp_path / "m.zarr", report=False, progress=False)
    single = build_corpus(small_archive, tmp_path / "s.zarr", SMALL, report=False, progress=False)
    sums = lambda p: {e["name"]: e["patches_sha256"] for e in open_corpus(p).manifest["sources"]}  # noqa: E731
    assert sums(merged) == sums(single.path) and open_corpus(merged).verify() == []


@pytest.mark.parametrize("recipe", ["smoke", "cpu-lowres"])
def test_a_single_2d_image_is_a_usable_source(tmp_path, recipe):
    # scikit-image's bundled camera.png (512 x 512, uint8): real data, one slice. The recipes'
    # scale factor 2 must not be applied to its one-slice Z axis.
    from skimage import data
    import tifffile

    from warmstart.recipe import load_recipe

    (tmp_path / "a").mkdir()
    tifffile.imwrite(tmp_path / "a" / "camera.tif", data.camera())
    s = load_recipe(recipe, ["workers=1"]).corpus
    res = build_corpus(tmp_path / "a", tmp_path / "c.zarr", s, report=False, progress=False)
    assert res.exit_code == 0 and res.n_patches > 0
    e = open_corpus(res.path).manifest["sources"][0]
    assert e["downscale_factors"][0] == 1.0 and e["downscale_factors"][1] == s.sampling.scale_factor
