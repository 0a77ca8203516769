"""A contrastive method and restoration on one shared encoder: ``w_c * contrastive + w_r * restoration``.

The contrastive part (``simclr``, ``moco_v2``, ``byol`` or ``dense``) sees the two views; the
restoration part (:mod:`.restore`) restores the un-augmented batch from its corruption and trains
the decoder, which the export can keep (``--with-decoder``).
"""
from __future__ import annotations

from typing import Any

import torch
from torch import nn

from .base import Method, Views, build_method, register_method
from .restore import Restore


@register_method("combined")
class Combined(Method):
    """Parameters: ``contrastive`` (a method name), ``contrastive_weight``, ``restore_weight``,
    and ``contrastive_params`` / ``restore_params`` tables for the two parts."""

    trains_decoder = True

    def __init__(self, encoder: nn.Module, contrastive: str = "simclr", contrastive_weight: float = 1.0,
                 restore_weight: float = 1.0, contrastive_params: dict[str, Any] | None = None,
                 restore_params: dict[str, Any] | None = None) -> None:
        super().__init__(encoder)
        if contrastive in ("combined", "restore"):
            raise ValueError(f"combined.contrastive must be a contrastive method, got {contrastive!r}")
        if contrastive_weight < 0 or restore_weight < 0 or contrastive_weight + restore_weight == 0:
            raise ValueError("combined weights must be >= 0 and not both 0")
        self.contrastive = build_method(contrastive, encoder, **(contrastive_params or {}))
        self.restore = Restore(encoder, **(restore_params or {}))
        self.weights = (float(contrastive_weight), float(restore_weight))

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        if views is None:
            raise ValueError("combined needs the un-augmented batch (Views)")
        lc, out = self.contrastive.loss(view1, view2, views)
        lr, _ = self.restore.loss(view1, view2, views)
        return self.weights[0] * lc + self.weights[1] * lr, out

    def after_step(self, step: int, total_steps: int) -> None:
        self.contrastive.after_step(step, total_steps)

    def extra_state(self) -> dict[str, torch.Tensor]:
        return self.contrastive.extra_state()

    def load_extra_state(self, state: dict[str, torch.Tensor]) -> None:
        self.contrastive.load_extra_state(state)

    def exported_encoder(self, momentum: bool = False) -> nn.Module:
        return self.contrastive.exported_encoder(momentum)

    def exported_decoder(self) -> nn.Module:
        return self.restore.decoder
