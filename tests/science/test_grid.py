"""Tests of ionwell.science.grid: sign convention, interpolation, geometry, spheres."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule

from ionwell.errors import GridError
from ionwell.science.grid import (
    Grid,
    detect_sign,
    fractional_index,
    interpolate,
    orient,
    points_within,
    sphere_mask,
)


def _water_in_box(size: float = 6.0) -> Atoms:
    atoms = molecule("H2O")
    atoms.cell = [size, size, size]
    atoms.center()
    return atoms


# ---------------------------------------------------------------------------------------------
# sign convention


def _coulomb_grid(atoms, spacing=0.25, size=6.0):
    """Point-nucleus Coulomb field Σ Z/|r-R| (V·Å units irrelevant), capped near the nuclei."""
    n = int(round(size / spacing))
    grid = Grid(np.zeros(3), np.eye(3) * spacing, np.zeros((n, n, n)))
    pts = grid.points()
    v = np.zeros(len(pts))
    for z, p in zip(atoms.numbers, atoms.positions, strict=True):
        v += 14.4 * z / np.maximum(np.linalg.norm(pts - p, axis=1), 0.1)
    return Grid(grid.origin, grid.axes, v.reshape(grid.shape))


def test_detect_sign_potential_and_electron():
    atoms = _water_in_box()
    grid = _coulomb_grid(atoms)
    assert detect_sign(grid, atoms) == "potential"
    flipped = Grid(grid.origin, grid.axes, -grid.values)
    assert detect_sign(flipped, atoms) == "electron"
    np.testing.assert_array_equal(orient(flipped, atoms, "auto").values, grid.values)
    assert orient(grid, atoms, "auto") is grid
    np.testing.assert_array_equal(orient(grid, atoms, "electron").values, -grid.values)


def test_detect_sign_refuses_when_it_cannot_tell():
    atoms = _water_in_box()
    flat = Grid(np.zeros(3), np.eye(3) * 0.25, np.full((24, 24, 24), 1.5))
    with pytest.raises(GridError, match=r"flat.*--sign potential\|electron"):
        detect_sign(flat, atoms)
    far = atoms.copy()
    far.translate([50.0, 0.0, 0.0])
    grid = _coulomb_grid(atoms)
    with pytest.raises(GridError, match=r"no grid point lies within.*--sign"):
        detect_sign(grid, far)
    noise = Grid(grid.origin, grid.axes, np.random.default_rng(0).normal(size=grid.shape))
    with pytest.raises(GridError, match=r"do not stand out|mixed evidence"):
        detect_sign(noise, atoms)
    with pytest.raises(GridError, match=r"unknown sign convention"):
        orient(grid, atoms, "upside-down")


# ---------------------------------------------------------------------------------------------
# interpolation and geometry


def _skewed_grid(values, pbc=(False, False, False)):
    axes = np.array([[0.3, 0.0, 0.0], [0.1, 0.25, 0.0], [0.05, -0.04, 0.2]])
    return Grid(np.array([-1.0, 0.5, 2.0]), axes, values, pbc)


def test_fractional_index_inverts_points():
    grid = _skewed_grid(np.zeros((4, 5, 6)))
    idx = np.array([[0.5, 1.25, 3.0], [3.0, 4.0, 5.0]])
    np.testing.assert_allclose(fractional_index(grid, grid.points(idx)), idx, atol=1e-12)


def test_interpolate_reproduces_linear_fields_on_skewed_axes():
    grid0 = _skewed_grid(np.zeros((6, 7, 8)))
    pts = grid0.points().reshape(6, 7, 8, 3)
    coef = np.array([0.7, -1.3, 2.1])
    grid = _skewed_grid(pts @ coef + 0.4)
    rng = np.random.default_rng(2)
    frac = rng.uniform(0, 1, size=(50, 3)) * (np.array(grid.shape) - 1)
    where = grid.points(frac)
    np.testing.assert_allclose(interpolate(grid, where), where @ coef + 0.4, atol=1e-12)
    # grid points themselves, including the last one on every axis
    np.testing.assert_allclose(interpolate(grid, pts[-1, -1, -1]), grid.values[-1, -1, -1])
    assert np.isnan(interpolate(grid, grid.points(np.array([-0.5, 1.0, 1.0]))))


def test_interpolate_wraps_periodic_axes():
    n = 10
    k = np.arange(n)
    values = np.broadcast_to(np.cos(2 * np.pi * k / n)[:, None, None], (n, 3, 3)).copy()
    grid = Grid(np.zeros(3), np.eye(3) * 0.5, values, (True, False, False))
    # between the last point (index 9) and the first image (index 10 ≡ 0)
    got = interpolate(grid, grid.points(np.array([9.5, 1.0, 1.0])))
    assert got == pytest.approx(0.5 * (values[9, 1, 1] + values[0, 1, 1]))
    assert interpolate(grid, grid.points(np.array([-0.5, 1.0, 1.0]))) == pytest.approx(got)


def _brute_within(grid, centers, radius, strict):
    """Distances to every periodic image within two cells (small test grids only)."""
    pts = grid.points()
    shifts = [range(-2, 3) if p else [0] for p in grid.pbc]
    best = np.full(len(pts), np.inf)
    for n in itertools.product(*shifts):
        image = np.asarray(n) @ grid.cell
        for c in centers:
            best = np.minimum(best, np.linalg.norm(pts - (c + image), axis=1))
    inside = best < radius if strict else best <= radius
    return inside.reshape(grid.shape)


@pytest.mark.parametrize("pbc", [(False, False, False), (True, True, True), (True, False, True)])
@pytest.mark.parametrize("strict", [False, True])
def test_sphere_mask_and_points_within_match_brute_force(pbc, strict):
    grid = _skewed_grid(np.zeros((9, 8, 11)), pbc)
    rng = np.random.default_rng(7)
    centers = grid.origin + rng.uniform(-0.2, 1.2, size=(5, 3)) @ grid.cell
    radius = 0.55
    expected = _brute_within(grid, centers, radius, strict)
    assert expected.any() and not expected.all()
    np.testing.assert_array_equal(sphere_mask(grid, centers, radius, strict=strict), expected)
    hits = np.zeros(grid.values.size, dtype=bool)
    for _, flat in points_within(grid, centers, radius, strict=strict, max_pairs=50):
        hits[flat] = True
    np.testing.assert_array_equal(hits.reshape(grid.shape), expected)


def test_sphere_larger_than_periodic_cell_covers_everything():
    grid = Grid(np.zeros(3), np.eye(3) * 0.5, np.zeros((4, 4, 4)), (True, True, True))
    assert sphere_mask(grid, np.array([[0.3, 0.2, 0.1]]), 5.0).all()
