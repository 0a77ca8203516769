"""A small registry of encoder constructors."""
from __future__ import annotations

import inspect
from typing import Any, Callable

from .spec import EncoderSpec

__all__ = ["ENCODERS", "OWN_DECODERS", "register", "register_own_decoder", "build_encoder", "encoder_from_spec",
           "own_decoder"]

ENCODERS: dict[str, Callable[..., Any]] = {}
OWN_DECODERS: dict[str, Callable[..., Any]] = {}


def register(name: str) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Class or function decorator: make ``build_encoder(name, ...)`` call it."""

    def deco(fn: Callable[..., Any]) -> Callable[..., Any]:
        if name in ENCODERS:
            raise ValueError(f"encoder {name!r} registered twice")
        ENCODERS[name] = fn
        return fn

    return deco


def build_encoder(name: str, **params: Any) -> Any:
    """Build a registered encoder.

    Parameters
    ----------
    name : str
        ``unet``, ``unet_residual``, ``resnet18``, ``resnet34``, ``resnet50``, ``resnet_narrow``
        (see ``ENCODERS``).
    **params
        Constructor parameters (``in_channels``, widths, norm, ...).

    Returns
    -------
    torch.nn.Module
        ``forward(x)`` returns the list of stage feature maps; ``.spec`` is its EncoderSpec.
    """
    if name not in ENCODERS:
        raise ValueError(f"unknown encoder {name!r}; known: {', '.join(sorted(ENCODERS))}")
    fn = ENCODERS[name]
    sig = inspect.signature(fn)
    bad = sorted(set(params) - set(sig.parameters))
    if bad:
        raise ValueError(f"encoder {name!r} takes no parameter {bad[0]!r} (takes: {', '.join(sig.parameters)})")
    return fn(**params)


def encoder_from_spec(spec: EncoderSpec | dict[str, Any]) -> Any:
    """Rebuild an encoder from its spec and check that its stages match the recorded ones."""
    spec = spec if isinstance(spec, EncoderSpec) else EncoderSpec.from_dict(spec)
    enc = build_encoder(spec.name, **dict(spec.params))
    if spec.stages and tuple(enc.spec.stages) != tuple(spec.stages):
        raise ValueError(f"encoder {spec.name!r} built with {dict(spec.params)} has stages {enc.spec.stages}, "
                         f"the spec records {spec.stages}")
    return enc


def register_own_decoder(name: str) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Decorator: ``own_decoder(encoder, out_channels)`` of an encoder registered as ``name`` calls it.

    For encoders that come from a whole network (a client library's): the methods that train a
    decoder then train that network's own decoder instead of warmstart's U-Net decoder.
    """

    def deco(fn: Callable[..., Any]) -> Callable[..., Any]:
        OWN_DECODERS[name] = fn
        return fn

    return deco


def own_decoder(encoder: Any, out_channels: int) -> Any | None:
    """The decoder of the network ``encoder`` comes from, with ``out_channels`` output maps at the
    input's resolution (``forward(feats, size)``), or None when the encoder brings none."""
    fn = OWN_DECODERS.get(getattr(getattr(encoder, "spec", None), "name", ""))
    return fn(encoder, out_channels) if fn else None
