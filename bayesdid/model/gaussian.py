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

__all__ = ["build_gaussian", "jt_loglik", "jt_loglik_ar1", "cell_arrays", "NP", "PT"]

LOG2PI = float(np.log(2 * np.pi))

NP = SimpleNamespace(log=np.log, stack=np.stack, broadcast_to=np.broadcast_to)
PT = SimpleNamespace(log=pt.log, stack=pt.stack, broadcast_to=pt.broadcast_to)


def _lognorm(d, v, xp):
    return -0.5 * (LOG2PI + xp.log(v)) - 0.5 * d * d / v


def jt_loglik(d, *, m_r, m_q, sigma_r, sigma_q, sigma_shock, sigma_gap, xp=NP, within=True):
    """Log density of the rows of one jurisdiction-period, shock and gap noise integrated out.

    ``d`` holds per (j, t) the arrays of :func:`cell_arrays`: cell means ``ybar_r, ybar_q``,
    presence ``p_r, p_q`` (0 for an empty cell), ``inv_n`` = 1/max(n, 1), ``nm1`` = max(n - 1, 0),
    ``logn`` = log max(n, 1), within sums of squares ``ss`` and the weight ``w`` (0 drops the pair).

    The pair density is factorised as p(ybar_r) p(ybar_q | ybar_r), which stays exact, and free of
    branches, when either cell is empty: an empty reference cell sets the regression weight k to 0.
    For a DiD the single cell is ``q``, ``p_r = 0`` and ``sigma_shock = 0``.

    ``within=False`` (with ``sigma_r = sigma_q = 0``) is the model without a separate residual sd
    (:func:`bayesdid.model.structure.residual_rule`): the density of the cell means alone, the
    rows' own noise absorbed into the gap noise and the shock.
    """
    s2 = sigma_shock**2
    A = sigma_r**2 * d["inv_n_r"] + s2
    dr = d["ybar_r"] - m_r
    dq = d["ybar_q"] - m_q
    k = d["p_r"] * s2 / A
    # C - k s2 written as V + sigma_gap^2, V the part of it that is not gap noise (the AR(1) form
    # below adds the gap noise's predictive variance to the same V, so rho = 0 is bit-identical)
    V = sigma_q**2 * d["inv_n_q"] + (s2 - k * s2)
    means = d["p_r"] * _lognorm(dr, A, xp) + d["p_q"] * _lognorm(dq - k * dr, V + sigma_gap**2, xp)
    if not within:  # no separate residual sd: the cell means alone (see residual_rule)
        return d["w"] * means
    within = (
        -0.5 * d["nm1_r"] * (LOG2PI + 2.0 * xp.log(sigma_r))
        - 0.5 * d["logn_r"]
        - 0.5 * d["ss_r"] / sigma_r**2
        - 0.5 * d["nm1_q"] * (LOG2PI + 2.0 * xp.log(sigma_q))
        - 0.5 * d["logn_q"]
        - 0.5 * d["ss_q"] / sigma_q**2
    )
    return d["w"] * (means + within)


def jt_loglik_ar1(d, *, m_r, m_q, sigma_r, sigma_q, sigma_shock, sigma_gap, rho, xp=NP, within=True, n_periods=None):
    """As :func:`jt_loglik`, with the gap noise a stationary AR(1) over periods in each jurisdiction.

    Per jurisdiction, the reference cells' means are independent over periods (the shared shock is
    independent), so the pair density still factorises as p(ybar_r) p(ybar_q | ybar_r) per period,
    and given the reference means the target side is ``y~[t] = dq - k dr = e[t] + v[t]``, with
    ``v[t] ~ Normal(0, V[t])`` independent (``V = sigma_q^2/n_q + s2 - k s2``) and e the AR(1):
    a scalar linear-Gaussian state-space model. Its exact log density is evaluated by the Kalman
    filter over periods (vectorised across jurisdictions), as the sum over t of the one-step
    predictive densities ``Normal(y~[t] | a[t], P[t] + V[t])``: the value returned for (j, t) is that
    period's term, and the sum over t is the jurisdiction's joint log density.

    A jurisdiction-period that is empty on the target side or has weight 0 gives no term and no
    update: the state is propagated through it (``a -> rho a``, ``P -> rho^2 P + sigma_gap^2 (1 - rho^2)``),
    which is exactly the marginal over the missing cell. Weights must be 0 or 1.

    ``n_periods`` is T (needed on PyTensor, where the data's shapes are symbolic).
    ``rho`` and ``sigma_gap`` broadcast against the (..., J, T) arrays like the other parameters.
    With rho = 0 the terms equal :func:`jt_loglik`'s bit for bit.
    """
    s2 = sigma_shock**2
    A = sigma_r**2 * d["inv_n_r"] + s2
    dr = d["ybar_r"] - m_r
    dq = d["ybar_q"] - m_q
    k = d["p_r"] * s2 / A
    V = sigma_q**2 * d["inv_n_q"] + (s2 - k * s2)
    y = dq - k * dr
    shape = (y + 0.0 * V).shape if xp is NP else None
    if xp is NP:
        y, V = np.broadcast_to(y, shape), np.broadcast_to(V, shape)
        o = np.broadcast_to(d["p_q"] * d["w"], shape)
        sg2 = np.broadcast_to(sigma_gap**2, shape)
        r = np.broadcast_to(rho, shape)
    else:
        y, V = y + 0.0 * V, V + 0.0 * y
        o = d["p_q"] * d["w"] + 0.0 * y
        sg2 = sigma_gap**2 + 0.0 * y
        r = rho + 0.0 * y
    T = d["ybar_q"].shape[-1] if n_periods is None else int(n_periods)
    terms = []
    a = None
    P = sg2[..., 0]
    for t in range(T):
        if t:
            rt = r[..., t]
            a = rt * a
            P = (rt * rt) * P + sg2[..., t] * (1.0 - rt * rt)
        F = P + V[..., t]
        innov = y[..., t] if a is None else y[..., t] - a
        terms.append(_lognorm(innov, F, xp))
        gain = o[..., t] * P / F
        a = gain * innov if a is None else a + gain * innov
        P = P - gain * P
    ln_q = xp.stack(terms, axis=-1)
    means = d["p_r"] * _lognorm(dr, A, xp) + d["p_q"] * ln_q
    if not within:  # no separate residual sd: the cell means alone (see residual_rule)
        return d["w"] * means
    within = (
        -0.5 * d["nm1_r"] * (LOG2PI + 2.0 * xp.log(sigma_r))
        - 0.5 * d["logn_r"]
        - 0.5 * d["ss_r"] / sigma_r**2
        - 0.5 * d["nm1_q"] * (LOG2PI + 2.0 * xp.log(sigma_q))
        - 0.5 * d["logn_q"]
        - 0.5 * d["ss_q"] / sigma_q**2
    )
    return d["w"] * (means + within)


def ar1_smoothing_draws(y, V, o, sigma_gap2, rho, z):
    """Draws of the AR(1) gap noise e given ``y = e + v`` (forward filter, backward sampling; numpy).

    ``y``, ``V`` (the variance of v), ``o`` (1 where observed) have shape (S, J, T); ``sigma_gap2``
    and ``rho`` broadcast against them, shape (S, 1, 1); ``z`` holds (S, J, T) standard normals. With
    rho = 0 this is the independent per-cell conditional. Carter and Kohn (1994), Biometrika 81(3).
    """
    S_, J_, T = y.shape
    sg2 = np.broadcast_to(sigma_gap2, y.shape)[..., 0]
    r = np.broadcast_to(rho, y.shape)[..., 0]
    af, Pf, Pp = np.zeros(y.shape), np.zeros(y.shape), np.zeros(y.shape)
    a, P = np.zeros(y.shape[:-1]), sg2.copy()
    for t in range(T):
        if t:
            a, P = r * a, r * r * P + sg2 * (1.0 - r * r)
        Pp[..., t] = P
        gain = o[..., t] * P / (P + V[..., t])
        a = a + gain * (y[..., t] - a)
        P = P - gain * P
        af[..., t], Pf[..., t] = a, P
    e = np.zeros(y.shape)
    e[..., T - 1] = af[..., T - 1] + np.sqrt(np.maximum(Pf[..., T - 1], 0.0)) * z[..., T - 1]
    for t in range(T - 2, -1, -1):
        g = Pf[..., t] * r / Pp[..., t + 1]
        mean = af[..., t] + g * (e[..., t + 1] - r * af[..., t])
        var = np.maximum(Pf[..., t] - g * r * Pf[..., t], 0.0)
        e[..., t] = mean + np.sqrt(var) * z[..., t]
    return e


DATA_KEYS = ("ybar_r", "p_r", "inv_n_r", "nm1_r", "logn_r", "ss_r", "p_q", "inv_n_q", "nm1_q", "logn_q", "ss_q", "w")
#: Per (jurisdiction, period) covariate arrays of each side: cell means of the centred covariates
#: (J, T, K), within-cell cross-products Wxx (J, T, K, K) and Wxy (J, T, K).
COV_KEYS = ("xbar_r", "wxx_r", "wxy_r", "xbar_q", "wxx_q", "wxy_q")


def covariate_adjusted(d: dict, theta, ybar_q=None) -> dict:
    """The arrays of :func:`jt_loglik` for ``u = y - x~' theta`` instead of ``y`` (exact).

    Per cell ``ubar = ybar - xbar' theta`` and ``SS_u = SS_y - 2 theta' Wxy + theta' Wxx theta``
    (see :mod:`bayesdid.covariates`). ``theta`` is (K,) or, for draws, (S, 1, 1, K): it
    broadcasts against the (J, T, K) arrays. Works on numpy and PyTensor alike.
    """
    out = dict(d)
    if ybar_q is not None:
        out["ybar_q"] = ybar_q
    th_col, th_row = theta[..., :, None], theta[..., None, :]
    for tag in ("r", "q"):
        out[f"ybar_{tag}"] = out[f"ybar_{tag}"] - (d[f"xbar_{tag}"] * theta).sum(axis=-1)
        out[f"ss_{tag}"] = (
            d[f"ss_{tag}"]
            - 2.0 * (d[f"wxy_{tag}"] * theta).sum(axis=-1)
            + (d[f"wxx_{tag}"] * th_col * th_row).sum(axis=(-1, -2))
        )
    return out


def cell_arrays(cells: Cells) -> dict[str, np.ndarray]:
    """Per (jurisdiction, period) arrays for :func:`jt_loglik` (reference r, target q)."""
    mean = np.nan_to_num(cells.mean)

    def side(g, tag):
        n = cells.n[:, g]
        return {
            f"ybar_{tag}": mean[:, g],
            f"p_{tag}": (n > 0).astype(float),
            f"inv_n_{tag}": 1.0 / np.maximum(n, 1.0),
            f"nm1_{tag}": np.maximum(n - 1.0, 0.0),
            f"logn_{tag}": np.log(np.maximum(n, 1.0)),
            f"ss_{tag}": cells.ss[:, g],
        }

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
            return {
                f"xbar_{tag}": cov["sx"][:, g] / safe[:, g],
                f"wxx_{tag}": cov["wxx"][:, g],
                f"wxy_{tag}": cov["wxy"][:, g],
            }

        out.update(cside(cells.target, "q"))
        if cells.design == "DDD":
            out.update(cside(cells.reference, "r"))
        else:
            out.update({k.replace("_q", "_r"): np.zeros_like(v) for k, v in cside(cells.target, "q").items()})
    return out


def n_covariates(cells: Cells) -> int:
    cov = cells.extra.get("covariates")
    return 0 if cov is None else len(cov["names"])


def build_gaussian(
    cells: Cells,
    scales: dict[str, float],
    coords: dict,
    *,
    gap: str = "independent",
    gap_scale: str = "shared",
    residual: bool = True,
    **terms,
) -> pm.Model:
    """The Gaussian model; ``terms`` go to :func:`~bayesdid.model.terms.hierarchical_mean`.

    ``gap`` is ``"persistent"`` (AR(1) gap noise over periods, :func:`jt_loglik_ar1`, with
    ``rho = 2 u - 1``, ``u ~ Beta(prior_rho_a, prior_rho_b)``) or ``"independent"`` (:func:`jt_loglik`);
    see :mod:`bayesdid.model.structure`. ``gap_scale="per_jurisdiction"`` gives each jurisdiction its
    own pooled gap-noise scale (``sigma_gap_j``, passed to the density as a (J, 1) column that broadcasts
    over periods). ``residual=False`` leaves out the residual sd (cells of one
    row: :func:`~bayesdid.model.structure.residual_rule`).
    """
    from .structure import RHO_PRIOR, gap_scale_terms

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
        sigma = pm.HalfNormal("sigma", S["residual"], dims=("group",)) if residual else pt.zeros((G,))
        _, sigma_gap_j = gap_scale_terms(S, gap_scale, J)
        sigma_gap = sigma_gap_j[:, None] if gap_scale == "per_jurisdiction" else sigma_gap_j
        if gap == "persistent":
            u = pm.Beta("rho_unit", pm.Data("prior_rho_a", RHO_PRIOR["a"]), pm.Data("prior_rho_b", RHO_PRIOR["b"]))
            extra.append(pm.Deterministic("rho", 2.0 * u - 1.0))
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
            data = rest[len(extra) :]
            dd = dict(zip(keys, data))
            dd["ybar_q"] = value
            if K:
                dd = covariate_adjusted({**dd, **cov_data}, rest[0])
            if gap == "persistent":
                return jt_loglik_ar1(
                    dd,
                    m_r=m_r,
                    m_q=m_q,
                    sigma_r=sig_r,
                    sigma_q=sig_q,
                    sigma_shock=sigma_shock,
                    sigma_gap=sigma_gap,
                    rho=rest[len(extra) - 1],
                    xp=PT,
                    n_periods=T,
                    within=residual,
                )
            return jt_loglik(
                dd,
                m_r=m_r,
                m_q=m_q,
                sigma_r=sig_r,
                sigma_q=sig_q,
                sigma_shock=sigma_shock,
                sigma_gap=sigma_gap,
                xp=PT,
                within=residual,
            )

        pm.CustomDist(
            "cells", m_r, m_q, sig_r, sig_q, sigma_shock, sigma_gap, *extra, *d, logp=logp, observed=obs, dims=dims
        )
    return model


def residual_draws(fit) -> np.ndarray:
    """Draws of the residual sd per group, (S, G); zeros when the model has none (residual_rule)."""
    if getattr(fit.spec, "residual", True):
        return fit.draws("sigma")
    return np.zeros((fit.draws("sigma_gap").shape[0], fit.cells.shape[1]))  # S from sigma_gap: always drawn


def pointwise_loglik(fit, m: np.ndarray | None = None) -> np.ndarray:
    """Log-likelihood of each jurisdiction-period for every draw: shape (S, J, T)."""
    from .structure import gap_scale_draws
    from .terms import mean_from_draws

    cells = fit.cells
    m = mean_from_draws(fit) if m is None else m
    arr = cell_arrays(cells)
    sigma = residual_draws(fit)  # (S, G)
    S = sigma.shape[0]
    sg = gap_scale_draws(fit)[:, :, None]  # (S, J, 1): each jurisdiction's scale
    if cells.design == "DDD":
        r = cells.reference
        m_r, sig_r = m[:, :, r, :], sigma[:, r][:, None, None]
        ia = (cells.start < cells.shape[2]).astype(float)[None, :, None]
        ss = ia * fit.scales["period"] + (1.0 - ia) * fit.draws("sigma_shock")[:, None, None]
    else:
        m_r, sig_r, ss = np.zeros((S, 1, 1)), np.ones((S, 1, 1)), np.zeros((S, 1, 1))
    q = cells.target
    own = getattr(fit.spec, "residual", True)
    if n_covariates(cells):
        arr = covariate_adjusted(arr, fit.draws("theta")[:, None, None, :])
    if getattr(fit.spec, "gap", "independent") == "persistent":
        return jt_loglik_ar1(
            arr,
            m_r=m_r,
            m_q=m[:, :, q, :],
            sigma_r=sig_r,
            sigma_q=sigma[:, q][:, None, None],
            sigma_shock=ss,
            sigma_gap=sg,
            rho=fit.draws("rho")[:, None, None],
            xp=NP,
            within=own,
        )
    return jt_loglik(
        arr,
        m_r=m_r,
        m_q=m[:, :, q, :],
        sigma_r=sig_r,
        sigma_q=sigma[:, q][:, None, None],
        sigma_shock=ss,
        sigma_gap=sg,
        xp=NP,
        within=own,
    )
