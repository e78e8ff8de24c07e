"""Every file name of a step folder, written once.

A step folder ``steps/NNNN/`` holds what the step recorded (hashed into its ledger record) and,
under ``flow/``, the markers that the Snakemake rule chain passes between its rules (not
recorded: they are bookkeeping, re-made by a rerun)::

    input.extxyz     structure entering the step's compute (the round's, after a rejected site)
    engine/          engine inputs, outputs, restart files (kept across attempts)
    result.json      normalised StepResult without positions/forces (those are in relaxed.extxyz)
    potential.npz    the potential map, volts, float32, compressed (hard link to the engine's)
    relaxed.extxyz   the structure after the compute, with energy and forces
    checks.json      findings
    decision.json    wells considered, rule, seed, chosen sites, why
    next.extxyz      the structure handed to the next step, or
    STOP             why the campaign stops here
    handover.json    the placement decision that extends a stopped campaign (written by
                     ``ionwell run`` when a raised stop rule lets it go on; step N+1 only)
    status.json      published last, after the ledger record (not recorded)
    error.json       why the latest attempt failed (not recorded)
    flow/rK.*.json   the rule chain's markers for round K (K > 0 after a rejected site)
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

STEP_DIGITS = 4

#: files of a step folder that are not part of its ledger record
# (".running" is no longer written: versions before the rule chain marked a step in progress
# with it; it stays here so that their step folders still verify)
UNRECORDED_NAMES = frozenset({"status.json", "error.json", ".running"})
#: sub-folders of a step folder that are not part of its ledger record
UNRECORDED_DIRS = frozenset({"flow"})


def step_label(n: int) -> str:
    """Folder name of step ``n`` (zero-padded)."""
    return f"{n:0{STEP_DIGITS}d}"


@dataclass(frozen=True)
class StepPaths:
    """Where each file of one step lives. ``root`` is ``campaigns/<name>/steps/NNNN``."""

    root: Path

    @property
    def input(self) -> Path:
        return self.root / "input.extxyz"

    @property
    def engine(self) -> Path:
        return self.root / "engine"

    @property
    def result(self) -> Path:
        return self.root / "result.json"

    @property
    def potential(self) -> Path:
        return self.root / "potential.npz"

    @property
    def relaxed(self) -> Path:
        return self.root / "relaxed.extxyz"

    @property
    def checks(self) -> Path:
        return self.root / "checks.json"

    @property
    def decision(self) -> Path:
        return self.root / "decision.json"

    @property
    def next(self) -> Path:
        return self.root / "next.extxyz"

    @property
    def stop(self) -> Path:
        return self.root / "STOP"

    @property
    def handover(self) -> Path:
        return self.root / "handover.json"

    @property
    def status(self) -> Path:
        return self.root / "status.json"

    @property
    def error(self) -> Path:
        return self.root / "error.json"

    @property
    def flow(self) -> Path:
        return self.root / "flow"

    def marker(self, round_: int, stage: str) -> Path:
        """The rule chain's marker of ``stage`` (prepared, computed, collected, verdict)."""
        return self.flow / f"r{round_}.{stage}.json"
