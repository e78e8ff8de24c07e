"""Analysis of a campaign folder (I/O): the guest reference, tables and plots.

:func:`guest_reference` establishes μ of the guest (given; the bulk metal computed with the
campaign's engine; or the isolated atom minus a cohesive energy) and records it with its source
in ``reference.json`` (the Snakemake rule ``reference``). :func:`analyse` reads the ledger — of a
finished campaign or one still running — and writes into ``analysis/``:

* ``energetics.csv`` (step, guests, x, total energy, formation energy, energy above the hull,
  on-hull flag, capacity mAh/g), ``voltage.csv`` (voltage steps between hull vertices),
  ``hull.png``, ``voltage.png``;
* ``layers.csv`` (per step and gallery: spacing, guests, registry, stage), ``occupancy_map.png``,
  ``stacking.png`` — for layered hosts;
* ``sites.csv`` (rim / interior guests, nearest guest–guest distances), ``rim.png``;
* ``charges.csv`` (mean guest charge, electrons gained by the host, rim / interior),
  ``charges.png``; ``electronic.csv`` (Fermi level or HOMO and its shift), ``dos.csv``,
  ``dos.png``;
* ``analysis.json``, the :class:`AnalysisSummary` listing the files in reading order, with
  the stage and the stacking registries of every step of a layered host (:class:`StepLayers`).

The numbers come from pure modules (:mod:`ionwell.science.energetics`,
:mod:`ionwell.science.diagnostics`, :mod:`ionwell.science.dos`); the figures are drawn by
:mod:`ionwell.analysis.plots` (charts and structure pictures). This module reads and writes; it
draws nothing itself.
"""

from __future__ import annotations

import csv
import io
import logging
from pathlib import Path
from typing import NamedTuple

import numpy as np
import yaml
from ase import Atoms
from ase.io import read
from pydantic import BaseModel, ValidationError

from ionwell.analysis.plots import charts
from ionwell.config.campaign import AnalysisConfig, format_validation_error, read_yaml
from ionwell.engines.base import StepResult
from ionwell.errors import ConfigError, IonwellError
from ionwell.science import energetics
from ionwell.science.checks import Finding, smeared_energy_findings, voltage_findings
from ionwell.science.diagnostics import diagnose
from ionwell.science.dos import dos_on_grid, frontier_level
from ionwell.science.host import host_formula_units
from ionwell.store.campaign import CampaignPaths, atomic_write_text, load_frozen
from ionwell.store.ledger import read_ledger
from ionwell.store.paths import StepPaths, step_label

__all__ = [
    "AnalysisSummary",
    "Reference",
    "StepLayers",
    "analyse",
    "analysis_settings",
    "guest_reference",
    "is_current",
    "parse_settings",
    "read_settings_file",
    "resolve_formula_unit",
    "set_settings",
    "settings_file",
]

log = logging.getLogger("ionwell.analysis.tables")


class Reference(BaseModel):
    """The guest's chemical potential as used, and where it came from."""

    mu: float  # eV per guest
    source: str
    atom_energy: float | None = None  # eV, isolated atom with the campaign's engine
    bulk_energy: float | None = None  # eV, the bulk reference cell with the campaign's engine
    bulk_atoms: int | None = None
    cohesive_energy: float | None = None  # eV per atom
    key: dict | None = None  # the settings μ was established with (reference, engine, guest)


class StepLayers(BaseModel):
    """The layer analysis of one step in ``analysis.json`` (the summary of ``layers.csv``;
    :func:`ionwell.science.staging.layer_report`). Heights and spacings in Å."""

    step: int
    guests: int
    layers: int
    periodic: bool  # the stack repeats along its normal (a cell periodic along it)
    stage: int | None
    staging: str | None
    #: per gallery, in stacking order: "AA", "AB", "other", "undetermined" or None
    registries: list[str | None]
    gallery_guests: list[int]
    spacings: list[float]
    guests_outside: int


class AnalysisSummary(BaseModel):
    """What :func:`analyse` wrote."""

    folder: str
    steps: int
    reference: Reference | None
    hull_steps: list[int]
    voltages: list[float]
    files: list[str]
    caution: str | None = None
    #: the analysis settings used (AnalysisConfig as JSON) and where they came from
    settings: dict = {}
    settings_source: str = ""
    #: the host formula unit x and capacities are counted per, e.g. {"C": 6}
    formula_unit: dict[str, int] = {}
    #: charges scheme of charges.csv / charges.png (None: no charges recorded)
    charge_scheme: str | None = None
    #: the method that produced energies and structures, e.g. "tblite (GFN2-xTB)"
    method: str = ""
    #: analysis-level findings (e.g. a negative voltage step), as Finding JSON
    findings: list[dict] = []
    #: per-step structure views, relative to the analysis folder (e.g. structures/step_0003.png)
    structures: list[str] = []
    #: the filling-sequence figure (relative to the analysis folder), if drawn
    filling: str | None = None
    #: per step of a layered host: layers, stage, registry of each gallery (empty otherwise)
    layers: list[StepLayers] = []


def _reference_file(paths: CampaignPaths) -> Path:
    return paths.root / "reference.json"


def settings_file(root: str | Path) -> Path:
    """The campaign's analysis settings set after the start: ``<campaign>/analysis.yaml``."""
    return Path(root) / "analysis.yaml"


def parse_settings(data: object, source: str) -> AnalysisConfig:
    """Validate analysis settings: a mapping of ``analysis`` keys, or a whole campaign config
    (its ``analysis`` section is taken). Raises ConfigError naming ``source`` and the field."""
    if isinstance(data, dict) and "analysis" in data and ("host" in data or "name" in data):
        data = data["analysis"] or {}
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of analysis settings (reference, ...)")
    try:
        return AnalysisConfig.model_validate(data)
    except ValidationError as err:
        msg = format_validation_error(err, source).replace(
            "invalid campaign configuration", "invalid analysis settings"
        )
        raise ConfigError(msg) from None


def read_settings_file(path: str | Path) -> AnalysisConfig:
    """Analysis settings from a YAML file (see :func:`parse_settings`)."""
    path = Path(path)
    data = read_yaml(path, "YAML analysis settings")
    return parse_settings(data, str(path))


def analysis_settings(root: str | Path) -> tuple[AnalysisConfig, str]:
    """The analysis settings in force for the campaign in ``root`` and where they come from:
    ``analysis.yaml`` in the campaign folder when present (set after the start, without
    touching the frozen compute config), else the ``analysis`` section of ``campaign.yaml``."""
    f = settings_file(root)
    if f.is_file():
        return read_settings_file(f), f"{f.name} (set after the start)"
    paths = CampaignPaths(Path(root))
    return load_frozen(paths).analysis, f"{paths.config.name} (analysis section)"


def set_settings(root: str | Path, settings: AnalysisConfig) -> Path:
    """Record new analysis settings for the campaign in ``root`` (``analysis.yaml``, written
    atomically). The frozen compute config and every recorded step stay as they are."""
    paths = CampaignPaths(Path(root))
    load_frozen(paths)  # a campaign folder
    f = settings_file(paths.root)
    text = (
        "# analysis settings of this campaign, set after its start (ionwell analyse --settings);\n"
        "# they override the analysis section of campaign.yaml and change no computed step\n"
    ) + yaml.safe_dump(settings.model_dump(mode="json", exclude_defaults=True), sort_keys=True)
    atomic_write_text(f, text)
    log.info("analysis settings of %s recorded in %s", paths.root.name, f)
    return f


def is_current(root: str | Path) -> bool:
    """Whether ``analysis/analysis.json`` is newer than everything the analysis reads that can
    change: the ledger, the frozen config (amendments) and ``analysis.yaml``."""
    paths = CampaignPaths(Path(root))
    f = paths.root / "analysis" / "analysis.json"
    if not f.is_file():
        return False
    inputs = [paths.ledger, paths.config, settings_file(paths.root)]
    stamp = f.stat().st_mtime
    return all(not p.is_file() or p.stat().st_mtime <= stamp for p in inputs)


def _reference_key(campaign, ref) -> dict:
    """What μ depends on: the reference settings and, when it is computed, the engine."""
    key = {"reference": ref.model_dump(mode="json")}
    if ref.value is None:
        key["engine"] = campaign.engine.model_dump(mode="json")
        key["guest"] = campaign.guest.element
    return key


def guest_reference(root: str | Path, settings: AnalysisConfig | None = None) -> Reference | None:
    """μ of the guest for the campaign in ``root`` (computed once per reference setting, then
    read back). ``settings``: the analysis settings (default: :func:`analysis_settings`)."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    if settings is None:
        settings = analysis_settings(paths.root)[0]
    ref = settings.reference
    if ref is None:
        return None
    if ref.bulk is not None and campaign.engine.kind in ("pyscf", "tblite"):
        raise ConfigError(
            f"analysis.reference.bulk: the {campaign.engine.kind} engine computes finite "
            "clusters, not a periodic bulk metal; give 'cohesive_energy' (isolated atom) or "
            "'value'"
        )
    key = _reference_key(campaign, ref)
    f = _reference_file(paths)
    if f.is_file():
        try:
            old = Reference.model_validate_json(f.read_text())
        except (OSError, ValueError):
            old = None
        if old is not None and (old.key is None or old.key == key):
            return old
        log.info("guest reference settings changed since %s was written: computing μ anew", f)
    if ref.value is not None:
        out = Reference(mu=ref.value, source=ref.source or "given in the campaign config")
    elif ref.bulk is not None:
        bulk = _bulk_structure(campaign.guest.element, ref.bulk)
        energy = _energy(campaign, bulk, paths.root / "reference")
        out = Reference(
            mu=energy / len(bulk),
            source=(
                f"bulk {campaign.guest.element} ({bulk.get_chemical_formula()}, "
                f"{ref.bulk.crystal or 'ASE reference state'}) computed with the "
                f"{campaign.engine.kind} engine, energy per atom"
                + (f" ({ref.source})" if ref.source else "")
            ),
            bulk_energy=energy,
            bulk_atoms=len(bulk),
        )
    else:
        atom = Atoms(campaign.guest.element, positions=[[0.0, 0.0, 0.0]])
        energy = _energy(campaign, atom, paths.root / "reference")
        out = Reference(
            mu=energy - float(ref.cohesive_energy),
            source=(
                f"isolated {campaign.guest.element} atom ({campaign.engine.kind}) minus the "
                f"cohesive energy {ref.cohesive_energy} eV"
                + (f" ({ref.source})" if ref.source else "")
            ),
            atom_energy=energy,
            cohesive_energy=ref.cohesive_energy,
        )
    out.key = key
    atomic_write_text(f, out.model_dump_json(indent=2))
    log.info("guest reference: μ = %.6f eV (%s)", out.mu, out.source)
    return out


def _bulk_structure(element: str, spec) -> Atoms:
    """The bulk reference cell (``ase.build.bulk``), repeated as the config asks."""
    from ase.build import bulk

    try:
        cell = bulk(element, spec.crystal, a=spec.a, c=spec.c, cubic=spec.cubic)
    except (ValueError, KeyError, RuntimeError) as err:
        raise IonwellError(
            f"analysis.reference.bulk: cannot build bulk {element} ({err}); give 'crystal' "
            "and 'a' (Å)"
        ) from None
    return cell.repeat(spec.repeat)


def _energy(campaign, atoms: Atoms, workdir: Path) -> float:
    """Energy (eV) of ``atoms`` with the campaign's engine, no relaxation, no potential map."""
    from ionwell.engines.base import ComputeContext
    from ionwell.engines.run import run_engine

    variant = campaign.model_copy(
        update={"relax": campaign.relax.model_copy(update={"enabled": False})}
    )
    ctx = ComputeContext(step=0, charge=0, potential=False)
    result = run_engine(variant, atoms, workdir, ctx).result
    if not result.scf_converged:
        raise IonwellError(
            f"{workdir}: the SCF of the guest reference ({atoms.get_chemical_formula()}) did "
            "not converge"
        )
    return float(result.energy)


def _write_csv(path: Path, header: list[str], rows: list[list]) -> None:
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(header)
    w.writerows(rows)
    atomic_write_text(path, buf.getvalue())


def resolve_formula_unit(
    host: Atoms, settings: AnalysisConfig, host_unit: dict[str, int] | None = None
) -> dict[str, int]:
    """The formula unit x and capacities are counted per (common practice for carbon hosts:
    per C6, so that LiC6 is x = 1, with terminating hydrogen left out of the count and the
    mass). Order: ``analysis.formula_unit``, ``host.formula_unit``, C6 when the host holds
    carbon, else the whole host."""
    if settings.formula_unit:
        return dict(settings.formula_unit)
    if host_unit:
        return dict(host_unit)
    symbols = host.get_chemical_symbols()
    if "C" in symbols:
        return {"C": 6}
    els, counts = np.unique(symbols, return_counts=True)
    return {str(e): int(k) for e, k in zip(els, counts, strict=True)}


def method_label(engine) -> str:
    """The engine kind with its method, e.g. ``pyscf (lda,vwn / sto-3g)``."""
    parts = [str(getattr(engine, k)) for k in ("xc", "basis") if getattr(engine, k, None)]
    if not parts and getattr(engine, "method", None):
        parts = [str(engine.method)]
    detail = " / ".join(parts)
    return f"{engine.kind} ({detail})" if detail else str(engine.kind)


#: printed on every figure: the figures travel without the HTML page
MODEL_CAUTION = "Model result ({method}); not a measurement, not safety data for real cells."

CATION_CAUTION = (
    "cation mode: each structure holds guest ions (+1 each), the reference is the neutral "
    "guest, so formation energies and voltages include the ionisation energy and the "
    "cluster's charging energy; use charge_mode: neutral for a voltage profile"
)


def analyse(root: str | Path, settings: AnalysisConfig | None = None) -> AnalysisSummary:
    """Write the tables and plots of the campaign in ``root`` into ``analysis/``.

    Works on a finished campaign and on one still running (the steps in the ledger so far).
    ``settings`` default to :func:`analysis_settings` (``analysis.yaml`` or the frozen config);
    they are recorded in ``analysis.json``.
    """
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    source = "given to analyse()"
    if settings is None:
        settings, source = analysis_settings(paths.root)
    records = [r for r in read_ledger(paths.ledger) if r.energy is not None]
    if not records:
        raise IonwellError(f"{paths.root}: no finished step to analyse yet")
    out = paths.root / "analysis"
    out.mkdir(exist_ok=True)
    host = read(paths.host)
    unit = resolve_formula_unit(host, settings, campaign.host.formula_unit)
    try:
        units = host_formula_units(host, unit)
    except IonwellError as err:
        raise ConfigError(f"analysis.formula_unit: {err}") from None
    method = method_label(campaign.engine)
    caution = MODEL_CAUTION.format(method=method)
    cation = campaign.guest.charge_mode == "cation"
    if cation:
        caution += " Cation mode: energies include ionisation and charging terms."
    z = settings.valence
    n = [r.guests for r in records]
    e = [float(r.energy) for r in records]
    x = [k / units for k in n]
    ref = guest_reference(paths.root, settings)
    files: list[str] = []
    rows = []
    hull_steps: list[int] = []
    voltages: list[float] = []
    found: list[Finding] = []
    if campaign.engine.kind == "pyscf" and campaign.engine.smearing > 0:
        found += smeared_energy_findings(
            [r.step for r in records], [r.free_energy for r in records]
        )
    cap = [energetics.capacity_mah_per_g(xi, unit, z) for xi in x]
    if ref is not None and 0 in n:
        ef = energetics.formation_energies(e, n, ref.mu)
        h = energetics.hull(n, ef)
        hull_steps = [records[i].step for i in h.vertices]
        steps = energetics.voltage_profile(e, n, ref.mu, units, z)
        voltages = [s.voltage for s in steps]
        step_of = {}
        for r in records:
            step_of.setdefault(r.guests, r.step)
        found += voltage_findings(steps, settings.voltage_floor, step_of)
        prev = None
        for i, r in enumerate(records):
            e_ins = None
            if prev is not None and r.guests > records[prev].guests:
                dn = r.guests - records[prev].guests
                e_ins = (e[i] - e[prev] - dn * ref.mu) / dn
            rows.append(
                [r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", f"{ef[i]:.6f}",
                 f"{ef[i] / units:.6f}", _fmt(e_ins, ".6f"), f"{h.above[i]:.6f}",
                 int(i in h.vertices), f"{cap[i]:.3f}"]
            )  # fmt: skip
            prev = i
        _write_csv(
            out / "voltage.csv",
            ["n_from", "n_to", "x_from", "x_to", "voltage_V"],
            [[s.n_from, s.n_to, f"{s.x_from:.6f}", f"{s.x_to:.6f}", f"{s.voltage:.6f}"]
             for s in steps],
        )  # fmt: skip
        charts.hull_plot(out / "hull.png", campaign.guest.element, x, ef, h, unit, caution=caution)
        charts.voltage_plot(
            out / "voltage.png", campaign.guest.element, steps, unit, z, caution=caution
        )
        files += ["hull.png", "voltage.png", "voltage.csv"]
    else:
        for i, r in enumerate(records):
            rows.append([r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", "", "", "", "", "",
                         f"{cap[i]:.3f}"])  # fmt: skip
        if ref is None:
            log.info("no analysis.reference: formation energies, hull and voltage need the "
                     "guest's chemical potential (ionwell analyse --settings)")  # fmt: skip
    _write_csv(
        out / "energetics.csv",
        ["step", "guests", "x", "energy_eV", "formation_eV", "formation_eV_per_unit",
         "insertion_eV_per_guest", "above_hull_eV", "on_hull", "capacity_mAh_per_g"],
        rows,
    )  # fmt: skip
    files.insert(0, "energetics.csv")
    tables = _step_tables(paths, campaign, settings, records, len(host), out, caution)
    files += tables.files
    for f in found:
        log.warning("analysis: %s", f.message)
    summary = AnalysisSummary(
        caution=CATION_CAUTION if (ref is not None and cation) else None,
        folder=str(out),
        steps=len(records),
        reference=ref,
        hull_steps=hull_steps,
        voltages=voltages,
        files=files,
        settings=settings.model_dump(mode="json"),
        settings_source=source,
        formula_unit=unit,
        charge_scheme=tables.charge_scheme,
        method=method,
        findings=[f.model_dump(mode="json") for f in found],
        structures=tables.structures,
        filling=tables.filling,
        layers=tables.layers,
    )
    if summary.caution:
        log.warning("analysis: %s", summary.caution)
    atomic_write_text(out / "analysis.json", summary.model_dump_json(indent=2))
    return summary


def _step_result(paths: CampaignPaths, step: int) -> tuple[Atoms, StepResult]:
    folder = paths.step(step)
    try:
        result = StepResult.model_validate_json(StepPaths(folder).result.read_text())
        atoms = read(StepPaths(folder).relaxed)
    except (OSError, ValueError) as err:
        raise IonwellError(f"{folder}: cannot read the step's result ({err})") from None
    return atoms, result


def _fmt(v: float | int | None, spec: str = ".4f") -> str:
    return "" if v is None else format(v, spec)


class _Tables(NamedTuple):
    files: list[str]
    charge_scheme: str | None
    structures: list[str]
    filling: str | None
    layers: list[StepLayers]


#: order in which ``charge_scheme: auto`` takes the schemes the engine recorded
CHARGE_PREFERENCE = ("iao", "meta-lowdin", "lowdin", "mulliken")


def _charge_scheme(settings: AnalysisConfig, results: list[StepResult]) -> str | None:
    """The one scheme used for every step: the one asked for, or (``auto``) the first of
    :data:`CHARGE_PREFERENCE` that every step recorded. None when no step has charges."""
    from ionwell.science.charges import select_charges

    if not any(r.charges is not None or r.charge_sets for r in results):
        return None
    wanted = [settings.charge_scheme] if settings.charge_scheme != "auto" else CHARGE_PREFERENCE
    for name in wanted:
        if all(select_charges(r.charge_sets, r.charges, name, r.charge_scheme) for r in results):
            return name
    if settings.charge_scheme != "auto":
        raise ConfigError(
            f"analysis.charge_scheme: '{settings.charge_scheme}' charges were not recorded for "
            "every step (the engine records: "
            + ", ".join(sorted(results[0].charge_sets or {results[0].charge_scheme: []}))
            + "); choose one of those or 'auto'"
        )
    return None


def _charges(res: StepResult, scheme: str | None) -> list[float] | None:
    from ionwell.science.charges import select_charges

    if scheme is None:
        return None
    got = select_charges(res.charge_sets, res.charges, scheme, res.charge_scheme)
    return None if got is None else list(got[1])


def _step_tables(
    paths: CampaignPaths,
    campaign,
    cfg: AnalysisConfig,
    records,
    n_host: int,
    out: Path,
    caution: str,
) -> _Tables:
    """Per-step layers, sites, charges, frontier level, DOS and structure views."""
    results = [_step_result(paths, r.step) for r in records]
    scheme = _charge_scheme(cfg, [res for _, res in results])
    pristine = next((res for r, (_, res) in zip(records, results, strict=True) if r.step == 0),
                    None)  # fmt: skip
    p_charges = None
    p_front = None
    if pristine is not None:
        q0 = _charges(pristine, scheme)
        p_charges = None if q0 is None else q0[:n_host]
        p_front = frontier_level(pristine.fermi_level, pristine.homo, pristine.lumo)
    diags = [
        diagnose(
            r.step,
            atoms,
            n_host,
            charges=_charges(res, scheme),
            charge_scheme=scheme,
            pristine_charges=p_charges,
            fermi=res.fermi_level,
            homo=res.homo,
            lumo=res.lumo,
            pristine_frontier=p_front,
            rim_width=cfg.rim_width,
        )
        for r, (atoms, res) in zip(records, results, strict=True)
    ]
    files: list[str] = []

    layered = [d for d in diags if d.galleries]
    if layered:
        _write_csv(
            out / "layers.csv",
            ["step", "guests", "gallery", "lower_layer", "upper_layer", "spacing_A",
             "gallery_guests", "registry", "on_top_fraction", "over_centre_fraction",
             "registry_atoms", "stage", "staging"],
            [[d.step, d.guests, g.index, g.lower, g.upper, f"{g.spacing:.4f}", g.guests,
              g.registry or "", _fmt(g.matched_fraction, ".3f"),
              _fmt(g.centred_fraction, ".3f"), g.registry_atoms, _fmt(d.stage, "d"),
              d.staging or ""] for d in layered for g in d.galleries],
        )  # fmt: skip
        charts.occupancy_map(out / "occupancy_map.png", layered, caution=caution)
        charts.stacking_plot(out / "stacking.png", layered, caution=caution)
        files += ["occupancy_map.png", "stacking.png", "layers.csv"]

    site_rows = []
    for d in diags:
        site_rows.append(
            [d.step, d.guests, _fmt(d.rim_guests, "d"), _fmt(d.interior_guests, "d"),
             _fmt(d.guests_outside, "d"), _fmt(d.spacing.min), _fmt(d.spacing.mean),
             " ".join(f"{v:.3f}" for v in d.guest_depths)]
        )  # fmt: skip
    _write_csv(
        out / "sites.csv",
        ["step", "guests", "rim_guests", "interior_guests", "guests_outside_galleries",
         "nearest_guest_min_A", "nearest_guest_mean_A", "guest_depths_A"],
        site_rows,
    )  # fmt: skip
    if any(d.rim_guests is not None for d in diags) and any(d.guests for d in diags):
        charts.rim_plot(out / "rim.png", diags, cfg.rim_width, caution=caution)
        files.append("rim.png")
    files.append("sites.csv")

    if scheme is not None and any(d.host_electrons_gained is not None for d in diags):
        interior = any(d.host_interior_atoms for d in diags)
        _write_csv(
            out / "charges.csv",
            ["step", "guests", f"mean_guest_charge_e ({scheme})",
             f"host_electrons_gained_e ({scheme})", f"host_rim_electrons_gained_e ({scheme})",
             f"host_interior_electrons_gained_e ({scheme})"],
            [[d.step, d.guests, _fmt(d.mean_guest_charge), _fmt(d.host_electrons_gained),
              _fmt(d.host_electrons_gained_rim if interior else None),
              _fmt(d.host_electrons_gained_interior if interior else None)] for d in diags],
        )  # fmt: skip
        charts.charges_plot(
            out / "charges.png", diags, scheme=scheme, interior=interior, caution=caution
        )
        files += ["charges.png", "charges.csv"]

    if any(d.frontier is not None for d in diags):
        _write_csv(
            out / "electronic.csv",
            ["step", "guests", "level", "level_eV", "shift_eV", "gap_eV"],
            [[d.step, d.guests, d.frontier.kind if d.frontier else "",
              _fmt(d.frontier.value if d.frontier else None), _fmt(d.frontier_shift),
              _fmt(d.frontier.gap if d.frontier else None)] for d in diags],
        )  # fmt: skip
        files.append("electronic.csv")
    files += _dos(out, records, [res for _, res in results], diags, cfg.dos_width, caution)
    structures, filling = _views(
        out, campaign, records, [a for a, _ in results], diags, n_host, caution
    )
    if filling:
        files.insert(0, filling)
    layers = [
        StepLayers(
            step=d.step,
            guests=d.guests,
            layers=d.layers or 0,
            periodic=any(g.periodic_image for g in d.galleries),
            stage=d.stage,
            staging=d.staging,
            registries=[g.registry for g in d.galleries],
            gallery_guests=[g.guests for g in d.galleries],
            spacings=[round(g.spacing, 4) for g in d.galleries],
            guests_outside=d.guests_outside or 0,
        )
        for d in layered
    ]
    return _Tables(files, scheme, structures, filling, layers)


def _views(out: Path, campaign, records, frames: list[Atoms], diags, n_host: int, caution: str):
    """Per-step structure views (drawn once per step: a view newer than the step's structure
    is kept) and the filling-sequence figure of up to eight steps."""
    from ionwell.analysis.plots import structures

    folder = out / "structures"
    folder.mkdir(exist_ok=True)
    names = []
    guest = campaign.guest.element
    prev = 0
    for r, atoms, d in zip(records, frames, diags, strict=True):
        name = f"structures/step_{step_label(r.step)}.png"
        target = out / name
        src = StepPaths(CampaignPaths(out.parent).step(r.step)).relaxed
        fresh = target.is_file() and src.is_file() and target.stat().st_mtime >= src.stat().st_mtime
        if not fresh:
            structures.structure_view(
                target,
                atoms,
                n_host,
                normal=d.normal,
                groups=d.guest_groups,
                title=f"step {r.step}: {d.guests} {guest}",
                caution=caution,
                new=list(range(prev, d.guests)),
            )
        prev = d.guests
        names.append(name)
    if not any(d.guests for d in diags):
        return names, None
    pick = set(structures.select_frames([r.step for r in records]))
    chosen = [(r.step, a, d) for r, a, d in zip(records, frames, diags, strict=True)
              if r.step in pick]  # fmt: skip
    structures.filling_sequence(
        out / "filling.png",
        [(s, a) for s, a, _ in chosen],
        n_host,
        normal=next((d.normal for _, _, d in reversed(chosen) if d.normal), None),
        groups=[d.guest_groups for _, _, d in chosen],
        title=f"{guest} filling sequence ({method_label(campaign.engine)})",
        caution=caution,
    )
    return names, "filling.png"


def _dos(out: Path, records, results: list[StepResult], diags, width: float, caution: str):
    """DOS of every step, each on energies relative to its own frontier level (Fermi level or
    HOMO), LUMO marked: dos.csv and dos.png."""
    have = [(r.step, res, d) for r, res, d in zip(records, results, diags, strict=True)
            if res.orbital_energies and d.frontier is not None]  # fmt: skip
    if not have:
        return []
    lo, hi = -15.0, 8.0
    curves = []
    columns = []
    energies = None
    for step, res, d in have:
        ref = d.frontier.value
        shifted = [[float(v) - ref for v in c] for c in res.orbital_energies]
        energies, y = dos_on_grid(shifted, lo, hi, npts=1200, width=width)
        lumo = None if res.lumo is None or d.frontier.kind != "homo" else res.lumo - ref
        if d.frontier.kind == "fermi" and res.lumo is not None:
            lumo = res.lumo - ref
        curves.append((step, y, lumo))
        columns.append(y)
    kind = {d.frontier.kind for _, _, d in have}
    name = "Fermi level" if kind == {"fermi"} else "HOMO" if kind == {"homo"} else "frontier"
    label = {"Fermi level": "E_minus_EF_eV", "HOMO": "E_minus_HOMO_eV"}.get(name, "E_minus_Efr_eV")
    _write_csv(
        out / "dos.csv",
        [label, *[f"step_{s}" for s, _, _ in have]],
        [[f"{energies[i]:.4f}", *[f"{c[i]:.5f}" for c in columns]]
         for i in range(len(energies))],
    )  # fmt: skip
    charts.dos_plot(out / "dos.png", energies, curves, width, name, caution=caution)
    return ["dos.png", "dos.csv"]
