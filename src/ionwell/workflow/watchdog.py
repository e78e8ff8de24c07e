"""A cluster job's watch on its controller: end the job when the controller is gone for good.

The controller (``ionwell run``) holds ``controller.lock`` and touches it every
:data:`HEARTBEAT` seconds. A compute job started on a cluster node reads the lock when it starts
and checks it every :data:`INTERVAL` seconds; it ends itself (exit status 3, after a log line
saying why) when the lock is removed, when another controller holds it (the new controller has
its own job for the step), or when the lock has not been touched for :data:`STALE_AFTER` seconds
(the controller was killed and nobody resumed the campaign). A job started without a controller
lock (plain ``snakemake``) is not watched.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import threading
import time
from collections.abc import Iterator
from pathlib import Path

log = logging.getLogger(__name__)

#: seconds between the controller's touches of its lock
HEARTBEAT = float(os.environ.get("IONWELL_HEARTBEAT", "60"))
#: seconds between the job's looks at the lock
INTERVAL = float(os.environ.get("IONWELL_WATCH_INTERVAL", "30"))
#: a lock untouched this long belongs to a controller that is gone
STALE_AFTER = float(os.environ.get("IONWELL_STALE_AFTER", str(10 * HEARTBEAT)))

EXIT_ORPHANED = 3


def _identity(lock: Path) -> tuple | None:
    try:
        info = json.loads(lock.read_text())
    except (OSError, ValueError):
        return None
    if not isinstance(info, dict):
        return None
    return (info.get("host"), info.get("pid"), info.get("start"))


def orphaned(lock: Path, identity: tuple, stale_after: float = STALE_AFTER) -> str | None:
    """Why the job's controller is gone for good, or None while it may still be there."""
    try:
        age = time.time() - lock.stat().st_mtime
    except FileNotFoundError:
        return f"{lock} was removed: the controller that started this job has ended"
    now = _identity(lock)
    if now is not None and now != identity:
        return f"{lock} is held by another controller (pid {now[1]} on {now[0]}), which runs its own job"
    if age > stale_after:
        return f"{lock} has not been touched for {age:.0f} s: the controller is gone"
    return None


@contextlib.contextmanager
def watch(
    lock: Path, interval: float = INTERVAL, stale_after: float = STALE_AFTER
) -> Iterator[None]:
    """Watch ``lock`` while the body runs; exit the process when the controller is gone."""
    identity = _identity(Path(lock))
    if identity is None:  # no controller (plain snakemake): nothing to watch
        yield
        return
    done = threading.Event()

    def _loop() -> None:
        while not done.wait(interval):
            why = orphaned(Path(lock), identity, stale_after)
            if why is not None:
                log.error("ending this compute job: %s", why)
                logging.shutdown()
                os._exit(EXIT_ORPHANED)

    t = threading.Thread(target=_loop, name="ionwell-watchdog", daemon=True)
    t.start()
    try:
        yield
    finally:
        done.set()
