"""PySCF's closing cycle after a converged SCF: what leaving it out saves and what it changes.

    python bench/scf_closing_cycle.py [--steps 3] [--modes cation,neutral] [--xc lda,vwn]
                                      [--basis sto-3g] [--repeats 3] [--geometries 6] [--root DIR]

After DIIS has converged, PySCF by default (``conv_check``) diagonalises the last Fock matrix
once more and rebuilds the Fock matrix of that density: one Fock build the engine does not
count as a cycle. The engine leaves it out unless a level shift has to be taken off
(:meth:`ionwell.engines.pyscf_engine._KohnSham._new_mf`). This bench solves the structures of
``bench/warm_start.py``'s benzene-bilayer series (steps 1..``--steps``; the campaign is made
or reused under ``--root``) both ways, the two runs interleaved ``--repeats`` times:

* one cold SCF per step: Fock builds, cycles, wall time (median), and the distance of the
  energy, the forces and the orbital energies from a tightly converged PySCF solve of the same
  model (conv_tol 1e-12 hartree, orbital gradient 1e-8);
* a relaxation of the step's guests (host fixed, ASE's BFGS, ``--geometries`` geometries, each
  SCF from the previous geometry's orbitals, as in the engine): Fock builds, cycles, time.

``cation``: every Li a Li⁺ (charge +n, closed shells); ``neutral``: Li with 0.1 eV Fermi
smearing. Prints one JSON line per step and mode and a summary of medians. Run by hand.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from ase.constraints import FixAtoms
from ase.optimize import BFGS
from ase.units import Bohr, Hartree

from ionwell.config.campaign import PyscfEngineConfig
from ionwell.engines.pyscf_engine import PyscfCalculator, _KohnSham, build_mol

sys.path.insert(0, str(Path(__file__).parent))
from warm_start import _structures  # noqa: E402  (bench scripts share the campaign)


class _Counted(_KohnSham):
    """The engine's SCF driver that counts Fock builds and, if ``closing``, keeps PySCF's
    closing cycle."""

    def __init__(self, mol, cfg: PyscfEngineConfig, closing: bool) -> None:
        super().__init__(mol, cfg)
        self.closing = closing
        self.builds = 0

    def _new_mf(self, mol, smearing: float | None = None):
        mf = super()._new_mf(mol, smearing)
        mf.conv_check = self.closing or mf.conv_check
        veff = mf.get_veff

        def get_veff(*args, **kwargs):
            self.builds += 1
            return veff(*args, **kwargs)

        mf.get_veff = get_veff
        return mf


def _single_point(mol, cfg: PyscfEngineConfig, closing: bool) -> dict:
    """One cold SCF and its gradient; returns counts, time and the state (eV, eV/Å)."""
    ks = _Counted(mol, cfg, closing)
    t0 = time.perf_counter()
    mf = ks.scf()
    seconds = time.perf_counter() - t0
    eps = np.concatenate([np.ravel(e) for e in np.atleast_2d(mf.mo_energy)]) * Hartree
    return {
        "builds": ks.builds,
        "cycles": ks.iterations,
        "seconds": seconds,
        "energy": float(mf.e_tot) * Hartree,
        "forces": -ks.gradient() * Hartree / Bohr,
        "eps": eps,
    }


def _reference(mol, cfg: PyscfEngineConfig) -> dict:
    """A tightly converged PySCF solve of the same model (PySCF's own kernel)."""
    mf = _KohnSham(mol, cfg)._new_mf(mol)
    mf.conv_tol, mf.conv_tol_grad = 1e-12, 1e-8
    mf.max_cycle = 300
    mf.kernel()
    if not mf.converged:
        raise SystemExit("the tight reference SCF did not converge")
    eps = np.concatenate([np.ravel(e) for e in np.atleast_2d(mf.mo_energy)]) * Hartree
    forces = -mf.nuc_grad_method().kernel() * Hartree / Bohr
    return {"energy": float(mf.e_tot) * Hartree, "forces": forces, "eps": eps}


def _relaxation(atoms, charge: int, cfg: PyscfEngineConfig, n: int, geometries: int, closing):
    """``geometries`` BFGS geometries of the last ``n`` atoms; returns (Fock builds, cycles,
    SCF seconds, seconds in all, with the gradients)."""
    ks = _Counted(build_mol(atoms, cfg.basis, charge), cfg, closing)
    a = atoms.copy()
    a.set_constraint(FixAtoms(indices=list(range(len(a) - n))))
    a.calc = PyscfCalculator(ks)
    t0 = time.perf_counter()
    BFGS(a, logfile=None, maxstep=0.2).run(fmax=1e-3, steps=geometries - 1)
    return ks.builds, ks.total_iterations, ks.scf_seconds, time.perf_counter() - t0


def _distance(state: dict, ref: dict) -> dict:
    return {
        "energy_eV": float(f"{state['energy'] - ref['energy']:.2e}"),
        "forces_max_eV_A": float(f"{np.abs(state['forces'] - ref['forces']).max():.2e}"),
        "orbital_energies_max_eV": float(f"{np.abs(state['eps'] - ref['eps']).max():.2e}"),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=3)
    ap.add_argument("--modes", default="cation,neutral")
    ap.add_argument("--xc", default="lda,vwn")
    ap.add_argument("--basis", default="sto-3g")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--geometries", type=int, default=6, help="geometries per relaxation")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--root", type=Path, default=None, help="keep (and reuse) the campaign here")
    args = ap.parse_args()
    # the campaign of bench/warm_start.py: benzene bilayer, LDA/STO-3G placement
    series = argparse.Namespace(layers=2, shells=1, steps=args.steps, placement_engine="pyscf")
    with tempfile.TemporaryDirectory() as tmp:
        root = args.root or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        structures = _structures(root, series)
        for mode in args.modes.split(","):
            smearing = 0.1 if mode == "neutral" else 0.0
            cfg = PyscfEngineConfig(
                xc=args.xc, basis=args.basis, smearing=smearing, threads=args.threads
            )
            _series(structures, cfg, mode, args)


def _series(structures, cfg: PyscfEngineConfig, mode: str, args) -> None:
    time_ratios, relax_ratios = [], []
    for n, atoms in enumerate(structures):
        if n == 0:
            continue
        charge = n if mode == "cation" else 0
        mol = build_mol(atoms, cfg.basis, charge)
        runs: dict[bool, list[dict]] = {True: [], False: []}
        for _ in range(args.repeats):
            for closing in (True, False):
                runs[closing].append(_single_point(mol, cfg, closing))
        ref = _reference(mol, cfg)
        relax = {c: _relaxation(atoms, charge, cfg, n, args.geometries, c) for c in (True, False)}
        row: dict = {"mode": mode, "xc": cfg.xc, "basis": cfg.basis, "step": n, "atoms": len(atoms)}
        for closing, name in ((True, "closing"), (False, "engine")):
            first = runs[closing][0]
            row[name] = {
                "builds": first["builds"],
                "cycles": first["cycles"],
                "seconds_median": round(statistics.median(r["seconds"] for r in runs[closing]), 2),
                "off_reference": _distance(first, ref),
                "relax_builds": relax[closing][0],
                "relax_cycles": relax[closing][1],
                "relax_scf_seconds": round(relax[closing][2], 1),
                "relax_seconds": round(relax[closing][3], 1),
            }
        row["time_ratio"] = round(
            row["engine"]["seconds_median"] / row["closing"]["seconds_median"], 3
        )
        row["relax_time_ratio"] = round(relax[False][3] / relax[True][3], 3)
        time_ratios.append(row["time_ratio"])
        relax_ratios.append(row["relax_time_ratio"])
        print(json.dumps(row), flush=True)
    print(json.dumps({"summary": {
        "mode": mode, "xc": cfg.xc, "basis": cfg.basis, "repeats": args.repeats,
        "single_point_time_ratio_median": statistics.median(time_ratios),
        "relaxation_time_ratio_median": statistics.median(relax_ratios),
    }}), flush=True)  # fmt: skip


if __name__ == "__main__":
    main()
