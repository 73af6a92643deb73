"""The sections about the fit itself: priors used, sampler diagnostics, assumptions, provenance."""

from __future__ import annotations

from .. import plots
from ..pieces import _absent, _badge, _img, _num, _table, esc
from ..reader import FIT_COMMAND, RunFolder


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
