"""Engine potential maps: reading a map file into a :class:`~ionwell.science.grid.Grid`.

:func:`read_map` (and :func:`read_potential`, its grid alone) reads the file named by an
engine's ``outputs.potential`` (:class:`~ionwell.config.engines.PotentialSpec`), or the map given
to ``ionwell place``, and returns a grid in **volts**, in the **potential convention** (the
potential felt by a positive test charge: nuclei are maxima). This module owns the NumPy array
+ JSON sidecar format (:func:`write_potential_npy` writes it) and the XSF data grid; cube files
are parsed by :mod:`ionwell.io.cube`. ionwell's own grid store (a step's ``potential.npz``) is
another format, :mod:`ionwell.io.npz`.

Formats (``spec.format``; ``auto`` chooses by suffix, case-insensitive):

``cube`` (``.cube``, ``.cub``)
    Gaussian cube, read by the fast :func:`ionwell.io.cube.read_cube`. Lengths follow the cube
    convention (bohr, or Å for a negative point count). The file carries its atoms, which
    ``sign: auto`` uses (the ``atoms`` argument only when the cube lists none).
``npy`` (``.npy``) / ``npz`` (``.npz``)
    A 3-D array (C order, third index fastest), with a JSON sidecar named ``<file>.json``
    (``pot.npy`` → ``pot.npy.json``)::

        {"origin": [x, y, z],                  # Å, position of point (0, 0, 0)
         "axes": [[..], [..], [..]],           # Å, step vectors between neighbouring points
         "shape": [n0, n1, n2],                # must equal the array's shape
         "pbc": [false, false, false],         # optional, default all false
         "unit": "V" | "hartree" | "rydberg",  # optional
         "sign": "potential" | "electron"}     # optional

    No other keys are accepted (a misspelt key is an error, not silently ignored). In an
    ``.npz`` the array is ``values``, or else the only array in the archive. Either suffix may
    hold either layout: the content decides. Integer and float arrays are accepted; float32
    and float64 values keep their precision.
``xsf`` (``.xsf``)
    XCrySDen structure file with a ``DATAGRID_3D`` block, read by ``ase.io.xsf.read_xsf``
    (first data grid only). XSF grids are *general* grids: ``n`` points run from the origin to
    origin + spanning vector inclusive, so the step is ``span / (n - 1)``. Along an axis that
    the file declares periodic (CRYSTAL, SLAB, POLYMER) and whose spanning vector equals the
    cell vector, the last point repeats the first; it is dropped and the axis becomes periodic
    in the grid. Lengths are Å (XSF's convention). The file's atoms serve ``sign: auto``.
``ase``
    Not supported: ASE has no general reader of volumetric data beyond cube and XSF, which
    are handled above. Asking for it raises an error naming the supported formats.

Units: ``spec.unit`` is the unit of the numbers stored in the file, for every format; they are
multiplied by ``POTENTIAL_UNITS[unit]`` (volts per unit, from ``ase.units``: ``hartree`` is
``ase.units.Hartree`` V per atomic unit of potential, hartree/e). The config is the single
source: it is frozen with every default spelled out, so "set explicitly" cannot be told from
"left at the default" and no rule may depend on it. Hence:

- a **cube** holds atomic units by convention, but its numbers are read in ``spec.unit`` like
  any other file: give ``unit: hartree`` for the usual cube (``spec.unit``'s default, ``V``,
  reads the numbers as volts, with a logged warning). :func:`ionwell.io.cube.read_cube` already
  multiplies by ``Hartree``, so only the ratio ``POTENTIAL_UNITS[unit] / Hartree`` is applied:
  1 for hartree (no second conversion), ``1 / Hartree`` for volts;
- a **sidecar**'s ``unit``, when present, must equal ``spec.unit``; otherwise reading fails
  (two descriptions of one file that disagree: neither is trusted).

Sign: ``spec.sign`` likewise. ``potential`` keeps the values, ``electron`` negates them,
``auto`` asks :func:`ionwell.science.grid.detect_sign`, which needs atoms (the file's for cube and XSF,
else the ``atoms`` argument; an error when there are none). A sidecar's ``sign`` must equal a
definite ``spec.sign``; with ``sign: auto`` the sidecar's declaration is used instead of
detection.

(Should ``PotentialSpec`` ever allow ``unit``/``sign`` to be ``None``, it is read here as "what
the file says": unit — the sidecar's, else hartree for a cube, else volts; sign — the
sidecar's, else ``potential``.)

Errors: every problem raises :class:`~ionwell.errors.EngineOutputError` with one message that
starts with ``step N:`` (when a step is given) and the file, and says what was expected.
"""

from __future__ import annotations

import json
import logging
import math
import zipfile
from collections.abc import Sequence
from pathlib import Path
from typing import Literal

import numpy as np
from ase import Atoms
from pydantic import BaseModel, ConfigDict, ValidationError

from ionwell.config.engines import POTENTIAL_UNITS, PotentialSpec
from ionwell.errors import EngineOutputError, GridError
from ionwell.io.cube import read_cube
from ionwell.io.npz import check_array_file
from ionwell.science.grid import Grid, orient, periodic_like, with_periodicity

__all__ = [
    "SUFFIXES",
    "not_a_potential",
    "read_map",
    "read_potential",
    "sidecar_path",
    "write_potential_npy",
]

logger = logging.getLogger(__name__)

#: File suffixes ``format: auto`` recognises, and the format each one selects.
SUFFIXES = {".cube": "cube", ".cub": "cube", ".npy": "npy", ".npz": "npz", ".xsf": "xsf"}

_SUPPORTED = "cube (.cube, .cub), npy (.npy), npz (.npz) with a JSON sidecar, xsf (.xsf)"
_SIDECAR_KEYS = "origin, axes, shape, pbc, unit, sign"

Unit = Literal["V", "hartree", "rydberg"]


class _Sidecar(BaseModel):
    """The JSON sidecar of a ``.npy``/``.npz`` potential map."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    origin: tuple[float, float, float]
    axes: tuple[tuple[float, float, float], tuple[float, float, float], tuple[float, float, float]]
    shape: tuple[int, int, int]
    pbc: tuple[bool, bool, bool] = (False, False, False)
    unit: Unit | None = None
    sign: Literal["potential", "electron"] | None = None


def sidecar_path(path: str | Path) -> Path:
    """The JSON sidecar of a NumPy potential map: ``<file>.json`` beside it."""
    path = Path(path)
    return path.with_name(path.name + ".json")


class _Fail:
    """Builds one-line :class:`EngineOutputError` messages: ``step N: <file>: <what>``."""

    def __init__(self, path: Path, step: int | None) -> None:
        self.path = path
        self.prefix = f"step {step}: " if step is not None else ""

    def __call__(self, what: str, file: Path | None = None) -> EngineOutputError:
        return EngineOutputError(f"{self.prefix}{file or self.path}: {what}")

    def grid_error(self, err: GridError) -> EngineOutputError:
        """Re-raise a GridError; its message names the file already when it starts with it."""
        text = str(err)
        if text.startswith(str(self.path)):
            return EngineOutputError(self.prefix + text)
        return self(text)


# ---------------------------------------------------------------------------------------------
# the public entry point


def read_potential(
    path: str | Path,
    spec: PotentialSpec,
    atoms: Atoms | None = None,
    step: int | None = None,
    pbc: Sequence[bool] | None = None,
) -> Grid:
    """Read a potential map and return it in volts, in the potential convention.

    The grid of :func:`read_map` (see there).
    """
    return read_map(path, spec, atoms, step, pbc)[0]


def read_map(
    path: str | Path,
    spec: PotentialSpec,
    atoms: Atoms | None = None,
    step: int | None = None,
    pbc: Sequence[bool] | None = None,
) -> tuple[Grid, Atoms | None]:
    """Read a potential map and return it in volts, in the potential convention, with the
    atoms the file lists (cube, XSF; Å, in the file's own frame) or None (npy/npz).

    Periodicity: a format that cannot say it (cube, npy without ``pbc``) is periodic along an
    axis where ``atoms`` is periodic and the grid spans its cell vector
    (:func:`ionwell.science.grid.periodic_like`); ``pbc`` states it outright
    (:func:`ionwell.science.grid.with_periodicity`). A map whose file lists the atoms
    wrapped into the cell, or shifted by lattice vectors, is not moved by those vectors.

    Args:
        path: the map file (already resolved; ``spec.file`` is not used here).
        spec: format, unit and sign of the file (see the module docstring for the rules when
            the file itself declares a unit or sign).
        atoms: the structure the map belongs to, for ``sign: auto`` when the file carries no
            atoms (npy/npz); Å, in the same frame as the grid.
        step: step number, named in error messages.
        pbc: periodicity of the grid's three axes, stated by the caller (None: as read).

    Returns:
        The grid: values in volts (float64, or float32 when an npy/npz array is float32),
        origin and axes in Å, positive at the nuclei; and the file's atoms (None for npy/npz).

    Raises:
        EngineOutputError: the file is missing, empty, truncated or malformed, its sidecar is
            missing or invalid or disagrees with ``spec``, it holds non-finite values, its
            format is unknown, or ``sign: auto`` cannot decide or has no atoms.
    """
    path = Path(path)
    fail = _Fail(path, step)
    fmt = _choose_format(path, spec.format, fail)
    if not path.exists():
        raise fail(f"the potential map file does not exist (expected the {fmt} map here)")
    if not path.is_file():
        raise fail(f"is not a file (expected the {fmt} potential map)")
    try:
        size = path.stat().st_size
    except OSError as err:
        raise fail(f"cannot read the potential map ({err.strerror or err})") from None
    if size == 0:
        raise fail(f"the file is empty (expected the {fmt} potential map)")

    declared_unit: str | None = None  # what a sidecar states (a conflict is an error)
    declared_sign: str | None = None
    convention = "V"  # the format's own convention, used only when the config gives no unit
    file_atoms: Atoms | None = None
    if fmt in ("cube", "xsf") and (said := not_a_potential(path, fmt)) is not None:
        logger.warning(
            "%s%s: the header says %r, not an electrostatic potential; read as one all the same "
            "(in a campaign, check that the engine's outputs.potential names the potential map)",
            fail.prefix,
            path,
            said,
        )
    if fmt == "cube":
        grid, file_atoms = _read_cube(path, fail)
        convention = "hartree"  # atomic units, hartree/e
        raw_unit = "hartree"  # read_cube has multiplied by Hartree already
    elif fmt in ("npy", "npz"):
        grid, meta = _read_numpy(path, fail)
        declared_unit, declared_sign = meta.unit, meta.sign
        raw_unit = "V"  # values as stored
    else:  # xsf
        grid, file_atoms = _read_xsf(path, fail)
        raw_unit = "V"

    unit = _resolve("unit", spec.unit, declared_unit, fail) or convention
    sign = _resolve("sign", spec.sign, declared_sign, fail) or "potential"
    if fmt == "cube" and unit == "V":
        logger.warning(
            "%s: reading the cube's values as %s (config unit); cube files conventionally hold "
            "atomic units, give unit: hartree if this one does",
            path,
            unit,
        )

    factor = POTENTIAL_UNITS[unit] / POTENTIAL_UNITS[raw_unit]
    values = grid.values
    if factor != 1.0:
        values = values * factor
    if not np.isfinite(values).all():
        bad = np.argwhere(~np.isfinite(values))
        raise fail(
            f"{len(bad)} grid value(s) are not finite numbers (first at index "
            f"{tuple(int(i) for i in bad[0])}: {values[tuple(bad[0])]}); expected a finite "
            "potential everywhere"
        )
    grid = Grid(origin=grid.origin, axes=grid.axes, values=values, pbc=grid.pbc)

    if sign == "auto":
        reference = file_atoms if file_atoms is not None and len(file_atoms) else atoms
        if reference is None or len(reference) == 0:
            raise fail(
                "sign: auto needs the atoms to find the nuclei, and neither the file nor the "
                "caller provides any; give sign: potential or sign: electron"
            )
    else:
        reference = atoms if atoms is not None else Atoms()
    try:
        grid = orient(grid, reference, sign)
    except GridError as err:
        raise fail.grid_error(err) from None
    if atoms is not None and atoms.pbc.any():
        grid = periodic_like(grid, atoms)
    if pbc is not None:
        grid = with_periodicity(grid, pbc)
    if file_atoms is not None and atoms is not None:
        grid = _align(grid, file_atoms, atoms, fail)
    logger.debug(
        "read %s potential map %s: shape %s, unit %s, sign %s", fmt, path, grid.shape, unit, sign
    )
    return grid, file_atoms


#: Words in a map's header that name what it holds (whole words, case-insensitive): a header
#: naming a potential is one; else a header naming one of the others is not.
POTENTIAL_WORDS = frozenset({"potential", "potentials", "electrostatic", "esp", "mep", "locpot"})
OTHER_WORDS = frozenset(
    {
        "density", "densities", "rho", "orbital", "orbitals", "wavefunction", "wavefunctions",
        "elf", "chgcar", "homo", "lumo",
    }
)  # fmt: skip


def not_a_potential(path: str | Path, fmt: str | None = None) -> str | None:
    """The header text of a map file saying it holds something other than a potential, or None.

    Read are a cube's two comment lines and an XSF file's data-grid block names (npy/npz carry
    no free text). A line counts when it names one of :data:`OTHER_WORDS` (an electron or spin
    density, an orbital, ELF) and none of :data:`POTENTIAL_WORDS` — so Gaussian's
    "Electrostatic potential from Total SCF Density" is a potential, PySCF's "Electron density
    in real space" is not, and a header that says neither (ASE's, Quantum ESPRESSO's) passes.
    """
    import re

    path = Path(path)
    fmt = fmt or SUFFIXES.get(path.suffix.lower(), "cube")
    lines: list[str] = []
    try:
        with path.open("rb") as f:
            if fmt == "cube":
                lines = [f.readline(4096).decode("latin-1") for _ in range(2)]
            elif fmt == "xsf":
                block = False
                for raw in f:
                    text = raw.decode("latin-1").strip()
                    if block:
                        lines.append(text)  # the block's name
                        block = False
                    if text.upper().startswith("BEGIN_BLOCK_DATAGRID_3D"):
                        block = True
                    elif text.upper().startswith("BEGIN_DATAGRID_3D"):
                        lines.append(text[len("BEGIN_DATAGRID_3D") :])
                        break
    except OSError:
        return None  # the reader names the problem
    for line in lines:
        words = set(re.findall(r"[a-z]+", line.lower()))
        if words & OTHER_WORDS and not words & POTENTIAL_WORDS:
            return line.strip()
    return None


#: Largest deviation (Å) from one common shift for the file's atoms to count as ours, moved.
FRAME_TOLERANCE = 2e-3


def _align(grid: Grid, file_atoms: Atoms, atoms: Atoms, fail: _Fail) -> Grid:
    """The grid moved into the frame of ``atoms`` when the file lists the same atoms shifted.

    Programs that centre a molecule in their box (and write the map in that frame) are common;
    the map is then moved back by that one shift. Atoms listed in another order, or moved
    differently, are an error: the map would not belong to the structure.
    """
    if len(file_atoms) == 0:
        return grid
    if len(file_atoms) != len(atoms):
        raise fail(
            f"the file lists {len(file_atoms)} atoms, the structure has {len(atoms)}: the map "
            "does not belong to the structure"
        )
    if list(file_atoms.numbers) != list(atoms.numbers):
        raise fail("the file lists other elements, or another order, than the structure")
    d = np.asarray(atoms.positions) - np.asarray(file_atoms.positions)
    if atoms.pbc.any():  # a program may wrap atoms into its cell
        from ase.geometry import find_mic

        d = d[0] + find_mic(d - d[0], atoms.cell, atoms.pbc)[0]
    shift = d.mean(axis=0)
    worst = float(np.abs(d - shift).max())
    if atoms.pbc.any():  # whole lattice vectors are no shift of a periodic structure
        vecs = np.asarray(atoms.cell.array, dtype=float)[atoms.pbc]
        coef = np.linalg.lstsq(vecs.T, shift, rcond=None)[0]
        shift = shift - np.round(coef) @ vecs
    if worst > FRAME_TOLERANCE:
        raise fail(
            f"the file's atoms are not the structure's atoms moved by one shift (off by up to "
            f"{worst:.3f} Å): the map does not belong to the structure"
        )
    if np.abs(shift).max() > 1e-6:
        logger.info("map %s written in a shifted frame; moved by %s Å", fail.path, shift.round(4))
        return Grid(origin=grid.origin + shift, axes=grid.axes, values=grid.values, pbc=grid.pbc)
    return grid


def _choose_format(path: Path, fmt: str, fail: _Fail) -> str:
    if fmt == "ase":
        raise fail(
            "format 'ase' is not supported (ASE reads volumetric data only from cube and XSF "
            f"files, which ionwell reads itself); supported formats: {_SUPPORTED}"
        )
    if fmt == "auto":
        chosen = SUFFIXES.get(path.suffix.lower())
        if chosen is None:
            raise fail(
                f"cannot tell the format of the potential map from its suffix "
                f"{path.suffix or '(none)'!r}; expected one of {_SUPPORTED}, or give "
                "format: explicitly"
            )
        return chosen
    if fmt not in ("cube", "npy", "npz", "xsf"):
        raise fail(f"unknown potential map format {fmt!r}; supported formats: {_SUPPORTED}")
    return fmt


def _resolve(name: str, configured: str | None, declared: str | None, fail: _Fail) -> str | None:
    """The unit or sign in force: the config's, checked against the sidecar's declaration.

    ``auto`` (sign) and ``None`` defer to the declaration; None when neither says anything.
    """
    if configured is None or configured == "auto":
        return declared if declared is not None else configured
    if declared is not None and configured != declared:
        raise fail(
            f"the config gives {name} {configured!r} but the sidecar declares {declared!r}; "
            f"make them agree (set {name}: {declared} in the engine's potential output if the "
            "sidecar is right)"
        )
    return configured


# ---------------------------------------------------------------------------------------------
# cube


def _read_cube(path: Path, fail: _Fail) -> tuple[Grid, Atoms]:
    """ionwell's fast reader: values come back as hartree/e × ``Hartree`` (volts)."""
    try:
        return read_cube(path)
    except GridError as err:
        raise fail.grid_error(err) from None


# ---------------------------------------------------------------------------------------------
# npy / npz + sidecar


def _read_sidecar(path: Path, fail: _Fail) -> _Sidecar:
    side = sidecar_path(path)
    if not side.is_file():
        raise fail(
            f"the JSON sidecar {side.name} describing the grid is missing (expected keys "
            f"{_SIDECAR_KEYS} beside the array file)"
        )
    try:
        data = json.loads(side.read_text())
    except OSError as err:
        raise fail(f"cannot read the sidecar ({err.strerror or err})", side) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise fail(f"the sidecar is not valid JSON ({err}); expected an object", side) from None
    if not isinstance(data, dict):
        raise fail(
            f"the sidecar holds a {type(data).__name__}; expected a JSON object with keys "
            f"{_SIDECAR_KEYS}",
            side,
        )
    try:
        return _Sidecar.model_validate(data)
    except ValidationError as err:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or '(top)'}: {e['msg']}" for e in err.errors()
        )
        raise fail(
            f"invalid sidecar ({problems}); expected keys {_SIDECAR_KEYS} (origin [3] Å, "
            "axes [[3],[3],[3]] Å, shape [3], optional pbc [3], unit, sign)",
            side,
        ) from None


_NPY_MAGIC = b"\x93NUMPY"
_ZIP_MAGIC = b"PK\x03\x04"


def _load_array(path: Path, fail: _Fail) -> np.ndarray:
    try:
        with path.open("rb") as f:
            magic = f.read(6)
    except OSError as err:
        raise fail(f"cannot read the array file ({err.strerror or err})") from None
    if not (magic.startswith(_NPY_MAGIC) or magic.startswith(_ZIP_MAGIC)):
        raise fail(
            "not a NumPy .npy file or .npz archive (it does not start with their magic bytes); "
            "expected a 3-D numeric array"
        )
    try:
        check_array_file(path)  # before numpy allocates what the headers declare
    except GridError as err:
        raise fail.grid_error(err) from None
    try:
        loaded = np.load(path, allow_pickle=False)
    except OSError as err:
        raise fail(f"cannot read the array file ({err.strerror or err})") from None
    except (ValueError, EOFError, zipfile.BadZipFile) as err:
        raise fail(
            f"not a readable NumPy .npy/.npz file ({err}; truncated or corrupt?); expected a "
            "3-D numeric array"
        ) from None
    if isinstance(loaded, np.ndarray):
        return loaded
    try:
        with loaded as z:
            names = list(z.files)
            if "values" in names:
                key = "values"
            elif len(names) == 1:
                key = names[0]
            else:
                raise fail(
                    f"the .npz archive holds arrays {names or '(none)'}; expected one named "
                    "'values' or a single array"
                )
            return z[key]
    except EngineOutputError:
        raise
    except Exception as err:  # zip member errors of all kinds: truncated or corrupt archive
        raise fail(f"the .npz archive cannot be read ({err}); it may be truncated") from None


def _read_numpy(path: Path, fail: _Fail) -> tuple[Grid, _Sidecar]:
    meta = _read_sidecar(path, fail)
    values = _load_array(path, fail)
    if values.dtype.kind in "iub":
        values = values.astype(np.float64)
    elif values.dtype.kind != "f":
        raise fail(f"the array has dtype {values.dtype}; expected real numbers")
    elif values.dtype not in (np.float32, np.float64):
        values = values.astype(np.float64)
    if values.shape != meta.shape:
        raise fail(
            f"the array has shape {values.shape} but the sidecar {sidecar_path(path).name} "
            f"gives shape {list(meta.shape)}; expected the same grid size"
        )
    if min(meta.shape) < 1:
        raise fail(f"the grid has shape {list(meta.shape)}; expected at least one point per axis")
    axes = np.array(meta.axes, dtype=float)
    if abs(np.linalg.det(axes)) < 1e-12:
        raise fail(
            f"the sidecar's axes {meta.axes} are linearly dependent (a flat grid); expected three "
            "independent step vectors"
        )
    grid = Grid(origin=np.array(meta.origin, dtype=float), axes=axes, values=values, pbc=meta.pbc)
    return grid, meta


def write_potential_npy(path: str | Path, grid: Grid, unit: Unit = "V") -> None:
    """Write ``grid`` (volts) as a NumPy array file plus its JSON sidecar ``<file>.json``.

    A path ending in ``.npz`` gets an uncompressed archive with the array ``values``; any other
    path gets a ``.npy`` file at exactly ``path``. Values are stored in ``unit`` (divided by
    ``POTENTIAL_UNITS[unit]``; with ``"V"`` untouched, so the dtype and every bit are kept) and
    the sidecar records origin, axes, shape, pbc, the unit and ``sign: potential``. Floats go
    to JSON with ``repr`` precision, so origin and axes round-trip exactly.

    Raises:
        EngineOutputError: the files cannot be written, or ``unit`` is unknown.
    """
    path = Path(path)
    if unit not in POTENTIAL_UNITS:
        raise EngineOutputError(
            f"{path}: unknown potential unit {unit!r}; expected one of {sorted(POTENTIAL_UNITS)}"
        )
    values = np.ascontiguousarray(grid.values)
    if unit != "V":
        values = values / POTENTIAL_UNITS[unit]
    meta = {
        "origin": [float(x) for x in np.asarray(grid.origin, dtype=float)],
        "axes": [[float(x) for x in row] for row in np.asarray(grid.axes, dtype=float)],
        "shape": [int(n) for n in values.shape],
        "pbc": [bool(p) for p in grid.pbc],
        "unit": unit,
        "sign": "potential",
    }
    if not all(math.isfinite(x) for x in meta["origin"] + sum(meta["axes"], [])):
        raise EngineOutputError(f"{path}: the grid's origin or axes are not finite")
    try:
        with path.open("wb") as f:
            if path.suffix.lower() == ".npz":
                np.savez(f, values=values)
            else:
                np.save(f, values, allow_pickle=False)
        sidecar_path(path).write_text(json.dumps(meta, indent=1) + "\n")
    except OSError as err:
        raise EngineOutputError(
            f"{path}: cannot write the potential map ({err.strerror or err})"
        ) from None


# ---------------------------------------------------------------------------------------------
# XSF


def _check_xsf_size(path: Path, fail: _Fail) -> None:
    """Refuse a data grid whose declared point count exceeds what the rest of the file can
    hold (each value is a digit and a separator at least), before ASE parses it."""
    try:
        size = path.stat().st_size
        with path.open("rb") as f:
            for raw in f:
                if raw.strip().upper().startswith(b"BEGIN_DATAGRID_3D"):
                    counts = f.readline().split()
                    break
            else:
                return  # no data grid: the reader names it
            room = (size - f.tell() + 1) // 2
    except OSError:
        return  # the reader names it
    try:
        n = [int(c) for c in counts[:3]]
    except ValueError:
        return
    if len(n) == 3 and all(k > 0 for k in n) and math.prod(n) > room:
        raise fail(
            f"the data grid declares {n[0]}×{n[1]}×{n[2]} = {math.prod(n)} values, but the file "
            f"is {size} bytes, with room for at most {room} numbers after that line; expected "
            "point counts that match the file (wrong counts, or a truncated file)"
        )


def _read_xsf(path: Path, fail: _Fail) -> tuple[Grid, Atoms]:
    from ase.io.xsf import read_xsf

    _check_xsf_size(path, fail)
    try:
        with path.open() as f:
            data, origin, span, atoms = read_xsf(f, read_data=True)
    except OSError as err:
        raise fail(f"cannot read the XSF file ({err.strerror or err})") from None
    except (StopIteration, RuntimeError) as err:
        # the reader is a generator: running out of lines inside it is a RuntimeError (PEP 479)
        if isinstance(err, RuntimeError) and not isinstance(err.__cause__, StopIteration):
            raise fail(f"the XSF file cannot be read (RuntimeError: {err})") from None
        raise fail(
            "the XSF file ends early; expected a structure and a complete "
            "BEGIN_BLOCK_DATAGRID_3D ... END_BLOCK_DATAGRID_3D block (truncated?)"
        ) from None
    except UnboundLocalError:
        raise fail(
            "the XSF file has no BEGIN_BLOCK_DATAGRID_3D block after its atoms; expected a 3-D "
            "data grid"
        ) from None
    except AssertionError:
        raise fail(
            "the XSF file is malformed: ASE's reader expected a CRYSTAL/SLAB/POLYMER/ATOMS "
            "section followed by one BEGIN_BLOCK_DATAGRID_3D block whose value count equals "
            "nx×ny×nz (truncated or not a 3-D data grid?)"
        ) from None
    except Exception as err:  # ValueError, KeyError, IndexError: bad numbers or symbols
        raise fail(f"the XSF file cannot be read ({type(err).__name__}: {err})") from None
    values = np.asarray(data, dtype=float)
    span = np.asarray(span, dtype=float)
    if values.ndim != 3 or span.shape != (3, 3) or np.asarray(origin).shape != (3,):
        raise fail(
            f"the XSF data grid has {values.ndim} dimensions; expected a 3-D data grid with an "
            "origin and three spanning vectors"
        )
    if min(values.shape) < 2:
        raise fail(
            f"the XSF data grid has shape {list(values.shape)}; expected at least two points "
            "per axis (a general grid includes both ends)"
        )
    pbc = [False, False, False]
    cell = np.asarray(atoms.cell[:], dtype=float)
    for ax in range(3):
        # a periodic general grid repeats its first plane at the end of a cell-sized span
        if atoms.pbc[ax] and np.allclose(span[ax], cell[ax], rtol=1e-6, atol=1e-5):
            pbc[ax] = True
    axes = span / (np.asarray(values.shape, dtype=float)[:, None] - 1.0)
    values = values[
        slice(None, -1) if pbc[0] else slice(None),
        slice(None, -1) if pbc[1] else slice(None),
        slice(None, -1) if pbc[2] else slice(None),
    ]
    if abs(np.linalg.det(axes)) < 1e-12:
        raise fail("the XSF spanning vectors are linearly dependent (a flat grid)")
    grid = Grid(
        origin=np.asarray(origin, dtype=float),
        axes=axes,
        values=np.ascontiguousarray(values),
        pbc=tuple(pbc),  # type: ignore[arg-type]
    )
    return grid, atoms
