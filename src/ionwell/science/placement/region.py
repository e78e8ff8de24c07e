"""The admissible region: exclusion radii, the host envelope, galleries, user boxes and spheres.

A point is admissible when it lies at least ``exclusion[element]`` Å from every atom (all periodic
images on periodic grid axes), unless ``within`` is None no farther than ``within`` Å from at
least one atom of the envelope (by default: all atoms), and inside the :class:`Region` when one is
given: in a gallery of a layered host (strictly between two adjacent layers, see
:func:`ionwell.science.host.detect_layers`) and in at least one user box or sphere when any are
given. Pure: grids and atoms in, masks and tests out.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii

from ionwell.config.campaign import BoxRegion, PlacementConfig, SphereRegion
from ionwell.errors import PlacementError
from ionwell.science.grid import Grid, sphere_mask
from ionwell.science.host import Layers, detect_layers
from ionwell.science.placement._common import Model, distances

__all__ = [
    "EXCLUSION_FACTOR",
    "Galleries",
    "Region",
    "admissible_mask",
    "admissible_test",
    "check_element",
    "default_exclusion",
    "exclusion_radii",
    "region_mask",
    "region_of",
]

#: Default minimum guest–atom distance as a fraction of the sum of covalent radii.
EXCLUSION_FACTOR = 0.75


def check_element(symbol: str, what: str) -> int:
    """The atomic number of ``symbol``; PlacementError naming ``what`` when it is no element."""
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
    zg = check_element(guest, "guest")
    out = {}
    for el in sorted(set(elements)):
        z = check_element(el, "host element")
        out[el] = round(EXCLUSION_FACTOR * float(covalent_radii[zg] + covalent_radii[z]), 4)
    return out


def exclusion_radii(guest: str, atoms: Atoms, settings: PlacementConfig) -> dict[str, float]:
    """The exclusion radius (Å) of each host element: :func:`default_exclusion`, replaced by the
    entry of ``settings.exclusion`` for the elements the host has (other entries are ignored)."""
    used = default_exclusion(guest, sorted(set(atoms.get_chemical_symbols())))
    for el, r in settings.exclusion.items():
        if el in used:
            used[el] = float(r)
    return used


def region_of(
    settings: PlacementConfig, atoms: Atoms, envelope_indices: Sequence[int] | None = None
) -> Region | None:
    """The :class:`Region` the settings ask for; None when they restrict nothing.

    With ``settings.galleries_only`` the layers are detected on the heavy atoms (Z > 1) among
    ``envelope_indices`` (the host; default all atoms; all of them when none is heavy) with
    ``settings.layer_tolerance`` (Å), and the galleries shrunk by ``settings.gallery_margin`` (Å)
    on both sides. ``settings.boxes`` and ``settings.spheres`` are taken as they are.
    """
    galleries = None
    if settings.galleries_only:
        host = np.arange(len(atoms)) if envelope_indices is None else np.asarray(envelope_indices)
        host = np.mod(host.astype(np.int64), max(len(atoms), 1))
        heavy = host[atoms.numbers[host] > 1]
        layers = detect_layers(atoms, heavy if heavy.size else host, tol=settings.layer_tolerance)
        galleries = Galleries.from_layers(layers, settings.gallery_margin)
    region = Region(boxes=settings.boxes, spheres=settings.spheres, galleries=galleries)
    return None if region.empty else region


class Galleries(Model):
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


class Region(Model):
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


def admissible_test(
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
                        d = distances(grid, p, np.asarray([sphere.centre]))[0]
                        user[n] |= d <= sphere.radius
                ok &= user
        for n, p in enumerate(points):
            if not ok[n]:
                continue
            if len(positions):
                d = distances(grid, p, positions)
                if np.any(d < limits):
                    ok[n] = False
                    continue
            if within is not None:
                ok[n] = len(env) > 0 and distances(grid, p, env).min() <= within
        return ok

    return test
