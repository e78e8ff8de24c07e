"""Campaign configuration: pydantic models, loading, validation, freezing and JSON Schema export.

All lengths are in Å, energies in eV, potentials in volts, temperatures in K. Unknown keys are
refused everywhere (``extra="forbid"``) so that a misspelt option never silently does nothing.
This module reads only the configuration file it is given.
"""

from __future__ import annotations

import difflib
import json
import math
import re
import shlex
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from ase.data import atomic_numbers
from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)

from ionwell.config.engines import (
    AseEngineConfig,
    CommandEngineConfig,
    EngineConfig,
    LauncherConfig,
    PotentialGridConfig,
    PyscfEngineConfig,
    TbliteEngineConfig,
    default_engine_kind,
)
from ionwell.errors import ConfigError

__all__ = [
    "AnalysisConfig",
    "AseEngineConfig",
    "GuestReference",
    "Campaign",
    "CommandEngineConfig",
    "EngineConfig",
    "LauncherConfig",
    "TbliteEngineConfig",
    "ChecksConfig",
    "FlakeBuilder",
    "GraphiteBuilder",
    "GuestConfig",
    "HostConfig",
    "PlacementConfig",
    "PotentialGridConfig",
    "PyscfEngineConfig",
    "ComputeResources",
    "RemedyConfig",
    "RemoteConfig",
    "ResourcesConfig",
    "RelaxConfig",
    "StopConfig",
    "campaign_schema",
    "config_diff",
    "format_validation_error",
    "load_campaign",
    "parse_campaign",
    "read_yaml",
    "stop_rule_note",
]


class _Model(BaseModel):
    # finite numbers only, everywhere: a NaN or an infinity in a config is always a mistake (a
    # NaN bound compares false and silently disables what it bounds)
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


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


class GraphiteBuilder(_Model):
    """Periodic graphite: ``layers`` graphene sheets per cell, stacked along z, periodic in all
    three directions (the host's own hexagonal cell, 120° between ``a`` and ``b``).

    The in-plane cell is ``cell`` times the graphene primitive cell (``n``: n×n) or the
    √3×√3 R30° cell (``"sqrt3"``, six carbons per sheet: the cell of LiC6). The cell height is
    ``layers × spacing``, so the gallery between the top sheet and the image of the bottom one
    is a gallery like the others. Defaults: a = 2.46 Å and 3.35 Å between sheets (graphite,
    common practice; LiC6 has about 3.7 Å, AA stacked).
    """

    kind: Literal["graphite"]
    layers: int = Field(2, ge=1, le=12, description="sheets per cell")
    cell: Literal["sqrt3"] | int = Field(
        "sqrt3", description="in-plane cell: 'sqrt3' (√3×√3 R30°) or n for n×n primitive cells"
    )
    stacking: Literal["AB", "AA"] = Field("AB", description="registry of adjacent sheets")
    a: float = Field(2.46, gt=1.0, le=5.0, description="graphene lattice constant, Å")
    spacing: float = Field(3.35, gt=1.0, le=20.0, description="interlayer spacing, Å")

    @field_validator("cell")
    @classmethod
    def _cell(cls, v: str | int) -> str | int:
        if isinstance(v, int) and not 1 <= v <= 8:
            raise ValueError(f"in-plane cell n×n needs 1 <= n <= 8, got {v}")
        return v

    @model_validator(mode="after")
    def _whole_period(self) -> GraphiteBuilder:
        if self.stacking == "AB" and self.layers % 2:
            raise ValueError(
                f"AB stacking repeats every two sheets; {self.layers} sheets per cell would put "
                "two A sheets face to face across the cell's face: give an even number of layers"
            )
        return self


def _builder_kind(v: Any) -> str:
    """The builder's kind; a builder without one is a flake (configs from before graphite)."""
    if isinstance(v, dict):
        return str(v.get("kind", "flake"))
    return str(getattr(v, "kind", "flake"))


Builder = Annotated[
    Annotated[FlakeBuilder, Tag("flake")] | Annotated[GraphiteBuilder, Tag("graphite")],
    Discriminator(
        _builder_kind,
        custom_error_type="builder_kind",
        custom_error_message="host.builder.kind must be 'flake' or 'graphite'",
    ),
]


class HostConfig(_Model):
    """The host: a structure file in any ASE-readable format, or builder parameters."""

    file: str | None = Field(None, description="structure file, relative to the config file")
    format: str | None = Field(None, description="ASE format name if not guessed from suffix")
    builder: Builder | None = None
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


class BoxRegion(_Model):
    """An axis-aligned box of Cartesian positions, Å; a point on a face counts as inside."""

    lower: tuple[float, float, float] = Field(description="corner with the smallest x, y, z, Å")
    upper: tuple[float, float, float] = Field(description="corner with the largest x, y, z, Å")

    @model_validator(mode="after")
    def _ordered(self) -> BoxRegion:
        for name, corner in (("lower", self.lower), ("upper", self.upper)):
            if not all(math.isfinite(x) for x in corner):
                raise ValueError(f"box {name} corner must hold finite numbers (Å), got {corner}")
        if not all(lo < hi for lo, hi in zip(self.lower, self.upper, strict=True)):
            raise ValueError(
                f"box upper corner must exceed the lower corner on every axis (x, y, z in Å); "
                f"got lower={list(self.lower)}, upper={list(self.upper)}"
            )
        return self


class SphereRegion(_Model):
    """A ball of Cartesian positions, Å; periodic images count on periodic axes."""

    centre: tuple[float, float, float] = Field(description="centre x, y, z, Å")
    radius: float = Field(gt=0.0, le=1000.0, description="radius, Å")

    @field_validator("centre")
    @classmethod
    def _finite(cls, v: tuple[float, float, float]) -> tuple[float, float, float]:
        if not all(math.isfinite(x) for x in v):
            raise ValueError(f"sphere centre must hold finite numbers (Å), got {v}")
        return v


class ScreenConfig(_Model):
    """Settings of the ``screened`` rule: which wells get an engine energy, and which engine."""

    top: int = Field(3, ge=1, le=50, description="how many of the deepest wells are screened")
    engine: EngineConfig | None = Field(
        None, description="engine for the candidate energies (default: the campaign's engine)"
    )

    _kind = field_validator("engine", mode="before")(
        classmethod(lambda cls, v: default_engine_kind(v))
    )


class PlacementConfig(_Model):
    """Where the next guest goes: admissible region, wells of the potential map, placement rule.

    ``deepest`` takes the lowest well; ``thermal`` draws among the recorded wells with Boltzmann
    weights ``exp(-z·V/kT)`` (seeded from the campaign seed and the step); ``screened`` computes
    the energy of each of the ``screen.top`` deepest wells with an engine and takes the lowest.
    ``per_step`` guests go in per step, at least ``separation`` apart.
    """

    rule: Literal["deepest", "thermal", "screened"] = Field(
        "deepest", description="placement rule: deepest, thermal or screened"
    )
    exclusion: dict[str, float] = Field(
        default_factory=dict,
        description="minimum guest distance to atoms of each element, Å (defaults from radii)",
    )
    within: float = Field(3.0, gt=0.0, description="host envelope: max distance to a host atom, Å")
    sign: Literal["auto", "potential", "electron"] = "potential"
    candidates: int = Field(10, ge=1, le=1000, description="how many wells to record")
    temperature: float = Field(
        300.0, ge=0.0, le=100000.0, description="thermal rule temperature, K (0: deepest)"
    )
    ion_charge: int = Field(
        1, ge=1, le=4, description="formal charge z of the guest ion in the thermal weights"
    )
    per_step: int = Field(1, ge=1, le=100, description="guests inserted per step")
    separation: float = Field(
        2.5, gt=0.0, le=100.0, description="minimum distance between guests placed together, Å"
    )
    merge: float = Field(
        0.3, ge=0.0, le=5.0, description="wells closer than this are one well (the deeper), Å"
    )
    degenerate: float = Field(
        0.01, ge=0.0, le=10.0, description="wells this close to the deepest are near-degenerate, V"
    )
    galleries_only: bool = Field(
        False, description="admit only points between two adjacent layers of the host"
    )
    gallery_margin: float = Field(
        0.5, ge=0.0, le=10.0, description="minimum distance of a gallery point from a layer, Å"
    )
    layer_tolerance: float = Field(
        0.8, gt=0.0, le=10.0, description="height gap that separates two layers, Å"
    )
    boxes: list[BoxRegion] = Field(
        default_factory=list, description="user boxes; with boxes or spheres a site must be in one"
    )
    spheres: list[SphereRegion] = Field(
        default_factory=list,
        description="user spheres; with boxes or spheres a site must be in one",
    )
    screen: ScreenConfig = ScreenConfig()

    @field_validator("exclusion")
    @classmethod
    def _exclusion(cls, v: dict[str, float]) -> dict[str, float]:
        for el, r in v.items():
            _check_element(el)
            if not 0.0 < r < 10.0:
                raise ValueError(f"exclusion for {el} must be between 0 and 10 Å, got {r}")
        return v

    @model_validator(mode="after")
    def _consistent(self) -> PlacementConfig:
        if self.rule == "screened" and self.screen.top < self.per_step:
            raise ValueError(
                f"screen.top ({self.screen.top}) must be at least per_step ({self.per_step}) for "
                "rule 'screened': every guest placed needs a screened well"
            )
        return self


class PreRelaxConfig(_Model):
    """A cheap relaxation before the engine's own: the movable atoms relaxed first with GFN-xTB
    (tblite, in-process), then handed to the engine, whose relaxation starts from there."""

    method: Literal["GFN2-xTB", "GFN1-xTB"] = "GFN2-xTB"
    fmax: float = Field(0.1, gt=0.0, le=10.0, description="force threshold, eV/Å")
    steps: int = Field(50, ge=1, le=10000, description="optimizer step cap")
    electronic_temperature: float = Field(
        300.0, ge=0.0, le=50000.0, description="electronic temperature of the SCC, K"
    )


class RelaxConfig(_Model):
    """Relaxation after insertion, with an ASE optimizer on the engine's forces."""

    enabled: bool = True
    pre: PreRelaxConfig | None = Field(
        None,
        description="relax with GFN-xTB (tblite) first, then with the engine (ignored when "
        "relaxation is off)",
    )
    move: Literal["guests", "all"] = Field("guests", description="which atoms may move")
    optimizer: Literal["BFGS", "FIRE", "LBFGS"] = "BFGS"
    fmax: float = Field(0.05, gt=0.0, le=10.0, description="force threshold, eV/Å")
    steps: int = Field(30, ge=1, le=10000, description="optimizer step cap")
    max_step: float = Field(0.2, gt=0.0, le=2.0, description="largest displacement per step, Å")


class ChecksConfig(_Model):
    """Per-step checks and their bounds (Å unless stated)."""

    min_distance: float = Field(0.7, gt=0.0, description="error when two atoms are closer")
    level_order: float | None = Field(
        0.1,
        gt=0.0,
        le=100.0,
        description="warn when, with whole occupations, an empty level lies more than this "
        "below a filled one, eV (an excited configuration; None: off)",
    )
    guest_host_min: float | None = Field(
        None, gt=0.0, description="error when a guest is closer to a host atom (None: off)"
    )
    envelope: float | None = Field(
        None, gt=0.0, description="warn when a guest is farther from the host (default: within + 1)"
    )
    guest_alert: float | None = Field(1.8, gt=0.0, description="warn when two guests are closer")
    connectivity: bool = Field(True, description="error when the host falls into more pieces")
    rim_distance: float = Field(3.0, gt=0.0, description="a guest this close to an edge atom")
    rim_alert: float | None = Field(
        0.6, ge=0.0, le=1.0, description="warn when more than this fraction of guests is at the rim"
    )
    guest_packing: float | None = Field(
        0.9,
        gt=0.0,
        le=2.0,
        description="warn when two guests are closer than this fraction of the nearest-neighbour "
        "distance in the guest's elemental solid (None: off)",
    )
    guest_metal_distance: float | None = Field(
        None,
        gt=0.0,
        le=10.0,
        description="nearest-neighbour distance in the guest's elemental solid, Å "
        "(default: from the ase.data reference state, e.g. bcc Li: 3.02 Å)",
    )
    site_boundary: bool = Field(
        True,
        description="warn when a chosen site lies on the admissible region's boundary or on "
        "the potential grid's face",
    )
    cation_well_max: float | None = Field(
        0.0,
        ge=-100.0,
        le=100.0,
        description="cation mode: warn when a chosen well's potential is at or above this, V "
        "(a cation is repelled there; None: off)",
    )
    flat_map_tolerance: float | None = Field(
        0.02,
        ge=0.0,
        le=10.0,
        description="wells within this of the deepest tie with it for the flat-map check, V "
        "(None: off)",
    )
    flat_map_wells: int = Field(
        5, ge=2, le=1000, description="warn when at least this many wells tie with the deepest"
    )

    def envelope_for(self, within: float) -> float:
        """The distance (Å) beyond which a guest is reported outside the host: ``envelope``, by
        default 1 Å beyond the placement envelope ``within`` (Å)."""
        return self.envelope if self.envelope is not None else within + 1.0


class RemedyConfig(_Model):
    """What the loop tries before a failed check stops the campaign (each try is recorded)."""

    scf: list[Literal["more_cycles", "level_shift", "smearing"]] = Field(
        default_factory=lambda: ["more_cycles", "level_shift", "smearing"],
        description="SCF retries, in order, when the SCF did not converge",
    )
    more_cycles: int = Field(300, ge=1, description="SCF iteration cap of the 'more_cycles' retry")
    level_shift: float = Field(0.3, gt=0.0, description="level shift of that retry, hartree")
    smearing: float = Field(0.1, gt=0.0, description="Fermi smearing of that retry, eV")
    reject_site: bool = Field(
        True,
        description="on an error finding, reject the step's new site(s) and take the next well(s)",
    )
    max_rejects: int = Field(3, ge=0, description="times a step's new sites are rejected at most")


class ComputeResources(_Model):
    """What one compute step asks of a scheduler (SLURM, PBS) or of the local machine."""

    tasks: int = Field(1, ge=1, le=100000, description="MPI ranks (tasks) of the step job")
    threads: int = Field(1, ge=1, le=1024, description="cores per task")
    memory: int = Field(2000, ge=1, description="memory of the step job, MB")
    walltime: int = Field(60, ge=1, le=525600, description="time limit of the first attempt, min")
    walltime_factor: float = Field(
        2.0, ge=1.0, le=10.0, description="each retry gets this factor more time than the last"
    )
    stop_before: int = Field(
        120,
        ge=0,
        le=86400,
        description="seconds before the time limit at which a SLURM compute job is sent SIGUSR1 "
        "(--signal=USR1@N), so an external program with a soft stop stops cleanly with its "
        "restart files and the retry continues from them; at most half the first attempt's "
        "limit is used; 0: no warning. SLURM may send it up to 60 s early: with a first "
        "attempt of about 2 min or less it can arrive while the job is still starting, end that "
        "attempt, and the retry follows",
    )
    partition: str | None = Field(None, description="partition (SLURM) or queue (PBS)")
    account: str | None = Field(None, description="account to charge")
    extra: str | None = Field(
        None,
        description="further scheduler flags, shell words, e.g. '--qos=long --comment=\"li run\"'",
    )

    @field_validator("extra")
    @classmethod
    def _shell_words(cls, v: str | None) -> str | None:
        if v is not None:
            try:
                shlex.split(v)
            except ValueError as err:  # an unclosed quote
                raise ValueError(f"not valid shell words ({err}): {v!r}") from None
        return v


class ResourcesConfig(_Model):
    """Scheduler resources: the compute step is the big job; the summary runs where the
    controller runs (``light: local``) or as a small job (``light: job``)."""

    compute: ComputeResources = ComputeResources()
    light: Literal["local", "job"] = "local"


class RemoteConfig(_Model):
    """Remote mode: the controller stays here; compute steps go to a cluster over SSH.

    Host keys are checked against ``known_hosts`` and an unknown key is refused. ``setup``
    lines run in the job script before ionwell (e.g. ``module load ...``, activating an
    environment); ``python`` is the cluster's Python with ionwell installed.
    """

    host: str = Field(min_length=1, description="cluster login host")
    port: int = Field(22, ge=1, le=65535)
    user: str = Field(min_length=1)
    key_file: str = Field(description="private key file (never copied or logged)")
    known_hosts: str = Field(description="OpenSSH known_hosts file holding the host's key")
    workdir: str = Field(description="folder on the cluster under which steps are staged")
    scheduler: Literal["slurm", "pbs"] = "slurm"
    python: str = Field("python3", description="Python on the cluster, with ionwell installed")
    setup: list[str] = Field(default_factory=list, description="job-script lines before ionwell")
    poll: float = Field(15.0, gt=0.0, le=3600.0, description="seconds between job state queries")
    connect_attempts: int = Field(5, ge=1, le=100, description="tries per connection, backoff")
    timeout: float = Field(30.0, gt=0.0, description="seconds for connecting and each command")


class BulkReference(_Model):
    """The guest's bulk crystal, built with ``ase.build.bulk`` and computed with the campaign's
    engine; μ is its energy per atom. ``crystal`` and ``a`` default to ASE's reference state of
    the element (Li: bcc, a = 3.49 Å); ``repeat`` makes a supercell for Γ-point engines."""

    crystal: str | None = Field(None, description="crystal structure, e.g. bcc, fcc, hcp")
    a: float | None = Field(None, gt=0.0, description="lattice constant, Å")
    c: float | None = Field(None, gt=0.0, description="second lattice constant (hcp), Å")
    cubic: bool = Field(False, description="conventional cubic cell instead of the primitive")
    repeat: tuple[int, int, int] = Field((1, 1, 1), description="supercell repetitions")

    @field_validator("repeat")
    @classmethod
    def _positive(cls, v: tuple[int, int, int]) -> tuple[int, int, int]:
        if min(v) < 1:
            raise ValueError("expected three positive integers")
        return v


class GuestReference(_Model):
    """The guest's chemical potential μ (eV per guest), with where it comes from.

    Exactly one of: ``value`` (eV, e.g. the bulk metal's energy per atom from the same engine
    computed elsewhere); ``cohesive_energy`` (eV per atom, positive: μ is the isolated guest
    atom's energy computed with the campaign's engine minus that cohesive energy); ``bulk`` (the
    bulk metal computed with the campaign's engine, which must then handle periodic cells).
    """

    value: float | None = Field(None, description="μ of the guest, eV per guest")
    cohesive_energy: float | None = Field(
        None, gt=0.0, description="cohesive energy of the guest's bulk, eV per atom"
    )
    bulk: BulkReference | None = Field(None, description="bulk metal computed with the engine")
    source: str = Field("", description="where the value or the cohesive energy comes from")

    @model_validator(mode="after")
    def _one_way(self) -> GuestReference:
        given = [k for k in ("value", "cohesive_energy", "bulk") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(
                "give exactly one of 'value', 'cohesive_energy' or 'bulk'"
                + (f" (got {', '.join(given)})" if given else "")
            )
        return self


class AnalysisConfig(_Model):
    """What the analysis after (or during) the loop needs beyond the steps."""

    reference: GuestReference | None = Field(
        None, description="the guest's chemical potential (needed for E_f, hull and voltage)"
    )
    valence: int = Field(1, ge=1, le=4, description="charge z the guest gives up (voltage)")
    rim_width: float = Field(
        3.0, gt=0.0, description="guests and host atoms this close to a particle's edge are rim, Å"
    )
    dos_width: float = Field(0.2, gt=0.0, le=10.0, description="Gaussian broadening of the DOS, eV")
    formula_unit: dict[str, int] | None = Field(
        None,
        description="host formula unit for x and capacity, e.g. {C: 6}; default: "
        "host.formula_unit, else the host's carbon counted as C6 (terminating H excluded) when "
        "it has carbon, else the whole host",
    )
    charge_scheme: Literal["auto", "mulliken", "lowdin", "meta-lowdin", "iao"] = Field(
        "auto",
        description="atomic charges for the charge-transfer tables: 'auto' takes the most "
        "basis-robust scheme the engine recorded (iao, meta-lowdin, lowdin, then mulliken)",
    )
    voltage_floor: float | None = Field(
        0.0,
        ge=-100.0,
        le=100.0,
        description="flag a voltage step below this, V (a negative step means insertion costs "
        "energy against the reference; None: off)",
    )

    @field_validator("formula_unit")
    @classmethod
    def _unit(cls, v: dict[str, int] | None) -> dict[str, int] | None:
        if v is None:
            return v
        if not v:
            raise ValueError("expected at least one element, e.g. {C: 6}")
        for el, k in v.items():
            _check_element(el)
            if k < 1:
                raise ValueError(f"expected a positive count for {el}, got {k}")
        return v


class StopConfig(_Model):
    """Stop rule: the campaign ends at the first condition met."""

    guests: int | None = Field(None, ge=1, description="stop when this many guests are in")
    guests_per_unit: float | None = Field(
        None, gt=0.0, description="stop at this x (guests per host formula unit)"
    )
    max_steps: int = Field(50, ge=0, le=100000, description="stop after this step number")
    well_above: float | None = Field(
        None, description="stop when the deepest admissible well lies above this potential, V"
    )

    @model_validator(mode="after")
    def _reachable(self) -> StopConfig:
        targets = [f"{k}: {v:g}" for k in ("guests", "guests_per_unit") if (v := getattr(self, k))]
        if self.max_steps == 0 and targets:
            raise ValueError(
                f"max_steps 0 computes the pristine host only (step 0 inserts no guest), so "
                f"{' and '.join(targets)} can never be reached; expected max_steps ≥ 1 with a "
                "guest target, or no guest target to compute the host alone"
            )
        return self


class Campaign(_Model):
    """One insertion series: one host, one guest species, one engine, one placement rule."""

    _kind = field_validator("engine", mode="before")(
        classmethod(lambda cls, v: default_engine_kind(v))
    )

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$", description="folder name")
    description: str = ""
    seed: int = Field(0, ge=0, description="seed for every random choice of the campaign")
    host: HostConfig
    guest: GuestConfig = GuestConfig()
    engine: EngineConfig = PyscfEngineConfig()
    launcher: LauncherConfig = LauncherConfig()
    placement: PlacementConfig = PlacementConfig()
    relax: RelaxConfig = RelaxConfig()
    checks: ChecksConfig = ChecksConfig()
    remedies: RemedyConfig = RemedyConfig()
    stop: StopConfig = StopConfig()
    resources: ResourcesConfig = ResourcesConfig()
    remote: RemoteConfig | None = None
    analysis: AnalysisConfig = AnalysisConfig()

    @model_validator(mode="after")
    def _periodic_reference(self) -> Campaign:
        ref = self.analysis.reference
        if ref is not None and ref.bulk is not None and self.engine.kind in ("pyscf", "tblite"):
            raise ValueError(
                f"analysis.reference.bulk: the {self.engine.kind} engine computes finite "
                "clusters, not a periodic bulk metal; use an 'ase' or 'command' engine, or "
                "give 'cohesive_energy' (isolated atom) or 'value'"
            )
        return self


# ---------------------------------------------------------------------------------------------
# loading, errors, diff, schema


#: a part of an error location that names a member of a union, not a field (pydantic adds the
#: member's label: the tag of a discriminated union, or the type of a plain union's member)
_UNION_LABEL = re.compile(
    r"^(function-.*|int|float|str|bool|none|[a-z-]+\[.*\]"
    r"|[A-Z][A-Za-z]*(Spec|Config|Builder|Region|Reference|Pattern|Choice))$"
)
_TAGGED = {"engine": {"pyscf", "tblite", "ase", "command"}, "builder": {"flake", "graphite"}}


def _field_path(loc: tuple) -> str:
    """The field as the user writes it: ``engine.potential_grid.spacing``, not pydantic's
    ``engine.pyscf.potential_grid.spacing``."""
    parts: list[str] = []
    for p in map(str, loc):
        if _UNION_LABEL.match(p) or (parts and p in _TAGGED.get(parts[-1], ())):
            continue
        parts.append(p)
    return ".".join(parts)


def format_validation_error(err: ValidationError, source: str) -> str:
    """One readable message naming each offending field and what was expected (one line for
    one field; a union's alternatives for one field are joined)."""
    by_field: dict[str, list[str]] = {}
    found: dict[str, str] = {}
    for e in err.errors():
        loc = _field_path(e["loc"]) or "(top level)"
        msg = e["msg"]
        if e["type"] == "extra_forbidden":
            msg = "unknown key (not a campaign option; check the spelling)"
        elif e["type"] == "missing":
            msg = "required field is missing"
        elif "input" in e and not isinstance(e["input"], dict | list | tuple):
            found.setdefault(loc, repr(e["input"]))
        msg = msg.removeprefix("Value error, ")
        msgs = by_field.setdefault(loc, [])
        if msg not in msgs:
            msgs.append(msg)
    head = f"{source}: invalid campaign configuration"
    lines = []
    for loc, msgs in by_field.items():
        text = "; or ".join(msgs)
        if loc in found and found[loc] not in text:
            text += f" (found {found[loc]})"
        lines.append(f"{loc}: {text}")
    if len(lines) == 1:
        return f"{head}: {lines[0]}"
    return head + "\n" + "\n".join(f"  {line}" for line in lines)


def parse_campaign(data: Any, source: str = "campaign config") -> Campaign:
    """Validate a mapping into a :class:`Campaign`, raising :class:`ConfigError` on failure."""
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of campaign options at the top level")
    try:
        return Campaign.model_validate(data)
    except ValidationError as err:
        raise ConfigError(format_validation_error(err, source)) from None


class DuplicateKeyError(yaml.YAMLError):
    """A mapping of a YAML file gives the same key twice."""


class UniqueKeyLoader(yaml.SafeLoader):
    """PyYAML's safe loader, refusing a key given twice in one mapping (YAML requires unique
    keys; PyYAML would keep the last one silently). Keys brought in by a merge key (``<<``) may
    be overridden, as YAML intends."""

    def construct_mapping(self, node, deep=False):  # type: ignore[override]
        if isinstance(node, yaml.MappingNode):
            seen: dict[Any, int] = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge" or not isinstance(
                    key_node, yaml.ScalarNode
                ):
                    continue
                key = self.construct_object(key_node, deep=True)
                line = key_node.start_mark.line + 1
                if key in seen:
                    raise DuplicateKeyError(
                        f"line {line}: key {key!r} given twice in one mapping (first on line "
                        f"{seen[key]}); give each key once"
                    )
                seen[key] = line
        return super().construct_mapping(node, deep=deep)


def read_yaml(path: str | Path, what: str) -> Any:
    """The data of a YAML (or JSON) file: UTF-8 text, each key once per mapping.

    Raises :class:`ConfigError` naming the file (and the line) for an unreadable file, bytes
    that are not UTF-8, invalid YAML or a duplicate key; ``what`` says what the file should be.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise ConfigError(f"{path}: cannot read {what} ({err.strerror or err})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        line = raw.count(b"\n", 0, err.start) + 1
        raise ConfigError(
            f"{path}: line {line}: byte 0x{raw[err.start]:02x} is not UTF-8 text; expected "
            f"{what} as UTF-8 text"
        ) from None
    try:
        return yaml.load(text, Loader=UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass
    except DuplicateKeyError as err:
        raise ConfigError(f"{path}: {err}") from None
    except yaml.YAMLError as err:
        raise ConfigError(f"{path}: not valid YAML ({err})") from None


def load_campaign(path: str | Path) -> Campaign:
    """Read and validate a campaign YAML (or JSON) file."""
    path = Path(path)
    data = read_yaml(path, "a campaign config")
    from ionwell.config.definitions import resolve_engines

    return parse_campaign(resolve_engines(data, path.resolve().parent), str(path))


def dump_campaign(campaign: Campaign) -> str:
    """Canonical YAML text of a validated campaign (all defaults spelled out)."""
    return yaml.safe_dump(campaign.model_dump(mode="json"), sort_keys=True)


def config_diff(old: Campaign, new: Campaign) -> str:
    """A unified diff of two campaigns' canonical YAML, empty when equal."""
    a = dump_campaign(old).splitlines(keepends=True)
    b = dump_campaign(new).splitlines(keepends=True)
    return "".join(difflib.unified_diff(a, b, "frozen campaign.yaml", "new config"))


#: An engine given by the name of its definition plus overrides (``engine: {definition:
#: quantum-espresso, settings: {...}}``), merged by ``config.definitions.resolve_engines``
#: before the models see it; the overrides are checked then, against the merged engine.
_DEFINITION_REF = {
    "type": "object",
    "title": "EngineDefinitionRef",
    "description": "an engine definition by name (config/engines/ or engines/ beside the "
    "config), with overrides of any of its keys",
    "required": ["definition"],
    "properties": {"definition": {"type": "string", "minLength": 1}},
}


def _allow_definitions(node: Any) -> Any:
    """``node`` with every engine union (a discriminator mapping 'command') also accepting an
    engine definition reference, as the config file may hold one."""
    if isinstance(node, list):
        return [_allow_definitions(x) for x in node]
    if not isinstance(node, dict):
        return node
    out = {k: _allow_definitions(v) for k, v in node.items()}
    mapping = out.get("discriminator", {}).get("mapping", {}) if "oneOf" in out else {}
    if "command" in mapping:
        union = {k: v for k, v in out.items() if k not in ("default", "title", "description")}
        rest = {k: v for k, v in out.items() if k in ("default", "title", "description")}
        return {**rest, "anyOf": [union, {"$ref": "#/$defs/EngineDefinitionRef"}]}
    return out


def stop_rule_note(campaign: Campaign) -> str | None:
    """A word for a stop rule whose step cap ends the campaign before its guest target (allowed:
    a trial run, extended later by amending ``stop.max_steps``), else None."""
    stop, per_step = campaign.stop, campaign.placement.per_step
    if stop.guests is None or stop.max_steps * per_step >= stop.guests:
        return None
    return (
        f"stop.max_steps ({stop.max_steps}) ends the campaign before stop.guests "
        f"({stop.guests}) is reached: at most {stop.max_steps * per_step} guests at "
        f"placement.per_step {per_step}; amend stop.max_steps later to go on"
    )


def campaign_schema() -> str:
    """JSON Schema of the campaign configuration (as written in a file: an engine may be given
    by its definition's name)."""
    schema = _allow_definitions(Campaign.model_json_schema())
    schema.setdefault("$defs", {})["EngineDefinitionRef"] = _DEFINITION_REF
    return json.dumps(schema, indent=2, sort_keys=True)
