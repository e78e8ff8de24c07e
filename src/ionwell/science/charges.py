"""Atomic charges of one electron density in several partitioning schemes (pure, no file I/O).

Every charge is the nuclear charge minus the electron population assigned to the atom, in
elementary charges (e), per atom in atom order; the charges of one scheme sum to the system
charge. With ECPs the nuclear charge is the ECP core's effective charge
(``mol.atom_charges()``), and the populations count only the explicit electrons.

Schemes (names as stored in :attr:`ionwell.engines.base.StepResult.charge_sets`):

=================  ==========================================================================
``mulliken``       Mulliken populations, D·S, in the computational basis (basis-sensitive)
``lowdin``         populations in the symmetrically orthogonalised basis, diag(S½ D S½)
``meta-lowdin``    PySCF's meta-Löwdin orthogonal AOs (ANO-projected, orthogonalised within
                   core, valence and Rydberg sets), as ``scf.hf.mulliken_meta`` computes them
``iao``            intrinsic atomic orbitals (IAO) built from the occupied orbitals and
                   PySCF's MINAO reference basis, orthonormalised (Löwdin); populations of
                   the density in that orthonormal set
=================  ==========================================================================

PySCF is imported inside the functions, so this module imports without it.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = [
    "AUTO_ORDER",
    "OCCUPIED_THRESHOLD",
    "SCHEMES",
    "compute_charge_sets",
    "iao_charges",
    "lowdin_charges",
    "meta_lowdin_charges",
    "mulliken_charges",
    "occupied_orbitals",
    "select_charges",
]

log = logging.getLogger("ionwell.science.charges")

#: Every scheme, in the order they are computed and stored.
SCHEMES: tuple[str, ...] = ("mulliken", "lowdin", "meta-lowdin", "iao")
#: Preference of ``scheme="auto"`` in :func:`select_charges`: least basis-sensitive first.
AUTO_ORDER: tuple[str, ...] = ("iao", "meta-lowdin", "lowdin", "mulliken")
#: Orbitals with an occupation above this (electrons) count as occupied for the IAO
#: construction. Below it, a Fermi-smeared level holds so little charge that leaving it out
#: moves the IAO electron count by far less than :data:`_COUNT_TOLERANCE`.
OCCUPIED_THRESHOLD = 1e-10
#: An IAO population that misses the electron count by more than this (e) is refused.
_COUNT_TOLERANCE = 1e-6


# ---------------------------------------------------------------------------------------------
# helpers


def _total_dm(dm: Any) -> np.ndarray:
    """The total (alpha + beta) density matrix of a restricted or unrestricted ``dm``."""
    d = np.asarray(dm, dtype=float)
    if d.ndim == 3:
        d = d[0] + d[1]
    if d.ndim != 2 or d.shape[0] != d.shape[1]:
        raise ValueError(f"expected a square density matrix, got shape {d.shape}")
    return d


def _overlap(mol, s: np.ndarray | None) -> np.ndarray:
    return np.asarray(mol.intor_symmetric("int1e_ovlp") if s is None else s, dtype=float)


def _atom_charges(mol, ao_pop: np.ndarray, ao_atoms: Sequence[int]) -> list[float]:
    """Nuclear (or ECP core) charge minus the summed populations of each atom's functions (e)."""
    pop = np.zeros(mol.natm)
    np.add.at(pop, np.asarray(ao_atoms, dtype=int), ao_pop)
    return [float(q) for q in np.asarray(mol.atom_charges(), dtype=float) - pop]


def _ao_atoms(mol) -> list[int]:
    """Atom index of every basis function of ``mol``."""
    return [int(label[0]) for label in mol.ao_labels(fmt=None)]


def _orthonormal_populations(c: np.ndarray, s: np.ndarray, dm: np.ndarray) -> np.ndarray:
    """Populations of ``dm`` on the S-orthonormal orbitals ``c``: diag(cᵀ S D S c)."""
    sc = s @ c
    return np.einsum("ik,ik->k", sc, dm @ sc)


# ---------------------------------------------------------------------------------------------
# schemes


def mulliken_charges(mol, dm: Any, s: np.ndarray | None = None) -> list[float]:
    """Mulliken charges (e): nuclear charge minus Σ_μ∈A (D S)_μμ, with PySCF's ``mulliken_pop``.

    ``dm`` is the density matrix in the AO basis, restricted (nao, nao) or unrestricted
    (2, nao, nao; the spins are summed); ``s`` the AO overlap (computed when None).
    """
    from pyscf.scf import hf

    _, chg = hf.mulliken_pop(mol, _total_dm(dm), s=_overlap(mol, s), verbose=0)
    return [float(q) for q in chg]


def lowdin_charges(mol, dm: Any, s: np.ndarray | None = None) -> list[float]:
    """Löwdin charges (e): populations diag(S½ D S½) of the symmetrically orthogonalised AOs.

    The orthogonal AOs are PySCF's ``lo.orth.orth_ao(mol, 'lowdin', pre_orth_ao=None)``,
    i.e. S^-½ without a projection onto a reference basis. ``dm`` and ``s`` as in
    :func:`mulliken_charges`.
    """
    from pyscf.lo import orth

    s = _overlap(mol, s)
    c = orth.orth_ao(mol, "lowdin", pre_orth_ao=None, s=s)
    return _atom_charges(mol, _orthonormal_populations(c, s, _total_dm(dm)), _ao_atoms(mol))


def meta_lowdin_charges(mol, dm: Any, s: np.ndarray | None = None) -> list[float]:
    """Meta-Löwdin charges (e), exactly as PySCF's ``scf.hf.mulliken_meta`` computes them
    (default pre-orthogonalisation: projection onto the ANO basis). ``dm`` and ``s`` as in
    :func:`mulliken_charges`.
    """
    from pyscf.scf import hf

    _, chg = hf.mulliken_meta(mol, _total_dm(dm), verbose=0, s=_overlap(mol, s))
    return [float(q) for q in chg]


def iao_charges(mol, dm: Any, orbocc: Any, s: np.ndarray | None = None) -> list[float]:
    """Charges (e) on intrinsic atomic orbitals (IAO), orthonormalised by Löwdin's method.

    Restricted: ``dm`` (nao, nao) is the total density and ``orbocc`` (nao, nocc) its occupied
    orbitals. Unrestricted: ``dm`` is (2, nao, nao) and ``orbocc`` a pair (alpha, beta).

    For an unrestricted density the IAOs are built per spin, each from that spin's occupied
    orbitals, and each spin density is populated on its own IAOs; the atom's population is the
    sum over the two spins. Why not one IAO set from the union of both spins' occupied
    orbitals: the alpha and beta occupied spaces nearly coincide, so their union is nearly
    rank-deficient (which directions to keep depends on a threshold) and can have more
    dimensions than the minimal reference basis, so one IAO set would not hold the whole
    density. Per spin, each spin's occupied space lies exactly in its IAO space (the IAO
    construction guarantees it), so the populations add up to the electron count.

    Orbitals count as occupied when the caller passes them (see :func:`occupied_orbitals`).
    Raises ValueError when the populations miss the electron count (e.g. more occupied
    orbitals than the reference basis holds) or the molecule has ghost atoms.
    """
    from pyscf.lo import iao, orth

    s = _overlap(mol, s)
    d = np.asarray(dm, dtype=float)
    if d.ndim == 3:
        if not isinstance(orbocc, (list, tuple)) and np.asarray(orbocc).ndim != 3:
            raise ValueError("an unrestricted density needs occupied orbitals of both spins")
        pairs = [(np.asarray(orbocc[k], dtype=float), d[k]) for k in range(2)]
    elif d.ndim == 2:
        pairs = [(np.asarray(orbocc, dtype=float), d)]
    else:
        raise ValueError(f"expected a density matrix of 2 or 3 dimensions, got {d.ndim}")
    pmol = iao.reference_mol(mol)
    if pmol.natm != mol.natm:
        raise ValueError("IAO charges: ghost atoms are not supported")
    ref_atoms = _ao_atoms(pmol)
    pop = np.zeros(len(ref_atoms))
    for occ, dspin in pairs:
        if occ.ndim != 2 or occ.shape[0] != s.shape[0]:
            raise ValueError(f"occupied orbitals of shape {occ.shape} for {s.shape[0]} AOs")
        if occ.shape[1] > len(ref_atoms):
            raise ValueError(
                f"{occ.shape[1]} occupied orbitals exceed the {len(ref_atoms)} functions of "
                "the IAO reference basis"
            )
        c = orth.vec_lowdin(iao.iao(mol, occ), s)
        pop += _orthonormal_populations(c, s, dspin)
    nelec = float(np.einsum("ij,ji->", _total_dm(d), s))
    if abs(pop.sum() - nelec) > _COUNT_TOLERANCE:
        raise ValueError(
            f"IAO populations hold {pop.sum():.8f} of {nelec:.8f} electrons (the density does "
            "not lie in the IAO space)"
        )
    return _atom_charges(mol, pop, ref_atoms)


def occupied_orbitals(
    mo_coeff: Any, mo_occ: Any, threshold: float = OCCUPIED_THRESHOLD
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Columns of ``mo_coeff`` whose occupation (electrons) exceeds ``threshold``.

    Restricted (2-D ``mo_coeff``): one array (nao, nocc). Unrestricted (3-D, one block per
    spin): a pair (alpha, beta). Fractionally occupied (smeared) levels above the threshold
    count as occupied.
    """
    c = np.asarray(mo_coeff, dtype=float)
    o = np.asarray(mo_occ, dtype=float)
    if c.ndim == 3:
        return c[0][:, o[0] > threshold], c[1][:, o[1] > threshold]
    return c[:, o > threshold]


def compute_charge_sets(
    mol,
    dm: Any,
    orbocc: Any,
    s: np.ndarray | None = None,
    schemes: Sequence[str] = SCHEMES,
) -> dict[str, list[float]]:
    """Charges (e) per scheme of one density: ``{'mulliken': [...], 'lowdin': [...], ...}``.

    ``dm`` restricted (nao, nao) or unrestricted (2, nao, nao); ``orbocc`` its occupied
    orbitals (see :func:`occupied_orbitals`; only ``iao`` uses them); ``s`` the AO overlap.
    Mulliken errors propagate; any other scheme that fails is logged as a warning and left out.
    """
    s = _overlap(mol, s)
    makers = {
        "mulliken": lambda: mulliken_charges(mol, dm, s),
        "lowdin": lambda: lowdin_charges(mol, dm, s),
        "meta-lowdin": lambda: meta_lowdin_charges(mol, dm, s),
        "iao": lambda: iao_charges(mol, dm, orbocc, s),
    }
    out: dict[str, list[float]] = {}
    for name in schemes:
        if name not in makers:
            raise ValueError(f"unknown charge scheme {name!r} (expected one of {SCHEMES})")
        if name == "mulliken":
            out[name] = makers[name]()
            continue
        try:
            out[name] = makers[name]()
        except Exception as err:  # an alternative scheme must never fail the compute
            log.warning("%s charges left out: %s: %s", name, type(err).__name__, err)
    return out


# ---------------------------------------------------------------------------------------------
# choosing a set


def _base_scheme(name: str) -> str:
    """The scheme a recorded label names: 'mulliken (gfn2)' -> 'mulliken'."""
    return name.split("(")[0].strip().lower()


def select_charges(
    charge_sets: dict[str, list[float]] | None,
    charges: list[float] | None,
    scheme: str,
    fallback_name: str | None,
) -> tuple[str, list[float]] | None:
    """The charges (e) of ``scheme`` among those a step recorded, as (scheme name, charges).

    ``scheme`` is 'auto', 'mulliken', 'lowdin', 'meta-lowdin' or 'iao'. 'auto' takes the first
    recorded of :data:`AUTO_ORDER` (iao, meta-lowdin, lowdin, mulliken). A named scheme that
    was not recorded gives None (the caller reports it).

    Without ``charge_sets`` (None or empty: a result written before they existed, or an engine
    with one scheme), ``charges`` count as ``fallback_name`` (None: 'mulliken'): 'auto' takes
    them under that name, and a named scheme takes them when the label names it, e.g. the
    label 'mulliken (gfn2)' serves 'mulliken' and is returned as the name.
    Raises ValueError for an unknown ``scheme``.
    """
    if scheme != "auto" and scheme not in SCHEMES:
        raise ValueError(f"unknown charge scheme {scheme!r} (expected 'auto' or one of {SCHEMES})")
    recorded = {k: v for k, v in (charge_sets or {}).items() if v is not None}
    if recorded:
        wanted = AUTO_ORDER if scheme == "auto" else (scheme,)
        for name in wanted:
            if name in recorded:
                return name, [float(q) for q in recorded[name]]
        return None
    if charges is None:
        return None
    label = fallback_name or "mulliken"
    if scheme == "auto" or _base_scheme(label) == scheme:
        return label, [float(q) for q in charges]
    return None
