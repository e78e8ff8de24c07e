"""Engine and launcher configuration: one pydantic model per engine kind.

``engine.kind`` selects the model (``pyscf`` when omitted): ``pyscf`` (embedded DFT),
``tblite`` (GFN2-xTB tight binding, in-process), ``ase`` (any ASE calculator by import path) and
``command`` (any external program, described entirely in the config). A ``command`` engine may
name a *definition* — a YAML file of engine settings found in ``engines/`` beside the campaign
config, in the folders of ``$IONWELL_ENGINES``, or among the definitions shipped with ionwell —
and override any of its keys; see :func:`ionwell.engine_definitions.resolve`.

Text templates (input files, argv items, writer parameters given as strings) use ``${name}``
placeholders (Python's :class:`string.Template`; ``$$`` is a literal dollar sign). Placeholders:
``structure`` (one ``Symbol x y z`` line per atom, Å), ``cell`` (three lines of lattice vectors,
Å), ``box`` (``Lx Ly Lz``, Å: the cell's lengths, or for a non-periodic structure its extent plus
8 Å of vacuum on each side), ``natoms``, ``charge``, ``spin`` (2S), ``multiplicity`` (2S+1),
``unrestricted`` (``true`` when 2S > 0, else ``false``), ``step``, ``tasks``,
``threads``, ``input`` (the input file name), ``restart`` (``restart.value`` when restart files
were found, else ``restart.fresh``).

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


class ConvergencePattern(_Model):
    """A pattern whose presence proves convergence."""

    file: str
    regex: str

    _re = field_validator("regex")(classmethod(lambda cls, v: _check_regex(v, groups=None)))


class ConvergenceSpec(_Model):
    scf: ConvergencePattern
    relax: ConvergencePattern | None = Field(
        None, description="pattern proving the program's own relaxation converged"
    )


class RestartSpec(_Model):
    """Restart files: carried over from a killed attempt of the same step, or from the previous
    step (warm start). When any is present, ``${restart}`` becomes ``value``."""

    keep: list[str] = Field(
        default_factory=list, description="globs kept from an earlier, killed attempt of the step"
    )
    previous: list[str] = Field(
        default_factory=list, description="globs copied from the previous step's engine folder"
    )
    value: str = Field("restart", description="what ${restart} becomes when restarting")
    fresh: str = Field("", description="what ${restart} becomes otherwise")


class CommandEngineConfig(_Model):
    """Any external electronic-structure program, described in the config (no Python needed)."""

    kind: Literal["command"] = "command"
    definition: str | None = Field(
        None, description="name of the engine definition this config was built from"
    )
    label: str = Field("command", description="the program's name, as recorded in the ledger")
    version: str = Field("unknown", description="the program's version, as recorded")
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
    relaxes: bool = Field(
        False, description="the program relaxes the structure itself (outputs.structure)"
    )
    timeout: float | None = Field(None, gt=0.0, description="seconds before the run is killed")


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
        description="import path of the calculator class, e.g. ase.calculators.emt.EMT",
    )
    parameters: dict[str, Any] = Field(
        default_factory=dict, description="keyword arguments of the calculator"
    )
    charge: int = Field(0, description="charge of the pristine host, e")
    charge_keyword: str | None = Field(
        None, description="calculator keyword that receives the system charge (None: not passed)"
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
