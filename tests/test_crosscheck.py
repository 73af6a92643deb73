"""The least-squares cross-check against outside references.

References named beside each check:
* statsmodels OLS on the rows with a full-rank dummy matrix (cov_type "nonrobust", "HC1", "cluster"
  with its default small-sample correction G/(G-1) (N-1)/(N-k)), statsmodels 0.14/0.15;
* the causaldata package, data set organ_donations (Kessler and Roth 2014);
* an independent, plain row-level restricted wild cluster bootstrap written in this file.
Data are invented (bayesdid.simulate) except organ_donations.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from crosscheck_helpers import cells_from_rows, row_design, scenario_rows, study_for

from bayesdid.crosscheck import FEW_TREATED, bootstrap_weights, cross_check, least_squares_estimate
from bayesdid.errors import BayesDidError

ISSUE_KEYS = {
    "estimate",
    "se_classical",
    "se_hc1",
    "se_cr1",
    "p_cr1",
    "p_wild",
    "ci_wild_95",
    "p_permutation",
    "clusters",
    "treated_clusters",
    "advice",
}

CASES = {
    # name: (ddd, K covariates, starts by jurisdiction index)
    "DDD": (True, 0, {0: 2}),
    "DDD-staggered": (True, 0, {0: 2, 1: 3}),
    "DiD": (False, 0, {0: 2, 1: 3}),
    "DDD-covariates": (True, 2, {0: 2, 1: 3}),
    "DiD-covariates": (False, 3, {0: 3}),
}


def statsmodels_fits(y, X, cluster):
    """Reference fits: statsmodels OLS on rows (the outside reference)."""
    return {
        "nonrobust": sm.OLS(y, X).fit(),
        "HC1": sm.OLS(y, X).fit(cov_type="HC1"),
        "cluster": sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": cluster}),
    }


@pytest.fixture(scope="module", params=sorted(CASES))
def case(request):
    ddd, K, starts = CASES[request.param]
    frame, truth, x = scenario_rows(J=7, T=5, ddd=ddd, K=K, starts=starts, seed=11 + K)
    cells = cells_from_rows(frame, truth["starts"], ddd=ddd, x=x)
    return request.param, frame, cells, x


def test_estimate_and_errors_equal_statsmodels_on_rows(case):
    """Source: statsmodels OLS with dummies on the same rows; rtol 1e-8 as the issue asks."""
    name, frame, cells, x = case
    X, dcol, cluster = row_design(cells, frame, x)
    assert np.linalg.matrix_rank(X) == X.shape[1]  # full rank, so statsmodels' k equals ours
    ref = statsmodels_fits(frame["y"].to_numpy(float), X, cluster)
    out = cross_check(cells, full=False)
    assert out["estimate"] == pytest.approx(ref["nonrobust"].params[dcol], rel=1e-8)
    assert out["se_classical"] == pytest.approx(ref["nonrobust"].bse[dcol], rel=1e-8)
    assert out["se_hc1"] == pytest.approx(ref["HC1"].bse[dcol], rel=1e-8)
    assert out["se_cr1"] == pytest.approx(ref["cluster"].bse[dcol], rel=1e-8)
    assert out["regressors"] == X.shape[1]
    assert out["rows"] == len(frame)
    assert out["clusters"] == cells.shape[0]
    assert out["treated_clusters"] == len(cells.adopters)


def test_summary_keys_are_the_issue_keys_and_full_fills_them(case):
    name, frame, cells, x = case
    out = cross_check(cells, seed=5, draws=199)
    assert ISSUE_KEYS <= set(out)
    for k in ("p_wild", "p_permutation"):
        assert 0 < out[k] <= 1
    lo, hi = out["ci_wild_95"]
    assert lo < out["estimate"] < hi
    assert "G / (G - 1)" in out["method"]["se_cr1"] and "N / (N - k)" in out["method"]["se_hc1"]
    quick = cross_check(cells, full=False)
    assert quick["p_wild"] is None and quick["p_permutation"] is None and quick["ci_wild_95"] is None
    assert "--no-cross-check" in quick["skipped"]["p_wild"]
    assert quick["se_cr1"] == out["se_cr1"]


def test_hc1_with_covariates_needs_fourth_moments():
    frame, truth, x = scenario_rows(J=5, T=4, ddd=True, K=2, seed=4)
    cells = cells_from_rows(frame, truth["starts"], ddd=True, x=x, moment4=False)
    out = cross_check(cells, full=False)
    assert out["se_hc1"] is None
    assert "moment4" in out["method"]["se_hc1"]
    X, dcol, cluster = row_design(cells, frame, x)
    ref = statsmodels_fits(frame["y"].to_numpy(float), X, cluster)
    assert out["se_cr1"] == pytest.approx(ref["cluster"].bse[dcol], rel=1e-8)


def test_saturated_2x2x2_equals_triple_difference_of_cell_means():
    """Source: textbook algebra (common practice): in a saturated 2x2x2 design the DDD coefficient
    is the triple difference of the cell means."""
    frame, truth, _ = scenario_rows(J=2, T=2, ddd=True, starts={0: 1}, seed=8)
    cells = cells_from_rows(frame, truth["starts"], ddd=True)
    m = cells.mean
    a, c, tg, rf = int(cells.adopters[0]), int(cells.comparisons[0]), cells.target, cells.reference
    ddd = ((m[a, tg, 1] - m[a, tg, 0]) - (m[a, rf, 1] - m[a, rf, 0])) - (
        (m[c, tg, 1] - m[c, tg, 0]) - (m[c, rf, 1] - m[c, rf, 0])
    )
    assert cross_check(cells, full=False)["estimate"] == pytest.approx(ddd, rel=1e-10)


def test_least_squares_estimate_kept_for_callers():
    frame, truth, _ = scenario_rows(J=5, T=4, ddd=False, seed=2)
    cells = cells_from_rows(frame, truth["starts"], ddd=False)
    ls = least_squares_estimate(cells)
    assert ls["estimate"] == cross_check(cells, full=False)["estimate"]
    assert "two-way" in ls["method"]


# ---- organ_donations -----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def organ():
    from causaldata import organ_donations

    d = organ_donations.load_pandas().data
    frame = d.rename(columns={"State": "region", "Quarter_Num": "period", "Rate": "y"})[["region", "period", "y"]]
    study = study_for(frame, {"California": 4}, ddd=False)
    from bayesdid.cells import collapse_frame

    return frame, collapse_frame(study, frame)


def test_organ_donations_estimate_and_cr1_equal_statsmodels(organ):
    """Source: causaldata organ_donations (Kessler and Roth 2014). Two-way fixed-effects DiD about
    -0.0225 (Huntington-Klein, The Effect, 2021, ch. 18; from memory), -0.02246 from statsmodels on
    the same rows. California adopts from Quarter_Num 4 (2011 Q3)."""
    frame, cells = organ
    out = cross_check(cells, seed=7, draws=999)
    assert round(out["estimate"], 5) == -0.02246
    X, dcol, cluster = row_design(cells, frame)
    ref = statsmodels_fits(frame["y"].to_numpy(float), X, cluster)
    assert out["estimate"] == pytest.approx(ref["nonrobust"].params[dcol], rel=1e-8)
    assert out["se_cr1"] == pytest.approx(ref["cluster"].bse[dcol], rel=1e-8)
    assert out["se_hc1"] == pytest.approx(ref["HC1"].bse[dcol], rel=1e-8)
    assert out["clusters"] == 27 and out["treated_clusters"] == 1
    # one adopter among 27: 27 assignments, so p is a multiple of 1/27
    perm = out["permutation"]
    assert perm["assignments"] == 27 and not perm["sampled"]
    assert round(out["p_permutation"] * 27) == pytest.approx(out["p_permutation"] * 27, abs=1e-9)
    assert len(perm["placebos"]) == 26 and "California" not in {p["adopters"][0] for p in perm["placebos"]}
    assert "unreliable" in out["advice"] and "permutation" in out["advice"] and "posterior" in out["advice"]


def test_placebo_estimates_equal_row_level_refits(organ):
    """Source: statsmodels OLS on the rows with the placebo jurisdiction as the adopter."""
    frame, cells = organ
    out = cross_check(cells, seed=7, draws=99)
    for p in out["permutation"]["placebos"][:3]:
        start = np.full(len(cells.jurisdictions), len(cells.periods))
        start[cells.jurisdictions.index(p["adopters"][0])] = 3
        X, dcol, _ = row_design(cells.with_starts(start), frame)
        ref = sm.OLS(frame["y"].to_numpy(float), X).fit()
        assert p["estimate"] == pytest.approx(ref.params[dcol], rel=1e-8)


# ---- wild cluster bootstrap against a plain row-level implementation -----------------------------
def row_level_wild(y, X, dcol, cluster, V, beta0=0.0):
    """Restricted wild cluster bootstrap on rows, written plainly: impose beta = beta0, resample
    y* = yhat_R + v_j e_R, refit OLS for every draw, CR1 t statistic, symmetric p-value."""
    G = cluster.max() + 1
    N, k = X.shape
    XtXi = np.linalg.inv(X.T @ X)
    factor = G / (G - 1) * (N - 1) / (N - k)

    def beta_and_se(Y):
        B = XtXi @ X.T @ Y
        E = Y - X @ B
        a = XtXi[:, dcol]
        s = np.zeros((G, Y.shape[1]))
        np.add.at(s, cluster, (X @ a)[:, None] * E)
        return B[dcol], np.sqrt(factor * (s**2).sum(0))

    b, se = beta_and_se(y[:, None])
    t = (b[0] - beta0) / se[0]
    Xr = np.delete(X, dcol, axis=1)
    yr = y - beta0 * X[:, dcol]
    er = yr - Xr @ np.linalg.lstsq(Xr, yr, rcond=None)[0]
    Ystar = (y - er)[:, None] + er[:, None] * V[cluster, :]
    bs, ses = beta_and_se(Ystar)
    ts = (bs - beta0) / ses
    return float(np.mean(np.abs(ts) >= abs(t) * (1 - 1e-12))), ts


@pytest.fixture(scope="module", params=["DDD", "DiD-covariates"])
def small(request):
    ddd, K, starts = {"DDD": (True, 0, {0: 2}), "DiD-covariates": (False, 2, {0: 2, 1: 3})}[request.param]
    frame, truth, x = scenario_rows(J=8, T=4, ddd=ddd, K=K, starts=starts, seed=21, gap_sd=0.15, tau=-0.15)
    cells = cells_from_rows(frame, truth["starts"], ddd=ddd, x=x)
    X, dcol, cluster = row_design(cells, frame, x)
    return cells, frame["y"].to_numpy(float), X, dcol, cluster


def test_wild_full_enumeration_agrees_exactly(small):
    """Rademacher, 8 clusters: all 2^8 = 256 sign vectors (no Monte Carlo error): exact agreement."""
    cells, y, X, dcol, cluster = small
    out = cross_check(cells, seed=1, draws=999, weights="rademacher")
    assert out["wild"]["enumerated"] and out["wild"]["draws"] == 256
    V, enumerated = bootstrap_weights("rademacher", 8, 999, 1)
    p_row, _ = row_level_wild(y, X, dcol, cluster, V)
    assert out["p_wild"] == p_row
    # and at another null value, inside the interval's range
    lo, hi = out["ci_wild_95"]
    mid = 0.5 * (out["estimate"] + hi)
    p_mid_row, _ = row_level_wild(y, X, dcol, cluster, V, beta0=mid)
    assert 0.05 <= p_mid_row  # inside the 95% interval the row-level test does not reject


def test_wild_same_draws_agree_to_rounding(small):
    """Webb weights, the same 999 random vectors in both: identical t* up to rounding."""
    cells, y, X, dcol, cluster = small
    from bayesdid.crosscheck import _design, _errors, _fit, _Wild

    V, enumerated = bootstrap_weights("webb", 8, 999, 3)
    assert not enumerated  # 6^8 > 999
    des = _design(cells)
    f = _fit(des, des.treat_vector(cells.start))
    err = _errors(des, f)
    wild = _Wild(des, f, V, err["se_cr1"], err["factor_cr1"])
    for beta0 in (0.0, f.beta + 1.5 * err["se_cr1"]):
        t, ts = wild.tstar(beta0)
        p_row, ts_row = row_level_wild(y, X, dcol, cluster, V, beta0=beta0)
        np.testing.assert_allclose(ts, ts_row, rtol=1e-7, atol=1e-9)
        assert wild.pvalue(beta0) == p_row
    assert cross_check(cells, seed=3, draws=999, weights="webb")["p_wild"] == row_level_wild(y, X, dcol, cluster, V)[0]


def test_wild_independent_draws_agree_within_monte_carlo_error(small):
    """Independent random draws (different seeds, B = 1999 each): the two p-values are binomial
    proportions, so their difference has sd sqrt(2 p (1 - p) / B) <= 0.016; allow 4 sd + 1/B."""
    cells, y, X, dcol, cluster = small
    B = 1999
    out = cross_check(cells, seed=101, draws=B, weights="webb")
    V, _ = bootstrap_weights("webb", 8, B, 202)
    p_row, _ = row_level_wild(y, X, dcol, cluster, V)
    p = 0.5 * (out["p_wild"] + p_row)
    bound = 4 * math.sqrt(2 * max(p * (1 - p), 1 / B) / B) + 1 / B
    assert abs(out["p_wild"] - p_row) <= bound


def test_wild_interval_is_test_inversion(small):
    """At the interval's ends the bootstrap p-value crosses 5%."""
    cells, *_ = small
    from bayesdid.crosscheck import _design, _errors, _fit, _Wild

    out = cross_check(cells, seed=9, draws=499, weights="webb")
    lo, hi = out["ci_wild_95"]
    des = _design(cells)
    f = _fit(des, des.treat_vector(cells.start))
    err = _errors(des, f)
    V, _ = bootstrap_weights("webb", 8, 499, 9)
    wild = _Wild(des, f, V, err["se_cr1"], err["factor_cr1"])
    w = hi - lo
    assert wild.pvalue(lo + 1e-4 * w) >= 0.05 and wild.pvalue(hi - 1e-4 * w) >= 0.05
    assert wild.pvalue(lo - 1e-3 * w) < 0.05 and wild.pvalue(hi + 1e-3 * w) < 0.05


# ---- advice, settings and errors -----------------------------------------------------------------
def test_advice_depends_on_the_number_of_treated_clusters():
    starts = {j: 2 for j in range(FEW_TREATED)}
    frame, truth, _ = scenario_rows(J=12, T=4, ddd=False, starts=starts, seed=5)
    many = cross_check(cells_from_rows(frame, truth["starts"], ddd=False), full=False)
    assert many["treated_clusters"] == FEW_TREATED
    assert "usually adequate" in many["advice"] and "unreliable" not in many["advice"]
    frame, truth, _ = scenario_rows(J=12, T=4, ddd=False, starts={0: 2}, seed=5)
    few = cross_check(cells_from_rows(frame, truth["starts"], ddd=False), full=False)
    assert "unreliable" in few["advice"] and "MacKinnon and Webb 2017" in few["advice"]


def test_many_assignments_are_sampled_with_the_real_one_included():
    frame, truth, _ = scenario_rows(J=12, T=4, ddd=False, starts={0: 2, 1: 3}, seed=6)
    cells = cells_from_rows(frame, truth["starts"], ddd=False)
    out = cross_check(cells, seed=4, draws=99, placebos=50)
    perm = out["permutation"]
    assert perm["possible"] == 12 * 11  # different starts: ordered pairs
    assert perm["sampled"] and perm["assignments"] == 50
    assert len(perm["estimates"]) == 49


def test_bad_weights_and_absorbed_treatment_raise_clear_errors():
    frame, truth, _ = scenario_rows(J=5, T=4, ddd=False, seed=2)
    cells = cells_from_rows(frame, truth["starts"], ddd=False)
    with pytest.raises(BayesDidError, match=r"crosscheck.weights: expected one of \['rademacher', 'webb'\]"):
        cross_check(cells, weights="mammen")
    start = cells.start.copy()
    start[cells.adopters] = 0  # treated in every period: absorbed by the jurisdiction effect
    with pytest.raises(BayesDidError, match="absorbed by the fixed effects"):
        cross_check(cells.with_starts(start), full=False)


def test_weight_zero_drops_jurisdiction_periods():
    """Cells with likelihood weight 0 leave the regression, as if their rows were absent
    (source: statsmodels on the remaining rows)."""
    frame, truth, _ = scenario_rows(J=6, T=5, ddd=True, starts={0: 2}, seed=13)
    cells = cells_from_rows(frame, truth["starts"], ddd=True)
    w = np.ones((6, 5))
    drop = int(cells.comparisons[-1])
    w[drop, :] = 0.0  # drop one comparison jurisdiction
    out = cross_check(cells.with_weight(w), full=False)
    last = cells.jurisdictions[drop]
    kept = frame[frame["region"] != last].reset_index(drop=True)
    cells2 = cells_from_rows(kept, truth["starts"], ddd=True)
    X, dcol, cluster = row_design(cells2, kept)
    ref = statsmodels_fits(kept["y"].to_numpy(float), X, cluster)
    assert out["clusters"] == 5
    assert out["estimate"] == pytest.approx(ref["nonrobust"].params[dcol], rel=1e-8)
    assert out["se_cr1"] == pytest.approx(ref["cluster"].bse[dcol], rel=1e-8)


def test_not_applicable_result_keeps_the_keys():
    from bayesdid.crosscheck import cross_check_not_applicable

    out = cross_check_not_applicable("no comparison cells")
    assert ISSUE_KEYS <= set(out) and out["estimate"] is None
    assert out["advice"] == "not applicable: no comparison cells"


def test_collinear_covariate_is_named():
    frame, truth, x = scenario_rows(J=5, T=4, ddd=False, K=1, seed=3)
    # a covariate equal to the period index is absorbed by the period effects
    xp = frame["period"].to_numpy(float)[:, None]
    cells = cells_from_rows(frame, truth["starts"], ddd=False, x=xp - xp.mean(), names=["month_index"])
    with pytest.raises(BayesDidError, match=r"covariates \['month_index'\] are collinear"):
        cross_check(cells, full=False)


def test_malformed_covariate_statistics_are_named():
    frame, truth, x = scenario_rows(J=5, T=4, ddd=False, K=2, seed=3)
    cells = cells_from_rows(frame, truth["starts"], ddd=False, x=x, moment4=False)
    cov = cells.extra["covariates"]
    cov["sxy"] = cov["sxy"][..., :1]
    with pytest.raises(BayesDidError, match=r"\['sxy'\] has shape \(5, 1, 4, 1\); expected \(5, 1, 4, 2\)"):
        cross_check(cells, full=False)
    del cov["sxy"]
    with pytest.raises(BayesDidError, match=r"lacks \['sxy'\]"):
        cross_check(cells, full=False)
