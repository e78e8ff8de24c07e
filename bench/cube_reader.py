"""Time ionwell's cube reader against ase.io.cube.read_cube_data on one generated file.

    python bench/cube_reader.py [N]      # N³ grid points (default 200 → 8 million)

Prints the median of three reads for each and their ratio. Run by hand; not a test.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from ase.build import molecule
from ase.io.cube import read_cube_data, write_cube

from ionwell.io.cube import read_cube


def _median_time(fn, repeat: int = 3) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    atoms = molecule("C6H6")
    atoms.center(vacuum=4.0)
    rng = np.random.default_rng(0)
    data = rng.normal(size=(n, n, n))
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.cube"
        with open(path, "w") as fh:
            write_cube(fh, atoms, data)
        t_ase = _median_time(lambda: read_cube_data(str(path)))
        t_ours = _median_time(lambda: read_cube(path))
    print(
        f"{n**3:,} points: ase {t_ase:.2f} s, ionwell {t_ours:.2f} s, ratio {t_ase / t_ours:.1f}x"
    )


if __name__ == "__main__":
    main()
