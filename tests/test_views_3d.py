"""3-D views of cubes: exact geometry for every crop, flip and turn, and the resampling and blur
checked against scipy.ndimage."""
from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
import torch

from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params
from warmstart.pretrain.geometry import matched_points, patch_to_view, view_to_patch

N = 12
PLAIN = ViewSettings(blur_prob=0.0, contrast_prob=0.0, gamma_prob=0.0, noise_prob=0.0, shot_prob=0.0, cutout_prob=0.0,
                     affine_prob=0.0)


def _coordinate_volume(n: int = N) -> torch.Tensor:
    """(1, 3, n, n, n): channel i holds each voxel centre's i-th coordinate (z, y, x) as a fraction."""
    c = (torch.arange(n, dtype=torch.float32) + 0.5) / n
    return torch.stack(torch.meshgrid(c, c, c, indexing="ij"))[None]


def _centres(size: int) -> torch.Tensor:
    c = (torch.arange(size, dtype=torch.float32) + 0.5) / size
    return torch.stack([m.flatten() for m in torch.meshgrid(c, c, c, indexing="ij")], -1)[None]


def _params(crop, flips, turns, size=10, theta=None):
    p = draw_params(1, N, dataclasses.replace(PLAIN, output_size=size), torch.Generator().manual_seed(0), spatial_dims=3)
    fz, fy, fx = (torch.tensor([f]) for f in flips)
    tyx, tzx, tzy = (torch.tensor([t]) for t in turns)
    return dataclasses.replace(p, crop=torch.tensor([crop], dtype=torch.float32), flip_z=fz, flip_y=fy, flip_x=fx,
                               turns=tyx, turns_zx=tzx, turns_zy=tzy,
                               affine=theta if theta is not None else torch.eye(3, 4)[None])


CROPS = [(0.0, 0.0, 0.0, 1.0, 1.0, 1.0), (0.1, 0.2, 0.05, 0.6, 0.5, 0.7)]


def test_view_to_patch_is_where_each_view_voxel_came_from_for_every_crop_flip_and_turn():
    # Independent computation: the augmentation applied to a coordinate volume (trilinear
    # resampling reproduces a linear function exactly), so every view voxel shows the patch
    # coordinates it was drawn from. All 2 crops x 8 flips x 64 turn combinations.
    vol = _coordinate_volume()
    centres = _centres(10)
    for crop, flips, turns in itertools.product(CROPS, itertools.product((False, True), repeat=3),
                                                itertools.product(range(4), repeat=3)):
        p = _params(crop, flips, turns)
        view = apply_view(vol.clone(), p, torch.Generator())  # (1, 3, 10, 10, 10)
        shown = view[0].reshape(3, -1).T[None]
        mapped = view_to_patch(centres, p)
        ok = ((mapped > 0.5 / N) & (mapped < 1 - 0.5 / N)).all(-1)  # away from the clamped outer half voxel
        assert ok.float().mean() > 0.3, (crop, flips, turns)
        assert torch.allclose(mapped[ok], shown[ok], atol=1e-5), (crop, flips, turns)
        assert torch.allclose(patch_to_view(mapped, p), centres, atol=1e-5)  # exact inverse


def test_a_small_3d_rotation_is_mapped_too():
    g = torch.Generator().manual_seed(1)
    s = dataclasses.replace(PLAIN, affine_prob=1.0, affine_degrees=8.0, output_size=10)
    p = draw_params(1, N, s, g, spatial_dims=3)
    assert not torch.allclose(p.affine, torch.eye(3, 4)[None])
    r = p.affine[0, :, :3] * p.affine[0, :, :3].det().abs() ** (-1 / 3)  # a rotation times 1/scale
    assert torch.allclose(r @ r.T, torch.eye(3), atol=1e-5)
    p = dataclasses.replace(p, crop=torch.tensor([[0.1, 0.1, 0.1, 0.8, 0.8, 0.8]]))
    view = apply_view(_coordinate_volume(), p, torch.Generator())
    shown = view[0].reshape(3, -1).T[None]
    mapped = view_to_patch(_centres(10), p)
    pre = patch_to_view(mapped, dataclasses.replace(p, affine=torch.eye(3, 4)[None]))
    ok = ((mapped > 0.5 / N) & (mapped < 1 - 0.5 / N)).all(-1) & ((pre > 0.5 / 10) & (pre < 1 - 0.5 / 10)).all(-1)
    assert ok.float().mean() > 0.3
    assert torch.allclose(mapped[ok], shown[ok], atol=1e-4)


def test_matched_points_in_3d_show_the_same_patch_voxel_in_both_views():
    g = torch.Generator().manual_seed(3)
    s = dataclasses.replace(PLAIN, crop_scale=(0.3, 1.0), output_size=10)
    batch = _coordinate_volume().expand(16, -1, -1, -1, -1).contiguous()
    p1, p2 = draw_params(16, N, s, g, spatial_dims=3), draw_params(16, N, s, g, spatial_dims=3)
    v1, v2 = apply_view(batch, p1, g), apply_view(batch, p2, g)
    pts1, pts2, valid = matched_points(p1, p2, grid=4)
    assert pts1.shape == (16, 64, 3) and valid.any(1).float().mean() > 0.7 and not valid.all()

    def sample(v, pts):  # trilinear read at (z, y, x) fractions; grid_sample wants (x, y, z) in [-1, 1]
        grid = pts.flip(-1)[:, :, None, None] * 2 - 1
        return torch.nn.functional.grid_sample(v, grid, mode="bilinear", align_corners=False)[..., 0, 0].transpose(1, 2)

    a, b = sample(v1, pts1), sample(v2, pts2)
    patch = view_to_patch(pts1, p1)
    ok = valid & ((patch > 1.0 / N) & (patch < 1 - 1.0 / N)).all(-1) & ((pts2 > 1 / 10) & (pts2 < 1 - 1 / 10)).all(-1)
    assert ok.sum() > 100
    assert torch.allclose(a[ok], b[ok], atol=1e-4) and torch.allclose(a[ok], patch[ok], atol=1e-4)


@pytest.mark.parametrize("n_out", [18, 8])
def test_crop_resize_equals_scipy_zoom_order_1(n_out):
    # scipy.ndimage.zoom with order=1 and grid_mode=True aligns pixel edges (centres at
    # (i + 0.5) * n_in / n_out - 0.5), and mode="nearest" clamps at the edge voxels: the same
    # sampling as a whole-cube view resized to n_out.
    from scipy.ndimage import zoom

    rng = np.random.default_rng(0)
    vol = rng.standard_normal((N, N, N)).astype(np.float32)
    p = _params((0.0, 0.0, 0.0, 1.0, 1.0, 1.0), (False,) * 3, (0, 0, 0), size=n_out)
    ours = apply_view(torch.from_numpy(vol)[None, None], p, torch.Generator())[0, 0].numpy()
    ref = zoom(vol, n_out / N, order=1, grid_mode=True, mode="nearest")
    assert ref.shape == ours.shape == (n_out,) * 3
    np.testing.assert_allclose(ours, ref, atol=1e-5)


def test_blur_equals_scipy_gaussian_filter_in_3d():
    # Kernel radius ceil(3 sigma), reflected edges without repeating the edge voxel: scipy's
    # gaussian_filter with mode="mirror" and truncate = radius / sigma.
    from scipy.ndimage import gaussian_filter

    sigma = 1.2
    rng = np.random.default_rng(1)
    vol = rng.standard_normal((14, 14, 14)).astype(np.float32)
    s = dataclasses.replace(PLAIN, crop_scale=(1.0, 1.0), crop_ratio=(1.0, 1.0), flip=False, rotate90=False,
                            blur_prob=1.0, blur_sigma=(sigma, sigma))
    p = draw_params(1, 14, s, torch.Generator().manual_seed(0), spatial_dims=3)
    ours = apply_view(torch.from_numpy(vol)[None, None], p, torch.Generator())[0, 0].numpy()
    ref = gaussian_filter(vol.astype(np.float64), sigma, mode="mirror", truncate=4 / sigma)
    np.testing.assert_allclose(ours, ref, atol=1e-5)


def test_full_3d_views_are_seeded_per_sample_and_keep_the_shape():
    s = ViewSettings(cutout_prob=0.5, shot_prob=0.5, affine_prob=0.3, output_size=12)
    x = torch.randn(6, 1, 16, 16, 16)
    outs = []
    for _ in range(2):
        g = torch.Generator().manual_seed(7)
        p = draw_params(6, 16, s, g, spatial_dims=3)
        outs.append(apply_view(x.clone(), p, g))
    assert outs[0].shape == (6, 1, 12, 12, 12)
    assert torch.equal(outs[0], outs[1])  # same seed, same views
    assert not torch.allclose(outs[0][0], outs[0][1])  # per sample
    assert p.crop.shape == (6, 6) and p.cutout.shape == (6, 6)
    with pytest.raises(ValueError, match="3-D patches applied to a 2-D batch"):
        apply_view(torch.randn(6, 1, 16, 16), p, g)


def test_a_3d_cutout_box_takes_the_cube_mean():
    s = dataclasses.replace(PLAIN, crop_scale=(1.0, 1.0), crop_ratio=(1.0, 1.0), flip=False, rotate90=False,
                            cutout_prob=1.0, cutout_size=(0.25, 0.25))
    x = torch.randn(1, 1, 8, 8, 8)
    p = dataclasses.replace(draw_params(1, 8, s, torch.Generator().manual_seed(0), spatial_dims=3),
                            cutout=torch.tensor([[0.25, 0.5, 0.0, 0.25, 0.25, 0.5]]))
    y = apply_view(x.clone(), p, torch.Generator())
    box = torch.zeros(8, 8, 8, dtype=torch.bool)
    box[2:4, 4:6, 0:4] = True
    assert torch.allclose(y[0, 0][box], x.mean().expand(int(box.sum())))
    assert torch.equal(y[0, 0][~box], x[0, 0][~box])
