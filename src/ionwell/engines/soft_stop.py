"""Graceful stop before the walltime: the scheduler's warning signal becomes the external
program's own soft stop.

A compute job asks its scheduler for :data:`STOP_SIGNAL` (SIGUSR1) some seconds before its time
limit (``resources.compute.stop_before``; SLURM ``--signal=USR1@<seconds>``, see
:func:`ionwell.workflow.resources.step_resources`). SLURM sends it to every process of the job's steps:
the Snakemake process that runs the ``compute`` body (the SLURM executor starts it with
``srun``, as step 0 of the job) and the program it started. Then:

- the Python process does not die of it (an unhandled SIGUSR1 ends a process): :func:`arm`
  installs :func:`_on_signal` when the workflow is parsed in a scheduler job (Python installs
  signal handlers only from the main thread, and Snakemake runs a rule body in a worker thread;
  :func:`listening` installs it itself when the body runs in the main thread, and restores the
  previous handler afterwards). The handler only records the request and logs it;
- the program ignores the signal (:func:`child_ignores_stop_signal`, run in the child before
  ``exec``; an ignored signal stays ignored across ``exec``), so it is not killed by it;
- the launcher, which polls the program, sees the request and creates the program's soft-stop
  file(s) in its working folder (the definition's ``soft_stop.files``: ``<prefix>.EXIT`` for
  Quantum ESPRESSO, ``EXIT`` for CP2K), the program's own documented way to stop cleanly and
  write its restart files; when it has stopped,
  :class:`ionwell.engines.launcher.SoftStopped` is raised, so the attempt
  is recorded as not finished (``error.json``, a ``stopped`` event, no ``computed`` marker, no
  ledger record) and the job exits non-zero;
- Snakemake retries the job (``retries`` in the profile) with ``walltime_factor`` times more
  time, and the engine continues from the restart files (``restart.keep``).

A program without ``soft_stop`` and the in-process engines (PySCF, tblite, ASE calculators)
only log the request: they run on until the scheduler ends the job, which is retried the same
way (the embedded engine writes its SCF checkpoint as it goes; nothing recorded is lost, because
a step counts as finished only once its ledger record is appended).

Caution, ``launcher.kind: srun``: the program then runs in a job step of its own, which SLURM
signals too, directly, so the ignore set here does not reach it and a program without its own
SIGUSR1 handler dies of it (QE stops cleanly on it only when built with
``-D__TERMINATE_GRACEFULLY``); there, set ``stop_before: 0`` or start the program with
``mpirun`` (``launcher.kind: mpi``).

SLURM may send the signal up to 60 seconds before the time asked for (sbatch(1), ``--signal``):
with a first attempt of about two minutes or less it can arrive while the job step is still
starting, before :func:`arm` has run, and then ends the attempt (measured on the test cluster:
2.5 s into the step, 30 s asked before a one-minute limit). Nothing is recorded by such an
attempt; the retry, with ``walltime_factor`` more time, follows.

PBS has no such option in ``qsub`` (a PBS server sends SIGTERM at the limit and SIGKILL
``kill_delay`` seconds later), and there Snakemake's job script runs the body in the batch shell,
which would die of SIGUSR1: the graceful stop is SLURM-only. Remote mode's job script does not
ask for the signal either.
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import threading
import time
from collections.abc import Iterator

__all__ = [
    "STOP_SIGNAL",
    "arm",
    "child_ignores_stop_signal",
    "clear",
    "listening",
    "request",
    "requested",
]

log = logging.getLogger(__name__)

#: The signal a compute job asks its scheduler for before the time limit.
STOP_SIGNAL = signal.SIGUSR1

_lock = threading.Lock()
_requested_at: float | None = None  # time.monotonic() of the request, s


def request() -> None:
    """Record a stop request (what the signal handler does; tests may call it directly)."""
    global _requested_at
    with _lock:
        if _requested_at is None:
            _requested_at = time.monotonic()


def requested() -> float | None:
    """``time.monotonic()`` of the stop request (s), or None when there was none."""
    with _lock:
        return _requested_at


def clear() -> None:
    """Forget a stop request (at the end of a compute, so a later one starts clean)."""
    global _requested_at
    with _lock:
        _requested_at = None


def _on_signal(signum: int, frame: object) -> None:
    """The handler: record the request and say so; never raises, never ends the process."""
    first = requested() is None
    request()
    if first:
        log.warning(
            "received %s: the job's time limit is near; a running external program with a "
            "soft stop is asked to stop and write its restart files (in-process engines run "
            "on until the scheduler ends the job)",
            signal.Signals(signum).name,
        )


def _in_scheduler_job() -> bool:
    return bool(os.environ.get("SLURM_JOB_ID") or os.environ.get("PBS_JOBID"))


def arm() -> bool:
    """Install the handler of :data:`STOP_SIGNAL` in this process when it runs inside a
    scheduler job (``SLURM_JOB_ID`` or ``PBS_JOBID`` set), from the main thread, and the signal
    still has its default action (which would end the process). Called when the workflow is
    parsed (Snakemake parses it in the main thread of every job process). Returns whether the
    handler is installed now."""
    if not _in_scheduler_job() or threading.current_thread() is not threading.main_thread():
        return False
    current = signal.getsignal(STOP_SIGNAL)
    if current is _on_signal:
        return True
    if current not in (signal.SIG_DFL, None):
        return False  # somebody else handles it: leave theirs
    signal.signal(STOP_SIGNAL, _on_signal)
    log.debug("armed: %s asks a running program to stop cleanly", STOP_SIGNAL.name)
    return True


@contextlib.contextmanager
def listening() -> Iterator[None]:
    """The compute body: a stop request made while it runs is acted on by the launcher.

    From the main thread the handler is installed here and the previous one restored on the
    way out; from a worker thread (Snakemake's rule bodies) the handler installed by :func:`arm`
    serves. A request is forgotten at the end, so one compute's signal never stops the next.
    """
    previous = None
    installed = False
    if threading.current_thread() is threading.main_thread():
        previous = signal.getsignal(STOP_SIGNAL)
        if previous is not _on_signal:
            signal.signal(STOP_SIGNAL, _on_signal)
            installed = True
    elif _in_scheduler_job() and signal.getsignal(STOP_SIGNAL) is not _on_signal:
        log.warning(
            "%s has no handler in this job process (the workflow did not arm it): the signal "
            "before the time limit would end the job instead of stopping the program cleanly",
            STOP_SIGNAL.name,
        )
    try:
        yield
    finally:
        if installed:
            signal.signal(STOP_SIGNAL, previous if previous is not None else signal.SIG_DFL)
        clear()


def child_ignores_stop_signal() -> None:  # pragma: no cover - runs in the child before exec
    """In a program's process before ``exec``: ignore :data:`STOP_SIGNAL` (inherited across
    ``exec``), so the scheduler's warning, sent to every process of the job step, does not kill
    it; the launcher stops it through its soft-stop file instead."""
    signal.signal(STOP_SIGNAL, signal.SIG_IGN)
