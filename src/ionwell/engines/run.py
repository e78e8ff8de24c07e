"""One way to run an engine: prepare, start (in-process, through the launcher, or as a remote
job), collect; an unconverged SCF is retried at the same site with each configured remedy.

Used by the step chain's ``compute`` rule, the guest reference, ``ionwell engines check`` and the
cluster side of remote mode.
"""

from __future__ import annotations

import logging
from pathlib import Path

from ase import Atoms
from pydantic import BaseModel, ConfigDict

from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext, StepResult
from ionwell.engines.launcher import ScfNotConverged
from ionwell.errors import EngineOutputError
from ionwell.science.grid import Grid

log = logging.getLogger(__name__)

__all__ = ["Computed", "execute", "run_engine", "scf_variants"]


class Computed(BaseModel):
    """One engine compute, after any SCF remedies.

    ``result``/``potential`` are None when the outputs could not be parsed (``parse_error``
    says why); the ``collect`` rule then reports the error, and a fixed parser re-reads the
    same outputs without recomputing.
    """

    model_config = ConfigDict(arbitrary_types_allowed=True)

    result: StepResult | None
    potential: Grid | None
    remedies: list[str]
    parse_error: str | None = None


def _tblite_remedy(eng, rem, name: str) -> tuple[str, dict] | None:
    """The tight-binding engine's version of a remedy (None: it has none): more SCC cycles, or
    a higher electronic temperature (Fermi smearing, ``smearing`` eV as kB·T)."""
    from ase.units import kB

    if name == "more_cycles":
        n = max(rem.more_cycles, eng.max_cycle)
        return f"max_cycle {n}", {"max_cycle": n}
    if name == "smearing":
        t = max(eng.electronic_temperature, rem.smearing / kB)
        return f"electronic temperature {t:.0f} K", {"electronic_temperature": t}
    return None  # tblite has no level shift


def scf_variants(campaign) -> list[tuple[str, object]]:
    """The campaign's engine as configured, then each configured SCF remedy, in the engine's
    own terms (embedded DFT: cycles, level shift, smearing; tight binding: cycles, electronic
    temperature; external programs and ASE calculators: the retries their config lists,
    ``scf_remedies``). An empty ``remedies.scf`` switches all of them off."""
    eng = campaign.engine
    rem = campaign.remedies
    out = [("as configured", campaign)]
    if eng.kind == "tblite":
        for name in rem.scf:
            got = _tblite_remedy(eng, rem, name)
            if got is not None:
                what, upd = got
                variant = campaign.model_copy(update={"engine": eng.model_copy(update=upd)})
                out.append((what, variant))
        return out
    if eng.kind == "command" and rem.scf:  # the definition's own retries, in its terms
        for r in eng.scf_remedies:
            upd = {"settings": {**eng.settings, **r.settings}}
            variant = campaign.model_copy(update={"engine": eng.model_copy(update=upd)})
            out.append((r.name, variant))
        return out
    if eng.kind == "ase" and rem.scf:
        for r in eng.scf_remedies:
            upd = {"parameters": {**eng.parameters, **r.parameters}}
            variant = campaign.model_copy(update={"engine": eng.model_copy(update=upd)})
            out.append((r.name, variant))
        return out
    if eng.kind != "pyscf":
        return out
    for name in rem.scf:
        if name == "more_cycles":
            upd = {"max_cycle": max(rem.more_cycles, eng.max_cycle)}
            what = f"max_cycle {upd['max_cycle']}"
        elif name == "level_shift":
            upd = {"level_shift": rem.level_shift}
            what = f"level shift {rem.level_shift} Ha"
        else:
            upd = {"smearing": rem.smearing}
            what = f"smearing {rem.smearing} eV"
        out.append((what, campaign.model_copy(update={"engine": eng.model_copy(update=upd)})))
    return out


def execute(campaign, workdir: Path, step: int = 0, relative: str | None = None) -> None:
    """Start the prepared engine folder ``workdir``: as a remote job when ``campaign.remote``
    is set (``relative``: the folder inside the campaign), else through the launcher, or
    in-process."""
    engine = get_engine(campaign)
    if getattr(campaign, "remote", None) is not None and relative is not None:
        from ionwell.cluster.remote import execute_remote

        execute_remote(campaign, workdir, relative, step)
    else:
        engine.launch(workdir, campaign.launcher)


def run_engine(
    campaign,
    atoms: Atoms,
    workdir: Path,
    context: ComputeContext,
    relative: str | None = None,
    tolerate_parse_errors: bool = False,
) -> Computed:
    """Compute ``atoms`` in ``workdir``; when the SCF does not converge, retry with each
    configured remedy. With ``tolerate_parse_errors`` an unreadable output ends the compute
    with ``parse_error`` set instead of raising."""
    tried: list[str] = []
    last_error: ScfNotConverged | None = None
    result: StepResult | None = None
    pot: Grid | None = None
    attempts = list(scf_variants(campaign))
    ctx = context
    k = 0
    while k < len(attempts):
        what, variant = attempts[k]
        engine = get_engine(variant)
        if tried:
            log.warning("step %04d: SCF not converged; retrying with %s", context.step, what)
        engine.prepare(atoms, workdir, ctx)
        label = f"SCF retry with {what}" if tried else "first try"
        warm = False
        try:
            execute(variant, workdir, context.step, relative)
        except ScfNotConverged as err:  # the program stopped on its unconverged SCF
            tried.append(f"{label}: not converged" if tried else label)
            last_error, warm = err, err.warm
        else:
            last_error = None
            try:
                result, pot = engine.collect(workdir)
            except EngineOutputError as err:
                if not tolerate_parse_errors:
                    raise
                return Computed(
                    result=None, potential=None, remedies=tried[1:], parse_error=str(err)
                )
            verdict = "converged" if result.scf_converged else "not converged"
            tried.append(f"{label}: {verdict}" if tried else label)
            if result.scf_converged:
                break
            warm = result.warm_started
        if k == 0 and warm and not ctx.cold:
            # restart files (the previous step's, or those a stopped attempt left) can hold a
            # state the SCF does not get out of: the same settings once more from the
            # program's own guess, and no previous-step restart for the remedies after it
            ctx = context.model_copy(update={"cold": True, "previous": None})
            attempts.insert(1, ("a fresh guess (the restart files did not converge)", variant))
        elif ctx.cold:  # the remedies continue from the fresh attempt's own restart files
            ctx = ctx.model_copy(update={"cold": False})
        k += 1
    if last_error is not None:  # the last try stopped on its SCF: no result to record
        raise ScfNotConverged(
            f"{last_error}; the SCF did not converge with any remedy "
            f"({'; '.join(tried[1:]) or 'none configured'})"
        )
    return Computed(result=result, potential=pot, remedies=tried[1:])
