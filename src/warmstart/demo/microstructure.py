"""Ground-truth microstructures of the demo's two labs, as integer phase volumes.

Both generators grow grains from randomly placed seeds with a smoothly varying radius
(a cheap stand-in for a random particle packing: overlapping grains form sintering necks or
particle contacts), then add a second solid phase from a thresholded Gaussian random field. They
are deterministic for a generator state and take sizes in voxels, so a caller that knows the
voxel size (µm) converts physical grain radii first.
"""
from __future__ import annotations

import numpy as np

__all__ = ["FILTER_PHASES", "CATHODE_PHASES", "grain_packing", "filter_microstructure", "cathode_microstructure"]

FILTER_PHASES = ("void", "alumina", "zirconia")
"""Phase ids of a sintered filter: 0 void (pores and the air around the core), 1 alumina grain,
2 zirconia inclusion (a sintering aid that clusters into small dense agglomerates)."""

CATHODE_PHASES = ("pore", "binder", "active")
"""Phase ids of a battery cathode: 0 pore (filled with epoxy before milling), 1 carbon-binder
domain, 2 active-material particle."""


def grain_packing(shape: tuple[int, int, int], rng: np.random.Generator, solid_fraction: float,
                  mean_radius: float) -> np.ndarray:
    """Boolean volume of overlapping grains filling ``solid_fraction`` of the box.

    Seeds are placed uniformly with a density modulated by a smooth random field (pressing
    gradients); every voxel's distance to the nearest seed is compared with a smooth log-normal
    radius field (grain size spread, log-sigma 0.25), and the threshold is chosen so that the
    solid fraction is exact up to ties.

    Parameters
    ----------
    shape : (Z, Y, X)
    rng : numpy.random.Generator
    solid_fraction : float
        Fraction of voxels inside a grain, in (0, 1).
    mean_radius : float
        Mean grain radius in voxels.
    """
    from scipy.ndimage import distance_transform_edt, gaussian_filter

    seeds = np.ones(shape, dtype=bool)
    density = gaussian_filter(rng.standard_normal(shape), sigma=min(shape) / 6)
    density = 1.0 + 0.5 * density / (np.abs(density).max() + 1e-9)
    n = max(4, int(np.prod(shape) * solid_fraction / (4 / 3 * np.pi * mean_radius**3) * 2.0))
    centres = (rng.random((n, 3)) * np.array(shape)).astype(int)
    keep = rng.random(n) < density[tuple(centres.T)] / density.max()
    seeds[tuple(centres[keep].T)] = False
    dist = distance_transform_edt(seeds)
    radii = gaussian_filter(rng.lognormal(np.log(mean_radius), 0.25, size=shape), 2)
    margin = dist - radii * 0.8
    return margin < np.quantile(margin, solid_fraction)


def _field(shape: tuple[int, ...], rng: np.random.Generator, sigma: float) -> np.ndarray:
    from scipy.ndimage import gaussian_filter

    f = gaussian_filter(rng.standard_normal(shape), sigma)
    return (f - f.mean()) / (f.std() + 1e-12)


def filter_microstructure(shape: tuple[int, int, int], rng: np.random.Generator, porosity: float = 0.35,
                          mean_radius: float = 6.0, inclusion_fraction: float = 0.03) -> np.ndarray:
    """Phases of a sintered alumina filter with zirconia inclusions (ids in :data:`FILTER_PHASES`).

    Parameters
    ----------
    shape : (Z, Y, X)
    rng : numpy.random.Generator
    porosity : float
        Pore fraction of the box.
    mean_radius : float
        Mean alumina grain radius in voxels.
    inclusion_fraction : float
        Fraction of the box turned into zirconia: the top of a random field of correlation
        length ``mean_radius / 2`` inside the grains, so inclusions are small, rounded and rare.

    Returns
    -------
    (Z, Y, X) uint8 ndarray
    """
    solid = grain_packing(shape, rng, 1.0 - porosity, mean_radius)
    phases = solid.astype(np.uint8)
    if inclusion_fraction > 0:
        score = _field(shape, rng, max(1.0, mean_radius / 2))
        score[~solid] = -np.inf
        cut = np.quantile(score, 1.0 - inclusion_fraction)
        phases[score > cut] = 2
    return phases


def cathode_microstructure(shape: tuple[int, int, int], rng: np.random.Generator, active_fraction: float = 0.55,
                           binder_fraction: float = 0.15, mean_radius: float = 8.0) -> np.ndarray:
    """Phases of a battery cathode (ids in :data:`CATHODE_PHASES`).

    Active-material particles are a grain packing; the carbon-binder domain collects in the
    pore space next to particles (it wets their surfaces and bridges contacts): the pore voxels
    with the smallest ``distance to a particle - 2 * random field`` become binder until
    ``binder_fraction`` of the box is binder.

    Parameters
    ----------
    shape : (Z, Y, X)
        On an isotropic grid; the FIB-SEM simulation averages slices for its thicker sections.
    rng : numpy.random.Generator
    active_fraction, binder_fraction : float
        Volume fractions of the box.
    mean_radius : float
        Mean particle radius in voxels.

    Returns
    -------
    (Z, Y, X) uint8 ndarray
    """
    from scipy.ndimage import distance_transform_edt

    active = grain_packing(shape, rng, active_fraction, mean_radius)
    phases = np.where(active, 2, 0).astype(np.uint8)
    score = distance_transform_edt(~active) - 2.0 * _field(shape, rng, 2.0)
    score[active] = np.inf
    cut = np.quantile(score, binder_fraction)
    phases[score <= cut] = 1
    return phases
