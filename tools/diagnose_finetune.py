#!/usr/bin/env python3
"""Why do 3-D fine-tuning runs stall, and what does a warm start need? One bench cell, many variations.

Takes a finished ``warmstart demo --3d`` folder (its labelled cubes and its 3-D encoder file,
optionally its 2-D file inflated into the 3-D network) and fine-tunes random init and the warm
start on the same cell (``--size`` cubes, ``--replicates`` replicates, the same split and patches)
under controlled variations of the bench settings, one at a time from the base (the demo's bench
settings with ``--epochs`` x ``--steps``):

========================  ===================================================================
variation                 what changes (for both contenders unless it says "warm only")
========================  ===================================================================
base                      nothing
lr-low / lr-high          the learning rate / 3, x 3
sgd                       SGD, Nesterov momentum 0.99, lr 1e-2 (common practice for nnU-Net)
nnunet-plain              SGD as above with poly decay and no warm-up: nnU-Net's -pretrained_weights path
nnunet-warmup             the same after a linear warm-up over 10 % of the steps (its warm-up trainer)
constant / poly           the schedule after the warm-up (cosine in the base)
warmup                    a linear warm-up over the first 10 % of the steps
uniform                   every patch placed uniformly (no class-aware patches)
enc-0.1                   warm only: the encoder at 0.1 x the learning rate
decoder-first             warm only: encoder frozen for the first 30 % of the epochs
random-file-intensity     random init gets the file's intensity rule and standardization
========================  ===================================================================

The file's decoder vs a fresh one: the bench's reference decoder is warm-started only from a file
exported with warmstart's U-Net decoder; an nnU-Net file's decoder is nnU-Net's own, which the
bench does not use (its report says so), so for the 3-D demo's file that row would equal the base.

Prints one table: per variation, final test Dice of random init and of the warm start (mean and
95 % interval over replicates), the fraction of replicates that learned every class, the paired
warm-minus-random difference, and the runs that converged (the bench's rule). Writes it and every
run to ``DIR/diagnose.json`` and ``DIR/diagnose.md``; a rerun reuses finished runs.

Usage: python tools/diagnose_finetune.py DEMO_DIR -o DIR [--size 1] [--replicates 5] [--epochs 20]
       [--steps 10] [--variations base,uniform,...] [--inflated]
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import time
from pathlib import Path
from typing import Any

# (settings overrides for both, overrides for the warm start only, random init gets the file's intensity)
VARIATIONS: dict[str, tuple[dict[str, Any], dict[str, Any], bool]] = {
    "base": ({}, {}, False),
    "lr-low": ({"lr": "/3"}, {}, False),
    "lr-high": ({"lr": "*3"}, {}, False),
    "sgd": ({"optimizer": "sgd", "lr": 1e-2}, {}, False),
    "nnunet-plain": ({"optimizer": "sgd", "lr": 1e-2, "schedule": "poly"}, {}, False),
    "nnunet-warmup": ({"optimizer": "sgd", "lr": 1e-2, "schedule": "poly", "warmup_steps": "10%"}, {}, False),
    "constant": ({"schedule": "constant"}, {}, False),
    "poly": ({"schedule": "poly"}, {}, False),
    "warmup": ({"warmup_steps": "10%"}, {}, False),
    "uniform": ({"class_aware_fraction": 0.0}, {}, False),
    "enc-0.1": ({}, {"warm_encoder_lr_factor": 0.1}, False),
    "decoder-first": ({}, {"freeze_encoder_epochs": "30%"}, False),
    "random-file-intensity": ({}, {}, True),
}


def _resolve(s: Any, changes: dict[str, Any]) -> Any:
    out = {}
    for k, v in changes.items():
        if isinstance(v, str) and v[0] in "*/":
            out[k] = getattr(s, k) * float(v[1:]) if v[0] == "*" else getattr(s, k) / float(v[1:])
        elif isinstance(v, str) and v.endswith("%"):
            total = s.total_steps if k == "warmup_steps" else s.epochs
            out[k] = max(1, round(total * float(v[:-1]) / 100))
        else:
            out[k] = v
    return dataclasses.replace(s, **out)


def _cell(values: list[float]) -> str:
    from warmstart.bench.stats import bounded_ci

    c = bounded_ci(values)
    return f"{c['mean']:.3f} [{c['low']:.3f}, {c['high']:.3f}]" if c["mean"] is not None else "-"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("demo", type=Path, help="a finished warmstart demo --3d folder")
    ap.add_argument("-o", "--out", type=Path, required=True)
    ap.add_argument("--size", type=int, default=1)
    ap.add_argument("--replicates", type=int, default=5)
    ap.add_argument("--epochs", type=int, default=20)
    ap.add_argument("--steps", type=int, default=10, help="steps per epoch")
    ap.add_argument("--variations", default=",".join(VARIATIONS))
    ap.add_argument("--inflated", action="store_true", help="the warm start is the 2-D file inflated (mean) into "
                                                            "the 3-D file's network, instead of the 3-D file")
    a = ap.parse_args()

    import torch

    from warmstart.bench.data import load_pairs, make_split, n_classes
    from warmstart.bench.run import _contenders, _device, _model_factory, _prepared
    from warmstart.bench.stats import paired_difference
    from warmstart.bench.train import fine_tune
    from warmstart.recipe import load_recipe

    torch.set_num_threads(2)
    base = dataclasses.replace(load_recipe("demo-3d").bench, epochs=a.epochs, steps_per_epoch=a.steps,
                               replicates=a.replicates, sizes=[a.size])
    pairs = load_pairs(a.demo / "labelled")
    classes = n_classes(pairs)
    if a.inflated:  # the 2-D file in its own network made 3-D, against random init of that network
        base = dataclasses.replace(base, inflate="mean")
        file = a.demo / "encoder.safetensors"
    else:
        file = a.demo / "encoder-3d.safetensors"
    contenders = _contenders([file], base, pairs)
    warm_c = next(c for c in contenders if c.file and (c.inflate or not a.inflated))
    random_c = next(c for c in contenders if c.id == warm_c.baseline)
    split = make_split(pairs, base)
    images = {"random": _prepared(random_c, pairs), "warm": _prepared(warm_c, pairs)}
    labels = [p.label for p in pairs]
    a.out.mkdir(parents=True, exist_ok=True)
    store = a.out / "diagnose.json"
    runs: dict[str, Any] = json.loads(store.read_text()) if store.exists() else {}
    device = _device(base)
    rows = []
    for name in a.variations.split(","):
        both, warm_only, file_intensity = VARIATIONS[name]
        s = _resolve(base, both)
        sw = _resolve(s, warm_only)
        got: dict[str, list[dict[str, Any]]] = {"random": [], "warm": []}
        for seed in range(a.replicates):
            for who in ("random", "warm"):
                key = f"{name}/{who}/{seed}/{a.size}/{a.epochs}x{a.steps}/{'inflated' if a.inflated else '3d'}"
                if key not in runs:
                    t0 = time.perf_counter()
                    if who == "random":
                        imgs = images["warm"] if file_intensity else images["random"]
                        r = fine_tune(_model_factory(random_c, classes, s), imgs, labels, split, a.size, seed, classes,
                                      s, device)
                    else:
                        r = fine_tune(_model_factory(warm_c, classes, sw), images["warm"], labels, split, a.size, seed, classes, sw, device,
                                      warm=True)
                    runs[key] = {k: r[k] for k in ("test_dice", "test_dice_per_class", "val_dice", "converged",
                                                   "learned_every_class")}
                    store.write_text(json.dumps(runs, indent=1))
                    print(f"{key}: test Dice {r['test_dice']:.3f} ({time.perf_counter() - t0:.0f} s)", flush=True)
                got[who].append(runs[key])
        d = paired_difference([r["test_dice"] for r in got["warm"]], [r["test_dice"] for r in got["random"]])
        n = a.replicates
        rows.append([name, _cell([r["test_dice"] for r in got["random"]]), _cell([r["test_dice"] for r in got["warm"]]),
                     f"{sum(r['learned_every_class'] for r in got['random'])}/{n}",
                     f"{sum(r['learned_every_class'] for r in got['warm'])}/{n}",
                     f"{d['mean']:+.3f} [{d['low']:+.3f}, {d['high']:+.3f}]{' *' if d['significant'] else ''}",
                     f"{sum(r['converged'] for r in got['random'])}/{n}, {sum(r['converged'] for r in got['warm'])}/{n}"])
    head = ["variation", "random init", "warm start", "random learned all", "warm learned all", "warm - random",
            "converged (random, warm)"]
    table = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)] + ["| " + " | ".join(r) + " |" for r in rows]
    title = (f"{a.size} cube(s), {a.replicates} replicates, {a.epochs} x {a.steps} steps; warm start: "
             f"{warm_c.label}, random init: {random_c.label}")
    text = "\n".join([title, "", *table]) + "\n"
    (a.out / "diagnose.md").write_text(text)
    print(text)


if __name__ == "__main__":
    main()
