"""Rows that summarise cells (data.summary): the same cells, least squares and draws as the observations.

Outside reference: statsmodels OLS on the observation rows with jurisdiction and period dummies, CR1
by jurisdiction (statsmodels' "cluster" covariance); the pooling formula of means and sds is textbook
algebra (common practice).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.crosscheck import cross_check
from bayesdid.errors import DataRoleError, StudyError

J, T = 6, 5
ADOPTERS = {"Corvel": 3, "Dunmore": 4}
NAMES = ["Corvel", "Dunmore", "Ashgrove", "Brindle", "Elmsby", "Fallow"]


def _rows(rng, *, dyadic=False, ddd=False):
    """Invented observation rows. With ``dyadic`` each cell holds an odd number k = 2h + 1 of values
    m - s (h times), m, m + s (h times) with m and s multiples of 1/8: every sum, mean and sd below is
    exact in binary floating point, so the two input shapes give bit-identical cells."""
    out = []
    for j, name in enumerate(NAMES):
        for g in ("reference", "target") if ddd else ("all",):
            for t in range(1, T + 1):
                effect = 1.5 if name in ADOPTERS and t >= ADOPTERS[name] and g != "reference" else 0.0
                if dyadic:
                    h = int(rng.integers(0, 4))
                    m = np.round((10 + j + 0.5 * t + effect + rng.normal(0, 0.5)) * 8) / 8
                    s = np.round(rng.uniform(0.5, 2.0) * 8) / 8
                    vals = [m - s] * h + [m] + [m + s] * h
                else:
                    k = int(rng.integers(1, 9))
                    vals = 10 + j + 0.5 * t + effect + rng.normal(0, 1.0, size=k)
                out += [(name, g, t, float(v)) for v in vals]
    f = pd.DataFrame(out, columns=["region", "group", "quarter", "y"])
    return f if ddd else f.drop(columns="group")


def _summary(rows, *, spread="sd", split=False):
    keys = [c for c in ("region", "group", "quarter") if c in rows.columns]
    if split:  # two summary rows per cell where possible: pooled exactly
        rows = rows.assign(half=np.arange(len(rows)) % 2)
        keys = keys + ["half"]

    def two_pass_sd(v):  # the textbook two-pass sd, exact on the dyadic data
        v = v.to_numpy()
        return np.sqrt(((v - v.sum() / len(v)) ** 2).sum() / (len(v) - 1)) if len(v) > 1 else np.nan

    agg = rows.groupby(keys, sort=False)["y"].agg(["mean", "count", two_pass_sd]).reset_index()
    agg = agg.rename(columns={"mean": "y", "count": "n", "two_pass_sd": "sd"})
    agg.loc[agg["n"] == 1, "sd"] = np.nan
    if spread == "se":
        agg["se"] = agg["sd"] / np.sqrt(agg["n"])
        agg = agg.drop(columns="sd")
    return agg.drop(columns="half", errors="ignore")


def _study(tmp_path, frame, name, **kw):
    p = tmp_path / f"{name}.csv"
    frame.to_csv(p, index=False)
    ddd = "group" in frame.columns
    return make_study(
        table=p,
        outcome="y",
        jurisdiction="region",
        period="quarter",
        adopters=ADOPTERS,
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        **kw,
    )


@pytest.mark.parametrize("spread,split,ddd", [("sd", False, False), ("se", False, True), ("sd", True, True)])
def test_summary_rows_give_the_cells_of_the_observations(tmp_path, rng, spread, split, ddd):
    rows = _rows(rng, ddd=ddd)
    agg = _summary(rows, spread=spread, split=split)
    by_rows = collapse(_study(tmp_path, rows, "rows"), rows)
    by_cells = collapse(_study(tmp_path, agg, "cells", summary="mean", count="n", **{spread: spread}), agg)
    assert by_cells.rows == by_rows.rows == len(rows)
    np.testing.assert_array_equal(by_cells.n, by_rows.n)
    np.testing.assert_allclose(by_cells.sum_y, by_rows.sum_y, rtol=1e-13)
    np.testing.assert_allclose(by_cells.sum_y2, by_rows.sum_y2, rtol=1e-12)
    np.testing.assert_allclose(by_cells.ss, by_rows.ss, rtol=1e-9, atol=1e-10)
    assert by_cells.outcome_sd == pytest.approx(by_rows.outcome_sd, rel=1e-12)
    ls_r, ls_c = (cross_check(c, full=False) for c in (by_rows, by_cells))
    for key in ("estimate", "se_classical", "se_hc1", "se_cr1"):
        assert ls_c[key] == pytest.approx(ls_r[key], rel=1e-9), key


def test_summary_least_squares_equals_statsmodels_on_the_observations(tmp_path, rng):
    import statsmodels.formula.api as smf

    rows = _rows(rng)
    agg = _summary(rows)
    cells = collapse(_study(tmp_path, agg, "cells", summary="mean", count="n", sd="sd"), agg)
    ls = cross_check(cells, full=False)
    rows = rows.assign(treated=[float(r in ADOPTERS and q >= ADOPTERS[r]) for r, q in zip(rows.region, rows.quarter)])
    ref = smf.ols("y ~ treated + C(region) + C(quarter)", data=rows).fit(
        cov_type="cluster", cov_kwds={"groups": pd.factorize(rows["region"])[0]}
    )
    assert ls["estimate"] == pytest.approx(ref.params["treated"], rel=1e-9)
    assert ls["se_cr1"] == pytest.approx(ref.bse["treated"], rel=1e-8)


def test_dyadic_cells_are_bit_identical(tmp_path, rng):
    rows = _rows(rng, dyadic=True, ddd=True)
    agg = _summary(rows)
    a = collapse(_study(tmp_path, rows, "rows"), rows)
    b = collapse(_study(tmp_path, agg, "cells", summary="mean", count="n", sd="sd"), agg)
    for name in ("n", "sum_y", "sum_y2", "ss"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert (a.outcome_mean, a.outcome_sd) == (b.outcome_mean, b.outcome_sd)


@pytest.mark.slow
def test_same_seed_same_draws_from_either_shape(tmp_path):
    from bayesdid.model.terms import resolve_scales
    from bayesdid.sample import fit_cells
    from bayesdid.study import SamplerSettings

    rows = _rows(np.random.default_rng(7), dyadic=True)
    agg = _summary(rows)
    a = collapse(_study(tmp_path, rows, "rows"), rows)
    b = collapse(_study(tmp_path, agg, "cells", summary="mean", count="n", sd="sd"), agg)
    settings = SamplerSettings(chains=2, draws=100, tune=100, seed=31)
    fits = []
    for cells in (a, b):
        scales = {
            k: v["scale"]
            for k, v in resolve_scales(
                cells,
                make_study(
                    table="x.csv", outcome="y", jurisdiction="region", period="quarter", adopters=ADOPTERS
                ).priors,
            ).items()
        }
        fits.append(fit_cells(cells, scales, settings))
    for name in ("tau_adopter", "sigma", "sigma_gap"):
        np.testing.assert_array_equal(fits[0].draws(name), fits[1].draws(name), err_msg=name)


def _binomial_rows(rng):
    out = []
    for j, name in enumerate(NAMES):
        for t in range(1, T + 1):
            k = int(rng.integers(20, 60))
            p = 0.2 + 0.02 * j + (0.1 if name in ADOPTERS and t >= ADOPTERS[name] else 0.0)
            out.append((name, t, int(rng.binomial(k, p)), k))
    return pd.DataFrame(out, columns=["region", "quarter", "cases", "people"])


def test_proportion_converts_exactly_to_successes(tmp_path, rng):
    counts = _binomial_rows(rng)
    share = counts.assign(y=counts["cases"] / counts["people"]).drop(columns="cases")
    p1, p2 = tmp_path / "counts.csv", tmp_path / "share.csv"
    counts.to_csv(p1, index=False)
    share.to_csv(p2, index=False)
    base = dict(jurisdiction="region", period="quarter", adopters=ADOPTERS, family="binomial")
    a = collapse(make_study(table=p1, outcome="cases", trials="people", **base), counts)
    b = collapse(make_study(table=p2, outcome="y", summary="proportion", count="people", **base), pd.read_csv(p2))
    np.testing.assert_array_equal(a.n, b.n)
    np.testing.assert_array_equal(a.sum_y, b.sum_y)
    for k in ("cell", "y", "size"):
        np.testing.assert_array_equal(a.extra["records"][k], b.extra["records"][k])


def test_rate_converts_exactly_to_events(tmp_path, rng):
    counts = _binomial_rows(rng).rename(columns={"people": "years"})
    counts["years"] = counts["years"] * 0.5
    rate = counts.assign(y=counts["cases"] / counts["years"]).drop(columns="cases")
    p = tmp_path / "rate.csv"
    rate.to_csv(p, index=False)
    base = dict(table=p, jurisdiction="region", period="quarter", adopters=ADOPTERS, family="poisson", exposure="years")
    a = collapse(make_study(outcome="cases", **base), counts)
    b = collapse(make_study(outcome="y", summary="rate", **base), pd.read_csv(p))
    np.testing.assert_array_equal(a.sum_y, b.sum_y)
    np.testing.assert_array_equal(a.n, b.n)


# ---- bad input: each names the column and what to do ----------------------------------------------
def _bad(tmp_path, rng, edit, match, **kw):
    agg = _summary(_rows(rng))
    agg = edit(agg)
    with pytest.raises(DataRoleError, match=match):
        collapse(_study(tmp_path, agg, "bad", summary="mean", count="n", sd="sd", **kw), agg)


def test_count_below_one(tmp_path, rng):
    _bad(
        tmp_path,
        rng,
        lambda a: a.assign(n=a["n"].where(a.index != 3, 0)),
        r"count column 'n' must hold whole numbers of at least 1 \(observations per row\); "
        r"1 row\(s\) \(table lines 5\)",
    )


def test_missing_sd_where_count_above_one(tmp_path, rng):
    def edit(a):
        i = int(np.flatnonzero(a["n"] > 1)[0])
        a.loc[i, "sd"] = np.nan
        return a

    _bad(tmp_path, rng, edit, r"sd column 'sd' is empty in 1 row\(s\).*count \('n'\) exceeds 1")


def test_sd_given_where_count_is_one(tmp_path, rng):
    def edit(a):
        a.loc[0, ["n", "sd"]] = [1, 0.7]
        return a

    _bad(tmp_path, rng, edit, r"sd column 'sd' holds a value in 1 row\(s\) \(table lines 2\) whose count \('n'\) is 1")


def test_observation_rows_mixed_into_summary_rows(tmp_path, rng):
    def edit(a):
        extra = pd.DataFrame(
            {"region": ["Ashgrove"] * 2, "quarter": [1, 2], "y": [11.0, 12.0], "n": [np.nan] * 2, "sd": [np.nan] * 2}
        )
        return pd.concat([a, extra], ignore_index=True)

    _bad(tmp_path, rng, edit, r"look like observation-level rows mixed into a table of cell summaries")


def test_study_keys_of_summaries_refused_clearly(tmp_path):
    base = dict(table="x.csv", outcome="y", jurisdiction="region", period="quarter", adopters=ADOPTERS)
    with pytest.raises(StudyError, match="exactly one of 'data.sd'"):
        make_study(summary="mean", count="n", **base)
    with pytest.raises(StudyError, match="data.sd"):
        make_study(sd="s", **base)
    with pytest.raises(StudyError, match="model.family"):
        make_study(summary="proportion", count="n", **base)
    with pytest.raises(StudyError, match="model.log_outcome"):
        make_study(summary="mean", count="n", sd="s", log_outcome=True, **base)
    with pytest.raises(StudyError, match="data.summary"):
        make_study(summary="median", **base)


def test_proportion_not_whole_is_refused(tmp_path, rng):
    counts = _binomial_rows(rng)
    share = counts.assign(y=np.round(counts["cases"] / counts["people"], 2)).drop(columns="cases")
    share.loc[0, ["y", "people"]] = [0.33, 37]
    p = tmp_path / "share.csv"
    share.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="y",
        summary="proportion",
        count="people",
        jurisdiction="region",
        period="quarter",
        adopters=ADOPTERS,
        family="binomial",
    )
    with pytest.raises(DataRoleError, match=r"outcome column 'y' times 'people' is not a whole number of successes"):
        collapse(st, share)
