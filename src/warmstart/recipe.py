"""Recipes: TOML files that say how each stage runs.

A recipe has one table per stage (``[corpus]``, ``[pretrain]``, ``[bench]``) and an optional ``description``. Unknown
keys and wrong types are errors naming the key and the file. Any key can be overridden with
``key=value`` strings (``corpus.sampling.patch_size=64``; the stage prefix may be left out), the
value read as TOML (``64``, ``"ZYX"`` or ``ZYX``, ``[0.5, 99.5]``, ``true``).

Named recipes (``smoke``, ``cpu-lowres``, ...) are the TOML files in the repository's top-level
``recipes/`` folder; an installed package carries the same files as ``warmstart/recipes``.
"""
from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from .corpus.settings import CorpusSettings
from .errors import RecipeError

__all__ = ["Recipe", "load_recipe", "apply_overrides", "recipe_path", "RECIPE_DIR"]


def _shipped_recipe_dir() -> Path:
    # An installed wheel holds the recipes inside the package (pyproject maps warmstart.recipes to
    # the top-level recipes/ folder); a clone, or an editable install, has them at the top of the
    # repository, two levels above this file (src/warmstart/recipe.py).
    packaged = Path(__file__).parent / "recipes"
    if packaged.is_dir():
        return packaged
    return Path(__file__).resolve().parents[2] / "recipes"


RECIPE_DIR = _shipped_recipe_dir()


def _pretrain_settings() -> type:
    # PretrainSettings lives in warmstart.pretrain, whose package imports torch when used; its
    # settings module itself does not, so recipes stay torch-free.
    from .pretrain.settings import PretrainSettings

    return PretrainSettings


_SECTIONS = {"corpus": CorpusSettings, "pretrain": None, "bench": None}
_TOP_KEYS = {"description"}


@dataclass(frozen=True)
class Recipe:
    """A resolved recipe.

    Attributes
    ----------
    corpus : CorpusSettings
    description : str
    source : str
        The file it came from (``"defaults"`` when none).
    """

    corpus: CorpusSettings = field(default_factory=CorpusSettings)
    pretrain: Any = None
    bench: Any = None
    description: str = ""
    source: str = "defaults"

    def to_dict(self) -> dict[str, Any]:
        return {"description": self.description, "corpus": self.corpus.to_dict(), "pretrain": self.pretrain.to_dict(),
                "bench": self.bench.to_dict()}


def recipe_path(name_or_path: str | os.PathLike[str]) -> Path:
    """A recipe file: an existing path, or the name of a shipped recipe (``smoke``)."""
    p = Path(name_or_path)
    if p.exists():
        return p
    shipped = RECIPE_DIR / f"{p.name.removesuffix('.toml')}.toml"
    if shipped.exists():
        return shipped
    names = ", ".join(sorted(q.stem for q in RECIPE_DIR.glob("*.toml")))
    raise RecipeError(f"{name_or_path}: no such recipe file, and no shipped recipe of that name (shipped: {names})")


def _parse_value(text: str) -> Any:
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text  # a bare word is a string: axes=ZYX


def apply_overrides(data: dict[str, Any], overrides: Sequence[str], default_section: str = "corpus") -> dict[str, Any]:
    """Apply ``key=value`` overrides to a recipe mapping (returns a new mapping)."""
    out = _deep_copy(data)
    for item in overrides:
        if "=" not in item:
            raise RecipeError(f"override {item!r} must look like key=value")
        key, value = item.split("=", 1)
        parts = [k for k in key.strip().split(".") if k]
        if not parts:
            raise RecipeError(f"override {item!r} has no key")
        if parts[0] not in _SECTIONS and parts[0] not in _TOP_KEYS:
            parts = [default_section] + parts
        node = out
        for k in parts[:-1]:
            node = node.setdefault(k, {})
            if not isinstance(node, dict):
                raise RecipeError(f"override {item!r}: {k} is not a table")
        node[parts[-1]] = _parse_value(value.strip())
    return out


def _deep_copy(d: dict[str, Any]) -> dict[str, Any]:
    return {k: _deep_copy(v) if isinstance(v, dict) else v for k, v in d.items()}


def load_recipe(path: str | os.PathLike[str] | None = None, overrides: Sequence[str] = (),
                default_section: str = "corpus") -> Recipe:
    """Read a recipe file (or the defaults), apply overrides, and validate everything.

    Parameters
    ----------
    path : path or str, optional
        A TOML file or the name of a shipped recipe; ``None`` for the defaults.
    overrides : sequence of str
        ``key=value`` items applied after the file.

    Raises
    ------
    RecipeError
        Unknown key, wrong type or bad value; the message names the key and the file.
    """
    where = "defaults"
    data: dict[str, Any] = {}
    if path is not None:
        p = recipe_path(path)
        where = str(p)
        try:
            data = tomllib.loads(p.read_text())
        except tomllib.TOMLDecodeError as err:
            raise RecipeError(f"{p}: not valid TOML ({err})") from err
    data = apply_overrides(data, overrides, default_section)
    unknown = sorted(set(data) - set(_SECTIONS) - _TOP_KEYS)
    if unknown:
        raise RecipeError(f"{where}: unknown section or key {unknown[0]!r} (known: {', '.join(sorted(set(_SECTIONS) | _TOP_KEYS))})")
    try:
        corpus = CorpusSettings.from_dict(data.get("corpus", {}), "corpus")
        pretrain = _pretrain_settings().from_dict(data.get("pretrain", {}), "pretrain")
        from .bench.settings import BenchSettings

        bench = BenchSettings.from_dict(data.get("bench", {}), "bench")
    except RecipeError as err:
        raise RecipeError(f"{where}: {err}") from err
    return Recipe(corpus=corpus, pretrain=pretrain, bench=bench, description=str(data.get("description", "")), source=where)
