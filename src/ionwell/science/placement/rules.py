"""The placement rules: which of the wells (in order, deepest first) the guests take.

* ``deepest`` — the first well in order.
* ``thermal`` — a random well, with Boltzmann weight ``exp(-z·(V - V_min)/(k_B·T))`` for the
  guest charge ``z`` (``k_B`` from ``ase.units``), among the recorded wells. The generator is
  numpy's ``default_rng`` seeded with ``[seed, step]``, and a draw is one ``random()`` number
  ``u`` mapped through the cumulative weights (the first well whose cumulative weight exceeds
  ``u`` times the total), so the same campaign seed and step always make the same choice.
  ``T = 0`` is the ``deepest`` rule exactly; as ``T → 0`` the weights of all but the deepest well
  vanish.
* ``screened`` — the ``screen.top`` deepest wells get an energy (eV) from the caller's
  ``energy_of``; the lowest energy wins, ties going to the deeper well. Wells whose energy is
  missing (None or not finite) are not chosen.
* ``per_step`` > 1 — several guests in one step, at least ``separation`` Å apart (minimum
  image): wells are taken greedily in the rule's order (deepest: potential; screened: energy),
  skipping any closer than ``separation`` to one already taken; ``thermal`` draws one well at a
  time without replacement among the wells that keep the separation, the weights renormalised
  over them. Fewer guests than asked are placed when the wells run out, and the reason says so.

Each rule is a function of the same shape (:class:`Rule`); :data:`RULES` maps the rule names of
``PlacementConfig.rule`` onto them and :func:`choose` dispatches through it. A new rule is one
function and one entry there (and its name in ``PlacementConfig.rule``).

Rejected sites (the loop's ``reject_site`` remedy): :func:`next_untried` strikes out every site
tried so far and takes the next wells of the same decision in depth order, greedily keeping the
separation — whatever the rule, so the fallback never draws new random numbers and replays
exactly.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Protocol

import numpy as np
from ase.units import kB

from ionwell.config.campaign import PlacementConfig
from ionwell.errors import PlacementError
from ionwell.science.grid import Grid
from ionwell.science.placement._common import TIE, Model, distances
from ionwell.science.placement.wells import Site

__all__ = [
    "RULES",
    "Choice",
    "EnergyFunction",
    "Rule",
    "check_draw",
    "choose",
    "deepest",
    "known_energies",
    "next_untried",
    "screened",
    "thermal",
]

#: ``energy_of`` of the screened rule: one energy (eV) per site asked about, None when failed.
EnergyFunction = Callable[[list[Site]], Sequence[float | None]]


def known_energies(
    known: Sequence[tuple[Sequence[float], float | None]], tolerance: float = 1e-6
) -> EnergyFunction:
    """An ``energy_of`` that answers from energies already computed: each site gets the energy
    recorded for the position within ``tolerance`` Å of it, or None (replay, and the screened
    rule's decision after its `screen` jobs)."""
    pairs = [(np.asarray(p, dtype=float), e) for p, e in known]

    def energy_of(sites: list[Site]) -> list[float | None]:
        out: list[float | None] = []
        for site in sites:
            match = [e for p, e in pairs if np.linalg.norm(p - site.position) < tolerance]
            out.append(match[0] if match else None)
        return out

    return energy_of


class Choice(Model):
    """What a placement rule picked from a list of wells (see :func:`choose`).

    ``chosen``: positions in the wells list, in the order the guests were placed.
    ``probabilities``: thermal only, the probability of each well at the first draw.
    ``energies``: screened only, the energy (eV) of each well, None where not screened or
    failed.
    """

    chosen: list[int]
    probabilities: list[float] | None = None
    energies: list[float | None] | None = None
    reason: str


class Rule(Protocol):
    """A placement rule: the choice among ``wells`` (in order, at least one) under ``settings``.

    ``seed`` and ``step`` seed a random draw, ``energy_of`` gives engine energies, ``grid``
    the periodicity of the separation test (None: plain distances); a rule uses what it needs.
    """

    def __call__(
        self,
        wells: Sequence[Site],
        settings: PlacementConfig,
        *,
        seed: int,
        step: int,
        energy_of: EnergyFunction | None,
        grid: Grid | None,
    ) -> Choice: ...


# ---------------------------------------------------------------------------------------------
# shared pieces


def _fmt_volts(x: float) -> str:
    return f"{x:.3g} V" if abs(x) < 0.01 else f"{x:.2f} V"


def _fmt_ev(x: float) -> str:
    return f"{x:.3g} eV" if abs(x) < 0.01 else f"{x:.3f} eV"


def _greedy(
    order: Sequence[int], wells: Sequence[Site], count: int, separation: float, grid: Grid | None
) -> list[int]:
    """Take wells in ``order``, skipping those closer than ``separation`` to one taken."""
    taken: list[int] = []
    for i in order:
        if len(taken) == count:
            break
        if taken:
            d = distances(
                grid,
                np.asarray(wells[i].position),
                np.asarray([wells[t].position for t in taken]),
            )
            if d.min() < separation:
                continue
        taken.append(i)
    return taken


def next_untried(
    wells: Sequence[Site],
    tried: Sequence[Sequence[float]],
    count: int = 1,
    separation: float = 2.5,
    grid: Grid | None = None,
    tolerance: float = 1e-3,
) -> list[int]:
    """Indices of up to ``count`` wells in depth order, none within ``tolerance`` Å of a tried
    position, each at least ``separation`` Å (minimum image on ``grid``'s periodic axes) from
    the others taken. Empty when every well has been tried."""
    tried_pos = np.asarray(tried, dtype=float).reshape(-1, 3)
    order = [
        i
        for i, w in enumerate(wells)
        if not len(tried_pos)
        or distances(grid, np.asarray(w.position), tried_pos).min() > tolerance
    ]
    return _greedy(order, wells, count, separation, grid)


def _thermal_weights(wells: Sequence[Site], temperature: float, ion_charge: float) -> np.ndarray:
    """Boltzmann weights exp(-z·(V - V_min)/(k_B·T)), the deepest well's weight 1."""
    v = np.array([w.potential for w in wells], dtype=float)
    dv = v - v.min()
    if temperature == 0:
        return (dv == 0).astype(float)
    return np.exp(-ion_charge * dv / (kB * temperature))


def _placed(chosen: list[int], count: int, separation: float) -> str:
    if count == 1:
        return ""
    wells = ", ".join(str(i + 1) for i in chosen)
    text = f"; {len(chosen)} guests at wells {wells} (at least {separation:g} Å apart)"
    if len(chosen) < count:
        text += (
            f"; only {len(chosen)} of {count} guests could be placed: no further recorded well "
            f"is at least {separation:g} Å from those chosen"
        )
    return text


def _near_degenerate(wells: Sequence[Site]) -> str:
    near = sum(w.degenerate for w in wells)
    if near < 2:
        return ""
    return (
        f"; {near} wells are near-degenerate (within the threshold of the deepest): the "
        "lower refined potential goes first, then the lower grid index"
    )


# ---------------------------------------------------------------------------------------------
# the rules


def deepest(
    wells: Sequence[Site],
    settings: PlacementConfig,
    *,
    seed: int = 0,
    step: int = 0,
    energy_of: EnergyFunction | None = None,
    grid: Grid | None = None,
) -> Choice:
    """The deepest well(s), greedily in depth order keeping ``settings.separation``."""
    count, separation = settings.per_step, settings.separation
    chosen = _greedy(range(len(wells)), wells, count, separation, grid)
    if len(wells) == 1:
        head = "deepest admissible well (the only well in the admissible region)"
    else:
        gap = wells[1].potential - wells[0].potential
        if gap > TIE:
            head = f"deepest admissible well, {_fmt_volts(gap)} below the next"
        else:
            head = (
                "deepest admissible well, tied with the next; the tie goes to the lower grid index"
            )
    reason = head + _near_degenerate(wells) + _placed(chosen, count, separation)
    return Choice(chosen=chosen, reason=reason)


def thermal(
    wells: Sequence[Site],
    settings: PlacementConfig,
    *,
    seed: int = 0,
    step: int = 0,
    energy_of: EnergyFunction | None = None,
    grid: Grid | None = None,
) -> Choice:
    """A Boltzmann-weighted draw at ``settings.temperature`` (K) for the charge
    ``settings.ion_charge``, seeded with ``[seed, step]``; at 0 K the deepest rule."""
    count, separation = settings.per_step, settings.separation
    temperature, n = settings.temperature, len(wells)
    w = _thermal_weights(wells, temperature, settings.ion_charge)
    probabilities = (w / w.sum()).tolist()
    if temperature == 0:
        chosen = _greedy(range(n), wells, count, separation, grid)
        head = f"thermal choice at 0 K is the deepest rule: well {chosen[0] + 1}"
        reason = head + _near_degenerate(wells) + _placed(chosen, count, separation)
        return Choice(chosen=chosen, probabilities=probabilities, reason=reason)
    rng = np.random.default_rng([seed, step])
    chosen = []
    for _ in range(count):
        free = np.ones(n, dtype=bool)
        free[chosen] = False
        if chosen:
            taken = np.asarray([wells[c].position for c in chosen])
            for i in np.flatnonzero(free):
                if distances(grid, np.asarray(wells[i].position), taken).min() < separation:
                    free[i] = False
        if not free.any():
            break
        ww = np.where(free, w, 0.0)
        if ww.sum() == 0:  # every weight left underflowed: the T → 0 limit, take the deepest
            pick = int(np.flatnonzero(free)[0])
        else:
            cdf = np.cumsum(ww)
            u = rng.random()
            pick = int(np.searchsorted(cdf, u * cdf[-1], side="right"))
            pick = min(pick, n - 1)
        chosen.append(pick)
    first = chosen[0]
    dv = wells[first].potential - wells[0].potential
    where = "the deepest" if first == 0 else f"{_fmt_volts(dv)} above the deepest"
    reason = (
        f"thermal choice at {temperature:g} K among {n} wells (seed {seed}, step {step}): "
        f"well {first + 1}, {where}, probability {probabilities[first]:.3g}"
    ) + _placed(chosen, count, separation)
    return Choice(chosen=chosen, probabilities=probabilities, reason=reason)


def screened(
    wells: Sequence[Site],
    settings: PlacementConfig,
    *,
    seed: int = 0,
    step: int = 0,
    energy_of: EnergyFunction | None = None,
    grid: Grid | None = None,
) -> Choice:
    """The lowest engine energy (eV, from ``energy_of``) among the ``settings.screen.top``
    deepest wells, ties going to the deeper well.

    Raises:
        PlacementError: without ``energy_of``, or when it returns the wrong number of energies.
    """
    if energy_of is None:
        raise _needs_energies()
    count, separation = settings.per_step, settings.separation
    n = len(wells)
    k = min(settings.screen.top, n)
    raw = list(energy_of(list(wells[:k])))
    if len(raw) != k:
        raise PlacementError(
            f"rule 'screened': the energy function returned {len(raw)} energies for {k} "
            "candidate wells"
        )
    energies: list[float | None] = []
    for e in raw:
        ok = e is not None and math.isfinite(float(e))
        energies.append(float(e) if ok else None)
    order = sorted((i for i in range(k) if energies[i] is not None), key=lambda i: (energies[i], i))
    full = energies + [None] * (n - k)
    if not order:
        return Choice(
            chosen=[],
            energies=full,
            reason=f"screened: no energy could be computed for the {k} deepest wells",
        )
    chosen = _greedy(order, wells, count, separation, grid)
    best = chosen[0]
    failed = sum(e is None for e in energies)
    reason = f"lowest engine energy among the {k} deepest wells: well {best + 1}"
    others = [energies[i] for i in order if i != best]
    if others:
        gap = float(others[0]) - float(energies[best])  # type: ignore[arg-type]
        reason += f", {_fmt_ev(gap)} below the next screened well"
    if failed:
        reason += f" ({failed} candidate(s) without an energy were skipped)"
    reason += _placed(chosen, count, separation)
    return Choice(chosen=chosen, energies=full, reason=reason)


#: The placement rules by name (the values of ``PlacementConfig.rule``).
RULES: dict[str, Rule] = {"deepest": deepest, "thermal": thermal, "screened": screened}


# ---------------------------------------------------------------------------------------------
# dispatch


def _needs_energies() -> PlacementError:
    return PlacementError(
        "rule 'screened' needs the energies of the candidate wells: it runs inside a "
        "campaign, whose engine (or placement.screen.engine) computes them"
    )


def check_draw(
    settings: PlacementConfig, seed: int, step: int, energy_of: EnergyFunction | None
) -> None:
    """Refuse what the settings model cannot: a negative seed or step, ``screened`` without
    ``energy_of``.

    Raises:
        PlacementError: for either.
    """
    if seed < 0 or step < 0:
        raise PlacementError(f"seed and step must be at least 0, got seed {seed}, step {step}")
    if settings.rule == "screened" and energy_of is None:
        raise _needs_energies()


def choose(
    wells: Sequence[Site],
    settings: PlacementConfig,
    *,
    seed: int = 0,
    step: int = 0,
    energy_of: EnergyFunction | None = None,
    grid: Grid | None = None,
) -> Choice:
    """Apply the rule ``settings.rule`` (see :data:`RULES`) to ``wells`` (in order, deepest
    first; see the module notes).

    The rule reads ``per_step``, ``separation``, ``temperature``, ``ion_charge`` and
    ``screen.top`` from ``settings``, whose model has checked their limits. ``grid`` supplies
    the periodicity for the separation test (None: plain distances). ``energy_of`` (screened
    only) receives the ``screen.top`` deepest wells and returns one energy (eV) per well, None
    for a failed one.

    Raises:
        PlacementError: a negative ``seed`` or ``step``, ``screened`` without ``energy_of``, or
            an ``energy_of`` that returns the wrong number of energies.
    """
    check_draw(settings, seed, step, energy_of)
    wells = list(wells)
    if not wells:
        return Choice(chosen=[], reason="no admissible well")
    rule = RULES[settings.rule]
    return rule(wells, settings, seed=seed, step=step, energy_of=energy_of, grid=grid)
