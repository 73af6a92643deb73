"""Placebo checks: a fake start in time, and comparison jurisdictions as fake adopters in space.

Placebo in time. Each adopter's start moves L periods earlier (``[checks] placebo_lag``, default
half the pre-period before the earliest start, floor, at least 1) and the model is fitted on
pre-policy data only (each adopter's periods from its real start on get weight 0). The fake effect is the ATT of the fake treated cells that stay
in the likelihood, att = sum_a w_a tau[a] (w: their rows' share). Status "flag" when its 90%
equal-tailed interval excludes 0 (P(fake > 0) below 0.05 or above 0.95).
Table ``placebo_time.csv``: ``lag``, ``fake_start`` (label of the earliest fake start), ``mean``,
``sd``, ``lower_90``, ``upper_90``, ``prob_gt_0``.

Placebo in space. For each comparison jurisdiction c in turn: c takes the start of the first real
adopter, that adopter is set to never adopt, and every real adopter's jurisdiction-periods get
weight 0 (so the number of adopters, and the compiled model, stay the same: one compile, new data
for each placebo). The placebo effect is tau[c]. The real effect is the ATT of the main fit.
Statistic: the posterior mean. Rank: position of |real| among all |effects| (1 = most extreme);
permutation p-value p = (1 + #{placebos with |mean| >= |real mean|}) / (1 + N). A placebo whose |mean|
lies within 2 combined Monte Carlo standard errors of |real| is a tie (which is larger is not settled
by the draws); ``permutation_p_range`` gives p with none and with all ties counted, and the reason
says so when there are ties.
Status "flag" when more placebos have a 90% interval excluding 0 than Binomial(N, 0.10) gives with
probability 0.95 (the model is then over-confident about effects where none exist); offenders are
those placebos.
Table ``placebo_space.csv``: ``jurisdiction``, ``role`` ("placebo" or "real"), ``mean``, ``sd``,
``lower_90``, ``upper_90``, ``prob_gt_0``, ``rank`` (by |mean|, 1 = most extreme).

Shorter chains for the placebos in space: each placebo fit samples at most :data:`PLACEBO_DRAWS`
draws after at most as many tuning steps per chain (the study's chains and seed; its draws and tune
when they are smaller). A placebo is summarised by its posterior mean; the rank and the p-value move
only when a placebo's |mean| lies within Monte Carlo error of the real one. Measured on both demo
cases against the study's chains (copay_cap 2 x 2000 after 1000, nurse_line 2 x 3000 after 1000):
300 draws gave the same rank, p-value and count of intervals excluding 0 (nurse_line also with a
second seed and with 1000 draws); 200 draws moved copay_cap's rank by one, because two of its
placebos lie within 0.0011 of |real| (figures in DEVELOPERS.md). ``threshold`` records the draws and
tune used.
Each placebo fit keeps only the draws of ``tau_adopter`` (:func:`bayesdid.sample.sample_draws`): the
same draws as a full fit, without the ArviZ tree and the convergence diagnostics it never reads. Two
placebo fits run at a time, one thread each (:func:`bayesdid.sample.sample_draws_many`), with the same
draws as one by one.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import stats

from ..cells import Cells
from ..effects import summarize
from ..progress import Progress
from ..sample import fit_cells, sample_draws_many
from ..study import SamplerSettings
from .base import (
    CheckResult,
    earliest_start,
    effect_weights,
    frame,
    interval_row,
    not_applicable,
    plain,
    pre_weight,
    reseed,
)

__all__ = ["placebo_time_check", "placebo_space_check", "placebo_space_cells", "default_lag", "p_value_range"]

TIME, SPACE = "placebo_time", "placebo_space"
NOMINAL = 0.10
#: Draws (and tuning steps) per chain of each placebo-in-space fit, at most (module docstring).
PLACEBO_DRAWS = 300
#: Placebo fits sampled at the same time (threads; each fit's draws are those it gives alone).
PLACEBO_WORKERS = 2


def placebo_settings(settings: SamplerSettings, draws: int | None = PLACEBO_DRAWS) -> SamplerSettings:
    """The sampler settings of a placebo-in-space fit: at most ``draws`` draws and tuning steps per chain
    (``None``: the study's own)."""
    if draws is None:
        return settings
    return dataclasses.replace(
        settings, draws=min(int(settings.draws), int(draws)), tune=min(int(settings.tune), int(draws))
    )


#: A placebo whose |mean| lies within this many combined Monte Carlo standard errors of |real| is a tie.
TIE_MCSE = 2.0


def mcse_of_mean(x: np.ndarray, chains: int) -> float:
    """Monte Carlo standard error of the mean of chain-major draws ``x`` (S,) from ``chains`` chains
    (arviz-stats, method "mean": sd / sqrt(ESS))."""
    import arviz_stats as azs

    return float(azs.mcse(np.asarray(x, dtype=float).reshape(int(chains), -1), method="mean"))


def p_value_range(means, mcses, real_mean: float, real_mcse: float, *, z: float = TIE_MCSE) -> dict:
    """The permutation p-value and how far Monte Carlo error could move it.

    A placebo ties with the real effect when ``| |mean| - |real| | < z * sqrt(mcse^2 + real_mcse^2)``: which
    of the two is larger is then not settled by the draws. ``p`` counts placebos with |mean| >= |real|
    as they fell; ``p_low`` counts none of the ties, ``p_high`` all of them.
    """
    m, se = np.abs(np.asarray(means, dtype=float)), np.asarray(mcses, dtype=float)
    r = abs(float(real_mean))
    N = len(m)
    tie = np.abs(m - r) < z * np.sqrt(se**2 + float(real_mcse) ** 2)
    sure = int(np.sum((m >= r) & ~tie))
    return {
        "p": (1 + int(np.sum(m >= r))) / (1 + N),
        "p_low": (1 + sure) / (1 + N),
        "p_high": (1 + sure + int(tie.sum())) / (1 + N),
        "ties": int(tie.sum()),
    }


def default_lag(cells: Cells) -> int:
    """Half the pre-period (periods before the earliest start), rounded down, at least 1."""
    return max(1, earliest_start(cells) // 2)


def placebo_time_check(
    cells: Cells, scales: dict, settings: SamplerSettings, *, lag: int | None = None, family: str = "gaussian"
) -> CheckResult:
    """Fake start ``lag`` periods before each real start, on pre-policy data (module docstring)."""
    L = default_lag(cells) if lag is None else int(lag)
    thr = {
        "lag": L,
        "lag_source": "default (half the pre-period)" if lag is None else "study checks.placebo_lag",
        "rule": "flag when the 90% interval of the fake effect excludes 0",
    }
    fake = cells.start.copy()
    fake[cells.adopters] -= L
    if fake[cells.adopters].min() < 1:
        return not_applicable(
            TIME,
            f"a fake start {L} period(s) before the real one leaves no period before it "
            f"(pre-period has {earliest_start(cells)} period(s)); set [checks] placebo_lag "
            "smaller.",
            thr,
        )
    pc = cells.with_starts(fake).with_weight(pre_weight(cells))
    w = effect_weights(pc)
    if w.sum() == 0:
        return not_applicable(TIME, "no fake treated target-group cell falls before the real start.", thr)
    fit = fit_cells(pc, scales, reseed(settings, 11), family=family)
    att = fit.draws("tau_adopter") @ w
    s = summarize(att)
    row = {"lag": L, "fake_start": plain(cells.periods[int(fake[cells.adopters].min())]), **interval_row(att)}
    flag = s["eti_90"][0] > 0 or s["eti_90"][1] < 0
    reason = (
        f"fake start {L} period(s) early: effect {s['mean']:+.3g}, 90% interval {s['eti_90'][0]:+.3g} to "
        f"{s['eti_90'][1]:+.3g}, P(> 0) = {s['prob_gt_0']:.2f}; "
        + ("an 'effect' appears before the policy." if flag else "no effect appears before the policy.")
    )
    return CheckResult(
        TIME,
        "flag" if flag else "ok",
        reason,
        thr,
        [row] if flag else [],
        {"effect": s, "diagnostics_ok": fit.diagnostics["ok"]},
        {"placebo_time": frame([row])},
    )


def placebo_space_cells(cells: Cells, c: int) -> tuple[Cells, int]:
    """Cells with comparison jurisdiction ``c`` as the fake adopter; returns (cells, adopter slot of c)."""
    a0 = int(cells.adopters[0])
    start = cells.start.copy()
    start[c] = cells.start[a0]
    start[a0] = len(cells.periods)
    w = cells.jt_weight().copy()
    w[cells.adopters] = 0.0
    pc = cells.with_starts(start).with_weight(w)
    return pc, int(np.flatnonzero(pc.adopters == c)[0])


def placebo_space_check(
    cells: Cells,
    scales: dict,
    settings: SamplerSettings,
    real_att: np.ndarray,
    *,
    family: str = "gaussian",
    progress=None,
    draws: int | None = PLACEBO_DRAWS,
) -> CheckResult:
    """Each comparison jurisdiction in turn as a fake adopter (module docstring); ``draws`` caps the draws
    and tuning steps per chain of each placebo fit (``None``: the study's settings)."""
    comps = [
        int(c)
        for c in cells.comparisons
        if cells.n[c, cells.target, cells.start[cells.adopters[0]] :].sum() > 0
        and cells.n[c, cells.target, : cells.start[cells.adopters[0]]].sum() > 0
    ]
    ps = placebo_settings(settings, draws)
    thr = {
        "nominal_rate": NOMINAL,
        "rule": "flag when more placebo 90% intervals exclude 0 than the 95% quantile of Binomial(N, 0.10)",
        "statistic": "posterior mean",
        "p_value": "(1 + #|placebo| >= |real|) / (1 + N)",
        "placebo_draws": ps.draws,
        "placebo_tune": ps.tune,
        "placebo_chains": ps.chains,
    }
    if len(comps) < 2:
        return not_applicable(
            SPACE,
            f"{len(comps)} comparison jurisdiction(s) with target-group rows before and "
            "after the start; a placebo distribution needs at least 2.",
            thr,
        )
    rows, means, mcses = [], [], []
    bar = Progress("placebo in space", len(comps), log=progress)
    placebos = [placebo_space_cells(cells, c) for c in comps]
    jobs = [
        {
            "cells": pc,
            "scales": scales,
            "settings": reseed(ps, 100 + i),
            "var_names": ("tau_adopter",),
            "family": family,
        }
        for i, (pc, _) in enumerate(placebos)
    ]
    fits = sample_draws_many(jobs, workers=PLACEBO_WORKERS, done=lambda i: bar.step(str(cells.jurisdictions[comps[i]])))
    for c, (_, slot), fit in zip(comps, placebos, fits):
        x = fit.draws("tau_adopter")[:, slot]
        r = interval_row(x)
        rows.append({"jurisdiction": cells.jurisdictions[c], "role": "placebo", **r})
        means.append(r["mean"])
        mcses.append(mcse_of_mean(x, ps.chains))
    real = interval_row(real_att)
    real_mcse = mcse_of_mean(real_att, settings.chains) if np.size(real_att) % settings.chains == 0 else 0.0
    rows.append({"jurisdiction": "+".join(cells.jurisdictions[j] for j in cells.adopters), "role": "real", **real})
    means = np.asarray(means)
    N = len(means)
    exceed = int(np.sum(np.abs(means) >= abs(real["mean"])))
    p = (1 + exceed) / (1 + N)
    mc = p_value_range(means, mcses, real["mean"], real_mcse)
    thr["tie_rule"] = f"| |placebo mean| - |real mean| | < {TIE_MCSE:g} x combined Monte Carlo standard error"
    order = np.argsort(-np.abs([r_["mean"] for r_ in rows]), kind="stable")
    for rank, i in enumerate(order, start=1):
        rows[i]["rank"] = rank
    real_rank = rows[-1]["rank"]
    excl = [r_ for r_ in rows[:-1] if r_["lower_90"] > 0 or r_["upper_90"] < 0]
    limit = int(stats.binom.ppf(0.95, N, NOMINAL))
    thr["max_excluding_zero"] = limit
    flag = len(excl) > limit
    reason = (
        f"real effect {real['mean']:+.3g} ranks {real_rank} of {N + 1} by size among {N} placebos "
        f"(permutation p = {p:.3f}); {len(excl)} placebo 90% interval(s) exclude 0 "
        + (
            f"(more than the {limit} expected by chance): the model is over-confident about effects "
            "in comparison jurisdictions."
            if flag
            else f"(at most {limit} expected by chance)."
        )
        + (
            f" {mc['ties']} placebo(s) lie within Monte Carlo error of |real|, so p could be anywhere from "
            f"{mc['p_low']:.3f} to {mc['p_high']:.3f} with other seeds or longer chains."
            if mc["ties"]
            else ""
        )
    )
    details = {
        "real_effect": real,
        "rank": real_rank,
        "n_placebos": N,
        "permutation_p": p,
        "placebo_means": [float(v) for v in means],
        "placebo_excluding_zero": len(excl),
        "placebo_mcse": [float(v) for v in mcses],
        "real_mcse": real_mcse,
        "ties_within_mc_error": mc["ties"],
        "permutation_p_range": [mc["p_low"], mc["p_high"]],
    }
    offenders = [{"jurisdiction": r_["jurisdiction"], "mean": r_["mean"]} for r_ in excl] if flag else []
    return CheckResult(SPACE, "flag" if flag else "ok", reason, thr, offenders, details, {"placebo_space": frame(rows)})
