"""Scheduler resources of the rules, from the campaign's ``resources`` section (pure).

The compute step asks for ``resources.compute``; each retry of a step job gets
``walltime_factor`` times the time of the attempt before it (attempt 1: ``walltime``), so a job
killed by its time limit comes back with room to finish from its restart files.

Before the limit, a SLURM compute job is sent SIGUSR1 (``resources.compute.stop_before``
seconds ahead, ``--signal=USR1@N`` through the executor's ``slurm_extra``; :func:`stop_seconds`),
without SLURM's ``B:`` prefix: the signal goes to the job's steps, where the Snakemake executor
runs the compute body (``srun``) and the program, not to the batch shell, which has no handler
and would die of it. The compute body then stops the program through its soft-stop files
(:mod:`ionwell.engines.soft_stop`). PBS's ``qsub`` has no such option (see the README).
"""

from __future__ import annotations

import math
import shlex

from ionwell.config.campaign import Campaign

__all__ = ["hms", "step_resources", "stop_seconds", "walltime_minutes"]


def walltime_minutes(campaign: Campaign, attempt: int = 1) -> int:
    """Time limit of the step job's ``attempt`` (1, 2, ...), whole minutes."""
    c = campaign.resources.compute
    return int(math.ceil(c.walltime * c.walltime_factor ** max(0, attempt - 1)))


def hms(minutes: int) -> str:
    """Minutes as ``HH:MM:SS`` (PBS ``walltime``)."""
    return f"{minutes // 60:02d}:{minutes % 60:02d}:00"


def stop_seconds(campaign: Campaign) -> int:
    """Seconds before the time limit at which the job is warned (0: not warned):
    ``stop_before``, but at most half the first attempt's limit (later attempts have more)."""
    c = campaign.resources.compute
    return min(c.stop_before, walltime_minutes(campaign, 1) * 60 // 2)


def step_resources(campaign: Campaign) -> dict[str, object]:
    """Fixed resources of the compute rule (the time limit is per attempt, see above).

    Keys are Snakemake's standard resources (``mem_mb``, ``cpus_per_task``, ``tasks``) and the
    SLURM executor's (``slurm_partition``, ``slurm_account``, ``slurm_extra``); unset optional
    settings are left out. ``slurm_extra`` carries the warning signal before the time limit
    (:func:`stop_seconds`) and then ``extra``.
    """
    c = campaign.resources.compute
    out: dict[str, object] = {"mem_mb": c.memory, "cpus_per_task": c.threads, "tasks": c.tasks}
    if c.partition:
        out["slurm_partition"] = c.partition
    if c.account:
        out["slurm_account"] = c.account
    extra = []
    lead = stop_seconds(campaign)
    if lead > 0:
        extra.append(f"--signal=USR1@{lead}")
    if c.extra:  # each flag its own word (sbatch is called through a shell)
        extra.append(shlex.join(shlex.split(c.extra)))
    if extra:
        out["slurm_extra"] = " ".join(extra)
    return out
