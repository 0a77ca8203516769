"""Where an encoder file's tensors go in other networks: one small key map per layout.

Our tensor names are the encoder's own state-dict keys (torchvision's for the ResNets, and
``levels.i.conv1`` ... for the U-Net encoder). A layout maps each of them to a key of the target
network and says which of the target's keys belong to its encoder (those must all be filled
under ``strict``). Adding a layout is one entry in :data:`LAYOUTS`.

=====================  ==============================================  ================
layout                 target network                                  our encoders
=====================  ==============================================  ================
``warmstart``          :class:`warmstart.unet.UNet` (``encoder.*``)    all
``smp``                segmentation_models_pytorch Unet, UnetPlusPlus,  ResNet-18/34/50
                       FPN, ... with a ``resnet18/34/50`` encoder
``monai-flexibleunet`` MONAI FlexibleUNet, ``resnet50`` backbone       ResNet-50
``monai-basicunet``    MONAI BasicUNet (5 levels)                      U-Net, depth 5
``torchvision``        torchvision ResNet (``fc`` stays as it is)      ResNet-18/34/50
``timm``               timm ResNet, also ``features_only``             ResNet-18/34/50
``encoder``            a bare warmstart encoder                        all
=====================  ==============================================  ================

MONAI's ResNet-18/34 backbones use a parameter-free shortcut ("type A": strided pooling and zero
padding) where torchvision's ResNet has a strided 1x1 convolution, so our ResNet-18/34 weights
have no faithful place there; ``warm_start`` reports the shortcut tensors it cannot place.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Callable

__all__ = ["Layout", "LAYOUTS", "family"]


@dataclass(frozen=True)
class Layout:
    """A mapping from our tensor names to a target network's.

    Attributes
    ----------
    name : str
    description : str
    map_key : callable
        Our key -> the target's key (``None``: no place for it).
    in_encoder : callable
        Whether a target key belongs to the part this layout fills.
    families : tuple of str
        Our encoder families it applies to (``resnet``, ``unet``).
    library : str
        Top-level package of the networks it is meant for (used to break ties in ``auto``).
    hint : str
        Said in the report when some of our tensors find no place.
    """

    name: str
    description: str
    map_key: Callable[[str], str | None]
    in_encoder: Callable[[str], bool]
    families: tuple[str, ...]
    library: str
    hint: str = ""


def family(spec_name: str) -> str:
    """``resnet`` for resnet18/34/50/resnet_narrow, else the spec's own name (``unet``)."""
    return "resnet" if spec_name.startswith("resnet") else spec_name


def _prefixed(prefix: str) -> Callable[[str], str]:
    return lambda k: prefix + k


def _under(prefix: str) -> Callable[[str], bool]:
    return lambda k: k.startswith(prefix)


def _not_classifier(k: str) -> bool:
    return not k.startswith(("fc.", "head.", "classifier."))


_UNET_KEY = re.compile(r"^levels\.(\d+)\.(conv|norm)([12])\.(.+)$")


def _basicunet_key(k: str) -> str | None:
    """``levels.i.conv{1,2}.*`` / ``levels.i.norm{1,2}.*`` -> MONAI BasicUNet's TwoConv blocks:
    ``conv_0`` for level 0, ``down_i.convs`` below; each convolution is a MONAI Convolution whose
    weight sits at ``.conv`` and whose norm at ``.adn.N``."""
    m = _UNET_KEY.match(k)
    if not m or int(m.group(1)) > 4:
        return None
    level, kind, j, rest = int(m.group(1)), m.group(2), int(m.group(3)), m.group(4)
    block = "conv_0" if level == 0 else f"down_{level}.convs"
    return f"{block}.conv_{j - 1}.{'conv' if kind == 'conv' else 'adn.N'}.{rest}"


def _basicunet_part(k: str) -> bool:
    return k.startswith(("conv_0.", "down_1.", "down_2.", "down_3.", "down_4."))


LAYOUTS: dict[str, Layout] = {L.name: L for L in (
    Layout("warmstart", "warmstart's reference U-Net (encoder.*)", _prefixed("encoder."), _under("encoder."),
           ("resnet", "unet"), "warmstart"),
    Layout("smp", "segmentation_models_pytorch network with a ResNet encoder (encoder.*)", _prefixed("encoder."),
           _under("encoder."), ("resnet",), "segmentation_models_pytorch"),
    Layout("monai-flexibleunet", "MONAI FlexibleUNet with a ResNet backbone (encoder.*)", _prefixed("encoder."),
           _under("encoder."), ("resnet",), "monai",
           "MONAI's resnet18/34 backbones have parameter-free 'type A' shortcuts where ours has 1x1 convolutions: "
           "use backbone='resnet50' with a resnet50 encoder file, or segmentation_models_pytorch / warmstart.UNet"),
    Layout("monai-basicunet", "MONAI BasicUNet (conv_0, down_1..down_4)", _basicunet_key, _basicunet_part,
           ("unet",), "monai", "BasicUNet has 5 levels: it takes a unet encoder of depth 5 whose widths equal its "
           "features[:5] (and norm='batch', act='relu' to compute what our encoder computed)"),
    Layout("torchvision", "torchvision ResNet (its fc layer is left as it is)", lambda k: k, _not_classifier,
           ("resnet",), "torchvision"),
    Layout("timm", "timm ResNet, including features_only models", lambda k: k, _not_classifier, ("resnet",), "timm"),
    Layout("encoder", "a bare warmstart encoder", lambda k: k, lambda k: True, ("resnet", "unet"), "warmstart"),
)}
