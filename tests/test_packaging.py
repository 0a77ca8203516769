"""The layout the project promises: recipes at the top of the repository, shipped inside the package.

The wheel check builds the package with setuptools (the project's own build backend), installs it
into a scratch folder and runs ``warmstart scan --recipe smoke`` from there, so a user who installs
the package (not a clone) gets the same named recipes.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import numpy as np
import pytest
import tifffile
from setuptools import find_packages

from warmstart.recipe import RECIPE_DIR

ROOT = Path(__file__).resolve().parents[1]


def test_recipes_live_at_the_top_of_the_repository_once():
    assert RECIPE_DIR.resolve() == (ROOT / "recipes").resolve()
    names = sorted(p.name for p in (ROOT / "recipes").glob("*.toml"))
    assert "smoke.toml" in names and len(names) >= 8
    # one copy of each file: no second recipes folder inside the source tree
    assert not list((ROOT / "src").rglob("*.toml"))


def test_package_list_matches_the_source_tree():
    # pyproject lists the packages (to map warmstart.recipes onto recipes/); a new subpackage that is
    # not listed would silently be left out of the wheel.
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(conf["packages"])
    assert listed == set(find_packages(str(ROOT / "src"))) | {"warmstart.recipes"}
    assert conf["package-dir"]["warmstart.recipes"] == "recipes"


@pytest.mark.slow
def test_installed_wheel_ships_the_recipes(tmp_path):
    src = tmp_path / "src-copy"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    shutil.copytree(ROOT / "src", src / "src", ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
    shutil.copytree(ROOT / "recipes", src / "recipes")
    wheels = tmp_path / "wheels"
    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation", "-w", str(wheels),
                    str(src)], check=True, capture_output=True)
    (wheel,) = wheels.glob("warmstart-*.whl")
    with zipfile.ZipFile(wheel) as zf:
        shipped = sorted(Path(n).name for n in zf.namelist() if n.startswith("warmstart/recipes/"))
    assert shipped == sorted(p.name for p in (ROOT / "recipes").glob("*.toml"))

    site = tmp_path / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", str(site), str(wheel)],
                   check=True, capture_output=True)
    archive = tmp_path / "archive"
    archive.mkdir()
    tifffile.imwrite(archive / "a.tif", np.random.default_rng(0).integers(0, 4000, (8, 64, 64), dtype=np.uint16))
    env = {**os.environ, "PYTHONPATH": str(site)}
    where = subprocess.run([sys.executable, "-c", "import warmstart.recipe as r; print(r.RECIPE_DIR)"], env=env,
                           cwd=tmp_path, capture_output=True, text=True, check=True).stdout.strip()
    assert Path(where).is_relative_to(site)  # the installed copy answered, not the clone
    out = subprocess.run([sys.executable, "-m", "warmstart", "-q", "scan", str(archive), "--recipe", "smoke", "--json"],
                         env=env, cwd=tmp_path, capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert [r["status"] for r in json.loads(out.stdout)["sources"]] == ["ok"]


@pytest.mark.parametrize("doc", ["README.md", "DEVELOPERS.md"])
def test_docs_point_nowhere_outside_the_repository(doc):
    import re

    text = (ROOT / doc).read_text()
    assert not re.search(r"https?://", text), "links outside the repository"
    assert "../" not in text, "paths outside the repository"
    for target in re.findall(r"\]\(([^)#]+)\)", text):  # relative Markdown links must resolve
        assert (ROOT / target).exists(), target
