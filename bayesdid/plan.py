"""Planning before the data: Bayesian assurance of a proposed evaluation.

Before a jurisdiction adopts a policy, or before data are bought, the question is whether an
evaluation of the planned size would reach a conclusion. A *plan file* (TOML) states the layout
(comparison jurisdictions, periods, adopters and their first treated periods, DDD or DiD, rows per
cell), the noise (stated scales, or the posterior of an earlier run folder), a grid of true effects
and the decision rule "P(effect beyond the threshold) >= level". For every true effect the plan
simulates ``reps`` data sets from the model of DESIGN.md, fits each with the full model (the same
sampler and default priors as ``bayesdid fit``) and counts how often the rule concludes.

Assurance is the probability that the analysis will conclude (O'Hagan and Stevens 2001, Medical
Decision Making 21(3), for the concept): here the noise scales are drawn from the stated design
prior (fixed values, or one posterior draw of the pilot run per data set) and the effect is held at
each value of the grid, so the table reads as assurance per true effect. Alongside it, per effect:
its Monte Carlo standard error sqrt(p (1 - p) / N); at effect 0 the same share is the false-decision
rate; the expected width of the equal-tailed 95% interval of the ATT; and the power of the
least-squares placebo-in-space permutation test (one-sided in the direction of the threshold, at
level 1 - ``decision.level``), computed on the same data sets.

A second axis, ``[vary]``, crosses more periods (after the last start) and more comparison
jurisdictions. Every layout of a plan is simulated inside the largest one (the largest number of
comparisons and periods) with the unused jurisdictions and periods left empty (no rows), so that all
layouts share one model structure and one compiled model per worker; an empty cell drops out of the
collapsed likelihood exactly, so this is the same posterior as a smaller table would give, except
that the zero-sum prior of the period effects spans all periods (a weakly informative prior on
levels the DDD/DiD differences remove). Data sets are common random numbers: rep i of every layout
and effect uses the same noise, with the effect added to the treated cells, so differences between
effects and layouts are measured with less Monte Carlo noise than independent data sets would give.

Noise with persistence: ``noise.rho`` draws the gap noise of each jurisdiction as a stationary AR(1)
over periods (marginal sd ``noise.gap``). The fitted model is the one on main; when it assumes
independent gap noise the page says so.

Reps run on the sweep's executors (:data:`bayesdid.sweep.EXECUTORS`): in-process, the local pool of
spawned workers (default), or Dask (``--cluster``); each worker compiles once and re-samples every
other rep through the cache in :mod:`bayesdid.sample`. Each finished rep is appended to a progress
file beside the output folder (``.NAME.plan-progress.jsonl``), so a stopped run continues where it
left off when the same command is run again.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import numbers
import os
import sys
import time
import tomllib
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .errors import PlanError
from .model.family import family_record
from .outputs import write_rows_csv

__all__ = [
    "Layout",
    "Noise",
    "Plan",
    "RepTask",
    "load_plan",
    "make_plan",
    "simulate_cells",
    "run_rep",
    "run_plan",
    "assurance_table",
    "shift_log_weights",
    "flat_rows",
    "resolve_noise",
    "with_overrides",
    "progress_path",
    "normal_assurance",
    "write_plan",
    "plan_tasks",
    "DEFAULT_NOISE",
]

#: Stated noise scales (model scale) and their defaults: the data-generating process of DESIGN.md.
DEFAULT_NOISE = {
    "gap": 0.05,  # sd of the structural gap noise e[j,t] (target group)
    "shock": 0.1,  # sd of the jurisdiction-period shock s[j,t] shared by the groups (DDD)
    "residual": 1.0,  # sd of a row around its cell mean (a number, or [reference, target])
    "baseline": 0.3,  # sd of the jurisdiction-group baselines around the group means
    "period": 0.1,  # sd of the common period effects
    "group_period": 0.05,  # sd of the target group's own period effects (DDD)
    "rho": 0.0,  # AR(1) correlation of the gap noise over periods within a jurisdiction
    "omega": 0.0,  # sd of the log gap-noise scales across jurisdictions (0: one scale for all)
}
NOISE_MEANING = {
    "gap": "sd of the structural gap noise of each jurisdiction-period (the target group's; what the effect "
    "is judged against)",
    "shock": "sd of the jurisdiction-period shock shared by both groups (DDD only; the triple difference removes it)",
    "residual": "sd of one row around its cell mean",
    "baseline": "sd of the jurisdiction-group baselines",
    "period": "sd of the common period effects",
    "group_period": "sd of the target group's own period effects (DDD only)",
    "rho": "correlation of the gap noise from one period to the next within a jurisdiction (AR(1))",
    "omega": "sd of the log of the jurisdictions' gap-noise scales around log gap (0: one scale for all)",
}
#: The inner fits' sampler: one chain (both cores go to two data sets at once), 300 draws after 200
#: tuning steps. Measured on the demo layout: median bulk ESS of the ATT 283, and the expected net
#: change of the assurance from the sampler's error (decision_noise) well below its Monte Carlo error.
DEFAULT_CHAIN = {"chains": 1, "draws": 300, "tune": 200}
PLAN_KEYS = {"title", "layout", "noise", "effects", "decision", "simulation", "vary"}
LAYOUT_KEYS = {"design", "comparisons", "periods", "starts", "rows_per_cell", "log_outcome", "period_name", "location"}
NOISE_KEYS = set(DEFAULT_NOISE) | {"run", "pilot"}
SIM_KEYS = {"reps", "seed", "draws", "tune", "chains", "placebos", "method", "gap_over_time"}
VARY_KEYS = {"periods", "comparisons"}


# ---- the plan --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Layout:
    """One layout of the evaluation: who adopts when, how many comparisons and periods."""

    design: str  # "DDD" or "DiD"
    comparisons: int
    periods: int
    starts: tuple[int, ...]  # 1-based first treated period of each adopter
    rows_per_cell: int

    @property
    def adopters(self) -> int:
        return len(self.starts)

    @property
    def post_periods(self) -> int:
        """Periods from the last adopter's start to the end (the last adopter's treated periods)."""
        return self.periods - max(self.starts) + 1

    @property
    def pre_periods(self) -> int:
        """Periods before the first adopter's start."""
        return min(self.starts) - 1

    @property
    def key(self) -> str:
        return f"C{self.comparisons}-T{self.periods}"


@dataclass(frozen=True)
class Noise:
    """The noise scales, stated or read from a run folder's posterior (one draw per data set)."""

    stated: dict  # name -> value (residual as a 2-tuple for a DDD: reference, target)
    source: str = "stated"  # "stated" or "run folder"
    run: str | None = None
    draws: dict | None = None  # name -> 1-D array (or (S, G) for residual) of posterior draws
    location: tuple = (0.0, 0.0)
    pilot: dict | None = None  # a pilot study: its path and table hash, then how its fit went

    def for_rep(self, rng: np.random.Generator) -> dict:
        """The scales of one data set: the stated ones, or one joint posterior draw of the run folder."""
        if self.draws is None:
            if self.source == "pilot table":
                raise RuntimeError("the pilot is not fitted yet: call bayesdid.plan.resolve_noise(plan) first")
            return dict(self.stated)
        S = len(self.draws["gap"])
        i = int(rng.integers(S))
        out = dict(self.stated)
        for k, v in self.draws.items():
            out[k] = tuple(float(x) for x in v[i]) if np.ndim(v) == 2 else float(v[i])
        return out

    def describe(self) -> dict:
        out = {"source": self.source, "run": self.run}
        if self.pilot is not None:
            out["pilot"] = self.pilot
        if self.draws is None and self.source == "pilot table":
            out["scales"] = "from the pilot's posterior (not fitted yet)"
        elif self.draws is None:
            out["scales"] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.stated.items()}
        else:
            out["posterior_draws"] = len(self.draws["gap"])
            out["posterior_medians"] = {
                k: (np.median(np.asarray(v), axis=0).tolist() if np.ndim(v) == 2 else float(np.median(v)))
                for k, v in self.draws.items()
            }
            out["fixed"] = {k: v for k, v in self.stated.items() if k not in self.draws}
        out["meaning"] = NOISE_MEANING
        return out


@dataclass(frozen=True)
class Plan:
    """A validated plan (see README, "Planning before the data")."""

    title: str
    base: Layout
    layouts: tuple[Layout, ...]  # base first, then the [vary] grid
    noise: Noise
    effects: tuple[float, ...]  # as given (relative changes for a log outcome)
    threshold: float
    direction: str  # "below" or "above"
    level: float
    log_outcome: bool
    period_name: str
    reps: int
    seed: int
    draws: int
    tune: int
    chains: int
    placebos: int
    method: str = "shift"  # "shift": one fit per data set, other effects by reweighting; "refit": one fit per effect
    gap_over_time: str = "persistent"  # the gap noise the analysis will fit (as the study key model.gap_over_time)
    notes: tuple[str, ...] = ()
    path: str | None = None

    def model_effect(self, v: float) -> float:
        """An effect of the grid on the model scale (log(1 + v) for a log outcome)."""
        return float(np.log1p(v)) if self.log_outcome else float(v)

    @property
    def model_threshold(self) -> float:
        return self.model_effect(self.threshold)

    @property
    def frame(self) -> Layout:
        """The largest layout: every layout is simulated inside it."""
        return dataclasses.replace(
            self.base,
            comparisons=max(lay.comparisons for lay in self.layouts),
            periods=max(lay.periods for lay in self.layouts),
        )

    def fingerprint(self) -> str:
        """SHA-256 of everything that changes a rep's result besides its key (layout, effect, rep).

        Not the title, the wording, the number of reps, or which layouts are asked for: a rerun with more
        reps, or more layouts inside the same largest layout, keeps the data sets already done.
        """
        d = {
            "frame": dataclasses.asdict(self.frame),
            "noise": self.noise.describe(),
            "threshold": self.threshold,
            "direction": self.direction,
            "level": self.level,
            "log": self.log_outcome,
            "seed": self.seed,
            "effects": self.effects,
            "method": self.method,
            "gap_over_time": self.gap_over_time,
            "draws": self.draws,
            "tune": self.tune,
            "chains": self.chains,
            "placebos": self.placebos,
            "location": self.noise.location,
        }
        return hashlib.sha256(json.dumps(d, sort_keys=True, default=str).encode()).hexdigest()

    def to_dict(self) -> dict:
        return {
            "title": self.title,
            "path": self.path,
            "layouts": [
                {
                    **dataclasses.asdict(x),
                    "adopters": x.adopters,
                    "pre_periods": x.pre_periods,
                    "post_periods": x.post_periods,
                    "key": x.key,
                }
                for x in self.layouts
            ],
            "noise": self.noise.describe(),
            "effects": list(self.effects),
            "effects_model_scale": [self.model_effect(v) for v in self.effects],
            "effect_scale": "relative change (log outcome)" if self.log_outcome else "outcome units",
            "decision": {
                "threshold": self.threshold,
                "threshold_model_scale": self.model_threshold,
                "direction": self.direction,
                "level": self.level,
                "rule": f"conclude when P(effect {'<' if self.direction == 'below' else '>'} "
                f"{self.threshold:g}) >= {self.level:g}",
            },
            "simulation": {
                "reps": self.reps,
                "seed": self.seed,
                "draws": self.draws,
                "tune": self.tune,
                "chains": self.chains,
                "placebos": self.placebos,
                "method": self.method,
                "gap_over_time": self.gap_over_time,
            },
            "period_name": self.period_name,
            "notes": list(self.notes),
            "fingerprint": self.fingerprint(),
        }


def _err(key: str, value: Any, expected: str, fix: str = "") -> PlanError:
    return PlanError(f"plan key '{key}': expected {expected}, found {value!r}." + (f" {fix}" if fix else ""))


def _section(raw: Mapping, name: str, allowed: set[str]) -> Mapping:
    sec = raw.get(name, {})
    if not isinstance(sec, Mapping):
        raise _err(name, sec, f"a [{name}] table with keys {sorted(allowed)}")
    unknown = sorted(str(k) for k in set(sec) - allowed)
    if unknown:
        raise PlanError(
            f"unknown key(s) {unknown} in [{name}] of the plan; allowed keys are {sorted(allowed)}. "
            "Check the spelling or remove them."
        )
    return sec


def _int(d: Mapping, key: str, where: str, default, *, low=None, high=None, fix: str = "") -> int:
    v = d.get(key, default)
    if v is None:
        raise PlanError(f"plan key '{where}.{key}' is missing; give a whole number." + (f" {fix}" if fix else ""))
    if isinstance(v, bool) or not isinstance(v, numbers.Integral):
        raise _err(f"{where}.{key}", v, "a whole number", fix)
    if low is not None and v < low:
        raise _err(f"{where}.{key}", v, f"a whole number of at least {low}", fix)
    if high is not None and v > high:
        raise _err(f"{where}.{key}", v, f"a whole number of at most {high}", fix)
    return int(v)


def _num(v: Any, key: str, *, positive=False, nonneg=False) -> float:
    if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(float(v)):
        raise _err(key, v, "a finite number")
    v = float(v)
    if positive and v <= 0:
        raise _err(key, v, "a positive number")
    if nonneg and v < 0:
        raise _err(key, v, "a number of at least 0")
    return v


def _int_list(v: Any, key: str, low: int, fix: str = "") -> tuple[int, ...]:
    if isinstance(v, numbers.Integral) and not isinstance(v, bool):
        v = [v]
    if not isinstance(v, list) or not v or any(isinstance(x, bool) or not isinstance(x, numbers.Integral) for x in v):
        raise _err(key, v, "a non-empty list of whole numbers", fix)
    if any(x < low for x in v):
        raise _err(key, v, f"whole numbers of at least {low}", fix)
    return tuple(int(x) for x in v)


def _parse(raw: Mapping, base_dir: Path, path: str | None) -> Plan:
    if not isinstance(raw, Mapping):
        raise _err("top level", raw, "a table of sections ([layout], [noise], [effects], [decision])")
    unknown = sorted(str(k) for k in set(raw) - PLAN_KEYS)
    if unknown:
        raise PlanError(
            f"unknown key(s) {unknown} at the top of the plan; allowed are {sorted(PLAN_KEYS)}. "
            "Check the spelling or remove them."
        )
    title = raw.get("title", "bayesdid plan")
    if not isinstance(title, str):
        raise _err("title", title, "text")
    notes: list[str] = []

    lay = _section(raw, "layout", LAYOUT_KEYS)
    design = lay.get("design", "DDD")
    if design not in ("DDD", "DiD"):
        raise _err("layout.design", design, "'DDD' (target and reference groups) or 'DiD' (no group split)")
    comparisons = _int(
        lay,
        "comparisons",
        "layout",
        None,
        low=1,
        fix="The comparison jurisdictions never adopt; an evaluation needs at least one.",
    )
    periods = _int(lay, "periods", "layout", None, low=2, high=200)
    if "starts" not in lay:
        raise PlanError(
            "plan key 'layout.starts' is missing; give the first treated period (1 = the first "
            "period) of each adopter, for example starts = [9]."
        )
    starts = _int_list(lay["starts"], "layout.starts", 1)
    if len(starts) > 50:
        raise _err("layout.starts", list(starts), "at most 50 adopters")
    if min(starts) < 2:
        raise _err(
            "layout.starts",
            list(starts),
            "first treated periods of at least 2",
            "A start at period 1 leaves no pre-period: the change cannot be measured. Add periods before the start.",
        )
    if max(starts) > periods:
        raise _err(
            "layout.starts",
            list(starts),
            f"first treated periods within the {periods} periods (layout.periods)",
            "Move the start or add periods.",
        )
    rows = _int(
        lay,
        "rows_per_cell",
        "layout",
        50,
        low=2,
        high=10_000_000,
        fix="Rows within a cell are what the residual sd is learned from; give at least 2.",
    )
    log_outcome = lay.get("log_outcome", False)
    if not isinstance(log_outcome, bool):
        raise _err("layout.log_outcome", log_outcome, "true or false")
    period_name = lay.get("period_name", "period")
    if not isinstance(period_name, str) or not period_name.strip():
        raise _err("layout.period_name", period_name, "a word such as 'quarter'")
    loc = lay.get("location", 0.0)
    location = (
        (_num(loc, "layout.location"),) * 2
        if not isinstance(loc, list)
        else tuple(_num(x, "layout.location") for x in loc)
    )
    if len(location) != 2:
        raise _err("layout.location", loc, "a number or [reference, target] (mean level of each group)")
    base = Layout(design=design, comparisons=comparisons, periods=periods, starts=starts, rows_per_cell=rows)

    vary = _section(raw, "vary", VARY_KEYS)
    vp = _int_list(vary["periods"], "vary.periods", 2) if "periods" in vary else (periods,)
    if max(starts) > min(vp):
        raise _err(
            "vary.periods",
            list(vp),
            f"numbers of periods of at least the last start ({max(starts)})",
            "Every layout needs each adopter's start within its periods.",
        )
    if max(vp) > 200:
        raise _err("vary.periods", list(vp), "at most 200 periods")
    vc = (
        _int_list(
            vary["comparisons"], "vary.comparisons", 1, "Every layout needs at least one comparison jurisdiction."
        )
        if "comparisons" in vary
        else (comparisons,)
    )
    if max(vc) > 2000:
        raise _err("vary.comparisons", list(vc), "at most 2000 comparison jurisdictions")
    layouts = [base]
    for c in sorted(set(vc)):
        for t in sorted(set(vp)):
            cand = dataclasses.replace(base, comparisons=c, periods=t)
            if cand not in layouts:
                layouts.append(cand)

    noise_raw = _section(raw, "noise", NOISE_KEYS)
    stated = {}
    for k, dflt in DEFAULT_NOISE.items():
        v = noise_raw.get(k, dflt)
        if k == "residual":
            vals = v if isinstance(v, list) else [v]
            if len(vals) not in (1, 2):
                raise _err("noise.residual", v, "a number or [reference, target]")
            vals = [_num(x, "noise.residual", positive=True) for x in vals]
            stated[k] = (vals[0], vals[-1])
        elif k == "rho":
            r = _num(v, "noise.rho")
            if not -1 < r < 1:
                raise _err("noise.rho", v, "a correlation strictly between -1 and 1")
            stated[k] = r
        else:
            stated[k] = _num(v, f"noise.{k}", nonneg=True)
    if stated["gap"] == 0 and stated["residual"][1] == 0:
        raise _err("noise.gap", 0, "a positive number")
    noise = Noise(stated=stated, location=location)
    if "run" in noise_raw and "pilot" in noise_raw:
        raise PlanError(
            "plan keys 'noise.run' and 'noise.pilot' exclude each other: give the posterior of a run "
            "folder or a pilot study to fit, not both."
        )
    for src in ("run", "pilot"):
        if src not in noise_raw:
            continue
        given = [k for k in ("gap", "shock") if k in noise_raw]
        if given:
            raise PlanError(
                f"plan keys {['noise.' + k for k in given]} and 'noise.{src}' exclude each other: the "
                f"{'run folder' if src == 'run' else 'pilot'}'s posterior gives these scales. Remove "
                "one of them."
            )
        reader = noise_from_run if src == "run" else noise_from_pilot
        noise = reader(
            noise_raw[src],
            base_dir,
            design=design,
            log_outcome=log_outcome,
            stated=stated,
            rho_given="rho" in noise_raw,
        )
        if noise.pilot is not None:
            noise = dataclasses.replace(noise, pilot={**noise.pilot, "residual_given": "residual" in noise_raw})
        if noise.draws is not None and ("residual" in noise_raw or "residual" not in noise.draws):
            noise = dataclasses.replace(noise, draws={k: v for k, v in noise.draws.items() if k != "residual"})
            notes.append(
                f"the residual sd of a row is {'stated' if 'residual' in noise_raw else 'the default'} "
                f"({stated['residual'][1]:g}), not drawn from the run folder"
                + (
                    ""
                    if "residual" in noise_raw
                    else ": its model had no separate residual sd (too few rows per cell); state noise.residual"
                )
            )

    eff = _section(raw, "effects", {"values"})
    vals = eff.get("values")
    if not isinstance(vals, list) or not vals:
        raise _err("effects.values", vals, "a non-empty list of true effects, for example [0, -0.05, -0.1]")
    values = [_num(v, "effects.values") for v in vals]
    if log_outcome and min(values) <= -1:
        raise _err("effects.values", vals, "relative changes above -1 (a log outcome: -0.1 is a cut of 10%)")
    if len(values) > 40:
        raise _err("effects.values", vals, "at most 40 effects")
    if 0.0 not in values:
        values = [0.0] + values
        notes.append("effect 0 was added to the grid: the false-decision rate is read there")
    values = tuple(sorted(set(values)))

    dec = _section(raw, "decision", {"threshold", "level", "direction"})
    threshold = _num(dec.get("threshold", 0.0), "decision.threshold")
    if log_outcome and threshold <= -1:
        raise _err("decision.threshold", threshold, "a relative change above -1 (log outcome)")
    level = dec.get("level", 0.9)
    if isinstance(level, bool) or not isinstance(level, numbers.Real) or not 0 < float(level) < 1:
        raise _err(
            "decision.level",
            level,
            "a probability strictly between 0 and 1, such as 0.9",
            "The rule concludes when P(effect beyond the threshold) is at least this level.",
        )
    level = float(level)
    direction = dec.get("direction")
    if direction is None:
        if threshold != 0:
            direction = "below" if threshold < 0 else "above"
        elif all(v <= 0 for v in values):
            direction = "below"
        elif all(v >= 0 for v in values):
            direction = "above"
        else:
            raise PlanError(
                "plan key 'decision.direction' is missing: with threshold 0 and effects of both signs, "
                "say whether the rule asks for an effect 'below' or 'above' the threshold."
            )
    if direction not in ("below", "above"):
        raise _err("decision.direction", direction, "'below' or 'above'")
    if (threshold < 0 and direction == "above") or (threshold > 0 and direction == "below"):
        notes.append(f"the threshold {threshold:g} lies on the other side of 0 from the direction '{direction}'")

    sim = _section(raw, "simulation", SIM_KEYS)
    reps = _int(sim, "reps", "simulation", 200, low=1, high=100_000)
    seed = _int(sim, "seed", "simulation", 20261203, low=0, high=2**63 - 1)
    # one chain of 300 draws after 200 tuning steps: enough for the decision (see decision_noise and README)
    draws = _int(sim, "draws", "simulation", DEFAULT_CHAIN["draws"], low=10, high=1_000_000)
    tune = _int(sim, "tune", "simulation", DEFAULT_CHAIN["tune"], low=10, high=1_000_000)
    chains = _int(sim, "chains", "simulation", DEFAULT_CHAIN["chains"], low=1, high=64)
    placebos = _int(sim, "placebos", "simulation", 199, low=0, high=100_000)
    gap_fit = sim.get("gap_over_time", "persistent")
    if gap_fit not in ("persistent", "independent"):
        raise _err(
            "simulation.gap_over_time",
            gap_fit,
            "'persistent' (AR(1), as bayesdid fit by default) or "
            "'independent': the gap noise the planned analysis will fit",
        )
    method = sim.get("method", "shift")
    if method not in ("shift", "refit"):
        raise _err(
            "simulation.method",
            method,
            "'shift' (one fit per data set, the other effects by exact "
            "reweighting) or 'refit' (one fit per data set and effect)",
        )
    return Plan(
        title=title,
        base=base,
        layouts=tuple(layouts),
        noise=noise,
        effects=values,
        threshold=threshold,
        direction=direction,
        level=level,
        log_outcome=log_outcome,
        period_name=period_name.strip(),
        reps=reps,
        seed=seed,
        draws=draws,
        tune=tune,
        chains=chains,
        placebos=placebos,
        method=method,
        gap_over_time=gap_fit,
        notes=tuple(notes),
        path=path,
    )


def rho_note(rho_simulated: bool, fitted: set[str]) -> str | None:
    """What the page says about persistent gap noise, from what was simulated and the forms fitted."""
    if not rho_simulated:
        return None
    if fitted and fitted <= {"persistent"}:
        return "the gap noise is simulated as persistent (AR(1)); the fitted model learns its correlation rho"
    return (
        "the gap noise is simulated as persistent (AR(1)), but the model fitted here assumed independent gap "
        "noise" + (" in some data sets" if "persistent" in fitted else "") + ": its intervals are too "
        "narrow, so the assurance and false-decision rate read here are those of an over-confident analysis"
    )


def load_plan(path: str | Path) -> Plan:
    """Read and validate a plan file (TOML, UTF-8); every error names the key at fault."""
    from .study import read_text_utf8

    path = Path(path)
    text = read_text_utf8(path, "plan file", error=PlanError)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PlanError(f"plan file '{path}' is not valid TOML: {exc}. Fix the line it names.") from None
    return _parse(raw, path.parent.resolve(), str(path))


def with_overrides(plan: Plan, **given) -> Plan:
    """The plan with command-line values for ``reps``, ``draws``, ``tune`` or ``seed`` (checked as in the file)."""
    limits = {"reps": (1, 100_000), "draws": (10, 1_000_000), "tune": (10, 1_000_000), "seed": (0, 2**63 - 1)}
    upd = {}
    for k, v in given.items():
        if v is None:
            continue
        lo, hi = limits[k]
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise PlanError(
                f"command-line option --{k} {v!r}: expected a whole number from {lo} to {hi:,} "
                f"(it replaces simulation.{k} of the plan)."
            )
        upd[k] = v
    return dataclasses.replace(plan, **upd) if upd else plan


def make_plan(raw: Mapping, base_dir: str | Path = ".") -> Plan:
    """A plan from a dict with the plan file's sections (tests, notebooks)."""
    return _parse(raw, Path(base_dir).resolve(), None)


def noise_from_run(run: Any, base_dir: Path, *, design: str, log_outcome: bool, stated: dict, rho_given: bool) -> Noise:
    """Noise scales from the posterior of a run folder written by ``bayesdid fit`` (key ``noise.run``).

    Reads ``sigma_gap``, ``sigma_shock`` (DDD), ``sigma`` (per group) and ``sigma_baseline`` draws, and
    ``rho`` and ``omega`` (the spread of the jurisdictions' log gap-noise scales) when the model has them; the spread of the period effects of each draw gives the period
    scales. Refuses a folder of another design (DDD vs DiD), outcome scale or family.
    """
    import xarray as xr

    if not isinstance(run, str) or not run.strip():
        raise _err("noise.run", run, "the path of a run folder written by 'bayesdid fit'")
    folder = Path(run) if Path(run).is_absolute() else base_dir / run
    if not folder.is_dir() or not (folder / "summary.json").is_file() or not (folder / "posterior.nc").is_file():
        raise PlanError(
            f"plan key 'noise.run': '{folder}' is not a run folder (it needs summary.json and "
            "posterior.nc, as 'bayesdid fit STUDY.toml --out DIR' writes them). Fit the pilot first."
        )
    try:
        summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise PlanError(f"plan key 'noise.run': cannot read {folder / 'summary.json'} ({exc}).") from None
    model = summary.get("model", {})
    fam = model.get("family", "gaussian")
    if not family_record(fam).cell_model:
        raise PlanError(
            f"plan key 'noise.run': the run folder '{folder}' fitted the {fam} family; a plan simulates "
            "the Gaussian model. Use a Gaussian pilot fit or state the noise scales."
        )
    if model.get("design") != design:
        raise PlanError(
            f"plan key 'noise.run': the run folder '{folder}' is a {model.get('design')} but the plan's "
            f"layout.design is {design}: a pilot of a different design has different noise terms. "
            "Use a pilot of the same design or state the noise scales."
        )
    if bool(model.get("log_outcome", False)) != log_outcome:
        raise PlanError(
            f"plan key 'noise.run': the run folder '{folder}' analysed the outcome "
            f"{'on the log scale' if model.get('log_outcome') else 'in its units'}, the plan's "
            f"layout.log_outcome is {str(log_outcome).lower()}: the scales would be on another scale. "
            "Make them agree."
        )
    try:
        with xr.open_datatree(folder / "posterior.nc", engine="h5netcdf") as tree:
            post = tree["posterior"].to_dataset().load()
    except Exception as exc:  # noqa: BLE001 - any unreadable file is the same bad input
        raise PlanError(
            f"plan key 'noise.run': cannot read {folder / 'posterior.nc'} ({type(exc).__name__}: {exc})."
        ) from None
    draws, loc = _noise_draws(post, design, rho_given, "noise.run", f"the posterior in '{folder}'")
    return Noise(stated=stated, source="run folder", run=str(folder), draws=draws, location=loc)


def _noise_draws(post, design: str, rho_given: bool, key: str, what: str) -> tuple[dict, tuple]:
    """Noise-scale draws (and the groups' mean levels) from a posterior dataset of the Gaussian model."""

    def flat(name):
        da = post[name]
        other = [d for d in da.dims if d not in ("chain", "draw")]
        return da.stack(sample=("chain", "draw")).transpose("sample", *other).to_numpy()

    need = ["sigma_gap"] + (["sigma_shock"] if design == "DDD" else [])
    missing = [n for n in need if n not in post]
    if missing:
        raise PlanError(
            f"plan key '{key}': {what} lacks {missing}; it was not written by a Gaussian "
            "'bayesdid fit' of this version."
        )
    draws = {"gap": flat("sigma_gap")}
    if "sigma" in post:  # absent when the cells held too few rows for a separate residual sd
        sig = flat("sigma")
        draws["residual"] = sig if sig.ndim == 2 else sig[:, None]
    if design == "DDD":
        draws["shock"] = flat("sigma_shock")
    if "sigma_baseline" in post:
        draws["baseline"] = flat("sigma_baseline")
    if "period_effect" in post:
        draws["period"] = flat("period_effect").std(axis=1, ddof=1)
    if "group_period_effect" in post and design == "DDD":
        draws["group_period"] = flat("group_period_effect").std(axis=1, ddof=1)
    if "rho" in post and not rho_given:
        draws["rho"] = flat("rho")
    if "omega" in post:  # per-jurisdiction gap-noise scales: new jurisdictions draw theirs from the pooled law
        draws["omega"] = flat("omega")
    if "residual" in draws and draws["residual"].shape[1] == 1:
        draws["residual"] = np.repeat(draws["residual"], 2, axis=1)
    loc = (0.0, 0.0)
    if "mu_group" in post:
        mu = flat("mu_group").mean(axis=0)
        loc = (float(mu[0]), float(mu[-1]))
    return draws, loc


def noise_from_pilot(
    pilot: Any, base_dir: Path, *, design: str, log_outcome: bool, stated: dict, rho_given: bool
) -> Noise:
    """Check a pilot study (key ``noise.pilot``) against the plan; its fit waits for :func:`resolve_noise`.

    The pilot is a study file whose table holds the pilot data; its [policy] names the adopters as in
    any study (for data from before any policy, name one jurisdiction and a late period as a stand-in:
    the noise scales are learned mostly from the comparison jurisdictions). The table is read and
    checked here, so a faulty pilot is refused before any work.
    """
    from .errors import StudyError
    from .run import prepare
    from .study import load_study

    if not isinstance(pilot, str) or not pilot.strip():
        raise _err("noise.pilot", pilot, "the path of a study file (TOML) whose table is the pilot data")
    path = Path(pilot) if Path(pilot).is_absolute() else base_dir / pilot
    try:
        study = load_study(path)
        if not family_record(study.model.family).cell_model:
            raise PlanError(
                f"plan key 'noise.pilot': the pilot study '{path}' uses the {study.model.family} "
                "family; a plan simulates the Gaussian model. Use a Gaussian pilot or state the noise."
            )
        if study.design != design:
            raise PlanError(
                f"plan key 'noise.pilot': the pilot study '{path}' is a {study.design} but the plan's "
                f"layout.design is {design}: a pilot of a different design has different noise terms. "
                "Use a pilot of the same design or state the noise scales."
            )
        if bool(study.model.log_outcome) != log_outcome:
            raise PlanError(
                f"plan key 'noise.pilot': the pilot study '{path}' has log_outcome = "
                f"{str(study.model.log_outcome).lower()}, the plan's layout.log_outcome is "
                f"{str(log_outcome).lower()}: the scales would be on another scale. Make them agree."
            )
        cells, digest, _ = prepare(study)
    except PlanError:
        raise
    except StudyError as exc:  # the study's own message names its key; say where it comes from
        raise PlanError(f"plan key 'noise.pilot': the pilot study '{path}': {exc}") from None
    except Exception as exc:
        from .errors import BayesDidError

        if isinstance(exc, BayesDidError):
            raise PlanError(f"plan key 'noise.pilot': the pilot table of '{path}': {exc}") from None
        raise
    return Noise(
        stated=stated,
        source="pilot table",
        run=str(path),
        draws=None,
        location=(float(cells.outcome_mean),) * 2,
        pilot={"study": str(path), "data_sha256": digest, "rho_given": rho_given},
    )


def resolve_noise(plan: Plan, log=None) -> Plan:
    """The plan with its pilot fitted: the posterior of the pilot study gives the noise draws.

    The pilot is fitted once, in this process, with its study's sampler settings and priors (as
    ``bayesdid fit`` would); a plan whose noise is stated or from a run folder is returned unchanged.
    """
    nz = plan.noise
    if nz.source != "pilot table" or nz.draws is not None:
        return plan
    from .model.terms import resolve_scales
    from .run import prepare
    from .sample import fit_cells
    from .study import load_study

    study = load_study(nz.pilot["study"])
    cells, _, _ = prepare(study)
    if log:
        log(f"fitting the pilot study {nz.pilot['study']} for the noise scales")
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    fit = fit_cells(cells, scales, study.sampler)
    draws, loc = _noise_draws(
        fit.posterior, cells.design, nz.pilot["rho_given"], "noise.pilot", f"the pilot fit of '{nz.pilot['study']}'"
    )
    pilot = {
        **nz.pilot,
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "seed": study.sampler.seed,
    }
    notes = plan.notes
    if "residual" in draws and nz.pilot.get("residual_given"):
        draws.pop("residual")
    if "residual" not in draws:
        notes = notes + (
            f"the residual sd of a row is {'stated' if nz.pilot.get('residual_given') else 'the default'} "
            f"({nz.stated['residual'][1]:g}), not drawn from the pilot's posterior",
        )
    if not fit.diagnostics.get("ok"):
        notes = notes + (
            f"the pilot fit's sampler diagnostics fail ({fit.diagnostics.get('advice')}); the noise "
            "draws may be unreliable: raise the pilot study's draws",
        )
    return dataclasses.replace(plan, noise=dataclasses.replace(nz, draws=draws, location=loc, pilot=pilot), notes=notes)


# ---- simulation ------------------------------------------------------------------------------------


def _names(J: int) -> list[str]:
    from .simulate import region_names

    return region_names(J)


def simulate_noise(frame: Layout, scales: dict, location: tuple, rng: np.random.Generator) -> dict:
    """The effect-free cell means and within sums of squares of the largest layout.

    Model of DESIGN.md, cell c = (j, g, t) with n rows each:
    mean = b[j,g] + a[t] + s[j,t] (DDD) + h[t] + e[j,t] (target group), b ~ N(location[g], baseline^2),
    e[j, .] a stationary AR(1) with correlation rho and marginal sd gap_j = gap exp(omega z_j), z_j ~ N(0, 1)
    (gap itself when omega = 0, with no draw of z); the cell mean of n rows is
    Normal(mean, residual_g^2 / n) and the within sum of squares residual_g^2 chi^2(n - 1), independent
    (exact sufficient statistics of n Normal rows).
    """
    J = frame.adopters + frame.comparisons
    T = frame.periods
    G = 2 if frame.design == "DDD" else 1
    tg = G - 1
    n = frame.rows_per_cell
    b = np.asarray(location[-G:] if G == 1 else location, float)[None, :] + scales["baseline"] * rng.standard_normal(
        (J, G)
    )
    a = scales["period"] * rng.standard_normal(T)
    mean = b[:, :, None] + a[None, None, :]
    if G == 2:
        mean += (scales["shock"] * rng.standard_normal((J, T)))[:, None, :]
        mean[:, tg, :] += scales["group_period"] * rng.standard_normal(T)[None, :]
    rho, sd = scales["rho"], scales["gap"]
    omega = float(scales.get("omega", 0.0))
    if omega > 0:  # each jurisdiction's own scale (the fitted model's pooled law); drawn only then
        sd = sd * np.exp(omega * rng.standard_normal(J))
    z = rng.standard_normal((J, T))
    e = np.empty((J, T))
    e[:, 0] = sd * z[:, 0]
    for t in range(1, T):
        e[:, t] = rho * e[:, t - 1] + sd * math.sqrt(1 - rho * rho) * z[:, t]
    mean[:, tg, :] += e
    res = np.asarray(scales["residual"], float)
    sig = (res[-1:] if G == 1 else res)[None, :, None] * np.ones((J, G, T))
    ybar = mean + sig / math.sqrt(n) * rng.standard_normal((J, G, T))
    ss = sig**2 * rng.chisquare(max(n - 1, 1), size=(J, G, T)) * (n > 1)
    return {"ybar": ybar, "ss": ss}


def simulate_cells(plan: Plan, layout: Layout, noise_cells: dict, effect_model: float):
    """Cells of ``layout`` (inside the plan's largest layout) with ``effect_model`` added to the treated cells.

    Jurisdictions are the adopters, then the comparisons in order; the comparisons and periods beyond
    the layout's own are empty (n = 0), so the model structure is that of the largest layout.
    """
    from .cells import Cells

    frame = plan.frame
    A, J, T = frame.adopters, frame.adopters + frame.comparisons, frame.periods
    G = 2 if frame.design == "DDD" else 1
    tg = G - 1
    start = np.full(J, T, dtype=int)
    start[:A] = np.asarray(frame.starts) - 1
    active = np.zeros((J, G, T), dtype=bool)
    active[: A + layout.comparisons, :, : layout.periods] = True
    n = np.where(active, float(frame.rows_per_cell), 0.0)
    treated = np.zeros((J, G, T), dtype=bool)
    treated[:, tg, :] = np.arange(T)[None, :] >= start[:, None]
    ybar = noise_cells["ybar"] + effect_model * treated
    ss = np.where(active, noise_cells["ss"], 0.0)
    sum_y = np.where(active, n * ybar, 0.0)
    sum_y2 = ss + n * np.where(active, ybar, 0.0) ** 2
    N = float(n.sum())
    m = float(sum_y.sum() / N)
    sd = math.sqrt(max(float(sum_y2.sum()) / N - m * m, 0.0))
    cells = Cells(
        jurisdictions=tuple(_names(J)),
        groups=("reference", "target") if G == 2 else ("all",),
        periods=tuple(range(1, T + 1)),
        design=frame.design,
        target=tg,
        start=start,
        n=n,
        sum_y=sum_y,
        sum_y2=sum_y2,
        ss=ss,
        rows=int(N),
        log_outcome=plan.log_outcome,
        outcome_sd=sd if sd > 0 else 1.0,
        outcome_mean=m,
    )
    return _with_gap(cells, plan.gap_over_time)


def _with_gap(cells, requested: str):
    """The cells with the gap structure the planned analysis fits (as the collapse records it for a study)."""
    try:
        from .model.structure import resolve_gap
    except ImportError:  # a version without persistent gap noise: independent is all there is
        return cells
    return dataclasses.replace(cells, extra={**cells.extra, "gap": resolve_gap(cells, requested, warn=False)})


# ---- one rep -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RepTask:
    """One data set of one layout, at every true effect of the grid: everything a worker needs (picklable)."""

    plan: Plan
    layout: int  # index into plan.layouts
    rep: int
    threads: int = 1  # sampler threads per fit (1 when several workers share the cores); draws do not depend on it

    @property
    def seeds(self) -> tuple[int, int]:
        """(noise seed, sampler seed) of rep i: the same for every layout and effect (common random numbers)."""
        s = np.random.SeedSequence([int(self.plan.seed), 16, int(self.rep)]).generate_state(2)
        return int(s[0]), int(s[1] % (2**31 - 1))

    @property
    def key(self) -> str:
        return f"{self.plan.layouts[self.layout].key}|{self.rep}"


def _one_sided_p(estimate: float, placebo: list, direction: str) -> float | None:
    """Share of assignments, the real one included, at least as far in ``direction`` as the real estimate."""
    est = np.asarray(placebo, float)
    est = est[np.isfinite(est)]
    if est.size == 0:
        return None
    tol = 1e-10 * max(abs(estimate), 1e-300)
    extreme = np.sum(est <= estimate + tol) if direction == "below" else np.sum(est >= estimate - tol)
    return float((1 + extreme) / (1 + est.size))


def shift_log_weights(fit, scales: dict, shift: float, adopters: int | None = None) -> np.ndarray:
    """Log importance weights that turn draws for data y into draws for data y + shift * D.

    The likelihood reads the adopters' effects only through ybar - m, and m holds tau_a D: the data
    y + c D under effects tau_a have the likelihood of the data y under tau_a - c. So if theta_0 are
    posterior draws given y, the draws theta_0 + c (every tau_a, hence the ATT, moved by c) weighted
    by prior(theta_0 + c) / prior(theta_0) are posterior draws given y + c D, exactly, for the same
    prior scales. Only the prior of the effect terms changes:

    * one adopter: tau ~ Normal(0, s_e^2), log w = -((tau + c)^2 - tau^2) / (2 s_e^2);
    * several: their mean abar ~ Normal(0, v), v = s_e^2 + sigma_tau^2 / A (contrasts unchanged),
      log w = -((abar + c)^2 - abar^2) / (2 v).

    ``fit``: anything with ``draws(name)`` (a :class:`~bayesdid.sample.Fit` or lean draws); ``adopters``
    the number of adopters (default: read from ``fit.cells``).
    """
    se2 = float(scales["effect"]) ** 2
    A = int(adopters) if adopters is not None else len(fit.cells.adopters)
    if A == 1:
        t = fit.draws("tau").reshape(-1)
        return -((t + shift) ** 2 - t**2) / (2 * se2)
    abar = fit.draws("tau_adopter_mean").reshape(-1)
    v = se2 + fit.draws("sigma_tau").reshape(-1) ** 2 / A
    return -((abar + shift) ** 2 - abar**2) / (2 * v)


def _wquantile(x: np.ndarray, w: np.ndarray, q) -> np.ndarray:
    """Quantiles of weighted draws (weights sum to 1; interpolated between midpoints of the sorted mass)."""
    o = np.argsort(x)
    xs, ws = x[o], w[o]
    c = np.cumsum(ws) - ws / 2
    return np.interp(q, c, xs)


#: Least-squares designs of the layouts this process has seen (see crosscheck.permutation_test).
_DESIGNS: dict = {}

#: Below this share of effective draws the shifted draws are not used and the effect is refitted.
MIN_WEIGHT_ESS = 0.5
#: An inner fit passes when the ATT's rank-normalised split R-hat is below PLAN_RHAT_MAX, there is no
#: divergent transition, and the ATT's bulk ESS is at least PLAN_ESS_MIN: the Monte Carlo sd of the
#: decision probability is then at most sqrt(0.25 / 100) = 0.05 (0.03 near a level of 0.9). Only the
#: ATT is judged: it is all the decision reads. R-hat: 1.05 (common practice before Vehtari et al.
#: 2021, whose 1.01 presumes an ESS of 400 or more): one chain of 300 independent draws exceeds 1.01
#: in 12% of 1,000 simulated chains and 1.05 in none (99.9th percentile 1.029).
PLAN_RHAT_MAX = 1.05
PLAN_ESS_MIN = 100


def _att_diagnostics(att: np.ndarray, divergences: int) -> dict:
    """R-hat and bulk ESS of the ATT draws (chains, draws), the divergences, and the plan's pass rule."""
    from arviz_stats.base import array_stats

    # one chain: its two halves play the chains (R-hat needs at least two; the rank method splits again)
    halves = att if att.shape[0] > 1 else att[:, : att.shape[1] // 2 * 2].reshape(2, -1)
    rhat = float(array_stats.rhat(halves, chain_axis=0, draw_axis=1)) if att.shape[1] >= 8 else float("nan")
    ess = float(array_stats.ess(att, chain_axis=0, draw_axis=1, method="bulk")) if att.shape[1] >= 4 else 0.0
    return {
        "rhat_max": rhat,
        "ess_bulk_att": ess,
        "divergences": int(divergences),
        "ok": bool(rhat < PLAN_RHAT_MAX and ess >= PLAN_ESS_MIN and divergences == 0),
    }


def _decide(plan: Plan, att: np.ndarray, w: np.ndarray | None, truth: float, chains: int = 1) -> dict:
    """The rule on one posterior (draws ``att``, chain-major, optional weights ``w``), with its Monte Carlo error.

    ``prob_beyond_mcse``: the Monte Carlo sd of the decision probability, sqrt(sum w^2 (b - p)^2 * S / ESS)
    with b the indicator of a draw beyond the threshold and ESS its effective sample size over the
    ``chains`` (autocorrelation of the unweighted chain; the weighted variance is p (1 - p) / S for
    equal weights, so this is sqrt(p (1 - p) / ESS) then).
    """
    from arviz_stats.base import array_stats

    thr = plan.model_threshold
    S = att.size
    w = np.full(S, 1.0 / S) if w is None else w
    beyond = att < thr if plan.direction == "below" else att > thr
    prob = float(np.sum(w * beyond))
    lo, hi = _wquantile(att, w, [0.025, 0.975])
    mean = float(np.sum(w * att))
    mcse = 0.0
    if 0 < beyond.sum() < S and S // chains >= 8:
        ess = float(array_stats.ess(beyond.reshape(chains, -1).astype(float), chain_axis=0, draw_axis=1, method="mean"))
        mcse = math.sqrt(float(np.sum(w**2 * (beyond - prob) ** 2)) * S / max(ess, 1.0))
    return {
        "prob_beyond": prob,
        "prob_beyond_mcse": mcse,
        "decide": bool(prob >= plan.level),
        "posterior_mean": mean,
        "posterior_sd": float(math.sqrt(max(np.sum(w * (att - mean) ** 2), 0.0))),
        "width_95": float(hi - lo),
        "cover_95": bool(lo <= truth <= hi),
    }


def decision_noise(plan: Plan, rows: list[dict]) -> dict:
    """How much the sampler's own Monte Carlo error can move the decisions of a set of data sets.

    A data set's decision probability p_hat has Monte Carlo sd m (``prob_beyond_mcse``); another run of
    the sampler gives about Normal(p, m^2), so it concludes with probability Phi((p - level) / m) (p_hat
    standing in for p). Averaged over data sets:

    * ``flip_share``: mean Phi(-|p_hat - level| / m), the expected share of decisions a rerun would
      reverse (gross: flips both ways);
    * ``shift``: mean [Phi((p_hat - level) / m) - 1{p_hat >= level}], the expected net change of the
      assurance (flips in the two directions cancel). Taking p_hat for p counts the noise twice, so this
      overstates the shift between these chains and infinitely long ones (for a smooth density f of p
      near the level the shift is about -f'(level) m^2 / 2, and the plug-in about twice that).

    When ``shift`` is well below the assurance's own Monte Carlo error, longer chains would not change
    the reading.
    """
    from scipy import stats

    flips, shifts = [], []
    for r in rows:
        m = r.get("prob_beyond_mcse")
        if m is None:
            continue
        p, hit = r["prob_beyond"], r["prob_beyond"] >= plan.level
        q = float(stats.norm.cdf((p - plan.level) / m)) if m > 0 else float(hit)
        flips.append(1 - q if hit else q)
        shifts.append(q - float(hit))
    if not flips:
        return {"flip_share": None, "shift": None}
    return {"flip_share": float(np.mean(flips)), "shift": float(np.mean(shifts))}


def _permutation_rows(plan: Plan, layout: Layout, noise_cells: dict, seed: int, effects_model: list) -> list[dict]:
    """The permutation test at every effect from two least-squares passes over the same assignments.

    The estimate of every assignment (the real one and each placebo) is linear in the data, and the
    data at effect c are y0 + c D: so est(c) = est(0) + c (est(1) - est(0)) exactly, for every
    assignment at once (the real one moves by exactly c). Two passes replace one per effect.
    """
    from .crosscheck import permutation_test

    p0, p1 = (
        permutation_test(
            simulate_cells(plan, layout, noise_cells, c), placebos=plan.placebos, seed=seed, designs=_DESIGNS
        )
        for c in (0.0, 1.0)
    )
    e0 = np.asarray(p0["estimates"], float)
    slope = np.asarray(p1["estimates"], float) - e0
    out = []
    for c in effects_model:
        real = p0["estimate"] + c
        placebo = e0 + c * slope
        p_one = _one_sided_p(real, placebo, plan.direction)
        out.append(
            {
                "ls_estimate": float(real),
                "p_permutation_two_sided": _two_sided_p(real, placebo),
                "p_permutation": p_one,
                "permutation_assignments": p0["assignments"],
                "permutation_reject": None if p_one is None else bool(p_one <= 1 - plan.level + 1e-12),
            }
        )
    return out


def _two_sided_p(estimate: float, placebo: np.ndarray) -> float | None:
    """As crosscheck's p-value: share of assignments, the real one included, with |estimate| at least the real one's."""
    est = placebo[np.isfinite(placebo)]
    if est.size == 0:
        return None
    return float((1 + np.sum(np.abs(est) >= abs(estimate) * (1 - 1e-10))) / (1 + est.size))


def _rep(task: RepTask) -> dict:
    from . import sample
    from .effects import att_weights
    from .model.terms import resolve_scales
    from .sample import COMPILES, sample_draws
    from .study import PriorScales, SamplerSettings

    loads = getattr(sample, "LOADS", {"count": 0})  # compiled models loaded from the disk cache
    plan = task.plan
    layout = plan.layouts[task.layout]
    noise_seed, sampler_seed = task.seeds
    rng = np.random.default_rng(noise_seed)
    scales_true = plan.noise.for_rep(rng)
    noise_cells = simulate_noise(plan.frame, scales_true, plan.noise.location, rng)
    settings = SamplerSettings(chains=plan.chains, draws=plan.draws, tune=plan.tune, seed=sampler_seed)
    before, loaded = COMPILES["count"], loads["count"]
    fits = {"compile_s": 0.0, "sample_s": 0.0, "fits": 0}
    A = plan.frame.adopters
    # the lean path: raw draws of what the decision and the reweighting read, nothing else
    names = ["tau_adopter"] + (["tau"] if A == 1 else ["tau_adopter_mean", "sigma_tau"])

    def fit_at(effect_model: float):
        cells = simulate_cells(plan, layout, noise_cells, effect_model)
        scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
        fit = sample_draws(cells, scales, settings, names, cores=task.threads)
        fits["compile_s"] += fit.timing["compile_s"]
        fits["sample_s"] += fit.timing["sample_s"]
        fits["fits"] += 1
        att = fit.values["tau_adopter"] @ att_weights(cells)  # (chains, draws)
        return fit, scales, att.reshape(-1), _att_diagnostics(att, fit.divergences)

    base = None
    if plan.method == "shift":
        base = fit_at(0.0)  # the data set without effect; every other effect moves its treated cells
    truths = [plan.model_effect(e) for e in plan.effects]
    perm = _permutation_rows(plan, layout, noise_cells, sampler_seed, truths) if plan.placebos else [{} for _ in truths]
    rows = []
    for effect, truth, prow in zip(plan.effects, truths, perm, strict=True):
        how, ess, w = "refit", None, None
        if base is not None:
            fit, scales, att0, diag = base
            lw = shift_log_weights(fit, scales, truth, adopters=A)
            w = np.exp(lw - lw.max())
            w /= w.sum()
            ess = float(1.0 / np.sum(w**2) / w.size)
            if ess >= MIN_WEIGHT_ESS:
                how, att = "shift", att0 + truth
        if how == "refit":
            fit, _, att, diag = fit_at(truth)
            w = None
        rows.append(
            {
                "effect": effect,
                "method": how,
                "weights_ess_share": ess,
                **_decide(plan, att, w, truth, chains=plan.chains),
                "rhat_max": diag["rhat_max"],
                "ess_bulk_att": diag["ess_bulk_att"],
                "divergences": diag["divergences"],
                "diagnostics_ok": diag["ok"],
                "gap_sd_true": scales_true["gap"],
                "rho_true": scales_true["rho"],
                "gap_fitted": getattr(fit.spec, "gap", "independent"),
                **prow,
            }
        )
    return {"rows": rows, "compiles": COMPILES["count"] - before, "cache_loads": loads["count"] - loaded, **fits}


def run_rep(task: RepTask) -> dict:
    """Run one data set of one layout at every effect; never raises: a failure comes back as ``ok = False``."""
    t0 = time.perf_counter()
    plan = task.plan
    base = {
        "layout": plan.layouts[task.layout].key,
        "rep": task.rep,
        "key": task.key,
        "noise_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
        "pid": os.getpid(),
    }
    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            # empty jurisdictions and periods of smaller layouts make the rule of baseline_centred
            # average empty slices (it ignores them, as intended)
            warnings.simplefilter("ignore", RuntimeWarning)
            out = _rep(task)
        return {**base, "ok": True, "error": "", **out, "wall_s": time.perf_counter() - t0}
    except Exception as exc:  # noqa: BLE001 - a failing rep is reported, not allowed to stop the plan
        return {
            **base,
            "ok": False,
            "error": f"{type(exc).__name__}: {exc}",
            "rows": [],
            "wall_s": time.perf_counter() - t0,
        }


def _rep_lost(task: RepTask, exc: BaseException) -> dict:
    plan = task.plan
    return {
        "layout": plan.layouts[task.layout].key,
        "rep": task.rep,
        "key": task.key,
        "noise_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
        "pid": "lost",
        "ok": False,
        "rows": [],
        "wall_s": float("nan"),
        "error": f"the worker running this rep stopped: {type(exc).__name__}: {exc}",
    }


def plan_tasks(plan: Plan, threads: int = 1) -> list[RepTask]:
    """Every data set of every layout, rep-major (a stopped run has every layout of its first reps)."""
    return [
        RepTask(plan=plan, layout=li, rep=r, threads=threads)
        for r in range(plan.reps)
        for li in range(len(plan.layouts))
    ]


def flat_rows(records: list[dict]) -> list[dict]:
    """One row per data set and effect (reps.csv), from the per-task records."""
    out = []
    for rec in records:
        if not rec.get("ok"):
            continue
        head = {k: rec[k] for k in ("layout", "rep", "noise_seed", "sampler_seed", "pid")}
        for r in rec["rows"]:
            out.append({**head, **r, "ok": True})
    return out


# ---- the normal approximation -------------------------------------------------------------------


def normal_assurance(plan: Plan, layout: Layout, effect: float) -> dict:
    """Assurance and 95% width under a normal approximation with known variance components.

    Derivation (DiD; the DDD reduces to it on the target-minus-reference gaps). Let A adopters share one
    start, with T0 periods before it and T1 from it on, and C comparison jurisdictions, n rows per cell.
    With independent noise the cell mean (DiD), or the cell gap (DDD), of jurisdiction j at period t is

        y[j,t] = b[j] + a[t] + tau D[j,t] + u[j,t],   Var(u) = v,
        v = sigma_gap^2 + sigma_q^2 / n                       (DiD)
        v = sigma_gap^2 + sigma_q^2 / n + sigma_r^2 / n       (DDD: the shared shock cancels in the gap)

    (sigma_q, sigma_r: residual sd of the target and reference group). In this balanced two-way layout
    with iid u, least squares is generalised least squares, and with flat priors and the variance known
    the posterior of tau is Normal(tau_hat, V) with the difference in differences

        tau_hat = (mean_A,post - mean_A,pre) - (mean_C,post - mean_C,pre),
        V = v/(A T1) + v/(A T0) + v/(C T1) + v/(C T0) = v (1/T0 + 1/T1) (1/A + 1/C).

    The rule "P(tau < theta | data) >= L" (direction below) holds when Phi((theta - tau_hat)/sqrt V) >= L,
    that is tau_hat <= theta - z_L sqrt V, with z_L the standard normal L-quantile. Over data sets
    tau_hat ~ Normal(tau, V), so the assurance at a true effect tau is

        assurance(tau) = Phi((theta - tau) / sqrt V - z_L)       (direction below)
        assurance(tau) = Phi((tau - theta) / sqrt V - z_L)       (direction above)

    which is 1 - L at tau = theta, and the 95% interval is 2 z_0.975 sqrt V wide. The full model learns
    the variance components and uses weakly informative priors, so its assurance is slightly below
    this when the comparisons are few; with independent noise and many comparison jurisdictions the
    two agree within Monte Carlo error (tests/test_plan.py). Not given (None, with the reason) for
    staggered starts, noise from a run folder, AR(1) noise (rho != 0), gap-noise scales that differ
    across jurisdictions (omega != 0), or a DDD with unequal residual sds
    (the group sums then carry information about the gaps).
    """
    from scipy import stats

    s = plan.noise.stated
    why = None
    if len(set(layout.starts)) > 1:
        why = "adopters start in different periods"
    elif plan.noise.source != "stated":
        why = "the noise is drawn from a posterior, not stated"
    elif s["rho"] != 0:
        why = "the gap noise is persistent (rho != 0)"
    elif s.get("omega", 0.0) != 0:
        why = "the jurisdictions' gap-noise scales differ (omega != 0)"
    elif layout.design == "DDD" and s["residual"][0] != s["residual"][1]:
        why = "the two groups' residual sds differ"
    if why:
        return {"assurance": None, "width_95": None, "reason": f"no normal approximation: {why}"}
    n = layout.rows_per_cell
    sq, sr = s["residual"][1], s["residual"][0]
    v = s["gap"] ** 2 + sq**2 / n + (sr**2 / n if layout.design == "DDD" else 0.0)
    T0, T1 = layout.pre_periods, layout.post_periods
    V = v * (1 / T0 + 1 / T1) * (1 / layout.adopters + 1 / layout.comparisons)
    sdv = math.sqrt(V)
    tau = plan.model_effect(effect)
    z = stats.norm.ppf(plan.level)
    x = (plan.model_threshold - tau) / sdv if plan.direction == "below" else (tau - plan.model_threshold) / sdv
    return {
        "assurance": float(stats.norm.cdf(x - z)),
        "width_95": float(2 * stats.norm.ppf(0.975) * sdv),
        "sd": sdv,
        "reason": "",
    }


# ---- summaries -------------------------------------------------------------------------------------


def _share(values) -> tuple[float | None, float | None, int]:
    v = [bool(x) for x in values if x is not None]
    N = len(v)
    if not N:
        return None, None, 0
    p = sum(v) / N
    return p, math.sqrt(p * (1 - p) / N), N


def assurance_table(plan: Plan, rows: list[dict]) -> list[dict]:
    """One row per layout and true effect: assurance with MCSE, width, permutation power, the normal approximation."""
    out = []
    for layout in plan.layouts:
        for effect in plan.effects:
            rs = [r for r in rows if r.get("ok") and r["layout"] == layout.key and r["effect"] == effect]
            p, se, N = _share(r["decide"] for r in rs)
            w = np.asarray([r["width_95"] for r in rs], float)
            pw, pse, pN = _share(r.get("permutation_reject") for r in rs)
            cov, cse, _ = _share(r["cover_95"] for r in rs)
            na = normal_assurance(plan, layout, effect)
            out.append(
                {
                    "layout": layout.key,
                    "adopters": layout.adopters,
                    "comparisons": layout.comparisons,
                    "periods": layout.periods,
                    "pre_periods": layout.pre_periods,
                    "post_periods": layout.post_periods,
                    "effect": effect,
                    "effect_model_scale": plan.model_effect(effect),
                    "reps": N,
                    "assurance": p,
                    "assurance_mcse": se,
                    "false_decision_rate": p if effect == 0 else None,
                    "width_95_mean": float(w.mean()) if N else None,
                    "width_95_mcse": float(w.std(ddof=1) / math.sqrt(N)) if N > 1 else None,
                    "coverage_95": cov,
                    "coverage_95_mcse": cse,
                    "permutation_power": pw,
                    "permutation_power_mcse": pse,
                    "permutation_reps": pN,
                    "normal_assurance": na["assurance"],
                    "normal_width_95": na["width_95"],
                    "diagnostics_ok_share": float(np.mean([r["diagnostics_ok"] for r in rs])) if N else None,
                    **{f"decision_{k}": v for k, v in decision_noise(plan, rs).items()},
                }
            )
    return out


# ---- the whole plan ------------------------------------------------------------------------------


def progress_path(out: str | Path) -> Path:
    t = Path(out)
    return t.with_name(f".{t.name}.plan-progress.jsonl")


def _read_progress(path: Path, fingerprint: str) -> dict[str, dict]:
    """Finished reps of an earlier, stopped run of the same plan (other plans' lines are ignored)."""
    done: dict[str, dict] = {}
    if not path.is_file():
        return done
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            r = json.loads(line)
        except ValueError:
            continue  # a line cut by a kill
        if r.get("fingerprint") == fingerprint and r.get("ok"):
            done[r["key"]] = r
    return done


class _Bar:
    def __init__(self, total: int, skipped: int, enabled: bool):
        self.total, self.done, self.failed, self.skipped, self.enabled = total, 0, 0, skipped, enabled
        self.t0 = time.perf_counter()

    def step(self, rec: dict):
        self.done += 1
        self.failed += not rec.get("ok")
        if self.enabled and (self.done == self.total or self.done % max(1, self.total // 50) == 0):
            sys.stderr.write(
                f"\rbayesdid: plan reps {self.done}/{self.total} run, {self.failed} failed, "
                f"{self.skipped} already done, {time.perf_counter() - self.t0:.0f}s"
                + ("\n" if self.done == self.total else "")
            )
            sys.stderr.flush()


def run_plan(
    plan: Plan,
    *,
    workers: int = 2,
    cluster: str | None = None,
    progress_file: str | Path | None = None,
    progress: bool = False,
    log=None,
) -> dict:
    """Run every rep not already in ``progress_file``; return the summary and the per-rep rows.

    Executors as for sweeps: ``cluster`` (a Dask scheduler address, or "local") wins; else ``workers``
    = 1 runs in this process and more use the local pool of spawned worker processes.
    """
    from .sweep import EXECUTORS

    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise PlanError(f"--workers: expected a whole number of at least 1, found {workers!r}.")
    kind = "dask" if cluster else ("serial" if workers == 1 else "pool")
    plan = resolve_noise(plan, log)
    fp = plan.fingerprint()
    path = Path(progress_file) if progress_file else None
    done = _read_progress(path, fp) if path else {}
    # one worker in this process: its chains may use both cores; several workers: one thread each
    threads = min(plan.chains, os.cpu_count() or 1, 2) if kind == "serial" else 1
    tasks = [t for t in plan_tasks(plan, threads) if t.key not in done]
    if log and done:
        log(f"{len(done)} rep(s) of an earlier run of this plan are kept; {len(tasks)} to run")
    bar = _Bar(len(tasks), len(done), progress)
    t0 = time.perf_counter()
    new = []
    fh = open(path, "a", encoding="utf-8") if path else None
    try:
        if tasks:
            for r in EXECUTORS[kind](tasks, workers, cluster, fn=run_rep, lost=_rep_lost):
                r["fingerprint"] = fp
                new.append(r)
                bar.step(r)
                if fh:
                    fh.write(json.dumps(r, default=str) + "\n")
                    fh.flush()
    finally:
        if fh:
            fh.close()
    wall = time.perf_counter() - t0
    records = list(done.values()) + new
    order = {lay.key: li for li, lay in enumerate(plan.layouts)}
    records.sort(key=lambda r: (order[r["layout"]], r["rep"]))
    rows = flat_rows(records)
    eorder = {e: i for i, e in enumerate(plan.effects)}
    rows.sort(key=lambda r: (order[r["layout"]], eorder[r["effect"]], r["rep"]))
    table = assurance_table(plan, rows)
    compiles: dict[str, int] = {}
    cache_loads: dict[str, int] = {}
    for r in new:
        if r.get("ok"):
            compiles[str(r["pid"])] = compiles.get(str(r["pid"]), 0) + int(r.get("compiles", 0))
            cache_loads[str(r["pid"])] = cache_loads.get(str(r["pid"]), 0) + int(r.get("cache_loads", 0))
    failed = [{"key": r["key"], "error": r["error"]} for r in records if not r.get("ok")]
    ex_name = {"serial": "in-process", "pool": f"process pool ({workers} workers)", "dask": f"dask ({cluster})"}[kind]
    note = rho_note(
        plan.noise.stated["rho"] != 0 or bool(plan.noise.draws and "rho" in plan.noise.draws),
        {r.get("gap_fitted", "independent") for r in rows},
    )
    summary = {
        "plan": plan.to_dict() | ({"notes": list(plan.notes) + [note]} if note else {}),
        "assurance": table,
        "false_decision": [
            {
                "layout": t["layout"],
                "rate": t["false_decision_rate"],
                "mcse": t["assurance_mcse"],
                "reps": t["reps"],
                "bound": 1 - plan.level,
            }
            for t in table
            if t["effect"] == 0
        ],
        "failed": failed,
        "gap_fitted": sorted({r.get("gap_fitted", "independent") for r in rows}),
        "run": {
            "executor": ex_name,
            "ran_now": len(new),
            "kept_from_earlier_run": len(done),
            "compiles_per_worker": compiles,
            "cache_loads_per_worker": cache_loads,
            "wall_s": wall,
            "fits_now": int(sum(r.get("fits", 0) for r in new)),
            "compile_s_total": float(sum(r.get("compile_s", 0.0) for r in new)),
            "data_set_wall_s_median": float(np.median([r["wall_s"] for r in new])) if new else None,
            "sample_s_per_fit_median": float(
                np.median([r["sample_s"] / r["fits"] for r in new if r.get("ok") and r.get("fits")])
            )
            if any(r.get("ok") and r.get("fits") for r in new)
            else None,
        },
        "notes": {
            "assurance": "share of simulated data sets on which the decision rule concludes; mcse = sqrt(p (1 - p) / N)",
            "false_decision_rate": "the assurance at a true effect of 0: how often the rule concludes when the policy "
            "does nothing",
            "width_95": "width of the equal-tailed 95% posterior interval of the ATT, mean over data sets (model scale)",
            "permutation_power": "share of data sets on which the least-squares placebo-in-space permutation test, "
            f"one-sided ({plan.direction} 0), rejects at level {1 - plan.level:g}",
            "decision_flip_share": "expected share of data sets whose decision another run of the sampler would "
            "reverse: Phi(-|P - level| / MCSE of P) averaged (bayesdid.plan.decision_noise)",
            "decision_shift": "expected net change of the assurance from the sampler's Monte Carlo error: "
            "Phi((P - level) / MCSE) - 1{P >= level} averaged; when well below assurance_mcse, longer chains "
            "would not change the reading (bayesdid.plan.decision_noise)",
            "diagnostics": f"the share of inner fits whose ATT draws have R-hat below {PLAN_RHAT_MAX:g}, a bulk "
            f"ESS of at least {PLAN_ESS_MIN} and no divergent transition (the decision reads only the ATT)",
            "normal_assurance": "the normal approximation with known variance components (see "
            "bayesdid.plan.normal_assurance); empty where it does not apply",
        },
    }
    return {"summary": summary, "rows": rows, "records": records}


def write_plan(result: dict, out: str | Path, *, replace: bool = False, argv=None) -> Path:
    """Write plan.json, assurance.csv, false_decision.csv, reps.csv, assurance.png and report.html atomically."""
    from .report.plan_page import plot_assurance, render_plan_page
    from .run import atomic_folder, dump_json, versions

    s = result["summary"]
    with atomic_folder(out, replace=replace, kind="plan") as tmp:
        dump_json(s, tmp / "plan.json")
        write_rows_csv(s["assurance"], tmp / "assurance.csv")
        write_rows_csv(s["false_decision"], tmp / "false_decision.csv")
        write_rows_csv(result["rows"], tmp / "reps.csv")
        plot_assurance(s, tmp / "assurance.png")
        (tmp / "report.html").write_text(render_plan_page(s, tmp / "assurance.png"), encoding="utf-8")
        dump_json(
            {
                "bayesdid": _version(),
                "kind": "plan",
                "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "versions": versions(),
                "plan_file": s["plan"]["path"],
                "fingerprint": s["plan"]["fingerprint"],
                "command": list(argv) if argv is not None else sys.argv,
                "files": [
                    "plan.json",
                    "assurance.csv",
                    "false_decision.csv",
                    "reps.csv",
                    "assurance.png",
                    "report.html",
                    "manifest.json",
                ],
            },
            tmp / "manifest.json",
        )
    return Path(out)


def _version() -> str:
    from .version import __version__

    return __version__
