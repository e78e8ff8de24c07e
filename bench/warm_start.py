"""Warm start vs fresh guess: SCF iterations and SCF time of the embedded PySCF engine.

    python bench/warm_start.py [--layers 2] [--shells 1] [--steps 4] [--modes neutral,cation]
                               [--constructions auto,orbitals]
                               [--xc lda,vwn] [--xc pbe] [--basis sto-3g] [--basis 6-31g]
                               [--relax-steps 1,2] [--geometries 4] [--smearing 0] [--newton J,full]
                               [--from-step 1] [--early shift:0.3:4,damp:0.5:3]
                               [--coarse 1:1e-6,3:1e-5] [--adiis] [--root DIR]

One campaign of ``--steps`` neutral Li insertions into a flake (default: a benzene bilayer, 24
atoms; the issue's coronene bilayer is ``--shells 2``, ~700 s per single point on two cores)
gives the structures (LDA/STO-3G, fresh guesses, relaxation off; ``--placement-engine tblite``:
GFN2-xTB, for hosts where a DFT campaign would take hours). For each functional, basis
and guest mode the structures are then solved again, SCF only, through the engine's SCF driver
(DIIS, maximum overlap for open shells, the Newton fallback): step n with n guests and charge 0
(neutral) or +n (cation, every Li a Li⁺), from PySCF's fresh guess (cold) and, for n ≥ 1, from
the cold solution of step n − 1 with each construction of
:data:`ionwell.engines.pyscf_engine.WARM_CONSTRUCTIONS` asked for (``--constructions``;
``auto`` is the engine's choice: neutral atoms for ions, orbitals otherwise).

Diagnostics say where the iterations go, per guess: ``distance`` = ‖D₀ − D‖ (Frobenius,
AO basis) between the guess and the converged density, ``distance_orthonormal`` =
‖S^½ (D₀ − D) S^½‖, the same in Löwdin-orthonormalised AOs (S the overlap matrix; the AO
figure grows where the basis is nearly linearly dependent, as with 6-31G on Li atoms 1.75-2.1 Å
from C and each other: 32 in AOs against 1.8 orthonormalised at one benzene step), and
``first_cycle_eV`` = the energy after one diagonalisation of the guess's Fock matrix minus the
converged energy (what the SCF's first cycle sees); ``response`` = ‖D_host,n − D_{n−1}‖ is how
much the new guest changed the density of the atoms that were already there (what no guess
from step n − 1 holds).

Across one insertion the guess changes; within a step's relaxation the atoms stay and every
geometry starts from the previous geometry's orbitals (always on in the engine). For steps
``--relax-steps`` the bench runs ``--geometries`` BFGS geometries of the guests (host fixed)
and solves each geometry again from the fresh guess: iterations warm (previous geometry) vs
cold at the same geometries.

``--newton J,full`` (closed shells: the Li⁺ mode) also starts each warm guess's SCF after one Newton
step: the orbital rotation that makes the linearised Fock matrix block-diagonal, solved by
preconditioned conjugate gradients, with the Hartree kernel only (``+newton(J)``: density-fitted
J builds) and with PySCF's full linear-response kernel (``+newton(full)``, ``gen_response``).
It asks whether a better guess from the previous step could reach the target at all: the
exact linear response of the host to the new ion is what no construction holds.

``--early KIND:VALUE:CYCLES,...`` also solves each warm guess with a level shift (``shift``,
hartree, added to the empty levels) or Fock damping (``damp``, the fraction of the previous
cycle's Fock matrix kept; DIIS starts after it) during its first CYCLES cycles only: does
holding the new ion's first, far-off Fock matrices back let DIIS start from a better point?

``--coarse LEVEL:TOL,...`` also solves each step in two stages, from the warm guess and from
the fresh one: first on PySCF's integration grid LEVEL (0-9; the engine's default is 3) to
an energy tolerance of TOL hartree, then with the engine's settings from that density. Its rows
count the second stage's cycles as ``iterations`` (``coarse_iterations`` beside them) and both
stages in ``seconds``. ``3:1e-5`` (the same grid, a looser tolerance) measures how many
cycles a new SCF needs from a density that is already nearly converged.

``--adiis`` also solves each step from the fresh guess and from each warm guess with ADIIS+DIIS
(Hu and Yang's combination, published 2010) in place of the engine's DIIS: the Fock matrix of
ADIIS (the convex combination of the past Fock matrices that minimises a quadratic model of
the energy) while the largest element of the DIIS error vector exceeds 0.1, plain DIIS below
1e-4, a linear blend between. ADIIS is built for starts far from convergence, as the warm
guess's first Fock matrices are on coronene. Its rows are ``fresh+adiis`` and ``<construction>+adiis``,
both against the plain cold SCF.

Prints one JSON line per SCF comparison and, per functional, basis and mode, the median
ratios warm/cold. ``--root`` keeps the campaign there and reuses it, and keeps each step's cold
solution under ``sources/`` (named by a digest of the settings, structure and charge):
``--from-step K`` takes step K − 1's from there when an earlier run solved it, so a long series
(a coronene bilayer at 6-31G, ~20-40 min per SCF) can be measured a step or two per sitting.
Run by hand; not a test.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import yaml
from ase.constraints import FixAtoms
from ase.io import read
from ase.optimize import BFGS
from ase.units import Hartree
from pyscf.lo import orth
from pyscf.scf import chkfile, hf, uhf
from pyscf.scf import diis as scf_diis

from ionwell.config.campaign import PyscfEngineConfig
from ionwell.engines.pyscf_engine import (
    WARM_AUTO,
    WARM_CONSTRUCTIONS,
    PyscfCalculator,
    _KohnSham,
    build_mol,
    warm_start_guess,
)


def _structures(root: Path, args: argparse.Namespace) -> list:
    """Run (or reuse) the campaign; returns the structures of steps 0..``--steps``."""
    engine = (
        {"kind": "pyscf", "xc": "lda,vwn", "basis": "sto-3g", "threads": 2}
        if args.placement_engine == "pyscf"
        else {"kind": "tblite", "threads": 2}
    )
    tag = "lda_vwn-sto-3g" if args.placement_engine == "pyscf" else "gfn2"
    name = f"warm-{args.layers}x{args.shells}-{tag}"
    steps = root / "campaigns" / name / "steps"
    inputs = [steps / f"{n:04d}" / "engine" / "input.extxyz" for n in range(args.steps + 1)]
    if not all(p.is_file() for p in inputs):
        cfg = {
            "name": name,
            "seed": 1,
            "host": {"builder": {"layers": args.layers, "shells": args.shells, "spacing": 3.6}},
            "guest": {"element": "Li", "charge_mode": "neutral"},
            "engine": engine,
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


def _solve(
    mol, cfg: PyscfEngineConfig, guess, label: str | None = None, ks: _KohnSham | None = None
) -> _KohnSham:
    """One SCF through the engine's driver ``ks`` (None: a plain one) from ``guess`` (None:
    PySCF's fresh guess)."""
    ks = ks or _KohnSham(mol, cfg)
    ks.dm = guess
    if label is not None:
        ks.guess = label
    if not ks.scf().converged:
        print(json.dumps({"warning": "SCF not converged"}), flush=True)
    return ks


class _EarlyKohnSham(_KohnSham):
    """The engine's SCF driver with a level shift (``shift``, hartree) or Fock damping
    (``damp``, fraction kept) during the first ``cycles`` cycles of each DIIS run only."""

    def __init__(self, mol, cfg: PyscfEngineConfig, kind: str, value: float, cycles: int):
        super().__init__(mol, cfg)
        self.early = (kind, value, cycles)

    def _diis(self, mf, dm0, stall: bool = True) -> tuple[bool, int]:
        kind, value, cycles = self.early
        plain = mf.get_fock

        def get_fock(h1e=None, s1e=None, vhf=None, dm=None, cycle=-1, diis=None, **kwargs):
            if 0 <= cycle < cycles:
                if kind == "shift":
                    kwargs["level_shift_factor"] = value
                else:  # damping acts before DIIS starts only (PySCF's get_fock)
                    kwargs.update(damp_factor=value, diis_start_cycle=cycles + 1)
            return plain(h1e, s1e, vhf, dm, cycle, diis, **kwargs)

        mf.get_fock = get_fock
        return super()._diis(mf, dm0, stall)


class _AdiisDiis(scf_diis.CDIIS):
    """ADIIS+DIIS: ADIIS's Fock matrix while the largest element of the DIIS error vector is
    above ``HIGH``, DIIS's below ``LOW``, blended linearly between (the thresholds 0.1 and
    1e-4 of Hu and Yang's paper, J. Chem. Phys. 132, 054109 (2010), from memory). The DIIS
    history is PySCF's CDIIS; the ADIIS one the last ``space`` (density, Fock) pairs."""

    HIGH, LOW = 0.1, 1e-4

    def update(self, s, d, f, *args, **kwargs):
        pairs = getattr(self, "_pairs", [])
        self._pairs = [*pairs, (np.asarray(d), np.asarray(f))][-self.space :]
        err = float(np.abs(scf_diis.get_err_vec(s, d, f, self.Corth)).max())
        f_diis = scf_diis.CDIIS.update(self, s, d, f)
        if err < self.LOW:
            return f_diis
        ds = np.array([p[0] for p in self._pairs])
        fs = np.array([p[1] for p in self._pairs])
        _, c = scf_diis.adiis_minimize(ds, fs, len(ds) - 1)
        f_adiis = np.einsum("i,i...->...", c, fs)
        if err > self.HIGH:
            return f_adiis
        w = (err - self.LOW) / (self.HIGH - self.LOW)
        return w * f_adiis + (1 - w) * f_diis


class _AdiisKohnSham(_KohnSham):
    """The engine's SCF driver with ADIIS+DIIS (:class:`_AdiisDiis`) in place of DIIS."""

    def _diis(self, mf, dm0, stall: bool = True) -> tuple[bool, int]:
        mf.DIIS = _AdiisDiis
        return super()._diis(mf, dm0, stall)


def _colon_items(spec: str, fields: str, types: tuple, check) -> list[tuple]:
    """Comma-separated ``a:b:...`` items of ``spec`` converted by ``types`` (``fields`` names
    them); ``check(values)`` returns what is wrong with an item, or None."""
    out = []
    for item in (i for i in spec.split(",") if i):
        parts = item.split(":")
        try:
            if len(parts) != len(types):
                raise ValueError
            values = tuple(t(v) for t, v in zip(types, parts, strict=True))
        except ValueError:
            raise argparse.ArgumentTypeError(f"{item!r}: expected {fields}") from None
        problem = check(values)
        if problem:
            raise argparse.ArgumentTypeError(f"{item!r}: {problem}")
        out.append(values)
    return out


def _early_variants(spec: str) -> list[tuple[str, float, int]]:
    """``shift:0.3:4,damp:0.5:3`` → [("shift", 0.3, 4), ("damp", 0.5, 3)] (``--early``)."""
    return _colon_items(
        spec,
        "KIND:VALUE:CYCLES",
        (str, float, int),
        lambda v: None if v[0] in ("shift", "damp") else "KIND must be shift or damp",
    )


def _coarse_variants(spec: str) -> list[tuple[int, float]]:
    """``1:1e-6,3:1e-5`` → [(1, 1e-6), (3, 1e-5)] (``--coarse``: grid level, tolerance)."""
    return _colon_items(
        spec,
        "LEVEL:TOL",
        (int, float),
        lambda v: (
            None if 0 <= v[0] <= 9 and 0 < v[1] < 1e-2 else "LEVEL 0-9, TOL in (0, 1e-2) hartree"
        ),
    )


def _coarse_then_full(mol, cfg: PyscfEngineConfig, guess, level: int, tol: float):
    """SCF on grid ``level`` to ``tol`` (hartree) from ``guess``, then with ``cfg``'s settings
    from its density; returns the two drivers (coarse, full)."""
    coarse = _solve(mol, cfg.model_copy(update={"grid_level": level, "conv_tol": tol}), guess)
    return coarse, _solve(mol, cfg, coarse.dm)


def _source_path(root: Path, cfg: PyscfEngineConfig, mode: str, atoms, charge: int) -> Path:
    """Where the cold solution of one step is kept: named by the mode and a digest of the
    engine settings (but the thread count), the structure and the charge, so a later run
    (``--from-step``) reuses it as its warm source only when all of them are the same."""
    digest = hashlib.sha256()
    digest.update(cfg.model_dump_json(exclude={"threads"}).encode())  # threads: same answer
    digest.update(np.ascontiguousarray(atoms.numbers, dtype=np.int64).tobytes())
    digest.update(np.round(np.asarray(atoms.positions, dtype=float), 8).tobytes())
    digest.update(str(charge).encode())
    return root / "sources" / f"{mode}-{len(atoms)}-{digest.hexdigest()[:16]}.chk"


def _chk_density(path: Path) -> np.ndarray:
    """The density matrix of the SCF kept in checkpoint ``path`` (both spins for UKS)."""
    scf = chkfile.load(str(path), "scf")
    coeff, occ = np.asarray(scf["mo_coeff"]), np.asarray(scf["mo_occ"])
    return (hf if coeff.ndim == 2 else uhf).make_rdm1(coeff, occ)


def _total(dm: np.ndarray) -> np.ndarray:
    return dm if dm.ndim == 2 else dm[0] + dm[1]


def _diagnostics(ks: _KohnSham, dm0) -> dict[str, float]:
    """How far a guess ``dm0`` (None: PySCF's fresh guess) is from ``ks``'s converged state:
    Frobenius distance of the densities in AOs and in orthonormalised AOs, and the energy after
    one diagonalisation (eV)."""
    mf = ks._new_mf(ks.mol)
    if dm0 is None:
        dm0 = mf.get_init_guess(ks.mol, "minao")
    dm0 = np.asarray(dm0)
    s = mf.get_ovlp()
    e, c = mf.eig(mf.get_fock(dm=dm0), s)
    dm1 = mf.make_rdm1(c, mf.get_occ(e, c))
    s_half = s @ orth.lowdin(s)  # S^½ = S S^-½, PySCF's Löwdin S^-½ as in ionwell.science.charges
    diff = _total(dm0) - _total(ks.dm)
    return {
        "distance": round(float(np.linalg.norm(diff)), 3),
        "distance_orthonormal": round(float(np.linalg.norm(s_half @ diff @ s_half)), 3),
        "first_cycle_eV": float(f"{(mf.energy_tot(dm1) - ks.mf.e_tot) * Hartree:.3e}"),
    }


def _relaxation(atoms, charge: int, cfg: PyscfEngineConfig, n_guests: int, geometries: int):
    """Warm (previous geometry) vs cold SCF iterations over ``geometries`` BFGS geometries of
    the last ``n_guests`` atoms; returns (warm iterations, cold iterations) per geometry."""
    mol = build_mol(atoms, cfg.basis, charge)
    ks = _KohnSham(mol, cfg)
    a = atoms.copy()
    a.set_constraint(FixAtoms(indices=list(range(len(a) - n_guests))))
    a.calc = PyscfCalculator(ks)
    warm, cold, positions = [], [], []

    def record() -> None:
        warm.append(ks.iterations)
        positions.append(a.positions.copy())

    opt = BFGS(a, logfile=None, maxstep=0.2)
    opt.attach(record, interval=1)
    opt.run(fmax=1e-3, steps=geometries - 1)
    for pos in positions[1:]:  # the first geometry has no previous one
        mol_g = build_mol(a.copy(), cfg.basis, charge)
        mol_g.set_geom_(pos, unit="Angstrom")
        cold.append(_solve(mol_g, cfg, None).iterations)
    return warm[1:], cold


def _newton_step(ks: _KohnSham, dm: np.ndarray, kernel: str, maxit: int = 12):
    """One Newton step from the closed-shell density ``dm``: rotate its occupied orbitals by
    the κ solving (ε_a − ε_i) κ + C_vᵀ δV[δD(κ)] C_o = −g (semicanonical orbitals of F[dm],
    g = C_vᵀ F C_o, δD = 2 (C_v κ C_oᵀ + h.c.)), δV the Hartree (``J``) or the full (``full``)
    linear response. Returns (new density, CG iterations, seconds, smallest ε_a − ε_i)."""
    import scipy.linalg

    t0 = time.perf_counter()
    mol = ks.mol
    mf = ks._new_mf(mol)
    s = mf.get_ovlp()
    w, c = scipy.linalg.eigh(s @ dm @ s, s)  # natural orbitals, occupations w
    c = c[:, np.argsort(-w)]
    nocc = mol.nelectron // 2
    co, cv = c[:, :nocc], c[:, nocc:]
    f = mf.get_fock(dm=dm)
    eo, uo = np.linalg.eigh(co.T @ f @ co)
    ev, uv = np.linalg.eigh(cv.T @ f @ cv)
    co, cv = co @ uo, cv @ uv
    g = cv.T @ f @ co
    gap = ev[:, None] - eo[None, :]
    if kernel == "full":
        occ = np.r_[np.full(nocc, 2.0), np.zeros(cv.shape[1])]
        vresp = mf.gen_response(mo_coeff=np.hstack([co, cv]), mo_occ=occ, hermi=1)
    else:

        def vresp(d: np.ndarray) -> np.ndarray:
            return mf.get_j(dm=d)

    def hess(k: np.ndarray) -> np.ndarray:
        ddm = 2.0 * cv @ k @ co.T
        return gap * k + cv.T @ vresp(ddm + ddm.T) @ co

    x = -g / gap
    r = -g - hess(x)
    z = r / gap
    p, rz, n = z.copy(), float(np.vdot(r, z)), 0
    for n in range(1, maxit + 1):  # noqa: B007
        ap = hess(p)
        alpha = rz / float(np.vdot(p, ap))
        x += alpha * p
        r -= alpha * ap
        if np.linalg.norm(r) < 1e-4 * np.linalg.norm(g):
            break
        z = r / gap
        rz_new = float(np.vdot(r, z))
        p, rz = z + rz_new / rz * p, rz_new
    c1 = co + cv @ x
    lam, u = np.linalg.eigh(c1.T @ s @ c1)
    c1 = c1 @ (u * lam**-0.5) @ u.T
    return 2.0 * c1 @ c1.T, n, time.perf_counter() - t0, float(gap.min())


def _median(values: list[float]) -> float | None:
    return round(statistics.median(values), 2) if values else None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--shells", type=int, default=1)
    ap.add_argument("--steps", type=int, default=4)
    ap.add_argument("--modes", default="neutral,cation")
    ap.add_argument("--xc", action="append", help="functional(s), repeatable (default lda,vwn)")
    ap.add_argument("--basis", action="append", help="basis set(s), repeatable (default sto-3g)")
    ap.add_argument(
        "--constructions",
        default="auto,orbitals",
        help=f"warm guesses, comma-separated, of {(WARM_AUTO, *WARM_CONSTRUCTIONS)} "
        "(auto: the engine's choice)",
    )
    ap.add_argument("--relax-steps", default="1,2", help="steps whose relaxation is measured")
    ap.add_argument("--geometries", type=int, default=4, help="geometries per relaxation")
    ap.add_argument("--smearing", type=float, default=0.0, help="Fermi smearing, eV (0: none)")
    ap.add_argument(
        "--placement-engine",
        choices=("pyscf", "tblite"),
        default="pyscf",
        help="engine of the campaign that places the guests (tblite: GFN2-xTB, for large hosts)",
    )
    ap.add_argument(
        "--newton",
        default="",
        help="also one Newton step with these kernels (J, full; comma-separated; closed shells)",
    )
    ap.add_argument(
        "--from-step",
        type=int,
        default=1,
        help="first step with a warm-vs-cold row (earlier steps are skipped; step K-1 is the "
        "warm source: its cold solution kept under ROOT/sources by an earlier run with the same "
        "structure and settings, else solved cold; to add steps to a series measured before)",
    )
    ap.add_argument(
        "--early",
        type=_early_variants,
        default=[],
        help="also each warm guess with a level shift or damping for its first cycles: "
        "KIND:VALUE:CYCLES, comma-separated, KIND shift (hartree) or damp (fraction kept)",
    )
    ap.add_argument(
        "--coarse",
        type=_coarse_variants,
        default=[],
        help="also each step in two stages, from the warm and the fresh guess: an SCF on grid "
        "LEVEL to TOL hartree, then the engine's: LEVEL:TOL, comma-separated",
    )
    ap.add_argument(
        "--adiis",
        action="store_true",
        help="also each step from the fresh and each warm guess with ADIIS+DIIS",
    )
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--root", type=Path, default=None, help="keep (and reuse) campaigns here")
    args = ap.parse_args()
    constructions = [c for c in args.constructions.split(",") if c]
    known = (WARM_AUTO, *WARM_CONSTRUCTIONS)
    unknown = set(constructions) - set(known)
    if unknown:
        ap.error(f"--constructions: unknown {sorted(unknown)}; choose from {known}")
    relax_steps = {int(s) for s in args.relax_steps.split(",") if s}
    with tempfile.TemporaryDirectory() as tmp:
        root = args.root or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        structures = _structures(root, args)
        for xc in args.xc or ["lda,vwn"]:
            for basis in args.basis or ["sto-3g"]:
                cfg = PyscfEngineConfig(
                    xc=xc, basis=basis, smearing=args.smearing, threads=args.threads
                )
                for mode in args.modes.split(","):
                    _series(structures, cfg, mode, constructions, relax_steps, args, root)


def _series(structures, cfg, mode, constructions, relax_steps, args, root: Path) -> None:
    """Steps 0..n of one functional, basis and guest mode; prints rows and the medians."""
    tag = {"mode": mode, "xc": cfg.xc, "basis": cfg.basis, "smearing": cfg.smearing}
    # constructions first, so the summary lists them even without a warm row
    ratios: defaultdict[str, list[float]] = defaultdict(list, {c: [] for c in constructions})
    times: defaultdict[str, list[float]] = defaultdict(list, {c: [] for c in constructions})
    worst: defaultdict[str, float] = defaultdict(float, {c: 0.0 for c in constructions})
    relax_ratios: list[float] = []

    def record(
        key: str,
        step: int,
        cold: tuple[int, float, float],
        its: int,
        secs: float,
        e: float,
        **fields,
    ) -> None:
        """Add one warm SCF (``its`` cycles, ``secs`` s, energy ``e`` eV) against the step's
        ``cold`` one (cycles, s, eV) to the medians of ``key`` and print its row with ``fields``."""
        it_c, t_c, e_c = cold
        ratios[key].append(its / it_c)
        times[key].append(secs / t_c)
        worst[key] = max(worst[key], abs(e - e_c))
        print(json.dumps({
            **tag, "step": step, "construction": key, **fields, "iterations": its,
            "seconds": round(secs, 2), "ratio": round(its / it_c, 2),
            "time_ratio": round(secs / t_c, 2), "energy_minus_cold_eV": float(f"{e - e_c:.2e}"),
        }), flush=True)  # fmt: skip

    chk_prev = None
    dm_prev = None
    for n, atoms in enumerate(structures):
        if n < args.from_step - 1:
            continue
        charge = 0 if mode == "neutral" else n
        mol = build_mol(atoms, cfg.basis, charge)
        source = _source_path(root, cfg, mode, atoms, charge)
        if n == args.from_step - 1 and source.is_file():
            # the warm source of the first measured step, kept by an earlier run of the same
            # structure and settings: no row of its own, so no need to solve it again
            chk_prev, dm_prev = source, _total(_chk_density(source))
            print(json.dumps({**tag, "step": n, "warm_source": str(source)}), flush=True)
            continue
        ks = _solve(mol, cfg, None)
        mf = ks.mf  # kept at once, so a run stopped during this step's warm SCFs keeps it
        source.parent.mkdir(parents=True, exist_ok=True)
        source.unlink(missing_ok=True)
        chkfile.dump_scf(mf.mol, str(source), mf.e_tot, mf.mo_energy, mf.mo_coeff, mf.mo_occ)
        it_c, t_c, e_c = ks.iterations, ks.scf_seconds, float(ks.mf.e_tot) * Hartree
        row = {**tag, "step": n, "atoms": len(atoms), "spin": mol.spin,
               "cold_iterations": it_c, "cold_seconds": round(t_c, 2), "cold_solver": ks.solver,
               "cold_guess": _diagnostics(ks, None)}  # fmt: skip
        if dm_prev is not None:
            nao_prev = dm_prev.shape[-1]
            row["response"] = round(
                float(np.linalg.norm(_total(ks.dm)[:nao_prev, :nao_prev] - dm_prev)), 3
            )
        print(json.dumps(row), flush=True)
        cold_run = (it_c, t_c, e_c)
        warm_guesses = {}  # construction → guess, for --coarse
        for c in constructions if chk_prev is not None else ():
            dm0, label = warm_start_guess(mol, chk_prev, mol.spin != 0, c)
            warm_guesses[c] = dm0
            w = _solve(mol, cfg, dm0, label)
            record(
                c,
                n,
                cold_run,
                w.iterations,
                w.scf_seconds,
                float(w.mf.e_tot) * Hartree,
                guess=w.guess,
                solver=w.solver,
                warm_guess=_diagnostics(ks, dm0),
            )
            for kind, value, cycles in args.early:
                key = f"{c}+{kind}({value:g}x{cycles})"
                ks_e = _solve(mol, cfg, dm0, ks=_EarlyKohnSham(mol, cfg, kind, value, cycles))
                record(
                    key,
                    n,
                    cold_run,
                    ks_e.iterations,
                    ks_e.scf_seconds,
                    float(ks_e.mf.e_tot) * Hartree,
                    solver=ks_e.solver,
                )
            for kernel in [k for k in args.newton.split(",") if k] if mol.spin == 0 else ():
                dm1, n_cg, t_cg, gap = _newton_step(w, dm0, kernel)
                v = _solve(mol, cfg, dm1, f"{label} + Newton step ({kernel})")
                # cost: the Fock build of the step plus the SCF after it
                record(
                    f"{c}+newton({kernel})",
                    n,
                    cold_run,
                    v.iterations + 1,
                    v.scf_seconds + t_cg,
                    float(v.mf.e_tot) * Hartree,
                    cg_iterations=n_cg,
                    step_seconds=round(t_cg, 2),
                    smallest_gap_eV=round(gap * Hartree, 3),
                    guess_after_step=_diagnostics(ks, dm1),
                )
        for start, guess in [*warm_guesses.items(), ("fresh", None)] if warm_guesses else ():
            if args.adiis:
                a = _solve(mol, cfg, guess, ks=_AdiisKohnSham(mol, cfg))
                record(
                    f"{start}+adiis",
                    n,
                    cold_run,
                    a.iterations,
                    a.scf_seconds,
                    float(a.mf.e_tot) * Hartree,
                    solver=a.solver,
                )
            for level, tol in args.coarse:
                coarse, full = _coarse_then_full(mol, cfg, guess, level, tol)
                record(
                    f"{start}+coarse({level},{tol:g})",
                    n,
                    cold_run,
                    full.iterations,
                    coarse.scf_seconds + full.scf_seconds,
                    float(full.mf.e_tot) * Hartree,
                    coarse_iterations=coarse.iterations,
                    coarse_seconds=round(coarse.scf_seconds, 2),
                    coarse_minus_cold_eV=float(f"{(coarse.mf.e_tot * Hartree) - e_c:.2e}"),
                )
        if n in relax_steps and n >= 1 and args.geometries > 1:
            warm, cold = _relaxation(atoms, charge, cfg, n, args.geometries)
            relax_ratios += [w / c for w, c in zip(warm, cold, strict=True)]
            print(json.dumps({**tag, "step": n, "relaxation": True,
                              "warm_iterations": warm, "cold_iterations": cold}), flush=True)  # fmt: skip
        chk_prev = source
        dm_prev = _total(ks.dm)
    summary = {**tag, "relaxation_median_ratio": _median(relax_ratios)}
    for c in ratios:
        summary[c] = {
            "median_ratio": _median(ratios[c]),
            "median_time_ratio": _median(times[c]),
            "max_abs_energy_diff_eV": float(f"{worst[c]:.2e}"),
        }
    print(json.dumps({"summary": summary}), flush=True)


if __name__ == "__main__":
    main()
