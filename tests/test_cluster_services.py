"""The real cluster services the scheduler tests rely on: SLURM (sbatch, PBS wrappers, time
limits, job accounting through jobcomp) and a second sshd reached with paramiko."""

from __future__ import annotations

import subprocess
import time
from pathlib import Path

import paramiko
import pytest
from cluster import SlurmCluster, Sshd

pytestmark = pytest.mark.cluster


def _run(argv: list[str], cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(argv, capture_output=True, text=True, timeout=30, cwd=cwd)


def test_sbatch_job_completes_and_is_counted(slurm_cluster: SlurmCluster, tmp_path: Path):
    out = tmp_path / "hi.out"
    sub = _run(
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
    sacct = _run(["sacct", "-c", "-X", "-n", "-P", "-o", "JobID,JobName,State"])
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
    sub = _run(["qsub", str(script)], cwd=tmp_path)
    assert sub.returncode == 0, sub.stderr
    job_id = sub.stdout.strip()
    assert job_id.isdigit(), f"qsub printed {sub.stdout!r}"

    seen_running = False
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and not seen_running:
        stat = _run(["qstat", job_id])
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


# the time-limit kill is exercised by test_cluster_campaigns (a step job reaching TIMEOUT)


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
