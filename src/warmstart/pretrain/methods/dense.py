"""Dense contrastive learning with locations matched exactly from the views' geometry.

Besides the usual global contrast of pooled embeddings (SimCLR's NT-Xent), every location of
view 1's deepest feature map is paired with the place of view 2 that shows the same patch pixel.
The pairing comes from the augmentation's own parameters (:mod:`warmstart.pretrain.geometry`:
crop box, flips, quarter turns, affine warp), not from feature similarity as in DenseCL. View 2's
features are read there by bilinear interpolation, both go through a dense projection head, and
an NT-Xent loss contrasts each pair against every other sampled location of the batch. The
loss is ``(1 - dense_weight) * global + dense_weight * dense``.

References
----------
X. Wang, R. Zhang, C. Shen, T. Kong, L. Li, "Dense Contrastive Learning for Self-Supervised
Visual Pre-Training", CVPR 2021, arXiv:2011.09157 (the dense head and the global/dense mix).
P. O. Pinheiro, A. Almahairi, R. Y. Benmalek, F. Golemo, A. Courville, "Unsupervised Learning of
Dense Visual Representations", NeurIPS 2020, arXiv:2011.05499 (pairs from known geometry).
A. Bardes, J. Ponce, Y. LeCun, "VICRegL: Self-Supervised Learning of Local Visual Features",
NeurIPS 2022, arXiv:2210.01571 (local features matched by their positions in the two views;
lightly's ``VICRegLLoss`` is the natural next method behind this interface).
Heads and loss are lightly's (DenseCLProjectionHead, SimCLRProjectionHead, NTXentLoss).
"""
from __future__ import annotations

import torch
import torch.nn.functional as F
from lightly.loss import NTXentLoss
from lightly.models.modules.heads import DenseCLProjectionHead, SimCLRProjectionHead
from torch import nn

from ..geometry import matched_points
from .base import Method, Views, register_method

__all__ = ["DenseContrast", "sample_at"]


def sample_at(features: torch.Tensor, points: torch.Tensor) -> torch.Tensor:
    """(Bi/tri)linear read of (B, C, h, w) or (B, C, d, h, w) feature maps at (B, K, 2) ``(y, x)``
    or (B, K, 3) ``(z, y, x)`` fractions -> (B, K, C)."""
    n = points.shape[-1]
    grid = (points.flip(-1) * 2 - 1).reshape(points.shape[0], points.shape[1], *([1] * (n - 1)), n)  # x first, [-1, 1]
    out = F.grid_sample(features, grid.to(features.dtype), mode="bilinear", padding_mode="border", align_corners=False)
    return out.reshape(out.shape[0], out.shape[1], -1).transpose(1, 2)


@register_method("dense")
class DenseContrast(Method):
    """Parameters: head sizes, ``temperature``, ``dense_weight`` (share of the dense loss) and
    ``max_points`` (matched locations per step, taken evenly from all valid pairs)."""

    def __init__(self, encoder: nn.Module, hidden_dim: int = 512, output_dim: int = 128, temperature: float = 0.1,
                 dense_weight: float = 0.5, max_points: int = 1024) -> None:
        super().__init__(encoder)
        if not 0.0 <= dense_weight <= 1.0:
            raise ValueError(f"dense_weight must be in [0, 1], got {dense_weight}")
        dim = encoder.spec.out_channels
        self.head = SimCLRProjectionHead(input_dim=dim, hidden_dim=hidden_dim, output_dim=output_dim)
        self.dense_head = DenseCLProjectionHead(input_dim=dim, hidden_dim=hidden_dim, output_dim=output_dim)
        self.criterion = NTXentLoss(temperature=temperature, gather_distributed=True)
        self.dense_criterion = NTXentLoss(temperature=temperature)
        self.dense_weight = float(dense_weight)
        self.max_points = int(max_points)

    def dense_pairs(self, f1: torch.Tensor, f2: torch.Tensor, views: Views) -> tuple[torch.Tensor, torch.Tensor]:
        """Matched (N, C) features: every cell centre of view 1's map and the same place in view 2."""
        pts1, pts2, valid = matched_points(views.params1, views.params2, grid=f1.shape[-1])
        a = f1.flatten(2).transpose(1, 2)  # (B, h*w[*d], C): the cells themselves, centres = pts1
        b = sample_at(f2, pts2)
        a, b = a[valid], b[valid]
        if len(a) > self.max_points:
            keep = torch.linspace(0, len(a) - 1, self.max_points, device=a.device).long()
            a, b = a[keep], b[keep]
        return a, b

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        if views is None:
            raise ValueError("dense needs the views' geometry (Views)")
        f1, f2 = self.encoder(view1)[-1], self.encoder(view2)[-1]
        g1, g2 = f1.flatten(2).mean(-1), f2.flatten(2).mean(-1)
        total = (1 - self.dense_weight) * self.criterion(self.head(g1), self.head(g2))
        a, b = self.dense_pairs(f1, f2, views)
        if len(a) >= 2 and self.dense_weight > 0:
            total = total + self.dense_weight * self.dense_criterion(self.dense_head(a), self.dense_head(b))
        return total, {"embedding": g1.detach(), "embedding2": g2.detach()}
