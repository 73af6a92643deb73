"""Simulation-based calibration reps: parameters drawn from the model's own prior, the rank of each truth."""

from __future__ import annotations

import dataclasses

import numpy as np

from .scenarios import _cells_of, _frame_of, _scenario
from .tasks import SBC_DRAWS, SBC_PARAMETERS, RepTask, _settings


def _draw_prior(
    cells, prior: dict, rng: np.random.Generator, latent: dict | None = None
) -> tuple[dict, np.ndarray, np.ndarray]:
    """Parameters from the model's prior and the (J, G, T) cell means and row sds they imply.

    Mirrors :func:`bayesdid.model.terms.hierarchical_mean` and the Gaussian family term by term.
    ``latent``, when given, receives every drawn quantity under the model's variable names (and the
    shock ``s`` and gap noise ``e``, which the Gaussian model integrates out), for tests.
    """
    from ..model.terms import zero_sum_basis

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
    m += np.tensordot(tau_a, _treat_by_adopter(cells), axes=1)
    from ..model.structure import OMEGA_SCALE, RHO_PRIOR, gap_structure, residual_rule

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


def _prior_cells(template, prior: dict, rng: np.random.Generator, latent: dict | None = None):
    """(truth, cells): a data set drawn from the prior predictive on the design of ``template``.

    Each cell's mean and within sum of squares are drawn as those of its ``n`` Normal rows would be
    (the mean Normal with variance sd^2 / n, the sum of squares sd^2 chi-square(n - 1)).
    """
    truth, mean, sd = _draw_prior(template, prior, rng, latent)
    n = template.n
    ybar = mean + sd / np.sqrt(np.maximum(n, 1.0)) * rng.standard_normal(n.shape)
    ss = sd**2 * rng.chisquare(np.maximum(n - 1.0, 1.0)) * (n > 1)
    cells = dataclasses.replace(
        template,
        sum_y=n * ybar,
        sum_y2=ss + n * ybar**2,
        ss=ss,
        outcome_mean=prior["location"],
        outcome_sd=prior["sd"],
    )
    return truth, cells


def _treat_by_adopter(cells) -> np.ndarray:
    from ..model.terms import design_data

    return design_data(cells)["treat_by_adopter"]


def _sbc_rep(task: RepTask) -> dict:
    from ..sample import diagnose, fit_cells

    cs = _scenario(task.scenario)
    data_seed, sampler_seed = task.seeds
    rng = np.random.default_rng(data_seed)
    frame, truth0 = _frame_of(cs, data_seed)
    template = _cells_of(frame, cs.scenario, truth0)  # the design (n per cell, starts) of this rep
    truth, cells = _prior_cells(template, task.sbc_prior, rng)
    fit = fit_cells(cells, task.sbc_prior["scales"], _settings(task, sampler_seed))
    row = {
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "divergences": fit.diagnostics.get("divergences"),
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "sample_s": fit.timing["sample_s"],
        "compile_s": fit.timing["compile_s"],
    }
    for name in SBC_PARAMETERS:
        if name not in truth:
            continue
        d = fit.draws(name).ravel()
        keep = d[np.linspace(0, d.size - 1, SBC_DRAWS).round().astype(int)]
        row[f"{name}_truth"] = truth[name]
        row[f"{name}_rank"] = int(np.sum(keep < truth[name]))
        # bulk ESS of this parameter: below SBC_DRAWS the ranked draws are autocorrelated, which
        # spreads the ranks out (Talts et al. 2018, section 5.1) even when the posterior is right
        row[f"{name}_ess"] = diagnose(fit.tree, var_names=[name])["ess_bulk_min"]
    return row


def sbc_prior(scenario: str, base_seed: int) -> dict:
    """The prior the SBC reps draw from: default scales of a pilot data set, fixed for every rep."""
    from ..model.terms import resolve_scales
    from ..study import PriorScales

    cs = _scenario(scenario)
    frame, truth = _frame_of(cs, int(base_seed))
    cells = _cells_of(frame, cs.scenario, truth)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    return {"scales": scales, "location": float(cells.outcome_mean), "sd": float(cells.outcome_sd)}


# ---- executors -------------------------------------------------------------------------------------
