"""Loading an encoder file: rebuild our encoder, or warm-start someone else's network."""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import ExportError, WeightsMismatchError
from .file import read_encoder_file
from .layouts import LAYOUTS, Layout, family
from .manifest import spatial_dims

__all__ = ["load_encoder", "warm_start", "WarmStartReport", "adapt_input_channels", "split_parts", "placed_keys"]

DECODER_PREFIX = "decoder."


def split_parts(arrays: dict[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    """A file's tensors split into the encoder's and the decoder's (keys ``decoder.*``, kept whole)."""
    enc = {k: v for k, v in arrays.items() if not k.startswith(DECODER_PREFIX)}
    dec = {k: v for k, v in arrays.items() if k.startswith(DECODER_PREFIX)}
    return enc, dec


def load_encoder(file: str | os.PathLike[str], device: str = "cpu") -> Any:
    """Rebuild the encoder of a file with its weights.

    Parameters
    ----------
    file : path
        An encoder file written by ``warmstart export``.
    device : str
        Where to put the weights.

    Returns
    -------
    torch.nn.Module
        ``forward(x)`` returns the stage feature maps; ``.spec`` is its EncoderSpec and
        ``.manifest`` the file's manifest. The module is in training mode, as for fine-tuning.

    Raises
    ------
    ExportError
        Bad hash, unknown manifest version, missing or extra tensors, or wrong shapes (the
        message names them).
    """
    import torch

    from ..encoders import encoder_from_spec

    manifest, arrays = read_encoder_file(file)
    arrays, _ = split_parts(arrays)  # a decoder the file may hold is for warm_start
    try:
        enc = encoder_from_spec(manifest["encoder"]["spec"])
    except ValueError as e:
        raise ExportError(f"{file}: the manifest's encoder cannot be built: {e}") from e
    want = {k: tuple(v.shape) for k, v in enc.state_dict().items()}
    missing = sorted(set(want) - set(arrays))
    extra = sorted(set(arrays) - set(want))
    wrong = [f"{k} {tuple(arrays[k].shape)} (expected {want[k]})" for k in sorted(set(want) & set(arrays))
             if tuple(arrays[k].shape) != want[k]]
    problems = ([f"missing tensors: {', '.join(missing[:5])}{' ...' if len(missing) > 5 else ''}"] if missing else []) + \
               ([f"unexpected tensors: {', '.join(extra[:5])}{' ...' if len(extra) > 5 else ''}"] if extra else []) + \
               ([f"wrong shapes: {', '.join(wrong[:5])}"] if wrong else [])
    if problems:
        raise ExportError(f"{file}: the tensors do not fit encoder {manifest['encoder']['spec']['name']!r}: " + "; ".join(problems))
    enc.load_state_dict({k: torch.from_numpy(np.array(v)) for k, v in arrays.items()}, strict=True)
    enc.manifest = manifest
    return enc.to(device)


def adapt_input_channels(weight: Any, channels: int) -> Any:
    """Adapt a first-convolution weight (O, I, kH, kW), or (O, I, kD, kH, kW) in 3-D, to
    ``channels`` input channels.

    The rule the common libraries use (timm's ``adapt_input_conv``, segmentation_models_pytorch's
    ``patch_first_conv``): to one channel, sum the kernels over the input channels (a grayscale
    image fed as I equal channels gives the same response); to k channels, repeat the I kernels
    cyclically, keep the first k, and scale by I / k (so an image repeated over the k channels
    gives the same response as over the I channels).
    """
    o, i = weight.shape[:2]
    if channels == i:
        return weight.clone()
    dtype = weight.dtype
    w = weight.float()
    if channels == 1:
        w = w.sum(dim=1, keepdim=True)
    else:
        reps = (1, math.ceil(channels / i)) + (1,) * (w.dim() - 2)
        w = w.repeat(*reps)[:, :channels] * (i / channels)
    return w.to(dtype)


@dataclass
class WarmStartReport:
    """What :func:`warm_start` did.

    Attributes
    ----------
    file, layout : str
    loaded : list of str
        Target keys filled from the file.
    missing : list of str
        Target keys of the encoder part that the file had nothing for.
    unexpected : list of str
        Our tensors with no place in the target.
    mismatched : list of (str, tuple, tuple)
        Target key, our shape, the target's shape.
    adapted : list of str
        First-convolution weights adapted to another channel count (see :func:`adapt_input_channels`).
    zero_filled : list of str
        Target convolution biases set to zero because our convolution has none (exactly
        equivalent: the biases were absent in training).
    untouched : int
        Target keys outside what was loaded (decoder, head), left as they were.
    applied : bool
        Whether anything was copied (not when ``strict`` refused).
    decoder : list of str
        Target keys filled from the file's decoder (empty when the file has none or it was not
        loaded).
    decoder_note : str
        What happened to the file's decoder: loaded, not used and why, or "" (the file has none).
    inflated : list of str
        Target keys filled with a 2-D kernel inflated to 3-D (``inflate=``, :mod:`.inflate`).
    """

    file: str
    layout: str
    loaded: list[str] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)
    unexpected: list[str] = field(default_factory=list)
    mismatched: list[tuple[str, tuple[int, ...], tuple[int, ...]]] = field(default_factory=list)
    adapted: list[str] = field(default_factory=list)
    zero_filled: list[str] = field(default_factory=list)
    untouched: int = 0
    applied: bool = False
    hint: str = ""
    decoder: list[str] = field(default_factory=list)
    decoder_note: str = ""
    inflated: list[str] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        """Every tensor placed and every encoder key of the target filled."""
        return not (self.missing or self.unexpected or self.mismatched)

    def __str__(self) -> str:
        def few(xs: list[Any]) -> str:
            return ", ".join(str(x) for x in xs[:4]) + (f" ... ({len(xs)} in all)" if len(xs) > 4 else "")

        lines = [f"warm start from {self.file} (layout {self.layout}): {len(self.loaded)} tensors loaded"
                 + ("" if self.applied else " - NOT applied")]
        if self.inflated:
            lines.append(f"  2-D kernels inflated to 3-D: {few(self.inflated)}")
        if self.adapted:
            lines.append(f"  input channels adapted: {few(self.adapted)}")
        if self.zero_filled:
            lines.append(f"  biases set to zero: {few(self.zero_filled)}")
        if self.mismatched:
            lines.append("  shape mismatches: " + few([f"{k} ours {a} theirs {b}" for k, a, b in self.mismatched]))
        if self.missing:
            lines.append(f"  encoder keys of the network with nothing in the file: {few(self.missing)}")
        if self.unexpected:
            lines.append(f"  tensors of the file with no place in the network: {few(self.unexpected)}")
        if self.decoder_note:
            lines.append(f"  decoder: {self.decoder_note}")
        lines.append(f"  {self.untouched} keys outside {'encoder and decoder' if self.decoder else 'the encoder'} "
                     "left as they were")
        if self.hint and not self.complete:
            lines.append(f"  hint: {self.hint}")
        return "\n".join(lines)


Plan = tuple[WarmStartReport, dict[str, Any]]  # the report, and the tensors to copy by target key


def _inflated(src: Any, target: Any, inflate: str | None) -> Any:
    """``src`` inflated to the target's 3-D kernel depth when it is a 2-D kernel of the same
    spatial size and ``inflate`` is set; otherwise ``src`` itself."""
    from .inflate import inflate_kernel

    if inflate and src.ndim == 4 and target.ndim == 5 and tuple(src.shape[2:]) == tuple(target.shape[3:]):
        return inflate_kernel(src, int(target.shape[2]), inflate)
    return src


def _plan(layout: Layout, ours: dict[str, Any], theirs: dict[str, Any], first_conv: str, file: str,
          inflate: str | None = None) -> Plan:
    import torch

    rep = WarmStartReport(str(file), layout.name)
    copy: dict[str, Any] = {}
    first = first_conv + ".weight"
    # Networks that register their first convolution twice (nnU-Net's conv and all_modules.0) hold
    # two keys for it: both are adapted alike.
    firsts = {k for k, v in ours.items() if k == first or (first in ours and np.shape(v) == np.shape(ours[first])
                                                            and np.array_equal(v, ours[first]))}
    for k, v in ours.items():
        tk = layout.map_key(k)
        if tk is None or tk not in theirs:
            rep.unexpected.append(k)
            continue
        t = theirs[tk]
        src = torch.as_tensor(v)
        if inflate and src.ndim == 4 and t.ndim == 5:
            src = _inflated(src, t, inflate)
            if src.ndim == 5:
                rep.inflated.append(tk)
        if tuple(src.shape) != tuple(t.shape):
            if k in firsts and src.ndim in (4, 5) and src.shape[0] == t.shape[0] and src.shape[2:] == t.shape[2:]:
                src = adapt_input_channels(src, int(t.shape[1]))
                rep.adapted.append(f"{tk} {int(v.shape[1])} -> {int(t.shape[1])} channels")
            else:
                rep.mismatched.append((tk, tuple(src.shape), tuple(t.shape)))
                continue
        copy[tk] = src.to(t.dtype)
        rep.loaded.append(tk)
    order = {k: i for i, k in enumerate(theirs)}  # report in the network's own order: the first mismatch first
    rep.mismatched.sort(key=lambda m: order.get(m[0], len(order)))
    rep.loaded.sort(key=lambda k: order.get(k, len(order)))
    region = [k for k in theirs if layout.in_encoder(k)]
    loaded = set(rep.loaded)
    misshapen = {m[0] for m in rep.mismatched}
    for k in region:
        if k in loaded:
            continue
        if k.endswith(".bias") and k[:-5] + ".weight" in loaded and theirs[k].ndim == 1 \
                and theirs[k[:-5] + ".weight"].ndim in (4, 5):
            copy[k] = torch.zeros_like(theirs[k])
            rep.zero_filled.append(k)
        elif k not in misshapen:
            rep.missing.append(k)
    rep.untouched = len(theirs) - len(region)
    rep.hint = layout.hint
    return rep, copy


def _plan_decoder(layout: Layout, dec: dict[str, Any], theirs: dict[str, Any], model: Any,
                  inflate: str | None = None) -> tuple[dict[str, Any], str]:
    """(tensors to copy by target key, note): all or nothing, an exact match only (after
    inflation, with ``inflate``)."""
    import torch

    if layout.decoder is None:
        return {}, f"not loaded: layout {layout.name!r} has no place for warmstart's U-Net decoder (the encoder alone was loaded)"
    mapping = layout.decoder.map_keys(list(dec))
    if inflate:
        dec = {k: _inflated(torch.as_tensor(v), theirs[mapping[k]], inflate) if mapping.get(k) in theirs else v
               for k, v in dec.items()}
    problems = [f"no place for {k}" for k in dec if k not in mapping]
    problems += [f"the network has no {mapping[k]}" for k in dec if k in mapping and mapping[k] not in theirs]
    problems += [f"{mapping[k]} ours {tuple(dec[k].shape)} theirs {tuple(theirs[mapping[k]].shape)}" for k in dec
                 if k in mapping and mapping[k] in theirs and tuple(dec[k].shape) != tuple(theirs[mapping[k]].shape)]
    filled = set(mapping.values())
    problems += [f"the network's {k} has nothing in the file" for k in theirs if layout.decoder.in_decoder(k) and k not in filled]
    reason = layout.decoder.check(model)
    if reason:
        problems.insert(0, reason)
    if problems:
        more = f" ... ({len(problems)} problems)" if len(problems) > 3 else ""
        return {}, "not loaded, the network's decoder differs from the file's: " + "; ".join(problems[:3]) + more
    copy = {mapping[k]: torch.as_tensor(v).to(theirs[mapping[k]].dtype) for k, v in dec.items()}
    return copy, f"loaded ({len(copy)} tensors, layout {layout.name})"


def _check_dims(layout: Layout, ours: dict[str, Any], theirs: dict[str, Any], first_conv: str, dims: int,
                model: Any, file: str, inflate: str | None = None) -> None:
    """Refuse a 2-D file for a 3-D network (unless ``inflate``) and a 3-D file for a 2-D network,
    naming both (nothing fits then)."""
    tk = layout.map_key(first_conv + ".weight")
    if tk is None or tk not in theirs or theirs[tk].ndim not in (4, 5):
        return
    net_dims = theirs[tk].ndim - 2
    if inflate and (dims, net_dims) != (2, 3):
        raise WeightsMismatchError(f"{file}: inflate={inflate!r} warm-starts a 3-D network from a 2-D file; the file "
                                   f"is {dims}-D and {type(model).__name__} is {net_dims}-D (leave inflate out)")
    if net_dims != dims and not inflate:
        kernel = "x".join(str(n) for n in tuple(ours[first_conv + ".weight"].shape[2:]))
        raise WeightsMismatchError(
            f"{file}: the file holds a {dims}-D encoder ({kernel} kernels, trained on "
            f"{'cubes' if dims == 3 else 'slices'}) and {type(model).__name__} is a {net_dims}-D network "
            f"(its {tk} is {tuple(theirs[tk].shape)}); build the network with spatial_dims={dims}, "
            f"or pretrain a {net_dims}-D encoder (sampling.spatial_dims = {net_dims})"
            + (", or inflate the 2-D kernels (inflate='mean' or 'center')" if (dims, net_dims) == (2, 3) else ""))


def _library(model: Any) -> str:
    return type(model).__module__.split(".")[0]


def _choose(model: Any, ours: dict[str, Any], theirs: dict[str, Any], fam: str, first_conv: str, file: str,
            layout: str, inflate: str | None = None) -> Plan:
    if layout != "auto":
        if layout not in LAYOUTS:
            raise WeightsMismatchError(f"unknown layout {layout!r}; known: auto, {', '.join(LAYOUTS)}")
        if fam not in LAYOUTS[layout].families:
            raise WeightsMismatchError(f"{file}: layout {layout!r} takes {'/'.join(LAYOUTS[layout].families)} encoders, "
                                 f"the file holds a {fam} encoder")
        return _plan(LAYOUTS[layout], ours, theirs, first_conv, file, inflate)
    lib = _library(model)
    cands = [L for L in LAYOUTS.values() if fam in L.families]
    if not cands:
        raise WeightsMismatchError(f"{file}: no layout takes {fam} encoders; this warmstart knows "
                                   f"{', '.join(sorted({f for L in LAYOUTS.values() for f in L.families}))}")
    plans = [_plan(L, ours, theirs, first_conv, file, inflate) for L in cands]
    # The layout whose key names find the most places (shape mismatches included: they are the
    # user's to see in the report), less the network's encoder keys it leaves empty; among equals,
    # the one written for the network's own library, then the first listed.
    def named(p: WarmStartReport) -> int:
        return len(p.loaded) + len(p.mismatched)

    reports = [r for r, _ in plans]
    best = max(range(len(plans)), key=lambda i: (named(reports[i]) - len(reports[i].missing), cands[i].library == lib, -i))
    if not named(reports[best]):
        sample = ", ".join(list(theirs)[:3])
        raise WeightsMismatchError(f"{file}: no layout places any of its {len(ours)} tensors in {type(model).__name__} "
                             f"(its keys look like {sample}); pass layout= one of {', '.join(LAYOUTS)}")
    return plans[best]


def _planned(model: Any, file: str | os.PathLike[str], layout: str, decoder: bool | None,
             inflate: str | None) -> Plan:
    """The report and the tensors to copy, nothing copied yet (see :func:`warm_start`)."""
    from .inflate import RULES

    if inflate is not None and inflate not in RULES:
        raise WeightsMismatchError(f"inflate must be one of {', '.join(RULES)} (or left out), got {inflate!r}")
    manifest, arrays = read_encoder_file(file)
    ours, dec = split_parts(arrays)
    fam = family(manifest["encoder"]["spec"]["name"])
    theirs = model.state_dict()
    first_conv = manifest["encoder"]["first_conv"]
    rep, copy = _choose(model, ours, theirs, fam, first_conv, str(file), layout, inflate)
    _check_dims(LAYOUTS[rep.layout], ours, theirs, first_conv, spatial_dims(manifest), model, str(file), inflate)
    if dec and decoder is False:
        rep.decoder_note = "not loaded (decoder=False)"
    elif dec:
        dcopy, rep.decoder_note = _plan_decoder(LAYOUTS[rep.layout], dec, theirs, model, inflate)
        if decoder and not dcopy:
            raise WeightsMismatchError(f"{file}: decoder=True but the decoder was {rep.decoder_note}")
        copy.update(dcopy)
        rep.decoder = sorted(dcopy)
        rep.untouched -= len(dcopy)
    elif decoder:
        raise WeightsMismatchError(f"{file}: decoder=True but the file holds no decoder (export it with --with-decoder)")
    return rep, copy


def placed_keys(model: Any, file: str | os.PathLike[str], layout: str = "auto", inflate: str | None = None) -> list[str]:
    """The network's keys that :func:`warm_start` fills from the file's encoder (nothing is copied)."""
    rep, _ = _planned(model, file, layout, False, inflate)
    return rep.loaded + rep.zero_filled


def warm_start(model: Any, file: str | os.PathLike[str], layout: str = "auto", strict: bool = True,
               decoder: bool | None = None, inflate: str | None = None) -> WarmStartReport:
    """Copy an encoder file's weights (and its decoder, where the network's matches) into a network.

    Parameters
    ----------
    model : torch.nn.Module
        The network to warm-start (its other parts are left as they are).
    file : path
        An encoder file written by ``warmstart export``.
    layout : str
        ``auto`` (from the network's key names and shapes), or one of
        :data:`warmstart.export.layouts.LAYOUTS`.
    strict : bool
        Refuse (and copy nothing) unless every tensor finds its place and every key of the
        network's encoder part is filled. With ``False``, copy what fits and report the rest.
    decoder : bool, optional
        For files exported ``--with-decoder``: ``None`` loads the decoder where the network's
        decoder matches it exactly (warmstart's ``UNet``, smp ``Unet`` with the same widths and
        bilinear upsampling) and otherwise loads the encoder alone; ``True`` refuses unless the
        decoder is loaded too; ``False`` leaves the network's decoder as it is. The report's
        ``decoder_note`` says which happened.
    inflate : {"mean", "center"}, optional
        Warm-start a 3-D network from a 2-D file: every 2-D kernel becomes a 3-D kernel of the
        network's depth (:mod:`warmstart.export.inflate`); the network must have the file's
        stages and widths. Leave out for a file of the network's own dimensionality.

    Returns
    -------
    WarmStartReport

    Raises
    ------
    WeightsMismatchError
        ``strict`` and the file does not fit (the message is the report), or no layout fits.
    ExportError
        The file is damaged, altered or of an unknown version.
    """
    import torch

    rep, copy = _planned(model, file, layout, decoder, inflate)
    if strict and not rep.complete:
        raise WeightsMismatchError(f"{rep}\n(strict: nothing was copied; pass strict=False to load what fits)")
    with torch.no_grad():
        model.load_state_dict(copy, strict=False)
    rep.applied = True
    return rep
