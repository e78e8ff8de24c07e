"""The placement decision: region, wells and rule put together (:func:`place`), and a campaign
step's decision from its settings on the map as the engine delivered it (:func:`decide`)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Annotated

import numpy as np
from ase import Atoms
from pydantic import Field

from ionwell.config.campaign import PlacementConfig
from ionwell.errors import PlacementError
from ionwell.science.grid import Grid, detect_sign, orient
from ionwell.science.placement._common import Model
from ionwell.science.placement.region import (
    Region,
    admissible_mask,
    admissible_test,
    check_element,
    exclusion_radii,
    region_of,
)
from ionwell.science.placement.rules import Choice, EnergyFunction, check_draw, choose
from ionwell.science.placement.wells import Site, find_wells, mark_degenerate

__all__ = ["Decision", "PlaceSettings", "decide", "place"]


class PlaceSettings(PlacementConfig):
    """The placement settings of :func:`place` outside a campaign: a
    :class:`~ionwell.config.campaign.PlacementConfig` whose host envelope may be switched off.

    ``within`` (Å) None: no envelope, a guest may go anywhere clear of the atoms (a map without
    a host, a test). A campaign's own ``PlacementConfig`` always has an envelope.
    """

    within: Annotated[float, Field(gt=0.0)] | None = Field(
        3.0, description="host envelope: max distance to a host atom, Å (None: no envelope)"
    )


class Decision(Model):
    """What the placement rule saw and what it chose, with a plain-language reason.

    ``candidates`` are the recorded wells in order (deepest first); ``chosen`` the sites taken,
    in placement order, and ``chosen_wells`` their positions in ``candidates``. ``temperature``,
    ``ion_charge``, ``seed``, ``step`` and ``probabilities`` are set for ``thermal``; ``energies``
    for ``screened``; ``sign`` when :func:`decide` oriented the map.
    """

    rule: str
    guest: str
    candidates: list[Site]
    chosen: list[Site]
    exclusion: dict[str, float]
    within: float | None
    admissible_fraction: float
    reason: str
    grid_shape: list[int]
    chosen_wells: list[int] = []
    count: int = 1
    separation: float | None = None
    merge: float = 0.0
    degenerate: float | None = None
    temperature: float | None = None
    ion_charge: int | None = None
    seed: int | None = None
    step: int | None = None
    probabilities: list[float] | None = None
    energies: list[float | None] | None = None
    region: Region | None = None
    sign: str | None = None


def _empty_reason(fraction: float, within: float | None, region: Region | None) -> str:
    region_text = "at least the exclusion distance from every atom"
    if within is not None:
        region_text += f" and within {within:g} Å of the host"
    if region is not None and region.galleries is not None:
        region_text += " and inside a gallery between adjacent layers"
        if not region.galleries.intervals:
            return (
                "no admissible well: the host shows fewer than two layers along its stacking "
                "normal (or the gallery margin closes every gallery), so it has no gallery"
            )
    if region is not None and (region.boxes or region.spheres):
        region_text += " and inside a user box or sphere"
    if fraction == 0:
        return f"no admissible well: no grid point is {region_text}"
    return "no admissible well: the admissible region holds no local minimum"


def place(
    grid: Grid,
    atoms: Atoms,
    guest: str,
    settings: PlacementConfig | None = None,
    *,
    seed: int = 0,
    step: int = 0,
    envelope_indices: Sequence[int] | None = None,
    energy_of: EnergyFunction | None = None,
) -> Decision:
    """Choose the site(s) of the next guest(s) on a map already in the potential convention.

    ``grid`` must be in the potential convention (volts, nuclei are maxima; see
    :func:`ionwell.science.grid.orient`): ``settings.sign`` is not applied here (:func:`decide`
    does). ``settings`` (default: ``PlacementConfig()``; a :class:`PlaceSettings` may switch the
    envelope off) gives everything else:

    * the admissible region — exclusion radii (Å) per host element,
      :func:`~ionwell.science.placement.region.default_exclusion` unless ``exclusion`` names
      the element; ``within`` (Å) to the nearest envelope atom
      (``envelope_indices``, default all atoms); with ``galleries_only`` the galleries of the
      host (layers of the heavy atoms among ``envelope_indices``, ``layer_tolerance``,
      ``gallery_margin``); ``boxes`` and ``spheres``;
    * the wells — up to ``candidates`` recorded in order (more when ``per_step`` or, for
      ``screened``, ``screen.top`` is larger), merged within ``merge`` Å, near-degenerate within
      ``degenerate`` V of the deepest;
    * the rule (``rule``, see :func:`ionwell.science.placement.rules.choose`), which takes
      ``per_step`` of them. ``seed`` and ``step`` seed the thermal draw; ``energy_of`` gives the
      screened rule its energies (eV).

    When nothing is admissible, or no well exists, the decision has no chosen site and says why.

    Raises:
        PlacementError: an unknown guest element, an envelope index out of range, a negative
            ``seed`` or ``step``, ``screened`` without ``energy_of``. The limits of the numbers
            in ``settings`` are the model's.
    """
    settings = PlacementConfig() if settings is None else settings
    check_element(guest, "guest")
    check_draw(settings, seed, step, energy_of)
    within: float | None = settings.within
    used = exclusion_radii(guest, atoms, settings)
    if envelope_indices is not None:
        env = [int(i) for i in envelope_indices]
        bad = [i for i in env if not -len(atoms) <= i < len(atoms)]
        if bad:
            raise PlacementError(
                f"envelope atom indices {bad[:5]} are out of range for {len(atoms)} atoms"
            )
        envelope_indices = env
    region = region_of(settings, atoms, envelope_indices)

    mask = admissible_mask(grid, atoms, used, within, envelope_indices, region)
    fraction = float(np.count_nonzero(mask)) / mask.size
    rule = settings.rule
    count = settings.per_step
    n_wells = max(settings.candidates, count, settings.screen.top if rule == "screened" else 1)
    wells: list[Site] = []
    if fraction > 0:
        test = admissible_test(grid, atoms, used, within, envelope_indices, region)
        wells = find_wells(grid, mask, n_wells, merge=settings.merge, admissible=test)
    wells = mark_degenerate(wells, settings.degenerate)
    if not wells:
        choice = Choice(chosen=[], reason=_empty_reason(fraction, within, region))
    else:
        choice = choose(wells, settings, seed=seed, step=step, energy_of=energy_of, grid=grid)
    thermal = rule == "thermal"
    return Decision(
        rule=rule,
        guest=guest,
        candidates=wells,
        chosen=[wells[i] for i in choice.chosen],
        exclusion=used,
        within=within,
        admissible_fraction=fraction,
        reason=choice.reason,
        grid_shape=list(grid.shape),
        chosen_wells=choice.chosen,
        count=count,
        separation=settings.separation if count > 1 else None,
        merge=settings.merge,
        degenerate=settings.degenerate,
        temperature=settings.temperature if thermal else None,
        ion_charge=settings.ion_charge if thermal else None,
        seed=seed if thermal else None,
        step=step if thermal else None,
        probabilities=choice.probabilities,
        energies=choice.energies,
        region=region,
    )


def decide(
    grid: Grid,
    atoms: Atoms,
    guest: str,
    settings: PlacementConfig,
    *,
    step: int,
    seed: int,
    envelope_indices: Sequence[int] | None = None,
    energy_of: EnergyFunction | None = None,
) -> Decision:
    """The placement decision of one campaign step, from the campaign's placement settings.

    ``grid`` is the potential map as the engine delivered it: it is oriented here by
    ``settings.sign`` (``auto`` is resolved with :func:`ionwell.science.grid.detect_sign` and the
    answer recorded in ``Decision.sign``); the rest is :func:`place` with the same settings.
    Given the same inputs it returns the same decision, which is what a replay relies on.
    """
    sign = detect_sign(grid, atoms) if settings.sign == "auto" else settings.sign
    decision = place(
        orient(grid, atoms, sign),
        atoms,
        guest,
        settings,
        seed=seed,
        step=step,
        envelope_indices=envelope_indices,
        energy_of=energy_of,
    )
    return decision.model_copy(update={"sign": sign})
