"""The decisions of one step, as pure functions (no files, no engine).

Given what a compute produced (its findings, the structure) and the campaign's settings, these
functions say what happens next: the system charge and the atoms a relaxation may move, whether
a failed check rejects the new site(s) and which wells are tried instead, whether the campaign
stops (a check, a stop rule, no admissible well, a well above the bound), and the structure
handed to the next step. The rule bodies in :mod:`ionwell.workflow.chain` read and write files
around them.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict, Field

from ionwell.config.campaign import Campaign, RelaxConfig, StopConfig
from ionwell.science import placement
from ionwell.science.checks import Finding
from ionwell.science.grid import Grid

__all__ = [
    "Retry",
    "after_checks",
    "after_decision",
    "check_stop",
    "movable_atoms",
    "rule_stop",
    "system_charge",
    "with_guests",
]


class Retry(BaseModel):
    """Compute the step again with other sites: the ones placed failed a check."""

    model_config = ConfigDict(extra="forbid")

    sites: list[list[float]] = Field(description="the next untried wells, Å")
    rejected: list[list[float]] = Field(description="the sites struck out now, Å")
    reason: str = Field(description="codes of the failed checks")


def system_charge(campaign: Campaign, guests: int) -> int:
    """Total charge (e) of a step with ``guests`` guests: the engine's base charge plus one per
    guest in cation mode (each guest enters as a cation), nothing more in neutral mode."""
    extra = guests if campaign.guest.charge_mode == "cation" else 0
    return campaign.engine.charge + extra


def movable_atoms(
    relax: RelaxConfig, n_atoms: int, guest_indices: Sequence[int]
) -> tuple[int, ...]:
    """Indices a relaxation may move: none without relaxation, all, or the guests only."""
    if not relax.enabled:
        return ()
    if relax.move == "all":
        return tuple(range(n_atoms))
    return tuple(int(i) for i in guest_indices)


def rule_stop(stop: StopConfig, step: int, guests: int, units: float) -> str | None:
    """The stop rule on composition and step count (None: go on). ``units``: host formula
    units, for ``guests_per_unit``."""
    if stop.guests is not None and guests >= stop.guests:
        return f"target reached: {guests} guests"
    if stop.guests_per_unit is not None and guests / units >= stop.guests_per_unit - 1e-9:
        return f"target reached: x = {guests / units:.3f} guests per formula unit"
    if step >= stop.max_steps:
        return f"maximum steps reached ({stop.max_steps})"
    return None


def _errors(findings: Sequence[Finding]) -> list[Finding]:
    return [f for f in findings if f.severity == "error"]


#: errors another site can cure: the structure the site made is wrong (geometry or bonding).
#: An SCF that did not converge is not one of them: the engine's SCF remedies retry it at the
#: same site, and if they fail the campaign stops — a good site is never struck out for it.
SITE_ERRORS = frozenset(
    {"atoms-too-close", "guest-on-host-atom", "host-fragmented", "non-finite-positions"}
)


def after_checks(
    campaign: Campaign,
    findings: Sequence[Finding],
    *,
    round_: int,
    placed: Sequence[Sequence[float]],
    rejected: Sequence[Sequence[float]],
    previous: placement.Decision | None,
    periodic: Grid | None = None,
) -> Retry | None:
    """Whether a failed check rejects the step's new sites, and what is tried instead.

    Only geometric or bonding errors (:data:`SITE_ERRORS`) reject a site; an unconverged SCF
    does not (the engine's SCF remedies already retried it at the same site).

    ``round_`` counts the rejections already made in this step, ``placed`` are the sites this
    round computed, ``rejected`` those struck out before, ``previous`` the previous step's
    decision (its candidates are the wells to fall back on, in depth order, keeping the
    separation: :func:`ionwell.science.placement.next_untried`). ``periodic`` is a grid of the previous
    step when the host is periodic (the separation then uses the minimum image). None: no retry
    (no error, the remedy is off, the rounds are used up, nothing new was placed, or no untried
    well is left); the checks then decide the step as they stand.
    """
    errors = [f for f in _errors(findings) if f.code in SITE_ERRORS]
    rem = campaign.remedies
    if not errors or not rem.reject_site or round_ >= rem.max_rejects or not placed:
        return None
    if previous is None or not previous.chosen:
        return None
    tried = [list(map(float, p)) for p in rejected] + [list(map(float, p)) for p in placed]
    pick = placement.next_untried(
        previous.candidates,
        tried,
        count=len(previous.chosen),
        separation=campaign.placement.separation,
        grid=periodic,
    )
    if not pick:
        return None
    return Retry(
        sites=[list(map(float, previous.candidates[i].position)) for i in pick],
        rejected=[list(map(float, p)) for p in placed],
        reason="; ".join(sorted({f.code for f in errors})),
    )


def check_stop(
    campaign: Campaign, findings: Sequence[Finding], step: int, guests: int, units: float
) -> str | None:
    """Why the campaign stops before placing anything (a failed check, the stop rule), or None."""
    errors = _errors(findings)
    if errors:
        return "stopped by check: " + "; ".join(f.message for f in errors)
    return rule_stop(campaign.stop, step, guests, units)


def after_decision(campaign: Campaign, decision: placement.Decision) -> str | None:
    """Why the campaign stops after the placement decision (no well, a well above the bound)."""
    if not decision.chosen:
        return decision.reason
    bound = campaign.stop.well_above
    if bound is not None and decision.chosen[0].potential > bound:
        return (
            f"deepest admissible well at {decision.chosen[0].potential:.3f} V lies above "
            f"the bound {bound:.3f} V"
        )
    return None


def with_guests(base: Atoms, element: str, sites: Sequence[Sequence[float]]) -> Atoms:
    """``base`` (its stored results dropped) plus one ``element`` atom at each site (Å)."""
    out = base.copy()
    out.calc = None
    if len(sites):
        out += Atoms(element * len(sites), positions=np.asarray(sites, dtype=float).reshape(-1, 3))
    return out
