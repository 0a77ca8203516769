"""``bench.html``: the benchmark as a page to hand to a user.

One self-contained file (figures inline as PNG data, a few lines of CSS, no scripts, nothing
fetched): the headline sentences first, then HTML tables per training-set size, the learning
curve, Dice per replicate and per class, validation curves, test predictions next to their
labels with a legend of the class colours, every pair of contenders, and the settings and the
split at the end. ``bench.md`` and ``bench.json`` carry the same figures.
"""
from __future__ import annotations

import html
from typing import Any, Sequence

from .cells import ci as _ci
from .cells import PAIRS_NOTE, convergence_note, convergence_table, epochs_cell, measure_note, measure_table, \
    pairs_table, size_heading, unit, volume_table

__all__ = ["html_page", "CLASS_COLOURS"]

CLASS_COLOURS = ("#000000", "#e0a526", "#2a9d8f", "#c8553d", "#6d5bd0", "#8ab17d", "#3c6e9f", "#d67fbd")
"""Colours of class 0, 1, ... in the prediction panels (class 0, usually background, is black);
classes beyond the list reuse it in order."""

_CSS = ("body{font-family:sans-serif;max-width:1100px;margin:auto;padding:0 1em;color:#222}"
        "table{border-collapse:collapse;margin:.5em 0 1.2em}th,td{border:1px solid #bbb;padding:.25em .5em;"
        "text-align:right}th{background:#eee}td:first-child,th:first-child{text-align:left}"
        ".headline{font-size:1.1em;background:#f4f1e8;border-left:4px solid #e0a526;padding:.4em .8em}"
        ".legend span{display:inline-block;width:1em;height:1em;margin:0 .3em 0 1em;vertical-align:middle;"
        "border:1px solid #888}img{max-width:100%}small{color:#555}")


def _e(x: Any) -> str:
    return html.escape(str(x))


def _table(head: Sequence[str], rows: Sequence[Sequence[Any]], caption: str = "") -> str:
    cap = f"<caption>{_e(caption)}</caption>" if caption else ""
    body = "".join("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table>{cap}<tr>{''.join(f'<th>{_e(h)}</th>' for h in head)}</tr>{body}</table>"


def _section(title: str, note: str, head: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A titled table with its note (none: ``""``); nothing when it has no rows."""
    if not rows:
        return ""
    return f"<h2>{_e(title)}</h2>" + (f"<p>{_e(note)}</p>" if note else "") + _table(head, rows)


def html_page(result: dict[str, Any], figures: Sequence[tuple[str, str]], intro: str, class_names: Sequence[str]) -> str:
    """The page.

    Parameters
    ----------
    result : dict
        What ``bench.json`` holds.
    figures : list of (title, base64 PNG)
        From the report's plots, in page order.
    intro : str
        The paragraph that describes the set-up (as in ``bench.md``).
    class_names : list of str
        One name per class, for the legend of the prediction panels.
    """
    labels = {c["id"]: c["label"] for c in result["contenders"]}
    s = result["settings"]
    parts = ["<!doctype html><html lang='en'><head><meta charset='utf-8'><title>warmstart benchmark</title>",
             f"<style>{_CSS}</style></head><body><h1>Few-shot segmentation benchmark</h1>"]
    heads = [r["sentence"] for r in result.get("labels_saved", [])]
    rec = result.get("recommendation") or {}
    if rec.get("sentence"):
        heads.append(rec["sentence"])
    parts += [f"<p class='headline'>{_e(t)}</p>" for t in heads]
    parts.append(f"<p>{_e(intro)}</p>")
    for n, rows in result["summary"].items():
        body = []
        for cid, row in rows.items():
            vs = row.get("vs_random", {})

            def d(f: str) -> str:
                return "" if f not in vs or vs[f]["mean"] is None else \
                    f"{_ci(vs[f])}{' *' if vs[f]['significant'] else ''}"

            body.append([labels[cid], _ci(row["test_dice"]), _ci(row["early_dice"]), _ci(row["curve_area"]),
                         epochs_cell(row), d("test_dice"), d("early_dice")])
        parts.append(f"<h2>{_e(size_heading(result, n))}</h2>" + _table(
            ["contender", "final test Dice", "early Dice", "curve area", "epochs to 95 % of random's best (reached)",
             "test Dice vs random", "early Dice vs random"], body))
    parts.append("<p><small>Means over replicates with 95 % intervals (n: replicates): Dice and curve area on the "
                 "logit scale, inside [0, 1]; epochs: Student t. Differences are paired by replicate with signed Student "
                 "t intervals; *: the interval of the difference excludes zero.</small></p>")
    figs = dict(figures)
    for title, b64 in figures:
        if title.startswith("Test predictions"):
            continue
        parts.append(f"<h2>{_e(title)}</h2><img alt='{_e(title)}' src='data:image/png;base64,{b64}'>")
    parts.append(_section("Convergence", convergence_note(result), *convergence_table(result)))
    parts.append(_per_class(result, labels, class_names))
    parts.append(_section("Test Dice per labelled volume", "", *volume_table(result)))
    parts.append(_section("Measurement error", measure_note(result), *measure_table(result)))
    pred = next(((t, b) for t, b in figs.items() if t.startswith("Test predictions")), None)
    if pred:
        legend = "".join(f"<span style='background:{CLASS_COLOURS[k % len(CLASS_COLOURS)]}'></span>{_e(name)}"
                         for k, name in enumerate(class_names))
        parts.append(f"<h2>{_e(pred[0])}</h2><p class='legend'>Classes:{legend}</p>"
                     f"<img alt='{_e(pred[0])}' src='data:image/png;base64,{pred[1]}'>")
    parts.append(_section("Every pair of contenders", PAIRS_NOTE, *pairs_table(result)))
    parts.append("<h2>Settings</h2>" + _table(["setting", "value"], [[k, v] for k, v in s.items()]))
    split = result["split"]
    if split.get("kind") == "cubes":
        parts.append("<h2>Split</h2>" + _table(["set", "image: slices z0-z1, or cube (z, y, x) and side (d, h, w)"], [
            ["test slabs", ", ".join(f"{i}: {a}-{b - 1}" for i, a, b in split["test_regions"])],
            ["validation slabs", ", ".join(f"{i}: {a}-{b - 1}" for i, a, b in split["val_regions"])],
            ["training cubes (in order)", ", ".join(f"{i}: ({z}, {y}, {x}) {d}x{h}x{w}"
                                                    for i, z, y, x, d, h, w in split["cubes"])]]))
    else:
        parts.append("<h2>Split</h2>" + _table(["set", "slices (image, z)"], [
            ["test", ", ".join(f"{i}:{z}" for i, z in split["test"])],
            ["validation", ", ".join(f"{i}:{z}" for i, z in split["val"])]]))
    parts.append("</body></html>")
    return "".join(parts)


def _per_class(result: dict[str, Any], labels: dict[str, str], class_names: Sequence[str]) -> str:
    """Mean test Dice of every class, per contender and size."""
    from .stats import bounded_ci

    rows = []
    for n in result["settings"]["sizes"]:
        for cid, label in labels.items():
            rs = [r for r in result["runs"] if r["size"] == n and r["contender"] == cid]
            if not rs or "test_dice_per_class" not in rs[0]:
                continue
            per = [_ci(bounded_ci([r["test_dice_per_class"][k] for r in rs])) for k in range(len(class_names))]
            rows.append([n, label, *per])
    if not rows:
        return ""
    return "<h2>Test Dice per class</h2>" + _table([f"{unit(result)}s", "contender", *class_names], rows)
