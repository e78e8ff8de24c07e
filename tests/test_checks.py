"""Tests of ionwell.checks: each finding fires on a structure built to trip it, and only then."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from pydantic import ValidationError

from ionwell.checks import MAX_PAIRS, Finding, step_findings, worst_severity
from ionwell.config import FlakeBuilder
from ionwell.host import build_flake


def _host_with_guests(*guest_positions: tuple[float, float, float]) -> tuple[Atoms, list, list]:
    host = build_flake(FlakeBuilder(shells=2, layers=2))
    n = len(host)
    atoms = host + Atoms("Li" * len(guest_positions), positions=list(guest_positions))
    return atoms, list(range(n, len(atoms))), list(range(n))


def _clean() -> tuple[Atoms, list, list]:
    # two Li in the gallery (z = 0, midway between sheets at ±1.675 Å), 4.3 Å apart
    return _host_with_guests((-2.15, 0.0, 0.0), (2.15, 0.0, 0.0))


def _run(atoms, guests, hosts, **kw) -> list[Finding]:
    args = {"scf_converged": True, "relax_converged": True, "envelope": 3.0, "guest_alert": 2.0}
    args.update(kw)
    return step_findings(3, atoms, guests, hosts, **args)


def _codes(findings: list[Finding]) -> list[str]:
    return [f.code for f in findings]


def test_clean_structure_has_no_findings() -> None:
    assert _run(*_clean()) == []
    assert _run(*_clean(), relax_converged=None) == []
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
    atoms, guests, hosts = _clean()
    c0 = atoms.positions[0]
    atoms.positions[guests[0]] = c0 + [0.0, 0.0, 0.5]
    findings = _run(atoms, guests, hosts, envelope=None, guest_alert=None)
    assert _codes(findings) == ["atoms-too-close"]
    assert findings[0].severity == "error"
    assert f"0 (C) and {guests[0]} (Li)" in findings[0].message
    assert "0.500 Å" in findings[0].message


def test_atoms_too_close_respects_threshold() -> None:
    atoms, guests, hosts = _clean()
    atoms.positions[guests[0]] = atoms.positions[0] + [0.0, 0.0, 0.9]
    assert "atoms-too-close" not in _codes(_run(atoms, guests, hosts))
    assert "atoms-too-close" in _codes(_run(atoms, guests, hosts, min_distance=1.0))


def test_atoms_too_close_across_periodic_boundary() -> None:
    atoms = Atoms("LiC", positions=[[0.1, 1, 1], [4.8, 1, 1]], cell=[5, 5, 5], pbc=True)
    findings = step_findings(0, atoms, [0], [1], scf_converged=True, relax_converged=None)
    assert _codes(findings) == ["atoms-too-close"]
    assert "0.300 Å" in findings[0].message


def test_many_close_pairs_are_capped() -> None:
    n = MAX_PAIRS + 5
    atoms = Atoms(
        "H" * (2 * n), positions=[[5.0 * (i // 2), 0, 0.3 * (i % 2)] for i in range(2 * n)]
    )
    findings = step_findings(1, atoms, [], range(2 * n), scf_converged=True, relax_converged=None)
    assert len(findings) == MAX_PAIRS + 1
    assert "5 more pairs" in findings[-1].message


def test_guest_outside_envelope() -> None:
    atoms, guests, hosts = _host_with_guests((-2.15, 0.0, 0.0), (0.0, 0.0, 9.0))
    findings = _run(atoms, guests, hosts)
    assert _codes(findings) == ["guest-outside-envelope"]
    assert findings[0].severity == "warning"
    assert f"guest {guests[1]} (Li)" in findings[0].message
    # the same structure with a wider envelope, or the check off, is quiet
    assert _run(atoms, guests, hosts, envelope=10.0) == []
    assert _run(atoms, guests, hosts, envelope=None) == []


def test_guests_too_close() -> None:
    atoms, guests, hosts = _host_with_guests((-0.8, 0.0, 0.0), (0.8, 0.0, 0.0))
    findings = _run(atoms, guests, hosts)
    assert _codes(findings) == ["guests-too-close"]
    assert findings[0].severity == "warning"
    assert "1.600 Å" in findings[0].message
    assert _run(atoms, guests, hosts, guest_alert=1.5) == []
    assert _run(atoms, guests, hosts, guest_alert=None) == []


def test_non_finite_positions() -> None:
    atoms, guests, hosts = _clean()
    atoms.positions[guests[1]] = [np.nan, 0.0, 0.0]
    findings = _run(atoms, guests, hosts)
    assert _codes(findings) == ["non-finite-positions"]
    assert str(guests[1]) in findings[0].message


def test_errors_come_first() -> None:
    findings = _run(*_clean(), scf_converged=False, relax_converged=False)
    assert [f.severity for f in findings] == ["error", "warning"]
    assert worst_severity(findings) == "error"


def test_bad_indices_are_refused() -> None:
    atoms, guests, hosts = _clean()
    with pytest.raises(ValueError, match="guest_indices"):
        _run(atoms, [len(atoms)], hosts)
    with pytest.raises(ValueError, match="both guest and host"):
        _run(atoms, guests, hosts + guests[:1])


def test_finding_model() -> None:
    f = Finding(severity="info", code="my-check", message="m", step=0)
    assert Finding.model_validate_json(f.model_dump_json()) == f
    with pytest.raises(ValidationError):
        Finding(severity="fatal", code="x", message="m", step=0)
    with pytest.raises(ValidationError):
        Finding(severity="info", code="Not Kebab", message="m", step=0)


# --- host connectivity and edge crowding ------------------------------------------------------


def test_host_fragments_counts_sheets_and_a_broken_bond():
    from ionwell.checks import host_fragments

    # two sheets of a bilayer are two bonded pieces (3.35 Å apart, far beyond any C–C bond)
    bilayer = build_flake(FlakeBuilder(layers=2, shells=1))
    hosts = list(range(len(bilayer)))
    assert host_fragments(bilayer, hosts) == 2
    # pull one CH unit of the first ring 3 Å outwards: its two C–C bonds break (C–C 1.42 Å,
    # covalent radius of C 0.76 Å in ase.data, so 1.2×1.52 Å is the bond cut-off)
    broken = bilayer.copy()
    c0 = 0
    h0 = next(
        i
        for i in range(len(broken))
        if broken[i].symbol == "H" and broken.get_distance(c0, i) < 1.2
    )
    out = broken.positions[c0] - broken.positions[:6].mean(axis=0)
    out /= np.linalg.norm(out)
    broken.positions[[c0, h0]] += 3.0 * out
    assert host_fragments(broken, hosts) == 3
    found = step_findings(
        4, broken, [], hosts, scf_converged=True, relax_converged=None, host_pieces=2
    )
    assert [f.code for f in found] == ["host-fragmented"]
    assert not step_findings(
        4, bilayer, [], hosts, scf_converged=True, relax_converged=None, host_pieces=2
    )


def test_edge_crowding_fires_for_rim_guests_only_on_a_particle():
    from ase import Atoms

    from ionwell.checks import edge_atoms

    flake = build_flake(FlakeBuilder(layers=2, shells=3))  # circumcoronene bilayer: has interior
    hosts = list(range(len(flake)))
    edge = edge_atoms(flake, hosts)
    # circumcoronene C54H18: 18 H and the 18 C that carry them are the edge (per sheet)
    assert len(edge) == 2 * 36
    z_mid = flake.positions[:, 2].mean()
    rim_xy = flake.positions[[i for i in edge if flake[i].symbol == "H"]][:, :2]
    rim_guests = Atoms(
        "Li3", positions=[[*(0.8 * xy), z_mid] for xy in rim_xy[:3]]
    )  # 80 % of the way to an edge hydrogen, in the gallery
    centre_guests = Atoms("Li", positions=[[0.0, 0.0, z_mid]])
    crowded = flake + rim_guests + centre_guests
    g = list(range(len(flake), len(crowded)))
    found = step_findings(
        5, crowded, g, hosts, scf_converged=True, relax_converged=None, rim_alert=0.5
    )
    assert [f.code for f in found] == ["edge-crowding"]
    assert "3 of 4 guests" in found[0].message
    calm = flake + centre_guests
    assert not step_findings(
        5, calm, [len(flake)], hosts, scf_converged=True, relax_converged=None, rim_alert=0.5
    )
    # a molecule-sized host (benzene bilayer) has no interior: no rim alert at all
    small = build_flake(FlakeBuilder(layers=2, shells=1))
    both = small + Atoms("Li", positions=[[0.0, 0.0, small.positions[:, 2].mean()]])
    assert not step_findings(
        5,
        both,
        [len(small)],
        list(range(len(small))),
        scf_converged=True,
        relax_converged=None,
        rim_alert=0.0,
    )


def test_guest_on_host_atom() -> None:
    # a Li 1.0 Å above a carbon of the top sheet (sheet at z = +1.675 Å): far closer than any
    # Li–C contact (about 2.2–2.3 Å, common practice), but not closer than the 0.7 Å pair bound
    host = build_flake(FlakeBuilder(shells=2, layers=2))
    c = next(i for i, a in enumerate(host) if a.symbol == "C" and a.position[2] > 1.0)
    spot = tuple(host.positions[c] + [0.0, 0.0, 1.0])
    atoms, guests, hosts = _host_with_guests((-2.15, 0.0, 0.0), spot)
    findings = _run(atoms, guests, hosts, guest_host_min=1.5)
    assert _codes(findings) == ["guest-on-host-atom"]
    assert findings[0].severity == "error"
    assert (
        f"guest {guests[1]} (Li)" in findings[0].message
        and f"host atom {c} (C)" in findings[0].message
    )
    assert "1.000 Å" in findings[0].message
    # off by default, and quiet on the clean structure
    assert _run(atoms, guests, hosts) == []
    assert _run(*_clean(), guest_host_min=1.5) == []
