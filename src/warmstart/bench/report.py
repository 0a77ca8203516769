"""The benchmark report: ``bench.json`` (every run, every epoch), ``bench.md`` (tables and the
verdict in words) and ``bench.html`` (a page with the same figures, tables and plots; one
self-contained file, see :mod:`.html_page`)."""
from __future__ import annotations

import base64
import io
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..base.atomic import write_json
from .cells import ci as _ci
from .cells import PAIRS_NOTE, convergence_note, convergence_table, epochs_cell, measure_note, measure_table, \
    pairs_table, shown_slices, size_heading, unit, volume_table
from .cells import num as _num

__all__ = ["write_report", "markdown", "verdicts"]

_NAMES = {"test_dice": "final test Dice", "early_dice": "early validation Dice", "curve_area": "curve area"}


def verdicts(result: dict[str, Any]) -> list[str]:
    """One sentence per (encoder, size, figure): the paired difference, and whether it is
    significant at 95 % (its t interval excludes zero)."""
    out = []
    labels = {c["id"]: c["label"] for c in result["contenders"]}
    u = unit(result)
    for n, rows in result["summary"].items():
        for cid, row in rows.items():
            for f, d in row.get("vs_random", {}).items():
                if d["mean"] is None:
                    continue
                sig = "significant at 95 %" if d["significant"] else "not significant at 95 %"
                p = "n/a" if d["wilcoxon_p"] is None else f"{d['wilcoxon_p']:.3g}"
                out.append(f"{labels[cid]}, {n} {u}(s), {_NAMES[f]}: {d['mean']:+.3f} vs random "
                           f"(95 % CI {_num(d['low'])} to {_num(d['high'])}, Wilcoxon p = {p}, better in {d['wins']} of "
                           f"{d['pairs']} replicates): {sig}.")
    return out


def _md_section(title: str, note: str, head: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    """A titled markdown table with its note (none: ``""``); no lines when it has no rows."""
    if not rows:
        return []
    return [f"## {title}", "", *([note, ""] if note else []), "| " + " | ".join(head) + " |", "|" + "---|" * len(head),
            *("| " + " | ".join(r) + " |" for r in rows), ""]


def intro(result: dict[str, Any]) -> str:
    """The paragraph that describes the set-up (the same in bench.md and bench.html)."""
    s = result["settings"]
    if unit(result) == "cube":
        split = result["split"]
        return (f"{len(result['contenders'])} contenders, training sets of {', '.join(map(str, s['sizes']))} labelled "
                f"cube(s) of up to {s['cube_size']} voxels a side (nested), {s['replicates']} replicates each, "
                f"{s['epochs']} epochs x {s['steps_per_epoch']} steps; 3-D contenders: {s['cube_batch_size']} patches of "
                f"{s['cube_patch_size']} voxels a side per step, predicted by sliding windows of that side overlapping by "
                f"{s['window_overlap']:.0%} with Gaussian blending; 2-D contenders: {s['batch_size']} patches of up to "
                f"{s['patch_size']} px per step from the cubes' slices, predicted slice by slice. {result['classes']} "
                f"classes; test: {len(split['test_regions'])} slabs of {s['region_slices']} whole slices "
                f"({len(split['test'])} slices), validation: {len(split['val_regions'])} slab(s) ({len(split['val'])} "
                f"slices), every cube at least {s['gap_slices']} slices from them; every contender is scored on the same "
                f"test voxels; device {result['device']}. Means over replicates with 95 % intervals (Dice and curve "
                "area: Student t on the logit scale, so they stay inside [0, 1]; other figures: Student t); differences "
                "are paired by replicate (same patches and decoder initialization within 2-D and within 3-D) and keep "
                "signed Student t intervals.")
    return (f"{len(result['contenders'])} contenders, training sets of {', '.join(map(str, s['sizes']))} tile(s) of "
            f"{s['tile_size']} px, {s['replicates']} replicates each, {s['epochs']} epochs x {s['steps_per_epoch']} steps of "
            f"{s['batch_size']} patches of {s['patch_size']} px; {result['classes']} classes; test: "
            f"{len(result['split']['test'])} whole slices, validation: {len(result['split']['val'])}; device "
            f"{result['device']}. Means over replicates with 95 % intervals (Dice and curve area: Student t on the logit "
            "scale, so they stay inside [0, 1]; other figures: Student t); differences are paired by replicate (same "
            "patches, same decoder initialization) and keep signed Student t intervals.")


def markdown(result: dict[str, Any]) -> str:
    s = result["settings"]
    labels = {c["id"]: c["label"] for c in result["contenders"]}
    saved = [r["sentence"] for r in result.get("labels_saved", [])]
    rec = result.get("recommendation") or {}
    if rec.get("sentence"):
        saved.append(rec["sentence"])
    lines = ["# Few-shot segmentation benchmark", ""] + ([f"**{t}**" for t in saved] + [""] if saved else []) + [
             intro(result), ""]
    for n, rows in result["summary"].items():
        lines += [f"## {size_heading(result, n)}", "",
                  "| contender | final test Dice | early Dice | curve area | epochs to 95 % of random's best "
                  "(reached) | test Dice vs random | early Dice vs random |",
                  "|---|---|---|---|---|---|---|"]
        for cid, row in rows.items():
            e = epochs_cell(row)
            vs = row.get("vs_random", {})

            def d(f: str) -> str:
                if f not in vs or vs[f]["mean"] is None:
                    return ""
                return f"{_ci(vs[f])}{' *' if vs[f]['significant'] else ''}"

            lines.append(f"| {labels[cid]} | {_ci(row['test_dice'])} | {_ci(row['early_dice'])} | {_ci(row['curve_area'])} | "
                         f"{e} | {d('test_dice')} | {d('early_dice')} |")
        lines.append("")
    what = (f"A cube is a labelled sub-volume (up to {s['cube_size']} voxels a side); the training set of each size "
            "holds that many cubes, and 2-D contenders train on their slices (the same labelled voxels)."
            if unit(result) == "cube" else
            f"A tile is a square labelled crop of one slice (up to {s['tile_size']} px a side); the training "
            "set of each size holds that many tiles.")
    lines += [f"{what} Early Dice: validation Dice after "
              f"{s['early_steps']} steps. Curve area: the mean validation Dice over the epochs (the area under "
              "the validation-Dice curve divided by its length; higher means good Dice sooner). Epochs to 95 % of "
              "random's best: the first epoch whose validation Dice reaches 95 % of the best mean validation Dice "
              "of random initialization at that size (a threshold every task has; the absolute "
              f"`bench.dice_threshold` {s['dice_threshold']:g} stays in bench.json), averaged "
              "over the replicates that reached it; (reached) counts those replicates out of all. "
              "`*`: the 95 % interval of the paired difference excludes zero.", "", "## In words", ""] + [f"- {v}" for v in verdicts(result)] + [""]
    lines += _md_section("Convergence", convergence_note(result), *convergence_table(result))
    lines += _md_section("Test Dice per labelled volume", "", *volume_table(result))
    lines += _md_section("Measurement error", measure_note(result), *measure_table(result))
    lines += _md_section("Every pair of contenders", PAIRS_NOTE, *pairs_table(result))
    lines += ["## Contenders", ""]
    for c in result["contenders"]:
        lines.append(f"- **{c['label']}** (`{c['id']}`): {c['spec']['name']} {c['spec']['params']}; input: {c['normalization']}")
        if c["leakage"]:
            lines.append(f"  - **tested on data seen in pretraining**: {', '.join(c['leakage'])} are corpus sources of this encoder")
        for m in c["mismatch"][:5]:
            lines.append(f"  - data check: {m}")
    return "\n".join(lines) + "\n"


def _png(fig: Any) -> str:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode()


def _plots(result: dict[str, Any], pairs: Sequence[Any], out: Path) -> list[tuple[str, str]]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .stats import bounded_ci

    cons = result["contenders"]
    sizes = result["settings"]["sizes"]
    u = unit(result)
    figs = []
    fig, axes = plt.subplots(1, len(sizes), figsize=(3.2 * len(sizes), 3.2), squeeze=False, sharey=True)
    for ax, n in zip(axes[0], sizes):
        data = [[r["test_dice"] for r in result["runs"] if r["size"] == n and r["contender"] == c["id"]] for c in cons]
        ax.boxplot(data, widths=0.5, showfliers=False)
        for k, vals in enumerate(data):
            ax.scatter(np.full(len(vals), k + 1) + np.linspace(-0.08, 0.08, len(vals)), vals, s=14, zorder=3)
        ax.set_xticks(range(1, len(cons) + 1), [c["id"] for c in cons], rotation=30, ha="right")
        ax.set_title(f"{n} {u}(s)")
    axes[0][0].set_ylabel("test Dice (foreground mean)")
    figs.append(("Final test Dice per replicate", _png(fig)))
    fig, ax = plt.subplots(figsize=(4.5, 3.2))
    for c in cons:  # the learning curve: final Dice against labelled tiles (log axis), 95 % band
        ci = [bounded_ci([r["test_dice"] for r in result["runs"] if r["size"] == n and r["contender"] == c["id"]])
              for n in sizes]
        have = [(n, x) for n, x in zip(sizes, ci) if x["mean"] is not None]
        if not have:
            continue
        ax.plot([n for n, _ in have], [x["mean"] for _, x in have], marker="o", label=c["id"])
        band = [(n, x) for n, x in have if x["low"] is not None]
        if band:  # Dice is bounded: the band is drawn inside [0, 1]
            ax.fill_between([n for n, _ in band], [max(0.0, x["low"]) for _, x in band],
                            [min(1.0, x["high"]) for _, x in band], alpha=0.2)
    ax.set_xscale("log", base=2)
    ax.set_xticks(sizes, [str(n) for n in sizes])
    ax.set_xlabel(f"labelled {u}s")
    ax.set_ylabel("final test Dice")
    ax.legend(fontsize=7)
    figs.append((f"Learning curve: final test Dice against labelled {u}s (mean, 95 % band)", _png(fig)))
    fig, axes = plt.subplots(1, len(sizes), figsize=(3.2 * len(sizes), 3.0), squeeze=False, sharey=True)
    for ax, n in zip(axes[0], sizes):
        for c in cons:
            curves = np.array([r["val_dice"] for r in result["runs"] if r["size"] == n and r["contender"] == c["id"]])
            if not len(curves):
                continue
            ep = np.arange(1, curves.shape[1] + 1)
            ci = [bounded_ci(curves[:, k]) for k in range(curves.shape[1])]
            m = np.array([x["mean"] for x in ci])
            ax.plot(ep, m, label=c["id"])
            if curves.shape[0] > 1:  # Dice is bounded: the band is drawn inside [0, 1]
                ax.fill_between(ep, [max(0.0, x["low"]) for x in ci], [min(1.0, x["high"]) for x in ci], alpha=0.2)
        ax.set_title(f"{n} {u}(s)")
        ax.set_xlabel("epoch")
    axes[0][0].set_ylabel("validation Dice")
    axes[0][-1].legend(fontsize=7)
    figs.append(("Validation Dice per epoch (mean, 95 % band)", _png(fig)))
    n0 = sizes[0]
    preds = {c["id"]: out / "runs" / f"{c['id']}-n{n0}-s0-pred.npz" for c in cons}
    preds = {k: np.load(v) for k, v in preds.items() if v.exists()}
    test = shown_slices(result["split"])
    if preds and test:
        from matplotlib.colors import ListedColormap

        from .html_page import CLASS_COLOURS

        k = int(result["classes"])
        palette = [CLASS_COLOURS[j % len(CLASS_COLOURS)] for j in range(k)]
        classes = dict(cmap=ListedColormap(palette), vmin=-0.5, vmax=k - 0.5, interpolation="nearest")
        cols = 2 + len(preds)
        fig, axes = plt.subplots(len(test), cols, figsize=(2.2 * cols, 2.2 * len(test)), squeeze=False)
        for row, (i, z) in enumerate(test):
            img = pairs[i].image[z].astype(float)
            lo, hi = np.percentile(img, [1, 99])
            panels = [("image", img, dict(cmap="gray", vmin=lo, vmax=hi)), ("label", pairs[i].label[z], classes)]
            panels += [(k, p[f"arr_{row}"], classes) for k, p in preds.items() if f"arr_{row}" in p]
            for col, (title, a, kw) in enumerate(panels):
                axes[row][col].imshow(a, **kw)
                axes[row][col].set_axis_off()
                if row == 0:
                    axes[row][col].set_title(title, fontsize=8)
        what = "the middle slice of each test slab" if u == "cube" else "test slices"
        figs.append((f"Test predictions ({what}), {n0} {u}(s), replicate 0", _png(fig)))
    return figs


def write_report(out: Path, result: dict[str, Any], pairs: Sequence[Any]) -> dict[str, str]:
    """Write bench.json, bench.md and bench.html into ``out``; returns their paths."""
    paths = {"json": str(out / "bench.json"), "md": str(out / "bench.md"), "html": str(out / "bench.html")}
    write_json(out / "bench.json", {**result, "report": paths})
    md = markdown(result)
    (out / "bench.md").write_text(md, encoding="utf-8", errors="backslashreplace")
    from .html_page import html_page

    names = [f"class {k}" + (" (background)" if k == 0 else "") for k in range(int(result["classes"]))]
    (out / "bench.html").write_text(html_page(result, _plots(result, pairs, out), intro(result), names),
                                    encoding="utf-8", errors="backslashreplace")
    return paths
