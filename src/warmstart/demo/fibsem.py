"""FIB-SEM serial sectioning of a resin-filled sample: the artefacts that make such stacks hard.

The model, for a (Z, Y, X) phase volume on an isotropic grid of pixel size ``p``:

1. **Sections.** The ion beam removes slices ``section_pixels`` grid planes thick; each imaged
   section averages those planes, so the stack's voxels are ``section_pixels * p`` deep and ``p``
   wide (anisotropic, as in most FIB-SEM stacks).
2. **Contrast and blur.** Each phase has a backscatter yield (``yields``); the electron probe
   and interaction volume blur the section with a Gaussian of ``blur_pixels``.
3. **Charging.** Poorly conducting regions accumulate charge and brighten the image with a
   smooth, slowly drifting pattern: a low-pass random field whose amplitude drifts from
   section to section, plus a gradient from the top of the frame.
4. **Curtaining.** The ion beam mills faster through some columns than others, leaving
   vertical stripes (along Y, the milling direction) whose strength grows down the face; the
   stripe profile evolves slowly between sections.
5. **Noise.** Electron shot noise (Poisson with ``dose`` electrons per pixel) and a per-row
   offset from scan-line jitter.

The result is detector signal (about 0-1); the caller maps it to the instrument's integers.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["FIBSEMSettings", "simulate_fibsem"]


@dataclass(frozen=True)
class FIBSEMSettings:
    """Acquisition of one FIB-SEM run.

    Parameters
    ----------
    yields : tuple of float
        Backscatter yield per phase id (pore resin, carbon-binder, active material).
    section_pixels : int
        Grid planes per milled section (voxel depth / pixel width).
    blur_pixels : float
        Gaussian probe blur, sigma in pixels.
    dose : float
        Electrons per pixel (shot noise).
    charging : float
        Peak charging brightness.
    curtaining : float
        Peak curtain stripe amplitude.
    line_jitter : float
        Standard deviation of the per-row offset.
    """

    yields: tuple[float, ...] = (0.12, 0.42, 0.82)
    section_pixels: int = 2
    blur_pixels: float = 0.8
    dose: float = 60.0
    charging: float = 0.18
    curtaining: float = 0.15
    line_jitter: float = 0.015


def simulate_fibsem(phases: np.ndarray, settings: FIBSEMSettings, rng: np.random.Generator) -> np.ndarray:
    """Imaged stack of a phase volume.

    Parameters
    ----------
    phases : (Z, Y, X) integer ndarray
        On an isotropic grid; Z is the milling direction.
    settings : FIBSEMSettings
    rng : numpy.random.Generator

    Returns
    -------
    (Z // section_pixels, Y, X) float32 ndarray
        Detector signal, roughly in [0, 1].
    """
    from scipy.ndimage import gaussian_filter, gaussian_filter1d

    k = settings.section_pixels
    nz = phases.shape[0] // k
    signal = np.asarray(settings.yields, dtype=np.float64)[phases[: nz * k]]
    signal = signal.reshape(nz, k, *phases.shape[1:]).mean(axis=1)
    signal = gaussian_filter(signal, (0, settings.blur_pixels, settings.blur_pixels))
    _, ny, nx = signal.shape
    rows = np.linspace(0.0, 1.0, ny)[:, None]
    # Charging: a smooth field, its strength drifting slowly along the stack, brightest at the top.
    pattern = gaussian_filter(rng.standard_normal((ny, nx)), min(ny, nx) / 5)
    pattern = (pattern - pattern.min()) / (np.ptp(pattern) + 1e-12)
    drift = 0.6 + 0.4 * np.sin(np.linspace(0, np.pi * rng.uniform(0.5, 2.0), nz) + rng.uniform(0, np.pi))
    charging = settings.charging * drift[:, None, None] * (0.6 * pattern + 0.4 * (1 - rows))[None]
    # Curtaining: column stripes, a slow random walk between sections, stronger lower down the face.
    profile = gaussian_filter1d(rng.standard_normal(nx), 1.0)
    walk = np.cumsum(0.15 * rng.standard_normal((nz, nx)), axis=0)
    stripes = gaussian_filter1d(profile[None] + walk, 1.0, axis=1)
    stripes = stripes / (np.abs(stripes).max() + 1e-12)
    curtains = settings.curtaining * stripes[:, None, :] * (0.3 + 0.7 * rows)[None]
    clean = np.clip(signal + charging + curtains, 0.0, None)
    noisy = rng.poisson(clean * settings.dose) / settings.dose
    noisy = noisy + settings.line_jitter * rng.standard_normal((nz, ny, 1))
    return noisy.astype(np.float32)
