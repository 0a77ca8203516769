"""Masked image modelling for convolutional U-Nets, in 2-D and 3-D.

A large random share of the patch (``mask_ratio``, 0.6 by default) is hidden in square (cubic)
blocks whose side is the encoder's deepest stride, so every stage sees whole blocks. The hidden
blocks are kept hidden at every encoder stage: after each activation of the encoder the feature
map is multiplied by the visible mask at its resolution, so no convolution reads features
computed from hidden voxels (the dense stand-in for sparse convolutions). Before decoding, the
hidden cells of every stage map are filled with a learned per-stage mask token; the U-Net decoder
and a 1x1 head then reconstruct the patch, and the loss is the mean squared error over the hidden
voxels only. Encoder and decoder are exported (``export --with-decoder``); the tokens are not.
An nnU-Net encoder (``nnunet``) is masked the same way and trains nnU-Net's own decoder, whose
last segmentation layer takes the place of the head.

Batch-norm statistics are computed over visible and hidden positions alike (a sparse network
would use visible ones only): the one approximation of this dense form.

References
----------
K. Tian, Y. Jiang, Q. Diao, C. Lin, L. Wang, Z. Yuan, "Designing BERT for Convolutional
Networks: Sparse and Hierarchical Masked Modeling" (SparK), ICLR 2023, arXiv:2301.03580.
T. Wald et al., "An OpenMind for 3D medical vision self-supervised learning" / the masked
autoencoder for 3-D medical CNNs, CVPR 2025 (from memory: masked modelling was the strongest 3-D
pretraining for segmentation in their comparison).
"""
from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from ...encoders.registry import own_decoder
from ...encoders.unet import conv_type
from ...unet import UNetDecoder
from .base import Method, Views, register_method

__all__ = ["MaskedModelling", "block_mask"]


def block_mask(batch: int, shape: tuple[int, ...], block: int, ratio: float, g: torch.Generator,
               device: torch.device) -> torch.Tensor:
    """(B, 1, g1, g2[, g3]) float mask of the block grid, 1 where hidden: exactly
    ``round(ratio * cells)`` hidden cells per sample, drawn from ``g``."""
    grid = tuple(s // block for s in shape)
    cells = 1
    for n in grid:
        cells *= n
    hide = min(cells - 1, max(1, round(ratio * cells)))
    order = torch.rand(batch, cells, generator=g, device=device).argsort(dim=1)
    mask = torch.zeros(batch, cells, device=device)
    mask.scatter_(1, order[:, :hide], 1.0)
    return mask.reshape(batch, 1, *grid)


@register_method("masked")
class MaskedModelling(Method):
    """Parameters: ``mask_ratio`` (share of blocks hidden), ``decoder_norm``."""

    trains_decoder = True
    learns_embedding = False  # reconstruction only: no collapse warning

    def __init__(self, encoder: nn.Module, mask_ratio: float = 0.6, decoder_norm: str = "batch") -> None:
        super().__init__(encoder)
        if not 0.0 < mask_ratio < 1.0:
            raise ValueError(f"mask_ratio must be in (0, 1), got {mask_ratio}")
        acts = [m for m in encoder.modules() if isinstance(m, (nn.ReLU, nn.LeakyReLU))]
        if not acts or not (hasattr(encoder, "levels") or encoder.spec.name == "nnunet"):
            raise ValueError("masked modelling needs the U-Net encoder (unet) or an nnU-Net network's (nnunet): their "
                             "stages are masked after every activation")
        self.mask_ratio = float(mask_ratio)
        self.dims = int(encoder.spec.params.get("spatial_dims", 2))
        self.block = int(encoder.spec.stages[-1].stride)
        self.decoder_norm = decoder_norm
        channels = int(encoder.spec.params.get("in_channels", 1))
        own = own_decoder(encoder, channels)  # nnU-Net's own decoder for its encoder
        if own is not None:
            self.decoder, self.head = own, nn.Identity()
        else:
            self.decoder = UNetDecoder(encoder.spec.stages, decoder_norm, self.dims)
            self.head = conv_type(self.dims)(self.decoder.out_channels, channels, 1)
        self.tokens = nn.ParameterList([nn.Parameter(torch.zeros(s.channels)) for s in encoder.spec.stages])
        self._visible: torch.Tensor | None = None  # (B, 1, grid...) while a masked forward runs
        for act in acts:
            act.register_forward_hook(self._keep_hidden)

    def _keep_hidden(self, module: nn.Module, inputs: Any, output: torch.Tensor) -> torch.Tensor | None:
        if self._visible is None:
            return None  # an ordinary forward (embedding, export checks): no mask
        return output * self.visible_at(output.shape[2:]).to(output.dtype)

    def visible_at(self, size: tuple[int, ...]) -> torch.Tensor:
        """The visible mask (1 = visible) at a feature map's resolution (whole blocks: exact)."""
        assert self._visible is not None
        return F.interpolate(self._visible, size=tuple(size), mode="nearest")

    def masked_loss(self, original: torch.Tensor, g: torch.Generator) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        """(loss, parts) for one batch: ``parts`` holds the hidden mask at full resolution, the
        stage maps after masking and the reconstruction (for tests and monitors)."""
        shape = tuple(original.shape[2:])
        if any(s % self.block for s in shape):
            raise ValueError(f"masked modelling needs patch sides divisible by the encoder's deepest stride {self.block}, "
                             f"got {shape}")
        visible = 1.0 - block_mask(original.shape[0], shape, self.block, self.mask_ratio, g, original.device)
        self._visible = visible
        try:
            full_visible = self.visible_at(shape)
            feats = self.encoder(original * full_visible)
        finally:
            self._visible = None
        filled = []
        for f, token in zip(feats, self.tokens):
            vis = F.interpolate(visible, size=tuple(f.shape[2:]), mode="nearest").to(f.dtype)
            filled.append(f * vis + token.reshape(1, -1, *([1] * self.dims)) * (1 - vis))
        restored = self.head(self.decoder(filled, shape))
        weight = (1 - full_visible).expand_as(original)
        loss = ((restored - original) ** 2 * weight).sum() / weight.sum().clamp_min(1.0)
        return loss, {"hidden": 1 - full_visible, "features": feats, "restored": restored}

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        if views is None:
            raise ValueError("masked modelling needs the un-augmented batch (Views)")
        loss, parts = self.masked_loss(views.original, views.generator)
        emb = parts["features"][-1].detach().flatten(2).mean(-1)
        return loss, {"embedding": emb, "embedding2": emb}

    def exported_decoder(self) -> nn.Module:
        return self.decoder
