"""Replay: re-derive every recorded placement decision from the stored potential map, the
step's relaxed structure and the frozen config, and report any step whose decision differs.

The ``screened`` rule's candidate energies are taken from the record (re-running the engine is
not a replay of the *decision*); everything else is recomputed by the same pure function the loop
called (:func:`ionwell.placement.decide`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from ase.io import read
from pydantic import BaseModel

from ionwell import grid, placement
from ionwell.campaign import CampaignPaths, load_frozen
from ionwell.errors import IonwellError
from ionwell.ledger import read_ledger

#: Two chosen sites agree when they are this close (Å).
SITE_TOLERANCE = 1e-6


class ReplayStep(BaseModel):
    """The outcome of replaying one step's decision."""

    step: int
    status: str  # "same", "differs", "no decision", "cannot replay"
    message: str = ""


def _recorded_energies(decision: placement.Decision) -> placement.EnergyFunction:
    known = [
        (np.asarray(s.position), e)
        for s, e in zip(decision.candidates, decision.energies or [], strict=False)
    ]

    def energy_of(sites: list[placement.Site]) -> list[float | None]:
        out: list[float | None] = []
        for site in sites:
            match = [e for p, e in known if np.linalg.norm(p - site.position) < SITE_TOLERANCE]
            out.append(match[0] if match else None)
        return out

    return energy_of


def replay(root: str | Path) -> list[ReplayStep]:
    """Replay every recorded step of the campaign in ``root``."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    n_host = len(read(paths.host))
    out: list[ReplayStep] = []
    for rec in records:
        if rec.decision is None:
            out.append(
                ReplayStep(step=rec.step, status="no decision", message=rec.stop_reason or "")
            )
            continue
        sdir = paths.step(rec.step)
        try:
            pot = grid.load_npz(sdir / "potential.npz")
            atoms = read(sdir / "relaxed.extxyz")
        except (OSError, ValueError, IonwellError) as err:
            out.append(ReplayStep(step=rec.step, status="cannot replay", message=str(err)))
            continue
        energy_of = None
        if campaign.placement.rule == "screened":
            energy_of = _recorded_energies(rec.decision)
        again = placement.decide(
            pot,
            atoms,
            campaign.guest.element,
            campaign.placement,
            step=rec.step,
            seed=campaign.seed,
            envelope_indices=list(range(n_host)),
            energy_of=energy_of,
        )
        want = np.array([s.position for s in rec.decision.chosen]).reshape(-1, 3)
        got = np.array([s.position for s in again.chosen]).reshape(-1, 3)
        if want.shape != got.shape:
            out.append(
                ReplayStep(
                    step=rec.step,
                    status="differs",
                    message=f"recorded {len(want)} chosen sites, replay gives {len(got)}",
                )
            )
        elif want.size and np.abs(want - got).max() > SITE_TOLERANCE:
            k = int(np.argmax(np.abs(want - got).max(axis=1)))
            out.append(
                ReplayStep(
                    step=rec.step,
                    status="differs",
                    message=(
                        f"recorded site {np.round(want[k], 4).tolist()} Å, replay gives "
                        f"{np.round(got[k], 4).tolist()} Å"
                    ),
                )
            )
        else:
            out.append(ReplayStep(step=rec.step, status="same"))
    return out
