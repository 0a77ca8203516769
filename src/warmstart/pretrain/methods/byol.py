"""BYOL: no negatives; an online network predicts a momentum target network's projection.

References
----------
J.-B. Grill et al., "Bootstrap Your Own Latent: A New Approach to Self-Supervised Learning",
NeurIPS 2020, arXiv:2006.07733. Heads, loss and momentum utilities are lightly's.
"""
from __future__ import annotations

import torch
from lightly.loss import NegativeCosineSimilarity
from lightly.models.modules.heads import BYOLPredictionHead, BYOLProjectionHead
from torch import nn

from .base import Views, pooled, register_method
from .momentum import MomentumMethod


@register_method("byol")
class BYOL(MomentumMethod):
    """Symmetric BYOL loss ``(d(p1, z2) + d(p2, z1)) / 2`` with ``d = -cos``; momentum from
    ``momentum`` to 1 on a cosine schedule."""

    def __init__(self, encoder: nn.Module, hidden_dim: int = 1024, output_dim: int = 128, momentum: float = 0.99) -> None:
        super().__init__(encoder)
        dim = encoder.spec.out_channels
        self.head = BYOLProjectionHead(dim, hidden_dim, output_dim)
        self.predictor = BYOLPredictionHead(output_dim, hidden_dim, output_dim)
        self._make_momentum_copies(momentum)
        self.criterion = NegativeCosineSimilarity()

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        f1, f2 = pooled(self.encoder, view1), pooled(self.encoder, view2)
        p1, p2 = self.predictor(self.head(f1)), self.predictor(self.head(f2))
        with torch.no_grad():
            t1 = self.head_momentum(pooled(self.encoder_momentum, view1))
            t2 = self.head_momentum(pooled(self.encoder_momentum, view2))
        return 0.5 * (self.criterion(p1, t2) + self.criterion(p2, t1)), {"embedding": f1.detach(), "embedding2": f2.detach()}
