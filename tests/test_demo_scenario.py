"""The demo's generated data behaves like the physics its docstrings describe.

The checks compare with facts of CT and electron microscopy (marked "common practice") and with
scikit-image's own radon/iradon; the data itself is invented, as demo data should be.
"""
from __future__ import annotations

import numpy as np
import pytest

from warmstart.demo.ct import CTSettings, core_mask, simulate_ct
from warmstart.demo.fibsem import FIBSEMSettings, simulate_fibsem
from warmstart.demo.microstructure import cathode_microstructure, filter_microstructure

CLEAN = CTSettings(photons=1e9, beam_hardening=0.0, ring_strength=0.0, blur_pixels=0.0, n_angles=180)


def _disc(n: int = 64, z: int = 1) -> np.ndarray:
    return np.repeat(core_mask((n, n), CLEAN.core_radius)[None].astype(np.uint8), z, axis=0)  # phase 1 = alumina


def _radial_profile(img: np.ndarray, bins: int = 8, radius: float = 0.8) -> np.ndarray:
    n = img.shape[-1]
    y, x = np.indices(img.shape[-2:])
    r = np.hypot(y - (n - 1) / 2, x - (n - 1) / 2) / (n / 2)
    edges = np.linspace(0, radius, bins + 1)
    return np.array([img[..., (r >= a) & (r < b)].mean() for a, b in zip(edges[:-1], edges[1:])])


def test_noise_free_ct_matches_scikit_image_filtered_back_projection():
    from skimage.transform import iradon, radon

    rng = np.random.default_rng(0)
    phases = filter_microstructure((2, 64, 64), rng, mean_radius=4.0)
    phases[:, ~core_mask((64, 64), CLEAN.core_radius)] = 0
    ours = simulate_ct(phases, CLEAN, rng, threads=1)
    # scikit-image's own pipeline on the same attenuation map (no detector physics at 1e9 photons).
    mu = np.asarray(CLEAN.attenuation)[phases[0]] * core_mask((64, 64), CLEAN.core_radius)  # air outside
    theta = np.linspace(0, 180, 180, endpoint=False)
    ref = iradon(radon(mu, theta=theta, circle=True), theta=theta, circle=True, filter_name="ramp")
    inside = core_mask((64, 64), 0.8)
    assert np.abs(ours[0] - ref)[inside].max() < 0.02 * np.ptp(ref[inside])


def test_ct_is_quantitative_without_artefacts_and_cupped_with_beam_hardening():
    # Common practice: FBP of noise-free parallel-beam data of a uniform disc gives a flat interior at
    # the true attenuation; a polychromatic beam (hardening) makes the centre darker than the rim.
    rng = np.random.default_rng(1)
    flat = _radial_profile(simulate_ct(_disc(), CLEAN, rng, threads=1)[0])
    assert np.allclose(flat, 1.0, atol=0.03)
    hard = CTSettings(**{**CLEAN.__dict__, "beam_hardening": 0.1})
    cupped = _radial_profile(simulate_ct(_disc(), hard, rng, threads=1)[0])
    assert cupped[0] < cupped[-1] - 0.03 and np.all(np.diff(cupped) > -0.01)


def test_ct_noise_falls_as_one_over_root_photons():
    # Common practice: in FBP the noise variance is inversely proportional to the detected counts,
    # so four times the photons halves the standard deviation.
    def noise(photons: float) -> float:
        s = CTSettings(**{**CLEAN.__dict__, "photons": photons})
        vol = simulate_ct(_disc(z=4), s, np.random.default_rng(2), threads=2)
        return float(vol[:, core_mask((64, 64), 0.6)].std())

    ratio = noise(1000.0) / noise(4000.0)
    assert ratio == pytest.approx(2.0, rel=0.15)


def test_detector_gain_errors_make_rings_that_do_not_depend_on_the_angle():
    s = CTSettings(**{**CLEAN.__dict__, "ring_strength": 0.01})
    rings = simulate_ct(_disc(), s, np.random.default_rng(3), threads=1)[0] - simulate_ct(_disc(), CLEAN, np.random.default_rng(3), threads=1)[0]
    # Common practice: a constant error per detector element back-projects into circles around the
    # rotation axis; over a 180-degree scan each element traces half a circle and the element
    # mirrored about the axis the other half. So the artefact is nearly constant on each half ring.
    y, x = np.indices(rings.shape)
    r = np.rint(np.hypot(y - 32, x - 32)).astype(int)  # scikit-image rotates about pixel n // 2
    key = 2 * r + (y >= 32)
    inside = (r > 2) & (r < 26)
    half_ring_means = np.bincount(key[inside], rings[inside]) / np.maximum(np.bincount(key[inside]), 1)
    assert np.var(rings[inside]) > 1e-4
    assert np.var(half_ring_means[key[inside]]) > 0.6 * np.var(rings[inside])
    assert np.array_equal(simulate_ct(_disc(), s, np.random.default_rng(3), threads=2)[0] - 1.0,
                          simulate_ct(_disc(), s, np.random.default_rng(3), threads=1)[0] - 1.0)  # threads do not matter


def test_fibsem_sections_curtains_charging_and_shot_noise():
    k = 2
    uniform = np.full((8 * k, 48, 48), 1, np.uint8)  # all carbon-binder: only the artefacts vary
    quiet = FIBSEMSettings(charging=0.0, curtaining=0.0, line_jitter=0.0, blur_pixels=0.0, dose=1e6, section_pixels=k)
    assert simulate_fibsem(uniform, quiet, np.random.default_rng(0)).shape == (8, 48, 48)
    # Shot noise: Poisson with `dose` electrons per pixel has variance mean / dose.
    noisy = simulate_fibsem(uniform, FIBSEMSettings(**{**quiet.__dict__, "dose": 50.0}), np.random.default_rng(0))
    assert noisy.var() == pytest.approx(noisy.mean() / 50.0, rel=0.1)
    # Curtains run along Y (the milling direction): columns differ far more than rows.
    curt = simulate_fibsem(uniform, FIBSEMSettings(**{**quiet.__dict__, "curtaining": 0.2}), np.random.default_rng(1))
    assert curt.mean(axis=1).std() > 5 * curt.mean(axis=2).std()
    # Charging: brightest at the top of the frame, and a smooth (low-frequency) pattern.
    ch = simulate_fibsem(uniform, FIBSEMSettings(**{**quiet.__dict__, "charging": 0.3}), np.random.default_rng(2))
    assert ch[:, :8].mean() > ch[:, -8:].mean() + 0.03
    # Sections average their planes: a two-plane section of phases 0 and 2 shows the mean yield.
    layered = np.zeros((2, 8, 8), np.uint8)
    layered[1] = 2
    mixed = simulate_fibsem(layered, quiet, np.random.default_rng(3))
    assert mixed.mean() == pytest.approx(np.mean([quiet.yields[0], quiet.yields[2]]), abs=0.01)


def test_microstructures_hit_their_volume_fractions():
    rng = np.random.default_rng(4)
    f = filter_microstructure((16, 48, 48), rng, porosity=0.3, mean_radius=4.0, inclusion_fraction=0.03)
    frac = np.bincount(f.ravel(), minlength=3) / f.size
    assert frac == pytest.approx([0.3, 0.67, 0.03], abs=0.01)
    c = cathode_microstructure((16, 48, 48), rng, active_fraction=0.55, binder_fraction=0.15, mean_radius=5.0)
    frac = np.bincount(c.ravel(), minlength=3) / c.size
    assert frac == pytest.approx([0.30, 0.15, 0.55], abs=0.01)
    # Binder sits on particle surfaces: most binder voxels touch within 2 voxels of a particle.
    from scipy.ndimage import distance_transform_edt

    d = distance_transform_edt(c != 2)
    assert np.median(d[c == 1]) <= 2.0 < np.median(d[c == 0])


def test_archive_reads_back_with_each_instruments_metadata(tmp_path):
    import warmstart as ws
    from warmstart.demo.scenario import INSTRUMENTS, write_archive, write_labelled_set

    paths = write_archive(tmp_path / "archive", n_per_scanner=1, shape=(6, 48, 48))
    assert len(paths) == len(INSTRUMENTS)
    archived = set()
    for ins, path in zip(INSTRUMENTS, paths):
        with ws.open_volume(path) as vol:
            archived.add(vol.source.sha256)
            assert vol.shape == (6, 48, 48) and str(vol.dtype) == ins.dtype, path
            if ins.fmt != "slices":  # PNG slices carry no voxel size: "unknown", never guessed
                assert vol.voxel_size_um == pytest.approx(ins.voxel_um, rel=1e-4), path
    labelled = write_labelled_set(tmp_path / "labelled", n=1, shape=(4, 48, 48))
    import tifffile

    lab = tifffile.imread(labelled / "labels" / "labelled_00.tif")
    assert set(np.unique(lab)) == {0, 1, 2}
    assert np.all(lab[:, ~core_mask((48, 48), 0.92)] == 0)  # the air around the core is void
    with ws.open_volume(labelled / "images" / "labelled_00.tif") as vol:
        assert vol.source.sha256 not in archived
