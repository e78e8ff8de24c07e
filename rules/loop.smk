# The insertion loop: step N's input is step N-1's published status; the summary walks the steps
# through the checkpoint until one of them says "stop".


wildcard_constraints:
    step=r"\d{4}",


def _step_input(wildcards):
    n = int(wildcards.step)
    if n == 0:
        return f"{CDIR}/host.extxyz"
    return f"{CDIR}/steps/{n - 1:04d}/status.json"


checkpoint step:
    input:
        _step_input,
    output:
        f"{CDIR}/steps/{{step}}/status.json",
    threads: CAMPAIGN.resources.compute.threads
    resources:
        runtime=lambda wildcards, attempt: walltime_minutes(CAMPAIGN, attempt),
        walltime_hms=lambda wildcards, attempt: hms(walltime_minutes(CAMPAIGN, attempt)),
        **step_resources(CAMPAIGN),
    run:
        loop.run_step(CDIR, int(wildcards.step))


def _finished_steps(wildcards):
    done, n = [], 0
    while True:
        status = checkpoints.step.get(step=f"{n:04d}").output[0]
        done.append(status)
        if loop.read_status(status).outcome == "stop":
            return done
        n += 1


rule summary:
    localrule: CAMPAIGN.resources.light == "local"
    input:
        _finished_steps,
    output:
        f"{CDIR}/summary.json",
    run:
        loop.summarize(CDIR)


def _reference(wildcards):
    return [f"{CDIR}/reference.json"] if CAMPAIGN.analysis.reference is not None else []


if CAMPAIGN.analysis.reference is not None:

    # The guest's chemical potential: a given value, or the bulk metal / isolated atom computed
    # with the campaign's engine (a compute job beside the steps).
    rule reference:
        localrule: CAMPAIGN.analysis.reference.value is not None
        input:
            f"{CDIR}/campaign.yaml",
        output:
            f"{CDIR}/reference.json",
        threads: CAMPAIGN.resources.compute.threads
        resources:
            runtime=lambda wildcards, attempt: walltime_minutes(CAMPAIGN, attempt),
            walltime_hms=lambda wildcards, attempt: hms(walltime_minutes(CAMPAIGN, attempt)),
            **step_resources(CAMPAIGN),
        run:
            analysis.guest_reference(CDIR)


rule analysis:
    localrule: CAMPAIGN.resources.light == "local"
    input:
        f"{CDIR}/summary.json",
        _reference,
    output:
        f"{CDIR}/analysis/analysis.json",
    run:
        analysis.analyse(CDIR)


rule report:
    localrule: CAMPAIGN.resources.light == "local"
    input:
        f"{CDIR}/analysis/analysis.json",
    output:
        f"{CDIR}/analysis/report.html",
    run:
        report.write_report([CDIR], output[0])
