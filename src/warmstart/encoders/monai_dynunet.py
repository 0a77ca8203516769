"""MONAI's DynUNet as an encoder: its contracting path, built by MONAI, pretrained here.

MONAI's ``DynUNet`` (the dynamic U-Net of MONAI's model zoo, 2-D or 3-D, configurable kernels,
strides, widths, norms and residual blocks) runs its contracting path as ``input_block`` ->
``downsamples[0..]`` -> ``bottleneck``, each output handed to the decoder as a skip. The encoder
here holds exactly those three MONAI modules, under those names, so its state-dict keys are the
network's own and a file loads into a DynUNet built with the same arguments without renaming
(layout ``monai-dynunet``).
"""
from __future__ import annotations

from typing import Any, Mapping, Sequence

from torch import nn

from .registry import register
from .spec import EncoderSpec, Stage

__all__ = ["DynUNetEncoder", "PIP_LINE"]

PIP_LINE = "pip install monai"


def _cumulative(strides: Sequence[Any], dims: int) -> list[list[int]]:
    total, out = [1] * dims, []
    for s in strides:
        step = [int(s)] * dims if isinstance(s, int) else [int(v) for v in s]
        total = [t * v for t, v in zip(total, step)]
        out.append(list(total))
    return out


@register("monai_dynunet")
class DynUNetEncoder(nn.Module):
    """The contracting path of MONAI's DynUNet.

    Parameters
    ----------
    in_channels : int
    spatial_dims : {2, 3}
    filters : sequence of int
        Channels of each level (DynUNet's ``filters``).
    strides : sequence
        Stride of each level (the first is usually 1), an int or one per axis.
    kernel_size : sequence, optional
        Kernel of each level (default 3 everywhere).
    norm_name : str or tuple
        MONAI's norm (``instance``, ``batch``, ...; DynUNet's default: instance norm with affine
        parameters).
    act_name : str or tuple
        MONAI's activation (DynUNet's default leaky ReLU, slope 0.01).
    res_block : bool
        Residual blocks (DynUNet's ``res_block``).
    library : dict, optional
        The library and version recorded in a spec (informational when rebuilding).
    """

    def __init__(self, in_channels: int = 1, spatial_dims: int = 2, filters: Sequence[int] = (32, 64, 128, 256),
                 strides: Sequence[Any] = (1, 2, 2, 2), kernel_size: Sequence[Any] | None = None,
                 norm_name: Any = ("INSTANCE", {"affine": True}),
                 act_name: Any = ("leakyrelu", {"inplace": True, "negative_slope": 0.01}), res_block: bool = False, library: Mapping[str, Any] | None = None) -> None:
        super().__init__()
        try:
            import monai
            from monai.networks.nets import DynUNet
        except ImportError:
            raise ValueError(f"the monai_dynunet encoder needs MONAI ({PIP_LINE})") from None
        n = len(filters)
        if len(strides) != n or n < 2:
            raise ValueError(f"monai_dynunet needs one stride per level and at least 2 levels, got filters {list(filters)} "
                             f"and strides {list(strides)}")
        kernel = list(kernel_size) if kernel_size is not None else [3] * n
        act = list(act_name) if isinstance(act_name, (list, tuple)) else act_name
        norm = list(norm_name) if isinstance(norm_name, (list, tuple)) else norm_name
        net = DynUNet(spatial_dims=int(spatial_dims), in_channels=int(in_channels), out_channels=2, kernel_size=kernel,
                      strides=list(strides), upsample_kernel_size=list(strides[1:]), filters=list(filters),
                      norm_name=tuple(norm) if isinstance(norm, list) else norm,
                      act_name=tuple(act) if isinstance(act, list) else act, res_block=bool(res_block))
        self.input_block, self.downsamples, self.bottleneck = net.input_block, net.downsamples, net.bottleneck
        cum = _cumulative(strides, int(spatial_dims))
        if any(len(set(s)) > 1 for s in cum):
            raise ValueError(f"monai_dynunet strides {list(strides)} downsample the axes unevenly (cumulative {cum}); "
                             "this warmstart pretrains networks with the same stride along every axis")
        params: dict[str, Any] = {"in_channels": int(in_channels), "spatial_dims": int(spatial_dims),
                                  "filters": [int(f) for f in filters], "strides": list(strides), "kernel_size": kernel,
                                  "norm_name": norm, "act_name": act, "res_block": bool(res_block),
                                  "library": {"name": "monai", "version": str(monai.__version__)}}
        if int(spatial_dims) == 2:
            params.pop("spatial_dims")  # as every 2-D spec: recorded only when 3
        self.spec = EncoderSpec("monai_dynunet", params, tuple(Stage(int(f), s[0]) for f, s in zip(filters, cum)))
        self.first_conv = next(name for name, m in self.named_modules() if isinstance(m, (nn.Conv2d, nn.Conv3d)))

    def forward(self, x: Any) -> list[Any]:
        feats = [self.input_block(x)]
        for down in self.downsamples:
            feats.append(down(feats[-1]))
        feats.append(self.bottleneck(feats[-1]))
        return feats
