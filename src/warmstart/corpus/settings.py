"""Settings of the corpus stage: frozen dataclasses that travel inside every store they build.

Each has ``to_dict``/``from_dict``; ``from_dict`` rejects unknown keys and wrong types with the
key's name (recipes are read through :mod:`warmstart.recipe`, which adds the file name).
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Mapping

from ..base.settings import require_positive, settings_from_dict
from ..errors import RecipeError
from ..intensity import IntensitySettings

__all__ = ["ReadSettings", "SamplingSettings", "FilterSettings", "StoreSettings", "CorpusSettings"]


@dataclass(frozen=True)
class ReadSettings:
    """How sources are opened.

    Parameters
    ----------
    rgb : {"refuse", "luminance"}
        Colour files are refused unless converted to luminance.
    channel : int, optional
        Channel of multi-channel files.
    voxel_size_um : (float, float, float), optional
        (Z, Y, X) in µm for every source, overriding file metadata (use for ``.npy`` archives).
    modality : dict of str to str
        Imaging modality per source folder, as the user names it (``{"filters" = "micro-CT",
        "cathodes" = "FIB-SEM"}``): a folder relative to the archive (``""`` for the whole
        archive; the longest matching folder wins). It overrides what a file says (DICOM's
        Modality); sources matched by neither have no recorded modality.
    """

    rgb: str = "refuse"
    channel: int | None = None
    voxel_size_um: tuple[float, float, float] | None = None
    modality: dict[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.rgb not in ("refuse", "luminance"):
            raise RecipeError(f"read.rgb must be 'refuse' or 'luminance', got {self.rgb!r}")
        if not isinstance(self.modality, dict) or not all(
                isinstance(k, str) and isinstance(v, str) and v.strip() for k, v in self.modality.items()):
            raise RecipeError(f"read.modality must be a table of folder = \"modality\" strings, got {self.modality!r}")

    def modality_of(self, name: str) -> str | None:
        """The user's modality tag for a source ``name`` (its path relative to the archive), or None.

        Examples
        --------
        >>> ReadSettings(modality={"": "micro-CT", "cathodes": "FIB-SEM"}).modality_of("cathodes/c1.tif")
        'FIB-SEM'
        >>> ReadSettings(modality={"filters": "micro-CT"}).modality_of("filtersX/a.tif") is None
        True
        """
        best, tag = -1, None
        for folder, value in self.modality.items():
            f = folder.strip("/").replace("\\", "/")
            if (f in ("", ".") or name == f or name.startswith(f + "/")) and len(f) > best:
                best, tag = len(f), value.strip()
        return tag


@dataclass(frozen=True)
class SamplingSettings:
    """Where patches come from.

    Parameters
    ----------
    patch_size : int
        Output patch side in pixels (after resampling); the cube side in 3-D.
    spatial_dims : {2, 3}
        2: square patches (C, P, P) sliced along ``axes``. 3: cubes (1, P, P, P) in (Z, Y, X)
        order, cut after resampling every source to cubic voxels (the finer axes are averaged
        down to the coarsest, or to ``target_voxel_um`` where that is coarser; nothing is
        upsampled); ``axes``, ``channels`` and ``slice_stride`` do not apply, ``stride`` steps
        along all three axes. A source whose voxel size is unknown is refused in 3-D unless
        ``read.voxel_size_um`` states it or ``assume_cubic_voxels`` is set.
    assume_cubic_voxels : bool
        3-D only: treat voxels of unknown size as cubic (each axis then takes ``scale_factor``);
        the manifest records, per source, that the shape was assumed.
    axes : str
        Slicing axes, any of ``Z``, ``Y``, ``X`` (``"ZYX"`` slices along all three).
    channels : int
        Adjacent slices stacked as channels (2.5-D); odd, 1 for plain 2-D patches.
    target_voxel_um : float, optional
        Resample every source to this voxel size (µm) where its voxel size is known.
    scale_factor : float
        Downscale factor used where no target is set or a voxel size is unknown (2 = half size).
    isotropic : bool
        Without a target: make anisotropic voxels cubic by downscaling the finer axes to the
        coarsest one (``scale_factor * coarsest / voxel`` per axis, so nothing is upsampled); for
        FIB-SEM stacks whose sections are thicker than their pixels. Sources of unknown or
        isotropic voxel size are unaffected.
    mode : {"grid", "random"}
        Regular grid (``stride``, ``slice_stride``) or ``count`` random positions per source.
    stride : int, optional
        Grid step in output pixels; default ``patch_size`` (no overlap).
    slice_stride : int
        Grid step between slices, in output slices.
    count : int
        Random mode: positions drawn per source.
    max_per_source : int
        Quota: at most this many planned positions per source (a seeded subsample beyond it).
    seed : int
    """

    patch_size: int = 128
    spatial_dims: int = 2
    assume_cubic_voxels: bool = False
    axes: str = "Z"
    channels: int = 1
    target_voxel_um: float | None = None
    scale_factor: float = 1.0
    isotropic: bool = False
    mode: str = "grid"
    stride: int | None = None
    slice_stride: int = 8
    count: int = 256
    max_per_source: int = 2000
    seed: int = 0

    def __post_init__(self) -> None:
        if self.patch_size < 8:
            raise RecipeError(f"sampling.patch_size must be >= 8, got {self.patch_size}")
        if not self.axes or any(a not in "ZYX" for a in self.axes) or len(set(self.axes)) != len(self.axes):
            raise RecipeError(f"sampling.axes must be distinct letters of 'ZYX', got {self.axes!r}")
        if self.channels < 1 or self.channels % 2 == 0:
            raise RecipeError(f"sampling.channels must be odd and >= 1, got {self.channels}")
        if self.mode not in ("grid", "random"):
            raise RecipeError(f"sampling.mode must be 'grid' or 'random', got {self.mode!r}")
        if not self.scale_factor > 0 or (self.target_voxel_um is not None and not self.target_voxel_um > 0):
            raise RecipeError("sampling.scale_factor and sampling.target_voxel_um must be positive")
        require_positive(self, "sampling", "slice_stride", "count", "max_per_source", "stride")
        if self.spatial_dims not in (2, 3):
            raise RecipeError(f"sampling.spatial_dims must be 2 or 3, got {self.spatial_dims!r}")
        if self.spatial_dims == 3 and self.channels != 1:
            raise RecipeError("sampling.channels stacks slices of 2-D patches; 3-D cubes (spatial_dims = 3) take channels = 1")

    @property
    def patch_shape(self) -> tuple[int, ...]:
        """Shape of one stored patch: (C, P, P) in 2-D, (1, P, P, P) in 3-D."""
        p = self.patch_size
        return (1, p, p, p) if self.spatial_dims == 3 else (self.channels, p, p)


@dataclass(frozen=True)
class FilterSettings:
    """Which patches are dropped (all in normalized intensity units).

    Parameters
    ----------
    min_std : float
        Drop a patch whose standard deviation is below this (nearly constant). 0 disables.
    background_level : float, optional
        A pixel at or below this is background. Default: per source, the normalized 0.5th
        percentile plus 10 % of the normalized 0.5-99.5 percentile range.
    max_background_fraction : float
        Drop a patch with more background pixels than this fraction. 1 disables.
    duplicate_threshold : float
        Drop a patch whose RMS difference from the last kept patch at the same position one
        slice step before is below this fraction of that patch's standard deviation. 0 disables.
    """

    min_std: float = 0.02
    background_level: float | None = None
    max_background_fraction: float = 0.95
    duplicate_threshold: float = 0.05

    def __post_init__(self) -> None:
        if self.min_std < 0 or self.duplicate_threshold < 0:
            raise RecipeError("filters.min_std and filters.duplicate_threshold must be >= 0")
        if not 0 < self.max_background_fraction <= 1:
            raise RecipeError(f"filters.max_background_fraction must be in (0, 1], got {self.max_background_fraction}")


@dataclass(frozen=True)
class StoreSettings:
    """How patches are stored.

    Parameters
    ----------
    dtype : {"uint16", "float16"}
        uint16 (default) maps ``uint16_range`` linearly to 0..65535: absolute error <= half a step
        (2.3e-5 over [-1, 2]); values outside are clipped and counted in the manifest. float16
        keeps every value (relative error <= 2^-11) but encodes about 3x slower on CPUs without a
        vectorized conversion (measured).
    uint16_range : (float, float), optional
        Normalized range covered by uint16 codes; default [-8, 8] for z-score corpora and
        [-1, 2] for the schemes that map two references to 0 and 1.
    chunk_patches : int
        Patches per zarr chunk (the unit of reading in pretraining).
    compression : {"none", "lz4", "zstd"}
        Chunk compression (blosc, byte shuffle). Noisy float16 patches shrink by about a quarter
        with lz4, which halves the write speed (measured); hence the default ``none``.
    histogram_range : (float, float), optional
        Range of the 256-bin corpus histogram; default by scheme ([-0.5, 1.5], or [-5, 5] for
        z-score).
    """

    dtype: str = "uint16"
    uint16_range: tuple[float, float] | None = None
    chunk_patches: int = 256
    compression: str = "none"
    histogram_range: tuple[float, float] | None = None

    def __post_init__(self) -> None:
        if self.dtype not in ("float16", "uint16"):
            raise RecipeError(f"store.dtype must be 'float16' or 'uint16', got {self.dtype!r}")
        if self.uint16_range is not None and not self.uint16_range[0] < self.uint16_range[1]:
            raise RecipeError(f"store.uint16_range must be increasing, got {self.uint16_range}")
        if self.chunk_patches < 1:
            raise RecipeError("store.chunk_patches must be >= 1")
        if self.compression not in ("none", "lz4", "zstd"):
            raise RecipeError(f"store.compression must be 'none', 'lz4' or 'zstd', got {self.compression!r}")



@dataclass(frozen=True)
class CorpusSettings:
    """Everything that decides which patches a build writes (the ``[corpus]`` recipe section).

    ``workers`` and ``memory_mb`` change speed and memory, never the patches (``memory_mb``: the
    working memory of one worker's region reads and patch arrays, in MB). ``part_mb`` splits
    sources larger than that many megabytes on disk into slabs along Z that workers process in
    parallel; it is part of the build's identity because the duplicate rule starts afresh in
    each part (and each part fits the same intensity reference from the same sample itself).
    """

    read: ReadSettings = field(default_factory=ReadSettings)
    intensity: IntensitySettings = field(default_factory=IntensitySettings)
    sampling: SamplingSettings = field(default_factory=SamplingSettings)
    filters: FilterSettings = field(default_factory=FilterSettings)
    store: StoreSettings = field(default_factory=StoreSettings)
    workers: int = 1
    memory_mb: int = 256
    part_mb: float = 1024.0

    def __post_init__(self) -> None:
        if not self.part_mb > 0:
            raise RecipeError(f"part_mb must be positive, got {self.part_mb}")
        if self.workers < 1:
            raise RecipeError(f"workers must be >= 1, got {self.workers}")
        if self.memory_mb < 16:
            raise RecipeError(f"memory_mb must be >= 16, got {self.memory_mb}")

    def to_dict(self) -> dict[str, Any]:
        return _plain(dataclasses.asdict(self))

    def histogram_range(self) -> tuple[float, float]:
        """Range of the corpus histogram: the store setting, else [-5, 5] for z-score and
        [-0.5, 1.5] for the schemes that map two references to 0 and 1."""
        if self.store.histogram_range is not None:
            return self.store.histogram_range
        return (-5.0, 5.0) if self.intensity.scheme == "zscore" else (-0.5, 1.5)

    def encoding(self) -> dict[str, Any]:
        """How patches are stored, all a reader needs to decode them (``corpus.store.decode``)."""
        enc: dict[str, Any] = {"dtype": self.store.dtype}
        if self.store.dtype == "uint16":
            rng = self.store.uint16_range or ((-8.0, 8.0) if self.intensity.scheme == "zscore" else (-1.0, 2.0))
            enc["uint16_range"] = [float(rng[0]), float(rng[1])]
        return enc

    def identity(self) -> dict[str, Any]:
        """The settings that decide the patches (without workers / memory)."""
        d = self.to_dict()
        d.pop("workers")
        d.pop("memory_mb")
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "corpus") -> "CorpusSettings":
        return settings_from_dict(cls, d, where)


def _plain(x: Any) -> Any:
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    return x
