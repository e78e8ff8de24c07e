"""Staging and stacking analysis (ionwell.staging.layer_report).

References: AB (Bernal) graphite, a = 2.46 Å and 3.35 Å interlayer spacing (handbook value);
LiC6, AA-stacked graphene with Li over hexagon centres in every gallery at 3.70 Å spacing
(handbook value for LiC6, from memory); stage definition (common practice): the period, in
galleries, of filled galleries along the stacking axis.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import graphene, make_supercell
from scipy.spatial.transform import Rotation

from ionwell.config import FlakeBuilder
from ionwell.errors import StructureError
from ionwell.host import build_flake
from ionwell.staging import layer_report, stage_of

A_GRAPHITE = 2.46  # Å, in-plane lattice constant of graphite (handbook value)
D_GRAPHITE = 3.35  # Å, interlayer spacing of graphite (handbook value)
D_LIC6 = 3.70  # Å, interlayer spacing of LiC6 (handbook value, from memory)


def _graphite_ab() -> Atoms:
    """Bernal graphite, 2 layers per cell: A at z = 0 (0,0), (1/3,2/3); B at c/2 (0,0), (2/3,1/3)."""
    a, c = A_GRAPHITE, 2 * D_GRAPHITE
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    scaled = [[0, 0, 0], [1 / 3, 2 / 3, 0], [0, 0, 0.5], [2 / 3, 1 / 3, 0.5]]
    return Atoms("C4", scaled_positions=scaled, cell=cell, pbc=True)


def _lic6_cell(layers: int, filled: set[int], spacing_full=D_LIC6, spacing_empty=D_GRAPHITE):
    """AA graphene layers in the sqrt3 x sqrt3 R30 cell (6 C each), Li over a hexagon centre in
    the galleries numbered in ``filled`` (gallery k above layer k; the last wraps)."""
    sheet = graphene(formula="C2", a=A_GRAPHITE, size=(1, 1, 1), vacuum=None)
    sheet = make_supercell(sheet, [[2, 1, 0], [-1, 1, 0], [0, 0, 1]])  # 6 C
    gaps = [spacing_full if k in filled else spacing_empty for k in range(layers)]
    c = float(sum(gaps))
    cell = np.array(sheet.cell)
    cell[2] = [0.0, 0.0, c]
    atoms = Atoms(cell=cell, pbc=True)
    z = 0.0
    li = []
    for k in range(layers):
        part = sheet.copy()
        part.positions[:, 2] = z
        atoms += part
        if k in filled:
            # graphene atoms sit at fractional (0,0), (2/3,1/3) of the 1x1 cell: (1/3,2/3) is a
            # hexagon centre; it lies at Cartesian (0, a/sqrt3) in any supercell
            li.append([0.0, A_GRAPHITE / np.sqrt(3), z + gaps[k] / 2])
        z += gaps[k]
    host = list(range(len(atoms)))
    atoms += Atoms(["Li"] * len(li), positions=np.array(li).reshape(-1, 3))
    return atoms, host, list(range(len(host), len(atoms)))


def _flake_with_guests(stacking: str, spacing: float, galleries: list[int]):
    """3-layer circumcoronene flake (non-periodic) with one Li at mid-height of each listed
    gallery (0 = lower), over the flake centre."""
    flake = build_flake(FlakeBuilder(shells=3, layers=3, stacking=stacking, spacing=spacing))
    z_layers = sorted({round(float(z), 6) for z in flake.positions[:, 2]})
    host = list(range(len(flake)))
    centre = flake.positions[flake.get_tags() == 0, :2].mean(axis=0)  # ring centre of layer 0
    li = [[centre[0], centre[1], 0.5 * (z_layers[g] + z_layers[g + 1])] for g in galleries]
    atoms = flake + Atoms(["Li"] * len(li), positions=np.array(li).reshape(-1, 3))
    return atoms, host, list(range(len(host), len(atoms)))


def test_graphite_ab_periodic():
    atoms = _graphite_ab()
    rep = layer_report(atoms, range(len(atoms)), [])
    assert rep.layer_count == 2
    assert len(rep.galleries) == 2  # periodic: top layer to the image of the bottom one
    assert rep.period == pytest.approx(2 * D_GRAPHITE)
    assert np.allclose(np.abs(rep.normal), [0, 0, 1])
    # handbook value: 3.35 Å spacing
    assert rep.spacings == pytest.approx([D_GRAPHITE, D_GRAPHITE], abs=0.01)
    # handbook value: graphite is Bernal (AB) stacked
    assert rep.registries == ["AB", "AB"]
    assert [g.matched_fraction for g in rep.galleries] == pytest.approx([0.5, 0.5])
    # common practice: no guests, no stage
    assert rep.stage is None and rep.staging == "empty"


def test_graphite_ab_supercell_and_ase_builder_agree():
    from ase.lattice.hexagonal import Graphite

    # ASE's graphite basis is AB as well (handbook structure); a 2x2x1 supercell of the hand-built
    # cell must give the same answer (in-plane minimum image)
    ase_graphite = Graphite("C", latticeconstant={"a": A_GRAPHITE, "c": 2 * D_GRAPHITE})
    for atoms in (ase_graphite, _graphite_ab().repeat((2, 2, 1))):
        rep = layer_report(atoms, range(len(atoms)), [])
        assert rep.registries == ["AB", "AB"]
        assert rep.spacings == pytest.approx([D_GRAPHITE, D_GRAPHITE], abs=0.01)


@pytest.mark.parametrize("layers", [1, 2])
def test_lic6_stage_1_aa(layers):
    atoms, host, guests = _lic6_cell(layers, set(range(layers)))
    rep = layer_report(atoms, host, guests)
    assert rep.layer_count == layers
    assert rep.guest_counts == [1] * layers
    assert rep.guests_outside == 0
    # handbook value (from memory): 3.70 Å in LiC6
    assert rep.spacings == pytest.approx([D_LIC6] * layers, abs=0.01)
    # common practice: every gallery filled -> stage 1; LiC6 is AA stacked (handbook)
    assert rep.stage == 1 and rep.staging == "regular"
    assert rep.registries == ["AA"] * layers


def test_lic12_stage_2():
    atoms, host, guests = _lic6_cell(4, {1, 3})
    rep = layer_report(atoms, host, guests)
    assert rep.layer_count == 4 and len(rep.galleries) == 4
    assert sorted(rep.guest_counts) == [0, 0, 1, 1]
    filled = rep.filled
    assert len(filled) == 2 and (filled[1] - filled[0]) == 2  # alternate galleries
    # common practice: filled galleries every 2nd -> stage 2
    assert rep.stage == 2
    assert rep.registries == ["AA"] * 4
    assert sorted(rep.spacings) == pytest.approx([D_GRAPHITE] * 2 + [D_LIC6] * 2, abs=0.01)


def test_periodic_irregular_pattern():
    atoms, host, guests = _lic6_cell(5, {0, 1, 3})
    rep = layer_report(atoms, host, guests)
    assert rep.stage is None and rep.staging == "irregular"


def test_flake_both_galleries_stage_1_ab():
    atoms, host, guests = _flake_with_guests("AB", D_GRAPHITE, [0, 1])
    rep = layer_report(atoms, host, guests)
    assert rep.layer_count == 3 and len(rep.galleries) == 2  # non-periodic: no wrap gallery
    assert rep.period is None
    assert rep.guest_counts == [1, 1]
    assert rep.stage == 1  # common practice: every gallery filled
    assert rep.registries == ["AB", "AB"]  # the builder stacks AB (Bernal)


def test_flake_lower_gallery_only_is_undetermined():
    atoms, host, guests = _flake_with_guests("AB", D_GRAPHITE, [0])
    rep = layer_report(atoms, host, guests)
    assert rep.guest_counts == [1, 0]
    # documented choice: one filled gallery in a finite stack does not fix the period
    assert rep.stage is None and rep.staging == "undetermined"


def test_guest_outside_every_gallery_is_counted_separately():
    atoms, host, guests = _flake_with_guests("AB", D_GRAPHITE, [0, 1])
    top = atoms.positions[:, 2].max()
    atoms += Atoms("Li", positions=[[0.0, 0.0, top + 2.0]])
    rep = layer_report(atoms, host, [*guests, len(atoms) - 1])
    assert rep.guest_counts == [1, 1]
    assert rep.outside_guest_indices == [len(atoms) - 1]
    assert rep.stage == 1


def test_tilted_finite_stack_same_stage_and_spacings():
    atoms, host, guests = _flake_with_guests("AA", D_LIC6, [0, 1])
    flat = layer_report(atoms, host, guests)
    tilted = atoms.copy()
    rot = Rotation.from_euler("x", 30, degrees=True)
    tilted.positions = rot.apply(atoms.positions) + np.array([0.3, -1.1, 2.0])
    rep = layer_report(tilted, host, guests)
    assert flat.stage == rep.stage == 1
    assert rep.spacings == pytest.approx(flat.spacings, abs=1e-6)
    assert rep.spacings == pytest.approx([D_LIC6, D_LIC6], abs=0.01)
    assert rep.registries == flat.registries == ["AA", "AA"]
    # the normal is fitted: it follows the rotation (up to sign)
    assert abs(np.dot(rep.normal, rot.apply([0, 0, 1]))) == pytest.approx(1.0, abs=1e-6)


@pytest.mark.parametrize(
    ("pattern", "periodic", "expected"),
    [
        ([0, 0, 0], False, (None, "empty")),
        ([1, 1, 1], False, (1, "regular")),
        ([1, 0, 1, 0, 1], False, (2, "regular")),
        ([0, 1, 0, 1], False, (2, "regular")),
        ([1, 0, 0, 1, 0, 0], False, (3, "regular")),
        ([1, 0, 0, 0, 1], False, (4, "regular")),
        ([1, 0, 1, 0, 0, 0], False, (None, "irregular")),  # end run longer than n - 1
        ([1, 1, 0], False, (None, "irregular")),
        ([1, 0], False, (None, "undetermined")),
        ([0, 1, 0], False, (None, "undetermined")),
        ([1], False, (1, "regular")),
        ([1, 0], True, (2, "regular")),
        ([0, 1, 0, 0], True, (4, "regular")),
        ([1, 1, 0, 1, 0], True, (None, "irregular")),
    ],
)
def test_stage_rules(pattern, periodic, expected):
    assert stage_of(pattern, periodic) == expected


def test_host_guest_overlap_is_an_error():
    atoms = _graphite_ab()
    with pytest.raises(StructureError, match="both host and guest"):
        layer_report(atoms, range(len(atoms)), [0])
    with pytest.raises(StructureError, match="out of range"):
        layer_report(atoms, range(len(atoms)), [99])
