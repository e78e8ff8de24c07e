"""Wells of a potential map: local minima among admissible points, refined below the grid
spacing, merged, ordered and marked near-degenerate.

* **well** — a local minimum of the potential among admissible points: no admissible neighbour
  (26-neighbourhood, periodic axes wrapped) is lower. A flat patch of equal values counts once,
  and only when nothing next to it is lower. Each well is refined below the grid spacing; wells
  closer than ``merge`` Å (minimum image) are one well, the deeper. A well whose neighbourhood
  (its 3×3×3 grid block) touches the edge of the admissible region or of the grid is marked
  ``edge``; ``boundary`` says when that edge sets the site (see :class:`Site`).
* **order** of wells — ascending refined potential; potentials equal to within 1 nV are tied
  and the tie goes to the lower grid index ``(i, j, k)`` of the well's grid point.
* **near-degenerate** wells — every well within ``degenerate`` V of the deepest, when there are
  at least two such wells (``Site.degenerate``). They are reported, not reordered.

Potentials in volts (the potential convention: nuclei are maxima), positions in Å.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any, Literal

import numpy as np
from pydantic import model_validator
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ionwell.errors import PlacementError
from ionwell.science.grid import Grid
from ionwell.science.placement._common import TIE, Model, distances

__all__ = ["Boundary", "Site", "find_wells", "mark_degenerate"]


Boundary = Literal["region", "grid"]


class Site(Model):
    """One well: refined position (Å), potential there (V), and its grid point.

    ``degenerate``: within the decision's ``degenerate`` threshold of the deepest well, with at
    least one other well that close. ``edge``: the well's grid neighbourhood (3×3×3 block)
    touches the edge of the admissible region or of the grid. ``boundary``: the edge sets the
    site — ``"grid"`` when the block leaves the grid on a non-periodic axis (the site lies on the
    grid box's face), ``"region"`` when a point of the block beyond the admissible region's
    boundary is lower than the well (the potential keeps falling across it); None otherwise.
    A site with a ``boundary`` is always ``edge``; given ``boundary`` alone, ``edge`` follows
    it. An ``edge`` site without ``boundary`` is a true minimum next to the edge (or a record
    written before ``boundary`` existed).
    """

    position: list[float]
    potential: float
    index: list[int]
    degenerate: bool = False
    edge: bool = False
    boundary: Literal["region", "grid"] | None = None

    @model_validator(mode="before")
    @classmethod
    def _edge_from_boundary(cls, data: Any) -> Any:
        if isinstance(data, dict) and data.get("boundary") is not None:
            if "edge" not in data:
                return {**data, "edge": True}
            if not data["edge"]:
                raise ValueError(f"a site on the {data['boundary']} boundary is an edge site")
        return data


_NEIGHBOURS = np.array(
    [o for o in np.ndindex(3, 3, 3) if o != (1, 1, 1)], dtype=np.int64
) - np.int64(1)  # the 26 offsets

# least-squares fit of a quadratic c + g·x + ½ xᵀHx to the 27 values of a 3×3×3 block
_BLOCK = np.array(list(np.ndindex(3, 3, 3)), dtype=float) - 1.0
_DESIGN = np.column_stack(
    [
        np.ones(27),
        _BLOCK,
        _BLOCK**2,
        _BLOCK[:, 0] * _BLOCK[:, 1],
        _BLOCK[:, 0] * _BLOCK[:, 2],
        _BLOCK[:, 1] * _BLOCK[:, 2],
    ]
)
_FIT = np.linalg.pinv(_DESIGN)  # (10, 27)
_SMOOTH = 0.05  # largest fit residual (RMS, relative to the block's range) of a trusted fit


def _neighbour_index(
    shape: tuple[int, int, int], pbc: Sequence[bool], idx: np.ndarray, offset: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Flat index of ``idx + offset`` (wrapped on periodic axes) and whether it exists."""
    nb = idx + offset
    ok = np.ones(len(idx), dtype=bool)
    for ax in range(3):
        if pbc[ax]:
            nb[:, ax] %= shape[ax]
        else:
            ok &= (nb[:, ax] >= 0) & (nb[:, ax] < shape[ax])
            np.clip(nb[:, ax], 0, shape[ax] - 1, out=nb[:, ax])
    return np.ravel_multi_index(nb.T, shape), ok


def _refine(
    grid: Grid,
    mask: np.ndarray,
    idx: np.ndarray,
    admissible: Callable[[np.ndarray], np.ndarray] | None = None,
) -> tuple[np.ndarray, float, bool, Boundary | None]:
    """Sub-grid minimum near grid point ``idx``: (fractional index, potential, edge, boundary).

    Fits a quadratic to the 3×3×3 block around the point (least squares, in index space, which
    is exact for skewed axes too) and moves to its minimum when the fit is convex, the minimum
    lies within one grid step along every axis, and its value is not above the grid value.
    ``boundary`` is ``"grid"`` when the block is not entirely inside the grid (it leaves it on a
    non-periodic axis), else ``"region"`` when an inadmissible point of the block is lower than
    the grid value at ``idx`` (the potential keeps falling across the region's edge), else None.
    ``edge``: the block is not entirely inside the grid or not entirely admissible.
    A block that leaves the grid is not fitted. A block that touches inadmissible points is
    fitted only when ``admissible`` (a test of exact positions) is given, and the move is kept
    only when that test admits the refined position and the quadratic fits the block (residual
    RMS at most 5 % of the block's value range); so a refined site never leaves the admissible
    region, and a well in a narrow region (a gallery) is still refined.
    """
    shape = grid.shape
    v0 = float(grid.values[tuple(idx)])
    nbs = idx + _BLOCK.astype(np.int64)  # (27, 3)
    for ax in range(3):
        if grid.pbc[ax]:
            nbs[:, ax] %= shape[ax]
        elif nbs[:, ax].min() < 0 or nbs[:, ax].max() >= shape[ax]:
            return idx.astype(float), v0, True, "grid"
    where = tuple(nbs.T)
    inside = mask[where]
    edge = not inside.all()
    block = np.asarray(grid.values[where], dtype=float)
    boundary: Boundary | None = None
    if edge and float(block[~inside].min()) < v0:
        boundary = "region"
    if edge and admissible is None:
        return idx.astype(float), v0, edge, boundary
    c = _FIT @ block
    g = c[1:4]
    hess = np.array(
        [
            [2 * c[4], c[7], c[8]],
            [c[7], 2 * c[5], c[9]],
            [c[8], c[9], 2 * c[6]],
        ]
    )
    try:
        np.linalg.cholesky(hess)
    except np.linalg.LinAlgError:
        return idx.astype(float), v0, edge, boundary
    delta = -np.linalg.solve(hess, g)
    if np.max(np.abs(delta)) > 1.0:
        return idx.astype(float), v0, edge, boundary
    value = float(c[0] + g @ delta + 0.5 * delta @ hess @ delta)
    if not value <= v0:
        return idx.astype(float), v0, edge, boundary
    if edge:
        # values inside the excluded zone may rise steeply towards a nucleus: trust the fit only
        # where the quadratic describes the whole block, and only at an admissible position
        assert admissible is not None
        spread = float(block.max() - block.min())
        residual = float(np.sqrt(np.mean((block - _DESIGN @ c) ** 2)))
        if residual > _SMOOTH * spread or not bool(admissible(grid.points(idx + delta))[0]):
            return idx.astype(float), v0, edge, boundary
    return idx + delta, value, edge, boundary


def _order_key(value: float, flat: int) -> tuple[float, int]:
    return (round(value / TIE) * TIE, flat)


def find_wells(
    grid: Grid,
    mask: np.ndarray,
    max_wells: int,
    *,
    merge: float = 0.0,
    admissible: Callable[[np.ndarray], np.ndarray] | None = None,
) -> list[Site]:
    """The deepest ``max_wells`` wells of ``grid`` among the points where ``mask`` is True.

    A candidate is an admissible point with no lower admissible neighbour among its 26 (periodic
    axes wrap; points outside the grid and inadmissible points do not count as neighbours).
    Connected patches of equal values count once, represented by their lowest grid index, and
    are dropped when an equal neighbour outside the patch has a lower neighbour of its own (a
    shelf on a slope, not a well). Each well is refined below the grid spacing (see
    :func:`_refine`; ``admissible``, a test of exact positions, lets wells next to the edge of the
    region be refined too); positions on periodic axes are wrapped into the cell. Each site's
    ``edge`` says whether its 3×3×3 block leaves the grid or touches a point where ``mask`` is
    False; ``boundary`` whether that edge sets the site (``"grid"``: the block leaves the grid;
    ``"region"``: a masked-out point of the block is lower than the well). Walking the wells in order, a well closer than
    ``merge`` Å (minimum image) to one already kept is dropped.

    Order: deepest first by refined potential (equal within 1 nV: tied); ties go to the
    lexicographically smaller grid index ``(i, j, k)``. This order is deterministic for a given
    grid.
    """
    if max_wells < 1:
        raise PlacementError(f"max_wells must be at least 1, got {max_wells}")
    if not (math.isfinite(merge) and merge >= 0):
        raise PlacementError(f"merge must be a distance of at least 0 Å, got {merge}")
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != grid.shape:
        raise PlacementError(f"mask shape {mask.shape} differs from grid shape {grid.shape}")
    if not mask.any():
        return []
    shape = grid.shape
    v = np.where(mask, np.asarray(grid.values, dtype=float), np.inf)
    modes = ["wrap" if p else "constant" for p in grid.pbc]
    low = ndimage.minimum_filter(v, size=3, mode=modes, cval=np.inf)
    cand = np.flatnonzero((mask & (v <= low)).ravel())  # ascending flat index
    vflat = v.ravel()
    cval = vflat[cand]
    idx = np.stack(np.unravel_index(cand, shape), axis=1).astype(np.int64)
    is_cand = np.zeros(v.size, dtype=bool)
    is_cand[cand] = True

    # plateaus: candidates joined to equal-valued candidate neighbours; a patch that touches an
    # equal-valued non-candidate (which has a lower neighbour) is a shelf, not a well
    shelf = np.zeros(len(cand), dtype=bool)
    rows, cols = [], []
    for off in _NEIGHBOURS:
        nb, ok = _neighbour_index(shape, grid.pbc, idx, off)
        equal = ok & (vflat[nb] == cval)
        if not equal.any():
            continue
        shelf |= equal & ~is_cand[nb]
        join = np.flatnonzero(equal & is_cand[nb])
        if join.size:
            rows.append(join)
            cols.append(np.searchsorted(cand, nb[join]))
    if rows:
        r, c = np.concatenate(rows), np.concatenate(cols)
        graph = coo_matrix((np.ones(r.size, dtype=np.int8), (r, c)), shape=(cand.size,) * 2)
        _, label = connected_components(graph, directed=False)
        bad = np.zeros(label.max() + 1, dtype=bool)
        bad[label[shelf]] = True
        # one representative per patch: its first (lowest) flat index
        _, first = np.unique(label, return_index=True)
        keep = first[~bad[label[first]]]
    else:
        keep = np.flatnonzero(~shelf)
    keep = keep[np.lexsort((cand[keep], cval[keep]))]  # by value, then by grid index

    # refine a margin more than asked, since refinement can reorder near-ties and merging
    # can drop wells
    pool = keep[: max(4 * max_wells, max_wells + 20)]
    nshape = np.asarray(shape, dtype=float)
    refined = []
    for p in pool:
        f, value, edge, boundary = _refine(grid, mask, idx[p], admissible)
        for ax in range(3):
            if grid.pbc[ax]:
                f[ax] = f[ax] % nshape[ax]
        pos = grid.origin + f @ grid.axes
        site = Site(
            position=pos.tolist(),
            potential=value,
            index=idx[p].tolist(),
            edge=edge,
            boundary=boundary,
        )
        refined.append((_order_key(value, int(cand[p])), site))
    refined.sort(key=lambda t: t[0])
    sites: list[Site] = []
    kept_pos: list[list[float]] = []
    for _, site in refined:
        near = merge > 0 and kept_pos
        if near and distances(grid, np.asarray(site.position), np.asarray(kept_pos)).min() < merge:
            continue
        sites.append(site)
        kept_pos.append(site.position)
        if len(sites) == max_wells:
            break
    return sites


def mark_degenerate(wells: list[Site], threshold: float) -> list[Site]:
    """``wells`` (in order) with ``degenerate`` set: within ``threshold`` V of the first, when at
    least two are."""
    if not wells:
        return wells
    v0 = wells[0].potential
    close = [w.potential - v0 <= threshold for w in wells]
    if sum(close) < 2:
        return [w.model_copy(update={"degenerate": False}) for w in wells]
    return [w.model_copy(update={"degenerate": c}) for w, c in zip(wells, close, strict=True)]
