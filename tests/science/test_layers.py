"""Layer detection (ionwell.science.host.detect_layers) on flakes in random orientations and on cells.

References: the builder's own geometry (sheets stacked along z at ``spacing``, tags holding the
sheet index), rotated by scipy.spatial.transform.Rotation; the graphite cell is the common
AB-stacked hexagonal cell (two sheets per c = 6.70 Å, a = 2.46 Å), handbook values.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from scipy.spatial.transform import Rotation

from ionwell.config.campaign import FlakeBuilder
from ionwell.errors import StructureError
from ionwell.science.host import Layers, build_flake, detect_layers


def _angle_deg(a, b) -> float:
    """Angle between two lines (orientation ignored), degrees."""
    c = abs(float(np.dot(a, b)) / (np.linalg.norm(a) * np.linalg.norm(b)))
    return float(np.degrees(np.arccos(min(1.0, c))))


@pytest.mark.parametrize(
    ("shells", "layers", "stacking", "seed"),
    [(3, 3, "AB", 0), (2, 2, "AA", 1), (1, 2, "AB", 2), (3, 5, "AB", 3), (2, 4, "AA", 4)],
)
def test_tilted_flake_gives_the_normal_and_the_layers(shells, layers, stacking, seed):
    spacing = 3.35
    flake = build_flake(FlakeBuilder(shells=shells, layers=layers, stacking=stacking))
    rot = Rotation.random(random_state=seed)
    atoms = flake.copy()
    atoms.positions = rot.apply(flake.positions) + np.array([1.5, -2.0, 0.7])
    found = detect_layers(atoms)
    assert isinstance(found, Layers)
    assert _angle_deg(found.normal, rot.apply([0.0, 0.0, 1.0])) < 1.0
    assert np.linalg.norm(found.normal) == pytest.approx(1.0)
    assert found.count == layers
    np.testing.assert_allclose(np.diff(found.heights), spacing, atol=1e-6)
    assert found.period is None
    # layer of each atom, carbons and hydrogens alike: the sheet the builder put it in
    tags = flake.get_tags()
    flip = float(np.dot(found.normal, rot.apply([0.0, 0.0, 1.0]))) < 0
    expected = (layers - 1 - tags) if flip else tags
    assert found.layer_of == expected.tolist()
    assert found.indices == np.flatnonzero(atoms.numbers == 6).tolist()
    # the galleries: one between each pair of adjacent sheets, shrunk by the margin
    gal = found.galleries(margin=0.5)
    assert len(gal) == layers - 1
    for lo, hi in gal:
        assert hi - lo == pytest.approx(spacing - 1.0, abs=1e-6)


def test_guests_in_a_gallery_belong_to_no_layer():
    flake = build_flake(FlakeBuilder(shells=2, layers=2))
    atoms = flake + Atoms("Li", positions=[[0.0, 0.0, 0.0]])  # the mid-plane of the bilayer
    # the host atoms only: the guest lies in the gallery, in no layer
    host = detect_layers(atoms, indices=range(len(flake)))
    assert host.count == 2 and host.layer_of[-1] == -1
    assert host.gallery_of(np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 3.0]])).tolist() == [0, -1]
    # by default every atom heavier than hydrogen counts, so the guest makes a layer of its own
    every = detect_layers(atoms)
    assert every.count == 3 and every.layer_of[-1] == 1


def test_single_sheet_has_no_gallery():
    sheet = build_flake(FlakeBuilder(shells=2, layers=1))
    found = detect_layers(sheet)
    assert found.count == 1 and found.galleries() == []
    assert _angle_deg(found.normal, [0, 0, 1]) < 1e-6


def test_periodic_graphite_cell_wraps_the_gallery():
    # AB graphite: a = 2.46 Å, c = 6.70 Å, sheets at c/4 and 3c/4 (handbook geometry)
    a, c = 2.46, 6.70
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    frac = [[0, 0, 0.25], [1 / 3, 2 / 3, 0.25], [0, 0, 0.75], [2 / 3, 1 / 3, 0.75]]
    graphite = Atoms("C4", scaled_positions=frac, cell=cell, pbc=True)
    found = detect_layers(graphite)
    assert _angle_deg(found.normal, [0, 0, 1]) < 1e-6
    assert found.period == pytest.approx(c)
    assert found.count == 2
    np.testing.assert_allclose(found.heights, [c / 4, 3 * c / 4], atol=1e-9)
    gal = found.galleries(margin=0.5)
    assert len(gal) == 2  # between the sheets, and between the top sheet and the next cell's
    # z = 0 and z = c/2 are gallery mid-planes; z = c/4 is a sheet
    got = found.gallery_of(np.array([[0, 0, 0.0], [0, 0, c / 2], [0, 0, c / 4], [0, 0, c]]))
    assert got.tolist() == [1, 0, -1, 1]


def test_bad_inputs_are_refused():
    with pytest.raises(StructureError, match="at least three atoms"):
        detect_layers(Atoms("C2", positions=[[0, 0, 0], [1.4, 0, 0]]))
    flake = build_flake(FlakeBuilder(shells=1, layers=2))
    with pytest.raises(StructureError, match="out of range"):
        detect_layers(flake, indices=[0, 1, 500])
    with pytest.raises(StructureError, match="tol"):
        detect_layers(flake, tol=0.0)
