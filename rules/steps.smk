# The step chain: prepare -> compute -> collect -> assess (the checkpoint). A failed check that
# rejects the step's new sites makes the next round K+1 of the same step; the verdict of the
# last round says whether step N+1 follows. With the screened rule, assess names the candidate
# wells, one `screen` job computes each (in parallel), and checkpoint `decide` makes the
# decision. Only `compute` and `screen` carry scheduler resources; `assess` and `decide` append
# the ledger and always run on the controller.

from ionwell.workflow.resources import hms as iw_hms
from ionwell.workflow.resources import step_resources as iw_step_resources
from ionwell.workflow.resources import walltime_minutes as iw_walltime
from ionwell.store.paths import step_label as iw_step_label
from ionwell.workflow import chain as iw_chain
from ionwell.workflow import setup as iw_setup
from ionwell.engines import soft_stop as iw_soft_stop

# In a scheduler job, the warning signal before the time limit (SIGUSR1, resources.compute.
# stop_before) must not end this process: Python installs a handler only from the main thread,
# where Snakemake parses this file (rule bodies run in worker threads). The handler records the
# request; the compute body then stops the external program through its soft-stop files.
iw_soft_stop.arm()


wildcard_constraints:
    step=r"\d{4}",
    round=r"\d+",
    candidate=r"\d+",


IW_LIGHT_LOCAL = IW_CAMPAIGN.resources.light == "local"
IW_FLOW = IW_CDIR + "/steps/{step}/flow/r{round}"
IW_FINAL = [
    f"{IW_CDIR}/summary.json",
    f"{IW_CDIR}/analysis/analysis.json",
    f"{IW_CDIR}/analysis/report.html",
]


def iw_final_verdict(n):
    """The verdict file of step n's last round (walking its rounds through the checkpoint)."""
    r = 0
    while True:
        f = checkpoints.assess.get(step=iw_step_label(n), round=r).output[0]
        outcome = iw_chain.read_verdict(f).outcome
        if outcome == "screen":  # the screened rule decides after its candidates' jobs
            return checkpoints.decide.get(step=iw_step_label(n), round=r).output[0]
        if outcome != "retry":
            return f
        r += 1


def iw_walk():
    """From the frontier to the stop or to the end of this invocation's window:
    ("stop" | "window", the last verdict file)."""
    n, last = IW_PLAN.frontier, None
    while IW_PLAN.window is None or n < IW_PLAN.frontier + IW_PLAN.window:
        last = iw_final_verdict(n)
        if iw_chain.read_verdict(last).outcome == "stop":
            return "stop", last
        n += 1
    return "window", last


def iw_targets(wildcards):
    if IW_PLAN.finished:
        return IW_FINAL
    how, last = iw_walk()
    return IW_FINAL if how == "stop" else [last]


def iw_prepare_input(wildcards):
    n, r = int(wildcards.step), int(wildcards.round)
    if r > 0:
        return f"{IW_CDIR}/steps/{wildcards.step}/flow/r{r - 1}.verdict.json"
    if n <= IW_PLAN.frontier:
        return [f"{IW_CDIR}/campaign.yaml", f"{IW_CDIR}/host.extxyz"]
    return iw_final_verdict(n - 1)


rule setup:
    output:
        f"{IW_CDIR}/campaign.yaml",
        f"{IW_CDIR}/host.extxyz",
    localrule: True
    run:
        iw_setup.setup(IW_CAMPAIGN, IW_CDIR)


rule prepare:
    input:
        iw_prepare_input,
    output:
        IW_FLOW + ".prepared.json",
    retries: 0  # a light body fails the same way again: not retried
    localrule: IW_LIGHT_LOCAL
    run:
        iw_chain.prepare(IW_CDIR, int(wildcards.step), int(wildcards.round))


rule compute:
    input:
        IW_FLOW + ".prepared.json",
    output:
        IW_FLOW + ".computed.json",
    threads: IW_CAMPAIGN.resources.compute.threads
    resources:
        **iw_step_resources(IW_CAMPAIGN),
        runtime=lambda wildcards, attempt: iw_walltime(IW_CAMPAIGN, attempt),
        walltime_hms=lambda wildcards, attempt: iw_hms(iw_walltime(IW_CAMPAIGN, attempt)),
    run:
        iw_chain.compute(IW_CDIR, int(wildcards.step), int(wildcards.round))


rule collect:
    input:
        IW_FLOW + ".computed.json",
    output:
        IW_FLOW + ".collected.json",
    retries: 0  # a light body fails the same way again: not retried
    localrule: IW_LIGHT_LOCAL
    run:
        iw_chain.collect(IW_CDIR, int(wildcards.step), int(wildcards.round))


checkpoint assess:
    input:
        IW_FLOW + ".collected.json",
    output:
        IW_FLOW + ".verdict.json",
    retries: 0  # a light body fails the same way again: not retried
    localrule: True
    run:
        iw_chain.assess(IW_CDIR, int(wildcards.step), int(wildcards.round))


rule screen:
    input:
        IW_FLOW + ".verdict.json",
    output:
        IW_FLOW + ".screen-{candidate}.json",
    threads: IW_CAMPAIGN.resources.compute.threads
    resources:
        **iw_step_resources(IW_CAMPAIGN),
        runtime=lambda wildcards, attempt: iw_walltime(IW_CAMPAIGN, attempt),
        walltime_hms=lambda wildcards, attempt: iw_hms(iw_walltime(IW_CAMPAIGN, attempt)),
    run:
        iw_chain.screen(
            IW_CDIR, int(wildcards.step), int(wildcards.round), int(wildcards.candidate)
        )


def iw_screened(wildcards):
    """The screen jobs of a round whose verdict named candidate wells."""
    f = checkpoints.assess.get(step=wildcards.step, round=wildcards.round).output[0]
    n = len(iw_chain.read_verdict(f).sites)
    base = f"{IW_CDIR}/steps/{wildcards.step}/flow/r{wildcards.round}"
    return [f"{base}.screen-{k}.json" for k in range(n)]


checkpoint decide:
    input:
        iw_screened,
    output:
        IW_FLOW + ".decided.json",
    retries: 0  # a light body fails the same way again: not retried
    localrule: True
    run:
        iw_chain.decide(IW_CDIR, int(wildcards.step), int(wildcards.round))
