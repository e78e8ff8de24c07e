"""Potential maps on regular grids: the :class:`Grid` type, readers, writers, sign handling.

A :class:`Grid` holds the electrostatic potential in **volts**, in the sign convention of the
potential felt by a positive test charge (nuclei are maxima). Point ``(i, j, k)`` sits at
``origin + i*axes[0] + j*axes[1] + k*axes[2]`` (Å). Readers convert units and sign at the edge
(``ase.units``); nothing else in ionwell converts.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
from ase import Atoms
from ase.units import Bohr, Hartree

from ionwell.errors import GridError

__all__ = [
    "Grid",
    "check_array_file",
    "detect_sign",
    "fractional_index",
    "grid_digest",
    "interpolate",
    "load_npz",
    "orient",
    "points_within",
    "read_cube",
    "save_npz",
    "sphere_mask",
    "write_cube",
]

Sign = Literal["potential", "electron"]


@dataclass(frozen=True)
class Grid:
    """A scalar field on a regular (possibly skewed, possibly periodic) grid.

    Attributes:
        origin: position of point (0, 0, 0), Å, shape (3,).
        axes: step vectors between neighbouring points along each index, Å, shape (3, 3).
        values: the field, volts, shape (n0, n1, n2).
        pbc: periodicity along each index axis; a periodic axis has period ``n * axes[i]``.
    """

    origin: np.ndarray
    axes: np.ndarray
    values: np.ndarray
    pbc: tuple[bool, bool, bool] = (False, False, False)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.values.shape)  # type: ignore[return-value]

    @property
    def cell(self) -> np.ndarray:
        """The full grid box: ``axes[i] * shape[i]``, Å, shape (3, 3)."""
        return self.axes * np.asarray(self.shape)[:, None]

    def points(self, index: np.ndarray | None = None) -> np.ndarray:
        """Cartesian positions (Å) of grid points; all points (C order) when ``index`` is None.

        ``index`` is an integer or fractional array of shape (..., 3).
        """
        idx = np.indices(self.shape).reshape(3, -1).T if index is None else np.asarray(index)
        return self.origin + idx @ self.axes


# ---------------------------------------------------------------------------------------------
# geometry helpers


def fractional_index(grid: Grid, positions: np.ndarray) -> np.ndarray:
    """Fractional grid-index coordinates of Cartesian ``positions`` (Å), shape (..., 3).

    The inverse of :meth:`Grid.points`: ``grid.points(fractional_index(grid, p)) == p``.
    """
    p = np.asarray(positions, dtype=float)
    return (p - grid.origin) @ np.linalg.inv(grid.axes)


def points_within(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
    max_pairs: int = 1 << 22,
) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Grid points within ``radius`` (Å) of each centre, in batches.

    Yields ``(center_index, flat_index)`` pairs of integer arrays: grid point ``flat_index`` (C
    order over ``grid.shape``) lies within ``radius`` of centre ``center_index``
    (``distance < radius`` when ``strict``, else ``<=``). On periodic axes every periodic image of
    a centre counts (minimum image, also for skewed cells); on other axes points outside the grid
    are dropped. The search visits only an index box around each centre, so its cost grows with
    the number of centres times the points per sphere, not with the grid size.
    """
    centers = np.atleast_2d(np.asarray(centers, dtype=float))
    if centers.size == 0 or radius <= 0:
        return
    shape = np.asarray(grid.shape)
    axes = np.asarray(grid.axes, dtype=float)
    inv = np.linalg.inv(axes)
    frac = fractional_index(grid, centers)
    base = np.floor(frac).astype(np.int64)
    # a sphere of radius r spans r * |column i of inv(axes)| in index i
    half = np.ceil(radius * np.linalg.norm(inv, axis=0)).astype(np.int64)
    rng = [np.arange(-half[i], half[i] + 2) for i in range(3)]
    offsets = np.stack(np.meshgrid(*rng, indexing="ij"), axis=-1).reshape(-1, 3)
    b = offsets @ axes  # Cartesian offset of each stencil point from the base point
    # drop stencil points no centre inside the base voxel can reach
    voxel_centre = 0.5 * axes.sum(axis=0)
    slack = 0.5 * np.linalg.norm(axes, axis=1).sum()
    keep = np.linalg.norm(b - voxel_centre, axis=1) <= radius + slack + 1e-9
    offsets, b = offsets[keep], b[keep]
    b2 = np.einsum("ij,ij->i", b, b)
    r2 = radius * radius
    a = (base - frac) @ axes  # Cartesian offset of each base point from its centre
    a2 = np.einsum("ij,ij->i", a, a)
    per = max(1, max_pairs // max(1, len(offsets)))
    strides = np.array([shape[1] * shape[2], shape[2], 1], dtype=np.int64)
    for start in range(0, len(centers), per):
        sl = slice(start, start + per)
        d2 = a2[sl, None] + b2[None, :] + 2.0 * (a[sl] @ b.T)
        ci, ki = np.nonzero(d2 < r2 if strict else d2 <= r2)
        if ci.size == 0:
            continue
        idx = base[sl][ci] + offsets[ki]
        ok = np.ones(ci.size, dtype=bool)
        for ax in range(3):
            if grid.pbc[ax]:
                idx[:, ax] %= shape[ax]
            else:
                ok &= (idx[:, ax] >= 0) & (idx[:, ax] < shape[ax])
        if not ok.all():
            ci, idx = ci[ok], idx[ok]
        if ci.size:
            yield ci + start, idx @ strides


def sphere_mask(
    grid: Grid,
    centers: np.ndarray,
    radius: float,
    *,
    strict: bool = False,
) -> np.ndarray:
    """Boolean array of ``grid.shape``: True at points within ``radius`` (Å) of any centre.

    ``distance < radius`` when ``strict``, else ``<=``. On periodic axes every periodic image of
    a centre counts (minimum image, skewed cells included); elsewhere the grid simply ends.
    The cost is bounded by the grid, not by the radius: :func:`ionwell.science.spheres.union_mask`
    runs along grid lines for small spheres and by blocks and a k-d tree for large ones.
    """
    from ionwell.science.spheres import union_mask

    return union_mask(grid, centers, radius, strict=strict)


def interpolate(grid: Grid, positions: np.ndarray) -> np.ndarray:
    """Trilinear interpolation of ``grid.values`` at Cartesian ``positions`` (Å), shape (..., 3).

    Works in fractional index space, so skewed axes are handled. Periodic axes wrap; on other
    axes a position outside the grid gives NaN.
    """
    p = np.asarray(positions, dtype=float)
    lead = p.shape[:-1]
    f = fractional_index(grid, p.reshape(-1, 3))
    shape = np.asarray(grid.shape)
    outside = np.zeros(len(f), dtype=bool)
    for ax in range(3):
        if not grid.pbc[ax]:
            n = shape[ax]
            outside |= (f[:, ax] < -1e-9) | (f[:, ax] > n - 1 + 1e-9)
            # the last point itself belongs to the cell below it (weight 1 on its upper corner)
            np.clip(f[:, ax], 0, max(n - 1, 0), out=f[:, ax])
    lower = np.floor(f).astype(np.int64)
    for ax in range(3):
        if not grid.pbc[ax]:
            np.clip(lower[:, ax], 0, max(shape[ax] - 2, 0), out=lower[:, ax])
    t = f - lower
    v = grid.values
    result = np.zeros(len(f))
    for corner in np.ndindex(2, 2, 2):
        c = np.asarray(corner)
        idx = lower + c
        for ax in range(3):
            if grid.pbc[ax]:
                idx[:, ax] %= shape[ax]
            else:
                np.minimum(idx[:, ax], shape[ax] - 1, out=idx[:, ax])
        w = np.prod(np.where(c == 1, t, 1.0 - t), axis=1)
        result += w * v[idx[:, 0], idx[:, 1], idx[:, 2]]
    result[outside] = np.nan
    return result.reshape(lead)


# ---------------------------------------------------------------------------------------------
# Gaussian cube files

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
    CODATA via ASE); the sign is kept as written (see :func:`orient`). Axis vectors are in bohr
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


# ---------------------------------------------------------------------------------------------
# compact storage

_NPZ_FORMAT = "ionwell-grid-1"


def save_npz(path: str | Path, grid: Grid) -> None:
    """Store ``grid`` compressed: values as float32, origin and axes as float64, pbc.

    The file is written at exactly ``path`` (no suffix is added).
    """
    path = Path(path)
    try:
        with path.open("wb") as f:
            np.savez_compressed(
                f,
                format=np.array(_NPZ_FORMAT),
                values=np.ascontiguousarray(grid.values, dtype=np.float32),
                origin=np.asarray(grid.origin, dtype=np.float64),
                axes=np.asarray(grid.axes, dtype=np.float64),
                pbc=np.asarray(grid.pbc, dtype=bool),
            )
    except OSError as err:
        raise GridError(f"{path}: cannot write the grid file ({err.strerror or err})") from None


#: Most bytes deflate can unpack from one packed byte (its limit is about 1032:1), with slack.
_DEFLATE_RATIO = 1100


def _npy_data_size(f) -> tuple[int, int]:
    """Bytes of array data an ``.npy`` header (read from ``f``) declares, and the header's
    length. Raises ValueError on a malformed header."""
    from numpy.lib import format as npy_format

    version = npy_format.read_magic(f)
    if version == (1, 0):
        shape, _, dtype = npy_format.read_array_header_1_0(f)
    elif version == (2, 0):
        shape, _, dtype = npy_format.read_array_header_2_0(f)
    else:  # (3, 0): the 2.0 layout with a UTF-8 header
        shape, _, dtype = npy_format._read_array_header(f, version)
    return math.prod(shape) * dtype.itemsize, f.tell()


def check_array_file(path: str | Path) -> None:
    """Check a NumPy ``.npy`` file or ``.npz`` archive before numpy allocates from its headers.

    Each array header declares a shape and dtype; numpy allocates that much before reading.
    Raises :class:`GridError` naming the file (and member) when a header declares more data
    than the file (or the archive member) holds. A malformed header is left to ``np.load``.
    """
    import zipfile

    path = Path(path)
    try:
        with path.open("rb") as f:
            magic = f.read(6)
            f.seek(0)
            if magic == b"\x93NUMPY":
                size = path.stat().st_size
                try:
                    need, head = _npy_data_size(f)
                except ValueError:
                    return
                if need > size - head:
                    raise GridError(
                        f"{path}: the array header declares {need} bytes of data, but the file "
                        f"is {size} bytes; expected a complete .npy array (truncated, or a "
                        "wrong shape in its header)"
                    )
                return
        if not zipfile.is_zipfile(path):
            return
        with zipfile.ZipFile(path) as z:
            for info in z.infolist():
                if not info.filename.endswith(".npy"):
                    continue
                packed = info.compress_size
                limit = {zipfile.ZIP_STORED: packed, zipfile.ZIP_DEFLATED: packed * _DEFLATE_RATIO}
                if info.file_size > limit.get(info.compress_type, info.file_size):
                    raise GridError(
                        f"{path}: archive member {info.filename} claims {info.file_size} bytes "
                        f"unpacked from {packed} packed bytes, more than its compression can "
                        "give; expected an intact .npz archive (corrupt directory?)"
                    )
                with z.open(info) as member:
                    try:
                        need, head = _npy_data_size(member)
                    except ValueError:
                        continue
                if need > info.file_size - head:
                    raise GridError(
                        f"{path}: archive member {info.filename}: the array header declares "
                        f"{need} bytes of data, but the member holds {info.file_size} bytes; "
                        "expected a complete array (truncated, or a wrong shape in its header)"
                    )
    except OSError as err:
        raise GridError(f"{path}: cannot read the array file ({err.strerror or err})") from None
    except (zipfile.BadZipFile, EOFError):
        return  # a broken archive: np.load names it


def load_npz(path: str | Path) -> Grid:
    """Read a grid written by :func:`save_npz`; values stay float32."""
    path = Path(path)
    check_array_file(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except OSError as err:
        raise GridError(f"{path}: cannot read the grid file ({err.strerror or err})") from None
    except Exception as err:  # zipfile/format errors of all kinds
        raise GridError(f"{path}: not a readable .npz grid file ({err})") from None
    missing = {"values", "origin", "axes", "pbc"} - set(data)
    if missing or str(data.get("format", "")) != _NPZ_FORMAT:
        raise GridError(
            f"{path}: not an ionwell grid file (expected format {_NPZ_FORMAT!r} with values, "
            f"origin, axes, pbc; missing {sorted(missing) or 'format tag'})"
        )
    values, origin, axes, pbc = data["values"], data["origin"], data["axes"], data["pbc"]
    if values.ndim != 3 or origin.shape != (3,) or axes.shape != (3, 3) or pbc.shape != (3,):
        raise GridError(
            f"{path}: expected values of 3 dimensions, origin (3,), axes (3, 3), pbc (3,); got "
            f"{values.shape}, {origin.shape}, {axes.shape}, {pbc.shape}"
        )
    if not np.isfinite(values).all():
        raise GridError(f"{path}: the grid holds non-finite values")
    return Grid(
        origin=origin.astype(float),
        axes=axes.astype(float),
        values=values.astype(np.float32, copy=False),
        pbc=tuple(bool(p) for p in pbc),  # type: ignore[arg-type]
    )


def grid_digest(grid: Grid) -> str:
    """SHA-256 (hex) of a grid as stored: float32 values plus geometry.

    Hashed, in order: the format tag, the shape (3 × int64), origin and axes (float64), pbc
    (3 bytes) and the values as little-endian float32 in C order. A grid and its
    :func:`save_npz`/:func:`load_npz` round trip have the same digest.
    """
    h = hashlib.sha256()
    h.update(_NPZ_FORMAT.encode() + b"\0")
    h.update(np.asarray(grid.shape, dtype="<i8").tobytes())
    h.update(np.asarray(grid.origin, dtype="<f8").tobytes())
    h.update(np.asarray(grid.axes, dtype="<f8").tobytes())
    h.update(np.asarray(grid.pbc, dtype=np.uint8).tobytes())
    h.update(np.ascontiguousarray(grid.values, dtype="<f4").tobytes())
    return h.hexdigest()


# ---------------------------------------------------------------------------------------------
# sign convention

_NEAR_NUCLEUS = 0.6  # Å: grid points this close to a nucleus carry its signature
_STANDOUT = 5.0  # robust standard deviations from the median that count as "stands out"
_AGREEMENT = 0.9  # share of the telling atoms that must agree


def detect_sign(grid: Grid, atoms: Atoms) -> Sign:
    """Tell the sign convention of a potential map from its values near the nuclei.

    In the potential convention (potential felt by a positive charge) the nuclei are large
    positive maxima; in the electron convention (potential energy of an electron, per e) they are
    large negative minima. For each atom, the grid point within ``max(0.6 Å, one grid step)`` of
    its nucleus that departs most from the map's median is compared with the spread of the map
    (median absolute deviation); an atom tells when that departure exceeds 5 robust standard
    deviations. The answer needs at least one telling atom and 90 % of them agreeing.

    Raises:
        GridError: when the map cannot tell (no grid point near any nucleus, a flat map, values
            near the nuclei that do not stand out, or mixed evidence).
    """
    hint = "; give the convention explicitly with --sign potential|electron"
    if len(atoms) == 0:
        raise GridError("cannot tell the sign of the potential map: there are no atoms" + hint)
    values = np.asarray(grid.values)
    flat = values.ravel()
    sample = flat[:: max(1, flat.size // 2_000_000)].astype(float)
    median = float(np.median(sample))
    scale = 1.4826 * float(np.median(np.abs(sample - median)))
    if scale == 0.0:
        scale = float(np.std(sample))
    if scale == 0.0 or not math.isfinite(scale):
        raise GridError("cannot tell the sign of the potential map: the map is flat" + hint)
    step = float(np.linalg.norm(grid.axes, axis=1).max())
    radius = max(_NEAR_NUCLEUS, step)
    best = np.zeros(len(atoms))  # most extreme (value - median) per atom
    seen = np.zeros(len(atoms), dtype=bool)
    for ci, fi in points_within(grid, atoms.positions, radius):
        dev = flat[fi].astype(float) - median
        # the largest departure per atom: sort by atom, then |departure|; take each group's last
        order = np.lexsort((np.abs(dev), ci))
        ci, dev = ci[order], dev[order]
        last = np.r_[ci[1:] != ci[:-1], True]
        ci, dev = ci[last], dev[last]
        upd = np.abs(dev) > np.abs(best[ci])
        best[ci[upd]] = dev[upd]
        seen[ci] = True
    if not seen.any():
        raise GridError(
            f"cannot tell the sign of the potential map: no grid point lies within {radius:.2f} Å "
            "of any nucleus (the grid does not cover the atoms)" + hint
        )
    z = best / scale
    positive = int(np.count_nonzero(z > _STANDOUT))
    negative = int(np.count_nonzero(z < -_STANDOUT))
    telling = positive + negative
    if telling == 0:
        raise GridError(
            "cannot tell the sign of the potential map: the values near the nuclei do not stand "
            f"out from the rest of the map (within {_STANDOUT:g} robust standard deviations of "
            "its median)" + hint
        )
    if positive >= _AGREEMENT * telling:
        return "potential"
    if negative >= _AGREEMENT * telling:
        return "electron"
    raise GridError(
        f"cannot tell the sign of the potential map: mixed evidence, {positive} nuclei sit at "
        f"large maxima and {negative} at large minima" + hint
    )


def orient(grid: Grid, atoms: Atoms, sign: str = "auto") -> Grid:
    """Return ``grid`` in the potential convention (nuclei are maxima).

    ``sign`` is ``"potential"`` (kept as is), ``"electron"`` (values negated) or ``"auto"``
    (decided by :func:`detect_sign`).
    """
    if sign == "auto":
        sign = detect_sign(grid, atoms)
    if sign == "potential":
        return grid
    if sign == "electron":
        return Grid(origin=grid.origin, axes=grid.axes, values=-grid.values, pbc=grid.pbc)
    raise GridError(f"unknown sign convention {sign!r}; expected auto, potential or electron")
