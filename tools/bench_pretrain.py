#!/usr/bin/env python3
"""Pretraining-throughput benchmark: image pairs per second for one encoder, batch and patch size.

(a) bare model step: SimCLR loss, backward and AdamW step on two random views already in memory;
(b) our pipeline: batches read from a corpus store by whole chunks (CorpusBatches), two batched
    views drawn on the tensors (augment.apply_view), then the same step;
(c) reference: per-sample view transforms in DataLoader workers, as general SSL libraries do
    it (lightly's SimCLRTransform on PIL images, grayscale), then the same step.

Also prints the end-to-end figure of ``warmstart.pretrain.loop.pretrain`` (Lightning included).

With ``--layouts``: only the bare step, in the default and in the channels-last memory layout
(what pretraining and the benchmark use), interleaved, and the speed-up.

Usage: python tools/bench_pretrain.py [--patch 64] [--batch 128] [--steps 12] [--rounds 5] [--encoder resnet_narrow]
                                      [--layouts]
"""
from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import torch


def make_corpus(root: Path, patch: int) -> Path:
    """A small corpus of the demo's ceramic filter scans (generated, then built)."""
    from warmstart.corpus.build import build_corpus
    from warmstart.demo.scenario import write_archive
    from warmstart.recipe import load_recipe

    write_archive(root / "archive", n_per_scanner=2, shape=(64, 160, 160))
    s = load_recipe(None, [f"sampling.patch_size={patch}", "sampling.axes=ZYX", "sampling.slice_stride=2",
                           "sampling.stride=32", "sampling.max_per_source=100000"]).corpus
    return build_corpus(root / "archive", root / "corpus.zarr", s, report=False, progress=False).path


def model_and_opt(encoder: str, channels: int, channels_last: bool = False):
    from warmstart.encoders import build_encoder
    from warmstart.encoders.memory import module_channels_last
    from warmstart.pretrain.methods import build_method

    torch.manual_seed(0)
    method = build_method("simclr", build_encoder(encoder, in_channels=channels))
    if channels_last:
        module_channels_last(method)
    opt = torch.optim.AdamW([p for p in method.parameters() if p.requires_grad], lr=1e-3)
    return method, opt


def step(method, opt, v1: torch.Tensor, v2: torch.Tensor) -> float:
    loss, _ = method.loss(v1, v2)
    opt.zero_grad(set_to_none=True)
    loss.backward()
    opt.step()
    return float(loss.detach())


def timed(it, method, opt, steps: int, warmup: int = 2) -> float:
    """Pairs per second over ``steps`` steps after ``warmup`` (the iterator yields (v1, v2))."""
    for _ in range(warmup):
        step(method, opt, *next(it))
    t0 = time.perf_counter()
    n = 0
    for _ in range(steps):
        v1, v2 = next(it)
        step(method, opt, v1, v2)
        n += len(v1)
    return n / (time.perf_counter() - t0)


def bare(batch: int, patch: int):
    g = torch.Generator().manual_seed(0)
    v1, v2 = torch.rand(batch, 1, patch, patch, generator=g), torch.rand(batch, 1, patch, patch, generator=g)
    while True:
        yield v1, v2


def ours(corpus: Path, batch: int, workers: int):
    from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params
    from warmstart.pretrain.data import CorpusBatches

    ds = CorpusBatches(corpus, batch, seed=0, num_workers=workers)
    # A corpus held in memory needs no loader processes: they would only take cores from the model.
    workers = 0 if ds.in_memory else workers
    ds.num_workers = workers
    loader = torch.utils.data.DataLoader(ds, batch_size=None, num_workers=workers)
    views = ViewSettings()
    g = torch.Generator().manual_seed(0)
    epoch = 0
    while True:
        ds.set_epoch(epoch)
        for x in loader:
            size = x.shape[-1]
            yield (apply_view(x, draw_params(len(x), size, views, g), g), apply_view(x, draw_params(len(x), size, views, g), g))
        epoch += 1


class _PilPatches(torch.utils.data.Dataset):
    """Patches as 8-bit PIL images with a per-sample two-view transform (the general-library way)."""

    def __init__(self, patches: np.ndarray, patch: int) -> None:
        from lightly.transforms import SimCLRTransform

        self.images = np.clip(patches[:, 0] * 255, 0, 255).astype(np.uint8)
        # lightly's SimCLR view transform, grayscale data: no colour jitter, no random grayscale.
        self.transform = SimCLRTransform(input_size=patch, cj_prob=0.0, random_gray_scale=0.0, normalize=None,
                                         vf_prob=0.5, rr_prob=0.5)

    def __len__(self) -> int:
        return len(self.images)

    def __getitem__(self, i: int):
        from PIL import Image

        v1, v2 = self.transform(Image.fromarray(self.images[i]))
        return v1[:1], v2[:1]  # the transform returns 3 identical channels for a grey image


def reference(corpus: Path, batch: int, workers: int, patch: int):
    from warmstart.corpus.store import open_corpus

    ds = _PilPatches(open_corpus(corpus).read(), patch)
    loader = torch.utils.data.DataLoader(ds, batch_size=batch, shuffle=True, num_workers=workers, drop_last=True,
                                         persistent_workers=workers > 0)
    while True:
        for v1, v2 in loader:
            yield v1, v2


def layouts() -> None:
    """Bare step, default vs channels-last layout, interleaved rounds (medians)."""
    import sys

    args = sys.argv
    get = lambda name, d: type(d)(args[args.index(name) + 1]) if name in args else d  # noqa: E731
    batch, patch, steps, rounds = get("--batch", 128), get("--patch", 64), get("--steps", 12), get("--rounds", 5)
    encoder = get("--encoder", "resnet_narrow")
    from warmstart.encoders.memory import to_channels_last

    x = [torch.randn(batch, 1, patch, patch) for _ in range(2)]
    feeds = {"default": iter(lambda: (x[0], x[1]), None),
             "channels_last": iter(lambda: (to_channels_last(x[0]), to_channels_last(x[1])), None)}
    models = {"default": model_and_opt(encoder, 1), "channels_last": model_and_opt(encoder, 1, channels_last=True)}
    runs: dict[str, list[float]] = {k: [] for k in feeds}
    for _ in range(rounds):
        for k in feeds:
            runs[k].append(timed(feeds[k], *models[k], steps))
    fig = {k: float(np.median(v)) for k, v in runs.items()}
    print(f"bare SimCLR step, {encoder}, batch {batch} of {patch} px, {torch.get_num_threads()} threads:")
    for k, v in fig.items():
        print(f"  {k:14s} {v:8.1f} pairs/s (median of {rounds}; {min(runs[k]):.0f}-{max(runs[k]):.0f})")
    print(f"  channels_last / default = {fig['channels_last'] / fig['default']:.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--patch", type=int, default=64)
    ap.add_argument("--batch", type=int, default=128)
    ap.add_argument("--steps", type=int, default=12, help="timed steps per round")
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--encoder", default="resnet_narrow")
    ap.add_argument("--layouts", action="store_true", help="compare memory layouts of the bare step only")
    args = ap.parse_args()
    torch.set_num_threads(torch.get_num_threads())
    if args.layouts:
        layouts()
        return
    root = Path(tempfile.mkdtemp(prefix="warmstart-bench-pre-"))
    try:
        corpus = make_corpus(root, args.patch)
        from warmstart.corpus.store import open_corpus

        print(f"corpus: {len(open_corpus(corpus))} patches of {args.patch} px; encoder {args.encoder}, batch {args.batch}, "
              f"{torch.get_num_threads()} torch threads, {args.workers} loader workers")
        # Interleave the three pipelines over several rounds and take medians: on a shared
        # 2-core machine a single timing drifts by 15 % from one minute to the next.
        pipelines = {"a": ("bare model step", bare(args.batch, args.patch)),
                     "b": ("ours (store + batched views)", ours(corpus, args.batch, args.workers)),
                     "c": ("reference (per-sample PIL views in workers)", reference(corpus, args.batch, args.workers, args.patch))}
        models = {k: model_and_opt(args.encoder, 1) for k in pipelines}
        iters = {k: iter(v[1]) for k, v in pipelines.items()}
        runs: dict[str, list[float]] = {k: [] for k in pipelines}
        for _ in range(args.rounds):
            for k in pipelines:
                runs[k].append(timed(iters[k], *models[k], args.steps))
        figures = {k: float(np.median(v)) for k, v in runs.items()}
        for k, (name, _) in pipelines.items():
            print(f"  {k}: {name:46s} {figures[k]:8.1f} pairs/s (median of {args.rounds}; "
                  f"{min(runs[k]):.0f}-{max(runs[k]):.0f})")
        print(f"  (b)/(a) = {figures['b'] / figures['a']:.2f}   (target >= 0.85)")
        print(f"  (b)/(c) = {figures['b'] / figures['c']:.2f}   (target >= 1.5)")
        from warmstart.pretrain.loop import pretrain
        from warmstart.pretrain.settings import PretrainSettings

        s = PretrainSettings(encoder=args.encoder, batch_size=args.batch, max_steps=args.steps + 5, num_workers=args.workers,
                             precision="32-true", accelerator="cpu", checkpoint_every=10_000)
        t0 = time.perf_counter()
        res = pretrain(corpus, root / "run", s, progress=False)
        wall = time.perf_counter() - t0
        print(f"  end to end (pretrain(), Lightning, incl. start-up): {res.steps * args.batch / wall:8.1f} pairs/s "
              f"over {res.steps} steps in {wall:.1f} s; training alone {res.steps * args.batch / res.summary['seconds']:.1f} pairs/s")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
