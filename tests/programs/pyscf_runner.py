"""A stand-in for an external electronic-structure program, for the command-engine tests.

It is a real DFT code (PySCF) behind a file interface, the way ionwell meets Fortran codes on
clusters: it reads a plain-text input, writes a text log, a checkpoint it can restart from, and
the electrostatic potential as a Gaussian cube in atomic units (pyscf.tools.cubegen.mep).

    python pyscf_runner.py job.inp

Input (keywords one per line, then the geometry block in Å):

    charge 1
    spin 0
    restart yes|no          # yes: initial guess from runner.chk when it exists
    basis sto-3g
    xc lda,vwn
    grid_level 1
    max_cycle 50            # SCF cycles at most (PySCF's default 50)
    stop_unconverged no     # yes: exit with status 1 after an unconverged SCF (as pw.x does)
    spacing 0.4             # cube spacing, Å
    margin 3.0              # cube margin around the atoms, Å
    geometry
    C 0.0 0.0 0.0
    ...
    end

Environment: RUNNER_DELAY (seconds to sleep after each SCF iteration, so a test can kill the
program mid-run; with RUNNER_DELAY_STEP=N only when the input's ``step`` line says N); RUNNER_FAIL=nan|truncate|noenergy|noconverge (write a damaged output, for the
error tests); RUNNER_EXCITE=restart (a closed shell restarted from runner.chk ends in a real excited
state: the HOMO's pair moved into the LUMO and kept there by the maximum overlap method, PySCF's
scf.addons.mom_occ, the way a restart can leave a code's minimiser at a saddle point).

The log ends with each spin channel's ``gap`` (lowest empty minus highest filled orbital energy,
hartree; negative in an excited state).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np
from pyscf import dft, gto, lib
from pyscf.tools import cubegen

BOHR = 0.52917721092  # Å per bohr (CODATA 2010, as PySCF uses)


def _parse(path: Path) -> tuple[dict[str, str], list[tuple[str, tuple[float, float, float]]]]:
    keys: dict[str, str] = {}
    atoms = []
    in_geom = False
    for raw in path.read_text().splitlines():
        line = raw.split("#")[0].strip()
        if not line:
            continue
        if line == "geometry":
            in_geom = True
        elif line == "end":
            in_geom = False
        elif in_geom:
            s, x, y, z = line.split()
            atoms.append((s, (float(x), float(y), float(z))))
        else:
            k, _, v = line.partition(" ")
            keys[k] = v.strip()
    return keys, atoms


def write_mep(mol, dm, spacing: float, margin: float, out: str = "potential.cube") -> None:
    """The molecular electrostatic potential (hartree/e) on the box the input asks for: the
    atoms' bounding box plus ``margin`` Å on each side, whole ``spacing`` Å steps, centred —
    evaluated as pyscf.tools.cubegen.mep does (nuclei minus the density's potential)."""
    from pyscf import df

    coords = mol.atom_coords() * BOHR  # Å
    lo, hi = coords.min(axis=0), coords.max(axis=0)
    n = np.ceil((hi - lo + 2 * margin) / spacing - 1e-9).astype(int) + 1
    origin = (lo + hi) / 2 - (n - 1) / 2 * spacing
    cc = cubegen.Cube(mol, *n, origin=origin / BOHR, extent=(n - 1) * spacing / BOHR)
    points = cc.get_coords()
    v_nuc = np.zeros(len(points))
    for i in range(mol.natm):
        r = np.linalg.norm(points - mol.atom_coord(i), axis=1)
        v_nuc += mol.atom_charge(i) / np.maximum(r, 1e-2)
    dm = np.asarray(dm)
    if dm.ndim == 3:  # unrestricted: total density
        dm = dm[0] + dm[1]
    v_ele = np.empty_like(v_nuc)
    for p0, p1 in lib.prange(0, len(points), 600):
        fakemol = gto.fakemol_for_charges(points[p0:p1])
        ints = df.incore.aux_e2(mol, fakemol)
        v_ele[p0:p1] = np.einsum("ijp,ij->p", ints, dm)
    cc.write((v_nuc - v_ele).reshape(cc.nx, cc.ny, cc.nz), out, "electrostatic potential")


def main() -> int:
    keys, atoms = _parse(Path(sys.argv[1]))
    fail = os.environ.get("RUNNER_FAIL", "")
    delay = float(os.environ.get("RUNNER_DELAY", "0"))
    only = os.environ.get("RUNNER_DELAY_STEP")
    if only is not None and keys.get("step") != only:
        delay = 0.0
    mol = gto.M(
        atom=atoms,
        unit="Angstrom",
        basis=keys.get("basis", "sto-3g"),
        charge=int(keys.get("charge", 0)),
        spin=int(keys.get("spin", 0)),
        verbose=0,
    )
    mf = dft.RKS(mol) if mol.spin == 0 else dft.UKS(mol)
    mf.xc = keys.get("xc", "lda,vwn")
    mf.grids.level = int(keys.get("grid_level", 3))
    mf.conv_tol = 1e-9
    mf.max_cycle = int(keys.get("max_cycle", 50))
    mf.chkfile = "runner.chk"
    print(f"pyscf-runner (PySCF {lib.__version__ if hasattr(lib, '__version__') else ''})")
    print(f"{mol.natm} atoms, charge {mol.charge}, 2S {mol.spin}", flush=True)

    dm0 = None
    if keys.get("restart") == "yes" and Path("runner.chk").is_file():
        dm0 = mf.from_chk("runner.chk")
        print("restart: initial guess from runner.chk", flush=True)
    else:
        print("initial guess: superposition of atoms", flush=True)

    def each(env: dict) -> None:
        print(f"iteration {env['cycle'] + 1} energy {env['e_tot']:.10f}", flush=True)
        if delay:
            time.sleep(delay)

    mf.callback = each
    e = mf.kernel(dm0=dm0)
    if os.environ.get("RUNNER_EXCITE") == "restart" and dm0 is not None and mol.spin == 0:
        from pyscf import scf

        print("exciting: HOMO pair into the LUMO (maximum overlap method)", flush=True)
        nocc = mol.nelectron // 2
        occ = (mf.mo_occ / 2).copy()
        occ[nocc - 1], occ[nocc] = 0.0, 1.0
        coeff, setocc = np.array([mf.mo_coeff] * 2), np.array([occ] * 2)
        excited = dft.UKS(mol)
        excited.xc, excited.grids.level, excited.conv_tol = mf.xc, mf.grids.level, mf.conv_tol
        excited.callback = each
        mf = scf.addons.mom_occ(excited, coeff, setocc)
        e = mf.kernel(dm0=mf.make_rdm1(coeff, setocc))
    if mf.converged and fail != "noconverge":
        print("SCF converged", flush=True)
    else:
        print("SCF did not converge", flush=True)
        if keys.get("stop_unconverged") == "yes":
            sys.exit(1)
    if fail == "nan":
        print("total energy nan hartree")
    elif fail != "noenergy":
        print(f"total energy {e:.12f} hartree")
    charges = mf.mulliken_pop(verbose=0)[1]
    for i, (s, q) in enumerate(zip(mol.elements, charges, strict=True)):
        print(f"atom {i:4d} {s:<3s} charge {q: .6f}")
    meta = mf.mulliken_meta(verbose=0)[1]  # meta-Lowdin charges, a second scheme
    for i, (s, q) in enumerate(zip(mol.elements, meta, strict=True)):
        print(f"atom {i:4d} {s:<3s} meta-lowdin {q: .6f}")
    occ = np.asarray(mf.mo_occ).reshape(-1, mol.nao_nr())
    ene = np.asarray(mf.mo_energy).reshape(-1, mol.nao_nr())
    homo = max(float(ene[c][occ[c] > 0].max()) for c in range(len(occ)))
    print(f"homo {homo:.10f} hartree")
    for c in range(len(occ)):
        if (occ[c] > 0).any() and (occ[c] == 0).any():
            gap = float(ene[c][occ[c] == 0].min() - ene[c][occ[c] > 0].max())
            print(f"gap {gap:.10f} hartree")

    write_mep(mol, mf.make_rdm1(), float(keys.get("spacing", 0.3)), float(keys.get("margin", 3.0)))
    if fail == "truncate":
        text = Path("potential.cube").read_text().splitlines()
        Path("potential.cube").write_text("\n".join(text[: len(text) // 2]) + "\n")
    print("done", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
