"""The loop's remedies on real DFT: an SCF that stops at its iteration cap is retried with the
configured remedy, and the retry is recorded in the ledger."""

from __future__ import annotations

import pytest
from shared import run_campaign

from ionwell.store.campaign import CampaignPaths
from ionwell.store.ledger import read_ledger

pytestmark = pytest.mark.slow


def test_scf_retry_with_more_cycles_is_recorded(tmp_path):
    cfg = {
        "name": "remedy",
        "host": {"builder": {"layers": 1, "shells": 1}},
        "engine": {
            "xc": "lda,vwn",
            "basis": "sto-3g",
            "max_cycle": 1,  # one SCF iteration cannot converge benzene from a fresh guess
            "potential_grid": {"spacing": 0.5, "margin": 2.5},
        },
        "remedies": {"scf": ["more_cycles"], "more_cycles": 100},
        "stop": {"max_steps": 0},
    }
    run_campaign(cfg, tmp_path, timeout=600)
    (rec,) = read_ledger(CampaignPaths(tmp_path / "campaigns" / "remedy").ledger)
    assert rec.scf_converged
    assert rec.remedies == ["SCF retry with max_cycle 100: converged"]
    assert rec.stop_reason == "maximum steps reached (0)"
