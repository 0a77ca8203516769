"""Encoders: networks whose ``forward`` returns the list of feature maps a U-Net decoder consumes.

``build_encoder(name, **params)`` builds one; every encoder carries an :class:`EncoderSpec`
(name, parameters, and the channels and stride of each feature map). Importing this package
imports torch; the I/O and corpus code never does.
"""
from .registry import ENCODERS, build_encoder, encoder_from_spec, register
from .spec import EncoderSpec, Stage

__all__ = ["EncoderSpec", "Stage", "build_encoder", "encoder_from_spec", "register", "ENCODERS"]

from . import monai_dynunet, nnunet, residual, resnet, smp_encoder, unet  # noqa: E402,F401  (register the built-in encoders)
