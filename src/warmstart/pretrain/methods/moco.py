"""MoCo v2: a momentum key encoder and a queue of negatives, cosine momentum schedule.

References
----------
K. He, H. Fan, Y. Wu, S. Xie, R. Girshick, "Momentum Contrast for Unsupervised Visual
Representation Learning", CVPR 2020, arXiv:1911.05722; X. Chen, H. Fan, R. Girshick, K. He,
"Improved Baselines with Momentum Contrastive Learning", arXiv:2003.04297 (v2: MLP head,
stronger augmentation). Loss (NT-Xent with a memory bank), head and momentum utilities are lightly's.
"""
from __future__ import annotations

import torch
from lightly.loss import NTXentLoss
from lightly.models.modules.heads import MoCoProjectionHead
from torch import nn

from .base import Views, pooled, register_method
from .momentum import MomentumMethod


@register_method("moco_v2")
class MoCoV2(MomentumMethod):
    """Parameters: head sizes, ``temperature``, ``queue_size`` (negatives kept), and the momentum
    going from ``momentum`` to 1 on a cosine schedule over training."""

    def __init__(self, encoder: nn.Module, hidden_dim: int = 512, output_dim: int = 128, temperature: float = 0.2,
                 queue_size: int = 4096, momentum: float = 0.99) -> None:
        super().__init__(encoder)
        dim = encoder.spec.out_channels
        self.head = MoCoProjectionHead(dim, hidden_dim, output_dim)
        self._make_momentum_copies(momentum)
        self.criterion = NTXentLoss(temperature=temperature, memory_bank_size=(queue_size, output_dim), gather_distributed=True)

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        f1 = pooled(self.encoder, view1)
        q = self.head(f1)  # queries (B, D)
        with torch.no_grad():
            f2 = pooled(self.encoder_momentum, view2)
            k = self.head_momentum(f2)  # keys (B, D)
        return self.criterion(q, k), {"embedding": f1.detach(), "embedding2": f2}

    def extra_state(self) -> dict[str, torch.Tensor]:
        # lightly keeps the queue in non-persistent buffers; a resumed run needs it back.
        bank = self.criterion.memory_bank
        return {"queue": bank.bank.detach().clone(), "queue_ptr": bank.bank_ptr.detach().clone()}

    def load_extra_state(self, state: dict[str, torch.Tensor]) -> None:
        if "queue" in state:
            bank = self.criterion.memory_bank
            bank.bank.copy_(state["queue"].to(bank.bank.device))
            bank.bank_ptr.copy_(state["queue_ptr"].to(bank.bank_ptr.device))
