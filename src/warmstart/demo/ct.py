"""Micro-CT of a cylindrical sample, slice by slice: projections, detector physics, filtered back-projection.

The model (parallel beam, so every slice is an independent 2-D problem; a lab scanner's cone
beam is ignored):

1. **Attenuation map.** Each phase has a linear attenuation coefficient (relative units); the
   sample is a cylinder of radius ``core_radius`` x half the slice width, air outside. The map
   is scaled so that a ray through the full core sees a mean line integral of
   ``path_attenuation`` (transmission ``exp(-path_attenuation)``).
2. **Projections.** Line integrals ``p`` from :func:`skimage.transform.radon` over
   ``n_angles`` angles in [0, 180) degrees.
3. **Beam hardening.** A polychromatic beam loses its soft photons first, so the measured
   attenuation grows slower than linear with path length: ``p' = p - beam_hardening * p**2``
   (the usual quadratic first-order model). After reconstruction this "cups" the slice: the
   centre of the core looks darker than its rim.
4. **Counting noise and rings.** Each detector element counts ``I ~ Poisson(gain_d * I0 *
   exp(-p'))`` photons, with ``I0`` photons per element and projection in the open beam and a
   per-element gain error ``gain_d = 1 + ring_strength * N(0, 1)`` that the flat-field
   correction did not remove. The log-normalized projection ``-log(I / I0)`` then carries
   Poisson noise (worst behind the densest paths) and a constant offset per detector element,
   which back-projects into rings around the rotation axis.
5. **Reconstruction.** :func:`skimage.transform.iradon` with the ramp filter gives attenuation
   per pixel; the scanner's detector blur is a Gaussian on the slice.

The result is in attenuation units (alumina is about 1 far from artefacts); the caller maps
it to the instrument's raw integers.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

__all__ = ["CTSettings", "simulate_ct", "core_mask"]


@dataclass(frozen=True)
class CTSettings:
    """Acquisition of one micro-CT scanner.

    Parameters
    ----------
    attenuation : tuple of float
        Linear attenuation per phase id (relative; alumina = 1).
    n_angles : int
        Projections over 180 degrees.
    photons : float
        Open-beam photons per detector element and projection (``I0``).
    beam_hardening : float
        Quadratic coefficient of the hardening model (0 for a monochromatic beamline).
    ring_strength : float
        Standard deviation of the residual detector gain error.
    path_attenuation : float
        Mean line integral of a ray through the full core.
    core_radius : float
        Sample radius as a fraction of half the slice width.
    blur_pixels : float
        Gaussian detector blur, sigma in pixels.
    """

    attenuation: tuple[float, ...] = (0.02, 1.0, 3.0)
    n_angles: int = 180
    photons: float = 4000.0
    beam_hardening: float = 0.08
    ring_strength: float = 0.004
    path_attenuation: float = 1.6
    core_radius: float = 0.92
    blur_pixels: float = 0.7


def core_mask(shape: tuple[int, int], core_radius: float) -> np.ndarray:
    """Boolean disc of the sample core on a (Y, X) slice."""
    y, x = np.indices(shape, dtype=np.float64)
    cy, cx = (shape[0] - 1) / 2, (shape[1] - 1) / 2
    r = np.hypot(y - cy, x - cx) / (min(shape) / 2)
    return r <= core_radius


def _slice(phases: np.ndarray, s: CTSettings, mask: np.ndarray, theta: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    from scipy.ndimage import gaussian_filter
    from skimage.transform import iradon, radon

    mu = np.asarray(s.attenuation, dtype=np.float64)[phases]
    mu[~mask] = 0.0  # air around the core
    # Scale to the requested line integral: a full-diameter ray crosses ~2 * radius pixels.
    scale = s.path_attenuation / (max(float(mu[mask].mean()), 1e-9) * 2 * s.core_radius * min(phases.shape) / 2)
    p = radon(mu * scale, theta=theta, circle=True)
    p = p - s.beam_hardening * p**2
    gains = 1.0 + s.ring_strength * rng.standard_normal(p.shape[0])
    counts = rng.poisson(gains[:, None] * s.photons * np.exp(-p))
    measured = -np.log(np.maximum(counts, 1) / s.photons)
    rec = iradon(measured, theta=theta, circle=True, filter_name="ramp") / scale
    return gaussian_filter(rec, s.blur_pixels) if s.blur_pixels > 0 else rec


def simulate_ct(phases: np.ndarray, settings: CTSettings, rng: np.random.Generator, threads: int = 2) -> np.ndarray:
    """Reconstructed attenuation volume of a phase volume, slice by slice along Z.

    Parameters
    ----------
    phases : (Z, Y, X) integer ndarray
        Phase ids indexing ``settings.attenuation``; slices must be square.
    settings : CTSettings
    rng : numpy.random.Generator
        Seeds one generator per slice, so the result does not depend on ``threads``.
    threads : int
        Slices reconstructed in parallel (scikit-image's radon/iradon release the GIL for most
        of their work).

    Returns
    -------
    (Z, Y, X) float32 ndarray
        Attenuation relative to alumina; zero outside the reconstruction circle.
    """
    if phases.ndim != 3 or phases.shape[1] != phases.shape[2]:
        raise ValueError(f"simulate_ct needs square (Z, N, N) slices, got shape {phases.shape}")
    theta = np.linspace(0.0, 180.0, settings.n_angles, endpoint=False)
    mask = core_mask(phases.shape[1:], settings.core_radius)
    seeds = rng.integers(0, 2**63 - 1, size=len(phases))

    def one(i: int) -> np.ndarray:
        return _slice(phases[i], settings, mask, theta, np.random.default_rng(int(seeds[i])))

    with ThreadPoolExecutor(max(1, threads)) as pool:
        slices = list(pool.map(one, range(len(phases))))
    return np.stack(slices).astype(np.float32)
