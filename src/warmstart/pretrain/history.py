"""``history.csv``: the run's one history file, written by a Lightning logger as training goes.

One row per optimizer step (``step, loss, lr, spread, alignment, uniformity, knn``); figures logged
once an epoch (``knn``) join the row of the last step before them. Rows reach the file every
``flush_every`` steps, so a run that is killed keeps its history up to its last flush; a resumed
run replaces the rows of the steps it runs again (the later value wins), so the file of a run
interrupted and resumed reads like the file of one uninterrupted run. Lightning's own CSV logger is
not used: its file would duplicate this one, and it starts afresh on every resume.
"""
from __future__ import annotations

import csv
import os
from pathlib import Path
from typing import Any, Mapping

from pytorch_lightning.loggers.logger import Logger
from pytorch_lightning.utilities import rank_zero_only

from ..base.atomic import write_text

__all__ = ["HistoryLogger", "HISTORY_COLUMNS", "read_history"]

HISTORY_COLUMNS = ("step", "loss", "lr", "spread", "alignment", "uniformity", "knn")


def read_history(path: str | os.PathLike[str]) -> list[dict[str, float]]:
    """Rows of a ``history.csv`` as floats (``step`` as int); empty cells left out."""
    path = Path(path)
    if not path.exists():
        return []
    with open(path, newline="") as fh:
        return [{k: (int(float(v)) if k == "step" else float(v)) for k, v in r.items() if v not in ("", None)}
                for r in csv.DictReader(fh)]


class HistoryLogger(Logger):
    """A Lightning logger that writes ``history.csv`` (rank 0 only).

    Parameters
    ----------
    path : path
        The history file.
    resume : bool
        Keep the rows already in the file (those of steps run again are replaced).
    flush_every : int
        Steps between writes to disk.
    save_dir : path, optional
        What ``trainer.log_dir`` reports (the folder of the training library's own files).
    """

    def __init__(self, path: str | os.PathLike[str], resume: bool = False, flush_every: int = 10,
                 save_dir: str | os.PathLike[str] | None = None) -> None:
        super().__init__()
        self.path = Path(path)
        self._save_dir = None if save_dir is None else str(save_dir)
        self.flush_every = int(flush_every)
        self._kept = read_history(self.path) if resume else []
        self._pending: list[dict[str, float]] = []
        self._started = False

    @property
    def name(self) -> str:
        return "history"

    @property
    def version(self) -> str:
        return ""

    @property
    def save_dir(self) -> str | None:
        return self._save_dir

    @rank_zero_only
    def log_hyperparams(self, params: Any, *args: Any, **kwargs: Any) -> None:
        """Nothing: the run's ``recipe.json`` holds the settings."""

    @rank_zero_only
    def log_metrics(self, metrics: Mapping[str, float], step: int | None = None) -> None:
        values = {k: float(v) for k, v in metrics.items() if k in HISTORY_COLUMNS and k != "step"}
        if not values:
            return
        step = int(step or 0)
        if not self._started:
            # The first row of this process: rows of steps about to be rerun are dropped, the rest
            # rewritten, so appends continue a file that holds no step twice.
            self._started = True
            self._rewrite([r for r in self._kept if r["step"] < step])
        if "loss" in values:
            self._pending.append({"step": step, **values})
            if len(self._pending) > self.flush_every:
                self._append(self._pending[:-1])  # the newest row may still receive the epoch's figures
                self._pending = self._pending[-1:]
        elif self._pending:
            self._pending[-1].update(values)

    @rank_zero_only
    def finalize(self, status: str) -> None:
        if not self._started:
            self._started = True
            self._rewrite(self._kept)
        self._append(self._pending)
        self._pending = []

    def _rewrite(self, rows: list[dict[str, float]]) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        write_text(self.path, self._csv(rows, header=True))

    def _append(self, rows: list[dict[str, float]]) -> None:
        if rows:
            with open(self.path, "a", newline="") as fh:
                fh.write(self._csv(rows, header=False))

    @staticmethod
    def _csv(rows: list[dict[str, float]], header: bool) -> str:
        import io

        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=HISTORY_COLUMNS, extrasaction="ignore", lineterminator="\n")
        if header:
            w.writeheader()
        w.writerows(rows)
        return buf.getvalue()
