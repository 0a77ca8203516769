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

__all__ = ["embedding_spread", "alignment", "uniformity", "knn_accuracy", "load_probe"]


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


def knn_accuracy(embeddings: torch.Tensor, labels: torch.Tensor, k: int = 20, temperature: float = 0.07) -> float:
    """Leave-one-out weighted kNN accuracy on cosine similarity.

    Each sample's class is voted by its ``k`` nearest other samples, weighted by
    ``exp(similarity / temperature)`` (the kNN monitor of Wu et al., CVPR 2018,
    arXiv:1805.01978, common practice in self-supervised learning).

    Parameters
    ----------
    embeddings : (N, D) tensor
    labels : (N,) int tensor
    k : int
    temperature : float

    Returns
    -------
    float
        Fraction of samples whose vote is their own class.
    """
    z = F.normalize(embeddings.float(), dim=1)
    sim = z @ z.T
    sim.fill_diagonal_(-float("inf"))  # leave one out
    k = min(k, len(z) - 1)
    top, idx = sim.topk(k, dim=1)
    weights = (top / temperature).exp()
    n_classes = int(labels.max()) + 1
    votes = torch.zeros(len(z), n_classes, dtype=weights.dtype)
    votes.scatter_add_(1, labels[idx].long(), weights)
    return float((votes.argmax(dim=1) == labels.long()).float().mean())


def load_probe(path: str) -> tuple[torch.Tensor, torch.Tensor]:
    """A labelled probe set: an ``.npz`` with ``patches`` (N, C, P, P), already normalized like
    the corpus, and integer ``labels`` (N,)."""
    import numpy as np

    with np.load(path) as z:
        if "patches" not in z or "labels" not in z:
            raise ValueError(f"{path}: a probe set needs arrays 'patches' (N, C, P, P) and 'labels' (N,)")
        x, y = z["patches"], z["labels"]
    if x.ndim != 4 or y.shape != (len(x),) or not np.issubdtype(y.dtype, np.integer):
        raise ValueError(f"{path}: patches {x.shape} and labels {y.shape} {y.dtype} do not match")
    return torch.from_numpy(x.astype(np.float32)), torch.from_numpy(y.astype(np.int64))
