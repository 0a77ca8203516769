"""SimCLR: NT-Xent contrastive loss between two views, projection head on the pooled features.

References
----------
T. Chen, S. Kornblith, M. Norouzi, G. Hinton, "A Simple Framework for Contrastive Learning of
Visual Representations", ICML 2020, arXiv:2002.05709. Loss and head are lightly's.
"""
from __future__ import annotations

import torch
from lightly.loss import NTXentLoss
from lightly.models.modules.heads import SimCLRProjectionHead
from torch import nn

from .base import Method, Views, pooled, register_method


@register_method("simclr")
class SimCLR(Method):
    """Parameters: ``hidden_dim`` and ``output_dim`` of the projection head, ``temperature``."""

    def __init__(self, encoder: nn.Module, hidden_dim: int = 512, output_dim: int = 128, temperature: float = 0.1) -> None:
        super().__init__(encoder)
        dim = encoder.spec.out_channels
        self.head = SimCLRProjectionHead(input_dim=dim, hidden_dim=hidden_dim, output_dim=output_dim)
        self.criterion = NTXentLoss(temperature=temperature, gather_distributed=True)

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        f1, f2 = pooled(self.encoder, view1), pooled(self.encoder, view2)  # (B, C)
        z1, z2 = self.head(f1), self.head(f2)  # (B, D)
        return self.criterion(z1, z2), {"embedding": f1.detach(), "embedding2": f2.detach()}
