"""Cheap before expensive: relax the movable atoms with GFN-xTB (tblite) before the engine does.

``relax.pre`` in the campaign asks for it. The structure the engine then gets is the
tight-binding minimum; the engine's own relaxation (``relax``) finishes from there, so its
expensive force evaluations start near a minimum. Files, in the folder given
(``steps/NNNN/pre-relax``): ``relax.traj`` and ``relax.log`` of the optimizer, and
``pre-relax.json`` (the :class:`ionwell.store.ledger.PreRelaxRecord`, also in the step's ledger
record). Units: Å, eV, eV/Å.
"""

from __future__ import annotations

import json
import logging
import time
from collections.abc import Iterable
from pathlib import Path

import numpy as np
from ase import Atoms

from ionwell.config.campaign import RelaxConfig
from ionwell.config.engines import TbliteEngineConfig
from ionwell.store.ledger import PreRelaxRecord

__all__ = ["RECORD", "pre_relax"]

log = logging.getLogger("ionwell.engines.pre_relax")

RECORD = "pre-relax.json"


def pre_relax(
    atoms: Atoms,
    movable: Iterable[int],
    charge: int,
    relax: RelaxConfig,
    folder: Path,
    spin: int | None = None,
) -> tuple[Atoms, PreRelaxRecord]:
    """Relax ``movable`` atoms of a copy of ``atoms`` with ``relax.pre`` (GFN-xTB), the others
    fixed, with the optimizer and step size of ``relax``; ``charge`` (e) and ``spin`` (2S;
    default: the parity of the electron count) of the whole system. Returns the relaxed copy
    (cell and periodicity kept) and its record; writes the files named in the module
    docstring into ``folder``."""
    from ase.io import read

    from ionwell.engines.relax import TRAJECTORY, relax_atoms
    from ionwell.engines.tblite_engine import tblite_version, xtb_calculator

    if relax.pre is None:
        raise ValueError("pre_relax needs relax.pre")
    pre = relax.pre
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    n_el = int(atoms.numbers.sum()) - int(charge)
    uhf = spin if spin is not None else n_el % 2
    model = TbliteEngineConfig(method=pre.method, electronic_temperature=pre.electronic_temperature)
    plain = Atoms(atoms.get_chemical_symbols(), positions=atoms.positions)
    t0 = time.perf_counter()
    calc = xtb_calculator(plain, model, int(charge), int(uhf), dipoles=False)
    cfg = relax.model_copy(update={"fmax": pre.fmax, "steps": pre.steps})
    converged, steps, final, _ = relax_atoms(atoms, calc, movable, cfg, folder)
    # the trajectory's first frame is the starting geometry, with its energy
    energy_start = float(read(folder / TRAJECTORY, index=0).get_potential_energy())
    # the calculator's last evaluation is at the final geometry (relax_atoms)
    energy_end = float(calc.get_potential_energy(final))
    moved = float(np.linalg.norm(final.positions - atoms.positions, axis=1).max(initial=0.0))
    record = PreRelaxRecord(
        method=pre.method,
        code_version=f"tblite {tblite_version()}",
        steps=steps,
        converged=converged,
        energy_start=energy_start,
        energy_end=energy_end,
        max_displacement=round(moved, 6),
        seconds=round(time.perf_counter() - t0, 3),
    )
    (folder / RECORD).write_text(json.dumps(record.model_dump(mode="json"), indent=1) + "\n")
    log.info(
        "pre-relaxation (%s): %d steps, %s, E %.4f -> %.4f eV, largest move %.3f Å",
        pre.method, steps, "converged" if converged else "NOT converged", energy_start,
        energy_end, moved,
    )  # fmt: skip
    return final, record
