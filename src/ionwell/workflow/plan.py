"""What one Snakemake invocation is to do, read when the workflow is parsed (never written).

The plan validates the config, checks it against the frozen one (refusing a changed config), and
reads the *frontier* — the first unrecorded step — from the ledger's last record, so the DAG of
an invocation holds only unrecorded steps, however long the campaign's history. The optional
``ionwell_window`` key of Snakemake's config (set by ``ionwell run``) bounds how many steps one
invocation walks; ``ionwell run`` starts the next invocation where the last one ended.
"""

from __future__ import annotations

from pathlib import Path

from pydantic import BaseModel, ConfigDict

from ionwell.config.campaign import Campaign, parse_campaign
from ionwell.errors import ConfigError
from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import LedgerRecord, last_record
from ionwell.store.paths import StepPaths

__all__ = ["Plan", "WINDOW_KEY", "from_snakemake", "is_stopped", "resolve_host_path"]

#: Snakemake config key (not part of the campaign) bounding the steps of one invocation.
WINDOW_KEY = "ionwell_window"


class Plan(BaseModel):
    """The campaign and where it stands, as read when the workflow is parsed."""

    model_config = ConfigDict(frozen=True)

    campaign: Campaign
    root: str  # campaigns/<name>, relative to Snakemake's working directory
    frontier: int  # first step without a ledger record
    finished: bool  # the last record says stop
    window: int | None  # steps this invocation may walk (None: until the campaign stops)

    @property
    def last_step(self) -> int:
        return self.frontier - 1


def is_stopped(paths: CampaignPaths, tip: LedgerRecord | None) -> bool:
    """The campaign ended at its last record ``tip`` and was not extended since (an extension
    is the handover decision ``ionwell run`` writes into the next step's folder)."""
    if tip is None or tip.outcome != "stop":
        return False
    return not StepPaths(paths.step(tip.step + 1)).handover.exists()


def resolve_host_path(campaign: Campaign, base_dir: Path) -> Campaign:
    """Return the campaign with a relative host file made absolute against ``base_dir``."""
    f = campaign.host.file
    if f is None or Path(f).is_absolute():
        return campaign
    host = campaign.host.model_copy(update={"file": str((Path(base_dir) / f).resolve())})
    return campaign.model_copy(update={"host": host})


def from_snakemake(config: dict, configfiles: list, workdir: Path | None = None) -> Plan:
    """Build the plan from Snakemake's ``config`` dict (the base folder for relative host files
    is that of the last config file). Reads the frozen config and the ledger's tail only."""
    from ionwell.config.definitions import resolve_engines

    data = dict(config)
    window = data.pop(WINDOW_KEY, None)
    if window is not None and (not isinstance(window, int) or window < 1):
        raise ConfigError(f"{WINDOW_KEY}: expected a whole number ≥ 1, found {window!r}")
    source = str(configfiles[-1]) if configfiles else "snakemake config"
    base = Path(configfiles[-1]).resolve().parent if configfiles else Path.cwd()
    campaign = parse_campaign(resolve_engines(data, base), source)
    campaign = resolve_host_path(campaign, base)
    root = Path("campaigns") / campaign.name
    paths = CampaignPaths(Path(workdir or ".") / root)
    from ionwell.workflow.extend import pending_amendment

    changed = pending_amendment(paths, campaign)
    if changed:
        raise ConfigError(
            f"{paths.config}: the config changes {', '.join(changed)} of a campaign that has "
            f"started; `ionwell run {source}` records that amendment (parsing the workflow "
            "writes nothing)"
        )
    tip = last_record(paths.ledger)
    return Plan(
        campaign=campaign,
        root=str(root),
        frontier=0 if tip is None else tip.step + 1,
        finished=is_stopped(paths, tip),
        window=window,
    )
