"""The pretraining loop, on PyTorch Lightning: CPU, one GPU with mixed precision, or DDP.

The run folder is described in :mod:`warmstart.run_folder`. The two views of step ``s`` on rank
``r`` come from a generator seeded with (seed, s, r) and the data position is part of the step
count, so a resumed run sees exactly the batches and views the uninterrupted run would have seen.
"""
from __future__ import annotations

import dataclasses
import math
import os
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytorch_lightning as pl
import torch

from .. import __version__
from ..base.atomic import write_json
from ..base.cores import usable_cores
from ..base.lock import locks_output
from ..errors import PretrainError
from ..encoders import build_encoder
from ..encoders.memory import module_channels_last, to_channels_last
from ..run_folder import CHECKPOINTS, CORPUS_MANIFEST, HISTORY, LIBRARY_LOGS, RECIPE, SUMMARY, write_networks
from .augment import apply_view, draw_params
from .data import CorpusBatches
from .history import HistoryLogger, read_history
from .methods import Views, build_method
from .precision import resolve_precision, runs_on_cpu
from .monitors import alignment, embedding_spread, knn_accuracy, load_probe, uniformity
from .progress import training_progress
from .settings import PretrainSettings

__all__ = ["pretrain", "PretrainResult", "PretrainModule"]


def _step_seed(seed: int, step: int, rank: int) -> int:
    return int(np.random.SeedSequence([seed, step, rank]).generate_state(1, dtype=np.uint64)[0] % (2**63))


class PretrainModule(pl.LightningModule):
    """A method around an encoder, trained on two batched views of each corpus batch."""

    def __init__(self, settings: dict[str, Any], in_channels: int, total_steps: int,
                 standardization: tuple[float, float] = (0.0, 1.0)) -> None:
        super().__init__()
        self.save_hyperparameters()
        s = PretrainSettings.from_dict(settings)
        self.s = s
        enc = build_encoder(s.encoder, **{"in_channels": in_channels, **s.encoder_params})
        self.method = build_method(s.method, enc, **s.method_params)
        if s.channels_last:
            module_channels_last(self.method)
        self.view1 = s.view1
        self.view2 = s.view2 if s.view2 is not None else s.view1
        self.total_steps = int(total_steps)
        # The encoder sees (normalized - mean) / std; the export records (mean, std).
        self.standardization = (float(standardization[0]), float(standardization[1]))
        self.spreads: list[float] = []
        self.probe = load_probe(s.probe) if s.probe else None
        self.knn_history: list[float] = []

    def training_step(self, batch: torch.Tensor, batch_idx: int) -> torch.Tensor:
        step = int(self.global_step)
        g = torch.Generator(device=batch.device)
        g.manual_seed(_step_seed(self.s.seed, step, self.global_rank))
        b, size, dims = batch.shape[0], batch.shape[-1], batch.dim() - 2  # (B, C, P, P) or (B, 1, P, P, P)
        # Views in float32 whatever the training precision: cheap next to the model, and exact.
        with torch.autocast(device_type=batch.device.type, enabled=False):
            p1 = draw_params(b, size, self.view1, g, batch.device, dims)
            x1 = apply_view(batch.float(), p1, g)
            p2 = draw_params(b, size, self.view2, g, batch.device, dims)
            x2 = apply_view(batch.float(), p2, g)
            x1, x2 = self.standardized(x1), self.standardized(x2)
            original = self.standardized(batch.float())
            if self.s.channels_last:
                x1, x2, original = to_channels_last(x1), to_channels_last(x2), to_channels_last(original)
        loss, out = self.method.loss(x1, x2, Views(original, p1, p2, g))
        if not bool(torch.isfinite(loss)):
            raise PretrainError(
                f"loss is {float(loss)} at step {step}: training stopped; the last good checkpoint is kept "
                "(lower pretrain.lr, raise grad_clip, or check the corpus for extreme values)"
            )
        spread = embedding_spread(out["embedding"])
        self.spreads.append(spread)
        self.log_dict({"loss": loss.detach(), "spread": spread, "alignment": alignment(out["embedding"], out["embedding2"]),
                       "uniformity": uniformity(out["embedding"]),
                       "lr": self.trainer.optimizers[0].param_groups[0]["lr"]},
                      on_step=True, on_epoch=False, prog_bar=False, batch_size=b)
        self.log("loss_bar", loss.detach(), prog_bar=True, logger=False, batch_size=b)
        return loss

    def standardized(self, x: torch.Tensor) -> torch.Tensor:
        mean, std = self.standardization
        return (x - mean) / std if (mean, std) != (0.0, 1.0) else x

    def on_save_checkpoint(self, checkpoint: dict[str, Any]) -> None:
        checkpoint["method_state"] = self.method.extra_state()

    def on_load_checkpoint(self, checkpoint: dict[str, Any]) -> None:
        self.method.load_extra_state(checkpoint.get("method_state", {}))

    def optimizer_step(self, *args: Any, **kwargs: Any) -> None:
        super().optimizer_step(*args, **kwargs)
        # Momentum updates here, not in on_train_batch_end: Lightning runs the checkpoint
        # callback's batch-end hook first, so a checkpoint would miss this step's update.
        self.method.after_step(int(self.global_step), self.total_steps)

    def on_train_end(self) -> None:
        """Every rank reports a checksum of its weights: DDP keeps them identical, and a run that
        drifted apart (a broken reduction, a rank-dependent branch) is caught here."""
        total = torch.stack([p.detach().double().sum() for p in self.method.encoder.parameters()]).sum()
        gathered = self.all_gather(total)
        self.rank_checksums = [float(x) for x in gathered.reshape(-1)]
        if len(set(self.rank_checksums)) > 1:
            warnings.warn(f"ranks ended with different weights (checksums {self.rank_checksums})", stacklevel=2)

    def on_train_epoch_end(self) -> None:
        if self.probe is not None:
            x, y = self.probe
            was = self.method.encoder.training
            self.method.encoder.eval()
            with torch.no_grad():
                emb = torch.cat([self.method.embed(self.standardized(x[i:i + 256].to(self.device))).cpu() for i in range(0, len(x), 256)])
            self.method.encoder.train(was)
            acc = knn_accuracy(emb, y)
            self.knn_history.append(acc)
            self.log("knn", acc, on_step=False, on_epoch=True, prog_bar=True)
        if self.spreads and self.method.learns_embedding and float(np.mean(self.spreads)) < self.s.collapse_threshold:
            warnings.warn(
                f"representation collapse: embedding spread {np.mean(self.spreads):.3f} (std of normalized "
                f"embeddings x sqrt(D)) is below {self.s.collapse_threshold} in epoch {self.current_epoch}; "
                "the encoder maps different patches to nearly the same embedding", stacklevel=2)
        self.spreads = []

    def configure_optimizers(self) -> Any:
        params = [p for p in self.parameters() if p.requires_grad]
        opt = torch.optim.AdamW(params, lr=self.s.lr, weight_decay=self.s.weight_decay)
        warm = max(1, int(self.s.warmup_fraction * self.total_steps))

        def factor(step: int) -> float:  # linear warm-up, then cosine to 0
            if step < warm:
                return (step + 1) / warm
            t = min(1.0, (step - warm) / max(1, self.total_steps - warm))
            return 0.5 * (1 + math.cos(math.pi * t))

        sched = torch.optim.lr_scheduler.LambdaLR(opt, factor)
        return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "interval": "step"}}


class _EpochPosition(pl.Callback):
    """Tell the dataset its epoch and, after a resume, how many of the epoch's batches are done."""

    def __init__(self, ds: CorpusBatches, steps_per_epoch: int) -> None:
        self.ds, self.steps_per_epoch = ds, steps_per_epoch

    def on_train_epoch_start(self, trainer: pl.Trainer, module: pl.LightningModule) -> None:
        self.ds.set_epoch(trainer.current_epoch)
        self.ds.start_batch = max(0, trainer.global_step - trainer.current_epoch * self.steps_per_epoch)


@dataclass
class PretrainResult:
    """What a run produced: the run folder, steps done, final loss, and the summary dict."""

    path: Path
    steps: int
    final_loss: float | None
    summary: dict[str, Any] = field(default_factory=dict)


def _first_process() -> bool:
    """The process that writes the run folder's own files (the others of a distributed run do not)."""
    return os.environ.get("LOCAL_RANK", "0") == "0" and os.environ.get("NODE_RANK", "0") == "0"


@locks_output("pretrain", when=_first_process)
def pretrain(corpus: str | os.PathLike[str], out: str | os.PathLike[str], settings: PretrainSettings | None = None, *,
             resume: bool = False, progress: bool = True) -> PretrainResult:
    """Pretrain an encoder on a corpus store.

    Parameters
    ----------
    corpus : path
        A finished corpus store.
    out : path
        Run folder (created). With ``resume``, continues from its ``checkpoints/last.ckpt``.
    settings : PretrainSettings, optional
    resume : bool
    progress : bool

    Returns
    -------
    PretrainResult

    Raises
    ------
    PretrainError
        Non-finite loss (the last good checkpoint is kept), or nothing to resume.
    """
    from pytorch_lightning.callbacks import ModelCheckpoint

    from ..corpus.store import open_corpus

    s = settings or PretrainSettings()
    out = Path(out)
    ckpt_dir = out / CHECKPOINTS
    last = ckpt_dir / "last.ckpt"
    if resume and not last.exists():
        raise PretrainError(f"{out}: nothing to resume (no checkpoints/last.ckpt)")
    if not resume and last.exists():
        raise PretrainError(f"{out}: holds a run already; pass --resume to continue it or choose a new folder")
    precision = resolve_precision(s.precision, s.accelerator)  # refused before anything is written
    if runs_on_cpu(s.accelerator):  # the process's intra-op threads: one per usable physical core
        torch.set_num_threads(s.threads or usable_cores())
    out.mkdir(parents=True, exist_ok=True)
    first_process = _first_process()
    store = open_corpus(corpus)
    s = _for_spatial_dims(_resolved_encoder(s), store.spatial_dims, corpus)
    names = {e["name"]: e["position"] for e in store.manifest["sources"]}
    unknown = sorted(set(s.source_weights) - set(names))
    if unknown:
        raise PretrainError(f"pretrain.source_weights names {unknown[0]!r}, which is not a source of {corpus}")
    weights = {names[k]: float(v) for k, v in s.source_weights.items()} or None
    pl.seed_everything(s.seed, workers=True, verbose=False)
    ds = CorpusBatches(corpus, s.batch_size, seed=s.seed, in_memory=s.in_memory,
                       source_weights=weights, num_workers=s.num_workers)
    # A corpus held in memory needs no loader processes: they would only take cores from the model
    # (measured: 0.80 -> 0.89 of the bare model step's throughput on 2 cores).
    ds.num_workers = 0 if ds.in_memory else s.num_workers
    ckpt = ModelCheckpoint(dirpath=ckpt_dir, filename="step-{step}", every_n_train_steps=s.checkpoint_every,
                           monitor="step", mode="max", save_top_k=3, save_last=True, auto_insert_metric_name=False)
    position = _EpochPosition(ds, 0)
    trainer = pl.Trainer(
        max_steps=-1, accelerator=s.accelerator, devices=s.devices, strategy=s.strategy,
        num_nodes=s.num_nodes, precision=precision, gradient_clip_val=s.grad_clip or None,
        deterministic=s.deterministic, logger=_loggers(out, resume),
        callbacks=[ckpt, position, *training_progress(progress)], enable_progress_bar=progress,
        enable_model_summary=False, log_every_n_steps=1, default_root_dir=out / LIBRARY_LOGS,
        use_distributed_sampler=False,
    )
    # The epoch length depends on the number of ranks, which the trainer knows before any
    # process group exists; the step limits are set once it is known.
    ds._world = trainer.world_size
    steps_per_epoch = len(ds)
    if steps_per_epoch < 1:
        # A tiny corpus (a CI smoke test, a first try) trains with the largest batch it fills.
        n = len(ds.source_of)
        fits = n // (trainer.world_size * max(1, ds.num_workers))
        if fits < 2:
            raise PretrainError(f"{corpus}: {n} patches are too few to pretrain on (a batch needs at least 2 per rank "
                                "and loader worker); sample more patches when building the corpus")
        warnings.warn(f"{corpus}: {n} patches make no batch of {s.batch_size} per rank; training with batches of "
                      f"{fits} instead (recorded in the run's recipe.json)", stacklevel=3)  # past the output-lock wrapper, to the caller
        s = dataclasses.replace(s, batch_size=fits)
        ds.batch_size = fits
        steps_per_epoch = len(ds)
    total = s.max_steps if s.max_steps is not None else s.epochs * steps_per_epoch
    trainer.fit_loop.epoch_loop.max_steps = total
    trainer.fit_loop.max_epochs = math.ceil(total / steps_per_epoch)
    position.steps_per_epoch = steps_per_epoch
    channels = int(store.patches.shape[1])
    try:
        module = PretrainModule(s.to_dict(), channels, total, _standardization(store.manifest, s))
    except ValueError as err:  # the encoder's or the method's constructor refused its parameters
        raise PretrainError(f"encoder {s.encoder!r} with method {s.method!r}: {err}") from err
    if first_process:  # one writer under DDP
        write_json(out / RECIPE, {"pretrain": s.to_dict(), "corpus": str(store.path)})
        # The corpus manifest travels with the run, so an export works after the corpus has moved.
        write_json(out / CORPUS_MANIFEST, store.manifest)
        # Which checkpoint entries are the encoder copies and the decoder: the export reads this
        # instead of rebuilding the method.
        write_networks(out, module.method.trained_networks("method."))
    if resume:
        # Lightning makes the data iterator of the resumed epoch before any epoch hook runs, so
        # the dataset learns its position from the checkpoint here.
        done = int(torch.load(last, map_location="cpu", weights_only=True)["global_step"])
        ds.set_epoch(done // steps_per_epoch)
        ds.start_batch = done % steps_per_epoch
    loader = torch.utils.data.DataLoader(ds, batch_size=None, num_workers=ds.num_workers,
                                         persistent_workers=False, pin_memory=torch.cuda.is_available())
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*does not have many workers.*")
        warnings.filterwarnings("ignore", message=".*IterableDataset.*")
        warnings.filterwarnings("ignore", message=".*Experiment logs directory.*")
        warnings.filterwarnings("ignore", message=".*Checkpoint directory .* exists and is not empty.*")
        warnings.filterwarnings("ignore", message=".*resuming from a checkpoint that ended before the epoch ended.*")
        warnings.filterwarnings("ignore", message=".*isinstance\\(treespec, LeafSpec\\).*")  # Lightning vs new torch
        trainer.fit(module, loader, ckpt_path=str(last) if resume else None)
    seconds = time.perf_counter() - t0
    # The end state, whatever the step count (all ranks call, rank 0 writes); the full state, so the
    # run can be resumed with more steps.
    trainer.save_checkpoint(last, weights_only=False)
    history = read_history(out / HISTORY)
    summary = {
        "warmstart_version": __version__, "torch_version": torch.__version__, "lightning_version": pl.__version__,
        "method": s.method, "encoder": module.method.encoder.spec.to_dict(), "steps": int(trainer.global_step),
        "epochs": int(trainer.current_epoch), "final_loss": history[-1]["loss"] if history else None,
        "final_spread": history[-1]["spread"] if history else None, "seconds": round(seconds, 1),
        "corpus": str(store.path), "patches": len(store), "resumed": resume,
        "rank_checksums": getattr(module, "rank_checksums", None),
        "knn_per_epoch": module.knn_history or None,
    }
    if trainer.is_global_zero:
        write_json(out / SUMMARY, summary)
    return PretrainResult(out, int(trainer.global_step), summary["final_loss"], summary)


def _resolved_encoder(s: PretrainSettings) -> PretrainSettings:
    """An nnU-Net encoder given as a plans file and a configuration, resolved into that
    configuration's architecture entry: the run's recipe.json then rebuilds the network (on resume
    and in every DDP process) without the plans file."""
    params = dict(s.encoder_params)
    if s.encoder != "nnunet" or "plans" not in params:
        return s
    from ..encoders.nnunet import architecture_from_plans

    try:
        arch = architecture_from_plans(params.pop("plans"), str(params.get("configuration")))
    except ValueError as err:
        raise PretrainError(str(err)) from err
    return dataclasses.replace(s, encoder_params={**params, "architecture": arch})


def _for_spatial_dims(s: PretrainSettings, dims: int, corpus: Any) -> PretrainSettings:
    """The settings with the encoder built for the corpus's spatial dims (recorded in the run's
    recipe.json), or a clear refusal of an encoder that has no 3-D form (every built-in method
    works in 3-D)."""
    import inspect

    from ..encoders.registry import ENCODERS

    stated = s.encoder_params.get("spatial_dims")
    if dims == 2:
        if stated not in (None, 2):
            raise PretrainError(f"{corpus}: a corpus of 2-D patches, but pretrain.encoder_params sets spatial_dims = {stated}")
        if s.encoder == "nnunet":  # its dims come from the plans: let the encoder refuse a 3-D configuration
            return dataclasses.replace(s, encoder_params={**s.encoder_params, "spatial_dims": 2})
        return s
    if s.encoder in ENCODERS and "spatial_dims" not in inspect.signature(ENCODERS[s.encoder]).parameters:
        raise PretrainError(f"{corpus}: a corpus of 3-D cubes, and encoder {s.encoder!r} is 2-D only; "
                            "use pretrain.encoder = \"unet\" for 3-D")
    if stated not in (None, 3):
        raise PretrainError(f"{corpus}: a corpus of 3-D cubes, but pretrain.encoder_params sets spatial_dims = {stated}")
    return dataclasses.replace(s, encoder_params={**s.encoder_params, "spatial_dims": 3})


def _standardization(manifest: dict[str, Any], s: PretrainSettings) -> tuple[float, float]:
    """(mean, std) of the corpus's stored values, or (0, 1) when ``standardize`` is off."""
    stats = manifest.get("statistics", {})
    if not s.standardize or not stats.get("std"):
        return (0.0, 1.0)
    return (float(stats["mean"]), float(stats["std"]))


def _loggers(out: Path, resume: bool) -> list[Any]:
    """history.csv always; TensorBoard's files under lightning/tensorboard when it is installed."""
    loggers: list[Any] = [HistoryLogger(out / HISTORY, resume=resume, save_dir=out / LIBRARY_LOGS)]
    try:
        import tensorboard  # noqa: F401
    except ImportError:
        return loggers
    from pytorch_lightning.loggers import TensorBoardLogger

    loggers.append(TensorBoardLogger(out / LIBRARY_LOGS, name="tensorboard", version=""))
    return loggers
