"""The ledger: one hash-chained record per finished step, its database mirror, and verification.

A step is finished exactly when its record is in ``ledger.jsonl``. Each record carries the hash
of its parent record and the sha256 of every file the step wrote; its own ``hash`` is the sha256
of its canonical JSON (sorted keys, no whitespace) with the ``hash`` field left out.

The file is append-only, so what a step costs does not grow with the campaign's history. A
record is one line, written with a single ``write`` to a descriptor opened with ``O_APPEND`` and
then flushed to disk (fsync). A kill during that write can leave a last line without its newline
(a *torn tail*): that is not a finished step. Readers ignore it with a warning;
:func:`repair_tail` (called by the controller at start) cuts it off, and :func:`append_record`
cuts it off itself, with a warning, before it appends. A *complete* line that is not a valid
record is never skipped: it is a :class:`LedgerError` naming the file and line.

:func:`last_record` reads only the end of the file. :func:`check_chain` checks the chain
incrementally: ``ledger.verified.json`` beside the ledger remembers how many leading bytes were
found sound and their sha256; while those bytes are unchanged, only the records after them are
parsed. :func:`verify` is the full check of the chain and of every recorded file.
:func:`sync_mirror` keeps ``ionwell.db`` (derived data) up to date incrementally and rebuilds it
when it is damaged.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import sqlite3
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ionwell.errors import LedgerError
from ionwell.science.placement import Decision
from ionwell.store.campaign import CampaignPaths, atomic_write_text, fsync_dir
from ionwell.store.paths import UNRECORDED_DIRS, UNRECORDED_NAMES, StepPaths, step_label

log = logging.getLogger(__name__)

GENESIS = "0" * 64
#: the sidecar of :func:`check_chain`, in the campaign folder (not a step folder: never hashed)
VERIFIED_NAME = "ledger.verified.json"

_BLOCK = 1 << 13  # bytes read at a time when reading the ledger backwards (a record: 1-4 KB)


class Rejection(BaseModel):
    """A site the step rejected after its checks failed, and why."""

    model_config = ConfigDict(extra="forbid")

    position: list[float] = Field(description="Å")
    reason: str


_LATE_FIELDS = ("job_id", "inputs", "pre_relax", "guess", "free_energy")
#: fields of a decision's wells added after the first release: they enter the hash only when set
_LATE_SITE_FIELDS = ("boundary",)


def _drop_unset_late_site_fields(body: dict) -> None:
    decision = body.get("decision")
    if not isinstance(decision, dict):
        return
    for key in ("candidates", "chosen"):
        for site in decision.get(key) or ():
            for name in _LATE_SITE_FIELDS:
                if isinstance(site, dict) and site.get(name, 0) is None:
                    del site[name]


class PreRelaxRecord(BaseModel):
    """The cheap relaxation before the engine's own (``relax.pre``)."""

    model_config = ConfigDict(extra="forbid")

    method: str = Field(description="e.g. 'GFN2-xTB' (tblite)")
    code_version: str
    steps: int
    converged: bool
    energy_start: float = Field(description="eV, the method's own energy scale")
    energy_end: float = Field(description="eV")
    max_displacement: float = Field(description="largest move of an atom, Å")
    seconds: float


class LedgerRecord(BaseModel):
    """What the ledger keeps of one finished step."""

    model_config = ConfigDict(extra="forbid")

    step: int
    parent: str = Field(description="hash of the previous record (64 zeros for step 0)")
    outcome: Literal["continue", "stop"]
    stop_reason: str | None = None
    guests: int = Field(description="guests in the step's structure")
    energy: float | None = Field(
        None, description="total energy, eV (with smearing: extrapolated to zero width)"
    )
    free_energy: float | None = Field(
        None,
        description="with electronic smearing: the free energy E - σS, eV, that the forces "
        "derive from (None: no smearing, or recorded before ionwell kept it)",
    )
    scf_converged: bool | None = None
    scf_iterations: int | None = None
    findings: dict[str, int] = Field(default_factory=dict, description="count per severity")
    decision: Decision | None = None
    remedies: list[str] = Field(default_factory=list, description="SCF retries made")
    rejected: list[Rejection] = Field(default_factory=list, description="sites rejected")
    files: dict[str, str] = Field(description="step-relative path -> sha256")
    engine: str
    engine_version: str
    ionwell_version: str
    host: str = Field(description="machine that ran the step")
    started: str
    finished: str
    wall_time: float = Field(description="seconds")
    job_id: str | None = Field(None, description="scheduler job that computed the step")
    inputs: dict[str, str] | None = Field(
        None,
        description="step 0 only: campaign-relative path -> sha256 of the frozen config and the "
        "host structure, so a hand-edited one is refused on resume and named by verify",
    )
    pre_relax: PreRelaxRecord | None = Field(
        None, description="the cheap relaxation before the engine's (relax.pre), when made"
    )
    guess: str | None = Field(
        None, description="the SCF's initial guess as the engine reported it (e.g. a warm start)"
    )
    hash: str = ""

    def compute_hash(self) -> str:
        # fields added after the first release enter the hash only when set, so records
        # written before them keep their hashes
        late = {name for name in _LATE_FIELDS if getattr(self, name) is None}
        body = self.model_dump(mode="json", exclude={"hash"} | late)
        _drop_unset_late_site_fields(body)
        canon = json.dumps(body, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canon.encode()).hexdigest()


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def hash_step_files(step_dir: Path) -> dict[str, str]:
    """sha256 of every file under a step folder except the unrecorded markers and the rule
    chain's ``flow/`` folder."""
    out: dict[str, str] = {}
    for p in sorted(step_dir.rglob("*")):
        rel = p.relative_to(step_dir)
        if rel.parts[0] in UNRECORDED_DIRS:
            continue
        if p.is_file() and p.name not in UNRECORDED_NAMES and not p.name.endswith(".tmp"):
            out[p.relative_to(step_dir).as_posix()] = sha256_file(p)
    return out


# ---------------------------------------------------------------------------------------------
# reading lines


class _BadLine(Exception):
    """A complete ledger line that is not a record; ``why`` completes "line N ..."."""

    def __init__(self, why: str) -> None:
        super().__init__(why)
        self.why = why


def _parse_line(raw: bytes) -> LedgerRecord:
    """One complete line (without its newline) as a record, or :class:`_BadLine`."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise _BadLine(
            f"is not UTF-8 text (byte {err.start + 1} of the line is {raw[err.start]:#04x})"
        ) from None
    try:
        return LedgerRecord.model_validate_json(text)
    except ValidationError as err:
        why = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or 'record'}: {e['msg']}"
            for e in err.errors()[:3]
        )
        raise _BadLine(f"is not a valid ledger record ({why})") from None


def _parse(raw: bytes, path: Path, lineno: int | Callable[[], int]) -> LedgerRecord:
    """:func:`_parse_line` raising :class:`LedgerError`; ``lineno`` may be computed lazily."""
    try:
        return _parse_line(raw)
    except _BadLine as err:
        n = lineno if isinstance(lineno, int) else lineno()
        raise LedgerError(f"{path}: line {n} {err.why}") from None


def _warn_torn(path: Path, nbytes: int) -> None:
    log.warning(
        "%s: ignoring an unterminated last line (%d bytes): a write cut short, not a finished "
        "step; it is removed before the next append",
        path,
        nbytes,
    )


def _complete_part(data: bytes, path: Path) -> bytes:
    """``data`` up to and including its last newline; warns about a fragment after it."""
    if not data or data.endswith(b"\n"):
        return data
    cut = data.rfind(b"\n") + 1
    _warn_torn(path, len(data) - cut)
    return data[:cut]


def _lines(data: bytes, first_line: int = 1) -> Iterator[tuple[int, int, bytes]]:
    """(line number, offset just after the line, line) of each non-blank line of ``data``.

    ``data`` is empty or ends with a newline; a line is split on b"\\n" only (a record may hold
    characters that ``str.splitlines`` would split on, such as U+2028).
    """
    pos, lineno = 0, first_line
    while pos < len(data):
        end = data.index(b"\n", pos)
        raw = data[pos:end]
        if raw.strip():
            yield lineno, end + 1, raw
        pos, lineno = end + 1, lineno + 1


def _size(fd: int) -> int:
    return os.fstat(fd).st_size


def _line_number(fd: int, offset: int) -> int:
    """Number of the line starting at byte ``offset`` (counts the newlines before it)."""
    count, pos = 0, 0
    while pos < offset:
        chunk = os.pread(fd, min(1 << 20, offset - pos), pos)
        if not chunk:
            break
        count += chunk.count(b"\n")
        pos += len(chunk)
    return count + 1


def _lines_backward(fd: int, path: Path) -> Iterator[tuple[int, bytes]]:
    """(offset, line) of each complete non-blank line, last first, reading from the end.

    An unterminated fragment after the last newline is skipped with a warning.
    """
    pos = _size(fd)
    buf = b""  # always file[pos : pos + len(buf)]

    def back() -> None:
        nonlocal pos, buf
        n = min(_BLOCK, pos)
        pos -= n
        buf = os.pread(fd, n, pos) + buf

    while pos > 0 and buf.rfind(b"\n") < 0:
        back()
    nl = buf.rfind(b"\n")
    if len(buf) - nl - 1 > 0:
        _warn_torn(path, len(buf) - nl - 1)
    buf = buf[: nl + 1]
    while buf:
        nl = buf.rfind(b"\n", 0, len(buf) - 1)
        if nl < 0 and pos > 0:
            back()
            continue
        raw = buf[nl + 1 : -1]
        if raw.strip():
            yield pos + nl + 1, raw
        buf = buf[: nl + 1]


def _last_line(fd: int, path: Path) -> tuple[int, bytes] | None:
    return next(_lines_backward(fd, path), None)


def read_ledger(path: Path) -> list[LedgerRecord]:
    """All records, in order. A malformed line raises :class:`LedgerError` naming it.

    An unterminated last line (a torn append) is ignored with a warning.
    """
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        return []
    data = _complete_part(data, path)
    return [_parse(raw, path, n) for n, _, raw in _lines(data)]


def last_record(path: Path) -> LedgerRecord | None:
    """The ledger's last record, reading only the end of the file; None for no record.

    Equal to ``read_ledger(path)[-1]`` when there is a record; a torn last line is ignored.
    """
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return None
    try:
        last = _last_line(fd, Path(path))
        if last is None:
            return None
        start, raw = last
        return _parse(raw, path, lambda: _line_number(fd, start))
    finally:
        os.close(fd)


def _tail_records(path: Path, first_step: int) -> list[LedgerRecord]:
    """Records of steps ``first_step`` on, in order, parsed from the end of the ledger back."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return []
    out: list[LedgerRecord] = []
    try:
        for start, raw in _lines_backward(fd, Path(path)):
            rec = _parse(raw, path, lambda start=start: _line_number(fd, start))
            if rec.step < first_step:
                break
            out.append(rec)
            if rec.step == first_step:
                break
    finally:
        os.close(fd)
    return out[::-1]


# ---------------------------------------------------------------------------------------------
# appending


def _repair_fd(fd: int, path: Path) -> str | None:
    size = _size(fd)
    if size == 0 or os.pread(fd, 1, size - 1) == b"\n":
        return None
    pos, cut = size, 0
    while pos > 0:
        n = min(_BLOCK, pos)
        pos -= n
        i = os.pread(fd, n, pos).rfind(b"\n")
        if i >= 0:
            cut = pos + i + 1
            break
    head = os.pread(fd, min(40, size - cut), cut).decode("utf-8", "replace")
    os.ftruncate(fd, cut)
    os.fsync(fd)
    what = (
        f"{path}: removed an unterminated last line ({size - cut} bytes at offset {cut}, "
        f"starting {head!r}): a write cut short, not a finished step"
    )
    log.warning("%s", what)
    return what


def repair_tail(path: Path) -> str | None:
    """Cut off an unterminated last line (a torn append). Returns what was removed, or None.

    Call it only while no one else appends (the controller at start, holding its lock).
    """
    try:
        fd = os.open(path, os.O_RDWR)
    except FileNotFoundError:
        return None
    try:
        return _repair_fd(fd, Path(path))
    finally:
        os.close(fd)


_TAIL: Any = object()  # append_record's default: read the previous record from the ledger


def _line_has_hash(raw: bytes, digest: str) -> bool:
    # records are written with "hash" last; anything else (a hand-formatted line) is parsed
    if raw.rstrip().endswith(b'"hash":"' + digest.encode() + b'"}'):
        return True
    try:
        return json.loads(raw).get("hash") == digest
    except (ValueError, AttributeError):
        return False


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view) :]


def append_record(
    path: Path, record: LedgerRecord, *, tip: LedgerRecord | None = _TAIL
) -> LedgerRecord:
    """Chain, hash and append ``record``; returns it with ``parent`` and ``hash`` filled in.

    ``tip`` is the ledger's last record as the caller knows it (None: the ledger is empty); by
    default it is read from the end of the file. Either way the step must follow the tip, and a
    passed tip must be the last line of the file (one short read; a stale tip would fork the
    chain). The record is written as one line with ``O_APPEND`` and fsynced; the folder is
    fsynced when the file is created. An unterminated last line left by a killed append is
    removed first (logged). The file is never rewritten. Callers serialise appends (step lock).
    """
    path = Path(path)
    flags = os.O_RDWR | os.O_APPEND | os.O_CREAT
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        fd, created = os.open(path, flags | os.O_EXCL, 0o666), True
    except FileExistsError:
        fd, created = os.open(path, flags, 0o666), False
    try:
        _repair_fd(fd, path)
        last = _last_line(fd, path)
        if tip is _TAIL:
            tip = None if last is None else _parse(last[1], path, _lazy_no(fd, last[0]))
        elif tip is None:
            if last is not None:
                raise LedgerError(f"{path}: the ledger holds records; cannot append as step 0")
        elif last is None or not _line_has_hash(last[1], tip.hash):
            raise LedgerError(
                f"{path}: the record given as the previous one (step {tip.step}, "
                f"{tip.hash[:12]}…) is not the ledger's last record; refusing to fork the chain"
            )
        expected = tip.step + 1 if tip is not None else 0
        if record.step != expected:
            raise LedgerError(
                f"{path}: cannot record step {record.step}; the next step is {expected}"
            )
        parent = tip.hash if tip is not None else GENESIS
        rec = record.model_copy(update={"parent": parent, "hash": ""})
        rec = rec.model_copy(update={"hash": rec.compute_hash()})
        line = (rec.model_dump_json() + "\n").encode()
        size = _size(fd)
        try:
            _write_all(fd, line)
            os.fsync(fd)
        except BaseException:
            # leave no partial line behind when we can (a kill cannot be caught: repair_tail)
            with contextlib.suppress(OSError):
                os.ftruncate(fd, size)
            raise
    finally:
        os.close(fd)
    if created:
        fsync_dir(path.parent)
    return rec


def _lazy_no(fd: int, start: int) -> Callable[[], int]:
    return lambda: _line_number(fd, start)


# ---------------------------------------------------------------------------------------------
# checking the chain


def _chain_problem(rec: LedgerRecord, expected: int, parent: str | None) -> str | None:
    """What is wrong with ``rec`` as the record of step ``expected`` after ``parent``."""
    if rec.step != expected:
        return f"out of order (step {expected} belongs here)"
    if rec.compute_hash() != rec.hash:
        return "record was edited (hash differs)"
    if parent is not None and rec.parent != parent:
        return "parent hash breaks the chain (it is not the hash of the record before)"
    return None


def _verified_path(paths: CampaignPaths) -> Path:
    return paths.root / VERIFIED_NAME


def _read_verified(path: Path) -> dict | None:
    try:
        d = json.loads(path.read_text())
    except FileNotFoundError:
        return None
    except (OSError, ValueError) as err:
        log.info("%s: unreadable (%s); checking the whole ledger", path, err)
        return None
    ok = (
        isinstance(d, dict)
        and all(isinstance(d.get(k), int) and d[k] >= 0 for k in ("count", "offset"))
        and all(isinstance(d.get(k), str) and len(d[k]) == 64 for k in ("sha256", "tip"))
    )
    if not ok:
        log.info("%s: not a check record; checking the whole ledger", path)
        return None
    return d


def check_chain(paths: CampaignPaths) -> int:
    """Check the ledger's chain — step order, record hashes, parent links. Returns the count.

    Incremental: ``ledger.verified.json`` holds the count, byte offset, sha256 of the first
    ``offset`` bytes and the tip hash of the last check. While the ledger's first ``offset``
    bytes still have that sha256, only the records after them are parsed and checked; otherwise
    the whole ledger is. Raises :class:`LedgerError` naming the step and line of the first
    broken record. An unterminated last line is ignored (warning). The sidecar is refreshed
    atomically; failing to write it is only a warning.
    """
    path = paths.ledger
    side = _verified_path(paths)
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return 0
    try:
        size = _size(fd)
        known = _read_verified(side)
        h = hashlib.sha256()
        offset, first_line, count, parent = 0, 1, 0, GENESIS
        if known is not None and known["offset"] > size:
            log.warning(
                "%s: shorter than when last checked (%d < %d bytes, %d records then); "
                "checking it all",
                path,
                size,
                known["offset"],
                known["count"],
            )
        elif known is not None:
            pos, newlines = 0, 0
            while pos < known["offset"]:
                chunk = os.pread(fd, min(1 << 20, known["offset"] - pos), pos)
                if not chunk:
                    break
                h.update(chunk)
                newlines += chunk.count(b"\n")
                pos += len(chunk)
            if h.hexdigest() == known["sha256"]:
                offset, first_line = known["offset"], newlines + 1
                count, parent = known["count"], known["tip"]
            else:
                log.warning(
                    "%s: its first %d bytes changed since the last check; checking it all",
                    path,
                    known["offset"],
                )
                h = hashlib.sha256()
        rest = _complete_part(os.pread(fd, size - offset, offset), path)
    finally:
        os.close(fd)
    for lineno, _, raw in _lines(rest, first_line):
        try:
            rec = _parse_line(raw)
        except _BadLine as err:
            raise LedgerError(
                f"{path}: line {lineno} (step {count} belongs there) {err.why}"
            ) from None
        problem = _chain_problem(rec, count, parent)
        if problem:
            raise LedgerError(f"{path}: step {rec.step} (line {lineno}): {problem}")
        count, parent = count + 1, rec.hash
    if rest:
        h.update(rest)
        state = {"count": count, "offset": offset + len(rest), "sha256": h.hexdigest()}
        state["tip"] = parent
        try:
            atomic_write_text(side, json.dumps(state, sort_keys=True) + "\n")
        except OSError as err:
            log.warning("%s: could not record the check (%s); the next one reads it all", side, err)
    return count


def input_digests(paths: CampaignPaths) -> dict[str, str]:
    """sha256 of the campaign's frozen config and host structure (step 0's ``inputs``)."""
    return {p.name: sha256_file(p) for p in (paths.config, paths.host)}


def input_problems(paths: CampaignPaths, rec: LedgerRecord) -> list[tuple[str, str]]:
    """(file, what is wrong) for each campaign input that differs from ``rec.inputs`` (the
    config as last amended: :mod:`ionwell.store.amendments`)."""
    from ionwell.store.amendments import read_amendments

    out = []
    expected = dict(rec.inputs or {})
    if expected:
        try:
            amended = read_amendments(paths)
        except LedgerError as err:
            out.append(("amendments.jsonl", str(err)))
        else:
            if amended and "campaign.yaml" in expected:
                expected["campaign.yaml"] = amended[-1].config_sha256
    for name, digest in sorted(expected.items()):
        f = paths.root / name
        if not f.is_file():
            out.append((name, "file is missing"))
        elif sha256_file(f) != digest:
            out.append((name, "content differs from its recorded sha256 (ledger / amendments)"))
    return out


def first_record(path: Path) -> LedgerRecord | None:
    """The ledger's first record (one line read), or None when it is empty."""
    try:
        with open(path, "rb") as fh:
            raw = fh.readline()
    except FileNotFoundError:
        return None
    if not raw.endswith(b"\n"):
        return None
    return _parse(raw, Path(path), 1)


def check_inputs(paths: CampaignPaths) -> None:
    """Refuse a campaign whose frozen config or host file changed after step 0 was recorded."""
    rec = first_record(paths.ledger)
    if rec is None:
        return
    bad = input_problems(paths, rec)
    if bad:
        name, why = bad[0]
        raise LedgerError(
            f"{paths.root / name}: {why}; it was changed by hand after the campaign started. "
            "Restore it, or start a new campaign under another name"
        )


class VerifyProblem(BaseModel):
    """One disagreement between the ledger and the files on disk."""

    step: int
    file: str | None
    message: str


def verify(paths: CampaignPaths) -> list[VerifyProblem]:
    """Re-hash every recorded file and re-check the chain. Problems in step order, first first.

    A complete line that is not a record is a problem naming its line (``file`` is
    ``ledger.jsonl``, ``step`` the step whose record belongs there); the records after it are
    still checked. An unterminated last line (a torn append) is not a problem. A map removed by
    ``ionwell prune`` (listed with its recorded digest in the step's ``pruned.json``) is not
    missing.
    """
    from ionwell.store.prune import pruned_files

    problems: list[VerifyProblem] = []
    name = paths.ledger.name
    try:
        data = paths.ledger.read_bytes()
    except FileNotFoundError:
        return []
    except OSError as err:
        return [VerifyProblem(step=-1, file=name, message=f"cannot be read ({err})")]
    parent: str | None = GENESIS
    for i, (lineno, _, raw) in enumerate(_lines(_complete_part(data, paths.ledger))):
        try:
            rec = _parse_line(raw)
        except _BadLine as err:
            problems.append(VerifyProblem(step=i, file=name, message=f"line {lineno} {err.why}"))
            parent = None  # the next record's parent cannot be checked
            continue
        if rec.step != i:
            problems.append(VerifyProblem(step=rec.step, file=None, message=f"out of order at {i}"))
        if parent is not None and rec.parent != parent:
            problems.append(
                VerifyProblem(step=rec.step, file=None, message="parent hash breaks the chain")
            )
        if rec.compute_hash() != rec.hash:
            problems.append(
                VerifyProblem(step=rec.step, file=None, message="record was edited (hash differs)")
            )
        parent = rec.hash
        problems += [
            VerifyProblem(step=rec.step, file=f, message=m) for f, m in input_problems(paths, rec)
        ]
        sdir = paths.step(rec.step)
        pruned = pruned_files(sdir)
        for rel, digest in sorted(rec.files.items()):
            f = sdir / rel
            where = f"steps/{step_label(rec.step)}/{rel}"
            if not f.exists() and pruned.get(rel) == digest:
                continue  # pruned on purpose; its digest is kept (ionwell prune)
            if not f.exists():
                problems.append(VerifyProblem(step=rec.step, file=where, message="file is missing"))
            elif sha256_file(f) != digest:
                problems.append(
                    VerifyProblem(step=rec.step, file=where, message="content differs (sha256)")
                )
    return problems


# ---------------------------------------------------------------------------------------------
# ASE database mirror

#: key of ionwell's bookkeeping in the ASE database's metadata
_MIRROR_KEY = "ionwell_mirror"
_SQLITE_MAGIC = b"SQLite format 3\x00"


class _MirrorStale(Exception):
    """The mirror holds steps that are not (or no longer) the ledger's."""


def sync_mirror(paths: CampaignPaths, records: list[LedgerRecord] | None = None) -> int:
    """Add the recorded steps newer than ``ionwell.db`` holds (an ASE database). Returns rows added.

    The mirror remembers in its metadata the next step to add and the hash of the last one
    added, so an update reads only the new records (``records``, or the end of the ledger) and
    never selects every row; rows and bookkeeping are committed in one transaction. A mirror
    that is damaged or not a database is moved aside to ``ionwell.db.corrupt-<UTC time>`` and
    rebuilt from the ledger and the step folders; one that no longer matches the ledger (the
    ledger was cut back) is moved aside as ``.stale-<UTC time>`` and rebuilt. The mirror is
    derived data: this never raises, it logs a warning and returns 0 instead.
    """
    try:
        return _sync_mirror(paths, records)
    except _MirrorStale as err:
        return _rebuild(paths, "stale", str(err))
    except Exception as err:
        why = _mirror_damage(paths.database)
        if why is None:
            log.warning("%s: not updated: %s: %s", paths.database, type(err).__name__, err)
            return 0
        return _rebuild(paths, "corrupt", why)


def rebuild_mirror(paths: CampaignPaths) -> int:
    """Write ``ionwell.db`` afresh from the ledger (any old one is moved aside). Rows written."""
    return _rebuild(paths, "old", "is rebuilt on request")


def _rebuild(paths: CampaignPaths, label: str, why: str) -> int:
    try:
        aside = _set_aside(paths.database, label)
        if aside is not None:
            log.warning(
                "%s %s; moved to %s and rebuilt from the ledger", paths.database, why, aside
            )
        return _sync_mirror(paths, None)
    except Exception as err:
        log.warning("%s: could not rebuild: %s: %s", paths.database, type(err).__name__, err)
        return 0


def _set_aside(db: Path, label: str) -> Path | None:
    """Rename the database (and any SQLite journal beside it) out of the way."""
    if not db.exists():
        return None
    stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
    target = db.with_name(f"{db.name}.{label}-{stamp}")
    n = 1
    while target.exists():
        target = db.with_name(f"{db.name}.{label}-{stamp}-{n}")
        n += 1
    os.replace(db, target)
    # a journal left beside the new, empty database would be replayed into it
    for suffix in ("-journal", "-wal", "-shm"):
        side = db.with_name(db.name + suffix)
        if side.exists():
            os.replace(side, target.with_name(target.name + suffix))
    return target


def _mirror_damage(db: Path) -> str | None:
    """Why ``db`` is unusable (not SQLite, damaged, unreadable), or None when it looks sound."""
    try:
        with open(db, "rb") as fh:
            head = fh.read(len(_SQLITE_MAGIC))
    except FileNotFoundError:
        return None
    except OSError as err:
        return f"cannot be read ({err})"
    if head and head != _SQLITE_MAGIC:
        return "is not an SQLite database"
    try:
        con = sqlite3.connect(db.resolve().as_uri() + "?mode=ro", uri=True, timeout=20)
    except sqlite3.Error as err:
        return f"cannot be opened ({err})"
    try:
        rows = con.execute("PRAGMA quick_check").fetchall()
        if rows != [("ok",)]:
            return f"fails SQLite's integrity check ({rows[0][0] if rows else 'no answer'})"
    except sqlite3.OperationalError as err:
        if "locked" in str(err) or "busy" in str(err):
            return None
        return f"cannot be read ({err})"
    except sqlite3.DatabaseError as err:
        return f"is damaged ({err})"
    finally:
        con.close()
    return None


def _mirror_state(meta: dict) -> tuple[int, str | None] | None:
    state = meta.get(_MIRROR_KEY)
    if not isinstance(state, dict):
        return None
    nxt, tip = state.get("next_step"), state.get("tip")
    if not isinstance(nxt, int) or nxt < 0 or not (tip is None or isinstance(tip, str)):
        return None
    return nxt, tip


def _sync_mirror(paths: CampaignPaths, records: list[LedgerRecord] | None) -> int:
    from ase.db import connect

    if records == [] or (records is None and _ledger_size(paths.ledger) == 0):
        return 0
    # the first connection creates the schema if needed (ase commits that on its own)
    _ = connect(paths.database, type="db", use_lock_file=False).metadata
    db = connect(paths.database, type="db", use_lock_file=False)
    with db:  # one transaction: the rows and the bookkeeping are committed together
        # take the write lock before reading the bookkeeping: two syncs never add a step twice
        db.connection.execute("BEGIN IMMEDIATE")
        meta = db.metadata
        state = _mirror_state(meta)
        if state is None:  # a new mirror, or one written before the bookkeeping
            last = next(
                iter(
                    db.select(
                        sort="-step", limit=1, columns=["key_value_pairs"], include_data=False
                    )
                ),
                None,
            )
            next_step = last.step + 1 if last is not None and "step" in last else 0
            tip = None
        else:
            next_step, tip = state
        first = max(next_step - 1, 0)
        new = None if records is None else _given_records(records, next_step)
        from_ledger = new is None
        if new is None:
            new = _tail_records(paths.ledger, first)
        if next_step > 0 and tip is not None:
            prev = next((r for r in new if r.step == next_step - 1), None)
            if (prev is None and from_ledger) or (prev is not None and prev.hash != tip):
                raise _MirrorStale(
                    f"holds steps up to {next_step - 1} that are not the ledger's "
                    f"(the ledger was cut back or rewritten)"
                )
        new = [r for r in new if r.step >= next_step]
        added = 0
        for rec in new:
            atoms = _mirror_atoms(paths, rec)
            if atoms is not None:
                db.write(atoms, key_value_pairs=_mirror_row(rec))
                added += 1
        if new:
            meta[_MIRROR_KEY] = {"next_step": new[-1].step + 1, "tip": new[-1].hash}
            db.metadata = meta
    return added


def _given_records(records: list[LedgerRecord], next_step: int) -> list[LedgerRecord] | None:
    """The records given from the mirror's last step on, or None when they cannot serve.

    They serve when their steps from ``next_step - 1`` on run on without a gap, starting with the
    mirror's last step or the next one; otherwise (a gap, or only older steps, as when the
    ledger was cut back and a step redone) the end of the ledger is read instead.
    """
    given = sorted((r for r in records if r.step >= next_step - 1), key=lambda r: r.step)
    steps = [r.step for r in given]
    if (
        steps
        and steps[0] in (next_step - 1, next_step)
        and steps == list(range(steps[0], steps[0] + len(steps)))
    ):
        return given
    log.info("records given do not follow the mirror (next step %d); reading the ledger", next_step)
    return None


def _ledger_size(path: Path) -> int:
    try:
        return path.stat().st_size
    except FileNotFoundError:
        return 0


def _mirror_atoms(paths: CampaignPaths, rec: LedgerRecord):
    from ase.io import read

    f = StepPaths(paths.step(rec.step)).relaxed
    if not f.exists():
        log.warning("%s: no row for step %d (%s is missing)", paths.database, rec.step, f)
        return None
    try:
        return read(f)
    except Exception as err:
        log.warning("%s: no row for step %d (%s: %s)", paths.database, rec.step, f, err)
        return None


def _mirror_row(rec: LedgerRecord) -> dict[str, Any]:
    kv: dict[str, Any] = {
        "step": rec.step,
        "guests": rec.guests,
        "outcome": rec.outcome,
        "record": f"sha256:{rec.hash[:16]}",  # prefixed: ase.db reads bare hex like 12e34 as a float
    }
    if rec.energy is not None:
        kv["total_energy"] = rec.energy
    return kv
