"""Body of rule ``summary`` (after the last step) and the failure of the newest step."""

from __future__ import annotations

import contextlib
from datetime import UTC, datetime
from pathlib import Path

from ase.io import read
from pydantic import BaseModel

from ionwell.errors import LedgerError
from ionwell.store.campaign import (
    CampaignPaths,
    atomic_write_extxyz,
    atomic_write_text,
    load_frozen,
)
from ionwell.store.ledger import last_record, read_ledger, sync_mirror
from ionwell.store.paths import StepPaths
from ionwell.workflow.chain import StepError

__all__ = ["CampaignSummary", "describe_error", "record_error", "summarize"]


class CampaignSummary(BaseModel):
    """What a finished (or stopped) campaign amounts to."""

    name: str
    steps: int
    guests: int
    stop_reason: str | None
    energies: list[float | None]
    last_record: str


def summarize(root: str | Path) -> CampaignSummary:
    """Write ``summary.json`` and ``trajectory.extxyz`` (every step's relaxed structure) once
    the campaign has stopped — the one place that walks every step, once per campaign."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = read_ledger(paths.ledger)
    if not records:
        raise LedgerError(f"{paths.ledger}: no finished step to summarise")
    frames = []
    for rec in records:
        a = read(StepPaths(paths.step(rec.step)).relaxed)
        a.calc = None
        a.info = {"step": rec.step, "guests": rec.guests, "energy": rec.energy}
        frames.append(a)
    atomic_write_extxyz(paths.trajectory, frames)
    sync_mirror(paths)
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


def record_error(paths: CampaignPaths, message: str, kind: str = "transient") -> StepError:
    """The failure of the newest unfinished step as the controller learnt it (the step's own
    ``error.json`` could not be written, e.g. on a full disk), written there when possible."""
    tip = last_record(paths.ledger)
    nxt = 0 if tip is None else tip.step + 1
    err = StepError(
        step=nxt, message=message, time=datetime.now(UTC).isoformat(timespec="seconds"),
        kind=kind,
    )  # fmt: skip
    f = StepPaths(paths.step(nxt)).error
    with contextlib.suppress(OSError):
        if f.parent.is_dir():
            atomic_write_text(f, err.model_dump_json(indent=2))
    return err


def describe_error(paths: CampaignPaths) -> StepError | None:
    """The failure of the newest unfinished step, if its last attempt failed."""
    tip = last_record(paths.ledger)
    nxt = 0 if tip is None else tip.step + 1
    f = StepPaths(paths.step(nxt)).error
    if f.exists():
        try:
            return StepError.model_validate_json(f.read_text())
        except ValueError:
            return StepError(step=nxt, message=f.read_text(errors="replace")[:500], time="")
    return None
