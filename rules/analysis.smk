# After the loop: summary (trajectory, database mirror), the guest reference, the analysis
# tables and plots, and the HTML report. The reference is a compute job beside the steps.

import os

from ionwell.workflow import finish as iw_finish
from ionwell.workflow import summary as iw_summary


def iw_summary_input(wildcards):
    if IW_PLAN.finished:
        return [f"{IW_CDIR}/ledger.jsonl"]
    return [f"{IW_CDIR}/ledger.jsonl", iw_walk()[1]]


rule summary:
    input:
        iw_summary_input,
    output:
        f"{IW_CDIR}/summary.json",
    localrule: IW_LIGHT_LOCAL
    run:
        iw_summary.summarize(IW_CDIR)


def iw_reference_input(wildcards):
    return [f"{IW_CDIR}/reference.json"] if IW_CAMPAIGN.analysis.reference is not None else []


if IW_CAMPAIGN.analysis.reference is not None:

    rule reference:
        input:
            f"{IW_CDIR}/campaign.yaml",
        output:
            f"{IW_CDIR}/reference.json",
        localrule: IW_CAMPAIGN.analysis.reference.value is not None
        threads: IW_CAMPAIGN.resources.compute.threads
        resources:
            **iw_step_resources(IW_CAMPAIGN),
            runtime=lambda wildcards, attempt: iw_walltime(IW_CAMPAIGN, attempt),
            walltime_hms=lambda wildcards, attempt: iw_hms(iw_walltime(IW_CAMPAIGN, attempt)),
        run:
            iw_finish.reference(IW_CDIR)


def iw_settings_input(wildcards):
    # analysis settings set after the start (ionwell analyse --settings): a change re-analyses
    f = f"{IW_CDIR}/analysis.yaml"
    return [f] if os.path.exists(f) else []


rule analysis:
    input:
        f"{IW_CDIR}/summary.json",
        f"{IW_CDIR}/campaign.yaml",
        iw_reference_input,
        iw_settings_input,
    output:
        f"{IW_CDIR}/analysis/analysis.json",
    localrule: IW_LIGHT_LOCAL
    run:
        iw_finish.analyse(IW_CDIR)


rule report:
    input:
        f"{IW_CDIR}/analysis/analysis.json",
    output:
        f"{IW_CDIR}/analysis/report.html",
    localrule: IW_LIGHT_LOCAL
    run:
        iw_finish.report(IW_CDIR, output[0])
