"""The ``ionwell`` command. The only module that prints.

ionwell run CONFIG.yaml            run or resume a campaign (drives Snakemake)
ionwell status campaigns/<name>    table of steps and where the campaign stands
ionwell place POTENTIAL.cube       one-shot: where would the next guest go?
ionwell verify campaigns/<name>    check the ledger against the files on disk
ionwell prune campaigns/<name>     remove old steps' maps (digests and wells tables stay)
ionwell report CAMPAIGN [...]      one self-contained HTML page (several: compared)
ionwell engines [check NAME]       engine kinds and definitions; a tiny single point through one
ionwell schema                     JSON Schema of the campaign config
"""

from __future__ import annotations

import argparse
import collections
import contextlib
import logging
import os
import re
import signal
import subprocess
import sys
import threading
from pathlib import Path

import ionwell
from ionwell.cli import place as cli_place
from ionwell.engines.launcher import die_with_parent
from ionwell.errors import IonwellError

log = logging.getLogger("ionwell.cli.commands")


def _profile_dir(name: str) -> Path:
    p = Path(name)
    if p.is_dir():
        return p.resolve()
    packaged = ionwell.snakefile().parent.parent / "profiles" / name
    if packaged.is_dir():
        return packaged
    raise IonwellError(f"--profile {name}: no such profile folder (expected a directory)")


def snakemake_argv(config: Path, root: Path, args: argparse.Namespace) -> list[str]:
    """The Snakemake command line that runs a campaign (one window of steps per invocation)."""
    argv = [
        sys.executable,
        "-m",
        "snakemake",
        "--snakefile",
        str(ionwell.snakefile()),
        "--configfile",
        str(config.resolve()),
        "--directory",
        str(root.resolve()),
        "--rerun-triggers",
        "mtime",
        "--rerun-incomplete",
        # light rule bodies run as threads of this process instead of re-parsing the workflow
        "--force-use-threads",
    ]
    if args.profile:
        argv += ["--profile", str(_profile_dir(args.profile))]
    if args.cores or not args.profile:
        argv += ["--cores", str(args.cores or 1)]
    if args.retries is not None or not args.profile:
        argv += ["--retries", str(2 if args.retries is None else args.retries)]
    if not args.verbose:
        argv += ["--quiet", "rules", "host", "reason", "progress"]
    return argv


#: ionwell's own log lines (see logsetup); Snakemake's other lines are kept for errors only
_OWN_LINE = re.compile(r"^\d\d:\d\d:\d\d ionwell \| ")


def _run_snakemake(argv: list[str], lock, verbose: bool = False) -> int:
    """Run Snakemake in a process group of its own, recorded in the controller lock.

    ionwell's own progress lines are shown as they come; Snakemake's chatter is kept back and
    its last lines are shown only when it fails. On SIGINT/SIGTERM the whole group (Snakemake
    and the step jobs it spawned) is ended at once; after a SIGKILL of the controller, the next
    controller ends what is left of the group.
    """
    child = subprocess.Popen(
        argv,
        start_new_session=True,
        preexec_fn=die_with_parent,
        stdout=None if verbose else subprocess.PIPE,
        stderr=None if verbose else subprocess.STDOUT,
        text=True,
        errors="replace",
    )
    lock.record_jobs_group(child.pid)

    def _stop(signum, _frame):
        for sig, grace in ((signal.SIGTERM, 10.0), (signal.SIGKILL, 5.0)):
            try:
                os.killpg(child.pid, sig)
            except ProcessLookupError:
                break
            try:
                child.wait(timeout=grace)
                break
            except subprocess.TimeoutExpired:
                continue
        raise KeyboardInterrupt

    old = {s: signal.signal(s, _stop) for s in (signal.SIGINT, signal.SIGTERM)}
    held: collections.deque[str] = collections.deque(maxlen=60)
    failed: list[str] = []
    try:
        if child.stdout is not None:
            for line in child.stdout:
                if _OWN_LINE.match(line):
                    sys.stderr.write(line)
                    sys.stderr.flush()
                    m = _FAILED_LINE.search(line)
                    if m:
                        failed.append(m.group(1).strip())
                elif line.strip():
                    held.append(line)
        rc = child.wait()
    finally:
        for s, h in old.items():
            signal.signal(s, h)
    if rc != 0:
        _LAST_LINES[:] = list(held)
        _FAILURES[:] = failed
    return rc


#: Snakemake's last lines of a failed invocation, shown when ionwell has no message of its own
_LAST_LINES: list[str] = []
#: what the step bodies said when they failed (ionwell's own "step NNNN failed: ..." lines)
_FAILURES: list[str] = []
_FAILED_LINE = re.compile(r"step \d{4,} failed: (.*)$")


def _cause_from_output(paths):
    """The failure of a Snakemake invocation that left no ``error.json`` (a full disk cannot
    take one), from what the step bodies logged or from Snakemake's last lines; recorded as
    the step's error where possible, so ``ionwell status`` shows it too. None: no cause seen."""
    from ionwell.errors import disk_full_text
    from ionwell.workflow.summary import record_error

    message = _FAILURES[-1] if _FAILURES else None
    if message is None:
        lines = [x.strip() for x in _LAST_LINES if disk_full_text(x)]
        if not lines:
            return None
        message = (
            f"no space left on device ({lines[0]}); free space on that file system and run again"
        )
    return record_error(paths, message, "disk" if disk_full_text(message) else "transient")


def _clear_snakemake_locks(root: Path) -> None:
    """Remove Snakemake's own directory locks left by a killed controller (what ``snakemake
    --unlock`` does, without parsing the workflow): our controller lock proves nobody else runs."""
    locks = root / ".snakemake" / "locks"
    if locks.is_dir():
        for f in locks.iterdir():
            with contextlib.suppress(OSError):
                f.unlink()


def _up_to_date(paths) -> bool:
    """A stopped campaign whose summary, analysis and report are newer than its ledger."""
    from ionwell.store.ledger import last_record
    from ionwell.workflow.plan import is_stopped

    if not is_stopped(paths, last_record(paths.ledger)):
        return False
    from ionwell.analysis.tables import is_current

    outs = [paths.summary, paths.root / "analysis" / "analysis.json"]
    outs.append(paths.root / "analysis" / "report.html")
    if not all(f.is_file() for f in outs) or not is_current(paths.root):
        return False
    return min(f.stat().st_mtime for f in outs) >= paths.ledger.stat().st_mtime


def _drop_stale_markers(paths) -> None:
    """Remove rule-chain markers of steps past the ledger's last record that claim a record (a
    ledger cut back by hand, or restored from a copy): Snakemake would otherwise take those
    steps as done. Markers of an unfinished step (no verdict yet) are kept: the resume continues
    from them."""
    import shutil

    from ionwell.errors import LedgerError
    from ionwell.store.ledger import last_record
    from ionwell.store.paths import StepPaths
    from ionwell.workflow.chain import read_verdict

    def claims_record(f: Path) -> bool:
        try:
            return read_verdict(f).outcome in ("continue", "stop")
        except LedgerError:  # not a verdict: claims nothing
            return False

    tip = last_record(paths.ledger)
    first = 0 if tip is None else tip.step + 1
    if not paths.steps.is_dir():
        return
    for d in sorted(paths.steps.iterdir()):
        if not d.name.isdigit() or int(d.name) < first:
            continue
        flow = StepPaths(d).flow
        claims = any(
            claims_record(f) for f in [*flow.glob("r*.verdict.json"), *flow.glob("r*.decided.json")]
        )
        if claims or int(d.name) > first:
            shutil.rmtree(flow, ignore_errors=True)


def _heartbeat(lock, stop: threading.Event) -> None:
    from ionwell.workflow.watchdog import HEARTBEAT

    while not stop.wait(HEARTBEAT):
        with contextlib.suppress(OSError):
            lock.heartbeat()


def cmd_run(args: argparse.Namespace) -> int:
    from ionwell.audit.status import campaign_status, format_status
    from ionwell.config.campaign import load_campaign, stop_rule_note
    from ionwell.store.campaign import CampaignPaths, ControllerLock
    from ionwell.store.ledger import check_chain, check_inputs, last_record, repair_tail
    from ionwell.workflow.chain import republish_statuses
    from ionwell.workflow.extend import amend, finish_amendment, handover, pending_amendment
    from ionwell.workflow.plan import WINDOW_KEY, resolve_host_path
    from ionwell.workflow.setup import prepare_campaign
    from ionwell.workflow.summary import describe_error

    config = Path(args.config)
    campaign = load_campaign(config)
    root = Path(args.root)
    base = config.resolve().parent
    paths = CampaignPaths(root / "campaigns" / campaign.name)
    if not paths.config.exists():  # a new campaign: frozen before anything else is written
        prepare_campaign(campaign, root, base, str(config))
        note = stop_rule_note(campaign)
        if note:
            print(f"ionwell: note: {note}")
    lock = ControllerLock(paths.lock)
    stale = lock.acquire()
    beat = threading.Event()
    returncode = 0
    try:
        threading.Thread(target=_heartbeat, args=(lock, beat), daemon=True).start()
        if finish_amendment(paths):
            print("ionwell: completed an amendment of campaign.yaml that a kill interrupted")
        resolved = resolve_host_path(campaign, base)
        sections = pending_amendment(paths, resolved)
        if sections:
            diff = amend(paths, resolved, sections)
            print(f"ionwell: campaign '{campaign.name}': {', '.join(sections)} amended\n{diff}")
        prepare_campaign(campaign, root, base)
        torn = repair_tail(paths.ledger)
        if torn:
            print(f"ionwell: {torn}")
        check_chain(paths)
        check_inputs(paths)
        republished = republish_statuses(paths)
        if republished:
            steps = ", ".join(str(n) for n in republished)
            print(f"ionwell: re-published the missing status.json of step(s) {steps}")
        extended = handover(paths, resolved)
        if extended:
            print(f"ionwell: {extended}")
        _drop_stale_markers(paths)
        if stale:
            print(f"ionwell: an earlier controller of '{campaign.name}' is gone; resuming")
            _clear_snakemake_locks(root)
        print(f"ionwell: running campaign '{campaign.name}' in {paths.root}", flush=True)
        argv = snakemake_argv(config, root, args)
        argv += ["--config", f"{WINDOW_KEY}={args.window}"]
        while not _up_to_date(paths):
            before = last_record(paths.ledger)
            returncode = _run_snakemake(argv, lock, args.verbose)
            after = last_record(paths.ledger)
            if returncode != 0 or after is None or after == before:
                break
    finally:
        beat.set()
        lock.release()
    st = campaign_status(paths.root)
    print()
    print(format_status(st))
    report = paths.root / "analysis" / "report.html"
    if returncode == 0 and report.is_file():
        print(f"report (tables and plots, open in a browser): {report}")
    if returncode != 0:
        err = describe_error(paths) or _cause_from_output(paths)
        if err is None and _LAST_LINES:
            sys.stderr.write("ionwell: Snakemake's last lines:\n" + "".join(_LAST_LINES))
        why = "Snakemake failed; see its last lines above"
        if err is not None:
            named = err.message.startswith(f"step {err.step}")
            why = err.message if named else f"step {err.step}: {err.message}"
        print(f"ionwell: error: campaign '{campaign.name}' did not finish: {why}", file=sys.stderr)
        return 2 if err is not None and err.kind == "input" else 1
    return 0


def cmd_status(args: argparse.Namespace) -> int:
    from ionwell.audit.status import campaign_status, format_status, status_json
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import check_chain

    paths = CampaignPaths(Path(args.campaign))
    if paths.ledger.exists():
        check_chain(paths)  # a broken chain is refused, naming the record
    st = campaign_status(args.campaign)
    print(status_json(st) if args.json else format_status(st))
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import read_ledger, verify

    paths = CampaignPaths(Path(args.campaign))
    if not paths.ledger.exists():
        raise IonwellError(f"{paths.root}: no ledger.jsonl (not a campaign folder, or no step yet)")
    problems = verify(paths)
    if not problems:
        n = len(read_ledger(paths.ledger))
        print(f"ok: {n} steps, every recorded file matches its hash, chain intact")
        return 0
    first = problems[0]
    where = f", file {first.file}" if first.file else ""
    print(f"verify failed: step {first.step}{where}: {first.message}", file=sys.stderr)
    for p in problems[1:]:
        where = f", file {p.file}" if p.file else ""
        print(f"  also step {p.step}{where}: {p.message}", file=sys.stderr)
    return 1


def cmd_replay(args: argparse.Namespace) -> int:
    from ionwell.audit.replay import replay

    steps = replay(args.campaign)
    if not steps:
        raise IonwellError(f"{args.campaign}: no finished step to replay")
    differ = [s for s in steps if s.status in ("differs", "cannot replay")]
    for s in steps:
        print(f"step {s.step:4d}  {s.status:<14} {s.message}")
    if differ:
        first = differ[0]
        print(f"replay: step {first.step} {first.status}: {first.message}", file=sys.stderr)
        return 1
    pruned = [s.step for s in steps if s.status == "pruned"]
    if pruned:
        print(
            f"ok: {len(steps) - len(pruned)} of {len(steps)} steps re-derived exactly; "
            f"{len(pruned)} could not be checked fully (maps pruned): steps "
            f"{pruned[0]}–{pruned[-1]}"
        )
        return 0
    print(f"ok: every recorded decision ({len(steps)} steps) is re-derived exactly")
    return 0


def cmd_prune(args: argparse.Namespace) -> int:
    from ionwell.store.campaign import CampaignPaths, ControllerLock
    from ionwell.store.prune import prune

    paths = CampaignPaths(Path(args.campaign))
    if not paths.ledger.exists():
        raise IonwellError(f"{paths.root}: no ledger.jsonl (not a campaign folder, or no step yet)")
    lock = ControllerLock(paths.lock)
    if not args.dry_run:
        lock.acquire()  # not while a controller runs the campaign
    try:
        rep = prune(paths.root, keep=args.keep, dry_run=args.dry_run)
    finally:
        if not args.dry_run:
            lock.release()
    verb = "would remove" if args.dry_run else "removed"
    if not rep.steps:
        print(f"nothing to prune: the maps of the newest {args.keep} steps are kept")
        return 0
    print(
        f"{verb} {rep.files} map files of {len(rep.steps)} steps ({rep.steps[0]}–{rep.steps[-1]}), "
        f"{rep.bytes / 1e6:.1f} MB; digests and wells tables kept (verify and replay say so)"
    )
    return 0


def cmd_analyse(args: argparse.Namespace) -> int:
    from ionwell.analysis.tables import analyse, read_settings_file, set_settings

    root = Path(args.campaign)
    if not (root / "campaign.yaml").is_file():
        raise IonwellError(f"{root}: not a campaign folder (no campaign.yaml)")
    if args.settings:
        settings = read_settings_file(args.settings)
        print(f"analysis settings recorded in {set_settings(root, settings)}")
    summary = analyse(root)
    print(f"analysis of {summary.steps} steps written to {summary.folder}: "
          + ", ".join(summary.files))  # fmt: skip
    if summary.reference is None:
        print(
            "  (no guest reference: no formation energies, hull or voltage; give one with "
            "'ionwell analyse CAMPAIGN --settings FILE', FILE holding reference: {...})"
        )
    else:
        print(f"  guest μ = {summary.reference.mu:.4f} eV ({summary.reference.source})")
        print(f"  hull vertices at steps {summary.hull_steps}")
        if summary.voltages:
            print("  voltage steps / V: " + ", ".join(f"{v:.3f}" for v in summary.voltages))
    print(
        f"  x and capacity per {''.join(f'{k}{v}' for k, v in summary.formula_unit.items())}; "
        f"charges: {summary.charge_scheme or 'none recorded'}; settings from "
        f"{summary.settings_source}"
    )
    for f in summary.findings:
        print(f"  {f['severity']}: [{f['code']}] {f['message']}")
    if summary.caution:
        print(f"  caution: {summary.caution}")
    return 0


def cmd_report(args: argparse.Namespace) -> int:
    from ionwell.analysis.report import write_report

    out = write_report(args.campaigns, args.output)
    print(f"report written to {out}")
    return 0


def cmd_schema(args: argparse.Namespace) -> int:
    from ionwell.config.campaign import campaign_schema

    text = campaign_schema()
    if args.output:
        Path(args.output).write_text(text + "\n")
    else:
        print(text)
    return 0


def cmd_engines(args: argparse.Namespace) -> int:
    import shutil as _sh

    from ionwell.engines.check import check_engine, definitions, engine_kinds

    config_dir = Path(args.config_dir) if args.config_dir else Path.cwd()
    if args.action == "list":
        print("engine kinds:")
        for kind, text in engine_kinds().items():
            print(f"  {kind:<8} {text}")
        found = definitions(config_dir)
        print("\nengine definitions (engine: {definition: NAME}):")
        if not found:
            print("  none found")
        for name, path, label, program in found:
            here = "installed" if _sh.which(program) else "not installed here"
            print(f"  {name:<18} {label:<18} {program} ({here})  {path}")
        return 0
    if not args.name:
        raise IonwellError("engines check: name an engine kind or definition, e.g. pyscf")
    report = check_engine(args.name, config_dir, Path(args.keep) if args.keep else None)
    if args.json:
        print(report.model_dump_json(indent=2))
        return 0 if report.ok else (3 if not report.installed else 1)
    print(f"{report.name} ({report.kind}): {report.message}")
    if report.energy is not None:
        print(
            f"  energy of H2          {report.energy:.6f} eV  (SCF converged: {report.scf_converged})"
        )
        lo, hi = report.potential_range
        shape = "x".join(str(n) for n in report.grid_shape)
        print(f"  potential map         {shape} points, {lo:.3f} to {hi:.3f} V")
        if report.charges is not None:
            q = ", ".join(f"{x:+.3f}" for x in report.charges)
            print(f"  charges ({report.charge_scheme})  {q} e")
        for label, v in (("HOMO", report.homo), ("Fermi level", report.fermi_level)):
            if v is not None:
                print(f"  {label:<21} {v:.4f} eV")
        for n in report.notes:
            print(f"  note: {n}")
        print(f"  {report.seconds:.1f} s")
    if report.folder:
        print(f"  files kept in {report.folder}")
    if not report.installed:
        return 3
    return 0 if report.ok else 1


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="ionwell",
        description="Unattended guest-ion insertion series with provenance and analysis.",
    )
    p.add_argument("--version", action="version", version=f"ionwell {ionwell.__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="run or resume a campaign")
    r.add_argument("config", help="campaign YAML file")
    r.add_argument("--root", default=".", help="folder holding campaigns/ (default: .)")
    r.add_argument("--cores", type=int, default=None, help="cores for Snakemake (default 1)")
    r.add_argument("--profile", default=None, help="Snakemake profile: local, or a folder")
    r.add_argument(
        "--retries",
        type=int,
        default=None,
        help="attempts after a failed step job, continuing from its restart files (default 2, "
        "or the profile's)",
    )
    r.add_argument(
        "--window",
        type=cli_place.positive_count,
        default=20,
        help="steps per Snakemake invocation (default 20); the DAG never holds more",
    )
    r.add_argument("-v", "--verbose", action="store_true", help="show Snakemake's own output")
    r.set_defaults(func=cmd_run)

    s = sub.add_parser("status", help="table of steps and where the campaign stands")
    s.add_argument("campaign", help="campaign folder, e.g. campaigns/<name>")
    s.add_argument("--json", action="store_true", help="machine-readable output")
    s.set_defaults(func=cmd_status)

    cli_place.add_parser(sub)

    v = sub.add_parser("verify", help="check the ledger against the files on disk")
    v.add_argument("campaign", help="campaign folder")
    v.set_defaults(func=cmd_verify)

    rp = sub.add_parser("replay", help="re-derive every decision from the stored maps")
    rp.add_argument("campaign", help="campaign folder")
    rp.set_defaults(func=cmd_replay)

    pr = sub.add_parser("prune", help="remove old steps' maps, keeping digests and wells")
    pr.add_argument("campaign", help="campaign folder")
    pr.add_argument(
        "--keep",
        type=cli_place.positive_count,
        default=5,
        help="keep the maps of the newest N steps (5)",
    )
    pr.add_argument("--dry-run", action="store_true", help="say what would be removed")
    pr.set_defaults(func=cmd_prune)

    an = sub.add_parser("analyse", help="energetics tables and plots (also while running)")
    an.add_argument("campaign", help="campaign folder")
    an.add_argument(
        "--settings",
        metavar="FILE",
        help="analysis settings (YAML: reference, formula_unit, charge_scheme, rim_width, "
        "dos_width, ...) to use from now on; kept as analysis.yaml in the campaign folder. "
        "Recomputes no step.",
    )
    an.set_defaults(func=cmd_analyse)

    rep = sub.add_parser("report", help="one self-contained HTML report of campaign(s)")
    rep.add_argument("campaigns", nargs="+", metavar="CAMPAIGN", help="campaign folder(s)")
    rep.add_argument(
        "-o",
        "--output",
        default=None,
        help="HTML file (default: CAMPAIGN/analysis/report.html, or ./report.html for several)",
    )
    rep.set_defaults(func=cmd_report)

    en = sub.add_parser("engines", help="list engine kinds and definitions; check one")
    en.add_argument("action", nargs="?", choices=["list", "check"], default="list")
    en.add_argument("name", nargs="?", help="engine kind or definition name (for check)")
    en.add_argument(
        "--config-dir", default=None, help="folder whose engines/ is searched first (default: .)"
    )
    en.add_argument("--keep", default=None, help="check: run in this folder and keep its files")
    en.add_argument("--json", action="store_true", help="check: machine-readable report")
    en.set_defaults(func=cmd_engines)

    sc = sub.add_parser("schema", help="print the JSON Schema of campaign configs")
    sc.add_argument("-o", "--output", default=None, help="write to this file")
    sc.set_defaults(func=cmd_schema)
    return p


def main(argv: list[str] | None = None) -> int:
    from ionwell.logsetup import cli_logging

    args = build_parser().parse_args(argv)
    cli_logging(verbose=getattr(args, "verbose", False))
    try:
        return int(args.func(args) or 0)
    except IonwellError as err:
        print(f"ionwell: error: {err}", file=sys.stderr)
        return 2
    except OSError as err:
        from ionwell.errors import describe_exception, error_kind

        if error_kind(err) != "disk":
            raise
        print(f"ionwell: error: {describe_exception(err)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("ionwell: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        os._exit(0)


if __name__ == "__main__":
    sys.exit(main())
