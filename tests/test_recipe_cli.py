"""Recipes (strict TOML) and the command line (thin, torch-free, honest exit codes)."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import write_dicom_series
from warmstart.cli import CLINICAL_CAUTION, main
from warmstart.errors import RecipeError
from warmstart.recipe import RECIPE_DIR, apply_overrides, load_recipe


# --- recipes ---------------------------------------------------------------------------------
@pytest.mark.parametrize("name", sorted(p.stem for p in RECIPE_DIR.glob("*.toml")))
def test_shipped_recipes_load(name):
    r = load_recipe(name)
    assert r.description and r.source.endswith(f"{name}.toml")


def test_unknown_key_names_key_and_file(tmp_path):
    p = tmp_path / "r.toml"
    p.write_text("[corpus.sampling]\npatch_sise = 64\n")
    with pytest.raises(RecipeError) as info:
        load_recipe(p)
    assert "corpus.sampling.patch_sise" in str(info.value) and str(p) in str(info.value)
    p.write_text("[corpus.sampling]\npatch_size = \"big\"\n")
    with pytest.raises(RecipeError, match=r"corpus.sampling.patch_size must be an integer"):
        load_recipe(p)
    p.write_text("[pretraining]\nx = 1\n")
    with pytest.raises(RecipeError, match="unknown section or key 'pretraining'"):
        load_recipe(p)
    p.write_text("[pretrain.view1]\nblur_sigmas = [0.1, 1.0]\n")  # a typo in a view table fails at load, not at run time
    with pytest.raises(RecipeError, match=r"pretrain.view1.blur_sigmas"):
        load_recipe(p)
    p.write_text("[pretrain.view1]\ncrop_scale = 0.5\n")
    with pytest.raises(RecipeError, match=r"pretrain.view1.crop_scale must be a list of 2"):
        load_recipe(p)
    p.write_text("[corpus.intensity]\nscheme = \"fixed\"\n")
    with pytest.raises(RecipeError, match="window"):
        load_recipe(p)


def test_overrides_parse_toml_values():
    d = apply_overrides({}, ["sampling.patch_size=64", "sampling.axes=ZYX", "intensity.percentiles=[1, 99]",
                             "corpus.store.dtype=\"uint16\"", "read.voxel_size_um=[1.0, 0.5, 0.5]"])
    r = load_recipe(None, [f"{k}" for k in ()])
    assert r.corpus.sampling.patch_size == 128
    c = d["corpus"]
    assert c["sampling"] == {"patch_size": 64, "axes": "ZYX"} and c["intensity"]["percentiles"] == [1, 99]
    r = load_recipe("smoke", ["sampling.patch_size=48", "intensity.percentiles=[1, 99]"])
    assert r.corpus.sampling.patch_size == 48 and r.corpus.intensity.percentiles == (1.0, 99.0)
    with pytest.raises(RecipeError, match="key=value"):
        apply_overrides({}, ["patch_size"])


# --- CLI -------------------------------------------------------------------------------------
def test_scan_table_and_json(broken_archive, capsys):
    rc = main(["-q", "scan", str(broken_archive)])
    out = capsys.readouterr().out
    assert rc == 3
    assert "filter_a.tif" in out and "0.8x0.8x0.8" in out and "FAILED" in out
    assert "cannot use zz_truncated.tif" in out and "ignored" in out
    rc = main(["-q", "scan", str(broken_archive), "--json", "--set", "sampling.patch_size=16"])
    data = json.loads(capsys.readouterr().out)
    rows = {r["name"]: r for r in data["sources"]}
    assert rows["cathode.mrc"]["voxel_size_um"] == pytest.approx([0.004] * 3)
    assert rows["flat.npy"]["status"] == "failed" and "no contrast" in rows["flat.npy"]["reason"]
    assert data["failed"] == 4


def test_build_show_merge_commands(small_archive, tmp_path, capsys):
    out = tmp_path / "c.zarr"
    rc = main(["-q", "corpus", "build", str(small_archive), "-o", str(out), "--recipe", "smoke", "--patch-size", "16",
               "--seed", "4", "--json"])
    res = json.loads(capsys.readouterr().out)
    assert rc == 0 and res["n_patches"] > 0 and res["exit_code"] == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["settings"]["sampling"]["patch_size"] == 16 and manifest["settings"]["sampling"]["seed"] == 4
    rc = main(["-q", "corpus", "show", str(out)])
    text = capsys.readouterr().out
    assert rc == 0 and f"{res['n_patches']} patches" in text and "cathode.mrc" in text
    for i in range(2):
        main(["-q", "corpus", "build", str(small_archive), "-o", str(tmp_path / f"s{i}.zarr"), "--recipe", "smoke",
              "--patch-size", "16", "--seed", "4", "--shard", f"{i}/2", "--no-report"])
    capsys.readouterr()
    rc = main(["-q", "corpus", "merge", str(tmp_path / "s0.zarr"), str(tmp_path / "s1.zarr"), "-o", str(tmp_path / "m.zarr"), "--json"])
    merged = json.loads(capsys.readouterr().out)
    assert rc == 0 and merged["patches"] == res["n_patches"]


def test_errors_exit_1_with_message(tmp_path, capsys):
    rc = main(["corpus", "show", str(tmp_path / "missing.zarr")])
    assert rc == 1 and "no such corpus" in capsys.readouterr().err
    rc = main(["corpus", "build", str(tmp_path), "-o", str(tmp_path / "c"), "--set", "sampling.bogus=1"])
    assert rc == 1 and "corpus.sampling.bogus" in capsys.readouterr().err


def test_clinical_caution_for_ct(tmp_path, capsys):
    import numpy as np

    write_dicom_series(tmp_path / "ct" / "series", np.zeros((3, 32, 32), np.float32) + np.arange(32) * 10 - 100)
    main(["-q", "scan", str(tmp_path / "ct")])
    err = capsys.readouterr().err
    assert CLINICAL_CAUTION in err and "not for diagnosis" in err


def _fake_torch(tmp_path: Path) -> dict[str, str]:
    """A 'torch' that fails loudly on import: any command that imports it breaks."""
    pkg = tmp_path / "fake" / "torch"
    pkg.mkdir(parents=True)
    (pkg / "__init__.py").write_text("import time\ntime.sleep(3)\nraise ImportError('torch must not be imported here')\n")
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(tmp_path / "fake"), env.get("PYTHONPATH", "")])
    return env


def test_help_scan_and_corpus_never_import_torch(small_archive, tmp_path):
    env = _fake_torch(tmp_path)
    run = lambda *a: subprocess.run([sys.executable, "-m", "warmstart", "-q", *a], env=env, capture_output=True, text=True, timeout=120)  # noqa: E731
    for args in (["--help"], ["scan", str(small_archive), "--set", "sampling.patch_size=16"], ["corpus", "build", str(small_archive), "-o", str(tmp_path / "c.zarr"),
                 "--recipe", "smoke", "--patch-size", "16", "--no-report"], ["corpus", "show", str(tmp_path / "c.zarr"), "--no-report"]):
        proc = run(*args)
        assert proc.returncode == 0, (args, proc.stderr[-2000:])
        assert "torch must not be imported" not in proc.stderr
    probe = subprocess.run([sys.executable, "-c", "import sys, warmstart, warmstart.cli, warmstart.corpus.build, "
                            "warmstart.corpus.scan; print('torch' in sys.modules)"], env=env, capture_output=True, text=True)
    assert probe.stdout.strip() == "False"


def test_pretrain_without_torch_says_what_to_install(small_archive, tmp_path):
    env = _fake_torch(tmp_path)
    proc = subprocess.run([sys.executable, "-m", "warmstart", "-q", "pretrain", str(tmp_path / "c.zarr"), "-o",
                           str(tmp_path / "run")], env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1 and "pip install 'warmstart[train]'" in proc.stderr


# --- renamed options and keys: old spellings still work for one release ------------------------
@pytest.mark.parametrize("argv, dest, value", [
    (["bench", "set/", "-o", "b", "--seeds", "3"], "replicates", 3),
    (["bench", "set/", "-o", "b", "--encoder", "a.safetensors", "--encoder-file", "b.safetensors"], "encoder_files",
     ["a.safetensors", "b.safetensors"]),
    (["demo", "--out", "d"], "output", "d"),
    (["pretrain", "c.zarr", "-o", "r", "--num-workers", "2"], "num_workers", 2),
])
def test_deprecated_options_map_to_the_new_ones_with_a_note(argv, dest, value, capsys):
    from warmstart.cli import build_parser

    args = build_parser().parse_args(argv)
    assert getattr(args, dest) == value
    assert "is now" in capsys.readouterr().err


def test_new_option_names_print_no_note(capsys):
    from warmstart.cli import build_parser

    args = build_parser().parse_args(["bench", "set/", "-o", "b", "--replicates", "3", "--encoder-file", "a.safetensors"])
    assert (args.replicates, args.encoder_files) == (3, ["a.safetensors"])
    args = build_parser().parse_args(["demo", "-o", "d"])
    assert args.output == "d" and capsys.readouterr().err == ""


def test_renamed_recipe_keys_are_read_with_a_warning(tmp_path):
    p = tmp_path / "old.toml"
    p.write_text("[bench]\nseeds = 3\nframe_size = 64\npatch_size = 32\n")
    with pytest.warns(FutureWarning, match="bench.seeds is now called bench.replicates"):
        r = load_recipe(p)
    assert (r.bench.replicates, r.bench.tile_size) == (3, 64)
    p.write_text("[bench]\nseeds = 3\nreplicates = 4\n")
    with pytest.raises(RecipeError, match="same setting"):
        load_recipe(p)


def test_old_error_class_name_still_imports():
    from warmstart import errors

    with pytest.warns(FutureWarning, match="WeightsMismatchError"):
        old = errors.WarmStartError
    assert old is errors.WeightsMismatchError and issubclass(old, ValueError)
