"""``warmstart demo``: generate the facility's archive and labelled set, then run every stage on them.

Stages: archive -> scan -> corpus build -> pretrain -> export -> inspect -> bench. Each stage
leaves its result in the output folder, and a rerun with the same folder reuses every finished
stage (an interrupted pretraining run resumes from its last checkpoint; finished bench runs are
kept one by one).

The 3-D variant (plans ``3d`` and ``3d-quick``) builds a cube corpus and a 2-D corpus of the same
archive, pretrains the 3-D network (an nnU-Net architecture) and the 2-D U-Net encoder, exports
both (the 3-D run also as the checkpoint nnU-Net loads), and benchmarks both warm starts against
random init on labelled cubes.
"""
from __future__ import annotations

import importlib.util
import json
import os
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from ..errors import WarmstartError

__all__ = ["DemoPlan", "PLANS", "run_demo"]


@dataclass(frozen=True)
class DemoPlan:
    """Sizes of one demo variant.

    Parameters
    ----------
    n_per_scanner : int
        Samples per instrument in the archive.
    shape : (Z, Y, X)
        Archive volume shape in voxels.
    labelled_n : int
        Labelled volumes (held out of the archive).
    labelled_shape : (Z, Y, X)
    recipe : str
        Shipped recipe with the corpus, pretrain and bench sections.
    overrides : tuple of str
        ``section.key=value`` items applied to the recipe (tests shrink the demo with these).
    recipe_2d : str, optional
        A 3-D demo's 2-D recipe: its corpus and pretraining make the 2-D warm start that the
        3-D benchmark compares with (``overrides`` apply to it as well).
    """

    n_per_scanner: int
    shape: tuple[int, int, int]
    labelled_n: int
    labelled_shape: tuple[int, int, int]
    recipe: str
    overrides: tuple[str, ...] = ()
    recipe_2d: str | None = None


PLANS = {
    "default": DemoPlan(2, (48, 128, 128), 4, (32, 128, 128), "demo"),
    "quick": DemoPlan(1, (32, 128, 128), 3, (24, 128, 128), "demo-quick"),
    # 3-D: the same archive; thicker labelled volumes, so that cubes of 48 voxels fit beside the test slabs.
    "3d": DemoPlan(2, (48, 128, 128), 3, (80, 128, 128), "demo-3d", recipe_2d="demo"),
    "3d-quick": DemoPlan(1, (32, 128, 128), 3, (80, 128, 128), "demo-3d-quick", recipe_2d="demo-quick"),
}


def _stage(root: Path, name: str) -> Path:
    return root / f".{name}.done"


def _check_plan(root: Path, plan: DemoPlan) -> None:
    """Refuse to mix variants in one folder: finished stages of another plan would be reused."""
    record = root / "demo-plan.json"
    # tuples as lists, as the file holds them; unset fields left out (a record written before they existed)
    mine = json.loads(json.dumps({k: v for k, v in plan.__dict__.items() if v is not None}))
    if record.exists():
        theirs = json.loads(record.read_text())
        if theirs != mine:
            raise WarmstartError(f"{root} holds a demo of another variant (recipe {theirs.get('recipe')!r}); "
                                 "choose another --out, or delete the folder to start afresh")
    else:
        record.write_text(json.dumps(mine, indent=1) + "\n")


def run_demo(out: str | os.PathLike[str] | None = None, *, quick: bool = False, dims: int = 2,
             plan: DemoPlan | None = None, progress: bool = True, echo: Callable[[str], Any] = print) -> dict[str, Any]:
    """Run the whole pipeline on generated data; rerunning with the same ``out`` reuses finished stages.

    Parameters
    ----------
    out : path, optional
        Folder that keeps everything (default: a new temporary folder).
    quick : bool
        The ``quick`` plan (a few minutes on 2 cores) instead of the ``default`` one.
    dims : {2, 3}
        3: the volumetric variant (plans ``3d`` and ``3d-quick``).
    plan : DemoPlan, optional
        Overrides ``quick`` and ``dims``.
    progress : bool
        Progress bars.
    echo : callable
        Where the stage lines and the final table go.

    Raises
    ------
    WarmstartError
        The ``demo`` extra is not installed (the message says what to install).

    Returns
    -------
    dict
        Paths (``archive``, ``labelled``, ``corpus``, ``run``, ``encoder``, ``card``, ``bench``,
        ``reports``; the 3-D variant adds ``corpus_3d``, ``run_3d``, ``encoder_3d``, ``card_3d``
        and ``nnunet``), the scan and build results, the pretraining summary, the bench summary,
        ``seconds`` and ``stage_seconds`` (the stages this call ran, not the reused ones).
    """
    missing = [m for m in ("torch", "torchvision", "lightly", "pytorch_lightning", "skimage")
               if importlib.util.find_spec(m) is None]
    if missing:
        raise WarmstartError(f"warmstart demo needs {', '.join(missing)}, which are not installed; "
                             "install them with: pip install 'warmstart[demo]'")
    from ..corpus.scan import scan_archive
    from ..recipe import load_recipe
    from .scenario import write_archive, write_labelled_set

    t0 = time.perf_counter()
    if dims not in (2, 3):
        raise WarmstartError(f"the demo is 2-D or 3-D, not {dims}-D")
    plan = plan or PLANS[{(2, False): "default", (2, True): "quick", (3, False): "3d", (3, True): "3d-quick"}[dims, quick]]
    three = plan.recipe_2d is not None
    root = Path(out) if out is not None else Path(tempfile.mkdtemp(prefix="warmstart-demo-"))
    root.mkdir(parents=True, exist_ok=True)
    recipe = load_recipe(plan.recipe, plan.overrides)
    recipe_2d = load_recipe(plan.recipe_2d, plan.overrides) if three else recipe
    _check_plan(root, plan)
    paths = {k: root / v for k, v in (("archive", "archive"), ("labelled", "labelled"), ("corpus", "corpus.zarr"),
                                      ("run", "run"), ("encoder", "encoder.safetensors"),
                                      ("card", "encoder-card.md"), ("bench", "bench"))}
    if three:
        paths.update({k: root / v for k, v in (("corpus_3d", "corpus-3d.zarr"), ("run_3d", "run-3d"),
                                               ("encoder_3d", "encoder-3d.safetensors"), ("card_3d", "encoder-3d-card.md"),
                                               ("nnunet", "nnunet-pretrained.pth"))})

    stage_seconds: dict[str, float] = {}

    def timed(label: str) -> Callable[[], None]:
        start = time.perf_counter()

        def done() -> None:
            stage_seconds[label] = round(time.perf_counter() - start, 1)
            echo(f"      ({label}: {stage_seconds[label]:.0f} s)")
        return done

    echo(f"warmstart demo: everything goes to {root} (recipe {plan.recipe})")
    if not _stage(root, "archive").exists():
        echo("[1/7] generating a shared facility's archive: a ceramics lab's filters on four micro-CT "
             "instruments (1, 2.5 and 6 µm voxels) and a battery group's FIB-SEM cathode stacks")
        done = timed("archive")
        write_archive(paths["archive"], n_per_scanner=plan.n_per_scanner, shape=plan.shape)
        echo("      and a labelled set of new filters (not in the archive) for the benchmark")
        write_labelled_set(paths["labelled"], n=plan.labelled_n, shape=plan.labelled_shape)
        done()
        _stage(root, "archive").write_text("ok\n")
    else:
        echo(f"[1/7] archive already there: {paths['archive']}")

    echo("[2/7] scanning the archive")
    done = timed("scan")
    scan = scan_archive(paths["archive"], recipe.corpus, progress=progress)
    for r in scan.rows:
        vs = "x".join("?" if v is None else f"{v:g}" for v in r.get("voxel_size_um", []))
        echo(f"      {r['name']:30s} {r['format']:8s} {r.get('dtype', ''):8s} voxel {vs} µm  {r['status']}")
    done()

    corpus = paths["corpus"]
    builds = [(paths["corpus_3d"], recipe, "3-D ")] if three else []
    builds.append((corpus, recipe_2d, "2-D " if three else ""))
    built = [_corpus_stage(paths["archive"], where, rec, kind, plan.recipe_2d if kind == "2-D " else plan.recipe,
                           progress, echo, timed, first=k == 0) for k, (where, rec, kind) in enumerate(builds)]
    build = built[0]
    from ..pretrain.methods import METHODS

    encoders = []
    if three:
        summary = _pretrain_stage(paths["corpus_3d"], paths["run_3d"], recipe.pretrain, progress, echo, timed, "3-D ")
    summary_2d = _pretrain_stage(corpus, paths["run"], recipe_2d.pretrain, progress, echo, timed, "2-D " if three else "",
                                 first=not three)
    if three:
        manifest = _export_stage(paths["run_3d"], paths["encoder_3d"], paths["card_3d"],
                                 METHODS[recipe.pretrain.method].trains_decoder, echo)
        _nnunet_stage(paths["run_3d"], paths["nnunet"], echo)
        encoders.append(paths["encoder_3d"])
    manifest_2d = _export_stage(paths["run"], paths["encoder"], paths["card"],
                                METHODS[recipe_2d.pretrain.method].trains_decoder, echo, first=not three)
    if not three:
        summary, manifest = summary_2d, manifest_2d
    encoders.append(paths["encoder"])
    bench = _bench_stage(paths["labelled"], encoders, paths["bench"], recipe.bench, progress, echo, timed)

    seconds = time.perf_counter() - t0
    reports = {"corpus": str(corpus / "report" / "summary.md"), "card": str(paths["card"]),
               "bench_md": bench["report"]["md"], "bench_html": bench["report"]["html"]}
    if three:
        reports.update(corpus_3d=str(paths["corpus_3d"] / "report" / "summary.md"), card_3d=str(paths["card_3d"]))
    echo("")
    echo(Path(bench["report"]["md"]).read_text().split("## In words")[0].strip())
    from ..bench.report import verdicts

    for v in verdicts(bench):
        echo(f"- {v}")
    echo("")
    echo("This is generated data: the demo shows the pipeline working end to end and what its report "
         "looks like; it proves nothing about your images. Run `warmstart bench` on your own labels.")
    if three:
        echo("The 3-D and 2-D warm starts are scored on the same test slabs after training on the same labelled "
             "cubes; which one wins here says nothing about which wins on your volumes.")
        echo(f"reports: 3-D corpus {reports['corpus_3d']}")
        echo(f"         3-D encoder card {reports['card_3d']}; nnU-Net checkpoint {paths['nnunet']}")
        echo(f"         2-D corpus {reports['corpus']}")
    else:
        echo(f"reports: corpus {reports['corpus']}")
    echo(f"         encoder card {reports['card']}")
    echo(f"         benchmark {reports['bench_html']} (and {reports['bench_md']})")
    echo(f"demo finished in {seconds:.0f} s")
    return {**{k: str(v) for k, v in paths.items()}, "reports": reports, "scan": scan.to_dict(), "build": build,
            "pretrain": summary, "encoder_manifest": manifest,
            **({"pretrain_2d": summary_2d, "build_2d": built[1]} if three else {}),
            "bench": bench["summary"], "seconds": round(seconds, 1),
            "stage_seconds": stage_seconds}


def _step(k: int, first: bool) -> str:
    """``[k/7]`` for a stage's first line, blanks of its width for the second variant's (3-D demo)."""
    return f"[{k}/7]" if first else "     "


def _corpus_stage(archive: Path, corpus: Path, recipe: Any, kind: str, name: str, progress: bool,
                  echo: Callable[[str], Any], timed: Callable[[str], Callable[[], None]], first: bool = True) -> dict[str, Any]:
    from ..corpus.build import build_corpus

    step = _step(3, first)
    if (corpus / "manifest.json").exists():
        echo(f"{step} {kind}corpus already built: {corpus}")
        manifest = json.loads((corpus / "manifest.json").read_text())
        build = {"path": str(corpus), "n_patches": manifest["patches"]["count"], "reused": True}
    else:
        echo(f"{step} building the {kind}corpus (recipe {name})")
        done = timed(f"{kind}corpus".strip())
        build = build_corpus(archive, corpus, recipe.corpus, progress=progress).to_dict()
        done()
    s = recipe.corpus.sampling
    what = f"cubes of {s.patch_size} voxels" if s.spatial_dims == 3 else f"patches of {s.patch_size} px"
    echo(f"      {build['n_patches']} {what}")
    return build


def _pretrain_stage(corpus: Path, run: Path, settings: Any, progress: bool, echo: Callable[[str], Any],
                    timed: Callable[[str], Callable[[], None]], kind: str = "", first: bool = True) -> dict[str, Any]:
    from ..pretrain.loop import pretrain

    step = _step(4, first)
    if (run / "summary.json").exists():
        echo(f"{step} {kind}pretraining already finished: {run}")
        return json.loads((run / "summary.json").read_text())
    resume = (run / "checkpoints" / "last.ckpt").exists()
    params = settings.encoder_params if settings.encoder != "nnunet" else \
        f"configuration {settings.encoder_params.get('configuration', '?')}"
    echo(f"{step} {'resuming' if resume else 'pretraining'} {kind}{settings.method} on a {settings.encoder} encoder "
         f"({params}), {settings.max_steps} steps of {settings.batch_size} pairs")
    done = timed(f"{kind}pretraining".strip())
    result = pretrain(corpus, run, settings, resume=resume, progress=progress)
    done()
    s = result.summary
    echo(f"      final loss {s['final_loss']:.3f}, embedding spread {s['final_spread']:.3f}")
    return s


def _export_stage(run: Path, encoder: Path, card: Path, with_decoder: bool, echo: Callable[[str], Any],
                  first: bool = True) -> dict[str, Any]:
    from ..export.card import model_card, summary_text
    from ..export.file import read_manifest
    from ..export.pack import export_encoder

    if encoder.exists():
        echo(f"{_step(5, first)} encoder already exported: {encoder}")
        manifest = read_manifest(encoder)
    else:
        what = "encoder and decoder" if with_decoder else "encoder"
        echo(f"{_step(5, first)} exporting the {what} with the intensity rule and corpus statistics to {encoder}")
        _, manifest = export_encoder(run, encoder, with_decoder=with_decoder)
    echo(f"{_step(6, first)} inspecting {encoder.name}")
    for line in summary_text(manifest).splitlines():
        echo(f"      {line}")
    card.write_text(model_card(manifest, title=encoder.name))
    return manifest


def _nnunet_stage(run: Path, out: Path, echo: Callable[[str], Any]) -> None:
    from ..export.nnunet_file import export_for_nnunet, read_nnunet_file

    if out.exists():
        echo(f"      nnU-Net checkpoint already exported: {out}")
        manifest = read_nnunet_file(out)[0]
    else:
        _, manifest = export_for_nnunet(run, out)
        echo(f"      exported the whole 3-D network as the checkpoint nnU-Net's -pretrained_weights option loads: {out}")
    decoder = (manifest.get("nnunet") or {}).get("decoder", "")
    if decoder:
        echo(f"      its decoder: {decoder}")


def _bench_stage(labelled: Path, encoders: list[Path], out: Path, settings: Any, progress: bool,
                 echo: Callable[[str], Any], timed: Callable[[str], Callable[[], None]]) -> dict[str, Any]:
    from ..bench.run import run_bench

    n = len(settings.sizes) * settings.replicates * 2 * len(encoders)
    finished = len(list((out / "runs").glob("*-n*-s*[0-9].json"))) if (out / "runs").exists() else 0
    what = "random init vs the warm start" if len(encoders) == 1 else \
        "3-D and 2-D warm starts vs random init of each, trained on the same labelled cubes"
    unit = "cubes" if settings.training_set == "cubes" else "tiles"
    echo(f"[7/7] benchmark on the held-out labelled filters: {what}, "
         f"{settings.sizes} {unit} x {settings.replicates} replicates ({n} fine-tuning runs, {min(finished, n)} already done)")
    done = timed("benchmark")
    result = run_bench(labelled, encoders, out, settings, progress=progress)
    done()
    return result
