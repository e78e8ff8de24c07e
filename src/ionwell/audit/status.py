"""Where a campaign stands: a model built from the folder, and its plain-text table."""

from __future__ import annotations

import json
import shutil
import subprocess
from datetime import datetime
from pathlib import Path

from pydantic import BaseModel

from ionwell.store.campaign import CampaignPaths, controller_state, load_frozen
from ionwell.store.ledger import read_ledger
from ionwell.store.paths import StepPaths
from ionwell.workflow.summary import describe_error


class StepRow(BaseModel):
    """One line of the status table."""

    step: int
    guests: int
    energy: float | None
    insertion_energy: float | None = None  # eV per guest against μ (needs the reference)
    scf_iterations: int | None
    site_potential: float | None
    findings: str
    wall_time: float
    outcome: str
    job_id: str | None = None


class CampaignStatus(BaseModel):
    """The campaign at a glance."""

    name: str
    folder: str
    guest: str
    rows: list[StepRow]
    state: str
    detail: str | None = None
    potential_model: str = "exact"
    steps_per_day: float | None = None
    remaining_steps: int | None = None
    eta_hours: float | None = None
    running_job: str | None = None
    mu: float | None = None  # eV per guest, the guest reference (None: not established yet)
    charge_mode: str = "neutral"
    mu_source: str | None = None


def _reference(paths: CampaignPaths) -> tuple[float | None, str | None]:
    """μ of the guest if the analysis established it (``reference.json``); never computes."""
    f = paths.root / "reference.json"
    if not f.is_file():
        return None, None
    try:
        data = json.loads(f.read_text())
        return float(data["mu"]), str(data.get("source", ""))
    except (OSError, ValueError, KeyError, TypeError):
        return None, None


def insertion_energy(
    e_before: float, n_before: int, e_after: float, n_after: int, mu: float
) -> float | None:
    """Energy of inserting the step's new guests against the guest reference, eV per guest:
    ``[E(n2) − E(n1) − (n2 − n1)·μ] / (n2 − n1)`` (negative: insertion is favourable; it is
    −z·e times the voltage of the step). None when no guest was added."""
    dn = n_after - n_before
    if dn <= 0:
        return None
    return (e_after - e_before - dn * mu) / dn


def campaign_status(root: str | Path) -> CampaignStatus:
    """Read the ledger, step folders and lock of a campaign folder."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    rows: list[StepRow] = []
    mu, mu_source = _reference(paths)
    prev = None
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
                insertion_energy=(
                    None
                    if mu is None or prev is None or prev.energy is None or rec.energy is None
                    else insertion_energy(prev.energy, prev.guests, rec.energy, rec.guests, mu)
                ),
                scf_iterations=rec.scf_iterations,
                site_potential=site_v,
                findings=findings,
                wall_time=rec.wall_time,
                outcome=rec.outcome,
                job_id=rec.job_id,
            )
        )
        prev = rec
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
        elif (full := _disk_full(paths)) is not None:
            state = f"failed at step {nxt}"
            detail = full
        elif records:
            state = f"paused after step {records[-1].step} (resume with: ionwell run)"
        else:
            state = "not started"
    model = "exact"
    if records:
        try:
            res = json.loads(StepPaths(paths.step(records[-1].step)).result.read_text())
            model = str(res.get("potential_model", "exact"))
        except (OSError, ValueError):
            pass
    pace = _pace(campaign, records) if records else {}
    job = None
    if records and records[-1].outcome != "stop":
        job = _running_job(paths, len(records), campaign)
    return CampaignStatus(
        **pace,
        running_job=job,
        potential_model=model,
        name=campaign.name,
        folder=str(paths.root),
        guest=campaign.guest.element,
        rows=rows,
        state=state,
        detail=detail,
        mu=mu,
        mu_source=mu_source,
        charge_mode=campaign.guest.charge_mode,
    )


#: a campaign's file system with less free space than this cannot take a step's files
LOW_SPACE = 16 * 2**20


def _disk_full(paths: CampaignPaths) -> str | None:
    """Why an unfinished campaign that recorded no failure cannot go on: its file system is
    full (a full disk cannot take the step's ``error.json`` either). None otherwise."""
    try:
        free = shutil.disk_usage(paths.root).free
    except OSError:
        return None
    if free >= LOW_SPACE:
        return None
    return (
        f"no space left on device: {free / 1024:.0f} KiB free on the file system of "
        f"{paths.root}; free space, then resume with: ionwell run"
    )


def _seconds(stamp: str) -> float | None:
    try:
        return datetime.fromisoformat(stamp).timestamp()
    except (TypeError, ValueError):
        return None


def _pace(campaign, records) -> dict:
    """Steps per day so far, steps left to the stop rule, and the time that takes at the mean
    pace of the last (up to) five steps."""
    out: dict = {}
    t0, t1 = _seconds(records[0].started), _seconds(records[-1].finished)
    if t0 is not None and t1 is not None and t1 > t0:
        out["steps_per_day"] = round(len(records) / ((t1 - t0) / 86400.0), 2)
    last = records[-1]
    if last.outcome == "stop":
        out["remaining_steps"] = 0
        return out
    per_step = campaign.placement.per_step
    left = [campaign.stop.max_steps - last.step]
    if campaign.stop.guests is not None:
        left.append(-(-(campaign.stop.guests - last.guests) // per_step))
    remaining = max(0, min(left))
    out["remaining_steps"] = remaining
    recent = [r.wall_time for r in records[-5:] if r.wall_time]
    if recent:
        out["eta_hours"] = round(remaining * sum(recent) / len(recent) / 3600.0, 3)
    return out


def _remote_state(campaign, job_id: str) -> str:
    """The remote job's state, asked over SSH (one short connection attempt)."""
    from ionwell.cluster.remote import RemoteSession
    from ionwell.errors import IonwellError

    cfg = campaign.remote.model_copy(update={"connect_attempts": 1, "timeout": 10.0})
    try:
        with RemoteSession(cfg) as ssh:
            state = ssh.state(job_id)
    except (IonwellError, OSError) as err:
        return f"state unknown ({err})"
    return state.lower() if state else "left the queue"


def _running_job(paths: CampaignPaths, step: int, campaign) -> str | None:
    """The job computing ``step`` now: its id, and where known its scheduler state."""
    f = paths.step(step) / "engine" / "remote_job.json"
    if f.is_file():
        try:
            job = json.loads(f.read_text())["job"]
        except (OSError, ValueError, KeyError):
            return None
        since = _seconds(job["submitted"])
        used = ""
        if since is not None:
            used = f", {_duration((datetime.now().timestamp() - since) / 3600.0)} since submission"
        state = _remote_state(campaign, job["job_id"]) if campaign.remote else "unknown"
        return f"remote job {job['job_id']} on {job['host']}: {state}{used}"
    job_id = None
    if paths.events.is_file():
        for line in paths.events.read_text().splitlines():
            try:
                e = json.loads(line)
            except ValueError:
                continue
            if e.get("step") == step and e.get("event") == "started":
                job_id = e.get("job")
    if not job_id:
        return None
    if shutil.which("squeue"):
        try:
            out = subprocess.run(
                ["squeue", "-h", "-j", str(job_id), "-o", "%T %M"],
                capture_output=True,
                text=True,
                timeout=10,
            ).stdout.split()
        except (OSError, subprocess.TimeoutExpired):
            out = []
        if len(out) >= 2:
            return f"job {job_id}: {out[0].lower()}, {out[1]} used"
    return f"job {job_id}"


def _fmt(v: float | int | None, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def format_status(st: CampaignStatus) -> str:
    """A fixed-width table a person reads in a terminal."""
    head = (
        f"{'step':>4}  {st.guest + ' in':>6}  {'energy / eV':>16}  {'E_ins / eV':>10}  "
        f"{'SCF it':>6}  {'next site / V':>13}  {'time / s':>8}  {'job':>8}  findings"
    )
    lines = [f"campaign {st.name}  ({st.folder})", head, "-" * len(head)]
    for r in st.rows:
        lines.append(
            f"{r.step:>4}  {r.guests:>6}  {_fmt(r.energy, '16.6f')}  {_fmt(r.insertion_energy, '10.4f')}  "
            f"{_fmt(r.scf_iterations, '6d')}  {_fmt(r.site_potential, '13.3f')}  "
            f"{r.wall_time:8.1f}  {r.job_id or '-':>8}  {r.findings}"
        )
    if not st.rows:
        lines.append("  (no finished step yet)")
    lines.append("")
    if st.mu is None:
        lines.append(
            "E_ins (insertion energy per guest against the guest's chemical potential) needs "
            "analysis.reference; run 'ionwell analyse' once one is set"
        )
    else:
        lines.append(f"E_ins per guest against μ = {st.mu:.4f} eV ({st.mu_source})")
        if st.charge_mode == "cation":
            lines.append(
                "cation mode: E_ins holds the ionisation energy of the guest and the charging "
                "of the cluster; it is not an insertion energy of a neutral electrode"
            )
    if st.potential_model != "exact":
        lines.append(f"site potentials are approximate: the map is {st.potential_model}")
    lines.append(f"state: {st.state}")
    if st.detail:
        lines.append(f"       {st.detail}")
    if st.running_job:
        lines.append(f"       {st.running_job}")
    pace = []
    if st.rows:
        pace.append(f"{len(st.rows)} steps done")
    if st.steps_per_day is not None:
        pace.append(f"{st.steps_per_day:g} steps per day so far")
    if st.remaining_steps:
        eta = f", about {_duration(st.eta_hours)}" if st.eta_hours is not None else ""
        pace.append(f"{st.remaining_steps} steps to the stop rule at most{eta}")
    if pace:
        lines.append("pace: " + "; ".join(pace))
    return "\n".join(lines)


def _duration(hours: float) -> str:
    if hours < 1:
        return f"{hours * 60:.0f} min"
    if hours < 48:
        return f"{hours:.1f} h"
    return f"{hours / 24:.1f} days"


def status_json(st: CampaignStatus) -> str:
    return json.dumps(st.model_dump(mode="json"), indent=2)
