"""Augmentations: each transform's statistics, checked against definitions, scipy and scikit-image."""
from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params, gaussian_kernels  # noqa: E402


def _view(x, seed=0, **kw):
    g = torch.Generator().manual_seed(seed)
    s = ViewSettings.identity(**kw)
    p = draw_params(x.shape[0], x.shape[-1], s, g)
    return apply_view(x, p, g), p


def _batch(b=8, size=32, seed=0):
    return torch.rand(b, 1, size, size, generator=torch.Generator().manual_seed(seed))


def test_identity_pipeline_changes_nothing():
    x = _batch()
    y, _ = _view(x)
    assert torch.equal(x, y)


def test_flips_and_turns_preserve_the_histogram_exactly():
    x = _batch()
    y, p = _view(x, flip=True, rotate90=True)
    assert p.flip_x.any() and p.turns.unique().numel() > 1  # something actually moved
    for a, b in zip(x, y):
        assert torch.equal(a.flatten().sort().values, b.flatten().sort().values)
    assert not torch.equal(x, y)


def test_turns_follow_rot90():
    x = _batch(b=16)
    y, p = _view(x, rotate90=True)
    for a, b, k in zip(x, y, p.turns):
        assert torch.equal(b, torch.rot90(a, int(k), dims=(-2, -1)))


def test_gamma_one_is_identity_and_gamma_two_squares():
    x = _batch()
    y, _ = _view(x, gamma_prob=1.0, gamma=(1.0, 1.0))
    assert torch.equal(x, y)
    y, _ = _view(x, gamma_prob=1.0, gamma=(2.0, 2.0))
    torch.testing.assert_close(y, x * x)


def test_noise_of_sigma_s_raises_variance_by_s_squared():
    flat = torch.full((4, 1, 128, 128), 0.5)
    y, _ = _view(flat, noise_prob=1.0, noise_sigma=(0.1, 0.1))
    assert float(y.var()) == pytest.approx(0.01, rel=0.03)


def test_shot_noise_variance_proportional_to_signal():
    levels = torch.tensor([0.2, 0.8]).view(2, 1, 1, 1).expand(2, 1, 128, 128).contiguous()
    y, _ = _view(levels, shot_prob=1.0, shot_scale=(0.01, 0.01))
    var = y.var(dim=(1, 2, 3))
    np.testing.assert_allclose(var.numpy(), [0.002, 0.008], rtol=0.05)


def test_contrast_and_brightness_move_mean_and_std_exactly():
    x = _batch()
    y, p = _view(x, contrast_prob=1.0, contrast=(0.5, 2.0), brightness=0.2)
    m0, s0 = x.mean(dim=(1, 2, 3)), x.std(dim=(1, 2, 3))
    torch.testing.assert_close(y.mean(dim=(1, 2, 3)), m0 + p.brightness)
    torch.testing.assert_close(y.std(dim=(1, 2, 3)), s0 * p.contrast)


def test_blur_matches_scipy_gaussian_filter():
    from scipy.ndimage import gaussian_filter

    x = _batch(b=3, size=40)
    y, p = _view(x, blur_prob=1.0, blur_sigma=(0.8, 1.6))
    for a, b, s in zip(x, y, p.blur_sigma):
        radius = int(np.ceil(3 * float(p.blur_sigma.max())))
        # scipy's 'mirror' boundary is torch's 'reflect'; same radius
        ref = gaussian_filter(a[0].numpy().astype(np.float64), float(s), mode="mirror", truncate=radius / float(s))
        np.testing.assert_allclose(b[0].numpy(), ref, atol=1e-5)
    k = gaussian_kernels(torch.tensor([0.0, 1.0]), 3)
    assert torch.equal(k[0], torch.tensor([0, 0, 0, 1.0, 0, 0, 0])) and float(k[1].sum()) == pytest.approx(1.0)


def test_crop_of_a_quarter_resized_by_half_equals_block_mean():
    from skimage.transform import downscale_local_mean

    x = _batch(b=1, size=32)
    g = torch.Generator().manual_seed(0)
    p = draw_params(1, 32, ViewSettings.identity(output_size=8), g)
    p.crop = torch.tensor([[0.0, 0.0, 0.5, 0.5]])  # top-left quarter: 16 px -> 8 px
    y = apply_view(x, p, g)
    ref = downscale_local_mean(x[0, 0, :16, :16].numpy(), (2, 2))  # bilinear at 2x2 block centres
    np.testing.assert_allclose(y[0, 0].numpy(), ref, atol=1e-6)


def test_random_crop_boxes_stay_inside_and_respect_scale():
    g = torch.Generator().manual_seed(1)
    p = draw_params(1000, 64, ViewSettings(crop_scale=(0.2, 0.6)), g)
    top, left, h, w = p.crop.unbind(-1)
    assert (top >= 0).all() and (left >= 0).all() and (top + h <= 1 + 1e-6).all() and (left + w <= 1 + 1e-6).all()
    assert float((h * w).min()) >= 0.2 * 0.99 - 1e-6 and float((h * w).max()) <= 0.6 + 1e-6


def test_cutout_sets_a_box_to_the_mean_and_seed_determinism():
    x = _batch()
    y, p = _view(x, cutout_prob=1.0, cutout_size=(0.25, 0.25))
    changed = (y != x).float().mean(dim=(1, 2, 3))
    assert ((changed > 0.03) & (changed < 0.09)).all()  # an 8x8 box of 32x32, minus pixels equal by chance
    full = ViewSettings()
    a = apply_view(x, draw_params(8, 32, full, torch.Generator().manual_seed(5)), torch.Generator().manual_seed(6))
    b = apply_view(x, draw_params(8, 32, full, torch.Generator().manual_seed(5)), torch.Generator().manual_seed(6))
    c = apply_view(x, draw_params(8, 32, full, torch.Generator().manual_seed(7)), torch.Generator().manual_seed(6))
    assert torch.equal(a, b) and not torch.equal(a, c)


def test_settings_from_dict_rejects_unknown_keys():
    assert ViewSettings.from_dict({"crop_scale": [0.5, 1.0]}).crop_scale == (0.5, 1.0)
    with pytest.raises(ValueError, match="colour_jitter"):
        ViewSettings.from_dict({"colour_jitter": 0.4})
