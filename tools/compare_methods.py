#!/usr/bin/env python3
"""Which pretraining method helps segmentation most, on the demo scenario, at one time budget each.

1. The demo's archive and held-out labelled set (default plan), and its corpus (recipe ``demo``).
2. Every method pretrains the demo's U-Net encoder for the same wall-clock budget on this
   machine: a short calibration run measures its steps per second, and the real run takes as
   many steps as fit in ``--minutes`` (a step count, so the learning-rate schedule is complete
   and the run is reproducible).
3. Export; restoration and combined are exported with their decoder (whole-U-Net warm start),
   restoration also without it, to see what the decoder adds.
4. ``warmstart bench`` (recipe ``demo``'s bench table: 1/4/16 tiles, 5 replicates) with every file.
5. Prints one table: per method and size, final test Dice, early Dice and curve area with their
   paired differences against random init (95 % t intervals; ``*`` where the interval excludes
   zero), and the pretraining steps and seconds, and the recommendation of :func:`best_method`.
   Writes it to ``DIR/compare.md`` too.

Everything is kept in DIR and reused on a rerun (pretraining runs, exports, bench runs).

Usage: python tools/compare_methods.py -o DIR [--minutes 4] [--methods simclr,moco_v2,dense,restore,combined]
       [--sizes 1,4,16] [--replicates 5]
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import shutil
import time
from pathlib import Path
from typing import Any

METHOD_PARAMS: dict[str, dict[str, Any]] = {
    "simclr": {"temperature": 0.1},
    "moco_v2": {"temperature": 0.2, "queue_size": 1024, "momentum": 0.99},
    "dense": {"temperature": 0.1, "dense_weight": 0.5},
    "restore": {},
    # Weights chosen so both terms are of similar size once training settles (NT-Xent about 1-2,
    # restoration MSE about 0.2-0.4 in standardized units), not tuned on the benchmark.
    "combined": {"contrastive": "dense", "contrastive_weight": 1.0, "restore_weight": 4.0,
                 "contrastive_params": {"temperature": 0.1, "dense_weight": 0.5}},
}
WITH_DECODER = {"restore", "combined"}
CALIBRATION_STEPS = 12


def _data(root: Path) -> tuple[Path, Path, Any]:
    from warmstart.corpus.build import build_corpus
    from warmstart.demo.run import PLANS
    from warmstart.demo.scenario import write_archive, write_labelled_set
    from warmstart.recipe import load_recipe

    plan = PLANS["default"]
    recipe = load_recipe(plan.recipe)
    if not (root / ".data.done").exists():
        write_archive(root / "archive", n_per_scanner=plan.n_per_scanner, shape=plan.shape)
        write_labelled_set(root / "labelled", n=plan.labelled_n, shape=plan.labelled_shape)
        (root / ".data.done").write_text("ok\n")
    corpus = root / "corpus.zarr"
    if not (corpus / "manifest.json").exists():
        build_corpus(root / "archive", corpus, recipe.corpus, progress=False)
    return corpus, root / "labelled", recipe


def _pretrain(corpus: Path, root: Path, method: str, base: Any, minutes: float) -> dict[str, Any]:
    from warmstart.pretrain.loop import pretrain

    run = root / "runs" / method
    if (run / "summary.json").exists():
        return json.loads((run / "summary.json").read_text())
    settings = dataclasses.replace(base, method=method, method_params=METHOD_PARAMS[method])
    calib = root / "runs" / f"{method}-calibration"
    shutil.rmtree(calib, ignore_errors=True)
    res = pretrain(corpus, calib, dataclasses.replace(settings, max_steps=CALIBRATION_STEPS), progress=False)
    rate = res.steps / max(res.summary["seconds"], 1e-6)  # start-up included: errs on the short side
    steps = max(CALIBRATION_STEPS, int(minutes * 60 * rate))
    shutil.rmtree(calib, ignore_errors=True)
    shutil.rmtree(run, ignore_errors=True)  # an interrupted run restarts: its step count came from this calibration
    t0 = time.perf_counter()
    res = pretrain(corpus, run, dataclasses.replace(settings, max_steps=steps), progress=False)
    print(f"  {method}: {steps} steps ({rate:.2f} steps/s calibrated) in {time.perf_counter() - t0:.0f} s, "
          f"final loss {res.summary['final_loss']:.3f}", flush=True)
    return res.summary


def _files(root: Path, methods: list[str]) -> list[Path]:
    from warmstart.export.pack import export_encoder

    out = []
    for m in methods:
        variants = [(f"{m}-unet", True), (f"{m}-encoder", False)] if m == "restore" else \
            [(f"{m}-unet", True)] if m in WITH_DECODER else [(m, False)]
        for name, dec in variants:
            f = root / "files" / f"{name}.safetensors"
            if not f.exists():
                f.parent.mkdir(parents=True, exist_ok=True)
                export_encoder(root / "runs" / m, f, with_decoder=dec)
            out.append(f)
    return out


def _num(x: float | None, sign: str = "") -> str:
    return "n/a" if x is None else f"{x:{sign}.3f}"


def _cell(d: dict[str, Any], sign: str = "+") -> str:
    star = " *" if d.get("significant") else ""
    return f"{_num(d['mean'], sign)} [{_num(d['low'], sign)}, {_num(d['high'], sign)}]{star}"


def table(result: dict[str, Any], pretraining: dict[str, dict[str, Any]]) -> str:
    """Markdown comparison table from a bench result and the pretraining summaries."""
    labels = {c["id"]: c for c in result["contenders"]}
    lines = ["| tiles | contender | pretraining | final test Dice | vs random | early Dice vs random | curve area vs random |",
             "|---|---|---|---|---|---|---|"]
    for size, rows in result["summary"].items():
        for cid, row in rows.items():
            method = cid.rsplit("-", 1)[0] if cid.endswith(("-unet", "-encoder")) else cid
            p = pretraining.get(method)
            pre = f"{p['steps']} steps, {p['seconds']:.0f} s" if p else ""
            final = _cell(row["test_dice"], sign="")
            vs = row.get("vs_random")
            cells = [_cell(vs[f]) for f in ("test_dice", "early_dice", "curve_area")] if vs else ["", "", ""]
            name = labels[cid]["label"].replace("warm start ", "")
            lines.append(f"| {size} | {name} | {pre} | {final} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def best_method(result: dict[str, Any]) -> tuple[str, str]:
    """The contender to recommend, and why.

    First the issue's target: a final-Dice gain over random init at the smallest training set
    whose paired 95 % interval excludes zero. Among the contenders that reach it (all of them,
    if none does), the most paired comparisons that exclude zero over every size and figure
    (final Dice, early Dice, curve area); then the larger mean final-Dice gain over sizes.
    """
    sizes = sorted(result["summary"], key=int)
    stats: dict[str, tuple[bool, int, float]] = {}
    for cid in result["summary"][sizes[0]]:
        rows = [result["summary"][n][cid] for n in sizes]
        if not rows[0].get("vs_random"):
            continue
        target = bool(rows[0]["vs_random"]["test_dice"].get("significant"))
        wins = sum(bool(r["vs_random"][f].get("significant")) for r in rows for f in ("test_dice", "early_dice", "curve_area"))
        gain = sum(r["vs_random"]["test_dice"]["mean"] for r in rows) / len(rows)
        stats[cid] = (target, wins, gain)
    cid = max(stats, key=lambda k: stats[k])
    target, wins, gain = stats[cid]
    why = (f"{'reaches' if target else 'no contender reaches'} a final-Dice gain at {sizes[0]} tile(s) whose 95 % "
           f"interval excludes zero; {wins} of {3 * len(sizes)} paired comparisons exclude zero; mean final-Dice gain "
           f"{gain:+.3f}")
    return cid, why


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-o", "--output", required=True, metavar="DIR")
    ap.add_argument("--minutes", type=float, default=4.0, help="pretraining budget per method (wall clock, this machine)")
    ap.add_argument("--methods", default="simclr,moco_v2,dense,restore,combined")
    ap.add_argument("--sizes", default="1,4,16")
    ap.add_argument("--replicates", type=int, default=5)
    args = ap.parse_args()
    import logging
    import warnings

    for name in ("pytorch_lightning.utilities.rank_zero", "lightning_fabric.utilities.rank_zero"):  # start-up chatter
        logging.getLogger(name).setLevel(logging.WARNING)
    warnings.filterwarnings("ignore", category=UserWarning)
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    from warmstart.bench.run import run_bench

    root = Path(args.output)
    root.mkdir(parents=True, exist_ok=True)
    methods = [m.strip() for m in args.methods.split(",") if m.strip()]
    unknown = sorted(set(methods) - set(METHOD_PARAMS))
    if unknown:
        raise SystemExit(f"unknown method {unknown[0]!r}; known: {', '.join(METHOD_PARAMS)}")
    t0 = time.perf_counter()
    corpus, labelled, recipe = _data(root)
    print(f"data ready in {time.perf_counter() - t0:.0f} s; pretraining {len(methods)} methods, "
          f"{args.minutes:g} min each", flush=True)
    pretraining = {m: _pretrain(corpus, root, m, recipe.pretrain, args.minutes) for m in methods}
    files = _files(root, methods)
    bench = dataclasses.replace(recipe.bench, sizes=[int(s) for s in args.sizes.split(",")], replicates=args.replicates)
    t1 = time.perf_counter()
    result = run_bench(labelled, files, root / "bench", bench, progress=False)
    print(f"bench: {len(result['runs'])} runs in {time.perf_counter() - t1:.0f} s (reused runs count 0 s)")
    text = table(result, pretraining)
    cid, why = best_method(result)
    verdict = f"Recommended: {cid} ({why}). A `*` marks a paired 95 % interval that excludes zero."
    (root / "compare.md").write_text(f"# Pretraining methods on the demo scenario\n\n{text}\n\n{verdict}\n")
    print(text)
    print(verdict)
    print(f"total {time.perf_counter() - t0:.0f} s; report {root / 'compare.md'} and {result['report']['html']}")


if __name__ == "__main__":
    main()
