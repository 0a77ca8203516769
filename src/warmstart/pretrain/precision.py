"""The arithmetic precision of a pretraining run, and whether this CPU does low precision natively.

bfloat16 pays on a CPU only where the instructions exist (AVX-512 BF16 or AMX): on a 2-core CPU
with AVX-512 BF16, bf16 autocast ran the demo's U-Net encoder step (width 16, depth 4, SimCLR,
batch 128 of 64 px) in 0.37 s instead of 0.63-0.75 s, 1.7-2x faster. Elsewhere oneDNN emulates
it: on an AVX2-only 2-core CPU the same step (batch 64) took 6.4 s instead of 0.63 s in float32,
about 10x slower. So a CPU run never uses low precision on its own
(``auto`` is float32 on every CPU: the benchmark's check that bf16 leaves final Dice unchanged
has not been run on a CPU with native bf16), and an explicit request on a CPU that would emulate
it is refused with the reason.
"""
from __future__ import annotations

import torch

from ..errors import PretrainError

__all__ = ["native_low_precision", "resolve_precision", "runs_on_cpu"]

_LOW = {"bf16-mixed": "bfloat16", "bf16-true": "bfloat16", "16-mixed": "float16", "16-true": "float16"}


def native_low_precision(dtype: str) -> bool:
    """Whether this CPU computes ``bfloat16`` or ``float16`` convolutions natively (oneDNN's check)."""
    check = {"bfloat16": "_is_mkldnn_bf16_supported", "float16": "_is_mkldnn_fp16_supported"}[dtype]
    try:
        return bool(getattr(torch.ops.mkldnn, check)())
    except (AttributeError, RuntimeError):
        return False


def runs_on_cpu(accelerator: str) -> bool:
    """Whether Lightning's ``accelerator`` setting ends up on the CPU on this machine."""
    a = accelerator.lower()
    if a == "cpu":
        return True
    if a == "auto":
        return not (torch.cuda.is_available() or (hasattr(torch.backends, "mps") and torch.backends.mps.is_available()))
    return False


def resolve_precision(precision: str, accelerator: str) -> str:
    """Lightning's precision string for ``pretrain.precision`` on this machine.

    ``auto``: bf16-mixed on a GPU that supports it, else 32-true (every CPU). ``32`` means
    32-true. A low precision on a CPU that would emulate it raises.

    Raises
    ------
    PretrainError
        bf16 or fp16 requested for a CPU run on a CPU without native support.
    """
    on_cpu = runs_on_cpu(accelerator)
    if precision == "auto":
        if not on_cpu and torch.cuda.is_available() and torch.cuda.is_bf16_supported():
            return "bf16-mixed"
        return "32-true"
    resolved = "32-true" if precision == "32" else precision
    dtype = _LOW.get(resolved)
    if on_cpu and dtype and not native_low_precision(dtype):
        raise PretrainError(
            f"pretrain.precision = {precision!r} on a CPU without native {dtype} arithmetic (no AVX-512 BF16 / AMX): "
            "it would run about 10x slower than float32; use '32-true' or 'auto'")
    return resolved
