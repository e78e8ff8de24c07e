"""Staging and stacking analysis of layered hosts with guests (pure functions, no file I/O).

Layers and the stacking normal come from :func:`ionwell.host.detect_layers`; this module adds,
per gallery (the space between two adjacent layers):

* the interlayer spacing (Å): difference of the mean layer heights along the normal;
* the guests it holds: a guest belongs to the gallery whose open height interval (top of the
  lower layer to bottom of the upper layer) contains its height; guests outside every gallery
  (inside a layer band, above or below a finite stack) are counted separately;
* the stacking registry of the two layers ("AA", "AB" or "other").

In a cell periodic along the normal the gallery between the top layer and the periodic image of
the bottom layer counts too (minimum image along the normal, as in :class:`ionwell.host.Layers`).

Stage (common practice): the period, in galleries, of the filled galleries along the stacking
axis. Stage 1 when every gallery holds guests; stage ``n`` when filled galleries are every
``n``-th with ``n - 1`` empty ones between. ``stage`` is None (and ``staging`` says why) when

* there are no guests, or none inside a gallery (``staging = "empty"``);
* a finite (non-periodic) stack has exactly one filled gallery among several: the period is
  not fixed by one filled gallery (``staging = "undetermined"``, e.g. a three-layer flake with
  a guest only in the lower gallery);
* the filled galleries are not equally spaced, or in a finite stack a run of empty galleries at
  an end is longer than ``n - 1`` (``staging = "irregular"``).

In a periodic stack the sequence of galleries is cyclic: one filled gallery out of ``G`` is
stage ``G``.

Stacking registry: the heavy (non-hydrogen) host atoms of the lower layer are matched to their
nearest in-plane neighbour in the upper layer (in-plane distance; in a cell periodic in plane,
minimum image over the in-plane lattice vectors). The fraction with a partner within
:data:`MATCH_DISTANCE` decides: at least :data:`AA_MIN_FRACTION` → "AA" (eclipsed layers);
within :data:`AB_FRACTION_BAND` → "AB" (Bernal: half of the atoms over atoms, the rest over
hexagon centres, the layer shifted by one C–C bond along a bond direction); else "other".
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from typing import Literal

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict
from scipy.spatial import cKDTree

from ionwell.errors import StructureError
from ionwell.host import Layers, detect_layers

__all__ = [
    "AA_MIN_FRACTION",
    "AB_FRACTION_BAND",
    "MATCH_DISTANCE",
    "Gallery",
    "LayerReport",
    "layer_report",
    "stacking_registry",
    "stage_of",
]

#: Å: an atom with a neighbour of the next layer within this in-plane distance sits "on top".
MATCH_DISTANCE = 0.3
#: Matched fraction at or above which two layers are "AA" (ideally 1).
AA_MIN_FRACTION = 0.95
#: Matched fractions counted as "AB" (ideally 0.5; finite flakes lose a few partners at edges).
AB_FRACTION_BAND = (0.35, 0.65)

Registry = Literal["AA", "AB", "other"]
Staging = Literal["regular", "empty", "undetermined", "irregular"]


class Gallery(BaseModel):
    """The space between layer ``lower`` and layer ``upper`` (heights in Å along the normal).

    In a periodic stack the last gallery lies between the top layer and the image of layer 0
    one period up (``upper == 0``, ``periodic_image`` True).
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
    matched_fraction: float | None  # lower-layer heavy atoms with a partner within 0.3 Å

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
    ``(stage, staging)``; see the module docstring for the rules.
    """
    flags = [bool(x) for x in filled]
    n_gal = len(flags)
    full = [i for i, x in enumerate(flags) if x]
    if not full:
        return None, "empty"
    if len(full) == n_gal:
        return 1, "regular"
    if periodic:
        steps = [b - a for a, b in itertools.pairwise(full)] + [full[0] + n_gal - full[-1]]
        return (steps[0], "regular") if len(set(steps)) == 1 else (None, "irregular")
    if len(full) < 2:
        return None, "undetermined"
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


def _nearest_in_plane(
    a: np.ndarray, b: np.ndarray, plane: np.ndarray, lattice: np.ndarray
) -> np.ndarray:
    """In-plane distance (Å) from each point of ``a`` to its nearest point of ``b``.

    ``plane`` (2, 3) spans the layer plane; ``lattice`` (k, 3) holds in-plane lattice vectors
    (k = 0: no periodic images).
    """
    a2, b2 = a @ plane.T, b @ plane.T
    if len(lattice) == 0:
        return cKDTree(b2).query(a2)[0]
    lat2 = lattice @ plane.T  # (k, 2)
    pinv = np.linalg.pinv(lat2)  # (2, k): coefficients of a 2-D vector in the lattice
    shifts = np.array(list(itertools.product((-1, 0, 1), repeat=len(lat2))), dtype=float)
    out = np.empty(len(a2))
    for start in range(0, len(a2), 256):
        d = b2[None, :, :] - a2[start : start + 256, None, :]  # (m, n, 2)
        coef = d @ pinv
        d = d - np.round(coef) @ lat2  # reduced to the cell around zero
        cand = d[:, :, None, :] + (shifts @ lat2)[None, None, :, :]  # (m, n, s, 2)
        out[start : start + 256] = np.linalg.norm(cand, axis=-1).min(axis=(1, 2))
    return out


def stacking_registry(fraction: float | None) -> Registry | None:
    """ "AA", "AB" or "other" from the fraction of atoms with a partner on top (None: None)."""
    if fraction is None:
        return None
    if fraction >= AA_MIN_FRACTION:
        return "AA"
    lo, hi = AB_FRACTION_BAND
    return "AB" if lo <= fraction <= hi else "other"


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
    :func:`ionwell.host.detect_layers`). All heights and spacings are in Å along the fitted
    normal; the normal is taken from the cell faces when at least two axes are periodic, else
    fitted to the host positions.

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
    lattice = _in_plane_lattice(atoms, normal)

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
        fraction = None
        if len(a) and len(b):
            near = _nearest_in_plane(a, b, plane, lattice)
            fraction = float(np.mean(near <= MATCH_DISTANCE))
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
                registry=stacking_registry(fraction),
                matched_fraction=fraction,
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
