"""What the placement modules share: the record base class, the tie threshold of the order of
wells, and distances under a grid's periodicity."""

from __future__ import annotations

from itertools import product

import numpy as np
from pydantic import BaseModel, ConfigDict

from ionwell.science.grid import Grid

#: Potentials closer than this (V) are tied in the order of wells.
TIE = 1e-9


class Model(BaseModel):
    """Base of the placement records: unknown fields are refused."""

    model_config = ConfigDict(extra="forbid")


def distances(grid: Grid | None, origin: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Distances (Å) from ``origin`` to each of ``points``, minimum image on periodic grid axes
    (plain distances when ``grid`` is None)."""
    d = np.asarray(points, dtype=float).reshape(-1, 3) - np.asarray(origin, dtype=float)
    if grid is None or not any(grid.pbc):
        return np.linalg.norm(d, axis=1)
    axes = np.asarray(grid.axes, dtype=float)
    periods = axes * np.asarray(grid.shape)[:, None]  # the periodic cell vectors
    f = d @ np.linalg.inv(periods)  # in cell fractions
    per = [ax for ax in range(3) if grid.pbc[ax]]
    f[:, per] -= np.round(f[:, per])
    d = f @ periods
    best = np.linalg.norm(d, axis=1)
    # a skewed cell can put the nearest image one cell further along a periodic axis
    for shift in product((-1, 0, 1), repeat=len(per)):
        if not any(shift):
            continue
        s = np.zeros(3)
        s[per] = shift
        best = np.minimum(best, np.linalg.norm(d + s @ periods, axis=1))
    return best
