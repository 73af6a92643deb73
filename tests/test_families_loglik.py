"""Collapsed versus row-level log-likelihoods of every family (no sampler; numpy, scipy, PyTensor).

Reference: scipy.stats on the rows (binom, poisson, multivariate_normal, gamma with
scipy.integrate.quad for the cell-gamma negative binomial). "Up to a constant" is checked by
evaluating the difference collapsed - row-level at two random parameter values: it must not move.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, special, stats

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.model import families, gaussian
from bayesdid.model.registry import build_model, pointwise_loglik
from bayesdid.model.terms import model_spec, resolve_scales
from bayesdid.simulate import Scenario, simulate
from bayesdid.study import PriorScales
from bayesdid.simulate_families import CountScenario, simulate_family


def _study(frame, truth, family, covariates=None, **kw):
    ddd = "group" in frame
    return make_study(table="unused.csv", outcome="y", jurisdiction="region", period="period",
                      group="group" if ddd else None, target_group="target" if ddd else None,
                      adopters=truth["starts"], family=family, covariates=covariates, **kw)


def _hand_design(frame, names):
    """Covariate columns built by hand with pandas (not by formulaic), in the order and treatment
    coding the model reports (``C(var)[T.level]``), centred at their row means."""
    cols = []
    for nm in names:
        var, level = nm[2:].split(")[T.")
        cols.append((frame[var].astype(str) == level[:-1]).to_numpy(dtype=float))
    X = np.column_stack(cols)
    return X - X.mean(axis=0)


def _codes(cells, frame):
    j = frame["region"].map({v: i for i, v in enumerate(cells.jurisdictions)}).to_numpy()
    t = frame["period"].map({v: i for i, v in enumerate(cells.periods)}).to_numpy()
    g = (frame["group"].map({v: i for i, v in enumerate(cells.groups)}).to_numpy() if "group" in frame
         else np.zeros(len(frame), dtype=int))
    return j, g, t


def _random_params(rng, cells, K):
    J, G, T = cells.shape
    return {"m": rng.normal(-1.5, 0.5, (J, G, T)), "s": rng.normal(0, 0.3, (J, T)),
            "e": rng.normal(0, 0.3, (J, T)), "theta": rng.normal(0, 0.5, K), "phi": rng.uniform(2, 30)}


def _collapsed(family, cells, p):
    d = families.data_arrays(cells, family)
    J, G, T = cells.shape
    eta = p["m"].ravel()[d["rec_cell"]] + p["e"].ravel()[d["rec_jt"]] * d["rec_tgt"]
    if cells.design == "DDD":
        eta = eta + p["s"].ravel()[d["rec_jt"]]
    eta = eta + d["rec_x"] @ p["theta"]
    return float(families.record_loglik(family, d, eta, p["phi"]).sum())


def _row_eta(cells, frame, X, p):
    j, g, t = _codes(cells, frame)
    eta = p["m"][j, g, t] + p["e"][j, t] * (g == cells.target)
    if cells.design == "DDD":
        eta = eta + p["s"][j, t]
    return eta + X @ p["theta"]


def _nb_rows(cells, frame, X, p):
    """Row-level cell-gamma negative binomial: integrate u_c out numerically per cell (scipy)."""
    j, g, t = _codes(cells, frame)
    eta = _row_eta(cells, frame, X, p)
    mu = frame["exposure"].to_numpy() * np.exp(eta)
    y = frame["y"].to_numpy()
    phi = p["phi"]
    key = (j * cells.shape[1] + g) * cells.shape[2] + t
    total = 0.0
    for c in np.unique(key):
        sel = key == c
        yc, mc = y[sel], mu[sel]

        def logf(u):
            return stats.poisson.logpmf(yc, mc * u).sum() + stats.gamma.logpdf(u, phi, scale=1 / phi)

        grid = np.linspace(1e-3, 6, 400)
        lmax = max(logf(u) for u in grid)
        val, _ = integrate.quad(lambda u: np.exp(logf(u) - lmax), 0, np.inf, limit=200, epsabs=0, epsrel=1e-11)
        total += lmax + np.log(val)
    return total


@pytest.mark.parametrize("family", ["binomial", "poisson", "negbinomial"])
@pytest.mark.parametrize("design", ["DDD", "DiD"])
def test_collapsed_equals_rows_up_to_constant(family, design):
    rng = np.random.default_rng(7)
    sc = CountScenario(family=family, jurisdictions=4, periods=3, groups=2 if design == "DDD" else 1,
                       starts={0: 1}, rows_per_cell=12 if family != "negbinomial" else 3,
                       trials=3 if family == "binomial" else 1)
    frame, truth = simulate_family(sc, 11)
    kw = {"exposure": "exposure"} if family != "binomial" else {"trials": "trials"}
    cells = collapse(_study(frame, truth, family, "C(sex) + C(risk)", **kw), frame)
    # exact collapse reduces rows to cell x pattern records (12 patterns at most per cell... 6 here)
    assert len(cells.extra["records"]["y"]) < len(frame)
    names = cells.extra["covariates"]["names"]
    assert names == ["C(sex)[T.male]", "C(risk)[T.low]", "C(risk)[T.mid]"]  # reference levels first in sort
    X = _hand_design(frame, names)
    diffs = []
    for _ in range(2):
        p = _random_params(rng, cells, 3)
        eta = _row_eta(cells, frame, X, p)
        y = frame["y"].to_numpy()
        if family == "binomial":
            rows = stats.binom.logpmf(y, frame["trials"].to_numpy(), special.expit(eta)).sum()
        elif family == "poisson":
            rows = stats.poisson.logpmf(y, frame["exposure"].to_numpy() * np.exp(eta)).sum()
        else:
            rows = _nb_rows(cells, frame, X, p)
        diffs.append(_collapsed(family, cells, p) - rows)
    # the constant itself (sum log C(n,y), sum y log E - log y!) must not depend on the parameters
    assert diffs[0] == pytest.approx(diffs[1], abs=1e-7)


def test_zero_one_binomial_and_no_covariates():
    """A 0/1 outcome without covariates collapses to one record per cell: successes and trials."""
    sc = CountScenario(family="binomial", jurisdictions=5, periods=3, starts={0: 1}, rows_per_cell=30,
                       covariates=False)
    frame, truth = simulate_family(sc, 3)
    cells = collapse(_study(frame, truth, "binomial"), frame)
    rec = cells.extra["records"]
    assert len(rec["y"]) == cells.n_cells == 5 * 2 * 3
    grp = frame.groupby(["region", "group", "period"])["y"].agg(["sum", "count"])
    j, g, t = cells.jurisdictions[0], cells.groups[cells.target], cells.periods[2]
    assert cells.sum_y[0, cells.target, 2] == grp.loc[(j, g, t), "sum"]
    assert cells.n[0, cells.target, 2] == grp.loc[(j, g, t), "count"]


def _mvn_rows(cells, frame, y, X, par):
    """Row-level Gaussian with the shock and gap noise integrated out: per jurisdiction-period the
    rows are multivariate normal with covariance sigma_g^2 I + sigma_s^2 11' + sigma_gap^2 qq'
    (q = target-group indicator), scipy.stats.multivariate_normal."""
    j, g, t = _codes(cells, frame)
    mean = par["m"][j, g, t] + X @ par["theta"]
    total = 0.0
    for jj in range(cells.shape[0]):
        for tt in range(cells.shape[2]):
            sel = (j == jj) & (t == tt)
            q = (g[sel] == cells.target).astype(float)
            sig = par["sigma"][g[sel]]
            cov = np.diag(sig ** 2) + par["sigma_gap"] ** 2 * np.outer(q, q)
            if cells.design == "DDD":
                cov = cov + par["sigma_shock"] ** 2
            total += stats.multivariate_normal.logpdf(y[sel], mean[sel], cov)
    return total


@pytest.mark.parametrize("design", ["DDD", "DiD"])
def test_gaussian_with_covariates_collapsed_equals_rows(design):
    """Gaussian + covariates: the per-cell sums (n, sum y, sum y^2, sum x, x x', x y) reproduce the
    row-level likelihood exactly (no constant at all here: both sides are complete densities)."""
    rng = np.random.default_rng(5)
    sc = Scenario(jurisdictions=4, periods=3, groups=2 if design == "DDD" else 1, starts={0: 1},
                  rows_per_cell=5, fixed_cells=False)
    frame, truth = simulate(sc, 2)
    frame["age"] = rng.normal(50, 10, len(frame))
    frame["sex"] = rng.choice(["female", "male"], len(frame))
    frame["y"] = frame["y"] + 0.02 * frame["age"] + 0.3 * (frame["sex"] == "male")
    cells = collapse(_study(frame, truth, "gaussian", "age + C(sex)"), frame)
    cov = cells.extra["covariates"]
    assert cov["names"] == ["age", "C(sex)[T.male]"]
    X = np.column_stack([frame["age"], frame["sex"] == "male"]).astype(float)
    X = X - X.mean(axis=0)
    np.testing.assert_allclose(cov["means"], [frame["age"].mean(), (frame["sex"] == "male").mean()])
    # overall X'X and X'y are the sums of the per-cell sums
    np.testing.assert_allclose(cov["sxx"].sum(axis=(0, 1, 2)), X.T @ X, rtol=1e-10)
    np.testing.assert_allclose(cov["sxy"].sum(axis=(0, 1, 2)), X.T @ frame["y"].to_numpy(), rtol=1e-10)
    J, G, T = cells.shape
    arr = gaussian.cell_arrays(cells)
    for _ in range(2):
        par = {"m": rng.normal(1, 0.5, (J, G, T)), "theta": rng.normal(0, 0.3, 2),
               "sigma": rng.uniform(0.5, 1.5, G), "sigma_gap": rng.uniform(0.1, 0.5),
               "sigma_shock": rng.uniform(0.1, 0.5) if design == "DDD" else 0.0}
        d = gaussian.covariate_adjusted(arr, par["theta"])
        r = cells.reference if design == "DDD" else None
        ll = gaussian.jt_loglik(
            d, m_r=par["m"][:, r, :] if r is not None else np.zeros((J, T)), m_q=par["m"][:, cells.target, :],
            sigma_r=par["sigma"][r] if r is not None else 1.0, sigma_q=par["sigma"][cells.target],
            sigma_shock=par["sigma_shock"], sigma_gap=par["sigma_gap"]).sum()
        assert ll == pytest.approx(_mvn_rows(cells, frame, frame["y"].to_numpy(), X, par), rel=1e-10, abs=1e-8)


def _fake_fit(model, cells, family, rng):
    """A one-draw 'fit' at a random point of the model, read through PyMC's own graph."""

    ip = model.initial_point()
    point = {k: v + rng.normal(0, 0.4, np.shape(v)) for k, v in ip.items()}
    names = [n for n in ("baseline", "period_effect", "group_period_effect", "tau_adopter", "gap", "shock",
                         "theta", "phi", "sigma", "sigma_gap", "sigma_shock") if n in model.named_vars]
    outs = model.replace_rvs_by_values([model[n] for n in names])  # evaluate at the point, not sample
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore", point_fn=True)
    vals = dict(zip(names, fn(point)))
    logp = model.compile_fn(model.logp(vars=[model["cells"]], sum=True), inputs=model.value_vars,
                            on_unused_input="ignore", point_fn=True)(point)
    spec = model_spec(cells, family)
    scales = {n[len("prior_"):]: float(model[n].get_value()) for n in model.named_vars if n.startswith("prior_")}
    fake = SimpleNamespace(cells=cells, spec=spec, scales=scales, draws=lambda n: np.asarray(vals[n])[None, ...])
    return fake, float(logp)


@pytest.mark.parametrize("family", ["binomial", "poisson", "negbinomial", "gaussian"])
def test_numpy_twin_matches_pytensor_graph(family):
    """The model's observed-variable log density (PyTensor) equals the numpy twin used for draws."""
    rng = np.random.default_rng(21)
    if family == "gaussian":
        frame, truth = simulate(Scenario(jurisdictions=5, periods=4, starts={0: 2}, rows_per_cell=6), 4)
        frame["age"] = rng.normal(40, 8, len(frame))
        cells = collapse(_study(frame, truth, family, "age"), frame)
    else:
        frame, truth = simulate_family(CountScenario(family=family, jurisdictions=5, periods=4,
                                                     starts={0: 2, 1: 3}, rows_per_cell=8), 9)
        kw = {"exposure": "exposure"} if family != "binomial" else {}
        cells = collapse(_study(frame, truth, family, "C(sex) + C(risk)", **kw), frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    model, _ = build_model(cells, scales, family)
    fake, logp = _fake_fit(model, cells, family, rng)
    ll = pointwise_loglik(fake)
    assert ll.shape == (1, cells.shape[0], cells.shape[2])
    assert ll.sum() == pytest.approx(logp, rel=1e-9)
