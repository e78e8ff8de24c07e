"""Ledger: hash chain, atomic append, verify naming the step and file that changed."""

from __future__ import annotations

import hashlib
import json

import pytest

from ionwell.campaign import CampaignPaths
from ionwell.errors import LedgerError
from ionwell.ledger import (
    GENESIS,
    LedgerRecord,
    append_record,
    hash_step_files,
    read_ledger,
    sha256_file,
    verify,
)


def _record(paths: CampaignPaths, step: int) -> LedgerRecord:
    sdir = paths.step(step)
    (sdir / "engine").mkdir(parents=True, exist_ok=True)
    (sdir / "result.json").write_text(json.dumps({"step": step, "energy": -1.0 * step}))
    (sdir / "engine" / "out.log").write_text(f"log of step {step}\n")
    (sdir / "status.json").write_text("{}")  # published after the record: not hashed
    return LedgerRecord(
        step=step,
        parent="",
        outcome="continue",
        guests=step,
        energy=-1.0 * step,
        files=hash_step_files(sdir),
        engine="test-fixture",
        engine_version="0",
        ionwell_version="0",
        host="h",
        started="t0",
        finished="t1",
        wall_time=0.0,
    )


@pytest.fixture
def campaign(tmp_path):
    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    for n in range(3):
        append_record(paths.ledger, _record(paths, n))
    return paths


def test_chain_and_hashes(campaign):
    recs = read_ledger(campaign.ledger)
    assert [r.step for r in recs] == [0, 1, 2]
    assert recs[0].parent == GENESIS
    assert recs[1].parent == recs[0].hash and recs[2].parent == recs[1].hash
    # each hash is sha256 over the canonical JSON without the hash field (recomputed here
    # independently of compute_hash with hashlib)
    body = recs[1].model_dump(mode="json", exclude={"hash", "job_id"})  # job_id: unset here
    canon = json.dumps(body, sort_keys=True, separators=(",", ":")).encode()
    assert recs[1].hash == hashlib.sha256(canon).hexdigest()
    assert "status.json" not in recs[0].files
    assert recs[0].files["engine/out.log"] == sha256_file(campaign.step(0) / "engine/out.log")
    assert verify(campaign) == []


def test_out_of_order_append_refused(campaign):
    with pytest.raises(LedgerError, match="next step is 3"):
        append_record(campaign.ledger, _record(campaign, 5))


def test_verify_names_step_and_file_after_one_byte_changes(campaign):
    f = campaign.step(1) / "engine" / "out.log"
    data = bytearray(f.read_bytes())
    data[0] ^= 0x01
    f.write_bytes(bytes(data))
    problems = verify(campaign)
    assert problems[0].step == 1
    assert problems[0].file == "steps/0001/engine/out.log"
    assert "differs" in problems[0].message


def test_verify_detects_edited_record_and_missing_file(campaign):
    lines = campaign.ledger.read_text().splitlines()
    rec = json.loads(lines[2])
    rec["energy"] = 123.0
    lines[2] = json.dumps(rec)
    campaign.ledger.write_text("\n".join(lines) + "\n")
    (campaign.step(0) / "result.json").unlink()
    problems = verify(campaign)
    assert (problems[0].step, problems[0].file) == (0, "steps/0000/result.json")
    assert any(p.step == 2 and "edited" in p.message for p in problems)


def test_malformed_ledger_line_named(campaign):
    with open(campaign.ledger, "a") as fh:
        fh.write("{not json\n")
    with pytest.raises(LedgerError, match="line 4"):
        read_ledger(campaign.ledger)


def test_mirror_accepts_a_hash_that_looks_like_a_number(campaign):
    """ASE's database refuses strings that parse as floats (e.g. '9512072780438e71'); such
    record hashes occur by chance and must not break the mirror (seen in a demo run)."""
    from ase import Atoms
    from ase.db import connect
    from ase.io import write

    from ionwell.ledger import sync_mirror

    rec = read_ledger(campaign.ledger)[0].model_copy(update={"hash": "9512072780438e71" + "0" * 48})
    write(campaign.step(0) / "relaxed.extxyz", Atoms("Li", positions=[[0, 0, 0]]))
    assert sync_mirror(campaign, [rec]) == 1
    (row,) = connect(campaign.database).select()
    assert row.record == "sha256:9512072780438e71"


def test_atomic_writes_get_the_usual_file_mode(tmp_path):
    # a file written atomically is as readable as one made by open(): 0666 minus the umask
    # (POSIX; mkstemp alone would leave 0600 and hide shared campaign files from the group)
    from ionwell.campaign import atomic_write_text

    atomic_write_text(tmp_path / "a.txt", "x")
    (tmp_path / "b.txt").write_text("x")
    assert (tmp_path / "b.txt").stat().st_mode & 0o777 != 0o600  # the umask here is not 077
    mode = (tmp_path / "a.txt").stat().st_mode & 0o777
    assert mode == (tmp_path / "b.txt").stat().st_mode & 0o777
