"""Tests of ionwell.science.host: flake and graphite builders, formula units."""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist, pdist

from ionwell.config.campaign import FlakeBuilder, GraphiteBuilder, HostConfig
from ionwell.errors import StructureError
from ionwell.science.host import (
    build_flake,
    build_graphite,
    build_host,
    host_formula_units,
)

BOND_CUTOFF = 1.6  # Å: covalent C–C / C–H bonds are shorter, non-bonded contacts longer


def _split(atoms: Atoms) -> tuple[np.ndarray, np.ndarray]:
    return atoms.positions[atoms.numbers == 6], atoms.positions[atoms.numbers == 1]


def _check_sheet_geometry(atoms: Atoms, cc: float = 1.42, ch: float = 1.09) -> None:
    carbons, hydrogens = _split(atoms)
    dcc = cdist(carbons, carbons)
    np.fill_diagonal(dcc, np.inf)
    # every carbon's nearest carbon is at cc, and every C–C bond is cc long
    np.testing.assert_allclose(dcc.min(axis=1), cc, atol=1e-9)
    np.testing.assert_allclose(dcc[dcc < BOND_CUTOFF], cc, atol=1e-9)
    dch = cdist(hydrogens, carbons)
    np.testing.assert_allclose(dch.min(axis=1), ch, atol=1e-9)
    # sp2 carbon (common practice): exactly three bonded partners, C or H, within 1.6 Å
    partners = (dcc < BOND_CUTOFF).sum(axis=1) + (dch < BOND_CUTOFF).sum(axis=0)
    assert (partners == 3).all()
    # each H bonded to exactly one C; no H–H contact
    assert ((dch < BOND_CUTOFF).sum(axis=1) == 1).all()
    if len(hydrogens) > 1:
        assert pdist(hydrogens).min() > BOND_CUTOFF


# Formulas of benzene C6H6, coronene C24H12 and circumcoronene C54H18: common knowledge of these
# molecules.
@pytest.mark.parametrize(("shells", "formula"), [(1, "C6H6"), (2, "C24H12"), (3, "C54H18")])
def test_shell_flakes_have_the_known_formulas(shells: int, formula: str) -> None:
    atoms = build_flake(FlakeBuilder(shells=shells, layers=1))
    assert atoms.get_chemical_formula(mode="hill") == formula
    _check_sheet_geometry(atoms)
    assert np.ptp(atoms.positions[:, 2]) < 1e-12  # H atoms lie in the sheet plane
    assert not atoms.pbc.any()
    assert atoms.cell.rank == 0


def test_custom_bond_lengths_are_used() -> None:
    atoms = build_flake(FlakeBuilder(shells=2, layers=1, cc=1.40, ch=1.08))
    _check_sheet_geometry(atoms, cc=1.40, ch=1.08)


def test_flake_metadata_tags_and_centring() -> None:
    builder = FlakeBuilder(shells=2, layers=3, stacking="AB")
    atoms = build_flake(builder)
    assert len(atoms) == 3 * 36
    assert sorted(set(atoms.get_tags())) == [0, 1, 2]
    assert atoms.info["host_builder"] == builder.model_dump(mode="json")
    np.testing.assert_allclose(atoms.positions.mean(axis=0), 0.0, atol=1e-9)
    for layer in range(3):
        z = atoms.positions[atoms.get_tags() == layer, 2]
        assert np.ptp(z) < 1e-12
    assert FlakeBuilder.model_validate(atoms.info["host_builder"]) == builder


def _layer(atoms: Atoms, tag: int) -> np.ndarray:
    return atoms.positions[(atoms.get_tags() == tag) & (atoms.numbers == 6)]


def test_interlayer_distance() -> None:
    atoms = build_flake(FlakeBuilder(shells=2, layers=2, spacing=3.35))
    dz = _layer(atoms, 1)[:, 2].mean() - _layer(atoms, 0)[:, 2].mean()
    assert dz == pytest.approx(3.35, abs=1e-9)


def test_ab_stacking_is_bernal() -> None:
    """AB: one sublattice of the upper sheet over carbons, the other over hexagon centres.

    What is checked, precisely (circumcoronene pair, shells=3):
    * interior: every upper carbon within 3.5 Å of the stack axis is either over a lower carbon
      (in-plane distance < 0.1 Å) or over the centre of a complete lower hexagon (six lower
      carbons at in-plane distance cc, none nearer); which of the two is decided by the upper
      carbon's sublattice (two-colouring of the C–C bond graph), as in Bernal graphite.
    * the two sublattices of a sheet are equal in size (27 + 27), so in the infinite-lattice
      limit exactly half the carbons are eclipsed.
    * whole flake: the upper sheet is the lower one moved by a bond vector, so the eclipsed
      carbons are one per C–C bond parallel to that vector: (3·54 − 18)/2 = 72 bonds, a third of
      them in each of the three bond directions → 24 eclipsed carbons of 54.
    """
    cc = 1.42
    atoms = build_flake(FlakeBuilder(shells=3, layers=2, stacking="AB"))
    lower, upper = _layer(atoms, 0)[:, :2], _layer(atoms, 1)[:, :2]
    axis = atoms.positions.mean(axis=0)[:2]

    # sublattice colouring of the upper sheet by breadth-first search over C–C bonds
    pairs = cKDTree(upper).query_pairs(BOND_CUTOFF)
    nbrs: dict[int, list[int]] = {i: [] for i in range(len(upper))}
    for a, b in pairs:
        nbrs[a].append(b)
        nbrs[b].append(a)
    colour = {0: 0}
    queue = [0]
    while queue:
        i = queue.pop()
        for j in nbrs[i]:
            if j not in colour:
                colour[j] = 1 - colour[i]
                queue.append(j)
            assert colour[j] != colour[i]  # bipartite
    colours = np.array([colour[i] for i in range(len(upper))])
    assert (colours == 0).sum() == (colours == 1).sum() == 27

    d = cdist(upper, lower)
    interior = np.linalg.norm(upper - axis, axis=1) <= 3.5
    assert interior.sum() >= 12
    eclipsed = d.min(axis=1) < 0.1
    hollow = (np.abs(d - cc) < 0.01).sum(axis=1) == 6
    hollow &= d.min(axis=1) > cc - 0.01
    assert (eclipsed ^ hollow)[interior].all()
    # the interior kind follows the sublattice exactly
    kinds = {(int(c), bool(e)) for c, e in zip(colours[interior], eclipsed[interior], strict=True)}
    assert len(kinds) == 2 and {c for c, _ in kinds} == {0, 1}

    assert eclipsed.sum() == 24


def test_aa_stacking_is_eclipsed() -> None:
    atoms = build_flake(FlakeBuilder(shells=3, layers=2, stacking="AA"))
    low = atoms.positions[atoms.get_tags() == 0][:, :2]
    up = atoms.positions[atoms.get_tags() == 1][:, :2]
    np.testing.assert_allclose(up, low, atol=1e-9)


@pytest.mark.parametrize("radius", [1.42, 2.5, 3.7, 5.0, 6.3, 7.77, 9.1, 12.0])
def test_radius_flake_is_pruned_and_terminated(radius: float) -> None:
    atoms = build_flake(FlakeBuilder(radius=radius, layers=1))
    carbons, hydrogens = _split(atoms)
    assert len(carbons) >= 6
    dcc = cdist(carbons, carbons)
    np.fill_diagonal(dcc, np.inf)
    assert ((dcc < BOND_CUTOFF).sum(axis=1) >= 2).all()
    _check_sheet_geometry(atoms)
    assert np.linalg.norm(carbons, axis=1).max() <= radius + 1e-9


def test_radius_flake_never_has_clashing_hydrogens() -> None:
    # a hexagon short of one carbon would put two H about 0.6 Å apart; bay regions are 1.75 Å
    for radius in np.arange(1.42, 16.0, 0.13):
        _, hydrogens = _split(build_flake(FlakeBuilder(radius=float(radius), layers=1)))
        if len(hydrogens) > 1:
            assert pdist(hydrogens).min() > 1.7, radius


def test_radius_matching_benzene_and_coronene() -> None:
    # a ring-centred disk of radius cc holds exactly the central ring
    assert build_flake(FlakeBuilder(radius=1.42, layers=1)).get_chemical_formula() == "C6H6"


def test_radius_too_small_is_refused() -> None:
    with pytest.raises(StructureError, match="radius"):
        build_flake(FlakeBuilder(radius=1.0, layers=1))


# ---------------------------------------------------------------------------------------------
# formula units


def test_host_formula_units() -> None:
    atoms = build_flake(FlakeBuilder(shells=3, layers=2))  # C108H36
    assert host_formula_units(atoms, None) == 1.0
    assert host_formula_units(atoms, {"C": 6}) == pytest.approx(18.0)
    assert host_formula_units(atoms, {"C": 3, "H": 1}) == pytest.approx(36.0)
    with pytest.raises(StructureError, match="no Li"):
        host_formula_units(atoms, {"Li": 1})
    with pytest.raises(StructureError, match="different number"):
        host_formula_units(atoms, {"C": 6, "H": 1})


# ---------------------------------------------------------------------------------------------
# periodic graphite


def _distance_spectrum(atoms: Atoms, cutoff: float = 6.0) -> np.ndarray:
    """Every atom's sorted neighbour distances up to ``cutoff`` (minimum image, all images),
    pooled and sorted: a fingerprint that two cells of the same crystal share per atom."""
    from ase.neighborlist import neighbor_list

    d = neighbor_list("d", atoms, cutoff)
    return np.sort(np.round(d, 6)) if len(d) else d


def _same_crystal(a: Atoms, b: Atoms) -> None:
    # the same crystal in two cells: equal density, equal distance spectrum per atom
    assert len(a) / a.get_volume() == pytest.approx(len(b) / b.get_volume(), rel=1e-9)
    sa, sb = _distance_spectrum(a), _distance_spectrum(b)
    assert len(sa) / len(a) == pytest.approx(len(sb) / len(b))
    # per atom: compare the spectra of equal-size supercells
    ra = np.sort(np.tile(sa, len(b)))
    rb = np.sort(np.tile(sb, len(a)))
    np.testing.assert_allclose(ra, rb, atol=1e-6)


@pytest.mark.parametrize("cell", ["sqrt3", 1, 2])
def test_periodic_graphite_ab_is_ase_graphite(cell) -> None:
    from ase.lattice.hexagonal import Graphite

    # ASE's Graphite has the Bernal (AB) basis (handbook structure): the same crystal as ours at
    # a = 2.46 Å, c = 2 x 3.35 Å, whatever the in-plane cell
    ours = build_graphite(GraphiteBuilder(kind="graphite", cell=cell))
    ref = Graphite("C", latticeconstant={"a": 2.46, "c": 6.70})
    _same_crystal(ours, ref)
    assert ours.pbc.all() and ours.cell.cellpar()[5] == pytest.approx(120.0)
    assert len(ours) == {"sqrt3": 12, 1: 4, 2: 16}[cell]
    assert sorted(set(ours.get_tags())) == [0, 1]
    # sheets at a quarter and three quarters of the cell height: one gallery across the face
    z = ours.positions[:, 2]
    np.testing.assert_allclose(np.unique(np.round(z, 6)), [1.675, 5.025])


def test_periodic_graphite_aa_is_stacked_graphene() -> None:
    from ase.build import graphene

    # AA: graphene sheets (ASE's builder) stacked straight above each other, 3.7 Å apart
    sheet = graphene("C2", a=2.46, vacuum=None)
    sheet.cell[2] = [0.0, 0.0, 3.7]
    sheet.pbc = True
    ours = build_graphite(GraphiteBuilder(kind="graphite", stacking="AA", spacing=3.7))
    _same_crystal(ours, sheet)


def test_periodic_graphite_bonds_and_build_host() -> None:
    host = HostConfig(builder={"kind": "graphite", "layers": 4, "cell": 2})
    atoms = build_host(host.builder)
    assert atoms.get_chemical_formula() == "C32" and atoms.cell[2][2] == pytest.approx(4 * 3.35)
    d = atoms.get_all_distances(mic=True)
    np.fill_diagonal(d, np.inf)
    # sp2 carbon (common practice): three neighbours at a/√3 = 1.420 Å, none closer
    assert d.min() == pytest.approx(2.46 / np.sqrt(3), abs=1e-6)
    assert ((d < BOND_CUTOFF).sum(axis=1) == 3).all()
    # configs from before the graphite builder (no 'kind') still build flakes
    assert HostConfig(builder={"layers": 1, "shells": 1}).builder.kind == "flake"
    with pytest.raises(ValueError, match="flake' or 'graphite"):
        HostConfig(builder={"kind": "graphene"})
    # AB repeats every two sheets: an odd count per cell would stack A on A across the cell face
    with pytest.raises(ValueError, match="even number of layers"):
        GraphiteBuilder(kind="graphite", layers=3)
    assert len(build_graphite(GraphiteBuilder(kind="graphite", layers=3, stacking="AA"))) == 18
