"""ionwell's own grid store: a step's ``potential.npz`` (format tag ``ionwell-grid-1``).

The built-in engines write the potential map of a step with :func:`save_npz` (values float32
volts, origin and axes float64 Å, pbc), and campaigns, ``ionwell replay`` and ``ionwell place``
read it back with :func:`load_npz`, the only reader of this format. :func:`grid_digest` hashes
a grid as this format stores it. :func:`check_array_file` guards any NumPy ``.npy``/``.npz``
file (this store, and the array maps with a JSON sidecar of :mod:`ionwell.io.maps`) before
numpy allocates what its headers declare.

Engine potential maps in ``.npy``/``.npz`` form with a JSON sidecar are another format, read by
:func:`ionwell.io.maps.read_map`.
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path

import numpy as np

from ionwell.errors import GridError
from ionwell.science.grid import Grid

__all__ = ["check_array_file", "grid_digest", "load_npz", "save_npz"]

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
