"""The single-file HTML report of a run folder.

``write_report(run_dir)`` reads the files a run leaves behind and writes ``run_dir/report.html``:
one self-contained page (inline CSS, figures as ``data:`` SVG images, no script, no external
fetch; a Content-Security-Policy forbids both) that prints to PDF. It computes no statistics: every
number comes from the run folder.

Inputs (each optional part that is absent gets a section saying so and naming the command that
produces it; no section disappears):

* ``summary.json`` (required) and ``manifest.json`` (written by ``bayesdid fit``);
* ``posterior.nc`` (ArviZ DataTree): draws of the effect, for the density figure only;
* ``checks/checks.json`` with sections ``event_time``, ``pretrend``, ``placebo_time``,
  ``comparison``, ``placebo_space`` (each with ``status`` and ``reason``) and CSV tables beside it;
* ``summary.json["sensitivity"]`` (power-scaling) and ``sweep/verdict.json`` (variant intervals).

Every string that comes from the data or the study file is HTML-escaped.
"""

from __future__ import annotations

import base64
import html
import json
import math
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np

from ..outputs import clean_leftovers, owner_tag
from . import plots
from .reader import CHECKS_COMMAND, FIT_COMMAND, SWEEP_COMMAND, RunFolder
from .words import check_flags, evidence, headline_of, names

__all__ = ["SECTIONS", "HEADINGS", "RunFolder", "render_report", "write_report"]

#: (anchor id, heading) of every section, in page order. Each is always present.
SECTIONS = [
    ("effect", "The effect of the policy"),
    ("event-time", "Effects by event time"),
    ("pretrend", "Pre-trend check"),
    ("comparison", "Comparison jurisdictions"),
    ("placebo", "Placebo checks"),
    ("sensitivity", "Prior and specification sensitivity"),
    ("cross-check", "Least-squares cross-check"),
    ("data", "The data"),
    ("priors", "Priors used"),
    ("diagnostics", "Sampler diagnostics"),
    ("assumptions", "Assumptions and cautions"),
    ("provenance", "How this report was made"),
]

#: Every heading on the page, the headline first.
HEADINGS = [("headline", "What happened"), *SECTIONS]


def esc(v) -> str:
    """HTML-escape any value's text (quotes too, so it is safe inside attributes)."""
    return html.escape(str(v), quote=True)


# ----------------------------------------------------------------------------------------- pieces


def _img(svg: str, alt: str) -> str:
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    return f'<figure><img src="data:image/svg+xml;base64,{data}" alt="{esc(alt)}"></figure>'


def _absent(what: str, command: str) -> str:
    return (
        f'<p class="absent"><strong>Not available in this run folder:</strong> {esc(what)} '
        f"Produce it with <code>{esc(command)}</code>.</p>"
    )


def _table(header: list[str], rows: list[list], cls: str = "") -> str:
    h = "".join(f"<th>{esc(c)}</th>" for c in header)
    body = "".join(
        "<tr>" + "".join(f"<td>{c if isinstance(c, _Raw) else esc(c)}</td>" for c in r) + "</tr>" for r in rows
    )
    return f'<table class="{cls}"><thead><tr>{h}</tr></thead><tbody>{body}</tbody></table>'


class _Raw(str):
    """Markup built here from escaped parts (not re-escaped in a table cell)."""


def _badge(status: str) -> _Raw:
    s = str(status).lower()
    cls = {"ok": "pass", "pass": "pass", "flag": "fail", "fail": "fail", "failed": "fail"}.get(s, "na")
    return _Raw(f'<span class="badge {cls}">{esc(status)}</span>')


def _num(v, digits: int = 3) -> str:
    if v is None:
        return "—"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(v):
            return "—"
        return f"{v:.{digits}g}" if abs(v) < 1e5 else f"{v:,.0f}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_num(x, digits) for x in v) + "]"
    return str(v)


def _pct(v) -> str:
    return "—" if v is None else f"{v * 100:+.1f}%"


def _is_percent(summary) -> bool:
    return "effect_percent" in summary


# ----------------------------------------------------------------------------------------- sections


def _effect_section(run: RunFolder) -> str:
    s = run.summary
    pct = run.effect_percent is not None
    e = run.effect_percent if pct else run.effect
    out = []
    draws = run.effect_draws()
    if draws is not None and draws.size > 1:
        shown = np.expm1(draws) if pct else draws  # display scale: percent = exp(ATT) - 1 (effects.py)
        nm = names((run.manifest or {}).get("study"))
        who = (
            (nm["target"] or "target group") + " in adopting jurisdictions"
            if s["data"].get("design") == "DDD"
            else "adopting jurisdictions"
        )
        unit = nm["unit"] or "outcome units"
        xlabel = f"change in {nm['outcome']} (%), {who}" if pct else f"change in {nm['outcome']} ({unit}), {who}"
        if (s.get("model") or {}).get("family", "gaussian") != "gaussian":  # the ATT is on the link scale
            xlabel = f"effect on {nm['outcome']}, {_model_scale(run)} scale (log of the ratio), {who}"
        out.append(
            _img(
                plots.effect_figure(
                    shown,
                    interval=tuple(e.eti_90),
                    threshold=e.threshold,
                    scale=100.0 if pct else 1.0,
                    xlabel=xlabel,
                    median=e.median,
                ),
                "Posterior distribution of the effect with its 90% interval and the decision threshold",
            )
        )
        out.append(
            '<p class="caption">Posterior distribution of the average effect on the treated (ATT). '
            "Shaded: 90% equal-tailed interval. Solid line: no effect. Dashed: the decision threshold "
            "from the study file.</p>"
        )
    else:
        out.append(
            _absent(
                "posterior draws of the effect (posterior.nc is missing or holds no 'att'), so the "
                "density figure cannot be drawn; the numbers below come from summary.json.",
                FIT_COMMAND,
            )
        )
    fmt = _pct if pct else (lambda v: _num(v, 3))
    rows = [
        ["central estimate (posterior median)", fmt(e.median)],
        ["mean", fmt(e.mean)],
        ["90% interval (equal-tailed)", f"{fmt(e.eti_90[0])} to {fmt(e.eti_90[1])}"],
        ["95% interval (equal-tailed)", f"{fmt(e.eti_95[0])} to {fmt(e.eti_95[1])}"],
        ["90% highest-density interval", f"{fmt(e.hdi_90[0])} to {fmt(e.hdi_90[1])}"],
        ["probability of an increase", f"{e.prob_gt_0:.1%}"],
        ["probability of a reduction", f"{e.prob_lt_0:.1%}"],
    ]
    if e.prob_beyond_threshold is not None:
        t = e.threshold
        rows.append(
            [
                f"probability of {'a reduction' if t < 0 else 'an increase'} beyond the threshold ({fmt(t)})",
                f"{e.prob_beyond_threshold:.1%}",
            ]
        )
    out.append(f"<h3>Average effect ({esc(e.measure)})</h3>")
    out.append(_table(["quantity", "value"], rows))
    per = s.get("per_adopter") or []
    if per:
        prow = []
        for r in per:
            q = r.get("percent", r) if pct else r
            prow.append(
                [
                    r["adopter"],
                    r.get("start", ""),
                    _num(r.get("weight"), 3),
                    fmt(q["median"]),
                    f"{fmt(q['eti_90'][0])} to {fmt(q['eti_90'][1])}",
                    f"{q['prob_lt_0']:.1%}",
                ]
            )
        out.append("<h3>Each adopting jurisdiction</h3>")
        if len(per) > 1:
            qs = [r.get("percent", r) if pct else r for r in per]
            k = 100.0 if pct else 1.0
            out.append(
                _img(
                    plots.interval_figure(
                        [str(r["adopter"]) for r in per],
                        [k * q["median"] for q in qs],
                        [k * q["eti_90"][0] for q in qs],
                        [k * q["eti_90"][1] for q in qs],
                        xlabel="effect (%)" if pct else f"effect ({e.measure})",
                    ),
                    "Effect in each adopting jurisdiction with its 90% interval",
                )
            )
        out.append(
            _table(
                [
                    "jurisdiction",
                    "first treated period",
                    "weight in the average",
                    "central estimate",
                    "90% interval",
                    "probability of a reduction",
                ],
                prow,
            )
        )
    nat = [n for n in run.natural if n.measure != e.measure]
    if nat:
        out.append("<h3>On the natural scale</h3>")
        nrows = []
        for n in nat:
            above, below = n.prob_above_no_effect(), n.prob_below_no_effect()
            nrows.append(
                [
                    n.measure,
                    _num(n.median),
                    f"{_num(n.eti_90[0])} to {_num(n.eti_90[1])}",
                    _num(n.no_effect),
                    "—" if above is None else f"{above:.1%}",
                    "—" if below is None else f"{below:.1%}",
                ]
            )
        out.append(
            _table(
                [
                    "measure",
                    "central estimate",
                    "90% interval",
                    "no effect at",
                    "probability above",
                    "probability below",
                ],
                nrows,
            )
        )
        out.append(
            '<p class="caption">From counterfactual predictions over the treated cells, with and without '
            "the policy, averaged with the cells' own trials or exposure.</p>"
        )
    out.extend(_persistence_words(s))
    return "\n".join(out)


def _persistence_words(s: dict) -> list[str]:
    """How the gap noise was modelled over periods (summary.json's model.gap_noise and persistence)."""
    g = (s.get("model") or {}).get("gap_noise")
    if not isinstance(g, dict):
        return []
    out = ["<h3>Persistence of the gap noise over periods</h3>"]
    pers = s.get("persistence")
    if isinstance(pers, dict) and pers.get("sentence"):
        out.append(f"<p>{esc(pers['sentence'])} Prior: {esc(pers.get('prior', ''))}.</p>")
    else:
        out.append(f"<p>{esc(g.get('meaning', ''))}.</p>")
    if g.get("fallback"):
        out.append(f'<p class="caution">{esc(g["fallback"])}</p>')
    res = (s.get("model") or {}).get("residual_sd")
    if isinstance(res, dict) and not res.get("separate", True):
        out.append(f"<p>No separate residual sd: {esc(res.get('reason', ''))}</p>")
    return out


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


def _model_scale(run: RunFolder) -> str:
    m = run.summary.get("model") or {}
    fam = m.get("family", "gaussian")
    if fam == "binomial":
        return "log odds"
    if fam in ("poisson", "negbinomial"):
        return "log rate"
    return "log outcome" if m.get("log_outcome") else "outcome units"


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


def _trends_words(run: RunFolder) -> list[str]:
    """summary.json's parallel_trends section: figure of the interval against M, table, one sentence."""
    tr = run.summary.get("parallel_trends")
    out = ["<h3>Departures from parallel trends</h3>"]
    if not isinstance(tr, dict):
        return out + [
            _absent(
                "the parallel-trends sensitivity (summary.json has no 'parallel_trends' entry).",
                "bayesdid trends RUN_DIR",
            )
        ]
    if tr.get("status") != "ok" or not tr.get("grid"):
        return out + [f"<p>Not applicable: {esc(tr.get('reason', ''))}</p>"]
    pct = _is_percent(run.summary)
    scale = str(tr.get("scale", "model"))
    ratio = scale.startswith("link")  # binomial and count families: the link-scale bound read as ratios
    ratio_name = "odds ratio" if "odds" in scale else "rate ratio"
    if ratio:
        conv = lambda v: float(np.exp(v))  # noqa: E731
    else:
        conv = (lambda v: float(np.expm1(v)) * 100.0) if pct else (lambda v: float(v))
    grid = tr["grid"]
    thr = tr.get("threshold_model_scale")
    out.append(
        _img(
            plots.trends_figure(
                [g["M"] for g in grid],
                [conv(g["lower_95"]) for g in grid],
                [conv(g["upper_95"]) for g in grid],
                breakdown=(tr.get("breakdown") or {}).get("M_zero"),
                threshold=None if thr is None else conv(thr),
                ylabel="effect, 95% interval" + (f" ({ratio_name})" if ratio else " (%)" if pct else " (model scale)"),
                no_effect=1.0 if ratio else 0.0,
            ),
            "95% interval of the effect against M, with the breakdown value",
        )
    )
    out.append(f"<p><strong>{esc(tr.get('sentence', ''))}</strong></p>")
    if ratio:
        fmt = lambda v: f"{conv(v):.3f}"  # noqa: E731
    else:
        fmt = (lambda v: f"{conv(v):.1f}%") if pct else (lambda v: _num(v, 3))
    rows = [
        [
            _num(g["M"]),
            f"{fmt(g['lower_95'])} to {fmt(g['upper_95'])}",
            f"{g['prob_reduction']:.1%}",
            f"{g['prob_increase']:.1%}",
            f"{g['prob_beyond_threshold']:.1%}",
        ]
        for g in grid
    ]
    out.append(
        _table(
            [
                "M",
                f"95% interval ({ratio_name})" if ratio else "95% interval",
                "P(reduction) for every allowed path",
                "P(increase) for every allowed path",
                "P(beyond the decision threshold)",
            ],
            rows,
        )
    )
    b = tr.get("breakdown") or {}
    out.append(
        '<p class="caption">After the policy the adopters\' gap may depart from its parallel path by up to M '
        "times the largest period-to-period change it showed before (relative magnitudes, after Rambachan "
        "and Roth 2023; a bound applied to every posterior draw)"
        + (
            f"; computed on the link scale, where the model states parallel trends, and shown as {ratio_name}s"
            if ratio
            else ""
        )
        + f". Breakdown values: {esc(b.get('M_zero_meaning', ''))}: "
        f"{_num(b.get('M_zero'))}; {esc(b.get('M_decision_meaning', ''))}: {_num(b.get('M_decision'))}. "
        f"Table: trends.csv.</p>"
    )
    if tr.get("reason"):
        out.append(f"<p>{esc(tr['reason'])}.</p>")
    return out


def _sensitivity_section(run: RunFolder) -> str:
    out = _trends_words(run)
    sens = run.summary.get("sensitivity")
    out.append("<h3>Power-scaling sensitivity of the priors and the likelihood</h3>")
    if isinstance(sens, dict) and sens:
        rows = []
        items = sens.get("parameters", sens)
        if isinstance(items, dict):
            for par, val in items.items():
                if isinstance(val, dict):
                    rows.append(
                        [par]
                        + [_num(val.get(k)) for k in ("prior", "likelihood")]
                        + [val.get("diagnosis", val.get("verdict", ""))]
                    )
        elif isinstance(items, list):
            for val in items:
                if isinstance(val, dict):
                    rows.append(
                        [val.get("parameter", val.get("name", ""))]
                        + [_num(val.get(k)) for k in ("prior", "likelihood")]
                        + [val.get("diagnosis", val.get("verdict", ""))]
                    )
        if rows:
            out.append(_table(["parameter", "prior sensitivity", "likelihood sensitivity", "diagnosis"], rows))
        else:
            out.append(f"<pre>{esc(json.dumps(sens, indent=1, default=str)[:4000])}</pre>")
    else:
        out.append(_absent("power-scaling sensitivity (summary.json has no 'sensitivity' entry).", FIT_COMMAND))
    out.append("<h3>Effect interval per prior and specification variant</h3>")
    v = run.verdict
    if v is None:
        out.append(_absent("a sweep of prior and specification variants (sweep/verdict.json).", SWEEP_COMMAND))
    elif v.status != "ok" or not v.rows:
        out.append(f"<p>The sweep could not be judged: {esc(v.reason or v.status)}.</p>")
    else:
        rows = v.rows
        out.append(
            _img(
                plots.interval_figure(
                    [r.label for r in rows],
                    [r.effect_mean for r in rows],
                    [r.eti_90[0] for r in rows],
                    [r.eti_90[1] for r in rows],
                    xlabel=f"effect: mean and 90% interval ({_model_scale(run)})",
                ),
                "Effect interval per sensitivity variant",
            )
        )
        out.append(
            _table(
                ["variant", "effect mean", "90% interval", "shift from the base (base posterior sd)"],
                [
                    [r.label, _num(r.effect_mean), f"{_num(r.eti_90[0])} to {_num(r.eti_90[1])}", _num(r.shift_sd)]
                    for r in rows
                ],
            )
        )
        held = []
        for c in v.checks:
            if c.get("holds") is None:
                held.append([c.get("what", c.get("check")), "not applicable", c.get("reason", "")])
            else:
                held.append(
                    [
                        c.get("what", c.get("check")),
                        "holds" if c["holds"] else "breaks",
                        f"{c.get('held_by')} of {c.get('of')} variants agree with the base",
                    ]
                )
        out.append(_table(["what is compared with the base study", "result", "detail"], held))
        if v.moves_most:
            mm = v.moves_most
            out.append(
                f"<p>Moves the effect most: {esc(mm['label'])} ({mm['shift_sd']:.2f} posterior sd of the base).</p>"
            )
        if v.not_judged:
            out.append(f'<p class="note">Not judged (failed or unfinished): {esc(", ".join(v.not_judged))}.</p>')
    return "\n".join(out)


_LS_LABELS = [
    ("estimate", "least-squares DDD/DiD coefficient"),
    ("se_classical", "classical s.e."),
    ("se_hc1", "heteroskedasticity-robust s.e. (HC1)"),
    ("se_cr1", "cluster-robust s.e. (CR1)"),
    ("p_cr1", "p-value, CR1"),
    ("ci_cr1_95", "95% interval, CR1"),
    ("p_wild", "p-value, wild cluster bootstrap"),
    ("ci_wild_95", "95% interval, wild cluster bootstrap"),
    ("p_permutation", "p-value, placebo-in-space permutation"),
    ("clusters", "clusters (jurisdictions)"),
    ("treated_clusters", "treated clusters"),
    ("cells", "cells"),
    ("regressors", "regressors"),
    ("method", "method"),
]


#: family -> (natural measure of the posterior on the least-squares scale, factor from the least-squares
#: estimate to that measure, axis label). Least squares on cells of a binomial or count outcome
#: regresses the cells' proportions or rates (weighted by trials or exposure): a risk or rate difference.
_LS_SCALES = {
    "binomial": ("risk difference, percentage points", 100.0, "risk difference (percentage points)"),
    "poisson": ("rate difference per 1,000 units of exposure", 1000.0, "rate difference per 1,000 units of exposure"),
}
_LS_SCALES["negbinomial"] = _LS_SCALES["poisson"]


def _crosscheck_section(run: RunFolder) -> str:
    s = run.summary
    ls = s.get("least_squares") or {}
    if ls.get("not_applicable") or ls.get("status") == "not applicable":
        why = ls.get("not_applicable") or ls.get("reason", "")
        return f"<p>The least-squares cross-check does not apply to this study: {esc(why)}</p>"
    if "estimate" not in ls:
        return _absent("the least-squares cross-check (summary.json has no least_squares estimate).", FIT_COMMAND)
    fam = (s.get("model") or {}).get("family", "gaussian")
    e = run.effect
    f = 1.0
    if fam in _LS_SCALES:
        measure, f, axis = _LS_SCALES[fam]
        nat = next((n for n in run.natural if n.measure == measure), None)
        if nat is None:
            return (
                f"<p>The least-squares estimate ({_num(ls['estimate'] * f, 4)}, {esc(axis)}) cannot be set "
                "beside the posterior: this run folder has no posterior "
                f"{esc(measure)} (summary.json 'effect_natural').</p>"
            )
        e = nat
        scale_note = (
            f"Both on one scale, the {axis}: the least-squares regression on the cells' "
            f"{'proportions' if fam == 'binomial' else 'rates'} (weighted by their "
            f"{'trials' if fam == 'binomial' else 'exposure'}) estimates a "
            f"{'risk' if fam == 'binomial' else 'rate'} difference, multiplied here by {f:g}; the "
            "posterior's is the difference of its counterfactual predictions over the treated cells, "
            "with and without the policy."
        )
    else:
        axis = "effect on the model scale" + (
            " (difference in log outcome)"
            if _is_percent(s)
            else f" ({names((run.manifest or {}).get('study'))['unit'] or 'outcome units'})"
        )
        scale_note = "Both on the model scale."
    nan = float("nan")
    labels = [
        "posterior, 90% interval",
        "posterior, 95% interval",
        "least squares, CR1",
        "least squares, wild cluster bootstrap",
        "least squares, permutation",
    ]
    est = ls["estimate"] * f
    mid = [e.median, e.median, est, est, est]
    ci_cr1 = ls.get("ci_cr1_95")
    ci_w = ls.get("ci_wild_95")

    def sc(v):
        return nan if v is None else v * f

    lower = [e.eti_90[0], e.eti_95[0], sc(ci_cr1[0]) if ci_cr1 else nan, sc(ci_w[0]) if ci_w else nan, nan]
    upper = [e.eti_90[1], e.eti_95[1], sc(ci_cr1[1]) if ci_cr1 else nan, sc(ci_w[1]) if ci_w else nan, nan]

    def pnote(key):
        return f"p = {ls[key]:.3f}" if isinstance(ls.get(key), (int, float)) else "not computed"

    labels[2] += f"\n({pnote('p_cr1')}" + (f", s.e. {ls['se_cr1'] * f:.3g})" if "se_cr1" in ls else ")")
    labels[3] += f"\n({pnote('p_wild')})"
    labels[4] += f"\n({pnote('p_permutation')}; point estimate only)"
    if not any(k in ls for k in ("se_cr1", "p_cr1", "ci_cr1_95", "p_wild", "ci_wild_95", "p_permutation")):
        labels, mid, lower, upper = (v[:3] for v in (labels, mid, lower, upper))
        labels[2] = "least squares\n(point estimate; inference not in this run)"
    P, A = plots.PALETTE["posterior"], plots.PALETTE["alternative"]
    n = len(labels)
    fig = plots.interval_figure(
        labels,
        mid,
        lower,
        upper,
        colors=[P, P, A, A, A][:n],
        markers=["o", "o", "s", "s", "s"][:n],
        xlabel=axis,
        legend=[("posterior median with interval", P, "o"), ("least-squares estimate with 95% interval", A, "s")],
    )
    out = [
        _img(fig, "Posterior interval against the least-squares estimate and its three kinds of inference"),
        '<p class="caption">The Bayesian posterior against the least-squares fixed-effects estimate on the '
        "same cells, with cluster-robust (CR1), wild cluster bootstrap and permutation inference. A bar is "
        f"missing where that interval is not in the run folder. {esc(scale_note)}</p>",
    ]
    rows = [[lab, _num(ls[k], 4)] for k, lab in _LS_LABELS if k in ls]
    out.append(
        _table(["quantity", "value" + (f" (least-squares scale; × {f:g} for the figure)" if f != 1 else "")], rows)
    )
    missing = [lab for k, lab in _LS_LABELS[:10] if k not in ls and k != "ci_cr1_95"]
    if missing:
        why = ls.get("skipped") or {}
        detail = "; ".join(
            lab + (f" ({why[k]})" if isinstance(why.get(k), str) else "")
            for k, lab in _LS_LABELS[:10]
            if k not in ls and k != "ci_cr1_95"
        )
        out.append(_absent("parts of the cross-check: " + detail + ".", FIT_COMMAND + " (with the full cross-check)"))
    if isinstance(ls.get("covariates_note"), str):
        out.append(f'<p class="note">Least squares {esc(ls["covariates_note"])}.</p>')
    if ls.get("advice"):
        out.append(f'<p class="note">{esc(ls["advice"])}</p>')
    return "\n".join(out)


def _data_section(run: RunFolder) -> str:
    d = run.summary["data"]
    cols = ((run.manifest or {}).get("study") or {}).get("data") or {}
    rows = [
        ["rows in the table", _num(d.get("rows"))],
        ["cells (jurisdiction × group × period)", _num(d.get("cells"))],
        ["jurisdictions", _num(d.get("jurisdictions"))],
        ["periods", _num(d.get("periods"))],
        ["groups (reference first, target last)", ", ".join(map(str, d.get("groups", [])))],
        ["design", d.get("design", "")],
        ["adopting jurisdictions", _num(len(d.get("adopters", [])))],
    ]
    for role in ("outcome", "jurisdiction", "period", "group", "unit", "exposure", "trials"):
        if cols.get(role):
            rows.append([f"{role} column", cols[role]])
    m = run.summary.get("model") or {}
    if m:
        rows.append(
            [
                "model",
                f"{m.get('family', '')}{', log outcome' if m.get('log_outcome') else ''}; {m.get('likelihood', '')}",
            ]
        )
    out = [_table(["item", "value"], rows)]
    starts = d.get("starts") or {}
    if starts:
        out.append("<h3>Adopters and their first treated period</h3>")
        out.append(_table(["adopting jurisdiction", "first treated period"], [[k, v] for k, v in starts.items()]))
    out.extend(_raw_paths(run))
    for n in run.summary.get("notes") or []:
        out.append(f'<p class="note">{esc(n)}</p>')
    return "\n".join(out)


#: at most this many adopters get a panel of their own in the raw-data figure
RAW_PANELS = 6


def _raw_paths(run: RunFolder) -> list[str]:
    """The raw gap (DDD) or outcome (DiD) of each adopter over all periods against the comparison
    jurisdictions' mean and 10-90% band, from the cell means in posterior.nc."""
    c = run.cell_means()
    if c is None:
        return [
            _absent("the cell means (posterior.nc is missing), so the raw-data figure cannot be drawn.", FIT_COMMAND)
        ]
    mean, start = c["mean"], c["start"]
    T = mean.shape[2]
    ddd = mean.shape[1] == 2
    path = mean[:, 1, :] - mean[:, 0, :] if ddd else mean[:, 0, :]
    comp = start >= T
    adopters = [int(j) for j in np.flatnonzero(~comp)]
    if not comp.any() or not adopters:
        return []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a period where no comparison has rows
        cm = np.nanmean(path[comp], axis=0)
        lo, hi = np.nanpercentile(path[comp], [10, 90], axis=0)
    series = [
        {
            "label": c["jurisdictions"][j],
            "observed": path[j],
            "mean": cm,
            "lower": lo,
            "upper": hi,
            "start": int(start[j]),
        }
        for j in adopters[:RAW_PANELS]
    ]
    nm = names((run.manifest or {}).get("study"))
    log = bool((run.summary.get("model") or {}).get("log_outcome"))
    what = f"log {nm['outcome']}" if log else nm["outcome"]
    if ddd:
        grp = c["groups"]
        ylabel = f"{what}: {grp[1]} minus {grp[0]}"
    else:
        ylabel = what
    out = [
        "<h3>The raw data</h3>",
        _img(
            plots.raw_path_figure(series, xlabel="period", ylabel=ylabel, xticks=c["periods"]),
            "Each adopter's observed path against the comparison jurisdictions' mean and band",
        ),
    ]
    more = len(adopters) - RAW_PANELS
    out.append(
        '<p class="caption">Observed cell means, before any model: '
        + ("the gap between the target and the reference group" if ddd else "the outcome")
        + " in each adopting jurisdiction (orange) against the mean (dashed) and the 10-90% range (band) "
        "of the comparison jurisdictions; the dotted line marks the policy start. Levels may differ; "
        "what the analysis relies on is that the paths move alike before the start."
        + (f" {more} more adopting jurisdiction(s) are not drawn." if more > 0 else "")
        + "</p>"
    )
    return out


def _priors_section(run: RunFolder) -> str:
    pr = run.summary.get("priors") or {}
    if not pr:
        return _absent("the prior scales (summary.json has no 'priors' entry).", FIT_COMMAND)
    rows = [
        [k, _num(v.get("scale"), 4), v.get("source", ""), v.get("meaning", "")]
        for k, v in pr.items()
        if isinstance(v, dict)
    ]
    return (
        "<p>Default scales are set from the data (for example from the outcome's pooled standard "
        "deviation) and can be changed in the study file's [priors] section.</p>"
        + _table(["prior", "scale", "source", "meaning"], rows)
    )


def _diagnostics_section(run: RunFolder) -> str:
    dg = run.summary.get("diagnostics") or {}
    th = dg.get("thresholds") or {}
    rows = []
    spec = [
        ("rhat_max", "largest R-hat", "below", lambda v, t: v < t),
        ("ess_bulk_min", "smallest bulk ESS", "at least", lambda v, t: v >= t),
        ("ess_tail_min", "smallest tail ESS", "at least", lambda v, t: v >= t),
        ("divergences", "divergent transitions", "at most", lambda v, t: v <= t),
    ]
    for key, label, word, ok in spec:
        if key in dg and key in th and dg[key] is not None:
            rows.append(
                [label, _num(dg[key], 4), f"{word} {_num(th[key])}", _badge("pass" if ok(dg[key], th[key]) else "fail")]
            )
    out = []
    if rows:
        out.append(_table(["measure", "value", "threshold", "result"], rows))
    else:
        out.append(_absent("sampler diagnostics.", FIT_COMMAND))
    if th.get("source"):
        out.append(f'<p class="caption">Thresholds: {esc(th["source"])}.</p>')
    overall = "pass" if dg.get("ok") else "fail"
    out.append(f"<p>Overall: {_badge(overall)} {esc(dg.get('advice', '')) if not dg.get('ok') else ''}</p>")
    if not dg.get("ok"):
        ranks = run.worst_mixing()
        if ranks:
            out.append("<h3>Rank plots of the worst-mixing quantities</h3>")
            out.append(_img(plots.rank_figure(ranks), "Rank histograms per chain of the worst-mixing quantities"))
            out.append(
                '<p class="caption">Each draw ranked among all chains\' draws; one outline per chain. '
                "Chains that explore the same distribution give flat, overlapping outlines; an outline "
                "piled at one end is a chain stuck apart (Vehtari et al. 2021).</p>"
            )
    return "\n".join(out)


_ASSUMPTIONS = """
<p>The estimate is a {design}: it compares how the {gap} changed in the adopting jurisdictions with how it
changed in the comparison jurisdictions over the same periods. It is a causal effect only if these hold:</p>
<ul>
<li><strong>Parallel paths.</strong> Without the policy, the {gap} in the adopting jurisdictions would have moved
like the comparison jurisdictions'. The event-time leads, the pre-trend check and the placebo in time test this
before the policy; nothing can test it afterwards.</li>
<li><strong>No other change at the same time.</strong> Another policy or shock that hit the {target} in the
adopting jurisdictions when the policy started would be counted as the policy's effect.</li>
<li><strong>No spill-over.</strong> The policy did not change outcomes in the comparison jurisdictions{ref}.</li>
<li><strong>Stable make-up.</strong> The people counted in each group did not change because of the policy (for
example by moving or by being reclassified).</li>
<li><strong>The model's assumptions.</strong> Normal noise on the {scale} scale, partial pooling of jurisdictions,
and the priors listed above. The sensitivity section shows how much the answer depends on the priors.</li>
</ul>
<p><strong>What would break it:</strong> a pre-policy gap that was already moving in the adopters, a flagged
comparison jurisdiction that drives the result, a placebo that finds an "effect" where there is none, a result
that flips under reasonable priors, or failed sampler diagnostics. With only {n_ad} adopting jurisdiction(s) the
result rests on few places: one unusual adopter can move it, and cluster-robust least-squares errors are not
reliable (Conley and Taber 2011; MacKinnon and Webb 2017).</p>
<p class="caution"><strong>This report supports, and does not replace, review by qualified people.</strong> Read
it together with knowledge of how the policy was put in place, the quality of the data, and the rules and
guidance that apply where you are. Probabilities here are conditional on the model and the data as given.</p>
"""


def _assumptions_section(run: RunFolder) -> str:
    d = run.summary["data"]
    ddd = d.get("design") == "DDD"
    groups = d.get("groups") or []
    target = esc(groups[-1]) if ddd and groups else "outcome"
    gap = f"gap between the target group ({target}) and the reference group" if ddd else "outcome"
    return _ASSUMPTIONS.format(
        design="triple difference (DDD)" if ddd else "difference in differences (DiD)",
        gap=gap,
        target=f"target group ({target})" if ddd else "people covered",
        ref=" nor in the reference group of the adopting jurisdictions" if ddd else "",
        scale="log" if (run.summary.get("model") or {}).get("log_outcome") else "outcome",
        n_ad=esc(len(d.get("adopters", []))),
    )


def _provenance_section(run: RunFolder) -> str:
    m = run.manifest or {}
    rows = [["run folder", str(run.path)]]
    if m:
        rows += [
            ["created", m.get("created", "")],
            ["seed", str(m.get("seed", ""))],
            ["sampler", ", ".join(f"{k} {v}" for k, v in (m.get("sampler") or {}).items())],
            ["data table", m.get("table", "")],
            ["data SHA-256", m.get("data_sha256", "")],
            ["command", " ".join(map(str, m.get("command") or []))],
            ["versions", ", ".join(f"{k} {v}" for k, v in (m.get("versions") or {}).items())],
        ]
    t = run.summary.get("timing") or {}
    if t:
        rows.append(
            [
                "timing (seconds)",
                ", ".join(f"{k.removesuffix('_s')} {v:.1f}" for k, v in t.items() if isinstance(v, (int, float))),
            ]
        )
    files = sorted(str(p.relative_to(run.path)) for p in run.path.rglob("*") if p.is_file() and p.name != "report.html")
    rows.append(["files read from", ", ".join(files)])
    out = [_table(["item", "value"], rows)]
    if not m:
        out.append(_absent("the manifest (versions, seed, data hash).", FIT_COMMAND))
    return "\n".join(out)


_CSS = """
:root { --ink:#1d232a; --muted:#5d6670; --line:#d5dae0; --pass:#1f5f8b; --fail:#8e2f6f; --na:#5d6670;
        --warn-bg:#f7eee2; --warn:#8a4f0c; }
* { box-sizing: border-box; }
body { font: 15px/1.5 "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: var(--ink); margin: 0;
       background: #fff; }
main { max-width: 980px; margin: 0 auto; padding: 28px 32px 60px; }
h1 { font-size: 26px; margin: 0 0 4px; }
h2 { font-size: 20px; margin: 34px 0 10px; padding-top: 10px; border-top: 2px solid var(--line); }
h3 { font-size: 16px; margin: 20px 0 6px; }
.sub { color: var(--muted); margin: 0 0 16px; }
.headline { font-size: 18px; line-height: 1.55; padding: 14px 18px; border-left: 6px solid var(--pass);
            background: #eef4f9; margin: 12px 0; }
.headline.unreliable { border-color: var(--fail); background: #f6ecf2; }
.headline.null { border-color: var(--na); background: #f1f2f4; }
nav ol { columns: 2; font-size: 14px; color: var(--muted); }
nav a { color: var(--pass); }
figure { margin: 10px 0 4px; }
figure img { width: 100%; max-width: 780px; height: auto; display: block; }
.caption { color: var(--muted); font-size: 13px; margin-top: 2px; }
table { border-collapse: collapse; margin: 8px 0 12px; font-size: 14px; width: 100%; }
table.compact { width: auto; }
th, td { text-align: left; padding: 4px 10px 4px 0; border-bottom: 1px solid var(--line); vertical-align: top; }
th { color: var(--muted); font-weight: 600; }
td { word-break: break-word; }
.badge { display: inline-block; padding: 0 8px; border-radius: 9px; font-size: 13px; font-weight: 700;
         color: #fff; background: var(--na); }
.badge.pass { background: var(--pass); }
.badge.fail { background: var(--fail); }
.absent { background: var(--warn-bg); color: var(--warn); padding: 8px 12px; border-radius: 4px; }
.note { color: var(--muted); font-size: 14px; }
.caution { border: 1px solid var(--line); padding: 10px 14px; }
code { font-size: 13px; background: #f1f2f4; padding: 1px 4px; word-break: break-word; }
@page { margin: 16mm 14mm; }
@media print {
  body { font-size: 11pt; }
  main { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-after: avoid; }
  figure, table, .headline { break-inside: avoid; }
  .headline, .badge, .absent { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""

_SECTION_FUNCS = {
    "effect": _effect_section,
    "event-time": _event_time_section,
    "pretrend": _pretrend_section,
    "comparison": _comparison_section,
    "placebo": _placebo_section,
    "sensitivity": _sensitivity_section,
    "cross-check": _crosscheck_section,
    "data": _data_section,
    "priors": _priors_section,
    "diagnostics": _diagnostics_section,
    "assumptions": _assumptions_section,
    "provenance": _provenance_section,
}


def render_report(run_dir: str | Path) -> str:
    """The report of ``run_dir`` as HTML text (see the module docstring for what it reads)."""
    run = RunFolder(run_dir)
    s = run.summary
    text = headline_of(s, (run.manifest or {}).get("study"), flags=check_flags(run.checks, s.get("sensitivity")))
    reading = evidence(s)
    title = s.get("title") or "bayesdid run"
    parts = []
    for anchor, heading in SECTIONS:
        plots.in_section(anchor)
        try:
            body = _SECTION_FUNCS[anchor](run)
        except Exception as exc:  # noqa: BLE001 - a section that cannot be drawn says why, never vanishes
            body = (
                f'<p class="absent"><strong>This section could not be drawn</strong> from the files in the '
                f"run folder: {esc(type(exc).__name__)}: {esc(exc)}</p>"
            )
        parts.append(f'<section id="{anchor}"><h2>{esc(heading)}</h2>\n{body}\n</section>')
    toc = "".join(f'<li><a href="#{a}">{esc(h)}</a></li>' for a, h in SECTIONS)
    design = s["data"].get("design", "")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; img-src data:; style-src 'unsafe-inline'">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{esc(title)} — bayesdid report</title>
<style>{_CSS}</style>
</head>
<body>
<main>
<h1>{esc(title)}</h1>
<p class="sub">Bayesian {esc(design)} analysis by bayesdid · {esc((run.manifest or {}).get("created", ""))}</p>
<section id="headline"><h2>What happened</h2>
<p class="headline {reading}">{esc(text)}</p>
</section>
<nav><ol>{toc}</ol></nav>
{chr(10).join(parts)}
</main>
</body>
</html>
"""


def write_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Write the report to ``out`` (default ``run_dir/report.html``) atomically; returns its path.

    Raises
    ------
    ReportError
        The run folder is missing, or lacks a readable summary.json; nothing is written.
    """
    text = render_report(run_dir)
    target = Path(out) if out is not None else Path(run_dir) / "report.html"
    clean_leftovers(target)  # a report killed while it was written
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.partial-{owner_tag()}-", dir=target.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target
