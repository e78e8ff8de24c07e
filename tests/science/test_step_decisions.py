"""The step's decisions as pure functions (ionwell.science.step): milliseconds, no engine.

Each case builds the inputs by hand (findings, a previous decision, settings) and checks the
verdict; the expected outcomes follow from the rules in the config's field descriptions.
"""

from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms

from ionwell.config.campaign import parse_campaign
from ionwell.science import step as decide
from ionwell.science.checks import Finding
from ionwell.science.placement import Decision, Site


def _campaign(**changes):
    data = {"name": "t", "host": {"builder": {"layers": 1, "shells": 1}}}
    data.update(changes)
    return parse_campaign(data, "test")


def _error(code="atoms-too-close"):
    return Finding(severity="error", code=code, message=f"{code} here", step=3)


def _warning():
    return Finding(severity="warning", code="guests-too-close", message="close", step=3)


def _decision(positions, count=1):
    sites = [Site(position=list(p), potential=-1.0 + 0.1 * i, index=[i, 0, 0])
             for i, p in enumerate(positions)]  # fmt: skip
    return Decision(
        rule="deepest", guest="Li", candidates=sites, chosen=sites[:count], exclusion={},
        within=3.0, admissible_fraction=0.5, reason="deepest", grid_shape=[4, 4, 4], count=count,
    )  # fmt: skip


WELLS = [(0.0, 0.0, 0.0), (1.0, 0.0, 0.0), (5.0, 0.0, 0.0), (10.0, 0.0, 0.0)]


def test_charge_is_one_per_guest_in_cation_mode_only():
    assert decide.system_charge(_campaign(guest={"charge_mode": "cation"}), 3) == 3
    assert decide.system_charge(_campaign(guest={"charge_mode": "neutral"}), 3) == 0
    assert decide.system_charge(_campaign(engine={"charge": -1}), 2) == -1


def test_movable_atoms_follow_the_relaxation_settings():
    c = _campaign()
    assert decide.movable_atoms(c.relax.model_copy(update={"enabled": False}), 5, [3, 4]) == ()
    assert decide.movable_atoms(c.relax.model_copy(update={"move": "guests"}), 5, [3, 4]) == (3, 4)
    assert decide.movable_atoms(c.relax.model_copy(update={"move": "all"}), 3, [2]) == (0, 1, 2)


@pytest.mark.parametrize(
    ("stop", "step", "guests", "expect"),
    [
        ({"guests": 3, "max_steps": 10}, 2, 2, None),
        ({"guests": 3, "max_steps": 10}, 3, 3, "target reached: 3 guests"),
        ({"guests": 30, "max_steps": 4}, 4, 4, "maximum steps reached (4)"),
        ({"guests_per_unit": 0.5, "max_steps": 50}, 3, 3, "target reached: x = 0.500"),
    ],
)
def test_rule_stop(stop, step, guests, expect):
    got = decide.rule_stop(_campaign(stop=stop).stop, step, guests, units=6.0)
    assert (got is None) if expect is None else got.startswith(expect)


def test_a_failed_check_rejects_the_site_and_takes_the_next_well():
    c = _campaign()
    prev = _decision(WELLS)
    retry = decide.after_checks(
        c, [_error()], round_=0, placed=[WELLS[0]], rejected=[], previous=prev
    )
    assert retry is not None
    # the next well in depth order that keeps the separation (2.5 Å default) from nothing
    assert retry.sites == [list(WELLS[1])]
    assert retry.rejected == [list(WELLS[0])]
    assert retry.reason == "atoms-too-close"


def test_rejections_accumulate_over_rounds():
    c = _campaign()
    prev = _decision(WELLS)
    retry = decide.after_checks(
        c, [_error()], round_=1, placed=[WELLS[1]], rejected=[WELLS[0]], previous=prev
    )
    assert retry.sites == [list(WELLS[2])]


def test_no_retry_without_error_or_when_the_remedy_is_off_or_used_up():
    prev = _decision(WELLS)
    c = _campaign()
    kw = {"placed": [WELLS[0]], "rejected": [], "previous": prev}
    assert decide.after_checks(c, [_warning()], round_=0, **kw) is None
    off = _campaign(remedies={"reject_site": False})
    assert decide.after_checks(off, [_error()], round_=0, **kw) is None
    capped = _campaign(remedies={"max_rejects": 2})
    assert decide.after_checks(capped, [_error()], round_=2, **kw) is None
    # step 0 placed nothing new: nothing to reject
    assert (
        decide.after_checks(c, [_error()], round_=0, placed=[], rejected=[], previous=None) is None
    )


def test_no_retry_when_every_well_was_tried():
    prev = _decision(WELLS[:2])
    got = decide.after_checks(
        _campaign(), [_error()], round_=1, placed=[WELLS[1]], rejected=[WELLS[0]], previous=prev
    )
    assert got is None


def test_a_pair_is_replaced_by_a_pair_that_keeps_the_separation():
    c = _campaign(placement={"per_step": 2, "separation": 3.0})
    prev = _decision(WELLS, count=2)
    prev = prev.model_copy(update={"chosen": [prev.candidates[0], prev.candidates[2]]})
    retry = decide.after_checks(
        c, [_error()], round_=0, placed=[WELLS[0], WELLS[2]], rejected=[], previous=prev
    )
    # untried in depth order: (1,0,0), (10,0,0) — 9 Å apart, so both are taken
    assert retry.sites == [list(WELLS[1]), list(WELLS[3])]


def test_check_stop_names_the_failed_check_before_the_stop_rule():
    c = _campaign(stop={"guests": 1})
    why = decide.check_stop(c, [_error("host-fragmented")], step=1, guests=1, units=1.0)
    assert why == "stopped by check: host-fragmented here"
    assert decide.check_stop(c, [_warning()], step=1, guests=1, units=1.0).startswith("target")
    assert decide.check_stop(c, [], step=0, guests=0, units=1.0) is None


def test_after_decision_stops_on_no_well_or_a_well_above_the_bound():
    empty = _decision([], count=0).model_copy(update={"reason": "no admissible well"})
    assert decide.after_decision(_campaign(), empty) == "no admissible well"
    bounded = _campaign(stop={"well_above": -1.5})
    why = decide.after_decision(bounded, _decision(WELLS))
    assert why.startswith("deepest admissible well at -1.000 V lies above the bound -1.500 V")
    assert decide.after_decision(_campaign(), _decision(WELLS)) is None


def test_with_guests_appends_at_the_sites_and_drops_results():
    from ase.calculators.singlepoint import SinglePointCalculator

    base = Atoms("C2", positions=[[0, 0, 0], [1.4, 0, 0]])
    base.calc = SinglePointCalculator(base, energy=-1.0)
    out = decide.with_guests(base, "Li", [[0, 0, 2.0], [1.4, 0, 2.0]])
    assert out.get_chemical_symbols() == ["C", "C", "Li", "Li"]
    np.testing.assert_allclose(out.positions[2:], [[0, 0, 2.0], [1.4, 0, 2.0]])
    assert out.calc is None and base.calc is not None
    assert len(decide.with_guests(base, "Li", [])) == 2


def test_an_unconverged_scf_never_rejects_the_site():
    # the SCF remedies retry at the same site; a site is struck out only by a geometric or
    # bonding error, so a good site is not lost to an SCF that would not converge
    c = _campaign()
    prev = _decision(WELLS)
    kw = {"round_": 0, "placed": [WELLS[0]], "rejected": [], "previous": prev}
    assert decide.after_checks(c, [_error("scf-not-converged")], **kw) is None
    # with a geometric error beside it the site goes, for that error alone
    retry = decide.after_checks(c, [_error("scf-not-converged"), _error()], **kw)
    assert retry is not None and retry.reason == "atoms-too-close"
    # and the campaign then stops on the SCF error rather than carrying on
    reason = decide.check_stop(c, [_error("scf-not-converged")], 3, 1, 1.0)
    assert reason is not None and "scf-not-converged" in reason
