"""Tests of ionwell.io.cube: reading and writing Gaussian cube files, malformed cubes."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.io.cube import read_cube_data
from ase.io.cube import write_cube as ase_write_cube
from ase.units import Bohr, Hartree

from ionwell.errors import GridError
from ionwell.io.cube import read_cube, write_cube
from ionwell.science.grid import Grid


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
