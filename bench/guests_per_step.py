"""What inserting k guests per step saves: engine runs, engine time and formation energies.

    python bench/guests_per_step.py [--guests 8] [--k 1,2,4] [--config config/demo-li-trilayer.yaml]
                                    [--root DIR]

Runs the same campaign (by default the demo: neutral Li into an AB trilayer of coronene sheets,
GFN2-xTB with tblite, guests relaxed) to the same number of guests with ``placement.per_step``
= k, each through ``ionwell run`` in a fresh folder, and reports per k: steps, engine runs
(every computed round, rejected sites included), relaxation steps, engine time (the ledger's
wall time of each step from prepare to assess, summed: engine time and a little bookkeeping) and the total energy at every guest count reached, and for
counts shared with k = 1 the difference of the formation energy per guest,
[E_k(n) - E_1(n)] / n (E(0) and μ cancel; meV), and the guests' positions at the end (Å), to
tell apart arrangements. ``--root`` keeps the campaigns there (default: a temporary folder).
Run by hand; not a test. Prints JSON lines.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml
from ase.io import read

from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import read_ledger
from ionwell.store.paths import StepPaths


def _run(config: dict, k: int, guests: int, root: Path) -> dict:
    cfg = {**config, "name": f"k{k}", "seed": config.get("seed", 1)}
    cfg["placement"] = {**cfg.get("placement", {}), "per_step": k}
    cfg["stop"] = {"guests": guests, "max_steps": guests + 4}
    cfg.pop("analysis", None)
    path = root / f"k{k}.yaml"
    path.write_text(yaml.safe_dump(cfg))
    t0 = time.perf_counter()
    out = subprocess.run(
        [sys.executable, "-m", "ionwell.cli", "run", str(path), "--root", str(root)],
        capture_output=True,
        text=True,
    )
    wall = time.perf_counter() - t0
    if out.returncode != 0:
        raise SystemExit(f"k = {k}: ionwell run failed\n{out.stdout[-2000:]}{out.stderr[-2000:]}")
    campaign = root / "campaigns" / f"k{k}"
    recs = read_ledger(campaign / "ledger.jsonl")
    rounds = len(list(campaign.glob("steps/*/flow/r*.computed.json")))
    relax = 0
    for r in recs:
        res = json.loads(StepPaths(CampaignPaths(campaign).step(r.step)).result.read_text())
        relax += int(res.get("relax_steps") or 0)
    return {
        "k": k,
        "steps": len(recs),
        "engine_runs": rounds,
        "relax_steps": relax,
        "step_time_s": round(sum(r.wall_time for r in recs), 1),  # prepare to assess
        "campaign_wall_s": round(wall, 1),
        "energies": {r.guests: r.energy for r in recs},
        "guest_positions": _guest_positions(campaign, recs[-1].step, config),
    }


def _guest_positions(campaign: Path, step: int, config: dict) -> list[list[float]]:
    """Positions (Å, rounded to 0.01) of the guest atoms in the last step's final structure."""
    element = config["guest"]["element"]
    atoms = read(StepPaths(CampaignPaths(campaign).step(step)).relaxed)
    return [[round(float(x), 2) for x in a.position] for a in atoms if a.symbol == element]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument(
        "--config", default=str(Path(__file__).parents[1] / "config" / "demo-li-trilayer.yaml")
    )
    ap.add_argument("--guests", type=int, default=8)
    ap.add_argument("--k", default="1,2,4")
    ap.add_argument("--root", type=Path, default=None, help="keep the campaigns here")
    args = ap.parse_args()
    config = yaml.safe_load(Path(args.config).read_text())
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        root = args.root or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        for k in (int(x) for x in args.k.split(",")):
            results.append(_run(config, k, args.guests, root))
            print(json.dumps(results[-1]), flush=True)
    base = results[0]
    for r in results[1:]:
        shared = sorted(set(r["energies"]) & set(base["energies"]) - {0})
        diff = {n: round(1000 * (r["energies"][n] - base["energies"][n]) / n, 1) for n in shared}
        print(json.dumps({
            "k": r["k"], "vs_k": base["k"],
            "step_time_ratio": round(base["step_time_s"] / r["step_time_s"], 2),
            "engine_runs_ratio": round(base["engine_runs"] / r["engine_runs"], 2),
            "formation_energy_per_guest_diff_meV": diff,
        }), flush=True)  # fmt: skip


if __name__ == "__main__":
    main()
