"""The SBC prior sampler (calibration/sbc.py) against the PyMC model it stands in for.

Simulation-based calibration is exact only if the data sets it fits come from the model's own prior
predictive. Three checks, on the designs of the AR(1) DDD scenario and of the one-row-per-cell DiD:

* the model graph's log density of a prior-drawn data set, at the drawn parameters, equals a direct
  multivariate normal density of the cell means (scipy.stats.multivariate_normal, the covariance
  written out from the model's description) plus the within-cell density of Normal rows (textbook
  factorisation of iid normal rows into the cell mean and the within sum of squares);
* data drawn by the sampler and whitened with that covariance are standard normal (Monte Carlo);
* the sampler's parameter marginals equal ``pm.draw`` of the model's variables (two-sample KS).
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytest
from scipy import stats

from bayesdid.calibration import sbc
from bayesdid.calibration.scenarios import _cells_of, _frame_of, _scenario
from bayesdid.model.gaussian import cell_arrays
from bayesdid.model.registry import build_model
from bayesdid.model.structure import residual_rule
from bayesdid.model.terms import level_gap_rotation, model_spec, zero_sum_basis


def _design(scenario: str):
    cs = _scenario(scenario)
    prior = sbc.sbc_prior(scenario, 5)
    frame, truth = _frame_of(cs, 7)
    return _cells_of(frame, cs.scenario, truth), prior


@pytest.fixture(scope="module")
def ddd():
    return _design("ar1_ddd_05")


@pytest.fixture(scope="module")
def one_row():
    return _design("one_row_did")


def _mean_and_cov(cells, S, L):
    """Per jurisdiction: the mean (G*T,) of the cell means (group-major) and their covariance."""
    J, G, T = cells.shape
    n = cells.n
    q = cells.target
    m0 = L["baseline"][:, :, None] + L["period_effect"][None, None, :]
    if G == 2:
        m0[:, q, :] += L["group_period_effect"][None, :]
    m0 = m0 + np.tensordot(L["tau_adopter"], sbc._treat_by_adopter(cells), axes=1)
    is_adopter = cells.start < T
    sd_shock = np.where(is_adopter, S["period"], L["sigma_shock"]) if G == 2 else np.zeros(J)
    rho = L.get("rho", 0.0)
    ar = rho ** np.abs(np.subtract.outer(np.arange(T), np.arange(T)))
    out = []
    for j in range(J):
        C = np.zeros((G * T, G * T))
        for g in range(G):
            sl = slice(g * T, (g + 1) * T)
            C[sl, sl] += np.diag(L["sigma"][g] ** 2 / n[j, g])
        for g in range(G):  # the shared shock: every cell of the jurisdiction-period
            for h in range(G):
                C[g * T : (g + 1) * T, h * T : (h + 1) * T] += np.diag(np.full(T, sd_shock[j] ** 2))
        tq = slice(q * T, (q + 1) * T)
        sg = L["sigma_gap_j"][j] if "sigma_gap_j" in L else L["sigma_gap"]  # the jurisdiction's own scale
        C[tq, tq] += sg**2 * ar  # the gap noise: target side only
        out.append((m0[j].ravel(), C))
    return out


def _direct_loglik(cells, S, L):
    mean = cells.mean
    total = 0.0
    for j, (mu, C) in enumerate(_mean_and_cov(cells, S, L)):
        total += stats.multivariate_normal(mu, C).logpdf(mean[j].ravel())
    if residual_rule(cells)["separate"]:
        for g in range(cells.shape[1]):
            n, ss, s2 = cells.n[:, g], cells.ss[:, g], L["sigma"][g] ** 2
            total += np.sum(-0.5 * (n - 1) * np.log(2 * np.pi * s2) - 0.5 * np.log(n) - 0.5 * ss / s2)
    return total


def _model_loglik(cells, S, L, built: dict):
    """The model graph's log density of the observed cells at the drawn parameters.

    ``built`` caches the model and its compiled density per structure; a new data set is set into
    the model's data containers (as a fit from the compile cache does).
    """
    spec = model_spec(cells)
    if spec.key() not in built:
        model, _ = build_model(cells, S)
        expr = model.logp(vars=[model["cells"]], sum=True, jacobian=False)
        built[spec.key()] = model, pm.pytensorf.compile(model.value_vars, expr, on_unused_input="ignore")
    model, f = built[spec.key()]
    for k, v in cell_arrays(cells).items():
        if k in model.named_vars:
            model[k].set_value(v)
    J, G, T = cells.shape
    Q = zero_sum_basis(T)
    vals = {
        "mu_group": L["mu_group"],
        "sigma_baseline": L["sigma_baseline"],
        "period_raw": Q.T @ L["period_effect"],
        "tau": L["tau"],
        "sigma": L["sigma"],
        "sigma_gap": L["sigma_gap"],
    }
    if "rho" in L:
        vals["rho_unit"] = (L["rho"] + 1.0) / 2.0
    if "omega" in L:
        vals.update(omega=L["omega"], z_gap_scale=L["z_gap_scale"])
    if G == 2:
        vals.update(group_period_raw=Q.T @ L["group_period_effect"], sigma_shock=L["sigma_shock"])
    b, R = L["baseline"], level_gap_rotation(G)
    scale = np.where(cells.start < T, S["intercept"], L["sigma_baseline"])[:, None]
    vals["baseline"] = b
    vals["baseline_rotated"] = b @ R if R is not None else None
    z = (b - L["mu_group"][None, :]) / scale
    vals["z_baseline"] = z @ R if R is not None else z
    point = []
    for rv in model.free_RVs:
        v = np.asarray(vals[rv.name], dtype=float)
        tr = model.rvs_to_transforms.get(rv)
        point.append(tr.forward(v, *rv.owner.inputs).eval() if tr is not None else v)
    return float(f(*point))


@pytest.mark.parametrize("design", ["ddd", "one_row"])
def test_model_density_of_prior_drawn_cells_is_the_direct_multivariate_normal(design, request):
    template, prior = request.getfixturevalue(design)
    S = prior["scales"]
    rng = np.random.default_rng(11)
    built = {}
    for _ in range(4):
        L = {}
        _, cells = sbc._prior_cells(template, prior, rng, L)
        a, b = _model_loglik(cells, S, L, built), _direct_loglik(cells, S, L)
        assert a == pytest.approx(b, rel=1e-12, abs=1e-7)


@pytest.mark.parametrize("design", ["ddd", "one_row"])
def test_prior_drawn_cells_whitened_by_the_model_covariance_are_standard_normal(design, request):
    # Under the model, L^-1 (ybar - mu) per jurisdiction (C = L L') is iid Normal(0, 1). Over 150
    # data sets, separately for adopters and comparisons and for each group (their shocks and
    # baselines have different scales), the mean and variance of the whitened values, and the
    # lag-one product of the whitened target side (an AR(1) mismatch would show there), are checked
    # within 4 Monte Carlo sds: 1/sqrt(N), sqrt(2/N), 1/sqrt(N).
    template, prior = request.getfixturevalue(design)
    S = prior["scales"]
    J, G, T = template.shape
    q = template.target
    is_adopter = template.start < T
    rng = np.random.default_rng(12)
    zs = {(a, g): [] for a in (True, False) for g in range(G)}
    lag, within = [], []
    for _ in range(150):
        L = {}
        _, cells = sbc._prior_cells(template, prior, rng, L)
        for j, (mu, C) in enumerate(_mean_and_cov(cells, S, L)):
            z = np.linalg.solve(np.linalg.cholesky(C), cells.mean[j].ravel() - mu)
            for g in range(G):
                zs[bool(is_adopter[j]), g].append(z[g * T : (g + 1) * T])
            zq = z[q * T : (q + 1) * T]
            lag.append(zq[1:] * zq[:-1])
        if residual_rule(cells)["separate"]:  # ss / sigma^2 ~ chi-square(n - 1), mean n - 1
            n = cells.n
            within.append((cells.ss / (L["sigma"][None, :, None] ** 2) - (n - 1)) / np.sqrt(2 * (n - 1)))
    for key, parts in zs.items():
        z = np.concatenate(parts)
        N = z.size
        assert abs(z.mean()) < 4 / np.sqrt(N), key
        assert abs(z.var() - 1.0) < 4 * np.sqrt(2 / N), key
    lag = np.concatenate(lag)
    assert abs(lag.mean()) < 4 / np.sqrt(lag.size)
    if within:
        w = np.concatenate([x.ravel() for x in within])
        assert abs(w.mean()) < 4 / np.sqrt(w.size) and abs(w.var() - 1.0) < 0.1


def test_prior_sampler_marginals_equal_pm_draw_of_the_model(ddd):
    # Two-sample Kolmogorov-Smirnov (scipy) of 3,000 draws each, fixed seeds; a wrong scale of 10%
    # in any of these gives p far below 1e-3 at this size.
    template, prior = ddd
    rng = np.random.default_rng(13)
    L = {}
    _, cells = sbc._prior_cells(template, prior, rng, L)
    model, _ = build_model(cells, prior["scales"])
    names = ["tau", "sigma_gap", "rho", "omega", "sigma_gap_j", "sigma_shock", "sigma_baseline", "mu_group", "sigma"]
    names += ["period_effect"]
    names += ["group_period_effect", "baseline"]
    names = [n for n in names if n in model.named_vars]  # omega, sigma_gap_j: model.gap_scale = "per_jurisdiction"
    N = 3000
    theirs = dict(zip(names, pm.draw([model[n] for n in names], draws=N, random_seed=1)))
    ours = {n: [] for n in names}
    for _ in range(N):
        L = {}
        sbc._draw_prior(template, prior, rng, L)
        for n in names:
            ours[n].append(np.asarray(L[n], dtype=float))
    T = template.shape[2]
    adopter, other = int(np.flatnonzero(template.start < T)[0]), int(np.flatnonzero(template.start == T)[0])
    for n in names:
        a = np.array(ours[n]).reshape(N, -1)
        b = np.asarray(theirs[n], dtype=float).reshape(N, -1)
        cols = range(a.shape[1]) if n != "baseline" else (2 * adopter, 2 * adopter + 1, 2 * other, 2 * other + 1)
        for k in cols:
            assert stats.ks_2samp(a[:, k], b[:, k]).pvalue > 1e-3, (n, k)
