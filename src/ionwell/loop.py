"""One step's orchestration: compute, assess, decide, record, publish.

``run_step`` is the body of the Snakemake checkpoint for a step. It is idempotent with respect
to the ledger: a step whose record is already in the ledger is never computed again — a rerun only
re-publishes its status file. A step without a record is (re)computed from its input, starting
from a clean step folder except the engine folder, which keeps restart files.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import logging
import os
import shutil
import socket
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Literal

from ase import Atoms
from ase.io import read, write
from pydantic import BaseModel

import ionwell
from ionwell import checks, grid, placement
from ionwell.campaign import (
    CampaignPaths,
    append_event,
    atomic_publish,
    atomic_write_json,
    atomic_write_text,
    freeze_or_check,
    load_frozen,
)
from ionwell.config import Campaign, parse_campaign
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.errors import IonwellError, LedgerError
from ionwell.host import host_formula_units, load_host
from ionwell.ledger import (
    LedgerRecord,
    Rejection,
    append_record,
    hash_step_files,
    read_ledger,
    sync_mirror,
)

log = logging.getLogger(__name__)


class StepStatus(BaseModel):
    """The published status of a finished step (Snakemake's output for the step)."""

    step: int
    outcome: Literal["continue", "stop"]
    stop_reason: str | None = None
    record: str


class StepError(BaseModel):
    """Why the latest attempt at a step failed (the step is not finished)."""

    step: int
    message: str
    time: str


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


# ---------------------------------------------------------------------------------------------
# campaign set-up (called when the workflow is parsed and by the CLI)


def prepare_campaign(campaign: Campaign, root: Path, base_dir: Path) -> CampaignPaths:
    """Resolve paths, freeze the config (or check it is unchanged), write ``host.extxyz``.

    ``root`` is the folder holding ``campaigns/``; ``base_dir`` resolves a relative host file.
    """
    campaign = resolve_host_path(campaign, base_dir)
    paths = CampaignPaths(Path(root) / "campaigns" / campaign.name)
    # read the host before freezing, so a bad structure file leaves no campaign behind
    atoms = None if paths.host.exists() else load_host(campaign.host, base_dir)
    freeze_or_check(paths, campaign)
    if atoms is not None:
        _write_atoms(paths.host, atoms)
    return paths


def resolve_host_path(campaign: Campaign, base_dir: Path) -> Campaign:
    """Return the campaign with a relative host file made absolute against ``base_dir``."""
    f = campaign.host.file
    if f is None or Path(f).is_absolute():
        return campaign
    host = campaign.host.model_copy(update={"file": str((Path(base_dir) / f).resolve())})
    return campaign.model_copy(update={"host": host})


def campaign_from_workflow_config(config: dict, configfiles: list) -> tuple[Campaign, Path]:
    """Validate Snakemake's ``config`` dict; the base folder is that of the last config file."""
    from ionwell.engine_definitions import resolve_engines

    source = str(configfiles[-1]) if configfiles else "snakemake config"
    base = Path(configfiles[-1]).resolve().parent if configfiles else Path.cwd()
    campaign = parse_campaign(resolve_engines(dict(config), base), source)
    return campaign, base


# ---------------------------------------------------------------------------------------------
# one step


@contextlib.contextmanager
def _step_lock(paths: CampaignPaths) -> Iterator[None]:
    """Exclusive lock while a step is worked on; a leftover job of a killed controller holds it
    until it ends, and a new attempt waits for it rather than computing the step twice."""
    lockfile = paths.root / "step.lock"
    with open(lockfile, "a+") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            log.info("waiting for an earlier attempt that still holds %s", lockfile)
            fcntl.flock(fh, fcntl.LOCK_EX)
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def read_status(path: str | Path) -> StepStatus:
    return StepStatus.model_validate_json(Path(path).read_text())


def _publish_status(paths: CampaignPaths, rec: LedgerRecord) -> None:
    status = StepStatus(
        step=rec.step, outcome=rec.outcome, stop_reason=rec.stop_reason, record=rec.hash
    )
    atomic_write_text(paths.step(rec.step) / "status.json", status.model_dump_json(indent=2))


def _clean_step_dir(sdir: Path) -> None:
    """Remove what an unfinished earlier attempt left, except the engine folder."""
    sdir.mkdir(parents=True, exist_ok=True)
    for p in sdir.iterdir():
        if p.name == "engine":
            continue
        if p.is_dir():
            shutil.rmtree(p)
        else:
            p.unlink()


def _write_atoms(path: Path, atoms: Atoms | list[Atoms]) -> None:
    """Write one structure or several frames as extended XYZ, published atomically."""
    tmp = path.with_name(f".{path.name}.tmp")
    write(tmp, atoms, format="extxyz")
    atomic_publish(tmp, path)


def step_input(paths: CampaignPaths, step: int) -> Atoms:
    """The structure entering ``step``: the host for step 0, else the previous step's hand-on."""
    if step == 0:
        return read(paths.host)
    prev = paths.step(step - 1) / "next.extxyz"
    if not prev.exists():
        raise LedgerError(f"step {step}: step {step - 1} handed on no structure ({prev} missing)")
    return read(prev)


def run_step(root: str | Path, step: int) -> StepStatus:
    """Compute, assess and record one step of the campaign in folder ``root``."""
    paths = CampaignPaths(Path(root))
    from ionwell.logsetup import job_logging

    job_logging(paths)
    with _step_lock(paths):
        records = read_ledger(paths.ledger)
        if step < len(records):
            rec = records[step]
            log.info("step %04d already recorded; publishing its status only", step)
            append_event(paths, step=step, event="republished")
            _publish_status(paths, rec)
            return read_status(paths.step(step) / "status.json")
        if step != len(records):
            raise LedgerError(
                f"step {step}: cannot run before step {len(records)} is recorded in {paths.ledger}"
            )
        if records and records[-1].outcome == "stop":
            raise LedgerError(f"step {step}: the campaign stopped at step {records[-1].step}")
        append_event(paths, step=step, event="started", job=_job_id(paths.step(step) / "engine"))
        try:
            rec = _compute_and_record(paths, step)
        except Exception as err:
            msg = str(err) if isinstance(err, IonwellError) else f"{type(err).__name__}: {err}"
            atomic_write_text(
                paths.step(step) / "error.json",
                StepError(step=step, message=msg, time=_now()).model_dump_json(indent=2),
            )
            append_event(paths, step=step, event="failed", message=msg)
            log.error("step %04d failed: %s", step, msg)
            raise
        append_event(paths, step=step, event="recorded", record=rec.hash)
        try:
            sync_mirror(paths)
        except Exception as err:  # the mirror is derived data; never fail a recorded step
            log.warning("could not update %s: %s", paths.database, err)
        _publish_status(paths, rec)
        return read_status(paths.step(step) / "status.json")


def _stop_reason(campaign: Campaign, step: int, guests: int, units: float) -> str | None:
    stop = campaign.stop
    if stop.guests is not None and guests >= stop.guests:
        return f"target reached: {guests} guests"
    if stop.guests_per_unit is not None and guests / units >= stop.guests_per_unit - 1e-9:
        return f"target reached: x = {guests / units:.3f} guests per formula unit"
    if step >= stop.max_steps:
        return f"maximum steps reached ({stop.max_steps})"
    return None


class _Computed(BaseModel):
    """One engine compute of a step, after any SCF remedies."""

    model_config = {"arbitrary_types_allowed": True}

    result: StepResult
    potential: grid.Grid
    remedies: list[str]


def _scf_variants(campaign: Campaign) -> list[tuple[str, Campaign]]:
    """The campaign's engine as configured, then each configured SCF remedy."""
    eng = campaign.engine
    rem = campaign.remedies
    out = [("as configured", campaign)]
    if eng.kind != "pyscf":  # the SCF settings below are the embedded engine's
        return out
    for name in rem.scf:
        if name == "more_cycles":
            upd = {"max_cycle": max(rem.more_cycles, eng.max_cycle)}
            what = f"max_cycle {upd['max_cycle']}"
        elif name == "level_shift":
            upd = {"level_shift": rem.level_shift}
            what = f"level shift {rem.level_shift} Ha"
        else:
            upd = {"smearing": rem.smearing}
            what = f"smearing {rem.smearing} eV"
        out.append((what, campaign.model_copy(update={"engine": eng.model_copy(update=upd)})))
    return out


def _campaign_relative(workdir: Path) -> str:
    """``steps/NNNN/engine[/...]``: the engine folder's path inside the campaign folder."""
    parts = Path(workdir).resolve().parts
    i = len(parts) - 1 - parts[::-1].index("steps")
    return "/".join(parts[i:])


def _job_id(workdir: Path) -> str | None:
    """The scheduler job that computed the step: the remote job, or the job we run in."""
    f = Path(workdir) / "remote_job.json"
    if f.is_file():
        try:
            return str(json.loads(f.read_text())["job"]["job_id"])
        except (OSError, ValueError, KeyError):
            return None
    return os.environ.get("SLURM_JOB_ID") or os.environ.get("PBS_JOBID")


def _compute(campaign: Campaign, atoms: Atoms, workdir: Path, ctx: ComputeContext) -> _Computed:
    """Run the engine; when the SCF does not converge, retry with each configured remedy."""
    tried: list[str] = []
    for what, variant in _scf_variants(campaign):
        engine = get_engine(variant)
        if tried:
            log.warning("step %04d: SCF not converged; retrying with %s", ctx.step, what)
        engine.prepare(atoms, workdir, ctx)
        if variant.remote is not None:
            from ionwell.remote import execute_remote

            execute_remote(variant, workdir, _campaign_relative(workdir), ctx.step)
        elif engine.argv(workdir, None) is not None:
            engine.launch(workdir, variant.launcher)
        else:
            engine.run(workdir)
        result, pot = engine.collect(workdir)
        if tried:
            tried.append(
                f"SCF retry with {what}: {'converged' if result.scf_converged else 'not converged'}"
            )
        else:
            tried.append("first try")
        if result.scf_converged:
            break
    return _Computed(result=result, potential=pot, remedies=tried[1:])


def _movable(campaign: Campaign, n_atoms: int, guest_idx: tuple[int, ...]) -> tuple[int, ...]:
    if not campaign.relax.enabled:
        return ()
    if campaign.relax.move == "all":
        return tuple(range(n_atoms))
    return guest_idx


def _findings(campaign: Campaign, step: int, relaxed: Atoms, n_host: int, host: Atoms, result):
    ck = campaign.checks
    return checks.step_findings(
        step,
        relaxed,
        list(range(n_host, len(relaxed))),
        list(range(n_host)),
        scf_converged=result.scf_converged,
        relax_converged=result.relax_converged,
        min_distance=ck.min_distance,
        guest_host_min=ck.guest_host_min,
        envelope=ck.envelope if ck.envelope is not None else campaign.placement.within + 1.0,
        guest_alert=ck.guest_alert,
        host_pieces=checks.host_fragments(host, list(range(n_host))) if ck.connectivity else None,
        rim_distance=ck.rim_distance,
        rim_alert=ck.rim_alert,
    )


def _alternative_input(
    paths: CampaignPaths, step: int, campaign: Campaign, tried: list[list[float]]
) -> Atoms | None:
    """The previous step's structure with its next untried wells instead of the chosen ones.

    As many guests as the previous decision placed, at the next wells of that decision in depth
    order that keep the separation (:func:`placement.next_untried`); None when none is left.
    """
    if step == 0:
        return None
    prev = read_ledger(paths.ledger)[step - 1]
    if prev.decision is None or not prev.decision.chosen:
        return None
    base = read(paths.step(step - 1) / "relaxed.extxyz")
    base.calc = None
    periodic = None
    if base.pbc.any():  # the separation needs the map's periodicity
        periodic = grid.load_npz(paths.step(step - 1) / "potential.npz")
    pick = placement.next_untried(
        prev.decision.candidates,
        tried,
        count=len(prev.decision.chosen),
        separation=campaign.placement.separation,
        grid=periodic,
    )
    if not pick:
        return None
    sites = [prev.decision.candidates[i].position for i in pick]
    return base + Atoms(campaign.guest.element * len(sites), positions=sites)


def _compute_and_record(paths: CampaignPaths, step: int) -> LedgerRecord:
    t0 = time.time()
    started = _now()
    campaign = load_frozen(paths)
    host = read(paths.host)
    n_host = len(host)
    sdir = paths.step(step)
    _clean_step_dir(sdir)
    atoms = step_input(paths, step)
    guests = len(atoms) - n_host
    guest_idx = tuple(range(n_host, len(atoms)))
    charge = campaign.engine.charge + (guests if campaign.guest.charge_mode == "cation" else 0)
    previous = paths.step(step - 1) / "engine" if step > 0 else None
    ctx = ComputeContext(
        step=step,
        charge=charge,
        movable=_movable(campaign, len(atoms), guest_idx),
        previous=previous,
    )
    workdir = sdir / "engine"
    workdir.mkdir(exist_ok=True)
    rejected: list[Rejection] = []
    rounds = 0  # times this step's new sites were rejected
    n_before = n_host + (read_ledger(paths.ledger)[step - 1].guests if step > 0 else 0)
    while True:
        _write_atoms(sdir / "input.extxyz", atoms)
        log.info(
            "step %04d: %d atoms, %d %s, charge %+d — computing with %s",
            step, len(atoms), guests, campaign.guest.element, charge, campaign.engine.kind,
        )  # fmt: skip
        done = _compute(campaign, atoms, workdir, ctx)
        result, pot = done.result, done.potential
        relaxed = result.atoms()
        findings = _findings(campaign, step, relaxed, n_host, host, result)
        errors = [f for f in findings if f.severity == "error"]
        if not errors or not campaign.remedies.reject_site:
            break
        if rounds >= campaign.remedies.max_rejects or len(atoms) == n_before:
            break
        rounds += 1
        placed = [list(map(float, p)) for p in atoms.positions[n_before:]]
        alt = _alternative_input(paths, step, campaign, [r.position for r in rejected] + placed)
        if alt is None:
            break
        why = "; ".join(sorted({f.code for f in errors}))
        rejected += [Rejection(position=p, reason=why) for p in placed]
        where = ", ".join(f"({p[0]:.3f}, {p[1]:.3f}, {p[2]:.3f})" for p in placed)
        log.warning(
            "step %04d: site(s) %s rejected (%s); taking the next well(s)", step, where, why
        )
        atoms = alt

    _write_step_result(sdir, result, pot, relaxed)
    atomic_write_json(sdir / "checks.json", [f.model_dump(mode="json") for f in findings])
    for f in findings:
        (log.error if f.severity == "error" else log.warning)("step %04d: %s", step, f.message)

    units = host_formula_units(host, campaign.host.formula_unit)
    decision = None
    if errors:
        reason = "stopped by check: " + "; ".join(f.message for f in errors)
    else:
        reason = _stop_reason(campaign, step, guests, units)
    if reason is None:
        decision = _decide(campaign, pot, relaxed, n_host, step, sdir, charge)
        atomic_write_json(sdir / "decision.json", decision.model_dump(mode="json"))
        bound = campaign.stop.well_above
        if not decision.chosen:
            reason = decision.reason
        elif bound is not None and decision.chosen[0].potential > bound:
            reason = (
                f"deepest admissible well at {decision.chosen[0].potential:.3f} V lies above "
                f"the bound {bound:.3f} V"
            )
        else:
            nxt = relaxed.copy()
            for site in decision.chosen:
                nxt += Atoms(campaign.guest.element, positions=[site.position])
            _write_atoms(sdir / "next.extxyz", nxt)
            log.info(
                "step %04d: E = %.6f eV; next %s at (%.3f, %.3f, %.3f) Å, %.3f V",
                step, result.energy, campaign.guest.element, *decision.chosen[0].position,
                decision.chosen[0].potential,
            )  # fmt: skip
    if reason is not None:
        atomic_write_json(sdir / "STOP", {"step": step, "reason": reason})
        log.info("step %04d: E = %.6f eV; campaign stops: %s", step, result.energy, reason)

    counts: dict[str, int] = {}
    for f in findings:
        counts[f.severity] = counts.get(f.severity, 0) + 1
    record = LedgerRecord(
        step=step,
        parent="",
        outcome="stop" if reason is not None else "continue",
        stop_reason=reason,
        guests=guests,
        energy=result.energy,
        scf_converged=result.scf_converged,
        scf_iterations=result.scf_iterations,
        findings=counts,
        decision=decision,
        remedies=done.remedies,
        rejected=rejected,
        files=hash_step_files(sdir),
        engine=result.code,
        engine_version=result.code_version,
        ionwell_version=ionwell.__version__,
        host=socket.gethostname(),
        started=started,
        finished=_now(),
        wall_time=round(time.time() - t0, 3),
        job_id=_job_id(workdir),
    )
    rec = append_record(paths.ledger, record)
    log.info("step %04d recorded (%s…), %.1f s", step, rec.hash[:12], rec.wall_time)
    return rec


def _write_step_result(sdir: Path, result: StepResult, pot: grid.Grid, relaxed: Atoms) -> None:
    tmp = sdir / ".potential.npz.tmp.npz"
    grid.save_npz(tmp, pot)
    atomic_publish(tmp, sdir / "potential.npz")
    data = result.model_copy(update={"potential_file": "potential.npz"})
    atomic_write_text(sdir / "result.json", data.model_dump_json(indent=2))
    relaxed = relaxed.copy()
    relaxed.info["energy"] = result.energy
    _write_atoms(sdir / "relaxed.extxyz", relaxed)


def _screening_energies(
    campaign: Campaign, relaxed: Atoms, sdir: Path, step: int, charge: int
) -> placement.EnergyFunction:
    """``energy_of`` for the ``screened`` rule: a single point per candidate site (eV).

    Each candidate is computed in ``engine/screen-NN`` with the screening engine (default: the
    campaign's own), without relaxation, warm-started from this step's own density.
    """
    screen = campaign.placement.screen
    engine_cfg = screen.engine if screen.engine is not None else campaign.engine
    variant = campaign.model_copy(
        update={"engine": engine_cfg, "relax": campaign.relax.model_copy(update={"enabled": False})}
    )
    trial_charge = charge + (1 if campaign.guest.charge_mode == "cation" else 0)

    def energy_of(sites: list[placement.Site]) -> list[float | None]:
        out: list[float | None] = []
        for i, site in enumerate(sites):
            trial = relaxed.copy()
            trial.calc = None
            trial += Atoms(campaign.guest.element, positions=[site.position])
            wd = sdir / "engine" / f"screen-{i:02d}"
            wd.mkdir(parents=True, exist_ok=True)
            ctx = ComputeContext(step=step, charge=trial_charge, previous=sdir / "engine")
            try:
                done = _compute(variant, trial, wd, ctx)
            except IonwellError as err:
                log.warning("step %04d: screening candidate %d failed: %s", step, i, err)
                out.append(None)
                continue
            ok = done.result.scf_converged
            out.append(done.result.energy if ok else None)
            log.info(
                "step %04d: screening candidate %d at (%.3f, %.3f, %.3f): %s",
                step, i, *site.position,
                f"E = {done.result.energy:.6f} eV" if ok else "SCF not converged",
            )  # fmt: skip
        return out

    return energy_of


def _decide(
    campaign: Campaign,
    pot: grid.Grid,
    atoms: Atoms,
    n_host: int,
    step: int,
    sdir: Path,
    charge: int,
) -> placement.Decision:
    """The placement decision of a step (the same call replay makes)."""
    energy_of = None
    if campaign.placement.rule == "screened":
        energy_of = _screening_energies(campaign, atoms, sdir, step, charge)
    return placement.decide(
        pot,
        atoms,
        campaign.guest.element,
        campaign.placement,
        step=step,
        seed=campaign.seed,
        envelope_indices=list(range(n_host)),
        energy_of=energy_of,
    )


# ---------------------------------------------------------------------------------------------
# after the loop


class CampaignSummary(BaseModel):
    """What a finished (or stopped) campaign amounts to."""

    name: str
    steps: int
    guests: int
    stop_reason: str | None
    energies: list[float | None]
    last_record: str


def summarize(root: str | Path) -> CampaignSummary:
    """Write ``summary.json`` and ``trajectory.extxyz`` from the ledger and the step folders."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    if not records:
        raise LedgerError(f"{paths.ledger}: no finished step to summarise")
    frames = []
    for rec in records:
        a = read(paths.step(rec.step) / "relaxed.extxyz")
        a.calc = None
        a.info = {"step": rec.step, "guests": rec.guests, "energy": rec.energy}
        frames.append(a)
    _write_atoms(paths.trajectory, frames)
    sync_mirror(paths, records)
    summary = CampaignSummary(
        name=campaign.name,
        steps=len(records),
        guests=records[-1].guests,
        stop_reason=records[-1].stop_reason,
        energies=[r.energy for r in records],
        last_record=records[-1].hash,
    )
    atomic_write_text(paths.summary, summary.model_dump_json(indent=2))
    return summary


def describe_error(paths: CampaignPaths) -> StepError | None:
    """The failure of the newest unfinished step, if its last attempt failed."""
    records = read_ledger(paths.ledger)
    nxt = len(records)
    f = paths.step(nxt) / "error.json"
    if f.exists():
        try:
            return StepError.model_validate_json(f.read_text())
        except ValueError:
            return StepError(step=nxt, message=f.read_text()[:500], time="")
    return None
