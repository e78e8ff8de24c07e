"""Warm start vs fresh guess: SCF iterations and SCF time of the embedded PySCF engine.

    python bench/warm_start.py [--layers 2] [--shells 1] [--steps 3] [--modes neutral,cation]
                               [--xc lda,vwn] [--basis sto-3g]

For each guest mode (neutral Li, Li⁺) a campaign of ``--steps`` insertions into a flake (default:
a benzene bilayer, 24 atoms; the issue's coronene bilayer is ``--shells 2``, ~700 s per single
point on two cores) runs with the engine's warm start (its default: the previous step's density
for the atoms it had, atomic densities for the new guest). Every step n ≥ 1 is then computed
again from PySCF's fresh guess (``warm_start: false``) on the same structure, charge and spin.
Prints one JSON line per step (iterations and seconds, warm and cold) and the median ratio of
iterations per mode. Relaxation is off (a pure SCF comparison). Run by hand; not a test.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml
from ase.io import read

from ionwell.config.campaign import load_campaign
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext


def _campaign(root: Path, mode: str, args: argparse.Namespace) -> Path:
    cfg = {
        "name": f"warm-{mode}",
        "seed": 1,
        "host": {"builder": {"layers": args.layers, "shells": args.shells, "spacing": 3.6}},
        "guest": {"element": "Li", "charge_mode": mode},
        "engine": {"kind": "pyscf", "xc": args.xc, "basis": args.basis, "threads": 2},
        "placement": {"galleries_only": args.layers > 1, "within": 3.0},
        "relax": {"enabled": False},
        "stop": {"guests": args.steps, "max_steps": args.steps + 1},
    }
    path = root / f"warm-{mode}.yaml"
    path.write_text(yaml.safe_dump(cfg))
    out = subprocess.run(
        [sys.executable, "-m", "ionwell.cli.commands", "run", str(path), "--root", str(root)],
        capture_output=True,
        text=True,
    )
    if out.returncode != 0:
        raise SystemExit(f"{mode}: ionwell run failed\n{out.stdout[-2000:]}{out.stderr[-2000:]}")
    return path


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--shells", type=int, default=1)
    ap.add_argument("--steps", type=int, default=3)
    ap.add_argument("--modes", default="neutral,cation")
    ap.add_argument("--xc", default="lda,vwn")
    ap.add_argument("--basis", default="sto-3g")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        for mode in args.modes.split(","):
            path = _campaign(root, mode, args)
            campaign = load_campaign(path)
            cold_engine = get_engine(
                campaign.model_copy(
                    update={"engine": campaign.engine.model_copy(update={"warm_start": False})}
                )
            )
            steps = root / "campaigns" / f"warm-{mode}" / "steps"
            ratios = []
            for n in range(1, args.steps + 1):
                step = steps / f"{n:04d}"
                warm = json.loads((step / "result.json").read_text())
                atoms = read(step / "input.extxyz")
                ctx = ComputeContext(step=n, charge=warm["charge"], spin=warm["spin"])
                work = root / f"cold-{mode}-{n}"
                cold_engine.prepare(atoms, work, ctx)
                t0 = time.perf_counter()
                cold_engine.launch(work, campaign.launcher)
                seconds = time.perf_counter() - t0
                cold, _ = cold_engine.collect(work)
                ratio = warm["scf_iterations"] / cold.scf_iterations
                ratios.append(ratio)
                print(json.dumps({
                    "mode": mode, "step": n, "atoms": len(atoms), "xc": args.xc,
                    "basis": args.basis, "warm_started": warm["warm_started"],
                    "iterations_warm": warm["scf_iterations"],
                    "iterations_cold": cold.scf_iterations, "ratio": round(ratio, 2),
                    "step_seconds_warm": round(warm["wall_time"], 1),
                    "step_seconds_cold": round(seconds, 1),
                    "energy_diff_eV": round(warm["energy"] - cold.energy, 7),
                }), flush=True)  # fmt: skip
            print(json.dumps({"mode": mode, "median_ratio": round(statistics.median(ratios), 2)}))


if __name__ == "__main__":
    main()
