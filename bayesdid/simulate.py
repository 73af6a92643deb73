"""Simulated data with a known truth, for tests, benchmarks, calibration and the demo cases.

The data-generating process is the model of DESIGN.md (optionally with heavier-tailed gap noise or a
pre-policy drift of the adopters' gap). Nothing here is real data.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

__all__ = ["Scenario", "simulate", "region_names"]

_NAMES = [
    "Norvale",
    "Kestrel Bay",
    "Ambermoor",
    "Brindlecombe",
    "Caskwater",
    "Dovrenne",
    "Elmsquay",
    "Fennowick",
    "Galdercroft",
    "Harrowmere",
    "Istrelle",
    "Juniper Reach",
    "Korvath",
    "Lanthorne",
    "Merrowgate",
    "Nettlebrook",
    "Oskerfield",
    "Pellingrove",
    "Quillmarsh",
    "Rosk Hollow",
    "Sablecote",
    "Tarnwhistle",
    "Umberlee",
    "Vesperdale",
    "Wrenhallow",
    "Yarrowick",
    "Zephyr Flats",
    "Ashcombe Ridge",
    "Bellcrest",
    "Cinderfell",
    "Dapplemoor",
    "Emberlyn",
    "Foxglove Cross",
    "Glimmerholt",
    "Hazelrune",
    "Ironvetch",
    "Juddermere",
    "Kindlewood",
    "Larkspur Heath",
    "Mossbarrow",
]


def region_names(k: int) -> list[str]:
    """k invented region names (numbered past the list's length)."""
    if k <= len(_NAMES):
        return list(_NAMES[:k])
    return list(_NAMES) + [f"District {i}" for i in range(len(_NAMES) + 1, k + 1)]


@dataclass
class Scenario:
    """Parameters of a simulated study. ``starts`` maps adopter index -> first treated period index."""

    jurisdictions: int = 40
    periods: int = 12
    groups: int = 2  # 2 = DDD, 1 = DiD
    starts: dict = field(default_factory=lambda: {0: 6})
    rows_per_cell: float = 50.0
    tau: float = -0.1
    tau_spread: float = 0.0
    effect_path: tuple | None = None  # effect by event time k = 0, 1, ...; overrides tau when given
    intercept: tuple = (1.0, 1.3)
    baseline_sd: float = 0.3
    period_sd: float = 0.1
    shock_sd: float = 0.1
    group_period_sd: float = 0.05
    gap_sd: float = 0.05
    gap_df: float | None = None  # Student-t degrees of freedom for the gap noise (heavy tails)
    gap_rho: float = 0.0  # AR(1) correlation of the gap noise over periods (marginal sd stays gap_sd)
    residual_sd: float = 1.0
    pre_drift: float = 0.0  # per-period drift of the adopters' target-group gap before the start
    pre_wiggle: float = 0.0  # adopters' pre-period gap alternates +w, -w (period-to-period changes of 2w)
    post_drift: float = 0.0  # adopters' gap departs from parallel by post_drift * (k + 1) at event time k >= 0
    adopter_trend: float = 0.0  # adopters' gap drifts linearly over all periods: adopter_trend * (t - start)
    trend_sd: float = 0.0  # comparison jurisdictions' gaps drift linearly, slopes Normal(0, trend_sd^2)
    fixed_cells: bool = False  # every cell exactly rows_per_cell rows


def simulate(sc: Scenario, seed: int, *, names: list[str] | None = None) -> tuple[pd.DataFrame, dict]:
    """Rows from the scenario and the truth (tau, per-adopter effects, noise scales)."""
    rng = np.random.default_rng(seed)
    J, T, G = sc.jurisdictions, sc.periods, sc.groups
    names = names or region_names(J)
    b = np.asarray(sc.intercept[:G])[None, :] + sc.baseline_sd * rng.standard_normal((J, G))
    a = sc.period_sd * rng.standard_normal(T)
    a[0] = 0.0
    s = sc.shock_sd * rng.standard_normal((J, T)) if G == 2 else np.zeros((J, T))
    h = sc.group_period_sd * rng.standard_normal(T)
    if sc.gap_df is not None:
        e = sc.gap_sd * rng.standard_t(sc.gap_df, size=(J, T)) * np.sqrt((sc.gap_df - 2) / sc.gap_df)
    else:
        e = sc.gap_sd * rng.standard_normal((J, T))
    if sc.gap_rho:
        # stationary AR(1) from the same innovations: e_t = rho e_{t-1} + sqrt(1 - rho^2) z_t
        z, r = e.copy(), float(sc.gap_rho)
        for t in range(1, T):
            e[:, t] = r * e[:, t - 1] + np.sqrt(1.0 - r * r) * z[:, t]
    tau_j = {j: sc.tau + sc.tau_spread * rng.standard_normal() for j in sc.starts}
    mean = np.zeros((J, G, T))
    tg = G - 1  # target group index (last)
    for g in range(G):
        mean[:, g, :] = b[:, g][:, None] + a[None, :] + s
    if G == 2:
        mean[:, tg, :] += h[None, :]
    mean[:, tg, :] += e
    if sc.trend_sd:
        slopes = sc.trend_sd * np.random.default_rng([seed, 7]).standard_normal(J)
        mean[:, tg, :] += slopes[:, None] * (np.arange(T) - (T - 1) / 2.0)[None, :]
    for j, st in sc.starts.items():
        if sc.adopter_trend:
            mean[j, tg, :] += sc.adopter_trend * (np.arange(T) - st)
        for t in range(T):
            k = t - st
            if k >= 0:
                if sc.effect_path is not None:
                    mean[j, tg, t] += sc.effect_path[min(k, len(sc.effect_path) - 1)]
                else:
                    mean[j, tg, t] += tau_j[j]
            if k >= 0 and sc.post_drift:
                mean[j, tg, t] += sc.post_drift * (k + 1)
            if k < 0 and sc.pre_drift:
                mean[j, tg, t] += sc.pre_drift * k
            if k < 0 and sc.pre_wiggle:
                mean[j, tg, t] += sc.pre_wiggle * (1.0 if k % 2 else -1.0)
    if sc.fixed_cells:
        counts = np.full((J, G, T), int(sc.rows_per_cell))
    else:
        counts = rng.poisson(sc.rows_per_cell, size=(J, G, T))
        counts = np.maximum(counts, 1)
    total = int(counts.sum())
    jj, gg, tt = np.meshgrid(np.arange(J), np.arange(G), np.arange(T), indexing="ij")
    rep = counts.ravel()
    jr = np.repeat(jj.ravel(), rep)
    gr = np.repeat(gg.ravel(), rep)
    tr = np.repeat(tt.ravel(), rep)
    y = mean[jr, gr, tr] + sc.residual_sd * rng.standard_normal(total)
    frame = pd.DataFrame(
        {
            "region": np.asarray(names, dtype=object)[jr],
            "period": tr + 1,
            "y": y,
        }
    )
    if G == 2:
        frame["group"] = np.where(gr == tg, "target", "reference")
    truth = {
        "tau": float(sc.tau),
        "tau_adopter": {names[j]: float(v) for j, v in tau_j.items()},
        "starts": {names[j]: int(st) + 1 for j, st in sc.starts.items()},
        "gap_sd": sc.gap_sd,
        "gap_rho": sc.gap_rho,
        "rows": total,
    }
    return frame, truth
