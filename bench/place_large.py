"""`ionwell place` on a large map: wall time and peak memory against atom count and envelope.

    python bench/place_large.py [--points N] [--atoms 1000,5000] [--within 3,10,100]

A 200³ grid (8 million points, 0.2 Å, a 40 Å box) holding a chunk of AB graphite of 1,000 or
5,000 atoms (the atoms nearest the box's centre), and a smooth invented potential (a demo
field, not physics). Each case runs `ionwell place MAP --structure ATOMS --within W --json`
as its own process: wall time (median of --repeat runs) and the process's peak resident
memory (ru_maxrss of the child). Also the union-of-spheres mask alone, in process, by the
method the dispatcher picks. Run by hand; not a test. Prints one JSON line per case.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from ase.io import write
from ase.lattice.hexagonal import Graphite

from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid, sphere_mask

try:  # absent before the union-of-spheres module (to time the old code for comparison)
    from ionwell.science.spheres import LINE_BUDGET, line_cost
except ImportError:
    LINE_BUDGET, line_cost = None, None


def _host(n_atoms: int, box: float) -> np.ndarray:
    bulk = Graphite("C", latticeconstant={"a": 2.46, "c": 6.70}, size=(20, 20, 7))
    bulk.center()
    middle = bulk.positions.mean(axis=0)
    order = np.argsort(np.linalg.norm(bulk.positions - middle, axis=1))
    chosen = bulk[order[:n_atoms]]
    chosen.positions += box / 2 - chosen.positions.mean(axis=0)
    chosen.cell, chosen.pbc = None, False
    return chosen


def _child(argv: list[str]) -> tuple[float, float]:
    """Wall seconds and peak resident memory (MB) of one child process (its own rusage)."""
    with tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=err)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t0
        proc.returncode = os.waitstatus_to_exitcode(status)
        if proc.returncode != 0:
            err.seek(0)
            raise SystemExit(f"{' '.join(argv)} failed:\n{err.read().decode()[-2000:]}")
    return wall, usage.ru_maxrss / 1024  # kB on Linux


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=200, help="points per axis")
    ap.add_argument("--atoms", default="1000,5000")
    ap.add_argument("--within", default="3,10,100")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    n, spacing = args.points, 0.2
    box = n * spacing
    x = np.arange(n) * spacing
    gx, gy, gz = np.meshgrid(x, x, x, indexing="ij", sparse=True)
    values = (np.sin(gx * 1.3) * np.cos(gy * 1.1) + 0.5 * np.sin(gz * 0.9)).astype(np.float32)
    grid = Grid(np.zeros(3), np.eye(3) * spacing, values)
    with tempfile.TemporaryDirectory() as tmp:
        mapfile = Path(tmp) / "map.npz"
        save_npz(mapfile, grid)
        for n_atoms in (int(a) for a in args.atoms.split(",")):
            host = _host(n_atoms, box)
            structure = Path(tmp) / f"host{n_atoms}.extxyz"
            write(structure, host)
            for within in (float(w) for w in args.within.split(",")):
                t0 = time.perf_counter()
                mask = sphere_mask(grid, host.positions, within)
                t_mask = time.perf_counter() - t0
                argv = [sys.executable, "-m", "ionwell.cli", "place", str(mapfile),
                        "--structure", str(structure), "--within", str(within), "--json"]  # fmt: skip
                runs = [_child(argv) for _ in range(args.repeat)]
                method = "lines (before clipping)"
                if line_cost is not None:
                    cheap = line_cost(grid, n_atoms, within) <= LINE_BUDGET
                    method = "lines" if cheap else "blocks"
                print(json.dumps({
                    "points": n**3, "atoms": n_atoms, "within": within, "method": method,
                    "mask_s": round(t_mask, 3), "covered": round(float(mask.mean()), 4),
                    "place_wall_s": round(statistics.median(r[0] for r in runs), 2),
                    "place_peak_mb": round(max(r[1] for r in runs)),
                }), flush=True)  # fmt: skip


if __name__ == "__main__":
    main()
