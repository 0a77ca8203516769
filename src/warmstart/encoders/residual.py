"""A residual U-Net encoder: a stem, then stages of residual blocks, each stage halving the size
with a strided first convolution (2-D or 3-D).

Block: conv 3x3 (stride s) -> norm -> act -> conv 3x3 -> norm, plus a skip (identity, or a 1x1
convolution of stride s and a norm where the shape changes), then act. Stage i has
``base_width * 2**i`` channels and stride ``2**i``.

References
----------
K. He, X. Zhang, S. Ren, J. Sun, "Deep Residual Learning for Image Recognition", CVPR 2016,
arXiv:1512.03385 (the block). Residual encoders in U-Nets are common practice in 3-D medical
segmentation.
"""
from __future__ import annotations

import torch
from torch import nn

from .registry import register
from .spec import EncoderSpec, Stage
from .unet import check_spatial_dims, conv_type, make_act, make_norm

__all__ = ["ResidualBlock", "ResidualUNetEncoder"]


class ResidualBlock(nn.Module):
    """Two 3x3(x3) convolutions with a skip connection; ``stride`` 2 halves every axis."""

    def __init__(self, cin: int, cout: int, stride: int = 1, norm: str = "batch", act: str = "relu",
                 spatial_dims: int = 2) -> None:
        super().__init__()
        conv, bias = conv_type(spatial_dims), norm == "none"
        self.conv1 = conv(cin, cout, 3, stride=stride, padding=1, bias=bias)
        self.norm1 = make_norm(norm, cout, spatial_dims=spatial_dims)
        self.act1 = make_act(act)
        self.conv2 = conv(cout, cout, 3, padding=1, bias=bias)
        self.norm2 = make_norm(norm, cout, spatial_dims=spatial_dims)
        self.skip = (nn.Identity() if stride == 1 and cin == cout else
                     nn.Sequential(conv(cin, cout, 1, stride=stride, bias=bias), make_norm(norm, cout, spatial_dims=spatial_dims)))
        self.act2 = make_act(act)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.norm2(self.conv2(self.act1(self.norm1(self.conv1(x)))))
        return self.act2(y + self.skip(x))


@register("unet_residual")
class ResidualUNetEncoder(nn.Module):
    """Residual U-Net encoder.

    Parameters
    ----------
    in_channels : int
    base_width : int
        Channels of the first stage; stage i has ``base_width * 2**i``.
    depth : int
        Number of stages.
    blocks : int
        Residual blocks per stage.
    norm : {"batch", "group", "instance", "none"}
    act : {"relu", "leaky_relu"}
    spatial_dims : {2, 3}

    Examples
    --------
    >>> enc = ResidualUNetEncoder(in_channels=1, base_width=4, depth=3, spatial_dims=3)
    >>> [tuple(f.shape) for f in enc(torch.zeros(1, 1, 16, 16, 16))]
    [(1, 4, 16, 16, 16), (1, 8, 8, 8, 8), (1, 16, 4, 4, 4)]
    """

    first_conv = "stem.0"  # the module whose weight sees the input channels

    def __init__(self, in_channels: int = 1, base_width: int = 32, depth: int = 5, blocks: int = 1,
                 norm: str = "batch", act: str = "relu", spatial_dims: int = 2) -> None:
        super().__init__()
        if min(in_channels, base_width, depth, blocks) < 1:
            raise ValueError("unet_residual needs in_channels, base_width, depth and blocks >= 1")
        dims = check_spatial_dims(spatial_dims)
        widths = [base_width * 2**i for i in range(depth)]
        self.stem = nn.Sequential(conv_type(dims)(in_channels, widths[0], 3, padding=1, bias=norm == "none"),
                                  make_norm(norm, widths[0], spatial_dims=dims), make_act(act))
        self.levels = nn.ModuleList()
        for i, w in enumerate(widths):
            cin = widths[0] if i == 0 else widths[i - 1]
            stage = [ResidualBlock(cin if j == 0 else w, w, 2 if (i > 0 and j == 0) else 1, norm, act, dims)
                     for j in range(blocks)]
            self.levels.append(nn.Sequential(*stage))
        params = {"in_channels": in_channels, "base_width": base_width, "depth": depth, "blocks": blocks, "norm": norm,
                  "act": act, "spatial_dims": dims}
        self.spec = EncoderSpec("unet_residual", params, tuple(Stage(w, 2**i) for i, w in enumerate(widths)))

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        feats = []
        x = self.stem(x)
        for level in self.levels:
            x = level(x)
            feats.append(x)
        return feats
