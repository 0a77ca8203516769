"""The demo's archive: a shared imaging facility's scans from two labs, in the formats they arrived in.

- **A ceramics lab's sintered alumina filters** (with zirconia inclusions), scanned by four
  micro-CT instruments at three voxel sizes: a monochromatic beamline (1 µm, float32 MRC, no beam
  hardening, high flux), two lab scanners at 2.5 µm (uint16 TIFF stack and uint16 OME-Zarr, each
  with its own gain and offset) and an older lab scanner at 6 µm (uint8 PNG slice folder, few
  projections, low flux). The grains have the same physical size (mean radius 12 µm), so they
  span 12, 5 and 2 voxels: the voxel sizes matter. CT physics: :mod:`warmstart.demo.ct`.
- **A battery group's cathode** (active-material particles, carbon-binder, resin-filled pores),
  FIB-SEM stacks with 10 nm pixels and 20 nm sections (uint8 TIFF). Physics:
  :mod:`warmstart.demo.fibsem`.

Microstructures: :mod:`warmstart.demo.microstructure`. Raw values are ``offset + gain * signal``
rounded and clipped to the instrument's type. Everything is deterministic for a seed.

The labelled set for the benchmark (:func:`write_labelled_set`) is new filters from one lab
scanner, generated from another seed and never part of the archive; its labels are the
ground-truth phases.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .ct import CTSettings, core_mask, simulate_ct
from .fibsem import FIBSEMSettings, simulate_fibsem
from .microstructure import cathode_microstructure, filter_microstructure

__all__ = ["Instrument", "INSTRUMENTS", "GRAIN_RADIUS_UM", "PARTICLE_RADIUS_UM", "image", "write_archive",
           "write_labelled_set"]

GRAIN_RADIUS_UM = 12.0
"""Mean alumina grain radius of the filters (µm)."""
PARTICLE_RADIUS_UM = 0.08
"""Mean active-material particle radius of the cathode (µm)."""


@dataclass(frozen=True)
class Instrument:
    """One instrument of the facility (raw value = ``offset + gain * signal``).

    Parameters
    ----------
    name : str
        Folder name in the archive.
    voxel_um : (float, float, float)
        Voxel size (Z, Y, X) in micrometres.
    gain, offset : float
        Raw-value mapping.
    dtype : str
        Stored type.
    fmt : {"tiff", "slices", "mrc", "ome-zarr"}
    ct, fibsem : settings of the modality (exactly one is set)
    """

    name: str
    voxel_um: tuple[float, float, float]
    gain: float
    offset: float
    dtype: str
    fmt: str
    ct: CTSettings | None = None
    fibsem: FIBSEMSettings | None = field(default=None)

    @property
    def modality(self) -> str:
        return "micro-CT" if self.ct is not None else "FIB-SEM"


INSTRUMENTS = (
    Instrument("beamline", (1.0, 1.0, 1.0), 0.8, 0.05, "float32", "mrc",
               ct=CTSettings(n_angles=240, photons=20000.0, beam_hardening=0.0, ring_strength=0.006)),
    Instrument("lab-ct-a", (2.5, 2.5, 2.5), 16000.0, 9000.0, "uint16", "tiff",
               ct=CTSettings(n_angles=180, photons=800.0, beam_hardening=0.08, ring_strength=0.004)),
    Instrument("lab-ct-b", (2.5, 2.5, 2.5), 7000.0, 30000.0, "uint16", "ome-zarr",
               ct=CTSettings(n_angles=180, photons=5000.0, beam_hardening=0.06, ring_strength=0.003, blur_pixels=0.9)),
    Instrument("lab-ct-c", (6.0, 6.0, 6.0), 60.0, 30.0, "uint8", "slices",
               ct=CTSettings(n_angles=120, photons=2000.0, beam_hardening=0.10, ring_strength=0.005, blur_pixels=0.5)),
    Instrument("fib-sem", (0.02, 0.01, 0.01), 180.0, 8.0, "uint8", "tiff", fibsem=FIBSEMSettings()),
)


def _instrument(name: str) -> Instrument:
    for ins in INSTRUMENTS:
        if ins.name == name:
            return ins
    raise ValueError(f"no instrument {name!r}; the demo has {[i.name for i in INSTRUMENTS]}")


def _sample(ins: Instrument, shape: tuple[int, int, int], rng: np.random.Generator) -> np.ndarray:
    """Ground-truth phases on the instrument's voxel grid (FIB-SEM: on the isotropic grid)."""
    if ins.ct is not None:
        radius = GRAIN_RADIUS_UM / ins.voxel_um[1]
        phases = filter_microstructure(shape, rng, porosity=rng.uniform(0.25, 0.40), mean_radius=radius)
        phases[:, ~core_mask(shape[1:], ins.ct.core_radius)] = 0  # air around the drilled core
        return phases
    assert ins.fibsem is not None
    fine = (shape[0] * ins.fibsem.section_pixels, shape[1], shape[2])
    return cathode_microstructure(fine, rng, active_fraction=rng.uniform(0.5, 0.6),
                                  mean_radius=PARTICLE_RADIUS_UM / ins.voxel_um[1])


def image(phases: np.ndarray, ins: Instrument, rng: np.random.Generator, threads: int = 2) -> np.ndarray:
    """Image a phase volume with one instrument and return raw values in its type.

    Parameters
    ----------
    phases : (Z, Y, X) uint8 ndarray
        CT: on the voxel grid (square slices). FIB-SEM: on the isotropic grid.
    ins : Instrument
    rng : numpy.random.Generator
    threads : int
        CT slices reconstructed in parallel.
    """
    if ins.ct is not None:
        signal = simulate_ct(phases, ins.ct, rng, threads=threads)
    else:
        assert ins.fibsem is not None
        signal = simulate_fibsem(phases, ins.fibsem, rng)
    raw = ins.offset + ins.gain * signal
    if ins.dtype == "float32":
        return raw.astype(np.float32)
    info = np.iinfo(ins.dtype)
    return np.clip(np.rint(raw), info.min, info.max).astype(ins.dtype)


def _write_tiff(path: Path, volume: np.ndarray, voxel_um: tuple[float, float, float] | None) -> Path:
    """An ImageJ TIFF stack; with ``voxel_um`` (Z, Y, X) in µm as spacing and resolution."""
    import tifffile

    if voxel_um is None:
        tifffile.imwrite(path, volume, imagej=True, metadata={"axes": "ZYX"})
    else:
        vz, vy, vx = voxel_um
        tifffile.imwrite(path, volume, imagej=True, resolution=(1 / vx, 1 / vy),
                         metadata={"spacing": vz, "unit": "um", "axes": "ZYX"})
    return path


def _write(volume: np.ndarray, ins: Instrument, folder: Path, stem: str) -> Path:
    vz, vy, vx = ins.voxel_um
    if ins.fmt == "tiff":
        path = _write_tiff(folder / f"{stem}.tif", volume, ins.voxel_um)
    elif ins.fmt == "slices":
        from PIL import Image

        path = folder / stem
        path.mkdir(exist_ok=True)
        for i, sl in enumerate(volume):
            Image.fromarray(sl).save(path / f"{stem}_{i:04d}.png")
    elif ins.fmt == "mrc":
        import mrcfile

        path = folder / f"{stem}.mrc"
        with mrcfile.new(path, overwrite=True) as m:
            m.set_data(volume)
            m.voxel_size = (vx * 1e4, vy * 1e4, vz * 1e4)  # Å, in MRC's (x, y, z) order
    else:
        import zarr

        path = folder / f"{stem}.ome.zarr"
        root = zarr.open_group(str(path), mode="w", zarr_format=3)
        root.create_array("0", data=volume, chunks=(16,) + volume.shape[1:])
        root.attrs["ome"] = {"version": "0.5", "multiscales": [{
            "axes": [{"name": a, "type": "space", "unit": "micrometer"} for a in "zyx"],
            "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale", "scale": [vz, vy, vx]}]}],
        }]}
    return path


def write_archive(folder: str | os.PathLike[str], n_per_scanner: int = 2, shape: tuple[int, int, int] = (48, 128, 128),
                  seed: int = 0, threads: int = 2) -> list[Path]:
    """Write the facility's archive: ``n_per_scanner`` samples per instrument, plus a notes file.

    Parameters
    ----------
    folder : path
    n_per_scanner : int
        Samples per instrument (filters for the CT scanners, cathode stacks for the FIB-SEM).
    shape : (Z, Y, X)
        Volume shape in voxels (square slices); FIB-SEM stacks have ``Z`` sections.
    seed : int
    threads : int
        CT slices reconstructed in parallel.

    Returns
    -------
    list of Path
        The volumes written.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    out = []
    for ins in INSTRUMENTS:
        sub = folder / ins.name
        sub.mkdir(exist_ok=True)
        stem = "filter" if ins.ct is not None else "cathode"
        for i in range(n_per_scanner):
            raw = image(_sample(ins, shape, rng), ins, rng, threads=threads)
            out.append(_write(raw, ins, sub, f"{stem}_{i:02d}"))
    (folder / "NOTES.txt").write_text(
        "Shared facility archive: ceramics lab filter batch 7 (micro-CT, four instruments) and a battery\n"
        "group's cathode (FIB-SEM). Generated by warmstart demo.\n")
    return out


def write_labelled_set(folder: str | os.PathLike[str], n: int = 3, shape: tuple[int, int, int] = (24, 128, 128),
                       scanner: str = "lab-ct-a", seed: int = 1000, threads: int = 2) -> Path:
    """Write labelled filter scans that are not in the archive.

    ``images/`` and ``labels/`` hold TIFF stacks matched by name; labels are the ground-truth
    phases, 0 = void (pores and air), 1 = alumina, 2 = zirconia inclusion.

    Parameters
    ----------
    folder : path
    n : int
        Volumes.
    shape : (Z, Y, X)
        Square slices.
    scanner : str
        A CT instrument of :data:`INSTRUMENTS`.
    seed : int
        Differs from the archive's, so no labelled volume is in the corpus.
    threads : int

    Returns
    -------
    Path
        The folder (the LABELS argument of ``warmstart bench``).
    """
    folder = Path(folder)
    ins = _instrument(scanner)
    if ins.ct is None:
        raise ValueError(f"labelled sets are filter scans; {scanner!r} is not a CT instrument")
    rng = np.random.default_rng(seed)
    for sub in ("images", "labels"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    for i in range(n):
        phases = _sample(ins, shape, rng)
        _write_tiff(folder / "images" / f"labelled_{i:02d}.tif", image(phases, ins, rng, threads=threads), ins.voxel_um)
        _write_tiff(folder / "labels" / f"labelled_{i:02d}.tif", phases, None)
    return folder
