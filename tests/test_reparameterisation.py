"""The sampler's coordinates change, the model does not.

The baselines of a DDD are sampled in a rotated (level, gap) basis and the adopters' effects as
their mean plus zero-sum contrasts with tau drawn from its exact conditional (see
``bayesdid.model.terms.hierarchical_mean``). Both are claimed to leave the joint prior unchanged:

* exactly, by the change-of-variables formula: the model's log density in the sampler's
  coordinates minus the log Jacobian of the map to (tau, tau_adopter) equals the textbook
  hierarchical prior written with scipy.stats (reference library);
* by simulation: PyMC's prior draws match draws of the textbook prior (two-sample
  Kolmogorov-Smirnov, scipy.stats).
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytest
from conftest import sim_study
from scipy import stats

from bayesdid.model.registry import build_model
from bayesdid.model.terms import default_scales, zero_sum_basis
from bayesdid.simulate import Scenario


@pytest.fixture(scope="module")
def three_adopters(tmp_path_factory):
    sc = Scenario(jurisdictions=12, periods=6, groups=2, starts={0: 3, 1: 4, 2: 3}, tau=-0.1, rows_per_cell=20)
    _, cells, _, _ = sim_study(tmp_path_factory, sc, 3, "reparam")
    scales = default_scales(cells)
    model, _ = build_model(cells, scales)
    return cells, scales, model


def test_adopter_effects_prior_is_the_textbook_one_exactly(three_adopters):
    """log p(abar, w, u, sigma_tau) - log|d(tau_a, tau)/d(abar, w, u)| = log p(tau) + log p(sigma_tau)
    + sum_a log p(tau_a | tau, sigma_tau), at random points (change of variables)."""
    cells, scales, model = three_adopters
    A = len(cells.adopters)
    se, sa = scales["effect"], scales["adopter_spread"]
    names = ["tau_adopter_mean", "z_tau_contrast", "u_tau", "sigma_tau"]
    logps = model.compile_fn(
        [model.logp(vars=[model[n] for n in names], sum=True)],
        inputs=[model.rvs_to_values[model[n]] for n in names],
        on_unused_input="ignore",
    )
    det = model.compile_fn(
        model.replace_rvs_by_values([model["tau_adopter"], model["tau"]]),
        inputs=[model.rvs_to_values[model[n]] for n in names],
        on_unused_input="ignore",
    )
    rng = np.random.default_rng(11)
    Q = zero_sum_basis(A)
    for _ in range(5):
        abar, w, u = rng.normal(0, 0.3), rng.normal(size=A - 1), rng.normal()
        st = abs(rng.normal(0, sa))
        log_st = np.log(st)  # PyMC's value variable of a HalfNormal is log sigma_tau
        point = {"tau_adopter_mean": abar, "z_tau_contrast": w, "u_tau": u, "sigma_tau_log__": log_st}
        lp = float(np.asarray(logps(point)).ravel()[0])
        tau_a, tau = det(point)
        # Jacobian of (abar, w, u) -> (tau_a, tau) at fixed sigma_tau: a linear map.
        v = se**2 + st**2 / A
        J = np.zeros((A + 1, A + 1))
        J[:A, 0] = 1.0
        J[:A, 1:A] = st * Q
        J[A, 0] = se**2 / v
        J[A, A] = np.sqrt(se**2 * st**2 / A / v)
        log_jac = np.log(abs(np.linalg.det(J)))
        # The log-transform of sigma_tau contributes log(st) in both coordinate systems: PyMC adds it to
        # the log density of the value variable, and the textbook side is written in log sigma_tau too.
        textbook = (
            stats.norm.logpdf(tau, 0, se)
            + stats.halfnorm.logpdf(st, scale=sa)
            + log_st
            + stats.norm.logpdf(tau_a, tau, st).sum()
        )
        assert lp - log_jac == pytest.approx(textbook, abs=1e-9)


def test_prior_draws_match_the_textbook_prior(three_adopters):
    """PyMC prior draws of tau, tau_adopter and the baselines against direct draws (KS, scipy)."""
    cells, scales, model = three_adopters
    n = 4000
    with model:
        prior = pm.sample_prior_predictive(
            draws=n, random_seed=5, var_names=["tau", "tau_adopter", "baseline", "mu_group", "sigma_baseline"]
        )
    pr = prior["prior"]
    rng = np.random.default_rng(6)
    A = len(cells.adopters)
    se, sa = scales["effect"], scales["adopter_spread"]
    tau = rng.normal(0, se, n)
    tau_a = tau[:, None] + np.abs(rng.normal(0, sa, n))[:, None] * rng.normal(size=(n, A))
    got_tau = pr["tau"].values.ravel()
    got_ta = pr["tau_adopter"].values.reshape(-1, A)
    assert stats.ks_2samp(got_tau, tau).pvalue > 1e-3
    for a in range(A):
        assert stats.ks_2samp(got_ta[:, a], tau_a[:, a]).pvalue > 1e-3
    # contrast between two adopters: sigma_tau * (z_0 - z_1)
    assert stats.ks_2samp(got_ta[:, 0] - got_ta[:, 1], tau_a[:, 0] - tau_a[:, 1]).pvalue > 1e-3
    # baselines of a comparison jurisdiction: b[j, g] = mu[g] + sigma_b * z[j, g], independent over g
    j = int(cells.comparisons[0])
    b = pr["baseline"].values.reshape(-1, *pr["baseline"].shape[2:])[:, j, :]
    mu = pr["mu_group"].values.reshape(-1, 2)
    sb = pr["sigma_baseline"].values.ravel()
    z = (b - mu) / sb[:, None]
    assert stats.kstest(z[:, 0], "norm").pvalue > 1e-3
    assert stats.kstest(z[:, 1], "norm").pvalue > 1e-3
    assert abs(np.corrcoef(z[:, 0], z[:, 1])[0, 1]) < 4 / np.sqrt(n)  # 4 standard errors of r = 0


@pytest.mark.parametrize("design", ["DDD", "DiD"])
def test_count_family_levels_and_fields_prior_is_the_textbook_one(design):
    """Poisson model: b[j,g] + s[j,t] (+ e[j,t] on the target group) from PyMC's prior draws, whitened
    with each draw's textbook covariance (b ~ N(mu, sigma_b^2) per group, s ~ N(0, sigma_shock^2) and
    e ~ N(0, sigma_gap_j^2) iid over periods, j's own scale), must be iid standard normal (KS and correlations, scipy)."""
    from bayesdid import make_study
    from bayesdid.cells import collapse
    from bayesdid.simulate_families import CountScenario, simulate_family

    G = 2 if design == "DDD" else 1
    frame, truth = simulate_family(
        CountScenario(
            family="poisson", jurisdictions=8, periods=4, groups=G, starts={0: 2}, rows_per_cell=10, covariates=False
        ),
        12,
    )
    study = make_study(
        table="t.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if G == 2 else None,
        target_group="target" if G == 2 else None,
        adopters=truth["starts"],
        family="poisson",
        exposure="exposure",
        gap_scale="per_jurisdiction",  # the general case: each jurisdiction's own scale
    )
    cells = collapse(study, frame)
    model, spec = build_model(cells, default_scales(cells), "poisson")
    names = ["baseline", "gap", "mu_group", "sigma_baseline", "sigma_gap", "sigma_gap_j"] + (
        ["shock", "sigma_shock"] if G == 2 else []
    )
    n = 3000
    with model:
        pr = pm.sample_prior_predictive(draws=n, random_seed=8, var_names=names)["prior"]
    get = {k: pr[k].values.reshape(n, *pr[k].shape[2:]) for k in names}
    T = cells.shape[2]
    j = int(cells.comparisons[0])
    q = cells.target
    z_all = []
    for i in range(n):
        sb, se = get["sigma_baseline"][i], get["sigma_gap_j"][i, j]  # jurisdiction j's own gap scale
        ss = get["sigma_shock"][i] if G == 2 else 0.0
        xq = get["baseline"][i, j, q] + get["gap"][i, j] - get["mu_group"][i, q]
        if G == 2:
            r = cells.reference
            xq = xq + get["shock"][i, j]
            xr = get["baseline"][i, j, r] + get["shock"][i, j] - get["mu_group"][i, r]
            x = np.concatenate([xr, xq])
            one = np.ones((T, T))
            eye = np.eye(T)
            cov = np.block(
                [[sb**2 * one + ss**2 * eye, ss**2 * eye], [ss**2 * eye, sb**2 * one + (ss**2 + se**2) * eye]]
            )
        else:
            x = xq
            cov = sb**2 * np.ones((T, T)) + se**2 * np.eye(T)
        z_all.append(np.linalg.solve(np.linalg.cholesky(cov), x))
    z = np.array(z_all)
    for k in range(z.shape[1]):
        assert stats.kstest(z[:, k], "norm").pvalue > 1e-3, k
    C = np.corrcoef(z.T)
    off = C[~np.eye(len(C), dtype=bool)]
    assert np.abs(off).max() < 4.5 / np.sqrt(n)  # about 4.5 standard errors of r = 0, over <= 28 pairs
