"""Shared machinery of methods with a momentum (EMA) copy of the online network (MoCo, BYOL)."""
from __future__ import annotations

import copy

import torch
from lightly.models.utils import deactivate_requires_grad, update_momentum
from lightly.utils.scheduler import cosine_schedule
from torch import nn

from .base import Method

__all__ = ["MomentumMethod"]


class MomentumMethod(Method):
    """A method whose ``encoder`` and ``head`` have frozen momentum copies, updated after every
    optimizer step with a momentum rising from ``base_momentum`` to 1 on a cosine schedule."""

    def _make_momentum_copies(self, momentum: float) -> None:
        """Call once ``self.encoder`` and ``self.head`` exist."""
        self.encoder_momentum = copy.deepcopy(self.encoder)
        self.head_momentum = copy.deepcopy(self.head)
        deactivate_requires_grad(self.encoder_momentum)
        deactivate_requires_grad(self.head_momentum)
        self.base_momentum = momentum

    def momentum_at(self, step: int, total_steps: int) -> float:
        return float(cosine_schedule(step, max(total_steps, 1), self.base_momentum, 1.0))

    @torch.no_grad()
    def after_step(self, step: int, total_steps: int) -> None:
        m = self.momentum_at(step, total_steps)
        update_momentum(self.encoder, self.encoder_momentum, m)
        update_momentum(self.head, self.head_momentum, m)

    def exported_encoder(self, momentum: bool = False) -> nn.Module:
        return self.encoder_momentum if momentum else self.encoder
