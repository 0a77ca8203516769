"""Typed settings from plain mappings: the strict checking every stage's settings share.

Each stage's settings are frozen dataclasses read from recipe tables. ``settings_from_dict``
rejects unknown keys and wrong types, naming the dotted key (``corpus.sampling.patch_size``);
the recipe reader adds the file name. Written here rather than with a schema library because the
messages must name recipe keys exactly as a user types them, and the dataclasses stay the one
description of each setting.
"""
from __future__ import annotations

import dataclasses
import math
import types
import typing
from dataclasses import fields
from typing import Any, Mapping

from ..errors import RecipeError

__all__ = ["settings_from_dict", "require_positive", "renamed_keys"]


def _check_type(value: Any, hint: Any, key: str) -> Any:
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if origin in (typing.Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        errors = []
        for a in args:
            if a is type(None):
                continue
            try:
                return _check_type(value, a, key)
            except RecipeError as err:
                errors.append(err)
        raise errors[0] if errors else RecipeError(f"{key}: bad value {value!r}")
    if dataclasses.is_dataclass(hint):  # a nested table, e.g. [pretrain.view1]
        return settings_from_dict(hint, value, key)
    if origin is tuple:
        if not isinstance(value, (list, tuple)) or len(value) != len(args):
            raise RecipeError(f"{key} must be a list of {len(args)} values, got {value!r}")
        return tuple(_check_type(v, a, f"{key}[{i}]") for i, (v, a) in enumerate(zip(value, args)))
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise RecipeError(f"{key} must be a number, got {value!r}")
        if not math.isfinite(value):
            raise RecipeError(f"{key} must be a finite number, got {value!r}")
        return float(value)
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise RecipeError(f"{key} must be an integer, got {value!r}")
        return value
    if hint is bool:
        if not isinstance(value, bool):
            raise RecipeError(f"{key} must be true or false, got {value!r}")
        return value
    if hint is str:
        if not isinstance(value, str):
            raise RecipeError(f"{key} must be a string, got {value!r}")
        return value
    return value


def renamed_keys(d: Mapping[str, Any], renames: Mapping[str, str], where: str) -> dict[str, Any]:
    """Read old key names as the new ones, with a FutureWarning (shown by default) naming both.

    Renamed keys are read for one release after the rename (see the README's changelog). Giving
    both the old and the new name is an error.
    """
    import warnings

    out = dict(d) if isinstance(d, Mapping) else d
    if not isinstance(out, dict):
        return out
    for old, new in renames.items():
        if old in out:
            if new in out:
                raise RecipeError(f"{where}.{old} and {where}.{new} are the same setting (the first is its old name); keep {new}")
            warnings.warn(f"{where}.{old} is now called {where}.{new}; the old name is read until the next release",
                          FutureWarning, stacklevel=3)
            out[new] = out.pop(old)
    return out


def require_positive(obj: Any, section: str, *names: str) -> None:
    """Refuse any of the named integer settings below 1 (``None``, where allowed, passes)."""
    for name in names:
        value = getattr(obj, name)
        if value is not None and value < 1:
            raise RecipeError(f"{section}.{name} must be >= 1, got {value}")


def settings_from_dict(cls: Any, d: Mapping[str, Any], where: str) -> Any:
    """Build a settings dataclass from a mapping, checking keys and types recursively.

    Raises
    ------
    RecipeError
        Naming the dotted key (``corpus.sampling.patch_size``) of an unknown key or wrong type.
    """
    if not isinstance(d, Mapping):
        raise RecipeError(f"{where} must be a table, got {d!r}")
    hints = typing.get_type_hints(cls)
    known = {f.name: f for f in fields(cls)}
    unknown = sorted(set(d) - set(known))
    if unknown:
        raise RecipeError(f"unknown key {where}.{unknown[0]} (known: {', '.join(sorted(known))})")
    kwargs = {}
    for name, value in d.items():
        hint = hints[name]
        if dataclasses.is_dataclass(hint):
            kwargs[name] = settings_from_dict(hint, value, f"{where}.{name}")
        else:
            kwargs[name] = _check_type(value, hint, f"{where}.{name}")
            if name.endswith("seed") and isinstance(kwargs[name], int) and kwargs[name] < 0:
                raise RecipeError(f"{where}.{name} must be >= 0, got {kwargs[name]}")
    try:
        return cls(**kwargs)
    except RecipeError as err:
        raise RecipeError(f"{where}: {err}") from err
    except ValueError as err:  # IntensityError and friends
        raise RecipeError(f"{where}: {err}") from err
