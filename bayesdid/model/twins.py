"""Numpy twins of the model, kept together with the model they copy, each tested against the PyMC graph.

* :func:`log_prior`: the log density of each power-scaled prior at given parameter values, as the
  model's own ``logp`` terms (``tests/test_twins.py``: equal to ``model.compile_logp`` to 1e-8);
  power-scaling (:mod:`bayesdid.sensitivity`) reads it from the posterior draws without a PyMC model.
* :func:`draw_prior`: parameters and cell means drawn from the Gaussian model's prior, for
  simulation-based calibration (``tests/test_sbc_prior.py``: marginals against ``pm.draw`` of the
  model's variables by two-sample KS tests, and the model graph's density of drawn cells).
* :func:`gap_noise_draws`: the gap noise drawn back from its conditional posterior (the comparison
  check; formulas in :mod:`bayesdid.checks.comparison`).
* :func:`replicate_gaps`: replicated target-minus-reference gaps (or, for a DiD, the target cell) at
  given periods: for the Gaussian family from the cell-mean model with the shock and the gap noise
  drawn back (AR(1) over periods when the gap noise is persistent); for binomial and count families
  on the link scale from the family's own sampling model
  (:func:`bayesdid.model.families.replicate_gap_path`). The pre-trend check and the parallel-trends
  sensitivity both read it; the formulas are in :mod:`bayesdid.checks.pretrend`.

The numpy log-likelihoods are not twins: :func:`bayesdid.model.gaussian.jt_loglik` and
:func:`bayesdid.model.families.record_loglik` are single functions that build the PyTensor graph and
evaluate numpy draws alike (``xp``), checked in ``tests/test_families_loglik.py``.
"""

from __future__ import annotations

import numpy as np

from .families import gap_noise_draws as gap_path_draws
from .families import replicate_gap_path
from .family import family_record
from .gaussian import ar1_smoothing_draws, cell_arrays, residual_draws
from .structure import gap_scale_draws
from .terms import mean_from_draws

__all__ = ["replicate_gaps", "gap_noise_draws", "draw_prior", "treat_by_adopter", "log_prior", "POWER_SCALED_PRIORS"]

#: Posterior variable -> (prior family, name of its scale, location) as built in :mod:`bayesdid.model`:
#: the priors with a user-settable scale that power-scaling reweights (see :mod:`bayesdid.sensitivity`).
POWER_SCALED_PRIORS = {
    "mu_group": ("normal", "intercept", "outcome_location"),
    "sigma_baseline": ("halfnormal", "baseline_spread", None),
    "period_raw": ("normal", "period", None),
    "group_period_raw": ("normal", "group_period", None),
    "tau": ("normal", "effect", None),
    "sigma_tau": ("halfnormal", "adopter_spread", None),
    "sigma": ("halfnormal", "residual", None),
    "sigma_gap": ("halfnormal", "gap_noise", None),
    "sigma_shock": ("halfnormal", "shock_spread", None),
}


def log_prior(values, scales: dict, location: float) -> dict[str, np.ndarray]:
    """Log prior density of each power-scaled prior present in ``values``, per draw.

    ``values`` maps variable names to arrays of shape (chain, draw, ...); each density is summed over
    the variable's own axes. Normal(loc, scale) or HalfNormal(scale) as in :data:`POWER_SCALED_PRIORS`
    (``scales`` by name; ``location`` is the intercept's prior mean, the outcome location); with
    persistent gap noise ``(rho + 1)/2 ~ Beta(a, b)`` (:data:`bayesdid.model.structure.RHO_PRIOR`, the
    density of the model's ``rho_unit``); with per-jurisdiction gap-noise scales omega's HalfNormal
    (:func:`bayesdid.model.structure.omega_prior_logpdf`).
    """
    from scipy import stats

    from .structure import RHO_PRIOR, omega_prior_logpdf

    out = {}
    for name, (kind, scale_name, loc_name) in POWER_SCALED_PRIORS.items():
        if name not in values:
            continue
        x = np.asarray(values[name], dtype=float)
        scale = float(scales[scale_name])
        if kind == "normal":
            lp = stats.norm.logpdf(x, float(location) if loc_name == "outcome_location" else 0.0, scale)
        else:
            lp = stats.halfnorm.logpdf(x, scale=scale)
        extra = tuple(range(2, lp.ndim))
        out[name] = lp.sum(axis=extra) if extra else lp
    if "rho" in values:
        u = (np.asarray(values["rho"], dtype=float) + 1.0) / 2.0
        out["rho"] = stats.beta.logpdf(u, RHO_PRIOR["a"], RHO_PRIOR["b"])
    if "omega" in values:
        out["omega"] = omega_prior_logpdf(np.asarray(values["omega"], dtype=float))
    return out


def replicate_gaps(fit, j: int, periods: np.ndarray, rng: np.random.Generator):
    """Observed gap, expected gap (S, n) and replicated gap (S, n) of jurisdiction j at ``periods``.

    Gaussian: as in the module docstring. Other families: on the link scale, records replicated from
    the family itself (:func:`bayesdid.model.families.replicate_gap_path`).
    """
    if not family_record(fit.spec.family).cell_model:
        return replicate_gap_path(fit, j, periods, rng)
    cells = fit.cells
    m = mean_from_draws(fit)  # (S, J, G, T)
    sigma = residual_draws(fit)  # (S, G)
    sg = gap_scale_draws(fit)[:, j]  # jurisdiction j's own gap-noise scale (S,)
    S = sigma.shape[0]
    q = cells.target
    n_q = cells.n[j, q, periods]
    mean = cells.mean
    e = sg[:, None] * rng.standard_normal((S, len(periods)))
    if getattr(fit.spec, "gap", "independent") == "persistent":
        # AR(1) gap noise (bayesdid.model.structure): the same normals, chained over the periods
        # with correlation rho^(gap in periods) and the marginal sd kept at sigma_gap_j
        rho = fit.draws("rho")
        z = e.copy()
        for i in range(1, len(periods)):
            c = rho ** float(periods[i] - periods[i - 1])
            e[:, i] = c * e[:, i - 1] + np.sqrt(1.0 - c * c) * z[:, i]
    eps_q = sigma[:, q][:, None] / np.sqrt(n_q)[None, :] * rng.standard_normal((S, len(periods)))
    if cells.design == "DDD":
        r = cells.reference
        n_r = cells.n[j, r, periods]
        s = fit.draws("sigma_shock")[:, None] * rng.standard_normal((S, len(periods)))
        eps_r = sigma[:, r][:, None] / np.sqrt(n_r)[None, :] * rng.standard_normal((S, len(periods)))
        y_q = m[:, j, q, periods] + s + e + eps_q
        y_r = m[:, j, r, periods] + s + eps_r
        expected = m[:, j, q, periods] - m[:, j, r, periods]
        observed = mean[j, q, periods] - mean[j, r, periods]
        return observed, expected, y_q - y_r
    expected = m[:, j, q, periods]
    return mean[j, q, periods], expected, expected + e + eps_q


def gap_noise_draws(fit, rng: np.random.Generator) -> np.ndarray:
    """Draws of the gap noise e[j,t] from its conditional posterior: shape (S, J, T).

    The cell model integrates e out; it is drawn back given the two cell means of each
    jurisdiction-period (formulas in :mod:`bayesdid.checks.comparison`). Families with latent
    fields keep e in the posterior; its draws are used as they are (their period means are in the
    baselines)."""
    if not family_record(fit.spec.family).cell_model:
        return gap_path_draws(fit)
    cells = fit.cells
    arr = cell_arrays(cells)
    m = mean_from_draws(fit)
    sigma = residual_draws(fit)
    sg2 = gap_scale_draws(fit)[:, :, None] ** 2  # (S, J, 1): each jurisdiction's own scale
    q = cells.target
    dq = arr["ybar_q"][None] - m[:, :, q, :]
    C = sigma[:, q][:, None, None] ** 2 * arr["inv_n_q"][None]
    if cells.design == "DDD":
        r = cells.reference
        s2 = fit.draws("sigma_shock")[:, None, None] ** 2
        A = sigma[:, r][:, None, None] ** 2 * arr["inv_n_r"][None] + s2
        dr = arr["ybar_r"][None] - m[:, :, r, :]
        k = arr["p_r"][None] * s2 / A
    else:
        s2 = np.zeros_like(sg2)
        dr = np.zeros_like(dq)
        k = np.zeros_like(dq)
    V = C + s2 + sg2 - k * s2
    if getattr(fit.spec, "gap", "independent") == "persistent":
        # AR(1) gap noise: draw each jurisdiction's whole path jointly (forward filter, backward sampling)
        o = arr["p_q"][None] * arr["w"][None] + 0.0 * dq
        return ar1_smoothing_draws(
            dq - k * dr, C + (s2 - k * s2), o, sg2, fit.draws("rho")[:, None, None], rng.standard_normal(dq.shape)
        )
    pq = arr["p_q"][None]
    mean = pq * sg2 * (dq - k * dr) / V
    var = np.maximum(sg2 - pq * sg2 * sg2 / V, 0.0)
    return mean + np.sqrt(var) * rng.standard_normal(mean.shape)


# ---- the prior sampler of the Gaussian model (simulation-based calibration) ------------------------


def draw_prior(
    cells, prior: dict, rng: np.random.Generator, latent: dict | None = None
) -> tuple[dict, np.ndarray, np.ndarray]:
    """Parameters from the model's prior and the (J, G, T) cell means and row sds they imply.

    Mirrors :func:`bayesdid.model.terms.hierarchical_mean` and the Gaussian family term by term.
    ``latent``, when given, receives every drawn quantity under the model's variable names (and the
    shock ``s`` and gap noise ``e``, which the Gaussian model integrates out), for tests.
    """
    from .terms import zero_sum_basis

    S = prior["scales"]
    J, G, T = cells.shape
    is_adopter = cells.start < T
    hn = lambda s, size=None: np.abs(rng.normal(0.0, s, size))  # noqa: E731 - HalfNormal(s)
    mu = rng.normal(prior["location"], S["intercept"], G)
    sigma_b = hn(S["baseline_spread"])
    scale_j = np.where(is_adopter, S["intercept"], sigma_b)
    b = mu[None, :] + scale_j[:, None] * rng.standard_normal((J, G))
    Q = zero_sum_basis(T)
    a = Q @ rng.normal(0.0, S["period"], T - 1)
    m = b[:, :, None] + a[None, None, :]
    if G == 2:
        h = Q @ rng.normal(0.0, S["group_period"], T - 1)
        m[:, cells.target, :] += h[None, :]
    tau = rng.normal(0.0, S["effect"])
    A = int(is_adopter.sum())
    if A > 1:
        sigma_tau = hn(S["adopter_spread"])
        tau_a = tau + sigma_tau * rng.standard_normal(A)
    else:
        sigma_tau, tau_a = None, np.array([tau])
    m += np.tensordot(tau_a, treat_by_adopter(cells), axes=1)
    from .structure import OMEGA_SCALE, RHO_PRIOR, gap_structure, residual_rule

    sigma = hn(S["residual"], G) if residual_rule(cells)["separate"] else np.zeros(G)
    sigma_gap = hn(S["gap_noise"])
    e = rng.standard_normal((J, T))
    rho = None
    if gap_structure(cells).over_time == "persistent":
        rho = 2.0 * rng.beta(RHO_PRIOR["a"], RHO_PRIOR["b"]) - 1.0
        for t in range(1, T):  # stationary AR(1), marginal sd sigma_gap
            e[:, t] = rho * e[:, t - 1] + np.sqrt(1.0 - rho * rho) * e[:, t]
    omega = None
    gap_j = sigma_gap  # each jurisdiction's gap-noise scale, (J, 1), or the shared one
    if gap_structure(cells).scale == "per_jurisdiction":  # as gap_scale_terms: non-centred, zero-sum log-normal
        omega = hn(OMEGA_SCALE)
        z_scale = rng.standard_normal(J - 1)  # zero-sum over jurisdictions, as the model's z_gap_scale
        gap_j = sigma_gap * np.exp(omega * (zero_sum_basis(J) @ z_scale))[:, None]
    m[:, cells.target, :] += gap_j * e
    if G == 2:
        sigma_shock = hn(S["shock_spread"])
        sd_j = np.where(is_adopter, S["period"], sigma_shock)
        shock = sd_j[:, None] * rng.standard_normal((J, T))
        m += shock[:, None, :]
    truth = {"tau": float(tau), "sigma_gap": float(sigma_gap)}
    if rho is not None:
        truth["rho"] = float(rho)
    if omega is not None:
        truth["omega"] = float(omega)
    if latent is not None:
        latent.update(truth)
        latent.update(mu_group=mu, sigma_baseline=float(sigma_b), baseline=b, period_effect=a, tau_adopter=tau_a)
        latent.update(sigma=sigma, gap_noise=gap_j * e, sigma_tau=sigma_tau)
        if omega is not None:
            latent.update(sigma_gap_j=np.ravel(gap_j), z_gap_scale=z_scale)
        if G == 2:
            latent.update(group_period_effect=h, sigma_shock=float(sigma_shock), shock=shock)
    return truth, m, np.broadcast_to(sigma[None, :, None], (J, G, T))


def treat_by_adopter(cells) -> np.ndarray:
    """(A, J, G, T): 1 where adopter a's policy is on in cell (j, g, t) (the design's treatment indicator)."""
    from .terms import design_data

    return design_data(cells)["treat_by_adopter"]
