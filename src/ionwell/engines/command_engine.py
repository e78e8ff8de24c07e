"""The ``command`` engine: any external electronic-structure program, described in the config.

:meth:`CommandEngine.prepare` writes the program's input (an ASE writer or a template) and any
extra input files, carries restart files over, and records what it did in ``command.json``;
:meth:`CommandEngine.argv` is the program's argv (the launcher adds its prefix);
:meth:`CommandEngine.collect` reads energy, forces, potential map, charges, orbital levels and
the relaxed structure back, converting units at the edge (``ase.units``).

Restart files: globs in ``restart.keep`` found in the engine folder come from an earlier attempt
of the same step that was killed (walltime, node failure, SIGKILL); they are left in place and
``${restart}`` becomes ``restart.value``, so the program continues rather than starting over.
Otherwise globs in ``restart.previous`` are copied from the previous step's engine folder (warm
start), with the same effect. Outputs of the earlier attempt are removed first, so nothing stale
is ever read.

Errors: a missing, empty, truncated or non-finite output raises :class:`EngineOutputError` with
one message naming the step, the file and what was expected. A missing convergence line is not
an error but a finding: ``scf_converged`` is false and the note says which file and pattern.
"""

from __future__ import annotations

import glob
import json
import logging
import math
import re
import shutil
from pathlib import Path
from typing import Any

import numpy as np
from ase import Atoms
from ase.io import read, write

from ionwell.campaign import atomic_write_json
from ionwell.engine_config import (
    ENERGY_UNITS,
    CommandEngineConfig,
    LauncherConfig,
    StructureSpec,
    ValueSpec,
)
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.results import CONTEXT, INPUT, read_inputs, write_inputs
from ionwell.errors import ConfigError, EngineOutputError, IonwellError
from ionwell.grid import Grid
from ionwell.launcher import fill, run_program

__all__ = ["CommandEngine", "structure_block"]

log = logging.getLogger("ionwell.engines.command")

STATE = "command.json"

#: Vacuum (Å) on each side of a non-periodic structure in the ``${box}`` placeholder.
VACUUM = 8.0

#: Fortran double-precision exponents (1.0D-03) are read as ordinary floats.
_FORTRAN_EXP = re.compile(r"(?<=[0-9.])[dD](?=[-+]?[0-9])")


def structure_block(atoms: Atoms) -> str:
    """One ``Symbol x y z`` line per atom (Å, 10 decimals)."""
    return "\n".join(
        f"{s:<3s} {x:16.10f} {y:16.10f} {z:16.10f}"
        for s, (x, y, z) in zip(atoms.get_chemical_symbols(), atoms.positions, strict=True)
    )


def _cell_block(atoms: Atoms) -> str:
    return "\n".join(f"{a:16.10f} {b:16.10f} {c:16.10f}" for a, b, c in np.asarray(atoms.cell))


def _number(text: str) -> float:
    return float(_FORTRAN_EXP.sub("e", text.strip()))


class CommandEngine:
    """An external program run through the launcher (see the module docstring)."""

    def __init__(self, engine_config: CommandEngineConfig, relax: Any = None) -> None:
        self.cfg = engine_config
        self.relax = relax
        self.name = engine_config.label

    # -- helpers ----------------------------------------------------------------------------

    def _step(self, workdir: Path) -> str:
        try:
            ctx = ComputeContext.model_validate_json((Path(workdir) / CONTEXT).read_text())
            return f"step {ctx.step}: "
        except (OSError, ValueError):
            return ""

    def _output_globs(self) -> list[str]:
        o = self.cfg.outputs
        globs = [o.energy.file, o.potential.file]
        for spec in (o.forces, o.charges, o.fermi_level, o.homo, o.lumo, o.structure):
            if spec is not None:
                globs.append(spec.file)
        globs.append(self.cfg.converged.scf.file)
        if self.cfg.converged.relax is not None:
            globs.append(self.cfg.converged.relax.file)
        if self.cfg.stdout:
            globs.append(self.cfg.stdout)
        return globs

    @staticmethod
    def _matches(workdir: Path, pattern: str) -> list[Path]:
        return sorted(Path(p) for p in glob.glob(str(workdir / pattern), recursive=True))

    def values(self, atoms: Atoms, context: ComputeContext, restart: bool) -> dict[str, Any]:
        """The placeholder values of one compute."""
        n_el = int(sum(atoms.numbers)) - context.charge
        spin = context.spin if context.spin is not None else n_el % 2
        if atoms.pbc.any():
            box = atoms.cell.lengths()
        else:
            box = np.ptp(atoms.positions, axis=0) + 2 * VACUUM
        return {
            "structure": structure_block(atoms),
            "cell": _cell_block(atoms),
            "box": " ".join(f"{x:.6f}" for x in box),
            "unrestricted": "true" if spin else "false",
            "natoms": len(atoms),
            "charge": context.charge,
            "spin": spin,
            "multiplicity": spin + 1,
            "step": context.step,
            "input": self.cfg.input.file,
            "restart": self.cfg.restart.value if restart else self.cfg.restart.fresh,
        }

    def _typed(self, value: Any, values: dict[str, Any], where: str) -> Any:
        """Fill placeholders in writer parameters; ``"${name}"`` alone keeps its type."""
        if isinstance(value, str):
            m = re.fullmatch(r"\$\{(\w+)\}", value)
            if m and m.group(1) in values:
                return values[m.group(1)]
            return fill(value, values, where)
        if isinstance(value, dict):
            return {k: self._typed(v, values, f"{where}.{k}") for k, v in value.items()}
        if isinstance(value, list):
            return [self._typed(v, values, where) for v in value]
        return value

    # -- contract ---------------------------------------------------------------------------

    def prepare(self, atoms: Atoms, workdir: Path, context: ComputeContext) -> None:
        """Write the program's input, carry restart files over, remove stale outputs."""
        workdir = Path(workdir)
        workdir.mkdir(parents=True, exist_ok=True)
        cfg = self.cfg
        where = f"step {context.step}: "
        keep = {p for g in cfg.restart.keep for p in self._matches(workdir, g)}
        for g in self._output_globs():
            for p in self._matches(workdir, g):
                if p not in keep and p.is_file():
                    p.unlink()
        (workdir / STATE).unlink(missing_ok=True)

        restart_from = None
        if keep:
            restart_from = "earlier attempt"
            log.info(
                "%srestart files from an earlier attempt: %s",
                where,
                ", ".join(sorted(p.name for p in keep)),
            )
        elif context.previous is not None and cfg.restart.previous:
            copied = []
            for g in cfg.restart.previous:
                for p in self._matches(Path(context.previous), g):
                    if p.is_file():
                        target = workdir / p.relative_to(context.previous)
                        target.parent.mkdir(parents=True, exist_ok=True)
                        shutil.copy2(p, target)
                        copied.append(p.name)
            if copied:
                restart_from = "previous step"
                log.info("%swarm start from the previous step: %s", where, ", ".join(copied))

        write_inputs(atoms, workdir, context, keep_cell=True)
        a = Atoms(
            atoms.get_chemical_symbols(), positions=atoms.positions, cell=atoms.cell, pbc=atoms.pbc
        )
        values = self.values(a, context, restart_from is not None)
        target = workdir / cfg.input.file
        if cfg.input.format is not None:
            params = self._typed(dict(cfg.input.parameters), values, "engine.input.parameters")
            try:
                write(target, a, format=cfg.input.format, **params)
            except (TypeError, ValueError, KeyError) as err:
                raise ConfigError(
                    f"engine.input: the ASE writer {cfg.input.format!r} refused the structure or "
                    f"the parameters ({type(err).__name__}: {err})"
                ) from None
        else:
            text = cfg.input.template_text
            if text is None:
                raise ConfigError(
                    f"engine.input.template: {cfg.input.template} was not read (load the "
                    "campaign config through ionwell so templates are resolved)"
                )
            target.write_text(fill(text, values, "engine.input.template"))
        for name, text in cfg.extra_inputs.items():
            (workdir / name).write_text(fill(text, values, f"engine.extra_inputs.{name}"))
        state = {"restart": restart_from, "values": {k: values[k] for k in ("charge", "spin")}}
        atomic_write_json(workdir / STATE, state)

    def argv(self, workdir: Path, launcher: object | None = None) -> list[str] | None:
        """The program's argv as configured; its placeholders are filled by the launcher
        (:meth:`launch`), which also adds the launcher's prefix."""
        return list(self.cfg.argv)

    def commands(self) -> list[list[str]]:
        """Every command of the compute, in order: ``argv``, then each of ``then``."""
        return [list(self.cfg.argv)] + [list(c) for c in self.cfg.then]

    def placeholder_values(self, workdir: Path) -> dict[str, Any]:
        """The placeholder values recorded by :meth:`prepare` (for the launcher)."""
        workdir = Path(workdir)
        atoms, ctx = read_inputs(workdir)
        state = json.loads((workdir / STATE).read_text())
        return self.values(atoms, ctx, state.get("restart") is not None)

    def run(self, workdir: Path) -> None:
        raise IonwellError("the command engine runs through a launcher, not in-process")

    def launch(self, workdir: Path, launcher: LauncherConfig) -> float:
        """Run every command through ``launcher`` in ``workdir``; returns the seconds taken.

        Raises:
            EngineRunError: a command could not start, timed out, was killed or failed.
        """
        workdir = Path(workdir)
        values = self.placeholder_values(workdir)
        step = json.loads((workdir / CONTEXT).read_text()).get("step")
        seconds = 0.0
        for i, argv in enumerate(self.commands()):
            stdout = self.cfg.stdout if i == 0 else f"then-{i}.log"
            seconds += run_program(
                argv,
                workdir,
                launcher,
                stdout=stdout,
                timeout=self.cfg.timeout,
                step=step,
                values=values,
            )
        state = json.loads((workdir / STATE).read_text())
        state["seconds"] = round(seconds, 3)
        atomic_write_json(workdir / STATE, state)
        return seconds

    # -- reading ------------------------------------------------------------------------------

    def _one_file(self, workdir: Path, pattern: str, what: str) -> Path:
        where = self._step(workdir)
        found = [p for p in self._matches(workdir, pattern) if p.is_file()]
        if not found:
            raise EngineOutputError(f"{where}{workdir / pattern}: missing (expected {what})")
        path = found[-1]
        if path.stat().st_size == 0:
            raise EngineOutputError(f"{where}{path}: empty (expected {what})")
        return path

    def _text(self, workdir: Path, pattern: str, what: str) -> tuple[Path, str]:
        path = self._one_file(workdir, pattern, what)
        return path, path.read_text(errors="replace")

    def _value(self, workdir: Path, spec: ValueSpec, what: str) -> float:
        where = self._step(workdir)
        if spec.reader is not None:
            path = self._one_file(workdir, spec.file, what)
            try:
                atoms = read(path, format=spec.reader, index=-1)
                value = float(atoms.get_potential_energy())
            except Exception as err:  # ASE readers raise many kinds of errors
                raise EngineOutputError(
                    f"{where}{path}: the ASE reader {spec.reader!r} found no {what} "
                    f"({type(err).__name__}: {err})"
                ) from None
            unit = 1.0  # ASE readers return eV
        else:
            path, text = self._text(workdir, spec.file, what)
            found = re.findall(spec.regex, text, flags=re.MULTILINE)
            if not found:
                raise EngineOutputError(
                    f"{where}{path}: no line matching {spec.regex!r} (expected {what})"
                )
            last = found[-1]
            last = last[0] if isinstance(last, tuple) else last
            try:
                value = _number(last)
            except ValueError:
                raise EngineOutputError(
                    f"{where}{path}: {last!r} is not a number (expected {what})"
                ) from None
            unit = ENERGY_UNITS[spec.unit]
        if not math.isfinite(value):
            raise EngineOutputError(f"{where}{path}: {what} is {value} (expected a finite number)")
        return value * unit

    def _structure(self, workdir: Path, spec: StructureSpec, n: int, what: str) -> Atoms:
        where = self._step(workdir)
        path = self._one_file(workdir, spec.file, what)
        try:
            atoms = read(path, format=spec.format, index=-1)
        except Exception as err:  # ASE readers raise many kinds of errors
            raise EngineOutputError(
                f"{where}{path}: cannot read {what} ({type(err).__name__}: {err})"
            ) from None
        if len(atoms) != n:
            raise EngineOutputError(f"{where}{path}: {len(atoms)} atoms, expected {n} ({what})")
        if not np.isfinite(atoms.positions).all():
            raise EngineOutputError(f"{where}{path}: non-finite positions ({what})")
        return atoms

    def _found(self, workdir: Path, pattern, what: str) -> tuple[bool, str | None]:
        path, text = self._text(workdir, pattern.file, what)
        if re.search(pattern.regex, text, flags=re.MULTILINE):
            return True, None
        return False, f"{path.name}: no line matching {pattern.regex!r} ({what} not proven)"

    def collect(self, workdir: Path) -> tuple[StepResult, Grid | None]:
        """Read the program's outputs (see the module docstring for the errors raised)."""
        from ionwell.volumetric import read_potential

        workdir = Path(workdir)
        where = self._step(workdir)
        cfg, out = self.cfg, self.cfg.outputs
        try:
            atoms = read(workdir / INPUT)
            ctx = ComputeContext.model_validate_json((workdir / CONTEXT).read_text())
            state = json.loads((workdir / STATE).read_text())
        except (OSError, ValueError) as err:
            raise EngineOutputError(
                f"{where}{workdir}: the inputs written by prepare() are unreadable ({err})"
            ) from None
        n = len(atoms)
        notes: list[str] = []
        scf_ok, note = self._found(workdir, cfg.converged.scf, "SCF convergence")
        if note:
            notes.append(note)
        energy = self._value(workdir, out.energy, "the total energy")

        relax_ok: bool | None = None
        final = atoms
        if cfg.relaxes and out.structure is not None:
            final = self._structure(workdir, out.structure, n, "the relaxed structure")
            if cfg.converged.relax is not None:
                relax_ok, note = self._found(workdir, cfg.converged.relax, "relaxation")
                if note:
                    notes.append(note)
        forces = None
        if out.forces is not None:
            fa = self._structure(workdir, out.forces, n, "forces")
            try:
                f = np.asarray(fa.get_forces(), dtype=float)
            except Exception as err:  # no calculator results in the file
                raise EngineOutputError(
                    f"{where}{out.forces.file}: no forces in the file ({type(err).__name__})"
                ) from None
            if not np.isfinite(f).all():
                raise EngineOutputError(f"{where}{out.forces.file}: forces hold non-finite values")
            forces = f.tolist()

        charges = None
        if out.charges is not None:
            path, text = self._text(workdir, out.charges.file, "atomic charges")
            found = re.findall(out.charges.regex, text, flags=re.MULTILINE)
            found = [f[0] if isinstance(f, tuple) else f for f in found]
            if len(found) < n:
                raise EngineOutputError(
                    f"{where}{path}: {len(found)} lines match the charge pattern, expected at "
                    f"least {n} (one per atom)"
                )
            try:
                charges = [_number(x) for x in found[-n:]]
            except ValueError as err:
                raise EngineOutputError(f"{where}{path}: unreadable charge ({err})") from None
            if not all(math.isfinite(q) for q in charges):
                raise EngineOutputError(f"{where}{path}: non-finite atomic charges")

        levels = {}
        for key in ("fermi_level", "homo", "lumo"):
            spec = getattr(out, key)
            if spec is not None:
                levels[key] = self._value(workdir, spec, key.replace("_", " "))

        grid = None
        if ctx.potential:
            pot_path = self._one_file(workdir, out.potential.file, "the potential map")
            grid = read_potential(pot_path, out.potential, final, ctx.step)

        result = StepResult(
            energy=energy,
            forces=forces,
            scf_converged=scf_ok,
            relax_converged=relax_ok,
            symbols=final.get_chemical_symbols(),
            positions=np.asarray(final.positions, dtype=float).tolist(),
            cell=np.asarray(atoms.cell).tolist() if atoms.pbc.any() else None,
            pbc=[bool(x) for x in atoms.pbc],
            charge=ctx.charge,
            spin=int(state.get("values", {}).get("spin", 0)),
            charges=charges,
            charge_scheme=out.charges.scheme if out.charges is not None else None,
            code=cfg.label,
            code_version=cfg.version,
            wall_time=float(state.get("seconds", 0.0)),
            warm_started=state.get("restart") is not None,
            notes=notes,
            **levels,
        )
        return result, grid
