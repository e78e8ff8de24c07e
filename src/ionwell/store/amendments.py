"""Amendments of a running or finished campaign's config: ``amendments.jsonl``.

Only settings that do not change what a step computes may change after a campaign started:
``stop`` (extend or shorten the series), ``resources`` (more walltime for later steps),
``analysis`` and ``description``. Each change re-freezes ``campaign.yaml`` and appends one
hash-chained line here, naming the last recorded step, the difference and the sha256 of the new
``campaign.yaml`` — so the frozen config stays covered: step 0's record holds the first digest,
the last amendment the current one, and a hand edit is still refused and named.
"""

from __future__ import annotations

import hashlib
import json
import os
from datetime import UTC, datetime
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ionwell.errors import LedgerError
from ionwell.store.campaign import CampaignPaths

__all__ = ["AMENDABLE", "Amendment", "append_amendment", "read_amendments"]

#: top-level config sections that may change after a campaign started
AMENDABLE = ("stop", "resources", "analysis", "description")
GENESIS = "0" * 64


class Amendment(BaseModel):
    """One change of the frozen config."""

    model_config = ConfigDict(extra="forbid")

    after_step: int | None = Field(description="last recorded step when the change was made")
    sections: list[str] = Field(description="the config sections that changed")
    diff: str = Field(description="unified diff of the canonical YAML")
    config_sha256: str = Field(description="sha256 of campaign.yaml as re-frozen")
    time: str
    parent: str = Field(description="hash of the previous amendment (64 zeros for the first)")
    hash: str = ""

    def compute_hash(self) -> str:
        body = self.model_dump(mode="json", exclude={"hash"})
        return hashlib.sha256(
            json.dumps(body, sort_keys=True, separators=(",", ":")).encode()
        ).hexdigest()


def _file(paths: CampaignPaths) -> Path:
    return paths.root / "amendments.jsonl"


def read_amendments(paths: CampaignPaths) -> list[Amendment]:
    """Every amendment, in order; an edited or broken line is a LedgerError naming it."""
    f = _file(paths)
    if not f.exists():
        return []
    out: list[Amendment] = []
    parent = GENESIS
    for i, raw in enumerate(f.read_bytes().split(b"\n"), 1):
        if not raw.strip():
            continue
        try:
            a = Amendment.model_validate_json(raw)
        except (ValidationError, ValueError):
            raise LedgerError(f"{f}: line {i} is not a valid amendment record") from None
        if a.parent != parent or a.compute_hash() != a.hash:
            raise LedgerError(f"{f}: line {i} was edited (its hash chain is broken)")
        parent = a.hash
        out.append(a)
    return out


def append_amendment(
    paths: CampaignPaths, after_step: int | None, sections: list[str], diff: str, sha: str
) -> Amendment:
    """Chain and append one amendment (one line, O_APPEND, fsync)."""
    prev = read_amendments(paths)
    a = Amendment(
        after_step=after_step,
        sections=sections,
        diff=diff,
        config_sha256=sha,
        time=datetime.now(UTC).isoformat(timespec="seconds"),
        parent=prev[-1].hash if prev else GENESIS,
    )
    a = a.model_copy(update={"hash": a.compute_hash()})
    fd = os.open(_file(paths), os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o666)
    try:
        os.write(fd, (a.model_dump_json() + "\n").encode())
        os.fsync(fd)
    finally:
        os.close(fd)
    return a
