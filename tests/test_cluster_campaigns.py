"""Campaigns on a real single-node SLURM (and its PBS-style qsub wrappers), and remote mode
through a real sshd on 127.0.0.1 in front of it. The services are started by the fixtures in
``tests/cluster.py``; these tests skip with the reason where they cannot run."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from test_command_engine import COMMAND, TEMPLATE

from ionwell.campaign import CampaignPaths
from ionwell.ledger import read_ledger

pytestmark = [pytest.mark.cluster, pytest.mark.slow]

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


def test_campaign_through_the_slurm_profile(slurm_cluster, tmp_path):
    cfg = _config(tmp_path, "onslurm")
    proc = _run(cfg, tmp_path, "--profile", "slurm")
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "onslurm")
    assert [r.guests for r in recs] == [0, 1, 2]
    # every compute step ran as its own SLURM job
    ids = [r.job_id for r in recs]
    assert all(ids) and len(set(ids)) == 3, ids
    done = {j["JobId"]: j for j in slurm_cluster.submissions("")}
    for job in ids:
        assert job in done and done[job]["JobState"] == "COMPLETED", (job, done.get(job))
    st = subprocess.run(
        [*IONWELL, "status", str(tmp_path / "campaigns" / "onslurm")],
        capture_output=True,
        text=True,
    )
    assert all(j in st.stdout for j in ids)


def test_campaign_through_the_pbs_profile(slurm_cluster, tmp_path):
    cfg = _config(tmp_path, "onpbs")
    proc = _run(cfg, tmp_path, "--profile", "pbs")
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "onpbs")
    assert [r.guests for r in recs] == [0, 1, 2]
    names = [j.get("Name", j.get("JobName", "")) for j in slurm_cluster.submissions("iw-step")]
    assert len(names) >= 3  # one qsub job per compute step


def test_walltime_kill_is_retried_with_more_time_and_restarts(slurm_cluster, tmp_path):
    """Step 1's program needs about 100 s (10 s per SCF iteration); the first attempt has a
    one-minute limit and is killed; the retry gets two minutes and continues from the
    checkpoint of the killed attempt."""
    cfg = _config(
        tmp_path,
        "walltime",
        engine=COMMAND,
        stop={"guests": 1},
        resources={"compute": {"threads": 1, "memory": 1000, "walltime": 1, "walltime_factor": 2}},
        launcher={"env": {"RUNNER_DELAY": "10", "RUNNER_DELAY_STEP": "1"}},
    )
    proc = _run(cfg, tmp_path, "--profile", "slurm", "--retries", "3")
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-3000:]
    recs = _records(tmp_path, "walltime")
    assert [r.guests for r in recs] == [0, 1] and recs[1].scf_converged
    log = (
        tmp_path / "campaigns" / "walltime" / "steps" / "0001" / "engine" / "job.log"
    ).read_text()
    assert "restart: initial guess from runner.chk" in log
    states = [j["JobState"] for j in slurm_cluster.submissions("")]
    assert "TIMEOUT" in states


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
