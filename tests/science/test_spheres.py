"""Union-of-spheres masks (ionwell.science.spheres): the line method (clipped to the grid), the
block method and the dispatcher agree point for point with a brute-force reference that takes
minimum-image distances from ASE (``ase.geometry.get_distances``), on a molecular box, a
skewed periodic cell and a skewed slab, for radii from below the grid step to beyond the cell.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase.geometry import cellpar_to_cell, get_distances

from ionwell.science.grid import Grid, sphere_mask
from ionwell.science.spheres import line_cost, mask_by_blocks, mask_by_lines, union_mask


def _grid(kind: str) -> Grid:
    if kind == "box":  # a molecular box, not periodic, orthorhombic
        axes = np.diag([0.31, 0.27, 0.33])
        return Grid(np.array([-3.0, -2.5, -4.0]), axes, np.zeros((21, 19, 24)))
    cell = cellpar_to_cell([6.0, 6.0, 7.5, 90, 90, 120])  # hexagonal, skewed
    shape = (18, 18, 22) if kind == "periodic" else (18, 18, 25)
    pbc = (True, True, True) if kind == "periodic" else (True, True, False)
    return Grid(np.array([0.2, -0.1, 0.05]), cell / np.array(shape)[:, None], np.zeros(shape), pbc)


def _reference(grid: Grid, centers: np.ndarray, radius: float, strict: bool) -> np.ndarray:
    """Brute force: every point against every centre, minimum image over the grid's period
    along its periodic axes (ASE's get_distances)."""
    period = grid.axes * np.asarray(grid.shape)[:, None]
    _, d = get_distances(grid.points(), centers, cell=period, pbc=grid.pbc)
    near = (d < radius) if strict else (d <= radius)
    return near.any(axis=1).reshape(grid.shape)


@pytest.mark.parametrize("kind", ["box", "periodic", "slab"])
@pytest.mark.parametrize("radius", [0.2, 1.3, 4.0, 15.0])
def test_both_methods_equal_the_brute_force_mask(kind, radius):
    rng = np.random.default_rng(7)
    grid = _grid(kind)
    lo = grid.origin - 2.0
    hi = grid.origin + grid.cell.sum(axis=0) + 2.0  # some centres outside the grid
    centers = rng.uniform(lo, hi, size=(12, 3))
    for strict in (False, True):
        expected = _reference(grid, centers, radius, strict)
        assert expected.sum() > 0 or radius < 0.3  # the case is not empty
        lines = mask_by_lines(grid, centers, radius, strict=strict)
        blocks = mask_by_blocks(grid, centers, radius, strict=strict, block=4)
        np.testing.assert_array_equal(lines, expected)
        np.testing.assert_array_equal(blocks, expected)
        np.testing.assert_array_equal(sphere_mask(grid, centers, radius, strict=strict), expected)


def test_line_work_is_bounded_by_the_grid_on_non_periodic_axes():
    """The lines visited per centre stop growing once the sphere is wider than the grid (the
    clip), while on a periodic axis every image's lines count; and past the budget the
    dispatcher takes the block method."""
    box = _grid("box")
    assert line_cost(box, 1, 100.0) == box.shape[0] * box.shape[1]
    assert line_cost(box, 1, 1000.0) == line_cost(box, 1, 100.0)
    periodic = _grid("periodic")
    assert line_cost(periodic, 1, 100.0) > periodic.shape[0] * periodic.shape[1]
    centers = np.zeros((5000, 3))
    big = union_mask(box, centers, 100.0)
    assert big.all()  # every point of the box is within 100 Å of the origin
