"""Readers: every format written by its own library reads back exactly, lazily, with its voxel size."""
from __future__ import annotations

import json
import subprocess
import sys
import tracemalloc
import warnings

import numpy as np
import pytest

from conftest import textured, write_dicom_series
from warmstart.errors import SourceNotFoundError, VolumeReadError
from warmstart.volumes import discover, open_volume
from warmstart.volumes import base as vbase

DTYPES = [np.uint8, np.uint16, np.int16, np.float32, np.float64]


def _region_ok(vol, ref):
    assert vol.shape == ref.shape
    np.testing.assert_array_equal(vol.read(), ref)
    np.testing.assert_array_equal(vol.read((slice(2, 5), slice(3, 20), slice(7, 30))), ref[2:5, 3:20, 7:30])
    np.testing.assert_array_equal(vol.read((4,)), ref[4:5])


# --- TIFF (written by tifffile) -------------------------------------------------------------
@pytest.mark.parametrize("dtype", DTYPES + [np.int8, np.uint32, np.int32])
@pytest.mark.parametrize("layout", ["plain", "bigtiff", "zlib-tiled", "imagej", "ome"])
def test_tiff_roundtrip(tmp_path, dtype, layout):
    import tifffile

    ref = textured(dtype=dtype)
    p = tmp_path / "v.tif"
    kw = {"plain": {}, "bigtiff": {"bigtiff": True}, "zlib-tiled": {"compression": "zlib", "tile": (16, 16)},
          "imagej": {"imagej": True, "metadata": {"axes": "ZYX"}}, "ome": {"metadata": {"axes": "ZYX"}}}[layout]
    if layout == "imagej" and np.dtype(dtype) in (np.dtype(np.float64), np.dtype(np.int8), np.dtype(np.uint32), np.dtype(np.int32)):
        pytest.skip("ImageJ hyperstacks hold 8/16/32-bit float and unsigned 8/16 only (tifffile refuses)")
    if layout == "ome":
        p = tmp_path / "v.ome.tif"
    tifffile.imwrite(p, ref, **kw)
    with open_volume(p) as vol:
        assert vol.source.format == "tiff"
        assert vol.dtype == np.dtype(dtype)
        _region_ok(vol, ref)


def test_tiff_voxel_sizes(tmp_path):
    import tifffile

    a = textured()
    # OME-XML PhysicalSize with units (OME schema 2016-06: default unit µm)
    tifffile.imwrite(tmp_path / "o.ome.tif", a, metadata={"axes": "ZYX", "PhysicalSizeX": 250, "PhysicalSizeXUnit": "nm",
                                                           "PhysicalSizeY": 250, "PhysicalSizeYUnit": "nm", "PhysicalSizeZ": 0.5})
    assert open_volume(tmp_path / "o.ome.tif").voxel_size_um == pytest.approx((0.5, 0.25, 0.25))
    # ImageJ: spacing (Z) and unit; X/Y from the resolution tags in pixels per unit
    tifffile.imwrite(tmp_path / "ij.tif", a, imagej=True, resolution=(1 / 2.5, 1 / 2.5),
                     metadata={"spacing": 5.0, "unit": "mm", "axes": "ZYX"})
    assert open_volume(tmp_path / "ij.tif").voxel_size_um == pytest.approx((5000.0, 2500.0, 2500.0))
    # TIFF 6.0 ResolutionUnit 3 = centimetre: 10000 px/cm is 1 µm; 2 = inch: 2540 px/inch is 10 µm
    tifffile.imwrite(tmp_path / "cm.tif", a, resolution=(10000, 10000), resolutionunit="CENTIMETER")
    assert open_volume(tmp_path / "cm.tif").voxel_size_um == pytest.approx((None, 1.0, 1.0))
    tifffile.imwrite(tmp_path / "in.tif", a, resolution=(2540, 5080), resolutionunit="INCH")
    assert open_volume(tmp_path / "in.tif").voxel_size_um == pytest.approx((None, 5.0, 10.0))
    # 72 dpi is an editor default, not a measurement: unknown, never guessed
    tifffile.imwrite(tmp_path / "dpi.tif", a, resolution=(72, 72), resolutionunit="INCH")
    vol = open_volume(tmp_path / "dpi.tif")
    assert vol.voxel_size_um == (None, None, None) and "screen" in vol.meta["voxel_size_from"]
    tifffile.imwrite(tmp_path / "none.tif", a)
    assert open_volume(tmp_path / "none.tif").voxel_size_um == (None, None, None)


def test_tiff_hyperstack_channels_and_rgb(tmp_path):
    import tifffile

    a = textured(shape=(4, 2, 32, 40))  # Z C Y X
    tifffile.imwrite(tmp_path / "h.tif", a, imagej=True, metadata={"axes": "ZCYX"})
    with pytest.raises(VolumeReadError, match="2 channels"):
        open_volume(tmp_path / "h.tif")
    vol = open_volume(tmp_path / "h.tif", channel=1)
    np.testing.assert_array_equal(vol.read(), a[:, 1])
    rgb = (np.random.default_rng(0).random((32, 40, 3)) * 255).astype(np.uint8)
    tifffile.imwrite(tmp_path / "rgb.tif", rgb, photometric="rgb")
    with pytest.raises(VolumeReadError, match="colour"):
        open_volume(tmp_path / "rgb.tif")
    lum = open_volume(tmp_path / "rgb.tif", rgb="luminance").read()[0]
    # ITU-R BT.601 luma weights (Rec. 601, common practice for RGB -> grey)
    np.testing.assert_allclose(lum, rgb @ np.array([0.299, 0.587, 0.114]), rtol=1e-5)


def test_2d_image_is_one_slice(tmp_path):
    import tifffile

    img = textured(shape=(1, 40, 30))[0]
    tifffile.imwrite(tmp_path / "one.tif", img)
    vol = open_volume(tmp_path / "one.tif")
    assert vol.shape == (1, 40, 30)
    np.testing.assert_array_equal(vol.read()[0], img)


# --- zarr / OME-Zarr -------------------------------------------------------------------------
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("zarr_format", [2, 3])
def test_zarr_array_roundtrip(tmp_path, dtype, zarr_format):
    import zarr

    ref = textured(dtype=dtype)
    arr = zarr.create_array(str(tmp_path / "a.zarr"), shape=ref.shape, dtype=ref.dtype, chunks=(4, 16, 16), zarr_format=zarr_format)
    arr[:] = ref
    with open_volume(tmp_path / "a.zarr") as vol:
        assert vol.source.format == "zarr"
        _region_ok(vol, ref)


@pytest.mark.parametrize("version", ["0.4", "0.5"])
def test_ome_zarr_levels_and_voxel_size(tmp_path, version):
    from ome_zarr.format import FormatV04, FormatV05
    from ome_zarr.writer import write_image

    ref = textured(shape=(8, 64, 64))
    fmt = FormatV04() if version == "0.4" else FormatV05()
    path = tmp_path / "img.ome.zarr"
    # ome-zarr writes OME-NGFF multiscales with scale coordinateTransformations per level
    write_image(ref, str(path), scale_factors=[2, 4], axes="zyx", fmt=fmt,
                scale={"z": 2.0, "y": 0.5, "x": 0.5}, axes_units={"z": "micrometer", "y": "nanometer", "x": "nanometer"})
    vol = open_volume(path)
    assert vol.source.format == "ome-zarr"
    assert vol.voxel_size_um == pytest.approx((2.0, 0.0005, 0.0005))
    np.testing.assert_array_equal(vol.read(), ref)
    # level nearest a 0.0012 µm target without going coarser: level 1 (0.001 µm); OME-NGFF scale factors 2 and 4
    lv = open_volume(path, target_voxel_um=0.0012)
    assert lv.meta["level"] == 1 and lv.shape == (8, 32, 32)
    assert lv.voxel_size_um[1] == pytest.approx(0.001)
    assert open_volume(path, target_voxel_um=1.0).meta["level"] == 2
    assert open_volume(path, target_voxel_um=0.0001).meta["level"] == 0


# --- MRC (mrcfile), NPY ----------------------------------------------------------------------
@pytest.mark.parametrize("dtype", [np.int8, np.int16, np.uint16, np.float32, np.float16])
def test_mrc_roundtrip(tmp_path, dtype):
    import mrcfile

    ref = textured(dtype=dtype, lo=-100 if np.dtype(dtype).kind != "u" else 10, hi=120)
    with mrcfile.new(tmp_path / "t.mrc") as m:
        m.set_data(ref)
        m.voxel_size = (12.0, 12.0, 30.0)  # x, y, z in Å (MRC2014)
    with open_volume(tmp_path / "t.mrc") as vol:
        assert vol.voxel_size_um == pytest.approx((30.0e-4, 12.0e-4, 12.0e-4))
        _region_ok(vol, ref)


def test_mrc_unset_voxel_size_is_unknown(tmp_path):
    import mrcfile

    with mrcfile.new(tmp_path / "t.mrc") as m:
        m.set_data(textured(dtype=np.float32))
    assert open_volume(tmp_path / "t.mrc").voxel_size_um == (None, None, None)


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("order", ["C", "F"])
def test_npy_roundtrip_and_override(tmp_path, dtype, order):
    ref = np.asarray(textured(dtype=dtype), order=order)
    np.save(tmp_path / "v.npy", ref)
    with open_volume(tmp_path / "v.npy", voxel_size_um=(2.0, None, 1.0)) as vol:
        assert vol.voxel_size_um == (2.0, None, 1.0)
        _region_ok(vol, ref)


# --- DICOM (pydicom) -------------------------------------------------------------------------
def test_dicom_series_sorted_by_position_in_hounsfield(tmp_path):
    hu = textured(shape=(7, 32, 32), dtype=np.float32, lo=-1000, hi=1500).round()
    write_dicom_series(tmp_path / "ct", hu, spacing_mm=(1.25, 0.6, 0.7), slope=1.0, intercept=-1024.0)
    vol = open_volume(tmp_path / "ct")
    assert vol.source.format == "dicom" and vol.meta["unit"] == "HU" and vol.meta["clinical"]
    # DICOM PS3.3 C.11.1 Modality LUT: HU = stored * slope + intercept; order from ImagePositionPatient
    np.testing.assert_allclose(vol.read(), hu)
    assert vol.voxel_size_um == pytest.approx((1250.0, 600.0, 700.0))


def test_dicom_rescale_slope_and_two_series(tmp_path):
    hu = textured(shape=(4, 16, 16), dtype=np.float32, lo=-1000, hi=1000)
    write_dicom_series(tmp_path / "mix", np.round(hu / 2) * 2, slope=2.0, intercept=-1000.0, series_uid="1.2.3.4")
    write_dicom_series(tmp_path / "mix", hu.round(), series_uid="1.2.3.5", seed=9, prefix="other")
    cands, _ = discover(tmp_path)
    assert [c.format for c in cands] == ["dicom", "dicom"]
    assert sorted(c.series_uid for c in cands) == ["1.2.3.4", "1.2.3.5"]
    first = open_volume(next(c for c in cands if c.series_uid == "1.2.3.4"))
    np.testing.assert_allclose(first.read(), np.round(hu / 2) * 2)
    with pytest.raises(VolumeReadError, match="holds 2 sources"):
        open_volume(tmp_path / "mix")


def test_pydicom_ct_small_reads_in_hu():
    from pydicom import dcmread
    from pydicom.data import get_testdata_file

    path = get_testdata_file("CT_small.dcm")
    ds = dcmread(path)
    vol = open_volume(path)
    # pydicom's shipped CT slice: RescaleSlope 1, RescaleIntercept -1024
    np.testing.assert_array_equal(vol.read()[0], ds.pixel_array.astype(np.float32) - 1024)
    assert vol.voxel_size_um[1:] == pytest.approx((661.468, 661.468))


# --- slice folders ---------------------------------------------------------------------------
@pytest.mark.parametrize("ext,dtype", [(".png", np.uint8), (".png", np.uint16), (".tif", np.uint16), (".tif", np.float32)])
def test_slice_folder_natural_order(tmp_path, ext, dtype):
    import tifffile
    from PIL import Image

    ref = textured(shape=(12, 20, 24), dtype=dtype)
    for i, sl in enumerate(ref):
        p = tmp_path / "stack" / f"slice_{i}{ext}"
        p.parent.mkdir(exist_ok=True)
        Image.fromarray(sl).save(p) if ext == ".png" else tifffile.imwrite(p, sl)
    cands, _ = discover(tmp_path)
    assert [(c.format, len(c.files)) for c in cands] == [("slices", 12)]
    vol = open_volume(cands[0])
    np.testing.assert_array_equal(vol.read(), ref)  # slice_2 before slice_10


def test_slice_folder_mismatched_slice_named(tmp_path):
    import tifffile

    for i in range(3):
        tifffile.imwrite(tmp_path / f"s_{i}.tif", np.zeros((10, 12 if i != 2 else 13), np.uint8))
    vol = open_volume(discover(tmp_path)[0][0])
    with pytest.raises(VolumeReadError, match="s_2.tif"):
        vol.read()


# --- discovery, bad input, laziness ----------------------------------------------------------
def test_discover_mixed_archive(small_archive):
    cands, ignored = discover(small_archive)
    assert [(c.name, c.format) for c in cands] == [
        ("cathode.mrc", "mrc"), ("filter_a.tif", "tiff"), ("grain.ome.zarr", "zarr"), ("seed.npy", "npy"), ("slices", "slices")]
    assert [i.path.endswith("README.txt") for i in ignored] == [True]


@pytest.mark.parametrize("content,match", [
    (b"", "empty file"),
    (b"II*\x00\x08\x00\x00\x00not a tiff at all", "corrupt or truncated|not a readable TIFF"),
    (b"hello world, this is text", "not a readable TIFF"),
])
def test_bad_tiff_named(tmp_path, content, match):
    p = tmp_path / "bad.tif"
    p.write_bytes(content)
    with pytest.raises(VolumeReadError, match=match) as info:
        open_volume(p)
    assert str(p) in str(info.value)


def test_truncated_raw_tiff_and_mrc(tmp_path):
    import mrcfile
    import tifffile

    tifffile.imwrite(tmp_path / "t.tif", textured())
    raw = (tmp_path / "t.tif").read_bytes()
    (tmp_path / "t.tif").write_bytes(raw[: len(raw) // 2])
    with pytest.raises(VolumeReadError, match="t.tif"):
        open_volume(tmp_path / "t.tif").read()
    with mrcfile.new(tmp_path / "m.mrc") as m:
        m.set_data(textured(dtype=np.float32))
    raw = (tmp_path / "m.mrc").read_bytes()
    (tmp_path / "m.mrc").write_bytes(raw[:5000])
    with pytest.raises(VolumeReadError, match="m.mrc"):
        open_volume(tmp_path / "m.mrc").read()


def test_missing_and_unknown(tmp_path):
    with pytest.raises(SourceNotFoundError) as info:
        open_volume(tmp_path / "nope.tif")
    assert isinstance(info.value, FileNotFoundError)
    (tmp_path / "x.xyz").write_text("?")
    with pytest.raises(VolumeReadError, match="unknown format"):
        open_volume(tmp_path / "x.xyz")


def test_region_read_does_not_load_whole_volume(tmp_path):
    import tifffile

    big = np.zeros((64, 512, 512), np.uint16)  # 32 MiB on disk
    big[10] = 7
    tifffile.imwrite(tmp_path / "big.tif", big)
    del big
    vol = open_volume(tmp_path / "big.tif")
    tracemalloc.start()
    sl = vol.read((10, slice(0, 256), slice(0, 256)))
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert sl.mean() == 7
    assert peak < 2 * 2**20, f"reading one slab cost {peak / 2**20:.1f} MiB"


def test_content_hash_kinds(tmp_path, monkeypatch):
    import hashlib

    p = tmp_path / "f.bin"
    p.write_bytes(b"x" * 5000)
    digest, kind, size = vbase.content_hash(p)
    assert (digest, kind, size) == (hashlib.sha256(b"x" * 5000).hexdigest(), "file", 5000)
    monkeypatch.setattr(vbase, "FULL_HASH_LIMIT", 100)
    monkeypatch.setattr(vbase, "HEAD_HASH_BYTES", 1000)
    digest2, kind2, _ = vbase.content_hash(p)
    assert kind2 == "head" and digest2 == hashlib.sha256(b"size=5000;" + b"x" * 1000).hexdigest()


def test_time_axis_warns(tmp_path):
    import tifffile

    a = textured(shape=(3, 4, 16, 16))
    tifffile.imwrite(tmp_path / "t.tif", a, imagej=True, metadata={"axes": "TZYX"})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        vol = open_volume(tmp_path / "t.tif")
    assert any("time points" in str(w.message) for w in caught)
    np.testing.assert_array_equal(vol.read(), a[0])


def test_pydicom_multiframe_and_colour_files():
    from pydicom import dcmread
    from pydicom.data import get_testdata_file

    path = get_testdata_file("rtdose.dcm")  # pydicom's shipped 15-frame RT dose grid
    vol = open_volume(path)
    ref = dcmread(path).pixel_array
    assert vol.shape == ref.shape == (15, ref.shape[1], ref.shape[2])
    np.testing.assert_array_equal(vol.read((slice(3, 9),)), ref[3:9])
    with pytest.raises(VolumeReadError, match="colour DICOM"):
        open_volume(get_testdata_file("SC_rgb_rle_2frame.dcm"))


def test_ome_zarr_scale_without_a_unit_is_an_unknown_voxel_size(tmp_path):
    # OME-NGFF 0.4 "axes": "unit" is optional and has no default; ome-zarr's writer leaves it out
    # unless asked. A scale with no unit must not be read as micrometres.
    from ome_zarr.writer import write_image

    path = tmp_path / "nounit.ome.zarr"
    write_image(textured(shape=(8, 64, 64)), str(path), scale_factors=[2], axes="zyx", scale={"z": 2.0, "y": 0.5, "x": 0.5})
    import zarr

    axes = zarr.open_group(str(path), mode="r").attrs.asdict()
    ms = axes.get("multiscales") or axes["ome"]["multiscales"]
    assert all("unit" not in a for a in ms[0]["axes"])  # the file really has no units
    assert open_volume(path).voxel_size_um == (None, None, None)


# --- what discovery must not trip over ------------------------------------------------------
def test_links_to_folders_are_followed_once_and_loops_are_listed(tmp_path):
    import os

    from warmstart.volumes import discover

    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    np.save(elsewhere / "v.npy", textured())
    root = tmp_path / "archive"
    root.mkdir()
    os.symlink(elsewhere, root / "linked")
    os.symlink(root, root / "linked" / "back")  # a loop back to the archive
    found, ignored = discover(root)
    assert [c.name for c in found] == ["linked/v.npy"]
    assert any("already read" in i.reason for i in ignored)


def test_a_named_pipe_called_tif_is_skipped_without_hanging(tmp_path):
    import os

    root = tmp_path / "archive"
    root.mkdir()
    os.mkfifo(root / "x.tif")
    os.symlink(root / "missing.tif", root / "dangling.tif")
    np.save(root / "v.npy", textured())
    code = ("import json, sys; from warmstart.volumes import discover; f, i = discover(sys.argv[1]); "
            "print(json.dumps([[c.name for c in f], {os.path.basename(x.path): x.reason for x in i}]))")
    out = subprocess.run([sys.executable, "-c", "import os; " + code, str(root)], capture_output=True, text=True,
                         timeout=60, check=True).stdout
    names, reasons = json.loads(out)
    assert names == ["v.npy"]
    assert "not a regular file" in reasons["x.tif"] and "does not exist" in reasons["dangling.tif"]


def test_a_corpus_written_inside_its_archive_is_not_read_back(tmp_path):
    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings
    from warmstart.volumes import discover

    root = tmp_path / "archive"
    root.mkdir()
    np.save(root / "v.npy", textured(shape=(16, 64, 64)))
    s = CorpusSettings(sampling=SamplingSettings(patch_size=32, max_per_source=20))
    build_corpus(root, root / "c.zarr", s, report=False, progress=False)
    found, ignored = discover(root)
    assert [c.name for c in found] == ["v.npy"]
    assert any(i.path.endswith("c.zarr") and "warmstart corpus" in i.reason for i in ignored)
