"""Calibration of the intervals: frequentist coverage at a known truth, and simulation-based calibration.

Two studies, both on invented data from :mod:`bayesdid.simulate`-style generating processes:

Coverage (per scenario, ``reps`` data sets with one fixed effect ``tau``)
    Each rep simulates rows (``Scenario``), collapses them, fits the Gaussian model with the
    data-scaled default priors, and records for the ATT

        ATT = sum_j w_j tau[j],   w_j = treated target-group rows of adopter j / all treated target rows

    whether the equal-tailed 50%, 90% and 95% posterior intervals cover the true ATT, their widths
    and the error of the posterior mean. The least-squares cross-check (:func:`bayesdid.crosscheck.cross_check`)
    is run on the same cells with the true effect subtracted from the treated cells, so that each of
    its tests is a test of the *true* null: CR1 intervals estimate +- t_{G-1} se_CR1, the restricted
    wild cluster bootstrap (covered at level a when its p-value >= 1 - a, the test-inversion reading
    of its interval) and the placebo-in-space permutation test (same reading). Coverage is a share
    over reps with Monte Carlo standard error sqrt(p (1 - p) / N).

Simulation-based calibration (Talts et al. 2018)
    Each rep draws every parameter from the model's own prior (scales fixed once from a pilot data
    set of the scenario with :func:`bayesdid.model.terms.resolve_scales` defaults, and the prior
    location fixed with them), simulates cell statistics from the model (cell means
    Normal(mu_c, sigma_g^2 / n_c), within sums of squares sigma_g^2 chi^2_{n_c - 1}), fits, and takes
    the rank of the true tau and sigma_gap among L = 99 thinned posterior draws. Under a correct
    sampler and model code the ranks are uniform on 0..L; this is tested with a chi-square test over
    equal bins and shown as an ECDF-difference plot with simultaneous 95% bands (Säilynoja, Bürkner
    and Vehtari 2022, the simulation method for the band).

Parallel over reps: :func:`run_rep` is a module-level function of one picklable :class:`RepTask`,
so any executor can map it. :func:`make_executor` hands the reps to the sweep's executors
(:data:`bayesdid.sweep.EXECUTORS`): in-process, the local pool of spawned worker processes, or Dask
(a scheduler address, or "local"); each worker process compiles one model per structure and
re-samples the other reps through the cache in :mod:`bayesdid.sample`.
"""

from __future__ import annotations

import csv
import dataclasses
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import BayesDidError
from .simulate import Scenario, simulate

__all__ = [
    "SCENARIOS",
    "CalibrationScenario",
    "RepTask",
    "run_rep",
    "make_executor",
    "run_calibration",
    "coverage_table",
    "sbc_table",
    "ecdf_band",
    "plot_sbc",
    "write_calibration",
    "LEVELS",
    "SBC_DRAWS",
]

#: Interval levels whose coverage is measured.
LEVELS = (0.5, 0.9, 0.95)
#: Number of thinned posterior draws the SBC rank is taken among (ranks run 0..SBC_DRAWS).
SBC_DRAWS = 99
#: Equal-width bins of the SBC chi-square test (SBC_DRAWS + 1 = 100 rank values, 10 per bin).
SBC_BINS = 10
#: Parameters whose SBC ranks are tested (rho only when the model has persistent gap noise).
SBC_PARAMETERS = ("tau", "sigma_gap", "rho")
#: Methods compared in the coverage study.
METHODS = ("posterior", "cr1", "wild", "permutation")


@dataclass(frozen=True)
class CalibrationScenario:
    """A named data-generating process: the simulation scenario and what it is meant to show."""

    name: str
    scenario: Scenario
    about: str
    model_assumes: bool = True  # False: the noise departs from the model's assumptions
    #: "simulated" (the scenario's rows) or "castle_placebo" (the causaldata castle panel, its real
    #: adopters dropped, one random remaining state given a fake policy from a random year; truth 0)
    source: str = "simulated"


def _sc(**kw) -> Scenario:
    base = dict(
        jurisdictions=31,
        periods=8,
        groups=2,
        starts={0: 4},
        rows_per_cell=8.0,
        tau=-0.2,
        gap_sd=0.2,
        shock_sd=0.1,
        residual_sd=1.0,
    )
    base.update(kw)
    return Scenario(**base)


SCENARIOS: dict[str, CalibrationScenario] = {
    "one_adopter": CalibrationScenario(
        "one_adopter",
        _sc(),
        "DDD, one adopter and 30 comparison jurisdictions, 8 periods (start at the 5th), about 8 rows "
        "per cell, Gaussian structural gap noise sd 0.2 (larger than a cell mean's sampling error, "
        "1/sqrt(8) = 0.35, would suggest it is negligible), effect -0.2",
    ),
    "staggered": CalibrationScenario(
        "staggered",
        _sc(jurisdictions=33, starts={0: 3, 1: 4, 2: 5}),
        "DDD, three adopters starting in periods 4, 5 and 6, 30 comparison jurisdictions, otherwise as "
        "one_adopter; the same effect in every adopter",
    ),
    "did": CalibrationScenario(
        "did",
        _sc(groups=1),
        "DiD (no group split), one adopter and 30 comparison jurisdictions, otherwise as one_adopter",
    ),
    "heavy_tails": CalibrationScenario(
        "heavy_tails",
        _sc(gap_df=3.0),
        "as one_adopter, but the gap noise is Student t with 3 degrees of freedom (same sd 0.2), heavier-"
        "tailed than the model's Normal",
        model_assumes=False,
    ),
}


def _ar1(**kw) -> Scenario:
    """Persistent gap noise dominating the cells (as in the issue's table): 40 jurisdictions, 12 periods,
    one adopter from period 7, gap sd 0.2, about 400 rows per cell, effect -0.1."""
    base = dict(
        jurisdictions=40,
        periods=12,
        groups=2,
        starts={0: 6},
        rows_per_cell=400.0,
        tau=-0.1,
        gap_sd=0.2,
        shock_sd=0.1,
        residual_sd=1.0,
    )
    base.update(kw)
    return Scenario(**base)


SCENARIOS.update(
    {
        "ar1_ddd_0": CalibrationScenario(
            "ar1_ddd_0",
            _ar1(gap_rho=0.0),
            "DDD, 40 jurisdictions x 12 periods, one adopter from period 7, about 400 rows per cell, gap noise "
            "sd 0.2 independent over periods (rho 0), effect -0.1",
        ),
        "ar1_ddd_05": CalibrationScenario(
            "ar1_ddd_05", _ar1(gap_rho=0.5), "as ar1_ddd_0 with AR(1) gap noise, rho 0.5"
        ),
        "ar1_ddd_08": CalibrationScenario(
            "ar1_ddd_08", _ar1(gap_rho=0.8), "as ar1_ddd_0 with AR(1) gap noise, rho 0.8"
        ),
        "ar1_did_08": CalibrationScenario(
            "ar1_did_08",
            _ar1(groups=1, gap_rho=0.8),
            "DiD version of ar1_ddd_08 (jurisdiction-period noise AR(1), rho 0.8)",
        ),
        "ar1_staggered_08": CalibrationScenario(
            "ar1_staggered_08",
            _ar1(jurisdictions=42, starts={0: 5, 1: 6, 2: 7}, gap_rho=0.8),
            "as ar1_ddd_08 with three adopters starting in periods 6, 7 and 8",
        ),
        "one_row_did": CalibrationScenario(
            "one_row_did",
            Scenario(
                jurisdictions=50,
                periods=16,
                groups=1,
                starts={0: 8},
                rows_per_cell=1,
                fixed_cells=True,
                tau=-0.1,
                gap_sd=0.1,
                gap_rho=0.5,
                residual_sd=0.05,
            ),
            "DiD with one row per jurisdiction-period, as state-year data come: 50 jurisdictions, 16 periods, one "
            "adopter from period 9, AR(1) jurisdiction-period noise sd 0.1 with rho 0.5 plus row noise sd 0.05, effect -0.1",
        ),
        "castle_placebo": CalibrationScenario(
            "castle_placebo",
            Scenario(groups=1, tau=0.0),
            "placebo laws on the castle-doctrine state panel of the causaldata package (2000-2010, one row per "
            "state and year, outcome log homicide rate): the states that ever adopted are dropped, each rep gives "
            "one random remaining state a fake policy from a random year 2003-2009; the truth is no effect, so "
            "coverage is one minus the false-positive rate",
            source="castle_placebo",
        ),
    }
)


def castle_placebo_frame(seed: int):
    """(frame, truth) of one placebo-law rep on the castle panel (see the scenario's text)."""
    from causaldata import castle

    d = castle.load_pandas().data
    adopted = set(d.loc[d["post"] > 0, "sid"])
    keep = d[~d["sid"].isin(adopted)]
    rng = np.random.default_rng(seed)
    states = sorted(set(keep["sid"]))
    fake = int(rng.choice(states))
    year = int(rng.integers(2003, 2010))
    frame = pd.DataFrame(
        {
            "region": "S" + keep["sid"].astype(int).astype(str),
            "period": keep["year"].astype(int),
            "y": np.log(keep["homicide"].to_numpy(float)),
        }
    )
    return frame, {"tau": 0.0, "tau_adopter": {f"S{fake}": 0.0}, "starts": {f"S{fake}": year}}


@dataclass(frozen=True)
class RepTask:
    """One rep: everything a worker needs (picklable)."""

    kind: str  # "coverage" or "sbc"
    scenario: str
    rep: int
    base_seed: int
    draws: int
    tune: int
    chains: int
    cross_check_draws: int = 999
    sbc_prior: dict = field(default_factory=dict)  # scales, location and sd, fixed for all SBC reps

    @property
    def seeds(self) -> tuple[int, int]:
        """(data seed, sampler seed), derived from the base seed, the kind and the rep index."""
        kind_code = 1 if self.kind == "coverage" else 2
        scen = sum(ord(c) for c in self.scenario)
        s = np.random.SeedSequence([int(self.base_seed), kind_code, scen, int(self.rep)]).generate_state(2)
        return int(s[0]), int(s[1] % (2**31 - 1))


def _scenario(name: str) -> CalibrationScenario:
    if name not in SCENARIOS:
        raise BayesDidError(f"calibration scenario '{name}' is unknown; choose one of {sorted(SCENARIOS)}.")
    return SCENARIOS[name]


def _frame_of(cs: CalibrationScenario, seed: int):
    if cs.source == "castle_placebo":
        return castle_placebo_frame(seed)
    return simulate(cs.scenario, seed)


def _cells_of(frame, sc: Scenario, truth: dict):
    from .cells import collapse_frame
    from .study import make_study

    ddd = sc.groups == 2
    study = make_study(
        table="invented.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
    )
    return collapse_frame(study, frame)


def _shift_treated(cells, effect_by_jur: np.ndarray):
    """Cells with ``effect_by_jur[j]`` subtracted from every treated target-group row (ss unchanged)."""
    d = cells.treated * effect_by_jur[:, None, None]
    sum_y = cells.sum_y - cells.n * d
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(cells.n > 0, sum_y / np.where(cells.n > 0, cells.n, 1.0), 0.0)
    return dataclasses.replace(cells, sum_y=sum_y, sum_y2=cells.ss + cells.n * mean**2)


def _settings(task: RepTask, seed: int):
    from .study import SamplerSettings

    return SamplerSettings(chains=task.chains, draws=task.draws, tune=task.tune, seed=seed)


def _coverage_rep(task: RepTask) -> dict:
    from scipy import stats

    from .crosscheck import cross_check
    from .effects import att_weights
    from .model.terms import resolve_scales
    from .sample import fit_cells
    from .study import PriorScales

    cs = _scenario(task.scenario)
    data_seed, sampler_seed = task.seeds
    frame, truth = _frame_of(cs, data_seed)
    cells = _cells_of(frame, cs.scenario, truth)
    effect_j = np.zeros(len(cells.jurisdictions))
    for name, v in truth["tau_adopter"].items():
        effect_j[cells.jurisdictions.index(name)] = v
    w = att_weights(cells)
    att_true = float(np.dot(w, effect_j[cells.adopters]))
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    fit = fit_cells(cells, scales, _settings(task, sampler_seed))
    att = fit.draws("tau_adopter") @ w
    row = {
        "truth": att_true,
        "posterior_mean": float(att.mean()),
        "posterior_sd": float(att.std(ddof=1)),
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "divergences": fit.diagnostics.get("divergences"),
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "sample_s": fit.timing["sample_s"],
        "compile_s": fit.timing["compile_s"],
    }
    for a in LEVELS:
        lo, hi = np.quantile(att, [(1 - a) / 2, (1 + a) / 2])
        row[f"posterior_cover_{_pct(a)}"] = bool(lo <= att_true <= hi)
        row[f"posterior_width_{_pct(a)}"] = float(hi - lo)
    # Least squares on the cells with the truth taken out: every test below is of the true null.
    xc = cross_check(_shift_treated(cells, effect_j), seed=sampler_seed, draws=task.cross_check_draws, placebos=999)
    est = xc["estimate"] + att_true
    se, C = xc["se_cr1"], xc["clusters"]
    row.update({"ls_estimate": est, "se_cr1": se, "clusters": C})
    for a in LEVELS:
        q = stats.t.ppf((1 + a) / 2, C - 1)
        row[f"cr1_cover_{_pct(a)}"] = bool(abs(est - att_true) <= q * se)
        row[f"cr1_width_{_pct(a)}"] = float(2 * q * se)
        p_w, p_p = xc["p_wild"], xc["p_permutation"]
        row[f"wild_cover_{_pct(a)}"] = None if p_w is None else bool(p_w >= 1 - a)
        row[f"permutation_cover_{_pct(a)}"] = None if p_p is None else bool(p_p >= 1 - a)
    lo, hi = xc["ci_wild_95"] or (None, None)
    row["wild_width_95"] = math.inf if lo is None or hi is None else float(hi - lo)
    row["p_wild_at_truth"] = xc["p_wild"]
    row["p_permutation_at_truth"] = xc["p_permutation"]
    return row


def _draw_prior(cells, prior: dict, rng: np.random.Generator) -> tuple[dict, np.ndarray, np.ndarray]:
    """Parameters from the model's prior and the (J, G, T) cell means and row sds they imply.

    Mirrors :func:`bayesdid.model.terms.hierarchical_mean` and the Gaussian family term by term.
    """
    from .model.terms import zero_sum_basis

    S = prior["scales"]
    J, G, T = cells.shape
    is_adopter = cells.start < T
    hn = lambda s, size=None: np.abs(rng.normal(0.0, s, size))  # noqa: E731 - HalfNormal(s)
    mu = rng.normal(prior["location"], S["intercept"], G)
    sigma_b = hn(S["baseline_spread"])
    scale_j = np.where(is_adopter, S["intercept"], sigma_b)
    b = mu[None, :] + scale_j[:, None] * rng.standard_normal((J, G))
    Q = zero_sum_basis(T)
    a = Q @ rng.normal(0.0, S["period"], T - 1)
    m = b[:, :, None] + a[None, None, :]
    if G == 2:
        h = Q @ rng.normal(0.0, S["group_period"], T - 1)
        m[:, cells.target, :] += h[None, :]
    tau = rng.normal(0.0, S["effect"])
    A = int(is_adopter.sum())
    if A > 1:
        sigma_tau = hn(S["adopter_spread"])
        tau_a = tau + sigma_tau * rng.standard_normal(A)
    else:
        sigma_tau, tau_a = None, np.array([tau])
    m += np.tensordot(tau_a, _treat_by_adopter(cells), axes=1)
    from .model.structure import RHO_PRIOR, gap_structure, residual_rule

    sigma = hn(S["residual"], G) if residual_rule(cells)["separate"] else np.zeros(G)
    sigma_gap = hn(S["gap_noise"])
    e = rng.standard_normal((J, T))
    rho = None
    if gap_structure(cells).over_time == "persistent":
        rho = 2.0 * rng.beta(RHO_PRIOR["a"], RHO_PRIOR["b"]) - 1.0
        for t in range(1, T):  # stationary AR(1), marginal sd sigma_gap
            e[:, t] = rho * e[:, t - 1] + np.sqrt(1.0 - rho * rho) * e[:, t]
    m[:, cells.target, :] += sigma_gap * e
    if G == 2:
        sigma_shock = hn(S["shock_spread"])
        sd_j = np.where(is_adopter, S["period"], sigma_shock)
        m += (sd_j[:, None] * rng.standard_normal((J, T)))[:, None, :]
    truth = {"tau": float(tau), "sigma_gap": float(sigma_gap)}
    if rho is not None:
        truth["rho"] = float(rho)
    return truth, m, np.broadcast_to(sigma[None, :, None], (J, G, T))


def _treat_by_adopter(cells) -> np.ndarray:
    from .model.terms import design_data

    return design_data(cells)["treat_by_adopter"]


def _sbc_rep(task: RepTask) -> dict:
    from .sample import fit_cells

    cs = _scenario(task.scenario)
    data_seed, sampler_seed = task.seeds
    rng = np.random.default_rng(data_seed)
    frame, truth0 = _frame_of(cs, data_seed)
    template = _cells_of(frame, cs.scenario, truth0)  # the design (n per cell, starts) of this rep
    truth, mean, sd = _draw_prior(template, task.sbc_prior, rng)
    n = template.n
    ybar = mean + sd / np.sqrt(np.maximum(n, 1.0)) * rng.standard_normal(n.shape)
    ss = sd**2 * rng.chisquare(np.maximum(n - 1.0, 1.0)) * (n > 1)
    cells = dataclasses.replace(
        template,
        sum_y=n * ybar,
        sum_y2=ss + n * ybar**2,
        ss=ss,
        outcome_mean=task.sbc_prior["location"],
        outcome_sd=task.sbc_prior["sd"],
    )
    fit = fit_cells(cells, task.sbc_prior["scales"], _settings(task, sampler_seed))
    row = {
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "divergences": fit.diagnostics.get("divergences"),
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "sample_s": fit.timing["sample_s"],
        "compile_s": fit.timing["compile_s"],
    }
    for name in SBC_PARAMETERS:
        if name not in truth:
            continue
        d = fit.draws(name).ravel()
        keep = d[np.linspace(0, d.size - 1, SBC_DRAWS).round().astype(int)]
        row[f"{name}_truth"] = truth[name]
        row[f"{name}_rank"] = int(np.sum(keep < truth[name]))
    return row


def run_rep(task: RepTask) -> dict:
    """Run one rep; never raises: a failure comes back as ``ok = False`` with the error text."""
    t0 = time.perf_counter()
    base = {
        "kind": task.kind,
        "scenario": task.scenario,
        "rep": task.rep,
        "data_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
    }
    try:
        with np.errstate(all="ignore"):
            row = _coverage_rep(task) if task.kind == "coverage" else _sbc_rep(task)
        return {**base, "ok": True, "error": "", **row, "wall_s": time.perf_counter() - t0}
    except Exception as exc:  # noqa: BLE001 - a failing rep is reported, not allowed to stop the study
        return {**base, "ok": False, "error": f"{type(exc).__name__}: {exc}", "wall_s": time.perf_counter() - t0}


def sbc_prior(scenario: str, base_seed: int) -> dict:
    """The prior the SBC reps draw from: default scales of a pilot data set, fixed for every rep."""
    from .model.terms import resolve_scales
    from .study import PriorScales

    cs = _scenario(scenario)
    frame, truth = _frame_of(cs, int(base_seed))
    cells = _cells_of(frame, cs.scenario, truth)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    return {"scales": scales, "location": float(cells.outcome_mean), "sd": float(cells.outcome_sd)}


# ---- executors -------------------------------------------------------------------------------------


def _rep_lost(task: RepTask, exc: BaseException) -> dict:
    return {
        "kind": task.kind,
        "scenario": task.scenario,
        "rep": task.rep,
        "data_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
        "ok": False,
        "wall_s": float("nan"),
        "error": f"the worker running this rep stopped: {type(exc).__name__}: {exc}",
    }


class _SweepExecutor:
    """The sweep's executors (``bayesdid.sweep.EXECUTORS``) for calibration reps: ``map`` yields the
    records as they complete (the study sorts them by kind and rep)."""

    def __init__(self, kind: str, workers: int, cluster: str | None):
        self.kind, self.workers, self.cluster = kind, workers, cluster
        self.name = {"serial": "in-process", "pool": f"process pool ({workers} workers)", "dask": f"dask ({cluster})"}[
            kind
        ]

    def map(self, fn, tasks):
        from .sweep import EXECUTORS

        yield from EXECUTORS[self.kind](list(tasks), self.workers, self.cluster, fn=fn, lost=_rep_lost)

    def close(self):
        pass


def make_executor(workers: int = 2, cluster: str | None = None):
    """An object with ``map(fn, tasks) -> iterator of results as they complete`` and ``close()``.

    The sweep's executors: ``cluster`` (a Dask scheduler address, or "local" for a local Dask
    cluster of ``workers`` processes) wins; else ``workers`` = 1 runs in-process and more use the
    local process pool.
    """
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise BayesDidError(f"--workers: expected a whole number of at least 1, found {workers!r}.")
    if cluster:
        return _SweepExecutor("dask", workers, cluster)
    return _SweepExecutor("serial" if workers == 1 else "pool", workers, None)


# ---- summaries -----------------------------------------------------------------------------------


def _pct(a: float) -> str:
    return str(int(round(a * 100)))


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
    gamma is chosen by simulation so that the whole uniform ECDF stays inside with probability ``prob``
    (Säilynoja, Bürkner and Vehtari 2022, their simulation method).
    """
    from scipy import stats

    rng = np.random.default_rng(seed)
    z = np.arange(1, L + 2) / (L + 1)
    sim = rng.integers(0, L + 1, size=(sims, N))
    F = (sim[:, :, None] < np.arange(1, L + 2)[None, None, :]).sum(axis=1)  # counts <= k-1
    cdf = stats.binom.cdf(F, N, z[None, :])
    sf = stats.binom.sf(F - 1, N, z[None, :])
    gamma = np.quantile(2 * np.minimum(cdf, sf).min(axis=1), 1 - prob)
    lo = stats.binom.ppf(gamma / 2, N, z) / N - z
    hi = stats.binom.ppf(1 - gamma / 2, N, z) / N - z
    return z, lo, hi


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


def run_calibration(
    *,
    scenario: str = "one_adopter",
    reps: int = 200,
    sbc_reps: int | None = None,
    draws: int = 500,
    tune: int = 500,
    chains: int = 2,
    seed: int = 20261202,
    workers: int = 2,
    cluster: str | None = None,
    cross_check_draws: int = 999,
    progress_path: str | Path | None = None,
) -> dict:
    """Run the coverage and SBC reps of one scenario; return the summary and the per-rep rows.

    Returns
    -------
    dict
        ``summary`` (scenario, settings, ``coverage`` by method, ``sbc``, failures, timing) and
        ``rows`` (coverage reps) and ``sbc_rows``. With ``progress_path`` each rep's row is also
        appended to that file (JSON lines) as it arrives, so a long run that is stopped keeps its reps.
    """
    cs = _scenario(scenario)
    sbc_reps = reps if sbc_reps is None else sbc_reps
    for key, v, low in (
        ("--reps", reps, 1),
        ("--sbc-reps", sbc_reps, 0),
        ("--draws", draws, 100),
        ("--tune", tune, 50),
        ("--chains", chains, 1),
    ):
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise BayesDidError(f"{key}: expected a whole number of at least {low}, found {v!r}.")
    if (draws * chains) < SBC_DRAWS and sbc_reps:
        raise BayesDidError(f"--draws x --chains must be at least {SBC_DRAWS} for the SBC ranks.")
    prior = sbc_prior(scenario, seed) if sbc_reps else {}
    common = dict(
        scenario=scenario, base_seed=seed, draws=draws, tune=tune, chains=chains, cross_check_draws=cross_check_draws
    )
    tasks = [RepTask(kind="coverage", rep=i, **common) for i in range(reps)]
    tasks += [RepTask(kind="sbc", rep=i, sbc_prior=prior, **common) for i in range(sbc_reps)]
    ex = make_executor(workers, cluster)
    t0 = time.perf_counter()
    results = []
    log = open(progress_path, "a", encoding="utf-8") if progress_path else None
    try:
        for r in ex.map(run_rep, tasks):
            results.append(r)
            if log:
                log.write(json.dumps(r, default=str) + "\n")
                log.flush()
    finally:
        ex.close()
        if log:
            log.close()
    wall = time.perf_counter() - t0
    results.sort(key=lambda r: (r["kind"] != "coverage", r["rep"]))  # executors yield as reps complete
    rows = [r for r in results if r["kind"] == "coverage"]
    sbc_rows = [r for r in results if r["kind"] == "sbc"]
    failed = [{"kind": r["kind"], "rep": r["rep"], "error": r["error"]} for r in results if not r["ok"]]
    summary = {
        "scenario": scenario,
        "about": cs.about,
        "model_assumes": cs.model_assumes,
        "truth_tau": cs.scenario.tau,
        "scenario_parameters": dataclasses.asdict(cs.scenario),
        "reps": reps,
        "sbc_reps": sbc_reps,
        "failed": failed,
        "settings": {
            "draws": draws,
            "tune": tune,
            "chains": chains,
            "seed": seed,
            "cross_check_draws": cross_check_draws,
            "executor": ex.name,
        },
        "coverage": coverage_table(rows),
        "coverage_note": (
            "share of reps whose interval holds the true ATT; mcse = sqrt(p (1 - p) / N). "
            "Posterior: equal-tailed intervals of the ATT. cr1: estimate +- t(G-1) x CR1 se. wild "
            "and permutation: covered at level a when the test of the true effect has p >= 1 - a "
            "(restricted wild cluster bootstrap, Webb weights; placebo-in-space permutation)."
        ),
        "sbc": sbc_table(sbc_rows) if sbc_reps else {"reason": "not run (--sbc-reps 0)"},
        "sbc_prior": prior,
        "timing": {"wall_s": wall, "rep_wall_s_median": float(np.median([r["wall_s"] for r in results]))},
    }
    return {"summary": summary, "rows": rows, "sbc_rows": sbc_rows}


def _write_csv(rows: list[dict], path: Path) -> None:
    keys: list[str] = []
    for r in rows:
        keys += [k for k in r if k not in keys]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=keys)
        w.writeheader()
        for r in rows:
            w.writerow(r)


def write_calibration(result: dict, out: str | Path, *, replace: bool = False) -> Path:
    """Write calibration.json, coverage_reps.csv, sbc_reps.csv and sbc_ranks.png into ``out`` atomically."""
    from .run import atomic_folder, dump_json

    s = result["summary"]
    with atomic_folder(out, replace=replace, kind="calibration") as tmp:
        dump_json(s, tmp / "calibration.json")
        _write_csv(result["rows"], tmp / "coverage_reps.csv")
        _write_csv(result["sbc_rows"], tmp / "sbc_reps.csv")
        plot_sbc(result["sbc_rows"], tmp / "sbc_ranks.png", s["scenario"])
    return Path(out)
