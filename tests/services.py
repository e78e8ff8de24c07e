"""Real cluster services for tests: a single-node SLURM and a second sshd on 127.0.0.1.

Not a test file. The fixtures in ``conftest.py`` use it; it can also be used by hand::

    with SlurmCluster.start(tmp) as cluster:
        subprocess.run(["sbatch", "--wrap", "true"])
        cluster.submissions("wrap")

SLURM needs the config at ``/etc/slurm/slurm.conf`` (Snakemake's SLURM executor strips
``SLURM_*`` variables, so ``SLURM_CONF`` cannot be used). We write that file with a marker line,
back up any file of ours left by a crashed run, refuse to touch a file we did not write, and
restore the previous state on ``stop()``. munged runs with its default socket and key so every
client finds it; an already answering munged is reused and left alone.

Every daemon is started in its own session (``setsid``) in the foreground; ``stop()`` ends
exactly the processes of those sessions (SIGTERM, then SIGKILL). One cluster at a time per
machine: a lock file serialises test sessions, and a state file lets the next session clean up
after a crashed one (only processes whose recorded start time still matches are signalled).
"""

from __future__ import annotations

import atexit
import contextlib
import fcntl
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

SLURM_CONF = Path("/etc/slurm/slurm.conf")
SLURM_CONF_BACKUP = Path("/etc/slurm/slurm.conf.ionwell-test-backup")
MARKER = "# written by ionwell tests/services.py (test cluster); removed at teardown"
MUNGE_SOCKET = Path("/run/munge/munge.socket.2")
MUNGE_KEY = Path("/etc/munge/munge.key")
LOCK_FILE = Path("/run/ionwell-test-slurm.lock")
STATE_FILE = Path("/run/ionwell-test-slurm.json")
CLUSTER_NAME = "ionwelltest"
PARTITION = "debug"

SLURM_BINARIES = (
    "slurmctld",
    "slurmd",
    "sinfo",
    "sbatch",
    "squeue",
    "scontrol",
    "scancel",
    "sacct",
    "qsub",
    "qstat",
    "qdel",
    "munged",
    "munge",
)
SSHD = "/usr/sbin/sshd"


class ClusterUnavailable(RuntimeError):
    """The service cannot run here; the message is the skip reason."""


# ---------------------------------------------------------------------------- helpers


def _which(name: str) -> str | None:
    found = shutil.which(name)
    if found:
        return found
    for folder in ("/usr/sbin", "/sbin", "/usr/bin"):
        candidate = Path(folder) / name
        if candidate.is_file() and os.access(candidate, os.X_OK):
            return str(candidate)
    return None


def _run(argv: list[str], timeout: float = 20, check: bool = False) -> subprocess.CompletedProcess:
    return subprocess.run(
        argv, capture_output=True, text=True, timeout=timeout, check=check, stdin=subprocess.DEVNULL
    )


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _port_open(port: int, host: str = "127.0.0.1") -> bool:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.settimeout(0.5)
        return s.connect_ex((host, port)) == 0


def _start_time(pid: int) -> str | None:
    """Kernel start time of a process (field 22 of /proc/PID/stat), None when gone."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat.rsplit(")", 1)[1].split()[19]


def _session_members(sid: int) -> list[int]:
    """Pids of the processes whose session id is ``sid`` (ours: started with setsid)."""
    members = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid:  # fields: state ppid pgrp session ...
            members.append(int(entry.name))
    return members


def _tail(path: Path, lines: int = 15) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-lines:])
    except OSError:
        return "(no log)"


class _Daemon:
    """One daemon started in the foreground in its own session; stopped exactly."""

    def __init__(self, name: str, argv: list[str], log: Path):
        self.name = name
        self.log = log
        self._log_handle = open(log, "ab")  # noqa: SIM115 - closed in stop()
        self.proc = subprocess.Popen(
            argv,
            stdin=subprocess.DEVNULL,
            stdout=self._log_handle,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        self.pid = self.proc.pid
        self.start_time = _start_time(self.pid)

    def alive(self) -> bool:
        return self.proc.poll() is None

    def record(self) -> dict:
        return {"name": self.name, "pid": self.pid, "start_time": self.start_time}

    def stop(self, grace: float = 5.0) -> None:
        _stop_session(self.pid, self.start_time, grace, self.proc)
        self._log_handle.close()


def _stop_session(
    sid: int, start_time: str | None, grace: float, proc: subprocess.Popen | None = None
) -> None:
    """SIGTERM every process of session ``sid`` (if its leader is still the one we started),
    wait up to ``grace`` seconds, then SIGKILL what is left."""
    leader_ok = start_time is not None and _start_time(sid) == start_time
    if proc is not None and proc.poll() is not None:
        leader_ok = False
    members = _session_members(sid) if (leader_ok or proc is not None) else []
    for pid in members:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGTERM)
    deadline = time.monotonic() + grace
    while time.monotonic() < deadline:
        if proc is not None:
            proc.poll()
        if not _session_members(sid):
            break
        time.sleep(0.2)
    for pid in _session_members(sid):
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)
    if proc is not None:
        with contextlib.suppress(subprocess.TimeoutExpired):
            proc.wait(timeout=5)


# ---------------------------------------------------------------------------- skip reason


def _conf_is_ours(path: Path = SLURM_CONF) -> bool:
    try:
        return path.read_text(errors="replace").startswith(MARKER)
    except OSError:
        return False


def cluster_skip_reason() -> str | None:
    """Why the SLURM test cluster cannot run here, or None."""
    if os.geteuid() != 0:
        return (
            "cluster tests need root (slurmd runs jobs as root; /etc/slurm/slurm.conf is written)"
        )
    missing = [b for b in SLURM_BINARIES if _which(b) is None]
    if missing:
        return (
            "SLURM/munge binaries missing: "
            + ", ".join(missing)
            + " (apt-get install slurmctld slurmd slurm-client munge slurm-wlm-torque)"
        )
    if SLURM_CONF.exists() and not _conf_is_ours() and not _replace_allowed():
        return (
            f"{SLURM_CONF} exists and was not written by the tests; refusing to replace a real "
            "SLURM configuration (set IONWELL_CLUSTER_REPLACE_SLURM_CONF=1 to back it up, "
            "replace it for the session and restore it)"
        )
    return None


def _replace_allowed() -> bool:
    return os.environ.get("IONWELL_CLUSTER_REPLACE_SLURM_CONF") == "1"


def sshd_skip_reason() -> str | None:
    """Why the test sshd cannot run here, or None."""
    if os.geteuid() != 0:
        return "the test sshd needs root (privilege separation)"
    missing = [b for b in (SSHD, "ssh-keygen") if _which(b) is None and not Path(b).exists()]
    if missing:
        return "missing: " + ", ".join(missing) + " (apt-get install openssh-server)"
    return None


# ---------------------------------------------------------------------------- SLURM


def _parse_jobcomp_line(line: str) -> dict[str, str]:
    """``Key=value Key=value ...`` where values may contain spaces (WorkDir)."""
    record: dict[str, str] = {}
    for part in re.split(r" (?=[A-Za-z]+=)", line.strip()):
        key, sep, value = part.partition("=")
        if sep:
            record[key] = value
    return record


class SlurmCluster:
    """A single-node SLURM cluster (slurmctld + slurmd, munged if none is running)."""

    def __init__(self, tmp: Path):
        self.tmp = Path(tmp)
        self.node = socket.gethostname().split(".")[0]
        self.partition = PARTITION
        self.cluster_name = CLUSTER_NAME
        self.jobcomp_file = self.tmp / "jobcomp.txt"
        self.conf_path = SLURM_CONF
        self.startup_seconds: float | None = None
        self._daemons: list[_Daemon] = []
        self._lock_fd: int | None = None
        self._created_key = False
        self._conf_written = False
        self._stopped = False

    # -- life cycle

    @classmethod
    def start(cls, tmp: Path, lock_wait: float | None = None) -> SlurmCluster:
        """Write the config and start the daemons; raises ``ClusterUnavailable`` (stopping
        whatever was started) when the cluster cannot run here."""
        reason = cluster_skip_reason()
        if reason:
            raise ClusterUnavailable(reason)
        cluster = cls(tmp)
        if lock_wait is None:
            lock_wait = float(os.environ.get("IONWELL_CLUSTER_LOCK_WAIT", "300"))
        try:
            cluster._start(lock_wait)
        except BaseException:
            cluster.stop()
            raise
        atexit.register(cluster.stop)
        return cluster

    def __enter__(self) -> SlurmCluster:
        return self

    def __exit__(self, *exc) -> None:
        self.stop()

    def _start(self, lock_wait: float) -> None:
        t0 = time.monotonic()
        self.tmp.mkdir(parents=True, exist_ok=True)
        self._acquire_lock(lock_wait)
        _cleanup_stale_run()
        # checked again under the lock: a concurrent session may have changed it
        if SLURM_CONF.exists() and not _conf_is_ours():
            if not _replace_allowed():
                raise ClusterUnavailable(f"{SLURM_CONF} exists and was not written by the tests")
            if SLURM_CONF_BACKUP.exists():
                raise ClusterUnavailable(f"{SLURM_CONF_BACKUP} exists; restore it by hand first")
            shutil.copy2(SLURM_CONF, SLURM_CONF_BACKUP)
        self._start_munge()
        self._write_conf()
        self._save_state()
        ctld = self._spawn("slurmctld", [_which("slurmctld"), "-D", "-c", "-i"])
        self._wait_for(
            lambda: _run(["scontrol", "ping"], timeout=10).stdout.count("UP") > 0,
            30,
            "slurmctld answers 'scontrol ping'",
            ctld,
        )
        slurmd = self._spawn("slurmd", [_which("slurmd"), "-D", "-N", self.node])
        self._wait_idle(slurmd)
        self.startup_seconds = time.monotonic() - t0

    def _acquire_lock(self, wait: float) -> None:
        fd = os.open(LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    holder = os.pread(fd, 32, 0).decode(errors="replace").strip()
                    os.close(fd)
                    raise ClusterUnavailable(
                        f"another test session (pid {holder or '?'}) holds {LOCK_FILE}: its "
                        f"SLURM test cluster is running; waited {wait:.0f} s"
                    ) from None
                time.sleep(1)
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        self._lock_fd = fd

    def _spawn(self, name: str, argv: list) -> _Daemon:
        daemon = _Daemon(name, [str(a) for a in argv], self.tmp / f"{name}.out")
        self._daemons.append(daemon)
        self._save_state()
        return daemon

    def _wait_for(self, ok, timeout: float, what: str, daemon: _Daemon | None = None) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if daemon is not None and not daemon.alive():
                raise ClusterUnavailable(
                    f"{daemon.name} exited (code {daemon.proc.returncode}) before {what}:\n"
                    + self._logs(daemon.name)
                )
            try:
                if ok():
                    return
            except (OSError, subprocess.SubprocessError):
                pass
            time.sleep(0.3)
        raise ClusterUnavailable(
            f"timed out after {timeout:.0f} s waiting until {what}:\n"
            + self._logs(daemon.name if daemon else "")
        )

    def _logs(self, name: str) -> str:
        parts = []
        for log in (self.tmp / f"{name}.out", self.tmp / f"{name}.log"):
            if log.exists():
                parts.append(f"--- {log}\n{_tail(log)}")
        return "\n".join(parts)

    def _start_munge(self) -> None:
        if _munge_answers():
            return
        if not MUNGE_KEY.exists():
            MUNGE_KEY.parent.mkdir(parents=True, exist_ok=True)
            created = _run(
                [_which("mungekey") or "mungekey", "--create", "--keyfile", str(MUNGE_KEY)]
            )
            if created.returncode != 0 or not MUNGE_KEY.exists():
                MUNGE_KEY.write_bytes(os.urandom(1024))
            os.chown(MUNGE_KEY, 0, 0)
            os.chmod(MUNGE_KEY, 0o400)
            self._created_key = True
        MUNGE_SOCKET.parent.mkdir(parents=True, exist_ok=True)
        os.chmod(MUNGE_SOCKET.parent, 0o755)
        munged = self._spawn(
            "munged",
            [
                _which("munged"),
                "--foreground",
                "--force",
                f"--socket={MUNGE_SOCKET}",
                f"--key-file={MUNGE_KEY}",
                f"--pid-file={self.tmp / 'munged.pid'}",
                f"--seed-file={self.tmp / 'munged.seed'}",
                f"--log-file={self.tmp / 'munged.log'}",
            ],
        )
        self._wait_for(_munge_answers, 15, "munged answers 'munge -n | unmunge'", munged)

    def slurm_conf_text(self) -> str:
        mem_mb = _mem_total_mb()
        real_memory = max(256, min(mem_mb // 2, 8192))
        t = self.tmp
        return f"""{MARKER}
ClusterName={CLUSTER_NAME}
SlurmctldHost={self.node}(127.0.0.1)
SlurmctldPort={self._ctld_port}
SlurmdPort={self._slurmd_port}
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
StateSaveLocation={t / "state"}
SlurmdSpoolDir={t / "spool"}
SlurmctldPidFile={t / "slurmctld.pid"}
SlurmdPidFile={t / "slurmd.pid"}
SlurmctldLogFile={t / "slurmctld.log"}
SlurmdLogFile={t / "slurmd.log"}
SlurmctldDebug=info
SlurmdDebug=info
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/filetxt
JobCompLoc={self.jobcomp_file}
MpiDefault=none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SlurmdParameters=config_overrides
ReturnToService=2
JobRequeue=0
OverTimeLimit=0
KillWait=5
InactiveLimit=0
MinJobAge=300
SlurmctldTimeout=30
SlurmdTimeout=60
MessageTimeout=10
NodeName={self.node} NodeAddr=127.0.0.1 CPUs=2 RealMemory={real_memory} State=UNKNOWN
PartitionName={PARTITION} Nodes={self.node} Default=YES MaxTime=INFINITE State=UP
"""

    def _write_conf(self) -> None:
        for sub in ("state", "spool"):
            (self.tmp / sub).mkdir(exist_ok=True)
        self._ctld_port = _free_port()
        self._slurmd_port = _free_port()
        while self._slurmd_port == self._ctld_port:
            self._slurmd_port = _free_port()
        SLURM_CONF.parent.mkdir(parents=True, exist_ok=True)
        tmp_conf = SLURM_CONF.with_name(SLURM_CONF.name + ".ionwell-tmp")
        tmp_conf.write_text(self.slurm_conf_text())
        os.chmod(tmp_conf, 0o644)
        os.replace(tmp_conf, SLURM_CONF)
        self._conf_written = True

    def _save_state(self) -> None:
        state = {
            "owner_pid": os.getpid(),
            "tmp": str(self.tmp),
            "daemons": [d.record() for d in self._daemons],
            "created_key": self._created_key,
        }
        tmp_state = STATE_FILE.with_suffix(".tmp")
        tmp_state.write_text(json.dumps(state))
        os.replace(tmp_state, STATE_FILE)

    def _node_state(self) -> str:
        out = _run(["sinfo", "-h", "-n", self.node, "-o", "%T"], timeout=10)
        return out.stdout.strip().lower()

    def _wait_idle(self, slurmd: _Daemon, timeout: float = 30) -> None:
        deadline = time.monotonic() + timeout
        resumed_at = 0.0
        state = ""
        while time.monotonic() < deadline:
            if not slurmd.alive():
                raise ClusterUnavailable(
                    f"slurmd exited (code {slurmd.proc.returncode}):\n" + self._logs("slurmd")
                )
            state = self._node_state()
            if state.rstrip("*") == "idle":
                return
            if (
                any(word in state for word in ("down", "drain", "fail"))
                and time.monotonic() - resumed_at > 3
            ):
                _run(["scontrol", "update", f"nodename={self.node}", "state=resume"], timeout=10)
                resumed_at = time.monotonic()
            time.sleep(0.3)
        reason = _run(["sinfo", "-h", "-R"], timeout=10).stdout.strip()
        raise ClusterUnavailable(
            f"node {self.node} not idle after {timeout:.0f} s (state {state!r}, reason "
            f"{reason!r}):\n" + self._logs("slurmd") + "\n" + self._logs("slurmctld")
        )

    def stop(self) -> None:
        """Cancel remaining jobs, stop the daemons we started, restore slurm.conf. Idempotent."""
        if self._stopped:
            return
        self._stopped = True
        with contextlib.suppress(Exception):
            atexit.unregister(self.stop)
        if self._lock_fd is None:
            # never owned the cluster (e.g. gave up waiting for another session's lock): the
            # config, key and state file belong to whoever holds the lock; touch nothing
            return
        names = {d.name for d in self._daemons if d.alive()}
        if {"slurmctld", "slurmd"} <= names:
            self.cancel_all()
        for name in ("slurmd", "slurmctld", "munged"):
            for daemon in self._daemons:
                if daemon.name == name:
                    daemon.stop()
        if self._conf_written or (SLURM_CONF.exists() and _conf_is_ours()):
            _restore_conf()
        if self._created_key:
            with contextlib.suppress(OSError):
                MUNGE_KEY.unlink()
        with contextlib.suppress(OSError):
            STATE_FILE.unlink()
        if self._lock_fd is not None:
            os.close(self._lock_fd)  # releases the flock
            self._lock_fd = None

    # -- jobs

    def cancel_all(self, timeout: float = 20) -> None:
        """Cancel every job of the cluster and wait until the queue is empty."""
        with contextlib.suppress(Exception):
            ids = _run(["squeue", "-h", "-o", "%i"], timeout=10).stdout.split()
            if ids:
                _run(["scancel", *ids], timeout=10)
            deadline = time.monotonic() + timeout
            while time.monotonic() < deadline:
                if not _run(["squeue", "-h", "-o", "%i"], timeout=10).stdout.split():
                    break
                time.sleep(0.5)

    def jobcomp_records(self) -> list[dict[str, str]]:
        """Finished jobs as written by jobcomp/filetxt (JobId, Name, JobState, ...)."""
        try:
            text = self.jobcomp_file.read_text(errors="replace")
        except OSError:
            return []
        return [_parse_jobcomp_line(line) for line in text.splitlines() if line.strip()]

    def queue_records(self) -> list[dict[str, str]]:
        """Jobs slurmctld still knows (pending, running, or finished < MinJobAge ago)."""
        out = _run(["squeue", "-h", "--states=all", "-o", "%i|%T|%j"], timeout=10).stdout
        records = []
        for line in out.splitlines():
            job_id, _, rest = line.partition("|")
            state, _, name = rest.partition("|")
            if job_id.strip():
                records.append({"JobId": job_id.strip(), "JobState": state, "Name": name})
        return records

    def submissions(self, name_substring: str = "") -> list[dict[str, str]]:
        """All jobs submitted to this cluster whose name contains ``name_substring``: finished
        ones from the jobcomp file, the others from squeue; one dict per job id (keys JobId,
        Name, JobState and, for finished jobs, the other jobcomp fields)."""
        by_id: dict[str, dict[str, str]] = {}
        with contextlib.suppress(Exception):
            for rec in self.queue_records():
                by_id[rec["JobId"]] = rec
        for rec in self.jobcomp_records():
            if "JobId" in rec:
                by_id[rec["JobId"]] = rec
        jobs = [r for r in by_id.values() if name_substring in r.get("Name", "")]
        return sorted(jobs, key=lambda r: int(r["JobId"]) if r["JobId"].isdigit() else 0)

    def job_state(self, job_id: str | int) -> str | None:
        """State of a job (e.g. PENDING, RUNNING, COMPLETED, TIMEOUT), None if unknown."""
        job_id = str(job_id)
        for rec in self.jobcomp_records():
            if rec.get("JobId") == job_id:
                return rec.get("JobState")
        out = _run(["squeue", "-h", "--states=all", "-j", job_id, "-o", "%T"], timeout=10)
        state = out.stdout.strip()
        return state or None

    def wait_job(self, job_id: str | int, timeout: float = 120) -> str:
        """Wait until a job has finished; returns its final state."""
        final = {
            "COMPLETED",
            "FAILED",
            "CANCELLED",
            "TIMEOUT",
            "NODE_FAIL",
            "OUT_OF_MEMORY",
            "PREEMPTED",
            "BOOT_FAIL",
            "DEADLINE",
        }
        deadline = time.monotonic() + timeout
        state = None
        while time.monotonic() < deadline:
            state = self.job_state(job_id)
            if state and state.split()[0] in final:
                return state.split()[0]
            time.sleep(1)
        raise TimeoutError(f"job {job_id} not finished after {timeout:.0f} s (state {state})")


def _mem_total_mb() -> int:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                return int(line.split()[1]) // 1024
    except OSError:
        pass
    return 1024


def _munge_answers() -> bool:
    if not MUNGE_SOCKET.exists():
        return False
    try:
        cred = subprocess.run(
            ["munge", "-n"], capture_output=True, timeout=5, stdin=subprocess.DEVNULL
        )
        if cred.returncode != 0:
            return False
        check = subprocess.run(["unmunge"], input=cred.stdout, capture_output=True, timeout=5)
    except (OSError, subprocess.SubprocessError):
        return False
    return check.returncode == 0


def _restore_conf() -> None:
    """Put back the slurm.conf that was there before the tests (or remove ours)."""
    if SLURM_CONF_BACKUP.exists():
        os.replace(SLURM_CONF_BACKUP, SLURM_CONF)
    elif _conf_is_ours():
        with contextlib.suppress(OSError):
            SLURM_CONF.unlink()


def _cleanup_stale_run() -> None:
    """A previous session crashed (its state file is left and we hold the lock): stop its
    daemons (only if their recorded start time still matches) and restore slurm.conf."""
    if STATE_FILE.exists():
        try:
            state = json.loads(STATE_FILE.read_text())
        except (OSError, ValueError):
            state = {}
        for rec in reversed(state.get("daemons", [])):
            pid, start = rec.get("pid"), rec.get("start_time")
            if isinstance(pid, int) and start and _start_time(pid) == start:
                _stop_session(pid, start, 5.0)
        if state.get("created_key"):
            with contextlib.suppress(OSError):
                MUNGE_KEY.unlink()
        with contextlib.suppress(OSError):
            STATE_FILE.unlink()
    if SLURM_CONF.exists() and _conf_is_ours():
        _restore_conf()


# ---------------------------------------------------------------------------- sshd


class Sshd:
    """A second sshd on 127.0.0.1 with its own host key, client key and known_hosts."""

    user = "root"
    host = "127.0.0.1"

    def __init__(self, tmp: Path):
        self.tmp = Path(tmp)
        self.port = 0
        self.host_key = self.tmp / "ssh_host_ed25519_key"
        self.key_file = self.tmp / "id_ed25519"
        self.authorized_keys = self.tmp / "authorized_keys"
        self.known_hosts = self.tmp / "known_hosts"
        self.config = self.tmp / "sshd_config"
        self.log = self.tmp / "sshd.log"
        self._daemon: _Daemon | None = None
        self.startup_seconds: float | None = None

    @classmethod
    def start(cls, tmp: Path) -> Sshd:
        reason = sshd_skip_reason()
        if reason:
            raise ClusterUnavailable(reason)
        server = cls(tmp)
        try:
            server._start()
        except BaseException:
            server.stop()
            raise
        atexit.register(server.stop)
        return server

    def __enter__(self) -> Sshd:
        return self

    def __exit__(self, *exc) -> None:
        self.stop()

    def _keygen(self, path: Path, comment: str) -> None:
        for p in (path, path.with_name(path.name + ".pub")):
            p.unlink(missing_ok=True)
        _run(
            ["ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-C", comment, "-f", str(path)],
            check=True,
        )

    def _start(self) -> None:
        t0 = time.monotonic()
        self.tmp.mkdir(parents=True, exist_ok=True)
        self._keygen(self.host_key, "ionwell-test-host")
        self._keygen(self.key_file, "ionwell-test-client")
        self.authorized_keys.write_text(self.key_file.with_name("id_ed25519.pub").read_text())
        os.chmod(self.authorized_keys, 0o600)
        Path("/run/sshd").mkdir(mode=0o755, exist_ok=True)
        last_error = ""
        for _ in range(3):
            self.port = _free_port()
            self.config.write_text(self._config_text())
            check = _run([SSHD, "-t", "-f", str(self.config)])
            if check.returncode != 0:
                raise ClusterUnavailable(f"sshd rejects its test config: {check.stderr.strip()}")
            self._daemon = _Daemon("sshd", [SSHD, "-D", "-e", "-f", str(self.config)], self.log)
            deadline = time.monotonic() + 15
            while time.monotonic() < deadline and self._daemon.alive():
                if _port_open(self.port):
                    host_pub = self.host_key.with_name(self.host_key.name + ".pub").read_text()
                    kind, blob = host_pub.split()[:2]
                    self.known_hosts.write_text(f"[{self.host}]:{self.port} {kind} {blob}\n")
                    self.startup_seconds = time.monotonic() - t0
                    return
                time.sleep(0.1)
            last_error = _tail(self.log)
            self._daemon.stop()
            self._daemon = None
        raise ClusterUnavailable(f"sshd did not start on 127.0.0.1:\n{last_error}")

    def _config_text(self) -> str:
        return f"""# ionwell test sshd
Port {self.port}
ListenAddress {self.host}
HostKey {self.host_key}
PidFile {self.tmp / "sshd.pid"}
PermitRootLogin prohibit-password
PasswordAuthentication no
KbdInteractiveAuthentication no
PubkeyAuthentication yes
AuthorizedKeysFile {self.authorized_keys}
StrictModes no
UsePAM no
UseDNS no
X11Forwarding no
PrintMotd no
Subsystem sftp internal-sftp
"""

    def connect(self, known_hosts: Path | None = None, timeout: float = 10):
        """A connected ``paramiko.SSHClient`` (RejectPolicy, our known_hosts, our key)."""
        import paramiko

        client = paramiko.SSHClient()
        client.load_host_keys(str(known_hosts or self.known_hosts))
        client.set_missing_host_key_policy(paramiko.RejectPolicy())
        try:
            client.connect(
                self.host,
                port=self.port,
                username=self.user,
                key_filename=str(self.key_file),
                look_for_keys=False,
                allow_agent=False,
                timeout=timeout,
            )
        except BaseException:
            client.close()
            raise
        return client

    def stop(self) -> None:
        with contextlib.suppress(Exception):
            atexit.unregister(self.stop)
        if self._daemon is not None:
            self._daemon.stop()
            self._daemon = None
