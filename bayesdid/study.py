"""The study: what to analyse and how, validated once at the boundary.

A study is written as a TOML file (see README.md, "The study file") or built in Python with
:func:`make_study`. Either way it becomes a frozen :class:`Study`; every error names the key at
fault (for example ``policy.adopters``), the expected form and the value found.
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import frames
from .errors import StudyError
from .model.family import FAMILIES, FAMILY_RECORDS, families_allowing, families_reading, family_record

__all__ = [
    "Columns",
    "Policy",
    "ModelOptions",
    "PriorScales",
    "SamplerSettings",
    "Decision",
    "CrossCheckSettings",
    "Study",
    "load_study",
    "make_study",
    "study_to_dict",
    "PRIOR_NAMES",
    "STUDY_KEYS",
    "FAMILIES",
    "SAMPLER_LIMITS",
    "read_text_utf8",
]


#: Names of the prior scales and what each one governs (all in outcome units on the model scale).
PRIOR_NAMES = {
    "intercept": "sd of the normal prior on each group's mean level",
    "baseline_spread": "scale of the half-normal prior on the spread of jurisdiction-group baselines",
    "period": "sd of the normal prior on common period effects",
    "group_period": "sd of the normal prior on the target group's own period effects",
    "shock_spread": "scale of the half-normal prior on jurisdiction-period shocks shared by groups",
    "gap_noise": "scale of the half-normal prior on sigma_gap, the structural noise of the group gap",
    "effect": "sd of the normal prior on tau, the average effect of the policy",
    "adopter_spread": "scale of the half-normal prior on the spread of effects across adopters",
    "residual": "scale of the half-normal prior on each group's residual sd",
    "covariate": "sd of the normal prior on each (centred) covariate coefficient",
    "dispersion": "scale of the half-normal prior on 1/sqrt(phi) of the over-dispersed count family",
    "drift_spread": "scale of the half-normal prior on the spread of jurisdictions' linear gap drifts per period "
    "(model.gap_drift = true)",
}


def _where(key: str, value: Any, expected: str, fix: str = "") -> StudyError:
    msg = f"study key '{key}': expected {expected}, found {value!r}."
    if fix:
        msg += f" {fix}"
    return StudyError(msg)


def _check_keys(section: Mapping[str, Any], allowed: set[str], where: str) -> None:
    unknown = sorted(str(k) for k in set(section) - allowed)
    if unknown:
        raise StudyError(
            f"unknown key(s) {unknown} in [{where}]; allowed keys are {sorted(allowed)}. "
            "Check the spelling or remove them."
        )


def _section(raw: Mapping[str, Any], name: str, allowed: set[str]) -> Mapping[str, Any]:
    """The table ``[name]`` of the study (empty when absent), checked to be a table of known keys."""
    sec = raw.get(name, {})
    if sec is None:
        return {}
    if not isinstance(sec, Mapping):
        raise _where(
            name,
            sec,
            f"a [{name}] table with keys {sorted(allowed)}",
            f"Write it as a section: a line [{name}] followed by key = value lines.",
        )
    _check_keys(sec, allowed, name)
    return sec


def _get_str(d: Mapping[str, Any], key: str, where: str, *, required: bool = True) -> str | None:
    if key not in d or d[key] is None:
        if required:
            raise StudyError(f"study key '{where}.{key}' is missing; give the column or value as text.")
        return None
    v = d[key]
    if not isinstance(v, str) or not v.strip():
        raise _where(f"{where}.{key}", v, "a non-empty string")
    return v


def _get_int(d, key, where, default, *, minimum=None, maximum=None, why=""):
    v = d.get(key, default)
    if isinstance(v, bool) or not isinstance(v, numbers.Integral):
        raise _where(f"{where}.{key}", v, "an integer")
    v = int(v)
    if minimum is not None and v < minimum:
        raise _where(f"{where}.{key}", v, f"an integer of at least {minimum}", why)
    if maximum is not None and v > maximum:
        raise _where(f"{where}.{key}", v, f"an integer of at most {maximum}", why)
    return v


def _get_float(d, key, where, default, *, positive=False, allow_none=True):
    v = d.get(key, default)
    if v is None and allow_none:
        return None
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        raise _where(f"{where}.{key}", v, "a finite number")
    try:
        f = float(v)
    except OverflowError:
        f = math.inf
    if not math.isfinite(f):
        raise _where(f"{where}.{key}", v, "a finite number")
    if positive and f <= 0:
        raise _where(f"{where}.{key}", v, "a positive number")
    return f


def _get_bool(d, key, where, default):
    v = d.get(key, default)
    if not isinstance(v, bool):
        raise _where(f"{where}.{key}", v, "true or false")
    return v


@dataclass(frozen=True)
class Columns:
    """Roles of the table's columns. ``group`` is None for a plain difference in differences."""

    outcome: str
    jurisdiction: str
    period: str
    group: str | None = None
    unit: str | None = None
    exposure: str | None = None
    trials: str | None = None
    weight: str | None = None
    count: str | None = None
    sd: str | None = None
    se: str | None = None

    def used(self) -> list[str]:
        return [c for c in dataclasses.astuple(self) if c is not None]


@dataclass(frozen=True)
class Policy:
    """The policy: which group it targets and when each adopter first applies it.

    ``adopters`` is a tuple of (jurisdiction label, first treated period label) pairs, in the order
    given. Start periods may differ (staggered adoption).
    """

    adopters: tuple[tuple[str, Any], ...]
    target_group: str | None = None

    @property
    def starts(self) -> dict[str, Any]:
        return dict(self.adopters)


@dataclass(frozen=True)
class ModelOptions:
    family: str = "gaussian"
    log_outcome: bool = False
    covariates: str | None = None
    missing: str = "error"  # or "drop"
    #: Gap noise over periods: "persistent" (AR(1), the default) or "independent"
    gap_over_time: str = "persistent"
    #: Gap-noise scale across jurisdictions: "per_jurisdiction" (pooled) or "shared" (the default)
    gap_scale: str = "shared"
    #: Pooled jurisdiction-specific linear drifts of the gap (Gaussian; see bayesdid.model.terms)
    gap_drift: bool = False


@dataclass(frozen=True)
class PriorScales:
    """Prior scales in outcome units on the model scale. None means: scaled to the data."""

    intercept: float | None = None
    baseline_spread: float | None = None
    period: float | None = None
    group_period: float | None = None
    shock_spread: float | None = None
    gap_noise: float | None = None
    effect: float | None = None
    adopter_spread: float | None = None
    residual: float | None = None
    covariate: float | None = None
    dispersion: float | None = None
    drift_spread: float | None = None


@dataclass(frozen=True)
class SamplerSettings:
    chains: int = 2
    draws: int = 1000
    tune: int = 1000
    seed: int = 20261202


@dataclass(frozen=True)
class Decision:
    """A decision threshold on the headline effect.

    For an outcome on the log scale the threshold is a relative change (``-0.05`` = a 5% cut);
    otherwise it is in outcome units on the model scale. A negative threshold asks
    P(effect < threshold), a positive one P(effect > threshold).
    """

    threshold: float | None = None
    #: Probability at which the decision counts as made (used by the parallel-trends breakdown value).
    level: float = 0.9


@dataclass(frozen=True)
class TrendSettings:
    """The parallel-trends sensitivity (study-file section ``[trends]``, see :mod:`bayesdid.trends`):
    the grid of multiples M of the largest pre-policy change; each must be zero or positive."""

    multiples: tuple = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0)


CROSSCHECK_WEIGHTS = ("webb", "rademacher")


@dataclass(frozen=True)
class CrossCheckSettings:
    """The least-squares cross-check's resampling (study-file section ``[crosscheck]``).

    ``seed`` seeds the wild cluster bootstrap weights (and the placebo assignments when they must
    be sampled); ``draws`` is the number of bootstrap weight vectors (all of them are enumerated when
    there are no more); ``weights`` is ``"webb"`` (six-point) or ``"rademacher"``; ``placebos`` is the
    largest number of placebo-in-space assignments, beyond which they are sampled.
    """

    seed: int = 20261202
    draws: int = 999
    weights: str = "webb"
    placebos: int = 999


@dataclass(frozen=True)
class Wording:
    """How the report and the headline name things (study-file section ``[wording]``, all optional).

    ``policy`` the policy's name ("the copay cap"), ``outcome`` what the outcome is ("out-of-pocket
    spending"), ``unit`` its unit ("dollars per enrollee-quarter"), ``target`` the target group
    ("chronic-condition enrollees"). Absent: "the policy", "the outcome (<column>)", none, the
    target group's level.
    """

    policy: str | None = None
    outcome: str | None = None
    unit: str | None = None
    target: str | None = None


@dataclass(frozen=True)
class Study:
    """A validated study. Build with :func:`load_study` or :func:`make_study`."""

    table: Path
    columns: Columns
    policy: Policy
    model: ModelOptions = field(default_factory=ModelOptions)
    priors: PriorScales = field(default_factory=PriorScales)
    sampler: SamplerSettings = field(default_factory=SamplerSettings)
    decision: Decision = field(default_factory=Decision)
    crosscheck: CrossCheckSettings = field(default_factory=CrossCheckSettings)
    trends: TrendSettings = field(default_factory=TrendSettings)
    title: str = "bayesdid study"
    period_order: tuple | None = None
    placebo_lag: int | None = None
    summary: str | None = None  # what a row holds (SUMMARIES); None: one observation
    wording: Wording = field(default_factory=Wording)

    @property
    def design(self) -> str:
        return "DiD" if self.columns.group is None else "DDD"

    def replace(self, **changes) -> Study:
        """A copy with some top-level fields replaced; nested settings take dicts or dataclasses.

        The copy is rebuilt from the study-file layout by the same parser as :func:`load_study`, so
        every value goes through the same checks, with the same messages, whatever its source.
        """
        return _parse(_raw_with(self, changes), Path.cwd())


#: Study field -> section of the study file that holds it.
_FIELD_SECTIONS = {
    "columns": "data",
    "policy": "policy",
    "model": "model",
    "priors": "priors",
    "sampler": "sampler",
    "decision": "decision",
    "crosscheck": "crosscheck",
    "trends": "trends",
    "wording": "wording",
}


def _raw_with(study: Study, changes: Mapping[str, Any]) -> dict[str, Any]:
    """The study in study-file layout with ``changes`` (Study field -> value) applied."""
    raw = study_to_dict(study)
    fields = [f.name for f in dataclasses.fields(study)]
    for k, v in changes.items():
        if k not in fields:
            raise StudyError(f"unknown study field '{k}'; allowed: {sorted(fields)}.")
        if k == "title":
            raw["title"] = v
        elif k == "table":
            raw["data"]["table"] = os.fspath(v) if isinstance(v, os.PathLike) else v
        elif k == "summary":
            raw["data"].pop("summary", None)
            if v is not None:
                raw["data"]["summary"] = v
        elif k == "period_order":
            raw["data"].pop("period_order", None)
            if v is not None:
                raw["data"]["period_order"] = list(v) if isinstance(v, tuple) else v
        elif k == "placebo_lag":
            raw.setdefault("checks", {}).pop("placebo_lag", None)
            if v is not None:
                raw["checks"]["placebo_lag"] = v
        else:
            sec = _FIELD_SECTIONS[k]
            if dataclasses.is_dataclass(v) and not isinstance(v, type):
                if k == "columns":
                    keep = {kk: raw["data"][kk] for kk in ("table", "period_order", "summary") if kk in raw["data"]}
                    raw["data"] = {**keep, **{kk: vv for kk, vv in dataclasses.asdict(v).items() if vv is not None}}
                elif k == "policy":
                    raw["policy"] = {"adopters": dict(v.adopters)}
                    if v.target_group is not None:
                        raw["policy"]["target_group"] = v.target_group
                else:
                    raw[sec] = {kk: vv for kk, vv in dataclasses.asdict(v).items() if vv is not None}
            elif isinstance(v, Mapping):
                cur = dict(raw.get(sec, {}))
                for kk, vv in v.items():
                    if vv is None:
                        cur.pop(kk, None)
                    else:
                        cur[kk] = vv
                raw[sec] = cur
            else:
                raise _where(k, v, f"a dict of [{sec}] keys or a {type(getattr(study, k)).__name__}")
    return raw


_TOP_KEYS = {
    "title",
    "data",
    "policy",
    "model",
    "priors",
    "sampler",
    "decision",
    "checks",
    "crosscheck",
    "trends",
    "wording",
}
WORDING_KEYS = ("policy", "outcome", "unit", "target")
#: Every key the study file accepts, by section ("" = top level); the parser reads its allowed keys
#: from here, and tests/test_readme_keys.py checks each is documented in the README and read by the code.
STUDY_KEYS: dict[str, tuple[str, ...]] = {}
_DATA_KEYS = {
    "table",
    "outcome",
    "jurisdiction",
    "period",
    "group",
    "unit",
    "exposure",
    "trials",
    "period_order",
    "summary",
    "weight",
    "count",
    "sd",
    "se",
}
STUDY_KEYS.update(
    {
        "": ("title",),
        "data": tuple(sorted(_DATA_KEYS)),
        "policy": ("adopters", "target_group"),
        "model": ("family", "log_outcome", "covariates", "missing", "gap_over_time", "gap_scale", "gap_drift"),
        "priors": tuple(PRIOR_NAMES),
        "sampler": ("chains", "draws", "tune", "seed"),
        "decision": ("threshold", "level"),
        "trends": ("multiples",),
        "crosscheck": ("seed", "draws", "weights", "placebos"),
        "checks": ("placebo_lag",),
        "wording": WORDING_KEYS,
    }
)

#: What one row of the table holds (``data.summary``): absent = one observation per row.
SUMMARIES = {
    "mean": "the mean of the observations of a cell, with their count ('data.count') and their within-cell "
    "standard deviation ('data.sd') or the standard error of the mean ('data.se')",
    "proportion": "the proportion of successes among 'data.count' people (family 'binomial')",
    "rate": "events per unit of person-time, with the person-time in 'data.exposure' (family 'poisson' or "
    "'negbinomial')",
}


#: Bounds of the sampler settings. The lower ones keep diagnostics computable; the upper ones catch
#: typing slips (``--draws 10000000``) that would run for days or exhaust memory (common practice:
#: 2-8 chains of 500-5,000 draws); the seed must fit the sampler's unsigned 64-bit seed after the
#: small offsets the checks add.
SAMPLER_LIMITS = {"chains": (1, 64), "draws": (10, 1_000_000), "tune": (10, 1_000_000), "seed": (0, 2**63 - 1)}


def _parse(raw: Mapping[str, Any], base_dir: Path) -> Study:
    if not isinstance(raw, Mapping):
        raise _where("top level", raw, "a table of sections ([data], [policy], ...)")
    _check_keys(raw, _TOP_KEYS, "top level")
    data = raw.get("data")
    if not isinstance(data, Mapping):
        raise StudyError("the study needs a [data] section naming the table and the column roles.")
    _check_keys(data, _DATA_KEYS, "data")
    table = _get_str(data, "table", "data")
    path = Path(table)
    if not path.is_absolute() and not frames.is_memory(table):
        path = (base_dir / path).resolve()
    cols = Columns(
        outcome=_get_str(data, "outcome", "data"),
        jurisdiction=_get_str(data, "jurisdiction", "data"),
        period=_get_str(data, "period", "data"),
        group=_get_str(data, "group", "data", required=False),
        unit=_get_str(data, "unit", "data", required=False),
        exposure=_get_str(data, "exposure", "data", required=False),
        trials=_get_str(data, "trials", "data", required=False),
        weight=_get_str(data, "weight", "data", required=False),
        count=_get_str(data, "count", "data", required=False),
        sd=_get_str(data, "sd", "data", required=False),
        se=_get_str(data, "se", "data", required=False),
    )
    summary = data.get("summary")
    if summary is not None and summary not in SUMMARIES:
        raise _where("data.summary", summary, f"one of {list(SUMMARIES)} (or no key for one observation per row)")
    order = data.get("period_order")
    if order is not None:
        if not isinstance(order, (list, tuple)) or not order:
            raise _where("data.period_order", order, "a non-empty list of period labels in time order")
        bad = [v for v in order if isinstance(v, bool) or not isinstance(v, (str, int, float))]
        if bad:
            raise _where(
                "data.period_order",
                bad[0],
                "period labels (numbers or text) only",
                'List the labels of the period column in time order, e.g. ["2023Q1", "2023Q2"].',
            )
        seen: dict[str, Any] = {}
        for v in order:
            if str(v) in seen:
                raise _where(
                    "data.period_order", v, "each period once", f"The label {v!r} is listed twice; remove one."
                )
            seen[str(v)] = v

    pol = raw.get("policy")
    if pol is not None and not isinstance(pol, Mapping):
        raise _where("policy", pol, "a [policy] table with 'adopters' (and 'target_group' for DDD)")
    if not isinstance(pol, Mapping):
        raise StudyError("the study needs a [policy] section with 'adopters' (and 'target_group' for DDD).")
    _check_keys(pol, set(STUDY_KEYS["policy"]), "policy")
    adopters = pol.get("adopters")
    if not isinstance(adopters, Mapping) or not adopters:
        raise _where(
            "policy.adopters", adopters, 'a table of adopting jurisdiction = first treated period, e.g. {"Norvale" = 7}'
        )
    policy = Policy(
        adopters=tuple((str(k), v) for k, v in adopters.items()),
        target_group=_get_str(pol, "target_group", "policy", required=False),
    )

    m = _section(raw, "model", set(STUDY_KEYS["model"]))
    model = ModelOptions(
        family=m.get("family", "gaussian"),
        log_outcome=_get_bool(m, "log_outcome", "model", False),
        covariates=_get_str(m, "covariates", "model", required=False),
        missing=m.get("missing", "error"),
        gap_over_time=m.get("gap_over_time", "persistent"),
        gap_scale=m.get("gap_scale", "shared"),
        gap_drift=_get_bool(m, "gap_drift", "model", False),
    )
    p = _section(raw, "priors", set(PRIOR_NAMES))
    priors = PriorScales(**{k: _get_float(p, k, "priors", None, positive=True) for k in p})
    s = _section(raw, "sampler", set(STUDY_KEYS["sampler"]))
    defaults = SamplerSettings()
    sampler = SamplerSettings(
        **{
            k: _get_int(s, k, "sampler", getattr(defaults, k), minimum=lo, maximum=hi)
            for k, (lo, hi) in SAMPLER_LIMITS.items()
        }
    )
    d = _section(raw, "decision", set(STUDY_KEYS["decision"]))
    level = _get_float(d, "level", "decision", 0.9)
    if not 0.5 <= level < 1.0:
        raise _where(
            "decision.level",
            d.get("level"),
            "a probability from 0.5 up to (not including) 1",
            "It is the probability at which a decision counts as made, e.g. 0.9.",
        )
    decision = Decision(threshold=_get_float(d, "threshold", "decision", None), level=level)
    tr = _section(raw, "trends", set(STUDY_KEYS["trends"]))
    mult = tr.get("multiples", list(TrendSettings().multiples))
    if (
        not isinstance(mult, (list, tuple))
        or not mult
        or any(isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(float(v)) for v in mult)
    ):
        raise _where("trends.multiples", mult, "a non-empty list of finite numbers, e.g. [0, 0.5, 1, 2]")
    if any(float(v) < 0 for v in mult):
        raise _where(
            "trends.multiples",
            mult,
            "multiples of zero or more",
            "M scales the largest pre-policy change; a negative multiple has no meaning.",
        )
    trends = TrendSettings(multiples=tuple(sorted(float(v) for v in mult)))
    x = _section(raw, "crosscheck", set(STUDY_KEYS["crosscheck"]))
    weights = x.get("weights", "webb")
    if weights not in CROSSCHECK_WEIGHTS:
        raise _where("crosscheck.weights", weights, f"one of {list(CROSSCHECK_WEIGHTS)}")
    crosscheck = CrossCheckSettings(
        seed=_get_int(x, "seed", "crosscheck", 20261202, minimum=0),
        draws=_get_int(x, "draws", "crosscheck", 999, minimum=19),
        weights=weights,
        placebos=_get_int(x, "placebos", "crosscheck", 999, minimum=1),
    )
    c = _section(raw, "checks", set(STUDY_KEYS["checks"]))
    lag = c.get("placebo_lag")
    if lag is not None:
        lag = _get_int(c, "placebo_lag", "checks", None, minimum=1)
    title = raw.get("title", "bayesdid study")
    if not isinstance(title, str):
        raise _where("title", title, "a string")
    w = _section(raw, "wording", set(WORDING_KEYS))
    for k, v in w.items():
        if not isinstance(v, str) or not v.strip():
            raise _where(f"wording.{k}", v, "a non-empty string (words for the report)")
    wording = Wording(**{k: w[k].strip() for k in WORDING_KEYS if k in w})
    return _validated(
        Study(
            table=path,
            columns=cols,
            policy=policy,
            model=model,
            priors=priors,
            sampler=sampler,
            decision=decision,
            crosscheck=crosscheck,
            trends=trends,
            title=title,
            period_order=tuple(order) if order else None,
            placebo_lag=lag,
            summary=summary,
            wording=wording,
        )
    )


def _validated(study: Study) -> Study:
    """Cross-field checks that do not need the table."""
    x = study.crosscheck
    if x.weights not in CROSSCHECK_WEIGHTS:
        raise _where("crosscheck.weights", x.weights, f"one of {list(CROSSCHECK_WEIGHTS)}")
    for key, low in (("seed", 0), ("draws", 19), ("placebos", 1)):
        v = getattr(x, key)
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise _where(f"crosscheck.{key}", v, f"an integer of at least {low}")
    if study.model.family not in FAMILIES:
        raise _where("model.family", study.model.family, f"one of {list(FAMILIES)}")
    if study.model.missing not in ("error", "drop"):
        raise _where("model.missing", study.model.missing, "'error' or 'drop'")
    rec = family_record(study.model.family)
    if study.model.gap_drift and not rec.allows("gap_drift"):
        raise _where(
            "model.gap_drift",
            True,
            "false for non-gaussian families",
            "Pooled gap drifts are built for the gaussian family only so far.",
        )
    if study.model.gap_over_time not in ("persistent", "independent"):
        raise _where(
            "model.gap_over_time",
            study.model.gap_over_time,
            "'persistent' or 'independent'",
            "'persistent' lets the gap noise follow an AR(1) over periods; 'independent' does not.",
        )
    if study.model.gap_scale not in ("per_jurisdiction", "shared"):
        raise _where(
            "model.gap_scale",
            study.model.gap_scale,
            "'per_jurisdiction' or 'shared'",
            "'per_jurisdiction' gives each jurisdiction its own gap-noise scale, pooled across jurisdictions; "
            "'shared' gives all one scale.",
        )
    if study.model.log_outcome and not rec.allows("log_outcome"):
        raise _where(
            "model.log_outcome",
            True,
            "false for non-gaussian families",
            "Binomial and count families already use a logit or log link.",
        )
    if study.columns.group is not None and study.policy.target_group is None:
        raise StudyError(
            "study key 'policy.target_group' is missing: with a group column "
            f"('{study.columns.group}') the study is a DDD and must name the target group level."
        )
    if study.columns.group is None and study.policy.target_group is not None:
        raise StudyError(
            "study key 'policy.target_group' is set but 'data.group' is not: name the group "
            "column for a DDD, or drop target_group for a DiD."
        )
    if rec.size_role == "exposure" and rec.size_required:
        if study.columns.exposure is None:
            raise StudyError(
                f"family '{study.model.family}' needs 'data.exposure' (person-time per row); "
                "add a column of ones if every row counts one unit."
            )
    if study.columns.trials is not None and rec.size_role != "trials":
        trials_families = " or ".join(repr(n) for n, f in FAMILY_RECORDS.items() if f.size_role == "trials")
        raise _where("data.trials", study.columns.trials, f"no trials column unless model.family = {trials_families}")
    _validate_shape(study)
    roles = {f"data.{k}": v for k, v in dataclasses.asdict(study.columns).items() if v is not None}
    seen: dict[str, str] = {}
    for key, col in roles.items():
        if col in seen:
            raise StudyError(
                f"study keys '{seen[col]}' and '{key}' name the same column '{col}'; each role needs "
                "its own column. Fix one of them under [data]."
            )
        seen[col] = key
    t = study.decision.threshold
    if t is not None and t <= -1 and (study.model.log_outcome or rec.ratio_scale):
        scale = (
            "a log outcome (model.log_outcome = true)"
            if study.model.log_outcome
            else f"family '{study.model.family}', whose effect is read as a ratio"
        )
        raise _where(
            "decision.threshold",
            t,
            f"a relative change above -1 for {scale}",
            f"{t:g} would be a cut of {-t:.0%}, which no ratio can reach; write a cut of 15% as -0.15.",
        )
    names = [a for a, _ in study.policy.adopters]
    if len(set(names)) != len(names):
        raise _where("policy.adopters", names, "each adopter once")
    for a, start in study.policy.adopters:
        if isinstance(start, bool) or not isinstance(start, (int, str, float)):
            raise _where(f"policy.adopters.{a}", start, "a period label (number or text)")
    return study


def _validate_shape(study: Study) -> None:
    """Keys of the input's shape: summaries (data.summary with count, sd or se) and sampling weights."""
    c, fam, summary = study.columns, study.model.family, study.summary
    if summary is None:
        for key in ("count", "sd", "se"):
            if getattr(c, key) is not None:
                raise _where(
                    f"data.{key}",
                    getattr(c, key),
                    "no such column unless 'data.summary' is set",
                    'Set data.summary = "mean" (or "proportion") when each row summarises a cell.',
                )
    else:
        need = families_reading(summary)
        if fam not in need:
            raise _where("model.family", fam, f"{' or '.join(repr(f) for f in need)} with data.summary = '{summary}'")
        if summary in ("mean", "proportion") and c.count is None:
            raise StudyError(
                f"data.summary = '{summary}' needs 'data.count', the column holding how many "
                "people (observations) each row summarises."
            )
        if summary == "rate" and c.count is not None:
            raise _where(
                "data.count",
                c.count,
                "no count column with data.summary = 'rate'",
                "A rate's denominator is its person-time: name it in 'data.exposure'.",
            )
        if summary == "mean" and (c.sd is None) == (c.se is None):
            raise StudyError(
                "data.summary = 'mean' needs exactly one of 'data.sd' (the within-cell standard "
                "deviation of the observations) and 'data.se' (the standard error of the mean)"
                + ("; both are set." if c.sd is not None else "; neither is set.")
            )
        if summary != "mean" and (c.sd is not None or c.se is not None):
            key = "sd" if c.sd is not None else "se"
            raise _where(
                f"data.{key}",
                getattr(c, key),
                f"no sd or se column with data.summary = '{summary}'",
                "The binomial and count families need no spread: the count and the total determine it.",
            )
        if summary == "proportion" and c.trials is not None:
            raise _where(
                "data.trials",
                c.trials,
                "no trials column with data.summary = 'proportion'",
                "The number of people is 'data.count'.",
            )
        if study.model.log_outcome:
            raise _where(
                "model.log_outcome",
                True,
                "false with data.summary",
                "The mean of the logs cannot be computed from the mean: summarise log(outcome) per cell "
                "and give those means with log_outcome = false.",
            )
        if study.model.covariates:
            raise _where(
                "model.covariates",
                study.model.covariates,
                "no covariates with data.summary",
                "Covariates need the observation-level rows; give those rows without data.summary.",
            )
        for key in ("weight", "unit"):
            if getattr(c, key) is not None:
                raise _where(
                    f"data.{key}",
                    getattr(c, key),
                    f"no {key} column with data.summary",
                    "A summary row already stands for many observations; give the observation-level rows.",
                )
    if c.unit is not None:
        if not family_record(fam).allows("unit"):
            raise _where(
                "data.unit",
                c.unit,
                f"a unit column with family {families_allowing('unit')} only",
                f"Unit fixed effects for family '{fam}' are not supported; leave out data.unit (pooled).",
            )
        if study.model.covariates or c.weight is not None:
            what = "model.covariates" if study.model.covariates else "data.weight"
            raise _where(
                what,
                study.model.covariates or c.weight,
                "not set together with data.unit",
                "Unit fixed effects are supported without covariates and weights; leave out one of them.",
            )
    if c.weight is not None:
        if not family_record(fam).allows("weight"):
            raise _where(
                "data.weight",
                c.weight,
                f"sampling weights with family {families_allowing('weight')} only",
                f"Weighted likelihoods for family '{fam}' are not supported; drop data.weight.",
            )
        if study.model.covariates:
            raise _where(
                "model.covariates",
                study.model.covariates,
                "no covariates together with data.weight",
                "Weighted cells support a Gaussian outcome without covariates; drop the covariates or the weights.",
            )


def read_text_utf8(path: str | Path, what: str, error=StudyError) -> str:
    """The text of a file that must be UTF-8 (a byte-order mark is allowed).

    Raises ``error`` naming the file, what it is, and when it is not UTF-8 the first bad byte with
    its line and column, and the fix.
    """
    path = Path(path)
    if path.is_dir():
        raise error(f"{what} '{path}' is a folder, not a file; give the path of the file itself.")
    if not path.exists():
        if path.is_symlink():
            raise error(
                f"{what} '{path}' is a symbolic link that leads nowhere (its target is missing, or the "
                "link loops); point it at the file, or give the file's own path."
            )
        raise error(f"{what} '{path}' does not exist; check the path (relative paths start in the current folder).")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise error(f"{what} '{path}' cannot be read ({type(exc).__name__}: {exc.strerror or exc}).") from None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        col = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise error(
            f"{what} '{path}' is not UTF-8 text: byte 0x{data[exc.start]:02x} on line {line}, column {col} "
            "cannot be read. Save the file with the UTF-8 encoding (in most editors: Save as, "
            "encoding UTF-8)."
        ) from None


def load_study(path: str | Path) -> Study:
    """Read and validate a study file (TOML, UTF-8).

    Raises
    ------
    StudyError
        If the path is missing or a folder, the file is not UTF-8 or not valid TOML, or any key is wrong.
    """
    path = Path(path)
    text = read_text_utf8(path, "study file")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StudyError(f"study file '{path}' is not valid TOML: {exc}. Fix the line it names.") from None
    return _parse(raw, path.parent.resolve())


def make_study(
    *,
    table,
    outcome,
    jurisdiction,
    period,
    adopters,
    group=None,
    target_group=None,
    log_outcome=False,
    family="gaussian",
    covariates=None,
    missing="error",
    gap_over_time=None,
    gap_scale=None,
    exposure=None,
    trials=None,
    unit=None,
    weight=None,
    summary=None,
    count=None,
    sd=None,
    se=None,
    priors=None,
    chains=2,
    draws=1000,
    tune=1000,
    seed=20261202,
    threshold=None,
    title="bayesdid study",
    period_order=None,
    placebo_lag=None,
    crosscheck=None,
    wording=None,
) -> Study:
    """Build a validated study in Python, without a file. Arguments mirror the study-file keys.

    ``table`` is a path or a pandas DataFrame (kept in memory, see :mod:`bayesdid.frames`).
    """
    if hasattr(table, "dtypes") and hasattr(table, "columns"):  # a data frame (notebook use)
        table = frames.register(table)
    raw: dict[str, Any] = {
        "title": title,
        "data": {
            k: v
            for k, v in dict(
                table=os.fspath(table) if isinstance(table, os.PathLike) else table,
                outcome=outcome,
                jurisdiction=jurisdiction,
                period=period,
                group=group,
                unit=unit,
                exposure=exposure,
                trials=trials,
                period_order=period_order,
                weight=weight,
                summary=summary,
                count=count,
                sd=sd,
                se=se,
            ).items()
            if v is not None
        },
        "policy": {
            k: v
            for k, v in dict(
                adopters=dict(adopters) if isinstance(adopters, Mapping) else adopters, target_group=target_group
            ).items()
            if v is not None
        },
        "model": {
            k: v
            for k, v in dict(
                family=family,
                log_outcome=log_outcome,
                covariates=covariates,
                missing=missing,
                gap_over_time=gap_over_time,
                gap_scale=gap_scale,
            ).items()
            if v is not None
        },
        "priors": dict(priors) if isinstance(priors, Mapping) else (priors or {}),
        "sampler": dict(chains=chains, draws=draws, tune=tune, seed=seed),
        "decision": {} if threshold is None else {"threshold": threshold},
        "checks": {} if placebo_lag is None else {"placebo_lag": placebo_lag},
        "crosscheck": dict(crosscheck) if isinstance(crosscheck, Mapping) else (crosscheck or {}),
        "wording": dict(wording) if isinstance(wording, Mapping) else (wording or {}),
    }
    return _parse(raw, Path.cwd())


def study_to_dict(study: Study) -> dict[str, Any]:
    """The study as run, in the layout of the study file (for manifests and sweeps)."""
    c = study.columns
    data = {k: v for k, v in dataclasses.asdict(c).items() if v is not None}
    data["table"] = str(study.table)
    if study.period_order:
        data["period_order"] = list(study.period_order)
    if study.summary is not None:
        data["summary"] = study.summary
    out: dict[str, Any] = {
        "title": study.title,
        "data": data,
        "policy": {"adopters": dict(study.policy.adopters)},
        "model": {k: v for k, v in dataclasses.asdict(study.model).items() if v is not None},
        "priors": {k: v for k, v in dataclasses.asdict(study.priors).items() if v is not None},
        "sampler": dataclasses.asdict(study.sampler),
        "decision": {k: v for k, v in dataclasses.asdict(study.decision).items() if v is not None},
        "crosscheck": dataclasses.asdict(study.crosscheck),
        "trends": {"multiples": list(study.trends.multiples)},
    }
    if study.policy.target_group is not None:
        out["policy"]["target_group"] = study.policy.target_group
    if study.placebo_lag is not None:
        out["checks"] = {"placebo_lag": study.placebo_lag}
    wording = {k: v for k, v in dataclasses.asdict(study.wording).items() if v is not None}
    if wording:
        out["wording"] = wording
    return out
