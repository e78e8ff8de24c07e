"""Replay: re-derive every recorded placement decision from the stored potential map, the
step's relaxed structure and the frozen config, and report any step whose decision differs.

The ``screened`` rule's candidate energies are taken from the record (re-running the engine is
not a replay of the *decision*); everything else is recomputed by the same pure function the loop
called (:func:`ionwell.science.placement.decide`).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from ase.io import read
from pydantic import BaseModel

from ionwell.errors import IonwellError
from ionwell.io.npz import load_npz
from ionwell.science import grid, placement
from ionwell.store.campaign import CampaignPaths, load_frozen
from ionwell.store.ledger import read_ledger
from ionwell.store.paths import StepPaths
from ionwell.store.prune import pruned_files

#: Two chosen sites agree when they are this close (Å).
SITE_TOLERANCE = 1e-6


class ReplayStep(BaseModel):
    """The outcome of replaying one step's decision."""

    step: int
    status: str  # "same", "differs", "no decision", "cannot replay", "pruned"
    message: str = ""


def _recorded_energies(decision: placement.Decision) -> placement.EnergyFunction:
    pairs = zip(decision.candidates, decision.energies or [], strict=False)
    return placement.known_energies([(s.position, e) for s, e in pairs], SITE_TOLERANCE)


def _fallback_message(
    paths: CampaignPaths, campaign, prev, rec, n_host: int, periodic: grid.Grid | None
) -> str | None:
    """Why the step's input does not follow its previous decision (None: it does).

    Without rejections the new guests are the previous decision's chosen sites; with them, the
    rejected sites are the chosen set and then each fallback set of
    :func:`placement.next_untried`, and the guests computed are the set after the last one.
    """
    if prev.decision is None or not prev.decision.chosen:
        return None
    count = len(prev.decision.chosen)
    sets = [np.array([s.position for s in prev.decision.chosen])]
    tried: list[list[float]] = []
    rejected = np.array([r.position for r in rec.rejected]).reshape(-1, 3)
    used = 0
    while used < len(rejected):
        current = sets[-1]
        if len(current) == 0:
            return "more sites were rejected than the previous decision had wells"
        part = rejected[used : used + len(current)]
        if part.shape != current.shape or np.abs(part - current).max() > SITE_TOLERANCE:
            return (
                f"rejected sites {np.round(part, 4).tolist()} Å are not the fallback order's "
                f"{np.round(current, 4).tolist()} Å"
            )
        used += len(current)
        tried += current.tolist()
        pick = placement.next_untried(
            prev.decision.candidates, tried, count, campaign.placement.separation, periodic
        )
        sets.append(np.array([prev.decision.candidates[i].position for i in pick]).reshape(-1, 3))
    try:
        new = read(StepPaths(paths.step(rec.step)).input).positions[n_host + prev.guests :]
    except (OSError, ValueError) as err:
        return f"cannot read the step's input structure: {err}"
    want = sets[-1]
    if new.shape != want.shape or (new.size and np.abs(new - want).max() > 1e-5):
        return (
            f"the guests computed, {np.round(new, 4).tolist()} Å, are not the sites the previous "
            f"decision gives, {np.round(want, 4).tolist()} Å"
        )
    return None


def _handover_message(paths: CampaignPaths, campaign, prev) -> str | None:
    """Why the decision that extended a stopped campaign after step ``prev`` is not the one
    its recorded map and structure give (None: it is)."""
    from ionwell.workflow.extend import handover_decision, read_handover

    try:
        handed = read_handover(StepPaths(paths.step(prev.step + 1)))
        if handed is None:
            return "the campaign went on after a stop without a handover decision"
        again = handover_decision(paths, campaign, prev)
    except (OSError, ValueError, IonwellError) as err:
        return f"cannot re-derive the handover decision: {err}"
    want = np.array([s.position for s in handed.chosen]).reshape(-1, 3)
    got = np.array([s.position for s in again.chosen]).reshape(-1, 3)
    if want.shape != got.shape or (want.size and np.abs(want - got).max() > SITE_TOLERANCE):
        return f"handover sites {np.round(want, 4).tolist()} Å, replay gives {np.round(got, 4).tolist()} Å"
    return None


def replay(root: str | Path) -> list[ReplayStep]:
    """Replay every recorded step of the campaign in ``root``."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    host = read(paths.host)
    n_host, periodic_host = len(host), bool(host.pbc.any())
    out: list[ReplayStep] = []
    for rec in records:
        if rec.step > 0 and records[rec.step - 1].outcome == "stop":
            why = _handover_message(paths, campaign, records[rec.step - 1])
            if why is not None:
                out.append(ReplayStep(step=rec.step, status="differs", message=why))
                continue
        elif rec.step > 0:
            prev = records[rec.step - 1]
            periodic = None
            prev_map = StepPaths(paths.step(prev.step)).potential
            if periodic_host and rec.rejected and not prev_map.exists():
                out.append(
                    ReplayStep(
                        step=rec.step,
                        status="pruned",
                        message=f"step {prev.step}'s map is pruned: the fallback order of the "
                        "rejected sites (periodic host) is not re-derived",
                    )
                )
                continue
            if periodic_host and prev_map.exists():
                periodic = load_npz(prev_map)
            why = _fallback_message(paths, campaign, prev, rec, n_host, periodic)
            if why is not None:
                out.append(ReplayStep(step=rec.step, status="differs", message=why))
                continue
        if rec.decision is None:
            out.append(
                ReplayStep(step=rec.step, status="no decision", message=rec.stop_reason or "")
            )
            continue
        sp = StepPaths(paths.step(rec.step))
        sdir = sp.root
        if not sp.potential.exists() and sp.potential.name in pruned_files(sdir):
            out.append(
                ReplayStep(
                    step=rec.step,
                    status="pruned",
                    message="map pruned (digest and wells table kept); decision not re-derived",
                )
            )
            continue
        try:
            pot = load_npz(sp.potential)
            atoms = read(sp.relaxed)
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
