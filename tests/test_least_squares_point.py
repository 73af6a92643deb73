"""Cell-based least squares equals row-level OLS (statsmodels) and the triple difference of means."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.crosscheck import least_squares_estimate
from bayesdid.simulate import Scenario, simulate


def _cells(tmp_path, frame, truth, ddd=True):
    p = tmp_path / "t.csv"
    frame.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
    )
    return collapse(st, frame)


def _treat(frame, truth, ddd):
    start = frame["region"].map(truth["starts"]).fillna(10**9)
    d = frame["period"] >= start
    if ddd:
        d &= frame["group"] == "target"
    return d.astype(float)


@pytest.mark.parametrize("ddd,starts", [(True, {0: 3, 1: 4}), (False, {0: 3}), (True, {0: 2})])
def test_cells_equal_statsmodels_rows(tmp_path, ddd, starts):
    """Reference: statsmodels OLS on the rows with the same dummies (to 1e-8 relative)."""
    sc = Scenario(jurisdictions=8, periods=5, groups=2 if ddd else 1, starts=starts, rows_per_cell=6)
    frame, truth = simulate(sc, 7)
    cells = _cells(tmp_path, frame, truth, ddd)
    f = frame.assign(D=_treat(frame, truth, ddd))
    if ddd:
        formula = "y ~ C(region):C(group) + C(region):C(period) + C(group):C(period) + D - 1"
    else:
        formula = "y ~ C(region) + C(period) + D"
    ref = smf.ols(formula, data=f).fit().params["D"]
    assert least_squares_estimate(cells)["estimate"] == pytest.approx(ref, rel=1e-8)


def test_saturated_2x2x2_equals_triple_difference_of_means(tmp_path):
    """Textbook identity (common practice): with two jurisdictions, two groups and two periods the
    DDD coefficient is the triple difference of the eight cell means."""
    rng = np.random.default_rng(3)
    rows = []
    for j in ("Adopt", "Other"):
        for g in ("target", "reference"):
            for t in (1, 2):
                for _ in range(rng.integers(5, 15)):
                    rows.append((j, g, t, rng.normal()))
    frame = pd.DataFrame(rows, columns=["region", "group", "period", "y"])
    cells = _cells(tmp_path, frame, {"starts": {"Adopt": 2}})
    mu = frame.groupby(["region", "group", "period"])["y"].mean()
    dd = lambda j: (mu[j, "target", 2] - mu[j, "target", 1]) - (mu[j, "reference", 2] - mu[j, "reference", 1])
    assert least_squares_estimate(cells)["estimate"] == pytest.approx(dd("Adopt") - dd("Other"), rel=1e-10)
