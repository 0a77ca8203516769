"""Saved run records: what each benchmark run was made with, and which ones a rerun may reuse.

``warmstart bench`` writes one JSON per finished (contender, size, replicate) run under
``runs/`` and a rerun into the same folder skips them. A record is reused only when everything
that decides its numbers is unchanged: the settings, the contender (architecture and, for a
file, its content digest), the labelled volumes (sha256), the classes, and the run's training
set, validation and test slices. Settings that only change the speed (``device``, ``threads``,
``channels_last``) and those that only add runs (``sizes``, ``replicates``) are left out, so a
benchmark can be resumed on another machine or grown by more sizes and replicates.

A record made otherwise (or unreadable, or from a version that did not record this) is not
reused and not deleted: it is moved to ``runs/superseded/<time>/`` with its predictions, and the
run is made again.
"""
from __future__ import annotations

import json
import shutil
import time
from pathlib import Path
from typing import Any, Iterable

__all__ = ["SPEED_ONLY", "made_with", "differences", "set_aside"]

SPEED_ONLY = ("sizes", "replicates", "device", "threads", "channels_last")


def made_with(contender: Any, split: Any, n: int, settings: dict[str, Any], pairs: Iterable[Any],
              classes: int) -> dict[str, Any]:
    """What decides the numbers of one run, as JSON values (lists, not tuples).

    Parameters
    ----------
    contender : Contender
        ``spec``, ``file_digest`` and ``parts`` are recorded.
    split : Split
        Its first ``n`` training units and its test and validation slices (or slabs).
    n : int
        Training-set size (tiles or cubes).
    settings : dict
        ``BenchSettings.to_dict()`` of the run, with ``training_set`` resolved.
    pairs : LabelledPair
        The labelled volumes (name and sha256 are recorded).
    classes : int
    """
    cubes = split.kind == "cubes"
    held = {"test": split.test_regions, "val": split.val_regions} if cubes else {"test": split.test, "val": split.val}
    record = {
        "settings": {k: v for k, v in sorted(settings.items()) if k not in SPEED_ONLY},
        "contender": {"spec": contender.spec, "file_digest": contender.file_digest, "parts": list(contender.parts),
                      **({"inflate": contender.inflate} if getattr(contender, "inflate", None) else {})},
        "labels": [{"name": p.name, "sha256": p.sha256} for p in pairs],
        "classes": classes,
        "training_set": {"kind": split.kind, "units": (split.cubes if cubes else split.tiles)[:n], **held},
    }
    return json.loads(json.dumps(record))


def differences(old: dict[str, Any] | None, new: dict[str, Any]) -> list[str]:
    """What changed between two :func:`made_with` records, in words (empty when none).

    >>> a = {"settings": {"epochs": 10, "lr": 0.001}, "classes": 3}
    >>> differences(a, {"settings": {"epochs": 20, "lr": 0.001}, "classes": 3})
    ['epochs 10 -> 20']
    >>> differences(None, a)
    ['not recorded (an earlier version)']
    """
    if not isinstance(old, dict):
        return ["not recorded (an earlier version)"]
    words = {"contender": "the contender (architecture or file content)", "labels": "the labelled volumes",
             "classes": "the number of classes", "training_set": "the training set or the held-out slices"}
    out = []
    was, now = old.get("settings", {}), new["settings"]
    out += [f"{k} {was.get(k, '(unset)')} -> {now.get(k, '(unset)')}"
            for k in sorted(set(was) | set(now)) if was.get(k) != now.get(k)]
    out += [words.get(k, k) for k in new if k != "settings" and old.get(k) != new[k]]
    return out


def set_aside(paths: Iterable[Path], runs: Path) -> Path:
    """Move ``paths`` (records and their predictions) to a new ``runs/superseded/<time>/`` folder.

    Returns
    -------
    Path
        The folder they now lie in.
    """
    stamp = time.strftime("%Y%m%d-%H%M%S")
    folder = runs / "superseded" / stamp
    k = 1
    while folder.exists():
        k += 1
        folder = runs / "superseded" / f"{stamp}-{k}"
    folder.mkdir(parents=True)
    for p in paths:
        if p.exists():
            shutil.move(str(p), folder / p.name)
    return folder
