"""Summaries of calibration reps: coverage and SBC tables, the ECDF band and plot, the written folder."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..outputs import write_rows_csv
from .tasks import LEVELS, METHODS, SBC_BINS, SBC_DRAWS, SBC_PARAMETERS, _pct


def _share(values) -> dict:
    v = [bool(x) for x in values if x is not None and not (isinstance(x, float) and math.isnan(x))]
    N = len(v)
    if N == 0:
        return {"coverage": None, "mcse": None, "reps": 0}
    p = sum(v) / N
    return {"coverage": p, "mcse": math.sqrt(p * (1 - p) / N), "reps": N}


def coverage_table(rows: list[dict]) -> dict:
    """Coverage (share of reps whose interval holds the truth) with MCSE sqrt(p (1 - p) / N), widths, bias."""
    ok = [r for r in rows if r.get("ok")]
    out = {}
    for m in METHODS:
        res = {f"cover_{_pct(a)}": _share(r.get(f"{m}_cover_{_pct(a)}") for r in ok) for a in LEVELS}
        widths = {}
        for a in LEVELS:
            w = [r.get(f"{m}_width_{_pct(a)}") for r in ok if r.get(f"{m}_width_{_pct(a)}") is not None]
            if w:
                arr = np.asarray(w, float)
                widths[f"width_{_pct(a)}"] = {
                    "mean": float(np.mean(arr)) if np.all(np.isfinite(arr)) else None,
                    "median": float(np.median(arr)),
                    "unbounded_share": float(np.mean(~np.isfinite(arr))),
                }
        res.update(widths)
        out[m] = res
    if ok:
        err_b = np.array([r["posterior_mean"] - r["truth"] for r in ok])
        err_l = np.array([r["ls_estimate"] - r["truth"] for r in ok])
        N = len(ok)
        out["posterior"]["bias"] = {
            "mean": float(err_b.mean()),
            "mcse": float(err_b.std(ddof=1) / math.sqrt(N)) if N > 1 else None,
            "rmse": float(np.sqrt(np.mean(err_b**2))),
        }
        for m in ("cr1", "wild", "permutation"):
            out[m]["bias"] = {
                "mean": float(err_l.mean()),
                "mcse": float(err_l.std(ddof=1) / math.sqrt(N)) if N > 1 else None,
                "rmse": float(np.sqrt(np.mean(err_l**2))),
                "note": "the least-squares estimate (shared by the three least-squares methods)",
            }
        out["posterior"]["diagnostics_ok_share"] = float(np.mean([r["diagnostics_ok"] for r in ok]))
    return out


def _share_below(values, limit: float) -> float | None:
    v = np.array([x for x in values if x is not None and np.isfinite(x)], float)
    return float(np.mean(v < limit)) if v.size else None


def sbc_table(rows: list[dict]) -> dict:
    """Rank-uniformity tests per parameter: chi-square over SBC_BINS equal bins of the ranks 0..SBC_DRAWS."""
    from scipy import stats

    ok = [r for r in rows if r.get("ok")]
    out = {
        "draws_ranked": SBC_DRAWS,
        "bins": SBC_BINS,
        "reps": len(ok),
        "method": "rank of the prior draw among 99 thinned posterior draws (Talts et al. 2018); Pearson "
        "chi-square of the bin counts against equal expected counts, SBC_BINS - 1 degrees of freedom",
    }
    for name in SBC_PARAMETERS:
        ranks = np.array([r[f"{name}_rank"] for r in ok if f"{name}_rank" in r], int)
        if ranks.size == 0:
            out[name] = {"p_value": None, "reason": "not applicable: no SBC rep finished"}
            continue
        counts = np.bincount(ranks * SBC_BINS // (SBC_DRAWS + 1), minlength=SBC_BINS)
        chi = stats.chisquare(counts)
        out[name] = {
            "p_value": float(chi.pvalue),
            "chi2": float(chi.statistic),
            "counts": counts.tolist(),
            "expected_per_bin": ranks.size / SBC_BINS,
            "mean_rank": float(ranks.mean()),
            "share_at_extremes": float(np.mean((ranks == 0) | (ranks == SBC_DRAWS))),
            "uniform_at_0.01": bool(chi.pvalue > 0.01),
            # ranks among autocorrelated draws are over-dispersed: read the test with this share
            "share_ess_below_ranked": _share_below([r.get(f"{name}_ess") for r in ok], SBC_DRAWS),
            "note": (
                "fewer than 5 reps expected per bin: the chi-square approximation is rough"
                if ranks.size / SBC_BINS < 5
                else ""
            ),
        }
    return out


def ecdf_band(N: int, L: int = SBC_DRAWS, prob: float = 0.95, sims: int = 2000, seed: int = 1) -> tuple:
    """Simultaneous band for the ECDF of N uniform ranks on 0..L, minus its expectation.

    Returns (z, lower, upper) on the grid z_k = k / (L + 1), k = 1..L+1. The pointwise binomial level
    is chosen by simulation so that the whole uniform ECDF stays inside with probability ``prob``
    (Säilynoja, Bürkner and Vehtari 2022, their simulation method), by ArviZ's own band functions
    (``arviz_stats.ecdf_utils``). They simulate continuous uniform values; at the grid points the
    share of values below z_k has the same binomial law as the share of discrete ranks below k, so
    the band is the same. At z = 1 the ECDF is 1 for certain: the band closes there.
    """
    from arviz_stats.ecdf_utils import get_pointwise_confidence_band, simulate_confidence_bands

    z = np.arange(1, L + 2) / (L + 1)
    inner = z[:-1]
    level = simulate_confidence_bands(N, 1, inner, prob, sims, np.random.default_rng(seed))
    lo, hi = get_pointwise_confidence_band(level, N, inner)
    return z, np.append(lo, 1.0) - z, np.append(hi, 1.0) - z


def plot_sbc(rows: list[dict], path: Path, title: str) -> Path:
    """ECDF-difference plot of the SBC ranks of tau, sigma_gap (and rho) with simultaneous 95% bands."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ok = [r for r in rows if r.get("ok")]
    names = [n for n in SBC_PARAMETERS if n in ("tau", "sigma_gap") or any(f"{n}_rank" in r for r in ok)]
    fig, axes = plt.subplots(1, len(names), figsize=(4.5 * len(names), 3.6), sharey=True)
    N = len(ok)
    if N:
        z, lo, hi = ecdf_band(N)
    for ax, name in zip(axes, names):
        if N:
            ranks = np.array([r[f"{name}_rank"] for r in ok])
            F = (ranks[:, None] < np.arange(1, SBC_DRAWS + 2)[None, :]).mean(axis=0)
            ax.fill_between(z, lo, hi, step="post", color="#c9d8e8", label="95% simultaneous band")
            ax.step(z, F - z, where="post", color="#1d3f6e", lw=1.5, label="ECDF - uniform")
        ax.axhline(0.0, color="#888888", lw=0.8)
        ax.set_title(name)
        ax.set_xlabel("fractional rank of the prior draw")
    axes[0].set_ylabel("ECDF difference")
    if N:
        axes[0].legend(loc="lower left", fontsize=8, frameon=False)
    else:
        axes[0].text(0.5, 0.5, "no SBC reps were run", ha="center", transform=axes[0].transAxes)
    fig.suptitle(f"{title}: simulation-based calibration, {N} reps", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


# ---- the study ---------------------------------------------------------------------------------------


def write_calibration(result: dict, out: str | Path, *, replace: bool = False) -> Path:
    """Write calibration.json, coverage_reps.csv, sbc_reps.csv and sbc_ranks.png into ``out`` atomically."""
    from ..run import atomic_folder, dump_json

    s = result["summary"]
    with atomic_folder(out, replace=replace, kind="calibration") as tmp:
        dump_json(s, tmp / "calibration.json")
        write_rows_csv(result["rows"], tmp / "coverage_reps.csv")
        write_rows_csv(result["sbc_rows"], tmp / "sbc_reps.csv")
        plot_sbc(result["sbc_rows"], tmp / "sbc_ranks.png", s["scenario"])
    return Path(out)
