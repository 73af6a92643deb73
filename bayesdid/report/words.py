"""Plain-language sentences generated from a run's summary (reads results, computes nothing).

Three readings of one result, chosen by :func:`evidence`:

* ``"clear"``: the 90% interval of the effect lies on one side of zero and the sampler's
  diagnostics pass. The headline states the central estimate (the posterior median: "most likely"
  would claim a mode), its interval and the probabilities.
* ``"null"``: the 90% interval includes zero (diagnostics pass). The headline says the data show
  no clear effect, gives the same numbers, and says the direction is not settled.
* ``"unreliable"``: the diagnostics failed (or are missing). The headline opens with
  "NOT RELIABLE" and the reasons before any number, so nobody quotes the number alone.
"""

from __future__ import annotations

from ..model.family import family_record

__all__ = ["headline", "headline_of", "names", "evidence", "count_words", "check_flags"]

_NUMBER_WORDS = {
    1: "one",
    2: "two",
    3: "three",
    4: "four",
    5: "five",
    6: "six",
    7: "seven",
    8: "eight",
    9: "nine",
    10: "ten",
}


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
    if family_record((summary.get("model") or {}).get("family", "gaussian")).cell_model:
        return None
    for e in summary.get("effect_natural") or []:
        if kind in str(e.get("measure", "")):
            return e
    return None


def _ratio_as_percent(r: dict) -> dict:
    """A rate or risk ratio read as a percent change (ratio - 1), with its probabilities against 1."""
    out = {
        "median": r["median"] - 1.0,
        "eti_90": [r["eti_90"][0] - 1.0, r["eti_90"][1] - 1.0],
        "prob_lt_0": r.get("prob_lt_1"),
        "prob_gt_0": r.get("prob_gt_1"),
    }
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


def names(study: dict | None) -> dict:
    """How to name the policy, the outcome, its unit and the target group, from the study as run
    (``manifest.json["study"]``): the ``[wording]`` section, else plain defaults from the columns."""
    study = study or {}
    w = study.get("wording") or {}
    data = study.get("data") or {}
    col = data.get("outcome")
    level = (study.get("policy") or {}).get("target_group")
    return {
        "policy": w.get("policy") or "the policy",
        "outcome": w.get("outcome") or (f"the outcome ({col})" if col else "the outcome"),
        "unit": w.get("unit"),
        "target": w.get("target") or (f"the target group ({level})" if level is not None else None),
        "given": bool(w),
    }


def headline_of(summary: dict, study: dict | None, flags: list[str] | None = None) -> str:
    """:func:`headline` with the study's own names (:func:`names`)."""
    n = names(study)
    what = n["outcome"]
    if n["target"] and (study or {}).get("wording", {}).get("target"):
        what = f"{what} of {n['target']}"
    return headline(summary, outcome=what, policy=n["policy"], unit=n["unit"], flags=flags)


def headline(
    summary: dict,
    *,
    outcome: str | None = None,
    policy: str = "the policy",
    flags: list[str] | None = None,
    unit: str | None = None,
) -> str:
    """One paragraph a stakeholder can read: the central estimate, its interval, the probabilities.

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
    flags : list of str, optional
        What the checks flagged, as phrases (:func:`check_flags`); they follow the numbers in a
        "Caution:" sentence, so the headline never stays confident when a check has flagged.

    Returns
    -------
    str
        For a clear effect: "<where> <policy> lowered <outcome> by 13% as a central estimate (90%
        interval 5% to 21% lower); the probability of any reduction is 99%, of a
        reduction larger than 5% is 95%." For a null effect the sentence says the data show no clear effect. With failed
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
        size = f"{abs(med):.3g} {unit}" if unit else f"{abs(med):.3g} (in the outcome's own units)"
        interval = f"90% interval {lo:+.3g} to {hi:+.3g}"
    verb = "lowered" if down else "raised"
    where = _where(data)
    if reading == "null" or (reading == "unreliable" and (lo < 0) != (hi < 0)):
        main = (
            f"{where} the data show no clear effect of {policy} on {what}: the central estimate is "
            f"{'a fall' if down else 'a rise'} of {size} ({interval}, which includes no change)"
        )
    else:
        main = f"{where} {policy} {verb} {what} by {size} as a central estimate ({interval})"
    probs = (
        f"the probability of any reduction is {_prob(e['prob_lt_0'])}"
        if down
        else f"the probability of any increase is {_prob(e['prob_gt_0'])}"
    )
    if e.get("prob_beyond_threshold") is not None and e.get("threshold") is not None:
        t = e["threshold"]
        kind = "reduction" if t < 0 else "increase"
        amount = _pct(t, 0 if abs(t) * 100 == round(abs(t) * 100) else 1) if pct else f"{abs(t):g}"
        probs += (
            f", of {'a' if kind == 'reduction' else 'an'} {kind} larger than {amount} is "
            f"{_prob(e['prob_beyond_threshold'])}"
        )
    text = f"{main}; {probs}."
    if ratio is not None:
        text += f" That is the {ratio['measure']} over the treated cells, {ratio['median']:.3g}"
        if diff is not None:
            dlo, dhi = diff["eti_90"]
            text += f"; as a {diff['measure']}, {diff['median']:+.3g} (90% interval {dlo:+.3g} to {dhi:+.3g})"
        text += "."
    if reading == "null":
        text += " The direction of the effect is not settled by these data."
    if flags:
        text += " Caution: " + "; ".join(flags) + "."
    if reading == "unreliable":
        text = (
            "NOT RELIABLE: " + _why_unreliable(diag) + ". The sampler did not converge well enough for "
            "these numbers to be trusted; rerun with more draws or chains before using them. " + text
        )
    return text


def check_flags(checks: dict | None, sensitivity: dict | None = None, trends: dict | None = None) -> list[str]:
    """Phrases for the headline's caution: every check that flagged or failed, a placebo-in-space
    permutation p-value of 0.05 or more (so the probability statements and that p-value are read
    together), a prior-data conflict on the ATT, and a parallel-trends breakdown value below 1
    (``trends``: summary.json's ``parallel_trends``; its M_zero between 0 and 1 means a post-policy
    departure smaller than the largest pre-policy change already puts zero in the 95% interval).

    ``checks`` maps a check's name to an object with ``status``, ``reason`` and ``extra`` (the
    typed sections of :class:`bayesdid.report.reader.RunFolder`) or to a plain dict.
    """
    out = []

    def get(sec, key, default=None):
        if isinstance(sec, dict):
            return sec.get(key, default)
        return getattr(sec, key, None) if key in ("status", "reason", "offenders") else sec.extra.get(key, default)

    words = {
        "event_time": "the event-time leads depart from zero before the policy",
        "pretrend": "the adopters' gap path before the policy is unusual under the model (pre-trend check)",
        "placebo_time": "a fake start before the real one finds an effect (placebo in time)",
        "comparison": "some comparison jurisdictions changed unlike the others",
        "placebo_space": "placebo effects in comparison jurisdictions exclude zero more often than chance allows",
    }
    for name, phrase in words.items():
        sec = (checks or {}).get(name)
        if sec is None:
            continue
        st = get(sec, "status")
        if st == "flag":
            if name == "comparison":
                who = [o.get("jurisdiction") for o in get(sec, "offenders") or [] if isinstance(o, dict)]
                phrase = (
                    f"comparison jurisdiction(s) {', '.join(map(str, who))} changed unlike the others"
                    if who
                    else phrase
                )
            out.append(phrase)
        elif st == "failed":
            out.append(f"the {name.replace('_', ' ')} check could not be completed")
    sp = (checks or {}).get("placebo_space")
    if sp is not None and get(sp, "status") in ("ok", "flag"):
        p, rank, n = get(sp, "permutation_p"), get(sp, "rank"), get(sp, "n_placebos")
        if isinstance(p, (int, float)) and p >= 0.05 and rank is not None and n is not None:
            out.append(
                f"with each comparison jurisdiction as a fake adopter, the estimate ranks {rank} of "
                f"{n + 1} by size (permutation p = {p:.3f}): an effect this large is not rare among "
                "places without the policy"
            )
    par = ((sensitivity or {}).get("parameters") or {}).get("att") or {}
    if par.get("diagnosis") in ("prior_data_conflict", "prior_dominates"):
        out.append(f"power-scaling finds the ATT sensitive to its prior ({par['diagnosis'].replace('_', ' ')})")
    m_zero = ((trends or {}).get("breakdown") or {}).get("M_zero") if (trends or {}).get("status") == "ok" else None
    if isinstance(m_zero, (int, float)) and 0 < m_zero < 1:
        out.append(
            f"the parallel-trends sensitivity breaks down at M = {m_zero:.2f}: a departure after the policy "
            "smaller than the largest change before it would put zero inside the 95% interval"
        )
    return out
