"""Channels-last memory layout for training on CPUs (and GPUs).

Convolutions in channels-last layout (N, H, W, C in memory; N, D, H, W, C in 3-D) are faster on
a CPU for U-Nets and the same for narrow networks, with the same results up to float rounding.
Measured with ``tools/bench_pretrain.py --roof`` on 2 cores (forward + backward + AdamW): the 2-D
U-Net encoder (width 16, depth 4, 128 x 64^2) 1.27x, the 3-D one (width 8, depth 4, 32 x 32^3)
1.28x, 3-D fine-tuning of the whole U-Net (2 x 64^3) 1.54x, 2-D fine-tuning at the benchmark's
batch of 8 0.98x (no change), whole-slice inference 1.31x; the narrow ResNet 0.98x. Only the
memory order changes: shapes, state dicts and exported tensors are the same. A single-channel
batch has the same memory in both layouts, so grayscale views need no conversion.
"""
from __future__ import annotations

import torch

__all__ = ["to_channels_last", "module_channels_last"]


def to_channels_last(x: torch.Tensor) -> torch.Tensor:
    """A 4-D (N, C, H, W) or 5-D (N, C, D, H, W) tensor in channels-last order; others unchanged."""
    if x.dim() == 4:
        return x.contiguous(memory_format=torch.channels_last)
    if x.dim() == 5:
        return x.contiguous(memory_format=torch.channels_last_3d)
    return x


def module_channels_last(module: torch.nn.Module) -> torch.nn.Module:
    """Put a network's 4-D (2-D convolution) and 5-D (3-D convolution) weights in channels-last order."""
    for p in module.parameters():
        if p.dim() in (4, 5):
            p.data = to_channels_last(p.data)
    for name, b in module.named_buffers():
        if b.dim() in (4, 5):
            owner = module.get_submodule(name.rpartition(".")[0]) if "." in name else module
            setattr(owner, name.rpartition(".")[2], to_channels_last(b))
    return module
