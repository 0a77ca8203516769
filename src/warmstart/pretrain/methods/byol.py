"""BYOL: no negatives; an online network predicts a momentum target network's projection.

References
----------
J.-B. Grill et al., "Bootstrap Your Own Latent: A New Approach to Self-Supervised Learning",
NeurIPS 2020, arXiv:2006.07733. Heads, loss and momentum utilities are lightly's.
"""
from __future__ import annotations

import copy

import torch
from lightly.loss import NegativeCosineSimilarity
from lightly.models.modules.heads import BYOLPredictionHead, BYOLProjectionHead
from lightly.models.utils import deactivate_requires_grad, update_momentum
from lightly.utils.scheduler import cosine_schedule
from torch import nn

from .base import Method, pooled, register_method


@register_method("byol")
class BYOL(Method):
    """Symmetric BYOL loss ``(d(p1, z2) + d(p2, z1)) / 2`` with ``d = -cos``; momentum from
    ``momentum`` to 1 on a cosine schedule."""

    def __init__(self, encoder: nn.Module, hidden_dim: int = 1024, output_dim: int = 128, momentum: float = 0.99) -> None:
        super().__init__(encoder)
        dim = encoder.spec.out_channels
        self.head = BYOLProjectionHead(dim, hidden_dim, output_dim)
        self.predictor = BYOLPredictionHead(output_dim, hidden_dim, output_dim)
        self.encoder_momentum = copy.deepcopy(encoder)
        self.head_momentum = copy.deepcopy(self.head)
        deactivate_requires_grad(self.encoder_momentum)
        deactivate_requires_grad(self.head_momentum)
        self.base_momentum = momentum
        self.criterion = NegativeCosineSimilarity()

    def loss(self, view1: torch.Tensor, view2: torch.Tensor) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        f1, f2 = pooled(self.encoder, view1), pooled(self.encoder, view2)
        p1, p2 = self.predictor(self.head(f1)), self.predictor(self.head(f2))
        with torch.no_grad():
            t1 = self.head_momentum(pooled(self.encoder_momentum, view1))
            t2 = self.head_momentum(pooled(self.encoder_momentum, view2))
        return 0.5 * (self.criterion(p1, t2) + self.criterion(p2, t1)), {"embedding": f1.detach(), "embedding2": f2.detach()}

    @torch.no_grad()
    def after_step(self, step: int, total_steps: int) -> None:
        m = float(cosine_schedule(step, max(total_steps, 1), self.base_momentum, 1.0))
        update_momentum(self.encoder, self.encoder_momentum, m)
        update_momentum(self.head, self.head_momentum, m)

    def exported_encoder(self, momentum: bool = False) -> nn.Module:
        return self.encoder_momentum if momentum else self.encoder
