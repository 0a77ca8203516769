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
        Training-set sizes in tiles or cubes; nested (the 4 include the 1, the 16 the 4). A tile
        is a square labelled crop of one slice of a labelled volume; a cube, a labelled
        sub-volume (``cube_size``).
    training_set : {"auto", "tiles", "cubes"}
        What a training set is made of. ``auto``: cubes when any contender is 3-D, else tiles.
        With cubes, test and validation are slabs of whole slices (:mod:`.cubes`), 3-D
        contenders train on 3-D patches of the cubes, and 2-D contenders on the cubes' slices.
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
        Peak learning rate and weight decay.
    optimizer : {"adamw", "sgd"}
        AdamW, or SGD with Nesterov momentum ``momentum`` (the common practice for nnU-Net's
        networks, momentum 0.99).
    momentum : float
        SGD's momentum.
    schedule : {"cosine", "poly", "constant"}
        Learning rate after the warm-up: cosine decay to 0, polynomial decay ``(1 - t)**0.9`` as
        nnU-Net uses, or constant.
    warmup_steps : int
        Linear warm-up from ``lr / warmup_steps`` to ``lr`` over the first steps (0: none).
    encoder_lr_factor : float
        The encoder's learning rate is ``lr * encoder_lr_factor`` (every contender alike).
    warm_encoder_lr_factor : float
        Warm starts only: their encoder's learning rate is multiplied by this as well (the one
        setting in which a warm start may differ from random init; the report's settings say it).
    class_aware_fraction : float
        Fraction of each step's patches centred on a voxel of a labelled class (:mod:`.feeds`);
        0: every patch placed uniformly.
    plateau_epochs, plateau_margin : int, float
        Convergence rule: a run converged when its best validation Dice of the last
        ``plateau_epochs`` epochs is no more than ``plateau_margin`` above its best before them
        (the run keeps its full budget; ``epochs`` is the cap). Runs that did not are flagged.
    learned_dice : float
        A class counts as learned by a run when its test Dice reaches this; runs that missed a
        class are flagged in the report.
    inflate : {"mean", "center"}, optional
        With a cubes training set: every 2-D file also enters as a 3-D contender, its kernels
        inflated into the 3-D version of its network (:mod:`warmstart.export.inflate`), paired
        with random init of that 3-D network.
    freeze_encoder_epochs : int
        Keep the encoder fixed for the first N epochs (every contender alike).
    val_slices, test_slices : int
        Whole slices in the fixed validation and test sets (tiles).
    cube_size : int
        Side of the training cubes (voxels; clipped to the volume).
    cube_patch_size, cube_batch_size : int
        3-D contenders: side of the random 3-D patches drawn from the cubes (voxels; at most
        the cube's side; also the sliding window's side), and patches per step. 2-D
        contenders keep ``patch_size`` and ``batch_size``.
    test_regions, val_regions, region_slices : int
        Cubes: the test and validation slabs, and their thickness in slices.
    window_overlap : float
        3-D inference: sliding windows share this fraction of their side with each neighbour;
        overlapping logits are blended with a Gaussian weight (:mod:`.window`).
    gap_slices : int
        Training tiles (cubes) keep at least this many slices away from validation and test
        slices (slabs): neighbouring slices of a volume are nearly the same image.
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
    training_set: str = "auto"
    replicates: int = 5
    tile_size: int = 256
    patch_size: int = 128
    epochs: int = 20
    steps_per_epoch: int = 10
    batch_size: int = 8
    lr: float = 1e-3
    weight_decay: float = 1e-4
    optimizer: str = "adamw"
    momentum: float = 0.99
    schedule: str = "cosine"
    warmup_steps: int = 0
    encoder_lr_factor: float = 1.0
    warm_encoder_lr_factor: float = 1.0
    freeze_encoder_epochs: int = 0
    class_aware_fraction: float = 0.33
    plateau_epochs: int = 3
    plateau_margin: float = 0.01
    learned_dice: float = 0.1
    inflate: str | None = None
    val_slices: int = 4
    test_slices: int = 8
    gap_slices: int = 2
    cube_size: int = 48
    cube_patch_size: int = 32
    cube_batch_size: int = 2
    test_regions: int = 3
    val_regions: int = 1
    region_slices: int = 16
    window_overlap: float = 0.5
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
                         "test_slices", "val_slices", "early_steps", "cube_size", "cube_patch_size",
                         "cube_batch_size", "test_regions", "val_regions", "region_slices")
        if self.patch_size > self.tile_size:
            raise RecipeError(f"bench.patch_size {self.patch_size} is larger than bench.tile_size {self.tile_size}")
        if not self.lr > 0 or self.encoder_lr_factor < 0 or self.gap_slices < 0 or self.freeze_encoder_epochs < 0:
            raise RecipeError("bench.lr must be > 0; encoder_lr_factor, gap_slices and freeze_encoder_epochs >= 0")
        if self.cube_patch_size > self.cube_size:
            raise RecipeError(f"bench.cube_patch_size {self.cube_patch_size} is larger than bench.cube_size {self.cube_size}")
        if self.training_set not in ("auto", "tiles", "cubes"):
            raise RecipeError(f"bench.training_set must be auto, tiles or cubes, got {self.training_set!r}")
        if not 0 <= self.window_overlap < 1:
            raise RecipeError(f"bench.window_overlap must be in [0, 1), got {self.window_overlap}")
        if not 0 < self.dice_threshold <= 1:
            raise RecipeError(f"bench.dice_threshold must be in (0, 1], got {self.dice_threshold}")
        if self.optimizer not in ("adamw", "sgd"):
            raise RecipeError(f"bench.optimizer must be adamw or sgd, got {self.optimizer!r}")
        if self.schedule not in ("cosine", "poly", "constant"):
            raise RecipeError(f"bench.schedule must be cosine, poly or constant, got {self.schedule!r}")
        if self.warmup_steps < 0 or self.warm_encoder_lr_factor < 0 or not 0 <= self.momentum < 1:
            raise RecipeError("bench.warmup_steps and warm_encoder_lr_factor must be >= 0, momentum in [0, 1)")
        if not 0 <= self.class_aware_fraction <= 1:
            raise RecipeError(f"bench.class_aware_fraction must be in [0, 1], got {self.class_aware_fraction}")
        if self.plateau_epochs < 1 or self.plateau_margin < 0 or not 0 < self.learned_dice <= 1:
            raise RecipeError("bench.plateau_epochs must be >= 1, plateau_margin >= 0, learned_dice in (0, 1]")
        if self.inflate not in (None, "mean", "center"):
            raise RecipeError(f"bench.inflate must be mean or center (or left out), got {self.inflate!r}")
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
