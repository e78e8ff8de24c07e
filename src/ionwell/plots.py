"""The analysis figures (matplotlib, Agg): each function draws one PNG from prepared numbers.

Energies eV, lengths Å, charges e, voltages V. Titles say "model result" where a number could be
mistaken for a measurement.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ionwell import energetics
from ionwell.diagnostics import StepDiagnostics

__all__ = [
    "charges_plot",
    "dos_plot",
    "hull_plot",
    "occupancy_map",
    "rim_plot",
    "stacking_plot",
    "voltage_plot",
]

DPI = 120


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path) -> None:
    fig.tight_layout()
    fig.savefig(path)
    _pyplot().close(fig)


def formula(unit: dict[str, int]) -> str:
    return "".join(f"{el}{k if k != 1 else ''}" for el, k in unit.items())


def hull_plot(path: Path, guest: str, x, ef, h, unit: dict[str, int]) -> None:
    """Formation energy (eV) against x with the lower convex hull."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 4), dpi=DPI)
    on = [i for i in range(len(x)) if i in h.vertices]
    off = [i for i in range(len(x)) if i not in h.vertices]
    ax.plot([x[i] for i in h.vertices], [ef[i] for i in h.vertices], "-", color="0.3", lw=1.5,
            label="lower hull")  # fmt: skip
    ax.scatter([x[i] for i in on], [ef[i] for i in on], s=40, color="tab:blue", zorder=3,
               label="on the hull")  # fmt: skip
    ax.scatter([x[i] for i in off], [ef[i] for i in off], s=40, facecolors="none",
               edgecolors="tab:red", zorder=3, label="above the hull")  # fmt: skip
    ax.set_xlabel(f"x in {guest}$_x${formula(unit)}")
    ax.set_ylabel("formation energy / eV")
    ax.axhline(0, color="0.8", lw=0.8)
    ax.legend(frameon=False)
    ax.set_title("Formation energy and convex hull (model result)")
    _save(fig, path)


def voltage_plot(path: Path, guest: str, steps, unit: dict[str, int], z: int) -> None:
    """Voltage steps (V) between hull vertices against gravimetric capacity (mAh/g)."""
    plt = _pyplot()
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
    ax.set_xlabel(f"capacity / mAh g$^{{-1}}$ of {formula(unit)}")
    ax.set_ylabel(f"voltage vs {guest}/{guest}$^{{{z}+}}$ / V" if z > 1 else
                  f"voltage vs {guest}/{guest}$^+$ / V")  # fmt: skip
    ax.set_title("Voltage steps between hull vertices (model result)")
    _save(fig, path)


def occupancy_map(path: Path, diags: Sequence[StepDiagnostics]) -> None:
    """Guests per gallery (rows) at each step (columns); stage on the top axis; a row for guests
    outside every gallery when there are any."""
    plt = _pyplot()
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
    _save(fig, path)


def stacking_plot(path: Path, diags: Sequence[StepDiagnostics]) -> None:
    """Per adjacent layer pair: interlayer spacing (Å) and registry (AA / AB / other) by step."""
    plt = _pyplot()
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
    _save(fig, path)


def rim_plot(path: Path, diags: Sequence[StepDiagnostics], rim_width: float) -> None:
    """Rim / interior guests per step (bars) and the nearest guest–guest distance (Å)."""
    plt = _pyplot()
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
    _save(fig, path)


def charges_plot(path: Path, diags: Sequence[StepDiagnostics]) -> None:
    """Mean guest charge and the host's electron gain (rim / interior) per step (e)."""
    plt = _pyplot()
    rows = [d for d in diags if d.host_electrons_gained is not None]
    steps = [d.step for d in rows]
    fig, ax = plt.subplots(figsize=(6.5, 4), dpi=DPI)
    ax.plot(steps, [d.host_electrons_gained for d in rows], "o-", color="tab:blue",
            label="host, all atoms")  # fmt: skip
    if any(d.host_electrons_gained_rim is not None for d in rows):
        ax.plot(steps, [d.host_electrons_gained_rim for d in rows], "s--", color="tab:orange",
                label="host rim atoms")  # fmt: skip
        ax.plot(steps, [d.host_electrons_gained_interior for d in rows], "^--",
                color="tab:green", label="host interior atoms")  # fmt: skip
    ax.plot(steps, [np.nan if d.mean_guest_charge is None else d.mean_guest_charge for d in rows],
            "d-", color="tab:red", label="mean guest charge")  # fmt: skip
    ax.axhline(0, color="0.8", lw=0.8)
    ax.set_xlabel("step")
    ax.set_ylabel("electrons gained by the host / e  ·  guest charge / e")
    scheme = next((d.charge_scheme for d in rows if d.charge_scheme), None)
    ax.set_title(f"Charge transfer ({scheme} charges)" if scheme else "Charge transfer")
    ax.legend(frameon=False, fontsize=8)
    _save(fig, path)


def dos_plot(
    path: Path,
    energies: np.ndarray,
    curves: Sequence[tuple[int, np.ndarray, float | None]],
    width: float,
    level_name: str,
) -> None:
    """DOS overlay (states/eV), one curve per step offset upwards, frontier level marked."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.5, max(4.0, 1.5 + 0.35 * len(curves))), dpi=DPI)
    cmap = plt.get_cmap("viridis")
    top = max(float(c.max()) for _, c, _ in curves) if curves else 1.0
    offset = 0.6 * top
    for k, (step, dos, level) in enumerate(curves):
        colour = cmap(k / max(1, len(curves) - 1))
        base = k * offset
        ax.fill_between(energies, base, base + dos, color=colour, alpha=0.25, lw=0)
        ax.plot(energies, base + dos, color=colour, lw=1)
        if level is not None:
            ax.plot([level, level], [base, base + 0.5 * offset], color="tab:red", lw=1.2)
        ax.text(energies[-1], base + 0.05 * offset, f"step {step}", ha="right", fontsize=7)
    ax.set_xlabel("energy / eV")
    ax.set_ylabel("DOS / states eV$^{-1}$ (offset per step)")
    ax.set_yticks([])
    ax.set_title(f"Density of states, Gaussian σ = {width:g} eV; red: {level_name}")
    _save(fig, path)
