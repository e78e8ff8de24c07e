"""Energetics of an insertion series (pure): formation energies, the lower convex hull, energies
above it, the voltage step profile between hull vertices, and gravimetric capacity.

Formulas (DESIGN.md; cite beside the code and tests):

* formation energy of the structure with ``n`` guests:
  ``E_f(n) = E(n) − E(0) − n·μ`` (eV), ``μ`` the guest's chemical potential (eV per guest);
* ``x`` = guests per host formula unit (``n / units``);
* the lower convex hull of ``E_f`` against ``n`` (scipy.spatial.ConvexHull); a structure's energy
  above the hull is its height over the hull's segment at its ``n`` (eV, per structure);
* average voltage between hull vertices ``n1 < n2``:
  ``V = −[E(n2) − E(n1) − (n2 − n1)·μ] / ((n2 − n1)·z·e)`` — Aydinol et al., Phys. Rev. B 56,
  1354 (1997); with energies in eV and ``e`` = 1 it is in volts;
* gravimetric capacity ``Q = x·z·F / (3.6·M_unit)`` mAh/g, ``F`` the Faraday constant
  (scipy.constants) and ``M_unit`` the molar mass of the host formula unit in g/mol (ase.data);
  LiC6 gives about 372 mAh/g (handbook value).

Units: eV, volts, mAh/g. Nothing here reads or writes files.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from pydantic import BaseModel

__all__ = [
    "HullResult",
    "VoltageStep",
    "capacity_mah_per_g",
    "energy_above_hull",
    "formation_energies",
    "formula_text",
    "lower_hull",
    "voltage_profile",
]


class HullResult(BaseModel):
    """The lower convex hull of formation energies against guest count."""

    vertices: list[int]  # indices into the input, in increasing n
    above: list[float]  # eV per structure, 0 on the hull


class VoltageStep(BaseModel):
    """One plateau of the voltage profile, between two hull vertices."""

    n_from: int
    n_to: int
    x_from: float
    x_to: float
    voltage: float  # V


def formation_energies(energies: Sequence[float], guests: Sequence[int], mu: float) -> np.ndarray:
    """``E(n) − E(0) − n·μ`` for each structure (eV); ``E(0)`` is the structure with 0 guests."""
    e = np.asarray(energies, dtype=float)
    n = np.asarray(guests, dtype=float)
    zero = np.flatnonzero(n == 0)
    if not len(zero):
        raise ValueError("formation energies need the pristine host (a structure with 0 guests)")
    return e - e[zero[0]] - n * mu


def lower_hull(n: Sequence[float], ef: Sequence[float]) -> list[int]:
    """Indices of the lower convex hull's vertices of the points ``(n, ef)``, by increasing n.

    For each n only the lowest structure can be a vertex; points on a hull segment (collinear)
    are not vertices. Uses scipy.spatial.ConvexHull (Qhull) when there are three or more
    distinct n, else the trivial hull.
    """
    from scipy.spatial import ConvexHull, QhullError

    n = np.asarray(n, dtype=float)
    ef = np.asarray(ef, dtype=float)
    lowest: dict[float, int] = {}
    for i in np.argsort(ef, kind="stable"):
        lowest.setdefault(float(n[i]), int(i))
    idx = sorted(lowest.values(), key=lambda i: n[i])
    if len(idx) <= 2:
        return idx
    pts = np.column_stack([n[idx], ef[idx]])
    try:
        hull = ConvexHull(pts)
    except QhullError:  # every point on one line: the two ends are the hull
        return [idx[0], idx[-1]]
    keep = set()
    for simplex, eq in zip(hull.simplices, hull.equations, strict=True):
        if eq[1] < -1e-12:  # outward normal points down: a lower facet
            keep.update(int(s) for s in simplex)
    keep.update({0, len(idx) - 1})  # the end points always bound the lower hull
    chosen = sorted(keep, key=lambda k: pts[k, 0])
    # drop points that lie on a segment between their neighbours (collinear)
    out = [chosen[0]]
    for k in range(1, len(chosen) - 1):
        a, b, c = pts[out[-1]], pts[chosen[k]], pts[chosen[k + 1]]
        cross = (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])
        if cross > 1e-12:
            out.append(chosen[k])
    out.append(chosen[-1])
    return [idx[k] for k in out]


def energy_above_hull(
    n: Sequence[float], ef: Sequence[float], vertices: Sequence[int]
) -> list[float]:
    """Height of each point over the lower hull through ``vertices`` (eV, ≥ 0)."""
    n = np.asarray(n, dtype=float)
    ef = np.asarray(ef, dtype=float)
    hx = n[list(vertices)]
    hy = ef[list(vertices)]
    return [float(max(0.0, e - np.interp(x, hx, hy))) for x, e in zip(n, ef, strict=True)]


def hull(n: Sequence[float], ef: Sequence[float]) -> HullResult:
    """The lower hull and every structure's energy above it."""
    v = lower_hull(n, ef)
    return HullResult(vertices=v, above=energy_above_hull(n, ef, v))


def voltage_profile(
    energies: Sequence[float],
    guests: Sequence[int],
    mu: float,
    units: float = 1.0,
    z: int = 1,
) -> list[VoltageStep]:
    """The voltage step profile between consecutive hull vertices (Aydinol et al. 1997)."""
    e = np.asarray(energies, dtype=float)
    n = np.asarray(guests, dtype=float)
    verts = lower_hull(n, formation_energies(e, n, mu))
    steps = []
    for a, b in zip(verts[:-1], verts[1:], strict=True):
        dn = n[b] - n[a]
        v = -(e[b] - e[a] - dn * mu) / (dn * z)
        steps.append(
            VoltageStep(
                n_from=int(n[a]),
                n_to=int(n[b]),
                x_from=float(n[a] / units),
                x_to=float(n[b] / units),
                voltage=float(v),
            )
        )
    return steps


def formula_text(unit: Mapping[str, int]) -> str:
    """A formula unit as text, e.g. ``{"C": 6}`` → ``C6``."""
    return "".join(f"{el}{k if k != 1 else ''}" for el, k in unit.items())


def capacity_mah_per_g(x: float, formula_unit: Mapping[str, int], z: int = 1) -> float:
    """Gravimetric capacity of the host at ``x`` guests per formula unit, mAh per g of host."""
    from ase.data import atomic_masses, atomic_numbers
    from scipy.constants import physical_constants

    faraday = physical_constants["Faraday constant"][0]  # C/mol
    mass = sum(atomic_masses[atomic_numbers[el]] * k for el, k in formula_unit.items())  # g/mol
    return float(x * z * faraday / (3.6 * mass))
