"""Engine adapters. Each engine kind lives in its own module; :func:`get_engine` builds one."""

from __future__ import annotations

from ionwell.engines.base import Engine, StepResult

__all__ = ["Engine", "StepResult", "get_engine"]


def get_engine(campaign) -> Engine:
    """Build the engine adapter for a :class:`ionwell.config.campaign.Campaign`'s engine and relaxation."""
    kind = campaign.engine.kind
    if kind == "pyscf":
        from ionwell.engines.pyscf_engine import PyscfEngine

        return PyscfEngine(campaign.engine, campaign.relax)
    if kind == "tblite":
        from ionwell.engines.tblite_engine import TbliteEngine

        return TbliteEngine(campaign.engine, campaign.relax)
    if kind == "ase":
        from ionwell.engines.ase_engine import AseEngine

        return AseEngine(campaign.engine, campaign.relax)
    if kind == "command":
        from ionwell.engines.command_engine import CommandEngine

        return CommandEngine(campaign.engine, campaign.relax)
    raise ValueError(f"unknown engine kind {kind!r}")
