"""``warmstart bench``: every (contender, size, replicate) run, resumable, then the summary and report."""
from __future__ import annotations

import dataclasses
import json
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from ..base.atomic import write_json
from ..base.cores import usable_cores
from ..base.lock import locks_output
from ..errors import WarmstartError
from .cubes import labelled_voxels
from .data import load_pairs, make_split, n_classes
from .labels_saved import headline
from .measures import errors_by_key
from .ranking import recommendation
from .run_records import differences, made_with, set_aside
from .settings import BenchSettings
from .stats import bounded_ci, epochs_to_reach, mean_ci, paired_difference

__all__ = ["Contender", "run_bench", "summarize", "training_set"]

FIGURES = ("test_dice", "early_dice", "curve_area")
# Figures renamed since: an older run record is read with the new names.
_RENAMED_FIGURES = {"auc": "curve_area"}


@dataclass
class Contender:
    """Random initialization of one architecture, or one encoder file."""

    id: str
    label: str
    spec: dict[str, Any]
    file: str | None = None
    baseline: str | None = None  # the random contender it is paired with
    normalization: str = ""
    parts: list[str] = field(default_factory=lambda: ["encoder"])  # what the file warm-starts
    leakage: list[str] = field(default_factory=list)
    mismatch: list[str] = field(default_factory=list)
    file_digest: str | None = None  # the file's digest.sha256 (tensors and manifest)
    inflate: str | None = None  # a 2-D file in a 3-D network, its kernels inflated by this rule

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


def _spec_key(spec: dict[str, Any]) -> str:
    return json.dumps({"name": spec["name"], "params": {k: v for k, v in spec["params"].items() if k != "in_channels"}},
                      sort_keys=True)


def _contenders(encoders: Sequence[str | os.PathLike[str]], s: BenchSettings, pairs: list[Any]) -> list[Contender]:
    """Random init per architecture, then each file (its own normalization; leakage: the labelled
    volumes whose sha256 is among the file's corpus sources)."""
    from ..export.card import intensity_line
    from ..export.file import read_encoder_file

    files = []
    for f in encoders:  # every file checked whole (manifest and tensors) before any training starts
        m = read_encoder_file(f)[0]
        files.append((str(f), m))
    specs: dict[str, dict[str, Any]] = {}
    for _, m in files:
        specs.setdefault(_spec_key(m["encoder"]["spec"]), m["encoder"]["spec"])
    inflated = _inflated_specs(files, s)
    for spec in inflated.values():
        specs.setdefault(_spec_key(spec), spec)
    if not files:
        from ..encoders import build_encoder

        spec = build_encoder(s.random_encoder, **{"in_channels": 1, **s.random_encoder_params}).spec.to_dict()
        specs[_spec_key(spec)] = spec
    randoms = {}
    out = []
    for key, spec in specs.items():
        cid = "random" if len(specs) == 1 else f"random-{spec['name']}-{_dims(spec)}d-{len(randoms)}"
        randoms[key] = cid
        out.append(Contender(cid, f"random init ({spec['name']})", spec,
                             normalization="percentiles 0.5 / 99.5 -> 0 / 1, fitted on each volume (default)"))
    seen: set[str] = set()
    for f, m in files:
        stem = Path(f).name.split(".")[0]
        cid = stem if stem not in seen and not stem.startswith("random") else f"{stem}-{len(seen)}"
        seen.add(cid)
        st = m["standardization"]
        known = {p["sha256"] for p in m["corpus"]["provenance"]}
        parts = list(m.get("parts", ["encoder"]))
        notes = []
        decoder = m.get("decoder") or {}
        if "decoder" in parts and decoder.get("kind", "unet") != "unet":
            parts = ["encoder"]
            notes.append(f"the file's decoder is {decoder['kind']}'s own, not the benchmark's reference U-Net decoder: "
                         "only its encoder is used")
        elif "decoder" in parts and decoder.get("norm") != s.decoder_norm:
            parts = ["encoder"]
            notes.append(f"bench.decoder_norm {s.decoder_norm!r} is not the file's decoder norm "
                         f"{decoder['norm']!r}: its decoder is not used")
        label = f"warm start {Path(f).name}" + (" (encoder + decoder)" if "decoder" in parts else "")
        common = dict(normalization=f"{intensity_line(m)}, then (x - {st['mean']:.4g}) / {st['std']:.4g} (from the file)",
                      leakage=[p.name for p in pairs if p.sha256 in known],
                      file_digest=(m.get("digest") or {}).get("sha256") or m["tensors"]["sha256"])
        out.append(Contender(cid, label, m["encoder"]["spec"], f, randoms[_spec_key(m["encoder"]["spec"])],
                             parts=parts, mismatch=notes, **common))
        if f in inflated:
            spec3 = inflated[f]
            out.append(Contender(f"{cid}-inflated", f"warm start {Path(f).name} inflated ({s.inflate})", spec3, f,
                                 randoms[_spec_key(spec3)], parts=list(parts), mismatch=list(notes),
                                 inflate=s.inflate, **common))
    return out


def _inflated_specs(files: Sequence[tuple[str, dict[str, Any]]], s: BenchSettings) -> dict[str, dict[str, Any]]:
    """With ``bench.inflate``: each 2-D file's 3-D network spec (:func:`warmstart.export.inflate.spec_in_3d`)."""
    from ..export.inflate import spec_in_3d

    if not s.inflate:
        return {}
    return {f: spec_in_3d(m["encoder"]["spec"]) for f, m in files if _dims(m["encoder"]["spec"]) == 2}


def _dims(spec: dict[str, Any]) -> int:
    return int(spec["params"].get("spatial_dims", 2))


def training_set(contenders: Sequence[Contender], s: BenchSettings) -> str:
    """``tiles`` or ``cubes``: the setting, or with ``auto`` cubes when any contender is 3-D."""
    if s.training_set != "auto":
        if s.training_set == "tiles" and any(_dims(c.spec) == 3 for c in contenders):
            raise WarmstartError("bench.training_set = \"tiles\" cannot train a 3-D contender; use \"cubes\" or \"auto\"")
        return s.training_set
    return "cubes" if any(_dims(c.spec) == 3 for c in contenders) else "tiles"


def _prepared(contender: Contender, pairs: list[Any]) -> list[np.ndarray]:
    from ..export.prepare import prepare
    from ..intensity import fit_intensity

    if contender.file is None:
        return [fit_intensity(p.image).apply(p.image) for p in pairs]
    out = []
    for p in pairs:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            out.append(prepare(p.image, contender.file, voxel_size_um=p.voxel_size_um))
        contender.mismatch += [f"{p.name}: {w.message}" for w in caught]
    return out


def _model_factory(c: Contender, classes: int, s: BenchSettings) -> Callable[[], Any]:
    from ..unet import UNet

    if c.file is None:
        spec = {**c.spec, "params": {**c.spec["params"], "in_channels": 1}}
        return lambda: UNet(spec, classes, s.decoder_norm)
    if c.inflate:
        return inflated_factory(c.file, c.spec, classes, s, c.inflate, "decoder" in c.parts)
    return lambda: UNet.from_file(c.file, classes, in_channels=1, decoder_norm=s.decoder_norm,
                                  decoder="decoder" in c.parts)


def inflated_factory(file: str | os.PathLike[str], spec3d: dict[str, Any], classes: int, s: BenchSettings,
                     rule: str = "mean", decoder: bool = False) -> Callable[[], Any]:
    """Builds the reference U-Net on the 3-D spec and warm-starts it from the 2-D file, inflated."""
    from ..export.load import warm_start
    from ..unet import UNet

    spec = {**spec3d, "params": {**spec3d["params"], "in_channels": 1}}

    def make() -> Any:
        net = UNet(spec, classes, s.decoder_norm)
        warm_start(net, file, layout="warmstart", inflate=rule, decoder=decoder or False)
        return net
    return make


def _device(s: BenchSettings) -> Any:
    import torch

    wanted = s.device
    if wanted == "auto":
        wanted = "cuda" if torch.cuda.is_available() else "cpu"
    return torch.device(wanted)


def summarize(runs: list[dict[str, Any]], contenders: list[Contender], s: BenchSettings) -> dict[str, Any]:
    """Per size: mean and CI of every figure per contender, and paired differences against the
    matching random initialization (paired by replicate). Computed from the run records alone."""
    out: dict[str, Any] = {}
    for n in s.sizes:
        at = [r for r in runs if r["size"] == n]
        by = {c.id: sorted([r for r in at if r["contender"] == c.id], key=lambda r: r["seed"]) for c in contenders}
        rows: dict[str, Any] = {}
        best_random = {}
        for c in contenders:
            if c.file is None and by[c.id]:
                best_random[c.id] = float(np.max(np.mean([r["val_dice"] for r in by[c.id]], axis=0)))
        for c in contenders:
            rs = by[c.id]
            row: dict[str, Any] = {f: bounded_ci([r[f] for r in rs]) for f in FIGURES}  # all in [0, 1]
            reached = [r["epochs_to_threshold"] for r in rs if r["epochs_to_threshold"] is not None]
            row["epochs_to_threshold"] = {**mean_ci(reached), "reached": len(reached), "runs": len(rs)}
            base = c.baseline or c.id
            if base in best_random:
                t95 = 0.95 * best_random[base]
                e95 = [epochs_to_reach(r["val_dice"], t95) for r in rs]
                row["epochs_to_95pct_random"] = {**mean_ci([e for e in e95 if e is not None]),
                                                 "threshold": t95, "reached": sum(e is not None for e in e95),
                                                 "runs": len(rs)}
            row["seconds"] = mean_ci([r["seconds"] for r in rs])
            measured = [r["measures"] for r in rs if r.get("measures")]  # runs recorded before measures: none
            for name, kind in (("measure_errors", "abs_error"), ("measure_relative_errors", "rel_error")):
                errs = [errors_by_key(m, kind) for m in measured]
                if errs:
                    row[name] = {k: mean_ci([e[k] for e in errs]) for k in errs[0]}
            if c.baseline:
                ref = {r["seed"]: r for r in by[c.baseline]}
                common = [r for r in rs if r["seed"] in ref]
                row["vs_random"] = {f: paired_difference([r[f] for r in common], [ref[r["seed"]][f] for r in common])
                                    for f in FIGURES}
                both = [r for r in common if r.get("measures") and ref[r["seed"]].get("measures")]
                if both:  # absolute measurement error, this contender minus random init: negative is better
                    mine = [errors_by_key(r["measures"]) for r in both]
                    theirs = [errors_by_key(ref[r["seed"]]["measures"]) for r in both]
                    row["measure_errors_vs_random"] = {k: paired_difference([m[k] for m in mine], [t[k] for t in theirs])
                                                       for k in mine[0]}
            rows[c.id] = row
        out[str(n)] = rows
    return out


@locks_output("bench")
def run_bench(labels: str | os.PathLike[str], encoders: Sequence[str | os.PathLike[str]], out: str | os.PathLike[str],
              settings: BenchSettings | None = None, *, progress: bool = True) -> dict[str, Any]:
    """Fine-tune random initialization and every encoder file on the same labelled tiles or cubes.

    With any 3-D file (or ``bench.training_set = "cubes"``) the training sets are cubes: 3-D
    contenders fine-tune on 3-D patches and predict by sliding windows, 2-D contenders on the
    cubes' slices and predict slice by slice, all scored on the same test slabs.

    Parameters
    ----------
    labels : path
        Folder with ``images/`` and ``labels/`` or a TOML list of pairs (see :mod:`.data`).
    encoders : paths
        Exported encoder files (none: random initialization only).
    out : path
        Report folder; ``runs/`` keeps one JSON per finished run, and a rerun skips them.
    settings : BenchSettings, optional

    Returns
    -------
    dict
        What ``bench.json`` holds: settings, split, contenders, runs, summary and report paths.
    """
    import torch

    from ..base.progress import progress_bar
    from .report import write_report

    s = settings or BenchSettings()
    out = Path(out)
    (out / "runs").mkdir(parents=True, exist_ok=True)
    torch.set_num_threads(s.threads or usable_cores())  # one per usable physical core by default
    pairs = load_pairs(labels, s.ignore_label)
    classes = n_classes(pairs, s.ignore_label)
    contenders = _contenders(encoders, s, pairs)
    s = dataclasses.replace(s, training_set=training_set(contenders, s))
    split = make_split(pairs, s)
    unit = "cube" if split.kind == "cubes" else "tile"
    if unit == "cube":  # 2-D and 3-D side by side: every contender says which it is
        for c in contenders:
            c.label = f"{c.label} ({_dims(c.spec)}-D)" if c.file else f"{c.label[:-1]}, {_dims(c.spec)}-D)"
    labs = [p.label for p in pairs]
    device = _device(s)
    planned = [(n, seed, c) for n in s.sizes for seed in range(s.replicates) for c in contenders]
    wanted = {(n, c.id): made_with(c, split, n, s.to_dict(), pairs, classes) for n in s.sizes for c in contenders}
    reusable = _reusable(out, planned, wanted)
    prepared: dict[str, list[np.ndarray]] = {}
    runs = []
    bar = progress_bar(planned, desc="bench runs", unit="run", disable=not progress)
    for n, seed, c in bar:
        path = out / "runs" / f"{c.id}-n{n}-s{seed}.json"
        if path in reusable:
            runs.append(reusable[path])
            continue
        if c.id not in prepared:
            prepared[c.id] = _prepared(c, pairs)
        keep = 3 if seed == 0 else 0
        r = _one_run(c, prepared[c.id], labs, split, n, seed, classes, s, device, keep)
        preds = r.pop("predictions", None)
        if preds is not None:
            np.savez_compressed(out / "runs" / f"{c.id}-n{n}-s{seed}-pred.npz", *preds)
        rec = {"contender": c.id, "size": n, "seed": seed, **r}
        write_json(path, {**rec, "made_with": wanted[(n, c.id)]})
        runs.append(rec)
        bar.set_postfix_str(f"{c.id}, {n} {unit}(s), replicate {seed}: test Dice {r['test_dice']:.3f}")
    for c in contenders:  # mismatch notes also when every run was reused
        if c.file and c.id not in prepared:
            _prepared(c, pairs)
    result = {
        "settings": s.to_dict(), "classes": classes, "device": str(device), "unit": unit,
        "labelled_voxels": {str(n): labelled_voxels(split, n, [p.label.shape for p in pairs]) for n in s.sizes},
        "labels": [{"name": p.name, "image": p.image_path, "label": p.label_path, "sha256": p.sha256,
                    "shape": list(p.image.shape)} for p in pairs],
        "split": split.to_dict(), "contenders": [c.to_dict() for c in contenders], "runs": runs,
        "summary": summarize(runs, contenders, s),
    }
    result["labels_saved"] = headline(runs, result["contenders"], list(s.sizes), unit=unit)
    result["recommendation"] = recommendation(runs, result["contenders"], list(s.sizes), unit=unit)
    result["report"] = write_report(out, result, pairs)
    return result


def _reusable(out: Path, planned: list[tuple[int, int, Contender]],
              wanted: dict[tuple[int, str], dict[str, Any]]) -> dict[Path, dict[str, Any]]:
    """The saved run records a rerun reuses (by path, ``made_with`` removed); the others of the
    planned runs are moved to ``runs/superseded/`` (:mod:`.run_records`) with a warning that says
    what changed."""
    keep: dict[Path, dict[str, Any]] = {}
    stale: list[Path] = []
    changed: dict[str, None] = {}  # ordered set of the reasons, in words
    for n, seed, c in planned:
        path = out / "runs" / f"{c.id}-n{n}-s{seed}.json"
        if not path.exists():
            continue
        try:
            old = json.loads(path.read_text())
            why = differences(old.pop("made_with", None), wanted[(n, c.id)])
        except (OSError, ValueError, AttributeError) as e:
            old, why = {}, [f"unreadable ({e})"]
        if why:
            stale += [path, path.with_name(f"{path.stem}-pred.npz")]
            changed.update(dict.fromkeys(why))
        else:
            keep[path] = {_RENAMED_FIGURES.get(k, k): v for k, v in old.items()}
    if stale:
        moved = set_aside(stale, out / "runs")
        records = sum(p.suffix == ".json" for p in stale)
        warnings.warn(f"{out}: {records} saved run(s) were made otherwise ({'; '.join(changed)}) and are run again; "
                      f"the old records are kept in {moved}", stacklevel=3)
    return keep


def _one_run(c: Contender, images: list[np.ndarray], labels: list[np.ndarray], split: Any, n: int, seed: int,
             classes: int, s: BenchSettings, device: Any, keep: int) -> dict[str, Any]:
    from .train import fine_tune

    try:
        return fine_tune(_model_factory(c, classes, s), images, labels, split, n, seed, classes, s, device, keep,
                         warm=c.file is not None)
    except WarmstartError:
        raise
    except RuntimeError as e:  # e.g. out of memory: name the run
        raise WarmstartError(f"bench run {c.id} n={n} seed={seed} failed: {e}") from e

