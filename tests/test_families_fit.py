"""Sampling tests of the binomial and poisson families (two compiled structures in all).

Every poisson fit here has the structure of the nurse_line demo (DDD, 24 jurisdictions, 8 periods,
2 adopters, 3 covariate columns), so the demo run, the GLM comparison and the recovery share one
compiled model; the binomial tests share another.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.effects import natural_effects
from bayesdid.model.terms import model_spec
from bayesdid.run import analyse
from bayesdid.simulate_families import CountScenario, simulate_family

POISSON = dict(
    family="poisson",
    jurisdictions=24,
    periods=8,
    starts={0: 4, 1: 5},
    rows_per_cell=150,
    level=(-2.2, -1.5),
    theta=(0.15, 0.45, 1.0),
    exposure=(0.25, 1.0),
)


def _study(frame, truth, family, covariates="C(sex) + C(risk)", priors=None, draws=500, seed=1, **kw):
    return make_study(
        table="unused.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        family=family,
        covariates=covariates,
        priors=priors,
        draws=draws,
        tune=500,
        chains=2,
        seed=seed,
        **kw,
    )


@pytest.fixture(scope="module")
def poisson_recovery():
    frame, truth = simulate_family(CountScenario(tau=-0.25, **POISSON), 101)
    study = _study(frame, truth, "poisson", exposure="exposure", threshold=-0.1)
    cells = collapse(study, frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(study, cells=cells)
    return an, truth


def _direct_counterfactual(fit, inverse_link):
    """Natural-scale means over treated records, computed draw by draw from the raw posterior arrays
    with explicit loops over records (an independent path to the library's vectorised one)."""
    cells = fit.cells
    J, G, T = cells.shape
    rec = cells.extra["records"]
    b, a = fit.draws("baseline"), fit.draws("period_effect")
    h = fit.draws("group_period_effect") if G == 2 else None
    tau_a, gap = fit.draws("tau_adopter"), fit.draws("gap")
    shock = fit.draws("shock") if G == 2 else None
    theta = fit.draws("theta") if rec["x"].shape[1] else None
    adopter_of = {j: k for k, j in enumerate(cells.adopters)}
    num1 = num0 = den = 0.0
    for r in range(len(rec["y"])):
        c = int(rec["cell"][r])
        j, g, t = c // (G * T), (c // T) % G, c % T
        if not (g == cells.target and j in adopter_of and t >= cells.start[j]):
            continue
        eta0 = b[:, j, g] + a[:, t] + gap[:, j, t]
        if h is not None:
            eta0 = eta0 + h[:, t] + shock[:, j, t]
        if theta is not None:
            eta0 = eta0 + theta @ rec["x"][r]
        eta1 = eta0 + tau_a[:, adopter_of[j]]
        num1 = num1 + rec["size"][r] * inverse_link(eta1)
        num0 = num0 + rec["size"][r] * inverse_link(eta0)
        den += rec["size"][r]
    return num1 / den, num0 / den, den


def test_one_structure_for_demo_and_simulations(poisson_recovery):
    """The demo case and every poisson simulation here share one model structure (one compile)."""
    from bayesdid.cli import case_dir
    from bayesdid.data import read_table
    from bayesdid.study import load_study

    an, _ = poisson_recovery
    demo = load_study(case_dir("nurse_line") / "study.toml")
    demo_cells = collapse(demo, read_table(demo.table))
    assert model_spec(demo_cells, "poisson").key() == an.fit.spec.key()


def test_rate_ratio_recovered_and_natural_estimands_direct(poisson_recovery):
    an, truth = poisson_recovery
    nat = {e.measure: e for e in an.effects.natural}
    rr = nat["rate ratio"]
    # known truth: the rate ratio over the treated cells from the true linear predictors; with a
    # fixed seed the posterior mean is within 3 posterior sd of it (a 3-sd band, common practice)
    assert abs(rr.summary["mean"] - truth["rate_ratio"]) < 3 * rr.summary["sd"]
    assert rr.summary["threshold"] == pytest.approx(0.9)  # -10% as a ratio threshold
    m1, m0, W = _direct_counterfactual(an.fit, np.exp)
    np.testing.assert_allclose(rr.draws, m1 / m0, rtol=1e-10)
    np.testing.assert_allclose(
        nat["rate difference per 1,000 units of exposure"].draws, 1000 * (m1 - m0), rtol=1e-9, atol=1e-9
    )
    np.testing.assert_allclose(
        nat["events averted in the treated cells (total)"].draws, W * (m0 - m1), rtol=1e-9, atol=1e-9
    )
    assert rr.summary["prob_lt_1"] == pytest.approx(np.mean(m1 / m0 < 1))
    assert rr.summary["prob_beyond_threshold"] == pytest.approx(np.mean(m1 / m0 < 0.9))


def test_poisson_exposure_matches_statsmodels_glm():
    """statsmodels GLM (Poisson, offset log exposure) on the same records: jurisdiction x group,
    period, target x period and adopter x period dummies, the three covariates and the treatment.
    The Bayesian model equals that GLM when the comparisons' shocks, the gap noise and the adopter
    spread are switched off (prior scales 1e-3) and the other priors are vague (the adopters' own
    shocks take the vague period scale, hence their dummies); then the posterior mean of tau must agree with the
    MLE within Monte Carlo error: 4 MCSE (MCSE = posterior sd / sqrt(bulk ESS)) plus 0.05 posterior
    sd for the O(1/n) gap between a posterior mean and an MLE."""
    import arviz as az
    import statsmodels.api as sm

    frame, truth = simulate_family(CountScenario(tau=-0.2, shock_sd=0.0, gap_sd=0.0, **POISSON), 202)
    priors = {
        "gap_noise": 1e-3,
        "shock_spread": 1e-3,
        "adopter_spread": 1e-3,
        "intercept": 10.0,
        "baseline_spread": 5.0,
        "period": 5.0,
        "group_period": 5.0,
        "effect": 5.0,
        "covariate": 5.0,
    }
    study = _study(frame, truth, "poisson", priors=priors, exposure="exposure", draws=500, seed=3)
    cells = collapse(study, frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(study, cells=cells)

    J, G, T = cells.shape
    rec = cells.extra["records"]
    c = rec["cell"]
    j, g, t = c // (G * T), (c // T) % G, c % T
    cols = {}
    for jj in range(J):
        for gg in range(G):
            cols[f"jg{jj}_{gg}"] = ((j == jj) & (g == gg)).astype(float)
    for tt in range(1, T):
        cols[f"t{tt}"] = (t == tt).astype(float)
        cols[f"tgt_t{tt}"] = ((t == tt) & (g == cells.target)).astype(float)
        for ja in cells.adopters:  # adopters' own shocks are free in the model (wide prior): FE here
            cols[f"adopter{ja}_t{tt}"] = ((j == ja) & (t == tt)).astype(float)
    for k in range(rec["x"].shape[1]):
        cols[f"x{k}"] = rec["x"][:, k]
    cols["D"] = cells.treated.ravel()[c].astype(float)
    X = pd.DataFrame(cols)
    glm = sm.GLM(rec["y"], X, family=sm.families.Poisson(), offset=np.log(rec["size"])).fit()
    draws = an.fit.draws("tau")
    ess = float(az.ess(an.fit.posterior[["tau"]], method="bulk")["tau"])
    mcse = draws.std(ddof=1) / np.sqrt(ess)
    assert abs(draws.mean() - glm.params["D"]) < 4 * mcse + 0.05 * draws.std(ddof=1)
    # and the GLM's standard error agrees with the posterior sd to 20% (normal approximation)
    assert draws.std(ddof=1) == pytest.approx(glm.bse["D"], rel=0.2)


def test_demo_case_runs_from_the_command_line(tmp_path, capsys):
    from bayesdid.cli import main

    out = tmp_path / "demo"
    code = main(["demo", "--case", "nurse_line", "--out", str(out), "--draws", "200", "--tune", "200", "--quiet"])
    assert code == 0, capsys.readouterr().err
    summary = json.loads((out / "summary.json").read_text())
    measures = [e["measure"] for e in summary["effect_natural"]]
    assert measures[0] == "rate ratio" and "events averted per 1,000 units of exposure" in measures
    assert summary["model"]["family"] == "poisson"
    assert summary["model"]["covariates"]["formula"] == "C(sex) + C(risk_band)"
    assert summary["model"]["likelihood"].startswith("exact on")
    import xarray as xr

    tree = xr.open_datatree(out / "posterior.nc", engine="h5netcdf")
    assert tree["posterior"]["theta"].sizes["covariate"] == 3
    assert tree["log_likelihood"]["cells"].sizes["period"] == 8


@pytest.fixture(scope="module")
def binomial_fit():
    sc = CountScenario(
        family="binomial",
        jurisdictions=16,
        periods=6,
        starts={0: 3},
        rows_per_cell=300,
        covariates=False,
        level=(-1.0, -0.7),
        tau=-0.3,
    )
    frame, truth = simulate_family(sc, 303)
    study = _study(frame, truth, "binomial", covariates=None, threshold=-0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(study, cells=collapse(study, frame))
    return an, truth


def test_risk_difference_recovered_and_direct(binomial_fit):
    from scipy.special import expit

    an, truth = binomial_fit
    nat = {e.measure: e for e in an.effects.natural}
    rd = nat["risk difference, percentage points"]
    # known truth from the generator's own linear predictors; 3 posterior sd (common practice)
    assert abs(rd.summary["mean"] - truth["risk_difference_pp"]) < 3 * rd.summary["sd"]
    assert abs(nat["risk ratio"].summary["mean"] - truth["risk_ratio"]) < 3 * nat["risk ratio"].summary["sd"]
    p1, p0, _ = _direct_counterfactual(an.fit, expit)
    np.testing.assert_allclose(rd.draws, 100 * (p1 - p0), rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(nat["risk ratio"].draws, p1 / p0, rtol=1e-10)
    # recomputing from the fit alone gives the same draws
    again = natural_effects(an.fit, -0.1)
    np.testing.assert_allclose(again[0].draws, rd.draws)
    assert "log odds" in an.effects.effect.measure


@pytest.mark.slow
def test_rho_recovered_on_a_poisson_panel_with_ar1_gap_noise():
    """A Poisson DiD whose gap noise is AR(1) over periods with rho 0.7 (gap sd 0.25 against about 60
    events a cell, so the gap noise dominates the Poisson noise): the latent AR(1) field's rho covers
    the truth and excludes weak persistence, and summary.json says which form was fitted. One data
    set, a fixed seed (bayesdid.simulate_families with gap_rho; the truth is the generator's own)."""
    sc = CountScenario(
        family="poisson",
        jurisdictions=30,
        periods=12,
        groups=1,
        starts={0: 6},
        rows_per_cell=80,
        covariates=False,
        level=(-0.3,),
        gap_sd=0.25,
        gap_rho=0.7,
        tau=-0.2,
        exposure=(0.5, 1.0),
    )
    frame, truth = simulate_family(sc, 404)
    study = make_study(
        table="unused.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        adopters=truth["starts"],
        family="poisson",
        exposure="exposure",
        draws=500,
        tune=500,
        chains=2,
        seed=7,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(study, cells=collapse(study, frame), full_cross_check=False)
    assert an.fit.spec.gap == "persistent"
    rho = an.fit.draws("rho")
    lo, hi = np.quantile(rho, [0.005, 0.995])
    assert lo < 0.7 < hi
    assert lo > 0.3
    s = an.summary()
    assert s["model"]["gap_noise"]["over_time"] == "persistent" and not s["model"]["gap_noise"]["fallback"]
    assert s["persistence"]["rho"]["mean"] == pytest.approx(float(rho.mean()))
    assert "AR(1)" in s["model"]["sampled_as"]["gap_noise_deviations"]
