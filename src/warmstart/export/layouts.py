"""Where an encoder file's tensors go in other networks: one small key map per layout.

Our tensor names are the encoder's own state-dict keys (torchvision's for the ResNets, and
``levels.i.conv1`` ... for the U-Net encoder). A layout maps each of them to a key of the target
network and says which of the target's keys belong to its encoder (those must all be filled
under ``strict``). Adding a layout is one entry in :data:`LAYOUTS`.

=====================  ==============================================  ================
layout                 target network                                  our encoders
=====================  ==============================================  ================
``warmstart``          :class:`warmstart.unet.UNet` (``encoder.*``)    all
``smp``                segmentation_models_pytorch Unet, UnetPlusPlus,  ResNet-18/34/50, and
                       FPN, ... with a ``resnet18/34/50`` encoder,     smp (any encoder smp
                       or the encoder the file's smp spec names        builds: same name, depth)
``monai-flexibleunet`` MONAI FlexibleUNet, ``resnet50`` backbone       ResNet-50
``monai-basicunet``    MONAI BasicUNet (5 levels)                      U-Net, depth 5
``monai-dynunet``      MONAI DynUNet (its contracting path)            monai_dynunet
``nnunet``             nnU-Net's networks of dynamic-network-          nnunet (built from
                       architectures (``encoder.*``)                   the same plans)
``torchvision``        torchvision ResNet (``fc`` stays as it is)      ResNet-18/34/50
``timm``               timm ResNet, also ``features_only``             ResNet-18/34/50
``encoder``            a bare warmstart encoder                        all
=====================  ==============================================  ================

Files exported ``--with-decoder`` also hold warmstart's U-Net decoder (``decoder.*``). It goes
into ``warmstart.UNet`` (same encoder and decoder norm) and into segmentation_models_pytorch's
``Unet`` built with the same decoder widths and bilinear upsampling (:data:`SMP_UNET_DECODER`);
every other layout loads the encoder alone, and the report says so.

MONAI's ResNet-18/34 backbones use a parameter-free shortcut ("type A": strided pooling and zero
padding) where torchvision's ResNet has a strided 1x1 convolution, so our ResNet-18/34 weights
have no faithful place there; ``warm_start`` reports the shortcut tensors it cannot place.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Callable

__all__ = ["Layout", "DecoderLayout", "LAYOUTS", "family"]


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
    decoder: "DecoderLayout | None" = None


@dataclass(frozen=True)
class DecoderLayout:
    """Where a file's decoder tensors (``decoder.*``, warmstart's U-Net decoder) go in a network.

    Attributes
    ----------
    map_keys : callable
        All our decoder keys -> {our key: the target's key}.
    in_decoder : callable
        Whether a target key belongs to the network's decoder (all must be filled).
    check : callable
        ``check(model)`` -> a reason the decoder computes something else although the keys fit
        (``None`` when it matches).
    """

    map_keys: Callable[[list[str]], dict[str, str]]
    in_decoder: Callable[[str], bool]
    check: Callable[[object], str | None] = lambda model: None


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


_OUR_DECODER_KEY = re.compile(r"^decoder\.(?:blocks\.(\d+)|final)\.(conv|norm)([12])\.(.+)$")


def _smp_decoder_keys(ours: list[str]) -> dict[str, str]:
    """Our ``decoder.blocks.i.conv{j}`` / ``norm{j}`` (and ``decoder.final``, the full-resolution
    block) -> smp's ``decoder.blocks.i.conv{j}.0`` (convolution) / ``.1`` (batch norm)."""
    blocks = {int(m.group(1)) for k in ours if (m := _OUR_DECODER_KEY.match(k)) and m.group(1) is not None}
    final = max(blocks, default=-1) + 1
    out = {}
    for k in ours:
        m = _OUR_DECODER_KEY.match(k)
        if m:
            i = int(m.group(1)) if m.group(1) is not None else final
            out[k] = f"decoder.blocks.{i}.conv{m.group(3)}.{0 if m.group(2) == 'conv' else 1}.{m.group(4)}"
    return out


def _smp_decoder_check(model: object) -> str | None:
    blocks = getattr(getattr(model, "decoder", None), "blocks", None)
    modes = {getattr(b, "interpolation_mode", None) for b in blocks} if blocks is not None else set()
    if modes != {"bilinear"}:
        return (f"the network's decoder upsamples with {sorted(map(str, modes))}, the file's decoder was trained with "
                "bilinear upsampling: build smp.Unet(..., decoder_interpolation='bilinear')")
    return None


def _nnunet_decoder_part(k: str) -> bool:
    """nnU-Net's decoder keys that a pretrained decoder fills: not the encoder it refers to
    (``decoder.encoder.*``, the same tensors as ``encoder.*``), not the segmentation layers."""
    return k.startswith("decoder.") and not k.startswith("decoder.encoder.") and ".seg_layers." not in k


SMP_UNET_DECODER = DecoderLayout(_smp_decoder_keys, _under("decoder."), _smp_decoder_check)
"""smp ``Unet`` with ``decoder_channels`` equal to ours (ResNet-18/34: (256, 128, 64, 64, 32);
ResNet-50: (1024, 512, 256, 64, 32)), batch norm, no attention and
``decoder_interpolation="bilinear"`` computes exactly what warmstart's decoder computes."""

LAYOUTS: dict[str, Layout] = {L.name: L for L in (
    Layout("warmstart", "warmstart's reference U-Net (encoder.*, decoder.*)", _prefixed("encoder."), _under("encoder."),
           ("resnet", "unet", "unet_residual", "nnunet", "smp", "monai_dynunet"), "warmstart",
           decoder=DecoderLayout(lambda ours: {k: k for k in ours}, _under("decoder."))),
    Layout("smp", "segmentation_models_pytorch network with a ResNet encoder or the encoder smp built (encoder.*)",
           _prefixed("encoder."), _under("encoder."), ("resnet", "smp"), "segmentation_models_pytorch",
           "build the smp network with the file's encoder name and depth (the manifest's encoder spec)",
           decoder=SMP_UNET_DECODER),
    Layout("monai-flexibleunet", "MONAI FlexibleUNet with a ResNet backbone (encoder.*)", _prefixed("encoder."),
           _under("encoder."), ("resnet",), "monai",
           "MONAI's resnet18/34 backbones have parameter-free 'type A' shortcuts where ours has 1x1 convolutions: "
           "use backbone='resnet50' with a resnet50 encoder file, or segmentation_models_pytorch / warmstart.UNet"),
    Layout("monai-basicunet", "MONAI BasicUNet (conv_0, down_1..down_4)", _basicunet_key, _basicunet_part,
           ("unet",), "monai", "BasicUNet has 5 levels: it takes a unet encoder of depth 5 whose widths equal its "
           "features[:5] (and norm='batch', act='relu' to compute what our encoder computed)"),
    Layout("monai-dynunet", "MONAI DynUNet (input_block, downsamples, bottleneck)", lambda k: k,
           lambda k: k.startswith(("input_block.", "downsamples.", "bottleneck.")), ("monai_dynunet",), "monai",
           "build DynUNet with the file's filters, strides, kernel sizes, norm, activation and res_block (the "
           "manifest's encoder spec)"),
    Layout("nnunet", "nnU-Net network of dynamic-network-architectures (encoder.*; its decoder shares those modules)",
           _prefixed("encoder."), _under("encoder."), ("nnunet",), "dynamic_network_architectures",
           "the file's encoder was built from one nnU-Net plans configuration: build the network from the same plans "
           "and configuration (the manifest's encoder spec holds its architecture entry)",
           decoder=DecoderLayout(lambda ours: {k: k for k in ours if not k.startswith("decoder.encoder.")},
                                 _nnunet_decoder_part)),
    Layout("torchvision", "torchvision ResNet (its fc layer is left as it is)", lambda k: k, _not_classifier,
           ("resnet",), "torchvision"),
    Layout("timm", "timm ResNet, including features_only models", lambda k: k, _not_classifier, ("resnet",), "timm"),
    Layout("encoder", "a bare warmstart encoder", lambda k: k, lambda k: True,
           ("resnet", "unet", "unet_residual", "nnunet", "smp", "monai_dynunet"), "warmstart"),
)}
