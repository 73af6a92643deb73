"""The exact collapse: the cell likelihood equals the row-level likelihood (scipy.stats reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.model.gaussian import NP, cell_arrays, jt_loglik


def _frame(rng, J=5, T=4, ddd=True, empty=()):
    rows = []
    for j in range(J):
        for g in ["reference", "target"] if ddd else ["all"]:
            for t in range(T):
                if (j, g, t) in empty:
                    continue
                for _ in range(rng.integers(1, 6)):
                    rows.append((f"R{j}", g, t + 1, rng.normal(2.0, 1.0)))
    f = pd.DataFrame(rows, columns=["region", "group", "period", "y"])
    return f if ddd else f.drop(columns="group")


def _study(tmp_path, f, ddd=True):
    p = tmp_path / "t.csv"
    f.to_csv(p, index=False)
    return make_study(
        table=p,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters={"R0": 3},
    )


def _row_level(f, cells, m, sigma, s_shock, s_gap, ddd):
    """Rows of each jurisdiction-period are jointly normal: y = m_c + s + e*1[target] + eps.
    Reference: scipy.stats.multivariate_normal on the rows (no collapse)."""
    total = 0.0
    jidx = {k: i for i, k in enumerate(cells.jurisdictions)}
    gidx = {k: i for i, k in enumerate(cells.groups)}
    for (jl, t), block in f.groupby(["region", "period"]):
        j = jidx[jl]
        g = block["group"].map(gidx).to_numpy() if ddd else np.zeros(len(block), int)
        tt = t - 1
        mean = m[j, g, tt]
        tgt = (g == cells.target).astype(float)
        cov = np.diag(sigma[g] ** 2) + s_shock**2 + s_gap**2 * np.outer(tgt, tgt)
        total += stats.multivariate_normal(mean, cov).logpdf(block["y"].to_numpy())
    return total


@pytest.mark.parametrize("ddd", [True, False])
def test_collapsed_gaussian_loglik_equals_rows(tmp_path, rng, ddd):
    empty = {(1, "target", 2), (2, "reference", 0), (3, "reference", 1), (3, "target", 1)} if ddd else {(1, "all", 2)}
    f = _frame(rng, ddd=ddd, empty=empty)
    cells = collapse(_study(tmp_path, f, ddd), f)
    arr = cell_arrays(cells)
    J, G, T = cells.shape
    for _ in range(5):  # random parameter values
        m = rng.normal(2.0, 0.5, size=(J, G, T))
        sigma = rng.uniform(0.5, 1.5, size=G)
        s_shock = rng.uniform(0.05, 0.5) if ddd else 0.0
        s_gap = rng.uniform(0.05, 0.5)
        r = cells.reference if ddd else None
        ll = jt_loglik(
            arr,
            m_r=m[:, r] if ddd else 0.0,
            m_q=m[:, cells.target],
            sigma_r=sigma[r] if ddd else 1.0,
            sigma_q=sigma[cells.target],
            sigma_shock=s_shock,
            sigma_gap=s_gap,
            xp=NP,
        ).sum()
        ref = _row_level(f, cells, m, sigma, s_shock, s_gap, ddd)
        assert ll == pytest.approx(ref, rel=1e-8)


def test_collapse_statistics_match_groupby(tmp_path, rng):
    """n, sum y, sum y^2 per cell equal a pandas groupby of the rows."""
    f = _frame(rng)
    cells = collapse(_study(tmp_path, f), f)
    g = f.groupby(["region", "group", "period"])["y"].agg(["size", "sum", lambda v: (v**2).sum()])
    for (jl, gl, t), row in g.iterrows():
        j, gi = cells.jurisdictions.index(jl), cells.groups.index(gl)
        assert cells.n[j, gi, t - 1] == row["size"]
        assert cells.sum_y[j, gi, t - 1] == pytest.approx(row["sum"], rel=1e-12)
        assert cells.sum_y2[j, gi, t - 1] == pytest.approx(row["<lambda_0>"], rel=1e-12)
    assert cells.rows == len(f)
    # within-cell sum of squares is stable for large means (two-pass): shift the outcome by 1e6
    f2 = f.assign(y=f["y"] + 1e6)
    c2 = collapse(_study(tmp_path, f2), f2)
    np.testing.assert_allclose(c2.ss, cells.ss, rtol=1e-6, atol=1e-6)
