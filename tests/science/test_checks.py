"""Tests of ionwell.science.checks: each finding fires on a structure built to trip it, and only then;
the incremental paths of step_findings (host unchanged, some host atoms moved) find what the
full path finds."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from pydantic import ValidationError

from ionwell.config.campaign import BoxRegion, ChecksConfig, FlakeBuilder
from ionwell.science.checks import (
    MAX_PAIRS,
    Finding,
    HostFacts,
    decision_findings,
    host_digest,
    host_facts,
    level_order_findings,
    metal_neighbour_distance,
    step_findings,
    worst_severity,
)
from ionwell.science.grid import Grid
from ionwell.science.host import build_flake
from ionwell.science.placement import Decision, Galleries, PlaceSettings, Region, place

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
    guest: str | None = None,
    **settings,
) -> tuple[list[Finding], list[Finding]]:
    """Findings of the full path (moved=None) and of the incremental one (``moved``).

    The host facts are those of ``pristine`` (default: the host of ``atoms``).
    """
    cfg = ChecksConfig(**{**_BASE, **settings})
    facts = host_facts(atoms[:n_host] if pristine is None else pristine, cfg)
    kw = {
        "scf_converged": scf_converged,
        "relax_converged": relax_converged,
        "envelope": envelope,
        "guest": guest,
    }
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
    from ionwell.science.checks import host_fragments

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
    from ionwell.science.checks import edge_atoms

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


# --- guests packed tighter than in their elemental solid --------------------------------------


@pytest.mark.parametrize(
    ("element", "handbook", "tol"),
    [
        # handbook nearest-neighbour distances (from memory), Å: bcc Li 3.04 (room temperature;
        # ASE's reference a = 3.49 Å is a low-temperature value, giving 3.02); bcc Na 3.72 (room
        # temperature, a = 4.29 Å; ASE's a = 4.23 Å gives 3.66); hcp Mg 3.20 (a = 3.21 Å,
        # c = 5.21 Å: the out-of-plane neighbours are the nearer); fcc Al 2.86 (a = 4.05 Å)
        ("Li", 3.04, 0.03),
        ("Na", 3.72, 0.07),
        ("Mg", 3.20, 0.01),
        ("Al", 2.86, 0.01),
    ],
)
def test_metal_neighbour_distance_matches_handbook_and_the_built_solid(
    element: str, handbook: float, tol: float
) -> None:
    from ase.build import bulk
    from ase.neighborlist import neighbor_list

    got = metal_neighbour_distance(element)
    assert got == pytest.approx(handbook, abs=tol)
    # cross-check: ASE's own reference solid, its shortest distance by a neighbour list
    d = neighbor_list("d", bulk(element), 5.0)
    assert got == pytest.approx(float(d.min()), abs=1e-9)


def test_metal_neighbour_distance_closed_forms_and_unknowns() -> None:
    # bcc Li from ASE's a = 3.49 Å: a·√3/2
    assert metal_neighbour_distance("Li") == pytest.approx(3.49 * np.sqrt(3) / 2, abs=1e-12)
    assert metal_neighbour_distance("Li") == pytest.approx(3.022, abs=1e-3)
    # built with ase.build.bulk: β-Sn (bct), handbook nearest neighbours about 3.02 Å (memory)
    assert metal_neighbour_distance("Sn") == pytest.approx(3.02, abs=0.02)
    # a molecule, an atom, a state without its atomic basis, no reference state at all
    for element in ("H", "He", "U", "Am"):
        assert metal_neighbour_distance(element) is None
    with pytest.raises(ValueError, match="not a chemical element"):
        metal_neighbour_distance("Qq")


def test_guests_closer_than_metal() -> None:
    # two Li 2.42 Å apart in the gallery: above the 2 Å alert, below 0.9 × 3.02 Å (bcc Li)
    atoms, n = _host_with_guests((-1.21, 0.0, 0.0), (1.21, 0.0, 0.0))
    findings = _run(atoms, n, guest="Li")
    assert _codes(findings) == ["guests-closer-than-metal"]
    f = findings[0]
    assert f.severity == "warning" and f.step == 3
    assert f"guests {n} (Li) and {n + 1} (Li) are 2.420 Å apart (below 2.72 Å" in f.message
    assert "0.9 × 3.022 Å" in f.message and "bcc Li" in f.message
    # off without the guest element, with guest_packing None, or against a shorter distance
    assert _run(atoms, n) == []
    assert _run(atoms, n, guest="Li", guest_packing=None) == []
    assert _run(atoms, n, guest="Li", guest_metal_distance=2.5) == []  # limit 2.25 Å
    found = _run(atoms, n, guest="Li", guest_metal_distance=2.8, guest_packing=1.0)
    assert "guest_metal_distance" in found[0].message and "below 2.8 Å" in found[0].message
    # a guest without a known solid: skipped (ASE's hydrogen is a molecule)
    assert _run(atoms, n, guest="H") == []
    # 4.3 Å apart, the Li–Li distance in LiC6 (√3 × 2.46 Å; handbook, from memory): quiet
    assert _run(*_clean(), guest="Li") == []


def test_guests_closer_than_metal_leaves_closer_pairs_to_the_guest_alert() -> None:
    atoms, n = _host_with_guests((-0.8, 0.0, 0.0), (0.8, 0.0, 0.0), (3.3, 0.0, 0.0))
    # 1.6 Å: guests-too-close only; 2.5 Å (second and third): below the packing limit
    findings = _run(atoms, n, guest="Li")
    assert _codes(findings) == ["guests-too-close", "guests-closer-than-metal"]
    assert f"{n + 1} (Li) and {n + 2} (Li) are 2.500 Å" in findings[1].message
    # without the alert both pairs are packed too tight, the closest first
    findings = _run(atoms, n, guest="Li", guest_alert=None)
    assert _codes(findings) == ["guests-closer-than-metal"] * 2
    assert "1.600 Å" in findings[0].message and "2.500 Å" in findings[1].message


def test_guests_closer_than_metal_across_a_periodic_boundary() -> None:
    # graphite 3×3×1 with two Li in a gallery, 2.42 Å apart through the x face of the cell
    graphite = _graphite_ab().repeat((3, 3, 1))
    n = len(graphite)
    a = graphite.cell.array[0]
    z = D_GRAPHITE / 2
    spots = [[0.3, 1.0, z], list(a + [0.3 - 2.42, 1.0, z])]
    atoms = graphite + Atoms("Li2", positions=spots)
    full, fast = _both(atoms, n, guest="Li", envelope=None)
    assert fast == full and _codes(full) == ["guests-closer-than-metal"]
    assert "2.420 Å" in full[0].message


# --- the placement decision -------------------------------------------------------------------

_N = 30  # a 6 Å open grid at 0.2 Å spacing


def _map(centres, depths, widths, offset: float = 0.0, n: int = _N, spacing: float = 0.2) -> Grid:
    """V = offset - Σ a exp(-|r-c|²/2s²) (V) on an open grid from the origin."""
    g = Grid(np.zeros(3), np.eye(3) * spacing, np.zeros((n, n, n)))
    p = g.points().reshape(-1, 3)
    v = np.full(len(p), float(offset))
    for c, a, s in zip(centres, depths, widths, strict=True):
        v -= a * np.exp(-np.sum((p - np.asarray(c)) ** 2, axis=1) / (2 * s * s))
    return Grid(g.origin, g.axes, v.reshape(g.shape))


def _decision_codes(d: Decision, charge_mode: str = "neutral", **settings) -> list[str]:
    cfg = ChecksConfig(**settings)
    return _codes(decision_findings(7, d, cfg, charge_mode=charge_mode, guest="Li"))


_CARBON = Atoms("C", positions=[[3.0, 3.0, 2.5]])
_ABOVE = _map([(3.0, 3.0, 5.0)], [1.0], [0.8])  # a well 2.5 Å above the carbon


def test_site_on_region_edge() -> None:
    # the well lies outside a 1.8 Å envelope: the chosen site is on the envelope's edge
    d = place(_ABOVE, _CARBON, "Li", PlaceSettings(within=1.8))
    assert d.chosen[0].boundary == "region"
    found = decision_findings(7, d, ChecksConfig(), charge_mode="neutral", guest="Li")
    assert _codes(found) == ["site-on-region-edge"]
    f = found[0]
    assert f.severity == "warning" and f.step == 7 and f.message.startswith("step 7:")
    assert "(3.00, 3.00, 4.20) Å, -0.607 V" in f.message
    assert "not by a minimum of the potential" in f.message
    assert "placement.within (the host envelope, 1.8 Å)" in f.message
    assert "placement.exclusion (C 1.53 Å)" in f.message
    assert "gallery_margin" not in f.message
    # switched off; and quiet with the well inside a 4 Å envelope
    assert _decision_codes(d, site_boundary=False) == []
    assert _decision_codes(place(_ABOVE, _CARBON, "Li", PlaceSettings(within=4.0))) == []


def test_site_on_region_edge_names_galleries_boxes_and_spheres() -> None:
    d = place(_ABOVE, _CARBON, "Li", PlaceSettings(within=1.8))
    region = Region(
        boxes=[BoxRegion(lower=(0.0, 0.0, 0.0), upper=(6.0, 6.0, 6.0))],
        galleries=Galleries(normal=[0.0, 0.0, 1.0], intervals=[(2.0, 6.0)], margin=0.5),
    )
    found = decision_findings(
        7,
        d.model_copy(update={"region": region}),
        ChecksConfig(),
        charge_mode="neutral",
        guest="Li",
    )
    msg = found[0].message
    assert "placement.gallery_margin (0.5 Å, galleries_only)" in msg
    assert "placement.boxes/spheres" in msg and ", or enlarge placement.boxes" in msg


def test_site_on_a_gallery_margin_names_the_margin_alone() -> None:
    # the chosen site (z = 4.20 Å) lies on the lower bound of the gallery (4.2, 6.0): the
    # margin, not the map, sets its height, and the advice says so instead of listing all bounds
    d = place(_ABOVE, _CARBON, "Li", PlaceSettings(within=1.8))
    region = Region(
        galleries=Galleries(normal=[0.0, 0.0, 1.0], intervals=[(4.2, 6.0)], margin=1.2),
    )
    found = decision_findings(
        7,
        d.model_copy(update={"region": region}),
        ChecksConfig(),
        charge_mode="neutral",
        guest="Li",
    )
    msg = found[0].message
    assert "its height is set by the gallery margin (1.2 Å from a layer)" in msg
    assert "placement.within" not in msg
    # a gallery far from the site in height: the general advice
    far = Region(galleries=Galleries(normal=[0.0, 0.0, 1.0], intervals=[(0.5, 3.0)], margin=1.2))
    found = decision_findings(
        7, d.model_copy(update={"region": far}), ChecksConfig(), charge_mode="neutral", guest="Li"
    )
    assert "its height is set" not in found[0].message
    assert "placement.within (the host envelope, 1.8 Å)" in found[0].message


def test_site_on_grid_face() -> None:
    # a well centred 1.2 Å beyond the top face of the grid (z = 5.8 Å)
    face = _map([(3.0, 3.0, 7.0)], [1.0], [1.0])
    d = place(face, Atoms(), "Li", PlaceSettings(within=None))
    assert d.chosen[0].boundary == "grid"
    found = decision_findings(7, d, ChecksConfig(), charge_mode="neutral", guest="Li")
    assert _codes(found) == ["site-on-grid-face"]
    assert "engine.potential_grid.margin" in found[0].message
    assert "(3.00, 3.00, 5.80) Å" in found[0].message and "step 7" in found[0].message
    assert _decision_codes(d, site_boundary=False) == []
    # the same well inside the grid: quiet
    inside = place(_map([(3.0, 3.0, 3.0)], [1.0], [1.0]), Atoms(), "Li", PlaceSettings(within=None))
    assert inside.chosen[0].boundary is None
    assert _decision_codes(inside) == []


def test_well_repels_cation() -> None:
    # a 0.5 V deep well on a +2.5 V plateau: its bottom, +2.0 V, repels a cation (energy z·e·V;
    # electrostatics)
    d = place(
        _map([(3.0, 3.0, 3.0)], [0.5], [0.8], offset=2.5), Atoms(), "Li", PlaceSettings(within=None)
    )
    assert d.chosen[0].potential == pytest.approx(2.0, abs=1e-3)
    found = decision_findings(7, d, ChecksConfig(), charge_mode="cation", guest="Li")
    assert _codes(found) == ["well-repels-cation"]
    assert "+2.000 V" in found[0].message and "repels a Li cation" in found[0].message
    assert "step 7" in found[0].message
    # neutral mode, the check off, or a limit above the well: quiet
    assert _decision_codes(d) == []
    assert _decision_codes(d, "cation", cation_well_max=None) == []
    assert _decision_codes(d, "cation", cation_well_max=2.5) == []
    # the well at -0.5 V: quiet in cation mode too
    low = place(_map([(3.0, 3.0, 3.0)], [0.5], [0.8]), Atoms(), "Li", PlaceSettings(within=None))
    assert _decision_codes(low, "cation") == []


_SIX = [(2.0 + 3.0 * i, 2.0 + 3.0 * j, 5.0) for i in range(3) for j in range(2)]


def _flat(depths: list[float], extra: bool = False) -> Grid:
    centres, widths = list(_SIX), [0.6] * 6
    if extra:  # a clearly shallower seventh well
        centres.append((5.0, 8.5, 5.0))
        depths, widths = [*depths, 0.5], [*widths, 0.6]
    return _map(centres, depths, widths, n=40, spacing=0.25)


def test_map_too_flat() -> None:
    # six wells of equal depth, ±4 mV of noise: all within 0.02 V of the deepest
    noise = np.random.default_rng(3).uniform(-0.004, 0.004, 6)
    d = place(_flat(list(1.0 + noise)), Atoms(), "Li", PlaceSettings(within=None))
    assert len(d.candidates) == 6
    found = decision_findings(7, d, ChecksConfig(), charge_mode="neutral", guest="Li")
    assert _codes(found) == ["map-too-flat"]
    msg = found[0].message
    assert msg.startswith("step 7: all 6 recorded candidate wells lie within 0.02 V")
    assert "records only the placement.candidates deepest" in msg
    assert "engine.potential_grid.spacing" in msg and "'screened'" in msg
    # with a shallower seventh well recorded, six of seven tie
    d7 = place(_flat(list(1.0 + noise), extra=True), Atoms(), "Li", PlaceSettings(within=None))
    msg = decision_findings(7, d7, ChecksConfig(), charge_mode="neutral", guest="Li")[0].message
    assert "6 of the 7 recorded candidate wells" in msg and "records only" not in msg
    # fewer ties than flat_map_wells, a tighter tolerance, or the check off: quiet
    assert _decision_codes(d, flat_map_wells=7) == []
    assert _decision_codes(d, flat_map_tolerance=0.001) == []
    assert _decision_codes(d, flat_map_tolerance=None) == []
    # one clearly deepest well (0.1 V below the rest): quiet
    deep = place(_flat([1.1, *list(1.0 + noise[1:])]), Atoms(), "Li", PlaceSettings(within=None))
    assert _decision_codes(deep) == []


def test_decision_without_sites_has_no_findings() -> None:
    d = place(_ABOVE, _CARBON, "Li", PlaceSettings(exclusion={"C": 9.0}, within=3.0))
    assert d.chosen == [] and d.candidates == []
    assert _decision_codes(d, "cation") == []


def test_negative_voltage_step_is_flagged_and_a_positive_profile_is_quiet():
    # Worked example (the voltage formula of Aydinol et al., Phys. Rev. B 56, 1354 (1997)):
    # E(0) = 0, E(1) = -2.0, E(2) = -2.5 eV with mu = -1.0 eV gives V(0->1) = +1.0 V and
    # V(1->2) = -(-2.5 + 2.0 + 1.0) = -0.5 V, a negative step (Li would rather plate as metal).
    from ionwell.science.checks import voltage_findings
    from ionwell.science.energetics import voltage_profile

    steps = voltage_profile([0.0, -2.0, -2.5], [0, 1, 2], mu=-1.0)
    assert [s.voltage for s in steps] == pytest.approx([1.0, -0.5])
    found = voltage_findings(steps, 0.0, {0: 0, 1: 1, 2: 4})
    assert [(f.code, f.step) for f in found] == [("negative-voltage", 4)]
    assert "-0.500 V" in found[0].message
    # a positive profile and a switched-off check are quiet; another floor has its own code
    assert voltage_findings(voltage_profile([0.0, -2.0, -3.5], [0, 1, 2], -1.0), 0.0, {}) == []
    assert voltage_findings(steps, None, {}) == []
    assert [f.code for f in voltage_findings(steps, 1.5, {})] == ["voltage-below-floor"] * 2


def test_a_smeared_campaign_with_energies_of_two_kinds_is_an_error():
    # The zero-width estimate E - σS/2 and the internal energy E of a smeared SCF differ by
    # σS/2 (Mermin's functional, F = E - σS; common practice): steps recorded before ionwell
    # kept the free energy carry E, so a hull across both kinds is off at those steps.
    from ionwell.science.checks import smeared_energy_findings

    assert smeared_energy_findings([0, 1, 2], [-10.0, -11.0, -12.0]) == []  # all new
    assert smeared_energy_findings([0, 1, 2], [None, None, None]) == []  # all old: one kind
    (f,) = smeared_energy_findings([0, 1, 2, 3], [None, None, -12.0, -13.0])
    assert (f.code, f.severity, f.step) == ("mixed-smeared-energies", "error", 0)
    assert f.message.startswith("steps 0, 1 were recorded by an earlier ionwell")
    many = smeared_energy_findings(list(range(13)), [None] * 12 + [-1.0])
    assert "0, 1, 2, 3, 4, 5, 6, 7, 8, 9, ..." in many[0].message


# level order: the aufbau principle (filled levels lowest without smearing; common practice)
def test_level_order_flags_a_hole_below_an_empty_level() -> None:
    levels = [[-10.0, -5.0, -1.0, 0.5]]
    assert level_order_findings(3, levels, [[2, 2, 0, 0]], 0.1) == []  # aufbau
    (f,) = level_order_findings(3, levels, [[2, 0, 2, 0]], 0.1)  # -5 eV empty, -1 eV filled
    assert (f.code, f.severity, f.step) == ("empty-level-below-filled", "warning", 3)
    assert "4.00 eV" in f.message and "spin" not in f.message
    # within the tolerance (near-degenerate levels in either order): quiet
    assert level_order_findings(3, [[-10.0, -5.0, -4.95]], [[2, 0, 2]], 0.1) == []
    assert level_order_findings(3, levels, [[2, 0, 2, 0]], None) == []  # switched off


def test_level_order_names_the_spin_and_skips_smeared_levels() -> None:
    up, down = [-6.0, -3.0, -2.0], [-6.0, -3.0, -2.5]
    (f,) = level_order_findings(0, [up, down], [[1, 1, 0], [1, 0, 1]], 0.1)
    assert "0.50 eV" in f.message and "(spin down)" in f.message
    # fractional occupations (smearing) are part of the model: no judgement
    assert level_order_findings(0, [[-5.0, -4.0, 0.0]], [[2.0, 0.4, 1.6]], 0.1) == []
    assert level_order_findings(0, None, None, 0.1) == []
