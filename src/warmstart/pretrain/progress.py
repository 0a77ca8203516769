"""Training progress for Lightning: its bar on a terminal, a plain line every few seconds elsewhere."""
from __future__ import annotations

from typing import Any

import pytorch_lightning as pl
from pytorch_lightning.callbacks import ProgressBar

from ..base.progress import LINE_INTERVAL_S, PlainProgress, stderr_is_terminal

__all__ = ["PlainTrainingProgress", "training_progress"]


class PlainTrainingProgress(ProgressBar):
    """``pretrain: N/TOTAL steps (p %), S s, loss L`` on stderr at most every ``interval`` seconds."""

    def __init__(self, interval: float = LINE_INTERVAL_S) -> None:
        super().__init__()
        self.interval = interval
        self._enabled = True
        self._line: PlainProgress | None = None

    def disable(self) -> None:
        self._enabled = False

    def enable(self) -> None:
        self._enabled = True

    def on_train_start(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        total = trainer.fit_loop.epoch_loop.max_steps
        self._line = PlainProgress(total=total if total and total > 0 else None, desc="pretrain", unit="steps",
                                   initial=int(trainer.global_step), interval=self.interval,
                                   disable=not (self._enabled and trainer.is_global_zero))

    def on_train_batch_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule, outputs: Any, batch: Any,
                           batch_idx: int) -> None:
        if self._line is None:
            return
        loss = trainer.callback_metrics.get("loss_bar")
        if loss is not None:
            self._line.set_postfix_str(f"loss {float(loss):.4f}")
        self._line.update(int(trainer.global_step) - self._line.n)

    def on_train_end(self, trainer: pl.Trainer, pl_module: pl.LightningModule) -> None:
        if self._line is not None:
            self._line.close()
            self._line = None


def training_progress(enabled: bool) -> list[pl.Callback]:
    """The progress callback to add (none on a terminal: Lightning's own bar is kept)."""
    return [] if not enabled or stderr_is_terminal() else [PlainTrainingProgress()]
