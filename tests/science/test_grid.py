"""Tests of ionwell.science.grid: cube reading/writing, npz storage, digests, sign, interpolation, spheres."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.io.cube import read_cube_data
from ase.io.cube import write_cube as ase_write_cube
from ase.units import Bohr, Hartree

from ionwell.errors import GridError
from ionwell.science.grid import (
    Grid,
    detect_sign,
    fractional_index,
    grid_digest,
    interpolate,
    load_npz,
    orient,
    points_within,
    read_cube,
    save_npz,
    sphere_mask,
    write_cube,
)


def _water_in_box(size: float = 6.0) -> Atoms:
    atoms = molecule("H2O")
    atoms.cell = [size, size, size]
    atoms.center()
    return atoms


def _field(shape, seed=0):
    """An analytic smooth part plus noise, with positive and negative values."""
    rng = np.random.default_rng(seed)
    i, j, k = np.indices(shape)
    return np.sin(0.4 * i) * np.cos(0.3 * j) + 0.05 * k - 0.2 + 1e-3 * rng.normal(size=shape)


def _ase_cube(path, atoms, data):
    with open(path, "w") as f:
        ase_write_cube(f, atoms, data)


def _gaussian_style_cube(path, atoms, data, natoms_line=None, extra_header="", fmt="%13.5E"):
    """A cube laid out as Gaussian/PySCF write it: six values per line, one z-run per block."""
    n0, n1, n2 = data.shape
    lines = ["title", "comment"]
    count = len(atoms) if natoms_line is None else natoms_line
    lines.append(f"{count:5d}{0.0:12.6f}{0.0:12.6f}{0.0:12.6f}")
    for ax in range(3):
        v = atoms.cell[ax] / data.shape[ax] / Bohr
        lines.append(f"{data.shape[ax]:5d}{v[0]:12.6f}{v[1]:12.6f}{v[2]:12.6f}")
    for z, p in zip(atoms.numbers, atoms.positions / Bohr, strict=True):
        lines.append(f"{z:5d}{float(z):12.6f}{p[0]:12.6f}{p[1]:12.6f}{p[2]:12.6f}")
    if extra_header:
        lines.append(extra_header)
    body = []
    for run in data.reshape(-1, n2):
        for s in range(0, n2, 6):
            body.append("".join(fmt % x for x in run[s : s + 6]))
    path.write_text("\n".join(lines + body) + "\n")


# ---------------------------------------------------------------------------------------------
# reading cubes: checked against ASE's reader (ase.io.cube.read_cube_data) and ase.units


@pytest.mark.parametrize("writer", ["ase", "gaussian"])
def test_read_cube_matches_ase_reader(tmp_path, writer):
    atoms = _water_in_box()
    data = _field((12, 10, 14))
    path = tmp_path / "field.cube"
    if writer == "ase":
        _ase_cube(path, atoms, data)
    else:
        _gaussian_style_cube(path, atoms, data)
    grid, got = read_cube(path)
    ref, ref_atoms = read_cube_data(str(path))  # source: ASE's cube reader
    # values are hartree/e in the file; volts = hartree/e × ase.units.Hartree (CODATA via ASE)
    np.testing.assert_array_equal(grid.values, ref * Hartree)
    np.testing.assert_array_equal(got.numbers, ref_atoms.numbers)
    np.testing.assert_allclose(got.positions, ref_atoms.positions, rtol=0, atol=1e-12)
    np.testing.assert_allclose(grid.cell, ref_atoms.cell[:], rtol=0, atol=1e-12)
    np.testing.assert_allclose(grid.cell, atoms.cell[:], atol=1e-5)
    assert grid.pbc == (False, False, False)
    assert not got.pbc.any()
    np.testing.assert_allclose(grid.origin, 0.0)


def test_read_cube_mixed_formats_use_the_general_parser(tmp_path):
    """Numbers of varying layout (no shared E format) still parse; compared with ASE."""
    atoms = _water_in_box()
    data = _field((5, 4, 7), seed=3)
    path = tmp_path / "mixed.cube"
    _gaussian_style_cube(path, atoms, data, fmt=" %.10g")
    grid, _ = read_cube(path)
    ref, _ = read_cube_data(str(path))  # source: ASE's cube reader
    np.testing.assert_array_equal(grid.values, ref * Hartree)


def test_read_cube_fortran_d_exponents(tmp_path):
    atoms = _water_in_box()
    data = _field((3, 3, 4), seed=4)
    path = tmp_path / "d.cube"
    _gaussian_style_cube(path, atoms, data)
    text = path.read_text().split("\n")
    head, body = text[:9], "\n".join(text[9:]).replace("E", "D")
    path.write_text("\n".join(head) + "\n" + body)
    grid, _ = read_cube(path)
    np.testing.assert_allclose(
        grid.values,
        np.float64([float(f"{x:.5E}") for x in data.ravel()]).reshape(data.shape) * Hartree,
    )


def test_read_cube_large_exponents_exact(tmp_path):
    atoms = _water_in_box()
    data = np.array([1.5e-30, -2.25e-25, 3.0e25, 0.0, -0.0, 1.0, 7.5e-3, 1e-300]).reshape(2, 2, 2)
    path = tmp_path / "exp.cube"
    _gaussian_style_cube(path, atoms, data, fmt=" %.6E")
    grid, _ = read_cube(path)
    expected = np.array([float(f"{x:.6E}") for x in data.ravel()]).reshape(data.shape)
    np.testing.assert_array_equal(grid.values, expected * Hartree)


def test_orbital_cube_negative_atom_count(tmp_path):
    """Negative atom count: one more header record (orbital count and numbers)."""
    atoms = _water_in_box()
    data = _field((4, 5, 6), seed=1)
    path = tmp_path / "orbital.cube"
    _gaussian_style_cube(path, atoms, data, natoms_line=-len(atoms), extra_header="    1    5")
    grid, got = read_cube(path)
    ref, ref_atoms = read_cube_data(str(path))  # source: ASE's cube reader (handles the record)
    np.testing.assert_array_equal(grid.values, ref * Hartree)
    np.testing.assert_array_equal(got.numbers, ref_atoms.numbers)


def test_orbital_cube_with_several_orbitals_is_refused(tmp_path):
    atoms = _water_in_box()
    data = _field((2, 2, 6), seed=1)
    path = tmp_path / "orbitals.cube"
    _gaussian_style_cube(path, atoms, data, natoms_line=-len(atoms), extra_header="    2    5    6")
    with pytest.raises(GridError, match=r"orbitals\.cube.*2 values per grid point"):
        read_cube(path)


def test_negative_point_count_means_angstrom_axes(tmp_path):
    atoms = _water_in_box()
    data = _field((3, 4, 5), seed=2)
    path = tmp_path / "ang.cube"
    _gaussian_style_cube(path, atoms, data)
    lines = path.read_text().split("\n")
    lines[3] = f"{-3:5d}{0.25:12.6f}{0.0:12.6f}{0.0:12.6f}"  # first axis in Å
    path.write_text("\n".join(lines))
    grid, _ = read_cube(path)
    np.testing.assert_allclose(grid.axes[0], [0.25, 0.0, 0.0])
    np.testing.assert_allclose(grid.axes[1], atoms.cell[1] / 4, atol=1e-5)


def test_write_cube_round_trip_and_ase_reads_it(tmp_path):
    atoms = _water_in_box()
    values = (_field((6, 5, 7)) * 3.0).astype(np.float32)
    grid = Grid(origin=np.array([0.1, -0.2, 0.3]), axes=np.diag([0.3, 0.25, 0.2]), values=values)
    path = tmp_path / "out.cube"
    write_cube(path, grid, atoms)
    back, got = read_cube(path)
    np.testing.assert_array_equal(back.values.astype(np.float32), values)  # 9 digits: exact
    np.testing.assert_allclose(back.origin, grid.origin, atol=1e-7)
    np.testing.assert_allclose(back.axes, grid.axes, atol=1e-7)
    np.testing.assert_allclose(got.positions, atoms.positions, atol=1e-7)
    ref, _ = read_cube_data(str(path))  # source: ASE's cube reader
    np.testing.assert_allclose(ref * Hartree, values, rtol=1e-7)


# ---------------------------------------------------------------------------------------------
# malformed cubes: one GridError naming the file and what was expected


def _good_cube(tmp_path, name="bad.cube"):
    path = tmp_path / name
    _gaussian_style_cube(path, _water_in_box(), _field((4, 4, 6), seed=5))
    return path


def test_missing_file(tmp_path):
    path = tmp_path / "nothere.cube"
    with pytest.raises(GridError, match=r"nothere\.cube: cannot read"):
        read_cube(path)


def test_truncated_cube(tmp_path):
    path = _good_cube(tmp_path)
    text = path.read_text()
    path.write_text(text[: len(text) * 2 // 3])
    with pytest.raises(GridError, match=r"bad\.cube: expected 4×4×6 = 96 values.*truncated"):
        read_cube(path)


def test_truncated_header(tmp_path):
    path = _good_cube(tmp_path)
    path.write_text("\n".join(path.read_text().split("\n")[:5]))
    with pytest.raises(GridError, match=r"bad\.cube.*axis 3"):
        read_cube(path)


def test_too_many_values(tmp_path):
    path = _good_cube(tmp_path)
    path.write_text(path.read_text() + " 1.00000E+00\n")
    with pytest.raises(GridError, match=r"bad\.cube: expected 4×4×6 = 96 values.*found 97"):
        read_cube(path)


def test_nan_value(tmp_path):
    path = _good_cube(tmp_path)
    lines = path.read_text().split("\n")
    lines[10] = lines[10][:13] + "          NaN" + lines[10][26:]
    path.write_text("\n".join(lines))
    with pytest.raises(GridError, match=r"bad\.cube: value number 8 of 96 is nan"):
        read_cube(path)


def test_non_numeric_value(tmp_path):
    path = _good_cube(tmp_path)
    lines = path.read_text().split("\n")
    lines[9] = "  1.00000E+00  garbage" + lines[9][26:]
    path.write_text("\n".join(lines))
    with pytest.raises(
        GridError, match=r"bad\.cube: value number 2 of 96 .*not a number: 'garbage'"
    ):
        read_cube(path)


def test_non_numeric_header(tmp_path):
    path = _good_cube(tmp_path)
    lines = path.read_text().split("\n")
    lines[2] = "three atoms here"
    path.write_text("\n".join(lines))
    with pytest.raises(GridError, match=r"bad\.cube: line 3: expected the atom count"):
        read_cube(path)


def test_empty_file(tmp_path):
    path = tmp_path / "empty.cube"
    path.write_text("")
    with pytest.raises(GridError, match=r"empty\.cube: file ends in the header"):
        read_cube(path)


# ---------------------------------------------------------------------------------------------
# npz storage and digest


def test_npz_round_trip_exact(tmp_path):
    values = _field((5, 6, 7)).astype(np.float32)
    grid = Grid(
        origin=np.array([1.0, 2.0, 3.0]),
        axes=np.array([[0.2, 0.0, 0.0], [0.1, 0.2, 0.0], [0.0, 0.05, 0.3]]),
        values=values,
        pbc=(True, False, True),
    )
    path = tmp_path / "p.tmp"  # no suffix is added
    save_npz(path, grid)
    assert path.is_file()
    back = load_npz(path)
    assert back.values.dtype == np.float32
    np.testing.assert_array_equal(back.values, values)
    np.testing.assert_array_equal(back.origin, grid.origin)
    np.testing.assert_array_equal(back.axes, grid.axes)
    assert back.pbc == (True, False, True)
    assert grid_digest(back) == grid_digest(grid)
    # float64 values hash as their float32 rounding
    wide = Grid(grid.origin, grid.axes, values.astype(np.float64), grid.pbc)
    assert grid_digest(wide) == grid_digest(grid)


def test_digest_sees_every_change():
    grid = Grid(np.zeros(3), np.eye(3) * 0.2, np.zeros((3, 3, 3), np.float32))
    d0 = grid_digest(grid)
    bumped = grid.values.copy()
    bumped[1, 2, 0] = np.nextafter(np.float32(0), np.float32(1))
    assert grid_digest(Grid(grid.origin, grid.axes, bumped)) != d0
    assert grid_digest(Grid(grid.origin + 1e-9, grid.axes, grid.values)) != d0
    assert grid_digest(Grid(grid.origin, grid.axes, grid.values, (True, False, False))) != d0
    assert len(d0) == 64


def test_load_npz_errors(tmp_path):
    with pytest.raises(GridError, match=r"gone\.npz: cannot read"):
        load_npz(tmp_path / "gone.npz")
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"not a zip file")
    with pytest.raises(GridError, match=r"junk\.npz"):
        load_npz(junk)
    other = tmp_path / "other.npz"
    np.savez(other, a=np.zeros(3))
    with pytest.raises(GridError, match=r"other\.npz: not an ionwell grid file"):
        load_npz(other)


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
