"""The ledger: one hash-chained record per finished step, its database mirror, and verification.

A step is finished exactly when its record is in ``ledger.jsonl``. Each record carries the hash
of its parent record and the sha256 of every file the step wrote; its own ``hash`` is the sha256
of its canonical JSON (sorted keys, no whitespace) with the ``hash`` field left out. Appending
rewrites the file under a temporary name and renames it, so a kill never leaves half a record.
"""

from __future__ import annotations

import hashlib
import json
import logging
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ionwell.campaign import CampaignPaths, atomic_write_bytes, step_label
from ionwell.errors import LedgerError
from ionwell.placement import Decision

log = logging.getLogger(__name__)

GENESIS = "0" * 64
#: files in a step folder that are not part of the step's record
UNRECORDED = {"status.json", "error.json", ".running"}


class Rejection(BaseModel):
    """A site the step rejected after its checks failed, and why."""

    model_config = ConfigDict(extra="forbid")

    position: list[float] = Field(description="Å")
    reason: str


_LATE_FIELDS = ("job_id",)


class LedgerRecord(BaseModel):
    """What the ledger keeps of one finished step."""

    model_config = ConfigDict(extra="forbid")

    step: int
    parent: str = Field(description="hash of the previous record (64 zeros for step 0)")
    outcome: Literal["continue", "stop"]
    stop_reason: str | None = None
    guests: int = Field(description="guests in the step's structure")
    energy: float | None = Field(None, description="total energy, eV")
    scf_converged: bool | None = None
    scf_iterations: int | None = None
    findings: dict[str, int] = Field(default_factory=dict, description="count per severity")
    decision: Decision | None = None
    remedies: list[str] = Field(default_factory=list, description="SCF retries made")
    rejected: list[Rejection] = Field(default_factory=list, description="sites rejected")
    files: dict[str, str] = Field(description="step-relative path -> sha256")
    engine: str
    engine_version: str
    ionwell_version: str
    host: str = Field(description="machine that ran the step")
    started: str
    finished: str
    wall_time: float = Field(description="seconds")
    job_id: str | None = Field(None, description="scheduler job that computed the step")
    hash: str = ""

    def compute_hash(self) -> str:
        # fields added after the first release enter the hash only when set, so records
        # written before them keep their hashes
        late = {name for name in _LATE_FIELDS if getattr(self, name) is None}
        body = self.model_dump(mode="json", exclude={"hash"} | late)
        canon = json.dumps(body, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canon.encode()).hexdigest()


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def hash_step_files(step_dir: Path) -> dict[str, str]:
    """sha256 of every file under a step folder except the unrecorded markers."""
    out: dict[str, str] = {}
    for p in sorted(step_dir.rglob("*")):
        if p.is_file() and p.name not in UNRECORDED and not p.name.endswith(".tmp"):
            out[p.relative_to(step_dir).as_posix()] = sha256_file(p)
    return out


def read_ledger(path: Path) -> list[LedgerRecord]:
    """All records, in order. A malformed line raises :class:`LedgerError` naming it."""
    if not path.exists():
        return []
    records = []
    for i, line in enumerate(path.read_text().splitlines(), 1):
        if not line.strip():
            continue
        try:
            records.append(LedgerRecord.model_validate_json(line))
        except ValidationError as err:
            raise LedgerError(f"{path}: line {i} is not a valid ledger record ({err})") from None
    return records


def append_record(path: Path, record: LedgerRecord) -> LedgerRecord:
    """Chain, hash and append ``record``; returns it with ``parent`` and ``hash`` filled in."""
    records = read_ledger(path)
    expected = records[-1].step + 1 if records else 0
    if record.step != expected:
        raise LedgerError(f"{path}: cannot record step {record.step}; the next step is {expected}")
    parent = records[-1].hash if records else GENESIS
    rec = record.model_copy(update={"parent": parent, "hash": ""})
    rec = rec.model_copy(update={"hash": rec.compute_hash()})
    old = path.read_bytes() if path.exists() else b""
    atomic_write_bytes(path, old + (rec.model_dump_json() + "\n").encode())
    return rec


class VerifyProblem(BaseModel):
    """One disagreement between the ledger and the files on disk."""

    step: int
    file: str | None
    message: str


def verify(paths: CampaignPaths) -> list[VerifyProblem]:
    """Re-hash every recorded file and re-check the chain. Problems in step order, first first."""
    problems: list[VerifyProblem] = []
    try:
        records = read_ledger(paths.ledger)
    except LedgerError as err:
        return [VerifyProblem(step=-1, file=str(paths.ledger), message=str(err))]
    parent = GENESIS
    for i, rec in enumerate(records):
        if rec.step != i:
            problems.append(VerifyProblem(step=rec.step, file=None, message=f"out of order at {i}"))
        if rec.parent != parent:
            problems.append(
                VerifyProblem(step=rec.step, file=None, message="parent hash breaks the chain")
            )
        if rec.compute_hash() != rec.hash:
            problems.append(
                VerifyProblem(step=rec.step, file=None, message="record was edited (hash differs)")
            )
        parent = rec.hash
        sdir = paths.step(rec.step)
        for rel, digest in sorted(rec.files.items()):
            f = sdir / rel
            where = f"steps/{step_label(rec.step)}/{rel}"
            if not f.exists():
                problems.append(VerifyProblem(step=rec.step, file=where, message="file is missing"))
            elif sha256_file(f) != digest:
                problems.append(
                    VerifyProblem(step=rec.step, file=where, message="content differs (sha256)")
                )
    return problems


# ---------------------------------------------------------------------------------------------
# ASE database mirror


def sync_mirror(paths: CampaignPaths, records: list[LedgerRecord] | None = None) -> int:
    """Add any recorded step missing from ``ionwell.db`` (an ASE database). Returns rows added.

    The mirror is derived data: it can always be rebuilt from the ledger and step folders.
    """
    from ase.db import connect
    from ase.io import read

    records = read_ledger(paths.ledger) if records is None else records
    if not records:
        return 0
    db = connect(paths.database, type="db")
    have = {row.step for row in db.select(columns=["key_value_pairs"]) if "step" in row}
    added = 0
    for rec in records:
        if rec.step in have:
            continue
        result_atoms = paths.step(rec.step) / "relaxed.extxyz"
        if not result_atoms.exists():
            continue
        atoms = read(result_atoms)
        kv = {
            "step": rec.step,
            "guests": rec.guests,
            "outcome": rec.outcome,
            "record": f"sha256:{rec.hash[:16]}",  # prefixed: ase.db reads bare hex like 12e34 as a float
        }
        if rec.energy is not None:
            kv["total_energy"] = rec.energy
        db.write(atoms, key_value_pairs=kv)
        added += 1
    return added
