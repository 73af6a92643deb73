"""Plain-language sentences generated from a run's summary (reads results, computes nothing)."""

from __future__ import annotations

__all__ = ["headline"]


def _pct(v: float) -> str:
    return f"{abs(v) * 100:.1f}%"


def headline(summary: dict) -> str:
    """One paragraph a stakeholder can read: the most likely effect, its interval, the probabilities.

    Honest about weak evidence and failed diagnostics: then it says the result is not reliable.
    """
    data = summary["data"]
    n_ad = len(data["adopters"])
    where = (f"In the adopting jurisdiction ({data['adopters'][0]})" if n_ad == 1
             else f"Across the {n_ad} adopting jurisdictions")
    diag = summary["diagnostics"]
    pct = "effect_percent" in summary
    e = summary["effect_percent"] if pct else summary["effect"]
    lo, hi = e["eti_90"]
    if pct:
        direction = "lowered" if e["median"] < 0 else "raised"
        size = _pct(e["median"])
        a, b = sorted([abs(lo), abs(hi)])
        interval = (f"90% interval {a * 100:.1f}% to {b * 100:.1f}% {'lower' if hi < 0 else 'higher'}"
                    if (lo < 0) == (hi < 0) else f"90% interval from {lo * 100:+.1f}% to {hi * 100:+.1f}%")
        main = f"{where} the policy most likely {direction} the outcome by {size} ({interval})"
    else:
        direction = "lowered" if e["median"] < 0 else "raised"
        main = (f"{where} the policy most likely {direction} the outcome by {abs(e['median']):.3g} "
                f"(90% interval {lo:+.3g} to {hi:+.3g})")
    probs = (f"the probability of any reduction is {e['prob_lt_0']:.0%}" if e["median"] < 0
             else f"the probability of any increase is {e['prob_gt_0']:.0%}")
    if e.get("prob_beyond_threshold") is not None:
        t = e["threshold"]
        kind = "reduction" if t < 0 else "increase"
        amount = _pct(t) if pct else f"{abs(t):g}"
        probs += f", of a {kind} larger than {amount} is {e['prob_beyond_threshold']:.0%}"
    text = f"{main}; {probs}."
    if (lo < 0) != (hi < 0):
        text += " The 90% interval includes no effect, so the data do not settle the direction."
    if not diag.get("ok", False):
        text = ("NOT RELIABLE: the sampler's diagnostics failed (" + "; ".join(diag.get("problems", [])) +
                "), so the numbers below may be wrong. " + text)
    return text
