"""Gaussian family on exactly collapsed cells.

Given the shock s[j,t] and the gap noise e[j,t], the rows of cell c are iid Normal(mu_c, sigma_g^2),
and their density factorises into a within-cell part (depends on ``ss``, ``n``) and the density of
the cell mean, Normal(ybar_c | mu_c, sigma_g^2 / n_c). Because s and e enter only through the cell
means and are Gaussian, they are integrated out exactly: per jurisdiction-period the pair of cell
means (reference r, target q) is bivariate normal with

    mean  (m_r, m_q)
    cov   [[sigma_r^2/n_r + sigma_s^2,  sigma_s^2                            ],
           [sigma_s^2,                  sigma_q^2/n_q + sigma_s^2 + sigma_gap^2]]

(for a DiD, one cell per jurisdiction-period with variance sigma^2/n + sigma_gap^2). This is the
same model as DESIGN.md writes it, with the two latent J x T fields marginalised; the posterior of
every other parameter is unchanged, and sampling no longer meets the funnel that non-centred latent
fields form when cells are large. A missing cell drops out of the pair.

:func:`jt_loglik` is written once against an array namespace, so the same code evaluates on numpy
(tests, log-likelihood of draws) and on PyTensor (the model).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from ..cells import Cells
from .terms import hierarchical_mean

__all__ = ["build_gaussian", "jt_loglik", "cell_arrays", "NP", "PT"]

LOG2PI = float(np.log(2 * np.pi))

NP = SimpleNamespace(log=np.log)
PT = SimpleNamespace(log=pt.log)


def _lognorm(d, v, xp):
    return -0.5 * (LOG2PI + xp.log(v)) - 0.5 * d * d / v


def jt_loglik(d, *, m_r, m_q, sigma_r, sigma_q, sigma_shock, sigma_gap, xp=NP):
    """Log density of the rows of one jurisdiction-period, shock and gap noise integrated out.

    ``d`` holds per (j, t) the arrays of :func:`cell_arrays`: cell means ``ybar_r, ybar_q``,
    presence ``p_r, p_q`` (0 for an empty cell), ``inv_n`` = 1/max(n, 1), ``nm1`` = max(n - 1, 0),
    ``logn`` = log max(n, 1), within sums of squares ``ss`` and the weight ``w`` (0 drops the pair).

    The pair density is factorised as p(ybar_r) p(ybar_q | ybar_r), which stays exact, and free of
    branches, when either cell is empty: an empty reference cell sets the regression weight k to 0.
    For a DiD the single cell is ``q``, ``p_r = 0`` and ``sigma_shock = 0``.
    """
    s2 = sigma_shock**2
    A = sigma_r**2 * d["inv_n_r"] + s2
    C = sigma_q**2 * d["inv_n_q"] + s2 + sigma_gap**2
    dr = d["ybar_r"] - m_r
    dq = d["ybar_q"] - m_q
    k = d["p_r"] * s2 / A
    means = d["p_r"] * _lognorm(dr, A, xp) + d["p_q"] * _lognorm(dq - k * dr, C - k * s2, xp)
    within = (-0.5 * d["nm1_r"] * (LOG2PI + 2.0 * xp.log(sigma_r)) - 0.5 * d["logn_r"]
              - 0.5 * d["ss_r"] / sigma_r**2
              - 0.5 * d["nm1_q"] * (LOG2PI + 2.0 * xp.log(sigma_q)) - 0.5 * d["logn_q"]
              - 0.5 * d["ss_q"] / sigma_q**2)
    return d["w"] * (means + within)


DATA_KEYS = ("ybar_r", "p_r", "inv_n_r", "nm1_r", "logn_r", "ss_r",
             "p_q", "inv_n_q", "nm1_q", "logn_q", "ss_q", "w")
#: Per (jurisdiction, period) covariate arrays of each side: cell means of the centred covariates
#: (J, T, K), within-cell cross-products Wxx (J, T, K, K) and Wxy (J, T, K).
COV_KEYS = ("xbar_r", "wxx_r", "wxy_r", "xbar_q", "wxx_q", "wxy_q")


def covariate_adjusted(d: dict, theta, ybar_q=None) -> dict:
    """The arrays of :func:`jt_loglik` for ``u = y - x~' theta`` instead of ``y`` (exact).

    Per cell ``ubar = ybar - xbar' theta`` and ``SS_u = SS_y - 2 theta' Wxy + theta' Wxx theta``
    (see :mod:`bayesdid.model.covariates`). ``theta`` is (K,) or, for draws, (S, 1, 1, K): it
    broadcasts against the (J, T, K) arrays. Works on numpy and PyTensor alike.
    """
    out = dict(d)
    if ybar_q is not None:
        out["ybar_q"] = ybar_q
    th_col, th_row = theta[..., :, None], theta[..., None, :]
    for tag in ("r", "q"):
        out[f"ybar_{tag}"] = out[f"ybar_{tag}"] - (d[f"xbar_{tag}"] * theta).sum(axis=-1)
        out[f"ss_{tag}"] = (d[f"ss_{tag}"] - 2.0 * (d[f"wxy_{tag}"] * theta).sum(axis=-1)
                            + (d[f"wxx_{tag}"] * th_col * th_row).sum(axis=(-1, -2)))
    return out


def cell_arrays(cells: Cells) -> dict[str, np.ndarray]:
    """Per (jurisdiction, period) arrays for :func:`jt_loglik` (reference r, target q)."""
    mean = np.nan_to_num(cells.mean)

    def side(g, tag):
        n = cells.n[:, g]
        return {f"ybar_{tag}": mean[:, g], f"p_{tag}": (n > 0).astype(float),
                f"inv_n_{tag}": 1.0 / np.maximum(n, 1.0), f"nm1_{tag}": np.maximum(n - 1.0, 0.0),
                f"logn_{tag}": np.log(np.maximum(n, 1.0)), f"ss_{tag}": cells.ss[:, g]}

    out = side(cells.target, "q")
    out["w"] = cells.jt_weight()
    if cells.design == "DDD":
        out.update(side(cells.reference, "r"))
    else:
        z = np.zeros_like(out["p_q"])
        out.update({"ybar_r": z, "p_r": z, "inv_n_r": z + 1.0, "nm1_r": z, "logn_r": z, "ss_r": z})
    cov = cells.extra.get("covariates")
    if cov is not None and "sx" in cov:
        safe = np.maximum(cells.n, 1.0)[..., None]

        def cside(g, tag):
            return {f"xbar_{tag}": cov["sx"][:, g] / safe[:, g], f"wxx_{tag}": cov["wxx"][:, g],
                    f"wxy_{tag}": cov["wxy"][:, g]}

        out.update(cside(cells.target, "q"))
        if cells.design == "DDD":
            out.update(cside(cells.reference, "r"))
        else:
            out.update({k.replace("_q", "_r"): np.zeros_like(v) for k, v in cside(cells.target, "q").items()})
    return out


def n_covariates(cells: Cells) -> int:
    cov = cells.extra.get("covariates")
    return 0 if cov is None else len(cov["names"])


def build_gaussian(cells: Cells, scales: dict[str, float], coords: dict, **terms) -> pm.Model:
    """The Gaussian model; ``terms`` go to :func:`~bayesdid.model.terms.hierarchical_mean`."""
    J, G, T = cells.shape
    arr = cell_arrays(cells)
    K = n_covariates(cells)
    keys = DATA_KEYS
    if K:
        coords = {**coords, "covariate": list(cells.extra["covariates"]["names"])}
    with pm.Model(coords=coords, check_bounds=False) as model:
        m, S = hierarchical_mean(cells, scales, **terms)
        dims = ("jurisdiction", "period")
        d = [pm.Data(k, arr[k], dims=dims) for k in keys]
        extra = [pm.Normal("theta", 0.0, S["covariate"], dims=("covariate",))] if K else []
        # (J, T, K[, K]) covariate arrays enter the density through the closure, not as parameters
        # of the (J, T) observed variable (their extra dims are not batch dims).
        cov_data = {k: pm.Data(k, arr[k]) for k in COV_KEYS} if K else {}
        obs = pm.Data("ybar_q", arr["ybar_q"], dims=dims)
        sigma = pm.HalfNormal("sigma", S["residual"], dims=("group",))
        sigma_gap = pm.HalfNormal("sigma_gap", S["gap_noise"])
        if cells.design == "DDD":
            sigma_shock = pm.HalfNormal("sigma_shock", S["shock_spread"])
            # Adopters' own jurisdiction-period shocks are not shrunk toward the comparisons'
            # (their reference group identifies them, as the triple difference intends): they
            # get the wide period-effect prior. The target group's gap noise stays pooled.
            ia = S["is_adopter"][:, None]
            sigma_shock = ia * S["period"] + (1.0 - ia) * sigma_shock
            m_r, sig_r = m[:, cells.reference, :], sigma[cells.reference]
        else:
            sigma_shock = pt.as_tensor(0.0)
            m_r, sig_r = pt.zeros((J, T)), pt.as_tensor(1.0)
        m_q, sig_q = m[:, cells.target, :], sigma[cells.target]

        def logp(value, m_r, m_q, sig_r, sig_q, sigma_shock, sigma_gap, *rest):
            data = rest[len(extra):]
            dd = dict(zip(keys, data))
            dd["ybar_q"] = value
            if K:
                dd = covariate_adjusted({**dd, **cov_data}, rest[0])
            return jt_loglik(dd, m_r=m_r, m_q=m_q, sigma_r=sig_r, sigma_q=sig_q,
                             sigma_shock=sigma_shock, sigma_gap=sigma_gap, xp=PT)

        pm.CustomDist("cells", m_r, m_q, sig_r, sig_q, sigma_shock, sigma_gap, *extra, *d,
                      logp=logp, observed=obs, dims=dims)
    return model


def pointwise_loglik(fit, m: np.ndarray | None = None) -> np.ndarray:
    """Log-likelihood of each jurisdiction-period for every draw: shape (S, J, T)."""
    from .terms import mean_from_draws

    cells = fit.cells
    m = mean_from_draws(fit) if m is None else m
    arr = cell_arrays(cells)
    sigma = fit.draws("sigma")  # (S, G)
    S = sigma.shape[0]
    sg = fit.draws("sigma_gap")[:, None, None]
    if cells.design == "DDD":
        r = cells.reference
        m_r, sig_r = m[:, :, r, :], sigma[:, r][:, None, None]
        ia = (cells.start < cells.shape[2]).astype(float)[None, :, None]
        ss = ia * fit.scales["period"] + (1.0 - ia) * fit.draws("sigma_shock")[:, None, None]
    else:
        m_r, sig_r, ss = np.zeros((S, 1, 1)), np.ones((S, 1, 1)), np.zeros((S, 1, 1))
    q = cells.target
    if n_covariates(cells):
        arr = covariate_adjusted(arr, fit.draws("theta")[:, None, None, :])
    return jt_loglik(arr, m_r=m_r, m_q=m[:, :, q, :], sigma_r=sig_r, sigma_q=sigma[:, q][:, None, None],
                     sigma_shock=ss, sigma_gap=sg, xp=NP)
