"""Start an external program for a step: launcher prefix, modules, environment, scratch folder.

The engine says *what* to run (an argv list, never a shell string); the launcher says *how* on
this machine (:class:`~ionwell.config.campaign.LauncherConfig`). :func:`command_line` is the pure part;
:func:`run_program` runs it and waits.

The program runs in the job's process group (a controller that ends the group ends it too) and
receives SIGKILL if the step job itself dies (Linux ``PR_SET_PDEATHSIG``), so no orphaned
program keeps computing a step another attempt is redoing. It ignores the scheduler's warning
signal before the time limit; when that signal has come, :func:`run_program` creates the
program's soft-stop files instead, and raises :class:`SoftStopped` once the program has stopped
(:mod:`ionwell.engines.soft_stop`).
"""

from __future__ import annotations

import contextlib
import ctypes
import logging
import os
import shutil
import signal
import subprocess
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from string import Template

from ionwell.config.engines import LauncherConfig
from ionwell.engines import soft_stop
from ionwell.errors import ConfigError, IonwellError

__all__ = [
    "EngineRunError",
    "ScfNotConverged",
    "SoftStopped",
    "command_line",
    "die_with_parent",
    "fill",
    "run_program",
]

log = logging.getLogger("ionwell.engines.launcher")

#: The shell snippet that loads modules then execs the program; the module names and the argv
#: are passed as positional arguments, never spliced into the snippet.
_MODULES = 'n=$1; shift; module load "${@:1:$n}" || exit 127; shift "$n"; exec "$@"'


class EngineRunError(IonwellError):
    """The external program could not be started, was killed, or exited with an error."""


class ScfNotConverged(EngineRunError):
    """The program stopped because its SCF did not converge (its output says so): the SCF
    remedies retry it at the same structure; it is not a failure of the machine. ``warm``: the
    attempt had restart files in place (the retry then starts from the program's own guess).
    Raised out of :func:`ionwell.engines.run.run_engine` after the last remedy, it fails the
    same way on every try: the step job is not retried (kind ``scf``)."""

    retryable = False
    final_kind = "scf"

    def __init__(self, message: str, warm: bool = False) -> None:
        super().__init__(message)
        self.warm = warm


class SoftStopped(EngineRunError):
    """The program was asked to stop before the job's time limit (its soft-stop file) and has
    stopped: the attempt is not finished, whatever its output says; its restart files are in
    the engine folder, and the retry continues from them."""


def die_with_parent() -> None:  # pragma: no cover - runs in the child before exec
    """Ask Linux to SIGKILL this (child) process when its parent dies."""
    try:
        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except OSError:
        pass


def _child_setup() -> None:  # pragma: no cover - runs in the child before exec
    """The program's process before ``exec``: dies with its parent, and ignores the
    scheduler's warning signal (the launcher stops it through its soft-stop files)."""
    die_with_parent()
    soft_stop.child_ignores_stop_signal()


def _remove(rundir: Path, names: Sequence[str]) -> None:
    for name in names:
        with contextlib.suppress(FileNotFoundError):
            (rundir / name).unlink()


def fill(text: str, values: Mapping[str, object], where: str) -> str:
    """``text`` with its ``${name}`` placeholders replaced; ConfigError names ``where``."""
    try:
        return Template(text).substitute({k: str(v) for k, v in values.items()})
    except KeyError as err:
        known = ", ".join(sorted(values))
        raise ConfigError(
            f"{where}: unknown placeholder ${{{err.args[0]}}} (known: {known})"
        ) from None
    except ValueError as err:
        raise ConfigError(
            f"{where}: malformed placeholder ({err}); write $$ for a dollar sign"
        ) from None


def command_line(argv: list[str], cfg: LauncherConfig, values: Mapping[str, object]) -> list[str]:
    """The full argv: launcher prefix, then the program's argv (placeholders filled)."""
    values = {"tasks": cfg.tasks, "threads": cfg.threads, **values}
    prefix: list[str] = []
    if cfg.kind == "mpi":
        prefix = [fill(a, values, "launcher.mpi_prefix") for a in cfg.mpi_prefix]
    elif cfg.kind == "srun":
        prefix = [fill(a, values, "launcher.srun_prefix") for a in cfg.srun_prefix]
    full = prefix + [fill(a, values, "engine.argv") for a in argv]
    if cfg.modules:
        full = ["bash", "-lc", _MODULES, "ionwell-launch", str(len(cfg.modules))]
        full += list(cfg.modules) + prefix + [fill(a, values, "engine.argv") for a in argv]
    return full


def _copy_back(src: Path, dst: Path) -> None:
    for p in src.rglob("*"):
        if p.is_file():
            target = dst / p.relative_to(src)
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(p, target)


def _wait(
    child: subprocess.Popen,
    timeout: float | None,
    soft_stop_files: Sequence[str],
    rundir: Path,
    program: str,
    poll: float,
) -> tuple[int, float | None]:
    """Wait for ``child`` (``timeout`` s at most, then ``TimeoutExpired``); with
    ``soft_stop_files``, create them once a stop request has come. Returns (exit status,
    ``time.monotonic()`` when the files were created or None)."""
    if not soft_stop_files:
        return child.wait(timeout=timeout), None
    deadline = None if timeout is None else time.monotonic() + timeout
    sent: float | None = None
    while True:
        left = None if deadline is None else deadline - time.monotonic()
        if left is not None and left <= 0:
            raise subprocess.TimeoutExpired(child.args, timeout or 0.0)
        try:
            return child.wait(timeout=poll if left is None else min(poll, left)), sent
        except subprocess.TimeoutExpired:
            pass
        if sent is None and soft_stop.requested() is not None:
            for name in soft_stop_files:
                (rundir / name).touch()
            sent = time.monotonic()
            log.warning(
                "asked %s to stop cleanly before the job's time limit: created %s in %s",
                program, ", ".join(soft_stop_files), rundir,
            )  # fmt: skip


def run_program(
    argv: list[str],
    workdir: Path,
    cfg: LauncherConfig,
    *,
    stdout: str | None,
    timeout: float | None = None,
    step: int | None = None,
    values: Mapping[str, object] | None = None,
    soft_stop_files: Sequence[str] = (),
    poll: float = 0.5,
) -> float:
    """Run ``argv`` through the launcher in ``workdir`` (or its scratch copy); returns seconds.

    ``soft_stop_files`` (names relative to the folder the program runs in) are created when a
    stop request comes while the program runs (:mod:`ionwell.engines.soft_stop`; checked every
    ``poll`` seconds): the program's own way of stopping cleanly with its restart files written.
    Stale ones are removed before the start and all of them after the end, so a retry runs on.

    Raises:
        SoftStopped: a stop request came, the soft-stop files were created and the program has
            stopped (whatever its exit status): the attempt is not finished.
        EngineRunError: the program is missing, timed out, was killed, or exited non-zero; the
            message names the step, the program, and the last lines of its output.
    """
    workdir = Path(workdir)
    where = f"step {step}: " if step is not None else ""
    full = command_line(argv, cfg, values or {})
    env = dict(os.environ)
    # the configured thread count wins over one inherited from the shell (login scripts on
    # clusters often export OMP_NUM_THREADS=1); launcher.env can still set it explicitly
    env["OMP_NUM_THREADS"] = str(cfg.threads)
    env.update({k: str(v) for k, v in cfg.env.items()})
    rundir = workdir
    if cfg.scratch:
        base = Path(os.path.expandvars(cfg.scratch)).expanduser()
        rundir = base / f"ionwell-{os.getpid()}-{workdir.parent.name}"
        shutil.rmtree(rundir, ignore_errors=True)
        shutil.copytree(workdir, rundir)
    soft_stop_files = list(soft_stop_files)
    _remove(rundir, soft_stop_files)
    if soft_stop_files and soft_stop.requested() is not None:
        raise SoftStopped(
            f"{where}{argv[0]} not started: the job was asked to stop before its time limit "
            f"({soft_stop.STOP_SIGNAL.name}); the retry starts it"
        )
    log.info("%srunning %s in %s", where, " ".join(full), rundir)
    out_path = (rundir / stdout) if stdout else None
    t0 = time.monotonic()
    stop_sent: float | None = None  # time.monotonic() when the soft-stop files were created
    try:
        with open(out_path, "wb") if out_path else open(os.devnull, "wb") as out:
            try:
                child = subprocess.Popen(
                    full,
                    cwd=rundir,
                    env=env,
                    stdin=subprocess.DEVNULL,
                    stdout=out,
                    stderr=subprocess.STDOUT,
                    preexec_fn=_child_setup,
                )
            except FileNotFoundError:
                raise EngineRunError(
                    f"{where}cannot start {full[0]!r}: not found on PATH (is the program "
                    "installed, or its module loaded?)"
                ) from None
            except PermissionError:
                raise EngineRunError(
                    f"{where}cannot start {full[0]!r}: permission denied"
                ) from None
            try:
                code, stop_sent = _wait(child, timeout, soft_stop_files, rundir, argv[0], poll)
                ended = time.monotonic()
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait()
                raise EngineRunError(
                    f"{where}{argv[0]} ran longer than its timeout ({timeout:g} s) and was killed"
                ) from None
            except BaseException:
                child.kill()
                child.wait()
                raise
    finally:
        _remove(rundir, soft_stop_files)
        if rundir != workdir:
            _copy_back(rundir, workdir)
            shutil.rmtree(rundir, ignore_errors=True)
    seconds = time.monotonic() - t0
    if stop_sent is not None:
        stopped_after = ended - stop_sent
        log.warning(
            "%s%s stopped %.1f s after its soft stop (exit status %s, %.1f s in all); the "
            "attempt is not finished, the retry continues from its restart files",
            where, argv[0], stopped_after, code, ended - t0,
        )  # fmt: skip
        raise SoftStopped(
            f"{where}{argv[0]} was asked to stop before the job's time limit "
            f"({soft_stop.STOP_SIGNAL.name}) and stopped cleanly {stopped_after:.1f} s later "
            f"(exit status {code}, {ended - t0:.1f} s in all); the attempt is not finished and "
            "the retry continues from the program's restart files"
        )
    if code != 0:
        tail = ""
        if stdout and (workdir / stdout).is_file():
            lines = (workdir / stdout).read_text(errors="replace").splitlines()[-5:]
            tail = "; last lines of " + stdout + ":\n    " + "\n    ".join(lines)
        how = f"was killed by signal {-code}" if code < 0 else f"exited with code {code}"
        raise EngineRunError(f"{where}{argv[0]} {how} after {seconds:.1f} s{tail}")
    log.info("%s%s finished in %.1f s", where, argv[0], seconds)
    return seconds
