"""Checks on open data: the organ_donations data of the causaldata package.

Kessler and Roth (2014): California (adopter from Quarter_Num 4, i.e. 2011 Q3) and 26 other states,
six quarters, outcome the organ-donor registration rate. A DiD (no group split). The published event
study of these data (Huntington-Klein, The Effect, 2021, chapter 18; from memory) shows leads close
to zero and negative lags of roughly -0.02 to -0.03 (the two-way fixed-effects DiD is about -0.0225).
"""

from __future__ import annotations

import numpy as np
import pytest

causaldata = pytest.importorskip("causaldata")

from bayesdid.cells import collapse  # noqa: E402
from bayesdid.checks import run_checks  # noqa: E402
from bayesdid.study import make_study  # noqa: E402


@pytest.fixture(scope="module")
def organ_report():
    from causaldata import organ_donations

    frame = organ_donations.load_pandas().data
    study = make_study(
        table="organ_donations.csv",
        outcome="Rate",
        jurisdiction="State",
        period="Quarter_Num",
        adopters={"California": 4},
        draws=400,
        tune=400,
        chains=2,
        seed=2014,
        title="organ donor registration (Kessler and Roth 2014 data)",
    )
    cells = collapse(study, frame)
    assert cells.shape == (27, 1, 6)
    return run_checks(study, cells=cells)


def test_organ_leads_close_to_zero(organ_report):
    r = organ_report.results["event_time"]
    tab = r.tables["event_time"].set_index("event_time")
    assert list(tab.index) == [-3, -2, -1, 0, 1, 2]
    leads = tab[tab["role"] == "lead"]
    # "close to zero": within 0.02 of zero (the size of the published effect; from memory), and the
    # 90% interval covers zero
    assert (np.abs(leads["mean"]) < 0.02).all(), leads
    assert ((leads["lower_90"] < 0) & (leads["upper_90"] > 0)).all()
    assert r.status == "ok", r.reason
    lags = tab[tab["role"] == "lag"]
    assert -0.05 < lags["mean"].mean() < 0  # negative lags, as published (from memory)


def test_organ_all_checks_run(organ_report):
    res = organ_report.results
    assert set(res) == {"event_time", "pretrend", "placebo_time", "comparison", "placebo_space"}
    for name, r in res.items():
        assert r.status in ("ok", "flag", "not applicable"), name
        assert r.reason
    # 3 pre-periods: the pre-trend slope has its 3 points; default placebo lag = 3 // 2 = 1
    assert res["pretrend"].status != "not applicable"
    assert res["placebo_time"].threshold["lag"] == 1
    sp = res["placebo_space"]
    assert sp.details["n_placebos"] == 26
    assert (sp.threshold["placebo_draws"], sp.threshold["placebo_tune"]) == (300, 300)  # the study's 400 capped
    cmp_ = res["comparison"].threshold  # leave-one-out refits sample as the placebos do
    assert (cmp_["refit_draws"], cmp_["refit_tune"]) == (sp.threshold["placebo_draws"], sp.threshold["placebo_tune"])
    assert 1 <= sp.details["rank"] <= 27 and 1 / 27 <= sp.details["permutation_p"] <= 1
