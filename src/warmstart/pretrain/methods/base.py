"""The interface every pretraining method implements, and the method registry."""
from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import Any, Callable

import torch
from torch import nn

from ..augment import ViewParams

__all__ = ["Method", "METHODS", "Views", "register_method", "build_method", "pooled"]

METHODS: dict[str, Callable[..., "Method"]] = {}


def register_method(name: str) -> Callable[[type], type]:
    def deco(cls: type) -> type:
        if name in METHODS:
            raise ValueError(f"method {name!r} registered twice")
        METHODS[name] = cls
        cls.method_name = name
        return cls

    return deco


def build_method(name: str, encoder: nn.Module, **params: Any) -> "Method":
    """Build a registered method around an encoder (``simclr``, ``moco_v2``, ``byol``)."""
    if name not in METHODS:
        raise ValueError(f"unknown method {name!r}; known: {', '.join(sorted(METHODS))}")
    cls = METHODS[name]
    bad = sorted(set(params) - set(inspect.signature(cls.__init__).parameters) - {"self"})
    if bad:
        raise ValueError(f"method {name!r} takes no parameter {bad[0]!r}")
    return cls(encoder, **params)


def pooled(encoder: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """Global average pool of the encoder's deepest feature map: (B, C, [D,] H, W) -> (B, C)."""
    return encoder(x)[-1].flatten(2).mean(-1)


@dataclass
class Views:
    """What a training step knows about its two views, for methods that need more than the pixels.

    Attributes
    ----------
    original : (B, C, P, P) tensor
        The batch before augmentation (standardized like the views).
    params1, params2 : ViewParams
        Each view's parameters: dense methods map locations between views with
        :mod:`warmstart.pretrain.geometry`.
    generator : torch.Generator
        The step's generator (seeded by seed, step and rank), for any further randomness.
    """

    original: torch.Tensor
    params1: ViewParams
    params2: ViewParams
    generator: torch.Generator


class Method(nn.Module):
    """A self-supervised objective on two views of a batch.

    Subclasses set ``self.encoder`` (the network that is exported) and implement :meth:`loss`.
    Momentum methods override :meth:`after_step`; :meth:`exported_encoder` says which encoder
    the export takes (the momentum one, where there is one and it is asked for).
    """

    method_name = "base"
    trains_decoder = False  # True where exported_decoder() returns a trained U-Net decoder
    # False where the objective does not shape the pooled embedding (restoration, masked
    # modelling): its spread says nothing about collapse, so the loop does not warn on it.
    learns_embedding = True

    def __init__(self, encoder: nn.Module) -> None:
        super().__init__()
        self.encoder = encoder

    def loss(self, view1: torch.Tensor, view2: torch.Tensor,
             views: Views | None = None) -> tuple[torch.Tensor, dict[str, torch.Tensor]]:
        """Return the loss and ``{"embedding": (B, D), "embedding2": (B, D)}``: the pooled
        features of the two views (what the collapse and alignment monitors watch). ``views``
        carries the un-augmented batch and the views' geometry (always given in training)."""
        raise NotImplementedError

    def after_step(self, step: int, total_steps: int) -> None:
        """Called after every optimizer step (momentum updates)."""

    def extra_state(self) -> dict[str, torch.Tensor]:
        """State outside the state dict that a resumed run needs (a queue of negatives, say)."""
        return {}

    def load_extra_state(self, state: dict[str, torch.Tensor]) -> None:
        """Restore what :meth:`extra_state` returned."""

    def exported_encoder(self, momentum: bool = False) -> nn.Module:
        return self.encoder

    def exported_decoder(self) -> nn.Module | None:
        """The decoder the method trains (restoration), or None."""
        return None

    def trained_networks(self, prefix: str = "") -> dict[str, Any]:
        """Where the exportable networks sit in this method's state dict: the run folder's
        ``networks.json``, from which the export stage takes them without rebuilding the method.

        Returns
        -------
        dict
            ``{"encoder": {"online": KEY_PREFIX, "momentum": KEY_PREFIX or None},
            "decoder": None or {"kind": "unet" or "nnunet", "norm": str or None, "key_prefix": KEY_PREFIX}}``
            (``nnunet``: the client network's own decoder, see ``encoders.own_decoder``); every key
            prefix ends with a dot and starts with ``prefix`` (``"method."`` in a checkpoint).
        """
        names = {id(m): name for name, m in self.named_modules()}
        online, momentum = self.exported_encoder(momentum=False), self.exported_encoder(momentum=True)
        decoder = self.exported_decoder()
        return {
            "encoder": {"online": f"{prefix}{names[id(online)]}.",
                        "momentum": None if momentum is online else f"{prefix}{names[id(momentum)]}."},
            "decoder": None if decoder is None else {"kind": getattr(decoder, "kind", "unet"),
                                                     "norm": getattr(decoder, "norm", None),
                                                     "key_prefix": f"{prefix}{names[id(decoder)]}."},
        }

    @torch.no_grad()
    def embed(self, x: torch.Tensor) -> torch.Tensor:
        return pooled(self.encoder, x)
