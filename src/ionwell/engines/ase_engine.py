"""Any ASE calculator, named by import path, run in-process.

``engine.calculator`` is the import path of the calculator class (``package.module.Class``),
built with ``engine.parameters`` as keyword arguments; when ``engine.charge_keyword`` is set,
the step's total charge (e) is passed under that keyword. ASE calculators have no common spin
keyword: the spin recorded is ``context.spin`` or the lowest the electron count allows, and a
calculator that needs it takes it from ``engine.parameters``. A calculator with a ``directory``
attribute (every :class:`ase.calculators.calculator.Calculator`) runs in the step's engine
folder unless ``engine.parameters`` names another ``directory``.

Files in the engine folder of a step (see :mod:`ionwell.engines.results`): ``input.extxyz``
(cell and periodicity kept), ``context.json``, ``relax.traj`` and ``relax.log`` when a
relaxation ran, ``potential.npz`` (volts), ``output.json`` (written last), plus whatever the
calculator writes.

Energy (eV) and forces (eV/Å) are the calculator's own (``get_potential_energy``,
``get_forces``); charges come from ``get_charges()`` where the calculator implements
``charges``. The SCF counts as converged unless the calculator has a boolean ``converged``
attribute that is False (ASE has no common convergence flag).

The potential map, in order of preference:

1. ``calc.get_electrostatic_potential()`` when the calculator has it. Accepted returns:

   * an :class:`ionwell.grid.Grid` — taken as it is (volts, felt by a positive charge);
   * a 3-D array ``(n0, n1, n2)`` — ASE's convention for grid-based calculators (GPAW):
     values in **eV** on a grid that spans the unit cell ``atoms.cell``, point ``(i, j, k)`` at
     ``i/n0 a + j/n1 b + k/n2 c`` (origin at the cell's corner), periodic along the periodic
     axes of the atoms. The sign follows ``engine.potential_sign``: ``electron`` (default,
     GPAW's: the potential energy of an electron, so the map is its negative in volts),
     ``potential`` (already the potential felt by a positive charge, volts) or ``auto``
     (decided from the values near the nuclei, :func:`ionwell.grid.detect_sign`). A
     calculator whose grid is laid out otherwise (e.g. one that leaves out the boundary points
     of a non-periodic axis) should return a Grid instead, or write a file.

   The calculator may name its potential's model in a string attribute ``potential_model``
   (recorded as :attr:`StepResult.potential_model`; default ``"exact"``).
2. ``engine.potential`` — a file the calculator wrote in the engine folder (a glob; the newest
   match counts), read with :func:`ionwell.volumetric.read_potential` (format, unit, sign).
   Matches left over from an earlier attempt are removed by :meth:`AseEngine.prepare`.
3. Otherwise the run fails with an EngineOutputError saying so.

After a relaxation the calculator's last evaluation is at the final geometry, so its potential
(method or file) belongs to the relaxed structure.
"""

from __future__ import annotations

import importlib
import json
import logging
import time
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms

from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.relax import relax_atoms
from ionwell.engines.results import (
    CONTEXT,
    POTENTIAL,
    InProcessEngine,
    atomic_write,
    read_inputs,
    write_inputs,
    write_output,
)
from ionwell.errors import ConfigError, EngineOutputError, GridError
from ionwell.grid import Grid, orient, save_npz

__all__ = ["AseEngine", "grid_from_calculator", "load_calculator_class"]

log = logging.getLogger("ionwell.engines.ase")

TIMINGS = "timings.json"


def load_calculator_class(path: str) -> type:
    """Import the calculator class named by ``path`` (``package.module.Class``).

    Raises ConfigError naming ``engine.calculator`` when the module or the class is missing or
    the object is not a class.
    """
    module_name, _, class_name = path.rpartition(".")
    if not module_name:
        raise ConfigError(
            f"engine.calculator: {path!r} is not an import path (expected package.module.Class)"
        )
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise ConfigError(
            f"engine.calculator: cannot import module {module_name!r} for calculator "
            f"{path!r} ({err})"
        ) from None
    except Exception as err:  # a module that fails while importing
        raise ConfigError(
            f"engine.calculator: importing module {module_name!r} failed "
            f"({type(err).__name__}: {err})"
        ) from None
    cls = getattr(module, class_name, None)
    if cls is None:
        raise ConfigError(
            f"engine.calculator: module {module_name!r} has no {class_name!r} (from {path!r})"
        )
    if not isinstance(cls, type):
        raise ConfigError(f"engine.calculator: {path!r} is not a class")
    return cls


def _code_version(path: str) -> str:
    """Version of the distribution that provides the calculator's top-level package."""
    from importlib import metadata

    top = path.split(".", 1)[0]
    try:
        return metadata.version(top)
    except metadata.PackageNotFoundError:
        module = importlib.import_module(top)
        return str(getattr(module, "__version__", "unknown"))


def grid_from_calculator(value: Any, atoms: Atoms, sign: str) -> Grid:
    """The map (volts, potential convention) from what ``get_electrostatic_potential()`` gave.

    ``value`` is a :class:`Grid` (kept) or a 3-D array in eV on the grid of ``atoms.cell``
    (see the module docstring), oriented with ``sign`` (electron, potential or auto).
    Raises EngineOutputError for anything else.
    """
    if isinstance(value, Grid):
        return value
    what = "get_electrostatic_potential()"
    try:
        values = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise EngineOutputError(
            f"{what} returned {type(value).__name__}; expected a 3-D array (eV) or a Grid"
        ) from None
    if values.ndim != 3 or min(values.shape) < 1:
        raise EngineOutputError(
            f"{what} returned an array of shape {values.shape}; expected (n0, n1, n2)"
        )
    if not np.isfinite(values).all():
        raise EngineOutputError(f"{what} returned non-finite values")
    cell = np.asarray(atoms.cell.array, dtype=float)
    if abs(np.linalg.det(cell)) < 1e-9:
        raise EngineOutputError(
            f"{what} returned an array but the structure has no unit cell to place it on; "
            "give the atoms a cell or have the calculator return an ionwell.grid.Grid"
        )
    axes = cell / np.asarray(values.shape, dtype=float)[:, None]
    # eV per elementary charge is numerically volts; the sign is settled by `orient`
    grid = Grid(origin=np.zeros(3), axes=axes, values=values, pbc=tuple(bool(p) for p in atoms.pbc))
    try:
        return orient(grid, atoms, sign)
    except GridError as err:
        raise EngineOutputError(f"{what}: {err}") from None


class AseEngine(InProcessEngine):
    """In-process engine on any ASE calculator (see the module docstring)."""

    name = "ase"

    @property
    def code(self) -> str:  # type: ignore[override]
        return f"ASE calculator {self.cfg.calculator}"

    def prepare(self, atoms: Atoms, workdir: Path, context: ComputeContext) -> None:
        """Write ``input.extxyz`` and ``context.json``; remove outputs of an earlier attempt
        (including files matching ``engine.potential.file``)."""
        workdir = Path(workdir)
        stale = [TIMINGS]
        if self.cfg.potential is not None and workdir.is_dir():
            stale += [p.name for p in workdir.glob(self.cfg.potential.file) if p.is_file()]
        write_inputs(atoms, workdir, context, stale=stale, keep_cell=True)

    def make_calculator(self, context: ComputeContext, workdir: Path):
        """Build the calculator: ``engine.parameters`` (+ the charge), in ``workdir``."""
        cfg = self.cfg
        cls = load_calculator_class(cfg.calculator)
        params = dict(cfg.parameters)
        if cfg.charge_keyword:
            if cfg.charge_keyword in params:
                log.info(
                    "engine.parameters.%s is replaced by the step's charge %+d",
                    cfg.charge_keyword,
                    context.charge,
                )
            params[cfg.charge_keyword] = int(context.charge)
        try:
            calc = cls(**params)
        except Exception as err:  # a bad keyword or value, in whatever way the class reports it
            raise ConfigError(
                f"engine.parameters: {cfg.calculator} cannot be built with "
                f"{sorted(params)} ({type(err).__name__}: {err})"
            ) from None
        if "directory" not in params and hasattr(calc, "directory"):
            try:
                calc.directory = str(Path(workdir).resolve())
            except (AttributeError, TypeError, ValueError):
                log.debug("%s does not take a directory", cfg.calculator)
        return calc

    def run(self, workdir: Path) -> None:
        """Compute the step described by ``workdir``'s inputs and write the outputs."""
        t_start = time.perf_counter()
        workdir = Path(workdir)
        cfg, rcfg = self.cfg, self.relax
        atoms, context = read_inputs(workdir)
        spin = _spin(atoms, context, workdir)
        calc = self.make_calculator(context, workdir)
        movable = sorted({int(i) for i in context.movable if 0 <= int(i) < len(atoms)})
        relax_converged: bool | None = None
        relax_steps = 0
        log.info("ase %s: %d atoms, charge %+d", cfg.calculator, len(atoms), context.charge)
        try:
            if rcfg.enabled and movable:
                relax_converged, relax_steps, final, forces = relax_atoms(
                    atoms, calc, movable, rcfg, workdir
                )
            else:
                final = atoms.copy()
                final.calc = calc
                forces = np.asarray(final.get_forces(), dtype=float)
            energy = float(calc.get_potential_energy(final))
        except (ConfigError, EngineOutputError):
            raise
        except Exception as err:
            raise EngineOutputError(
                f"{workdir}: the calculator {cfg.calculator} failed ({type(err).__name__}: {err})"
            ) from err
        charges, scheme = self._charges(calc, final)
        fermi = _optional(calc, "get_fermi_level")

        t0 = time.perf_counter()
        grid, model = None, "exact"
        if context.potential:
            grid, model = self._potential(calc, final, workdir, context.step)
            save_npz(workdir / POTENTIAL, grid)
        t_pot = time.perf_counter() - t0

        converged = getattr(calc, "converged", True)
        result = StepResult(
            energy=energy,
            forces=np.asarray(forces, dtype=float).tolist(),
            scf_converged=converged if isinstance(converged, bool) else True,
            relax_converged=relax_converged,
            relax_steps=relax_steps,
            symbols=final.get_chemical_symbols(),
            positions=np.asarray(final.positions, dtype=float).tolist(),
            cell=np.asarray(final.cell.array).tolist() if final.cell.rank else None,
            pbc=[bool(p) for p in final.pbc],
            charge=int(context.charge),
            spin=spin,
            charges=charges,
            charge_scheme=scheme,
            fermi_level=None if fermi is None else float(fermi),
            code=f"ase:{cfg.calculator}",
            code_version=_code_version(cfg.calculator),
            wall_time=time.perf_counter() - t_start,
            potential_file=POTENTIAL if grid is not None else None,
            potential_model=model,
        )
        diag = {
            "wall_time": result.wall_time,
            "potential_seconds": t_pot,
            "grid_shape": None if grid is None else list(grid.shape),
            "calculator": cfg.calculator,
        }
        atomic_write(workdir / TIMINGS, json.dumps(diag, indent=2) + "\n")
        write_output(workdir, result)
        log.info(
            "ase %s done in %.1f s: E = %.6f eV, potential from %s",
            cfg.calculator,
            result.wall_time,
            result.energy,
            model,
        )

    # -- pieces ---------------------------------------------------------------------------

    def _charges(self, calc, atoms: Atoms) -> tuple[list[float] | None, str | None]:
        if "charges" not in getattr(calc, "implemented_properties", ()):
            return None, None
        try:
            q = np.asarray(calc.get_charges(atoms), dtype=float)
        except Exception as err:  # PropertyNotImplementedError and kin: charges are optional
            log.info("no charges from %s (%s)", self.cfg.calculator, err)
            return None, None
        if q.shape != (len(atoms),) or not np.isfinite(q).all():
            return None, None
        return q.tolist(), f"{type(calc).__name__}.get_charges()"

    def _potential(self, calc, atoms: Atoms, workdir: Path, step: int) -> tuple[Grid, str]:
        """The map and its model label: the calculator's method, else the configured file."""
        cfg = self.cfg
        method = getattr(calc, "get_electrostatic_potential", None)
        if callable(method):
            try:
                value = method()
            except NotImplementedError:  # ASE's PropertyNotImplementedError is one
                value = None
                log.info("%s.get_electrostatic_potential() is not implemented", cfg.calculator)
            except Exception as err:
                raise EngineOutputError(
                    f"{workdir}: {cfg.calculator}.get_electrostatic_potential() failed "
                    f"({type(err).__name__}: {err})"
                ) from err
            if value is not None:
                grid = grid_from_calculator(value, atoms, cfg.potential_sign)
                model = getattr(calc, "potential_model", "exact")
                return grid, model if isinstance(model, str) else "exact"
        if cfg.potential is None:
            raise EngineOutputError(
                f"{workdir}: the calculator {cfg.calculator} offers no potential map "
                "(no get_electrostatic_potential()) and no 'engine.potential' file is "
                "configured; set engine.potential to the map file the calculator writes"
            )
        from ionwell.volumetric import read_potential

        spec = cfg.potential
        matches = sorted(
            (p for p in workdir.glob(spec.file) if p.is_file()), key=lambda p: p.stat().st_mtime
        )
        if not matches:
            raise EngineOutputError(
                f"{workdir / spec.file}: missing (engine.potential.file: expected the potential "
                f"map written by {cfg.calculator})"
            )
        if len(matches) > 1:
            log.warning(
                "engine.potential.file %r matches %d files; using the newest, %s",
                spec.file,
                len(matches),
                matches[-1].name,
            )
        path = matches[-1]
        return read_potential(path, spec, atoms, step), "exact"


def _spin(atoms: Atoms, context: ComputeContext, workdir: Path) -> int:
    """2S recorded for the step: ``context.spin``, or the electron count's parity."""
    nelec = int(atoms.get_atomic_numbers().sum()) - int(context.charge)
    if nelec < 0:
        raise ConfigError(
            f"{Path(workdir) / CONTEXT}: step {context.step} cannot be computed: charge "
            f"{context.charge:+d} leaves {nelec} electrons"
        )
    if context.spin is not None:
        return int(context.spin)
    return nelec % 2


def _optional(calc, method: str) -> float | None:
    """``calc.<method>()`` as a float, or None when absent or not implemented."""
    fn = getattr(calc, method, None)
    if not callable(fn):
        return None
    try:
        value = float(fn())
    except Exception:  # not implemented, not computed, or not a number: optional
        return None
    return value if np.isfinite(value) else None
