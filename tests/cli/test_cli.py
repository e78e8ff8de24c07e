"""The `ionwell` command on bad input: one clear line, non-zero exit, nothing recorded."""

from __future__ import annotations

import pytest
import yaml
from shared import ionwell


def _assert_one_clear_error(proc, *needles):
    assert proc.returncode != 0
    assert "Traceback" not in proc.stderr
    assert proc.stderr.startswith("ionwell: error: ")
    for n in needles:
        assert n in proc.stderr, proc.stderr


@pytest.mark.parametrize(
    ("config", "needles"),
    [
        ({"name": "x", "host": {"builder": {"shells": 1}}, "stopp": {}}, ["stopp", "unknown key"]),
        ({"name": "x", "host": {"builder": {"shells": 0}}}, ["host.builder.shells"]),
        (
            {"name": "x", "host": {"builder": {"shells": 1}}, "guest": {"element": "Q"}},
            ["guest.element"],
        ),
        ({"host": {"builder": {"shells": 1}}}, ["name", "required"]),
    ],
)
def test_bad_config_gives_one_clear_error(tmp_path, config, needles):
    f = tmp_path / "bad.yaml"
    f.write_text(yaml.safe_dump(config))
    proc = ionwell("run", str(f), "--root", str(tmp_path))
    _assert_one_clear_error(proc, "bad.yaml", *needles)
    assert not (tmp_path / "campaigns").exists() or not any(
        (tmp_path / "campaigns").rglob("*.jsonl")
    )


@pytest.mark.parametrize(
    ("content", "needle"),
    [
        ("this is not a structure file\n", "garbage.xyz"),
        ("", "garbage.xyz"),
        ("2\n\nC 0 0 0\nC 0 0 0.1\n", "garbage.xyz"),
    ],
)
def test_bad_structure_file_gives_one_clear_error(tmp_path, content, needle):
    (tmp_path / "garbage.xyz").write_text(content)
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"name": "bad-host", "host": {"file": "garbage.xyz"}}))
    proc = ionwell("run", str(cfg), "--root", str(tmp_path))
    _assert_one_clear_error(proc, needle)
    # nothing frozen, nothing recorded: fixing the file and running again is possible
    assert not (tmp_path / "campaigns" / "bad-host" / "campaign.yaml").exists()


def test_missing_config_and_non_campaign_folders(tmp_path):
    _assert_one_clear_error(ionwell("run", str(tmp_path / "nope.yaml")), "nope.yaml", "cannot read")
    _assert_one_clear_error(ionwell("status", str(tmp_path)), "not a campaign folder")
    _assert_one_clear_error(ionwell("verify", str(tmp_path)), "no ledger.jsonl")
