"""ResNet encoders with torchvision's layout and key names (``conv1``, ``bn1``, ``layer1..4``).

ResNet-18/34/50 are torchvision's architectures with an ``in_channels``-wide first convolution,
so their state dicts load into torchvision (and libraries built on it) key for key. The narrow
variant keeps the layout with fewer channels per layer, for CPU work at low resolution.

References
----------
K. He, X. Zhang, S. Ren, J. Sun, "Deep Residual Learning for Image Recognition", CVPR 2016,
arXiv:1512.03385.
"""
from __future__ import annotations

from typing import Sequence

import torch
from torch import nn
from torchvision.models.resnet import BasicBlock, Bottleneck

from .registry import register
from .spec import EncoderSpec, Stage

__all__ = ["ResNetEncoder", "resnet18", "resnet34", "resnet50", "resnet_narrow"]


class ResNetEncoder(nn.Module):
    """ResNet body returning the stem output (stride 2) and the outputs of layer1..layer4.

    Parameters
    ----------
    block : BasicBlock or Bottleneck (torchvision's)
    layers : 4 ints
        Blocks per layer.
    widths : 4 ints
        Base width of each layer (64, 128, 256, 512 in torchvision).
    in_channels : int
    name : str
        Registry name recorded in the spec.
    """

    first_conv = "conv1"  # the module whose weight sees the input channels

    def __init__(self, block: type, layers: Sequence[int], widths: Sequence[int], in_channels: int = 1,
                 name: str = "resnet", params: dict | None = None) -> None:
        super().__init__()
        self.inplanes = widths[0]
        self.conv1 = nn.Conv2d(in_channels, widths[0], kernel_size=7, stride=2, padding=3, bias=False)
        self.bn1 = nn.BatchNorm2d(widths[0])
        self.relu = nn.ReLU(inplace=True)
        self.maxpool = nn.MaxPool2d(kernel_size=3, stride=2, padding=1)
        self.layer1 = self._make_layer(block, widths[0], layers[0], 1)
        self.layer2 = self._make_layer(block, widths[1], layers[1], 2)
        self.layer3 = self._make_layer(block, widths[2], layers[2], 2)
        self.layer4 = self._make_layer(block, widths[3], layers[3], 2)
        for m in self.modules():  # torchvision's initialization
            if isinstance(m, nn.Conv2d):
                nn.init.kaiming_normal_(m.weight, mode="fan_out", nonlinearity="relu")
            elif isinstance(m, nn.BatchNorm2d):
                nn.init.ones_(m.weight)
                nn.init.zeros_(m.bias)
        e = block.expansion
        stages = (Stage(widths[0], 2),) + tuple(Stage(w * e, s) for w, s in zip(widths, (4, 8, 16, 32)))
        self.spec = EncoderSpec(name, dict(params or {"in_channels": in_channels}), stages)

    def _make_layer(self, block: type, planes: int, blocks: int, stride: int) -> nn.Sequential:
        downsample = None
        if stride != 1 or self.inplanes != planes * block.expansion:
            downsample = nn.Sequential(nn.Conv2d(self.inplanes, planes * block.expansion, 1, stride=stride, bias=False),
                                       nn.BatchNorm2d(planes * block.expansion))
        out = [block(self.inplanes, planes, stride, downsample)]
        self.inplanes = planes * block.expansion
        out += [block(self.inplanes, planes) for _ in range(1, blocks)]
        return nn.Sequential(*out)

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        s0 = self.relu(self.bn1(self.conv1(x)))  # (B, w0, H/2, W/2)
        s1 = self.layer1(self.maxpool(s0))  # (B, w0*e, H/4, W/4)
        s2 = self.layer2(s1)  # (B, w1*e, H/8, W/8)
        s3 = self.layer3(s2)  # (B, w2*e, H/16, W/16)
        s4 = self.layer4(s3)  # (B, w3*e, H/32, W/32)
        return [s0, s1, s2, s3, s4]


_STANDARD = (64, 128, 256, 512)


@register("resnet18")
def resnet18(in_channels: int = 1) -> ResNetEncoder:
    """ResNet-18 (torchvision layout), ``in_channels``-wide stem."""
    return ResNetEncoder(BasicBlock, (2, 2, 2, 2), _STANDARD, in_channels, "resnet18")


@register("resnet34")
def resnet34(in_channels: int = 1) -> ResNetEncoder:
    """ResNet-34 (torchvision layout), ``in_channels``-wide stem."""
    return ResNetEncoder(BasicBlock, (3, 4, 6, 3), _STANDARD, in_channels, "resnet34")


@register("resnet50")
def resnet50(in_channels: int = 1) -> ResNetEncoder:
    """ResNet-50 (torchvision layout, bottleneck blocks), ``in_channels``-wide stem."""
    return ResNetEncoder(Bottleneck, (3, 4, 6, 3), _STANDARD, in_channels, "resnet50")


@register("resnet_narrow")
def resnet_narrow(in_channels: int = 1, base_width: int = 16) -> ResNetEncoder:
    """ResNet-18 layout with ``base_width * (1, 2, 4, 8)`` channels (default 16: 1/16 of the
    parameters), for CPU pretraining at low resolution."""
    widths = tuple(base_width * m for m in (1, 2, 4, 8))
    return ResNetEncoder(BasicBlock, (2, 2, 2, 2), widths, in_channels, "resnet_narrow",
                         {"in_channels": in_channels, "base_width": base_width})
