"""Simulated binary and count data with a known truth (tests, benchmarks, the count demo case).

The data-generating process is the non-Gaussian model of :mod:`bayesdid.model.families`:

    eta[j,g,t] = b[j,g] + a[t] + s[j,t] + h[t] [g = target] + e[j,t] [g = target] + tau D[j,g,t]
                 + x_i' theta

(e independent over periods, or a stationary AR(1) with ``gap_rho``)
with binomial (logit) or Poisson / cell-gamma negative binomial (log, exposure offset) rows. The
truth includes the natural-scale effects over the treated cells computed from the true linear
predictors with and without the policy, weighted by each record's trials or exposure. Nothing here
is real data.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import special

from .model.family import family_record
from .simulate import region_names

__all__ = ["CountScenario", "simulate_family"]


@dataclass
class CountScenario:
    """A simulated study of a binary or count outcome. ``starts``: adopter index -> start index."""

    family: str = "poisson"  # binomial, poisson or negbinomial
    jurisdictions: int = 20
    periods: int = 8
    groups: int = 2
    starts: dict = field(default_factory=lambda: {0: 4, 1: 5})
    rows_per_cell: int = 40
    tau: float = -0.2
    level: tuple = (-2.5, -2.0)  # link-scale mean level of reference, target
    baseline_sd: float = 0.3
    period_sd: float = 0.08
    shock_sd: float = 0.05
    group_period_sd: float = 0.03
    gap_sd: float = 0.03
    gap_rho: float = 0.0  # AR(1) correlation of the gap noise over periods within a region (marginal sd gap_sd)
    covariates: bool = True  # sex (2 levels) and risk band (3 levels), discrete
    theta: tuple = (0.25, 0.4, 0.9)  # sex = male, risk = mid, risk = high
    continuous: bool = False  # add a continuous covariate 'score' (coefficient 0.3)
    phi: float = 20.0  # negbinomial cell-level gamma shape
    exposure: tuple = (0.5, 1.5)  # uniform range of person-time per row (counts)
    trials: int = 1  # binomial trials per row (1 = a 0/1 outcome)
    pre_drift: float = 0.0  # adopters' target-group gap drifts by this per period before the start (0 at k = 0)
    gap_jump: dict = field(default_factory=dict)  # jurisdiction index -> jump of its gap from the earliest start on


def simulate_family(sc: CountScenario, seed: int, *, names: list[str] | None = None):
    """Rows from the scenario, and the truth (tau, natural-scale effects on the treated cells)."""
    rng = np.random.default_rng(seed)
    J, T, G = sc.jurisdictions, sc.periods, sc.groups
    names = names or region_names(J)
    tg = G - 1
    b = np.asarray(sc.level[-G:])[None, :] + sc.baseline_sd * rng.standard_normal((J, G))
    a = sc.period_sd * rng.standard_normal(T)
    s = sc.shock_sd * rng.standard_normal((J, T)) if G == 2 else np.zeros((J, T))
    h = sc.group_period_sd * rng.standard_normal(T)
    e = sc.gap_sd * rng.standard_normal((J, T))
    if sc.gap_rho:  # stationary AR(1) over periods from the same normals (rho = 0 leaves them as drawn)
        for t in range(1, T):
            e[:, t] = sc.gap_rho * e[:, t - 1] + np.sqrt(1.0 - sc.gap_rho**2) * e[:, t]
    eta0 = b[:, :, None] + a[None, None, :] + s[:, None, :]
    eta0[:, tg, :] += e
    if G == 2:
        eta0[:, tg, :] += h[None, :]
    D = np.zeros((J, G, T))
    for j, st in sc.starts.items():
        D[j, tg, st:] = 1.0
        if sc.pre_drift:
            k = np.arange(T) - st
            eta0[j, tg, :] += sc.pre_drift * np.minimum(k, 0)
    t0 = min(sc.starts.values()) if sc.starts else T
    for j, jump in sc.gap_jump.items():
        eta0[j, tg, t0:] += jump
    n = sc.rows_per_cell
    jj, gg, tt = np.meshgrid(np.arange(J), np.arange(G), np.arange(T), indexing="ij")
    jr, gr, tr = (np.repeat(v.ravel(), n) for v in (jj, gg, tt))
    R = jr.size
    lin = eta0[jr, gr, tr].copy()
    frame = {"region": np.asarray(names, dtype=object)[jr], "period": tr + 1}
    if G == 2:
        frame["group"] = np.where(gr == tg, "target", "reference")
    if sc.covariates:
        sex = rng.integers(0, 2, R)
        risk = rng.choice(3, R, p=[0.5, 0.3, 0.2])
        lin += sc.theta[0] * sex + sc.theta[1] * (risk == 1) + sc.theta[2] * (risk == 2)
        frame["sex"] = np.where(sex == 1, "male", "female")
        frame["risk"] = np.asarray(["low", "mid", "high"], dtype=object)[risk]
    if sc.continuous:
        score = rng.standard_normal(R)
        lin += 0.3 * score
        frame["score"] = score
    treat = D[jr, gr, tr]
    lin1 = lin + sc.tau * treat
    rec = family_record(sc.family)
    binomial = rec.size_role == "trials"  # successes of trials on the logit link; else counts on the log link
    if binomial:
        size = np.full(R, float(sc.trials))
        y = rng.binomial(sc.trials, special.expit(lin1)).astype(float)
        mean1, mean0 = special.expit(lin1), special.expit(lin)
    else:
        size = rng.uniform(*sc.exposure, R)
        mu = size * np.exp(lin1)
        if "dispersion" in rec.extra_priors:  # gamma-mixed Poisson (negative binomial) per cell
            u = rng.gamma(sc.phi, 1.0 / sc.phi, size=(J, G, T))
            mu = mu * u[jr, gr, tr]
        y = rng.poisson(mu).astype(float)
        mean1, mean0 = np.exp(lin1), np.exp(lin)
    frame["y"] = y
    if binomial:
        if sc.trials > 1:
            frame["trials"] = size
    else:
        frame["exposure"] = size
    t = treat > 0
    w = size[t]
    p1 = float(np.sum(w * mean1[t]) / w.sum())
    p0 = float(np.sum(w * mean0[t]) / w.sum())
    truth = {
        "tau": sc.tau,
        "starts": {names[j]: int(st) + 1 for j, st in sc.starts.items()},
        "rows": R,
        "treated_mean_with": p1,
        "treated_mean_without": p0,
    }
    if binomial:
        truth.update(risk_difference_pp=100 * (p1 - p0), risk_ratio=p1 / p0)
    else:
        truth.update(
            rate_ratio=p1 / p0,
            rate_difference_per_1000=1000 * (p1 - p0),
            events_averted=float(np.sum(w * (mean0[t] - mean1[t]))),
        )
    return pd.DataFrame(frame), truth
