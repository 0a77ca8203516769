"""The classic U-Net contracting path: double 3x3 convolutions, 2x2 max pooling between levels.

References
----------
O. Ronneberger, P. Fischer, T. Brox, "U-Net: Convolutional Networks for Biomedical Image
Segmentation", MICCAI 2015, arXiv:1505.04597. Padding is "same" (the original used valid
convolutions), the common practice of today's implementations, so feature maps keep exact strides.
"""
from __future__ import annotations

import torch
from torch import nn

from .registry import register
from .spec import EncoderSpec, Stage

__all__ = ["UNetEncoder", "DoubleConv", "make_norm", "make_act", "conv_type", "check_spatial_dims"]


def check_spatial_dims(spatial_dims: int) -> int:
    """2 (slices, (B, C, H, W)) or 3 (volumes, (B, C, D, H, W)); anything else is refused."""
    if spatial_dims not in (2, 3):
        raise ValueError(f"spatial_dims must be 2 or 3, got {spatial_dims!r}")
    return int(spatial_dims)


def conv_type(spatial_dims: int = 2) -> type[nn.Module]:
    """``nn.Conv2d`` or ``nn.Conv3d``."""
    return nn.Conv3d if check_spatial_dims(spatial_dims) == 3 else nn.Conv2d


def make_norm(kind: str, channels: int, groups: int = 8, spatial_dims: int = 2) -> nn.Module:
    """``batch``, ``group`` (``groups`` groups, fewer if channels are fewer), ``instance`` or ``none``."""
    three = check_spatial_dims(spatial_dims) == 3
    if kind == "batch":
        return nn.BatchNorm3d(channels) if three else nn.BatchNorm2d(channels)
    if kind == "group":
        return nn.GroupNorm(min(groups, channels), channels)
    if kind == "instance":
        return nn.InstanceNorm3d(channels, affine=True) if three else nn.InstanceNorm2d(channels, affine=True)
    if kind == "none":
        return nn.Identity()
    raise ValueError(f"norm must be 'batch', 'group', 'instance' or 'none', got {kind!r}")


def make_act(kind: str) -> nn.Module:
    """``relu`` or ``leaky_relu`` (negative slope 0.01, the common default)."""
    if kind == "relu":
        return nn.ReLU(inplace=True)
    if kind == "leaky_relu":
        return nn.LeakyReLU(0.01, inplace=True)
    raise ValueError(f"act must be 'relu' or 'leaky_relu', got {kind!r}")


class DoubleConv(nn.Sequential):
    """(conv 3x3 -> norm -> activation) x 2 (3x3x3 kernels with ``spatial_dims=3``)."""

    def __init__(self, cin: int, cout: int, norm: str = "batch", spatial_dims: int = 2, act: str = "relu") -> None:
        bias = norm == "none"
        conv = conv_type(spatial_dims)
        super().__init__()
        self.conv1 = conv(cin, cout, 3, padding=1, bias=bias)
        self.norm1 = make_norm(norm, cout, spatial_dims=spatial_dims)
        self.act1 = make_act(act)
        self.conv2 = conv(cout, cout, 3, padding=1, bias=bias)
        self.norm2 = make_norm(norm, cout, spatial_dims=spatial_dims)
        self.act2 = make_act(act)


@register("unet")
class UNetEncoder(nn.Module):
    """U-Net contracting path.

    Parameters
    ----------
    in_channels : int
        Input channels (1 for grayscale, k for 2.5-D stacks).
    base_width : int
        Channels of the first level; level i has ``base_width * 2**i``.
    depth : int
        Number of levels (the classic network has 5: 64 ... 1024 channels).
    norm : {"batch", "group", "instance", "none"}
    spatial_dims : {2, 3}
        2 for slices (B, C, H, W), 3 for volumes (B, C, D, H, W) with 3x3x3 convolutions and
        2x2x2 pooling. Recorded in the spec only when 3, so 2-D specs stay as they were.
    act : {"relu", "leaky_relu"}
    downsample : {"maxpool", "conv"}
        Between levels: 2x2(x2) max pooling (the classic network), or a learned 2x2(x2)
        convolution of stride 2 (keys ``down.<i>``). ``act`` and ``downsample`` are recorded in
        the spec only when they differ from the classic choice.

    Examples
    --------
    >>> enc = UNetEncoder(in_channels=1, base_width=4, depth=3)
    >>> [tuple(f.shape) for f in enc(torch.zeros(2, 1, 16, 16))]
    [(2, 4, 16, 16), (2, 8, 8, 8), (2, 16, 4, 4)]
    """

    first_conv = "levels.0.conv1"  # the module whose weight sees the input channels

    def __init__(self, in_channels: int = 1, base_width: int = 32, depth: int = 5, norm: str = "batch",
                 spatial_dims: int = 2, act: str = "relu", downsample: str = "maxpool") -> None:
        super().__init__()
        if depth < 1 or base_width < 1 or in_channels < 1:
            raise ValueError(f"unet needs depth, base_width and in_channels >= 1, got {depth}, {base_width}, {in_channels}")
        dims = check_spatial_dims(spatial_dims)
        widths = [base_width * 2**i for i in range(depth)]
        self.levels = nn.ModuleList()
        for i, w in enumerate(widths):
            self.levels.append(DoubleConv(in_channels if i == 0 else widths[i - 1], w, norm, dims, act))
        if downsample not in ("maxpool", "conv"):
            raise ValueError(f"downsample must be 'maxpool' or 'conv', got {downsample!r}")
        self.pool = nn.MaxPool3d(2) if dims == 3 else nn.MaxPool2d(2)
        if downsample == "conv":
            self.down = nn.ModuleList([conv_type(dims)(w, w, 2, stride=2) for w in widths[:-1]])
        params: dict = {"in_channels": in_channels, "base_width": base_width, "depth": depth, "norm": norm}
        if dims == 3:
            params["spatial_dims"] = 3
        if act != "relu":
            params["act"] = act
        if downsample != "maxpool":
            params["downsample"] = downsample
        self.spec = EncoderSpec("unet", params, tuple(Stage(w, 2**i) for i, w in enumerate(widths)))

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        feats = []
        for i, level in enumerate(self.levels):
            if i > 0:
                x = self.down[i - 1](x) if hasattr(self, "down") else self.pool(x)
            x = level(x)  # (B, base*2^i, [D/2^i,] H/2^i, W/2^i)
            feats.append(x)
        return feats
