"""Batched augmentations for grayscale scientific patches, on tensors (CPU or GPU).

Every transform is random per sample. Parameters are drawn first (:func:`draw_params`, from a
``torch.Generator``), then applied (:func:`apply_view`), so that a view's geometry is known
exactly (crop box, flips, quarter turns) and an image and its mask can share one draw.
Scientific images have no "up": flips and 90-degree turns are on by default. There are no
colour transforms.

Order of application: crop (resized to the output size, bilinear), flips, quarter turns,
affine warp, Gaussian blur, contrast/brightness, gamma, Gaussian noise, signal-dependent noise,
cut-out.

3-D views (cubes, (B, C, D, H, W), ``spatial_dims=3``) take the same steps: a box crop resized
trilinearly (three batched matrix products), flips along Z, Y and X, quarter turns in the (Y, X),
then (Z, X), then (Z, Y) planes (together with the flips: every symmetry of the cube, so only for
cubic voxels, which 3-D corpora have), a small 3-D affine warp, separable 3-D blur, and cut-out
boxes. The 2-D draws are unchanged by the 3-D additions (same generator calls in the same order).
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

    ``crop`` is (B, 2n) for n spatial dims: the starts, then the extents, as fractions of the input
    patch along ((Z,) Y, X): top, left, height, width in 2-D; front, top, left, depth, height,
    width in 3-D. ``flip_x`` / ``flip_y`` (/ ``flip_z``) are booleans, ``turns`` the number of
    counter-clockwise quarter turns (0-3) in the (Y, X) plane, ``turns_zx`` / ``turns_zy`` those
    in the (Z, X) and (Z, Y) planes (3-D; zero in 2-D), applied in that order after the crop. The
    other fields hold the photometric parameters (0 or 1 where a transform is off for a sample).
    """

    crop: torch.Tensor
    flip_x: torch.Tensor
    flip_y: torch.Tensor
    turns: torch.Tensor
    affine: torch.Tensor  # (B, n, n + 1) extra warp in affine_grid's normalized (x, y[, z]) frame
    blur_sigma: torch.Tensor
    contrast: torch.Tensor
    brightness: torch.Tensor
    gamma: torch.Tensor
    noise_sigma: torch.Tensor
    shot_scale: torch.Tensor
    cutout: torch.Tensor  # (B, 2n) starts then extents (fractions), first extent 0 where off
    output_size: int
    flip_z: torch.Tensor | None = None
    turns_zx: torch.Tensor | None = None
    turns_zy: torch.Tensor | None = None

    @property
    def spatial_dims(self) -> int:
        return self.crop.shape[-1] // 2


def _u(n: int, lo: float, hi: float, g: torch.Generator, device: torch.device) -> torch.Tensor:
    return lo + (hi - lo) * torch.rand(n, generator=g, device=device)


def _on(n: int, p: float, g: torch.Generator, device: torch.device) -> torch.Tensor:
    return torch.rand(n, generator=g, device=device) < p


def draw_params(batch: int, size: int, s: ViewSettings, generator: torch.Generator,
                device: torch.device | str = "cpu", spatial_dims: int = 2) -> ViewParams:
    """Draw the random parameters of one view for ``batch`` patches (or cubes) of side ``size``."""
    dev = torch.device(device)
    g = generator
    three = spatial_dims == 3
    # Random resized crop (as in Szegedy et al. 2015 / SimCLR): area fraction and log-uniform ratio.
    # In 3-D: a volume fraction, and three log-uniform side factors whose product is 1.
    area = _u(batch, *s.crop_scale, g, dev)
    logr = _u(batch, math.log(s.crop_ratio[0]), math.log(s.crop_ratio[1]), g, dev)
    if three:
        logs = torch.stack([logr, _u(batch, math.log(s.crop_ratio[0]), math.log(s.crop_ratio[1]), g, dev),
                            _u(batch, math.log(s.crop_ratio[0]), math.log(s.crop_ratio[1]), g, dev)], -1) / 2
        sides = (area[:, None] ** (1 / 3) * torch.exp(logs - logs.mean(-1, keepdim=True))).clamp(max=1.0)  # (B, 3) d, h, w
        starts = torch.rand(batch, 3, generator=g, device=dev) * (1 - sides)
        crop = torch.cat([starts, sides], -1)
    else:
        ratio = torch.exp(logr)
        w = torch.sqrt(area * ratio).clamp(max=1.0)
        h = torch.sqrt(area / ratio).clamp(max=1.0)
        top = torch.rand(batch, generator=g, device=dev) * (1 - h)
        left = torch.rand(batch, generator=g, device=dev) * (1 - w)
        crop = torch.stack([top, left, h, w], -1)
    false = torch.zeros(batch, dtype=torch.bool, device=dev)
    zero = torch.zeros(batch, dtype=torch.long, device=dev)
    flip_x = _on(batch, 0.5, g, dev) if s.flip else false
    flip_y = _on(batch, 0.5, g, dev) if s.flip else false
    turns = torch.randint(0, 4, (batch,), generator=g, device=dev) if s.rotate90 else zero
    on = _on(batch, s.affine_prob, g, dev)
    ang = torch.deg2rad(_u(batch, -s.affine_degrees, s.affine_degrees, g, dev))
    sc = _u(batch, *s.affine_scale, g, dev)
    if three:
        affine = _affine_3d(on, ang, sc, g, dev)
    else:
        eye = torch.tensor([[1.0, 0, 0], [0, 1.0, 0]], device=dev).expand(batch, 2, 3).clone()
        rot = torch.stack([torch.stack([torch.cos(ang), -torch.sin(ang), torch.zeros_like(ang)], -1),
                           torch.stack([torch.sin(ang), torch.cos(ang), torch.zeros_like(ang)], -1)], -2) / sc[:, None, None]
        affine = torch.where(on[:, None, None], rot, eye)

    def maybe(p: float, lo: float, hi: float, off: float) -> torch.Tensor:
        return torch.where(_on(batch, p, g, dev), _u(batch, lo, hi, g, dev), torch.full((batch,), off, device=dev))

    gamma = torch.exp(maybe(s.gamma_prob, math.log(s.gamma[0]), math.log(s.gamma[1]), 0.0))
    cut_on = _on(batch, s.cutout_prob, g, dev)
    n = 3 if three else 2
    ext = torch.stack([_u(batch, *s.cutout_size, g, dev) for _ in range(n)], -1)
    cut_start = torch.stack([torch.rand(batch, generator=g, device=dev) * (1 - ext[:, i]) for i in range(n)], -1)
    ext[:, 0] = torch.where(cut_on, ext[:, 0], torch.zeros_like(ext[:, 0]))
    cut = torch.cat([cut_start, ext], -1)
    extra: dict[str, torch.Tensor] = {}
    if three:
        extra["flip_z"] = _on(batch, 0.5, g, dev) if s.flip else false
        extra["turns_zx"] = torch.randint(0, 4, (batch,), generator=g, device=dev) if s.rotate90 else zero
        extra["turns_zy"] = torch.randint(0, 4, (batch,), generator=g, device=dev) if s.rotate90 else zero
    return ViewParams(
        crop=crop, flip_x=flip_x, flip_y=flip_y, turns=turns, affine=affine,
        blur_sigma=maybe(s.blur_prob, *s.blur_sigma, 0.0),
        contrast=maybe(s.contrast_prob, *s.contrast, 1.0),
        brightness=maybe(s.contrast_prob, -s.brightness, s.brightness, 0.0),
        gamma=gamma,
        noise_sigma=maybe(s.noise_prob, *s.noise_sigma, 0.0),
        shot_scale=maybe(s.shot_prob, *s.shot_scale, 0.0),
        cutout=cut, output_size=int(s.output_size or size), **extra,
    )


def _affine_3d(on: torch.Tensor, angle: torch.Tensor, scale: torch.Tensor, g: torch.Generator,
               dev: torch.device) -> torch.Tensor:
    """(B, 3, 4) small rotations by ``angle`` about a random axis (Rodrigues), divided by ``scale``."""
    b = on.shape[0]
    axis = torch.randn(b, 3, generator=g, device=dev)
    axis = axis / axis.norm(dim=-1, keepdim=True).clamp_min(1e-12)
    k = torch.zeros(b, 3, 3, device=dev)
    k[:, 0, 1], k[:, 0, 2], k[:, 1, 2] = -axis[:, 2], axis[:, 1], -axis[:, 0]
    k = k - k.transpose(1, 2)
    eye = torch.eye(3, device=dev).expand(b, 3, 3)
    s, c = torch.sin(angle)[:, None, None], torch.cos(angle)[:, None, None]
    rot = (eye + s * k + (1 - c) * (k @ k)) / scale[:, None, None]
    theta = torch.cat([torch.where(on[:, None, None], rot, eye), torch.zeros(b, 3, 1, device=dev)], -1)
    return theta


def gaussian_kernels(sigma: torch.Tensor, radius: int) -> torch.Tensor:
    """(B, 2 radius + 1) normalized Gaussian kernels; sigma 0 gives the identity kernel."""
    x = torch.arange(-radius, radius + 1, device=sigma.device, dtype=torch.float32)
    s = sigma.clamp(min=1e-6)[:, None]
    k = torch.exp(-0.5 * (x[None] / s) ** 2)
    k = torch.where(sigma[:, None] > 0, k, (x[None] == 0).float())
    return k / k.sum(-1, keepdim=True)


def _blur(x: torch.Tensor, sigma: torch.Tensor) -> torch.Tensor:
    """Separable Gaussian blur of (B, C, H, W) or (B, C, D, H, W), one sigma per sample, reflected edges."""
    b, c = x.shape[:2]
    spatial = tuple(x.shape[2:])
    radius = int(math.ceil(3 * float(sigma.max()))) if bool((sigma > 0).any()) else 0
    if radius == 0:
        return x
    radius = min(radius, *(n - 1 for n in spatial))
    k = gaussian_kernels(sigma, radius).repeat_interleave(c, 0)  # (B*C, K)
    n = len(spatial)
    conv = F.conv3d if n == 3 else F.conv2d
    y = x.reshape(1, b * c, *spatial)
    for axis in range(n):  # the last axis first, as in 2-D
        a = n - 1 - axis
        pad = [0, 0] * n
        pad[2 * axis: 2 * axis + 2] = [radius, radius]
        shape = [1] * n
        shape[a] = 2 * radius + 1
        y = conv(F.pad(y, tuple(pad), mode="reflect"), k.reshape(b * c, 1, *shape), groups=b * c)
    return y.reshape(b, c, *spatial)


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


# Quarter-turn planes (dims of a (B, C, D, H, W) tensor) in the order they are applied.
_TURN_PLANES = (("turns", (-2, -1)), ("turns_zx", (-3, -1)), ("turns_zy", (-3, -2)))


def _geometry(x: torch.Tensor, p: ViewParams) -> torch.Tensor:
    n = x.dim() - 2
    starts, extents = p.crop[:, :n], p.crop[:, n:]
    size = p.output_size
    full = torch.tensor([0.0] * n + [1.0] * n, device=x.device)
    identity = bool(((p.crop - full).abs().max() == 0)) and all(d == size for d in x.shape[2:])
    if not identity:
        # An axis-aligned crop resized (bi/tri)linearly is separable: batched matrix products with
        # per-sample interpolation weights (several times faster than grid_sample on a CPU).
        wy = _interpolation(starts[:, -2], extents[:, -2], x.shape[-2], size).to(x.dtype)  # (B, S, H)
        wx = _interpolation(starts[:, -1], extents[:, -1], x.shape[-1], size).to(x.dtype)  # (B, S, W)
        if n == 3:
            wz = _interpolation(starts[:, 0], extents[:, 0], x.shape[-3], size).to(x.dtype)  # (B, S, D)
            b, c, d = x.shape[:3]
            x = wy[:, None, None] @ x @ wx[:, None, None].transpose(-1, -2)  # (B, C, D, S, S)
            x = (wz[:, None] @ x.reshape(b, c, d, size * size)).reshape(b, c, size, size, size)
        else:
            x = wy[:, None] @ x @ wx[:, None].transpose(-1, -2)  # (B, C, S, S)
    # Flip and turn only the samples that draw it (index assignment, not a where over copies).
    x = x.clone() if identity else x
    flips = [(p.flip_x, (-1,)), (p.flip_y, (-2,))] + ([(p.flip_z, (-3,))] if n == 3 and p.flip_z is not None else [])
    for mask, dims in flips:
        sel = mask.nonzero().flatten()
        if len(sel):
            x[sel] = x[sel].flip(dims)
    for name, dims in _TURN_PLANES[: 1 if n == 2 else 3]:
        turns = getattr(p, name)
        if turns is None or not bool((turns > 0).any()):
            continue
        if x.shape[dims[0]] != x.shape[dims[1]]:
            raise ValueError("quarter turns need square views")
        for k in (1, 2, 3):
            sel = (turns == k).nonzero().flatten()
            if len(sel):
                x[sel] = torch.rot90(x[sel], k, dims=dims)
    eye = torch.eye(n, n + 1, device=x.device, dtype=x.dtype)
    if bool((p.affine != eye).any()):
        grid = F.affine_grid(p.affine.to(x.dtype), list(x.shape), align_corners=False)
        x = F.grid_sample(x, grid, mode="bilinear", padding_mode="reflection", align_corners=False)
    return x


def apply_view(x: torch.Tensor, p: ViewParams, generator: torch.Generator) -> torch.Tensor:
    """Apply one view's parameters to a batch.

    Parameters
    ----------
    x : (B, C, H, W) or (B, C, D, H, W) float tensor
        Normalized patches or cubes.
    p : ViewParams
        From :func:`draw_params` for this batch (drawn with the same ``spatial_dims``).
    generator : torch.Generator
        Draws the noise fields.

    Returns
    -------
    (B, C, S, S) or (B, C, S, S, S) tensor
        ``S = p.output_size``.
    """
    if p.spatial_dims != x.dim() - 2:
        raise ValueError(f"view parameters for {p.spatial_dims}-D patches applied to a {x.dim() - 2}-D batch")
    x = _geometry(x, p)
    every = tuple(range(1, x.dim()))  # channels and spatial axes

    def per(v: torch.Tensor) -> torch.Tensor:  # (m,) -> (m, 1, 1, 1[, 1]) for broadcasting
        return v.reshape(-1, *([1] * (x.dim() - 1)))

    sel = (p.blur_sigma > 0).nonzero().flatten()
    if len(sel):
        x[sel] = _blur(x[sel], p.blur_sigma[sel]).to(x.dtype)
    # Each photometric step touches only the samples it is on for: "off" is exactly the identity,
    # and a batch pays only for the samples that draw a transform.
    sel = ((p.contrast != 1) | (p.brightness != 0)).nonzero().flatten()
    if len(sel):
        v = x[sel]
        mean = v.mean(dim=every, keepdim=True)
        x[sel] = ((v - mean) * per(p.contrast[sel]) + mean + per(p.brightness[sel])).to(x.dtype)
    sel = (p.gamma != 1).nonzero().flatten()
    if len(sel):
        v = x[sel]
        x[sel] = (torch.sign(v) * v.abs().pow(per(p.gamma[sel]))).to(x.dtype)
    sel = (p.noise_sigma > 0).nonzero().flatten()
    if len(sel):
        noise = torch.randn((len(sel),) + tuple(x.shape[1:]), generator=generator, device=x.device, dtype=x.dtype)
        x[sel] = (x[sel] + per(p.noise_sigma[sel]) * noise).to(x.dtype)
    sel = (p.shot_scale > 0).nonzero().flatten()
    if len(sel):
        v = x[sel]
        noise = torch.randn(v.shape, generator=generator, device=x.device, dtype=x.dtype)
        x[sel] = (v + (per(p.shot_scale[sel]) * v.clamp(min=0)).sqrt() * noise).to(x.dtype)
    n = x.dim() - 2
    if bool((p.cutout[:, n] > 0).any()):
        s = x.shape[-1]
        box = torch.ones((x.shape[0],) + (1,) * n, dtype=torch.bool, device=x.device)
        for a in range(n):  # a box is the product of one interval per axis
            shape = [1] * n
            shape[a] = s
            coord = torch.arange(s, device=x.device).reshape(1, *shape)
            lo = (p.cutout[:, a] * s).reshape(-1, *([1] * n))
            hi = lo + (p.cutout[:, n + a] * s).reshape(-1, *([1] * n))
            box = box & (coord >= lo) & (coord < hi)
        x = torch.where(box[:, None], x.mean(dim=every, keepdim=True), x)
    return x
