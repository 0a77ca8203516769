#!/usr/bin/env python3
"""Which pretraining method helps segmentation most, on the demo scenario, at one time budget each.

1. The demo's archive and held-out labelled set (plan ``default``, or ``3d`` with ``--dims 3``),
   and its corpus (recipe ``demo``, or ``demo-3d`` and also ``demo`` for the 2-D reference).
2. Every method pretrains the demo's U-Net encoder for the same wall-clock budget on this
   machine: short calibration runs of every method, one after the other before any real run,
   measure steps per second, and each real run takes as many steps as fit in ``--minutes`` (a
   step count, so the learning-rate schedule is complete, the run is reproducible, and a busy
   machine during the real runs cannot shorten one method's training). With ``--dims 3`` the
   2-D default (dense contrastive on the 2-D corpus) is pretrained with the same budget, for
   reference.
3. Export; restoration and combined are exported with their decoder (whole-U-Net warm start),
   restoration also without it, to see what the decoder adds.
4. ``warmstart bench`` (recipe ``demo``'s bench table: 1/4/16 tiles, 5 replicates; with ``--dims 3``
   recipe ``bench-cpu-3d``: 1/4/16 cubes, 5 replicates, 2-D contenders on the cubes' slices) with
   every file.
5. Prints one table: per method and size, final test Dice, early Dice and curve area with their
   paired differences against random init (95 % t intervals; ``*`` where the interval excludes
   zero), and the pretraining steps and seconds, and the recommendation of :func:`best_method`.
   Writes it to ``DIR/compare.md`` too.

Everything is kept in DIR and reused on a rerun (pretraining runs, exports, bench runs).

The rule that picks the default (stated before any run, the same in 2-D and 3-D) is
:func:`best_method`'s; in 3-D it chooses among the 3-D contenders only.

With ``--dims 3`` a method name ending in ``-lowres`` (``restore-lowres``) pretrains on the cubes
downscaled 2x (the same field of view in an eighth of the voxels, so more steps in the same
minutes), and the 2-D reference is also benched inflated into the 3-D U-Net (``--inflate``).

Usage: python tools/compare_methods.py -o DIR [--dims 2|3] [--minutes 4] [--methods simclr,moco_v2,dense,restore,combined]
       [--sizes 1,4,16] [--replicates 5] [--inflate mean|center|none]
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
    "masked": {"mask_ratio": 0.6},
}
WITH_DECODER = {"restore", "combined", "masked"}
METHODS_3D = "simclr,dense,restore,masked,combined"
REFERENCE_2D = "dense-2d"  # the 2-D default, pretrained beside a 3-D comparison
LOWRES = "-lowres"  # 3-D: a method name with this ending pretrains on cubes downscaled 2x (same field of view)
CALIBRATION_STEPS = 12


def _data(root: Path, dims: int, lowres: bool = False) -> tuple[dict[Any, Path], Path, dict[int, Any]]:
    """The demo's archive, labelled set and corpora (3-D: a cube corpus and the 2-D reference's).

    ``lowres`` (3-D) adds corpus ``"lowres"``: the cube corpus with every cube downscaled 2x
    (``scale_factor`` doubled, half the side), the same field of view in an eighth of the voxels,
    so a pretraining step costs about an eighth and the same minutes buy more steps.
    """
    from warmstart.corpus.build import build_corpus
    from warmstart.demo.run import PLANS
    from warmstart.demo.scenario import write_archive, write_labelled_set
    from warmstart.recipe import load_recipe

    plan = PLANS["3d" if dims == 3 else "default"]
    recipes = {2: load_recipe(plan.recipe_2d or plan.recipe)}
    if dims == 3:
        recipes[3] = load_recipe(plan.recipe)
    if not (root / ".data.done").exists():
        write_archive(root / "archive", n_per_scanner=plan.n_per_scanner, shape=plan.shape)
        write_labelled_set(root / "labelled", n=plan.labelled_n, shape=plan.labelled_shape)
        (root / ".data.done").write_text("ok\n")
    wanted: dict[Any, tuple[Path, Any]] = {d: (root / ("corpus.zarr" if d == 2 else "corpus-3d.zarr"), r.corpus)
                                           for d, r in recipes.items()}
    if dims == 3 and lowres:
        c = recipes[3].corpus
        half = dataclasses.replace(c.sampling, scale_factor=c.sampling.scale_factor * 2,
                                   patch_size=c.sampling.patch_size // 2,
                                   stride=None if c.sampling.stride is None else max(1, c.sampling.stride // 2))
        wanted["lowres"] = (root / "corpus-3d-lowres.zarr", dataclasses.replace(c, sampling=half))
    corpora = {}
    for key, (where, settings) in wanted.items():
        corpora[key] = where
        if not (where / "manifest.json").exists():
            build_corpus(root / "archive", where, settings, progress=False)
    return corpora, root / "labelled", recipes


def _method(name: str) -> str:
    return "dense" if name == REFERENCE_2D else name.removesuffix(LOWRES)


def _calibrate(corpus: Path, root: Path, name: str, base: Any, minutes: float) -> int:
    """Steps that fit in ``minutes`` for one method (remembered in DIR/steps.json)."""
    from warmstart.pretrain.loop import pretrain

    record = root / "steps.json"
    known = json.loads(record.read_text()) if record.exists() else {}
    if name in known:
        return int(known[name]["steps"])
    method = _method(name)
    settings = dataclasses.replace(base, method=method, method_params=METHOD_PARAMS[method])
    calib = root / "runs" / f"{name}-calibration"
    shutil.rmtree(calib, ignore_errors=True)
    res = pretrain(corpus, calib, dataclasses.replace(settings, max_steps=CALIBRATION_STEPS), progress=False)
    rate = res.steps / max(res.summary["seconds"], 1e-6)  # start-up included: errs on the short side
    shutil.rmtree(calib, ignore_errors=True)
    steps = max(CALIBRATION_STEPS, int(minutes * 60 * rate))
    known[name] = {"steps": steps, "steps_per_second": round(rate, 3), "minutes": minutes}
    record.write_text(json.dumps(known, indent=1) + "\n")
    print(f"  {name}: {rate:.2f} steps/s calibrated -> {steps} steps", flush=True)
    return steps


def _pretrain(corpus: Path, root: Path, name: str, base: Any, steps: int) -> dict[str, Any]:
    from warmstart.pretrain.loop import pretrain

    run = root / "runs" / name
    if (run / "summary.json").exists():
        return json.loads((run / "summary.json").read_text())
    method = _method(name)
    settings = dataclasses.replace(base, method=method, method_params=METHOD_PARAMS[method], max_steps=steps)
    shutil.rmtree(run, ignore_errors=True)  # an interrupted run restarts: its step count came from the calibration
    t0 = time.perf_counter()
    res = pretrain(corpus, run, settings, progress=False)
    print(f"  {name}: {steps} steps in {time.perf_counter() - t0:.0f} s, final loss {res.summary['final_loss']:.3f}",
          flush=True)
    return res.summary


def _files(root: Path, methods: list[str], only_2d: set[str]) -> list[Path]:
    """Export every run (restoration in 2-D also without its decoder, to see what the decoder adds)."""
    from warmstart.export.pack import export_encoder

    out = []
    for m in methods:
        variants = [(f"{m}-unet", True), (f"{m}-encoder", False)] if m == "restore" and m in only_2d else \
            [(f"{m}-unet", True)] if _method(m) in WITH_DECODER else [(m, False)]
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
    lines = [f"| {result.get('unit', 'tile')}s | contender | pretraining | final test Dice | vs random | early Dice vs random | curve area vs random |",
             "|---|---|---|---|---|---|---|"]
    for size, rows in result["summary"].items():
        for cid, row in rows.items():
            method = cid.rsplit("-", 1)[0] if cid.endswith(("-unet", "-encoder")) and not cid.startswith("random") else cid
            p = pretraining.get(method)
            pre = f"{p['steps']} steps, {p['seconds']:.0f} s" if p else ""
            final = _cell(row["test_dice"], sign="")
            vs = row.get("vs_random")
            cells = [_cell(vs[f]) for f in ("test_dice", "early_dice", "curve_area")] if vs else ["", "", ""]
            name = labels[cid]["label"].replace("warm start ", "")
            lines.append(f"| {size} | {name} | {pre} | {final} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def best_method(result: dict[str, Any], among: set[str] | None = None) -> tuple[str, str]:
    """The contender to recommend (of ``among``, default every warm start), and why.

    First the issue's target: a final-Dice gain over random init at the smallest training set
    whose paired 95 % interval excludes zero. Among the contenders that reach it (all of them,
    if none does), the most paired comparisons that exclude zero over every size and figure
    (final Dice, early Dice, curve area); then the larger mean final-Dice gain over sizes.
    """
    sizes = sorted(result["summary"], key=int)
    stats: dict[str, tuple[bool, int, float]] = {}
    for cid in result["summary"][sizes[0]]:
        rows = [result["summary"][n][cid] for n in sizes]
        if not rows[0].get("vs_random") or (among is not None and cid not in among):
            continue
        first = rows[0]["vs_random"]["test_dice"]
        target = bool(first.get("significant")) and first["mean"] > 0
        wins = sum(bool(r["vs_random"][f].get("significant")) and r["vs_random"][f]["mean"] > 0
                   for r in rows for f in ("test_dice", "early_dice", "curve_area"))
        gain = sum(r["vs_random"]["test_dice"]["mean"] for r in rows) / len(rows)
        stats[cid] = (target, wins, gain)
    cid = max(stats, key=lambda k: stats[k])
    target, wins, gain = stats[cid]
    unit = result.get("unit", "tile")
    why = (f"{'reaches' if target else 'no contender reaches'} a final-Dice gain at {sizes[0]} {unit}(s) whose 95 % "
           f"interval lies above zero; {wins} of {3 * len(sizes)} paired comparisons are gains whose interval excludes "
           f"zero; mean final-Dice gain {gain:+.3f}")
    return cid, why


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-o", "--output", required=True, metavar="DIR")
    ap.add_argument("--minutes", type=float, default=4.0, help="pretraining budget per method (wall clock, this machine)")
    ap.add_argument("--dims", type=int, choices=(2, 3), default=2, help="compare 2-D or 3-D pretraining")
    ap.add_argument("--methods", default=None, help=f"default: simclr,moco_v2,dense,restore,combined (2-D), {METHODS_3D} (3-D)")
    ap.add_argument("--sizes", default="1,4,16")
    ap.add_argument("--replicates", type=int, default=5)
    ap.add_argument("--inflate", choices=("mean", "center", "none"), default="mean",
                    help="3-D: also bench the 2-D reference inflated into the 3-D U-Net by this rule")
    args = ap.parse_args()
    args.inflate = None if args.inflate == "none" else args.inflate
    import logging
    import warnings

    for name in ("pytorch_lightning.utilities.rank_zero", "lightning_fabric.utilities.rank_zero"):  # start-up chatter
        logging.getLogger(name).setLevel(logging.WARNING)
    warnings.filterwarnings("ignore", category=UserWarning)
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    from warmstart.bench.run import run_bench
    from warmstart.recipe import load_recipe

    root = Path(args.output)
    root.mkdir(parents=True, exist_ok=True)
    methods = [m.strip() for m in (args.methods or (METHODS_3D if args.dims == 3 else "simclr,moco_v2,dense,restore,combined"))
               .split(",") if m.strip()]
    unknown = sorted({m for m in methods if _method(m) not in METHOD_PARAMS or (m.endswith(LOWRES) and args.dims != 3)})
    if unknown:
        raise SystemExit(f"unknown method {unknown[0]!r}; known: {', '.join(METHOD_PARAMS)}")
    t0 = time.perf_counter()
    corpora, labelled, recipes = _data(root, args.dims, lowres=any(m.endswith(LOWRES) for m in methods))
    dims = args.dims
    names = methods + ([REFERENCE_2D] if dims == 3 else [])
    corpus_of = {n: corpora[2 if n == REFERENCE_2D else "lowres" if n.endswith(LOWRES) else dims] for n in names}
    base_of = {n: recipes[2 if n == REFERENCE_2D else dims].pretrain for n in names}
    print(f"data ready in {time.perf_counter() - t0:.0f} s; calibrating {len(names)} runs, {args.minutes:g} min each",
          flush=True)
    steps = {n: _calibrate(corpus_of[n], root, n, base_of[n], args.minutes) for n in names}
    pretraining = {n: _pretrain(corpus_of[n], root, n, base_of[n], steps[n]) for n in names}
    files = _files(root, names, set(names) if dims == 2 else {REFERENCE_2D})
    recipe = recipes[dims] if dims == 2 else load_recipe("bench-cpu-3d")
    bench = dataclasses.replace(recipe.bench, sizes=[int(s) for s in args.sizes.split(",")], replicates=args.replicates,
                                # 3-D: the 2-D reference also inflated into the 3-D network (a 3-D contender)
                                inflate=args.inflate if dims == 3 else None)
    t1 = time.perf_counter()
    result = run_bench(labelled, files, root / "bench", bench, progress=False)
    print(f"bench: {len(result['runs'])} runs in {time.perf_counter() - t1:.0f} s (reused runs count 0 s)")
    text = table(result, pretraining)
    among = {c["id"] for c in result["contenders"] if c.get("baseline")
             and int(c["spec"]["params"].get("spatial_dims", 2)) == dims}
    cid, why = best_method(result, among)
    unit = "tiles" if dims == 2 else "cubes"
    verdict = f"Recommended ({dims}-D): {cid} ({why}). A `*` marks a paired 95 % interval that excludes zero."
    (root / "compare.md").write_text(f"# Pretraining methods on the demo scenario ({dims}-D, sizes in {unit})\n\n"
                                     f"{text}\n\n{verdict}\n")
    print(text)
    print(verdict)
    print(f"total {time.perf_counter() - t0:.0f} s; report {root / 'compare.md'} and {result['report']['html']}")


if __name__ == "__main__":
    main()
