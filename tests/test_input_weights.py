"""Sampling weights (data.weight): Hajek cell means, Kish effective sizes, weighted ATT weights, and the
least-squares cross-check against statsmodels WLS on the rows (CR1 by jurisdiction, statsmodels'
"cluster" covariance with its default small-sample correction)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.crosscheck import cross_check
from bayesdid.effects import att_weights
from bayesdid.errors import DataRoleError, StudyError

ADOPTERS = {"Corvel": 3, "Dunmore": 4}
NAMES = ["Corvel", "Dunmore", "Ashgrove", "Brindle", "Elmsby", "Fallow", "Gorsey"]


def _rows(rng, *, ddd, T=5):
    out = []
    for j, name in enumerate(NAMES):
        for g in ("reference", "target") if ddd else ("all",):
            for t in range(1, T + 1):
                k = int(rng.integers(2, 12))
                effect = 1.0 if name in ADOPTERS and t >= ADOPTERS[name] and g != "reference" else 0.0
                y = 5 + 0.3 * j + 0.2 * t + (0.5 if g == "target" else 0) + effect + rng.normal(0, 1, k)
                w = rng.uniform(0.2, 5.0, k)
                out += [(name, g, t, float(a), float(b)) for a, b in zip(y, w)]
    f = pd.DataFrame(out, columns=["region", "group", "quarter", "y", "w"])
    return f if ddd else f.drop(columns="group")


def _study(tmp_path, f, **kw):
    p = tmp_path / "w.csv"
    f.to_csv(p, index=False)
    ddd = "group" in f.columns
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


def _dummies(f, ddd):
    """Row-level saturated design with explicit, full-rank dummies (first levels dropped)."""
    d = pd.DataFrame(index=f.index)
    treated = np.array([r in ADOPTERS and q >= ADOPTERS[r] for r, q in zip(f.region, f.quarter)])
    if ddd:
        tgt = (f["group"] == "target").to_numpy()
        d["treated"] = (treated & tgt).astype(float)
        jg = f["region"] + ":" + f["group"]
        jt = f["region"] + ":" + f["quarter"].astype(str)
        parts = [
            pd.get_dummies(jg, drop_first=False, dtype=float),
            pd.get_dummies(jt, drop_first=False, dtype=float).drop(columns=[f"{r}:1" for r in NAMES]),
            pd.get_dummies(f["quarter"].where(tgt, 0), prefix="tq", dtype=float)
            .drop(columns="tq_0")
            .drop(columns="tq_1"),
        ]
    else:
        d["treated"] = treated.astype(float)
        parts = [
            pd.get_dummies(f["region"], dtype=float),
            pd.get_dummies(f["quarter"], prefix="q", drop_first=True, dtype=float),
        ]
    return pd.concat([d] + parts, axis=1)


@pytest.mark.parametrize("ddd", [False, True])
def test_weighted_least_squares_equals_statsmodels_wls(tmp_path, rng, ddd):
    f = _rows(rng, ddd=ddd)
    cells = collapse(_study(tmp_path, f, weight="w"), f)
    ls = cross_check(cells, full=False)
    X = _dummies(f, ddd)
    assert np.linalg.matrix_rank(X.to_numpy()) == X.shape[1]
    ref = sm.WLS(f["y"], X, weights=f["w"]).fit(cov_type="cluster", cov_kwds={"groups": pd.factorize(f["region"])[0]})
    classical = sm.WLS(f["y"], X, weights=f["w"]).fit()
    assert ls["estimate"] == pytest.approx(ref.params["treated"], rel=1e-8, abs=1e-10)
    assert ls["se_cr1"] == pytest.approx(ref.bse["treated"], rel=1e-8)
    assert ls["se_classical"] == pytest.approx(classical.bse["treated"], rel=1e-8)
    hc1 = sm.WLS(f["y"], X, weights=f["w"]).fit(cov_type="HC1")
    assert ls["se_hc1"] == pytest.approx(hc1.bse["treated"], rel=1e-8)
    # weights matter: the unweighted estimate differs
    plain = cross_check(collapse(_study(tmp_path, f.drop(columns="w")), f.drop(columns="w")), full=False)
    assert abs(plain["estimate"] - ls["estimate"]) > 1e-4


def test_hajek_means_kish_sizes_and_att_weights(tmp_path, rng):
    f = _rows(rng, ddd=False)
    cells = collapse(_study(tmp_path, f, weight="w"), f)
    c = f.groupby(["region", "quarter"])
    sw = c["w"].sum()
    hajek = (f["w"] * f["y"]).groupby([f.region, f.quarter]).sum() / sw
    kish = sw**2 / (f["w"] ** 2).groupby([f.region, f.quarter]).sum()
    j = cells.jurisdictions.index("Brindle")
    np.testing.assert_allclose(cells.mean[j, 0], hajek.loc["Brindle"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(cells.n[j, 0], kish.loc["Brindle"].to_numpy(), rtol=1e-12)
    assert cells.rows == len(f)
    # ATT weights: summed weights of each adopter's treated cells
    tw = [f.loc[(f.region == a) & (f.quarter >= s), "w"].sum() for a, s in ADOPTERS.items()]
    order = [cells.jurisdictions[k] for k in cells.adopters]
    expect = np.array([tw[list(ADOPTERS).index(a)] for a in order])
    np.testing.assert_allclose(att_weights(cells), expect / expect.sum(), rtol=1e-12)


def test_equal_weights_give_the_unweighted_cell_means(tmp_path, rng):
    f = _rows(rng, ddd=True).assign(w=2.5)
    a = collapse(_study(tmp_path, f, weight="w"), f)
    b = collapse(_study(tmp_path, f.drop(columns="w")), f.drop(columns="w"))
    np.testing.assert_allclose(a.n, b.n, rtol=1e-12)
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-12)
    np.testing.assert_allclose(a.ss, b.ss, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("value,match", [(-1.0, "positive, finite"), (0.0, "positive, finite"), (np.nan, "missing")])
def test_bad_weights_named(tmp_path, rng, value, match):
    f = _rows(rng, ddd=False)
    f.loc[4, "w"] = value
    with pytest.raises(DataRoleError, match=r"weight column 'w' .*table lines 6") as err:
        collapse(_study(tmp_path, f, weight="w"), f)
    assert match in str(err.value)


def test_weights_refused_where_not_supported(tmp_path):
    base = dict(table="x.csv", outcome="y", jurisdiction="region", period="quarter", adopters=ADOPTERS, weight="w")
    with pytest.raises(StudyError, match="family 'gaussian' only"):
        make_study(family="poisson", exposure="t", **base)
    with pytest.raises(StudyError, match="model.covariates"):
        make_study(covariates="age", **base)


def test_weights_recover_the_population_att_of_the_bench_survey():
    """The invented informative-weights survey of ``bench weights``: over 20 data sets the weighted
    least-squares estimate centres on the population ATT (within 3 Monte Carlo standard errors), the
    unweighted one on the sampled mix (expected 0.15 above it: 0.8 vs 0.5 share of stratum B times the
    extra effect 0.5)."""
    from bayesdid.bench.weights import weighted_rows

    ew, eu = [], []
    for s in range(20):
        f, starts, truth = weighted_rows(s, rows_per_cell=100)
        for kind, store in (("w", ew), (None, eu)):
            st = make_study(
                table="x.csv", outcome="y", jurisdiction="region", period="period", adopters=starts, weight=kind
            )
            store.append(cross_check(collapse(st, f if kind else f.drop(columns="w")), full=False)["estimate"] - truth)
    mcse = np.std(ew, ddof=1) / np.sqrt(len(ew))
    assert abs(np.mean(ew)) < 3 * mcse
    diff = np.array(eu) - np.array(ew)
    assert np.mean(diff) == pytest.approx(0.15, abs=3 * np.std(diff, ddof=1) / np.sqrt(len(diff)) + 0.02)


def test_the_att_has_one_weight_rule_for_the_headline_the_run_folder_and_the_checks(tmp_path, rng):
    # The headline (effects.compute_effects), the run folder's posterior `att` (an xarray sum over
    # adopters) and the checks (checks.base.effect_weights: the placebo-in-space real effect, the
    # comparison check's refits) take one rule. Before it was one, the checks counted Kish sizes
    # where the headline counted summed sampling weights, so the two ATTs differed on weighted data.
    from types import SimpleNamespace

    import xarray as xr

    from bayesdid.checks.base import effect_weights
    from bayesdid.effects import att_draws, compute_effects

    f = _rows(rng, ddd=True)
    cells = collapse(_study(tmp_path, f, weight="w"), f)
    tgt = f["group"] == "target"
    tw = {a: f.loc[(f.region == a) & (f.quarter >= s) & tgt, "w"].sum() for a, s in ADOPTERS.items()}
    expect = np.array([tw[cells.jurisdictions[k]] for k in cells.adopters])
    np.testing.assert_allclose(effect_weights(cells), expect / expect.sum(), rtol=1e-12)
    np.testing.assert_allclose(att_weights(cells), effect_weights(cells), rtol=0, atol=0)
    kish = (cells.n * cells.treated).sum(axis=(1, 2))[cells.adopters]  # the checks' old rule
    assert not np.allclose(effect_weights(cells), kish / kish.sum(), rtol=1e-3)

    tau = rng.normal(-0.3, 0.1, size=(2, 250, len(cells.adopters)))  # (chain, draw, adopter)
    post = xr.DataArray(tau, dims=("chain", "draw", "adopter"), coords={"adopter": ["a0", "a1"]})
    fit = SimpleNamespace(cells=cells, draws=lambda name: tau.reshape(-1, tau.shape[-1]), spec=None)
    headline = compute_effects(fit).effect.draws
    in_folder = att_draws(post, cells).values.reshape(-1)
    in_checks = tau.reshape(-1, tau.shape[-1]) @ effect_weights(cells)
    np.testing.assert_allclose(headline, in_folder, rtol=1e-13)
    np.testing.assert_allclose(headline, in_checks, rtol=1e-13)

    # cells left out of the likelihood (a check's or a sweep's weight 0) do not count
    j = cells.jurisdictions.index("Dunmore")
    w = cells.jt_weight().copy()
    w[j, :] = 0.0
    dropped = cells.with_weight(w)
    order = [cells.jurisdictions[k] for k in cells.adopters]
    np.testing.assert_array_equal(att_weights(dropped), [float(a != "Dunmore") for a in order])
