"""Body of rule ``setup`` (and the first thing ``ionwell run`` does): freeze the config and
write the pristine host. The only place a campaign folder is created."""

from __future__ import annotations

from pathlib import Path

from ionwell.config.campaign import Campaign
from ionwell.io.structures import load_host
from ionwell.store.campaign import CampaignPaths, atomic_write_extxyz, freeze_or_check
from ionwell.workflow.plan import resolve_host_path

__all__ = ["prepare_campaign", "setup"]


def prepare_campaign(
    campaign: Campaign, root: Path, base_dir: Path, source: str = "campaign config"
) -> CampaignPaths:
    """Resolve paths, freeze the config (or check it is unchanged), write ``host.extxyz``.

    ``root`` is the folder holding ``campaigns/``; ``base_dir`` resolves a relative host file;
    ``source`` (the config file) is named by errors. A new campaign's engine settings are
    checked against its host first (:mod:`ionwell.engines.preflight`).
    """
    campaign = resolve_host_path(campaign, base_dir)
    paths = CampaignPaths(Path(root) / "campaigns" / campaign.name)
    # read the host before freezing, so a bad structure file leaves no campaign behind
    atoms = None if paths.host.exists() else load_host(campaign.host, base_dir)
    if atoms is not None and not paths.config.exists():
        from ionwell.engines.preflight import check_engine_settings

        check_engine_settings(campaign, atoms, source)
    freeze_or_check(paths, campaign)
    if atoms is not None:
        atomic_write_extxyz(paths.host, atoms)
    return paths


def setup(campaign: Campaign, root: str | Path) -> None:
    """Body of rule ``setup``: the campaign folder ``root`` (``campaigns/<name>``) with its
    frozen config and host; host files in the config are already absolute (the plan)."""
    prepare_campaign(campaign, Path(root).parent.parent, Path.cwd())
