"""Human-readable views of an encoder manifest: a terminal summary and a Markdown model card."""
from __future__ import annotations

from typing import Any, Mapping

__all__ = ["summary_text", "model_card", "intensity_line", "CLINICAL_CAUTION"]

CLINICAL_CAUTION = ("For research use only; not for diagnosis or treatment. Any clinical use is subject to local "
                    "regulation and must be overseen by qualified practitioners.")


def _um_range(r: Any) -> str:
    return "unknown" if not r else f"{r[0]:.4g}-{r[1]:.4g} µm"


def _formats(c: Mapping[str, Any], sep: str = " ") -> str:
    return ", ".join(f"{k}{sep}{n}" for k, n in sorted(c["formats"].items()))


def _modalities(c: Mapping[str, Any]) -> str:
    """Recorded modalities, and how many sources have none (neither the file nor the recipe said)."""
    mods = ", ".join(c["modalities"])
    missing = c.get("modality_unrecorded", 0)
    if not mods:
        return "not recorded (set corpus.read.modality in the recipe)"
    return mods + (f" ({missing} source(s) not recorded)" if missing else "")


def _fmt(x: Any, digits: int = 4) -> str:
    return "n/a" if x is None else (f"{x:.{digits}g}" if isinstance(x, float) else str(x))


def intensity_line(m: Mapping[str, Any]) -> str:
    """The manifest's intensity rule in words (scheme, values, fitted per volume or fixed)."""
    rule = m["intensity"]["rule"]
    scheme = rule["scheme"]
    if scheme == "percentile":
        what = f"percentiles {rule['percentiles'][0]:g} / {rule['percentiles'][1]:g} -> {rule['targets'][0]:g} / {rule['targets'][1]:g}"
    elif scheme == "zscore":
        what = f"z-score ({rule['zscore_method']})"
    elif scheme == "two_point":
        refs = rule.get("reference_values")
        what = (f"two-point: raw {refs[0]:g} / {refs[1]:g}" if refs else "two-point: the two main histogram modes") \
            + f" -> {rule['targets'][0]:g} / {rule['targets'][1]:g}"
    else:
        what = f"fixed window {rule['window'][0]:g} .. {rule['window'][1]:g} {rule.get('unit') or ''} -> {rule['targets'][0]:g} / {rule['targets'][1]:g}"
    how = "one fixed reference for all data" if m["intensity"]["fit"] == "fixed" else "fitted on each new volume"
    return f"{what} ({how})"


def _input_words(m: Mapping[str, Any]) -> str:
    """``1 channel(s), 3-D patches of 32x32x32 voxels (ZYX)`` or ``..., 2-D patches of 64 px``."""
    inp = m["input"]
    dims = int(inp.get("spatial_dims", 2))
    if dims == 3:
        shape = "x".join(str(n) for n in inp.get("patch_shape", [inp["patch_size"]] * 3))
        return f"{inp['channels']} channel(s), 3-D patches of {shape} voxels ({inp.get('axis_order', 'ZYX')})"
    return f"{inp['channels']} channel(s), 2-D patches of {inp['patch_size']} px"


def _decoder_line(m: Mapping[str, Any]) -> str:
    d, nn = m.get("decoder"), m.get("nnunet")
    if nn:
        return (f"decoder     {nn['decoder']}; the file holds nnU-Net's whole {nn['network_class_name'].rsplit('.', 1)[-1]} "
                f"(configuration {nn.get('configuration') or 'as recorded'}) for its -pretrained_weights option, "
                "which leaves out the segmentation layers")
    if d and d.get("kind") == "nnunet":
        return (f"decoder     nnU-Net's own decoder, {d['parameters']:,} parameters (without its segmentation layers): "
                "loads into the nnU-Net network of the same configuration")
    if d:
        return (f"decoder     U-Net decoder ({d['norm']} norm, {d['out_channels']} output channels), {d['parameters']:,} "
                "parameters: loads into warmstart.UNet and smp.Unet with the same widths and bilinear upsampling")
    return "decoder     none (encoder only)"


def summary_text(m: Mapping[str, Any]) -> str:
    """A few lines on what an encoder file holds (``warmstart inspect``)."""
    e, c, t, v = m["encoder"], m["corpus"], m["training"], m["voxel_size_um"]
    st = m["standardization"]
    stages = " ".join(f"{s['channels']}@{s['stride']}" for s in e["spec"]["stages"])
    rng = v.get("patch_range")
    d = m.get("decoder")
    # an nnU-Net file counts its whole network; an encoder file leaves its decoder out
    n_enc = m["tensors"]["parameters"] - (d["parameters"] if d and not m.get("nnunet") else 0)
    params = ", ".join(f"{k}={val}" for k, val in e["spec"]["params"].items() if k not in ("architecture", "library"))
    lines = [
        f"encoder     {e['spec']['name']} ({params}); {n_enc:,} parameters{' (whole network)' if m.get('nnunet') else ''}; "
        f"{e['weights']} weights",
        f"stages      {stages}  (channels@stride)",
        _decoder_line(m),
        f"input       {_input_words(m)}, voxel size {_um_range(rng)}",
        f"intensity   {intensity_line(m)}",
        f"standardize (x - {st['mean']:.5g}) / {st['std']:.5g}",
        f"corpus      {c['sources']} sources, {c['patches']:,} patches; formats: {_formats(c)}; "
        f"modalities: {_modalities(c)}",
        f"training    {t['method']}, {t['steps']} of {t['planned_steps']} steps"
        f"{'' if t['finished'] else ' (run not finished)'}; final loss {_fmt(t['final_loss'])}, "
        f"embedding spread {_fmt(t['final_spread'], 3)}, kNN {_fmt(t['knn_accuracy'], 3)}, {_fmt(t['seconds'])} s",
        f"tensors     {m['tensors']['count']}, sha256 {m['tensors']['sha256'][:16]}...",
        f"fingerprint {(m.get('digest') or {}).get('sha256', 'none (version 1 file: manifest not covered)')}",
        f"written by  warmstart {m['warmstart_version']} on {m['created']}",
    ]
    if c.get("clinical"):
        lines.append(f"caution     clinical data: {CLINICAL_CAUTION}")
    return "\n".join(lines)


def _shown_params(spec: Mapping[str, Any]) -> dict[str, Any]:
    """A spec's parameters without the bulky ones (an nnU-Net architecture entry is shown by name)."""
    p = dict(spec["params"])
    arch = p.pop("architecture", None)
    lib = p.pop("library", None)
    if arch:
        p["network"] = arch["network_class_name"].rsplit(".", 1)[-1]
    if lib:
        p["built with"] = f"{lib['name']} {lib['version']}"
    return p


def _context_words(m: Mapping[str, Any]) -> str:
    if int(m["input"].get("spatial_dims", 2)) == 3:
        return ("3-D encoder: it takes volumes (B, C, D, H, W) in Z, Y, X order with cubic voxels near the "
                "corpus cubes' size; a 2-D network cannot use it.")
    return f"2-D encoder: 3-D context enters only through {m['input']['channels']} adjacent slice(s)."


def model_card(m: Mapping[str, Any], title: str = "Encoder") -> str:
    """A Markdown model card: what the encoder was trained on, how to feed it, intended use,
    limitations (and the caution for clinical data)."""
    e, c, t, v = m["encoder"], m["corpus"], m["training"], m["voxel_size_um"]
    st = m["standardization"]
    rng = v.get("patch_range")
    src = v.get("source_range")
    prov = "\n".join(f"| {p['name']} | `{p['sha256'][:16]}` | {p['hash_kind']} |" for p in c["provenance"][:50])
    more = f"\n\n({len(c['provenance']) - 50} more sources in the manifest)" if len(c["provenance"]) > 50 else ""
    clinical = c.get("clinical") or any("CT" == mod or "MR" == mod for mod in c["modalities"])
    caution = f"\n\n**Caution.** {CLINICAL_CAUTION}" if clinical else \
        "\n\nResearch use. If you apply it to clinical data: " + CLINICAL_CAUTION
    nn_decoder = (m.get("decoder") or {}).get("kind") == "nnunet"
    decoder_use = ("\n\nThe file holds nnU-Net's own decoder too (without its segmentation layers): `warm_start` "
                   "loads it into the nnU-Net network of the same configuration." if nn_decoder else
                   "\n\nThe file holds the U-Net decoder too: `warmstart.UNet.from_file` and segmentation_models_pytorch's "
                   "`Unet` with the same decoder widths and `decoder_interpolation='bilinear'` load both; other networks "
                   "get the encoder alone (`warm_start`'s report says which)." if m.get("decoder") else "")
    from ..finetune import fine_tuning_lines

    fine_tuning = "\n".join(f"- {line}" for line in fine_tuning_lines(m.get("fine_tuning")))
    return f"""# {title}: {e['spec']['name']} pretrained with {t['method']}

A self-supervised image encoder trained by warmstart {m['warmstart_version']} on a facility's own
unlabeled images, meant as the warm start of a segmentation network (U-Net encoder).

## What it is

- Architecture: `{e['spec']['name']}` with {_shown_params(e['spec'])}; {m['tensors']['parameters']:,} parameters
  ({e['weights']} weights); feature maps (channels@stride): {', '.join(f"{s['channels']}@{s['stride']}" for s in e['spec']['stages'])}
- File integrity: sha256 of the tensors `{m['tensors']['sha256']}`; fingerprint of the whole file (manifest and
  tensors; compare it with the one the file's publisher gives) `{(m.get('digest') or {}).get('sha256', 'none')}`

## What it was trained on

- {c['sources']} volumes; file formats: {_formats(c, ': ')}; modalities: {_modalities(c)}
- {c['patches']:,} {_input_words(m)}{'' if int(m['input'].get('spatial_dims', 2)) == 3 else ', cut along ' + str(m['input']['axes'])}
- Source voxel sizes {_um_range(src)}; patch voxel sizes {_um_range(rng)}
- Training: {t['method']}, {t['steps']} steps (batch {t['batch_size']}, lr {t['lr']}), final loss {_fmt(t['final_loss'])},
  embedding spread {_fmt(t['final_spread'], 3)}, kNN accuracy {_fmt(t['knn_accuracy'], 3)}, {_fmt(t['seconds'])} s;
  {'finished' if t['finished'] else 'NOT finished: the file holds an intermediate state'}

## How to feed it

1. Intensity rule: {intensity_line(m)}.
2. Standardization: `(x - {st['mean']:.6g}) / {st['std']:.6g}`.
3. Voxel size near the patches' (see above), {m['input']['channels']} input channel(s).

`warmstart.prepare(array, file)` does 1 and 2 and warns when the result does not look like the corpus.

## Intended use

Initialization of the encoder{' and decoder' if m.get('decoder') else ''} of a segmentation network for images like the corpus's (same kind of
instrument, material and voxel size), fine-tuned on labelled data. Check the gain on your own
labelled data (`warmstart bench`) before relying on it.{decoder_use}

## Fine-tuning

{fine_tuning}

## Limitations

- Features were learned on {', '.join(c['modalities']) or 'the corpus'} data only; other modalities, materials or voxel
  sizes may transfer poorly.
- A self-supervised loss says little about segmentation quality; only a labelled benchmark does.
- {_context_words(m)}{caution}

## Provenance

| source | sha256 | hashed |
|---|---|---|
{prov}{more}
"""
