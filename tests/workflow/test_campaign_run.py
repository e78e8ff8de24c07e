"""End to end: a small real-DFT campaign through `ionwell run` (Snakemake + PySCF), resumed
after SIGKILL of the controller at random moments, compared with an uninterrupted run."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
import yaml
from ase.db import connect
from ase.io import read
from shared import IONWELL, TINY, ionwell, run_campaign

from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import read_ledger

pytestmark = pytest.mark.slow


# TINY (shared with the report test): Li atoms into one benzene sheet, LDA/STO-3G
def _write_config(folder: Path, **changes) -> Path:
    data = json.loads(json.dumps(TINY))
    data.update(changes)
    f = folder / "tiny.yaml"
    f.write_text(yaml.safe_dump(data))
    return f


def _summary(root: Path) -> dict:
    paths = CampaignPaths(root / "campaigns" / "tiny")
    recs = read_ledger(paths.ledger)
    return {
        "sites": [
            None if r.decision is None else [s.position for s in r.decision.chosen] for r in recs
        ],
        "energies": [r.energy for r in recs],
        "structures": [read(paths.step(r.step) / "relaxed.extxyz").positions for r in recs],
        "outcomes": [r.outcome for r in recs],
        "guests": [r.guests for r in recs],
    }


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """One uninterrupted run; the other tests compare against it."""
    root = tmp_path_factory.mktemp("uninterrupted")
    cfg = _write_config(root)
    t0 = time.monotonic()
    proc = run_campaign(cfg, root)
    elapsed = time.monotonic() - t0
    return root, cfg, elapsed, proc


def test_uninterrupted_campaign_reaches_its_stop_rule(reference):
    root, cfg, _, proc = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    recs = read_ledger(paths.ledger)
    assert [r.guests for r in recs] == [0, 1, 2, 3]
    assert recs[-1].outcome == "stop" and "target reached" in recs[-1].stop_reason
    assert all(r.scf_converged for r in recs)
    # the status table is printed at the end
    assert "state: finished" in proc.stdout
    # every recorded file is on disk and matches
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 0, v.stderr
    # derived outputs
    assert len(read(paths.trajectory, index=":")) == 4
    assert sorted(row.step for row in connect(paths.database).select()) == [0, 1, 2, 3]
    summary = json.loads(paths.summary.read_text())
    assert summary["guests"] == 3
    # each placed guest sits in the admissible region: away from the ring atoms
    final = read(paths.step(3) / "relaxed.extxyz")
    li = final.positions[12:]
    host = final.positions[:12]
    d = np.linalg.norm(li[:, None, :] - host[None, :, :], axis=2)
    assert d.min() > 1.5


def test_analysis_tables_follow_the_ledger(reference):
    """Formation energies recomputed from the ledger and the recorded μ; plots are images."""
    import csv

    from matplotlib.image import imread

    root, _, _, _ = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    recs = read_ledger(paths.ledger)
    ref = json.loads((paths.root / "reference.json").read_text())
    assert ref["mu"] == pytest.approx(ref["atom_energy"] - 1.63)
    rows = list(csv.DictReader((paths.root / "analysis" / "energetics.csv").open()))
    assert [int(r["step"]) for r in rows] == [r.step for r in recs]
    for r, rec in zip(rows, recs, strict=True):
        ef = rec.energy - recs[0].energy - rec.guests * ref["mu"]
        assert float(r["formation_eV"]) == pytest.approx(ef, abs=1e-5)
    on_hull = [int(r["step"]) for r in rows if r["on_hull"] == "1"]
    assert on_hull[0] == 0 and on_hull[-1] == 3
    summary = json.loads((paths.root / "analysis" / "analysis.json").read_text())
    for name in ("hull.png", "voltage.png", "rim.png", "charges.png", "dos.png"):
        assert name in summary["files"]
        img = imread(paths.root / "analysis" / name)
        assert img.shape[0] > 200 and img.shape[1] > 300
    # one benzene sheet: no gallery, so no layer table
    assert "layers.csv" not in summary["files"]


def test_analysis_of_a_campaign_still_running(reference, tmp_path):
    """A campaign whose ledger holds only the first steps is analysed as far as it got."""
    import csv
    import shutil

    root, _, _, _ = reference
    src = root / "campaigns" / "tiny"
    copy = tmp_path / "tiny"
    shutil.copytree(src, copy, ignore=shutil.ignore_patterns("analysis", "summary.json"))
    lines = (copy / "ledger.jsonl").read_text().splitlines(keepends=True)
    (copy / "ledger.jsonl").write_text("".join(lines[:2]))
    proc = ionwell("analyse", str(copy))
    assert proc.returncode == 0, proc.stderr
    rows = list(csv.DictReader((copy / "analysis" / "energetics.csv").open()))
    assert [int(r["step"]) for r in rows] == [0, 1]


def test_charge_and_dos_tables_follow_the_step_results(reference):
    """Per-step charges, frontier levels and DOS against the engine's own recorded numbers."""
    import csv

    from scipy.integrate import trapezoid

    root, _, _, _ = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    out = paths.root / "analysis"
    results = [json.loads((paths.step(s) / "result.json").read_text()) for s in range(4)]
    # charge_scheme auto: the most basis-robust scheme the engine recorded for every step (IAO)
    scheme = json.loads((out / "analysis.json").read_text())["charge_scheme"]
    assert scheme == "iao"
    assert all(set(r["charge_sets"]) == {"mulliken", "lowdin", "meta-lowdin", "iao"}
               for r in results)  # fmt: skip
    q0 = np.array(results[0]["charge_sets"][scheme])
    for row, res in zip(csv.DictReader((out / "charges.csv").open()), results, strict=True):
        q = np.array(res["charge_sets"][scheme])
        n = len(q) - 12
        # the scheme is named in the header of every charge column
        gained = float(row[f"host_electrons_gained_e ({scheme})"])
        assert gained == pytest.approx(-(q[:12] - q0).sum(), abs=1e-4)
        # IAO charges sum to the system charge (PySCF; common practice): in cation mode
        # every guest adds +1, so guest charge minus the host's electron gain is n
        if n:
            mean = float(row[f"mean_guest_charge_e ({scheme})"])
            assert n * mean - gained == pytest.approx(n, abs=1e-3)
    levels = list(csv.DictReader((out / "electronic.csv").open()))
    assert [r["level"] for r in levels] == ["homo"] * 4
    for r, res in zip(levels, results, strict=True):
        assert float(r["shift_eV"]) == pytest.approx(res["homo"] - results[0]["homo"], abs=1e-3)
    # the DOS of each step, sampled over its window, holds at most its number of states (two per
    # orbital, restricted) and nearly all of them when the window spans all levels
    table = np.loadtxt(out / "dos.csv", delimiter=",", skiprows=1)
    for k, res in enumerate(results):
        states = 2 * len(res["orbital_energies"][0])
        total = trapezoid(table[:, k + 1], table[:, 0])
        assert 0 < total <= states * (1 + 1e-3)
    sites = list(csv.DictReader((out / "sites.csv").open()))
    assert [int(r["guests"]) for r in sites] == [0, 1, 2, 3]
    # a single small sheet is all rim: every guest within 3 Å of its edge
    assert [r["rim_guests"] for r in sites] == ["0", "1", "2", "3"]


def test_checks_stay_quiet_on_the_relaxed_steps(reference):
    """Every check runs on each relaxed step; none fires except the relaxation cap that this
    config sets on purpose (2 optimizer steps)."""
    root, _, _, _ = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    recs = read_ledger(paths.ledger)
    decision_codes = {"site-on-region-edge", "site-on-grid-face", "well-repels-cation",
                      "map-too-flat"}  # fmt: skip
    for rec in recs:
        found = json.loads((paths.step(rec.step) / "checks.json").read_text())
        codes = {f["code"] for f in found}
        assert codes - decision_codes <= {"relax-not-converged"}, (rec.step, found)
        # cation mode: once the cluster is charged, the deepest admissible "well" repels the
        # next cation (potential > 0 V) and sits where the envelope ends; the decision's
        # findings say so (the artefact a charged cluster produces; see the README)
        if rec.decision is not None:
            site = rec.decision.chosen[0]
            assert ("well-repels-cation" in codes) == (site.potential >= 0.0), (rec.step, found)
            assert ("site-on-region-edge" in codes) == (site.boundary == "region")
        out = json.loads((paths.step(rec.step) / "result.json").read_text())
        assert ("relax-not-converged" in codes) == (out["relax_converged"] is False)
    # the host alone is clean: the first cation goes over the ring face, a true minimum
    assert recs[0].findings == {}


def test_rerun_of_finished_campaign_recomputes_nothing(reference):
    root, cfg, _, _ = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    before = paths.ledger.read_bytes()
    run_campaign(cfg, root)
    assert paths.ledger.read_bytes() == before
    events = [json.loads(x) for x in paths.events.read_text().splitlines()]
    assert [e["event"] for e in events].count("started") == 4


def test_changed_config_is_refused_with_a_diff(reference):
    root, _, _, _ = reference
    changed = dict(TINY)
    changed["relax"] = {"enabled": True, "fmax": 0.1, "steps": 2}
    cfg = root / "changed.yaml"
    cfg.write_text(yaml.safe_dump(changed))
    proc = run_campaign(cfg, root, check=False)
    assert proc.returncode == 2
    assert "refusing" in proc.stderr and "+  fmax: 0.1" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_second_controller_is_refused(reference, tmp_path):
    root, cfg, _, _ = reference
    paths = CampaignPaths(root / "campaigns" / "tiny")
    # a live controller: this test process itself, recorded the way ionwell records one
    from ionwell.store.campaign import ControllerLock

    lock = ControllerLock(paths.lock)
    lock.acquire()
    try:
        proc = run_campaign(cfg, root, check=False)
    finally:
        lock.release()
    assert proc.returncode == 2
    assert "another controller is running" in proc.stderr


def test_sigkill_at_random_moments_then_resume_matches(reference, tmp_path):
    ref_root, _, elapsed, _ = reference
    root = tmp_path
    cfg = _write_config(root)
    rng = random.Random(20261201)
    paths = CampaignPaths(root / "campaigns" / "tiny")
    kills = 0
    while kills < 3:
        proc = subprocess.Popen(
            [*IONWELL, "run", str(cfg), "--root", str(root)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
        )
        time.sleep(rng.uniform(1.0, max(2.0, elapsed / 3)))
        if proc.poll() is not None:
            break  # finished before the kill: nothing left to interrupt
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        kills += 1
    assert kills >= 1
    run_campaign(cfg, root)

    ref, got = _summary(ref_root), _summary(root)
    assert got["guests"] == ref["guests"] and got["outcomes"] == ref["outcomes"]
    for a, b in zip(ref["sites"], got["sites"], strict=True):
        assert (a is None) == (b is None)
        if a is not None:
            np.testing.assert_allclose(a, b, atol=1e-3)
    for a, b in zip(ref["structures"], got["structures"], strict=True):
        np.testing.assert_allclose(a, b, atol=1e-3)
    np.testing.assert_allclose(got["energies"], ref["energies"], atol=1e-4)

    # no step was computed again after it was recorded, and none was skipped
    events = [json.loads(x) for x in paths.events.read_text().splitlines()]
    recorded_at: dict[int, int] = {}
    for i, e in enumerate(events):
        if e["event"] == "recorded":
            assert e["step"] not in recorded_at, f"step {e['step']} recorded twice"
            recorded_at[e["step"]] = i
        if e["event"] == "started" and e["step"] in recorded_at:
            pytest.fail(f"step {e['step']} started again after it was recorded")
    assert sorted(recorded_at) == [0, 1, 2, 3]
    v = ionwell("verify", str(paths.root))
    assert v.returncode == 0, v.stderr


def test_replay_rederives_every_decision_and_names_an_edited_map(reference, tmp_path):
    import shutil

    from ionwell.audit.replay import replay
    from ionwell.io.npz import load_npz, save_npz
    from ionwell.science import grid

    root, _, _, _ = reference
    src = root / "campaigns" / "tiny"
    rep = ionwell("replay", str(src))
    assert rep.returncode == 0, rep.stdout + rep.stderr
    assert all(s.status in ("same", "no decision") for s in replay(src))

    copy = tmp_path / "tiny"
    shutil.copytree(src, copy)
    # dig a deep, narrow well into step 1's stored map at an admissible point far from the
    # recorded choice: the re-derived decision must move there, and replay must say so
    paths = CampaignPaths(copy)
    rec = read_ledger(paths.ledger)[1]
    pot = load_npz(paths.step(1) / "potential.npz")
    chosen = np.array(rec.decision.chosen[0].position)
    other = max(
        rec.decision.candidates[1:], key=lambda s: np.linalg.norm(np.array(s.position) - chosen)
    )
    pts = pot.points().reshape(*pot.shape, 3)
    r2 = ((pts - np.array(other.position)) ** 2).sum(axis=-1)
    values = pot.values - 5.0 * np.exp(-r2 / (2 * 0.3**2))
    save_npz(paths.step(1) / "potential.npz", grid.Grid(pot.origin, pot.axes, values, pot.pbc))
    result = {s.step: s for s in replay(copy)}
    assert result[1].status == "differs"
    assert result[0].status == "same" and result[2].status == "same"
    rep = ionwell("replay", str(copy))
    assert rep.returncode == 1 and "replay: step 1 differs" in rep.stderr
