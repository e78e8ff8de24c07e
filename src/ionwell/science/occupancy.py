"""Where the guests sit in a finite particle, how close they are, and how much charge moved.

Pure functions over ASE :class:`~ase.Atoms` and plain arrays (no file I/O). Units: lengths Å,
charges e (atomic charges positive when electron-poor).

Rim and interior (:func:`rim_split`). Everything is projected onto the plane perpendicular to
the stacking normal (fitted to the host with :func:`ionwell.science.host.detect_layers`; for a single
layer or a cluster that the layer search cannot split, the smallest principal axis of the host
positions). The host's two-dimensional convex hull in that plane is its outline; the *depth* of
an atom is its in-plane distance to the hull boundary, positive inside, negative outside. Atoms
with a depth of at most ``rim_width`` are *rim* (guests outside the outline included), the others
*interior*. The split has no meaning for a host that is periodic in the layer plane (a periodic
sheet has no outline): :func:`rim_split` then returns None and :func:`rim_split_reason` says why.

A periodic cell with vacuum around a finite host (a flake in a box, as plane-wave codes need) is
not periodic in plane: along a periodic cell vector the host counts as finite when its atoms
leave an empty slab at least :data:`VACUUM_GAP` wide across that vector. The structure is then
unwrapped along that vector (every atom to its image nearest the host's middle) before the
projection.

Guest spacing (:func:`nearest_guest_distances`, :func:`guest_spacing`): distance of each guest to
its nearest other guest, minimum image along periodic axes.

Charge transfer (:func:`charge_transfer`): from atomic charges of a step and of the pristine host
(step 0), the guests' charges and the electrons the host gained, ``-Σ_host (q - q0)``, in total
and split over rim and interior host atoms.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence

import numpy as np
from ase import Atoms
from ase.geometry import get_distances
from pydantic import BaseModel, ConfigDict
from scipy.spatial import ConvexHull, QhullError

from ionwell.errors import IonwellError, StructureError
from ionwell.science.host import detect_layers

__all__ = [
    "DEFAULT_RIM_WIDTH",
    "VACUUM_GAP",
    "ChargeTransfer",
    "GuestSpacing",
    "RimSplit",
    "charge_transfer",
    "guest_spacing",
    "nearest_guest_distances",
    "rim_split",
    "rim_split_reason",
]

log = logging.getLogger("ionwell.science.occupancy")

#: Å. Default rim width: the same 3 Å as ``checks.rim_distance``. In a hydrogen-terminated
#: graphene flake it takes in the hydrogens (on the outline), the edge carbons and the outermost
#: ring of hexagons (centres about 2.2–2.9 Å inside the outline of a coronene bilayer), and leaves
#: out the hexagons one ring further in.
DEFAULT_RIM_WIDTH = 3.0

#: Å. A host whose atoms leave an empty slab at least this wide across a periodic cell vector is
#: finite along it (vacuum padding). Wider than any covalent bond (≤ ~2 Å) and than a graphite
#: gallery (3.35 Å), narrower than the vacuum put around a molecule in a box (typically ≥ 10 Å).
VACUUM_GAP = 5.0

#: Å. A periodic cell vector along which the host is continuous counts as lying (partly) in the
#: layer plane when its component perpendicular to the normal is longer than this.
_IN_PLANE_TOL = 0.1

_AXES = "abc"


# ---------------------------------------------------------------------------------------------
# models


class RimSplit(BaseModel):
    """Host atoms and guests split into rim and interior of a finite particle.

    ``normal`` is the unit stacking normal used for the projection (largest component
    positive). ``guest_depth`` holds, for each guest in the order given, its in-plane distance
    (Å) to the host's outline: positive inside, negative outside.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    normal: list[float]
    rim_width: float  # Å
    host_rim: list[int]
    host_interior: list[int]
    guest_rim: list[int]
    guest_interior: list[int]
    guest_depth: list[float]  # Å, per guest in the order given

    @property
    def guests_rim(self) -> int:
        return len(self.guest_rim)

    @property
    def guests_interior(self) -> int:
        return len(self.guest_interior)


class GuestSpacing(BaseModel):
    """Nearest-neighbour distances (Å) between guests, and their minimum and mean."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    guest_indices: list[int]
    nearest: list[float]  # Å, per guest in the order given; empty with fewer than two guests
    min: float | None  # Å, None with fewer than two guests
    mean: float | None  # Å, None with fewer than two guests


class ChargeTransfer(BaseModel):
    """Charge moved between guests and host, from atomic charges (e; positive = electron-poor).

    ``host_electrons_gained`` is ``-Σ_host (q - q0)`` with ``q0`` the pristine host's charges:
    positive when the host took up electrons. The rim and interior parts (None without a rim
    split) add up to it.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    scheme: str | None = None  # the charge scheme's name, e.g. "mulliken"
    guest_charges: list[float]  # e, per guest in the order given
    total_guest_charge: float  # e
    mean_guest_charge: float | None  # e, None without guests
    host_electrons_gained: float  # e
    host_rim_electrons_gained: float | None = None  # e
    host_interior_electrons_gained: float | None = None  # e

    @property
    def guests(self) -> int:
        return len(self.guest_charges)


# ---------------------------------------------------------------------------------------------
# helpers


def _indices(what: str, indices: Sequence[int], n_atoms: int) -> list[int]:
    """Indices as ints, each in ``0 .. n_atoms - 1``, no repeats (order kept)."""
    out = [int(i) for i in indices]
    bad = [i for i in out if not 0 <= i < n_atoms]
    if bad:
        raise StructureError(
            f"{what}: indices {bad[:5]} are out of range; expected 0..{n_atoms - 1} "
            f"({n_atoms} atoms)"
        )
    if len(set(out)) != len(out):
        dup = sorted({i for i in out if out.count(i) > 1})
        raise StructureError(f"{what}: indices {dup[:5]} are listed more than once")
    return out


def _unit(normal: Sequence[float]) -> np.ndarray:
    """``normal`` as a unit vector with its largest-magnitude component positive."""
    n = np.asarray(normal, dtype=float).reshape(-1)
    if n.shape != (3,) or not np.isfinite(n).all() or np.linalg.norm(n) < 1e-12:
        raise StructureError(f"rim split: normal must be a non-zero 3-vector, got {normal!r}")
    n = n / np.linalg.norm(n)
    k = int(np.argmax(np.abs(n) - 1e-12 * np.arange(3)))
    return -n if n[k] < 0 else n


def _plane_basis(normal: np.ndarray) -> np.ndarray:
    """Two orthonormal vectors spanning the plane perpendicular to ``normal``, shape (2, 3)."""
    trial = np.eye(3)[int(np.argmin(np.abs(normal)))]
    u = np.cross(normal, trial)
    u /= np.linalg.norm(u)
    return np.vstack([u, np.cross(normal, u)])


def _unwrap_vacuum(atoms: Atoms, host: list[int]) -> tuple[np.ndarray, list[int]]:
    """Positions unwrapped along the periodic cell vectors across which the host has vacuum.

    Returns the positions (Å) and the periodic axes along which the host is continuous (no
    empty slab of at least :data:`VACUUM_GAP` across them).
    """
    pos = np.asarray(atoms.positions, dtype=float).copy()
    axes = [i for i in range(3) if atoms.pbc[i] and np.linalg.norm(atoms.cell[i]) > 1e-9]
    if not axes or not host:
        return pos, axes
    cell = np.asarray(atoms.cell.complete(), dtype=float)
    recip = np.linalg.inv(cell).T  # rows: reciprocal vectors without 2π
    continuous = []
    for i in axes:
        s = pos @ recip[i]  # fractional coordinate along cell vector i
        plane_spacing = 1.0 / np.linalg.norm(recip[i])  # Å between lattice planes
        hs = np.sort(np.mod(s[host], 1.0))
        gaps = np.diff(np.r_[hs, hs[0] + 1.0])
        k = int(np.argmax(gaps))
        if gaps[k] * plane_spacing < VACUUM_GAP:
            continuous.append(i)
            continue
        middle = hs[k] + 0.5 * gaps[k] + 0.5  # opposite the middle of the empty slab
        shift = middle + np.mod(s - middle + 0.5, 1.0) - 0.5 - s
        pos += shift[:, None] * cell[i][None, :]
    return pos, continuous


def _frame(
    atoms: Atoms, host: list[int], normal: Sequence[float] | None
) -> tuple[np.ndarray, np.ndarray] | str:
    """Unit normal and unwrapped positions (Å), or the reason the particle has no outline."""
    if not host:
        return "no host atoms"
    pos, continuous = _unwrap_vacuum(atoms, host)
    if normal is not None:
        n = _unit(normal)
    else:
        work = Atoms(numbers=atoms.numbers, positions=pos, cell=atoms.cell)
        work.pbc = [i in continuous for i in range(3)]
        if len(host) < 3 and len(continuous) < 2:
            return f"{len(host)} host atoms: at least three are needed to fit a stacking normal"
        layers = detect_layers(work, host)
        n = np.asarray(layers.normal, dtype=float)
        if layers.count <= 1 and layers.period is None:
            # one layer (a sheet or a molecule): the normal of its best-fit plane
            centred = pos[host] - pos[host].mean(axis=0)
            n = _unit(np.linalg.svd(centred, full_matrices=False)[2][-1])
    for i in continuous:
        v = np.asarray(atoms.cell[i], dtype=float)
        if np.linalg.norm(v - (v @ n) * n) > _IN_PLANE_TOL:
            return (
                f"the host is periodic in the layer plane (continuous along cell vector "
                f"{_AXES[i]} with pbc on): a periodic sheet has no rim"
            )
    return n, pos


def _depths(points: np.ndarray, hull_points: np.ndarray) -> np.ndarray | str:
    """In-plane distance (Å) of 2-D ``points`` to the convex hull of ``hull_points``.

    Positive inside, negative outside, zero on the boundary. A reason string when the hull is
    degenerate (fewer than three non-collinear points).
    """
    try:
        hull = ConvexHull(hull_points)
    except (QhullError, ValueError):
        return "the host projects onto a line or a point: it has no two-dimensional outline"
    verts = hull_points[hull.vertices]  # counter-clockwise in 2-D
    a, b = verts, np.roll(verts, -1, axis=0)
    ab = b - a
    ap = points[:, None, :] - a[None, :, :]  # (m, k, 2)
    t = np.clip((ap * ab).sum(-1) / (ab * ab).sum(-1), 0.0, 1.0)
    closest = a[None, :, :] + t[..., None] * ab[None, :, :]
    dist = np.linalg.norm(points[:, None, :] - closest, axis=-1).min(axis=1)
    scale = max(1.0, float(np.abs(hull_points).max()))
    inside = (points @ hull.equations[:, :2].T + hull.equations[:, 2]).max(axis=1) <= 1e-9 * scale
    return np.where(inside, dist, -dist)


def _split(
    atoms: Atoms,
    host_indices: Sequence[int],
    guest_indices: Sequence[int],
    rim_width: float,
    normal: Sequence[float] | None,
) -> RimSplit | str:
    n_atoms = len(atoms)
    host = _indices("rim split: host", host_indices, n_atoms)
    guests = _indices("rim split: guest", guest_indices, n_atoms)
    both = sorted(set(host) & set(guests))
    if both:
        raise StructureError(f"rim split: atoms {both[:5]} are listed as both host and guest")
    if not (math.isfinite(rim_width) and rim_width >= 0):
        raise StructureError(f"rim split: rim_width must be a distance ≥ 0 Å, got {rim_width}")
    frame = _frame(atoms, host, normal)
    if isinstance(frame, str):
        return frame
    n, pos = frame
    plane = _plane_basis(n)
    xy = pos @ plane.T
    host_depth = _depths(xy[host], xy[host])
    if isinstance(host_depth, str):
        return host_depth
    guest_depth = _depths(xy[guests], xy[host]) if guests else np.zeros(0)
    assert not isinstance(guest_depth, str)
    host_rim = host_depth <= rim_width
    guest_rim = guest_depth <= rim_width
    return RimSplit(
        normal=[float(x) + 0.0 for x in n],
        rim_width=float(rim_width),
        host_rim=[k for k, r in zip(host, host_rim, strict=True) if r],
        host_interior=[k for k, r in zip(host, host_rim, strict=True) if not r],
        guest_rim=[k for k, r in zip(guests, guest_rim, strict=True) if r],
        guest_interior=[k for k, r in zip(guests, guest_rim, strict=True) if not r],
        guest_depth=[float(d) for d in guest_depth],
    )


# ---------------------------------------------------------------------------------------------
# rim / interior


def rim_split(
    atoms: Atoms,
    host_indices: Sequence[int],
    guest_indices: Sequence[int],
    rim_width: float = DEFAULT_RIM_WIDTH,
    normal: Sequence[float] | None = None,
) -> RimSplit | None:
    """Split host atoms and guests of a finite particle into rim and interior.

    ``rim_width`` (Å): an atom at most this far inside the host's outline (its 2-D convex hull
    in the plane perpendicular to the stacking normal), or outside it, is rim. ``normal``: the
    stacking normal (any length, any sign); default fitted to the host (see the module
    docstring). Returns None when the split has no meaning (host periodic in the layer plane,
    no host atoms, or a host without a 2-D outline); :func:`rim_split_reason` gives the reason.

    Raises:
        StructureError: indices out of range or repeated, an atom listed as both host and
            guest, a negative ``rim_width`` or a zero ``normal``.
    """
    out = _split(atoms, host_indices, guest_indices, rim_width, normal)
    if isinstance(out, str):
        log.debug("no rim split: %s", out)
        return None
    return out


def rim_split_reason(
    atoms: Atoms,
    host_indices: Sequence[int],
    guest_indices: Sequence[int] = (),
    normal: Sequence[float] | None = None,
) -> str | None:
    """Why :func:`rim_split` returns None for this structure (None when it does not)."""
    out = _split(atoms, host_indices, guest_indices, DEFAULT_RIM_WIDTH, normal)
    return out if isinstance(out, str) else None


# ---------------------------------------------------------------------------------------------
# guest spacing


def nearest_guest_distances(atoms: Atoms, guest_indices: Sequence[int]) -> list[float]:
    """For each guest (in the order given), the distance (Å) to its nearest other guest.

    Minimum image along the periodic axes of ``atoms``. Empty with fewer than two guests.

    Raises:
        StructureError: indices out of range or repeated.
    """
    guests = _indices("guest spacing: guest", guest_indices, len(atoms))
    if len(guests) < 2:
        return []
    pos = np.asarray(atoms.positions, dtype=float)[guests]
    periodic = bool(atoms.pbc.any())
    _, dist = get_distances(
        pos,
        cell=atoms.cell if periodic else None,
        pbc=atoms.pbc if periodic else None,
    )
    np.fill_diagonal(dist, np.inf)
    return [float(d) for d in dist.min(axis=1)]


def guest_spacing(atoms: Atoms, guest_indices: Sequence[int]) -> GuestSpacing:
    """Nearest-guest distances (Å, see :func:`nearest_guest_distances`) with min and mean."""
    nearest = nearest_guest_distances(atoms, guest_indices)
    return GuestSpacing(
        guest_indices=[int(g) for g in guest_indices],
        nearest=nearest,
        min=min(nearest) if nearest else None,
        mean=float(np.mean(nearest)) if nearest else None,
    )


# ---------------------------------------------------------------------------------------------
# charge transfer


def _charge_array(what: str, values: Sequence[float], expected: str) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as err:
        raise IonwellError(f"charge transfer: {what} must be numbers (e), {expected}") from err
    if arr.ndim != 1:
        raise IonwellError(f"charge transfer: {what} must be a flat list of charges, {expected}")
    if not np.isfinite(arr).all():
        raise IonwellError(f"charge transfer: {what} hold a non-finite value")
    return arr


def charge_transfer(
    charges: Sequence[float],
    pristine_charges: Sequence[float],
    host_indices: Sequence[int],
    guest_indices: Sequence[int],
    host_rim: Sequence[int] | None = None,
    scheme: str | None = None,
) -> ChargeTransfer:
    """Guest charges and electrons gained by the host, from atomic charges (e).

    ``charges``: one per atom of the structure (indexed like the atoms, positive =
    electron-poor). ``pristine_charges``: the pristine host's charges (step 0), one per host
    atom, ``pristine_charges[k]`` belonging to atom ``host_indices[k]``. ``host_rim``: host atoms
    at the rim (e.g. :attr:`RimSplit.host_rim`); the other host atoms are interior. ``scheme``
    is passed through (e.g. "mulliken").

    Raises:
        IonwellError: a list of the wrong length, an index out of range or repeated, a rim atom
            that is not a host atom, or a non-finite charge; the message names what was
            expected.
    """
    host = [int(i) for i in host_indices]
    guests = [int(i) for i in guest_indices]
    listed = host + guests
    n_needed = max(listed) + 1 if listed else 0
    q = _charge_array("charges", charges, f"one per atom (at least {n_needed})")
    q0 = _charge_array(
        "pristine_charges", pristine_charges, f"one per host atom ({len(host)} expected)"
    )
    if len(q) < n_needed:
        raise IonwellError(
            f"charge transfer: expected one charge per atom, at least {n_needed} (the largest "
            f"host or guest index is {n_needed - 1}), got {len(q)}"
        )
    if len(q0) != len(host):
        raise IonwellError(
            f"charge transfer: expected {len(host)} pristine charges (one per host atom, in the "
            f"order of host_indices), got {len(q0)}"
        )
    bad = [i for i in listed if i < 0]
    if bad:
        raise IonwellError(f"charge transfer: negative atom indices {bad[:5]}")
    if len(set(listed)) != len(listed):
        raise IonwellError(
            "charge transfer: an atom is listed twice among host_indices and guest_indices; "
            "expected distinct host and guest atoms"
        )
    delta = q[host] - q0  # e, per host atom
    gained = -float(delta.sum())
    rim_gain = interior_gain = None
    if host_rim is not None:
        rim = {int(i) for i in host_rim}
        stray = sorted(rim - set(host))
        if stray:
            raise IonwellError(
                f"charge transfer: host_rim atoms {stray[:5]} are not host atoms; expected a "
                "subset of host_indices"
            )
        at_rim = np.array([i in rim for i in host], dtype=bool)
        rim_gain = -float(delta[at_rim].sum())
        interior_gain = -float(delta[~at_rim].sum())
    gq = [float(x) for x in q[guests]]
    return ChargeTransfer(
        scheme=scheme,
        guest_charges=gq,
        total_guest_charge=float(sum(gq)),
        mean_guest_charge=float(np.mean(gq)) if gq else None,
        host_electrons_gained=gained,
        host_rim_electrons_gained=rim_gain,
        host_interior_electrons_gained=interior_gain,
    )
