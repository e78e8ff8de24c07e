"""Rim/interior split, guest spacing and charge transfer (ionwell.science.occupancy).

Sources: flake geometry from ionwell.science.host.build_flake (ring centres at i·a1 + j·a2 with
a1 = sqrt(3)·cc·(1, 0), host.py docstring); the rim split is cross-checked against the
independent bond-graph edge criterion of ionwell.science.checks.edge_atoms; AB graphite a = 2.46 Å,
3.35 Å interlayer spacing and benzene C–C 1.39 Å, C–H 1.09 Å (handbook values); guest distances
against ase.neighborlist and brute-force images; charges are Mulliken charges from PySCF
(reference library), whose sum is the system's total charge (a property of Mulliken analysis).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from ase import Atoms
from ase.neighborlist import neighbor_list
from scipy.spatial.transform import Rotation

from ionwell.config.campaign import FlakeBuilder
from ionwell.errors import IonwellError, StructureError
from ionwell.science.checks import edge_atoms
from ionwell.science.host import build_flake
from ionwell.science.occupancy import (
    DEFAULT_RIM_WIDTH,
    charge_transfer,
    guest_spacing,
    nearest_guest_distances,
    rim_split,
    rim_split_reason,
)

A_GRAPHITE = 2.46  # Å, in-plane lattice constant of graphite (handbook value)
D_GRAPHITE = 3.35  # Å, interlayer spacing of graphite (handbook value)
CC_BENZENE = 1.39  # Å, C–C bond of benzene (handbook value)
CH_BENZENE = 1.09  # Å, C–H bond of benzene (handbook value)


# ---------------------------------------------------------------------------------------------
# structures


def _carbons_within(atoms: Atoms, point: np.ndarray, tag: int, radius: float) -> int:
    """Carbons of sheet ``tag`` within ``radius`` (in plane, xy) of ``point``."""
    sel = (atoms.numbers == 6) & (atoms.get_tags() == tag)
    d = np.linalg.norm(atoms.positions[sel, :2] - point[:2], axis=1)
    return int((d <= radius).sum())


def _bilayer_with_li() -> tuple[Atoms, list[int], int, int]:
    """AB bilayer of coronene-like sheets (2 layers, 2 shells) with a Li midway in the gallery
    over the central hexagon of the lower sheet and one over an outermost hexagon of it.

    Returns the atoms, host indices, the central Li's index and the rim Li's index.
    """
    builder = FlakeBuilder(layers=2, shells=2)
    atoms = build_flake(builder)
    tags = atoms.get_tags()
    lower = (atoms.numbers == 6) & (tags == 0)
    # the sheet is symmetric about its central ring (host.py): the C centroid is its centre
    centre = atoms.positions[lower].mean(axis=0)
    outer = centre + np.array([np.sqrt(3.0) * builder.cc, 0.0, 0.0])  # a1, host.py docstring
    # both really are hexagon centres: six carbons of the lower sheet at cc, none closer
    for p in (centre, outer):
        assert _carbons_within(atoms, p, 0, builder.cc * 1.01) == 6
        assert _carbons_within(atoms, p, 0, builder.cc * 0.99) == 0
    # outer is in the outermost ring: the flake has two shells, outer is one ring-step out
    z_mid = 0.5 * (atoms.positions[tags == 0, 2].mean() + atoms.positions[tags == 1, 2].mean())
    host = list(range(len(atoms)))
    li = Atoms("Li2", positions=[[centre[0], centre[1], z_mid], [outer[0], outer[1], z_mid]])
    atoms += li
    return atoms, host, len(host), len(host) + 1


def _graphite_ab() -> Atoms:
    """Bernal graphite, 2 layers per cell: A at z = 0 (0,0), (1/3,2/3); B at c/2 (0,0), (2/3,1/3)."""
    a, c = A_GRAPHITE, 2 * D_GRAPHITE
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    scaled = [[0, 0, 0], [1 / 3, 2 / 3, 0], [0, 0, 0.5], [2 / 3, 1 / 3, 0.5]]
    return Atoms("C4", scaled_positions=scaled, cell=cell, pbc=True)


def _benzene() -> Atoms:
    """Benzene in the xy plane, centred on the origin (C–C 1.39 Å, C–H 1.09 Å, D6h)."""
    ang = np.deg2rad(60.0 * np.arange(6))
    ring = np.column_stack([np.cos(ang), np.sin(ang), np.zeros(6)])
    return Atoms("C6H6", positions=np.vstack([CC_BENZENE * ring, (CC_BENZENE + CH_BENZENE) * ring]))


# ---------------------------------------------------------------------------------------------
# rim split


def test_rim_guest_is_rim_and_central_guest_interior():
    # the requirement: a guest placed at the rim counts as rim
    atoms, host, li_centre, li_rim = _bilayer_with_li()
    split = rim_split(atoms, host, [li_centre, li_rim])
    assert split is not None
    assert split.rim_width == DEFAULT_RIM_WIDTH
    assert split.guest_rim == [li_rim]
    assert split.guest_interior == [li_centre]
    assert (split.guests_rim, split.guests_interior) == (1, 1)
    # flake built with its sheets in the xy plane (host.py): the fitted normal is z
    assert np.allclose(split.normal, [0.0, 0.0, 1.0], atol=1e-6)
    depth_centre, depth_rim = split.guest_depth
    assert 0.0 < depth_rim <= DEFAULT_RIM_WIDTH < depth_centre
    # host atoms: every host atom in exactly one of the two lists
    assert sorted(split.host_rim + split.host_interior) == host
    assert split.host_interior  # a 2-shell bilayer has carbons more than 3 Å inside


def test_edge_atoms_are_rim():
    # independent criterion: checks.edge_atoms (hydrogens and under-coordinated carbons from
    # the covalent bond graph) must all lie in the geometric rim
    atoms, host, li_centre, li_rim = _bilayer_with_li()
    split = rim_split(atoms, host, [li_centre, li_rim])
    assert split is not None
    edge = edge_atoms(atoms, host)
    assert edge
    assert set(edge) <= set(split.host_rim)
    # and every hydrogen lies in the rim (the terminating atoms define the outline)
    hydrogens = [i for i in host if atoms.numbers[i] == 1]
    assert set(hydrogens) <= set(split.host_rim)


@pytest.mark.parametrize("seed", [3, 11])
def test_split_does_not_depend_on_orientation(seed):
    # the normal is fitted: a rigidly rotated and shifted copy gives the same split and depths,
    # and the fitted normal is the rotated z axis
    atoms, host, li_centre, li_rim = _bilayer_with_li()
    ref = rim_split(atoms, host, [li_centre, li_rim])
    rot = Rotation.random(random_state=seed)
    tilted = atoms.copy()
    tilted.positions = rot.apply(atoms.positions) + np.array([1.3, -4.2, 7.7])
    split = rim_split(tilted, host, [li_centre, li_rim])
    assert ref is not None and split is not None
    assert split.host_rim == ref.host_rim
    assert split.guest_rim == ref.guest_rim
    assert split.guest_interior == ref.guest_interior
    assert np.allclose(split.guest_depth, ref.guest_depth, atol=1e-6)
    z_rot = rot.apply([0.0, 0.0, 1.0])
    assert abs(abs(float(np.dot(split.normal, z_rot))) - 1.0) < 1e-8


def test_single_sheet_normal_and_split():
    # one layer: the normal is that of the sheet's plane (here a rotated xy plane)
    atoms = build_flake(FlakeBuilder(layers=1, shells=3))
    centre = atoms.positions[atoms.numbers == 6].mean(axis=0)  # central ring centre
    host = list(range(len(atoms)))
    atoms += Atoms("Li", positions=[centre + [0.0, 0.0, 1.7]])
    rot = Rotation.from_rotvec([0.4, -0.9, 0.3])
    atoms.positions = rot.apply(atoms.positions)
    split = rim_split(atoms, host, [len(host)])
    assert split is not None
    assert abs(abs(float(np.dot(split.normal, rot.apply([0.0, 0.0, 1.0])))) - 1.0) < 1e-8
    assert split.guest_interior == [len(host)]


def test_guest_outside_outline_is_rim_with_negative_depth():
    # a guest 2 Å beyond the farthest host atom along x, in plane: outside the hull
    atoms, host, _, _ = _bilayer_with_li()
    far = atoms.positions[host][np.argmax(atoms.positions[host, 0])]
    atoms += Atoms("Li", positions=[far + [2.0, 0.0, 0.0]])
    g = len(atoms) - 1
    split = rim_split(atoms, host, [g])
    assert split is not None
    assert split.guest_rim == [g]
    # the farthest atom along x is a hull vertex, so the depth is at most -2 Å
    assert split.guest_depth[0] <= -2.0 + 1e-9


def test_flake_in_vacuum_box_same_as_isolated():
    # the same particle in a periodic box with 6 Å of vacuum, shifted so that it is cut by the
    # cell boundary and wrapped: physically the same finite flake, so the same split
    atoms, host, li_centre, li_rim = _bilayer_with_li()
    ref = rim_split(atoms, host, [li_centre, li_rim])
    boxed = atoms.copy()
    boxed.center(vacuum=6.0)
    boxed.pbc = True
    boxed.positions += 0.5 * boxed.cell.lengths()
    boxed.wrap()
    split = rim_split(boxed, host, [li_centre, li_rim])
    assert ref is not None and split is not None
    assert split.host_rim == ref.host_rim
    assert split.guest_rim == ref.guest_rim
    assert np.allclose(split.guest_depth, ref.guest_depth, atol=1e-6)


def test_periodic_graphite_has_no_rim():
    # a sheet periodic in plane has no outline: no split, and a reason is given
    graphite = _graphite_ab().repeat((3, 3, 1))
    host = list(range(len(graphite)))
    graphite += Atoms("Li", positions=[[0.0, A_GRAPHITE / np.sqrt(3), D_GRAPHITE / 2]])
    assert rim_split(graphite, host, [len(host)]) is None
    reason = rim_split_reason(graphite, host, [len(host)])
    assert reason is not None and "periodic in the layer plane" in reason
    # a finite flake has a split and no reason
    atoms, host2, *_ = _bilayer_with_li()
    assert rim_split_reason(atoms, host2) is None


def test_rim_split_bad_indices():
    atoms, host, li_centre, _ = _bilayer_with_li()
    with pytest.raises(StructureError, match="both host and guest"):
        rim_split(atoms, host, [0])
    with pytest.raises(StructureError, match="out of range"):
        rim_split(atoms, host, [len(atoms)])
    with pytest.raises(StructureError, match="rim_width"):
        rim_split(atoms, host, [li_centre], rim_width=-1.0)


# ---------------------------------------------------------------------------------------------
# guest spacing


def _brute_force_nearest(atoms: Atoms, guests: list[int]) -> list[float]:
    """Nearest other guest over all images within one cell in each periodic direction."""
    shifts = [
        np.array(s) @ np.asarray(atoms.cell)
        for s in itertools.product(*[(-1, 0, 1) if p else (0,) for p in atoms.pbc])
    ]
    out = []
    for g in guests:
        best = np.inf
        for h in guests:
            if h == g:
                continue
            for t in shifts:
                best = min(best, float(np.linalg.norm(atoms.positions[h] + t - atoms.positions[g])))
        out.append(best)
    return out


def test_nearest_guest_minimum_image():
    # cubic 10 Å cell, periodic: Li at x = 0.5 and x = 9.0 are 8.5 Å apart directly but 1.5 Å
    # apart through the boundary; a third Li at x = 5.0 is 4.0 Å from the one at 9.0 and 4.5 Å
    # from the one at 0.5 (hand geometry, all at y = z = 5)
    atoms = Atoms(
        "Li3",
        positions=[[0.5, 5, 5], [9.0, 5, 5], [5.0, 5, 5]],
        cell=[10.0, 10.0, 10.0],
        pbc=True,
    )
    d = nearest_guest_distances(atoms, [0, 1, 2])
    assert np.allclose(d, [1.5, 1.5, 4.0])
    # ase.neighborlist: nearest neighbour of each atom within 6 Å
    i, dist = neighbor_list("id", atoms, 6.0)
    assert np.allclose(d, [dist[i == k].min() for k in range(3)])
    # without periodicity the direct distances count
    atoms.pbc = False
    assert np.allclose(nearest_guest_distances(atoms, [0, 1, 2]), [4.5, 4.0, 4.0])


def test_nearest_guest_against_brute_force():
    # random guests among host atoms in a skewed periodic cell (pbc in two directions), checked
    # against a brute-force search over neighbouring images
    rng = np.random.default_rng(7)
    cell = np.array([[7.0, 0.0, 0.0], [2.5, 6.0, 0.0], [0.5, 0.8, 9.0]])
    atoms = Atoms("C4Li5", scaled_positions=rng.random((9, 3)), cell=cell, pbc=[True, True, False])
    guests = [8, 4, 6, 5, 7]
    d = nearest_guest_distances(atoms, guests)
    assert np.allclose(d, _brute_force_nearest(atoms, guests))
    spacing = guest_spacing(atoms, guests)
    assert spacing.nearest == d
    assert spacing.min == pytest.approx(min(d))
    assert spacing.mean == pytest.approx(float(np.mean(d)))


def test_guest_spacing_fewer_than_two():
    atoms = Atoms("CLi", positions=[[0, 0, 0], [0, 0, 2]])
    assert nearest_guest_distances(atoms, [1]) == []
    assert nearest_guest_distances(atoms, []) == []
    s = guest_spacing(atoms, [1])
    assert s.nearest == [] and s.min is None and s.mean is None


# ---------------------------------------------------------------------------------------------
# charge transfer


def _mulliken(atoms: Atoms, charge: int, spin: int, basis: str = "sto-3g") -> np.ndarray:
    """Mulliken charges (e) from a PySCF LDA calculation (RKS, or UKS with Newton SCF)."""
    from pyscf import dft, gto

    mol = gto.M(
        atom=[
            (s, tuple(p))
            for s, p in zip(atoms.get_chemical_symbols(), atoms.positions, strict=True)
        ],
        basis=basis,
        charge=charge,
        spin=spin,
        unit="Angstrom",
        verbose=0,
    )
    mf = dft.UKS(mol) if spin else dft.RKS(mol)
    mf.xc = "lda,vwn"
    if spin:
        mf = mf.newton()  # plain DIIS does not converge the Li–benzene doublet
    mf.kernel()
    assert mf.converged
    return np.asarray(mf.mulliken_pop(verbose=0)[1], dtype=float)


@pytest.fixture(scope="module")
def benzene_li_cation():
    """Benzene and benzene + Li+ (2.0 Å above the ring centre), LDA/sto-3g Mulliken charges."""
    pytest.importorskip("pyscf")
    host = _benzene()
    system = host + Atoms("Li", positions=[[0.0, 0.0, 2.0]])
    return system, _mulliken(host, 0, 0), _mulliken(system, 1, 0)


def test_charge_transfer_mulliken_li_cation(benzene_li_cation):
    system, q0, q = benzene_li_cation
    host, guest = list(range(12)), [12]
    # Mulliken charges sum to the total charge: 0 for benzene, +1 for benzene + Li+
    assert q0.sum() == pytest.approx(0.0, abs=1e-8)
    assert q.sum() == pytest.approx(1.0, abs=1e-8)
    # rim width 0.5 Å: the hydrogens lie on the outline (depth 0), the carbons about 0.94 Å
    # inside (2.48·cos 30° - 1.39·cos 30°, hand geometry), the Li over the centre 2.15 Å inside
    split = rim_split(system, host, guest, rim_width=0.5)
    assert split is not None
    assert split.host_rim == list(range(6, 12))  # the six H
    assert split.guest_interior == guest
    ct = charge_transfer(q, q0, host, guest, host_rim=split.host_rim, scheme="mulliken")
    assert ct.scheme == "mulliken"
    assert ct.guest_charges == [pytest.approx(float(q[12]))]
    assert ct.mean_guest_charge == pytest.approx(float(q[12]))
    # charge conservation: guest charge + host charge change = change of total charge (+1)
    assert ct.total_guest_charge - ct.host_electrons_gained == pytest.approx(1.0, abs=1e-8)
    # the rim and interior parts add up to the host total
    assert ct.host_rim_electrons_gained is not None
    assert ct.host_interior_electrons_gained is not None
    total = ct.host_rim_electrons_gained + ct.host_interior_electrons_gained
    assert total == pytest.approx(ct.host_electrons_gained, abs=1e-12)
    # by hand from the charges
    assert ct.host_rim_electrons_gained == pytest.approx(-float((q[6:12] - q0[6:12]).sum()))
    # chemistry: the Li stays electron-poor (positive) but below +1 (the ring donates some
    # density back to the cation), so the host loses that much
    assert 0.0 < ct.mean_guest_charge < 1.0
    assert ct.host_electrons_gained == pytest.approx(ct.mean_guest_charge - 1.0)
    # without a rim split there are no rim/interior parts
    plain = charge_transfer(q, q0, host, guest)
    assert plain.host_rim_electrons_gained is None
    assert plain.host_interior_electrons_gained is None
    assert plain.host_electrons_gained == pytest.approx(ct.host_electrons_gained)


def test_charge_transfer_mulliken_neutral_li_donates():
    # Li is an electron donor: in LiH (bond length 1.595 Å, NIST diatomic data, from memory)
    # Li carries a positive Mulliken charge (ionic Li+H-, common practice). Host: the H atom,
    # whose pristine charge (a lone neutral atom) is 0. PySCF LDA/6-31G, a few seconds; on
    # benzene the minimal sto-3g basis puts a negative Mulliken charge on Li (a basis artefact).
    pytest.importorskip("pyscf")
    h = Atoms("H", positions=[[0.0, 0.0, 0.0]])
    q0 = _mulliken(h, 0, 1, basis="6-31g")
    assert q0 == pytest.approx([0.0], abs=1e-10)
    q = _mulliken(h + Atoms("Li", positions=[[0.0, 0.0, 1.595]]), 0, 0, basis="6-31g")
    assert q.sum() == pytest.approx(0.0, abs=1e-8)
    ct = charge_transfer(q, q0, [0], [1], scheme="mulliken")
    assert ct.mean_guest_charge is not None and 0.1 < ct.mean_guest_charge < 1.0
    assert ct.host_electrons_gained == pytest.approx(ct.mean_guest_charge, abs=1e-8)


def test_charge_transfer_no_guests():
    # host charges unchanged, no guests: nothing moved
    q0 = [0.1, -0.1, 0.0]
    ct = charge_transfer(q0, q0, [0, 1, 2], [])
    assert ct.mean_guest_charge is None
    assert ct.total_guest_charge == 0.0
    assert ct.host_electrons_gained == 0.0


def test_charge_transfer_bad_input():
    host, guest = list(range(12)), [12]
    q0 = np.zeros(12)
    # one charge short: the message names the expected length (13 atoms)
    with pytest.raises(IonwellError, match="at least 13"):
        charge_transfer(np.zeros(12), q0, host, guest)
    # pristine charges must be one per host atom
    with pytest.raises(IonwellError, match="expected 12 pristine charges"):
        charge_transfer(np.zeros(13), np.zeros(13), host, guest)
    with pytest.raises(IonwellError, match="not host atoms"):
        charge_transfer(np.zeros(13), q0, host, guest, host_rim=[12])
    with pytest.raises(IonwellError, match="listed twice"):
        charge_transfer(np.zeros(13), q0, host, [11])
    with pytest.raises(IonwellError, match="non-finite"):
        charge_transfer([np.nan] * 13, q0, host, guest)
