"""View geometry: the coordinate maps agree with the pixels the augmentation really samples.

The independent computation is the augmentation itself applied to a coordinate image (channel 0
holds each pixel's y, channel 1 its x): bilinear resampling reproduces a linear function exactly,
so every view pixel shows the patch coordinates it was drawn from.
"""
from __future__ import annotations

import dataclasses
import itertools
import math

import pytest
import torch
import torch.nn.functional as F

from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params
from warmstart.pretrain.geometry import matched_points, patch_to_view, view_to_patch

N = 32
PLAIN = ViewSettings(blur_prob=0.0, contrast_prob=0.0, gamma_prob=0.0, noise_prob=0.0, shot_prob=0.0, cutout_prob=0.0,
                     affine_prob=0.0)


def _coordinate_image(n: int = N) -> torch.Tensor:
    c = (torch.arange(n, dtype=torch.float32) + 0.5) / n
    yy, xx = torch.meshgrid(c, c, indexing="ij")
    return torch.stack([yy, xx])[None]  # (1, 2, n, n)


def _params(crop, flip_x, flip_y, turns, angle=0.0, scale=1.0, size=24):
    p = draw_params(1, N, dataclasses.replace(PLAIN, output_size=size), torch.Generator().manual_seed(0))
    a = math.radians(angle)
    theta = torch.tensor([[[math.cos(a), -math.sin(a), 0.0], [math.sin(a), math.cos(a), 0.0]]]) / scale
    return dataclasses.replace(p, crop=torch.tensor([crop], dtype=torch.float32), flip_x=torch.tensor([flip_x]),
                               flip_y=torch.tensor([flip_y]), turns=torch.tensor([turns]), affine=theta)


def _view_centres(size: int) -> torch.Tensor:
    c = (torch.arange(size, dtype=torch.float32) + 0.5) / size
    yy, xx = torch.meshgrid(c, c, indexing="ij")
    return torch.stack([yy.flatten(), xx.flatten()], -1)[None]


CROPS = [(0.0, 0.0, 1.0, 1.0), (0.1, 0.25, 0.6, 0.5), (0.3, 0.05, 0.55, 0.7)]


@pytest.mark.parametrize("crop,flip_x,flip_y,turns", list(itertools.product(CROPS, (False, True), (False, True), range(4))))
def test_view_to_patch_is_where_each_view_pixel_came_from(crop, flip_x, flip_y, turns):
    p = _params(crop, flip_x, flip_y, turns)
    view = apply_view(_coordinate_image(), p, torch.Generator())  # (1, 2, S, S)
    shown = view[0].reshape(2, -1).T[None]  # (1, S*S, 2): the patch (y, x) each view pixel shows
    mapped = view_to_patch(_view_centres(24), p)
    # Away from the outermost half pixel, where the resampler clamps to the edge pixel centres.
    ok = ((mapped > 0.5 / N) & (mapped < 1 - 0.5 / N)).all(-1)
    assert ok.float().mean() > 0.5
    assert torch.allclose(mapped[ok], shown[ok], atol=1e-5)
    assert torch.allclose(patch_to_view(mapped, p), _view_centres(24), atol=1e-5)  # exact inverse


@pytest.mark.parametrize("angle,scale,turns", [(7.0, 1.0, 0), (-9.0, 1.1, 1), (4.0, 0.9, 3)])
def test_small_affine_warps_are_mapped_too(angle, scale, turns):
    p = _params((0.1, 0.1, 0.8, 0.8), True, False, turns, angle=angle, scale=scale)
    view = apply_view(_coordinate_image(), p, torch.Generator())
    shown = view[0].reshape(2, -1).T[None]
    mapped = view_to_patch(_view_centres(24), p)
    pre = patch_to_view(mapped, dataclasses.replace(p, affine=torch.tensor([[[1.0, 0, 0], [0, 1.0, 0]]])))
    ok = ((mapped > 0.5 / N) & (mapped < 1 - 0.5 / N)).all(-1) & ((pre > 0.5 / 24) & (pre < 1 - 0.5 / 24)).all(-1)
    assert ok.float().mean() > 0.3
    assert torch.allclose(mapped[ok], shown[ok], atol=1e-4)


def test_matched_points_show_the_same_patch_pixel_in_both_views():
    g = torch.Generator().manual_seed(3)
    s = dataclasses.replace(PLAIN, crop_scale=(0.3, 1.0), output_size=24)
    batch = _coordinate_image().expand(64, -1, -1, -1).contiguous()
    p1, p2 = draw_params(64, N, s, g), draw_params(64, N, s, g)
    v1, v2 = apply_view(batch, p1, g), apply_view(batch, p2, g)
    pts1, pts2, valid = matched_points(p1, p2, grid=6)
    assert valid.any(1).float().mean() > 0.8 and not valid.all()

    def sample(v, pts):  # bilinear read at (y, x) fractions; grid_sample wants x first in [-1, 1]
        grid = torch.stack([pts[..., 1], pts[..., 0]], -1)[:, :, None] * 2 - 1
        return F.grid_sample(v, grid, mode="bilinear", align_corners=False)[..., 0].transpose(1, 2)

    a, b = sample(v1, pts1), sample(v2, pts2)
    # Interior points only (the resampler clamps at the outermost half pixel of the patch).
    patch = view_to_patch(pts1, p1)
    ok = valid & ((patch > 1.0 / N) & (patch < 1 - 1.0 / N)).all(-1) & ((pts2 > 1 / 24) & (pts2 < 1 - 1 / 24)).all(-1)
    assert ok.sum() > 200
    assert torch.allclose(a[ok], b[ok], atol=1e-4) and torch.allclose(a[ok], patch[ok], atol=1e-4)
