"""The tblite engine: GFN2-xTB energies, forces, charges, approximate potential, relaxation."""

from __future__ import annotations

import time
from types import SimpleNamespace

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.calculators.fd import calculate_numerical_forces

from ionwell.config.campaign import FlakeBuilder, PotentialGridConfig, RelaxConfig
from ionwell.config.engines import TbliteEngineConfig
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext
from ionwell.engines.relax import RELAX_LOG, TRAJECTORY
from ionwell.engines.results import OUTPUT, POTENTIAL
from ionwell.engines.tblite_engine import (
    COULOMB,
    TBLITE_GUESS,
    TbliteCalculator,
    TbliteEngine,
    _Xtb,
    multipole_potential,
    smearing_widths,
)
from ionwell.errors import ConfigError, EngineOutputError
from ionwell.science.host import build_flake

tblite_ase = pytest.importorskip("tblite.ase")

FAST = TbliteEngineConfig(potential_grid=PotentialGridConfig(spacing=0.4, margin=3.0))
NO_RELAX = RelaxConfig(enabled=False)


def _run(atoms, workdir, cfg=FAST, relax=NO_RELAX, **ctx):
    eng = TbliteEngine(cfg, relax)
    eng.prepare(atoms, workdir, ComputeContext(step=ctx.pop("step", 0), **ctx))
    assert not eng.external
    eng.run(workdir)
    return eng.collect(workdir)


def _ammonium() -> Atoms:
    """NH4+ (closed shell, net charge +1): methane's geometry with N in place of C."""
    a = molecule("CH4")
    a.numbers[0] = 7
    return a


def _reference(atoms, charge=0, **kw):
    """Energy (eV) and forces (eV/Å) from tblite's own ASE calculator (reference library)."""
    a = atoms.copy()
    a.calc = tblite_ase.TBLite(method="GFN2-xTB", charge=charge, verbosity=0, **kw)
    return a.get_potential_energy(), a.get_forces(), a.calc.results


@pytest.mark.parametrize("name", ["H2O", "C6H6"])
def test_energy_forces_match_tblite_ase(tmp_path, name):
    # reference implementation: tblite.ase.TBLite, same method and settings
    atoms = molecule(name)
    atoms.rattle(0.05, seed=1)  # off equilibrium: forces are not ~0
    result, _ = _run(atoms, tmp_path)
    e_ref, f_ref, res_ref = _reference(atoms)
    assert result.energy == pytest.approx(e_ref, abs=1e-6)
    np.testing.assert_allclose(np.array(result.forces), f_ref, atol=1e-6)
    np.testing.assert_allclose(result.charges, res_ref["charges"], atol=1e-6)
    assert result.scf_converged
    assert result.code == "tblite"
    assert result.charge_scheme == "mulliken (GFN2-xTB)"
    assert "approximate" in result.potential_model
    assert result.homo < result.lumo
    assert result.homo < result.fermi_level < result.lumo
    for name_ in ("input.extxyz", "context.json", OUTPUT, POTENTIAL, "timings.json"):
        assert (tmp_path / name_).is_file()


def test_forces_are_the_energy_gradient():
    # finite differences of the energy (ASE's calculate_numerical_forces), tight SCC
    atoms = molecule("H2O")
    atoms.rattle(0.08, seed=3)
    cfg = TbliteEngineConfig(accuracy=0.01)
    xtb = _Xtb(atoms, cfg, charge=0, uhf=0)
    atoms.calc = TbliteCalculator(xtb)
    analytic = atoms.get_forces()
    numeric = calculate_numerical_forces(atoms, eps=1e-4)
    assert np.abs(analytic).max() > 0.1
    np.testing.assert_allclose(analytic, numeric, atol=1e-5)


def test_charges_sum_to_total_charge_and_far_field_is_coulomb(tmp_path):
    atoms = _ammonium()
    cfg = TbliteEngineConfig(potential_grid=PotentialGridConfig(spacing=1.0, margin=16.0))
    result, grid = _run(atoms, tmp_path, cfg=cfg, charge=1)
    assert result.charge == 1 and result.spin == 0
    assert sum(result.charges) == pytest.approx(1.0, abs=1e-6)
    # Coulomb's law: k = 14.3996 V·Å/e (CODATA via ase.units: hartree × bohr)
    assert abs(COULOMB - 14.3996) < 1e-4
    centre = atoms.positions.mean(axis=0)
    pts = grid.points().reshape(-1, 3)
    r = np.linalg.norm(pts - centre, axis=1)
    far = r > 12.0
    assert far.sum() > 100
    v = grid.values.reshape(-1)[far]
    np.testing.assert_allclose(v, COULOMB / r[far], rtol=1e-2)
    # and at 50 Å, directly from the model
    probe = centre + 50.0 * np.array([[1.0, 0, 0], [0, 0.6, 0.8], [-0.48, 0.6, -0.64]])
    v_far = multipole_potential(
        atoms.positions, result.charges, None, smearing_widths(atoms.numbers), probe
    )
    np.testing.assert_allclose(v_far, COULOMB / 50.0, rtol=1e-3)


def test_map_dipole_matches_tblite_molecular_dipole(tmp_path):
    # the map's far field (odd part) is that of tblite's molecular dipole: checks that atomic
    # dipoles enter with the right sign and units (reference: tblite.ase.TBLite's "dipole")
    atoms = molecule("H2O")
    _run(atoms, tmp_path)
    xtb = _Xtb(atoms, FAST, charge=0, uhf=0)
    xtb.compute(atoms.positions)
    q = np.asarray(xtb.res.get("charges"))
    mu_at = xtb.atomic_dipoles()
    assert mu_at is not None
    _, _, res_ref = _reference(atoms)
    dipole = res_ref["dipole"]  # e·Å
    centre = atoms.positions.mean(axis=0)
    dirs = np.array([[0, 0, 1.0], [0, 1.0, 0], [0.6, 0, 0.8], [0, 0.8, -0.6]])
    r = 40.0
    widths = smearing_widths(atoms.numbers)
    plus = multipole_potential(atoms.positions, q, mu_at, widths, centre + r * dirs)
    minus = multipole_potential(atoms.positions, q, mu_at, widths, centre - r * dirs)
    expected = COULOMB * (dirs @ dipole) / r**2
    np.testing.assert_allclose((plus - minus) / 2, expected, rtol=1e-2, atol=1e-6)
    # without the atomic dipoles the far field is clearly different (30 % of water's dipole)
    plus_q = multipole_potential(atoms.positions, q, None, widths, centre + r * dirs)
    minus_q = multipole_potential(atoms.positions, q, None, widths, centre - r * dirs)
    assert abs((plus_q - minus_q)[0] / 2 - expected[0]) > 0.1 * abs(expected[0])


def test_map_is_finite_at_nuclei(tmp_path):
    atoms = _ammonium()
    result, grid = _run(atoms, tmp_path, charge=1)
    assert np.isfinite(grid.values).all()
    v = multipole_potential(
        atoms.positions,
        result.charges,
        np.ones((len(atoms), 3)) * 0.1,
        smearing_widths(atoms.numbers),
        atoms.positions + np.array([0, 0, 1e-9]),
    )
    assert np.isfinite(v).all()
    # a Gaussian charge's potential peaks at 2 k q / (√π a) on its nucleus
    a = smearing_widths([7])[0]
    v0 = multipole_potential(np.zeros((1, 3)), [1.0], None, [a], np.zeros((1, 3)))
    assert v0[0] == pytest.approx(2 * COULOMB / (np.sqrt(np.pi) * a), rel=1e-12)


def test_open_shell_and_impossible_spin(tmp_path):
    atoms = molecule("H2O")
    result, _ = _run(atoms, tmp_path / "cation", charge=1)
    assert result.spin == 1
    e_ref, _, _ = _reference(atoms, charge=1, multiplicity=2)
    assert result.energy == pytest.approx(e_ref, abs=1e-6)
    with pytest.raises(ConfigError, match="context.json.*spin 2S=1 is impossible"):
        _run(atoms, tmp_path / "bad", spin=1)


def test_unconverged_scc_is_recorded(tmp_path):
    atoms = molecule("C6H6")
    result, _ = _run(atoms, tmp_path, cfg=TbliteEngineConfig(max_cycle=2))
    assert result.scf_converged is False
    assert np.isfinite(result.energy)


def test_relax_li_above_benzene_guest_only(tmp_path):
    host = molecule("C6H6")
    li = Atoms("Li", positions=[host.positions.mean(axis=0) + [0.3, 0.2, 2.6]])
    atoms = host + li
    e_start, _, _ = _reference(atoms, charge=1)
    relax = RelaxConfig(fmax=0.05, steps=60)
    result, grid = _run(atoms, tmp_path, relax=relax, charge=1, movable=(12,))
    assert result.relax_converged is True
    assert 0 < result.relax_steps <= 60
    assert result.energy < e_start - 1e-3
    final = np.array(result.positions)
    np.testing.assert_allclose(final[:12], host.positions, atol=1e-12)  # host fixed
    assert np.linalg.norm(np.array(result.forces)[12]) < 0.05
    assert (tmp_path / TRAJECTORY).is_file() and (tmp_path / RELAX_LOG).is_file()
    # the reported energy is the relaxed structure's (reference library at the final geometry)
    e_final, _, _ = _reference(result.atoms(), charge=1)
    assert result.energy == pytest.approx(e_final, abs=1e-5)
    # the map belongs to the relaxed geometry: Li carries most of the charge
    assert result.charges[12] > 0.5
    assert grid.values.max() > 0


def test_bilayer_72_atoms_single_point(tmp_path):
    atoms = build_flake(FlakeBuilder(shells=2, layers=2))
    assert len(atoms) == 72
    t0 = time.perf_counter()
    result, grid = _run(atoms, tmp_path)
    dt = time.perf_counter() - t0
    print(f"\n72-atom carbon bilayer, GFN2-xTB single point + map {grid.shape}: {dt:.2f} s")
    assert result.scf_converged
    assert np.isfinite(result.energy)
    assert sum(result.charges) == pytest.approx(0.0, abs=1e-6)


def test_next_step_starts_cold_and_says_so(tmp_path):
    """tblite's Result takes no quantity from outside (Result.set knows none in this version), so
    a step with another atom count cannot restart from the previous step: recorded as cold."""
    from tblite.exceptions import TBLiteValueError
    from tblite.interface import Result

    with pytest.raises(TBLiteValueError, match="cannot be set"):
        Result().set("density-matrix", np.zeros((2, 2)))
    benzene = molecule("C6H6")
    _run(benzene, tmp_path / "s0")
    result, _ = _run(
        benzene + Atoms("Li", [(0.0, 0.0, 1.9)]), tmp_path / "s1", step=1, charge=1,
        previous=tmp_path / "s0",
    )  # fmt: skip
    assert result.scf_converged and not result.warm_started
    assert result.guess == TBLITE_GUESS and result.guess.startswith("cold")


def test_collect_names_missing_output(tmp_path):
    eng = TbliteEngine(FAST, NO_RELAX)
    with pytest.raises(EngineOutputError, match="output.json: missing.*tblite"):
        eng.collect(tmp_path)


def test_get_engine_builds_tblite_and_ase():
    from ionwell.config.engines import AseEngineConfig
    from ionwell.engines.ase_engine import AseEngine

    campaign = SimpleNamespace(engine=FAST, relax=NO_RELAX)
    assert isinstance(get_engine(campaign), TbliteEngine)
    ase_cfg = AseEngineConfig(calculator="ase.calculators.emt.EMT")
    assert isinstance(get_engine(SimpleNamespace(engine=ase_cfg, relax=NO_RELAX)), AseEngine)


def test_unconverged_scc_is_retried_with_the_engines_own_remedies(tmp_path):
    # An SCC capped at 2 iterations cannot converge benzene (tblite says so); the campaign's
    # SCF remedies, in the tight-binding engine's own terms, retry it at the same structure:
    # more SCC cycles first, which converges (tblite's own default cap is 250 cycles).
    from ionwell.config.campaign import parse_campaign
    from ionwell.engines.run import run_engine, scf_variants

    campaign = parse_campaign(
        {
            "name": "remedy",
            "host": {"builder": {"kind": "flake", "layers": 1, "shells": 1}},
            "engine": {"kind": "tblite", "max_cycle": 2},
            "relax": {"enabled": False},
        }
    )
    names = [what for what, _ in scf_variants(campaign)]
    # no level shift in tblite: the remedy list skips it
    assert names == ["as configured", "max_cycle 300", "electronic temperature 1160 K"]
    out = run_engine(
        campaign, molecule("C6H6"), tmp_path, ComputeContext(step=0, charge=0, potential=False)
    )
    assert out.result.scf_converged
    assert out.remedies == ["SCF retry with max_cycle 300: converged"]
