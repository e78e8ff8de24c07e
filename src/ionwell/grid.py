"""Potential maps on regular grids: the :class:`Grid` type, readers, writers, sign handling.

A :class:`Grid` holds the electrostatic potential in **volts**, in the sign convention of the
potential felt by a positive test charge (nuclei are maxima). Point ``(i, j, k)`` sits at
``origin + i*axes[0] + j*axes[1] + k*axes[2]`` (Å). Readers convert units and sign at the edge
(``ase.units``); nothing else in ionwell converts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Grid:
    """A scalar field on a regular (possibly skewed, possibly periodic) grid.

    Attributes:
        origin: position of point (0, 0, 0), Å, shape (3,).
        axes: step vectors between neighbouring points along each index, Å, shape (3, 3).
        values: the field, volts, shape (n0, n1, n2).
        pbc: periodicity along each index axis; a periodic axis has period ``n * axes[i]``.
    """

    origin: np.ndarray
    axes: np.ndarray
    values: np.ndarray
    pbc: tuple[bool, bool, bool] = (False, False, False)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.values.shape)  # type: ignore[return-value]

    @property
    def cell(self) -> np.ndarray:
        """The full grid box: ``axes[i] * shape[i]``, Å, shape (3, 3)."""
        return self.axes * np.asarray(self.shape)[:, None]

    def points(self, index: np.ndarray | None = None) -> np.ndarray:
        """Cartesian positions (Å) of grid points; all points (C order) when ``index`` is None.

        ``index`` is an integer or fractional array of shape (..., 3).
        """
        if index is None:
            idx = np.indices(self.shape).reshape(3, -1).T
        else:
            idx = np.asarray(index)
        return self.origin + idx @ self.axes
