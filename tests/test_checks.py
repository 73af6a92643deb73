"""Checks on simulated data with a known truth (bayesdid.simulate; invented regions).

Every simulated study here has one shape (DDD, 20 regions, 8 periods, two adopters starting at
period indices 4 and 5), so the whole module compiles two models: the default per-adopter model and
the event-time model. Every other fit re-samples one of them with new data (``compiled.with_data``).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesdid import sample
from bayesdid.cells import collapse
from bayesdid.checks import (
    CHECKS,
    comparison_check,
    event_time_check,
    placebo_space_check,
    placebo_time_check,
    pretrend_check,
    run_checks,
)
from bayesdid.checks.base import effect_weights, pre_weight
from bayesdid.checks.placebo import placebo_space_cells
from bayesdid.model.terms import event_time_data, event_times_of, model_spec, resolve_scales
from bayesdid.simulate import Scenario, simulate
from bayesdid.study import SamplerSettings, make_study

SETTINGS = SamplerSettings(chains=2, draws=300, tune=300, seed=11)
FAST = SamplerSettings(chains=2, draws=200, tune=200, seed=13)  # p-value MC error about 0.01
STARTS = {0: 4, 1: 5}


def sim(seed, rows_per_cell=200, **kw):
    sc = Scenario(jurisdictions=20, periods=8, starts=STARTS, rows_per_cell=rows_per_cell, **kw)
    frame, truth = simulate(sc, seed)
    study = make_study(
        table="sim.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        draws=300,
        tune=300,
        seed=11,
    )
    return study, frame, truth


def cells_of(seed, rows_per_cell=200, **kw):
    study, frame, truth = sim(seed, rows_per_cell=rows_per_cell, **kw)
    cells = collapse(study, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    return cells, scales, truth


# ---- structure (no sampling) -----------------------------------------------------------------


def test_event_time_assignment_and_spec_key():
    cells, _, _ = cells_of(1)
    ks = event_times_of(cells)
    # one adopter starts at index 4 (k = -4..3), the other at index 5 (k = -5..2); k = -1 is the reference
    assert ks == (-5, -4, -3, -2, 0, 1, 2, 3)
    E = event_time_data(cells, ks)
    assert E.shape == (len(ks), 20, 2, 8)
    # every adopter target cell has exactly one event time except k = -1; nothing elsewhere
    tot = E.sum(axis=0)
    ad = cells.adopters
    others = np.setdiff1d(np.arange(20), ad)
    assert tot[:, 0].sum() == 0 and tot[others].sum() == 0
    for j in ad:
        s = cells.start[j]
        assert tot[j, 1, s - 1] == 0 and tot[j, 1].sum() == 7  # the k = -1 cell has no parameter
        assert E[ks.index(2), j, 1, s + 2] == 1 and E[ks.index(-2), j, 1, s - 2] == 1
    att, ev = model_spec(cells), model_spec(cells, effects="event_time")
    assert att.effects == "att" and att.event_times == ()
    assert att.key() != ev.key() and ev.event_times == ks
    assert model_spec(cells, effects="event_time", event_pooled=True).key() != ev.key()


def test_not_applicable_without_enough_pre_periods():
    study, frame, truth = sim(1)
    early = make_study(
        table="sim.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters={k: 3 for k in truth["starts"]},
    )
    cells = collapse(early, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, early.priors).items()}
    r = pretrend_check(cells, scales, SETTINGS)
    assert r.status == "not applicable" and "3 or more observed pre-periods" in r.reason
    r = placebo_time_check(cells, scales, SETTINGS, lag=2)
    assert r.status == "not applicable" and "placebo_lag" in r.reason


def test_event_time_status_and_sentence_agree():
    # The status asks "is there evidence of a pre-trend?"; P(all leads within tolerance) asks "are the
    # leads shown to be small?". Draws given directly (no sampling): leads at zero measured tightly,
    # leads at zero measured loosely (status ok, yet the sentence says a pre-trend as large as the
    # tolerance cannot be ruled out), and leads away from zero (flag).
    cells, _, _ = cells_of(1)
    ks = event_times_of(cells)
    lead = np.array([k < -1 for k in ks])
    rng = np.random.default_rng(5)

    class Fake:
        diagnostics = {"ok": True}

        def __init__(self, centre, sd):
            self.beta = rng.normal(0.0, sd, size=(2000, len(ks))) + centre * lead

        def draws(self, name):
            assert name == "event_effect"
            return self.beta

    tight = event_time_check(cells, {}, SETTINGS, tolerance=0.05, fit=Fake(0.0, 0.005))
    loose = event_time_check(cells, {}, SETTINGS, tolerance=0.05, fit=Fake(0.0, 0.5))
    away = event_time_check(cells, {}, SETTINGS, tolerance=0.05, fit=Fake(0.3, 0.02))
    assert tight.status == "ok" and tight.details["leads_shown_small"] and "probably small" in tight.reason
    assert loose.details["prob_all_leads_within_tolerance"] < 0.05
    assert loose.status == "ok" and not loose.details["leads_shown_small"]
    assert "no evidence of a pre-trend" in loose.reason and "cannot be ruled out" in loose.reason
    assert "probably small" not in loose.reason
    assert away.status == "flag" and "jointly away from zero" in away.reason


def test_placebo_space_cells_keep_adopter_count():
    cells, _, _ = cells_of(1)
    c, a0 = int(cells.comparisons[3]), int(cells.adopters[0])
    pc, slot = placebo_space_cells(cells, c)
    assert len(pc.adopters) == len(cells.adopters)
    assert pc.adopters[slot] == c and pc.start[c] == cells.start[a0] and pc.start[a0] == 8
    assert (pc.jt_weight()[cells.adopters] == 0).all() and (pc.jt_weight()[cells.comparisons] == 1).all()
    assert model_spec(pc).key() == model_spec(cells).key()
    w = pre_weight(cells)
    assert (w[cells.comparisons] == 1).all()
    for j in cells.adopters:
        assert (w[j, : cells.start[j]] == 1).all() and (w[j, cells.start[j] :] == 0).all()


# ---- fitted checks ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def growing():
    # effects growing over three periods: 0.2, 0.4, 0.6 at k = 0, 1, 2 (and 0.6 after); large cells
    # and a small gap noise so that each k is measured to about +-0.06
    cells, scales, _ = cells_of(3, effect_path=(0.2, 0.4, 0.6), rows_per_cell=1000, gap_sd=0.03)
    return cells, scales, event_time_check(cells, scales, SETTINGS, tolerance=0.05)


def test_event_time_recovers_growing_path(growing):
    _, _, r = growing
    tab = r.tables["event_time"].set_index("event_time")
    for k, truth in ((0, 0.2), (1, 0.4), (2, 0.6)):
        # tolerance: 3 posterior sd (the statistical error; MC error of the mean is ~sd/15 with
        # ~300 effective draws, negligible) - fails about 0.3% of the time for a calibrated posterior
        assert abs(tab.loc[k, "mean"] - truth) < 3 * tab.loc[k, "sd"], (k, tab.loc[k].to_dict())
    assert tab.loc[0, "mean"] < tab.loc[1, "mean"] < tab.loc[2, "mean"]
    assert tab.loc[2, "lower_90"] > 0.3
    assert tab.loc[-1, "role"] == "reference" and tab.loc[-1, "mean"] == 0
    leads = tab[tab["role"] == "lead"]
    assert len(leads) == 4 and (np.abs(leads["mean"]) < 3 * leads["sd"]).all()
    assert r.status == "ok"


@pytest.fixture(scope="module")
def drift():
    # adopters' gap drifts by 0.05 per period before the start (0 at k = 0)
    cells, scales, _ = cells_of(4, pre_drift=0.05, tau=0.0)
    return cells, scales


def test_drift_is_flagged(drift):
    cells, scales = drift
    r = pretrend_check(cells, scales, SETTINGS)
    assert r.status == "flag", r.reason
    assert r.details["p_value_slope"] < 0.05  # the residual gap rises towards the start: P(rep >= obs) small
    band = r.tables["pretrend_band"]
    assert set(band.columns) >= {
        "adopter",
        "period",
        "event_time",
        "observed_gap",
        "band_lower_90",
        "band_upper_90",
        "expected_gap",
        "band_median",
    }
    e = event_time_check(cells, scales, SETTINGS, tolerance=0.05)
    assert e.status == "flag", e.reason
    lg = e.details["largest_lead"]
    # the true lead at k = -5 is -0.2 relative to k = -1 (drift 0.05 x 4 periods)
    assert lg["event_time"] <= -4 and lg["upper_90"] < 0
    assert e.details["prob_all_leads_within_tolerance"] < 0.05


def test_no_drift_false_flag_rate():
    """Pre-trend check on 20 seeds without drift.

    Observed here: 1 flag in 20 seeds, rate 0.05 (seeds 100-119, draws 200, 2 chains, run
    2026-12-02; seed 116, slope p = 0.97). The nominal rate of one two-sided 0.05/0.95 rule is 0.10;
    two statistics can at most double it to 0.20. Bound: the 99th percentile of Binomial(20, p) for
    p = max(observed 0.05, nominal ceiling 0.20) is 8, so more than 8 flags would mean the check
    fires far more often than measured and than its own rule allows (chance below 1%).
    """
    before = sample.COMPILES["count"]
    flags = []
    for seed in range(100, 120):
        cells, scales, _ = cells_of(seed, tau=-0.1)
        r = pretrend_check(cells, scales, FAST)
        flags.append(r.status == "flag")
    bound = int(stats.binom.ppf(0.99, 20, 0.20))
    assert bound == 8
    assert sum(flags) <= bound, f"{sum(flags)} of 20 flagged"
    assert sample.COMPILES["count"] - before <= 1  # one compile (or none) for 20 fits


def test_placebo_space_rank_and_no_recompile():
    cells, scales, _ = cells_of(5, tau=0.0)
    real = sample.fit_cells(cells, scales, SETTINGS)
    before = sample.COMPILES["count"]
    r0 = placebo_space_check(cells, scales, SETTINGS, real.draws("tau_adopter") @ effect_weights(cells))
    assert sample.COMPILES["count"] == before  # 18 placebos, no compile
    assert r0.details["n_placebos"] == 18
    # no effect: a middle rank. Under the null the rank is uniform on 1..19; for this seed it is fixed.
    assert 4 <= r0.details["rank"] <= 17 and r0.details["permutation_p"] > 0.2, r0.reason
    tab = r0.tables["placebo_space"]
    assert list(tab["role"]).count("real") == 1 and sorted(tab["rank"]) == list(range(1, 20))

    big, scales_b, _ = cells_of(5, tau=1.0)
    real_b = sample.fit_cells(big, scales_b, SETTINGS)
    r1 = placebo_space_check(big, scales_b, SETTINGS, real_b.draws("tau_adopter") @ effect_weights(big))
    assert sample.COMPILES["count"] == before
    assert r1.details["rank"] == 1 and r1.details["permutation_p"] == pytest.approx(1 / 19)
    # a large effect is far beyond Monte Carlo error of every placebo: no ties, p is settled
    assert r1.details["ties_within_mc_error"] == 0
    assert r1.details["permutation_p_range"] == pytest.approx([1 / 19, 1 / 19])
    assert len(r1.details["placebo_mcse"]) == 18 and 0 < r1.details["real_mcse"] < 0.1
    assert r1.status == "ok", r1.reason


def test_placebo_time_and_comparison_outlier():
    study, frame, _ = sim(6, tau=-0.1)
    # one comparison region's target group jumps by 0.5 from the earliest start on
    odd = "Lanthorne"
    hit = (frame["region"] == odd) & (frame["group"] == "target") & (frame["period"] >= 5)
    frame = frame.copy()
    frame.loc[hit, "y"] += 0.5
    cells = collapse(study, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    pt_ = placebo_time_check(cells, scales, SETTINGS)
    assert pt_.threshold["lag"] == 2  # default: half of the 4 pre-periods
    assert pt_.status == "ok", pt_.reason
    fit = sample.fit_cells(cells, scales, SETTINGS)
    r = comparison_check(cells, scales, SETTINGS, fit)
    assert r.status == "flag" and [o["jurisdiction"] for o in r.offenders] == [odd], r.reason
    tab = r.tables["comparison"].set_index("jurisdiction")
    # the posterior of the latent gap change is shrunk towards 0 by the model (the jump is large
    # against sigma_gap), so the check is on its sign and its being the largest, not on 0.5
    assert tab.loc[odd, "lower_90"] > 0 and tab.loc[odd, "robust_z"] == tab["robust_z"].max()
    assert np.isfinite(tab.loc[odd, "loo_effect_mean"]) and tab["loo_effect_mean"].notna().sum() == 1
    others = tab.drop(index=odd)
    assert (np.abs(others["robust_z"]) <= 3).all()


def test_cli_checks_writes_folder(tmp_path):
    from bayesdid.cli import main

    study, frame, truth = sim(1)
    frame.to_csv(tmp_path / "sim.csv", index=False)
    starts = ", ".join(f'"{k}" = {v}' for k, v in truth["starts"].items())
    (tmp_path / "study.toml").write_text(f"""
title = "Invented clinic-visit study"
[data]
table = "sim.csv"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "group"
[policy]
target_group = "target"
adopters = {{ {starts} }}
[sampler]
draws = 200
tune = 200
seed = 3
[checks]
placebo_lag = 1
""")
    out = tmp_path / "checks"
    assert main(["checks", str(tmp_path / "study.toml"), "--out", str(out), "--only", "placebo_time", "--quiet"]) == 0
    body = json.loads((out / "checks.json").read_text())
    assert set(CHECKS) <= set(body)
    assert body["placebo_time"]["status"] in ("ok", "flag") and body["placebo_time"]["threshold"]["lag"] == 1
    assert body["pretrend"]["status"] == "not run"
    tab = pd.read_csv(out / "placebo_time.csv")
    assert list(tab.columns) == ["lag", "fake_start", "mean", "sd", "lower_90", "upper_90", "prob_gt_0"]
    # existing folder: refused with exit 2, nothing changed
    assert main(["checks", str(tmp_path / "study.toml"), "--out", str(out), "--quiet"]) == 2
    assert sorted(p.name for p in out.iterdir()) == ["checks.json", "manifest.json", "placebo_time.csv"]
    assert main(["checks", str(tmp_path / "study.toml"), "--out", str(tmp_path / "x"), "--only", "nope"]) == 2
    assert not (tmp_path / "x").exists()


def test_run_checks_rejects_unknown_name():
    from bayesdid.errors import BayesDidError

    study, frame, _ = sim(1)
    with pytest.raises(BayesDidError, match="unknown check 'slopes'.*choose one of"):
        run_checks(study, cells=collapse(study, frame), only="slopes")


def test_placebo_fits_sample_at_most_placebo_draws():
    """Placebo-in-space fits use the study's chains and seed with draws and tune capped at PLACEBO_DRAWS
    (ranks and p-values measured unchanged on both demo cases, see bayesdid/checks/placebo.py)."""
    from bayesdid.checks.placebo import PLACEBO_DRAWS, placebo_settings

    long = SamplerSettings(chains=4, draws=2000, tune=1000, seed=7)
    ps = placebo_settings(long)
    assert (ps.chains, ps.draws, ps.tune, ps.seed) == (4, PLACEBO_DRAWS, PLACEBO_DRAWS, 7)
    assert placebo_settings(FAST) == FAST  # shorter than the cap: the study's own
    assert placebo_settings(long, None) == long
    assert placebo_settings(long, 500) == SamplerSettings(chains=4, draws=500, tune=500, seed=7)


def test_placebo_fits_in_threads_equal_fits_one_by_one():
    """Fits sampled two at a time in threads give the draws each gives alone: each chain starts from its
    own fit's data (prior scales differ between the jobs here) whichever fit set the shared model last."""
    cells, scales, _ = cells_of(5, tau=0.0)
    wide = {k: 3.0 * v for k, v in scales.items()}
    jobs = []
    for c in cells.comparisons[:2]:
        pc, _ = placebo_space_cells(cells, int(c))
        jobs += [{"cells": pc, "scales": s, "settings": FAST, "var_names": ("tau_adopter",)} for s in (scales, wide)]
    order = []
    both = sample.sample_draws_many(jobs, workers=2, done=order.append)
    alone = sample.sample_draws_many(jobs, workers=1)
    assert order == [0, 1, 2, 3]
    for a, b in zip(both, alone):
        assert np.array_equal(a.draws("tau_adopter"), b.draws("tau_adopter"))
    # the same placebo under wider priors is another fit (so a chain started from the other job's
    # data would show)
    assert not np.array_equal(both[0].draws("tau_adopter"), both[1].draws("tau_adopter"))


def test_p_value_range_counts_ties_within_monte_carlo_error():
    from bayesdid.checks.placebo import p_value_range

    means = [0.30, -0.181, 0.10, 0.175, -0.05]
    # combined MCSE 0.005, so placebos within 0.01 of |real| = 0.178 tie: -0.181 and 0.175
    r = p_value_range(means, [0.004] * 5, -0.178, 0.003)
    assert r["ties"] == 2
    assert r["p"] == pytest.approx(3 / 6)  # 0.30 and -0.181 as they fell
    assert (r["p_low"], r["p_high"]) == (pytest.approx(2 / 6), pytest.approx(4 / 6))
    exact = p_value_range(means, [0.0] * 5, -0.178, 0.0)
    assert exact["ties"] == 0 and exact["p_low"] == exact["p"] == exact["p_high"]
