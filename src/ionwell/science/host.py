"""The host: hydrogen-terminated layered carbon flakes, periodic graphite, checks, layers.

Pure functions over ASE :class:`~ase.Atoms`. Structure files are read in
:mod:`ionwell.io.structures` (which applies :func:`check_atoms` to what it reads).

Flake geometry. A sheet is cut from a graphene lattice whose C–C bond is ``cc``. Hexagon (ring)
centres form a triangular lattice with vectors ``a1 = sqrt(3)·cc·(1, 0)`` and
``a2 = sqrt(3)·cc·(1/2, sqrt(3)/2)``; the six carbons of the ring at centre ``c`` sit at
``c + cc·(cos θ, sin θ)`` with ``θ = 30°, 90°, ..., 330°``. The sheet's central ring is centred
on the z axis, so every sheet has the full hexagonal symmetry about that axis.

* ``shells = n`` keeps the rings within ``n - 1`` ring-steps of the central ring (1, 7, 19, ...
  rings: benzene, coronene, circumcoronene, ...).
* ``radius = r`` keeps the carbon sites within ``r`` of the axis, then removes carbons with
  fewer than two carbon neighbours until none is left. (A disk centred on a hexagon never leaves
  a hexagon short of a single carbon, whose two hydrogens would clash; the tests check this.)

Every carbon with fewer than three carbon neighbours gets one hydrogen at ``ch`` along the
outward bisector of its C–C bonds (in the sheet plane). Sheets are stacked along z at
``spacing``; in ``AB`` (Bernal) stacking every second sheet is shifted in-plane by one C–C bond
vector ``(0, cc)``, which puts one carbon sublattice over carbons of the neighbouring sheet and
the other over its hexagon centres; ``AA`` sheets are eclipsed. The whole stack is translated so
that the mean atomic position is the origin. Atom tags hold the sheet index (0 = lowest).

Periodic graphite (:func:`build_graphite`). The graphene primitive cell ``a1 = a·(1, 0, 0)``,
``a2 = a·(-1/2, √3/2, 0)`` (120°, as in the usual hexagonal setting) holds carbons at fractional
(0, 0) and (2/3, 1/3), one bond ``a/√3`` apart. The in-plane cell is ``n·a1, n·a2`` or the √3×√3
R30° cell ``2·a1 + a2, a2 - a1`` (six carbons per sheet). Sheet ``i`` lies at height
``(i + 1/2)·spacing`` in a cell ``layers·spacing`` high, so one gallery straddles the cell's
bottom/top face; in AB stacking every second sheet is shifted by one bond vector
``(2·a1 + a2)/3``, which puts one sublattice over carbons of the neighbouring sheet and the other
over its hexagon centres (Bernal).
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict
from scipy.spatial import cKDTree

from ionwell.config.campaign import FlakeBuilder, GraphiteBuilder
from ionwell.errors import StructureError

__all__ = [
    "MIN_ATOM_DISTANCE",
    "Layers",
    "build_flake",
    "build_graphite",
    "build_host",
    "build_sheet",
    "check_atoms",
    "detect_layers",
    "host_formula_units",
]

#: Two atoms of a structure closer than this (Å) make it unusable (:func:`check_atoms`).
MIN_ATOM_DISTANCE = 0.5

_SQRT3 = math.sqrt(3.0)
_RING_ANGLES = np.deg2rad(30.0 + 60.0 * np.arange(6))


# ---------------------------------------------------------------------------------------------
# graphene lattice helpers


def _ring_centres(reach: int, cc: float) -> np.ndarray:
    """Ring centres ``i·a1 + j·a2`` within ``reach`` ring-steps of the origin, shape (n, 2)."""
    rng = np.arange(-reach, reach + 1)
    i, j = (g.ravel() for g in np.meshgrid(rng, rng, indexing="ij"))
    steps = np.maximum(np.maximum(np.abs(i), np.abs(j)), np.abs(i + j))
    keep = steps <= reach
    a = _SQRT3 * cc
    return np.column_stack([a * (i[keep] + 0.5 * j[keep]), a * (_SQRT3 / 2.0) * j[keep]])


def _ring_vertices(centres: np.ndarray, cc: float) -> np.ndarray:
    """Unique carbon sites of the rings at ``centres``, shape (m, 2), in a stable order."""
    offsets = cc * np.column_stack([np.cos(_RING_ANGLES), np.sin(_RING_ANGLES)])
    sites = (centres[:, None, :] + offsets[None, :, :]).reshape(-1, 2)
    # sites are shared by up to three rings; merge copies on a grid much finer than cc
    keys = np.round(sites / (cc * 1e-3)).astype(np.int64)
    _, first = np.unique(keys, axis=0, return_index=True)
    sites = sites[np.sort(first)]
    order = np.lexsort((sites[:, 0], sites[:, 1]))
    return sites[order]


def _bonds(sites: np.ndarray, cc: float) -> list[list[int]]:
    """Carbon neighbour lists (sites at ``cc`` from each other)."""
    tree = cKDTree(sites)
    pairs = tree.query_pairs(cc * 1.1, output_type="ndarray")
    nbrs: list[list[int]] = [[] for _ in range(len(sites))]
    for a, b in pairs:
        nbrs[a].append(int(b))
        nbrs[b].append(int(a))
    return nbrs


def _radius_sites(radius: float, cc: float) -> np.ndarray:
    """Carbon sites within ``radius`` of the axis, minus those left with < 2 carbon neighbours."""
    # rings within k steps of the central one cover at least the disk of radius 1.5·k·cc
    reach = int(math.ceil((radius + 2.0 * cc) / (1.5 * cc)))
    lattice = _ring_vertices(_ring_centres(reach, cc), cc)
    kept = np.linalg.norm(lattice, axis=1) <= radius * (1.0 + 1e-9)
    sites = lattice[kept]
    while len(sites):
        count = np.array([len(nb) for nb in _bonds(sites, cc)])
        if (count >= 2).all():
            break
        sites = sites[count >= 2]
    return sites


def build_sheet(builder: FlakeBuilder) -> Atoms:
    """One hydrogen-terminated sheet in the z = 0 plane, its central ring centred on the z axis."""
    cc, ch = builder.cc, builder.ch
    if builder.shells is not None:
        carbons = _ring_vertices(_ring_centres(builder.shells - 1, cc), cc)
    else:
        assert builder.radius is not None
        carbons = _radius_sites(builder.radius, cc)
        if len(carbons) == 0:
            raise StructureError(
                f"host.builder.radius: a radius of {builder.radius} Å keeps no complete carbon "
                f"ring; use at least the C–C bond length ({cc} Å) or give 'shells'"
            )
    nbrs = _bonds(carbons, cc)
    hydrogens = []
    for i, nb in enumerate(nbrs):
        if len(nb) >= 3:
            continue
        bond_dirs = carbons[nb] - carbons[i]
        outward = -(bond_dirs / np.linalg.norm(bond_dirs, axis=1)[:, None]).sum(axis=0)
        hydrogens.append(carbons[i] + ch * outward / np.linalg.norm(outward))
    xy = np.vstack([carbons, np.array(hydrogens).reshape(-1, 2)])
    positions = np.column_stack([xy, np.zeros(len(xy))])
    return Atoms(["C"] * len(carbons) + ["H"] * len(hydrogens), positions=positions)


def build_flake(builder: FlakeBuilder) -> Atoms:
    """A stack of ``builder.layers`` hydrogen-terminated sheets, centred on the origin.

    Atoms are ordered sheet by sheet (carbons, then hydrogens of each sheet); tags hold the sheet
    index; ``info['host_builder']`` holds the builder parameters. No cell, no periodicity.
    """
    sheet = build_sheet(builder)
    shift = np.array([0.0, builder.cc, 0.0])  # one C–C bond vector of the lattice
    parts = []
    for layer in range(builder.layers):
        part = sheet.copy()
        offset = np.array([0.0, 0.0, layer * builder.spacing])
        if builder.stacking == "AB" and layer % 2 == 1:
            offset = offset + shift
        part.positions += offset
        part.set_tags(np.full(len(part), layer))
        parts.append(part)
    atoms = parts[0]
    for part in parts[1:]:
        atoms += part
    atoms.positions -= atoms.positions.mean(axis=0)
    atoms.info["host_builder"] = builder.model_dump(mode="json")
    atoms.pbc = False
    return atoms


def build_graphite(builder: GraphiteBuilder) -> Atoms:
    """Periodic graphite: ``builder.layers`` sheets in a hexagonal cell periodic along a, b, c.

    Lengths in Å. Atoms are ordered sheet by sheet; tags hold the sheet index (0 = lowest);
    ``info['host_builder']`` holds the builder parameters. See the module docstring for the
    cell, the heights of the sheets and the AB shift.
    """
    a = builder.a
    a1 = a * np.array([1.0, 0.0, 0.0])
    a2 = a * np.array([-0.5, _SQRT3 / 2.0, 0.0])
    basis = [np.zeros(3), (2.0 * a1 + a2) / 3.0]  # fractional (0, 0) and (2/3, 1/3)
    if builder.cell == "sqrt3":
        v1, v2 = 2.0 * a1 + a2, a2 - a1
        # the primitive cells in the √3×√3 cell: lattice points i·a1 + j·a2 inside it
        points = [np.zeros(3), a1, a1 + a2]
    else:
        n = int(builder.cell)
        v1, v2 = n * a1, n * a2
        points = [i * a1 + j * a2 for i in range(n) for j in range(n)]
    sheet = np.array([p + b for p in points for b in basis])
    height = builder.layers * builder.spacing
    cell = np.array([v1, v2, [0.0, 0.0, height]])
    bond = (2.0 * a1 + a2) / 3.0  # one C–C bond vector
    parts, tags = [], []
    for layer in range(builder.layers):
        offset = np.array([0.0, 0.0, (layer + 0.5) * builder.spacing])
        if builder.stacking == "AB" and layer % 2 == 1:
            offset = offset + bond
        parts.append(sheet + offset)
        tags += [layer] * len(sheet)
    atoms = Atoms(["C"] * len(tags), positions=np.vstack(parts), cell=cell, pbc=True, tags=tags)
    atoms.wrap()
    atoms.info["host_builder"] = builder.model_dump(mode="json")
    return atoms


def build_host(builder: FlakeBuilder | GraphiteBuilder) -> Atoms:
    """The host a builder describes: :func:`build_graphite` or :func:`build_flake`."""
    if isinstance(builder, GraphiteBuilder):
        return build_graphite(builder)
    return build_flake(builder)


# ---------------------------------------------------------------------------------------------
# checks of a structure


def _closest_pair(atoms: Atoms, cutoff: float) -> tuple[int, int, float] | None:
    """The closest pair of distinct atoms nearer than ``cutoff`` (minimum image), or None.

    Without periodicity a k-d tree of the positions (SciPy); ASE's neighbour list bins the
    bounding box by the cutoff, which for a short cutoff and thousands of atoms took a minute
    and gigabytes. With periodicity ASE's neighbour list (minimum image, any cell)."""
    if not atoms.pbc.any():
        from scipy.spatial import cKDTree

        pos = np.asarray(atoms.positions, dtype=float)
        pairs = cKDTree(pos).query_pairs(cutoff, output_type="ndarray")
        if len(pairs) == 0:
            return None
        d = np.linalg.norm(pos[pairs[:, 0]] - pos[pairs[:, 1]], axis=1)
        k = int(np.argmin(d))
        return int(pairs[k, 0]), int(pairs[k, 1]), float(d[k])
    from ase.neighborlist import neighbor_list

    i, j, d = neighbor_list("ijd", atoms, cutoff, self_interaction=False)
    if len(d) == 0:
        return None
    k = int(np.argmin(d))
    a, b = sorted((int(i[k]), int(j[k])))
    return a, b, float(d[k])


def check_atoms(atoms: Atoms, source: str | Path) -> None:
    """The checks every structure read from a file passes (``source`` names it in messages):
    finite positions, and no two atoms closer than :data:`MIN_ATOM_DISTANCE` (minimum image).

    Raises:
        StructureError: naming ``source``, the atoms and what was expected.
    """
    bad = ~np.isfinite(atoms.positions).all(axis=1)
    if bad.any():
        idx = np.flatnonzero(bad)
        raise StructureError(
            f"{source}: {len(idx)} atom(s) have non-finite positions (first: atom {idx[0]}); "
            "expected finite Cartesian coordinates in Å"
        )
    try:
        close = _closest_pair(atoms, MIN_ATOM_DISTANCE)
    except Exception as err:  # e.g. a periodic axis with a zero cell vector
        raise StructureError(
            f"{source}: cannot measure interatomic distances ({err}); check the cell and pbc"
        ) from None
    if close is not None:
        a, b, d = close
        sa, sb = atoms[a].symbol, atoms[b].symbol
        raise StructureError(
            f"{source}: atoms {a} ({sa}) and {b} ({sb}) are {d:.3f} Å apart; expected every "
            f"pair at least {MIN_ATOM_DISTANCE} Å apart (duplicated atom or wrong units?)"
        )


def host_formula_units(atoms: Atoms, formula_unit: Mapping[str, int] | None) -> float:
    """Number of host formula units in ``atoms`` (``None``: the whole host counts as one).

    ``{"C": 6}`` gives ``n_C / 6``. With several elements every element must give the same
    number; otherwise (or when an element is absent) a :class:`StructureError` is raised.
    """
    if formula_unit is None:
        return 1.0
    if not formula_unit:
        raise StructureError("host.formula_unit: empty; give element counts such as {C: 6}")
    symbols = atoms.get_chemical_symbols()
    ratios: dict[str, float] = {}
    for element, count in formula_unit.items():
        if count <= 0:
            raise StructureError(
                f"host.formula_unit: count of {element} must be a positive integer, got {count}"
            )
        n = symbols.count(element)
        if n == 0:
            raise StructureError(
                f"host.formula_unit: the host holds no {element} atoms "
                f"(host formula {atoms.get_chemical_formula()})"
            )
        ratios[element] = n / count
    values = list(ratios.values())
    if max(values) - min(values) > 1e-9 * max(values):
        detail = ", ".join(f"{el}: {r:g}" for el, r in ratios.items())
        raise StructureError(
            f"host.formula_unit: the host ({atoms.get_chemical_formula()}) holds a different "
            f"number of formula units by each element ({detail}); give a formula unit of one "
            "element, e.g. {C: 6}"
        )
    return values[0]


# ---------------------------------------------------------------------------------------------
# layer detection

_N_COARSE = 1200  # directions on the half sphere searched for the stacking normal
_MIN_PERIOD = 0.5  # Å: a height period shorter than this means "not a lattice-plane normal"


class Layers(BaseModel):
    """Layers of a host along a stacking normal, from :func:`detect_layers`.

    Heights are ``position · normal`` (Å). Layer ``i`` spans the heights ``bottoms[i]`` to
    ``tops[i]`` of the atoms that make it up; ``heights[i]`` is their mean. Layers are listed in
    ascending height. With ``period`` set (a periodic cell, the normal a lattice-plane normal),
    heights repeat every ``period`` Å and are quoted in the frame ``[bottoms[0], bottoms[0] +
    period)``; the gap between the last layer and the first layer's image is a gallery too.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    normal: list[float]
    heights: list[float]
    bottoms: list[float]
    tops: list[float]
    period: float | None = None
    indices: list[int]
    layer_of: list[int]

    @property
    def count(self) -> int:
        return len(self.heights)

    def height(self, positions: np.ndarray) -> np.ndarray:
        """Heights (Å) of Cartesian ``positions`` along the normal, in the layers' frame."""
        h = np.asarray(positions, dtype=float) @ np.asarray(self.normal)
        if self.period is not None and self.bottoms:
            base = self.bottoms[0]
            h = base + np.mod(h - base, self.period)
        return h

    def galleries(self, margin: float = 0.0) -> list[tuple[float, float]]:
        """Open height intervals (Å) between adjacent layers, shrunk by ``margin`` on each side.

        Gallery ``i`` lies between layer ``i`` and layer ``i + 1``; with a period, the last one
        lies between the last layer and the image of the first. Intervals that the margin closes
        are kept as empty ``(lo, lo)`` entries so that gallery numbers stay those of the layers.
        """
        pairs = list(zip(self.tops[:-1], self.bottoms[1:], strict=True))
        if self.period is not None and self.tops:
            pairs.append((self.tops[-1], self.bottoms[0] + self.period))
        out = []
        for top, bottom in pairs:
            lo, hi = top + margin, bottom - margin
            out.append((lo, hi) if hi > lo else (lo, lo))
        return out

    def gallery_of(self, positions: np.ndarray, margin: float = 0.0) -> np.ndarray:
        """Gallery number of each position (see :meth:`galleries`), -1 outside every gallery."""
        h = self.height(positions)
        out = np.full(h.shape, -1, dtype=np.int64)
        for i, (lo, hi) in enumerate(self.galleries(margin)):
            out[(h > lo) & (h < hi)] = i
        return out


def _unit_sign(n: np.ndarray) -> np.ndarray:
    """``n`` normalised, with its largest-magnitude component positive (a fixed orientation)."""
    n = np.asarray(n, dtype=float)
    n = n / np.linalg.norm(n)
    k = int(np.argmax(np.abs(n) - 1e-12 * np.arange(3)))  # first of near-equal components
    return -n if n[k] < 0 else n


def _fibonacci_half_sphere(count: int) -> np.ndarray:
    """``count`` nearly uniform unit vectors with z >= 0 (a Fibonacci lattice)."""
    k = np.arange(count) + 0.5
    z = 1.0 - k / count  # uniform in (0, 1]
    phi = k * math.pi * (3.0 - math.sqrt(5.0))
    r = np.sqrt(1.0 - z * z)
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def _largest_gaps(heights: np.ndarray) -> np.ndarray:
    """Largest gap between consecutive sorted heights, for each row of ``heights`` (m, n)."""
    h = np.sort(heights, axis=-1)
    return np.diff(h, axis=-1).max(axis=-1) if h.shape[-1] > 1 else np.zeros(h.shape[:-1])


def _real_gcd(values: list[float], eps: float = 1e-3) -> float | None:
    """Largest d with every value an integer multiple of d (within ``eps`` Å), or None."""
    d = 0.0
    for v in sorted(abs(x) for x in values):
        a, b = v, d
        while b > eps:
            a, b = b, a % b
            if b < eps or a - b < eps:
                b = 0.0
        d = a
    return d if d >= _MIN_PERIOD else None


def _height_period(atoms: Atoms, normal: np.ndarray) -> float | None:
    """Period of the heights along ``normal`` set by the periodic cell vectors, if any."""
    comps = [
        float(atoms.cell[i] @ normal)
        for i in range(3)
        if atoms.pbc[i] and np.linalg.norm(atoms.cell[i]) > 0
    ]
    comps = [c for c in comps if abs(c) > 1e-3]
    return _real_gcd(comps) if comps else None


def _cluster(h: np.ndarray, tol: float, period: float | None) -> tuple[np.ndarray, np.ndarray]:
    """Split heights into layers at gaps wider than ``tol``.

    Returns the heights in the layers' frame (unwrapped after the largest gap when periodic) and
    the layer label of each, labels ascending with height.
    """
    if period is not None:
        h = np.mod(h, period)
    order = np.argsort(h, kind="stable")
    hs = h[order]
    if period is not None:
        gaps = np.diff(np.r_[hs, hs[0] + period])  # gap after each sorted height, wrap included
        # start after the widest gap; on a tie, after the last of them (the wrap gap if it ties)
        start = (int(np.flatnonzero(gaps >= gaps.max() - 1e-9)[-1]) + 1) % len(hs)
        order = np.r_[order[start:], order[:start]]
        hs = np.r_[hs[start:], hs[:start] + period]
        h = h.copy()
        h[order[len(hs) - start :]] += period if start else 0.0
    labels_sorted = np.r_[0, np.cumsum(np.diff(hs) > tol)]
    labels = np.empty(len(h), dtype=np.int64)
    labels[order] = labels_sorted
    return h, labels


def _plane_refine(points: np.ndarray, labels: np.ndarray, normal: np.ndarray) -> np.ndarray:
    """Common normal of parallel planar layers: the smallest singular vector of the atom positions
    each taken relative to its own layer's mean. Keeps ``normal`` when the layers do not span
    a plane (fewer than three non-collinear atoms per layer in total)."""
    centred = points.copy()
    for lab in np.unique(labels):
        sel = labels == lab
        centred[sel] -= centred[sel].mean(axis=0)
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    if len(s) < 3 or s[1] <= 1e-6 or s[1] < 1e-3 * s[0]:
        return normal
    n = vt[-1]
    return n if n @ normal >= 0 else -n


def _spherical(theta: float, phi: float) -> np.ndarray:
    return np.array(
        [math.sin(theta) * math.cos(phi), math.sin(theta) * math.sin(phi), math.cos(theta)]
    )


#: normals found for point sets seen before (key: sha1 of the points' bytes). The host of a
#: campaign is the same at every step, so an analysis of N steps searches once, not N times.
_NORMALS: dict[bytes, np.ndarray] = {}


def _search_normal(points: np.ndarray) -> np.ndarray:
    """:func:`_search_normal_uncached`, remembered for point sets seen before (a pure function
    of the points: the same bytes give the same normal)."""
    pts = np.ascontiguousarray(points, dtype=float)
    key = hashlib.sha1(pts.tobytes() + str(pts.shape).encode()).digest()
    hit = _NORMALS.get(key)
    if hit is None:
        if len(_NORMALS) > 64:
            _NORMALS.clear()
        hit = _NORMALS[key] = _search_normal_uncached(pts)
    return hit.copy()


def _search_normal_uncached(points: np.ndarray) -> np.ndarray:
    """Direction along which the heights of ``points`` show the widest empty gap.

    Layered atoms leave the interlayer spacing empty along the stacking normal and much smaller
    gaps along any in-plane direction. A coarse search over the half sphere (plus the principal
    axes of the positions) is followed by a pattern search on the sphere around the best few.
    """
    centred = points - points.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    dirs = np.vstack([vt, _fibonacci_half_sphere(_N_COARSE)])
    sample = centred if len(centred) <= 4000 else centred[:: len(centred) // 4000 + 1]
    score = _largest_gaps(dirs @ sample.T)
    best = np.argsort(-score, kind="stable")[:3]

    def gap(n: np.ndarray) -> float:
        return float(_largest_gaps((centred @ n)[None, :])[0])

    found = []
    for b in best:
        n = dirs[b] / np.linalg.norm(dirs[b])
        theta, phi = math.acos(max(-1.0, min(1.0, n[2]))), math.atan2(n[1], n[0])
        value = gap(n)
        step = math.radians(2.0)
        while step > math.radians(0.01):
            moved = False
            for dt, dp in ((1, 0), (-1, 0), (0, 1), (0, -1), (1, 1), (1, -1), (-1, 1), (-1, -1)):
                t2 = theta + dt * step
                p2 = phi + dp * step / max(math.sin(theta), 0.05)
                v = gap(_spherical(t2, p2))
                if v > value + 1e-12:
                    theta, phi, value, moved = t2, p2, v, True
                    break
            if not moved:
                step *= 0.5
        found.append((value, _spherical(theta, phi)))
    found.sort(key=lambda t: -t[0])
    return found[0][1]


def detect_layers(atoms: Atoms, indices: Sequence[int] | None = None, tol: float = 0.8) -> Layers:
    """Find the stacking normal of a layered host and the layers along it.

    ``indices`` selects the atoms that make up the layers (default: every atom heavier than
    hydrogen, or all atoms when there are only hydrogens). ``tol`` (Å) is the height gap that
    separates two layers: sorted heights along the normal split wherever consecutive ones
    differ by more than ``tol``.

    The normal: with at least two periodic cell axes, the layers are taken parallel to a cell
    face and the normal is the face normal (``a×b``, ``b×c`` or ``c×a``) along which the heights
    show the widest empty gap, counted around the period. Otherwise the direction with the
    widest empty gap between heights is searched (coarse half-sphere search, then a local
    pattern search) and refined as the common normal of the layers found along it (smallest
    singular vector of the positions relative to their own layer's mean, exact for flat
    parallel layers). The normal is a unit vector whose largest component is positive.

    ``layer_of`` gives, for every atom of ``atoms``, the layer whose height band it lies in or
    within ``tol / 2`` of, else -1 (e.g. guests in a gallery).

    Raises:
        StructureError: with fewer than three selected atoms in a non-periodic host, or a
            selection index out of range.
    """
    n_atoms = len(atoms)
    if indices is None:
        heavy = np.flatnonzero(atoms.numbers > 1)
        idx = heavy if heavy.size else np.arange(n_atoms)
    else:
        idx = np.asarray([int(i) for i in indices], dtype=np.int64)
        bad = idx[(idx < -n_atoms) | (idx >= n_atoms)]
        if bad.size:
            raise StructureError(
                f"layer detection: atom indices {bad[:5].tolist()} are out of range for "
                f"{n_atoms} atoms"
            )
        idx = np.unique(np.mod(idx, max(n_atoms, 1)))
    if not (math.isfinite(tol) and tol > 0):
        raise StructureError(f"layer detection: tol must be a positive distance in Å, got {tol}")
    points = np.asarray(atoms.positions, dtype=float)[idx]
    periodic = [i for i in range(3) if atoms.pbc[i] and np.linalg.norm(atoms.cell[i]) > 0]

    if len(periodic) >= 2 and abs(atoms.cell.volume) > 1e-9 and len(points) >= 1:
        best = None
        for a, b in ((0, 1), (1, 2), (2, 0)):
            n = _unit_sign(np.cross(atoms.cell[a], atoms.cell[b]))
            period = _height_period(atoms, n)
            h, _ = _cluster(points @ n, tol, period)
            hs = np.sort(h)
            gaps = np.diff(hs)
            if period is not None:
                gaps = np.r_[gaps, hs[0] + period - hs[-1]]
            score = float(gaps.max()) if gaps.size else 0.0
            if best is None or score > best[0] + 1e-9:
                best = (score, n, period)
        assert best is not None
        _, normal, period = best
    else:
        if len(points) < 3:
            raise StructureError(
                f"layer detection needs at least three atoms to fit a stacking normal, got "
                f"{len(points)}"
            )
        period = None
        normal = _search_normal(points)
        for _ in range(3):
            _, labels = _cluster(points @ normal, tol, None)
            refined = _plane_refine(points, labels, normal)
            if np.allclose(refined, normal, atol=1e-12):
                break
            normal = refined
        normal = _unit_sign(normal)

    h, labels = _cluster(points @ normal, tol, period)
    n_layers = int(labels.max()) + 1 if labels.size else 0
    heights = [float(h[labels == i].mean()) for i in range(n_layers)]
    bottoms = [float(h[labels == i].min()) for i in range(n_layers)]
    tops = [float(h[labels == i].max()) for i in range(n_layers)]
    layers = Layers(
        normal=[float(x) + 0.0 for x in normal],
        heights=heights,
        bottoms=bottoms,
        tops=tops,
        period=period,
        indices=idx.tolist(),
        layer_of=[-1] * n_atoms,
    )
    # every atom: the layer whose band holds it (or lies within tol/2 of it)
    ha = layers.height(np.asarray(atoms.positions, dtype=float))
    lo, hi = np.asarray(bottoms), np.asarray(tops)
    dist = np.maximum(np.maximum(lo[None, :] - ha[:, None], ha[:, None] - hi[None, :]), 0.0)
    if period is not None:  # the band of the first layer also sits one period up, and so on
        up = np.maximum(np.maximum(lo + period - ha[:, None], ha[:, None] - hi - period), 0.0)
        down = np.maximum(np.maximum(lo - period - ha[:, None], ha[:, None] - hi + period), 0.0)
        dist = np.minimum(dist, np.minimum(up, down))
    near = dist.argmin(axis=1) if n_layers else np.zeros(n_atoms, dtype=np.int64)
    ok = dist[np.arange(n_atoms), near] <= tol / 2 if n_layers else np.zeros(n_atoms, bool)
    layer_of = np.where(ok, near, -1)
    layer_of[idx] = labels
    return layers.model_copy(update={"layer_of": layer_of.tolist()})
