"""Panels (data.unit): unit fixed effects by centring, against statsmodels OLS with unit dummies (CR1 by
jurisdiction, statsmodels' "cluster" covariance with its default small-sample correction), and the
refusals of units that move or panels that are unbalanced."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.crosscheck import cross_check
from bayesdid.errors import DataRoleError, StudyError

ADOPTERS = {"Corvel": 3, "Dunmore": 4}
NAMES = ["Corvel", "Dunmore", "Ashgrove", "Brindle", "Elmsby", "Fallow", "Gorsey"]
T = 5


def panel(rng, *, ddd, unit_sd=3.0):
    """Invented balanced panel: each unit of a jurisdiction(-group) in every period, with a large unit effect."""
    out = []
    for j, name in enumerate(NAMES):
        for g in ("reference", "target") if ddd else ("all",):
            for k in range(int(rng.integers(2, 6))):
                uid = f"{name[:3]}-{g[0]}{k}"
                a = rng.normal(0, unit_sd)
                for t in range(1, T + 1):
                    eff = 1.0 if name in ADOPTERS and t >= ADOPTERS[name] and g != "reference" else 0.0
                    y = 4 + 0.3 * j + 0.2 * t + a + eff + rng.normal(0, 1)
                    out.append((uid, name, g, t, y))
    f = pd.DataFrame(out, columns=["person", "region", "group", "quarter", "y"])
    return f if ddd else f.drop(columns="group")


def _study(tmp_path, f, **kw):
    p = tmp_path / "p.csv"
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


def _design(f, ddd):
    """Row-level design: treatment, unit dummies, and the saturated fixed effects that units do not absorb."""
    treated = np.array([r in ADOPTERS and q >= ADOPTERS[r] for r, q in zip(f.region, f.quarter)])
    parts = [pd.DataFrame({"treated": treated.astype(float)}, index=f.index), pd.get_dummies(f["person"], dtype=float)]
    if ddd:
        tgt = (f["group"] == "target").to_numpy()
        parts[0]["treated"] = (treated & tgt).astype(float)
        jt = f["region"] + ":" + f["quarter"].astype(str)
        parts.append(pd.get_dummies(jt, dtype=float).drop(columns=[f"{r}:1" for r in NAMES]))
        parts.append(
            pd.get_dummies(f["quarter"].where(tgt, 0), prefix="tq", dtype=float).drop(columns=["tq_0", "tq_1"])
        )
    else:
        parts.append(pd.get_dummies(f["quarter"], prefix="q", drop_first=True, dtype=float))
    return pd.concat(parts, axis=1)


@pytest.mark.parametrize("ddd", [False, True])
def test_unit_fixed_effects_equal_ols_with_unit_dummies(tmp_path, rng, ddd):
    f = panel(rng, ddd=ddd)
    cells = collapse(_study(tmp_path, f, unit="person"), f)
    ls = cross_check(cells, full=False)
    X = _design(f, ddd)
    assert np.linalg.matrix_rank(X.to_numpy()) == X.shape[1]
    groups = pd.factorize(f["region"])[0]
    ref = sm.OLS(f["y"], X).fit(cov_type="cluster", cov_kwds={"groups": groups})
    plain = sm.OLS(f["y"], X).fit()
    assert ls["estimate"] == pytest.approx(ref.params["treated"], rel=1e-8)
    assert ls["se_cr1"] == pytest.approx(ref.bse["treated"], rel=1e-8)
    assert ls["se_classical"] == pytest.approx(plain.bse["treated"], rel=1e-8)
    hc1 = sm.OLS(f["y"], X).fit(cov_type="HC1")
    assert ls["se_hc1"] == pytest.approx(hc1.bse["treated"], rel=1e-8)
    # balanced: the same estimate as the pooled regression, but smaller errors when units differ a lot
    pooled = cross_check(collapse(_study(tmp_path, f), f), full=False)
    assert pooled["estimate"] == pytest.approx(ls["estimate"], rel=1e-9)
    assert ls["se_classical"] < 0.6 * pooled["se_classical"]


def test_centred_cells_scale_within_spread(tmp_path, rng):
    f = panel(rng, ddd=False)
    cells = collapse(_study(tmp_path, f, unit="person"), f)
    p = cells.extra["panel"]
    assert p["units"] == f["person"].nunique()
    np.testing.assert_allclose(cells.ss, p["ss_ls"] * T / (T - 1), rtol=1e-12)
    assert cells.outcome_mean == 0.0
    # cell means differ from the raw ones by a constant per jurisdiction (absorbed by the baselines)
    raw = collapse(_study(tmp_path, f), f)
    diff = cells.mean[:, 0, :] - raw.mean[:, 0, :]
    np.testing.assert_allclose(diff - diff[:, :1], 0.0, atol=1e-12)
    assert cells.outcome_sd == pytest.approx(raw.outcome_sd, rel=1e-12)


def test_unit_in_two_jurisdictions_refused(tmp_path, rng):
    f = panel(rng, ddd=False)
    moved = f["person"] == f["person"].iloc[0]
    f.loc[moved & (f["quarter"] == 4), "region"] = "Fallow"
    with pytest.raises(
        DataRoleError,
        match=r"1 unit\(s\) of column 'person' appear in more than one jurisdiction "
        r"\(column 'region'\), e.g. 'Cor-a0': Corvel, Fallow",
    ):
        collapse(_study(tmp_path, f, unit="person"), f)


def test_unbalanced_panel_refused(tmp_path, rng):
    f = panel(rng, ddd=True)
    f = f.drop(index=[7])
    with pytest.raises(DataRoleError, match=r"1 unit\(s\) of column 'person' are not observed in every period"):
        collapse(_study(tmp_path, f, unit="person"), f)


def test_two_rows_of_a_unit_in_one_period_refused(tmp_path, rng):
    f = panel(rng, ddd=False)
    f = pd.concat([f, f.iloc[[3]]], ignore_index=True)
    with pytest.raises(DataRoleError, match=r"more than one row in a period"):
        collapse(_study(tmp_path, f, unit="person"), f)


def test_unit_refused_where_not_supported():
    base = dict(table="x.csv", outcome="y", jurisdiction="region", period="quarter", adopters=ADOPTERS, unit="person")
    with pytest.raises(StudyError, match="family 'gaussian' only"):
        make_study(family="poisson", exposure="t", **base)
    with pytest.raises(StudyError, match="model.covariates"):
        make_study(covariates="age", **base)


def test_scaled_within_spread_estimates_the_error_sd():
    """On the invented panel of ``bench panel`` (residual sd 1, unit sd 2, 8 periods) the pooled within-cell
    spread of the centred outcome, scaled by T/(T-1), estimates the residual sd 1; unscaled it would sit at
    sqrt(7/8) = 0.935. Tolerance: 4 standard errors of a pooled sd on about 2,600 degrees of freedom
    (1/sqrt(2 df) = 0.014)."""
    from bayesdid.bench.panel import panel_rows

    frame, starts, _ = panel_rows(11)
    st = make_study(table="x.csv", outcome="y", jurisdiction="region", period="period", adopters=starts, unit="person")
    cells = collapse(st, frame)
    df = float(np.maximum(cells.n - 1, 0).sum())
    assert np.sqrt(cells.ss.sum() / df) == pytest.approx(1.0, abs=4 / np.sqrt(2 * df))
    raw = collapse(
        make_study(table="x.csv", outcome="y", jurisdiction="region", period="period", adopters=starts), frame
    )
    assert np.sqrt(raw.ss.sum() / df) > 2.0  # the unit effects (sd 2) sit in the pooled spread
