"""Batched augmentations for grayscale scientific patches, on tensors (CPU or GPU).

Every transform is random per sample. Parameters are drawn first (:func:`draw_params`, from a
``torch.Generator``), then applied (:func:`apply_view`), so that a view's geometry is known
exactly (crop box, flips, quarter turns) and an image and its mask can share one draw.
Scientific images have no "up": flips and 90-degree turns are on by default. There are no
colour transforms.

Order of application: crop (resized to the output size, bilinear), flips, quarter turns,
affine warp, Gaussian blur, contrast/brightness, gamma, Gaussian noise, signal-dependent noise,
cut-out.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import torch
import torch.nn.functional as F

from .settings import ViewSettings

__all__ = ["ViewSettings", "ViewParams", "draw_params", "apply_view", "gaussian_kernels"]


@dataclass
class ViewParams:
    """Per-sample parameters of one view of a batch of B patches (all tensors of length B).

    ``crop`` is (B, 4): top, left, height, width as fractions of the input patch. ``flip_x`` /
    ``flip_y`` are booleans, ``turns`` the number of counter-clockwise quarter turns (0-3), applied
    in that order after the crop. The other fields hold the photometric parameters (0 or 1 where
    a transform is off for a sample).
    """

    crop: torch.Tensor
    flip_x: torch.Tensor
    flip_y: torch.Tensor
    turns: torch.Tensor
    affine: torch.Tensor  # (B, 2, 3) extra warp in normalized coordinates (identity where off)
    blur_sigma: torch.Tensor
    contrast: torch.Tensor
    brightness: torch.Tensor
    gamma: torch.Tensor
    noise_sigma: torch.Tensor
    shot_scale: torch.Tensor
    cutout: torch.Tensor  # (B, 4) top, left, height, width fractions; height 0 where off
    output_size: int


def _u(n: int, lo: float, hi: float, g: torch.Generator, device: torch.device) -> torch.Tensor:
    return lo + (hi - lo) * torch.rand(n, generator=g, device=device)


def _on(n: int, p: float, g: torch.Generator, device: torch.device) -> torch.Tensor:
    return torch.rand(n, generator=g, device=device) < p


def draw_params(batch: int, size: int, s: ViewSettings, generator: torch.Generator,
                device: torch.device | str = "cpu") -> ViewParams:
    """Draw the random parameters of one view for ``batch`` patches of side ``size``."""
    dev = torch.device(device)
    g = generator
    # Random resized crop (as in Szegedy et al. 2015 / SimCLR): area fraction and log-uniform ratio.
    area = _u(batch, *s.crop_scale, g, dev)
    logr = _u(batch, math.log(s.crop_ratio[0]), math.log(s.crop_ratio[1]), g, dev)
    ratio = torch.exp(logr)
    w = torch.sqrt(area * ratio).clamp(max=1.0)
    h = torch.sqrt(area / ratio).clamp(max=1.0)
    top = torch.rand(batch, generator=g, device=dev) * (1 - h)
    left = torch.rand(batch, generator=g, device=dev) * (1 - w)
    false = torch.zeros(batch, dtype=torch.bool, device=dev)
    flip_x = _on(batch, 0.5, g, dev) if s.flip else false
    flip_y = _on(batch, 0.5, g, dev) if s.flip else false
    turns = torch.randint(0, 4, (batch,), generator=g, device=dev) if s.rotate90 else torch.zeros(batch, dtype=torch.long, device=dev)
    eye = torch.tensor([[1.0, 0, 0], [0, 1.0, 0]], device=dev).expand(batch, 2, 3).clone()
    on = _on(batch, s.affine_prob, g, dev)
    ang = torch.deg2rad(_u(batch, -s.affine_degrees, s.affine_degrees, g, dev))
    sc = _u(batch, *s.affine_scale, g, dev)
    rot = torch.stack([torch.stack([torch.cos(ang), -torch.sin(ang), torch.zeros_like(ang)], -1),
                       torch.stack([torch.sin(ang), torch.cos(ang), torch.zeros_like(ang)], -1)], -2) / sc[:, None, None]
    affine = torch.where(on[:, None, None], rot, eye)

    def maybe(p: float, lo: float, hi: float, off: float) -> torch.Tensor:
        return torch.where(_on(batch, p, g, dev), _u(batch, lo, hi, g, dev), torch.full((batch,), off, device=dev))

    gamma = torch.exp(maybe(s.gamma_prob, math.log(s.gamma[0]), math.log(s.gamma[1]), 0.0))
    cut_on = _on(batch, s.cutout_prob, g, dev)
    ch, cw = _u(batch, *s.cutout_size, g, dev), _u(batch, *s.cutout_size, g, dev)
    cut = torch.stack([torch.rand(batch, generator=g, device=dev) * (1 - ch), torch.rand(batch, generator=g, device=dev) * (1 - cw),
                       torch.where(cut_on, ch, torch.zeros_like(ch)), cw], -1)
    return ViewParams(
        crop=torch.stack([top, left, h, w], -1), flip_x=flip_x, flip_y=flip_y, turns=turns, affine=affine,
        blur_sigma=maybe(s.blur_prob, *s.blur_sigma, 0.0),
        contrast=maybe(s.contrast_prob, *s.contrast, 1.0),
        brightness=maybe(s.contrast_prob, -s.brightness, s.brightness, 0.0),
        gamma=gamma,
        noise_sigma=maybe(s.noise_prob, *s.noise_sigma, 0.0),
        shot_scale=maybe(s.shot_prob, *s.shot_scale, 0.0),
        cutout=cut, output_size=int(s.output_size or size),
    )


def gaussian_kernels(sigma: torch.Tensor, radius: int) -> torch.Tensor:
    """(B, 2 radius + 1) normalized Gaussian kernels; sigma 0 gives the identity kernel."""
    x = torch.arange(-radius, radius + 1, device=sigma.device, dtype=torch.float32)
    s = sigma.clamp(min=1e-6)[:, None]
    k = torch.exp(-0.5 * (x[None] / s) ** 2)
    k = torch.where(sigma[:, None] > 0, k, (x[None] == 0).float())
    return k / k.sum(-1, keepdim=True)


def _blur(x: torch.Tensor, sigma: torch.Tensor) -> torch.Tensor:
    b, c, h, w = x.shape
    radius = int(math.ceil(3 * float(sigma.max()))) if bool((sigma > 0).any()) else 0
    if radius == 0:
        return x
    radius = min(radius, h - 1, w - 1)
    k = gaussian_kernels(sigma, radius).repeat_interleave(c, 0)  # (B*C, K)
    y = x.reshape(1, b * c, h, w)
    y = F.conv2d(F.pad(y, (radius, radius, 0, 0), mode="reflect"), k[:, None, None, :], groups=b * c)
    y = F.conv2d(F.pad(y, (0, 0, radius, radius), mode="reflect"), k[:, None, :, None], groups=b * c)
    return y.reshape(b, c, h, w)


def _interpolation(start: torch.Tensor, extent: torch.Tensor, n_in: int, n_out: int) -> torch.Tensor:
    """(B, n_out, n_in) linear-interpolation weights sampling [start, start + extent) (fractions of
    the input) at ``n_out`` pixel centres; positions are clamped to the outermost pixel centres."""
    j = torch.arange(n_out, device=start.device, dtype=torch.float32)
    u = (start[:, None] + (j[None] + 0.5) / n_out * extent[:, None]) * n_in - 0.5  # input pixel coordinates
    u = u.clamp(0, n_in - 1)
    i0 = u.floor().long()
    i1 = (i0 + 1).clamp(max=n_in - 1)
    t = u - i0
    w = torch.zeros(start.shape[0], n_out, n_in, device=start.device)
    w.scatter_add_(2, i0[..., None], (1 - t)[..., None])
    w.scatter_add_(2, i1[..., None], t[..., None])
    return w


def _geometry(x: torch.Tensor, p: ViewParams) -> torch.Tensor:
    top, left, h, w = p.crop.unbind(-1)
    size = p.output_size
    identity = bool(((p.crop - torch.tensor([0, 0, 1, 1], device=x.device)).abs().max() == 0)) and size == x.shape[-1] == x.shape[-2]
    if not identity:
        # An axis-aligned crop resized bilinearly is separable: two batched matrix products with
        # per-sample interpolation weights (several times faster than grid_sample on a CPU).
        wy = _interpolation(top, h, x.shape[-2], size).to(x.dtype)  # (B, S, H)
        wx = _interpolation(left, w, x.shape[-1], size).to(x.dtype)  # (B, S, W)
        x = wy[:, None] @ x @ wx[:, None].transpose(-1, -2)  # (B, C, S, S)
    # Flip and turn only the samples that draw it (index assignment, not a where over copies).
    x = x.clone() if identity else x
    for mask, dims in ((p.flip_x, (-1,)), (p.flip_y, (-2,))):
        sel = mask.nonzero().flatten()
        if len(sel):
            x[sel] = x[sel].flip(dims)
    if bool((p.turns > 0).any()):
        if x.shape[-1] != x.shape[-2]:
            raise ValueError("quarter turns need square views")
        for k in (1, 2, 3):
            sel = (p.turns == k).nonzero().flatten()
            if len(sel):
                x[sel] = torch.rot90(x[sel], k, dims=(-2, -1))
    eye = torch.tensor([[1.0, 0, 0], [0, 1.0, 0]], device=x.device, dtype=x.dtype)
    if bool((p.affine != eye).any()):
        grid = F.affine_grid(p.affine.to(x.dtype), list(x.shape), align_corners=False)
        x = F.grid_sample(x, grid, mode="bilinear", padding_mode="reflection", align_corners=False)
    return x


def apply_view(x: torch.Tensor, p: ViewParams, generator: torch.Generator) -> torch.Tensor:
    """Apply one view's parameters to a batch.

    Parameters
    ----------
    x : (B, C, H, W) float tensor
        Normalized patches.
    p : ViewParams
        From :func:`draw_params` for this batch.
    generator : torch.Generator
        Draws the noise fields.

    Returns
    -------
    (B, C, S, S) tensor
        ``S = p.output_size``.
    """
    x = _geometry(x, p)
    sel = (p.blur_sigma > 0).nonzero().flatten()
    if len(sel):
        x[sel] = _blur(x[sel], p.blur_sigma[sel]).to(x.dtype)
    # Each photometric step touches only the samples it is on for: "off" is exactly the identity,
    # and a batch pays only for the samples that draw a transform.
    sel = ((p.contrast != 1) | (p.brightness != 0)).nonzero().flatten()
    if len(sel):
        v = x[sel]
        mean = v.mean(dim=(1, 2, 3), keepdim=True)
        x[sel] = ((v - mean) * p.contrast[sel, None, None, None] + mean + p.brightness[sel, None, None, None]).to(x.dtype)
    sel = (p.gamma != 1).nonzero().flatten()
    if len(sel):
        v = x[sel]
        x[sel] = (torch.sign(v) * v.abs().pow(p.gamma[sel, None, None, None])).to(x.dtype)
    sel = (p.noise_sigma > 0).nonzero().flatten()
    if len(sel):
        noise = torch.randn((len(sel),) + tuple(x.shape[1:]), generator=generator, device=x.device, dtype=x.dtype)
        x[sel] = (x[sel] + p.noise_sigma[sel, None, None, None] * noise).to(x.dtype)
    sel = (p.shot_scale > 0).nonzero().flatten()
    if len(sel):
        v = x[sel]
        noise = torch.randn(v.shape, generator=generator, device=x.device, dtype=x.dtype)
        x[sel] = (v + (p.shot_scale[sel, None, None, None] * v.clamp(min=0)).sqrt() * noise).to(x.dtype)
    if bool((p.cutout[:, 2] > 0).any()):
        s = x.shape[-1]
        yy = torch.arange(s, device=x.device)[None, :, None]
        xx = torch.arange(s, device=x.device)[None, None, :]
        t, l_, h, w = (p.cutout * s).unbind(-1)
        box = (yy >= t[:, None, None]) & (yy < (t + h)[:, None, None]) & (xx >= l_[:, None, None]) & (xx < (l_ + w)[:, None, None])
        x = torch.where(box[:, None], x.mean(dim=(1, 2, 3), keepdim=True), x)
    return x
