"""GFN2-xTB / GFN1-xTB tight binding through the ``tblite`` library, run in-process.

Files in the engine folder of a step (as the pyscf engine, see :mod:`ionwell.engines.results`):

=================  =====================================================================
``input.extxyz``   structure entering the compute (written by :meth:`TbliteEngine.prepare`)
``context.json``   the :class:`~ionwell.engines.base.ComputeContext` (charge, spin, movable)
``relax.traj``     ASE optimizer trajectory (only when a relaxation ran)
``relax.log``      ASE optimizer log
``potential.npz``  potential map, volts, float32 (:func:`ionwell.io.npz.save_npz`)
``output.json``    every :class:`~ionwell.engines.base.StepResult` field, written last
``timings.json``   wall times and counts of the stages (diagnostics only)
=================  =====================================================================

Science in brief:

* the self-consistent charge (SCC) tight-binding model of tblite (GFN2-xTB by default) for a
  finite cluster; periodicity is ignored. ``spin=None`` picks 2S = 0 for an even electron count,
  1 for an odd one; tblite keeps one set of orbitals and fills ``uhf`` more alpha than beta
  electrons, with Fermi smearing at the electronic temperature (``engine.electronic_temperature``,
  K; 0 is allowed). An SCC that does not converge in ``engine.max_cycle`` iterations is recorded
  with ``scf_converged=False`` and tblite's last (finite) energy and gradient;
* atomic charges are tblite's Mulliken charges of the SCC density (the charges its
  electrostatics uses), scheme ``"mulliken (GFN2-xTB)"`` / ``"mulliken (GFN1-xTB)"``, and the
  only entry of ``StepResult.charge_sets`` (``"mulliken"``);
* relaxation uses an ASE optimizer (:func:`ionwell.engines.relax.relax_atoms`) on tblite's
  analytic gradients; each geometry's SCC restarts from the previous geometry's result.

The potential map is an **approximation** (``StepResult.potential_model`` says so): a tight-
binding model has no electron density in space, so the map is the electrostatic potential of
the atomic multipoles tblite reports — a Gaussian charge ``q_A`` of width ``a_A`` and a
Gaussian dipole ``μ_A`` (the Mulliken atomic dipoles that GFN2-xTB's anisotropic electrostatics
uses, read from tblite's ``xtbml_xyz`` post-processing; GFN1-xTB reports them too) on every atom:

    V(r) = k Σ_A [ q_A erf(d/a_A) / d  +  (μ_A · d⃗) g(d/a_A) / d³ ],  d⃗ = r − R_A,
    g(x) = erf(x) − (2x/√π) exp(−x²),  k = Hartree·Bohr = 14.3996 V·Å/e (ase.units),

in volts, the potential felt by a positive test charge (:mod:`ionwell.science.grid`'s convention). The
widths are the elements' covalent radii (``ase.data.covalent_radii``, Cordero et al. 2008), a
choice of this module (Gaussian charges of about atomic size, as in charge-equilibration
models): beyond about 2.5 widths from a nucleus the terms are those of point multipoles to
within 0.1 %; inside, the Gaussians keep the map finite (a charge's term peaks at
``2 k q_A / (√π a_A)`` at its nucleus, a dipole's vanishes there). What the model leaves out:
the positive potential of the screened nuclei inside the electron cloud (the exact map rises
steeply towards every nucleus) and all higher multipoles, so close to atoms (within about
2 Å) the map is qualitative; far from the cluster it tends to Coulomb's law for the total
charge, k Q / r.

Units are converted here and only here, with ``ase.units``: tblite works in hartree and bohr.
"""

from __future__ import annotations

import ctypes
import json
import logging
import math
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms
from ase.calculators.calculator import Calculator, all_changes
from ase.data import covalent_radii
from ase.units import Bohr, Hartree, kB

from ionwell.config.engines import TbliteEngineConfig
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.pyscf_engine import grid_box
from ionwell.engines.relax import relax_atoms
from ionwell.engines.results import (
    CONTEXT,
    POTENTIAL,
    InProcessEngine,
    atomic_write,
    collect_outputs,
    read_inputs,
    write_output,
)
from ionwell.errors import ConfigError, EngineOutputError
from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid

__all__ = [
    "COULOMB",
    "TbliteCalculator",
    "TbliteEngine",
    "fermi_level",
    "multipole_potential",
    "potential_map",
    "smearing_widths",
    "xtb_calculator",
]

log = logging.getLogger("ionwell.engines.tblite")

TIMINGS = "timings.json"
#: Coulomb constant in V·Å/e (= eV·Å/e²): one hartree times one bohr, 14.3996 (ase.units).
COULOMB = Hartree * Bohr
#: Post-processing of tblite that reports the atomic dipoles (and other per-atom features).
_DIPOLE_POSTPROCESSING = "xtbml_xyz"
#: Beyond this many widths erf(x) equals 1 to double precision (erfc(6) = 2e-17).
_ERF_RANGE = 6.0
#: Below this many widths the dipole term uses its series (the closed form cancels badly).
_SERIES_BELOW = 1e-2
#: Grid points per block of the potential evaluation (bounds memory).
_BLOCK_POINTS = 262_144


#: The guess recorded per step: tblite cannot restart from a step with other atoms.
TBLITE_GUESS = "cold: tblite restarts only with the same atoms (SAD guess)"


def _tblite():
    """Import tblite lazily; returns (interface, library, TBLiteRuntimeError, TBLiteValueError)."""
    from tblite import interface, library
    from tblite.exceptions import TBLiteRuntimeError, TBLiteValueError

    return interface, library, TBLiteRuntimeError, TBLiteValueError


def tblite_version() -> str:
    """tblite's version, e.g. '0.8.0'."""
    _, library, *_ = _tblite()
    try:
        return ".".join(str(x) for x in library.get_version())
    except Exception:  # an older wheel without get_version
        return "unknown"


@contextmanager
def _omp_threads(n: int | None) -> Iterator[None]:
    """Set the OpenMP thread count of the process (libgomp, which tblite's wheel links) for the
    duration, then restore it. Best effort: without libgomp a warning is logged."""
    if not n:
        yield
        return
    try:
        gomp = ctypes.CDLL("libgomp.so.1")
        previous = int(gomp.omp_get_max_threads())
        gomp.omp_set_num_threads(int(n))
    except (OSError, AttributeError) as err:
        log.warning("cannot set %d OpenMP threads (%s); using the default", n, err)
        yield
        return
    try:
        yield
    finally:
        gomp.omp_set_num_threads(previous)


# ---------------------------------------------------------------------------------------------
# the tight-binding model


class _Xtb:
    """One tblite calculator for a fixed set of atoms at changing geometries.

    After :meth:`compute`: ``res`` (tblite's Result at ``positions``), ``converged`` (SCC),
    ``evaluations`` and ``seconds`` (running totals).
    """

    def __init__(
        self, atoms: Atoms, cfg: TbliteEngineConfig, charge: int, uhf: int, dipoles: bool = True
    ) -> None:
        interface, _, runtime_error, value_error = _tblite()
        self.cfg = cfg
        self._runtime_error = runtime_error
        self._interface = interface
        try:
            calc = interface.Calculator(
                cfg.method,
                np.asarray(atoms.numbers),
                np.asarray(atoms.positions, dtype=float) / Bohr,
                float(charge),
                int(uhf),
            )
            calc.set("verbosity", 0)
            calc.set("accuracy", float(cfg.accuracy))
            calc.set("max-iter", int(cfg.max_cycle))
            calc.set("temperature", float(cfg.electronic_temperature) * kB / Hartree)
        except (runtime_error, value_error) as err:
            raise ConfigError(
                f"engine.method: tblite cannot set up {cfg.method} for "
                f"{sorted(set(atoms.get_chemical_symbols()))} ({err})"
            ) from None
        self.dipoles = False
        if dipoles:
            try:
                calc.add("molecular-multipoles")
                calc.add(_DIPOLE_POSTPROCESSING)
                self.dipoles = True
            except (runtime_error, value_error) as err:
                log.warning("tblite reports no atomic dipoles (%s): charges only in the map", err)
        self.calc = calc
        self.res = None
        self.positions: np.ndarray | None = None
        self.converged = False
        self.evaluations = 0
        self.seconds = 0.0

    def compute(self, positions_ang: np.ndarray):
        """Single point at ``positions_ang`` (Å), restarting from the previous result.

        A non-converged SCC is recorded (``converged=False``) when tblite still left a finite
        energy; any other failure raises EngineOutputError.
        """
        t0 = time.perf_counter()
        pos = np.array(positions_ang, dtype=float).reshape(-1, 3)
        self.calc.update(positions=pos / Bohr)
        res = self._interface.Result() if self.res is None else self.res
        converged = True
        try:
            self.calc.singlepoint(res)
        except self._runtime_error as err:
            energy = _get(res, "energy")
            if "not converged" not in str(err) or energy is None or not math.isfinite(energy):
                raise EngineOutputError(
                    f"tblite {self.cfg.method} single point failed: {err}"
                ) from None
            converged = False
            log.warning(
                "tblite SCC did not converge in %d iterations; keeping its last energy "
                "%.6f eV (recorded as scf_converged=False)",
                self.cfg.max_cycle,
                energy * Hartree,
            )
        self.res = res
        self.positions = pos
        self.converged = converged
        self.evaluations += 1
        dt = time.perf_counter() - t0
        self.seconds += dt
        log.info(
            "tblite %s %s (%.2f s): E = %.6f eV",
            self.cfg.method,
            "converged" if converged else "NOT converged",
            dt,
            float(res.get("energy")) * Hartree,
        )
        return res

    def energy(self) -> float:
        """Total energy of the last single point, eV."""
        return float(self.res.get("energy")) * Hartree

    def forces(self) -> np.ndarray:
        """Forces of the last single point, eV/Å, shape (natoms, 3)."""
        return -np.asarray(self.res.get("gradient"), dtype=float) * (Hartree / Bohr)

    def atomic_dipoles(self) -> np.ndarray | None:
        """Atomic dipoles of the last single point, e·Å, shape (natoms, 3); None if absent."""
        if not self.dipoles:
            return None
        data = _get(self.res, "post-processing-dict")
        keys = ("dipm_A_x", "dipm_A_y", "dipm_A_z")
        if not isinstance(data, dict) or any(k not in data for k in keys):
            return None
        return np.stack([np.asarray(data[k], dtype=float) for k in keys], axis=1) * Bohr


def _get(res, key: str) -> Any:
    """``res.get(key)``, or None when tblite has no such result."""
    try:
        return res.get(key)
    except Exception:  # TBLiteRuntimeError/ValueError: not computed
        return None


class TbliteCalculator(Calculator):
    """ASE calculator on a running tblite model: energy (eV), forces (eV/Å), charges (e).

    Every new geometry restarts its SCC from the result of the previous one.
    """

    implemented_properties = ["energy", "free_energy", "forces", "charges"]

    def __init__(self, xtb: _Xtb, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.xtb = xtb

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        res = self.xtb.compute(self.atoms.positions)
        energy = self.xtb.energy()
        self.results = {
            "energy": energy,
            "free_energy": energy,
            "forces": self.xtb.forces(),
            "charges": np.asarray(res.get("charges"), dtype=float),
        }


def xtb_calculator(
    atoms: Atoms, cfg: TbliteEngineConfig, charge: int, uhf: int, dipoles: bool = True
) -> TbliteCalculator:
    """A new ASE calculator on tblite's model ``cfg.method`` for the atoms of ``atoms`` (their
    symbols; positions in Å), total ``charge`` (e) and ``uhf`` unpaired electrons (2S); its
    model is ``.xtb``. ``dipoles`` asks tblite for the atomic dipoles of the potential map.
    Raises ConfigError when tblite cannot set the model up for these atoms, ImportError when
    tblite is not installed."""
    return TbliteCalculator(_Xtb(atoms, cfg, int(charge), int(uhf), dipoles=dipoles))


# ---------------------------------------------------------------------------------------------
# the approximate potential map


def smearing_widths(numbers: np.ndarray) -> np.ndarray:
    """Gaussian widths of the atomic multipoles, Å: the covalent radii of the elements."""
    return np.asarray(covalent_radii[np.asarray(numbers, dtype=int)], dtype=float)


def multipole_potential(
    positions: np.ndarray,
    charges: np.ndarray,
    dipoles: np.ndarray | None,
    widths: np.ndarray,
    points: np.ndarray,
) -> np.ndarray:
    """Potential (volts, felt by a positive charge) of Gaussian atomic charges and dipoles.

    ``positions`` (N, 3) Å, ``charges`` (N,) e, ``dipoles`` (N, 3) e·Å or None, ``widths``
    (N,) Å, ``points`` (P, 3) Å. See the module docstring for the formula; every term is
    finite everywhere, nuclei included.
    """
    from scipy.special import erf

    pos = np.asarray(positions, dtype=float).reshape(-1, 3)
    q = np.asarray(charges, dtype=float).reshape(-1)
    mu = None if dipoles is None else np.asarray(dipoles, dtype=float).reshape(-1, 3)
    a = np.asarray(widths, dtype=float).reshape(-1)
    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    out = np.zeros(len(pts))
    c = 2.0 / math.sqrt(math.pi)
    for p0 in range(0, len(pts), _BLOCK_POINTS):
        block = pts[p0 : p0 + _BLOCK_POINTS]
        v = np.zeros(len(block))
        for k in range(len(pos)):
            d = block - pos[k]
            r = np.sqrt(np.einsum("ij,ij->i", d, d))
            x = r / a[k]
            near = x < _ERF_RANGE  # beyond: erf(x) = 1 to double precision
            xn, rn = x[near], r[near]
            tiny = xn < _SERIES_BELOW
            # charge: erf(x)/r, series (2/√π)(1 - x²/3)/a near the nucleus
            inv = np.empty_like(r)
            inv[~near] = 1.0 / r[~near]
            smooth = np.empty_like(xn)
            smooth[~tiny] = erf(xn[~tiny]) / rn[~tiny]
            smooth[tiny] = c * (1.0 - xn[tiny] ** 2 / 3.0) / a[k]
            inv[near] = smooth
            v += q[k] * inv
            if mu is None or not np.any(mu[k]):
                continue
            # dipole: (μ·d) g(x)/r³, g(x) = erf(x) - (2x/√π) exp(-x²); series
            # g(x)/r³ = 4/(3√π a³) (1 - 3x²/5) near the nucleus
            h = np.empty_like(r)
            h[~near] = inv[~near] ** 3
            hn = np.empty_like(xn)
            xm, rm = xn[~tiny], rn[~tiny]
            hn[~tiny] = (erf(xm) - c * xm * np.exp(-(xm**2))) / rm**3
            hn[tiny] = (2.0 * c / (3.0 * a[k] ** 3)) * (1.0 - 0.6 * xn[tiny] ** 2)
            h[near] = hn
            v += (d @ mu[k]) * h
        out[p0 : p0 + len(block)] = v
    return COULOMB * out


def potential_map(
    positions: np.ndarray,
    numbers: np.ndarray,
    charges: np.ndarray,
    dipoles: np.ndarray | None,
    spacing: float,
    margin: float,
) -> Grid:
    """The approximate potential map (volts) on the pyscf engine's grid box around the atoms.

    ``positions`` Å, ``charges`` e, ``dipoles`` e·Å (or None), ``spacing`` and ``margin`` Å.
    """
    t0 = time.perf_counter()
    origin, shape = grid_box(positions, spacing, margin)
    pts = origin + np.indices(shape).reshape(3, -1).T * spacing
    v = multipole_potential(positions, charges, dipoles, smearing_widths(numbers), pts)
    log.info(
        "potential map (atomic multipoles): %d points, %.2f s", len(pts), time.perf_counter() - t0
    )
    return Grid(
        origin=origin,
        axes=np.eye(3) * spacing,
        values=v.reshape(shape).astype(np.float32),
        pbc=(False, False, False),
    )


def potential_model_name(dipoles: bool) -> str:
    """The :attr:`StepResult.potential_model` label of the map."""
    what = "atomic charges and dipoles" if dipoles else "atomic point charges"
    return f"Gaussian-smeared {what} (approximate)"


# ---------------------------------------------------------------------------------------------
# orbitals


def _orbitals(
    res,
) -> tuple[list[list[float]] | None, list[list[float]] | None, float | None, float | None]:
    """Orbital energies (eV) and occupations per spin channel, HOMO and LUMO (eV).

    HOMO is the highest level at least half filled, LUMO the lowest level less than half filled
    (one restricted channel holds up to 2 electrons per level, as tblite reports it).
    """
    e, o = _get(res, "orbital-energies"), _get(res, "orbital-occupations")
    if e is None or o is None:
        return None, None, None, None
    e, o = np.asarray(e, dtype=float), np.asarray(o, dtype=float)
    if e.ndim == 1:
        e, o, full = e[None], o[None], 2.0
    else:
        full = 1.0
    filled = o >= full / 2
    homo = float(e[filled].max()) * Hartree if filled.any() else None
    lumo = float(e[~filled].min()) * Hartree if (~filled).any() else None
    return (e * Hartree).tolist(), o.tolist(), homo, lumo


def fermi_level(
    energies_ev: np.ndarray, n_alpha: float, n_beta: float, kt_ev: float
) -> float | None:
    """Chemical potential (eV) of Fermi–Dirac filling at ``kt_ev`` of one set of levels.

    Solved per spin channel (``n_alpha`` and ``n_beta`` electrons, at most one per level and
    channel); with an open shell the higher of the two is reported. When a channel's filling is
    integer to double precision (a gap much wider than ``kt_ev``) its value is the middle of that
    gap. None when ``kt_ev`` is 0 or a channel cannot be solved.
    """
    if kt_ev <= 0:
        return None
    from scipy.optimize import brentq

    e = np.asarray(energies_ev, dtype=float).reshape(-1)
    mus = []
    for n in (n_alpha, n_beta):
        if n <= 0 or n >= len(e):
            continue

        def excess(mu: float, n=n) -> float:
            x = np.clip((e - mu) / kt_ev, -200, 200)
            return float((1.0 / (1.0 + np.exp(x))).sum() - n)

        lo, hi = e.min() - 50 * kt_ev, e.max() + 50 * kt_ev
        if excess(lo) * excess(hi) > 0:
            continue
        mu = brentq(excess, lo, hi, xtol=1e-10)
        if excess(mu - kt_ev) == 0.0 and excess(mu + kt_ev) == 0.0:
            # integer filling to double precision: mu lies in a gap where any value solves the
            # equation; take the gap's middle (the zero-temperature limit)
            below, above = e[e <= mu], e[e > mu]
            if len(below) and len(above):
                mu = float(below.max() + above.min()) / 2
        mus.append(mu)
    return max(mus) if mus else None


# ---------------------------------------------------------------------------------------------
# the engine


def _charge_and_spin(atoms: Atoms, context: ComputeContext, workdir: Path) -> tuple[int, int]:
    """Total charge and 2S; an impossible charge or spin is a ConfigError naming context.json."""
    nelec = int(atoms.get_atomic_numbers().sum()) - int(context.charge)
    problem = None
    spin = context.spin
    if nelec <= 0:
        problem = f"charge {context.charge:+d} leaves {nelec} electrons"
    elif spin is None:
        spin = nelec % 2
    elif spin < 0 or (nelec - spin) % 2 or spin > nelec:
        problem = f"spin 2S={spin} is impossible with {nelec} electrons"
    if problem:
        raise ConfigError(
            f"{Path(workdir) / CONTEXT}: step {context.step} cannot be computed: {problem}"
        )
    return int(context.charge), int(spin)


class TbliteEngine(InProcessEngine):
    """In-process GFN-xTB with tblite (see the module docstring for files and methods)."""

    name = "tblite"
    code = "tblite"

    def run(self, workdir: Path) -> None:
        """Compute the step described by ``workdir``'s inputs and write the outputs."""
        t_start = time.perf_counter()
        workdir = Path(workdir)
        cfg, rcfg = self.cfg, self.relax
        atoms, context = read_inputs(workdir)
        atoms = Atoms(atoms.get_chemical_symbols(), positions=atoms.positions)
        charge, spin = _charge_and_spin(atoms, context, workdir)
        version = tblite_version()
        movable = sorted({int(i) for i in context.movable if 0 <= int(i) < len(atoms)})
        relax_converged: bool | None = None
        relax_steps = 0
        with _omp_threads(cfg.threads):
            calc = xtb_calculator(atoms, cfg, charge, spin)
            xtb = calc.xtb
            log.info(
                "tblite %s %s: %d atoms, charge %+d, 2S=%d, %.0f K",
                version,
                cfg.method,
                len(atoms),
                charge,
                spin,
                cfg.electronic_temperature,
            )
            if rcfg.enabled and movable:
                relax_converged, relax_steps, final, forces = relax_atoms(
                    atoms, calc, movable, rcfg, workdir
                )
                if xtb.positions is None or not np.allclose(
                    xtb.positions, final.positions, atol=1e-10
                ):
                    xtb.compute(final.positions)
                    forces = xtb.forces()
            else:
                final = atoms
                xtb.compute(atoms.positions)
                forces = xtb.forces()
        t_model = time.perf_counter() - t_start

        res = xtb.res
        charges = np.asarray(res.get("charges"), dtype=float)
        dipoles = xtb.atomic_dipoles()
        t0 = time.perf_counter()
        grid = None
        if context.potential:
            grid = potential_map(
                final.positions,
                final.numbers,
                charges,
                dipoles,
                cfg.potential_grid.spacing,
                cfg.potential_grid.margin,
            )
            save_npz(workdir / POTENTIAL, grid)
        t_pot = time.perf_counter() - t0

        energies, occupations, homo, lumo = _orbitals(res)
        fermi = None
        if occupations is not None and len(energies) == 1:
            nval = float(np.sum(occupations))
            fermi = fermi_level(
                np.asarray(energies[0]),
                (nval + spin) / 2,
                (nval - spin) / 2,
                kB * cfg.electronic_temperature,
            )
        result = StepResult(
            energy=xtb.energy(),
            forces=np.asarray(forces, dtype=float).tolist(),
            scf_converged=bool(xtb.converged),
            scf_iterations=None,  # tblite does not report its iteration count
            relax_converged=relax_converged,
            relax_steps=relax_steps,
            symbols=final.get_chemical_symbols(),
            positions=np.asarray(final.positions, dtype=float).tolist(),
            charge=charge,
            spin=spin,
            charges=charges.tolist(),
            charge_scheme=f"mulliken ({cfg.method})",
            # tblite's GFN2-xTB charges are Mulliken-type; it records no other scheme
            charge_sets={"mulliken": charges.tolist()},
            orbital_energies=energies,
            occupations=occupations,
            fermi_level=fermi,
            homo=homo,
            lumo=lumo,
            code="tblite",
            code_version=version,
            wall_time=time.perf_counter() - t_start,
            # tblite's Python API restarts only from a Result of the same atoms (a Result takes
            # no density or charges from outside), so every step starts cold; within a
            # relaxation each geometry restarts from the previous one's Result
            warm_started=False,
            guess=TBLITE_GUESS,
            potential_file=POTENTIAL if grid is not None else None,
            potential_model=potential_model_name(dipoles is not None),
        )
        diag = {
            "wall_time": result.wall_time,
            "model_seconds": t_model,
            "single_points": xtb.evaluations,
            "single_point_seconds": xtb.seconds,
            "potential_seconds": t_pot,
            "grid_shape": None if grid is None else list(grid.shape),
            "method": cfg.method,
            "threads": cfg.threads,
        }
        atomic_write(workdir / TIMINGS, json.dumps(diag, indent=2) + "\n")
        write_output(workdir, result)
        log.info(
            "tblite done in %.1f s: E = %.6f eV, SCC %s, %d single points (%.1f s), "
            "potential %.1f s",
            result.wall_time,
            result.energy,
            "converged" if result.scf_converged else "NOT converged",
            xtb.evaluations,
            xtb.seconds,
            t_pot,
        )

    def collect(self, workdir: Path) -> tuple[StepResult, Grid | None]:
        """Read ``output.json`` and ``potential.npz``; EngineOutputError names file + reason."""
        return collect_outputs(workdir, "tblite")
