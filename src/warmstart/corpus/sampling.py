"""Patch sampling: plan positions, read them region by region, resample, normalize, filter.

Geometry. A patch sliced along axis ``a`` (Z, Y or X) is a raw block of ``n`` voxels along
``a`` and ``u`` x ``v`` voxels along the two other axes, in (Z, Y, X) order. Resampling maps it
to ``(channels, P, P)``: ``n = round(channels * f_a)``, ``u = round(P * f_u)``, with ``f`` the
per-axis downscale factor (target voxel size / voxel size, or the fixed scale factor).

Reading. Planned patches are grouped by the Z range of their block and, within it, by Y bands so
that no single read exceeds the memory budget; each group is one region read. Only the slices a
patch needs are read.

Filters, in this order: non-finite voxels; low variance; mostly background; near-duplicate of
the last kept patch at the same in-plane position on the previous slice step.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

import numpy as np

from ..errors import VolumeReadError
from .resample import resample_block
from .settings import FilterSettings, SamplingSettings

__all__ = ["PatchPlan", "downscale_factors", "plan_patches", "iter_groups", "extract_patches", "FilterCounts", "PatchFilter"]

_AXIS_INDEX = {"Z": 0, "Y": 1, "X": 2}
_INPLANE = {0: (1, 2), 1: (0, 2), 2: (0, 1)}  # axes (u, v) of a patch sliced along 0/1/2


def downscale_factors(voxel_size_um: tuple[float | None, ...], s: SamplingSettings,
                      shape: tuple[int, int, int] | None = None) -> tuple[tuple[float, float, float], list[str]]:
    """Per-axis downscale factors (Z, Y, X) and notes on what could not be honoured.

    With ``target_voxel_um`` and a known voxel size, ``f = target / voxel``; an axis of unknown
    size takes ``scale_factor`` and a note says so. Without a target, ``isotropic`` and all three
    sizes known: ``f = scale_factor * max(voxel) / voxel`` (cubic output voxels, no upsampling).
    Given the volume's ``shape``, an axis shorter than its factor is not downscaled (a single
    2-D image has one slice: halving it would leave nothing).

    Examples
    --------
    >>> from warmstart.corpus.settings import SamplingSettings
    >>> downscale_factors((None, None, None), SamplingSettings(scale_factor=2.0), shape=(1, 512, 512))[0]
    (1.0, 2.0, 2.0)
    """
    factors, notes = _cube_factors(voxel_size_um, s) if s.spatial_dims == 3 else _factors(voxel_size_um, s)
    if shape is not None and s.spatial_dims == 2:
        factors = tuple(1.0 if f > 1 and n < f else f for f, n in zip(factors, shape))  # type: ignore[assignment]
    return factors, notes


def _cube_factors(voxel_size_um: tuple[float | None, ...], s: SamplingSettings) -> tuple[tuple[float, float, float], list[str]]:
    """Factors that make voxels cubic for 3-D cubes: never below 1 along the coarsest axis (no
    resolution is invented), so a target finer than the coarsest voxel is raised to it."""
    unknown = [ax for ax, v in zip("ZYX", voxel_size_um) if v is None or not v > 0]
    if unknown:
        if not s.assume_cubic_voxels:
            raise VolumeReadError(
                f"voxel size unknown along {', '.join(unknown)}: 3-D cubes need cubic voxels; state the size with "
                "read.voxel_size_um = [z, y, x] (micrometres) or set sampling.assume_cubic_voxels = true")
        return (s.scale_factor,) * 3, ["voxel size unknown: voxels assumed cubic (sampling.assume_cubic_voxels)"]
    sizes = [float(v) for v in voxel_size_um]  # type: ignore[arg-type]
    coarsest = max(sizes)
    notes = []
    if s.target_voxel_um is None:
        voxel = s.scale_factor * coarsest
    else:
        voxel = max(s.target_voxel_um, coarsest)
        if voxel > s.target_voxel_um:
            notes.append(f"target voxel {s.target_voxel_um:g} um is finer than the coarsest axis ({coarsest:g} um): "
                         f"cubes use {voxel:g} um voxels, nothing is upsampled")
    f = [voxel / v for v in sizes]
    return (f[0], f[1], f[2]), notes


def _factors(voxel_size_um: tuple[float | None, ...], s: SamplingSettings) -> tuple[tuple[float, float, float], list[str]]:
    notes: list[str] = []
    out = []
    known = [v for v in voxel_size_um if v is not None]
    if s.target_voxel_um is None and s.isotropic and len(known) == 3 and min(known) > 0:
        coarsest = max(known)
        out = [s.scale_factor * coarsest / v for v in known]
        return (out[0], out[1], out[2]), notes
    for ax, v in zip("ZYX", voxel_size_um):
        if s.target_voxel_um is not None and v is not None:
            out.append(s.target_voxel_um / v)
        else:
            if s.target_voxel_um is not None:
                notes.append(f"voxel size along {ax} unknown: scale factor {s.scale_factor:g} used instead of the target")
            out.append(s.scale_factor)
    if any(f < 0.5 for f in out):
        notes.append(f"upsampling by more than 2x along some axis (factors {[round(f, 3) for f in out]})")
    return (out[0], out[1], out[2]), notes


@dataclass
class PatchPlan:
    """Planned patch positions of one source (all coordinates in raw voxels).

    Attributes
    ----------
    axis : (N,) int8
        Slicing axis, 0 = Z, 1 = Y, 2 = X.
    start : (N, 3) int64
        Block start in (Z, Y, X).
    extent : dict axis -> (3,) int
        Block extent in (Z, Y, X) for each slicing axis used.
    """

    axis: np.ndarray
    start: np.ndarray
    extent: dict[int, tuple[int, int, int]] = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.axis.size)

    def subset(self, mask: np.ndarray) -> "PatchPlan":
        """The planned patches where ``mask`` is true, in the same order."""
        return PatchPlan(self.axis[mask], self.start[mask], self.extent)

    def part(self, i: int, n: int, depth: int) -> "PatchPlan":
        """Part ``i`` of ``n``: the patches whose block starts in the i-th of n equal Z slabs of a
        volume ``depth`` slices deep."""
        lo, hi = (round(j * depth / n) for j in (i, i + 1))
        z = self.start[:, 0]
        return self.subset((z >= lo) & (z < hi))

    def stop(self) -> np.ndarray:
        ext = np.zeros((len(self), 3), dtype=np.int64)
        for a, e in self.extent.items():
            ext[self.axis == a] = e
        return self.start + ext


def _positions(n: int, size: int, step: int) -> np.ndarray:
    if n < size:
        return np.empty(0, dtype=np.int64)
    pos = np.arange(0, n - size + 1, max(1, step), dtype=np.int64)
    span = pos[-1] + size
    return pos + (n - span) // 2  # centre the grid


def plan_patches(shape: tuple[int, int, int], factors: tuple[float, float, float], s: SamplingSettings,
                 rng: np.random.Generator) -> PatchPlan:
    """Plan patch blocks in a volume.

    Parameters
    ----------
    shape : (Z, Y, X)
    factors : (fz, fy, fx)
        Downscale factors from :func:`downscale_factors`.
    s : SamplingSettings
    rng : numpy.random.Generator
        Draws random positions and the quota subsample.

    Returns
    -------
    PatchPlan
        Sorted in reading order: by block Z range, then Y, then X.
    """
    p, k = s.patch_size, s.channels
    stride = s.stride or p
    axes_l, starts, extent = [], [], {}
    # A cube is planned as a block "sliced along Z" whose P output slices are its depth: the same
    # region reads, resampling and filters then serve both.
    for letter in ("Z" if s.spatial_dims == 3 else s.axes):
        a = _AXIS_INDEX[letter]
        u, v = _INPLANE[a]
        depth, depth_step = (p, stride) if s.spatial_dims == 3 else (k, s.slice_stride)
        ext = [0, 0, 0]
        ext[a] = max(1, round(depth * factors[a]))
        ext[u] = max(1, round(p * factors[u]))
        ext[v] = max(1, round(p * factors[v]))
        if any(e > n for e, n in zip(ext, shape)):
            continue
        extent[a] = tuple(ext)
        if s.mode == "grid":
            steps = [0, 0, 0]
            steps[a] = max(1, round(depth_step * factors[a]))
            steps[u] = max(1, round(stride * factors[u]))
            steps[v] = max(1, round(stride * factors[v]))
            grids = [_positions(n, e, st) for n, e, st in zip(shape, ext, steps)]
            mesh = np.stack(np.meshgrid(*grids, indexing="ij"), -1).reshape(-1, 3)
        else:
            mesh = np.stack([rng.integers(0, n - e + 1, size=s.count) for n, e in zip(shape, ext)], -1)
        axes_l.append(np.full(len(mesh), a, dtype=np.int8))
        starts.append(mesh.astype(np.int64))
    if not axes_l:
        return PatchPlan(np.empty(0, np.int8), np.empty((0, 3), np.int64), {})
    axis = np.concatenate(axes_l)
    start = np.concatenate(starts)
    if s.mode == "random":
        # One draw per axis above; keep ``count`` in total, mixing axes.
        take = rng.permutation(len(axis))[: s.count]
        axis, start = axis[take], start[take]
    if len(axis) > s.max_per_source:
        take = rng.choice(len(axis), size=s.max_per_source, replace=False)
        axis, start = axis[take], start[take]
    plan = PatchPlan(axis, start, extent)
    stop = plan.stop()
    order = np.lexsort((start[:, 2], start[:, 1], axis, stop[:, 0], start[:, 0]))
    return PatchPlan(axis[order], start[order], extent)


def iter_groups(plan: PatchPlan, shape: tuple[int, int, int], itemsize: int, budget_bytes: int) -> Iterator[tuple[np.ndarray, tuple[slice, slice, slice]]]:
    """Group planned patches into region reads of at most ``budget_bytes`` (where a patch fits).

    Yields
    ------
    indices : (m,) int ndarray
        Patches of the group (indices into the plan, in plan order).
    region : 3 slices
        The (Z, Y, X) region covering them.
    """
    if len(plan) == 0:
        return
    start, stop = plan.start, plan.stop()
    zkey = start[:, 0] * (shape[0] + 1) + stop[:, 0]
    bounds = np.flatnonzero(np.diff(zkey)) + 1
    for chunk in np.split(np.arange(len(plan)), bounds):
        z0, z1 = int(start[chunk[0], 0]), int(stop[chunk[0], 0])
        order = chunk[np.argsort(start[chunk, 1], kind="stable")]
        group: list[int] = []
        y0 = y1 = x0 = x1 = 0
        for i in order:
            ny0, ny1 = (min(y0, start[i, 1]), max(y1, stop[i, 1])) if group else (start[i, 1], stop[i, 1])
            nx0, nx1 = (min(x0, start[i, 2]), max(x1, stop[i, 2])) if group else (start[i, 2], stop[i, 2])
            size = (z1 - z0) * (ny1 - ny0) * (nx1 - nx0) * itemsize
            if group and size > budget_bytes:
                yield np.asarray(group), (slice(z0, z1), slice(int(y0), int(y1)), slice(int(x0), int(x1)))
                group = []
                ny0, ny1, nx0, nx1 = start[i, 1], stop[i, 1], start[i, 2], stop[i, 2]
            group.append(int(i))
            y0, y1, x0, x1 = ny0, ny1, nx0, nx1
        if group:
            yield np.asarray(group), (slice(z0, z1), slice(int(y0), int(y1)), slice(int(x0), int(x1)))


@dataclass
class FilterCounts:
    """How many planned patches each rule removed, and how many were kept."""

    planned: int = 0
    nonfinite: int = 0
    low_variance: int = 0
    background: int = 0
    duplicate: int = 0
    kept: int = 0

    def to_dict(self) -> dict[str, int]:
        return dict(self.__dict__)


class PatchFilter:
    """Stateful filter of one source's patches (the duplicate rule remembers the last kept patch
    at each in-plane position).

    Parameters
    ----------
    settings : FilterSettings
    background_level : float
        Normalized value at or below which a pixel is background (resolved per source).
    """

    def __init__(self, settings: FilterSettings, background_level: float) -> None:
        self.s = settings
        self.background_level = float(background_level)
        self.counts = FilterCounts()
        self._last: dict[tuple[int, int, int], tuple[np.ndarray, float]] = {}

    def __call__(self, patches: np.ndarray, finite: np.ndarray, axis: np.ndarray, start: np.ndarray) -> np.ndarray:
        """Return a boolean keep-mask for ``patches`` (B, k, P, P) in normalized units."""
        s = self.s
        b = len(patches)
        self.counts.planned += b
        keep = finite.copy()
        self.counts.nonfinite += int((~finite).sum())
        flat = patches.reshape(b, -1)
        n = flat.shape[1]
        # One pass for the sum and one for the sum of squares (4x faster than ndarray.std); float32
        # accumulation error is ~1e-7 relative for normalized values, far below the threshold.
        with np.errstate(invalid="ignore", over="ignore"):
            mean = flat.sum(axis=1, dtype=np.float64) / n
            var = np.einsum("ij,ij->i", flat, flat, dtype=np.float64) / n - mean * mean
        std = np.where(finite, np.sqrt(np.maximum(var, 0.0)), 0.0)
        low = keep & (std < s.min_std)
        self.counts.low_variance += int(low.sum())
        keep &= ~low
        if s.max_background_fraction < 1:
            frac = np.count_nonzero(flat <= self.background_level, axis=1) / n
            bg = keep & (frac > s.max_background_fraction)
            self.counts.background += int(bg.sum())
            keep &= ~bg
        if s.duplicate_threshold > 0:
            for i in np.flatnonzero(keep):
                a = int(axis[i])
                u, v = _INPLANE[a]
                key = (a, int(start[i, u]), int(start[i, v]))
                prev = self._last.get(key)
                if prev is not None:
                    d = flat[i] - prev[0]
                    rms = float(np.sqrt(np.dot(d, d) / n))
                    if rms < s.duplicate_threshold * max(prev[1], 1e-12):
                        keep[i] = False
                        self.counts.duplicate += 1
                        continue
                self._last[key] = (flat[i].copy(), float(std[i]))
        self.counts.kept += int(keep.sum())
        return keep


def extract_patches(read: Callable[[tuple[slice, slice, slice]], np.ndarray], shape: tuple[int, int, int],
                    itemsize: int, plan: PatchPlan, out_shape: tuple[int, int, int],
                    normalize: Callable[[np.ndarray], np.ndarray], keep: PatchFilter,
                    budget_bytes: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Read, resample, normalize and filter planned patches, one region at a time.

    Parameters
    ----------
    read : callable
        ``read(region) -> (z, y, x) ndarray`` (a Volume's ``read``).
    shape, itemsize
        Volume shape and bytes per voxel (for the memory budget).
    plan : PatchPlan
    out_shape : (k, P, P)
    normalize : callable
        ``normalize(x, out=x)`` maps raw float32 to normalized in place (an IntensityReference's
        ``apply``).
    keep : PatchFilter
    budget_bytes : int
        Bound on one region read.

    Yields
    ------
    patches : (m, k, P, P) float32 ndarray
        Kept patches of one region, normalized.
    indices : (m,) int ndarray
        Their indices in the plan.
    """
    from concurrent.futures import ThreadPoolExecutor

    groups = list(iter_groups(plan, shape, itemsize, budget_bytes))
    # Read the next region in a thread while this one is processed: file reads release the GIL,
    # so a cold disk and the CPU work overlap. At most two regions are in memory; only the
    # read-ahead thread ever reads, so backends need not be thread-safe.
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="warmstart-read") as pool:
        ahead = pool.submit(read, groups[0][1]) if groups else None
        for g, (idx, region) in enumerate(groups):
            block = ahead.result()  # type: ignore[union-attr]
            if g + 1 < len(groups):
                ahead = pool.submit(read, groups[g + 1][1])
            yield from _patches_of_region(block, region, idx, plan, out_shape, normalize, keep)


def _patches_of_region(block: np.ndarray, region: tuple[slice, slice, slice], idx: np.ndarray, plan: PatchPlan,
                       out_shape: tuple[int, int, int], normalize: Callable[..., np.ndarray],
                       keep: PatchFilter) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Cut, resample, normalize and filter the patches of one region read."""
    origin = np.array([region[0].start, region[1].start, region[2].start])
    for a in np.unique(plan.axis[idx]):
        sel = idx[plan.axis[idx] == a]
        ext = plan.extent[int(a)]
        lo = plan.start[sel] - origin
        u, v = _INPLANE[int(a)]
        order = (int(a), u, v)
        # Crop, reorder to (n, u, v) and convert to float32 in one copy per patch.
        raw = np.empty((len(sel), ext[order[0]], ext[order[1]], ext[order[2]]), dtype=np.float32)
        for j, (z, y, x) in enumerate(lo):
            raw[j] = block[z:z + ext[0], y:y + ext[1], x:x + ext[2]].transpose(order)
        if block.dtype.kind == "f":
            finite = np.isfinite(raw).reshape(len(sel), -1).all(axis=1)
        else:
            finite = np.ones(len(sel), bool)
        patches = resample_block(raw, out_shape)  # ``raw`` itself when no resampling: ours to modify
        normalize(patches, out=patches)
        mask = keep(patches, finite, plan.axis[sel], plan.start[sel])
        if mask.any():
            yield patches[mask], sel[mask]


def source_seed(seed: int, name: str) -> int:
    """Per-source seed from the build seed and the source's stable name, so that a source gets
    the same patches in a full build, a shard or a resumed build."""
    import hashlib

    return int.from_bytes(hashlib.sha256(f"{seed}:{name}".encode("utf-8", "surrogateescape")).digest()[:8], "little")


def background_level(reference: Any, settings: FilterSettings) -> float:
    """Resolve the background threshold (normalized units) for one source (see FilterSettings)."""
    if settings.background_level is not None:
        return float(settings.background_level)
    pct = reference.stats["percentiles"]
    lo, hi = (float(reference.apply(np.array([pct[k]]))[0]) for k in ("0.5", "99.5"))
    return min(lo, hi) + 0.1 * abs(hi - lo)
