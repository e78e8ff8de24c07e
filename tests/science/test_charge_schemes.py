"""Atomic charges in several schemes (ionwell.science.charges) and their place in StepResult.

LiH at 1.595 Å: the equilibrium bond length of the handbook (quoted from memory, not looked up
for this test). Its polarity is Li⁺H⁻: the measured dipole moment (about 5.9 D, also quoted
from memory) has its negative end at H.
"""

from __future__ import annotations

import json
import logging
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg
from ase import Atoms

from ionwell.config.campaign import PotentialGridConfig, RelaxConfig
from ionwell.config.engines import PyscfEngineConfig
from ionwell.engines.base import ComputeContext
from ionwell.engines.results import OUTPUT
from ionwell.science.charges import (
    AUTO_ORDER,
    SCHEMES,
    compute_charge_sets,
    iao_charges,
    meta_lowdin_charges,
    occupied_orbitals,
    select_charges,
)

pyscf = pytest.importorskip("pyscf")

BOND = 1.595  # Å, LiH equilibrium bond length (handbook value, from memory)
BASES = ("sto-3g", "6-31g")
# (charge, 2S): LiH closed shell (restricted), LiH⁺ doublet (unrestricted)
STATES = ((0, 0), (1, 1))
SUM_TOL = 1e-6  # e


def _lih_atoms() -> Atoms:
    return Atoms("LiH", positions=[[0.0, 0.0, 0.0], [0.0, 0.0, BOND]])


def _hf(basis: str, charge: int, spin: int):
    """Converged HF of LiH / LiH⁺ straight from PySCF (RHF closed shell, UHF doublet)."""
    from pyscf import gto, scf

    mol = gto.M(
        atom=[("Li", (0.0, 0.0, 0.0)), ("H", (0.0, 0.0, BOND))],
        unit="Angstrom",
        basis=basis,
        charge=charge,
        spin=spin,
        verbose=0,
    )
    mf = scf.UHF(mol) if spin else scf.RHF(mol)
    mf.conv_tol = 1e-10
    mf.kernel()
    assert mf.converged
    return mf


def _sets(mf) -> dict[str, list[float]]:
    return compute_charge_sets(
        mf.mol, mf.make_rdm1(), occupied_orbitals(mf.mo_coeff, mf.mo_occ), s=mf.get_ovlp()
    )


def _independent_lowdin(mol, dm) -> np.ndarray:
    """Löwdin charges from diag(S½ D S½) with scipy's matrix square root (not PySCF's)."""
    d = np.asarray(dm)
    if d.ndim == 3:
        d = d[0] + d[1]
    s_half = np.real(scipy.linalg.sqrtm(mol.intor("int1e_ovlp")))
    pop = np.diag(s_half @ d @ s_half)
    per_atom = np.array([pop[a0:a1].sum() for _, _, a0, a1 in mol.aoslice_by_atom()])
    return mol.atom_charges() - per_atom


def _point_dipole_z(charges, mol) -> float:
    """z component of Σ q_A R_A (e·bohr); origin-independent for a neutral molecule."""
    return float(np.dot(charges, mol.atom_coords()[:, 2]))


@pytest.fixture(scope="module", params=[(b, c, s) for b in BASES for c, s in STATES])
def direct(request):
    basis, charge, spin = request.param
    mf = _hf(basis, charge, spin)
    return basis, charge, mf, _sets(mf)


# ---------------------------------------------------------------------------------------------
# the schemes, PySCF called directly (HF)


def test_every_scheme_recorded_and_sums_to_system_charge(direct):
    _, charge, mf, sets = direct
    assert list(sets) == list(SCHEMES)
    for name, q in sets.items():
        assert len(q) == mf.mol.natm
        # charges are nuclear charge minus population, so they add up to the system charge
        # (charge conservation; common practice for every population analysis)
        assert sum(q) == pytest.approx(charge, abs=SUM_TOL), name


def test_lowdin_matches_an_independent_computation(direct):
    _, _, mf, sets = direct
    # Löwdin populations are the diagonal of S½ D S½ (definition of symmetric orthogonalisation)
    ref = _independent_lowdin(mf.mol, mf.make_rdm1())
    np.testing.assert_allclose(sets["lowdin"], ref, atol=1e-8)


def test_meta_lowdin_is_pyscfs_mulliken_meta(direct):
    _, _, mf, sets = direct
    # the scheme is defined as PySCF's own meta-Löwdin analysis (mf.mulliken_meta)
    _, ref = mf.mulliken_meta(verbose=0)
    np.testing.assert_allclose(sets["meta-lowdin"], ref, atol=1e-10)


@pytest.mark.parametrize(
    ("basis", "charge", "spin"),
    # neutral LiH in STO-3G is left out: there Mulliken itself (and Löwdin) put a small
    # negative charge on Li, against the measured Li⁺H⁻ polarity (a minimal-basis artefact,
    # the reason for the other schemes), so agreeing with it is no test; see
    # test_neutral_polarity_follows_the_dipole for that case
    [("6-31g", 0, 0), ("sto-3g", 1, 1), ("6-31g", 1, 1)],
)
def test_signs_agree_with_mulliken(basis, charge, spin):
    sets = _sets(_hf(basis, charge, spin))
    ref = np.sign(sets["mulliken"])
    # common practice: a population analysis that changes only the partition of the density
    # should keep the polarity of the established (Mulliken) one where that is physical
    for name, q in sets.items():
        assert (np.sign(q) == ref).all(), (name, q, sets["mulliken"])
    if charge == 0:
        # Li⁺H⁻: polarity of the measured LiH dipole moment (handbook, from memory)
        assert ref.tolist() == [1.0, -1.0]


@pytest.mark.parametrize("basis", BASES)
def test_neutral_polarity_follows_the_dipole(basis):
    mf = _hf(basis, 0, 0)
    sets = _sets(mf)
    dip_z = float(mf.dip_moment(verbose=0, unit="AU")[2])
    # measured LiH dipole: negative end at H (handbook, from memory); H lies at +z here
    assert dip_z < 0
    # the charges of a scheme should give the dipole of the same density its direction
    # (charges derived from the density reproduce its dipole's sign: common practice)
    robust = ("iao", "meta-lowdin") if basis == "sto-3g" else SCHEMES
    for name in robust:
        q = sets[name]
        assert q[0] > 0 > q[1], (basis, name, q)
        assert np.sign(_point_dipole_z(q, mf.mol)) == np.sign(dip_z), name


def test_unrestricted_iao_of_a_closed_shell_equals_restricted():
    # the same closed-shell density given as two equal spins: per-spin IAOs must give the
    # restricted IAO charges (consistency of the per-spin construction)
    mf = _hf("6-31g", 0, 0)
    dm = mf.make_rdm1()
    occ = occupied_orbitals(mf.mo_coeff, mf.mo_occ)
    restricted = iao_charges(mf.mol, dm, occ)
    unrestricted = iao_charges(mf.mol, np.array([dm / 2, dm / 2]), (occ, occ))
    np.testing.assert_allclose(unrestricted, restricted, atol=1e-10)


def test_spin_density_input_is_summed_for_the_orthogonal_schemes():
    mf = _hf("6-31g", 1, 1)
    dm = mf.make_rdm1()
    total = dm[0] + dm[1]
    np.testing.assert_allclose(
        meta_lowdin_charges(mf.mol, dm), meta_lowdin_charges(mf.mol, total), atol=1e-12
    )


def test_a_failing_scheme_is_left_out_with_a_warning(caplog):
    mf = _hf("sto-3g", 0, 0)
    # every molecular orbital (6) as "occupied": more than the 3 functions of the IAO
    # reference basis of LiH, so the IAO scheme cannot hold the density and must give up
    with caplog.at_level(logging.WARNING, logger="ionwell.science.charges"):
        sets = compute_charge_sets(mf.mol, mf.make_rdm1(), mf.mo_coeff)
    assert "iao" not in sets
    assert set(sets) == {"mulliken", "lowdin", "meta-lowdin"}
    assert any("iao charges left out" in r.getMessage() for r in caplog.records)


def test_module_imports_without_pyscf():
    code = (
        "import sys, ionwell.science.charges; "
        "sys.exit(1 if any(m.split('.')[0] == 'pyscf' for m in sys.modules) else 0)"
    )
    assert subprocess.run([sys.executable, "-c", code], check=False).returncode == 0


# ---------------------------------------------------------------------------------------------
# selector


_ALL = {name: [float(i), -float(i)] for i, name in enumerate(SCHEMES, start=1)}


def test_auto_prefers_iao_then_meta_lowdin_then_lowdin_then_mulliken():
    assert AUTO_ORDER == ("iao", "meta-lowdin", "lowdin", "mulliken")
    sets = dict(_ALL)
    for expected in AUTO_ORDER:
        assert select_charges(sets, [9.0, -9.0], "auto", None) == (expected, _ALL[expected])
        del sets[expected]
    # recorded sets without any known scheme: nothing to take (the legacy charges are not
    # consulted when sets were recorded)
    assert select_charges({"other": [1.0, -1.0]}, [9.0, -9.0], "auto", None) is None


def test_named_scheme_recorded_or_none():
    for name in SCHEMES:
        assert select_charges(_ALL, None, name, None) == (name, _ALL[name])
    only_mulliken = {"mulliken": [0.5, -0.5]}
    for name in ("iao", "meta-lowdin", "lowdin"):
        assert select_charges(only_mulliken, [0.5, -0.5], name, None) is None


def test_legacy_charges_count_as_mulliken_or_their_label():
    q = [0.25, -0.25]
    for sets in (None, {}):
        assert select_charges(sets, q, "auto", None) == ("mulliken", q)
        assert select_charges(sets, q, "mulliken", None) == ("mulliken", q)
        assert select_charges(sets, q, "iao", None) is None
    # a labelled legacy scheme (e.g. tblite's) keeps its label and serves its base scheme
    assert select_charges(None, q, "auto", "mulliken (GFN2-xTB)") == ("mulliken (GFN2-xTB)", q)
    assert select_charges(None, q, "mulliken", "mulliken (GFN2-xTB)") == (
        "mulliken (GFN2-xTB)",
        q,
    )
    assert select_charges(None, q, "lowdin", "mulliken (GFN2-xTB)") is None
    assert select_charges(None, None, "auto", None) is None


def test_unknown_scheme_is_refused():
    with pytest.raises(ValueError, match="unknown charge scheme"):
        select_charges(_ALL, None, "bader", None)


# ---------------------------------------------------------------------------------------------
# the PySCF engine (LDA, coarse potential grid)


def _engine_run(basis: str, charge: int, workdir):
    from ionwell.engines.pyscf_engine import PyscfEngine

    cfg = PyscfEngineConfig(
        xc="lda,vwn",
        basis=basis,
        potential_grid=PotentialGridConfig(spacing=0.4, margin=2.5),
    )
    eng = PyscfEngine(cfg, RelaxConfig(enabled=False))
    eng.prepare(_lih_atoms(), workdir, ComputeContext(step=0, charge=charge))
    eng.run(workdir)
    result, _ = eng.collect(workdir)
    return result


@pytest.fixture(scope="module", params=[(b, c) for b in BASES for c, _ in STATES])
def engine(request, tmp_path_factory):
    basis, charge = request.param
    work = tmp_path_factory.mktemp(f"lih_{basis}_{charge}")
    return basis, charge, work, _engine_run(basis, charge, work)


def test_engine_records_every_scheme(engine):
    basis, charge, work, result = engine
    assert result.spin == (1 if charge else 0)  # LiH⁺: doublet, unrestricted
    assert list(result.charge_sets) == list(SCHEMES)
    # compatibility: charges and charge_scheme stay Mulliken
    assert result.charge_scheme == "mulliken"
    assert result.charges == result.charge_sets["mulliken"]
    assert "charge_sets" in json.loads((work / OUTPUT).read_text())
    for name, q in result.charge_sets.items():
        # charge conservation (common practice for every population analysis)
        assert sum(q) == pytest.approx(charge, abs=SUM_TOL), name
    signs = {name: np.sign(q).tolist() for name, q in result.charge_sets.items()}
    if (basis, charge) != ("sto-3g", 0):
        # common practice: the same polarity as Mulliken (left out for neutral LiH in STO-3G,
        # where Mulliken has the wrong sign; see test_signs_agree_with_mulliken)
        assert all(s == signs["mulliken"] for s in signs.values()), signs
    if charge == 0:
        # Li⁺H⁻: polarity of the measured LiH dipole moment (handbook, from memory)
        for name in ("iao", "meta-lowdin"):
            assert signs[name] == [1.0, -1.0], (name, signs)


def test_engine_lowdin_is_of_the_converged_density(engine):
    # the density saved in the step's checkpoint, S½ D S½ independently (scipy)
    from pyscf.scf import chkfile

    from ionwell.engines.pyscf_engine import CHECKPOINT

    _, _, work, result = engine
    mol, data = chkfile.load_scf(str(work / CHECKPOINT))
    mo, occ = np.asarray(data["mo_coeff"]), np.asarray(data["mo_occ"])
    pairs = zip(mo, occ, strict=True) if mo.ndim == 3 else [(mo, occ)]
    dm = sum((c * o) @ c.T for c, o in pairs)
    np.testing.assert_allclose(
        result.charge_sets["lowdin"], _independent_lowdin(mol, dm), atol=1e-8
    )


# ---------------------------------------------------------------------------------------------
# the tblite engine: Mulliken-type charges only


def test_tblite_records_mulliken_only(tmp_path):
    pytest.importorskip("tblite.ase")
    from ionwell.config.engines import TbliteEngineConfig
    from ionwell.engines.tblite_engine import TbliteEngine

    cfg = TbliteEngineConfig(potential_grid=PotentialGridConfig(spacing=0.4, margin=3.0))
    eng = TbliteEngine(cfg, RelaxConfig(enabled=False))
    eng.prepare(_lih_atoms(), tmp_path, ComputeContext(step=0))
    eng.run(tmp_path)
    result, _ = eng.collect(tmp_path)
    assert result.charge_sets == {"mulliken": result.charges}
    assert select_charges(result.charge_sets, result.charges, "auto", result.charge_scheme) == (
        "mulliken",
        result.charges,
    )
