"""Patch geometry, resampling and filters, checked against scikit-image and direct crops."""
from __future__ import annotations

import numpy as np
import pytest

from conftest import textured
from warmstart.corpus.resample import resample_block, resample_matrix
from warmstart.corpus.sampling import (PatchFilter, downscale_factors, extract_patches, iter_groups, plan_patches,
                                       source_seed)
from warmstart.corpus.settings import FilterSettings, SamplingSettings


# --- resampling ------------------------------------------------------------------------------
@pytest.mark.parametrize("factor", [2, 3, 4])
def test_integer_downscale_equals_skimage_local_mean(factor):
    from skimage.transform import downscale_local_mean

    img = np.random.default_rng(0).random((1, 1, 24, 36)).astype(np.float32)
    out = resample_block(img, (1, 24 // factor, 36 // factor))[0, 0]
    np.testing.assert_allclose(out, downscale_local_mean(img[0, 0], (factor, factor)), rtol=1e-5)


def test_upscale_equals_skimage_linear_resize():
    from skimage.transform import resize

    img = np.random.default_rng(1).random((10, 14)).astype(np.float32)
    out = resample_block(img[None, None], (1, 25, 31))[0, 0]
    ref = resize(img, (25, 31), order=1, mode="edge", anti_aliasing=False)  # scikit-image bilinear
    np.testing.assert_allclose(out, ref, atol=1e-5)


@pytest.mark.parametrize("n_in,n_out", [(10, 3), (7, 7), (5, 9), (129, 64)])
def test_resample_rows_sum_to_one_and_area_preserves_mean(n_in, n_out):
    w = resample_matrix(n_in, n_out)
    np.testing.assert_allclose(w.sum(axis=1), 1, atol=1e-6)
    if n_out <= n_in:
        x = np.random.default_rng(2).random(n_in)
        assert (w @ x).mean() == pytest.approx(x.mean(), rel=1e-5)


def test_downscale_factors_from_target_and_unknown():
    s = SamplingSettings(target_voxel_um=2.0, scale_factor=1.5)
    f, notes = downscale_factors((4.0, 0.5, None), s)
    assert f == pytest.approx((0.5, 4.0, 1.5)) and any("along X unknown" in n for n in notes)
    assert any("upsampling" in n for n in notes) is False  # 0.5 is exactly 2x: allowed without a note


def test_isotropic_factors_make_fibsem_voxels_cubic_without_upsampling():
    # A FIB-SEM stack: 20 nm sections, 10 nm pixels. Output voxels must be cubic (20 nm x scale).
    s = SamplingSettings(scale_factor=2.0, isotropic=True)
    f, notes = downscale_factors((0.02, 0.01, 0.01), s)
    assert f == pytest.approx((2.0, 4.0, 4.0)) and not notes
    assert {round(v * k, 9) for v, k in zip((0.02, 0.01, 0.01), f)} == {0.04}
    assert downscale_factors((None, 0.01, 0.01), s)[0] == (2.0, 2.0, 2.0)  # unknown axis: plain factor
    assert downscale_factors((3.0, 3.0, 3.0), s)[0] == (2.0, 2.0, 2.0)


# --- planning --------------------------------------------------------------------------------
def test_grid_plan_geometry_and_centring():
    s = SamplingSettings(patch_size=16, slice_stride=4, max_per_source=10_000)
    plan = plan_patches((20, 50, 40), (1, 1, 1), s, np.random.default_rng(0))
    # every axis is centred: Z 0,4,..,16 spans 17 of 20 -> offset 1; Y 3 patches span 48 of 50 -> 1;
    # X 2 patches span 32 of 40 -> 4
    assert len(plan) == 5 * 3 * 2
    assert sorted(set(plan.start[:, 0])) == [1, 5, 9, 13, 17]
    assert sorted(set(plan.start[:, 1])) == [1, 17, 33]
    assert sorted(set(plan.start[:, 2])) == [4, 20]
    assert plan.extent == {0: (1, 16, 16)}


def test_plan_axes_channels_scale_and_quota():
    s = SamplingSettings(patch_size=8, axes="ZYX", channels=3, max_per_source=50, slice_stride=2, seed=3)
    plan = plan_patches((30, 40, 50), (2.0, 2.0, 2.0), s, np.random.default_rng(7))
    assert len(plan) == 50
    assert plan.extent == {0: (6, 16, 16), 1: (16, 6, 16), 2: (16, 16, 6)}
    assert set(np.unique(plan.axis)) == {0, 1, 2}
    stop = plan.stop()
    assert (stop <= np.array([30, 40, 50])).all() and (plan.start >= 0).all()
    again = plan_patches((30, 40, 50), (2.0, 2.0, 2.0), s, np.random.default_rng(7))
    np.testing.assert_array_equal(plan.start, again.start)


def test_random_mode_count_and_seed():
    s = SamplingSettings(patch_size=8, mode="random", count=37, axes="ZY")
    a = plan_patches((20, 30, 30), (1, 1, 1), s, np.random.default_rng(source_seed(0, "a.tif")))
    b = plan_patches((20, 30, 30), (1, 1, 1), s, np.random.default_rng(source_seed(0, "a.tif")))
    c = plan_patches((20, 30, 30), (1, 1, 1), s, np.random.default_rng(source_seed(0, "b.tif")))
    assert len(a) == 37
    np.testing.assert_array_equal(a.start, b.start)
    assert not np.array_equal(a.start, c.start)


def test_too_small_volume_plans_nothing():
    s = SamplingSettings(patch_size=64)
    assert len(plan_patches((5, 40, 80), (1, 1, 1), s, np.random.default_rng(0))) == 0


def test_groups_respect_budget_and_cover_every_patch():
    s = SamplingSettings(patch_size=8, axes="ZYX", slice_stride=1, max_per_source=100_000)
    plan = plan_patches((16, 64, 64), (1, 1, 1), s, np.random.default_rng(0))
    seen = []
    for idx, region in iter_groups(plan, (16, 64, 64), 2, budget_bytes=8 * 64 * 64 * 2):
        size = np.prod([r.stop - r.start for r in region]) * 2
        assert size <= 8 * 64 * 64 * 2 or len(idx) == 1
        lo = np.array([r.start for r in region])
        hi = np.array([r.stop for r in region])
        assert (plan.start[idx] >= lo).all() and (plan.stop()[idx] <= hi).all()
        seen += idx.tolist()
    assert sorted(seen) == list(range(len(plan)))


# --- extraction and filters ------------------------------------------------------------------
def _extract(vol, s, factors=(1, 1, 1), filters=FilterSettings(min_std=0, max_background_fraction=1, duplicate_threshold=0),
             budget=2**20, normalize=lambda x, out=None: x):
    plan = plan_patches(vol.shape, factors, s, np.random.default_rng(0))
    filt = PatchFilter(filters, background_level=-np.inf)
    out = list(extract_patches(lambda r: vol[r], vol.shape, vol.itemsize, plan,
                               (s.channels, s.patch_size, s.patch_size), normalize, filt, budget))
    patches = np.concatenate([p for p, _ in out]) if out else np.empty((0,))
    idx = np.concatenate([i for _, i in out]) if out else np.empty(0, int)
    return plan, patches, idx, filt


@pytest.mark.parametrize("axis", ["Z", "Y", "X"])
def test_extracted_patches_are_the_crops(axis):
    vol = textured(shape=(20, 24, 28), dtype=np.float32)
    s = SamplingSettings(patch_size=8, axes=axis, channels=3, slice_stride=3, max_per_source=10_000)
    plan, patches, idx, _ = _extract(vol, s, budget=4096)
    assert len(patches) == len(plan)
    for p, i in zip(patches, idx):
        z, y, x = plan.start[i]
        if axis == "Z":
            ref = vol[z:z + 3, y:y + 8, x:x + 8]
        elif axis == "Y":
            ref = vol[z:z + 8, y:y + 3, x:x + 8].transpose(1, 0, 2)
        else:
            ref = vol[z:z + 8, y:y + 8, x:x + 3].transpose(2, 0, 1)
        np.testing.assert_array_equal(p, ref)


def test_downscaled_patch_is_block_mean():
    vol = textured(shape=(4, 32, 32), dtype=np.float32)
    s = SamplingSettings(patch_size=8, slice_stride=4, max_per_source=1000)
    plan, patches, idx, _ = _extract(vol, s, factors=(2.0, 2.0, 2.0))
    z, y, x = plan.start[idx[0]]
    block = vol[z:z + 2, y:y + 16, x:x + 16].mean(axis=0).reshape(8, 2, 8, 2).mean(axis=(1, 3))
    np.testing.assert_allclose(patches[0, 0], block, rtol=1e-5)


def test_filters_count_each_rule():
    vol = textured(shape=(9, 16, 64), dtype=np.float32, lo=0, hi=1)
    vol[:, :, 16:32] = 0.5  # constant column -> low variance
    vol[:, :, 32:48] = np.where(np.arange(16)[:, None] < 1, 1.0, 0.0)  # 94 % at background level 0
    vol[3, :, 48:64] = np.nan  # one non-finite patch
    vol[4:6, :, 0:16] = vol[3, :, 0:16]  # slices 4, 5 repeat slice 3 at x 0:16 -> duplicates
    s = SamplingSettings(patch_size=16, slice_stride=1, max_per_source=10_000)
    f = FilterSettings(min_std=0.01, max_background_fraction=0.9, duplicate_threshold=0.05)
    plan = plan_patches(vol.shape, (1, 1, 1), s, np.random.default_rng(0))
    filt = PatchFilter(f, background_level=0.0)
    kept = list(extract_patches(lambda r: vol[r], vol.shape, 4, plan, (1, 16, 16), lambda x, out=None: x, filt, 2**20))
    c = filt.counts
    assert (c.planned, c.low_variance, c.background, c.nonfinite, c.duplicate) == (36, 9, 9, 1, 2)
    assert c.kept == 36 - 9 - 9 - 1 - 2 == sum(len(p) for p, _ in kept)
    assert all(np.isfinite(p).all() for p, _ in kept)
