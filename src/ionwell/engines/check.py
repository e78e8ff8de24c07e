"""``ionwell engines``: what engines exist here, and whether one works (a tiny single point).

:func:`engine_kinds` lists the engine kinds; :func:`check_engine` runs H₂ (0.74 Å, centred in an
8 Å cube, not periodic) through an engine kind or a definition in a scratch folder and reports
what could be read back: energy, SCF convergence, the potential map's grid and range, charges,
levels, and the program's name and version as recorded. A command engine applies its own cell
rule to the probe (a non-periodic structure gets a box of its extent plus ``cell.box.vacuum`` on
each side), exactly as in a campaign.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
from ase import Atoms
from pydantic import BaseModel

from ionwell.config.campaign import Campaign, parse_campaign
from ionwell.config.definitions import list_definitions, resolve_engines
from ionwell.engines.base import ComputeContext
from ionwell.engines.run import run_engine
from ionwell.errors import IonwellError

__all__ = ["CheckReport", "check_campaign", "check_engine", "engine_kinds", "probe"]

KINDS = {
    "pyscf": "embedded Kohn-Sham DFT (PySCF), in-process; molecules and clusters",
    "tblite": "GFN2-xTB / GFN1-xTB tight binding (tblite), in-process; map from charges",
    "ase": "any ASE calculator by import path (engine.calculator)",
    "command": "any external program described in the config or a definition file",
}


def engine_kinds() -> dict[str, str]:
    """Engine kinds and a one-line description of each."""
    return dict(KINDS)


class CheckReport(BaseModel):
    """What a tiny single point through an engine gave."""

    name: str
    kind: str
    ok: bool
    installed: bool = True
    message: str = ""
    energy: float | None = None  # eV
    scf_converged: bool | None = None
    grid_shape: list[int] | None = None
    potential_range: list[float] | None = None  # V
    charges: list[float] | None = None  # e
    charge_scheme: str | None = None
    homo: float | None = None  # eV
    fermi_level: float | None = None  # eV
    code: str | None = None  # the program, as recorded in a step's result
    code_version: str | None = None  # as the program printed it, where the engine reads it
    notes: list[str] = []
    seconds: float = 0.0
    folder: str | None = None


def check_campaign(name: str, config_dir: Path) -> Campaign:
    """The one-step campaign :func:`check_engine` runs the probe with (engine ``name``)."""
    if name in KINDS and name != "command":
        engine: dict = {"kind": name}
        if name in ("pyscf", "tblite"):
            engine["potential_grid"] = {"spacing": 0.3, "margin": 3.0}
    elif name in KINDS:
        raise IonwellError(
            "engines check command: a command engine needs a definition; give its name "
            "(see 'ionwell engines')"
        )
    else:
        engine = {"kind": "command", "definition": name}
    data = {
        "name": "engine-check",
        "host": {"builder": {"layers": 1, "shells": 1}},
        "engine": engine,
        "relax": {"enabled": False},
    }
    return parse_campaign(resolve_engines(data, config_dir), f"engine {name!r}")


def probe() -> Atoms:
    """H₂, 0.74 Å, centred in an 8 Å cube, not periodic (positions Å)."""
    a = Atoms("H2", positions=[[0.0, 0.0, 0.0], [0.0, 0.0, 0.74]], cell=[8.0, 8.0, 8.0])
    a.center()
    return a


def check_engine(
    name: str, config_dir: Path | None = None, keep: Path | None = None
) -> CheckReport:
    """Run the probe through engine kind or definition ``name``; never raises for engine faults."""
    config_dir = Path(config_dir or Path.cwd())
    campaign = check_campaign(name, config_dir)
    kind = campaign.engine.kind
    report = CheckReport(name=name, kind=kind, ok=False)
    if kind == "command":
        program = campaign.engine.argv[0]
        if not campaign.launcher.modules and shutil.which(program) is None:
            report.installed = False
            report.message = f"{program} is not installed here (not on PATH); nothing was run"
            return report
    folder = Path(keep) if keep else Path(tempfile.mkdtemp(prefix="ionwell-check-"))
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise IonwellError(
            f"--keep {keep}: cannot create the folder ({err.strerror or err}); expected a "
            "folder that exists or can be made"
        ) from None
    t0 = time.monotonic()
    try:
        done = run_engine(campaign, probe(), folder, ComputeContext(step=0, charge=0))
        result, grid = done.result, done.potential
    except IonwellError as err:
        report.message = str(err)
        report.folder = str(folder)
        return report
    finally:
        report.seconds = round(time.monotonic() - t0, 2)
    values = np.asarray(grid.values)
    report.ok = bool(result.scf_converged)
    report.energy = result.energy
    report.scf_converged = result.scf_converged
    report.grid_shape = [int(x) for x in grid.shape]
    report.potential_range = [float(values.min()), float(values.max())]
    report.charges = result.charges
    report.charge_scheme = result.charge_scheme
    report.homo = result.homo
    report.fermi_level = result.fermi_level
    report.code = result.code
    report.code_version = result.code_version
    report.notes = list(result.notes)
    ran = f"{result.code} {result.code_version}"
    report.message = f"works ({ran})" if report.ok else f"ran ({ran}), but the SCF did not converge"
    if keep is None:
        shutil.rmtree(folder, ignore_errors=True)
    else:
        report.folder = str(folder)
    return report


def definitions(config_dir: Path | None = None) -> list[tuple[str, Path, str, str]]:
    """(name, file, label, program) of each definition found; bad files say so in 'program'."""
    import yaml

    out = []
    for name, path in list_definitions(config_dir):
        try:
            data = yaml.safe_load(path.read_text()) or {}
            label = str(data.get("label", name))
            argv = data.get("argv") or ["?"]
            program = str(argv[0])
        except (OSError, yaml.YAMLError, AttributeError) as err:
            label, program = name, f"(unreadable: {err})"
        out.append((name, path, label, program))
    return out
