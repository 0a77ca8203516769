#!/usr/bin/env python3
"""Pretraining-throughput benchmark: image pairs per second for one encoder, batch and patch size.

(a) bare model step: SimCLR loss, backward and AdamW step on two random views already in memory;
(b) our pipeline: batches read from a corpus store by whole chunks (CorpusBatches), two batched
    views drawn on the tensors (augment.apply_view), then the same step;
(c) reference: per-sample view transforms in DataLoader workers, as general SSL libraries do
    it (lightly's SimCLRTransform on PIL images, grayscale), then the same step.

Also prints the end-to-end figure of ``warmstart.pretrain.loop.pretrain`` (Lightning included).

All three use the channels-last memory layout, as pretraining does. Torch threads are the usable
cores (``warmstart.base.cores.usable_cores``), as in pretraining and the benchmark.

With ``--roof``: achieved GFLOP/s (FLOPs counted by torch.utils.flop_counter) of the 2-D and 3-D
pretraining and fine-tuning steps, default vs channels-last layout, as a fraction of an fp32
2048^2 matmul timed in the same run (before and after); ``--compile`` adds torch.compile of the
2-D pretraining step, its first (compiling) step timed apart.

With ``--threads``: the bare step at 1, all and twice the usable cores, and our pipeline reading
the corpus from disk with 0, 1 and 2 loader workers.

Usage: python tools/bench_pretrain.py [--patch 64] [--batch 128] [--steps 12] [--rounds 5] [--encoder resnet_narrow]
                                      [--encoder-param base_width=16 ...] [--roof [--compile] [--batch3d 32] [--case TEXT]]
                                      [--threads] [--dims 3]

3-D pipeline (cubes of 32, the 3-D U-Net encoder of width 8, depth 4, batch 16):
    python tools/bench_pretrain.py --dims 3 --patch 32 --batch 16 --encoder unet --encoder-param base_width=8 --encoder-param depth=4
"""
from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import torch


def make_corpus(root: Path, patch: int, dims: int = 2) -> Path:
    """A small corpus of the demo's ceramic filter scans (generated, then built); cubes with ``dims`` 3."""
    from warmstart.corpus.build import build_corpus
    from warmstart.demo.scenario import write_archive
    from warmstart.recipe import load_recipe

    write_archive(root / "archive", n_per_scanner=2, shape=(64, 160, 160))
    grid = ["sampling.spatial_dims=3", "sampling.stride=16"] if dims == 3 else \
        ["sampling.axes=ZYX", "sampling.slice_stride=2", "sampling.stride=32"]
    s = load_recipe(None, [f"sampling.patch_size={patch}", *grid, "sampling.max_per_source=100000"]).corpus
    return build_corpus(root / "archive", root / "corpus.zarr", s, report=False, progress=False).path


# The demo's encoder (recipes/demo.toml), also the default of --threads.
DEMO_UNET = {"base_width": 16, "depth": 4}


def model_and_opt(encoder: str, channels: int, channels_last: bool = False, **params):
    from warmstart.encoders import build_encoder
    from warmstart.encoders.memory import module_channels_last
    from warmstart.pretrain.methods import build_method

    torch.manual_seed(0)
    method = build_method("simclr", build_encoder(encoder, in_channels=channels, **params))
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


def bare(batch: int, patch: int, dims: int = 2):
    from warmstart.encoders.memory import to_channels_last

    g = torch.Generator().manual_seed(0)
    v1, v2 = (to_channels_last(torch.rand(batch, 1, *(patch,) * dims, generator=g)) for _ in range(2))
    while True:
        yield v1, v2


def ours(corpus: Path, batch: int, workers: int, in_memory: bool | str = "auto", encoder_layout: bool = False):
    """Batches from the store, two batched views (in channels-last order with ``encoder_layout``)."""
    from warmstart.encoders.memory import to_channels_last
    from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params
    from warmstart.pretrain.data import CorpusBatches

    ds = CorpusBatches(corpus, batch, seed=0, num_workers=workers, in_memory=in_memory)
    layout = to_channels_last if encoder_layout else (lambda t: t)
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
            size, dims = x.shape[-1], x.dim() - 2
            yield (layout(apply_view(x, draw_params(len(x), size, views, g, spatial_dims=dims), g)),
                   layout(apply_view(x, draw_params(len(x), size, views, g, spatial_dims=dims), g)))
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
    from warmstart.encoders.memory import to_channels_last

    while True:
        for v1, v2 in loader:
            yield to_channels_last(v1), to_channels_last(v2)


def matmul_roof(n: int = 2048, reps: int = 8) -> float:
    """GFLOP/s of an n x n float32 matmul (2 n^3 FLOPs), median of ``reps``: the roof of this run."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    a @ b
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        a @ b
        times.append(time.perf_counter() - t0)
    return 2 * n**3 / float(np.median(times)) / 1e9


def roof_cases(batch2d: int, batch3d: int) -> dict[str, tuple]:
    """name -> (make model, make inputs, step kind): the steps pretraining and fine-tuning run."""
    from warmstart.encoders import build_encoder
    from warmstart.pretrain.methods import build_method
    from warmstart.unet import UNet

    def simclr(dims: int, width: int):
        return lambda: build_method("simclr", build_encoder("unet", in_channels=1, base_width=width, depth=4,
                                                            spatial_dims=dims))

    def unet(dims: int, width: int):
        return lambda: UNet("unet", classes=3, in_channels=1, base_width=width, depth=4, spatial_dims=dims)

    def pair(shape):
        return lambda: tuple(torch.randn(shape) for _ in range(2))

    def labelled(shape):
        return lambda: (torch.randn(shape), torch.randint(3, (shape[0], *shape[2:])))

    return {
        f"2-D pretraining: U-Net encoder w16 d4, SimCLR, {batch2d} x 64^2":
            (simclr(2, 16), pair((batch2d, 1, 64, 64)), "pretrain"),
        f"3-D pretraining: U-Net encoder w8 d4, SimCLR, {batch3d} x 32^3":
            (simclr(3, 8), pair((batch3d, 1, 32, 32, 32)), "pretrain"),
        "2-D fine-tuning: U-Net w16 d4, CE + Dice, 8 x 64^2 (the bench's batch)":
            (unet(2, 16), labelled((8, 1, 64, 64)), "finetune"),
        "3-D fine-tuning: U-Net w8 d4, CE + Dice, 2 x 64^3":
            (unet(3, 8), labelled((2, 1, 64, 64, 64)), "finetune"),
    }


def roof_step(kind: str, model, opt, inputs, compiled=None):
    """One forward, backward and AdamW step of a case (``compiled``: the compiled loss function)."""
    from warmstart.bench.train import _loss

    if kind == "pretrain":
        loss = (compiled or (lambda a, b: model.loss(a, b)[0]))(*inputs)
    else:
        x, y = inputs
        loss = _loss((compiled or model)(x), y, 3, None)
    opt.zero_grad(set_to_none=True)
    loss.backward()
    opt.step()


def roof() -> None:
    """Achieved GFLOP/s of each step against the same run's matmul roof, default vs channels-last."""
    import sys

    from torch.utils.flop_counter import FlopCounterMode

    from warmstart.encoders.memory import module_channels_last, to_channels_last

    args = sys.argv
    get = lambda name, d: type(d)(args[args.index(name) + 1]) if name in args else d  # noqa: E731
    steps, rounds = get("--steps", 4), get("--rounds", 3)
    cases = roof_cases(get("--batch", 128), get("--batch3d", 32))
    if "--case" in args:  # only the cases whose name contains this text
        cases = {k: v for k, v in cases.items() if get("--case", "") in k}
    roofs = [matmul_roof()]
    print(f"{torch.get_num_threads()} torch threads; fp32 matmul roof (2048^2) {roofs[0]:.0f} GFLOP/s")
    rows = []
    for name, (make, inputs_of, kind) in cases.items():
        torch.manual_seed(0)
        inputs = inputs_of()
        model = make()
        opt = torch.optim.AdamW(model.parameters(), lr=1e-4)
        with FlopCounterMode(display=False) as fc:
            roof_step(kind, model, opt, inputs)
        flops = fc.get_total_flops()
        layouts = {"default": (model, opt, inputs)}
        cl = module_channels_last(make())
        layouts["channels_last"] = (cl, torch.optim.AdamW(cl.parameters(), lr=1e-4),
                                    tuple(to_channels_last(t) if t.is_floating_point() else t for t in inputs))
        times: dict[str, list[float]] = {k: [] for k in layouts}
        for _ in range(rounds):  # interleaved, medians: a shared machine drifts between minutes
            for k, (m, o, x) in layouts.items():
                roof_step(kind, m, o, x)
                t0 = time.perf_counter()
                for _ in range(steps):
                    roof_step(kind, m, o, x)
                times[k].append((time.perf_counter() - t0) / steps)
        row = {"name": name, "gflop": flops / 1e9}
        for k, v in times.items():
            row[k] = float(np.median(v))
        if "--compile" in args and kind == "pretrain" and name.startswith("2-D"):
            m = module_channels_last(make())
            o = torch.optim.AdamW(m.parameters(), lr=1e-4)
            fn = torch.compile(lambda a, b: m.loss(a, b)[0])
            x = layouts["channels_last"][2]
            t0 = time.perf_counter()
            roof_step(kind, m, o, x, fn)
            row["compile_first"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            for _ in range(steps * rounds):
                roof_step(kind, m, o, x, fn)
            row["compiled"] = (time.perf_counter() - t0) / (steps * rounds)
        rows.append(row)
        print(f"  {name}: {row['gflop']:.1f} GFLOP/step, default {row['default']:.3f} s, "
              f"channels_last {row['channels_last']:.3f} s" + (f", compiled {row['compiled']:.3f} s "
                                                              f"(first {row['compile_first']:.0f} s)" if "compiled" in row else ""),
              flush=True)
    roofs.append(matmul_roof())
    top = float(np.mean(roofs))
    print(f"fp32 matmul roof at the end {roofs[1]:.0f} GFLOP/s; fractions below use the mean, {top:.0f} GFLOP/s")
    print(f"| step (forward + backward + AdamW) | GFLOP/step | default | channels_last | speed-up |"
          + (" torch.compile |" if any("compiled" in r for r in rows) else ""))
    for r in rows:
        cells = [f"{r['gflop'] / r[k]:.0f} GFLOP/s ({100 * r['gflop'] / r[k] / top:.0f} %), {r[k]:.3f} s"
                 for k in ("default", "channels_last")]
        line = f"| {r['name']} | {r['gflop']:.1f} | {cells[0]} | {cells[1]} | {r['default'] / r['channels_last']:.2f}x |"
        if "compiled" in r:
            line += (f" {r['gflop'] / r['compiled']:.0f} GFLOP/s ({100 * r['gflop'] / r['compiled'] / top:.0f} %), "
                     f"first step {r['compile_first']:.0f} s |")
        print(line)


def threads_and_workers(corpus: Path | None, batch: int, steps: int, rounds: int) -> None:
    """Bare 2-D U-Net step at 1, all and twice the usable cores; then our pipeline read from disk
    with 0, 1 and 2 loader workers."""
    from warmstart.base.cores import usable_cores
    from warmstart.encoders.memory import module_channels_last, to_channels_last

    cores = usable_cores()
    x = [to_channels_last(torch.randn(batch, 1, 64, 64)) for _ in range(2)]
    feed = iter(lambda: (x[0], x[1]), None)
    counts = sorted({1, cores, 2 * cores})
    models = {n: model_and_opt("unet", 1, True, **DEMO_UNET) for n in counts}
    runs: dict[int, list[float]] = {n: [] for n in counts}
    for _ in range(rounds):
        for n in counts:
            torch.set_num_threads(n)
            runs[n].append(timed(feed, *models[n], steps))
    torch.set_num_threads(cores)
    print(f"bare U-Net (w16 d4) SimCLR step, batch {batch} of 64 px, {cores} usable cores:")
    for n in counts:
        print(f"  {n:2d} threads {np.median(runs[n]):7.1f} pairs/s ({np.median(runs[n]) / np.median(runs[cores]):.2f}x of {cores})")
    if corpus is None:
        return
    pipes = {w: ours(corpus, batch, w, in_memory=False, encoder_layout=True) for w in (0, 1, 2)}
    models2 = {w: model_and_opt("unet", 1, True, **DEMO_UNET) for w in pipes}
    runs2: dict[int, list[float]] = {w: [] for w in pipes}
    for _ in range(rounds):
        for w in pipes:
            runs2[w].append(timed(pipes[w], *models2[w], steps))
    print(f"our pipeline, corpus read from disk, {cores} torch threads:")
    for w in pipes:
        print(f"  {w} loader workers {np.median(runs2[w]):7.1f} pairs/s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--patch", type=int, default=64)
    ap.add_argument("--batch", type=int, default=128)
    ap.add_argument("--steps", type=int, default=12, help="timed steps per round")
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--encoder", default="resnet_narrow")
    ap.add_argument("--dims", type=int, choices=(2, 3), default=2,
                    help="3: cubes of --patch voxels and a 3-D encoder (pipeline mode; no per-sample reference in 3-D)")
    ap.add_argument("--encoder-param", action="append", default=[], metavar="KEY=INT",
                    help="encoder constructor parameter, e.g. base_width=16 (repeatable)")
    ap.add_argument("--roof", action="store_true",
                    help="GFLOP/s of the 2-D and 3-D pretraining and fine-tuning steps against the matmul roof, "
                         "default vs channels-last layout")
    ap.add_argument("--batch3d", type=int, default=32, help="with --roof: cubes per 3-D pretraining batch")
    ap.add_argument("--compile", action="store_true", help="with --roof: also time torch.compile of the 2-D step")
    ap.add_argument("--case", help="with --roof: only the steps whose name contains this text (e.g. '2-D fine')")
    ap.add_argument("--threads", action="store_true",
                    help="bare step at 1, all and twice the usable cores, and disk-read pipelines with 0-2 workers")
    args = ap.parse_args()
    from warmstart.base.cores import usable_cores

    torch.set_num_threads(usable_cores())  # what pretrain and bench do
    if args.roof:
        roof()
        return
    params = {k: int(v) for k, v in (p.split("=", 1) for p in args.encoder_param)}
    if args.dims == 3:
        params["spatial_dims"] = 3
    root = Path(tempfile.mkdtemp(prefix="warmstart-bench-pre-"))
    try:
        corpus = make_corpus(root, args.patch, args.dims)
        if args.threads:
            threads_and_workers(corpus, args.batch, args.steps, args.rounds)
            return
        from warmstart.corpus.store import open_corpus

        print(f"corpus: {len(open_corpus(corpus))} patches of {args.patch} px; encoder {args.encoder}, batch {args.batch}, "
              f"{torch.get_num_threads()} torch threads, {args.workers} loader workers")
        # Interleave the three pipelines over several rounds and take medians: on a shared
        # 2-core machine a single timing drifts by 15 % from one minute to the next.
        pipelines = {"a": ("bare model step", bare(args.batch, args.patch, args.dims)),
                     "b": ("ours (store + batched views)", ours(corpus, args.batch, args.workers, encoder_layout=True))}
        if args.dims == 2:
            pipelines["c"] = ("reference (per-sample PIL views in workers)", reference(corpus, args.batch, args.workers, args.patch))
        models = {k: model_and_opt(args.encoder, 1, True, **params) for k in pipelines}
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
        if "c" in figures:
            print(f"  (b)/(c) = {figures['b'] / figures['c']:.2f}   (target >= 1.5)")
        from warmstart.pretrain.loop import pretrain
        from warmstart.pretrain.settings import PretrainSettings

        s = PretrainSettings(encoder=args.encoder, encoder_params=params, batch_size=args.batch, max_steps=args.steps + 5, num_workers=args.workers,
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
