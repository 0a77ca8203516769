"""nnU-Net's own networks as encoders: the network an nnU-Net plans file describes, built with the
dynamic-network-architectures package that nnU-Net itself builds it with.

nnU-Net (Isensee et al., Nature Methods 2021) configures a U-Net per dataset and writes it into a
plans JSON: for each configuration (``2d``, ``3d_fullres``, ...) an ``architecture`` entry with
the network class (``PlainConvUNet``, ``ResidualEncoderUNet``), its keyword arguments, and the
names of those arguments that are classes to import. :func:`build_network` builds that network
the way nnU-Net's ``get_network_from_plans`` does (the same class, the same arguments, the same
initialization), so a file pretrained here fits the user's network key for key.

The encoder warmstart pretrains is ``network.encoder`` itself (its skip outputs are the stage
maps); its state-dict keys are the network's ``encoder.*`` keys without the prefix. Methods that
train a decoder train the network's own decoder (:func:`nnunet_decoder`), so a restoration run
pretrains the whole nnU-Net network but its segmentation layers. The spec
records the architecture entry (not the plans file's path), the configuration's name and the
library's version, so an encoder file rebuilds its network without the plans file.

Needs ``dynamic-network-architectures`` (installed with ``warmstart[train]``).
"""
from __future__ import annotations

import copy
import json
import os
import pydoc
import warnings
from pathlib import Path
from typing import Any, Mapping

from torch import nn

from .registry import register, register_own_decoder
from .spec import EncoderSpec, Stage

__all__ = ["architecture_from_plans", "build_network", "nnunet_encoder", "nnunet_decoder", "NNUNetDecoder", "LIBRARY"]

LIBRARY = "dynamic_network_architectures"
PIP_LINE = "pip install dynamic-network-architectures"
_SEG_CLASSES = 2  # the segmentation layers are the user's: any class count builds the same encoder


def _library_version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("dynamic-network-architectures")
    except PackageNotFoundError:
        raise ValueError(f"the nnunet encoder needs the dynamic-network-architectures package ({PIP_LINE})") from None


def architecture_from_plans(plans: str | os.PathLike[str] | Mapping[str, Any], configuration: str) -> dict[str, Any]:
    """The ``architecture`` entry of one configuration of an nnU-Net plans file.

    Parameters
    ----------
    plans : path or dict
        An nnU-Net plans JSON (``nnUNetPlans.json``) or its content.
    configuration : str
        ``2d``, ``3d_fullres``, ``3d_lowres``, or any configuration the file defines; one that
        ``inherits_from`` another takes the parent's entries it does not set itself.

    Returns
    -------
    dict
        ``network_class_name``, ``arch_kwargs`` and ``_kw_requires_import``, as in the file.

    Raises
    ------
    ValueError
        Unreadable file, unknown configuration (the known ones are named), inheritance loop, or a
        plans file without ``architecture`` entries (written by nnU-Net before version 2.4).
    """
    where = "the plans" if isinstance(plans, Mapping) else str(plans)
    if not isinstance(plans, Mapping):
        try:
            plans = json.loads(Path(plans).read_text())
        except (OSError, json.JSONDecodeError) as e:
            raise ValueError(f"{where}: cannot be read as an nnU-Net plans JSON ({e})") from None
    configs = plans.get("configurations") if isinstance(plans, Mapping) else None
    if not isinstance(configs, Mapping):
        raise ValueError(f"{where}: not an nnU-Net plans file (no 'configurations')")
    resolved: dict[str, Any] = {}
    seen: list[str] = []
    name: str | None = configuration
    while name is not None:
        if name in seen:
            raise ValueError(f"{where}: configurations inherit from each other in a loop ({' -> '.join(seen + [name])})")
        if name not in configs:
            raise ValueError(f"{where}: no configuration {name!r}; it defines {', '.join(sorted(configs))}")
        seen.append(name)
        entry = configs[name]
        resolved = {**copy.deepcopy(dict(entry)), **resolved}
        name = entry.get("inherits_from")
    arch = resolved.get("architecture")
    if not isinstance(arch, Mapping) or "network_class_name" not in arch or "arch_kwargs" not in arch:
        raise ValueError(f"{where}: configuration {configuration!r} has no 'architecture' entry (network class and "
                         "arguments); plans files written by nnU-Net 2.4 or later have one: re-run its planning")
    return {"network_class_name": str(arch["network_class_name"]), "arch_kwargs": dict(arch["arch_kwargs"]),
            "_kw_requires_import": list(arch.get("_kw_requires_import", []))}


def build_network(architecture: Mapping[str, Any], in_channels: int = 1, num_classes: int = _SEG_CLASSES,
                  initialize: bool = True) -> Any:
    """The whole nnU-Net network of an ``architecture`` entry, as nnU-Net builds it.

    The classes named in ``_kw_requires_import`` are imported by their dotted names and the
    network is initialized with its own ``initialize`` (He initialization in
    dynamic-network-architectures), the steps of nnU-Net's ``get_network_from_plans``.
    """
    _library_version()
    kwargs = dict(copy.deepcopy(architecture["arch_kwargs"]))
    for key in architecture.get("_kw_requires_import", []):
        if kwargs.get(key) is not None:
            found = pydoc.locate(kwargs[key])
            if found is None:
                raise ValueError(f"nnunet architecture: {key} = {kwargs[key]!r} cannot be imported")
            kwargs[key] = found
    with warnings.catch_warnings():  # importing the library imports timm, which uses a deprecated torch.jit API
        warnings.filterwarnings("ignore", message=".*torch.jit.interface.*deprecated", category=FutureWarning)
        cls = pydoc.locate(architecture["network_class_name"])
    if cls is None:
        raise ValueError(f"nnunet architecture: network class {architecture['network_class_name']!r} cannot be "
                         f"imported (is dynamic-network-architectures up to date? {PIP_LINE})")
    try:
        net = cls(input_channels=int(in_channels), num_classes=int(num_classes), **kwargs)
    except (TypeError, AssertionError, ValueError) as e:
        raise ValueError(f"nnunet architecture: {architecture['network_class_name']} refuses its arguments ({e})") from None
    if initialize and hasattr(net, "initialize"):
        net.apply(net.initialize)
    return net


def _stage_strides(kwargs: Mapping[str, Any], n_stages: int, dims: int) -> list[list[int]]:
    """Cumulative stride of each stage's output, per axis."""
    strides = kwargs["strides"]
    per_stage = [[int(s)] * dims if isinstance(s, int) else [int(v) for v in s] for s in
                 (strides if isinstance(strides, (list, tuple)) else [strides] * n_stages)]
    total = [1] * dims
    out = []
    for s in per_stage:
        total = [t * v for t, v in zip(total, s)]
        out.append(list(total))
    return out


@register("nnunet")
def nnunet_encoder(in_channels: int = 1, plans: str | None = None, configuration: str | None = None,
                   architecture: Mapping[str, Any] | None = None, spatial_dims: int | None = None,
                   library: Mapping[str, Any] | None = None) -> Any:
    """The encoder of an nnU-Net network (``network.encoder`` of dynamic-network-architectures).

    Parameters
    ----------
    in_channels : int
    plans : path, optional
        An nnU-Net plans JSON; with ``configuration``, where the network comes from.
    configuration : str, optional
        The configuration of ``plans`` (``2d``, ``3d_fullres``, ...); recorded in the spec.
    architecture : dict, optional
        The architecture entry itself (``network_class_name``, ``arch_kwargs``,
        ``_kw_requires_import``), instead of ``plans``; this is what the spec records.
    spatial_dims : {2, 3}, optional
        What the caller expects; refused when the architecture's convolutions are of the other kind.
    library : dict, optional
        The library and version recorded in a spec (informational when rebuilding).

    Returns
    -------
    torch.nn.Module
        The network's encoder; ``forward`` returns one feature map per stage; ``.spec`` and
        ``.first_conv`` as for every warmstart encoder.
    """
    if architecture is None:
        if plans is None or configuration is None:
            raise ValueError("the nnunet encoder needs plans= (an nnU-Net plans JSON) and configuration= (e.g. "
                             "'3d_fullres'), or architecture= (a configuration's architecture entry)")
        architecture = architecture_from_plans(plans, configuration)
    arch = {"network_class_name": architecture["network_class_name"], "arch_kwargs": dict(architecture["arch_kwargs"]),
            "_kw_requires_import": list(architecture.get("_kw_requires_import", []))}
    net = build_network(arch, in_channels)
    encoder = net.encoder
    conv_name = str(arch["arch_kwargs"].get("conv_op", ""))
    dims = 3 if conv_name.endswith("3d") else 2
    label = repr(configuration) if configuration else "(architecture as given)"
    if spatial_dims is not None and int(spatial_dims) != dims:
        raise ValueError(f"the nnunet configuration {label} builds a {dims}-D network ({conv_name}), "
                         f"not a {spatial_dims}-D one: choose a {'3d_fullres' if spatial_dims == 3 else '2d'} "
                         "configuration for this corpus")
    kwargs = arch["arch_kwargs"]
    n_stages = int(kwargs["n_stages"])
    features = kwargs["features_per_stage"]
    features = [int(features)] * n_stages if isinstance(features, int) else [int(f) for f in features]
    strides = _stage_strides(kwargs, n_stages, dims)
    uneven = [s for s in strides if len(set(s)) > 1]
    if uneven:
        raise ValueError(f"the nnunet configuration {label} downsamples the axes unevenly (cumulative "
                         f"strides {strides}); this warmstart pretrains networks with the same stride along every "
                         "axis (cubes of cubic voxels): plan nnU-Net for isotropic spacing, or use a 2d configuration")
    params: dict[str, Any] = {"in_channels": int(in_channels), "architecture": arch}
    if configuration is not None:
        params["configuration"] = str(configuration)
    if dims == 3:
        params["spatial_dims"] = 3
    params["library"] = {"name": LIBRARY, "version": _library_version()}
    encoder.spec = EncoderSpec("nnunet", params, tuple(Stage(c, s[0]) for c, s in zip(features, strides)))
    # The first convolution in module order sees the input (stem.convs.0.conv, stages.0.0.convs.0.conv, ...).
    encoder.first_conv = next(name for name, m in encoder.named_modules() if isinstance(m, (nn.Conv2d, nn.Conv3d)))
    return encoder


class NNUNetDecoder(nn.Module):
    """nnU-Net's own decoder for an ``nnunet`` encoder, ending in ``out_channels`` maps at the input's resolution.

    The decoder is built with the rest of the network (same architecture entry, ``num_classes =
    out_channels``, nnU-Net's initialization); it keeps a reference to its encoder, as in nnU-Net's
    network, and here that reference is the encoder being trained, so its keys are the network's
    ``decoder.*`` keys (``decoder.encoder.*`` being the shared encoder). Its last segmentation
    layer gives the output (deep supervision off), so a restoration loss trains the whole decoder.

    ``forward(feats, size)`` -> (B, out_channels, *size); ``.decoder`` is
    dynamic-network-architectures' decoder module.
    """

    kind = "nnunet"
    norm = None  # the architecture entry says what the decoder is

    def __init__(self, encoder: nn.Module, out_channels: int) -> None:
        super().__init__()
        params = encoder.spec.params
        net = build_network(params["architecture"], int(params.get("in_channels", 1)), num_classes=int(out_channels))
        self.decoder = net.decoder
        self.decoder.encoder = encoder  # nnU-Net's decoder refers to its encoder: share the trained one
        self.decoder.deep_supervision = False
        self.out_channels = int(out_channels)

    def forward(self, feats: Any, size: Any = None) -> Any:
        return self.decoder(list(feats))


@register_own_decoder("nnunet")
def nnunet_decoder(encoder: Any, out_channels: int) -> NNUNetDecoder:
    """The network's own decoder for an ``nnunet`` encoder (see :class:`NNUNetDecoder`)."""
    return NNUNetDecoder(encoder, out_channels)
