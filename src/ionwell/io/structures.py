"""Structure files: :func:`read_structure` (the only reader of user structure files) and
:func:`load_host` (a campaign's host: built from its builder, or read from its file).

Any ASE-readable format; lengths in Å as ASE returns them. Every structure read passes
:func:`ionwell.science.host.check_atoms` (finite positions, no two atoms closer than
:data:`~ionwell.science.host.MIN_ATOM_DISTANCE`). Campaigns read the host through
:func:`load_host`, ``ionwell place`` reads ``--structure`` through :func:`read_structure`.
"""

from __future__ import annotations

from pathlib import Path

from ase import Atoms

from ionwell.config.campaign import HostConfig
from ionwell.errors import StructureError
from ionwell.science.host import build_host, check_atoms

__all__ = ["load_host", "read_structure"]


#: Fewest bytes of an atom line of an XYZ file ("C 0 0 0" and a line end).
_MIN_XYZ_LINE = 8


def _check_xyz_counts(path: Path) -> None:
    """Refuse an XYZ frame declaring more atoms than the rest of the file can hold, before
    ASE's reader skips that many lines one by one (a count of 10¹² would take hours)."""
    try:
        size = path.stat().st_size
        with path.open("rb") as f:
            frame = 0
            while line := f.readline():
                if not line.strip():
                    continue
                try:
                    natoms = int(line)
                except ValueError:
                    return  # not a count line: ASE's reader names the problem
                frame += 1
                room = (size - f.tell()) // _MIN_XYZ_LINE + 1
                if natoms > room:
                    raise StructureError(
                        f"{path}: frame {frame} declares {natoms} atoms, but the file is {size} "
                        f"bytes, with room for at most {room} atom lines after that count; "
                        "expected an atom count that matches the file (a wrong count, or a "
                        "truncated file)"
                    )
                for _ in range(max(natoms, 0) + 1):  # the comment line and the atom lines
                    f.readline()
    except OSError as err:
        raise StructureError(f"{path}: cannot read ({err.strerror or err})") from None


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
    :data:`~ionwell.science.host.MIN_ATOM_DISTANCE`.
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
    if format in ("xyz", "extxyz"):
        _check_xyz_counts(path)
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
    check_atoms(atoms, path)
    return atoms


def load_host(host: HostConfig, base_dir: str | Path) -> Atoms:
    """The host structure: built from ``host.builder`` or read from ``host.file``.

    A relative file path is resolved against ``base_dir`` (the folder of the config file).
    """
    if host.builder is not None:
        return build_host(host.builder)
    assert host.file is not None
    path = Path(host.file).expanduser()
    if not path.is_absolute():
        path = Path(base_dir) / path
    return read_structure(path, host.format)
