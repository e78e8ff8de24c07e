"""Any ASE calculator, named by import path, run in-process.

``engine.calculator`` is the import path (``package.module.name``) of a calculator class or of
any callable that returns a calculator (a factory function, such as ``gpaw.GPAW`` in GPAW 22.8,
whose class is ``gpaw.calculator.GPAW``); it is called with ``engine.parameters`` as keyword
arguments, and what it returns must have ``get_potential_energy`` and ``get_forces`` (else a
ConfigError naming ``engine.calculator``). When ``engine.charge_keyword`` is set, the step's
total charge (e) is passed under that keyword. ASE calculators have no common spin keyword: the
spin recorded is ``context.spin`` or the lowest the electron count allows, and a calculator that
needs it takes it from ``engine.parameters``.

The calculator's files go to the step's engine folder, without changing the process's working
directory (other threads of the process may use relative paths):

- ``directory``: a calculator with a ``directory`` attribute (every
  :class:`ase.calculators.calculator.Calculator`) gets the engine folder unless
  ``engine.parameters`` names another ``directory``;
- ``txt``: a calculator that takes a ``txt`` keyword (its text log, e.g. GPAW's, which otherwise
  goes to standard output) gets ``<engine folder>/calculator.txt`` unless ``engine.parameters``
  names a ``txt``. "Takes" means the keyword is in the signature of the callable, or — for a
  factory whose signature shows only ``**kwargs`` — in the signature of the class it returned
  (the factory is then called once with ``txt``; if the returned class does not name ``txt`` in
  its own signature, it is built again without it, so no calculator stores an unknown keyword).

Files in the engine folder of a step (see :mod:`ionwell.engines.results`): ``input.extxyz``
(cell and periodicity kept), ``context.json``, ``relax.traj`` and ``relax.log`` when a
relaxation ran, ``calculator.txt`` (the calculator's text log, see above), ``potential.npz``
(volts), ``output.json`` (written last), plus whatever the calculator writes.

Energy (eV) and forces (eV/Å) are the calculator's own (``get_potential_energy``,
``get_forces``; with electronic smearing ASE's ``energy`` is extrapolated to zero width and the
force-consistent free energy, where the calculator reports a different one, is recorded as
``free_energy``); charges come from ``get_charges()`` where the calculator implements
``charges``. The SCF counts as converged unless the calculator has a boolean ``converged``
attribute that is False (ASE has no common convergence flag).

The potential map, in order of preference:

1. ``calc.get_electrostatic_potential()`` when the calculator has it. Accepted returns:

   * an :class:`ionwell.science.grid.Grid` — taken as it is (volts, felt by a positive charge);
   * a 3-D array ``(n0, n1, n2)`` — ASE's convention for grid-based calculators (GPAW):
     values in **eV** on a grid that spans the unit cell ``atoms.cell``, point ``(i, j, k)`` at
     ``i/n0 a + j/n1 b + k/n2 c`` (origin at the cell's corner), periodic along the periodic
     axes of the atoms. The sign follows ``engine.potential_sign``: ``electron`` (default,
     GPAW's: the potential energy of an electron, so the map is its negative in volts),
     ``potential`` (already the potential felt by a positive charge, volts) or ``auto``
     (decided from the values near the nuclei, :func:`ionwell.science.grid.detect_sign`). A
     calculator whose grid is laid out otherwise (e.g. one that leaves out the boundary points
     of a non-periodic axis) should return a Grid instead, or write a file.

   The calculator may name its potential's model in a string attribute ``potential_model``
   (recorded as :attr:`StepResult.potential_model`; default ``"exact"``).
2. ``engine.potential`` — a file the calculator wrote in the engine folder (a glob; the newest
   match counts), read with :func:`ionwell.io.maps.read_potential` (format, unit, sign).
   Matches left over from an earlier attempt are removed by :meth:`AseEngine.prepare`.
3. Otherwise the run fails with an EngineOutputError saying so.

After a relaxation the calculator's last evaluation is at the final geometry, so its potential
(method or file) belongs to the relaxed structure.
"""

from __future__ import annotations

import importlib
import inspect
import json
import logging
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms

from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.launcher import ScfNotConverged
from ionwell.engines.relax import free_energy as _free_energy
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
from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid, orient

__all__ = ["AseEngine", "grid_from_calculator", "load_calculator", "load_calculator_class"]

log = logging.getLogger("ionwell.engines.ase")

TIMINGS = "timings.json"

#: The calculator's text log in the engine folder, for calculators that take ``txt``.
CALC_LOG = "calculator.txt"


def load_calculator(path: str) -> Callable[..., Any]:
    """Import what ``path`` (``package.module.name``) names: a calculator class or any callable
    returning a calculator (a factory function).

    Raises ConfigError naming ``engine.calculator`` when the module or the name is missing or
    the object cannot be called.
    """
    module_name, _, attr = path.rpartition(".")
    if not module_name:
        raise ConfigError(
            f"engine.calculator: {path!r} is not an import path (expected package.module.Class "
            "or package.module.factory)"
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
    obj = getattr(module, attr, None)
    if obj is None:
        raise ConfigError(
            f"engine.calculator: module {module_name!r} has no {attr!r} (from {path!r})"
        )
    if not callable(obj):
        raise ConfigError(
            f"engine.calculator: {path!r} is a {type(obj).__name__}, not a calculator class or "
            "a function returning a calculator"
        )
    return obj


#: Former name of :func:`load_calculator` (it accepts factories too, not only classes).
load_calculator_class = load_calculator


def is_calculator(obj: Any) -> bool:
    """True when ``obj`` can serve as an ASE calculator here (``get_potential_energy`` and
    ``get_forces`` are callable)."""
    return all(callable(getattr(obj, m, None)) for m in ("get_potential_energy", "get_forces"))


def _keywords(obj: Any) -> tuple[set[str], bool] | None:
    """The keyword names ``obj``'s signature spells out, and whether it also takes
    ``**kwargs``; None when the signature cannot be read (a builtin, a C extension)."""
    try:
        sig = inspect.signature(obj)
    except (TypeError, ValueError):
        return None
    named = {
        name
        for name, p in sig.parameters.items()
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
    }
    opaque = any(p.kind is p.VAR_KEYWORD for p in sig.parameters.values())
    return named, opaque


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
            "give the atoms a cell or have the calculator return an ionwell.science.grid.Grid"
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
        stale = [TIMINGS, CALC_LOG]
        if self.cfg.potential is not None and workdir.is_dir():
            stale += [p.name for p in workdir.glob(self.cfg.potential.file) if p.is_file()]
        write_inputs(atoms, workdir, context, stale=stale, keep_cell=True)

    def make_calculator(self, context: ComputeContext, workdir: Path):
        """Build the calculator: ``engine.parameters`` (+ the charge), its files in ``workdir``
        (``directory`` and ``txt``, see the module docstring)."""
        cfg = self.cfg
        factory = load_calculator(cfg.calculator)
        params = dict(cfg.parameters)
        if cfg.charge_keyword:
            if cfg.charge_keyword in params:
                log.info(
                    "engine.parameters.%s is replaced by the step's charge %+d",
                    cfg.charge_keyword,
                    context.charge,
                )
            params[cfg.charge_keyword] = int(context.charge)
        txt = str(Path(workdir).resolve() / CALC_LOG)
        keywords = _keywords(factory)
        if "txt" in params or keywords is None:
            calc = self._build(factory, params)
        elif "txt" in keywords[0]:
            calc = self._build(factory, params, txt=txt)
        elif keywords[1] and not isinstance(factory, type):
            # a factory showing only **kwargs: whether its product takes txt is known only from
            # the product's class; built again without txt when that class does not name it
            calc = self._build(factory, params, txt=txt, optional=True)
            product = None if calc is None else _keywords(type(calc))
            if product is None or "txt" not in product[0]:
                calc = self._build(factory, params)
        else:
            calc = self._build(factory, params)
        if not is_calculator(calc):
            raise ConfigError(
                f"engine.calculator: {cfg.calculator}(...) returned {type(calc).__name__}, not "
                "an ASE calculator (it has no get_potential_energy/get_forces); name a "
                "calculator class or a function returning a calculator"
            )
        if "directory" not in params and hasattr(calc, "directory"):
            try:
                calc.directory = str(Path(workdir).resolve())
            except (AttributeError, TypeError, ValueError):
                log.debug("%s does not take a directory", cfg.calculator)
        return calc

    def _build(
        self, factory, params: dict[str, Any], txt: str | None = None, optional: bool = False
    ):
        """``factory(**params)``, plus ``txt`` when given; a failure is a ConfigError naming
        ``engine.parameters``. With ``optional``, a TypeError naming ``txt`` returns None
        instead (the caller builds again without it)."""
        kwargs = params if txt is None else {**params, "txt": txt}
        try:
            return factory(**kwargs)
        except TypeError as err:
            if optional and "txt" in str(err):
                return None
            raise self._build_error(params, err) from None
        except Exception as err:  # a bad keyword or value, in whatever way the code reports it
            raise self._build_error(params, err) from None

    def _build_error(self, params: dict[str, Any], err: Exception) -> ConfigError:
        return ConfigError(
            f"engine.parameters: {self.cfg.calculator} cannot be built with "
            f"{sorted(params)} ({type(err).__name__}: {err})"
        )

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
            free_energy = _free_energy(calc, final)
        except (ConfigError, EngineOutputError):
            raise
        except Exception as err:
            if "convergence" in type(err).__name__.lower():  # e.g. GPAW's KohnShamConvergenceError
                raise ScfNotConverged(
                    f"{workdir}: the calculator {cfg.calculator} stopped: its SCF did not "
                    f"converge ({type(err).__name__}: {err})"
                ) from err
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
            free_energy=free_energy,
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
            # a calculator object is made fresh for each step: nothing carries over between steps
            guess="cold: the calculator's own initial guess",
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
        if cfg.potential is None:  # the config's: fails the same way on every try
            raise ConfigError(
                f"{workdir}: the calculator {cfg.calculator} offers no potential map "
                "(no get_electrostatic_potential()) and no 'engine.potential' file is "
                "configured; set engine.potential to the map file the calculator writes"
            )
        from ionwell.io.maps import read_potential

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
