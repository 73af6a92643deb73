"""Issue 3 x issue 5: the cross-check on cells collapsed with covariates equals statsmodels OLS on the
rows with the same dummies and covariates (to 1e-8 relative)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.formula.api as smf

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.crosscheck import cross_check
from bayesdid.simulate import Scenario, simulate


def test_collapsed_covariates_match_statsmodels(tmp_path):
    sc = Scenario(jurisdictions=8, periods=5, groups=2, starts={0: 3}, rows_per_cell=8)
    frame, truth = simulate(sc, 4)
    rng = np.random.default_rng(8)
    frame["age"] = rng.normal(50, 10, len(frame))
    frame["risk"] = rng.gamma(2.0, 1.0, len(frame))
    frame["y"] = frame["y"] + 0.02 * frame["age"] - 0.3 * frame["risk"]
    p = tmp_path / "t.csv"
    frame.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        covariates="age + risk",
    )
    cells = collapse(st, frame)
    cc = cross_check(cells, seed=1, full=False)
    start = frame["region"].map(truth["starts"]).fillna(10**9)
    f = frame.assign(D=((frame["period"] >= start) & (frame["group"] == "target")).astype(float))
    formula = "y ~ C(region):C(group) + C(region):C(period) + C(group):C(period) + D + age + risk - 1"
    ref = smf.ols(formula, data=f).fit()
    assert cc["estimate"] == pytest.approx(ref.params["D"], rel=1e-8)
    assert cc["se_classical"] == pytest.approx(ref.bse["D"], rel=1e-8)
    cl = smf.ols(formula, data=f).fit(cov_type="cluster", cov_kwds={"groups": f["region"].astype("category").cat.codes})
    assert cc["se_cr1"] == pytest.approx(cl.bse["D"], rel=1e-8)
