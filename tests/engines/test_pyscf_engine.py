"""The embedded PySCF engine: SCF set-up, potential map, charges, warm start, relaxation, I/O."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from ase import Atoms
from ase.build import molecule
from ase.units import Bohr, Hartree

from ionwell.config.campaign import PotentialGridConfig, PyscfEngineConfig, RelaxConfig
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.pyscf_engine import (
    CHECKPOINT,
    CONTEXT,
    INPUT,
    OUTPUT,
    POTENTIAL,
    PyscfEngine,
    _KohnSham,
    build_mol,
    electronic_potential,
    grid_box,
    nuclear_potential,
    potential_map,
)
from ionwell.engines.relax import TRAJECTORY
from ionwell.errors import EngineOutputError
from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid

pyscf = pytest.importorskip("pyscf")

# a small, quick set-up: LDA / STO-3G on a coarse grid
FAST = PyscfEngineConfig(
    xc="lda,vwn",
    basis="sto-3g",
    warm_start=True,  # the warm start's mechanics are tested here (off by default)
    potential_grid=PotentialGridConfig(spacing=0.4, margin=2.5),
)
NO_RELAX = RelaxConfig(enabled=False)


def _run(atoms, workdir, cfg=FAST, relax=NO_RELAX, **ctx):
    eng = PyscfEngine(cfg, relax)
    eng.prepare(atoms, workdir, ComputeContext(step=ctx.pop("step", 0), **ctx))
    assert not eng.external
    eng.run(workdir)
    return eng.collect(workdir)


def _rdm1_from_chk(chk):
    """Density matrix (total) of a PySCF checkpoint, read with PySCF's own chkfile loader."""
    from pyscf.scf import chkfile

    mol, data = chkfile.load_scf(str(chk))
    mo, occ = np.asarray(data["mo_coeff"]), np.asarray(data["mo_occ"])
    pairs = zip(mo, occ, strict=True) if mo.ndim == 3 else [(mo, occ)]
    return mol, sum((c * o) @ c.T for c, o in pairs)


@pytest.fixture(scope="module")
def water(tmp_path_factory):
    work = tmp_path_factory.mktemp("water")
    result, grid = _run(molecule("H2O"), work)
    return work, result, grid


@pytest.fixture(scope="module")
def benzene(tmp_path_factory):
    work = tmp_path_factory.mktemp("benzene")
    result, grid = _run(molecule("C6H6"), work)
    return work, result, grid


# ---------------------------------------------------------------------------------------------
# set-up


def test_prepare_writes_inputs(tmp_path):
    eng = PyscfEngine(FAST, NO_RELAX)
    ctx = ComputeContext(step=3, charge=1, movable=(2,), previous=tmp_path / "prev")
    eng.prepare(molecule("H2O"), tmp_path, ctx)
    from ase.io import read

    back = read(tmp_path / INPUT)
    assert back.get_chemical_symbols() == ["O", "H", "H"]
    assert ComputeContext.model_validate_json((tmp_path / CONTEXT).read_text()) == ctx
    assert not eng.external
    assert eng.name == "pyscf"


@pytest.mark.parametrize(
    ("atoms", "charge", "spin", "kind"),
    [
        (molecule("C6H6"), 0, 0, "RKS"),  # 42 electrons
        (molecule("C6H6") + Atoms("Li", [(0, 0, 1.9)]), 0, 1, "UKS"),  # 45 electrons
        (molecule("C6H6") + Atoms("Li", [(0, 0, 1.9)]), 1, 0, "RKS"),  # Li+: 44 electrons
        (molecule("H2O"), 1, 1, "UKS"),
    ],
)
def test_restricted_for_even_unrestricted_for_odd(atoms, charge, spin, kind):
    mol = build_mol(atoms, "sto-3g", charge, None)
    assert mol.spin == spin
    mf = _KohnSham(mol, FAST)._new_mf(mol)
    from pyscf import dft

    assert isinstance(mf, {"RKS": dft.rks.RKS, "UKS": dft.uks.UKS}[kind])
    assert not isinstance(mf, {"RKS": dft.uks.UKS, "UKS": dft.rks.RKS}[kind])


def test_impossible_spin_is_refused():
    with pytest.raises(ValueError, match="impossible"):
        build_mol(molecule("H2O"), "sto-3g", 0, 1)


def test_grid_box_covers_margin():
    pos = np.array([[0.0, 0.0, 0.0], [1.0, 2.0, 0.0]])
    origin, shape = grid_box(pos, 0.25, 3.0)
    top = origin + (np.array(shape) - 1) * 0.25
    assert np.all(origin <= pos.min(0) - 3.0 + 1e-9)
    assert np.all(top >= pos.max(0) + 3.0 - 1e-9)


# ---------------------------------------------------------------------------------------------
# potential


def test_potential_matches_pyscf_rinv_integrals(water):
    """Reference: nuclear term by hand plus PySCF's own ⟨i|1/|r−C||j⟩ integrals (int1e_rinv
    with set_rinv_origin at each point), contracted with the density matrix."""
    work, result, grid = water
    mol, dm = _rdm1_from_chk(work / CHECKPOINT)
    flat = grid.values.ravel()
    idx = [0, flat.size // 3, int(np.argmin(flat)), flat.size - 1]
    pts = grid.points()[idx]  # Å
    ref = []
    for p in pts / Bohr:
        vnuc = sum(
            z / np.linalg.norm(p - r)
            for z, r in zip(mol.atom_charges(), mol.atom_coords(), strict=True)
        )
        with mol.with_rinv_origin(p):
            vel = np.einsum("ij,ij->", mol.intor("int1e_rinv"), dm)
        ref.append(vnuc - vel)
    ref = np.array(ref)
    ours = nuclear_potential(mol, pts / Bohr) - electronic_potential(mol, dm, pts / Bohr)
    assert np.max(np.abs(ours - ref)) < 1e-6  # hartree/e
    # the stored map (float32, volts)
    stored = flat[idx].astype(float)
    assert np.allclose(stored, ref * Hartree, atol=1e-6 * Hartree, rtol=1e-6)
    # sign convention: positive near the nuclei, the deepest point negative (near O)
    assert flat.max() > 10 and flat.min() < 0


def test_fitted_potential_is_exact_at_the_wells(water):
    work, result, grid = water
    mol, dm = _rdm1_from_chk(work / CHECKPOINT)
    pos = np.array(result.positions)
    exact = potential_map(mol, dm, pos, 0.4, 2.5, "exact")
    fitted = potential_map(mol, dm, pos, 0.4, 2.5, "fitted")
    assert fitted.shape == exact.shape
    # deepest point: same place, same value
    assert np.argmin(fitted.values) == np.argmin(exact.values)
    assert fitted.values.min() == pytest.approx(float(exact.values.min()), abs=1e-5)
    # elsewhere, away from the nuclei, the fitted density is close
    pts = exact.points()
    d = np.min(np.linalg.norm(pts[:, None] - pos[None], axis=2), axis=1)
    far = d > 1.2
    err = np.abs(fitted.values.ravel() - exact.values.ravel())[far]
    assert err.max() < 0.05  # volts


# ---------------------------------------------------------------------------------------------
# charges, orbitals, result


def test_result_fields_and_mulliken(benzene):
    work, result, grid = benzene
    assert result.scf_converged and result.code == "pyscf"
    assert result.spin == 0 and len(result.orbital_energies) == 1  # RKS: one channel
    assert result.homo < result.lumo
    assert result.relax_converged is None and result.relax_steps == 0
    assert np.array(result.forces).shape == (12, 3)
    assert not result.warm_started
    assert grid.values.dtype == np.float32 and grid.shape == tuple(grid.values.shape)
    # Mulliken charges sum to the total charge (common practice) ...
    assert sum(result.charges) == pytest.approx(0.0, abs=1e-6)
    # ... and match PySCF's own mulliken_pop on the stored density
    from pyscf.scf import hf

    mol, dm = _rdm1_from_chk(work / CHECKPOINT)
    _, ref = hf.mulliken_pop(mol, dm, verbose=0)
    assert np.allclose(result.charges, ref, atol=1e-8)
    # C negative, H positive in benzene
    assert all(c < 0 for c in result.charges[:6]) and all(c > 0 for c in result.charges[6:])


def test_density_fitting_changes_little(water, tmp_path):
    _, fitted, _ = water
    cfg = FAST.model_copy(update={"density_fit": False, "grid_level": 2})
    plain, _ = _run(molecule("H2O"), tmp_path, cfg)
    # measured: 12 meV on the absolute energy of water (STO-3G); differences cancel most of it
    assert plain.energy == pytest.approx(fitted.energy, abs=0.03)  # eV
    assert np.allclose(plain.forces, fitted.forces, atol=5e-3)  # eV/Å


def test_charged_open_shell_and_smearing(tmp_path):
    cfg = FAST.model_copy(update={"smearing": 0.1})
    result, _ = _run(molecule("H2O"), tmp_path, cfg, charge=1)
    assert result.spin == 1 and result.charge == 1
    assert len(result.orbital_energies) == 2 and len(result.occupations) == 2  # UKS
    assert sum(result.charges) == pytest.approx(1.0, abs=1e-6)
    assert result.fermi_level is not None
    assert sum(map(sum, result.occupations)) == pytest.approx(9.0, abs=1e-6)


def test_smeared_energy_is_extrapolated_to_zero_width_and_forces_derive_from_free_energy(
    tmp_path,
):
    """With Fermi smearing the engine records E - σS/2 as ``energy`` and the Mermin free energy
    F = E - σS as ``free_energy``, and its forces are -dF/dR, not -dE/dR.

    References: PySCF's own ``e_zero`` and ``e_free`` of a tightly converged solve (reference
    library), and a central finite difference (h = 1e-3 Å) of the engine's recorded free
    energy. Li₃ (an open shell whose top level is shared at a wide 0.272 eV = 0.01 hartree
    width), measured here: energy - free energy = 0.296 eV; along x of the third atom the
    force's negative is 0.0730 eV/Å, the finite difference of F 0.0728 and that of the
    recorded energy 0.0626.
    """
    from pyscf import dft, gto, scf

    cfg = FAST.model_copy(
        update={
            "smearing": 0.01 * Hartree,
            "conv_tol": 1e-11,
            "grid_level": 3,
            "density_fit": False,
        }
    )

    def li3(x: float) -> Atoms:
        return Atoms("Li3", positions=[(0.0, 0.0, 0.0), (2.9, 0.0, 0.0), (x, 2.4, 0.0)])

    x0, h = 1.6, 1e-3
    res, _ = _run(li3(x0), tmp_path / "mid", cfg, potential=False)
    plus, _ = _run(li3(x0 + h), tmp_path / "plus", cfg, potential=False)
    minus, _ = _run(li3(x0 - h), tmp_path / "minus", cfg, potential=False)

    atoms = [("Li", tuple(p)) for p in li3(x0).positions]
    mol = gto.M(atom=atoms, unit="Angstrom", basis="sto-3g", spin=1, verbose=0)
    ref = dft.UKS(mol)
    ref.xc, ref.grids.level, ref.conv_tol = "lda,vwn", 3, 1e-12
    scf.addons.smearing_(ref, sigma=0.01, method="fermi", fix_spin=True)
    ref.kernel()
    assert ref.converged
    assert res.energy == pytest.approx(ref.e_zero * Hartree, abs=1e-5)
    assert res.free_energy == pytest.approx(ref.e_free * Hartree, abs=1e-5)
    assert res.energy - res.free_energy > 0.2  # σS/2, measured 0.296 eV

    fd_free = (plus.free_energy - minus.free_energy) / (2 * h)  # eV/Å
    fd_energy = (plus.energy - minus.energy) / (2 * h)
    force = res.forces[2][0]
    assert -force == pytest.approx(fd_free, abs=2e-3)  # measured 2e-4 eV/Å apart
    assert abs(-force - fd_energy) > 5e-3  # the zero-width energy is not what the forces derive


@pytest.mark.parametrize(
    ("charge", "update", "closing"),
    [
        (1, {}, False),  # water + Li⁺, closed shell
        (0, {"smearing": 0.1}, False),  # water + Li, UKS with Fermi smearing
        (1, {"level_shift": 0.1}, True),  # a level shift keeps PySCF's closing cycle
    ],
)
def test_scf_ends_on_its_converged_cycle(monkeypatch, charge, update, closing):
    """The SCF builds one Fock matrix per counted cycle plus the guess's, none after
    convergence unless a level shift must be taken off, and its state is PySCF's own:
    a tightly converged PySCF solve of the same model (reference library) agrees within
    1e-6 eV and 1e-3 eV/Å."""
    atoms = molecule("H2O") + Atoms("Li", positions=[(0.0, 0.0, 2.05)])  # Li on the O side
    cfg = FAST.model_copy(update=update)
    builds = []
    plain = _KohnSham._new_mf

    def counted(self, mol, smearing=None):
        mf = plain(self, mol, smearing)
        veff = mf.get_veff

        def get_veff(*args, **kwargs):
            builds.append(1)
            return veff(*args, **kwargs)

        mf.get_veff = get_veff
        return mf

    monkeypatch.setattr(_KohnSham, "_new_mf", counted)
    ks = _KohnSham(build_mol(atoms, cfg.basis, charge), cfg)
    mf = ks.scf()
    assert mf.converged
    assert len(builds) == ks.iterations + 1 + int(closing)
    energy, forces = mf.e_tot * Hartree, -ks.gradient() * Hartree / Bohr

    monkeypatch.setattr(_KohnSham, "_new_mf", plain)
    ref = _KohnSham(build_mol(atoms, cfg.basis, charge), cfg)._new_mf(ks.mol)
    ref.conv_tol, ref.conv_tol_grad, ref.level_shift = 1e-12, 1e-8, 0.0
    ref.kernel()
    assert ref.converged
    assert energy == pytest.approx(ref.e_tot * Hartree, abs=1e-6)
    ref_forces = -ref.nuc_grad_method().kernel() * Hartree / Bohr
    assert np.abs(forces - ref_forces).max() < 1e-3


# ---------------------------------------------------------------------------------------------
# warm start and relaxation


def test_warm_start_from_previous_step(benzene, tmp_path):
    """benzene (step 0) → benzene + Li (step 1, neutral: UKS), warm against fresh.

    The warm start must reach the same state. Measured here (LDA/STO-3G, density fitting):
    6 warm / 6 fresh iterations for Li⁺, 7 / 7 for neutral Li (UKS); the benzene block of the
    guess is converged already, but the host's response to the guest takes as many DIIS cycles
    as the atomic guess needs.
    """
    work0, _, _ = benzene
    atoms = molecule("C6H6") + Atoms("Li", [(0.0, 0.0, 1.9)])
    cold_cfg = FAST.model_copy(update={"warm_start": False})
    warm, _ = _run(atoms, tmp_path / "warm", step=1, previous=work0)
    cold, _ = _run(atoms, tmp_path / "cold", cold_cfg, step=1)
    assert warm.warm_started and not cold.warm_started
    # the donated electron leaves an empty level below an occupied one (from either guess), so
    # the warm SCF is checked against a fresh one: same state, the warm one kept
    assert warm.guess.startswith("previous step (orbitals), checked against the fresh guess")
    assert cold.guess == "atomic (minao)"
    assert warm.spin == cold.spin == 1 and len(warm.orbital_energies) == 2  # 45 electrons
    assert warm.scf_converged and cold.scf_converged
    assert warm.energy == pytest.approx(cold.energy, abs=1e-5)


def test_warm_start_refuses_another_molecule(benzene, tmp_path):
    work0, _, _ = benzene
    result, _ = _run(molecule("H2O"), tmp_path, step=1, previous=work0)
    assert not result.warm_started and result.scf_converged
    assert result.guess == "cold: atoms differ from the previous step"


def test_relaxation_moves_only_movable_atoms(tmp_path):
    atoms = Atoms("H2", [(0, 0, 0), (0, 0, 0.9)])
    relax = RelaxConfig(fmax=0.02, steps=20)
    result, _ = _run(atoms, tmp_path, FAST, relax, movable=(1,))
    assert result.relax_converged is True and 0 < result.relax_steps <= 20
    pos = np.array(result.positions)
    assert np.allclose(pos[0], 0.0)  # fixed
    assert 0.70 < pos[1, 2] < 0.80  # H2 bond near 0.74 Å (textbook), LDA/STO-3G close to it
    assert abs(result.forces[1][2]) < 0.02
    assert (tmp_path / TRAJECTORY).is_file()


# ---------------------------------------------------------------------------------------------
# collect: clear errors


def _write_valid(workdir):
    res = StepResult(
        energy=-1.0,
        scf_converged=True,
        symbols=["H"],
        positions=[[0.0, 0.0, 0.0]],
        code="pyscf",
        code_version="x",
        wall_time=0.0,
        potential_file=POTENTIAL,
    )
    (workdir / OUTPUT).write_text(res.model_dump_json())
    save_npz(workdir / POTENTIAL, Grid(np.zeros(3), np.eye(3), np.zeros((2, 2, 2), np.float32)))
    return res


def test_collect_round_trip(tmp_path):
    res = _write_valid(tmp_path)
    got, grid = PyscfEngine(FAST, NO_RELAX).collect(tmp_path)
    assert got == res and grid.shape == (2, 2, 2)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        (None, "output.json: missing"),
        ('{"energy": -1.0, "scf', "output.json: not valid JSON"),
        ("[1, 2]", "output.json: expected a JSON object"),
        ('{"energy": -1.0}', "output.json: unusable StepResult.*code"),
    ],
)
def test_collect_bad_output(tmp_path, text, match):
    _write_valid(tmp_path)
    if text is None:
        (tmp_path / OUTPUT).unlink()
    else:
        (tmp_path / OUTPUT).write_text(text)
    with pytest.raises(EngineOutputError, match=match):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)


def test_positions_and_forces_travel_in_binary(tmp_path):
    """write_output keeps positions and forces out of output.json (float64 .npz beside it);
    collect gives back exactly the result written (bit for bit: float64 in, float64 out)."""
    from ionwell.engines.results import ARRAYS, write_output

    res = _write_valid(tmp_path)
    rng = np.random.default_rng(0)
    res = res.model_copy(
        update={
            "positions": rng.normal(size=(1, 3)).tolist(),
            "forces": rng.normal(size=(1, 3)).tolist(),
        }
    )
    write_output(tmp_path, res)
    assert "positions" not in (tmp_path / OUTPUT).read_text().replace('"positions": []', "")
    got, _ = PyscfEngine(FAST, NO_RELAX).collect(tmp_path)
    assert got == res
    np.save(tmp_path / "x.npy", np.zeros(1))  # unrelated file: ignored
    with open(tmp_path / ARRAYS, "wb") as fh:
        np.savez(fh, positions=np.zeros((2, 3)))
    with pytest.raises(EngineOutputError, match=r"output.npz: 'positions' has shape \(2, 3\)"):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)
    (tmp_path / ARRAYS).unlink()
    with pytest.raises(EngineOutputError, match="output.npz: missing"):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)


def test_collect_nan_energy_and_missing_grid(tmp_path):
    _write_valid(tmp_path)
    data = json.loads((tmp_path / OUTPUT).read_text())
    data["energy"] = math.nan
    (tmp_path / OUTPUT).write_text(json.dumps(data))  # json writes NaN
    with pytest.raises(EngineOutputError, match="output.json: energy is nan"):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)
    _write_valid(tmp_path)
    (tmp_path / POTENTIAL).unlink()
    with pytest.raises(EngineOutputError, match="potential.npz: missing"):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)
    (tmp_path / POTENTIAL).write_bytes(b"not a zip")
    with pytest.raises(EngineOutputError, match="potential.npz"):
        PyscfEngine(FAST, NO_RELAX).collect(tmp_path)


# ---------------------------------------------------------------------------------------------
# cation–π: the deepest well over benzene, and Li⁺ relaxed onto the ring axis

CATION_PI = PyscfEngineConfig(
    xc="lda,vwn",
    basis="6-31g",
    warm_start=True,  # step 1 starts from step 0's density (checked below; off by default)
    potential_grid=PotentialGridConfig(spacing=0.25, margin=3.0),
)


@pytest.mark.slow
def test_cation_pi_well_and_relaxed_li(tmp_path):
    """Li⁺ over benzene sits on the C6 axis about 1.85–1.95 Å above the ring plane
    (cation–π literature, value from memory). Measured with this set-up (LDA/6-31G): the
    deepest well of neutral benzene's potential is a shallow ring 0.6 Å off the axis at 1.77 Å
    height; Li⁺ relaxes onto the axis at 1.90 Å in 8 steps (about 90 s on 2 cores)."""
    from ionwell.science.placement import PlaceSettings, place

    benzene = molecule("C6H6")  # ring in the xy plane, centred at the origin
    assert np.allclose(benzene.positions[:, 2], 0.0)
    _, grid = _run(benzene, tmp_path / "s0", CATION_PI)
    decision = place(grid, benzene, "Li", PlaceSettings(exclusion={"C": 1.5, "H": 1.2}, within=3.0))
    site = np.array(decision.chosen[0].position)
    assert 1.4 <= abs(site[2]) <= 1.9  # above the ring plane
    assert np.hypot(site[0], site[1]) < 1.0  # over the ring face, inside the C6 ring

    cfg1 = CATION_PI.model_copy(
        update={"potential_grid": PotentialGridConfig(spacing=0.5, margin=2.0)}
    )
    result, _ = _run(
        benzene + Atoms("Li", [site]),
        tmp_path / "s1",
        cfg1,
        RelaxConfig(),
        step=1,
        charge=1,
        movable=(12,),
        previous=tmp_path / "s0",
    )
    assert result.warm_started and result.relax_converged
    pos = np.array(result.positions)
    assert np.allclose(pos[:12], benzene.positions)  # ring fixed
    li = pos[12]
    assert np.hypot(li[0], li[1]) < 0.15  # on the C6 axis
    assert 1.8 <= abs(li[2]) <= 2.0


@pytest.mark.parametrize(("charge", "n_channels"), [(0, 1), (1, 2)])
def test_maximum_overlap_keeps_the_solution(charge, n_channels):
    from ionwell.engines.pyscf_engine import _keep_occupation

    mol = build_mol(molecule("H2O"), "sto-3g", charge)
    ks = _KohnSham(mol, FAST)
    mf = ks.scf()
    again = ks._new_mf(mol)
    _keep_occupation(again, mf.mo_coeff, mf.mo_occ)
    again.kernel(dm0=mf.make_rdm1())
    assert again.converged and again.e_tot == pytest.approx(mf.e_tot, abs=1e-7)
    occ = np.asarray(again.mo_occ).reshape(n_channels, -1)
    assert occ.sum() == mol.nelectron


@pytest.mark.parametrize(
    ("update", "ctx", "match"),
    [
        ({"xc": "no-such-functional"}, {}, "engine.xc"),
        ({"basis": "no-such-basis"}, {}, "engine.basis"),
        ({}, {"spin": 1}, "context.json: step 0 cannot be computed: spin 2S=1 is impossible"),
    ],
)
@pytest.mark.filterwarnings("ignore:Basis may be available:UserWarning")
def test_unusable_settings_are_config_errors(tmp_path, update, ctx, match):
    from ionwell.errors import ConfigError

    eng = PyscfEngine(FAST.model_copy(update=update), NO_RELAX)
    eng.prepare(molecule("H2O"), tmp_path, ComputeContext(step=0, **ctx))
    with pytest.raises(ConfigError, match=match):
        eng.run(tmp_path)
    assert not (tmp_path / OUTPUT).exists()


@pytest.mark.slow
def test_excited_configuration_is_reported_and_smearing_finds_the_lower_state(tmp_path):
    """Benzene with one Li above and one below the ring (D6h): the two donated electrons go into
    benzene's degenerate e2u π* pair. Without smearing the SCF must fill one of two equal levels;
    here DIIS stalls and the second-order solver ends in a configuration with an empty level below
    a filled one (measured: 3.7 eV, energy 3.0 eV above the smeared state). The step's levels
    then give the ``empty-level-below-filled`` warning; with Fermi smearing (0.1 eV) the pair
    shares the electrons, the energy is lower and there is no finding.

    Reference: the aufbau principle (filled levels lowest in a Kohn–Sham ground state without
    smearing; common practice); the energies are PySCF's own."""
    from ionwell.science.checks import level_order_findings

    atoms = molecule("C6H6") + Atoms("Li2", positions=[[0, 0, 1.8], [0, 0, -1.8]])
    plain, _ = _run(atoms, tmp_path / "plain", potential=False)
    smeared, _ = _run(
        atoms, tmp_path / "smeared", cfg=FAST.model_copy(update={"smearing": 0.1}), potential=False
    )
    assert plain.scf_converged and smeared.scf_converged
    hole = level_order_findings(1, plain.orbital_energies, plain.occupations, 0.1)
    # the check is quiet for smeared (fractional) occupations
    assert level_order_findings(1, smeared.orbital_energies, smeared.occupations, 0.1) == []
    # no silent wrong answer: an unsmeared state above the smeared one is flagged
    assert smeared.energy < plain.energy - 1.0  # measured 3.0 eV
    assert [f.code for f in hole] == ["empty-level-below-filled"]
