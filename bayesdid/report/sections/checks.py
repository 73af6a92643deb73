"""The sections of the checks: effects by event time, the pre-trend check, the comparison jurisdictions, the placebo checks."""

from __future__ import annotations

from .. import plots
from ..pieces import _absent, _badge, _img, _model_scale, _num, _table, esc
from ..reader import CHECKS_COMMAND, RunFolder


def _check_status(run: RunFolder, name: str):
    sec = (run.checks or {}).get(name)
    if sec is None:
        return None, ""
    bits = [f"<p>Status: {_badge(sec.status)} {esc(sec.reason)}</p>"]
    extra = []
    for k, v in sec.extra.items():
        if isinstance(v, dict) or (isinstance(v, list) and v and isinstance(v[0], dict)):
            continue
        if isinstance(v, list) and len(v) > 8:
            continue  # long lists are drawn, not printed
        extra.append([k.replace("_", " "), _num(v)])
    if extra:
        bits.append(_table(["item", "value"], extra, "compact"))
    return sec, "\n".join(bits)


def _why_no_check(run: RunFolder, name: str) -> str:
    if run.checks is None:
        return "the checks have not been run for this folder: there is no checks/checks.json"
    return f"checks/checks.json has no '{name}' section"


def _event_time_section(run: RunFolder) -> str:
    sec, head = _check_status(run, "event_time")
    if sec is None:
        return _absent(f"event-time effects ({_why_no_check(run, 'event_time')}).", CHECKS_COMMAND)
    out = [head]
    df = run.table("event_time")
    if df is not None and len(df):
        d = df.sort_values("event_time")
        out.append(
            _img(
                plots.event_time_figure(
                    d["event_time"].to_numpy(float),
                    d["mean"].to_numpy(float),
                    d["lower_90"].to_numpy(float),
                    d["upper_90"].to_numpy(float),
                    xlabel="event time k (periods since the policy started; k = -1 is the reference)",
                    ylabel=f"effect ({_model_scale(run)})",
                ),
                "Effects by event time with intervals",
            )
        )
        out.append(
            '<p class="caption">Effect at each event time with its 90% interval. Leads (k &lt; -1) '
            "should sit near zero if the groups were on parallel paths before the policy.</p>"
        )
        return "\n".join(out)
    out.append(_absent(f"the event-time table: the check wrote none ({sec.status}).", CHECKS_COMMAND))
    return "\n".join(out)


def _pretrend_section(run: RunFolder) -> str:
    sec, head = _check_status(run, "pretrend")
    if sec is None:
        return _absent(f"the posterior predictive pre-trend check ({_why_no_check(run, 'pretrend')}).", CHECKS_COMMAND)
    out = [head]
    df = run.table("pretrend_band")
    if df is not None and len(df):
        order = df.drop_duplicates("period_index").sort_values("period_index")
        labels = order["period"].astype(str).tolist()
        pos = {int(v): i for i, v in enumerate(order["period_index"])}
        series = []
        for name, part in df.groupby("adopter", sort=True):
            part = part.sort_values("period_index")
            series.append(
                {
                    "label": str(name),
                    "x": part["period_index"].map(pos).to_numpy(float),
                    "observed": part["observed_gap"].to_numpy(float),
                    "lower": part["band_lower_90"].to_numpy(float),
                    "upper": part["band_upper_90"].to_numpy(float),
                    "mid": part["band_median"].to_numpy(float),
                }
            )
        out.append(
            _img(
                plots.band_figure(
                    series, xlabel="period", ylabel=f"{_gap_words(run)} ({_model_scale(run)})", xticks=labels
                ),
                "Observed gap of the adopters against the posterior predictive band",
            )
        )
        out.append(
            f'<p class="caption">Observed {esc(_gap_words(run))} of each adopting jurisdiction before the '
            "policy, against the 90% band the model predicts from the comparison jurisdictions. An "
            "observed path leaving the band suggests the groups were not on parallel paths.</p>"
        )
        return "\n".join(out)
    out.append(_absent(f"the pre-trend band: the check wrote none ({sec.status}).", CHECKS_COMMAND))
    return "\n".join(out)


def _gap_words(run: RunFolder) -> str:
    return "target minus reference gap" if run.summary["data"].get("design") == "DDD" else "outcome"


def _comparison_section(run: RunFolder) -> str:
    sec, head = _check_status(run, "comparison")
    if sec is None:
        return _absent(
            f"the check of the comparison jurisdictions ({_why_no_check(run, 'comparison')}).", CHECKS_COMMAND
        )
    out = [head]
    df = run.table("comparison")
    if df is not None and len(df):
        flagged = df["flagged"].astype(str).str.lower().eq("true").tolist()
        out.append(
            _img(
                plots.comparison_figure(
                    [str(v) for v in df["jurisdiction"]],
                    df["mean"].to_numpy(float),
                    df["lower_90"].to_numpy(float),
                    df["upper_90"].to_numpy(float),
                    flagged,
                    xlabel=f"change in the {'group gap' if _gap_words(run) != 'outcome' else 'outcome'}, before to after "
                    f"the policy start ({_model_scale(run)})",
                ),
                "Change in each comparison jurisdiction's gap, flagged ones marked",
            )
        )
        out.append(
            '<p class="caption">Each comparison jurisdiction never adopted, so its gap should '
            "barely change. Plum diamonds are flagged as unusual.</p>"
        )
        if any(flagged):
            out.append("<p>Flagged: " + ", ".join(esc(n) for n, f in zip(df["jurisdiction"], flagged) if f) + "</p>")
        return "\n".join(out)
    out.append(_absent(f"the comparison table: the check wrote none ({sec.status}).", CHECKS_COMMAND))
    return "\n".join(out)


def _placebo_section(run: RunFolder) -> str:
    out = []
    for name, title in (
        ("placebo_time", "Placebo in time (a fake start before the real one)"),
        ("placebo_space", "Placebo in space (each comparison jurisdiction as a fake adopter)"),
    ):
        out.append(f"<h3>{esc(title)}</h3>")
        sec, head = _check_status(run, name)
        if sec is None:
            out.append(_absent(f"the {name.replace('_', ' ')} check ({_why_no_check(run, name)}).", CHECKS_COMMAND))
            continue
        out.append(head)
        if name == "placebo_space":
            out.append(_placebo_space_body(run, sec))
    return "\n".join(out)


def _placebo_space_body(run: RunFolder, sec) -> str:
    df = run.table("placebo_space")
    if df is None or not len(df):
        return ""
    plc = df[df["role"] == "placebo"]
    real = df[df["role"] == "real"]
    if real.empty or plc.empty:
        return ""
    r = float(real["mean"].iloc[0])
    out = [
        _img(
            plots.placebo_figure(
                plc["mean"].to_numpy(float), r, xlabel=f"estimated effect, posterior mean ({_model_scale(run)})"
            ),
            "Placebo estimates of the comparison jurisdictions with the real estimate marked",
        ),
        '<p class="caption">Each dot is the effect the model estimates when a comparison jurisdiction, '
        "which never adopted, is treated as the adopter. The plum line is the real estimate; the shaded "
        "region holds placebos at least as large in size.</p>",
    ]
    p_bayes = sec.extra.get("permutation_p")
    ls = run.summary.get("least_squares") or {}
    e = run.effect
    below = e.prob_lt_0 if e.median < 0 else e.prob_gt_0
    parts = [
        f"<p><strong>Reading the probabilities together.</strong> The posterior gives a "
        f"{below:.0%} probability that the effect is {'below' if e.median < 0 else 'above'} zero: it "
        "judges the adopters' change against the gap noise the model learns from every comparison "
        "jurisdiction and period. The placebo-in-space ranking asks a different question: how often does "
        "a place without the policy show an estimate at least as large?"
    ]
    if isinstance(p_bayes, (int, float)):
        parts.append(
            f" Here {int(sec.extra.get('rank', 0)) - 1} of {int(sec.extra.get('n_placebos', 0))} "
            f"placebos are as large (permutation p = {p_bayes:.3f}, on the posterior means)."
        )
    if isinstance(ls.get("p_permutation"), (int, float)):
        parts.append(
            f" The least-squares cross-check asks the same question of its own estimates "
            f"(permutation p = {ls['p_permutation']:.3f})."
        )
    parts.append(
        " With few comparison jurisdictions such p-values can only take coarse values (1/(N+1) "
        "steps). A small posterior probability of no effect together with a large placebo p-value "
        "means the effect is clear relative to the model's noise but not rare among places without "
        "the policy: read it as weaker evidence.</p>"
    )
    out.append("".join(parts))
    return "\n".join(out)
