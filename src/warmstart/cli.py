"""The ``warmstart`` command line: a thin layer over the library (one function per command).

Exit status: 0 success; 1 an error the message explains; 2 bad usage; 3 finished but some
sources were skipped (listed in the output).
"""
from __future__ import annotations

import argparse
import json
import sys
from typing import Any, Sequence

__all__ = ["main", "build_parser"]

CLINICAL_CAUTION = (
    "caution: clinical images found. warmstart is for research use only and not for diagnosis; "
    "follow your local regulation and the advice of qualified practitioners."
)
EXIT_ERROR = 1


def _add_recipe_options(p: argparse.ArgumentParser, names: str = "smoke, cpu-lowres, ...",
                        example: str = "sampling.axes=ZYX", read_options: bool = True) -> None:
    """``--recipe`` and ``--set`` (and, for commands that read volumes, ``--rgb``/``--channel``)."""
    g = p.add_argument_group("recipe")
    g.add_argument("--recipe", metavar="FILE", help=f"recipe TOML file or shipped recipe name ({names})")
    g.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help=f"override any recipe key, e.g. --set {example} (repeatable)")
    if read_options:
        g.add_argument("--rgb", choices=["refuse", "luminance"], help="colour files: refuse (default) or convert to luminance")
        g.add_argument("--channel", type=int, metavar="N", help="channel to read from multi-channel files")


def _deprecated_alias(group: Any, old: str, new: str, **kwargs: Any) -> None:
    """Accept ``old`` as a hidden, deprecated spelling of option ``new`` (for one release; the README's
    changelog lists them), with a note on stderr each time it is used."""
    append = kwargs.pop("action", None) == "append"

    class _Warned(argparse.Action):
        def __call__(self, parser: Any, namespace: Any, values: Any, option_string: str | None = None) -> None:
            print(f"warmstart: note: {old} is now {new}; the old name works until the next release", file=sys.stderr)
            if append:
                values = [*(getattr(namespace, self.dest, None) or []), values]
            setattr(namespace, self.dest, values)

    group.add_argument(old, action=_Warned, help=argparse.SUPPRESS, **kwargs)


def _int_list(text: str) -> list[int]:
    """``1,4,16`` -> [1, 4, 16] (for list-valued shortcut flags)."""
    try:
        return [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated integers, got {text!r}") from None


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

    parser = argparse.ArgumentParser(
        prog="warmstart",
        description="Turn an archive of grayscale volumes into a self-supervised pretrained encoder.",
    )
    parser.add_argument("--version", action="version", version=f"warmstart {__version__}")
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress bars")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    scan = sub.add_parser("scan", help="list the volumes of an archive and what cannot be read",
                          description="Open every source of ARCHIVE and print a table of format, shape, dtype, "
                                      "voxel size and intensity range, with the files that cannot be used and why.")
    scan.add_argument("archive", metavar="ARCHIVE")
    scan.add_argument("--json", action="store_true", help="print the result as JSON")
    _add_recipe_options(scan)

    corpus = sub.add_parser("corpus", help="build, inspect and merge patch corpora")
    csub = corpus.add_subparsers(dest="corpus_command", metavar="ACTION", required=True)
    build = csub.add_parser("build", help="build a corpus store from an archive",
                            description="Normalize every volume of ARCHIVE, sample informative patches and write "
                                        "them with their provenance to the store CORPUS. Rerun to resume.")
    build.add_argument("archive", metavar="ARCHIVE")
    build.add_argument("-o", "--output", required=True, metavar="CORPUS", help="store folder (e.g. corpus.zarr)")
    _add_recipe_options(build)
    g = build.add_argument_group("common settings (shortcuts for --set)")
    g.add_argument("--patch-size", type=int, metavar="PX")
    g.add_argument("--axes", metavar="ZYX", help="slicing axes")
    g.add_argument("--channels", type=int, metavar="K", help="adjacent slices per patch (2.5-D)")
    g.add_argument("--target-voxel-um", type=float, metavar="UM", help="resample to this voxel size (micrometres)")
    g.add_argument("--scale-factor", type=float, metavar="F", help="downscale factor where no target / voxel size")
    g.add_argument("--scheme", choices=["percentile", "zscore", "two_point", "fixed"], help="intensity scheme")
    g.add_argument("--seed", type=int)
    g.add_argument("--workers", type=int, metavar="N",
                   help="processes that read and sample sources in parallel on this machine (corpus.workers); "
                        "the store is the same for any N")
    build.add_argument("--shard", metavar="I/N", help="build only shard I of N (merge shards with 'corpus merge')")
    build.add_argument("--fresh", action="store_true", help="delete an existing store at CORPUS first")
    build.add_argument("--no-report", action="store_true", help="skip writing report/")
    build.add_argument("--json", action="store_true", help="print the result as JSON")

    show = csub.add_parser("show", help="summarize a corpus and (re)write its report/")
    show.add_argument("corpus", metavar="CORPUS")
    show.add_argument("--no-report", action="store_true", help="only print, do not write report/")
    show.add_argument("--verify", action="store_true",
                      help="recompute every source's patch checksums (reads the whole store; chunk files are always checked)")
    show.add_argument("--json", action="store_true")

    pre = sub.add_parser("pretrain", help="pretrain an encoder on a corpus (self-supervised)",
                         description="Train an encoder with SimCLR, MoCo v2 or BYOL on the patches of CORPUS; the "
                                     "run folder RUN gets the resolved recipe, checkpoints, history.csv and summary.json.")
    pre.add_argument("corpus", metavar="CORPUS")
    pre.add_argument("-o", "--output", required=True, metavar="RUN", help="run folder")
    _add_recipe_options(pre, "smoke, cpu-lowres, gpu-resnet50-moco, ...", "pretrain.lr=3e-4", read_options=False)
    g = pre.add_argument_group("common settings (shortcuts for --set)")
    g.add_argument("--method", choices=["simclr", "moco_v2", "byol", "dense", "restore", "combined", "masked"])
    g.add_argument("--encoder", metavar="NAME", help="encoder architecture: resnet_narrow, resnet18, resnet34, resnet50, "
                   "unet, unet_residual, or PLANS.json:CONFIGURATION for the network an nnU-Net plans file describes "
                   "(e.g. nnUNetPlans.json:3d_fullres)")
    g.add_argument("--epochs", type=int)
    g.add_argument("--max-steps", type=int)
    g.add_argument("--batch-size", type=int)
    g.add_argument("--lr", type=float)
    g.add_argument("--seed", type=int)
    g.add_argument("--devices", help="Lightning devices: auto, N, or a list")
    g.add_argument("--strategy", help="Lightning strategy: auto, ddp, ...")
    g.add_argument("--accelerator", help="cpu, gpu or auto")
    g.add_argument("--precision", choices=["auto", "32-true", "16-mixed", "bf16-mixed"])
    g.add_argument("--loader-workers", dest="num_workers", type=int, metavar="N",
                   help="data-loader processes per device that read batches from the corpus while the model trains "
                        "(pretrain.num_workers; 0: read in the training process)")
    _deprecated_alias(g, "--num-workers", "--loader-workers", dest="num_workers", type=int)
    g.add_argument("--threads", type=int, metavar="N",
                   help="CPU threads torch uses for training (pretrain.threads; default: the usable physical cores)")
    g.add_argument("--deterministic", action="store_true", default=None, help="deterministic algorithms (identical reruns)")
    pre.add_argument("--resume", action="store_true", help="continue the run in RUN from its last checkpoint")
    pre.add_argument("--json", action="store_true")

    exp = sub.add_parser("export", help="write a run's encoder to one safetensors file with its manifest",
                         description="Write the encoder of the pretraining run RUN, with the corpus's intensity rule, "
                                     "standardization, corpus and training summary, to FILE (safetensors: no code runs "
                                     "when it is loaded).")
    exp.add_argument("run", metavar="RUN")
    exp.add_argument("-o", "--output", required=True, metavar="FILE", help="encoder file (e.g. encoder.safetensors)")
    exp.add_argument("--weights", choices=["auto", "online", "momentum"], default="auto",
                     help="momentum (EMA) copy of MoCo / BYOL, or the online one; auto: momentum where there is one")
    exp.add_argument("--checkpoint", metavar="CKPT", help="a checkpoint other than checkpoints/last.ckpt")
    exp.add_argument("--with-decoder", action="store_true",
                     help="also write the decoder the method trained (methods restore, combined and masked)")
    exp.add_argument("--for", dest="target", choices=["warmstart", "nnunet"], default="warmstart",
                     help="nnunet: write the checkpoint nnU-Net's -pretrained_weights option loads (a run of the "
                          "nnunet encoder: the whole network; its decoder as trained by restore, combined or masked, "
                          "else as nnU-Net initializes a new one); default: the safetensors encoder file")
    exp.add_argument("--seed", type=int, default=0, help="with --for nnunet: seed of the decoder's initialization")
    exp.add_argument("--json", action="store_true")

    inf = sub.add_parser("inflate", help="a 2-D nnU-Net encoder file as the 3-D checkpoint nnU-Net's -pretrained_weights loads",
                         description="Inflate the kernels of a 2-D encoder file of an nnU-Net network (pretrain --encoder "
                                     "PLANS.json:2d) into a 3-D configuration of the same plans, with the same stages "
                                     "and widths, and write the checkpoint nnU-Net's -pretrained_weights option "
                                     "loads. mean: each k x k kernel repeated along Z and divided by k; center: the "
                                     "2-D kernel in the middle plane, zeros elsewhere.")
    inf.add_argument("file", metavar="FILE", help="the 2-D encoder file")
    inf.add_argument("--plans", required=True, metavar="PLANS.json:CONFIGURATION",
                     help="the plans file and its 3-D configuration, e.g. nnUNetPlans.json:3d_fullres")
    inf.add_argument("-o", "--output", required=True, metavar="PTH", help="checkpoint to write (e.g. pretrained.pth)")
    inf.add_argument("--rule", choices=["mean", "center"], default="mean")
    inf.add_argument("--seed", type=int, default=0, help="seed of nnU-Net's initialization of the decoder")
    inf.add_argument("--json", action="store_true")

    ins = sub.add_parser("inspect", help="summarize an encoder file (and write its model card)",
                         description="Print what an encoder file holds: encoder, input contract, corpus and training.")
    ins.add_argument("file", metavar="FILE")
    ins.add_argument("--json", action="store_true", help="print the whole manifest as JSON")
    ins.add_argument("--card", metavar="MD", help="write a Markdown model card to MD")
    ins.add_argument("--verify", action="store_true", help="also check the tensors against the manifest's sha256 "
                     "(the manifest itself is always checked)")
    ins.add_argument("--expect-sha256", metavar="HEX",
                     help="refuse the file unless its fingerprint is HEX (the value its publisher gives; implies --verify)")

    bench = sub.add_parser("bench", help="few-shot segmentation: random init vs warm starts on labelled data",
                           description="Fine-tune the reference U-Net from random weights and from each encoder file "
                                       "on 1, 4, 16 labelled tiles (a tile: a square labelled crop of one slice) or, "
                                       "when any file is 3-D, labelled cubes (sub-volumes; 2-D files then train on the "
                                       "cubes' slices and every contender is tested on the same slabs), with "
                                       "replicates; report Dice with 95 % "
                                       "intervals, paired differences and their significance. Rerun to resume.")
    bench.add_argument("labels", metavar="LABELLED_SET",
                       help="the labelled set: a folder with images/ and labels/, or a TOML file listing image/label pairs")
    bench.add_argument("--encoder-file", dest="encoder_files", action="append", default=[], metavar="FILE",
                       help="an exported encoder file to compare with random initialization (repeatable)")
    _deprecated_alias(bench, "--encoder", "--encoder-file", dest="encoder_files", action="append")
    bench.add_argument("-o", "--output", required=True, metavar="OUT", help="report folder")
    _add_recipe_options(bench, "bench-cpu, bench-gpu, bench-cpu-3d, bench-gpu-3d", "bench.lr=3e-4", read_options=False)
    g = bench.add_argument_group("common settings (shortcuts for --set)")
    g.add_argument("--sizes", type=_int_list, metavar="N,N,...", help="training-set sizes in tiles or cubes, e.g. 1,4,16")
    g.add_argument("--cube-size", type=int, metavar="VOXELS", help="side of the training cubes (bench.cube_size)")
    g.add_argument("--replicates", type=int, metavar="N", help="fine-tuning runs per contender and size (bench.replicates)")
    _deprecated_alias(g, "--seeds", "--replicates", dest="replicates", type=int)
    g.add_argument("--threads", type=int, metavar="N",
                   help="CPU threads torch uses for each fine-tuning run (bench.threads)")
    g.add_argument("--epochs", type=int)
    bench.add_argument("--json", action="store_true")

    demo = sub.add_parser("demo", help="generate a demo archive and run the whole pipeline on it",
                          description="Generate a shared facility's archive (a ceramics lab's filter micro-CT on four "
                                      "instruments, a battery group's FIB-SEM cathode stacks; mixed formats and bit "
                                      "depths) and a held-out labelled set, then scan, build a corpus, pretrain, "
                                      "export, inspect and benchmark random init against the new encoder on 2 CPU "
                                      "cores (about 8 minutes; --quick about 3). With --3d: cubes, 3-D pretraining of "
                                      "an nnU-Net network, its export (also the checkpoint nnU-Net loads) and the 3-D "
                                      "benchmark against random init and a 2-D warm start on labelled cubes (under 20 "
                                      "minutes; with --quick under 6). Prints the comparison table and the "
                                      "report paths. Rerunning with the same --output reuses finished stages.")
    demo.add_argument("-o", "--output", metavar="DIR", help="keep everything in DIR (default: a temporary folder)")
    _deprecated_alias(demo, "--out", "--output", dest="output")
    demo.add_argument("--quick", action="store_true",
                      help="fewer volumes, a shorter pretraining and a smaller benchmark (1 and 4 tiles; with --3d 1 cube; 3 replicates)")
    demo.add_argument("--3d", dest="three_d", action="store_true",
                      help="the volumetric variant: 3-D corpus, pretraining and benchmark, beside a 2-D warm start")
    demo.add_argument("--json", action="store_true")

    merge = csub.add_parser("merge", help="merge shard stores into one")
    merge.add_argument("shards", nargs="+", metavar="SHARD")
    merge.add_argument("-o", "--output", required=True, metavar="CORPUS")
    merge.add_argument("--no-report", action="store_true")
    merge.add_argument("--json", action="store_true")
    return parser


_SHORTCUTS = {
    "patch_size": "sampling.patch_size", "axes": "sampling.axes", "channels": "sampling.channels",
    "target_voxel_um": "sampling.target_voxel_um", "scale_factor": "sampling.scale_factor",
    "scheme": "intensity.scheme", "seed": "sampling.seed", "workers": "workers",
    "rgb": "read.rgb", "channel": "read.channel",
}


def _overrides(args: argparse.Namespace, shortcuts: dict[str, str], prefix: str = "") -> list[str]:
    """``--set`` items plus the shortcut flags the user gave, as ``key=value`` overrides."""
    overrides = list(args.overrides)
    for attr, key in shortcuts.items():
        value = getattr(args, attr, None)
        if value is not None:
            overrides.append(f"{prefix}{key}={json.dumps(value)}")
    return overrides


def _recipe(args: argparse.Namespace) -> Any:
    from .recipe import load_recipe

    return load_recipe(args.recipe, _overrides(args, _SHORTCUTS))


def _print_json(data: Any) -> None:
    print(json.dumps(data, indent=1, default=str))


def _fmt_vs(v: Sequence[float | None]) -> str:
    return "x".join("?" if x is None else f"{x:.3g}" for x in v)


def _table(rows: list[list[str]]) -> str:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def cmd_scan(args: argparse.Namespace) -> int:
    from .corpus.scan import scan_archive

    result = scan_archive(args.archive, _recipe(args).corpus, progress=not args.quiet)
    if args.json:
        _print_json(result.to_dict())
    else:
        rows = [["source", "format", "shape (ZYX)", "dtype", "voxel µm (ZYX)", "p0.5..p99.5", "status"]]
        for r in result.rows:
            if r["status"] == "ok":
                rows.append([r["name"], r["format"], "x".join(map(str, r["shape"])), r["dtype"], _fmt_vs(r["voxel_size_um"]),
                             f"{r['range'][0]:.4g}..{r['range'][1]:.4g}", "ok"])
            else:
                shape = "x".join(map(str, r["shape"])) if "shape" in r else ""
                vs = _fmt_vs(r["voxel_size_um"]) if "voxel_size_um" in r else ""
                rows.append([r["name"], r["format"], shape, r.get("dtype", ""), vs, "", "FAILED"])
        print(_table(rows))
        for r in result.rows:
            if r["status"] != "ok":
                print(f"cannot use {r['name']}: {r['reason']}")
        if result.ignored:
            print(f"{len(result.ignored)} other file(s) ignored (not an image format), e.g. {result.ignored[0]['path']}")
    if any(r.get("clinical") for r in result.rows):
        print(CLINICAL_CAUTION, file=sys.stderr)
    return 3 if result.n_failed else 0


def cmd_corpus_build(args: argparse.Namespace) -> int:
    from .corpus.build import build_corpus

    recipe = _recipe(args)
    result = build_corpus(args.archive, args.output, recipe.corpus, shard=args.shard, fresh=args.fresh,
                          report=not args.no_report, progress=not args.quiet)
    if args.json:
        _print_json(result.to_dict())
    else:
        print(f"{result.path}: {result.n_patches} patches from {result.n_sources - len(result.failed)} of "
              f"{result.n_sources} sources in {result.seconds:.1f} s"
              + (f" ({result.resumed} sources kept from an interrupted run)" if result.resumed else ""))
        for name, reason in result.failed:
            print(f"skipped {name}: {reason}")
        _print_source_warnings(result.path)
        if not args.no_report:
            print(f"report: {result.path / 'report' / 'summary.md'}")
    _caution_if_clinical(result.path)
    return result.exit_code


def _print_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int, file: Any = None,
                   line: str | None = None) -> None:
    """:func:`warnings.showwarning` for the command line: ``warning: MESSAGE`` on standard error."""
    print(f"warning: {message}", file=file or sys.stderr)


def _print_source_warnings(path: Any) -> None:
    """Per-source warnings of a finished store (upsampling, missing chunks, overflow, ...)."""
    from pathlib import Path

    m = Path(path) / "manifest.json"
    if m.exists():
        for e in json.loads(m.read_text()).get("sources", []):
            for w in e.get("warnings") or []:
                print(f"warning: {e['name']}: {w}")


def _caution_if_clinical(path: Any) -> None:
    from pathlib import Path

    m = Path(path) / "manifest.json"
    if m.exists() and json.loads(m.read_text()).get("clinical"):
        print(CLINICAL_CAUTION, file=sys.stderr)


def cmd_corpus_show(args: argparse.Namespace) -> int:
    from .corpus.report import SUMMARY_COLUMNS, summary_cells, summary_rows, write_report
    from .corpus.store import open_corpus

    store = open_corpus(args.corpus)
    m = store.manifest
    damaged = store.verify() if args.verify else []
    unchecked = store.unchecked_sources() if args.verify else []
    if damaged:
        for line in damaged:
            print(f"warmstart: error: {store.path}: {line}", file=sys.stderr)
        return EXIT_ERROR
    report = None if args.no_report else write_report(store.path, progress=not args.quiet)
    if args.json:
        _print_json({"patches": m["patches"], "counts": m["counts"], "statistics": {k: v for k, v in m["statistics"].items() if k != "histogram"},
                     "sources": summary_rows(m), "report": None if report is None else str(report),
                     **({"verify": {"damaged": damaged, "unchecked": unchecked}} if args.verify else {})})
    else:
        st, c = m["statistics"], m["counts"]
        kind = "3-D cubes (ZYX)" if store.spatial_dims == 3 else "patches"
        print(f"{store.path}: {m['patches']['count']} {kind} {m['patches']['shape']} ({m['patches']['encoding']['dtype']}), "
              f"{c['sources_ok']} sources used, {c['sources_failed']} skipped")
        if st["mean"] is not None:
            print(f"normalized values: mean {st['mean']:.4f}, std {st['std']:.4f}")
        rows = [list(SUMMARY_COLUMNS)] + [summary_cells(r) for r in summary_rows(m) if r["status"] == "ok"]
        print(_table(rows))
        for r in summary_rows(m):
            if r["status"] != "ok":
                print(f"skipped {r['name']}: {r['reason']}")
        if report is not None:
            print(f"report: {report / 'summary.md'}")
        if args.verify:
            for name in unchecked:
                print(f"note: {name}: no checksum recorded (store built by an older warmstart): unchecked")
            print(f"verified: the patches of {c['sources_ok'] - len(unchecked)} of {c['sources_ok']} sources match "
                  "their recorded sha256")
    _caution_if_clinical(store.path)
    return 0


def cmd_corpus_merge(args: argparse.Namespace) -> int:
    from .corpus.merge import merge_corpora
    from .corpus.store import open_corpus

    out = merge_corpora(args.shards, args.output, report=not args.no_report, progress=not args.quiet)
    m = open_corpus(out).manifest
    if args.json:
        _print_json({"path": str(out), "patches": m["patches"]["count"], "counts": m["counts"], "warnings": m.get("warnings", [])})
    else:
        print(f"{out}: {m['patches']['count']} patches from {m['counts']['sources_ok']} sources ({len(args.shards)} shards)")
        for w in m.get("warnings", []):
            print(f"warning: {w}")
    return 0


_PRETRAIN_SHORTCUTS = {
    "method": "method", "encoder": "encoder", "epochs": "epochs", "max_steps": "max_steps", "batch_size": "batch_size",
    "lr": "lr", "seed": "seed", "devices": "devices", "strategy": "strategy", "accelerator": "accelerator",
    "precision": "precision", "num_workers": "num_workers", "threads": "threads", "deterministic": "deterministic",
}


def cmd_pretrain(args: argparse.Namespace) -> int:
    from .recipe import load_recipe

    from .pretrain.settings import encoder_option

    overrides = _overrides(args, _PRETRAIN_SHORTCUTS, "pretrain.")
    if args.encoder:
        name, params = encoder_option(args.encoder)
        if params:  # PLANS.json:CONFIGURATION: the nnU-Net network of that configuration
            table = ", ".join(f"{k} = {json.dumps(v)}" for k, v in params.items())
            overrides += [f"pretrain.encoder={json.dumps(name)}", f"pretrain.encoder_params={{ {table} }}"]
    recipe = load_recipe(args.recipe, overrides, default_section="pretrain")
    try:
        from .pretrain.loop import pretrain  # imports torch: only this command pays for it
    except ImportError as err:
        print(f"warmstart: error: pretraining needs torch, torchvision, lightly and pytorch-lightning ({err}); "
              "install them with: pip install 'warmstart[train]' (from a clone: pip install -e '.[train]')", file=sys.stderr)
        return EXIT_ERROR

    result = pretrain(args.corpus, args.output, recipe.pretrain, resume=args.resume, progress=not args.quiet)
    if args.json:
        _print_json({"path": str(result.path), **result.summary})
    else:
        loss = "n/a" if result.final_loss is None else f"{result.final_loss:.4f}"
        print(f"{result.path}: {result.steps} steps of {recipe.pretrain.method} on {recipe.pretrain.encoder}, "
              f"final loss {loss}, {result.summary.get('seconds')} s")
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    try:
        from .export.pack import export_encoder  # imports torch to read the checkpoint
        from .pretrain.networks import record_networks
    except ImportError as err:
        print(f"warmstart: error: export needs torch ({err}); install it with: pip install 'warmstart[train]'", file=sys.stderr)
        return EXIT_ERROR
    record_networks(args.run, args.checkpoint)  # runs made before networks.json existed
    if args.target == "nnunet":
        from .errors import ExportError
        from .export.nnunet_file import export_for_nnunet

        if args.with_decoder:
            raise ExportError("--for nnunet writes nnU-Net's whole network, with the decoder the run trained where it "
                              "trained one: leave out --with-decoder")
        path, m = export_for_nnunet(args.run, args.output, weights=args.weights, checkpoint=args.checkpoint,
                                    seed=args.seed)
    else:
        path, m = export_encoder(args.run, args.output, weights=args.weights, checkpoint=args.checkpoint,
                                 with_decoder=args.with_decoder)
    if args.json:
        _print_json({"path": str(path), "manifest": m})
    else:
        from .export.card import summary_text

        from .finetune import fine_tuning_lines

        print(f"{path}: {m['tensors']['count']} tensors, {path.stat().st_size / 1e6:.1f} MB")
        print(summary_text(m))
        for line in fine_tuning_lines(m.get("fine_tuning")):
            print(f"fine-tuning: {line}")
    if m["corpus"].get("clinical"):
        print(CLINICAL_CAUTION, file=sys.stderr)
    return 0


def cmd_inflate(args: argparse.Namespace) -> int:
    from .errors import ExportError
    from .export.nnunet_file import inflate_for_nnunet
    from .finetune import NNUNET_LINE

    plans, sep, configuration = args.plans.rpartition(":")
    if not sep or not plans or not configuration:
        raise ExportError(f"--plans {args.plans}: give the plans file and its 3-D configuration, e.g. "
                          "nnUNetPlans.json:3d_fullres")
    path, m = inflate_for_nnunet(args.file, plans, configuration, args.output, rule=args.rule, seed=args.seed)
    if args.json:
        _print_json({"path": str(path), "manifest": m})
    else:
        print(f"{path}: {m['inflated']['kernels']} kernels of {args.file} inflated ({args.rule}) into "
              f"{configuration}; {m['tensors']['count']} tensors")
        print(f"train with: {NNUNET_LINE.replace('pretrained.pth', str(path))}")
    if m["corpus"].get("clinical"):
        print(CLINICAL_CAUTION, file=sys.stderr)
    return 0


def cmd_inspect(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .errors import ExportError
    from .export.card import model_card, summary_text
    from .export.file import read_encoder_file, read_manifest

    from .export.nnunet_file import is_nnunet_file

    verify = args.verify or bool(args.expect_sha256)
    if is_nnunet_file(args.file):  # a file for nnU-Net (torch checkpoint): reading it needs torch
        from .export.nnunet_file import read_nnunet_file

        m = read_nnunet_file(args.file, verify=verify)[0]
    else:
        m = read_encoder_file(args.file)[0] if verify else read_manifest(args.file)
    if args.expect_sha256:
        got = (m.get("digest") or {}).get("sha256")
        if got != args.expect_sha256.strip().lower():
            raise ExportError(f"{args.file}: fingerprint {got} is not the expected {args.expect_sha256}: this is not the "
                              "file its publisher released (or it was changed since)")
    if args.card:
        card = Path(args.card)
        if card.is_dir():
            raise ExportError(f"{card}: is a folder; give the card's file name, e.g. {card / 'encoder-card.md'}")
        card.parent.mkdir(parents=True, exist_ok=True)
        card.write_text(model_card(m, Path(args.file).stem))
    if args.json:
        _print_json(m)
    else:
        print(summary_text(m))
        if verify:
            print("verified    manifest and tensors match their sha256" +
                  (" and the expected fingerprint" if args.expect_sha256 else ""))
        if args.card:
            print(f"model card: {args.card}")
    if m["corpus"].get("clinical"):
        print(CLINICAL_CAUTION, file=sys.stderr)
    return 0


_BENCH_SHORTCUTS = {"sizes": "sizes", "replicates": "replicates", "epochs": "epochs", "threads": "threads",
                    "cube_size": "cube_size"}


def cmd_bench(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .recipe import load_recipe

    recipe = load_recipe(args.recipe, _overrides(args, _BENCH_SHORTCUTS, "bench."), default_section="bench")
    try:
        from .bench.run import run_bench
    except ImportError as err:
        print(f"warmstart: error: bench needs torch ({err}); install it with: pip install 'warmstart[train]'", file=sys.stderr)
        return EXIT_ERROR
    from .bench.report import verdicts

    result = run_bench(args.labels, args.encoder_files, args.output, recipe.bench, progress=not args.quiet)
    if args.json:
        _print_json({"summary": result["summary"], "report": result["report"]})
    else:
        print(Path(result["report"]["md"]).read_text().split("## In words")[0].strip())
        for v in verdicts(result):
            print(f"- {v}")
        print(f"report: {result['report']['html']}")
    if any(c["leakage"] for c in result["contenders"]):
        print("warning: some encoders were tested on data seen in pretraining (see the report)", file=sys.stderr)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo.run import run_demo

    echo = (lambda _line: None) if args.json else print
    result = run_demo(args.output, quick=args.quick, dims=3 if args.three_d else 2, progress=not args.quiet, echo=echo)
    if args.json:
        _print_json(result)
    return 0


def describe_os_error(err: OSError) -> str:
    """An operating-system error in words: the path, what went wrong, what to do."""
    import errno

    where = err.filename or "an output file"
    if err.errno == errno.ENOSPC:
        return (f"{where}: no space left on device; free some space and rerun the same command (finished work "
                "is kept and the run resumes)")
    if err.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        return f"{where}: permission denied (or a read-only file system); choose an output you can write to"
    if err.errno == errno.ENOTDIR:
        return f"{where}: a path component is a file, not a folder"
    if err.errno == errno.EISDIR:
        return f"{where}: is a folder where a file was expected"
    if err.errno == errno.EEXIST:
        return f"{where}: exists and is not a folder"
    return f"{where}: {err.strerror or err}"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    args = build_parser().parse_args(argv)
    import logging

    # File names that are not valid UTF-8 (kept by Python as surrogate escapes) print as escapes
    # instead of stopping the command.
    for stream in (sys.stdout, sys.stderr):
        if hasattr(stream, "reconfigure"):
            stream.reconfigure(errors="backslashreplace")

    from .errors import WarmstartError

    # tifffile logs its own complaint before raising; our error message already names the file.
    logging.getLogger("tifffile").setLevel(logging.CRITICAL)
    # Lightning's start-up chatter (accelerators found, advertisement tips) on every command: the
    # rank_zero loggers themselves, as Lightning resets its package logger's level on import.
    # Its warnings still show.
    for name in ("pytorch_lightning.utilities.rank_zero", "lightning_fabric.utilities.rank_zero",
                 "lightning.pytorch.utilities.rank_zero"):
        logging.getLogger(name).setLevel(logging.WARNING)
    # timm (imported by lightly and by dynamic-network-architectures, which pins timm < 1.0.23)
    # warns about a torch API it uses on import: a library's note to its own developers.
    import warnings

    warnings.filterwarnings("ignore", message=r".*torch\.jit\.interface.*deprecated", category=FutureWarning)

    handlers = {"scan": cmd_scan, "demo": cmd_demo, "pretrain": cmd_pretrain, "export": cmd_export, "bench": cmd_bench,
                "inspect": cmd_inspect, "inflate": cmd_inflate, ("corpus", "build"): cmd_corpus_build, ("corpus", "show"): cmd_corpus_show,
                ("corpus", "merge"): cmd_corpus_merge}
    key = (args.command, args.corpus_command) if args.command == "corpus" else args.command
    # The library's warnings (a bench rerun that makes runs again, data unlike an encoder file's,
    # ...) print as one "warning: ..." line, as the per-source warnings do: not with the Python
    # file and source line they were raised from, which reads like a traceback.
    shown = warnings.showwarning
    warnings.showwarning = _print_warning
    try:
        return handlers[key](args)
    except WarmstartError as err:
        print(f"warmstart: error: {err}", file=sys.stderr)
        return EXIT_ERROR
    except OSError as err:  # the disk, not the program: say which path and what, keep what was finished
        print(f"warmstart: error: {describe_os_error(err)}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("warmstart: interrupted; rerun the same command to resume", file=sys.stderr)
        return 130
    finally:
        warnings.showwarning = shown
