"""Merge corpus stores built as shards (``--shard i/n``) into one store.

Shards must come from the same archive listing with the same settings. Sources are taken in
their canonical position order, so merging all shards of a build gives the store a single build
would have written: same patches, same order, same index, same per-source records.
"""
from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Sequence

import numpy as np

from ..base.lock import locks_output
from ..errors import CorpusError
from .manifest import build_manifest
from .settings import CorpusSettings
from ..base.atomic import write_json
from .store import INDEX_COLUMNS, StoreWriter, open_corpus

__all__ = ["merge_corpora"]


@locks_output("corpus merge")
def merge_corpora(inputs: Sequence[str | os.PathLike[str]], out: str | os.PathLike[str], *,
                  report: bool = True, progress: bool = True) -> Path:
    """Merge finished shard stores into ``out``.

    Parameters
    ----------
    inputs : sequence of path
        Finished stores (each with a manifest) built from the same archive and settings.
    out : path
        New store folder (must not exist or be empty).

    Returns
    -------
    Path
        The merged store.

    Raises
    ------
    CorpusError
        Shards from different archives or settings, or sharing a source.
    """
    if not inputs:
        raise CorpusError("merge needs at least one corpus")
    stores = [open_corpus(p) for p in inputs]
    builds = [json.loads((st.path / "build.json").read_text()) for st in stores]
    ref = builds[0]
    for st, b in zip(stores, builds):
        for key in ("settings", "archive_names"):
            if b[key] != ref[key]:
                raise CorpusError(f"{st.path}: built with different {key} than {stores[0].path}; cannot merge")
    owner: dict[int, int] = {}
    for i, b in enumerate(builds):
        for pos in b["sources"]:
            if pos in owner:
                raise CorpusError(f"source {ref['archive_names'][pos]!r} is in both {stores[owner[pos]].path} and {stores[i].path}")
            owner[pos] = i
    s = CorpusSettings.from_dict({**ref["settings"]})
    positions = sorted(owner)
    build = {**ref, "sources": positions, "shard": None, "merged_from": [str(st.path) for st in stores]}
    out = Path(out)
    if out.exists() and any(out.iterdir()):
        raise CorpusError(f"{out}: exists and is not empty; merge writes a new store")
    shape = tuple(stores[0].patches.shape[1:])
    writer = StoreWriter(out, build, s.store, shape)  # type: ignore[arg-type]
    records_by_pos = {}
    for i, st in enumerate(stores):
        for p in sorted(st.path.joinpath("journal").glob("[0-9]*.json")):
            rec = json.loads(p.read_text())
            records_by_pos[rec["position"]] = (i, rec)
    from ..base.progress import progress_bar

    indexes = [st.index() for st in stores]
    for pos in progress_bar(positions, desc="corpus: merge", unit="src", disable=not progress, leave=False):
        i, rec = records_by_pos[pos]
        st = stores[i]
        a, b = rec["start"], rec["stop"]
        codes = st.patches[a:b] if b > a else np.empty((0,) + shape)
        cols = {c: indexes[i][c][a:b] for c in INDEX_COLUMNS}
        writer.append(codes, cols, {k: v for k, v in rec.items() if k not in ("start", "stop")})
    writer.finish_index()
    manifest = build_manifest(build, writer.records(), s, writer.patches.shape)
    manifest["merged_from"] = build["merged_from"]
    if len(positions) < len(ref["archive_names"]):
        manifest["warnings"] = [f"merged store covers {len(positions)} of {len(ref['archive_names'])} archive sources"]
    write_json(out / "manifest.json", manifest)
    shutil.rmtree(out / "staging", ignore_errors=True)
    if report:
        from .report import write_report

        write_report(out, progress=progress)
    return out
