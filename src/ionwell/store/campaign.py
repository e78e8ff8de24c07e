"""A campaign folder on disk: layout, atomic publication, the frozen config, the controller lock.

Layout (see DESIGN.md)::

    campaigns/<name>/
      campaign.yaml       validated config as run (frozen)
      host.extxyz         the pristine host
      steps/0007/         one folder per step; status.json is published last
      ledger.jsonl        one hash-chained record per finished step
      ionwell.db          ASE database mirror of the ledger
      events.jsonl        append-only log of step attempts (audit aid, not a record)

Every file a step hands on is written under a temporary name, flushed, and renamed into place.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import socket
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar

from ionwell.config.campaign import Campaign, config_diff, dump_campaign, load_campaign
from ionwell.errors import ConfigError, LockError, naming_file
from ionwell.store.paths import step_label

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class CampaignPaths:
    """Where each part of a campaign lives. ``root`` is ``campaigns/<name>``."""

    root: Path

    @property
    def config(self) -> Path:
        return self.root / "campaign.yaml"

    @property
    def host(self) -> Path:
        return self.root / "host.extxyz"

    @property
    def ledger(self) -> Path:
        return self.root / "ledger.jsonl"

    @property
    def database(self) -> Path:
        return self.root / "ionwell.db"

    @property
    def events(self) -> Path:
        return self.root / "events.jsonl"

    @property
    def summary(self) -> Path:
        return self.root / "summary.json"

    @property
    def trajectory(self) -> Path:
        return self.root / "trajectory.extxyz"

    @property
    def lock(self) -> Path:
        return self.root / "controller.lock"

    @property
    def log(self) -> Path:
        return self.root / "ionwell.log"

    @property
    def steps(self) -> Path:
        return self.root / "steps"

    def step(self, n: int) -> Path:
        return self.steps / step_label(n)


# ---------------------------------------------------------------------------------------------
# atomic publication


def fsync_dir(path: Path) -> None:
    """fsync a folder (a rename or a new file in it is durable afterwards); errors ignored."""
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _default_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


_FILE_MODE = _default_mode()


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see either the old file or the whole new one."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with naming_file(path):
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp makes the file private (0600); give it the mode a plain open() would
        os.fchmod(fd, _FILE_MODE)
        with naming_file(path), os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    fsync_dir(path.parent)


def atomic_write_text(path: Path, text: str) -> None:
    """Text variant of :func:`atomic_write_bytes` (UTF-8)."""
    atomic_write_bytes(path, text.encode())


def atomic_write_json(path: Path, obj: object) -> None:
    """Write JSON (sorted keys, indented) atomically."""
    atomic_write_text(path, json.dumps(obj, indent=2, sort_keys=True) + "\n")


def atomic_write_extxyz(path: Path, atoms) -> None:
    """Write one structure (ASE ``Atoms``) or a list of frames as extended XYZ, atomically."""
    from ase.io import write

    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    write(tmp, atoms, format="extxyz")
    atomic_publish(tmp, path)


def atomic_publish(tmp: Path, path: Path) -> None:
    """Flush an already written temporary file and rename it onto ``path``."""
    fd = os.open(tmp, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(tmp, path)
    fsync_dir(path.parent)


def append_event(paths: CampaignPaths, **fields: object) -> None:
    """Append one line to ``events.jsonl`` (time, pid, host added)."""
    rec = {"time": time.time(), "pid": os.getpid(), "host": socket.gethostname(), **fields}
    paths.root.mkdir(parents=True, exist_ok=True)
    with naming_file(paths.events), open(paths.events, "a") as fh:
        fh.write(json.dumps(rec, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


# ---------------------------------------------------------------------------------------------
# the frozen config


def check_frozen(paths: CampaignPaths, campaign: Campaign) -> bool:
    """Read-only: True when the campaign is frozen with exactly this config, False when it is
    not frozen yet. Raises :class:`ConfigError` with the difference when it is frozen with
    another config."""
    if not paths.config.exists():
        return False
    frozen = load_frozen(paths)
    if frozen != campaign:
        raise ConfigError(
            f"{paths.config}: campaign '{campaign.name}' already exists with another "
            "configuration; refusing to continue it with a changed config. Give the new "
            "config another name to start a new campaign. Differences:\n"
            + config_diff(frozen, campaign)
        )
    return True


def freeze_or_check(paths: CampaignPaths, campaign: Campaign) -> bool:
    """Freeze ``campaign`` into the folder, or check it equals the frozen one.

    Returns True when the config was frozen now (a new campaign). Raises :class:`ConfigError`
    with the difference when the campaign exists with another config.
    """
    if check_frozen(paths, campaign):
        return False
    atomic_write_text(paths.config, dump_campaign(campaign))
    return True


def load_frozen(paths: CampaignPaths) -> Campaign:
    """The campaign config as frozen in the folder."""
    if not paths.config.exists():
        raise ConfigError(f"{paths.root}: not a campaign folder (no campaign.yaml)")
    return load_campaign(paths.config)


# ---------------------------------------------------------------------------------------------
# controller lock


def _process_start_time(pid: int) -> str | None:
    """Kernel start time of ``pid`` (clock ticks since boot), or None if no such process."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    # field 22, after the parenthesised command name (which may contain spaces)
    return stat.rsplit(")", 1)[1].split()[19]


def _group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@dataclass
class ControllerLock:
    """One controller per campaign: a lock file holding host, pid, process start time, group.

    A previous controller is *provably gone* when it ran on this host and its pid no longer
    exists with the recorded start time. Its leftover process group (spawned jobs) is then
    ended before the new controller starts. A lock file that is empty or unreadable (a
    controller killed between creating and writing it) is stale once it is older than
    :attr:`EMPTY_GRACE` seconds; younger, it may belong to a controller starting right now.

    The holder calls :meth:`heartbeat` now and then; :meth:`heartbeat_age` tells anyone who
    sees the folder (a compute job on another host) how long ago that was.
    """

    path: Path

    #: seconds an empty or unreadable lock file is left to the controller that created it
    EMPTY_GRACE: ClassVar[float] = 5.0

    def read(self) -> dict | None:
        try:
            info = json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None
        return info if isinstance(info, dict) else None

    def heartbeat(self) -> bool:
        """Touch the lock file (its mtime) when this process holds it. True when touched."""
        info = self.read()
        if not info or info.get("pid") != os.getpid() or info.get("host") != socket.gethostname():
            return False
        try:
            os.utime(self.path)
        except OSError:
            return False
        return True

    @staticmethod
    def heartbeat_age(info_path: Path) -> float | None:
        """Seconds since the lock file was last written or touched; None when there is none.

        Compares the file's mtime with this machine's clock: on a shared file system, clock
        skew between hosts adds to (or, clipped at 0, hides) the age.
        """
        try:
            mtime = os.stat(info_path).st_mtime
        except OSError:
            return None
        return max(0.0, time.time() - mtime)

    def _clear_unreadable(self) -> bool:
        """Remove an empty/unreadable lock file once it is older than the grace period.

        True when removed; False when it changed or vanished meanwhile (try again). Raises
        :class:`LockError` while it is younger than :attr:`EMPTY_GRACE`.
        """
        try:
            st = self.path.stat()
        except FileNotFoundError:
            return False
        what = "empty" if st.st_size == 0 else "unreadable"
        age = time.time() - st.st_mtime
        if age < self.EMPTY_GRACE:
            raise LockError(
                f"{self.path}: the lock file is {what} and was written {max(age, 0.0):.1f} s ago: "
                "a controller may be starting this campaign right now. Try again in a few "
                f"seconds; an {what} lock older than {self.EMPTY_GRACE:g} s is cleared as stale."
            )
        # remove only the file examined, not a lock another controller has just taken
        try:
            now = self.path.stat()
        except FileNotFoundError:
            return False
        same = (now.st_ino, now.st_size, now.st_mtime_ns) == (st.st_ino, st.st_size, st.st_mtime_ns)
        if not same or self.read() is not None:
            return False
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()
        log.warning(
            "%s: cleared an %s lock file last written %.0f s ago (a controller killed while "
            "taking the lock); taking the lock",
            self.path,
            what,
            age,
        )
        return True

    def holder_alive(self, info: dict) -> bool | None:
        """True/False for a holder on this host; None when it is on another host."""
        if info.get("host") != socket.gethostname():
            return None
        start = _process_start_time(int(info.get("pid", -1)))
        return start is not None and start == info.get("start")

    def acquire(self) -> bool:
        """Take the lock. Returns True when a stale lock of a dead controller was cleared."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        pid = os.getpid()
        mine = {
            "host": socket.gethostname(),
            "pid": pid,
            # the group is ours to clean up only when we lead it
            "pgid": pid if os.getpgid(pid) == pid else None,
            "start": _process_start_time(pid),
            "since": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        }
        stale = False
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                info = self.read()
                if info is None:
                    stale = self._clear_unreadable() or stale
                    continue
                alive = self.holder_alive(info)
                if alive is None:
                    age = self.heartbeat_age(self.path)
                    beat = "" if age is None else f", last heartbeat {age:.0f} s ago"
                    raise LockError(
                        f"{self.path}: campaign is held by a controller on host "
                        f"{info.get('host')!r} (pid {info.get('pid')}, since {info.get('since')}"
                        f"{beat}); cannot prove it is gone from here. Remove the lock file by "
                        "hand once it is."
                    ) from None
                if alive:
                    raise LockError(
                        f"{self.path}: another controller is running this campaign "
                        f"(pid {info.get('pid')}, since {info.get('since')})"
                    ) from None
                self._end_leftovers(info)
                with contextlib.suppress(FileNotFoundError):
                    self.path.unlink()
                stale = True
                continue
            try:
                with naming_file(self.path), os.fdopen(fd, "w") as fh:
                    json.dump(mine, fh)
                    fh.flush()
                    os.fsync(fh.fileno())
            except OSError:  # e.g. a full disk: leave no empty lock behind
                with contextlib.suppress(OSError):
                    self.path.unlink()
                raise
            return stale
        raise LockError(f"{self.path}: could not take the controller lock")

    @staticmethod
    def _end_leftovers(info: dict) -> None:
        """End what is left of a dead controller's process group (its spawned step jobs)."""
        pgid = info.get("pgid")
        if not isinstance(pgid, int) or pgid <= 1 or pgid == os.getpgid(0):
            return
        for sig, wait in ((15, 5.0), (9, 5.0)):
            if not _group_alive(pgid):
                return
            with contextlib.suppress(ProcessLookupError, PermissionError):
                os.killpg(pgid, sig)
            deadline = time.monotonic() + wait
            while time.monotonic() < deadline and _group_alive(pgid):
                time.sleep(0.1)

    def record_jobs_group(self, pgid: int) -> None:
        """Note the process group of the jobs this controller started (ended if it dies)."""
        info = self.read()
        if info and info.get("pid") == os.getpid():
            info["pgid"] = pgid
            atomic_write_text(self.path, json.dumps(info))

    def release(self) -> None:
        info = self.read()
        if info and info.get("pid") == os.getpid():
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()


def controller_state(paths: CampaignPaths) -> str | None:
    """Human description of a live controller holding the campaign, or None."""
    lock = ControllerLock(paths.lock)
    info = lock.read()
    if not info:
        return None
    alive = lock.holder_alive(info)
    if alive is False:
        return None
    where = "" if alive else f" on {info.get('host')}"
    return f"controller pid {info.get('pid')}{where} since {info.get('since')}"
