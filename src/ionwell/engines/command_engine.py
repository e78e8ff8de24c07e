"""The ``command`` engine: any external electronic-structure program, described in the config.

:meth:`CommandEngine.prepare` writes the program's input (an ASE writer or a template) and any
extra input files, carries restart files over, and records what it did in ``command.json``;
:meth:`CommandEngine.launch` runs the program's ``argv`` (and any ``then`` commands) through
the launcher, which adds its prefix;
:meth:`CommandEngine.collect` reads energy, forces, potential map, charges, orbital levels and
the relaxed structure back, converting units at the edge (``ase.units``).

Cell rule (``cell``): a structure that is not periodic or has no full cell is computed in a box
of its extent plus ``cell.box.vacuum`` Å on each side, atoms centred (:func:`program_frame`), on
every step; a periodic structure keeps its cell. The program's input, ``${structure}``,
``${cell}`` and ``${box}`` are in the box's frame; the shift is recorded in ``command.json`` and
:meth:`CommandEngine.collect` moves the potential map and a relaxed structure back by it, so the
result is in the frame of the structure that came in (positions, map and the next step agree).

Restart files: globs in ``restart.keep`` found in the engine folder come from an earlier attempt
of the same step that was killed (walltime, node failure, SIGKILL); they are left in place and
``${restart}`` becomes ``restart.value``, so the program continues rather than starting over.
Otherwise globs in ``restart.previous`` are copied from the previous step's engine folder (warm
start), with the same effect — but only when the previous step's structure had the same number
of atoms: codes ignore restart files of another system and start cold, so then nothing is
copied, ``${restart}`` is ``restart.fresh`` and a note says why. ``warm_started`` in the result
is true only when restart files were in place, (with ``restart.used``) the output proves the
program read them and (with ``restart.not_used``) it does not say it started from its own guess
instead; ``guess`` (recorded in the ledger) says which restart files were used or why the start
was cold. Outputs of the earlier attempt are removed first, so nothing stale is ever
read.

Version: with ``outputs.version`` the recorded ``code_version`` is what the program printed (the
last match of the pattern); the static ``version`` is the fallback, with a note.

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

from ionwell.config.engines import (
    ENERGY_UNITS,
    AufbauSpec,
    CellSpec,
    ChargesSpec,
    CommandEngineConfig,
    CountSpec,
    LauncherConfig,
    StructureSpec,
    ValueSpec,
)
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.launcher import EngineRunError, ScfNotConverged, SoftStopped, fill, run_program
from ionwell.engines.results import CONTEXT, INPUT, read_inputs, write_inputs
from ionwell.errors import ConfigError, EngineOutputError, IonwellError
from ionwell.science.grid import Grid
from ionwell.store.campaign import atomic_write_json

__all__ = ["CommandEngine", "needs_box", "program_frame", "restart_in_place", "structure_block"]

log = logging.getLogger("ionwell.engines.command")

STATE = "command.json"

#: Fortran double-precision exponents (1.0D-03) are read as ordinary floats.
_FORTRAN_EXP = re.compile(r"(?<=[0-9.])[dD](?=[-+]?[0-9])")


def structure_block(atoms: Atoms) -> str:
    """One ``Symbol x y z`` line per atom (Å, 10 decimals)."""
    return "\n".join(
        f"{s:<3s} {x:16.10f} {y:16.10f} {z:16.10f}"
        for s, (x, y, z) in zip(atoms.get_chemical_symbols(), atoms.positions, strict=True)
    )


def needs_box(atoms: Atoms) -> bool:
    """True when ``atoms`` is not periodic along any axis, or its cell is not full (fewer than
    three non-zero, linearly independent vectors): the cell rule then gives it a box."""
    if not atoms.pbc.any():
        return True
    cell = np.asarray(atoms.cell, dtype=float)
    return atoms.cell.rank < 3 or abs(np.linalg.det(cell)) < 1e-6


def program_frame(atoms: Atoms, spec: CellSpec) -> tuple[Atoms, np.ndarray, bool]:
    """The structure as the program sees it, by the cell rule.

    Returns ``(atoms in the program's frame, shift, boxed)``: for a structure that
    :func:`needs_box`, an orthorhombic box whose edges are the extent along x, y, z plus
    ``spec.box.vacuum`` Å on each side, with the atoms' bounding box centred in it
    (positions + ``shift``, Å), pbc flags unchanged; otherwise a copy with its own cell and a
    zero shift. Deterministic, so the inputs and the placeholders agree.
    """
    symbols, pos = atoms.get_chemical_symbols(), np.asarray(atoms.positions, dtype=float)
    if not needs_box(atoms):
        a = Atoms(symbols, positions=pos, cell=atoms.cell, pbc=atoms.pbc)
        return a, np.zeros(3), False
    if len(atoms) == 0:
        lo = hi = np.zeros(3)
    else:
        lo, hi = pos.min(axis=0), pos.max(axis=0)
    lengths = hi - lo + 2.0 * spec.box.vacuum
    shift = lengths / 2.0 - (lo + hi) / 2.0
    if not atoms.pbc.any() and len(atoms) and np.any(np.asarray(atoms.cell).any(axis=1)):
        log.debug("non-periodic structure: its cell is replaced by the box (cell rule)")
    a = Atoms(symbols, positions=pos + shift, cell=np.diag(lengths), pbc=atoms.pbc)
    return a, shift, True


def kpoint_mesh(atoms: Atoms, boxed: bool, spacing: float | None) -> str:
    """The k-point mesh ``"n1 n2 n3"`` for a k-point spacing (Å⁻¹, no 2π: ASE's ``kspacing``
    convention, :func:`ase.io.espresso.kspacing_to_grid`, each count rounded up); 1 along a
    non-periodic axis, and ``"1 1 1"`` for a boxed structure or without a spacing."""
    if boxed or spacing is None:
        return "1 1 1"
    from ase.io.espresso import kspacing_to_grid

    mesh = [n if periodic else 1 for n, periodic in zip(
        kspacing_to_grid(atoms, float(spacing)), atoms.pbc, strict=True)]  # fmt: skip
    return " ".join(str(int(n)) for n in mesh)


def _cell_block(atoms: Atoms) -> str:
    return "\n".join(f"{a:16.10f} {b:16.10f} {c:16.10f}" for a, b, c in np.asarray(atoms.cell))


def _number(text: str) -> float:
    return float(_FORTRAN_EXP.sub("e", text.strip()))


def _atom_count(engine_dir: Path) -> int | None:
    """Number of atoms of the structure computed in an engine folder (its ``input.extxyz``),
    or None when it cannot be read."""
    f = Path(engine_dir) / INPUT
    try:
        with open(f) as fh:
            return int(fh.readline().split()[0])
    except (OSError, ValueError, IndexError):
        return None


def restart_in_place(workdir: Path) -> bool:
    """Whether the attempt prepared in ``workdir`` had restart files in place (``command.json``
    written by :meth:`CommandEngine.prepare`; False for another engine's folder)."""
    try:
        return json.loads((Path(workdir) / STATE).read_text()).get("restart") is not None
    except (OSError, ValueError):
        return False


class CommandEngine:
    """An external program run through the launcher (see the module docstring)."""

    external = True  # a separate program, started by launch() through the launcher

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
        specs = (o.forces, *o.charge_specs, o.scf_iterations, o.fermi_level, o.homo, o.lumo)
        for spec in (*specs, o.structure):
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
        """The placeholder values of one compute; ``atoms`` as they came in (the cell rule is
        applied here, see :func:`program_frame`)."""
        a, _, boxed = program_frame(atoms, self.cfg.cell)
        n_el = int(sum(a.numbers)) - context.charge
        spin = context.spin if context.spin is not None else n_el % 2
        builtin = {
            "structure": structure_block(a),
            "cell": _cell_block(a),
            "box": " ".join(f"{x:.6f}" for x in a.cell.lengths()),
            **{
                f"cell_{axis}": " ".join(f"{x:.6f}" for x in vector)
                for axis, vector in zip("abc", np.asarray(a.cell), strict=True)
            },
            "kpoint_mesh": kpoint_mesh(a, boxed, self.cfg.settings.get("kpoint_spacing")),
            "boxed": "true" if boxed else "false",
            "unrestricted": "true" if spin else "false",
            "natoms": len(a),
            "charge": context.charge,
            "spin": spin,
            "multiplicity": spin + 1,
            "step": context.step,
            "input": self.cfg.input.file,
            "restart": self.cfg.restart.value if restart else self.cfg.restart.fresh,
        }
        # a cell choice may name the definition's settings or the built-in values, e.g. QE's
        # k-point spacing: kspacing: {box: null, periodic: "${kpoint_spacing}"} (the value keeps
        # its type), or CP2K's k-point section with "${kpoint_mesh}"
        known = {**self.cfg.settings, **builtin}
        chosen = {
            name: self._typed(
                c.box if boxed else c.periodic, known, f"engine.cell.placeholders.{name}"
            )
            for name, c in self.cfg.cell.placeholders.items()
        }
        return {**self.cfg.settings, **chosen, **builtin}

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
        """Write the program's input (in the frame of the cell rule), carry restart files over
        (see the module docstring), remove stale outputs, record what was done in
        ``command.json``."""
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

        notes: list[str] = []
        restart_from = None
        cold = "cold: the program's own initial guess"
        if context.cold:
            for p in sorted(keep):
                if p.is_dir():
                    shutil.rmtree(p)
                else:
                    p.unlink(missing_ok=True)
            if keep:
                notes.append(
                    "cold start: the attempt from the restart files in place did not converge; "
                    f"they were removed ({', '.join(sorted(p.name for p in keep))})"
                )
                log.info("%s%s", where, notes[-1])
            keep = set()
            cold = "cold: an attempt from restart files did not converge"
        if keep:
            restart_from = "earlier attempt"
            log.info(
                "%srestart files from an earlier attempt: %s",
                where,
                ", ".join(sorted(p.name for p in keep)),
            )
        elif context.previous is not None and cfg.restart.previous:
            previous = Path(context.previous)
            n_prev = _atom_count(previous)
            if n_prev != len(atoms):
                had = "an unreadable structure" if n_prev is None else f"{n_prev} atoms"
                notes.append(
                    f"cold start: the previous step ({previous}) had {had}, this one "
                    f"{len(atoms)}; its restart files were not copied (a code ignores restart "
                    "files of another system)"
                )
                log.info("%s%s", where, notes[-1])
                cold = f"cold: the previous step had {had}, this one {len(atoms)}"
            else:
                copied = self._copy_previous(previous, workdir)
                if copied:
                    restart_from = "previous step"
                    log.info("%swarm start from the previous step: %s", where, ", ".join(copied))

        write_inputs(atoms, workdir, context, keep_cell=True)
        a, shift, boxed = program_frame(atoms, cfg.cell)
        values = self.values(atoms, context, restart_from is not None)
        target = workdir / cfg.input.file
        # sub-folders of the engine folder that written files go to (the config keeps them inside)
        for name in (cfg.input.file, *cfg.extra_inputs, *([cfg.stdout] if cfg.stdout else [])):
            (workdir / name).parent.mkdir(parents=True, exist_ok=True)
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
        state = {
            "restart": restart_from,
            "cold": cold,
            "values": {k: values[k] for k in ("charge", "spin")},
            "frame": {
                "boxed": boxed,
                "shift": [float(x) for x in shift],
                "cell": np.asarray(a.cell, dtype=float).tolist(),
            },
            "notes": notes,
        }
        atomic_write_json(workdir / STATE, state)

    def _copy_previous(self, previous: Path, workdir: Path) -> list[str]:
        """Copy the ``restart.previous`` files of ``previous`` into ``workdir``; their names."""
        copied = []
        for g in self.cfg.restart.previous:
            for p in self._matches(previous, g):
                if p.is_file():
                    target = workdir / p.relative_to(previous)
                    target.parent.mkdir(parents=True, exist_ok=True)
                    shutil.copy2(p, target)
                    copied.append(p.name)
        return copied

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

        The program (``argv``) gets the definition's ``soft_stop`` files when the job is warned
        of its time limit (:mod:`ionwell.engines.soft_stop`); the ``then`` commands are short
        and run to their end.

        Raises:
            SoftStopped: the program stopped on its soft-stop files (the attempt is not
                finished; whatever its output says, it is neither a result nor an SCF failure).
            EngineRunError: a command could not start, timed out, was killed or failed.
        """
        workdir = Path(workdir)
        values = self.placeholder_values(workdir)
        step = json.loads((workdir / CONTEXT).read_text()).get("step")
        seconds = 0.0
        stop_files = self.cfg.soft_stop.files if self.cfg.soft_stop is not None else []
        for i, argv in enumerate(self.commands()):
            stdout = self.cfg.stdout if i == 0 else f"then-{i}.log"
            try:
                seconds += run_program(
                    argv,
                    workdir,
                    launcher,
                    stdout=stdout,
                    timeout=self.cfg.timeout,
                    step=step,
                    values=values,
                    soft_stop_files=stop_files if i == 0 else (),
                )
            except SoftStopped:
                raise
            except EngineRunError as err:
                failed = self.cfg.converged.scf_failed
                if i == 0 and failed is not None and self._says(workdir, failed):
                    raise ScfNotConverged(
                        f"step {step}: {argv[0]} stopped: its SCF did not converge ({err})",
                        warm=restart_in_place(workdir),
                    ) from None
                raise
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

    def _version(self, workdir: Path) -> tuple[str, str | None]:
        """The version the program printed (``outputs.version``), else the static ``version``
        and a note saying why; never raises."""
        spec = self.cfg.outputs.version
        if spec is None:
            return self.cfg.version, None
        found = [p for p in self._matches(workdir, spec.file) if p.is_file()]
        if not found:
            return self.cfg.version, (
                f"{spec.file}: missing, version {self.cfg.version!r} recorded from the config"
            )
        text = found[-1].read_text(errors="replace")
        hits = re.findall(spec.regex, text, flags=re.MULTILINE)
        if not hits:
            return self.cfg.version, (
                f"{found[-1].name}: no line matching {spec.regex!r}, version "
                f"{self.cfg.version!r} recorded from the config"
            )
        last = str(hits[-1][0] if isinstance(hits[-1], tuple) else hits[-1]).strip()
        if not last:
            return self.cfg.version, (
                f"{found[-1].name}: the version line is there but names no version, version "
                f"{self.cfg.version!r} recorded from the config"
            )
        return last, None

    def _charges(self, workdir: Path, spec: ChargesSpec, n: int, where: str) -> list[float]:
        """The last ``n`` charges (e) matching ``spec`` in its file, one per atom."""
        path, text = self._text(workdir, spec.file, f"{spec.scheme} charges")
        found = re.findall(spec.regex, text, flags=re.MULTILINE)
        found = [f[0] if isinstance(f, tuple) else f for f in found]
        if len(found) < n:
            raise EngineOutputError(
                f"{where}{path}: {len(found)} lines match the {spec.scheme} charge pattern, "
                f"expected at least {n} (one per atom)"
            )
        try:
            charges = [_number(x) for x in found[-n:]]
        except ValueError as err:
            raise EngineOutputError(
                f"{where}{path}: unreadable {spec.scheme} charge ({err})"
            ) from None
        if not all(math.isfinite(q) for q in charges):
            raise EngineOutputError(f"{where}{path}: non-finite {spec.scheme} charges")
        return charges

    def _count(self, workdir: Path, spec: CountSpec, what: str) -> int | None:
        """The last integer matching ``spec`` (None, logged, when the line is missing)."""
        path, text = self._text(workdir, spec.file, what)
        found = re.findall(spec.regex, text, flags=re.MULTILINE)
        if not found:
            log.info("%s: no line matching %r (%s not recorded)", path, spec.regex, what)
            return None
        try:
            return int(found[-1])
        except ValueError:
            raise EngineOutputError(
                f"{self._step(workdir)}{path}: {what} {found[-1]!r} is not an integer"
            ) from None

    def _aufbau(self, workdir: Path, spec: AufbauSpec) -> str | None:
        """Why the converged SCF is an excited state (a gap below ``-spec.tolerance`` eV), or
        None when every printed gap passes or none is printed."""
        path, text = self._text(workdir, spec.file, "the HOMO-LUMO gap")
        try:
            gaps = [
                _number(g) * ENERGY_UNITS[spec.unit]
                for g in re.findall(spec.regex, text, flags=re.MULTILINE)
            ]
        except ValueError as err:
            raise EngineOutputError(
                f"{self._step(workdir)}{path}: unreadable HOMO-LUMO gap ({err})"
            ) from None
        if not gaps:
            log.info("%s: no line matching %r (aufbau not checked)", path, spec.regex)
            return None
        gap = min(gaps)
        if gap >= -spec.tolerance:
            return None
        return (
            f"{path.name}: HOMO-LUMO gap {gap:.2f} eV, an empty orbital below a filled one (more "
            f"than {spec.tolerance:g} eV): the SCF stopped in an excited state, a saddle point of "
            "its minimisation, not the ground state; counted as not converged"
        )

    def _says(self, workdir: Path, pattern) -> bool:
        """Whether an output file matches ``pattern`` (False when the file is missing)."""
        try:
            return self._found(workdir, pattern, "")[0]
        except EngineOutputError:
            return False

    def _found(self, workdir: Path, pattern, what: str) -> tuple[bool, str | None]:
        path, text = self._text(workdir, pattern.file, what)
        if re.search(pattern.regex, text, flags=re.MULTILINE):
            return True, None
        return False, f"{path.name}: no line matching {pattern.regex!r} ({what} not proven)"

    def collect(self, workdir: Path) -> tuple[StepResult, Grid | None]:
        """Read the program's outputs (see the module docstring for the errors raised)."""
        from ionwell.io.maps import read_potential

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
        frame = state.get("frame") or {}
        shift = np.asarray(frame.get("shift", [0.0, 0.0, 0.0]), dtype=float)
        notes: list[str] = list(state.get("notes", []))
        scf_ok, note = self._found(workdir, cfg.converged.scf, "SCF convergence")
        if note:
            notes.append(note)
        if scf_ok and cfg.converged.aufbau is not None:
            note = self._aufbau(workdir, cfg.converged.aufbau)
            if note:
                scf_ok = False
                notes.append(note)
                log.warning("%s%s", where, note)
        energy = self._value(workdir, out.energy, "the total energy")

        relax_ok: bool | None = None
        final = atoms
        if cfg.relaxes and out.structure is not None:
            relaxed = self._structure(workdir, out.structure, n, "the relaxed structure")
            final = Atoms(
                relaxed.get_chemical_symbols(),
                positions=relaxed.positions - shift,  # back from the program's frame
                cell=atoms.cell,
                pbc=atoms.pbc,
            )
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

        charge_sets = {
            spec.scheme: self._charges(workdir, spec, n, where) for spec in out.charge_specs
        }
        main = out.charge_specs[0].scheme if out.charge_specs else None
        iterations = None
        if out.scf_iterations is not None:
            iterations = self._count(workdir, out.scf_iterations, "the SCF iteration count")

        levels = {}
        for key in ("fermi_level", "homo", "lumo"):
            spec = getattr(out, key)
            if spec is not None:
                levels[key] = self._value(workdir, spec, key.replace("_", " "))

        grid = None
        if ctx.potential:
            pot_path = self._one_file(workdir, out.potential.file, "the potential map")
            # the map is in the program's frame: read it with the structure in that frame (for
            # 'sign: auto'), then move it back to the frame of the structure that came in
            in_frame = final.copy()
            in_frame.positions = final.positions + shift
            grid = read_potential(pot_path, out.potential, in_frame, ctx.step)
            if shift.any():
                grid = Grid(
                    origin=np.asarray(grid.origin, dtype=float) - shift,
                    axes=grid.axes,
                    values=grid.values,
                    pbc=grid.pbc,
                )

        version, note = self._version(workdir)
        if note:
            notes.append(note)
        warm = state.get("restart") is not None
        if warm and cfg.restart.used is not None:
            warm, note = self._found(workdir, cfg.restart.used, "use of the restart files")
            if note:
                notes.append(note)
        if warm and cfg.restart.not_used is not None and self._says(workdir, cfg.restart.not_used):
            warm = False
            notes.append(
                f"{cfg.restart.not_used.file}: the program says it did not use the restart files "
                f"(a line matches {cfg.restart.not_used.regex!r}); not a warm start"
            )

        if warm:
            guess = f"restart files of the {state['restart']}"
        elif state.get("restart") is not None:
            guess = "cold: the program did not use the restart files in place"
        else:
            guess = state.get("cold") or "cold: the program's own initial guess"
        result = StepResult(
            energy=energy,
            forces=forces,
            scf_converged=scf_ok,
            scf_iterations=iterations,
            relax_converged=relax_ok,
            symbols=final.get_chemical_symbols(),
            positions=np.asarray(final.positions, dtype=float).tolist(),
            cell=np.asarray(atoms.cell).tolist() if atoms.pbc.any() else None,
            pbc=[bool(x) for x in atoms.pbc],
            charge=ctx.charge,
            spin=int(state.get("values", {}).get("spin", 0)),
            charges=charge_sets[main] if main else None,
            charge_scheme=main,
            charge_sets=charge_sets or None,
            code=cfg.label,
            code_version=version,
            wall_time=float(state.get("seconds", 0.0)),
            warm_started=warm,
            guess=guess,
            notes=notes,
            **levels,
        )
        return result, grid
