"""Posterior of the Gaussian DDD / DiD against outside references and known truths."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from conftest import sim_study

from bayesdid import analyse, make_study
from bayesdid.effects import percent_change
from bayesdid.model.gaussian import pointwise_loglik
from bayesdid.model.registry import build_model
from bayesdid.simulate import Scenario

pytestmark = pytest.mark.slow

# Gruber (1994), AER 84(3), Table 3 (values from memory): mean log hourly wage cells.
GRUBER = {
    ("Adopter", "target", 1): 1.547,
    ("Adopter", "target", 2): 1.513,
    ("Adopter", "reference", 1): 1.369,
    ("Adopter", "reference", 2): 1.397,
    ("Other", "target", 1): 1.759,
    ("Other", "target", 2): 1.748,
    ("Other", "reference", 1): 1.630,
    ("Other", "reference", 2): 1.627,
}


def _gruber_frame(n=2000, comparisons=10, sd=0.5, seed=0):
    """Rows whose cell means equal the published means exactly: one adopting state and
    `comparisons` other states, each with the published 'other states' means."""
    rng = np.random.default_rng(seed)
    parts = []
    for j in ["Adopter"] + [f"Other {i}" for i in range(comparisons)]:
        key = "Adopter" if j == "Adopter" else "Other"
        for g in ("target", "reference"):
            for t in (1, 2):
                e = rng.standard_normal(n)
                e = (e - e.mean()) / e.std() * sd
                parts.append(pd.DataFrame({"state": j, "group": g, "period": t, "y": GRUBER[key, g, t] + e}))
    return pd.concat(parts, ignore_index=True)


def test_gruber_table3_least_squares_and_posterior(tmp_path):
    frame = _gruber_frame()
    p = tmp_path / "g.csv"
    frame.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="y",
        jurisdiction="state",
        period="period",
        group="group",
        target_group="target",
        adopters={"Adopter": 2},
        draws=1000,
        tune=1000,
        seed=11,
    )
    an = analyse(st)
    # published DDD -0.054 (Gruber 1994 Table 3, from memory); exact arithmetic of the means:
    ddd = (1.513 - 1.547) - (1.397 - 1.369) - ((1.748 - 1.759) - (1.627 - 1.630))
    assert ddd == pytest.approx(-0.054, abs=1e-9)
    assert an.least_squares["estimate"] == pytest.approx(ddd, abs=1e-9)
    e = an.effects.effect.summary
    # posterior mean within 0.005 when cells are large (issue target); MC error of the mean is
    # sd / sqrt(ESS) ~ 0.02 / sqrt(400) = 0.001, well inside the tolerance
    assert abs(e["mean"] - ddd) < 0.005


def test_organ_donations_did(tmp_path, organ_donations):
    """causaldata organ_donations (Kessler and Roth 2014): California adopts from 2011 Q3
    (Quarter_Num 4). Two-way fixed-effects DiD -0.02246 (statsmodels on the same rows; about
    -0.0225 in Huntington-Klein, The Effect, 2021, ch. 18, from memory)."""
    df = organ_donations
    p = tmp_path / "organ.csv"
    df.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="Rate",
        jurisdiction="State",
        period="Quarter_Num",
        adopters={"California": 4},
        draws=1000,
        tune=1000,
        seed=5,
    )
    d = ((df["State"] == "California") & (df["Quarter_Num"] >= 4)).astype(float)
    ref = smf.ols("Rate ~ C(State) + C(Quarter_Num) + D", data=df.assign(D=d)).fit().params["D"]
    assert ref == pytest.approx(-0.02246, abs=5e-6)
    an = analyse(st)
    assert an.least_squares["estimate"] == pytest.approx(ref, rel=1e-8)
    assert abs(an.effects.effect.summary["mean"] - ref) < 0.01


@pytest.mark.parametrize(
    "groups,starts",
    [(2, {0: 5}), (2, {0: 4, 1: 5, 2: 6}), (1, {0: 5}), (1, {0: 4, 1: 5, 2: 6})],
    ids=["DDD-1", "DDD-3", "DiD-1", "DiD-3"],
)
def test_recovers_known_tau(tmp_path_factory, groups, starts):
    sc = Scenario(jurisdictions=25, periods=8, groups=groups, starts=starts, tau=-0.3, gap_sd=0.05, rows_per_cell=40)
    st, cells, _, truth = sim_study(tmp_path_factory, sc, 21, "rec", draws=500, tune=500, seed=3)
    an = analyse(st, cells=cells)
    e = an.effects.effect.summary
    # the truth lies within 4 posterior sds (a calibrated posterior fails this with p < 1e-4)
    assert abs(e["mean"] - truth["tau"]) < 4 * e["sd"]
    assert e["eti_95"][0] < truth["tau"] < e["eti_95"][1] or abs(e["mean"] - truth["tau"]) < 3 * e["sd"]
    assert e["prob_lt_0"] > 0.95
    assert len(an.effects.per_adopter) == len(starts)


def test_same_seed_same_draws_and_loglik_matches_pymc(tmp_path_factory):
    sc = Scenario(jurisdictions=25, periods=8, groups=2, starts={0: 5}, tau=-0.3, rows_per_cell=40)
    st, cells, _, _ = sim_study(tmp_path_factory, sc, 21, "repro", draws=200, tune=200, seed=9)
    a = analyse(st, cells=cells)
    b = analyse(st, cells=cells)
    np.testing.assert_array_equal(a.fit.draws("tau"), b.fit.draws("tau"))
    c = analyse(st.replace(sampler={"seed": 10}), cells=cells)
    assert not np.array_equal(a.fit.draws("tau"), c.fit.draws("tau"))
    # numpy log-likelihood (used for the netCDF file) equals PyMC's evaluation of the model graph
    import pymc as pm

    model, _ = build_model(cells, a.fit.scales)
    ll = pm.stats.compute_log_likelihood(a.fit.tree.copy(), model=model, progressbar=False, extend_inferencedata=False)
    ref = ll["cells"].stack(sample=("chain", "draw")).transpose("sample", ...).to_numpy()
    np.testing.assert_allclose(pointwise_loglik(a.fit), ref, rtol=1e-9)


def test_percent_change_halvorsen_palmquist():
    """Halvorsen and Palmquist (1980), AER 70(3): b = 0.19 in a log equation is a 20.9% effect."""
    assert percent_change(0.19) == pytest.approx(0.209, abs=5e-4)
    assert percent_change(0.19) != pytest.approx(0.19, abs=5e-3)
