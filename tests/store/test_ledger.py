"""Ledger: hash chain, append-only writes and torn tails, incremental chain check and mirror,
verify naming the step and file that changed; the controller lock's stale-lock recovery."""

from __future__ import annotations

import hashlib
import json
import time

import pytest
from ase.io import read

from ionwell.errors import LedgerError, LockError
from ionwell.store.campaign import CampaignPaths, ControllerLock
from ionwell.store.ledger import (
    GENESIS,
    LedgerRecord,
    append_record,
    check_chain,
    hash_step_files,
    last_record,
    read_ledger,
    repair_tail,
    sha256_file,
    sync_mirror,
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
    body = recs[1].model_dump(
        mode="json", exclude={"hash", "job_id", "inputs", "pre_relax", "guess", "free_energy"}
    )  # late fields, unset here
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

    rec = read_ledger(campaign.ledger)[0].model_copy(update={"hash": "9512072780438e71" + "0" * 48})
    write(campaign.step(0) / "relaxed.extxyz", Atoms("Li", positions=[[0, 0, 0]]))
    assert sync_mirror(campaign, [rec]) == 1
    (row,) = connect(campaign.database).select()
    assert row.record == "sha256:9512072780438e71"


def test_atomic_writes_get_the_usual_file_mode(tmp_path):
    # a file written atomically is as readable as one made by open(): 0666 minus the umask
    # (POSIX; mkstemp alone would leave 0600 and hide shared campaign files from the group)
    from ionwell.store.campaign import atomic_write_text

    atomic_write_text(tmp_path / "a.txt", "x")
    (tmp_path / "b.txt").write_text("x")
    assert (tmp_path / "b.txt").stat().st_mode & 0o777 != 0o600  # the umask here is not 077
    mode = (tmp_path / "a.txt").stat().st_mode & 0o777
    assert mode == (tmp_path / "b.txt").stat().st_mode & 0o777


# ---------------------------------------------------------------------------------------------
# append-only ledger, torn tails, incremental chain check, incremental mirror, lock recovery


def _ledger_of(tmp_path, n: int) -> CampaignPaths:
    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    tip = None
    for step in range(n):
        tip = append_record(paths.ledger, _record(paths, step), tip=tip)
    return paths


def test_append_only_never_rewrites_the_file(tmp_path):
    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    append_record(paths.ledger, _record(paths, 0))
    inode = paths.ledger.stat().st_ino
    lines = []
    for step in range(1, 12):
        rec = append_record(paths.ledger, _record(paths, step))
        lines.append(len((rec.model_dump_json() + "\n").encode()))
        assert paths.ledger.stat().st_ino == inode  # same file, appended to, not replaced
    first = len(paths.ledger.read_bytes().splitlines(keepends=True)[0])
    assert paths.ledger.stat().st_size == first + sum(lines)
    assert [r.step for r in read_ledger(paths.ledger)] == list(range(12))


def test_tip_passed_by_the_caller(tmp_path):
    paths = _ledger_of(tmp_path, 3)  # built with tip= throughout
    recs = read_ledger(paths.ledger)
    assert recs[2].parent == recs[1].hash and check_chain(paths) == 3
    with pytest.raises(LedgerError, match="not the ledger's last record"):
        append_record(paths.ledger, _record(paths, 2), tip=recs[1])
    with pytest.raises(LedgerError, match="next step is 3"):
        append_record(paths.ledger, _record(paths, 4), tip=recs[2])


def test_last_record_reads_the_tail(tmp_path):
    paths = CampaignPaths(tmp_path / "c")
    assert last_record(paths.ledger) is None
    paths.root.mkdir()
    for step in range(5):
        append_record(paths.ledger, _record(paths, step))
        assert last_record(paths.ledger) == read_ledger(paths.ledger)[-1]
    with open(paths.ledger, "a") as fh:
        fh.write("\n  \n")  # blank lines are skipped, as read_ledger does
    assert last_record(paths.ledger) == read_ledger(paths.ledger)[-1]


def test_last_record_across_read_blocks(tmp_path, monkeypatch):
    import ionwell.store.ledger as ledger

    monkeypatch.setattr(ledger, "_BLOCK", 7)  # lines far longer than a block
    paths = _ledger_of(tmp_path, 3)
    assert last_record(paths.ledger) == read_ledger(paths.ledger)[-1]
    assert len(ledger._tail_records(paths.ledger, 0)) == 3


def test_torn_tail_ignored_repaired_and_appended_after(tmp_path, caplog):
    paths = _ledger_of(tmp_path, 3)
    whole = paths.ledger.read_bytes()
    torn = (_record(paths, 3).model_copy(update={"parent": "x"}).model_dump_json())[:150]
    with open(paths.ledger, "ab") as fh:
        fh.write(torn.encode())  # a kill during the append: no newline
    with caplog.at_level("WARNING"):
        assert [r.step for r in read_ledger(paths.ledger)] == [0, 1, 2]
        assert last_record(paths.ledger).step == 2
        assert check_chain(paths) == 3
    assert "unterminated last line" in caplog.text
    assert verify(paths) == []
    what = repair_tail(paths.ledger)
    assert what is not None and "150 bytes" in what
    assert paths.ledger.read_bytes() == whole
    assert repair_tail(paths.ledger) is None

    with open(paths.ledger, "ab") as fh:
        fh.write(torn.encode())
    rec = append_record(paths.ledger, _record(paths, 3))  # repairs first, then appends
    assert paths.ledger.read_bytes() == whole + (rec.model_dump_json() + "\n").encode()
    assert rec.parent == read_ledger(paths.ledger)[2].hash
    assert check_chain(paths) == 4


def test_torn_tail_only_file(tmp_path):
    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    paths.ledger.write_bytes(b'{"step": 0, "par')
    assert read_ledger(paths.ledger) == [] and last_record(paths.ledger) is None
    rec = append_record(paths.ledger, _record(paths, 0))
    assert rec.parent == GENESIS and len(read_ledger(paths.ledger)) == 1


def test_complete_garbage_line_in_the_middle_named(tmp_path):
    paths = _ledger_of(tmp_path, 3)
    lines = paths.ledger.read_bytes().splitlines(keepends=True)
    paths.ledger.write_bytes(lines[0] + b"garbage\n" + b"".join(lines[1:]))
    with pytest.raises(LedgerError, match=r"ledger.jsonl: line 2 is not a valid ledger record"):
        read_ledger(paths.ledger)
    with pytest.raises(LedgerError, match=r"line 2 \(step 1 belongs there\)"):
        check_chain(paths)
    problems = verify(paths)
    assert (problems[0].step, problems[0].file) == (1, "ledger.jsonl")
    assert problems[0].message.startswith("line 2 is not a valid ledger record")


def test_invalid_last_line_is_named_by_last_record(tmp_path):
    paths = _ledger_of(tmp_path, 3)
    with open(paths.ledger, "ab") as fh:
        fh.write(b"{}\n")
    with pytest.raises(LedgerError, match="line 4 is not a valid ledger record"):
        last_record(paths.ledger)
    with pytest.raises(LedgerError, match="line 4"):
        append_record(paths.ledger, _record(paths, 3))


def test_non_utf8_byte_named(tmp_path):
    paths = _ledger_of(tmp_path, 3)
    lines = paths.ledger.read_bytes().splitlines(keepends=True)
    lines[1] = lines[1].replace(b'"host":"h"', b'"host":"h\xff"')
    paths.ledger.write_bytes(b"".join(lines))
    with pytest.raises(LedgerError, match="line 2 is not UTF-8 text"):
        read_ledger(paths.ledger)
    with pytest.raises(LedgerError, match="line 2 .*is not UTF-8 text"):
        check_chain(paths)
    problems = verify(paths)
    assert (problems[0].step, problems[0].file) == (1, "ledger.jsonl")
    assert "line 2 is not UTF-8 text" in problems[0].message
    # the last line too, read from the tail
    lines[1], lines[2] = lines[2], lines[1]
    paths.ledger.write_bytes(b"".join(lines))
    with pytest.raises(LedgerError, match="line 3 is not UTF-8 text"):
        last_record(paths.ledger)


def test_check_chain_counts_and_keeps_a_sidecar(tmp_path):
    paths = _ledger_of(tmp_path, 4)
    assert check_chain(paths) == 4
    side = json.loads((paths.root / "ledger.verified.json").read_text())
    assert side["count"] == 4 and side["offset"] == paths.ledger.stat().st_size
    assert side["sha256"] == hashlib.sha256(paths.ledger.read_bytes()).hexdigest()
    assert side["tip"] == last_record(paths.ledger).hash
    assert check_chain(paths) == 4  # nothing new: nothing parsed, same answer
    assert "ledger.verified.json" not in json.dumps([r.files for r in read_ledger(paths.ledger)])


def test_check_chain_parses_only_the_new_records(tmp_path, monkeypatch):
    import ionwell.store.ledger as ledger

    paths = _ledger_of(tmp_path, 5)
    assert check_chain(paths) == 5
    offset = json.loads((paths.root / "ledger.verified.json").read_text())["offset"]
    tip = last_record(paths.ledger)
    for step in range(5, 8):
        tip = append_record(paths.ledger, _record(paths, step), tip=tip)
    parsed = []
    real = ledger._parse_line
    monkeypatch.setattr(ledger, "_parse_line", lambda raw: parsed.append(raw) or real(raw))
    assert check_chain(paths) == 8
    assert len(parsed) == 3  # steps 5, 6, 7 only
    assert parsed[0] == paths.ledger.read_bytes()[offset:].split(b"\n")[0]
    parsed.clear()
    assert check_chain(paths) == 8 and parsed == []


def test_check_chain_names_an_edited_middle_record_despite_the_sidecar(tmp_path):
    paths = _ledger_of(tmp_path, 6)
    assert check_chain(paths) == 6  # the sidecar now vouches for all six
    lines = paths.ledger.read_text().splitlines(keepends=True)
    rec = json.loads(lines[2])
    rec["energy"] = 123.0
    lines[2] = json.dumps(rec, separators=(",", ":")) + "\n"
    paths.ledger.write_text("".join(lines))
    with pytest.raises(LedgerError, match=r"step 2 \(line 3\): record was edited \(hash differs\)"):
        check_chain(paths)


def test_check_chain_names_a_rehashed_record_and_a_missing_one(tmp_path):
    paths = _ledger_of(tmp_path, 5)
    lines = paths.ledger.read_text().splitlines(keepends=True)
    forged = LedgerRecord.model_validate_json(lines[1]).model_copy(update={"energy": 9.0})
    forged = forged.model_copy(update={"hash": forged.compute_hash()})
    paths.ledger.write_text("".join([lines[0], forged.model_dump_json() + "\n", *lines[2:]]))
    with pytest.raises(LedgerError, match=r"step 2 \(line 3\): parent hash breaks the chain"):
        check_chain(paths)
    paths.ledger.write_text("".join([lines[0], *lines[2:]]))
    with pytest.raises(LedgerError, match=r"step 2 \(line 2\): out of order \(step 1 belongs"):
        check_chain(paths)


def _with_structures(paths: CampaignPaths, steps) -> None:
    from ase import Atoms
    from ase.io import write

    for step in steps:
        write(paths.step(step) / "relaxed.extxyz", Atoms("Li", positions=[[0, 0, 0.1 * step]]))


def _mirror_steps(paths: CampaignPaths) -> list[int]:
    from ase.db import connect

    return sorted(row.step for row in connect(paths.database).select())


def test_mirror_adds_only_new_records(tmp_path):
    from ase.db import connect

    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    assert sync_mirror(paths) == 0  # no ledger yet
    tip = None
    total = 0
    for n in (2, 3, 1, 4):
        for _ in range(n):
            step = tip.step + 1 if tip else 0
            tip = append_record(paths.ledger, _record(paths, step), tip=tip)
            _with_structures(paths, [step])
        total += n
        assert sync_mirror(paths) == n
        assert _mirror_steps(paths) == list(range(total))
    assert sync_mirror(paths) == 0
    assert sync_mirror(paths, read_ledger(paths.ledger)) == 0  # given all records: none new
    assert _mirror_steps(paths) == list(range(total))
    row = connect(paths.database).get(step=3)
    rec = read_ledger(paths.ledger)[3]
    assert (row.guests, row.outcome, row.record) == (3, "continue", f"sha256:{rec.hash[:16]}")
    assert row.total_energy == pytest.approx(-3.0)


def test_mirror_takes_over_one_written_before_its_bookkeeping(tmp_path):
    from ase.db import connect

    paths = _ledger_of(tmp_path, 5)
    _with_structures(paths, range(5))
    db = connect(paths.database)
    for rec in read_ledger(paths.ledger)[:3]:  # the old mirror: rows, no metadata
        db.write(read(paths.step(rec.step) / "relaxed.extxyz"), step=rec.step)
    assert sync_mirror(paths) == 2
    assert _mirror_steps(paths) == [0, 1, 2, 3, 4]


def test_mirror_of_garbage_bytes_set_aside_and_rebuilt(tmp_path, caplog):
    paths = _ledger_of(tmp_path, 4)
    _with_structures(paths, range(4))
    paths.database.write_bytes(b"\x00\xffthis is not a database" * 100)
    with caplog.at_level("WARNING"):
        assert sync_mirror(paths) == 4
    assert _mirror_steps(paths) == [0, 1, 2, 3]
    (aside,) = paths.root.glob("ionwell.db.corrupt-*")
    assert aside.read_bytes().startswith(b"\x00\xffthis is not")
    assert "not an SQLite database" in caplog.text


def test_mirror_truncated_database_rebuilt(tmp_path):
    paths = _ledger_of(tmp_path, 6)
    _with_structures(paths, range(6))
    assert sync_mirror(paths) == 6
    data = paths.database.read_bytes()
    paths.database.write_bytes(data[: len(data) // 3])
    assert sync_mirror(paths) == 6  # SQLite finds it malformed: set aside, rebuilt
    assert _mirror_steps(paths) == list(range(6))
    assert len(list(paths.root.glob("ionwell.db.corrupt-*"))) == 1


def test_mirror_of_a_ledger_cut_back_is_rebuilt(tmp_path):
    paths = _ledger_of(tmp_path, 4)
    _with_structures(paths, range(4))
    assert sync_mirror(paths) == 4
    lines = paths.ledger.read_bytes().splitlines(keepends=True)
    paths.ledger.write_bytes(b"".join(lines[:2]))
    append_record(paths.ledger, _record(paths, 2).model_copy(update={"guests": 7}))
    assert sync_mirror(paths) == 3
    assert _mirror_steps(paths) == [0, 1, 2]
    assert list(paths.root.glob("ionwell.db.stale-*"))


def test_mirror_given_only_the_new_record(tmp_path):
    """The controller passes just the record it appended; a gap or a redone step reads the
    ledger's end instead."""
    paths = _ledger_of(tmp_path, 2)
    for step in range(5):
        paths.step(step).mkdir(parents=True, exist_ok=True)
    _with_structures(paths, range(5))
    assert sync_mirror(paths) == 2
    rec = append_record(paths.ledger, _record(paths, 2))
    assert sync_mirror(paths, [rec]) == 1
    append_record(paths.ledger, _record(paths, 3))
    rec = append_record(paths.ledger, _record(paths, 4))
    assert sync_mirror(paths, [rec]) == 2  # step 3 was never synced: read from the ledger
    assert _mirror_steps(paths) == [0, 1, 2, 3, 4]
    # the ledger cut back to steps 0-1 and step 2 redone differently: the mirror is rebuilt
    lines = paths.ledger.read_bytes().splitlines(keepends=True)
    paths.ledger.write_bytes(b"".join(lines[:2]))
    rec = append_record(paths.ledger, _record(paths, 2).model_copy(update={"guests": 9}))
    assert sync_mirror(paths, [rec]) == 3
    assert _mirror_steps(paths) == [0, 1, 2]


def test_lock_left_empty_by_a_kill_is_recovered_after_the_grace(tmp_path, caplog):
    import os

    lock = ControllerLock(tmp_path / "controller.lock")
    lock.path.write_text("")
    old = time.time() - 60
    os.utime(lock.path, (old, old))
    with caplog.at_level("WARNING"):
        assert lock.acquire() is True
    assert "cleared an empty lock file" in caplog.text
    assert lock.read()["pid"] == os.getpid()
    lock.release()
    assert not lock.path.exists()


def test_fresh_empty_lock_is_refused(tmp_path):
    lock = ControllerLock(tmp_path / "controller.lock")
    lock.path.write_text("")
    with pytest.raises(LockError, match="empty and was written .* a controller may be starting"):
        lock.acquire()
    assert lock.path.exists()


def test_unparsable_lock_older_than_the_grace_is_recovered(tmp_path):
    import os

    lock = ControllerLock(tmp_path / "controller.lock")
    lock.path.write_text('{"host": "x", "pi')
    old = time.time() - ControllerLock.EMPTY_GRACE - 1
    os.utime(lock.path, (old, old))
    assert lock.acquire() is True
    lock.release()


def test_heartbeat(tmp_path):
    import os

    lock = ControllerLock(tmp_path / "controller.lock")
    assert ControllerLock.heartbeat_age(lock.path) is None
    assert lock.heartbeat() is False  # not held
    lock.acquire()
    old = time.time() - 100
    os.utime(lock.path, (old, old))
    assert ControllerLock.heartbeat_age(lock.path) == pytest.approx(100, abs=5)
    assert lock.heartbeat() is True
    assert ControllerLock.heartbeat_age(lock.path) < 5
    lock.release()
    other = ControllerLock(tmp_path / "other.lock")
    other.path.write_text(json.dumps({"host": "elsewhere", "pid": 1}))
    os.utime(other.path, (old, old))
    assert other.heartbeat() is False  # not ours: left alone
    assert ControllerLock.heartbeat_age(other.path) > 50
    with pytest.raises(LockError, match="host 'elsewhere'.*last heartbeat"):
        other.acquire()
