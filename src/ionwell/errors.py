"""Error types that carry one clear, user-facing message.

Every error raised for bad input names the file, field or step and what was expected; the CLI
prints ``str(error)`` and exits non-zero without a traceback.
"""

from __future__ import annotations

import contextlib
import errno
from collections.abc import Iterator
from pathlib import Path
from typing import Literal


class IonwellError(Exception):
    """Base class: an error whose message is meant for the user as it stands."""

    #: False for an error that fails the same way on every try (bad input): a step job that
    #: raises it is not retried (see :func:`error_kind`)
    retryable: bool = True
    #: the :data:`ErrorKind` of an error that is not retryable
    final_kind: ErrorKind = "input"


class ConfigError(IonwellError):
    """A campaign configuration is missing, malformed, or differs from the frozen one."""

    retryable = False


class StructureError(IonwellError):
    """A structure file cannot be read or describes something unusable."""

    retryable = False


class GridError(IonwellError):
    """A potential map file cannot be read, or its sign/units cannot be established."""


class EngineOutputError(IonwellError):
    """An engine's output is missing, truncated or unusable.

    The message names the file and the reason.
    """


class PlacementError(IonwellError):
    """Placement cannot proceed (e.g. no admissible grid point)."""


class LedgerError(IonwellError):
    """The ledger or a recorded artifact does not match what is on disk."""


class LockError(IonwellError):
    """Another controller holds the campaign."""


class StepFailedError(IonwellError):
    """A step's job failed in a way that fails again on every try (its cause is in the
    message, its :data:`ErrorKind` in ``kind``); raised by the rule after the job, which
    Snakemake does not retry."""

    retryable = False

    def __init__(self, message: str, kind: ErrorKind = "input") -> None:
        super().__init__(message)
        self.kind: ErrorKind = kind


#: what kind of failure a step met: ``input`` (bad input: fix the config or a file),
#: ``scf`` (the SCF did not converge with any remedy: change the engine's settings),
#: ``disk`` (no space left), ``memory`` (out of memory) — none of them helped by an immediate
#: retry — or ``transient`` (a killed job, a lost node, an unreadable output: retried)
ErrorKind = Literal["input", "scf", "disk", "memory", "transient"]

_DISK_FULL = (errno.ENOSPC, errno.EDQUOT)


def error_kind(err: BaseException) -> ErrorKind:
    """The kind of a failure (see :data:`ErrorKind`); only ``transient`` ones are retried."""
    if isinstance(err, StepFailedError):
        return err.kind
    seen: list[BaseException] = []
    cause: BaseException | None = err
    while cause is not None and len(seen) < 10:  # an ionwell error wrapping a full disk too
        seen.append(cause)
        if isinstance(cause, OSError) and cause.errno in _DISK_FULL:
            return "disk"
        if isinstance(cause, MemoryError):
            return "memory"
        cause = cause.__cause__ or cause.__context__
    if isinstance(err, IonwellError):
        return "transient" if err.retryable else err.final_kind
    return "transient"


def disk_full_text(text: str) -> bool:
    """``text`` (a message, a line of a log) says a file system is full."""
    return any(s in text for s in ("No space left on device", "Errno 28", "Disk quota exceeded"))


def describe_exception(err: BaseException) -> str:
    """One line for the user: an ionwell error as it stands; no space left on a device or out
    of memory said plainly (with the file), anything else as its type and message."""
    kind = error_kind(err)
    if isinstance(err, IonwellError):
        if kind == "disk" and not disk_full_text(str(err)):
            return f"{err} (no space left on device)"
        return str(err)
    if kind == "disk":
        assert isinstance(err, OSError)
        what = "quota exceeded" if err.errno == errno.EDQUOT else "no space left on device"
        where = f" writing {err.filename}" if err.filename else ""
        return (
            f"{what}{where}; free space on that file system and run again (what is recorded "
            "is kept; the step is redone)"
        )
    if kind == "memory":
        detail = f" ({err})" if str(err) else ""
        return (
            f"out of memory{detail}; give the step more memory (resources.compute.memory) or "
            "make it smaller (e.g. a coarser engine.potential_grid.spacing)"
        )
    return f"{type(err).__name__}: {err}"


@contextlib.contextmanager
def naming_file(path: str | Path) -> Iterator[None]:
    """Re-raise an OSError without a file name (a failed ``write``) with ``path`` in it, so a
    full disk names the file it could not write."""
    try:
        yield
    except OSError as err:
        if err.filename is None and err.errno is not None:
            raise OSError(err.errno, err.strerror or str(err), str(path)) from err
        raise
