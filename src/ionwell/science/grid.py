"""Potential maps on regular grids: the :class:`Grid` type, its geometry, sign handling.

A :class:`Grid` holds the electrostatic potential in **volts**, in the sign convention of the
potential felt by a positive test charge (nuclei are maxima). Point ``(i, j, k)`` sits at
``origin + i*axes[0] + j*axes[1] + k*axes[2]`` (Å). Pure functions: files are read and written
in :mod:`ionwell.io` (:mod:`ionwell.io.cube`, :mod:`ionwell.io.npz`, :mod:`ionwell.io.maps`),
whose readers convert units at the edge (``ase.units``).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from ase import Atoms

from ionwell.errors import GridError

__all__ = [
    "Grid",
    "detect_sign",
    "fractional_index",
    "index_half_extent",
    "interpolate",
    "orient",
    "periodic_like",
    "points_within",
    "sphere_mask",
    "with_periodicity",
]

logger = logging.getLogger(__name__)

Sign = Literal["potential", "electron"]


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
        idx = np.indices(self.shape).reshape(3, -1).T if index is None else np.asarray(index)
        return self.origin + idx @ self.axes


# ---------------------------------------------------------------------------------------------
# geometry helpers


def fractional_index(grid: Grid, positions: np.ndarray) -> np.ndarray:
    """Fractional grid-index coordinates of Cartesian ``positions`` (Å), shape (..., 3).

    The inverse of :meth:`Grid.points`: ``grid.points(fractional_index(grid, p)) == p``.
    """
    p = np.asarray(positions, dtype=float)
    return (p - grid.origin) @ np.linalg.inv(grid.axes)


def index_half_extent(grid: Grid, radius: float) -> np.ndarray:
    """Half the extent of a sphere of ``radius`` (Å) along each index axis, in grid steps.

    A sphere spans ``radius * |column i of inv(axes)|`` in index ``i``, shape (3,).
    """
    return radius * np.linalg.norm(np.linalg.inv(np.asarray(grid.axes, dtype=float)), axis=0)


def points_within(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
    max_pairs: int = 1 << 22,
) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Grid points within ``radius`` (Å) of each centre, in batches.

    Yields ``(center_index, flat_index)`` pairs of integer arrays: grid point ``flat_index`` (C
    order over ``grid.shape``) lies within ``radius`` of centre ``center_index``
    (``distance < radius`` when ``strict``, else ``<=``). On periodic axes every periodic image of
    a centre counts (minimum image, also for skewed cells); on other axes points outside the grid
    are dropped. The search visits only an index box around each centre, so its cost grows with
    the number of centres times the points per sphere, not with the grid size.
    """
    centers = np.atleast_2d(np.asarray(centers, dtype=float))
    if centers.size == 0 or radius <= 0:
        return
    shape = np.asarray(grid.shape)
    axes = np.asarray(grid.axes, dtype=float)
    frac = fractional_index(grid, centers)
    base = np.floor(frac).astype(np.int64)
    half = np.ceil(index_half_extent(grid, radius)).astype(np.int64)
    rng = [np.arange(-half[i], half[i] + 2) for i in range(3)]
    offsets = np.stack(np.meshgrid(*rng, indexing="ij"), axis=-1).reshape(-1, 3)
    b = offsets @ axes  # Cartesian offset of each stencil point from the base point
    # drop stencil points no centre inside the base voxel can reach
    voxel_centre = 0.5 * axes.sum(axis=0)
    slack = 0.5 * np.linalg.norm(axes, axis=1).sum()
    keep = np.linalg.norm(b - voxel_centre, axis=1) <= radius + slack + 1e-9
    offsets, b = offsets[keep], b[keep]
    b2 = np.einsum("ij,ij->i", b, b)
    r2 = radius * radius
    a = (base - frac) @ axes  # Cartesian offset of each base point from its centre
    a2 = np.einsum("ij,ij->i", a, a)
    per = max(1, max_pairs // max(1, len(offsets)))
    strides = np.array([shape[1] * shape[2], shape[2], 1], dtype=np.int64)
    for start in range(0, len(centers), per):
        sl = slice(start, start + per)
        d2 = a2[sl, None] + b2[None, :] + 2.0 * (a[sl] @ b.T)
        ci, ki = np.nonzero(d2 < r2 if strict else d2 <= r2)
        if ci.size == 0:
            continue
        idx = base[sl][ci] + offsets[ki]
        ok = np.ones(ci.size, dtype=bool)
        for ax in range(3):
            if grid.pbc[ax]:
                idx[:, ax] %= shape[ax]
            else:
                ok &= (idx[:, ax] >= 0) & (idx[:, ax] < shape[ax])
        if not ok.all():
            ci, idx = ci[ok], idx[ok]
        if ci.size:
            yield ci + start, idx @ strides


def sphere_mask(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
) -> np.ndarray:
    """Boolean array of ``grid.shape``: True at points within ``radius`` (Å) of any centre.

    ``distance < radius`` when ``strict``, else ``<=``. On periodic axes every periodic image of
    a centre counts (minimum image, skewed cells included); elsewhere the grid simply ends.
    The cost is bounded by the grid, not by the radius: :func:`ionwell.science.spheres.union_mask`
    runs along grid lines for small spheres and by blocks and a k-d tree for large ones.
    """
    from ionwell.science.spheres import union_mask

    return union_mask(grid, centers, radius, strict=strict)


def interpolate(grid: Grid, positions: np.ndarray) -> np.ndarray:
    """Trilinear interpolation of ``grid.values`` at Cartesian ``positions`` (Å), shape (..., 3).

    Works in fractional index space, so skewed axes are handled. Periodic axes wrap; on other
    axes a position outside the grid gives NaN.
    """
    p = np.asarray(positions, dtype=float)
    lead = p.shape[:-1]
    f = fractional_index(grid, p.reshape(-1, 3))
    shape = np.asarray(grid.shape)
    outside = np.zeros(len(f), dtype=bool)
    for ax in range(3):
        if not grid.pbc[ax]:
            n = shape[ax]
            outside |= (f[:, ax] < -1e-9) | (f[:, ax] > n - 1 + 1e-9)
            # the last point itself belongs to the cell below it (weight 1 on its upper corner)
            np.clip(f[:, ax], 0, max(n - 1, 0), out=f[:, ax])
    lower = np.floor(f).astype(np.int64)
    for ax in range(3):
        if not grid.pbc[ax]:
            np.clip(lower[:, ax], 0, max(shape[ax] - 2, 0), out=lower[:, ax])
    t = f - lower
    v = grid.values
    result = np.zeros(len(f))
    for corner in np.ndindex(2, 2, 2):
        c = np.asarray(corner)
        idx = lower + c
        for ax in range(3):
            if grid.pbc[ax]:
                idx[:, ax] %= shape[ax]
            else:
                np.minimum(idx[:, ax], shape[ax] - 1, out=idx[:, ax])
        w = np.prod(np.where(c == 1, t, 1.0 - t), axis=1)
        result += w * v[idx[:, 0], idx[:, 1], idx[:, 2]]
    result[outside] = np.nan
    return result.reshape(lead)


# ---------------------------------------------------------------------------------------------
# sign convention

_NEAR_NUCLEUS = 0.6  # Å: grid points this close to a nucleus carry its signature
_STANDOUT = 5.0  # robust standard deviations from the median that count as "stands out"
_AGREEMENT = 0.9  # share of the telling atoms that must agree


def detect_sign(grid: Grid, atoms: Atoms) -> Sign:
    """Tell the sign convention of a potential map from its values near the nuclei.

    In the potential convention (potential felt by a positive charge) the nuclei are large
    positive maxima; in the electron convention (potential energy of an electron, per e) they are
    large negative minima. For each atom, the grid point within ``max(0.6 Å, one grid step)`` of
    its nucleus that departs most from the map's median is compared with the spread of the map
    (median absolute deviation); an atom tells when that departure exceeds 5 robust standard
    deviations. The answer needs at least one telling atom and 90 % of them agreeing.

    Raises:
        GridError: when the map cannot tell (no grid point near any nucleus, a flat map, values
            near the nuclei that do not stand out, or mixed evidence).
    """
    hint = "; give the convention explicitly with --sign potential|electron"
    if len(atoms) == 0:
        raise GridError("cannot tell the sign of the potential map: there are no atoms" + hint)
    values = np.asarray(grid.values)
    flat = values.ravel()
    sample = flat[:: max(1, flat.size // 2_000_000)].astype(float)
    median = float(np.median(sample))
    scale = 1.4826 * float(np.median(np.abs(sample - median)))
    if scale == 0.0:
        scale = float(np.std(sample))
    if scale == 0.0 or not math.isfinite(scale):
        raise GridError("cannot tell the sign of the potential map: the map is flat" + hint)
    step = float(np.linalg.norm(grid.axes, axis=1).max())
    radius = max(_NEAR_NUCLEUS, step)
    best = np.zeros(len(atoms))  # most extreme (value - median) per atom
    seen = np.zeros(len(atoms), dtype=bool)
    for ci, fi in points_within(grid, atoms.positions, radius):
        dev = flat[fi].astype(float) - median
        # the largest departure per atom: sort by atom, then |departure|; take each group's last
        order = np.lexsort((np.abs(dev), ci))
        ci, dev = ci[order], dev[order]
        last = np.r_[ci[1:] != ci[:-1], True]
        ci, dev = ci[last], dev[last]
        upd = np.abs(dev) > np.abs(best[ci])
        best[ci[upd]] = dev[upd]
        seen[ci] = True
    if not seen.any():
        raise GridError(
            f"cannot tell the sign of the potential map: no grid point lies within {radius:.2f} Å "
            "of any nucleus (the grid does not cover the atoms)" + hint
        )
    z = best / scale
    positive = int(np.count_nonzero(z > _STANDOUT))
    negative = int(np.count_nonzero(z < -_STANDOUT))
    telling = positive + negative
    if telling == 0:
        raise GridError(
            "cannot tell the sign of the potential map: the values near the nuclei do not stand "
            f"out from the rest of the map (within {_STANDOUT:g} robust standard deviations of "
            "its median)" + hint
        )
    if positive >= _AGREEMENT * telling:
        return "potential"
    if negative >= _AGREEMENT * telling:
        return "electron"
    raise GridError(
        f"cannot tell the sign of the potential map: mixed evidence, {positive} nuclei sit at "
        f"large maxima and {negative} at large minima" + hint
    )


def orient(grid: Grid, atoms: Atoms, sign: str = "auto") -> Grid:
    """Return ``grid`` in the potential convention (nuclei are maxima).

    ``sign`` is ``"potential"`` (kept as is), ``"electron"`` (values negated) or ``"auto"``
    (decided by :func:`detect_sign`).
    """
    if sign == "auto":
        sign = detect_sign(grid, atoms)
    if sign == "potential":
        return grid
    if sign == "electron":
        return Grid(origin=grid.origin, axes=grid.axes, values=-grid.values, pbc=grid.pbc)
    raise GridError(f"unknown sign convention {sign!r}; expected auto, potential or electron")


# ---------------------------------------------------------------------------------------------
# periodicity

#: Å: a grid spans a cell vector when ``n · axis`` (or ``(n − 1) · axis`` with a repeated end
#: plane) equals it to within this distance.
SPAN_TOLERANCE = 1e-4


def periodic_like(grid: Grid, atoms: Atoms) -> Grid:
    """The grid made periodic along each axis where ``atoms`` is periodic and the grid spans
    its cell vector: ``n`` points of step ``cell / n`` (the usual layout of a periodic code's
    cube: the end point is the start of the next cell), or ``n`` points whose last repeats the
    first (``(n − 1)`` steps span the cell; the repeated plane is dropped). Other axes stay as
    they are."""
    cell = np.asarray(atoms.cell.array, dtype=float)
    pbc = list(grid.pbc)
    drop = [False, False, False]
    for ax in range(3):
        if pbc[ax] or not atoms.pbc[ax]:
            continue
        n = grid.shape[ax]
        step = np.asarray(grid.axes[ax], dtype=float)
        if np.allclose(n * step, cell[ax], rtol=0.0, atol=SPAN_TOLERANCE):
            pbc[ax] = True
        elif n > 2 and np.allclose((n - 1) * step, cell[ax], rtol=0.0, atol=SPAN_TOLERANCE):
            pbc[ax], drop[ax] = True, True
    if tuple(pbc) == tuple(grid.pbc):
        return grid
    values = grid.values[tuple(slice(None, -1) if d else slice(None) for d in drop)]
    logger.info("map periodic along axes %s (it spans the structure's cell)", pbc)
    return Grid(origin=grid.origin, axes=grid.axes, values=values, pbc=tuple(pbc))


def with_periodicity(grid: Grid, pbc: Sequence[bool]) -> Grid:
    """The grid with the stated periodicity (period ``n · axes[i]`` along a periodic axis)."""
    flags = tuple(bool(x) for x in pbc)
    if len(flags) != 3:
        raise GridError(f"periodicity: expected three flags (x, y, z), got {list(pbc)}")
    return Grid(origin=grid.origin, axes=grid.axes, values=grid.values, pbc=flags)  # type: ignore[arg-type]
