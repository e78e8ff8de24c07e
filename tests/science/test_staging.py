"""Staging and stacking analysis (ionwell.science.staging.layer_report).

References: AB (Bernal) graphite, a = 2.46 Å and 3.35 Å interlayer spacing (handbook value);
LiC6, AA-stacked graphene with Li over hexagon centres in every gallery at 3.70 Å spacing
(handbook value for LiC6, from memory); stage definition (common practice): the period, in
galleries, of filled galleries along the stacking axis; Bernal (AB) stacking puts half of the
atoms of one sheet over atoms of the next and the other half over its hexagon centres, AA sheets
are eclipsed (common practice / textbook); C–C bond of graphene 1.42 Å (handbook value, from
memory), which is also the distance from a hexagon centre to its atoms.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import graphene, make_supercell
from scipy.spatial.transform import Rotation

from ionwell.config.campaign import FlakeBuilder
from ionwell.errors import StructureError
from ionwell.science.host import build_flake
from ionwell.science.staging import MIN_REGISTRY_ATOMS, layer_report, stacking_registry, stage_of

A_GRAPHITE = 2.46  # Å, in-plane lattice constant of graphite (handbook value)
D_GRAPHITE = 3.35  # Å, interlayer spacing of graphite (handbook value)
D_LIC6 = 3.70  # Å, interlayer spacing of LiC6 (handbook value, from memory)
CC = 1.42  # Å, C–C bond of graphene (handbook value, from memory)


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


def _flake_with_guests(
    stacking: str, spacing: float, galleries: list[int], layers: int = 3, shells: int = 3
):
    """Circumcoronene (``shells``) flake of ``layers`` sheets (non-periodic) with one Li at
    mid-height of each listed gallery (0 = lower), over the flake centre."""
    flake = build_flake(
        FlakeBuilder(shells=shells, layers=layers, stacking=stacking, spacing=spacing)
    )
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
    # handbook value: graphite is Bernal (AB) stacked; textbook: half of the atoms over atoms,
    # half over hexagon centres. Periodic in plane: every atom counts, however few per cell.
    assert rep.registries == ["AB", "AB"]
    assert [g.matched_fraction for g in rep.galleries] == pytest.approx([0.5, 0.5])
    assert [g.centred_fraction for g in rep.galleries] == pytest.approx([0.5, 0.5])
    assert [g.registry_atoms for g in rep.galleries] == [4, 4]
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
        ([1], False, (None, "undetermined")),  # changed on purpose: a bilayer has no stage
        ([0], False, (None, "empty")),
        ([1, 1], False, (1, "regular")),
        ([0, 1], False, (None, "undetermined")),
        ([1], True, (1, "regular")),  # one gallery per period, filled: bulk stage 1
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


# ---------------------------------------------------------------------------------------------
# stacking registry


def _graphite(stacking: str) -> Atoms:
    """Graphite, 2 layers per cell (c = 2 × 3.35 Å): A at z = 0 with (0,0), (1/3,2/3); the second
    sheet at c/2 is (0,0), (2/3,1/3) for AB (Bernal, handbook structure) or the same sites as
    the first for AA (eclipsed)."""
    a, c = A_GRAPHITE, 2 * D_GRAPHITE
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    second = [2 / 3, 1 / 3, 0.5] if stacking == "AB" else [1 / 3, 2 / 3, 0.5]
    scaled = [[0, 0, 0], [1 / 3, 2 / 3, 0], [0, 0, 0.5], second]
    return Atoms("C4", scaled_positions=scaled, cell=cell, pbc=True)


def _report(atoms: Atoms):
    """Layer report of a host without guests (every atom a host atom)."""
    return layer_report(atoms, range(len(atoms)), [])


def _registries(atoms: Atoms) -> list:
    return _report(atoms).registries


def _flake(stacking: str, layers: int = 2, **size) -> Atoms:
    return build_flake(FlakeBuilder(layers=layers, stacking=stacking, **size))


def _move_layer(flake: Atoms, layer: int, shift=(0.0, 0.0), degrees: float = 0.0) -> Atoms:
    """``flake`` with sheet ``layer`` rotated in plane about its own centre, then shifted (Å)."""
    out = flake.copy()
    sel = out.get_tags() == layer
    centre = out.positions[sel].mean(axis=0)
    rot = Rotation.from_euler("z", degrees, degrees=True)
    out.positions[sel] = rot.apply(out.positions[sel] - centre) + centre
    out.positions[sel, :2] += np.asarray(shift)
    return out


@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_periodic_graphite_2x2_supercell(stacking):
    # textbook: Bernal AB (half over atoms, half over hexagon centres) and eclipsed AA
    for atoms in (_graphite(stacking).repeat((2, 2, 1)), _graphite(stacking).repeat((3, 1, 1))):
        rep = _report(atoms)
        assert rep.registries == [stacking, stacking]
        n = len(atoms)  # every atom of both layers is usable in a cell periodic in plane
        assert [g.registry_atoms for g in rep.galleries] == [n, n]
        expected = 0.5 if stacking == "AB" else 1.0
        assert [g.matched_fraction for g in rep.galleries] == pytest.approx([expected] * 2)


def test_ase_graphite_2x2_is_ab():
    from ase.lattice.hexagonal import Graphite

    # ASE's graphite basis is the Bernal (AB) structure (handbook)
    atoms = Graphite("C", latticeconstant={"a": A_GRAPHITE, "c": 2 * D_GRAPHITE}, size=(2, 2, 1))
    assert _registries(atoms) == ["AB", "AB"]


def test_periodic_ribbon_uses_the_footprint_across_it():
    # a two-layer strip periodic along a only, 6 cells wide along b: edges across b only
    for stacking in ("AB", "AA"):
        ribbon = _graphite(stacking).repeat((1, 6, 1))
        ribbon.pbc = [True, False, False]
        rep = _report(ribbon)
        assert rep.period is None and rep.registries == [stacking]
        assert MIN_REGISTRY_ATOMS <= rep.galleries[0].registry_atoms < len(ribbon)


@pytest.mark.parametrize(
    "size", [{"shells": 2}, {"shells": 3}, {"radius": 8.0}], ids=["coronene", "circum", "r8"]
)
@pytest.mark.parametrize("layers", [2, 3])
@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_flake_registry_from_coronene_up(stacking, layers, size):
    # textbook: the builder's AB is Bernal (one sublattice over atoms, the other over centres)
    rep = _report(_flake(stacking, layers, **size))
    assert rep.registries == [stacking] * (layers - 1)
    for g in rep.galleries:
        assert g.registry_atoms >= MIN_REGISTRY_ATOMS
        if stacking == "AB":  # textbook: about half on top, the rest over hexagon centres
            assert 0.4 <= g.matched_fraction <= 0.6
            assert g.matched_fraction + g.centred_fraction == pytest.approx(1.0)
        else:
            assert g.matched_fraction == pytest.approx(1.0)


@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_benzene_dimer_is_undetermined(stacking):
    # six carbons per sheet, all on the edge: too few atoms over the other sheet to tell
    rep = _report(_flake(stacking, shells=1))
    assert rep.registries == ["undetermined"]
    assert rep.galleries[0].registry_atoms < MIN_REGISTRY_ATOMS


@pytest.mark.parametrize("shells", [2, 3])
@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_slipped_stack_is_other(stacking, shells):
    # the builder's bond vector is (0, cc); half a bond across it (x) puts every atom 0.5 or
    # 0.62 bonds from the nearest atom of the other sheet: neither on top nor over a centre
    flake = _move_layer(_flake(stacking, shells=shells), 1, shift=(CC / 2, 0.0))
    assert _registries(flake) == ["other"]


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_coronene_registry_survives_random_displacements(stacking, seed):
    flake = _flake(stacking, layers=3, shells=2)
    rng = np.random.default_rng(seed)
    flake.positions += rng.uniform(-0.1, 0.1, size=flake.positions.shape)  # Å, every atom
    assert _registries(flake) == [stacking, stacking]


@pytest.mark.parametrize("degrees", [1.0, -1.0])
@pytest.mark.parametrize("stacking", ["AB", "AA"])
def test_coronene_registry_survives_a_1_degree_twist(stacking, degrees):
    flake = _move_layer(_flake(stacking, shells=2), 1, degrees=degrees)
    assert _registries(flake) == [stacking]
    rng = np.random.default_rng(11)
    flake.positions += rng.uniform(-0.1, 0.1, size=flake.positions.shape)
    assert _registries(flake) == [stacking]


def test_large_twist_is_other():
    # a large twist (21.8°, a commensurate angle of twisted bilayer graphene, common
    # practice) leaves no registry
    flake = _move_layer(_flake("AA", shells=3), 1, degrees=21.8)
    assert _registries(flake) == ["other"]


def test_registry_does_not_depend_on_orientation():
    flake = _flake("AB", layers=3, shells=2)
    rot = Rotation.random(random_state=5)
    turned = flake.copy()
    turned.positions = rot.apply(flake.positions) + np.array([4.0, -3.0, 1.0])
    assert _registries(turned) == _registries(flake) == ["AB", "AB"]


@pytest.mark.parametrize(
    ("args", "expected"),
    [
        ((1.0, 0.0, 24), "AA"),
        ((0.5, 0.5, 24), "AB"),
        ((0.45, 0.3, 24), "other"),  # half on top, but the rest not over hexagon centres
        ((0.0, 0.0, 24), "other"),
        ((0.8, 0.2, 24), "other"),
        ((0.5, 0.5, MIN_REGISTRY_ATOMS - 1), "undetermined"),
        ((None, None, 0), "undetermined"),
    ],
)
def test_registry_rule(args, expected):
    assert stacking_registry(*args) == expected


def test_registry_rule_has_no_minimum_for_periodic_sheets():
    assert stacking_registry(0.5, 0.5, 4, infinite=True) == "AB"
    assert stacking_registry(1.0, 0.0, 2, infinite=True) == "AA"


# ---------------------------------------------------------------------------------------------
# stage of finite stacks


def test_bilayer_with_guests_has_no_stage():
    # one gallery shows no period: a bilayer is never staged (documented choice)
    atoms, host, guests = _flake_with_guests("AB", D_LIC6, [0], layers=2, shells=2)
    rep = layer_report(atoms, host, guests)
    assert rep.guest_counts == [1]
    assert rep.stage is None and rep.staging == "undetermined"
    assert rep.registries == ["AB"]


def test_bilayer_without_guests_is_empty():
    atoms, host, guests = _flake_with_guests("AA", D_GRAPHITE, [], layers=2, shells=2)
    rep = layer_report(atoms, host, guests)
    assert rep.stage is None and rep.staging == "empty"


def test_trilayer_both_galleries_filled_is_stage_1():
    atoms, host, guests = _flake_with_guests("AA", D_LIC6, [0, 1], layers=3, shells=2)
    rep = layer_report(atoms, host, guests)
    assert rep.guest_counts == [1, 1]
    assert rep.stage == 1 and rep.staging == "regular"  # common practice: every gallery filled


def test_trilayer_one_gallery_filled_is_undetermined():
    atoms, host, guests = _flake_with_guests("AB", D_LIC6, [1], layers=3, shells=2)
    rep = layer_report(atoms, host, guests)
    assert rep.guest_counts == [0, 1]
    assert rep.stage is None and rep.staging == "undetermined"


def test_four_layers_alternate_galleries_is_stage_2():
    atoms, host, guests = _flake_with_guests("AB", D_GRAPHITE, [0, 2], layers=4, shells=2)
    rep = layer_report(atoms, host, guests)
    assert rep.guest_counts == [1, 0, 1]
    # common practice: filled galleries every 2nd -> stage 2
    assert rep.stage == 2 and rep.staging == "regular"
    assert rep.registries == ["AB", "AB", "AB"]


@pytest.mark.parametrize("shift", [(0, 0, 0), (0, 0, 1), (0, 0, -1), (1, -1, 0), (-2, 1, 1)])
def test_guest_across_the_cell_face_is_in_the_wrapping_gallery(shift):
    from ase.geometry import get_distances

    from ionwell.config.campaign import GraphiteBuilder
    from ionwell.science.host import build_graphite

    # ionwell's periodic AB graphite (sheets at c/4 and 3c/4; the same crystal as ASE's Graphite,
    # tests/science/test_host.py): the gallery across the cell's face z = 0 is the one between the top
    # sheet and the image of the bottom one. A Li on its mid-plane, over a hexagon centre of the
    # lower sheet, given in any periodic image (whole lattice vectors), is in that gallery, and
    # the report is the same; one of two galleries filled -> stage 2 (common practice)
    host = build_graphite(GraphiteBuilder(kind="graphite"))
    cell = np.asarray(host.cell)
    site = np.array([0.0, 0.0, 0.0])  # z = 0: mid-plane between 5.025 and 1.675 + 6.7
    _, d = get_distances([site], host.positions, cell=cell, pbc=True)
    # ASE's minimum image: the nearest atom is straight above, across the face (an atom of the
    # image of sheet 0); below lies a hexagon centre of sheet 1, its atoms farther away
    assert d.min() == pytest.approx(D_GRAPHITE / 2, abs=1e-6)
    assert np.sort(d[0])[1] == pytest.approx(np.hypot(D_GRAPHITE / 2, CC), abs=0.01)
    atoms = host + Atoms("Li", positions=[site + np.asarray(shift) @ cell])
    rep = layer_report(atoms, range(len(host)), [len(host)])
    wrap = [g for g in rep.galleries if g.periodic_image]
    assert len(rep.galleries) == 2 and len(wrap) == 1
    assert wrap[0].guest_indices == [len(host)] and rep.guests_outside == 0
    assert rep.stage == 2 and rep.staging == "regular"
    assert rep.registries == ["AB", "AB"]
    assert rep.spacings == pytest.approx([D_GRAPHITE] * 2, abs=1e-9)
