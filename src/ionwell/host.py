"""The host: hydrogen-terminated layered carbon flakes, and structures read from files.

Pure functions over ASE :class:`~ase.Atoms`; the only I/O is reading a structure file.

Flake geometry. A sheet is cut from a graphene lattice whose C–C bond is ``cc``. Hexagon (ring)
centres form a triangular lattice with vectors ``a1 = sqrt(3)·cc·(1, 0)`` and
``a2 = sqrt(3)·cc·(1/2, sqrt(3)/2)``; the six carbons of the ring at centre ``c`` sit at
``c + cc·(cos θ, sin θ)`` with ``θ = 30°, 90°, ..., 330°``. The sheet's central ring is centred
on the z axis, so every sheet has the full hexagonal symmetry about that axis.

* ``shells = n`` keeps the rings within ``n - 1`` ring-steps of the central ring (1, 7, 19, ...
  rings: benzene, coronene, circumcoronene, ...).
* ``radius = r`` keeps the carbon sites within ``r`` of the axis, then removes carbons with
  fewer than two carbon neighbours until none is left. (A disk centred on a hexagon never leaves
  a hexagon short of a single carbon, whose two hydrogens would clash; the tests check this.)

Every carbon with fewer than three carbon neighbours gets one hydrogen at ``ch`` along the
outward bisector of its C–C bonds (in the sheet plane). Sheets are stacked along z at
``spacing``; in ``AB`` (Bernal) stacking every second sheet is shifted in-plane by one C–C bond
vector ``(0, cc)``, which puts one carbon sublattice over carbons of the neighbouring sheet and
the other over its hexagon centres; ``AA`` sheets are eclipsed. The whole stack is translated so
that the mean atomic position is the origin. Atom tags hold the sheet index (0 = lowest).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np
from ase import Atoms
from scipy.spatial import cKDTree

from ionwell.config import FlakeBuilder, HostConfig
from ionwell.errors import StructureError

__all__ = [
    "MIN_ATOM_DISTANCE",
    "build_flake",
    "build_sheet",
    "host_formula_units",
    "load_host",
    "read_structure",
]

#: Two atoms of a structure read from a file closer than this (Å) make it unusable.
MIN_ATOM_DISTANCE = 0.5

_SQRT3 = math.sqrt(3.0)
_RING_ANGLES = np.deg2rad(30.0 + 60.0 * np.arange(6))


# ---------------------------------------------------------------------------------------------
# graphene lattice helpers


def _ring_centres(reach: int, cc: float) -> np.ndarray:
    """Ring centres ``i·a1 + j·a2`` within ``reach`` ring-steps of the origin, shape (n, 2)."""
    rng = np.arange(-reach, reach + 1)
    i, j = (g.ravel() for g in np.meshgrid(rng, rng, indexing="ij"))
    steps = np.maximum(np.maximum(np.abs(i), np.abs(j)), np.abs(i + j))
    keep = steps <= reach
    a = _SQRT3 * cc
    return np.column_stack([a * (i[keep] + 0.5 * j[keep]), a * (_SQRT3 / 2.0) * j[keep]])


def _ring_vertices(centres: np.ndarray, cc: float) -> np.ndarray:
    """Unique carbon sites of the rings at ``centres``, shape (m, 2), in a stable order."""
    offsets = cc * np.column_stack([np.cos(_RING_ANGLES), np.sin(_RING_ANGLES)])
    sites = (centres[:, None, :] + offsets[None, :, :]).reshape(-1, 2)
    # sites are shared by up to three rings; merge copies on a grid much finer than cc
    keys = np.round(sites / (cc * 1e-3)).astype(np.int64)
    _, first = np.unique(keys, axis=0, return_index=True)
    sites = sites[np.sort(first)]
    order = np.lexsort((sites[:, 0], sites[:, 1]))
    return sites[order]


def _bonds(sites: np.ndarray, cc: float) -> list[list[int]]:
    """Carbon neighbour lists (sites at ``cc`` from each other)."""
    tree = cKDTree(sites)
    pairs = tree.query_pairs(cc * 1.1, output_type="ndarray")
    nbrs: list[list[int]] = [[] for _ in range(len(sites))]
    for a, b in pairs:
        nbrs[a].append(int(b))
        nbrs[b].append(int(a))
    return nbrs


def _radius_sites(radius: float, cc: float) -> np.ndarray:
    """Carbon sites within ``radius`` of the axis, minus those left with < 2 carbon neighbours."""
    # rings within k steps of the central one cover at least the disk of radius 1.5·k·cc
    reach = int(math.ceil((radius + 2.0 * cc) / (1.5 * cc)))
    lattice = _ring_vertices(_ring_centres(reach, cc), cc)
    kept = np.linalg.norm(lattice, axis=1) <= radius * (1.0 + 1e-9)
    sites = lattice[kept]
    while len(sites):
        count = np.array([len(nb) for nb in _bonds(sites, cc)])
        if (count >= 2).all():
            break
        sites = sites[count >= 2]
    return sites


def build_sheet(builder: FlakeBuilder) -> Atoms:
    """One hydrogen-terminated sheet in the z = 0 plane, its central ring centred on the z axis."""
    cc, ch = builder.cc, builder.ch
    if builder.shells is not None:
        carbons = _ring_vertices(_ring_centres(builder.shells - 1, cc), cc)
    else:
        assert builder.radius is not None
        carbons = _radius_sites(builder.radius, cc)
        if len(carbons) == 0:
            raise StructureError(
                f"host.builder.radius: a radius of {builder.radius} Å keeps no complete carbon "
                f"ring; use at least the C–C bond length ({cc} Å) or give 'shells'"
            )
    nbrs = _bonds(carbons, cc)
    hydrogens = []
    for i, nb in enumerate(nbrs):
        if len(nb) >= 3:
            continue
        bond_dirs = carbons[nb] - carbons[i]
        outward = -(bond_dirs / np.linalg.norm(bond_dirs, axis=1)[:, None]).sum(axis=0)
        hydrogens.append(carbons[i] + ch * outward / np.linalg.norm(outward))
    xy = np.vstack([carbons, np.array(hydrogens).reshape(-1, 2)])
    positions = np.column_stack([xy, np.zeros(len(xy))])
    return Atoms(["C"] * len(carbons) + ["H"] * len(hydrogens), positions=positions)


def build_flake(builder: FlakeBuilder) -> Atoms:
    """A stack of ``builder.layers`` hydrogen-terminated sheets, centred on the origin.

    Atoms are ordered sheet by sheet (carbons, then hydrogens of each sheet); tags hold the sheet
    index; ``info['host_builder']`` holds the builder parameters. No cell, no periodicity.
    """
    sheet = build_sheet(builder)
    shift = np.array([0.0, builder.cc, 0.0])  # one C–C bond vector of the lattice
    parts = []
    for layer in range(builder.layers):
        part = sheet.copy()
        offset = np.array([0.0, 0.0, layer * builder.spacing])
        if builder.stacking == "AB" and layer % 2 == 1:
            offset = offset + shift
        part.positions += offset
        part.set_tags(np.full(len(part), layer))
        parts.append(part)
    atoms = parts[0]
    for part in parts[1:]:
        atoms += part
    atoms.positions -= atoms.positions.mean(axis=0)
    atoms.info["host_builder"] = builder.model_dump(mode="json")
    atoms.pbc = False
    return atoms


# ---------------------------------------------------------------------------------------------
# structure files


def _closest_pair(atoms: Atoms, cutoff: float) -> tuple[int, int, float] | None:
    """The closest pair of distinct atoms nearer than ``cutoff`` (minimum image), or None."""
    from ase.neighborlist import neighbor_list

    i, j, d = neighbor_list("ijd", atoms, cutoff, self_interaction=False)
    if len(d) == 0:
        return None
    k = int(np.argmin(d))
    a, b = sorted((int(i[k]), int(j[k])))
    return a, b, float(d[k])


def _parse_error(path: Path, format: str, err: Exception) -> StructureError:
    kind = type(err).__name__
    text = " ".join(str(err).split())
    if isinstance(err, StopIteration | EOFError):
        detail = "the file ended before a complete structure was read"
    else:
        detail = f"{text} [{kind}]" if text else kind
    return StructureError(
        f"{path}: cannot parse as {format!r}: {detail}; expected a valid {format!r} structure"
    )


def read_structure(path: str | Path, format: str | None = None) -> Atoms:
    """Read a structure in any ASE-readable format (the last frame if the file holds several).

    Raises :class:`StructureError` naming the file when it is missing or unreadable, its format
    is unknown, it holds no atoms, positions are not finite, or two atoms are closer than
    :data:`MIN_ATOM_DISTANCE`.
    """
    import ase.io
    from ase.io.formats import UnknownFileTypeError, filetype, ioformats

    path = Path(path)
    what = f"a structure in {'ASE format ' + repr(format) if format else 'an ASE format'}"
    if not path.exists():
        raise StructureError(f"{path}: no such file (expected {what})")
    if path.is_dir():
        raise StructureError(f"{path}: is a directory (expected {what})")
    if path.stat().st_size == 0:
        raise StructureError(f"{path}: file is empty (expected {what})")
    if format is not None and format not in ioformats:
        raise StructureError(
            f"{path}: {format!r} is not an ASE format name; expected e.g. 'extxyz', 'xyz', "
            "'cif', 'vasp' (see `ase info --formats`)"
        )
    if format is None:
        try:
            format = filetype(str(path), read=True)
        except UnknownFileTypeError:
            raise StructureError(
                f"{path}: cannot tell the structure format from the name or contents; give it "
                "with 'format', e.g. format: extxyz"
            ) from None
        except OSError as err:
            raise StructureError(f"{path}: cannot read ({err.strerror or err})") from None
        if format not in ioformats:
            raise StructureError(
                f"{path}: cannot tell the structure format from the name ({format!r} is not an "
                "ASE format); give it with 'format', e.g. format: extxyz"
            )
    try:
        atoms = ase.io.read(path, index=-1, format=format)
    except OSError as err:
        if err.errno is None:  # ASE readers raise OSError subclasses for malformed content
            raise _parse_error(path, format, err) from None
        raise StructureError(f"{path}: cannot read ({err.strerror or err})") from None
    except Exception as err:  # ASE readers raise many kinds of errors on malformed input
        raise _parse_error(path, format, err) from None
    if isinstance(atoms, list):  # defensive: some readers ignore index
        if not atoms:
            raise StructureError(f"{path}: holds no structure (expected {what})")
        atoms = atoms[-1]
    if len(atoms) == 0:
        raise StructureError(f"{path}: holds a structure with no atoms (expected {what})")
    bad = ~np.isfinite(atoms.positions).all(axis=1)
    if bad.any():
        idx = np.flatnonzero(bad)
        raise StructureError(
            f"{path}: {len(idx)} atom(s) have non-finite positions (first: atom {idx[0]}); "
            "expected finite Cartesian coordinates in Å"
        )
    try:
        close = _closest_pair(atoms, MIN_ATOM_DISTANCE)
    except Exception as err:  # e.g. a periodic axis with a zero cell vector
        raise StructureError(
            f"{path}: cannot measure interatomic distances ({err}); check the cell and pbc"
        ) from None
    if close is not None:
        a, b, d = close
        sa, sb = atoms[a].symbol, atoms[b].symbol
        raise StructureError(
            f"{path}: atoms {a} ({sa}) and {b} ({sb}) are {d:.3f} Å apart; expected every "
            f"pair at least {MIN_ATOM_DISTANCE} Å apart (duplicated atom or wrong units?)"
        )
    return atoms


def load_host(host: HostConfig, base_dir: str | Path) -> Atoms:
    """The host structure: built from ``host.builder`` or read from ``host.file``.

    A relative file path is resolved against ``base_dir`` (the folder of the config file).
    """
    if host.builder is not None:
        return build_flake(host.builder)
    assert host.file is not None
    path = Path(host.file).expanduser()
    if not path.is_absolute():
        path = Path(base_dir) / path
    return read_structure(path, host.format)


def host_formula_units(atoms: Atoms, formula_unit: Mapping[str, int] | None) -> float:
    """Number of host formula units in ``atoms`` (``None``: the whole host counts as one).

    ``{"C": 6}`` gives ``n_C / 6``. With several elements every element must give the same
    number; otherwise (or when an element is absent) a :class:`StructureError` is raised.
    """
    if formula_unit is None:
        return 1.0
    if not formula_unit:
        raise StructureError("host.formula_unit: empty; give element counts such as {C: 6}")
    symbols = atoms.get_chemical_symbols()
    ratios: dict[str, float] = {}
    for element, count in formula_unit.items():
        if count <= 0:
            raise StructureError(
                f"host.formula_unit: count of {element} must be a positive integer, got {count}"
            )
        n = symbols.count(element)
        if n == 0:
            raise StructureError(
                f"host.formula_unit: the host holds no {element} atoms "
                f"(host formula {atoms.get_chemical_formula()})"
            )
        ratios[element] = n / count
    values = list(ratios.values())
    if max(values) - min(values) > 1e-9 * max(values):
        detail = ", ".join(f"{el}: {r:g}" for el, r in ratios.items())
        raise StructureError(
            f"host.formula_unit: the host ({atoms.get_chemical_formula()}) holds a different "
            f"number of formula units by each element ({detail}); give a formula unit of one "
            "element, e.g. {C: 6}"
        )
    return values[0]
