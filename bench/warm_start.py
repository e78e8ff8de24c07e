"""Warm start vs fresh guess: SCF iterations and SCF time of the embedded PySCF engine.

    python bench/warm_start.py [--layers 2] [--shells 1] [--steps 4] [--modes neutral,cation]
                               [--xc lda,vwn] [--basis sto-3g] [--root DIR]

One campaign of ``--steps`` neutral Li insertions into a flake (default: a benzene bilayer, 24
atoms; the issue's coronene bilayer is ``--shells 2``, ~700 s per single point on two cores)
gives the structures (fresh guesses, relaxation off). For each guest mode the structures are
then solved again, SCF only, through the engine's SCF driver (DIIS, maximum overlap for open
shells, the Newton fallback): step n with n guests and charge 0 (neutral) or +n (cation, every
Li a Li⁺), from PySCF's fresh guess (cold) and, for n ≥ 1, from the cold solution of step n − 1
with each construction of :data:`ionwell.engines.pyscf_engine.WARM_CONSTRUCTIONS`. Prints one
JSON line per step and construction (iterations, SCF seconds, energy minus the cold energy in
eV) and, per mode and construction, the median ratios warm/cold of iterations and SCF seconds.
``--root`` keeps the campaign there and reuses it when run again. Run by hand; not a test.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import yaml
from ase.io import read
from ase.units import Hartree
from pyscf.scf import chkfile

from ionwell.config.campaign import PyscfEngineConfig
from ionwell.engines.pyscf_engine import (
    WARM_CONSTRUCTIONS,
    _KohnSham,
    build_mol,
    warm_start_guess,
)


def _structures(root: Path, args: argparse.Namespace) -> list:
    """Run (or reuse) the campaign; returns the structures of steps 0..``--steps``."""
    name = f"warm-{args.layers}x{args.shells}-{args.xc.replace(',', '_')}-{args.basis}"
    steps = root / "campaigns" / name / "steps"
    inputs = [steps / f"{n:04d}" / "engine" / "input.extxyz" for n in range(args.steps + 1)]
    if not all(p.is_file() for p in inputs):
        cfg = {
            "name": name,
            "seed": 1,
            "host": {"builder": {"layers": args.layers, "shells": args.shells, "spacing": 3.6}},
            "guest": {"element": "Li", "charge_mode": "neutral"},
            "engine": {"kind": "pyscf", "xc": args.xc, "basis": args.basis, "threads": 2},
            "placement": {"galleries_only": args.layers > 1, "within": 3.0},
            "relax": {"enabled": False},
            "stop": {"guests": args.steps, "max_steps": args.steps + 1},
        }
        path = root / f"{name}.yaml"
        path.write_text(yaml.safe_dump(cfg))
        out = subprocess.run(
            [sys.executable, "-m", "ionwell.cli", "run", str(path), "--root", str(root)],
            capture_output=True,
            text=True,
        )
        if out.returncode != 0:
            raise SystemExit(f"ionwell run failed\n{out.stdout[-2000:]}{out.stderr[-2000:]}")
    return [read(p) for p in inputs]


def _solve(mol, cfg: PyscfEngineConfig, guess, label: str | None = None) -> _KohnSham:
    """One SCF through the engine's driver from ``guess`` (None: PySCF's fresh guess)."""
    ks = _KohnSham(mol, cfg)
    ks.dm = guess
    if label is not None:
        ks.guess = label
    if not ks.scf().converged:
        print(json.dumps({"warning": "SCF not converged"}), flush=True)
    return ks


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--shells", type=int, default=1)
    ap.add_argument("--steps", type=int, default=4)
    ap.add_argument("--modes", default="neutral,cation")
    ap.add_argument("--xc", default="lda,vwn")
    ap.add_argument("--basis", default="sto-3g")
    ap.add_argument("--constructions", default=",".join(WARM_CONSTRUCTIONS))
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--root", type=Path, default=None, help="keep (and reuse) campaigns here")
    args = ap.parse_args()
    constructions = args.constructions.split(",")
    cfg = PyscfEngineConfig(xc=args.xc, basis=args.basis, threads=args.threads)
    with tempfile.TemporaryDirectory() as tmp:
        root = args.root or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        structures = _structures(root, args)
        for mode in args.modes.split(","):
            ratios: dict[str, list[float]] = {c: [] for c in constructions}
            times: dict[str, list[float]] = {c: [] for c in constructions}
            worst: dict[str, float] = {c: 0.0 for c in constructions}
            chk_prev = None
            for n, atoms in enumerate(structures):
                mol = build_mol(atoms, cfg.basis, 0 if mode == "neutral" else n)
                ks = _solve(mol, cfg, None)
                it_c, t_c, e_c = ks.iterations, ks.scf_seconds, float(ks.mf.e_tot) * Hartree
                row = {"mode": mode, "step": n, "atoms": len(atoms), "xc": args.xc,
                       "basis": args.basis, "spin": mol.spin, "cold_iterations": it_c,
                       "cold_seconds": round(t_c, 2), "cold_solver": ks.solver}  # fmt: skip
                print(json.dumps(row), flush=True)
                for c in constructions if chk_prev is not None else ():
                    dm0, label = warm_start_guess(mol, chk_prev, mol.spin != 0, c)
                    w = _solve(mol, cfg, dm0, label)
                    it_w, t_w, e_w = w.iterations, w.scf_seconds, float(w.mf.e_tot) * Hartree
                    ratios[c].append(it_w / it_c)
                    times[c].append(t_w / t_c)
                    worst[c] = max(worst[c], abs(e_w - e_c))
                    print(json.dumps({
                        "mode": mode, "step": n, "construction": c, "guess": w.guess,
                        "iterations": it_w, "seconds": round(t_w, 2), "solver": w.solver,
                        "ratio": round(it_w / it_c, 2), "time_ratio": round(t_w / t_c, 2),
                        "energy_minus_cold_eV": float(f"{e_w - e_c:.2e}"),
                    }), flush=True)  # fmt: skip
                chk_prev = Path(root) / f"{mode}-{n}.chk"
                chk_prev.unlink(missing_ok=True)
                mf = ks.mf
                chkfile.dump_scf(mf.mol, str(chk_prev), mf.e_tot, mf.mo_energy, mf.mo_coeff,
                                 mf.mo_occ)  # fmt: skip
            for c in constructions:
                print(json.dumps({
                    "mode": mode, "xc": args.xc, "basis": args.basis, "construction": c,
                    "median_ratio": round(statistics.median(ratios[c]), 2),
                    "median_time_ratio": round(statistics.median(times[c]), 2),
                    "max_abs_energy_diff_eV": float(f"{worst[c]:.2e}"),
                }), flush=True)  # fmt: skip


if __name__ == "__main__":
    main()
