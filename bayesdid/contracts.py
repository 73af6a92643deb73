"""The contracts between the parts: typed results and the declared columns of every CSV table.

Writers (effects, cross-check, diagnostics, checks, sweep) produce these objects and write their JSON
through ``to_dict()``; the one reader of run folders (:mod:`bayesdid.report.reader`) turns the JSON
back into them with ``from_dict()``, which refuses a missing key with a message naming the file's
producer. Each CSV table's columns are declared here (:data:`TABLE_COLUMNS`); writers order their
frames by it (:func:`ordered`) and the reader checks it (:func:`check_columns`): nothing downstream
guesses a key or a column name.

A run is identified by :func:`run_id`: the first 16 hex digits of the SHA-256 of the data table's
SHA-256 and of the study's data, policy and model sections (what fixes the estimand; sampler settings
and prior scales are left out, so checks run with fewer draws still belong to the run). checks.json,
the sweep manifest and summary.json carry ``data_sha256`` and ``run_id``; the report refuses to put
together folders whose data differ.

This module is at the bottom of the house: it imports only the standard library, numpy and pandas.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field, fields

import pandas as pd

__all__ = [
    "ContractError",
    "TABLE_COLUMNS",
    "SWEEP_SUMMARY_COLUMNS",
    "ordered",
    "check_columns",
    "run_id",
    "EffectSummary",
    "CrossCheck",
    "Diagnostics",
    "CheckSection",
    "VariantRow",
    "SweepVerdict",
    "CHECK_NAMES",
    "CHECK_STATUSES",
    "RunIdentity",
]


class ContractError(ValueError):
    """A file does not hold what its producer declares (a missing key or column)."""


CHECK_NAMES = ("event_time", "pretrend", "placebo_time", "comparison", "placebo_space")
CHECK_STATUSES = ("ok", "flag", "not applicable", "failed")

#: Columns of every CSV table a command writes, in order.
TABLE_COLUMNS: dict[str, tuple[str, ...]] = {
    "event_time": ("event_time", "role", "mean", "sd", "lower_90", "upper_90", "prob_gt_0", "adopters"),
    "pretrend_band": (
        "adopter",
        "period",
        "period_index",
        "event_time",
        "observed_gap",
        "expected_gap",
        "band_median",
        "band_lower_90",
        "band_upper_90",
    ),
    "pretrend_stats": (
        "adopter",
        "statistic",
        "observed_mean",
        "replicated_lower_90",
        "replicated_upper_90",
        "p_value",
    ),
    "placebo_time": ("lag", "fake_start", "mean", "sd", "lower_90", "upper_90", "prob_gt_0"),
    "placebo_space": ("jurisdiction", "role", "mean", "sd", "lower_90", "upper_90", "prob_gt_0", "rank"),
    "comparison": (
        "jurisdiction",
        "mean",
        "sd",
        "lower_90",
        "upper_90",
        "prob_gt_0",
        "robust_z",
        "flagged",
        "loo_effect_mean",
        "loo_lower_90",
        "loo_upper_90",
    ),
}

#: Columns of a sweep's summary.csv. Effect figures are the ATT on the model scale (log units for a
#: log outcome); ``pct_*`` are the percent change exp(ATT) - 1 when the outcome is logged.
SWEEP_SUMMARY_COLUMNS = (
    "id",
    "label",
    "status",
    "overrides",
    "seed",
    "effect_mean",
    "effect_sd",
    "eti90_low",
    "eti90_high",
    "eti95_low",
    "eti95_high",
    "hdi90_low",
    "hdi90_high",
    "prob_gt_0",
    "prob_lt_0",
    "threshold",
    "prob_beyond_threshold",
    "pct_mean",
    "pct_eti90_low",
    "pct_eti90_high",
    "diagnostics_ok",
    "rhat_max",
    "ess_bulk_min",
    "divergences",
    "sensitivity_ok",
    "sample_s",
    "error",
)
TABLE_COLUMNS["sweep_summary"] = SWEEP_SUMMARY_COLUMNS


def ordered(name: str, frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with exactly the declared columns of table ``name``, in order (an empty frame gets them)."""
    cols = list(TABLE_COLUMNS[name])
    if frame.empty and not len(frame.columns):
        return pd.DataFrame(columns=cols)
    check_columns(name, frame, where=f"the {name} table being written")
    return frame[cols]


def check_columns(name: str, frame: pd.DataFrame, *, where: str) -> pd.DataFrame:
    """Refuse a table whose columns are not the declared ones; returns it unchanged."""
    want = TABLE_COLUMNS[name]
    have = list(frame.columns)
    missing = [c for c in want if c not in have]
    extra = [c for c in have if c not in want]
    if missing or extra:
        raise ContractError(
            f"{where}: table '{name}' should have the columns {list(want)}; "
            + (f"missing {missing}" if missing else "")
            + ("; " if missing and extra else "")
            + (f"unexpected {extra}" if extra else "")
            + ". It was written by another version of bayesdid: rerun the command that made it."
        )
    return frame


def run_id(data_sha256: str | None, study_dict: dict) -> str:
    """The id of a run: data hash plus the study's data, policy and model sections (see module doc)."""
    keep = {k: study_dict.get(k) for k in ("data", "policy", "model")}
    if isinstance(keep.get("data"), dict):
        keep["data"] = {k: v for k, v in keep["data"].items() if k != "table"}
    text = json.dumps({"data_sha256": data_sha256, **keep}, sort_keys=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _need(d, keys, what):
    if not isinstance(d, dict):
        raise ContractError(f"{what}: expected an object, found {type(d).__name__}")
    missing = [k for k in keys if k not in d]
    if missing:
        raise ContractError(
            f"{what} lacks {missing}; it was written by another version of bayesdid: rerun the command that made it."
        )


class _Typed:
    """to_dict / from_dict for the flat dataclasses below (unknown keys kept in ``extra``)."""

    def to_dict(self) -> dict:
        d = asdict(self)
        extra = d.pop("extra", {}) or {}
        return {**d, **extra}

    @classmethod
    def from_dict(cls, d: dict, *, what: str):
        names = [f.name for f in fields(cls) if f.name != "extra"]
        _need(d, cls._required, what)
        kw = {n: d[n] for n in names if n in d}
        obj = cls(**kw)
        if any(f.name == "extra" for f in fields(cls)):
            obj.extra = {k: v for k, v in d.items() if k not in names}
        return obj

    _required: tuple = ()


@dataclass
class EffectSummary(_Typed):
    """Posterior summary of one scalar estimand (``measure`` says which, on which scale)."""

    measure: str
    mean: float
    median: float
    sd: float
    eti_90: list
    eti_95: list
    hdi_90: list
    threshold: float | None = None
    prob_beyond_threshold: float | None = None
    prob_gt_0: float | None = None
    prob_lt_0: float | None = None
    no_effect: float = 0.0
    extra: dict = field(default_factory=dict)
    _required = ("measure", "mean", "median", "sd", "eti_90", "eti_95", "hdi_90")

    @property
    def is_ratio(self) -> bool:
        return self.no_effect == 1.0

    def prob_above_no_effect(self) -> float | None:
        return self.extra.get("prob_gt_1") if self.is_ratio else self.prob_gt_0

    def prob_below_no_effect(self) -> float | None:
        return self.extra.get("prob_lt_1") if self.is_ratio else self.prob_lt_0


@dataclass
class Diagnostics(_Typed):
    ok: bool
    rhat_max: float | None = None
    ess_bulk_min: float | None = None
    ess_tail_min: float | None = None
    divergences: int | None = None
    advice: str = ""
    thresholds: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)
    _required = ("ok",)


@dataclass
class CrossCheck(_Typed):
    """The least-squares block of summary.json; ``status`` "not applicable" carries a ``reason``."""

    status: str = "ok"
    reason: str = ""
    estimate: float | None = None
    scale: str = ""
    extra: dict = field(default_factory=dict)

    def get(self, key, default=None):
        if key in ("status", "reason", "estimate", "scale"):
            return getattr(self, key)
        return self.extra.get(key, default)

    def __contains__(self, key):
        return key in ("estimate",) and self.estimate is not None or key in self.extra


@dataclass
class CheckSection(_Typed):
    """One section of checks.json."""

    status: str
    reason: str
    threshold: dict = field(default_factory=dict)
    offenders: list = field(default_factory=list)
    tables: list = field(default_factory=list)
    extra: dict = field(default_factory=dict)
    _required = ("status", "reason")


@dataclass
class VariantRow(_Typed):
    """One finished variant in a sweep's verdict (effect on the model scale)."""

    id: str
    label: str
    effect_mean: float
    eti_90: list
    sign: str
    interval: str
    prob_beyond_threshold: float | None = None
    shift_sd: float = 0.0
    extra: dict = field(default_factory=dict)
    _required = ("id", "label", "effect_mean", "eti_90", "sign", "interval")


@dataclass
class SweepVerdict(_Typed):
    """sweep/verdict.json: does the answer hold across variants?"""

    status: str
    judged: int = 0
    not_judged: list = field(default_factory=list)
    base: str | None = None
    holds: bool | None = None
    checks: list = field(default_factory=list)
    rows: list = field(default_factory=list)
    moves_most: dict | None = None
    moves_probability_most: dict | None = None
    reason: str = ""
    extra: dict = field(default_factory=dict)
    _required = ("status",)

    def to_dict(self) -> dict:
        d = super().to_dict()
        d["rows"] = [r.to_dict() if isinstance(r, VariantRow) else r for r in self.rows]
        return d

    @classmethod
    def from_dict(cls, d: dict, *, what: str):
        obj = super().from_dict(d, what=what)
        obj.rows = [VariantRow.from_dict(r, what=f"{what}, a row") for r in obj.rows]
        return obj


@dataclass
class RunIdentity(_Typed):
    """What a folder says it came from."""

    data_sha256: str | None = None
    run_id: str | None = None
    extra: dict = field(default_factory=dict)
