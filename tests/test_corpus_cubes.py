"""3-D corpora: cubes of cubic voxels, their provenance, refusals, report, shards and merge."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from conftest import textured
from warmstart.corpus.build import build_corpus
from warmstart.corpus.merge import merge_corpora
from warmstart.corpus.settings import CorpusSettings, FilterSettings, ReadSettings, SamplingSettings
from warmstart.corpus.store import CUBE, open_corpus
from warmstart.errors import RecipeError
from warmstart.intensity import IntensityReference

NO_FILTERS = FilterSettings(min_std=0.0, max_background_fraction=1.0, duplicate_threshold=0.0)


def _cube_settings(voxel_size_um=None, **sampling) -> CorpusSettings:
    base = dict(spatial_dims=3, patch_size=8, max_per_source=100_000)
    base.update(sampling)
    return CorpusSettings(read=ReadSettings(voxel_size_um=voxel_size_um), sampling=SamplingSettings(**base),
                          filters=NO_FILTERS)


def _write(folder: Path, fmt: str, data: np.ndarray, voxel_um: tuple[float, float, float]) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    if fmt == "npy":
        path = folder / "vol.npy"
        np.save(path, data)
    else:  # ImageJ hyperstack: in-plane resolution in pixels per unit, Z spacing in the metadata
        import tifffile

        path = folder / "vol.tif"
        tifffile.imwrite(path, data, imagej=True, resolution=(1 / voxel_um[2], 1 / voxel_um[1]),
                         metadata={"spacing": voxel_um[0], "unit": "um", "axes": "ZYX"})
    return path


@pytest.mark.parametrize("fmt", ["npy", "tiff"])
@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
def test_anisotropic_voxels_become_cubes_by_area_averaging(tmp_path, fmt, dtype):
    # FIB-SEM-like voxels: sections 2 um thick, pixels 1 um. Cubes of 8 have 2 um voxels, so each
    # is an (8, 16, 16) block averaged over 2 x 2 pixels in-plane. Reference: scikit-image's
    # downscale_local_mean (block means), then the source's own intensity map.
    from skimage.transform import downscale_local_mean

    raw = textured(shape=(24, 48, 48), dtype=dtype, seed=3, lo=10, hi=250 if dtype == np.uint8 else 30000)
    _write(tmp_path / "a", fmt, raw, (2.0, 1.0, 1.0))
    stated = (2.0, 1.0, 1.0) if fmt == "npy" else None  # npy holds no voxel size: the recipe states it
    res = build_corpus(tmp_path / "a", tmp_path / "c.zarr", _cube_settings(stated), report=False, progress=False)
    store = open_corpus(res.path)
    cubes, idx = store.read(), store.index()
    assert cubes.shape == (3 * 3 * 3, 1, 8, 8, 8)
    assert store.spatial_dims == 3 and store.manifest["patches"]["shape"] == [1, 8, 8, 8]
    assert store.manifest["patches"]["axis_order"] == "ZYX"
    entry = store.manifest["sources"][0]
    assert entry["downscale_factors"] == [1.0, 2.0, 2.0] and entry["voxels_assumed_cubic"] is False
    assert set(idx["axis"]) == {CUBE}
    np.testing.assert_allclose(idx["scale"], 5 / 3)
    ref = IntensityReference.from_dict(entry["reference"])
    tol = store.manifest["patches"]["quantization"]["measured_max_abs_error"] + 1e-5
    for i in range(len(cubes)):
        z, y, x = idx["z"][i], idx["y"][i], idx["x"][i]
        block = raw[z:z + 8, y:y + 16, x:x + 16].astype(np.float64)
        want = ref.apply(downscale_local_mean(block, (1, 2, 2)).astype(np.float32))
        np.testing.assert_allclose(cubes[i, 0], want, atol=tol, rtol=0)
    # block starts lie on the grid of one cube per stride (8 output voxels = 8 slices, 16 pixels)
    assert sorted(set(idx["z"])) == [0, 8, 16] and sorted(set(idx["y"])) == [0, 16, 32]


def test_unknown_voxel_size_is_refused_unless_stated_or_assumed(tmp_path):
    np.save((tmp_path / "a").mkdir() or tmp_path / "a" / "vol.npy", textured(shape=(16, 32, 32), seed=1))
    from warmstart.errors import CorpusError

    with pytest.raises(CorpusError, match=r"vol\.npy: voxel size unknown along Z, Y, X: 3-D cubes need cubic voxels; "
                                          r"state the size with read\.voxel_size_um .* or set sampling\.assume_cubic_voxels"):
        build_corpus(tmp_path / "a", tmp_path / "c.zarr", _cube_settings(), report=False, progress=False)
    ok = build_corpus(tmp_path / "a", tmp_path / "c2.zarr", _cube_settings(assume_cubic_voxels=True),
                      report=False, progress=False)
    entry = open_corpus(ok.path).manifest["sources"][0]
    assert entry["status"] == "ok" and entry["voxels_assumed_cubic"] is True
    assert entry["downscale_factors"] == [1.0, 1.0, 1.0]
    assert any("assumed cubic" in w for w in entry["warnings"])
    assert open_corpus(ok.path).read().shape == (2 * 4 * 4, 1, 8, 8, 8)


def test_a_target_finer_than_the_coarsest_axis_is_not_upsampled(tmp_path):
    (tmp_path / "a").mkdir()
    np.save(tmp_path / "a" / "vol.npy", textured(shape=(16, 64, 64), seed=2))
    res = build_corpus(tmp_path / "a", tmp_path / "c.zarr", _cube_settings((4.0, 1.0, 1.0), target_voxel_um=2.0),
                       report=False, progress=False)
    entry = open_corpus(res.path).manifest["sources"][0]
    assert entry["downscale_factors"] == [1.0, 4.0, 4.0]  # 4 um cubes, not 2 um ones
    assert any("nothing is upsampled" in w for w in entry["warnings"])
    # and a coarser target downsamples every axis to it
    res = build_corpus(tmp_path / "a", tmp_path / "d.zarr", _cube_settings((4.0, 1.0, 1.0), target_voxel_um=8.0),
                       report=False, progress=False)
    assert open_corpus(res.path).manifest["sources"][0]["downscale_factors"] == [2.0, 8.0, 8.0]


def test_report_montage_shows_three_planes_per_cube(tmp_path):
    from PIL import Image

    from warmstart.corpus.report import cube_planes

    cubes = np.arange(2 * 4 * 4 * 4, dtype=np.float32).reshape(2, 4, 4, 4)
    planes = cube_planes(cubes)
    assert planes.shape == (6, 4, 4)
    np.testing.assert_array_equal(planes[3], cubes[1, 2])        # Z plane of the second cube
    np.testing.assert_array_equal(planes[4], cubes[1, :, 2])     # its Y plane
    np.testing.assert_array_equal(planes[5], cubes[1, :, :, 2])  # its X plane
    (tmp_path / "a").mkdir()
    np.save(tmp_path / "a" / "vol.npy", textured(shape=(16, 32, 32), seed=1))
    res = build_corpus(tmp_path / "a", tmp_path / "c.zarr", _cube_settings((1.0, 1.0, 1.0)), progress=False)
    img = np.asarray(Image.open(res.path / "report" / "montage_0000.png"))
    # 32 cubes, 16 of them shown: 48 planes of 8 px in rows of 9 with 2 px gaps
    assert img.shape[:2] == (6 * 10 - 2, 9 * 10 - 2)


def test_cube_shards_merge_to_the_single_build(tmp_path):
    for i in range(3):
        (tmp_path / "a").mkdir(exist_ok=True)
        np.save(tmp_path / "a" / f"v{i}.npy", textured(shape=(16, 32, 32), seed=i))
    s = _cube_settings((1.0, 1.0, 1.0), stride=6)
    full = build_corpus(tmp_path / "a", tmp_path / "full.zarr", s, report=False, progress=False)
    shards = [build_corpus(tmp_path / "a", tmp_path / f"s{i}.zarr", s, shard=f"{i}/2", report=False, progress=False)
              for i in range(2)]
    merged = open_corpus(merge_corpora([x.path for x in shards], tmp_path / "m.zarr", report=False, progress=False))
    np.testing.assert_array_equal(open_corpus(full.path).read(), merged.read())
    assert merged.spatial_dims == 3


def test_cube_settings_are_checked():
    with pytest.raises(RecipeError, match="channels = 1"):
        SamplingSettings(spatial_dims=3, channels=3)
    with pytest.raises(RecipeError, match="spatial_dims must be 2 or 3"):
        SamplingSettings(spatial_dims=1)
    assert SamplingSettings(spatial_dims=3, patch_size=32).patch_shape == (1, 32, 32, 32)
    assert SamplingSettings(channels=3, patch_size=32).patch_shape == (3, 32, 32)


def test_a_2d_manifest_says_2_spatial_dims(tmp_path):
    from conftest import tiny_corpus

    assert open_corpus(tiny_corpus(tmp_path, n=1)).spatial_dims == 2



def test_an_interrupted_cube_build_resumes_to_the_uninterrupted_store(tmp_path):
    # As for 2-D patches: the build died after appending later sources' cubes but before their
    # journal records; the rerun cuts them back out and ends with the store a single build makes.
    for i in range(3):
        (tmp_path / "a").mkdir(exist_ok=True)
        np.save(tmp_path / "a" / f"v{i}.npy", textured(shape=(16, 32, 32), seed=i))
    s = _cube_settings((1.0, 1.0, 1.0), stride=6)
    ref = open_corpus(build_corpus(tmp_path / "a", tmp_path / "ref.zarr", s, report=False, progress=False).path)
    out = tmp_path / "c.zarr"
    build_corpus(tmp_path / "a", out, s, report=False, progress=False)
    for j in sorted((out / "journal").glob("*.json"))[1:]:
        j.unlink()
    (out / "manifest.json").unlink()
    res = build_corpus(tmp_path / "a", out, s, report=False, progress=False)
    assert res.resumed == 1
    again = open_corpus(out)
    np.testing.assert_array_equal(again.patches[:], ref.patches[:])
    for col in ("source", "z", "y", "x", "axis"):
        np.testing.assert_array_equal(again.index()[col], ref.index()[col])
    assert again.manifest["counts"] == ref.manifest["counts"]


def test_cube_filters_and_quota_are_counted_per_rule_and_source(tmp_path):
    # A volume whose lower half is one constant value: every cube that lies wholly in it has no
    # variance and is dropped by that rule. The quota caps the planned positions (a seeded subsample
    # of 5), and the filters then act on those 5.
    vol = textured(shape=(16, 32, 32), seed=4).astype(np.float32)
    vol[8:] = vol.mean()
    (tmp_path / "a").mkdir()
    np.save(tmp_path / "a" / "v.npy", vol)
    settings = CorpusSettings(read=ReadSettings(voxel_size_um=(1.0, 1.0, 1.0)),
                              sampling=SamplingSettings(spatial_dims=3, patch_size=8, max_per_source=100_000),
                              filters=FilterSettings(min_std=0.02, max_background_fraction=1.0, duplicate_threshold=0.0))
    counts = open_corpus(build_corpus(tmp_path / "a", tmp_path / "c.zarr", settings, report=False,
                                      progress=False).path).manifest["sources"][0]["counts"]
    # 2 x 4 x 4 cube positions; the 16 of the constant half (z = 8) have no variance
    assert counts["planned"] == 32 and counts["low_variance"] == 16 and counts["kept"] == 16
    capped = CorpusSettings(read=settings.read, filters=settings.filters,
                            sampling=SamplingSettings(spatial_dims=3, patch_size=8, max_per_source=5))
    store = open_corpus(build_corpus(tmp_path / "a", tmp_path / "q.zarr", capped, report=False, progress=False).path)
    c = store.manifest["sources"][0]["counts"]
    assert c["planned"] == 5 and c["kept"] + c["low_variance"] == 5
    assert len(store.read()) == c["kept"] and set(store.index()["z"]) == {0}
