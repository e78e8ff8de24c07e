"""Hundreds-of-steps machinery on a near-free engine: a 60-step campaign killed at random moments
and resumed gives the same ledger as an uninterrupted run; integrity on resume; parsing the
workflow writes nothing.

The engine is a FAKE for the chemistry: ``bench/analytic_calculator.py`` (screened point charges
through the ``ase`` engine kind, milliseconds per step), so that only ionwell's orchestration —
the Snakemake rule chain, the ledger, the locks — is exercised. Everything else is real:
Snakemake, the CLI, SIGKILL.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from ase import Atoms
from shared import IONWELL, ionwell, run_campaign

from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import read_ledger

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[2]
STEPS = 60

CONFIG = {
    "name": "long",
    "seed": 5,
    "host": {"builder": {"kind": "flake", "layers": 2, "shells": 1, "stacking": "AB"}},
    "guest": {"element": "Li", "charge_mode": "neutral"},
    "engine": {
        "kind": "ase",
        "calculator": "analytic_calculator.AnalyticCalculator",
        "parameters": {"points": 8000, "margin": 4.0},
    },
    "placement": {"rule": "deepest", "within": 4.0, "exclusion": {"Li": 1.2}},
    "checks": {"guest_alert": None, "rim_alert": None},
    "relax": {"enabled": False},
    "stop": {"guests": STEPS, "max_steps": STEPS},
}


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(REPO / "bench"), *[p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]]
    )
    return env


def _config(folder: Path, **changes) -> Path:
    data = json.loads(json.dumps(CONFIG))
    data.update(changes)
    folder.mkdir(parents=True, exist_ok=True)
    f = folder / "long.yaml"
    f.write_text(yaml.safe_dump(data))
    return f


def _run(config: Path, root: Path, *extra: str, check: bool = False, timeout: float = 600):
    return run_campaign(config, root, *extra, timeout=timeout, check=check, env=_env())


def _fingerprint(root: Path) -> list[tuple]:
    """What must not depend on interruptions: per step, the outcome, composition, energy, the
    chosen sites and the digest of the structure handed on."""
    recs = read_ledger(CampaignPaths(root / "campaigns" / "long").ledger)
    return [
        (
            r.step,
            r.outcome,
            r.stop_reason,
            r.guests,
            round(r.energy, 8),
            None if r.decision is None else [tuple(s.position) for s in r.decision.chosen],
            r.files.get("next.extxyz"),
            r.files.get("relaxed.extxyz"),
        )
        for r in recs
    ]


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory):
    root = tmp_path_factory.mktemp("long-plain")
    cfg = _config(root)
    proc = _run(cfg, root, "--window", "25", check=True)
    return root, cfg, proc


def test_sixty_steps_reach_the_stop_rule(uninterrupted):
    root, _, proc = uninterrupted
    fp = _fingerprint(root)
    assert [f[0] for f in fp] == list(range(STEPS + 1))
    assert fp[-1][1] == "stop" and fp[-1][2] == f"target reached: {STEPS} guests"
    # progress lines say step k of at most N; Snakemake's own chatter is held back
    assert f"of ≤{STEPS} recorded" in proc.stderr
    assert "Select jobs to execute" not in proc.stderr
    v = ionwell("verify", str(root / "campaigns" / "long"))
    assert v.returncode == 0, v.stderr


def test_random_sigkills_then_resume_give_the_same_ledger(uninterrupted, tmp_path):
    root0, _, _ = uninterrupted
    cfg = _config(tmp_path)
    rng = random.Random(11)
    kills = 0
    ledger = CampaignPaths(tmp_path / "campaigns" / "long").ledger
    for _ in range(6):
        proc = subprocess.Popen(
            [*IONWELL, "run", str(cfg), "--root", str(tmp_path), "--window", "7"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            env=_env(),
        )
        time.sleep(rng.uniform(1.0, 4.0))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        proc.wait()
        if ledger.exists() and read_ledger(ledger) and read_ledger(ledger)[-1].outcome == "stop":
            break
    assert kills >= 3, "the campaign finished before it could be interrupted"
    _run(cfg, tmp_path, "--window", "7", check=True)
    assert _fingerprint(tmp_path) == _fingerprint(root0)
    # no step ran twice to completion: one "recorded" event per step
    events = (tmp_path / "campaigns" / "long" / "events.jsonl").read_text().splitlines()
    recorded = [json.loads(e)["step"] for e in events if '"recorded"' in e]
    assert sorted(recorded) == list(range(STEPS + 1))


def test_nothing_to_do_on_a_finished_campaign(uninterrupted):
    root, cfg, _ = uninterrupted
    before = CampaignPaths(root / "campaigns" / "long").ledger.read_bytes()
    proc = _run(cfg, root, check=True)
    assert "state: finished" in proc.stdout
    assert CampaignPaths(root / "campaigns" / "long").ledger.read_bytes() == before


def _short(tmp_path: Path, steps: int = 3) -> tuple[Path, CampaignPaths]:
    """A campaign stopped by max_steps after ``steps`` steps (ledger as left by the run)."""
    cfg = _config(tmp_path, stop={"guests": 50, "max_steps": steps})
    _run(cfg, tmp_path, check=True)
    return cfg, CampaignPaths(tmp_path / "campaigns" / "long")


def _cut_back(paths: CampaignPaths, keep: int) -> None:
    """Drop the ledger's records after ``keep`` (as if the run had been killed there)."""
    lines = paths.ledger.read_bytes().splitlines(keepends=True)
    paths.ledger.write_bytes(b"".join(lines[:keep]))
    paths.summary.unlink(missing_ok=True)


def test_hand_edited_hand_on_structure_is_refused_on_resume(tmp_path):
    cfg, paths = _short(tmp_path)
    _cut_back(paths, 2)  # steps 0 and 1 recorded; step 2 will start from steps/0001/next.extxyz
    f = paths.step(1) / "next.extxyz"
    f.write_text(f.read_text().replace("Li", "Na", 1))
    proc = _run(cfg, tmp_path)
    assert proc.returncode == 1
    assert "steps/0001/next.extxyz was changed after step 1 was recorded" in proc.stderr
    assert len(read_ledger(paths.ledger)) == 2  # nothing recorded from it


def test_broken_chain_is_refused_by_run_and_status_naming_the_record(tmp_path):
    cfg, paths = _short(tmp_path)
    lines = paths.ledger.read_text().splitlines(keepends=True)
    rec = json.loads(lines[1])
    rec["energy"] += 1.0
    lines[1] = json.dumps(rec) + "\n"
    paths.ledger.write_text("".join(lines))
    for argv in (["run", str(cfg), "--root", str(tmp_path)], ["status", str(paths.root)]):
        proc = ionwell(*argv, env=_env())
        assert proc.returncode == 2, proc.stderr
        assert "step 1 (line 2): record was edited" in proc.stderr
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 1 and "step 1" in v.stderr


@pytest.mark.parametrize("name", ["campaign.yaml", "host.extxyz"])
def test_hand_edited_frozen_config_or_host_is_refused_and_named(tmp_path, name):
    cfg, paths = _short(tmp_path)
    f = paths.root / name
    f.write_text(f.read_text() + "\n")  # same meaning, other bytes: still refused
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 1 and name in v.stderr
    if name == "host.extxyz":
        _cut_back(paths, 2)
        proc = _run(cfg, tmp_path)
        assert proc.returncode == 2, proc.stderr
        assert f"{name}: content differs from its recorded sha256" in proc.stderr


def test_corrupted_database_mirror_is_rebuilt_and_the_campaign_finishes(tmp_path):
    cfg, paths = _short(tmp_path, steps=4)
    _cut_back(paths, 2)
    paths.database.write_bytes(b"this is not a database" * 100)
    _run(cfg, tmp_path, check=True)
    from ase.db import connect

    assert sorted(r.step for r in connect(paths.database).select()) == [0, 1, 2, 3, 4]


def test_empty_controller_lock_left_by_a_kill_is_recovered(tmp_path):
    cfg, paths = _short(tmp_path)
    _cut_back(paths, 2)
    paths.lock.write_text("")
    old = time.time() - 60
    os.utime(paths.lock, (old, old))
    _run(cfg, tmp_path, check=True)
    assert len(read_ledger(paths.ledger)) == 4


def test_parsing_the_workflow_writes_nothing(tmp_path):
    """A dry run parses the Snakefile (and builds the DAG): no campaign folder appears for a new
    config, and an existing campaign's files are untouched."""
    cfg = _config(tmp_path)
    dry = [
        sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile"),
        "--configfile", str(cfg), "--directory", str(tmp_path), "--dry-run", "--cores", "1",
    ]  # fmt: skip
    proc = subprocess.run(dry, capture_output=True, text=True, env=_env())
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert not (tmp_path / "campaigns").exists()
    _, paths = _short(tmp_path)
    cfg = _config(tmp_path, stop={"guests": 50, "max_steps": 3})
    before = {p: (p.stat().st_mtime_ns, p.stat().st_size) for p in paths.root.rglob("*")}
    proc = subprocess.run(dry, capture_output=True, text=True, env=_env())
    assert proc.returncode == 0, proc.stderr[-2000:]
    after = {p: (p.stat().st_mtime_ns, p.stat().st_size) for p in paths.root.rglob("*")}
    assert after == before


def test_a_compute_job_ends_itself_when_its_controller_is_gone(tmp_path):
    """The watchdog of a cluster job (ionwell.workflow.watchdog), in a real child process:
    removing the controller's lock ends the job with exit status 3; a live lock does not."""
    lock = tmp_path / "controller.lock"
    lock.write_text(json.dumps({"host": "h", "pid": 1, "start": "1"}))
    code = (
        "import sys, time; from pathlib import Path; from ionwell.workflow import watchdog\n"
        "with watchdog.watch(Path(sys.argv[1]), interval=0.1, stale_after=30):\n"
        "    time.sleep(float(sys.argv[2]))\n"
    )
    alive = subprocess.run([sys.executable, "-c", code, str(lock), "1.0"], timeout=60)
    assert alive.returncode == 0
    job = subprocess.Popen([sys.executable, "-c", code, str(lock), "60"])
    time.sleep(1.0)
    lock.unlink()
    assert job.wait(timeout=30) == 3
    lock.write_text(json.dumps({"host": "h", "pid": 1, "start": "1"}))
    job = subprocess.Popen([sys.executable, "-c", code, str(lock), "60"])
    time.sleep(1.0)
    lock.write_text(json.dumps({"host": "h", "pid": 2, "start": "9"}))  # a new controller
    assert job.wait(timeout=30) == 3


def test_raising_the_stop_rule_extends_a_finished_campaign(tmp_path):
    """A campaign stopped by its target goes on when the target is raised: the amendment is
    recorded, the decision its last step did not make is the one an uninterrupted campaign made,
    and the steps after it are the same."""
    straight = tmp_path / "straight"
    cfg = _config(straight, stop={"guests": 5, "max_steps": 50})
    _run(cfg, straight, check=True)
    ext = tmp_path / "extended"
    cfg = _config(ext, stop={"guests": 3, "max_steps": 50})
    _run(cfg, ext, check=True)
    cfg = _config(ext, stop={"guests": 5, "max_steps": 50})
    # plain Snakemake parses read-only: it refuses and says how to record the change
    dry = [
        sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile"),
        "--configfile", str(cfg), "--directory", str(ext), "--dry-run", "--cores", "1",
    ]  # fmt: skip
    proc = subprocess.run(dry, capture_output=True, text=True, env=_env())
    assert proc.returncode != 0 and "records that amendment" in proc.stderr + proc.stdout
    proc = _run(cfg, ext, check=True)
    assert "stop amended" in proc.stdout and "extending 'long' after step 3" in proc.stdout
    a, b = _fingerprint(straight), _fingerprint(ext)
    assert [f[:5] for f in b] == [f[:5] for f in a[:3]] + [
        (3, "stop", "target reached: 3 guests", 3, a[3][4])
    ] + [f[:5] for f in a[4:]]
    assert [f[5] for f in b[4:]] == [f[5] for f in a[4:]]
    handed = json.loads(
        (ext / "campaigns" / "long" / "steps" / "0004" / "handover.json").read_text()
    )
    assert [tuple(s["position"]) for s in handed["chosen"]] == a[3][5]
    root = str(ext / "campaigns" / "long")
    for cmd in ("verify", "replay"):
        v = ionwell(cmd, root, env=_env())
        assert v.returncode == 0, v.stdout + v.stderr
    amended = (ext / "campaigns" / "long" / "amendments.jsonl").read_text().splitlines()
    assert len(amended) == 1 and json.loads(amended[0])["after_step"] == 3
    # a change of what a step computes is still refused
    bad = _config(ext, stop={"guests": 5, "max_steps": 50}, seed=99)
    proc = _run(bad, ext)
    assert proc.returncode == 2 and "only stop, resources, analysis, description" in proc.stderr


def test_prune_keeps_digests_and_verify_and_replay_say_what_they_checked(tmp_path):
    cfg, paths = _short(tmp_path, steps=5)
    before = sum(f.stat().st_size for f in paths.steps.rglob("*") if f.is_file())
    proc = ionwell("prune", str(paths.root), "--keep", "2")
    assert proc.returncode == 0, proc.stderr
    assert "of 4 steps (0–3)" in proc.stdout
    for n in range(6):
        assert (paths.step(n) / "potential.npz").exists() == (n >= 4)
        assert (paths.step(n) / "decision.json").exists() == (n < 5)  # the wells table stays
    after = sum(f.stat().st_size for f in paths.steps.rglob("*") if f.is_file())
    assert after < before
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 0, v.stderr
    r = ionwell("replay", str(paths.root))
    assert r.returncode == 0, r.stderr
    assert "could not be checked fully (maps pruned): steps 0–3" in r.stdout
    # a pruned map that is then also deleted from the list is named as missing
    (paths.step(1) / "pruned.json").unlink()
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 1 and "steps/0001/potential.npz" in v.stderr


def test_screened_rule_computes_each_candidate_as_its_own_job(tmp_path):
    """rule: screened — assess names the top-k wells, one `screen` job per candidate computes
    it, checkpoint `decide` takes the lowest energy. Each recorded energy equals the calculator's
    own single point on the same structure (ASE, directly)."""
    sys.path.insert(0, str(REPO / "bench"))
    from analytic_calculator import AnalyticCalculator
    from ase.io import read

    cfg = _config(
        tmp_path,
        placement={**CONFIG["placement"], "rule": "screened", "screen": {"top": 3}},
        stop={"guests": 3, "max_steps": 3},
    )
    _run(cfg, tmp_path, "--cores", "2", check=True)
    paths = CampaignPaths(tmp_path / "campaigns" / "long")
    recs = read_ledger(paths.ledger)
    assert [r.guests for r in recs] == [0, 1, 2, 3]
    params = CONFIG["engine"]["parameters"]
    for rec in recs[:-1]:
        flow = paths.step(rec.step) / "flow"
        assert sorted(p.name for p in flow.glob("r0.screen-*.json")) == [
            f"r0.screen-{k}.json" for k in range(3)
        ]
        relaxed = read(paths.step(rec.step) / "relaxed.extxyz")
        energies = rec.decision.energies[:3]
        for site, e in zip(rec.decision.candidates[:3], energies, strict=True):
            trial = relaxed.copy()
            trial.calc = None
            trial += Atoms("Li", positions=[site.position])
            trial.calc = AnalyticCalculator(**params)
            # 1e-6 eV: relaxed.extxyz stores positions in text (about 1e-8 Å)
            assert e == pytest.approx(trial.get_potential_energy(), abs=1e-6)
        best = min(range(3), key=lambda i: energies[i])
        assert rec.decision.chosen[0].position == rec.decision.candidates[best].position
    r = ionwell("replay", str(paths.root), env=_env())
    assert r.returncode == 0, r.stdout + r.stderr


def test_collect_and_assess_rerun_without_recomputing(tmp_path):
    """An unrecorded step whose compute finished (its marker is there) continues with
    `collect` — as after a parser fix — and the engine is not run again."""
    cfg, paths = _short(tmp_path)
    last = read_ledger(paths.ledger)[-1]
    _cut_back(paths, last.step)  # the last step is unrecorded again ...
    flow = paths.step(last.step) / "flow"
    for stage in ("collected", "verdict"):  # ... with its compute done, its parse not
        (flow / f"r0.{stage}.json").unlink()
    engine_out = paths.step(last.step) / "engine" / "output.json"
    mtime = engine_out.stat().st_mtime_ns
    events = paths.events.read_text().count('"started"')
    _run(cfg, tmp_path, check=True)
    assert paths.events.read_text().count('"started"') == events  # no compute started
    assert engine_out.stat().st_mtime_ns == mtime
    again = read_ledger(paths.ledger)[-1]
    assert (again.step, again.energy, again.files["relaxed.extxyz"]) == (
        last.step,
        last.energy,
        last.files["relaxed.extxyz"],
    )


def test_the_workflow_runs_as_a_module_of_another_pipeline(tmp_path):
    """A user's Snakefile imports ionwell's as a `module` and depends on its summary."""
    _config(tmp_path, stop={"guests": 2, "max_steps": 2})
    (tmp_path / "Snakefile").write_text(
        "import ionwell\n\n"
        'configfile: "long.yaml"\n\n'
        "module insertion:\n    snakefile: str(ionwell.snakefile())\n    config: config\n\n"
        "use rule * from insertion as ins_*\n\n"
        "rule mine:\n    default_target: True\n"
        '    input: "campaigns/long/summary.json"\n    output: "done.txt"\n'
        '    shell: "cp {input} {output}"\n'
    )
    proc = subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", "2", "--force-use-threads"],
        cwd=tmp_path, capture_output=True, text=True, env=_env(), timeout=300,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-3000:]
    recs = read_ledger(CampaignPaths(tmp_path / "campaigns" / "long").ledger)
    assert [r.guests for r in recs] == [0, 1, 2]
    assert json.loads((tmp_path / "done.txt").read_text())["guests"] == 2
