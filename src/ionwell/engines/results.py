"""Files every in-process engine shares: inputs, ``output.json`` and ``potential.npz``.

=================  =====================================================================
``input.extxyz``   structure entering the compute (Å)
``context.json``   the :class:`~ionwell.engines.base.ComputeContext`
``output.npz``     positions (Å) and forces (eV/Å), float64, binary
``output.json``    every other :class:`~ionwell.engines.base.StepResult` field, written last
``potential.npz``  potential map, volts, float32 (:func:`ionwell.io.npz.save_npz`)
=================  =====================================================================

Writes are atomic (temporary name, fsync, rename); :func:`collect_outputs` raises
:class:`~ionwell.errors.EngineOutputError` naming the file and the reason.
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Iterable
from pathlib import Path

import numpy as np
from ase import Atoms
from pydantic import ValidationError

from ionwell.engines.base import ComputeContext, StepResult
from ionwell.errors import EngineOutputError, GridError
from ionwell.io.npz import load_npz
from ionwell.science.grid import Grid
from ionwell.store.campaign import atomic_publish
from ionwell.store.campaign import atomic_write_text as atomic_write

log = logging.getLogger("ionwell.engines")

__all__ = [
    "CONTEXT",
    "INPUT",
    "ARRAYS",
    "OUTPUT",
    "POTENTIAL",
    "atomic_write",
    "collect_outputs",
    "read_inputs",
    "write_inputs",
    "write_output",
]

INPUT = "input.extxyz"
CONTEXT = "context.json"
OUTPUT = "output.json"
ARRAYS = "output.npz"
POTENTIAL = "potential.npz"


def write_inputs(
    atoms: Atoms,
    workdir: Path,
    context: ComputeContext,
    stale: Iterable[str] = (),
    keep_cell: bool = False,
) -> None:
    """Write ``input.extxyz`` and ``context.json`` into ``workdir`` (created if needed).

    ``output.json``, ``potential.npz`` and the names in ``stale`` (outputs of an earlier attempt)
    are removed first. Without ``keep_cell`` only symbols and positions are written (a finite
    cluster); with it the cell and periodicity are kept too.
    """
    from ase.io import write

    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    # INPUT too: it may be a hard link to the step's recorded input, never to be written in place
    for name in (INPUT, OUTPUT, ARRAYS, POTENTIAL, *stale):
        (workdir / name).unlink(missing_ok=True)
    if keep_cell:
        a = Atoms(
            atoms.get_chemical_symbols(), positions=atoms.positions, cell=atoms.cell, pbc=atoms.pbc
        )
    else:
        a = Atoms(atoms.get_chemical_symbols(), positions=atoms.positions)
    write(workdir / INPUT, a, format="extxyz")
    atomic_write(workdir / CONTEXT, context.model_dump_json(indent=2) + "\n")


def read_inputs(workdir: Path) -> tuple[Atoms, ComputeContext]:
    """Read ``input.extxyz`` and ``context.json``; EngineOutputError when either is unusable."""
    from ase.io import read

    workdir = Path(workdir)
    try:
        atoms = read(workdir / INPUT, format="extxyz")
        context = ComputeContext.model_validate_json((workdir / CONTEXT).read_text())
    except (OSError, ValueError) as err:
        raise EngineOutputError(
            f"{workdir}: cannot read the engine inputs {INPUT} and {CONTEXT} ({err})"
        ) from None
    return atoms, context


def write_output(workdir: Path, result: StepResult) -> None:
    """Write ``result``: positions and forces as ``output.npz`` (binary), then every other
    field as ``output.json`` (atomically; the last file of a run)."""
    workdir = Path(workdir)
    arrays = {"positions": np.asarray(result.positions, dtype=np.float64).reshape(-1, 3)}
    if result.forces is not None:
        arrays["forces"] = np.asarray(result.forces, dtype=np.float64).reshape(-1, 3)
    tmp = workdir / f".{ARRAYS}.tmp"
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
    atomic_publish(tmp, workdir / ARRAYS)
    slim = result.model_copy(update={"positions": [], "forces": None})
    atomic_write(workdir / OUTPUT, slim.model_dump_json(indent=2) + "\n")


def _read_arrays(workdir: Path, n_atoms: int) -> dict[str, list]:
    """Positions and forces from ``output.npz``; EngineOutputError naming the file."""
    f = workdir / ARRAYS
    try:
        with np.load(f, allow_pickle=False) as z:
            data = {k: np.asarray(z[k], dtype=np.float64) for k in z.files}
    except FileNotFoundError:
        raise EngineOutputError(
            f"{f}: missing (output.json holds no positions; expected them here)"
        ) from None
    except (OSError, ValueError) as err:
        raise EngineOutputError(f"{f}: unreadable ({err})") from None
    out: dict[str, list] = {}
    for key in ("positions", "forces"):
        if key not in data:
            if key == "positions":
                raise EngineOutputError(f"{f}: no 'positions' array")
            continue
        a = data[key]
        if a.shape != (n_atoms, 3):
            raise EngineOutputError(
                f"{f}: '{key}' has shape {a.shape}; expected ({n_atoms}, 3) for the symbols "
                "in output.json"
            )
        out[key] = a.tolist()
    return out


def collect_outputs(workdir: Path, code: str = "engine") -> tuple[StepResult, Grid | None]:
    """Read ``output.json`` and the potential map it names (default ``potential.npz``).

    ``code`` names the program in the message about a missing ``output.json`` (e.g. 'PySCF').
    Raises EngineOutputError naming the file and the reason: missing, unreadable, not JSON, not
    a StepResult, a non-finite energy or forces, positions and symbols of different lengths, a
    missing or unreadable potential map.
    """
    workdir = Path(workdir)
    out = workdir / OUTPUT
    try:
        text = out.read_text()
    except FileNotFoundError:
        raise EngineOutputError(
            f"{out}: missing (expected the result of the {code} run; did run() finish?)"
        ) from None
    except OSError as err:
        raise EngineOutputError(f"{out}: cannot read ({err.strerror or err})") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise EngineOutputError(
            f"{out}: not valid JSON ({err.msg} at line {err.lineno}); expected a StepResult"
        ) from None
    if not isinstance(data, dict):
        raise EngineOutputError(f"{out}: expected a JSON object with StepResult fields")
    try:
        result = StepResult.model_validate(data)
    except ValidationError as err:
        fields = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or '(top)'}: {e['msg']}" for e in err.errors()
        )
        raise EngineOutputError(f"{out}: unusable StepResult ({fields})") from None
    if not result.positions and result.symbols:  # written by write_output: arrays beside it
        result = result.model_copy(update=_read_arrays(workdir, len(result.symbols)))
    if not math.isfinite(result.energy):
        raise EngineOutputError(f"{out}: energy is {result.energy}; expected a finite number")
    if result.free_energy is not None and not math.isfinite(result.free_energy):
        raise EngineOutputError(
            f"{out}: free_energy is {result.free_energy}; expected a finite number or null"
        )
    if result.forces is not None and not np.isfinite(np.asarray(result.forces)).all():
        raise EngineOutputError(f"{out}: forces hold non-finite values")
    if not result.symbols:
        raise EngineOutputError(f"{out}: no atoms (symbols and positions are empty)")
    if len(result.positions) != len(result.symbols):
        raise EngineOutputError(
            f"{out}: {len(result.positions)} positions for {len(result.symbols)} symbols"
        )
    if result.potential_file is None:
        return result, None  # an energy-only compute (ComputeContext.potential False)
    pot = workdir / result.potential_file
    if not pot.is_file():
        raise EngineOutputError(f"{pot}: missing (expected the potential map of this step)")
    try:
        grid = load_npz(pot)
    except GridError as err:
        raise EngineOutputError(str(err)) from None
    return result, grid


class InProcessEngine:
    """What the in-process engines share: construction, ``launch`` in this process (not
    ``external``), ``prepare`` for a finite cluster, and ``collect`` of ``output.json`` + the
    map.

    Subclasses set :attr:`name` and :attr:`code` and implement ``run``.
    """

    name = "engine"
    code = "engine"  # the program's name in messages about its outputs
    external = False  # computes in this process

    def __init__(self, engine_config, relax) -> None:
        self.cfg = engine_config
        self.relax = relax

    def prepare(self, atoms: Atoms, workdir: Path, context: ComputeContext) -> None:
        """Write ``input.extxyz`` and ``context.json``; remove outputs of an earlier attempt."""
        if any(atoms.pbc):
            log.warning(
                "the %s engine computes a finite cluster; periodicity is ignored", self.name
            )
        write_inputs(atoms, workdir, context, stale=("timings.json",))

    def launch(self, workdir: Path, launcher: object | None = None) -> float:
        """Compute in this process (``run``; the launcher is for external programs); the
        seconds it took."""
        t0 = time.perf_counter()
        self.run(workdir)
        return time.perf_counter() - t0

    def run(self, workdir: Path) -> None:  # pragma: no cover - every subclass implements it
        raise NotImplementedError

    def collect(self, workdir: Path) -> tuple[StepResult, Grid | None]:
        """Read ``output.json`` and ``potential.npz``; EngineOutputError names file + reason."""
        return collect_outputs(workdir, self.code)
