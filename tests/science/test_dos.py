"""Density of states with Gaussian broadening, on orbital energies from real PySCF runs."""

from __future__ import annotations

import numpy as np
import pytest
from ase.units import Hartree
from pyscf import dft, gto
from scipy.integrate import trapezoid

from ionwell.errors import IonwellError
from ionwell.science.dos import dos_on_grid, frontier_level, level_weights, states_count

BENZENE = """
C 1.3970 0.0000 0.0; C 0.6985 1.2098 0.0; C -0.6985 1.2098 0.0
C -1.3970 0.0000 0.0; C -0.6985 -1.2098 0.0; C 0.6985 -1.2098 0.0
H 2.4810 0.0000 0.0; H 1.2405 2.1486 0.0; H -1.2405 2.1486 0.0
H -2.4810 0.0000 0.0; H -1.2405 -2.1486 0.0; H 1.2405 -2.1486 0.0
"""


def _levels(mf) -> tuple[list[list[float]], list[list[float]]]:
    e = np.asarray(mf.mo_energy) * Hartree
    o = np.asarray(mf.mo_occ, dtype=float)
    if e.ndim == 1:
        e, o = e[None], o[None]
    return e.tolist(), o.tolist()


@pytest.fixture(scope="module")
def benzene_rks():
    mol = gto.M(atom=BENZENE, basis="sto-3g", verbose=0)
    mf = dft.RKS(mol, xc="lda,vwn").run()
    return mol, mf


@pytest.fixture(scope="module")
def water_cation_uks():
    # H2O+ doublet (geometry of neutral water, O–H 0.96 Å, 104.5°: handbook values from memory)
    mol = gto.M(
        atom="O 0 0 0; H 0.7572 0.5865 0; H -0.7572 0.5865 0",
        basis="sto-3g",
        charge=1,
        spin=1,
        verbose=0,
    )
    mf = dft.UKS(mol, xc="lda,vwn").run()
    assert mf.converged
    return mol, mf


def _window(levels, pad: float) -> tuple[float, float]:
    flat = np.concatenate([np.asarray(c) for c in levels])
    return float(flat.min() - pad), float(flat.max() + pad)


def test_restricted_dos_integrates_to_twice_the_orbital_count(benzene_rks):
    # A normalised Gaussian per level, two states per spatial orbital when spin-restricted
    # (common practice); PySCF's orbital count (mol.nao for sto-3g benzene: 36) is the reference.
    mol, mf = benzene_rks
    levels, occ = _levels(mf)
    assert states_count(levels) == 2 * mol.nao
    lo, hi = _window(levels, 3.0)
    x, y = dos_on_grid(levels, lo, hi, npts=6000, width=0.2)
    assert trapezoid(y, x) == pytest.approx(2 * mol.nao, rel=1e-4)
    # weighted by the occupations it integrates to PySCF's electron count (42)
    x, yocc = dos_on_grid(levels, lo, hi, npts=6000, width=0.2, occupations=occ, occupied=True)
    assert trapezoid(yocc, x) == pytest.approx(mol.nelectron, rel=1e-4)
    # the occupied DOS vanishes well above the HOMO, which PySCF places below the LUMO
    homo = max(e for e, o in zip(levels[0], occ[0], strict=True) if o > 0)
    assert yocc[x > homo + 2.0].max() < 1e-6


def test_unrestricted_dos_counts_one_state_per_level(water_cation_uks):
    # two spin channels: nao states each (PySCF UKS), 9 electrons for H2O+
    mol, mf = water_cation_uks
    levels, occ = _levels(mf)
    assert len(levels) == 2
    assert states_count(levels) == 2 * mol.nao
    lo, hi = _window(levels, 3.0)
    x, y = dos_on_grid(levels, lo, hi, npts=6000, width=0.3, occupations=occ, occupied=True)
    assert trapezoid(y, x) == pytest.approx(mol.nelectron, rel=1e-4)


def test_broadening_is_a_gaussian_of_the_given_width():
    # A single level at 0 eV (restricted: 2 states): the peak height of a normalised Gaussian is
    # 2 / (σ √(2π)) and its full width at half maximum is 2 √(2 ln 2) σ (textbook Gaussian).
    sigma = 0.25
    x, y = dos_on_grid([[0.0]], -3.0, 3.0, npts=60001, width=sigma)
    assert y.max() == pytest.approx(2 / (sigma * np.sqrt(2 * np.pi)), rel=1e-6)
    above = x[y >= y.max() / 2]
    assert above[-1] - above[0] == pytest.approx(2 * np.sqrt(2 * np.log(2)) * sigma, abs=2e-4)


def test_frontier_prefers_the_fermi_level():
    assert frontier_level(-4.0, -5.0, -3.0).kind == "fermi"
    f = frontier_level(None, -5.0, -3.0)
    assert (f.kind, f.value, f.gap) == ("homo", -5.0, 2.0)
    assert frontier_level(None, None, None) is None


def test_bad_inputs_name_what_was_expected():
    with pytest.raises(IonwellError, match="one or two spin channels"):
        level_weights([[0.0], [1.0], [2.0]])
    with pytest.raises(IonwellError, match="one occupation per orbital"):
        level_weights([[0.0, 1.0]], [[2.0]], occupied=True)
    with pytest.raises(IonwellError, match="positive value in eV"):
        dos_on_grid([[0.0]], -1, 1, width=0.0)
