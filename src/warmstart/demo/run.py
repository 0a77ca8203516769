"""``warmstart demo``: generate the ceramics lab's archive and run the available stages on it."""
from __future__ import annotations

import json
import os
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

__all__ = ["run_demo"]


def run_demo(out: str | os.PathLike[str] | None = None, *, quick: bool = False, progress: bool = True,
             echo: Callable[[str], Any] = print) -> dict[str, Any]:
    """Generate the demo archive, scan it and build a corpus; rerunning reuses finished stages.

    Parameters
    ----------
    out : path, optional
        Folder that keeps everything (default: a new temporary folder).
    quick : bool
        Fewer, smaller volumes.
    echo : callable
        Where progress lines go.

    Returns
    -------
    dict
        Paths (``archive``, ``corpus``, ``report``), the scan result and the build result.
    """
    from ..corpus.build import build_corpus
    from ..corpus.scan import scan_archive
    from ..recipe import load_recipe
    from .scenario import write_archive

    t0 = time.perf_counter()
    root = Path(out) if out is not None else Path(tempfile.mkdtemp(prefix="warmstart-demo-"))
    root.mkdir(parents=True, exist_ok=True)
    archive, corpus = root / "archive", root / "corpus.zarr"
    done_marker = archive / ".complete"
    if not done_marker.exists():
        echo(f"[1/3] writing a ceramics lab's filter scans (4 scanners, mixed formats) to {archive}")
        write_archive(archive, n_per_scanner=1 if quick else 2, shape=(64, 128, 128) if quick else (80, 160, 160))
        done_marker.write_text("ok\n")
    else:
        echo(f"[1/3] archive already there: {archive}")
    # 32 px after the 2x downscale: the demo volumes are small enough to tile along all three axes.
    recipe = load_recipe("cpu-lowres", ["sampling.patch_size=32"])
    echo("[2/3] scanning the archive")
    scan = scan_archive(archive, recipe.corpus, progress=progress)
    for r in scan.rows:
        vs = "x".join("?" if v is None else f"{v:g}" for v in r.get("voxel_size_um", []))
        echo(f"      {r['name']:34s} {r['format']:8s} {r.get('dtype', ''):8s} voxel {vs} µm  {r['status']}")
    if (corpus / "manifest.json").exists():
        echo(f"[3/3] corpus already built: {corpus}")
        manifest = json.loads((corpus / "manifest.json").read_text())
        result = {"path": str(corpus), "n_patches": manifest["patches"]["count"], "reused": True}
    else:
        echo("[3/3] building the corpus (recipe cpu-lowres)")
        res = build_corpus(archive, corpus, recipe.corpus, progress=progress)
        result = res.to_dict()
    summary = corpus / "report" / "summary.md"
    echo(f"done in {time.perf_counter() - t0:.0f} s: {result['n_patches']} patches in {corpus}")
    echo(f"report: {summary}")
    echo("next stages (pretraining, export, warm start, benchmark) are not built yet")
    return {"archive": str(archive), "corpus": str(corpus), "report": str(summary), "scan": scan.to_dict(), "build": result}
