"""Engine settings checked before a campaign is frozen: what fails the same way on every try.

``ionwell run`` calls :func:`check_engine_settings` with the pristine host before it writes the
campaign folder, so a setting that can never work (an unknown basis set or functional, a basis
without the guest's element, a charge the host's electrons cannot carry, a potential grid far
larger than the memory allowed for it) is one clear error naming the field, not a step that is
frozen, computed and retried. The checks are cheap: names are parsed and a PySCF ``Mole`` is
built (no integrals, no SCF); tblite is asked to set its model up (no SCC).
"""

from __future__ import annotations

import contextlib
import io
import logging
import warnings

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers

from ionwell.config.campaign import Campaign
from ionwell.config.engines import PyscfEngineConfig, TbliteEngineConfig
from ionwell.errors import ConfigError

log = logging.getLogger(__name__)

__all__ = ["check_engine_settings"]

#: the largest atomic number GFN1-xTB and GFN2-xTB are parametrised for (H–Rn)
XTB_MAX_Z = 86


def check_engine_settings(campaign: Campaign, host: Atoms, source: str = "config") -> None:
    """Raise :class:`ConfigError` naming ``source`` and the field when the campaign's engine
    (and the ``screened`` rule's own engine) cannot compute this host and its guests."""
    engines = [("engine", campaign.engine)]
    if campaign.placement.screen.engine is not None:
        engines.append(("placement.screen.engine", campaign.placement.screen.engine))
    guest = campaign.guest.element
    # step 0's charge; in cation mode each guest adds +1 with Z electrons: never fewer than 0
    charge = campaign.engine.charge
    for field, engine in engines:
        problem = _electron_count(host, engine.charge if field != "engine" else charge)
        if problem:
            raise ConfigError(f"{source}: {field}.charge: {problem}")
        if isinstance(engine, PyscfEngineConfig | TbliteEngineConfig):
            extent = _extent(host, campaign.placement.within)
            problem = engine.potential_grid.memory_problem(
                extent, f"the host and its guests ({_size(extent)} Å)"
            )
            if problem:
                raise ConfigError(f"{source}: {field}.potential_grid: {problem}")
        if isinstance(engine, PyscfEngineConfig):
            _check_pyscf(engine, host, guest, f"{source}: {field}")
        elif isinstance(engine, TbliteEngineConfig):
            _check_tblite(engine, host, guest, f"{source}: {field}")


def _electron_count(host: Atoms, charge: int) -> str | None:
    nelec = int(host.get_atomic_numbers().sum()) - int(charge)
    if nelec <= 0:
        return (
            f"charge {charge:+d} leaves the host ({host.get_chemical_formula()}, "
            f"{int(host.get_atomic_numbers().sum())} electrons) with {nelec} electrons; "
            "expected a charge below the host's electron count"
        )
    return None


def _extent(host: Atoms, within: float) -> tuple[float, float, float]:
    """The box the host's guests can span: the host's bounding box plus ``within`` each side."""
    pos = host.positions
    span = pos.max(axis=0) - pos.min(axis=0) + 2.0 * within
    return (float(span[0]), float(span[1]), float(span[2]))


def _size(extent: tuple[float, float, float]) -> str:
    return "×".join(f"{x:.1f}" for x in extent)


@contextlib.contextmanager
def _quiet():
    """PySCF prints and warns (e.g. 'install basis-set-exchange') while looking names up."""
    with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()):
        warnings.simplefilter("ignore")
        yield


def _check_pyscf(cfg: PyscfEngineConfig, host: Atoms, guest: str, where: str) -> None:
    from pyscf import gto
    from pyscf.dft import libxc

    from ionwell.engines.pyscf_engine import FIT_BASIS

    if not cfg.xc.strip():
        raise ConfigError(f"{where}.xc: expected a functional name such as 'pbe', found ''")
    with _quiet():
        try:
            libxc.parse_xc(cfg.xc)
        except (KeyError, ValueError) as err:
            raise ConfigError(
                f"{where}.xc: PySCF does not know the functional {cfg.xc!r} ({_why(err)}); "
                "expected a libxc name such as 'lda,vwn', 'pbe' or 'b3lyp'"
            ) from None
    elements = sorted(set(host.get_chemical_symbols()) | {guest}, key=atomic_numbers.get)
    fitted = cfg.density_fit or cfg.potential_method == "fitted"
    with _quiet():
        for el in elements:
            for basis, field, why in (
                (cfg.basis, "basis", ""),
                (FIT_BASIS, "density_fit" if cfg.density_fit else "potential_method", "fit"),
            ):
                if why and not fitted:
                    continue
                try:
                    found = gto.basis.load(basis, el)
                except Exception as err:  # PySCF raises its own BasisNotFoundError, or others
                    found, reason = None, _why(err)
                else:
                    reason = "no functions for the element"
                if found:
                    continue
                if why:
                    raise ConfigError(
                        f"{where}.{field}: the auxiliary basis {FIT_BASIS} that density fitting "
                        f"uses has no {el} ({reason}); set density_fit: false and "
                        "potential_method: exact"
                    )
                raise ConfigError(
                    f"{where}.basis: PySCF has no basis set {cfg.basis!r} for {el} ({reason}); "
                    "expected a PySCF basis name that covers every element of the host and "
                    "the guest, e.g. 'def2-svp'"
                )
        try:
            from ionwell.engines.pyscf_engine import build_mol

            mol = build_mol(host, cfg.basis, cfg.charge)
        except Exception as err:
            raise ConfigError(
                f"{where}: PySCF cannot set up the host with basis {cfg.basis!r} and charge "
                f"{cfg.charge:+d} ({_why(err)})"
            ) from None
    nelec = int(np.sum(mol.nelec))
    if nelec > 2 * mol.nao:
        raise ConfigError(
            f"{where}.charge: charge {cfg.charge:+d} puts {nelec} electrons into "
            f"{mol.nao} orbitals of basis {cfg.basis!r} (at most {2 * mol.nao}); expected a "
            "charge the basis can hold"
        )


def _check_tblite(cfg: TbliteEngineConfig, host: Atoms, guest: str, where: str) -> None:
    heavy = sorted(
        {el for el in [*host.get_chemical_symbols(), guest] if atomic_numbers[el] > XTB_MAX_Z},
        key=atomic_numbers.get,
    )
    if heavy:
        raise ConfigError(
            f"{where}.method: {cfg.method} is parametrised for H–Rn (Z ≤ {XTB_MAX_Z}); the "
            f"campaign has {', '.join(heavy)}"
        )
    try:
        from ionwell.engines.tblite_engine import xtb_calculator
    except ImportError:
        return  # not installed: the step says so when it runs
    nelec = int(host.get_atomic_numbers().sum()) - cfg.charge
    try:
        with _quiet():
            xtb_calculator(host, cfg, cfg.charge, nelec % 2, dipoles=False)
    except ImportError:
        return
    except ConfigError as err:
        raise ConfigError(f"{where}.method: {str(err).removeprefix('engine.method: ')}") from None
    except Exception as err:
        raise ConfigError(
            f"{where}: tblite cannot set up {cfg.method} for the host with charge "
            f"{cfg.charge:+d} ({_why(err)})"
        ) from None


def _why(err: BaseException) -> str:
    text = str(err).strip().strip("'\"").splitlines()
    return text[0] if text else type(err).__name__
