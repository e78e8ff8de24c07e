"""Staging and stacking analysis of layered hosts with guests (pure functions, no file I/O).

Layers and the stacking normal come from :func:`ionwell.science.host.detect_layers`; this module adds,
per gallery (the space between two adjacent layers):

* the interlayer spacing (Å): difference of the mean layer heights along the normal;
* the guests it holds: a guest belongs to the gallery whose open height interval (top of the
  lower layer to bottom of the upper layer) contains its height; guests outside every gallery
  (inside a layer band, above or below a finite stack) are counted separately;
* the stacking registry of the two layers ("AA", "AB", "other" or "undetermined").

In a cell periodic along the normal the gallery between the top layer and the periodic image of
the bottom layer counts too (minimum image along the normal, as in :class:`ionwell.science.host.Layers`).

Stage
-----
Stage (common practice): the period, in galleries, of the filled galleries along the stacking
axis. Stage 1 when every gallery holds guests; stage ``n`` when filled galleries are every
``n``-th with ``n - 1`` empty ones between. A period needs a repeat to be seen, so in a finite
(non-periodic) stack

* stage 1 needs at least two galleries, all filled;
* stage ``n >= 2`` needs at least two filled galleries, ``n`` galleries apart.

``stage`` is None (and ``staging`` says why) when

* there are no guests, or none inside a gallery (``staging = "empty"``);
* a finite stack has a single gallery (a bilayer, however filled), or exactly one filled
  gallery among several: one filled gallery does not fix a period (``staging =
  "undetermined"``, e.g. a three-layer flake with a guest only in the lower gallery);
* the filled galleries are not equally spaced, or in a finite stack a run of empty galleries at
  an end is longer than ``n - 1`` (``staging = "irregular"``).

In a periodic stack the sequence of galleries is cyclic and every filled gallery repeats with
the cell: one filled gallery out of ``G`` per period is stage ``G`` (a cell with one gallery,
filled, is stage 1, as in bulk LiC6).

Stacking registry
-----------------
The registry of a gallery compares its two layers' heavy (non-hydrogen) atoms, in-plane (the
positions projected on the layer plane; in a cell periodic in plane, minimum image over the
in-plane lattice vectors). Lengths are measured in units of the in-layer bond ``b``: the median
in-plane nearest-neighbour distance of the heavy atoms within each of the two layers (1.42 Å
for the C–C bond of graphene; from the structure itself, so strained or other-sized honeycomb
sheets are measured against their own bond).

1. Usable atoms. An atom of one layer is usable when it lies over the other layer's in-plane
   footprint: at least :data:`FOOTPRINT_MARGIN` bonds inside the convex hull of the other
   layer's heavy atoms. Atoms of both layers are used (lower atoms over the upper footprint and
   upper atoms over the lower one), so the result is symmetric in the two layers. At the edge
   of a finite flake an atom's partner may simply be missing from the other sheet; the margin
   keeps such atoms out, and keeps out atoms that a small distortion could move across the
   edge. In a cell periodic along both in-plane directions every atom is usable (no edge);
   along one (a ribbon), the footprint is the hull of the other layer and its images along that
   direction.
2. Each usable atom's in-plane distance ``d`` to the nearest heavy atom of the other layer:
   ``d <= ON_TOP_MAX·b`` is "on top" of an atom; ``|d - b| <= CENTRE_TOLERANCE·b`` is "over a
   hexagon centre" (in a honeycomb sheet the centre lies one bond from its six atoms).
   ``matched_fraction`` and ``centred_fraction`` are the fractions of usable atoms in each.
3. Registry (:func:`stacking_registry`):

   * "undetermined" when fewer than :data:`MIN_REGISTRY_ATOMS` atoms are usable (finite sheets
     too small to tell, e.g. a benzene dimer: every atom is an edge atom). A cell periodic in
     plane has no such minimum: its sheets are infinite and each atom stands for all its images;
   * "AA" (eclipsed) when at least :data:`AA_MIN_FRACTION` of the usable atoms are on top;
   * "AB" (Bernal, common practice / textbook: half of the atoms over atoms, the rest over
     hexagon centres; the layers shifted by one bond along a bond direction) when the on-top
     fraction lies in :data:`AB_ON_TOP_BAND` and at least :data:`AB_MIN_REGISTERED` of the
     usable atoms are on top or over a centre;
   * "other" otherwise (slipped, twisted or incommensurate layers).

   The registry is a property of an adjacent pair: in an ABA and in an ABC stack every pair is
   "AB". ``registry`` is None when one of the two layers has no heavy atoms.

Why this works where a matched-fraction band alone does not: in a finite AB flake the edge atoms
of one sheet have no partner in the other, which drags the on-top fraction of all atoms away
from 1/2; restricting to atoms over the other sheet's footprint and asking that the rest sit
over hexagon centres (not merely "unmatched") separates AB from slipped stacks, whose atoms sit
between the two positions (a slip of half a bond across a bond puts them 0.5 b and 0.62 b from
the nearest atom). The thresholds leave room for relative in-plane displacements of about
0.3 Å (0.1 Å random moves of each atom in each direction, a 1° twist of a coronene-size sheet).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from typing import Literal

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict
from scipy.spatial import ConvexHull, QhullError, cKDTree

from ionwell.errors import StructureError
from ionwell.science.host import Layers, detect_layers

__all__ = [
    "AA_MIN_FRACTION",
    "AB_MIN_REGISTERED",
    "AB_ON_TOP_BAND",
    "CENTRE_TOLERANCE",
    "FOOTPRINT_MARGIN",
    "MIN_REGISTRY_ATOMS",
    "ON_TOP_MAX",
    "Gallery",
    "LayerReport",
    "layer_report",
    "stacking_registry",
    "stage_of",
]

#: Fewest usable atoms (both layers together) for a registry of finite sheets; fewer:
#: "undetermined". A coronene bilayer has 24 (AA) or 26 (AB), a benzene dimer 0 (AA) or 2 (AB).
MIN_REGISTRY_ATOMS = 12
#: Bonds: how far inside the other layer's in-plane convex hull an atom must lie to be usable.
#: Sites of an ideal honeycomb flake lie 0, 0.5, 0.87, 1, 1.5, ... bonds inside the hull of a
#: sheet in registry with it: a quarter bond drops the atoms on the hull's edge, whatever a
#: displacement of up to ~0.25 Å does to them, and keeps the next ones.
FOOTPRINT_MARGIN = 0.25
#: Bonds: an atom with an atom of the other layer within this in-plane distance sits "on top".
ON_TOP_MAX = 0.3
#: Bonds: an atom whose nearest atom of the other layer lies within this of one bond sits "over a
#: hexagon centre".
CENTRE_TOLERANCE = 0.25
#: On-top fraction (of usable atoms) at or above which two layers are "AA" (ideally 1).
AA_MIN_FRACTION = 0.9
#: On-top fractions counted as "AB" (ideally 1/2; a finite footprint may hold a few more atoms of
#: one sublattice than of the other).
AB_ON_TOP_BAND = (0.3, 0.7)
#: Fraction of usable atoms on top or over a hexagon centre needed for "AB" (ideally 1).
AB_MIN_REGISTERED = 0.9

Registry = Literal["AA", "AB", "other", "undetermined"]
Staging = Literal["regular", "empty", "undetermined", "irregular"]


class Gallery(BaseModel):
    """The space between layer ``lower`` and layer ``upper`` (heights in Å along the normal).

    In a periodic stack the last gallery lies between the top layer and the image of layer 0
    one period up (``upper == 0``, ``periodic_image`` True). Registry fields: see the module
    docstring.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    index: int
    lower: int
    upper: int
    periodic_image: bool = False
    spacing: float  # Å, mean height of the upper layer minus that of the lower
    bottom: float  # Å, top of the lower layer's band
    top: float  # Å, bottom of the upper layer's band
    guest_indices: list[int]
    registry: Registry | None  # None when a layer has no heavy atoms to match
    matched_fraction: float | None  # usable atoms on top of an atom (None: no usable atom)
    centred_fraction: float | None = None  # usable atoms over a hexagon centre
    registry_atoms: int = 0  # usable atoms (both layers) the registry is based on

    @property
    def guests(self) -> int:
        return len(self.guest_indices)


class LayerReport(BaseModel):
    """Layers, galleries, guests per gallery, stage and stacking of a layered host."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    normal: list[float]  # unit vector, largest component positive
    heights: list[float]  # Å, mean layer heights along the normal, ascending
    period: float | None  # Å, repeat along the normal in a periodic cell, else None
    galleries: list[Gallery]
    outside_guest_indices: list[int]  # guests in no gallery
    filled: list[int]  # indices of galleries holding at least one guest
    stage: int | None
    staging: Staging

    @property
    def layer_count(self) -> int:
        return len(self.heights)

    @property
    def spacings(self) -> list[float]:
        return [g.spacing for g in self.galleries]

    @property
    def guest_counts(self) -> list[int]:
        return [g.guests for g in self.galleries]

    @property
    def registries(self) -> list[Registry | None]:
        return [g.registry for g in self.galleries]

    @property
    def guests_outside(self) -> int:
        return len(self.outside_guest_indices)


# ---------------------------------------------------------------------------------------------
# stage


def stage_of(filled: Sequence[bool], periodic: bool) -> tuple[int | None, Staging]:
    """Stage number from the filled/empty pattern of galleries in stacking order.

    ``periodic``: the sequence is cyclic (the last gallery is followed by the first). Returns
    ``(stage, staging)``. Rules (see the module docstring): no filled gallery is "empty"; in a
    finite stack a single gallery (a bilayer) or a single filled gallery among several is
    "undetermined", all of at least two galleries filled is stage 1, filled galleries every
    ``n``-th (at least two of them, end runs of empty galleries no longer than ``n - 1``) is
    stage ``n``; a periodic pattern of equally spaced filled galleries ``n`` apart is stage
    ``n``; anything else is "irregular".
    """
    flags = [bool(x) for x in filled]
    n_gal = len(flags)
    full = [i for i, x in enumerate(flags) if x]
    if not full:
        return None, "empty"
    if periodic:
        if len(full) == n_gal:
            return 1, "regular"
        steps = [b - a for a, b in itertools.pairwise(full)] + [full[0] + n_gal - full[-1]]
        return (steps[0], "regular") if len(set(steps)) == 1 else (None, "irregular")
    if n_gal < 2 or len(full) < 2:
        return None, "undetermined"
    if len(full) == n_gal:
        return 1, "regular"
    steps = [b - a for a, b in itertools.pairwise(full)]
    n = steps[0]
    if len(set(steps)) != 1 or full[0] > n - 1 or (n_gal - 1 - full[-1]) > n - 1:
        return None, "irregular"
    return n, "regular"


# ---------------------------------------------------------------------------------------------
# stacking


def _in_plane_basis(normal: np.ndarray) -> np.ndarray:
    """Two orthonormal vectors spanning the plane normal to ``normal``, shape (2, 3)."""
    trial = np.eye(3)[int(np.argmin(np.abs(normal)))]
    u = np.cross(normal, trial)
    u /= np.linalg.norm(u)
    return np.vstack([u, np.cross(normal, u)])


def _in_plane_lattice(atoms: Atoms, normal: np.ndarray) -> np.ndarray:
    """Periodic cell vectors lying in the layer plane (|v · normal| < 1e-3 Å), shape (k, 3)."""
    vecs = [
        np.asarray(atoms.cell[i], dtype=float)
        for i in range(3)
        if atoms.pbc[i] and np.linalg.norm(atoms.cell[i]) > 1e-9
    ]
    return np.array([v for v in vecs if abs(v @ normal) < 1e-3]).reshape(-1, 3)


def _reduced_lattice(lat2: np.ndarray) -> np.ndarray:
    """A 2-D lattice basis (k, 2) in reduced (Lagrange–Gauss) form when k = 2, else unchanged.

    With a reduced basis the nearest image of a point lies within one lattice step of the
    point brought into the cell around zero, which :func:`_nearest_2d` relies on.
    """
    if len(lat2) != 2:
        return lat2
    u, v = lat2[0].astype(float), lat2[1].astype(float)
    if u @ u > v @ v:
        u, v = v, u
    for _ in range(64):
        v = v - round(float(u @ v) / float(u @ u)) * u
        if v @ v >= u @ u:
            break
        u, v = v, u
    return np.vstack([u, v])


def _nearest_2d(
    a2: np.ndarray, b2: np.ndarray, lat2: np.ndarray, skip_self: bool = False
) -> np.ndarray:
    """In-plane distance (Å) from each point of ``a2`` (m, 2) to its nearest point of ``b2``.

    ``lat2`` (k, 2) holds reduced in-plane lattice vectors (k = 0: no periodic images): both
    point sets are wrapped into the cell spanned by them and the nearest image is sought among
    the copies of ``b2`` up to two lattice steps away (enough for a reduced basis).
    ``skip_self``: ``a2`` is ``b2`` and a point's own (zero-distance) copy does not count; its
    periodic images do. Returns inf where there is no other point.
    """
    if len(b2) == 0 or (skip_self and len(lat2) == 0 and len(b2) < 2):
        return np.full(len(a2), np.inf)
    if len(lat2):
        pinv = np.linalg.pinv(lat2)  # (2, k): coefficients of a 2-D vector in the lattice

        def wrap(x: np.ndarray) -> np.ndarray:
            return x - np.floor(x @ pinv) @ lat2

        a2, b2 = wrap(a2), wrap(b2)
        steps = np.array(list(itertools.product(range(-2, 3), repeat=len(lat2))), dtype=float)
        b2 = (b2[None, :, :] + (steps @ lat2)[:, None, :]).reshape(-1, 2)
    if not skip_self:
        return cKDTree(b2).query(a2)[0]
    d = cKDTree(b2).query(a2, k=2)[0]
    return np.where(d[:, 0] < 1e-9, d[:, 1], d[:, 0])


def _bond_length(a2: np.ndarray, b2: np.ndarray, lat2: np.ndarray) -> float | None:
    """Median in-plane nearest-neighbour distance (Å) within each of two layers, or None."""
    nn = np.concatenate(
        [_nearest_2d(a2, a2, lat2, skip_self=True), _nearest_2d(b2, b2, lat2, skip_self=True)]
    )
    nn = nn[np.isfinite(nn) & (nn > 1e-6)]
    return float(np.median(nn)) if nn.size else None


def _footprint_depth(a2: np.ndarray, b2: np.ndarray, lat2: np.ndarray) -> np.ndarray:
    """In-plane depth (Å) of each point of ``a2`` inside the convex hull of ``b2`` (negative:
    outside; -inf when ``b2`` spans no area; +inf everywhere in a cell periodic in plane).

    With one in-plane lattice vector (a ribbon) the hull is that of ``b2`` and its images one
    and two periods either way, the points of both sets first brought to within half a period
    of the centre of ``b2`` along that vector.
    """
    if len(lat2) >= 2:
        return np.full(len(a2), np.inf)
    if len(lat2) == 1:
        lat = lat2[0]
        centre = b2.mean(axis=0)

        def wrap(x: np.ndarray) -> np.ndarray:
            return x - np.round((x - centre) @ lat / (lat @ lat))[:, None] * lat[None, :]

        a2 = wrap(a2)
        b2 = np.vstack([wrap(b2) + j * lat for j in (-2, -1, 0, 1, 2)])
    if len(b2) < 3:
        return np.full(len(a2), -np.inf)
    try:
        hull = ConvexHull(b2)
    except QhullError:  # collinear points: no area
        return np.full(len(a2), -np.inf)
    eq = hull.equations  # rows (n_x, n_y, c): unit outward normal n, inside where n·x + c <= 0
    return -(a2 @ eq[:, :2].T + eq[:, 2]).max(axis=1)


def _registry_fractions(
    a2: np.ndarray, b2: np.ndarray, lat2: np.ndarray
) -> tuple[float | None, float | None, int]:
    """On-top fraction, over-centre fraction and number of usable atoms of two layers' heavy
    atoms (in-plane coordinates in Å, reduced in-plane lattice ``lat2``); see the module
    docstring. Fractions are None when no atom is usable."""
    bond = _bond_length(a2, b2, lat2)
    if bond is None:
        return None, None, 0
    dists = []
    for x, y in ((a2, b2), (b2, a2)):
        usable = _footprint_depth(x, y, lat2) >= FOOTPRINT_MARGIN * bond
        dists.append(_nearest_2d(x[usable], y, lat2) / bond)
    d = np.concatenate(dists)
    if d.size == 0:
        return None, None, 0
    on_top = float(np.mean(d <= ON_TOP_MAX))
    centred = float(np.mean(np.abs(d - 1.0) <= CENTRE_TOLERANCE))
    return on_top, centred, int(d.size)


def stacking_registry(
    on_top: float | None, over_centre: float | None, atoms: int, infinite: bool = False
) -> Registry:
    """Registry of two layers from the fractions of usable atoms on top of an atom of the other
    layer (``on_top``) and over one of its hexagon centres (``over_centre``), and the number of
    usable ``atoms`` (module docstring, step 3).

    ``infinite``: the layers are periodic in plane (no minimum number of atoms). None fractions
    (no usable atom) give "undetermined".
    """
    if on_top is None or over_centre is None or atoms <= 0:
        return "undetermined"
    if atoms < MIN_REGISTRY_ATOMS and not infinite:
        return "undetermined"
    if on_top >= AA_MIN_FRACTION:
        return "AA"
    lo, hi = AB_ON_TOP_BAND
    if lo <= on_top <= hi and on_top + over_centre >= AB_MIN_REGISTERED:
        return "AB"
    return "other"


def _period_vector(atoms: Atoms, normal: np.ndarray, period: float) -> np.ndarray:
    """A lattice vector whose component along ``normal`` is ``period`` (Å)."""
    vecs = [np.asarray(atoms.cell[i], dtype=float) for i in range(3) if atoms.pbc[i]]
    best = None
    for coef in itertools.product(range(-3, 4), repeat=len(vecs)):
        t = np.sum([c * v for c, v in zip(coef, vecs, strict=True)], axis=0)
        if abs(float(t @ normal) - period) < 1e-3 * max(1.0, period):
            tang = float(np.linalg.norm(t - (t @ normal) * normal))
            if best is None or tang < best[0] - 1e-9:
                best = (tang, t)
    return best[1] if best is not None else period * normal


# ---------------------------------------------------------------------------------------------
# report


def _check_indices(name: str, indices: Sequence[int], n_atoms: int) -> np.ndarray:
    idx = np.asarray([int(i) for i in indices], dtype=np.int64)
    bad = idx[(idx < -n_atoms) | (idx >= n_atoms)]
    if bad.size:
        raise StructureError(
            f"layer report: {name} indices {bad[:5].tolist()} are out of range for {n_atoms} atoms"
        )
    return np.unique(np.mod(idx, max(n_atoms, 1)))


def _unwrapped_positions(atoms: Atoms, layers: Layers) -> tuple[np.ndarray, np.ndarray | None]:
    """Positions moved by lattice vectors so that their heights lie in the layers' frame.

    Returns the positions and the lattice vector one period up the normal (None if aperiodic).
    """
    pos = np.asarray(atoms.positions, dtype=float).copy()
    if layers.period is None:
        return pos, None
    normal = np.asarray(layers.normal)
    t = _period_vector(atoms, normal, layers.period)
    m = np.round((layers.height(pos) - pos @ normal) / layers.period)
    return pos + m[:, None] * t[None, :], t


def layer_report(
    atoms: Atoms,
    host_indices: Sequence[int],
    guest_indices: Sequence[int],
    tolerance: float = 0.8,
) -> LayerReport:
    """Layers, galleries, guests per gallery, stage and stacking registry of a layered host.

    ``host_indices`` are the atoms that make up the layers (hydrogens included or not: they are
    ignored for stacking); ``guest_indices`` the intercalated atoms (may be empty).
    ``tolerance`` (Å) is the height gap that separates two layers (see
    :func:`ionwell.science.host.detect_layers`). All heights and spacings are in Å along the fitted
    normal; the normal is taken from the cell faces when at least two axes are periodic, else
    fitted to the host positions. Each gallery's registry compares the heavy atoms of its two
    layers in-plane (module docstring): "AA", "AB", "other", "undetermined" (finite sheets too
    small to tell), or None when a layer has no heavy atoms. The stage follows
    :func:`stage_of` (a finite bilayer is never staged).

    Raises:
        StructureError: indices out of range, a guest listed as a host atom, or too few host
            atoms to fit a normal.
    """
    n_atoms = len(atoms)
    host = _check_indices("host", host_indices, n_atoms)
    guests = _check_indices("guest", guest_indices, n_atoms)
    both = np.intersect1d(host, guests)
    if both.size:
        raise StructureError(
            f"layer report: atoms {both[:5].tolist()} are listed as both host and guest"
        )
    layers = detect_layers(atoms, host.tolist(), tol=tolerance)
    normal = np.asarray(layers.normal)
    n_layers = layers.count
    periodic = layers.period is not None

    # guests per gallery
    gal_of = (
        layers.gallery_of(atoms.positions[guests])
        if guests.size and n_layers
        else np.full(len(guests), -1)
    )
    bounds = layers.galleries()

    # stacking: heavy host atoms of each layer, unwrapped into the layers' frame
    pos, up = _unwrapped_positions(atoms, layers)
    layer_of = np.asarray(layers.layer_of)
    heavy = host[atoms.numbers[host] > 1]
    members = [heavy[layer_of[heavy] == i] for i in range(n_layers)]
    plane = _in_plane_basis(normal)
    lat2 = _reduced_lattice(_in_plane_lattice(atoms, normal) @ plane.T)
    infinite = len(lat2) >= 2

    galleries = []
    for g, (bottom, top) in enumerate(bounds):
        lower = g
        upper = (g + 1) % n_layers
        image = g + 1 >= n_layers
        a = pos[members[lower]]
        b = pos[members[upper]]
        h_up = layers.heights[upper]
        if image:
            assert up is not None and layers.period is not None
            b = b + up[None, :]
            h_up = h_up + layers.period
        registry: Registry | None = None
        on_top, centred, n_used = None, None, 0
        if len(a) and len(b):
            on_top, centred, n_used = _registry_fractions(a @ plane.T, b @ plane.T, lat2)
            registry = stacking_registry(on_top, centred, n_used, infinite)
        galleries.append(
            Gallery(
                index=g,
                lower=lower,
                upper=upper,
                periodic_image=image,
                spacing=float(h_up - layers.heights[lower]),
                bottom=float(bottom),
                top=float(top),
                guest_indices=guests[gal_of == g].tolist(),
                registry=registry,
                matched_fraction=on_top,
                centred_fraction=centred,
                registry_atoms=n_used,
            )
        )

    filled = [g.index for g in galleries if g.guests]
    stage, staging = stage_of([g.guests > 0 for g in galleries], periodic)
    return LayerReport(
        normal=layers.normal,
        heights=layers.heights,
        period=layers.period,
        galleries=galleries,
        outside_guest_indices=guests[gal_of == -1].tolist(),
        filled=filled,
        stage=stage,
        staging=staging,
    )
