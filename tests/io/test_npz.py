"""Tests of ionwell.io.npz: ionwell's grid store (save/load round trip, digest, errors)."""

from __future__ import annotations

import numpy as np
import pytest

from ionwell.errors import GridError
from ionwell.io.npz import grid_digest, load_npz, save_npz
from ionwell.science.grid import Grid


def _field(shape, seed=0):
    """An analytic smooth part plus noise, with positive and negative values."""
    rng = np.random.default_rng(seed)
    i, j, k = np.indices(shape)
    return np.sin(0.4 * i) * np.cos(0.3 * j) + 0.05 * k - 0.2 + 1e-3 * rng.normal(size=shape)


# ---------------------------------------------------------------------------------------------
# npz storage and digest


def test_npz_round_trip_exact(tmp_path):
    values = _field((5, 6, 7)).astype(np.float32)
    grid = Grid(
        origin=np.array([1.0, 2.0, 3.0]),
        axes=np.array([[0.2, 0.0, 0.0], [0.1, 0.2, 0.0], [0.0, 0.05, 0.3]]),
        values=values,
        pbc=(True, False, True),
    )
    path = tmp_path / "p.tmp"  # no suffix is added
    save_npz(path, grid)
    assert path.is_file()
    back = load_npz(path)
    assert back.values.dtype == np.float32
    np.testing.assert_array_equal(back.values, values)
    np.testing.assert_array_equal(back.origin, grid.origin)
    np.testing.assert_array_equal(back.axes, grid.axes)
    assert back.pbc == (True, False, True)
    assert grid_digest(back) == grid_digest(grid)
    # float64 values hash as their float32 rounding
    wide = Grid(grid.origin, grid.axes, values.astype(np.float64), grid.pbc)
    assert grid_digest(wide) == grid_digest(grid)


def test_digest_sees_every_change():
    grid = Grid(np.zeros(3), np.eye(3) * 0.2, np.zeros((3, 3, 3), np.float32))
    d0 = grid_digest(grid)
    bumped = grid.values.copy()
    bumped[1, 2, 0] = np.nextafter(np.float32(0), np.float32(1))
    assert grid_digest(Grid(grid.origin, grid.axes, bumped)) != d0
    assert grid_digest(Grid(grid.origin + 1e-9, grid.axes, grid.values)) != d0
    assert grid_digest(Grid(grid.origin, grid.axes, grid.values, (True, False, False))) != d0
    assert len(d0) == 64


def test_load_npz_errors(tmp_path):
    with pytest.raises(GridError, match=r"gone\.npz: cannot read"):
        load_npz(tmp_path / "gone.npz")
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"not a zip file")
    with pytest.raises(GridError, match=r"junk\.npz"):
        load_npz(junk)
    other = tmp_path / "other.npz"
    np.savez(other, a=np.zeros(3))
    with pytest.raises(GridError, match=r"other\.npz: not an ionwell grid file"):
        load_npz(other)
