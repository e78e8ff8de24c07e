"""Cost of the per-step checks (ionwell.science.checks.step_findings) as guests accumulate.

    python bench/checks_cost.py [--repeats 5] [--seed 0] [--steps 1 100 400]

Host: a 4-layer AB flake of 4 hexagon shells per sheet (C384H96, 480 atoms). A synthetic series
adds one Li per step at random admissible positions (fixed seed): at least the default exclusion
radius (ionwell.science.placement.default_exclusion) from every atom, guests included, and within
``placement.within`` (3 Å) of a host atom. At each step the checks run with the default
ChecksConfig (envelope ``within + 1``), on three paths:

* ``full``       moved=None: the host may have moved, every check over the whole structure;
* ``unchanged``  moved=(): the host as at step 0, only pairs involving a guest are searched;
* ``all moved``  moved=range(n_host): a relaxed host (``relax.move: all``); the host's bond
  graph is rebuilt and pairs involving any atom are searched (k-d tree).

Each time is the median of ``--repeats`` runs; the paths' findings are checked to be equal.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
from ase import Atoms
from scipy.spatial import cKDTree

from ionwell.config.campaign import ChecksConfig, FlakeBuilder, PlacementConfig
from ionwell.science.checks import host_facts, step_findings
from ionwell.science.host import build_flake
from ionwell.science.placement import default_exclusion

GUEST = "Li"


def guest_series(host: Atoms, count: int, seed: int, within: float) -> np.ndarray:
    """``count`` admissible guest positions, in insertion order (rejection sampling)."""
    rng = np.random.default_rng(seed)
    excl = default_exclusion(GUEST, {*host.get_chemical_symbols(), GUEST})
    radius = np.array([excl[s] for s in host.get_chemical_symbols()])
    tree = cKDTree(host.positions)
    lo, hi = host.positions.min(axis=0) - within, host.positions.max(axis=0) + within
    placed: list[np.ndarray] = []
    tries = 0
    while len(placed) < count:
        tries += 1
        if tries > 2000 * count:
            raise RuntimeError(f"only {len(placed)} admissible guest positions found")
        p = rng.uniform(lo, hi)
        near = tree.query_ball_point(p, within)
        if not near:
            continue  # outside the host envelope
        if (np.linalg.norm(host.positions[near] - p, axis=1) < radius[near]).any():
            continue
        if placed and np.linalg.norm(np.array(placed) - p, axis=1).min() < excl[GUEST]:
            continue
        placed.append(p)
    return np.array(placed)


def median_time(fn, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--steps", type=int, nargs="+", default=[1, 100, 400])
    args = ap.parse_args()

    host = build_flake(FlakeBuilder(shells=4, layers=4))
    n_host = len(host)
    settings = ChecksConfig()
    within = PlacementConfig().within
    envelope = settings.envelope_for(within)
    t_facts, facts = median_time(lambda: host_facts(host, settings), args.repeats)
    guests = guest_series(host, max(args.steps), args.seed, within)

    print(f"host {host.get_chemical_formula()} ({n_host} atoms); host_facts {t_facts * 1e3:.1f} ms")
    print(f"{'step':>5} {'atoms':>6} {'full ms':>9} {'unchanged ms':>13} {'all moved ms':>13} "
          f"{'speed-up':>9} {'findings':>9}")  # fmt: skip
    for step in args.steps:
        atoms = host + Atoms(GUEST * step, positions=guests[:step])
        kw = {"scf_converged": True, "relax_converged": True, "envelope": envelope}

        def run(moved, atoms=atoms, kw=kw, step=step):
            return step_findings(step, atoms, n_host, settings, facts, moved=moved, **kw)

        t_full, full = median_time(lambda: run(None), args.repeats)
        t_fast, fast = median_time(lambda: run(()), args.repeats)
        t_all, every = median_time(lambda: run(range(n_host)), args.repeats)
        if not full == fast == every:
            raise SystemExit(f"step {step}: the paths' findings differ")
        print(f"{step:>5} {len(atoms):>6} {t_full * 1e3:>9.1f} {t_fast * 1e3:>13.1f} "
              f"{t_all * 1e3:>13.1f} {t_full / t_fast:>8.0f}x {len(full):>9}")  # fmt: skip


if __name__ == "__main__":
    main()
