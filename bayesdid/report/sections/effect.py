"""The effect section: the headline effect, its figure, natural-scale measures and the noise's persistence."""

from __future__ import annotations

import numpy as np

from .. import plots
from ..pieces import _absent, _img, _model_scale, _num, _pct, _table, esc
from ..reader import FIT_COMMAND, RunFolder
from ..words import names


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
        if run.family.ratio_scale:  # the ATT is on the link scale
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
        out.append(f'<p class="caption">{esc(run.family.natural_caption)}</p>')
        why = _two_probabilities(run, e, nat)
        if why:
            out.append(f"<p>{esc(why)}</p>")
    out.extend(_persistence_words(s))
    return "\n".join(out)


def _two_probabilities(run: RunFolder, e, nat) -> str:
    """One plain sentence on why the model-scale and natural-scale probabilities of an increase differ
    (binomial and count families; only when they differ as shown, to a tenth of a percent)."""
    ratio = next((n for n in nat if n.is_ratio), None)
    if not run.family.ratio_scale or ratio is None or e.prob_gt_0 is None:
        return ""
    model_p, natural_p = e.prob_gt_0, ratio.prob_above_no_effect()
    if natural_p is None or f"{model_p:.1%}" == f"{natural_p:.1%}":
        return ""
    size = run.family.size_role
    return (
        f"The probability of an increase is {model_p:.1%} on the model scale and {natural_p:.1%} for the "
        f"{ratio.measure} because the two average differently: the model-scale effect averages each adopting "
        f"jurisdiction's {run.family.link_label} difference, while the {ratio.measure} divides the treated "
        f"cells' predicted outcome with the policy by that without it, summed over the cells by their "
        f"{size}, so cells with more {size} and higher {run.family.cell_quantity} count more; both are "
        "right for their own question."
    )


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
    out.append("<h3>Size of the gap noise across jurisdictions</h3>")
    sc = s.get("gap_scales")
    if isinstance(sc, dict) and sc.get("sentence"):
        out.append(f"<p>{esc(sc['sentence'])} Prior: {esc(sc.get('prior', ''))}.</p>")
        ads = sc.get("adopters") or []
        if ads:
            out.append(
                "<p>Adopters' own gap-noise scale relative to the typical jurisdiction: "
                + "; ".join(
                    f"{esc(a['jurisdiction'])} {a['relative_scale']:.2f} "
                    f"(95% interval {a['eti95'][0]:.2f} to {a['eti95'][1]:.2f})"
                    for a in ads
                )
                + ".</p>"
            )
    else:
        out.append("<p>One gap-noise scale is shared by all jurisdictions.</p>")
    if g.get("scale_fallback"):
        out.append(f'<p class="caution">{esc(g["scale_fallback"])}</p>')
    res = (s.get("model") or {}).get("residual_sd")
    if isinstance(res, dict) and not res.get("separate", True):
        out.append(f"<p>No separate residual sd: {esc(res.get('reason', ''))}</p>")
    return out
