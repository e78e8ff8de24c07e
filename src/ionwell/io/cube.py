"""Gaussian cube files: :func:`read_cube` and :func:`write_cube` (the only cube reader/writer).

A cube stores a scalar field in atomic units: values in hartree/e, lengths in bohr (axis
vectors in Å when their point count is negative). :func:`read_cube` returns a
:class:`~ionwell.science.grid.Grid` in **volts** and Å (``ase.units.Hartree`` and
``ase.units.Bohr``) with the sign as written, plus the file's atoms; deciding the sign
convention is :func:`ionwell.science.grid.orient`'s job. Engine potential maps in cube form
are read through :func:`ionwell.io.maps.read_map`, which calls :func:`read_cube` and applies
the configured unit and sign.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
from ase import Atoms
from ase.units import Bohr, Hartree

from ionwell.errors import GridError
from ionwell.science.grid import Grid

__all__ = ["read_cube", "write_cube"]

# exact powers of ten in binary64: scaling an exact integer mantissa by one of them is a single,
# correctly rounded operation (multiply for exponents >= 0, divide for exponents < 0)
_UP = np.array([10.0 ** max(k, 0) for k in range(-22, 23)])
_DOWN = np.array([10.0 ** max(-k, 0) for k in range(-22, 23)])
_CHUNK = 1 << 20  # bytes of number text parsed per batch


def _parse_fixed(raw: bytes) -> np.ndarray | None:
    """Vectorised parse of a block of numbers that all share one layout, e.g. ``-1.23456E-01``.

    Every number must be written as ``[sign]digits.digitsE(+|-)digits`` with the same count of
    digits in each part and the same exponent letter (what Fortran ``E`` and C ``%e`` formats
    produce). Returns None as soon as anything does not fit, and the caller falls back to the
    general parser. The result equals ``float()`` of each number: the mantissa is an exact
    integer (at most 15 digits) scaled by one exact power of ten.
    """
    letter = raw.find(b"E")
    if letter < 0:
        letter = raw.find(b"e")
        if letter < 0:
            return None
    u = np.frombuffer(raw, np.uint8)
    n = u.size
    e = np.flatnonzero(u == raw[letter])
    # learn the layout from the first number
    lo, hi = letter, letter
    while lo > 0 and u[lo - 1] > 32:
        lo -= 1
    while hi < n and u[hi] > 32:
        hi += 1
    tmpl = raw[lo:hi].lstrip(b"+-")
    k = tmpl.find(raw[letter : letter + 1])
    dot = tmpl.find(b".")
    nint, ndec, nexp = dot, k - dot - 1, len(tmpl) - k - 2
    if dot < 1 or ndec < 0 or not 1 <= nexp <= 3 or nint + ndec > 15:
        return None
    width = nint + ndec + 3 + nexp
    first = e - (nint + ndec + 1)
    endpos = e + 2 + nexp
    if first[0] < 0 or endpos[-1] > n:
        return None

    def col(off: int) -> np.ndarray:
        """Byte ``off`` of every number (gathered from a shifted view: no index arithmetic)."""
        return u[off:].take(first)

    digits = []
    dmax = np.zeros(e.size, np.uint8)
    for off in range(nint + ndec + 1):
        if off == nint:
            if not (col(off) == 46).all():  # the decimal point
                return None
            continue
        d = col(off)
        d -= np.uint8(48)
        np.maximum(dmax, d, out=dmax)
        digits.append(d)
    if (dmax > 9).any():
        return None
    # combine digits four at a time in uint16 (<= 9999), then into the float mantissa (exact)
    mant = np.zeros(e.size)
    for g in range(0, len(digits), 4):
        group = digits[g : g + 4]
        v = group[0].astype(np.uint16)
        for d in group[1:]:
            v *= np.uint16(10)
            v += d
        mant *= 10.0 ** len(group)
        mant += v
    es = col(nint + ndec + 2)
    eneg = es == 45
    if not (eneg | (es == 43)).all():
        return None
    ex = np.zeros(e.size, np.int64)
    for off in range(nint + ndec + 3, width):
        d = col(off)
        d -= np.uint8(48)
        if (d > 9).any():
            return None
        ex *= 10
        ex += d
    if endpos[-1] == n:
        if (u.take(endpos[:-1]) > 32).any():
            return None
    elif (u.take(endpos) > 32).any():
        return None
    before = u.take(first - 1) if first[0] > 0 else np.r_[np.uint8(32), u.take(first[1:] - 1)]
    signed = before > 32
    nsigned = int(np.count_nonzero(signed))
    # no other text in the block: every non-blank byte belongs to one of the numbers
    if int(np.count_nonzero(u > 32)) != e.size * width + nsigned:
        return None
    np.negative(ex, out=ex, where=eneg)
    ex -= ndec
    large = (ex < -22) | (ex > 22)
    np.clip(ex, -22, 22, out=ex)
    ex += 22
    out = mant * _UP.take(ex)
    out /= _DOWN.take(ex)
    if nsigned:
        idx = np.flatnonzero(signed)
        sc = before[idx]
        if not ((sc == 45) | (sc == 43)).all():
            return None
        pre = first[idx] - 2
        if not np.where(pre >= 0, u.take(np.maximum(pre, 0)) <= 32, True).all():
            return None
        neg = idx[sc == 45]
        out[neg] = -out[neg]
    for i in np.flatnonzero(large):  # beyond exact powers of ten: rare, do it the slow way
        s = int(first[i]) - int(signed[i])
        out[i] = float(raw[s : int(endpos[i])])
    return out


def _parse_general(path: Path, buf: bytes, done: int, expected: int) -> np.ndarray:
    """Parse whitespace-separated numbers with numpy's text parser; raise on any bad token."""

    def attempt(text: bytes) -> np.ndarray | None:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                return np.fromstring(text, sep=" ")
            except (ValueError, DeprecationWarning):
                return None

    out = attempt(buf)
    if out is None and (b"D" in buf or b"d" in buf):  # Fortran double-precision exponents
        out = attempt(buf.replace(b"D", b"E").replace(b"d", b"e"))
    if out is not None:
        finite = np.isfinite(out)
        if not finite.all():
            bad = int(np.flatnonzero(~finite)[0])
            raise GridError(
                f"{path}: value number {done + bad + 1} of {expected} is {out[bad]} (expected "
                "finite potential values)"
            )
        return out
    for i, token in enumerate(buf.split()):
        try:
            float(token.replace(b"D", b"E").replace(b"d", b"e"))
        except ValueError:
            shown = token[:30].decode("latin-1")
            raise GridError(
                f"{path}: value number {done + i + 1} of {expected} in the data block is not "
                f"a number: {shown!r}"
            ) from None
    raise GridError(f"{path}: the data block cannot be read as numbers")  # pragma: no cover


def _parse_numbers(path: Path, raw: bytes, start: int, expected: int) -> tuple[np.ndarray, int]:
    """The numbers of ``raw[start:]``, parsed in batches, and how many there were.

    The array holds the first ``expected`` numbers; a GridError on any value that is not a
    finite number.
    """
    view = memoryview(raw)
    out = np.empty(expected)
    n, pos, done = len(raw), start, 0
    while pos < n:
        end = min(pos + _CHUNK, n)
        while end < n and raw[end] > 32:
            end += 1
        piece = bytes(view[pos:end])
        arr = _parse_fixed(piece)
        if arr is None:
            arr = _parse_general(path, piece, done, expected)
        if done + arr.size <= expected:
            out[done : done + arr.size] = arr
        done += arr.size
        pos = end
    return out, done


#: Fewest bytes of an atom line of a cube ("Z charge x y z" and a line end).
_MIN_ATOM_LINE = 10


class _Header:
    """Line-by-line reader of a cube header with error messages naming file and line."""

    def __init__(self, path: Path, raw: bytes) -> None:
        self.path, self.raw, self.pos, self.line = path, raw, 0, 0
        self.extra: list[str] = []  # tokens after the numbers of the last line read

    def next(self, what: str) -> str:
        if self.pos >= len(self.raw):
            raise GridError(f"{self.path}: file ends in the header; expected {what}")
        end = self.raw.find(b"\n", self.pos)
        end = len(self.raw) if end < 0 else end
        text = self.raw[self.pos : end].decode("latin-1")
        self.pos, self.line = end + 1, self.line + 1
        return text

    def numbers(self, what: str, count: int, ints: tuple[int, ...] = ()) -> list[float]:
        """Read a line holding at least ``count`` numbers; the positions in ``ints`` integral."""
        text = self.next(what)
        tokens = text.split()
        try:
            vals = [float(t.replace("D", "E").replace("d", "e")) for t in tokens[:count]]
        except ValueError:
            vals = []
        if len(vals) < count or not all(math.isfinite(v) for v in vals):
            raise GridError(
                f"{self.path}: line {self.line}: expected {what}, got {text.strip()[:60]!r}"
            )
        for i in ints:
            if vals[i] != int(vals[i]):
                raise GridError(
                    f"{self.path}: line {self.line}: expected {what} (an integer first), "
                    f"got {text.strip()[:60]!r}"
                )
        self.extra = tokens[count:]
        return vals


def read_cube(path: str | Path) -> tuple[Grid, Atoms]:
    """Read a Gaussian cube file of an electrostatic potential.

    Values are taken as hartree/e (atomic units) and returned in volts (× ``ase.units.Hartree``,
    CODATA via ASE); the sign is kept as written (see :func:`ionwell.science.grid.orient`). Axis vectors are in bohr
    when their point count is positive and in Å when it is negative (the cube convention); the
    origin and atom positions are in bohr. A negative atom count announces an orbital cube whose
    header has one more record (the orbital count and numbers); such a file is accepted when it
    holds a single value per point. Grid points run with the third index fastest. Cubes carry no
    periodicity, so ``Grid.pbc`` is all False and the atoms get ``pbc=False`` and the grid box as
    their cell.

    Raises:
        GridError: the file is missing or malformed; the message names the file and what was
            expected.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise GridError(f"{path}: cannot read the cube file ({err.strerror or err})") from None
    h = _Header(path, raw)
    h.next("a title line")
    loops = h.next("a comment line").upper()
    if "OUTER LOOP" in loops and "OUTER LOOP: X" not in " ".join(loops.split()):
        raise GridError(
            f"{path}: line 2 declares a loop order other than X, Y, Z; ionwell reads cubes "
            "with the third axis running fastest only"
        )
    natoms_f, *origin = h.numbers("the atom count and the origin x y z", 4, ints=(0,))
    natoms = int(natoms_f)
    per_point = 1
    if h.extra:
        try:
            per_point = int(h.extra[0])
        except ValueError:
            per_point = 1
    counts, vectors = [], []
    for axis in range(3):
        n_f, *vec = h.numbers(f"the point count and step vector of axis {axis + 1}", 4, (0,))
        n = int(n_f)
        if n == 0:
            raise GridError(f"{path}: line {h.line}: axis {axis + 1} has zero points")
        counts.append(abs(n))
        vectors.append(np.array(vec) * (Bohr if n > 0 else 1.0))
    axes = np.array(vectors)
    if abs(np.linalg.det(axes)) < 1e-12:
        raise GridError(f"{path}: the three axis vectors are linearly dependent (a flat grid)")
    # sizes from the header are checked against the file before anything is allocated from them
    rest = len(raw) - h.pos
    if abs(natoms) > rest // _MIN_ATOM_LINE + 1:
        raise GridError(
            f"{path}: line 3 declares {abs(natoms)} atoms, but the file is {len(raw)} bytes, "
            f"with {rest} after the axis lines (each atom needs a line of five numbers); "
            "expected an atom count that matches the file (a wrong count, or a truncated file)"
        )
    numbers = np.empty(abs(natoms), dtype=int)
    positions = np.empty((abs(natoms), 3))
    for i in range(abs(natoms)):
        z, _charge, x, y, zz = h.numbers(
            f"atom {i + 1} of {abs(natoms)}: atomic number, charge, x, y, z", 5, ints=(0,)
        )
        if not 0 <= z <= 118:
            raise GridError(f"{path}: line {h.line}: atomic number {int(z)} is not an element")
        numbers[i] = int(z)
        positions[i] = (x, y, zz)
    if natoms < 0:  # orbital cube: a record "m id_1 ... id_m", possibly over several lines
        text = h.next("the orbital count and orbital numbers")
        fields = text.split()
        try:
            m = int(fields[0])
            while len(fields) < m + 1:
                fields += h.next("the rest of the orbital numbers").split()
        except (ValueError, IndexError):
            raise GridError(
                f"{path}: line {h.line}: expected the orbital count and orbital numbers "
                f"(the atom count is negative), got {text.strip()[:60]!r}"
            ) from None
        per_point = m
    if per_point != 1:
        raise GridError(
            f"{path}: the file holds {per_point} values per grid point (several orbitals or "
            "fields); ionwell expects one potential value per point"
        )
    expected = counts[0] * counts[1] * counts[2]
    room = (len(raw) - h.pos + 1) // 2  # each value is a digit and a separator at least
    if expected > room:
        raise GridError(
            f"{path}: the header declares {counts[0]}×{counts[1]}×{counts[2]} = {expected} "
            f"values, but the file is {len(raw)} bytes, with room for at most {room} numbers "
            "after the header; expected point counts (lines 4-6) that match the file (wrong "
            "counts, or a truncated file)"
        )
    values, found = _parse_numbers(path, raw, h.pos, expected)
    if found != expected:
        hint = "the file looks truncated" if found < expected else "more values than it holds"
        raise GridError(
            f"{path}: expected {counts[0]}×{counts[1]}×{counts[2]} = {expected} values after "
            f"the header, found {found} ({hint})"
        )
    values *= Hartree
    grid = Grid(
        origin=np.array(origin) * Bohr,
        axes=axes,
        values=values.reshape(counts),
        pbc=(False, False, False),
    )
    atoms = Atoms(numbers=numbers, positions=positions * Bohr, cell=grid.cell, pbc=False)
    return grid, atoms


def write_cube(path: str | Path, grid: Grid, atoms: Atoms) -> None:
    """Write ``grid`` (volts) and ``atoms`` as a Gaussian cube file.

    Values are written in hartree/e, lengths in bohr, nine significant digits (float32 values
    survive the round trip exactly), six values per line with each run of the third index
    starting on a new line. Periodicity is not representable in a cube and is dropped.
    """
    path = Path(path)
    n0, n1, n2 = grid.shape
    origin = np.asarray(grid.origin, dtype=float) / Bohr
    axes = np.asarray(grid.axes, dtype=float) / Bohr
    head = [
        "ionwell potential map, values in hartree/e",
        "OUTER LOOP: X, MIDDLE LOOP: Y, INNER LOOP: Z",
        f"{len(atoms):5d}{origin[0]:14.8f}{origin[1]:14.8f}{origin[2]:14.8f}",
    ]
    for n, v in zip((n0, n1, n2), axes, strict=True):
        head.append(f"{n:5d}{v[0]:14.8f}{v[1]:14.8f}{v[2]:14.8f}")
    for z, p in zip(atoms.numbers, atoms.positions / Bohr, strict=True):
        head.append(f"{z:5d}{float(z):14.8f}{p[0]:14.8f}{p[1]:14.8f}{p[2]:14.8f}")
    row = (" % .8E" * 6 + "\n") * (n2 // 6)
    if n2 % 6:
        row += " % .8E" * (n2 % 6) + "\n"
    values = np.asarray(grid.values, dtype=float) / Hartree
    try:
        with path.open("w") as f:
            f.write("\n".join(head) + "\n")
            for plane in values:
                f.write((row * n1) % tuple(plane.ravel().tolist()))
    except OSError as err:
        raise GridError(f"{path}: cannot write the cube file ({err.strerror or err})") from None
