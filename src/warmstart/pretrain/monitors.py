"""Representation monitors: collapse, alignment and uniformity of embeddings.

References
----------
T. Wang, P. Isola, "Understanding Contrastive Representation Learning through Alignment and
Uniformity on the Hypersphere", ICML 2020, arXiv:2005.10242 (alignment with alpha = 2,
uniformity with t = 2). The collapse measure (standard deviation of l2-normalized embeddings)
follows the SimSiam paper (Chen & He, CVPR 2021, arXiv:2011.10566), scaled by sqrt(D) here so
that 1 means spread over the sphere and 0 collapse.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F

__all__ = ["embedding_spread", "alignment", "uniformity"]


def embedding_spread(z: torch.Tensor) -> float:
    """``mean over dimensions of std(normalize(z)) * sqrt(D)``: about 1 when healthy, 0 when collapsed."""
    zn = F.normalize(z.float(), dim=1)
    return float(zn.std(dim=0).mean() * math.sqrt(z.shape[1]))


def alignment(z1: torch.Tensor, z2: torch.Tensor) -> float:
    """Wang & Isola alignment: mean squared distance of normalized positive pairs (lower is better)."""
    a, b = F.normalize(z1.float(), dim=1), F.normalize(z2.float(), dim=1)
    return float((a - b).norm(dim=1).pow(2).mean())


def uniformity(z: torch.Tensor, t: float = 2.0) -> float:
    """Wang & Isola uniformity: ``log mean exp(-t ||zi - zj||^2)`` over pairs (lower is better)."""
    zn = F.normalize(z.float(), dim=1)
    return float(torch.pdist(zn, p=2).pow(2).mul(-t).exp().mean().log())
