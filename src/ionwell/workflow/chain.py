"""The bodies of the step chain's rules: ``prepare`` → ``compute`` → ``collect`` → ``assess``.

Each function is the whole body of one Snakemake rule for step ``step`` and round ``round_``
(round 0, then one more round each time a failed check rejects the step's new sites). Rules hand
each other small JSON markers under ``steps/NNNN/flow/`` (:class:`ionwell.store.paths.StepPaths`);
the decisions themselves are the pure functions of :mod:`ionwell.science.step`.

- ``prepare`` checks the structure it starts from against the previous step's ledger record,
  writes ``input.extxyz`` and the engine's inputs.
- ``compute`` runs the engine with its SCF remedies (the only rule with scheduler resources;
  the body of a remote job in remote mode). It never touches the ledger.
- ``collect`` parses the engine's outputs into ``result.json``, ``potential.npz`` (a hard link
  to the engine's map, not a copy) and ``relaxed.extxyz``. A fixed parser re-runs it alone.
- ``assess`` (the checkpoint, always on the controller) runs the checks, rejects sites, applies
  the stop rule, makes the placement decision, appends the ledger record and publishes
  ``status.json``. Its verdict says whether round K+1, step N+1, or nothing follows.

A step is finished exactly when its ledger record is appended; everything before that is redone
on resume, nothing after it is ever redone (``assess`` of a recorded step only re-publishes).
"""

from __future__ import annotations

import contextlib
import fcntl
import functools
import json
import logging
import os
import shutil
import socket
import time
from collections import deque
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Literal, TypeVar

import numpy as np
from ase import Atoms
from ase.calculators.singlepoint import SinglePointCalculator
from ase.io import read
from pydantic import BaseModel, ConfigDict, Field

import ionwell
from ionwell.config.campaign import Campaign
from ionwell.engines import get_engine, soft_stop
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.launcher import SoftStopped
from ionwell.engines.results import INPUT as ENGINE_INPUT
from ionwell.engines.results import POTENTIAL as ENGINE_MAP
from ionwell.engines.run import run_engine
from ionwell.errors import (
    ErrorKind,
    IonwellError,
    LedgerError,
    StepFailedError,
    describe_exception,
    error_kind,
)
from ionwell.io.npz import load_npz, save_npz
from ionwell.science import checks, placement
from ionwell.science import step as decide_step
from ionwell.science.host import host_formula_units
from ionwell.store.campaign import (
    CampaignPaths,
    append_event,
    atomic_publish,
    atomic_write_extxyz,
    atomic_write_json,
    atomic_write_text,
    load_frozen,
)
from ionwell.store.ledger import (
    LedgerRecord,
    PreRelaxRecord,
    Rejection,
    append_record,
    hash_step_files,
    input_digests,
    last_record,
    read_ledger,
    sha256_file,
    sync_mirror,
)
from ionwell.store.paths import StepPaths, step_label
from ionwell.workflow.plan import is_stopped

log = logging.getLogger(__name__)

__all__ = [
    "Collected",
    "Computed",
    "Prepared",
    "StepError",
    "StepStatus",
    "Verdict",
    "assess",
    "collect",
    "compute",
    "republish_statuses",
    "prepare",
]


# ---------------------------------------------------------------------------------------------
# the markers the rules hand each other


class _Marker(BaseModel):
    model_config = ConfigDict(extra="forbid")

    step: int
    round: int


class Prepared(_Marker):
    """What ``prepare`` set up: the structure (by digest), charge and movable atoms."""

    input_sha256: str
    guests: int
    charge: int
    movable: list[int]
    placed: list[list[float]] = Field(description="this round's new guest sites, Å")
    rejected: list[Rejection] = Field(description="sites struck out in earlier rounds")
    started: str
    t0: float = Field(description="seconds since the epoch")


class Computed(_Marker):
    """What ``compute`` did: SCF remedies tried, the scheduler job, a parse problem if any."""

    remedies: list[str]
    scf_converged: bool | None
    parse_error: str | None = None
    job_id: str | None = None
    seconds: float
    failed: str | None = Field(
        None,
        description="a failure that repeats on every try: the job ends normally (so it is not "
        "retried) and `collect` reports it",
    )
    failed_kind: ErrorKind | None = None
    pre_relax: PreRelaxRecord | None = Field(
        None, description="the cheap relaxation before the engine's (relax.pre), when made"
    )


class Collected(_Marker):
    energy: float
    scf_converged: bool


class Verdict(_Marker):
    """What ``assess`` decided: the next round, the next step, or the end."""

    outcome: Literal["retry", "screen", "continue", "stop"]
    stop_reason: str | None = None
    record: str | None = None
    sites: list[list[float]] = Field(
        default_factory=list, description="retry: the next sites; screen: the candidates, Å"
    )
    rejected: list[list[float]] = Field(default_factory=list, description="retry: struck out")
    reason: str | None = None


class StepStatus(BaseModel):
    """The published status of a finished step."""

    step: int
    outcome: Literal["continue", "stop"]
    stop_reason: str | None = None
    record: str


class StepError(BaseModel):
    """Why the latest attempt at a step failed (the step is not finished). ``kind``: ``input``,
    ``scf``, ``disk`` and ``memory`` fail the same way on every try (not retried; fix the cause,
    then ``ionwell run`` again), ``transient`` ones are retried."""

    step: int
    message: str
    time: str
    kind: ErrorKind = "transient"


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _write_marker(path: Path, marker: BaseModel) -> None:
    atomic_write_text(path, marker.model_dump_json(indent=2) + "\n")


_M = TypeVar("_M", bound=BaseModel)


def _read_marker(path: Path, model: type[_M]) -> _M:
    try:
        return model.model_validate_json(path.read_bytes())
    except (OSError, ValueError) as err:
        raise LedgerError(f"{path}: unreadable marker of the step chain ({err})") from None


def read_verdict(path: str | Path) -> Verdict:
    """The verdict of an ``assess`` job (the checkpoint's output)."""
    return _read_marker(Path(path), Verdict)


# ---------------------------------------------------------------------------------------------
# per-process caches (rule bodies run as threads of the controller under --force-use-threads)


@functools.lru_cache(maxsize=8)
def _campaign_cached(config: str, mtime_ns: int) -> Campaign:
    return load_frozen(CampaignPaths(Path(config).parent))


def _campaign(paths: CampaignPaths) -> Campaign:
    return _campaign_cached(str(paths.config.resolve()), paths.config.stat().st_mtime_ns)


@functools.lru_cache(maxsize=8)
def _host_cached(host: str, mtime_ns: int) -> Atoms:
    return read(host)


def _host(paths: CampaignPaths) -> Atoms:
    a = _host_cached(str(paths.host.resolve()), paths.host.stat().st_mtime_ns)
    return a.copy()


@functools.lru_cache(maxsize=8)
def _host_facts_cached(host: str, mtime_ns: int, config: str, config_mtime: int):
    campaign = _campaign_cached(config, config_mtime)
    return checks.host_facts(read(host), campaign.checks)


def _host_facts(paths: CampaignPaths):
    return _host_facts_cached(
        str(paths.host.resolve()),
        paths.host.stat().st_mtime_ns,
        str(paths.config.resolve()),
        paths.config.stat().st_mtime_ns,
    )


# ---------------------------------------------------------------------------------------------
# small I/O helpers


@contextlib.contextmanager
def _step_lock(paths: CampaignPaths) -> Iterator[None]:
    """Exclusive lock while a step is worked on: a leftover job of a killed controller holds it
    until it ends, and a new attempt waits for it rather than computing the step twice."""
    lockfile = paths.root / "step.lock"
    with open(lockfile, "a+") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            log.info("waiting for an earlier attempt that still holds %s", lockfile)
            fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def _job_id(workdir: Path) -> str | None:
    """The scheduler job that computed the step: the remote job, or the job we run in."""
    f = Path(workdir) / "remote_job.json"
    if f.is_file():
        try:
            return str(json.loads(f.read_text())["job"]["job_id"])
        except (OSError, ValueError, KeyError):
            return None
    return os.environ.get("SLURM_JOB_ID") or os.environ.get("PBS_JOBID")


def _fail(paths: CampaignPaths, step: int, err: BaseException) -> None:
    msg = describe_exception(err)
    kind = error_kind(err)
    with contextlib.suppress(OSError):
        atomic_write_text(
            StepPaths(paths.step(step)).error,
            StepError(step=step, message=msg, time=_now(), kind=kind).model_dump_json(indent=2),
        )
        # a program stopped on the scheduler's warning is no failure: the retry continues it
        event = "stopped" if isinstance(err, SoftStopped) else "failed"
        append_event(paths, step=step, event=event, message=msg)
    if isinstance(err, SoftStopped):
        log.warning("step %04d stopped before the time limit, not finished: %s", step, msg)
    else:
        log.error("step %04d failed: %s", step, msg)


@contextlib.contextmanager
def _reported(paths: CampaignPaths, step: int) -> Iterator[None]:
    """Run a rule body; a failure is written to the step's ``error.json`` and re-raised."""
    from ionwell.logsetup import job_logging

    job_logging(paths)
    try:
        yield
    except BaseException as err:
        if not isinstance(err, KeyboardInterrupt | SystemExit):
            _fail(paths, step, err)
        raise


def _tip_for(paths: CampaignPaths, step: int) -> LedgerRecord | None:
    """The previous step's record; refuses a step that is recorded or cannot run yet."""
    tip = last_record(paths.ledger)
    expected = 0 if tip is None else tip.step + 1
    if step != expected:
        if step < expected:
            raise LedgerError(f"step {step}: already recorded in {paths.ledger}; not recomputed")
        raise LedgerError(f"step {step}: cannot run before step {expected} is recorded")
    if is_stopped(paths, tip):
        raise LedgerError(f"step {step}: the campaign stopped at step {tip.step}")
    return tip


def _previous_decision(paths: CampaignPaths, tip: LedgerRecord | None, step: int):
    """The decision that placed step ``step``'s new guests: the previous record's, or the
    handover that extended a stopped campaign."""
    if tip is None:
        return None
    if tip.outcome == "stop":
        from ionwell.workflow.extend import read_handover

        return read_handover(StepPaths(paths.step(step)))
    return tip.decision


def _checked_structure(paths: CampaignPaths, tip: LedgerRecord, name: str) -> Atoms:
    """A file the previous step recorded, refused when it differs from its ledger digest."""
    f = paths.step(tip.step) / name
    where = f"steps/{step_label(tip.step)}/{name}"
    want = tip.files.get(name)
    if want is None or not f.is_file():
        raise LedgerError(
            f"step {tip.step + 1}: {where} is missing (step {tip.step} recorded no such file)"
        )
    if sha256_file(f) != want:
        raise LedgerError(
            f"step {tip.step + 1}: {where} was changed after step {tip.step} was recorded "
            "(its sha256 differs from the ledger); restore the file or start a new campaign"
        )
    atoms = read(f)
    atoms.calc = None
    return atoms


def _clean_round_zero(sp: StepPaths) -> None:
    """Remove what an unfinished earlier attempt left, except the engine folder (restart
    files) and the chain's own markers (Snakemake's outputs)."""
    sp.root.mkdir(parents=True, exist_ok=True)
    for p in sp.root.iterdir():
        if p.name in ("engine", "flow", sp.handover.name):
            continue
        if p.is_dir():
            shutil.rmtree(p)
        else:
            p.unlink()
    if sp.flow.is_dir():  # markers of later rounds belong to the abandoned attempt
        for p in sp.flow.iterdir():
            if not p.name.startswith("r0."):
                p.unlink()


# ---------------------------------------------------------------------------------------------
# prepare


def prepare(root: str | Path, step: int, round_: int = 0) -> Prepared:
    """Body of rule ``prepare``: the structure entering the step (round), and engine inputs."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step):
        return _prepare(paths, step, round_)


def _prepare(paths: CampaignPaths, step: int, round_: int) -> Prepared:
    t0 = time.time()
    campaign = _campaign(paths)
    sp = StepPaths(paths.step(step))
    tip = _tip_for(paths, step)
    host = _host(paths)
    n_host = len(host)
    n_before = n_host + (tip.guests if tip is not None else 0)
    if round_ == 0:
        _clean_round_zero(sp)
        if tip is None:
            atoms = host
        elif tip.outcome == "stop":  # extended after its stop rule: the handover's sites
            handed = _previous_decision(paths, tip, step)
            base = _checked_structure(paths, tip, sp.relaxed.name)
            sites = [s.position for s in handed.chosen]
            atoms = decide_step.with_guests(base, campaign.guest.element, sites)
        else:
            atoms = _checked_structure(paths, tip, sp.next.name)
        rejected: list[Rejection] = []
    else:
        before = _read_marker(sp.marker(round_ - 1, "prepared"), Prepared)
        verdict = read_verdict(sp.marker(round_ - 1, "verdict"))
        if verdict.outcome != "retry" or tip is None:
            raise LedgerError(f"step {step}: round {round_} follows no rejected site")
        base = _checked_structure(paths, tip, sp.relaxed.name)
        atoms = decide_step.with_guests(base, campaign.guest.element, verdict.sites)
        rejected = before.rejected + [
            Rejection(position=p, reason=verdict.reason or "") for p in verdict.rejected
        ]
    guests = len(atoms) - n_host
    charge = decide_step.system_charge(campaign, guests)
    movable = decide_step.movable_atoms(campaign.relax, len(atoms), range(n_host, len(atoms)))
    handed_on = StepPaths(paths.step(tip.step)).next if tip is not None else None
    if round_ == 0 and tip is not None and tip.outcome == "continue":
        _link_or_copy(handed_on, sp.input)  # the previous step's hand-on, verified above
    else:
        atomic_write_extxyz(sp.input, atoms)
    ctx = _context(paths, step, charge, movable)
    sp.engine.mkdir(parents=True, exist_ok=True)
    get_engine(campaign).prepare(atoms, sp.engine, ctx)
    prepared = Prepared(
        step=step,
        round=round_,
        input_sha256=sha256_file(sp.input),
        guests=guests,
        charge=charge,
        movable=list(movable),
        placed=[list(map(float, p)) for p in atoms.positions[n_before:]],
        rejected=rejected,
        started=_now(),
        t0=t0,
    )
    _write_marker(sp.marker(round_, "prepared"), prepared)
    return prepared


def _link_or_copy(src: Path, dst: Path) -> None:
    """``dst`` as a hard link to the recorded, never rewritten ``src`` (a copy across file
    systems). Recorded files are replaced, never modified in place, so sharing is safe."""
    dst.unlink(missing_ok=True)
    try:
        os.link(src, dst)
    except OSError:
        shutil.copyfile(src, dst)


def _dedupe(keep: Path, other: Path) -> None:
    """Store ``other`` as a hard link to ``keep`` when their bytes are the same (an engine's
    copy of the step's input structure)."""
    try:
        same = other.stat().st_size == keep.stat().st_size and sha256_file(other) == sha256_file(
            keep
        )
    except OSError:
        return
    if same and not os.path.samefile(keep, other):
        _link_or_copy(keep, other)


def _context(paths: CampaignPaths, step: int, charge: int, movable) -> ComputeContext:
    previous = paths.step(step - 1) / "engine" if step > 0 else None
    return ComputeContext(step=step, charge=charge, movable=tuple(movable), previous=previous)


# ---------------------------------------------------------------------------------------------
# compute


def compute(root: str | Path, step: int, round_: int = 0) -> Computed:
    """Body of rule ``compute``: the engine run with its SCF remedies (locally, in a cluster
    job, or as a remote job). Writes no ledger record."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step), _step_lock(paths):
        t0 = time.monotonic()
        try:
            return _compute(paths, step, round_)
        except Exception as err:
            if error_kind(err) == "transient":
                raise  # Snakemake retries the job
            return _failed_for_good(paths, step, round_, err, time.monotonic() - t0)


def _failed_for_good(
    paths: CampaignPaths, step: int, round_: int, err: Exception, seconds: float
) -> Computed:
    """A compute failure that repeats on every try (bad input, no space left, out of memory):
    the job ends normally with the failure in its marker, so Snakemake does not retry it, and
    `collect` (never retried) reports it and removes the marker (the next run computes
    again)."""
    log.debug("step %04d: %s (not retried: it fails the same way on every try)", step, err)
    sp = StepPaths(paths.step(step))
    computed = Computed(
        step=step, round=round_, remedies=[], scf_converged=None, job_id=_job_id(sp.engine),
        seconds=round(seconds, 3), failed=describe_exception(err), failed_kind=error_kind(err),
    )  # fmt: skip
    _write_marker(sp.marker(round_, "computed"), computed)
    return computed


def _compute(paths: CampaignPaths, step: int, round_: int) -> Computed:
    campaign = _campaign(paths)
    sp = StepPaths(paths.step(step))
    prep = _read_marker(sp.marker(round_, "prepared"), Prepared)
    if sha256_file(sp.input) != prep.input_sha256:
        raise LedgerError(f"step {step}: {sp.input} changed after it was prepared")
    atoms = read(sp.input)
    ctx = _context(paths, step, prep.charge, prep.movable)
    append_event(paths, step=step, round=round_, event="started", job=_job_id(sp.engine))
    log.info(
        "step %04d: %d atoms, %d %s, charge %+d — computing with %s",
        step, len(atoms), prep.guests, campaign.guest.element, prep.charge, campaign.engine.kind,
    )  # fmt: skip
    t0 = time.monotonic()
    pre = None
    if campaign.relax.enabled and campaign.relax.pre is not None and prep.movable:
        # cheap before expensive: the engine's relaxation starts at the tight-binding minimum
        from ionwell.engines.pre_relax import pre_relax

        atoms, pre = pre_relax(
            atoms, prep.movable, prep.charge, campaign.relax, sp.root / "pre-relax"
        )
    relative = f"steps/{step_label(step)}/engine"
    # the scheduler's warning before the time limit (SIGUSR1) stops an external program
    # through its soft-stop files; SoftStopped then leaves the step unfinished (no marker)
    with _watch_controller(paths), soft_stop.listening():
        done = run_engine(campaign, atoms, sp.engine, ctx, relative, tolerate_parse_errors=True)
    computed = Computed(
        step=step,
        round=round_,
        remedies=done.remedies,
        scf_converged=None if done.result is None else done.result.scf_converged,
        parse_error=done.parse_error,
        job_id=_job_id(sp.engine),
        seconds=round(time.monotonic() - t0, 3),
        pre_relax=pre,
    )
    _write_marker(sp.marker(round_, "computed"), computed)
    return computed


@contextlib.contextmanager
def _watch_controller(paths: CampaignPaths) -> Iterator[None]:
    """In a cluster job: end the job when the controller that started it is gone for good (its
    lock was taken over by another controller, or removed), so no job computes on for hours
    with nobody to collect it. Outside a cluster job nothing is watched: local jobs are ended
    with their controller's process group."""
    from ionwell.workflow import watchdog

    if not (os.environ.get("SLURM_JOB_ID") or os.environ.get("PBS_JOBID")):
        yield
        return
    with watchdog.watch(paths.lock):
        yield


# ---------------------------------------------------------------------------------------------
# collect


def collect(root: str | Path, step: int, round_: int = 0) -> Collected:
    """Body of rule ``collect``: the engine's outputs as the step's result files."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step):
        return _collect(paths, step, round_)


def _collect(paths: CampaignPaths, step: int, round_: int) -> Collected:
    campaign = _campaign(paths)
    sp = StepPaths(paths.step(step))
    marker = sp.marker(round_, "computed")
    comp = _read_marker(marker, Computed)
    if comp.failed is not None:  # failed for good (see _failed_for_good): not collected
        marker.unlink(missing_ok=True)
        raise StepFailedError(comp.failed, comp.failed_kind or "input")
    result, pot = get_engine(campaign).collect(sp.engine)
    _dedupe(sp.input, sp.engine / ENGINE_INPUT)  # the compute is over: inputs are final
    engine_map = sp.engine / ENGINE_MAP
    if engine_map.is_file():  # the engine's own float32 map: link, do not copy
        _link_or_copy(engine_map, sp.potential)
    else:
        tmp = sp.root / ".potential.npz.tmp.npz"
        save_npz(tmp, pot)
        atomic_publish(tmp, sp.potential)
    data = result.model_copy(
        update={"potential_file": sp.potential.name, "positions": [], "symbols": [], "forces": None}
    )
    atomic_write_text(sp.result, data.model_dump_json(indent=2))
    relaxed = result.atoms()
    forces = None if result.forces is None else np.asarray(result.forces)
    free = result.energy if result.free_energy is None else result.free_energy
    relaxed.calc = SinglePointCalculator(
        relaxed, energy=result.energy, free_energy=free, forces=forces
    )
    atomic_write_extxyz(sp.relaxed, relaxed)
    collected = Collected(
        step=step, round=round_, energy=result.energy, scf_converged=result.scf_converged
    )
    _write_marker(sp.marker(round_, "collected"), collected)
    return collected


# ---------------------------------------------------------------------------------------------
# assess

#: finish times of the steps this process recorded (the pace shown in the progress line)
_recent: deque[float] = deque(maxlen=6)


def assess(root: str | Path, step: int, round_: int = 0) -> Verdict:
    """Body of checkpoint ``assess``: checks, site rejection, stop rule, placement decision,
    ledger record, published status. Runs on the controller."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step), _step_lock(paths):
        return _assess(paths, step, round_)


def _publish_status(paths: CampaignPaths, rec: LedgerRecord) -> None:
    status = StepStatus(
        step=rec.step, outcome=rec.outcome, stop_reason=rec.stop_reason, record=rec.hash
    )
    atomic_write_text(StepPaths(paths.step(rec.step)).status, status.model_dump_json(indent=2))


def republish_statuses(paths: CampaignPaths) -> list[int]:
    """Publish again the ``status.json`` of recorded steps that lost it (removed by hand or by
    a tool): the ledger record is the truth, the status file its published copy. Returns the
    steps re-published; costs one ``stat`` per recorded step when nothing is missing."""
    tip = last_record(paths.ledger)
    if tip is None:
        return []
    missing = {n for n in range(tip.step + 1) if not StepPaths(paths.step(n)).status.exists()}
    if not missing:
        return []
    done = []
    for rec in read_ledger(paths.ledger):
        if rec.step in missing and paths.step(rec.step).is_dir():
            _publish_status(paths, rec)
            append_event(paths, step=rec.step, event="republished")
            done.append(rec.step)
    return done


def _republish(
    paths: CampaignPaths, rec: LedgerRecord, round_: int, stage: str = "verdict"
) -> Verdict:
    sp = StepPaths(paths.step(rec.step))
    _publish_status(paths, rec)
    verdict = Verdict(
        step=rec.step, round=round_, outcome=rec.outcome, stop_reason=rec.stop_reason,
        record=rec.hash,
    )  # fmt: skip
    _write_marker(sp.marker(round_, stage), verdict)
    return verdict


def _assess(paths: CampaignPaths, step: int, round_: int) -> Verdict:
    tip = last_record(paths.ledger)
    if tip is not None and tip.step == step:  # recorded before a kill: publish only
        log.info("step %04d already recorded; publishing its status only", step)
        append_event(paths, step=step, event="republished")
        return _republish(paths, tip, round_)
    tip = _tip_for(paths, step)
    campaign = _campaign(paths)
    sp = StepPaths(paths.step(step))
    done = _Round(sp, round_)
    prep, result, relaxed = done.prep, done.result, done.relaxed
    host = _host(paths)
    n_host = len(host)
    findings = _findings(campaign, paths, step, relaxed, host, result)
    errors = [f for f in findings if f.severity == "error"]

    if errors and tip is not None:
        periodic = None
        if host.pbc.any() and campaign.remedies.reject_site:
            periodic = load_npz(StepPaths(paths.step(tip.step)).potential)
        retry = decide_step.after_checks(
            campaign,
            findings,
            round_=round_,
            placed=prep.placed,
            rejected=[r.position for r in prep.rejected],
            previous=_previous_decision(paths, tip, step),
            periodic=periodic,
        )
        if retry is not None:
            where = ", ".join(f"({p[0]:.3f}, {p[1]:.3f}, {p[2]:.3f})" for p in retry.rejected)
            log.warning(
                "step %04d: site(s) %s rejected (%s); taking the next well(s)",
                step, where, retry.reason,
            )  # fmt: skip
            verdict = Verdict(
                step=step, round=round_, outcome="retry", sites=retry.sites,
                rejected=retry.rejected, reason=retry.reason,
            )  # fmt: skip
            _write_marker(sp.marker(round_, "verdict"), verdict)
            return verdict

    atomic_write_json(sp.checks, [f.model_dump(mode="json") for f in findings])
    for f in findings:
        (log.error if f.severity == "error" else log.warning)("step %04d: %s", step, f.message)
    units = host_formula_units(host, campaign.host.formula_unit)
    reason = decide_step.check_stop(campaign, findings, step, prep.guests, units)
    if reason is None and campaign.placement.rule == "screened":
        sites = _screen_candidates(campaign, sp, relaxed, n_host, step)
        if sites:  # the candidates' energies are computed by parallel `screen` jobs
            verdict = Verdict(step=step, round=round_, outcome="screen", sites=sites)
            _write_marker(sp.marker(round_, "verdict"), verdict)
            log.info("step %04d: screening the %d deepest wells", step, len(sites))
            return verdict
    return _finish(paths, campaign, tip, done, host, findings, reason, "verdict")


class _Round:
    """What the rules before ``assess`` left of one round: the prepared and computed
    markers, the result and the structure after the compute (read once per body)."""

    def __init__(self, sp: StepPaths, round_: int) -> None:
        self.sp, self.round = sp, round_
        self.prep = _read_marker(sp.marker(round_, "prepared"), Prepared)
        self.comp = _read_marker(sp.marker(round_, "computed"), Computed)
        self.result = StepResult.model_validate_json(sp.result.read_bytes())
        self.relaxed = read(sp.relaxed)
        self.relaxed.calc = None


def _finish(
    paths: CampaignPaths,
    campaign: Campaign,
    tip: LedgerRecord | None,
    done: _Round,
    host: Atoms,
    findings: list[checks.Finding],
    reason: str | None,
    stage: str,
    energy_of: placement.EnergyFunction | None = None,
) -> Verdict:
    """The placement decision (unless ``reason`` already stops the campaign), the hand-on
    structure or STOP, the ledger record and the published status."""
    sp, round_, step = done.sp, done.round, done.prep.step
    prep, comp, result, relaxed = done.prep, done.comp, done.result, done.relaxed
    n_host = len(host)
    units = host_formula_units(host, campaign.host.formula_unit)
    decision = None
    if reason is None:
        decision = _decide(campaign, sp, relaxed, n_host, step, prep.guests, energy_of)
        atomic_write_json(sp.decision, decision.model_dump(mode="json"))
        findings = _with_decision_findings(campaign, sp, step, findings, decision)
        reason = decide_step.after_decision(campaign, decision)
        if reason is None:
            sites = [s.position for s in decision.chosen]
            atomic_write_extxyz(
                sp.next, decide_step.with_guests(relaxed, campaign.guest.element, sites)
            )
            log.info(
                "step %04d: E = %.6f eV; next %s at (%.3f, %.3f, %.3f) Å, %.3f V",
                step, result.energy, campaign.guest.element, *decision.chosen[0].position,
                decision.chosen[0].potential,
            )  # fmt: skip
    if reason is not None:
        atomic_write_json(sp.stop, {"step": step, "reason": reason})
        log.info("step %04d: E = %.6f eV; campaign stops: %s", step, result.energy, reason)

    counts: dict[str, int] = {}
    for f in findings:
        counts[f.severity] = counts.get(f.severity, 0) + 1
    record = LedgerRecord(
        step=step,
        parent="",
        outcome="stop" if reason is not None else "continue",
        stop_reason=reason,
        guests=prep.guests,
        energy=result.energy,
        free_energy=result.free_energy,
        scf_converged=result.scf_converged,
        scf_iterations=result.scf_iterations,
        findings=counts,
        decision=decision,
        remedies=comp.remedies,
        rejected=prep.rejected,
        files=hash_step_files(sp.root),
        engine=result.code,
        engine_version=result.code_version,
        ionwell_version=ionwell.__version__,
        host=socket.gethostname(),
        started=prep.started,
        finished=_now(),
        wall_time=round(time.time() - prep.t0, 3),
        job_id=comp.job_id,
        inputs=input_digests(paths) if step == 0 else None,
        pre_relax=comp.pre_relax,
        guess=result.guess,
    )
    rec = append_record(paths.ledger, record, tip=tip)
    append_event(paths, step=step, event="recorded", record=rec.hash)
    try:
        sync_mirror(paths, [rec])
    except Exception as err:  # the mirror is derived data; never fail a recorded step
        log.warning("could not update %s: %s", paths.database, err)
    _progress(campaign, rec, units)
    return _republish(paths, rec, round_, stage)


def _progress(campaign: Campaign, rec: LedgerRecord, units: float) -> None:
    """One line: step k of at most N, and the time left at the recent pace."""
    _recent.append(time.monotonic())
    stop = campaign.stop
    last = stop.max_steps
    if stop.guests is not None:
        last = min(last, -(-stop.guests // campaign.placement.per_step))
    left = ""
    if rec.outcome == "continue" and len(_recent) >= 2:
        pace = (_recent[-1] - _recent[0]) / (len(_recent) - 1)
        remaining = max(0, last - rec.step) * pace
        left = f"; about {_duration(remaining)} left at {pace:.1f} s per step"
    log.info(
        "step %04d of ≤%d recorded (%d %s, %s…)%s",
        rec.step, last, rec.guests, campaign.guest.element, rec.hash[:10], left,
    )  # fmt: skip


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _with_decision_findings(
    campaign: Campaign,
    sp: StepPaths,
    step: int,
    findings: list[checks.Finding],
    decision: placement.Decision,
) -> list[checks.Finding]:
    """The step's findings with those of its placement decision (a site on a boundary, a well
    that repels a cation, a map too flat to rank), written to ``checks.json``. Idempotent: a
    body run again after a kill does not add them twice."""
    extra = checks.decision_findings(
        step,
        decision,
        campaign.checks,
        charge_mode=campaign.guest.charge_mode,
        guest=campaign.guest.element,
    )
    new = [f for f in extra if f not in findings]
    if not new:
        return findings
    for f in new:
        log.warning("step %04d: %s", step, f.message)
    out = sorted([*findings, *new], key=lambda f: -checks.SEVERITY_RANK[f.severity])
    atomic_write_json(sp.checks, [f.model_dump(mode="json") for f in out])
    return out


def _findings(campaign, paths, step, relaxed, host, result) -> list[checks.Finding]:
    ck = campaign.checks
    facts = _host_facts(paths)
    # host atoms that moved since step 0 (none when the relaxation moves only guests)
    moved = facts.moved(relaxed) if campaign.relax.enabled and campaign.relax.move == "all" else []
    found = checks.step_findings(
        step,
        relaxed,
        len(host),
        ck,
        facts,
        scf_converged=result.scf_converged,
        relax_converged=result.relax_converged,
        envelope=ck.envelope_for(campaign.placement.within),
        moved=moved,
        guest=campaign.guest.element,
    )
    found += checks.level_order_findings(
        step, result.orbital_energies, result.occupations, ck.level_order
    )
    return sorted(found, key=lambda f: -checks.SEVERITY_RANK[f.severity])


def _decide(
    campaign, sp: StepPaths, relaxed, n_host, step, guests, energy_of=None
) -> placement.Decision:
    """The placement decision of a step (the same call replay makes). The ``screened`` rule
    takes its candidates' energies from ``energy_of`` (the step's `screen` jobs), else computes
    them one after the other here."""
    if campaign.placement.rule == "screened" and energy_of is None:
        energy_of = _screening_energies(campaign, relaxed, sp, step, guests)
    pot = load_npz(sp.potential)
    return placement.decide(
        pot,
        relaxed,
        campaign.guest.element,
        campaign.placement,
        step=step,
        seed=campaign.seed,
        envelope_indices=list(range(n_host)),
        energy_of=energy_of,
    )


def _screening_energies(
    campaign: Campaign, relaxed: Atoms, sp: StepPaths, step: int, guests: int
) -> placement.EnergyFunction:
    """``energy_of`` for the ``screened`` rule computing the candidates one after the other
    here (used where no `screen` jobs ran: extending a stopped campaign)."""

    def energy_of(sites: list[placement.Site]) -> list[float | None]:
        return [
            _screen_one(campaign, relaxed, sp, step, guests, i, site.position)[0]
            for i, site in enumerate(sites)
        ]

    return energy_of


# ---------------------------------------------------------------------------------------------
# the screened rule: candidates computed as parallel jobs, then the decision


class Screened(_Marker):
    """One candidate's single-point energy (eV; None when it failed or did not converge)."""

    candidate: int
    position: list[float]
    energy: float | None
    message: str = ""


def _screen_candidates(campaign, sp: StepPaths, relaxed, n_host, step) -> list[list[float]]:
    """The wells the ``screened`` rule will compute: the same call as the decision, with an
    energy function that only notes which sites it is asked about."""
    asked: list[list[float]] = []

    def note(sites: list[placement.Site]) -> list[float | None]:
        asked.extend(list(map(float, s.position)) for s in sites)
        return [None] * len(sites)

    pot = load_npz(sp.potential)
    placement.decide(
        pot, relaxed, campaign.guest.element, campaign.placement, step=step, seed=campaign.seed,
        envelope_indices=list(range(n_host)), energy_of=note,
    )  # fmt: skip
    return asked


def _screen_one(
    campaign: Campaign,
    relaxed: Atoms,
    sp: StepPaths,
    step: int,
    guests: int,
    index: int,
    position: list[float],
) -> tuple[float | None, str]:
    """One candidate's single point (eV, or None and why) with the screening engine (default:
    the campaign's), no relaxation, in ``engine/screen-NN``, warm-started from the step's own
    engine folder."""
    screen_cfg = campaign.placement.screen
    variant = campaign.model_copy(
        update={
            "engine": screen_cfg.engine if screen_cfg.engine is not None else campaign.engine,
            "relax": campaign.relax.model_copy(update={"enabled": False}),
        }
    )
    trial = decide_step.with_guests(relaxed, campaign.guest.element, [position])
    wd = sp.engine / f"screen-{index:02d}"
    wd.mkdir(parents=True, exist_ok=True)
    charge = decide_step.system_charge(campaign, guests + 1)
    ctx = ComputeContext(step=step, charge=charge, previous=sp.engine)
    energy, message = None, ""
    try:
        done = run_engine(variant, trial, wd, ctx)
    except SoftStopped:  # stopped before the job's time limit: the retry computes it
        raise
    except IonwellError as err:
        message = str(err)
        log.warning("step %04d: screening candidate %d failed: %s", step, index, err)
    else:
        if done.result is not None and done.result.scf_converged:
            energy = done.result.energy
        else:
            message = "SCF not converged"
    log.info(
        "step %04d: screening candidate %d at (%.3f, %.3f, %.3f): %s",
        step, index, *position,
        f"E = {energy:.6f} eV" if energy is not None else message,
    )  # fmt: skip
    return energy, message


def screen(root: str | Path, step: int, round_: int, candidate: int) -> Screened:
    """Body of rule ``screen``: one candidate site's single point (:func:`_screen_one`)."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step):
        campaign = _campaign(paths)
        sp = StepPaths(paths.step(step))
        verdict = read_verdict(sp.marker(round_, "verdict"))
        prep = _read_marker(sp.marker(round_, "prepared"), Prepared)
        site = verdict.sites[candidate]
        relaxed = read(sp.relaxed)
        with soft_stop.listening():
            energy, message = _screen_one(campaign, relaxed, sp, step, prep.guests, candidate, site)
        out = Screened(
            step=step, round=round_, candidate=candidate, position=site, energy=energy,
            message=message,
        )  # fmt: skip
        _write_marker(sp.marker(round_, f"screen-{candidate}"), out)
        return out


def decide(root: str | Path, step: int, round_: int) -> Verdict:
    """Body of checkpoint ``decide`` (the screened rule): the decision from the candidates'
    energies, then the record, like ``assess``."""
    paths = CampaignPaths(Path(root))
    with _reported(paths, step), _step_lock(paths):
        tip = last_record(paths.ledger)
        if tip is not None and tip.step == step:
            append_event(paths, step=step, event="republished")
            return _republish(paths, tip, round_, "decided")
        tip = _tip_for(paths, step)
        campaign = _campaign(paths)
        sp = StepPaths(paths.step(step))
        verdict = read_verdict(sp.marker(round_, "verdict"))
        known = [
            _read_marker(sp.marker(round_, f"screen-{k}"), Screened)
            for k in range(len(verdict.sites))
        ]
        findings = [checks.Finding.model_validate(f) for f in json.loads(sp.checks.read_text())]
        energy_of = placement.known_energies([(k.position, k.energy) for k in known])
        done = _Round(sp, round_)
        return _finish(
            paths, campaign, tip, done, _host(paths), findings, None, "decided", energy_of
        )
