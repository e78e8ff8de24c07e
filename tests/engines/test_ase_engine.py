"""The ASE engine: any calculator by import path, its potential from a method or a file."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.calculators.emt import EMT

from ionwell.config.campaign import RelaxConfig
from ionwell.config.engines import AseEngineConfig, PotentialSpec
from ionwell.engines.ase_engine import AseEngine
from ionwell.engines.base import ComputeContext
from ionwell.engines.relax import TRAJECTORY
from ionwell.engines.results import POTENTIAL
from ionwell.engines.tblite_engine import multipole_potential, smearing_widths
from ionwell.errors import ConfigError, EngineOutputError
from ionwell.io.maps import write_potential_npy
from ionwell.science.grid import Grid

NO_RELAX = RelaxConfig(enabled=False)
HERE = __name__  # import path of this module, for the test doubles below

#: Map written by the file-writing test double, in hartree/e (tests the unit conversion).
MAP_FILE = "emt_potential.npy"


class EMTWritingPotential(EMT):
    """Test double: ASE's EMT that also writes a potential map file into its directory.

    The map (a Coulomb-like bump per atom, written in hartree/e with a JSON sidecar) only
    exercises the engine's file route; it is not physics.
    """

    def calculate(self, atoms=None, properties=("energy",), system_changes=()):
        super().calculate(atoms, properties, system_changes)
        from pathlib import Path

        grid = bump_grid(self.atoms)
        write_potential_npy(Path(self.directory) / MAP_FILE, grid, unit="hartree")


class TbliteWithPotential:
    """Test double: wraps tblite's ASE calculator and adds ``get_electrostatic_potential()``.

    Returns, ASE/GPAW style, an array in eV (potential energy of an electron) on the grid of
    the atoms' cell, built from tblite's charges (point-charge model of the tblite engine).
    """

    def __new__(cls, **kwargs):
        from tblite.ase import TBLite

        class _Calc(TBLite):
            potential_model = "test double: point charges (approximate)"

            def get_electrostatic_potential(self):
                a = self.atoms
                shape = (12, 12, 12)
                frac = np.indices(shape).reshape(3, -1).T / np.array(shape)
                pts = frac @ a.cell.array
                v = multipole_potential(
                    a.positions, self.results["charges"], None, smearing_widths(a.numbers), pts
                )
                return -v.reshape(shape)  # electron convention, eV

        return _Calc(**kwargs)


class EMTReturningGrid(EMT):
    """Test double: EMT whose ``get_electrostatic_potential()`` returns an ionwell Grid."""

    def get_electrostatic_potential(self):
        return bump_grid(self.atoms)


class StrictEMT(EMT):
    """Test double: EMT that accepts only its own keyword, so a misspelt one fails."""

    def __init__(self, asap_cutoff: bool = False) -> None:
        super().__init__(asap_cutoff=asap_cutoff)


class FakeLoggingEMT(EMTReturningGrid):
    """Test double: EMT (with a potential map) and a text log named by a ``txt`` keyword,
    standard output by default, as GPAW's calculator class has. One line per calculation."""

    def __init__(self, txt: str = "-", **kwargs) -> None:
        super().__init__(**kwargs)
        self.txt = txt

    def calculate(self, atoms=None, properties=("energy",), system_changes=()):
        super().calculate(atoms, properties, system_changes)
        line = f"fake log: energy {self.results['energy']:.6f} eV\n"
        if self.txt == "-":
            print(line, end="")
        else:
            with open(self.txt, "a") as f:
                f.write(line)


def fake_factory_logging(*args, **kwargs):
    """Test double: a factory *function* with an opaque signature returning FakeLoggingEMT,
    the way ``gpaw.GPAW`` (a function in GPAW 22.8) returns ``gpaw.calculator.GPAW``."""
    return FakeLoggingEMT(*args, **kwargs)


def fake_factory_file_potential(**kwargs):
    """Test double: a factory function returning EMTWritingPotential (no ``txt`` keyword)."""
    return EMTWritingPotential(**kwargs)


def fake_factory_not_a_calculator(**kwargs):
    """Test double: a factory function that returns something that is not a calculator."""
    return {"energy": 0.0}


def bump_grid(atoms: Atoms) -> Grid:
    """A smooth positive map (volts) around ``atoms``, for the test doubles."""
    origin = atoms.positions.min(axis=0) - 2.0
    shape = (10, 11, 12)
    axes = np.eye(3) * 0.7
    pts = origin + np.indices(shape).reshape(3, -1).T * 0.7
    d = np.linalg.norm(pts[:, None, :] - atoms.positions[None], axis=2)
    values = (1.0 / np.sqrt(d**2 + 0.25)).sum(axis=1).reshape(shape)
    return Grid(origin=origin, axes=axes, values=values, pbc=(False, False, False))


def _cluster() -> Atoms:
    """A small Cu/Al cluster (5 atoms), slightly off any symmetric geometry."""
    a = Atoms(
        "Cu3Al2",
        positions=[
            [0.0, 0.0, 0.0],
            [2.5, 0.1, 0.0],
            [1.2, 2.2, 0.1],
            [1.3, 0.8, 2.1],
            [1.1, 0.9, -2.0],
        ],
    )
    return a


def _run(atoms, workdir, cfg, relax=NO_RELAX, **ctx):
    eng = AseEngine(cfg, relax)
    eng.prepare(atoms, workdir, ComputeContext(step=ctx.pop("step", 0), **ctx))
    assert not eng.external
    eng.run(workdir)
    return eng.collect(workdir)


FILE_CFG = AseEngineConfig(
    calculator=f"{HERE}.EMTWritingPotential",
    potential=PotentialSpec(file="*.npy", format="npy", unit="hartree"),
)


def test_emt_energy_forces_equal_emt_and_file_potential(tmp_path):
    atoms = _cluster()
    result, grid = _run(atoms, tmp_path, FILE_CFG)
    ref = atoms.copy()
    ref.calc = EMT()  # reference implementation: ASE's EMT itself
    assert result.energy == pytest.approx(ref.get_potential_energy(), abs=1e-12)
    assert result.free_energy is None  # EMT has no smearing: its free energy is its energy
    np.testing.assert_allclose(np.array(result.forces), ref.get_forces(), atol=1e-12)
    assert result.code == f"ase:{HERE}.EMTWritingPotential"
    assert result.scf_converged is True
    assert result.guess == "cold: the calculator's own initial guess"
    # the file (hartree/e) came back in volts, same grid
    expected = bump_grid(atoms)
    np.testing.assert_allclose(grid.values, expected.values, rtol=1e-6)
    np.testing.assert_allclose(grid.origin, expected.origin)
    assert result.potential_model == "exact"
    assert (tmp_path / MAP_FILE).is_file() and (tmp_path / POTENTIAL).is_file()


def test_prepare_removes_a_stale_potential_file(tmp_path):
    (tmp_path / "old.npy").write_text("stale")
    AseEngine(FILE_CFG, NO_RELAX).prepare(_cluster(), tmp_path, ComputeContext(step=0))
    assert not (tmp_path / "old.npy").exists()


def test_relaxation_through_relax_module(tmp_path):
    atoms = _cluster()
    relax = RelaxConfig(fmax=0.05, steps=100)
    ref = atoms.copy()
    ref.calc = EMT()
    e_start = ref.get_potential_energy()
    result, _ = _run(atoms, tmp_path, FILE_CFG, relax=relax, movable=(3, 4))
    assert result.relax_converged is True
    assert result.energy < e_start
    final = np.array(result.positions)
    np.testing.assert_allclose(final[:3], atoms.positions[:3], atol=1e-12)
    assert np.linalg.norm(np.array(result.forces)[3:], axis=1).max() < 0.05
    assert (tmp_path / TRAJECTORY).is_file()
    # energy and the map belong to the relaxed structure (EMT as reference)
    ref.positions = final
    assert result.energy == pytest.approx(ref.get_potential_energy(), abs=1e-12)


def test_potential_from_calculator_method_array(tmp_path):
    pytest.importorskip("tblite.ase")
    atoms = molecule("H2O")
    atoms.cell = [6.0, 6.0, 6.0]
    atoms.center()
    cfg = AseEngineConfig(
        calculator=f"{HERE}.TbliteWithPotential",
        parameters={"method": "GFN2-xTB", "verbosity": 0},
        charge_keyword="charge",
    )
    result, grid = _run(atoms, tmp_path, cfg)
    assert result.potential_model == "test double: point charges (approximate)"
    assert result.charges is not None and sum(result.charges) == pytest.approx(0.0, abs=1e-6)
    np.testing.assert_allclose(result.cell, np.diag([6.0, 6.0, 6.0]))
    # the cell grid: point (i, j, k) at (i/12, j/12, k/12) of the cell; electron → potential
    assert grid.shape == (12, 12, 12)
    np.testing.assert_allclose(grid.axes, np.eye(3) * 0.5)
    pts = grid.points().reshape(-1, 3)
    expected = multipole_potential(
        atoms.positions, result.charges, None, smearing_widths(atoms.numbers), pts
    )
    np.testing.assert_allclose(grid.values.reshape(-1), expected, rtol=1e-5, atol=1e-5)


def test_potential_from_calculator_method_grid(tmp_path):
    cfg = AseEngineConfig(calculator=f"{HERE}.EMTReturningGrid")
    atoms = _cluster()
    _, grid = _run(atoms, tmp_path, cfg)
    np.testing.assert_allclose(grid.values, bump_grid(atoms).values, rtol=1e-6)


def test_charge_keyword_passes_the_step_charge(tmp_path):
    pytest.importorskip("tblite.ase")
    atoms = molecule("H2O")
    atoms.cell = [6.0, 6.0, 6.0]
    atoms.center()
    cfg = AseEngineConfig(
        calculator=f"{HERE}.TbliteWithPotential",
        parameters={"method": "GFN2-xTB", "verbosity": 0, "multiplicity": 2},
        charge_keyword="charge",
    )
    result, _ = _run(atoms, tmp_path, cfg, charge=1)
    assert result.charge == 1 and result.spin == 1
    assert sum(result.charges) == pytest.approx(1.0, abs=1e-6)


@pytest.mark.parametrize(
    "path", ["no_such_package.calculators.Calc", "ase.calculators.emt.NoSuchCalculator"]
)
def test_missing_calculator_names_engine_calculator(tmp_path, path):
    eng = AseEngine(AseEngineConfig(calculator=path), NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(ConfigError) as info:
        eng.run(tmp_path)
    message = str(info.value)
    assert message.startswith("engine.calculator:")
    assert path in message
    assert "\n" not in message


def test_bad_parameters_name_engine_parameters(tmp_path):
    cfg = AseEngineConfig(calculator=f"{HERE}.StrictEMT", parameters={"bogus": 1})
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(ConfigError, match=r"engine\.parameters: .*StrictEMT.*\['bogus'\]"):
        eng.run(tmp_path)


def test_no_potential_is_a_clear_error(tmp_path):
    eng = AseEngine(AseEngineConfig(calculator="ase.calculators.emt.EMT"), NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(ConfigError, match="offers no potential.*engine.potential"):
        eng.run(tmp_path)


def test_configured_file_missing_is_a_clear_error(tmp_path):
    cfg = AseEngineConfig(
        calculator="ase.calculators.emt.EMT", potential=PotentialSpec(file="pot.cube")
    )
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(EngineOutputError, match=r"pot\.cube: missing \(engine\.potential\.file"):
        eng.run(tmp_path)


# ---------------------------------------------------------------------------------------------
# factories (a function returning a calculator) and the calculator's text log


def test_factory_function_is_accepted_and_builds_without_unknown_keywords(tmp_path):
    cfg = FILE_CFG.model_copy(update={"calculator": f"{HERE}.fake_factory_file_potential"})
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    calc = eng.make_calculator(ComputeContext(step=0), tmp_path)
    # EMT names no txt keyword: built again without it, so nothing unknown is stored
    assert isinstance(calc, EMTWritingPotential) and "txt" not in calc.parameters
    assert calc.directory == str(tmp_path.resolve())
    result, grid = _run(_cluster(), tmp_path, cfg)
    ref = _cluster()
    ref.calc = EMT()  # reference implementation: ASE's EMT itself
    assert result.energy == pytest.approx(ref.get_potential_energy(), abs=1e-12)
    np.testing.assert_allclose(grid.values, bump_grid(_cluster()).values, rtol=1e-6)


@pytest.mark.parametrize("path", [f"{HERE}.fake_factory_logging", f"{HERE}.FakeLoggingEMT"])
def test_calculator_text_log_lands_in_the_engine_folder(tmp_path, monkeypatch, capsys, path):
    cwd = tmp_path / "elsewhere"
    cwd.mkdir()
    monkeypatch.chdir(cwd)
    work = tmp_path / "engine"
    result, _ = _run(_cluster(), work, AseEngineConfig(calculator=path))
    log_file = work / "calculator.txt"
    assert log_file.read_text() == f"fake log: energy {result.energy:.6f} eV\n"
    assert "fake log" not in capsys.readouterr().out  # not on standard output
    assert list(cwd.iterdir()) == []  # nothing in the process's working directory
    assert Path.cwd() == cwd  # and the working directory was never changed
    # a new attempt of the step starts a new log
    AseEngine(AseEngineConfig(calculator=path), NO_RELAX).prepare(
        _cluster(), work, ComputeContext(step=0)
    )
    assert not log_file.exists()


def test_a_txt_given_in_the_parameters_wins(tmp_path):
    mine = tmp_path / "mine.log"
    cfg = AseEngineConfig(calculator=f"{HERE}.fake_factory_logging", parameters={"txt": str(mine)})
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path / "engine", ComputeContext(step=0))
    calc = eng.make_calculator(ComputeContext(step=0), tmp_path / "engine")
    assert calc.txt == str(mine)


def test_a_factory_returning_no_calculator_is_a_clear_error(tmp_path):
    cfg = AseEngineConfig(calculator=f"{HERE}.fake_factory_not_a_calculator")
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(ConfigError) as info:
        eng.run(tmp_path)
    message = str(info.value)
    assert message.startswith("engine.calculator:") and "fake_factory_not_a_calculator" in message
    assert "returned dict, not an ASE calculator" in message and "\n" not in message


def test_a_name_that_cannot_be_called_is_a_clear_error(tmp_path):
    cfg = AseEngineConfig(calculator=f"{HERE}.MAP_FILE")
    eng = AseEngine(cfg, NO_RELAX)
    eng.prepare(_cluster(), tmp_path, ComputeContext(step=0))
    with pytest.raises(ConfigError, match=r"engine\.calculator: .*MAP_FILE.* is a str, not a "):
        eng.run(tmp_path)


class FakeConvergenceError(RuntimeError):
    """Test double: what a calculator raises when its SCF does not converge (GPAW raises a
    KohnShamConvergenceError; GPAW cannot be imported into this environment)."""


class FakeStubbornSCF(EMTReturningGrid):
    """Test double: EMT that 'fails to converge' unless given enough iterations (maxiter)."""

    def __init__(self, maxiter: int = 10) -> None:
        super().__init__()
        self.maxiter = maxiter

    def calculate(self, *args, **kwargs):
        if self.maxiter < 100:
            raise FakeConvergenceError(f"did not converge in {self.maxiter} iterations")
        super().calculate(*args, **kwargs)


def test_a_calculator_that_raises_on_its_scf_is_retried_with_its_remedies(tmp_path):
    # the ase engine's scf_remedies change calculator keywords; a convergence error is an
    # unconverged SCF (retried at the same structure), not a broken calculator
    from ionwell.config.campaign import parse_campaign
    from ionwell.engines.launcher import ScfNotConverged
    from ionwell.engines.run import run_engine

    data = {
        "name": "remedy",
        "host": {"builder": {"kind": "flake", "layers": 1, "shells": 1}},
        "engine": {
            "kind": "ase",
            "calculator": f"{HERE}.FakeStubbornSCF",
            "parameters": {"maxiter": 10},
            "scf_remedies": [{"name": "maxiter 300", "parameters": {"maxiter": 300}}],
        },
        "relax": {"enabled": False},
    }
    ctx = ComputeContext(step=0, charge=0, potential=True)
    out = run_engine(parse_campaign(data), molecule("H2"), tmp_path / "a", ctx)
    assert out.result.scf_converged
    assert out.remedies == ["SCF retry with maxiter 300: converged"]
    # without a remedy that helps, the step fails naming the SCF, not the calculator
    data["engine"]["scf_remedies"] = [{"name": "maxiter 50", "parameters": {"maxiter": 50}}]
    with pytest.raises(ScfNotConverged, match="did not converge with any remedy") as info:
        run_engine(parse_campaign(data), molecule("H2"), tmp_path / "b", ctx)
    # after the last remedy the step job fails for good: Snakemake would only repeat it
    from ionwell.errors import describe_exception, error_kind

    assert error_kind(info.value) == "scf"
    assert "SCF retry with maxiter 50: not converged" in describe_exception(info.value)
