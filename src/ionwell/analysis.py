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
* ``analysis.json``, the :class:`AnalysisSummary` listing the files in reading order.

The numbers come from pure modules (:mod:`ionwell.energetics`, :mod:`ionwell.diagnostics`,
:mod:`ionwell.dos`), the figures from :mod:`ionwell.plots`; this module reads and writes.
"""

from __future__ import annotations

import csv
import io
import logging
from pathlib import Path

import numpy as np
from ase import Atoms
from ase.io import read
from pydantic import BaseModel

from ionwell import energetics, plots
from ionwell.campaign import CampaignPaths, atomic_write_text, load_frozen
from ionwell.diagnostics import diagnose
from ionwell.dos import dos_on_grid, frontier_level
from ionwell.engines.base import StepResult
from ionwell.errors import IonwellError
from ionwell.host import host_formula_units
from ionwell.ledger import read_ledger
from ionwell.store.paths import StepPaths

__all__ = ["AnalysisSummary", "Reference", "analyse", "guest_reference"]

log = logging.getLogger("ionwell.analysis")


class Reference(BaseModel):
    """The guest's chemical potential as used, and where it came from."""

    mu: float  # eV per guest
    source: str
    atom_energy: float | None = None  # eV, isolated atom with the campaign's engine
    bulk_energy: float | None = None  # eV, the bulk reference cell with the campaign's engine
    bulk_atoms: int | None = None
    cohesive_energy: float | None = None  # eV per atom


class AnalysisSummary(BaseModel):
    """What :func:`analyse` wrote."""

    folder: str
    steps: int
    reference: Reference | None
    hull_steps: list[int]
    voltages: list[float]
    files: list[str]
    caution: str | None = None


def _reference_file(paths: CampaignPaths) -> Path:
    return paths.root / "reference.json"


def guest_reference(root: str | Path) -> Reference | None:
    """μ of the guest for the campaign in ``root`` (computed once, then read back)."""
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    ref = campaign.analysis.reference
    if ref is None:
        return None
    f = _reference_file(paths)
    if f.is_file():
        return Reference.model_validate_json(f.read_text())
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


def analyse(root: str | Path) -> AnalysisSummary:
    """Write the tables and plots of the campaign in ``root`` into ``analysis/``.

    Works on a finished campaign and on one still running (the steps in the ledger so far).
    """
    paths = CampaignPaths(Path(root))
    campaign = load_frozen(paths)
    records = [r for r in read_ledger(paths.ledger) if r.energy is not None]
    if not records:
        raise IonwellError(f"{paths.root}: no finished step to analyse yet")
    out = paths.root / "analysis"
    out.mkdir(exist_ok=True)
    host = read(paths.host)
    unit = campaign.host.formula_unit
    units = host_formula_units(host, unit)
    if unit is None:
        unit = {
            s: int(n)
            for s, n in zip(
                *np.unique(host.get_chemical_symbols(), return_counts=True), strict=True
            )
        }
    z = campaign.analysis.valence
    n = [r.guests for r in records]
    e = [float(r.energy) for r in records]
    x = [k / units for k in n]
    ref = guest_reference(paths.root)
    files: list[str] = []
    rows = []
    hull_steps: list[int] = []
    voltages: list[float] = []
    if ref is not None and 0 in n:
        ef = energetics.formation_energies(e, n, ref.mu)
        h = energetics.hull(n, ef)
        hull_steps = [records[i].step for i in h.vertices]
        steps = energetics.voltage_profile(e, n, ref.mu, units, z)
        voltages = [s.voltage for s in steps]
        for i, r in enumerate(records):
            rows.append(
                [r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", f"{ef[i]:.6f}",
                 f"{h.above[i]:.6f}", int(i in h.vertices),
                 f"{energetics.capacity_mah_per_g(x[i], unit, z):.3f}"]
            )  # fmt: skip
        _write_csv(
            out / "voltage.csv",
            ["n_from", "n_to", "x_from", "x_to", "voltage_V"],
            [[s.n_from, s.n_to, f"{s.x_from:.6f}", f"{s.x_to:.6f}", f"{s.voltage:.6f}"]
             for s in steps],
        )  # fmt: skip
        plots.hull_plot(out / "hull.png", campaign.guest.element, x, ef, h, unit)
        plots.voltage_plot(out / "voltage.png", campaign.guest.element, steps, unit, z)
        files += ["hull.png", "voltage.png", "voltage.csv"]
    else:
        for i, r in enumerate(records):
            rows.append([r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", "", "", "",
                         f"{energetics.capacity_mah_per_g(x[i], unit, z):.3f}"])  # fmt: skip
        if ref is None:
            log.info("no analysis.reference in the config: formation energies, hull and voltage "
                     "need the guest's chemical potential")  # fmt: skip
    _write_csv(
        out / "energetics.csv",
        ["step", "guests", "x", "energy_eV", "formation_eV", "above_hull_eV", "on_hull",
         "capacity_mAh_per_g"],
        rows,
    )  # fmt: skip
    files.insert(0, "energetics.csv")
    files += _step_tables(paths, campaign, records, len(host), out)
    caution = None
    if ref is not None and campaign.guest.charge_mode == "cation":
        caution = (
            "cation mode: each structure holds guest ions (+1 each), the reference is the neutral "
            "guest, so formation energies and voltages include the ionisation energy and the "
            "cluster's charging energy; use charge_mode: neutral for a voltage profile"
        )
        log.warning("analysis: %s", caution)
    summary = AnalysisSummary(
        caution=caution,
        folder=str(out),
        steps=len(records),
        reference=ref,
        hull_steps=hull_steps,
        voltages=voltages,
        files=files,
    )
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


def _step_tables(paths: CampaignPaths, campaign, records, n_host: int, out: Path) -> list[str]:
    """Per-step layers, sites, charges, frontier level and DOS: CSV tables and plots."""
    cfg = campaign.analysis
    results = [_step_result(paths, r.step) for r in records]
    pristine = next((res for r, (_, res) in zip(records, results, strict=True) if r.step == 0),
                    None)  # fmt: skip
    p_charges = None
    p_front = None
    if pristine is not None:
        p_charges = None if pristine.charges is None else pristine.charges[:n_host]
        p_front = frontier_level(pristine.fermi_level, pristine.homo, pristine.lumo)
    diags = [
        diagnose(
            r.step,
            atoms,
            n_host,
            charges=res.charges,
            charge_scheme=res.charge_scheme,
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
             "gallery_guests", "registry", "matched_fraction", "stage", "staging"],
            [[d.step, d.guests, g.index, g.lower, g.upper, f"{g.spacing:.4f}", g.guests,
              g.registry or "", _fmt(g.matched_fraction, ".3f"), _fmt(d.stage, "d"),
              d.staging or ""] for d in layered for g in d.galleries],
        )  # fmt: skip
        plots.occupancy_map(out / "occupancy_map.png", layered)
        plots.stacking_plot(out / "stacking.png", layered)
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
        plots.rim_plot(out / "rim.png", diags, cfg.rim_width)
        files.append("rim.png")
    files.append("sites.csv")

    if any(d.host_electrons_gained is not None for d in diags):
        _write_csv(
            out / "charges.csv",
            ["step", "guests", "scheme", "mean_guest_charge_e", "host_electrons_gained_e",
             "host_rim_electrons_gained_e", "host_interior_electrons_gained_e"],
            [[d.step, d.guests, d.charge_scheme or "", _fmt(d.mean_guest_charge),
              _fmt(d.host_electrons_gained), _fmt(d.host_electrons_gained_rim),
              _fmt(d.host_electrons_gained_interior)] for d in diags],
        )  # fmt: skip
        plots.charges_plot(out / "charges.png", diags)
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
    files += _dos(out, records, [res for _, res in results], diags, cfg.dos_width)
    return files


def _dos(out: Path, records, results: list[StepResult], diags, width: float) -> list[str]:
    """DOS of every step with orbital energies on one energy window: dos.csv and dos.png."""
    have = [(r.step, res, d) for r, res, d in zip(records, results, diags, strict=True)
            if res.orbital_energies]  # fmt: skip
    if not have:
        return []
    levels = [d.frontier.value for _, _, d in have if d.frontier is not None]
    all_e = np.concatenate([np.concatenate([np.asarray(c) for c in res.orbital_energies])
                            for _, res, _ in have])  # fmt: skip
    lo = (min(levels) - 15.0) if levels else float(all_e.min())
    hi = (max(levels) + 8.0) if levels else float(all_e.max())
    lo, hi = max(lo, float(all_e.min()) - 3 * width), min(hi, float(all_e.max()) + 3 * width)
    curves = []
    columns = []
    energies = None
    for step, res, d in have:
        energies, y = dos_on_grid(res.orbital_energies, lo, hi, npts=1200, width=width)
        curves.append((step, y, None if d.frontier is None else d.frontier.value))
        columns.append(y)
    _write_csv(
        out / "dos.csv",
        ["energy_eV", *[f"step_{s}" for s, _, _ in have]],
        [[f"{energies[i]:.4f}", *[f"{c[i]:.5f}" for c in columns]]
         for i in range(len(energies))],
    )  # fmt: skip
    kind = {d.frontier.kind for _, _, d in have if d.frontier is not None}
    name = "Fermi level" if kind == {"fermi"} else "HOMO" if kind == {"homo"} else "frontier"
    plots.dos_plot(out / "dos.png", energies, curves, width, name)
    return ["dos.png", "dos.csv"]
