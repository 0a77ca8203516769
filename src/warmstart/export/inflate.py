"""A 3-D network warm-started from a 2-D encoder file: its kernels inflated along the new axis.

Two rules (Carreira and Zisserman, "Quo Vadis, Action Recognition?", CVPR 2017, for ``mean``):

``mean``
    A k x k kernel becomes d x k x k, the 2-D kernel repeated d times along Z and divided by d
    (d: the 3-D network's kernel depth). On a volume that is constant along Z every convolution
    then gives the 2-D response of one slice (exactly, away from the first and last slices,
    where the zero padding of a 3-D convolution sees fewer planes).
``center``
    The 2-D kernel in the middle plane, zeros elsewhere (d odd). Every slice is then filtered as
    the 2-D network filters it, on any volume; training grows the other planes.

Normalization weights, biases and running statistics are per channel and are copied as they are:
on a volume constant along Z, a 3-D batch- or instance-norm sees the statistics the 2-D one saw.
The network's depth (stages) and widths (channels) must be the 2-D file's: anything else is a
shape mismatch that :func:`warmstart.warm_start` names.
"""
from __future__ import annotations

import copy
from typing import Any, Mapping

__all__ = ["RULES", "inflate_kernel", "spec_in_3d"]

RULES = ("mean", "center")


def inflate_kernel(weight: Any, depth: int, rule: str) -> Any:
    """A 2-D convolution weight (O, I, kH, kW) as a 3-D one (O, I, depth, kH, kW).

    Examples
    --------
    >>> import torch
    >>> w = torch.ones(1, 1, 3, 3)
    >>> inflate_kernel(w, 3, "mean").sum().item()
    9.0
    """
    import torch

    if rule not in RULES:
        raise ValueError(f"inflate must be one of {', '.join(RULES)}, got {rule!r}")
    if weight.ndim != 4:
        raise ValueError(f"only 2-D convolution weights inflate, got shape {tuple(weight.shape)}")
    if rule == "mean":
        return weight.unsqueeze(2).repeat(1, 1, depth, 1, 1) / depth
    if depth % 2 == 0:
        raise ValueError(f"inflate='center' needs an odd kernel depth, the network's is {depth}")
    out = torch.zeros((*weight.shape[:2], depth, *weight.shape[2:]), dtype=weight.dtype)
    out[:, :, depth // 2] = weight
    return out


def _nnunet_in_3d(arch: Mapping[str, Any]) -> dict[str, Any]:
    """An nnU-Net 2-D architecture entry with 3-D operations, kernels and strides."""
    out = copy.deepcopy(dict(arch))
    kw = out["arch_kwargs"] = dict(out["arch_kwargs"])
    for key in ("conv_op", "norm_op", "dropout_op"):
        if isinstance(kw.get(key), str):
            kw[key] = kw[key].replace("2d", "3d")

    for key in ("kernel_sizes", "strides"):  # per stage: (kH, kW) -> (kH, kH, kW); an int stays an int
        if key in kw:
            kw[key] = [[int(e[0]), *map(int, e)] if isinstance(e, (list, tuple)) else e for e in kw[key]]
    return out


def spec_in_3d(spec: Mapping[str, Any]) -> dict[str, Any]:
    """The 3-D counterpart of a 2-D encoder spec: the same stages and widths, 3-D convolutions.

    For warmstart's encoders and MONAI's DynUNet, ``spatial_dims = 3``; for an nnU-Net
    architecture, its operations, kernel sizes and strides in 3-D (a square k x k kernel or
    stride becomes k x k x k).
    """
    params = copy.deepcopy(dict(spec["params"]))
    if spec["name"] == "nnunet":
        params["architecture"] = _nnunet_in_3d(params["architecture"])
        if params.get("configuration"):
            params["configuration"] = f"{params['configuration']} inflated to 3-D"
    params["spatial_dims"] = 3
    return {**copy.deepcopy(dict(spec)), "params": params}
