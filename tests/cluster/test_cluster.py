"""Everything that needs the real cluster services, in one file (``make test`` runs two
pytest-xdist workers with ``--dist loadfile``, so one worker owns SLURM and sshd): the services
themselves (sbatch, the PBS-style qsub wrappers, paramiko against the loopback sshd), campaigns
through the slurm and pbs profiles, a walltime kill and retry, remote mode with re-attach, and
host-key refusal. The services are started by the fixtures in ``tests/services.py``; the tests
skip with the reason where they cannot run."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import paramiko
import pytest
import yaml
from services import SlurmCluster, Sshd
from shared import COMMAND, TEMPLATE
from test_remote import _remote as _remote_cfg

from ionwell.cluster.remote import RemoteError, RemoteSession
from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import read_ledger

pytestmark = pytest.mark.cluster

IONWELL = [sys.executable, "-m", "ionwell.cli"]

ENGINE = {
    "xc": "lda,vwn",
    "basis": "sto-3g",
    "grid_level": 1,
    "potential_grid": {"spacing": 0.4, "margin": 3.0},
}


def _config(tmp: Path, name: str, **extra) -> Path:
    (tmp / "runner.tmpl").write_text(TEMPLATE)
    data = {
        "name": name,
        "host": {"builder": {"layers": 1, "shells": 1}},
        "guest": {"element": "Li", "charge_mode": "cation"},
        "engine": ENGINE,
        "placement": {"within": 3.0},
        "relax": {"enabled": False},
        "stop": {"guests": 2},
        "resources": {"compute": {"threads": 1, "memory": 1000, "walltime": 10}},
        **extra,
    }
    f = tmp / f"{name}.yaml"
    f.write_text(yaml.safe_dump(data))
    return f


def _run(cfg: Path, root: Path, *args: str, timeout: float = 1200) -> subprocess.CompletedProcess:
    return subprocess.run(
        [*IONWELL, "run", str(cfg), "--root", str(root), *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=root,
    )


def _records(root: Path, name: str):
    return read_ledger(CampaignPaths(root / "campaigns" / name).ledger)


WALLTIME_TEST = "test_walltime_kill_is_retried_with_more_time_and_restarts"


@pytest.fixture(scope="module", autouse=True)
def walltime_campaign(request, tmp_path_factory):
    """The campaign of the walltime test (the last test here), started before the first test of
    this file: for most of its ~3 min the program sleeps or SLURM is about to enforce a limit,
    so it runs beside the other tests (the test cluster has 2 CPUs, each job asks for one) and
    its test only waits for the end. Started only when that test is selected and SLURM runs.
    Yields (process, root, log file) or None."""
    if not any(item.name == WALLTIME_TEST for item in request.session.items):
        yield None
        return
    try:
        request.getfixturevalue("slurm_cluster")
    except pytest.skip.Exception:
        yield None
        return
    root = tmp_path_factory.mktemp("walltime")
    # step 1's program needs about 100 s (10 s per SCF iteration); the first attempt has a
    # one-minute limit and is killed; the retry gets two minutes. No warning signal
    # (stop_before 0): this is the hard kill. With the default, 30 s before a one-minute
    # limit, SLURM (which may send it up to 60 s early, sbatch(1) on --signal) once sent it
    # 2.5 s into the job step, before Snakemake had parsed the workflow and armed the handler,
    # so the attempt died of SIGUSR1 instead of reaching its limit (fresh-clone CI).
    cfg = _config(
        root,
        "walltime",
        engine=COMMAND,
        stop={"guests": 1},
        resources={
            "compute": {
                "threads": 1,
                "memory": 1000,
                "walltime": 1,
                "walltime_factor": 2,
                "stop_before": 0,
            }
        },
        launcher={"env": {"RUNNER_DELAY": "10", "RUNNER_DELAY_STEP": "1"}},
    )
    out = root / "run.log"
    with out.open("w") as sink:
        proc = subprocess.Popen(
            [
                *IONWELL,
                "run",
                str(cfg),
                "--root",
                str(root),
                "--profile",
                "slurm",
                "--retries",
                "3",
            ],
            stdout=sink,
            stderr=subprocess.STDOUT,
            cwd=root,
            start_new_session=True,
        )
    try:
        yield proc, root, out
    finally:
        if proc.poll() is None:  # the test did not wait for it (failed or interrupted)
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()


@pytest.mark.slow
def test_campaign_through_the_pbs_profile(slurm_cluster, tmp_path):
    """The embedded engine (PySCF) through the pbs profile (qsub/qstat, here the PBS wrappers
    over the test SLURM): each compute step its own job, its id recorded in the ledger."""
    cfg = _config(tmp_path, "onpbs", stop={"guests": 1})
    proc = _run(cfg, tmp_path, "--profile", "pbs")
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "onpbs")
    assert [r.guests for r in recs] == [0, 1]
    ids = [r.job_id for r in recs]
    assert all(ids) and len(set(ids)) == 2, ids
    done = {j["JobId"]: j for j in slurm_cluster.submissions("iw-compute")}
    for job in ids:  # one qsub job per compute step, each finished
        assert job in done and done[job]["JobState"] == "COMPLETED", (job, done.get(job))


@pytest.mark.slow
def test_warning_signal_stops_pw_x_cleanly_and_the_retry_resumes(slurm_cluster, tmp_path):
    """The graceful stop before the walltime, end to end on SLURM with Quantum ESPRESSO.

    Benzene (the builder's 1 layer, 1 shell) made slow on purpose (mixing_beta 0.15, conv_thr
    1e-9 Ry: ~30-35 SCF iterations, 60-150 s on 2 busy cores). The first attempt has SLURM's
    smallest limit, one minute, and asks for SIGUSR1 10 s before it (--signal=USR1@10; this
    SLURM sends it at its periodic check, up to 30 s early, measured 4-6 s off with the test
    cluster): pw.x, ~15-40 s into its SCF, gets iw.EXIT (QE user guide, "Restarting": a
    '$prefix.EXIT' file makes pw.x stop cleanly), stops, and the job fails before the limit;
    the retry (walltime_factor 4: four minutes, warned after 3:20 at the earliest) runs pw.x
    with restart_mode 'restart', which continues the SCF from the files written at the stop.
    Measured (load 3-5, conv_thr 1e-10): the signal 17 s into the job, pw.x stopped 0.7-1.6 s
    after it, resumed for 149-170 s; 260 s in all with the cluster's start."""
    from shared import qe_missing

    if qe_missing():
        pytest.skip(qe_missing())
    name = "softstop"
    cfg = _config(
        tmp_path,
        name,
        engine={
            "definition": "quantum-espresso",
            "settings": {"mixing_beta": 0.15, "max_scf": 300},
            "input": {"parameters": {"input_data": {"electrons": {"conv_thr": 1.0e-9}}}},
        },
        guest={"element": "Li", "charge_mode": "neutral"},
        stop={"max_steps": 0},
        remedies={"scf": []},
        # this SLURM has no PMI (MpiDefault=none): Debian's Open MPI 4.1 takes a pw.x started
        # inside the job's srun step for a direct launch and aborts in MPI_Init; without the
        # step's id it starts as a singleton (measured here). An argv prefix, nothing more.
        launcher={
            "kind": "mpi",
            "mpi_prefix": ["env", "-u", "SLURM_STEP_ID", "-u", "SLURM_STEPID"],
        },
        resources={
            "compute": {
                "threads": 1,
                "memory": 1000,
                "walltime": 1,
                "walltime_factor": 4,
                "stop_before": 10,
            }
        },
    )
    t0 = time.monotonic()
    proc = _run(cfg, tmp_path, "--profile", "slurm", "--retries", "2", timeout=600)
    total = time.monotonic() - t0
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    root = tmp_path / "campaigns" / name
    recs = _records(tmp_path, name)
    assert [r.step for r in recs] == [0] and recs[0].scf_converged

    # the first attempt stopped on the signal: recorded as stopped, not as a result
    events = [json.loads(line) for line in (root / "events.jsonl").read_text().splitlines()]
    kinds = [e["event"] for e in events if e.get("step") == 0]
    assert kinds.count("stopped") == 1 and kinds.count("recorded") == 1, kinds
    assert kinds.index("stopped") < kinds.index("recorded")
    assert "failed" not in kinds
    stopped = next(e for e in events if e["event"] == "stopped")
    assert "pw.x was asked to stop before the job's time limit" in stopped["message"]
    log = (root / "ionwell.log").read_text() if (root / "ionwell.log").is_file() else ""
    # SLURM: the first job ended itself before its limit (FAILED, no TIMEOUT), the retry done
    ours = {e.get("job") for e in events}
    jobs = [j for j in slurm_cluster.submissions("") if j["JobId"] in ours]
    states = sorted(j["JobState"] for j in jobs)
    assert states == ["COMPLETED", "FAILED"], (states, jobs)

    # the retry continued from pw.x's restart files, in pw.x's own words
    out = (root / "steps" / "0000" / "engine" / "pw.out").read_text()
    assert "Calculation restarted from scf iteration" in out
    assert "The initial density is read from file" in out
    assert "convergence has been achieved" in out
    result = json.loads((root / "steps" / "0000" / "result.json").read_text())
    assert result["warm_started"] is True and result["scf_converged"] is True
    print(f"soft stop campaign: {total:.0f} s; {stopped['message']}")
    print("\n".join(line for line in log.splitlines() if "soft stop" in line or "SIGUSR1" in line))


def _remote(sshd, tmp: Path, known_hosts: str | None = None) -> dict:
    return {
        "host": sshd.host,
        "port": sshd.port,
        "user": sshd.user,
        "key_file": str(sshd.key_file),
        "known_hosts": known_hosts or str(sshd.known_hosts),
        "workdir": str(tmp / "cluster-side"),
        "scheduler": "slurm",
        "python": sys.executable,
        "poll": 1.0,
    }


@pytest.mark.slow
def test_remote_campaign_reattaches_after_the_controller_is_killed(
    slurm_cluster, sshd_server, tmp_path
):
    cfg = _config(
        tmp_path,
        "remote",
        engine=COMMAND,
        remote=_remote(sshd_server, tmp_path),
        # step 1's program runs for a while (1 s per SCF iteration) so the controller dies
        # while its job is running
        launcher={"env": {"RUNNER_DELAY": "1.5", "RUNNER_DELAY_STEP": "1"}},
    )
    job_file = tmp_path / "campaigns" / "remote" / "steps" / "0001" / "engine" / "remote_job.json"
    ctl = subprocess.Popen(
        [*IONWELL, "run", str(cfg), "--root", str(tmp_path)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
        cwd=tmp_path,
    )
    deadline = time.monotonic() + 600
    while not job_file.exists() and time.monotonic() < deadline and ctl.poll() is None:
        time.sleep(0.2)
    assert job_file.exists(), "step 1 was never submitted"
    job_id = json.loads(job_file.read_text())["job"]["job_id"]
    time.sleep(2)
    os.killpg(ctl.pid, signal.SIGKILL)
    ctl.wait()
    q = subprocess.run(["squeue", "-h", "-j", job_id, "-o", "%T"], capture_output=True, text=True)
    assert q.stdout.strip() in ("RUNNING", "PENDING", "CONFIGURING", ""), q.stdout

    proc = _run(cfg, tmp_path)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "remote")
    assert [r.guests for r in recs] == [0, 1, 2]
    assert recs[1].job_id == job_id  # the same job, re-attached
    step1 = [j for j in slurm_cluster.submissions("iw-remote-0001")]
    assert len(step1) == 1, step1  # submitted once
    assert len(slurm_cluster.submissions("iw-remote-")) == 3
    events = (tmp_path / "campaigns" / "remote" / "events.jsonl").read_text()
    assert events.count('"started"') >= 4  # step 1 started twice: before and after the kill


@pytest.mark.slow
def test_remote_scf_failure_goes_on_to_the_next_remedy(slurm_cluster, sshd_server, tmp_path):
    """The runner with max_cycle 2 does not converge benzene and, told to stop on it, exits 1
    with 'SCF did not converge' (as pw.x does). In a remote job (real SLURM behind a real
    sshd) the job says so (exit 3), the controller submits the next SCF remedy (max_cycle 60)
    as a new job and the step is recorded with it; nothing is retried blindly."""
    template = TEMPLATE.replace(
        "grid_level 1\n", "grid_level 1\nmax_cycle ${max_cycle}\nstop_unconverged yes\n"
    )
    engine = {
        **COMMAND,
        "input": {"file": "job.inp", "template_text": template},
        "settings": {"max_cycle": 2},
        "scf_remedies": [{"name": "60 cycles", "settings": {"max_cycle": 60}}],
        "converged": {
            **COMMAND["converged"],
            "scf_failed": {"file": "job.log", "regex": "^SCF did not converge"},
        },
    }
    cfg = _config(
        tmp_path,
        "scfremote",
        engine=engine,
        remote=_remote(sshd_server, tmp_path),
        stop={"max_steps": 0},  # the host alone
    )
    proc = _run(cfg, tmp_path, timeout=600)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "scfremote")
    assert [r.step for r in recs] == [0]
    assert recs[0].remedies == ["SCF retry with 60 cycles: converged"], recs[0]
    jobs = slurm_cluster.submissions("iw-scfremote-0000")
    assert len(jobs) == 2, jobs  # the first try and the remedy, each once
    log = (tmp_path / "campaigns/scfremote/steps/0000/engine/job.log").read_text()
    assert "SCF converged" in log


@pytest.mark.slow
def test_remote_unknown_host_key_is_refused(sshd_server, tmp_path):
    empty = tmp_path / "known_hosts"
    empty.write_text("")
    cfg = _config(
        tmp_path, "stranger", remote=_remote(sshd_server, tmp_path, str(empty)), stop={"guests": 1}
    )
    proc = _run(cfg, tmp_path, "--retries", "0", timeout=300)
    assert proc.returncode != 0
    text = proc.stdout + proc.stderr
    assert "host key is not in" in text and "refusing" in text, text[-2000:]
    assert "Traceback" not in proc.stderr
    assert read_ledger(CampaignPaths(tmp_path / "campaigns" / "stranger").ledger) == []


# ---------------------------------------------------------------------------------------------
# the services themselves


def _sh(argv: list[str], cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(argv, capture_output=True, text=True, timeout=30, cwd=cwd)


def test_sbatch_job_completes_and_is_counted(slurm_cluster: SlurmCluster, tmp_path: Path):
    out = tmp_path / "hi.out"
    sub = _sh(
        ["sbatch", "--parsable", "--time=1", "-J", "iwhi", "-o", str(out), "--wrap", "echo hi"]
    )
    assert sub.returncode == 0, sub.stderr
    job_id = sub.stdout.strip().split(";")[0]
    assert slurm_cluster.wait_job(job_id, timeout=60) == "COMPLETED"
    assert out.read_text().strip() == "hi"
    jobs = slurm_cluster.submissions("iwhi")
    assert [j["JobId"] for j in jobs] == [job_id]
    assert jobs[0]["JobState"] == "COMPLETED"
    # the jobcomp file is what `sacct -c` reads
    sacct = _sh(["sacct", "-c", "-X", "-n", "-P", "-o", "JobID,JobName,State"])
    assert sacct.returncode == 0, sacct.stderr
    assert f"{job_id}|iwhi|COMPLETED" in sacct.stdout.splitlines()


def test_qsub_prints_bare_id_and_qstat_sees_running_job(
    slurm_cluster: SlurmCluster, tmp_path: Path
):
    script = tmp_path / "job.sh"
    marker = tmp_path / "ran.txt"
    script.write_text(
        f"#!/bin/bash\n#PBS -l walltime=00:01:00\n#PBS -N iwpbs\necho ran > {marker}\nsleep 3\n"
    )
    sub = _sh(["qsub", str(script)], cwd=tmp_path)
    assert sub.returncode == 0, sub.stderr
    job_id = sub.stdout.strip()
    assert job_id.isdigit(), f"qsub printed {sub.stdout!r}"

    seen_running = False
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and not seen_running:
        stat = _sh(["qstat", job_id])
        assert stat.returncode == 0, stat.stderr
        rows = [line.split() for line in stat.stdout.splitlines() if line.startswith(job_id)]
        assert rows, stat.stdout
        assert rows[0][1] == "iwpbs"
        seen_running = rows[0][4] == "R"
        time.sleep(0.3)
    assert seen_running, "qstat never showed the job running"

    assert slurm_cluster.wait_job(job_id, timeout=60) == "COMPLETED"
    assert marker.read_text().strip() == "ran"
    jobs = slurm_cluster.submissions("iwpbs")
    assert [j["JobId"] for j in jobs] == [job_id]
    assert jobs[0]["TimeLimit"] == "1"  # walltime=00:01:00 reached SLURM


# the time-limit kill is exercised by the walltime test below (a step job reaching TIMEOUT)


def test_paramiko_reaches_sshd_with_key_and_known_hosts(sshd_server: Sshd, tmp_path: Path):
    client = sshd_server.connect()
    try:
        _, stdout, _ = client.exec_command("echo ok", timeout=10)
        assert stdout.read().decode().strip() == "ok"
        assert stdout.channel.recv_exit_status() == 0
    finally:
        client.close()

    empty = tmp_path / "known_hosts_empty"
    empty.write_text("")
    with pytest.raises(paramiko.SSHException):
        sshd_server.connect(known_hosts=empty)


def test_host_keys_are_checked_and_a_dropped_connection_reopens(sshd_server, tmp_path):
    cfg = _remote_cfg(
        host=sshd_server.host,
        port=sshd_server.port,
        user=sshd_server.user,
        key_file=str(sshd_server.key_file),
        known_hosts=str(sshd_server.known_hosts),
        connect_attempts=2,
    )
    with RemoteSession(cfg, step=4) as ssh:
        assert ssh.run(["echo", "a b"])[1] == "a b\n"  # arguments quoted for the remote shell
        ssh.client.get_transport().close()  # the connection drops
        assert ssh.run(["echo", "again"])[1] == "again\n"

    empty = tmp_path / "empty_known_hosts"
    empty.write_text("")
    with pytest.raises(RemoteError, match=r"step 4: .*host key is not in .*refusing"):
        RemoteSession(cfg.model_copy(update={"known_hosts": str(empty)}), step=4).connect()

    # a known_hosts entry with another key for this host and port: refused as a changed key
    other = tmp_path / "other_key"
    subprocess.run(["ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-f", str(other)], check=True)
    kind, key = other.with_suffix(".pub").read_text().split()[:2]
    changed = tmp_path / "changed_known_hosts"
    changed.write_text(f"[{sshd_server.host}]:{sshd_server.port} {kind} {key}\n")
    with pytest.raises(RemoteError, match="host key differs"):
        RemoteSession(cfg.model_copy(update={"known_hosts": str(changed)}), step=4).connect()


@pytest.mark.slow
def test_walltime_kill_is_retried_with_more_time_and_restarts(slurm_cluster, walltime_campaign):
    """A campaign through the slurm profile (started by the fixture when this file started):
    every compute step its own SLURM job. Step 1's program needs about 100 s; the first attempt
    has a one-minute limit and is killed; the retry gets two minutes and continues from the
    checkpoint of the killed attempt."""
    proc, root, out = walltime_campaign
    code = proc.wait(timeout=1200)
    assert code == 0, out.read_text()[-4000:]
    recs = _records(root, "walltime")
    assert [r.guests for r in recs] == [0, 1] and recs[1].scf_converged
    log = (root / "campaigns" / "walltime" / "steps" / "0001" / "engine" / "job.log").read_text()
    assert "restart: initial guess from runner.chk" in log
    # each step recorded the SLURM job that computed it (step 1: the retry), each completed
    ids = [r.job_id for r in recs]
    assert all(ids) and len(set(ids)) == 2, ids
    done = {j["JobId"]: j for j in slurm_cluster.submissions("")}
    for job in ids:
        assert job in done and done[job]["JobState"] == "COMPLETED", (job, done.get(job))
    # this campaign's jobs (the executor names all jobs of one run alike; the other tests here
    # submit theirs meanwhile): step 0, step 1's attempt killed at its limit, its retry
    ours = [j for j in done.values() if j["Name"] == done[ids[1]]["Name"]]
    assert [j["JobState"] for j in ours] == ["COMPLETED", "TIMEOUT", "COMPLETED"], ours
    st = subprocess.run(
        [*IONWELL, "status", str(root / "campaigns" / "walltime")],
        capture_output=True,
        text=True,
    )
    assert all(j in st.stdout for j in ids), st.stdout
