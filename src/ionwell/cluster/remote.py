"""Remote mode: stage a compute to a cluster over SSH, submit it, wait, fetch the outputs.

The controller and the step's assessment stay on the workstation; only the engine run goes to
the cluster. One compute of a step (its engine folder) becomes one scheduler job:

1. the engine folder (inputs written by ``engine.prepare``, restart files) is copied by SFTP to
   ``<remote.workdir>/<campaign>/<folder relative to the campaign>``, with ``job.json`` (the
   engine, relaxation and launcher settings) and a job script;
2. the script is submitted with ``sbatch`` or ``qsub`` over SSH, and the job id is written to
   ``remote_job.json`` in the local engine folder the moment it is known;
3. the job state is polled (``squeue``/``qstat``); the job script writes ``ionwell.exit`` last,
   so a job that leaves the queue without it was killed (walltime, node failure, ``scancel``);
4. the remote folder is copied back and the engine's own ``collect`` reads it locally.

A controller killed and restarted finds ``remote_job.json`` and re-attaches to the job if it is
still queued or running, or fetches its outputs if it finished — it never submits the same
attempt twice. A job that ended without finishing is submitted again with ``walltime_factor``
more time, and the engine continues from the restart files left in the remote folder.

Host keys are checked against ``remote.known_hosts``; an unknown or changed key is refused,
never accepted. Connections that drop are retried with exponential backoff. Key material,
passwords and tokens are never written anywhere: only the key file's path is in the config.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import posixpath
import shlex
import stat
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

from pydantic import BaseModel

from ionwell.cluster.job import SCF_EXIT
from ionwell.config.campaign import Campaign, RemoteConfig
from ionwell.engines.command_engine import restart_in_place
from ionwell.engines.launcher import ScfNotConverged
from ionwell.engines.results import CONTEXT, INPUT
from ionwell.errors import IonwellError
from ionwell.store.campaign import atomic_write_json
from ionwell.workflow.resources import hms, walltime_minutes

__all__ = [
    "RemoteError",
    "RemoteJob",
    "RemoteSession",
    "execute_remote",
    "inputs_digest",
    "job_script",
]

log = logging.getLogger("ionwell.cluster.remote")

JOB_FILE = "remote_job.json"
SPEC_FILE = "job.json"
SCRIPT = "ionwell-job.sh"
EXIT_FILE = "ionwell.exit"
JOB_LOG = "job.out"
#: Files of the local engine folder that are ionwell's own bookkeeping, never uploaded.
_LOCAL_ONLY = {JOB_FILE}


class RemoteError(IonwellError):
    """The cluster cannot be reached, refuses us, or a job cannot be submitted or queried."""


class RemoteJob(BaseModel):
    """A submitted remote job, as recorded in ``remote_job.json``."""

    job_id: str
    scheduler: str
    host: str
    remote_dir: str
    attempt: int
    submitted: str
    walltime_minutes: int
    inputs: str = ""  # digest of the staged inputs (see inputs_digest)


# ---------------------------------------------------------------------------------------------
# the job script (pure)


def job_script(
    campaign: Campaign, remote_dir: str, name: str, attempt: int, cfg: RemoteConfig
) -> str:
    """The batch script of one remote compute (SLURM or PBS directives)."""
    c = campaign.resources.compute
    minutes = walltime_minutes(campaign, attempt)
    lines = ["#!/bin/bash"]
    if cfg.scheduler == "slurm":
        lines += [
            f"#SBATCH --job-name={name}",
            f"#SBATCH --time={minutes}",
            f"#SBATCH --ntasks={c.tasks}",
            f"#SBATCH --cpus-per-task={c.threads}",
            f"#SBATCH --mem={c.memory}M",
            f"#SBATCH --output={posixpath.join(remote_dir, JOB_LOG)}",
        ]
        if c.partition:
            lines.append(f"#SBATCH --partition={c.partition}")
        if c.account:
            lines.append(f"#SBATCH --account={c.account}")
        if c.extra:
            lines.append(f"#SBATCH {c.extra}")
    else:
        lines += [
            f"#PBS -N {name}",
            f"#PBS -l walltime={hms(minutes)}",
            f"#PBS -l nodes=1:ppn={c.threads * c.tasks}",
            f"#PBS -l mem={c.memory}mb",
        ]
        if c.partition:
            lines.append(f"#PBS -q {c.partition}")
        if c.account:
            lines.append(f"#PBS -A {c.account}")
        if c.extra:
            lines.append(f"#PBS {c.extra}")
    lines += [
        f"cd {shlex.quote(remote_dir)} || exit 1",
        f"exec > >(tee -a {JOB_LOG}) 2>&1" if cfg.scheduler == "pbs" else "",
        f"rm -f {EXIT_FILE}",
        *cfg.setup,
        f"{shlex.quote(cfg.python)} -m ionwell.cluster.job .",
        f"echo $? > {EXIT_FILE}.tmp && mv {EXIT_FILE}.tmp {EXIT_FILE}",
    ]
    return "\n".join(x for x in lines if x) + "\n"


# ---------------------------------------------------------------------------------------------
# SSH session


class RemoteSession:
    """One SSH connection (paramiko) with SFTP, host-key checking and retried connects."""

    def __init__(self, cfg: RemoteConfig, step: int | None = None) -> None:
        self.cfg = cfg
        self.where = f"step {step}: " if step is not None else ""
        self.client = None
        self._sftp = None

    def __enter__(self) -> RemoteSession:
        self.connect()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def connect(self) -> None:
        import paramiko

        cfg = self.cfg
        known = Path(cfg.known_hosts).expanduser()
        key = Path(cfg.key_file).expanduser()
        target = f"{cfg.user}@{cfg.host}:{cfg.port}"
        if not known.is_file():
            raise RemoteError(
                f"{self.where}remote.known_hosts: {known} does not exist (expected an OpenSSH "
                "known_hosts file holding the cluster's host key)"
            )
        if not key.is_file():
            raise RemoteError(f"{self.where}remote.key_file: {key} does not exist")
        delay = 1.0
        for attempt in range(1, cfg.connect_attempts + 1):
            client = paramiko.SSHClient()
            client.load_host_keys(str(known))
            client.set_missing_host_key_policy(paramiko.RejectPolicy())
            try:
                client.connect(
                    cfg.host,
                    port=cfg.port,
                    username=cfg.user,
                    key_filename=str(key),
                    look_for_keys=False,
                    allow_agent=False,
                    timeout=cfg.timeout,
                    banner_timeout=cfg.timeout,
                    auth_timeout=cfg.timeout,
                )
            except paramiko.BadHostKeyException:
                client.close()
                raise RemoteError(
                    f"{self.where}{target}: the host key differs from the one in {known}; "
                    "refusing to connect (the key changed, or this is not the cluster)"
                ) from None
            except paramiko.AuthenticationException:
                client.close()
                raise RemoteError(
                    f"{self.where}{target}: authentication with the key {key} was refused"
                ) from None
            except paramiko.SSHException as err:
                client.close()
                if "not found in known_hosts" in str(err):
                    raise RemoteError(
                        f"{self.where}{target}: the host key is not in {known}; refusing to "
                        "connect to an unknown host (check its fingerprint with the cluster's "
                        f"admins, then add it, e.g. ssh-keyscan -p {cfg.port} {cfg.host})"
                    ) from None
                problem = f"SSH error: {err}"
            except (TimeoutError, OSError) as err:
                client.close()
                problem = f"cannot connect: {err}"
            else:
                self.client = client
                return
            if attempt == cfg.connect_attempts:
                raise RemoteError(f"{self.where}{target}: {problem} (after {attempt} attempts)")
            log.warning("%s%s: %s; retrying in %.0f s", self.where, target, problem, delay)
            time.sleep(delay)
            delay = min(delay * 2, 60.0)

    def close(self) -> None:
        for thing in (self._sftp, self.client):
            if thing is not None:
                with contextlib.suppress(OSError, EOFError):  # already gone
                    thing.close()
        self._sftp = None
        self.client = None

    @property
    def sftp(self):
        if self._sftp is None:
            self._sftp = self.client.open_sftp()
        return self._sftp

    def run(self, argv: list[str], check: bool = True) -> tuple[int, str, str]:
        """Run a command (arguments quoted for the remote shell); returns (code, out, err).

        A connection that dropped is opened again (with :meth:`connect`'s backoff) and the
        command sent once more; commands sent here are queries or idempotent.
        """
        import paramiko

        cmd = shlex.join(argv)
        try:
            text, etext, code = self._exec(cmd)
        except (paramiko.SSHException, OSError, EOFError) as err:
            log.warning("%s%s: connection lost (%s); reconnecting", self.where, self.cfg.host, err)
            self.close()
            self.connect()
            text, etext, code = self._exec(cmd)
        if check and code != 0:
            raise RemoteError(
                f"{self.where}{self.cfg.host}: '{cmd}' failed with code {code}: "
                f"{(etext or text).strip()[-400:]}"
            )
        return code, text, etext

    def _exec(self, cmd: str) -> tuple[str, str, int]:
        if (
            self.client is None
            or not self.client.get_transport()
            or not (self.client.get_transport().is_active())
        ):
            raise EOFError("the SSH connection is closed")
        _, out, err = self.client.exec_command(cmd, timeout=self.cfg.timeout)
        text, etext = out.read().decode(errors="replace"), err.read().decode(errors="replace")
        return text, etext, out.channel.recv_exit_status()

    def makedirs(self, path: str) -> None:
        self.run(["mkdir", "-p", path])

    def put_tree(self, local: Path, remote: str, skip: set[str]) -> int:
        """Upload the files under ``local`` to ``remote``; returns the number of files."""
        n = 0
        for p in sorted(Path(local).rglob("*")):
            rel = p.relative_to(local)
            if rel.parts[0] in skip or not p.is_file():
                continue
            target = posixpath.join(remote, *rel.parts)
            if len(rel.parts) > 1:
                self.makedirs(posixpath.dirname(target))
            self.sftp.put(str(p), target)
            n += 1
        return n

    def get_tree(self, remote: str, local: Path) -> int:
        """Download the files under ``remote`` into ``local``; returns the number of files."""
        n = 0
        for entry in self.sftp.listdir_attr(remote):
            src = posixpath.join(remote, entry.filename)
            dst = Path(local) / entry.filename
            if stat.S_ISDIR(entry.st_mode or 0):
                dst.mkdir(parents=True, exist_ok=True)
                n += self.get_tree(src, dst)
            else:
                tmp = dst.with_name(dst.name + ".part")
                self.sftp.get(src, str(tmp))
                tmp.replace(dst)
                n += 1
        return n

    def read_text(self, path: str) -> str | None:
        try:
            with self.sftp.open(path) as f:
                return f.read().decode(errors="replace")
        except OSError:
            return None

    def write_text(self, path: str, text: str) -> None:
        with self.sftp.open(path, "w") as f:
            f.write(text)

    # -- scheduler --------------------------------------------------------------------------

    def submit(self, remote_dir: str) -> str:
        """Submit ``remote_dir``'s job script; returns the job id."""
        if self.cfg.scheduler == "slurm":
            _, out, _ = self.run(["sbatch", "--parsable", posixpath.join(remote_dir, SCRIPT)])
            job = out.strip().split(";")[0]
        else:
            _, out, _ = self.run(["qsub", posixpath.join(remote_dir, SCRIPT)])
            job = out.strip().splitlines()[-1].strip() if out.strip() else ""
        if not job:
            raise RemoteError(f"{self.where}{self.cfg.host}: the scheduler gave no job id")
        return job

    def state(self, job_id: str) -> str | None:
        """The job's scheduler state, or None once it has left the queue."""
        if self.cfg.scheduler == "slurm":
            code, out, _ = self.run(["squeue", "-h", "-j", job_id, "-o", "%T"], check=False)
            text = out.strip()
            return text.splitlines()[0] if code == 0 and text else None
        code, out, _ = self.run(["qstat", job_id], check=False)
        if code != 0:
            return None
        rows = [r.split() for r in out.strip().splitlines() if r.strip()]
        for r in rows:
            if r and r[0].split(".")[0] == job_id.split(".")[0] and len(r) >= 5:
                return None if r[4] == "C" else {"Q": "PENDING", "R": "RUNNING"}.get(r[4], r[4])
        return None


# ---------------------------------------------------------------------------------------------
# one remote compute


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def execute_remote(
    campaign: Campaign,
    workdir: Path,
    relative: str,
    step: int,
    sleep: Callable[[float], None] = time.sleep,
) -> RemoteJob:
    """Run the prepared engine folder ``workdir`` as a cluster job and fetch its outputs.

    ``relative`` is the folder's path inside the campaign (e.g. ``steps/0003/engine``).

    Raises:
        RemoteError: the cluster is unreachable or refuses us, or the job ended without
            finishing (killed, failed); the message names the step, the job and what happened.
    """
    cfg = campaign.remote
    assert cfg is not None
    workdir = Path(workdir)
    remote_dir = posixpath.join(cfg.workdir, campaign.name, relative)
    record = workdir / JOB_FILE
    job: RemoteJob | None = None
    attempts = 0
    if record.is_file():
        try:
            data = json.loads(record.read_text())
            job = RemoteJob.model_validate(data["job"])
            attempts = int(data.get("attempts", job.attempt))
        except (ValueError, KeyError) as err:
            raise RemoteError(f"step {step}: {record}: unreadable job record ({err})") from None

    if job is not None and job.inputs != inputs_digest(campaign, workdir):
        log.info(
            "step %04d: the inputs changed since remote job %s (an SCF retry or another site); "
            "submitting a new job",
            step,
            job.job_id,
        )
        job, attempts = None, 0
    with RemoteSession(cfg, step) as ssh:
        if job is not None:
            state = ssh.state(job.job_id)
            exit_text = ssh.read_text(posixpath.join(remote_dir, EXIT_FILE))
            if state is not None or exit_text is not None:
                log.info(
                    "step %04d: re-attaching to remote job %s (%s)",
                    step,
                    job.job_id,
                    state or "finished",
                )
            else:
                log.warning(
                    "step %04d: remote job %s ended without finishing; submitting again",
                    step,
                    job.job_id,
                )
                job = None
        if job is None:
            attempts += 1
            job = _submit(ssh, campaign, workdir, remote_dir, relative, step, attempts)
            atomic_write_json(record, {"job": job.model_dump(), "attempts": attempts})
        _wait(ssh, job, remote_dir, step, cfg.poll, sleep)
        exit_text = ssh.read_text(posixpath.join(remote_dir, EXIT_FILE))
        n = ssh.get_tree(remote_dir, workdir)
        log.info("step %04d: fetched %d files of job %s", step, n, job.job_id)
    if exit_text is None:
        raise RemoteError(
            f"step {step}: remote job {job.job_id} left the queue without finishing (killed by "
            f"its time limit of {job.walltime_minutes} min, or failed); its log is "
            f"{workdir / JOB_LOG}; the next attempt continues from the restart files"
        )
    if exit_text.strip() == str(SCF_EXIT):  # the SCF remedies go on, as for a local run
        raise ScfNotConverged(
            f"step {step}: remote job {job.job_id}: the program stopped on its unconverged SCF "
            f"(see {workdir / JOB_LOG})",
            warm=restart_in_place(workdir),
        )
    if exit_text.strip() != "0":
        raise RemoteError(
            f"step {step}: remote job {job.job_id} failed (exit code {exit_text.strip()}); "
            f"see {workdir / JOB_LOG}"
        )
    return job


def inputs_digest(campaign: Campaign, workdir: Path) -> str:
    """sha256 of what a remote job computes: the structure and context written by
    ``engine.prepare`` and the engine, relaxation and launcher settings. A job record is
    re-attached to only when this matches, so an SCF retry or a rejected site in the same
    engine folder is submitted anew rather than served the earlier job's outputs."""
    h = hashlib.sha256()
    for name in (INPUT, CONTEXT):
        f = Path(workdir) / name
        h.update(name.encode() + b"\0" + (f.read_bytes() if f.is_file() else b"") + b"\0")
    h.update(json.dumps(_job_spec(campaign), sort_keys=True).encode())
    return h.hexdigest()


def _job_spec(campaign: Campaign) -> dict:
    return {
        "engine": campaign.engine.model_dump(mode="json"),
        "relax": campaign.relax.model_dump(mode="json"),
        "launcher": campaign.launcher.model_dump(mode="json"),
    }


def _submit(
    ssh: RemoteSession,
    campaign: Campaign,
    workdir: Path,
    remote_dir: str,
    relative: str,
    step: int,
    attempt: int,
) -> RemoteJob:
    cfg = campaign.remote
    assert cfg is not None
    ssh.makedirs(remote_dir)
    ssh.run(["rm", "-f", posixpath.join(remote_dir, EXIT_FILE)])
    n = ssh.put_tree(workdir, remote_dir, skip=_LOCAL_ONLY)
    ssh.write_text(posixpath.join(remote_dir, SPEC_FILE), json.dumps(_job_spec(campaign), indent=2))
    name = f"iw-{campaign.name}-{step:04d}"
    if relative.rstrip("/").split("/")[-1] != "engine":
        name += "-" + relative.rstrip("/").split("/")[-1]
    ssh.write_text(
        posixpath.join(remote_dir, SCRIPT), job_script(campaign, remote_dir, name, attempt, cfg)
    )
    job_id = ssh.submit(remote_dir)
    job = RemoteJob(
        job_id=job_id,
        scheduler=cfg.scheduler,
        host=cfg.host,
        remote_dir=remote_dir,
        attempt=attempt,
        submitted=_now(),
        walltime_minutes=walltime_minutes(campaign, attempt),
        inputs=inputs_digest(campaign, workdir),
    )
    log.info(
        "step %04d: staged %d files to %s:%s; submitted job %s (attempt %d, %d min)",
        step,
        n,
        cfg.host,
        remote_dir,
        job_id,
        attempt,
        job.walltime_minutes,
    )
    return job


def _wait(
    ssh: RemoteSession,
    job: RemoteJob,
    remote_dir: str,
    step: int,
    poll: float,
    sleep: Callable[[float], None],
) -> None:
    last = None
    while True:
        state = ssh.state(job.job_id)
        if state is None:
            return
        if state != last:
            log.info("step %04d: remote job %s is %s", step, job.job_id, state.lower())
            last = state
        sleep(poll)
