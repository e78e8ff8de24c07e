"""A near-free ASE calculator for the orchestration benchmark (``bench/long_campaign.py``).

Analytic stand-in, not physics; for timing the orchestration. Nothing it returns means anything
about a real material: it exists so that a campaign of hundreds of steps costs milliseconds of
"engine" per step and the benchmark measures what ionwell itself spends around the engine.

Model: every atom carries a fixed point charge — host atoms a small negative one, guest atoms
(``guests``, by element) a positive one — and interacts through a softened, screened Coulomb term
plus a short-ranged repulsion::

    E = sum_{i<j} k q_i q_j exp(-r/lam) / sqrt(r^2 + a^2) + A exp(-r/rho)

(``k`` = 14.3996 eV Å / e^2). Energy and forces are exact for this model, vectorised over all
pairs (a few ms at 500 atoms).

``get_electrostatic_potential()`` returns an :class:`ionwell.science.grid.Grid` (volts, felt by a
positive charge) on a box around the atoms with ``margin`` Å on each side, its spacing chosen
so the box holds about ``points`` points. The map is the sum of the atoms' screened-Coulomb
potentials ``k q_i exp(-r/lam) / sqrt(r^2 + a^2)``, evaluated as a convolution: the charges are
spread onto the grid with trilinear weights and convolved with the kernel by FFT (zero-padded,
so not periodic). Its cost does not depend on the number of atoms (~0.05–0.1 s for 1e5 points).
Negative host charges make the deepest wells sit where the host is densest (the galleries);
each positive guest raises the map around itself, so later wells move away from earlier
guests. Deterministic: the same atoms give the same map.

Used through the ``ase`` engine with ``bench/`` on ``PYTHONPATH``::

    engine: {kind: ase, calculator: analytic_calculator.AnalyticCalculator}
"""

from __future__ import annotations

import time

import numpy as np
import scipy.fft
from ase.calculators.calculator import Calculator, all_changes

from ionwell.science.grid import Grid

__all__ = ["AnalyticCalculator", "COULOMB"]

COULOMB = 14.399645  # e^2 / (4 pi eps0), eV Å


class AnalyticCalculator(Calculator):
    """Analytic stand-in, not physics; for timing the orchestration (see the module docstring).

    Parameters (all optional):
        guests: elements counted as guests (positive charge); default Li, Na, K, Mg.
        guest_charge: charge of each guest atom, e (default +0.8).
        host_charge: charge of each host atom, e (default -0.1).
        screening: screening length ``lam`` of the Coulomb terms, Å (default 4.0).
        softening: softening length ``a``, Å (default 0.5).
        repulsion: prefactor ``A`` of the repulsion, eV (default 200.0).
        repulsion_length: decay length ``rho`` of the repulsion, Å (default 0.3).
        margin: map box margin around the atoms, Å (default 3.0).
        points: about this many map points (default 100000).
        delay: seconds to sleep in each energy evaluation, to stand in for a slow engine
            (default 0; the benchmark uses it to kill a controller in the middle of a step).
    """

    implemented_properties = ["energy", "forces"]
    default_parameters = {
        "guests": ["Li", "Na", "K", "Mg"],
        "guest_charge": 0.8,
        "host_charge": -0.1,
        "screening": 4.0,
        "softening": 0.5,
        "repulsion": 200.0,
        "repulsion_length": 0.3,
        "margin": 3.0,
        "points": 100_000,
        "delay": 0.0,
    }
    potential_model = "analytic stand-in (screened point charges), benchmark only"

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self._kernel_cache: tuple[tuple, np.ndarray] | None = None

    # -- charges ----------------------------------------------------------------------------

    def charges_of(self, atoms) -> np.ndarray:
        """The fixed model charge of each atom, e."""
        p = self.parameters
        guest = np.isin(atoms.get_chemical_symbols(), list(p["guests"]))
        return np.where(guest, float(p["guest_charge"]), float(p["host_charge"]))

    # -- energy and forces ------------------------------------------------------------------

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        p = self.parameters
        if float(p["delay"]) > 0:
            time.sleep(float(p["delay"]))
        lam, a = float(p["screening"]), float(p["softening"])
        big_a, rho = float(p["repulsion"]), float(p["repulsion_length"])
        pos = np.asarray(self.atoms.positions, dtype=float)
        q = self.charges_of(self.atoms)
        n = len(pos)
        if n < 2:
            self.results = {"energy": 0.0, "forces": np.zeros((n, 3))}
            return
        iu, ju = np.triu_indices(n, k=1)
        d = pos[iu] - pos[ju]
        r = np.sqrt(np.einsum("ij,ij->i", d, d))
        s = np.sqrt(r * r + a * a)
        screen = np.exp(-r / lam)
        coul = COULOMB * q[iu] * q[ju] * screen / s
        rep = big_a * np.exp(-r / rho)
        energy = float(coul.sum() + rep.sum())
        # dE/dr of each pair term
        de_dr = coul * (-1.0 / lam - r / (s * s)) - rep / rho
        with np.errstate(divide="ignore", invalid="ignore"):
            fvec = np.where(r[:, None] > 0, (-de_dr / r)[:, None] * d, 0.0)
        forces = np.zeros((n, 3))
        np.add.at(forces, iu, fvec)
        np.add.at(forces, ju, -fvec)
        self.results = {"energy": energy, "forces": forces}

    # -- the potential map ------------------------------------------------------------------

    def _kernel_fft(self, padded: tuple[int, int, int], spacing: float) -> np.ndarray:
        """FFT of the screened-Coulomb kernel (V per e) on the zero-padded grid."""
        p = self.parameters
        key = (padded, round(spacing, 12), float(p["screening"]), float(p["softening"]))
        if self._kernel_cache is not None and self._kernel_cache[0] == key:
            return self._kernel_cache[1]
        lam, a = float(p["screening"]), float(p["softening"])
        # wrapped offsets: index m stands for m (m < n/2) or m - n, so the circular convolution
        # on the padded grid is the linear one on the original grid
        offs = [np.fft.fftfreq(m, d=1.0 / m) * spacing for m in padded]
        r2 = offs[0][:, None, None] ** 2 + offs[1][None, :, None] ** 2 + offs[2][None, None, :] ** 2
        r = np.sqrt(r2)
        kernel = COULOMB * np.exp(-r / lam) / np.sqrt(r2 + a * a)
        kf = scipy.fft.rfftn(kernel)
        self._kernel_cache = (key, kf)
        return kf

    def get_electrostatic_potential(self) -> Grid:
        """The model's potential (volts, felt by a positive charge) around the last atoms."""
        if self.atoms is None:
            raise RuntimeError("AnalyticCalculator: no atoms yet (compute an energy first)")
        p = self.parameters
        pos = np.asarray(self.atoms.positions, dtype=float)
        q = self.charges_of(self.atoms)
        margin = float(p["margin"])
        lo = pos.min(axis=0) - margin
        hi = pos.max(axis=0) + margin
        extent = hi - lo
        spacing = float((np.prod(extent) / float(p["points"])) ** (1.0 / 3.0))
        shape = tuple(int(np.ceil(e / spacing)) + 1 for e in extent)
        # trilinear deposit of the charges onto the grid points around each atom
        f = (pos - lo) / spacing
        base = np.clip(np.floor(f).astype(np.int64), 0, np.asarray(shape) - 2)
        t = f - base
        rho = np.zeros(shape)
        for dx in (0, 1):
            wx = t[:, 0] if dx else 1.0 - t[:, 0]
            for dy in (0, 1):
                wy = t[:, 1] if dy else 1.0 - t[:, 1]
                for dz in (0, 1):
                    wz = t[:, 2] if dz else 1.0 - t[:, 2]
                    np.add.at(
                        rho,
                        (base[:, 0] + dx, base[:, 1] + dy, base[:, 2] + dz),
                        q * wx * wy * wz,
                    )
        # zero padding to at least 2n - 1 points per axis makes the circular convolution linear
        padded = tuple(scipy.fft.next_fast_len(2 * m - 1, real=True) for m in shape)
        kf = self._kernel_fft(padded, spacing)
        conv = scipy.fft.irfftn(scipy.fft.rfftn(rho, s=padded) * kf, s=padded)
        values = np.ascontiguousarray(conv[: shape[0], : shape[1], : shape[2]])
        return Grid(
            origin=lo,
            axes=np.eye(3) * spacing,
            values=values,
            pbc=(False, False, False),
        )
