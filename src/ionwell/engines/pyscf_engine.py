"""Embedded Kohn–Sham DFT through PySCF, run in-process (the default engine).

Files in the engine folder of a step:

=================  =====================================================================
``input.extxyz``   structure entering the compute (written by :meth:`PyscfEngine.prepare`)
``context.json``   the :class:`~ionwell.engines.base.ComputeContext` (charge, spin, movable)
``relax.traj``     ASE optimizer trajectory (only when a relaxation ran)
``relax.log``      ASE optimizer log
``pyscf.chk``      PySCF checkpoint of the final SCF (molecule, orbitals, occupations); the
                   next step's warm start reads it
``potential.npz``  potential map, volts, float32 (:func:`ionwell.io.npz.save_npz`)
``output.json``    every :class:`~ionwell.engines.base.StepResult` field, written last
``timings.json``   wall times of the stages and the SCF solvers used (diagnostics only)
=================  =====================================================================

Science in brief:

* restricted KS (RKS) for a closed shell, unrestricted (UKS) otherwise; ``spin=None`` picks 0
  for an even electron count, 1 for an odd one;
* the SCF runs DIIS (Coulomb term density-fitted unless ``density_fit`` is off). Without
  smearing, an open shell keeps its occupations by maximum overlap with reference orbitals, so
  DIIS does not swap the donated electron between near-degenerate levels of an aromatic host;
  a DIIS run that stalls hands over to PySCF's second-order (Newton) solver. Hosts whose
  frontier levels are (nearly) degenerate once guests donate electrons converge far better with
  Fermi smearing (``engine.smearing``). With smearing the analytic forces are the gradient of
  the Mermin free energy F = E - σS (checked by finite differences in the tests), so the
  relaxation minimises F; the result records F as ``free_energy`` and, as ``energy``, the
  estimate extrapolated to zero width, E - σS/2 (PySCF's ``e_zero``; ASE's convention for
  ``energy``), the quantity formation energies and the hull are built from;
* warm start (``engine.warm_start``): the first SCF of a step starts from the previous step's
  solution plus the new guests' atoms (:func:`warm_start_guess`): neutral guests as atomic
  orbitals orthonormalised together with the previous occupied orbitals, with the new electron
  count and spin; ions as neutral atomic densities, which keep the ion's bare charge out of the
  first Fock matrix. The guess used is recorded in ``StepResult.guess`` and the ledger,
  "cold: <why>" when the previous step cannot be used;
* relaxation uses an ASE optimizer on analytic PySCF gradients; each geometry's SCF starts from
  the previous geometry's orbitals and follows the same electronic state;
* the potential map is the potential felt by a positive test charge, nuclear minus electronic,
  either exact (one-electron integrals over blocks of grid points, contracted with the density
  matrix) or ``fitted`` (density fitted to an auxiliary basis, evaluated everywhere, then the
  deepest points and every local minimum re-evaluated exactly).
* atomic charges of the final density in four schemes (:mod:`ionwell.science.charges`):
  Mulliken (also ``StepResult.charges``, ``charge_scheme="mulliken"``), Löwdin, meta-Löwdin and
  intrinsic atomic orbitals (IAO), all in ``StepResult.charge_sets``.

Units are converted here and only here, with ``ase.units``: PySCF works in hartree and bohr.
"""

from __future__ import annotations

import json
import logging
import math
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms
from ase.calculators.calculator import Calculator, all_changes
from ase.units import Bohr, Hartree

from ionwell.config.campaign import PyscfEngineConfig
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.relax import relax_atoms
from ionwell.engines.results import (
    CONTEXT,
    INPUT,
    OUTPUT,
    POTENTIAL,
    InProcessEngine,
    read_inputs,
    write_output,
)
from ionwell.engines.results import atomic_write as _atomic_write
from ionwell.errors import ConfigError
from ionwell.io.npz import save_npz
from ionwell.science.charges import compute_charge_sets, occupied_orbitals
from ionwell.science.checks import level_order_gap
from ionwell.science.grid import Grid

__all__ = [
    "CONTEXT",
    "INPUT",
    "OUTPUT",
    "POTENTIAL",
    "PyscfCalculator",
    "PyscfEngine",
    "auto_construction",
    "build_mol",
    "electronic_potential",
    "fitted_electronic_potential",
    "grid_box",
    "nuclear_potential",
    "potential_map",
    "scf_energies",
    "warm_start_density",
    "warm_start_guess",
]

log = logging.getLogger("ionwell.engines.pyscf")

CHECKPOINT = "pyscf.chk"
TIMINGS = "timings.json"

#: Auxiliary basis for the ``fitted`` potential (H–Rn). Measured on water and benzene: about
#: 3× smaller potential errors than def2-universal-jfit, at similar cost.
FIT_BASIS = "def2-universal-jkfit"
#: Fraction of the grid, lowest fitted values first, that ``fitted`` re-evaluates exactly.
SHORTLIST_FRACTION = 0.02
#: Nuclear potential is evaluated no closer than this to a nucleus (bohr), so a grid point that
#: falls on a nucleus holds a large finite maximum instead of infinity.
_NUCLEUS_FLOOR = 1e-2
#: Memory budget for one block of integrals over grid points (bytes).
_BLOCK_BYTES = 256e6


# ---------------------------------------------------------------------------------------------
# molecule and SCF


def _pyscf():
    """Import PySCF lazily (it takes a second); returns the modules this file uses."""
    import pyscf
    from pyscf import df, dft, gto, lib, scf

    return pyscf, gto, dft, scf, df, lib


def build_mol(atoms: Atoms, basis: str, charge: int = 0, spin: int | None = None):
    """A PySCF ``Mole`` for ``atoms`` (Å) with ``charge`` and ``spin`` (2S).

    ``spin=None`` picks the lowest multiplicity the electron count allows (0 even, 1 odd).
    Raises ValueError when the charge leaves no electrons or the spin parity is impossible.
    """
    _, gto, *_ = _pyscf()
    nelec = int(atoms.get_atomic_numbers().sum()) - int(charge)
    if nelec <= 0:
        raise ValueError(f"charge {charge:+d} leaves {nelec} electrons")
    if spin is None:
        spin = nelec % 2
    elif spin < 0 or (nelec - spin) % 2 or spin > nelec:
        raise ValueError(f"spin 2S={spin} is impossible with {nelec} electrons")
    mol = gto.Mole()
    mol.atom = [
        (s, tuple(p)) for s, p in zip(atoms.get_chemical_symbols(), atoms.positions, strict=True)
    ]
    mol.unit = "Angstrom"
    mol.basis = basis
    mol.charge = int(charge)
    mol.spin = int(spin)
    mol.verbose = 0
    mol.symmetry = False
    mol.build()
    return mol


def _moved(mol, positions_ang: np.ndarray):
    """A copy of ``mol`` with new positions (Å)."""
    return mol.set_geom_(np.asarray(positions_ang, dtype=float), unit="Angstrom", inplace=False)


class _Stalled(Exception):
    """Raised from the DIIS callback when the SCF stopped making progress."""


class _KohnSham:
    """SCF and gradients for one molecule at changing geometries, remembering the density.

    Attributes after each :meth:`scf`: ``mf`` (the converged or last SCF object), ``dm`` (its
    density matrix), ``iterations`` (of that SCF), ``solver`` (e.g. 'diis', 'diis+mom',
    'diis+newton'), plus running totals over all geometries.
    """

    #: DIIS cycle after which a lack of progress counts as a stall.
    STALL_AFTER = 12
    #: Cycles without a new lowest energy that make a stall.
    STALL_WINDOW = 6

    def __init__(self, mol, cfg: PyscfEngineConfig) -> None:
        self.mol = mol
        self.cfg = cfg
        self.dm: np.ndarray | None = None
        self.mf = None
        self.iterations = 0
        self.solver = ""
        self.total_iterations = 0
        self.scf_count = 0
        self.scf_seconds = 0.0
        self.grad_seconds = 0.0
        self.solvers: list[str] = []
        #: the initial guess of the current SCF as recorded (the engine sets a warm start's)
        self.guess = COLD_GUESS
        # keep occupations by maximum overlap (open shells without smearing; every SCF after a
        # Newton fallback): DIIS otherwise swaps electrons between near-degenerate levels
        self.follow = self.open_shell and cfg.smearing == 0

    @property
    def open_shell(self) -> bool:
        return self.mol.spin != 0

    def _new_mf(self, mol, smearing: float | None = None):
        """A fresh RKS/UKS object; ``smearing`` (eV) overrides the configured width."""
        _, _, dft, scf, *_ = _pyscf()
        cfg = self.cfg
        sigma = cfg.smearing if smearing is None else smearing
        mf = dft.UKS(mol) if self.open_shell else dft.RKS(mol)
        mf.xc = cfg.xc
        mf.max_cycle = cfg.max_cycle
        mf.conv_tol = cfg.conv_tol
        mf.level_shift = cfg.level_shift
        # no closing Roothaan step once DIIS has converged (PySCF's conv_check): it costs one
        # more Fock build per SCF and, measured on the benzene bilayer + 2 Li⁺ (LDA/STO-3G),
        # leaves the density about twice as far from a tightly converged one (forces 5e-4
        # against 2e-4 eV/Å off). Kept with a level shift, whose removal is what it is for.
        mf.conv_check = cfg.level_shift > 0
        mf.verbose = 0
        mf.chkfile = None  # written once, at the end, by the engine
        if cfg.density_fit:
            # measured on benzene + Li⁺ (PBE/6-31G): nuclear gradient 4× faster (12 s → 3 s),
            # absolute energy shifted by 2 meV, forces changed by less than 1e-5 hartree/bohr
            mf = mf.density_fit(auxbasis=FIT_BASIS)
        if cfg.grid_level is not None:
            mf.grids.level = int(cfg.grid_level)
        if sigma > 0:
            # fix_spin keeps the requested spin: one chemical potential per spin channel
            scf.addons.smearing_(
                mf, sigma=sigma / Hartree, method="fermi", fix_spin=self.open_shell
            )
        return mf

    def _diis(self, mf, dm0, stall: bool = True) -> tuple[bool, int]:
        """Run DIIS from ``dm0``; returns (gave up, cycles). Gives up on a stall if ``stall``."""
        cfg = self.cfg
        seen: set[int] = set()
        best = {"e": math.inf, "cycle": 0}

        def watch(env: dict[str, Any]) -> None:
            cycle = int(env["cycle"])
            seen.add(cycle)
            e = float(env.get("e_tot", math.nan))
            log.debug("DIIS cycle %d: E = %.10f Ha", cycle + 1, e)
            if e < best["e"] - cfg.conv_tol:
                best.update(e=e, cycle=cycle)
            # oscillation between near-degenerate occupations: no new lowest energy for a while
            if (
                stall
                and cycle + 1 >= self.STALL_AFTER
                and cycle - best["cycle"] >= self.STALL_WINDOW
            ):
                raise _Stalled

        mf.callback = watch
        try:
            mf.kernel(dm0=dm0)
        except _Stalled:
            return True, len(seen)
        return False, len(seen)

    def _newton(self, mf, dm0=None, mo=None):
        """Second-order SCF from ``dm0``, or from ``mo=(coeff, occ)`` keeping that occupation
        pattern (state following between geometries). Returns (solved mf, macro iterations)."""
        cfg = self.cfg
        seen: set[int] = set()

        def watch(env: dict[str, Any]) -> None:
            cycle = int(env["imacro"])
            if cycle not in seen:
                seen.add(cycle)
                log.debug("Newton cycle %d: E = %.10f Ha", cycle + 1, env.get("e_tot"))

        nt = mf.newton()
        nt.max_cycle = cfg.max_cycle
        nt.conv_tol = cfg.conv_tol
        nt.verbose = 0
        nt.callback = watch
        if mo is not None:
            nt.kernel(mo[0], mo[1])
        else:
            nt.kernel(dm0=dm0)
        out = nt.undo_soscf()
        out.converged = nt.converged
        out.e_tot, out.mo_energy, out.mo_coeff, out.mo_occ = (
            nt.e_tot,
            nt.mo_energy,
            nt.mo_coeff,
            nt.mo_occ,
        )
        return out, len(seen)

    def scf(self, positions_ang: np.ndarray | None = None):
        """Run the SCF at ``positions_ang`` (Å; None: the molecule as built).

        The first SCF starts from ``self.dm`` (a warm start) or PySCF's ``minao`` guess; later
        SCFs (new geometries) start from the previous solution. Without smearing, an open shell
        keeps its occupation pattern by maximum overlap with reference orbitals (the guess's
        aufbau orbitals, or the previous geometry's orbitals), so DIIS does not swap electrons
        between near-degenerate levels and a relaxation follows one electronic state.

        When DIIS stalls or does not converge without smearing (electrons shared among
        near-degenerate levels, as when guests donate into a flake's π* levels), the
        second-order (Newton) solver takes over from the same guess, and later geometries follow
        its state with maximum overlap. That is robust but slow; Fermi smearing
        (``engine.smearing``) is the better model for such hosts.
        """
        t0 = time.perf_counter()
        cfg = self.cfg
        warm = self.mf is None and self.dm is not None
        mol = self.mol if positions_ang is None else _moved(self.mol, positions_ang)
        self.mol = mol
        mf = self._new_mf(mol)
        s1e = mf.get_ovlp()
        follow = self.follow
        ref = None
        if self.mf is not None:  # a new geometry: start from the previous solution
            ref = (_orthonormal(self.mf.mo_coeff, s1e), np.asarray(self.mf.mo_occ))
            dm0 = mf.make_rdm1(*ref)
        else:
            dm0 = self.dm if self.dm is not None else mf.get_init_guess(mol, "minao")
            if follow:  # reference: the aufbau orbitals of the guess
                e0, c0 = mf.eig(mf.get_fock(dm=dm0), s1e)
                ref = (c0, mf.get_occ(e0, c0))
        if follow:
            _keep_occupation(mf, *ref)
        stalled, iterations = self._diis(mf, dm0, stall=cfg.smearing == 0)
        solver = "diis+mom" if follow else "diis"
        if not stalled and not mf.converged and iterations < cfg.max_cycle:
            # PySCF's closing check cycle (run with a level shift only) can undo a convergence
            # that the loop had reached (seen with smearing): restart DIIS from where it ended
            mf.max_cycle = cfg.max_cycle - iterations
            stalled, more = self._diis(mf, mf.make_rdm1(), stall=cfg.smearing == 0)
            iterations += more
            log.info("DIIS restarted after its closing check failed: %d more cycles", more)
        if (stalled or not mf.converged) and cfg.smearing == 0:
            log.warning(
                "DIIS %s after %d cycles (near-degenerate levels?); switching to the Newton "
                "solver, which is slow. Consider engine.smearing (e.g. 0.1 eV) for this host.",
                "stalled" if stalled else "did not converge",
                iterations,
            )
            mf, more = self._newton(
                self._new_mf(mol), mo=ref if follow else None, dm0=None if follow else dm0
            )
            iterations += more
            solver += "+newton"
            self.follow = True
        elif stalled or not mf.converged:
            log.warning("SCF with smearing did not converge in %d cycles", iterations)
        suspect = warm and cfg.smearing == 0 and _aufbau_violation(mf) > AUFBAU_TOL
        if suspect:
            log.info(
                "warm-started SCF: an occupied level lies %.3f eV above an empty one",
                _aufbau_violation(mf) * Hartree,
            )
        self._store(mf, iterations, solver, t0)
        if warm and (suspect or solver.endswith("newton")):
            return self._against_cold(positions_ang)
        return self.mf

    def _store(self, mf, iterations: int, solver: str, t0: float) -> None:
        """Keep ``mf`` as the current solution and add its counts to the running totals."""
        self.mf = mf
        self.dm = mf.make_rdm1()
        self.iterations = iterations
        self.solver = solver
        self.solvers.append(solver)
        self.total_iterations += iterations
        self.scf_count += 1
        dt = time.perf_counter() - t0
        self.scf_seconds += dt
        log.info(
            "SCF %s in %d iterations (%s, %.1f s): E = %.6f eV",
            "converged" if mf.converged else "NOT converged",
            iterations,
            solver,
            dt,
            mf.e_tot * Hartree,
        )

    def _against_cold(self, positions_ang: np.ndarray | None):
        """Solve again from the fresh guess after a warm-started SCF that needed the Newton
        solver or left an empty level below an occupied one, and keep the lower of the two
        states (iterations: both SCFs).

        Measured (bench/warm_start.py, benzene bilayer + neutral Li, LDA/STO-3G): with
        near-degenerate levels several solutions exist, and from the warm guess the SCF reached
        one 0.604 eV (2 Li, Newton) and 0.752 eV (3 Li, DIIS with maximum overlap) above the
        fresh guess's. For Li⁺ (closed shells, DIIS) warm and cold agreed within 2e-7 eV.
        """
        warm_mf, warm_its, warm_solver = self.mf, self.iterations, self.solver
        log.info("checking the warm-started SCF: solving again from the fresh guess")
        self.mf, self.dm = None, None
        self.follow = self.open_shell and self.cfg.smearing == 0
        cold_mf = self.scf(positions_ang)
        diff = (warm_mf.e_tot - cold_mf.e_tot) * Hartree
        self.iterations += warm_its
        if warm_mf.converged and (diff <= 1e-6 or not cold_mf.converged):
            self.mf, self.dm, self.solver = warm_mf, warm_mf.make_rdm1(), warm_solver
            self.follow = True  # as after any Newton run: later geometries follow this state
            self.guess += f", checked against the fresh guess ({diff:+.2e} eV)"
        else:
            self.guess = f"{COLD_GUESS}, the warm start's state was {diff:.3f} eV higher"
            log.warning("the warm start reached a state %.3f eV above the fresh guess's", diff)
        return self.mf

    def gradient(self) -> np.ndarray:
        """Nuclear gradient of the last SCF, hartree/bohr, shape (natm, 3)."""
        t0 = time.perf_counter()
        g = self.mf.nuc_grad_method()
        g.verbose = 0
        grad = np.asarray(g.kernel())
        self.grad_seconds += time.perf_counter() - t0
        return grad


class PyscfCalculator(Calculator):
    """ASE calculator on a running PySCF Kohn–Sham model: energy (eV) and forces (eV/Å).

    Every new geometry warm-starts its SCF from the density of the previous one.
    """

    implemented_properties = ["energy", "free_energy", "forces"]

    def __init__(self, ks: _KohnSham, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.ks = ks

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        mf = self.ks.scf(self.atoms.positions)
        grad = self.ks.gradient()
        energy, free = scf_energies(mf)
        self.results = {
            "energy": energy,
            # the energy the forces are the gradient of (ASE's optimizers read this one)
            "free_energy": energy if free is None else free,
            "forces": -grad * (Hartree / Bohr),
        }


def scf_energies(mf) -> tuple[float, float | None]:
    """``(energy, free_energy)`` of a converged PySCF SCF, eV.

    Without smearing: ``(E, None)``. With Fermi smearing of width σ and electronic entropy S
    (PySCF's ``entropy``, dimensionless): the energy extrapolated to zero width, E - σS/2
    (PySCF's ``e_zero``), and the Mermin free energy F = E - σS (``e_free``), whose gradient
    PySCF's analytic forces are.
    """
    free = getattr(mf, "e_free", None)  # set by PySCF's smearing on every energy evaluation
    if free is None:
        return float(mf.e_tot) * Hartree, None
    return float(mf.e_zero) * Hartree, float(free) * Hartree


#: An occupied level this far (hartree) above an empty one of the same spin after a warm start
#: sends the step to :meth:`_KohnSham._against_cold` (the fresh guess can reach the same
#: occupation at the same energy, as on benzene + Li, or a lower state).
AUFBAU_TOL = 1e-4
#: The guess recorded for PySCF's own initial density.
COLD_GUESS = "atomic (minao)"


def _aufbau_violation(mf) -> float:
    """Largest (highest occupied − lowest empty) orbital energy per spin channel, hartree;
    positive when an empty level lies below an occupied one (not the aufbau occupation);
    -inf when there is nothing to compare (see :func:`~ionwell.science.checks.level_order_gap`,
    which the step check uses on the recorded levels)."""
    e = np.asarray(mf.mo_energy, dtype=float)
    o = np.asarray(mf.mo_occ, dtype=float)
    if e.ndim == 1:
        e, o = e[None], o[None]
    found = level_order_gap(e, o)
    return -math.inf if found is None else found[0]


def _keep_occupation(mf, mo_ref: np.ndarray, occ_ref: np.ndarray) -> None:
    """Make ``mf`` occupy, each cycle, the orbitals that overlap most with the occupied
    reference orbitals (maximum overlap against a fixed reference), per spin channel."""
    mo_ref, occ_ref = np.asarray(mo_ref), np.asarray(occ_ref)
    unrestricted = mo_ref.ndim == 3
    refs = (
        [(mo_ref[k][:, occ_ref[k] > 0], occ_ref[k]) for k in range(2)]
        if unrestricted
        else [(mo_ref[:, occ_ref > 0], occ_ref)]
    )
    s1e = mf.get_ovlp()

    def get_occ(mo_energy=None, mo_coeff=None):
        mo_coeff = mf.mo_coeff if mo_coeff is None else mo_coeff
        coeffs = mo_coeff if unrestricted else [mo_coeff]
        out = []
        for (c_occ, occ0), c in zip(refs, coeffs, strict=True):
            weight = ((c_occ.T @ s1e @ c) ** 2).sum(axis=0)
            keep = np.argsort(-weight, kind="stable")[: c_occ.shape[1]]
            occ = np.zeros(c.shape[1])
            occ[keep] = np.sort(occ0[occ0 > 0])[::-1]
            out.append(occ)
        return np.array(out) if unrestricted else out[0]

    mf.get_occ = get_occ


def _orthonormal(mo: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Löwdin-orthonormalise orbitals (per spin channel) in the overlap metric ``s``."""
    mo = np.asarray(mo)
    if mo.ndim == 3:
        return np.array([_orthonormal(c, s) for c in mo])
    w, v = np.linalg.eigh(mo.T @ s @ mo)
    return mo @ (v * w**-0.5) @ v.T


# ---------------------------------------------------------------------------------------------
# warm start

#: Ways to build the first density of a step from the previous step's checkpoint:
#: ``orbitals`` the previous occupied orbitals plus the new atoms' occupied atomic orbitals,
#: orthonormalised together in the new overlap metric (an idempotent density with the new
#: electron count and spin, cross blocks included); ``blocks`` the previous density per spin
#: plus the new atoms' atomic densities with the new electron count and spin, cross blocks zero;
#: ``neutral-atoms`` the previous density plus the new atoms' neutral atomic densities, cross
#: blocks zero, split evenly between the spin channels (an ion's electron count is wrong in the
#: guess; the first diagonalisation fills the right number of levels).
WARM_CONSTRUCTIONS = ("orbitals", "blocks", "neutral-atoms")
#: The engine's choice (:func:`auto_construction`): ``neutral-atoms`` when the new atoms are
#: ions, ``orbitals`` otherwise. With an ion's own electron count the guess holds its bare
#: charge in a density that has not responded to it, and the first Fock matrix is far off:
#: measured (bench/warm_start.py, Li⁺, LDA/STO-3G, step 1) the first cycle lands 2.7 eV
#: (benzene bilayer) and 30 eV (coronene bilayer) above the converged energy, against 0.37 and
#: 0.49 eV with neutral atoms; SCF cycles 9 and 15 against 8 and 11 (fresh guess: 9 and 11).
#: For neutral guests (Li, 0.1 eV smearing) the orbitals construction, which carries the new
#: spin, needs 0.83-1.12 of the fresh guess's cycles (medians) and neutral atoms about the same.
WARM_AUTO = "auto"
WARM_CONSTRUCTION = WARM_AUTO


def _spin_blocks(dm: np.ndarray, unrestricted: bool) -> np.ndarray:
    """Convert a density matrix to the shape an RKS (total) or UKS (alpha, beta) SCF takes."""
    dm = np.asarray(dm)
    if unrestricted:
        return dm if dm.ndim == 3 else np.array([dm / 2, dm / 2])
    return dm if dm.ndim == 2 else dm[0] + dm[1]


def _channels(mo: np.ndarray, occ: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """(orbitals with electrons, their occupations 0-1) per spin channel, alpha then beta."""
    if mo.ndim == 3:
        return [(c[:, o > 0], o[o > 0]) for c, o in zip(mo, occ, strict=True)]
    keep = occ > 0
    return [(mo[:, keep], occ[keep] / 2)] * 2


def _aufbau(energies: np.ndarray, n: float) -> np.ndarray:
    """Occupations 0-1 of levels ``energies`` holding ``n`` electrons (one spin channel), lowest
    first; a partly filled set of degenerate levels (within 1e-6 hartree) shares its electrons."""
    occ = np.zeros(len(energies))
    order = np.argsort(energies, kind="stable")
    left = float(n)
    i = 0
    while left > 1e-12 and i < len(order):
        group = [order[i]]
        while i + len(group) < len(order) and (
            energies[order[i + len(group)]] - energies[order[i]] < 1e-6
        ):
            group.append(order[i + len(group)])
        take = min(left, float(len(group)))
        occ[group] = take / len(group)
        left -= take
        i += len(group)
    return occ


def _new_atom_orbitals(mol, first: int) -> tuple[np.ndarray, np.ndarray]:
    """Spherically averaged atomic HF orbitals of atoms ``first``… of ``mol`` (PySCF's
    ``atom_hf``), embedded in ``mol``'s AO basis: (coefficients nao × k, energies hartree)."""
    from pyscf.scf import atom_hf

    with warnings.catch_warnings():  # PySCF's atomic SCF uses a deprecated helper of its own
        warnings.simplefilter("ignore", DeprecationWarning)
        atomic = atom_hf.get_atm_nrhf(mol)
    aoslice = mol.aoslice_by_atom()
    cols, energies = [], []
    for ia in range(first, mol.natm):
        symb = mol.atom_symbol(ia)
        if symb not in atomic:
            symb = mol.atom_pure_symbol(ia)
        _, e, c, _ = atomic[symb]
        p0, p1 = int(aoslice[ia, 2]), int(aoslice[ia, 3])
        block = np.zeros((mol.nao_nr(), c.shape[1]))
        block[p0:p1] = c
        cols.append(block)
        energies.append(np.asarray(e, dtype=float))
    return np.hstack(cols), np.concatenate(energies)


def auto_construction(mol, prev, n_prev: int) -> str:
    """The warm-start construction for ``mol`` after ``prev`` (whose atoms are ``mol``'s first
    ``n_prev``): ``neutral-atoms`` when the atoms added since bring another number of electrons
    than their neutral atoms (ions, e.g. Li⁺: 2 of 3), ``orbitals`` otherwise (see
    :data:`WARM_AUTO`)."""
    neutral = float(np.sum(mol.atom_charges()[n_prev:]))  # valence electrons with an ECP
    brought = mol.nelectron - prev.nelectron
    return "neutral-atoms" if mol.natm > n_prev and abs(brought - neutral) > 1e-8 else "orbitals"


def warm_start_guess(
    mol, chk: Path, unrestricted: bool, construction: str = WARM_CONSTRUCTION
) -> tuple[np.ndarray | None, str]:
    """Initial density for ``mol`` from a previous step's PySCF checkpoint.

    Usable when ``mol``'s atoms start with the previous molecule's atoms (same symbols in the
    same order, same basis): the previous step's solution describes the leading atoms, the new
    atoms (the guests added since) get atomic orbitals, and (``orbitals``, ``blocks``) the
    electrons they bring are the difference of the electron counts per spin channel (so a
    cation guest brings its core only, and the spin of the new system is right), or
    (``neutral-atoms``) their neutral atoms' electrons. ``construction`` is one of
    :data:`WARM_CONSTRUCTIONS` or ``auto`` (the engine's: :func:`auto_construction`). Returns
    (density matrix or None, the guess to record): e.g. ``"previous step (orbitals)"``, or
    ``"cold: atoms differ from the previous step"``.
    """
    if construction not in (*WARM_CONSTRUCTIONS, WARM_AUTO):
        raise ValueError(f"unknown warm-start construction {construction!r}")
    _, _, _, scf, *_ = _pyscf()
    try:
        prev, data = scf.chkfile.load_scf(str(chk))
    except Exception as err:  # h5py/KeyError/OSError: an unusable checkpoint is not fatal
        log.warning("warm start: cannot read %s (%s); using a fresh guess", chk, err)
        return None, "cold: previous checkpoint unreadable"
    n_prev = prev.natm
    if n_prev > mol.natm or [prev.atom_symbol(i) for i in range(n_prev)] != [
        mol.atom_symbol(i) for i in range(n_prev)
    ]:
        log.info("warm start: %s holds a different molecule; using a fresh guess", chk)
        return None, "cold: atoms differ from the previous step"
    nao_prev = prev.nao_nr()
    ao_end = int(mol.aoslice_by_atom()[n_prev - 1, 3])
    same_basis = ao_end == nao_prev and all(
        prev._basis.get(sym) == mol._basis.get(sym)
        for sym in {prev.atom_symbol(i) for i in range(n_prev)}
    )
    if not same_basis:
        log.info("warm start: %s used another basis; using a fresh guess", chk)
        return None, "cold: basis differs from the previous step"
    mo, occ = np.asarray(data["mo_coeff"]), np.asarray(data["mo_occ"], dtype=float)
    if construction == WARM_AUTO:
        construction = auto_construction(mol, prev, n_prev)
    label = f"previous step ({construction})"
    if construction == "neutral-atoms":
        return _with_neutral_atoms(mol, mo, occ, nao_prev, unrestricted), label

    channels = _channels(mo, occ)
    # electrons the new atoms bring, per spin channel; the previous channels may swap
    # (a previous excess of alpha electrons becomes beta) when that keeps both counts ≥ 0
    want = np.array(mol.nelec, dtype=float)
    have = np.array([o.sum() for _, o in channels])
    add = want - have
    if add.min() < -1e-8:
        channels, have = channels[::-1], have[::-1]
        add = want - have
    if add.min() < -1e-8:
        log.info("warm start: the new atoms would remove electrons; using a fresh guess")
        return None, "cold: electron count below the previous step's"
    nao = mol.nao_nr()
    if mol.natm > n_prev:
        c_new, e_new = _new_atom_orbitals(mol, n_prev)
    else:
        c_new, e_new = np.zeros((nao, 0)), np.zeros(0)
    s = mol.intor_symmetric("int1e_ovlp")
    dms = []
    for (c_prev, o_prev), n_add in zip(channels, add, strict=True):
        o_new = _aufbau(e_new, n_add)
        if o_new.sum() < n_add - 1e-8:
            log.info("warm start: the new atoms' orbitals cannot hold the electrons they bring")
            return None, "cold: too few orbitals on the new atoms"
        c_old = np.zeros((nao, c_prev.shape[1]))
        c_old[:nao_prev] = c_prev
        keep = o_new > 0
        c = np.hstack([c_old, c_new[:, keep]])
        o = np.concatenate([o_prev, o_new[keep]])
        if construction == "orbitals":
            c = _orthonormal(c, s)
        dms.append(scf.hf.make_rdm1(c, o))
    dm = np.array(dms)
    return (dm if unrestricted else dm[0] + dm[1]), label


def _with_neutral_atoms(
    mol, mo: np.ndarray, occ: np.ndarray, nao_prev: int, unrestricted: bool
) -> np.ndarray:
    """The ``neutral-atoms`` warm start: previous density plus neutral atomic densities,
    cross blocks zero, the atomic part split evenly between the spin channels."""
    _, _, _, scf, *_ = _pyscf()
    # unrestricted orbitals come as (alpha, beta)
    dm_prev = (scf.uhf if mo.ndim == 3 else scf.hf).make_rdm1(mo, occ)
    with warnings.catch_warnings():  # PySCF's atomic SCF uses a deprecated helper of its own
        warnings.simplefilter("ignore", DeprecationWarning)
        dm = np.asarray(scf.hf.init_guess_by_atom(mol))
    dm[:nao_prev, :] = 0.0
    dm[:, :nao_prev] = 0.0
    dm = _spin_blocks(dm, unrestricted)
    dm[..., :nao_prev, :nao_prev] = _spin_blocks(dm_prev, unrestricted)
    return dm


def warm_start_density(mol, chk: Path, unrestricted: bool) -> np.ndarray | None:
    """Initial density for ``mol`` from a previous step's checkpoint, or None
    (:func:`warm_start_guess` with the engine's construction, without the label)."""
    return warm_start_guess(mol, chk, unrestricted)[0]


# ---------------------------------------------------------------------------------------------
# electrostatic potential


def grid_box(positions: np.ndarray, spacing: float, margin: float) -> tuple[np.ndarray, tuple]:
    """Axis-aligned grid around ``positions`` (Å): returns (origin Å, shape).

    The box is the atoms' bounding box plus ``margin`` on every side, rounded up to whole
    spacings and centred on the bounding box.
    """
    pos = np.asarray(positions, dtype=float).reshape(-1, 3)
    lo, hi = pos.min(axis=0), pos.max(axis=0)
    n = np.ceil((hi - lo + 2 * margin) / spacing - 1e-9).astype(int) + 1
    centre = (lo + hi) / 2
    origin = centre - (n - 1) / 2 * spacing
    return origin, tuple(int(x) for x in n)


def nuclear_potential(mol, points_bohr: np.ndarray) -> np.ndarray:
    """Σ_A Z_A / |r − R_A| at ``points_bohr`` (hartree/e), distances floored at 0.01 bohr."""
    pts = np.asarray(points_bohr, dtype=float)
    out = np.zeros(len(pts))
    for z, r in zip(mol.atom_charges(), mol.atom_coords(), strict=True):
        d = np.sqrt(((pts - r) ** 2).sum(axis=1))
        out += z / np.maximum(d, _NUCLEUS_FLOOR)
    return out


def _block_size(per_point_bytes: float) -> int:
    return int(max(32, min(8192, _BLOCK_BYTES // max(per_point_bytes, 1.0))))


def electronic_potential(mol, dm: np.ndarray, points_bohr: np.ndarray) -> np.ndarray:
    """Exact potential of the electron density at ``points_bohr`` (hartree/e, positive).

    ∫ ρ(r') / |r − r'| dr' = Σ_ij D_ij (i| 1/|r − r'| |j), evaluated with PySCF's
    ``int1e_grids`` over blocks of points (hermitian: half the integrals).
    """
    _, _, _, _, _, lib = _pyscf()
    dm = np.asarray(dm)
    if dm.ndim == 3:
        dm = dm[0] + dm[1]
    nao = dm.shape[0]
    d = ((dm + dm.T) / 2).ravel()
    pts = np.asarray(points_bohr, dtype=float).reshape(-1, 3)
    out = np.empty(len(pts))
    block = _block_size(8.0 * nao * nao)
    for p0, p1 in lib.prange(0, len(pts), block):
        ints = mol.intor("int1e_grids", grids=pts[p0:p1], hermi=1)
        out[p0:p1] = ints.reshape(p1 - p0, -1) @ d
    return out


class _FittedDensity:
    """The electron density fitted to an auxiliary basis in the Coulomb metric.

    ρ ≈ Σ_P c_P χ_P with c = (P|Q)⁻¹ (Q|ij) D_ij; its potential at a point is Σ_P c_P (P|δ_r).
    """

    def __init__(self, mol, dm: np.ndarray, auxbasis: str = FIT_BASIS) -> None:
        _, gto, _, _, df, lib = _pyscf()
        dm = np.asarray(dm)
        if dm.ndim == 3:
            dm = dm[0] + dm[1]
        try:
            auxmol = df.addons.make_auxmol(mol, auxbasis)
        except (KeyError, RuntimeError, ValueError):
            auxmol = df.addons.make_auxmol(mol, df.addons.make_auxbasis(mol))
        self.auxmol = auxmol
        nao = mol.nao_nr()
        # (P|ρ) over blocks of auxiliary shells, bounded memory
        rho = np.empty(auxmol.nao_nr())
        ao_loc = auxmol.ao_loc_nr()
        per_shell = 8.0 * nao * nao * max(np.diff(ao_loc).max(), 1)
        step = max(1, int(_BLOCK_BYTES // per_shell))
        d = dm.ravel()
        for s0 in range(0, auxmol.nbas, step):
            s1 = min(auxmol.nbas, s0 + step)
            j3c = df.incore.aux_e2(
                mol, auxmol, "int3c2e", aosym="s1", shls_slice=(0, mol.nbas, 0, mol.nbas, s0, s1)
            )
            rho[ao_loc[s0] : ao_loc[s1]] = d @ j3c.reshape(nao * nao, -1)
        j2c = auxmol.intor("int2c2e", hermi=1)
        self.coef = _solve_psd(j2c, rho)
        self._gto, self._lib = gto, lib

    def potential(self, points_bohr: np.ndarray) -> np.ndarray:
        """Potential of the fitted density at ``points_bohr`` (hartree/e)."""
        pts = np.asarray(points_bohr, dtype=float).reshape(-1, 3)
        out = np.empty(len(pts))
        block = _block_size(8.0 * self.auxmol.nao_nr())
        for p0, p1 in self._lib.prange(0, len(pts), block):
            fake = self._gto.fakemol_for_charges(pts[p0:p1])
            out[p0:p1] = self.coef @ self._gto.intor_cross("int2c2e", self.auxmol, fake)
        return out


def _solve_psd(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve a symmetric positive (semi)definite system, dropping near-null directions."""
    try:
        import scipy.linalg

        return scipy.linalg.cho_solve(scipy.linalg.cho_factor(a), b)
    except np.linalg.LinAlgError:
        w, v = np.linalg.eigh(a)
        keep = w > 1e-10 * w.max()
        return v[:, keep] @ ((v[:, keep].T @ b) / w[keep])


def fitted_electronic_potential(mol, dm: np.ndarray, points_bohr: np.ndarray) -> np.ndarray:
    """Potential of the density fitted to :data:`FIT_BASIS` at ``points_bohr`` (hartree/e)."""
    return _FittedDensity(mol, dm).potential(points_bohr)


def _shortlist(values: np.ndarray, fraction: float) -> np.ndarray:
    """Boolean mask: the lowest ``fraction`` of ``values`` and every local minimum (26
    neighbours), each grown by one grid point in every direction."""
    from scipy import ndimage

    flat = values.ravel()
    k = max(1, int(math.ceil(fraction * flat.size)))
    keep = np.zeros(flat.size, dtype=bool)
    keep[np.argpartition(flat, k - 1)[:k]] = True
    keep = keep.reshape(values.shape)
    keep |= ndimage.minimum_filter(values, size=3, mode="nearest") == values
    return ndimage.binary_dilation(keep, structure=np.ones((3, 3, 3), dtype=bool))


def potential_map(
    mol,
    dm: np.ndarray,
    positions_ang: np.ndarray,
    spacing: float,
    margin: float,
    method: str = "exact",
    timings: dict[str, float] | None = None,
) -> Grid:
    """The potential felt by a positive test charge (nuclear − electronic), volts, on a grid.

    ``method='exact'`` evaluates every point exactly; ``'fitted'`` evaluates a fitted density
    everywhere and re-evaluates exactly :func:`_shortlist` (the deepest points and every local
    minimum with their neighbours), so the wells are exact.
    """
    t0 = time.perf_counter()
    origin, shape = grid_box(positions_ang, spacing, margin)
    axes = np.eye(3) * spacing
    pts = (origin + np.indices(shape).reshape(3, -1).T * spacing) / Bohr
    vnuc = nuclear_potential(mol, pts)
    if method == "exact":
        v = vnuc - electronic_potential(mol, dm, pts)
        exact_points = len(pts)
    elif method == "fitted":
        fit = _FittedDensity(mol, dm)
        v = vnuc - fit.potential(pts)
        t_fit = time.perf_counter() - t0
        sel = _shortlist(v.reshape(shape), SHORTLIST_FRACTION).ravel()
        v[sel] = vnuc[sel] - electronic_potential(mol, dm, pts[sel])
        exact_points = int(sel.sum())
        if timings is not None:
            timings["potential_fitted_part"] = t_fit
    else:
        raise ValueError(f"unknown potential method {method!r} (expected 'exact' or 'fitted')")
    dt = time.perf_counter() - t0
    if timings is not None:
        timings["potential"] = dt
    log.info(
        "potential map (%s): %d points, %d exact, %.1f s",
        method,
        len(pts),
        exact_points,
        dt,
    )
    values = (v * Hartree).reshape(shape).astype(np.float32)
    return Grid(origin=origin, axes=axes, values=values, pbc=(False, False, False))


# ---------------------------------------------------------------------------------------------
# analysis of the final SCF


def _orbitals(mf) -> tuple[list[list[float]], list[list[float]], float | None, float | None]:
    """Orbital energies and occupations per spin channel (eV), HOMO and LUMO (eV).

    HOMO is the highest level at least half filled, LUMO the lowest level less than half
    filled (per channel; without smearing this is the usual definition).
    """
    e = np.asarray(mf.mo_energy, dtype=float)
    o = np.asarray(mf.mo_occ, dtype=float)
    if e.ndim == 1:
        e, o, full = e[None], o[None], 2.0
    else:
        full = 1.0
    filled = o >= full / 2
    homo = float(e[filled].max()) * Hartree if filled.any() else None
    lumo = float(e[~filled].min()) * Hartree if (~filled).any() else None
    return (e * Hartree).tolist(), o.tolist(), homo, lumo


def _charge_sets(mf, dm: np.ndarray) -> dict[str, list[float]]:
    """Atomic charges (e) of the converged density ``dm`` in every scheme of
    :mod:`ionwell.science.charges` (Mulliken, Löwdin, meta-Löwdin, IAO).

    The IAOs are built from the orbitals occupied above
    :data:`~ionwell.science.charges.OCCUPIED_THRESHOLD` (fractional, smeared levels included),
    per spin for UKS. Mulliken errors propagate; another scheme that fails is logged and left
    out. Matrix operations on the final SCF only: no SCF is rerun.
    """
    t0 = time.perf_counter()
    occ = occupied_orbitals(mf.mo_coeff, mf.mo_occ)
    sets = compute_charge_sets(mf.mol, dm, occ, s=mf.get_ovlp())
    log.info("atomic charges (%s) in %.2f s", ", ".join(sets), time.perf_counter() - t0)
    return sets


def _fermi_level(mf, sigma_ev: float) -> float | None:
    """Chemical potential of a Fermi-smeared SCF (eV), None without smearing.

    Solved per spin channel from the orbital energies and the electron count of that channel;
    with two channels (fixed spin) the higher of the two is reported.
    """
    if sigma_ev <= 0:
        return None
    from scipy.optimize import brentq

    e = np.asarray(mf.mo_energy, dtype=float) * Hartree
    o = np.asarray(mf.mo_occ, dtype=float)
    if e.ndim == 1:
        e, o, full = e[None], o[None], 2.0
    else:
        full = 1.0
    mus = []
    for ec, oc in zip(e, o, strict=True):
        n = oc.sum()

        def excess(mu: float, ec=ec, n=n) -> float:
            x = np.clip((ec - mu) / sigma_ev, -200, 200)
            return float((full / (1 + np.exp(x))).sum() - n)

        lo, hi = ec.min() - 50 * sigma_ev, ec.max() + 50 * sigma_ev
        if excess(lo) * excess(hi) > 0:
            continue
        mus.append(brentq(excess, lo, hi, xtol=1e-10))
    return max(mus) if mus else None


# ---------------------------------------------------------------------------------------------
# the engine


def _checked_mol(atoms: Atoms, cfg: PyscfEngineConfig, context: ComputeContext, workdir: Path):
    """Build the molecule; an unusable charge, spin, basis or functional is a ConfigError."""
    _, _, dft, *_ = _pyscf()
    try:
        dft.libxc.parse_xc(cfg.xc)
    except (KeyError, ValueError, NotImplementedError) as err:
        raise ConfigError(
            f"engine.xc: PySCF does not know the functional {cfg.xc!r} ({err})"
        ) from None
    try:
        return build_mol(atoms, cfg.basis, context.charge, context.spin)
    except ValueError as err:
        raise ConfigError(
            f"{workdir / CONTEXT}: step {context.step} cannot be computed: {err}"
        ) from None
    except Exception as err:  # PySCF raises several kinds for an unknown basis
        raise ConfigError(
            f"engine.basis: PySCF cannot build basis {cfg.basis!r} for "
            f"{sorted(set(atoms.get_chemical_symbols()))} ({err})"
        ) from None


class PyscfEngine(InProcessEngine):
    """In-process Kohn–Sham DFT with PySCF (see the module docstring for files and methods)."""

    name = "pyscf"
    code = "PySCF"

    def run(self, workdir: Path) -> None:
        """Compute the step described by ``workdir``'s inputs and write the outputs."""
        t_start = time.perf_counter()
        workdir = Path(workdir)
        pyscf, _, _, _, _, lib = _pyscf()
        cfg, rcfg = self.cfg, self.relax
        atoms, context = read_inputs(workdir)
        if cfg.threads:
            lib.num_threads(cfg.threads)

        mol = _checked_mol(atoms, cfg, context, workdir)
        ks = _KohnSham(mol, cfg)
        log.info(
            "pyscf %s: %d atoms, %d AOs, charge %+d, 2S=%d, %s %s/%s, %d threads",
            pyscf.__version__,
            mol.natm,
            mol.nao_nr(),
            mol.charge,
            mol.spin,
            "UKS" if ks.open_shell else "RKS",
            cfg.xc,
            cfg.basis,
            lib.num_threads(),
        )

        if cfg.warm_start and context.previous is not None:
            chk = Path(context.previous) / CHECKPOINT
            if chk.is_file():
                dm0, label = warm_start_guess(mol, chk, ks.open_shell)
                ks.guess = label
                if dm0 is not None:
                    ks.dm = dm0
                    log.info("warm start from %s: %s", chk, label)
            else:
                ks.guess = f"cold: no {CHECKPOINT} in the previous step"
                log.info("warm start: no %s; using a fresh guess", chk)

        movable = sorted({int(i) for i in context.movable if 0 <= int(i) < len(atoms)})
        relax_converged: bool | None = None
        relax_steps = 0
        if rcfg.enabled and movable:
            relax_converged, relax_steps, forces = self._relax(atoms, ks, movable, workdir)
        else:
            ks.scf()
            forces = -ks.gradient() * (Hartree / Bohr)
        mf = ks.mf
        final_positions = mf.mol.atom_coords(unit="Angstrom")

        t0 = time.perf_counter()
        timings: dict[str, float] = {}
        grid = None
        if context.potential:
            grid = potential_map(
                mf.mol,
                ks.dm,
                final_positions,
                cfg.potential_grid.spacing,
                cfg.potential_grid.margin,
                cfg.potential_method,
                timings,
            )
            save_npz(workdir / POTENTIAL, grid)
        t_pot = time.perf_counter() - t0

        from pyscf.scf import chkfile

        chk_out = workdir / CHECKPOINT
        chk_out.unlink(missing_ok=True)
        chkfile.dump_scf(mf.mol, str(chk_out), mf.e_tot, mf.mo_energy, mf.mo_coeff, mf.mo_occ)

        energies, occupations, homo, lumo = _orbitals(mf)
        charge_sets = _charge_sets(mf, ks.dm)
        energy, free_energy = scf_energies(mf)
        result = StepResult(
            energy=energy,
            free_energy=free_energy,
            forces=np.asarray(forces, dtype=float).tolist(),
            scf_converged=bool(mf.converged),
            scf_iterations=ks.iterations,
            relax_converged=relax_converged,
            relax_steps=relax_steps,
            symbols=atoms.get_chemical_symbols(),
            positions=np.asarray(final_positions, dtype=float).tolist(),
            charge=int(mol.charge),
            spin=int(mol.spin),
            charges=charge_sets["mulliken"],
            charge_scheme="mulliken",
            charge_sets=charge_sets,
            orbital_energies=energies,
            occupations=occupations,
            fermi_level=_fermi_level(mf, cfg.smearing),
            homo=homo,
            lumo=lumo,
            code="pyscf",
            code_version=str(pyscf.__version__),
            wall_time=time.perf_counter() - t_start,
            warm_started=ks.guess.startswith("previous step"),
            guess=ks.guess,
            potential_file=POTENTIAL if grid is not None else None,
        )
        diag = {
            "wall_time": result.wall_time,
            "scf_count": ks.scf_count,
            "scf_seconds": ks.scf_seconds,
            "scf_iterations_total": ks.total_iterations,
            "gradient_seconds": ks.grad_seconds,
            "potential_seconds": t_pot,
            "potential_method": cfg.potential_method,
            "density_fit": cfg.density_fit,
            "grid_level": cfg.grid_level,
            "grid_shape": None if grid is None else list(grid.shape),
            "solvers": ks.solvers,
            "nao": int(mol.nao_nr()),
            "threads": int(lib.num_threads()),
            **{f"detail_{k}": v for k, v in timings.items()},
        }
        _atomic_write(workdir / TIMINGS, json.dumps(diag, indent=2) + "\n")
        write_output(workdir, result)
        log.info(
            "pyscf done in %.1f s: E = %.6f eV, SCF %s, %d SCF runs (%.1f s), gradients %.1f s, "
            "potential %.1f s",
            result.wall_time,
            result.energy,
            "converged" if result.scf_converged else "NOT converged",
            ks.scf_count,
            ks.scf_seconds,
            ks.grad_seconds,
            t_pot,
        )

    # -- relaxation -----------------------------------------------------------------------

    def _relax(
        self, atoms: Atoms, ks: _KohnSham, movable: list[int], workdir: Path
    ) -> tuple[bool, int, np.ndarray]:
        """Relax the ``movable`` atoms (others fixed); returns (converged, steps, forces eV/Å).

        Each geometry's SCF starts from the previous one's orbitals (:class:`PyscfCalculator`);
        the last evaluation is at the final geometry, so ``ks`` then describes it.
        """
        converged, steps, _, forces = relax_atoms(
            atoms, PyscfCalculator(ks), movable, self.relax, workdir
        )
        return converged, steps, forces
