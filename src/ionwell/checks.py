"""Per-step convergence and sanity checks, reported as :class:`Finding` records.

Pure functions: they look at one step's structure and flags and return findings; they never stop
the loop themselves (the loop decides what an ``error`` means). Distances use the minimum image
convention along periodic axes. Codes are short kebab-case strings, stable across versions:

=========================  ========  ===========================================================
code                       severity  meaning
=========================  ========  ===========================================================
``scf-not-converged``      error     the engine's SCF did not reach its tolerance
``relax-not-converged``    warning   the relaxation stopped at its step cap above ``fmax``
``non-finite-positions``   error     a position is NaN or infinite
``atoms-too-close``        error     two atoms closer than ``min_distance`` (Å)
``guest-on-host-atom``     error     a guest closer than ``guest_host_min`` (Å) to a host atom
``guest-outside-envelope`` warning   a guest farther than ``envelope`` (Å) from every host atom
``guests-too-close``       warning   two guests closer than ``guest_alert`` (Å)
``host-fragmented``        error     the host falls into more bonded pieces than it started with
``edge-crowding``          warning   more than ``rim_alert`` of the guests sit at the rim
=========================  ========  ===========================================================

Bonds for the fragment count use ``ase.neighborlist.natural_cutoffs`` (covalent radii) scaled by
:data:`BOND_SCALE`. The *rim* of a particle is its edge atoms — terminating hydrogens and heavy
atoms with fewer heavy-atom neighbours than the host's most coordinated ones — and a guest is at
the rim when it is within ``rim_distance`` Å of an edge atom. The rim check runs only on hosts
that have an interior (heavy atoms farther than ``rim_distance`` from every edge atom).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Literal

import numpy as np
from ase import Atoms
from ase.geometry import get_distances
from ase.neighborlist import neighbor_list
from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "MAX_PAIRS",
    "Finding",
    "guest_host_findings",
    "BOND_SCALE",
    "close_pair_findings",
    "edge_atoms",
    "host_fragments",
    "rim_findings",
    "convergence_findings",
    "envelope_findings",
    "guest_pair_findings",
    "step_findings",
    "worst_severity",
]

#: Bond if closer than this factor times the sum of ``natural_cutoffs`` radii (common practice
#: for connectivity from covalent radii is a tolerance of 10–30 %).
BOND_SCALE = 1.2

#: At most this many close pairs are reported one by one per check; the rest are summarised.
MAX_PAIRS = 10

Severity = Literal["info", "warning", "error"]
_RANK = {"info": 0, "warning": 1, "error": 2}


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
) -> list[Finding]:
    pairs = sorted(pairs)
    out = [
        Finding(
            severity=severity,
            code=code,
            message=f"{what} {_label(atoms, a)} and {_label(atoms, b)} are {d:.3f} Å apart "
            f"(below {limit:g} Å)",
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
    return _pair_findings(
        step,
        atoms,
        [(x, a, b) for (a, b), x in pairs.items()],
        severity="error",
        code="atoms-too-close",
        what="atoms",
        limit=min_distance,
    )


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
    nearest = _distances(atoms, guest_indices, host_indices).min(axis=1)
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


def _check_indices(atoms: Atoms, name: str, indices: Sequence[int]) -> list[int]:
    out = [int(i) for i in indices]
    bad = [i for i in out if not 0 <= i < len(atoms)]
    if bad:
        raise ValueError(f"{name}: indices {bad} outside 0..{len(atoms) - 1}")
    return out


def _bond_graph(atoms: Atoms, indices: Sequence[int]):
    from ase.neighborlist import natural_cutoffs
    from scipy.sparse import coo_matrix

    sub = atoms[list(indices)]
    cut = [BOND_SCALE * c for c in natural_cutoffs(sub)]
    i, j = neighbor_list("ij", sub, cut, self_interaction=False)
    n = len(sub)
    return sub, i, j, coo_matrix((np.ones(len(i)), (i, j)), shape=(n, n))


def host_fragments(atoms: Atoms, host_indices: Sequence[int]) -> int:
    """Number of bonded pieces the host atoms form (covalent-radius bonds, see BOND_SCALE)."""
    from scipy.sparse.csgraph import connected_components

    if len(host_indices) == 0:
        return 0
    *_, graph = _bond_graph(atoms, host_indices)
    return int(connected_components(graph, directed=False)[0])


def edge_atoms(atoms: Atoms, host_indices: Sequence[int]) -> list[int]:
    """Host atoms at the rim: hydrogens, and heavy atoms below the host's top heavy coordination."""
    hosts = list(host_indices)
    if not hosts:
        return []
    sub, i, j, _ = _bond_graph(atoms, hosts)
    heavy = sub.numbers > 1
    heavy_pairs = heavy[i] & heavy[j]
    coord = np.bincount(i[heavy_pairs], minlength=len(sub))
    top = coord[heavy].max() if heavy.any() else 0
    edge = ~heavy | (heavy & (coord < top))
    return [hosts[k] for k in np.flatnonzero(edge)]


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
    heavy = [k for k in host_indices if atoms.numbers[k] > 1 and k not in set(edge)]
    if not heavy or _distances(atoms, heavy, edge).min(axis=1).max() <= rim_distance:
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


def step_findings(
    step: int,
    atoms: Atoms,
    guest_indices: Sequence[int],
    host_indices: Sequence[int],
    *,
    scf_converged: bool,
    relax_converged: bool | None,
    min_distance: float = 0.7,
    guest_host_min: float | None = None,
    envelope: float | None = None,
    guest_alert: float | None = None,
    host_pieces: int | None = None,
    rim_distance: float = 3.0,
    rim_alert: float | None = None,
) -> list[Finding]:
    """All findings for one step's (relaxed) structure, errors first.

    ``guest_host_min``, ``envelope`` and ``guest_alert`` (Å) switch their checks off when None. Distance checks are
    skipped when positions are not finite (that itself is an error finding). ``host_pieces`` is
    the fragment count of the pristine host (None: not checked); ``rim_alert`` the fraction of
    guests at the rim above which a warning is given (None: not checked).
    """
    guests = _check_indices(atoms, "guest_indices", guest_indices)
    hosts = _check_indices(atoms, "host_indices", host_indices)
    if set(guests) & set(hosts):
        raise ValueError(f"atoms {sorted(set(guests) & set(hosts))} are both guest and host")
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
    else:
        out += close_pair_findings(step, atoms, min_distance)
        if guest_host_min is not None:
            out += guest_host_findings(step, atoms, guests, hosts, guest_host_min)
        if envelope is not None:
            out += envelope_findings(step, atoms, guests, hosts, envelope)
        if guest_alert is not None:
            out += guest_pair_findings(step, atoms, guests, guest_alert)
        if host_pieces is not None:
            pieces = host_fragments(atoms, hosts)
            if pieces > host_pieces:
                out.append(
                    Finding(
                        severity="error",
                        code="host-fragmented",
                        message=(
                            f"the host is in {pieces} bonded pieces, it started with "
                            f"{host_pieces}: a bond broke"
                        ),
                        step=step,
                    )
                )
        if rim_alert is not None:
            out += rim_findings(step, atoms, guests, hosts, rim_distance, rim_alert)
    return sorted(out, key=lambda f: -_RANK[f.severity])
