"""Engine and launcher configuration: one pydantic model per engine kind.

``engine.kind`` selects the model (``pyscf`` when omitted): ``pyscf`` (embedded DFT),
``tblite`` (GFN2-xTB tight binding, in-process), ``ase`` (any ASE calculator by import path) and
``command`` (any external program, described entirely in the config). A ``command`` engine may
name a *definition* — a YAML file of engine settings found in ``engines/`` beside the campaign
config, in the folders of ``$IONWELL_ENGINES``, or among the definitions shipped with ionwell —
and override any of its keys; see :func:`ionwell.engine_definitions.resolve_engines`. Once
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
``boxed`` (``true`` when the cell rule made a box, else ``false``), ``natoms``, ``charge``,
``spin`` (2S), ``multiplicity`` (2S+1), ``unrestricted`` (``true`` when 2S > 0, else
``false``), ``step``, ``tasks``, ``threads``, ``input`` (the input file name), ``restart``
(``restart.value`` when restart files were found, else ``restart.fresh``), and each name of
``cell.placeholders`` (its ``box`` value for a boxed structure, else its ``periodic`` value).

Units: lengths Å, energies in the unit named beside each pattern (converted to eV at the reader
with ``ase.units``), potentials in the unit named for the map (converted to volts).
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = [
    "AseEngineConfig",
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
    "BoxSpec",
    "CellSpec",
    "CellChoice",
    "VersionSpec",
    "TbliteEngineConfig",
    "ValueSpec",
    "ChargesSpec",
    "StructureSpec",
    "ENERGY_UNITS",
    "POTENTIAL_UNITS",
]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


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


class PotentialGridConfig(_Model):
    """Grid on which an in-process engine evaluates the electrostatic potential."""

    spacing: float = Field(0.25, gt=0.02, le=2.0, description="grid spacing, Å")
    margin: float = Field(4.0, ge=0.0, le=20.0, description="box margin around the atoms, Å")


class PyscfEngineConfig(_Model):
    """Embedded Kohn–Sham DFT through PySCF, in-process."""

    kind: Literal["pyscf"] = "pyscf"
    xc: str = Field("lda,vwn", description="exchange–correlation functional (PySCF name)")
    basis: str = Field("sto-3g", description="Gaussian basis set (PySCF name)")
    charge: int = Field(0, description="charge of the pristine host, e")
    max_cycle: int = Field(100, ge=1, le=10000, description="SCF iteration cap")
    conv_tol: float = Field(1e-8, gt=0.0, lt=1e-2, description="SCF energy tolerance, hartree")
    level_shift: float = Field(0.0, ge=0.0, description="SCF level shift, hartree")
    smearing: float = Field(0.0, ge=0.0, description="Fermi smearing width, eV (0: none)")
    warm_start: bool = Field(True, description="start the SCF from the previous step's density")
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

    file: str = Field("input", description="input file name in the engine folder")
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

    file: str = Field(description="file (glob) in the engine folder")
    regex: str | None = Field(None, description="pattern with one group; the last match counts")
    reader: str | None = Field(None, description="ASE reader format name (energy from its calc)")
    unit: EnergyUnit = "eV"

    @model_validator(mode="after")
    def _one_way(self) -> ValueSpec:
        if (self.regex is None) == (self.reader is None):
            raise ValueError("give exactly one of 'regex' or 'reader'")
        if self.regex is not None:
            _check_regex(self.regex, groups=1)
        return self


class ChargesSpec(_Model):
    """Atomic charges: the last block of ``natoms`` matches of ``regex`` (group 1: charge, e)."""

    file: str
    regex: str
    scheme: str = Field(description="the charge scheme's name, e.g. 'mulliken'")

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class StructureSpec(_Model):
    """The relaxed structure written by the program, read with ASE (last frame)."""

    file: str
    format: str | None = Field(None, description="ASE format name (default: guessed)")


class PotentialSpec(_Model):
    """The potential map the program writes."""

    file: str = Field(description="file (glob) in the engine folder")
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

    file: str = Field(description="file (glob) in the engine folder, e.g. the program's log")
    regex: str = Field(description="pattern with one group; the last match counts (a string)")

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=1)))


class OutputSpec(_Model):
    """What the program writes and where ionwell reads it."""

    energy: ValueSpec
    forces: StructureSpec | None = Field(
        None, description="file an ASE reader gets forces (eV/Å) from; optional"
    )
    potential: PotentialSpec
    charges: ChargesSpec | None = None
    fermi_level: ValueSpec | None = None
    homo: ValueSpec | None = None
    lumo: ValueSpec | None = None
    structure: StructureSpec | None = Field(None, description="relaxed structure; optional")
    version: VersionSpec | None = Field(
        None, description="the version line the program prints (default: the static 'version')"
    )


class ConvergencePattern(_Model):
    """A pattern whose presence proves convergence."""

    file: str
    regex: str

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=None)))


class ConvergenceSpec(_Model):
    scf: ConvergencePattern
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
    program's output proves it read them."""

    keep: list[str] = Field(
        default_factory=list, description="globs kept from an earlier, killed attempt of the step"
    )
    previous: list[str] = Field(
        default_factory=list, description="globs copied from the previous step's engine folder"
    )
    value: str = Field("restart", description="what ${restart} becomes when restarting")
    fresh: str = Field("", description="what ${restart} becomes otherwise")
    used: ConvergencePattern | None = Field(
        None,
        description="pattern in an output proving the program read the restart files "
        "(default: files in place count as used)",
    )


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
        "structure", "cell", "box", "boxed", "natoms", "charge", "spin", "multiplicity",
        "unrestricted", "step", "tasks", "threads", "input", "restart",
    }
)  # fmt: skip


class CellSpec(_Model):
    """How the command engine gives every structure a cell (see the module docstring).

    ``placeholders`` lets a definition say how its program treats the two cases, e.g. QE's
    ``assume_isolated`` (``{box: mt, periodic: none}``) or CP2K's ``PERIODIC``
    (``{box: NONE, periodic: XYZ}``); a writer parameter that is exactly ``"${name}"`` keeps the
    value's type (numbers, lists, null).
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
    extra_inputs: dict[str, str] = Field(
        default_factory=dict,
        description="more input files: name -> text with ${placeholders} (e.g. for 'then')",
    )
    stdout: str | None = Field("stdout.log", description="file receiving the program's output")
    outputs: OutputSpec
    converged: ConvergenceSpec
    restart: RestartSpec = RestartSpec()
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
