"""The sensitivity section: prior power-scaling, the parallel-trends bound and the sweep's variants."""

from __future__ import annotations

import json

import numpy as np

from .. import plots
from ..pieces import _absent, _img, _is_percent, _model_scale, _num, _table, esc
from ..reader import FIT_COMMAND, SWEEP_COMMAND, RunFolder


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
