"""Remote mode pieces: the job script (pure), and the SSH session against a real sshd on
127.0.0.1 (host-key checks, a dropped connection re-opened)."""

from __future__ import annotations

import subprocess

import pytest

from ionwell.config import RemoteConfig, parse_campaign
from ionwell.remote import RemoteError, RemoteSession, job_script


def _campaign(**compute):
    return parse_campaign(
        {
            "name": "r",
            "host": {"builder": {"shells": 1, "layers": 1}},
            "resources": {"compute": {"walltime": 30, "walltime_factor": 2, **compute}},
        }
    )


def _remote(**kw) -> RemoteConfig:
    base = {
        "host": "h",
        "user": "u",
        "key_file": "k",
        "known_hosts": "kh",
        "workdir": "/w",
        "setup": ["module load x"],
    }
    return RemoteConfig(**{**base, **kw})


def test_job_script_for_slurm_and_pbs():
    c = _campaign(tasks=2, threads=4, memory=3000, partition="p1", account="a1", extra="--qos=q")
    s = job_script(c, "/w/r dir/steps/0001/engine", "iw-r-0001", 2, _remote())
    # the second attempt gets walltime × factor (30 × 2 min)
    for line in (
        "#SBATCH --time=60",
        "#SBATCH --ntasks=2",
        "#SBATCH --cpus-per-task=4",
        "#SBATCH --mem=3000M",
        "#SBATCH --partition=p1",
        "#SBATCH --account=a1",
        "#SBATCH --qos=q",
        "cd '/w/r dir/steps/0001/engine' || exit 1",
        "module load x",
    ):
        assert line in s.splitlines(), line
    assert s.splitlines()[-1].startswith("echo $? > ionwell.exit.tmp")
    p = job_script(c, "/w/x", "iw-r-0001", 1, _remote(scheduler="pbs"))
    for line in ("#PBS -N iw-r-0001", "#PBS -l walltime=00:30:00", "#PBS -q p1", "#PBS -A a1"):
        assert line in p.splitlines(), line


@pytest.mark.cluster
def test_host_keys_are_checked_and_a_dropped_connection_reopens(sshd_server, tmp_path):
    cfg = _remote(
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
