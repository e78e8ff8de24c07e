"""Start an external program for a step: launcher prefix, modules, environment, scratch folder.

The engine says *what* to run (an argv list, never a shell string); the launcher says *how* on
this machine (:class:`~ionwell.config.LauncherConfig`). :func:`command_line` is the pure part;
:func:`run_program` runs it and waits.

The program runs in the job's process group (a controller that ends the group ends it too) and
receives SIGKILL if the step job itself dies (Linux ``PR_SET_PDEATHSIG``), so no orphaned
program keeps computing a step another attempt is redoing.
"""

from __future__ import annotations

import ctypes
import logging
import os
import shutil
import signal
import subprocess
import time
from collections.abc import Mapping
from pathlib import Path
from string import Template

from ionwell.engine_config import LauncherConfig
from ionwell.errors import ConfigError, IonwellError

__all__ = ["EngineRunError", "command_line", "die_with_parent", "fill", "run_program"]

log = logging.getLogger("ionwell.launcher")

#: The shell snippet that loads modules then execs the program; the module names and the argv
#: are passed as positional arguments, never spliced into the snippet.
_MODULES = 'n=$1; shift; module load "${@:1:$n}" || exit 127; shift "$n"; exec "$@"'


class EngineRunError(IonwellError):
    """The external program could not be started, was killed, or exited with an error."""


class ScfNotConverged(EngineRunError):
    """The program stopped because its SCF did not converge (its output says so): the SCF
    remedies retry it at the same structure; it is not a failure of the machine."""


def die_with_parent() -> None:  # pragma: no cover - runs in the child before exec
    """Ask Linux to SIGKILL this (child) process when its parent dies."""
    try:
        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except OSError:
        pass


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


def run_program(
    argv: list[str],
    workdir: Path,
    cfg: LauncherConfig,
    *,
    stdout: str | None,
    timeout: float | None = None,
    step: int | None = None,
    values: Mapping[str, object] | None = None,
) -> float:
    """Run ``argv`` through the launcher in ``workdir`` (or its scratch copy); returns seconds.

    Raises:
        EngineRunError: the program is missing, timed out, was killed, or exited non-zero; the
            message names the step, the program, and the last lines of its output.
    """
    workdir = Path(workdir)
    where = f"step {step}: " if step is not None else ""
    full = command_line(argv, cfg, values or {})
    env = dict(os.environ)
    env.update({k: str(v) for k, v in cfg.env.items()})
    env.setdefault("OMP_NUM_THREADS", str(cfg.threads))
    rundir = workdir
    if cfg.scratch:
        base = Path(os.path.expandvars(cfg.scratch)).expanduser()
        rundir = base / f"ionwell-{os.getpid()}-{workdir.parent.name}"
        shutil.rmtree(rundir, ignore_errors=True)
        shutil.copytree(workdir, rundir)
    log.info("%srunning %s in %s", where, " ".join(full), rundir)
    out_path = (rundir / stdout) if stdout else None
    t0 = time.monotonic()
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
                    preexec_fn=die_with_parent,
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
                code = child.wait(timeout=timeout)
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
        if rundir != workdir:
            _copy_back(rundir, workdir)
            shutil.rmtree(rundir, ignore_errors=True)
    seconds = time.monotonic() - t0
    if code != 0:
        tail = ""
        if stdout and (workdir / stdout).is_file():
            lines = (workdir / stdout).read_text(errors="replace").splitlines()[-5:]
            tail = "; last lines of " + stdout + ":\n    " + "\n    ".join(lines)
        how = f"was killed by signal {-code}" if code < 0 else f"exited with code {code}"
        raise EngineRunError(f"{where}{argv[0]} {how} after {seconds:.1f} s{tail}")
    log.info("%s%s finished in %.1f s", where, argv[0], seconds)
    return seconds
