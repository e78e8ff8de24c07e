"""Tests of ionwell.io.structures: reading structure files, the host of a config."""

from __future__ import annotations

from pathlib import Path

import ase.io
import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk

from ionwell.config.campaign import FlakeBuilder, HostConfig
from ionwell.errors import StructureError
from ionwell.io.structures import load_host, read_structure
from ionwell.science.host import build_flake

# ---------------------------------------------------------------------------------------------
# reading structures


def test_read_round_trip_extxyz(tmp_path: Path) -> None:
    atoms = build_flake(FlakeBuilder(shells=2, layers=2))
    path = tmp_path / "host.extxyz"
    ase.io.write(path, atoms)
    back = read_structure(path)
    np.testing.assert_allclose(back.positions, atoms.positions, atol=1e-6)
    assert back.get_chemical_symbols() == atoms.get_chemical_symbols()
    assert list(back.get_tags()) == list(atoms.get_tags())


def test_read_round_trip_xyz_last_frame(tmp_path: Path) -> None:
    first = build_flake(FlakeBuilder(shells=1, layers=1))
    last = build_flake(FlakeBuilder(shells=2, layers=1))
    path = tmp_path / "frames.xyz"
    ase.io.write(path, [first, last], format="xyz")
    back = read_structure(path)
    assert len(back) == len(last)
    np.testing.assert_allclose(back.positions, last.positions, atol=1e-6)


def test_read_round_trip_cif(tmp_path: Path) -> None:
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True)
    path = tmp_path / "cu.cif"
    ase.io.write(path, atoms)
    back = read_structure(path)
    assert back.get_chemical_formula() == "Cu4"
    np.testing.assert_allclose(back.cell.cellpar(), atoms.cell.cellpar(), atol=1e-4)


def test_read_with_explicit_format(tmp_path: Path) -> None:
    path = tmp_path / "host.dat"
    ase.io.write(path, build_flake(FlakeBuilder(shells=1, layers=1)), format="extxyz")
    assert len(read_structure(path, format="extxyz")) == 12


def _expect_error(path: Path, *fragments: str, fmt: str | None = None) -> str:
    with pytest.raises(StructureError) as info:
        read_structure(path, fmt)
    msg = str(info.value)
    assert path.name in msg
    for frag in fragments:
        assert frag in msg
    assert "Traceback" not in msg
    return msg


def test_read_missing_file(tmp_path: Path) -> None:
    _expect_error(tmp_path / "nowhere.xyz", "no such file")


def test_read_empty_file(tmp_path: Path) -> None:
    path = tmp_path / "empty.xyz"
    path.write_text("")
    _expect_error(path, "empty")


def test_read_garbage_file(tmp_path: Path) -> None:
    path = tmp_path / "garbage.xyz"
    path.write_text("this is\nnot a structure\n@@@ 1 2\n")
    _expect_error(path, "cannot parse")


def test_read_unknown_format(tmp_path: Path) -> None:
    path = tmp_path / "host.qqq"
    path.write_text("whatever\n")
    _expect_error(path, "format")
    path2 = tmp_path / "host2.xyz"
    path2.write_text("1\n\nH 0 0 0\n")
    _expect_error(path2, "format", fmt="no-such-format")


def test_read_overlapping_atoms(tmp_path: Path) -> None:
    path = tmp_path / "overlap.xyz"
    ase.io.write(path, Atoms("CH", positions=[[0, 0, 0], [0.2, 0, 0]]))
    msg = _expect_error(path, "0.200 Å")
    assert "atoms 0 (C) and 1 (H)" in msg


def test_read_overlap_through_periodic_boundary(tmp_path: Path) -> None:
    atoms = Atoms("H2", positions=[[0.1, 0, 0], [4.9, 0, 0]], cell=[5, 5, 5], pbc=True)
    path = tmp_path / "wrapped.extxyz"
    ase.io.write(path, atoms)
    _expect_error(path, "0.200 Å")


def test_read_nan_positions(tmp_path: Path) -> None:
    path = tmp_path / "nan.xyz"
    path.write_text("2\n\nH 0 0 0\nH nan 0 0\n")
    _expect_error(path, "non-finite")


def test_read_zero_atoms(tmp_path: Path) -> None:
    path = tmp_path / "zero.extxyz"
    ase.io.write(path, Atoms())
    _expect_error(path)


# ---------------------------------------------------------------------------------------------
# load_host


def test_load_host_from_builder(tmp_path: Path) -> None:
    host = HostConfig(builder=FlakeBuilder(shells=2, layers=2))
    assert load_host(host, tmp_path).get_chemical_formula(mode="hill") == "C48H24"


def test_load_host_relative_file(tmp_path: Path) -> None:
    (tmp_path / "structures").mkdir()
    ase.io.write(tmp_path / "structures" / "h.extxyz", build_flake(FlakeBuilder(shells=1)))
    host = HostConfig(file="structures/h.extxyz")
    assert len(load_host(host, tmp_path)) == 24
    with pytest.raises(StructureError, match="h.extxyz"):
        load_host(host, tmp_path / "elsewhere")
