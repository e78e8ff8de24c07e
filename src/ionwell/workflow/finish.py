"""Bodies of the rules after the loop: ``reference``, ``analysis``, ``report``.

They import the analysis (and matplotlib) only when they run, so parsing the workflow and the
step rules stay light.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["analyse", "reference", "report"]


def reference(root: str | Path) -> None:
    """Body of rule ``reference``: the guest's chemical potential (``reference.json``)."""
    from ionwell.analysis.tables import guest_reference

    guest_reference(root)


def analyse(root: str | Path) -> None:
    """Body of rule ``analysis``: tables and plots in ``analysis/``."""
    from ionwell.analysis.tables import analyse as _analyse

    _analyse(root)


def report(root: str | Path, output: str | Path) -> None:
    """Body of rule ``report``: the self-contained HTML page."""
    from ionwell.analysis.report import write_report

    write_report([root], output)
