"""Deliberately broken pretraining methods for the NaN-stop and collapse tests (2-D and 3-D).

A plain helper module (not a ``test_*`` file), so pytest never imports it a second time under
another name: both ``test_pretrain_loop`` and ``test_pretrain_3d`` import it, and each method is
registered once.
"""
from __future__ import annotations

import torch

from warmstart.pretrain.methods import register_method
from warmstart.pretrain.methods.restore import Restore
from warmstart.pretrain.methods.simclr import SimCLR


@register_method("test_nan_after_3")
class NanAfter3(SimCLR):
    """SimCLR whose loss turns NaN after its third call (reset ``calls`` before each run)."""

    calls = 0

    def loss(self, v1, v2, views=None):
        loss, out = super().loss(v1, v2, views)
        type(self).calls += 1
        return (loss * float("nan") if type(self).calls > 3 else loss), out


@register_method("test_collapsed")
class Collapsed(SimCLR):
    """A deliberately collapsed encoder: every weight zero and frozen, so every patch embeds alike."""

    def __init__(self, encoder, **kw):
        super().__init__(encoder, **kw)
        for p in self.encoder.parameters():
            torch.nn.init.zeros_(p)
            p.requires_grad_(False)


@register_method("test_collapsed_restore")
class CollapsedRestore(Restore):
    """Restoration with the same zeroed, frozen encoder: its embedding spread is as low, but the
    method does not learn an embedding, so the loop must not call that collapse."""

    def __init__(self, encoder, **kw):
        super().__init__(encoder, **kw)
        for p in self.encoder.parameters():
            torch.nn.init.zeros_(p)
            p.requires_grad_(False)
