"""Time appending ledger records: the append-only ledger against the old whole-file rewrite.

    python bench/ledger_append.py [N] [--dir DIR]     # N records (default 500)

Each record is about 3 KB (a placement decision with eight candidate wells and a ``files`` dict of
eight entries), built in memory beforehand; only the appends are timed, each with its fsync.
Prints, for each algorithm, the total seconds, the bytes written, and the median seconds per
append at records 5-15 and at the last ten. Then, at N records, ``last_record`` against
``read_ledger(...)[-1]`` and ``check_chain`` in full against incremental. Run by hand; not a test.
The temporary folder is made under DIR (default: the system's), so that fsync reaches a disk.
"""

from __future__ import annotations

import argparse
import hashlib
import statistics
import tempfile
import time
from pathlib import Path

from pydantic import ValidationError

from ionwell.errors import LedgerError
from ionwell.science.placement import Decision, Site
from ionwell.store.campaign import CampaignPaths, atomic_write_bytes
from ionwell.store.ledger import (
    GENESIS,
    LedgerRecord,
    append_record,
    check_chain,
    last_record,
    read_ledger,
)

# ---------------------------------------------------------------------------------------------
# THE OLD ALGORITHM (ionwell before the append-only ledger), copied here for comparison only:
# every append re-reads and validates the whole ledger, then rewrites the whole file under a
# temporary name and renames it.


def old_read_ledger(path: Path) -> list[LedgerRecord]:
    if not path.exists():
        return []
    records = []
    for i, line in enumerate(path.read_text().splitlines(), 1):
        if not line.strip():
            continue
        try:
            records.append(LedgerRecord.model_validate_json(line))
        except ValidationError as err:
            raise LedgerError(f"{path}: line {i} is not a valid ledger record ({err})") from None
    return records


def old_append_record(path: Path, record: LedgerRecord) -> LedgerRecord:
    records = old_read_ledger(path)
    expected = records[-1].step + 1 if records else 0
    if record.step != expected:
        raise LedgerError(f"{path}: cannot record step {record.step}; the next step is {expected}")
    parent = records[-1].hash if records else GENESIS
    rec = record.model_copy(update={"parent": parent, "hash": ""})
    rec = rec.model_copy(update={"hash": rec.compute_hash()})
    old = path.read_bytes() if path.exists() else b""
    atomic_write_bytes(path, old + (rec.model_dump_json() + "\n").encode())
    return rec


# END OF THE OLD ALGORITHM
# ---------------------------------------------------------------------------------------------


def _digest(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def make_record(step: int) -> LedgerRecord:
    """A record of realistic size: eight recorded files, a decision among eight wells."""
    names = [
        "input.extxyz",
        "engine/pw.in",
        "engine/pw.out",
        "result.json",
        "potential.npz",
        "relaxed.extxyz",
        "checks.json",
        "decision.json",
    ]
    wells = [
        Site(
            position=[1.234567 * k, 2.345678 + 0.1 * step, 3.456789],
            potential=-4.56789 + 0.01 * k,
            index=[10 + k, 20, 30],
            degenerate=k < 2,
        )
        for k in range(8)
    ]
    decision = Decision(
        rule="deepest",
        guest="Li",
        candidates=wells,
        chosen=wells[:1],
        exclusion={"Li": 2.2, "C": 1.6},
        within=None,
        admissible_fraction=0.4321,
        reason=(
            "deepest admissible well, 0.123 V below the next; placed at least 2.2 Å from every "
            "guest and 1.6 Å from every host atom"
        ),
        grid_shape=[96, 96, 180],
        chosen_wells=[0],
        degenerate=0.01,
    )
    return LedgerRecord(
        step=step,
        parent="",
        outcome="continue",
        guests=step + 1,
        energy=-1234.56789 - 1.9 * step,
        scf_converged=True,
        scf_iterations=14,
        findings={"info": 2, "warning": 1},
        decision=decision,
        remedies=["mixing_beta=0.3"],
        files={name: _digest(f"{step}/{name}") for name in names},
        engine="espresso",
        engine_version="7.2",
        ionwell_version="0.1.0",
        host="node042.cluster.example.org",
        started="2025-01-01T00:00:00+00:00",
        finished="2025-01-01T00:42:00+00:00",
        wall_time=2520.123,
        job_id="1234567",
    )


def run(append, path: Path, records: list[LedgerRecord]) -> tuple[list[float], int]:
    """Append every record; per-append seconds and bytes written."""
    times, written = [], 0
    for rec in records:
        t0 = time.perf_counter()
        append(path, rec)
        times.append(time.perf_counter() - t0)
        written += path.stat().st_size if append is old_append_record else 0
    if append is not old_append_record:
        written = path.stat().st_size  # append-only: every byte is written once
    return times, written


def report(label: str, times: list[float], written: int) -> None:
    n = len(times)
    early = statistics.median(times[5:15]) * 1e3
    late = statistics.median(times[max(n - 10, 0) :]) * 1e3
    print(
        f"{label:<28} total {sum(times):7.2f} s   written {written / 1e6:8.2f} MB   "
        f"median per append: records 5-15 {early:6.2f} ms, {n - 10}-{n} {late:6.2f} ms "
        f"(ratio {late / early:.2f})"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("n", nargs="?", type=int, default=500)
    ap.add_argument("--dir", default=None, help="make the temporary folder here")
    args = ap.parse_args()
    records = [make_record(i) for i in range(args.n)]
    size = len(make_record(0).model_dump_json()) + 1
    print(f"{args.n} records of about {size} bytes, each append fsynced\n")

    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        root = Path(tmp)
        report("old: whole-file rewrite", *run(old_append_record, root / "old.jsonl", records))
        report("new: append (tail read)", *run(append_record, root / "new.jsonl", records))

        tip = None

        def with_tip(path: Path, rec: LedgerRecord) -> None:
            nonlocal tip
            tip = append_record(path, rec, tip=tip)

        report("new: append (tip passed)", *run(with_tip, root / "tip.jsonl", records))

        paths = CampaignPaths(root / "campaign")
        paths.root.mkdir()
        (root / "new.jsonl").rename(paths.ledger)
        t0 = time.perf_counter()
        read_ledger(paths.ledger)[-1]
        t_all = time.perf_counter() - t0
        t0 = time.perf_counter()
        last_record(paths.ledger)
        t_last = time.perf_counter() - t0
        print(
            f"\nat {args.n} records: read_ledger(...)[-1] {t_all * 1e3:.1f} ms, "
            f"last_record {t_last * 1e3:.2f} ms"
        )
        t0 = time.perf_counter()
        check_chain(paths)  # no sidecar yet: the whole ledger
        t_full = time.perf_counter() - t0
        append_record(paths.ledger, make_record(args.n))
        t0 = time.perf_counter()
        check_chain(paths)  # the sidecar vouches for the first N: one record parsed
        t_inc = time.perf_counter() - t0
        print(f"check_chain: full {t_full * 1e3:.1f} ms, incremental {t_inc * 1e3:.2f} ms")


if __name__ == "__main__":
    main()
