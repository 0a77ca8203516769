"""The corpus report: what a person looks at before spending hours of pretraining on a corpus.

``report/`` holds, per source, a montage of random patches (``montage_NNNN.png``, centre channel;
for 3-D cubes the central Z, Y and X planes of a quarter as many cubes, three cubes per row; grey levels stretched over the montage's 1-99 % range) and the intensity histogram before
(raw sample) and after normalization (stored patches) (``hist_NNNN.png``); and for the corpus a
``summary.md`` and ``summary.json``.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ..base.atomic import write_json
from .store import open_corpus

__all__ = ["write_report", "montage", "cube_planes", "summary_rows", "shown_name", "SUMMARY_COLUMNS", "summary_cells"]

# The per-source table, with the same headings in ``corpus show`` and in ``report/summary.md``.
SUMMARY_COLUMNS = ("#", "source", "format", "modality", "shape (ZYX)", "voxel µm (ZYX)", "scheme", "planned", "kept",
                   "low variance", "background", "duplicate")


def montage(patches: np.ndarray, columns: int = 8, gap: int = 2) -> np.ndarray:
    """Tile (N, P, P) images into one 2-D array with ``gap`` pixels of NaN between tiles."""
    n, p, q = patches.shape
    cols = min(columns, max(n, 1))
    rows = max(1, -(-n // cols))
    out = np.full((rows * (p + gap) - gap, cols * (q + gap) - gap), np.nan, dtype=np.float32)
    for i, img in enumerate(patches):
        r, c = divmod(i, cols)
        out[r * (p + gap): r * (p + gap) + p, c * (q + gap): c * (q + gap) + q] = img
    return out


def cube_planes(cubes: np.ndarray) -> np.ndarray:
    """(N, P, P, P) cubes in (Z, Y, X) order -> (3N, P, P): each cube's central Z, Y and X planes."""
    c = cubes.shape[1] // 2
    return np.stack([cubes[:, c], cubes[:, :, c], cubes[:, :, :, c]], axis=1).reshape(-1, *cubes.shape[2:])


def _save_montage(path: Path, tiles: np.ndarray, columns: int = 8) -> None:
    import matplotlib.image as mpimg

    grid = montage(tiles, columns)
    finite = grid[np.isfinite(grid)]
    lo, hi = (np.percentile(finite, [1, 99]) if finite.size else (0.0, 1.0))
    img = np.clip((grid - lo) / (hi - lo if hi > lo else 1.0), 0, 1)
    img = np.where(np.isfinite(img), img, 1.0)  # white gaps
    mpimg.imsave(path, img, cmap="gray", vmin=0, vmax=1)


def _save_histograms(path: Path, entry: dict[str, Any], stats: dict[str, Any]) -> None:
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9, 3), constrained_layout=True)
    raw = entry["reference"]["stats"]["histogram"]
    edges = np.linspace(*raw["range"], len(raw["counts"]) + 1)
    axes[0].stairs(raw["counts"], edges, fill=True, color="0.4")
    axes[0].set(title="raw (intensity sample)", xlabel=f"raw value ({entry.get('meta', {}).get('unit', 'stored value')})", ylabel="voxels")
    edges = np.linspace(*stats["range"], len(stats["counts"]) + 1)
    axes[1].stairs(stats["counts"], edges, fill=True, color="tab:blue")
    ref = entry["reference"]
    axes[1].set(title=f"normalized patches ({ref['scheme']})", xlabel="normalized value", ylabel="pixels")
    fig.suptitle(shown_name(entry["name"]), fontsize=9)
    fig.savefig(path, dpi=80)
    plt.close(fig)


def shown_name(name: str) -> str:
    """A source name as people see it: bytes that are not UTF-8 (kept by Python as surrogate
    escapes) become the replacement character, which fonts, terminals and Markdown can show.

    >>> shown_name("caf\\udce9.npy") == "caf\\ufffd.npy"
    True
    """
    return name.encode("utf-8", "surrogateescape").decode("utf-8", "replace")


def summary_rows(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per source: name, format, shape, voxel size, scheme, counts per rule, status."""
    rows = []
    for e in manifest["sources"]:
        row = {"position": e["position"], "name": shown_name(e["name"]), "format": e["format"], "status": e["status"]}
        if e["status"] == "ok":
            row.update(shape=e["shape"], dtype=e["dtype"], voxel_size_um=e["voxel_size_um"], modality=e.get("modality"),
                       scheme=e["reference"]["scheme"], **e["counts"])
        else:
            row["reason"] = e["reason"]
        rows.append(row)
    return rows


def _fmt_voxel(v: list[float | None]) -> str:
    return "x".join("?" if x is None else f"{x:.4g}" for x in v)


def summary_cells(r: dict[str, Any]) -> list[str]:
    """A used source's row of :data:`SUMMARY_COLUMNS` as text."""
    return [str(r["position"]), r["name"], r["format"], r.get("modality") or "-", "x".join(map(str, r["shape"])),
            _fmt_voxel(r["voxel_size_um"]), r["scheme"], str(r["planned"]), str(r["kept"]), str(r["low_variance"]),
            str(r["background"]), str(r["duplicate"])]


def write_report(corpus: str | os.PathLike[str], *, patches_per_source: int = 64, seed: int = 0,
                 progress: bool = True) -> Path:
    """Write ``report/`` for a finished corpus (montages, histograms, summary).

    Parameters
    ----------
    corpus : path
        A finished store.
    patches_per_source : int
        Patches drawn (seeded) per source for its montage.

    Returns
    -------
    Path
        The report folder.
    """
    from ..base.progress import progress_bar

    store = open_corpus(corpus)
    m = store.manifest
    out = store.path / "report"
    out.mkdir(exist_ok=True)
    rng = np.random.default_rng(seed)
    journal = {json.loads(p.read_text())["position"]: json.loads(p.read_text())
               for p in sorted((store.path / "journal").glob("[0-9]*.json"))}
    files: dict[int, dict[str, str]] = {}
    ok = [e for e in m["sources"] if e["status"] == "ok"]
    for e in progress_bar(ok, desc="corpus: report", unit="src", disable=not progress, leave=False):
        a, b = e["patch_range"]
        pos = e["position"]
        names = {}
        if b > a:
            shown = patches_per_source // 4 if store.spatial_dims == 3 else patches_per_source  # 3 planes per cube
            idx = np.sort(rng.choice(np.arange(a, b), size=min(shown, b - a), replace=False))
            tiles = store.take(idx)
            names["montage"] = f"montage_{pos:04d}.png"
            if tiles.ndim == 5:  # cubes: the central Z, Y and X planes of each, side by side
                _save_montage(out / names["montage"], cube_planes(tiles[:, 0]), columns=9)
            else:
                _save_montage(out / names["montage"], tiles[:, tiles.shape[1] // 2])
        names["histograms"] = f"hist_{pos:04d}.png"
        _save_histograms(out / names["histograms"], e, journal[pos]["stats"] if pos in journal else {"range": [0, 1], "counts": []})
        files[pos] = names
    rows = summary_rows(m)
    for r in rows:
        r["files"] = files.get(r["position"], {})
    summary = {"patches": m["patches"], "statistics": {k: v for k, v in m["statistics"].items() if k != "histogram"},
               "counts": m["counts"], "clinical": m["clinical"], "sources": rows}
    write_json(out / "summary.json", summary)
    (out / "summary.md").write_text(_markdown(m, rows), encoding="utf-8", errors="backslashreplace")
    return out


def _markdown(m: dict[str, Any], rows: list[dict[str, Any]]) -> str:
    st, c = m["statistics"], m["counts"]
    lines = [
        "# Corpus summary",
        "",
        f"- patches: {m['patches']['count']} of shape {m['patches']['shape']} stored as {m['patches']['encoding']['dtype']}"
        f" (measured max quantization error {m['patches']['quantization']['measured_max_abs_error']:.3g})",
        f"- sources: {c['sources_ok']} used, {c['sources_failed']} skipped",
        f"- normalized patch values: mean {st['mean'] if st['mean'] is None else round(st['mean'], 4)}, "
        f"std {st['std'] if st['std'] is None else round(st['std'], 4)}",
        f"- planned {c['planned']}, kept {c['kept']}; dropped: {c['nonfinite']} non-finite, "
        f"{c['low_variance']} low variance, {c['background']} background, {c['duplicate']} near-duplicate",
    ]
    if m.get("clinical"):
        lines += ["", "> Clinical data: research use only, not for diagnosis. Follow your local regulation and "
                  "the advice of qualified practitioners."]
    lines += ["", "| " + " | ".join((*SUMMARY_COLUMNS, "files")) + " |", "|---" * (len(SUMMARY_COLUMNS) + 1) + "|"]
    for r in rows:
        if r["status"] != "ok":
            continue
        links = " ".join(f"[{k}]({v})" for k, v in r["files"].items())
        lines.append("| " + " | ".join((*summary_cells(r), links)) + " |")
    bad = [r for r in rows if r["status"] != "ok"]
    if bad:
        lines += ["", "## Skipped sources", ""] + [f"- {r['name']}: {r['reason']}" for r in bad]
    if m.get("ignored"):
        lines += ["", "## Files that are not images (ignored)", ""] + [f"- {i['path']}: {i['reason']}" for i in m["ignored"]]
    return "\n".join(lines) + "\n"
