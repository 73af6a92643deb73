"""Event-time effects: the policy's effect by event time k = t - start_j, adopters aligned.

Model: the shared terms of :mod:`bayesdid.model.terms` with ``effects="event_time"``:

    eta[j,g,t] = b[j,g] + s[j,t] + h[g,t] + e[j,g,t] + beta[k(j,t)] * 1{j adopter, g target}

with beta[-1] = 0 (reference: the last period before each adopter's start), one beta per other
event time observed in the data (leads k <= -2, lags k >= 0; bounded by the data, no binning) and,
optionally, partial pooling of the betas towards zero (``pooled=True``).

Leads are the pre-trend test. Reported: per k the posterior mean, 90% equal-tailed interval and
P(beta_k > 0); P(all leads within +-tolerance) and the largest lead (by |posterior mean|).

Status: "flag" when zero lies outside the 95% joint credible region of the leads, read as the
Wald-type region of their posterior: d^2 = mu' Sigma^-1 mu > chi2_{0.95}(n_leads), with mu and Sigma
the posterior mean and covariance of the leads (common practice; a joint reading keeps the false-flag
rate near 5% however many leads there are). Offenders: the leads whose own 95% interval excludes 0.
The status answers "is there evidence of a pre-trend?", not "are the leads shown to be small?": when it
is "ok" but P(all leads within +-tolerance) < 0.5, the reason says in words that the leads are too
imprecise to rule out a pre-trend as large as the tolerance (``leads_shown_small`` is false), so the
status and its sentence never read as a contradiction.

Table ``event_time.csv`` columns: ``event_time`` (k, int), ``role`` ("lead", "reference", "lag"),
``mean``, ``sd``, ``lower_90``, ``upper_90``, ``prob_gt_0`` (reference row: 0, 0, 0, 0, NaN),
``adopters`` (number of adopters observed at k).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..cells import Cells
from ..model.terms import event_times_of
from ..sample import fit_cells
from ..study import SamplerSettings
from .base import CheckResult, frame, interval_row, not_applicable

__all__ = ["event_time_check", "fit_event_time"]

NAME = "event_time"
JOINT_LEVEL = 0.95


def fit_event_time(
    cells: Cells, scales: dict, settings: SamplerSettings, *, pooled: bool = False, family: str = "gaussian"
):
    """Fit the event-time model (one compiled model per shape and set of event times)."""
    return fit_cells(
        cells,
        scales,
        settings,
        family=family,
        effects="event_time",
        event_times=event_times_of(cells),
        event_pooled=pooled,
    )


def event_time_check(
    cells: Cells,
    scales: dict,
    settings: SamplerSettings,
    *,
    tolerance: float,
    pooled: bool = False,
    family: str = "gaussian",
    fit=None,
) -> CheckResult:
    """Run the event-time model and judge its leads.

    Parameters
    ----------
    tolerance : float
        Leads within +-tolerance (model scale) count as "no pre-trend" in P(all leads within).
    pooled : bool
        Partially pool the event-time effects towards zero.
    fit : Fit, optional
        An event-time fit to read instead of fitting.
    """
    ks = event_times_of(cells)
    thr = {
        "joint_level": JOINT_LEVEL,
        "rule": "flag when 0 is outside the 95% joint credible region of the leads (d^2 > chi2 quantile)",
        "tolerance": float(tolerance),
        "reference_event_time": -1,
    }
    if not ks:
        return not_applicable(NAME, "the adopters have no event time other than the reference k = -1.", thr)
    fit = fit or fit_event_time(cells, scales, settings, pooled=pooled, family=family)
    beta = fit.draws("event_effect")  # (S, K)
    counts = {}
    for j in cells.adopters:
        for t in np.flatnonzero(cells.n[j, cells.target] > 0):
            k = int(t - cells.start[j])
            counts[k] = counts.get(k, 0) + 1
    rows = []
    for k in sorted(set(ks) | {-1}):
        if k == -1:
            rows.append(
                {
                    "event_time": -1,
                    "role": "reference",
                    "mean": 0.0,
                    "sd": 0.0,
                    "lower_90": 0.0,
                    "upper_90": 0.0,
                    "prob_gt_0": float("nan"),
                    "adopters": counts.get(-1, 0),
                }
            )
            continue
        i = ks.index(k)
        rows.append(
            {
                "event_time": k,
                "role": "lead" if k < -1 else "lag",
                **interval_row(beta[:, i]),
                "adopters": counts.get(k, 0),
            }
        )
    table = frame(rows)
    lead_idx = [i for i, k in enumerate(ks) if k < -1]
    details = {
        "event_times": list(ks),
        "pooled": bool(pooled),
        "diagnostics_ok": fit.diagnostics["ok"],
        "effects": rows,
    }
    if not lead_idx:
        r = CheckResult(
            NAME,
            "not applicable",
            "no lead (event time before -1) is observed, so the event "
            "study has no pre-trend test; the lags are reported.",
            thr,
            [],
            details,
            {"event_time": table},
        )
        return r
    leads = beta[:, lead_idx]
    within = np.all(np.abs(leads) <= tolerance, axis=1)
    mu = leads.mean(axis=0)
    cov = np.atleast_2d(np.cov(leads, rowvar=False))
    d2 = float(mu @ np.linalg.solve(cov, mu))
    crit = float(stats.chi2.ppf(JOINT_LEVEL, len(lead_idx)))
    big = int(np.argmax(np.abs(mu)))
    lo95, hi95 = np.quantile(leads, [0.025, 0.975], axis=0)
    offenders = [
        {"event_time": ks[lead_idx[i]], "mean": float(mu[i]), "eti_95": [float(lo95[i]), float(hi95[i])]}
        for i in range(len(lead_idx))
        if lo95[i] > 0 or hi95[i] < 0
    ]
    details.update(
        {
            "prob_all_leads_within_tolerance": float(within.mean()),
            "largest_lead": {"event_time": ks[lead_idx[big]], **interval_row(leads[:, big])},
            "joint_distance2": d2,
            "joint_critical": crit,
        }
    )
    thr["joint_critical"] = crit
    flag = d2 > crit
    small = bool(within.mean() >= 0.5)
    details["leads_shown_small"] = small
    tol_txt = f"P(all {len(lead_idx)} leads within +-{tolerance:.3g}) = {within.mean():.2f}"
    lg = details["largest_lead"]
    if flag:
        reason = (
            f"the leads are jointly away from zero (d^2 = {d2:.1f} > {crit:.1f}); the largest is "
            f"k = {lg['event_time']} with mean {lg['mean']:+.3g}: the gap moved before the policy. {tol_txt}."
        )
    elif small:
        reason = (
            f"the leads are jointly consistent with zero (d^2 = {d2:.1f} <= {crit:.1f}) and probably small: "
            f"{tol_txt}; the largest is k = {lg['event_time']} with mean {lg['mean']:+.3g}."
        )
    else:
        reason = (
            f"no evidence of a pre-trend: the leads are jointly consistent with zero (d^2 = {d2:.1f} <= "
            f"{crit:.1f}); the largest is k = {lg['event_time']} with mean {lg['mean']:+.3g}. But they are too "
            f"imprecise to show that a pre-trend is smaller than the tolerance: {tol_txt}, so one as large as "
            f"+-{tolerance:.3g} cannot be ruled out."
        )
    return CheckResult(NAME, "flag" if flag else "ok", reason, thr, offenders, details, {"event_time": table})
