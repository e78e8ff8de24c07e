"""Quantum ESPRESSO on a periodic host: Li into AB graphite, run and analysed through ionwell.

The host is the shipped example (config/example-qe-graphite.yaml): a √3×√3 R30° cell of two
AB-stacked graphene sheets (C12, a = 2.46 Å, 3.35 Å between sheets), built by ionwell's
periodic graphite builder with the sheets at a quarter and three quarters of the cell height,
so one of its two galleries straddles the cell's bottom/top face. Neutral Li, relaxation off,
Li kept 2.8 Å from Li. Needs ``pw.x``/``pp.x`` and the archive's PAW files (skipped otherwise).
"""

from __future__ import annotations

import json
import logging
import os
import re
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
import yaml
from ase.geometry import get_distances
from ase.io import read
from shared import ionwell, run_campaign

from ionwell.config.definitions import find_definition

log = logging.getLogger("test_qe_graphite")

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "config" / "example-qe-graphite.yaml"
DEFINITION = find_definition("quantum-espresso")


def _missing() -> str | None:
    for program in ("pw.x", "pp.x"):
        if shutil.which(program) is None:
            return f"Quantum ESPRESSO is not installed here ({program} is not on PATH)"
    folder = Path(os.environ.get("ESPRESSO_PSEUDO", "/usr/share/espresso/pseudo"))
    pseudos = yaml.safe_load(DEFINITION.read_text())["input"]["parameters"]["pseudopotentials"]
    absent = [f for f in (pseudos["C"], pseudos["Li"]) if not (folder / f).is_file()]
    return f"the pseudopotential files {absent} are not in {folder}" if absent else None


needs_qe = pytest.mark.skipif(_missing() is not None, reason=_missing() or "")


def _pw_in(tmp_path: Path, atoms, **engine) -> str:
    """pw.in as the shipped definition writes it for ``atoms`` (no QE needed)."""
    from ionwell.config.campaign import parse_campaign
    from ionwell.config.definitions import resolve_engines
    from ionwell.engines import get_engine
    from ionwell.engines.base import ComputeContext

    data = {
        "name": "k",
        "host": {"builder": {"kind": "graphite"}},
        "engine": {"definition": "quantum-espresso", **engine},
    }
    campaign = parse_campaign(resolve_engines(data, tmp_path))
    work = tmp_path / "w"
    get_engine(campaign).prepare(atoms, work, ComputeContext(step=0, charge=0, potential=True))
    return (work / "pw.in").read_text()


def test_k_points_follow_the_cell_rule(tmp_path):
    from ase.build import molecule

    from ionwell.config.campaign import GraphiteBuilder
    from ionwell.science.host import build_graphite

    graphite = build_graphite(GraphiteBuilder(kind="graphite"))  # √3×√3, c = 6.7 Å
    # k-point spacing 0.08 Å⁻¹ in ASE's convention (no 2π): n_i = int(|b_i| / 0.08) + 1 with
    # |b_i| the reciprocal vectors (numpy here: b_i · a_j = δ_ij): 0.271, 0.271, 0.149 Å⁻¹
    recip = np.linalg.norm(np.linalg.inv(np.asarray(graphite.cell)).T, axis=1)
    assert [int(b / 0.08) + 1 for b in recip] == [4, 4, 2]
    text = _pw_in(tmp_path / "p", graphite)
    assert re.search(r"K_POINTS automatic\s+4 4 2\s+0 0 0", text)
    assert re.search(r"assume_isolated\s*=\s*'none'", text)
    # the host's own skewed cell (120°), as CELL_PARAMETERS in Å
    cell = text.split("CELL_PARAMETERS angstrom\n")[1].splitlines()[:3]
    np.testing.assert_allclose([[float(x) for x in s.split()] for s in cell], graphite.cell)
    # a boxed molecule: Γ only, whatever the spacing
    text = _pw_in(tmp_path / "b", molecule("H2"), settings={"kpoint_spacing": 0.04})
    assert "K_POINTS gamma" in text and re.search(r"assume_isolated\s*=\s*'mt'", text)
    # finer spacing: int(0.271 / 0.04) + 1 = 7, int(0.149 / 0.04) + 1 = 4
    text = _pw_in(tmp_path / "f", graphite, settings={"kpoint_spacing": 0.04})
    assert re.search(r"K_POINTS automatic\s+7 7 4\s+0 0 0", text)
    # an explicit mesh instead of a spacing (the definition's header says how)
    text = _pw_in(
        tmp_path / "m",
        graphite,
        settings={"kpoint_spacing": None},
        input={"parameters": {"kpts": [6, 6, 2]}},
    )
    assert re.search(r"K_POINTS automatic\s+6 6 2\s+0 0 0", text)


def _mic_min(a: np.ndarray, b: np.ndarray, cell: np.ndarray) -> np.ndarray:
    """Distance (Å) from each point of ``a`` to the nearest of ``b`` under the minimum-image
    convention of ``cell`` (periodic along a, b, c), computed by ASE."""
    _, d = get_distances(a, b, cell=cell, pbc=True)
    return d.min(axis=1)


@needs_qe
@pytest.mark.slow
def test_lithium_into_periodic_ab_graphite(tmp_path):
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import read_ledger

    data = yaml.safe_load(EXAMPLE.read_text())
    t0 = time.monotonic()
    run_campaign(data, tmp_path, timeout=900)
    total = time.monotonic() - t0
    root = tmp_path / "campaigns" / data["name"]
    recs = read_ledger(CampaignPaths(root).ledger)
    for r in recs:
        log.info("step %d: %.1f s (engine and bookkeeping)", r.step, r.wall_time)
    log.info("campaign: %.1f s in all", total)
    assert [r.guests for r in recs] == [0, 1, 2]
    assert all(r.scf_converged for r in recs)
    assert recs[0].engine == "quantum-espresso" and recs[0].engine_version.startswith("6.")

    # pw.x got the host's own skewed hexagonal cell and a k-point mesh, not Γ only: the
    # definition's k-point spacing 0.08 Å⁻¹ (ASE's convention, no 2π) gives n = int(|b|/0.08) + 1
    # per axis; reciprocal vectors from numpy here (b_i · a_j = δ_ij)
    host = read(root / "host.extxyz")
    assert host.pbc.all() and host.cell.cellpar()[5] == pytest.approx(120.0)
    recip = np.linalg.inv(np.asarray(host.cell)).T
    mesh = [int(np.linalg.norm(b) / 0.08) + 1 for b in recip]
    assert mesh == [4, 4, 2]
    pw_in = (root / "steps" / "0000" / "engine" / "pw.in").read_text()
    assert re.search(r"K_POINTS automatic\s+4 4 2\s+0 0 0", pw_in)
    assert re.search(r"assume_isolated\s*=\s*'none'", pw_in)
    lines = pw_in.split("CELL_PARAMETERS angstrom\n")[1].splitlines()[:3]
    np.testing.assert_allclose([[float(x) for x in s.split()] for s in lines], host.cell, atol=1e-9)
    pw_out = (root / "steps" / "0000" / "engine" / "pw.out").read_text()
    assert int(re.search(r"number of k points=\s*(\d+)", pw_out).group(1)) > 1

    # the campaign stopped for want of room, not by the guest count (stop.guests is 3)
    assert recs[-1].outcome == "stop" and recs[-1].stop_reason.startswith("no admissible well")

    final = read(root / "steps" / "0002" / "input.extxyz")
    cell = np.asarray(final.cell)
    li = final.positions[final.numbers == 3]
    carbon = final.positions[final.numbers == 6]
    assert len(li) == 2 and np.allclose(cell, host.cell)

    # 1. guests in the galleries: each Li's height (mod c) lies in the gap between two sheets,
    # near its mid-plane (the map's wells, no relaxation; within a grid step or two). Sheets from
    # the carbon heights themselves, galleries between consecutive sheets around the period.
    c = cell[2, 2]
    sheets = np.unique(np.round(np.mod(carbon[:, 2], c), 3))
    assert len(sheets) == 2  # two flat sheets per cell
    mids = np.mod(np.r_[sheets.mean(), sheets.mean() + c / 2], c)  # the two gallery mid-planes
    heights = np.mod(li[:, 2], c)
    off = np.abs((heights[:, None] - mids[None, :] + c / 2) % c - c / 2)  # mic along c
    gallery = off.argmin(axis=1)
    assert (off.min(axis=1) < 0.3).all(), (heights, mids)
    # one Li per gallery, and one of the two galleries is the one across the cell's face z = 0
    assert sorted(gallery.tolist()) == [0, 1]
    assert min(abs((m + c / 2) % c - c / 2) for m in mids) < 1e-6

    # 2. the minimum separations hold under the minimum-image convention (ASE's distances): Li–Li
    # at least the configured 2.8 Å, also to a guest's own images across the cell edges, and
    # each Li at least the recorded exclusion from every carbon
    excl = recs[-1].decision.exclusion  # as used for the last step (Li present)
    assert excl["Li"] == pytest.approx(2.8)
    _, d_li = get_distances(li, li, cell=cell, pbc=True)
    d_pairs = d_li[np.triu_indices(len(li), 1)]
    shortest_lattice = min(np.linalg.norm(cell, axis=1))
    assert d_pairs.min() >= excl["Li"] - 1e-6 and shortest_lattice >= excl["Li"]
    assert _mic_min(li, carbon, cell).min() >= excl["C"] - 1e-6
    log.info("Li heights %s Å (gallery mid-planes %s), Li–Li (mic) %s Å, Li–C min %.3f Å",
             np.round(heights, 3), np.round(mids, 3), np.round(d_pairs, 3),
             _mic_min(li, carbon, cell).min())  # fmt: skip

    # ...and that is why there is no third site: every point of the cell lies within the
    # exclusion of some atom, counting images across the cell edges (a 24x24x48 fractional grid,
    # spacing ~0.18 Å in-plane, 0.14 Å along c). Without the images (atoms of this cell only)
    # room would remain, so the stop depends on the minimum image.
    f = np.stack(np.meshgrid(*(np.arange(n) / n for n in (24, 24, 48)), indexing="ij"), -1)
    pts = f.reshape(-1, 3) @ cell
    limits = np.where(final.numbers == 3, excl["Li"], excl["C"])
    _, d_all = get_distances(pts, final.positions, cell=cell, pbc=True)
    assert not ((d_all >= limits[None, :]).all(axis=1)).any()
    d_plain = np.linalg.norm(pts[:, None, :] - final.positions[None, :, :], axis=2)
    assert ((d_plain >= limits[None, :]).all(axis=1)).any()

    # 3. the analysis: stage and registry of the periodic host (analysis.json, layers.csv)
    proc = ionwell("analyse", root, timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    summary = json.loads((root / "analysis" / "analysis.json").read_text())
    by_step = {s["step"]: s for s in summary["layers"]}
    for s in by_step.values():
        # the builder's AB stack (Bernal, as ASE's Graphite: tests/science/test_host.py); relaxation is
        # off, so every step keeps it; two galleries per cell, one across the cell's face
        assert s["periodic"] and s["layers"] == 2
        assert s["registries"] == ["AB", "AB"]
        assert s["spacings"] == pytest.approx([3.35, 3.35], abs=1e-3)
        assert s["guests_outside"] == 0
    # stage (common practice: the period of filled galleries): one of two galleries filled per
    # cell repeats every second gallery -> stage 2; both filled (Li2C12 = LiC6) -> stage 1
    assert by_step[0]["stage"] is None and by_step[0]["staging"] == "empty"
    assert sorted(by_step[1]["gallery_guests"]) == [0, 1] and by_step[1]["stage"] == 2
    assert by_step[2]["gallery_guests"] == [1, 1] and by_step[2]["stage"] == 1
    assert by_step[2]["staging"] == "regular"
    # x per C6 (the config's formula unit): LiC6 at the end
    energetics = (root / "analysis" / "energetics.csv").read_text().splitlines()
    assert energetics[-1].split(",")[2] == "1.000000"
