"""Error types that carry one clear, user-facing message.

Every error raised for bad input names the file, field or step and what was expected; the CLI
prints ``str(error)`` and exits non-zero without a traceback.
"""

from __future__ import annotations


class IonwellError(Exception):
    """Base class: an error whose message is meant for the user as it stands."""


class ConfigError(IonwellError):
    """A campaign configuration is missing, malformed, or differs from the frozen one."""


class StructureError(IonwellError):
    """A structure file cannot be read or describes something unusable."""


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
