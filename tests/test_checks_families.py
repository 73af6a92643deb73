"""Checks for the binomial and count families, and a failing check recorded while the others run.

The pre-trend check of a non-Gaussian family replicates the adopters' pre-policy gap on the link
scale from the family itself (bayesdid.model.families.replicate_gap_path); the comparison check reads
the latent gap-noise field. Simulated data (bayesdid.simulate_families; invented regions), one
poisson DDD shape (16 regions, 8 periods, one adopter starting at index 5) for every fit here, so the
module compiles one model and re-samples it with new data.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from bayesdid.cells import collapse
from bayesdid.checks import comparison_check, pretrend_check, run_checks, runner, write_checks
from bayesdid.checks.base import CheckResult
from bayesdid.model.families import replicate_gap_path
from bayesdid.model.structure import gap_scale_draws
from bayesdid.model.terms import resolve_scales
from bayesdid.sample import fit_cells
from bayesdid.simulate import region_names
from bayesdid.simulate_families import CountScenario, simulate_family
from bayesdid.study import SamplerSettings, make_study

SETTINGS = SamplerSettings(chains=2, draws=300, tune=300, seed=5)
SHAPE = dict(
    family="poisson",
    jurisdictions=16,
    periods=8,
    starts={0: 5},
    rows_per_cell=200,
    covariates=False,
    level=(-1.2, -0.8),
    exposure=(0.5, 1.5),
    gap_sd=0.04,
    shock_sd=0.05,
)


def cells_of(seed, **kw):
    frame, truth = simulate_family(CountScenario(**{**SHAPE, **kw}), seed)
    study = make_study(
        table="sim.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        family="poisson",
        exposure="exposure",
        draws=300,
        tune=300,
        chains=2,
        seed=5,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cells = collapse(study, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    return study, cells, scales


@pytest.fixture(scope="module")
def flat():
    return cells_of(31)


def test_poisson_pretrend_runs_and_passes_without_drift(flat):
    _, cells, scales = flat
    r = pretrend_check(cells, scales, SETTINGS, family="poisson")
    assert r.status == "ok", r.reason
    band = r.tables["pretrend_band"]
    assert len(band) == 5 and band["event_time"].tolist() == [-5, -4, -3, -2, -1]
    # the observed log-rate gap sits inside the replicated 90% band in most pre-periods
    inside = (band["observed_gap"] >= band["band_lower_90"]) & (band["observed_gap"] <= band["band_upper_90"])
    assert inside.sum() >= 4
    assert 0.05 < r.details["p_value_slope"] < 0.95


def test_poisson_pretrend_flags_a_drifting_gap():
    # the adopter's log-rate gap rises 0.25 per period up to its start (1.0 over the pre-period),
    # against a gap noise of sd 0.04 and cells of 60 to 120 events: the slope's replicated sd is about 0.06
    _, cells, scales = cells_of(31, pre_drift=0.25)
    r = pretrend_check(cells, scales, SETTINGS, family="poisson")
    assert r.status == "flag", r.reason
    assert r.details["p_value_slope"] < 0.05


def test_replicated_gap_matches_the_family_by_simulation(flat):
    """The replicated log-rate gap's spread equals what Poisson sampling plus the gap noise gives.

    Reference: the delta-method variance of log(Y/E) for Poisson Y with mean mu is 1/mu (common
    practice); the gap of two cells adds the two and the gap noise's variance at period t of a
    deviation from the path's mean, sigma_gap_j^2 (A R A')_tt (jurisdiction 0's own scale) with R the AR(1) correlation rho^|t-s|
    and A = I - 11'/T (the persistent default; sigma_gap^2 (1 - 1/T) at rho = 0), averaged over draws.
    Tolerance: 3 Monte Carlo standard errors of each sample variance over the 600 draws, measured from
    the replicates' own fourth moment, sqrt((m4 - var^2) / N) (common practice; about 6% of the
    variance for normal values, more here because each draw has its own sigma_gap_j, which fattens the
    tails), plus 3% for the delta method's error at 60 to 90 events.
    """
    _, cells, scales = flat
    fit = fit_cells(cells, scales, SETTINGS, family="poisson")
    rng = np.random.default_rng(0)
    per = np.arange(5)
    obs, exp_, rep = replicate_gap_path(fit, 0, per, rng)
    assert obs.shape == (5,) and exp_.shape == rep.shape == (600, 5)
    resid = rep - exp_
    T = cells.shape[2]
    assert fit.spec.gap == "persistent"
    k = np.abs(np.subtract.outer(np.arange(T), np.arange(T)))
    A = np.eye(T) - 1.0 / T
    R = fit.draws("rho")[:, None, None] ** k  # (S, T, T)
    sg2 = np.mean(gap_scale_draws(fit)[:, 0][:, None] ** 2 * np.einsum("ts,nsu,tu->nt", A, R, A), axis=0)[per]
    ev = cells.sum_y[0][:, per]  # observed events of both cells, close to their expected counts
    predicted = (1 / ev).sum(axis=0) + sg2
    got = resid.var(axis=0)
    dev = resid - resid.mean(axis=0)
    se = np.sqrt((np.mean(dev**4, axis=0) - got**2) / len(resid))
    assert np.all(np.abs(got - predicted) <= 0.03 * predicted + 3 * se), (got, predicted, se)
    assert np.all(np.abs(resid.mean(axis=0)) < 3 * np.sqrt(predicted / 600) + 0.02)


def test_poisson_comparison_check_names_the_outlier():
    # comparison jurisdiction 7's log-rate gap jumps by 0.5 from the earliest start on
    _, cells, scales = cells_of(32, gap_jump={7: 0.5})
    fit = fit_cells(cells, scales, SETTINGS, family="poisson")
    r = comparison_check(cells, scales, SETTINGS, fit, family="poisson", refit=False)
    table = r.tables["comparison"]
    assert len(table) == len(cells.comparisons)
    assert r.status == "flag", r.reason
    jumped = region_names(16)[7]  # the simulator's jurisdiction 7 (cells sort their labels)
    assert [o["jurisdiction"] for o in r.offenders] == [jumped]
    row = table.set_index("jurisdiction").loc[jumped]
    # the posterior of its gap noise is shrunk towards 0 (sigma_gap is learned from all 15), but its
    # change is the largest and upward
    assert row["mean"] == table["mean"].max() and row["prob_gt_0"] > 0.95


def test_a_failing_check_is_recorded_and_the_others_run(flat, monkeypatch, tmp_path):
    study, cells, scales = flat

    def boom(*a, **k):
        raise KeyError("sigma")

    def fine(name):
        return lambda *a, **k: CheckResult(name, "ok", "fine")

    monkeypatch.setattr(runner, "pretrend_check", boom)
    for name in ("event_time", "placebo_time", "comparison", "placebo_space"):
        monkeypatch.setattr(runner, f"{name}_check", fine(name))

    class FakeFit:
        def draws(self, name):
            return np.zeros((4, len(cells.adopters)))

    rep = run_checks(study, cells=cells, main_fit=FakeFit())
    assert rep.results["pretrend"].status == "failed"
    assert "KeyError" in rep.results["pretrend"].reason and "sigma" in rep.results["pretrend"].reason
    assert [rep.results[n].status for n in ("event_time", "placebo_time", "comparison", "placebo_space")] == ["ok"] * 4
    out = write_checks(rep, tmp_path / "checks")
    body = json.loads((out / "checks.json").read_text())
    assert body["pretrend"]["status"] == "failed" and body["comparison"]["status"] == "ok"


def test_poisson_event_time_check_fits_one_effect_per_event_time(flat):
    from bayesdid.checks import event_time_check

    _, cells, scales = flat
    r = event_time_check(cells, scales, SETTINGS, tolerance=0.1, family="poisson")
    assert r.status in ("ok", "flag"), r.reason
    table = r.tables["event_time"]
    assert table["event_time"].tolist() == [-5, -4, -3, -2, -1, 0, 1, 2]
    ref = table.set_index("event_time").loc[-1]
    assert ref["mean"] == 0.0 and ref["role"] == "reference"
    # no drift was simulated: every lead's 90% interval holds 0 or sits near it (log-rate scale)
    leads = table[table["role"] == "lead"]
    assert (leads["lower_90"] < 0.15).all() and (leads["upper_90"] > -0.15).all()
