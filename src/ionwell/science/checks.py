"""Per-step convergence and sanity checks, reported as :class:`Finding` records.

Pure functions: they look at one step's structure and flags and return findings; they never stop
the loop themselves (the loop decides what an ``error`` means). Distances use the minimum image
convention along periodic axes. Codes are short kebab-case strings, stable across versions:

============================  ========  ========================================================
code                          severity  meaning
============================  ========  ========================================================
``scf-not-converged``         error     the engine's SCF did not reach its tolerance
``relax-not-converged``       warning   the relaxation stopped at its step cap above ``fmax``
``empty-level-below-filled``  warning   with whole occupations, an empty level lies more than
                                        ``level_order`` (eV) below a filled one: the SCF ended
                                        in an excited configuration, not the ground state
``non-finite-positions``      error     a position is NaN or infinite
``atoms-too-close``           error     two atoms closer than ``min_distance`` (Å)
``guest-on-host-atom``        error     a guest closer than ``guest_host_min`` (Å) to a host atom
``guest-outside-envelope``    warning   a guest farther than ``envelope`` (Å) from every host
                                        atom
``guests-too-close``          warning   two guests closer than ``guest_alert`` (Å)
``guests-closer-than-metal``  warning   two guests closer than ``guest_packing`` × their
                                        nearest-neighbour distance in the elemental solid
                                        (``guest_metal_distance``, default
                                        :func:`metal_neighbour_distance`)
``host-fragmented``           error     the host falls into more bonded pieces than it started
                                        with
``edge-crowding``             warning   more than ``rim_alert`` of the guests sit at the rim
``site-on-grid-face``         warning   a chosen site lies on the potential grid's face (its
                                        well may continue outside the grid)
``site-on-region-edge``       warning   a chosen site lies on the admissible region's boundary
                                        (set by the region's bounds, not by the potential)
``well-repels-cation``        warning   cation mode: a chosen well's potential is at or above
                                        ``cation_well_max`` (V)
``map-too-flat``              warning   at least ``flat_map_wells`` candidate wells lie within
                                        ``flat_map_tolerance`` (V) of the deepest
``negative-voltage``          warning   a voltage step between hull vertices is below 0 V
                                        (``analysis.voltage_floor``; another floor:
                                        ``voltage-below-floor``)
============================  ========  ========================================================

The first nine look at a step's structure (:func:`step_findings`), the next one at its
electronic levels (:func:`level_order_findings`); the next four at the
placement decision taken on the step's potential map (:func:`decision_findings`); the last at
the voltage profile of the analysis (:func:`voltage_findings`).

Bonds for the fragment count use ``ase.neighborlist.natural_cutoffs`` (covalent radii) scaled by
:data:`BOND_SCALE`. The *rim* of a particle is its edge atoms — terminating hydrogens and heavy
atoms with fewer heavy-atom neighbours than the host's most coordinated ones — and a guest is at
the rim when it is within ``rim_distance`` Å of an edge atom. The rim check runs only on hosts
that have an interior (heavy atoms farther than ``rim_distance`` from every edge atom).

A step's structure is the host (atoms ``0..n_host-1``, fixed order) followed by the guests.
What the checks need of the pristine host — its fragment count, edge atoms, whether it has an
interior, its positions — is computed once by :func:`host_facts`. :func:`step_findings` is told
which host atoms moved since then (``moved``): with an unchanged host (``moved=()``) it looks
only at pairs involving a guest (k-d tree around the guests) and takes fragments and edge atoms
from the facts; when some host atoms moved it rebuilds the host's bond graph and looks at pairs
involving a guest or a moved atom; with ``moved=None`` (unknown) it checks everything. Close
host–host pairs of the pristine host are not reported again on the incremental paths (the host
was accepted at step 0). For the same structure the findings are the same on every path.
"""

from __future__ import annotations

import functools
import hashlib
import itertools
import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Literal

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers, reference_states
from ase.geometry import find_mic, get_distances
from ase.neighborlist import neighbor_list
from pydantic import BaseModel, ConfigDict, Field, model_validator
from scipy.spatial import cKDTree

from ionwell.config.campaign import ChecksConfig
from ionwell.science.energetics import VoltageStep

if TYPE_CHECKING:  # placement does not import checks; only the type is needed here
    from ionwell.science.placement import Decision, Site

__all__ = [
    "MAX_PAIRS",
    "Finding",
    "HostFacts",
    "guest_host_findings",
    "host_digest",
    "host_facts",
    "BOND_SCALE",
    "close_pair_findings",
    "edge_atoms",
    "host_fragments",
    "rim_findings",
    "convergence_findings",
    "level_order_findings",
    "level_order_gap",
    "decision_findings",
    "envelope_findings",
    "guest_packing_findings",
    "guest_pair_findings",
    "metal_neighbour_distance",
    "smeared_energy_findings",
    "step_findings",
    "voltage_findings",
    "worst_severity",
]

#: Bond if closer than this factor times the sum of ``natural_cutoffs`` radii (common practice
#: for connectivity from covalent radii is a tolerance of 10–30 %).
BOND_SCALE = 1.2

#: At most this many close pairs are reported one by one per check; the rest are summarised.
MAX_PAIRS = 10

Severity = Literal["info", "warning", "error"]
#: order of severities (sorting findings: errors first)
SEVERITY_RANK = {"info": 0, "warning": 1, "error": 2}
_RANK = SEVERITY_RANK


class Finding(BaseModel):
    """The result of one check at one step."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    severity: Severity
    code: str = Field(pattern=r"^[a-z0-9]+(-[a-z0-9]+)*$", description="kebab-case check id")
    message: str
    step: int = Field(ge=0)


def worst_severity(findings: Sequence[Finding]) -> Severity | None:
    """The most severe level among ``findings`` (None when there are none)."""
    if not findings:
        return None
    return max((f.severity for f in findings), key=_RANK.__getitem__)


def convergence_findings(
    step: int, *, scf_converged: bool, relax_converged: bool | None
) -> list[Finding]:
    """SCF not converged (error); relaxation not converged (warning; ``None``: no relaxation)."""
    out = []
    if not scf_converged:
        out.append(
            Finding(
                severity="error",
                code="scf-not-converged",
                message="the SCF did not converge; energy, forces and potential are unreliable",
                step=step,
            )
        )
    if relax_converged is False:
        out.append(
            Finding(
                severity="warning",
                code="relax-not-converged",
                message="the relaxation stopped before the force threshold was reached",
                step=step,
            )
        )
    return out


#: Occupations within this of 0 or of a full level count as whole (no smearing).
WHOLE_OCCUPATION = 1e-6


def level_order_gap(
    orbital_energies: Sequence[Sequence[float]] | None,
    occupations: Sequence[Sequence[float]] | None,
) -> tuple[float, int] | None:
    """Largest (highest filled − lowest empty) level energy and its spin channel.

    Levels and occupations per spin channel (one shared channel holds 0–2 electrons per level,
    two channels 0–1); the result is in the units of ``orbital_energies`` and positive when an
    empty level lies below a filled one (not the aufbau order). None when the levels are
    missing, do not match their occupations, are not finite, or any occupation is fractional
    (smearing: levels below the Fermi level may hold less than a full level by design).
    """
    if orbital_energies is None or occupations is None:
        return None
    if len(orbital_energies) == 0 or len(orbital_energies) != len(occupations):
        return None
    full = 2.0 if len(occupations) == 1 else 1.0
    worst, channel = -math.inf, 0
    for k, (e, o) in enumerate(zip(orbital_energies, occupations, strict=True)):
        e, o = np.asarray(e, dtype=float), np.asarray(o, dtype=float)
        if e.shape != o.shape or not e.size or not np.isfinite(e).all():
            return None
        whole = (np.abs(o) < WHOLE_OCCUPATION) | (np.abs(o - full) < WHOLE_OCCUPATION)
        if not whole.all():
            return None
        filled, empty = o > full / 2, o < full / 2
        if filled.any() and empty.any():
            gap = float(e[filled].max() - e[empty].min())
            if gap > worst:
                worst, channel = gap, k
    return worst, channel


def level_order_findings(
    step: int,
    orbital_energies: Sequence[Sequence[float]] | None,
    occupations: Sequence[Sequence[float]] | None,
    tolerance: float | None,
) -> list[Finding]:
    """Aufbau order of a step's levels (eV, per spin channel; see :func:`level_order_gap`): a
    warning when an empty level lies more than ``tolerance`` eV below a filled one of the same
    channel.

    Only whole occupations are judged (smeared levels are part of the model). None for the
    levels or the tolerance: no finding. In the ground state of a Kohn–Sham calculation without
    smearing the filled levels are the lowest (aufbau principle; common practice); an SCF that
    ends with a hole below an empty level, e.g. after a second-order solver kept the
    occupations it started from among near-degenerate π* levels, describes an excited
    configuration and its energy is too high.
    """
    found = None if tolerance is None else level_order_gap(orbital_energies, occupations)
    if found is None or found[0] <= tolerance:
        return []
    worst, channel = found
    spin = "" if len(occupations) == 1 else (" (spin up)" if channel == 0 else " (spin down)")
    return [
        Finding(
            severity="warning",
            code="empty-level-below-filled",
            message=f"an empty level lies {worst:.2f} eV below a filled one{spin}: the SCF ended "
            "in an excited configuration, so this step's energy is too high; near-degenerate "
            "levels (a guest's electron in a host's π* levels) want engine.smearing, e.g. 0.1 eV",
            step=step,
        )
    ]


def _label(atoms: Atoms, i: int) -> str:
    return f"{i} ({atoms[i].symbol})"


def _pair_findings(
    step: int,
    atoms: Atoms,
    pairs: list[tuple[float, int, int]],
    *,
    severity: Severity,
    code: str,
    what: str,
    limit: float,
    why: str = "",
) -> list[Finding]:
    """One finding per pair ``(d, a, b)``, closest first; ``why`` follows the limit in brackets."""
    pairs = sorted(pairs)
    out = [
        Finding(
            severity=severity,
            code=code,
            message=f"{what} {_label(atoms, a)} and {_label(atoms, b)} are {d:.3f} Å apart "
            f"(below {limit:g} Å{why})",
            step=step,
        )
        for d, a, b in pairs[:MAX_PAIRS]
    ]
    if len(pairs) > MAX_PAIRS:
        out.append(
            Finding(
                severity=severity,
                code=code,
                message=f"{len(pairs) - MAX_PAIRS} more pairs of {what} below {limit:g} Å "
                "not listed",
                step=step,
            )
        )
    return out


def close_pair_findings(step: int, atoms: Atoms, min_distance: float = 0.7) -> list[Finding]:
    """One ``atoms-too-close`` error per pair of atoms nearer than ``min_distance`` Å."""
    if len(atoms) < 2:
        return []
    i, j, d = neighbor_list("ijd", atoms, min_distance, self_interaction=False)
    pairs = {(int(a), int(b)): float(x) for a, b, x in zip(i, j, d, strict=True) if a < b}
    return _too_close(step, atoms, [(x, a, b) for (a, b), x in pairs.items()], min_distance)


def _too_close(
    step: int, atoms: Atoms, pairs: list[tuple[float, int, int]], min_distance: float
) -> list[Finding]:
    return _pair_findings(
        step,
        atoms,
        pairs,
        severity="error",
        code="atoms-too-close",
        what="atoms",
        limit=min_distance,
    )


#: Extra reach (Å) of the k-d tree search of :func:`_close_pairs` over its cut-off; candidates
#: are then judged by the exact distance, so this only guards against rounding.
_TREE_SLACK = 1e-6


def _close_pairs(
    atoms: Atoms, targets: Sequence[int], cutoff: float
) -> list[tuple[float, int, int]]:
    """Pairs ``(d, a, b)``, ``a < b``, nearer than ``cutoff`` Å, with ``a`` or ``b`` in ``targets``.

    Candidates come from a k-d tree of all atoms (wrapped into the cell along periodic axes),
    queried only around the targets and their periodic images. The distance of a pair is that of
    its nearest image, computed as ``ase.neighborlist`` computes it (``|x_b - x_a + S·cell|``),
    so a pair is reported with the same number as by :func:`close_pair_findings`.
    """
    t_idx = np.unique(np.asarray(list(targets), dtype=int))
    if t_idx.size == 0 or len(atoms) < 2:
        return []
    pos = atoms.positions
    pbc = np.asarray(atoms.pbc, dtype=bool)
    cell = np.asarray(atoms.get_cell(complete=True))
    if pbc.any():
        frac = np.linalg.solve(cell.T, pos.T).T
        wrap = np.where(pbc, np.floor(frac), 0.0).astype(int)
        wpos = pos - wrap @ cell
        volume = abs(np.linalg.det(cell))
        reach = []
        for k in range(3):
            if not pbc[k]:
                reach.append((0,))
                continue
            height = volume / np.linalg.norm(np.cross(cell[(k + 1) % 3], cell[(k + 2) % 3]))
            r = max(1, int(np.ceil(cutoff / height)))
            reach.append(range(-r, r + 1))
        shifts = np.array(list(itertools.product(*reach)), dtype=int)
    else:
        wrap = np.zeros((len(atoms), 3), dtype=int)
        wpos = pos
        shifts = np.zeros((1, 3), dtype=int)
    queries = (wpos[t_idx][None, :, :] + (shifts @ cell)[:, None, :]).reshape(-1, 3)
    q_atom = np.tile(t_idx, len(shifts))
    q_shift = np.repeat(shifts, len(t_idx), axis=0)
    found = cKDTree(queries).sparse_distance_matrix(
        cKDTree(wpos), cutoff + _TREE_SLACK, output_type="ndarray"
    )
    t, b = q_atom[found["i"]], found["j"].astype(int)
    s = q_shift[found["i"]]
    keep = t != b
    t, b, s = t[keep], b[keep], s[keep]
    if not len(t):
        return []
    # image of b next to t: x_b - x_t + (wrap_t - wrap_b - s)·cell; as (lo, hi) with lo < hi
    shift = wrap[t] - wrap[b] - s
    lo, hi = np.minimum(t, b), np.maximum(t, b)
    shift = np.where((t < b)[:, None], shift, -shift)
    vec = pos[hi] - pos[lo]
    if pbc.any():
        vec = vec + shift.dot(cell)
    d = np.sqrt(np.sum(vec * vec, axis=1))
    ok = d < cutoff
    best: dict[tuple[int, int], float] = {}
    for x, a, c in zip(d[ok].tolist(), lo[ok].tolist(), hi[ok].tolist(), strict=True):
        if x < best.get((a, c), np.inf):
            best[(a, c)] = x
    return [(x, a, c) for (a, c), x in best.items()]


def _distances(atoms: Atoms, a: Sequence[int], b: Sequence[int]) -> np.ndarray:
    """Distance matrix between atom sets ``a`` and ``b`` (minimum image where periodic)."""
    pos = atoms.positions
    pbc = atoms.pbc if atoms.pbc.any() else None
    cell = atoms.cell if pbc is not None else None
    _, dist = get_distances(pos[list(a)], pos[list(b)], cell=cell, pbc=pbc)
    return dist


def envelope_findings(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    host_indices: Sequence[int],
    envelope: float,
) -> list[Finding]:
    """One ``guest-outside-envelope`` warning per guest farther than ``envelope`` Å from the host."""
    if not len(guest_indices) or not len(host_indices):
        return []
    dist = _distances(atoms, guest_indices, host_indices)
    return _envelope(step, atoms, guest_indices, dist, envelope)


def _envelope(
    step: int, atoms: Atoms, guest_indices: Sequence[int], dist: np.ndarray, envelope: float
) -> list[Finding]:
    """:func:`envelope_findings` from the guest–host distance matrix ``dist``."""
    nearest = dist.min(axis=1)
    out = []
    for g, d in zip(guest_indices, nearest, strict=True):
        if d > envelope:
            out.append(
                Finding(
                    severity="warning",
                    code="guest-outside-envelope",
                    message=f"guest {_label(atoms, int(g))} is {d:.3f} Å from the nearest host "
                    f"atom (envelope {envelope:g} Å); it may have left the host",
                    step=step,
                )
            )
    return out


def guest_host_findings(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    host_indices: Sequence[int],
    guest_host_min: float,
) -> list[Finding]:
    """One ``guest-on-host-atom`` error per guest nearer than ``guest_host_min`` Å to the host.

    Catches a guest driven into a host bond or onto a host atom, far closer than any bonded
    guest–host contact (for Li on carbon, Li–C contacts are about 2.2–2.3 Å; common practice).
    """
    if not len(guest_indices) or not len(host_indices):
        return []
    dist = _distances(atoms, guest_indices, host_indices)
    return _guest_host(step, atoms, guest_indices, host_indices, dist, guest_host_min)


def _guest_host(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    host_indices: Sequence[int],
    dist: np.ndarray,
    guest_host_min: float,
) -> list[Finding]:
    """:func:`guest_host_findings` from the guest–host distance matrix ``dist``."""
    out = []
    for g, row in zip(guest_indices, dist, strict=True):
        k = int(np.argmin(row))
        if row[k] < guest_host_min:
            out.append(
                Finding(
                    severity="error",
                    code="guest-on-host-atom",
                    message=f"guest {_label(atoms, int(g))} is {row[k]:.3f} Å from host atom "
                    f"{_label(atoms, int(host_indices[k]))} (bound {guest_host_min:g} Å)",
                    step=step,
                )
            )
    return out


def guest_pair_findings(
    step: int, atoms: Atoms, guest_indices: Sequence[int], guest_alert: float
) -> list[Finding]:
    """One ``guests-too-close`` warning per pair of guests nearer than ``guest_alert`` Å."""
    guests = [int(g) for g in guest_indices]
    if len(guests) < 2:
        return []
    dist = _distances(atoms, guests, guests)
    a, b = np.nonzero(np.triu(dist < guest_alert, k=1))
    pairs = [(float(dist[p, q]), guests[p], guests[q]) for p, q in zip(a, b, strict=True)]
    return _pair_findings(
        step,
        atoms,
        pairs,
        severity="warning",
        code="guests-too-close",
        what="guests",
        limit=guest_alert,
    )


# --- guests packed tighter than in their elemental solid -------------------------------------

#: Reference-state symmetries whose nearest-neighbour distance follows from the lattice constants
#: alone. Source: textbook lattice geometry — bcc neighbours half a cube body diagonal away, fcc
#: half a face diagonal, diamond a quarter body diagonal, hcp either in the basal plane (a) or
#: in the adjacent plane (√(a²/3 + c²/4)). The tests check each against ``ase.build.bulk``.
_CLOSED_FORM = ("bcc", "fcc", "hcp", "diamond")

#: Reference states ASE's ``bulk`` builds as a one-atom cell when they carry no atomic basis; such
#: a cell is not the element's structure (α-U has four atoms per orthorhombic cell), so its
#: shortest distance would be meaningless.
_NEED_BASIS = ("orthorhombic", "tetragonal", "cubic", "monoclinic")


@functools.cache
def metal_neighbour_distance(element: str) -> float | None:
    """Nearest-neighbour distance (Å) in the elemental solid of ``element``, ASE's reference state.

    From ``ase.data.reference_states`` (lattice constants in Å): bcc ``a·√3/2``, fcc ``a/√2``,
    hcp ``min(a, √(a²/3 + c²/4))`` with ``c = a·(c/a)`` (in-plane and out-of-plane neighbours),
    diamond ``a·√3/4``. Other symmetries (sc, bct, rhombohedral, or a state with its atomic
    basis): the reference structure built by ``ase.build.bulk``, its shortest interatomic
    distance by ``ase.neighborlist``. None when ASE has no reference state for the element, the
    state is a molecule or an atom (``diatom``, ``atom``), or it lacks the atomic basis needed to
    build it. E.g. Li (bcc, a = 3.49 Å): 3.022 Å. Raises ValueError for a non-element symbol.
    """
    z = atomic_numbers.get(element)
    if z is None or element == "X":
        raise ValueError(f"{element!r} is not a chemical element symbol (e.g. 'Li')")
    ref = reference_states[z]
    if not ref:
        return None
    sym = ref.get("symmetry")
    if sym in _CLOSED_FORM:
        a = float(ref["a"])
        if sym == "bcc":
            return a * math.sqrt(3.0) / 2.0
        if sym == "fcc":
            return a / math.sqrt(2.0)
        if sym == "diamond":
            return a * math.sqrt(3.0) / 4.0
        c = a * float(ref["c/a"])
        return min(a, math.sqrt(a * a / 3.0 + c * c / 4.0))
    if sym in ("diatom", "atom") or (sym in _NEED_BASIS and ref.get("basis") is None):
        return None
    from ase.build import bulk

    try:
        solid = bulk(element)
    except (ValueError, RuntimeError, KeyError, NotImplementedError):
        return None
    cutoff = 1.5 * (solid.get_volume() / len(solid)) ** (1.0 / 3.0)
    for _ in range(4):  # the shortest distance is within reach of the volume per atom
        d = neighbor_list("d", solid, cutoff, self_interaction=False)
        if len(d):
            return float(d.min())
        cutoff *= 2.0
    return None


def guest_packing_findings(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    element: str,
    packing: float,
    metal_distance: float | None = None,
    *,
    reported_below: float | None = None,
) -> list[Finding]:
    """``guests-closer-than-metal`` warnings: guests packed tighter than in their solid.

    The guests of ``guest_indices`` that are ``element`` are compared pairwise (minimum image on
    periodic axes); a pair closer than ``packing × metal_distance`` Å is reported, closest
    first, as :func:`guest_pair_findings` reports its pairs. ``metal_distance`` (Å) defaults to
    :func:`metal_neighbour_distance` of ``element``; the check is skipped when neither is known.
    Pairs closer than ``reported_below`` Å (the ``guests-too-close`` alert) are left to that
    check. E.g. two Li 2.42 Å apart: below 0.9 × 3.02 Å = 2.72 Å (bcc Li).
    """
    if metal_distance is None:
        metal_distance = metal_neighbour_distance(element)
        sym = reference_states[atomic_numbers[element]] or {}
        source = (
            f"the nearest-neighbour distance in {sym.get('symmetry', 'solid')} {element}, "
            "ASE's reference state"
        )
    else:
        source = f"checks.guest_metal_distance for {element}"
    if metal_distance is None:
        return []
    guests = [int(g) for g in guest_indices if atoms[int(g)].symbol == element]
    if len(guests) < 2:
        return []
    limit = packing * metal_distance
    dist = _distances(atoms, guests, guests)
    close = dist < limit
    if reported_below is not None:
        close &= dist >= reported_below
    a, b = np.nonzero(np.triu(close, k=1))
    pairs = [(float(dist[p, q]), guests[p], guests[q]) for p, q in zip(a, b, strict=True)]
    return _pair_findings(
        step,
        atoms,
        pairs,
        severity="warning",
        code="guests-closer-than-metal",
        what="guests",
        limit=round(limit, 3),
        why=f" = {packing:g} × {metal_distance:.3f} Å, {source}",
    )


# --- the host: bonded pieces, rim, interior ---------------------------------------------------


def _bond_graph(atoms: Atoms, indices: Sequence[int]):
    from ase.neighborlist import natural_cutoffs
    from scipy.sparse import coo_matrix

    sub = atoms[list(indices)]
    cut = [BOND_SCALE * c for c in natural_cutoffs(sub)]
    i, j = neighbor_list("ij", sub, cut, self_interaction=False)
    n = len(sub)
    return sub, i, j, coo_matrix((np.ones(len(i)), (i, j)), shape=(n, n))


def _pieces(graph) -> int:
    from scipy.sparse.csgraph import connected_components

    return int(connected_components(graph, directed=False)[0])


def _edge(hosts: list[int], sub: Atoms, i: np.ndarray, j: np.ndarray) -> list[int]:
    heavy = sub.numbers > 1
    heavy_pairs = heavy[i] & heavy[j]
    coord = np.bincount(i[heavy_pairs], minlength=len(sub))
    top = coord[heavy].max() if heavy.any() else 0
    edge = ~heavy | (heavy & (coord < top))
    return [hosts[k] for k in np.flatnonzero(edge)]


def _host_graph_facts(atoms: Atoms, host_indices: Sequence[int]) -> tuple[int, list[int]]:
    """Bonded pieces and edge atoms of the host atoms, from one bond graph."""
    hosts = [int(k) for k in host_indices]
    if not hosts:
        return 0, []
    sub, i, j, graph = _bond_graph(atoms, hosts)
    return _pieces(graph), _edge(hosts, sub, i, j)


def host_fragments(atoms: Atoms, host_indices: Sequence[int]) -> int:
    """Number of bonded pieces the host atoms form (covalent-radius bonds, see BOND_SCALE)."""
    if len(host_indices) == 0:
        return 0
    *_, graph = _bond_graph(atoms, host_indices)
    return _pieces(graph)


def edge_atoms(atoms: Atoms, host_indices: Sequence[int]) -> list[int]:
    """Host atoms at the rim: hydrogens, and heavy atoms below the host's top heavy coordination."""
    hosts = [int(k) for k in host_indices]
    if not hosts:
        return []
    sub, i, j, _ = _bond_graph(atoms, hosts)
    return _edge(hosts, sub, i, j)


def _has_interior(
    atoms: Atoms, host_indices: Sequence[int], edge: Sequence[int], rim_distance: float
) -> bool:
    """Whether some heavy non-edge host atom is farther than ``rim_distance`` from every edge atom."""
    if not len(edge):
        return False
    rim = set(edge)
    heavy = [k for k in host_indices if atoms.numbers[k] > 1 and k not in rim]
    if not heavy:
        return False
    return bool(_distances(atoms, heavy, edge).min(axis=1).max() > rim_distance)


def rim_findings(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    host_indices: Sequence[int],
    rim_distance: float,
    rim_alert: float,
) -> list[Finding]:
    """Warn when more than ``rim_alert`` (a fraction) of the guests sit at the rim."""
    guests = list(guest_indices)
    edge = edge_atoms(atoms, host_indices)
    if not guests or not edge:
        return []
    interior = _has_interior(atoms, host_indices, edge, rim_distance)
    return _rim(step, atoms, guests, edge, interior, rim_distance, rim_alert)


def _rim(
    step: int,
    atoms: Atoms,
    guests: Sequence[int],
    edge: Sequence[int],
    interior: bool,
    rim_distance: float,
    rim_alert: float,
) -> list[Finding]:
    """:func:`rim_findings` from the host's edge atoms and whether it has an interior."""
    if not len(guests) or not len(edge) or not interior:
        return []  # no interior: a molecule-sized host is all rim
    at_rim = _distances(atoms, guests, edge).min(axis=1) <= rim_distance
    frac = float(at_rim.mean())
    if frac <= rim_alert:
        return []
    return [
        Finding(
            severity="warning",
            code="edge-crowding",
            message=(
                f"{int(at_rim.sum())} of {len(guests)} guests ({frac:.0%}) sit within "
                f"{rim_distance:g} Å of the rim (alert above {rim_alert:.0%})"
            ),
            step=step,
        )
    ]


# --- host facts, computed once ----------------------------------------------------------------

_Vec3 = tuple[float, float, float]


def host_digest(atoms: Atoms, n_host: int | None = None) -> str:
    """SHA-256 (hex) of elements, positions, cell and periodicity of atoms ``0..n_host-1``.

    All atoms when ``n_host`` is None. Equal digests mean a bit-identical host.
    """
    n = len(atoms) if n_host is None else int(n_host)
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(atoms.numbers[:n], dtype="<i8").tobytes())
    h.update(np.ascontiguousarray(atoms.positions[:n], dtype="<f8").tobytes())
    h.update(np.ascontiguousarray(atoms.cell.array, dtype="<f8").tobytes())
    h.update(np.asarray(atoms.pbc, dtype=np.uint8).tobytes())
    return h.hexdigest()


class HostFacts(BaseModel):
    """What the per-step checks need of the pristine host; computed once by :func:`host_facts`.

    The host is atoms ``0..n_host-1`` of every step's structure. ``positions``, ``cell`` and
    ``pbc`` are the pristine host's, so :meth:`moved` can tell which host atoms a relaxation
    displaced; ``digest`` is :func:`host_digest` of the pristine host. JSON round trips are exact.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    n_host: int = Field(ge=0, description="number of host atoms (indices 0..n_host-1)")
    host_fragments: int = Field(ge=0, description="bonded pieces of the pristine host")
    edge_atoms: tuple[int, ...] = Field(description="host atoms at the rim (see edge_atoms)")
    interior: bool = Field(
        description="some heavy host atom lies farther than rim_distance from every edge atom "
        "(the rim check runs only then)"
    )
    rim_distance: float = Field(gt=0.0, description="rim width 'interior' was judged with, Å")
    numbers: tuple[int, ...] = Field(description="atomic numbers of the host atoms")
    positions: tuple[_Vec3, ...] = Field(description="pristine host positions, Å")
    cell: tuple[_Vec3, _Vec3, _Vec3] = Field(description="cell vectors, Å")
    pbc: tuple[bool, bool, bool]
    digest: str = Field(description="host_digest of the pristine host")

    @model_validator(mode="after")
    def _consistent(self) -> HostFacts:
        if len(self.numbers) != self.n_host or len(self.positions) != self.n_host:
            raise ValueError(f"numbers and positions must have n_host = {self.n_host} entries")
        if any(not 0 <= k < self.n_host for k in self.edge_atoms):
            raise ValueError("edge_atoms must be host indices")
        return self

    def moved(self, atoms: Atoms, tol: float = 1e-6) -> list[int]:
        """Host atoms of ``atoms`` displaced by more than ``tol`` Å from the pristine host.

        Displacements use the minimum image along periodic axes (an atom wrapped into the cell
        has not moved). Every host atom counts as moved when the cell or periodicity differ, and
        an atom with a non-finite position always does. Raises ValueError when atoms
        ``0..n_host-1`` are not this host's elements.
        """
        _check_host(atoms, self.n_host, self)
        n = self.n_host
        if n == 0:
            return []
        cell = np.asarray(self.cell, dtype=float)
        if tuple(bool(p) for p in atoms.pbc) != self.pbc or not np.allclose(
            atoms.cell.array, cell, rtol=0.0, atol=tol
        ):
            return list(range(n))
        delta = atoms.positions[:n] - np.asarray(self.positions, dtype=float).reshape(n, 3)
        finite = np.isfinite(delta).all(axis=1)
        dist = np.full(n, np.inf)
        if any(self.pbc):
            _, dist[finite] = find_mic(delta[finite], cell, self.pbc)
        else:
            dist[finite] = np.linalg.norm(delta[finite], axis=1)
        return [int(k) for k in np.flatnonzero(dist > tol)]


def host_facts(host: Atoms, settings: ChecksConfig) -> HostFacts:
    """The :class:`HostFacts` of the pristine ``host`` (all its atoms; no guests)."""
    if not np.isfinite(host.positions).all():
        raise ValueError("the host has non-finite positions")
    hosts = list(range(len(host)))
    pieces, edge = _host_graph_facts(host, hosts)
    return HostFacts(
        n_host=len(host),
        host_fragments=pieces,
        edge_atoms=tuple(edge),
        interior=_has_interior(host, hosts, edge, settings.rim_distance),
        rim_distance=settings.rim_distance,
        numbers=tuple(int(z) for z in host.numbers),
        positions=tuple(tuple(p) for p in host.positions.tolist()),
        cell=tuple(tuple(v) for v in host.cell.array.tolist()),
        pbc=tuple(bool(p) for p in host.pbc),
        digest=host_digest(host),
    )


def _check_host(atoms: Atoms, n_host: int, facts: HostFacts) -> int:
    n_host = int(n_host)
    if not 0 <= n_host <= len(atoms):
        raise ValueError(f"n_host = {n_host} outside 0..{len(atoms)} (the structure's size)")
    if n_host != facts.n_host:
        raise ValueError(f"n_host = {n_host}, but the host facts are of {facts.n_host} atoms")
    if not np.array_equal(atoms.numbers[:n_host], np.asarray(facts.numbers, dtype=int)):
        raise ValueError(f"atoms 0..{n_host - 1} are not the elements of the host facts")
    return n_host


# --- one step ---------------------------------------------------------------------------------


def step_findings(
    step: int,
    atoms: Atoms,
    n_host: int,
    settings: ChecksConfig,
    facts: HostFacts,
    *,
    scf_converged: bool,
    relax_converged: bool | None,
    envelope: float | None,
    moved: Sequence[int] | None = None,
    guest: str | None = None,
) -> list[Finding]:
    """All findings for one step's (relaxed) structure, errors first.

    ``atoms`` is the host (``0..n_host-1``, the atoms ``facts`` describe) followed by the
    guests. ``settings`` bound the checks (``guest_host_min``, ``guest_alert``, ``rim_alert`` None
    and ``connectivity`` False switch theirs off); ``envelope`` (Å, None: off) is passed
    resolved (:meth:`ChecksConfig.envelope_for`), since its default comes from the placement
    settings. ``relax_converged`` None: no relaxation. Distance checks are skipped when positions are not finite (that itself is an
    error finding). ``guest`` is the guest element: two such guests closer than
    ``guest_packing`` × the nearest-neighbour distance of its solid (``guest_metal_distance``,
    else :func:`metal_neighbour_distance`) give ``guests-closer-than-metal`` (pairs already below
    ``guest_alert`` are not repeated); None, ``guest_packing`` None, or no known distance: skipped.

    ``moved`` names the host atoms that moved since the facts were taken (e.g.
    :meth:`HostFacts.moved`). None (unknown): every check over the whole structure. Empty: only
    pairs involving a guest are searched, and the fragment count and rim come from ``facts``.
    Otherwise pairs involving a guest or a moved atom are searched, and the host's bond graph is
    rebuilt. Close pairs among unmoved host atoms are then not reported (they are the pristine
    host's); all else is the same on every path. Raises ValueError when ``n_host`` or
    ``moved`` do not fit ``atoms`` and ``facts``, or ``facts`` were taken with another
    ``rim_distance``.
    """
    n_host = _check_host(atoms, n_host, facts)
    if facts.rim_distance != settings.rim_distance:
        raise ValueError(
            f"the host facts were taken with rim_distance {facts.rim_distance:g} Å, the checks "
            f"use {settings.rim_distance:g} Å"
        )
    changed: list[int] | None = None
    if moved is not None:
        changed = sorted({int(k) for k in moved})
        bad = [k for k in changed if not 0 <= k < n_host]
        if bad:
            raise ValueError(f"moved: indices {bad} are not host atoms (0..{n_host - 1})")
    hosts = list(range(n_host))
    guests = list(range(n_host, len(atoms)))

    out = convergence_findings(step, scf_converged=scf_converged, relax_converged=relax_converged)
    bad = np.flatnonzero(~np.isfinite(atoms.positions).all(axis=1))
    if len(bad):
        shown = ", ".join(str(i) for i in bad[:MAX_PAIRS])
        more = f" and {len(bad) - MAX_PAIRS} more" if len(bad) > MAX_PAIRS else ""
        out.append(
            Finding(
                severity="error",
                code="non-finite-positions",
                message=f"atoms {shown}{more} have non-finite positions",
                step=step,
            )
        )
        return sorted(out, key=lambda f: -_RANK[f.severity])

    if changed is None:
        out += close_pair_findings(step, atoms, settings.min_distance)
    else:
        pairs = _close_pairs(atoms, guests + changed, settings.min_distance)
        out += _too_close(step, atoms, pairs, settings.min_distance)
    to_host = None
    if (settings.guest_host_min is not None or envelope is not None) and guests and hosts:
        to_host = _distances(atoms, guests, hosts)
    if settings.guest_host_min is not None and to_host is not None:
        out += _guest_host(step, atoms, guests, hosts, to_host, settings.guest_host_min)
    if envelope is not None and to_host is not None:
        out += _envelope(step, atoms, guests, to_host, envelope)
    if settings.guest_alert is not None:
        out += guest_pair_findings(step, atoms, guests, settings.guest_alert)
    # source: nearest-neighbour distance of the guest's solid, ase.data.reference_states
    if guest is not None and settings.guest_packing is not None:
        out += guest_packing_findings(
            step,
            atoms,
            guests,
            guest,
            settings.guest_packing,
            settings.guest_metal_distance,
            reported_below=settings.guest_alert,
        )

    if not settings.connectivity and settings.rim_alert is None:
        return sorted(out, key=lambda f: -_RANK[f.severity])
    if changed is not None and not changed:
        pieces, edge, interior = facts.host_fragments, list(facts.edge_atoms), facts.interior
    else:  # the host may have moved: its bonds, rim and interior anew
        pieces, edge = _host_graph_facts(atoms, hosts)
        interior = (
            settings.rim_alert is not None
            and bool(guests)
            and _has_interior(atoms, hosts, edge, settings.rim_distance)
        )
    if settings.connectivity and pieces > facts.host_fragments:
        out.append(
            Finding(
                severity="error",
                code="host-fragmented",
                message=(
                    f"the host is in {pieces} bonded pieces, it started with "
                    f"{facts.host_fragments}: a bond broke"
                ),
                step=step,
            )
        )
    if settings.rim_alert is not None:
        out += _rim(step, atoms, guests, edge, interior, settings.rim_distance, settings.rim_alert)
    return sorted(out, key=lambda f: -_RANK[f.severity])


# --- the placement decision -------------------------------------------------------------------

#: Potentials this close (V) count as equal in the flat-map count (the placement's tie width).
_FLAT_SLACK = 1e-9


def _site_text(decision: Decision, n: int, site: Site) -> str:
    """``chosen site 2 (well 5) at (x, y, z) Å, +1.234 V`` (``n`` counts from 0)."""
    which = "chosen site" if len(decision.chosen) == 1 else f"chosen site {n + 1}"
    if n < len(decision.chosen_wells):
        which += f" (well {decision.chosen_wells[n] + 1})"
    x, y, z = site.position
    return f"{which} at ({x:.2f}, {y:.2f}, {z:.2f}) Å, {site.potential:+.3f} V"


#: Å: a site this close to a gallery's margin (in height) is placed by the margin
GALLERY_BOUND_TOLERANCE = 0.3


def _gallery_bound(decision: Decision, site: Site) -> str | None:
    """Advice when the site's height lies on a gallery's margin (None: it does not)."""
    region = decision.region
    if region is None or region.galleries is None:
        return None
    gal = region.galleries
    h = float(np.dot(site.position, gal.normal))
    if gal.period is not None:
        h = gal.frame + (h - gal.frame) % gal.period
    for lo, hi in gal.intervals:
        if min(abs(h - lo), abs(h - hi)) <= GALLERY_BOUND_TOLERANCE:
            return (
                f"; its height is set by the gallery margin ({gal.margin:g} Å from a layer): the "
                "potential keeps falling towards the layer (a map without short-range repulsion, "
                "such as a point-charge model, does so); reduce placement.gallery_margin, use "
                "a density-derived map, or rely on the relaxation for the height"
            )
    return None


def _region_bounds(decision: Decision, site: Site | None = None) -> str:
    """The settings that bound the admissible region of ``decision``, as advice; the gallery
    margin alone when ``site`` lies on it."""
    if site is not None:
        gallery = _gallery_bound(decision, site)
        if gallery is not None:
            return gallery
    parts = []
    if decision.within is not None:
        parts.append(f"enlarge placement.within (the host envelope, {decision.within:g} Å)")
    if decision.exclusion:
        radii = ", ".join(f"{el} {r:g} Å" for el, r in sorted(decision.exclusion.items()))
        parts.append(f"relax placement.exclusion ({radii})")
    region = decision.region
    if region is not None and region.galleries is not None:
        parts.append(
            f"reduce placement.gallery_margin ({region.galleries.margin:g} Å, galleries_only)"
        )
    if region is not None and (region.boxes or region.spheres):
        parts.append("enlarge placement.boxes/spheres")
    if not parts:
        return ""
    if len(parts) == 1:
        return "; " + parts[0]
    return "; " + ", ".join(parts[:-1]) + (", or " if len(parts) > 2 else " or ") + parts[-1]


def _limited(findings: list[Finding], step: int, code: str, what: str) -> list[Finding]:
    """At most :data:`MAX_PAIRS` of ``findings``, the rest summarised in one more."""
    if len(findings) <= MAX_PAIRS:
        return findings
    more = len(findings) - MAX_PAIRS
    return findings[:MAX_PAIRS] + [
        Finding(
            severity="warning",
            code=code,
            message=f"step {step}: {more} more chosen sites {what} not listed",
            step=step,
        )
    ]


def decision_findings(
    step: int, decision: Decision, settings: ChecksConfig, *, charge_mode: str, guest: str
) -> list[Finding]:
    """Warnings about a placement decision (see :mod:`ionwell.science.placement`): pure, no I/O.

    * ``site-on-grid-face`` / ``site-on-region-edge`` (when ``settings.site_boundary``): a chosen
      site whose well touches the grid's face (``Site.boundary == "grid"``) or the admissible
      region's boundary (``"region"``). There the site is the lowest point of what the grid or
      region lets the guest reach, not a minimum of the potential; sites recorded without
      ``boundary`` are not judged.
    * ``well-repels-cation``: ``charge_mode == "cation"`` and a chosen site's potential (V) is
      at or above ``settings.cation_well_max`` (None: off). A cation of charge ``z·e`` has the
      potential energy ``z·e·V`` there (electrostatics), so a positive potential pushes it away.
      The map's zero is the engine's: the potential far from a cluster, the cell average for a
      periodic host.
    * ``map-too-flat``: at least ``settings.flat_map_wells`` of the recorded candidate wells lie
      within ``settings.flat_map_tolerance`` V of the deepest (None: off); their order then
      follows grid noise more than the map. The decision records only ``placement.candidates``
      wells, so the count is a lower bound when every recorded well ties.

    ``guest`` (element symbol) names the guest in the messages. Each site-level check reports at
    most :data:`MAX_PAIRS` sites and summarises the rest.
    """
    out: list[Finding] = []
    chosen = list(enumerate(decision.chosen))
    # source: the definitions of a well and of its boundary in ionwell.science.placement (Site.boundary)
    if settings.site_boundary:
        grid_face = [
            Finding(
                severity="warning",
                code="site-on-grid-face",
                message=f"step {step}: the {_site_text(decision, n, s)}, lies on the face of the "
                "potential grid, so the potential may keep falling outside the grid; enlarge "
                "engine.potential_grid.margin",
                step=step,
            )
            for n, s in chosen
            if s.boundary == "grid"
        ]
        out += _limited(grid_face, step, "site-on-grid-face", "on the grid face")
        region_edge = [
            Finding(
                severity="warning",
                code="site-on-region-edge",
                message=f"step {step}: the {_site_text(decision, n, s)}, lies on the boundary of "
                f"the admissible region: it is set by the region's bounds, not by a minimum of "
                f"the potential{_region_bounds(decision, s)}",
                step=step,
            )
            for n, s in chosen
            if s.boundary == "region"
        ]
        out += _limited(region_edge, step, "site-on-region-edge", "on the region's boundary")
    # source: electrostatics — a charge q at potential V has the energy q·V, so V > 0 repels q > 0
    limit = settings.cation_well_max
    if charge_mode == "cation" and limit is not None:
        repels = [
            Finding(
                severity="warning",
                code="well-repels-cation",
                message=f"step {step}: the {_site_text(decision, n, s)}, is at or above "
                f"checks.cation_well_max ({limit:g} V): the potential there repels a {guest} "
                "cation, so the site is no well for it (a net positive host charge lifts the "
                "potential everywhere near the host)",
                step=step,
            )
            for n, s in chosen
            if s.potential >= limit
        ]
        out += _limited(repels, step, "well-repels-cation", "at or above the limit")
    # source: our heuristic — wells closer in depth than the map's noise are ranked by that noise
    tol = settings.flat_map_tolerance
    if tol is not None and decision.candidates:
        pots = [w.potential for w in decision.candidates]
        deepest = min(pots)
        ties = sum(v - deepest <= tol + _FLAT_SLACK for v in pots)
        if ties >= settings.flat_map_wells:
            if decision.rule == "screened":
                remedy = "a finer engine.potential_grid.spacing or a larger placement.screen.top"
            else:
                remedy = (
                    "a finer engine.potential_grid.spacing, the 'screened' placement rule, or "
                    "more placement.candidates"
                )
            if ties == len(pots):
                many = f"all {ties} recorded candidate wells"
                cap = (
                    " (the decision records only the placement.candidates deepest wells, so "
                    "more may tie)"
                )
            else:
                many, cap = f"{ties} of the {len(pots)} recorded candidate wells", ""
            out.append(
                Finding(
                    severity="warning",
                    code="map-too-flat",
                    message=f"step {step}: {many} lie within {tol:g} V of the deepest "
                    f"({deepest:+.3f} V), so their ranking depends on grid noise{cap}; try "
                    f"{remedy}",
                    step=step,
                )
            )
    return out


def voltage_findings(
    steps: Sequence[VoltageStep], floor: float | None, step_of: Mapping[int, int]
) -> list[Finding]:
    """A warning for each voltage step (between hull vertices) below ``floor`` (V; None: off).

    ``step_of`` maps a guest count to the step that first reached it (the finding's step). A
    negative step means the guests of that plateau are bound more weakly than in the guest's
    reference (e.g. Li metal): insertion there would plate the metal instead (common practice).
    """
    if floor is None:
        return []
    out = []
    for v in steps:
        if v.voltage < floor:
            out.append(
                Finding(
                    severity="warning",
                    code="negative-voltage" if floor == 0.0 else "voltage-below-floor",
                    message=(
                        f"the voltage step from {v.n_from} to {v.n_to} guests is "
                        f"{v.voltage:.3f} V, below {floor:g} V: inserting these guests costs "
                        "energy against the guest reference (check μ, the charge mode, and "
                        "whether the sites are converged)"
                    ),
                    step=step_of.get(v.n_to, 0),
                )
            )
    return out


def smeared_energy_findings(
    steps: Sequence[int], free_energies: Sequence[float | None]
) -> list[Finding]:
    """An error when the steps of a campaign whose every SCF is smeared hold energies of two
    kinds: steps with a recorded free energy have the energy extrapolated to zero width,
    E - σS/2; steps without one were recorded before ionwell kept it, as the internal energy E
    of the smeared SCF. Formation energies and voltages across the two kinds are off by σS/2 at
    the old steps (σ the width, S the electronic entropy). ``free_energies`` are the steps'
    recorded free energies (eV, None where absent). No finding when all steps are of one kind.
    """
    old = [s for s, f in zip(steps, free_energies, strict=True) if f is None]
    if not old or len(old) == len(steps):
        return []
    shown = ", ".join(str(s) for s in old[:10]) + (", ..." if len(old) > 10 else "")
    return [
        Finding(
            severity="error",
            code="mixed-smeared-energies",
            message=(
                f"steps {shown} were recorded by an earlier ionwell as the smeared SCF's "
                "internal energy E, the others as the energy extrapolated to zero width, "
                "E - σS/2: formation energies and voltages mix the two (off by σS/2 at those "
                "steps); compute those steps again, or the campaign, with this version"
            ),
            step=old[0],
        )
    ]
