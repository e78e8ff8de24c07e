"""The cluster side of remote mode: run one prepared engine folder.

    python -m ionwell.cluster.job FOLDER

``FOLDER`` holds the engine inputs staged by :mod:`ionwell.cluster.remote` and ``job.json`` (engine,
relaxation and launcher settings). In-process engines run here; a ``command`` engine runs its
program through the launcher. Exit code 0 when the engine finished, :data:`SCF_EXIT` (3) when
the program stopped on its unconverged SCF (the controller then tries the next SCF remedy), 1
with one message on standard error otherwise.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from pydantic import BaseModel, field_validator

from ionwell.config.campaign import EngineConfig, LauncherConfig, RelaxConfig
from ionwell.config.engines import default_engine_kind
from ionwell.engines.launcher import ScfNotConverged
from ionwell.engines.run import execute
from ionwell.errors import IonwellError

__all__ = ["SCF_EXIT", "JobSpec", "main", "run_folder"]

#: Exit code of a job whose program stopped on its unconverged SCF.
SCF_EXIT = 3


class JobSpec(BaseModel):
    """What a remote job needs besides the staged files."""

    engine: EngineConfig
    relax: RelaxConfig
    launcher: LauncherConfig = LauncherConfig()

    _kind = field_validator("engine", mode="before")(
        classmethod(lambda cls, v: default_engine_kind(v))
    )


def run_folder(folder: Path) -> None:
    """Run the engine of the staged ``folder`` (outputs are written into it)."""
    folder = Path(folder)
    try:
        spec = JobSpec.model_validate_json((folder / "job.json").read_text())
    except (OSError, ValueError) as err:
        raise IonwellError(f"{folder / 'job.json'}: unusable job description ({err})") from None
    execute(spec, folder)


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s | %(message)s")
    if len(args) != 1:
        print("usage: python -m ionwell.cluster.job FOLDER", file=sys.stderr)
        return 2
    try:
        run_folder(Path(args[0]))
    except ScfNotConverged as err:
        print(f"ionwell remote job: SCF not converged: {err}", file=sys.stderr)
        return SCF_EXIT
    except IonwellError as err:
        print(f"ionwell remote job: error: {err}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
