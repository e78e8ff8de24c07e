"""The guest reference μ: given, isolated atom minus a cohesive energy, or the bulk metal computed
with the campaign's own (periodic) engine."""

from __future__ import annotations

import pytest
from ase.build import bulk

from ionwell.analysis.tables import guest_reference
from ionwell.config.campaign import parse_campaign
from ionwell.errors import ConfigError
from ionwell.workflow.setup import prepare_campaign

HOST = {"builder": {"kind": "flake", "layers": 1, "shells": 1}}
XTB = {
    "kind": "ase",
    "calculator": "tblite.ase.TBLite",
    "parameters": {"method": "GFN2-xTB", "verbosity": 0},
}


def _campaign(tmp_path, **analysis):
    data = {"name": "ref", "host": HOST, "engine": XTB, "analysis": analysis}
    c = parse_campaign(data, "test config")
    return prepare_campaign(c, tmp_path, tmp_path)


def test_bulk_reference_is_the_energy_per_atom_of_the_periodic_metal(tmp_path):
    # Reference library: tblite's own ASE calculator on the same bcc Li supercell (ASE's
    # reference state for Li, a = 3.49 Å), Γ point, energy per atom.
    paths = _campaign(tmp_path, reference={"bulk": {"repeat": [2, 2, 2]}, "source": "test"})
    ref = guest_reference(paths.root)
    from tblite.ase import TBLite

    cell = bulk("Li").repeat((2, 2, 2))
    cell.calc = TBLite(method="GFN2-xTB", verbosity=0)
    assert ref.mu == pytest.approx(cell.get_potential_energy() / len(cell), abs=1e-6)
    assert ref.bulk_atoms == 8
    assert "bulk Li" in ref.source and "ase engine" in ref.source
    # recorded once: a second call reads reference.json back instead of recomputing
    stamp = (paths.root / "reference.json").stat().st_mtime_ns
    assert guest_reference(paths.root) == ref
    assert (paths.root / "reference.json").stat().st_mtime_ns == stamp
    # energy only: no potential map was computed for the reference
    assert not (paths.root / "reference" / "potential.npz").exists()


def test_given_value_is_recorded_with_its_source(tmp_path):
    paths = _campaign(tmp_path, reference={"value": -1.9, "source": "a value from a paper"})
    ref = guest_reference(paths.root)
    assert (ref.mu, ref.source) == (-1.9, "a value from a paper")


def test_bulk_reference_needs_a_periodic_engine():
    data = {"name": "x", "host": HOST, "analysis": {"reference": {"bulk": {}}}}
    with pytest.raises(ConfigError, match="analysis.reference.bulk: the pyscf engine"):
        parse_campaign(data, "test config")


def test_reference_takes_exactly_one_way():
    data = {
        "name": "x",
        "host": HOST,
        "engine": XTB,
        "analysis": {"reference": {"value": -1.0, "bulk": {}}},
    }
    with pytest.raises(ConfigError, match="exactly one of 'value', 'cohesive_energy' or 'bulk'"):
        parse_campaign(data, "test config")


def test_reference_set_after_the_start_replaces_the_recorded_one(tmp_path):
    # analysis settings set after the start (analysis.yaml) override the frozen config; a
    # changed reference is established anew, an unchanged one is read back
    from ionwell.analysis.tables import analysis_settings, parse_settings, set_settings

    paths = _campaign(tmp_path, reference={"value": -1.9, "source": "first"})
    frozen = paths.config.read_bytes()
    assert guest_reference(paths.root).mu == -1.9
    settings, source = analysis_settings(paths.root)
    assert source.startswith("campaign.yaml")
    new = parse_settings({"reference": {"value": -2.1, "source": "second"}}, "a.yaml")
    set_settings(paths.root, new)
    settings, source = analysis_settings(paths.root)
    assert source.startswith("analysis.yaml") and settings.reference.value == -2.1
    ref = guest_reference(paths.root)
    assert (ref.mu, ref.source) == (-2.1, "second")
    assert paths.config.read_bytes() == frozen  # the compute config is untouched
    # a whole campaign config is accepted too: its analysis section is taken
    whole = parse_settings({"name": "ref", "host": HOST, "analysis": {"rim_width": 2.5}}, "c.yaml")
    assert whole.rim_width == 2.5 and whole.reference is None


@pytest.mark.parametrize(
    ("data", "expected"),
    [
        ({"referense": {"value": 1.0}}, "referense: unknown key"),
        ({"dos_width": -1}, "dos_width: Input should be greater than 0"),
        ({"formula_unit": {"Xx": 6}}, "formula_unit: expected a chemical element symbol"),
        ({"charge_scheme": "bader"}, "charge_scheme: Input should be 'auto'"),
        (["reference"], "expected a mapping of analysis settings"),
    ],
)
def test_bad_analysis_settings_name_the_file_and_field(data, expected):
    from ionwell.analysis.tables import parse_settings

    with pytest.raises(ConfigError) as err:
        parse_settings(data, "extra.yaml")
    assert str(err.value).startswith("extra.yaml: ")
    assert expected in str(err.value)
