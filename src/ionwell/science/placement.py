"""Where the next guest goes: admissible region, wells of the potential map, placement rules.

A pure module: it takes a :class:`~ionwell.science.grid.Grid` in the potential convention (volts,
nuclei are maxima, see :func:`ionwell.science.grid.orient`) and ASE ``Atoms`` in the same Cartesian
frame, and returns a :class:`Decision`. It reads and writes no files and runs no engine; the
``screened`` rule gets its energies from a function the caller passes in.

Vocabulary:

* **admissible region** — grid points at least ``exclusion[element]`` (Å) from every atom
  (all periodic images on periodic grid axes), unless ``within`` is None no farther than
  ``within`` (Å) from at least one atom of the envelope (by default: all atoms), and inside the
  :class:`Region` when one is given: in a gallery of a layered host (strictly between two
  adjacent layers, see :func:`ionwell.science.host.detect_layers`) and in at least one user box or
  sphere when any are given.
* **well** — a local minimum of the potential among admissible points: no admissible neighbour
  (26-neighbourhood, periodic axes wrapped) is lower. A flat patch of equal values counts once,
  and only when nothing next to it is lower. Each well is refined below the grid spacing; wells
  closer than ``merge`` Å (minimum image) are one well, the deeper. A well whose neighbourhood
  (its 3×3×3 grid block) touches the edge of the admissible region or of the grid is marked
  ``edge``: it is the lowest point there, but the potential may keep falling beyond the edge.
  ``boundary`` says when the edge sets the site: ``"grid"`` when the block leaves the grid on a
  non-periodic axis (the site is on the grid box's face; this wins when both apply),
  ``"region"`` when an inadmissible point of the block is lower than the well — the potential
  keeps falling across the admissible region's boundary (an exclusion radius, the ``within``
  envelope, a gallery margin, the user boxes and spheres), so the region, not a minimum of the
  potential, places the site. A true minimum that merely lies next to the boundary (every
  inadmissible neighbour higher) is ``edge`` but has no ``boundary``.
* **order** of wells — ascending refined potential; potentials equal to within 1 nV are tied
  and the tie goes to the lower grid index ``(i, j, k)`` of the well's grid point. Every rule
  that walks the wells "in order" uses this order, so a decision is deterministic for a given
  grid, structure and settings.
* **near-degenerate** wells — every well within ``degenerate`` V of the deepest, when there are
  at least two such wells (``Site.degenerate``). They are reported, not reordered: ``deepest``
  still takes the first in the order above.

Placement rules:

* ``deepest`` — the first well in order.
* ``thermal`` — a random well, with Boltzmann weight ``exp(-z·(V - V_min)/(k_B·T))`` for the
  guest charge ``z`` (``k_B`` from ``ase.units``), among the recorded wells. The generator is
  numpy's ``default_rng`` seeded with ``[seed, step]``, and a draw is one ``random()`` number
  ``u`` mapped through the cumulative weights (the first well whose cumulative weight exceeds
  ``u`` times the total), so the same campaign seed and step always make the same choice.
  ``T = 0`` is the ``deepest`` rule exactly; as ``T → 0`` the weights of all but the deepest well
  vanish.
* ``screened`` — the ``top`` deepest wells get an energy (eV) from the caller's ``energy_of``;
  the lowest energy wins, ties going to the deeper well. Wells whose energy is missing (None or
  not finite) are not chosen.
* ``count`` (per step) > 1 — several guests in one step, at least ``separation`` Å apart
  (minimum image): wells are taken greedily in the rule's order (deepest: potential; screened:
  energy), skipping any closer than ``separation`` to one already taken; ``thermal`` draws one
  well at a time without replacement among the wells that keep the separation, the weights
  renormalised over them. Fewer guests than asked are placed when the wells run out, and the
  reason says so.

Rejected sites (the loop's ``reject_site`` remedy): when a step computed with the chosen sites
fails a check, :func:`next_untried` strikes out every site tried so far and takes the next wells
of the same decision in depth order, greedily keeping the separation — whatever the rule, so the
fallback never draws new random numbers and replays exactly.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from itertools import product
from typing import Any, Literal

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii
from ase.units import kB
from pydantic import BaseModel, ConfigDict, model_validator
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ionwell.config.campaign import BoxRegion, PlacementConfig, SphereRegion
from ionwell.errors import PlacementError
from ionwell.science.grid import Grid, detect_sign, orient, sphere_mask
from ionwell.science.host import Layers, detect_layers

__all__ = [
    "EXCLUSION_FACTOR",
    "RULES",
    "Choice",
    "Decision",
    "Galleries",
    "Region",
    "Site",
    "admissible_mask",
    "choose",
    "decide",
    "default_exclusion",
    "find_wells",
    "next_untried",
    "place",
    "region_mask",
]

#: Default minimum guest–atom distance as a fraction of the sum of covalent radii.
EXCLUSION_FACTOR = 0.75

#: The placement rules.
RULES = ("deepest", "thermal", "screened")

#: Potentials closer than this (V) are tied in the order of wells.
_TIE = 1e-9

EnergyFunction = Callable[[list["Site"]], Sequence[float | None]]


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


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Site(_Model):
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


class Galleries(_Model):
    """The gallery mask of a layered host: open height intervals along the stacking normal.

    A point is in a gallery when its height ``position · normal`` (Å; with ``period``, reduced
    into ``[frame, frame + period)``) lies strictly inside one of ``intervals``.
    """

    normal: list[float]
    intervals: list[tuple[float, float]]
    period: float | None = None
    frame: float = 0.0
    layer_heights: list[float] = []
    margin: float = 0.0

    @classmethod
    def from_layers(cls, layers: Layers, margin: float = 0.0) -> Galleries:
        """The galleries between adjacent layers, each shrunk by ``margin`` Å on both sides."""
        intervals = [(lo, hi) for lo, hi in layers.galleries(margin) if hi > lo]
        return cls(
            normal=list(layers.normal),
            intervals=intervals,
            period=layers.period,
            frame=layers.bottoms[0] if layers.bottoms else 0.0,
            layer_heights=list(layers.heights),
            margin=margin,
        )

    def contains(self, points: np.ndarray) -> np.ndarray:
        """Boolean array over ``points`` (..., 3): True inside a gallery."""
        h = np.asarray(points, dtype=float) @ np.asarray(self.normal, dtype=float)
        return self._inside(h)

    def _inside(self, h: np.ndarray) -> np.ndarray:
        if self.period is not None:
            h = self.frame + np.mod(h - self.frame, self.period)
        out = np.zeros(h.shape, dtype=bool)
        for lo, hi in self.intervals:
            out |= (h > lo) & (h < hi)
        return out


class Region(_Model):
    """Restrictions of the admissible region beyond exclusion radii and the host envelope.

    With ``galleries`` a point must lie in a gallery; with any ``boxes`` or ``spheres`` it must
    lie in at least one of them. Boxes are compared with a grid point's own Cartesian position;
    spheres count periodic images on periodic grid axes.
    """

    boxes: list[BoxRegion] = []
    spheres: list[SphereRegion] = []
    galleries: Galleries | None = None

    @property
    def empty(self) -> bool:
        return not self.boxes and not self.spheres and self.galleries is None


class Choice(_Model):
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


class Decision(_Model):
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


def region_mask(grid: Grid, region: Region) -> np.ndarray:
    """Boolean array of ``grid.shape``: True at the points ``region`` admits."""
    shape = grid.shape
    out = np.ones(shape, dtype=bool)
    if region.galleries is None and not region.boxes and not region.spheres:
        return out
    user = np.zeros(shape, dtype=bool) if (region.boxes or region.spheres) else None
    for sphere in region.spheres:
        assert user is not None
        user |= sphere_mask(grid, np.asarray([sphere.centre]), sphere.radius)
    if region.galleries is not None or region.boxes:
        # one plane of constant first index at a time keeps the memory to n1 × n2 points
        jk = np.indices(shape[1:]).reshape(2, -1).T @ np.asarray(grid.axes, dtype=float)[1:]
        for i in range(shape[0]):
            pts = grid.origin + i * np.asarray(grid.axes[0], dtype=float) + jk
            if region.galleries is not None:
                out[i] = region.galleries.contains(pts).reshape(shape[1:])
            if region.boxes:
                assert user is not None
                for box in region.boxes:
                    inside = np.all(
                        (pts >= np.asarray(box.lower)) & (pts <= np.asarray(box.upper)), axis=1
                    )
                    user[i] |= inside.reshape(shape[1:])
    if user is not None:
        out &= user
    return out


def admissible_mask(
    grid: Grid,
    atoms: Atoms,
    exclusion: dict[str, float],
    within: float | None,
    envelope_indices: Sequence[int] | None = None,
    region: Region | None = None,
) -> np.ndarray:
    """Boolean array of ``grid.shape``: True where a guest may go.

    A point is admissible when it lies at least ``exclusion[symbol]`` Å from every atom
    (an element missing from ``exclusion`` excludes nothing), unless ``within`` is None no more
    than ``within`` Å from at least one atom of ``envelope_indices`` (default: all atoms), and
    inside ``region`` (see :func:`region_mask`) when given. Distances on periodic grid axes count
    every periodic image (minimum image). The spheres are rasterised line by line
    (:func:`ionwell.science.grid.sphere_mask`), so the cost grows with the number of atoms, not with the
    grid size beyond one pass over it.
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
    if region is not None and not region.empty:
        admissible &= region_mask(grid, region)
    return admissible


# ---------------------------------------------------------------------------------------------
# distances under the grid's periodicity


def _distances(grid: Grid | None, origin: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Distances (Å) from ``origin`` to each of ``points``, minimum image on periodic grid axes."""
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


def _admissible_test(
    grid: Grid,
    atoms: Atoms,
    exclusion: dict[str, float],
    within: float | None,
    envelope_indices: Sequence[int] | None,
    region: Region | None,
) -> Callable[[np.ndarray], np.ndarray]:
    """The rule of :func:`admissible_mask` for arbitrary positions (used on refined wells)."""
    symbols = np.array(atoms.get_chemical_symbols())
    positions = np.asarray(atoms.positions, dtype=float).reshape(-1, 3)
    env = positions if envelope_indices is None else positions[list(envelope_indices)]
    limits = np.array([float(exclusion.get(el, 0.0)) for el in symbols])

    def test(points: np.ndarray) -> np.ndarray:
        points = np.asarray(points, dtype=float).reshape(-1, 3)
        ok = np.ones(len(points), dtype=bool)
        if region is not None and not region.empty:
            if region.galleries is not None:
                ok &= region.galleries.contains(points)
            if region.boxes or region.spheres:
                user = np.zeros(len(points), dtype=bool)
                for box in region.boxes:
                    user |= np.all((points >= box.lower) & (points <= box.upper), axis=1)
                for n, p in enumerate(points):
                    for sphere in region.spheres:
                        d = _distances(grid, p, np.asarray([sphere.centre]))[0]
                        user[n] |= d <= sphere.radius
                ok &= user
        for n, p in enumerate(points):
            if not ok[n]:
                continue
            if len(positions):
                d = _distances(grid, p, positions)
                if np.any(d < limits):
                    ok[n] = False
                    continue
            if within is not None:
                ok[n] = len(env) > 0 and _distances(grid, p, env).min() <= within
        return ok

    return test


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


Boundary = Literal["region", "grid"]


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
    return (round(value / _TIE) * _TIE, flat)


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
        if near and _distances(grid, np.asarray(site.position), np.asarray(kept_pos)).min() < merge:
            continue
        sites.append(site)
        kept_pos.append(site.position)
        if len(sites) == max_wells:
            break
    return sites


def _mark_degenerate(wells: list[Site], threshold: float) -> list[Site]:
    if not wells:
        return wells
    v0 = wells[0].potential
    close = [w.potential - v0 <= threshold for w in wells]
    if sum(close) < 2:
        return [w.model_copy(update={"degenerate": False}) for w in wells]
    return [w.model_copy(update={"degenerate": c}) for w, c in zip(wells, close, strict=True)]


# ---------------------------------------------------------------------------------------------
# the rules


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
            d = _distances(
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
        or _distances(grid, np.asarray(w.position), tried_pos).min() > tolerance
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


def choose(
    wells: Sequence[Site],
    *,
    rule: str = "deepest",
    count: int = 1,
    separation: float = 2.5,
    temperature: float = 300.0,
    ion_charge: int = 1,
    seed: int = 0,
    step: int = 0,
    top: int = 3,
    energy_of: EnergyFunction | None = None,
    grid: Grid | None = None,
) -> Choice:
    """Apply a placement rule to ``wells`` (in order, deepest first; see the module notes).

    ``grid`` supplies the periodicity for the separation test (None: plain distances).
    ``energy_of`` (screened only) receives the ``top`` deepest wells and returns one energy (eV)
    per well, None for a failed one.

    Raises:
        PlacementError: unknown rule, unusable numbers, ``screened`` without ``energy_of``, or an
            ``energy_of`` that returns the wrong number of energies.
    """
    _check_rule_args(rule, count, separation, temperature, ion_charge, seed, step, top)
    wells = list(wells)
    if rule == "screened" and energy_of is None:
        raise PlacementError(
            "rule 'screened' needs the energies of the candidate wells: it runs inside a "
            "campaign, whose engine (or placement.screen.engine) computes them"
        )
    if not wells:
        return Choice(chosen=[], reason="no admissible well")
    n = len(wells)

    if rule == "thermal" and temperature > 0:
        w = _thermal_weights(wells, temperature, ion_charge)
        probabilities = (w / w.sum()).tolist()
        rng = np.random.default_rng([seed, step])
        chosen: list[int] = []
        for _ in range(count):
            free = np.ones(n, dtype=bool)
            free[chosen] = False
            if chosen:
                taken = np.asarray([wells[c].position for c in chosen])
                for i in np.flatnonzero(free):
                    if _distances(grid, np.asarray(wells[i].position), taken).min() < separation:
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

    if rule == "screened":
        assert energy_of is not None
        k = min(top, n)
        raw = list(energy_of(wells[:k]))
        if len(raw) != k:
            raise PlacementError(
                f"rule 'screened': the energy function returned {len(raw)} energies for {k} "
                "candidate wells"
            )
        energies: list[float | None] = []
        for e in raw:
            ok = e is not None and math.isfinite(float(e))
            energies.append(float(e) if ok else None)
        order = sorted(
            (i for i in range(k) if energies[i] is not None),
            key=lambda i: (energies[i], i),
        )
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

    # deepest (and thermal at T = 0, which is the same rule)
    chosen = _greedy(range(n), wells, count, separation, grid)
    if rule == "thermal":
        w = _thermal_weights(wells, 0.0, ion_charge)
        probabilities = (w / w.sum()).tolist()
        head = f"thermal choice at 0 K is the deepest rule: well {chosen[0] + 1}"
    else:
        probabilities = None
        if n == 1:
            head = "deepest admissible well (the only well in the admissible region)"
        else:
            gap = wells[1].potential - wells[0].potential
            if gap > _TIE:
                head = f"deepest admissible well, {_fmt_volts(gap)} below the next"
            else:
                head = (
                    "deepest admissible well, tied with the next; the tie goes to the lower "
                    "grid index"
                )
    near = sum(w.degenerate for w in wells)
    if near >= 2:
        head += (
            f"; {near} wells are near-degenerate (within the threshold of the deepest): the "
            "lower refined potential goes first, then the lower grid index"
        )
    return Choice(
        chosen=chosen, probabilities=probabilities, reason=head + _placed(chosen, count, separation)
    )


def _check_rule_args(
    rule: str,
    count: int,
    separation: float,
    temperature: float,
    ion_charge: float,
    seed: int,
    step: int,
    top: int,
) -> None:
    if rule not in RULES:
        raise PlacementError(f"unknown placement rule {rule!r}; expected one of {', '.join(RULES)}")
    if count < 1:
        raise PlacementError(f"count (guests per step) must be at least 1, got {count}")
    if not (math.isfinite(separation) and separation > 0):
        raise PlacementError(f"separation must be a positive distance in Å, got {separation}")
    if not (math.isfinite(temperature) and temperature >= 0):
        raise PlacementError(f"temperature must be at least 0 K, got {temperature}")
    if not (math.isfinite(ion_charge) and ion_charge > 0):
        raise PlacementError(f"ion_charge must be positive, got {ion_charge}")
    if seed < 0 or step < 0:
        raise PlacementError(f"seed and step must be at least 0, got seed {seed}, step {step}")
    if top < 1:
        raise PlacementError(f"top (wells screened) must be at least 1, got {top}")


# ---------------------------------------------------------------------------------------------
# entry points


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
    *,
    exclusion: dict[str, float] | None = None,
    within: float | None = 3.0,
    envelope_indices: Sequence[int] | None = None,
    candidates: int = 10,
    rule: str = "deepest",
    count: int = 1,
    separation: float = 2.5,
    temperature: float = 300.0,
    ion_charge: int = 1,
    seed: int = 0,
    step: int = 0,
    top: int = 3,
    energy_of: EnergyFunction | None = None,
    merge: float = 0.3,
    degenerate: float = 0.01,
    region: Region | None = None,
) -> Decision:
    """Choose the site(s) of the next guest(s).

    ``grid`` must be in the potential convention (see :func:`ionwell.science.grid.orient`). Exclusion
    radii default to :func:`default_exclusion` per host element; entries of ``exclusion``
    override them. ``within`` (Å) bounds the distance to the nearest envelope atom (None: no
    envelope); ``region`` restricts further (galleries, user boxes and spheres). Up to
    ``candidates`` wells are recorded in order (more when ``count`` or, for ``screened``,
    ``top`` is larger), wells closer than ``merge`` Å are merged, and wells within
    ``degenerate`` V of the deepest are marked. The rule (see the module notes and
    :func:`choose`) picks ``count`` of them. When nothing is admissible, or no well exists, the
    decision has no chosen site and says why.

    Raises:
        PlacementError: for unusable arguments (unknown element or rule, non-positive radius or
            ``within``, envelope index out of range, ``candidates`` < 1, ...) and ``screened``
            without ``energy_of``.
    """
    _check_element(guest, "guest")
    if candidates < 1:
        raise PlacementError(f"candidates must be at least 1, got {candidates}")
    if within is not None and not (math.isfinite(within) and within > 0):
        raise PlacementError(f"within must be a positive distance in Å, got {within}")
    if not (math.isfinite(degenerate) and degenerate >= 0):
        raise PlacementError(f"degenerate must be at least 0 V, got {degenerate}")
    if not (math.isfinite(merge) and merge >= 0):
        raise PlacementError(f"merge must be a distance of at least 0 Å, got {merge}")
    _check_rule_args(rule, count, separation, temperature, ion_charge, seed, step, top)
    if rule == "screened" and energy_of is None:
        raise PlacementError(
            "rule 'screened' needs the energies of the candidate wells: it runs inside a "
            "campaign, whose engine (or placement.screen.engine) computes them"
        )
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
    if region is not None and region.empty:
        region = None

    mask = admissible_mask(grid, atoms, used, within, envelope_indices, region)
    fraction = float(np.count_nonzero(mask)) / mask.size
    n_wells = max(candidates, count, top if rule == "screened" else 1)
    if fraction > 0:
        test = _admissible_test(grid, atoms, used, within, envelope_indices, region)
        wells = find_wells(grid, mask, n_wells, merge=merge, admissible=test)
    else:
        wells = []
    wells = _mark_degenerate(wells, degenerate)
    if not wells:
        choice = Choice(chosen=[], reason=_empty_reason(fraction, within, region))
    else:
        choice = choose(
            wells,
            rule=rule,
            count=count,
            separation=separation,
            temperature=temperature,
            ion_charge=ion_charge,
            seed=seed,
            step=step,
            top=top,
            energy_of=energy_of,
            grid=grid,
        )
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
        separation=separation if count > 1 else None,
        merge=merge,
        degenerate=degenerate,
        temperature=temperature if thermal else None,
        ion_charge=ion_charge if thermal else None,
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
    ``settings.sign`` (``auto`` is resolved with :func:`ionwell.science.grid.detect_sign` and the answer
    recorded in ``Decision.sign``). With ``galleries_only`` the layers are detected on the
    heavy atoms among ``envelope_indices`` (the host; default all atoms) with
    ``settings.layer_tolerance``, and the galleries shrunk by ``settings.gallery_margin``.
    Everything else maps one to one onto :func:`place`. Given the same inputs it returns the
    same decision, which is what a replay relies on.
    """
    sign = detect_sign(grid, atoms) if settings.sign == "auto" else settings.sign
    oriented = orient(grid, atoms, sign)
    galleries = None
    if settings.galleries_only:
        host = np.arange(len(atoms)) if envelope_indices is None else np.asarray(envelope_indices)
        host = np.mod(host.astype(np.int64), max(len(atoms), 1))
        heavy = host[atoms.numbers[host] > 1]
        layers = detect_layers(atoms, heavy if heavy.size else host, tol=settings.layer_tolerance)
        galleries = Galleries.from_layers(layers, settings.gallery_margin)
    region = Region(boxes=settings.boxes, spheres=settings.spheres, galleries=galleries)
    decision = place(
        oriented,
        atoms,
        guest,
        exclusion=dict(settings.exclusion) or None,
        within=settings.within,
        envelope_indices=envelope_indices,
        candidates=settings.candidates,
        rule=settings.rule,
        count=settings.per_step,
        separation=settings.separation,
        temperature=settings.temperature,
        ion_charge=settings.ion_charge,
        seed=seed,
        step=step,
        top=settings.screen.top,
        energy_of=energy_of,
        merge=settings.merge,
        degenerate=settings.degenerate,
        region=region,
    )
    return decision.model_copy(update={"sign": sign})
