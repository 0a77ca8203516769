"""How the benchmark's figures are written in a table cell (the same in bench.md and bench.html)."""
from __future__ import annotations

from typing import Any

__all__ = ["ci", "num", "epochs_cell", "measure_table", "pairs_table", "volume_table", "unit", "size_heading",
           "measure_note", "shown_slices", "MEASURE_NOTE", "PAIRS_NOTE"]

PAIRS_NOTE = ("Final test Dice, paired by replicate: paired t test, p values adjusted for the whole table by "
              "Holm's step-down method.")

MEASURE_NOTE = ("What users measure, computed on every test slice from the prediction and from the label, per "
                "class: phase fraction, specific surface (interface length per area, 1/px), mean local thickness "
                "(px) and connected objects. Each cell: the mean absolute error over replicates [95 % t interval] "
                "(n), the mean relative error (of the label's value), and for warm starts the paired difference "
                "of the absolute error from random init's (negative: smaller error; *: its interval excludes zero).")


def unit(result: dict[str, Any]) -> str:
    """What the training sets count: ``tile`` or ``cube`` (reports written before cubes: tiles)."""
    return str(result.get("unit", "tile"))


def size_heading(result: dict[str, Any], n: Any) -> str:
    """``4 training cubes (442,368 labelled voxels)``: a size's heading, with its labelled voxels."""
    u = unit(result)
    vox = (result.get("labelled_voxels") or {}).get(str(n))
    return f"{n} training {u}{'' if int(n) == 1 else 's'}" + (f" ({vox:,} labelled voxels)" if vox else "")


def measure_note(result: dict[str, Any]) -> str:
    """:data:`MEASURE_NOTE`, for slabs in 3-D when the test set is slabs."""
    if unit(result) != "cube":
        return MEASURE_NOTE
    return MEASURE_NOTE.replace("on every test slice", "on every test slab, in 3-D,").replace(
        "interface length per area, 1/px", "interface area per volume, 1/voxel").replace("(px)", "(voxels)")


def shown_slices(split: dict[str, Any], count: int = 3) -> list[tuple[int, int]]:
    """The test slices the report's montage shows: the first test slices, or the middle slice of
    each of the first test slabs (the slices the benchmark keeps predictions of)."""
    if split.get("kind") == "cubes":
        return [(i, (a + b - 1) // 2) for i, a, b in split["test_regions"][:count]]
    return [tuple(t) for t in split["test"][:count]]  # type: ignore[misc]


def num(x: Any, d: int = 3) -> str:
    """A number with ``d`` decimals, or ``n/a``."""
    return "n/a" if x is None else f"{x:.{d}f}"


def ci(r: dict[str, Any], d: int = 3) -> str:
    """``mean [low, high] (n = N)``: every interval with its number of replicates."""
    if r.get("mean") is None:
        return "n/a"
    n = f" (n = {r['n']})" if r.get("n") else ""
    if r.get("low") is None:
        return f"{r['mean']:.{d}f}{n}"
    return f"{r['mean']:.{d}f} [{r['low']:.{d}f}, {r['high']:.{d}f}]{n}"


def epochs_cell(row: dict[str, Any]) -> str:
    """Epochs to 95 % of random init's best validation Dice, with (reached / runs)."""
    e = row.get("epochs_to_95pct_random")
    if not e:
        return "n/a"
    return f"{ci(e, 1)} ({e['reached']}/{e.get('runs', e['reached'])})"


def measure_table(result: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """The measurement-error table: per size, contender and class, the mean absolute error of
    each quantity over replicates and, for warm starts, its paired difference from random init
    (negative: smaller error; ``*``: the interval excludes zero)."""
    from .measures import NAMES, QUANTITIES

    labels = {c["id"]: c["label"] for c in result["contenders"]}
    head = [f"{unit(result)}s", "contender", "class"] + [f"{NAMES[q]} error" for q in QUANTITIES]
    rows = []
    for n, by in result["summary"].items():
        for cid, row in by.items():
            errs, vs = row.get("measure_errors") or {}, row.get("measure_errors_vs_random") or {}
            rel = row.get("measure_relative_errors") or {}
            for k in sorted({key.split("/")[0] for key in errs}, key=int):
                cells = []
                for q in QUANTITIES:
                    cell = ci(errs.get(f"{k}/{q}", {}))
                    r = rel.get(f"{k}/{q}") or {}
                    if r.get("mean") is not None:
                        cell += f"; relative {100 * r['mean']:.1f} %"
                    d = vs.get(f"{k}/{q}")
                    if d and d.get("mean") is not None:
                        cell += f"; vs random {d['mean']:+.3f}{' *' if d['significant'] else ''}"
                    cells.append(cell)
                rows.append([str(n), labels[cid], str(k), *cells])
    return head, rows


def pairs_table(result: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """Every pair of contenders (:mod:`.ranking`): difference of final test Dice, pairs, p and Holm's p."""
    labels = {c["id"]: c["label"] for c in result["contenders"]}
    head = [f"{unit(result)}s", "contender", "vs", "difference", "pairs", "p", "p (Holm)"]
    rows = [[str(r["size"]), labels[r["a"]], labels[r["b"]], num(r["difference"]), str(r["pairs"]), num(r["p"]),
             num(r["p_holm"])] for r in (result.get("recommendation") or {}).get("pairs") or []]
    return head, rows


def volume_table(result: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """Mean foreground test Dice on each labelled volume's test voxels (a column per volume that
    holds test voxels), per size and contender; no rows for runs recorded before this figure."""
    from .stats import bounded_ci

    names = [v["name"] for v in result.get("labels", [])]
    first = next((r["test_dice_per_volume"] for r in result["runs"] if r.get("test_dice_per_volume")), None)
    if not first:
        return [], []
    keys = sorted(first, key=int)
    rows = []
    for n in result["settings"]["sizes"]:
        for c in result["contenders"]:
            rs = [r for r in result["runs"] if r["size"] == n and r["contender"] == c["id"] and r.get("test_dice_per_volume")]
            if rs:
                rows.append([str(n), c["label"], *(ci(bounded_ci([r["test_dice_per_volume"][k] for r in rs])) for k in keys)])
    head = [f"{unit(result)}s", "contender"] + [names[int(k)] if int(k) < len(names) else k for k in keys]
    return head, rows


def convergence_note(result: dict[str, Any]) -> str:
    """The convergence rule and the learned-class rule, in words, with their settings."""
    s = result["settings"]
    return (f"A run converged when its best validation Dice of the last {s.get('plateau_epochs', 3)} epochs is at most "
            f"{s.get('plateau_margin', 0.01):g} above its best before them; a run learned every class when each "
            f"foreground class reached test Dice {s.get('learned_dice', 0.1):g}. Flagged replicates are averaged in "
            "above like the others: read their means as the figures of runs that may not have finished learning.")


def convergence_table(result: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """Per size and contender: converged runs, runs that learned every class, and the flagged
    replicates (no rows for runs recorded before these figures)."""
    rows = []
    for n in result["settings"]["sizes"]:
        for c in result["contenders"]:
            rs = [r for r in result["runs"] if r["size"] == n and r["contender"] == c["id"] and "converged" in r]
            if not rs:
                continue
            flagged = [f"{r['seed']}" + ("" if r["converged"] else " (no plateau)")
                       + ("" if r["learned_every_class"] else " (missed a class)")
                       for r in sorted(rs, key=lambda r: r["seed"]) if not (r["converged"] and r["learned_every_class"])]
            rows.append([str(n), c["label"], f"{sum(r['converged'] for r in rs)} of {len(rs)}",
                         f"{sum(r['learned_every_class'] for r in rs)} of {len(rs)}", ", ".join(flagged) or "none"])
    return [f"{unit(result)}s", "contender", "converged", "learned every class", "flagged replicates"], rows
