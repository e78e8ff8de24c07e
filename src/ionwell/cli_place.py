"""``ionwell place``: find the wells of one potential map and say where a guest would go.

    ionwell place POTENTIAL.cube [--structure FILE] [--guest EL] [--exclusion EL=ANGSTROM ...]
                  [--within ANGSTROM] [--sign auto|potential|electron] [--count N] [--json]

The map is a Gaussian cube (atoms taken from it unless ``--structure`` is given) or a ``.npz``
grid written by ionwell (then ``--structure`` is required). Positions are printed in Å in the
map's own Cartesian frame, potentials in volts. Exit status 0 when a site is chosen, 1 when the
map has no admissible well; errors are raised as :class:`~ionwell.errors.IonwellError`.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

from ase import Atoms

from ionwell import grid as gridmod
from ionwell.errors import GridError, StructureError
from ionwell.placement import Decision, place

__all__ = ["add_parser", "run"]


def _exclusion_item(text: str) -> tuple[str, float]:
    el, sep, value = text.partition("=")
    try:
        radius = float(value)
    except ValueError:
        radius = math.nan
    if not sep or not el.strip() or not (math.isfinite(radius) and radius > 0):
        raise argparse.ArgumentTypeError(
            f"expected ELEMENT=ANGSTROM with a positive distance, e.g. C=1.6; got {text!r}"
        )
    return el.strip(), radius


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"expected a positive distance in Å, got {text!r}")
    return value


def _count(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return value


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register the ``place`` subcommand on an argparse subparsers object."""
    p = subparsers.add_parser(
        "place",
        help="list the wells of a potential map and the site a guest would take",
        description=(
            "Read an electrostatic potential map, keep the grid points a guest may occupy "
            "(clear of every atom by an exclusion distance, close enough to the host) and list "
            "the deepest local minima there. The deepest one is the chosen site."
        ),
        epilog="Exit status: 0 when a site is chosen, 1 when no admissible well exists.",
    )
    p.add_argument(
        "potential",
        metavar="POTENTIAL",
        help="Gaussian cube file (hartree/e), or a .npz grid written by ionwell (volts)",
    )
    p.add_argument(
        "--structure",
        metavar="FILE",
        help="atoms in any ASE-readable format (default: the atoms in the cube file)",
    )
    p.add_argument("--guest", metavar="EL", default="Li", help="guest element (default: Li)")
    p.add_argument(
        "--exclusion",
        metavar="EL=ANGSTROM",
        nargs="+",
        action="extend",
        type=_exclusion_item,
        default=[],
        help="minimum guest distance to atoms of an element, e.g. C=1.6 H=1.2 "
        "(default: 0.75 × sum of covalent radii)",
    )
    p.add_argument(
        "--within",
        metavar="ANGSTROM",
        type=_positive,
        default=3.0,
        help="envelope: a site must lie within this distance of some atom (default: 3.0)",
    )
    p.add_argument(
        "--sign",
        choices=("auto", "potential", "electron"),
        default="auto",
        help="sign convention of the map: 'potential' (nuclei are maxima), 'electron' (nuclei "
        "are minima) or 'auto' (tell from the values near the nuclei; .npz grids are stored in "
        "the potential convention). Default: auto",
    )
    p.add_argument(
        "--count",
        metavar="N",
        type=_count,
        default=10,
        help="how many wells to list (default: 10)",
    )
    p.add_argument("--json", action="store_true", help="print one JSON object instead of a table")
    p.set_defaults(func=run)
    return p


def _read_structure(path: Path) -> Atoms:
    from ase.io import read

    try:
        atoms = read(path)
    except FileNotFoundError:
        raise StructureError(f"{path}: structure file not found") from None
    except Exception as err:  # ASE raises many kinds for unreadable files
        raise StructureError(f"{path}: cannot read the structure ({err})") from None
    if isinstance(atoms, list):  # pragma: no cover - read() returns the last image by default
        atoms = atoms[-1]
    if len(atoms) == 0:
        raise StructureError(f"{path}: the structure holds no atoms")
    return atoms


def _load(args: argparse.Namespace) -> tuple[gridmod.Grid, Atoms, str]:
    """The grid in the potential convention, its atoms, and the convention it was read in."""
    path = Path(args.potential)
    if path.suffix.lower() == ".npz":
        if not args.structure:
            raise GridError(f"{path}: a .npz grid holds no atoms; give them with --structure FILE")
        grid = gridmod.load_npz(path)
        atoms = _read_structure(Path(args.structure))
        sign = "potential" if args.sign == "auto" else args.sign
    else:
        grid, atoms = gridmod.read_cube(path)
        if args.structure:
            atoms = _read_structure(Path(args.structure))
        sign = gridmod.detect_sign(grid, atoms) if args.sign == "auto" else args.sign
    return gridmod.orient(grid, atoms, sign), atoms, sign


def _site(s) -> dict:
    return {"position": [float(x) for x in s.position], "potential": float(s.potential)}


def _print_table(args: argparse.Namespace, decision: Decision, sign: str) -> None:
    n_points = math.prod(decision.grid_shape)
    print(
        f"{args.potential}: guest {decision.guest}, sign convention '{sign}', "
        f"{decision.admissible_fraction:.1%} of {n_points} grid points admissible"
    )
    ex = ", ".join(f"{el} {r:.2f}" for el, r in decision.exclusion.items())
    env = "none" if decision.within is None else f"{decision.within:g} Å"
    print(f"exclusion (Å): {ex or 'none'}; envelope: {env}")
    if not decision.candidates:
        print(f"no site chosen: {decision.reason}")
        return
    print()
    print(
        f"{'rank':>4}  {'x (Å)':>10}  {'y (Å)':>10}  {'z (Å)':>10}  {'V (V)':>10}  {'depth (V)':>10}"
    )
    deepest = decision.candidates[0].potential
    for rank, s in enumerate(decision.candidates, 1):
        x, y, z = s.position
        print(
            f"{rank:>4}  {x:>10.4f}  {y:>10.4f}  {z:>10.4f}  {s.potential:>10.4f}  "
            f"{s.potential - deepest:>10.4f}"
        )
    print()
    c = decision.chosen[0]
    print(
        "chosen: well 1 at ({:.4f}, {:.4f}, {:.4f}) Å, {:.4f} V — {}".format(
            *c.position, c.potential, decision.reason
        )
    )


def run(args: argparse.Namespace) -> int:
    """Run ``ionwell place``; returns the exit status (0: a site chosen, 1: none)."""
    grid, atoms, sign = _load(args)
    decision = place(
        grid,
        atoms,
        args.guest,
        exclusion=dict(args.exclusion) or None,
        within=args.within,
        candidates=args.count,
    )
    if args.json:
        out = {
            "source": str(args.potential),
            "guest": decision.guest,
            "rule": decision.rule,
            "sign": sign,
            "sites": [_site(s) for s in decision.candidates],
            "chosen": [_site(s) for s in decision.chosen],
            "reason": decision.reason,
            "admissible_fraction": decision.admissible_fraction,
            "exclusion": decision.exclusion,
            "within": decision.within,
            "grid_shape": decision.grid_shape,
        }
        print(json.dumps(out))
    else:
        _print_table(args, decision, sign)
    return 0 if decision.chosen else 1
