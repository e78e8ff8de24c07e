"""Logging set-up for the edges: the CLI and the step jobs that Snakemake spawns.

Library modules only call ``logging.getLogger(__name__)``; handlers are attached here, once per
process: a terse stream handler (progress a person reads while a campaign runs) and a file
handler on ``campaigns/<name>/ionwell.log``.
"""

from __future__ import annotations

import logging
import sys

from ionwell.store.campaign import CampaignPaths

_FORMAT = "%(asctime)s ionwell | %(message)s"
_configured: set[str] = set()


class _StderrHandler(logging.StreamHandler):
    """A stream handler on the ``sys.stderr`` of the moment, not the one at set-up: a caller
    that swaps stderr and closes its own (pytest's capture, an embedding program) would
    otherwise leave a handler writing to a closed file."""

    @property
    def stream(self):  # type: ignore[override]
        return sys.stderr

    @stream.setter
    def stream(self, _value) -> None:
        pass


def cli_logging(verbose: bool = False) -> None:
    """Progress lines on stderr for the ``ionwell`` command."""
    if "stream" in _configured:
        return
    root = logging.getLogger("ionwell")
    h = _StderrHandler()
    h.setFormatter(logging.Formatter(_FORMAT, "%H:%M:%S"))
    root.addHandler(h)
    root.setLevel(logging.DEBUG if verbose else logging.INFO)
    root.propagate = False
    _configured.add("stream")


def job_logging(paths: CampaignPaths) -> None:
    """Stream and campaign-log handlers inside a step job."""
    cli_logging()
    key = f"file:{paths.log}"
    if key in _configured:
        return
    paths.root.mkdir(parents=True, exist_ok=True)
    h = logging.FileHandler(paths.log)
    h.setFormatter(logging.Formatter("%(asctime)s %(name)s %(levelname)s %(message)s"))
    logging.getLogger("ionwell").addHandler(h)
    _configured.add(key)
