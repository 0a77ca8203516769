"""Intensity references: put every volume on one intensity footing.

A reference is fitted per source from a streamed subsample of slices and is an affine map
``normalized = slope * raw + offset`` (optionally clipped), so it is exactly invertible where it
does not clip, serializable to JSON, and cheap to apply to new data downstream.

Schemes
-------
``percentile``
    Robust percentiles ``(p_low, p_high)`` (default 0.5 / 99.5 %) map to the targets (default 0 / 1).
    For data whose gain and offset vary between scans and that has no shared material reference.
``zscore``
    ``(raw - centre) / scale`` with mean / standard deviation, or median / MAD (scaled by 1.4826, so
    that it estimates the standard deviation of normal data: common practice).
``two_point``
    Two raw reference values (the user's, or the two most prominent histogram modes, e.g.
    background and matrix) map to two targets (default 0 and 1): a two-point calibration. With air
    and water mapped to -1000 and 0 it is the Hounsfield definition.
``fixed``
    A known physical scale (e.g. Hounsfield units of clinical CT): an optional known raw-to-unit
    calibration, then a window ``(low, high)`` in that unit maps to the targets, clipped by default.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass, field
from typing import Any, Mapping

import numpy as np

from .base.settings import settings_from_dict
from .errors import IntensityError

__all__ = [
    "IntensitySettings",
    "IntensityReference",
    "fit_intensity",
    "sample_values",
    "find_modes",
    "SCHEMES",
    "REFERENCE_VERSION",
]

SCHEMES = ("percentile", "zscore", "two_point", "fixed")
REFERENCE_VERSION = 1
MAD_TO_STD = 1.4826  # 1 / Phi^-1(3/4): MAD of a normal distribution times this is its sigma (common practice)
_REPORT_PERCENTILES = (0.1, 0.5, 1, 5, 25, 50, 75, 95, 99, 99.5, 99.9)


def _pair(value: Any, name: str) -> tuple[float, float] | None:
    if value is None:
        return None
    try:
        a, b = (float(v) for v in value)
    except (TypeError, ValueError) as err:
        raise IntensityError(f"intensity.{name} must be two numbers, got {value!r}") from err
    return (a, b)


@dataclass(frozen=True)
class IntensitySettings:
    """How to fit an intensity reference (the rule; :class:`IntensityReference` is the result).

    Parameters
    ----------
    scheme : {"percentile", "zscore", "two_point", "fixed"}
    percentiles : (float, float)
        Percentiles (0-100) mapped to ``targets`` by the percentile scheme.
    zscore_method : {"meanstd", "medianmad"}
    reference_values : (float, float), optional
        Raw values of the two materials for ``two_point``; ``None`` finds them as the two most
        prominent histogram modes.
    targets : (float, float)
        Normalized values of the low and high reference (all schemes but ``zscore``).
    window : (float, float), optional
        ``fixed`` scheme: the window (low, high) in ``unit``, e.g. (-1000, 1000) HU.
    unit : str, optional
        ``fixed`` scheme: the physical unit of the window (``HU``).
    raw_to_unit : (float, float), optional
        ``fixed`` scheme: known calibration ``unit = raw * a + b`` when the raw values are not yet in
        ``unit`` (DICOM CT already is, after its Modality LUT).
    clip : bool, optional
        Clip the result to the targets. Default: only the ``fixed`` scheme clips.
    sample_slices : int
        Slices read (evenly spaced along Z) to fit the reference.
    sample_voxels : int
        Upper bound on the voxels kept from those slices.
    """

    scheme: str = "percentile"
    percentiles: tuple[float, float] = (0.5, 99.5)
    zscore_method: str = "meanstd"
    reference_values: tuple[float, float] | None = None
    targets: tuple[float, float] = (0.0, 1.0)
    window: tuple[float, float] | None = None
    unit: str | None = None
    raw_to_unit: tuple[float, float] | None = None
    clip: bool | None = None
    sample_slices: int = 32
    sample_voxels: int = 2_000_000

    def __post_init__(self) -> None:
        if self.scheme not in SCHEMES:
            raise IntensityError(f"intensity.scheme {self.scheme!r} unknown; expected one of {', '.join(SCHEMES)}")
        for name in ("percentiles", "reference_values", "targets", "window", "raw_to_unit"):
            object.__setattr__(self, name, _pair(getattr(self, name), name))
        lo, hi = self.percentiles  # type: ignore[misc]
        if not 0 <= lo < hi <= 100:
            raise IntensityError(f"intensity.percentiles must satisfy 0 <= low < high <= 100, got {self.percentiles}")
        if self.zscore_method not in ("meanstd", "medianmad"):
            raise IntensityError(f"intensity.zscore_method {self.zscore_method!r}: expected 'meanstd' or 'medianmad'")
        if self.targets[0] == self.targets[1]:  # type: ignore[index]
            raise IntensityError(f"intensity.targets must differ, got {self.targets}")
        if self.scheme == "fixed" and self.window is None:
            raise IntensityError("intensity.scheme 'fixed' needs intensity.window = [low, high] in its unit")
        if self.sample_slices < 1 or self.sample_voxels < 1000:
            raise IntensityError("intensity.sample_slices must be >= 1 and sample_voxels >= 1000")

    @property
    def clips(self) -> bool:
        return self.scheme == "fixed" if self.clip is None else bool(self.clip)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        return {k: list(v) if isinstance(v, tuple) else v for k, v in d.items()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "IntensitySettings":
        """Build from a mapping, checking keys and types (the recipes' mechanism)."""
        return settings_from_dict(cls, d, "intensity")


@dataclass(frozen=True)
class IntensityReference:
    """A fitted intensity map ``normalized = slope * raw + offset``, clipped to ``clip`` if set.

    Attributes
    ----------
    scheme : str
    slope, offset : float
    clip : (float, float) or None
        Bounds in normalized units.
    params : dict
        The fitted quantities (percentile values, mean/std, the two reference values, ...).
    settings : dict
        The :class:`IntensitySettings` that produced it.
    stats : dict
        Raw sample statistics: ``n_sampled``, ``n_nonfinite``, percentiles, a 256-bin histogram.

    Examples
    --------
    >>> import numpy as np
    >>> ref = fit_intensity(np.array([[0., 10.], [20., 30.]]), IntensitySettings(percentiles=(0, 100)))
    >>> ref.apply(np.array([0., 15., 30.])).tolist(), ref.invert(np.array([0.5])).tolist()
    ([0.0, 0.5, 1.0], [15.0])
    """

    scheme: str
    slope: float
    offset: float
    clip: tuple[float, float] | None = None
    params: dict[str, Any] = field(default_factory=dict)
    settings: dict[str, Any] = field(default_factory=dict)
    stats: dict[str, Any] = field(default_factory=dict)

    def apply(self, raw: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Map raw values to normalized float32 (NaN stays NaN).

        ``out`` (a float32 array, may be ``raw`` itself) receives the result in place.
        """
        if out is None:
            out = np.asarray(raw, dtype=np.float32) * np.float32(self.slope)
        else:
            np.multiply(raw, np.float32(self.slope), out=out)
        out += np.float32(self.offset)
        if self.clip is not None:
            np.clip(out, self.clip[0], self.clip[1], out=out)
        return out

    def invert(self, normalized: np.ndarray) -> np.ndarray:
        """Map normalized values back to raw (float64). Exact where ``apply`` did not clip."""
        return (np.asarray(normalized, dtype=np.float64) - self.offset) / self.slope

    def to_dict(self) -> dict[str, Any]:
        return {
            "version": REFERENCE_VERSION,
            "scheme": self.scheme,
            "slope": self.slope,
            "offset": self.offset,
            "clip": None if self.clip is None else list(self.clip),
            "params": self.params,
            "settings": self.settings,
            "stats": self.stats,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "IntensityReference":
        if d.get("version") != REFERENCE_VERSION:
            raise IntensityError(f"intensity reference version {d.get('version')!r} unknown; this warmstart reads {REFERENCE_VERSION}")
        unknown = sorted(set(d) - {"version", "scheme", "slope", "offset", "clip", "params", "settings", "stats"})
        if unknown:
            raise IntensityError(f"unknown intensity reference fields: {', '.join(unknown)}")
        clip = d.get("clip")
        return cls(str(d["scheme"]), float(d["slope"]), float(d["offset"]),
                   None if clip is None else (float(clip[0]), float(clip[1])),
                   dict(d.get("params", {})), dict(d.get("settings", {})), dict(d.get("stats", {})))


def _slice_positions(n: int, k: int) -> list[int]:
    if n <= k:
        return list(range(n))
    return sorted({int(round(i)) for i in np.linspace(0, n - 1, k)})


def sample_values(data: Any, n_slices: int = 32, max_voxels: int = 2_000_000) -> tuple[np.ndarray, int, int]:
    """Stream a deterministic subsample of a volume's voxels.

    Parameters
    ----------
    data : Volume or (Z, Y, X) / (Y, X) ndarray
    n_slices : int
        Slices read, evenly spaced along Z (one at a time: memory is one slice).
    max_voxels : int
        Bound on the voxels kept; each slice is subsampled with a flat stride.

    Returns
    -------
    values : (n,) float64 ndarray
        Finite sampled values.
    n_seen : int
        Voxels looked at (finite or not).
    n_nonfinite : int
        NaN / Inf voxels among them (excluded from ``values``).
    """
    arr = np.asarray(data) if isinstance(data, np.ndarray) else None
    if arr is not None and arr.ndim == 2:
        arr = arr[np.newaxis]
    shape = arr.shape if arr is not None else data.shape
    zs = _slice_positions(shape[0], n_slices)
    per_slice = max(1, max_voxels // len(zs))
    plane = int(shape[1]) * int(shape[2])
    step = max(1, math.ceil(plane / per_slice))
    parts, seen, bad = [], 0, 0
    for k, z in enumerate(zs):
        sl = arr[z] if arr is not None else data.read((z,))[0]
        flat = np.asarray(sl).reshape(-1)[k % step::step].astype(np.float64)
        ok = np.isfinite(flat)
        seen += flat.size
        bad += int(flat.size - ok.sum())
        parts.append(flat[ok])
    return (np.concatenate(parts) if parts else np.empty(0)), seen, bad


def find_modes(values: np.ndarray, n_modes: int = 2, bins: int = 512, min_separation: float = 0.05) -> np.ndarray:
    """Locate the most prominent modes of a value distribution.

    The histogram spans the 0.01-99.99 percentile range in ``bins`` bins and is smoothed with a
    Gaussian of 2 bins; peaks are ranked by topographic prominence (``scipy.signal.find_peaks``)
    and must be ``min_separation`` of the range apart. Peak positions are refined by fitting a
    parabola through the peak bin and its neighbours.

    Parameters
    ----------
    values : (n,) ndarray
    n_modes : int
    bins : int
    min_separation : float
        Minimum distance between modes, as a fraction of the histogram range.

    Returns
    -------
    (n_modes,) ndarray
        Mode positions in the units of ``values``, ascending.
    """
    from scipy.signal import find_peaks

    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size < 100:
        raise IntensityError(f"need at least 100 finite values to find modes, got {values.size}")
    lo, hi = np.percentile(values, [0.01, 99.99])
    if not hi > lo:
        raise IntensityError("values are constant; there are no modes to find")
    counts, edges = np.histogram(values, bins=bins, range=(lo, hi))
    x = np.arange(-8, 9)
    kernel = np.exp(-0.5 * (x / 2.0) ** 2)
    smooth = np.convolve(np.pad(counts.astype(float), 8, mode="edge"), kernel / kernel.sum(), mode="valid")
    # Pad with zeros so a mode in the first or last bin (air below the field of view, say) is a peak.
    padded = np.concatenate([[0.0], smooth, [0.0]])
    peaks, props = find_peaks(padded, prominence=0, distance=max(1, int(min_separation * bins)))
    peaks = peaks - 1
    if len(peaks) < n_modes:
        raise IntensityError(f"found {len(peaks)} histogram mode(s), need {n_modes}; give the reference values explicitly")
    best = peaks[np.argsort(props["prominences"])[::-1][:n_modes]]
    centres = (edges[:-1] + edges[1:]) / 2
    width = edges[1] - edges[0]
    out = []
    for p in best:
        if 0 < p < len(smooth) - 1:
            a, b, c = smooth[p - 1], smooth[p], smooth[p + 1]
            denom = a - 2 * b + c
            shift = 0.5 * (a - c) / denom if denom != 0 else 0.0
            out.append(centres[p] + float(np.clip(shift, -0.5, 0.5)) * width)
        else:
            out.append(centres[p])
    return np.sort(np.asarray(out))


def _affine(r0: float, r1: float, t0: float, t1: float, what: str) -> tuple[float, float]:
    if not np.isfinite(r0) or not np.isfinite(r1) or r1 == r0:
        raise IntensityError(f"{what}: the two reference values are equal ({r0:g}); the data has no contrast to normalize")
    slope = (t1 - t0) / (r1 - r0)
    return slope, t0 - slope * r0


def fit_intensity(data: Any, settings: IntensitySettings | None = None, *, name: str | None = None) -> IntensityReference:
    """Fit an intensity reference to a volume or array.

    Parameters
    ----------
    data : Volume or ndarray
        Read slice by slice (``settings.sample_slices`` evenly spaced slices).
    settings : IntensitySettings, optional
        Default: robust percentiles 0.5 / 99.5 mapped to 0 / 1.
    name : str, optional
        Used in error messages (default: the volume's path).

    Returns
    -------
    IntensityReference

    Raises
    ------
    IntensityError
        No finite voxel, constant data, or modes not found.

    References
    ----------
    The Hounsfield scale: HU = 1000 (mu - mu_water) / (mu_water - mu_air); G. N. Hounsfield,
    Br. J. Radiol. 46 (1973) 1016-1022, doi:10.1259/0007-1285-46-552-1016.
    """
    s = settings or IntensitySettings()
    label = name or getattr(getattr(data, "source", None), "path", None) or "array"
    values, seen, bad = sample_values(data, s.sample_slices, s.sample_voxels)
    if values.size == 0:
        raise IntensityError(f"{label}: no finite voxel in the {seen} sampled (all NaN/Inf or empty)")
    t0, t1 = s.targets  # type: ignore[misc]
    params: dict[str, Any]
    if s.scheme == "percentile":
        lo, hi = np.percentile(values, s.percentiles)
        slope, offset = _affine(float(lo), float(hi), t0, t1, f"{label}: percentiles {s.percentiles}")
        params = {"low": float(lo), "high": float(hi)}
    elif s.scheme == "zscore":
        if s.zscore_method == "meanstd":
            centre, scale = float(values.mean()), float(values.std())
        else:
            centre = float(np.median(values))
            scale = MAD_TO_STD * float(np.median(np.abs(values - centre)))
        if not scale > 0:
            raise IntensityError(f"{label}: spread is zero ({s.zscore_method}); the data is constant")
        slope, offset = 1.0 / scale, -centre / scale
        params = {"centre": centre, "scale": scale}
    elif s.scheme == "two_point":
        found = s.reference_values is None
        refs = tuple(find_modes(values)) if found else s.reference_values
        slope, offset = _affine(float(refs[0]), float(refs[1]), t0, t1, f"{label}: two-point references")  # type: ignore[index]
        params = {"reference_values": [float(r) for r in refs], "found_as_modes": found}  # type: ignore[union-attr]
    else:  # fixed
        a, b = s.raw_to_unit or (1.0, 0.0)
        w0, w1 = s.window  # type: ignore[misc]
        ws, wo = _affine(w0, w1, t0, t1, f"{label}: window")
        slope, offset = ws * a, ws * b + wo
        params = {"window": [w0, w1], "unit": s.unit, "raw_to_unit": [a, b]}
        unit = getattr(data, "meta", {}).get("unit")
        if s.unit and unit and unit != s.unit:
            warnings.warn(f"{label}: data is in {unit!r}, the fixed window is in {s.unit!r}", stacklevel=2)
    clip = (min(t0, t1), max(t0, t1)) if s.clips else None
    lo_h, hi_h = np.percentile(values, [0.1, 99.9])
    hist, edges = np.histogram(values, bins=256, range=(float(lo_h), float(hi_h) if hi_h > lo_h else float(lo_h) + 1))
    stats = {
        "n_seen": int(seen),
        "n_sampled": int(values.size),
        "n_nonfinite": int(bad),
        "min": float(values.min()),
        "max": float(values.max()),
        "percentiles": {f"{p:g}": float(v) for p, v in zip(_REPORT_PERCENTILES, np.percentile(values, _REPORT_PERCENTILES))},
        "histogram": {"range": [float(edges[0]), float(edges[-1])], "counts": hist.tolist()},
    }
    return IntensityReference(s.scheme, float(slope), float(offset), clip, params, s.to_dict(), stats)
