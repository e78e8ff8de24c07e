"""Analysis of a campaign folder (I/O): the guest reference, energetics tables and plots.

:func:`guest_reference` establishes μ of the guest (given, or the isolated atom computed with
the campaign's engine minus a cohesive energy) and records it with its source in
``reference.json``. :func:`analyse` reads the ledger — of a finished campaign or one still
running — and writes into ``analysis/``:

* ``energetics.csv``: step, guests, x, total energy, formation energy, energy above the hull,
  on-hull flag, capacity (mAh/g);
* ``voltage.csv``: the voltage steps between hull vertices;
* ``hull.png`` and ``voltage.png``.

The numbers come from :mod:`ionwell.energetics` (pure); this module only reads and writes.
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

from ionwell import energetics
from ionwell.campaign import CampaignPaths, atomic_write_text, load_frozen
from ionwell.errors import IonwellError
from ionwell.host import host_formula_units
from ionwell.ledger import read_ledger

__all__ = ["AnalysisSummary", "Reference", "analyse", "guest_reference"]

log = logging.getLogger("ionwell.analysis")


class Reference(BaseModel):
    """The guest's chemical potential as used, and where it came from."""

    mu: float  # eV per guest
    source: str
    atom_energy: float | None = None  # eV, isolated atom with the campaign's engine
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
    else:
        energy = _atom_energy(campaign, paths.root / "reference")
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


def _atom_energy(campaign, workdir: Path) -> float:
    from ionwell.engines import get_engine
    from ionwell.engines.base import ComputeContext

    variant = campaign.model_copy(
        update={"relax": campaign.relax.model_copy(update={"enabled": False})}
    )
    engine = get_engine(variant)
    atom = Atoms(campaign.guest.element, positions=[[0.0, 0.0, 0.0]])
    engine.prepare(atom, workdir, ComputeContext(step=0, charge=0))
    if engine.argv(workdir, None) is not None:
        engine.launch(workdir, campaign.launcher)
    else:
        engine.run(workdir)
    result, _ = engine.collect(workdir)
    if not result.scf_converged:
        raise IonwellError(f"{workdir}: the SCF of the isolated guest atom did not converge")
    return float(result.energy)


def _write_csv(path: Path, header: list[str], rows: list[list]) -> None:
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(header)
    w.writerows(rows)
    atomic_write_text(path, buf.getvalue())


def analyse(root: str | Path) -> AnalysisSummary:
    """Write the energetics tables and plots of the campaign in ``root`` into ``analysis/``."""
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
    n = [r.guests for r in records]
    e = [float(r.energy) for r in records]
    x = [k / units for k in n]
    ref = guest_reference(paths.root)
    files = []
    rows = []
    hull_steps: list[int] = []
    voltages: list[float] = []
    if ref is not None and 0 in n:
        ef = energetics.formation_energies(e, n, ref.mu)
        h = energetics.hull(n, ef)
        hull_steps = [records[i].step for i in h.vertices]
        steps = energetics.voltage_profile(e, n, ref.mu, units, campaign.analysis.valence)
        voltages = [s.voltage for s in steps]
        for i, r in enumerate(records):
            rows.append(
                [r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", f"{ef[i]:.6f}",
                 f"{h.above[i]:.6f}", int(i in h.vertices),
                 f"{energetics.capacity_mah_per_g(x[i], unit, campaign.analysis.valence):.3f}"]
            )  # fmt: skip
        _write_csv(
            out / "voltage.csv",
            ["n_from", "n_to", "x_from", "x_to", "voltage_V"],
            [[s.n_from, s.n_to, f"{s.x_from:.6f}", f"{s.x_to:.6f}", f"{s.voltage:.6f}"]
             for s in steps],
        )  # fmt: skip
        files.append("voltage.csv")
        _plots(out, campaign.guest.element, x, ef, h, steps, unit, campaign.analysis.valence)
        files += ["hull.png", "voltage.png"]
    else:
        for i, r in enumerate(records):
            rows.append([r.step, r.guests, f"{x[i]:.6f}", f"{e[i]:.6f}", "", "", "",
                         f"{energetics.capacity_mah_per_g(x[i], unit, 1):.3f}"])  # fmt: skip
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


def _plots(out: Path, guest: str, x, ef, h, steps, unit, z: int) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    name = "".join(f"{el}{k if k != 1 else ''}" for el, k in unit.items())
    fig, ax = plt.subplots(figsize=(6, 4), dpi=120)
    on = [i for i in range(len(x)) if i in h.vertices]
    off = [i for i in range(len(x)) if i not in h.vertices]
    ax.plot([x[i] for i in h.vertices], [ef[i] for i in h.vertices], "-", color="0.3", lw=1.5,
            label="lower hull")  # fmt: skip
    ax.scatter([x[i] for i in on], [ef[i] for i in on], s=40, color="tab:blue", zorder=3,
               label="on the hull")  # fmt: skip
    ax.scatter([x[i] for i in off], [ef[i] for i in off], s=40, facecolors="none",
               edgecolors="tab:red", zorder=3, label="above the hull")  # fmt: skip
    ax.set_xlabel(f"x in {guest}$_x${name}")
    ax.set_ylabel("formation energy / eV")
    ax.axhline(0, color="0.8", lw=0.8)
    ax.legend(frameon=False)
    ax.set_title("Formation energy and convex hull (model result)")
    fig.tight_layout()
    fig.savefig(out / "hull.png")
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(6, 4), dpi=120)
    for s in steps:
        cap = [energetics.capacity_mah_per_g(s.x_from, unit, z),
               energetics.capacity_mah_per_g(s.x_to, unit, z)]  # fmt: skip
        ax.plot(cap, [s.voltage, s.voltage], color="tab:blue", lw=2)
    for a, b in zip(steps[:-1], steps[1:], strict=True):
        c = energetics.capacity_mah_per_g(a.x_to, unit, z)
        ax.plot([c, c], [a.voltage, b.voltage], color="tab:blue", lw=1, ls=":")
    ax.set_xlabel(f"capacity / mAh g$^{{-1}}$ of {name}")
    ax.set_ylabel(f"voltage vs {guest}/{guest}$^{{{z}+}}$ / V" if z > 1 else
                  f"voltage vs {guest}/{guest}$^+$ / V")  # fmt: skip
    ax.set_title("Voltage steps between hull vertices (model result)")
    fig.tight_layout()
    fig.savefig(out / "voltage.png")
    plt.close(fig)
