"""Figures for the report, drawn with matplotlib and returned as SVG text.

Every function takes values already computed by the library (summary.json, the checks tables,
posterior draws) and draws them; none estimates anything. SVG text is rendered as paths, so a
figure looks the same in every browser and printer and carries no fonts or links.

The palette is our own. Its colours differ in lightness as well as hue and avoid the red-green
axis, so they stay apart for readers with the common colour-vision deficiencies (common
practice: pair a blue with an orange, and never rely on colour alone; flagged points also change
marker shape).
"""

from __future__ import annotations

import contextlib
import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

__all__ = [
    "PALETTE",
    "svg_of",
    "collect_figures",
    "in_section",
    "effect_figure",
    "interval_figure",
    "event_time_figure",
    "band_figure",
    "comparison_figure",
    "placebo_figure",
    "trends_figure",
    "raw_path_figure",
    "rank_figure",
]

#: name -> hex colour. Blue-teal for the posterior, amber for the least-squares/alternative
#: readings, plum for flags, slate for reference lines, a pale blue for bands.
PALETTE = {
    "posterior": "#1f5f8b",
    "band": "#b9d3e6",
    "alternative": "#c9781a",
    "flag": "#8e2f6f",
    "reference": "#5d6670",
    "threshold": "#c9781a",
    "ink": "#1d232a",
    "grid": "#e3e6ea",
}

_RC = {
    "font.size": 10,
    "axes.titlesize": 11,
    "axes.labelsize": 10,
    "axes.edgecolor": PALETTE["reference"],
    "axes.labelcolor": PALETTE["ink"],
    "xtick.color": PALETTE["ink"],
    "ytick.color": PALETTE["ink"],
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": PALETTE["grid"],
    "grid.linewidth": 0.8,
    "svg.fonttype": "path",
    "svg.hashsalt": "bayesdid",
}


_COLLECTED: list | None = None
_SECTION = [""]


@contextlib.contextmanager
def collect_figures():
    """Keep every figure drawn inside the block, open, as (section, matplotlib Figure) pairs (the
    notebook API reads the report's figures this way; the page itself is unchanged)."""
    global _COLLECTED
    prev, _COLLECTED = _COLLECTED, []
    try:
        yield _COLLECTED
    finally:
        _COLLECTED = prev


def in_section(name: str) -> None:
    """Name the report section the next figures belong to (for :func:`collect_figures`)."""
    _SECTION[0] = name


def svg_of(fig) -> str:
    """The figure as standalone SVG text (no metadata date, so output is reproducible)."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None, "Creator": "bayesdid"})
    if _COLLECTED is not None:
        _COLLECTED.append((_SECTION[0], fig))
    else:
        plt.close(fig)
    return buf.getvalue()


def _fig(width: float = 7.0, height: float = 3.4):
    with plt.rc_context(_RC):
        fig, ax = plt.subplots(figsize=(width, height), layout="constrained")
    for k, v in _RC.items():  # rc_context does not outlive the block for already-built artists
        if k.startswith("axes.spines."):
            ax.spines[k.split(".")[-1]].set_visible(v)
    ax.grid(True, color=PALETTE["grid"], linewidth=0.8)
    ax.set_axisbelow(True)
    return fig, ax


def effect_figure(
    draws: np.ndarray,
    *,
    interval: tuple[float, float],
    threshold: float | None,
    scale: float = 1.0,
    xlabel: str,
    median: float | None = None,
) -> str:
    """Histogram of the effect's posterior draws, its 90% interval shaded, zero and threshold marked.

    ``scale`` multiplies values for display only (100 turns a proportion into percent points).
    """
    with plt.rc_context(_RC):
        fig, ax = _fig()
        x = np.asarray(draws, dtype=float).ravel() * scale
        lo, hi = interval[0] * scale, interval[1] * scale
        ax.axvspan(lo, hi, color=PALETTE["band"], alpha=0.7, lw=0, label="90% interval")
        bins = max(20, min(60, int(np.sqrt(x.size))))
        ax.hist(
            x, bins=bins, density=True, color=PALETTE["posterior"], alpha=0.9, lw=0, label="posterior of the effect"
        )
        ax.axvline(0, color=PALETTE["reference"], lw=1.2, ls="-", label="no effect")
        if median is not None:
            ax.axvline(median * scale, color=PALETTE["ink"], lw=1.2, ls=":", label="central estimate (median)")
        if threshold is not None:
            ax.axvline(threshold * scale, color=PALETTE["threshold"], lw=2, ls="--", label="decision threshold")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("posterior density")
        ax.legend(frameon=False, fontsize=8.5, loc="upper left", bbox_to_anchor=(1.0, 1.0))
        return svg_of(fig)


def interval_figure(
    labels: list[str],
    mid: list[float],
    lower: list[float],
    upper: list[float],
    *,
    xlabel: str,
    colors: list[str] | None = None,
    zero: bool = True,
    markers: list[str] | None = None,
    legend: list[tuple[str, str, str]] | None = None,
) -> str:
    """One horizontal interval per row (variants, estimators), labelled on the left.

    ``lower``/``upper`` may hold NaN for a row whose interval is not available (a point only).
    """
    n = len(labels)
    with plt.rc_context(_RC):
        fig, ax = _fig(7.0, max(1.8, 0.45 * n + 1.1))
        y = np.arange(n)[::-1]
        cols = colors or [PALETTE["posterior"]] * n
        mks = markers or ["o"] * n
        for i in range(n):
            if np.isfinite(lower[i]) and np.isfinite(upper[i]):
                ax.hlines(y[i], lower[i], upper[i], color=cols[i], lw=3)
            if mid[i] is not None and np.isfinite(mid[i]):
                ax.plot(mid[i], y[i], marker=mks[i], color=cols[i], ms=7, mec="white", mew=0.8)
        if zero:
            ax.axvline(0, color=PALETTE["reference"], lw=1)
        ax.set_yticks(y, labels, fontsize=9)
        ax.set_ylim(-0.7, n - 0.3)
        ax.set_xlabel(xlabel)
        if legend:
            from matplotlib.lines import Line2D

            handles = [Line2D([], [], color=c, marker=m, lw=3, ms=7) for _, c, m in legend]
            fig.legend(
                handles,
                [t for t, _, _ in legend],
                frameon=False,
                fontsize=8.5,
                loc="outside lower center",
                ncols=len(legend),
            )
        return svg_of(fig)


def event_time_figure(k, mid, lower, upper, *, xlabel: str, ylabel: str) -> str:
    """Effect at each event time k as a point with its interval; the policy start marked between -1 and 0."""
    with plt.rc_context(_RC):
        fig, ax = _fig(7.0, 3.4)
        k = np.asarray(k, dtype=float)
        mid, lower, upper = (np.asarray(v, dtype=float) for v in (mid, lower, upper))
        lead = k < 0
        for sel, c, m, lab in (
            (lead, PALETTE["reference"], "o", "before the policy (leads)"),
            (~lead, PALETTE["posterior"], "o", "after the policy starts"),
        ):
            if sel.any():
                ax.errorbar(
                    k[sel],
                    mid[sel],
                    yerr=[mid[sel] - lower[sel], upper[sel] - mid[sel]],
                    fmt=m,
                    color=c,
                    ms=6,
                    lw=2,
                    capsize=0,
                    label=lab,
                )
        ax.axhline(0, color=PALETTE["reference"], lw=1)
        ax.axvline(-0.5, color=PALETTE["threshold"], lw=1.5, ls="--", label="policy starts")
        ax.set_xticks(k)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        from matplotlib.lines import Line2D

        handles = [
            Line2D([], [], color=PALETTE["reference"], marker="o", lw=2),
            Line2D([], [], color=PALETTE["posterior"], marker="o", lw=2),
            Line2D([], [], color=PALETTE["threshold"], lw=1.5, ls="--"),
        ]
        ax.legend(
            handles,
            ["before the policy (leads)", "after the policy starts", "policy starts"],
            frameon=False,
            fontsize=8.5,
            loc="upper left",
            bbox_to_anchor=(1.0, 1.0),
        )
        return svg_of(fig)


def band_figure(series: list[dict], *, xlabel: str, ylabel: str, xticks: list | None = None) -> str:
    """Observed path over a shaded predictive band, one panel per series (shared axes).

    Each series: {"label", "x", "observed", "lower", "upper", "mid" (optional)}.
    """
    n = max(1, len(series))
    cols = min(n, 3)
    rows = int(np.ceil(n / cols))
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(
            rows, cols, figsize=(7.0, 2.9 * rows + 0.4), sharex=True, sharey=True, layout="constrained", squeeze=False
        )
        for i, ax in enumerate(axes.ravel()):
            if i >= n:
                ax.set_visible(False)
                continue
            s = series[i]
            x = np.asarray(s["x"], dtype=float)
            ax.grid(True, color=PALETTE["grid"], linewidth=0.8)
            ax.set_axisbelow(True)
            ax.fill_between(x, s["lower"], s["upper"], color=PALETTE["band"], lw=0, label="predictive band")
            if s.get("mid") is not None:
                ax.plot(x, s["mid"], color=PALETTE["posterior"], lw=1.2, ls="--", label="predicted")
            ax.plot(x, s["observed"], color=PALETTE["alternative"], lw=2, marker="o", ms=4, label="observed")
            ax.axhline(0, color=PALETTE["reference"], lw=1)
            ax.set_title(s["label"], fontsize=10)
            if xticks is not None:
                ax.set_xticks(np.arange(len(xticks)), [str(t) for t in xticks], rotation=45, ha="right", fontsize=8)
        fig.supxlabel(xlabel, fontsize=10)
        fig.supylabel(ylabel, fontsize=10)
        handles, labels = axes.ravel()[0].get_legend_handles_labels()
        fig.legend(handles, labels, frameon=False, fontsize=8.5, loc="outside upper center", ncols=len(labels))
        return svg_of(fig)


def comparison_figure(
    names: list[str],
    mid: list[float],
    lower: list[float] | None,
    upper: list[float] | None,
    flagged: list[bool],
    *,
    xlabel: str,
) -> str:
    """Each comparison jurisdiction's gap change as a dot (with interval), flagged ones as plum diamonds."""
    order = np.argsort(np.asarray(mid, dtype=float))
    n = len(names)
    with plt.rc_context(_RC):
        fig, ax = _fig(7.0, max(2.4, 0.19 * n + 1.0))
        for rank, i in enumerate(order):
            c = PALETTE["flag"] if flagged[i] else PALETTE["posterior"]
            if lower is not None and upper is not None and np.isfinite(lower[i]) and np.isfinite(upper[i]):
                ax.hlines(
                    rank, lower[i], upper[i], color=c, lw=1.6 if flagged[i] else 1.0, alpha=1.0 if flagged[i] else 0.6
                )
            ax.plot(mid[i], rank, marker="D" if flagged[i] else "o", color=c, ms=6 if flagged[i] else 4)
        ax.axvline(0, color=PALETTE["reference"], lw=1)
        ax.set_yticks(np.arange(n), [names[i] for i in order], fontsize=7 if n > 25 else 8.5)
        ax.set_ylim(-0.8, n - 0.2)
        ax.set_xlabel(xlabel)
        from matplotlib.lines import Line2D

        ax.legend(
            [
                Line2D([], [], color=PALETTE["posterior"], marker="o", lw=0),
                Line2D([], [], color=PALETTE["flag"], marker="D", lw=0),
            ],
            ["comparison jurisdiction", "flagged"],
            frameon=False,
            fontsize=8.5,
            loc="upper left",
            bbox_to_anchor=(1.0, 1.0),
        )
        return svg_of(fig)


def placebo_figure(placebo: list[float], real: float, *, xlabel: str, names: list[str] | None = None) -> str:
    """Placebo-in-space estimates as a dot strip (one per comparison jurisdiction, sorted), with the
    mirror band |x| >= |real| shaded and the real estimate marked: the permutation p-value counts the
    dots inside the shaded band."""
    x = np.sort(np.asarray(placebo, dtype=float))
    with plt.rc_context(_RC):
        fig, ax = _fig(7.0, 2.6)
        lo = min(x.min(initial=real), -abs(real)) - 0.05 * (abs(real) + 1e-12)
        hi = max(x.max(initial=real), abs(real)) + 0.05 * (abs(real) + 1e-12)
        span = (hi - lo) or 1.0
        lo, hi = lo - 0.05 * span, hi + 0.05 * span
        a = abs(real)
        ax.axvspan(lo, -a, color=PALETTE["band"], alpha=0.6, lw=0, label="as large as the real estimate")
        ax.axvspan(a, hi, color=PALETTE["band"], alpha=0.6, lw=0)
        jitter = (np.arange(x.size) % 5 - 2) * 0.12
        ax.plot(x, jitter, "o", color=PALETTE["reference"], ms=5, alpha=0.85, label="placebo (comparison jurisdiction)")
        ax.axvline(real, color=PALETTE["flag"], lw=2.2, label="real estimate (adopters)")
        ax.axvline(0, color=PALETTE["reference"], lw=1)
        ax.set_xlim(lo, hi)
        ax.set_ylim(-0.8, 0.8)
        ax.set_yticks([])
        ax.set_xlabel(xlabel)
        ax.legend(frameon=False, fontsize=8.5, loc="upper left", bbox_to_anchor=(1.0, 1.0))
        return svg_of(fig)


def trends_figure(
    M: list[float],
    lower: list[float],
    upper: list[float],
    *,
    breakdown: float | None,
    ylabel: str,
    threshold: float | None = None,
    no_effect: float = 0.0,
) -> str:
    """The effect's 95% interval against M (departures from parallel trends), breakdown M marked.

    ``no_effect``: where the line of no effect is drawn (0 for differences, 1 for ratios)."""
    with plt.rc_context(_RC):
        fig, ax = _fig(7.0, 3.2)
        M = np.asarray(M, dtype=float)
        ax.fill_between(M, lower, upper, color=PALETTE["band"], step=None, lw=0)
        ax.plot(M, lower, color=PALETTE["posterior"], marker="o", ms=4, lw=1.5)
        ax.plot(M, upper, color=PALETTE["posterior"], marker="o", ms=4, lw=1.5)
        ax.axhline(no_effect, color=PALETTE["reference"], lw=1)
        if threshold is not None:
            ax.axhline(threshold, color=PALETTE["threshold"], lw=1, ls="--")
        if breakdown is not None and breakdown <= (M.max() if M.size else 0):
            ax.axvline(breakdown, color=PALETTE["flag"], lw=1.5, ls=":")
            ax.annotate(
                f"breakdown M = {breakdown:.2g}",
                (breakdown, ax.get_ylim()[1]),
                xytext=(4, -12),
                textcoords="offset points",
                color=PALETTE["flag"],
                fontsize=9,
            )
        ax.set_xlabel("M: post-policy departure per period, in multiples of the largest pre-policy change")
        ax.set_ylabel(ylabel)
        return svg_of(fig)


def raw_path_figure(series: list[dict], *, xlabel: str, ylabel: str, xticks: list) -> str:
    """Each adopter's observed path against the comparison jurisdictions' mean and 10-90% band.

    Each series: {"label", "observed", "mean", "lower", "upper", "start"} over the periods in ``xticks``;
    ``start`` is the index of the first treated period (a vertical line just before it).
    """
    n = max(1, len(series))
    cols = min(n, 2)
    rows = int(np.ceil(n / cols))
    x = np.arange(len(xticks), dtype=float)
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(
            rows, cols, figsize=(7.0, 2.9 * rows + 0.5), sharex=True, squeeze=False, layout="constrained"
        )
        for i, ax in enumerate(axes.ravel()):
            if i >= n:
                ax.set_visible(False)
                continue
            s = series[i]
            ax.set_axisbelow(True)
            ax.fill_between(
                x, s["lower"], s["upper"], color=PALETTE["band"], lw=0, label="comparison jurisdictions, 10-90%"
            )
            ax.plot(x, s["mean"], color=PALETTE["posterior"], lw=1.5, ls="--", label="comparison mean")
            ax.plot(x, s["observed"], color=PALETTE["alternative"], lw=2, marker="o", ms=4, label="adopter")
            ax.axvline(s["start"] - 0.5, color=PALETTE["flag"], lw=1.2, ls=":", label="policy starts")
            ax.set_title(s["label"], fontsize=10)
            step = max(1, int(np.ceil(len(xticks) / 12)))
            ax.set_xticks(x[::step], [str(t) for t in xticks][::step], rotation=45, ha="right", fontsize=8)
        fig.supxlabel(xlabel, fontsize=10)
        fig.supylabel(ylabel, fontsize=10)
        handles, labels = axes.ravel()[0].get_legend_handles_labels()
        fig.legend(handles, labels, frameon=False, fontsize=8.5, loc="outside upper center", ncols=2)
        return svg_of(fig)


def rank_figure(ranks: dict[str, np.ndarray], *, bins: int = 20) -> str:
    """Rank histograms: per parameter, the ranks of its draws pooled over chains, one outline per chain.

    ``ranks[name]`` has shape (chains, draws) and holds ranks 0..chains*draws-1. Well-mixed chains give flat,
    overlapping histograms; a chain stuck apart shows as a histogram piled at one end.
    """
    n = max(1, len(ranks))
    cols = min(n, 2)
    rows = int(np.ceil(n / cols))
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(rows, cols, figsize=(7.0, 2.3 * rows + 0.4), squeeze=False, layout="constrained")
        for i, ax in enumerate(axes.ravel()):
            if i >= n:
                ax.set_visible(False)
                continue
            name, r = list(ranks.items())[i]
            r = np.asarray(r)
            total = r.size
            edges = np.linspace(0, total, bins + 1)
            for c in range(r.shape[0]):
                h, _ = np.histogram(r[c], bins=edges)
                ax.stairs(h, edges, lw=1.4, label=f"chain {c + 1}")
            ax.axhline(r.shape[1] / bins, color=PALETTE["reference"], lw=1, ls="--")
            ax.set_title(name, fontsize=10)
            ax.set_yticks([])
        fig.supxlabel("rank of the draw among all chains' draws (dashed: what mixed chains give)", fontsize=10)
        return svg_of(fig)
