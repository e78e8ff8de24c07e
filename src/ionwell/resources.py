"""Scheduler resources of the rules, from the campaign's ``resources`` section (pure).

The compute step asks for ``resources.compute``; each retry of a step job gets
``walltime_factor`` times the time of the attempt before it (attempt 1: ``walltime``), so a job
killed by its time limit comes back with room to finish from its restart files.
"""

from __future__ import annotations

import math

from ionwell.config import Campaign

__all__ = ["hms", "step_resources", "walltime_minutes"]


def walltime_minutes(campaign: Campaign, attempt: int = 1) -> int:
    """Time limit of the step job's ``attempt`` (1, 2, ...), whole minutes."""
    c = campaign.resources.compute
    return int(math.ceil(c.walltime * c.walltime_factor ** max(0, attempt - 1)))


def hms(minutes: int) -> str:
    """Minutes as ``HH:MM:SS`` (PBS ``walltime``)."""
    return f"{minutes // 60:02d}:{minutes % 60:02d}:00"


def step_resources(campaign: Campaign) -> dict[str, object]:
    """Fixed resources of the compute rule (the time limit is per attempt, see above).

    Keys are Snakemake's standard resources (``mem_mb``, ``cpus_per_task``, ``tasks``) and the
    SLURM executor's (``slurm_partition``, ``slurm_account``, ``slurm_extra``); unset optional
    settings are left out.
    """
    c = campaign.resources.compute
    out: dict[str, object] = {"mem_mb": c.memory, "cpus_per_task": c.threads, "tasks": c.tasks}
    if c.partition:
        out["slurm_partition"] = c.partition
    if c.account:
        out["slurm_account"] = c.account
    if c.extra:
        out["slurm_extra"] = f"'{c.extra}'"
    return out
