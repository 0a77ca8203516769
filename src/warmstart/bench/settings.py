"""Settings of the few-shot benchmark (the ``[bench]`` table of a recipe; no torch)."""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Mapping

from ..base.settings import renamed_keys, require_positive, settings_from_dict
from ..errors import RecipeError

__all__ = ["BenchSettings"]

# Old key -> new key, read for one release (README changelog).
_RENAMED = {"seeds": "replicates", "frame_size": "tile_size"}


@dataclass
class BenchSettings:
    """How contenders are fine-tuned and compared.

    Parameters
    ----------
    sizes : list of int
        Training-set sizes in tiles; nested (the 4 tiles include the 1, the 16 the 4). A tile is
        a square labelled crop of one slice of a labelled volume.
    replicates : int
        Fine-tuning runs per (contender, size) (formerly ``seeds``). Replicate ``r`` draws the same
        patches and the same decoder initialization for every contender.
    tile_size : int
        Side of the square training tiles (pixels; clipped to the image; formerly ``frame_size``).
    patch_size : int
        Side of the random patches drawn from the tiles (pixels; at most the tile's side).
    epochs, steps_per_epoch, batch_size : int
        Fine-tuning length: ``epochs * steps_per_epoch`` optimizer steps of ``batch_size`` patches.
    lr, weight_decay : float
        AdamW, cosine schedule to 0.
    encoder_lr_factor : float
        The encoder's learning rate is ``lr * encoder_lr_factor``.
    freeze_encoder_epochs : int
        Keep the encoder fixed for the first N epochs (every contender alike).
    val_slices, test_slices : int
        Whole slices in the fixed validation and test sets.
    gap_slices : int
        Training tiles keep at least this many slices away from validation and test slices
        (neighbouring slices of a volume are nearly the same image).
    split_seed : int
        Seed of the split (recorded in the report).
    dice_threshold : float
        "Epochs to reach" this validation Dice (also reported for 95 % of random init's best).
    early_steps : int
        Validation Dice after this many steps: the early-convergence figure.
    ignore_label : int, optional
        Label value excluded from loss and metrics.
    random_encoder, random_encoder_params
        Architecture of random initialization when no encoder file is given (otherwise random
        init uses each file's architecture, so the comparison differs only in the weights).
    decoder_norm : str
    device : str
        ``auto`` (a GPU when there is one), ``cpu`` or ``cuda``.
    threads : int, optional
        CPU threads torch uses for each fine-tuning run (default: the usable physical cores,
        :func:`warmstart.base.cores.usable_cores`). Not to be
        confused with ``corpus.workers`` (processes that build a corpus) or
        ``pretrain.num_workers`` (data-loader processes that feed pretraining).
    channels_last : bool
        Fine-tune in channels-last memory layout (faster on a CPU, the same results up to float
        rounding), every contender alike.
    """

    sizes: list[int] = field(default_factory=lambda: [1, 4, 16])
    replicates: int = 5
    tile_size: int = 256
    patch_size: int = 128
    epochs: int = 20
    steps_per_epoch: int = 10
    batch_size: int = 8
    lr: float = 1e-3
    weight_decay: float = 1e-4
    encoder_lr_factor: float = 1.0
    freeze_encoder_epochs: int = 0
    val_slices: int = 4
    test_slices: int = 8
    gap_slices: int = 2
    split_seed: int = 0
    dice_threshold: float = 0.8
    early_steps: int = 10
    ignore_label: int | None = None
    random_encoder: str = "unet"
    random_encoder_params: dict[str, Any] = field(default_factory=dict)
    decoder_norm: str = "batch"
    device: str = "auto"
    threads: int | None = None
    channels_last: bool = True

    def __post_init__(self) -> None:
        if not self.sizes or any(int(n) < 1 for n in self.sizes):
            raise RecipeError(f"bench.sizes must be a non-empty list of positive tile counts, got {self.sizes}")
        self.sizes = sorted({int(n) for n in self.sizes})
        require_positive(self, "bench", "replicates", "tile_size", "patch_size", "epochs", "steps_per_epoch", "batch_size",
                         "test_slices", "val_slices", "early_steps")
        if self.patch_size > self.tile_size:
            raise RecipeError(f"bench.patch_size {self.patch_size} is larger than bench.tile_size {self.tile_size}")
        if not self.lr > 0 or self.encoder_lr_factor < 0 or self.gap_slices < 0 or self.freeze_encoder_epochs < 0:
            raise RecipeError("bench.lr must be > 0; encoder_lr_factor, gap_slices and freeze_encoder_epochs >= 0")
        if not 0 < self.dice_threshold <= 1:
            raise RecipeError(f"bench.dice_threshold must be in (0, 1], got {self.dice_threshold}")
        if self.device not in ("auto", "cpu", "cuda"):
            raise RecipeError(f"bench.device must be auto, cpu or cuda, got {self.device!r}")

    @property
    def total_steps(self) -> int:
        return self.epochs * self.steps_per_epoch

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "bench") -> "BenchSettings":
        return settings_from_dict(cls, renamed_keys(d, _RENAMED, where), where)
