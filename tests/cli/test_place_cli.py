"""The ``ionwell place`` rule options: --rule, --count, --separation, --temperature, --seed,
--step, --wells, --galleries, and the wells table.

Maps are analytic, built here: V(r) = -Σ a_i exp(-|r - c_i|² / 2 s_i²) plus sharp positive
peaks on the nuclei (so that the sign can be told); reference minima from
scipy.optimize.minimize; Boltzmann weights with k_B from ase.units (CODATA).
"""

from __future__ import annotations

import argparse
import json

import numpy as np
import pytest
from ase import Atoms
from ase.units import kB
from scipy.optimize import minimize

from ionwell.cli import place as cli_place
from ionwell.config.campaign import FlakeBuilder
from ionwell.errors import PlacementError
from ionwell.io.cube import write_cube
from ionwell.science.grid import Grid
from ionwell.science.host import build_flake

ATOMS = Atoms("C2", positions=[[5.0, 5.0, 3.0], [5.0, 5.0, 7.0]])
CENTRES = [(5.33, 4.91, 5.07), (2.87, 5.12, 5.04), (7.45, 6.93, 4.96)]
DEPTHS = [1.0, 0.97, 0.94]
WIDTHS = [0.9, 0.8, 1.0]


def _field(points, atoms=ATOMS, centres=CENTRES, depths=DEPTHS, widths=WIDTHS):
    v = np.zeros(len(points))
    for c, a, s in zip(centres, depths, widths, strict=True):
        v -= a * np.exp(-np.sum((points - np.asarray(c)) ** 2, axis=-1) / (2 * s * s))
    for r in atoms.positions:
        v += 60.0 * np.exp(-np.sum((points - r) ** 2, axis=-1) / (2 * 0.25**2))
    return v


def _cube(path, fn, atoms, n=40, spacing=0.25, origin=(0.0, 0.0, 0.0)):
    g = Grid(np.asarray(origin, float), np.eye(3) * spacing, np.zeros((n, n, n)))
    values = fn(g.points()).reshape(g.shape)
    write_cube(path, Grid(g.origin, g.axes, values), atoms)
    return path


def _parser():
    p = argparse.ArgumentParser(prog="ionwell")
    cli_place.add_parser(p.add_subparsers(dest="command", required=True))
    return p


def _run(argv, capsys):
    status = cli_place.run(_parser().parse_args(["place", *argv]))
    return status, capsys.readouterr().out


@pytest.fixture(scope="module")
def cube(tmp_path_factory):
    return _cube(tmp_path_factory.mktemp("maps") / "pot.cube", _field, ATOMS)


def test_thermal_table_shows_probabilities_and_the_choice(cube, capsys):
    status, text = _run(
        [str(cube), "--within", "4", "--rule", "thermal", "--temperature", "3000", "--seed", "5"],
        capsys,
    )
    assert status == 0
    assert "rule: thermal at 3000 K, seed 5, step 0; 1 guest" in text
    header = next(line for line in text.splitlines() if line.lstrip().startswith("rank"))
    assert "prob." in header and "depth (V)" in header and "note" in header
    rows = [line for line in text.splitlines() if line.strip()[:1].isdigit()]
    assert sum("chosen" in r for r in rows) == 1
    assert "why: thermal choice at 3000 K" in text


def test_json_shape_and_thermal_fields(cube, capsys):
    argv = [str(cube), "--json", "--within", "4", "--rule", "thermal", "--temperature", "1000"]
    status, text = _run([*argv, "--seed", "3", "--step", "2", "--wells", "3"], capsys)
    assert status == 0
    out = json.loads(text)
    assert len(out["sites"]) == 3
    for site in out["sites"]:
        assert set(site) == {"position", "potential"} and len(site["position"]) == 3
    pots = [s["potential"] for s in out["sites"]]
    assert pots == sorted(pots)  # best first
    assert (out["seed"], out["step"], out["temperature"]) == (3, 2, 1000.0)
    # the probabilities are the Boltzmann weights exp(-(V - V_min)/kT) over the listed wells
    w = np.exp(-(np.array(pots) - min(pots)) / (kB * 1000.0))
    assert out["probabilities"] == pytest.approx((w / w.sum()).tolist(), rel=1e-9)
    assert out["chosen"] == [out["sites"][i] for i in out["chosen_wells"]]
    # the same seed and step give the same choice
    again = json.loads(_run([*argv, "--seed", "3", "--step", "2", "--wells", "3"], capsys)[1])
    assert again["chosen_wells"] == out["chosen_wells"]


def test_zero_temperature_is_the_deepest_well(cube, capsys):
    deepest = json.loads(_run([str(cube), "--json", "--within", "4"], capsys)[1])
    cold = json.loads(
        _run(
            [str(cube), "--json", "--within", "4", "--rule", "thermal", "--temperature", "0"],
            capsys,
        )[1]
    )
    assert cold["chosen"] == deepest["chosen"] == deepest["sites"][:1]
    truth = minimize(lambda x: _field(x[None, :])[0], CENTRES[0], method="BFGS", tol=1e-12).x
    assert np.linalg.norm(np.array(deepest["chosen"][0]["position"]) - truth) < 0.05


def test_count_places_guests_at_least_the_separation_apart(cube, capsys):
    status, text = _run(
        [str(cube), "--json", "--within", "4", "--count", "3", "--separation", "2.0"], capsys
    )
    assert status == 0
    out = json.loads(text)
    pos = np.array([s["position"] for s in out["chosen"]])
    assert out["count"] == 3 and out["separation"] == 2.0 and len(pos) == 3
    d = np.linalg.norm(pos[:, None] - pos[None, :], axis=-1)
    assert d[np.triu_indices(3, 1)].min() >= 2.0
    status, text = _run([str(cube), "--within", "4", "--count", "2"], capsys)
    assert "chosen #1: well 1 at" in text and "chosen #2: well" in text


def test_galleries_option_keeps_the_site_between_layers(tmp_path, capsys):
    flake = build_flake(FlakeBuilder(shells=2, layers=2))
    flake.positions += 5.0
    above = (5.7, 5.3, 5.0 + 1.675 + 2.3)  # over the top sheet: deeper
    gallery = (6.1, 5.5, 5.0)  # between the sheets
    path = _cube(
        tmp_path / "flake.cube",
        lambda p: _field(p, flake, [above, gallery], [1.0, 0.6], [0.8, 0.8]),
        flake,
        n=34,
        spacing=0.3,
    )
    free = json.loads(_run([str(path), "--json"], capsys)[1])
    assert np.linalg.norm(np.subtract(free["chosen"][0]["position"], above)) < 0.3
    inside = json.loads(_run([str(path), "--json", "--galleries"], capsys)[1])
    assert np.linalg.norm(np.subtract(inside["chosen"][0]["position"], gallery)) < 0.3
    text = _run([str(path), "--galleries"], capsys)[1]
    assert "galleries: 1 between 2 layers" in text


def test_screened_is_refused_and_bad_values_name_the_option(cube, capsys):
    with pytest.raises(PlacementError, match="needs a campaign"):
        cli_place.run(_parser().parse_args(["place", str(cube), "--rule", "screened"]))
    with pytest.raises(PlacementError, match="--wells"):
        cli_place.run(_parser().parse_args(["place", str(cube), "--wells", "5000"]))
    with pytest.raises(PlacementError, match="--count"):
        cli_place.run(_parser().parse_args(["place", str(cube), "--count", "500"]))
    with pytest.raises(PlacementError, match="--exclusion.*element"):
        cli_place.run(_parser().parse_args(["place", str(cube), "--exclusion", "Qq=1.0"]))
    # numbers out of the settings model's limits: its message, naming the option and the value
    for bad, match in [
        (["--temperature", "-1"], "--temperature: .*greater than or equal to 0, got -1.0"),
        (["--count", "0"], "--count: .*greater than or equal to 1, got 0"),
        (["--within", "0"], "--within: .*greater than 0, got 0.0"),
        (["--separation", "nan"], "--separation: .*finite number"),
        (["--exclusion", "C=-1"], "--exclusion: exclusion for C must be between 0 and 10 Å"),
    ]:
        with pytest.raises(PlacementError, match=match):
            cli_place.run(_parser().parse_args(["place", str(cube), *bad]))
    # what is not a number, or not an option's choice, is argparse's to refuse
    for bad in (["--seed", "-2"], ["--count", "x"], ["--within", "far"], ["--rule", "x"]):
        with pytest.raises(SystemExit):
            _parser().parse_args(["place", str(cube), *bad])
    capsys.readouterr()


def _periodic_case(tmp_path):
    """A 6 Å cubic cell, 24 points per axis spanning it exactly (a periodic code's layout): one
    C near the x = 0 face, the deepest well just inside the opposite face (0.3 Å from the C
    through the face), a shallower well in the middle of the cell."""
    carbon = Atoms("C", positions=[[0.2, 3.0, 3.0]])
    deep, middle = (5.9, 3.0, 3.0), (3.0, 3.0, 3.0)

    def field(points):
        return _field(points, atoms=carbon, centres=[deep, middle], depths=[1.0, 0.5],
                      widths=[0.5, 0.5])  # fmt: skip

    return _cube(tmp_path / "cell.cube", field, carbon, n=24, spacing=0.25), deep, middle


def test_periodic_map_excludes_a_well_next_to_an_atom_through_the_cell_face(tmp_path, capsys):
    # minimum image (common practice for periodic cells): the deep well is 0.3 Å from the C
    # across the x face, inside its exclusion radius, so with periodicity stated it is not
    # admissible and the middle well is chosen; without it the deep well wins
    path, deep, middle = _periodic_case(tmp_path)
    common = [str(path), "--within", "10", "--sign", "potential", "--json"]
    status, text = _run(common, capsys)
    assert status == 0
    assert np.allclose(json.loads(text)["chosen"][0]["position"], deep, atol=0.15)
    status, text = _run([*common, "--periodic", "xyz"], capsys)
    assert status == 0
    assert np.allclose(json.loads(text)["chosen"][0]["position"], middle, atol=0.15)
    # a structure with the cell says the same without --periodic (the map spans its cell)
    from ase.io import write

    cell = Atoms("C", positions=[[0.2, 3.0, 3.0]], cell=[6.0, 6.0, 6.0], pbc=True)
    write(tmp_path / "cell.extxyz", cell)
    status, text = _run([*common, "--structure", str(tmp_path / "cell.extxyz")], capsys)
    assert np.allclose(json.loads(text)["chosen"][0]["position"], middle, atol=0.15)


def test_periodic_axes_option_is_checked():
    with pytest.raises(SystemExit):
        _parser().parse_args(["place", "x.cube", "--periodic", "xq"])
    args = _parser().parse_args(["place", "x.cube", "--periodic", "xy"])
    assert args.periodic == (True, True, False)
    assert _parser().parse_args(["place", "x.cube", "--periodic", "none"]).periodic == (
        False, False, False,
    )  # fmt: skip
