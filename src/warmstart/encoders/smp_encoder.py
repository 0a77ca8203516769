"""segmentation_models_pytorch's encoders as warmstart encoders: the encoder smp puts into its
networks, built by smp itself (``get_encoder(name, weights=None)``), pretrained here.

Any encoder name smp builds without downloading weights works: its ResNets, EfficientNets,
MobileNets, and timm's models through smp's ``tu-`` wrapper (ConvNeXt, RegNet, ...). The module
is smp's own, so its state-dict keys are the ``encoder.*`` keys of every smp network built with
that encoder name and depth (Unet, UnetPlusPlus, FPN, DeepLabV3+, ...) and the ``smp`` layout
places them without any renaming.

smp encoders return the input itself as their first feature map (stride 1), then one map per
stage. The module warmstart trains is smp's encoder object, of a subclass whose only change is
that ``forward`` leaves that first map out (it holds no weights, and a decoder would be squeezed
to the input's one channel at full resolution); the spec lists the stages from stride 2. Encoders
with an empty stage (0 channels: smp's transformer encoders) are refused. 2-D only: smp has no
3-D networks.
"""
from __future__ import annotations

from typing import Any, Mapping

from .registry import register
from .spec import EncoderSpec, Stage

__all__ = ["smp_encoder", "PIP_LINE"]

PIP_LINE = "pip install segmentation-models-pytorch"


def _smp() -> tuple[Any, str]:
    try:
        import segmentation_models_pytorch as smp
    except ImportError:
        raise ValueError(f"the smp encoder needs segmentation_models_pytorch ({PIP_LINE})") from None
    return smp, str(smp.__version__)


_SUBCLASSES: dict[type, type] = {}


def _without_input(cls: type) -> type:
    """``cls`` with a ``forward`` that drops smp's first feature map (the input); one subclass per class."""
    if cls not in _SUBCLASSES:
        def forward(self: Any, x: Any) -> list[Any]:
            return list(cls.forward(self, x))[1:]

        _SUBCLASSES[cls] = type(cls.__name__, (cls,), {"forward": forward, "__module__": __name__,
                                                       "__doc__": f"{cls.__doc__ or cls.__name__} (stage maps only)"})
    return _SUBCLASSES[cls]


@register("smp")
def smp_encoder(in_channels: int = 1, encoder_name: str = "resnet34", depth: int = 5, spatial_dims: int | None = None,
                library: Mapping[str, Any] | None = None) -> Any:
    """An encoder of segmentation_models_pytorch, randomly initialized by smp.

    Parameters
    ----------
    in_channels : int
    encoder_name : str
        smp's encoder name, as its networks' ``encoder_name`` (``resnet34``, ``efficientnet-b0``,
        ``tu-convnext_tiny``, ...).
    depth : int
        Stages, as smp's ``encoder_depth`` (3 to 5).
    spatial_dims : {2}, optional
        Refused when 3: smp's networks are 2-D.
    library : dict, optional
        The library and version recorded in a spec (informational when rebuilding).

    Returns
    -------
    torch.nn.Module
        smp's encoder module; ``forward`` returns its list of feature maps.
    """
    if spatial_dims not in (None, 2):
        raise ValueError("segmentation_models_pytorch's encoders are 2-D: pretrain them on a 2-D corpus "
                         "(for cubes use unet, unet_residual or an nnU-Net 3d configuration)")
    smp, version = _smp()
    try:
        enc = smp.encoders.get_encoder(str(encoder_name), in_channels=int(in_channels), depth=int(depth), weights=None)
    except (KeyError, ValueError, RuntimeError) as e:
        raise ValueError(f"segmentation_models_pytorch cannot build encoder {encoder_name!r} without weights ({e})") from None
    channels = [int(c) for c in enc.out_channels][1:]  # [0] is the input itself
    strides = [2**i for i in range(1, len(channels) + 1)]
    if any(c == 0 for c in channels):
        raise ValueError(f"smp encoder {encoder_name!r} has a stage without channels ({channels}); this warmstart pretrains "
                         "smp encoders whose every stage has feature maps (ResNets, EfficientNets, tu- CNNs, ...)")
    enc.__class__ = _without_input(type(enc))
    params: dict[str, Any] = {"in_channels": int(in_channels), "encoder_name": str(encoder_name), "depth": int(depth),
                              "library": {"name": "segmentation_models_pytorch", "version": version}}
    enc.spec = EncoderSpec("smp", params, tuple(Stage(c, s) for c, s in zip(channels, strides)))
    # The first convolution in module order sees the input.
    from torch import nn

    enc.first_conv = next(n for n, m in enc.named_modules() if isinstance(m, nn.Conv2d))
    return enc
