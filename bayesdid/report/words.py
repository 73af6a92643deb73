"""Plain-language sentences generated from a run's summary (reads results, computes nothing).

Three readings of one result, chosen by :func:`evidence`:

* ``"clear"``: the 90% interval of the effect lies on one side of zero and the sampler's
  diagnostics pass. The headline states the most likely change, its interval and the probabilities.
* ``"null"``: the 90% interval includes zero (diagnostics pass). The headline says the data show
  no clear effect, gives the same numbers, and says the direction is not settled.
* ``"unreliable"``: the diagnostics failed (or are missing). The headline opens with
  "NOT RELIABLE" and the reasons before any number, so nobody quotes the number alone.
"""

from __future__ import annotations

__all__ = ["headline", "evidence", "count_words"]

_NUMBER_WORDS = {1: "one", 2: "two", 3: "three", 4: "four", 5: "five", 6: "six", 7: "seven", 8: "eight",
                 9: "nine", 10: "ten"}


def count_words(n: int) -> str:
    """'two' for 2 (up to ten, as a reader expects in prose), digits above."""
    return _NUMBER_WORDS.get(int(n), f"{int(n):,}")


def _pct(v: float, digits: int = 0) -> str:
    return f"{abs(v) * 100:.{digits}f}%"


def _digits(lo: float, hi: float) -> int:
    """Whole percent unless the interval is narrow enough that whole numbers would hide it."""
    return 0 if abs(hi - lo) >= 0.04 else 1


def _prob(p: float) -> str:
    """A probability as a percent that never rounds to a false certainty (0% or 100%)."""
    if p >= 0.995:
        return "over 99%"
    if p <= 0.005:
        return "under 1%"
    return f"{p:.0%}"


def evidence(summary: dict) -> str:
    """'unreliable' (diagnostics failed or absent), 'null' (90% interval spans 0) or 'clear'."""
    diag = summary.get("diagnostics") or {}
    if not diag.get("ok", False):
        return "unreliable"
    lo, hi = _effect(summary)[0]["eti_90"]
    return "null" if (lo < 0) != (hi < 0) or lo == 0 or hi == 0 else "clear"


def _natural(summary: dict, kind: str) -> dict | None:
    """The ``effect_natural`` entry whose measure names ``kind`` ("ratio" or "difference")."""
    if (summary.get("model") or {}).get("family", "gaussian") == "gaussian":
        return None
    for e in summary.get("effect_natural") or []:
        if kind in str(e.get("measure", "")):
            return e
    return None


def _ratio_as_percent(r: dict) -> dict:
    """A rate or risk ratio read as a percent change (ratio - 1), with its probabilities against 1."""
    out = {"median": r["median"] - 1.0, "eti_90": [r["eti_90"][0] - 1.0, r["eti_90"][1] - 1.0],
           "prob_lt_0": r.get("prob_lt_1"), "prob_gt_0": r.get("prob_gt_1")}
    if r.get("threshold") is not None:
        out["threshold"] = round(r["threshold"] - 1.0, 12)  # 0.95 - 1 is not exactly -0.05
        out["prob_beyond_threshold"] = r.get("prob_beyond_threshold")
    return out


def _effect(summary: dict) -> tuple[dict, bool]:
    """The effect the headline states, and whether it is a percent change.

    Log outcomes: the percent change. Binomial and count outcomes: the risk or rate ratio over the
    treated cells read as a percent change (never the link-scale coefficient). Otherwise the ATT in
    the outcome's units.
    """
    if "effect_percent" in summary:
        return summary["effect_percent"], True
    ratio = _natural(summary, "ratio")
    if ratio is not None:
        return _ratio_as_percent(ratio), True
    return summary["effect"], False


def _where(data: dict) -> str:
    ads = list(data.get("adopters", []))
    if len(ads) == 1:
        return f"In the adopting jurisdiction, {ads[0]},"
    return f"Across the {count_words(len(ads))} adopting jurisdictions"


def _why_unreliable(diag: dict) -> str:
    problems = list(diag.get("problems") or [])
    if not diag:
        return "no sampler diagnostics were recorded"
    return "; ".join(problems) if problems else "the sampler's diagnostics did not pass"


def headline(summary: dict, *, outcome: str | None = None, policy: str = "the policy") -> str:
    """One paragraph a stakeholder can read: the most likely effect, its interval, the probabilities.

    Parameters
    ----------
    summary : dict
        A run's ``summary.json``: ``effect`` (and ``effect_percent`` for a log outcome) with
        ``median``, ``eti_90``, ``prob_gt_0``, ``prob_lt_0``, ``threshold``,
        ``prob_beyond_threshold``; ``data.adopters``; ``diagnostics.ok`` and ``problems``.
    outcome : str, optional
        What the outcome is called in the sentence (default "the outcome").
    policy : str
        What the policy is called (default "the policy").

    Returns
    -------
    str
        For a clear effect: "<where> <policy> most likely lowered <outcome> by 13% (90% interval
        5% to 21% lower); the probability of any reduction is 99%, of a reduction larger than 5% is
        95%." For a null effect the sentence says the data show no clear effect. With failed
        diagnostics it starts with "NOT RELIABLE:" and the reasons.
    """
    data = summary.get("data", {})
    diag = summary.get("diagnostics") or {}
    e, pct = _effect(summary)
    what = outcome or "the outcome"
    ratio, diff = _natural(summary, "ratio"), _natural(summary, "difference")
    if ratio is not None:
        what = f"the {'rate' if 'rate' in ratio['measure'] else 'risk'} of {what}"
    lo, hi = e["eti_90"]
    med = e["median"]
    down = med < 0
    reading = evidence(summary)
    if pct:
        d = _digits(lo, hi)
        size = _pct(med, d)
        if (lo < 0) == (hi < 0):
            a, b = sorted([abs(lo), abs(hi)])
            interval = f"90% interval {a * 100:.{d}f}% to {b * 100:.{d}f}% {'lower' if hi < 0 else 'higher'}"
        else:
            interval = f"90% interval from {lo * 100:+.{d}f}% to {hi * 100:+.{d}f}%"
    else:
        size = f"{abs(med):.3g} (in the outcome's own units)"
        interval = f"90% interval {lo:+.3g} to {hi:+.3g}"
    verb = "lowered" if down else "raised"
    where = _where(data)
    if reading == "null" or (reading == "unreliable" and (lo < 0) != (hi < 0)):
        main = (f"{where} the data show no clear effect of {policy} on {what}: the most likely change is "
                f"{'a fall' if down else 'a rise'} of {size} ({interval}, which includes no change)")
    else:
        main = f"{where} {policy} most likely {verb} {what} by {size} ({interval})"
    probs = (f"the probability of any reduction is {_prob(e['prob_lt_0'])}" if down
             else f"the probability of any increase is {_prob(e['prob_gt_0'])}")
    if e.get("prob_beyond_threshold") is not None and e.get("threshold") is not None:
        t = e["threshold"]
        kind = "reduction" if t < 0 else "increase"
        amount = _pct(t, 0 if abs(t) * 100 == round(abs(t) * 100) else 1) if pct else f"{abs(t):g}"
        probs += f", of {'a' if kind == 'reduction' else 'an'} {kind} larger than {amount} is " \
                 f"{_prob(e['prob_beyond_threshold'])}"
    text = f"{main}; {probs}."
    if ratio is not None:
        text += f" That is the {ratio['measure']} over the treated cells, {ratio['median']:.3g}"
        if diff is not None:
            dlo, dhi = diff["eti_90"]
            text += (f"; as a {diff['measure']}, {diff['median']:+.3g} (90% interval {dlo:+.3g} to "
                     f"{dhi:+.3g})")
        text += "."
    if reading == "null":
        text += " The direction of the effect is not settled by these data."
    if reading == "unreliable":
        text = ("NOT RELIABLE: " + _why_unreliable(diag) + ". The sampler did not converge well enough for "
                "these numbers to be trusted; rerun with more draws or chains before using them. " + text)
    return text
