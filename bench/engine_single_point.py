"""One single point (energy + potential map, no relaxation) of a carbon flake through an engine.

    python bench/engine_single_point.py KIND SHELLS [LAYERS]

KIND: pyscf (LDA/STO-3G, exact map) or tblite (GFN2-xTB, charge-and-dipole map); SHELLS: hexagon
shells per sheet (1 benzene, 2 coronene); LAYERS: sheets, AB stacked (default 2). Map spacing
0.3 Å, margin 3 Å for both. Timed from outside with farm-bench (see the README's Performance):

    farm-bench -n 3 --timeout 900 \\
        --vs '.venv/bin/python bench/engine_single_point.py tblite 1' \\
        -- .venv/bin/python bench/engine_single_point.py pyscf 1
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from ionwell.config.campaign import parse_campaign
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext
from ionwell.science.host import build_flake


def main() -> None:
    kind, shells = sys.argv[1], int(sys.argv[2])
    layers = int(sys.argv[3]) if len(sys.argv) > 3 else 2
    grid = {"spacing": 0.3, "margin": 3.0}
    campaign = parse_campaign(
        {
            "name": "bench",
            "host": {"builder": {"shells": shells, "layers": layers}},
            "engine": {"kind": kind, "potential_grid": grid},
            "relax": {"enabled": False},
        }
    )
    atoms = build_flake(campaign.host.builder)
    engine = get_engine(campaign)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        engine.prepare(atoms, work, ComputeContext(step=0))
        engine.run(work)
        result, pot = engine.collect(work)
    print(f"{kind}: {len(atoms)} atoms, E = {result.energy:.4f} eV, map {pot.shape}")


if __name__ == "__main__":
    main()
