"""Changing a campaign after it started: amend the settings that do not change what a step
computes (``stop``, ``resources``, ``analysis``, ``description``), and extend a campaign that
its stop rule had ended.

``ionwell run`` calls these under the controller lock. A campaign that stopped *only* because of
its stop rule (no failed check, no placement decision made) and whose amended stop rule lets it
go on is extended by the placement decision its last step did not make: the same pure
:func:`ionwell.science.placement.decide` on that step's recorded map and structure, written as
``steps/N+1/handover.json`` (hashed into step N+1's record, re-derived by ``ionwell replay``).
"""

from __future__ import annotations

import logging

from ase.io import read

from ionwell.config.campaign import Campaign, config_diff, dump_campaign
from ionwell.errors import ConfigError, IonwellError, LedgerError
from ionwell.science import step as decide_step
from ionwell.science.host import host_formula_units
from ionwell.science.placement import Decision
from ionwell.store.amendments import AMENDABLE, append_amendment, read_amendments
from ionwell.store.campaign import CampaignPaths, atomic_write_json, atomic_write_text, load_frozen
from ionwell.store.ledger import last_record, sha256_file
from ionwell.store.paths import StepPaths, step_label

log = logging.getLogger(__name__)

__all__ = [
    "amend",
    "finish_amendment",
    "handover",
    "handover_decision",
    "pending_amendment",
    "read_handover",
]


def pending_amendment(paths: CampaignPaths, campaign: Campaign) -> list[str] | None:
    """Read-only: the amendable sections in which ``campaign`` differs from the frozen config
    (None when it does not differ, or nothing is frozen yet). Raises ConfigError when another
    section differs."""
    if not paths.config.exists():
        return None
    frozen = load_frozen(paths)
    if frozen == campaign:
        return None
    changed = [k for k in Campaign.model_fields if getattr(frozen, k) != getattr(campaign, k)]
    fixed = [k for k in changed if k not in AMENDABLE]
    if fixed:
        raise ConfigError(
            f"{paths.config}: campaign '{campaign.name}' already exists with another "
            f"configuration in {', '.join(fixed)}; refusing to continue it with a changed config "
            f"(only {', '.join(AMENDABLE)} may change once a campaign started). Give the new "
            "config another name to start a new campaign. "
            "Differences:\n" + config_diff(frozen, campaign)
        )
    return changed


def _staged(paths: CampaignPaths):
    return paths.config.with_name(paths.config.name + ".new")


def finish_amendment(paths: CampaignPaths) -> bool:
    """Complete an amendment a kill interrupted (its record appended, the config not yet
    renamed into place). True when one was completed."""
    staged = _staged(paths)
    if not staged.exists():
        return False
    amended = read_amendments(paths)
    if amended and sha256_file(staged) == amended[-1].config_sha256:
        staged.replace(paths.config)
        return True
    staged.unlink()  # the record was never appended: the amendment did not happen
    return False


def amend(paths: CampaignPaths, campaign: Campaign, sections: list[str]) -> str:
    """Re-freeze ``campaign`` and record the amendment; returns the difference (a diff)."""
    frozen = load_frozen(paths)
    diff = config_diff(frozen, campaign)
    staged = _staged(paths)
    atomic_write_text(staged, dump_campaign(campaign))
    tip = last_record(paths.ledger)
    append_amendment(paths, None if tip is None else tip.step, sections, diff, sha256_file(staged))
    staged.replace(paths.config)
    log.info("campaign '%s': %s amended after step %s", campaign.name, ", ".join(sections),
             "-" if tip is None else tip.step)  # fmt: skip
    if "analysis" in sections and (paths.root / "analysis.yaml").is_file():
        log.warning(
            "campaign '%s': analysis.yaml in the campaign folder still overrides the amended "
            "analysis section (set it with 'ionwell analyse --settings', or remove it)",
            campaign.name,
        )
    return diff


def _stopped_by_rule_only(rec) -> bool:
    return rec.outcome == "stop" and rec.decision is None and not rec.findings.get("error")


def handover_decision(paths: CampaignPaths, campaign: Campaign, rec) -> Decision:
    """The placement decision step ``rec.step`` did not make (a pure function of its recorded
    map and structure, like every decision)."""
    from ionwell.workflow.chain import _decide

    sp = StepPaths(paths.step(rec.step))
    for name in (sp.potential.name, sp.relaxed.name):
        f = sp.root / name
        if not f.is_file() or sha256_file(f) != rec.files.get(name):
            raise LedgerError(
                f"steps/{step_label(rec.step)}/{name}: missing or changed since step {rec.step} "
                "was recorded; cannot extend the campaign from it"
            )
    relaxed = read(sp.relaxed)
    relaxed.calc = None
    n_host = len(read(paths.host))
    return _decide(campaign, sp, relaxed, n_host, rec.step, rec.guests)


def handover(paths: CampaignPaths, campaign: Campaign) -> str | None:
    """Extend a campaign its stop rule ended, when the (amended) rule lets it go on: write the
    missing decision as ``steps/N+1/handover.json``. Returns what was done (None: nothing to
    do). Raises IonwellError when the campaign cannot go on (no admissible well left, ...)."""
    tip = last_record(paths.ledger)
    if tip is None or tip.outcome != "stop":
        return None
    nxt = StepPaths(paths.step(tip.step + 1))
    if nxt.handover.exists():
        return None
    if not _stopped_by_rule_only(tip):
        return None
    units = host_formula_units(read(paths.host), campaign.host.formula_unit)
    if decide_step.rule_stop(campaign.stop, tip.step, tip.guests, units) is not None:
        return None
    decision = handover_decision(paths, campaign, tip)
    why = decide_step.after_decision(campaign, decision)
    if why is not None:
        raise IonwellError(f"campaign '{campaign.name}' cannot go on after step {tip.step}: {why}")
    atomic_write_json(nxt.handover, decision.model_dump(mode="json"))
    return (
        f"extending '{campaign.name}' after step {tip.step} ({tip.stop_reason}): next "
        f"{campaign.guest.element} at {decision.chosen[0].potential:.3f} V"
    )


def read_handover(sp: StepPaths) -> Decision | None:
    """The handover decision of a step that extends a stopped campaign, if any."""
    if not sp.handover.exists():
        return None
    return Decision.model_validate_json(sp.handover.read_bytes())
