"""How far may parallel trends fail before the conclusion changes? A Bayesian relative-magnitudes bound.

The idea is that of Rambachan and Roth (2023), Review of Economic Studies 90(5), "relative
magnitudes": after the policy, the adopters' gap may depart from its counterfactual (parallel) path
by a path delta whose period-to-period changes are at most M times the largest change seen before
the policy. The Bayesian version here is written from that idea, as a *bound*, per posterior draw:

* Pre-policy changes. For adopter j and each draw, the deviation of its observed gap from the
  model's expected gap at its observed pre-policy periods, ``r[t] = gap_obs[t] - gap_expected[t]``
  (the same residual path as the pre-trend check), and ``Delta_j = max_t |r[t+1] - r[t]|`` over
  consecutive observed pre-periods. It is a posterior quantity: it carries the uncertainty of the
  expected path.
* Departure. After the start, ``delta[k] - delta[k-1]`` lies in ``[-M Delta_j, M Delta_j]`` with
  ``delta[-1] = 0`` (the departure starts with the policy). The adopter's effect is read off its
  post-policy periods as a constant, so a departure biases it by the mean of delta over its
  observed post periods; the largest such bias is ``M Delta_j c_j``, ``c_j = mean over its post
  periods of (k + 1)`` (delta[k] = (k + 1) M Delta_j, the steepest path allowed).
* The effect under the bound: per draw, the set ``[ATT - B, ATT + B]``, ``B = M sum_j w_j Delta_j c_j``
  (w: the ATT weights). Reported: the 95% (and 90%) interval of that set, from the 2.5% quantile of
  its lower end to the 97.5% quantile of its upper end, and the probabilities that hold for *every*
  path in the set: P(ATT + B < 0) for "a reduction", P(ATT - B > 0) for "an increase", and the same
  against the decision threshold.

Why a bound and not a prior scaled by M: the question a stakeholder asks is "what is the worst
departure the conclusion survives"; a bound answers it directly and, at M = 0, reproduces the main
fit exactly, while a prior on delta would average favourable and unfavourable departures and so
understate the risk. No refit is needed: the whole grid is computed from the main fit's draws
(zero extra compiles).

Breakdown values: ``M_zero``, the smallest M at which the 95% interval includes zero, and
``M_decision``, the smallest at which the probability of an effect beyond the decision threshold
(of an effect in the direction of the estimate, when the study sets no threshold) drops below the
decision level (0.9 unless the study's ``[decision] level`` says otherwise). Both are found by
bisection to 1e-3 on the same draws; ``None`` when no M up to :data:`M_MAX` reaches it.

Binomial and count families: the same bound on the link scale (log odds, log rate). Their parallel-trends
assumption is stated there (the adopter's link-scale gap would have moved as the comparisons' did), the
effect tau is a constant shift on it, and so a departure of the gap adds to tau one for one; on the
natural scale the same departure would change size with the baseline rate, and a largest pre-policy
change of a rate or a probability would not carry over from low-rate to high-rate periods. The gap
path is each cell's empirical link value, log((Y + 1/2) / E) or logit with the same half (the
pre-trend check's path, :func:`bayesdid.model.families.replicate_gap_path`), minus the model's expected
link value without the gap noise; its Poisson or binomial sampling noise enters Delta_j as the cell
mean's sampling noise does in the gaussian case, which makes the bound wider, never narrower. The
report states the interval's ends as ratios exp(x).

Needs at least :data:`MIN_PRE_PERIODS` observed pre-policy periods for some adopter (two changes to
take a largest from); otherwise the result is "not applicable", with the reason.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .model.family import family_record

__all__ = ["DEFAULT_MULTIPLES", "DECISION_LEVEL", "TrendBounds", "trend_bounds", "write_trends", "CSV_COLUMNS"]

DEFAULT_MULTIPLES = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0)
DECISION_LEVEL = 0.9
MIN_PRE_PERIODS = 3
M_MAX = 100.0
CSV_NAME = "trends.csv"
CSV_COLUMNS = (
    "M",
    "lower_95",
    "upper_95",
    "lower_90",
    "upper_90",
    "prob_reduction",
    "prob_increase",
    "prob_beyond_threshold",
)


@dataclass
class TrendBounds:
    """The effect under departures from parallel trends bounded by M x the largest pre-policy change."""

    status: str
    reason: str = ""
    multiples: tuple = DEFAULT_MULTIPLES
    rows: list = field(default_factory=list)
    breakdown: dict = field(default_factory=dict)
    threshold: float | None = None
    level: float = DECISION_LEVEL
    scale: str = "model"
    pre_change: dict = field(default_factory=dict)
    sentence: str = ""

    def to_dict(self) -> dict:
        return {
            "status": self.status,
            "reason": self.reason,
            "method": (
                "relative-magnitudes bound (after Rambachan and Roth 2023): post-policy departures from parallel "
                "trends with period-to-period changes at most M x the largest pre-policy change, per posterior draw; "
                "interval of the identified set and probabilities that hold for every allowed path"
            ),
            "multiples": list(self.multiples),
            "grid": self.rows,
            "breakdown": self.breakdown,
            "threshold_model_scale": self.threshold,
            "decision_level": self.level,
            "scale": self.scale,
            "largest_pre_change": self.pre_change,
            "sentence": self.sentence,
            "csv": CSV_NAME,
        }


def _pre_paths(fit):
    """Per adopter: (Delta draws (S,), c_j) or a reason why it has none."""
    from .model.twins import replicate_gaps

    cells = fit.cells
    both = cells.n[:, cells.target, :] > 0
    if cells.design == "DDD":
        both = both & (cells.n[:, cells.reference, :] > 0)
    w = cells.jt_weight() > 0
    rng = np.random.default_rng(0)  # replicate draws are not used here, only observed and expected
    out = {}
    for j in cells.adopters:
        s = int(cells.start[j])
        pre = np.flatnonzero(both[j, :s] & w[j, :s])
        post = np.flatnonzero((cells.n[j, cells.target, s:] > 0) & w[j, s:]) + s
        if len(pre) < MIN_PRE_PERIODS or len(post) == 0:
            continue
        obs, expected, _ = replicate_gaps(fit, int(j), pre, rng)
        r = obs[None, :] - expected
        delta = np.abs(np.diff(r, axis=1)).max(axis=1)
        c = float(np.mean(post - s + 1.0))
        out[int(j)] = (delta, c)
    return out


def _direction(att: np.ndarray, threshold: float | None) -> tuple[float, int]:
    """The threshold and sign the decision is about: the study's, else zero in the estimate's direction."""
    if threshold is not None:
        return float(threshold), (-1 if threshold < 0 else 1)
    return 0.0, (-1 if np.median(att) < 0 else 1)


def _row(att, b, M, thr, sign):
    lo, hi = att - M * b, att + M * b
    beyond = np.mean(hi < thr) if sign < 0 else np.mean(lo > thr)
    return {
        "M": float(M),
        "lower_95": float(np.quantile(lo, 0.025)),
        "upper_95": float(np.quantile(hi, 0.975)),
        "lower_90": float(np.quantile(lo, 0.05)),
        "upper_90": float(np.quantile(hi, 0.95)),
        "prob_reduction": float(np.mean(hi < 0)),
        "prob_increase": float(np.mean(lo > 0)),
        "prob_beyond_threshold": float(beyond),
    }


def _bisect(pred, hi=M_MAX, tol=1e-3):
    """Smallest M in [0, hi] with pred(M) true (pred monotone: false then true); None if pred(hi) is false."""
    if pred(0.0):
        return 0.0
    if not pred(hi):
        return None
    lo = 0.0
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if pred(mid):
            hi = mid
        else:
            lo = mid
    return round(hi, 3)


def trend_bounds(
    fit,
    *,
    multiples=DEFAULT_MULTIPLES,
    threshold: float | None = None,
    level: float = DECISION_LEVEL,
    percent: bool = False,
) -> TrendBounds:
    """The bound over the grid of M and the breakdown values (module docstring).

    ``threshold`` is the decision threshold on the model scale (a log outcome: log(1 + t)).
    ``percent``: also state the interval ends as percent changes exp(x) - 1 in the sentence.
    """
    from .effects import att_weights

    multiples = tuple(float(m) for m in multiples)
    if getattr(fit.spec, "effects", "att") != "att":
        return TrendBounds("not applicable", "the bound reads the per-adopter effects of the main fit.", multiples)
    paths = _pre_paths(fit)
    if not paths:
        return TrendBounds(
            "not applicable",
            f"no adopter has {MIN_PRE_PERIODS} or more observed pre-policy periods "
            "(and one post-policy period): the largest pre-policy change needs at least two changes.",
            multiples,
        )
    cells = fit.cells
    w = att_weights(cells)
    tau_a = fit.draws("tau_adopter")
    att = tau_a @ w
    b = np.zeros_like(att)
    pre = {}
    for a, j in enumerate(cells.adopters):
        if int(j) in paths:
            delta, c = paths[int(j)]
            b += w[a] * delta * c
            pre[cells.jurisdictions[j]] = {"median": float(np.median(delta)), "post_mean_k_plus_1": c}
    missing = [cells.jurisdictions[j] for j in cells.adopters if int(j) not in paths]
    thr, sign = _direction(att, threshold)
    rows = [_row(att, b, M, thr, sign) for M in multiples]
    m_zero = _bisect(lambda M: _row(att, b, M, thr, sign)["lower_95"] <= 0 <= _row(att, b, M, thr, sign)["upper_95"])
    m_dec = _bisect(lambda M: _row(att, b, M, thr, sign)["prob_beyond_threshold"] < level)
    rec = family_record(fit.spec.family)
    ratio = f"an {rec.ratio_name}" if rec.ratio_name[:1] in "aeiou" else f"a {rec.ratio_name}"
    ratio = ratio if rec.ratio_scale else None
    if threshold is not None and ratio:  # the link-scale threshold log(1 + t), read back as the ratio 1 + t
        what = f"{ratio} {'below' if threshold < 0 else 'above'} {float(np.exp(threshold)):.3g}"
    elif threshold is not None:
        what = f"an effect beyond the threshold ({threshold:g} on the model scale)"
    else:
        what = f"{'a reduction' if sign < 0 else 'an increase'}"
    breakdown = {
        "M_zero": m_zero,
        "M_decision": m_dec,
        "M_zero_meaning": "smallest M at which the 95% interval includes zero"
        + (" (on the link scale: a ratio of 1)" if rec.ratio_scale else ""),
        "M_decision_meaning": f"smallest M at which P({what}) drops below {level:g}",
    }
    tb = TrendBounds("ok", "", multiples, rows, breakdown, threshold, level, scale_of(fit.spec.family), pre)
    if missing:
        tb.reason = (
            f"adopter(s) {missing} have fewer than {MIN_PRE_PERIODS} observed pre-policy periods and are "
            "given no departure (their share of the bound is zero)"
        )
    tb.sentence = _sentence(rows[0], m_zero, m_dec, what, level)
    return tb


def _sentence(base, m_zero, m_dec, what, level) -> str:
    if base["lower_95"] <= 0 <= base["upper_95"]:
        head = "Even with parallel trends holding exactly, the 95% interval includes no effect"
    elif m_zero is None:
        head = (
            f"The 95% interval excludes no effect for every departure up to {M_MAX:g} times the largest "
            "pre-policy change"
        )
    else:
        head = (
            f"The conclusion that there is an effect holds unless, after the policy, the gap diverged more than "
            f"{m_zero:.2g} times as fast as it ever changed from one period to the next before"
        )
    tail = (
        ""
        if m_dec is None
        else f"; the probability of {what} stays at or above {level:.0%} up to {m_dec:.2g} times"
        if m_dec > 0
        else f"; the probability of {what} is below {level:.0%} already without any departure"
    )
    return head + tail + "."


def write_trends(tb: TrendBounds, folder: Path) -> Path:
    """Write the grid as CSV (columns :data:`CSV_COLUMNS`) into ``folder``."""
    path = Path(folder) / CSV_NAME
    with open(path, "w", newline="", encoding="utf-8") as fh:
        wr = csv.DictWriter(fh, fieldnames=CSV_COLUMNS)
        wr.writeheader()
        for r in tb.rows:
            wr.writerow({k: r[k] for k in CSV_COLUMNS})
    return path


def scale_of(family: str) -> str:
    """The scale the bound is computed on: the model scale for the gaussian family, the link for the others."""
    rec = family_record(family)
    if not rec.ratio_scale:
        return "model"
    return f"link: {rec.link_label} (the interval's ends read as {rec.ratio_name}s exp(x))"


def model_threshold(study, cells) -> float | None:
    """The decision threshold on the model scale: log(1 + t) for a log outcome and for the binomial and
    count families (whose threshold is a relative change of the ratio), t itself otherwise."""
    t = study.decision.threshold
    if t is None:
        return None
    return float(np.log1p(t)) if (cells.log_outcome or family_record(study.model.family).ratio_scale) else float(t)
