"""Tests of ionwell.io.maps: reading engine potential maps (cube, npy/npz + sidecar, XSF)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.io.cube import read_cube as ase_read_cube
from ase.io.cube import read_cube_data
from ase.io.cube import write_cube as ase_write_cube
from ase.io.xsf import read_xsf, write_xsf
from ase.units import Bohr, Hartree, Rydberg
from scipy.special import erf

from ionwell.config.engines import POTENTIAL_UNITS, PotentialSpec
from ionwell.errors import EngineOutputError
from ionwell.io.cube import write_cube
from ionwell.io.maps import read_potential, sidecar_path, write_potential_npy
from ionwell.science.grid import Grid

N = 20  # grid points per axis in the generated maps


def _spec(name: str, **kw) -> PotentialSpec:
    return PotentialSpec(file=name, **kw)


def _water(size: float = 8.0) -> Atoms:
    atoms = molecule("H2O")
    atoms.cell = [size, size, size]
    atoms.center()
    return atoms


def _field(shape=(N, N - 2, N - 4), seed=0) -> np.ndarray:
    """A smooth analytic part plus noise, of order one, both signs."""
    rng = np.random.default_rng(seed)
    i, j, k = np.indices(shape)
    smooth = np.sin(0.3 * i) * np.cos(0.2 * j) + 0.05 * k
    return smooth + 0.01 * rng.standard_normal(shape)


def _skewed_grid(dtype=np.float64) -> Grid:
    rng = np.random.default_rng(1)
    axes = np.array([[0.31, 0.0, 0.0], [0.07, 0.29, 0.0], [0.02, -0.03, 0.33]])
    return Grid(
        origin=rng.standard_normal(3),
        axes=axes + 1e-3 * rng.standard_normal((3, 3)),
        values=(10.0 * _field((N, N - 3, N - 5))).astype(dtype),
        pbc=(True, False, True),
    )


def _screened_nuclei(atoms: Atoms, origin, axes, shape, width: float = 0.4) -> np.ndarray:
    """Potential (V, positive-charge convention) of neutral atoms: point nuclei of charge Z,
    each screened by a Gaussian electron cloud of charge -Z and standard deviation ``width`` Å.

    Source: common practice (Gaussian-screened point charges); the Coulomb constant
    e²/(4πε₀) = Hartree·Bohr eV·Å from ase.units. Nuclei are large positive maxima.
    """
    k_e = Hartree * Bohr
    pts = origin + np.indices(shape).reshape(3, -1).T @ axes
    v = np.zeros(len(pts))
    for z, pos in zip(atoms.numbers, atoms.positions, strict=True):
        r = np.maximum(np.linalg.norm(pts - pos, axis=1), 1e-3)
        v += k_e * z * (1.0 - erf(r / (np.sqrt(2.0) * width))) / r
    return v.reshape(shape)


def _write_raw_npy(path: Path, values: np.ndarray, **meta) -> None:
    """An array and a hand-written sidecar, as an external program would produce them."""
    np.save(path, values)
    side = {
        "origin": [0.0, 0.0, 0.0],
        "axes": [[0.4, 0.0, 0.0], [0.0, 0.4, 0.0], [0.0, 0.0, 0.4]],
        "shape": list(values.shape),
    }
    side.update(meta)
    sidecar_path(path).write_text(json.dumps(side))


# ---------------------------------------------------------------------------------------------
# cube


def test_cube_agrees_with_ase(tmp_path):
    # reference implementation: ase.io.cube.read_cube / read_cube_data return the stored numbers
    # unconverted (atomic units by the cube convention) and lengths in Å; ionwell returns volts
    atoms = _water()
    data = _field()
    path = tmp_path / "pot.cube"
    with path.open("w") as f:
        ase_write_cube(f, atoms, data=data, origin=(0.3, -0.2, 0.1))
    ref_data, ref_atoms = read_cube_data(str(path))
    with path.open() as f:
        ref = ase_read_cube(f)
    for spec in (
        _spec("pot.cube", unit="hartree"),
        _spec("pot.cube", unit="hartree", format="cube"),
    ):
        grid = read_potential(path, spec)
        np.testing.assert_array_equal(grid.values, ref_data * Hartree)
        np.testing.assert_allclose(grid.origin, ref["origin"], rtol=0, atol=1e-12)
        np.testing.assert_allclose(grid.axes, ref["spacing"], rtol=0, atol=1e-12)
        assert grid.pbc == (False, False, False)
    assert len(ref_atoms) == len(atoms)


def test_cube_in_volts_or_rydberg(tmp_path, caplog):
    # source: ase.io.cube.read_cube_data gives the stored numbers; unit V keeps them (with a
    # warning: cubes conventionally hold atomic units), rydberg scales by ase.units.Rydberg
    path = tmp_path / "pot.cube"
    with path.open("w") as f:
        ase_write_cube(f, _water(), data=_field())
    ref_data, _ = read_cube_data(str(path))
    with caplog.at_level("WARNING", logger="ionwell.io.maps"):
        grid = read_potential(path, _spec("pot.cube", unit="V"))
    np.testing.assert_allclose(grid.values, ref_data, rtol=1e-15, atol=0)
    assert "unit: hartree" in caplog.text
    grid = read_potential(path, _spec("pot.cube", unit="rydberg"))
    np.testing.assert_allclose(grid.values, ref_data * Rydberg, rtol=1e-15, atol=0)


def test_cube_electron_sign_flips(tmp_path):
    # source: definition: the electron convention is the negative of the potential
    path = tmp_path / "pot.cube"
    with path.open("w") as f:
        ase_write_cube(f, _water(), data=_field())
    ref_data, _ = read_cube_data(str(path))
    grid = read_potential(path, _spec("pot.cube", unit="hartree", sign="electron"))
    np.testing.assert_array_equal(grid.values, -(ref_data * Hartree))


# ---------------------------------------------------------------------------------------------
# units


def test_hartree_and_rydberg_to_volt(tmp_path):
    # source: ase.units (CODATA via ASE): one hartree/e is ase.units.Hartree volts
    assert POTENTIAL_UNITS["hartree"] == Hartree
    assert POTENTIAL_UNITS["rydberg"] == Rydberg
    raw = _field()
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, raw, unit="hartree")  # sidecar and config agree
    spec = _spec("pot.npy", unit="hartree")
    np.testing.assert_array_equal(read_potential(path, spec).values, raw * Hartree)
    # the same numbers, the unit given by the config alone
    _write_raw_npy(path, raw)
    spec = _spec("pot.npy", unit="hartree")
    np.testing.assert_array_equal(read_potential(path, spec).values, raw * Hartree)
    spec = _spec("pot.npy", unit="rydberg")
    np.testing.assert_array_equal(read_potential(path, spec).values, raw * Rydberg)
    # no unit anywhere: volts, untouched
    np.testing.assert_array_equal(read_potential(path, _spec("pot.npy")).values, raw)


# ---------------------------------------------------------------------------------------------
# npy / npz round trips


@pytest.mark.parametrize("name", ["pot.npy", "pot.npz"])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_numpy_round_trip_is_exact(tmp_path, name, dtype):
    # source: NumPy .npy/.npz store the array bytes; JSON floats use repr (round-trip exact)
    grid = _skewed_grid(dtype)
    path = tmp_path / name
    write_potential_npy(path, grid)
    assert sidecar_path(path).name == name + ".json"
    back = read_potential(path, _spec(name))
    assert back.values.dtype == dtype
    np.testing.assert_array_equal(back.values, grid.values)
    np.testing.assert_array_equal(back.origin, grid.origin)
    np.testing.assert_array_equal(back.axes, grid.axes)
    assert back.pbc == grid.pbc


def test_numpy_round_trip_in_hartree(tmp_path):
    # source: ase.units.Hartree; dividing then multiplying by it costs at most an ulp or two
    grid = _skewed_grid()
    path = tmp_path / "pot.npz"
    write_potential_npy(path, grid, unit="hartree")
    with np.load(path) as z:
        np.testing.assert_allclose(z["values"], grid.values / Hartree, rtol=1e-15)
    back = read_potential(path, _spec("pot.npz", unit="hartree"))
    np.testing.assert_allclose(back.values, grid.values, rtol=4e-16, atol=0)


def test_npz_single_array_of_any_name(tmp_path):
    # source: the sidecar contract of ionwell.io.maps (values, or the only array)
    raw = _field()
    path = tmp_path / "pot.npz"
    np.savez(path, potential=raw)
    _write_raw_npy(tmp_path / "unused.npy", raw)
    sidecar_path(path).write_text(sidecar_path(tmp_path / "unused.npy").read_text())
    np.testing.assert_array_equal(read_potential(path, _spec("pot.npz")).values, raw)


# ---------------------------------------------------------------------------------------------
# sign


def test_electron_sign_flips_npy(tmp_path):
    # source: definition: the electron convention is the negative of the potential
    raw = _field()
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, raw)
    np.testing.assert_array_equal(
        read_potential(path, _spec("pot.npy", sign="electron")).values, -raw
    )
    _write_raw_npy(path, raw, sign="electron")  # declared by the sidecar as well
    spec = _spec("pot.npy", sign="electron")
    np.testing.assert_array_equal(read_potential(path, spec).values, -raw)
    # an explicit auto defers to the sidecar's declaration (no atoms needed)
    spec = _spec("pot.npy", sign="auto")
    np.testing.assert_array_equal(read_potential(path, spec).values, -raw)


@pytest.mark.parametrize("flip", [1.0, -1.0])
def test_auto_sign_of_screened_nuclei(tmp_path, flip):
    # source: common practice: nuclei are maxima of the potential felt by a positive charge
    atoms = _water()
    origin = np.full(3, 0.2)
    axes = np.eye(3) * 0.4
    expected = _screened_nuclei(atoms, origin, axes, (N, N, N))
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, flip * expected, origin=origin.tolist(), axes=axes.tolist())
    grid = read_potential(path, _spec("pot.npy", sign="auto"), atoms=atoms)
    np.testing.assert_array_equal(grid.values, expected)
    assert grid.values.max() > 10.0  # a nucleus, in volts


def test_auto_sign_uses_the_atoms_of_a_cube(tmp_path):
    # source: common practice (nuclei are maxima); atoms taken from the cube file itself
    atoms = _water()
    origin = np.full(3, 0.2)
    axes = np.eye(3) * 0.4
    expected = _screened_nuclei(atoms, origin, axes, (N, N, N))
    path = tmp_path / "pot.cube"
    write_cube(path, Grid(origin=origin, axes=axes, values=-expected), atoms)
    grid = read_potential(path, _spec("pot.cube", unit="hartree", sign="auto"))
    np.testing.assert_allclose(grid.values, expected, rtol=1e-8, atol=1e-12)


def test_auto_sign_without_atoms_is_an_error(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field())
    with pytest.raises(EngineOutputError, match=r"^step 2: .*pot\.npy: sign: auto needs"):
        read_potential(path, _spec("pot.npy", sign="auto"), step=2)


def test_auto_sign_undecidable_names_file_and_step(tmp_path):
    # a map with no feature at the nuclei: detect_sign's GridError becomes an EngineOutputError
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), axes=(np.eye(3) * 0.4).tolist())
    with pytest.raises(EngineOutputError, match=r"^step 4: .*pot\.npy: cannot tell the sign"):
        read_potential(path, _spec("pot.npy", sign="auto"), atoms=_water(), step=4)


# ---------------------------------------------------------------------------------------------
# XSF


def test_xsf_periodic_grid_drops_the_repeated_end(tmp_path):
    # source: XCrySDen XSF specification (general grids include both ends; a periodic grid
    # repeats its first point at the end); values checked against ase.io.xsf.read_xsf
    atoms = Atoms("NaCl", positions=[[0, 0, 0], [2.8, 2.8, 2.8]], cell=[5.6] * 3, pbc=True)
    n = 12
    periodic = _field((n, n, n))
    general = np.pad(periodic, ((0, 1), (0, 1), (0, 1)), mode="wrap")
    path = tmp_path / "pot.xsf"
    with path.open("w") as f:
        write_xsf(f, [atoms], data=general, origin=np.zeros(3), span_vectors=atoms.cell[:])
    with path.open() as f:
        ref_data, _, _, _ = read_xsf(f, read_data=True)
    grid = read_potential(path, _spec("pot.xsf"))
    assert grid.pbc == (True, True, True)
    assert grid.shape == (n, n, n)
    np.testing.assert_array_equal(grid.values, ref_data[:-1, :-1, :-1])
    np.testing.assert_allclose(grid.values, periodic, atol=5e-7)  # %f: six decimals
    np.testing.assert_allclose(grid.axes, np.eye(3) * 5.6 / n, atol=1e-12)


def test_xsf_molecule_general_grid(tmp_path):
    # source: XCrySDen XSF specification: step = spanning vector / (n - 1), lengths in Å
    atoms = _water()
    atoms.pbc = False
    data = _field((10, 9, 8))
    span = np.diag([4.5, 4.0, 3.5])
    path = tmp_path / "pot.xsf"
    with path.open("w") as f:
        write_xsf(f, [atoms], data=data, origin=np.array([1.0, 2.0, 3.0]), span_vectors=span)
    grid = read_potential(path, _spec("pot.xsf", unit="hartree"))
    assert grid.pbc == (False, False, False)
    np.testing.assert_allclose(grid.axes, np.diag([0.5, 0.5, 0.5]), atol=1e-12)
    np.testing.assert_allclose(grid.origin, [1.0, 2.0, 3.0])
    np.testing.assert_allclose(grid.values, data * Hartree, atol=5e-7 * Hartree)


# ---------------------------------------------------------------------------------------------
# malformed input: one EngineOutputError naming the step and the file


def _cube(tmp_path: Path) -> Path:
    path = tmp_path / "pot.cube"
    grid = Grid(origin=np.zeros(3), axes=np.eye(3) * 0.4, values=_field((N, N, N)))
    write_cube(path, grid, _water())
    return path


def _missing(tmp_path):
    return tmp_path / "pot.cube", {}


def _missing_npy(tmp_path):
    return tmp_path / "pot.npy", {}


def _empty(tmp_path):
    path = tmp_path / "pot.cube"
    path.touch()
    return path, {}


def _empty_npz(tmp_path):
    path = tmp_path / "pot.npz"
    path.touch()
    return path, {}


def _truncated_cube(tmp_path):
    path = _cube(tmp_path)
    lines = path.read_text().splitlines(keepends=True)
    path.write_text("".join(lines[:-7]))
    return path, {}


def _nan_cube(tmp_path):
    path = _cube(tmp_path)
    lines = path.read_text().splitlines(keepends=True)
    lines[-3] = " nan" + lines[-3][16:]  # each value is " % .8E": 16 characters
    path.write_text("".join(lines))
    return path, {}


def _wrong_shape(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), shape=[N, N, N])
    return path, {}


def _nan_npy(tmp_path):
    raw = _field()
    raw[3, 4, 5] = np.nan
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, raw)
    return path, {}


def _inf_npz(tmp_path):
    grid = _skewed_grid()
    grid.values[1, 2, 3] = np.inf
    path = tmp_path / "pot.npz"
    write_potential_npy(path, grid)
    return path, {}


def _no_sidecar(tmp_path):
    path = tmp_path / "pot.npy"
    np.save(path, _field())
    return path, {}


def _sidecar_not_json(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field())
    sidecar_path(path).write_text("{origin: [0, 0, 0]")
    return path, {}


def _sidecar_missing_key(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field())
    side = json.loads(sidecar_path(path).read_text())
    del side["axes"]
    sidecar_path(path).write_text(json.dumps(side))
    return path, {}


def _sidecar_unknown_key(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), orgin=[0, 0, 0])
    return path, {}


def _sidecar_flat_axes(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), axes=[[0.4, 0, 0], [0.8, 0, 0], [0, 0, 0.4]])
    return path, {}


def _sidecar_unit_conflict(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), unit="hartree")
    return path, {"unit": "V"}  # the config says volts, the sidecar hartree


def _npz_ambiguous(tmp_path):
    path = tmp_path / "pot.npz"
    np.savez(path, a=_field(), b=_field())
    _write_raw_npy(tmp_path / "x.npy", _field())
    sidecar_path(path).write_text(sidecar_path(tmp_path / "x.npy").read_text())
    return path, {}


def _not_numpy(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field())
    path.write_bytes(b"this is not an array\n" * 10)
    return path, {}


def _truncated_npy(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field())
    path.write_bytes(path.read_bytes()[:-100])
    return path, {}


def _truncated_npz(tmp_path):
    path = tmp_path / "pot.npz"
    write_potential_npy(path, _skewed_grid())
    path.write_bytes(path.read_bytes()[:-200])
    return path, {}


def _sidecar_sign_conflict(tmp_path):
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, _field(), sign="electron")
    return path, {"sign": "potential"}  # the config and the sidecar disagree


def _xsf_without_grid(tmp_path):
    atoms = Atoms("NaCl", positions=[[0, 0, 0], [2.8, 2.8, 2.8]], cell=[5.6] * 3, pbc=True)
    path = tmp_path / "pot.xsf"
    with path.open("w") as f:
        write_xsf(f, [atoms])
    return path, {}


def _unknown_suffix(tmp_path):
    path = tmp_path / "pot.dat"
    path.write_text("1 2 3\n")
    return path, {}


def _format_ase(tmp_path):
    path = _cube(tmp_path)
    return path, {"format": "ase"}


def _truncated_xsf(tmp_path):
    atoms = Atoms("NaCl", positions=[[0, 0, 0], [2.8, 2.8, 2.8]], cell=[5.6] * 3, pbc=True)
    path = tmp_path / "pot.xsf"
    with path.open("w") as f:
        write_xsf(f, [atoms], data=_field((6, 6, 6)))
    lines = path.read_text().splitlines(keepends=True)
    path.write_text("".join(lines[:-10]))
    return path, {}


MALFORMED = {
    "missing file": (_missing, "does not exist"),
    "missing npy file": (_missing_npy, "does not exist"),
    "empty file": (_empty, "is empty"),
    "empty npz file": (_empty_npz, "is empty"),
    "truncated cube": (_truncated_cube, "truncated"),
    "NaN in cube": (_nan_cube, "finite"),
    "wrong grid size": (_wrong_shape, "expected the same grid size"),
    "NaN in npy": (_nan_npy, "not finite"),
    "inf in npz": (_inf_npz, "not finite"),
    "missing sidecar": (_no_sidecar, "sidecar pot.npy.json describing the grid is missing"),
    "sidecar not JSON": (_sidecar_not_json, "not valid JSON"),
    "sidecar missing key": (_sidecar_missing_key, "axes: Field required"),
    "sidecar unknown key": (_sidecar_unknown_key, "orgin: Extra inputs are not permitted"),
    "sidecar flat axes": (_sidecar_flat_axes, "linearly dependent"),
    "sidecar unit conflict": (_sidecar_unit_conflict, "config gives unit 'V'"),
    "npz without values": (_npz_ambiguous, "expected one named 'values'"),
    "not a numpy file": (_not_numpy, "not a NumPy .npy file or .npz archive"),
    "truncated npy": (_truncated_npy, "the array header declares"),
    "truncated npz": (_truncated_npz, "npz"),
    "sidecar sign conflict": (_sidecar_sign_conflict, "config gives sign 'potential'"),
    "xsf without data grid": (_xsf_without_grid, "XSF"),
    "unknown format": (_unknown_suffix, "cannot tell the format"),
    "format ase": (_format_ase, "not supported"),
    "truncated xsf": (_truncated_xsf, "truncated"),
}


@pytest.mark.parametrize("case", list(MALFORMED))
def test_malformed_input_names_step_and_file(tmp_path, case):
    # source: DEVELOPERS.md conventions (one message naming the step, the file, the expectation)
    make, expected = MALFORMED[case]
    path, kw = make(tmp_path)
    with pytest.raises(EngineOutputError) as info:
        read_potential(path, _spec(path.name, **kw), step=3)
    message = str(info.value)
    assert message.startswith("step 3: "), message
    assert path.name in message, message
    assert expected in message, message
    assert "\n" not in message, message
    assert "Traceback" not in message


def test_no_step_no_prefix(tmp_path):
    path = tmp_path / "pot.cube"
    with pytest.raises(EngineOutputError, match=r"^/.*pot\.cube: the potential map file does"):
        read_potential(path, _spec("pot.cube"))


def test_unit_and_sign_left_to_the_file(tmp_path):
    # source: the module's documented rule for a spec without unit/sign (not yet allowed by
    # PotentialSpec's validation, hence model_construct): sidecar's, else the cube convention
    raw = _field()
    path = tmp_path / "pot.npy"
    _write_raw_npy(path, raw, unit="hartree", sign="electron")
    spec = PotentialSpec.model_construct(file="pot.npy", format="auto", unit=None, sign=None)
    np.testing.assert_array_equal(read_potential(path, spec).values, -(raw * Hartree))
    cube = tmp_path / "pot.cube"
    with cube.open("w") as f:
        ase_write_cube(f, _water(), data=raw)
    ref_data, _ = read_cube_data(str(cube))
    spec = PotentialSpec.model_construct(file="pot.cube", format="auto", unit=None, sign=None)
    np.testing.assert_array_equal(read_potential(cube, spec).values, ref_data * Hartree)


def test_a_map_written_in_a_shifted_frame_is_moved_back(tmp_path):
    # a program that centres the molecule in its box writes the cube in that frame; the map is
    # moved by the one shift that maps the cube's atoms onto ours (values unchanged)
    from ase.build import molecule
    from ase.io.cube import write_cube as ase_write_cube

    ours = molecule("H2O")
    theirs = ours.copy()
    theirs.positions += [5.0, 4.0, 3.0]
    theirs.cell = [6.0, 7.0, 8.0]  # ASE takes the cube steps from the cell
    data = np.random.default_rng(0).normal(size=(6, 7, 8))
    path = tmp_path / "shifted.cube"
    with path.open("w") as f:
        ase_write_cube(f, theirs, data, origin=[1.0, 1.0, 1.0])
    spec = PotentialSpec(file=path.name, unit="hartree", sign="potential")
    plain = read_potential(path, spec)
    moved = read_potential(path, spec, atoms=ours, step=1)
    np.testing.assert_allclose(moved.origin, np.asarray(plain.origin) - [5.0, 4.0, 3.0], atol=1e-6)
    np.testing.assert_array_equal(moved.values, plain.values)
    # atoms moved differently: the map does not belong to the structure
    other = ours.copy()
    other.positions[0] += [0.5, 0, 0]
    with pytest.raises(EngineOutputError, match="step 1: .*not the structure's atoms"):
        read_potential(path, spec, atoms=other, step=1)


def test_a_map_spanning_a_periodic_cell_is_periodic_and_wrapped_atoms_do_not_shift_it(tmp_path):
    # A periodic code writes its cube on n points of step cell/n (the next point would be the
    # next cell's first) and may list the atoms wrapped into its cell. The map then belongs to
    # the periodic structure unshifted: whole lattice vectors are no shift (minimum image,
    # common practice), and the grid is periodic along the axes the structure is.
    from ionwell.config.engines import PotentialSpec
    from ionwell.io.cube import write_cube
    from ionwell.io.maps import read_potential
    from ionwell.science.grid import Grid, periodic_like

    cell = np.diag([4.0, 4.0, 6.0])
    atoms = Atoms("Li", positions=[[4.5, 1.0, 3.0]], cell=cell, pbc=[True, True, False])
    n = (16, 16, 20)
    axes = np.diag([4.0 / 16, 4.0 / 16, 6.0 / 19])  # z spans 6 Å with 20 points, ends repeated
    rng = np.random.default_rng(1)
    values = rng.normal(size=n)
    grid = Grid(np.zeros(3), axes, values)
    wrapped = atoms.copy()
    wrapped.wrap()  # x = 0.5: the file lists the atom one lattice vector down
    write_cube(tmp_path / "p.cube", grid, wrapped)
    got = read_potential(
        tmp_path / "p.cube", PotentialSpec(file="p.cube", unit="hartree"), atoms=atoms
    )
    assert got.pbc == (True, True, False)  # z is not periodic in the structure
    assert got.shape == n  # no plane dropped on x, y (n steps span the cell); z not periodic
    assert np.allclose(got.origin, 0.0, atol=1e-6)  # not moved by the lattice vector
    # z periodic too: (n - 1) steps span the cell, so the repeated end plane is dropped
    bulk = atoms.copy()
    bulk.pbc = True
    again = periodic_like(Grid(np.zeros(3), axes, values), bulk)
    assert again.pbc == (True, True, True) and again.shape == (16, 16, 19)
    # a grid that does not span the cell stays as it was
    small = Grid(np.zeros(3), axes * 0.5, values)
    assert periodic_like(small, bulk).pbc == (False, False, False)
