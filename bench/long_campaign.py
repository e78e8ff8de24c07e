"""Orchestration cost of a long campaign: cycle time per step, resume after SIGKILL, audit commands.

    python bench/long_campaign.py --steps 500 --kill-at 100 450 --out bench/results/long.json

Runs one campaign of ``--steps`` insertions (Li, neutral, no relaxation, placement within 3 Å)
into a four-layer hydrogen-terminated carbon flake (``--shells 4``: 480 host atoms) with the
``ase`` engine on :mod:`analytic_calculator` — an analytic stand-in, not physics, whose energy,
forces and 1e5-point map cost a few tens of ms — so that nearly all of the time measured is
ionwell's own: Snakemake, the DAG, the ledger, the checks, the placement, the files.

The campaign is driven exactly as a user drives it: ``ionwell run CONFIG --root ROOT`` as a
subprocess (``bench/`` added to ``PYTHONPATH`` so the engine finds the calculator; ``--src DIR``
puts another ionwell source tree first, e.g. an older checkout for "before" figures). Measured:

* cycle time per step: the interval between the ``recorded`` events of consecutive steps in
  ``events.jsonl`` (``time`` field), split into "between steps" (recorded n-1 -> started n:
  scheduling) and "in step" (started n -> recorded n), and the engine's own ``wall_time`` from
  the step's ``result.json``; without events, the times the harness saw ``ledger.jsonl`` grow
  (polled every ``--poll`` s), else the mtime of ``steps/NNNN/status.json``. Medians over the
  windows ``--windows`` (default steps 5-15, 95-105, 490-500; those with no data are skipped,
  the last ten steps are always added);
* resume after SIGKILL: at each ``--kill-at K`` the harness waits until step K has started
  (its ``started`` event; without events: until step K-1 is recorded; ``--kill-when
  recorded``: until step K is recorded), sends SIGKILL to the ``ionwell run`` process only
  (what happens to a controller killed by a user or a node loss: its children are left to
  ionwell), starts ``ionwell run`` again at once and times from the restart to the first step
  the new controller starts and to its ``recorded`` event, the latter also minus that step's
  engine time ("resume"). A step started before the kill and recorded after it was finished
  by a process of the killed controller that outlived it; such steps are listed apart;
* ``ionwell run`` on the finished campaign (nothing to do), and ``ionwell status``, ``verify``,
  ``replay``, ``analyse``, ``report`` on it: whole-process wall time, ``--repeats`` runs each
  (fewer when one run takes longer than ``--repeat-budget`` s), median;
* disk: bytes of ``steps/`` per step (allocated and apparent), the file kinds with the largest
  totals, and the campaign folder's top-level files;
* CPU: user + system seconds of the whole run and of each command, from
  ``getrusage(RUSAGE_CHILDREN)`` (every process reaped below this harness, which makes itself
  the subreaper of orphaned descendants so that a killed controller's processes count too;
  less sensitive to a busy machine than wall time);
* memory: peak RSS (VmHWM) of the ``ionwell run`` process and of every process below it,
  sampled from ``/proc`` every ``--rss-poll`` s, the largest simultaneous sum of VmRSS, and
  ``getrusage(RUSAGE_CHILDREN)`` of this harness.

Also checked, not timed: every step recorded once and in order, steps started more than once
(recomputed after a kill), and the exit codes of everything run. Prints a table and writes JSON
(``--out``). No timing is asserted: this is a script run by hand. Run it ``nice``d on a shared
machine; ``--root`` defaults to a fresh folder under the system's temporary directory.
"""

from __future__ import annotations

import argparse
import ctypes
import datetime as _dt
import hashlib
import json
import os
import platform
import re
import resource
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

HERE = Path(__file__).resolve().parent
COMMANDS = ("status", "verify", "replay", "analyse", "report")


# ---------------------------------------------------------------------------------------------
# set-up


def campaign_config(args: argparse.Namespace) -> dict:
    """The campaign config (a plain dict, written as YAML)."""
    return {
        "name": args.name,
        "description": "orchestration benchmark: analytic stand-in engine, not physics",
        "seed": 1,
        "host": {
            "builder": {
                "kind": "flake",
                "layers": args.layers,
                "shells": args.shells,
                "stacking": "AB",
                "spacing": 3.35,
            }
        },
        "guest": {"element": "Li", "charge_mode": "neutral"},
        "engine": {
            "kind": "ase",
            "calculator": "analytic_calculator.AnalyticCalculator",
            "parameters": {"delay": args.engine_delay} if args.engine_delay else {},
        },
        "placement": {"rule": "deepest", "within": 3.0},
        "relax": {"enabled": False},
        "stop": {"guests": args.steps, "max_steps": args.steps},
        "analysis": {"reference": {"value": -1.9, "source": "benchmark: a fixed number"}},
    }


def bench_env(src: str | None) -> dict[str, str]:
    """The environment of every ionwell process: ``--src`` first, then the caller's
    ``PYTHONPATH``, then ``bench/`` (for ``analytic_calculator``)."""
    env = dict(os.environ)
    parts = [src] if src else []
    parts += [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
    parts.append(str(HERE))
    env["PYTHONPATH"] = os.pathsep.join(parts)
    env.setdefault("PYTHONUNBUFFERED", "1")
    return env


def ionwell_argv() -> list[str]:
    """How to start ``ionwell``: the console script beside this Python, else ``python -c``."""
    script = Path(sys.executable).parent / "ionwell"
    if script.is_file() and os.access(script, os.X_OK):
        return [str(script)]
    return [
        sys.executable,
        "-c",
        "import sys; from ionwell.cli.commands import main; sys.exit(main())",
    ]


def which_ionwell(env: dict[str, str]) -> dict[str, str]:
    """Where the ionwell used by the runs lives (package file and packaged Snakefile)."""
    code = (
        "import json, ionwell; "
        "print(json.dumps({'file': ionwell.__file__, 'snakefile': str(ionwell.snakefile()), "
        "'version': getattr(ionwell, '__version__', '?')}))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True
    )
    return json.loads(out.stdout)


# ---------------------------------------------------------------------------------------------
# watching a campaign


class EventReader:
    """Reads ``events.jsonl`` incrementally (complete lines only)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.offset = 0
        self.events: list[dict] = []
        self.recorded: dict[int, float] = {}
        self.started: dict[int, list[float]] = defaultdict(list)
        self.pids: dict[tuple[str, int], list[tuple[float, object]]] = defaultdict(list)

    def poll(self) -> None:
        try:
            with open(self.path, "rb") as fh:
                fh.seek(self.offset)
                data = fh.read()
        except FileNotFoundError:
            return
        end = data.rfind(b"\n")
        if end < 0:
            return
        self.offset += end + 1
        for line in data[: end + 1].splitlines():
            try:
                ev = json.loads(line)
            except ValueError:
                continue
            self.events.append(ev)
            step, kind, t = ev.get("step"), ev.get("event"), ev.get("time")
            if not isinstance(step, int) or not isinstance(t, (int, float)):
                continue
            self.pids[(str(kind), step)].append((float(t), ev.get("pid")))
            if kind == "recorded":
                self.recorded.setdefault(step, float(t))
            elif kind == "started":
                self.started[step].append(float(t))


def ledger_count(path: Path) -> int:
    """Complete lines of ``ledger.jsonl``."""
    try:
        return path.read_bytes().count(b"\n")
    except FileNotFoundError:
        return 0


class LedgerCounter:
    """Complete lines of ``ledger.jsonl``, reading only what was appended since the last call
    (an append-only file; a shorter file is read again from the start)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.offset = 0
        self.count = 0

    def poll(self) -> int:
        try:
            size = self.path.stat().st_size
        except FileNotFoundError:
            return self.count
        if size < self.offset:
            self.offset = self.count = 0
        if size > self.offset:
            with open(self.path, "rb") as fh:
                fh.seek(self.offset)
                data = fh.read(size - self.offset)
            end = data.rfind(b"\n")
            if end >= 0:
                self.count += data.count(b"\n", 0, end + 1)
                self.offset += end + 1
        return self.count


def children_cpu() -> float:
    """User + system CPU seconds of every descendant this process (or they) waited for."""
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def become_subreaper() -> bool:
    """Make this process the reaper of its orphaned descendants (Linux ``PR_SET_CHILD_SUBREAPER``).

    A controller killed with SIGKILL leaves its descendants to be reaped by someone: as the
    subreaper, this harness reaps them (:func:`reap_orphans`), so their CPU time and peak memory
    count in ``getrusage(RUSAGE_CHILDREN)``. Nothing else about them changes.
    """
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(36, 1, 0, 0, 0) == 0  # PR_SET_CHILD_SUBREAPER
    except (OSError, AttributeError):
        return False


def reap_orphans(keep: set[int]) -> int:
    """Reap exited children that are not ours to wait for (``keep``: live Popen objects)."""
    reaped = 0
    while True:
        try:
            info = os.waitid(os.P_ALL, 0, os.WEXITED | os.WNOHANG | os.WNOWAIT)
        except ChildProcessError:
            return reaped
        if info is None or info.si_pid in keep:
            return reaped
        try:
            os.waitpid(info.si_pid, 0)
            reaped += 1
        except ChildProcessError:
            return reaped


def _proc_table() -> dict[int, int]:
    """pid -> parent pid of every process."""
    table = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                stat = fh.read()
        except OSError:
            continue
        # the command name is in parentheses and may hold spaces
        rest = stat[stat.rfind(")") + 2 :].split()
        table[int(entry)] = int(rest[1])
    return table


def _descendants(root: int) -> list[int]:
    table = _proc_table()
    children = defaultdict(list)
    for pid, ppid in table.items():
        children[ppid].append(pid)
    out, todo = [], [root]
    while todo:
        pid = todo.pop()
        if pid in table:
            out.append(pid)
        todo.extend(children.get(pid, ()))
    return out


def _proc_memory(pid: int) -> tuple[str, int, int] | None:
    """(name, VmHWM, VmRSS) in bytes, or None when the process is gone."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            text = fh.read()
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            cmd = fh.read().replace(b"\0", b" ").decode(errors="replace").strip()
    except OSError:
        return None
    fields = {}
    for line in text.splitlines():
        key, _, value = line.partition(":")
        if key in ("VmHWM", "VmRSS"):
            fields[key] = int(value.split()[0]) * 1024
    if "VmHWM" not in fields:
        return None  # a zombie or a kernel thread
    return cmd[:160], fields["VmHWM"], fields.get("VmRSS", 0)


class MemoryWatch:
    """Peak memory of a process tree, from /proc."""

    def __init__(self) -> None:
        self.peak: dict[tuple[int, str], int] = {}
        self.max_sum_rss = 0

    def sample(self, root: int) -> None:
        total = 0
        for pid in _descendants(root):
            mem = _proc_memory(pid)
            if mem is None:
                continue
            name, hwm, rss = mem
            key = (pid, name)
            self.peak[key] = max(self.peak.get(key, 0), hwm)
            total += rss
        self.max_sum_rss = max(self.max_sum_rss, total)

    def summary(self) -> dict:
        rows = sorted(self.peak.items(), key=lambda kv: -kv[1])
        roles: dict[str, dict] = {}
        step_jobs: dict[int, int] = {}
        for (_pid, name), b in rows:
            role = _role(name)
            r = roles.setdefault(role, {"processes": 0, "max_hwm_bytes": 0, "example": name})
            r["processes"] += 1
            if b > r["max_hwm_bytes"]:
                r["max_hwm_bytes"], r["example"] = b, name
            m = re.search(r"step=(\d+)", name)
            if role == "snakemake job: step" and m:  # a wrapper shell counts with its job
                k = int(m.group(1))
                step_jobs[k] = max(step_jobs.get(k, 0), b)
        return {
            "max_single_hwm_bytes": rows[0][1] if rows else None,
            "max_simultaneous_rss_bytes": self.max_sum_rss,
            "by_role": roles,
            # a job process per step (when the workflow starts one): its peak against the step
            "step_jobs_first_last": (
                [(k, step_jobs[k]) for k in (min(step_jobs), max(step_jobs))] if step_jobs else None
            ),
            "step_job_peak_by_step": {str(k): v for k, v in sorted(step_jobs.items())},
            "processes": [
                {"pid": pid, "cmd": name, "hwm_bytes": b} for (pid, name), b in rows[:12]
            ],
        }


def _role(cmd: str) -> str:
    """What a process of the tree is, from its command line."""
    if "snakemake" in cmd:
        if "--target-jobs step:" in cmd or "--target-jobs 'step:" in cmd:
            return "snakemake job: step"
        if "--target-jobs" in cmd:
            return "snakemake job: other rule"
        if "--unlock" in cmd:
            return "snakemake --unlock"
        return "snakemake main"
    if "ionwell" in cmd and " run " in f" {cmd} ":
        return "ionwell run"
    return "other"


# ---------------------------------------------------------------------------------------------
# the campaign run with kills


def run_campaign(args, env, config: Path, root: Path, cdir: Path) -> dict:
    """Run ``ionwell run`` until the campaign finishes, killing it at each ``--kill-at``."""
    events = EventReader(cdir / "events.jsonl")
    ledger = LedgerCounter(cdir / "ledger.jsonl")
    mem = MemoryWatch()
    seen_ledger: dict[int, float] = {}  # ledger line count -> time first seen
    kills = sorted(set(args.kill_at))
    segments: list[dict] = []
    resumes: list[dict] = []
    argv = [*ionwell_argv(), "run", str(config), "--root", str(root)]
    logs = root / "logs"
    logs.mkdir(exist_ok=True)
    restart_failures = 0
    t_first = time.time()
    while True:
        seg = len(segments)
        log_path = logs / f"run-{seg:02d}.log"
        t_start = time.time()
        cpu_start = children_cpu()
        with open(log_path, "wb") as log:
            proc = subprocess.Popen(
                argv,
                env=env,
                stdout=log,
                stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL,
                start_new_session=True,  # as a shell starts a job: its own process group
            )
        target = kills[0] if kills else None
        killed = None
        last_rss = 0.0
        last_progress = time.time()
        n_seen = n_events_seen = -1
        while True:
            now = time.time()
            events.poll()
            n = ledger.poll()
            if n not in seen_ledger:
                seen_ledger[n] = now
            if n != n_seen or len(events.events) != n_events_seen:
                last_progress = now
                n_seen, n_events_seen = n, len(events.events)
            if now - last_rss >= args.rss_poll:
                mem.sample(proc.pid)
                last_rss = now
            if target is not None:
                if args.kill_when == "recorded":
                    hit = n > target  # step K recorded: the kill falls between steps
                else:
                    hit = target in events.started if events.events else n >= target
                if hit or n > target:
                    proc.send_signal(signal.SIGKILL)
                    killed = {"time": time.time(), "target": target, "ledger_at_kill": n}
                    kills.pop(0)
                    break
            reap_orphans({proc.pid})
            if proc.poll() is not None:
                break
            if now - last_progress > args.stall:
                proc.send_signal(signal.SIGKILL)
                killed = {"time": time.time(), "target": None, "stall": True}
                break
            time.sleep(args.poll)
        rc = proc.wait()
        reap_orphans(set())
        t_end = time.time()
        events.poll()
        n = ledger.poll()
        seen_ledger.setdefault(n, t_end)
        segments.append(
            {
                "segment": seg,
                "pid": proc.pid,
                "start": t_start,
                "end": t_end,
                "seconds": t_end - t_start,
                "cpu_seconds": children_cpu() - cpu_start,
                "exit": rc,
                "killed": killed,
                "ledger_at_end": n,
                "log": str(log_path),
            }
        )
        if seg > 0 and segments[-2]["killed"] and segments[-2]["killed"].get("target") is not None:
            resumes[-1]["segment_exit"] = rc
        if killed and killed.get("stall"):
            print(f"no progress for {args.stall} s: stopped (see {log_path})", file=sys.stderr)
            break
        if killed:
            # the step to be redone is the first unrecorded one
            resumes.append(
                {
                    "kill_at": killed["target"],
                    "killed_time": killed["time"],
                    "recorded_at_kill": n,
                    "next_step": n,
                    "restart_time": None,
                }
            )
            time.sleep(args.restart_delay)
            resumes[-1]["restart_time"] = time.time()
            continue
        if rc != 0 and n == segments[-1]["ledger_at_end"] and resumes and restart_failures < 3:
            # a restart refused right after a kill (e.g. a lock not yet provably free): again
            tail = log_path.read_text(errors="replace")[-600:]
            print(
                f"ionwell run exited {rc}; retrying in 2 s. Last output:\n{tail}", file=sys.stderr
            )
            restart_failures += 1
            time.sleep(2.0)
            continue
        break
    return {
        "events": events,
        "seen_ledger": seen_ledger,
        "segments": segments,
        "resumes": resumes,
        "memory": mem,
        "restart_failures": restart_failures,
        "total_seconds": time.time() - t_first,
    }


# ---------------------------------------------------------------------------------------------
# reading the finished campaign


def engine_time(sdir: Path) -> float | None:
    """The engine's own wall time of a step (``result.json``; else the engine's output)."""
    for rel in ("result.json", "engine/output.json", "engine/timings.json"):
        f = sdir / rel
        if f.is_file():
            try:
                v = json.loads(f.read_text()).get("wall_time")
            except (OSError, ValueError, AttributeError):
                continue
            if isinstance(v, (int, float)):
                return float(v)
    return None


def step_times(cdir: Path, watch: dict) -> tuple[list[dict], str]:
    """Per recorded step: when it was started/recorded, its cycle and engine time."""
    events: EventReader = watch["events"]
    n = ledger_count(cdir / "ledger.jsonl")
    source = "events.jsonl"
    recorded = dict(events.recorded)
    if len(recorded) < n:
        seen = watch["seen_ledger"]  # ledger count c first seen: step c-1 recorded by then
        fallback = {c - 1: t for c, t in seen.items() if c > 0}
        if len(fallback) >= n - 1:
            source = "ledger polling"
            recorded = fallback
        else:
            source = "status.json mtime"
            recorded = {}
            for k in range(n):
                f = cdir / "steps" / f"{k:04d}" / "status.json"
                if f.is_file():
                    recorded[k] = f.stat().st_mtime
    kill_times = [s["killed"]["time"] for s in watch["segments"] if s["killed"]]
    rows = []
    for k in range(n):
        t = recorded.get(k)
        prev = recorded.get(k - 1)
        started = events.started.get(k, [])
        row = {
            "step": k,
            "recorded": t,
            "started": started[-1] if started else None,
            "starts": len(started),
            "engine": engine_time(cdir / "steps" / f"{k:04d}"),
            "cycle": None,
            "between": None,
            "in_step": None,
        }
        spans_kill = prev is not None and t is not None and any(prev < x < t for x in kill_times)
        if t is not None and prev is not None and not spans_kill:
            row["cycle"] = t - prev
            if row["started"] is not None and row["started"] >= prev:
                row["between"] = row["started"] - prev
                row["in_step"] = t - row["started"]
        rows.append(row)
    return rows, source


def _median(values):
    values = [v for v in values if v is not None]
    return statistics.median(values) if values else None


def windows(rows: list[dict], spec: list[tuple[int, int]]) -> list[dict]:
    last = rows[-1]["step"] if rows else 0
    wanted = list(spec)
    tail = (max(1, last - 10), last)
    if tail not in wanted:
        wanted.append(tail)
    out = []
    for lo, hi in wanted:
        sel = [r for r in rows if lo <= r["step"] <= hi and r["cycle"] is not None]
        if not sel:
            continue
        overhead = [r["cycle"] - r["engine"] for r in sel if r["engine"] is not None]
        out.append(
            {
                "steps": [lo, hi],
                "n": len(sel),
                "cycle_median": _median([r["cycle"] for r in sel]),
                "engine_median": _median([r["engine"] for r in sel]),
                "overhead_median": _median(overhead),
                "between_median": _median([r["between"] for r in sel]),
                "in_step_median": _median([r["in_step"] for r in sel]),
                "cycle_min": min(r["cycle"] for r in sel),
                "cycle_max": max(r["cycle"] for r in sel),
            }
        )
    return out


def resume_figures(watch: dict, rows: list[dict]) -> list[dict]:
    """Per kill: how long the restarted controller took to start and record its first step.

    The first step of the new controller is the first whose ``started`` event comes after the
    restart. A step started before the kill and recorded after it was finished by a process
    of the killed controller that outlived it (an orphan); it is listed apart.
    """
    events: EventReader = watch["events"]
    out = []
    for r in watch["resumes"]:
        t_kill, t0 = r["killed_time"], r["restart_time"]
        first = None
        if events.events:
            after = [(min(t for t in ts if t >= t0), k) for k, ts in events.started.items()
                     if any(t >= t0 for t in ts)]  # fmt: skip
            first = min(after)[1] if after else None
            rec = events.recorded.get(first) if first is not None else None
            started = (
                min(t for t in events.started[first] if t >= t0) if first is not None else None
            )
        else:  # no events: the harness's own sighting of the ledger growing
            first = r["recorded_at_kill"]
            rec, started = watch["seen_ledger"].get(first + 1), None
        # recorded after the kill by a process that had started the step before it
        orphans = []
        for k, t in sorted(events.recorded.items()):
            rec_pid = next((pid for tt, pid in events.pids[("recorded", k)] if tt == t), None)
            early = {pid for tt, pid in events.pids[("started", k)] if tt < t_kill}
            if t > t_kill and rec_pid is not None and rec_pid in early:
                orphans.append(
                    {"step": k, "recorded_after_kill": t - t_kill, "recorded_after_restart": t - t0}
                )
        eng = rows[first]["engine"] if first is not None and first < len(rows) else None
        to_rec = rec - t0 if rec is not None else None
        out.append(
            {
                "kill_at": r["kill_at"],
                "recorded_at_kill": r["recorded_at_kill"],
                "first_step_of_restart": first,
                "step_starts": len(events.started.get(first, [])) if first is not None else None,
                "restart_to_started": started - t0 if started is not None else None,
                "restart_to_recorded": to_rec,
                "engine": eng,
                "resume": to_rec - eng if to_rec is not None and eng is not None else to_rec,
                "finished_by_killed_controller": orphans,
            }
        )
    return out


def integrity(cdir: Path, rows: list[dict], watch: dict) -> dict:
    steps = []
    with open(cdir / "ledger.jsonl") as fh:
        for line in fh:
            try:
                steps.append(json.loads(line).get("step"))
            except ValueError:
                steps.append(None)
    events: EventReader = watch["events"]
    kinds: dict[str, int] = defaultdict(int)
    for ev in events.events:
        kinds[str(ev.get("event"))] += 1
    return {
        "ledger_records": len(steps),
        "ledger_in_order": steps == list(range(len(steps))),
        "steps_started_more_than_once": {
            str(k): len(v) for k, v in sorted(events.started.items()) if len(v) > 1
        },
        "summary_json": (cdir / "summary.json").is_file(),
        "report_html": (cdir / "analysis" / "report.html").is_file(),
        "restart_failures": watch["restart_failures"],
        "events_by_kind": dict(sorted(kinds.items())),
        "distinct_pids_in_events": len({ev.get("pid") for ev in events.events}),
    }


def _kind(rel: Path) -> str:
    """A file's kind: its path inside the step with the step number dropped."""
    parts = rel.parts[1:] if rel.parts and re.fullmatch(r"\d+", rel.parts[0]) else rel.parts
    return "/".join(re.sub(r"\d{3,}", "N", p) for p in parts)


def _digest(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def disk_usage(cdir: Path, n_steps: int) -> dict:
    """Bytes of ``steps/`` per step, by file kind, and the copies inside a step folder."""
    kinds: dict[str, list[int]] = defaultdict(lambda: [0, 0, 0])  # files, bytes, allocated
    alloc = apparent = 0
    inodes: set[tuple[int, int]] = set()
    copies: dict[str, list[int]] = defaultdict(lambda: [0, 0])  # "a == b": count, bytes
    steps = cdir / "steps"
    for dirpath, _dirs, files in os.walk(steps):
        for name in files:
            p = Path(dirpath) / name
            try:
                st = p.lstat()
            except OSError:
                continue
            k = kinds[_kind(p.relative_to(steps))]
            k[0] += 1
            k[1] += st.st_size
            apparent += st.st_size
            if (st.st_dev, st.st_ino) not in inodes:  # a hard link is stored once
                inodes.add((st.st_dev, st.st_ino))
                k[2] += st.st_blocks * 512
                alloc += st.st_blocks * 512
    # files of one step folder with the same content (and not hard links of each other)
    for sdir in sorted(steps.iterdir()) if steps.is_dir() else ():
        by_size: dict[int, list[Path]] = defaultdict(list)
        for p in sdir.rglob("*"):
            if p.is_file() and not p.is_symlink() and p.stat().st_size > 4096:
                by_size[p.stat().st_size].append(p)
        for size, group in by_size.items():
            if len(group) < 2:
                continue
            seen: dict[tuple[str, int], Path] = {}
            for f in sorted(group):
                st = f.stat()
                key = (_digest(f), st.st_ino)
                same = [q for (d, ino), q in seen.items() if d == key[0] and ino != st.st_ino]
                if same:
                    label = f"{_kind(same[0].relative_to(steps))} == {_kind(f.relative_to(steps))}"
                    copies[label][0] += 1
                    copies[label][1] += size
                seen[key] = f
    top = {}
    for p in sorted(cdir.iterdir()):
        if p.is_file():
            top[p.name] = p.stat().st_size
        elif p.is_dir() and p.name != "steps":
            top[p.name + "/"] = sum(f.stat().st_size for f in p.rglob("*") if f.is_file())
    ranked = sorted(kinds.items(), key=lambda kv: -kv[1][1])
    return {
        "steps_allocated_bytes": alloc,
        "steps_apparent_bytes": apparent,
        "per_step_allocated": alloc / max(n_steps, 1),
        "per_step_apparent": apparent / max(n_steps, 1),
        "kinds": [
            {"kind": k, "files": v[0], "bytes": v[1], "allocated": v[2], "share": v[1] / apparent}
            for k, v in ranked
        ]
        if apparent
        else [],
        "identical_copies": {k: {"files": v[0], "bytes": v[1]} for k, v in copies.items()},
        "top_level": top,
    }


def time_command(argv, env, repeats: int, budget: float, cwd: Path) -> dict:
    runs, cpu, codes, last_out = [], [], [], ""
    for _ in range(repeats):
        c0 = children_cpu()
        t0 = time.perf_counter()
        p = subprocess.run(argv, env=env, capture_output=True, text=True, cwd=cwd)
        runs.append(time.perf_counter() - t0)
        cpu.append(children_cpu() - c0)
        codes.append(p.returncode)
        last_out = (p.stdout + p.stderr)[-400:]
        if runs[-1] > budget:
            break
    return {
        "argv": argv,
        "seconds": runs,
        "median": statistics.median(runs),
        "cpu_seconds": cpu,
        "cpu_median": statistics.median(cpu),
        "exit": codes,
        "output_tail": last_out,
    }


# ---------------------------------------------------------------------------------------------
# report


def _s(x, unit="s", digits=2):
    return "-" if x is None else f"{x:.{digits}f} {unit}"


def _mib(x):
    return "-" if x is None else f"{x / 2**20:.0f} MiB"


def print_report(res: dict) -> None:
    m = res["meta"]
    print(f"\nionwell {m['ionwell']['file']}  ({m['steps_recorded']} steps recorded)")
    print(f"campaign folder: {m['campaign']}; cycle times from {m['time_source']}")
    run = res["run"]
    print(
        f"host {m['host_atoms']} atoms; whole run {run['total_seconds']:.0f} s wall, "
        f"{run['cpu_seconds']:.0f} s CPU (all processes reaped; {run['cpu_per_step']:.2f} s per "
        f"step); load average at the end {m['load_end']}"
    )
    print("\ncycle time per step (median over the window)")
    hdr = f"{'steps':>10} {'n':>4} {'cycle':>9} {'engine':>9} {'overhead':>9} {'between':>9}"
    print(hdr + f" {'in step':>9} {'min':>8} {'max':>8}")
    for w in res["cycle"]["windows"]:
        lo, hi = w["steps"]
        print(
            f"{lo:>4}-{hi:<5} {w['n']:>4} {_s(w['cycle_median']):>9} "
            f"{_s(w['engine_median'], digits=3):>9} {_s(w['overhead_median']):>9} "
            f"{_s(w['between_median']):>9} {_s(w['in_step_median']):>9} "
            f"{_s(w['cycle_min']):>8} {_s(w['cycle_max']):>8}"
        )
    r0 = res["run"]
    print(f"\nfirst start to step 0 recorded: {_s(r0['startup_to_step0'])}")
    print(f"last step recorded to 'ionwell run' exit (summary, analysis, report): "
          f"{_s(r0['tail_after_last_record'])}")  # fmt: skip
    if res["resume"]:
        print("\nresume after SIGKILL of 'ionwell run'")
        print(f"{'kill at':>8} {'step':>5} {'->started':>10} {'->recorded':>11} {'engine':>8} "
              f"{'resume':>8} {'starts':>6}  orphans")  # fmt: skip
        for r in res["resume"]:
            orphans = ", ".join(
                f"step {o['step']} recorded {o['recorded_after_kill']:.2f} s after the kill"
                for o in r["finished_by_killed_controller"]
            )
            print(
                f"{str(r['kill_at']):>8} {str(r['first_step_of_restart']):>5} "
                f"{_s(r['restart_to_started']):>10} {_s(r['restart_to_recorded']):>11} "
                f"{_s(r['engine'], digits=3):>8} {_s(r['resume']):>8} "
                f"{str(r['step_starts']):>6}  {orphans or '-'}"
            )
    print("\non the finished campaign (whole process, median of runs)")
    for name, c in res["commands"].items():
        runs = ", ".join(f"{x:.2f}" for x in c["seconds"])
        print(
            f"  {name:<22} {c['median']:8.2f} s  (CPU {c['cpu_median']:.2f} s)   runs: {runs}   "
            f"exit {c['exit']}"
        )
    d = res["disk"]
    print(f"\ndisk: steps/ {d['steps_apparent_bytes'] / 2**20:.1f} MiB apparent, "
          f"{d['steps_allocated_bytes'] / 2**20:.1f} MiB allocated; per step "
          f"{d['per_step_apparent'] / 1024:.0f} KiB apparent, "
          f"{d['per_step_allocated'] / 1024:.0f} KiB allocated")  # fmt: skip
    for k in d["kinds"][:8]:
        print(f"  {k['kind']:<32} {k['files']:>6} files {k['bytes'] / 2**20:9.2f} MiB "
              f"{100 * k['share']:5.1f} %")  # fmt: skip
    for label, c in d["identical_copies"].items():
        print(f"  identical copies: {label}: {c['files']} files, {c['bytes'] / 2**20:.2f} MiB")
    top = ", ".join(f"{k} {v / 2**20:.2f} MiB" for k, v in d["top_level"].items())
    print(f"  top level: {top}")
    mem = res["memory"]
    print(f"\nmemory: largest process peak (VmHWM) {_mib(mem['max_single_hwm_bytes'])}, "
          f"largest simultaneous RSS sum {_mib(mem['max_simultaneous_rss_bytes'])}, "
          f"getrusage children max {_mib(mem['rusage_children_maxrss_bytes'])}")  # fmt: skip
    for role, r in sorted(mem["by_role"].items(), key=lambda kv: -kv[1]["max_hwm_bytes"]):
        print(f"  {role:<26} {r['processes']:>5} processes, largest {_mib(r['max_hwm_bytes'])}")
    if mem["step_jobs_first_last"]:
        (s0, b0), (s1, b1) = mem["step_jobs_first_last"]
        print(f"  step job peak: step {s0} {_mib(b0)}, step {s1} {_mib(b1)}")
    print(f"\nintegrity: {json.dumps(res['integrity'])}")


# ---------------------------------------------------------------------------------------------


def parse_windows(text: str) -> list[tuple[int, int]]:
    out = []
    for part in text.split(","):
        lo, _, hi = part.partition("-")
        out.append((int(lo), int(hi)))
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--steps", type=int, default=500, help="guests to insert (= stop.max_steps)")
    p.add_argument("--kill-at", type=int, nargs="*", default=[], help="SIGKILL when step K runs")
    p.add_argument(
        "--kill-when",
        choices=["started", "recorded"],
        default="started",
        help="kill when step K has started (mid-step, default) or once it is recorded",
    )
    p.add_argument("--out", default=None, help="JSON file to write (default: ROOT/long.json)")
    p.add_argument("--root", default=None, help="folder for the campaign (default: a new tmp dir)")
    p.add_argument("--src", default=None, help="ionwell source folder put first on PYTHONPATH")
    p.add_argument("--name", default="bench-long", help="campaign name")
    p.add_argument("--shells", type=int, default=4, help="flake shells (4: 480 host atoms)")
    p.add_argument("--layers", type=int, default=4, help="flake layers")
    p.add_argument(
        "--windows",
        type=parse_windows,
        default=parse_windows("5-15,95-105,490-500"),
        help="step windows for the medians, e.g. 5-15,95-105,490-500",
    )
    p.add_argument(
        "--engine-delay", type=float, default=0.0, help="s of sleep per engine run (slow engine)"
    )
    p.add_argument("--repeats", type=int, default=3, help="runs of each command on the result")
    p.add_argument("--repeat-budget", type=float, default=60.0, help="no repeat after a run > s")
    p.add_argument("--poll", type=float, default=0.05, help="event/ledger poll interval, s")
    p.add_argument("--rss-poll", type=float, default=0.5, help="/proc memory poll interval, s")
    p.add_argument("--restart-delay", type=float, default=0.0, help="pause before a restart, s")
    p.add_argument("--stall", type=float, default=900.0, help="give up after s without progress")
    p.add_argument("--skip-commands", action="store_true", help="time only the campaign run")
    args = p.parse_args(argv)

    root = Path(args.root or tempfile.mkdtemp(prefix="ionwell-bench-")).resolve()
    root.mkdir(parents=True, exist_ok=True)
    cdir = root / "campaigns" / args.name
    if cdir.exists():
        p.error(f"{cdir} exists: give a fresh --root")
    env = bench_env(args.src)
    where = which_ionwell(env)
    print(f"ionwell from {where['file']} (Snakefile {where['snakefile']}); campaign in {cdir}")

    import yaml

    config = root / f"{args.name}.yaml"
    config.write_text(yaml.safe_dump(campaign_config(args), sort_keys=False))

    load_start = os.getloadavg()
    subreaper = become_subreaper()
    watch = run_campaign(args, env, config, root, cdir)
    rows, source = step_times(cdir, watch)
    segs = watch["segments"]
    first_rec = rows[0]["recorded"] if rows else None
    last_rec = rows[-1]["recorded"] if rows else None
    res: dict = {
        "meta": {
            "argv": sys.argv,
            "date": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "machine": f"{socket.gethostname()} {platform.machine()}, {os.cpu_count()} cores",
            "nice": os.nice(0),
            "python": sys.executable,
            "ionwell": where,
            "pythonpath": env["PYTHONPATH"],
            "config": campaign_config(args),
            "campaign": str(cdir),
            "steps_requested": args.steps,
            "kill_at": args.kill_at,
            "steps_recorded": len(rows),
            "time_source": source,
            "host_atoms": _host_atoms(cdir),
            "load_start": load_start,
            "subreaper": subreaper,
            "load_end": None,
        },
        "run": {
            "total_seconds": watch["total_seconds"],
            "cpu_seconds": sum(x["cpu_seconds"] for x in segs),
            "cpu_per_step": sum(x["cpu_seconds"] for x in segs) / max(len(rows), 1),
            "segments": segs,
            "startup_to_step0": first_rec - segs[0]["start"] if first_rec and segs else None,
            "tail_after_last_record": segs[-1]["end"] - last_rec if last_rec and segs else None,
        },
        "cycle": {"windows": windows(rows, args.windows), "per_step": rows},
        "resume": resume_figures(watch, rows),
    }

    commands: dict = {}
    if not args.skip_commands and segs and segs[-1]["exit"] == 0:
        run_argv = [*ionwell_argv(), "run", str(config), "--root", str(root)]
        commands["run (nothing to do)"] = time_command(
            run_argv, env, args.repeats, args.repeat_budget, root
        )
        for name in COMMANDS:
            commands[name] = time_command(
                [*ionwell_argv(), name, str(cdir)], env, args.repeats, args.repeat_budget, root
            )
    res["commands"] = commands
    res["disk"] = disk_usage(cdir, len(rows))
    mem = watch["memory"].summary()
    # ru_maxrss is in KiB on Linux: the largest single descendant this harness waited for
    mem["rusage_children_maxrss_bytes"] = (
        resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    )
    res["memory"] = mem
    res["integrity"] = integrity(cdir, rows, watch)
    res["meta"]["load_end"] = tuple(round(x, 2) for x in os.getloadavg())

    out = Path(args.out) if args.out else root / "long.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(res, indent=1, default=str) + "\n")
    print_report(res)
    print(f"\nJSON: {out}")
    return 0


def _host_atoms(cdir: Path) -> int | None:
    f = cdir / "host.extxyz"
    if not f.is_file():
        return None
    with open(f) as fh:
        first = fh.readline().strip()
    return int(first) if first.isdigit() else None


if __name__ == "__main__":
    sys.exit(main())
