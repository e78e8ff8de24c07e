"""Tests of ionwell.placement and the ``place`` subcommand on analytic potential maps.

The reference for every well position is the analytic potential built in the test,
V(r) = -Σ a_i exp(-|r - c_i|² / 2 s_i²) (+ sharp positive peaks on the nuclei where a sign must
be told), minimised with scipy.optimize.minimize.
"""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii
from ase.io import write as ase_write
from scipy.optimize import minimize

from ionwell import cli_place
from ionwell.errors import GridError, PlacementError
from ionwell.grid import Grid, orient, save_npz, write_cube
from ionwell.placement import (
    Decision,
    admissible_mask,
    default_exclusion,
    find_wells,
    place,
)

SPACING = 0.2
N = 50  # 10 Å box


def _wells(points, centres, depths, widths, period=None):
    """V = -Σ a exp(-|r-c|²/2s²); with ``period`` (Å, orthogonal cubic cell) over 27 images."""
    v = np.zeros(len(points))
    shifts = [np.zeros(3)]
    if period is not None:
        shifts = [np.array(s) * period for s in np.ndindex(3, 3, 3)]
        shifts = [s - period for s in shifts]
    for c, a, s in zip(centres, depths, widths, strict=True):
        for sh in shifts:
            d2 = np.sum((points - (np.asarray(c) + sh)) ** 2, axis=-1)
            v -= a * np.exp(-d2 / (2 * s * s))
    return v


def _grid(fn, n=N, spacing=SPACING, pbc=(False, False, False), axes=None):
    axes = np.eye(3) * spacing if axes is None else np.asarray(axes)
    g = Grid(np.zeros(3), axes, np.zeros((n, n, n)), pbc)
    return Grid(g.origin, g.axes, fn(g.points()).reshape(g.shape), pbc)


def _analytic_min(fn, start):
    res = minimize(lambda x: fn(x[None, :])[0], np.asarray(start, float), method="BFGS", tol=1e-12)
    return res.x


# two carbon atoms with room around them; three wells of different depth
ATOMS = Atoms("C2", positions=[[5.0, 5.0, 3.0], [5.0, 5.0, 7.0]])
CENTRES = [(5.33, 4.91, 5.07), (2.87, 5.12, 5.04), (7.45, 6.93, 4.96)]
DEPTHS = [1.0, 0.8, 0.6]
WIDTHS = [0.9, 0.8, 1.0]


def _field(points):
    return _wells(points, CENTRES, DEPTHS, WIDTHS)


def test_default_exclusion_formula():
    # source: ase.data.covalent_radii, combined by our documented 0.75 × (r_guest + r_element)
    got = default_exclusion("Li", ["C", "H", "C"])
    li, c, h = (covalent_radii[atomic_numbers[s]] for s in ("Li", "C", "H"))
    assert got == {
        "C": pytest.approx(0.75 * (li + c), abs=1e-4),
        "H": pytest.approx(0.75 * (li + h), abs=1e-4),
    }
    with pytest.raises(PlacementError, match="'Qq' is not a chemical element"):
        default_exclusion("Qq", ["C"])


def test_deepest_well_matches_analytic_minimum():
    grid = _grid(_field)
    d = place(grid, ATOMS, "Li", within=4.0)
    assert isinstance(d, Decision)
    assert d.rule == "deepest" and d.guest == "Li"
    assert len(d.chosen) == 1 and d.chosen[0] == d.candidates[0]
    truth = _analytic_min(_field, CENTRES[0])
    assert np.linalg.norm(np.array(d.chosen[0].position) - truth) < 0.05
    assert d.chosen[0].potential == pytest.approx(_field(truth[None, :])[0], abs=5e-3)
    # the three wells lead the list, deepest first, each at its analytic minimum; shallower
    # candidates follow: points on the edge of the admissible region that are lower than all
    # their admissible neighbours (inadmissible points count as +inf)
    for site, c in zip(d.candidates[:3], CENTRES, strict=True):
        assert np.linalg.norm(np.array(site.position) - _analytic_min(_field, c)) < 0.05
    assert all(s.potential > -0.2 for s in d.candidates[3:])
    pots = [s.potential for s in d.candidates]
    assert pots == sorted(pots)
    assert d.reason.startswith("deepest admissible well, ") and "below the next" in d.reason
    assert d.grid_shape == [N, N, N]
    assert 0 < d.admissible_fraction < 1
    assert set(d.exclusion) == {"C"}
    # the JSON form round-trips (it goes into decision.json and the ledger)
    assert Decision.model_validate_json(d.model_dump_json()) == d


def test_skewed_axes_give_the_same_site():
    axes = np.array([[SPACING, 0.0, 0.0], [0.06, SPACING, 0.0], [0.0, 0.05, SPACING]])
    grid = _grid(_field, axes=axes)
    d = place(grid, ATOMS, "Li", within=4.0)
    truth = _analytic_min(_field, CENTRES[0])
    assert np.linalg.norm(np.array(d.chosen[0].position) - truth) < 0.05


def test_deeper_well_inside_exclusion_is_skipped():
    grid = _grid(_field)
    # a third carbon right on the deepest well: it is no longer admissible
    atoms = ATOMS + Atoms("C", positions=[CENTRES[0]])
    d = place(grid, atoms, "Li", within=4.0)
    truth = _analytic_min(_field, CENTRES[1])
    assert np.linalg.norm(np.array(d.chosen[0].position) - truth) < 0.05
    for site in d.candidates:
        dist = np.linalg.norm(atoms.positions - np.array(site.position), axis=1)
        assert dist.min() >= d.exclusion["C"] - 1e-9


def test_envelope_excludes_a_deep_well_far_from_the_host():
    far = [(9.0, 9.0, 9.0)] + CENTRES
    depths = [3.0] + DEPTHS
    widths = [0.7] + WIDTHS

    def field(p):
        return _wells(p, far, depths, widths)

    grid = _grid(field)
    free = place(grid, ATOMS, "Li", within=None)
    assert np.linalg.norm(np.array(free.chosen[0].position) - _analytic_min(field, far[0])) < 0.05
    bound = place(grid, ATOMS, "Li", within=4.0)
    assert np.linalg.norm(np.array(bound.chosen[0].position) - _analytic_min(field, far[1])) < 0.05
    # the envelope may be restricted to some atoms only
    only_first = place(grid, ATOMS, "Li", within=2.5, envelope_indices=[0])
    for site in only_first.candidates:
        assert np.linalg.norm(np.array(site.position) - ATOMS.positions[0]) <= 2.5 + 1e-9


def test_periodic_well_straddling_the_boundary_is_found_and_wrapped():
    n, period = 40, 8.0
    centre = (-0.13, 4.05, 3.97)  # just below x = 0: its basin spans the x boundary

    def field(p):
        return _wells(p, [centre], [1.0], [0.8], period=period)

    grid = _grid(field, n=n, pbc=(True, True, True))
    atoms = Atoms("C", positions=[[6.0, 4.0, 4.0]])  # 1.87 Å from the well through the boundary
    d = place(grid, atoms, "Li", within=3.0)
    pos = np.array(d.chosen[0].position)
    assert np.all((pos >= 0) & (pos < period))
    truth = _analytic_min(field, centre) % period
    assert np.linalg.norm(pos - truth) < 0.05
    assert pos[0] > 7.5


def test_minimum_image_exclusion():
    n, period = 40, 8.0
    centres = [(0.5, 4.0, 4.0), (4.0, 4.0, 1.5)]

    def field(p):
        return _wells(p, centres, [1.0, 0.8], [0.7, 0.7], period=period)

    # 7.1 Å from the first well directly, 0.9 Å through the boundary; what is left of that well
    # outside the exclusion sphere (about -0.61 V) is shallower than the second well
    atoms = Atoms("C", positions=[[7.6, 4.0, 4.0]])
    open_grid = _grid(field, n=n)
    d_open = place(open_grid, atoms, "Li", within=None)
    assert np.linalg.norm(np.array(d_open.chosen[0].position) - centres[0]) < 0.05
    periodic = _grid(field, n=n, pbc=(True, True, True))
    d_per = place(periodic, atoms, "Li", within=None)
    assert np.linalg.norm(np.array(d_per.chosen[0].position) - centres[1]) < 0.05
    mask = admissible_mask(periodic, atoms, {"C": 1.5}, None)
    assert not mask[2, 20, 20]  # (0.4, 4, 4) Å: 1.2 Å from the atom's image


def test_sign_flipped_map_gives_the_same_site():
    def field(p):
        v = _field(p)
        for r in ATOMS.positions:  # nuclei: sharp positive maxima
            v += 60.0 * np.exp(-np.sum((p - r) ** 2, axis=-1) / (2 * 0.25**2))
        return v

    grid = _grid(field)
    flipped = Grid(grid.origin, grid.axes, -grid.values)
    direct = place(orient(grid, ATOMS, "auto"), ATOMS, "Li", within=4.0)
    back = place(orient(flipped, ATOMS, "auto"), ATOMS, "Li", within=4.0)
    assert back == direct
    assert (
        np.linalg.norm(np.array(back.chosen[0].position) - _analytic_min(field, CENTRES[0])) < 0.05
    )


def test_no_admissible_point_gives_an_empty_decision():
    grid = _grid(_field)
    d = place(grid, ATOMS, "Li", exclusion={"C": 9.0}, within=3.0)
    assert d.chosen == [] and d.candidates == []
    assert d.admissible_fraction == 0.0
    assert d.reason.startswith("no admissible well")
    assert d.exclusion == {"C": 9.0}


def test_bad_arguments():
    grid = _grid(_field, n=10)
    with pytest.raises(PlacementError, match="guest"):
        place(grid, ATOMS, "Zz")
    with pytest.raises(PlacementError, match="exclusion for C"):
        place(grid, ATOMS, "Li", exclusion={"C": -1.0})
    with pytest.raises(PlacementError, match="exclusion"):
        place(grid, ATOMS, "Li", exclusion={"Blah": 1.0})
    with pytest.raises(PlacementError, match="within"):
        place(grid, ATOMS, "Li", within=0.0)
    with pytest.raises(PlacementError, match="out of range"):
        place(grid, ATOMS, "Li", envelope_indices=[5])
    with pytest.raises(PlacementError, match="candidates"):
        place(grid, ATOMS, "Li", candidates=0)


def test_ties_go_to_the_lower_grid_index():
    # two identical wells mirrored about x = 4.9 Å (the mid-plane between grid columns 24 and 25)
    centres = [(3.5, 5.0, 5.0), (6.3, 5.0, 5.0)]

    def field(p):
        return _wells(p, centres, [1.0, 1.0], [0.6, 0.6])

    grid = _grid(field)
    d = place(grid, Atoms(), "Li", within=None, candidates=2)
    a, b = d.candidates
    assert a.potential == pytest.approx(b.potential, abs=1e-12)
    assert a.index < b.index
    assert d.chosen[0] == a


def test_plateaus_count_once_and_shelves_are_not_wells():
    v = np.ones((12, 12, 12))
    v[3:6, 3:6, 3:6] = -1.0  # a flat-bottomed basin: one well
    v[8:11, 2:5, 2:5] = 0.0  # a shelf: flat, but next to something lower
    v[9, 3, 3] = -0.5
    v[1, 8:11, 8:11] = 0.5  # a flat patch on a ridge-free plain of 1.0: a (shallow) well
    grid = Grid(np.zeros(3), np.eye(3) * 0.3, v)
    wells = find_wells(grid, np.ones(v.shape, bool), 10)
    got = [(w.index, w.potential) for w in wells]
    assert got == [([3, 3, 3], -1.0), ([9, 3, 3], -0.5), ([1, 8, 8], 0.5)]


def test_inadmissible_points_never_become_wells():
    grid = _grid(_field)
    mask = admissible_mask(grid, ATOMS, default_exclusion("Li", ["C"]), 4.0)
    for w in find_wells(grid, mask, 50):
        assert mask[tuple(w.index)]


# ---------------------------------------------------------------------------------------------
# the `place` subcommand


def _parser():
    p = argparse.ArgumentParser(prog="ionwell")
    cli_place.add_parser(p.add_subparsers(dest="command", required=True))
    return p


def _signed_field(p):
    v = _field(p)
    for r in ATOMS.positions:
        v += 60.0 * np.exp(-np.sum((p - r) ** 2, axis=-1) / (2 * 0.25**2))
    return v


def test_cli_place_json(tmp_path, capsys):
    grid = _grid(_signed_field, n=40, spacing=0.25)
    path = tmp_path / "pot.cube"
    write_cube(path, Grid(grid.origin, grid.axes, -grid.values), ATOMS)  # electron convention
    args = _parser().parse_args(["place", str(path), "--json", "--within", "4", "--count", "2"])
    assert args.func is cli_place.run
    assert cli_place.run(args) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["sign"] == "electron"
    assert len(out["sites"]) == 2
    for site in out["sites"]:
        assert set(site) == {"position", "potential"}
        assert len(site["position"]) == 3
    assert out["sites"][0]["potential"] < out["sites"][1]["potential"]
    assert out["chosen"] == out["sites"][:1]
    truth = _analytic_min(_signed_field, CENTRES[0])
    assert np.linalg.norm(np.array(out["sites"][0]["position"]) - truth) < 0.05


def test_cli_place_table_npz_and_options(tmp_path, capsys):
    grid = _grid(_signed_field, n=40, spacing=0.25)
    npz = tmp_path / "pot.npz"
    save_npz(npz, grid)
    xyz = tmp_path / "host.xyz"
    ase_write(xyz, ATOMS)
    argv = ["place", str(npz), "--structure", str(xyz), "--exclusion", "C=1.8", "--guest", "Na"]
    assert cli_place.run(_parser().parse_args(argv)) == 0
    text = capsys.readouterr().out
    assert "rank" in text and "depth (V)" in text
    assert "chosen: well 1 at" in text and "C 1.80" in text
    # nothing admissible: exit status 1 and a plain reason
    argv = ["place", str(npz), "--structure", str(xyz), "--exclusion", "C=9"]
    assert cli_place.run(_parser().parse_args(argv)) == 1
    assert "no admissible well" in capsys.readouterr().out
    with pytest.raises(GridError, match=r"pot\.npz.*--structure"):
        cli_place.run(_parser().parse_args(["place", str(npz)]))
    bad = tmp_path / "bad.xyz"
    bad.write_text("not a structure\n")
    from ionwell.errors import StructureError

    with pytest.raises(StructureError, match=r"bad\.xyz"):
        cli_place.run(_parser().parse_args(["place", str(npz), "--structure", str(bad)]))
    with pytest.raises(SystemExit):
        _parser().parse_args(["place", str(npz), "--exclusion", "C:1.5"])
