"""Engine and launcher configuration: one pydantic model per engine kind.

``engine.kind`` selects the model (``pyscf`` when omitted): ``pyscf`` (embedded DFT),
``tblite`` (GFN2-xTB tight binding, in-process), ``ase`` (any ASE calculator by import path) and
``command`` (any external program, described entirely in the config). A ``command`` engine may
name a *definition* — a YAML file of engine settings found in ``engines/`` beside the campaign
config, in the folders of ``$IONWELL_ENGINES``, or among the definitions shipped with ionwell —
and override any of its keys; see :func:`ionwell.config.definitions.resolve_engines`. Once
merged, the engine records ``definition_merged: true`` and is complete: a frozen campaign
(``campaigns/<name>/campaign.yaml``) loads without the definition file.

The cell rule of the command engine (``cell``): a structure that is not periodic, or whose cell
is not full (fewer than three non-zero, independent vectors), is put in a box of its extent plus
``cell.box.vacuum`` Å on each side, atoms centred, pbc flags as the structure has them; this
happens on every step, so a host whose cell was never given (a flake) and every structure
handed on from it always reach the program with a cell. A periodic structure keeps its cell.
The program works in the box's frame; ionwell moves the map and the relaxed positions back to
the structure's own frame when it reads them.

Text templates (input files, argv items, writer parameters given as strings) use ``${name}``
placeholders (Python's :class:`string.Template`; ``$$`` is a literal dollar sign). Placeholders:
``structure`` (one ``Symbol x y z`` line per atom, Å, in the program's frame: inside the box
when the cell rule made one), ``cell`` (three lines of lattice vectors, Å, the box's or the
structure's own), ``box`` (``Lx Ly Lz``, Å: the cell's lengths, the same box as ``cell``),
``cell_a``, ``cell_b``, ``cell_c`` (each lattice vector as ``x y z``, Å, for templates that
give a skewed cell vector by vector), ``kpoint_mesh`` (``n1 n2 n3``: the k-point mesh for
the setting ``kpoint_spacing``, Å⁻¹ without 2π as ASE's ``kspacing``; ``1 1 1`` for a boxed
structure, along non-periodic axes, or when the definition has no such setting),
``boxed`` (``true`` when the cell rule made a box, else ``false``), ``natoms``, ``charge``,
``spin`` (2S), ``multiplicity`` (2S+1), ``unrestricted`` (``true`` when 2S > 0, else
``false``), ``step``, ``tasks``, ``threads``, ``input`` (the input file name), ``restart``
(``restart.value`` when restart files were found, else ``restart.fresh``), and each name of
``cell.placeholders`` (its ``box`` value for a boxed structure, else its ``periodic`` value).

Units: lengths Å, energies in the unit named beside each pattern (converted to eV at the reader
with ``ase.units``), potentials in the unit named for the map (converted to volts).
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    field_validator,
    model_validator,
)

__all__ = [
    "AseEngineConfig",
    "AufbauSpec",
    "CommandEngineConfig",
    "ConvergencePattern",
    "EngineConfig",
    "EnergyUnit",
    "InputSpec",
    "LauncherConfig",
    "OutputSpec",
    "PotentialGridConfig",
    "PotentialSpec",
    "PyscfEngineConfig",
    "RestartSpec",
    "SoftStopSpec",
    "BoxSpec",
    "CellSpec",
    "CellChoice",
    "VersionSpec",
    "TbliteEngineConfig",
    "ValueSpec",
    "ChargesSpec",
    "CountSpec",
    "StructureSpec",
    "ENERGY_UNITS",
    "POTENTIAL_UNITS",
    "MAP_BYTES_PER_POINT",
]


class _Model(BaseModel):
    # finite numbers only (as in ionwell.config.campaign): NaN and infinities are refused at load time
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _inside_engine_folder(path: str) -> str:
    """A file name or glob relative to the step's engine folder that stays inside it: not
    absolute, no ``~``, and no ``..`` leading above the folder (checked on the text, at load)."""
    import posixpath

    if not path.strip() or posixpath.normpath(path) == ".":
        raise ValueError(
            f"{path!r} names no file; expected a file name (or glob) inside the step's engine "
            "folder, e.g. 'pw.out'"
        )
    if path.startswith(("/", "~")):
        what = "an absolute path" if path.startswith("/") else "a path in a home folder"
        raise ValueError(
            f"{path!r} is {what}; expected a path relative to the step's engine folder, e.g. "
            "'pw.out' (ionwell reads and writes engine files only there)"
        )
    if posixpath.normpath(path).split("/")[0] == "..":
        raise ValueError(
            f"{path!r} leads out of the step's engine folder ('..' above it); expected a path "
            "inside the folder, e.g. 'pw.out' or 'out/pw.out'"
        )
    return path


#: A file name or glob inside the step's engine folder (see :func:`_inside_engine_folder`).
EnginePath = Annotated[str, AfterValidator(_inside_engine_folder)]


#: Energy units a pattern may name, and their size in eV (ase.units).
EnergyUnit = Literal["eV", "hartree", "rydberg", "kcal/mol", "kJ/mol"]


def _energy_units() -> dict[str, float]:
    from ase import units

    return {
        "eV": 1.0,
        "hartree": units.Hartree,
        "rydberg": units.Rydberg,
        "kcal/mol": units.kcal / units.mol,
        "kJ/mol": units.kJ / units.mol,
    }


ENERGY_UNITS = _energy_units()

#: Potential units a map may be stored in, and their size in volts (ase.units): the atomic unit
#: of potential is one hartree per elementary charge.
POTENTIAL_UNITS = {"V": 1.0, "hartree": ENERGY_UNITS["hartree"], "rydberg": ENERGY_UNITS["rydberg"]}


#: Working memory of a potential map per grid point, bytes: the point coordinates and the
#: map's float64 parts while the engine evaluates it (measured: 72 B per point for the pyscf
#: engine's map, 48 for tblite's), plus the placement's masks and filters on the same grid.
MAP_BYTES_PER_POINT = 96


class PotentialGridConfig(_Model):
    """Grid on which an in-process engine evaluates the electrostatic potential.

    The grid is the atoms' bounding box plus ``margin`` on every side at ``spacing``; its
    working memory is estimated (:data:`MAP_BYTES_PER_POINT` per point) and refused above
    ``max_memory`` before anything is computed: here for the smallest possible box (one atom),
    and against the host's own extent before a campaign is frozen."""

    spacing: float = Field(0.25, gt=0.02, le=2.0, description="grid spacing, Å")
    margin: float = Field(4.0, ge=0.0, le=20.0, description="box margin around the atoms, Å")
    max_memory: float = Field(
        8.0,
        gt=0.0,
        le=100000.0,
        description="ceiling of the potential map's estimated working memory, GiB (a grid "
        "needing more is refused before the campaign starts)",
    )

    def shape(self, extent: tuple[float, float, float]) -> tuple[int, int, int]:
        """Grid points per axis around atoms spanning ``extent`` (Å), as the engines build it."""
        n = [math.ceil((e + 2 * self.margin) / self.spacing - 1e-9) + 1 for e in extent]
        return (n[0], n[1], n[2])

    def memory_gib(self, extent: tuple[float, float, float]) -> float:
        """Estimated working memory of the map around atoms spanning ``extent`` (Å), GiB."""
        return math.prod(self.shape(extent)) * MAP_BYTES_PER_POINT / 2**30

    def memory_problem(self, extent: tuple[float, float, float], what: str) -> str | None:
        """Why a grid around ``what`` (spanning ``extent`` Å) is refused, or None when it fits."""
        need = self.memory_gib(extent)
        if need <= self.max_memory:
            return None
        fits = self.spacing
        while fits < 2.0 and self.model_copy(update={"spacing": fits}).memory_gib(extent) > (
            self.max_memory
        ):
            fits *= 1.05
        shape = "×".join(str(n) for n in self.shape(extent))
        hint = f"a spacing of {fits:.3f} Å would fit, " if fits < 2.0 else ""
        return (
            f"spacing {self.spacing:g} Å and margin {self.margin:g} Å around {what} make a grid "
            f"of {shape} points, about {need:,.1f} GiB of working memory, over max_memory "
            f"{self.max_memory:g} GiB; {hint}or raise max_memory if the machine has it"
        )

    @model_validator(mode="after")
    def _fits(self) -> PotentialGridConfig:
        problem = self.memory_problem((0.0, 0.0, 0.0), "a single atom")
        if problem:
            raise ValueError(problem)
        return self


class PyscfEngineConfig(_Model):
    """Embedded Kohn–Sham DFT through PySCF, in-process."""

    kind: Literal["pyscf"] = "pyscf"
    xc: str = Field("lda,vwn", description="exchange–correlation functional (PySCF name)")
    basis: str = Field("sto-3g", description="Gaussian basis set (PySCF name)")
    charge: int = Field(0, description="charge of the pristine host, e")
    max_cycle: int = Field(100, ge=1, le=10000, description="SCF iteration cap")
    conv_tol: float = Field(1e-8, gt=0.0, lt=1e-2, description="SCF energy tolerance, hartree")
    level_shift: float = Field(0.0, ge=0.0, description="SCF level shift, hartree")
    smearing: float = Field(
        0.0,
        ge=0.0,
        description="Fermi smearing width, eV (0: none; about 0.1 where guests give electrons to "
        "degenerate levels, see checks.level_order)",
    )
    # off by default: measured with bench/warm_start.py (benzene bilayer + 1-3 Li⁺, LDA and PBE,
    # STO-3G and 6-31G; Li with 0.1 eV smearing) the guess from the previous step's orbitals plus
    # the guests' atomic orbitals (right electron count and spin) saves no SCF iterations across
    # an insertion (median warm/cold 1.1 for Li⁺, 0.9-1.1 for smeared Li; with neutral atoms for
    # ions, the engine's choice now, 0.9 and 0.96 for Li⁺ on benzene and coronene): 3-5x closer to
    # the converged density, and even one Newton step on top of it (5-10x closer again) leaves
    # 7-9 DIIS cycles, since cycles follow the logarithm of the guess's error (and a new DIIS
    # run takes 4-5 even from a density 2e-6-5e-5 eV above the converged one). Geometry to
    # geometry within a relaxation (always on) it needs 0.24-0.52 of the cold iterations. A warm
    # SCF that needed the Newton solver or left an empty level below a filled one is checked
    # against a fresh one
    warm_start: bool = Field(
        False,
        description="start the SCF from the previous step's solution plus the new guests' atoms "
        "(ions as neutral atoms; measured: at most a few fewer SCF iterations, see "
        "bench/warm_start.py)",
    )
    density_fit: bool = Field(True, description="density-fit the Coulomb term (faster gradients)")
    grid_level: int | None = Field(
        None, ge=0, le=9, description="PySCF integration grid level, 0-9 (default: PySCF's, 3)"
    )
    threads: int | None = Field(None, ge=1, description="OpenMP threads (default: all)")
    potential_grid: PotentialGridConfig = PotentialGridConfig()
    potential_method: Literal["exact", "fitted"] = Field(
        "exact", description="exact integrals over grid blocks, or density-fitted shortlist"
    )


class TbliteEngineConfig(_Model):
    """GFN2-xTB (or GFN1-xTB) tight binding through the ``tblite`` library, in-process.

    Its potential map is built from the atomic charges (and dipoles where the method has them)
    and is an approximation of the electrostatic potential, labelled so wherever it is shown.
    """

    kind: Literal["tblite"] = "tblite"
    method: Literal["GFN2-xTB", "GFN1-xTB"] = "GFN2-xTB"
    charge: int = Field(0, description="charge of the pristine host, e")
    accuracy: float = Field(1.0, gt=0.0, le=1000.0, description="tblite accuracy factor")
    max_cycle: int = Field(250, ge=1, le=10000, description="SCC iteration cap")
    electronic_temperature: float = Field(
        300.0, ge=0.0, le=50000.0, description="Fermi smearing temperature, K"
    )
    threads: int | None = Field(None, ge=1, description="OpenMP threads (default: all)")
    potential_grid: PotentialGridConfig = PotentialGridConfig()


# ---------------------------------------------------------------------------------------------
# the command engine


class InputSpec(_Model):
    """How the external program's input file is written: an ASE writer, or a template."""

    file: EnginePath = Field("input", description="input file name in the engine folder")
    format: str | None = Field(None, description="ASE writer format name, e.g. 'nwchem-in'")
    parameters: dict[str, Any] = Field(
        default_factory=dict,
        description="keyword arguments of the ASE writer (strings may hold ${placeholders})",
    )
    template: str | None = Field(
        None, description="template file, relative to the config or definition file"
    )
    template_text: str | None = Field(
        None, description="the template's text (filled in from 'template' when the config loads)"
    )

    @model_validator(mode="after")
    def _one_way(self) -> InputSpec:
        has_template = self.template is not None or self.template_text is not None
        if (self.format is None) == (not has_template):
            raise ValueError("give exactly one of 'format' (an ASE writer) or 'template'")
        if has_template and self.parameters:
            raise ValueError("'parameters' belong to an ASE writer ('format'), not a template")
        return self


class ValueSpec(_Model):
    """A number read from an output file: an ASE reader, or a regex with one group."""

    file: EnginePath = Field(description="file (glob) in the engine folder")
    regex: str | None = Field(None, description="pattern with one group; the last match counts")
    reader: str | None = Field(None, description="ASE reader format name (energy from its calc)")
    unit: EnergyUnit = "eV"

    _re = field_validator("regex")(
        classmethod(lambda cls, v: v if v is None else _check_regex(v, groups=1))
    )

    @model_validator(mode="after")
    def _one_way(self) -> ValueSpec:
        if (self.regex is None) == (self.reader is None):
            raise ValueError("give exactly one of 'regex' or 'reader'")
        return self


class ChargesSpec(_Model):
    """Atomic charges: the last block of ``natoms`` matches of ``regex`` (group 1: charge, e).

    ``outputs.charges`` takes one of these or a list (one per scheme the program prints): the
    first is the step's ``charges``, all of them go into ``charge_sets`` by scheme name."""

    file: EnginePath
    regex: str
    scheme: str = Field(min_length=1, description="the charge scheme's name, e.g. 'mulliken'")

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class StructureSpec(_Model):
    """The relaxed structure written by the program, read with ASE (last frame)."""

    file: EnginePath
    format: str | None = Field(None, description="ASE format name (default: guessed)")


class PotentialSpec(_Model):
    """The potential map the program writes."""

    file: EnginePath = Field(description="file (glob) in the engine folder")
    format: Literal["auto", "cube", "npy", "npz", "xsf", "ase"] = Field(
        "auto", description="auto: by suffix; npy/npz need a JSON sidecar with the grid"
    )
    unit: Literal["V", "hartree", "rydberg"] | None = Field(
        None,
        description="unit of the stored values (hartree: atomic units, hartree/e); default: "
        "the file's (a sidecar's unit, hartree/e for a cube, else volts)",
    )
    sign: Literal["auto", "potential", "electron"] | None = Field(
        None,
        description="potential: as felt by a positive charge; electron: its negative; auto: "
        "detect; default: the sidecar's, else potential",
    )


class VersionSpec(_Model):
    """The program's version as it prints it: the last match of ``regex`` (one group) in
    ``file``. Recorded as the step's ``code_version``; when the file or the line is missing the
    static ``version`` is recorded instead, with a note."""

    file: EnginePath = Field(description="file (glob) in the engine folder, e.g. the program's log")
    regex: str = Field(description="pattern with one group; the last match counts (a string)")

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class CountSpec(_Model):
    """A count the program prints (e.g. its SCF iterations): the last match of ``regex`` (one
    group, an integer) in ``file``."""

    file: EnginePath = Field(description="file (glob) in the engine folder, e.g. the program's log")
    regex: str = Field(description="pattern with one group (an integer); the last match counts")

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class OutputSpec(_Model):
    """What the program writes and where ionwell reads it."""

    energy: ValueSpec
    forces: StructureSpec | None = Field(
        None, description="file an ASE reader gets forces (eV/Å) from; optional"
    )
    potential: PotentialSpec
    charges: ChargesSpec | list[ChargesSpec] | None = Field(
        None, description="atomic charges: one scheme, or a list (the first is the main one)"
    )
    scf_iterations: CountSpec | None = Field(
        None,
        description="SCF iteration count: the last match of a pattern with one group (an "
        "integer) in an output file",
    )
    fermi_level: ValueSpec | None = None
    homo: ValueSpec | None = None
    lumo: ValueSpec | None = None
    structure: StructureSpec | None = Field(None, description="relaxed structure; optional")
    version: VersionSpec | None = Field(
        None, description="the version line the program prints (default: the static 'version')"
    )

    @field_validator("charges")
    @classmethod
    def _schemes(cls, v: ChargesSpec | list[ChargesSpec] | None):
        if isinstance(v, list):
            if not v:
                raise ValueError("an empty list: give at least one charge scheme, or leave it out")
            names = [c.scheme for c in v]
            if len(set(names)) != len(names):
                raise ValueError(f"each charge scheme once, got {names}")
        return v

    @property
    def charge_specs(self) -> list[ChargesSpec]:
        """The charge schemes read, the main one first (empty when none)."""
        if self.charges is None:
            return []
        return self.charges if isinstance(self.charges, list) else [self.charges]


class ConvergencePattern(_Model):
    """A pattern whose presence proves convergence."""

    file: EnginePath
    regex: str

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=None)))


class AufbauSpec(_Model):
    """The gap between the highest filled and the lowest empty orbital that the program prints
    after its SCF, one line per spin channel (group 1: the gap; every match is checked).

    A ground state with whole occupations fills the lowest orbitals (the aufbau principle), so
    its gaps are not negative. A gap below ``-tolerance`` means an empty orbital lies below a
    filled one: the SCF stopped in an excited state, a saddle point of a direct minimisation
    (e.g. CP2K's OT after a restart from a poor wavefunction). Such a result counts as not
    converged, and a first try from restart files is repeated from the program's own guess.
    No matching line (e.g. a smeared run that prints no gap) means nothing to check."""

    file: EnginePath = Field(description="file (glob) in the engine folder, e.g. the program's log")
    regex: str = Field(description="pattern with one group, the gap; every match is checked")
    unit: EnergyUnit = "eV"
    tolerance: float = Field(
        0.5,
        ge=0,
        description="eV: gaps down to minus this pass (an open shell's near-degenerate levels "
        "may end slightly out of order)",
    )

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class ConvergenceSpec(_Model):
    scf: ConvergencePattern
    aufbau: AufbauSpec | None = Field(
        None,
        description="HOMO-LUMO gap lines: a negative gap (an empty orbital below a filled one) "
        "marks an excited state, counted as not converged",
    )
    scf_failed: ConvergencePattern | None = Field(
        None,
        description="pattern proving the program stopped because its SCF did not converge (it "
        "may then exit non-zero): the SCF remedies retry it instead of the step failing",
    )
    relax: ConvergencePattern | None = Field(
        None, description="pattern proving the program's own relaxation converged"
    )


class RestartSpec(_Model):
    """Restart files: carried over from a killed attempt of the same step, or from the previous
    step (warm start). When any is present, ``${restart}`` becomes ``value``.

    Files of the previous step are copied only when its structure had as many atoms as this
    one (restart files of another atom count are ignored by the codes, which start cold); else
    the start is cold, ``${restart}`` is ``fresh`` and the step's notes say why. A step records
    ``warm_started`` only when restart files were in place and, if ``used`` is given, the
    program's output proves it read them, and, if ``not_used`` is given, its output does not
    show that it started over from its own guess."""

    keep: list[EnginePath] = Field(
        default_factory=list, description="globs kept from an earlier, killed attempt of the step"
    )
    previous: list[EnginePath] = Field(
        default_factory=list, description="globs copied from the previous step's engine folder"
    )
    value: str = Field("restart", description="what ${restart} becomes when restarting")
    fresh: str = Field("", description="what ${restart} becomes otherwise")
    used: ConvergencePattern | None = Field(
        None,
        description="pattern in an output proving the program read the restart files "
        "(default: files in place count as used)",
    )
    not_used: ConvergencePattern | None = Field(
        None,
        description="pattern in an output showing the program did not use the restart files "
        "(e.g. it fell back to its own initial guess)",
    )


class SoftStopSpec(_Model):
    """The program's own documented way to stop cleanly, writing its restart files: files whose
    appearance in its working folder makes it stop (Quantum ESPRESSO ``<prefix>.EXIT``, CP2K
    ``EXIT``). ionwell creates them when the job is warned that its time limit is near
    (``resources.compute.stop_before``, :mod:`ionwell.engines.soft_stop`); the attempt then
    counts as not finished and the retry continues from ``restart.keep``."""

    files: list[str] = Field(
        min_length=1,
        description="file names created in the program's working folder to make it stop cleanly",
    )

    @field_validator("files")
    @classmethod
    def _plain_names(cls, v: list[str]) -> list[str]:
        for name in v:
            if not name or name.startswith("/") or ".." in name.split("/"):
                raise ValueError(
                    f"{name!r}: give a file name relative to the program's working folder"
                )
        return v


class BoxSpec(_Model):
    """The box given to a structure without a full periodic cell (see the module docstring)."""

    vacuum: float = Field(
        6.0, gt=0.0, le=100.0, description="vacuum on each side of the structure's extent, Å"
    )


class CellChoice(_Model):
    """A placeholder value for each outcome of the cell rule."""

    box: Any = Field(description="value for a structure put in a box (isolated)")
    periodic: Any = Field(description="value for a periodic structure keeping its own cell")


#: Placeholders the command engine fills itself; ``cell.placeholders`` may not reuse them.
BUILTIN_PLACEHOLDERS = frozenset(
    {
        "structure", "cell", "cell_a", "cell_b", "cell_c", "kpoint_mesh", "box", "boxed", "natoms", "charge", "spin", "multiplicity",
        "unrestricted", "step", "tasks", "threads", "input", "restart",
    }
)  # fmt: skip


class CellSpec(_Model):
    """How the command engine gives every structure a cell (see the module docstring).

    ``placeholders`` lets a definition say how its program treats the two cases, e.g. QE's
    ``assume_isolated`` (``{box: mt, periodic: none}``) or CP2K's ``PERIODIC``
    (``{box: NONE, periodic: XYZ}``); a writer parameter that is exactly ``"${name}"`` keeps the
    value's type (numbers, lists, null). A value may name one of the definition's ``settings``,
    e.g. QE's k-points ``kspacing: {box: null, periodic: "${kpoint_spacing}"}`` (Å⁻¹).
    """

    box: BoxSpec = BoxSpec()
    placeholders: dict[str, CellChoice] = Field(
        default_factory=dict,
        description="placeholder name -> {box: value, periodic: value}",
    )

    @field_validator("placeholders")
    @classmethod
    def _names(cls, v: dict[str, CellChoice]) -> dict[str, CellChoice]:
        import re

        for name in v:
            if not re.fullmatch(r"[A-Za-z_]\w*", name):
                raise ValueError(f"{name!r} is not a placeholder name (letters, digits, _)")
            if name in BUILTIN_PLACEHOLDERS:
                raise ValueError(f"{name!r} is a built-in placeholder; choose another name")
        return v


Setting = str | int | float | bool | None


def _setting_names(v: dict[str, Any], where: str) -> dict[str, Any]:
    import re

    for name in v:
        if not re.fullmatch(r"[A-Za-z_]\w*", name):
            raise ValueError(f"{where}: {name!r} is not a placeholder name (letters, digits, _)")
        if name in BUILTIN_PLACEHOLDERS:
            raise ValueError(f"{where}: {name!r} is a built-in placeholder; choose another name")
    return v


class ScfRemedySpec(_Model):
    """One SCF retry of an external program, in its own terms: new values of the definition's
    ``settings`` placeholders (e.g. more iterations, a smaller mixing factor, wider smearing)."""

    name: str = Field(min_length=1, description="what the retry changes, as recorded")
    settings: dict[str, Setting] = Field(
        min_length=1, description="placeholder name -> value for this retry"
    )


class AseScfRemedySpec(_Model):
    """One SCF retry of an ASE calculator: calculator keyword arguments to change."""

    name: str = Field(min_length=1, description="what the retry changes, as recorded")
    parameters: dict[str, Any] = Field(min_length=1, description="keyword arguments to change")


class CommandEngineConfig(_Model):
    """Any external electronic-structure program, described in the config (no Python needed)."""

    kind: Literal["command"] = "command"
    definition: str | None = Field(
        None, description="name of the engine definition this config was built from"
    )
    definition_merged: bool = Field(
        False,
        description="set by ionwell once the definition's settings are merged in: the mapping "
        "is complete and 'definition' is a record only, not looked up again (a frozen config)",
    )
    label: str = Field("command", description="the program's name, as recorded in the ledger")
    version: str = Field(
        "unknown",
        description="the program's version, recorded when outputs.version is not given or finds "
        "nothing",
    )
    charge: int = Field(0, description="charge of the pristine host, e")
    input: InputSpec
    argv: list[str] = Field(
        min_length=1, description="program and arguments (${placeholders} allowed; no shell)"
    )
    then: list[list[str]] = Field(
        default_factory=list,
        description="commands run after argv, in order (e.g. a post-processor writing the map)",
    )
    extra_inputs: dict[EnginePath, str] = Field(
        default_factory=dict,
        description="more input files: name -> text with ${placeholders} (e.g. for 'then')",
    )
    stdout: EnginePath | None = Field(
        "stdout.log", description="file receiving the program's output"
    )
    outputs: OutputSpec
    converged: ConvergenceSpec
    restart: RestartSpec = RestartSpec()
    soft_stop: SoftStopSpec | None = Field(
        None,
        description="files that make the program stop cleanly with its restart files written, "
        "created when the job is warned of its time limit (None: it runs until killed)",
    )
    cell: CellSpec = CellSpec()
    relaxes: bool = Field(
        False, description="the program relaxes the structure itself (outputs.structure)"
    )
    timeout: float | None = Field(None, gt=0.0, description="seconds before the run is killed")
    settings: dict[str, Setting] = Field(
        default_factory=dict,
        description="the definition's own placeholders (e.g. max_scf: 100, mixing: 0.4); "
        "'${name}' alone in a writer parameter keeps the value's type",
    )
    scf_remedies: list[ScfRemedySpec] = Field(
        default_factory=list,
        description="SCF retries at the same structure when the SCF did not converge, in order "
        "(each sets some of 'settings'); a site is never rejected for an SCF",
    )

    _names = field_validator("settings")(classmethod(lambda cls, v: _setting_names(v, "settings")))

    @model_validator(mode="after")
    def _remedies_known(self) -> CommandEngineConfig:
        for r in self.scf_remedies:
            unknown = sorted(set(r.settings) - set(self.settings))
            if unknown:
                raise ValueError(
                    f"scf_remedies '{r.name}': {', '.join(unknown)} not among 'settings' "
                    f"({', '.join(sorted(self.settings)) or 'none'}); a retry changes settings "
                    "the input uses"
                )
        return self


def _check_regex(pattern: str, groups: int | None) -> str:
    import re

    try:
        compiled = re.compile(pattern, re.MULTILINE)
    except re.error as err:
        raise ValueError(f"not a valid regular expression ({err}): {pattern!r}") from None
    if groups is not None and compiled.groups < groups:
        raise ValueError(f"the pattern needs {groups} capturing group(s): {pattern!r}")
    return pattern


class AseEngineConfig(_Model):
    """Any ASE calculator, named by import path (``package.module.ClassName``).

    The potential map comes from the calculator's ``get_electrostatic_potential()`` where it
    offers one, else from ``potential`` (a file the calculator writes in its folder).
    """

    kind: Literal["ase"] = "ase"
    calculator: str = Field(
        pattern=r"^[A-Za-z_][\w.]*\.[A-Za-z_]\w*$",
        description="import path of a calculator class, or of a function returning a calculator "
        "(e.g. ase.calculators.emt.EMT, gpaw.GPAW)",
    )
    parameters: dict[str, Any] = Field(
        default_factory=dict, description="keyword arguments of the calculator"
    )
    charge: int = Field(0, description="charge of the pristine host, e")
    charge_keyword: str | None = Field(
        None, description="calculator keyword that receives the system charge (None: not passed)"
    )
    scf_remedies: list[AseScfRemedySpec] = Field(
        default_factory=list,
        description="SCF retries at the same structure when the SCF did not converge, in order "
        "(each changes some calculator keyword arguments)",
    )
    potential: PotentialSpec | None = Field(
        None, description="potential map file written by the calculator, if it offers no method"
    )
    potential_sign: Literal["electron", "potential", "auto"] = Field(
        "electron",
        description="sign of an array from get_electrostatic_potential(): electron (ASE/GPAW: "
        "potential energy of an electron, eV), potential (felt by a positive charge, V), auto",
    )


# ---------------------------------------------------------------------------------------------
# launcher


class LauncherConfig(_Model):
    """How an external program is started on a machine (kept apart from the engine).

    ``local``: the argv as is; ``mpi``: ``mpi_prefix`` then the argv; ``srun``: ``srun_prefix``
    then the argv. ``modules`` are loaded by a login shell first (``module load``), ``env`` is
    added to the environment, and with ``scratch`` the program runs in a fresh folder there whose
    files are copied back to the step's engine folder afterwards (also after a failure).
    """

    kind: Literal["local", "mpi", "srun"] = "local"
    tasks: int = Field(1, ge=1, le=100000, description="MPI ranks")
    threads: int = Field(1, ge=1, le=1024, description="OpenMP threads per rank")
    mpi_prefix: list[str] = Field(
        default_factory=lambda: ["mpirun", "-np", "${tasks}"],
        description="argv prefix of the 'mpi' launcher",
    )
    srun_prefix: list[str] = Field(
        default_factory=lambda: ["srun", "--ntasks=${tasks}", "--cpus-per-task=${threads}"],
        description="argv prefix of the 'srun' launcher",
    )
    modules: list[str] = Field(default_factory=list, description="environment modules to load")
    env: dict[str, str] = Field(default_factory=dict, description="extra environment variables")
    scratch: str | None = Field(None, description="scratch folder (copy-back afterwards)")


EngineConfig = Annotated[
    PyscfEngineConfig | TbliteEngineConfig | AseEngineConfig | CommandEngineConfig,
    Field(discriminator="kind"),
]


def default_engine_kind(data: Any) -> Any:
    """A mapping without ``kind`` is a ``pyscf`` engine (the embedded default)."""
    if isinstance(data, dict) and "kind" not in data:
        return {**data, "kind": "pyscf"}
    return data
