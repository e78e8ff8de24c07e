"""The engine contract and the normalised result of one compute.

An engine says *what* to compute and how to read it; a launcher says how to start it on a machine.

    external: bool                               a separate program (True) or in-process
    prepare(atoms, workdir, context) -> None     write inputs into ``workdir``
    launch(workdir, launcher) -> float           compute (external: through the launcher)
    collect(workdir) -> StepResult               parse; raise EngineOutputError(file + reason)

Units in a :class:`StepResult`: energies eV, forces eV/Å, lengths Å, potential volts.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Protocol

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict, Field

from ionwell.science.grid import Grid


class ComputeContext(BaseModel):
    """What an engine needs to know beyond the structure.

    ``charge`` and ``spin`` (2S, unpaired electrons) are for the whole system; ``spin=None``
    lets the engine choose (lowest multiplicity allowed by the electron count). ``movable`` lists
    atom indices the relaxation may move (empty: no relaxation). ``previous`` is the engine folder
    of the previous step, for warm starts. ``cold``: start from the program's own initial guess,
    discarding restart files an earlier attempt left in the engine folder (set by
    :func:`ionwell.engines.run.run_engine` after an attempt from restart files did not converge).
    """

    model_config = ConfigDict(frozen=True, arbitrary_types_allowed=True)

    step: int
    charge: int = 0
    spin: int | None = None
    movable: tuple[int, ...] = ()
    previous: Path | None = None
    potential: bool = True  # False: energy only, no potential map (e.g. a guest reference)
    cold: bool = False


class StepResult(BaseModel):
    """Normalised result of one engine compute (final, relaxed geometry)."""

    model_config = ConfigDict(arbitrary_types_allowed=True)

    energy: float = Field(
        description="total energy, eV; with electronic smearing, extrapolated to zero width "
        "(E - σS/2, as ASE's 'energy' and GPAW report it)"
    )
    free_energy: float | None = Field(
        None,
        description="with electronic smearing: the Mermin free energy F = E - σS, eV, the energy "
        "whose gradient the forces are (None: no smearing, or not reported by the engine)",
    )
    forces: list[list[float]] | None = Field(None, description="eV/Å, per atom")
    scf_converged: bool
    scf_iterations: int | None = None
    relax_converged: bool | None = Field(None, description="None when no relaxation was asked")
    relax_steps: int = 0
    symbols: list[str] = Field(
        default_factory=list, description="empty in a step's result.json (see relaxed.extxyz)"
    )
    positions: list[list[float]] = Field(
        default_factory=list,
        description="relaxed positions, Å; empty in a step's result.json (see relaxed.extxyz)",
    )
    cell: list[list[float]] | None = None
    pbc: list[bool] = [False, False, False]
    charge: int = 0
    spin: int = 0
    charges: list[float] | None = Field(None, description="atomic charges, e")
    charge_scheme: str | None = Field(None, description="e.g. 'mulliken'")
    charge_sets: dict[str, list[float]] | None = Field(
        None, description="atomic charges (e) per scheme, e.g. {'mulliken': [...], 'iao': [...]}"
    )
    orbital_energies: list[list[float]] | None = Field(None, description="eV, per spin channel")
    occupations: list[list[float]] | None = None
    fermi_level: float | None = Field(None, description="eV")
    homo: float | None = Field(None, description="eV")
    lumo: float | None = Field(None, description="eV")
    code: str
    code_version: str
    wall_time: float = Field(description="seconds")
    warm_started: bool = False
    guess: str | None = Field(
        None,
        description="initial guess of the final SCF, e.g. 'previous step (orbitals)', "
        "'atomic (minao)', 'cold: atoms differ from the previous step' (None: not recorded)",
    )
    potential_file: str | None = Field(None, description="grid file name beside result.json")
    potential_model: str = Field(
        "exact",
        description="how the potential map was obtained: 'exact' (from the electron density), "
        "or a model such as 'point charges (approximate)'",
    )
    notes: list[str] = Field(
        default_factory=list, description="what the engine noticed (e.g. a missing proof line)"
    )

    def atoms(self) -> Atoms:
        """The relaxed structure as ASE ``Atoms``."""
        a = Atoms(self.symbols, positions=np.array(self.positions), pbc=self.pbc)
        if self.cell is not None:
            a.cell = np.array(self.cell)
        return a


class Engine(Protocol):
    """The adapter every engine kind implements: ``prepare`` writes the inputs into the engine
    folder, ``launch`` computes them (an external program through the launcher when
    ``external``, else in this process, the launcher unused), ``collect`` reads the outputs."""

    name: str
    external: bool

    def prepare(self, atoms: Atoms, workdir: Path, context: ComputeContext) -> None: ...

    def launch(self, workdir: Path, launcher: Any) -> float: ...

    def collect(self, workdir: Path) -> tuple[StepResult, Grid | None]: ...
