"""The least-squares cross-check section, drawn on its own scale or converted to the posterior's."""

from __future__ import annotations

from .. import plots
from ..pieces import _absent, _img, _is_percent, _num, _table, esc
from ..reader import FIT_COMMAND, RunFolder
from ..words import names

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


def _crosscheck_section(run: RunFolder) -> str:
    s = run.summary
    ls = s.get("least_squares") or {}
    if ls.get("not_applicable") or ls.get("status") == "not applicable":
        why = ls.get("not_applicable") or ls.get("reason", "")
        return f"<p>The least-squares cross-check does not apply to this study: {esc(why)}</p>"
    if "estimate" not in ls:
        return _absent("the least-squares cross-check (summary.json has no least_squares estimate).", FIT_COMMAND)
    # Least squares on cells of a binomial or count outcome regresses the cells' proportions or rates
    # (weighted by trials or exposure): a risk or rate difference, the record's ``difference_scale``
    rec = run.family
    e = run.effect
    f = 1.0
    if rec.difference_scale is not None:
        measure, f, axis = rec.difference_scale
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
            f"{rec.cell_quantity} (weighted by their {rec.size_role}) estimates a "
            f"{measure.split()[0]} difference, multiplied here by {f:g}; the "
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
