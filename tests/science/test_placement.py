"""Tests of ionwell.science.placement and the ``place`` subcommand on analytic potential maps.

The reference for every well position is the analytic potential built in the test,
V(r) = -Σ a_i exp(-|r - c_i|² / 2 s_i²) (+ point-charge terms K q / |r - R|, + sharp positive
peaks on the nuclei where a sign must be told), minimised with scipy.optimize.minimize.
Boltzmann weights use k_B from ase.units (CODATA); the thermal rule's draws are checked with
scipy.stats.chisquare.
"""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii
from ase.io import write as ase_write
from ase.units import Bohr, Hartree, kB
from pydantic import ValidationError
from scipy.optimize import minimize
from scipy.spatial.transform import Rotation
from scipy.stats import chisquare

from ionwell.cli import place as cli_place
from ionwell.config.campaign import (
    BoxRegion,
    FlakeBuilder,
    PlacementConfig,
    SphereRegion,
    parse_campaign,
)
from ionwell.errors import ConfigError, GridError, PlacementError
from ionwell.io.cube import write_cube
from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid, orient
from ionwell.science.host import build_flake
from ionwell.science.placement import (
    RULES,
    Decision,
    PlaceSettings,
    Region,
    Site,
    admissible_mask,
    choose,
    decide,
    default_exclusion,
    find_wells,
    next_untried,
    place,
    region_mask,
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
    d = place(grid, ATOMS, "Li", PlaceSettings(within=4.0))
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
    d = place(grid, ATOMS, "Li", PlaceSettings(within=4.0))
    truth = _analytic_min(_field, CENTRES[0])
    assert np.linalg.norm(np.array(d.chosen[0].position) - truth) < 0.05


def test_deeper_well_inside_exclusion_is_skipped():
    grid = _grid(_field)
    # a third carbon right on the deepest well: it is no longer admissible
    atoms = ATOMS + Atoms("C", positions=[CENTRES[0]])
    d = place(grid, atoms, "Li", PlaceSettings(within=4.0))
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
    free = place(grid, ATOMS, "Li", PlaceSettings(within=None))
    assert np.linalg.norm(np.array(free.chosen[0].position) - _analytic_min(field, far[0])) < 0.05
    bound = place(grid, ATOMS, "Li", PlaceSettings(within=4.0))
    assert np.linalg.norm(np.array(bound.chosen[0].position) - _analytic_min(field, far[1])) < 0.05
    # the envelope may be restricted to some atoms only
    only_first = place(grid, ATOMS, "Li", PlaceSettings(within=2.5), envelope_indices=[0])
    for site in only_first.candidates:
        assert np.linalg.norm(np.array(site.position) - ATOMS.positions[0]) <= 2.5 + 1e-9


def test_periodic_well_straddling_the_boundary_is_found_and_wrapped():
    n, period = 40, 8.0
    centre = (-0.13, 4.05, 3.97)  # just below x = 0: its basin spans the x boundary

    def field(p):
        return _wells(p, [centre], [1.0], [0.8], period=period)

    grid = _grid(field, n=n, pbc=(True, True, True))
    atoms = Atoms("C", positions=[[6.0, 4.0, 4.0]])  # 1.87 Å from the well through the boundary
    d = place(grid, atoms, "Li", PlaceSettings(within=3.0))
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
    d_open = place(open_grid, atoms, "Li", PlaceSettings(within=None))
    assert np.linalg.norm(np.array(d_open.chosen[0].position) - centres[0]) < 0.05
    periodic = _grid(field, n=n, pbc=(True, True, True))
    d_per = place(periodic, atoms, "Li", PlaceSettings(within=None))
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
    direct = place(orient(grid, ATOMS, "auto"), ATOMS, "Li", PlaceSettings(within=4.0))
    back = place(orient(flipped, ATOMS, "auto"), ATOMS, "Li", PlaceSettings(within=4.0))
    assert back == direct
    assert (
        np.linalg.norm(np.array(back.chosen[0].position) - _analytic_min(field, CENTRES[0])) < 0.05
    )


def test_no_admissible_point_gives_an_empty_decision():
    grid = _grid(_field)
    d = place(grid, ATOMS, "Li", PlaceSettings(exclusion={"C": 9.0}, within=3.0))
    assert d.chosen == [] and d.candidates == []
    assert d.admissible_fraction == 0.0
    assert d.reason.startswith("no admissible well")
    assert d.exclusion == {"C": 9.0}


def test_bad_arguments():
    grid = _grid(_field, n=10)
    with pytest.raises(PlacementError, match="guest"):
        place(grid, ATOMS, "Zz")
    with pytest.raises(PlacementError, match="out of range"):
        place(grid, ATOMS, "Li", envelope_indices=[5])
    # the settings model refuses unusable numbers before place() sees them
    for kwargs, match in [
        ({"exclusion": {"C": -1.0}}, "exclusion for C"),
        ({"exclusion": {"Blah": 1.0}}, "exclusion"),
        ({"within": 0.0}, "within"),
        ({"candidates": 0}, "candidates"),
    ]:
        with pytest.raises(ValidationError, match=match):
            PlaceSettings(**kwargs)


def test_ties_go_to_the_lower_grid_index():
    # two identical wells mirrored about x = 4.9 Å (the mid-plane between grid columns 24 and 25)
    centres = [(3.5, 5.0, 5.0), (6.3, 5.0, 5.0)]

    def field(p):
        return _wells(p, centres, [1.0, 1.0], [0.6, 0.6])

    grid = _grid(field)
    d = place(grid, Atoms(), "Li", PlaceSettings(within=None, candidates=2))
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
    args = _parser().parse_args(["place", str(path), "--json", "--within", "4", "--wells", "2"])
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


# ---------------------------------------------------------------------------------------------
# wells: point-charge terms, merging, near-degenerate wells

# e²/(4π ε0) in eV·Å, from ase.units (CODATA): the potential of a charge q (e) at r Å is K q / r V
K_COULOMB = Hartree * Bohr


def test_point_charge_term_shifts_the_well_to_the_analytic_minimum():
    # a Gaussian well pushed sideways by a positive point charge on a carbon atom
    charge_at, q = np.array([5.0, 5.0, 2.4]), 0.15

    def field(p):
        v = _wells(p, [(5.1, 4.9, 5.0)], [1.0], [0.9])
        r = np.linalg.norm(p - charge_at, axis=-1)
        return v + K_COULOMB * q / np.maximum(r, 1e-3)

    grid = _grid(field)
    atoms = Atoms("C", positions=[charge_at])
    d = place(grid, atoms, "Li", PlaceSettings(within=4.0))
    truth = _analytic_min(field, (5.1, 4.9, 5.3))
    assert np.linalg.norm(truth - np.array([5.1, 4.9, 5.0])) > 0.2  # the charge moved the well
    assert np.linalg.norm(np.array(d.chosen[0].position) - truth) < 0.05
    assert d.chosen[0].potential == pytest.approx(field(truth[None, :])[0], abs=5e-3)


def test_wells_closer_than_merge_are_one_well_the_deeper():
    # two narrow wells 0.5 Å apart: two grid minima, one well once merged
    centres = [(1.5, 1.5, 1.5), (2.0, 1.5, 1.5)]

    def field(p):
        return _wells(p, centres, [1.0, 0.9], [0.15, 0.15])

    grid = _grid(field, n=35, spacing=0.1)
    mask = np.ones(grid.shape, bool)
    apart = find_wells(grid, mask, 2)
    for site, c in zip(apart, centres, strict=True):
        assert np.linalg.norm(np.array(site.position) - _analytic_min(field, c)) < 0.05
    merged = find_wells(grid, mask, 2, merge=0.6)
    assert merged == apart[:1]
    assert find_wells(grid, mask, 2, merge=0.4) == apart
    with pytest.raises(PlacementError, match="merge"):
        find_wells(grid, mask, 2, merge=-1.0)


def test_near_degenerate_wells_are_marked_and_the_tie_break_is_the_order():
    centres = [(2.5, 5.0, 5.0), (7.5, 5.0, 5.0), (5.0, 2.0, 5.0)]

    def field(p):
        return _wells(p, centres, [1.0, 0.995, 0.8], [0.7, 0.7, 0.7])

    grid = _grid(field)
    d = place(grid, Atoms(), "Li", PlaceSettings(within=None, candidates=3, degenerate=0.01))
    assert [s.degenerate for s in d.candidates] == [True, True, False]
    assert d.chosen == [d.candidates[0]] and d.chosen_wells == [0]
    assert "near-degenerate" in d.reason and "lower grid index" in d.reason
    assert d.degenerate == 0.01
    strict = place(grid, Atoms(), "Li", PlaceSettings(within=None, candidates=3, degenerate=0.001))
    assert not any(s.degenerate for s in strict.candidates)
    assert "near-degenerate" not in strict.reason


# ---------------------------------------------------------------------------------------------
# rules: thermal, screened, several guests per step


def _sites(potentials, spacing=5.0):
    """Sites with the given potentials (V), ``spacing`` Å apart along x, in the given order."""
    return [
        Site(position=[spacing * i, 0.0, 0.0], potential=v, index=[i, 0, 0])
        for i, v in enumerate(potentials)
    ]


def test_thermal_at_zero_temperature_is_the_deepest_rule():
    grid = _grid(_field)
    deepest = place(grid, ATOMS, "Li", PlaceSettings(within=4.0))
    zero = place(
        grid,
        ATOMS,
        "Li",
        PlaceSettings(within=4.0, rule="thermal", temperature=0.0),
        seed=7,
        step=3,
    )
    assert zero.chosen == deepest.chosen and zero.candidates == deepest.candidates
    assert zero.rule == "thermal" and zero.temperature == 0.0 and zero.seed == 7
    assert zero.probabilities[0] == 1.0 and sum(zero.probabilities) == 1.0
    # T → 0: every weight but the deepest underflows, whatever the seed
    for seed in range(20):
        cold = choose(
            deepest.candidates, PlaceSettings(rule="thermal", temperature=1e-3), seed=seed, step=1
        )
        assert cold.chosen == deepest.chosen_wells


def test_thermal_choices_follow_the_boltzmann_weights():
    temperature, z = 600.0, 1
    wells = _sites([-1.00, -0.98, -0.95, -0.92])
    v = np.array([w.potential for w in wells])
    # the weights the rule must follow: exp(-z (V - V_min) / kT), kB from ase.units (CODATA)
    weights = np.exp(-z * (v - v.min()) / (kB * temperature))
    expected_p = weights / weights.sum()
    first = choose(wells, PlaceSettings(rule="thermal", temperature=temperature), seed=0, step=0)
    assert first.probabilities == pytest.approx(expected_p.tolist(), rel=1e-12)
    draws = 4000
    counts = np.zeros(len(wells))
    for seed in range(draws):
        c = choose(wells, PlaceSettings(rule="thermal", temperature=temperature), seed=seed, step=5)
        counts[c.chosen[0]] += 1
    # scipy.stats.chisquare goodness of fit at significance 0.001 (fixed seeds: deterministic)
    assert chisquare(counts, draws * expected_p).pvalue > 0.001
    # a divalent guest (z = 2) sharpens the weights as exp(-2 ΔV / kT)
    two = choose(wells, PlaceSettings(rule="thermal", temperature=temperature, ion_charge=2))
    w2 = np.exp(-2 * (v - v.min()) / (kB * temperature))
    assert two.probabilities == pytest.approx((w2 / w2.sum()).tolist(), rel=1e-12)


def test_thermal_is_reproducible_from_seed_and_step():
    wells = _sites([-1.0, -0.99, -0.98, -0.97, -0.96])
    runs = [
        [
            choose(wells, PlaceSettings(rule="thermal", temperature=3000.0), seed=s, step=t).chosen
            for t in range(8)
        ]
        for s in (11, 11, 12)
    ]
    assert runs[0] == runs[1]
    assert runs[0] != runs[2]
    grid = _grid(_field)
    a = place(
        grid,
        ATOMS,
        "Li",
        PlaceSettings(within=4.0, rule="thermal", temperature=5000.0),
        seed=4,
        step=9,
    )
    b = place(
        grid,
        ATOMS,
        "Li",
        PlaceSettings(within=4.0, rule="thermal", temperature=5000.0),
        seed=4,
        step=9,
    )
    assert a == b and a.seed == 4 and a.step == 9
    assert a.reason.startswith("thermal choice at 5000 K among")


def _many_wells_field(period):
    rng = np.random.default_rng(5)
    centres = rng.uniform(0, period, size=(14, 3))
    centres[1] = centres[0] + [1.2, 0.0, 0.0]  # a deep pair closer than the separation
    depths = np.linspace(1.0, 0.5, len(centres))
    return centres, depths


def test_several_guests_per_step_keep_the_separation():
    period, n = 8.0, 32
    centres, depths = _many_wells_field(period)

    def field(p):
        return _wells(p, centres, depths, [0.5] * len(centres), period=period)

    grid = _grid(field, n=n, spacing=period / n, pbc=(True, True, True))
    separation = 3.0

    def min_image(a, b):
        d = np.subtract(a, b)
        d -= period * np.round(d / period)
        return np.linalg.norm(d)

    deep = place(
        grid,
        Atoms(),
        "Li",
        PlaceSettings(within=None, per_step=4, separation=separation, candidates=14),
    )
    assert len(deep.chosen) == 4 and deep.count == 4 and deep.separation == separation
    # greedy in depth order: the deepest first, and every deeper well skipped lies within the
    # separation of a well taken before it
    assert deep.chosen_wells[0] == 0 and deep.chosen_wells == sorted(deep.chosen_wells)
    for i in set(range(deep.chosen_wells[-1])) - set(deep.chosen_wells):
        skipped = deep.candidates[i].position
        before = [deep.candidates[c].position for c in deep.chosen_wells if c < i]
        assert min(min_image(skipped, b) for b in before) < separation
    assert len(set(range(deep.chosen_wells[-1])) - set(deep.chosen_wells)) >= 1
    for seed in range(30):
        hot = place(
            grid,
            Atoms(),
            "Li",
            PlaceSettings(
                within=None,
                rule="thermal",
                temperature=3000.0,
                per_step=4,
                separation=separation,
                candidates=14,
            ),
            seed=seed,
        )
        for d in (deep, hot):
            pos = [s.position for s in d.chosen]
            assert len(set(d.chosen_wells)) == len(pos)
            for i in range(len(pos)):
                for j in range(i):
                    assert min_image(pos[i], pos[j]) >= separation
    # more guests than the wells allow: as many as fit, and the reason says so
    crowded = place(
        grid, Atoms(), "Li", PlaceSettings(within=None, per_step=40, separation=6.0, candidates=14)
    )
    assert 1 <= len(crowded.chosen) < 40
    assert f"only {len(crowded.chosen)} of 40 guests" in crowded.reason


def test_separation_counts_periodic_images():
    # two equally deep wells 7 Å apart directly but 1 Å apart through the x boundary
    period, n = 8.0, 32

    def field(p):
        return _wells(
            p,
            [(0.5, 4.0, 4.0), (7.5, 4.0, 4.0), (4.0, 4.0, 1.0)],
            [1, 0.99, 0.5],
            [0.4, 0.4, 0.4],
            period=period,
        )

    grid = _grid(field, n=n, spacing=period / n, pbc=(True, True, True))
    d = place(
        grid, Atoms(), "Li", PlaceSettings(within=None, per_step=2, separation=2.0, merge=0.0)
    )
    assert np.linalg.norm(np.array(d.chosen[1].position) - (4.0, 4.0, 1.0)) < 0.05


def test_screened_takes_the_lowest_engine_energy():
    grid = _grid(_field)
    seen = []

    def energy_of(sites):
        seen.append(sites)
        # the second-deepest well has the lowest energy; the third failed
        return [-10.0, -10.5, None]

    d = place(
        grid,
        ATOMS,
        "Li",
        PlaceSettings(within=4.0, rule="screened", screen={"top": 3}),
        energy_of=energy_of,
    )
    assert len(seen) == 1 and seen[0] == d.candidates[:3]
    assert d.chosen_wells == [1] and d.chosen == [d.candidates[1]]
    assert d.energies[:3] == [-10.0, -10.5, None]
    assert all(e is None for e in d.energies[3:])
    assert d.reason.startswith("lowest engine energy among the 3 deepest wells: well 2")
    assert "0.500 eV below the next" in d.reason and "without an energy" in d.reason
    # ties go to the deeper well
    tie = choose(
        d.candidates,
        PlaceSettings(rule="screened", screen={"top": 2}),
        energy_of=lambda s: [1.0, 1.0],
    )
    assert tie.chosen == [0]
    with pytest.raises(PlacementError, match="needs the energies"):
        place(grid, ATOMS, "Li", PlaceSettings(within=4.0, rule="screened"))
    with pytest.raises(PlacementError, match="returned 1 energies for 3"):
        choose(
            d.candidates,
            PlaceSettings(rule="screened", screen={"top": 3}),
            energy_of=lambda s: [0.0],
        )
    nothing = choose(
        d.candidates,
        PlaceSettings(rule="screened", screen={"top": 2}),
        energy_of=lambda s: [None, math.nan],
    )
    assert nothing.chosen == [] and "no energy could be computed" in nothing.reason


def test_rule_arguments_are_checked():
    wells = _sites([-1.0])
    # the settings model refuses unusable rule settings; choose() checks the draw's seed and step
    for kwargs, match in [
        ({"rule": "random"}, "rule"),
        ({"per_step": 0}, "per_step"),
        ({"separation": 0.0}, "separation"),
        ({"temperature": -1.0}, "temperature"),
        ({"screen": {"top": 0}}, "top"),
    ]:
        with pytest.raises(ValidationError, match=match):
            PlaceSettings(**kwargs)
    for kwargs in ({"seed": -1}, {"step": -1}):
        with pytest.raises(PlacementError, match="seed and step"):
            choose(wells, PlaceSettings(), **kwargs)
    # every rule of the table is a choice of the settings model
    assert set(RULES) == set(PlacementConfig.model_fields["rule"].annotation.__args__)


# ---------------------------------------------------------------------------------------------
# region: user boxes and spheres, galleries


def test_user_boxes_and_spheres_restrict_the_region():
    grid = _grid(_field)
    box = BoxRegion(lower=(6.5, 6.0, 4.0), upper=(8.5, 8.0, 6.0))  # around the third well
    d = place(grid, ATOMS, "Li", PlaceSettings(within=4.0, boxes=[box]))
    assert np.linalg.norm(np.array(d.chosen[0].position) - _analytic_min(_field, CENTRES[2])) < 0.05
    for s in d.candidates:
        assert np.all(np.array(s.position) >= box.lower) and np.all(
            np.array(s.position) <= box.upper
        )
    sphere = SphereRegion(centre=CENTRES[1], radius=1.0)
    both = place(grid, ATOMS, "Li", PlaceSettings(within=4.0, boxes=[box], spheres=[sphere]))
    assert (
        np.linalg.norm(np.array(both.chosen[0].position) - _analytic_min(_field, CENTRES[1])) < 0.05
    )
    assert both.admissible_fraction > d.admissible_fraction
    assert both.region.spheres == [sphere]
    assert Decision.model_validate_json(both.model_dump_json()) == both
    # a sphere across a periodic boundary counts its images
    n, period = 40, 8.0
    pgrid = _grid(lambda p: np.zeros(len(p)), n=n, spacing=period / n, pbc=(True, True, True))
    m = region_mask(pgrid, Region(spheres=[SphereRegion(centre=(0.1, 4.0, 4.0), radius=0.5)]))
    assert m[n - 1, 20, 20] and m[0, 20, 20] and not m[5, 20, 20]
    empty = place(
        grid,
        ATOMS,
        "Li",
        PlaceSettings(within=4.0, boxes=[BoxRegion(lower=(0.0, 0.0, 0.0), upper=(0.1, 0.1, 0.1))]),
    )
    assert empty.chosen == [] and "inside a user box or sphere" in empty.reason


def _layered_case():
    """A tilted bilayer flake, a deep well above it and a shallower one in its gallery."""
    flake = build_flake(FlakeBuilder(shells=2, layers=2, stacking="AB"))
    rot = Rotation.from_euler("xyz", [20.0, -15.0, 35.0], degrees=True)
    centre = np.array([6.0, 6.0, 6.0])
    atoms = flake.copy()
    atoms.positions = rot.apply(flake.positions) + centre
    above = rot.apply([0.7, 0.3, 1.675 + 2.3]) + centre  # over the top sheet
    gallery = rot.apply([1.1, 0.5, 0.0]) + centre  # on the mid-plane between the sheets
    centres, depths, widths = [above, gallery], [1.0, 0.6], [0.8, 0.8]

    def field(p):
        return _wells(p, centres, depths, widths)

    return atoms, field, above, gallery


def test_galleries_only_skips_a_deeper_well_outside_the_galleries():
    atoms, field, above, gallery = _layered_case()
    grid = _grid(field, n=40, spacing=0.3)
    base = {"within": 3.0, "exclusion": {"C": 1.3, "H": 1.0}}
    free = decide(grid, atoms, "Li", PlacementConfig(**base), step=0, seed=0)
    assert np.linalg.norm(np.array(free.chosen[0].position) - _analytic_min(field, above)) < 0.05
    inside = decide(grid, atoms, "Li", PlacementConfig(**base, galleries_only=True), step=0, seed=0)
    assert (
        np.linalg.norm(np.array(inside.chosen[0].position) - _analytic_min(field, gallery)) < 0.05
    )
    gal = inside.region.galleries
    assert len(gal.layer_heights) == 2 and len(gal.intervals) == 1
    assert gal.intervals[0][1] - gal.intervals[0][0] == pytest.approx(3.35 - 2 * 0.5, abs=1e-6)
    assert inside.admissible_fraction < free.admissible_fraction
    # a margin that closes the gallery, and a single sheet: no gallery, said plainly
    closed = decide(
        grid,
        atoms,
        "Li",
        PlacementConfig(**base, galleries_only=True, gallery_margin=2.0),
        step=0,
        seed=0,
    )
    assert closed.chosen == [] and "no gallery" in closed.reason
    top_sheet = atoms[[a.index for a in atoms if a.tag == 1]]
    single = decide(
        grid, top_sheet, "Li", PlacementConfig(**base, galleries_only=True), step=0, seed=0
    )
    assert single.chosen == [] and "fewer than two layers" in single.reason


# ---------------------------------------------------------------------------------------------
# decide: the campaign's settings, replayable


def test_decide_maps_the_settings_and_replays_exactly():
    grid = _grid(_signed_field)
    settings = PlacementConfig(within=4.0, sign="auto", rule="thermal", temperature=4000.0)
    a = decide(grid, ATOMS, "Li", settings, step=3, seed=21)
    b = decide(grid, ATOMS, "Li", settings, step=3, seed=21)
    assert a == b
    assert a.sign == "potential" and a.seed == 21 and a.step == 3 and a.temperature == 4000.0
    flipped = Grid(grid.origin, grid.axes, -grid.values)
    c = decide(flipped, ATOMS, "Li", settings, step=3, seed=21)
    assert c.sign == "electron" and c.chosen == a.chosen and c.candidates == a.candidates
    # the deepest rule with default settings is place() with its defaults
    plain = decide(grid, ATOMS, "Li", PlacementConfig(), step=0, seed=0)
    assert plain == place(grid, ATOMS, "Li").model_copy(update={"sign": "potential"})
    assert Decision.model_validate_json(a.model_dump_json()) == a


def test_decide_screened_needs_an_energy_function():
    grid = _grid(_field, n=20, spacing=0.5)
    settings = PlacementConfig(rule="screened", within=4.0)
    with pytest.raises(PlacementError, match="needs the energies"):
        decide(grid, ATOMS, "Li", settings, step=1, seed=0)
    d = decide(
        grid, ATOMS, "Li", settings, step=1, seed=0, energy_of=lambda s: [float(len(s))] * len(s)
    )
    assert d.rule == "screened" and d.chosen_wells == [0]


# ---------------------------------------------------------------------------------------------
# the placement settings of a campaign


def test_placement_config_defaults_and_messages():
    pc = PlacementConfig()
    assert (pc.rule, pc.temperature, pc.per_step, pc.separation) == ("deepest", 300.0, 1, 2.5)
    assert (pc.merge, pc.degenerate, pc.galleries_only, pc.ion_charge) == (0.3, 0.01, False, 1)
    assert (pc.exclusion, pc.within, pc.sign, pc.candidates) == ({}, 3.0, "potential", 10)
    assert pc.boxes == [] and pc.spheres == [] and pc.screen.top == 3 and pc.screen.engine is None
    good = {"name": "c1", "host": {"builder": {"shells": 1}}}
    c = parse_campaign(
        {
            **good,
            "placement": {
                "rule": "screened",
                "screen": {"top": 4, "engine": {"kind": "pyscf", "basis": "sto-3g"}},
                "boxes": [{"lower": [0, 0, 0], "upper": [1, 2, 3]}],
                "spheres": [{"centre": [0, 0, 0], "radius": 2}],
            },
        }
    )
    assert c.placement.screen.engine.kind == "pyscf"
    assert c.placement.boxes[0].upper == (1.0, 2.0, 3.0)
    for patch, field, expected in [
        ({"rule": "random"}, "placement.rule", "'deepest', 'thermal' or 'screened'"),
        ({"temperature": -5}, "placement.temperature", "greater than or equal to 0"),
        ({"per_step": 0}, "placement.per_step", "greater than or equal to 1"),
        ({"separation": 0}, "placement.separation", "greater than 0"),
        ({"merge": -1}, "placement.merge", "greater than or equal to 0"),
        ({"degenerate": -1}, "placement.degenerate", "greater than or equal to 0"),
        (
            {"boxes": [{"lower": [0, 0, 0], "upper": [1, 0, 1]}]},
            "placement.boxes.0",
            "upper corner must exceed the lower corner",
        ),
        (
            {"spheres": [{"centre": [0, 0, 0], "radius": 0}]},
            "placement.spheres.0.radius",
            "greater than 0",
        ),
        ({"screen": {"top": 0}}, "placement.screen.top", "greater than or equal to 1"),
        ({"screen": {"engine": {"kind": "nope"}}}, "placement.screen.engine", "pyscf"),
        (
            {"rule": "screened", "per_step": 5},
            "screen.top (3) must be at least per_step (5)",
            "rule 'screened'",
        ),
        ({"galleries": True}, "placement.galleries", "unknown key"),
    ]:
        with pytest.raises(ConfigError) as exc:
            parse_campaign({**good, "placement": patch}, "c.yaml")
        assert field in str(exc.value) and expected in str(exc.value)


def test_refined_wells_never_leave_the_admissible_region():
    # a well centred inside the exclusion sphere of a charged atom: its remains on the sphere
    # are edge wells, whose refinement must stay outside the sphere
    charge_at = np.array([5.0, 5.0, 5.0])

    def field(p):
        r = np.linalg.norm(p - charge_at, axis=-1)
        v = _wells(p, [(5.4, 5.1, 5.0), (2.5, 2.5, 2.5)], [1.5, 0.3], [0.8, 0.8])
        return v + K_COULOMB * 0.5 / np.maximum(r, 0.05)

    grid = _grid(field)
    atoms = Atoms("C", positions=[charge_at])
    d = place(grid, atoms, "Li", PlaceSettings(exclusion={"C": 1.6}, within=4.0, candidates=30))
    assert any(s.edge for s in d.candidates)
    for s in d.candidates:
        assert np.linalg.norm(np.array(s.position) - charge_at) >= 1.6 - 1e-9
        assert np.linalg.norm(np.array(s.position) - charge_at) <= 4.0 + 1e-9
    # in a narrow gallery: refined, and inside the gallery and clear of every atom
    atoms, field2, _, _ = _layered_case()
    grid2 = _grid(field2, n=40, spacing=0.3)
    settings = PlacementConfig(within=3.0, exclusion={"C": 1.3, "H": 1.0}, galleries_only=True)
    g = decide(grid2, atoms, "Li", settings, step=0, seed=0)
    limits = np.where(atoms.numbers == 6, 1.3, 1.0)
    for s in g.candidates:
        p = np.array(s.position)
        assert np.all(np.linalg.norm(atoms.positions - p, axis=1) >= limits - 1e-9)
        assert g.region.galleries.contains(p[None, :])[0]


def test_next_untried_skips_tried_sites_and_keeps_the_separation():
    wells = _sites([-3.0, -2.0, -1.0, -0.5], spacing=2.0)  # at x = 0, 2, 4, 6 Å
    assert next_untried(wells, [], count=1) == [0]
    assert next_untried(wells, [wells[0].position], count=1) == [1]
    # two at a time, 3 Å apart at least: after the first pair (0, 2) is tried, wells 1 and 3
    assert next_untried(wells, [], count=2, separation=3.0) == [0, 2]
    tried = [wells[0].position, wells[2].position]
    assert next_untried(wells, tried, count=2, separation=3.0) == [1, 3]
    # everything tried: nothing left
    assert next_untried(wells, [w.position for w in wells]) == []


# ---------------------------------------------------------------------------------------------
# which boundary a well touches: the grid's face or the admissible region's edge

SMALL = 30  # 6 Å box at SPACING


def _one_well(centre, depth=1.0, width=0.8):
    def field(p):
        return _wells(p, [centre], [depth], [width])

    return field


def test_boundary_tells_the_region_edge_from_the_grid_face_and_the_inside():
    # a carbon at z = 2.5 Å and a Gaussian well 2.5 Å above it: with a 1.8 Å envelope the well's
    # minimum is outside the admissible region, whose lowest point is then on its outer edge,
    # straight towards the well (z = 2.5 + 1.8 = 4.3 Å, the grid point below at 4.2 Å)
    atoms = Atoms("C", positions=[[3.0, 3.0, 2.5]])
    grid = _grid(_one_well((3.0, 3.0, 5.0)), n=SMALL)
    tight = place(grid, atoms, "Li", PlaceSettings(within=1.8))
    site = tight.chosen[0]
    assert site.boundary == "region" and site.edge
    assert np.linalg.norm(np.array(site.position) - [3.0, 3.0, 4.2]) < 1e-9
    # a 4 Å envelope holds the well: refined onto its centre, no boundary
    roomy = place(grid, atoms, "Li", PlaceSettings(within=4.0))
    site = roomy.chosen[0]
    assert site.boundary is None and not site.edge
    assert np.linalg.norm(np.array(site.position) - [3.0, 3.0, 5.0]) < 0.02
    # a well centred 1.2 Å beyond the top face (z = 5.8 Å) of an open grid: its lowest grid
    # point is on that face
    face = place(
        _grid(_one_well((3.0, 3.0, 7.0), width=1.0), n=SMALL),
        Atoms(),
        "Li",
        PlaceSettings(within=None),
    )
    site = face.chosen[0]
    assert site.boundary == "grid" and site.edge
    assert site.index == [15, 15, SMALL - 1]
    # every well: edge exactly when it touches a boundary; the decision is deterministic
    for d in (tight, roomy, face):
        assert all(s.edge == (s.boundary is not None) for s in d.candidates)
        assert Decision.model_validate_json(d.model_dump_json()) == d
    assert place(grid, atoms, "Li", PlaceSettings(within=1.8)) == tight


def test_boundary_of_a_user_box_is_the_region_and_periodic_axes_have_no_face():
    # a box that stops 1 Å short of the well: the site sits on the box's face
    grid = _grid(_one_well((3.0, 3.0, 4.0)), n=SMALL)
    box = BoxRegion(lower=(1.0, 1.0, 1.0), upper=(5.0, 5.0, 3.0))
    d = place(grid, Atoms(), "Li", PlaceSettings(within=None, boxes=[box]))
    assert d.chosen[0].boundary == "region"
    assert d.chosen[0].position[2] == pytest.approx(3.0)
    # the same well across the x boundary of a periodic grid: no face there, so no boundary
    period = SMALL * SPACING

    def field(p):
        return _wells(p, [(-0.1, 3.0, 3.0)], [1.0], [0.8], period=period)

    periodic = place(
        _grid(field, n=SMALL, pbc=(True, True, True)), Atoms(), "Li", PlaceSettings(within=None)
    )
    site = periodic.chosen[0]
    assert site.index[0] in (0, SMALL - 1)
    assert site.boundary is None and not site.edge


def test_the_grid_face_wins_when_a_block_also_touches_the_region_edge():
    # the deepest point is on the x = 0 face, and its block also holds inadmissible points
    v = np.ones((8, 8, 8))
    v[0, 4, 4] = -1.0
    mask = np.ones(v.shape, dtype=bool)
    mask[1, 5, 5] = False
    grid = Grid(np.zeros(3), np.eye(3) * 0.3, v)
    (well,) = find_wells(grid, mask, 1)
    assert well.index == [0, 4, 4] and well.boundary == "grid" and well.edge
    # the same block away from the face only touches the region's edge; the excluded point is
    # higher than the well, so the well is a true minimum beside the edge: no boundary
    v2 = np.ones((8, 8, 8))
    v2[2, 4, 4] = -1.0
    mask2 = np.ones(v2.shape, dtype=bool)
    mask2[3, 5, 5] = False
    (well,) = find_wells(Grid(np.zeros(3), np.eye(3) * 0.3, v2), mask2, 1)
    assert well.index == [2, 4, 4] and well.boundary is None and well.edge
    # the potential keeps falling across the edge (the excluded point is lower): the region
    # sets the site
    v2[3, 5, 5] = -2.0
    (well,) = find_wells(Grid(np.zeros(3), np.eye(3) * 0.3, v2), mask2, 1)
    assert well.index == [2, 4, 4] and well.boundary == "region" and well.edge


def test_site_boundary_and_edge_agree():
    site = Site(position=[0.0, 0.0, 0.0], potential=-1.0, index=[0, 0, 0], boundary="grid")
    assert site.edge
    assert Site.model_validate_json(site.model_dump_json()) == site
    with pytest.raises(ValueError, match="edge site"):
        Site(
            position=[0.0, 0.0, 0.0], potential=-1.0, index=[0, 0, 0], edge=False, boundary="region"
        )
    # a record from before the boundary was kept: an edge, which one unknown
    old = Site.model_validate(
        {"position": [0, 0, 0], "potential": 0.5, "index": [0, 0, 0], "edge": True}
    )
    assert old.edge and old.boundary is None
