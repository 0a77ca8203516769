"""Settings of the pretraining stage (the ``[pretrain]`` recipe section and its view tables).

No torch here: recipes are read, and checked to the last key, without it.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Mapping

from ..base.settings import require_positive, settings_from_dict
from ..errors import RecipeError

__all__ = ["PretrainSettings", "ViewSettings"]


@dataclass(frozen=True)
class ViewSettings:
    """One view pipeline (a ``[pretrain.views]`` table in a recipe).

    Parameters
    ----------
    output_size : int, optional
        Side of the view in pixels; default the input's.
    crop_scale : (float, float)
        Range of the crop's area as a fraction of the patch.
    crop_ratio : (float, float)
        Range of the crop's aspect ratio (width / height).
    flip, rotate90 : bool
        Random horizontal and vertical flips; random quarter turns (square views only).
    affine_prob, affine_degrees, affine_scale : float, float, (float, float)
        Probability of a small rotation (degrees, uniform in +-affine_degrees) and scaling.
    blur_prob, blur_sigma : float, (float, float)
        Probability and range of the Gaussian blur sigma (pixels of the view).
    contrast_prob, contrast, brightness : float, (float, float), float
        Contrast factor about the patch mean, and an added shift uniform in +-brightness
        (normalized units).
    gamma_prob, gamma : float, (float, float)
        Gamma ``sign(x) |x|^g`` (identity at g = 1), log-uniform in the range.
    noise_prob, noise_sigma : float, (float, float)
        Additive Gaussian noise of standard deviation in the range (normalized units).
    shot_prob, shot_scale : float, (float, float)
        Signal-dependent (Poisson-like) noise of variance ``scale * max(x, 0)``.
    cutout_prob, cutout_size : float, (float, float)
        A rectangle of side fraction in the range set to the patch mean.
    """

    output_size: int | None = None
    crop_scale: tuple[float, float] = (0.3, 1.0)
    crop_ratio: tuple[float, float] = (3 / 4, 4 / 3)
    flip: bool = True
    rotate90: bool = True
    affine_prob: float = 0.0
    affine_degrees: float = 10.0
    affine_scale: tuple[float, float] = (0.9, 1.1)
    blur_prob: float = 0.5
    blur_sigma: tuple[float, float] = (0.1, 1.5)
    contrast_prob: float = 0.8
    contrast: tuple[float, float] = (0.7, 1.3)
    brightness: float = 0.1
    gamma_prob: float = 0.3
    gamma: tuple[float, float] = (0.7, 1.4)
    noise_prob: float = 0.5
    noise_sigma: tuple[float, float] = (0.0, 0.05)
    shot_prob: float = 0.0
    shot_scale: tuple[float, float] = (0.0, 0.01)
    cutout_prob: float = 0.0
    cutout_size: tuple[float, float] = (0.1, 0.3)

    @classmethod
    def identity(cls, **kw: Any) -> "ViewSettings":
        """A pipeline that changes nothing (each transform can then be switched on alone)."""
        base = dict(crop_scale=(1.0, 1.0), crop_ratio=(1.0, 1.0), flip=False, rotate90=False, affine_prob=0.0,
                    blur_prob=0.0, contrast_prob=0.0, gamma_prob=0.0, noise_prob=0.0, shot_prob=0.0, cutout_prob=0.0)
        base.update(kw)
        return cls(**base)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "pretrain.view") -> "ViewSettings":
        return settings_from_dict(cls, d, where)


@dataclass(frozen=True)
class PretrainSettings:
    """How an encoder is pretrained.

    Parameters
    ----------
    encoder : str
        Registry name (``resnet_narrow``, ``resnet18``, ``resnet50``, ``unet``, ``unet_residual``,
        ``nnunet``, ...).
    encoder_params : dict
        Constructor parameters; ``in_channels`` defaults to the corpus's channels. For
        ``nnunet``: ``plans`` (an nnU-Net plans JSON) and ``configuration`` (``2d``,
        ``3d_fullres``, ...), which the run resolves into the configuration's ``architecture``
        entry (recorded in ``recipe.json``, so the plans file is not needed afterwards).
    method : str
        ``simclr``, ``moco_v2``, ``byol`` (global contrastive), ``dense`` (dense contrastive with
        locations matched from the views' geometry), ``restore`` (restoration of corrupted
        patches by a whole U-Net), ``combined`` (a contrastive method plus restoration) or
        ``masked`` (masked image modelling of the U-Net: hidden blocks reconstructed).
    method_params : dict
    view1, view2 : ViewSettings
        Augmentation pipelines of the two views (``[pretrain.view1]`` tables); ``view2`` defaults
        to ``view1``.
    batch_size, epochs : int
    max_steps : int, optional
        Stop after this many optimizer steps (overrides ``epochs``).
    lr, weight_decay : float
        AdamW; the learning rate warms up linearly over ``warmup_fraction`` of the steps, then
        follows a cosine to 0.
    grad_clip : float
        Gradient norm clipping (0 disables).
    precision : str
        Lightning precision: ``32-true``, ``16-mixed``, ``bf16-mixed``, or ``auto`` (bf16-mixed on
        a GPU that supports it, else 32-true: float32 on every CPU). bf16 or fp16 for a CPU run
        is refused on a CPU that would emulate it (about 10x slower; see
        :mod:`warmstart.pretrain.precision`).
    accelerator, devices, strategy, num_nodes
        Passed to Lightning (``auto``; several devices use DDP).
    threads : int, optional
        Torch's intra-op threads for a CPU run; default the usable physical cores (affinity mask
        and container quota respected, see :func:`warmstart.base.cores.usable_cores`).
    num_workers : int
        DataLoader workers per device for corpora read from disk (a corpus held in memory is
        served without worker processes). Each worker computes with one thread.
    in_memory : str or bool
        ``auto``, true or false (see CorpusBatches).
    seed : int
    deterministic : bool
        Deterministic algorithms: two runs give identical losses.
    checkpoint_every : int
        Steps between checkpoints (plus one at the end).
    collapse_threshold : float
        Warn when ``std(normalized embeddings) * sqrt(D)`` falls below this (1 for embeddings
        spread over the sphere, 0 when all are equal).
    source_weights : dict
        Source name -> share of every epoch.
    standardize : bool
        Feed the encoder ``(normalized - mean) / std`` with the corpus's mean and std (after the
        views are drawn). The export records the two numbers, and ``prepare`` applies them to new
        data, so downstream inputs match what the encoder saw.
    channels_last : bool
        Train in channels-last memory layout (1.2-1.5x faster steps for the U-Net encoder on a CPU,
        no change for the narrow ResNet; the same results up to float rounding; see
        :mod:`warmstart.encoders.memory`).
    probe : str, optional
        A labelled probe set (``.npz`` with ``patches`` and integer ``labels``); its leave-one-out
        kNN accuracy on the encoder's embeddings is logged after every epoch (``knn`` in history).
    """

    encoder: str = "resnet_narrow"
    encoder_params: dict[str, Any] = field(default_factory=dict)
    method: str = "simclr"
    method_params: dict[str, Any] = field(default_factory=dict)
    view1: ViewSettings = field(default_factory=ViewSettings)
    view2: ViewSettings | None = None
    batch_size: int = 128
    epochs: int = 10
    max_steps: int | None = None
    lr: float = 1e-3
    weight_decay: float = 1e-4
    warmup_fraction: float = 0.05
    grad_clip: float = 1.0
    precision: str = "auto"
    accelerator: str = "auto"
    devices: str = "auto"
    strategy: str = "auto"
    num_nodes: int = 1
    threads: int | None = None
    num_workers: int = 2
    in_memory: bool | str = "auto"
    seed: int = 0
    deterministic: bool = False
    checkpoint_every: int = 500
    collapse_threshold: float = 0.1
    source_weights: dict[str, Any] = field(default_factory=dict)
    probe: str | None = None
    standardize: bool = True
    channels_last: bool = True

    def __post_init__(self) -> None:
        require_positive(self, "pretrain", "batch_size", "epochs", "checkpoint_every", "num_nodes", "max_steps",
                         "threads")
        if not self.lr > 0 or self.weight_decay < 0 or not 0 <= self.warmup_fraction < 1:
            raise RecipeError("pretrain.lr must be > 0, weight_decay >= 0 and 0 <= warmup_fraction < 1")
        if self.precision not in ("auto", "32-true", "32", "16-mixed", "bf16-mixed"):
            raise RecipeError(f"pretrain.precision {self.precision!r}: expected auto, 32-true, 16-mixed or bf16-mixed")
        if self.num_workers < 0:
            raise RecipeError("pretrain.num_workers must be >= 0")
        if self.in_memory not in ("auto", True, False):
            raise RecipeError(f"pretrain.in_memory must be true, false or \"auto\", got {self.in_memory!r}")

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "pretrain") -> "PretrainSettings":
        return settings_from_dict(cls, d, where)


def encoder_option(value: str) -> tuple[str, dict[str, Any]]:
    """``--encoder`` in words: a registry name, or ``PLANS.json:CONFIGURATION`` for the nnU-Net
    network of one configuration of a plans file.

    Examples
    --------
    >>> encoder_option("unet")
    ('unet', {})
    >>> encoder_option("nnUNetPlans.json:3d_fullres")
    ('nnunet', {'plans': 'nnUNetPlans.json', 'configuration': '3d_fullres'})
    """
    plans, sep, configuration = value.rpartition(":")
    if sep and plans.lower().endswith(".json"):
        if not configuration:
            raise RecipeError(f"--encoder {value}: name the plans' configuration after the colon, e.g. {plans}:3d_fullres")
        return "nnunet", {"plans": plans, "configuration": configuration}
    return value, {}
