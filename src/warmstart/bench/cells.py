"""How the benchmark's figures are written in a table cell (the same in bench.md and bench.html)."""
from __future__ import annotations

from typing import Any

__all__ = ["ci", "epochs_cell"]


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
