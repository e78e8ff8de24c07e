"""Warm start of the embedded PySCF engine: the guess built from the previous step, the state it
reaches (the same as from a fresh guess), and the guess recorded per step (result and ledger)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import yaml
from ase import Atoms
from ase.build import molecule
from ase.units import Hartree

from ionwell.config.campaign import PyscfEngineConfig
from ionwell.engines.pyscf_engine import (
    COLD_GUESS,
    WARM_CONSTRUCTIONS,
    _KohnSham,
    auto_construction,
    build_mol,
    warm_start_guess,
)

pyscf = pytest.importorskip("pyscf")

# tight SCF so that two solutions of one state agree far below 1e-6 eV
TIGHT = PyscfEngineConfig(xc="lda,vwn", basis="sto-3g", conv_tol=1e-10, warm_start=True)


def _solve(atoms: Atoms, charge: int, guess_from=None, construction="auto"):
    """SCF of ``atoms`` through the engine's driver, from the fresh guess or from the checkpoint
    ``guess_from``; returns (the _KohnSham after the SCF, the guess label)."""
    mol = build_mol(atoms, TIGHT.basis, charge)
    ks = _KohnSham(mol, TIGHT)
    label = COLD_GUESS
    if guess_from is not None:
        ks.dm, label = warm_start_guess(mol, guess_from, ks.open_shell, construction)
    ks.scf()
    assert ks.mf.converged
    return ks, label


def _checkpoint(ks, path):
    from pyscf.scf import chkfile

    mf = ks.mf
    chkfile.dump_scf(mf.mol, str(path), mf.e_tot, mf.mo_energy, mf.mo_coeff, mf.mo_occ)
    return path


def _counts(mol, dm):
    """(electrons, 2S) of a guess density: tr(D·S) and tr((Dα − Dβ)·S)."""
    s = mol.intor_symmetric("int1e_ovlp")
    dm = np.asarray(dm)
    if dm.ndim == 2:
        return float(np.trace(dm @ s)), 0.0
    return float(np.trace((dm[0] + dm[1]) @ s)), float(np.trace((dm[0] - dm[1]) @ s))


@pytest.mark.parametrize("construction", [c for c in WARM_CONSTRUCTIONS if c != "neutral-atoms"])
def test_guess_has_the_new_electron_count_and_spin(tmp_path, construction):
    """H2 → H2 + Li (neutral: 5 electrons, 2S = 1) → H2 + Li + Li⁺ (charge +1: 7 electrons,
    2S = 1) → H2 + 2 Li (neutral: 8 electrons, 2S = 0). The guess must carry the new system's
    electron count and spin: a cation guest brings 2 electrons, not a neutral atom's 3."""
    h2 = Atoms("H2", [(0, 0, 0), (0, 0, 0.74)])
    li1 = h2 + Atoms("Li", [(0, 2.5, 0.37)])
    li2 = li1 + Atoms("Li", [(0, -2.5, 0.37)])
    chk0 = _checkpoint(_solve(h2, 0)[0], tmp_path / "h2.chk")
    chk1 = _checkpoint(_solve(li1, 0)[0], tmp_path / "li1.chk")
    for atoms, charge, chk, expect in [(li1, 0, chk0, (5, 1)), (li2, 1, chk1, (7, 1)),
                                       (li2, 0, chk1, (8, 0))]:  # fmt: skip
        mol = build_mol(atoms, TIGHT.basis, charge)
        dm, label = warm_start_guess(mol, chk, mol.spin != 0, construction)
        assert label == f"previous step ({construction})"
        assert _counts(mol, dm) == pytest.approx(expect, abs=1e-8)


def test_guess_refuses_other_atoms(tmp_path):
    chk = _checkpoint(_solve(molecule("H2O"), 0)[0], tmp_path / "h2o.chk")
    mol = build_mol(molecule("NH3"), "sto-3g")
    dm, label = warm_start_guess(mol, chk, False)
    assert dm is None and label == "cold: atoms differ from the previous step"


def test_ions_get_neutral_atoms_and_neutral_guests_orbitals(tmp_path):
    """The engine's choice: H2 → H2 + Li⁺ (the guest brings 2 electrons of its 3) gets neutral
    atomic densities, H2 → H2 + Li (3 of 3) and H2 → H2 (nothing new) the orbitals."""
    h2 = Atoms("H2", [(0, 0, 0), (0, 0, 0.74)])
    chk = _checkpoint(_solve(h2, 0)[0], tmp_path / "h2.chk")
    prev = build_mol(h2, TIGHT.basis)
    li = h2 + Atoms("Li", [(0, 2.5, 0.37)])
    assert auto_construction(build_mol(li, TIGHT.basis, 1), prev, 2) == "neutral-atoms"
    assert auto_construction(build_mol(li, TIGHT.basis, 0), prev, 2) == "orbitals"
    assert auto_construction(build_mol(h2, TIGHT.basis, 0), prev, 2) == "orbitals"
    _, label = warm_start_guess(build_mol(li, TIGHT.basis, 1), chk, False)
    assert label == "previous step (neutral-atoms)"


def _first_cycle_energy(ks: _KohnSham, dm0) -> float:
    """Energy (hartree) after one diagonalisation of the Fock matrix of ``dm0``: what the
    SCF's first cycle sees."""
    mf = ks._new_mf(ks.mol)
    e, c = mf.eig(mf.get_fock(dm=dm0), mf.get_ovlp())
    return float(mf.energy_tot(mf.make_rdm1(c, mf.get_occ(e, c))))


def test_neutral_atoms_keep_the_ions_bare_charge_out_of_the_first_cycle(tmp_path):
    """Benzene bilayer (AA, 3.6 Å) → + Li⁺ midway between the ring centres. With the ion's own
    2 electrons in the guess (``orbitals``) its bare charge acts on a host density that has not
    responded, and the first diagonalisation overshoots; a neutral atom's density screens it.
    Measured here (this test's own figures, LDA/STO-3G): 0.33 eV above the converged energy
    with neutral atoms against 1.08 eV with the ion's orbitals (on a single benzene both are
    0.33 eV: the overshoot grows with the host). Reference: the SCF's converged energy."""
    sheet = molecule("C6H6")
    host = sheet + sheet.copy()
    host.positions[len(sheet) :, 2] += 3.6
    chk = _checkpoint(_solve(host, 0)[0], tmp_path / "bilayer.chk")
    cold, _ = _solve(host + Atoms("Li", [(0.0, 0.0, 1.8)]), 1)
    first = {}
    for c in ("neutral-atoms", "orbitals"):
        dm0, _ = warm_start_guess(cold.mol, chk, False, c)
        first[c] = (_first_cycle_energy(cold, dm0) - cold.mf.e_tot) * Hartree
    assert 0 <= first["neutral-atoms"] < 0.5 * first["orbitals"]


# two systems: benzene + neutral Li (UKS, the guest donates its electron to the ring) and
# benzene + Li⁺ (RKS); the guest 1.9 Å above the ring centre
@pytest.mark.parametrize(
    ("charge", "spin", "construction"), [(0, 1, "orbitals"), (1, 0, "neutral-atoms")]
)
def test_warm_and_cold_reach_the_same_energy(tmp_path, charge, spin, construction):
    benzene = molecule("C6H6")
    chk = _checkpoint(_solve(benzene, 0)[0], tmp_path / "benzene.chk")
    atoms = benzene + Atoms("Li", [(0.0, 0.0, 1.9)])
    cold, _ = _solve(atoms, charge)
    warm, label = _solve(atoms, charge, guess_from=chk)
    assert label == f"previous step ({construction})"
    assert warm.mol.spin == cold.mol.spin == spin
    assert (warm.mf.e_tot - cold.mf.e_tot) * Hartree == pytest.approx(0.0, abs=1e-6)


@pytest.mark.slow
def test_ledger_records_the_guess_per_step(tmp_path):
    """A two-step campaign (benzene, then benzene + Li⁺) with the warm start on: step 0 starts
    from PySCF's atomic guess, step 1 from step 0's density plus a neutral Li atom's; both
    recorded in the ledger."""
    from shared import TINY, run_campaign

    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import read_ledger

    data = json.loads(json.dumps(TINY))
    data["engine"]["warm_start"] = True
    data["relax"] = {"enabled": False}
    data["stop"] = {"guests": 1, "max_steps": 2}
    cfg = tmp_path / "tiny.yaml"
    cfg.write_text(yaml.safe_dump(data))
    run_campaign(cfg, tmp_path)
    recs = read_ledger(CampaignPaths(tmp_path / "campaigns" / "tiny").ledger)
    assert [r.guess for r in recs] == [COLD_GUESS, "previous step (neutral-atoms)"]


# Li and Na⁺ 8 Å apart, LDA/6-31G, one valence electron (UKS doublet). LDA spreads that
# electron over both ions (Mulliken ≈ 0.5 each: the delocalisation error of local functionals,
# common practice); a guess with the electron on Li alone, held there by maximum overlap,
# converges to a localised state with the filled Li 2s level above the empty Na 3s one. Both
# are SCF solutions; the measurements below are this test's own (PySCF 2.x, 2026-12).
PAIR = PyscfEngineConfig(xc="lda,vwn", basis="6-31g", conv_tol=1e-10, density_fit=False)
PAIR_ATOMS = Atoms("LiNa", [(0.0, 0.0, 0.0), (0.0, 0.0, 8.0)])


def _atomic_guess(mol, neutral: str) -> np.ndarray:
    """UKS density of the pair built from free-atom solutions (PySCF, LDA): ``neutral`` carries
    the valence electron, the other atom is a bare cation."""
    from pyscf import dft, gto

    blocks = []
    for sym, pos in zip(PAIR_ATOMS.get_chemical_symbols(), PAIR_ATOMS.positions, strict=True):
        charge = 0 if sym == neutral else 1
        m = gto.M(atom=[[sym, tuple(pos)]], basis=PAIR.basis, charge=charge,
                  spin=(gto.charge(sym) - charge) % 2, unit="Angstrom", verbose=0)  # fmt: skip
        a = dft.UKS(m)
        a.xc = PAIR.xc
        a.kernel()
        blocks.append(a.make_rdm1())
    dm = np.zeros((2, mol.nao, mol.nao))
    n = blocks[0].shape[-1]
    dm[:, :n, :n], dm[:, n:, n:] = blocks
    return dm


@pytest.fixture(scope="module")
def pair_cold() -> _KohnSham:
    """The pair solved from PySCF's fresh guess through the engine's driver (shared by both
    tests below: the reference state)."""
    cold = _KohnSham(build_mol(PAIR_ATOMS, PAIR.basis, charge=1), PAIR)
    cold.scf()
    return cold


def test_a_warm_state_above_the_fresh_guess_is_replaced_by_the_fresh_one(pair_cold):
    """A warm start that ends with an empty level below a filled one is solved again from the
    fresh guess, and the lower state is kept and recorded as a cold start."""
    from pyscf import dft, scf

    cold = pair_cold
    mol = build_mol(PAIR_ATOMS, PAIR.basis, charge=1)
    dm0 = _atomic_guess(mol, "Li")
    ks = _KohnSham(mol, PAIR)
    ks.dm, ks.guess = dm0, "previous step (orbitals)"
    ks.scf()
    assert ks.mf.converged and cold.mf.converged
    # the state kept is the fresh guess's
    assert (ks.mf.e_tot - cold.mf.e_tot) * Hartree == pytest.approx(0.0, abs=1e-6)
    assert ks.guess.startswith(f"{COLD_GUESS}, the warm start's state was ")
    assert ks.iterations > cold.iterations  # both SCFs counted
    # the state it replaced, reached by PySCF directly (UKS, maximum overlap with the aufbau
    # orbitals of the guess's Fock matrix): converged, a hole of over 1 eV, and higher
    mf = dft.UKS(mol)
    mf.xc, mf.conv_tol, mf.verbose = PAIR.xc, PAIR.conv_tol, 0
    e0, c0 = mf.eig(mf.get_fock(dm=dm0), mf.get_ovlp())
    mf = scf.addons.mom_occ(mf, c0, mf.get_occ(e0, c0))
    mf.kernel(dm0=dm0)
    assert mf.converged
    occupied = mf.mo_energy[0][mf.mo_occ[0] > 0].max()
    empty = mf.mo_energy[0][mf.mo_occ[0] == 0].min()
    assert (occupied - empty) * Hartree > 1.0
    higher = (mf.e_tot - cold.mf.e_tot) * Hartree
    assert higher > 0.3
    assert f"was {higher:.3f} eV higher" in ks.guess


def test_a_warm_start_that_needed_newton_is_kept_when_the_fresh_guess_is_no_lower(pair_cold):
    """The same pair from PySCF's own atomic guess stalls in DIIS and needs the Newton solver;
    offered as a warm start, that guess is checked against the fresh guess, which reaches the
    same state, and the warm state is kept with the check recorded."""
    cold = pair_cold
    mol = build_mol(PAIR_ATOMS, PAIR.basis, charge=1)
    assert cold.solver.endswith("newton")
    ks = _KohnSham(mol, PAIR)
    ks.dm = ks._new_mf(mol).get_init_guess(mol, "minao")
    ks.guess = "previous step (orbitals)"
    ks.scf()
    assert ks.mf.converged and ks.solver.endswith("newton")
    assert ks.guess.startswith("previous step (orbitals), checked against the fresh guess (")
    assert (ks.mf.e_tot - cold.mf.e_tot) * Hartree == pytest.approx(0.0, abs=1e-6)
    assert ks.iterations == 2 * cold.iterations  # the warm SCF and the check
