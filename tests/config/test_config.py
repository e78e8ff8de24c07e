"""Campaign config: validation messages, freezing, and refusing a changed config."""

from __future__ import annotations

import json

import pytest

from ionwell.config.campaign import Campaign, campaign_schema, load_campaign, parse_campaign
from ionwell.errors import ConfigError
from ionwell.store.campaign import CampaignPaths, freeze_or_check

GOOD = {"name": "c1", "host": {"builder": {"shells": 1, "layers": 2}}, "guest": {"element": "Li"}}


def test_defaults_fill_in():
    c = parse_campaign(GOOD)
    assert c.guest.charge_mode == "neutral"
    assert c.engine.kind == "pyscf"
    assert c.host.builder.spacing == 3.35  # default interlayer spacing of graphite, handbook


def test_checks_envelope_defaults_to_one_angstrom_beyond_the_placement_envelope():
    c = parse_campaign(GOOD)
    assert c.checks.envelope is None
    assert c.checks.envelope_for(c.placement.within) == c.placement.within + 1.0
    given = parse_campaign({**GOOD, "checks": {"envelope": 7.5}, "placement": {"within": 2.0}})
    assert given.checks.envelope_for(given.placement.within) == 7.5


@pytest.mark.parametrize(
    ("patch", "field", "expected"),
    [
        ({"guset": {"element": "Li"}}, "guset", "unknown key"),
        ({"guest": {"element": "Xx"}}, "guest.element", "chemical element"),
        ({"guest": {"element": "Li", "charge_mode": "anion"}}, "guest.charge_mode", "neutral"),
        ({"host": {"builder": {"shells": 1, "radius": 5.0}}}, "host.builder", "exactly one"),
        ({"host": {}}, "host", "exactly one of 'file' or 'builder'"),
        ({"relax": {"fmax": -1}}, "relax.fmax", "greater than 0"),
        ({"engine": {"kind": "vasp"}}, "engine", "pyscf"),
        ({"placement": {"exclusion": {"C": 50}}}, "placement.exclusion", "between 0 and 10"),
        ({"name": "bad name/with slash"}, "name", "pattern"),
    ],
)
def test_bad_values_name_the_field(patch, field, expected):
    data = {**GOOD, **patch}
    with pytest.raises(ConfigError) as exc:
        parse_campaign(data, "my.yaml")
    msg = str(exc.value)
    assert msg.startswith("my.yaml: invalid campaign configuration")
    assert field in msg
    assert expected in msg


def test_missing_name_and_non_mapping(tmp_path):
    with pytest.raises(ConfigError, match="name: required field is missing"):
        parse_campaign({"host": {"builder": {"shells": 1}}})
    f = tmp_path / "list.yaml"
    f.write_text("- 1\n- 2\n")
    with pytest.raises(ConfigError, match="list.yaml: expected a mapping"):
        load_campaign(f)
    f.write_text("name: [unclosed\n")
    with pytest.raises(ConfigError, match="list.yaml: not valid YAML"):
        load_campaign(f)
    with pytest.raises(ConfigError, match="cannot read"):
        load_campaign(tmp_path / "absent.yaml")


def test_freeze_then_refuse_changed_config(tmp_path):
    paths = CampaignPaths(tmp_path / "campaigns" / "c1")
    c = parse_campaign(GOOD)
    assert freeze_or_check(paths, c) is True
    assert freeze_or_check(paths, c) is False  # same config: accepted
    changed = parse_campaign({**GOOD, "relax": {"fmax": 0.02}})
    with pytest.raises(ConfigError) as exc:
        freeze_or_check(paths, changed)
    msg = str(exc.value)
    assert "refusing" in msg
    assert "-  fmax: 0.05" in msg and "+  fmax: 0.02" in msg


def test_schema_is_json_schema():
    schema = json.loads(campaign_schema())
    assert schema["title"] == "Campaign"
    assert "host" in schema["required"]
    assert Campaign.model_json_schema()["additionalProperties"] is False


def test_shipped_schema_is_current():
    # config/campaign.schema.json is what editors validate against; `make schema` rewrites it
    from pathlib import Path

    shipped = Path(__file__).parents[2] / "config" / "campaign.schema.json"
    assert json.loads(shipped.read_text()) == json.loads(campaign_schema()), (
        "config/campaign.schema.json is stale: run `make schema`"
    )


def test_shipped_configs_validate_against_the_schema():
    # the example campaigns validate against the exported JSON Schema (jsonschema, a reference
    # implementation of the standard) as well as against the pydantic models
    from pathlib import Path

    jsonschema = pytest.importorskip("jsonschema")
    import yaml

    root = Path(__file__).parents[2] / "config"
    schema = json.loads((root / "campaign.schema.json").read_text())
    for f in sorted(root.glob("*.yaml")):
        jsonschema.validate(yaml.safe_load(f.read_text()), schema)


def test_schema_accepts_an_engine_definition_by_name():
    # a config file may name an engine definition (merged before the models see it); the
    # exported schema (checked with jsonschema, a reference implementation) says so, and still
    # refuses a misspelt key of an engine given in full
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads(campaign_schema())
    base = {"name": "x", "host": {"builder": {"kind": "graphite"}}}
    for engine in (
        {"definition": "quantum-espresso"},
        {"definition": "quantum-espresso", "settings": {"kpoint_spacing": 0.04}},
    ):
        jsonschema.validate({**base, "engine": engine}, schema)
        screen = {"rule": "screened", "screen": {"engine": engine}}
        jsonschema.validate({**base, "placement": screen}, schema)
    for engine in ({"kind": "pyscf", "xcc": "lda"}, {"settings": {}}):
        with pytest.raises(jsonschema.ValidationError):
            jsonschema.validate({**base, "engine": engine}, schema)
