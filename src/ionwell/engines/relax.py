"""Relaxation of selected atoms with an ASE optimizer on any ASE calculator.

Files written into the engine folder: ``relax.traj`` (ASE trajectory) and ``relax.log`` (the
optimizer's log). Atoms not listed as movable are held by :class:`ase.constraints.FixAtoms`.
Units: positions Å, energies eV, forces eV/Å, ``max_step`` Å.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms
from ase.calculators.calculator import BaseCalculator, PropertyNotImplementedError
from ase.constraints import FixAtoms

from ionwell.config.campaign import RelaxConfig

__all__ = ["GUEST_HESSIAN", "RELAX_LOG", "TRAJECTORY", "free_energy", "relax_atoms"]

log = logging.getLogger("ionwell.engines.relax")

TRAJECTORY = "relax.traj"
RELAX_LOG = "relax.log"
#: Initial Hessian (eV/Å²) of BFGS/LBFGS when some atoms are fixed (guest-only relaxation):
#: guests among fixed atoms sit in soft, non-bonded wells, softer than ASE's covalent default
#: (70 eV/Å²). Same value as the pyscf engine's (measured there on Li⁺ over benzene).
GUEST_HESSIAN = 10.0


def relax_atoms(
    atoms: Atoms,
    calc: BaseCalculator,
    movable: Iterable[int],
    relax_cfg: RelaxConfig,
    workdir: Path,
) -> tuple[bool, int, Atoms, np.ndarray]:
    """Relax the ``movable`` atoms of a copy of ``atoms`` on ``calc``; the others stay fixed.

    Uses ``relax_cfg.optimizer`` (BFGS, FIRE or LBFGS) to ``relax_cfg.fmax`` (eV/Å) in at most
    ``relax_cfg.steps`` steps of at most ``relax_cfg.max_step`` (Å). ``atoms`` is not modified.

    Returns ``(converged, steps, final_atoms, forces)``: ``final_atoms`` is the relaxed copy
    (cell and periodicity kept, no constraint, no calculator) and ``forces`` (eV/Å, shape
    (natoms, 3)) are the calculator's forces on every atom at the final geometry, fixed atoms
    included. The calculator's last evaluation is at the final geometry, so its other results
    (charges, potential, files it wrote) describe the relaxed structure.
    """
    from ase import optimize

    workdir = Path(workdir)
    a = Atoms(
        atoms.get_chemical_symbols(), positions=atoms.positions, cell=atoms.cell, pbc=atoms.pbc
    )
    keep = {int(i) for i in movable if 0 <= int(i) < len(a)}
    fixed = [i for i in range(len(a)) if i not in keep]
    if fixed:
        a.set_constraint(FixAtoms(indices=fixed))
    a.calc = calc
    opt_cls = {"BFGS": optimize.BFGS, "FIRE": optimize.FIRE, "LBFGS": optimize.LBFGS}[
        relax_cfg.optimizer
    ]
    log.info(
        "relaxing %d of %d atoms with %s to fmax %.3g eV/Å (at most %d steps)",
        len(keep),
        len(a),
        relax_cfg.optimizer,
        relax_cfg.fmax,
        relax_cfg.steps,
    )
    kwargs: dict[str, Any] = {}
    if fixed and relax_cfg.optimizer in ("BFGS", "LBFGS"):
        kwargs["alpha"] = GUEST_HESSIAN
    with opt_cls(
        a,
        trajectory=str(workdir / TRAJECTORY),
        logfile=str(workdir / RELAX_LOG),
        maxstep=relax_cfg.max_step,
        **kwargs,
    ) as opt:

        def report() -> None:
            f = a.get_forces()
            free = free_energy(calc, a)  # the energy the optimizer lowers, where it differs
            log.info(
                "relax step %d: %s = %.6f eV, fmax = %.4f eV/Å",
                opt.nsteps,
                "E" if free is None else "F",
                a.get_potential_energy() if free is None else free,
                float(np.sqrt((f**2).sum(axis=1)).max()),
            )

        opt.attach(report, interval=1)
        converged = bool(opt.run(fmax=relax_cfg.fmax, steps=relax_cfg.steps))
        steps = int(opt.nsteps)
    # at the final geometry (cached when the optimizer's last evaluation was there)
    forces = np.array(a.get_forces(apply_constraint=False), dtype=float)
    log.info("relaxation %s after %d steps", "converged" if converged else "NOT converged", steps)
    final = Atoms(a.get_chemical_symbols(), positions=a.positions, cell=a.cell, pbc=a.pbc)
    return converged, steps, final, forces


def free_energy(calc, atoms: Atoms) -> float | None:
    """The calculator's force-consistent (free) energy at ``atoms``, eV, when it reports one
    that differs from its energy (electronic smearing), else None."""
    energy = float(calc.get_potential_energy(atoms))
    try:
        free = float(calc.get_potential_energy(atoms, force_consistent=True))
    except (PropertyNotImplementedError, NotImplementedError, TypeError):  # not reported
        return None
    return None if abs(free - energy) < 1e-9 else free
