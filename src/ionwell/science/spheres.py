"""Union of equal spheres on a grid: which grid points lie within a radius of any centre.

Used for the placement's envelope (points within ``within`` Å of the host) and its exclusion
spheres. Two exact methods, chosen by cost; both give the same mask (tested point for point):

- :func:`mask_by_lines` (small spheres): for fixed first and second indices the grid points
  form a line, and the part of a line inside a sphere is one run of consecutive third indices,
  found from a quadratic. Runs are marked +1 at their start and -1 after their end, and a
  cumulative sum along the third axis counts the spheres covering each point. The lines of a
  sphere are clipped to the grid on non-periodic axes, so the work per centre is at most the
  grid's own number of lines, however large the radius.
- :func:`mask_by_blocks` (large spheres, many centres): the grid is cut into blocks of 8×8×8
  points; a k-d tree of the centres (with the periodic images that can reach the grid) gives
  each block's distance to the nearest centre; a block wholly inside or wholly outside the
  union is filled at once, and only the points of blocks the union's surface crosses are
  tested one by one. The cost grows with the grid's blocks and the surface, not with the
  radius.

On periodic axes every periodic image of a centre counts (minimum image, skewed cells
included); elsewhere the grid simply ends. Lengths in Å. Pure functions over arrays.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.spatial import cKDTree

from ionwell.science.grid import Grid, fractional_index, index_half_extent

__all__ = ["line_cost", "mask_by_blocks", "mask_by_lines", "union_mask"]

#: Above this many (centre, line) pairs the block method is used.
LINE_BUDGET = 3_000_000

#: Edge of a block of the block method, in grid points.
BLOCK = 8


def line_cost(grid: Grid, n_centres: int, radius: float) -> int:
    """The number of (centre, line) pairs :func:`mask_by_lines` visits."""
    half = index_half_extent(grid, radius)
    lines = 1
    for ax in (0, 1):
        span = int(math.floor(2 * half[ax])) + 2
        lines *= span if grid.pbc[ax] else min(span, grid.shape[ax])
    return n_centres * lines


def union_mask(
    grid: Grid, centers: np.ndarray, radius: float, *, strict: bool = False
) -> np.ndarray:
    """Boolean array of ``grid.shape``: True at points within ``radius`` (Å) of any centre
    (``distance < radius`` when ``strict``, else ``<=``), by the cheaper exact method."""
    centers = np.asarray(centers, dtype=float).reshape(-1, 3)
    if len(centers) == 0 or radius <= 0:
        return np.zeros(grid.shape, dtype=bool)
    if line_cost(grid, len(centers), radius) <= LINE_BUDGET:
        return mask_by_lines(grid, centers, radius, strict=strict)
    return mask_by_blocks(grid, centers, radius, strict=strict)


def mask_by_lines(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
    max_rows: int = 1 << 21,
) -> np.ndarray:
    """The union mask by runs along grid lines (see the module docstring)."""
    shape = grid.shape
    n0, n1, n2 = shape
    centers = np.asarray(centers, dtype=float).reshape(-1, 3)
    if len(centers) == 0 or radius <= 0:
        return np.zeros(shape, dtype=bool)
    axes = np.asarray(grid.axes, dtype=float)
    frac = fractional_index(grid, centers)
    half = index_half_extent(grid, radius)
    starts, spans = [], []
    for ax in (0, 1):
        lo = np.ceil(frac[:, ax] - half[ax]).astype(np.int64)
        span = int(np.floor(2 * half[ax])) + 2
        if not grid.pbc[ax] and span > shape[ax]:
            # clip to the grid: the lines of this axis that exist are [0, n), and a run of
            # shape[ax] lines from max(lo, 0) covers every one the sphere can reach
            lo, span = np.maximum(lo, 0), shape[ax]
        starts.append(lo)
        spans.append(span)
    i_lo, j_lo = starts
    di, dj = np.arange(spans[0]), np.arange(spans[1])
    a2 = axes[2]
    aa = float(a2 @ a2)
    r2 = radius * radius
    row_len = n2 + 1
    per = max(1, max_rows // (len(di) * len(dj)))
    marks: list[np.ndarray] = []
    signs: list[np.ndarray] = []
    for s in range(0, len(centers), per):
        sl = slice(s, s + per)
        i = (i_lo[sl, None, None] + di[None, :, None]) + 0 * dj[None, None, :]
        j = (j_lo[sl, None, None] + dj[None, None, :]) + 0 * di[None, :, None]
        # line through (i, j, 0): c + k * a2, relative to the centre
        c = (
            grid.origin
            + i[..., None] * axes[0]
            + j[..., None] * axes[1]
            - centers[sl, None, None, :]
        )
        ca = c @ a2
        disc = ca * ca - aa * (np.einsum("...x,...x->...", c, c) - r2)
        ok = disc > 0 if strict else disc >= 0
        root = np.sqrt(np.where(ok, disc, 0.0))
        k1, k2 = (-ca - root) / aa, (-ca + root) / aa
        if strict:
            klo, khi = np.floor(k1) + 1, np.ceil(k2) - 1
        else:
            klo, khi = np.ceil(k1), np.floor(k2)
        ok &= klo <= khi
        for ax, idx in ((0, i), (1, j)):
            if grid.pbc[ax]:
                idx %= shape[ax]
            else:
                ok &= (idx >= 0) & (idx < shape[ax])
        i, j, klo, khi = i[ok], j[ok], klo[ok].astype(np.int64), khi[ok].astype(np.int64)
        if grid.pbc[2]:
            length = np.minimum(khi - klo + 1, n2)
            klo %= n2
            khi = klo + length - 1
            wraps = khi >= n2
            # a run past the end continues at the start of the same line
            i = np.concatenate([i, i[wraps]])
            j = np.concatenate([j, j[wraps]])
            klo = np.concatenate([klo, np.zeros(int(wraps.sum()), np.int64)])
            khi = np.concatenate([np.minimum(khi, n2 - 1), khi[wraps] - n2])
        else:
            klo, khi = np.maximum(klo, 0), np.minimum(khi, n2 - 1)
            keep = klo <= khi
            i, j, klo, khi = i[keep], j[keep], klo[keep], khi[keep]
        base = (i * n1 + j) * row_len
        marks += [base + klo, base + khi + 1]
        signs += [np.ones(len(base), np.int32), -np.ones(len(base), np.int32)]
    if not marks:
        return np.zeros(shape, dtype=bool)
    runs = np.zeros(n0 * n1 * row_len, dtype=np.int32)
    np.add.at(runs, np.concatenate(marks), np.concatenate(signs))
    cover = np.cumsum(runs.reshape(n0, n1, row_len), axis=2, dtype=np.int32)
    return cover[:, :, :n2] > 0


def _images(grid: Grid, centers: np.ndarray, reach: float) -> np.ndarray:
    """The centres and their periodic images (periodic axes only) that can come within
    ``reach`` (Å) of some grid point; Cartesian, Å."""
    shape = np.asarray(grid.shape)
    period = np.asarray(grid.axes, dtype=float) * shape[:, None]  # lattice vectors, Å
    frac = fractional_index(grid, centers) / shape  # in periods
    # distance between the lattice planes across each axis: 1 / |row i of inv(period).T|
    plane = 1.0 / np.linalg.norm(np.linalg.inv(period), axis=0)
    shifts = []
    for ax in range(3):
        if grid.pbc[ax]:
            m = int(math.ceil(reach / plane[ax])) + 1
            shifts.append(np.arange(-m, m + 1))
        else:
            shifts.append(np.zeros(1, dtype=int))
    wrapped = frac.copy()
    for ax in range(3):
        if grid.pbc[ax]:
            wrapped[:, ax] -= np.floor(wrapped[:, ax])
    offsets = np.stack(np.meshgrid(*shifts, indexing="ij"), axis=-1).reshape(-1, 3)
    f = (wrapped[None, :, :] + offsets[:, None, :]).reshape(-1, 3)
    # keep images whose fractional position is within reach of the grid's box (in periods)
    margin = reach / plane
    keep = np.ones(len(f), dtype=bool)
    for ax in range(3):
        if grid.pbc[ax]:
            keep &= (f[:, ax] >= -margin[ax] - 1e-9) & (f[:, ax] <= 1 + margin[ax] + 1e-9)
    f = f[keep]
    return np.asarray(grid.origin, dtype=float) + (f * shape) @ np.asarray(grid.axes, dtype=float)


def mask_by_blocks(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
    block: int = BLOCK,
    chunk: int = 1 << 20,
) -> np.ndarray:
    """The union mask by blocks and a k-d tree (see the module docstring)."""
    shape = np.asarray(grid.shape)
    mask = np.zeros(grid.shape, dtype=bool)
    centers = np.asarray(centers, dtype=float).reshape(-1, 3)
    if len(centers) == 0 or radius <= 0:
        return mask
    axes = np.asarray(grid.axes, dtype=float)
    # a block spans at most block-1 steps per axis: its points lie within rho of its middle
    corners = np.array([[x, y, z] for x in (-1, 1) for y in (-1, 1) for z in (-1, 1)], float)
    rho = float(np.linalg.norm(corners * (block - 1) / 2.0 @ axes, axis=1).max())
    tree = cKDTree(_images(grid, centers, radius + rho))
    nb = -(-shape // block)
    starts = np.stack(
        np.meshgrid(*[np.arange(n) * block for n in nb], indexing="ij"), axis=-1
    ).reshape(-1, 3)
    sizes = np.minimum(block, shape[None, :] - starts)
    middles = grid.origin + (starts + (sizes - 1) / 2.0) @ axes
    d, _ = tree.query(middles, k=1, distance_upper_bound=radius + rho + 1.0)
    tol = 1e-9 * max(1.0, radius)
    inside = d + rho < radius - tol  # every point of the block strictly inside
    mixed = ~inside & (d - rho <= radius + tol)
    for (s0, s1, s2), (z0, z1, z2) in zip(starts[inside], sizes[inside], strict=True):
        mask[s0 : s0 + z0, s1 : s1 + z1, s2 : s2 + z2] = True
    if not mixed.any():
        return mask
    # the points of the mixed blocks, one by one
    r2 = radius * radius
    idx_blocks = [
        np.stack(np.meshgrid(*[np.arange(s, s + z) for s, z in zip(st, sz, strict=True)],
                             indexing="ij"), axis=-1).reshape(-1, 3)
        for st, sz in zip(starts[mixed], sizes[mixed], strict=True)
    ]  # fmt: skip
    idx = np.concatenate(idx_blocks)
    for p in range(0, len(idx), chunk):
        part = idx[p : p + chunk]
        pts = grid.origin + part @ axes
        dist, nearest = tree.query(pts, k=1, distance_upper_bound=radius + 1.0)
        found = np.isfinite(dist)
        # the same test as the line method's, on squared distances
        diff = pts[found] - tree.data[nearest[found]]
        d2 = np.einsum("ij,ij->i", diff, diff)
        hit = np.zeros(len(part), dtype=bool)
        hit[found] = d2 < r2 if strict else d2 <= r2
        sel = part[hit]
        mask[sel[:, 0], sel[:, 1], sel[:, 2]] = True
    return mask
