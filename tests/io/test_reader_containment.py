"""Issue 14, readers / ``ionwell place`` / command-engine paths: every malformed input gives one
``ionwell: error:`` line naming the file or field, exit status 2, no traceback, nothing written.

- Readers check the sizes a header declares against the file before allocating (cube point and
  atom counts, ``.npy`` headers, ``.npz`` members and their zip directory, XYZ atom counts).
- ``ionwell place`` reads maps and structures with the campaign's readers and checks: NaN
  coordinates, two atoms on one spot, a structure that is not the map's atoms; it refuses maps
  whose header names a density (override: ``--assume-potential``); ``--exclusion`` takes one
  ``EL=Å`` per flag.
- Command-engine paths stay inside the step's engine folder (refused at config load).

Maps are tiny and built here: an analytic potential (sharp positive peaks on the nuclei, so the
sign can be told, and Gaussian wells) written with ionwell's cube writer, then edited by hand.
"""

from __future__ import annotations

import argparse
import io
import json
import struct
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest
import yaml
from ase import Atoms
from ase.io import write
from numpy.lib import format as npy_format

from ionwell import cli
from ionwell.cli import place as cli_place
from ionwell.config.campaign import parse_campaign
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext
from ionwell.io.cube import write_cube
from ionwell.io.maps import not_a_potential, write_potential_npy
from ionwell.io.npz import save_npz
from ionwell.science.grid import Grid

ATOMS = Atoms("C2", positions=[[2.0, 2.0, 1.4], [2.0, 2.0, 3.6]])
WELL = (3.3, 2.1, 2.5)
HUGE = 100000  # points per axis a lying header declares: 10¹⁵ values, 7 PiB as float64


def _grid(atoms: Atoms = ATOMS, n: int = 16, spacing: float = 0.3) -> Grid:
    g = Grid(np.zeros(3), np.eye(3) * spacing, np.zeros((n, n, n)))
    p = g.points()
    v = -np.exp(-np.sum((p - np.asarray(WELL)) ** 2, axis=-1) / (2 * 0.8**2))
    for r in atoms.positions:
        v += 60.0 * np.exp(-np.sum((p - r) ** 2, axis=-1) / (2 * 0.25**2))
    return Grid(g.origin, g.axes, v.reshape(g.shape))


def _cube(path: Path, atoms: Atoms = ATOMS, title: str | None = None) -> Path:
    write_cube(path, _grid(atoms), atoms)
    if title is not None:
        lines = path.read_text().splitlines(keepends=True)
        path.write_text(title + "\n" + "".join(lines[1:]))
    return path


def _edit_lines(path: Path, edits: dict[int, str]) -> Path:
    """Replace the first field of the given lines (0-based) of a text file."""
    lines = path.read_text().splitlines(keepends=True)
    for i, first in edits.items():
        fields = lines[i].split()
        lines[i] = " ".join([first, *fields[1:]]) + "\n"
    path.write_text("".join(lines))
    return path


def _npy_header(shape) -> bytes:
    buf = io.BytesIO()
    npy_format.write_array_header_1_0(
        buf, {"descr": "<f8", "fortran_order": False, "shape": tuple(shape)}
    )
    return buf.getvalue()


def _sidecar(path: Path, shape) -> None:
    meta = {"origin": [0, 0, 0], "axes": [[0.3, 0, 0], [0, 0.3, 0], [0, 0, 0.3]], "shape": shape}
    Path(str(path) + ".json").write_text(json.dumps(meta))


def _main(argv: list[str], capsys) -> tuple[int, str, str]:
    status = cli.main(argv)
    out = capsys.readouterr()
    return status, out.out, out.err


def _one_error_line(err: str) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("ionwell: error: "), err
    assert "Traceback" not in err
    return lines[0]


# ---------------------------------------------------------------------------------------------
# maps and structures whose header declares more than the file holds


def _huge_cube_points(tmp: Path):
    path = _cube(tmp / "pot.cube")
    return [str(_edit_lines(path, {3: str(HUGE), 4: str(HUGE), 5: str(HUGE)}))], [
        f"{HUGE}×{HUGE}×{HUGE}",
        "bytes",
    ]


def _huge_cube_atoms(tmp: Path):
    path = _cube(tmp / "pot.cube")
    return [str(_edit_lines(path, {2: "1000000000000"}))], ["declares 1000000000000 atoms"]


def _huge_npy(tmp: Path):
    path = tmp / "pot.npy"
    path.write_bytes(_npy_header((HUGE,) * 3) + bytes(512))
    _sidecar(path, [HUGE] * 3)
    write(tmp / "s.xyz", ATOMS)
    return [str(path), "--structure", str(tmp / "s.xyz")], ["array header declares", "pot.npy"]


def _huge_npz_member(tmp: Path):
    path = tmp / "pot.npz"
    with zipfile.ZipFile(path, "w") as z:
        z.writestr("values.npy", _npy_header((HUGE,) * 3) + bytes(512))
    _sidecar(path, [HUGE] * 3)
    write(tmp / "s.xyz", ATOMS)
    return [str(path), "--structure", str(tmp / "s.xyz")], ["archive member values.npy"]


def _lying_zip_directory(tmp: Path):
    """An ionwell grid archive whose zip directory claims 4 GiB unpacked from a few bytes."""
    path = tmp / "pot.npz"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as z:
        z.writestr("values.npy", _npy_header((HUGE,) * 3) + bytes(64))
    raw = bytearray(path.read_bytes())
    struct.pack_into("<I", raw, raw.find(b"PK\x01\x02") + 24, 0xFFFFFFF0)  # central directory
    struct.pack_into("<I", raw, raw.find(b"PK\x03\x04") + 22, 0xFFFFFFF0)  # local header
    path.write_bytes(raw)
    write(tmp / "s.xyz", ATOMS)
    return [str(path), "--structure", str(tmp / "s.xyz")], ["claims 4294967280 bytes unpacked"]


def _huge_xyz_count(tmp: Path):
    s = tmp / "s.xyz"
    s.write_text("1000000000000\n\nC 2.0 2.0 1.4\nC 2.0 2.0 3.6\n")
    return [str(_cube(tmp / "pot.cube")), "--structure", str(s)], ["frame 1 declares"]


def _huge_xsf(tmp: Path):
    path = tmp / "pot.xsf"
    write(path, ATOMS, data=_grid().values)
    text = path.read_text().splitlines(keepends=True)
    i = next(k for k, line in enumerate(text) if line.strip().startswith("BEGIN_DATAGRID_3D"))
    text[i + 1] = f"  {HUGE} {HUGE} {HUGE}\n"
    path.write_text("".join(text))
    return [str(path)], ["pot.xsf", f"{HUGE}×{HUGE}×{HUGE}", "bytes"]


# ---------------------------------------------------------------------------------------------
# structures: the campaign's checks


def _nan_structure(tmp: Path):
    s = tmp / "s.xyz"
    write(s, Atoms("C2", positions=[[2.0, 2.0, 1.4], [np.nan, 2.0, 3.6]]))
    return [str(_cube(tmp / "pot.cube")), "--structure", str(s)], ["non-finite positions"]


def _two_atoms_on_one_spot(tmp: Path):
    s = tmp / "s.xyz"
    write(s, Atoms("C2", positions=[[2.0, 2.0, 1.4], [2.0, 2.0, 1.4]]))
    return [str(_cube(tmp / "pot.cube")), "--structure", str(s)], ["0.000 Å apart"]


def _single_atom_for_a_two_atom_map(tmp: Path):
    s = tmp / "s.xyz"
    write(s, Atoms("C", positions=[[2.0, 2.0, 1.4]]))
    return [str(_cube(tmp / "pot.cube")), "--structure", str(s)], [
        "lists 2 atoms, the structure has 1"
    ]


def _other_atoms_than_the_map(tmp: Path):
    s = tmp / "s.xyz"
    write(s, Atoms("C2", positions=[[2.0, 2.0, 1.4], [2.0, 3.0, 3.6]]))
    return [str(_cube(tmp / "pot.cube")), "--structure", str(s)], ["not the structure's atoms"]


def _cube_with_duplicated_atoms(tmp: Path):
    atoms = Atoms("C3", positions=[[2.0, 2.0, 1.4], [2.0, 2.0, 3.6], [2.0, 2.0, 3.6]])
    return [str(_cube(tmp / "pot.cube", atoms))], ["pot.cube: atoms 1 (C) and 2 (C)"]


# ---------------------------------------------------------------------------------------------
# maps whose header says they are not a potential


def _density_cube(tmp: Path):
    path = _cube(tmp / "rho.cube", title="Electron density in real space (e/Bohr^3)")
    return [str(path)], ["'Electron density in real space (e/Bohr^3)'", "--assume-potential"]


def _density_xsf(tmp: Path):
    path = tmp / "rho.xsf"
    write(path, ATOMS, data=_grid().values)
    path.write_text(path.read_text().replace(" data\n", " charge_density\n", 1))
    return [str(path)], ["'charge_density'", "--assume-potential"]


def _exclusion_twice(tmp: Path):
    path = _cube(tmp / "pot.cube")
    return ["--exclusion", "C=1.6", "--exclusion", "C=1.2", str(path)], ["C given more than once"]


PLACE_CASES = {
    "cube header: 10^15 points": _huge_cube_points,
    "cube header: 10^12 atoms": _huge_cube_atoms,
    "npy header: 10^15 values": _huge_npy,
    "npz member header: 10^15 values": _huge_npz_member,
    "npz zip directory lies": _lying_zip_directory,
    "xsf header: 10^15 values": _huge_xsf,
    "xyz structure: 10^12 atoms": _huge_xyz_count,
    "structure: NaN coordinate": _nan_structure,
    "structure: two atoms on one spot": _two_atoms_on_one_spot,
    "structure: one atom, map has two": _single_atom_for_a_two_atom_map,
    "structure: other atoms than the map's": _other_atoms_than_the_map,
    "cube's own atoms: two on one spot": _cube_with_duplicated_atoms,
    "density cube": _density_cube,
    "density xsf": _density_xsf,
    "--exclusion C twice": _exclusion_twice,
}


@pytest.mark.parametrize("make", PLACE_CASES.values(), ids=PLACE_CASES.keys())
def test_place_refuses_with_one_error_line(make, tmp_path, capsys):
    argv, expected = make(tmp_path)
    before = sorted(p.name for p in tmp_path.iterdir())
    status, out, err = _main(["place", *argv], capsys)
    line = _one_error_line(err)
    assert status == 2, err
    assert out == ""
    for text in expected:
        assert text in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written


def test_huge_cube_header_is_one_line_from_the_installed_command(tmp_path):
    """The real command, in its own process: no traceback, exit 2, quickly (no allocation)."""
    (argv,), _ = _huge_cube_points(tmp_path)
    exe = Path(sys.executable).parent / "ionwell"
    done = subprocess.run(
        [str(exe), "place", argv], capture_output=True, text=True, timeout=60, check=False
    )
    assert done.returncode == 2, done.stderr
    assert "PiB" not in done.stderr
    _one_error_line(done.stderr)


# ---------------------------------------------------------------------------------------------
# what place accepts


def _place_json(argv: list[str], capsys) -> dict:
    status, out, err = _main(["place", *argv, "--json", "--within", "3"], capsys)
    assert status == 0, err
    return json.loads(out)


def test_exclusion_takes_one_value_per_flag_before_the_map(tmp_path, capsys):
    path = _cube(tmp_path / "pot.cube")
    assert _place_json(["--exclusion", "C=1.6", str(path)], capsys)["exclusion"] == {"C": 1.6}
    parser = argparse.ArgumentParser(prog="ionwell")
    cli_place.add_parser(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["place", "--exclusion", "C=1.6", "--exclusion", "H=1.0", "m.cube"])
    assert args.exclusion == [("C", 1.6), ("H", 1.0)] and args.potential == "m.cube"


def test_density_header_can_be_overridden_and_potential_headers_pass(tmp_path, capsys):
    rho = _cube(tmp_path / "rho.cube", title="Electron density in real space (e/Bohr^3)")
    forced = _place_json([str(rho), "--assume-potential"], capsys)
    # Gaussian cubegen names the density the potential was computed from: still a potential
    esp = _cube(tmp_path / "esp.cube", title=" Electrostatic potential from Total SCF Density")
    assert _place_json([str(esp)], capsys)["chosen"] == forced["chosen"]
    assert forced["chosen"][0]["position"] == pytest.approx(WELL, abs=0.3)


def test_structure_moved_by_one_shift_is_the_maps_structure(tmp_path, capsys):
    """--structure in another frame than the map (a program that centred the molecule)."""
    path = _cube(tmp_path / "pot.cube")
    moved = ATOMS.copy()
    moved.translate([1.0, -0.5, 0.25])
    write(tmp_path / "s.xyz", moved)
    site = _place_json([str(path), "--structure", str(tmp_path / "s.xyz")], capsys)
    expected = np.asarray(WELL) + [1.0, -0.5, 0.25]
    assert site["chosen"][0]["position"] == pytest.approx(expected, abs=0.3)


def test_npy_and_stored_npz_maps_read_with_a_structure(tmp_path, capsys):
    write(tmp_path / "s.xyz", ATOMS)
    s = str(tmp_path / "s.xyz")
    write_potential_npy(tmp_path / "pot.npy", _grid())
    save_npz(tmp_path / "stored.npz", _grid())
    a = _place_json([str(tmp_path / "pot.npy"), "--structure", s], capsys)
    b = _place_json([str(tmp_path / "stored.npz"), "--structure", s], capsys)
    assert a["chosen"][0]["position"] == pytest.approx(b["chosen"][0]["position"], abs=1e-6)


@pytest.mark.parametrize(
    ("title", "refused"),
    [
        ("Electron density in real space (e/Bohr^3)", True),  # PySCF cubegen.density
        ("Orbital value in real space (1/Bohr^3)", True),  # PySCF cubegen.orbital
        ("Molecular electrostatic potential in real space", False),  # PySCF cubegen.mep
        (" Electrostatic potential from Total SCF Density", False),  # Gaussian cubegen
        (" Electron density from Total SCF Density", True),  # Gaussian cubegen
        ("-Quickstep-", False),  # CP2K: the title names nothing
        ("Cube file from ASE, written on Wed Dec  2 21:28:16 2026", False),
        ("ionwell potential map, values in hartree/e", False),
        ("spin density", True),
        ("ELF", True),
        ("Mo13 cluster", False),
    ],
)
def test_which_cube_titles_say_not_a_potential(tmp_path, title, refused):
    path = _cube(tmp_path / "m.cube", title=title)
    assert (not_a_potential(path) is not None) == refused


# ---------------------------------------------------------------------------------------------
# command-engine paths stay inside the step's engine folder


def _command_engine(**over) -> dict:
    engine = {
        "kind": "command",
        "input": {"file": "job.xyz", "format": "xyz"},
        "argv": ["true"],
        "stdout": "job.log",
        "outputs": {
            "energy": {"file": "job.log", "regex": r"^energy (\S+)"},
            "potential": {"file": "pot.cube", "unit": "hartree"},
        },
        "converged": {"scf": {"file": "job.log", "regex": "converged"}},
    }
    for dotted, value in over.items():
        *parents, last = dotted.split(".")
        node = engine
        for key in parents:
            node = node.setdefault(key, {})
        node[last] = value
    return engine


ENGINE_PATH_CASES = {
    "input.file absolute": ({"input.file": "/tmp/evil.inp"}, "engine.input.file", "absolute"),
    "input.file ../": ({"input.file": "../job.xyz"}, "engine.input.file", "leads out"),
    "input.file ../ into a missing folder": (
        {"input.file": "../../nowhere/job.xyz"},
        "engine.input.file",
        "leads out",
    ),
    "stdout ../": ({"stdout": "../job.log"}, "engine.stdout", "leads out"),
    "energy glob a/../../": (
        {"outputs.energy.file": "a/../../*.log"},
        "engine.outputs.energy.file",
        "leads out",
    ),
    "potential absolute": (
        {"outputs.potential.file": "/etc/pot.cube"},
        "engine.outputs.potential.file",
        "absolute",
    ),
    "structure ../": (
        {"outputs.structure": {"file": "../out.xyz"}},
        "engine.outputs.structure.file",
        "leads out",
    ),
    "converged.scf ~": ({"converged.scf.file": "~/job.log"}, "engine.converged.scf.file", "home"),
    "extra_inputs name": ({"extra_inputs": {"../x.txt": "hi"}}, "engine.extra_inputs", "leads"),
    "restart.keep glob": ({"restart.keep": ["../*.chk"]}, "engine.restart.keep", "leads out"),
    "restart.previous glob": (
        {"restart.previous": ["/scratch/*.chk"]},
        "engine.restart.previous",
        "absolute",
    ),
    "empty file name": (
        {"outputs.potential.file": ""},
        "engine.outputs.potential.file",
        "names no",
    ),
}


@pytest.mark.parametrize(
    ("over", "field", "why"), ENGINE_PATH_CASES.values(), ids=ENGINE_PATH_CASES.keys()
)
def test_engine_paths_outside_the_engine_folder_are_refused_at_load(
    over, field, why, tmp_path, monkeypatch, capsys
):
    monkeypatch.chdir(tmp_path)
    data = {
        "name": "paths",
        "host": {"builder": {"layers": 1, "shells": 1}},
        "engine": _command_engine(**over),
        "relax": {"enabled": False},
    }
    (tmp_path / "c.yaml").write_text(yaml.safe_dump(data))
    status, out, err = _main(["run", "c.yaml"], capsys)
    line = _one_error_line(err)
    assert status == 2, err
    assert "c.yaml" in line and field in line and why in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.yaml"]  # nothing frozen


def test_engine_paths_in_sub_folders_are_created_when_written(tmp_path):
    engine = _command_engine(
        **{
            "input.file": "in/job.xyz",
            "stdout": "logs/job.log",
            "extra_inputs": {"aux/notes.txt": "step ${step}"},
            "outputs.energy.file": "logs/job.log",
            "restart.keep": ["./chk/*.chk"],
        }
    )
    data = {"name": "sub", "host": {"builder": {"layers": 1, "shells": 1}}, "engine": engine}
    work = tmp_path / "engine"
    get_engine(parse_campaign(data)).prepare(ATOMS, work, ComputeContext(step=4, charge=0))
    assert (work / "in" / "job.xyz").is_file()
    assert (work / "aux" / "notes.txt").read_text() == "step 4"
    assert (work / "logs").is_dir()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["engine"]
