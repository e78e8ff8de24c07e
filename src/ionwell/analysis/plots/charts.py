"""The charts (matplotlib, Agg): each function draws one PNG from prepared numbers.

* the analysis figures of one campaign, written into its ``analysis/`` folder by
  :func:`ionwell.analysis.tables.analyse`: :func:`hull_plot`, :func:`voltage_plot`,
  :func:`occupancy_map`, :func:`stacking_plot`, :func:`rim_plot`, :func:`charges_plot`,
  :func:`dos_plot`; each stamps the campaign's caution along its bottom edge;
* the comparison figures of several campaigns, drawn in memory for the HTML report
  (:mod:`ionwell.analysis.report`): :func:`formation_comparison`, :func:`voltage_comparison`,
  each returning PNG bytes.

Energies eV, lengths Å, charges e, voltages V. Titles say "model result" where a number could be
mistaken for a measurement.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from pathlib import Path
from typing import NamedTuple

import numpy as np

from ionwell.analysis.plots.common import (
    COMPARISON_DPI,
    DPI,
    png_bytes,
    pyplot,
    save,
)
from ionwell.science import energetics
from ionwell.science.diagnostics import StepDiagnostics

__all__ = [
    "ComparedCampaign",
    "charges_plot",
    "dos_plot",
    "formation_comparison",
    "hull_plot",
    "occupancy_map",
    "rim_plot",
    "scheme_label",
    "stacking_plot",
    "voltage_comparison",
    "voltage_plot",
]

log = logging.getLogger("ionwell.analysis.plots.charts")


#: How charge schemes recorded by the engines are named in titles.
_SCHEME_NAMES = {
    "mulliken": "Mulliken",
    "iao": "IAO",
    "lowdin": "Löwdin",
    "löwdin": "Löwdin",
    "hirshfeld": "Hirshfeld",
    "cm5": "CM5",
    "eeq": "EEQ",
    "bader": "Bader",
    "ddec": "DDEC",
    "chelpg": "CHELPG",
    "resp": "RESP",
    "meta-lowdin": "meta-Löwdin",
}


def scheme_label(scheme: str | None) -> str:
    """A charge scheme as a title names it: ``"mulliken"`` → ``"Mulliken charges"``,
    ``"mulliken (GFN2-xTB)"`` → ``"Mulliken charges (GFN2-xTB)"``; None → ``"charges"``."""
    if not scheme or not scheme.strip():
        return "charges"
    head, _, rest = scheme.strip().partition(" ")
    name = _SCHEME_NAMES.get(head.lower(), head)
    return f"{name} charges" + (f" {rest.strip()}" if rest.strip() else "")


def hull_plot(
    path: Path, guest: str, x, ef, h, unit: dict[str, int], *, caution: str | None = None
) -> None:
    """Formation energy (eV) against x (guests per formula unit ``unit``) with the lower convex
    hull ``h``; ``caution`` is stamped along the bottom of the figure."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 4), dpi=DPI)
    on = [i for i in range(len(x)) if i in h.vertices]
    off = [i for i in range(len(x)) if i not in h.vertices]
    ax.plot([x[i] for i in h.vertices], [ef[i] for i in h.vertices], "-", color="0.3", lw=1.5,
            label="lower hull")  # fmt: skip
    ax.scatter([x[i] for i in on], [ef[i] for i in on], s=40, color="tab:blue", zorder=3,
               label="on the hull")  # fmt: skip
    ax.scatter([x[i] for i in off], [ef[i] for i in off], s=40, facecolors="none",
               edgecolors="tab:red", zorder=3, label="above the hull")  # fmt: skip
    host = energetics.formula_text(unit)
    ax.set_xlabel(f"x in {guest}$_x${host} (guests per {host})")
    ax.set_ylabel("formation energy / eV")
    ax.axhline(0, color="0.8", lw=0.8)
    ax.legend(frameon=False)
    ax.set_title("Formation energy and convex hull (model result)")
    save(fig, path, caution)


def voltage_plot(
    path: Path, guest: str, steps, unit: dict[str, int], z: int, *, caution: str | None = None
) -> None:
    """Voltage steps (V) between hull vertices against gravimetric capacity (mAh/g);
    ``caution`` is stamped along the bottom of the figure."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 4), dpi=DPI)
    for s in steps:
        cap = [energetics.capacity_mah_per_g(s.x_from, unit, z),
               energetics.capacity_mah_per_g(s.x_to, unit, z)]  # fmt: skip
        ax.plot(cap, [s.voltage, s.voltage], color="tab:blue", lw=2)
    for a, b in zip(steps[:-1], steps[1:], strict=True):
        c = energetics.capacity_mah_per_g(a.x_to, unit, z)
        ax.plot([c, c], [a.voltage, b.voltage], color="tab:blue", lw=1, ls=":")
    if steps:
        v = [s.voltage for s in steps]
        if max(v) - min(v) < 0.5:  # a flat profile: show it in a window of ±0.5 V, not ±0.05
            mid = 0.5 * (max(v) + min(v))
            ax.set_ylim(mid - 0.5, mid + 0.5)
    ax.set_xlabel(f"capacity / mAh g$^{{-1}}$ of {energetics.formula_text(unit)}")
    ax.set_ylabel(f"voltage vs {guest}/{guest}$^{{{z}+}}$ / V" if z > 1 else
                  f"voltage vs {guest}/{guest}$^+$ / V")  # fmt: skip
    ax.set_title("Voltage steps between hull vertices (model result)")
    save(fig, path, caution)


def occupancy_map(
    path: Path, diags: Sequence[StepDiagnostics], *, caution: str | None = None
) -> None:
    """Guests per gallery (rows) at each step (columns); stage on the top axis; a row for guests
    outside every gallery when there are any."""
    plt = pyplot()
    n_gal = max(len(d.galleries) for d in diags)
    outside = any(d.guests_outside for d in diags)
    rows = n_gal + (1 if outside else 0)
    steps = [d.step for d in diags]
    grid = np.full((rows, len(diags)), np.nan)
    for j, d in enumerate(diags):
        for g in d.galleries:
            grid[g.index, j] = g.guests
        if outside:
            grid[n_gal, j] = d.guests_outside or 0
    fig, ax = plt.subplots(figsize=(max(5.0, 0.45 * len(steps) + 2.5), 1.6 + 0.6 * rows + 0.8),
                           dpi=DPI)  # fmt: skip
    vmax = max(1.0, float(np.nanmax(grid)) if np.isfinite(grid).any() else 1.0)
    im = ax.imshow(grid, origin="lower", aspect="auto", cmap="viridis", vmin=0, vmax=vmax,
                   extent=(steps[0] - 0.5, steps[-1] + 0.5, -0.5, rows - 0.5))  # fmt: skip
    for j, d in enumerate(diags):
        for i in range(rows):
            if np.isfinite(grid[i, j]):
                v = int(grid[i, j])
                ax.text(d.step, i, str(v), ha="center", va="center", fontsize=8,
                        color="white" if v < 0.6 * vmax else "black")  # fmt: skip
    labels = [f"gallery {i}" for i in range(n_gal)] + (["outside"] if outside else [])
    ax.set_yticks(range(rows), labels)
    ax.set_xlabel("step")
    top = ax.secondary_xaxis("top")
    top.set_xticks(steps, ["–" if d.stage is None else str(d.stage) for d in diags])
    top.set_xlabel("stage")
    ax.set_title("Guests per gallery")
    fig.colorbar(im, ax=ax, label="guests", fraction=0.04)
    save(fig, path, caution)


def stacking_plot(
    path: Path, diags: Sequence[StepDiagnostics], *, caution: str | None = None
) -> None:
    """Per adjacent layer pair: interlayer spacing (Å) and registry (AA / AB / other) by step."""
    plt = pyplot()
    n_gal = max(len(d.galleries) for d in diags)
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(6.5, 5.5), dpi=DPI, sharex=True)
    marks = {"AA": "s", "AB": "o", "other": "x", None: "."}
    colours = plt.get_cmap("tab10")
    for k in range(n_gal):
        rows = [(d.step, g) for d in diags for g in d.galleries if g.index == k]
        if not rows:
            continue
        c = colours(k % 10)
        name = f"layers {rows[0][1].lower}/{rows[0][1].upper}"
        ax1.plot([s for s, _ in rows], [g.spacing for _, g in rows], "-", color=c, label=name)
        levels = {"AA": 2, "AB": 1, "other": 0}
        for s, g in rows:
            ax2.scatter(s + 0.08 * (k - (n_gal - 1) / 2), levels.get(g.registry, -1), color=c,
                        marker=marks.get(g.registry, "."), s=40)  # fmt: skip
        ax2.plot([], [], color=c, marker="o", ls="", label=name)
    ax1.set_ylabel("interlayer spacing / Å")
    ax1.legend(frameon=False, fontsize=8)
    ax1.set_title("Stacking of each adjacent layer pair")
    ax2.set_yticks([-1, 0, 1, 2], ["n/a", "other", "AB", "AA"])
    ax2.set_ylim(-1.5, 2.5)
    ax2.set_xlabel("step")
    ax2.set_ylabel("registry")
    ax2.grid(axis="y", color="0.9")
    save(fig, path, caution)


def rim_plot(
    path: Path,
    diags: Sequence[StepDiagnostics],
    rim_width: float,
    *,
    caution: str | None = None,
) -> None:
    """Rim / interior guests per step (bars) and the nearest guest–guest distance (Å)."""
    plt = pyplot()
    rows = [d for d in diags if d.rim_guests is not None]
    steps = [d.step for d in rows]
    rim = [d.rim_guests for d in rows]
    inner = [d.interior_guests for d in rows]
    fig, ax = plt.subplots(figsize=(6.5, 4), dpi=DPI)
    ax.bar(steps, inner, color="tab:green", label="interior")
    ax.bar(steps, rim, bottom=inner, color="tab:orange", label=f"rim (≤ {rim_width:g} Å of edge)")
    ax.set_xlabel("step")
    ax.set_ylabel("guests")
    ax2 = ax.twinx()
    dmin = [np.nan if d.spacing.min is None else d.spacing.min for d in rows]
    dmean = [np.nan if d.spacing.mean is None else d.spacing.mean for d in rows]
    ax2.plot(steps, dmin, "k.-", label="closest guest pair")
    ax2.plot(steps, dmean, "k:", label="mean nearest-guest distance")
    ax2.set_ylabel("guest–guest distance / Å")
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, frameon=False, fontsize=8, loc="upper left")
    ax.set_title("Where the guests sit: rim or interior of the particle")
    save(fig, path, caution)


def _nan(v: float | None) -> float:
    return np.nan if v is None else float(v)


def charges_plot(
    path: Path,
    diags: Sequence[StepDiagnostics],
    *,
    scheme: str,
    interior: bool,
    caution: str | None = None,
) -> None:
    """Charge transfer per step in two panels (charges in e, in the charge scheme ``scheme``).

    Top: the mean guest charge. Bottom: the electrons the host gained since step 0 — all host
    atoms, and, when ``interior`` is True (the host has interior atoms), its rim and interior
    atoms. Each line has its own marker, line style and a small horizontal offset, so none hides
    another where they coincide.
    """
    plt = pyplot()
    rows = [d for d in diags if d.host_electrons_gained is not None]
    steps = np.array([d.step for d in rows], dtype=float)
    gaps = np.diff(np.unique(steps))
    dx = 0.07 * (float(gaps.min()) if len(gaps) else 1.0)
    label = scheme_label(scheme)
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(6.5, 5.6), dpi=DPI, sharex=True,
                                      height_ratios=(1, 1.35))  # fmt: skip
    top.plot(steps, [_nan(d.mean_guest_charge) for d in rows], "D-", color="#D55E00", ms=5,
             label="mean guest charge")  # fmt: skip
    top.axhline(0, color="0.8", lw=0.8)
    top.set_ylabel("guest charge / e")
    top.set_title(f"Mean guest charge · {label}", fontsize=10)
    top.legend(frameon=False, fontsize=8)

    series = [("host, all atoms", [d.host_electrons_gained for d in rows], "o", "-", "#0072B2")]
    if interior:
        series += [
            ("host rim atoms", [d.host_electrons_gained_rim for d in rows], "s", "--", "#E69F00"),
            ("host interior atoms", [d.host_electrons_gained_interior for d in rows], "^", ":",
             "#009E73"),
        ]  # fmt: skip
    for k, (name, values, marker, ls, colour) in enumerate(series):
        shift = (k - (len(series) - 1) / 2) * dx
        bottom.plot(steps + shift, [_nan(v) for v in values], marker=marker, ls=ls,
                    color=colour, ms=5, mfc="white" if k else colour, label=name)  # fmt: skip
    bottom.axhline(0, color="0.8", lw=0.8)
    bottom.set_xlabel("step")
    bottom.set_ylabel("gained since step 0 / e")
    bottom.set_title(f"Electrons gained by the host · {label}", fontsize=10)
    bottom.legend(frameon=False, fontsize=8)
    if len(steps):
        bottom.set_xticks(np.unique(steps))
    save(fig, path, caution)


#: Axis label of energies relative to the frontier level, by the level's name.
_LEVEL_AXIS = {
    "fermi level": "$E - E_\\mathrm{F}$ / eV",
    "fermi": "$E - E_\\mathrm{F}$ / eV",
    "homo": "$E - E_\\mathrm{HOMO}$ / eV",
}


def dos_plot(
    path: Path,
    energies: np.ndarray,
    curves: Sequence[tuple[int, np.ndarray, float | None]],
    width: float,
    level_name: str,
    *,
    caution: str | None = None,
) -> None:
    """DOS overlay (states/eV), one curve per step offset upwards, on energies (eV) relative to
    each step's frontier level (``level_name``: "Fermi level" or "HOMO"), so 0 marks that level
    for every curve.

    ``curves`` holds ``(step, dos, lumo)`` with ``lumo`` the step's LUMO relative to its
    frontier level (eV; None when unknown), marked with a short tick on that curve.
    """
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6.5, max(4.0, 1.5 + 0.35 * len(curves))), dpi=DPI)
    cmap = plt.get_cmap("viridis")
    top = max(float(c.max()) for _, c, _ in curves) if curves else 1.0
    offset = 0.6 * top if top > 0 else 1.0
    lumo_colour = "#D55E00"
    any_lumo = False
    for k, (step, dos, lumo) in enumerate(curves):
        colour = cmap(0.85 * k / max(1, len(curves) - 1))
        base = k * offset
        ax.fill_between(energies, base, base + dos, color=colour, alpha=0.25, lw=0)
        ax.plot(energies, base + dos, color=colour, lw=1)
        if lumo is not None and energies[0] <= lumo <= energies[-1]:
            ax.plot([lumo, lumo], [base, base + 0.45 * offset], color=lumo_colour, lw=2.0,
                    solid_capstyle="butt", zorder=4)  # fmt: skip
            any_lumo = True
        ax.text(energies[-1], base + 0.05 * offset, f"step {step}", ha="right", fontsize=7)
    ax.axvline(0.0, color="0.15", lw=1.0, ls="--", zorder=3, label=f"{level_name} (E = 0)")
    if any_lumo:
        ax.plot([], [], color=lumo_colour, lw=2.0, label="LUMO of that step")
    ax.set_xlabel(_LEVEL_AXIS.get(level_name.strip().lower(), f"E − E({level_name}) / eV"))
    ax.set_ylabel("DOS / states eV$^{-1}$ (offset per step)")
    ax.set_yticks([])
    ax.set_xlim(float(energies[0]), float(energies[-1]))
    marks = f"dashed: {level_name}" + ("; ticks: LUMO" if any_lumo else "")
    ax.set_title(f"Density of states, Gaussian σ = {width:g} eV ({marks})", fontsize=10)
    ax.legend(frameon=False, fontsize=8, loc="upper left")
    save(fig, path, caution)


# ---------------------------------------------------------------------------------------------
# comparison figures of several campaigns (in memory, for the report)


class ComparedCampaign(NamedTuple):
    """One campaign's numbers in the comparison figures."""

    name: str
    #: the campaign's place among all compared campaigns; picks its colour, marker and line style
    slot: int
    #: ``(x, formation energy in eV, on the hull)`` per step
    formation: Sequence[tuple[float, float, bool]]
    #: ``(x_from, x_to, voltage in V)`` per voltage step between hull vertices
    voltage: Sequence[tuple[float, float, float]] = ()


def _comparison_style(slot: int) -> tuple[str, str, str]:
    """Colour, marker and line style of the campaign in ``slot``: all three change from one
    campaign to the next, so overlapping curves stay apart."""
    return f"C{slot % 10}", "osD^v<>ph*"[slot % 10], ("-", "--", "-.", ":")[slot % 4]


def formation_comparison(campaigns: Sequence[ComparedCampaign]) -> bytes:
    """PNG: formation energy (eV) against x of every campaign, its lower hull drawn through the
    points on the hull (filled) and the others open; one legend entry per campaign."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7, 4.5), dpi=COMPARISON_DPI)
    ax = fig.add_subplot()
    for c in campaigns:
        colour, marker, ls = _comparison_style(c.slot)
        pts = c.formation
        on = sorted((x, e) for x, e, h in pts if h)
        ax.plot([p[0] for p in on], [p[1] for p in on], ls, color=colour, lw=1.5, alpha=0.8)
        ax.scatter([x for x, _, h in pts if h], [e for _, e, h in pts if h], s=36, color=colour,
                   marker=marker, zorder=3, label=c.name)  # fmt: skip
        ax.scatter([x for x, _, h in pts if not h], [e for _, e, h in pts if not h], s=36,
                   marker=marker, facecolors="none", edgecolors=colour, zorder=3)  # fmt: skip
    ax.axhline(0.0, color="0.8", lw=0.8)
    ax.set_xlabel("x (guests per host formula unit)")
    ax.set_ylabel("formation energy / eV")
    ax.set_title("Formation energy and lower hull per campaign (model results)")
    ax.text(0.99, 0.01, "filled: on the hull, open: above it", transform=ax.transAxes,
            ha="right", va="bottom", fontsize="x-small", color="0.4")  # fmt: skip
    ax.legend(frameon=False, fontsize="small")
    fig.tight_layout()
    return png_bytes(fig)


def voltage_comparison(campaigns: Sequence[ComparedCampaign]) -> bytes:
    """PNG: the voltage step profile (V) against x of every campaign, steps joined by dotted
    risers; campaigns without voltage steps draw nothing. Raises ValueError when none has any."""
    from matplotlib.figure import Figure

    if not any(c.voltage for c in campaigns):
        raise ValueError("voltage comparison: no campaign has a voltage step")
    fig = Figure(figsize=(7, 4.5), dpi=COMPARISON_DPI)
    ax = fig.add_subplot()
    for c in campaigns:
        colour, _, ls = _comparison_style(c.slot)
        segs = c.voltage
        for k, (a, b, v) in enumerate(segs):
            ax.plot([a, b], [v, v], ls, color=colour, lw=2, alpha=0.85,
                    label=c.name if k == 0 else None)  # fmt: skip
        for (_, b, v0), (_, _, v1) in zip(segs[:-1], segs[1:], strict=True):
            ax.plot([b, b], [v0, v1], color=colour, lw=0.8, ls=":")
    ax.set_xlabel("x (guests per host formula unit)")
    ax.set_ylabel("voltage / V")
    ax.set_title("Voltage profile per campaign (model results)")
    ax.legend(frameon=False, fontsize="small")
    fig.tight_layout()
    return png_bytes(fig)
