"""Shared fixtures: tiny volumes written in ``tmp_path`` by the format's own library."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

# A helper module that registers pretraining methods: pytest's doctest collection would import it a
# second time under another module name, and the registry refuses a name registered twice.
collect_ignore = ["faulty_methods.py"]


def textured(shape=(12, 48, 56), dtype=np.uint16, seed=0, lo=1000, hi=30000):
    """A smooth two-phase texture with noise, scaled to [lo, hi] in ``dtype`` (unit fixture data)."""
    rng = np.random.default_rng(seed)
    grids = np.meshgrid(*(np.arange(n) for n in shape), indexing="ij")
    z, y, x = grids[0], grids[-2], grids[-1]
    v = np.sin(x / 3.0 + z / 5.0) + np.cos(y / 4.0) + 0.4 * rng.standard_normal(shape)
    v = (v - v.min()) / (v.max() - v.min())
    out = lo + v * (hi - lo)
    if np.dtype(dtype).kind in "iu":
        info = np.iinfo(dtype)
        out = np.clip(np.rint(out), info.min, info.max)
    return out.astype(dtype)


TINY_SAMPLING = dict(patch_size=32, stride=16, slice_stride=1, max_per_source=10_000)


def tiny_corpus(root: Path, n: int = 3, shape=(16, 64, 64), sampling: dict | None = None) -> Path:
    """A corpus of ``n`` textured ``.npy`` volumes (in ``root/a``), built into ``root/c.zarr``."""
    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings

    (root / "a").mkdir(parents=True)
    for i in range(n):
        np.save(root / "a" / f"v{i}.npy", textured(shape=shape, seed=i))
    s = CorpusSettings(sampling=SamplingSettings(**(TINY_SAMPLING if sampling is None else sampling)))
    return build_corpus(root / "a", root / "c.zarr", s, report=False, progress=False).path


def write_dicom_series(folder: Path, hu: np.ndarray, *, spacing_mm=(2.5, 0.5, 0.5), slope=1.0, intercept=-1024.0,
                       series_uid=None, shuffle_names=True, seed=0, prefix="img") -> list[Path]:
    """Write a CT series with pydicom, using pydicom's CT_small.dcm test file as the template.

    Stored values = (HU - intercept) / slope, so the Modality LUT gives ``hu`` back.
    """
    import pydicom
    from pydicom.data import get_testdata_file
    from pydicom.uid import generate_uid

    folder.mkdir(parents=True, exist_ok=True)
    template = pydicom.dcmread(get_testdata_file("CT_small.dcm"))
    uid = series_uid or generate_uid()
    rng = np.random.default_rng(seed)
    names = rng.permutation(len(hu)) if shuffle_names else np.arange(len(hu))
    stored = np.rint((hu - intercept) / slope).astype(np.int16)
    paths = []
    for i, sl in enumerate(stored):
        ds = template.copy()
        ds.SeriesInstanceUID = uid
        ds.SOPInstanceUID = generate_uid()
        ds.InstanceNumber = int(len(hu) - i)  # deliberately reversed: order must come from positions
        ds.ImagePositionPatient = [0.0, 0.0, float(i * spacing_mm[0])]
        ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
        ds.PixelSpacing = [spacing_mm[1], spacing_mm[2]]
        ds.SliceThickness = spacing_mm[0]
        ds.RescaleSlope = slope
        ds.RescaleIntercept = intercept
        ds.Rows, ds.Columns = sl.shape
        ds.PixelData = sl.tobytes()
        p = folder / f"{prefix}{names[i]:04d}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths


@pytest.fixture
def small_archive(tmp_path: Path) -> Path:
    """A mixed archive: ImageJ TIFF, MRC, OME-Zarr, a PNG slice folder, .npy, plus a broken file."""
    import mrcfile
    import tifffile
    from PIL import Image

    root = tmp_path / "archive"
    root.mkdir()
    tifffile.imwrite(root / "filter_a.tif", textured(seed=1), imagej=True, resolution=(1 / 0.8, 1 / 0.8),
                     metadata={"spacing": 0.8, "unit": "um", "axes": "ZYX"})
    with mrcfile.new(root / "cathode.mrc") as m:
        m.set_data(textured(seed=2, dtype=np.float32, lo=-1, hi=1))
        m.voxel_size = 40.0  # Å
    np.save(root / "seed.npy", textured(seed=3, dtype=np.int16, lo=-500, hi=2000))
    (root / "slices").mkdir()
    for i, sl in enumerate(textured(seed=4, dtype=np.uint8, lo=10, hi=240)):
        Image.fromarray(sl).save(root / "slices" / f"layer_{i}.png")
    from ome_zarr.writer import write_image

    write_image(textured(seed=5), str(root / "grain.ome.zarr"), scale_factors=[2], axes="zyx",
                scale={"z": 1.0, "y": 1.0, "x": 1.0}, axes_units={a: "micrometer" for a in "zyx"})
    (root / "README.txt").write_text("scan notes")
    return root


@pytest.fixture
def broken_archive(small_archive: Path) -> Path:
    (small_archive / "zz_truncated.tif").write_bytes(b"II*\x00\x08\x00\x00\x00garbage")
    np.save(small_archive / "flat.npy", np.full((6, 48, 48), 7.0, np.float32))
    np.save(small_archive / "allnan.npy", np.full((6, 48, 48), np.nan, np.float32))
    (small_archive / "empty.mrc").write_bytes(b"")
    return small_archive


@pytest.fixture(autouse=True)
def _quiet_tqdm(monkeypatch):
    monkeypatch.setenv("TQDM_DISABLE", "1")


def pytest_configure(config):
    os.environ.setdefault("MPLBACKEND", "Agg")
