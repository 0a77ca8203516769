"""A thin-structure scenario: membranes 1-3 px wide between cells, as in EM sections of tissue.

Generated fixture (a plant-tissue section's cell walls: Voronoi cells whose walls are the pixels
where the nearest cell centre changes, widened to 1-3 px), benchmarked with the shipped
``bench-cpu`` recipe at 4 tiles: random init must learn the walls (final test Dice >= 0.75), and
the report must say how many replicates converged. The Voronoi construction uses scipy's
``cKDTree`` for the nearest centres and ``scipy.ndimage`` for the wall width and the blur.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

pytest.importorskip("torch")
tifffile = pytest.importorskip("tifffile")

pytestmark = pytest.mark.slow


def cell_walls(shape=(24, 128, 128), cells=60, seed=0):
    """(image uint16, label uint8): walls (label 1) 1-3 px wide, darker than the cells around them."""
    from scipy import ndimage
    from scipy.spatial import cKDTree

    rng = np.random.default_rng(seed)
    z, y, x = shape
    # Cells are columns through the slices that drift slowly, so neighbouring slices look alike.
    centres = rng.uniform([0, 0, 0], [z, y, x], size=(cells, 3)) * [0.2, 1, 1]
    grid = np.stack(np.meshgrid(np.arange(z) * 0.2, np.arange(y), np.arange(x), indexing="ij"), -1).reshape(-1, 3)
    owner = cKDTree(centres).query(grid)[1].reshape(shape)
    wall = np.zeros(shape, dtype=bool)
    for axis in (1, 2):
        wall |= np.diff(owner, axis=axis, prepend=np.take(owner, [0], axis=axis)) != 0
    width = rng.integers(0, 2, size=cells)  # per cell: walls widened by 0 or 1 px (1-3 px in all)
    wider = ndimage.binary_dilation(wall, structure=np.ones((1, 3, 3), bool)) & (width[owner] == 1)
    wall |= wider
    shade = rng.uniform(0.55, 0.9, size=cells)[owner]
    img = np.where(wall, 0.25, shade) + rng.normal(0, 0.06, size=shape)
    img = ndimage.gaussian_filter(img, sigma=(0, 0.7, 0.7))
    return (np.clip(img, 0, 1) * 40000 + 2000).astype(np.uint16), wall.astype(np.uint8)


@pytest.fixture(scope="module")
def walls(tmp_path_factory):
    root = tmp_path_factory.mktemp("walls")
    (root / "images").mkdir()
    (root / "labels").mkdir()
    for i in range(2):
        img, lab = cell_walls(seed=i)
        tifffile.imwrite(root / "images" / f"section_{i}.tif", img)
        tifffile.imwrite(root / "labels" / f"section_{i}.tif", lab)
    return root


def test_the_walls_are_one_to_three_pixels_wide(walls):
    from scipy import ndimage

    lab = tifffile.imread(walls / "labels" / "section_0.tif")[5].astype(bool)
    # Distance of a wall pixel to the nearest cell pixel: at most 2 px (walls up to 3 px wide),
    # but at the junctions where three walls meet.
    depth = ndimage.distance_transform_edt(lab)
    assert 0.05 < lab.mean() < 0.35 and np.percentile(depth[lab], 90) <= 2.0 and np.mean(depth[lab] <= 1) > 0.5


def test_random_init_learns_thin_walls_with_bench_cpu_and_the_report_says_which_runs_converged(walls, tmp_path):
    from warmstart.bench.run import run_bench
    from warmstart.recipe import load_recipe

    s = load_recipe("bench-cpu", ["bench.sizes=[4]"]).bench
    result = run_bench(walls, [], tmp_path / "bench", s, progress=False)
    row = result["summary"]["4"]["random"]
    assert row["test_dice"]["mean"] >= 0.75, row["test_dice"]
    assert all(r["learned_every_class"] for r in result["runs"])
    md = (tmp_path / "bench" / "bench.md").read_text()
    assert "## Convergence" in md and f"of {s.replicates}" in md
    saved = json.loads((tmp_path / "bench" / "bench.json").read_text())
    assert all("converged" in r for r in saved["runs"])
