"""Campaign configuration: pydantic models, loading, validation, freezing and JSON Schema export.

All lengths are in Å, energies in eV, potentials in volts, temperatures in K. Unknown keys are
refused everywhere (``extra="forbid"``) so that a misspelt option never silently does nothing.
This module reads only the configuration file it is given.
"""

from __future__ import annotations

import difflib
import json
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from ase.data import atomic_numbers
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from ionwell.errors import ConfigError

__all__ = [
    "Campaign",
    "FlakeBuilder",
    "GuestConfig",
    "HostConfig",
    "PlacementConfig",
    "PotentialGridConfig",
    "PyscfEngineConfig",
    "RelaxConfig",
    "StopConfig",
    "campaign_schema",
    "config_diff",
    "format_validation_error",
    "load_campaign",
    "parse_campaign",
]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_element(symbol: str) -> str:
    if symbol not in atomic_numbers or symbol == "X":
        raise ValueError(f"expected a chemical element symbol such as 'Li', got {symbol!r}")
    return symbol


class FlakeBuilder(_Model):
    """Hydrogen-terminated layered carbon flake (a stack of polycyclic sheets).

    Size is given either by ``shells`` (hexagon rings around a central ring: 1 = benzene, 2 =
    coronene, 3 = circumcoronene) or by ``radius`` (Å; carbon sites of a graphene sheet within
    this distance of the centre are kept, dangling sites pruned, edges terminated with H).
    """

    kind: Literal["flake"] = "flake"
    layers: int = Field(2, ge=1, le=12, description="number of stacked sheets")
    shells: int | None = Field(None, ge=1, le=8, description="hexagon shells per sheet")
    radius: float | None = Field(None, gt=0.0, le=60.0, description="in-plane radius, Å")
    stacking: Literal["AB", "AA"] = Field("AB", description="registry of adjacent sheets")
    spacing: float = Field(3.35, gt=1.0, le=20.0, description="interlayer spacing, Å")
    cc: float = Field(1.42, gt=0.5, le=3.0, description="C–C bond length, Å")
    ch: float = Field(1.09, gt=0.5, le=3.0, description="C–H bond length, Å")

    @model_validator(mode="after")
    def _size(self) -> FlakeBuilder:
        if (self.shells is None) == (self.radius is None):
            raise ValueError("give exactly one of 'shells' or 'radius' for the flake size")
        return self


class HostConfig(_Model):
    """The host: a structure file in any ASE-readable format, or builder parameters."""

    file: str | None = Field(None, description="structure file, relative to the config file")
    format: str | None = Field(None, description="ASE format name if not guessed from suffix")
    builder: FlakeBuilder | None = None
    formula_unit: dict[str, int] | None = Field(
        None, description="host formula unit for x, e.g. {C: 6}; default: whole host"
    )

    @model_validator(mode="after")
    def _one_source(self) -> HostConfig:
        if (self.file is None) == (self.builder is None):
            raise ValueError("give exactly one of 'file' or 'builder' for the host")
        return self


class GuestConfig(_Model):
    """The guest species and how its charge is treated.

    ``neutral``: the guest atom enters neutral and gives its electron(s) to the host, as in real
    intercalation. ``cation``: each guest adds +1 to the system charge.
    """

    element: Annotated[str, Field(description="chemical symbol, e.g. Li")] = "Li"
    charge_mode: Literal["neutral", "cation"] = "neutral"

    _el = field_validator("element")(classmethod(lambda cls, v: _check_element(v)))


class PotentialGridConfig(_Model):
    """Grid on which the engine evaluates the electrostatic potential."""

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
    threads: int | None = Field(None, ge=1, description="OpenMP threads (default: all)")
    potential_grid: PotentialGridConfig = PotentialGridConfig()
    potential_method: Literal["exact", "fitted"] = Field(
        "exact", description="exact integrals over grid blocks, or density-fitted shortlist"
    )


EngineConfig = Annotated[PyscfEngineConfig, Field(discriminator="kind")]


class PlacementConfig(_Model):
    """Where the next guest goes: the deepest admissible well of the potential map."""

    rule: Literal["deepest"] = "deepest"
    exclusion: dict[str, float] = Field(
        default_factory=dict,
        description="minimum guest distance to atoms of each element, Å (defaults from radii)",
    )
    within: float = Field(3.0, gt=0.0, description="host envelope: max distance to a host atom, Å")
    sign: Literal["auto", "potential", "electron"] = "potential"
    candidates: int = Field(10, ge=1, le=1000, description="how many wells to record")

    @field_validator("exclusion")
    @classmethod
    def _exclusion(cls, v: dict[str, float]) -> dict[str, float]:
        for el, r in v.items():
            _check_element(el)
            if not 0.0 < r < 10.0:
                raise ValueError(f"exclusion for {el} must be between 0 and 10 Å, got {r}")
        return v


class RelaxConfig(_Model):
    """Relaxation after insertion, with an ASE optimizer on the engine's forces."""

    enabled: bool = True
    move: Literal["guests", "all"] = Field("guests", description="which atoms may move")
    optimizer: Literal["BFGS", "FIRE", "LBFGS"] = "BFGS"
    fmax: float = Field(0.05, gt=0.0, le=10.0, description="force threshold, eV/Å")
    steps: int = Field(30, ge=1, le=10000, description="optimizer step cap")
    max_step: float = Field(0.2, gt=0.0, le=2.0, description="largest displacement per step, Å")


class StopConfig(_Model):
    """Stop rule: the campaign ends at the first condition met."""

    guests: int | None = Field(None, ge=1, description="stop when this many guests are in")
    guests_per_unit: float | None = Field(
        None, gt=0.0, description="stop at this x (guests per host formula unit)"
    )
    max_steps: int = Field(50, ge=0, le=100000, description="stop after this step number")

    @model_validator(mode="after")
    def _has_target(self) -> StopConfig:
        return self


class Campaign(_Model):
    """One insertion series: one host, one guest species, one engine, one placement rule."""

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$", description="folder name")
    description: str = ""
    seed: int = Field(0, ge=0, description="seed for every random choice of the campaign")
    host: HostConfig
    guest: GuestConfig = GuestConfig()
    engine: EngineConfig = PyscfEngineConfig()
    placement: PlacementConfig = PlacementConfig()
    relax: RelaxConfig = RelaxConfig()
    stop: StopConfig = StopConfig()


# ---------------------------------------------------------------------------------------------
# loading, errors, diff, schema


def format_validation_error(err: ValidationError, source: str) -> str:
    """One readable message naming each offending field and what was expected."""
    lines = []
    for e in err.errors():
        loc = ".".join(str(p) for p in e["loc"] if not str(p).startswith("function-"))
        msg = e["msg"]
        if e["type"] == "extra_forbidden":
            msg = "unknown key (not a campaign option; check the spelling)"
        elif e["type"] == "missing":
            msg = "required field is missing"
        msg = msg.removeprefix("Value error, ")
        lines.append(f"  {loc or '(top level)'}: {msg}")
    head = f"{source}: invalid campaign configuration"
    return head + "\n" + "\n".join(lines)


def parse_campaign(data: Any, source: str = "campaign config") -> Campaign:
    """Validate a mapping into a :class:`Campaign`, raising :class:`ConfigError` on failure."""
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of campaign options at the top level")
    try:
        return Campaign.model_validate(data)
    except ValidationError as err:
        raise ConfigError(format_validation_error(err, source)) from None


def load_campaign(path: str | Path) -> Campaign:
    """Read and validate a campaign YAML (or JSON) file."""
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as err:
        raise ConfigError(f"{path}: cannot read campaign config ({err.strerror})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as err:
        raise ConfigError(f"{path}: not valid YAML ({err})") from None
    return parse_campaign(data, str(path))


def dump_campaign(campaign: Campaign) -> str:
    """Canonical YAML text of a validated campaign (all defaults spelled out)."""
    return yaml.safe_dump(campaign.model_dump(mode="json"), sort_keys=True)


def config_diff(old: Campaign, new: Campaign) -> str:
    """A unified diff of two campaigns' canonical YAML, empty when equal."""
    a = dump_campaign(old).splitlines(keepends=True)
    b = dump_campaign(new).splitlines(keepends=True)
    return "".join(difflib.unified_diff(a, b, "frozen campaign.yaml", "new config"))


def campaign_schema() -> str:
    """JSON Schema of the campaign configuration."""
    return json.dumps(Campaign.model_json_schema(), indent=2, sort_keys=True)
