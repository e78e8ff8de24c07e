"""relax.pre: the guests relaxed with GFN2-xTB (tblite) before the engine relaxes them.

Benzene, then Li⁺ at benzene's deepest well, relaxed with PySCF (LDA/STO-3G, the embedded DFT
engine): once with DFT alone, once with the tight-binding pre-relaxation first. Both must end in
the same geometry class — Li⁺ over the ring face, on its six-fold axis (cation–π, common
practice) — and the pre-relaxation is recorded in the step's ledger record and files.
"""

from __future__ import annotations

import json
import logging

import numpy as np
import pytest
from ase.io import read
from shared import run_campaign

log = logging.getLogger("test_pre_relax")


def _campaign(tmp_path, name: str, pre: dict | None) -> dict:
    relax = {"enabled": True, "move": "guests", "fmax": 0.05, "steps": 40}
    if pre is not None:
        relax["pre"] = pre
    cfg = {
        "name": name,
        "seed": 3,
        "host": {"builder": {"layers": 1, "shells": 1}},  # benzene in the plane z = 0
        "guest": {"element": "Li", "charge_mode": "cation"},
        "engine": {"kind": "pyscf"},
        "placement": {"within": 3.0},
        "relax": relax,
        "stop": {"guests": 1},
    }
    run_campaign(cfg, tmp_path, timeout=1200)
    root = tmp_path / "campaigns" / name
    records = [json.loads(line) for line in (root / "ledger.jsonl").read_text().splitlines()]
    result = json.loads((root / "steps" / "0001" / "result.json").read_text())
    final = read(root / "steps" / "0001" / "relaxed.extxyz")
    return {"root": root, "records": records, "result": result, "final": final}


def _over_the_ring(atoms) -> tuple[float, float]:
    """(height above the ring plane, distance from the six-fold axis) of the Li, Å."""
    symbols = np.array(atoms.get_chemical_symbols())
    ring = atoms.positions[symbols == "C"]
    centre = ring.mean(axis=0)
    normal = np.linalg.svd(ring - centre)[2][-1]
    li = atoms.positions[symbols == "Li"][0] - centre
    height = abs(li @ normal)
    return height, float(np.linalg.norm(li - (li @ normal) * normal))


@pytest.mark.slow
def test_pre_relaxation_ends_in_the_same_geometry_class_and_is_recorded(tmp_path):
    alone = _campaign(tmp_path, "dft-only", None)
    first = _campaign(tmp_path, "xtb-first", {"method": "GFN2-xTB", "fmax": 0.05})

    # recorded: in the ledger record of step 1 (the step with a guest to move), with its files;
    # step 0 (benzene, nothing movable) has none
    assert alone["records"][1].get("pre_relax") is None
    assert first["records"][0].get("pre_relax") is None
    pre = first["records"][1]["pre_relax"]
    assert pre["method"] == "GFN2-xTB" and pre["converged"] and pre["steps"] > 0
    assert pre["energy_end"] < pre["energy_start"] and pre["max_displacement"] > 0.01
    assert "pre-relax/pre-relax.json" in first["records"][1]["files"]
    assert (first["root"] / "steps" / "0001" / "pre-relax" / "relax.traj").is_file()
    # the engine started from the tight-binding minimum, not from the inserted position
    inserted = read(first["root"] / "steps" / "0001" / "input.extxyz")
    handed = read(first["root"] / "steps" / "0001" / "engine" / "input.extxyz")
    moved = np.linalg.norm(handed.positions - inserted.positions, axis=1).max()
    assert moved == pytest.approx(pre["max_displacement"], abs=1e-5)

    # the same geometry class: Li+ on the ring's axis, above its face. Computed Li+-benzene
    # complexes put Li+ ~1.8-1.9 Å above the ring plane (value from memory); LDA/STO-3G's is
    # its own, so the band is wide, and the two runs must agree with each other to 0.1 Å
    h_alone, r_alone = _over_the_ring(alone["final"])
    h_first, r_first = _over_the_ring(first["final"])
    log.info(
        "DFT only: %d DFT relaxation steps, Li %.3f Å above the plane, %.3f Å off the axis; "
        "xTB first (%d steps): %d DFT steps, %.3f Å, %.3f Å",
        alone["result"]["relax_steps"], h_alone, r_alone, pre["steps"],
        first["result"]["relax_steps"], h_first, r_first,
    )  # fmt: skip
    for h, r in ((h_alone, r_alone), (h_first, r_first)):
        assert 1.3 < h < 2.4 and r < 0.3
    assert abs(h_alone - h_first) < 0.1
    assert alone["result"]["relax_converged"] and first["result"]["relax_converged"]
    # both DFT relaxations reach the same energy (the same minimum), to 5 meV
    assert abs(alone["result"]["energy"] - first["result"]["energy"]) < 0.005
