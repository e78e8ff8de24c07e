"""The demo campaign end to end: a reduced copy of ``config/demo-li-trilayer.yaml`` (fewer guests,
shorter relaxations; same host, guest, engine and placement) run with ``ionwell run`` on the
embedded tight-binding engine, then given its guest reference after the run.

What a referee looks for in the outputs: formation energies, a hull and voltage steps once μ is
known; a stacking registry per layer pair; x counted per C6; structure pictures; the settings the
analysis used. And adding the reference afterwards recomputes no step.
"""

from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

import pytest
import yaml
from shared import ionwell, run_campaign

pytestmark = pytest.mark.slow

pytest.importorskip("tblite")

DEMO = Path(__file__).resolve().parents[2] / "config" / "demo-li-trilayer.yaml"


def _digests(folder: Path) -> dict[str, str]:
    """sha256 of every file under ``folder`` (relative names)."""
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _rows(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(path.open()))


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> tuple[Path, dict]:
    """The reduced demo, run without its guest reference; returns the folder and the reference."""
    data = yaml.safe_load(DEMO.read_text())
    reference = data["analysis"].pop("reference")
    data["name"] = "demo-reduced"
    data["stop"] = {"guests": 3, "max_steps": 6}
    data["relax"] = {**data["relax"], "steps": 10, "fmax": 0.25}
    root = tmp_path_factory.mktemp("demo")
    cfg = root / "demo-reduced.yaml"
    cfg.write_text(yaml.safe_dump(data))
    run_campaign(cfg, root, timeout=900)
    return root / "campaigns" / "demo-reduced", reference


def test_demo_outputs_and_a_reference_added_after_the_run(demo, tmp_path):
    camp, reference = demo
    out = camp / "analysis"
    # without μ: energies per step, no formation energies, and the status says what is missing
    rows = _rows(out / "energetics.csv")
    assert [int(r["guests"]) for r in rows] == [0, 1, 2, 3]
    assert all(r["formation_eV"] == "" for r in rows)
    status = ionwell("status", camp)
    assert status.returncode == 0, status.stderr
    assert "needs analysis.reference" in status.stdout

    # x per C6, terminating H excluded: 3 coronene sheets hold 72 C = 12 units (common practice)
    summary = json.loads((out / "analysis.json").read_text())
    assert summary["formula_unit"] == {"C": 6}
    assert float(rows[3]["x"]) == pytest.approx(3 / 12)

    # the AB host reads AB in both galleries at every step (the host is built AB)
    layers = _rows(out / "layers.csv")
    assert {r["gallery"] for r in layers} == {"0", "1"}
    assert {r["registry"] for r in layers} == {"AB"}, layers

    # a picture of every step and the filling sequence
    for step in range(4):
        assert (out / "structures" / f"step_{step:04d}.png").is_file()
    assert (out / "filling.png").is_file()
    assert summary["filling"] == "filling.png"

    # the guest reference added after the run: no step is computed again
    before_steps = _digests(camp / "steps")
    before_ledger = (camp / "ledger.jsonl").read_bytes()
    frozen = (camp / "campaign.yaml").read_bytes()
    settings = tmp_path / "analysis.yaml"
    settings.write_text(yaml.safe_dump({"reference": reference}))
    proc = ionwell("analyse", camp, "--settings", settings, timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert _digests(camp / "steps") == before_steps
    assert (camp / "ledger.jsonl").read_bytes() == before_ledger
    assert (camp / "campaign.yaml").read_bytes() == frozen
    assert (camp / "analysis.yaml").is_file()

    summary = json.loads((out / "analysis.json").read_text())
    assert summary["settings_source"].startswith("analysis.yaml")
    assert summary["settings"]["reference"]["cohesive_energy"] == reference["cohesive_energy"]
    assert summary["reference"]["mu"] < 0
    rows = _rows(out / "energetics.csv")
    ef = [float(r["formation_eV"]) for r in rows]
    # E_f(0) = 0 by definition; E_f(n) = E(n) - E(0) - n mu recomputed from the table itself
    e = [float(r["energy_eV"]) for r in rows]
    mu = summary["reference"]["mu"]
    assert ef == pytest.approx([ei - e[0] - n * mu for n, ei in enumerate(e)], abs=1e-5)
    assert (out / "hull.png").is_file()
    volts = _rows(out / "voltage.csv")
    assert volts and summary["voltages"] == pytest.approx([float(v["voltage_V"]) for v in volts])
    # the status now gives insertion energies against mu
    status = ionwell("status", camp)
    assert "E_ins per guest against" in status.stdout

    # the report shows the filling sequence and names the method
    rep = ionwell("report", camp, timeout=900)
    assert rep.returncode == 0, rep.stderr[-2000:]
    html = (out / "report.html").read_text()
    assert "filling" in html.lower()
    assert "GFN2-xTB" in html
