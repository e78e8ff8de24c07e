"""Per-step diagnostics of a campaign's structures and results (pure functions).

For each finished step :func:`diagnose` gathers what the analysis tables and plots show:

* layers (:mod:`ionwell.science.staging`): galleries with spacing (Å), guests per gallery, stacking
  registry of each adjacent pair, stage;
* sites (:mod:`ionwell.science.occupancy`): guests at the rim or in the interior of a finite particle,
  and each guest's distance to its nearest fellow guest (Å);
* charges (:mod:`ionwell.science.occupancy`): mean guest charge and the electrons the host gained since
  step 0 (e), split into rim and interior host atoms, in the engine's charge scheme;
* the frontier level (:mod:`ionwell.science.dos`): Fermi level or HOMO (eV) and its shift since step 0.

Host atoms are the first ``n_host`` atoms of every step's structure (guests are appended).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

from ase import Atoms
from pydantic import BaseModel

from ionwell.errors import IonwellError
from ionwell.science import occupancy, staging
from ionwell.science.dos import FrontierLevel, frontier_level
from ionwell.science.occupancy import GuestSpacing
from ionwell.science.staging import Gallery

__all__ = ["StepDiagnostics", "diagnose"]

log = logging.getLogger("ionwell.science.diagnostics")


class StepDiagnostics(BaseModel):
    """What the analysis reports for one step (lengths Å, charges e, energies eV)."""

    step: int
    guests: int
    spacing: GuestSpacing  # nearest guest–guest distances, Å
    layers: int | None = None
    galleries: list[Gallery] = []
    guests_outside: int | None = None
    stage: int | None = None
    staging: str | None = None
    layer_note: str | None = None
    rim_guests: int | None = None
    interior_guests: int | None = None
    guest_depths: list[float] = []  # Å inside the particle's edge, per guest
    charge_scheme: str | None = None
    mean_guest_charge: float | None = None
    host_electrons_gained: float | None = None
    host_electrons_gained_rim: float | None = None
    host_electrons_gained_interior: float | None = None
    frontier: FrontierLevel | None = None
    frontier_shift: float | None = None  # eV against step 0
    normal: list[float] | None = None  # stacking normal of the layer analysis (unit vector)
    host_interior_atoms: int | None = None  # host atoms deeper than the rim width
    guest_groups: list[str] = []  # per guest: its gallery and/or rim / interior, for figures


def _groups(out: StepDiagnostics, guests: Sequence[int], split) -> list[str]:
    """A label per guest: its gallery (layered hosts) and rim / interior (finite particles)."""
    where = {}
    for g in out.galleries:
        for i in g.guest_indices:
            where[i] = f"gallery {g.index}"
    rim = set(split.guest_rim) if split is not None else None
    labels = []
    for i in guests:
        parts = []
        if out.galleries:
            parts.append(where.get(i, "outside galleries"))
        if rim is not None and out.host_interior_atoms:
            parts.append("rim" if i in rim else "interior")
        labels.append(" · ".join(parts) or "guest")
    return labels


def diagnose(
    step: int,
    atoms: Atoms,
    n_host: int,
    charges: Sequence[float] | None = None,
    charge_scheme: str | None = None,
    pristine_charges: Sequence[float] | None = None,
    fermi: float | None = None,
    homo: float | None = None,
    lumo: float | None = None,
    pristine_frontier: FrontierLevel | None = None,
    rim_width: float = 3.0,
) -> StepDiagnostics:
    """Diagnostics of one step's structure ``atoms`` (host first, ``n_host`` atoms).

    ``charges`` are the step's atomic charges (e), ``pristine_charges`` step 0's (host atoms);
    ``fermi``/``homo``/``lumo`` the step's levels (eV), ``pristine_frontier`` step 0's frontier.
    """
    if not 0 < n_host <= len(atoms):
        raise IonwellError(
            f"step {step}: expected the first {n_host} atoms to be the host, the structure "
            f"has {len(atoms)}"
        )
    host = list(range(n_host))
    guests = list(range(n_host, len(atoms)))
    out = StepDiagnostics(
        step=step, guests=len(guests), spacing=occupancy.guest_spacing(atoms, guests)
    )

    try:
        rep = staging.layer_report(atoms, host, guests)
    except IonwellError as err:
        out.layer_note = str(err)
        log.info("step %d: no layer analysis (%s)", step, err)
    else:
        out.layers = rep.layer_count
        out.galleries = list(rep.galleries)
        out.guests_outside = rep.guests_outside
        out.stage, out.staging = rep.stage, rep.staging
        out.normal = list(rep.normal)

    split = occupancy.rim_split(atoms, host, guests, rim_width=rim_width)
    if split is not None:
        out.rim_guests = split.guests_rim
        out.interior_guests = split.guests_interior
        out.guest_depths = [float(d) for d in split.guest_depth]
        out.host_interior_atoms = len(split.host_interior)
    out.guest_groups = _groups(out, guests, split)

    if charges is not None and pristine_charges is not None:
        ct = occupancy.charge_transfer(
            charges,
            pristine_charges,
            host,
            guests,
            host_rim=None if split is None else split.host_rim,
        )
        out.charge_scheme = charge_scheme
        out.mean_guest_charge = ct.mean_guest_charge
        out.host_electrons_gained = ct.host_electrons_gained
        out.host_electrons_gained_rim = ct.host_rim_electrons_gained
        out.host_electrons_gained_interior = ct.host_interior_electrons_gained

    out.frontier = frontier_level(fermi, homo, lumo)
    if (
        out.frontier is not None
        and pristine_frontier is not None
        and out.frontier.kind == pristine_frontier.kind
    ):
        out.frontier_shift = out.frontier.value - pristine_frontier.value
    return out
