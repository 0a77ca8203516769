"""Restoration pretraining of a whole U-Net: restore the original patch from a corrupted one.

Encoder and decoder both learn (the decoder is exported with ``export --with-decoder``); an
encoder that comes from a client's whole network (``nnunet``) trains that network's own decoder,
whose output layer restores the patch. The corruptions are :mod:`warmstart.pretrain.corrupt`'s. The loss is the mean squared error between
the restoration and the original, in standardized units.

References
----------
Z. Zhou et al., "Models Genesis: Generic Autodidactic Models for 3D Medical Image Analysis",
MICCAI 2019, arXiv:1908.06912.
"""
from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from ...encoders.registry import own_decoder
from ...encoders.unet import conv_type
from ...unet import UNetDecoder
from ..corrupt import CorruptionSettings, corrupt
from .base import Method, Views, register_method


@register_method("restore")
class Restore(Method):
    """Parameters: ``decoder_norm`` and every field of
    :class:`~warmstart.pretrain.corrupt.CorruptionSettings` (``nonlinear_prob``, ``shuffle_prob``,
    ``shuffle_block``, ``shuffle_fraction``, ``paint_prob``, ``outpaint_share``, ``boxes``,
    ``noise_sigma``)."""

    trains_decoder = True
    learns_embedding = False  # reconstruction only: no collapse warning

    def __init__(self, encoder: nn.Module, decoder_norm: str = "batch", nonlinear_prob: float = 0.9,
                 shuffle_prob: float = 0.5, shuffle_block: int = 4, shuffle_fraction: float = 0.3,
                 paint_prob: float = 0.9, outpaint_share: float = 0.8, boxes: int = 5, noise_sigma: float = 0.05) -> None:
        super().__init__(encoder)
        self.corruption = CorruptionSettings(nonlinear_prob, shuffle_prob, shuffle_block, shuffle_fraction, paint_prob,
                                             outpaint_share, boxes, noise_sigma)
        self.decoder_norm = decoder_norm
        dims = int(encoder.spec.params.get("spatial_dims", 2))
        channels = int(encoder.spec.params.get("in_channels", 1))
        own = own_decoder(encoder, channels)  # a client network's own decoder (nnU-Net), where it has one
        if own is not None:
            self.decoder, self.restore_head = own, nn.Identity()
        else:
            self.decoder = UNetDecoder(encoder.spec.stages, decoder_norm, dims)
            self.restore_head = conv_type(dims)(self.decoder.out_channels, channels, 1)

    def restoration_loss(self, original: torch.Tensor, g: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
        """(loss, pooled features of the corrupted input) for one batch of original patches."""
        damaged = corrupt(original, self.corruption, g)
        feats = self.encoder(damaged)
        restored = self.restore_head(self.decoder(feats, tuple(original.shape[2:])))
        return F.mse_loss(restored, original), feats[-1].flatten(2).mean(-1)

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        if views is None:
            raise ValueError("restore needs the un-augmented batch (Views)")
        loss, emb = self.restoration_loss(views.original, views.generator)
        emb = emb.detach()
        return loss, {"embedding": emb, "embedding2": emb}

    def exported_decoder(self) -> nn.Module:
        return self.decoder
