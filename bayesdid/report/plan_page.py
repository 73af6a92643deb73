"""The page and figure of a plan folder (``bayesdid plan``): words and drawing only, no statistics.

Everything here reads the summary that :func:`bayesdid.plan.run_plan` returns (``plan.json``).
"""

from __future__ import annotations

import base64
from pathlib import Path

from .pieces import _CSS, _table, esc

__all__ = ["plot_assurance", "render_plan_page", "effect_words", "layout_words", "plan_sentences"]

_SMALL = {1: "one", 2: "two", 3: "three", 4: "four", 5: "five", 6: "six", 7: "seven", 8: "eight", 9: "nine"}


def _count(k: int, noun: str, plural: str | None = None) -> str:
    word = _SMALL.get(k, f"{k:,}")
    return f"{word} {noun if k == 1 else (plural or noun + 's')}"


def effect_words(effect: float, log_outcome: bool) -> str:
    """'a 10% cut', 'a 5% rise', 'no effect', 'an effect of -0.3' (outcome units)."""
    if effect == 0:
        return "no effect"
    if log_outcome:
        return f"a {abs(effect) * 100:g}% {'cut' if effect < 0 else 'rise'}"
    return f"an effect of {effect:+g}"


def layout_words(lay: dict, period_name: str) -> str:
    """'one adopter, 39 comparisons and 8 quarters after the start'."""
    post = lay["post_periods"]
    after = "after the start" if lay["adopters"] == 1 else "after the last start"
    return (
        f"{_count(lay['adopters'], 'adopter')}, {_count(lay['comparisons'], 'comparison')} and "
        f"{_count(post, period_name)} {after} (counting the start)"
    )


def _rule_words(plan: dict) -> str:
    d = plan["decision"]
    log = plan["effect_scale"].startswith("relative")
    thr = d["threshold"]
    if log:
        what = (
            f"a {'cut' if d['direction'] == 'below' else 'rise'} larger than {abs(thr) * 100:g}%"
            if thr
            else f"any {'cut' if d['direction'] == 'below' else 'rise'}"
        )
    else:
        what = f"an effect {d['direction']} {thr:g}"
    return f"the probability of {what} is at least {d['level']:g}"


def _prob_words(p: float, se: float, n: int) -> str:
    """'0.62 (Monte Carlo error 0.04)'; at 0 or 1 the exact one-sided 95% bound instead of an error of 0.

    With no (or only) successes in n data sets the binomial error sqrt(p (1 - p) / n) is 0, which reads
    as certainty; the Clopper-Pearson bound 1 - 0.05^(1/n) (common practice) says what n data sets allow.
    """
    if n and p == 0:
        return f"0.00 (in none of {n} simulated data sets: at most {1 - 0.05 ** (1 / n):.2f} with 95% confidence)"
    if n and p == 1:
        return f"1.00 (in all {n} simulated data sets: at least {0.05 ** (1 / n):.2f} with 95% confidence)"
    return f"{p:.2f} (Monte Carlo error {se:.2f})"


def plan_sentences(summary: dict, layouts: set[str] | None = None) -> list[str]:
    """One plain sentence per layout and non-zero effect, and one per layout for the false decisions.

    ``layouts``: only these layout keys (default: every layout).
    """
    plan = summary["plan"]
    log = plan["effect_scale"].startswith("relative")
    lays = {x["key"]: x for x in plan["layouts"]}
    out = []
    for row in summary["assurance"]:
        lay = lays[row["layout"]]
        if row["assurance"] is None or (layouts is not None and row["layout"] not in layouts):
            continue
        prob = _prob_words(row["assurance"], row["assurance_mcse"], row.get("reps") or 0)
        head = f"With {layout_words(lay, plan['period_name'])}"
        if row["effect"] == 0:
            width = (
                ""
                if row["width_95_mean"] is None
                else f"; the 95% interval of the effect would typically be {row['width_95_mean']:.3g} wide"
                + (" on the log scale" if log else "")
            )
            out.append(
                f"{head}, a policy with no effect would wrongly be judged to meet the rule with probability "
                f"{prob}{width}."
            )
        else:
            perm = (
                ""
                if row["permutation_power"] is None
                else f"; the permutation test would detect it with probability {row['permutation_power']:.2f}"
            )
            out.append(f"{head}, {effect_words(row['effect'], log)} would be detected with probability {prob}{perm}.")
    return out


def plot_assurance(summary: dict, path: str | Path) -> Path:
    """Assurance against the true effect, one line per layout, with +-2 Monte Carlo errors."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .plots import PALETTE

    plan = summary["plan"]
    colours = [
        PALETTE["posterior"],
        PALETTE["alternative"],
        PALETTE["flag"],
        PALETTE["reference"],
        "#2a8c82",
        "#6b4fa0",
        "#a0522d",
        "#3d3d3d",
    ]
    markers = ["o", "s", "^", "D", "v", "P", "X", "*"]
    fig, ax = plt.subplots(figsize=(7.2, 4.2))
    for i, lay in enumerate(plan["layouts"]):
        rows = [r for r in summary["assurance"] if r["layout"] == lay["key"] and r["assurance"] is not None]
        if not rows:
            continue
        x = [r["effect"] * (100 if plan["effect_scale"].startswith("relative") else 1) for r in rows]
        y = [r["assurance"] for r in rows]
        e = [2 * (r["assurance_mcse"] or 0) for r in rows]
        c = colours[i % len(colours)]
        ax.errorbar(
            x,
            y,
            yerr=e,
            color=c,
            marker=markers[i % len(markers)],
            ms=5,
            lw=1.5,
            capsize=3,
            label=f"{lay['adopters']} adopter(s), {lay['comparisons']} comparisons, "
            f"{lay['post_periods']} {plan['period_name']}s from the last start",
        )
        na = [(xx, r["normal_assurance"]) for xx, r in zip(x, rows) if r.get("normal_assurance") is not None]
        if na:
            ax.plot(*zip(*na), color=c, lw=0.9, ls="--")
    ax.axhline(
        1 - plan["decision"]["level"],
        color=PALETTE["reference"],
        lw=0.8,
        ls=":",
        label=f"1 - level = {1 - plan['decision']['level']:g}",
    )
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("assurance (share of data sets concluding)")
    ax.set_xlabel("true effect" + (" (% change)" if plan["effect_scale"].startswith("relative") else ""))
    ax.grid(color=PALETTE["grid"], lw=0.6)
    ax.legend(fontsize=8, frameon=False, loc="best")
    ax.set_title("Assurance by true effect (bars: +-2 Monte Carlo errors; dashed: normal approximation)", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def _f(v, d=2) -> str:
    return "" if v is None else f"{v:.{d}f}"


def render_plan_page(summary: dict, png: str | Path | None = None) -> str:
    """A single-file HTML page: the rule, the plain sentences, the figure and the table."""
    plan = summary["plan"]
    log = plan["effect_scale"].startswith("relative")
    parts = [
        f"<h1>{esc(plan['title'])}</h1>",
        '<p class="sub">Planning before the data: how likely the analysis is to reach a conclusion '
        "(assurance), from simulated data sets fitted with the full model.</p>",
        f"<p>The rule: conclude when {esc(_rule_words(plan))}. Each line below comes from "
        f"{plan['simulation']['reps']} simulated data set(s) per layout and effect.</p>",
    ]
    # the planned layout in the headline; the [vary] layouts' sentences folded below it (the figure
    # and the table show them all)
    keys = [x["key"] for x in plan["layouts"]]
    sentences = plan_sentences(summary, {keys[0]})
    parts.append('<div class="headline">' + "<br>".join(esc(s) for s in sentences) + "</div>")
    others = plan_sentences(summary, set(keys[1:])) if len(keys) > 1 else []
    if others:
        parts.append(
            f"<details><summary>The same for the other {len(keys) - 1} layout(s) of the grid</summary><p>"
            + "<br>".join(esc(s) for s in others)
            + "</p></details>"
        )
    if png is not None and Path(png).is_file():
        data = base64.b64encode(Path(png).read_bytes()).decode("ascii")
        parts.append(f'<figure><img src="data:image/png;base64,{data}" alt="assurance by true effect"></figure>')
    header = [
        "layout",
        "true effect",
        "assurance",
        "MC error",
        "95% width (model scale)",
        "permutation power",
        "normal approximation",
        "fits passing diagnostics",
        "decisions a sampler rerun would flip (net change)",
    ]
    rows = []
    for r in summary["assurance"]:
        rows.append(
            [
                r["layout"],
                effect_words(r["effect"], log),
                _f(r["assurance"]),
                _f(r["assurance_mcse"]),
                _f(r["width_95_mean"], 3),
                _f(r["permutation_power"]),
                _f(r["normal_assurance"]),
                _f(r["diagnostics_ok_share"]),
                ""
                if r.get("decision_flip_share") is None
                else f"{r['decision_flip_share']:.3f} ({r['decision_shift']:+.3f})",
            ]
        )
    parts.append("<h2>Assurance by layout and true effect</h2>" + _table(header, rows))
    parts.append(
        '<p class="note">Layout keys: C = comparison jurisdictions, T = periods. Assurance: the share of '
        "simulated data sets on which the rule concludes; at no effect it is the false-decision rate, "
        f"which the rule keeps near or below {1 - plan['decision']['level']:g} when the threshold is 0. "
        "Monte Carlo error: sqrt(p (1 - p) / N). Permutation power: the least-squares placebo-in-space "
        f"test, one-sided, at level {1 - plan['decision']['level']:g}, on the same data sets. Normal "
        "approximation: known variance components and independent noise (empty where it does not "
        "apply). Fits passing diagnostics: "
        + esc(summary.get("notes", {}).get("diagnostics", "the share of fits passing the sampler's checks"))
        + ". Decisions a sampler rerun would flip: the expected share of data sets whose conclusion "
        "depends on the Monte Carlo error of the posterior probability, and in brackets the expected net "
        "change of the assurance; when that is well below the assurance's Monte Carlo error, longer chains "
        "would not change the reading.</p>"
    )
    noise = plan["noise"]
    if noise["source"] == "stated":
        nrows = [[k, str(v), noise["meaning"].get(k, "")] for k, v in noise["scales"].items()]
        parts.append("<h2>Noise (stated, model scale)</h2>" + _table(["scale", "value", "meaning"], nrows))
    else:
        nrows = [[k, str(v), noise["meaning"].get(k, "")] for k, v in noise["posterior_medians"].items()]
        parts.append(
            f"<h2>Noise (posterior of {esc(noise['run'])}, one draw per data set; medians)</h2>"
            + _table(["scale", "median", "meaning"], nrows)
        )
    notes = list(plan.get("notes", []))
    if summary.get("failed"):
        notes.append(f"{len(summary['failed'])} rep(s) failed; their errors are in plan.json")
    if notes:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>")
    run = summary["run"]
    parts.append(
        f'<p class="note">Executor: {esc(run["executor"])}; reps run now {run["ran_now"]}, kept from an '
        f"earlier run {run['kept_from_earlier_run']}; compiles per worker "
        f"{esc(run['compiles_per_worker'])}. Sampler: {plan['simulation']['chains']} "
        f"chain{'s' if plan['simulation']['chains'] != 1 else ''} of "
        f"{plan['simulation']['draws']} draws after {plan['simulation']['tune']} tuning steps.</p>"
    )
    parts.append(
        '<p class="note">Simulated data are invented from the stated design; the assurance is only as good '
        "as the noise scales behind it. Results support, and do not replace, review by qualified people.</p>"
    )
    return (
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>'
        + esc(plan["title"])
        + "</title><style>"
        + _CSS
        + "</style></head><body><main>"
        + "".join(str(p) for p in parts)
        + "</main></body></html>\n"
    )
