"""Dense contrastive, restoration and combined methods: each loss against an independent computation."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

torch = pytest.importorskip("torch")
import torch.nn.functional as F  # noqa: E402

from test_methods import nt_xent_by_formula  # noqa: E402
from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.pretrain.augment import ViewSettings, apply_view, draw_params  # noqa: E402
from warmstart.pretrain.corrupt import bezier_remap, corrupt, CorruptionSettings, local_shuffle, paint  # noqa: E402
from warmstart.pretrain.geometry import patch_to_view, view_to_patch  # noqa: E402
from warmstart.pretrain.methods import Views, build_method  # noqa: E402


def _views(b=4, size=32, seed=0):
    g = torch.Generator().manual_seed(seed)
    s = ViewSettings(crop_scale=(0.4, 1.0))
    x = torch.randn(b, 1, size, size, generator=g)
    p1, p2 = draw_params(b, size, s, g), draw_params(b, size, s, g)
    return apply_view(x, p1, g), apply_view(x, p2, g), Views(x, p1, p2, g)


# ------------------------------------------------------------------------------------ corruptions


def test_bezier_remap_matches_a_numpy_evaluation_of_the_curve():
    x = torch.rand(3, 1, 16, 16, generator=torch.Generator().manual_seed(1)) * 4 - 1
    select = torch.tensor([True, False, True])
    out = bezier_remap(x, select, torch.Generator().manual_seed(5))
    ctrl = torch.rand(3, 2, 2, generator=torch.Generator().manual_seed(5)).numpy()  # the same first draw
    assert torch.equal(out[1], x[1])
    for i in (0, 2):
        t = np.linspace(0, 1, 20001)
        (ax, ay), (bx, by) = ctrl[i]
        cx = 3 * (1 - t) ** 2 * t * ax + 3 * (1 - t) * t**2 * bx + t**3  # cubic Bézier, P0 = (0,0), P3 = (1,1)
        cy = 3 * (1 - t) ** 2 * t * ay + 3 * (1 - t) * t**2 * by + t**3
        v = x[i].numpy().ravel()
        lo, hi = v.min(), v.max()
        expect = np.interp((v - lo) / (hi - lo), np.maximum.accumulate(cx), np.maximum.accumulate(cy)) * (hi - lo) + lo
        assert np.allclose(out[i].numpy().ravel(), expect, atol=2e-3 * (hi - lo))
        assert out[i].min() == pytest.approx(lo, abs=1e-5) and out[i].max() == pytest.approx(hi, abs=1e-5)
        order = np.argsort(v)
        assert np.all(np.diff(out[i].numpy().ravel()[order]) >= -1e-6)  # monotone: the ranks are kept


def test_local_shuffle_only_permutes_pixels_inside_tiles():
    x = torch.arange(2 * 20 * 20, dtype=torch.float32).reshape(2, 1, 20, 20)
    g = torch.Generator().manual_seed(2)
    out = local_shuffle(x, torch.tensor([True, False]), g, block=4, fraction=0.5)
    oy, ox = (int(v) for v in torch.randint(0, 4, (2,), generator=torch.Generator().manual_seed(2)))
    assert torch.equal(out[1], x[1]) and not torch.equal(out[0], x[0])
    changed_tiles = 0
    for ty in range(oy, oy + ((20 - oy) // 4) * 4, 4):
        for tx in range(ox, ox + ((20 - ox) // 4) * 4, 4):
            a, b = x[0, 0, ty:ty + 4, tx:tx + 4], out[0, 0, ty:ty + 4, tx:tx + 4]
            assert torch.equal(a.flatten().sort().values, b.flatten().sort().values)  # same pixels, new places
            changed_tiles += int(not torch.equal(a, b))
    assert 0 < changed_tiles
    inside = torch.zeros(20, 20, dtype=torch.bool)
    inside[oy:oy + ((20 - oy) // 4) * 4, ox:ox + ((20 - ox) // 4) * 4] = True
    assert torch.equal(out[0, 0][~inside], x[0, 0][~inside])  # the remainder at the edges is untouched


@pytest.mark.parametrize("share,low,high", [(0.0, 0.02, 0.5), (1.0, 0.2, 0.9)])
def test_in_painting_replaces_boxes_and_out_painting_the_rest(share, low, high):
    x = torch.zeros(16, 1, 42, 42)
    x[:, :, 0, 0], x[:, :, 0, 1] = -1.0, 1.0  # every sample's range is [-1, 1]
    out = paint(x, torch.ones(16, dtype=torch.bool), torch.Generator().manual_seed(3), share, boxes=5)
    changed = (out != x).float().mean(dim=(1, 2, 3))
    assert bool(((changed > low) & (changed < high)).all()), changed
    assert out.min() >= -1 and out.max() <= 1  # noise within the sample's own range
    assert torch.equal(paint(x, torch.zeros(16, dtype=torch.bool), torch.Generator(), share, 5), x)


def test_corrupt_is_reproducible_from_the_generator():
    x = torch.randn(4, 1, 32, 32, generator=torch.Generator().manual_seed(0))
    a = corrupt(x, CorruptionSettings(), torch.Generator().manual_seed(9))
    b = corrupt(x, CorruptionSettings(), torch.Generator().manual_seed(9))
    assert torch.equal(a, b) and not torch.equal(a, x)


# ----------------------------------------------------------------------------------------- dense


def _bilinear(fmap: np.ndarray, y: float, x: float) -> np.ndarray:
    """Read a (C, h, w) map at (y, x) fractions, pixel centres at (i + 0.5) / n, edges clamped."""
    c, h, w = fmap.shape
    u, v = min(max(y * h - 0.5, 0), h - 1), min(max(x * w - 0.5, 0), w - 1)
    i0, j0 = int(np.floor(u)), int(np.floor(v))
    i1, j1 = min(i0 + 1, h - 1), min(j0 + 1, w - 1)
    a, b = u - i0, v - j0
    return ((1 - a) * (1 - b) * fmap[:, i0, j0] + (1 - a) * b * fmap[:, i0, j1]
            + a * (1 - b) * fmap[:, i1, j0] + a * b * fmap[:, i1, j1])


def test_dense_pairs_are_the_same_patch_point_read_in_both_maps():
    m = build_method("dense", build_encoder("unet", base_width=4, depth=3), max_points=10_000)
    _, _, views = _views(b=3)
    f1, f2 = torch.randn(3, 8, 6, 6), torch.randn(3, 8, 6, 6)
    a, b = m.dense_pairs(f1, f2, views)
    expect_a, expect_b = [], []
    for s in range(3):  # the pairing written out point by point
        p1 = dataclasses.replace(views.params1, **{k: getattr(views.params1, k)[s:s + 1] for k in
                                                    ("crop", "flip_x", "flip_y", "turns", "affine")})
        p2 = dataclasses.replace(views.params2, **{k: getattr(views.params2, k)[s:s + 1] for k in
                                                    ("crop", "flip_x", "flip_y", "turns", "affine")})
        for i in range(6):
            for j in range(6):
                c = torch.tensor([[[(i + 0.5) / 6, (j + 0.5) / 6]]])
                q = patch_to_view(view_to_patch(c, p1), p2)[0, 0]
                if 0 <= q[0] <= 1 and 0 <= q[1] <= 1:
                    expect_a.append(f1[s, :, i, j].numpy())
                    expect_b.append(_bilinear(f2[s].numpy(), float(q[0]), float(q[1])))
    assert len(a) == len(expect_a) > 10
    assert np.allclose(a.numpy(), np.array(expect_a), atol=1e-5)
    assert np.allclose(b.numpy(), np.array(expect_b), atol=1e-4)


def test_dense_loss_is_the_weighted_global_and_dense_nt_xent():
    torch.manual_seed(0)
    m = build_method("dense", build_encoder("unet", base_width=4, depth=3), temperature=0.2, dense_weight=0.3).eval()
    v1, v2, views = _views(b=4)
    loss, out = m.loss(v1, v2, views)
    with torch.no_grad():
        f1, f2 = m.encoder(v1)[-1], m.encoder(v2)[-1]
        glob = nt_xent_by_formula(m.head(f1.mean((-2, -1))), m.head(f2.mean((-2, -1))), 0.2)
        a, b = m.dense_pairs(f1, f2, views)
        dense = nt_xent_by_formula(m.dense_head(a), m.dense_head(b), 0.2)
    assert float(loss) == pytest.approx(float(0.7 * glob + 0.3 * dense), rel=1e-4)
    assert out["embedding"].shape == (4, m.encoder.spec.out_channels)


# ----------------------------------------------------------------------------- restoration, both


def test_restore_loss_is_the_mse_of_restoring_the_corrupted_original():
    torch.manual_seed(0)
    m = build_method("restore", build_encoder("unet", base_width=4, depth=3)).eval()
    v1, v2, views = _views(b=3)
    loss, _ = m.loss(v1, v2, dataclasses.replace(views, generator=torch.Generator().manual_seed(4)))
    with torch.no_grad():
        damaged = corrupt(views.original, m.corruption, torch.Generator().manual_seed(4))
        restored = m.restore_head(m.decoder(m.encoder(damaged), (32, 32)))
        expect = ((restored - views.original) ** 2).mean()
    assert float(loss) == pytest.approx(float(expect), rel=1e-5)
    assert m.exported_decoder() is m.decoder


def test_combined_is_the_weighted_sum_of_its_parts_on_one_encoder():
    torch.manual_seed(0)
    m = build_method("combined", build_encoder("unet", base_width=4, depth=3), contrastive="simclr",
                     contrastive_weight=0.5, restore_weight=2.0, contrastive_params={"temperature": 0.3}).eval()
    assert m.contrastive.encoder is m.encoder is m.restore.encoder
    v1, v2, views = _views(b=4)
    loss, _ = m.loss(v1, v2, dataclasses.replace(views, generator=torch.Generator().manual_seed(7)))
    with torch.no_grad():
        lc, _ = m.contrastive.loss(v1, v2, views)
        lr, _ = m.restore.loss(v1, v2, dataclasses.replace(views, generator=torch.Generator().manual_seed(7)))
    assert float(loss) == pytest.approx(float(0.5 * lc + 2.0 * lr), rel=1e-5)
    with pytest.raises(ValueError, match="contrastive method"):
        build_method("combined", build_encoder("unet", base_width=4, depth=3), contrastive="restore")


def test_restoration_learns_on_a_few_steps():
    torch.manual_seed(0)
    m = build_method("restore", build_encoder("unet", base_width=8, depth=3))
    opt = torch.optim.Adam(m.parameters(), lr=3e-3)
    x = F.avg_pool2d(torch.randn(16, 1, 36, 36, generator=torch.Generator().manual_seed(1)), 5, 1)  # smooth 32 px
    losses = []
    for step in range(40):
        loss, _ = m.loss(x, x, Views(x, None, None, torch.Generator().manual_seed(step)))  # type: ignore[arg-type]
        opt.zero_grad()
        loss.backward()
        opt.step()
        losses.append(float(loss))
    assert np.mean(losses[-5:]) < 0.6 * np.mean(losses[:5])
