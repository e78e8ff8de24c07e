"""Where the next guest goes: admissible region, wells of the potential map, placement rules.

A pure module: it takes a :class:`~ionwell.grid.Grid` in the potential convention (volts,
nuclei are maxima, see :func:`ionwell.grid.orient`) and ASE ``Atoms`` in the same Cartesian
frame, and returns a :class:`Decision`. It reads and writes no files.

Vocabulary:

* **admissible region** — grid points at least ``exclusion[element]`` (Å) from every atom
  (all periodic images on periodic grid axes) and, unless ``within`` is None, no farther than
  ``within`` (Å) from at least one atom of the envelope (by default: all atoms).
* **well** — a local minimum of the potential among admissible points: no admissible neighbour
  (26-neighbourhood, periodic axes wrapped) is lower. A flat patch of equal values counts once,
  and only when nothing next to it is lower.
* **placement rule** ``deepest`` — the guest goes to the lowest well.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii
from pydantic import BaseModel, ConfigDict
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ionwell.errors import PlacementError
from ionwell.grid import Grid, sphere_mask

__all__ = [
    "EXCLUSION_FACTOR",
    "Decision",
    "Site",
    "admissible_mask",
    "default_exclusion",
    "find_wells",
    "place",
]

#: Default minimum guest–atom distance as a fraction of the sum of covalent radii.
EXCLUSION_FACTOR = 0.75


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Site(_Model):
    """One well: refined position (Å), potential there (V), and its grid point."""

    position: list[float]
    potential: float
    index: list[int]


class Decision(_Model):
    """What the placement rule saw and what it chose, with a plain-language reason."""

    rule: str
    guest: str
    candidates: list[Site]
    chosen: list[Site]
    exclusion: dict[str, float]
    within: float | None
    admissible_fraction: float
    reason: str
    grid_shape: list[int]


# ---------------------------------------------------------------------------------------------
# admissible region


def _check_element(symbol: str, what: str) -> int:
    z = atomic_numbers.get(symbol)
    if z is None or symbol == "X":
        raise PlacementError(f"{what}: {symbol!r} is not a chemical element symbol (e.g. 'Li')")
    return z


def default_exclusion(guest: str, elements: Iterable[str]) -> dict[str, float]:
    """Default minimum guest–atom distance (Å) for each host element.

    Our heuristic: ``0.75 × (r_cov(guest) + r_cov(element))`` with the covalent radii of
    ``ase.data.covalent_radii``. It keeps the guest clear of the atoms' cores while leaving the
    choice among wells to the potential; campaigns override it per element
    (``placement.exclusion``).
    """
    zg = _check_element(guest, "guest")
    out = {}
    for el in sorted(set(elements)):
        z = _check_element(el, "host element")
        out[el] = round(EXCLUSION_FACTOR * float(covalent_radii[zg] + covalent_radii[z]), 4)
    return out


def admissible_mask(
    grid: Grid,
    atoms: Atoms,
    exclusion: dict[str, float],
    within: float | None,
    envelope_indices: Sequence[int] | None = None,
) -> np.ndarray:
    """Boolean array of ``grid.shape``: True where a guest may go.

    A point is admissible when it lies at least ``exclusion[symbol]`` Å from every atom
    (an element missing from ``exclusion`` excludes nothing) and, unless ``within`` is None,
    no more than ``within`` Å from at least one atom of ``envelope_indices`` (default: all atoms).
    Distances on periodic grid axes count every periodic image (minimum image). The spheres are
    rasterised line by line (:func:`ionwell.grid.sphere_mask`), so the cost grows with the
    number of atoms, not with the grid size beyond one pass over it.
    """
    shape = grid.shape
    symbols = np.array(atoms.get_chemical_symbols())
    positions = np.asarray(atoms.positions, dtype=float).reshape(-1, 3)
    if within is None:
        admissible = np.ones(shape, dtype=bool)
    else:
        env = positions if envelope_indices is None else positions[list(envelope_indices)]
        admissible = sphere_mask(grid, env, float(within))
    for el in sorted(set(symbols.tolist())):
        r = float(exclusion.get(el, 0.0))
        if r > 0.0:
            admissible &= ~sphere_mask(grid, positions[symbols == el], r, strict=True)
    return admissible


# ---------------------------------------------------------------------------------------------
# wells

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


def _refine(grid: Grid, mask: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, float]:
    """Sub-grid minimum near grid point ``idx``: (fractional index, potential).

    Fits a quadratic to the 3×3×3 block around the point (least squares, in index space, which
    is exact for skewed axes too) and moves to its minimum when the fit is convex, the minimum
    lies within one grid step along every axis, and its value is not above the grid value.
    A point whose block is not entirely admissible and inside the grid keeps its grid position,
    so a refined site never leaves the admissible region.
    """
    shape = grid.shape
    v0 = float(grid.values[tuple(idx)])
    block = np.empty(27)
    for n, off in enumerate(_BLOCK.astype(np.int64)):
        nb = idx + off
        for ax in range(3):
            if grid.pbc[ax]:
                nb[ax] %= shape[ax]
            elif not 0 <= nb[ax] < shape[ax]:
                return idx.astype(float), v0
        if not mask[tuple(nb)]:
            return idx.astype(float), v0
        block[n] = grid.values[tuple(nb)]
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
        return idx.astype(float), v0
    delta = -np.linalg.solve(hess, g)
    if np.max(np.abs(delta)) > 1.0:
        return idx.astype(float), v0
    value = float(c[0] + g @ delta + 0.5 * delta @ hess @ delta)
    if not value <= v0:
        return idx.astype(float), v0
    return idx + delta, value


def find_wells(grid: Grid, mask: np.ndarray, max_wells: int) -> list[Site]:
    """The deepest ``max_wells`` wells of ``grid`` among the points where ``mask`` is True.

    A candidate is an admissible point with no lower admissible neighbour among its 26 (periodic
    axes wrap; points outside the grid and inadmissible points do not count as neighbours).
    Connected patches of equal values count once, represented by their lowest grid index, and
    are dropped when an equal neighbour outside the patch has a lower neighbour of its own (a
    shelf on a slope, not a well). Each well is refined below the grid spacing (see
    :func:`_refine`); positions on periodic axes are wrapped into the cell.

    Order: deepest first by refined potential; ties go to the lexicographically smaller grid
    index ``(i, j, k)``. This order is deterministic for a given grid.
    """
    if max_wells < 1:
        raise PlacementError(f"max_wells must be at least 1, got {max_wells}")
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

    # refine a margin more than asked, since refinement can reorder near-ties
    pool = keep[: max(4 * max_wells, max_wells + 20)]
    nshape = np.asarray(shape, dtype=float)
    sites = []
    for p in pool:
        f, value = _refine(grid, mask, idx[p])
        for ax in range(3):
            if grid.pbc[ax]:
                f[ax] = f[ax] % nshape[ax]
        pos = grid.origin + f @ grid.axes
        sites.append(
            (
                value,
                int(cand[p]),
                Site(position=pos.tolist(), potential=value, index=idx[p].tolist()),
            )
        )
    sites.sort(key=lambda t: (t[0], t[1]))
    return [s for _, _, s in sites[:max_wells]]


# ---------------------------------------------------------------------------------------------
# the rule


def _fmt_volts(x: float) -> str:
    return f"{x:.3g} V" if abs(x) < 0.01 else f"{x:.2f} V"


def place(
    grid: Grid,
    atoms: Atoms,
    guest: str,
    *,
    exclusion: dict[str, float] | None = None,
    within: float | None = 3.0,
    envelope_indices: Sequence[int] | None = None,
    candidates: int = 10,
) -> Decision:
    """Choose the site of the next guest by the ``deepest`` rule.

    ``grid`` must be in the potential convention (see :func:`ionwell.grid.orient`). Exclusion
    radii default to :func:`default_exclusion` per host element; entries of ``exclusion``
    override them. ``within`` (Å) bounds the distance to the nearest envelope atom (None: no
    envelope). Up to ``candidates`` wells are recorded, deepest first. When nothing is
    admissible, or no well exists, the decision has no chosen site and says why.

    Raises:
        PlacementError: for unusable arguments (unknown element, non-positive radius or
            ``within``, envelope index out of range, ``candidates`` < 1).
    """
    _check_element(guest, "guest")
    if candidates < 1:
        raise PlacementError(f"candidates must be at least 1, got {candidates}")
    if within is not None and not (math.isfinite(within) and within > 0):
        raise PlacementError(f"within must be a positive distance in Å, got {within}")
    host_elements = sorted(set(atoms.get_chemical_symbols()))
    used = default_exclusion(guest, host_elements)
    for el, r in (exclusion or {}).items():
        _check_element(el, "exclusion")
        if not (math.isfinite(r) and r > 0):
            raise PlacementError(f"exclusion for {el} must be a positive distance in Å, got {r}")
        if el in used:
            used[el] = float(r)
    if envelope_indices is not None:
        env = [int(i) for i in envelope_indices]
        bad = [i for i in env if not -len(atoms) <= i < len(atoms)]
        if bad:
            raise PlacementError(
                f"envelope atom indices {bad[:5]} are out of range for {len(atoms)} atoms"
            )
        envelope_indices = env

    mask = admissible_mask(grid, atoms, used, within, envelope_indices)
    fraction = float(np.count_nonzero(mask)) / mask.size
    wells = find_wells(grid, mask, candidates) if fraction > 0 else []
    if not wells:
        region = "at least the exclusion distance from every atom"
        if within is not None:
            region += f" and within {within:g} Å of the host"
        if fraction == 0:
            reason = f"no admissible well: no grid point is {region}"
        else:
            reason = "no admissible well: the admissible region holds no local minimum"
        chosen: list[Site] = []
    else:
        chosen = [wells[0]]
        if len(wells) == 1:
            reason = "deepest admissible well (the only well in the admissible region)"
        else:
            gap = wells[1].potential - wells[0].potential
            if gap > 0:
                reason = f"deepest admissible well, {_fmt_volts(gap)} below the next"
            else:
                reason = (
                    "deepest admissible well, tied with the next; the tie goes to the lower "
                    "grid index"
                )
    return Decision(
        rule="deepest",
        guest=guest,
        candidates=wells,
        chosen=chosen,
        exclusion=used,
        within=within,
        admissible_fraction=fraction,
        reason=reason,
        grid_shape=list(grid.shape),
    )
