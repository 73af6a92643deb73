"""Posterior predictive pre-trend check of the adopters' target-minus-reference gap.

Fit: the main model on pre-policy data only: each adopter's jurisdiction-periods from its own start
on get likelihood weight 0 (see :func:`bayesdid.checks.base.pre_weight`; comparison jurisdictions are
never treated and keep all periods), which re-samples the main model's compiled form. Each
adopter's path runs over its own pre-periods (t < start_j).

Replicated data, per posterior draw (numpy; the Gaussian model integrates the shock s and the gap
noise e out, so they are drawn back here), for adopter j and pre-period t:

    y_rep[j,r,t] = m[j,r,t] + s + eps_r,            s ~ N(0, sigma_shock^2), eps_r ~ N(0, sigma_r^2 / n_r)
    y_rep[j,q,t] = m[j,q,t] + s + e + eps_q,        e ~ N(0, sigma_gap_j^2), eps_q ~ N(0, sigma_q^2 / n_q)

(with persistent gap noise, e is drawn as the fitted AR(1) path over the pre-periods, correlation
rho per period apart)    gap_rep[j,t] = y_rep[j,q,t] - y_rep[j,r,t]

(for a DiD the gap is the cell mean itself, gap = m + e + eps, without s). For binomial and count
families the gap is read on the link scale (log rate or log odds of each cell, with a half added to
events and non-events) and replicated from the family's own sampling model
(:func:`bayesdid.model.families.replicate_gap_path`). With the expected gap
mg[j,t] = m[j,q,t] - m[j,r,t] of the same draw, the residual paths are r_obs = gap_obs - mg and
r_rep = gap_rep - mg, and the statistics are

* slope:  OLS slope of r over the pre-period index (per adopter; combined: the ATT-weighted mean);
* max deviation:  max_t |r_t| (combined: the largest over adopters).

Posterior predictive p-value: p = P(T(r_rep) >= T(r_obs)). Status "flag" when either p < 0.05 or
p > 0.95 (the rule of the issue; for the slope both tails mean a drift the model does not expect).

Table ``pretrend_band.csv`` columns: ``adopter``, ``period`` (label), ``period_index``,
``event_time`` (t - start of the adopter), ``observed_gap``, ``expected_gap`` (posterior mean of
mg), ``band_median``, ``band_lower_90``, ``band_upper_90`` (quantiles 0.5, 0.05, 0.95 of gap_rep).
Table ``pretrend_stats.csv``: ``adopter`` (or "combined"), ``statistic`` ("slope", "max_deviation"),
``observed_mean`` (posterior mean of T(r_obs)), ``replicated_lower_90``, ``replicated_upper_90``,
``p_value``.
"""

from __future__ import annotations

import numpy as np

from ..cells import Cells
from ..model.twins import replicate_gaps
from ..sample import fit_cells
from ..study import SamplerSettings
from .base import CheckResult, earliest_start, effect_weights, frame, not_applicable, plain, pre_weight, reseed

__all__ = ["pretrend_check", "fit_pre_policy", "replicate_gaps", "slope", "P_LOW", "P_HIGH"]

NAME = "pretrend"
P_LOW, P_HIGH = 0.05, 0.95
MIN_PRE = 3


def fit_pre_policy(cells: Cells, scales: dict, settings: SamplerSettings, *, family: str = "gaussian"):
    """The main model fitted on the periods before the earliest start only."""
    return fit_cells(cells.with_weight(pre_weight(cells)), scales, reseed(settings, 1), family=family)


def slope(x: np.ndarray, r: np.ndarray) -> np.ndarray:
    """OLS slope of r (..., n) on x (n,) along the last axis."""
    xc = x - x.mean()
    return (r * xc).sum(axis=-1) / (xc * xc).sum()


def _pvals(obs, rep):
    return float(np.mean(rep >= obs))


def pretrend_check(
    cells: Cells,
    scales: dict,
    settings: SamplerSettings,
    *,
    family: str = "gaussian",
    fit=None,
    seed: int | None = None,
) -> CheckResult:
    """Posterior predictive check of the adopters' pre-period gap path (see module docstring)."""
    thr = {
        "p_low": P_LOW,
        "p_high": P_HIGH,
        "statistics": ["slope", "max_deviation"],
        "rule": "flag when a posterior predictive p-value is below 0.05 or above 0.95",
        "fit": "policy-free data only (each adopter's periods from its start on get weight 0)",
    }
    t0 = earliest_start(cells)
    both = cells.n[:, cells.target, :] > 0
    if cells.design == "DDD":
        both = both & (cells.n[:, cells.reference, :] > 0)
    paths = {}
    for j in cells.adopters:
        per = np.flatnonzero(both[j, : cells.start[j]])
        if len(per) >= MIN_PRE:
            paths[int(j)] = per
    if not paths:
        return not_applicable(
            NAME,
            f"no adopter has {MIN_PRE} or more observed pre-periods (target and "
            f"reference cells) before its start; a slope needs at least {MIN_PRE}.",
            thr,
        )
    fit = fit or fit_pre_policy(cells, scales, settings, family=family)
    rng = np.random.default_rng(settings.seed + 7 if seed is None else seed)
    w_all = effect_weights(cells)
    band_rows, stat_rows, per_adopter = [], [], []
    slopes_obs, slopes_rep, dev_obs, dev_rep, weights = [], [], [], [], []
    for a, j in enumerate(cells.adopters):
        if int(j) not in paths:
            continue
        per = paths[int(j)]
        obs, exp_, rep = replicate_gaps(fit, j, per, rng)
        r_obs = obs[None, :] - exp_
        r_rep = rep - exp_
        x = per.astype(float)
        so, sr = slope(x, r_obs), slope(x, r_rep)
        do, dr = np.abs(r_obs).max(axis=1), np.abs(r_rep).max(axis=1)
        slopes_obs.append(so), slopes_rep.append(sr), dev_obs.append(do), dev_rep.append(dr)
        weights.append(w_all[a] if w_all.sum() > 0 else 1.0)
        name = cells.jurisdictions[j]
        lo, med, hi = np.quantile(rep, [0.05, 0.5, 0.95], axis=0)
        for i, t in enumerate(per):
            band_rows.append(
                {
                    "adopter": name,
                    "period": plain(cells.periods[t]),
                    "period_index": int(t),
                    "event_time": int(t - cells.start[j]),
                    "observed_gap": float(obs[i]),
                    "expected_gap": float(exp_[:, i].mean()),
                    "band_median": float(med[i]),
                    "band_lower_90": float(lo[i]),
                    "band_upper_90": float(hi[i]),
                }
            )
        ps, pd_ = _pvals(so, sr), _pvals(do, dr)
        per_adopter.append(
            {
                "adopter": name,
                "pre_periods": len(per),
                "p_slope": ps,
                "p_max_deviation": pd_,
                "observed_slope": float(so.mean()),
                "observed_max_deviation": float(do.mean()),
            }
        )
        for stat, o, r_, p in (("slope", so, sr, ps), ("max_deviation", do, dr, pd_)):
            lo_, hi_ = np.quantile(r_, [0.05, 0.95])
            stat_rows.append(
                {
                    "adopter": name,
                    "statistic": stat,
                    "observed_mean": float(o.mean()),
                    "replicated_lower_90": float(lo_),
                    "replicated_upper_90": float(hi_),
                    "p_value": p,
                }
            )
    w = np.asarray(weights, dtype=float)
    w = w / w.sum() if w.sum() > 0 else np.full(len(w), 1.0 / len(w))
    so = np.tensordot(w, np.asarray(slopes_obs), axes=1)
    sr = np.tensordot(w, np.asarray(slopes_rep), axes=1)
    do, dr = np.max(dev_obs, axis=0), np.max(dev_rep, axis=0)
    p_slope, p_dev = _pvals(so, sr), _pvals(do, dr)
    for stat, o, r_, p in (("slope", so, sr, p_slope), ("max_deviation", do, dr, p_dev)):
        lo_, hi_ = np.quantile(r_, [0.05, 0.95])
        stat_rows.append(
            {
                "adopter": "combined",
                "statistic": stat,
                "observed_mean": float(o.mean()),
                "replicated_lower_90": float(lo_),
                "replicated_upper_90": float(hi_),
                "p_value": p,
            }
        )
    offenders = []
    for stat, p in (("slope", p_slope), ("max_deviation", p_dev)):
        if p < P_LOW or p > P_HIGH:
            offenders.append({"statistic": stat, "p_value": p})
    for row in per_adopter:
        for stat in ("slope", "max_deviation"):
            p = row[f"p_{stat}"]
            if (p < P_LOW or p > P_HIGH) and len(per_adopter) > 1:
                offenders.append({"adopter": row["adopter"], "statistic": stat, "p_value": p})
    flag = any("adopter" not in o for o in offenders)
    details = {
        "p_value_slope": p_slope,
        "p_value_max_deviation": p_dev,
        "observed_slope": float(so.mean()),
        "per_adopter": per_adopter,
        "earliest_start": plain(cells.periods[t0]),
        "diagnostics_ok": fit.diagnostics["ok"],
    }
    txt = f"posterior predictive p-values: slope of the gap {p_slope:.3f}, largest deviation {p_dev:.3f}"
    if flag:
        which = " and ".join(o["statistic"].replace("_", " ") for o in offenders if "adopter" not in o)
        reason = (
            f"{txt}; the adopters' pre-policy gap path is unusual under the model ({which} outside "
            f"[{P_LOW}, {P_HIGH}]): the gap may have drifted before the policy."
        )
    else:
        reason = f"{txt}; the adopters' pre-policy gap path is within what the model expects."
    return CheckResult(
        NAME,
        "flag" if flag else "ok",
        reason,
        thr,
        offenders,
        details,
        {"pretrend_band": frame(band_rows), "pretrend_stats": frame(stat_rows)},
    )
