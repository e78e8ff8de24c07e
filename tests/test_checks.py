"""Tests of ionwell.checks: each finding fires on a structure built to trip it, and only then;
the incremental paths of step_findings (host unchanged, some host atoms moved) find what the
full path finds."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from pydantic import ValidationError

from ionwell.checks import (
    MAX_PAIRS,
    Finding,
    HostFacts,
    host_digest,
    host_facts,
    step_findings,
    worst_severity,
)
from ionwell.config import ChecksConfig, FlakeBuilder
from ionwell.host import build_flake

A_GRAPHITE = 2.46  # Å, in-plane lattice constant of graphite (handbook value)
D_GRAPHITE = 3.35  # Å, interlayer spacing of graphite (handbook value)

#: the checks of the tests unless a test says otherwise: the old keyword defaults
#: (fragment and rim checks off) with a 2 Å guest alert
_BASE = {"guest_alert": 2.0, "connectivity": False, "rim_alert": None}


def _host_with_guests(*guest_positions: tuple[float, float, float]) -> tuple[Atoms, int]:
    host = build_flake(FlakeBuilder(shells=2, layers=2))
    atoms = host + Atoms("Li" * len(guest_positions), positions=list(guest_positions))
    return atoms, len(host)


def _clean() -> tuple[Atoms, int]:
    # two Li in the gallery (z = 0, midway between sheets at ±1.675 Å), 4.3 Å apart
    return _host_with_guests((-2.15, 0.0, 0.0), (2.15, 0.0, 0.0))


def _graphite_ab() -> Atoms:
    """Bernal graphite, 2 layers per cell: A at z = 0 (0,0), (1/3,2/3); B at c/2 (0,0), (2/3,1/3)."""
    a, c = A_GRAPHITE, 2 * D_GRAPHITE
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    scaled = [[0, 0, 0], [1 / 3, 2 / 3, 0], [0, 0, 0.5], [2 / 3, 1 / 3, 0.5]]
    return Atoms("C4", scaled_positions=scaled, cell=cell, pbc=True)


def _both(
    atoms: Atoms,
    n_host: int,
    *,
    envelope: float | None = 3.0,
    scf_converged: bool = True,
    relax_converged: bool | None = True,
    moved: list[int] | tuple[int, ...] = (),
    pristine: Atoms | None = None,
    **settings,
) -> tuple[list[Finding], list[Finding]]:
    """Findings of the full path (moved=None) and of the incremental one (``moved``).

    The host facts are those of ``pristine`` (default: the host of ``atoms``).
    """
    cfg = ChecksConfig(**{**_BASE, **settings})
    facts = host_facts(atoms[:n_host] if pristine is None else pristine, cfg)
    kw = {"scf_converged": scf_converged, "relax_converged": relax_converged, "envelope": envelope}
    full = step_findings(3, atoms, n_host, cfg, facts, **kw)
    fast = step_findings(3, atoms, n_host, cfg, facts, moved=moved, **kw)
    return full, fast


def _run(atoms: Atoms, n_host: int, **kw) -> list[Finding]:
    """The full path's findings, after checking that the host-unchanged path agrees."""
    full, fast = _both(atoms, n_host, **kw)
    assert fast == full
    return full


def _codes(findings: list[Finding]) -> list[str]:
    return [f.code for f in findings]


def test_clean_structure_has_no_findings() -> None:
    assert _run(*_clean()) == []
    assert _run(*_clean(), relax_converged=None) == []
    assert _run(*_clean(), connectivity=True, rim_alert=0.6, guest_host_min=1.5) == []
    assert worst_severity([]) is None


def test_scf_not_converged() -> None:
    findings = _run(*_clean(), scf_converged=False)
    assert _codes(findings) == ["scf-not-converged"]
    assert findings[0].severity == "error" and findings[0].step == 3


def test_relax_not_converged() -> None:
    findings = _run(*_clean(), relax_converged=False)
    assert _codes(findings) == ["relax-not-converged"]
    assert findings[0].severity == "warning"


def test_atoms_too_close_names_indices_and_distance() -> None:
    atoms, n = _clean()
    atoms.positions[n] = atoms.positions[0] + [0.0, 0.0, 0.5]
    findings = _run(atoms, n, envelope=None, guest_alert=None)
    assert _codes(findings) == ["atoms-too-close"]
    assert findings[0].severity == "error"
    assert f"0 (C) and {n} (Li)" in findings[0].message
    assert "0.500 Å" in findings[0].message


def test_atoms_too_close_respects_threshold() -> None:
    atoms, n = _clean()
    atoms.positions[n] = atoms.positions[0] + [0.0, 0.0, 0.9]
    assert "atoms-too-close" not in _codes(_run(atoms, n))
    assert "atoms-too-close" in _codes(_run(atoms, n, min_distance=1.0))


def test_atoms_too_close_across_periodic_boundary() -> None:
    atoms = Atoms("CLi", positions=[[4.8, 1, 1], [0.1, 1, 1]], cell=[5, 5, 5], pbc=True)
    findings = _run(atoms, 1, envelope=None, relax_converged=None)
    assert _codes(findings) == ["atoms-too-close"]
    assert "0.300 Å" in findings[0].message


def test_many_close_pairs_are_capped() -> None:
    # host-only pairs: only the full path looks at them (the incremental ones trust step 0)
    n = MAX_PAIRS + 5
    atoms = Atoms(
        "H" * (2 * n), positions=[[5.0 * (i // 2), 0, 0.3 * (i % 2)] for i in range(2 * n)]
    )
    full, fast = _both(atoms, 2 * n, relax_converged=None)
    assert len(full) == MAX_PAIRS + 1
    assert "5 more pairs" in full[-1].message
    assert fast == []
    # the same pairs made of guests (one host atom far away): every path lists them
    atoms = Atoms("C", positions=[[0, 0, 50]]) + atoms
    full, fast = _both(atoms, 1, envelope=None, guest_alert=None, relax_converged=None)
    assert fast == full and len(full) == MAX_PAIRS + 1


def test_guest_outside_envelope() -> None:
    atoms, n = _host_with_guests((-2.15, 0.0, 0.0), (0.0, 0.0, 9.0))
    findings = _run(atoms, n)
    assert _codes(findings) == ["guest-outside-envelope"]
    assert findings[0].severity == "warning"
    assert f"guest {n + 1} (Li)" in findings[0].message
    # the same structure with a wider envelope, or the check off, is quiet
    assert _run(atoms, n, envelope=10.0) == []
    assert _run(atoms, n, envelope=None) == []


def test_guests_too_close() -> None:
    atoms, n = _host_with_guests((-0.8, 0.0, 0.0), (0.8, 0.0, 0.0))
    findings = _run(atoms, n)
    assert _codes(findings) == ["guests-too-close"]
    assert findings[0].severity == "warning"
    assert "1.600 Å" in findings[0].message
    assert _run(atoms, n, guest_alert=1.5) == []
    assert _run(atoms, n, guest_alert=None) == []


def test_non_finite_positions() -> None:
    atoms, n = _clean()
    atoms.positions[n + 1] = [np.nan, 0.0, 0.0]
    findings = _run(atoms, n)
    assert _codes(findings) == ["non-finite-positions"]
    assert str(n + 1) in findings[0].message


def test_errors_come_first() -> None:
    findings = _run(*_clean(), scf_converged=False, relax_converged=False)
    assert [f.severity for f in findings] == ["error", "warning"]
    assert worst_severity(findings) == "error"


def test_bad_arguments_are_refused() -> None:
    atoms, n = _clean()
    cfg = ChecksConfig()
    facts = host_facts(atoms[:n], cfg)
    kw = {"scf_converged": True, "relax_converged": None, "envelope": None}
    with pytest.raises(ValueError, match="outside"):
        step_findings(0, atoms, len(atoms) + 1, cfg, facts, **kw)
    with pytest.raises(ValueError, match="host facts are of"):
        step_findings(0, atoms, n - 1, cfg, facts, **kw)
    with pytest.raises(ValueError, match="not host atoms"):
        step_findings(0, atoms, n, cfg, facts, moved=[n], **kw)
    with pytest.raises(ValueError, match="rim_distance"):
        step_findings(0, atoms, n, ChecksConfig(rim_distance=2.0), facts, **kw)
    swapped = atoms.copy()
    swapped.numbers[[0, n]] = swapped.numbers[[n, 0]]
    with pytest.raises(ValueError, match="not the elements"):
        step_findings(0, swapped, n, cfg, facts, **kw)


def test_finding_model() -> None:
    f = Finding(severity="info", code="my-check", message="m", step=0)
    assert Finding.model_validate_json(f.model_dump_json()) == f
    with pytest.raises(ValidationError):
        Finding(severity="fatal", code="x", message="m", step=0)
    with pytest.raises(ValidationError):
        Finding(severity="info", code="Not Kebab", message="m", step=0)


# --- host connectivity and edge crowding ------------------------------------------------------


def _pull_ch(atoms: Atoms) -> tuple[Atoms, list[int]]:
    """Pull the CH unit of carbon 0 (first ring) 3 Å outwards: its two C–C bonds break."""
    broken = atoms.copy()
    c0 = 0
    h0 = next(
        i
        for i in range(len(broken))
        if broken[i].symbol == "H" and broken.get_distance(c0, i) < 1.2
    )
    out = broken.positions[c0] - broken.positions[:6].mean(axis=0)
    out /= np.linalg.norm(out)
    broken.positions[[c0, h0]] += 3.0 * out
    return broken, [c0, h0]


def test_host_fragments_counts_sheets_and_a_broken_bond():
    from ionwell.checks import host_fragments

    # two sheets of a bilayer are two bonded pieces (3.35 Å apart, far beyond any C–C bond)
    bilayer = build_flake(FlakeBuilder(layers=2, shells=1))
    n = len(bilayer)
    hosts = list(range(n))
    assert host_fragments(bilayer, hosts) == 2
    # covalent radius of C 0.76 Å in ase.data, so 1.2×1.52 Å is the bond cut-off (C–C 1.42 Å)
    broken, pulled = _pull_ch(bilayer)
    assert host_fragments(broken, hosts) == 3
    cfg = ChecksConfig(**{**_BASE, "connectivity": True})
    facts = host_facts(bilayer, cfg)
    assert facts.host_fragments == 2
    kw = {"scf_converged": True, "relax_converged": None, "envelope": None}
    moved = facts.moved(broken)
    assert moved == pulled
    found = step_findings(4, broken, n, cfg, facts, **kw)
    assert [f.code for f in found] == ["host-fragmented"]
    assert step_findings(4, broken, n, cfg, facts, moved=moved, **kw) == found
    # told the host is unchanged, the check trusts the facts
    assert step_findings(4, broken, n, cfg, facts, moved=(), **kw) == []
    assert not step_findings(4, bilayer, n, cfg, facts, **kw)
    assert not step_findings(4, bilayer, n, cfg, facts, moved=(), **kw)


def test_edge_crowding_fires_for_rim_guests_only_on_a_particle():
    from ionwell.checks import edge_atoms

    flake = build_flake(FlakeBuilder(layers=2, shells=3))  # circumcoronene bilayer: has interior
    n = len(flake)
    edge = edge_atoms(flake, list(range(n)))
    # circumcoronene C54H18: 18 H and the 18 C that carry them are the edge (per sheet)
    assert len(edge) == 2 * 36
    facts = host_facts(flake, ChecksConfig())
    assert list(facts.edge_atoms) == edge and facts.interior
    z_mid = flake.positions[:, 2].mean()
    rim_xy = flake.positions[[i for i in edge if flake[i].symbol == "H"]][:, :2]
    rim_guests = Atoms(
        "Li3", positions=[[*(0.8 * xy), z_mid] for xy in rim_xy[:3]]
    )  # 80 % of the way to an edge hydrogen, in the gallery
    centre_guests = Atoms("Li", positions=[[0.0, 0.0, z_mid]])
    crowded = flake + rim_guests + centre_guests
    found = _run(crowded, n, envelope=None, guest_alert=None, relax_converged=None, rim_alert=0.5)
    assert [f.code for f in found] == ["edge-crowding"]
    assert "3 of 4 guests" in found[0].message
    calm = flake + centre_guests
    assert not _run(calm, n, envelope=None, guest_alert=None, relax_converged=None, rim_alert=0.5)
    # a molecule-sized host (benzene bilayer) has no interior: no rim alert at all
    small = build_flake(FlakeBuilder(layers=2, shells=1))
    assert not host_facts(small, ChecksConfig()).interior
    both = small + Atoms("Li", positions=[[0.0, 0.0, small.positions[:, 2].mean()]])
    assert not _run(
        both, len(small), envelope=None, guest_alert=None, relax_converged=None, rim_alert=0.0
    )


def test_guest_on_host_atom() -> None:
    # a Li 1.0 Å above a carbon of the top sheet (sheet at z = +1.675 Å): far closer than any
    # Li–C contact (about 2.2–2.3 Å, common practice), but not closer than the 0.7 Å pair bound
    host = build_flake(FlakeBuilder(shells=2, layers=2))
    c = next(i for i, a in enumerate(host) if a.symbol == "C" and a.position[2] > 1.0)
    spot = tuple(host.positions[c] + [0.0, 0.0, 1.0])
    atoms, n = _host_with_guests((-2.15, 0.0, 0.0), spot)
    findings = _run(atoms, n, guest_host_min=1.5)
    assert _codes(findings) == ["guest-on-host-atom"]
    assert findings[0].severity == "error"
    assert (
        f"guest {n + 1} (Li)" in findings[0].message and f"host atom {c} (C)" in findings[0].message
    )
    assert "1.000 Å" in findings[0].message
    # off by default, and quiet on the clean structure
    assert _run(atoms, n) == []
    assert _run(*_clean(), guest_host_min=1.5) == []


# --- host facts -------------------------------------------------------------------------------


def test_host_facts_round_trip_and_moved() -> None:
    flake = build_flake(FlakeBuilder(layers=2, shells=2))
    facts = host_facts(flake, ChecksConfig())
    assert facts.n_host == len(flake) and facts.host_fragments == 2
    assert facts.digest == host_digest(flake)
    assert HostFacts.model_validate_json(facts.model_dump_json()) == facts
    with_guest = flake + Atoms("Li", positions=[[0.0, 0.0, 0.0]])
    assert host_digest(with_guest, len(flake)) == facts.digest
    assert facts.moved(with_guest) == []
    shifted = with_guest.copy()
    shifted.positions[5] += [0.0, 0.0, 0.01]
    assert facts.moved(shifted) == [5]
    assert facts.moved(shifted, tol=0.1) == []
    assert host_digest(shifted, len(flake)) != facts.digest
    with pytest.raises(ValueError, match="not the elements"):
        facts.moved(with_guest[1:])
    # periodic: an atom wrapped by a lattice vector has not moved; the cell and pbc are kept
    graphite = _graphite_ab().repeat((3, 3, 1))
    gfacts = host_facts(graphite, ChecksConfig())
    assert gfacts.host_fragments == 2 and gfacts.edge_atoms == () and not gfacts.interior
    wrapped = graphite.copy()
    wrapped.positions[4] += wrapped.cell[0]
    assert gfacts.moved(wrapped) == []
    assert HostFacts.model_validate_json(gfacts.model_dump_json()) == gfacts


# --- the incremental paths agree with the full one --------------------------------------------


def test_unchanged_host_finds_the_same_as_the_full_check() -> None:
    # one structure that trips every guest check: two guests 0.5 Å apart (atoms-too-close and
    # guests-too-close), one 1.2 Å over a carbon (guest-on-host-atom), one far out (envelope),
    # and guests at the rim of a host with an interior (edge-crowding)
    flake = build_flake(FlakeBuilder(layers=2, shells=3))
    n = len(flake)
    c = next(i for i, a in enumerate(flake) if a.symbol == "C" and a.position[2] > 1.0)
    h = [i for i, a in enumerate(flake) if a.symbol == "H"]
    z_mid = flake.positions[:, 2].mean()
    spots = [
        (2.0, 0.0, z_mid),
        (2.5, 0.0, z_mid),
        tuple(flake.positions[c] + [0.0, 0.0, 1.2]),
        (0.0, 0.0, 15.0),
        *[(*(0.85 * flake.positions[k, :2]), z_mid) for k in h[:6]],
    ]
    atoms = flake + Atoms("Li" * len(spots), positions=spots)
    everything = {"guest_host_min": 1.5, "guest_alert": 1.8, "connectivity": True}
    full, fast = _both(atoms, n, rim_alert=0.3, **everything)
    assert fast == full
    assert set(_codes(full)) == {
        "atoms-too-close",
        "guests-too-close",
        "guest-on-host-atom",
        "guest-outside-envelope",
        "edge-crowding",
    }
    assert f"{n} (Li) and {n + 1} (Li) are 0.500 Å" in full[0].message


@pytest.mark.parametrize("seed", [1, 2])
def test_random_guests_on_a_flake_agree(seed: int) -> None:
    # many guests at random, many of them too close to host atoms and to each other: the lists
    # (capped at MAX_PAIRS, ordered by distance) must be the same on both paths
    flake = build_flake(FlakeBuilder(layers=3, shells=2))
    rng = np.random.default_rng(seed)
    lo, hi = flake.positions.min(axis=0) - 2.0, flake.positions.max(axis=0) + 2.0
    atoms = flake + Atoms("Li40", positions=rng.uniform(lo, hi, size=(40, 3)))
    full, fast = _both(atoms, len(flake), guest_host_min=1.5, min_distance=1.0, rim_alert=0.0)
    assert fast == full
    assert {"atoms-too-close", "guests-too-close", "guest-on-host-atom"} <= set(_codes(full))


def test_periodic_close_pairs_across_the_boundary_agree() -> None:
    graphite = _graphite_ab().repeat((3, 3, 1))
    n = len(graphite)
    cell = graphite.cell.array
    gallery = D_GRAPHITE / 2
    # a guest just inside the far x face, 0.4 Å from the carbon at the origin across the
    # boundary; two guests 0.6 Å apart across the y face; one guest outside the cell (unwrapped)
    spots = np.array(
        [
            cell[0] - [0.4, 0.0, 0.0],
            [0.0, 0.0, gallery] + 0.3 * cell[0] + cell[1] - [0.0, 0.3, 0.0],
            [0.0, 0.3, gallery] + 0.3 * cell[0],
            [0.0, 0.0, gallery] + 0.6 * cell[0] + 0.5 * cell[1] - 2 * cell[2],
        ]
    )
    atoms = graphite + Atoms("Li4", positions=spots)
    full, fast = _both(atoms, n, envelope=None, guest_host_min=1.5, guest_alert=1.8)
    assert fast == full
    assert _codes(full) == [
        "atoms-too-close",
        "atoms-too-close",
        "guest-on-host-atom",
        "guests-too-close",
    ]
    assert f"0 (C) and {n} (Li) are 0.400 Å" in full[0].message
    assert f"{n + 1} (Li) and {n + 2} (Li) are 0.600 Å" in full[1].message
    # periodic along x and y only (a slab), in a skewed cell
    slab = atoms.copy()
    slab.pbc = [True, True, False]
    slab.cell[1] += [1.0, 0.0, 0.0]
    full, fast = _both(slab, n, envelope=None, guest_host_min=1.5, guest_alert=1.8)
    assert fast == full and "atoms-too-close" in _codes(full)


def test_random_guests_in_a_skewed_cell_agree() -> None:
    # a skewed cell, periodic in two directions; host atoms at least 1 Å apart, guests anywhere
    # (also outside the cell): every guest pair and guest–host pair below the bound is found
    rng = np.random.default_rng(7)
    cell = np.array([[7.0, 0.0, 0.0], [2.5, 6.0, 0.0], [0.5, 0.8, 9.0]])
    host = Atoms(cell=cell, pbc=[True, True, False])
    while len(host) < 12:
        trial = host + Atoms("C", scaled_positions=rng.random((1, 3)), cell=cell)
        if len(host) == 0 or trial.get_distances(len(host), range(len(host)), mic=True).min() > 1:
            host = trial
    guests = Atoms("Li30", scaled_positions=rng.uniform(-0.5, 1.5, (30, 3)), cell=cell)
    atoms = host + guests
    full, fast = _both(atoms, len(host), envelope=4.0, guest_host_min=1.2, min_distance=1.0)
    assert fast == full
    assert "atoms-too-close" in _codes(full)


def test_moved_host_atom_onto_another_is_found() -> None:
    # relax.move: all: a host carbon driven 0.3 Å from its neighbour — a host–host pair that
    # only a check told about the moved atom can see
    atoms, n = _clean()
    pristine = atoms[:n]
    atoms.positions[0] = atoms.positions[1] + [0.0, 0.0, 0.3]
    moved = host_facts(pristine, ChecksConfig()).moved(atoms)
    assert moved == [0]
    kw = {"pristine": pristine, "connectivity": True, "rim_alert": 0.6}
    full, fast = _both(atoms, n, moved=moved, **kw)
    assert fast == full
    assert _codes(full)[0] == "atoms-too-close"
    assert "0 (C) and 1 (C) are 0.300 Å" in full[0].message
    # told the host is unchanged, the incremental check does not look at host pairs
    _, blind = _both(atoms, n, moved=(), **kw)
    assert "atoms-too-close" not in _codes(blind)
