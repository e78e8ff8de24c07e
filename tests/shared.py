"""Inputs shared by test files in different folders (a test file imports from here, never from
another test file): the ``ionwell`` command run as a subprocess, the pyscf-runner command engine,
the Quantum ESPRESSO availability check, and the tiny real-DFT campaign."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import yaml

from ionwell.config.definitions import find_definition

#: The ``ionwell`` command as the tests run it: this interpreter, the package's ``__main__``.
IONWELL = [sys.executable, "-m", "ionwell.cli"]


def ionwell(*args: str | Path, timeout: float = 600, **kwargs) -> subprocess.CompletedProcess:
    """``ionwell ARGS`` in a subprocess, its stdout and stderr captured as text; ``kwargs`` go
    to :func:`subprocess.run` (``cwd``, ``env``)."""
    return subprocess.run(
        [*IONWELL, *map(str, args)], capture_output=True, text=True, timeout=timeout, **kwargs
    )


def run_campaign(
    config: dict | Path,
    root: Path,
    *extra: str,
    timeout: float = 600,
    check: bool = True,
    env: dict[str, str] | None = None,
) -> subprocess.CompletedProcess:
    """``ionwell run CONFIG --root ROOT EXTRA`` in a subprocess. ``config`` is a campaign file,
    or a campaign as a dict, then written to ``ROOT/<name>.yaml`` first. With ``check``, the run
    must succeed (exit code 0); the failure message shows the tails of stdout and stderr."""
    if isinstance(config, dict):
        path = Path(root) / f"{config['name']}.yaml"
        path.write_text(yaml.safe_dump(config, allow_unicode=True), encoding="utf-8")
    else:
        path = Path(config)
    proc = ionwell("run", path, "--root", root, *extra, timeout=timeout, env=env)
    if check:
        assert proc.returncode == 0, (
            f"ionwell run {path} exited with {proc.returncode}\n--- stdout (tail)\n"
            f"{proc.stdout[-3000:]}\n--- stderr (tail)\n{proc.stderr[-3000:]}"
        )
    return proc


RUNNER = Path(__file__).parent / "programs" / "pyscf_runner.py"

TEMPLATE = """# pyscf-runner input written by ionwell
step ${step}
charge ${charge}
spin ${spin}
restart ${restart}
basis sto-3g
xc lda,vwn
grid_level 1
spacing 0.3
margin 3.0
geometry
${structure}
end
"""

COMMAND = {
    "kind": "command",
    "label": "pyscf-runner",
    "version": "test",
    "input": {"file": "job.inp", "template": "runner.tmpl"},
    "argv": [sys.executable, str(RUNNER), "${input}"],
    "stdout": "job.log",
    "outputs": {
        "energy": {"file": "job.log", "regex": r"^total energy\s+(\S+) hartree", "unit": "hartree"},
        "potential": {"file": "potential.cube", "unit": "hartree", "sign": "potential"},
        "charges": {
            "file": "job.log",
            "regex": r"^atom\s+\d+\s+\S+\s+charge\s+(\S+)",
            "scheme": "mulliken",
        },
        "homo": {"file": "job.log", "regex": r"^homo\s+(\S+) hartree", "unit": "hartree"},
    },
    "converged": {"scf": {"file": "job.log", "regex": r"^SCF converged"}},
    "restart": {"keep": ["runner.chk"], "previous": ["runner.chk"], "value": "yes", "fresh": "no"},
}


QE_DEFINITION = find_definition("quantum-espresso")


def qe_pseudo_dir() -> Path:
    return Path(os.environ.get("ESPRESSO_PSEUDO", "/usr/share/espresso/pseudo"))


def qe_missing() -> str | None:
    for program in ("pw.x", "pp.x"):
        if shutil.which(program) is None:
            return f"Quantum ESPRESSO is not installed here ({program} is not on PATH)"
    pseudos = yaml.safe_load(QE_DEFINITION.read_text())["input"]["parameters"]["pseudopotentials"]
    absent = [f for f in pseudos.values() if not (qe_pseudo_dir() / f).is_file()]
    if absent:
        return f"the pseudopotential files {absent} are not in {qe_pseudo_dir()}"
    return None


# A campaign small enough for a test: Li atoms into one benzene sheet (LDA/STO-3G, coarse grid).
TINY = {
    "name": "tiny",
    "seed": 3,
    "host": {"builder": {"kind": "flake", "layers": 1, "shells": 1}},
    "guest": {"element": "Li", "charge_mode": "cation"},
    "engine": {
        "kind": "pyscf",
        "xc": "lda,vwn",
        "basis": "sto-3g",
        "conv_tol": 1e-7,
        "grid_level": 1,
        "potential_grid": {"spacing": 0.4, "margin": 3.0},
    },
    "placement": {"within": 3.0},
    "relax": {"enabled": True, "fmax": 0.2, "steps": 2},
    "stop": {"guests": 3, "max_steps": 10},
    # Li: cohesive energy 1.63 eV/atom (handbook value, from memory); μ = E(Li atom) − 1.63 eV
    "analysis": {"reference": {"cohesive_energy": 1.63, "source": "Li cohesive energy"}},
}
