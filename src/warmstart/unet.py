"""warmstart's reference U-Net: any registered encoder, a U-Net decoder over its stages, a 1x1 head.

The decoder walks the encoder's stages from the deepest up: bilinear upsampling to the next
stage's size, concatenation with that stage's features (the skip connection), then a double 3x3
convolution. Encoders whose shallowest stage is coarser than the input (the ResNets: stride 2)
get one more upsampling and double convolution at full resolution. Keys are ``encoder.*``,
``decoder.*`` and ``head.*``, so :func:`warmstart.warm_start` fills the encoder and, from files
exported ``--with-decoder``, the decoder (layout ``warmstart``). With a ResNet encoder the decoder
is exactly segmentation_models_pytorch's ``Unet`` decoder built with ``decoder_channels`` equal to
our widths and ``decoder_interpolation="bilinear"``.

References
----------
O. Ronneberger, P. Fischer, T. Brox, "U-Net: Convolutional Networks for Biomedical Image
Segmentation", MICCAI 2015, arXiv:1505.04597.
"""
from __future__ import annotations

import os
from typing import Any, Sequence

import torch
import torch.nn.functional as F
from torch import nn

from .encoders import EncoderSpec, Stage, build_encoder, encoder_from_spec
from .encoders.unet import DoubleConv, check_spatial_dims, conv_type

__all__ = ["UNet", "UNetDecoder"]


class UNetDecoder(nn.Module):
    """U-Net decoder over encoder stages (shallow to deep).

    Parameters
    ----------
    stages : sequence of Stage
        The encoder's stages.
    norm : str
        Normalization of the decoder's convolutions (see ``make_norm``).
    spatial_dims : {2, 3}
        Bilinear upsampling and 3x3 convolutions (2), or trilinear and 3x3x3 (3).
    """

    def __init__(self, stages: Sequence[Stage], norm: str = "batch", spatial_dims: int = 2) -> None:
        super().__init__()
        self.norm = norm
        self.spatial_dims = dims = check_spatial_dims(spatial_dims)
        self.mode = "trilinear" if dims == 3 else "bilinear"
        self.strides = [s.stride for s in stages]
        ch = [s.channels for s in stages]
        self.blocks = nn.ModuleList()
        width = ch[-1]
        for i in range(len(ch) - 2, -1, -1):  # deepest-but-one up to the shallowest
            self.blocks.append(DoubleConv(width + ch[i], ch[i], norm, dims))
            width = ch[i]
        if self.strides[0] > 1:  # one more level at full resolution
            self.out_channels = max(width // 2, 8)
            self.final: DoubleConv | None = DoubleConv(width, self.out_channels, norm, dims)
        else:
            self.out_channels, self.final = width, None

    def forward(self, feats: Sequence[torch.Tensor], size: tuple[int, ...]) -> torch.Tensor:
        x = feats[-1]
        n = self.spatial_dims
        for block, skip in zip(self.blocks, reversed(feats[:-1])):
            x = F.interpolate(x, size=skip.shape[-n:], mode=self.mode, align_corners=False)
            x = block(torch.cat([x, skip], dim=1))
        if self.final is not None:
            x = self.final(F.interpolate(x, size=size, mode=self.mode, align_corners=False))
        return x


class UNet(nn.Module):
    """U-Net for 2-D (or, with a 3-D encoder, 3-D) segmentation with a registered encoder.

    Parameters
    ----------
    encoder : str, EncoderSpec, dict or torch.nn.Module
        A registry name (``unet``, ``resnet18``, ...), a spec, or a built encoder.
    classes : int
        Output channels (logits per class).
    decoder_norm : str
    **encoder_params
        Constructor parameters when ``encoder`` is a name (``in_channels``, ``base_width``, ...).

    Examples
    --------
    >>> net = UNet("unet", classes=3, base_width=4, depth=3)
    >>> tuple(net(torch.zeros(1, 1, 32, 32)).shape)
    (1, 3, 32, 32)
    """

    def __init__(self, encoder: str | EncoderSpec | dict[str, Any] | nn.Module = "unet", classes: int = 2,
                 decoder_norm: str = "batch", **encoder_params: Any) -> None:
        super().__init__()
        if isinstance(encoder, nn.Module):
            self.encoder = encoder
        elif isinstance(encoder, (EncoderSpec, dict)):
            self.encoder = encoder_from_spec(encoder)
        else:
            self.encoder = build_encoder(encoder, **encoder_params)
        # The encoder's spec says whether it works on slices or volumes; the decoder follows.
        dims = int(self.encoder.spec.params.get("spatial_dims", 2))
        self.decoder = UNetDecoder(self.encoder.spec.stages, decoder_norm, dims)
        self.head = conv_type(dims)(self.decoder.out_channels, classes, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.decoder(self.encoder(x), tuple(x.shape[-self.decoder.spatial_dims:])))

    @classmethod
    def from_file(cls, file: str | os.PathLike[str], classes: int = 2, in_channels: int | None = None,
                  decoder_norm: str | None = None, decoder: bool | None = None) -> "UNet":
        """A reference U-Net built around an encoder file's encoder, warm-started from it.

        A file exported ``--with-decoder`` warm-starts the decoder too (then ``decoder_norm``
        defaults to the file's; another norm leaves the decoder random, as ``decoder=False``
        does). Only the head (``classes`` outputs) starts random. ``in_channels`` other than the
        file's adapts the first convolution (see :func:`warmstart.export.load.adapt_input_channels`).
        The report is ``net.warm_start_report``.
        """
        from .export.file import read_manifest
        from .export.load import warm_start

        manifest = read_manifest(file)
        spec = dict(manifest["encoder"]["spec"])
        if in_channels is not None:
            spec = {**spec, "params": {**spec["params"], "in_channels": int(in_channels)}}
        file_norm = (manifest.get("decoder") or {}).get("norm")
        net = cls(spec, classes, decoder_norm or file_norm or "batch")
        net.warm_start_report = warm_start(net, file, layout="warmstart", decoder=decoder)
        return net
