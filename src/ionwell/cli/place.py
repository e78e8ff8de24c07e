"""``ionwell place``: find the wells of one potential map and say where a guest would go.

    ionwell place POTENTIAL.cube [--structure FILE] [--guest EL] [--exclusion EL=ANGSTROM]...
                  [--within ANGSTROM] [--sign auto|potential|electron] [--galleries]
                  [--rule deepest|thermal] [--count N] [--separation ANGSTROM]
                  [--temperature K] [--seed N] [--step N] [--wells N] [--json]

The map is a Gaussian cube or XSF file (atoms taken from it unless ``--structure`` is given,
which must then be the map's atoms), a ``.npy``/``.npz`` array with its JSON sidecar, or a
``.npz`` grid written by ionwell (then ``--structure`` is required). Maps and structures are read
and checked by the campaign's own readers (:func:`ionwell.io.maps.read_map`,
:func:`ionwell.io.structures.read_structure`); a map whose header says it holds a density or an orbital
is refused unless ``--assume-potential`` is given. Positions are printed in Å in the
map's own Cartesian frame, potentials in volts. The choice is made by
:func:`ionwell.science.placement.decide` with the settings a campaign would use, so what this command
prints is what a campaign step would do with the same map. Exit status 0 when a site is chosen,
1 when the map has no admissible well; errors are raised as
:class:`~ionwell.errors.IonwellError`.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
from ase import Atoms
from pydantic import ValidationError

from ionwell.config.campaign import PlacementConfig
from ionwell.errors import GridError, PlacementError
from ionwell.science import grid as gridmod
from ionwell.science.placement import Decision, decide

__all__ = ["add_parser", "run"]

# PlacementConfig field → the option that sets it, for error messages
_OPTION = {
    "exclusion": "--exclusion",
    "within": "--within",
    "candidates": "--wells",
    "rule": "--rule",
    "per_step": "--count",
    "separation": "--separation",
    "temperature": "--temperature",
}


def _exclusion_item(text: str) -> tuple[str, float]:
    """argparse type: ``ELEMENT=ANGSTROM`` as a pair (element and distance are the settings
    model's to check)."""
    el, sep, value = text.partition("=")
    try:
        radius = float(value)
    except ValueError:
        sep = ""
    if not sep or not el.strip():
        raise argparse.ArgumentTypeError(f"expected ELEMENT=ANGSTROM, e.g. C=1.6; got {text!r}")
    return el.strip(), radius


def _axes(text: str) -> tuple[bool, bool, bool]:
    """``xyz``, ``xy``, ``z``, ``none`` ... as periodicity flags of the three grid axes."""
    t = text.strip().lower()
    if t in ("none", "no", "-", ""):
        return (False, False, False)
    if not set(t) <= set("xyz") or len(set(t)) != len(t):
        raise argparse.ArgumentTypeError(
            f"expected the periodic axes as letters of 'xyz' (e.g. xyz, xy) or 'none', got {text!r}"
        )
    return ("x" in t, "y" in t, "z" in t)


def positive_count(text: str) -> int:
    """argparse type: a whole number ≥ 1 (one clear message otherwise)."""
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return value


def _natural(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = -1
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 0, got {text!r}")
    return value


def add_parser(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register the ``place`` subcommand on an argparse subparsers object."""
    p = subparsers.add_parser(
        "place",
        help="list the wells of a potential map and the site a guest would take",
        description=(
            "Read an electrostatic potential map, keep the grid points a guest may occupy "
            "(clear of every atom by an exclusion distance, close enough to the host, and with "
            "--galleries between two adjacent layers) and list the deepest local minima there. "
            "The placement rule picks the site: the deepest well, or a Boltzmann-weighted "
            "draw among the wells (thermal)."
        ),
        epilog="Exit status: 0 when a site is chosen, 1 when no admissible well exists.",
    )
    p.add_argument(
        "potential",
        metavar="POTENTIAL",
        help="Gaussian cube file (hartree/e), XSF file, .npy grid with its JSON sidecar, or a "
        ".npz grid written by ionwell (volts)",
    )
    p.add_argument(
        "--structure",
        metavar="FILE",
        help="atoms in any ASE-readable format (default: the atoms in the cube file)",
    )
    p.add_argument("--guest", metavar="EL", default="Li", help="guest element (default: Li)")
    p.add_argument(
        "--periodic",
        metavar="AXES",
        type=_axes,
        help="periodic axes of the map, e.g. xyz (a crystal), xy (a slab) or none; the period "
        "along an axis is its point count times its step (default: periodic where --structure "
        "is and the map spans its cell; a cube alone cannot say)",
    )
    p.add_argument(
        "--exclusion",
        metavar="EL=ANGSTROM",
        action="append",
        type=_exclusion_item,
        default=[],
        help="minimum guest distance to atoms of one element, e.g. C=1.6; repeat the option for "
        "more elements: --exclusion C=1.6 --exclusion H=1.2 (default: 0.75 × sum of covalent "
        "radii)",
    )
    p.add_argument(
        "--within",
        metavar="ANGSTROM",
        type=float,
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
        "--assume-potential",
        action="store_true",
        help="read the map as an electrostatic potential even when its header names a density, "
        "an orbital or ELF (such maps are refused otherwise)",
    )
    p.add_argument(
        "--galleries",
        action="store_true",
        help="admit only points between two adjacent layers of the host (layers detected "
        "from the atoms heavier than hydrogen)",
    )
    p.add_argument(
        "--rule",
        choices=("deepest", "thermal", "screened"),
        default="deepest",
        help="placement rule: 'deepest' well, or 'thermal' (Boltzmann-weighted draw at "
        "--temperature, seeded by --seed and --step). 'screened' needs engine energies and "
        "runs only inside a campaign. Default: deepest",
    )
    p.add_argument(
        "--count",
        metavar="N",
        type=int,
        default=1,
        help="how many guests to place, at wells at least --separation apart (default: 1)",
    )
    p.add_argument(
        "--separation",
        metavar="ANGSTROM",
        type=float,
        default=2.5,
        help="minimum distance between guests placed together, Å (default: 2.5)",
    )
    p.add_argument(
        "--temperature",
        metavar="K",
        type=float,
        default=300.0,
        help="temperature of the thermal rule, K; 0 gives the deepest well (default: 300)",
    )
    p.add_argument(
        "--seed",
        metavar="N",
        type=_natural,
        default=0,
        help="seed of the thermal rule's random draw (default: 0)",
    )
    p.add_argument(
        "--step",
        metavar="N",
        type=_natural,
        default=0,
        help="step number the thermal draw is seeded with, as in a campaign (default: 0)",
    )
    p.add_argument(
        "--wells",
        metavar="N",
        type=int,
        default=10,
        help="how many wells to list (default: 10)",
    )
    p.add_argument("--json", action="store_true", help="print one JSON object instead of a table")
    p.set_defaults(func=run)
    return p


def _load(args: argparse.Namespace) -> tuple[gridmod.Grid, Atoms, str]:
    """The grid in the potential convention, its atoms, and the convention it was read in.

    Through the campaign's readers and checks: :func:`ionwell.io.structures.read_structure` for
    ``--structure``, :func:`ionwell.io.maps.read_map` for the map (which refuses a structure
    that is not the map's own atoms, moved by one shift at most), the map's own atoms checked
    as a structure file's are.
    """
    from ionwell.config.engines import PotentialSpec
    from ionwell.io.maps import SUFFIXES, not_a_potential, read_map, sidecar_path
    from ionwell.io.npz import load_npz
    from ionwell.io.structures import read_structure
    from ionwell.science.host import check_atoms

    path = Path(args.potential)
    atoms = read_structure(Path(args.structure)) if args.structure else None
    fmt = SUFFIXES.get(path.suffix.lower(), "cube")
    if fmt == "npz" and not sidecar_path(path).exists():
        # a grid stored by ionwell (a step's potential.npz), in the potential convention
        if atoms is None:
            raise GridError(f"{path}: a .npz grid holds no atoms; give them with --structure FILE")
        grid, atoms = _periodicity(args, load_npz(path), atoms)
        sign = "potential" if args.sign == "auto" else args.sign
        return gridmod.orient(grid, atoms, sign), atoms, sign
    if fmt in ("npy", "npz") and atoms is None:
        raise GridError(f"{path}: a .{fmt} grid holds no atoms; give them with --structure FILE")
    if not args.assume_potential:
        said = not_a_potential(path, fmt)
        if said is not None:
            raise GridError(
                f"{path}: the header says {said!r}: not an electrostatic potential; expected a "
                "potential map (e.g. a Hartree or electrostatic-potential cube). If the file "
                "does hold a potential, give --assume-potential"
            )
    # cube and XSF are read as stored and their sign decided below; an array's sidecar may
    # declare its sign, which the reader applies (or checks against an explicit --sign)
    as_stored = fmt in ("cube", "xsf")
    sign_spec = "potential" if as_stored else (None if args.sign == "auto" else args.sign)
    spec = PotentialSpec(file=path.name, format=fmt, sign=sign_spec)
    grid, file_atoms = read_map(path, spec, atoms=atoms, pbc=args.periodic)
    if atoms is None:
        if file_atoms is None or len(file_atoms) == 0:
            raise GridError(f"{path}: the map lists no atoms; give them with --structure FILE")
        check_atoms(file_atoms, path)
        atoms = file_atoms
    grid, atoms = _periodicity(args, grid, atoms)
    if not as_stored and args.sign != "auto":
        return grid, atoms, args.sign  # applied by the reader
    sign = gridmod.detect_sign(grid, atoms) if args.sign == "auto" else args.sign
    return gridmod.orient(grid, atoms, sign), atoms, sign


def _periodicity(args: argparse.Namespace, grid: gridmod.Grid, atoms: Atoms):
    """The grid's periodicity: stated with ``--periodic`` (the atoms then get the grid's cell
    on those axes, so exclusion uses the minimum image), else taken from a periodic structure
    whose cell the grid spans."""
    if args.periodic is not None:
        grid = gridmod.with_periodicity(grid, args.periodic)
        if any(args.periodic):
            atoms = atoms.copy()
            cell = atoms.cell.array.copy()
            for ax in range(3):
                if args.periodic[ax] and not atoms.pbc[ax]:
                    cell[ax] = grid.shape[ax] * np.asarray(grid.axes[ax], dtype=float)
            atoms.cell = cell
            atoms.pbc = [bool(a) or bool(b) for a, b in zip(atoms.pbc, args.periodic, strict=True)]
    elif atoms.pbc.any():
        grid = gridmod.periodic_like(grid, atoms)
    return grid, atoms


def _settings(args: argparse.Namespace) -> PlacementConfig:
    """The placement settings the options describe (the map is already oriented).

    The settings model checks the numbers (its limits are a campaign's); a value it refuses is
    one PlacementError naming the option.
    """
    elements = [el for el, _ in args.exclusion]
    twice = sorted({el for el in elements if elements.count(el) > 1})
    if twice:
        raise PlacementError(
            f"--exclusion: {', '.join(twice)} given more than once; expected each element once "
            "(e.g. --exclusion C=1.6 --exclusion H=1.2)"
        )
    try:
        return PlacementConfig(
            rule=args.rule,
            exclusion=dict(args.exclusion),
            within=args.within,
            sign="potential",
            candidates=args.wells,
            per_step=args.count,
            separation=args.separation,
            temperature=args.temperature,
            galleries_only=args.galleries,
        )
    except ValidationError as err:
        lines = []
        for e in err.errors():
            field = str(e["loc"][0]) if e["loc"] else ""
            msg = e["msg"].removeprefix("Value error, ")
            if e["type"] != "value_error":
                msg += f", got {e['input']!r}"
            lines.append(f"{_OPTION.get(field, field or 'options')}: {msg}")
        raise PlacementError("; ".join(lines)) from None


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
    line = f"exclusion (Å): {ex or 'none'}; envelope: {env}"
    gal = decision.region.galleries if decision.region is not None else None
    if gal is not None:
        line += (
            f"; galleries: {len(gal.intervals)} between {len(gal.layer_heights)} layers "
            f"(margin {gal.margin:g} Å)"
        )
    print(line)
    rule = decision.rule
    if rule == "thermal":
        rule += f" at {decision.temperature:g} K, seed {decision.seed}, step {decision.step}"
    guests = f"{decision.count} guest{'s' if decision.count > 1 else ''}"
    if decision.count > 1:
        guests += f" at least {decision.separation:g} Å apart"
    print(f"rule: {rule}; {guests}")
    if not decision.candidates:
        print(f"no site chosen: {decision.reason}")
        return
    probs = decision.probabilities
    print()
    head = (
        f"{'rank':>4}  {'x (Å)':>10}  {'y (Å)':>10}  {'z (Å)':>10}  {'V (V)':>10}  "
        f"{'depth (V)':>10}"
    )
    if probs is not None:
        head += f"  {'prob.':>7}"
    print(head + "  note")
    deepest = decision.candidates[0].potential
    order = {w: n for n, w in enumerate(decision.chosen_wells, 1)}
    for rank, s in enumerate(decision.candidates, 1):
        x, y, z = s.position
        row = (
            f"{rank:>4}  {x:>10.4f}  {y:>10.4f}  {z:>10.4f}  {s.potential:>10.4f}  "
            f"{s.potential - deepest:>10.4f}"
        )
        if probs is not None:
            row += f"  {probs[rank - 1]:>7.3f}"
        notes = []
        if rank - 1 in order:
            notes.append("chosen" if decision.count == 1 else f"chosen #{order[rank - 1]}")
        if s.degenerate:
            notes.append("near-degenerate")
        if s.edge:
            notes.append("edge")
        print(row + ("  " + ", ".join(notes) if notes else ""))
    print()
    if any(s.degenerate for s in decision.candidates):
        print(f"near-degenerate: within {decision.degenerate:g} V of the deepest well")
    if any(s.edge for s in decision.candidates):
        print("edge: lowest point at the edge of the admissible region (may fall further beyond)")
    for n, (w, c) in enumerate(zip(decision.chosen_wells, decision.chosen, strict=True), 1):
        label = "chosen" if decision.count == 1 else f"chosen #{n}"
        print(
            "{}: well {} at ({:.4f}, {:.4f}, {:.4f}) Å, {:.4f} V".format(
                label, w + 1, *c.position, c.potential
            )
        )
    print(f"why: {decision.reason}")


def run(args: argparse.Namespace) -> int:
    """Run ``ionwell place``; returns the exit status (0: a site chosen, 1: none)."""
    if args.rule == "screened":
        raise PlacementError(
            "--rule screened ranks the wells by engine energies, so it needs a "
            "campaign (its engine computes them); set placement.rule: screened in the campaign "
            "config, or use --rule deepest or --rule thermal here"
        )
    settings = _settings(args)
    grid, atoms, sign = _load(args)
    decision = decide(grid, atoms, args.guest, settings, step=args.step, seed=args.seed)
    if args.json:
        out = {
            "source": str(args.potential),
            "guest": decision.guest,
            "rule": decision.rule,
            "sign": sign,
            "sites": [_site(s) for s in decision.candidates],
            "chosen": [_site(s) for s in decision.chosen],
            "chosen_wells": decision.chosen_wells,
            "near_degenerate": [i for i, s in enumerate(decision.candidates) if s.degenerate],
            "reason": decision.reason,
            "admissible_fraction": decision.admissible_fraction,
            "exclusion": decision.exclusion,
            "within": decision.within,
            "count": decision.count,
            "separation": decision.separation,
            "grid_shape": decision.grid_shape,
        }
        if decision.rule == "thermal":
            out |= {
                "temperature": decision.temperature,
                "seed": decision.seed,
                "step": decision.step,
                "probabilities": decision.probabilities,
            }
        print(json.dumps(out))
    else:
        _print_table(args, decision, sign)
    return 0 if decision.chosen else 1
