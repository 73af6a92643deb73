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

from .model.family import family_record

__all__ = [
    "summarize",
    "hdi",
    "Effect",
    "att_weights",
    "att_draws",
    "compute_effects",
    "Effects",
    "AdopterEffect",
    "beyond_text",
    "percent_change",
    "NaturalEffects",
    "natural_effects",
    "counterfactual_means",
]


def hdi(x: np.ndarray, prob: float = 0.9) -> tuple[float, float]:
    """Narrowest interval holding ``prob`` of the draws (unimodal reading), by :func:`arviz.hdi`."""
    import arviz as az

    lo, hi = np.asarray(az.hdi(np.asarray(x, dtype=float).ravel(), prob=prob), dtype=float)
    return float(lo), float(hi)


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

        lines = [
            f"{self.name} ({self.measure}): mean {f(s['mean'])}, 90% interval {f(s['eti_90'][0])} to "
            f"{f(s['eti_90'][1])}",
            (
                f"  probability the ratio is above 1: {s['prob_gt_1']:.0%}; below 1: {s['prob_lt_1']:.0%}"
                if "prob_gt_1" in s
                else f"  probability the effect is positive: {s['prob_gt_0']:.0%}; negative: {s['prob_lt_0']:.0%}"
            ),
        ]
        if s["prob_beyond_threshold"] is not None and self.scale == "ratio":
            lines.append(
                f"  probability the ratio is {'below' if s['threshold'] < 1 else 'above'} "
                f"{s['threshold']:g}: {s['prob_beyond_threshold']:.0%}"
            )
        elif s["prob_beyond_threshold"] is not None:
            lines.append(f"  probability of {beyond_text(s['threshold'], pct)}: {s['prob_beyond_threshold']:.0%}")
        return "\n".join(lines)


def percent_change(b):
    """Relative change implied by a difference b on the log scale: exp(b) - 1."""
    return np.expm1(b)


def att_weights(cells) -> np.ndarray:
    """w_j: treated target-group rows of adopter j over all treated target-group rows.

    The one rule of the ATT's weights, used by the headline, the run folder's ``att``, every check and
    the notebook. With sampling weights (``cells.extra["weights"]``) rows count by their weights: w_j is
    the share of the weighted population of the treated target-group cells that adopter j holds. Only
    cells that carry likelihood weight count (a check or a sweep variant may leave some out); an adopter
    whose treated cells are all left out gets weight 0, and the weights are all 0 when none is left.
    """
    size = cells.extra.get("weights", {}).get("sum_w", cells.n) if cells.extra else cells.n
    in_likelihood = cells.jt_weight()[:, None, :] > 0
    treated_rows = (size * cells.treated * in_likelihood).sum(axis=(1, 2))[cells.adopters]
    total = treated_rows.sum()
    return treated_rows / total if total > 0 else treated_rows


def att_draws(tau_adopter, cells):
    """The ATT's draws, sum_j w_j tau_adopter[..., j] with w = :func:`att_weights`.

    ``tau_adopter`` is an array whose last axis runs over the adopters (draws x adopters), or an
    xarray DataArray with an ``adopter`` dimension (the posterior's), which gives a DataArray back.
    """
    w = att_weights(cells)
    if hasattr(tau_adopter, "dims"):
        import xarray as xr

        wd = xr.DataArray(w, dims=("adopter",), coords={"adopter": tau_adopter["adopter"]})
        return (tau_adopter * wd).sum("adopter")
    return np.asarray(tau_adopter) @ w


@dataclass
class AdopterEffect:
    """One adopter's effect: its name, first treated period, ATT weight and effect (model scale, and
    percent for a log outcome). ``to_dict()`` is its row of summary.json's ``per_adopter``."""

    adopter: str
    start: object
    weight: float
    effect: Effect
    percent: Effect | None = None

    def to_dict(self) -> dict:
        row = {"adopter": self.adopter, "start": self.start, "weight": self.weight, **self.effect.summary}
        if self.percent is not None:
            row["percent"] = self.percent.summary
        return row


@dataclass
class Effects:
    """The effects of one fit (:func:`compute_effects`): the ATT on the model scale (``effect``), as a
    percent change for a log outcome (``percent``), on the natural scale (``natural``) and per adopter.

    ``to_dict()`` gives summary.json's ``effect``, ``effect_percent`` (log outcome only),
    ``effect_natural`` and ``per_adopter`` entries; the draws stay on the :class:`Effect` objects."""

    effect: Effect
    natural: NaturalEffects
    per_adopter: list[AdopterEffect]
    percent: Effect | None = None

    def to_dict(self) -> dict:
        out = {"effect": self.effect.summary}
        if self.percent is not None:
            out["effect_percent"] = self.percent.summary
        out["effect_natural"] = self.natural.summary
        out["per_adopter"] = [a.to_dict() for a in self.per_adopter]
        return out


def compute_effects(fit, threshold: float | None = None) -> Effects:
    """The ATT (model scale and, for log outcomes, percent), its natural-scale measures and per-adopter effects.

    For a log outcome the threshold is a relative change; on the model scale it becomes log(1 + t).
    """
    cells = fit.cells
    tau_a = fit.draws("tau_adopter")  # (S, A)
    w = att_weights(cells)
    att = att_draws(tau_a, cells)  # (S,)
    rec = family_record(getattr(getattr(fit, "spec", None), "family", "gaussian"))
    log = cells.log_outcome or rec.ratio_scale
    thr_model = np.log1p(threshold) if (log and threshold is not None) else threshold
    measure = rec.model_measure or ("difference in log outcome" if log else "difference in outcome")
    per = [
        AdopterEffect(
            adopter=cells.jurisdictions[j],
            start=_plain(cells.periods[cells.start[j]]),
            weight=float(w[a]),
            effect=Effect(cells.jurisdictions[j], measure, "model", tau_a[:, a], thr_model),
            percent=Effect(cells.jurisdictions[j], "percent change", "percent", percent_change(tau_a[:, a]), threshold)
            if cells.log_outcome
            else None,
        )
        for a, j in enumerate(cells.adopters)
    ]
    return Effects(
        effect=Effect("ATT", measure, "model", att, thr_model),
        natural=natural_effects(fit, threshold, att=att),
        per_adopter=per,
        percent=Effect("ATT", "percent change, exp(ATT) - 1", "percent", percent_change(att), threshold)
        if cells.log_outcome
        else None,
    )


def _plain(v):
    return v.item() if hasattr(v, "item") else v


class NaturalEffects(list):
    """Effects on the scale people read, a list of :class:`Effect` each naming its ``measure``.

    ``summary`` (what summary.json holds under ``effect_natural``) is the list of their summaries.
    """

    @property
    def summary(self) -> list[dict]:
        return [e.summary for e in self]

    def __str__(self) -> str:
        return "\n".join(str(e) for e in self)


def _ratio_effect(name, measure, draws, threshold):
    """A ratio (no effect = 1): probabilities are stated against 1, the threshold as 1 + t."""
    e = Effect(name, measure, "ratio", draws, None)
    s = e.summary
    s.pop("prob_gt_0"), s.pop("prob_lt_0")
    s["no_effect"] = 1.0
    s["prob_gt_1"] = float(np.mean(draws > 1.0))
    s["prob_lt_1"] = float(np.mean(draws < 1.0))
    if threshold is not None:
        r = 1.0 + threshold
        s["threshold"] = r
        s["prob_beyond_threshold"] = float(np.mean(draws < r) if threshold < 0 else np.mean(draws > r))
    return e


def _difference_effect(name, measure, draws):
    e = Effect(name, measure, "natural", draws, None)
    e.summary["no_effect"] = 0.0
    return e


def counterfactual_means(fit) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Predicted means of the treated target-group records with and without the policy.

    Returns ``(with_policy, without, weight)``: (S, R_treated) probabilities (binomial) or rates per
    unit of exposure (counts) from the linear predictor eta_r with and without tau[j] D[j,g,t]
    (shock, gap noise and covariates at their posterior draws), and each record's weight: its trials
    or exposure times the jurisdiction-period weight.
    """
    from .model.families import data_arrays, inverse_link, record_eta_draws
    from .model.terms import mean_from_draws

    cells = fit.cells
    family = fit.spec.family
    d = data_arrays(cells, family)
    treated = cells.treated.ravel()[d["rec_cell"]]
    m = mean_from_draws(fit)
    eta1 = record_eta_draws(fit, m)[:, treated]
    eta0 = record_eta_draws(fit, m, without_policy=True)[:, treated]
    w = (d["rec_size"] * d["rec_w"])[treated]
    return inverse_link(family, eta1), inverse_link(family, eta0), w


def natural_effects(fit, threshold: float | None = None, *, att: np.ndarray | None = None) -> NaturalEffects:
    """Natural-scale estimands from counterfactual predictions over the treated cells.

    With ``p1_r``, ``p0_r`` the predicted means of treated record r with and without the policy and
    ``N_r`` its trials or exposure (see :func:`counterfactual_means`), per draw:

    * binomial: risk difference (percentage points) ``100 * sum_r N_r (p1_r - p0_r) / sum_r N_r``
      and risk ratio ``sum_r N_r p1_r / sum_r N_r p0_r``;
    * poisson, negbinomial: rate ratio ``sum_r N_r p1_r / sum_r N_r p0_r``, rate difference per
      1,000 units of exposure ``1000 * sum_r N_r (p1_r - p0_r) / sum_r N_r``, events averted per
      1,000 units ``-`` that, and events averted in total ``sum_r N_r (p0_r - p1_r)``;
    * gaussian with a log outcome: percent change ``exp(ATT) - 1``; on the identity scale the
      natural scale is the model scale, the ATT in outcome units.

    For ratios and percent changes a decision threshold is a relative change (``-0.05``: a ratio
    below 0.95); difference measures carry no threshold (it is stated on the ratio).
    """
    rec = family_record(getattr(getattr(fit, "spec", None), "family", "gaussian"))
    cells = fit.cells
    if rec.cell_model:
        if att is None:
            att = att_draws(fit.draws("tau_adopter"), cells)
        if cells.log_outcome:
            return NaturalEffects([Effect("ATT", "percent change, exp(ATT) - 1", "percent", np.expm1(att), threshold)])
        return NaturalEffects(
            [Effect("ATT", "difference in outcome (natural scale = model scale)", "model", att, threshold)]
        )
    p1, p0, w = counterfactual_means(fit)
    W = w.sum()
    m1, m0 = p1 @ w / W, p0 @ w / W
    return NaturalEffects(
        [
            _ratio_effect("ATT", measure, draws, threshold)
            if kind == "ratio"
            else _difference_effect("ATT", measure, draws)
            for measure, kind, draws in rec.natural(m1, m0, W)
        ]
    )
