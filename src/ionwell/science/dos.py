"""Density of states from orbital energies, with Gaussian broadening (pure functions).

A step's :class:`~ionwell.engines.base.StepResult` carries its orbital energies per spin channel
(eV). One channel means a spin-restricted calculation, whose every level holds two states; two
channels hold one state per level. The DOS is a sum of normalised Gaussians of standard
deviation ``width`` (eV) centred on the levels, weighted by the states they hold, so its integral
over all energies is the number of states (and, weighted by the occupations instead, the number
of electrons). Sampling uses ASE's :class:`ase.spectrum.dosdata.RawDOSData`.

The *frontier level* of a step is its Fermi level where the engine reports one (smeared or
periodic calculations), else its HOMO; its shift against step 0 shows the host being charged.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from ase.spectrum.dosdata import RawDOSData
from pydantic import BaseModel

from ionwell.errors import IonwellError

__all__ = ["FrontierLevel", "dos_on_grid", "frontier_level", "level_weights", "states_count"]


def level_weights(
    orbital_energies: Sequence[Sequence[float]],
    occupations: Sequence[Sequence[float]] | None = None,
    occupied: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Flattened levels (eV) and the states (or, with ``occupied``, electrons) each holds.

    One channel: two states per level (spin-restricted); two channels: one each.
    """
    channels = [np.asarray(c, dtype=float) for c in orbital_energies]
    if len(channels) not in (1, 2) or any(c.ndim != 1 for c in channels):
        raise IonwellError(
            f"orbital energies: expected one or two spin channels of levels, got {len(channels)}"
        )
    per_level = 2.0 if len(channels) == 1 else 1.0
    levels = np.concatenate(channels)
    if occupied:
        if occupations is None:
            raise IonwellError("occupations: needed for the occupied DOS, none recorded")
        occ = [np.asarray(o, dtype=float) for o in occupations]
        if [len(o) for o in occ] != [len(c) for c in channels]:
            raise IonwellError(
                "occupations: expected one occupation per orbital energy in every spin channel"
            )
        weights = np.concatenate(occ)
    else:
        weights = np.full(levels.shape, per_level)
    return levels, weights


def states_count(orbital_energies: Sequence[Sequence[float]]) -> float:
    """Number of one-electron states the levels hold (2 per level when spin-restricted)."""
    return float(level_weights(orbital_energies)[1].sum())


def dos_on_grid(
    orbital_energies: Sequence[Sequence[float]],
    emin: float,
    emax: float,
    npts: int = 1200,
    width: float = 0.2,
    occupations: Sequence[Sequence[float]] | None = None,
    occupied: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Energies (eV) and DOS (states per eV) on ``npts`` even points from ``emin`` to ``emax``.

    Gaussian broadening of standard deviation ``width`` (eV). ``occupied=True`` weights each
    level by its occupation (electrons per eV) instead of the states it holds.
    """
    if width <= 0:
        raise IonwellError(f"DOS broadening width: expected a positive value in eV, got {width}")
    if not emax > emin or npts < 2:
        raise IonwellError(
            f"DOS energy window: expected emin < emax and at least 2 points, got "
            f"{emin}..{emax} eV with {npts}"
        )
    levels, weights = level_weights(orbital_energies, occupations, occupied)
    grid = RawDOSData(levels, weights).sample_grid(npts, xmin=emin, xmax=emax, width=width)
    return np.asarray(grid.get_energies()), np.asarray(grid.get_weights())


class FrontierLevel(BaseModel):
    """The level that tracks the electron chemical potential of one step (eV)."""

    kind: str  # "fermi" or "homo"
    value: float  # eV
    gap: float | None = None  # eV, LUMO − HOMO where both are known


def frontier_level(
    fermi: float | None, homo: float | None, lumo: float | None
) -> FrontierLevel | None:
    """The Fermi level where known, else the HOMO (eV); None when neither was recorded."""
    gap = None if homo is None or lumo is None else float(lumo - homo)
    if fermi is not None:
        return FrontierLevel(kind="fermi", value=float(fermi), gap=gap)
    if homo is not None:
        return FrontierLevel(kind="homo", value=float(homo), gap=gap)
    return None
