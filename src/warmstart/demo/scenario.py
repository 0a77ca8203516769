"""A ceramics lab's archive: micro-CT scans of sintered ceramic filters from three scanners.

Physics, kept simple but not flat noise:

- **Microstructure.** Sintered grains are a random close packing approximated by sequential
  random placement of spheres with log-normally distributed radii (overlaps allowed: sintering
  necks); the remaining space holds pores. A smooth random field modulates the grain density
  (density gradients from pressing).
- **Imaging.** Attenuation is 1 in grains and 0.15 in pores (air with binder residue); the
  scanner's point spread function is a Gaussian blur; noise is signal-dependent (standard
  deviation proportional to the square root of the signal, as for photon counting); a
  beam-hardening "cupping" term darkens the centre of each slice and ring artefacts add a small
  radius-dependent offset; the raw value is ``offset + gain * signal`` in the scanner's type.
- **Scanners.** Each has its own gain, offset, bit depth, voxel size (2, 5 and 12 µm) and file
  format, so the archive needs the corpus stage's intensity normalization to be used together.

The generator is deterministic for a seed. Sizes are small so the demo runs on a laptop.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["Scanner", "SCANNERS", "filter_microstructure", "scan", "write_archive"]


@dataclass(frozen=True)
class Scanner:
    """One instrument of the lab (all intensities in its raw units)."""

    name: str
    voxel_um: float
    gain: float
    offset: float
    noise: float
    blur_voxels: float
    dtype: str
    fmt: str


SCANNERS = (
    Scanner("benchtop-a", 2.0, 21000.0, 6000.0, 0.05, 1.0, "uint16", "tiff"),
    Scanner("benchtop-b", 5.0, 140.0, 40.0, 0.06, 0.8, "uint8", "slices"),
    Scanner("synchrotron", 12.0, 1.3, -0.2, 0.03, 0.6, "float32", "mrc"),
    Scanner("benchtop-c", 5.0, 30000.0, 9000.0, 0.04, 1.2, "uint16", "ome-zarr"),
)


def filter_microstructure(shape: tuple[int, int, int], rng: np.random.Generator, porosity: float = 0.35,
                          mean_radius: float = 6.0) -> np.ndarray:
    """Grain (1) / pore (0) volume of a sintered filter.

    Parameters
    ----------
    shape : (Z, Y, X)
    rng : numpy.random.Generator
    porosity : float
        Pore fraction (exact up to ties).
    mean_radius : float
        Mean grain radius in voxels.

    Returns
    -------
    (Z, Y, X) float32 ndarray in {0, 1}
    """
    from scipy.ndimage import distance_transform_edt, gaussian_filter

    seeds = np.ones(shape, dtype=bool)
    density = gaussian_filter(rng.standard_normal(shape), sigma=min(shape) / 6)
    density = 1.0 + 0.5 * density / (np.abs(density).max() + 1e-9)
    n = int(np.prod(shape) * (1 - porosity) / (4 / 3 * np.pi * mean_radius**3) * 2.0)
    centres = (rng.random((n, 3)) * np.array(shape)).astype(int)
    keep = rng.random(n) < density[tuple(centres.T)] / density.max()
    seeds[tuple(centres[keep].T)] = False
    dist = distance_transform_edt(seeds)
    radii_field = gaussian_filter(rng.lognormal(np.log(mean_radius), 0.25, size=shape), 2)
    # Grow every grain by the same margin until the pore fraction is the one asked for.
    margin = dist - radii_field * 0.8
    grains = margin < np.quantile(margin, 1.0 - porosity)
    return grains.astype(np.float32)


def scan(structure: np.ndarray, scanner: Scanner, rng: np.random.Generator) -> np.ndarray:
    """Image a microstructure with one scanner: blur, cupping, rings, Poisson-like noise, quantization."""
    from scipy.ndimage import gaussian_filter

    mu = 0.15 + 0.85 * structure  # pores are not empty: air plus binder residue
    img = gaussian_filter(mu, scanner.blur_voxels)
    y, x = np.indices(structure.shape[1:], dtype=np.float32)
    cy, cx = (structure.shape[1] - 1) / 2, (structure.shape[2] - 1) / 2
    r = np.sqrt((y - cy) ** 2 + (x - cx) ** 2) / max(cy, cx)
    cupping = 1.0 - 0.12 * (1 - r**2).clip(0, 1)  # beam hardening darkens the centre
    rings = 0.02 * np.sin(r * 90.0) * (rng.random() + 0.5)
    img = img * cupping[None] + rings[None]
    img = img + scanner.noise * np.sqrt(np.clip(img, 1e-3, None)) * rng.standard_normal(img.shape)
    raw = scanner.offset + scanner.gain * img
    if scanner.dtype == "float32":
        return raw.astype(np.float32)
    info = np.iinfo(scanner.dtype)
    return np.clip(np.rint(raw), info.min, info.max).astype(scanner.dtype)


def _write(volume: np.ndarray, scanner: Scanner, folder: Path, stem: str) -> Path:
    if scanner.fmt == "tiff":
        import tifffile

        path = folder / f"{stem}.tif"
        tifffile.imwrite(path, volume, imagej=True, resolution=(1 / scanner.voxel_um, 1 / scanner.voxel_um),
                         metadata={"spacing": scanner.voxel_um, "unit": "um", "axes": "ZYX"})
    elif scanner.fmt == "slices":
        from PIL import Image

        path = folder / stem
        path.mkdir(exist_ok=True)
        for i, sl in enumerate(volume):
            Image.fromarray(sl).save(path / f"{stem}_{i:04d}.png")
    elif scanner.fmt == "mrc":
        import mrcfile

        path = folder / f"{stem}.mrc"
        with mrcfile.new(path, overwrite=True) as m:
            m.set_data(volume)
            m.voxel_size = scanner.voxel_um * 1e4  # Å
    else:
        import zarr

        path = folder / f"{stem}.ome.zarr"
        root = zarr.open_group(str(path), mode="w", zarr_format=3)
        root.create_array("0", data=volume, chunks=(16,) + volume.shape[1:])
        root.attrs["ome"] = {"version": "0.5", "multiscales": [{
            "axes": [{"name": a, "type": "space", "unit": "micrometer"} for a in "zyx"],
            "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale", "scale": [scanner.voxel_um] * 3}]}],
        }]}
    return path


def write_archive(folder: str | os.PathLike[str], n_per_scanner: int = 2, shape: tuple[int, int, int] = (48, 160, 160),
                  seed: int = 0) -> list[Path]:
    """Write the lab's archive: ``n_per_scanner`` filters per scanner, plus a notes file.

    Returns
    -------
    list of Path
        The volumes written.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    out = []
    for sc in SCANNERS:
        sub = folder / sc.name
        sub.mkdir(exist_ok=True)
        for i in range(n_per_scanner):
            structure = filter_microstructure(shape, rng, porosity=rng.uniform(0.25, 0.45))
            out.append(_write(scan(structure, sc, rng), sc, sub, f"filter_{i:02d}"))
    (folder / "NOTES.txt").write_text("Sintered filter batch 7, four scanners. Generated by warmstart demo.\n")
    return out


def write_labelled_set(folder: str | os.PathLike[str], n: int = 3, shape: tuple[int, int, int] = (24, 128, 128),
                       scanner: str = "benchtop-a", seed: int = 1000) -> Path:
    """Write labelled filter scans (not in the archive): ``images/`` and ``labels/`` as TIFF
    stacks matched by name, labels 0 = pore, 1 = grain from the ground-truth microstructure.

    Returns
    -------
    Path
        The folder (the LABELS argument of ``warmstart bench``).
    """
    import tifffile

    folder = Path(folder)
    sc = next(s for s in SCANNERS if s.name == scanner)
    rng = np.random.default_rng(seed)
    for sub in ("images", "labels"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    for i in range(n):
        structure = filter_microstructure(shape, rng, porosity=rng.uniform(0.25, 0.45))
        img = scan(structure, sc, rng)
        tifffile.imwrite(folder / "images" / f"labelled_{i:02d}.tif", img, imagej=True,
                         resolution=(1 / sc.voxel_um, 1 / sc.voxel_um),
                         metadata={"spacing": sc.voxel_um, "unit": "um", "axes": "ZYX"})
        tifffile.imwrite(folder / "labels" / f"labelled_{i:02d}.tif", structure.astype(np.uint8), imagej=True,
                         metadata={"axes": "ZYX"})
    return folder
