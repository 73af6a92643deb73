"""Estimands and the probability statements a stakeholder reads.

Formulas (model scale, draws s = 1..S):

* per adopter: ``tau[j]`` (the effect in adopter j's treated target-group cells);
* ATT: ``att = sum_j w_j tau[j]`` with ``w_j`` = treated target-group rows of j over all treated
  rows (with one adopter, ``att = tau``);
* percent change for an outcome analysed on the log scale: ``exp(att) - 1`` (Halvorsen and
  Palmquist 1980: the percent effect of a dummy in a log equation is exp(b) - 1, not b).

Every summary gives mean, median, sd, 90% and 95% equal-tailed intervals, the 90% highest-density
interval, P(effect > 0), P(effect < 0) and P(effect beyond the decision threshold).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["summarize", "hdi", "Effect", "att_weights", "compute_effects", "beyond_text", "percent_change"]


def hdi(x: np.ndarray, prob: float = 0.9) -> tuple[float, float]:
    """Narrowest interval holding ``prob`` of the draws (unimodal reading)."""
    x = np.sort(np.asarray(x, dtype=float).ravel())
    n = x.size
    k = int(np.floor(prob * n))
    if k < 1 or k >= n:
        return float(x[0]), float(x[-1])
    widths = x[k:] - x[: n - k]
    i = int(np.argmin(widths))
    return float(x[i]), float(x[i + k])


def summarize(x: np.ndarray, threshold: float | None = None) -> dict:
    """Posterior summary and probability statements of one scalar quantity's draws."""
    x = np.asarray(x, dtype=float).ravel()
    out = {
        "mean": float(np.mean(x)),
        "median": float(np.median(x)),
        "sd": float(np.std(x, ddof=1)) if x.size > 1 else 0.0,
        "eti_90": [float(v) for v in np.quantile(x, [0.05, 0.95])],
        "eti_95": [float(v) for v in np.quantile(x, [0.025, 0.975])],
        "hdi_90": list(hdi(x, 0.9)),
        "prob_gt_0": float(np.mean(x > 0)),
        "prob_lt_0": float(np.mean(x < 0)),
        "threshold": threshold,
        "prob_beyond_threshold": None,
    }
    if threshold is not None:
        out["prob_beyond_threshold"] = float(np.mean(x < threshold) if threshold < 0 else np.mean(x > threshold))
    return out


def beyond_text(threshold: float, percent: bool) -> str:
    if percent:
        return f"a {'reduction' if threshold < 0 else 'increase'} larger than {abs(threshold) * 100:g}%"
    return f"an effect {'below' if threshold < 0 else 'above'} {threshold:g}"


@dataclass
class Effect:
    """An estimand with its draws and summary.

    ``scale`` is 'model' (outcome units, or log units for a log outcome), 'percent' (relative
    change, 0.1 = +10%) or a natural scale named by ``measure``.
    """

    name: str
    measure: str
    scale: str
    draws: np.ndarray
    threshold: float | None = None
    summary: dict = field(init=False)

    def __post_init__(self):
        self.summary = summarize(self.draws, self.threshold)
        self.summary["measure"] = self.measure

    def __str__(self) -> str:
        s = self.summary
        pct = self.scale == "percent"

        def f(v):
            return f"{v * 100:+.1f}%" if pct else f"{v:+.4g}"

        lines = [f"{self.name} ({self.measure}): mean {f(s['mean'])}, 90% interval {f(s['eti_90'][0])} to "
                 f"{f(s['eti_90'][1])}",
                 f"  probability the effect is positive: {s['prob_gt_0']:.0%}; negative: {s['prob_lt_0']:.0%}"]
        if s["prob_beyond_threshold"] is not None:
            lines.append(f"  probability of {beyond_text(s['threshold'], pct)}: {s['prob_beyond_threshold']:.0%}")
        return "\n".join(lines)


def percent_change(b):
    """Relative change implied by a difference b on the log scale: exp(b) - 1."""
    return np.expm1(b)


def att_weights(cells) -> np.ndarray:
    """w_j: treated target-group rows of adopter j over all treated target-group rows."""
    treated_rows = (cells.n * cells.treated).sum(axis=(1, 2))[cells.adopters]
    return treated_rows / treated_rows.sum()


def compute_effects(fit, threshold: float | None = None) -> dict:
    """The ATT (model scale and, for log outcomes, percent) and per-adopter effects.

    For a log outcome the threshold is a relative change; on the model scale it becomes log(1 + t).
    """
    cells = fit.cells
    tau_a = fit.draws("tau_adopter")  # (S, A)
    w = att_weights(cells)
    att = tau_a @ w
    log = cells.log_outcome
    thr_model = (np.log1p(threshold) if (log and threshold is not None) else threshold)
    out = {"effect": Effect("ATT", "difference in log outcome" if log else "difference in outcome",
                            "model", att, thr_model)}
    if log:
        out["effect_percent"] = Effect("ATT", "percent change, exp(ATT) - 1", "percent", percent_change(att), threshold)
    per = []
    for a, j in enumerate(cells.adopters):
        e = Effect(cells.jurisdictions[j], "difference in log outcome" if log else "difference in outcome",
                   "model", tau_a[:, a], thr_model)
        row = {"adopter": cells.jurisdictions[j], "start": _plain(cells.periods[cells.start[j]]),
               "weight": float(w[a]), **e.summary}
        if log:
            row["percent"] = Effect(cells.jurisdictions[j], "percent change", "percent",
                                    percent_change(tau_a[:, a]), threshold).summary
        per.append(row)
    out["per_adopter"] = per
    return out


def _plain(v):
    return v.item() if hasattr(v, "item") else v
