"""Formation energies, hull, voltage and capacity, each against an outside reference."""

from __future__ import annotations

import numpy as np
import pytest
from ase.phasediagram import PhaseDiagram

from ionwell.science.energetics import (
    capacity_mah_per_g,
    formation_energies,
    hull,
    lower_hull,
    voltage_profile,
)

# Invented test energies (eV) of a C12 host cell holding n = 0..4 Li, and μ_Li (eV per Li);
# invented data, used only to compare this module with ase.phasediagram on the same numbers.
N = [0, 1, 2, 3, 4]
E = [-110.00, -112.50, -115.05, -117.10, -119.30]
MU = -1.90


def test_hull_and_energies_above_it_agree_with_ase_phasediagram():
    ef = formation_energies(E, N, MU)
    ours = hull(N, ef)
    # reference implementation: ase.phasediagram.PhaseDiagram on the same total energies, with
    # pure C (the host) and Li (μ per atom) as the elemental references
    refs = [("C12", E[0]), ("Li", MU)] + [(f"Li{n}C12", E[n]) for n in N[1:]]
    pd = PhaseDiagram(refs, verbose=False)
    for n in N[1:]:
        e_hull, _, _ = pd.decompose(f"Li{n}C12")
        above_ase = E[n] - e_hull  # eV per Li_n C12 formula, as ours per structure
        assert ours.above[n] == pytest.approx(above_ase, abs=1e-9), n
    on_hull = [n for n in N if ours.above[n] < 1e-9]
    assert sorted(on_hull) == sorted(ours.vertices)


def test_voltage_between_hull_vertices_matches_a_hand_worked_example():
    # worked by hand from V = −[E(n2) − E(n1) − (n2 − n1)·μ] / ((n2 − n1)·z·e)
    # (Aydinol et al., Phys. Rev. B 56, 1354 (1997)):
    # vertices here are n = 0, 2, 4 (n = 1 and 3 lie above the hull, checked below):
    #   0 → 2: −[(−115.05) − (−110.00) − 2·(−1.90)] / 2 = −(−5.05 + 3.80) / 2 = 0.625 V
    #   2 → 4: −[(−119.30) − (−115.05) − 2·(−1.90)] / 2 = −(−4.25 + 3.80) / 2 = 0.225 V
    above = hull(N, formation_energies(E, N, MU)).above
    assert above[1] > 0 and above[3] > 0 and above[0] == above[2] == above[4] == 0
    steps = voltage_profile(E, N, MU, units=2.0)
    assert [(s.n_from, s.n_to) for s in steps] == [(0, 2), (2, 4)]
    assert steps[0].voltage == pytest.approx(0.625, abs=1e-12)
    assert steps[1].voltage == pytest.approx(0.225, abs=1e-12)
    assert steps[0].x_to == 1.0 and steps[1].x_to == 2.0
    # a divalent guest (z = 2) halves the voltage of the same energies
    assert voltage_profile(E, N, MU, z=2)[0].voltage == pytest.approx(0.3125)


def test_capacity_of_lic6_is_372_mah_per_g():
    # handbook value: LiC6 (graphite, one Li per six C) ≈ 372 mAh/g; F from scipy.constants,
    # the molar mass of carbon from ase.data
    assert capacity_mah_per_g(1.0, {"C": 6}) == pytest.approx(372.0, abs=1.0)
    assert capacity_mah_per_g(0.5, {"C": 6}) == pytest.approx(186.0, abs=0.5)


def test_hull_edge_cases():
    # collinear points: only the ends are vertices; one structure per n (the lowest counts)
    assert lower_hull([0, 1, 2], [0.0, -1.0, -2.0]) == [0, 2]
    assert lower_hull([0, 1, 1, 2], [0.0, 0.5, -1.0, 0.0]) == [0, 2, 3]
    assert lower_hull([0, 1], [0.0, 1.0]) == [0, 1]
    with pytest.raises(ValueError, match="pristine host"):
        formation_energies([1.0], [1], 0.0)
    assert np.allclose(formation_energies(E, N, MU)[0], 0.0)


@pytest.mark.parametrize("terminated", [True, False])
def test_lic6_capacity_per_c6_with_and_without_terminating_hydrogen(terminated):
    # Handbook value: LiC6 stores 372 mAh per g of carbon (from memory). The default formula
    # unit of a carbon host is C6 whatever else it holds: terminating hydrogen is not host
    # carbon, so neither the count nor the mass includes it (common practice for flakes).
    from ase.build import graphene

    from ionwell.analysis.tables import resolve_formula_unit
    from ionwell.config.campaign import AnalysisConfig, FlakeBuilder
    from ionwell.science.host import build_flake, host_formula_units

    if terminated:
        host = build_flake(FlakeBuilder(layers=2, shells=2))  # two coronene sheets, C48H24
        assert "H" in host.get_chemical_symbols()
    else:
        host = graphene(size=(3, 3, 1), vacuum=5.0)  # 18 C, periodic sheet
    unit = resolve_formula_unit(host, AnalysisConfig())
    assert unit == {"C": 6}
    units = host_formula_units(host, unit)
    assert units == host.get_chemical_symbols().count("C") / 6
    # one Li per six carbons: x = 1
    assert capacity_mah_per_g(units / units, unit) == pytest.approx(372.0, abs=1.0)
    # an explicit formula unit wins over the default (here: per C24H12 sheet, H counted)
    own = resolve_formula_unit(host, AnalysisConfig(formula_unit={"C": 24, "H": 12}))
    if terminated:
        assert own == {"C": 24, "H": 12}
        assert host_formula_units(host, own) == 2
