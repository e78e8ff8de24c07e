"""Where a campaign stands: a model built from the folder, and its plain-text table."""

from __future__ import annotations

import json
from pathlib import Path

from pydantic import BaseModel

from ionwell.campaign import CampaignPaths, controller_state, load_frozen
from ionwell.ledger import read_ledger
from ionwell.loop import describe_error


class StepRow(BaseModel):
    """One line of the status table."""

    step: int
    guests: int
    energy: float | None
    delta: float | None
    scf_iterations: int | None
    site_potential: float | None
    findings: str
    wall_time: float
    outcome: str


class CampaignStatus(BaseModel):
    """The campaign at a glance."""

    name: str
    folder: str
    guest: str
    rows: list[StepRow]
    state: str
    detail: str | None = None
    potential_model: str = "exact"


def campaign_status(root: str | Path) -> CampaignStatus:
    """Read the ledger, step folders and lock of a campaign folder."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    rows: list[StepRow] = []
    prev_e = None
    for rec in records:
        site_v = None
        if rec.decision is not None and rec.decision.chosen:
            site_v = rec.decision.chosen[0].potential
        findings = ", ".join(f"{n} {sev}" for sev, n in sorted(rec.findings.items())) or "-"
        rows.append(
            StepRow(
                step=rec.step,
                guests=rec.guests,
                energy=rec.energy,
                delta=None if prev_e is None or rec.energy is None else rec.energy - prev_e,
                scf_iterations=rec.scf_iterations,
                site_potential=site_v,
                findings=findings,
                wall_time=rec.wall_time,
                outcome=rec.outcome,
            )
        )
        prev_e = rec.energy
    running = controller_state(paths)
    detail = None
    if records and records[-1].outcome == "stop":
        state = "finished"
        detail = records[-1].stop_reason
    else:
        err = describe_error(paths)
        nxt = len(records)
        if running:
            state = f"running step {nxt} ({running})"
        elif err is not None:
            state = f"failed at step {err.step}"
            detail = err.message
        elif records:
            state = f"paused after step {records[-1].step} (resume with: ionwell run)"
        else:
            state = "not started"
    model = "exact"
    if records:
        try:
            res = json.loads((paths.step(records[-1].step) / "result.json").read_text())
            model = str(res.get("potential_model", "exact"))
        except (OSError, ValueError):
            pass
    return CampaignStatus(
        potential_model=model,
        name=campaign.name,
        folder=str(paths.root),
        guest=campaign.guest.element,
        rows=rows,
        state=state,
        detail=detail,
    )


def _fmt(v: float | int | None, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def format_status(st: CampaignStatus) -> str:
    """A fixed-width table a person reads in a terminal."""
    head = (
        f"{'step':>4}  {st.guest + ' in':>6}  {'energy / eV':>16}  {'dE / eV':>10}  "
        f"{'SCF it':>6}  {'next site / V':>13}  {'time / s':>8}  findings"
    )
    lines = [f"campaign {st.name}  ({st.folder})", head, "-" * len(head)]
    for r in st.rows:
        lines.append(
            f"{r.step:>4}  {r.guests:>6}  {_fmt(r.energy, '16.6f')}  {_fmt(r.delta, '10.4f')}  "
            f"{_fmt(r.scf_iterations, '6d')}  {_fmt(r.site_potential, '13.3f')}  "
            f"{r.wall_time:8.1f}  {r.findings}"
        )
    if not st.rows:
        lines.append("  (no finished step yet)")
    lines.append("")
    if st.potential_model != "exact":
        lines.append(f"site potentials are approximate: the map is {st.potential_model}")
    lines.append(f"state: {st.state}")
    if st.detail:
        lines.append(f"       {st.detail}")
    return "\n".join(lines)


def status_json(st: CampaignStatus) -> str:
    return json.dumps(st.model_dump(mode="json"), indent=2)
